//! The ledger: one immutable JSON object per build, kept in the output store.
//!
//! Entries live at `<out>/_ledger/<kind>/<date>/<finished>__<scope>__<run>.json` where
//! `kind` is `snapshot`, `tiles` or `labels`, `scope` is the knowledge mode of a snapshot
//! (`per-source`, `as-known`, `event-time`), the source of a tile partition or the label
//! of a label partition, and `finished` is a sortable UTC timestamp. Nothing is ever
//! appended to or rewritten, so the ledger works on object stores that have no appends;
//! the latest entry per (kind, date, scope) decides that output's state.

use crate::RunnerError;
use chrono::{DateTime, NaiveDate, Utc};
use daymark_spec::Pipeline;
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::{ObjectStoreExt, PutPayload};
use daymark_store::{DataFile, Listing, Location};
use futures::TryStreamExt;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Folder of the ledger inside the output.
pub const LEDGER_DIR: &str = "_ledger";

/// What a ledger entry is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Kind {
    /// A published snapshot day.
    Snapshot,
    /// The tiles of one raw partition of one source.
    Tiles,
    /// The labels of one snapshot day.
    Labels,
}

impl Kind {
    /// The folder name.
    pub fn as_str(&self) -> &'static str {
        match self {
            Kind::Snapshot => "snapshot",
            Kind::Tiles => "tiles",
            Kind::Labels => "labels",
        }
    }
}

/// One file as it was when it was read: enough to notice it changed.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileFingerprint {
    /// File name inside its partition.
    pub file: String,
    /// Size in bytes.
    pub size: u64,
    /// Last modification time (RFC 3339).
    pub modified: String,
    /// Entity tag, where the store gives one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub etag: Option<String>,
}

impl FileFingerprint {
    /// The fingerprint of a listed file.
    pub fn of(f: &DataFile) -> FileFingerprint {
        FileFingerprint {
            file: f.path.filename().unwrap_or_default().to_string(),
            size: f.size,
            modified: f.modified.to_rfc3339(),
            etag: f.etag.clone(),
        }
    }
}

/// What a build read from one source.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SourceInputs {
    /// Knowledge mode the build used for this source (`as-known` or `event-time`).
    pub knowledge: String,
    /// First partition of the range read (None: from the source's first).
    pub first_day: Option<String>,
    /// Last partition that can hold events before the cutoff.
    pub last_day: String,
    /// Each partition read, with its files (partitions without data files are left out).
    pub partitions: BTreeMap<String, Vec<FileFingerprint>>,
}

/// Fingerprints of the partitions `[first, last]` of a listing.
pub fn fingerprint_range(
    listing: &Listing,
    first: Option<NaiveDate>,
    last: NaiveDate,
) -> BTreeMap<String, Vec<FileFingerprint>> {
    listing
        .days
        .range(..=last)
        .filter(|(d, _)| first.is_none_or(|f| **d >= f))
        .map(|(d, files)| {
            (
                d.to_string(),
                files.iter().map(FileFingerprint::of).collect(),
            )
        })
        .collect()
}

/// A feature's name and hash, in output order.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FeatureHash {
    /// Output column.
    pub name: String,
    /// Its hash.
    pub hash: String,
}

/// How a build ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    /// The output was published.
    Published,
    /// A check configured to fail did fail; nothing was published.
    ChecksFailed,
    /// The build failed (engine or store error); nothing was published.
    Failed,
}

/// One ledger entry.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Entry {
    /// `snapshot`, `tiles` or `labels`.
    pub kind: String,
    /// The day (snapshot day, or raw partition day for tiles).
    pub date: String,
    /// Knowledge mode of a snapshot, source of tiles, label of labels.
    pub scope: String,
    /// Pipeline name.
    pub pipeline: String,
    /// Hash of the whole pipeline file.
    pub pipeline_hash: String,
    /// Hash of the population definition.
    pub population_hash: String,
    /// Every feature's hash, in output order.
    pub features: Vec<FeatureHash>,
    /// What was read, per source.
    pub inputs: BTreeMap<String, SourceInputs>,
    /// Rows written.
    pub rows: u64,
    /// Bytes written.
    pub bytes: u64,
    /// Seconds the build took.
    pub seconds: f64,
    /// How it ended.
    pub outcome: Outcome,
    /// Why it failed, or warnings.
    #[serde(default)]
    pub messages: Vec<String>,
    /// The published object, relative to the output.
    #[serde(default)]
    pub output: Option<String>,
    /// The run that wrote it.
    pub run_id: String,
    /// Host of that run.
    pub host: String,
    /// Process id of that run.
    pub pid: u32,
    /// When the build finished (RFC 3339, UTC).
    pub finished: String,
    /// daymark version that wrote it.
    pub daymark_version: String,
}

