//! The demo world: a deterministic generator of an invented video streaming service's
//! event logs (plays, a subscription change log and support contacts) as Hive-partitioned
//! Parquet, with late arrivals, re-deliveries and, on request, malformed rows.
//!
//! Everything in it is invented: the service, its titles, plans, prices and customers.

pub mod generate;
pub mod rng;
pub mod world;

pub use generate::{generate, GenerateError, SourceCounts, WorldConfig, WorldSummary, SOURCES};
