//! Tiles: per key, per day partial aggregates of a source, the reuse layer.
//!
//! One tile file is kept per source day partition (`dt=E`) (many partitions are built by
//! one query) and holds, for every (key, event day t, arrival day a), the partial
//! aggregates of every feature that reads the source. Days run from one cutoff to the next in the pipeline time zone, so a
//! snapshot D with a W-day window needs exactly the tile rows with `D-W <= t <= D-1`, and in
//! as-known mode also `a <= D-1`: a late row lands in the tile of its (event day, arrival
//! day) and never forces a rescan of history. Features whose partials do not add up (exact
//! distinct counts) get a tile of distinct (key, t, a, value) rows instead.
//!
//! A tile is rebuilt only when the files of its partition change (their names, sizes and
//! modification times are kept beside it) or when the definitions it serves change (they
//! are part of the tile folder's name).

use crate::build::{child, BuildError};
use crate::sources::SourceReport;
use crate::sql::{day_of_sql, ident, literal};
use chrono::NaiveDate;
use datafusion::arrow::array::RecordBatch;
use datafusion::arrow::datatypes::{DataType, Schema, TimeUnit};
use datafusion::common::{Column, TableReference};
use datafusion::datasource::file_format::parquet::ParquetFormat;
use datafusion::datasource::listing::{
    ListingOptions, ListingTable, ListingTableConfig, ListingTableUrl,
};
use datafusion::datasource::{provider_as_source, TableProvider, ViewTable};
use datafusion::logical_expr::{Expr, LogicalPlanBuilder};
use datafusion::prelude::SessionContext;
use daymark_spec::hash::hash_value;
use daymark_spec::{Aggregation, FeatureDef, Pipeline, Population, Source};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::{ObjectStoreExt, PutPayload};
use daymark_store::{DataFile, Location};
use serde_json::json;
use std::collections::{BTreeMap, BTreeSet};
use std::sync::Arc;

/// Version of the tile file format; part of every tile folder's hash, so a new format is
/// rebuilt rather than misread.
const TILE_FORMAT: u32 = 3;

/// Rows whose event time is more than this many seconds after their arrival time are
/// counted as clock problems (common practice: a few minutes of skew between producers).
pub const CLOCK_SKEW_TOLERANCE_SECS: i64 = 300;

/// What the tile files of one source contain.
#[derive(Debug, Clone)]
pub struct TileLayout {
    /// Source name.
    pub source: String,
    /// Short hash of everything the tiles depend on; names their folder.
    pub hash: String,
    /// SELECT items of the main tile (over de-duplicated rows with `__t`, `__a`), one per
    /// distinct definition.
    pub columns: Vec<String>,
    /// Columns defined the same way as an earlier one, as (name, stored column): the files
    /// hold each definition once and the tile tables show it under every name
    /// ([`register_tiles`]). (Each window of a feature used to get its own copy: the
    /// benchmark pipeline's tiles held nine identical `COUNT(*)` columns.)
    pub aliases: Aliases,
    /// Distinct-value tiles: (feature index, value expression, filter).
    pub distinct: Vec<(usize, String, Option<String>)>,
}

impl TileLayout {
    /// Folder of the main tiles: `tiles/<source>/<hash>/`.
    pub fn dir(&self, out: &Location) -> StorePath {
        child(&out.prefix, &["tiles", &self.source, &self.hash])
    }
    /// Folder of one distinct-value tile.
    pub fn distinct_dir(&self, out: &Location, feature: usize) -> StorePath {
        child(
            &out.prefix,
            &["tiles", &self.source, &format!("{}-d{feature}", self.hash)],
        )
    }
    /// The stored column that column `name` of the main tiles shows ([`Self::aliases`]).
    pub fn stored<'a>(&'a self, name: &'a str) -> &'a str {
        self.aliases
            .iter()
            .find(|(alias, _)| alias == name)
            .map_or(name, |(_, stored)| stored.as_str())
    }
    /// Table name of the main tiles.
    pub fn table(&self) -> String {
        format!("{}__tiles", self.source)
    }
    /// Table name of a distinct-value tile.
    pub fn distinct_table(&self, feature: usize) -> String {
        format!("{}__d{feature}", self.source)
    }
}

fn cond(filter: &Option<String>) -> String {
    match filter {
        Some(f) => format!(" FILTER (WHERE ({f}))"),
        None => String::new(),
    }
}

/// Columns shown under another name, as (name, stored column).
pub type Aliases = Vec<(String, String)>;

/// Columns `cols` (name, definition) split into those defined first, which are stored,
/// and the rest as (name, the stored column defined the same way): the windows of a
/// feature, and features counting the same rows, share one column.
pub fn stored_once(cols: Vec<(String, String)>) -> (Vec<(String, String)>, Aliases) {
    let mut first: BTreeMap<String, String> = BTreeMap::new();
    let (mut kept, mut aliases) = (Vec::new(), Vec::new());
    for (name, def) in cols {
        match first.get(&def) {
            Some(stored) => aliases.push((name, stored.clone())),
            None => {
                first.insert(def.clone(), name.clone());
                kept.push((name, def));
            }
        }
    }
    (kept, aliases)
}

/// The tile layout of `source`, or `None` if no feature or population reads it.
pub fn layout(pipeline: &Pipeline, source: &Source) -> Option<TileLayout> {
    let ev = ident(&source.spec.event_time);
    let arr = source.spec.arrival_time.as_ref().map(|a| ident(a));
    // As declared: (name, aggregate over tile rows).
    let mut columns: Vec<(String, String)> = Vec::new();
    let mut distinct = Vec::new();
    match &pipeline.population {
        Population::State(s) if s.source == source.name => {
            let col = ident(&s.column);
            let order = [Some(ev.clone()), arr.clone(), Some(col.clone())]
                .into_iter()
                .flatten()
                .collect::<Vec<_>>()
                .join(", ");
            columns.push((
                "__ps".to_string(),
                format!("{}({col}, {order})", crate::latest::LATEST),
            ));
            columns.push((
                "__pt".to_string(),
                format!("{}({ev}, {order})", crate::latest::LATEST),
            ));
            if let Some(a) = &arr {
                columns.push((
                    "__pa".to_string(),
                    format!("{}({a}, {order})", crate::latest::LATEST),
                ));
            }
        }
        Population::RecentActivity(r) if r.source == source.name => {
            columns.push(("__pc".to_string(), format!("COUNT(*){}", cond(&r.filter))));
        }
        _ => {}
    }
    for (i, f) in pipeline.features.iter().enumerate() {
        let FeatureDef::Aggregate {
            source: s,
            agg,
            expr,
            filter,
            ..
        } = &f.def
        else {
            continue;
        };
        if *s != source.name {
            continue;
        }
        let only = cond(filter);
        let e = expr
            .as_deref()
            .map(|x| format!("({x})"))
            .unwrap_or_default();
        match agg {
            Aggregation::Count if !e.is_empty() => {
                columns.push((format!("__c{i}"), format!("COUNT({e}){only}")))
            }
            _ => columns.push((format!("__c{i}"), format!("COUNT(*){only}"))),
        }
        match agg {
            Aggregation::Sum => {
                columns.push((format!("__s{i}"), format!("SUM({e}){only}")));
                // Non-null values summed: tells an empty sum (NULL) from a zero one.
                columns.push((format!("__n{i}"), format!("COUNT({e}){only}")));
            }
            Aggregation::Mean => {
                columns.push((format!("__s{i}"), format!("SUM(CAST({e} AS DOUBLE)){only}")));
                columns.push((format!("__n{i}"), format!("COUNT({e}){only}")));
            }
            Aggregation::Min => columns.push((format!("__m{i}"), format!("MIN({e}){only}"))),
            Aggregation::Max => columns.push((format!("__m{i}"), format!("MAX({e}){only}"))),
            Aggregation::First | Aggregation::Last => {
                let func = if *agg == Aggregation::First {
                    crate::latest::EARLIEST
                } else {
                    crate::latest::LATEST
                };
                let order = [Some(ev.clone()), arr.clone(), Some(e.clone())]
                    .into_iter()
                    .flatten()
                    .collect::<Vec<_>>()
                    .join(", ");
                columns.push((format!("__v{i}"), format!("{func}({e}, {order}){only}")));
                columns.push((format!("__vt{i}"), format!("{func}({ev}, {order}){only}")));
                if let Some(a) = &arr {
                    columns.push((format!("__va{i}"), format!("{func}({a}, {order}){only}")));
                }
            }
            Aggregation::CountDistinct => distinct.push((i, e.clone(), filter.clone())),
            _ => {}
        }
    }
    if columns.is_empty() && distinct.is_empty() {
        return None;
    }
    // Provenance (crate::provenance): the latest event and arrival time of each tile row.
    columns.push(("__mev".to_string(), format!("MAX({ev})")));
    if let Some(a) = &arr {
        columns.push(("__mar".to_string(), format!("MAX({a})")));
    }
    let (stored, aliases) = stored_once(columns);
    let columns: Vec<String> = stored
        .into_iter()
        .map(|(name, def)| format!("{def} AS {name}"))
        .collect();
    let hash = hash_value(&json!({
        "format": TILE_FORMAT,
        "source": serde_json::to_value(&source.spec).unwrap_or_default(),
        "key": source.key,
        "timezone": pipeline.file.timezone,
        "cutoff_time": pipeline.file.cutoff_time,
        // Not the aliases: a feature that only adds another window over a column the
        // tiles already hold reuses them.
        "columns": columns,
        "distinct": distinct.iter().map(|(i, e, f)| json!([i, e, f])).collect::<Vec<_>>(),
    }))[..16]
        .to_string();
    Some(TileLayout {
        source: source.name.clone(),
        hash,
        columns,
        aliases,
        distinct,
    })
}

