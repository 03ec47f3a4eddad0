//! The rows of a windowed-totals range query put in (snapshot day, key) order without a
//! general sort.
//!
//! That query emits each key's days together (one list per key, unnested), so its rows
//! come as runs of one key. Sorting the runs' keys (one per key, about 30 thousand on the
//! benchmark's world) and dealing each run's rows into per-day buckets, key by key, gives
//! every day's rows in key order. DataFusion's sort of the same 5.8 million rows by
//! (date, key string) cost about 2.6 s of compute, most of it comparing row-encoded keys
//! (docs/benchmarks.md, twenty-third measurement). The result is the order
//! `ORDER BY snapshot_date, key` gives: keys ascending byte-wise, nulls last; a key has
//! one row per day, so rows never tie.

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch};
use datafusion::arrow::compute::{interleave, partition, sort_to_indices, SortOptions};
use datafusion::arrow::datatypes::{Date32Type, SchemaRef};
use datafusion::error::{DataFusionError, Result};
use futures::stream::{BoxStream, StreamExt};
use std::ops::Range;
use std::sync::Arc;

/// Rows of one query, handed out one day at a time, days ascending, keys ascending within
/// a day. Days without rows are skipped.
pub struct ByDay {
    schema: SchemaRef,
    /// Each column, as the arrays of every batch.
    columns: Arc<Vec<Vec<ArrayRef>>>,
    /// (batch, row) of the rows of each day with rows, in key order.
    days: Vec<Vec<(usize, usize)>>,
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
        // Runs of consecutive rows with one key, and the key of each.
        let mut runs: Vec<(usize, Range<usize>)> = Vec::new();
        for (b, batch) in batches.iter().enumerate() {
            let ranges = partition(std::slice::from_ref(batch.column(key)))?.ranges();
            runs.extend(ranges.into_iter().map(|r| (b, r)));
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
        // Rows per day, then each run's rows dealt to their days, runs in key order. Runs
        // of one key (a key's rows cut by a batch boundary) hold different days.
        let (lo, hi) = dates
            .iter()
            .flat_map(|d| d.iter().copied())
            .fold((i32::MAX, i32::MIN), |(lo, hi), d| (lo.min(d), hi.max(d)));
        let span = if lo > hi { 0 } else { (hi - lo) as usize + 1 };
        let mut counts = vec![0usize; span];
        for d in &dates {
            for v in d.iter() {
                counts[(v - lo) as usize] += 1;
            }
        }
        let mut days: Vec<Vec<(usize, usize)>> =
            counts.iter().map(|n| Vec::with_capacity(*n)).collect();
        for i in order.values() {
            let (b, r) = &runs[*i as usize];
            let d = &dates[*b];
            for row in r.clone() {
                days[(d[row] - lo) as usize].push((*b, row));
            }
        }
        let columns = Arc::new(
            (0..schema.fields().len())
                .map(|c| batches.iter().map(|b| b.column(c).clone()).collect())
                .collect(),
        );
        Ok(ByDay {
            schema,
            columns,
            days: days.into_iter().filter(|d| !d.is_empty()).collect(),
        })
    }
}

impl ByDay {
    /// The days' rows as a stream, in order, `ahead` days gathered side by side on
    /// blocking threads (gathering a day's rows from every batch is the costly part).
    pub fn into_stream(self, ahead: usize) -> BoxStream<'static, Result<RecordBatch>> {
        let (schema, columns) = (self.schema, self.columns);
        futures::stream::iter(self.days)
            .map(move |rows| {
                let (schema, columns) = (schema.clone(), columns.clone());
                tokio::task::spawn_blocking(move || gather(&schema, &columns, &rows))
            })
            .buffered(ahead.max(1))
            .map(|joined| joined.unwrap_or_else(|e| Err(DataFusionError::External(Box::new(e)))))
            .boxed()
    }
}

/// The rows `rows` ((batch, row) pairs) of `columns` as one batch.
fn gather(
    schema: &SchemaRef,
    columns: &[Vec<ArrayRef>],
    rows: &[(usize, usize)],
) -> Result<RecordBatch> {
    let columns = columns
        .iter()
        .map(|arrays| {
            let refs: Vec<&dyn Array> = arrays.iter().map(|a| a.as_ref()).collect();
            interleave(&refs, rows)
        })
        .collect::<std::result::Result<Vec<ArrayRef>, _>>()?;
    Ok(RecordBatch::try_new(schema.clone(), columns)?)
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
                Arc::new(Int64Array::from(v.to_vec())),
            ],
        )
        .unwrap()
    }

    /// Rows as (key, day, value), in the order given.
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
                    v.value(i),
                ));
            }
        }
        out
    }

    /// The same rows as a plain sort by (day, key, nulls last) gives them, one batch per
    /// day: keys out of order, a key's days cut by a batch boundary, a null key, a day
    /// with no rows between two days, and an empty batch.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn rows_come_by_day_then_key() {
        let schema: SchemaRef = Arc::new(Schema::new(vec![
            Field::new("k", DataType::Utf8, true),
            Field::new("snapshot_date", DataType::Date32, false),
            Field::new("v", DataType::Int64, false),
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
                &[6, 7, 8, 9, 10],
            ),
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
        assert_eq!(out.len(), 3, "days 10, 11 and 13");
        assert_eq!(rows(&out), expected);
        assert_eq!(
            rows(&out[..1]).iter().map(|r| r.2).collect::<Vec<_>>(),
            vec![4, 1, 10, 7],
            "day 10: b, m, z, then the null key"
        );
    }
}
