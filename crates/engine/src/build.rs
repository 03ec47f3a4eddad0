//! Building and publishing snapshots.
//!
//! A snapshot is written as one Parquet file to a staging path in the output store and
//! then renamed into `snapshots/dt=D/part-0.parquet`: a reader sees the old file, the new
//! file or none, never part of one (a rename of one object is atomic on local disks and
//! replaces the object whole on object stores). Expectations are checked on the batches as
//! they are written; a failing check configured to fail leaves nothing published.

use crate::check::FeatureTypes;
use crate::sql::KnowledgeOverride;
use arrow::array::{Array, AsArray, RecordBatch};
use arrow::compute::cast;
use arrow::datatypes::{DataType, Float64Type};
use chrono::NaiveDate;
use datafusion::prelude::SessionContext;
use daymark_spec::{Knowledge, OnFail, Pipeline};
use daymark_store::object_store::buffered::BufWriter;
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::{ObjectStoreExt, PutPayload};
use daymark_store::Location;
use futures::StreamExt;
use parquet::arrow::AsyncArrowWriter;
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use parquet::schema::types::ColumnPath;
use serde_json::json;
use std::collections::BTreeMap;
use std::time::Instant;

/// Errors while building.
#[derive(Debug, thiserror::Error)]
pub enum BuildError {
    /// The query engine failed.
    #[error("day {day}: {source}")]
    Engine {
        /// The snapshot day.
        day: NaiveDate,
        /// The cause.
        source: datafusion::error::DataFusionError,
    },
    /// Writing to the output store failed.
    #[error("day {day}: cannot write {path}: {reason}")]
    Write {
        /// The snapshot day.
        day: NaiveDate,
        /// The object.
        path: String,
        /// Why.
        reason: String,
    },
    /// Writing a file that belongs to no single day failed.
    #[error("cannot write {path}: {reason}")]
    Store {
        /// The object.
        path: String,
        /// Why.
        reason: String,
    },
    /// A check of the staged snapshot could not run, or the run may no longer publish (its
    /// output lock is no longer its own); nothing was published.
    #[error("day {day}: not published: {reason}")]
    Check {
        /// The snapshot day.
        day: NaiveDate,
        /// Why.
        reason: String,
    },
    /// A check configured to fail did fail; nothing was published.
    #[error("snapshot {day}: {} check(s) failed, nothing published:\n  {}", .failures.len(), .failures.join("\n  "))]
    ChecksFailed {
        /// The snapshot day.
        day: NaiveDate,
        /// One line per failed check.
        failures: Vec<String>,
    },
}

/// Where a build writes: `snapshots/` for each source's own knowledge mode, or
/// `snapshots-as-known/` / `snapshots-event-time/` when one mode is forced.
pub fn snapshots_dir(mode: KnowledgeOverride) -> &'static str {
    match mode {
        None => "snapshots",
        Some(Knowledge::AsKnown) => "snapshots-as-known",
        Some(Knowledge::EventTime) => "snapshots-event-time",
    }
}

/// Key of the snapshot file's key-value metadata holding the hash of each feature's
/// definition (a JSON object, feature name to hash), so that later checks compare a
/// feature only with days built under the same definition.
pub const FEATURE_HASHES_KEY: &str = "daymark.feature_hashes";

/// The [`FEATURE_HASHES_KEY`] metadata entry of `pipeline`'s snapshots.
pub fn feature_hashes(pipeline: &Pipeline) -> (String, String) {
    let hashes: BTreeMap<&str, &str> = pipeline
        .features
        .iter()
        .map(|f| (f.name.as_str(), f.hash.as_str()))
        .collect();
    (
        FEATURE_HASHES_KEY.to_string(),
        serde_json::to_string(&hashes).unwrap_or_default(),
    )
}

/// `base/part1/part2/...`.
pub fn child(base: &StorePath, parts: &[&str]) -> StorePath {
    let mut p = base.clone();
    for part in parts {
        p = p.clone().join(*part);
    }
    p
}

/// The published path of snapshot `day`.
pub fn snapshot_path(out: &Location, mode: KnowledgeOverride, day: NaiveDate) -> StorePath {
    child(
        &out.prefix,
        &[snapshots_dir(mode), &format!("dt={day}"), "part-0.parquet"],
    )
}