/// The de-duplicated rows of partitions `days` of `source`, with `__part` (the partition,
/// as a date: the condition on the partitions keeps only names of that form, and a date
/// sorts, groups and compares more cheaply than its text), `__key`, `__t`, `__a`.
/// Duplicates are looked for within a partition, as the daily build of one partition
/// would. `names_are_dates`: see [`crate::sql::partition_condition`].
fn rows_sql(
    pipeline: &Pipeline,
    source: &Source,
    days: &[NaiveDate],
    names_are_dates: bool,
    schema: Option<&Schema>,
) -> String {
    let ev = ident(&source.spec.event_time);
    let arr = source.spec.arrival_time.as_ref().map(|a| ident(a));
    let dp = ident(&source.spec.day_partition);
    let base = format!(
        "SELECT *, {} AS __key, CAST({dp} AS DATE) AS __part FROM {} WHERE {}",
        ident(&source.key),
        ident(&source.name),
        crate::sql::partition_condition(&dp, &days.iter().copied().collect(), names_are_dates),
    );
    let deduped = if source.spec.dedupe_on.is_empty() {
        base
    } else {
        // Rows sorted by partition, key, de-duplication columns and arrival: a row is a
        // copy when the row before it has the same key and de-duplication values (copies
        // share their key, as they share their event time). (Partitioning the window by
        // the de-duplication columns instead, as the naive path does, makes nearly every
        // row its own window partition, and DataFusion's per-partition bookkeeping cost
        // about half of the tile build: measured, docs/benchmarks.md.) Sorting by key
        // first leaves the rows in the order the tile is written in, so the grouping
        // after it streams and no second sort is needed.
        let mut same = vec!["__key".to_string()];
        same.extend(source.spec.dedupe_on.iter().map(|c| ident(c)));
        let order = arr.clone().unwrap_or_else(|| ev.clone());
        let over = format!(
            "OVER (PARTITION BY __part ORDER BY {}, {order})",
            same.join(", ")
        );
        format!(
            "SELECT * FROM (SELECT *, {}({}) {over} AS __first_copy FROM ({base})) WHERE __first_copy",
            crate::functions::FIRST_COPY,
            same.join(", ")
        )
    };
    let day_of = |column: &str| day_of_in(pipeline, column, schema, days);
    let t = day_of(&source.spec.event_time);
    let a = match &source.spec.arrival_time {
        Some(a) => day_of(a),
        None => t.clone(),
    };
    format!("SELECT *, {t} AS __t, {a} AS __a FROM ({deduped})")
}

/// [`day_of_sql`] of timestamp column `column` for the rows of partitions `days`, as plain
/// integer arithmetic where it can be: `to_local_time` looks up the zone's offset row by
/// row (about 70 ns a row: 1.4 s of compute for the benchmark's tiles, docs/benchmarks.md,
/// twenty-second measurement). Over the instants from a week before the first partition
/// to 60 days after the last, the zone's offset changes only at known instants, so the
/// day is `(t + offset - shift) / day`, with the offset as the first one plus a step at
/// each change. Instants outside that span, and columns whose unit the schema does not
/// tell, use [`day_of_sql`] itself. The same day either way: `day_of_in_equals_day_of_sql`
/// compares both over instants around daylight-saving changes.
fn day_of_in(
    pipeline: &Pipeline,
    column: &str,
    schema: Option<&Schema>,
    days: &[NaiveDate],
) -> String {
    let plain = day_of_sql(pipeline, &ident(column));
    let unit = match schema.and_then(|s| s.field_with_name(column).ok()) {
        Some(f) => match f.data_type() {
            DataType::Timestamp(u, _) => *u,
            _ => return plain,
        },
        None => return plain,
    };
    let (Some(first), Some(last)) = (days.iter().min(), days.iter().max()) else {
        return plain;
    };
    let per_second = units_per_second(unit);
    let midnight = |d: NaiveDate| d.and_time(chrono::NaiveTime::MIN).and_utc();
    let (from, to) = (
        midnight(*first - chrono::Duration::days(7)),
        midnight(*last + chrono::Duration::days(60)),
    );
    // Past 1970-01-03 the integer division below rounds down as a date must (all values
    // positive); the span must also fit the column's unit.
    let (Some(from_v), Some(to_v)) = (
        from.timestamp().checked_mul(per_second),
        to.timestamp().checked_mul(per_second),
    ) else {
        return plain;
    };
    if from.timestamp() < 2 * 86_400 || to_v.checked_add(2 * 86_400 * per_second).is_none() {
        return plain;
    }
    let shift = pipeline
        .cutoff_time
        .signed_duration_since(chrono::NaiveTime::MIN)
        .num_seconds();
    let (offset, changes) = crate::time::offset_changes(pipeline.timezone, from, to);
    let v = format!("CAST({} AS BIGINT)", ident(column));
    let mut sum = format!("{v} + {}", (offset as i64 - shift) * per_second);
    let mut before = offset as i64;
    for (at, new) in changes {
        sum.push_str(&format!(
            " + CAST({v} >= {} AS BIGINT) * {}",
            at.timestamp() * per_second,
            (new as i64 - before) * per_second
        ));
        before = new as i64;
    }
    format!(
        "CASE WHEN {v} >= {from_v} AND {v} < {to_v} THEN arrow_cast(CAST(({sum}) / {} AS INT), 'Date32') ELSE {plain} END",
        86_400 * per_second
    )
}

/// The SQL of the main tiles of partitions `days`, ordered by partition (`__part` first);
/// `names_are_dates` when every partition folder name of the source is a date.
/// `schema` is the source files' (when known): it tells the unit of the time columns.
pub fn tile_sql(
    pipeline: &Pipeline,
    source: &Source,
    layout: &TileLayout,
    days: &[NaiveDate],
    names_are_dates: bool,
    schema: Option<&Schema>,
) -> String {
    let mut cols = vec![
        "__part".to_string(),
        "__key".to_string(),
        "__t".to_string(),
        "__a".to_string(),
    ];
    // Rows with a null key stay in the tile (under a null key) only to be counted; rows
    // whose event time is after their arrival beyond the tolerance are counted too.
    cols.push("COUNT(*) AS __rows".to_string());
    cols.push(match &source.spec.arrival_time {
        Some(a) => format!(
            "COUNT(*) FILTER (WHERE {}) AS __ahead",
            event_after_arrival(&source.spec.event_time, a, schema)
        ),
        None => "CAST(0 AS BIGINT) AS __ahead".to_string(),
    });
    cols.extend(layout.columns.iter().cloned());
    // The values of each distinct-value tile, as a list per tile row: [`write_split`]
    // writes them out as that tile's (key, t, a, value) rows, without duplicates, so the
    // raw rows are read and de-duplicated once for all the tiles of a partition.
    // (`array_agg(DISTINCT ...)` would keep one hash set per group; DataFusion 55 has no
    // grouped accumulator for it.)
    for (i, e, f) in &layout.distinct {
        let wh = f
            .as_ref()
            .map(|f| format!(" AND ({f})"))
            .unwrap_or_default();
        cols.push(format!(
            "array_agg({e}) FILTER (WHERE __key IS NOT NULL AND {e} IS NOT NULL{wh}) AS {}",
            distinct_list_column(*i)
        ));
    }
    format!(
        "SELECT {} FROM ({}) GROUP BY __part, __key, __t, __a ORDER BY __part, __key",
        cols.join(", "),
        rows_sql(pipeline, source, days, names_are_dates, schema)
    )
}

/// Raw values of a timestamp of unit `u` in one second.
fn units_per_second(u: TimeUnit) -> i64 {
    match u {
        TimeUnit::Second => 1,
        TimeUnit::Millisecond => 1_000,
        TimeUnit::Microsecond => 1_000_000,
        TimeUnit::Nanosecond => 1_000_000_000,
    }
}

/// SQL: event time `ev` is after arrival time `arr` by more than the tolerance
/// ([`CLOCK_SKEW_TOLERANCE_SECS`]). When `schema` shows both as timestamps of one unit,
/// their raw values are compared: adding an interval to a timestamp goes through calendar
/// arithmetic row by row, which cost about 7% of building the benchmark's tiles (`perf`,
/// docs/benchmarks.md).
fn event_after_arrival(ev: &str, arr: &str, schema: Option<&Schema>) -> String {
    let unit = |c: &str| match schema?.field_with_name(c).ok()?.data_type() {
        DataType::Timestamp(u, _) => Some(*u),
        _ => None,
    };
    match (unit(ev), unit(arr)) {
        (Some(u), Some(v)) if u == v => {
            let per_second = units_per_second(u);
            format!(
                "CAST({} AS BIGINT) - CAST({} AS BIGINT) > {}",
                ident(ev),
                ident(arr),
                CLOCK_SKEW_TOLERANCE_SECS * per_second
            )
        }
        _ => format!(
            "{} > {} + INTERVAL '{CLOCK_SKEW_TOLERANCE_SECS} seconds'",
            ident(ev),
            ident(arr)
        ),
    }
}

/// The column of [`tile_sql`] holding, per tile row, the values of distinct-value tile
/// `feature`.
fn distinct_list_column(feature: usize) -> String {
    format!("__dv{feature}")
}

/// What a distinct-value tile of partitions `days` holds, as SQL: [`tile_sql`] computes it
/// (its `__dv` lists) and this query gives the files' schema (`names_are_dates` as for
/// [`tile_sql`]).
pub fn distinct_sql(
    pipeline: &Pipeline,
    source: &Source,
    expr: &str,
    filter: &Option<String>,
    days: &[NaiveDate],
    names_are_dates: bool,
) -> String {
    let wh = filter
        .as_ref()
        .map(|f| format!(" AND ({f})"))
        .unwrap_or_default();
    format!(
        "SELECT DISTINCT __part, __key, __t, __a, {expr} AS __v FROM ({}) WHERE __key IS NOT NULL AND {expr} IS NOT NULL{wh} ORDER BY __part, __key",
        rows_sql(pipeline, source, days, names_are_dates, None)
    )
}

