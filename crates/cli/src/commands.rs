//! The commands' bodies.

use crate::exit;
use anyhow::{Context, Result};
use chrono::NaiveDate;
use daymark_engine::{
    check_against_schemas, inspect_sources_with, register_sources, schemas_of, snapshot_query,
    SourceReport,
};
use daymark_spec::{Diagnostic, FeatureDef, Knowledge, Pipeline, Population, SpecErrors};
use daymark_worldgen::{generate as generate_world, WorldConfig};
use serde_json::json;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// The demo pipeline, shipped inside the binary so `daymark demo` works from any folder.
const DEMO_PIPELINE: &str = include_str!("../../../pipelines/demo.yaml");

/// Arguments of `daymark build`.
#[derive(clap::Args)]
pub struct BuildArgs {
    /// The pipeline file.
    pipeline: PathBuf,
    /// Build this one day (YYYY-MM-DD).
    #[arg(long, conflicts_with_all = ["from", "to"])]
    date: Option<String>,
    /// First day of a backfill (YYYY-MM-DD).
    #[arg(long, requires = "to")]
    from: Option<String>,
    /// Last day of a backfill, inclusive (YYYY-MM-DD).
    #[arg(long, requires = "from")]
    to: Option<String>,
    /// Use one knowledge mode for every source: `as-known` or `event-time`. Such builds go to
    /// `snapshots-<mode>/` so they never replace the default ones.
    #[arg(long)]
    knowledge: Option<String>,
    /// Output folder or URL (default: the pipeline's `output`, else `out` beside it).
    #[arg(long)]
    out: Option<String>,
    /// Memory limit for the engine, e.g. `2GiB`; larger work spills to disk.
    #[arg(long)]
    memory_limit: Option<String>,
    /// Build even when day partitions that a window needs are missing.
    #[arg(long)]
    allow_gaps: bool,
    /// `tiled` (default): combine stored per-day tiles, reading each raw partition once;
    /// `naive`: one query over the raw events of each day's windows (the reference path).
    #[arg(long, default_value = "tiled", value_parser = ["tiled", "naive"])]
    engine: String,
    /// `text` (default) or `json`: one JSON object per line on stdout, for schedulers.
    #[arg(long, default_value = "text", value_parser = ["text", "json"])]
    log_format: String,
}

/// A command-line value that cannot be used: the command exits with code 2.
#[derive(Debug)]
pub struct InvalidInput(pub String);

