//! Writing the world as Hive-partitioned Parquet event logs.
//!
//! Each local day of the world is one job: it draws that day's events for every customer
//! and writes them into the partition of their UTC event day, one file per arrival day:
//! `<source>/dt=<event day>/arrived-<arrival day>-<k>.parquet`. A late row therefore lands
//! in an old partition under a new file, as it would in a real log. Jobs are independent,
//! so they run in parallel and still give byte-identical files.

use crate::rng::Stream;
use crate::world::{
    customer_key, title_id, Customer, Spell, CHANNELS, DEVICES, GENRES, NEVER, PLANS,
    TITLES_PER_GENRE, TOPICS, VIEW_HOURS,
};
use arrow::array::{
    ArrayRef, BooleanBuilder, Float64Builder, Int64Builder, StringBuilder,
    TimestampMicrosecondBuilder,
};
use arrow::datatypes::{DataType, Field, Schema, SchemaRef, TimeUnit};
use arrow::record_batch::RecordBatch;
use chrono::{Datelike, Duration, NaiveDate, TimeZone, Weekday};
use chrono_tz::Tz;
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::properties::WriterProperties;
use std::collections::BTreeMap;
use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

const MICROS_PER_DAY: i64 = 86_400_000_000;
const MICROS_PER_SEC: i64 = 1_000_000;
/// Customers drawn per chunk: bounds the rows held in memory by one job.
const CHUNK: usize = 16_384;

/// What to generate.
#[derive(Debug, Clone)]
pub struct WorldConfig {
    /// Output folder; sources go to `<out>/plays`, `<out>/subscriptions`, `<out>/support`.
    pub out: PathBuf,
    /// Number of customers (over the world's whole history).
    pub customers: u32,
    /// Number of days of activity logs.
    pub days: u32,
    /// First day of activity logs.
    pub start: NaiveDate,
    /// Seed: the same configuration and seed give byte-identical files.
    pub seed: u64,
    /// Add malformed rows and one unreadable file.
    pub dirty: bool,
    /// Share of rows that arrive 1 to 5 days after their event (default 0.02).
    pub late_share: f64,
    /// Share of rows delivered twice (default 0.005).
    pub duplicate_share: f64,
    /// The service's local time zone (viewing rhythm and billing times follow it).
    pub timezone: Tz,
    /// Worker threads (0: one per core).
    pub threads: usize,
}

impl WorldConfig {
    /// The defaults for a world of `customers` customers over `days` days.
    pub fn new(out: impl Into<PathBuf>, customers: u32, days: u32) -> WorldConfig {
        WorldConfig {
            out: out.into(),
            customers,
            days,
            start: NaiveDate::from_ymd_opt(2026, 1, 1).expect("valid date"),
            seed: 7,
            dirty: false,
            late_share: 0.02,
            duplicate_share: 0.005,
            timezone: chrono_tz::America::Chicago,
            threads: 0,
        }
    }
}

/// Errors while generating.
#[derive(Debug, thiserror::Error)]
pub enum GenerateError {
    /// The configuration cannot be generated.
    #[error("invalid world configuration: {0}")]
    Config(String),
    /// A file could not be written.
    #[error("cannot write {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// Parquet encoding failed.
    #[error("cannot write Parquet file {path}: {source}")]
    Parquet {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: parquet::errors::ParquetError,
    },
}

/// Counts of what was written.
#[derive(Debug, Default, Clone, serde::Serialize)]
pub struct SourceCounts {
    /// Rows written.
    pub rows: u64,
    /// Rows that arrived on a later UTC day than their event day, by 1 day or more.
    pub late_rows: u64,
    /// Extra copies of rows (re-deliveries).
    pub duplicate_rows: u64,
    /// Rows with a null key (dirty worlds only).
    pub null_key_rows: u64,
    /// Rows with a negative duration (dirty worlds only).
    pub negative_duration_rows: u64,
    /// Rows with an event time in the future (dirty worlds only).
    pub future_time_rows: u64,
    /// Files written.
    pub files: u64,
}

