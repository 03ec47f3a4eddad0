//! The DataFusion session daymark runs its plans in: bounded memory that spills to disk.

use datafusion::error::Result;
use datafusion::execution::context::QueryPlanner;
use datafusion::execution::disk_manager::DiskManagerBuilder;
use datafusion::execution::memory_pool::{
    MemoryConsumer, MemoryLimit, MemoryPool, MemoryReservation,
};
use datafusion::execution::runtime_env::RuntimeEnvBuilder;
use datafusion::prelude::{SessionConfig, SessionContext};
use std::sync::Arc;

/// How much the engine may use.
#[derive(Debug, Clone, Default)]
pub struct EngineOptions {
    /// Memory limit in bytes for query execution; sorts and aggregations spill to disk
    /// beyond it. `None`: no limit.
    pub memory_limit: Option<usize>,
    /// Parallelism (default: the number of cores).
    pub target_partitions: Option<usize>,
    /// Working-set rows (tile rows plus key-days) one backfill query may hold before the
    /// backfill is cut into ranges of keys (default: what `memory_limit` holds; see
    /// [`crate::backfill`]).
    pub backfill_rows_per_query: Option<u64>,
    /// Tile rows read per day below which a range of a general pipeline is built day by
    /// day (default: [`crate::backfill::TILE_ROWS_PER_DAY_BY_DAY`]).
    pub tile_rows_per_day_by_day: Option<u64>,
    /// Turns each planned query into an executable plan instead of DataFusion's own
    /// planner (`None`: DataFusion's). The plan codec crate sets one that sends every plan
    /// through protobuf first, as a cluster would.
    pub query_planner: Option<Arc<dyn QueryPlanner + Send + Sync>>,
}

/// The query planner of every session whose options name none (see
/// [`set_default_query_planner`]).
static DEFAULT_QUERY_PLANNER: std::sync::OnceLock<Arc<dyn QueryPlanner + Send + Sync>> =
    std::sync::OnceLock::new();

/// Sets the query planner of every session made after this call whose
/// [`EngineOptions::query_planner`] is `None`, for the whole process: the command line sets
/// one that sends plans through protobuf when asked to check that they travel. Returns
/// false, changing nothing, when one was set already.
pub fn set_default_query_planner(planner: Arc<dyn QueryPlanner + Send + Sync>) -> bool {
    DEFAULT_QUERY_PLANNER.set(planner).is_ok()
}

/// [`EngineOptions::backfill_rows_per_query`], kept in the session's configuration.
#[derive(Debug, Clone, Copy)]
pub struct BackfillRowsPerQuery(pub u64);

/// [`EngineOptions::tile_rows_per_day_by_day`], kept in the session's configuration.
#[derive(Debug, Clone, Copy)]
pub struct TileRowsPerDayByDay(pub u64);

/// A session with the given limits and daymark's window functions
/// ([`crate::functions`]). Spill files go to the system's temporary folder.
pub fn session(opts: &EngineOptions) -> Result<SessionContext> {
    let mut config = SessionConfig::new();
    // Read strings as plain Utf8 so snapshots have the same column types whichever path
    // (raw events or tiles) computed them.
    config
        .options_mut()
        .execution
        .parquet
        .schema_force_view_types = false;
    if let Some(limit) = opts.memory_limit {
        // Each sort keeps this much back for merging its spilled runs (10 MB by default,
        // more than a small limit's fair share): a thirty-second of the limit.
        let execution = &mut config.options_mut().execution;
        execution.sort_spill_reservation_bytes =
            execution.sort_spill_reservation_bytes.min(limit / 32);
        // A plan of many operators shares a small limit fairly among dozens of spilling
        // consumers; one batch of 8,192 rows can then be more than a consumer's share
        // (measured: a 40 MiB limit on the 10M-event benchmark; and, now and then, a
        // sort of the memory-limited backfill test at 64 MiB with batches of 4,096 rows).
        // Smaller batches under a small limit: a batch per 32 KiB of limit, between 1,024
        // and the default.
        let batch = config.batch_size().min((limit / (32 << 10)).max(1024));
        config = config.with_batch_size(batch);
    }
    if let Some(n) = opts.target_partitions {
        config = config.with_target_partitions(n.max(1));
    }
    if let Some(n) = opts.backfill_rows_per_query {
        config = config.with_extension(Arc::new(BackfillRowsPerQuery(n.max(1))));
    }
    if let Some(n) = opts.tile_rows_per_day_by_day {
        config = config.with_extension(Arc::new(TileRowsPerDayByDay(n.max(1))));
    }
    let (pool_limit, metadata_cache) = split_limit(opts.memory_limit);
    let mut runtime = RuntimeEnvBuilder::new()
        .with_disk_manager_builder(DiskManagerBuilder::default())
        // No cache of folder listings: a session writes tiles and roll-ups and then
        // reads them, and DataFusion's default cache (no expiry) would hide the new
        // files from a table registered again over the same folder.
        .with_cache_manager(
            datafusion::execution::cache::cache_manager::CacheManagerConfig::default()
                .with_list_files_cache_limit(0)
                .with_metadata_cache_limit(metadata_cache),
        );
    if let Some(limit) = pool_limit {
        // A fair pool: several sorts and aggregations of one plan share the limit evenly
        // and spill, where the default greedy pool let the first sort take it all and the
        // second fail (measured on the 10M-event benchmark world at 128 MiB).
        let pool = datafusion::execution::memory_pool::FairSpillPool::new(limit);
        let user_limit = opts.memory_limit.unwrap_or(limit);
        runtime = runtime.with_memory_pool(Arc::new(OverdraftPool {
            inner: Arc::new(datafusion::execution::memory_pool::TrackConsumersPool::new(
                pool,
                std::num::NonZeroUsize::new(5).expect("5 is not zero"),
            )),
            resident: ResidentCap::new(user_limit),
        }));
    }
    let mut state = datafusion::execution::SessionStateBuilder::new()
        .with_config(config)
        .with_runtime_env(Arc::new(runtime.build()?))
        .with_default_features()
        .with_physical_optimizer_rule(Arc::new(crate::window_totals::OnePhaseTotals));
    if let Some(planner) = opts.query_planner.as_ref().or(DEFAULT_QUERY_PLANNER.get()) {
        state = state.with_query_planner(planner.clone());
    }
    let state = state.build();
    let ctx = SessionContext::new_with_state(state);
    crate::functions::register(&ctx);
    crate::window_totals::register(&ctx);
    crate::latest::register(&ctx);
    Ok(ctx)
}

