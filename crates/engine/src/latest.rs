//! `daymark_latest(value, o1, ..., on)`: per group, the value of the row that sorts last by
//! `(o1, ..., on)`, ascending with NULLs last (as `last_value(value ORDER BY o1, ..., on)`;
//! rows tied on every ordering column give the largest value, NULL largest, so the result
//! does not depend on the order rows arrive in). `daymark_earliest` is the same for the
//! row that sorts first (as `first_value`; ties give the smallest value).
//!
//! The population's state (the latest status of each key) is taken this way in the tiles,
//! the history roll-ups and every daily build, and so are first and last value features.
//! DataFusion 55's `last_value` and `first_value` with an `ORDER BY` keep each group's
//! ordering as a vector of `ScalarValue`s and build one per input row: about a tenth of
//! the subscriptions' tile build, an eighth of the roll-ups and 40-60 ms of a daily build,
//! on the benchmark's world (docs/benchmarks.md, twenty-fifth measurement). Here the
//! ordering columns and the value are encoded once per batch in arrow's row format, whose
//! bytes compare as the ordering does, and each group keeps the bytes of its greatest (or
//! least) row; the value is decoded from them at the end. The state between the two
//! aggregation phases is those bytes.
//!
//! The encoding is the same in every process of one daymark version (the same arrow), so
//! a cluster's partial and final phases agree; plans naming the functions travel with the
//! `daymark-codec` crate's codec.

use datafusion::arrow::array::{Array, ArrayRef, AsArray, BinaryBuilder, BooleanArray};
use datafusion::arrow::compute::SortOptions;
use datafusion::arrow::datatypes::{DataType, Field, FieldRef};
use datafusion::arrow::row::{RowConverter, Rows, SortField};
use datafusion::common::{plan_err, Result, ScalarValue};
use datafusion::logical_expr::function::{AccumulatorArgs, StateFieldsArgs};
use datafusion::logical_expr::{
    Accumulator, AggregateUDF, AggregateUDFImpl, EmitTo, GroupsAccumulator, Signature, Volatility,
};
use datafusion::prelude::SessionContext;
use std::sync::Arc;

/// Name of the function taking the row that sorts last.
pub const LATEST: &str = "daymark_latest";
/// Name of the function taking the row that sorts first.
pub const EARLIEST: &str = "daymark_earliest";

/// The `daymark_latest` or `daymark_earliest` aggregate (see the module documentation).
#[derive(Debug, PartialEq, Eq, Hash)]
pub struct Latest {
    /// `daymark_earliest`: the row that sorts first.
    earliest: bool,
    signature: Signature,
}

impl Latest {
    /// `daymark_earliest` when `earliest`, else `daymark_latest`.
    pub fn new(earliest: bool) -> Self {
        Latest {
            earliest,
            signature: Signature::variadic_any(Volatility::Immutable),
        }
    }
}

impl Default for Latest {
    /// `daymark_latest`.
    fn default() -> Self {
        Latest::new(false)
    }
}

impl AggregateUDFImpl for Latest {
    fn name(&self) -> &str {
        if self.earliest {
            EARLIEST
        } else {
            LATEST
        }
    }

    fn signature(&self) -> &Signature {
        &self.signature
    }

    fn return_type(&self, args: &[DataType]) -> Result<DataType> {
        if args.len() < 2 {
            return plan_err!(
                "{} takes a value and at least one column to order by",
                self.name()
            );
        }
        Ok(args[0].clone())
    }

    fn state_fields(&self, args: StateFieldsArgs) -> Result<Vec<FieldRef>> {
        Ok(vec![Arc::new(Field::new(
            format!("{}[row]", args.name),
            DataType::Binary,
            true,
        ))])
    }

    fn accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn Accumulator>> {
        Ok(Box::new(OneGroup(LatestGroups::new(&args, self.earliest)?)))
    }

    fn groups_accumulator_supported(&self, _args: AccumulatorArgs) -> bool {
        true
    }

    fn create_groups_accumulator(
        &self,
        args: AccumulatorArgs,
    ) -> Result<Box<dyn GroupsAccumulator>> {
        Ok(Box::new(LatestGroups::new(&args, self.earliest)?))
    }
}

/// Both functions.
pub fn functions() -> Vec<AggregateUDF> {
    vec![
        AggregateUDF::from(Latest::new(false)),
        AggregateUDF::from(Latest::new(true)),
    ]
}

