//! Roll-ups: the tiles of whole weeks and calendar months, combined per key, so that a
//! daily snapshot reads a few dozen pieces instead of one tile partition per day of its
//! longest window.
//!
//! The days a snapshot D reads from a source (from its earliest window start, or the
//! source's first partition for unbounded aggregates, to D-1) are cut into **pieces**:
//! whole months, whole weeks (Monday to Sunday) and single days at the edges, with a cut at
//! every window start so that no piece straddles one. A 365-day window is about 30 pieces,
//! a 91-day one about 20: the cost of a daily build no longer grows with its longest
//! window. Every piece has the same columns: `__key`, `__lo` (its first day) and the
//! partials of every feature combined over the piece ([`columns`]); a feature keeps the
//! pieces with `__lo` at or after its window start. Day pieces are combined from the tiles
//! on the fly; week and month pieces are stored.
//!
//! A roll-up holds every tile row whose event day lies in its span, whatever its arrival
//! day: an event-time snapshot may always use it, an as-known snapshot only when every row
//! arrived before its cutoff (the roll-up records its latest arrival day), else the span is
//! cut into weeks, then days. A roll-up is rebuilt when the raw files of the partitions it
//! covers change (its days and one more each side: rows are filed by event day in UTC).
//! Spans ending after D-2 are not rolled up: the partition after their last day still
//! fills.
//!
//! Aggregates without a window start (days since, `all` windows, the population's state)
//! would read every month of the history, a cost that grows month after month. They read
//! instead one **history** roll-up: every tile row up to the end of the latest month that
//! ends by D-2 and before every other window start of the source (so no other piece
//! overlaps it), then the pieces after it. The history of month M is combined from that of
//! M-1 and the roll-up of M when the former is current (once a month for a daily run),
//! else from the day tiles in one grouping (under a memory limit, from the months, rolled
//! up one per query). Its `__lo` is the history's first day, before every window start,
//! so bounded features leave it out. Distinct counts over all history keep no history
//! (their source reads months as before).

use crate::build::{child, BuildError};
use crate::session::memory_limited;
use crate::sources::SourceReport;
use crate::sql::{ident, literal, KnowledgeOverride};
use crate::tiles::{stored_once, Ignored, TileLayout, TileStats};
use chrono::{Datelike, Duration, NaiveDate, Weekday};
use datafusion::prelude::SessionContext;
use daymark_spec::hash::hash_value;
use daymark_spec::{Aggregation, FeatureDef, Knowledge, Pipeline, Population};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::{ObjectStoreExt, PutPayload};
use daymark_store::Location;
use serde_json::json;
use std::collections::{BTreeMap, BTreeSet};

/// Version of the roll-up format; part of every roll-up folder's name.
const ROLLUP_FORMAT: u32 = 1;

/// How long a stored span is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Level {
    /// Monday to Sunday.
    Week,
    /// A calendar month.
    Month,
    /// Every event day up to the end of a calendar month, from the start of the history
    /// (see [`history_span`]): what features without a window start read, so that a daily
    /// build combines one row per key for the months behind it, however many there are.
    History,
}

impl Level {
    fn letter(self) -> &'static str {
        match self {
            Level::Week => "w",
            Level::Month => "m",
            Level::History => "h",
        }
    }
    fn trunc(self) -> &'static str {
        match self {
            Level::Week => "week",
            Level::Month | Level::History => "month",
        }
    }
}

/// A stored span of days: a week, a month, or the history up to the end of a month (whose
/// `first` is then that month's first day).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub struct Span {
    /// Week or month.
    pub level: Level,
    /// Its first day (a Monday, or the first of a month).
    pub first: NaiveDate,
}

impl Span {
    /// Its last day.
    pub fn last(&self) -> NaiveDate {
        match self.level {
            Level::Week => self.first + Duration::days(6),
            Level::Month | Level::History => {
                let (y, m) = if self.first.month() == 12 {
                    (self.first.year() + 1, 1)
                } else {
                    (self.first.year(), self.first.month() + 1)
                };
                NaiveDate::from_ymd_opt(y, m, 1).expect("a month start") - Duration::days(1)
            }
        }
    }
}

/// The pieces one snapshot reads from one source.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Pieces {
    /// Days combined from the tiles.
    pub days: Vec<NaiveDate>,
    /// Weeks and months read from roll-ups.
    pub spans: Vec<Span>,
    /// Sum columns (`__s<i>`) of the tiles that hold floating-point values. Pieces add
    /// them up exactly ([`exact_sum`]), so the same tiles give the same bytes whatever
    /// order parallel aggregation merges partial sums in (a rerun publishes an identical
    /// file).
    pub float_sums: BTreeSet<String>,
    /// Whether the pieces read tables over only their own partitions, registered by
    /// [`plan_day`] under [`scoped_table`] names, rather than the whole tile folders.
    pub scoped: bool,
}

/// The name under which [`plan_day`] registers `table` over only the partitions snapshot
/// `day` reads.
pub fn scoped_table(table: &str, day: NaiveDate) -> String {
    format!("{table}@{day}")
}

/// `SUM(column)` of a floating-point column, added exactly: each value is rounded to
/// DECIMAL(38, 12) (as the set-based backfill carries float sums) and the total turned back
/// into a double. `filter` is an aggregate filter (` FILTER (WHERE ...)`) or empty.
pub fn exact_sum(column: &str, filter: &str) -> String {
    format!("CAST(SUM(CAST({column} AS DECIMAL(38, 12))){filter} AS DOUBLE)")
}

/// The float sum columns of the day tiles of `layout` as registered in `ctx`.
async fn float_sums(ctx: &SessionContext, layout: &TileLayout) -> BTreeSet<String> {
    match ctx.table_provider(layout.table()).await {
        Ok(t) => t
            .schema()
            .fields()
            .iter()
            .filter(|f| f.name().starts_with("__s") && f.data_type().is_floating())
            .map(|f| f.name().clone())
            .collect(),
        Err(_) => BTreeSet::new(),
    }
}

/// What snapshot `day` reads: its pieces, per source with tiles.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DayPlan {
    /// The snapshot day.
    pub day: NaiveDate,
    /// Pieces per source.
    pub sources: BTreeMap<String, Pieces>,
}

/// Folder of the roll-ups of `level` (`tiles/<source>/<hash>-r<columns>-<w|m>/`).
pub fn dir(layout: &TileLayout, pipeline: &Pipeline, out: &Location, level: Level) -> StorePath {
    // The hash names what the columns hold; whether float sums were added exactly does
    // not change that.
    let cols = hash_value(&json!([
        ROLLUP_FORMAT,
        columns(pipeline, layout, &BTreeSet::new())
    ]));
    child(
        &out.prefix,
        &[
            "tiles",
            &layout.source,
            &format!("{}-r{}-{}", layout.hash, &cols[..8], level.letter()),
        ],
    )
}

/// Folder of the `level` roll-ups of distinct-value tile `feature`.
pub(crate) fn distinct_dir(
    layout: &TileLayout,
    out: &Location,
    feature: usize,
    level: Level,
) -> StorePath {
    child(
        &out.prefix,
        &[
            "tiles",
            &layout.source,
            &format!(
                "{}-d{feature}-r{ROLLUP_FORMAT}-{}",
                layout.hash,
                level.letter()
            ),
        ],
    )
}

fn table(layout: &TileLayout, level: Level) -> String {
    format!("{}__r{}", layout.source, level.letter())
}

fn distinct_table(layout: &TileLayout, feature: usize, level: Level) -> String {
    format!("{}__d{feature}__r{}", layout.source, level.letter())
}

