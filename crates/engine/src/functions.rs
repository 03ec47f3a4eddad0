//! daymark's own window functions: running totals and running extrema per partition, and
//! the first-copy marker of the tile build's de-duplication ([`FirstCopy`]).
//!
//! The set-based backfill (`backfill.rs`) needs, per key and in day order, the running
//! sum of +x/-x contributions and the running minimum or maximum of a value. Written
//! with built-in aggregates (`SUM(x) OVER (... ROWS BETWEEN UNBOUNDED PRECEDING AND
//! CURRENT ROW)`) DataFusion re-evaluates the aggregate on a one-row slice for every
//! row, which costs about a microsecond per row and expression. These functions keep
//! one running value per partition and read one array element per row.
//!
//! They need no window frame (the frame is always "from the partition's first row to
//! this one") and are causal, so DataFusion runs them in its bounded, streaming window
//! operator and memory does not grow with the partition. A serialised plan names them;
//! on a cluster they travel with the `daymark-codec` crate's codec, or each process that
//! decodes plans registers them ([`register`]).

use datafusion::arrow::array::{Array, ArrayRef, AsArray};
use datafusion::arrow::datatypes::{
    DataType, Decimal128Type, Field, FieldRef, Float64Type, Int64Type, UInt64Type,
};
use datafusion::common::{exec_err, plan_err, Result, ScalarValue};
use datafusion::logical_expr::function::{PartitionEvaluatorArgs, WindowUDFFieldArgs};
use datafusion::logical_expr::{
    LimitEffect, PartitionEvaluator, Signature, Volatility, WindowUDF, WindowUDFImpl,
};
use datafusion::physical_expr::PhysicalExpr;
use datafusion::prelude::SessionContext;
use std::ops::Range;
use std::sync::Arc;

/// Name of the running-sum window function.
pub const RUNNING_SUM: &str = "daymark_running_sum";
/// Name of the running-minimum window function.
pub const RUNNING_MIN: &str = "daymark_running_min";
/// Name of the running-maximum window function.
pub const RUNNING_MAX: &str = "daymark_running_max";

/// What a running function computes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum RunningKind {
    /// Sum of the non-null values so far (NULL before the first one), like `SUM`.
    Sum,
    /// Smallest non-null value so far, like `MIN`.
    Min,
    /// Largest non-null value so far, like `MAX`.
    Max,
}

/// A running window function: `daymark_running_sum(x) OVER (PARTITION BY k ORDER BY d)`.
#[derive(Debug, PartialEq, Eq, Hash)]
pub struct Running {
    kind: RunningKind,
    signature: Signature,
}

impl Running {
    /// The function of `kind`.
    pub fn new(kind: RunningKind) -> Self {
        Running {
            kind,
            signature: Signature::any(1, Volatility::Immutable),
        }
    }
}

/// The output type of a running sum over `input` (the types `SUM` gives).
fn sum_type(input: &DataType) -> Result<DataType> {
    Ok(match input {
        DataType::Int8 | DataType::Int16 | DataType::Int32 | DataType::Int64 => DataType::Int64,
        DataType::UInt8 | DataType::UInt16 | DataType::UInt32 | DataType::UInt64 => {
            DataType::UInt64
        }
        DataType::Float16 | DataType::Float32 | DataType::Float64 => DataType::Float64,
        DataType::Decimal128(_, s) => DataType::Decimal128(38, *s),
        DataType::Null => DataType::Int64,
        other => return plan_err!("{RUNNING_SUM} does not add values of type {other}"),
    })
}

impl WindowUDFImpl for Running {
    fn name(&self) -> &str {
        name_of(self.kind)
    }

    fn signature(&self) -> &Signature {
        &self.signature
    }

    fn partition_evaluator(
        &self,
        args: PartitionEvaluatorArgs,
    ) -> Result<Box<dyn PartitionEvaluator>> {
        let input = args
            .input_fields()
            .first()
            .map(|f| f.data_type().clone())
            .unwrap_or(DataType::Null);
        let out = match self.kind {
            RunningKind::Sum => sum_type(&input)?,
            _ => input.clone(),
        };
        Ok(Box::new(RunningEvaluator {
            kind: self.kind,
            out,
            state: State::None,
        }))
    }