/// Registers `daymark_latest` and `daymark_earliest` with `ctx`.
pub fn register(ctx: &SessionContext) {
    for f in functions() {
        ctx.register_udaf(f);
    }
}

/// Each group's greatest (or least) row so far, as row-format bytes of (o1, ..., on,
/// value).
#[derive(Debug)]
struct LatestGroups {
    /// Keep the least row instead of the greatest.
    earliest: bool,
    converter: RowConverter,
    /// Per group; empty while the group has no row (an encoded row is never empty).
    best: Vec<Vec<u8>>,
    /// Bytes held by `best`.
    held: usize,
}

impl LatestGroups {
    fn new(args: &AccumulatorArgs, earliest: bool) -> Result<Self> {
        let types: Vec<DataType> = args
            .exprs
            .iter()
            .map(|e| e.data_type(args.schema))
            .collect::<Result<_>>()?;
        if types.len() < 2 {
            return plan_err!(
                "{LATEST} and {EARLIEST} take a value and at least one column to order by"
            );
        }
        let last = SortOptions {
            descending: false,
            nulls_first: false,
        };
        // The ordering columns, then the value (which breaks ties).
        let fields = types[1..]
            .iter()
            .chain(&types[..1])
            .map(|t| SortField::new_with_options(t.clone(), last))
            .collect();
        Ok(LatestGroups {
            earliest,
            converter: RowConverter::new(fields)?,
            best: Vec::new(),
            held: 0,
        })
    }

    /// The rows of `values` (value first, as the function's arguments come).
    fn encode(&self, values: &[ArrayRef]) -> Result<Rows> {
        let mut columns: Vec<ArrayRef> = values[1..].to_vec();
        columns.push(values[0].clone());
        Ok(self.converter.convert_columns(&columns)?)
    }

    /// Keeps `row` for `group` when it sorts after (before, for the earliest) the group's
    /// row so far.
    fn offer(&mut self, group: usize, row: &[u8]) {
        let best = &mut self.best[group];
        let better = if self.earliest {
            row < best.as_slice()
        } else {
            row > best.as_slice()
        };
        if best.is_empty() || better {
            let before = best.capacity();
            best.clear();
            best.extend_from_slice(row);
            self.held = self.held + best.capacity() - before;
        }
    }

    fn grow(&mut self, groups: usize) {
        if self.best.len() < groups {
            self.best.resize_with(groups, Vec::new);
        }
    }

    /// The groups `emit_to` asks for, taken out.
    fn take(&mut self, emit_to: EmitTo) -> Vec<Vec<u8>> {
        let taken = emit_to.take_needed(&mut self.best);
        self.held -= taken.iter().map(Vec::capacity).sum::<usize>();
        taken
    }

    /// The values of `rows` (NULL where a group had no row).
    fn values(&self, rows: &[Vec<u8>]) -> Result<ArrayRef> {
        let parser = self.converter.parser();
        let set = rows.iter().filter(|r| !r.is_empty());
        let decoded = self.converter.convert_rows(set.map(|r| parser.parse(r)))?;
        let value = decoded.last().expect("at least two columns").clone();
        if value.len() == rows.len() {
            return Ok(value);
        }
        // Spread the decoded values to their groups, NULL in between.
        let mut next = 0u32;
        let indices: datafusion::arrow::array::UInt32Array = rows
            .iter()
            .map(|r| {
                (!r.is_empty()).then(|| {
                    next += 1;
                    next - 1
                })
            })
            .collect();
        Ok(datafusion::arrow::compute::take(&value, &indices, None)?)
    }
}

/// Whether row `i` passes the aggregate's filter (no filter: every row).
fn passes(filter: Option<&BooleanArray>, i: usize) -> bool {
    filter.is_none_or(|f| f.is_valid(i) && f.value(i))
}

