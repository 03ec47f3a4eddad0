//! daymark's windowed totals: a backfill's additive features straight from tile rows, one
//! pass per key.
//!
//! [`WINDOW_TOTALS`] is an aggregate grouped by key. A key's rows are tile rows (event day
//! `tn`, first visible day `vn`, values `x`) and spans of snapshot days. For each snapshot
//! day `d` the function aggregates the tile rows visible on that day,
//! `vn <= d <= tn + w` (the window's half-open day range and, in as-known mode, arrival
//! before the cutoff), in one pass with two pointers over the event days and a queue of
//! rows that arrived late, and returns a list of one struct per day. The general backfill
//! query instead unions a plus row and a minus row per window length and groups them by
//! (key, day) before a running sum: several times as many rows through a hash aggregation
//! (docs/benchmarks.md, seventh measurement).
//!
//! Sums are exact: integers and decimals are added as `i128` (floats are cast to
//! DECIMAL(38, 12) by the query first), so the order rows arrive in never changes a bit of
//! the result.
//!
//! The aggregate keeps all rows of a key until the grouping ends, so a backfill runs it
//! over one key range at a time. On a cluster every executor's session must know it:
//! [`register`] adds it, and [`OnePhaseTotals`] (a physical rule, optional) runs the
//! grouping in one phase.

use datafusion::arrow::array::{
    Array, ArrayRef, AsArray, BooleanArray, Decimal128Array, Float64Array, Int64Array, ListArray,
    NullBufferBuilder, PrimitiveArray, StructArray, UInt64Array,
};
use datafusion::arrow::buffer::OffsetBuffer;
use datafusion::arrow::datatypes::{
    DataType, Decimal128Type, Field, FieldRef, Fields, Float64Type, Int64Type, UInt64Type,
};
use datafusion::common::config::ConfigOptions;
use datafusion::common::tree_node::{Transformed, TransformedResult, TreeNode};
use datafusion::common::{exec_err, plan_err, Result, ScalarValue};
use datafusion::logical_expr::function::{AccumulatorArgs, StateFieldsArgs};
use datafusion::logical_expr::{
    Accumulator, AggregateUDF, AggregateUDFImpl, EmitTo, GroupsAccumulator, Signature, Volatility,
};
use datafusion::physical_expr::expressions::Literal;
use datafusion::physical_expr::PhysicalExpr;
use datafusion::physical_optimizer::PhysicalOptimizerRule;
use datafusion::physical_plan::aggregates::{AggregateExec, AggregateMode};
use datafusion::physical_plan::repartition::RepartitionExec;
use datafusion::physical_plan::{ExecutionPlan, Partitioning};
use datafusion::prelude::SessionContext;
use std::cmp::Reverse;
use std::collections::{BTreeMap, BinaryHeap, HashMap};
use std::sync::Arc;

/// What an output of [`WINDOW_TOTALS`] computes for each snapshot day.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum WindowKind {
    /// Sum of the visible values (NULL when none is visible).
    Sum,
    /// Number of distinct event days among the visible rows whose value is above zero.
    Days,
    /// Earliest event day of a visible row whose value is above zero (unbounded windows).
    FirstDay,
    /// Latest event day of a visible row whose value is above zero (unbounded windows).
    LastDay,
    /// Least visible value (NULL when none is visible).
    Min,
    /// Greatest visible value (NULL when none is visible).
    Max,
    /// Number of distinct visible values (BIGINT values: a backfill passes each value's
    /// number in a dictionary, or the integer itself).
    Distinct,
}

/// The type of a total of values of type `x` (of their least or greatest, for DOUBLE
/// values, which only [`WindowKind::Min`] and [`WindowKind::Max`] take).
fn output_type(x: &DataType) -> Result<DataType> {
    Ok(match x {
        DataType::Int64 | DataType::Null => DataType::Int64,
        DataType::UInt64 => DataType::UInt64,
        DataType::Decimal128(_, s) => DataType::Decimal128(38, *s),
        DataType::Float64 => DataType::Float64,
        other => {
            return plan_err!(
            "{WINDOW_TOTALS} takes BIGINT, unsigned BIGINT, DECIMAL or DOUBLE values, not {other}"
        )
        }
    })
}

/// A DOUBLE as an integer of the same order (IEEE 754's total order: -NaN, -inf, ...,
/// -0, +0, ..., +inf, NaN, as arrow's MIN and MAX compare floats), so that least and
/// greatest values are found among exact integers like every other value. The mapping is
/// its own inverse ([`float_of_ordered`]).
fn ordered_of_float(f: f64) -> i64 {
    let b = f.to_bits() as i64;
    // Negative numbers order backwards by their bits: flip all but the sign.
    b ^ ((b >> 63) & i64::MAX)
}