    fn field(&self, args: WindowUDFFieldArgs) -> Result<FieldRef> {
        let input = args
            .get_input_field(0)
            .map(|f| f.data_type().clone())
            .unwrap_or(DataType::Null);
        let out = match self.kind {
            RunningKind::Sum => sum_type(&input)?,
            _ => input,
        };
        Ok(Arc::new(Field::new(args.name(), out, true)))
    }

    fn limit_effect(&self, _args: &[Arc<dyn PhysicalExpr>]) -> LimitEffect {
        LimitEffect::None
    }
}

/// The name a function of `kind` is registered under.
fn name_of(kind: RunningKind) -> &'static str {
    match kind {
        RunningKind::Sum => RUNNING_SUM,
        RunningKind::Min => RUNNING_MIN,
        RunningKind::Max => RUNNING_MAX,
    }
}

/// Folds `x` into the running value `s` of an integer type (`None` on overflow).
fn fold<T: Ord + Copy>(
    kind: RunningKind,
    s: Option<T>,
    x: T,
    add: fn(T, T) -> Option<T>,
) -> Option<T> {
    match (s, kind) {
        (None, _) => Some(x),
        (Some(s), RunningKind::Sum) => add(s, x),
        (Some(s), RunningKind::Min) => Some(s.min(x)),
        (Some(s), RunningKind::Max) => Some(s.max(x)),
    }
}

/// The running value of one partition.
#[derive(Debug)]
enum State {
    /// No non-null value seen yet.
    None,
    I64(i64),
    U64(u64),
    F64(f64),
    Dec(i128),
    /// Any other type (min/max only).
    Other(ScalarValue),
}

#[derive(Debug)]
struct RunningEvaluator {
    kind: RunningKind,
    out: DataType,
    state: State,
}

impl RunningEvaluator {
    /// Folds row `i` of `values` into the state.
    fn step(&mut self, values: &ArrayRef, i: usize) -> Result<()> {
        if values.is_null(i) {
            return Ok(());
        }
        let kind = self.kind;
        let mixed = || exec_err!("{}: mixed input types", name_of(kind));
        let overflow = || exec_err!("{RUNNING_SUM}: the running total overflows");
        self.state = match (values.data_type(), &self.state) {
            (DataType::Int64, State::None | State::I64(_)) => {
                let x = values.as_primitive::<Int64Type>().value(i);
                let s = if let State::I64(s) = self.state {
                    Some(s)
                } else {
                    None
                };
                match fold(kind, s, x, i64::checked_add) {
                    Some(v) => State::I64(v),
                    None => return overflow(),
                }
            }
            (DataType::UInt64, State::None | State::U64(_)) => {
                let x = values.as_primitive::<UInt64Type>().value(i);
                let s = if let State::U64(s) = self.state {
                    Some(s)
                } else {
                    None
                };
                match fold(kind, s, x, u64::checked_add) {
                    Some(v) => State::U64(v),
                    None => return overflow(),
                }
            }
            (DataType::Decimal128(_, _), State::None | State::Dec(_)) => {
                let x = values.as_primitive::<Decimal128Type>().value(i);
                let s = if let State::Dec(s) = self.state {
                    Some(s)
                } else {
                    None
                };
                match fold(kind, s, x, i128::checked_add) {
                    Some(v) => State::Dec(v),
                    None => return overflow(),
                }
            }
            (DataType::Float64, State::None | State::F64(_)) => {
                let x = values.as_primitive::<Float64Type>().value(i);
                State::F64(match (&self.state, kind) {
                    (State::F64(s), RunningKind::Sum) => s + x,
                    // As in MIN/MAX, floats compare by total order (NaN is the largest).
                    (State::F64(s), RunningKind::Min) if s.total_cmp(&x).is_le() => *s,
                    (State::F64(s), RunningKind::Max) if s.total_cmp(&x).is_ge() => *s,
                    _ => x,
                })
            }
            (
                DataType::Int64 | DataType::UInt64 | DataType::Decimal128(_, _) | DataType::Float64,
                _,
            ) => return mixed(),
            (_, _) if kind == RunningKind::Sum => {
                // Narrow integers and floats: widen to the output type first.
                let x = ScalarValue::try_from_array(values, i)?.cast_to(&self.out)?;
                return self.step(&x.to_array()?, 0);
            }
            (_, State::None) => State::Other(ScalarValue::try_from_array(values, i)?),
            (_, State::Other(s)) => {
                let x = ScalarValue::try_from_array(values, i)?;
                let keep = s.partial_cmp(&x).is_none_or(|o| match kind {
                    RunningKind::Min => o.is_le(),
                    _ => o.is_ge(),
                });
                if keep {
                    return Ok(());
                }
                State::Other(x)
            }
            (_, _) => return mixed(),
        };
        Ok(())
    }

