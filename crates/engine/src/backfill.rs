//! Set-based backfill: every snapshot day of a range in one DataFusion query over tiles.
//!
//! Building a range one query per day costs a fixed overhead per day (planning, listing
//! and opening tile files) that dominates long backfills. Here each tile row is seen as
//! the interval of snapshot days on which it is visible: a row of event day `t` and
//! arrival day `a` is first visible on day `v = t + 1` (event-time) or `v = max(t, a) + 1`
//! (as-known), and stays inside a `W`-day window up to day `t + W`. Then:
//!
//! - additive aggregates (count, sum, mean, active days, distinct count) are running sums
//!   of +x at the first visible day and -x the day after the last ("difference arrays");
//!   floating sums are carried as `DECIMAL(38,12)` so that adding and removing a value
//!   leaves no rounding residue;
//! - aggregates without a bound (days since first/last event, first/last value over
//!   `all`, min/max over `all`, the population's current state) are running minima and
//!   maxima in order of first visibility; first/last values are ranks of the tile rows
//!   in the naive path's order, looked up afterwards;
//! - bounded min, max, first and last use a range frame of `W` days over rows that arrive
//!   on time (`v = t + 1`); the few late rows are expanded to the days they are visible.
//!
//! Active days and distinct counts first merge, per key and day or per key and value, the
//! visibility intervals of all rows (gaps and islands), so that each counts once.
//!
//! The population is computed the same way into spans of days per key, expanded with
//! `unnest(range(...))` into the spine of (key, day) rows.
//!
//! When every aggregate feature is a count, sum, mean, active days or days since the
//! first/last event ([`direct_features`]), the query skips the +/- rows and the spine: the
//! visible tile rows and the population's spans of days are grouped by key, and daymark's
//! windowed-total aggregate (`window_totals.rs`) returns, for each day of the key's spans,
//! the totals of the rows visible that day; the lists are unnested into snapshot rows.
//!
//! Everything is DataFusion SQL of built-in functions and daymark's registered functions
//! (`functions.rs`, `window_totals.rs`; a cluster's executors register them too). The naive per-day query
//! (`sql.rs`) stays the oracle: `tests/tiled_vs_naive.rs` compares every cell.

use crate::build::{snapshot_path, BuildError, DayReport, DayWriter, StagedCheck};
use crate::functions::{RUNNING_MAX, RUNNING_MIN, RUNNING_SUM};
use crate::sql::{feature_column, finish, ident, literal, KnowledgeOverride};
use crate::tiles::TileLayout;
use chrono::NaiveDate;
use datafusion::arrow::array::{AsArray, RecordBatch};
use datafusion::arrow::datatypes::{DataType, Date32Type};
use datafusion::prelude::SessionContext;
use daymark_spec::{Aggregation, FeatureDef, Knowledge, Pipeline, Population};
use daymark_store::Location;
use futures::StreamExt;
use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::time::Instant;

/// Days since 1970-01-01.
fn num(d: NaiveDate) -> i64 {
    (d - NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch")).num_days()
}

/// The first snapshot day (a day number) on which a tile row is visible: the day after its
/// event day, and in as-known mode also after its arrival day (NULL without an arrival).
pub(crate) fn first_visible_day_sql(knowledge: Knowledge) -> String {
    let tn = "CAST(__t AS BIGINT)";
    match knowledge {
        Knowledge::AsKnown => format!(
            "CASE WHEN __a IS NULL THEN NULL WHEN CAST(__a AS BIGINT) > {tn} THEN CAST(__a AS BIGINT) + 1 ELSE {tn} + 1 END"
        ),
        Knowledge::EventTime => format!("{tn} + 1"),
    }
}

/// `columns` of the rows of tile table `table` (partitions `first..=last`) visible by day
/// number `until`, with their event day `__tn` and first visible day `__vn`.
fn visible_tile_rows(
    table: &str,
    columns: &str,
    first: Option<NaiveDate>,
    last: NaiveDate,
    knowledge: Knowledge,
    until: i64,
    keys: &KeyRange,
) -> String {
    let mut conds = vec![
        "__key IS NOT NULL".to_string(),
        "__t IS NOT NULL".to_string(),
    ];
    conds.extend(crate::tiles::partitions_between(first, last));
    conds.extend(keys.conditions());
    format!(
        "SELECT * FROM (SELECT {columns}, CAST(__t AS BIGINT) AS __tn, {} AS __vn FROM {table} WHERE {}) WHERE __vn IS NOT NULL AND __vn <= {until}",
        first_visible_day_sql(knowledge),
        conds.join(" AND ")
    )
}

/// A range of keys `[from, to)`, the ends as SQL literals (`None`: open). A backfill whose
/// working set would not fit in memory runs one query per range: every aggregate and the
/// population are per key, so ranges of keys are independent.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct KeyRange {
    /// The smallest key of the range (inclusive).
    pub from: Option<String>,
    /// The key after the range (exclusive).
    pub to: Option<String>,
}

impl KeyRange {
    /// Every key.
    pub fn all() -> Self {
        Self::default()
    }

    /// SQL conditions on `__key` selecting the range.
    fn conditions(&self) -> Vec<String> {
        let mut c = Vec::new();
        if let Some(f) = &self.from {
            c.push(format!("__key >= {f}"));
        }
        if let Some(t) = &self.to {
            c.push(format!("__key < {t}"));
        }
        c
    }
}

/// A key as an SQL literal, for the key types a range can be cut on (integers, text).
fn key_literal(keys: &dyn datafusion::arrow::array::Array, i: usize) -> Option<String> {
    use datafusion::scalar::ScalarValue as S;
    match S::try_from_array(keys, i).ok()? {
        S::Utf8(Some(s)) | S::LargeUtf8(Some(s)) | S::Utf8View(Some(s)) => Some(literal(&s)),
        v @ (S::Int8(Some(_))
        | S::Int16(Some(_))
        | S::Int32(Some(_))
        | S::Int64(Some(_))
        | S::UInt8(Some(_))
        | S::UInt16(Some(_))
        | S::UInt32(Some(_))
        | S::UInt64(Some(_))) => Some(v.to_string()),
        _ => None,
    }
}

/// Rows of working set (tile rows plus key-days of the spine) one backfill query holds
/// when no memory limit is set. Measured on the benchmark world (docs/benchmarks.md).
const WORK_ROWS_PER_QUERY: u64 = 16_000_000;
/// Bytes of memory per working-set row of the backfill query (its union rows, the hash
/// aggregation, the window sort and the final sort), measured as peak resident memory
/// over working-set rows on the benchmark world (docs/benchmarks.md).
const BYTES_PER_WORK_ROW: u64 = 280;
/// The same for the windowed-total query ([`direct_features`]), measured when it ran
/// DataFusion's non-streaming window operator, which held its whole input, a copy of it
/// and the results outside the memory pool (peak 13.4 GB over 16M-row queries on the 100M
/// world, docs/benchmarks.md seventh measurement). The grouping that replaced it holds far
/// less (twenty-first measurement: about 64 bytes a row between one and two queries over
/// the same 20M rows); the memory-limit target was verified with this figure, so ranges
/// under a limit are still sized with it.
const DIRECT_BYTES_PER_WORK_ROW: u64 = 840;
/// Working-set rows per windowed-total query without a memory limit. On the benchmark
/// world one query over its 20M rows peaked at 1.55 GB resident, the whole process
/// included, and took 7.9-8.2 s against 9.6-9.9 s for four queries of 5.3M rows
/// (docs/benchmarks.md, twenty-first measurement): so about 1.9 GB.
const DIRECT_WORK_ROWS_PER_QUERY: u64 = 24_000_000;

/// Outputs of the windowed totals per unit of [`direct_width`]: twice the benchmark
/// pipeline's 12 (counts, sums with their row counts and active days, each in three
/// windows), over which [`DIRECT_BYTES_PER_WORK_ROW`] and [`DIRECT_WORK_ROWS_PER_QUERY`]
/// were measured.
const MEASURED_DIRECT_OUTPUTS: u64 = 24;

/// How many times the benchmark's a windowed-total query's working-set row weighs for
/// `pipeline`: a tile row keeps a value per column its features read, and a snapshot row
/// a total per output, so a row's memory grows with the outputs. Measured on the demo
/// pipeline (47 outputs) at 35,000 keys, 91 days under `--memory-limit 1GiB`: at the
/// benchmark's sizing a grouping failed to get 434 MB; a width of 2 peaked at 1,133 MiB
/// (the range query 212 s), of 4 at 621 MiB (385 s: every range of keys reads every tile
/// file again). Without a limit the demo pipeline's 91 days peaked at 3.0 GB either way
/// (docs/benchmarks.md, twenty-sixth measurement).
fn direct_width(pipeline: &Pipeline) -> u64 {
    let outputs: u64 = pipeline
        .features
        .iter()
        .map(|f| match &f.def {
            FeatureDef::Aggregate {
                agg: Aggregation::Sum | Aggregation::Mean,
                ..
            } => 2,
            FeatureDef::Aggregate { .. } => 1,
            FeatureDef::Derived { .. } => 0,
        })
        .sum();
    outputs.div_ceil(MEASURED_DIRECT_OUTPUTS).max(1)
}

