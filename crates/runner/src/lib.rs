//! Unattended daily runs: the ledger of builds, the what-is-due planner, the lock that keeps
//! one writer per output, the run loop and the watch service.
//!
//! - [`ledger`]: one immutable JSON entry per build in `<out>/_ledger/`.
//! - [`complete`]: when a source's day partition is complete (the `_complete` marker).
//! - [`plan`]: the state of each snapshot day (built, new, stale and why, failed, pending)
//!   and the steps due, in dependency order.
//! - [`lock`]: the exclusive lock object `<out>/_lock/owner.json` with a renewed lease.
//! - [`run`]: one run: lock, clean stale staging, plan, build tiles and snapshots with the
//!   engine, publish atomically, write ledger entries.
//! - [`watch`]: the long-running service: poll, run what is due, serve `/health` and
//!   `/metrics`, stop cleanly on SIGTERM/SIGINT.

pub mod complete;
pub mod ledger;
pub mod lock;
pub mod plan;
pub mod run;
pub mod watch;

pub use plan::{DayState, Plan, Step};
pub use run::{run_once, Event, RunOptions, RunOutcome, Summary};

/// Errors of a run.
#[derive(Debug, thiserror::Error)]
pub enum RunnerError {
    /// The pipeline file, its sources or an option are unusable (exit code 2).
    #[error("{0}")]
    Invalid(String),
    /// Reading or writing the output store failed.
    #[error("cannot use {path}: {reason}")]
    Store {
        /// The object or folder.
        path: String,
        /// Why.
        reason: String,
    },
    /// The engine failed.
    #[error(transparent)]
    Build(#[from] daymark_engine::build::BuildError),
    /// The engine could not start or register the sources.
    #[error("engine: {0}")]
    Engine(#[from] datafusion::error::DataFusionError),
    /// The lock stopped being this run's while it worked (taken over by another run, or its
    /// lease not renewed in time).
    #[error("{0}; stopped before publishing more")]
    LockLost(String),
}