/// The partial columns of a piece, as (name, aggregate over tile rows): what the tiled
/// snapshot query combines. Rows of a piece are grouped by key, so the columns that tiles
/// keep per (key, event day, arrival day) are combined once more: counts and sums add up,
/// extremes and first/last values keep theirs, active days become a count of distinct
/// event days, days since first/last the earliest/latest event day. Sums named in
/// `float_sums` are added exactly ([`exact_sum`]).
pub fn columns(
    pipeline: &Pipeline,
    layout: &TileLayout,
    float_sums: &BTreeSet<String>,
) -> Vec<(String, String)> {
    let source = &pipeline.sources[&layout.source];
    let has_arrival = source.spec.arrival_time.is_some();
    let mut cols = vec![
        ("__rows".to_string(), "SUM(__rows)".to_string()),
        ("__ahead".to_string(), "SUM(__ahead)".to_string()),
        ("__mev".to_string(), "MAX(__mev)".to_string()),
    ];
    if has_arrival {
        cols.push(("__mar".to_string(), "MAX(__mar)".to_string()));
    }
    match &pipeline.population {
        Population::State(s) if s.source == layout.source => {
            let order = if has_arrival {
                "__pt, __pa, __ps"
            } else {
                "__pt, __ps"
            };
            let names: &[&str] = if has_arrival {
                &["__ps", "__pt", "__pa"]
            } else {
                &["__ps", "__pt"]
            };
            for n in names {
                let latest = format!("{}({n}, {order})", crate::latest::LATEST);
                cols.push((n.to_string(), latest));
            }
        }
        Population::RecentActivity(r) if r.source == layout.source => {
            cols.push(("__pc".into(), "SUM(__pc)".into()));
        }
        _ => {}
    }
    // Partials read by their stored name, so that features reading the same tile column
    // get the same definition here too ([`stored_once`]).
    let st = |name: String| layout.stored(&name).to_string();
    for (i, f) in pipeline.features.iter().enumerate() {
        let FeatureDef::Aggregate { source, agg, .. } = &f.def else {
            continue;
        };
        if *source != layout.source || *agg == Aggregation::CountDistinct {
            continue;
        }
        let count = st(format!("__c{i}"));
        let rows = format!(" FILTER (WHERE {count} > 0)");
        cols.push((format!("__c{i}"), format!("SUM({count})")));
        match agg {
            Aggregation::Sum | Aggregation::Mean => {
                let sum = st(format!("__s{i}"));
                let agg = if float_sums.contains(&sum) {
                    exact_sum(&sum, "")
                } else {
                    format!("SUM({sum})")
                };
                cols.push((format!("__s{i}"), agg));
                cols.push((format!("__n{i}"), format!("SUM({})", st(format!("__n{i}")))));
            }
            Aggregation::Min => {
                cols.push((format!("__m{i}"), format!("MIN({})", st(format!("__m{i}")))))
            }
            Aggregation::Max => {
                cols.push((format!("__m{i}"), format!("MAX({})", st(format!("__m{i}")))))
            }
            Aggregation::First | Aggregation::Last => {
                let (func, order) = crate::tiles::first_last_of_partials(*agg, i, has_arrival);
                let mut names = vec![format!("__v{i}"), format!("__vt{i}")];
                if has_arrival {
                    names.push(format!("__va{i}"));
                }
                for n in names {
                    cols.push((n.clone(), format!("{func}({n}, {order}){rows}")));
                }
            }
            Aggregation::ActiveDays => {
                cols.push((format!("__ad{i}"), format!("COUNT(DISTINCT __t){rows}")))
            }
            Aggregation::DaysSinceFirst => {
                cols.push((format!("__tf{i}"), format!("MIN(__t){rows}")))
            }
            Aggregation::DaysSinceLast => {
                cols.push((format!("__tl{i}"), format!("MAX(__t){rows}")))
            }
            Aggregation::Count | Aggregation::CountDistinct => {}
        }
    }
    cols
}

/// [`columns`] as `agg AS name`, for rows grouped by event day as well as by key (day
/// pieces; the first step of a roll-up): active days are then 0 or 1, found without
/// DataFusion's per-group sets of distinct values, which took most of a daily build's time
/// (measured with `perf`, docs/benchmarks.md). Every other column combines the same way
/// again over such groups.
fn one_day_aggregates(cols: &[(String, String)]) -> Vec<String> {
    cols.iter()
        .map(|(n, a)| match n.strip_prefix("__ad") {
            Some(i) => format!(
                "MAX(CASE WHEN __c{i} > 0 THEN CAST(1 AS BIGINT) ELSE CAST(0 AS BIGINT) END) AS {n}"
            ),
            None => format!("{a} AS {n}"),
        })
        .collect()
}

/// The window starts of the features (and population) reading `source` for snapshot
/// `day`, and whether one of them looks back without bound.
fn window_starts(pipeline: &Pipeline, source: &str, day: NaiveDate) -> (BTreeSet<NaiveDate>, bool) {
    let mut starts = BTreeSet::new();
    let mut unbounded = false;
    let mut add = |days: Option<u32>| match days {
        Some(n) => {
            starts.insert(day - Duration::days(n as i64));
        }
        None => unbounded = true,
    };
    match &pipeline.population {
        Population::State(s) if s.source == source => add(None),
        Population::RecentActivity(r) if r.source == source => add(r.within.days()),
        _ => {}
    }
    for f in &pipeline.features {
        if let FeatureDef::Aggregate {
            source: s,
            agg,
            window,
            ..
        } = &f.def
        {
            if s == source {
                add(if agg.is_unbounded() {
                    None
                } else {
                    window.days()
                });
            }
        }
    }
    (starts, unbounded)
}

/// Cuts the days `lo..=last` into pieces, with a cut at every day of `starts`: months and
/// weeks ending on or before `stable` that `usable` accepts, days elsewhere.
fn cut(
    starts: &BTreeSet<NaiveDate>,
    lo: NaiveDate,
    last: NaiveDate,
    stable: NaiveDate,
    usable: &dyn Fn(Span) -> bool,
) -> Pieces {
    let mut pieces = Pieces::default();
    let mut bounds: Vec<NaiveDate> = starts
        .iter()
        .copied()
        .filter(|s| *s > lo && *s <= last)
        .collect();
    bounds.push(last + Duration::days(1));
    let mut p = lo;
    for end in bounds {
        let limit = (end - Duration::days(1)).min(stable);
        while p < end {
            let month = Span {
                level: Level::Month,
                first: p,
            };
            let week = Span {
                level: Level::Week,
                first: p,
            };
            // A week running into a month that could be read whole would hide that month.
            let next = Span {
                level: Level::Month,
                first: month_start(p).last() + Duration::days(1),
            };
            let hides_month = week.last() >= next.first && next.last() <= limit && usable(next);
            let span = if p.day() == 1 && month.last() <= limit && usable(month) {
                Some(month)
            } else if p.weekday() == Weekday::Mon
                && week.last() <= limit
                && !hides_month
                && usable(week)
            {
                Some(week)
            } else {
                None
            };
            match span {
                Some(s) => {
                    pieces.spans.push(s);
                    p = s.last() + Duration::days(1);
                }
                None => {
                    pieces.days.push(p);
                    p += Duration::days(1);
                }
            }
        }
    }
    pieces
}

/// The month `day` falls in.
fn month_start(day: NaiveDate) -> Span {
    Span {
        level: Level::Month,
        first: NaiveDate::from_ymd_opt(day.year(), day.month(), 1).expect("a month start"),
    }
}

/// A stored roll-up that is still current: the latest arrival day of its rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Stored {
    max_arrival: Option<NaiveDate>,
}