/// Working-set rows per backfill query: as the session was told, else what its memory
/// limit holds, at most [`WORK_ROWS_PER_QUERY`] ([`DIRECT_WORK_ROWS_PER_QUERY`] for the
/// windowed-total query, when `direct` gives its [`direct_width`], which divides both).
fn work_rows_per_query(ctx: &SessionContext, direct: Option<u64>) -> u64 {
    use datafusion::execution::memory_pool::MemoryLimit;
    let config = ctx.state().config().clone();
    if let Some(n) = config.get_extension::<crate::session::BackfillRowsPerQuery>() {
        return n.0;
    }
    let (per_row, most) = match direct {
        Some(width) => (
            DIRECT_BYTES_PER_WORK_ROW * width,
            DIRECT_WORK_ROWS_PER_QUERY / width,
        ),
        None => (BYTES_PER_WORK_ROW, WORK_ROWS_PER_QUERY),
    };
    match ctx.runtime_env().memory_pool.memory_limit() {
        MemoryLimit::Finite(limit) => (limit as u64 / per_row).clamp(1, most),
        _ => most,
    }
}

/// The tile tables (main and distinct-value, of every source) that the set-based query of
/// `first..=last` reads, each with the SQL conditions on `dt` selecting its partitions.
fn tile_tables_read(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    first: NaiveDate,
    last: NaiveDate,
    mode: KnowledgeOverride,
) -> datafusion::error::Result<Vec<(String, Vec<String>)>> {
    let reads_first = crate::sql::snapshot_query(pipeline, first, mode).reads;
    let reads_last = crate::sql::snapshot_query(pipeline, last, mode).reads;
    let mut out = Vec::new();
    for (name, l) in layouts {
        let Some(read) = reads_last.get(name) else {
            continue;
        };
        let first_day = reads_first.get(name).and_then(|r| r.first_day);
        let conds = crate::tiles::partitions_between(first_day, read.last_day);
        let tables = std::iter::once(l.table())
            .chain(l.distinct.iter().map(|(i, _, _)| l.distinct_table(*i)));
        for t in tables {
            if ctx.table_exist(t.as_str())? {
                out.push((t, conds.clone()));
            }
        }
    }
    Ok(out)
}

/// Cuts the keys of the backfill `first..=last` into ranges of about `rows` working-set
/// rows each: per key, its tile rows in the partitions the range reads plus one row per
/// snapshot day (the most its spine can have). One range when all fits, or when keys are
/// of a type a range cannot be cut on.
pub async fn key_ranges(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    first: NaiveDate,
    last: NaiveDate,
    mode: KnowledgeOverride,
    rows: u64,
) -> datafusion::error::Result<Vec<KeyRange>> {
    let counts: Vec<String> = tile_tables_read(ctx, pipeline, layouts, first, last, mode)?
        .into_iter()
        .map(|(t, conds)| {
            format!(
                "SELECT __key, COUNT(*) AS __n FROM {} WHERE __key IS NOT NULL AND {} GROUP BY __key",
                ident(&t),
                conds.join(" AND ")
            )
        })
        .collect();
    if counts.is_empty() {
        return Ok(vec![KeyRange::all()]);
    }
    let days = num(last) - num(first) + 1;
    let sql = format!(
        "SELECT __key, CAST(SUM(__n) AS BIGINT) + {days} AS __n FROM ({}) GROUP BY __key ORDER BY __key",
        counts.join(" UNION ALL ")
    );
    let batches = ctx.sql(&sql).await?.collect().await?;
    let weight = |b: &RecordBatch| {
        b.column(1)
            .as_primitive::<datafusion::arrow::datatypes::Int64Type>()
            .clone()
    };
    let total: u64 = batches
        .iter()
        .map(|b| weight(b).iter().flatten().sum::<i64>() as u64)
        .sum();
    let k = total.div_ceil(rows.max(1));
    if k <= 1 {
        return Ok(vec![KeyRange::all()]);
    }
    let (mut ranges, mut from, mut acc, mut cut) = (Vec::new(), None, 0u64, 1u64);
    for b in &batches {
        let n = weight(b);
        for i in 0..b.num_rows() {
            // A new range starts at the first key past the next k-th of the total.
            if acc >= total * cut / k {
                let Some(key) = key_literal(b.column(0).as_ref(), i) else {
                    return Ok(vec![KeyRange::all()]);
                };
                ranges.push(KeyRange {
                    from: from.replace(key.clone()),
                    to: Some(key),
                });
                while acc >= total * cut / k {
                    cut += 1;
                }
            }
            acc += n.value(i) as u64;
        }
    }
    ranges.push(KeyRange { from, to: None });
    Ok(ranges)
}

/// Column types of the registered tile tables, by (source, column).
pub type TileTypes = HashMap<(String, String), DataType>;

/// Reads the column types of every registered tile table (after
/// [`crate::tiles::prepare`]).
pub async fn tile_types(ctx: &SessionContext, layouts: &BTreeMap<String, TileLayout>) -> TileTypes {
    let mut out = HashMap::new();
    for (name, l) in layouts {
        if let Ok(t) = ctx.table(l.table()).await {
            for f in t.schema().fields() {
                out.insert((name.clone(), f.name().clone()), f.data_type().clone());
            }
        }
        for (i, _, _) in &l.distinct {
            if let Ok(t) = ctx.table(l.distinct_table(*i)).await {
                if let Ok(f) = t.schema().field_with_unqualified_name("__v") {
                    out.insert((name.clone(), distinct_value(*i)), f.data_type().clone());
                }
            }
        }
    }
    out
}

/// The [`TileTypes`] name of the value column of feature `i`'s distinct-value tiles.
fn distinct_value(i: usize) -> String {
    format!("__d{i}.__v")
}

/// Whether values of type `t` are read by the windowed totals as they are or cast to
/// BIGINT or DOUBLE ([`direct_value`]): integers, floats and decimals.
fn direct_numeric(t: Option<&DataType>) -> bool {
    matches!(
        t,
        Some(
            DataType::Int8
                | DataType::Int16
                | DataType::Int32
                | DataType::Int64
                | DataType::UInt8
                | DataType::UInt16
                | DataType::UInt32
                | DataType::UInt64
                | DataType::Float32
                | DataType::Float64
                | DataType::Decimal128(_, _)
        )
    )
}

/// `x` (of type `t`, [`direct_numeric`]) as the windowed totals read it (smaller
/// integers as BIGINT, REAL as DOUBLE) with the type it is read as, and the type to cast
/// an output back to, if the output's differs (a total of DECIMAL(p, s) comes as
/// DECIMAL(38, s)).
fn direct_value(x: &str, t: &DataType) -> (String, DataType, Option<DataType>) {
    match t {
        DataType::Int8
        | DataType::Int16
        | DataType::Int32
        | DataType::UInt8
        | DataType::UInt16
        | DataType::UInt32 => (
            format!("CAST({x} AS BIGINT)"),
            DataType::Int64,
            Some(t.clone()),
        ),
        DataType::Float32 => (
            format!("CAST({x} AS DOUBLE)"),
            DataType::Float64,
            Some(t.clone()),
        ),
        DataType::Decimal128(_, _) => (x.to_string(), t.clone(), Some(t.clone())),
        _ => (x.to_string(), t.clone(), None),
    }
}

/// A typed SQL NULL (UNION branches need one type per column).
fn typed_null(t: &DataType) -> String {
    let sql = match t {
        DataType::Boolean => "BOOLEAN".to_string(),
        DataType::Int8 => "TINYINT".to_string(),
        DataType::Int16 => "SMALLINT".to_string(),
        DataType::Int32 => "INT".to_string(),
        DataType::Int64 => "BIGINT".to_string(),
        DataType::UInt8 => "TINYINT UNSIGNED".to_string(),
        DataType::UInt16 => "SMALLINT UNSIGNED".to_string(),
        DataType::UInt32 => "INT UNSIGNED".to_string(),
        DataType::UInt64 => "BIGINT UNSIGNED".to_string(),
        DataType::Float32 => "REAL".to_string(),
        DataType::Float64 => "DOUBLE".to_string(),
        DataType::Utf8 => "VARCHAR".to_string(),
        DataType::Date32 => "DATE".to_string(),
        DataType::Decimal128(p, s) => format!("DECIMAL({p}, {s})"),
        other => return format!("arrow_cast(NULL, {})", literal(&other.to_string())),
    };
    format!("CAST(NULL AS {sql})")
}

fn is_float(t: Option<&DataType>) -> bool {
    matches!(
        t,
        Some(DataType::Float16 | DataType::Float32 | DataType::Float64)
    )
}

/// Sum or mean feature `i` of a population row `p` from its window's sum `__s{i}` (kept as
/// DECIMAL when the values are floats) and count of non-null values `__n{i}`: NULL when
/// the window holds no value.
fn sum_or_mean(agg: Aggregation, i: usize, float: bool) -> String {
    let sum = if float {
        format!("CAST(p.__s{i} AS DOUBLE)")
    } else {
        format!("p.__s{i}")
    };
    if agg == Aggregation::Sum {
        format!("CASE WHEN p.__n{i} > 0 THEN {sum} END")
    } else {
        format!("CASE WHEN p.__n{i} > 0 THEN {sum} / CAST(p.__n{i} AS DOUBLE) END")
    }
}