    /// The current running value as a scalar of the output type.
    fn value(&self) -> Result<ScalarValue> {
        Ok(match (&self.state, &self.out) {
            (State::None, t) => ScalarValue::try_from(t)?,
            (State::I64(v), _) => ScalarValue::Int64(Some(*v)),
            (State::U64(v), _) => ScalarValue::UInt64(Some(*v)),
            (State::F64(v), _) => ScalarValue::Float64(Some(*v)),
            (State::Dec(v), DataType::Decimal128(p, s)) => {
                ScalarValue::Decimal128(Some(*v), *p, *s)
            }
            (State::Dec(_), t) => return exec_err!("decimal state for output type {t}"),
            (State::Other(v), _) => v.clone(),
        })
    }
}

impl PartitionEvaluator for RunningEvaluator {
    fn is_causal(&self) -> bool {
        true
    }

    fn supports_bounded_execution(&self) -> bool {
        true
    }

    fn evaluate(&mut self, values: &[ArrayRef], range: &Range<usize>) -> Result<ScalarValue> {
        // Without a frame, `range` is the current row; rows arrive in order, once each.
        if let (Some(v), Some(i)) = (values.first(), range.end.checked_sub(1)) {
            self.step(v, i)?;
        }
        self.value()
    }

    fn evaluate_all(&mut self, values: &[ArrayRef], num_rows: usize) -> Result<ArrayRef> {
        let mut out = Vec::with_capacity(num_rows);
        for i in 0..num_rows {
            out.push(self.evaluate(values, &(i..i + 1))?);
        }
        if out.is_empty() {
            return Ok(datafusion::arrow::array::new_empty_array(&self.out));
        }
        ScalarValue::iter_to_array(out)
    }
}

/// The running window functions, as registered.
pub fn running_functions() -> Vec<WindowUDF> {
    [RunningKind::Sum, RunningKind::Min, RunningKind::Max]
        .into_iter()
        .map(|k| WindowUDF::from(Running::new(k)))
        .collect()
}

/// Name of the first-copy window function.
pub const FIRST_COPY: &str = "daymark_first_copy";

/// `daymark_first_copy(a, b, ...) OVER (PARTITION BY p ORDER BY a, b, ..., arrival)`: TRUE
/// on the first row of each run of rows with the same arguments (NULLs equal), FALSE on
/// the copies after it. Sorted by the arguments and then arrival, TRUE marks each row's
/// first-arrived copy: the tile build's de-duplication.
///
/// It replaces one `lag` per argument: DataFusion's streaming window operator asks for
/// every row's value as a `ScalarValue`, which for `lag` of a text column copies the text
/// (measured: the lags cost a quarter of the tile query, docs/benchmarks.md). This function
/// compares the two rows in place and returns a boolean.
#[derive(Debug, PartialEq, Eq, Hash)]
pub struct FirstCopy {
    signature: Signature,
}

impl Default for FirstCopy {
    fn default() -> Self {
        FirstCopy {
            signature: Signature::variadic_any(Volatility::Immutable),
        }
    }
}

impl WindowUDFImpl for FirstCopy {
    fn name(&self) -> &str {
        FIRST_COPY
    }

