//! `daymark run`: do what is due (new days, stale days), with exit codes for schedulers.

use crate::commands::{human_bytes, invalid, parse_day, parse_mode};
use crate::exit;
use crate::report::Report;
use anyhow::Result;
use daymark_runner::{Event, RunOptions, RunOutcome, RunnerError, Step, Summary};
use serde_json::json;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

/// Arguments shared by `run`, `status` and `watch`: which snapshots, where.
#[derive(clap::Args, Clone)]
pub struct Scope {
    /// The pipeline file.
    pub pipeline: PathBuf,
    /// First snapshot day to consider (default: the earliest day in the ledger, else the
    /// day after the latest first partition of the sources).
    #[arg(long)]
    pub from: Option<String>,
    /// Last snapshot day to consider (default: the latest day whose inputs have begun to land).
    #[arg(long)]
    pub until: Option<String>,
    /// Use one knowledge mode for every source: `as-known` or `event-time` (snapshots go to
    /// `snapshots-<mode>/`, with their own ledger state).
    #[arg(long)]
    pub knowledge: Option<String>,
    /// Output folder or URL (default: the pipeline's `output`, else `out` beside it).
    #[arg(long)]
    pub out: Option<String>,
}

/// Arguments of `daymark run`.
#[derive(clap::Args)]
pub struct RunArgs {
    #[command(flatten)]
    pub scope: Scope,
    /// Show what is due and exit without building (exit 0 when work is due).
    #[arg(long)]
    pub dry_run: bool,
    /// When another run holds the lock, wait for it instead of exiting with code 12.
    #[arg(long)]
    pub wait: bool,
    /// Lease of the output lock, renewed every third of it (e.g. `120s`, `5m`).
    #[arg(long, default_value = "120s")]
    pub lease: String,
    /// Memory limit for the engine, e.g. `2GiB`; larger work spills to disk.
    #[arg(long)]
    pub memory_limit: Option<String>,
    /// `text` (default) or `json`: one JSON object per line on stdout, for schedulers.
    #[arg(long, default_value = "text", value_parser = ["text", "json"])]
    pub log_format: String,
}

/// Parses `30s`, `5m`, `1h`, `250ms`.
pub fn parse_duration(text: &str) -> Result<Duration> {
    let t = text.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let n: u64 = num
        .parse()
        .map_err(|_| invalid(format!("`{text}` is not a duration such as `30s` or `5m`")))?;
    let d = match unit {
        "ms" => Duration::from_millis(n),
        "s" | "" => Duration::from_secs(n),
        "m" => Duration::from_secs(n * 60),
        "h" => Duration::from_secs(n * 3600),
        _ => {
            return Err(invalid(format!(
                "`{text}` has an unknown unit: use ms, s, m or h"
            )))
        }
    };
    if d.is_zero() {
        return Err(invalid(format!("`{text}` is not a positive duration")));
    }
    Ok(d)
}

/// The runner's options from the command line.
pub fn options(scope: &Scope, command: &str) -> Result<RunOptions> {
    let from = scope.from.as_deref().map(parse_day).transpose()?;
    let until = scope.until.as_deref().map(parse_day).transpose()?;
    if let (Some(a), Some(b)) = (from, until) {
        if b < a {
            return Err(invalid(format!("--until {b} is before --from {a}")));
        }
    }
    Ok(RunOptions {
        pipeline: scope.pipeline.clone(),
        out: scope.out.clone(),
        mode: parse_mode(scope.knowledge.as_deref())?,
        from,
        until,
        memory_limit: None,
        dry_run: false,
        wait: false,
        lease: Duration::from_secs(120),
        command: command.into(),
    })
}

/// Turns a runner error into the CLI's error (invalid input exits 2).
pub fn cli_error(e: RunnerError) -> anyhow::Error {
    match e {
        RunnerError::Invalid(m) => invalid(m),
        other => other.into(),
    }
}