/// Whether every aggregate feature of `pipeline` is one that the windowed totals
/// ([`crate::window_totals`]) compute straight from tile rows: counts, sums and means of
/// integers, decimals or floats, active days, days since the first or last event, least
/// and greatest numbers, first and last values, distinct counts. Others (least and
/// greatest text, dates or times) take the general query.
pub fn direct_features(pipeline: &Pipeline, types: &TileTypes) -> bool {
    pipeline.features.iter().enumerate().all(|(i, f)| {
        let FeatureDef::Aggregate { source, agg, .. } = &f.def else {
            return true;
        };
        match agg {
            Aggregation::Count
            | Aggregation::ActiveDays
            | Aggregation::DaysSinceFirst
            | Aggregation::DaysSinceLast => true,
            Aggregation::Sum | Aggregation::Mean => matches!(
                types.get(&(source.clone(), format!("__s{i}"))),
                Some(
                    DataType::Int64
                        | DataType::UInt64
                        | DataType::Float16
                        | DataType::Float32
                        | DataType::Float64
                        | DataType::Decimal128(_, _)
                )
            ),
            // Least and greatest numbers; first and last values by their rank, joined
            // back; distinct values by their number in a dictionary.
            Aggregation::Min | Aggregation::Max => {
                direct_numeric(types.get(&(source.clone(), format!("__m{i}"))))
            }
            Aggregation::First | Aggregation::Last | Aggregation::CountDistinct => true,
        }
    })
}

/// The rest of [`range_query`] after the population's spans when [`direct_features`]
/// holds: one UNION of the visible tile rows (and distinct-value tile rows) and the spans,
/// grouped by key into one call of the windowed-total aggregate with an output per feature
/// column, unnested into one row per (key, snapshot day); first and last values are
/// joined back by their rank. The rows must be ordered by day first: DataFusion 55 keeps
/// the grouping's "the key determines every column" through the unnest and would drop any
/// sort column after the key.
fn direct_tail(
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    read: &RangeRead,
    types: &TileTypes,
    mut ctes: Vec<String>,
    ordered: bool,
) -> String {
    use crate::window_totals::WindowKind;
    let reads_last = &read.last;
    // Value columns of the union: (name, type, branch table, expression over its rows).
    let mut columns: Vec<(String, DataType, String, String)> = Vec::new();
    // (source, tile column alias) -> the stored column defined the same way.
    let mut same_columns: HashMap<(String, String), String> = HashMap::new();
    for (name, l) in layouts {
        for (alias, stored) in &l.aliases {
            same_columns.insert((name.clone(), alias.clone()), stored.clone());
        }
    }
    // Per output: (kind, window, union column) arguments, the output's name, and the type
    // to cast it back to.
    let mut outputs: Vec<(String, String, Option<DataType>)> = Vec::new();
    let mut layer0 = vec![
        format!("p.__key AS {}", ident(&pipeline.file.key)),
        "arrow_cast(CAST(p.__dn AS INT), 'Date32') AS snapshot_date".to_string(),
    ];
    let mut joins = Vec::new();
    for (i, f) in pipeline.features.iter().enumerate() {
        let FeatureDef::Aggregate {
            source,
            agg,
            window,
            ..
        } = &f.def
        else {
            continue;
        };
        if !layouts.contains_key(source) || !reads_last.contains_key(source) {
            continue;
        }
        let w = if agg.is_unbounded() {
            None
        } else {
            window.days()
        };
        let bound = w
            .map(|w| w.to_string())
            .unwrap_or_else(|| "CAST(NULL AS BIGINT)".to_string());
        let rows = ident(&format!("{source}__v"));
        let mut call = |kind: WindowKind,
                        branch: &str,
                        col: String,
                        ty: DataType,
                        expr: String,
                        out: String,
                        back: Option<DataType>| {
            // Features over the same tile column (a count in three windows, the count
            // that active days also reads) share one union column.
            let expr = same_columns
                .get(&(source.clone(), expr.clone()))
                .cloned()
                .unwrap_or(expr);
            let col = match columns.iter().find(|c| c.2 == branch && c.3 == expr) {
                Some(c) => c.0.clone(),
                None => {
                    columns.push((col.clone(), ty, branch.to_string(), expr));
                    col
                }
            };
            outputs.push((format!("{}, {bound}, {col}", kind.code()), out, back));
        };
        let v = match agg {
            Aggregation::Count => {
                call(
                    WindowKind::Sum,
                    &rows,
                    format!("__xc{i}"),
                    DataType::Int64,
                    format!("__c{i}"),
                    format!("__c{i}"),
                    None,
                );
                format!("p.__c{i}")
            }
            Aggregation::Sum | Aggregation::Mean => {
                let t = types
                    .get(&(source.clone(), format!("__s{i}")))
                    .cloned()
                    .unwrap_or(DataType::Int64);
                let float = is_float(Some(&t));
                let s_col = same_columns
                    .get(&(source.clone(), format!("__s{i}")))
                    .cloned()
                    .unwrap_or_else(|| format!("__s{i}"));
                let (t, x) = if float {
                    (
                        DataType::Decimal128(38, 12),
                        format!("CAST({s_col} AS DECIMAL(38, 12))"),
                    )
                } else {
                    (t, s_col)
                };
                call(
                    WindowKind::Sum,
                    &rows,
                    format!("__xs{i}"),
                    t,
                    x,
                    format!("__s{i}"),
                    None,
                );
                if *agg == Aggregation::Sum {
                    // The windowed sum is NULL exactly when no visible tile row has a value
                    // (a tile row's sum is NULL exactly when its count is 0), so a sum needs
                    // no count of its own: a quarter of the benchmark's outputs
                    // (docs/benchmarks.md, twenty-seventh measurement).
                    if float {
                        format!("CAST(p.__s{i} AS DOUBLE)")
                    } else {
                        format!("p.__s{i}")
                    }
                } else {
                    call(
                        WindowKind::Sum,
                        &rows,
                        format!("__xn{i}"),
                        DataType::Int64,
                        format!("__n{i}"),
                        format!("__n{i}"),
                        None,
                    );
                    sum_or_mean(*agg, i, float)
                }
            }
            Aggregation::ActiveDays => {
                call(
                    WindowKind::Days,
                    &rows,
                    format!("__xc{i}"),
                    DataType::Int64,
                    format!("__c{i}"),
                    format!("__d{i}"),
                    None,
                );
                format!("p.__d{i}")
            }
            Aggregation::DaysSinceFirst | Aggregation::DaysSinceLast => {
                let kind = if *agg == Aggregation::DaysSinceFirst {
                    WindowKind::FirstDay
                } else {
                    WindowKind::LastDay
                };
                call(
                    kind,
                    &rows,
                    format!("__xc{i}"),
                    DataType::Int64,
                    format!("__c{i}"),
                    format!("__t{i}"),
                    None,
                );
                format!("p.__dn - p.__t{i}")
            }
            Aggregation::Min | Aggregation::Max => {
                let kind = if *agg == Aggregation::Min {
                    WindowKind::Min
                } else {
                    WindowKind::Max
                };
                let t = types
                    .get(&(source.clone(), format!("__m{i}")))
                    .cloned()
                    .unwrap_or(DataType::Int64);
                let stored = same_columns
                    .get(&(source.clone(), format!("__m{i}")))
                    .cloned()
                    .unwrap_or_else(|| format!("__m{i}"));
                let (x, ty, back) = direct_value(&stored, &t);
                call(
                    kind,
                    &rows,
                    format!("__xm{i}"),
                    ty,
                    x,
                    format!("__m{i}"),
                    back,
                );
                format!("p.__m{i}")
            }
            Aggregation::First | Aggregation::Last => {
                // The greatest (least) rank among the visible rows, in the naive path's
                // order (`range_sql`'s `__rk`), then the value of that rank.
                let kind = if *agg == Aggregation::First {
                    WindowKind::Min
                } else {
                    WindowKind::Max
                };
                call(
                    kind,
                    &rows,
                    format!("__xr{i}"),
                    DataType::UInt64,
                    format!("__rk{i}"),
                    format!("__r{i}"),
                    None,
                );
                let vals = ident(&format!("{source}__vals{i}"));
                ctes.push(format!(
                    "{vals} AS (SELECT __key, __rk{i} AS __rk, __v{i} AS __v FROM {rows} WHERE __c{i} > 0)"
                ));
                let q = format!("__q{i}");
                joins.push(format!(
                    "LEFT JOIN {vals} {q} ON {q}.__key = p.__key AND {q}.__rk = p.__r{i}"
                ));
                format!("{q}.__v")
            }
            Aggregation::CountDistinct => {
                // The visible distinct-value tile rows, each value as a BIGINT: integers
                // as they are, others by their number in a dictionary of the values read.
                let source_read = &reads_last[source];
                let visible = ident(&format!("{source}__dr{i}"));
                ctes.push(format!(
                    "{visible} AS ({})",
                    visible_tile_rows(
                        &ident(&layouts[source].distinct_table(i)),
                        "__key, __v",
                        read.first.get(source).and_then(|r| r.first_day),
                        source_read.last_day,
                        source_read.knowledge,
                        read.until,
                        read.keys,
                    )
                ));
                let integer = matches!(
                    types.get(&(source.clone(), distinct_value(i))),
                    Some(
                        DataType::Int8
                            | DataType::Int16
                            | DataType::Int32
                            | DataType::Int64
                            | DataType::UInt8
                            | DataType::UInt16
                            | DataType::UInt32
                    )
                );
                let (branch, x) = if integer {
                    (visible, "CAST(__v AS BIGINT)".to_string())
                } else {
                    let dict = ident(&format!("{source}__dd{i}"));
                    let numbered = ident(&format!("{source}__dx{i}"));
                    ctes.push(format!(
                        "{dict} AS (SELECT __v, CAST(row_number() OVER (ORDER BY __v) AS BIGINT) AS __id FROM (SELECT DISTINCT __v FROM {visible} WHERE __v IS NOT NULL))"
                    ));
                    ctes.push(format!(
                        "{numbered} AS (SELECT r.__key, r.__tn, r.__vn, d.__id FROM {visible} r JOIN {dict} d ON r.__v = d.__v)"
                    ));
                    (numbered, "__id".to_string())
                };
                call(
                    WindowKind::Distinct,
                    &branch,
                    format!("__xd{i}"),
                    DataType::Int64,
                    x,
                    format!("__d{i}"),
                    None,
                );
                format!("p.__d{i}")
            }
        };
        layer0.push(feature_column(f, *agg, &v));
    }
    // One branch per table with features, then the population's spans of days; each
    // names every column.
    let mut tables: Vec<&str> = Vec::new();
    for (_, _, table, _) in &columns {
        if !tables.contains(&table.as_str()) {
            tables.push(table);
        }
    }
    let mut branches = Vec::new();
    for from in tables.iter().map(Some).chain([None]) {
        let none = "CAST(NULL AS BIGINT)";
        let mut cols = match from {
            Some(_) => vec![
                "__key".to_string(),
                "__tn".to_string(),
                "__vn".to_string(),
                format!("{none} AS __s"),
                format!("{none} AS __e"),
            ],
            None => vec![
                "__key".to_string(),
                format!("{none} AS __tn"),
                format!("{none} AS __vn"),
                "__s".to_string(),
                "__e".to_string(),
            ],
        };
        for (name, ty, table, expr) in &columns {
            let v = if from == Some(&table.as_str()) {
                expr.clone()
            } else {
                typed_null(ty)
            };
            cols.push(format!("{v} AS {name}"));
        }
        let table = match from {
            Some(t) => t.to_string(),
            None => "__pop_spans WHERE __s <= __e".to_string(),
        };
        branches.push(format!("SELECT {} FROM {table}", cols.join(", ")));
    }
    ctes.push(format!("__u AS ({})", branches.join("\nUNION ALL\n")));
    // One list of snapshot days per key (see `window_totals.rs`), then a row per day.
    let args: Vec<&str> = outputs.iter().map(|o| o.0.as_str()).collect();
    ctes.push(format!(
        "__g AS (SELECT __key, {}(__tn, __vn, __s, __e, {}) AS __r FROM __u GROUP BY __key)",
        crate::window_totals::WINDOW_TOTALS,
        args.join(", ")
    ));
    let mut p_cols = vec![
        "__key".to_string(),
        "get_field(__o, 'dn') AS __dn".to_string(),
    ];
    for (m, (_, out, back)) in outputs.iter().enumerate() {
        let v = format!("get_field(__o, 'o{m}')");
        let v = match back {
            Some(t) => format!("arrow_cast({v}, {})", literal(&t.to_string())),
            None => v,
        };
        p_cols.push(format!("{v} AS {out}"));
    }
    ctes.push(format!(
        "__population AS (SELECT {} FROM (SELECT __key, unnest(__r) AS __o FROM __g))",
        p_cols.join(", ")
    ));
    finish(
        pipeline,
        &ctes,
        &layer0,
        &joins,
        ordered.then_some("snapshot_date, "),
    )
}