    fn signature(&self) -> &Signature {
        &self.signature
    }

    fn partition_evaluator(
        &self,
        _args: PartitionEvaluatorArgs,
    ) -> Result<Box<dyn PartitionEvaluator>> {
        Ok(Box::new(FirstCopyEvaluator))
    }

    fn field(&self, args: WindowUDFFieldArgs) -> Result<FieldRef> {
        Ok(Arc::new(Field::new(args.name(), DataType::Boolean, false)))
    }

    fn limit_effect(&self, _args: &[Arc<dyn PhysicalExpr>]) -> LimitEffect {
        LimitEffect::None
    }
}

#[derive(Debug)]
struct FirstCopyEvaluator;

/// Whether rows `i` and `j` of `a` hold the same value (two NULLs are the same).
fn same_value(a: &ArrayRef, i: usize, j: usize) -> Result<bool> {
    use datafusion::arrow::datatypes as t;
    match (a.is_null(i), a.is_null(j)) {
        (true, true) => return Ok(true),
        (true, false) | (false, true) => return Ok(false),
        _ => {}
    }
    macro_rules! prim {
        ($ty:ty) => {{
            let p = a.as_primitive::<$ty>();
            p.value(i) == p.value(j)
        }};
    }
    Ok(match a.data_type() {
        DataType::Utf8 => a.as_string::<i32>().value(i) == a.as_string::<i32>().value(j),
        DataType::LargeUtf8 => a.as_string::<i64>().value(i) == a.as_string::<i64>().value(j),
        DataType::Utf8View => a.as_string_view().value(i) == a.as_string_view().value(j),
        DataType::Boolean => a.as_boolean().value(i) == a.as_boolean().value(j),
        DataType::Int8 => prim!(t::Int8Type),
        DataType::Int16 => prim!(t::Int16Type),
        DataType::Int32 => prim!(t::Int32Type),
        DataType::Int64 => prim!(Int64Type),
        DataType::UInt8 => prim!(t::UInt8Type),
        DataType::UInt16 => prim!(t::UInt16Type),
        DataType::UInt32 => prim!(t::UInt32Type),
        DataType::UInt64 => prim!(UInt64Type),
        DataType::Date32 => prim!(t::Date32Type),
        DataType::Decimal128(_, _) => prim!(Decimal128Type),
        DataType::Timestamp(t::TimeUnit::Second, _) => prim!(t::TimestampSecondType),
        DataType::Timestamp(t::TimeUnit::Millisecond, _) => prim!(t::TimestampMillisecondType),
        DataType::Timestamp(t::TimeUnit::Microsecond, _) => prim!(t::TimestampMicrosecondType),
        DataType::Timestamp(t::TimeUnit::Nanosecond, _) => prim!(t::TimestampNanosecondType),
        // Anything else (floats, where NaN equals NaN as in IS NOT DISTINCT FROM;
        // dictionaries, binary, nested types) compares as scalars.
        _ => ScalarValue::try_from_array(a, i)? == ScalarValue::try_from_array(a, j)?,
    })
}

impl PartitionEvaluator for FirstCopyEvaluator {
    fn is_causal(&self) -> bool {
        true
    }

    fn supports_bounded_execution(&self) -> bool {
        true
    }

    /// The row before `idx` and `idx` itself: the streaming operator keeps the previous
    /// row of each partition across batches.
    fn get_range(&self, idx: usize, _n_rows: usize) -> Result<Range<usize>> {
        Ok(idx.saturating_sub(1)..idx + 1)
    }

    fn evaluate(&mut self, values: &[ArrayRef], range: &Range<usize>) -> Result<ScalarValue> {
        let Some(idx) = range.end.checked_sub(1) else {
            return exec_err!("{FIRST_COPY}: an empty range");
        };
        if range.start == idx {
            return Ok(ScalarValue::Boolean(Some(true)));
        }
        for v in values {
            if !same_value(v, range.start, idx)? {
                return Ok(ScalarValue::Boolean(Some(true)));
            }
        }
        Ok(ScalarValue::Boolean(Some(false)))
    }