fn marker_path(dir: &StorePath, span: Span) -> StorePath {
    child(dir, &[&format!("dt={}", span.first), "_inputs.json"])
}

/// What a span's roll-up depends on: the raw files of the partitions it covers.
fn span_inputs(report: &SourceReport, span: Span) -> String {
    // The canonical JSON of `[ROLLUP_FORMAT, [[day, fingerprint(files)], ...]]`, written
    // directly (`span_inputs_are_the_hash_of_their_value` holds it to that value's hash).
    let mut text = format!("[{ROLLUP_FORMAT},[").into_bytes();
    for (i, (d, files)) in report.listing.days.range(span_range(span)).enumerate() {
        if i > 0 {
            text.push(b',');
        }
        text.extend_from_slice(format!("[\"{d}\",").as_bytes());
        crate::tiles::write_fingerprint(files, &mut text);
        text.push(b']');
    }
    text.extend_from_slice(b"]]");
    daymark_spec::hash::hash_canonical(&text)
}

/// The partitions holding a span's rows: its days and one more each side (rows are filed
/// by event day in UTC); for the history, every partition up to the day after its end.
fn span_range(span: Span) -> std::ops::RangeInclusive<NaiveDate> {
    let first = match span.level {
        Level::History => NaiveDate::MIN,
        _ => span.first - Duration::days(1),
    };
    first..=span.last() + Duration::days(1)
}

/// The partitions a span's roll-up reads.
fn span_partitions(report: &SourceReport, span: Span) -> impl Iterator<Item = NaiveDate> + '_ {
    report.listing.days.range(span_range(span)).map(|(d, _)| *d)
}

/// Reads the stored markers of `spans`; returns those still current.
async fn stored(
    out: &Location,
    dir: &StorePath,
    report: &SourceReport,
    spans: &[Span],
) -> BTreeMap<Span, Stored> {
    let mut found = BTreeMap::new();
    for span in spans {
        let Ok(got) = out.store.get(&marker_path(dir, *span)).await else {
            continue;
        };
        let Ok(bytes) = got.bytes().await else {
            continue;
        };
        let Ok(v) = serde_json::from_slice::<serde_json::Value>(&bytes) else {
            continue;
        };
        if v["inputs"].as_str() != Some(&span_inputs(report, *span)) {
            continue;
        }
        let max_arrival = v["max_arrival"].as_str().and_then(|s| s.parse().ok());
        found.insert(*span, Stored { max_arrival });
    }
    found
}

/// The day of the span (of `level`) that `expr` (a date) falls in, as SQL.
fn span_of(level: Level, expr: &str) -> String {
    format!(
        "CAST(date_trunc('{}', CAST({expr} AS TIMESTAMP)) AS DATE)",
        level.trunc()
    )
}

fn date(d: NaiveDate) -> String {
    format!("CAST({} AS DATE)", literal(&d.to_string()))
}

fn in_list<T: ToString>(items: impl IntoIterator<Item = T>) -> String {
    items
        .into_iter()
        .map(|d| literal(&d.to_string()))
        .collect::<Vec<_>>()
        .join(", ")
}

/// How many of `stale` spans one roll-up query builds: all of them, or one at a time under
/// a memory limit. One query over a year of weeks groups and sorts every (week, key) and,
/// under a limit, spills and merges hundreds of runs: a year of roll-ups of the 100M-event
/// world at 300 MiB took 224 s and peaked at 571 MiB that way, 121 s and 469 MiB one span
/// per query. Without a limit one query is twice as fast (10M-event world: 9-10 s against
/// 18-20 s). Measured in docs/benchmarks.md, ninth measurement.
fn spans_per_query(ctx: &SessionContext, stale: usize) -> usize {
    if memory_limited(ctx) {
        1
    } else {
        stale.max(1)
    }
}

/// The roll-up rows of tile rows `rows` (which carry the day tiles' columns and `__part`,
/// the roll-up they belong to): per `__part` and key, `__lo` (the SQL of the piece's first
/// day) and the [`columns`] `cols`. In key order, as the day tiles are: the same tiles
/// always give the same roll-up files.
///
/// With one roll-up (`one`, its `__part` as SQL), rows are grouped by key alone and the
/// part is added after: grouped by a column DataFusion 55 knows to be constant, rows are
/// aggregated as if sorted by it, and the groups, complete only at the end, leave the
/// table 8,192 at a time, each time moving all the others (17 s of the 18 s a backfill of
/// the demo pipeline spent on the history of plays at 35,000 keys: docs/benchmarks.md,
/// twenty-sixth measurement).
fn rollup_sql(cols: &[(String, String)], rows: &str, lo: &str, one: Option<&str>) -> String {
    let (part, by) = match one {
        Some(p) => (p.to_string(), ""),
        None => ("__part".to_string(), "__part, "),
    };
    // With active days among the columns, rows are first combined per event day (see
    // `one_day_aggregates`), whose active days then add up.
    let two_steps = cols.iter().any(|(n, _)| n.starts_with("__ad"));
    let (aggs, from) = if two_steps {
        let per_day = format!(
            "SELECT {by}__key, __t, {} FROM ({rows}) GROUP BY {by}__key, __t",
            one_day_aggregates(cols).join(", "),
        );
        let aggs: Vec<String> = cols
            .iter()
            .map(|(n, a)| match n.starts_with("__ad") {
                true => format!("SUM({n}) AS {n}"),
                false => format!("{a} AS {n}"),
            })
            .collect();
        (aggs, per_day)
    } else {
        let aggs = cols.iter().map(|(n, a)| format!("{a} AS {n}")).collect();
        (aggs, rows.to_string())
    };
    format!(
        "SELECT {part} AS __part, __key, {lo} AS __lo, {} FROM ({from}) GROUP BY {by}__key ORDER BY {by}__key",
        aggs.join(", ")
    )
}

