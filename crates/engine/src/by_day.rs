//! The rows of a windowed-totals range query put in (snapshot day, key) order without a
//! general sort.
//!
//! That query emits each key's days together (one list per key, unnested), so its rows
//! come as runs of one key. Sorting the runs' keys (one per key, about 30 thousand on the
//! benchmark's world) and taking each day's rows run by run, in key order, gives every
//! day's rows in key order. DataFusion's sort of the same 5.8 million rows by
//! (date, key string) cost about 2.6 s of compute, most of it comparing row-encoded keys
//! (docs/benchmarks.md, twenty-third measurement). The result is the order
//! `ORDER BY snapshot_date, key` gives: keys ascending byte-wise, nulls last; a key has
//! one row per day, so rows never tie.

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch};
use datafusion::arrow::buffer::ScalarBuffer;
use datafusion::arrow::compute::{interleave, partition, sort_to_indices, SortOptions};
use datafusion::arrow::datatypes::{Date32Type, SchemaRef};
use datafusion::error::{DataFusionError, Result};
use futures::stream::{BoxStream, StreamExt};
use std::ops::Range;
use std::sync::Arc;

/// Days gathered together ([`ByDay::into_stream`]). A key's rows for consecutive days
/// lie next to each other in the query's output, while one day's rows lie one per key
/// across all of it: gathering a day at a time read a cache line per value, about a tenth
/// of a backfill's range query (docs/benchmarks.md, twenty-fourth measurement). A block
/// of days is gathered together: each key's rows of the block lie in one stretch, copied
/// value by value to their days ([`gather`]).
const DAYS_PER_GATHER: usize = 32;

/// Rows of one query, handed out one day at a time, days ascending, keys ascending within
/// a day. Days without rows are skipped.
pub struct ByDay {
    schema: SchemaRef,
    /// Each column, as the arrays of every batch.
    columns: Arc<Vec<Vec<ArrayRef>>>,
    /// Each batch's dates.
    dates: Arc<Vec<ScalarBuffer<i32>>>,
    /// (batch, rows) of runs of one key with dates ascending, in key order.
    runs: Arc<Vec<(usize, Range<usize>)>>,
    /// The days with rows, ascending.
    days: Vec<i32>,
}

impl ByDay {
    /// Orders `batches` (all of one schema) by the date column `date` (`Date32`, never
    /// null), then the key column `key`.
    pub fn new(
        schema: SchemaRef,
        batches: Vec<RecordBatch>,
        key: usize,
        date: usize,
    ) -> Result<Self> {
        let batches: Vec<RecordBatch> = batches.into_iter().filter(|b| b.num_rows() > 0).collect();
        let dates = batches
            .iter()
            .map(|b| {
                let d = b
                    .column(date)
                    .as_primitive_opt::<Date32Type>()
                    .ok_or_else(|| {
                        DataFusionError::Internal("snapshot_date is not a date".into())
                    })?;
                if d.null_count() > 0 {
                    return Err(DataFusionError::Internal("a snapshot_date is null".into()));
                }
                Ok(d.values().clone())
            })
            .collect::<Result<Vec<_>>>()?;
        // Runs of consecutive rows with one key, cut where the dates go down (the query
        // gives each key's days ascending; the cut keeps this right whatever it gives),
        // and the key of each. A key has one row per day, so its runs never share a day.
        let mut runs: Vec<(usize, Range<usize>)> = Vec::new();
        for (b, batch) in batches.iter().enumerate() {
            let d = &dates[b];
            for r in partition(std::slice::from_ref(batch.column(key)))?.ranges() {
                let mut start = r.start;
                for i in r.start + 1..r.end {
                    if d[i] < d[i - 1] {
                        runs.push((b, start..i));
                        start = i;
                    }
                }
                runs.push((b, start..r.end));
            }
        }
        let keys: Vec<&dyn Array> = batches.iter().map(|b| b.column(key).as_ref()).collect();
        let firsts: Vec<(usize, usize)> = runs.iter().map(|(b, r)| (*b, r.start)).collect();
        let run_keys = interleave(&keys, &firsts)?;
        let order = sort_to_indices(
            &run_keys,
            Some(SortOptions {
                descending: false,
                nulls_first: false,
            }),
            None,
        )?;
        let runs: Vec<(usize, Range<usize>)> = order
            .values()
            .iter()
            .map(|i| runs[*i as usize].clone())
            .collect();
        let mut days: Vec<i32> = dates.iter().flat_map(|d| d.iter().copied()).collect();
        days.sort_unstable();
        days.dedup();
        let columns = Arc::new(
            (0..schema.fields().len())
                .map(|c| batches.iter().map(|b| b.column(c).clone()).collect())
                .collect(),
        );
        Ok(ByDay {
            schema,
            columns,
            dates: Arc::new(dates),
            runs: Arc::new(runs),
            days,
        })
    }
}

