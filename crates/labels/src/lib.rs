//! Labels for daymark: when a source is complete (watermarks), churn labels back-filled
//! into their own day partitions once they mature, training sets split by snapshot date
//! with an embargo, and outcomes of a model's scores against matured labels.
//!
//! - [`watermark`]: the time up to which each source is complete.
//! - [`backfill`]: the label definition as SQL, maturity, publishing `labels/dt=D/`.
//! - [`export`]: snapshots joined with matured labels, split into train/validation/test.
//! - [`outcomes`]: ROC AUC, precision at top k, calibration of scores per scoring day.

pub mod backfill;
pub mod export;
pub mod outcomes;
pub mod watermark;

use chrono::NaiveDate;
use daymark_engine::build::{child, BuildError};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::ObjectMeta;
use daymark_store::Location;
use futures::TryStreamExt;
use std::collections::BTreeMap;

pub use backfill::{backfill, label_sql, label_times, labels_dir, Backfill, LabelTimes};
pub use watermark::{source_watermarks, watermark, Watermark, WatermarkBasis};

/// Errors of label back-fill, export and outcomes.
#[derive(Debug, thiserror::Error)]
pub enum LabelError {
    /// The pipeline declares no label.
    #[error("the pipeline declares no `label`: there is nothing to compute")]
    NoLabel,
    /// A command-line value or an input file cannot be used (exit code 2 in the CLI).
    #[error("{0}")]
    Invalid(String),
    /// The query engine failed.
    #[error("{context}: {source}")]
    Engine {
        /// What was being done.
        context: String,
        /// The cause.
        source: datafusion::error::DataFusionError,
    },
    /// Reading or writing the store failed.
    #[error("{path}: {reason}")]
    Store {
        /// The object or folder.
        path: String,
        /// Why.
        reason: String,
    },
    /// Publishing a file failed.
    #[error(transparent)]
    Build(#[from] BuildError),
}

impl LabelError {
    pub(crate) fn engine(
        context: impl Into<String>,
    ) -> impl FnOnce(datafusion::error::DataFusionError) -> LabelError {
        let context = context.into();
        move |source| LabelError::Engine { context, source }
    }
}

/// The day partitions `<dir>/dt=D/part-0.parquet` found in the output store, by day.
pub async fn list_partitions(
    out: &Location,
    dir: &str,
) -> Result<BTreeMap<NaiveDate, ObjectMeta>, LabelError> {
    let prefix = child(&out.prefix, &[dir]);
    let metas: Vec<ObjectMeta> =
        out.store
            .list(Some(&prefix))
            .try_collect()
            .await
            .map_err(|e| LabelError::Store {
                path: prefix.to_string(),
                reason: e.to_string(),
            })?;
    let depth = prefix.parts().count();
    let mut days = BTreeMap::new();
    for m in metas {
        let parts: Vec<String> = m
            .location
            .parts()
            .skip(depth)
            .map(|p| p.as_ref().to_string())
            .collect();
        if parts.len() != 2 || parts[1] != "part-0.parquet" {
            continue;
        }
        let day = parts[0]
            .strip_prefix("dt=")
            .and_then(|d| NaiveDate::parse_from_str(d, "%Y-%m-%d").ok());
        if let Some(day) = day {
            days.insert(day, m);
        }
    }
    Ok(days)
}

/// The URL a query engine reads an object of `out` by.
pub fn object_url(out: &Location, path: &StorePath) -> String {
    let mut u = out.root_url.to_string();
    if !u.ends_with('/') {
        u.push('/');
    }
    u.push_str(path.as_ref());
    u
}
