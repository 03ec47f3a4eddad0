//! daymark's windowed-total functions: a backfill's additive features straight from tile
//! rows, one pass per key.
//!
//! A key's rows arrive ordered by position `p`: tile rows (event day `tn`, first visible
//! day `vn`, a value `x`) at their event day, and snapshot rows (`tn` NULL) at their
//! snapshot day `d`. For each snapshot row the function aggregates the tile rows visible on
//! that day, `vn <= d <= tn + w` (the window's half-open day range and, in as-known mode,
//! arrival before the cutoff), in one pass with two pointers over the event days and a
//! queue of rows that arrived late. The general backfill query instead unions a plus row
//! and a minus row per window length and groups them by (key, day) before a running sum:
//! several times as many rows through a hash aggregation (docs/benchmarks.md, seventh
//! measurement).
//!
//! Sums are exact: integers and decimals are added as `i128` (floats are cast to
//! DECIMAL(38, 12) by the query first), so the order rows arrive in never changes a bit of
//! the result.
//!
//! The functions need the whole partition (`evaluate_all`), so DataFusion runs them in its
//! non-streaming window operator, over one key range of a backfill at a time. On a cluster
//! every executor's session must know them: [`register`] adds them.

use datafusion::arrow::array::{
    Array, ArrayRef, AsArray, Decimal128Array, Int64Array, PrimitiveArray, UInt64Array,
};
use datafusion::arrow::datatypes::{
    DataType, Decimal128Type, Field, FieldRef, Int64Type, UInt64Type,
};
use datafusion::common::{exec_err, plan_err, Result};
use datafusion::logical_expr::function::{PartitionEvaluatorArgs, WindowUDFFieldArgs};
use datafusion::logical_expr::{
    LimitEffect, PartitionEvaluator, Signature, Volatility, WindowUDF, WindowUDFImpl,
};
use datafusion::physical_expr::PhysicalExpr;
use datafusion::prelude::SessionContext;
use std::cmp::Reverse;
use std::collections::{BinaryHeap, HashMap};
use std::sync::Arc;

/// Sum of the visible values (NULL when none is visible).
pub const WINDOW_SUM: &str = "daymark_window_sum";
/// Number of distinct event days among the visible rows whose value is above zero.
pub const WINDOW_DAYS: &str = "daymark_window_days";
/// Earliest event day of a visible row whose value is above zero (unbounded windows).
pub const WINDOW_FIRST_DAY: &str = "daymark_window_first_day";
/// Latest event day of a visible row whose value is above zero (unbounded windows).
pub const WINDOW_LAST_DAY: &str = "daymark_window_last_day";

/// What a windowed-total function computes for each snapshot row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum WindowKind {
    /// [`WINDOW_SUM`].
    Sum,
    /// [`WINDOW_DAYS`].
    Days,
    /// [`WINDOW_FIRST_DAY`].
    FirstDay,
    /// [`WINDOW_LAST_DAY`].
    LastDay,
}

impl WindowKind {
    /// The name the function is registered under.
    pub fn name(self) -> &'static str {
        match self {
            WindowKind::Sum => WINDOW_SUM,
            WindowKind::Days => WINDOW_DAYS,
            WindowKind::FirstDay => WINDOW_FIRST_DAY,
            WindowKind::LastDay => WINDOW_LAST_DAY,
        }
    }
}

/// `f(x, p, tn, vn, w) OVER (PARTITION BY key ORDER BY p)`: for rows whose `tn` is NULL
/// (snapshot rows, day `p`), the aggregate of `x` over the rows visible that day; NULL on
/// the other rows. `w` is a constant window length in days, NULL for no bound.
#[derive(Debug, PartialEq, Eq, Hash)]
pub struct WindowTotal {
    kind: WindowKind,
    signature: Signature,
}

impl WindowTotal {
    /// The function of `kind`.
    pub fn new(kind: WindowKind) -> Self {
        WindowTotal {
            kind,
            signature: Signature::any(5, Volatility::Immutable),
        }
    }
}