/// Builds the roll-ups of `spans` (all of one level) from the tiles (which must be current
/// and registered), with their distinct-value roll-ups, then writes their markers.
#[allow(clippy::too_many_arguments)]
async fn build(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    report: &SourceReport,
    layout: &TileLayout,
    out: &Location,
    level: Level,
    spans: &[Span],
    float_sums: &BTreeSet<String>,
) -> Result<BTreeMap<Span, Stored>, BuildError> {
    let first_day = spans[0].first;
    let engine = |source| BuildError::Engine {
        day: first_day,
        source,
    };
    let parts: BTreeSet<NaiveDate> = spans
        .iter()
        .flat_map(|s| span_partitions(report, *s))
        .collect();
    let firsts: Vec<NaiveDate> = spans.iter().map(|s| s.first).collect();
    // Tile rows of the partitions the spans cover whose event day lies in one of them (none
    // when the spans cover no partition: a week without events gets an empty roll-up).
    let in_parts = crate::sql::partition_condition("dt", &parts, true);
    let rows =
        |table: &str| {
            format!(
            "SELECT * FROM (SELECT *, {} AS __part FROM {} WHERE {in_parts}) WHERE __part IN ({})",
            span_of(level, "__t"),
            ident(table),
            firsts.iter().map(|d| date(*d)).collect::<Vec<_>>().join(", ")
        )
        };
    let (cols, _) = stored_once(columns(pipeline, layout, float_sums));
    // One span: its part as a constant (see `rollup_sql`).
    let one = (firsts.len() == 1).then(|| date(firsts[0]));
    let part = one.as_deref().unwrap_or("__part");
    let sql = rollup_sql(&cols, &rows(&layout.table()), part, one.as_deref());
    crate::tiles::write_split(
        ctx,
        &sql,
        out,
        &dir(layout, pipeline, out, level),
        &firsts,
        &[],
    )
    .await?;
    for (i, _, _) in &layout.distinct {
        let sql = match &one {
            Some(p) => format!(
                "SELECT {p} AS __part, __key, {p} AS __lo, __v FROM (SELECT DISTINCT __key, __v FROM ({})) ORDER BY __key, __v",
                rows(&layout.distinct_table(*i))
            ),
            None => format!(
                "SELECT DISTINCT __part, __key, __part AS __lo, __v FROM ({}) ORDER BY __part, __key, __v",
                rows(&layout.distinct_table(*i))
            ),
        };
        crate::tiles::write_split(
            ctx,
            &sql,
            out,
            &distinct_dir(layout, out, *i, level),
            &firsts,
            &[],
        )
        .await?;
    }
    // The latest arrival day of each span's rows decides which as-known snapshots may use it.
    let sql = format!(
        "SELECT CAST(__part AS VARCHAR), CAST(MAX(__a) AS VARCHAR) FROM ({}) GROUP BY __part",
        rows(&layout.table())
    );
    let batches = crate::tiles::collect(ctx, &sql, first_day).await?;
    let mut latest: BTreeMap<NaiveDate, NaiveDate> = BTreeMap::new();
    for b in &batches {
        use datafusion::arrow::array::{Array, AsArray};
        use datafusion::arrow::datatypes::DataType;
        let text = |i: usize| {
            datafusion::arrow::compute::cast(b.column(i), &DataType::Utf8)
                .map_err(|e| engine(e.into()))
        };
        let (p, a) = (text(0)?, text(1)?);
        let (p, a) = (p.as_string::<i32>(), a.as_string::<i32>());
        for r in (0..b.num_rows()).filter(|r| !p.is_null(*r) && !a.is_null(*r)) {
            if let (Ok(p), Ok(a)) = (p.value(r).parse(), a.value(r).parse()) {
                latest.insert(p, a);
            }
        }
    }
    let dir = dir(layout, pipeline, out, level);
    let mut built = BTreeMap::new();
    for span in spans {
        let stored = Stored {
            max_arrival: latest.get(&span.first).copied(),
        };
        write_marker(out, &dir, report, *span, stored).await?;
        built.insert(*span, stored);
    }
    Ok(built)
}

/// Registers the tables of `layout` (main and distinct-value) for the queries that follow:
/// its day tiles, or with `level` its roll-ups of that level.
async fn register_tables(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    layout: &TileLayout,
    level: Option<Level>,
    day: NaiveDate,
) -> Result<(), BuildError> {
    // Roll-ups hold each partial once too ([`stored_once`]) and are read by those names
    // only; the day tiles need their aliases for the backfill's queries.
    let mut tables = vec![match level {
        None => (layout.dir(out), layout.table(), layout.aliases.as_slice()),
        Some(l) => (dir(layout, pipeline, out, l), table(layout, l), &[][..]),
    }];
    for (i, _, _) in &layout.distinct {
        tables.push(match level {
            None => (layout.distinct_dir(out, *i), layout.distinct_table(*i), &[]),
            // The history keeps no distinct values (see `unbounded_distinct`).
            Some(Level::History) => continue,
            Some(l) => (
                distinct_dir(layout, out, *i, l),
                distinct_table(layout, *i, l),
                &[],
            ),
        });
    }
    for (folder, name, aliases) in tables {
        crate::tiles::register_tiles(ctx, out, &folder, &name, aliases)
            .await
            .map_err(|source| BuildError::Engine { day, source })?;
    }
    Ok(())
}

/// Plans snapshot `day`: cuts the days each source's windows need into pieces, builds the
/// roll-ups the plan uses that are missing or stale and the tiles its pieces read (each raw
/// partition at most once), and registers them. Returns what it cost,
/// per source, with the rows ignored for a null key or counted for an event time after
/// their arrival among the rows the pieces cover.
#[allow(clippy::too_many_arguments)]
pub async fn plan_day(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    reports: &BTreeMap<String, SourceReport>,
    layouts: &BTreeMap<String, TileLayout>,
    out: &Location,
    day: NaiveDate,
    mode: KnowledgeOverride,
) -> Result<(BTreeMap<String, TileStats>, DayPlan), BuildError> {
    let naive = crate::sql::snapshot_query(pipeline, day, mode);
    // Each source's pieces are planned on their own (their tiles, roll-ups and tables are
    // the source's), side by side: the roll-ups a backfill builds for the next day are a
    // few small queries per source, each using about one core (docs/benchmarks.md,
    // twenty-third measurement). One at a time under a memory limit, as measured there.
    let planned = layouts.iter().filter_map(|(name, layout)| {
        let read = naive.reads.get(name)?;
        Some(async move {
            let planned = plan_source(ctx, pipeline, &reports[name], layout, out, day, read).await;
            (name.clone(), planned)
        })
    });
    let results = if memory_limited(ctx) {
        let mut results = Vec::new();
        for p in planned {
            results.push(p.await);
        }
        results
    } else {
        // Every source runs to its end before an error is returned, so none is left
        // half-way through writing.
        futures::future::join_all(planned).await
    };
    let mut plan = DayPlan {
        day,
        sources: BTreeMap::new(),
    };
    let mut all_stats = BTreeMap::new();
    for (name, planned) in results {
        let (pieces, stats) = planned?;
        plan.sources.insert(name.clone(), pieces);
        all_stats.insert(name, stats);
    }
    Ok((all_stats, plan))
}