/// What a range query reads: the sources' reads for its first and last days, the last
/// snapshot day's number and the range of keys.
struct RangeRead<'a> {
    first: BTreeMap<String, crate::sql::SourceRead>,
    last: BTreeMap<String, crate::sql::SourceRead>,
    until: i64,
    keys: &'a KeyRange,
}

/// One branch of the big UNION: named columns (the rest are NULL).
struct Branch {
    from: String,
    day: String,
    cols: BTreeMap<String, String>,
}

/// The SQL of all snapshots `first..=last` over tile tables registered by
/// [`crate::tiles::prepare`], ordered by snapshot date then key, for the population keys
/// in `keys`. `types` comes from [`tile_types`].
pub fn range_query(
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    first: NaiveDate,
    last: NaiveDate,
    mode: KnowledgeOverride,
    types: &TileTypes,
    keys: &KeyRange,
) -> String {
    range_sql(pipeline, layouts, first, last, mode, types, keys, true)
}

/// [`range_query`]; `ordered: false` leaves out the final sort of windowed-totals queries
/// ([`direct_features`]), whose rows come as runs of one key ([`crate::by_day`]).
#[allow(clippy::too_many_arguments)]
fn range_sql(
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    first: NaiveDate,
    last: NaiveDate,
    mode: KnowledgeOverride,
    types: &TileTypes,
    keys: &KeyRange,
    ordered: bool,
) -> String {
    let ty = |source: &str, col: String| types.get(&(source.to_string(), col));
    // The type of every union column, for typed NULLs.
    let mut col_types: BTreeMap<String, DataType> = BTreeMap::new();
    let (n1, nn) = (num(first), num(last));
    let reads_first = crate::sql::snapshot_query(pipeline, first, mode).reads;
    let reads_last = crate::sql::snapshot_query(pipeline, last, mode).reads;
    let mut ctes: Vec<String> = Vec::new();

    // Visible tile rows of each source, with day numbers `__tn` and first visible day `__vn`.
    let rows_of = |source: &str| ident(&format!("{source}__v"));
    for (name, l) in layouts {
        let Some(read) = reads_last.get(name) else {
            continue;
        };
        let first_day = reads_first.get(name).and_then(|r| r.first_day);
        ctes.push(format!(
            "{} AS ({})",
            ident(&format!("{name}__r")),
            visible_tile_rows(
                &ident(&l.table()),
                "*",
                first_day,
                read.last_day,
                read.knowledge,
                nn,
                keys,
            )
        ));
        // Ranks for first/last values, in the naive path's order.
        let has_arrival = pipeline.sources[name].spec.arrival_time.is_some();
        let mut ranks = Vec::new();
        for (i, f) in pipeline.features.iter().enumerate() {
            if let FeatureDef::Aggregate { source, agg, .. } = &f.def {
                if source == name && matches!(agg, Aggregation::First | Aggregation::Last) {
                    let order = if has_arrival {
                        format!("__vt{i}, __va{i}, __v{i}")
                    } else {
                        format!("__vt{i}, __v{i}")
                    };
                    ranks.push(format!(
                        "CASE WHEN __c{i} > 0 THEN row_number() OVER (PARTITION BY __key ORDER BY {order}) END AS __rk{i}"
                    ));
                }
            }
        }
        let extra = if ranks.is_empty() {
            String::new()
        } else {
            format!(", {}", ranks.join(", "))
        };
        ctes.push(format!(
            "{} AS (SELECT *{extra} FROM {})",
            rows_of(name),
            ident(&format!("{name}__r"))
        ));
    }

    // The population as spans of days per key, then one row per (key, day).
    let span = |from: &str, next: &str| {
        format!("GREATEST({from}, {n1}) AS __s, LEAST(COALESCE({next} - 1, {nn}), {nn}) AS __e")
    };
    match &pipeline.population {
        Population::State(s) => {
            let order = if pipeline.sources[&s.source].spec.arrival_time.is_some() {
                "__pt, __pa, __ps"
            } else {
                "__pt, __ps"
            };
            let values: Vec<String> = s.values.iter().map(|v| literal(v)).collect();
            // Each change gets its rank in the change log's order, doubled, plus 1 when
            // it enters the population: the greatest of these among the changes visible
            // on a day is the latest change, and its last bit says whether the key is in
            // the population (one read of the source's rows, no join back to them).
            ctes.push(format!(
                "__pop_rows AS (SELECT __key, __vn, row_number() OVER (PARTITION BY __key ORDER BY {order}) * 2 + CASE WHEN __ps IN ({}) THEN 1 ELSE 0 END AS __prk FROM {})",
                values.join(", "),
                rows_of(&s.source)
            ));
            ctes.push(format!(
                "__pop_runs AS (SELECT __key, __vn AS __from, lead(__vn) OVER (PARTITION BY __key ORDER BY __vn) AS __next, {RUNNING_MAX}(__prk) OVER (PARTITION BY __key ORDER BY __vn) AS __prk FROM (SELECT __key, __vn, MAX(__prk) AS __prk FROM __pop_rows GROUP BY __key, __vn))"
            ));
            ctes.push(format!(
                "__pop_spans AS (SELECT __key, {} FROM __pop_runs WHERE __prk % 2 = 1)",
                span("__from", "__next")
            ));
        }
        Population::RecentActivity(a) => {
            let rows = rows_of(&a.source);
            let delta = match a.within.days() {
                Some(w) => format!(
                    "SELECT __key, __vn AS __dn, __pc AS __x FROM {rows} WHERE __pc > 0 AND __vn <= __tn + {w} UNION ALL SELECT __key, __tn + {w} + 1 AS __dn, -__pc AS __x FROM {rows} WHERE __pc > 0 AND __vn <= __tn + {w}"
                ),
                None => format!("SELECT __key, __vn AS __dn, __pc AS __x FROM {rows} WHERE __pc > 0"),
            };
            ctes.push(format!(
                "__pop_runs AS (SELECT __key, __dn AS __from, lead(__dn) OVER (PARTITION BY __key ORDER BY __dn) AS __next, {RUNNING_SUM}(__x) OVER (PARTITION BY __key ORDER BY __dn) AS __n FROM (SELECT __key, __dn, SUM(__x) AS __x FROM ({delta}) GROUP BY __key, __dn))"
            ));
            ctes.push(format!(
                "__pop_spans AS (SELECT __key, {} FROM __pop_runs WHERE __n > 0)",
                span("__from", "__next")
            ));
        }
    }
    if direct_features(pipeline, types) {
        let read = RangeRead {
            first: reads_first,
            last: reads_last,
            until: nn,
            keys,
        };
        return direct_tail(pipeline, layouts, &read, types, ctes, ordered);
    }
    ctes.push(
        "__spine AS (SELECT __key, unnest(range(__s, __e + 1)) AS __dn FROM __pop_spans WHERE __s <= __e)"
            .to_string(),
    );

    // The UNION of contributions: +/- rows, expanded late rows, and the spine (kind 1).
    let mut branches: Vec<Branch> = Vec::new();
    let mut windows: Vec<String> = Vec::new();
    let mut after: Vec<String> = Vec::new(); // columns computed from window results
    let mut layer0 = vec![
        format!("p.__key AS {}", ident(&pipeline.file.key)),
        "arrow_cast(CAST(p.__dn AS INT), 'Date32') AS snapshot_date".to_string(),
    ];
    let mut joins = Vec::new();
    // Running values per key in day order (see `functions.rs`); after the GROUP BY below
    // there is one row per (key, day), so the order has no ties.
    let cum = "OVER (PARTITION BY __key ORDER BY __dn)";
    let run = |f: &str| match f {
        "SUM" => RUNNING_SUM,
        "MIN" => RUNNING_MIN,
        _ => RUNNING_MAX,
    };
    let frame = |w: u32| {
        format!(
            "OVER (PARTITION BY __key ORDER BY __dn RANGE BETWEEN {} PRECEDING AND CURRENT ROW)",
            w - 1
        )
    };
    // How rows of one (key, day) combine, per union column.
    let mut combine: BTreeMap<String, String> = BTreeMap::new();

    for name in layouts.keys() {
        if !reads_last.contains_key(name) {
            continue;
        }
        let rows = rows_of(name);
        let mut plus = Branch {
            from: rows.clone(),
            day: "__vn".into(),
            cols: BTreeMap::new(),
        };
        // Minus rows per window length of additive features; late rows per window length
        // of bounded min/max/first/last.
        let mut minus: BTreeMap<u32, BTreeMap<String, String>> = BTreeMap::new();
        let mut late: BTreeMap<u32, BTreeMap<String, String>> = BTreeMap::new();
        for (i, f) in pipeline.features.iter().enumerate() {
            let FeatureDef::Aggregate {
                source,
                agg,
                window,
                ..
            } = &f.def
            else {
                continue;
            };
            if source != name {
                continue;
            }
            let w = if agg.is_unbounded() {
                None
            } else {
                window.days()
            };
            let visible = w.map(|w| format!("__vn <= __tn + {w}"));
            let when_visible = |x: &str, otherwise: &str| match &visible {
                Some(v) => format!("CASE WHEN {v} THEN {x} ELSE {otherwise} END"),
                None => x.to_string(),
            };
            let float_sum = is_float(ty(name, format!("__s{i}")));
            let dec = |x: &str| {
                if float_sum {
                    format!("CAST({x} AS DECIMAL(38, 12))")
                } else {
                    x.to_string()
                }
            };
            let v = match agg {
                Aggregation::Count => {
                    plus.cols
                        .insert(format!("__xc{i}"), when_visible(&format!("__c{i}"), "0"));
                    if let Some(w) = w {
                        minus
                            .entry(w)
                            .or_default()
                            .insert(format!("__xc{i}"), format!("-__c{i}"));
                    }
                    windows.push(format!("{RUNNING_SUM}(__xc{i}) {cum} AS __c{i}"));
                    format!("p.__c{i}")
                }
                Aggregation::Sum | Aggregation::Mean => {
                    plus.cols.insert(
                        format!("__xs{i}"),
                        when_visible(&dec(&format!("__s{i}")), "NULL"),
                    );
                    plus.cols
                        .insert(format!("__xn{i}"), when_visible(&format!("__n{i}"), "0"));
                    if let Some(w) = w {
                        let m = minus.entry(w).or_default();
                        m.insert(format!("__xs{i}"), format!("-{}", dec(&format!("__s{i}"))));
                        m.insert(format!("__xn{i}"), format!("-__n{i}"));
                    }
                    windows.push(format!("{RUNNING_SUM}(__xs{i}) {cum} AS __s{i}"));
                    windows.push(format!("{RUNNING_SUM}(__xn{i}) {cum} AS __n{i}"));
                    col_types.insert(
                        format!("__xs{i}"),
                        if float_sum {
                            DataType::Decimal128(38, 12)
                        } else {
                            ty(name, format!("__s{i}"))
                                .cloned()
                                .unwrap_or(DataType::Int64)
                        },
                    );
                    sum_or_mean(*agg, i, float_sum)
                }
                Aggregation::Min | Aggregation::Max | Aggregation::First | Aggregation::Last => {
                    let (func, comb) = if matches!(agg, Aggregation::Min | Aggregation::First) {
                        ("MIN", "LEAST")
                    } else {
                        ("MAX", "GREATEST")
                    };
                    let value = if matches!(agg, Aggregation::Min | Aggregation::Max) {
                        format!("__m{i}")
                    } else {
                        format!("__rk{i}")
                    };
                    let t = if matches!(agg, Aggregation::Min | Aggregation::Max) {
                        ty(name, format!("__m{i}"))
                            .cloned()
                            .unwrap_or(DataType::Int64)
                    } else {
                        DataType::UInt64
                    };
                    col_types.insert(format!("__xm{i}"), t.clone());
                    col_types.insert(format!("__xl{i}"), t);
                    match w {
                        Some(w) => {
                            plus.cols.insert(
                                format!("__xm{i}"),
                                format!("CASE WHEN __vn = __tn + 1 THEN {value} END"),
                            );
                            late.entry(w)
                                .or_default()
                                .insert(format!("__xl{i}"), value.clone());
                            windows.push(format!("{func}(__xm{i}) {} AS __m{i}", frame(w)));
                            // Late rows are grouped per (key, day): their column is the value.
                            windows.push(format!("__xl{i} AS __l{i}"));
                            combine.insert(format!("__xl{i}"), func.to_string());
                            after.push(format!("{comb}(__m{i}, __l{i}) AS __r{i}"));
                        }
                        None => {
                            plus.cols.insert(format!("__xm{i}"), value.clone());
                            windows.push(format!("{}(__xm{i}) {cum} AS __m{i}", run(func)));
                            after.push(format!("__m{i} AS __r{i}"));
                        }
                    }
                    if matches!(agg, Aggregation::Min | Aggregation::Max) {
                        format!("p.__r{i}")
                    } else {
                        let vals = ident(&format!("{name}__vals{i}"));
                        ctes.push(format!(
                            "{vals} AS (SELECT __key, __rk{i} AS __rk, __v{i} AS __v FROM {rows} WHERE __c{i} > 0)"
                        ));
                        let q = format!("__q{i}");
                        joins.push(format!(
                            "LEFT JOIN {vals} {q} ON {q}.__key = p.__key AND {q}.__rk = p.__r{i}"
                        ));
                        format!("{q}.__v")
                    }
                }
                Aggregation::DaysSinceFirst | Aggregation::DaysSinceLast => {
                    plus.cols.insert(
                        format!("__xt{i}"),
                        format!("CASE WHEN __c{i} > 0 THEN __tn END"),
                    );
                    let func = if *agg == Aggregation::DaysSinceFirst {
                        "MIN"
                    } else {
                        "MAX"
                    };
                    windows.push(format!("{}(__xt{i}) {cum} AS __t{i}", run(func)));
                    format!("p.__dn - p.__t{i}")
                }
                Aggregation::ActiveDays | Aggregation::CountDistinct => {
                    // Visibility intervals per (key, day) or (key, value), merged.
                    let spans = ident(&format!("{name}__u{i}"));
                    let src = if *agg == Aggregation::ActiveDays {
                        format!(
                            "SELECT __key, __tn AS __g, __tn, __vn FROM {rows} WHERE __c{i} > 0"
                        )
                    } else {
                        let read = &reads_last[name];
                        visible_tile_rows(
                            &ident(&layouts[name].distinct_table(i)),
                            "__key, __v AS __g",
                            reads_first.get(name).and_then(|r| r.first_day),
                            read.last_day,
                            read.knowledge,
                            nn,
                            keys,
                        )
                    };
                    let body = match w {
                        // Rows of one (key, day) all leave the window on the same day, so
                        // their intervals merge into one: from the first visible to t + W.
                        Some(w) if *agg == Aggregation::ActiveDays => format!(
                            "SELECT __key, __s, __e FROM (SELECT __key, MIN(__vn) AS __s, MIN(__tn) + {w} AS __e FROM ({src}) GROUP BY __key, __g) WHERE __s <= __e"
                        ),
                        Some(w) => format!(
                            "SELECT __key, MIN(__s) AS __s, MAX(__e) AS __e FROM (
                               SELECT *, {RUNNING_SUM}(__new) OVER (PARTITION BY __key, __g ORDER BY __s, __e) AS __island FROM (
                                 SELECT *, CASE WHEN MAX(__e) OVER (PARTITION BY __key, __g ORDER BY __s, __e ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING) >= __s - 1 THEN 0 ELSE 1 END AS __new
                                 FROM (SELECT __key, __g, __vn AS __s, __tn + {w} AS __e FROM ({src}) WHERE __vn <= __tn + {w})))
                             GROUP BY __key, __g, __island"
                        ),
                        None => format!("SELECT __key, MIN(__vn) AS __s, CAST(NULL AS BIGINT) AS __e FROM ({src}) GROUP BY __key, __g"),
                    };
                    ctes.push(format!("{spans} AS ({body})"));
                    let col = format!("__xd{i}");
                    branches.push(Branch {
                        from: spans.clone(),
                        day: "__s".into(),
                        cols: BTreeMap::from([(col.clone(), "CAST(1 AS BIGINT)".to_string())]),
                    });
                    if w.is_some() {
                        branches.push(Branch {
                            from: format!("{spans} WHERE __e + 1 <= {nn}"),
                            day: "__e + 1".into(),
                            cols: BTreeMap::from([(col.clone(), "CAST(-1 AS BIGINT)".to_string())]),
                        });
                    }
                    windows.push(format!("{RUNNING_SUM}({col}) {cum} AS __d{i}"));
                    format!("p.__d{i}")
                }
            };
            layer0.push(feature_column(f, *agg, &v));
        }
        branches.push(plus);
        for (w, cols) in minus {
            branches.push(Branch {
                from: format!("{rows} WHERE __vn <= __tn + {w} AND __tn + {w} + 1 <= {nn}"),
                day: format!("__tn + {w} + 1"),
                cols,
            });
        }
        for (w, cols) in late {
            // unnest in the day column: one row per day the late row is visible.
            branches.push(Branch {
                from: format!(
                    "{rows} WHERE __vn > __tn + 1 AND __vn <= __tn + {w} AND __vn <= {nn}"
                ),
                day: format!("unnest(range(GREATEST(__vn, {n1}), LEAST(__tn + {w}, {nn}) + 1))"),
                cols,
            });
        }
    }
    branches.push(Branch {
        from: "__spine".into(),
        day: "__dn".into(),
        cols: BTreeMap::new(),
    });

    // Every column of the union, in one order for all branches.
    let all: BTreeSet<String> = branches
        .iter()
        .flat_map(|b| b.cols.keys().cloned())
        .collect();
    let selects: Vec<String> = branches
        .iter()
        .enumerate()
        .map(|(n, b)| {
            let kind = if b.from == "__spine" { 1 } else { 0 };
            let mut cols = vec![
                "__key".to_string(),
                format!("CAST({} AS BIGINT) AS __dn", b.day),
                format!("{kind} AS __k"),
            ];
            for c in &all {
                let v =
                    b.cols.get(c).cloned().unwrap_or_else(|| {
                        typed_null(col_types.get(c).unwrap_or(&DataType::Int64))
                    });
                cols.push(if n == 0 { format!("{v} AS {c}") } else { v });
            }
            format!("SELECT {} FROM {}", cols.join(", "), b.from)
        })
        .collect();
    ctes.push(format!("__u AS ({})", selects.join("\nUNION ALL\n")));
    // One row per (key, day): contributions of the same day combine first (a vectorised
    // hash aggregation), so the window functions see far fewer rows. The spine row of a
    // day sees that day's own contributions, which is what the visibility rules say.
    for w in &windows {
        if let (Some(open), Some(close)) = (w.find('('), w.find(')')) {
            if w.contains(" OVER ") {
                let func = match &w[..open] {
                    RUNNING_SUM => "SUM",
                    RUNNING_MIN => "MIN",
                    RUNNING_MAX => "MAX",
                    other => other,
                };
                combine
                    .entry(w[open + 1..close].to_string())
                    .or_insert_with(|| func.to_string());
            }
        }
    }
    let mut g_cols = vec![
        "__key".to_string(),
        "__dn".to_string(),
        "MAX(__k) AS __k".to_string(),
    ];
    for c in &all {
        let f = combine.get(c).map(String::as_str).unwrap_or("SUM");
        g_cols.push(format!("{f}({c}) AS {c}"));
    }
    ctes.push(format!(
        "__g AS (SELECT {} FROM __u GROUP BY __key, __dn)",
        g_cols.join(", ")
    ));
    let mut w_cols = vec!["__key".to_string(), "__dn".to_string(), "__k".to_string()];
    w_cols.extend(windows);
    ctes.push(format!("__w AS (SELECT {} FROM __g)", w_cols.join(", ")));
    let extra = if after.is_empty() {
        String::new()
    } else {
        format!(", {}", after.join(", "))
    };
    ctes.push(format!(
        "__population AS (SELECT *{extra} FROM __w WHERE __k = 1)"
    ));
    finish(pipeline, &ctes, &layer0, &joins, Some("snapshot_date, "))
}