/// What a generation run wrote.
#[derive(Debug, Default, Clone, serde::Serialize)]
pub struct WorldSummary {
    /// Per source.
    pub sources: BTreeMap<String, SourceCounts>,
    /// Unreadable files planted (dirty worlds only).
    pub corrupt_files: Vec<String>,
}

/// Source names.
pub const SOURCES: [&str; 3] = ["plays", "subscriptions", "support"];

fn ts() -> DataType {
    DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into()))
}

/// Schema of the `plays` source.
pub fn plays_schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("event_id", DataType::Utf8, false),
        Field::new("customer_id", DataType::Utf8, true),
        Field::new("event_time", ts(), false),
        Field::new("arrived_at", ts(), false),
        Field::new("seconds_played", DataType::Int64, false),
        Field::new("device", DataType::Utf8, false),
        Field::new("title_id", DataType::Utf8, false),
        Field::new("genre", DataType::Utf8, false),
        Field::new("completed", DataType::Boolean, false),
    ]))
}

/// Schema of the `subscriptions` change log.
pub fn subscriptions_schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("change_id", DataType::Utf8, false),
        Field::new("customer_id", DataType::Utf8, true),
        Field::new("changed_at", ts(), false),
        Field::new("arrived_at", ts(), false),
        Field::new("kind", DataType::Utf8, false),
        Field::new("plan", DataType::Utf8, false),
        Field::new("monthly_fee", DataType::Float64, false),
        Field::new("status", DataType::Utf8, false),
    ]))
}

/// Schema of the `support` contacts source.
pub fn support_schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("contact_id", DataType::Utf8, false),
        Field::new("customer_id", DataType::Utf8, true),
        Field::new("opened_at", ts(), false),
        Field::new("arrived_at", ts(), false),
        Field::new("channel", DataType::Utf8, false),
        Field::new("topic", DataType::Utf8, false),
        Field::new("wait_minutes", DataType::Float64, false),
        Field::new("resolved", DataType::Boolean, false),
    ]))
}

/// One row of any source, before it becomes Arrow columns.
#[derive(Clone)]
enum Row {
    Play {
        id: u64,
        customer: Option<u32>,
        event: i64,
        arrived: i64,
        seconds: i64,
        device: u8,
        genre: u8,
        title: u64,
        completed: bool,
    },
    Change {
        id: u64,
        customer: u32,
        event: i64,
        arrived: i64,
        kind: &'static str,
        plan: u8,
        status: &'static str,
    },
    Contact {
        id: u64,
        customer: u32,
        event: i64,
        arrived: i64,
        channel: u8,
        topic: u8,
        wait: f64,
        resolved: bool,
    },
}

impl Row {
    fn times(&self) -> (i64, i64) {
        match self {
            Row::Play { event, arrived, .. }
            | Row::Change { event, arrived, .. }
            | Row::Contact { event, arrived, .. } => (*event, *arrived),
        }
    }
    fn set_arrived(&mut self, t: i64) {
        match self {
            Row::Play { arrived, .. }
            | Row::Change { arrived, .. }
            | Row::Contact { arrived, .. } => *arrived = t,
        }
    }
    fn source(&self) -> usize {
        match self {
            Row::Play { .. } => 0,
            Row::Change { .. } => 1,
            Row::Contact { .. } => 2,
        }
    }
}

struct Ctx {
    cfg: WorldConfig,
    customers: Vec<Customer>,
    /// UTC micros of the world's start (first UTC day of activity logs).
    start_utc: i64,
    /// UTC micros of "now": the end of the world; nothing happens or arrives after it.
    now_utc: i64,
    schemas: [SchemaRef; 3],
    props: WriterProperties,
    counts: Mutex<[SourceCounts; 3]>,
}