/// Runs `sql` (whose first column is the partition `__part`, rows ordered by it) and
/// writes the rows of each of `days` without that column to `dir/dt=D/part-0.parquet`,
/// each through staging and rename. Days without rows get an empty file. On an error the
/// file being written is dropped; files already published are whole (their fingerprints
/// are not written yet, so they are rebuilt next time). Returns, per day, the [`Ignored`]
/// rows the written rows count (zero where the rows have no `__key`, `__rows`, `__ahead`).
///
/// When the plan's parallel streams each hold whole partitions (hash-partitioned on
/// `__part`, each sorted), they are written side by side instead of merged into one
/// stream first: the merge would let only one of them run at a time, and one writer
/// would encode every file.
///
/// Each of `lists` names a list column of the query (one list per row, ordered by nothing)
/// written instead to its own day files as rows of (`__key`, `__t`, `__a`, value), each
/// value once per row, with the given schema (the distinct-value tiles).
pub(crate) async fn write_split(
    ctx: &SessionContext,
    sql: &str,
    out: &Location,
    dir: &StorePath,
    days: &[NaiveDate],
    lists: &[ListOutput],
) -> Result<BTreeMap<NaiveDate, Ignored>, BuildError> {
    let first = days[0];
    let engine = |source| BuildError::Engine { day: first, source };
    // Plans keep an existing hash partitioning whenever it is on a subset of the columns
    // an operator needs (DataFusion does so only from 4 partitions on, by default): a tile
    // query's de-duplication already partitions its rows by raw partition, so the grouping
    // by (partition, key, days) after it needs no second shuffle and streams in the
    // de-duplication's order (measured in docs/benchmarks.md). Set on a copy of the
    // session's state, for this query only.
    let mut state = ctx.state();
    state
        .config_mut()
        .options_mut()
        .optimizer
        .subset_repartition_threshold = 1;
    let logical = state.create_logical_plan(sql).await.map_err(engine)?;
    let plan = state.create_physical_plan(&logical).await.map_err(engine)?;
    let task = state.task_ctx();
    let full = plan.schema();
    let mut outputs = Vec::new();
    for l in lists {
        let index = |name: &str| full.index_of(name).map_err(|e| engine(e.into()));
        outputs.push(Output {
            shape: Shape::Unnest {
                list: index(&l.column)?,
                parents: [index("__key")?, index("__t")?, index("__a")?],
            },
            dir: l.dir.clone(),
            schema: l.schema.clone(),
        });
    }
    let listed: BTreeSet<usize> = outputs
        .iter()
        .filter_map(|o| match o.shape {
            Shape::Unnest { list, .. } => Some(list),
            Shape::Columns(_) => None,
        })
        .collect();
    let keep: Vec<usize> = (1..full.fields().len())
        .filter(|i| !listed.contains(i))
        .collect();
    let schema = Arc::new(full.project(&keep).map_err(|e| engine(e.into()))?);
    outputs.insert(
        0,
        Output {
            shape: Shape::Columns(keep),
            dir: dir.clone(),
            schema: schema.clone(),
        },
    );
    let outputs = Arc::new(outputs);
    let streams = match whole_partitions_per_stream(&plan) {
        Some(input) => (0
            ..datafusion::physical_plan::ExecutionPlanProperties::output_partitioning(&input)
                .partition_count())
            .map(|i| input.execute(i, task.clone()))
            .collect::<datafusion::error::Result<Vec<_>>>(),
        None => datafusion::physical_plan::execute_stream(plan, task).map(|s| vec![s]),
    }
    .map_err(engine)?;
    let allowed: Arc<BTreeSet<NaiveDate>> = Arc::new(days.iter().copied().collect());
    let tasks: Vec<_> = streams
        .into_iter()
        .map(|stream| {
            let split = Split {
                outputs: outputs.clone(),
                out: out.clone(),
                allowed: allowed.clone(),
                first,
            };
            tokio::spawn(split.write(stream))
        })
        .collect();
    let mut ignored: BTreeMap<NaiveDate, Ignored> =
        days.iter().map(|d| (*d, Ignored::default())).collect();
    let mut pending: BTreeSet<NaiveDate> = allowed.as_ref().clone();
    let mut failed = None;
    for t in tasks {
        let written = t.await.unwrap_or_else(|e| {
            Err(engine(datafusion::error::DataFusionError::External(
                Box::new(e),
            )))
        });
        match written {
            Ok(per_day) => {
                for (day, n) in per_day {
                    if !pending.remove(&day) {
                        failed.get_or_insert(engine(datafusion::error::DataFusionError::Internal(
                            format!("tile rows of partition {day} came in two streams"),
                        )));
                    }
                    ignored.insert(day, n);
                }
            }
            Err(e) => {
                failed.get_or_insert(e);
            }
        }
    }
    if let Some(e) = failed {
        return Err(e);
    }
    for day in pending {
        for o in outputs.iter() {
            o.writer(out, day)?.finish(None).await?;
        }
    }
    Ok(ignored)
}

/// A list column of a [`write_split`] query written out as rows of its own files.
pub(crate) struct ListOutput {
    /// The list column.
    pub column: String,
    /// Folder of its day files.
    pub dir: StorePath,
    /// Schema of its files: `__key`, `__t`, `__a`, then the values' column.
    pub schema: datafusion::arrow::datatypes::SchemaRef,
}

/// How an output's rows come from the query's rows.
enum Shape {
    /// These columns, row for row.
    Columns(Vec<usize>),
    /// One row per distinct value of list column `list`, with the row's `parents` columns.
    Unnest { list: usize, parents: [usize; 3] },
}

/// One set of day files [`write_split`] writes.
struct Output {
    shape: Shape,
    dir: StorePath,
    schema: datafusion::arrow::datatypes::SchemaRef,
}

impl Output {
    fn writer(
        &self,
        out: &Location,
        day: NaiveDate,
    ) -> Result<crate::build::DayWriter, BuildError> {
        crate::build::DayWriter::direct(
            out,
            child(&self.dir, &[&format!("dt={day}"), "part-0.parquet"]),
            day,
            self.schema.clone(),
            crate::build::tile_writer_properties(),
        )
    }

    /// Rows `run` of `batch` as this output's rows. `encoded`: the list column's values
    /// in arrow's row format (compared as bytes to drop repeated values of one row).
    fn rows(
        &self,
        batch: &RecordBatch,
        run: std::ops::Range<usize>,
        encoded: Option<&datafusion::arrow::row::Rows>,
    ) -> datafusion::error::Result<RecordBatch> {
        use datafusion::arrow::array::{Array, AsArray, UInt32Array};
        use datafusion::arrow::compute::{cast, take};
        match &self.shape {
            Shape::Columns(keep) => Ok(batch.project(keep)?.slice(run.start, run.len())),
            Shape::Unnest { list, parents } => {
                let lists = batch.column(*list).as_list::<i32>();
                let offsets = lists.value_offsets();
                let (mut parent, mut value) = (Vec::new(), Vec::new());
                let mut one: Vec<u32> = Vec::new();
                for r in run {
                    if lists.is_null(r) {
                        continue;
                    }
                    one.clear();
                    one.extend(offsets[r] as u32..offsets[r + 1] as u32);
                    if let Some(rows) = encoded {
                        one.sort_unstable_by(|a, b| {
                            rows.row(*a as usize).cmp(&rows.row(*b as usize))
                        });
                        one.dedup_by(|a, b| rows.row(*a as usize) == rows.row(*b as usize));
                    }
                    parent.extend(std::iter::repeat_n(r as u32, one.len()));
                    value.extend_from_slice(&one);
                }
                let (parent, value) = (UInt32Array::from(parent), UInt32Array::from(value));
                let mut columns = Vec::with_capacity(4);
                for c in parents {
                    columns.push(take(batch.column(*c), &parent, None)?);
                }
                columns.push(take(lists.values(), &value, None)?);
                let columns = columns
                    .iter()
                    .zip(self.schema.fields())
                    .map(|(c, f)| cast(c, f.data_type()))
                    .collect::<std::result::Result<Vec<_>, _>>()?;
                Ok(RecordBatch::try_new(self.schema.clone(), columns)?)
            }
        }
    }
}

/// The input of `plan`'s final merge when each of its streams holds whole `__part`
/// partitions (hash-partitioned on the first column, which is `__part`) in order.
fn whole_partitions_per_stream(
    plan: &Arc<dyn datafusion::physical_plan::ExecutionPlan>,
) -> Option<Arc<dyn datafusion::physical_plan::ExecutionPlan>> {
    use datafusion::physical_expr::expressions::Column;
    use datafusion::physical_plan::sorts::sort_preserving_merge::SortPreservingMergeExec;
    use datafusion::physical_plan::{ExecutionPlanProperties, Partitioning};
    let merge = plan.downcast_ref::<SortPreservingMergeExec>()?;
    let first_sort = merge.expr().first().expr.clone();
    let on_part = |e: &Arc<dyn datafusion::physical_expr::PhysicalExpr>| {
        e.downcast_ref::<Column>().is_some_and(|c| c.index() == 0)
    };
    match merge.input().output_partitioning() {
        Partitioning::Hash(exprs, _) if exprs.len() == 1 && on_part(&exprs[0]) => {
            on_part(&first_sort).then(|| merge.input().clone())
        }
        _ => None,
    }
}

/// One stream of [`write_split`]: its rows, split into day files as they come.
struct Split {
    /// The main files first, then the unnested lists.
    outputs: Arc<Vec<Output>>,
    out: Location,
    allowed: Arc<BTreeSet<NaiveDate>>,
    first: NaiveDate,
}

impl Split {
    /// Writes the stream's days; returns each day written with its [`Ignored`] rows.
    async fn write(
        self,
        mut stream: datafusion::execution::SendableRecordBatchStream,
    ) -> Result<BTreeMap<NaiveDate, Ignored>, BuildError> {
        // The writers of the day being written, one per output; the files of earlier days
        // still being closed and put.
        let mut current: Vec<crate::build::DayWriter> = Vec::new();
        let mut closing = tokio::task::JoinSet::new();
        let mut done = BTreeMap::new();
        let streamed = self
            .stream_into(&mut stream, &mut current, &mut closing, &mut done)
            .await;
        let mut failed = match streamed {
            Ok(()) => {
                let mut closed = Ok(());
                for w in current {
                    if closed.is_ok() {
                        closed = close_in_background(&mut closing, w, self.first).await;
                    } else {
                        w.abandon().await;
                    }
                }
                closed.err()
            }
            Err(e) => {
                for w in current {
                    w.abandon().await;
                }
                Some(e)
            }
        };
        // Every file handed off is left to land, on failure too (a put cut off halfway
        // could leave its temporary parts behind; a tile without its marker is rebuilt by
        // the next build).
        while let Some(closed) = closing.join_next().await {
            if let Err(e) = joined(closed, self.first) {
                failed.get_or_insert(e);
            }
        }
        match failed {
            Some(e) => Err(e),
            None => Ok(done),
        }
    }

