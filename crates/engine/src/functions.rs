//! daymark's own window functions: running totals and running extrema per partition.
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
//! on a cluster every executor's session must know them: [`register`] adds them.

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

/// Registers daymark's window functions in `ctx`.
pub fn register(ctx: &SessionContext) {
    for f in running_functions() {
        ctx.register_udwf(f);
    }
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