/// What one snapshot build did.
#[derive(Debug, Clone)]
pub struct DayReport {
    /// The snapshot day.
    pub day: NaiveDate,
    /// Rows written (one per population key).
    pub rows: u64,
    /// Bytes of the published file.
    pub bytes: u64,
    /// Seconds taken.
    pub seconds: f64,
    /// Checks that failed but were configured to warn.
    pub warnings: Vec<String>,
    /// Queries whose results make up the day: 1, or the number of ranges of keys a
    /// backfill too large for its memory was cut into.
    pub queries: usize,
}

/// Running tallies for one feature's expectations.
#[derive(Default)]
struct Tally {
    nulls: u64,
    below: u64,
    above: u64,
    not_allowed: u64,
    first_not_allowed: Option<String>,
}

fn tally_batch(pipeline: &Pipeline, batch: &RecordBatch, tallies: &mut BTreeMap<String, Tally>) {
    for f in &pipeline.features {
        let Some(exp) = &f.expect else { continue };
        let Some(col) = batch.column_by_name(&f.name) else {
            continue;
        };
        let t = tallies.entry(f.name.clone()).or_default();
        t.nulls += col.null_count() as u64;
        if exp.min.is_some() || exp.max.is_some() {
            if let Ok(values) = cast(col, &DataType::Float64) {
                let values = values.as_primitive::<Float64Type>();
                for v in values.iter().flatten() {
                    if exp.min.is_some_and(|m| v < m) {
                        t.below += 1;
                    }
                    if exp.max.is_some_and(|m| v > m) {
                        t.above += 1;
                    }
                }
            }
        }
        if let Some(allowed) = &exp.values {
            if let Ok(values) = cast(col, &DataType::Utf8) {
                for v in values.as_string::<i32>().iter().flatten() {
                    if !allowed.iter().any(|a| a == v) {
                        t.not_allowed += 1;
                        t.first_not_allowed.get_or_insert_with(|| v.to_string());
                    }
                }
            }
        }
    }
}

/// Turns tallies into (fail, warn) messages.
fn judge(
    pipeline: &Pipeline,
    rows: u64,
    tallies: &BTreeMap<String, Tally>,
) -> (Vec<String>, Vec<String>) {
    let (mut fail, mut warn) = (Vec::new(), Vec::new());
    for f in &pipeline.features {
        let (Some(exp), Some(t)) = (&f.expect, tallies.get(&f.name)) else {
            continue;
        };
        let mut msgs = Vec::new();
        if t.below > 0 {
            msgs.push(format!(
                "{}: {} value(s) below the expected minimum {}",
                f.name,
                t.below,
                exp.min.unwrap_or_default()
            ));
        }
        if t.above > 0 {
            msgs.push(format!(
                "{}: {} value(s) above the expected maximum {}",
                f.name,
                t.above,
                exp.max.unwrap_or_default()
            ));
        }
        if t.not_allowed > 0 {
            msgs.push(format!(
                "{}: {} value(s) not in the allowed values, first `{}`",
                f.name,
                t.not_allowed,
                t.first_not_allowed.as_deref().unwrap_or("")
            ));
        }
        if let Some(max) = exp.max_null_share {
            let share = if rows == 0 {
                0.0
            } else {
                t.nulls as f64 / rows as f64
            };
            if share > max {
                msgs.push(format!(
                    "{}: null share {share:.4} above the expected {max}",
                    f.name
                ));
            }
        }
        match f.on_fail {
            OnFail::Fail => fail.extend(msgs),
            OnFail::Warn => warn.extend(msgs),
        }
    }
    (fail, warn)
}

/// The runs of rows `0..len` of a sorted column: maximal ranges whose rows all satisfy
/// `same(first row of the range, row)`. Splits a batch sorted by day into one slice per day.
pub(crate) fn equal_runs(
    len: usize,
    same: impl Fn(usize, usize) -> bool,
) -> Vec<std::ops::Range<usize>> {
    let mut runs = Vec::new();
    let mut start = 0;
    while start < len {
        let mut end = start + 1;
        while end < len && same(start, end) {
            end += 1;
        }
        runs.push(start..end);
        start = end;
    }
    runs
}