    fn evaluate_all(&mut self, values: &[ArrayRef], num_rows: usize) -> Result<ArrayRef> {
        let mut out = datafusion::arrow::array::BooleanBuilder::with_capacity(num_rows);
        for idx in 0..num_rows {
            let ScalarValue::Boolean(b) =
                self.evaluate(values, &(idx.saturating_sub(1)..idx + 1))?
            else {
                return exec_err!("{FIRST_COPY}: not a boolean");
            };
            out.append_option(b);
        }
        Ok(Arc::new(out.finish()))
    }
}

/// Registers daymark's window functions in `ctx`.
pub fn register(ctx: &SessionContext) {
    for f in running_functions() {
        ctx.register_udwf(f);
    }
    ctx.register_udwf(WindowUDF::from(FirstCopy::default()));
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::array::RecordBatch;
    use datafusion::arrow::util::pretty::pretty_format_batches;

    /// Runs `sql` and renders the result as text.
    async fn text(ctx: &SessionContext, sql: &str) -> String {
        let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
        pretty_format_batches(&batches).unwrap().to_string()
    }

    async fn context() -> SessionContext {
        // Several partitions, several batches per partition (batch size 3), nulls, and a
        // partition that starts with nulls.
        let ctx = SessionContext::new_with_config(
            datafusion::prelude::SessionConfig::new()
                .with_batch_size(3)
                .with_target_partitions(2),
        );
        register(&ctx);
        ctx.sql(
            "CREATE TABLE t (k VARCHAR, d BIGINT, i BIGINT, f DOUBLE, m DECIMAL(38, 12), s VARCHAR) AS VALUES
             ('a', 1, 5, 0.1, 0.1, 'q'), ('a', 2, -3, 0.2, -0.3, 'b'), ('a', 3, NULL, NULL, NULL, NULL),
             ('a', 4, 10, 0.3, 1.25, 'z'), ('a', 5, -12, -0.6, -1.05, 'a'),
             ('b', 1, NULL, NULL, NULL, NULL), ('b', 2, NULL, NULL, NULL, NULL), ('b', 3, 7, 2.5, 3.5, 'm'),
             ('c', 9, 1, 1.0, 1.0, 'x')",
        )
        .await
        .unwrap()
        .collect()
        .await
        .unwrap();
        ctx
    }

    /// The running functions give what the built-in aggregates give over the frame
    /// "unbounded preceding to current row" (DataFusion's SUM/MIN/MAX are the reference).
    #[tokio::test]
    async fn running_functions_equal_builtin_aggregates_over_a_growing_frame() {
        let ctx = context().await;
        for (ours, theirs) in [
            (RUNNING_SUM, "SUM"),
            (RUNNING_MIN, "MIN"),
            (RUNNING_MAX, "MAX"),
        ] {
            for col in ["i", "f", "m", "s"] {
                if col == "s" && ours == RUNNING_SUM {
                    continue;
                }
                let mine = text(
                    &ctx,
                    &format!("SELECT k, d, {ours}({col}) OVER (PARTITION BY k ORDER BY d) AS v FROM t ORDER BY k, d"),
                )
                .await;
                let reference = text(
                    &ctx,
                    &format!("SELECT k, d, {theirs}({col}) OVER (PARTITION BY k ORDER BY d ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS v FROM t ORDER BY k, d"),
                )
                .await;
                assert_eq!(mine, reference, "{ours}({col})");
            }
        }
    }

    /// Hand-worked values: partition `a` of column `i` is 5, -3, NULL, 10, -12.
    #[tokio::test]
    async fn running_values_by_hand() {
        let ctx = context().await;
        let batches = ctx
            .sql(&format!(
                "SELECT {RUNNING_SUM}(i) OVER (PARTITION BY k ORDER BY d) AS s, {RUNNING_MIN}(i) OVER (PARTITION BY k ORDER BY d) AS lo, {RUNNING_MAX}(i) OVER (PARTITION BY k ORDER BY d) AS hi FROM t WHERE k = 'a' ORDER BY d"
            ))
            .await
            .unwrap()
            .collect()
            .await
            .unwrap();
        let b: RecordBatch =
            datafusion::arrow::compute::concat_batches(&batches[0].schema(), &batches).unwrap();
        let col = |n: usize| -> Vec<i64> {
            b.column(n)
                .as_primitive::<Int64Type>()
                .iter()
                .map(|v| v.unwrap())
                .collect()
        };
        assert_eq!(col(0), vec![5, 2, 2, 12, 0]);
        assert_eq!(col(1), vec![5, -3, -3, -3, -12]);
        assert_eq!(col(2), vec![5, 5, 5, 10, 10]);
    }

    /// The first copy of each run of equal arguments, against the `lag` formulation it
    /// replaced and against `ROW_NUMBER() = 1` per group of the arguments (both built into
    /// DataFusion): batches of 3 rows put runs across batch boundaries; NULLs are equal.
    #[tokio::test]
    async fn first_copy_marks_the_first_row_of_each_run() {
        let ctx = context().await;
        ctx.sql(
            "CREATE TABLE c (p VARCHAR, k VARCHAR, e BIGINT, a BIGINT) AS VALUES
             ('x', 'a', 1, 10), ('x', 'a', 1, 11), ('x', 'a', 1, 12), ('x', 'a', 1, 13),
             ('x', 'a', 2, 5), ('x', 'b', 2, 7), ('x', 'b', 2, 3), ('x', NULL, 2, 1),
             ('x', NULL, 2, 2), ('x', NULL, NULL, 4), ('x', NULL, NULL, 9), ('y', 'a', 1, 1),
             ('y', 'a', 1, 2), ('y', 'b', NULL, 6)",
        )
        .await
        .unwrap()
        .collect()
        .await
        .unwrap();
        let over = "OVER (PARTITION BY p ORDER BY k, e, a)";
        let mine = text(
            &ctx,
            &format!("SELECT p, k, e, a FROM (SELECT *, {FIRST_COPY}(k, e) {over} AS f FROM c) WHERE f ORDER BY p, k, e, a"),
        )
        .await;
        let lags = text(
            &ctx,
            &format!("SELECT p, k, e, a FROM (SELECT *, lag(TRUE) {over} IS NULL OR NOT ((lag(k) {over} IS NOT DISTINCT FROM k) AND (lag(e) {over} IS NOT DISTINCT FROM e)) AS f FROM c) WHERE f ORDER BY p, k, e, a"),
        )
        .await;
        let numbered = text(
            &ctx,
            "SELECT p, k, e, a FROM (SELECT *, ROW_NUMBER() OVER (PARTITION BY p, k, e ORDER BY a) AS n FROM c) WHERE n = 1 ORDER BY p, k, e, a",
        )
        .await;
        assert_eq!(mine, lags);
        assert_eq!(mine, numbered);
        // By hand: (x,a,1) first at 10, (x,a,2) at 5, (x,b,2) at 3, (x,NULL,2) at 1,
        // (x,NULL,NULL) at 4, (y,a,1) at 1, (y,b,NULL) at 6.
        let arrivals: Vec<&str> = mine
            .lines()
            .skip(3)
            .filter(|l| l.starts_with('|'))
            .map(|l| l.split('|').nth(4).unwrap().trim())
            .collect();
        assert_eq!(arrivals, vec!["10", "5", "3", "1", "4", "1", "6"], "{mine}");
        let plan = text(
            &ctx,
            &format!("EXPLAIN SELECT {FIRST_COPY}(k, e) {over} FROM c"),
        )
        .await;
        assert!(plan.contains("BoundedWindowAggExec"), "{plan}");
    }

    /// They run in DataFusion's streaming window operator, so memory does not grow with a
    /// partition's length.
    #[tokio::test]
    async fn running_functions_stream() {
        let ctx = context().await;
        let plan = text(
            &ctx,
            &format!("EXPLAIN SELECT {RUNNING_SUM}(i) OVER (PARTITION BY k ORDER BY d) FROM t"),
        )
        .await;
        assert!(plan.contains("BoundedWindowAggExec"), "{plan}");
    }
}