/// Generates the world described by `cfg`.
pub fn generate(cfg: &WorldConfig) -> Result<WorldSummary, GenerateError> {
    if cfg.customers == 0 || cfg.days == 0 {
        return Err(GenerateError::Config(
            "customers and days must be at least 1".into(),
        ));
    }
    if cfg.days > 3660 {
        return Err(GenerateError::Config("at most 3660 days".into()));
    }
    if !(0.0..=0.5).contains(&cfg.late_share) || !(0.0..=0.5).contains(&cfg.duplicate_share) {
        return Err(GenerateError::Config(
            "late and duplicate shares must be between 0 and 0.5".into(),
        ));
    }
    let days = cfg.days as i32;
    let customers: Vec<Customer> = (0..cfg.customers)
        .map(|i| Customer::draw(cfg.seed, i, days))
        .collect();
    let first_day = customers
        .iter()
        .map(|c| c.spells[0].start)
        .min()
        .unwrap_or(0)
        .min(0);
    let start_utc = cfg
        .start
        .and_hms_opt(0, 0, 0)
        .expect("midnight")
        .and_utc()
        .timestamp_micros();
    let props = WriterProperties::builder()
        .set_compression(Compression::ZSTD(
            ZstdLevel::try_new(3).expect("valid level"),
        ))
        .set_created_by("daymark-worldgen".to_string())
        .set_max_row_group_row_count(Some(131_072))
        .build();
    let ctx = Ctx {
        cfg: cfg.clone(),
        customers,
        start_utc,
        now_utc: start_utc + days as i64 * MICROS_PER_DAY,
        schemas: [plays_schema(), subscriptions_schema(), support_schema()],
        props,
        counts: Mutex::new(Default::default()),
    };
    for s in SOURCES {
        let dir = cfg.out.join(s);
        std::fs::create_dir_all(&dir).map_err(|e| GenerateError::Io {
            path: dir.clone(),
            source: e,
        })?;
    }
    // Jobs: local days from before the earliest subscription to the last day.
    let jobs: Vec<i32> = ((first_day - 1)..days).collect();
    let next = AtomicUsize::new(0);
    let threads = if cfg.threads == 0 {
        std::thread::available_parallelism()
            .map(|n| n.get())
            .unwrap_or(1)
    } else {
        cfg.threads
    };
    let first_error: Mutex<Option<GenerateError>> = Mutex::new(None);
    std::thread::scope(|scope| {
        for _ in 0..threads {
            scope.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                if i >= jobs.len() || first_error.lock().map(|e| e.is_some()).unwrap_or(true) {
                    return;
                }
                if let Err(e) = run_day(&ctx, jobs[i]) {
                    if let Ok(mut slot) = first_error.lock() {
                        slot.get_or_insert(e);
                    }
                    return;
                }
            });
        }
    });
    if let Some(e) = first_error.into_inner().ok().flatten() {
        return Err(e);
    }
    let mut summary = WorldSummary::default();
    let counts = ctx.counts.into_inner().unwrap_or_default();
    for (i, c) in counts.into_iter().enumerate() {
        summary.sources.insert(SOURCES[i].to_string(), c);
    }
    write_markers(cfg)?;
    if cfg.dirty {
        // One file that is not Parquet at all, in the middle of the plays log.
        let day = cfg.start + Duration::days(days as i64 / 2);
        let dir = cfg.out.join("plays").join(format!("dt={day}"));
        std::fs::create_dir_all(&dir).map_err(|e| GenerateError::Io {
            path: dir.clone(),
            source: e,
        })?;
        let path = dir.join("arrived-corrupt.parquet");
        std::fs::write(&path, b"this is not a parquet file\n").map_err(|e| GenerateError::Io {
            path: path.clone(),
            source: e,
        })?;
        summary.corrupt_files.push(path.display().to_string());
    }
    let manifest = cfg.out.join("world.json");
    let text = serde_json::json!({
        "generator": "daymark-worldgen",
        "customers": cfg.customers,
        "days": cfg.days,
        "start": cfg.start.to_string(),
        "seed": cfg.seed,
        "dirty": cfg.dirty,
        "late_share": cfg.late_share,
        "duplicate_share": cfg.duplicate_share,
        "timezone": cfg.timezone.name(),
        "summary": summary,
    });
    std::fs::write(
        &manifest,
        serde_json::to_string_pretty(&text).unwrap_or_default() + "\n",
    )
    .map_err(|e| GenerateError::Io {
        path: manifest.clone(),
        source: e,
    })?;
    Ok(summary)
}

