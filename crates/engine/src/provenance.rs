//! Provenance of a snapshot: per source, the latest event time and the latest arrival time
//! among the rows the snapshot was allowed to read.
//!
//! It is computed by one small aggregate query per source over the same raw rows and the
//! same cutoff and knowledge filters as the naive snapshot query ([`crate::sql`]), or, for
//! tiled builds, over the tile rows the snapshot combines (tiles keep each row's latest
//! event and arrival time), and is
//! written into the snapshot's Parquet footer (key-value metadata under
//! [`METADATA_KEY`]) so that it is published in the same rename as the data. The audit
//! checks that both times are before the cutoff.
//!
//! Limit: the lower bound is the earliest window start (raw: the first day partition
//! read), so when a source has no row inside a shorter window the latest event may be one
//! that this feature did not use. That never hides a row read past the cutoff.

use crate::sql::{ident, literal, snapshot_query, ts_literal, KnowledgeOverride};
use arrow::array::{Array, AsArray};
use arrow::datatypes::{Int64Type, TimestampMicrosecondType};
use chrono::{DateTime, NaiveDate, Utc};
use datafusion::error::Result;
use datafusion::prelude::SessionContext;
use daymark_spec::{Knowledge, Pipeline};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Key of the snapshot file's key-value metadata holding the provenance (JSON).
pub const METADATA_KEY: &str = "daymark.provenance";

/// What one source contributed to a snapshot.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SourceProvenance {
    /// Latest event time among the rows read, RFC 3339 UTC (`None`: no row).
    pub max_event_time: Option<String>,
    /// Latest arrival time among the rows read, RFC 3339 UTC (`None`: no row or no arrival
    /// column).
    pub max_arrival_time: Option<String>,
    /// Rows that passed the cutoff and knowledge filters (before de-duplication).
    pub rows: i64,
    /// Knowledge mode the source was read in.
    pub knowledge: Knowledge,
}

/// The provenance of one snapshot.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// The snapshot day (YYYY-MM-DD).
    pub day: String,
    /// Its cutoff, RFC 3339 UTC.
    pub cutoff: String,
    /// Per source read.
    pub sources: BTreeMap<String, SourceProvenance>,
}

/// The aggregate query of one source (over the table registered under its name).
pub fn source_sql(
    pipeline: &Pipeline,
    source: &str,
    read: &crate::sql::SourceRead,
) -> Option<String> {
    let src = pipeline.sources.get(source)?;
    let dt = ident(&src.spec.day_partition);
    let ev = ident(&src.spec.event_time);
    let mut conds = vec![format!("{dt} <= {}", literal(&read.last_day.to_string()))];
    if let Some(d) = read.first_day {
        conds.push(format!("{dt} >= {}", literal(&d.to_string())));
    }
    conds.push(format!("{ev} < {}", ts_literal(read.until)));
    if let (Knowledge::AsKnown, Some(a)) = (read.knowledge, &src.spec.arrival_time) {
        conds.push(format!("{} < {}", ident(a), ts_literal(read.until)));
    }
    conds.push(format!("{} IS NOT NULL", ident(&src.key)));
    let ts = |c: &str| format!("arrow_cast(MAX({c}), 'Timestamp(Microsecond, Some(\"UTC\"))')");
    let arrival = match &src.spec.arrival_time {
        Some(a) => ts(&ident(a)),
        None => "arrow_cast(NULL, 'Timestamp(Microsecond, Some(\"UTC\"))')".to_string(),
    };
    Some(format!(
        "SELECT {} AS max_event, {arrival} AS max_arrival, COUNT(*) AS n FROM {} WHERE {}",
        ts(&ev),
        ident(source),
        conds.join(" AND ")
    ))
}