/// [`plan_day`] for one source, which `read` tells how the snapshot reads: its pieces
/// (roll-ups and tiles built and registered as needed) and what they cost.
async fn plan_source(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    report: &SourceReport,
    layout: &TileLayout,
    out: &Location,
    day: NaiveDate,
    read: &crate::sql::SourceRead,
) -> Result<(Pieces, TileStats), BuildError> {
    let last = day - Duration::days(1);
    let stable = day - Duration::days(2);
    let name = &layout.source;
    let Some(first_partition) = report.listing.days.keys().next().copied() else {
        return Ok((Pieces::default(), TileStats::default()));
    };
    let mut cur = Current {
        ctx,
        pipeline,
        report,
        layout,
        out,
        day,
        stats: TileStats::default(),
        checked: BTreeMap::new(),
        registered: false,
    };
    // An as-known snapshot may use a roll-up only if all its rows had arrived.
    let usable_by_day = |st: &Stored| {
        read.knowledge == Knowledge::EventTime || st.max_arrival.is_none_or(|a| a <= last)
    };
    // Rows of a partition have event days from the day before it to the day after.
    let floor = first_partition - Duration::days(1);
    let (starts, unbounded) = window_starts(pipeline, name, day);
    let mut lo = match starts.first() {
        Some(s) if !unbounded => (*s).max(floor),
        _ => floor,
    };
    // Features without a window start read the history up to a month's end in one
    // piece, then the pieces after it. An as-known snapshot cannot use a history
    // holding rows that arrived after its cutoff (in the first days of a month, the
    // late rows of the month before): it tries the month before, then reads months.
    let mut history = None;
    let mut candidate = history_span(&starts, floor, stable)
        .filter(|_| unbounded && !unbounded_distinct(pipeline, name));
    for _ in 0..2 {
        let Some(span) = candidate else { break };
        if usable_by_day(&cur.history(span, floor).await?) {
            history = Some(span);
            lo = span.last() + Duration::days(1);
            break;
        }
        candidate = earlier_history(span, floor);
    }
    // Spans known: None = stored but not usable by this snapshot.
    let mut known: BTreeMap<Span, Option<Stored>> = BTreeMap::new();
    let pieces = loop {
        let usable = |s: Span| match known.get(&s) {
            None => true,
            Some(None) => false,
            Some(Some(_)) => true,
        };
        let pieces = if lo <= last {
            cut(&starts, lo, last, stable, &usable)
        } else {
            Pieces::default()
        };
        let wanted: BTreeSet<Span> = pieces
            .spans
            .iter()
            .filter(|s| !known.contains_key(s))
            .copied()
            .collect();
        if wanted.is_empty() {
            break pieces;
        }
        for level in [Level::Month, Level::Week] {
            let spans: Vec<Span> = wanted
                .iter()
                .filter(|s| s.level == level)
                .copied()
                .collect();
            if spans.is_empty() {
                continue;
            }
            let found = cur.spans(level, &spans).await?;
            for span in spans {
                known.insert(
                    span,
                    found.get(&span).filter(|st| usable_by_day(st)).copied(),
                );
            }
        }
    };
    let mut pieces = pieces;
    pieces.spans.splice(0..0, history);
    let Current {
        mut stats,
        mut checked,
        mut registered,
        ..
    } = cur;
    // Tiles of the partitions the day pieces read, then the markers of every other
    // partition the day depends on: rows ignored (null key) or suspicious (clock skew)
    // are reported whatever their event day (a row stamped years ahead sits in no
    // window). Tiles only checked for their counts are not counted as reused.
    let read_parts: BTreeSet<NaiveDate> = pieces
        .days
        .iter()
        .flat_map(|d| {
            report
                .listing
                .days
                .range(*d - Duration::days(1)..=*d + Duration::days(1))
                .map(|(p, _)| *p)
        })
        .filter(|d| !checked.contains_key(d))
        .collect();
    let counted_parts: BTreeSet<NaiveDate> = report
        .listing
        .days
        .range(..=day)
        .map(|(p, _)| *p)
        .filter(|p| read.first_day.is_none_or(|f| *p >= f))
        .filter(|d| !checked.contains_key(d) && !read_parts.contains(d))
        .collect();
    for (parts, tiles_read) in [(read_parts, true), (counted_parts, false)] {
        if parts.is_empty() {
            continue;
        }
        let (mut s, counts) =
            crate::tiles::ensure_tiles(ctx, pipeline, report, layout, out, &parts).await?;
        if !tiles_read {
            s.partitions_reused = 0;
        }
        stats.add(&s);
        registered &= s.partitions_built == 0;
        checked.extend(counts);
    }
    if !registered {
        register_tables(ctx, pipeline, out, layout, None, day).await?;
    }
    pieces.float_sums = float_sums(ctx, layout).await;
    for level in LEVELS {
        if pieces.spans.iter().any(|s| s.level == level) {
            register_tables(ctx, pipeline, out, layout, Some(level), day).await?;
        }
    }
    register_scoped(ctx, pipeline, out, layout, &pieces, day).await?;
    pieces.scoped = true;
    let mut ignored = Ignored::default();
    for (_, n) in checked.range(read.first_day.unwrap_or(NaiveDate::MIN)..=day) {
        ignored.add(n);
    }
    stats.ignored = ignored;
    Ok((pieces, stats))
}

/// The stored levels, in the order pieces read them.
const LEVELS: [Level; 3] = [Level::History, Level::Month, Level::Week];

/// Whether a feature counts the distinct values of `source` without a window start (the
/// history roll-up keeps no values: such a source reads its months).
fn unbounded_distinct(pipeline: &Pipeline, source: &str) -> bool {
    pipeline.features.iter().any(|f| {
        matches!(&f.def, FeatureDef::Aggregate { source: s, agg: Aggregation::CountDistinct, window, .. }
            if s == source && window.days().is_none())
    })
}

/// The history roll-up that features without a window start read, for a snapshot whose
/// other windows of the same source start on `starts`: the one ending with the latest month
/// that ends on or before `stable` and before every window start (so that no piece of a
/// window overlaps it), if that month ends on or after `floor` (the history's first day).
fn history_span(starts: &BTreeSet<NaiveDate>, floor: NaiveDate, stable: NaiveDate) -> Option<Span> {
    let limit = match starts.first() {
        Some(s) => stable.min(*s - Duration::days(1)),
        None => stable,
    };
    history_ending_by(limit, floor)
}

/// The history ending with the month before that of `span`, if that month ends on or
/// after `floor`.
fn earlier_history(span: Span, floor: NaiveDate) -> Option<Span> {
    history_ending_by(span.first - Duration::days(1), floor)
}

/// The history ending with the latest month that ends on or before `limit`, if that month
/// ends on or after `floor`.
fn history_ending_by(limit: NaiveDate, floor: NaiveDate) -> Option<Span> {
    let mut month = month_start(limit);
    if month.last() > limit {
        month = month_start(month.first - Duration::days(1));
    }
    (month.last() >= floor).then_some(Span {
        level: Level::History,
        first: month.first,
    })
}

/// The piece columns of [`columns`] combined once more, over rows that are themselves
/// pieces (months, or an earlier history): active days add up (the pieces' days are
/// disjoint), days since first/last take the earliest/latest of theirs; every other column
/// combines as it does over tile rows.
fn pieces_combined(cols: &[(String, String)]) -> Vec<String> {
    cols.iter()
        .map(|(n, a)| {
            if n.starts_with("__ad") {
                format!("SUM({n}) AS {n}")
            } else if n.starts_with("__tf") {
                format!("MIN({n}) AS {n}")
            } else if n.starts_with("__tl") {
                format!("MAX({n}) AS {n}")
            } else {
                format!("{a} AS {n}")
            }
        })
        .collect()
}

/// What [`plan_day`] keeps while it makes one source's roll-ups current for a snapshot.
struct Current<'a> {
    ctx: &'a SessionContext,
    pipeline: &'a Pipeline,
    report: &'a SourceReport,
    layout: &'a TileLayout,
    out: &'a Location,
    day: NaiveDate,
    stats: TileStats,
    /// Partitions whose tiles are known current, with their ignored rows.
    checked: BTreeMap<NaiveDate, Ignored>,
    /// Whether the day tiles are registered since the last ones were written.
    registered: bool,
}