/// Name of the empty file that marks a day partition as loaded (its on-time rows written).
pub const COMPLETE_MARKER: &str = "_complete";

/// Marks every day partition of every source, from its first day to the world's last,
/// as loaded, including days that had no rows (a quiet day is not a missing day).
fn write_markers(cfg: &WorldConfig) -> Result<(), GenerateError> {
    let last = cfg.start + Duration::days(cfg.days as i64 - 1);
    for source in SOURCES {
        let dir = cfg.out.join(source);
        let first = std::fs::read_dir(&dir)
            .map_err(|e| GenerateError::Io {
                path: dir.clone(),
                source: e,
            })?
            .flatten()
            .filter_map(|e| {
                let name = e.file_name().to_string_lossy().to_string();
                NaiveDate::parse_from_str(name.strip_prefix("dt=")?, "%Y-%m-%d").ok()
            })
            .min()
            .unwrap_or(cfg.start)
            .min(cfg.start);
        for day in first.iter_days().take_while(|d| *d <= last) {
            let part = dir.join(format!("dt={day}"));
            std::fs::create_dir_all(&part).map_err(|e| GenerateError::Io {
                path: part.clone(),
                source: e,
            })?;
            let marker = part.join(COMPLETE_MARKER);
            std::fs::write(&marker, b"").map_err(|e| GenerateError::Io {
                path: marker.clone(),
                source: e,
            })?;
        }
    }
    Ok(())
}

/// UTC micros of `day` (relative to start) at local second-of-day `sec`.
fn local_micros(ctx: &Ctx, day: i32, sec: u32) -> i64 {
    let date = ctx.cfg.start + Duration::days(day as i64);
    let naive = date
        .and_hms_opt(sec / 3600, (sec / 60) % 60, sec % 60)
        .expect("valid time");
    match ctx.cfg.timezone.from_local_datetime(&naive).earliest() {
        Some(t) => t.timestamp_micros(),
        // Inside a spring-forward gap: the same wall time an hour later exists.
        None => ctx
            .cfg
            .timezone
            .from_local_datetime(&(naive + Duration::hours(1)))
            .earliest()
            .map(|t| t.timestamp_micros())
            .unwrap_or_else(|| naive.and_utc().timestamp_micros()),
    }
}

fn weekday_factor(ctx: &Ctx, day: i32) -> f64 {
    match (ctx.cfg.start + Duration::days(day as i64)).weekday() {
        Weekday::Sat | Weekday::Sun => 1.35,
        Weekday::Fri => 1.1,
        _ => 1.0,
    }
}

fn status_after(spell: &Spell, day: i32) -> &'static str {
    if spell.cancel != NEVER && day >= spell.cancel {
        "cancelling"
    } else {
        "active"
    }
}