/// The output type for input values of type `x`.
fn output_type(kind: WindowKind, x: &DataType) -> Result<DataType> {
    Ok(match (kind, x) {
        (WindowKind::Sum, DataType::Int64 | DataType::Null) => DataType::Int64,
        (WindowKind::Sum, DataType::UInt64) => DataType::UInt64,
        (WindowKind::Sum, DataType::Decimal128(_, s)) => DataType::Decimal128(38, *s),
        (WindowKind::Sum, other) => {
            return plan_err!("{WINDOW_SUM} adds BIGINT, unsigned BIGINT or DECIMAL, not {other}")
        }
        _ => DataType::Int64,
    })
}

impl WindowUDFImpl for WindowTotal {
    fn name(&self) -> &str {
        self.kind.name()
    }

    fn signature(&self) -> &Signature {
        &self.signature
    }

    fn partition_evaluator(
        &self,
        args: PartitionEvaluatorArgs,
    ) -> Result<Box<dyn PartitionEvaluator>> {
        let x = args
            .input_fields()
            .first()
            .map(|f| f.data_type().clone())
            .unwrap_or(DataType::Null);
        Ok(Box::new(WindowEvaluator {
            kind: self.kind,
            out: output_type(self.kind, &x)?,
        }))
    }

    fn field(&self, args: WindowUDFFieldArgs) -> Result<FieldRef> {
        let x = args
            .get_input_field(0)
            .map(|f| f.data_type().clone())
            .unwrap_or(DataType::Null);
        Ok(Arc::new(Field::new(
            args.name(),
            output_type(self.kind, &x)?,
            true,
        )))
    }

    fn limit_effect(&self, _args: &[Arc<dyn PhysicalExpr>]) -> LimitEffect {
        LimitEffect::None
    }
}

#[derive(Debug)]
struct WindowEvaluator {
    kind: WindowKind,
    out: DataType,
}

/// A BIGINT argument.
fn ints<'a>(a: &'a ArrayRef, what: &str) -> Result<&'a PrimitiveArray<Int64Type>> {
    match a.as_primitive_opt::<Int64Type>() {
        Some(a) => Ok(a),
        None => exec_err!(
            "window totals: {what} must be BIGINT, not {}",
            a.data_type()
        ),
    }
}

/// Element `i` of a BIGINT argument (NULL as `None`).
fn int_at(a: &PrimitiveArray<Int64Type>, i: usize) -> Option<i64> {
    a.is_valid(i).then(|| a.value(i))
}