/// Prints one runner event through `log`.
pub fn print_event(log: &Report, e: Event) {
    match e {
        Event::Planned(plan) => {
            let c = plan.counts();
            let n = |k: &str| c.get(k).copied().unwrap_or(0);
            log.event(
                "plan",
                || {
                    format!(
                        "plan: {} snapshot day(s) {} .. {} ({}): {} new, {} stale, {} failed before, {} pending, {} built",
                        plan.days.len(),
                        plan.from.map(|d| d.to_string()).unwrap_or_else(|| "-".into()),
                        plan.until.map(|d| d.to_string()).unwrap_or_else(|| "-".into()),
                        plan.scope,
                        n("new"),
                        n("stale"),
                        n("failed"),
                        n("pending"),
                        n("built")
                    )
                },
                json!({"scope": plan.scope, "from": plan.from.map(|d| d.to_string()), "until": plan.until.map(|d| d.to_string()), "counts": c, "due": plan.snapshot_days().iter().map(|d| d.to_string()).collect::<Vec<_>>()}),
            );
        }
        Event::WaitingForLock(info) => log.event(
            "lock_wait",
            || format!("waiting for the output lock held by {}", info.describe()),
            json!({"holder": info}),
        ),
        Event::LockTakenOver(m) => log.event("lock_takeover", || m.to_string(), json!({"message": m})),
        Event::StagingCleaned(n) => log.event(
            "staging_cleaned",
            || format!("removed {n} staging file(s) left by an interrupted run"),
            json!({"files": n}),
        ),
        Event::Tiles { source, stats } => log.event(
            "tiles",
            || {
                format!(
                    "tiles {source}: {} partition(s) built from {} raw file(s) ({}), {} reused",
                    stats.partitions_built,
                    stats.raw_files,
                    human_bytes(stats.raw_bytes),
                    stats.partitions_reused
                )
            },
            json!({"source": source, "partitions_built": stats.partitions_built, "partitions_reused": stats.partitions_reused, "raw_files": stats.raw_files, "raw_bytes": stats.raw_bytes}),
        ),
        Event::Snapshot {
            index,
            total,
            report,
            why,
        } => {
            log.event(
                "snapshot",
                || {
                    let mut line = format!(
                        "[{index}/{total}] snapshot {}: {} rows, {} in {:.2} s ({why})",
                        report.day,
                        report.rows,
                        human_bytes(report.bytes),
                        report.seconds
                    );
                    for w in &report.warnings {
                        line.push_str(&format!("\n    warning: {w}"));
                    }
                    line
                },
                json!({"day": report.day.to_string(), "rows": report.rows, "bytes": report.bytes, "seconds": report.seconds, "why": why, "warnings": report.warnings}),
            );
            log.progress(index, total, 0);
        }
        Event::ChecksFailed { day, failures } => log.event(
            "checks_failed",
            || {
                format!(
                    "snapshot {day}: {} check(s) failed, nothing published:\n  {}",
                    failures.len(),
                    failures.join("\n  ")
                )
            },
            json!({"day": day.to_string(), "failures": failures}),
        ),
        Event::Skipped { step, reason } => log.event(
            "skipped",
            || format!("{step}: skipped: {reason}"),
            json!({"step": step, "reason": reason}),
        ),
        Event::Labels {
            written,
            rows,
            pending,
        } => log.event(
            "labels",
            || format!("labels: {written} day(s) written ({rows} rows); {pending} built day(s) not matured yet"),
            json!({"written": written, "rows": rows, "pending": pending}),
        ),
        Event::Stopping => log.event(
            "stopping",
            || "stop requested: stopping after the current step".to_string(),
            json!({}),
        ),
    }
}