/// Draws the rows of every customer for local day `day`.
fn draw_rows(ctx: &Ctx, c: &Customer, day: i32, out: &mut Vec<Row>) {
    let seed = ctx.cfg.seed;
    let mut r = Stream::new(seed, &[2, c.index as u64, day as u64]);
    let id_base = ((c.index as u64) << 32) ^ ((day as i64 + 100_000) as u64) << 12;
    let mut next_id = 0u64;
    let mut id = || {
        next_id += 1;
        crate::rng::mix(seed ^ id_base ^ next_id)
    };
    // Subscription changes.
    for (n, s) in c.spells.iter().enumerate() {
        let at_billing = local_micros(ctx, day, c.billing_second);
        let change = |kind, status, event, plan| Row::Change {
            id: 0,
            customer: c.index,
            event,
            arrived: 0,
            kind,
            plan,
            status,
        };
        let mut push = |mut row: Row, id: u64| {
            if let Row::Change { id: slot, .. } = &mut row {
                *slot = id;
            }
            out.push(row);
        };
        if day == s.start {
            let kind = if n == 0 { "started" } else { "resumed" };
            push(change(kind, "active", at_billing, c.plan_on(day)), id());
        }
        let since = day - s.start;
        if since > 0 && since % 30 == 0 && day < s.end {
            if s.involuntary && day >= s.fade_start {
                // Renewal refused: the card was declined.
            } else {
                push(
                    change("renewed", status_after(s, day), at_billing, c.plan_on(day)),
                    id(),
                );
            }
        }
        if s.involuntary
            && (day == s.fade_start || day == s.fade_start + 3 || day == s.fade_start + 6)
        {
            push(
                change("payment_failed", "active", at_billing, c.plan_on(day)),
                id(),
            );
        }
        if day == s.cancel {
            let t = local_micros(ctx, day, r.below(86_400) as u32);
            push(change("cancelled", "cancelling", t, c.plan_on(day)), id());
        }
        if day == s.end {
            push(change("ended", "ended", at_billing, c.plan_on(day)), id());
        }
    }
    if let Some((d, p)) = c.plan_change {
        if d == day {
            if let Some(s) = c.spell_on(day) {
                let t = local_micros(ctx, day, r.below(86_400) as u32);
                out.push(Row::Change {
                    id: id(),
                    customer: c.index,
                    event: t,
                    arrived: 0,
                    kind: "plan_changed",
                    plan: p,
                    status: status_after(s, day),
                });
            }
        }
    }
    // Activity: only while subscribed, and only from the start of the activity logs.
    if day < -1 {
        return;
    }
    let Some(s) = c.spell_on(day) else { return };
    let fade = c.fade(s, day);
    let plays = r.poisson(c.engagement * weekday_factor(ctx, day) * fade);
    for _ in 0..plays {
        let hour = r.pick(&VIEW_HOURS) as u32;
        let sec = hour * 3600 + r.below(3600) as u32;
        let event = local_micros(ctx, day, sec);
        let genre = if r.chance(0.6) {
            c.genres[r.below(2) as usize]
        } else {
            r.below(GENRES.len() as u64) as u8
        };
        let title = r.below(TITLES_PER_GENRE);
        let runtime = GENRES[genre as usize].1
            * 60.0
            * (0.7 + 0.6 * crate::rng::mix(title) as f64 / u64::MAX as f64);
        let watched = (runtime * (0.15 + 0.95 * r.unit())).min(4.0 * 3600.0);
        let seconds = watched.round() as i64;
        out.push(Row::Play {
            id: id(),
            customer: Some(c.index),
            event,
            arrived: 0,
            seconds,
            device: r.pick(c.device_weights()) as u8,
            genre,
            title,
            completed: watched >= 0.9 * runtime,
        });
    }
    let fading = day >= s.fade_start;
    let contact_rate = if fading { 0.035 } else { 0.004 };
    if r.chance(contact_rate) {
        let topic = if fading {
            r.pick(&[0.55, 0.15, 0.2, 0.1])
        } else {
            r.pick(&[0.25, 0.4, 0.2, 0.15])
        } as u8;
        let event = local_micros(ctx, day, 8 * 3600 + r.below(14 * 3600) as u32);
        out.push(Row::Contact {
            id: id(),
            customer: c.index,
            event,
            arrived: 0,
            channel: r.pick(&[0.5, 0.3, 0.2]) as u8,
            topic,
            wait: (r.exponential(6.0) * 10.0).round() / 10.0,
            resolved: r.chance(if fading { 0.6 } else { 0.85 }),
        });
    }
}