/// Tile rows of the sources' history per snapshot day below which a range is built
/// day by day. The general set-based query carries every tile row the range reads
/// through its running values, whatever the range's length: a fixed cost of about 5.7 µs
/// per tile row (measured with the demo pipeline: 200 s over the 35M tile rows of the
/// 10-million-event benchmark world, 8 s over the 1.4M of the 4,000-customer demo world).
/// A day from its pieces costs about 0.5 s more than a day of the set-based query on the
/// demo world and about 1 s less on the benchmark world, so day by day wins below about
/// 16 days there and for any range here (docs/benchmarks.md, fourteenth measurement).
pub const TILE_ROWS_PER_DAY_BY_DAY: u64 = 90_000;

/// Tile rows a windowed-total query reads for the cost of one day built from its pieces:
/// the demo pipeline under `--memory-limit 1GiB` at 35,000 keys took 212 s for 22 ranges
/// of keys over its tile rows (about 0.7 µs a tile row a range) where a day from its
/// pieces took 1.6 s (docs/benchmarks.md, twenty-sixth measurement). [`build_days`] builds
/// a range of such a pipeline day by day when its days times this are below its ranges
/// of keys times its tile rows: only under a memory limit tight enough to cut it into
/// many ranges.
pub const DIRECT_TILE_ROWS_PER_DAY_BY_DAY: u64 = 2_300_000;

