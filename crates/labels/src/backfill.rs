//! Label back-fill: the label of every built snapshot day, once it has matured.
//!
//! Definition (the churn default; `ended` and `resumed` are the pipeline's SQL conditions
//! over the label source's rows, `t` is a row's event time):
//!
//! - `cutoff` is snapshot D's cutoff, `horizon_end` the cutoff of D + horizon (the same wall
//!   time `horizon` calendar days later in the pipeline zone), and `matured_at` the cutoff
//!   of D + horizon + grace.
//! - An end is a row matching `ended` with `cutoff < t <= horizon_end`. It is cancelled
//!   when a row matching `resumed` follows in `(t, t + grace]`, where `t + grace` is the
//!   same wall time `grace` calendar days later in the pipeline zone: the resumption's
//!   local wall-clock time is compared with the end's plus `grace` days. (Comparing wall
//!   clocks never fails when `t + grace` falls into a spring-forward gap, where an instant
//!   does not exist; in a repeated fall-back hour both occurrences compare equal.)
//! - `label` is true when the key has an end that is not cancelled; `days_to_event` is then
//!   k for the first such end, where the end falls in `(cutoff of D+k-1, cutoff of D+k]`
//!   (1 ..= horizon); null otherwise.
//! - `censored` is true when the label is false and the key had already ended at the
//!   cutoff: its newest `ended` row at or before the cutoff is not followed by a `resumed`
//!   row at or before the cutoff. Such a key could not be observed ending in the window.
//! - A label matures when every source it reads (the label source) has a watermark at or
//!   after `matured_at`; no label is written before.

use crate::watermark::Watermark;
use crate::{list_partitions, object_url, LabelError};
use arrow::array::{Array, AsArray};
use arrow::datatypes::Int64Type;
use chrono::{DateTime, Duration, NaiveDate, Utc};
use datafusion::prelude::{ParquetReadOptions, SessionContext};
use daymark_engine::build::{child, snapshots_dir, write_query};
use daymark_engine::sql::{ident, literal, ts_literal, KnowledgeOverride};
use daymark_engine::time;
use daymark_spec::{Knowledge, LabelSpec, Pipeline};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::ObjectStoreExt;
use daymark_store::Location;
use std::collections::BTreeMap;

/// The instants that bound one snapshot day's label.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LabelTimes {
    /// The snapshot day.
    pub day: NaiveDate,
    /// Its cutoff.
    pub cutoff: DateTime<Utc>,
    /// The end of the label window `(cutoff, horizon_end]`.
    pub horizon_end: DateTime<Utc>,
    /// When the label window and its grace close: the label matures once every source it
    /// reads is complete up to this instant.
    pub matured_at: DateTime<Utc>,
}

/// The label instants of snapshot `day`.
pub fn label_times(pipeline: &Pipeline, label: &LabelSpec, day: NaiveDate) -> LabelTimes {
    let (tz, at) = (pipeline.timezone, pipeline.cutoff_time);
    LabelTimes {
        day,
        cutoff: time::cutoff(tz, at, day),
        horizon_end: time::cutoff(tz, at, day + Duration::days(label.horizon.0 as i64)),
        matured_at: time::cutoff(
            tz,
            at,
            day + Duration::days(label.horizon.0 as i64 + label.grace.0 as i64),
        ),
    }
}

/// Where labels go: `labels/` next to `snapshots/`, or `labels-<mode>/` for snapshots
/// built with a forced knowledge mode.
pub fn labels_dir(mode: KnowledgeOverride) -> &'static str {
    match mode {
        None => "labels",
        Some(Knowledge::AsKnown) => "labels-as-known",
        Some(Knowledge::EventTime) => "labels-event-time",
    }
}

/// The published path of the labels of `day`.
pub fn label_path(out: &Location, mode: KnowledgeOverride, day: NaiveDate) -> StorePath {
    child(
        &out.prefix,
        &[labels_dir(mode), &format!("dt={day}"), "part-0.parquet"],
    )
}