/// Sets arrival times, adds re-deliveries and (dirty worlds) malformed rows.
fn deliver(
    ctx: &Ctx,
    c: &Customer,
    day: i32,
    rows: &mut Vec<Row>,
    from: usize,
    counts: &mut [SourceCounts; 3],
    copies: &mut std::collections::HashSet<usize>,
) {
    let mut r = Stream::new(ctx.cfg.seed, &[3, c.index as u64, day as u64]);
    let end = rows.len();
    for i in from..end {
        let (event, _) = rows[i].times();
        let late = r.chance(ctx.cfg.late_share);
        let delay = if late {
            MICROS_PER_DAY + r.below(4 * MICROS_PER_DAY as u64) as i64
        } else {
            (r.exponential(120.0).min(3600.0) * MICROS_PER_SEC as f64) as i64
        };
        rows[i].set_arrived(event + delay);
        if ctx.cfg.dirty && rows[i].source() == 0 {
            if let Row::Play {
                customer,
                seconds,
                event,
                ..
            } = &mut rows[i]
            {
                let x = r.unit();
                if x < 0.001 {
                    *customer = None;
                    counts[0].null_key_rows += 1;
                } else if x < 0.002 {
                    *seconds = -*seconds - 1;
                    counts[0].negative_duration_rows += 1;
                } else if x < 0.0025 {
                    *event += 73 * 365 * MICROS_PER_DAY;
                    counts[0].future_time_rows += 1;
                }
            }
        }
        if r.chance(ctx.cfg.duplicate_share) {
            let mut copy = rows[i].clone();
            let (_, arrived) = copy.times();
            copy.set_arrived(arrived + r.below(3 * 3600 * MICROS_PER_SEC as u64) as i64);
            copies.insert(rows.len());
            rows.push(copy);
        }
    }
}