/// The DOUBLE of an [`ordered_of_float`] integer.
fn float_of_ordered(o: i64) -> f64 {
    f64::from_bits((o ^ ((o >> 63) & i64::MAX)) as u64)
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

/// The value argument, read as exact integers (DOUBLEs in their order,
/// [`ordered_of_float`]).
enum Values<'a> {
    I64(&'a PrimitiveArray<Int64Type>),
    U64(&'a PrimitiveArray<UInt64Type>),
    Dec(&'a PrimitiveArray<Decimal128Type>),
    F64(&'a PrimitiveArray<Float64Type>),
}

impl<'a> Values<'a> {
    fn of(a: &'a ArrayRef) -> Result<Self> {
        Ok(match a.data_type() {
            DataType::Int64 => Values::I64(a.as_primitive()),
            DataType::UInt64 => Values::U64(a.as_primitive()),
            DataType::Decimal128(_, _) => Values::Dec(a.as_primitive()),
            DataType::Float64 => Values::F64(a.as_primitive()),
            other => return exec_err!("window totals: values of type {other} are not supported"),
        })
    }

    /// Element `i` (NULL as `None`).
    fn at(&self, i: usize) -> Option<i128> {
        match self {
            Values::I64(a) => a.is_valid(i).then(|| a.value(i) as i128),
            Values::U64(a) => a.is_valid(i).then(|| a.value(i) as i128),
            Values::Dec(a) => a.is_valid(i).then(|| a.value(i)),
            Values::F64(a) => a.is_valid(i).then(|| ordered_of_float(a.value(i)) as i128),
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
    /// Visible values and how many rows hold each, for `Min`, `Max` (ordered: a row
    /// leaving the window takes its value out) and `Distinct` (`values.len()`).
    ordered: BTreeMap<i128, u32>,
    values: HashMap<i128, u32>,
}

impl Visible {
    /// Nothing visible yet; `rows` (in event-day order) are the rows that may become so.
    /// `per_day` is a buffer to reuse.
    fn new(kind: WindowKind, rows: &[TileRow], mut per_day: Vec<u32>) -> Self {
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
            per_day: {
                per_day.clear();
                per_day.resize(span, 0);
                per_day
            },
            sparse: HashMap::new(),
            first_day,
            days: 0,
            first: None,
            last: None,
            ordered: BTreeMap::new(),
            values: HashMap::new(),
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
                    None => return exec_err!("{WINDOW_TOTALS}: the total overflows"),
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
            WindowKind::Min | WindowKind::Max => *self.ordered.entry(r.x).or_insert(0) += 1,
            WindowKind::Distinct => *self.values.entry(r.x).or_insert(0) += 1,
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
            WindowKind::Min | WindowKind::Max => self.ordered.decrement(r.x),
            WindowKind::Distinct => self.values.decrement(r.x),
        }
    }

    /// The output for the rows visible now.
    fn output(&self) -> Option<i128> {
        match self.kind {
            WindowKind::Sum => (self.rows > 0).then_some(self.sum),
            WindowKind::Days => Some(self.days as i128),
            WindowKind::FirstDay => self.first.map(i128::from),
            WindowKind::LastDay => self.last.map(i128::from),
            WindowKind::Min => self.ordered.keys().next().copied(),
            WindowKind::Max => self.ordered.keys().next_back().copied(),
            WindowKind::Distinct => Some(self.values.len() as i128),
        }
    }
}

/// A count of rows per value, from which a row's value can be taken out (the value goes
/// when no row holds it any more).
trait ValueCounts {
    fn decrement(&mut self, x: i128);
}

impl ValueCounts for BTreeMap<i128, u32> {
    fn decrement(&mut self, x: i128) {
        if let std::collections::btree_map::Entry::Occupied(mut e) = self.entry(x) {
            *e.get_mut() -= 1;
            if *e.get() == 0 {
                e.remove();
            }
        }
    }
}

impl ValueCounts for HashMap<i128, u32> {
    fn decrement(&mut self, x: i128) {
        if let std::collections::hash_map::Entry::Occupied(mut e) = self.entry(x) {
            *e.get_mut() -= 1;
            if *e.get() == 0 {
                e.remove();
            }
        }
    }
}

/// The aggregate of `kind` over the rows visible on each of `days` (ascending), pushed
/// to `out` day after day: a row is visible on day `d` from its first visible day `vn` on,
/// if its event day `tn` is before `d` and, with a window `w`, not before `d - w`. `rows`
/// are in event-day order and hold only the rows `kind` counts.
fn totals(
    kind: WindowKind,
    window: Option<i64>,
    rows: &[TileRow],
    days: &[i64],
    out: &mut OutColumn,
    scratch: &mut Scratch,
) -> Result<()> {
    let mut visible = Visible::new(kind, rows, std::mem::take(&mut scratch.per_day));
    let shown = &mut scratch.shown;
    shown.clear();
    shown.resize(rows.len(), false);
    // Rows in the window not visible yet, by first visible day.
    let waiting = &mut scratch.waiting;
    waiting.clear();
    let (mut entered, mut left) = (0usize, 0usize);
    for &d in days {
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
        out.push(visible.output())?;
    }
    scratch.per_day = visible.per_day;
    Ok(())
}

/// Buffers [`totals`] reuses from one call to the next (one call per key and output).
#[derive(Default)]
struct Scratch {
    per_day: Vec<u32>,
    shown: Vec<bool>,
    waiting: BinaryHeap<Reverse<(i64, usize)>>,
}

/// One output's values for every snapshot row of a batch, in the output's own type,
/// allocated once at its final length: a batch holds a quarter of a backfill's snapshot
/// rows, and growing 32-byte `Option<i128>` vectors to that size and converting them
/// afterwards was about half of a backfill's page faults (docs/benchmarks.md, twentieth
/// measurement).
struct OutColumn {
    values: OutValues,
    nulls: NullBufferBuilder,
    out: DataType,
}

enum OutValues {
    I64(Vec<i64>),
    U64(Vec<u64>),
    Dec(Vec<i128>),
    /// DOUBLEs, pushed in their order ([`ordered_of_float`]).
    F64(Vec<f64>),
}

impl OutColumn {
    fn new(out: &DataType, len: usize) -> Result<Self> {
        let values = match out {
            DataType::Int64 => OutValues::I64(Vec::with_capacity(len)),
            DataType::UInt64 => OutValues::U64(Vec::with_capacity(len)),
            DataType::Decimal128(_, _) => OutValues::Dec(Vec::with_capacity(len)),
            DataType::Float64 => OutValues::F64(Vec::with_capacity(len)),
            other => return exec_err!("window totals: no output of type {other}"),
        };
        Ok(OutColumn {
            values,
            nulls: NullBufferBuilder::new(len),
            out: out.clone(),
        })
    }

    /// Appends one value (an error where it does not fit the output's type).
    fn push(&mut self, x: Option<i128>) -> Result<()> {
        // A NULL is stored as 0 under its null bit.
        let v = x.unwrap_or(0);
        let fits = match &mut self.values {
            OutValues::I64(out) => i64::try_from(v).map(|v| out.push(v)).is_ok(),
            OutValues::U64(out) => u64::try_from(v).map(|v| out.push(v)).is_ok(),
            OutValues::Dec(out) => {
                out.push(v);
                true
            }
            OutValues::F64(out) => i64::try_from(v)
                .map(|v| out.push(float_of_ordered(v)))
                .is_ok(),
        };
        if !fits {
            return exec_err!("{WINDOW_TOTALS}: the total does not fit {}", self.out);
        }
        self.nulls.append(x.is_some());
        Ok(())
    }

    fn finish(mut self) -> Result<ArrayRef> {
        let nulls = self.nulls.finish();
        Ok(match self.values {
            OutValues::I64(v) => Arc::new(Int64Array::try_new(v.into(), nulls)?),
            OutValues::U64(v) => Arc::new(UInt64Array::try_new(v.into(), nulls)?),
            OutValues::F64(v) => Arc::new(Float64Array::try_new(v.into(), nulls)?),
            OutValues::Dec(v) => {
                let DataType::Decimal128(p, s) = self.out else {
                    return exec_err!("window totals: no output of type {}", self.out);
                };
                Arc::new(Decimal128Array::try_new(v.into(), nulls)?.with_precision_and_scale(p, s)?)
            }
        })
    }
}

/// `daymark_window_totals(tn, vn, s, e, k0, w0, x0, k1, w1, x1, ...)`, grouped by key:
/// the same totals as the window functions above, from one hash grouping of a key's rows
/// instead of a sort of them by (key, day). Tile rows have `tn` (event day), `vn` (first
/// visible day) and values `x0, x1...`; span rows (`tn` NULL) have the snapshot days
/// `s..=e`. The result is a list of one struct per snapshot day, day `dn` first, then one
/// field `o{m}` per output: kind code `km` ([`WindowKind::code`], a constant), window
/// length `wm` (a constant, NULL for no bound) over values `xm`. The output `o{m}` has
/// the type of a total of `xm` (BIGINT for BIGINT, DECIMAL(38, s) for DECIMAL(p, s)).
///
/// A backfill unnests the lists. It used window functions over each key's rows before:
/// those needed the rows sorted by (key, day) and cut into keys by comparing key strings
/// row by row, which was most of a key-range query's time (docs/benchmarks.md, twelfth
/// and fifteenth measurements).
pub const WINDOW_TOTALS: &str = "daymark_window_totals";

impl WindowKind {
    /// The constant that selects `self` in [`WINDOW_TOTALS`]'s arguments.
    pub fn code(self) -> i64 {
        match self {
            WindowKind::Sum => 0,
            WindowKind::Days => 1,
            WindowKind::FirstDay => 2,
            WindowKind::LastDay => 3,
            WindowKind::Min => 4,
            WindowKind::Max => 5,
            WindowKind::Distinct => 6,
        }
    }

    /// Whether the output reads only rows whose value is above zero (the rows with an
    /// event, for counts).
    fn positive_only(self) -> bool {
        matches!(
            self,
            WindowKind::Days | WindowKind::FirstDay | WindowKind::LastDay
        )
    }

    fn of_code(code: i64) -> Option<Self> {
        [
            WindowKind::Sum,
            WindowKind::Days,
            WindowKind::FirstDay,
            WindowKind::LastDay,
            WindowKind::Min,
            WindowKind::Max,
            WindowKind::Distinct,
        ]
        .into_iter()
        .find(|k| k.code() == code)
    }
}

/// [`WINDOW_TOTALS`].
#[derive(Debug, PartialEq, Eq, Hash)]
pub struct WindowTotalsAggregate {
    signature: Signature,
}

impl Default for WindowTotalsAggregate {
    fn default() -> Self {
        WindowTotalsAggregate {
            signature: Signature::variadic_any(Volatility::Immutable),
        }
    }
}

/// The fields of one snapshot day's struct for arguments of types `args`.
fn day_fields(args: &[DataType]) -> Result<Fields> {
    if args.len() < 4 || !(args.len() - 4).is_multiple_of(3) {
        return plan_err!(
            "{WINDOW_TOTALS} takes (tn, vn, s, e, then kind, window, value per output)"
        );
    }
    let mut fields = vec![Field::new("dn", DataType::Int64, false)];
    for (m, x) in args[4..].chunks(3).map(|c| &c[2]).enumerate() {
        fields.push(Field::new(format!("o{m}"), output_type(x)?, true));
    }
    Ok(fields.into())
}

fn list_of(t: DataType) -> DataType {
    DataType::List(Arc::new(Field::new_list_field(t, true)))
}

impl AggregateUDFImpl for WindowTotalsAggregate {
    fn name(&self) -> &str {
        WINDOW_TOTALS
    }

    fn signature(&self) -> &Signature {
        &self.signature
    }

    fn return_type(&self, args: &[DataType]) -> Result<DataType> {
        Ok(list_of(DataType::Struct(day_fields(args)?)))
    }

    fn state_fields(&self, args: StateFieldsArgs) -> Result<Vec<FieldRef>> {
        let name = |part: &str| format!("{}[{part}]", args.name);
        Ok(vec![
            Arc::new(Field::new(name("tn"), list_of(DataType::Int64), true)),
            Arc::new(Field::new(name("vn"), list_of(DataType::Int64), true)),
            Arc::new(Field::new(name("x"), list_of(RAW), true)),
            Arc::new(Field::new(name("s"), list_of(DataType::Int64), true)),
            Arc::new(Field::new(name("e"), list_of(DataType::Int64), true)),
        ])
    }

    fn accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn Accumulator>> {
        Ok(Box::new(OneKey(KeyTotals::new(&args)?)))
    }

    fn groups_accumulator_supported(&self, _args: AccumulatorArgs) -> bool {
        true
    }

    fn create_groups_accumulator(
        &self,
        args: AccumulatorArgs,
    ) -> Result<Box<dyn GroupsAccumulator>> {
        Ok(Box::new(KeyTotals::new(&args)?))
    }
}

/// Values in the state and in memory: exact integers as `i128` (a DECIMAL(38, 0) in the
/// state, whatever the value's own scale: the outputs put the scale back).
const RAW: DataType = DataType::Decimal128(38, 0);
/// A NULL value in memory (below any DECIMAL(38)'s range, and any 64-bit integer's).
const NULL_X: i128 = i128::MIN;

/// One output: what it computes, over which stored value column.
#[derive(Debug)]
struct TotalOutput {
    kind: WindowKind,
    window: Option<i64>,
    slot: usize,
    out: DataType,
}

/// The rows of a grouping, in the order they arrived, each with its key's group index.
/// (Rows were pushed to one set of vectors per key before: three scattered appends, and
/// the vectors' regrowth, per row made that about 285 ns a row, 1.8 s of compute in the
/// benchmark's backfill: docs/benchmarks.md, twenty-second measurement. Appending here is
/// sequential; the rows are put in key order once, when a key's totals are computed.)
///
/// A tile row keeps only the values of its [`Layout`]: a backfill's rows come from
/// several tables (each source's tiles, each distinct-value tile), and each table fills
/// only its own value columns, the others being NULL. Storing every slot of every row
/// made a wide pipeline's rows several times larger than their values.
#[derive(Debug, Default)]
struct Arrived {
    /// Group index of each tile row.
    group: Vec<u32>,
    /// Event day and first visible day of each tile row (day numbers fit 32 bits).
    tn: Vec<i32>,
    vn: Vec<i32>,
    /// Each tile row's layout (an index into `layouts`) and where its values start in
    /// `x`.
    layout: Vec<u16>,
    at: Vec<u32>,
    /// The values of each tile row's layout, row after row ([`NULL_X`] for NULL).
    x: Vec<i128>,
    layouts: Layouts,
    /// Group index of each span row.
    span_group: Vec<u32>,
    spans: Vec<(i64, i64)>,
}

/// The slots a tile row holds values for, ascending (the row's other slots are NULL).
type Layout = Vec<u16>;

/// The layouts met so far, numbered in the order they were met.
#[derive(Debug, Default, Clone)]
struct Layouts {
    all: Vec<Layout>,
    ids: HashMap<Layout, u16>,
}

impl Layouts {
    /// The number of `layout`, numbered now if new. Past `u16::MAX` layouts (never met: a
    /// backfill has a few), rows take `every` (all slots), which always fits.
    fn id(&mut self, layout: Layout, every: usize) -> u16 {
        if let Some(id) = self.ids.get(&layout) {
            return *id;
        }
        let layout = if self.all.len() < usize::from(u16::MAX) {
            layout
        } else {
            (0..every as u16).collect()
        };
        if let Some(id) = self.ids.get(&layout) {
            return *id;
        }
        let id = self.all.len() as u16;
        self.ids.insert(layout.clone(), id);
        self.all.push(layout);
        id
    }
}

/// A day number as stored.
fn day32(d: i64, what: &str) -> Result<i32> {
    match i32::try_from(d) {
        Ok(d) => Ok(d),
        Err(_) => exec_err!("{WINDOW_TOTALS}: the day number {what} = {d} is out of range"),
    }
}

impl Arrived {
    fn bytes(&self) -> usize {
        (self.group.capacity() + self.span_group.capacity()) * 4
            + (self.tn.capacity() + self.vn.capacity() + self.at.capacity()) * 4
            + self.layout.capacity() * 2
            + self.x.capacity() * 16
            + self.spans.capacity() * 16
    }

    /// Appends a tile row of group `g`: `value(slot)` for each slot of `layout`.
    fn push(
        &mut self,
        g: u32,
        tn: i64,
        vn: i64,
        layout: u16,
        value: impl Fn(u16) -> i128,
    ) -> Result<()> {
        let Ok(at) = u32::try_from(self.x.len()) else {
            return exec_err!(
                "{WINDOW_TOTALS}: more than {} values in one grouping (a smaller range of keys, or a memory limit, makes fewer)",
                u32::MAX
            );
        };
        self.group.push(g);
        self.tn.push(day32(tn, "tn")?);
        self.vn.push(day32(vn, "vn")?);
        self.layout.push(layout);
        self.at.push(at);
        let slots = &self.layouts.all[usize::from(layout)];
        self.x.extend(slots.iter().map(|s| value(*s)));
        Ok(())
    }

    /// Tile row `r`'s slots and their values.
    fn values(&self, r: usize) -> (&[u16], &[i128]) {
        let slots = &self.layouts.all[usize::from(self.layout[r])];
        let at = self.at[r] as usize;
        (slots, &self.x[at..at + slots.len()])
    }

    /// The indices of `of` (group indices) below `n`, grouped by group, in arrival order
    /// within a group (a counting sort), with each group's first position: group `g`'s
    /// items are `order[starts[g]..starts[g + 1]]`.
    fn by_group(of: &[u32], n: usize) -> (Vec<usize>, Vec<u32>) {
        let mut starts = vec![0usize; n + 1];
        for &g in of {
            if (g as usize) < n {
                starts[g as usize + 1] += 1;
            }
        }
        for g in 0..n {
            starts[g + 1] += starts[g];
        }
        let mut next = starts.clone();
        let mut order = vec![0u32; starts[n]];
        for (i, &g) in of.iter().enumerate() {
            let g = g as usize;
            if g < n {
                order[next[g]] = i as u32;
                next[g] += 1;
            }
        }
        (starts, order)
    }

    /// Takes the rows of groups `0..n` out, grouped; the rows of later groups stay, their
    /// group indices lowered by `n` (as DataFusion renumbers groups after emitting some).
    fn take(&mut self, n: usize, slots: usize) -> Grouped {
        let (starts, order) = Self::by_group(&self.group, n);
        let (span_starts, span_order) = Self::by_group(&self.span_group, n);
        let kept_rows = self.group.len() - order.len();
        let kept_spans = self.span_group.len() - span_order.len();
        let all = std::mem::take(self);
        self.layouts = all.layouts.clone();
        if kept_rows > 0 || kept_spans > 0 {
            for (i, &g) in all.group.iter().enumerate() {
                if g as usize >= n {
                    let (_, x) = all.values(i);
                    self.group.push(g - n as u32);
                    self.tn.push(all.tn[i]);
                    self.vn.push(all.vn[i]);
                    self.layout.push(all.layout[i]);
                    // Fewer values than before: below `u32::MAX` as they were.
                    self.at.push(self.x.len() as u32);
                    self.x.extend_from_slice(x);
                }
            }
            for (i, &g) in all.span_group.iter().enumerate() {
                if g as usize >= n {
                    self.span_group.push(g - n as u32);
                    self.spans.push(all.spans[i]);
                }
            }
        }
        Grouped {
            rows: all,
            starts,
            order,
            span_starts,
            span_order,
            slots,
        }
    }
}

/// The rows of some groups (`Arrived::take`), readable key by key.
struct Grouped {
    rows: Arrived,
    starts: Vec<usize>,
    order: Vec<u32>,
    span_starts: Vec<usize>,
    span_order: Vec<u32>,
    slots: usize,
}

impl Grouped {
    /// Number of groups.
    fn len(&self) -> usize {
        self.starts.len() - 1
    }

    /// Indices (into `rows`) of group `g`'s tile rows, in arrival order.
    fn tiles(&self, g: usize) -> &[u32] {
        &self.order[self.starts[g]..self.starts[g + 1]]
    }

    /// Group `g`'s spans of snapshot days.
    fn spans(&self, g: usize) -> impl Iterator<Item = (i64, i64)> + '_ {
        self.span_order[self.span_starts[g]..self.span_starts[g + 1]]
            .iter()
            .map(|&i| self.rows.spans[i as usize])
    }

    /// Every slot's value of tile row `r` ([`NULL_X`] outside its layout), into `out`.
    fn x(&self, r: usize, out: &mut Vec<i128>) {
        let at = out.len();
        out.resize(at + self.slots, NULL_X);
        let (slots, values) = self.rows.values(r);
        for (s, v) in slots.iter().zip(values) {
            out[at + usize::from(*s)] = *v;
        }
    }

    /// The snapshot days of group `g`, ascending.
    fn days(&self, g: usize) -> Vec<i64> {
        let mut n = 0;
        let mut days: Vec<i64> = self
            .spans(g)
            .flat_map(|(s, e)| {
                n += 1;
                s..=e
            })
            .collect();
        if n > 1 {
            days.sort_unstable();
            days.dedup();
        }
        days
    }
}

/// One key's tile rows, copied out of a [`Grouped`] next to each other (a buffer reused
/// from key to key).
#[derive(Default)]
struct KeyRows {
    tn: Vec<i64>,
    vn: Vec<i64>,
    /// `slots` values per row ([`NULL_X`] for NULL).
    x: Vec<i128>,
}

/// Rows this far ahead are asked for while one is copied ([`KeyRows::gather`]).
const PREFETCH_AHEAD: usize = 16;

impl KeyRows {
    /// Copies group `g`'s tile rows, in arrival order. A key's rows lie one per tile file
    /// across the whole grouping (hundreds of megabytes in a backfill), so nearly every
    /// row read is a cache miss; reading them where they are, once per output, was about
    /// a fifth of computing the totals (docs/benchmarks.md, twenty-fourth measurement).
    /// The rows a little ahead are fetched while one is copied, so that the misses
    /// overlap; the order across groups is followed, so the next key's first rows are
    /// fetched too.
    fn gather(&mut self, keys: &Grouped, g: usize) {
        let rows = &keys.rows;
        let (from, to) = (keys.starts[g], keys.starts[g + 1]);
        self.tn.clear();
        self.vn.clear();
        self.x.clear();
        for (i, &r) in keys.order[from..to].iter().enumerate() {
            if let Some(&ahead) = keys.order.get(from + i + PREFETCH_AHEAD) {
                let a = ahead as usize;
                prefetch(rows.tn.as_ptr().wrapping_add(a));
                prefetch(rows.vn.as_ptr().wrapping_add(a));
                prefetch(rows.at.as_ptr().wrapping_add(a));
                prefetch(rows.layout.as_ptr().wrapping_add(a));
            }
            // Where a row's values are is known once its `at` is in: half as far ahead.
            if let Some(&ahead) = keys.order.get(from + i + PREFETCH_AHEAD / 2) {
                let at = rows.at[ahead as usize] as usize;
                prefetch(rows.x.as_ptr().wrapping_add(at));
            }
            let r = r as usize;
            self.tn.push(i64::from(rows.tn[r]));
            self.vn.push(i64::from(rows.vn[r]));
            keys.x(r, &mut self.x);
        }
    }
}

/// Asks the processor to bring the cache line at `p` in (a hint only: it never faults,
/// whatever the address, and does nothing on other processors).
#[inline(always)]
pub(crate) fn prefetch<T>(p: *const T) {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: a prefetch reads nothing the program sees and cannot fault; SSE, which it
    // needs, is part of every x86-64 processor.
    #[allow(unused_unsafe)]
    unsafe {
        std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(p.cast::<i8>());
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = p;
}

/// The accumulator of [`WINDOW_TOTALS`] for all keys of a grouping.
#[derive(Debug)]
struct KeyTotals {
    outputs: Vec<TotalOutput>,
    /// The argument each stored value column is read from (arguments repeated across
    /// outputs, such as a count in three windows, are stored once).
    slot_args: Vec<usize>,
    fields: Fields,
    rows: Arrived,
    /// Groups seen (DataFusion's `total_num_groups`, less those emitted).
    groups: usize,
}

/// A constant BIGINT argument (NULL as `None`).
fn constant(e: &Arc<dyn PhysicalExpr>, what: &str) -> Result<Option<i64>> {
    let Some(l) = e.downcast_ref::<Literal>() else {
        return plan_err!("{WINDOW_TOTALS}: the {what} must be a constant");
    };
    match l.value() {
        ScalarValue::Int64(v) => Ok(*v),
        ScalarValue::Null => Ok(None),
        other => plan_err!("{WINDOW_TOTALS}: the {what} must be a BIGINT, not {other}"),
    }
}

impl KeyTotals {
    fn new(args: &AccumulatorArgs) -> Result<Self> {
        let types: Vec<DataType> = args
            .expr_fields
            .iter()
            .map(|f| f.data_type().clone())
            .collect();
        let fields = day_fields(&types)?;
        let mut outputs = Vec::new();
        let mut slot_args: Vec<usize> = Vec::new();
        for (m, chunk) in args.exprs[4..].chunks(3).enumerate() {
            let Some(kind) = constant(&chunk[0], "kind")?.and_then(WindowKind::of_code) else {
                return plan_err!("{WINDOW_TOTALS}: output {m} has no known kind");
            };
            let window = constant(&chunk[1], "window")?;
            if window.is_some() && matches!(kind, WindowKind::FirstDay | WindowKind::LastDay) {
                return plan_err!("{WINDOW_TOTALS}: output {m} ({kind:?}) takes no window bound");
            }
            let arg = 4 + 3 * m + 2;
            // DOUBLEs are stored in their order, not their value: only least and greatest
            // values mean anything over them; a count of distinct values is a BIGINT.
            let x = &types[arg];
            let fits = match kind {
                WindowKind::Min | WindowKind::Max => true,
                WindowKind::Distinct => matches!(x, DataType::Int64 | DataType::UInt64),
                _ => *x != DataType::Float64,
            };
            if !fits {
                return plan_err!(
                    "{WINDOW_TOTALS}: output {m} ({kind:?}) does not take {x} values"
                );
            }
            let slot = match slot_args
                .iter()
                .position(|a| *args.exprs[*a] == *args.exprs[arg])
            {
                Some(s) => s,
                None => {
                    slot_args.push(arg);
                    slot_args.len() - 1
                }
            };
            outputs.push(TotalOutput {
                kind,
                window,
                slot,
                out: fields[m + 1].data_type().clone(),
            });
        }
        Ok(KeyTotals {
            outputs,
            slot_args,
            fields,
            rows: Arrived::default(),
            groups: 0,
        })
    }

    fn grow(&mut self, total_num_groups: usize) -> Result<()> {
        if u32::try_from(total_num_groups).is_err() {
            return exec_err!(
                "{WINDOW_TOTALS}: more than {} keys in one grouping",
                u32::MAX
            );
        }
        self.groups = self.groups.max(total_num_groups);
        Ok(())
    }

    /// Takes the rows of the groups `emit_to` names out.
    fn take(&mut self, emit_to: EmitTo) -> Grouped {
        let n = match emit_to {
            EmitTo::All => self.groups,
            EmitTo::First(n) => n.min(self.groups),
        };
        self.groups -= n;
        self.rows.take(n, self.slot_args.len())
    }
}

impl GroupsAccumulator for KeyTotals {
    fn update_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        opt_filter: Option<&BooleanArray>,
        total_num_groups: usize,
    ) -> Result<()> {
        self.grow(total_num_groups)?;
        let (tn, vn, s, e) = (
            ints(&values[0], "tn")?,
            ints(&values[1], "vn")?,
            ints(&values[2], "s")?,
            ints(&values[3], "e")?,
        );
        let xs = self
            .slot_args
            .iter()
            .map(|a| Values::of(&values[*a]))
            .collect::<Result<Vec<_>>>()?;
        // The batch's layout: the slots with a value in some row (a UNION's batch comes
        // from one of its tables, which fills only its own columns).
        let present: Layout = self
            .slot_args
            .iter()
            .enumerate()
            .filter(|(_, a)| values[**a].null_count() < values[**a].len())
            .map(|(s, _)| s as u16)
            .collect();
        let rows = &mut self.rows;
        let layout = rows.layouts.id(present, self.slot_args.len());
        for (i, &g) in group_indices.iter().enumerate() {
            if opt_filter.is_some_and(|f| !f.is_valid(i) || !f.value(i)) {
                continue;
            }
            // Below `u32::MAX`: checked by `grow`.
            let g = g as u32;
            match (int_at(tn, i), int_at(vn, i)) {
                (Some(t), Some(v)) => {
                    rows.push(g, t, v, layout, |s| {
                        xs[usize::from(s)].at(i).unwrap_or(NULL_X)
                    })?;
                }
                (Some(_), None) => {}
                (None, _) => {
                    if let (Some(s), Some(e)) = (int_at(s, i), int_at(e, i)) {
                        rows.span_group.push(g);
                        rows.spans.push((s, e));
                    }
                }
            }
        }
        Ok(())
    }

    fn evaluate(&mut self, emit_to: EmitTo) -> Result<ArrayRef> {
        let keys = self.take(emit_to);
        let key_days: Vec<Vec<i64>> = (0..keys.len()).map(|g| keys.days(g)).collect();
        let total: usize = key_days.iter().map(Vec::len).sum();
        let Ok(last) = i32::try_from(total) else {
            return exec_err!("{WINDOW_TOTALS}: too many snapshot rows in one batch");
        };
        let mut offsets: Vec<i32> = Vec::with_capacity(keys.len() + 1);
        offsets.push(0);
        let mut dn: Vec<i64> = Vec::with_capacity(total);
        let mut outs = self
            .outputs
            .iter()
            .map(|o| OutColumn::new(&o.out, total))
            .collect::<Result<Vec<_>>>()?;
        // The rows an output reads depend on its value column and on whether it counts
        // only values above zero: outputs alike (a count in three windows) share them.
        let mut sets: Vec<(usize, bool)> = Vec::new();
        let set_of: Vec<usize> = self
            .outputs
            .iter()
            .map(|o| {
                let set = (o.slot, o.kind.positive_only());
                sets.iter().position(|s| *s == set).unwrap_or_else(|| {
                    sets.push(set);
                    sets.len() - 1
                })
            })
            .collect();
        let mut rows: Vec<Vec<TileRow>> = sets.iter().map(|_| Vec::new()).collect();
        let mut scratch = Scratch::default();
        let mut order: Vec<u32> = Vec::new();
        let mut local = KeyRows::default();
        let slots = keys.slots;
        for (g, days) in key_days.into_iter().enumerate() {
            // The key's tile rows, copied next to each other first: they arrived spread
            // over the whole grouping, one per tile file.
            local.gather(&keys, g);
            // Then in event-day order (arrival order among equal days), shared by all
            // outputs.
            order.clear();
            order.extend(0..local.tn.len() as u32);
            let tn = &local.tn;
            if !tn.is_sorted() {
                order.sort_by_key(|&r| tn[r as usize]);
            }
            for (&(slot, positive), rows) in sets.iter().zip(rows.iter_mut()) {
                rows.clear();
                rows.extend(order.iter().filter_map(|&r| {
                    let r = r as usize;
                    let x = local.x[r * slots + slot];
                    (x != NULL_X && (!positive || x > 0)).then_some(TileRow {
                        tn: tn[r],
                        vn: local.vn[r],
                        x,
                    })
                }));
            }
            for ((o, values), set) in self.outputs.iter().zip(outs.iter_mut()).zip(&set_of) {
                totals(o.kind, o.window, &rows[*set], &days, values, &mut scratch)?;
            }
            dn.extend(days);
            // At most `last`, checked above.
            offsets.push(dn.len() as i32);
        }
        debug_assert_eq!(offsets.last().copied(), Some(last));
        let mut columns: Vec<ArrayRef> = vec![Arc::new(Int64Array::from(dn))];
        for values in outs {
            columns.push(values.finish()?);
        }
        let days = StructArray::try_new(self.fields.clone(), columns, None)?;
        Ok(Arc::new(ListArray::try_new(
            Arc::new(Field::new_list_field(
                DataType::Struct(self.fields.clone()),
                true,
            )),
            OffsetBuffer::new(offsets.into()),
            Arc::new(days),
            None,
        )?))
    }

    fn state(&mut self, emit_to: EmitTo) -> Result<Vec<ArrayRef>> {
        let keys = self.take(emit_to);
        let list = |t: DataType, lens: Vec<usize>, values: ArrayRef| -> Result<ArrayRef> {
            Ok(Arc::new(ListArray::try_new(
                Arc::new(Field::new_list_field(t, true)),
                OffsetBuffer::from_lengths(lens),
                values,
                None,
            )?))
        };
        let groups = 0..keys.len();
        let n_tiles: Vec<usize> = groups.clone().map(|g| keys.tiles(g).len()).collect();
        let n_spans: Vec<usize> = groups.clone().map(|g| keys.spans(g).count()).collect();
        let tile_values = |f: &dyn Fn(usize) -> i64| -> ArrayRef {
            Arc::new(Int64Array::from_iter_values(
                keys.order.iter().map(|&r| f(r as usize)),
            ))
        };
        let tn = tile_values(&|r| i64::from(keys.rows.tn[r]));
        let vn = tile_values(&|r| i64::from(keys.rows.vn[r]));
        let span_values = |f: &dyn Fn((i64, i64)) -> i64| -> ArrayRef {
            Arc::new(Int64Array::from_iter_values(
                groups.clone().flat_map(|g| keys.spans(g).map(f)),
            ))
        };
        let s = span_values(&|p| p.0);
        let e = span_values(&|p| p.1);
        // Every slot of every row (NULL outside its layout).
        let mut all = Vec::with_capacity(keys.order.len() * keys.slots);
        for &r in &keys.order {
            keys.x(r as usize, &mut all);
        }
        let x: Decimal128Array = all
            .into_iter()
            .map(|v| (v != NULL_X).then_some(v))
            .collect();
        let x = Arc::new(x.with_precision_and_scale(38, 0)?);
        let n_x = n_tiles.iter().map(|n| n * keys.slots).collect();
        Ok(vec![
            list(DataType::Int64, n_tiles.clone(), tn)?,
            list(DataType::Int64, n_tiles, vn)?,
            list(RAW, n_x, x as ArrayRef)?,
            list(DataType::Int64, n_spans.clone(), s)?,
            list(DataType::Int64, n_spans, e)?,
        ])
    }

    fn merge_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        total_num_groups: usize,
    ) -> Result<()> {
        self.grow(total_num_groups)?;
        let lists = values
            .iter()
            .map(|v| match v.as_list_opt::<i32>() {
                Some(l) => Ok(l),
                None => exec_err!("{WINDOW_TOTALS}: a state column is not a list"),
            })
            .collect::<Result<Vec<_>>>()?;
        let [tn, vn, x, s, e] = lists.as_slice() else {
            return exec_err!("{WINDOW_TOTALS}: the state has five columns");
        };
        let int_values = |l: &ListArray, what| -> Result<PrimitiveArray<Int64Type>> {
            Ok(ints(l.values(), what)?.clone())
        };
        let (tnv, vnv, sv, ev) = (
            int_values(tn, "tn")?,
            int_values(vn, "vn")?,
            int_values(s, "s")?,
            int_values(e, "e")?,
        );
        let Some(xv) = x.values().as_primitive_opt::<Decimal128Type>() else {
            return exec_err!("{WINDOW_TOTALS}: the state's values are not DECIMAL");
        };
        let slots = self.slot_args.len();
        // The batch's layout: the slots with a value in some row.
        let mut has = vec![false; slots];
        for i in 0..group_indices.len() {
            let rx = x.value_offsets()[i] as usize..x.value_offsets()[i + 1] as usize;
            for (j, at) in rx.enumerate() {
                if xv.is_valid(at) {
                    has[j % slots] = true;
                }
            }
        }
        let present: Layout = (0..slots as u16).filter(|s| has[usize::from(*s)]).collect();
        let rows = &mut self.rows;
        let layout = rows.layouts.id(present, slots);
        for (i, &g) in group_indices.iter().enumerate() {
            // Below `u32::MAX`: checked by `grow`.
            let g = g as u32;
            let r = tn.value_offsets()[i] as usize..tn.value_offsets()[i + 1] as usize;
            let rx = x.value_offsets()[i] as usize..x.value_offsets()[i + 1] as usize;
            if rx.len() != r.len() * slots {
                return exec_err!("{WINDOW_TOTALS}: a state row has the wrong number of values");
            }
            for (k, j) in r.enumerate() {
                let first = rx.start + k * slots;
                rows.push(g, tnv.value(j), vnv.value(j), layout, |s| {
                    let at = first + usize::from(s);
                    if xv.is_valid(at) {
                        xv.value(at)
                    } else {
                        NULL_X
                    }
                })?;
            }
            let r = s.value_offsets()[i] as usize..s.value_offsets()[i + 1] as usize;
            rows.span_group.extend(std::iter::repeat_n(g, r.len()));
            rows.spans.extend(r.map(|j| (sv.value(j), ev.value(j))));
        }
        Ok(())
    }

    /// Each input row as the state of a key of its own.
    fn convert_to_state(
        &self,
        values: &[ArrayRef],
        opt_filter: Option<&BooleanArray>,
    ) -> Result<Vec<ArrayRef>> {
        let n = values.first().map_or(0, |v| v.len());
        let mut each = KeyTotals {
            outputs: Vec::new(),
            slot_args: self.slot_args.clone(),
            fields: self.fields.clone(),
            rows: Arrived::default(),
            groups: 0,
        };
        let rows: Vec<usize> = (0..n).collect();
        each.update_batch(values, &rows, opt_filter, n)?;
        each.state(EmitTo::All)
    }

    fn size(&self) -> usize {
        self.rows.bytes()
    }
}

/// [`KeyTotals`] for one key, where DataFusion asks for a plain accumulator.
#[derive(Debug)]
struct OneKey(KeyTotals);

impl Accumulator for OneKey {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        let n = values.first().map_or(0, |v| v.len());
        self.0.update_batch(values, &vec![0; n], None, 1)
    }

    fn evaluate(&mut self) -> Result<ScalarValue> {
        self.0.grow(1)?;
        ScalarValue::try_from_array(&self.0.evaluate(EmitTo::All)?, 0)
    }

    fn size(&self) -> usize {
        std::mem::size_of_val(self) + self.0.size()
    }

    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        self.0.grow(1)?;
        self.0
            .state(EmitTo::All)?
            .iter()
            .map(|a| ScalarValue::try_from_array(a, 0))
            .collect()
    }

    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let n = states.first().map_or(0, |v| v.len());
        self.0.merge_batch(states, &vec![0; n], 1)
    }
}