/// The same aggregate over the pieces a tiled snapshot reads ([`crate::rollups`]): tiles
/// and roll-ups keep the latest event and arrival time of their rows (`__mev`, `__mar`)
/// and how many raw rows they combine, and days run from one cutoff to the next, so the
/// pieces hold exactly the rows the cutoff filters would pass (from the earliest window
/// start on).
pub fn tiles_sql(
    pipeline: &Pipeline,
    layout: &crate::tiles::TileLayout,
    read: &crate::sql::SourceRead,
    pieces: &crate::rollups::Pieces,
    day: NaiveDate,
) -> Option<String> {
    let src = pipeline.sources.get(&layout.source)?;
    let ts = |c: &str| format!("arrow_cast(MAX({c}), 'Timestamp(Microsecond, Some(\"UTC\"))')");
    let arrival = if src.spec.arrival_time.is_some() {
        ts("__mar")
    } else {
        "arrow_cast(NULL, 'Timestamp(Microsecond, Some(\"UTC\"))')".to_string()
    };
    Some(format!(
        "SELECT {} AS max_event, {arrival} AS max_arrival, CAST(SUM(__rows) AS BIGINT) AS n FROM ({})",
        ts("__mev"),
        crate::rollups::pieces_sql(pipeline, layout, pieces, day, read.knowledge, false)
    ))
}

/// Computes the provenance of snapshot `day`: from the raw sources (registered as tables)
/// or, with `tiles`, from the pieces of its plan (registered by
/// [`crate::rollups::plan_day`]).
pub async fn provenance(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    day: NaiveDate,
    mode: KnowledgeOverride,
    tiles: Option<Tiled<'_>>,
) -> Result<Provenance> {
    let q = snapshot_query(pipeline, day, mode);
    let no_pieces = crate::rollups::Pieces::default();
    // One small query per source, run side by side: a daily build waits for them.
    let reads = q.reads.iter().filter_map(|(name, read)| {
        let sql = match tiles.map(|(l, plan)| (l.get(name), plan)) {
            Some((Some(layout), plan)) => tiles_sql(
                pipeline,
                layout,
                read,
                plan.sources.get(name).unwrap_or(&no_pieces),
                day,
            ),
            _ => source_sql(pipeline, name, read),
        }?;
        Some(async move {
            let batches = ctx.sql(&sql).await?.collect().await?;
            let mut p = SourceProvenance {
                max_event_time: None,
                max_arrival_time: None,
                rows: 0,
                knowledge: read.knowledge,
            };
            for b in batches.iter().filter(|b| b.num_rows() > 0) {
                let time = |i: usize| {
                    let a = b.column(i).as_primitive::<TimestampMicrosecondType>();
                    (!a.is_null(0))
                        .then(|| DateTime::from_timestamp_micros(a.value(0)))?
                        .map(rfc3339)
                };
                p.max_event_time = time(0);
                p.max_arrival_time = time(1);
                p.rows = b.column(2).as_primitive::<Int64Type>().value(0);
            }
            Ok::<_, datafusion::error::DataFusionError>((name.clone(), p))
        })
    });
    let sources: BTreeMap<String, SourceProvenance> = futures::future::try_join_all(reads)
        .await?
        .into_iter()
        .collect();
    Ok(Provenance {
        day: day.to_string(),
        cutoff: rfc3339(q.cutoff),
        sources,
    })
}

/// The tile layouts and the plan of a tiled snapshot.
pub type Tiled<'a> = (
    &'a BTreeMap<String, crate::tiles::TileLayout>,
    &'a crate::rollups::DayPlan,
);

/// An instant as RFC 3339 UTC with microseconds, the form used in provenance.
pub fn rfc3339(t: DateTime<Utc>) -> String {
    t.format("%Y-%m-%dT%H:%M:%S%.6fZ").to_string()
}

/// Parses an instant written by [`rfc3339`].
pub fn parse_instant(text: &str) -> Option<DateTime<Utc>> {
    DateTime::parse_from_rfc3339(text)
        .ok()
        .map(|t| t.with_timezone(&Utc))
}