/// The rows of the label source that can decide a label (those matching `ended` or
/// `resumed`), from day partitions up to `last_partition`: key `__k`, event time `__t`
/// (UTC), and flags `__end`, `__res`.
pub fn label_events_sql(
    pipeline: &Pipeline,
    label: &LabelSpec,
    last_partition: NaiveDate,
) -> String {
    let src = &pipeline.sources[&label.source];
    let resumed = label.resumed.as_deref().unwrap_or("false");
    format!(
        "SELECT * FROM (
  SELECT {src_key} AS __k,
         arrow_cast({ev}, 'Timestamp(Microsecond, Some(\"UTC\"))') AS __t,
         coalesce(({ended}), false) AS __end,
         coalesce(({resumed}), false) AS __res
  FROM {table}
  WHERE {dt} <= {last} AND {src_key} IS NOT NULL AND {ev} IS NOT NULL
) WHERE __end OR __res",
        src_key = ident(&src.key),
        ev = ident(&src.spec.event_time),
        ended = label.ended,
        table = ident(&label.source),
        dt = ident(&src.spec.day_partition),
        last = literal(&last_partition.to_string()),
    )
}

/// The last day partition the label of `day` needs (one day of slack for any zone).
pub fn last_partition(t: &LabelTimes) -> NaiveDate {
    t.matured_at.date_naive() + Duration::days(1)
}

/// The SQL computing the labels of snapshot `day` for every key of the table
/// `snapshot_table` (the snapshot of that day), over `events` (a table or parenthesised
/// query with the columns of [`label_events_sql`]). Rows are ordered by key, so the same
/// inputs give the same file.
pub fn label_sql(
    pipeline: &Pipeline,
    label: &LabelSpec,
    day: NaiveDate,
    snapshot_table: &str,
    events: &str,
) -> String {
    let t = label_times(pipeline, label, day);
    let tz = pipeline.timezone.name();
    let local = |col: &str| format!("arrow_cast({col}, 'Timestamp(Microsecond, Some(\"{tz}\"))')");
    let shift = pipeline
        .cutoff_time
        .signed_duration_since(chrono::NaiveTime::MIN)
        .num_seconds();
    // The day (as cutoff-to-cutoff days) of the instant just before the end.
    let day_before = format!(
        "CAST(to_local_time({}) - INTERVAL '{shift} seconds' AS DATE)",
        local("f.__t - INTERVAL '1 microsecond'")
    );
    let epoch_day = (day - NaiveDate::from_ymd_opt(1970, 1, 1).expect("valid date")).num_days();
    let key = ident(&pipeline.file.key);
    let grace = label.grace.0;
    format!(
        "WITH ev AS (SELECT * FROM {events} WHERE __t <= {matured}),
ends AS (
  SELECT __k, __t FROM ev WHERE __end AND __t > {cutoff} AND __t <= {horizon_end}
),
kept AS (
  SELECT e.__k, e.__t
  FROM ends e LEFT JOIN ev r
    ON r.__k = e.__k AND r.__res AND r.__t > e.__t
   AND to_local_time({r_local}) <= to_local_time({e_local}) + INTERVAL '{grace} days'
  GROUP BY e.__k, e.__t
  HAVING count(r.__t) = 0
),
first_end AS (SELECT __k, min(__t) AS __t FROM kept GROUP BY __k),
before AS (
  SELECT __k,
         max(CASE WHEN __end THEN __t END) AS __last_end,
         max(CASE WHEN __res THEN __t END) AS __last_res
  FROM ev WHERE __t <= {cutoff} GROUP BY __k
)
SELECT s.{key} AS {key},
       CAST({day_lit} AS DATE) AS snapshot_date,
       f.__t IS NOT NULL AS {label_col},
       CASE WHEN f.__t IS NULL THEN NULL
            ELSE CAST(arrow_cast({day_before}, 'Int32') - {epoch_day} + 1 AS INT) END AS days_to_event,
       (f.__t IS NULL AND b.__last_end IS NOT NULL
        AND (b.__last_res IS NULL OR b.__last_res < b.__last_end)) AS censored,
       {matured} AS matured_at
FROM {snap} s
LEFT JOIN first_end f ON f.__k = s.{key}
LEFT JOIN before b ON b.__k = s.{key}
ORDER BY s.{key}",
        cutoff = ts_literal(t.cutoff),
        horizon_end = ts_literal(t.horizon_end),
        r_local = local("r.__t"),
        e_local = local("e.__t"),
        day_lit = literal(&day.to_string()),
        label_col = ident(&label.name),
        matured = ts_literal(t.matured_at),
        snap = ident(snapshot_table),
    )
}