/// The longest range of `first..=last`'s kind that [`build_days`] builds day by day:
/// [`tile_rows_read`] over [`TILE_ROWS_PER_DAY_BY_DAY`] (or the session's
/// [`crate::session::TileRowsPerDayByDay`]).
pub async fn day_by_day_limit(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    first: NaiveDate,
    last: NaiveDate,
    mode: KnowledgeOverride,
) -> datafusion::error::Result<u64> {
    let per_day = ctx
        .state()
        .config()
        .get_extension::<crate::session::TileRowsPerDayByDay>()
        .map_or(TILE_ROWS_PER_DAY_BY_DAY, |n| n.0);
    Ok(tile_rows_read(ctx, pipeline, layouts, first, last, mode).await? / per_day)
}

/// The tile rows (main and distinct-value tiles of every source) that the set-based query
/// of `first..=last` reads, counted from the tile files' statistics.
pub async fn tile_rows_read(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    first: NaiveDate,
    last: NaiveDate,
    mode: KnowledgeOverride,
) -> datafusion::error::Result<u64> {
    let mut rows = 0u64;
    for (t, conds) in tile_tables_read(ctx, pipeline, layouts, first, last, mode)? {
        // Only partition conditions: the count comes from file statistics.
        let sql = format!(
            "SELECT COUNT(*) FROM {} WHERE {}",
            ident(&t),
            conds.join(" AND ")
        );
        for b in ctx.sql(&sql).await?.collect().await? {
            let n = b
                .column(0)
                .as_primitive::<datafusion::arrow::datatypes::Int64Type>();
            rows += n.iter().flatten().sum::<i64>() as u64;
        }
    }
    Ok(rows)
}

