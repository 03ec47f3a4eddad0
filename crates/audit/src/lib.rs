//! Audits and health of built outputs.
//!
//! - [`psi`]: the Population Stability Index and its binning (pure arithmetic).
//! - [`tables`]: published snapshots, labels and staged files as DataFusion tables.
//! - [`quality`]: checks run on every build before publishing: population size change and
//!   drift against the previous day and a reference window.
//! - [`stats`]: single-feature ROC AUC, Pearson and Spearman correlations as DataFusion plans.
//! - [`checks`]: the leakage audit (plan, provenance, recomputation, label scan, skew).
//! - [`report`]: the self-contained HTML report with inline SVG charts.

pub mod checks;
pub mod psi;
pub mod quality;
pub mod report;
pub mod stats;
pub mod tables;

/// DataFusion's session, re-exported for callers without their own DataFusion dependency.
pub use datafusion::prelude::SessionContext;

/// Errors of audits and reports.
#[derive(Debug, thiserror::Error)]
pub enum AuditError {
    /// The query engine failed.
    #[error("{context}: {source}")]
    Engine {
        /// What was being done.
        context: String,
        /// The cause.
        source: datafusion::error::DataFusionError,
    },
    /// Reading from the output store failed.
    #[error("{path}: {reason}")]
    Store {
        /// The object or folder.
        path: String,
        /// Why.
        reason: String,
    },
    /// Nothing to audit or report.
    #[error("{0}")]
    Nothing(String),
}

/// Adds context to an engine error.
pub(crate) fn engine(
    context: impl Into<String>,
) -> impl FnOnce(datafusion::error::DataFusionError) -> AuditError {
    let context = context.into();
    move |source| AuditError::Engine { context, source }
}