impl Current<'_> {
    /// Makes the day tiles of partitions `parts` current (building those missing or
    /// stale, checking each partition once) and registered.
    async fn day_tiles(
        &mut self,
        parts: impl Iterator<Item = NaiveDate>,
    ) -> Result<(), BuildError> {
        let (ctx, pipeline, report, layout, out) =
            (self.ctx, self.pipeline, self.report, self.layout, self.out);
        let unchecked: BTreeSet<NaiveDate> =
            parts.filter(|d| !self.checked.contains_key(d)).collect();
        let (s, counts) =
            crate::tiles::ensure_tiles(ctx, pipeline, report, layout, out, &unchecked).await?;
        self.stats.add(&s);
        self.checked.extend(counts);
        if s.partitions_built > 0 || !self.registered {
            register_tables(ctx, pipeline, out, layout, None, self.day).await?;
            self.registered = true;
        }
        Ok(())
    }

    /// The roll-ups of `spans` (all of `level`, a week or a month), those missing or stale
    /// built (with the tiles they read).
    async fn spans(
        &mut self,
        level: Level,
        spans: &[Span],
    ) -> Result<BTreeMap<Span, Stored>, BuildError> {
        let (ctx, pipeline, report, layout, out) =
            (self.ctx, self.pipeline, self.report, self.layout, self.out);
        let folder = dir(layout, pipeline, out, level);
        let mut found = stored(out, &folder, report, spans).await;
        self.stats.rollups_reused += found.len() as u64;
        let stale: Vec<Span> = spans
            .iter()
            .filter(|s| !found.contains_key(s))
            .copied()
            .collect();
        if stale.is_empty() {
            return Ok(found);
        }
        self.day_tiles(stale.iter().flat_map(|s| span_partitions(report, *s)))
            .await?;
        let floats = float_sums(ctx, layout).await;
        for spans in stale.chunks(spans_per_query(ctx, stale.len())) {
            let built = build(ctx, pipeline, report, layout, out, level, spans, &floats).await?;
            self.stats.rollups_built += built.len() as u64;
            found.extend(built);
            crate::session::release_free_memory();
        }
        Ok(found)
    }

    /// The history roll-up `span` (history from `floor` on), built if missing or stale:
    /// from the latest earlier history still current and the months after it, or from the
    /// day tiles (from the months under a memory limit). A daily build therefore adds one
    /// month to the history once a month.
    async fn history(&mut self, span: Span, floor: NaiveDate) -> Result<Stored, BuildError> {
        let (pipeline, report, layout, out) = (self.pipeline, self.report, self.layout, self.out);
        let folder = dir(layout, pipeline, out, Level::History);
        if let Some(found) = stored(out, &folder, report, &[span]).await.remove(&span) {
            self.stats.rollups_reused += 1;
            return Ok(found);
        }
        let first_month = month_start(floor);
        let mut base = None;
        let mut m = month_start(span.first - Duration::days(1));
        while m.first >= first_month.first {
            let earlier = Span {
                level: Level::History,
                first: m.first,
            };
            if let Some(found) = stored(out, &folder, report, &[earlier])
                .await
                .remove(&earlier)
            {
                base = Some((earlier, found));
                break;
            }
            m = month_start(m.first - Duration::days(1));
        }
        // Under a memory limit, a first history comes from the months (rolled up one per
        // query, see `spans_per_query`) rather than from one grouping of every tile row.
        let max_arrival = match base {
            None if !memory_limited(self.ctx) => {
                self.history_from_tiles(span, floor, &folder).await?
            }
            base => self.history_from(span, floor, base, &folder).await?,
        };
        let stored = Stored { max_arrival };
        write_marker(out, &folder, report, span, stored).await?;
        self.stats.rollups_built += 1;
        Ok(stored)
    }
}

impl Current<'_> {
    /// Writes history `span` from the earlier history `base` (with its stored marker), if
    /// any, and the month roll-ups after it (from the history's first month without one),
    /// built if missing; returns the latest arrival day of its rows.
    async fn history_from(
        &mut self,
        span: Span,
        floor: NaiveDate,
        base: Option<(Span, Stored)>,
        folder: &StorePath,
    ) -> Result<Option<NaiveDate>, BuildError> {
        let (ctx, pipeline, layout, out) = (self.ctx, self.pipeline, self.layout, self.out);
        let mut months = Vec::new();
        let mut m = match base {
            Some((b, _)) => month_start(b.last() + Duration::days(1)),
            None => month_start(floor),
        };
        while m.first <= span.first {
            months.push(m);
            m = month_start(m.last() + Duration::days(1));
        }
        let found = self.spans(Level::Month, &months).await?;
        register_tables(ctx, pipeline, out, layout, Some(Level::Month), self.day).await?;
        let (cols, _) = stored_once(columns(pipeline, layout, &float_sums(ctx, layout).await));
        let names = cols
            .iter()
            .map(|(n, _)| n.as_str())
            .collect::<Vec<_>>()
            .join(", ");
        let mut inputs = vec![format!(
            "SELECT __key, {names} FROM {} WHERE dt IN ({})",
            ident(&table(layout, Level::Month)),
            in_list(months.iter().map(|m| m.first))
        )];
        if let Some((b, _)) = base {
            register_tables(ctx, pipeline, out, layout, Some(Level::History), self.day).await?;
            inputs.push(format!(
                "SELECT __key, {names} FROM {} WHERE dt = {}",
                ident(&table(layout, Level::History)),
                literal(&b.first.to_string())
            ));
        }
        let sql = format!(
            "SELECT {} AS __part, __key, {} AS __lo, {} FROM ({}) GROUP BY __key ORDER BY __key",
            date(span.first),
            date(floor),
            pieces_combined(&cols).join(", "),
            inputs.join(" UNION ALL ")
        );
        crate::tiles::write_split(ctx, &sql, out, folder, &[span.first], &[]).await?;
        Ok(months
            .iter()
            .filter_map(|m| found.get(m))
            .chain(base.as_ref().map(|(_, s)| s))
            .filter_map(|s| s.max_arrival)
            .max())
    }

    /// Writes history `span` from the day tiles (the first time, or when every earlier
    /// history is stale): one grouping of all their rows up to its end, rather than a
    /// roll-up of every month first (a backfill of the benchmark world spent 1.6 s rolling
    /// up 31 months of `subscriptions` for the history of the day after it). Returns the
    /// latest arrival day of its rows.
    async fn history_from_tiles(
        &mut self,
        span: Span,
        floor: NaiveDate,
        folder: &StorePath,
    ) -> Result<Option<NaiveDate>, BuildError> {
        let (ctx, pipeline, report, layout, out) =
            (self.ctx, self.pipeline, self.report, self.layout, self.out);
        let parts: BTreeSet<NaiveDate> = span_partitions(report, span).collect();
        self.day_tiles(parts.iter().copied()).await?;
        let (cols, _) = stored_once(columns(pipeline, layout, &float_sums(ctx, layout).await));
        let rows = format!(
            "SELECT *, {} AS __part FROM {} WHERE {} AND __t <= {}",
            date(span.first),
            ident(&layout.table()),
            crate::sql::partition_condition("dt", &parts, true),
            date(span.last())
        );
        let part = date(span.first);
        let sql = rollup_sql(&cols, &rows, &date(floor), Some(&part));
        crate::tiles::write_split(ctx, &sql, out, folder, &[span.first], &[]).await?;
        let sql = format!("SELECT CAST(MAX(__a) AS VARCHAR) FROM ({rows})");
        let batches = crate::tiles::collect(ctx, &sql, span.first).await?;
        Ok(batches.iter().find_map(|b| {
            use datafusion::arrow::array::{Array, AsArray};
            let text = datafusion::arrow::compute::cast(
                b.column(0),
                &datafusion::arrow::datatypes::DataType::Utf8,
            )
            .ok()?;
            let text = text.as_string::<i32>();
            (b.num_rows() > 0 && !text.is_null(0))
                .then(|| text.value(0).parse().ok())
                .flatten()
        }))
    }
}

/// Writes the marker of roll-up `span` in `dir`: its inputs and latest arrival day.
async fn write_marker(
    out: &Location,
    dir: &StorePath,
    report: &SourceReport,
    span: Span,
    stored: Stored,
) -> Result<(), BuildError> {
    let marker = json!({
        "inputs": span_inputs(report, span),
        "max_arrival": stored.max_arrival.map(|d| d.to_string()),
    });
    let path = marker_path(dir, span);
    out.store
        .put(
            &path,
            PutPayload::from(serde_json::to_vec(&marker).unwrap_or_default()),
        )
        .await
        .map_err(|e| BuildError::Write {
            day: span.first,
            path: path.to_string(),
            reason: e.to_string(),
        })?;
    Ok(())
}

/// The tile partitions day pieces read: a row of event day `d` sits in the partitions of
/// `d - 1`, `d` and `d + 1`.
fn day_partitions(pieces: &Pieces) -> BTreeSet<NaiveDate> {
    pieces
        .days
        .iter()
        .flat_map(|d| [*d - Duration::days(1), *d, *d + Duration::days(1)])
        .collect()
}