/// Builds and publishes every snapshot of `days` (consecutive, tiles prepared) the
/// cheaper of two ways, telling `on_day` of each published day:
///
/// - all days from one set-based query ([`build_range`]) when the pipeline's aggregates
///   are all windowed totals ([`direct_features`]) and its ranges of keys read fewer tile
///   rows than [`DIRECT_TILE_ROWS_PER_DAY_BY_DAY`] per day, or, for other pipelines, when
///   the range is longer than [`day_by_day_limit`];
/// - else one day at a time from its pieces (tiles at its windows' edges, week and month
///   roll-ups between; [`crate::rollups::plan_day`]), as a daily build does.
#[allow(clippy::too_many_arguments)]
pub async fn build_days(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    reports: &BTreeMap<String, crate::sources::SourceReport>,
    layouts: &BTreeMap<String, TileLayout>,
    out: &Location,
    days: &[NaiveDate],
    mode: KnowledgeOverride,
    staged_check: Option<&dyn StagedCheck>,
    mut on_day: impl FnMut(&DayReport),
) -> Result<Vec<DayReport>, BuildError> {
    let (Some(&first), Some(&last)) = (days.first(), days.last()) else {
        return Ok(Vec::new());
    };
    let engine = |source| BuildError::Engine { day: first, source };
    let set_based = days.len() > 1
        && if direct_features(pipeline, &tile_types(ctx, layouts).await) {
            // Each range of keys reads every tile row again (a day's tile file is one row
            // group: a range prunes none of it).
            let rows = tile_rows_read(ctx, pipeline, layouts, first, last, mode)
                .await
                .map_err(engine)?;
            let per_query = work_rows_per_query(ctx, Some(direct_width(pipeline)));
            let ranges = rows.div_ceil(per_query.max(1)).max(1);
            (days.len() as u64).saturating_mul(DIRECT_TILE_ROWS_PER_DAY_BY_DAY)
                > ranges.saturating_mul(rows)
        } else {
            days.len() as u64
                > day_by_day_limit(ctx, pipeline, layouts, first, last, mode)
                    .await
                    .map_err(engine)?
        };
    if set_based {
        return build_range(
            ctx,
            pipeline,
            layouts,
            out,
            days,
            mode,
            staged_check,
            on_day,
        )
        .await;
    }
    let mut built = Vec::with_capacity(days.len());
    for &day in days {
        let (_, plan) =
            crate::rollups::plan_day(ctx, pipeline, reports, layouts, out, day, mode).await?;
        let query = crate::tiles::tiled_snapshot_query(pipeline, layouts, &plan, mode);
        let report = crate::build::build_day_checked(
            ctx,
            pipeline,
            out,
            day,
            mode,
            &query.sql,
            Some((layouts, &plan)),
            staged_check,
        )
        .await?;
        on_day(&report);
        built.push(report);
    }
    Ok(built)
}

/// Builds and publishes every snapshot of `days` (consecutive) from one query, each day
/// through its own staging file, checks (expectations, then `staged_check`), provenance
/// in the footer, and rename. `on_day` is told of each published
/// day as it goes. Days whose population is empty get an empty snapshot, as in a
/// per-day build.
#[allow(clippy::too_many_arguments)]
pub async fn build_range(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    out: &Location,
    days: &[NaiveDate],
    mode: KnowledgeOverride,
    staged_check: Option<&dyn StagedCheck>,
    on_day: impl FnMut(&DayReport),
) -> Result<Vec<DayReport>, BuildError> {
    let (Some(&first), Some(&last)) = (days.first(), days.last()) else {
        return Ok(Vec::new());
    };
    let engine = |day| move |source| BuildError::Engine { day, source };
    let provenance = crate::provenance::range_provenance(ctx, pipeline, days, mode, layouts)
        .await
        .map_err(engine(first))?;
    let types = tile_types(ctx, layouts).await;
    let ranges = key_ranges(
        ctx,
        pipeline,
        layouts,
        first,
        last,
        mode,
        work_rows_per_query(
            ctx,
            direct_features(pipeline, &types).then(|| direct_width(pipeline)),
        ),
    )
    .await
    .map_err(engine(first))?;
    // Windowed totals in one query without a memory limit come without the query's final
    // sort and are put in order here ([`crate::by_day`]); the sort held all the rows as
    // well. Under a memory limit the query sorts them within the memory pool.
    let by_day = ranges.len() <= 1
        && !crate::session::memory_limited(ctx)
        && direct_features(pipeline, &types);
    let (schema, mut stream) = if ranges.len() <= 1 {
        let sql = range_sql(
            pipeline,
            layouts,
            first,
            last,
            mode,
            &types,
            &KeyRange::all(),
            !by_day,
        );
        let plan = ctx
            .sql(&sql)
            .await
            .map_err(engine(first))?
            .create_physical_plan()
            .await
            .map_err(engine(first))?;
        let schema = plan.schema();
        if by_day {
            let batches = datafusion::physical_plan::collect(plan, ctx.task_ctx())
                .await
                .map_err(engine(first))?;
            let column = |name: &str| schema.index_of(name).map_err(|e| engine(first)(e.into()));
            let (key, date) = (column(&pipeline.file.key)?, column("snapshot_date")?);
            let rows = crate::by_day::ByDay::new(schema.clone(), batches, key, date)
                .map_err(engine(first))?;
            let ahead = ctx.state().config().target_partitions();
            (schema, rows.into_stream(ahead))
        } else {
            let stream = datafusion::physical_plan::execute_stream(plan, ctx.task_ctx())
                .map_err(engine(first))?;
            (schema, stream.boxed())
        }
    } else {
        let queries = ranges
            .iter()
            .map(|r| range_query(pipeline, layouts, first, last, mode, &types, r));
        let merge = KeyRangeMerge::spill(ctx, queries)
            .await
            .map_err(engine(first))?;
        (merge.schema.clone(), futures::stream::iter(merge).boxed())
    };
    let date_col = schema
        .index_of("snapshot_date")
        .map_err(|e| engine(first)(e.into()))?;
    let mut publisher = Publisher {
        ctx,
        pipeline: std::sync::Arc::new(pipeline.clone()),
        out,
        mode,
        schema,
        provenance,
        staged_check,
        on_day,
        reports: Vec::new(),
        queries: ranges.len(),
        closing: std::collections::VecDeque::new(),
        // Days encoded side by side: one per core (the merge or query feeding them runs
        // beside them). Under a memory limit, one day at a time as before: each day's
        // writer holds its encoded row group until it closes, and the memory measured
        // under a limit (docs/benchmarks.md) was measured that way.
        side_by_side: match crate::session::memory_limited(ctx) {
            true => 0,
            false => ctx.state().config().target_partitions().max(1),
        },
    };
    let mut pending = first.iter_days().take_while(|d| *d <= last).peekable();
    let mut current: Option<OpenDay> = None;
    let epoch = NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch");
    let streamed: Result<(), BuildError> = async {
        while let Some(batch) = stream.next().await {
            let batch = batch.map_err(engine(first))?;
            let Some(dates) = batch.column(date_col).as_primitive_opt::<Date32Type>() else {
                return Err(engine(first)(datafusion::error::DataFusionError::Internal(
                    "snapshot_date is not a date".into(),
                )));
            };
            let dates = dates.clone();
            for run in
                crate::build::equal_runs(batch.num_rows(), |a, b| dates.value(a) == dates.value(b))
            {
                let d = epoch + chrono::Duration::days(dates.value(run.start) as i64);
                if current.as_ref().map(|o| o.day) != Some(d) {
                    if let Some(o) = current.take() {
                        publisher.close(o).await?;
                    }
                    // Days before `d` with no rows at all still get a (empty) snapshot.
                    while let Some(p) = pending.next_if(|p| *p < d) {
                        let o = publisher.open(p)?;
                        publisher.close(o).await?;
                    }
                    pending.next();
                    current = Some(publisher.open(d)?);
                }
                if let Some(o) = current.as_mut() {
                    o.send(batch.slice(run.start, run.len())).await?;
                }
            }
        }
        if let Some(o) = current.take() {
            publisher.close(o).await?;
        }
        for p in pending.by_ref() {
            let o = publisher.open(p)?;
            publisher.close(o).await?;
        }
        publisher.drain().await
    }
    .await;
    if let Err(e) = streamed {
        // Nothing half-written: the days being written are dropped from staging.
        if let Some(o) = current.take() {
            publisher.closing.push_back(o.finish());
        }
        publisher.abandon().await;
        return Err(e);
    }
    Ok(publisher.reports)
}

/// The results of one range query per key range, each spilled to a temporary Arrow file
/// in the session's spill folder, read back day by day: all rows of a day from the first
/// range, then the second..., so that the rows come out ordered by (date, key) as one
/// query's would. Spilled batches never straddle two days and each file keeps an index of
/// its batches per day, so the merge reads exactly the batches of the day it is on and
/// holds one batch at a time (it held one per range, plus the whole day, before: 1.1 GB
/// at a 300 MiB limit on the 100M-event world, docs/benchmarks.md).
struct KeyRangeMerge {
    schema: datafusion::arrow::datatypes::SchemaRef,
    cursors: Vec<SpillCursor>,
    /// The day being read, and the cursor it is being read from.
    day: Option<i32>,
    at: usize,
    /// Deleted when the merge is dropped.
    _files: Vec<std::sync::Arc<dyn datafusion::execution::SpillFile>>,
}

/// Reads one spilled range query.
struct SpillCursor {
    reader: datafusion::arrow::ipc::reader::StreamReader<std::io::BufReader<std::fs::File>>,
    /// The days of the batches not read yet, in file order, with their number of batches.
    days: std::collections::VecDeque<(i32, usize)>,
}