    async fn stream_into(
        &self,
        stream: &mut datafusion::execution::SendableRecordBatchStream,
        current: &mut Vec<crate::build::DayWriter>,
        closing: &mut Closing,
        done: &mut BTreeMap<NaiveDate, Ignored>,
    ) -> Result<(), BuildError> {
        use datafusion::arrow::array::{Array, AsArray};
        use datafusion::arrow::datatypes::Int64Type;
        use futures::StreamExt;
        let engine = |source| BuildError::Engine {
            day: self.first,
            source,
        };
        let internal = |text: String| engine(datafusion::error::DataFusionError::Internal(text));
        let main = &self.outputs[0];
        let counted = ["__key", "__rows", "__ahead"].map(|c| main.schema.index_of(c).ok());
        while let Some(batch) = stream.next().await {
            let batch = batch.map_err(engine)?;
            // The partition of each row as a day number (tile and roll-up queries give it
            // as a date; text would be parsed by the cast).
            let parts = datafusion::arrow::compute::cast(batch.column(0), &DataType::Date32)
                .map_err(|e| engine(e.into()))?;
            let parts = parts.as_primitive::<datafusion::arrow::datatypes::Date32Type>();
            if parts.null_count() > 0 {
                return Err(internal("a tile row without a partition".into()));
            }
            let parts = parts.values();
            let body = match &main.shape {
                Shape::Columns(keep) => batch.project(keep).map_err(|e| engine(e.into()))?,
                Shape::Unnest { .. } => return Err(internal("the main tile is unnested".into())),
            };
            // Each list column's values in arrow's row format, to find repeated values.
            let mut encoded = Vec::with_capacity(self.outputs.len());
            for o in self.outputs.iter() {
                encoded.push(match o.shape {
                    Shape::Unnest { list, .. } => {
                        let values = batch.column(list).as_list::<i32>().values().clone();
                        let converter = datafusion::arrow::row::RowConverter::new(vec![
                            datafusion::arrow::row::SortField::new(values.data_type().clone()),
                        ])
                        .map_err(|e| engine(e.into()))?;
                        Some(
                            converter
                                .convert_columns(&[values])
                                .map_err(|e| engine(e.into()))?,
                        )
                    }
                    Shape::Columns(_) => None,
                });
            }
            for run in crate::build::equal_runs(batch.num_rows(), |a, b| parts[a] == parts[b]) {
                let n = parts[run.start];
                let day = datafusion::arrow::datatypes::Date32Type::to_naive_date_opt(n)
                    .ok_or_else(|| internal(format!("tile partition {n} is not a date")))?;
                if current.first().map(|w| w.day()) != Some(day) {
                    for w in current.drain(..) {
                        close_in_background(closing, w, self.first).await?;
                    }
                    if !self.allowed.contains(&day) || done.contains_key(&day) {
                        return Err(internal(format!(
                            "tile rows of partition {day} arrived out of order"
                        )));
                    }
                    done.insert(day, Ignored::default());
                    for o in self.outputs.iter() {
                        current.push(o.writer(&self.out, day)?);
                    }
                }
                if let [Some(k), Some(r), Some(a)] = counted {
                    let (key, rows, ahead) = (body.column(k), body.column(r), body.column(a));
                    if let (Some(rows), Some(ahead)) = (
                        rows.as_primitive_opt::<Int64Type>(),
                        ahead.as_primitive_opt::<Int64Type>(),
                    ) {
                        let n = done.entry(day).or_default();
                        for i in run.clone() {
                            if key.is_null(i) {
                                n.null_key_rows += rows.value(i) as u64;
                            }
                            n.event_after_arrival_rows += ahead.value(i) as u64;
                        }
                    }
                }
                for ((o, w), enc) in self.outputs.iter().zip(current.iter_mut()).zip(&encoded) {
                    let rows = o.rows(&batch, run.clone(), enc.as_ref()).map_err(engine)?;
                    if rows.num_rows() > 0 {
                        w.write(&rows).await?;
                    }
                }
            }
        }
        Ok(())
    }
}

/// Day files of a [`Split`] being closed and put.
type Closing = tokio::task::JoinSet<Result<(), BuildError>>;

/// How many finished day files one [`Split`] closes and puts while it goes on with the
/// next days. Closing a file encodes its last pages, and a put creates a folder and a file:
/// done in line, the stream waited on the file system for each of the thousands of small
/// files a backfill writes (docs/benchmarks.md, twenty-seventh measurement).
const CLOSING_AT_ONCE: usize = 4;

/// Closes and puts `w` in a task of its own, after waiting for the oldest file when
/// [`CLOSING_AT_ONCE`] are in flight.
async fn close_in_background(
    closing: &mut Closing,
    w: crate::build::DayWriter,
    first: NaiveDate,
) -> Result<(), BuildError> {
    while closing.len() >= CLOSING_AT_ONCE {
        if let Some(closed) = closing.join_next().await {
            joined(closed, first)?;
        }
    }
    closing.spawn(async move { w.finish(None).await.map(|_| ()) });
    Ok(())
}

/// The result of a closing task (a task that panicked is an engine error of `day`, the
/// query's first day, as in [`write_split`]).
fn joined(
    closed: Result<Result<(), BuildError>, tokio::task::JoinError>,
    day: NaiveDate,
) -> Result<(), BuildError> {
    closed.unwrap_or_else(|e| {
        Err(BuildError::Engine {
            day,
            source: datafusion::error::DataFusionError::External(Box::new(e)),
        })
    })
}

/// Raw rows of a partition that no snapshot uses (a null key) or that look wrong (event
/// time after arrival time beyond [`CLOCK_SKEW_TOLERANCE_SECS`]), among its de-duplicated
/// rows. Counted while its tile is written and kept in the tile's marker, so a build
/// reports them for every partition it depends on without reading the tiles again.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Ignored {
    /// Rows with a null key (left out of every snapshot).
    pub null_key_rows: u64,
    /// Rows whose event time is after their arrival time beyond the tolerance.
    pub event_after_arrival_rows: u64,
}

impl Ignored {
    /// Adds `other`'s counts.
    pub fn add(&mut self, other: &Ignored) {
        self.null_key_rows += other.null_key_rows;
        self.event_after_arrival_rows += other.event_after_arrival_rows;
    }
}

/// What a tile's marker (`_inputs.json`, written after the tile) keeps: the fingerprint of
/// the raw files the tile was built from, and the rows they held that were ignored.
#[derive(Debug, serde::Serialize, serde::Deserialize)]
struct Marker {
    inputs: serde_json::Value,
    #[serde(flatten)]
    ignored: Ignored,
}

/// What building tiles cost.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TileStats {
    /// Raw partitions whose tiles were built (or rebuilt).
    pub partitions_built: u64,
    /// Partitions whose stored tiles were still current and were read (a daily build also
    /// checks the markers of the other partitions its windows cover, for their ignored-row
    /// counts, without counting them here).
    pub partitions_reused: u64,
    /// Raw files read.
    pub raw_files: u64,
    /// Raw bytes read (sizes of the files read).
    pub raw_bytes: u64,
    /// Rows of the partitions the build covers that were ignored (null key) or look
    /// wrong (clock skew).
    pub ignored: Ignored,
    /// Week and month roll-ups built (or rebuilt) ([`crate::rollups`]).
    pub rollups_built: u64,
    /// Roll-ups whose stored copy was still current.
    pub rollups_reused: u64,
    /// Tile markers read one by one, for partitions the folder's marker index
    /// ([`MarkerIndex`]) did not hold as current.
    pub markers_read: u64,
}

impl TileStats {
    /// Adds `other` to these counts.
    pub fn add(&mut self, other: &TileStats) {
        self.partitions_built += other.partitions_built;
        self.partitions_reused += other.partitions_reused;
        self.raw_files += other.raw_files;
        self.raw_bytes += other.raw_bytes;
        self.ignored.add(&other.ignored);
        self.rollups_built += other.rollups_built;
        self.rollups_reused += other.rollups_reused;
        self.markers_read += other.markers_read;
    }
}

/// Makes sure the tiles every one of `days` needs exist and are current, then registers
/// them as tables. Each raw partition is read at most once, and not at all when its stored
/// tile is current. Returns what it cost, per source.
pub async fn prepare(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    reports: &BTreeMap<String, SourceReport>,
    layouts: &BTreeMap<String, TileLayout>,
    out: &Location,
    days: &[NaiveDate],
    mode: crate::sql::KnowledgeOverride,
) -> Result<BTreeMap<String, TileStats>, BuildError> {
    let mut needed: BTreeMap<String, BTreeSet<NaiveDate>> = BTreeMap::new();
    for day in days {
        for (source, read) in crate::sql::snapshot_query(pipeline, *day, mode).reads {
            let r = &reports[&source];
            let set = needed.entry(source).or_default();
            let first = read.first_day.or(r.range().map(|x| x.0));
            for d in r.listing.days.keys() {
                if first.is_none_or(|f| *d >= f) && *d <= read.last_day {
                    set.insert(*d);
                }
            }
        }
    }
    let mut stats = BTreeMap::new();
    for (source, layout) in layouts {
        let Some(set) = needed.get(source) else {
            continue;
        };
        let (mut s, ignored) =
            ensure_tiles(ctx, pipeline, &reports[source], layout, out, set).await?;
        let mut total = Ignored::default();
        for n in ignored.values() {
            total.add(n);
        }
        s.ignored = total;
        if set.is_empty() {
            stats.insert(source.clone(), s);
            continue;
        }
        let mut tables = vec![(layout.dir(out), layout.table(), layout.aliases.as_slice())];
        for (i, _, _) in &layout.distinct {
            tables.push((layout.distinct_dir(out, *i), layout.distinct_table(*i), &[]));
        }
        for (dir, table, aliases) in tables {
            register_tiles(ctx, out, &dir, &table, aliases)
                .await
                .map_err(|e| BuildError::Engine {
                    day: days[0],
                    source: e,
                })?;
        }
        stats.insert(source.clone(), s);
    }
    Ok(stats)
}