impl Entry {
    /// A new entry for `pipeline`, stamped now by `run`.
    pub fn new(
        kind: Kind,
        date: NaiveDate,
        scope: &str,
        pipeline: &Pipeline,
        run: &RunIdentity,
    ) -> Entry {
        Entry {
            kind: kind.as_str().into(),
            date: date.to_string(),
            scope: scope.into(),
            pipeline: pipeline.file.name.clone(),
            pipeline_hash: pipeline.hash.clone(),
            population_hash: pipeline.population_hash.clone(),
            features: pipeline
                .features
                .iter()
                .map(|f| FeatureHash {
                    name: f.name.clone(),
                    hash: f.hash.clone(),
                })
                .collect(),
            inputs: BTreeMap::new(),
            rows: 0,
            bytes: 0,
            seconds: 0.0,
            outcome: Outcome::Published,
            messages: Vec::new(),
            output: None,
            run_id: run.run_id.clone(),
            host: run.host.clone(),
            pid: run.pid,
            finished: Utc::now().to_rfc3339(),
            daymark_version: env!("CARGO_PKG_VERSION").into(),
        }
    }
}

/// Who is running: written into ledger entries and the lock.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RunIdentity {
    /// Unique id of this run: start time and process id.
    pub run_id: String,
    /// Host name.
    pub host: String,
    /// Process id.
    pub pid: u32,
    /// Start time.
    pub started: DateTime<Utc>,
}

impl RunIdentity {
    /// The identity of this process, now.
    pub fn current() -> RunIdentity {
        let started = Utc::now();
        let pid = std::process::id();
        RunIdentity {
            run_id: format!("{}-{pid}", started.format("%Y%m%dT%H%M%S%.6fZ")),
            host: crate::lock::host_name(),
            pid,
            started,
        }
    }
}

fn ledger_dir(out: &Location, kind: Kind) -> StorePath {
    daymark_engine::build::child(&out.prefix, &[LEDGER_DIR, kind.as_str()])
}

/// Writes `entry` as a new object (never replacing one).
pub async fn write(out: &Location, entry: &Entry) -> Result<StorePath, RunnerError> {
    let kind = match entry.kind.as_str() {
        "tiles" => Kind::Tiles,
        "labels" => Kind::Labels,
        _ => Kind::Snapshot,
    };
    let finished = DateTime::parse_from_rfc3339(&entry.finished)
        .map(|t| t.with_timezone(&Utc))
        .unwrap_or_else(|_| Utc::now());
    let name = format!(
        "{}__{}__{}.json",
        finished.format("%Y%m%dT%H%M%S%.9fZ"),
        entry.scope,
        entry.run_id
    );
    let path = daymark_engine::build::child(&ledger_dir(out, kind), &[&entry.date, &name]);
    let body = serde_json::to_vec_pretty(entry).expect("a ledger entry serialises");
    out.store
        .put(&path, PutPayload::from(body))
        .await
        .map_err(|e| RunnerError::Store {
            path: path.to_string(),
            reason: e.to_string(),
        })?;
    Ok(path)
}

/// Every object under `dir` in the output store.
pub(crate) async fn list_all(
    out: &Location,
    dir: &StorePath,
) -> Result<Vec<daymark_store::object_store::ObjectMeta>, RunnerError> {
    out.store
        .list(Some(dir))
        .try_collect()
        .await
        .map_err(|e| RunnerError::Store {
            path: dir.to_string(),
            reason: e.to_string(),
        })
}

/// The latest entry of each (date, scope) of `kind`.
///
/// One listing of the ledger folder, then one read per (date, scope): the names sort by
/// finishing time, so older entries are never read.
pub async fn latest(
    out: &Location,
    kind: Kind,
) -> Result<BTreeMap<(NaiveDate, String), Entry>, RunnerError> {
    let dir = ledger_dir(out, kind);
    let metas = list_all(out, &dir).await?;
    let skip = dir.parts().count();
    let mut newest: BTreeMap<(NaiveDate, String), (String, StorePath)> = BTreeMap::new();
    for m in metas {
        let parts: Vec<String> = m
            .location
            .parts()
            .skip(skip)
            .map(|p| p.as_ref().to_string())
            .collect();
        let [date, name] = parts.as_slice() else {
            continue;
        };
        let Ok(date) = date.parse::<NaiveDate>() else {
            continue;
        };
        // <timestamp>__<scope>__<run id>.json: neither the timestamp nor the run id holds `__`.
        let Some((ts, scope)) = name.strip_suffix(".json").and_then(|n| {
            let (ts, rest) = n.split_once("__")?;
            let (scope, _run) = rest.rsplit_once("__")?;
            Some((ts.to_string(), scope.to_string()))
        }) else {
            continue;
        };
        let key = (date, scope);
        if newest.get(&key).is_none_or(|(t, _)| *t < ts) {
            newest.insert(key, (ts, m.location));
        }
    }
    let mut out_map = BTreeMap::new();
    for (key, (_, path)) in newest {
        let bytes = out
            .store
            .get(&path)
            .await
            .map_err(|e| RunnerError::Store {
                path: path.to_string(),
                reason: e.to_string(),
            })?
            .bytes()
            .await
            .map_err(|e| RunnerError::Store {
                path: path.to_string(),
                reason: e.to_string(),
            })?;
        let entry: Entry = serde_json::from_slice(&bytes).map_err(|e| RunnerError::Store {
            path: path.to_string(),
            reason: format!("not a ledger entry: {e}"),
        })?;
        out_map.insert(key, entry);
    }
    Ok(out_map)
}