/// DataFusion's cache of Parquet footers (its default, 50 MB) sits outside the memory
/// pool; under a limit it gets a sixteenth of the limit and the pool the rest, so that
/// the two together stay within what the user allowed. Returns (pool, cache) sizes.
fn split_limit(limit: Option<usize>) -> (Option<usize>, usize) {
    use datafusion::execution::cache::cache_manager::DEFAULT_METADATA_CACHE_LIMIT;
    match limit {
        Some(limit) => {
            let cache = (limit / METADATA_CACHE_PARTS).min(DEFAULT_METADATA_CACHE_LIMIT);
            (Some(limit - cache), cache)
        }
        None => (None, DEFAULT_METADATA_CACHE_LIMIT),
    }
}

/// The footer cache's share of a memory limit (see [`split_limit`]).
const METADATA_CACHE_PARTS: usize = 16;

/// A memory pool that grants two kinds of DataFusion reservations beyond the limit
/// (they are counted, so the other operators' fair shares shrink):
///
/// - Repartition buffers, always. DataFusion 55 writes a refused repartition batch to a
///   spill pool shared by the input tasks, whose reader waits on the oldest file only:
///   when two tasks spill at once the query can stop for good with every thread parked
///   (apache/datafusion#24883, fixed upstream by #24891, not in 55.2). Measured here: a
///   `--memory-limit 300MiB` backfill of the 100M-event benchmark world stopped that way
///   after its tiles. Repartition buffers hold batches in flight between operators, a
///   few per partition.
/// - A sort's merge of its sorted runs, which cannot spill, up to a sixteenth of the
///   limit per sort ([`MERGE_OVERDRAFT_PARTS`]). Under the fair pool the spilling
///   consumers of a plan may take every byte the limit has left, and the merge then
///   failed the whole query (measured: the roll-ups of a `--memory-limit 40MiB` backfill
///   of the 10M-event world, two sorts and two aggregations at their fair shares of 9 MB
///   each). Only up to a bound: DataFusion sizes the merge of spilled runs by how much it
///   is granted (one batch per run); granting all of it held over 800 files open at once
///   in the roll-ups of the 100M-event world at 300 MiB, at 770 MiB resident
///   (docs/benchmarks.md, ninth measurement).
///
/// And it refuses one kind below the limit: a spilling consumer that already holds a
/// share of the limit ([`SPILL_SHARE_PARTS`]) while the process's resident memory is over
/// [`ResidentCap`] spills instead of growing. The pool counts what DataFusion's operators
/// reserve, not what the process holds besides (the allocator's kept pages after earlier
/// queries, readers' and writers' buffers, the footer cache): after a memory-limited
/// backfill's tile and key-range phases its roll-ups started from 450–500 MiB resident and
/// each added the pool's full share on top (docs/benchmarks.md, tenth measurement).
#[derive(Debug)]
struct OverdraftPool {
    inner: Arc<dyn MemoryPool>,
    resident: ResidentCap,
}