impl GroupsAccumulator for LatestGroups {
    fn update_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        opt_filter: Option<&BooleanArray>,
        total_num_groups: usize,
    ) -> Result<()> {
        self.grow(total_num_groups);
        let rows = self.encode(values)?;
        for (i, g) in group_indices.iter().enumerate() {
            if passes(opt_filter, i) {
                self.offer(*g, rows.row(i).as_ref());
            }
        }
        Ok(())
    }

    fn evaluate(&mut self, emit_to: EmitTo) -> Result<ArrayRef> {
        let rows = self.take(emit_to);
        self.values(&rows)
    }

    fn state(&mut self, emit_to: EmitTo) -> Result<Vec<ArrayRef>> {
        let rows = self.take(emit_to);
        let mut out = BinaryBuilder::with_capacity(rows.len(), rows.iter().map(Vec::len).sum());
        for r in &rows {
            if r.is_empty() {
                out.append_null();
            } else {
                out.append_value(r);
            }
        }
        Ok(vec![Arc::new(out.finish())])
    }

    fn merge_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        total_num_groups: usize,
    ) -> Result<()> {
        self.grow(total_num_groups);
        let rows = values[0].as_binary::<i32>();
        for (i, g) in group_indices.iter().enumerate() {
            if rows.is_valid(i) {
                self.offer(*g, rows.value(i));
            }
        }
        Ok(())
    }

    /// Each input row as the state of a group of its own: its encoded row (NULL where the
    /// filter drops it).
    fn convert_to_state(
        &self,
        values: &[ArrayRef],
        opt_filter: Option<&BooleanArray>,
    ) -> Result<Vec<ArrayRef>> {
        let rows = self.encode(values)?;
        let mut out = BinaryBuilder::with_capacity(rows.num_rows(), rows.size());
        for i in 0..rows.num_rows() {
            if passes(opt_filter, i) {
                out.append_value(rows.row(i).as_ref());
            } else {
                out.append_null();
            }
        }
        Ok(vec![Arc::new(out.finish())])
    }

    fn size(&self) -> usize {
        self.held + self.best.capacity() * std::mem::size_of::<Vec<u8>>() + self.converter.size()
    }
}

/// The function without a grouping: one group.
#[derive(Debug)]
struct OneGroup(LatestGroups);