fn run_day(ctx: &Ctx, day: i32) -> Result<(), GenerateError> {
    let mut writers: BTreeMap<(usize, i64, i64), (PathBuf, ArrowWriter<File>)> = BTreeMap::new();
    let mut counts: [SourceCounts; 3] = Default::default();
    let mut rows = Vec::new();
    // Indices (in `rows`) of the extra copies `deliver` added.
    let mut copies = std::collections::HashSet::new();
    for chunk in ctx.customers.chunks(CHUNK) {
        rows.clear();
        copies.clear();
        for c in chunk {
            let from = rows.len();
            draw_rows(ctx, c, day, &mut rows);
            if rows.len() > from {
                deliver(ctx, c, day, &mut rows, from, &mut counts, &mut copies);
            }
        }
        // Group by (source, UTC event day, UTC arrival day); drop what has not happened yet.
        let mut groups: BTreeMap<(usize, i64, i64), Vec<&Row>> = BTreeMap::new();
        for (i, row) in rows.iter().enumerate() {
            let (event, arrived) = row.times();
            let future_fault = event >= ctx.now_utc + 365 * MICROS_PER_DAY;
            if (event >= ctx.now_utc && !future_fault) || arrived >= ctx.now_utc {
                continue;
            }
            if row.source() != 1 && event < ctx.start_utc {
                continue;
            }
            // A planted future timestamp is filed where it arrived, as a broken clock would.
            if copies.contains(&i) {
                counts[row.source()].duplicate_rows += 1;
            }
            let part_time = if future_fault { arrived } else { event };
            groups
                .entry((
                    row.source(),
                    part_time.div_euclid(MICROS_PER_DAY),
                    arrived.div_euclid(MICROS_PER_DAY),
                ))
                .or_default()
                .push(row);
        }
        for (key, group) in groups {
            let (source, e, a) = key;
            let (path, w) = match writers.entry(key) {
                std::collections::btree_map::Entry::Occupied(o) => o.into_mut(),
                std::collections::btree_map::Entry::Vacant(slot) => {
                    let date = |d: i64| {
                        NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch") + Duration::days(d)
                    };
                    let local = ctx.cfg.start + Duration::days(day as i64);
                    let k = (local - date(e)).num_days() + 1;
                    let dir = ctx
                        .cfg
                        .out
                        .join(SOURCES[source])
                        .join(format!("dt={}", date(e)));
                    std::fs::create_dir_all(&dir).map_err(|err| GenerateError::Io {
                        path: dir.clone(),
                        source: err,
                    })?;
                    let path = dir.join(format!("arrived-{}-{k}.parquet", date(a)));
                    let file = File::create(&path).map_err(|err| GenerateError::Io {
                        path: path.clone(),
                        source: err,
                    })?;
                    let w = ArrowWriter::try_new(
                        file,
                        ctx.schemas[source].clone(),
                        Some(ctx.props.clone()),
                    )
                    .map_err(|err| GenerateError::Parquet {
                        path: path.clone(),
                        source: err,
                    })?;
                    counts[source].files += 1;
                    slot.insert((path, w))
                }
            };
            let batch = to_batch(ctx, source, &group);
            w.write(&batch).map_err(|err| GenerateError::Parquet {
                path: path.clone(),
                source: err,
            })?;
            counts[source].rows += group.len() as u64;
            if a > e {
                counts[source].late_rows += group
                    .iter()
                    .filter(|r| {
                        let (ev, ar) = r.times();
                        ar - ev >= MICROS_PER_DAY
                    })
                    .count() as u64;
            }
        }
    }
    for (_, (path, w)) in writers {
        w.close().map_err(|err| GenerateError::Parquet {
            path: path.clone(),
            source: err,
        })?;
    }
    // Copies are counted when written (a re-delivery after "now" is not).
    let mut total = ctx
        .counts
        .lock()
        .map_err(|_| GenerateError::Config("a worker failed".into()))?;
    for i in 0..3 {
        total[i].rows += counts[i].rows;
        total[i].late_rows += counts[i].late_rows;
        total[i].duplicate_rows += counts[i].duplicate_rows;
        total[i].null_key_rows += counts[i].null_key_rows;
        total[i].negative_duration_rows += counts[i].negative_duration_rows;
        total[i].future_time_rows += counts[i].future_time_rows;
        total[i].files += counts[i].files;
    }
    Ok(())
}