/// Rows per row group of a tile file. Tile rows are written sorted by key, so a backfill
/// cut into ranges of keys skips, by the key statistics of each row group, the groups of
/// other ranges instead of decoding every tile file once per range.
pub const TILE_ROW_GROUP_ROWS: usize = 16 * 1024;

/// Parquet settings of tile files: LZ4 (raw), which is several times cheaper to set up
/// and decode than zstd for the many small column chunks tiles have; tiles are an
/// intermediate layer, read back by daymark only. Row groups of [`TILE_ROW_GROUP_ROWS`].
/// No dictionaries: keys are unique within a tile day and counts vary, so building them
/// (hashing every value) cost about 5% of the tile build's compute for 7% smaller files
/// (docs/benchmarks.md, twenty-third measurement).
pub fn tile_writer_properties() -> WriterProperties {
    WriterProperties::builder()
        .set_compression(Compression::LZ4_RAW)
        .set_dictionary_enabled(false)
        .set_max_row_group_row_count(Some(TILE_ROW_GROUP_ROWS))
        .set_created_by(format!("daymark {}", env!("CARGO_PKG_VERSION")))
        .build()
}

/// Writer settings for published Parquet: zstd at level 1. Against level 3, a backfill's
/// snapshots took about 0.6 s less compute in 9 (365 snapshots, 5.8 million rows) and
/// 4% more space, 131 MB against 126 MB (docs/benchmarks.md, twenty-fourth measurement).
pub fn writer_properties() -> WriterProperties {
    WriterProperties::builder()
        .set_compression(Compression::ZSTD(
            ZstdLevel::try_new(1).expect("valid zstd level"),
        ))
        .set_created_by(format!("daymark {}", env!("CARGO_PKG_VERSION")))
        .build()
}

/// [`writer_properties`] for a snapshot of `schema` (key first): dictionary encoding only
/// for the text columns after the key, whose few values (plans, states) repeat. The key is
/// unique within a snapshot, and for numbers zstd over plain values was both smaller and
/// cheaper to write: the benchmark's 365 snapshots took 126 MB against 154 MB
/// (docs/benchmarks.md, twenty-third measurement).
fn snapshot_properties(schema: &arrow::datatypes::Schema) -> WriterProperties {
    let mut b = writer_properties().into_builder();
    for (i, f) in schema.fields().iter().enumerate() {
        let repeats = matches!(
            f.data_type(),
            DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View | DataType::Dictionary(..)
        );
        if i == 0 || !repeats {
            b = b.set_column_dictionary_enabled(ColumnPath::from(f.name().as_str()), false);
        }
    }
    b.build()
}

/// One Parquet file being written to a staging path, published by [`DayWriter::finish`].
///
/// The pipeline's expectations are tallied on the batches as they pass; a failing check
/// configured to fail deletes the staging file and publishes nothing.
pub struct DayWriter {
    out: Location,
    day: NaiveDate,
    staging: StorePath,
    final_path: StorePath,
    writer: AsyncArrowWriter<BufWriter>,
    rows: u64,
    tallies: BTreeMap<String, Tally>,
}

impl DayWriter {
    /// Opens a staging file that will become `final_path`, written with
    /// [`writer_properties`].
    pub fn new(
        out: &Location,
        final_path: StorePath,
        day: NaiveDate,
        schema: arrow::datatypes::SchemaRef,
    ) -> Result<Self, BuildError> {
        let properties = snapshot_properties(&schema);
        Self::with_properties(out, final_path, day, schema, properties, false)
    }

    /// A file written straight to `final_path` with `properties`, for files that are
    /// not checked before they become visible (tiles): an object store's put is atomic
    /// (a local folder's too: object_store writes a temporary file and renames it), so
    /// readers see the old object or the whole new one, without a staging copy of ours.
    pub fn direct(
        out: &Location,
        final_path: StorePath,
        day: NaiveDate,
        schema: arrow::datatypes::SchemaRef,
        properties: WriterProperties,
    ) -> Result<Self, BuildError> {
        Self::with_properties(out, final_path, day, schema, properties, true)
    }