/// A spilling consumer holding at least `limit / SPILL_SHARE_PARTS` spills rather than grow
/// while resident memory is over its cap ([`OverdraftPool`]); one holding less may still
/// grow, so that resident memory the pool cannot free never stops a query.
const SPILL_SHARE_PARTS: usize = 32;

/// The resident memory a memory-limited session aims to stay under: the user's limit plus
/// [`RESIDENT_HEADROOM`] for what the process holds outside the pool (the binary, source
/// listings and footers, the allocator's kept pages). Resident memory is read from
/// `/proc/self/status` at most every 10 ms; where it cannot be read there is no cap.
#[derive(Debug)]
struct ResidentCap {
    cap: usize,
    start: std::time::Instant,
    /// When the last reading was taken (microseconds after `start`) and what it was.
    read_at: std::sync::atomic::AtomicU64,
    bytes: std::sync::atomic::AtomicUsize,
}

impl ResidentCap {
    fn new(limit: usize) -> Self {
        Self::with_cap(limit + RESIDENT_HEADROOM)
    }

    fn with_cap(cap: usize) -> Self {
        ResidentCap {
            cap,
            start: std::time::Instant::now(),
            read_at: std::sync::atomic::AtomicU64::new(0),
            bytes: std::sync::atomic::AtomicUsize::new(0),
        }
    }

    /// Whether the process's resident memory is over the cap (false where unknown).
    fn exceeded(&self) -> bool {
        use std::sync::atomic::Ordering::Relaxed;
        let now = self.start.elapsed().as_micros() as u64;
        let last = self.read_at.load(Relaxed);
        if last == 0 || now.saturating_sub(last) >= 10_000 {
            self.read_at.store(now.max(1), Relaxed);
            self.bytes.store(resident_bytes().unwrap_or(0), Relaxed);
        }
        self.bytes.load(Relaxed) > self.cap
    }
}

/// Resident memory beyond the limit before spilling consumers are held to a small share
/// ([`ResidentCap`]): 192 MiB, which leaves a little over 100 MiB of the 300 MiB that the
/// benchmark's memory target allows beyond the limit to what is in flight and uncounted.
const RESIDENT_HEADROOM: usize = 192 << 20;

/// This process's resident memory (`VmRSS`), on Linux.
fn resident_bytes() -> Option<usize> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmRSS:"))?;
    let kib: usize = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib << 10)
}

/// A sort's merge may hold up to `limit / MERGE_OVERDRAFT_PARTS` beyond the limit (see
/// [`OverdraftPool`]).
const MERGE_OVERDRAFT_PARTS: usize = 16;

impl std::fmt::Display for OverdraftPool {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        self.inner.fmt(f)
    }
}

impl MemoryPool for OverdraftPool {
    fn name(&self) -> &str {
        self.inner.name()
    }

    fn register(&self, consumer: &MemoryConsumer) {
        self.inner.register(consumer)
    }

    fn unregister(&self, consumer: &MemoryConsumer) {
        self.inner.unregister(consumer)
    }

    fn grow(&self, reservation: &MemoryReservation, additional: usize) {
        self.inner.grow(reservation, additional)
    }

    fn shrink(&self, reservation: &MemoryReservation, shrink: usize) {
        self.inner.shrink(reservation, shrink)
    }

    fn try_grow(&self, reservation: &MemoryReservation, additional: usize) -> Result<()> {
        let name = reservation.consumer().name();
        if name.starts_with("RepartitionExec[") {
            self.inner.grow(reservation, additional);
            return Ok(());
        }
        if reservation.consumer().can_spill() {
            if let MemoryLimit::Finite(limit) = self.inner.memory_limit() {
                if reservation.size() >= limit / SPILL_SHARE_PARTS && self.resident.exceeded() {
                    return Err(datafusion::error::DataFusionError::ResourcesExhausted(
                        format!(
                            "{name} spills: resident memory is over {} MiB",
                            self.resident.cap >> 20
                        ),
                    ));
                }
            }
        }
        let refused = match self.inner.try_grow(reservation, additional) {
            Ok(()) => return Ok(()),
            Err(e) => e,
        };
        let overdraft = match self.inner.memory_limit() {
            MemoryLimit::Finite(limit) => limit / MERGE_OVERDRAFT_PARTS,
            _ => 0,
        };
        if name.starts_with("ExternalSorterMerge[") && reservation.size() + additional <= overdraft
        {
            self.inner.grow(reservation, additional);
            Ok(())
        } else {
            Err(refused)
        }
    }

    fn reserved(&self) -> usize {
        self.inner.reserved()
    }