fn to_batch(ctx: &Ctx, source: usize, rows: &[&Row]) -> RecordBatch {
    let seed = ctx.cfg.seed;
    let n = rows.len();
    let cols: Vec<ArrayRef> = match source {
        0 => {
            let mut id = StringBuilder::with_capacity(n, n * 17);
            let mut cust = StringBuilder::with_capacity(n, n * 10);
            let mut ev = TimestampMicrosecondBuilder::with_capacity(n).with_timezone("UTC");
            let mut ar = TimestampMicrosecondBuilder::with_capacity(n).with_timezone("UTC");
            let mut secs = Int64Builder::with_capacity(n);
            let mut dev = StringBuilder::with_capacity(n, n * 6);
            let mut title = StringBuilder::with_capacity(n, n * 5);
            let mut genre = StringBuilder::with_capacity(n, n * 8);
            let mut done = BooleanBuilder::with_capacity(n);
            for r in rows {
                if let Row::Play {
                    id: i,
                    customer,
                    event,
                    arrived,
                    seconds,
                    device,
                    genre: g,
                    title: t,
                    completed,
                } = r
                {
                    id.append_value(format!("p{i:016x}"));
                    match customer {
                        Some(c) => cust.append_value(customer_key(seed, *c)),
                        None => cust.append_null(),
                    }
                    ev.append_value(*event);
                    ar.append_value(*arrived);
                    secs.append_value(*seconds);
                    dev.append_value(DEVICES[*device as usize]);
                    title.append_value(title_id(*g as usize, *t));
                    genre.append_value(GENRES[*g as usize].0);
                    done.append_value(*completed);
                }
            }
            vec![
                Arc::new(id.finish()),
                Arc::new(cust.finish()),
                Arc::new(ev.finish()),
                Arc::new(ar.finish()),
                Arc::new(secs.finish()),
                Arc::new(dev.finish()),
                Arc::new(title.finish()),
                Arc::new(genre.finish()),
                Arc::new(done.finish()),
            ]
        }
        1 => {
            let mut id = StringBuilder::new();
            let mut cust = StringBuilder::new();
            let mut ev = TimestampMicrosecondBuilder::with_capacity(n).with_timezone("UTC");
            let mut ar = TimestampMicrosecondBuilder::with_capacity(n).with_timezone("UTC");
            let mut kind = StringBuilder::new();
            let mut plan = StringBuilder::new();
            let mut fee = Float64Builder::with_capacity(n);
            let mut status = StringBuilder::new();
            for r in rows {
                if let Row::Change {
                    id: i,
                    customer,
                    event,
                    arrived,
                    kind: k,
                    plan: p,
                    status: s,
                } = r
                {
                    id.append_value(format!("s{i:016x}"));
                    cust.append_value(customer_key(seed, *customer));
                    ev.append_value(*event);
                    ar.append_value(*arrived);
                    kind.append_value(*k);
                    plan.append_value(PLANS[*p as usize].0);
                    fee.append_value(PLANS[*p as usize].1);
                    status.append_value(*s);
                }
            }
            vec![
                Arc::new(id.finish()),
                Arc::new(cust.finish()),
                Arc::new(ev.finish()),
                Arc::new(ar.finish()),
                Arc::new(kind.finish()),
                Arc::new(plan.finish()),
                Arc::new(fee.finish()),
                Arc::new(status.finish()),
            ]
        }
        _ => {
            let mut id = StringBuilder::new();
            let mut cust = StringBuilder::new();
            let mut ev = TimestampMicrosecondBuilder::with_capacity(n).with_timezone("UTC");
            let mut ar = TimestampMicrosecondBuilder::with_capacity(n).with_timezone("UTC");
            let mut channel = StringBuilder::new();
            let mut topic = StringBuilder::new();
            let mut wait = Float64Builder::with_capacity(n);
            let mut resolved = BooleanBuilder::with_capacity(n);
            for r in rows {
                if let Row::Contact {
                    id: i,
                    customer,
                    event,
                    arrived,
                    channel: ch,
                    topic: t,
                    wait: w,
                    resolved: rs,
                } = r
                {
                    id.append_value(format!("h{i:016x}"));
                    cust.append_value(customer_key(seed, *customer));
                    ev.append_value(*event);
                    ar.append_value(*arrived);
                    channel.append_value(CHANNELS[*ch as usize]);
                    topic.append_value(TOPICS[*t as usize]);
                    wait.append_value(*w);
                    resolved.append_value(*rs);
                }
            }
            vec![
                Arc::new(id.finish()),
                Arc::new(cust.finish()),
                Arc::new(ev.finish()),
                Arc::new(ar.finish()),
                Arc::new(channel.finish()),
                Arc::new(topic.finish()),
                Arc::new(wait.finish()),
                Arc::new(resolved.finish()),
            ]
        }
    };
    RecordBatch::try_new(ctx.schemas[source].clone(), cols).expect("columns match the schema")
}

/// Lists the Parquet files under `dir`, sorted (for tests and tools).
pub fn list_parquet(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        if let Ok(rd) = std::fs::read_dir(&d) {
            for e in rd.flatten() {
                let p = e.path();
                if p.is_dir() {
                    stack.push(p);
                } else if p.extension().is_some_and(|x| x == "parquet") {
                    out.push(p);
                }
            }
        }
    }
    out.sort();
    out
}