/// The instant up to which every source the label reads is complete (`None`: some source
/// has no partitions, so nothing matures).
pub fn label_watermark(
    label: &LabelSpec,
    watermarks: &BTreeMap<String, Option<Watermark>>,
) -> Option<DateTime<Utc>> {
    watermarks
        .get(&label.source)
        .cloned()
        .flatten()
        .map(|w| w.at)
}

/// One snapshot day's labels.
#[derive(Debug, Clone, PartialEq)]
pub struct LabelDay {
    /// The snapshot day.
    pub day: NaiveDate,
    /// Rows (one per snapshot key).
    pub rows: u64,
    /// Rows whose label is true.
    pub positives: u64,
    /// Rows marked censored.
    pub censored: u64,
    /// Whether this run wrote the file (false: it was already up to date).
    pub written: bool,
    /// When the label window closed.
    pub matured_at: DateTime<Utc>,
}

/// A snapshot day whose label has not matured.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PendingDay {
    /// The snapshot day.
    pub day: NaiveDate,
    /// The instant its label window closes.
    pub matured_at: DateTime<Utc>,
}

/// What a back-fill did.
#[derive(Debug, Clone, Default)]
pub struct Backfill {
    /// The label source's watermark used.
    pub watermark: Option<DateTime<Utc>>,
    /// Days with matured labels (written now or already up to date), in date order.
    pub labeled: Vec<LabelDay>,
    /// Built snapshot days whose labels have not matured, in date order.
    pub pending: Vec<PendingDay>,
}

/// Computes and publishes the labels of every built snapshot day (up to `until`) whose
/// label has matured under `watermarks`. A day whose label file is at least as new as its
/// snapshot is left untouched, so a second run writes nothing. The label source must be
/// registered in `ctx` (see `daymark_engine::register_sources`).
pub async fn backfill(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    watermarks: &BTreeMap<String, Option<Watermark>>,
    out: &Location,
    mode: KnowledgeOverride,
    until: Option<NaiveDate>,
) -> Result<Backfill, LabelError> {
    let label = pipeline.label.as_ref().ok_or(LabelError::NoLabel)?;
    ctx.register_object_store(&out.root_url, out.store.clone());
    let snapshots = list_partitions(out, snapshots_dir(mode)).await?;
    let existing = list_partitions(out, labels_dir(mode)).await?;
    let wm = label_watermark(label, watermarks);
    let mut result = Backfill {
        watermark: wm,
        ..Default::default()
    };
    // Which days are due, and which of them need writing.
    let mut due = Vec::new();
    for (day, snap_meta) in &snapshots {
        if until.is_some_and(|u| *day > u) {
            continue;
        }
        let t = label_times(pipeline, label, *day);
        if wm.is_none_or(|w| w < t.matured_at) {
            result.pending.push(PendingDay {
                day: *day,
                matured_at: t.matured_at,
            });
            continue;
        }
        let up_to_date = existing
            .get(day)
            .is_some_and(|m| m.last_modified >= snap_meta.last_modified);
        due.push((*day, snap_meta, t, up_to_date));
    }
    // The rows that decide labels (ends and resumptions: a small share of a change log)
    // are read from the source once per run, not once per day.
    let last = due
        .iter()
        .filter(|d| !d.3)
        .map(|d| last_partition(&d.2))
        .max();
    // They go to a Parquet file in the output store's staging folder, read by each day's
    // query and removed at the end: a table held in memory (`DataFrame::cache`) would not
    // travel with a plan to a cluster (checked by `DAYMARK_PLANS_THROUGH_PROTOBUF`).
    let mut events_file = None;
    if let Some(last) = last {
        let stamp = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.as_nanos())
            .unwrap_or_default();
        let path = child(
            &out.prefix,
            &[
                "_staging",
                &format!("label-events-{}-{stamp}.parquet", std::process::id()),
            ],
        );
        write_query(
            ctx,
            &label_events_sql(pipeline, label, last),
            out,
            &path,
            last,
            None,
        )
        .await?;
        events_file = Some(path.clone());
        let _ = ctx.deregister_table("__label_events");
        ctx.register_parquet(
            "__label_events",
            object_url(out, &path),
            ParquetReadOptions::default(),
        )
        .await
        .map_err(LabelError::engine(format!("reading {}", label.source)))?;
    }
    let labeled = label_days(ctx, pipeline, label, out, mode, due, &mut result).await;
    let _ = ctx.deregister_table("__label_events");
    if let Some(path) = events_file {
        // A leftover is removed with the rest of `_staging/` by the next run.
        let _ = out.store.delete(&path).await;
    }
    labeled?;
    Ok(result)
}