    fn memory_limit(&self) -> MemoryLimit {
        self.inner.memory_limit()
    }
}

/// Whether the session runs under a memory limit.
pub(crate) fn memory_limited(ctx: &SessionContext) -> bool {
    matches!(
        ctx.runtime_env().memory_pool.memory_limit(),
        MemoryLimit::Finite(_)
    )
}

/// Hands the memory the allocator keeps after a query back to the system. glibc keeps
/// freed memory in its per-thread arenas, and a memory-limited backfill runs hundreds of
/// queries one after the other: between them the process stayed near the highest
/// resident memory any query had reached (docs/benchmarks.md, ninth measurement). Called between the queries of a backfill (tile batches, key ranges,
/// roll-ups); a no-op where the C library is not glibc.
pub fn release_free_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: `malloc_trim` only returns free pages to the system; it takes no pointers.
    unsafe {
        libc::malloc_trim(0);
    }
}

/// Parses sizes such as `2GiB`, `512MiB`, `1.5GB`, `1000000`.
pub fn parse_size(text: &str) -> std::result::Result<usize, String> {
    let t = text.trim();
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let n: f64 = num
        .parse()
        .map_err(|_| format!("`{text}` is not a size such as `2GiB`"))?;
    let mult: f64 = match unit.trim().to_ascii_lowercase().as_str() {
        "" | "b" => 1.0,
        "k" | "kb" => 1e3,
        "kib" => 1024.0,
        "m" | "mb" => 1e6,
        "mib" => 1024.0 * 1024.0,
        "g" | "gb" => 1e9,
        "gib" => 1024.0 * 1024.0 * 1024.0,
        _ => {
            return Err(format!(
                "`{text}` has an unknown unit: use B, KiB, MiB, GiB, KB, MB or GB"
            ))
        }
    };
    let bytes = n * mult;
    if !(bytes.is_finite() && bytes >= 1.0) {
        return Err(format!("`{text}` is not a positive size"));
    }
    Ok(bytes as usize)
}

#[cfg(test)]
mod tests {
    use super::{parse_size, split_limit, OverdraftPool, ResidentCap, SPILL_SHARE_PARTS};
    use datafusion::execution::memory_pool::{FairSpillPool, MemoryConsumer, MemoryPool};
    use std::sync::Arc;

    fn pool(limit: usize, cap: usize) -> Arc<dyn MemoryPool> {
        Arc::new(OverdraftPool {
            inner: Arc::new(FairSpillPool::new(limit)),
            resident: ResidentCap::with_cap(cap),
        })
    }

    /// Over the resident cap (1 byte: any process is over it), a spilling consumer may
    /// grow to a share of the limit and no further; others grow as the pool allows.
    #[cfg(target_os = "linux")]
    #[test]
    fn over_the_resident_cap_spilling_consumers_keep_to_a_share() {
        let limit = 32 << 20;
        let share = limit / SPILL_SHARE_PARTS;
        let over = pool(limit, 1);
        let sort = MemoryConsumer::new("sort")
            .with_can_spill(true)
            .register(&over);
        sort.try_grow(share).unwrap();
        let refused = sort.try_grow(1).unwrap_err().to_string();
        assert!(refused.contains("resident memory is over"), "{refused}");
        assert_eq!(sort.size(), share);
        let join = MemoryConsumer::new("join").register(&over);
        join.try_grow(4 * share).unwrap();
        // Under the cap the same consumer grows to the pool's fair share.
        let under = pool(limit, usize::MAX);
        let sort = MemoryConsumer::new("sort")
            .with_can_spill(true)
            .register(&under);
        sort.try_grow(share).unwrap();
        sort.try_grow(4 * share).unwrap();
    }

    #[test]
    fn limit_covers_pool_and_footer_cache() {
        let (pool, cache) = split_limit(Some(300 << 20));
        assert_eq!(pool.unwrap() + cache, 300 << 20);
        assert_eq!(cache, (300 << 20) / 16);
        // Large limits: DataFusion's own default cache size, the rest to the pool.
        let (pool, cache) = split_limit(Some(8 << 30));
        assert_eq!(cache, 50 * 1024 * 1024);
        assert_eq!(pool.unwrap(), (8 << 30) - cache);
        assert_eq!(split_limit(None), (None, 50 * 1024 * 1024));
    }

    #[test]
    fn sizes() {
        assert_eq!(parse_size("2GiB"), Ok(2 << 30));
        assert_eq!(parse_size("512 MiB"), Ok(512 << 20));
        assert_eq!(parse_size("1.5GB"), Ok(1_500_000_000));
        assert!(parse_size("lots").is_err());
        assert!(parse_size("3 parsecs").is_err());
    }
}