impl std::fmt::Display for InvalidInput {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for InvalidInput {}

pub(crate) fn invalid(message: String) -> anyhow::Error {
    InvalidInput(message).into()
}

pub(crate) fn parse_mode(knowledge: Option<&str>) -> Result<Option<Knowledge>> {
    match knowledge {
        None => Ok(None),
        Some("as-known") => Ok(Some(Knowledge::AsKnown)),
        Some("event-time") => Ok(Some(Knowledge::EventTime)),
        Some(other) => Err(invalid(format!(
            "unknown knowledge mode `{other}`: use `as-known` or `event-time`"
        ))),
    }
}

pub(crate) fn parse_day(text: &str) -> Result<NaiveDate> {
    let day: NaiveDate = text
        .parse()
        .map_err(|_| invalid(format!("`{text}` is not a date (YYYY-MM-DD)")))?;
    // Windows reach up to 100 years back; keep every date arithmetic far from the limits.
    if !(1900..=2999).contains(&chrono::Datelike::year(&day)) {
        return Err(invalid(format!(
            "`{text}` is outside the supported years 1900 to 2999"
        )));
    }
    Ok(day)
}

/// Adds what to do when the engine ran out of its memory budget.
fn memory_hint(e: anyhow::Error) -> anyhow::Error {
    let text = format!("{e:#}");
    if text.contains("Failed to allocate") || text.contains("Resources exhausted") {
        e.context("the engine's memory limit is too small for this step even with spilling to disk: raise --memory-limit")
    } else {
        e
    }
}

/// `daymark build`.
pub async fn build(args: BuildArgs) -> Result<u8> {
    let mode = parse_mode(args.knowledge.as_deref())?;
    let days: Vec<NaiveDate> = match (&args.date, &args.from, &args.to) {
        (Some(d), _, _) => vec![parse_day(d)?],
        (None, Some(a), Some(b)) => {
            let (a, b) = (parse_day(a)?, parse_day(b)?);
            if b < a {
                return Err(invalid(format!("--to {b} is before --from {a}")));
            }
            a.iter_days().take_while(|d| *d <= b).collect()
        }
        _ => return Err(invalid("give --date D, or --from A --to B".into())),
    };
    let memory_limit = match &args.memory_limit {
        Some(text) => Some(daymark_engine::session::parse_size(text).map_err(invalid)?),
        None => None,
    };
    let pipeline = match load(&args.pipeline) {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let out_text = args
        .out
        .clone()
        .or_else(|| pipeline.file.output.clone())
        .unwrap_or_else(|| "out".to_string());
    let base = if args.out.is_some() {
        None
    } else {
        pipeline.base_dir.as_deref()
    };
    let out = daymark_store::resolve(&out_text, base)?;
    let (reports, problems, types) = inspect(&pipeline, &args.pipeline, Some(&out)).await;
    if !problems.is_empty() {
        print_problems(&problems);
        return Ok(exit::INVALID);
    }
    let mut footers = daymark_store::FooterReads::default();
    for r in reports.values() {
        footers.add(&r.footer_reads);
    }
    // Every partition a window needs must exist (or carry a completeness marker).
    let mut missing: BTreeMap<String, Vec<NaiveDate>> = BTreeMap::new();
    for day in &days {
        for (source, read) in snapshot_query(&pipeline, *day, mode).reads {
            // The partitions after the cutoff's own day may legitimately be empty so far.
            let to = read.last_day - chrono::Duration::days(2);
            let gaps = reports[&source].gaps(read.first_day, Some(to));
            missing.entry(source.clone()).or_default().extend(gaps);
        }
    }
    missing.retain(|_, v| !v.is_empty());
    for v in missing.values_mut() {
        v.sort();
        v.dedup();
    }
    if !missing.is_empty() {
        for (source, ds) in &missing {
            let shown: Vec<String> = ds.iter().take(10).map(|d| d.to_string()).collect();
            eprintln!(
                "source {source}: {} day partition(s) that a window needs are missing: {}{}",
                ds.len(),
                shown.join(", "),
                if ds.len() > 10 { ", ..." } else { "" }
            );
        }
        if !args.allow_gaps {
            eprintln!(
                "nothing built: land the missing days, or pass --allow-gaps to build without them"
            );
            return Ok(exit::INVALID);
        }
        eprintln!("--allow-gaps: building without them");
    }
    // One writer per output: the lock that `run` and `watch` take (a build started by hand
    // beside a scheduled run would otherwise race it for the same files).
    let Some(guard) = take_output_lock(&out, "build", BUILD_LOCK_LEASE, "nothing built").await?
    else {
        return Ok(exit::LOCK_HELD);
    };
    let result = build_locked(
        &args,
        &guard,
        &pipeline,
        &reports,
        &types,
        &out,
        &days,
        mode,
        memory_limit,
        &footers,
    )
    .await;
    let released = guard.release().await;
    let code = result?;
    released?;
    Ok(code)
}

/// Takes the output lock that `run` and `watch` take, for `command` with a lease of
/// `lease` (renewed while held). While another process holds it, says so on standard error,
/// ending with `refused` (what was not done), and returns `None`: exit with
/// [`exit::LOCK_HELD`].
pub(crate) async fn take_output_lock(
    out: &daymark_store::Location,
    command: &str,
    lease: std::time::Duration,
    refused: &str,
) -> Result<Option<Box<daymark_runner::lock::LockGuard>>> {
    let me = daymark_runner::ledger::RunIdentity::current();
    match daymark_runner::lock::acquire(out, &me, command, lease).await? {
        daymark_runner::lock::Acquire::Acquired(guard, note) => {
            if let Some(n) = note {
                eprintln!("{n}");
            }
            Ok(Some(guard))
        }
        daymark_runner::lock::Acquire::Held(info) => {
            eprintln!(
                "another run holds the output lock: {}; {refused}",
                info.describe()
            );
            Ok(None)
        }
    }
}

/// Lease of the output lock while `daymark build` works (renewed every third of it).
const BUILD_LOCK_LEASE: std::time::Duration = std::time::Duration::from_secs(120);

/// `daymark build` once it holds the output lock.
#[allow(clippy::too_many_arguments)]
async fn build_locked(
    args: &BuildArgs,
    guard: &daymark_runner::lock::LockGuard,
    pipeline: &Pipeline,
    reports: &BTreeMap<String, SourceReport>,
    types: &daymark_engine::FeatureTypes,
    out: &daymark_store::Location,
    days: &[NaiveDate],
    mode: Option<Knowledge>,
    memory_limit: Option<usize>,
    footers: &daymark_store::FooterReads,
) -> Result<u8> {
    let ctx = daymark_engine::session::session(&daymark_engine::session::EngineOptions {
        memory_limit,
        target_partitions: None,
        ..Default::default()
    })?;
    register_sources(&ctx, pipeline, reports).await?;
    daymark_engine::build::write_dictionary(pipeline, types, out, mode).await?;
    let t0 = std::time::Instant::now();
    let log = crate::report::Report::new(&args.log_format);
    let tiled = args.engine == "tiled";
    let layouts = daymark_engine::tiles::layouts(pipeline);
    let mut plan: Option<daymark_engine::rollups::DayPlan> = None;
    if tiled {
        let t_tiles = std::time::Instant::now();
        // One day: its pieces (tiles at the edges of its windows, roll-ups of whole weeks
        // and months between). A range: the tiles of every day.
        let per_source = if days.len() == 1 {
            let (stats, day_plan) = daymark_engine::rollups::plan_day(
                &ctx, pipeline, reports, &layouts, out, days[0], mode,
            )
            .await
            .map_err(|e| memory_hint(e.into()))?;
            plan = Some(day_plan);
            stats
        } else {
            daymark_engine::tiles::prepare(&ctx, pipeline, reports, &layouts, out, days, mode)
                .await
                .map_err(|e| memory_hint(e.into()))?
        };
        let mut total = daymark_engine::tiles::TileStats::default();
        for (source, stats) in &per_source {
            log.event(
                "tiles",
                || {
                    format!(
                        "tiles {source}: {} partition(s) built from {} raw file(s) ({}), {} reused; {} week/month roll-up(s) built, {} reused; ignored {} row(s) with a null key; {} row(s) with an event time after their arrival",
                        stats.partitions_built,
                        stats.raw_files,
                        human_bytes(stats.raw_bytes),
                        stats.partitions_reused,
                        stats.rollups_built,
                        stats.rollups_reused,
                        stats.ignored.null_key_rows,
                        stats.ignored.event_after_arrival_rows
                    )
                },
                json!({"source": source, "partitions_built": stats.partitions_built, "partitions_reused": stats.partitions_reused, "markers_read": stats.markers_read, "rollups_built": stats.rollups_built, "rollups_reused": stats.rollups_reused, "raw_files": stats.raw_files, "raw_bytes": stats.raw_bytes, "null_key_rows": stats.ignored.null_key_rows, "event_after_arrival_rows": stats.ignored.event_after_arrival_rows}),
            );
            total.add(stats);
        }
        log.event(
            "read",
            || {
                format!(
                    "read {} raw file(s), {} in all; {} tile partition(s) reused ({:.1} s); {} footer(s) read, {} from the footer cache",
                    total.raw_files,
                    human_bytes(total.raw_bytes),
                    total.partitions_reused,
                    t_tiles.elapsed().as_secs_f64(),
                    footers.read,
                    footers.cached
                )
            },
            json!({"seconds": t_tiles.elapsed().as_secs_f64(), "footers_read": footers.read, "footers_cached": footers.cached, "raw_files": total.raw_files, "raw_bytes": total.raw_bytes, "partitions_built": total.partitions_built, "partitions_reused": total.partitions_reused, "null_key_rows": total.ignored.null_key_rows, "event_after_arrival_rows": total.ignored.event_after_arrival_rows}),
        );
    }
    let mut rows = 0u64;
    let mut warnings = 0usize;
    let daily_checks = daymark_audit::quality::DailyChecks::new(pipeline, mode);
    // Each snapshot is published only while the output lock is still this build's.
    let staged_checks = daymark_runner::lock::LeaseCheck {
        guard,
        then: Some(&daily_checks),
    };
    if tiled && days.len() > 1 {
        // A backfill: every day from one set-based query over the tiles, or day by day
        // from pieces where that is cheaper (`build_days`).
        let mut done = 0usize;
        let result = daymark_engine::backfill::build_days(
            &ctx,
            pipeline,
            reports,
            &layouts,
            out,
            days,
            mode,
            Some(&staged_checks),
            |r| {
                done += 1;
                rows += r.rows;
                warnings += r.warnings.len();
                log_snapshot(&log, r, done, days.len());
                log.progress(done, days.len(), rows);
            },
        )
        .await;
        if let Err(e) = result {
            return report_build_error(&log, e);
        }
        // Roll up the weeks and months the next day's windows read now, so that the daily
        // build after this backfill reads a few dozen pieces. Months that only a longer
        // window would read are rolled up by the first build that needs them (they were
        // all rolled up here before: 13 months of plays where a 91-day window reads 2,
        // most of the roll-up time; docs/benchmarks.md, eleventh measurement).
        if let Err(why) = guard.held() {
            anyhow::bail!("{why}; roll-ups not built, stopped before writing more");
        }
        let t_roll = std::time::Instant::now();
        let next = days[days.len() - 1] + chrono::Duration::days(1);
        match daymark_engine::rollups::plan_day(&ctx, pipeline, reports, &layouts, out, next, mode)
            .await
        {
            Ok((stats, _)) => {
                let built: u64 = stats.values().map(|s| s.rollups_built).sum();
                let secs = t_roll.elapsed().as_secs_f64();
                log.event(
                    "rollups",
                    || format!("rolled up {built} week(s), month(s) and histories of tiles for the daily builds ({secs:.1} s)"),
                    json!({"rollups_built": built, "seconds": secs}),
                );
            }
            Err(e) => return report_build_error(&log, e),
        }
    } else {
        for (i, day) in days.iter().enumerate() {
            let query = match &plan {
                Some(p) => daymark_engine::tiles::tiled_snapshot_query(pipeline, &layouts, p, mode),
                None => snapshot_query(pipeline, *day, mode),
            };
            match daymark_engine::build::build_day_checked(
                &ctx,
                pipeline,
                out,
                *day,
                mode,
                &query.sql,
                plan.as_ref().map(|p| (&layouts, p)),
                Some(&staged_checks),
            )
            .await
            {
                Ok(r) => {
                    rows += r.rows;
                    warnings += r.warnings.len();
                    log_snapshot(&log, &r, i + 1, days.len());
                    log.progress(i + 1, days.len(), rows);
                }
                Err(e) => return report_build_error(&log, e),
            }
        }
    }
    let place = format!(
        "{}/{}",
        out.display().trim_end_matches('/'),
        daymark_engine::build::snapshots_dir(mode)
    );
    let secs = t0.elapsed().as_secs_f64();
    log.event(
        "done",
        || format!("built {} snapshot(s), {rows} rows, in {secs:.1} s ({warnings} warning(s)) into {place}", days.len()),
        json!({"snapshots": days.len(), "rows": rows, "seconds": secs, "warnings": warnings, "output": place}),
    );
    Ok(exit::OK)
}

/// Prints one published snapshot (a line, or a JSON event).
fn log_snapshot(
    log: &crate::report::Report,
    r: &daymark_engine::build::DayReport,
    n: usize,
    of: usize,
) {
    log.event(
        "snapshot",
        || {
            let mut line = format!(
                "[{n}/{of}] snapshot {}: {} rows, {} in {:.2} s",
                r.day,
                r.rows,
                human_bytes(r.bytes),
                r.seconds
            );
            for w in &r.warnings {
                line.push_str(&format!("\n    warning: {w}"));
            }
            line
        },
        json!({"day": r.day.to_string(), "rows": r.rows, "bytes": r.bytes, "seconds": r.seconds, "warnings": r.warnings, "queries": r.queries}),
    );
}

/// A failed build: failed checks exit with their own code, the rest is an error.
fn report_build_error(
    log: &crate::report::Report,
    e: daymark_engine::build::BuildError,
) -> Result<u8> {
    match e {
        daymark_engine::build::BuildError::ChecksFailed { day, failures } => {
            log.clear();
            eprintln!(
                "snapshot {day}: {} check(s) failed; nothing published for it:",
                failures.len()
            );
            for f in &failures {
                eprintln!("  {f}");
            }
            Ok(exit::CHECK_FAILED)
        }
        e => Err(memory_hint(e.into())),
    }
}

/// Arguments of `daymark generate`.
#[derive(clap::Args)]
pub struct GenerateArgs {
    /// Output folder (one sub-folder per source).
    #[arg(long)]
    out: PathBuf,
    /// Customers over the world's whole history.
    #[arg(long, default_value_t = 5000)]
    customers: u32,
    /// Days of activity logs.
    #[arg(long, default_value_t = 120)]
    days: u32,
    /// First day of activity logs (YYYY-MM-DD).
    #[arg(long, default_value = "2026-01-01")]
    start: String,
    /// Seed: the same arguments give byte-identical files.
    #[arg(long, default_value_t = 7)]
    seed: u64,
    /// Add malformed rows (null keys, negative durations, future timestamps) and one
    /// unreadable file, for error-handling tests.
    #[arg(long)]
    dirty: bool,
    /// Share of rows arriving 1 to 5 days late.
    #[arg(long, default_value_t = 0.02)]
    late_share: f64,
    /// Share of rows delivered twice.
    #[arg(long, default_value_t = 0.005)]
    duplicate_share: f64,
    /// Worker threads (0: one per core).
    #[arg(long, default_value_t = 0)]
    threads: usize,
}

/// Prints problems found with the data, one a line, after a count.
pub(crate) fn print_problems(problems: &[Diagnostic]) {
    eprintln!(
        "{} problem{}:",
        problems.len(),
        if problems.len() == 1 { "" } else { "s" }
    );
    for d in problems {
        eprintln!("  {d}");
    }
}

fn print_errors(e: &SpecErrors) {
    eprint!("{e}");
}

pub(crate) fn load(path: &Path) -> Result<Pipeline, u8> {
    daymark_spec::load_file(path).map_err(|e| {
        print_errors(&e);
        exit::INVALID
    })
}

pub(crate) fn human_bytes(n: u64) -> String {
    let units = ["B", "KiB", "MiB", "GiB", "TiB"];
    let mut x = n as f64;
    let mut u = 0;
    while x >= 1024.0 && u + 1 < units.len() {
        x /= 1024.0;
        u += 1;
    }
    if u == 0 {
        format!("{n} B")
    } else {
        format!("{x:.1} {}", units[u])
    }
}

/// Runs the checks that need the data; returns the reports and every problem. With
/// `footer_cache` (an output store), footers of files seen by an earlier run come from
/// the cache kept there.
pub(crate) async fn inspect(
    pipeline: &Pipeline,
    file: &Path,
    footer_cache: Option<&daymark_store::Location>,
) -> (
    BTreeMap<String, SourceReport>,
    Vec<Diagnostic>,
    daymark_engine::FeatureTypes,
) {
    let reports = inspect_sources_with(pipeline, footer_cache).await;
    let mut problems: Vec<Diagnostic> = reports.values().flat_map(|r| r.problems.clone()).collect();
    let (mut schema_problems, types) = check_against_schemas(pipeline, &schemas_of(&reports));
    problems.append(&mut schema_problems);
    if let Ok(text) = std::fs::read_to_string(file) {
        daymark_spec::locate(&mut problems, &text);
    }
    for d in &mut problems {
        d.file = Some(file.to_path_buf());
    }
    (reports, problems, types)
}

/// `daymark check`.
pub async fn check(path: &Path, as_json: bool) -> Result<u8> {
    let pipeline = match load(path) {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let (reports, problems, types) = inspect(&pipeline, path, None).await;
    let watermarks = daymark_labels::source_watermarks(&pipeline, &reports);
    if as_json {
        let sources: serde_json::Map<String, serde_json::Value> = reports
            .iter()
            .map(|(name, r)| {
                let src = &pipeline.sources[name];
                (
                    name.clone(),
                    json!({
                        "location": r.location.as_ref().map(|l| l.display()),
                        "partitions": r.range().map(|(a, b)| (b - a).num_days() + 1 - r.gaps(None, None).len() as i64).unwrap_or(0),
                        "first_day": r.range().map(|x| x.0.to_string()),
                        "last_day": r.range().map(|x| x.1.to_string()),
                        "missing_days": r.gaps(None, None).iter().map(|d| d.to_string()).collect::<Vec<_>>(),
                        "files": r.listing.files().count(),
                        "bytes": r.listing.bytes(),
                        "rows": r.rows,
                        "knowledge": src.knowledge.as_str(),
                        "watermark": watermarks.get(name).cloned().flatten().map(|w| w.to_json()),
                        "columns": r.schema.as_ref().map(|s| s.fields().iter().map(|f| json!({"name": f.name(), "type": f.data_type().to_string()})).collect::<Vec<_>>()),
                    }),
                )
            })
            .collect();
        let features = daymark_engine::build::describe_features(&pipeline, &types);
        let report = json!({
            "pipeline": pipeline.file.name,
            "hash": pipeline.hash,
            "timezone": pipeline.file.timezone,
            "cutoff_time": pipeline.file.cutoff_time,
            "sources": sources,
            "features": features,
            "problems": problems.iter().map(|d| json!({"line": d.line, "column": d.column, "path": d.path, "message": d.message})).collect::<Vec<_>>(),
        });
        println!("{}", serde_json::to_string_pretty(&report)?);
        return Ok(if problems.is_empty() {
            exit::OK
        } else {
            exit::INVALID
        });
    }

    println!("pipeline {} ({})", pipeline.file.name, path.display());
    println!("  hash {}", pipeline.hash);
    println!(
        "  days in {}, cutoff {} local time",
        pipeline.file.timezone, pipeline.file.cutoff_time
    );
    println!();
    println!("sources:");
    for (name, r) in &reports {
        let src = &pipeline.sources[name];
        println!(
            "  {name}: {}",
            r.location
                .as_ref()
                .map(|l| l.display())
                .unwrap_or_else(|| src.spec.location.clone())
        );
        match r.range() {
            Some((a, b)) => {
                let gaps = r.gaps(None, None);
                let gap_text = if gaps.is_empty() {
                    "no missing days".to_string()
                } else {
                    format!("{} missing day(s), first {}", gaps.len(), gaps[0])
                };
                println!(
                    "    {} day partitions {a} .. {b} ({gap_text}), {} files, {}, {} rows in footers",
                    (a - b).num_days().abs() + 1 - gaps.len() as i64,
                    r.listing.files().count(),
                    human_bytes(r.listing.bytes()),
                    r.rows
                );
            }
            None => println!("    no day partitions found"),
        }
        println!(
            "    key {}, event time {}, arrival time {}, knowledge {}, de-duplicated on [{}]",
            src.key,
            src.spec.event_time,
            src.spec.arrival_time.as_deref().unwrap_or("-"),
            src.knowledge.as_str(),
            src.spec.dedupe_on.join(", ")
        );
        match watermarks.get(name).cloned().flatten() {
            Some(w) => println!("    complete up to {}", w.describe()),
            None => println!("    complete up to: unknown (no day partitions)"),
        }
        if let Some(s) = &r.schema {
            let cols: Vec<String> = s
                .fields()
                .iter()
                .map(|f| format!("{} {}", f.name(), f.data_type()))
                .collect();
            println!("    columns: {}", cols.join(", "));
        }
        if !r.listing.ignored.is_empty() {
            println!(
                "    ignored (not in a day partition): {}",
                r.listing.ignored.len()
            );
        }
    }
    println!();
    match &pipeline.population {
        Population::State(s) => println!(
            "population: keys whose latest `{}` in {} is one of [{}] as of the cutoff",
            s.column,
            s.source,
            s.values.join(", ")
        ),
        Population::RecentActivity(a) => println!(
            "population: keys with an event in {} within {} before the cutoff{}",
            a.source,
            a.within,
            a.filter
                .as_ref()
                .map(|f| format!(" where {f}"))
                .unwrap_or_default()
        ),
    }
    println!();
    println!("features ({}):", pipeline.features.len());
    let width = pipeline
        .features
        .iter()
        .map(|f| f.name.len())
        .max()
        .unwrap_or(10);
    for f in &pipeline.features {
        let ty = types
            .get(&f.name)
            .map(|t| t.to_string())
            .unwrap_or_else(|| "?".into());
        let what = match &f.def {
            FeatureDef::Aggregate {
                source,
                agg,
                expr,
                filter,
                window,
            } => format!(
                "{}({}) over {window} of {source}{}",
                agg.as_str(),
                expr.as_deref().unwrap_or(""),
                filter
                    .as_ref()
                    .map(|f| format!(" where {f}"))
                    .unwrap_or_default()
            ),
            FeatureDef::Derived { op, left, right } => format!("{}({left}, {right})", op.as_str()),
        };
        println!("  {:width$}  {:8}  {what}", f.name, ty);
    }
    if let Some(l) = &pipeline.label {
        println!();
        println!(
            "label: {} from {}: `{}` within {}d after the cutoff, not followed within {}d by `{}`",
            l.name,
            l.source,
            l.ended,
            l.horizon.0,
            l.grace.0,
            l.resumed.as_deref().unwrap_or("(nothing)")
        );
    }
    println!();
    if problems.is_empty() {
        println!("ok: no problems found");
        Ok(exit::OK)
    } else {
        print_problems(&problems);
        Ok(exit::INVALID)
    }
}

/// `daymark explain`.
pub async fn explain(
    path: &Path,
    date: &str,
    knowledge: Option<&str>,
    plan: bool,
    brief: bool,
) -> Result<u8> {
    let day: NaiveDate = date
        .parse()
        .with_context(|| format!("`{date}` is not a date (YYYY-MM-DD)"))?;
    let mode = parse_mode(knowledge)?;
    let pipeline = match load(path) {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let q = snapshot_query(&pipeline, day, mode);
    println!("snapshot {day} of {}", pipeline.file.name);
    println!(
        "  cutoff {} ({} in {})",
        q.cutoff.format("%Y-%m-%dT%H:%M:%SZ"),
        pipeline.file.cutoff_time,
        pipeline.file.timezone
    );
    for (name, r) in &q.reads {
        println!(
            "  reads {name}: partitions {} .. {}, {}",
            r.first_day
                .map(|d| d.to_string())
                .unwrap_or_else(|| "(first)".into()),
            r.last_day,
            match r.knowledge {
                Knowledge::AsKnown => "as-known (event time and arrival time before the cutoff)",
                Knowledge::EventTime => "event-time (event time before the cutoff)",
            }
        );
    }
    if !brief {
        println!();
        println!("-- the snapshot as one SQL query (the naive path: raw events filtered for this cutoff)");
        println!("{};", q.sql);
    }
    if plan {
        let (reports, problems, _) = inspect(&pipeline, path, None).await;
        if !problems.is_empty() {
            print_problems(&problems);
            return Ok(exit::INVALID);
        }
        let ctx = daymark_engine::session::session(&Default::default())?;
        register_sources(&ctx, &pipeline, &reports).await?;
        let df = ctx
            .sql(&q.sql)
            .await
            .context("planning the snapshot query")?;
        let optimized = df
            .into_optimized_plan()
            .context("optimising the snapshot query")?;
        if brief {
            println!(
                "  DataFusion planned the snapshot query: {} plan lines",
                optimized.display_indent().to_string().lines().count()
            );
        } else {
            println!();
            println!("-- DataFusion's optimised logical plan");
            println!("{}", optimized.display_indent());
        }
    }
    Ok(exit::OK)
}

/// `daymark generate`.
pub fn generate(args: GenerateArgs) -> Result<u8> {
    let start = parse_day(&args.start)?;
    let mut cfg = WorldConfig::new(&args.out, args.customers, args.days);
    cfg.start = start;
    cfg.seed = args.seed;
    cfg.dirty = args.dirty;
    cfg.late_share = args.late_share;
    cfg.duplicate_share = args.duplicate_share;
    cfg.threads = args.threads;
    let t0 = std::time::Instant::now();
    let summary = generate_world(&cfg)?;
    let secs = t0.elapsed().as_secs_f64();
    let total: u64 = summary.sources.values().map(|s| s.rows).sum();
    for (name, s) in &summary.sources {
        println!(
            "{name}: {} rows in {} files ({} late, {} null keys, {} negative durations, {} future times)",
            s.rows, s.files, s.late_rows, s.null_key_rows, s.negative_duration_rows, s.future_time_rows
        );
    }
    for f in &summary.corrupt_files {
        println!("planted unreadable file: {f}");
    }
    println!(
        "wrote {total} rows to {} in {secs:.1} s ({:.0} rows/s)",
        args.out.display(),
        total as f64 / secs.max(1e-9)
    );
    Ok(exit::OK)
}

/// `daymark demo`.
pub async fn demo(dir: &Path, customers: u32, days: u32) -> Result<u8> {
    let world = dir.join("world");
    if world.join("world.json").exists() {
        println!("using the demo world in {}", world.display());
    } else {
        println!(
            "generating the demo world in {} ({customers} customers, {days} days)...",
            world.display()
        );
        let t0 = std::time::Instant::now();
        let cfg = WorldConfig::new(&world, customers, days);
        let summary = generate_world(&cfg)?;
        let rows: u64 = summary.sources.values().map(|s| s.rows).sum();
        println!("  {rows} rows in {:.1} s", t0.elapsed().as_secs_f64());
    }
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let pipeline_path = dir.join("pipeline.yaml");
    let text = DEMO_PIPELINE.replace("../demo-data/", "");
    std::fs::write(&pipeline_path, text)
        .with_context(|| format!("writing {}", pipeline_path.display()))?;
    println!();
    let code = check(&pipeline_path, false).await?;
    if code != exit::OK {
        return Ok(code);
    }
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(world.join("world.json"))?)?;
    let start: NaiveDate = manifest["start"].as_str().unwrap_or("2026-01-01").parse()?;
    let ndays = manifest["days"].as_i64().unwrap_or(days as i64);
    let last = start + chrono::Duration::days(ndays);
    println!();
    let code = explain(&pipeline_path, &last.to_string(), None, true, true).await?;
    if code != exit::OK {
        return Ok(code);
    }
    println!();
    let first = last - chrono::Duration::days(2);
    println!("building the last three snapshots ({first} .. {last})...");
    let code = build(BuildArgs {
        pipeline: pipeline_path.clone(),
        date: None,
        from: Some(first.to_string()),
        to: Some(last.to_string()),
        knowledge: None,
        out: None,
        memory_limit: None,
        allow_gaps: false,
        engine: "tiled".into(),
        log_format: "text".into(),
    })
    .await?;
    println!();
    println!("demo world: {}", world.display());
    println!("pipeline:   {}", pipeline_path.display());
    println!(
        "snapshots:  {}",
        dir.join("out").join("snapshots").display()
    );
    println!(
        "next: `daymark explain {} --date {last} --plan` shows how a day is computed.",
        pipeline_path.display()
    );
    Ok(code)
}