pub(crate) fn fingerprint(files: &[DataFile]) -> serde_json::Value {
    json!(files
        .iter()
        .map(|f| json!({"path": f.path.to_string(), "size": f.size, "modified": f.modified.to_rfc3339(), "etag": f.etag}))
        .collect::<Vec<_>>())
}

/// Appends the canonical JSON of [`fingerprint`]`(files)` to `out`, written directly: the
/// same text (so the same hashes) without building the value. Daily builds hash the
/// fingerprints of every raw file a roll-up covers, and building them as values first
/// took about a sixth of a daily build (docs/benchmarks.md, twenty-fourth measurement).
pub(crate) fn write_fingerprint(files: &[DataFile], out: &mut Vec<u8>) {
    // Keys in sorted order, as canonical JSON has them.
    let text = |out: &mut Vec<u8>, s: &str| {
        // Writing a string into a Vec cannot fail.
        let _ = serde_json::to_writer(&mut *out, s);
    };
    out.push(b'[');
    for (i, f) in files.iter().enumerate() {
        if i > 0 {
            out.push(b',');
        }
        out.extend_from_slice(b"{\"etag\":");
        match &f.etag {
            Some(e) => text(out, e),
            None => out.extend_from_slice(b"null"),
        }
        out.extend_from_slice(b",\"modified\":");
        text(out, &f.modified.to_rfc3339());
        out.extend_from_slice(b",\"path\":");
        text(out, f.path.as_ref());
        out.extend_from_slice(b",\"size\":");
        out.extend_from_slice(f.size.to_string().as_bytes());
        out.push(b'}');
    }
    out.push(b']');
}

/// The hash of [`fingerprint`]`(files)`, as [`hash_value`] gives it.
pub(crate) fn fingerprint_hash(files: &[DataFile]) -> String {
    let mut text = Vec::with_capacity(files.len() * 160);
    write_fingerprint(files, &mut text);
    daymark_spec::hash::hash_canonical(&text)
}

/// SQL conditions selecting tile partitions `first..=last` (`dt`; no lower bound without
/// `first`).
pub(crate) fn partitions_between(first: Option<NaiveDate>, last: NaiveDate) -> Vec<String> {
    let mut conds = vec![format!("dt <= {}", literal(&last.to_string()))];
    if let Some(f) = first {
        conds.push(format!("dt >= {}", literal(&f.to_string())));
    }
    conds
}

/// Runs `sql` to the end; an error is reported against snapshot `day`.
pub(crate) async fn collect(
    ctx: &SessionContext,
    sql: &str,
    day: NaiveDate,
) -> Result<Vec<datafusion::arrow::array::RecordBatch>, BuildError> {
    let engine = |source| BuildError::Engine { day, source };
    ctx.sql(sql)
        .await
        .map_err(engine)?
        .collect()
        .await
        .map_err(engine)
}

/// The aggregate function of first/last feature `i` over partial rows (tile rows, pieces)
/// and the order it takes them in, as its arguments after the value ([`crate::latest`]):
/// event time, then arrival time where the source has one, then value (the naive path's
/// order).
pub(crate) fn first_last_of_partials(
    agg: Aggregation,
    i: usize,
    has_arrival: bool,
) -> (&'static str, String) {
    let func = if agg == Aggregation::First {
        crate::latest::EARLIEST
    } else {
        crate::latest::LATEST
    };
    let order = if has_arrival {
        format!("__vt{i}, __va{i}, __v{i}")
    } else {
        format!("__vt{i}, __v{i}")
    };
    (func, order)
}

/// Where the fingerprint of partition `day`'s tile is kept.
fn marker_path(layout: &TileLayout, out: &Location, day: NaiveDate) -> StorePath {
    child(&layout.dir(out), &[&format!("dt={day}"), "_inputs.json"])
}

/// Most raw partitions one tile query reads: every query lists and prunes all of the
/// source's partitions and plans again, a fixed cost that dominated long backfills when
/// it was paid per partition (measured: 1,316 small partitions took 11 s one per query,
/// 6 s in batches of 64); a year of small partitions fits in one query.
const PARTITIONS_PER_QUERY: usize = 366;
/// Most raw bytes one tile query reads (a batch ends at whichever bound comes first), so
/// that a failure loses little work and large partitions still come in several queries.
const BYTES_PER_QUERY: u64 = 256 << 20;

/// Raw bytes per tile query under the session's memory limit: an eighth of it (compressed
/// Parquet grows several times when decoded, and the batch's sort keeps merge buffers
/// that cannot spill), at most [`BYTES_PER_QUERY`].
fn bytes_per_query(ctx: &SessionContext) -> u64 {
    use datafusion::execution::memory_pool::MemoryLimit;
    match ctx.runtime_env().memory_pool.memory_limit() {
        MemoryLimit::Finite(limit) => (limit as u64 / 8).min(BYTES_PER_QUERY),
        _ => BYTES_PER_QUERY,
    }
}

/// How many tile markers are read or written at once (each is a small object; on a remote store the
/// latency of one request dominates).
const MARKERS_AT_ONCE: usize = 32;

/// The marker of partition `day`'s tile, if there is one in the current format.
async fn read_marker(layout: &TileLayout, out: &Location, day: NaiveDate) -> Option<Marker> {
    let stored = out.store.get(&marker_path(layout, out, day)).await.ok()?;
    let bytes = stored.bytes().await.ok()?;
    serde_json::from_slice(&bytes).ok()
}

/// Version of [`MarkerIndex`]'s file; another version is ignored (and rewritten).
const MARKER_INDEX_FORMAT: u32 = 1;

/// Every current marker of a tile folder in one object (`_markers.json` in the folder),
/// so that a daily build checks a source's hundreds of partitions with one read instead
/// of one read per partition (on an object store, one request each). The markers stay the
/// record: an entry is written only after the tile and marker it stands for, and a
/// partition whose entry is missing or whose files' fingerprint no longer matches it has
/// its own marker read (and is rebuilt when that does not match either), so a stale or
/// lost index costs reads, never a wrong tile.
#[derive(Debug, Default, serde::Serialize, serde::Deserialize)]
struct MarkerIndex {
    format: u32,
    /// Per partition (`YYYY-MM-DD`): the hash of its files' fingerprint, and its ignored
    /// rows.
    days: BTreeMap<String, IndexEntry>,
    /// Entries added or replaced since it was read.
    #[serde(skip)]
    changed: bool,
}

impl MarkerIndex {
    /// Records partition `day`'s current marker: the hash of its files' fingerprint and
    /// its ignored rows.
    fn record(&mut self, day: NaiveDate, inputs: String, ignored: Ignored) {
        self.days
            .insert(day.to_string(), IndexEntry { inputs, ignored });
        self.changed = true;
    }
}

#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
struct IndexEntry {
    inputs: String,
    #[serde(flatten)]
    ignored: Ignored,
}

/// What [`ensure_tiles`] found of one partition: its files and their fingerprint (and its
/// hash), its ignored rows when its tile is current, and whether its marker was read.
struct Check<'a> {
    day: NaiveDate,
    files: &'a [DataFile],
    /// The fingerprint, where the marker was read.
    inputs: Option<serde_json::Value>,
    hash: String,
    current: Option<Ignored>,
    read: bool,
}

fn marker_index_path(layout: &TileLayout, out: &Location) -> StorePath {
    child(&layout.dir(out), &["_markers.json"])
}

/// The folder's marker index (empty when there is none, or it is unreadable or of another
/// format).
async fn read_marker_index(layout: &TileLayout, out: &Location) -> MarkerIndex {
    let read = async {
        let bytes = out
            .store
            .get(&marker_index_path(layout, out))
            .await
            .ok()?
            .bytes()
            .await
            .ok()?;
        serde_json::from_slice::<MarkerIndex>(&bytes).ok()
    };
    read.await
        .filter(|i| i.format == MARKER_INDEX_FORMAT)
        .unwrap_or_default()
}