/// The provenance of every snapshot of `days` (consecutive) from the tiles, one query per
/// source: tile rows grouped by partition and first visible day, then, per day, the rows
/// visible by then within the partitions that day reads (what [`tiles_sql`] selects).
pub async fn range_provenance(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    days: &[NaiveDate],
    mode: KnowledgeOverride,
    tiles: &BTreeMap<String, crate::tiles::TileLayout>,
) -> Result<BTreeMap<NaiveDate, Provenance>> {
    let epoch = NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch");
    let num = |d: NaiveDate| (d - epoch).num_days();
    let queries: Vec<_> = days
        .iter()
        .map(|d| (*d, snapshot_query(pipeline, *d, mode)))
        .collect();
    let mut out: BTreeMap<NaiveDate, Provenance> = queries
        .iter()
        .map(|(d, q)| {
            (
                *d,
                Provenance {
                    day: d.to_string(),
                    cutoff: rfc3339(q.cutoff),
                    sources: BTreeMap::new(),
                },
            )
        })
        .collect();
    let Some((_, last_q)) = queries.last() else {
        return Ok(out);
    };
    for (name, read) in &last_q.reads {
        let Some(layout) = tiles.get(name) else {
            continue;
        };
        let has_arrival = pipeline
            .sources
            .get(name)
            .is_some_and(|s| s.spec.arrival_time.is_some());
        // Per day: its number and the partitions it reads.
        let values: Vec<String> = queries
            .iter()
            .filter_map(|(d, q)| {
                let r = q.reads.get(name)?;
                Some(format!(
                    "({}, {}, {})",
                    num(*d),
                    r.first_day
                        .map(|f| literal(&f.to_string()))
                        .unwrap_or_else(|| "''".into()),
                    literal(&r.last_day.to_string())
                ))
            })
            .collect();
        if values.is_empty() {
            continue;
        }
        let vn = crate::backfill::first_visible_day_sql(read.knowledge);
        let ts = |c: &str| format!("arrow_cast(MAX({c}), 'Timestamp(Microsecond, Some(\"UTC\"))')");
        let arrival = if has_arrival {
            ts("g.__mar")
        } else {
            "arrow_cast(NULL, 'Timestamp(Microsecond, Some(\"UTC\"))')".to_string()
        };
        // Tiles of a source without an arrival column have no `__mar`.
        let mar = if has_arrival {
            "__mar".to_string()
        } else {
            "arrow_cast(NULL, 'Timestamp(Microsecond, Some(\"UTC\"))') AS __mar".to_string()
        };
        let sql = format!(
            "WITH g AS (SELECT dt, __vn, MAX(__mev) AS __mev, MAX(__mar) AS __mar, SUM(__rows) AS __rows FROM (SELECT dt, __mev, {mar}, __rows, {vn} AS __vn FROM {} WHERE __key IS NOT NULL AND __t IS NOT NULL) WHERE __vn IS NOT NULL GROUP BY dt, __vn),
             d(dn, first_dt, last_dt) AS (VALUES {})
             SELECT d.dn, {} AS max_event, {arrival} AS max_arrival, CAST(COALESCE(SUM(g.__rows), 0) AS BIGINT) AS n
             FROM d LEFT JOIN g ON g.__vn <= d.dn AND g.dt <= d.last_dt AND g.dt >= d.first_dt
             GROUP BY d.dn",
            ident(&layout.table()),
            values.join(", "),
            ts("g.__mev"),
        );
        for b in ctx.sql(&sql).await?.collect().await? {
            let dn = b.column(0).as_primitive::<Int64Type>();
            let ev = b.column(1).as_primitive::<TimestampMicrosecondType>();
            let ar = b.column(2).as_primitive::<TimestampMicrosecondType>();
            let n = b.column(3).as_primitive::<Int64Type>();
            for i in 0..b.num_rows() {
                let day = epoch + chrono::Duration::days(dn.value(i));
                let time = |a: &arrow::array::PrimitiveArray<TimestampMicrosecondType>| {
                    (!a.is_null(i))
                        .then(|| DateTime::from_timestamp_micros(a.value(i)))?
                        .map(rfc3339)
                };
                if let Some(p) = out.get_mut(&day) {
                    p.sources.insert(
                        name.clone(),
                        SourceProvenance {
                            max_event_time: time(ev),
                            max_arrival_time: time(ar),
                            rows: n.value(i),
                            knowledge: read.knowledge,
                        },
                    );
                }
            }
        }
    }
    Ok(out)
}