    /// [`DayWriter::new`] with other Parquet settings; `direct`: see [`DayWriter::direct`].
    fn with_properties(
        out: &Location,
        final_path: StorePath,
        day: NaiveDate,
        schema: arrow::datatypes::SchemaRef,
        properties: WriterProperties,
        direct: bool,
    ) -> Result<Self, BuildError> {
        let staging = if direct {
            final_path.clone()
        } else {
            child(
                &out.prefix,
                &[
                    "_staging",
                    &format!(
                        "{}.{}.{}",
                        final_path.as_ref().replace('/', "_"),
                        std::process::id(),
                        nanos_now()
                    ),
                ],
            )
        };
        let writer = AsyncArrowWriter::try_new(
            BufWriter::new(out.store.clone(), staging.clone()),
            schema,
            Some(properties),
        )
        .map_err(|e| BuildError::Write {
            day,
            path: staging.to_string(),
            reason: e.to_string(),
        })?;
        Ok(DayWriter {
            out: out.clone(),
            day,
            staging,
            final_path,
            writer,
            rows: 0,
            tallies: BTreeMap::new(),
        })
    }

    /// The day this file belongs to.
    pub fn day(&self) -> NaiveDate {
        self.day
    }

    fn write_err(&self, path: &StorePath, reason: String) -> BuildError {
        BuildError::Write {
            day: self.day,
            path: path.to_string(),
            reason,
        }
    }

    /// Appends a batch (and tallies expectations on it when the file is a snapshot).
    pub async fn write(&mut self, batch: &RecordBatch) -> Result<(), BuildError> {
        self.rows += batch.num_rows() as u64;
        if let Err(e) = self.writer.write(batch).await {
            let err = self.write_err(&self.staging, e.to_string());
            let _ = self.out.store.delete(&self.staging).await;
            return Err(err);
        }
        Ok(())
    }

    /// Tallies the pipeline's expectations on `batch` (call once per batch written).
    pub fn tally(&mut self, pipeline: &Pipeline, batch: &RecordBatch) {
        tally_batch(pipeline, batch, &mut self.tallies);
    }

    /// Closes the file; with `checks`, judges the expectations tallied so far; then
    /// renames it into place. Returns (rows, bytes, warnings).
    pub async fn finish(
        self,
        checks: Option<&Pipeline>,
    ) -> Result<(u64, u64, Vec<String>), BuildError> {
        // Without a staged check no session is needed (making one per file cost about 1%
        // of a backfill's samples: thousands of tile files).
        self.close(&[]).await?.publish_with(checks, None).await
    }

    /// [`DayWriter::finish`] with key-value metadata for the Parquet footer and a check of
    /// the staged file (run with `ctx`) before it is renamed into place.
    pub async fn finish_with(
        self,
        ctx: &SessionContext,
        checks: Option<&Pipeline>,
        metadata: &[(String, String)],
        staged_check: Option<&dyn StagedCheck>,
    ) -> Result<(u64, u64, Vec<String>), BuildError> {
        self.close(metadata)
            .await?
            .publish(ctx, checks, staged_check)
            .await
    }

    /// Closes the file (with key-value `metadata` in its footer) without publishing it:
    /// [`ClosedDay::publish`] judges and renames it. Closing encodes the file's last
    /// pages, so days can be closed side by side and published in order.
    pub async fn close(self, metadata: &[(String, String)]) -> Result<ClosedDay, BuildError> {
        let DayWriter {
            out,
            day,
            staging,
            final_path,
            mut writer,
            rows,
            tallies,
        } = self;
        for (k, v) in metadata {
            writer.append_key_value_metadata(KeyValue::new(k.clone(), v.clone()));
        }
        if let Err(e) = writer.close().await {
            let _ = out.store.delete(&staging).await;
            return Err(BuildError::Write {
                day,
                path: staging.to_string(),
                reason: e.to_string(),
            });
        }
        Ok(ClosedDay {
            out,
            day,
            staging,
            final_path,
            rows,
            tallies,
        })
    }

    /// Abandons the file: deletes the staging object (a direct file was never put).
    pub async fn abandon(self) {
        if self.staging != self.final_path {
            let _ = self.out.store.delete(&self.staging).await;
        }
    }
}

/// A closed [`DayWriter`] file, in staging until published.
pub struct ClosedDay {
    out: Location,
    day: NaiveDate,
    staging: StorePath,
    final_path: StorePath,
    rows: u64,
    tallies: BTreeMap<String, Tally>,
}