/// Writes the label of each of `due` that is not up to date and records every day in
/// `result` (the label events are registered as `__label_events`).
async fn label_days(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    label: &LabelSpec,
    out: &Location,
    mode: KnowledgeOverride,
    due: Vec<(
        NaiveDate,
        &daymark_store::object_store::ObjectMeta,
        LabelTimes,
        bool,
    )>,
    result: &mut Backfill,
) -> Result<(), LabelError> {
    for (day, snap_meta, t, up_to_date) in due {
        let day = &day;
        let path = label_path(out, mode, *day);
        if !up_to_date {
            let _ = ctx.deregister_table("__snapshot");
            ctx.register_parquet(
                "__snapshot",
                object_url(out, &snap_meta.location),
                ParquetReadOptions::default(),
            )
            .await
            .map_err(LabelError::engine(format!("reading snapshot {day}")))?;
            let sql = label_sql(pipeline, label, *day, "__snapshot", "__label_events");
            write_query(ctx, &sql, out, &path, *day, None).await?;
            let _ = ctx.deregister_table("__snapshot");
        }
        let (rows, positives, censored) = summarize(ctx, out, &path, &label.name, *day).await?;
        result.labeled.push(LabelDay {
            day: *day,
            rows,
            positives,
            censored,
            written: !up_to_date,
            matured_at: t.matured_at,
        });
    }
    Ok(())
}

/// Rows, positives and censored rows of a published label file.
async fn summarize(
    ctx: &SessionContext,
    out: &Location,
    path: &StorePath,
    label: &str,
    day: NaiveDate,
) -> Result<(u64, u64, u64), LabelError> {
    let err = LabelError::engine(format!("reading labels {day}"));
    let df = ctx
        .read_parquet(object_url(out, path), ParquetReadOptions::default())
        .await
        .map_err(err)?;
    let _ = ctx.deregister_table("__labels_summary");
    ctx.register_table("__labels_summary", df.into_view())
        .map_err(LabelError::engine(format!("reading labels {day}")))?;
    let batches = ctx
        .sql(&format!(
            "SELECT count(*) AS n, coalesce(sum(CASE WHEN {} THEN 1 ELSE 0 END), 0) AS p, coalesce(sum(CASE WHEN censored THEN 1 ELSE 0 END), 0) AS c FROM __labels_summary",
            ident(label)
        ))
        .await
        .map_err(LabelError::engine(format!("reading labels {day}")))?
        .collect()
        .await
        .map_err(LabelError::engine(format!("reading labels {day}")))?;
    let _ = ctx.deregister_table("__labels_summary");
    let get = |i: usize| -> u64 {
        batches
            .first()
            .filter(|b| b.num_rows() > 0)
            .and_then(|b| {
                arrow::compute::cast(b.column(i), &arrow::datatypes::DataType::Int64).ok()
            })
            .map(|a| {
                let a = a.as_primitive::<Int64Type>();
                if a.is_null(0) {
                    0
                } else {
                    a.value(0).max(0) as u64
                }
            })
            .unwrap_or(0)
    };
    Ok((get(0), get(1), get(2)))
}