/// The SQL conditions selecting the tile rows of day pieces (the partition condition only
/// where the table is the whole folder).
fn day_conditions(pieces: &Pieces, day: NaiveDate, knowledge: Knowledge) -> Vec<String> {
    let mut conds = if pieces.days.is_empty() {
        vec!["FALSE".to_string()]
    } else {
        let mut conds = Vec::new();
        if !pieces.scoped {
            conds.push(format!("dt IN ({})", in_list(day_partitions(pieces))));
        }
        conds.push(format!(
            "__t IN ({})",
            pieces
                .days
                .iter()
                .map(|d| date(*d))
                .collect::<Vec<_>>()
                .join(", ")
        ));
        conds
    };
    if knowledge == Knowledge::AsKnown {
        conds.push(format!("__a <= {}", date(day - Duration::days(1))));
    }
    conds
}

fn spans_of(pieces: &Pieces, level: Level) -> Vec<NaiveDate> {
    pieces
        .spans
        .iter()
        .filter(|s| s.level == level)
        .map(|s| s.first)
        .collect()
}

/// The rows of one source's pieces for snapshot `day`: `__key`, `__lo` (the piece's first
/// day), then the [`columns`] (each partial combined once, shown under every name). Only
/// rows with a key unless `null_keys`.
pub fn pieces_sql(
    pipeline: &Pipeline,
    layout: &TileLayout,
    pieces: &Pieces,
    day: NaiveDate,
    knowledge: Knowledge,
    null_keys: bool,
) -> String {
    let (cols, aliases) = stored_once(columns(pipeline, layout, &pieces.float_sums));
    let keyed = if null_keys {
        "TRUE"
    } else {
        "__key IS NOT NULL"
    };
    let aggs = one_day_aggregates(&cols);
    let names: Vec<&str> = cols.iter().map(|(n, _)| n.as_str()).collect();
    let mut parts = Vec::new();
    if !pieces.days.is_empty() || pieces.spans.is_empty() {
        let mut conds = vec![keyed.to_string()];
        conds.extend(day_conditions(pieces, day, knowledge));
        parts.push(format!(
            "SELECT __key, __t AS __lo, {} FROM {} WHERE {} GROUP BY __key, __t",
            aggs.join(", "),
            ident(&days_table(pieces, &layout.table(), day)),
            conds.join(" AND ")
        ));
    }
    for level in LEVELS {
        let firsts = spans_of(pieces, level);
        if !firsts.is_empty() {
            let (name, cond) = spans_table(pieces, &table(layout, level), &firsts, day);
            parts.push(format!(
                "SELECT __key, __lo, {} FROM {} WHERE {keyed}{cond}",
                names.join(", "),
                ident(&name),
            ));
        }
    }
    let all = parts.join(" UNION ALL ");
    if aliases.is_empty() {
        return all;
    }
    let shown: Vec<String> = aliases
        .iter()
        .map(|(alias, stored)| format!("{stored} AS {alias}"))
        .collect();
    format!("SELECT *, {} FROM ({all})", shown.join(", "))
}

/// The distinct values of feature `feature` in one source's pieces: `__key`, `__lo`,
/// `__v` (a value may repeat across pieces).
pub fn distinct_pieces_sql(
    layout: &TileLayout,
    feature: usize,
    pieces: &Pieces,
    day: NaiveDate,
    knowledge: Knowledge,
) -> String {
    let mut parts = Vec::new();
    if !pieces.days.is_empty() || pieces.spans.is_empty() {
        parts.push(format!(
            "SELECT __key, __t AS __lo, __v FROM {} WHERE {}",
            ident(&days_table(pieces, &layout.distinct_table(feature), day)),
            day_conditions(pieces, day, knowledge).join(" AND ")
        ));
    }
    for level in [Level::Month, Level::Week] {
        let firsts = spans_of(pieces, level);
        if !firsts.is_empty() {
            let (name, cond) = spans_table(
                pieces,
                &distinct_table(layout, feature, level),
                &firsts,
                day,
            );
            parts.push(format!(
                "SELECT __key, __lo, __v FROM {} WHERE TRUE{cond}",
                ident(&name),
            ));
        }
    }
    parts.join(" UNION ALL ")
}

/// The table day pieces read their tile rows from: the folder's, or the one over only
/// their partitions (none when there are no day pieces: the query reads nothing from it).
fn days_table(pieces: &Pieces, table: &str, day: NaiveDate) -> String {
    if pieces.scoped && !pieces.days.is_empty() {
        scoped_table(table, day)
    } else {
        table.to_string()
    }
}

/// The roll-up table spans starting on `firsts` read from, and the condition (after an
/// `AND`) that selects them there.
fn spans_table(
    pieces: &Pieces,
    table: &str,
    firsts: &[NaiveDate],
    day: NaiveDate,
) -> (String, String) {
    if pieces.scoped {
        (scoped_table(table, day), String::new())
    } else {
        (
            table.to_string(),
            format!(" AND dt IN ({})", in_list(firsts)),
        )
    }
}