impl Accumulator for OneGroup {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        let groups = vec![0; values[0].len()];
        self.0.update_batch(values, &groups, None, 1)
    }

    fn evaluate(&mut self) -> Result<ScalarValue> {
        self.0.grow(1);
        let value = self.0.values(&self.0.best[..1])?;
        ScalarValue::try_from_array(&value, 0)
    }

    fn size(&self) -> usize {
        std::mem::size_of_val(self) + self.0.size()
    }

    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        self.0.grow(1);
        let row = &self.0.best[0];
        Ok(vec![ScalarValue::Binary(
            (!row.is_empty()).then(|| row.clone()),
        )])
    }

    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let groups = vec![0; states[0].len()];
        self.0.merge_batch(states, &groups, 1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::array::{Int64Array, RecordBatch, StringArray};
    use datafusion::arrow::datatypes::Schema;

    /// A test row: group, value, time, arrival.
    type Row<'a> = (i64, Option<&'a str>, Option<i64>, Option<i64>);

    /// A session with `daymark_latest` and table `t` of (g, v, t, a) rows, in two
    /// partitions (so that both aggregation phases run), each of several batches.
    async fn session(rows: &[Row<'_>]) -> SessionContext {
        let ctx = SessionContext::new_with_config(
            datafusion::prelude::SessionConfig::new()
                .with_target_partitions(2)
                .with_batch_size(3),
        );
        register(&ctx);
        let schema = Arc::new(Schema::new(vec![
            Field::new("g", DataType::Int64, false),
            Field::new("v", DataType::Utf8, true),
            Field::new("t", DataType::Int64, true),
            Field::new("a", DataType::Int64, true),
        ]));
        let batch = |rows: &[Row<'_>]| {
            RecordBatch::try_new(
                schema.clone(),
                vec![
                    Arc::new(rows.iter().map(|r| r.0).collect::<Int64Array>()),
                    Arc::new(rows.iter().map(|r| r.1).collect::<StringArray>()),
                    Arc::new(rows.iter().map(|r| r.2).collect::<Int64Array>()),
                    Arc::new(rows.iter().map(|r| r.3).collect::<Int64Array>()),
                ],
            )
            .unwrap()
        };
        let half = rows.len() / 2;
        let parts = vec![
            rows[..half].chunks(3).map(batch).collect(),
            rows[half..].chunks(3).map(batch).collect(),
        ];
        let table = datafusion::datasource::MemTable::try_new(schema.clone(), parts).unwrap();
        ctx.register_table("t", Arc::new(table)).unwrap();
        ctx
    }

    async fn strings(ctx: &SessionContext, sql: &str) -> Vec<Option<String>> {
        let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
        let mut out = Vec::new();
        for b in batches {
            let c = datafusion::arrow::compute::cast(b.column(0), &DataType::Utf8).unwrap();
            out.extend(c.as_string::<i32>().iter().map(|v| v.map(str::to_string)));
        }
        out
    }

    /// The same answers as `last_value(v ORDER BY t, a, v)` (ascending, NULLs last) and
    /// `first_value(...)` for `daymark_earliest`, with
    /// ties on the ordering broken by the value, NULLs among the ordering values and the
    /// values, and a group whose rows a filter removes.
    #[tokio::test]
    async fn latest_is_the_last_value_by_the_ordering() {
        let rows = [
            // Group 1: the greatest time wins, whatever its arrival.
            (1, Some("active"), Some(10), Some(50)),
            (1, Some("cancelled"), Some(20), Some(21)),
            (1, Some("paused"), Some(15), Some(90)),
            // Group 2: a tie on time, broken by arrival.
            (2, Some("b"), Some(30), Some(31)),
            (2, Some("a"), Some(30), Some(32)),
            // Group 3: a tie on time and arrival, broken by the value.
            (3, Some("x"), Some(5), Some(6)),
            (3, Some("z"), Some(5), Some(6)),
            (3, Some("y"), Some(5), Some(6)),
            // Group 4: a NULL time sorts last.
            (4, Some("late"), None, Some(1)),
            (4, Some("early"), Some(99), Some(100)),
            // Group 5: a NULL value is the latest.
            (5, None, Some(7), Some(8)),
            (5, Some("v"), Some(6), Some(9)),
            // Group 6: only filtered rows.
            (6, Some("gone"), Some(1), Some(-1)),
            // Group 7: a NULL arrival after a known one, same time.
            (7, Some("known"), Some(3), Some(4)),
            (7, Some("unknown"), Some(3), None),
        ];
        let ctx = session(&rows).await;
        let expected = [
            Some("cancelled"),
            Some("a"),
            Some("z"),
            Some("late"),
            None,
            None,
            Some("unknown"),
        ]
        .map(|v| v.map(str::to_string))
        .to_vec();
        let ours = strings(
            &ctx,
            "SELECT daymark_latest(v, t, a) FILTER (WHERE a IS NULL OR a >= 0) FROM t GROUP BY g ORDER BY g",
        )
        .await;
        assert_eq!(ours, expected);
        // DataFusion's own `last_value`, where no two rows of a group tie on the ordering
        // with different values (it keeps the first of such a tie it sees).
        let theirs = strings(
            &ctx,
            "SELECT last_value(v ORDER BY t, a, v) FILTER (WHERE a IS NULL OR a >= 0) FROM t GROUP BY g ORDER BY g",
        )
        .await;
        assert_eq!(theirs, expected);
        // Another value type and ordering: the time of the latest row, by (t, a, v).
        let times = strings(
            &ctx,
            "SELECT daymark_latest(t, t, a, v) FROM t GROUP BY g ORDER BY g",
        )
        .await;
        let expected_times = [
            Some("20"),
            Some("30"),
            Some("5"),
            None,
            Some("7"),
            Some("1"),
            Some("3"),
        ]
        .map(|v| v.map(str::to_string))
        .to_vec();
        assert_eq!(times, expected_times);
        // The earliest row: the same ordering, the other end.
        let first = [
            Some("active"),
            Some("b"),
            Some("x"),
            Some("early"),
            Some("v"),
            None,
            Some("known"),
        ]
        .map(|v| v.map(str::to_string))
        .to_vec();
        for f in [
            "daymark_earliest(v, t, a)",
            "first_value(v ORDER BY t, a, v)",
        ] {
            let got = strings(
                &ctx,
                &format!(
                    "SELECT {f} FILTER (WHERE a IS NULL OR a >= 0) FROM t GROUP BY g ORDER BY g"
                ),
            )
            .await;
            assert_eq!(got, first, "{f}");
        }
        // Without a grouping.
        let all = strings(&ctx, "SELECT daymark_latest(v, t, a) FROM t WHERE g = 1").await;
        assert_eq!(all, vec![Some("cancelled".to_string())]);
        let none = strings(&ctx, "SELECT daymark_latest(v, t, a) FROM t WHERE g = 0").await;
        assert_eq!(none, vec![None]);
    }
}