/// A physical rule: a grouping whose only aggregates are [`WINDOW_TOTALS`] runs in one
/// phase over rows hash-partitioned by key, instead of DataFusion's partial grouping then
/// final grouping. The function reduces nothing (it keeps every row of a key), so the
/// partial phase only copied each key's rows into lists for the final phase to copy back
/// (measured: 1.1 s partial and 1.5 s final of compute in one key range of the benchmark,
/// docs/benchmarks.md fifteenth measurement). Plans are the same without the rule, only
/// slower: a cluster whose scheduler lacks it still gets the right rows.
#[derive(Debug, Default)]
pub struct OnePhaseTotals;

impl OnePhaseTotals {
    /// `plan` in one phase, when it is a final grouping of [`WINDOW_TOTALS`] over a hash
    /// re-partition of its partial grouping.
    fn rewrite(plan: &Arc<dyn ExecutionPlan>) -> Result<Option<Arc<dyn ExecutionPlan>>> {
        let Some(last) = plan.downcast_ref::<AggregateExec>() else {
            return Ok(None);
        };
        if *last.mode() != AggregateMode::FinalPartitioned
            || last.aggr_expr().is_empty()
            || last
                .aggr_expr()
                .iter()
                .any(|a| a.fun().name() != WINDOW_TOTALS)
        {
            return Ok(None);
        }
        let Some(shuffle) = last.input().downcast_ref::<RepartitionExec>() else {
            return Ok(None);
        };
        let Partitioning::Hash(_, n) = shuffle.partitioning() else {
            return Ok(None);
        };
        let Some(first) = shuffle.input().downcast_ref::<AggregateExec>() else {
            return Ok(None);
        };
        if *first.mode() != AggregateMode::Partial {
            return Ok(None);
        }
        let rows = Arc::new(RepartitionExec::try_new(
            Arc::clone(first.input()),
            Partitioning::Hash(first.group_expr().input_exprs(), *n),
        )?);
        let one = AggregateExec::try_new(
            AggregateMode::SinglePartitioned,
            first.group_expr().clone(),
            first.aggr_expr().to_vec(),
            first.filter_expr().to_vec(),
            rows,
            first.input_schema(),
        )?;
        if one.schema() != last.schema() {
            return Ok(None);
        }
        Ok(Some(Arc::new(one)))
    }
}