impl ByDay {
    /// The days' rows as a stream, in order: blocks of [`DAYS_PER_GATHER`] days gathered
    /// on blocking threads, `ahead` blocks side by side.
    pub fn into_stream(self, ahead: usize) -> BoxStream<'static, Result<RecordBatch>> {
        let ByDay {
            schema,
            columns,
            dates,
            runs,
            days,
        } = self;
        let blocks: Vec<Vec<i32>> = days.chunks(DAYS_PER_GATHER).map(<[i32]>::to_vec).collect();
        futures::stream::iter(blocks)
            .map(move |block| {
                let (schema, columns, dates, runs) =
                    (schema.clone(), columns.clone(), dates.clone(), runs.clone());
                tokio::task::spawn_blocking(move || {
                    gather(&schema, &columns, &dates, &runs, &block)
                })
            })
            .buffered(ahead.max(1))
            .flat_map(|joined| {
                let days = joined
                    .unwrap_or_else(|e| Err(DataFusionError::External(Box::new(e))))
                    .map_or_else(|e| vec![Err(e)], |b| b.into_iter().map(Ok).collect());
                futures::stream::iter(days)
            })
            .boxed()
    }
}

/// The rows of days `block` (ascending, with rows), one batch per day. Each run's rows of
/// the block lie in one stretch: fixed-width columns are copied from it stretch by
/// stretch, each value to its day's buffer; other columns (the key's text) are gathered
/// day by day.
fn gather(
    schema: &SchemaRef,
    columns: &[Vec<ArrayRef>],
    dates: &[ScalarBuffer<i32>],
    runs: &[(usize, Range<usize>)],
    block: &[i32],
) -> Result<Vec<RecordBatch>> {
    let (Some(&first), Some(&last)) = (block.first(), block.last()) else {
        return Ok(Vec::new());
    };
    // Position in `block` of each date from `first` to `last` (every date with rows in
    // that span is in the block: blocks are consecutive days with rows).
    let mut slot = vec![0usize; (last - first) as usize + 1];
    for (i, d) in block.iter().enumerate() {
        slot[(d - first) as usize] = i;
    }
    // The stretch of each run in the block (runs are date-ascending), in key order, and
    // the day (position in `block`) of each of their rows, in that order, found once for
    // every column.
    let mut stretches: Vec<(usize, Range<usize>)> = Vec::new();
    let mut days: Vec<usize> = Vec::new();
    let mut counts = vec![0usize; block.len()];
    for (b, r) in runs {
        let d = &dates[*b][r.clone()];
        let from = d.partition_point(|x| *x < first);
        let to = d.partition_point(|x| *x <= last);
        if from < to {
            for day in &d[from..to] {
                let i = slot[(day - first) as usize];
                counts[i] += 1;
                days.push(i);
            }
            stretches.push((*b, r.start + from..r.start + to));
        }
    }
    // (batch, row) of each day's rows, in key order, for the columns gathered day by day.
    let mut rows: Option<Vec<Vec<(usize, usize)>>> = None;
    let mut out: Vec<Vec<ArrayRef>> = vec![Vec::with_capacity(columns.len()); block.len()];
    for (field, arrays) in schema.fields().iter().zip(columns) {
        let per_day = match field.data_type().primitive_width() {
            Some(width) => copy_fixed(arrays, width, &stretches, &days, &counts)?,
            None => {
                let rows = rows.get_or_insert_with(|| {
                    let mut rows: Vec<Vec<(usize, usize)>> =
                        counts.iter().map(|n| Vec::with_capacity(*n)).collect();
                    let all = stretches
                        .iter()
                        .flat_map(|(b, r)| r.clone().map(|row| (*b, row)));
                    for (at, &day) in all.zip(&days) {
                        rows[day].push(at);
                    }
                    rows
                });
                let refs: Vec<&dyn Array> = arrays.iter().map(|a| a.as_ref()).collect();
                rows.iter()
                    .map(|r| interleave(&refs, r))
                    .collect::<std::result::Result<Vec<_>, _>>()?
            }
        };
        for (day, array) in out.iter_mut().zip(per_day) {
            day.push(array);
        }
    }
    out.into_iter()
        .map(|columns| Ok(RecordBatch::try_new(schema.clone(), columns)?))
        .collect()
}