/// Builds the tiles of `source` for `days` that are missing or stale, many partitions per
/// query. Returns what it cost and, for every one of `days` that has a raw partition, the
/// rows it held that were ignored (from the marker of a current tile, or counted while
/// building it).
pub async fn ensure_tiles(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    report: &SourceReport,
    layout: &TileLayout,
    out: &Location,
    days: &BTreeSet<NaiveDate>,
) -> Result<(TileStats, BTreeMap<NaiveDate, Ignored>), BuildError> {
    use futures::StreamExt;
    let source = &pipeline.sources[&layout.source];
    let mut stats = TileStats::default();
    let mut ignored = BTreeMap::new();
    let mut index = read_marker_index(layout, out).await;
    // Partitions the index holds as current need no read; the others' markers are read,
    // many at once.
    let checks: Vec<Check> = futures::stream::iter(
        days.iter()
            .filter_map(|d| report.listing.days.get(d).map(|f| (*d, f.as_slice()))),
    )
    .map(|(day, files)| {
        let hash = fingerprint_hash(files);
        let indexed = index
            .days
            .get(&day.to_string())
            .filter(|e| e.inputs == hash)
            .map(|e| e.ignored);
        async move {
            // The fingerprint itself only where a marker must be read (or, below, written).
            let (current, read, inputs) = match indexed {
                Some(ignored) => (Some(ignored), false, None),
                None => {
                    let inputs = fingerprint(files);
                    let current = read_marker(layout, out, day)
                        .await
                        .filter(|m| m.inputs == inputs)
                        .map(|m| m.ignored);
                    (current, true, Some(inputs))
                }
            };
            Check {
                day,
                files,
                inputs,
                hash,
                current,
                read,
            }
        }
    })
    .buffered(MARKERS_AT_ONCE)
    .collect()
    .await;
    // (day, raw files, fingerprint) of every partition whose tile must be (re)built.
    let mut stale: Vec<(NaiveDate, &[DataFile], serde_json::Value)> = Vec::new();
    let mut hashes: BTreeMap<NaiveDate, String> = BTreeMap::new();
    for Check {
        day,
        files,
        inputs,
        hash,
        current,
        read,
    } in checks
    {
        stats.markers_read += read as u64;
        match current {
            Some(n) => {
                stats.partitions_reused += 1;
                ignored.insert(day, n);
                if read {
                    index.record(day, hash, n);
                }
            }
            None => {
                hashes.insert(day, hash);
                stale.push((day, files, inputs.unwrap_or_else(|| fingerprint(files))));
            }
        }
    }
    // A folder that is not a partition (the listing ignored it) could fall inside a range
    // of partition names: such sources are read with a list of partitions.
    let names_are_dates = report.listing.ignored.is_empty();
    let mut batches: Vec<&[(NaiveDate, &[DataFile], serde_json::Value)]> = Vec::new();
    let budget = bytes_per_query(ctx);
    let mut rest = &stale[..];
    while !rest.is_empty() {
        let (mut n, mut bytes) = (0, 0u64);
        while n < rest.len() && n < PARTITIONS_PER_QUERY {
            let b: u64 = rest[n].1.iter().map(|f| f.size).sum();
            if n > 0 && bytes + b > budget {
                break;
            }
            bytes += b;
            n += 1;
        }
        batches.push(&rest[..n]);
        rest = &rest[n..];
    }
    // The files' schema of each distinct-value tile, from planning the query that
    // defines its rows.
    let mut lists = Vec::new();
    if let Some((first, _, _)) = stale.first() {
        for (i, expr, filter) in &layout.distinct {
            let sql = distinct_sql(pipeline, source, expr, filter, &[*first], names_are_dates);
            let engine = |e| BuildError::Engine {
                day: *first,
                source: e,
            };
            let plan = ctx
                .state()
                .create_logical_plan(&sql)
                .await
                .map_err(engine)?;
            let full = plan.schema().as_arrow();
            let keep: Vec<usize> = (1..full.fields().len()).collect();
            lists.push(ListOutput {
                column: distinct_list_column(*i),
                dir: layout.distinct_dir(out, *i),
                schema: Arc::new(full.project(&keep).map_err(|e| engine(e.into()))?),
            });
        }
    }
    for batch in batches {
        let batch_days: Vec<NaiveDate> = batch.iter().map(|(d, _, _)| *d).collect();
        let counted = write_split(
            ctx,
            &tile_sql(
                pipeline,
                source,
                layout,
                &batch_days,
                names_are_dates,
                report.schema.as_deref(),
            ),
            out,
            &layout.dir(out),
            &batch_days,
            &lists,
        )
        .await?;
        crate::session::release_free_memory();
        // Markers are written last (a crash before one leaves its tile to be rebuilt), many
        // at once: each is a small object, and one at a time they took ~4 ms each, seconds
        // for a backfill over a thousand small partitions.
        let written: Vec<Result<(NaiveDate, Ignored), BuildError>> =
            futures::stream::iter(batch.iter().map(|(day, _, inputs)| {
                let marker = Marker {
                    inputs: inputs.clone(),
                    ignored: counted.get(day).copied().unwrap_or_default(),
                };
                let path = marker_path(layout, out, *day);
                async move {
                    let body = PutPayload::from(serde_json::to_vec(&marker).unwrap_or_default());
                    out.store
                        .put(&path, body)
                        .await
                        .map_err(|e| BuildError::Write {
                            day: *day,
                            path: path.to_string(),
                            reason: e.to_string(),
                        })?;
                    Ok((*day, marker.ignored))
                }
            }))
            .buffer_unordered(MARKERS_AT_ONCE)
            .collect()
            .await;
        for w in written {
            let (day, n) = w?;
            ignored.insert(day, n);
            if let Some(hash) = hashes.remove(&day) {
                index.record(day, hash, n);
            }
        }
        for (_, files, _) in batch {
            stats.partitions_built += 1;
            stats.raw_files += files.len() as u64;
            stats.raw_bytes += files.iter().map(|f| f.size).sum::<u64>();
        }
    }
    if index.changed {
        // After every tile and marker it stands for. A failed write only means the next
        // build reads those markers one by one again.
        index.format = MARKER_INDEX_FORMAT;
        if let Ok(body) = serde_json::to_vec(&index) {
            let _ = out
                .store
                .put(&marker_index_path(layout, out), PutPayload::from(body))
                .await;
        }
    }
    Ok((stats, ignored))
}

/// Registers a folder of day-partitioned tile files as a table, with the columns
/// `aliases` names ([`TileLayout::aliases`]; none for distinct-value tiles and roll-ups).
pub async fn register_tiles(
    ctx: &SessionContext,
    out: &Location,
    dir: &StorePath,
    table: &str,
    aliases: &[(String, String)],
) -> datafusion::error::Result<()> {
    let url = ListingTableUrl::parse(format!("{}{}/", root_url(out), dir.as_ref()))?;
    let options =
        tile_options().with_table_partition_cols(vec![("dt".to_string(), DataType::Utf8)]);
    // A tile folder's files all have one schema (its layout's): a table registered again
    // over the same folder keeps the schema it had rather than reading every footer.
    let known = listing_of(ctx, table).await.and_then(|t| {
        t.downcast_ref::<ListingTable>()
            .filter(|l| l.table_paths().iter().any(|p| p.as_str() == url.as_str()))
            .map(TableProvider::schema)
    });
    let schema = match known {
        Some(s) if s.fields().len() > 1 => files_schema(&s),
        _ => match newest_file(out, dir).await? {
            // All files of a tile folder have its layout's schema: one footer tells it,
            // where inferring from the folder read every file's (1,340 footers for the
            // benchmark world's daily build, a number that grows with the history).
            Some(file) => {
                let file_url = ListingTableUrl::parse(format!("{}{}", root_url(out), file))?;
                options.infer_schema(&ctx.state(), &file_url).await?
            }
            None => options.infer_schema(&ctx.state(), &url).await?,
        },
    };
    replace_table(ctx, table, vec![url], options, schema, aliases)
}

/// Name of the listing table under tile table `table` when `table` is a view adding
/// aliases.
fn files_table(table: &str) -> String {
    format!("{table}__files")
}

/// The listing table that tile table `table` reads: `table` itself, or the one under it
/// when it is a view adding aliases.
pub async fn listing_of(ctx: &SessionContext, table: &str) -> Option<Arc<dyn TableProvider>> {
    for name in [table.to_string(), files_table(table)] {
        if let Ok(t) = ctx.table_provider(name.as_str()).await {
            if t.downcast_ref::<ListingTable>().is_some() {
                return Some(t);
            }
        }
    }
    None
}

/// Listing options of tile files (partition columns aside).
fn tile_options() -> ListingOptions {
    ListingOptions::new(Arc::new(
        ParquetFormat::default().with_force_view_types(false),
    ))
    .with_file_extension(".parquet")
}

/// A tile table's schema without its partition column `dt`, which is not in the files.
fn files_schema(
    table: &datafusion::arrow::datatypes::Schema,
) -> datafusion::arrow::datatypes::SchemaRef {
    Arc::new(datafusion::arrow::datatypes::Schema::new(
        table
            .fields()
            .iter()
            .filter(|f| f.name() != "dt")
            .cloned()
            .collect::<Vec<_>>(),
    ))
}

/// Registers `name` as a listing table over `urls`, in place of any table of that name;
/// with `aliases`, as a view over that listing table (registered as [`files_table`]) that
/// also shows each stored column under its alias names.
fn replace_table(
    ctx: &SessionContext,
    name: &str,
    urls: Vec<ListingTableUrl>,
    options: ListingOptions,
    schema: datafusion::arrow::datatypes::SchemaRef,
    aliases: &[(String, String)],
) -> datafusion::error::Result<()> {
    let config = ListingTableConfig::new_with_multi_paths(urls)
        .with_listing_options(options)
        .with_schema(schema);
    let listing: Arc<dyn TableProvider> = Arc::new(ListingTable::try_new(config)?);
    let _ = ctx.deregister_table(name);
    if aliases.is_empty() {
        ctx.register_table(name, listing)?;
        return Ok(());
    }
    let files = files_table(name);
    let _ = ctx.deregister_table(files.as_str());
    ctx.register_table(files.as_str(), Arc::clone(&listing))?;
    let column = |n: &str| Expr::Column(Column::new_unqualified(n));
    let items = listing
        .schema()
        .fields()
        .iter()
        .map(|f| column(f.name()))
        .chain(aliases.iter().map(|(n, stored)| column(stored).alias(n)))
        .collect::<Vec<_>>();
    // A view is inlined where a query names it (`LogicalPlanBuilder::scan`), so plans sent
    // to a cluster hold only the listing table and a projection.
    let plan = LogicalPlanBuilder::scan(
        TableReference::bare(files.as_str()),
        provider_as_source(listing),
        None,
    )?
    .project(items)?
    .build()?;
    ctx.register_table(name, Arc::new(ViewTable::new(plan, None)))?;
    Ok(())
}

/// The output store's root URL, ending with `/`.
fn root_url(out: &Location) -> String {
    let mut url = out.root_url.to_string();
    if !url.ends_with('/') {
        url.push('/');
    }
    url
}

/// A Parquet file of the newest `dt=` partition of tile folder `dir`, if any: two
/// listings of one level each, whatever the number of partitions.
async fn newest_file(
    out: &Location,
    dir: &StorePath,
) -> datafusion::error::Result<Option<StorePath>> {
    let top = match out.store.list_with_delimiter(Some(dir)).await {
        Ok(top) => top,
        Err(daymark_store::object_store::Error::NotFound { .. }) => return Ok(None),
        Err(e) => return Err(e.into()),
    };
    let mut parts: Vec<&StorePath> = top
        .common_prefixes
        .iter()
        .filter(|p| p.filename().is_some_and(|f| f.starts_with("dt=")))
        .collect();
    parts.sort();
    for part in parts.into_iter().rev() {
        let files = out.store.list_with_delimiter(Some(part)).await?;
        if let Some(f) = files
            .objects
            .iter()
            .find(|o| o.location.as_ref().ends_with(".parquet") && o.size > 0)
        {
            return Ok(Some(f.location.clone()));
        }
    }
    Ok(None)
}