impl PhysicalOptimizerRule for OnePhaseTotals {
    fn optimize(
        &self,
        plan: Arc<dyn ExecutionPlan>,
        _config: &ConfigOptions,
    ) -> Result<Arc<dyn ExecutionPlan>> {
        plan.transform_up(|p| {
            Ok(match Self::rewrite(&p)? {
                Some(one) => Transformed::yes(one),
                None => Transformed::no(p),
            })
        })
        .data()
    }

    fn name(&self) -> &str {
        "daymark_one_phase_totals"
    }

    fn schema_check(&self) -> bool {
        true
    }
}

/// Registers [`WINDOW_TOTALS`] in `ctx`.
pub fn register(ctx: &SessionContext) {
    ctx.register_udaf(AggregateUDF::from(WindowTotalsAggregate::default()));
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::util::pretty::pretty_format_batches;
    use datafusion::execution::SessionStateBuilder;
    use datafusion::prelude::SessionConfig;

    /// A session of two partitions, with or without [`OnePhaseTotals`] (without it the
    /// grouping runs in two phases, through the state and `merge_batch`).
    fn context(batch_size: usize, one_phase: bool) -> SessionContext {
        let config = SessionConfig::new()
            .with_batch_size(batch_size)
            .with_target_partitions(2);
        let mut state = SessionStateBuilder::new()
            .with_config(config)
            .with_default_features();
        if one_phase {
            state = state.with_physical_optimizer_rule(Arc::new(OnePhaseTotals));
        }
        let ctx = SessionContext::new_with_state(state.build());
        register(&ctx);
        ctx
    }

    async fn text(ctx: &SessionContext, sql: &str) -> String {
        let b = ctx.sql(sql).await.unwrap().collect().await.unwrap();
        pretty_format_batches(&b).unwrap().to_string()
    }

    /// Columns `k, d, o0, o1...` of `WINDOW_TOTALS(tn, vn, s, e, outputs)` over `from`,
    /// one row per (key, snapshot day), ordered by day then key. (Not by key then day:
    /// DataFusion 55 keeps the grouping's "key determines every column" through the
    /// unnest and drops `d` from `ORDER BY k, d`. A backfill orders by day then key.)
    fn per_day(from: &str, outputs: &[&str]) -> String {
        let fields: Vec<String> = (0..outputs.len())
            .map(|m| format!("get_field(o, 'o{m}') AS o{m}"))
            .collect();
        format!(
            "SELECT k, get_field(o, 'dn') AS d, {} FROM (SELECT k, unnest({WINDOW_TOTALS}(tn, vn, s, e, {})) AS o FROM ({from}) GROUP BY k) ORDER BY d, k",
            fields.join(", "),
            outputs.join(", ")
        )
    }

    /// Taking the first groups (DataFusion's `EmitTo::First`, after a spilled grouping is
    /// read back in key order) hands over their rows by key in arrival order, and keeps
    /// the later groups' rows under group indices lowered by as many, with their values
    /// and layouts.
    #[test]
    fn taking_the_first_groups_keeps_the_rest_renumbered() {
        let mut rows = Arrived::default();
        let both = rows.layouts.id(vec![0, 1], 2);
        let second = rows.layouts.id(vec![1], 2);
        // (group, tn, x0, x1) in arrival order, the row of day 13 with slot 1 only;
        // spans for groups 1 and 2.
        for (g, t) in [(2, 10), (0, 11), (1, 12), (2, 13), (0, 14), (3, 15)] {
            let layout = if t == 13 { second } else { both };
            rows.push(g, t, t + 100, layout, |s| {
                if s == 0 {
                    t.into()
                } else {
                    -i128::from(t)
                }
            })
            .unwrap();
        }
        rows.span_group.extend([2, 1]);
        rows.spans.extend([(1, 3), (4, 4)]);
        let taken = rows.take(2, 2);
        assert_eq!(taken.len(), 2);
        let tn = |g: usize| -> Vec<i32> {
            taken
                .tiles(g)
                .iter()
                .map(|&r| taken.rows.tn[r as usize])
                .collect()
        };
        assert_eq!(tn(0), [11, 14]);
        assert_eq!(tn(1), [12]);
        let mut x = Vec::new();
        taken.x(taken.tiles(0)[1] as usize, &mut x);
        assert_eq!(x, [14, -14]);
        assert_eq!(taken.spans(1).collect::<Vec<_>>(), [(4, 4)]);
        assert_eq!(taken.days(0), Vec::<i64>::new());
        // Groups 2 and 3 are now 0 and 1, their rows still in arrival order; the row of
        // day 13 still has only slot 1.
        assert_eq!(rows.group, [0, 0, 1]);
        assert_eq!(rows.tn, [10, 13, 15]);
        assert_eq!(rows.vn, [110, 113, 115]);
        assert_eq!(rows.layout, [both, second, both]);
        assert_eq!(rows.at, [0, 2, 3]);
        assert_eq!(rows.x, [10, -10, -13, 15, -15]);
        assert_eq!(rows.span_group, [0]);
        assert_eq!(rows.spans, [(1, 3)]);
        let rest = rows.take(2, 2);
        assert_eq!(rest.days(0), [1, 2, 3]);
        let mut x = Vec::new();
        rest.x(rest.tiles(0)[1] as usize, &mut x);
        assert_eq!(x, [NULL_X, -13]);
        assert_eq!(rest.tiles(1).len(), 1);
        assert!(rows.group.is_empty() && rows.spans.is_empty());
    }

    /// Worked by hand. Key `a` has three tile rows (event day, first visible day, value):
    /// (1, 2, 5), (2, 5, 3) which arrived late, and (3, 4, -1); snapshot days 2-6 and 9.
    /// With a 3-day window a row is visible from its first visible day to its event day +
    /// 3: the first on days 2-4, the second on day 5 only, the third on days 4-6. Key `b`
    /// has only the snapshot day 4.
    #[tokio::test]
    async fn visible_rows_by_hand() {
        for one_phase in [true, false] {
            let ctx = context(2, one_phase);
            let rows = "SELECT * FROM (VALUES
                 ('a', 1, 2, NULL, NULL, 5), ('a', 2, 5, NULL, NULL, 3), ('a', 3, 4, NULL, NULL, -1),
                 ('a', NULL, NULL, 2, 6, NULL), ('a', NULL, NULL, 9, 9, NULL),
                 ('b', NULL, NULL, 4, 4, NULL)) AS t(k, tn, vn, s, e, x)";
            // Sum and active days in 3 days; with no bound: sum, first and last day.
            let outputs = [
                "0, 3, x",
                "1, 3, x",
                "0, CAST(NULL AS BIGINT), x",
                "2, CAST(NULL AS BIGINT), x",
                "3, CAST(NULL AS BIGINT), x",
            ];
            let got = text(&ctx, &per_day(rows, &outputs)).await;
            // The third row's -1 does not make its day active; unbounded, rows stay once
            // visible.
            let expected = "\
+---+---+----+----+----+----+----+
| k | d | o0 | o1 | o2 | o3 | o4 |
+---+---+----+----+----+----+----+
| a | 2 | 5  | 1  | 5  | 1  | 1  |
| a | 3 | 5  | 1  | 5  | 1  | 1  |
| a | 4 | 4  | 1  | 4  | 1  | 1  |
| b | 4 |    | 0  |    |    |    |
| a | 5 | 2  | 1  | 7  | 1  | 2  |
| a | 6 | -1 | 0  | 7  | 1  | 2  |
| a | 9 |    | 0  | 7  | 1  | 2  |
+---+---+----+----+----+----+----+";
            assert_eq!(got, expected, "one phase: {one_phase}");
            // Without GROUP BY (one key): the same list as key `a`'s.
            let one = text(
                &ctx,
                &format!(
                    "SELECT get_field(o, 'dn') AS d, get_field(o, 'o0') AS o0 FROM (SELECT unnest({WINDOW_TOTALS}(tn, vn, s, e, 0, 3, x)) AS o FROM ({rows}) WHERE k = 'a') ORDER BY d"
                ),
            )
            .await;
            let sums: Vec<&str> = one
                .lines()
                .skip(3)
                .filter_map(|l| l.split('|').nth(2))
                .map(str::trim)
                .collect();
            assert_eq!(sums, vec!["5", "5", "4", "2", "-1", ""], "{one}");
        }
    }

    /// On generated rows (many keys, late rows, repeated event days, several batches, one
    /// span per snapshot day) each output equals the same aggregate written with
    /// DataFusion's built-in functions as a join of every snapshot row to the tile rows
    /// visible on its day; in one phase and in two.
    #[tokio::test]
    async fn equal_to_a_join_with_builtin_aggregates() {
        for one_phase in [true, false] {
            let ctx = context(7, one_phase);
            // 40 keys, 30 tile rows each: event day 0-59, late by 0 to 9 days on one row in
            // four; snapshot days 1..80 of each key, some skipped.
            ctx.sql(
                "CREATE TABLE tiles AS SELECT 'k' || CAST(i % 40 AS VARCHAR) AS k,
                    CAST((i * 7919) % 60 AS BIGINT) AS tn,
                    CAST((i * 7919) % 60 + 1 + CASE WHEN i % 4 = 0 THEN (i * 31) % 10 ELSE 0 END AS BIGINT) AS vn,
                    CAST((i * 104729) % 21 - 6 AS BIGINT) AS x,
                    CAST((i * 104729) % 21 - 6 AS DECIMAL(38, 12)) / 7 AS y,
                    CAST((i * 104729) % 21 - 6 AS DOUBLE) / 7 AS f,
                    CASE WHEN i % 9 = 0 THEN NULL ELSE CAST((i * 13) % 5 AS BIGINT) END AS v
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
            let union = "SELECT k, tn, vn, CAST(NULL AS BIGINT) AS s, CAST(NULL AS BIGINT) AS e, x, y, f, v FROM tiles
                UNION ALL SELECT k, NULL, NULL, d AS s, d AS e, NULL, NULL, NULL, NULL FROM spine";
            let plan = text(&ctx, &format!("EXPLAIN {}", per_day(union, &["0, 7, x"]))).await;
            let mode = if one_phase {
                "mode=SinglePartitioned"
            } else {
                "mode=Partial"
            };
            assert!(plan.contains(mode), "{plan}");
            for w in ["1", "7", "28", "CAST(NULL AS BIGINT)"] {
                let bounded = !w.starts_with("CAST");
                let inside = if bounded {
                    format!("t.vn <= s.d AND s.d <= t.tn + {w}")
                } else {
                    "t.vn <= s.d".to_string()
                };
                let mut ours = vec![
                    format!("0, {w}, x"),
                    format!("0, {w}, y"),
                    format!("1, {w}, x"),
                ];
                let mut theirs = vec![
                    "SUM(t.x) AS o0".to_string(),
                    "SUM(t.y) AS o1".to_string(),
                    "COUNT(DISTINCT CASE WHEN t.x > 0 THEN t.tn END) AS o2".to_string(),
                ];
                // Least and greatest of integers, decimals and floats (negative ones
                // too); distinct values, some NULL.
                for (kind, func, col) in [
                    (4, "MIN", "x"),
                    (5, "MAX", "x"),
                    (5, "MAX", "y"),
                    (4, "MIN", "f"),
                    (5, "MAX", "f"),
                    (6, "COUNT(DISTINCT", "v"),
                ] {
                    ours.push(format!("{kind}, {w}, {col}"));
                    let close = if func.contains('(') { ")" } else { "" };
                    theirs.push(format!("{func}(t.{col}){close} AS o{}", theirs.len()));
                }
                if !bounded {
                    ours.push(format!("2, {w}, x"));
                    ours.push(format!("3, {w}, x"));
                    theirs.push(format!(
                        "MIN(CASE WHEN t.x > 0 THEN t.tn END) AS o{}",
                        theirs.len()
                    ));
                    theirs.push(format!(
                        "MAX(CASE WHEN t.x > 0 THEN t.tn END) AS o{}",
                        theirs.len()
                    ));
                }
                let outputs: Vec<&str> = ours.iter().map(String::as_str).collect();
                let mine = text(&ctx, &per_day(union, &outputs)).await;
                let reference = text(
                    &ctx,
                    &format!(
                        "SELECT s.k, s.d, {} FROM spine s LEFT JOIN tiles t ON t.k = s.k AND {inside} GROUP BY s.k, s.d ORDER BY s.d, s.k",
                        theirs.join(", ")
                    ),
                )
                .await;
                assert!(reference.lines().count() > 2_500, "{reference}");
                assert_eq!(mine, reference, "window {w}, one phase: {one_phase}");
            }
        }
    }

    /// Active days of a key whose event days span more than [`DENSE_DAYS`] (counted in a
    /// hash map instead of an array) are counted the same way. By hand: rows on days 0 and
    /// 1 (value 2 and 1) and on day 70,000; a 3-day window on day 2 sees days 0 and 1, on
    /// day 70,001 only day 70,000; with no bound, day 70,001 sees all three days.
    #[tokio::test]
    async fn active_days_over_a_wide_span_of_event_days() {
        let ctx = context(3, true);
        let rows = "SELECT * FROM (VALUES
             ('a', 0, 1, NULL, NULL, 2), ('a', 1, 2, NULL, NULL, 1), ('a', 70000, 70001, NULL, NULL, 1),
             ('a', NULL, NULL, 2, 2, NULL), ('a', NULL, NULL, 70001, 70001, NULL)) AS t(k, tn, vn, s, e, x)";
        let got = text(
            &ctx,
            &per_day(rows, &["1, 3, x", "1, CAST(NULL AS BIGINT), x"]),
        )
        .await;
        let expected = "\
+---+-------+----+----+
| k | d     | o0 | o1 |
+---+-------+----+----+
| a | 2     | 2  | 2  |
| a | 70001 | 1  | 3  |
+---+-------+----+----+";
        assert_eq!(got, expected);
    }

    /// A total that does not fit its type is an error, not a wrapped number; kinds and
    /// windows must be constants.
    #[tokio::test]
    async fn bad_totals_and_arguments_are_errors() {
        let ctx = context(8, true);
        let rows = "SELECT * FROM (VALUES
             ('a', 1, 2, NULL, NULL, 9223372036854775807), ('a', 1, 2, NULL, NULL, 1),
             ('a', NULL, NULL, 3, 3, NULL)) AS t(k, tn, vn, s, e, x)";
        let err = |sql: String| {
            let ctx = &ctx;
            async move {
                match ctx.sql(&sql).await {
                    Err(e) => e.to_string(),
                    Ok(df) => df.collect().await.unwrap_err().to_string(),
                }
            }
        };
        let e = err(per_day(rows, &["0, 5, x"])).await;
        assert!(e.contains("does not fit"), "{e}");
        let e = err(per_day(rows, &["tn, 5, x"])).await;
        assert!(e.contains("must be a constant"), "{e}");
        let e = err(per_day(rows, &["2, 5, x"])).await;
        assert!(e.contains("takes no window bound"), "{e}");
        // DOUBLEs only for least and greatest values (they are stored in their order).
        let e = err(per_day(rows, &["0, 5, CAST(x AS DOUBLE)"])).await;
        assert!(e.contains("does not take Float64 values"), "{e}");
    }
}
