//! The daymark engine: DataFusion plans over a pipeline's sources.
//!
//! - [`sources`]: resolve, list and read the footers of each source; register them as tables.
//! - [`check`]: check a pipeline against the sources' real schemas (columns, types, filters).
//! - [`time`]: cutoffs and window bounds in the pipeline time zone.
//! - [`session`]: the DataFusion session: memory limit, spilling, parallelism.
//! - [`functions`]: daymark's running-sum/min/max window functions and first-copy marker
//!   (plans naming them travel to a cluster with the `daymark-codec` crate's codec).
//! - [`window_totals`]: windowed sums, active days and first/last days of each key's tile
//!   rows, for backfills whose features are all of those kinds (and the codec likewise).
//! - [`latest`]: the value of each group's row that sorts last or first (the population's
//!   state, first and last value features), without `last_value`'s per-row bookkeeping
//!   (and the codec likewise).
//! - [`build`]: build one snapshot day and publish it atomically; the feature dictionary.
//! - [`backfill`]: every snapshot of a range of days in one set-based query over tiles.
//! - [`tiles`]: per key, per day partial aggregates of each source, and snapshots combined
//!   from them.
//! - [`rollups`]: tiles of whole weeks and months, the history up to a month's end, and the
//!   pieces a daily snapshot reads.
//! - [`tidy`]: the tile folders a pipeline no longer reads, listed and removed.
//! - [`provenance`]: per source, the latest event and arrival time a snapshot read.
//! - [`sql`]: one day's snapshot as one plain SQL query (the naive path, shown by `explain`).

pub mod backfill;
pub mod build;
pub mod by_day;
pub mod check;
pub mod functions;
pub mod latest;
pub mod provenance;
pub mod rollups;
pub mod session;
pub mod sources;
pub mod sql;
pub mod tidy;
pub mod tiles;
pub mod time;
pub mod window_totals;

pub use check::{check_against_schemas, check_expr, FeatureTypes};
pub use sources::{
    inspect_sources, inspect_sources_with, register_sources, schemas_of, SourceReport,
};
pub use sql::{snapshot_query, SnapshotQuery};