impl ClosedDay {
    /// With `checks`, judges the expectations tallied (and runs `staged_check` on the
    /// staged file with `ctx`); then renames the file into place. Returns (rows, bytes,
    /// warnings). A failing check deletes the staged file and publishes nothing.
    pub async fn publish(
        self,
        ctx: &SessionContext,
        checks: Option<&Pipeline>,
        staged_check: Option<&dyn StagedCheck>,
    ) -> Result<(u64, u64, Vec<String>), BuildError> {
        self.publish_with(checks, staged_check.map(|c| (ctx, c)))
            .await
    }

    /// [`ClosedDay::publish`] with the staged check and its session together.
    async fn publish_with(
        self,
        checks: Option<&Pipeline>,
        staged_check: Option<(&SessionContext, &dyn StagedCheck)>,
    ) -> Result<(u64, u64, Vec<String>), BuildError> {
        let (out, day, rows) = (&self.out, self.day, self.rows);
        let (staging, final_path) = (&self.staging, &self.final_path);
        let write_err = |path: &StorePath, reason: String| BuildError::Write {
            day,
            path: path.to_string(),
            reason,
        };
        let warnings = match checks {
            Some(p) => {
                let (mut fail, mut warnings) = judge(p, rows, &self.tallies);
                if let Some((ctx, c)) = staged_check {
                    match c.check(ctx, out, staging, day, rows).await {
                        Ok((f, w)) => {
                            fail.extend(f);
                            warnings.extend(w);
                        }
                        Err(reason) => {
                            let _ = out.store.delete(staging).await;
                            return Err(BuildError::Check { day, reason });
                        }
                    }
                }
                if !fail.is_empty() {
                    let _ = out.store.delete(staging).await;
                    return Err(BuildError::ChecksFailed {
                        day,
                        failures: fail,
                    });
                }
                warnings
            }
            None => Vec::new(),
        };
        if staging != final_path {
            out.store
                .rename(staging, final_path)
                .await
                .map_err(|e| write_err(final_path, e.to_string()))?;
        }
        let bytes = out
            .store
            .head(final_path)
            .await
            .map(|m| m.size)
            .unwrap_or(0);
        Ok((rows, bytes, warnings))
    }

    /// Abandons the file: deletes the staging object (a direct file is left: it is whole).
    pub async fn abandon(self) {
        if self.staging != self.final_path {
            let _ = self.out.store.delete(&self.staging).await;
        }
    }
}

/// Runs `sql` and writes its result as one Parquet file at `final_path`: first to a
/// staging path, then renamed into place. With `checks`, the pipeline's expectations are
/// tallied on the way and a failing check set to `fail` publishes nothing.
/// Returns (rows, bytes, warnings).
pub async fn write_query(
    ctx: &SessionContext,
    sql: &str,
    out: &Location,
    final_path: &StorePath,
    day: NaiveDate,
    checks: Option<&Pipeline>,
) -> Result<(u64, u64, Vec<String>), BuildError> {
    write_query_with(ctx, sql, out, final_path, day, checks, &[], None).await
}

/// Checks run on a snapshot written to staging, before it is published (population size,
/// drift: see the `daymark-audit` crate). Boxed futures keep the trait usable as `dyn`.
pub trait StagedCheck: Send + Sync {
    /// Checks the staged file `staged` of snapshot `day` (`rows` rows). Returns (failures,
    /// warnings); any failure leaves the snapshot unpublished.
    fn check<'a>(
        &'a self,
        ctx: &'a SessionContext,
        out: &'a Location,
        staged: &'a StorePath,
        day: NaiveDate,
        rows: u64,
    ) -> StagedCheckFuture<'a>;
}

/// What a [`StagedCheck`] returns: (failures, warnings), or why it could not run.
pub type StagedCheckFuture<'a> = std::pin::Pin<
    Box<dyn std::future::Future<Output = Result<(Vec<String>, Vec<String>), String>> + Send + 'a>,
>;