/// One fixed-width column (values of `width` bytes) of each day of a block, copied from
/// `arrays` stretch by stretch: `stretches` in key order, `days` the day (position in the
/// block) of each of their rows in that order, `counts` rows per day.
fn copy_fixed(
    arrays: &[ArrayRef],
    width: usize,
    stretches: &[(usize, Range<usize>)],
    days: &[usize],
    counts: &[usize],
) -> Result<Vec<ArrayRef>> {
    use datafusion::arrow::array::{make_array, ArrayData, NullBufferBuilder};
    use datafusion::arrow::buffer::Buffer;
    let data: Vec<ArrayData> = arrays.iter().map(|a| a.to_data()).collect();
    let nullable = arrays.iter().any(|a| a.null_count() > 0);
    let mut values: Vec<Vec<u8>> = counts
        .iter()
        .map(|n| Vec::with_capacity(n * width))
        .collect();
    let mut nulls: Vec<NullBufferBuilder> = counts
        .iter()
        .map(|n| NullBufferBuilder::new(if nullable { *n } else { 0 }))
        .collect();
    // The loop with the values' width known when compiled (each copy a single move,
    // where a width known only at run time calls `memcpy` for every value).
    fn copy<const W: usize>(
        data: &[datafusion::arrow::array::ArrayData],
        stretches: &[(usize, Range<usize>)],
        days: &[usize],
        values: &mut [Vec<u8>],
        nulls: Option<&mut [NullBufferBuilder]>,
    ) {
        let mut nulls = nulls;
        let mut days = days.iter();
        for (i, (b, r)) in stretches.iter().enumerate() {
            // The stretches lie far apart: the one a few ahead is fetched while this one
            // is copied.
            if let Some((b, r)) = stretches.get(i + 4) {
                let d = &data[*b];
                let at = (d.offset() + r.start) * W;
                crate::window_totals::prefetch(d.buffers()[0].as_ptr().wrapping_add(at));
            }
            let d = &data[*b];
            let bytes = &d.buffers()[0].as_slice()[d.offset() * W..];
            for (row, &day) in r.clone().zip(days.by_ref()) {
                let value: [u8; W] = bytes[row * W..(row + 1) * W].try_into().unwrap_or([0; W]);
                values[day].extend_from_slice(&value);
                if let Some(n) = nulls.as_deref_mut() {
                    n[day].append(d.is_valid(row));
                }
            }
        }
    }
    let n = nullable.then_some(&mut nulls[..]);
    match width {
        1 => copy::<1>(&data, stretches, days, &mut values, n),
        2 => copy::<2>(&data, stretches, days, &mut values, n),
        4 => copy::<4>(&data, stretches, days, &mut values, n),
        8 => copy::<8>(&data, stretches, days, &mut values, n),
        16 => copy::<16>(&data, stretches, days, &mut values, n),
        32 => copy::<32>(&data, stretches, days, &mut values, n),
        _ => {
            return Err(DataFusionError::Internal(format!(
                "no copy for values of {width} bytes"
            )))
        }
    }
    let data_type = data
        .first()
        .map(|d| d.data_type().clone())
        .ok_or_else(|| DataFusionError::Internal("a column without arrays".into()))?;
    values
        .into_iter()
        .zip(nulls)
        .zip(counts)
        .map(|((v, mut n), len)| {
            let built = ArrayData::builder(data_type.clone())
                .len(*len)
                .add_buffer(Buffer::from_vec(v))
                .nulls(n.finish())
                .build()?;
            Ok(make_array(built))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::array::{Date32Array, Int64Array, StringArray};
    use datafusion::arrow::datatypes::{DataType, Field, Schema};

    fn batch(schema: &SchemaRef, keys: &[Option<&str>], days: &[i32], v: &[i64]) -> RecordBatch {
        RecordBatch::try_new(
            schema.clone(),
            vec![
                Arc::new(StringArray::from(keys.to_vec())),
                Arc::new(Date32Array::from(days.to_vec())),
                // Negative values stand for NULL.
                Arc::new(Int64Array::from_iter(
                    v.iter().map(|x| (*x >= 0).then_some(*x)),
                )),
            ],
        )
        .unwrap()
    }

    /// Rows as (key, day, value; -1 for NULL), in the order given.
    fn rows(batches: &[RecordBatch]) -> Vec<(Option<String>, i32, i64)> {
        let mut out = Vec::new();
        for b in batches {
            let (k, d, v) = (
                b.column(0).as_string::<i32>(),
                b.column(1).as_primitive::<Date32Type>(),
                b.column(2)
                    .as_primitive::<datafusion::arrow::datatypes::Int64Type>(),
            );
            for i in 0..b.num_rows() {
                out.push((
                    k.is_valid(i).then(|| k.value(i).to_string()),
                    d.value(i),
                    if v.is_valid(i) { v.value(i) } else { -1 },
                ));
            }
        }
        out
    }

    /// The same rows as a plain sort by (day, key, nulls last) gives them, one batch per
    /// day: keys out of order, a key's days cut by a batch boundary, a null key, a day
    /// with no rows between two days, an empty batch, a NULL value, a key whose days go
    /// down within a run, and more days than one gathered block holds.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn rows_come_by_day_then_key() {
        let schema: SchemaRef = Arc::new(Schema::new(vec![
            Field::new("k", DataType::Utf8, true),
            Field::new("snapshot_date", DataType::Date32, false),
            Field::new("v", DataType::Int64, true),
        ]));
        let input = vec![
            batch(
                &schema,
                &[Some("m"), Some("m"), Some("m"), Some("b"), Some("b")],
                &[10, 11, 13, 10, 11],
                &[1, 2, 3, 4, 5],
            ),
            batch(&schema, &[], &[], &[]),
            batch(
                &schema,
                &[Some("b"), None, None, Some("ab"), Some("z")],
                &[13, 10, 13, 11, 10],
                &[6, 7, 8, -1, 10],
            ),
            // More days than one gathered block holds, and q's days going down across
            // the first block's end.
            {
                let b = DAYS_PER_GATHER as i32;
                batch(
                    &schema,
                    &[Some("q"); 3]
                        .into_iter()
                        .chain(std::iter::repeat_n(Some("a"), b as usize + 2))
                        .collect::<Vec<_>>(),
                    &[20 + b, 10, 40 + b]
                        .into_iter()
                        .chain(20..=20 + b)
                        .chain([40 + b])
                        .collect::<Vec<_>>(),
                    &(11..16 + b as i64).collect::<Vec<_>>(),
                )
            },
        ];
        let mut expected = rows(&input);
        expected.sort_by(|a, b| (a.1, a.0.is_none(), &a.0).cmp(&(b.1, b.0.is_none(), &b.0)));
        let out: Vec<RecordBatch> = ByDay::new(schema.clone(), input, 0, 1)
            .unwrap()
            .into_stream(2)
            .collect::<Vec<_>>()
            .await
            .into_iter()
            .collect::<Result<_>>()
            .unwrap();
        let n = DAYS_PER_GATHER;
        assert_eq!(out.len(), n + 5, "days 10, 11, 13, 20 to 20 + n and 40 + n");
        assert_eq!(rows(&out), expected);
        assert_eq!(
            rows(&out[..1]).iter().map(|r| r.2).collect::<Vec<_>>(),
            vec![4, 1, 12, 10, 7],
            "day 10: b, m, q, z, then the null key"
        );
        assert_eq!(
            rows(&out[n + 4..]).iter().map(|r| r.2).collect::<Vec<_>>(),
            vec![15 + n as i64, 13],
            "day 40 + n: a, q"
        );
    }
}