/// The value argument, read as exact integers.
enum Values<'a> {
    I64(&'a PrimitiveArray<Int64Type>),
    U64(&'a PrimitiveArray<UInt64Type>),
    Dec(&'a PrimitiveArray<Decimal128Type>),
}

impl<'a> Values<'a> {
    fn of(a: &'a ArrayRef) -> Result<Self> {
        Ok(match a.data_type() {
            DataType::Int64 => Values::I64(a.as_primitive()),
            DataType::UInt64 => Values::U64(a.as_primitive()),
            DataType::Decimal128(_, _) => Values::Dec(a.as_primitive()),
            other => return exec_err!("window totals: values of type {other} are not supported"),
        })
    }

    /// Element `i` (NULL as `None`).
    fn at(&self, i: usize) -> Option<i128> {
        match self {
            Values::I64(a) => a.is_valid(i).then(|| a.value(i) as i128),
            Values::U64(a) => a.is_valid(i).then(|| a.value(i) as i128),
            Values::Dec(a) => a.is_valid(i).then(|| a.value(i)),
        }
    }
}

/// Event days a key's rows may span for [`Visible`] to count active days in an array.
const DENSE_DAYS: usize = 1 << 16;

/// A tile row of the partition.
struct TileRow {
    tn: i64,
    vn: i64,
    x: i128,
}

/// The visible rows of the current window, folded (only what `kind` asks for).
struct Visible {
    kind: WindowKind,
    rows: u64,
    sum: i128,
    /// Visible rows per event day `first_day + i`, for `Days` (days with at least one:
    /// `days`). A key's event days span a few hundred days: an array, not a hash map
    /// (hashing was about 2% of a backfill's key-range queries); `sparse` past
    /// [`DENSE_DAYS`].
    per_day: Vec<u32>,
    sparse: HashMap<i64, u32>,
    first_day: i64,
    days: i64,
    first: Option<i64>,
    last: Option<i64>,
}

impl Visible {
    /// Nothing visible yet; `rows` (in event-day order) are the rows that may become so.
    fn new(kind: WindowKind, rows: &[TileRow]) -> Self {
        let (first_day, span) = match (rows.first(), rows.last()) {
            (Some(f), Some(l)) if kind == WindowKind::Days => (
                f.tn,
                usize::try_from(l.tn - f.tn + 1)
                    .ok()
                    .filter(|n| *n <= DENSE_DAYS)
                    .unwrap_or(0),
            ),
            _ => (0, 0),
        };
        Visible {
            kind,
            rows: 0,
            sum: 0,
            per_day: vec![0; span],
            sparse: HashMap::new(),
            first_day,
            days: 0,
            first: None,
            last: None,
        }
    }

    /// The count of visible rows of event day `tn`.
    fn day_slot(&mut self, tn: i64) -> Option<&mut u32> {
        if self.per_day.is_empty() {
            return Some(self.sparse.entry(tn).or_insert(0));
        }
        let i = usize::try_from(tn - self.first_day).ok()?;
        self.per_day.get_mut(i)
    }

    fn add(&mut self, r: &TileRow) -> Result<()> {
        self.rows += 1;
        match self.kind {
            WindowKind::Sum => {
                self.sum = match self.sum.checked_add(r.x) {
                    Some(s) => s,
                    None => return exec_err!("{WINDOW_SUM}: the total overflows"),
                }
            }
            WindowKind::Days => {
                if let Some(n) = self.day_slot(r.tn) {
                    *n += 1;
                    if *n == 1 {
                        self.days += 1;
                    }
                }
            }
            WindowKind::FirstDay => self.first = Some(self.first.map_or(r.tn, |f| f.min(r.tn))),
            WindowKind::LastDay => self.last = Some(self.last.map_or(r.tn, |l| l.max(r.tn))),
        }
        Ok(())
    }

    /// Removes a visible row whose event day left the window (windows with a bound only,
    /// so never for first/last days).
    fn remove(&mut self, r: &TileRow) {
        self.rows -= 1;
        match self.kind {
            WindowKind::Sum => self.sum -= r.x,
            WindowKind::Days => {
                if let Some(n) = self.day_slot(r.tn) {
                    *n -= 1;
                    if *n == 0 {
                        self.days -= 1;
                    }
                }
            }
            WindowKind::FirstDay | WindowKind::LastDay => {}
        }
    }
}

impl PartitionEvaluator for WindowEvaluator {
    fn evaluate_all(&mut self, values: &[ArrayRef], num_rows: usize) -> Result<ArrayRef> {
        let [x, p, tn, vn, w] = values else {
            return exec_err!("{} takes (x, p, tn, vn, w)", self.kind.name());
        };
        let window = if num_rows == 0 {
            None
        } else {
            int_at(ints(w, "w")?, 0)
        };
        let (p, tn, vn, x) = (
            ints(p, "p")?,
            ints(tn, "tn")?,
            ints(vn, "vn")?,
            Values::of(x)?,
        );
        if window.is_some() && matches!(self.kind, WindowKind::FirstDay | WindowKind::LastDay) {
            return exec_err!("{} takes no window bound", self.kind.name());
        }
        // Tile rows in event-day order, and the snapshot rows (row, day).
        let mut rows: Vec<TileRow> = Vec::new();
        let mut snapshots: Vec<(usize, i64)> = Vec::new();
        for i in 0..num_rows {
            match int_at(tn, i) {
                None => {
                    if let Some(d) = int_at(p, i) {
                        snapshots.push((i, d));
                    }
                }
                Some(t) => {
                    let (Some(v), Some(x)) = (int_at(vn, i), x.at(i)) else {
                        continue;
                    };
                    if self.kind != WindowKind::Sum && x <= 0 {
                        continue;
                    }
                    rows.push(TileRow { tn: t, vn: v, x });
                }
            }
        }
        if !rows.is_sorted_by_key(|r| r.tn) {
            rows.sort_by_key(|r| r.tn);
        }
        if !snapshots.is_sorted_by_key(|s| s.1) {
            snapshots.sort_by_key(|s| s.1);
        }
        let mut out: Vec<Option<i128>> = vec![None; num_rows];
        let mut visible = Visible::new(self.kind, &rows);
        let mut shown = vec![false; rows.len()];
        // Rows in the window not visible yet, by first visible day.
        let mut waiting: BinaryHeap<Reverse<(i64, usize)>> = BinaryHeap::new();
        let (mut entered, mut left) = (0usize, 0usize);
        for (i, d) in snapshots {
            // A row can be visible on day d only if its event day is before d.
            while entered < rows.len() && rows[entered].tn < d {
                if rows[entered].vn <= d {
                    visible.add(&rows[entered])?;
                    shown[entered] = true;
                } else {
                    waiting.push(Reverse((rows[entered].vn, entered)));
                }
                entered += 1;
            }
            if let Some(w) = window {
                // Rows whose event day is before d - w have left the window for good.
                while left < entered && rows[left].tn < d - w {
                    if shown[left] {
                        visible.remove(&rows[left]);
                        shown[left] = false;
                    }
                    left += 1;
                }
            }
            while let Some(Reverse((v, j))) = waiting.peek().copied() {
                if v > d {
                    break;
                }
                waiting.pop();
                if j >= left {
                    visible.add(&rows[j])?;
                    shown[j] = true;
                }
            }
            out[i] = match self.kind {
                WindowKind::Sum => (visible.rows > 0).then_some(visible.sum),
                WindowKind::Days => Some(visible.days as i128),
                WindowKind::FirstDay => visible.first.map(i128::from),
                WindowKind::LastDay => visible.last.map(i128::from),
            };
        }
        to_array(&self.out, out)
    }
}

/// The results as an array of `out`'s type (an error where a total does not fit).
fn to_array(out: &DataType, values: Vec<Option<i128>>) -> Result<ArrayRef> {
    let overflow = || exec_err!("{WINDOW_SUM}: the total does not fit {out}");
    Ok(match out {
        DataType::Int64 => {
            let mut v = Vec::with_capacity(values.len());
            for x in values {
                v.push(match x.map(i64::try_from) {
                    None => None,
                    Some(Ok(x)) => Some(x),
                    Some(Err(_)) => return overflow(),
                });
            }
            Arc::new(Int64Array::from(v))
        }
        DataType::UInt64 => {
            let mut v = Vec::with_capacity(values.len());
            for x in values {
                v.push(match x.map(u64::try_from) {
                    None => None,
                    Some(Ok(x)) => Some(x),
                    Some(Err(_)) => return overflow(),
                });
            }
            Arc::new(UInt64Array::from(v))
        }
        DataType::Decimal128(p, s) => {
            let a: PrimitiveArray<Decimal128Type> = Decimal128Array::from(values);
            Arc::new(a.with_precision_and_scale(*p, *s)?)
        }
        other => return exec_err!("window totals: no output of type {other}"),
    })
}

/// The windowed-total functions, as registered.
pub fn window_functions() -> Vec<WindowUDF> {
    [
        WindowKind::Sum,
        WindowKind::Days,
        WindowKind::FirstDay,
        WindowKind::LastDay,
    ]
    .into_iter()
    .map(|k| WindowUDF::from(WindowTotal::new(k)))
    .collect()
}

/// Registers the windowed-total functions in `ctx`.
pub fn register(ctx: &SessionContext) {
    for f in window_functions() {
        ctx.register_udwf(f);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::util::pretty::pretty_format_batches;
    use datafusion::prelude::SessionConfig;

    async fn context(batch_size: usize) -> SessionContext {
        let ctx = SessionContext::new_with_config(
            SessionConfig::new()
                .with_batch_size(batch_size)
                .with_target_partitions(2),
        );
        register(&ctx);
        ctx
    }

    async fn column(ctx: &SessionContext, sql: &str) -> Vec<Option<i64>> {
        let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
        batches
            .iter()
            .flat_map(|b| {
                b.column(0)
                    .as_primitive::<Int64Type>()
                    .iter()
                    .collect::<Vec<_>>()
            })
            .collect()
    }

    /// Worked by hand. Key `a` has three tile rows (event day, first visible day, value):
    /// (1, 2, 5), (2, 5, 3) which arrived late, and (3, 4, -1); snapshot rows on days 2, 3,
    /// 4, 5, 6 and 9. With a 3-day window a row is visible from its first visible day to
    /// its event day + 3: the first on days 2-4, the second on day 5 only, the third on
    /// days 4-6. Key `b` has only snapshot rows.
    #[tokio::test]
    async fn visible_rows_by_hand() {
        let ctx = context(2).await;
        ctx.sql(
            "CREATE TABLE t (k VARCHAR, p BIGINT, tn BIGINT, vn BIGINT, x BIGINT) AS VALUES
             ('a', 1, 1, 2, 5), ('a', 2, 2, 5, 3), ('a', 3, 3, 4, -1),
             ('a', 2, NULL, NULL, NULL), ('a', 3, NULL, NULL, NULL), ('a', 4, NULL, NULL, NULL),
             ('a', 5, NULL, NULL, NULL), ('a', 6, NULL, NULL, NULL), ('a', 9, NULL, NULL, NULL),
             ('b', 4, NULL, NULL, NULL)",
        )
        .await
        .unwrap();
        let of = |f: &str, w: &str| {
            format!("SELECT v FROM (SELECT k, p, tn, {f}(x, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS v FROM t) WHERE tn IS NULL ORDER BY k, p")
        };
        let n = None;
        assert_eq!(
            column(&ctx, &of(WINDOW_SUM, "3")).await,
            vec![Some(5), Some(5), Some(4), Some(2), Some(-1), n, n]
        );
        // Days with a value above zero: the third row's -1 does not make its day active.
        assert_eq!(
            column(&ctx, &of(WINDOW_DAYS, "3")).await,
            vec![
                Some(1),
                Some(1),
                Some(1),
                Some(1),
                Some(0),
                Some(0),
                Some(0)
            ]
        );
        // No bound: rows stay once visible.
        let all = "CAST(NULL AS BIGINT)";
        assert_eq!(
            column(&ctx, &of(WINDOW_SUM, all)).await,
            vec![Some(5), Some(5), Some(4), Some(7), Some(7), Some(7), n]
        );
        assert_eq!(
            column(&ctx, &of(WINDOW_FIRST_DAY, all)).await,
            vec![Some(1), Some(1), Some(1), Some(1), Some(1), Some(1), n]
        );
        assert_eq!(
            column(&ctx, &of(WINDOW_LAST_DAY, all)).await,
            vec![Some(1), Some(1), Some(1), Some(2), Some(2), Some(2), n]
        );
        // Tile rows get NULL.
        let tiles = column(
            &ctx,
            &format!("SELECT v FROM (SELECT tn, {WINDOW_SUM}(x, p, tn, vn, 3) OVER (PARTITION BY k ORDER BY p) AS v FROM t) WHERE tn IS NOT NULL"),
        )
        .await;
        assert_eq!(tiles, vec![None, None, None]);
    }

    /// On generated rows (many keys, late rows, repeated event days, several batches) each
    /// function equals the same aggregate written with DataFusion's built-in functions as
    /// a join of every snapshot row to the tile rows visible on its day.
    #[tokio::test]
    async fn equal_to_a_join_with_builtin_aggregates() {
        let ctx = context(7).await;
        // 40 keys, 30 tile rows each: event day 0-59, late by 0 to 9 days on one row in
        // four; snapshot rows on days 1..80 of each key, some skipped.
        ctx.sql(
            "CREATE TABLE tiles AS SELECT 'k' || CAST(i % 40 AS VARCHAR) AS k,
                CAST((i * 7919) % 60 AS BIGINT) AS tn,
                CAST((i * 7919) % 60 + 1 + CASE WHEN i % 4 = 0 THEN (i * 31) % 10 ELSE 0 END AS BIGINT) AS vn,
                CAST((i * 104729) % 21 - 6 AS BIGINT) AS x,
                CAST((i * 104729) % 21 - 6 AS DECIMAL(38, 12)) / 7 AS y
             FROM unnest(range(0, 1200)) AS r(i)",
        )
        .await
        .unwrap();
        ctx.sql(
            "CREATE TABLE spine AS SELECT 'k' || CAST(i % 40 AS VARCHAR) AS k, CAST(i / 40 AS BIGINT) AS d
             FROM unnest(range(40, 3240)) AS r(i) WHERE (i * 13) % 17 <> 0",
        )
        .await
        .unwrap();
        let union = "SELECT k, tn AS p, tn, vn, x, y FROM tiles UNION ALL SELECT k, d, NULL, NULL, NULL, NULL FROM spine";
        let text = |sql: String| {
            let ctx = &ctx;
            async move {
                let b = ctx.sql(&sql).await.unwrap().collect().await.unwrap();
                pretty_format_batches(&b).unwrap().to_string()
            }
        };
        for w in ["1", "7", "28", "CAST(NULL AS BIGINT)"] {
            let bounded = !w.starts_with("CAST");
            let inside = if bounded {
                format!("t.vn <= s.d AND s.d <= t.tn + {w}")
            } else {
                "t.vn <= s.d".to_string()
            };
            let mut ours = vec![
                format!("{WINDOW_SUM}(x, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS sx"),
                format!("{WINDOW_SUM}(y, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS sy"),
                format!(
                    "{WINDOW_DAYS}(x, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS days"
                ),
            ];
            let mut theirs = vec![
                "SUM(t.x) AS sx".to_string(),
                "SUM(t.y) AS sy".to_string(),
                "COUNT(DISTINCT CASE WHEN t.x > 0 THEN t.tn END) AS days".to_string(),
            ];
            if !bounded {
                ours.push(format!("{WINDOW_FIRST_DAY}(x, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS first"));
                ours.push(format!(
                    "{WINDOW_LAST_DAY}(x, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS last"
                ));
                theirs.push("MIN(CASE WHEN t.x > 0 THEN t.tn END) AS first".to_string());
                theirs.push("MAX(CASE WHEN t.x > 0 THEN t.tn END) AS last".to_string());
            }
            let names: Vec<&str> = ours
                .iter()
                .map(|c| c.rsplit(" AS ").next().unwrap())
                .collect();
            let mine = text(format!(
                "SELECT k, d, {} FROM (SELECT k, p AS d, tn, {} FROM ({union})) WHERE tn IS NULL ORDER BY k, d",
                names.join(", "),
                ours.join(", ")
            ))
            .await;
            let reference = text(format!(
                "SELECT s.k, s.d, {} FROM spine s LEFT JOIN tiles t ON t.k = s.k AND {inside} GROUP BY s.k, s.d ORDER BY s.k, s.d",
                theirs.join(", ")
            ))
            .await;
            assert!(reference.lines().count() > 2_500, "{reference}");
            assert_eq!(mine, reference, "window {w}");
        }
    }

    /// Active days of a key whose event days span more than [`DENSE_DAYS`] (counted in a
    /// hash map instead of an array) are counted the same way. By hand: rows on days 0 and
    /// 1 (value 2 and 1) and on day 70,000; a 3-day window on day 2 sees days 0 and 1, on
    /// day 70,001 only day 70,000; with no bound, day 70,001 sees all three days.
    #[tokio::test]
    async fn active_days_over_a_wide_span_of_event_days() {
        let ctx = context(3).await;
        let of = |w: &str| {
            format!(
                "SELECT v FROM (SELECT p, tn, {WINDOW_DAYS}(x, p, tn, vn, {w}) OVER (PARTITION BY k ORDER BY p) AS v FROM (VALUES
                 ('a', 0, 0, 1, 2), ('a', 1, 1, 2, 1), ('a', 70000, 70000, 70001, 1),
                 ('a', 2, NULL, NULL, NULL), ('a', 70001, NULL, NULL, NULL)) AS t(k, p, tn, vn, x)) WHERE tn IS NULL ORDER BY p"
            )
        };
        assert_eq!(column(&ctx, &of("3")).await, vec![Some(2), Some(1)]);
        assert_eq!(
            column(&ctx, &of("CAST(NULL AS BIGINT)")).await,
            vec![Some(2), Some(3)]
        );
    }

    /// A total that does not fit its type is an error, not a wrapped number.
    #[tokio::test]
    async fn an_overflowing_total_is_an_error() {
        let ctx = context(8).await;
        let err = ctx
            .sql(&format!(
                "SELECT {WINDOW_SUM}(x, p, tn, vn, 5) OVER (PARTITION BY k ORDER BY p) FROM (VALUES
                 ('a', 1, 1, 2, 9223372036854775807), ('a', 1, 1, 2, 1), ('a', 3, NULL, NULL, NULL)) AS t(k, p, tn, vn, x)"
            ))
            .await
            .unwrap()
            .collect()
            .await
            .unwrap_err();
        assert!(err.to_string().contains("does not fit"), "{err}");
    }
}