/// Registers `scoped` as a table over only the `dt=` partitions `parts` of tile folder
/// `dir`, without the partition column, with the schema of `table` (the whole folder,
/// registered already), with `aliases` as [`register_tiles`]. DataFusion 55 lists a partitioned table's whole folder for a
/// filter such as `dt IN (...)`, so a daily build reading a few dozen partitions listed
/// every tile file of the history, several times; this table lists only its partitions.
pub async fn register_partitions(
    ctx: &SessionContext,
    out: &Location,
    dir: &StorePath,
    table: &str,
    scoped: &str,
    parts: &BTreeSet<NaiveDate>,
    aliases: &[(String, String)],
) -> datafusion::error::Result<()> {
    let whole = match listing_of(ctx, table).await {
        Some(t) => t,
        None => ctx.table_provider(table).await?,
    };
    let schema = files_schema(&whole.schema());
    let root = root_url(out);
    let urls = parts
        .iter()
        .map(|d| ListingTableUrl::parse(format!("{root}{}/dt={d}/", dir.as_ref())))
        .collect::<datafusion::error::Result<Vec<_>>>()?;
    replace_table(ctx, scoped, urls, tile_options(), schema, aliases)
}

/// The tile layouts of every source that something reads.
pub fn layouts(pipeline: &Pipeline) -> BTreeMap<String, TileLayout> {
    pipeline
        .sources
        .values()
        .filter_map(|s| layout(pipeline, s).map(|l| (s.name.clone(), l)))
        .collect()
}