/// [`write_query`] with key-value metadata for the Parquet footer and an optional check of
/// the staged file before it is renamed into place.
#[allow(clippy::too_many_arguments)]
pub async fn write_query_with(
    ctx: &SessionContext,
    sql: &str,
    out: &Location,
    final_path: &StorePath,
    day: NaiveDate,
    checks: Option<&Pipeline>,
    metadata: &[(String, String)],
    staged_check: Option<&dyn StagedCheck>,
) -> Result<(u64, u64, Vec<String>), BuildError> {
    let engine = |source| BuildError::Engine { day, source };
    let df = ctx.sql(sql).await.map_err(engine)?;
    let mut stream = df.execute_stream().await.map_err(engine)?;
    let mut writer = DayWriter::new(out, final_path.clone(), day, stream.schema())?;
    while let Some(batch) = stream.next().await {
        let batch = match batch {
            Ok(b) => b,
            Err(e) => {
                writer.abandon().await;
                return Err(engine(e));
            }
        };
        if let Some(p) = checks {
            writer.tally(p, &batch);
        }
        writer.write(&batch).await?;
    }
    writer
        .finish_with(ctx, checks, metadata, staged_check)
        .await
}

/// Builds snapshot `day` from `sql` (naive or tiled) and publishes it.
pub async fn build_day(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    day: NaiveDate,
    mode: KnowledgeOverride,
    sql: &str,
) -> Result<DayReport, BuildError> {
    build_day_checked(ctx, pipeline, out, day, mode, sql, None, None).await
}

/// [`build_day`] that also records the snapshot's provenance in its footer (see
/// [`crate::provenance`]; from the tiles when `tiles` is given, else from the raw
/// sources) and runs `staged_check` on the staged file before publishing.
#[allow(clippy::too_many_arguments)]
pub async fn build_day_checked(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    day: NaiveDate,
    mode: KnowledgeOverride,
    sql: &str,
    tiles: Option<crate::provenance::Tiled<'_>>,
    staged_check: Option<&dyn StagedCheck>,
) -> Result<DayReport, BuildError> {
    let t0 = Instant::now();
    let path = snapshot_path(out, mode, day);
    let prov = crate::provenance::provenance(ctx, pipeline, day, mode, tiles)
        .await
        .map_err(|source| BuildError::Engine { day, source })?;
    let metadata = vec![
        (
            crate::provenance::METADATA_KEY.to_string(),
            serde_json::to_string(&prov).expect("provenance serialises"),
        ),
        feature_hashes(pipeline),
    ];
    let (rows, bytes, warnings) = write_query_with(
        ctx,
        sql,
        out,
        &path,
        day,
        Some(pipeline),
        &metadata,
        staged_check,
    )
    .await?;
    Ok(DayReport {
        day,
        rows,
        bytes,
        seconds: t0.elapsed().as_secs_f64(),
        warnings,
        queries: 1,
    })
}

fn nanos_now() -> u128 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos())
        .unwrap_or(0)
}

/// Every feature as JSON (see [`daymark_spec::Feature::describe`]) with its output type.
pub fn describe_features(pipeline: &Pipeline, types: &FeatureTypes) -> Vec<serde_json::Value> {
    pipeline
        .features
        .iter()
        .map(|f| {
            let mut v = f.describe();
            v["type"] = json!(types.get(&f.name).map(|t| t.to_string()));
            v
        })
        .collect()
}

/// Writes the feature dictionary (`<snapshots dir>/_features.json`): one entry per output
/// column with its meaning, type and hash.
pub async fn write_dictionary(
    pipeline: &Pipeline,
    types: &FeatureTypes,
    out: &Location,
    mode: KnowledgeOverride,
) -> Result<(), BuildError> {
    let features = describe_features(pipeline, types);
    let doc = json!({
        "pipeline": pipeline.file.name,
        "pipeline_hash": pipeline.hash,
        "population_hash": pipeline.population_hash,
        "key": pipeline.file.key,
        "timezone": pipeline.file.timezone,
        "cutoff_time": pipeline.file.cutoff_time,
        "knowledge": mode.map(|m| m.as_str()).unwrap_or("per source"),
        "features": features,
    });
    let path = child(&out.prefix, &[snapshots_dir(mode), "_features.json"]);
    let body = serde_json::to_vec_pretty(&doc).unwrap_or_default();
    out.store
        .put(&path, PutPayload::from(body))
        .await
        .map_err(|e| BuildError::Store {
            path: path.to_string(),
            reason: e.to_string(),
        })?;
    Ok(())
}