impl SpillCursor {
    /// The next batch of the file when it belongs to day `d`.
    fn next_of(&mut self, d: i32) -> Option<datafusion::error::Result<RecordBatch>> {
        let (day, n) = self.days.front_mut()?;
        if *day != d {
            return None;
        }
        *n -= 1;
        if *n == 0 {
            self.days.pop_front();
        }
        Some(match self.reader.next() {
            Some(b) => b.map_err(Into::into),
            None => Err(datafusion::error::DataFusionError::Internal(
                "a spilled key range ended before its index".into(),
            )),
        })
    }
}

impl KeyRangeMerge {
    /// Runs each query in turn and spills its result (Arrow IPC, LZ4 when available), cut
    /// at day boundaries.
    async fn spill(
        ctx: &SessionContext,
        queries: impl Iterator<Item = String>,
    ) -> datafusion::error::Result<Self> {
        use datafusion::arrow::ipc::writer::{IpcWriteOptions, StreamWriter};
        let mut files = Vec::new();
        let mut indexes = Vec::new();
        let mut schema = None;
        for sql in queries {
            let mut stream = ctx.sql(&sql).await?.execute_stream().await?;
            let s = schema.get_or_insert_with(|| stream.schema()).clone();
            let date_col = s.index_of("snapshot_date")?;
            let file = ctx
                .runtime_env()
                .disk_manager
                .create_tmp_file("daymark backfill key range")?;
            let options = IpcWriteOptions::default()
                .try_with_compression(Some(datafusion::arrow::ipc::CompressionType::LZ4_FRAME))
                .unwrap_or_default();
            let mut w = StreamWriter::try_new_with_options(
                std::io::BufWriter::new(file.open_writer()?),
                &s,
                options,
            )?;
            let mut days: std::collections::VecDeque<(i32, usize)> = Default::default();
            while let Some(b) = stream.next().await {
                let b = b?;
                let dates = b
                    .column(date_col)
                    .as_primitive_opt::<Date32Type>()
                    .ok_or_else(|| {
                        datafusion::error::DataFusionError::Internal(
                            "snapshot_date is not a date".into(),
                        )
                    })?
                    .clone();
                for run in
                    crate::build::equal_runs(b.num_rows(), |x, y| dates.value(x) == dates.value(y))
                {
                    let d = dates.value(run.start);
                    w.write(&b.slice(run.start, run.len()))?;
                    match days.back_mut() {
                        Some((last, n)) if *last == d => *n += 1,
                        _ => days.push_back((d, 1)),
                    }
                }
            }
            w.finish()?;
            let mut inner = w.into_inner()?.into_inner().map_err(|e| e.into_error())?;
            inner.finish()?;
            files.push(file);
            indexes.push(days);
            crate::session::release_free_memory();
        }
        let schema = schema.ok_or_else(|| {
            datafusion::error::DataFusionError::Internal("no key range to run".into())
        })?;
        let mut cursors = Vec::new();
        for (f, days) in files.iter().zip(indexes) {
            let path = f.path().ok_or_else(|| {
                datafusion::error::DataFusionError::Internal(
                    "the spill folder is not a local folder".into(),
                )
            })?;
            let reader = datafusion::arrow::ipc::reader::StreamReader::try_new(
                std::io::BufReader::new(std::fs::File::open(path)?),
                None,
            )?;
            cursors.push(SpillCursor { reader, days });
        }
        Ok(KeyRangeMerge {
            schema,
            cursors,
            day: None,
            at: 0,
            _files: files,
        })
    }
}

impl Iterator for KeyRangeMerge {
    type Item = datafusion::error::Result<RecordBatch>;

    fn next(&mut self) -> Option<Self::Item> {
        loop {
            if let Some(d) = self.day {
                while let Some(c) = self.cursors.get_mut(self.at) {
                    match c.next_of(d) {
                        Some(b) => return Some(b),
                        None => self.at += 1,
                    }
                }
            }
            // The earliest day any range still has.
            self.day = Some(
                self.cursors
                    .iter()
                    .filter_map(|c| c.days.front().map(|(d, _)| *d))
                    .min()?,
            );
            self.at = 0;
        }
    }
}

/// Publishes the per-day files of a range in date order (provenance into the footer,
/// checks, rename, then tells `on_day`) while up to `side_by_side` of them are closing
/// beside the one being written: each day's rows go to a task of their own that writes and closes the day's
/// staging file (Parquet encoding and compression, most of publishing's time, ran on one
/// core before: docs/benchmarks.md, eleventh measurement); checks and renames stay in day
/// order, since a day's checks compare it with the day published before it.
struct Publisher<'a, F: FnMut(&DayReport)> {
    ctx: &'a SessionContext,
    pipeline: std::sync::Arc<Pipeline>,
    out: &'a Location,
    mode: KnowledgeOverride,
    schema: datafusion::arrow::datatypes::SchemaRef,
    provenance: BTreeMap<NaiveDate, crate::provenance::Provenance>,
    staged_check: Option<&'a dyn StagedCheck>,
    on_day: F,
    reports: Vec<DayReport>,
    /// Queries (ranges of keys) the rows come from.
    queries: usize,
    /// Days whose rows are all sent, oldest first, closing or closed.
    closing: std::collections::VecDeque<Closing>,
    side_by_side: usize,
}

/// A day being written by its task: send its rows, then [`OpenDay::finish`].
struct OpenDay {
    day: NaiveDate,
    rows: tokio::sync::mpsc::Sender<RecordBatch>,
    task: tokio::task::JoinHandle<Result<crate::build::ClosedDay, BuildError>>,
    started: Instant,
}

/// A day whose rows are all sent: its task closes the file.
struct Closing {
    day: NaiveDate,
    task: tokio::task::JoinHandle<Result<crate::build::ClosedDay, BuildError>>,
    started: Instant,
}

impl OpenDay {
    /// Sends rows of the day to its task; when the task has stopped (on a write error),
    /// returns its error.
    async fn send(&mut self, rows: RecordBatch) -> Result<(), BuildError> {
        if self.rows.send(rows).await.is_ok() {
            return Ok(());
        }
        let day = self.day;
        match (&mut self.task).await {
            Ok(Err(e)) => Err(e),
            Ok(Ok(closed)) => {
                closed.abandon().await;
                Err(task_error(day, "the day's writer stopped early".into()))
            }
            Err(e) => Err(task_error(day, e.to_string())),
        }
    }

    /// No more rows: the task closes the file.
    fn finish(self) -> Closing {
        Closing {
            day: self.day,
            task: self.task,
            started: self.started,
        }
    }
}

fn task_error(day: NaiveDate, reason: String) -> BuildError {
    BuildError::Engine {
        day,
        source: datafusion::error::DataFusionError::External(reason.into()),
    }
}

impl<F: FnMut(&DayReport)> Publisher<'_, F> {
    /// Starts the task writing snapshot `day` to a staging file.
    fn open(&self, day: NaiveDate) -> Result<OpenDay, BuildError> {
        let path = snapshot_path(self.out, self.mode, day);
        let mut writer = DayWriter::new(self.out, path, day, self.schema.clone())?;
        let metadata: Vec<(String, String)> = self
            .provenance
            .get(&day)
            .map(|p| {
                (
                    crate::provenance::METADATA_KEY.to_string(),
                    serde_json::to_string(p).unwrap_or_default(),
                )
            })
            .into_iter()
            .chain([crate::build::feature_hashes(&self.pipeline)])
            .collect();
        let pipeline = self.pipeline.clone();
        let (tx, mut rx) = tokio::sync::mpsc::channel::<RecordBatch>(4);
        let task = tokio::spawn(async move {
            while let Some(batch) = rx.recv().await {
                writer.tally(&pipeline, &batch);
                writer.write(&batch).await?;
            }
            writer.close(&metadata).await
        });
        Ok(OpenDay {
            day,
            rows: tx,
            task,
            started: Instant::now(),
        })
    }

    /// Lets `day`'s task close its file, and publishes the oldest days closing while more
    /// than `side_by_side` are.
    async fn close(&mut self, day: OpenDay) -> Result<(), BuildError> {
        self.closing.push_back(day.finish());
        while self.closing.len() > self.side_by_side {
            self.publish_oldest().await?;
        }
        Ok(())
    }

    /// Publishes every day still closing.
    async fn drain(&mut self) -> Result<(), BuildError> {
        while !self.closing.is_empty() {
            self.publish_oldest().await?;
        }
        Ok(())
    }

    /// Waits for the oldest closing day, checks and publishes it.
    async fn publish_oldest(&mut self) -> Result<(), BuildError> {
        let Some(c) = self.closing.pop_front() else {
            return Ok(());
        };
        let closed = match c.task.await {
            Ok(closed) => closed?,
            Err(e) => return Err(task_error(c.day, e.to_string())),
        };
        let (rows, bytes, warnings) = closed
            .publish(self.ctx, Some(&self.pipeline), self.staged_check)
            .await?;
        let r = DayReport {
            day: c.day,
            rows,
            bytes,
            seconds: c.started.elapsed().as_secs_f64(),
            warnings,
            queries: self.queries,
        };
        (self.on_day)(&r);
        self.reports.push(r);
        Ok(())
    }

    /// After an error: waits for the days still closing and deletes their staging files.
    async fn abandon(&mut self) {
        while let Some(c) = self.closing.pop_front() {
            if let Ok(Ok(closed)) = c.task.await {
                closed.abandon().await;
            }
        }
    }
}