/// The snapshot of `plan.day` combined from the pieces of [`crate::rollups::plan_day`]
/// (tables it registered): for each source, its day pieces and stored weeks and months,
/// each with the partials of every feature; a feature keeps the pieces from its window
/// start on.
pub fn tiled_snapshot_query(
    pipeline: &Pipeline,
    layouts: &BTreeMap<String, TileLayout>,
    plan: &crate::rollups::DayPlan,
    mode: crate::sql::KnowledgeOverride,
) -> crate::sql::SnapshotQuery {
    use crate::sql::{feature_column, finish, join_source_aggregates};
    let day = plan.day;
    let naive = crate::sql::snapshot_query(pipeline, day, mode);
    let date = |d: NaiveDate| format!("CAST({} AS DATE)", literal(&d.to_string()));
    let d_days = (day - NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch")).num_days();
    let no_pieces = crate::rollups::Pieces::default();
    let pieces = |source: &str| plan.sources.get(source).unwrap_or(&no_pieces);
    let mut ctes = Vec::new();
    for (name, l) in layouts {
        if let Some(read) = naive.reads.get(name) {
            ctes.push(format!(
                "{} AS ({})",
                ident(&format!("{name}__rows")),
                crate::rollups::pieces_sql(pipeline, l, pieces(name), day, read.knowledge, false)
            ));
        }
    }
    let start = |w: daymark_spec::Window| w.days().map(|n| day - chrono::Duration::days(n as i64));
    let pop = match &pipeline.population {
        Population::State(s) => {
            let order = if pipeline.sources[&s.source].spec.arrival_time.is_some() {
                "__pt, __pa, __ps"
            } else {
                "__pt, __ps"
            };
            let values: Vec<String> = s.values.iter().map(|v| literal(v)).collect();
            format!(
                "SELECT __key FROM (SELECT __key, {}(__ps, {order}) AS __state FROM {} GROUP BY __key) WHERE __state IN ({})",
                crate::latest::LATEST,
                ident(&format!("{}__rows", s.source)),
                values.join(", ")
            )
        }
        Population::RecentActivity(a) => {
            let since = start(a.within)
                .map(|d| format!(" AND __lo >= {}", date(d)))
                .unwrap_or_default();
            format!(
                "SELECT __key FROM {} WHERE __pc > 0{since} GROUP BY __key",
                ident(&format!("{}__rows", a.source))
            )
        }
    };
    ctes.push(format!("__population AS ({pop})"));

    let mut layer0 = vec![
        format!("p.__key AS {}", ident(&pipeline.file.key)),
        format!("{} AS snapshot_date", date(day)),
    ];
    let mut per_source: BTreeMap<&str, Vec<String>> = BTreeMap::new();
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
        let has_arrival = pipeline.sources[source].spec.arrival_time.is_some();
        // Pieces never straddle a window start: a piece is in the window or not.
        let since = (!agg.is_unbounded())
            .then(|| start(*window))
            .flatten()
            .map(|d| format!("__lo >= {}", date(d)));
        let with = |extra: Option<String>| -> String {
            let c: Vec<String> = extra.into_iter().chain(since.clone()).collect();
            if c.is_empty() {
                String::new()
            } else {
                format!(" FILTER (WHERE {})", c.join(" AND "))
            }
        };
        let rows = Some(format!("__c{i} > 0"));
        let column = format!("__f{i}");
        let value = match agg {
            Aggregation::Count => format!("SUM(__c{i}){}", with(None)),
            Aggregation::Sum | Aggregation::Mean => {
                let sum = format!("__s{i}");
                let total = if pieces(source).float_sums.contains(&sum) {
                    crate::rollups::exact_sum(&sum, &with(None))
                } else {
                    format!("SUM({sum}){}", with(None))
                };
                match agg {
                    Aggregation::Sum => total,
                    _ => format!(
                        "CASE WHEN SUM(__n{i}){w} > 0 THEN {total} / CAST(SUM(__n{i}){w} AS DOUBLE) END",
                        w = with(None)
                    ),
                }
            }
            Aggregation::Min => format!("MIN(__m{i}){}", with(None)),
            Aggregation::Max => format!("MAX(__m{i}){}", with(None)),
            // Pieces are disjoint sets of days: their active days add up.
            Aggregation::ActiveDays => format!("COALESCE(SUM(__ad{i}){}, 0)", with(None)),
            Aggregation::First | Aggregation::Last => {
                let (func, order) = first_last_of_partials(*agg, i, has_arrival);
                format!("{func}(__v{i}, {order}){}", with(rows))
            }
            Aggregation::DaysSinceFirst => format!("{d_days} - CAST(MIN(__tf{i}) AS BIGINT)"),
            Aggregation::DaysSinceLast => format!("{d_days} - CAST(MAX(__tl{i}) AS BIGINT)"),
            Aggregation::CountDistinct => {
                let l = &layouts[source];
                let read = &naive.reads[source];
                let cte = format!("{source}__d{i}__agg");
                ctes.push(format!(
                    "{} AS (SELECT __key, COUNT(DISTINCT __v) AS __v FROM ({}) WHERE {} GROUP BY __key)",
                    ident(&cte),
                    crate::rollups::distinct_pieces_sql(l, i, pieces(source), day, read.knowledge),
                    since.clone().unwrap_or_else(|| "TRUE".to_string())
                ));
                joins.push(format!(
                    "LEFT JOIN {c} ON {c}.__key = p.__key",
                    c = ident(&cte)
                ));
                let v = format!("{}.__v", ident(&cte));
                layer0.push(feature_column(f, *agg, &v));
                continue;
            }
        };
        per_source
            .entry(source.as_str())
            .or_default()
            .push(format!("{value} AS {column}"));
        let v = format!("{}.{column}", ident(&format!("{source}__agg")));
        layer0.push(feature_column(f, *agg, &v));
    }
    join_source_aggregates(&per_source, &mut ctes, &mut joins);
    let sql = finish(pipeline, &ctes, &layer0, &joins, Some(""));
    crate::sql::SnapshotQuery {
        day,
        cutoff: naive.cutoff,
        reads: naive.reads,
        sql,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pipeline(features: &str) -> Pipeline {
        let text = format!(
            "daymark: 1\nname: t\ntimezone: UTC\nkey: k\noutput: out\nsources:\n  s: {{ location: s, event_time: t }}\npopulation:\n  recent_activity: {{ source: s, within: 30d, filter: \"v > 0\" }}\nfeatures:\n{features}"
        );
        daymark_spec::load_str(&text, None).unwrap()
    }

    /// [`day_of_in`] (integer arithmetic) gives the same day as [`day_of_sql`]
    /// (DataFusion's `to_local_time`, the naive path's) for every instant: every quarter
    /// of an hour and one unit either side, in the weeks around the daylight-saving
    /// changes of 2025 in four zones (Lord Howe's shift is 30 minutes; Kolkata has none),
    /// with cutoffs at 00:00 and 06:30, in all four timestamp units; and for instants
    /// outside the span the arithmetic covers (they take `to_local_time`).
    #[tokio::test]
    async fn day_of_in_equals_day_of_sql() {
        use datafusion::arrow::array::{Array, Date32Array};
        use datafusion::arrow::datatypes::Field;
        let d = |s: &str| -> NaiveDate { s.parse().unwrap() };
        let weeks = [
            ("2025-03-05", "2025-03-13"),
            ("2025-03-28", "2025-04-09"),
            ("2025-09-24", "2025-10-09"),
            ("2025-10-22", "2025-11-05"),
        ];
        let mut seconds: Vec<i64> = Vec::new();
        for (a, b) in weeks {
            let (a, b) = (d(a), d(b));
            let start = a.and_time(chrono::NaiveTime::MIN).and_utc().timestamp();
            let end = b.and_time(chrono::NaiveTime::MIN).and_utc().timestamp();
            seconds.extend((start..end).step_by(900));
        }
        // Outside the span of the partitions below (`to_local_time` for these).
        let outside = [
            "2024-11-03T07:00:00Z",
            "2026-03-08T08:00:00Z",
            "2031-06-01T04:59:59Z",
        ];
        for t in outside {
            seconds.push(
                t.parse::<chrono::DateTime<chrono::Utc>>()
                    .unwrap()
                    .timestamp(),
            );
        }
        // Partitions from 2025-03-01 to 2025-11-01: the arithmetic covers 2025-02-22 to
        // 2025-12-31.
        let days: Vec<NaiveDate> = d("2025-03-01").iter_days().take(246).collect();
        for zone in [
            "America/Chicago",
            "Europe/London",
            "Australia/Lord_Howe",
            "Asia/Kolkata",
        ] {
            for cutoff in ["00:00", "06:30"] {
                let text = format!(
                    "daymark: 1\nname: t\ntimezone: {zone}\ncutoff_time: \"{cutoff}\"\nkey: k\noutput: out\nsources:\n  s: {{ location: s, event_time: ts }}\npopulation:\n  recent_activity: {{ source: s, within: 30d }}\nfeatures:\n  - {{ name: n, source: s, agg: count, window: 7d }}\n"
                );
                let p = daymark_spec::load_str(&text, None).unwrap();
                for unit in [
                    TimeUnit::Second,
                    TimeUnit::Millisecond,
                    TimeUnit::Microsecond,
                    TimeUnit::Nanosecond,
                ] {
                    let per = units_per_second(unit);
                    let values: Vec<i64> = seconds
                        .iter()
                        .flat_map(|s| [s * per - 1, s * per, s * per + 1])
                        .collect();
                    let ts = datafusion::arrow::compute::cast(
                        &datafusion::arrow::array::Int64Array::from(values.clone()),
                        &DataType::Timestamp(unit, Some("UTC".into())),
                    )
                    .unwrap();
                    let schema = Schema::new(vec![Field::new("ts", ts.data_type().clone(), false)]);
                    let batch = RecordBatch::try_new(Arc::new(schema.clone()), vec![ts]).unwrap();
                    let ctx = SessionContext::new();
                    ctx.register_batch("s", batch).unwrap();
                    let fast = day_of_in(&p, "ts", Some(&schema), &days);
                    assert!(fast.starts_with("CASE"), "{fast}");
                    let sql = format!(
                        "SELECT {fast} AS fast, {} AS plain FROM s",
                        day_of_sql(&p, "\"ts\"")
                    );
                    let batches = ctx.sql(&sql).await.unwrap().collect().await.unwrap();
                    let mut n = 0;
                    for b in &batches {
                        let fast = b.column(0).as_any().downcast_ref::<Date32Array>().unwrap();
                        let plain = b.column(1).as_any().downcast_ref::<Date32Array>().unwrap();
                        for i in 0..b.num_rows() {
                            assert_eq!(
                                fast.value(i),
                                plain.value(i),
                                "{zone} cutoff {cutoff} {unit:?}: value {}",
                                values[n + i]
                            );
                        }
                        n += b.num_rows();
                    }
                    assert_eq!(n, values.len());
                }
            }
        }
        // Without the column's unit, the plain form.
        let p = pipeline("  - { name: n, source: s, agg: count, window: 7d }\n");
        assert_eq!(day_of_in(&p, "t", None, &days), day_of_sql(&p, "\"t\""));
    }

    #[test]
    fn columns_defined_alike_are_stored_once_and_shown_under_every_name() {
        let p = pipeline(
            "  - { name: n, source: s, agg: count, windows: [7d, 28d] }\n  - { name: m, source: s, agg: sum, expr: v, windows: [7d, 28d], fill: 0 }\n  - { name: f, source: s, agg: sum, expr: v, filter: \"w = 1\", window: 7d, fill: 0 }\n",
        );
        let l = layout(&p, &p.sources["s"]).unwrap();
        // Features 0, 1 count every row (the population counts filtered ones), 2 and 3
        // sum `v` over every row, 4 only over `w = 1`.
        assert_eq!(
            l.columns,
            [
                "COUNT(*) FILTER (WHERE (v > 0)) AS __pc",
                "COUNT(*) AS __c0",
                "SUM((v)) AS __s2",
                "COUNT((v)) AS __n2",
                "COUNT(*) FILTER (WHERE (w = 1)) AS __c4",
                "SUM((v)) FILTER (WHERE (w = 1)) AS __s4",
                "COUNT((v)) FILTER (WHERE (w = 1)) AS __n4",
                "MAX(\"t\") AS __mev",
            ]
        );
        let aliases: Vec<(&str, &str)> = l
            .aliases
            .iter()
            .map(|(a, s)| (a.as_str(), s.as_str()))
            .collect();
        assert_eq!(
            aliases,
            [
                ("__c1", "__c0"),
                ("__c2", "__c0"),
                ("__c3", "__c0"),
                ("__s3", "__s2"),
                ("__n3", "__n2"),
            ]
        );
    }

    #[test]
    fn another_window_over_stored_columns_keeps_the_tiles() {
        let one = pipeline("  - { name: m, source: s, agg: sum, expr: v, window: 7d, fill: 0 }\n");
        let two = pipeline(
            "  - { name: m, source: s, agg: sum, expr: v, windows: [7d, 91d], fill: 0 }\n",
        );
        let three = pipeline(
            "  - { name: m, source: s, agg: mean, expr: v, windows: [7d, 91d], fill: 0 }\n",
        );
        let hash = |p: &Pipeline| layout(p, &p.sources["s"]).unwrap().hash;
        assert_eq!(hash(&one), hash(&two));
        // A mean sums the values as doubles: another column, so other tiles.
        assert_ne!(hash(&two), hash(&three));
    }

    /// The first row of `sql`'s result, every column an Int64.
    async fn first_row(ctx: &SessionContext, sql: &str) -> Vec<i64> {
        let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
        let b = &batches[0];
        (0..b.num_columns())
            .map(|i| {
                b.column(i)
                    .as_any()
                    .downcast_ref::<datafusion::arrow::array::Int64Array>()
                    .unwrap()
                    .value(0)
            })
            .collect()
    }

    #[tokio::test]
    async fn a_tile_table_shows_its_aliases_and_its_files_hold_each_column_once() {
        let dir = tempfile::tempdir().unwrap();
        let part = dir.path().join("dt=2026-01-01");
        std::fs::create_dir_all(&part).unwrap();
        let ctx = SessionContext::new();
        let df = ctx
            .sql("SELECT CAST(1 AS BIGINT) AS __key, CAST(7 AS BIGINT) AS __c0")
            .await
            .unwrap();
        df.write_parquet(
            part.join("part-0.parquet").to_str().unwrap(),
            datafusion::dataframe::DataFrameWriteOptions::new(),
            None,
        )
        .await
        .unwrap();
        let out = daymark_store::resolve(dir.path().to_str().unwrap(), None).unwrap();
        let aliases = vec![("__c1".to_string(), "__c0".to_string())];
        register_tiles(&ctx, &out, &out.prefix, "t__tiles", &aliases)
            .await
            .unwrap();
        let row = first_row(
            &ctx,
            "SELECT COUNT(*), MIN(__key), MIN(__c0), MIN(__c1) FROM t__tiles WHERE dt = '2026-01-01'",
        )
        .await;
        assert_eq!(row, [1, 1, 7, 7]);
        // The listing table under the view has the files' columns only.
        let listing = listing_of(&ctx, "t__tiles").await.unwrap();
        let names: Vec<String> = listing
            .schema()
            .fields()
            .iter()
            .map(|f| f.name().clone())
            .collect();
        assert_eq!(names, ["__key", "__c0", "dt"]);
        // A table over some partitions gets the same view.
        let parts = BTreeSet::from([NaiveDate::from_ymd_opt(2026, 1, 1).unwrap()]);
        register_partitions(&ctx, &out, &out.prefix, "t__tiles", "t@1", &parts, &aliases)
            .await
            .unwrap();
        assert_eq!(first_row(&ctx, "SELECT SUM(__c1) FROM \"t@1\"").await, [7]);
    }

    /// Event times after arrival: 0, 300 s exactly (within the tolerance), 300.001 s and
    /// an hour (beyond it), and one before arrival. Counted the same whether the arrival
    /// column has the event time's unit (raw values compared) or not (interval added).
    #[tokio::test]
    async fn rows_whose_event_time_passes_arrival_beyond_the_tolerance_are_counted() {
        for unit in ["Microsecond", "Millisecond"] {
            let dir = tempfile::tempdir().unwrap();
            let part = dir.path().join("s/dt=2026-01-01");
            std::fs::create_dir_all(&part).unwrap();
            let ctx = crate::session::session(&Default::default()).unwrap();
            let ts = |c: &str, u: &str| {
                format!(
                    "arrow_cast(CAST({c} AS TIMESTAMP), 'Timestamp({u}, Some(\"UTC\"))') AS {c}"
                )
            };
            let sql = format!(
                "SELECT CAST(k AS BIGINT) AS k, {}, {} FROM (VALUES \
                 (1, '2026-01-01T12:00:00', '2026-01-01T12:00:00'), \
                 (2, '2026-01-01T12:05:00', '2026-01-01T12:00:00'), \
                 (3, '2026-01-01T12:05:00.001', '2026-01-01T12:00:00'), \
                 (4, '2026-01-01T13:00:00', '2026-01-01T12:00:00'), \
                 (5, '2026-01-01T11:00:00', '2026-01-01T12:00:00')) AS v(k, t, a)",
                ts("t", "Microsecond"),
                ts("a", unit)
            );
            ctx.sql(&sql)
                .await
                .unwrap()
                .write_parquet(
                    part.join("part-0.parquet").to_str().unwrap(),
                    datafusion::dataframe::DataFrameWriteOptions::new(),
                    None,
                )
                .await
                .unwrap();
            let text = format!(
                "daymark: 1\nname: t\ntimezone: UTC\nkey: k\noutput: {out}\nsources:\n  s: {{ location: {src}, event_time: t, arrival_time: a }}\npopulation:\n  recent_activity: {{ source: s, within: 30d }}\nfeatures:\n  - {{ name: n, source: s, agg: count, window: 7d }}\n",
                out = dir.path().join("out").display(),
                src = dir.path().join("s").display(),
            );
            let p = daymark_spec::load_str(&text, None).unwrap();
            let reports = crate::inspect_sources(&p).await;
            crate::register_sources(&ctx, &p, &reports).await.unwrap();
            let out =
                daymark_store::resolve(dir.path().join("out").to_str().unwrap(), None).unwrap();
            let l = layout(&p, &p.sources["s"]).unwrap();
            let day = NaiveDate::from_ymd_opt(2026, 1, 1).unwrap();
            let (_, ignored) =
                ensure_tiles(&ctx, &p, &reports["s"], &l, &out, &BTreeSet::from([day]))
                    .await
                    .unwrap();
            assert_eq!(
                ignored[&day].event_after_arrival_rows, 2,
                "arrival in {unit}s"
            );
        }
    }
}