/// Registers the tables over only the partitions `pieces` read ([`scoped_table`]): the day
/// tiles of their day pieces and the roll-ups of their spans, main and distinct-value.
async fn register_scoped(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    layout: &TileLayout,
    pieces: &Pieces,
    day: NaiveDate,
) -> Result<(), BuildError> {
    let mut tables = Vec::new();
    let days = day_partitions(pieces);
    if !days.is_empty() {
        tables.push((
            layout.dir(out),
            layout.table(),
            days.clone(),
            layout.aliases.as_slice(),
        ));
        for (i, _, _) in &layout.distinct {
            tables.push((
                layout.distinct_dir(out, *i),
                layout.distinct_table(*i),
                days.clone(),
                &[],
            ));
        }
    }
    for level in LEVELS {
        let firsts: BTreeSet<NaiveDate> = spans_of(pieces, level).into_iter().collect();
        if firsts.is_empty() {
            continue;
        }
        tables.push((
            dir(layout, pipeline, out, level),
            table(layout, level),
            firsts.clone(),
            &[],
        ));
        if level == Level::History {
            continue;
        }
        for (i, _, _) in &layout.distinct {
            tables.push((
                distinct_dir(layout, out, *i, level),
                distinct_table(layout, *i, level),
                firsts.clone(),
                &[],
            ));
        }
    }
    for (folder, name, parts, aliases) in tables {
        crate::tiles::register_partitions(
            ctx,
            out,
            &folder,
            &name,
            &scoped_table(&name, day),
            &parts,
            aliases,
        )
        .await
        .map_err(|source| BuildError::Engine { day, source })?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Counts and active days over two windows: the count partial is combined once for
    /// all four features, active days once for both windows.
    #[test]
    fn roll_up_partials_defined_alike_are_kept_once() {
        let text = "daymark: 1\nname: t\ntimezone: UTC\nkey: k\noutput: out\nsources:\n  s: { location: s, event_time: t }\npopulation:\n  recent_activity: { source: s, within: 30d }\nfeatures:\n  - { name: n, source: s, agg: count, windows: [7d, 28d] }\n  - { name: a, source: s, agg: active_days, windows: [7d, 28d] }\n";
        let p = daymark_spec::load_str(text, None).unwrap();
        let layout = crate::tiles::layout(&p, &p.sources["s"]).unwrap();
        let (kept, aliases) = stored_once(columns(&p, &layout, &BTreeSet::new()));
        let kept: Vec<String> = kept.iter().map(|(n, a)| format!("{a} AS {n}")).collect();
        assert_eq!(
            kept,
            [
                "SUM(__rows) AS __rows",
                "SUM(__ahead) AS __ahead",
                "MAX(__mev) AS __mev",
                "SUM(__pc) AS __pc",
                "COUNT(DISTINCT __t) FILTER (WHERE __pc > 0) AS __ad2",
            ]
        );
        let aliases: Vec<(&str, &str)> = aliases
            .iter()
            .map(|(a, s)| (a.as_str(), s.as_str()))
            .collect();
        assert_eq!(
            aliases,
            [
                ("__c0", "__pc"),
                ("__c1", "__pc"),
                ("__c2", "__pc"),
                ("__c3", "__pc"),
                ("__ad3", "__ad2"),
            ]
        );
    }

    fn d(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    /// Raw files whose names and tags need JSON escapes (quote, backslash, a control
    /// character, non-ASCII), with and without an entity tag.
    fn odd_files(day: &str) -> Vec<daymark_store::DataFile> {
        let at = |s: &str| chrono::DateTime::parse_from_rfc3339(s).unwrap().to_utc();
        vec![
            daymark_store::DataFile {
                path: StorePath::from(format!("ev/dt={day}/a \"q\" \\ é\u{1}.parquet")),
                size: 12_345,
                modified: at("2026-03-08T08:00:00.123456789Z"),
                etag: Some("\"tag/1\"".into()),
            },
            daymark_store::DataFile {
                path: StorePath::from(format!("ev/dt={day}/b.parquet")),
                size: 0,
                modified: at("2026-03-09T00:00:00Z"),
                etag: None,
            },
        ]
    }

    /// The hashes written directly equal those of the JSON values they stand for (so
    /// markers written before they were written directly stay current).
    #[test]
    fn span_inputs_are_the_hash_of_their_value() {
        let mut listing = daymark_store::Listing::default();
        for day in ["2026-03-07", "2026-03-08", "2026-03-09"] {
            listing.days.insert(d(day), odd_files(day));
        }
        listing.days.insert(d("2026-03-10"), Vec::new());
        let report = SourceReport {
            name: "ev".into(),
            location: None,
            listing,
            schema: None,
            rows: 0,
            problems: Vec::new(),
            footer_reads: Default::default(),
        };
        let span = Span {
            level: Level::Week,
            first: d("2026-03-09"),
        };
        let value: Vec<serde_json::Value> = report
            .listing
            .days
            .range(span_range(span))
            .map(|(d, files)| serde_json::json!([d.to_string(), crate::tiles::fingerprint(files)]))
            .collect();
        assert_eq!(value.len(), 3, "08 (the day before), 09 and 10");
        assert_eq!(
            span_inputs(&report, span),
            hash_value(&serde_json::json!([ROLLUP_FORMAT, value]))
        );
        for files in [odd_files("2026-03-08"), Vec::new()] {
            assert_eq!(
                crate::tiles::fingerprint_hash(&files),
                hash_value(&crate::tiles::fingerprint(&files))
            );
        }
    }

    fn week(s: &str) -> Span {
        Span {
            level: Level::Week,
            first: d(s),
        }
    }

    fn month(s: &str) -> Span {
        Span {
            level: Level::Month,
            first: d(s),
        }
    }

    fn days(from: &str, to: &str) -> Vec<NaiveDate> {
        d(from).iter_days().take_while(|x| *x <= d(to)).collect()
    }

    #[test]
    fn spans_end_on_sunday_and_on_the_last_of_the_month() {
        // 2026-06-01 is a Monday (calendar); February 2028 has 29 days (leap year).
        assert_eq!(week("2026-06-01").last(), d("2026-06-07"));
        assert_eq!(month("2028-02-01").last(), d("2028-02-29"));
        assert_eq!(month("2026-12-01").last(), d("2026-12-31"));
    }

    /// Snapshot 2026-06-17 with 7, 28 and 91-day windows (starts 06-10, 05-20, 03-18),
    /// worked by hand: cuts at each start, months and weeks (Mondays: 03-23, 03-30, 05-04,
    /// 05-11, 05-18, 05-25, 06-01, 06-08, 06-15) where they fit before the next cut and end
    /// by D-2 = 06-15; the week of 03-30 would hide April, so 03-30 and 03-31 are days.
    #[test]
    fn windows_are_cut_into_months_weeks_and_days() {
        let starts: BTreeSet<NaiveDate> = [d("2026-06-10"), d("2026-05-20"), d("2026-03-18")]
            .into_iter()
            .collect();
        let p = cut(
            &starts,
            d("2026-03-18"),
            d("2026-06-16"),
            d("2026-06-15"),
            &|_| true,
        );
        assert_eq!(
            p.spans,
            vec![
                week("2026-03-23"),
                month("2026-04-01"),
                week("2026-05-04"),
                week("2026-05-11"),
                week("2026-05-25"),
                week("2026-06-01"),
            ]
        );
        let mut expected = days("2026-03-18", "2026-03-22");
        expected.extend(days("2026-03-30", "2026-03-31"));
        expected.extend(days("2026-05-01", "2026-05-03"));
        expected.extend(days("2026-05-18", "2026-05-24"));
        expected.extend(days("2026-06-08", "2026-06-16"));
        assert_eq!(p.days, expected);
        // Every day from the first start to D-1 is in exactly one piece.
        let mut covered: Vec<NaiveDate> = p.days.clone();
        for s in &p.spans {
            covered.extend(days(&s.first.to_string(), &s.last().to_string()));
        }
        covered.sort();
        assert_eq!(covered, days("2026-03-18", "2026-06-16"));
    }

    #[test]
    fn the_history_ends_with_the_last_month_before_the_stable_days_and_every_window() {
        let h = |s: &str| Span {
            level: Level::History,
            first: d(s),
        };
        let none = BTreeSet::new();
        let floor = d("2025-12-31");
        // Only unbounded features: the last month that ends by the stable day.
        assert_eq!(
            history_span(&none, floor, d("2026-03-31")),
            Some(h("2026-03-01"))
        );
        assert_eq!(
            history_span(&none, floor, d("2026-03-30")),
            Some(h("2026-02-01"))
        );
        // A 91-day window starting 2026-03-01 (snapshot 2026-05-31): February, which ends
        // the day before it.
        let starts = BTreeSet::from([d("2026-03-01"), d("2026-05-03")]);
        assert_eq!(
            history_span(&starts, floor, d("2026-05-29")),
            Some(h("2026-02-01"))
        );
        // A history ending on the floor (the day before the first partition) still holds
        // that day's rows; one ending before it holds nothing.
        assert_eq!(
            history_span(&none, floor, d("2026-01-30")),
            Some(h("2025-12-01"))
        );
        assert_eq!(history_span(&none, d("2026-01-01"), d("2026-01-30")), None);
        assert_eq!(
            earlier_history(h("2026-02-01"), floor),
            Some(h("2026-01-01"))
        );
        assert_eq!(
            earlier_history(h("2026-01-01"), floor),
            Some(h("2025-12-01"))
        );
        assert_eq!(earlier_history(h("2025-12-01"), floor), None);
        assert_eq!(h("2026-02-01").last(), d("2026-02-28"));
    }

    #[test]
    fn an_unusable_month_falls_back_to_weeks_then_days() {
        let starts = BTreeSet::new();
        let no_april = |s: Span| s != month("2026-04-01") && s != week("2026-04-13");
        let p = cut(
            &starts,
            d("2026-04-01"),
            d("2026-04-30"),
            d("2026-05-30"),
            &no_april,
        );
        assert_eq!(
            p.spans,
            vec![week("2026-04-06"), week("2026-04-20")],
            "April 2026 starts on a Wednesday"
        );
        let mut expected = days("2026-04-01", "2026-04-05");
        expected.extend(days("2026-04-13", "2026-04-19"));
        expected.extend(days("2026-04-27", "2026-04-30"));
        assert_eq!(p.days, expected);
    }
}