/// The exit code of a run, after printing its summary.
pub fn finish(log: &Report, s: &Summary, dry_run: bool) -> u8 {
    let rows: u64 = s.published.iter().map(|p| p.1).sum();
    let pending: Vec<String> = s
        .plan
        .as_ref()
        .map(|p| {
            p.days
                .iter()
                .filter(|d| d.state.name() == "pending")
                .map(|d| format!("{} ({})", d.day, d.state.reasons().join("; ")))
                .collect()
        })
        .unwrap_or_default();
    let (code, event, text) = match &s.outcome {
        RunOutcome::Done if dry_run => {
            let steps = s.plan.as_ref().map(|p| p.steps.clone()).unwrap_or_default();
            let mut t = String::from("dry run: would do");
            for st in &steps {
                match st {
                    Step::Snapshot { day, why } => {
                        t.push_str(&format!("\n  snapshot {day}: {why}"))
                    }
                    Step::Labels { days } => t.push_str(&format!(
                        "\n  labels of {} matured day(s) (not available in this build)",
                        days.len()
                    )),
                }
            }
            (exit::OK, "dry_run", t)
        }
        RunOutcome::Done => (
            exit::OK,
            "done",
            format!(
                "done: published {} snapshot(s), {rows} rows, in {:.1} s{}",
                s.published.len(),
                s.seconds,
                if pending.is_empty() {
                    String::new()
                } else {
                    format!("; {} day(s) still waiting for inputs", pending.len())
                }
            ),
        ),
        RunOutcome::NothingDue => (
            exit::NOTHING_DUE,
            "nothing_due",
            match &s.plan {
                Some(p) if !p.days.is_empty() => format!(
                    "nothing due: the {} snapshot day(s) {} .. {} are built and current",
                    p.days.len(),
                    p.from.map(|d| d.to_string()).unwrap_or_default(),
                    p.until.map(|d| d.to_string()).unwrap_or_default()
                ),
                _ => "nothing due: no snapshot day has inputs yet".to_string(),
            },
        ),
        RunOutcome::Waiting => (
            exit::WAITING,
            "waiting",
            format!(
                "waiting for inputs: nothing could be built; {} day(s) pending:\n  {}",
                pending.len(),
                pending.join("\n  ")
            ),
        ),
        RunOutcome::LockHeld(info) => (
            exit::LOCK_HELD,
            "lock_held",
            format!(
                "another run holds the output lock: {}; nothing done (use --wait to wait for it)",
                info.describe()
            ),
        ),
        RunOutcome::ChecksFailed => (
            exit::CHECK_FAILED,
            "checks_failed",
            format!(
                "checks failed for {} day(s): {}; published {} other snapshot(s)",
                s.checks_failed.len(),
                s.checks_failed
                    .iter()
                    .map(|d| d.to_string())
                    .collect::<Vec<_>>()
                    .join(", "),
                s.published.len()
            ),
        ),
        RunOutcome::Stopped => (
            exit::FAILED,
            "stopped",
            format!(
                "stopped on request after publishing {} snapshot(s); the next run continues",
                s.published.len()
            ),
        ),
    };
    log.clear();
    log.event(
        event,
        || text.clone(),
        json!({"exit_code": code, "published": s.published.iter().map(|p| p.0.to_string()).collect::<Vec<_>>(), "rows": rows, "seconds": s.seconds, "pending": pending, "checks_failed": s.checks_failed.iter().map(|d| d.to_string()).collect::<Vec<_>>()}),
    );
    code
}

/// Sets `stop` on SIGTERM or SIGINT; a second signal ends the process at once (published
/// outputs stay whole; staging is cleaned by the next run).
pub fn stop_on_signals(stop: Arc<AtomicBool>) {
    tokio::spawn(async move {
        #[cfg(unix)]
        let mut term =
            match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
                Ok(s) => s,
                Err(_) => return,
            };
        for n in 0..2 {
            #[cfg(unix)]
            tokio::select! {
                _ = term.recv() => {}
                _ = tokio::signal::ctrl_c() => {}
            }
            #[cfg(not(unix))]
            let _ = tokio::signal::ctrl_c().await;
            if n == 0 {
                stop.store(true, Ordering::SeqCst);
            } else {
                eprintln!("second stop signal: abandoning the current step");
                std::process::exit(exit::FAILED as i32);
            }
        }
    });
}

/// `daymark run`.
pub async fn run(args: RunArgs) -> Result<u8> {
    let mut opts = options(&args.scope, "run")?;
    opts.dry_run = args.dry_run;
    opts.wait = args.wait;
    opts.lease = parse_duration(&args.lease)?;
    if let Some(text) = &args.memory_limit {
        opts.memory_limit = Some(daymark_engine::session::parse_size(text).map_err(invalid)?);
    }
    let log = Report::new(&args.log_format);
    let stop = Arc::new(AtomicBool::new(false));
    stop_on_signals(stop.clone());
    let on = |e: Event| print_event(&log, e);
    let summary = daymark_runner::run_once(&opts, &on, &stop)
        .await
        .map_err(cli_error)?;
    Ok(finish(&log, &summary, args.dry_run))
}
