//! One run: lock the output, clean up after killed runs, work out what is due, do it with
//! the engine, and record every build in the ledger.
//!
//! Crash safety: every output file is written to `<out>/_staging/` and published by one
//! rename (one object; a copy then delete on object stores without rename), so a reader sees
//! a whole snapshot or none. The ledger entry is written after the publish: a run killed in
//! between leaves a published snapshot without an entry, which the next run rebuilds to the
//! same content. Staging left by a killed run is removed by the next run that holds the lock.

use crate::ledger::{self, Entry, Kind, Outcome, RunIdentity};
use crate::lock::{self, Acquire, LockGuard, LockInfo};
use crate::plan::{self, Plan, Step};
use crate::RunnerError;
use chrono::NaiveDate;
use daymark_engine::build::{child, snapshots_dir, BuildError, DayReport};
use daymark_engine::sql::KnowledgeOverride;
use daymark_engine::tiles::TileStats;
use daymark_spec::Pipeline;
use daymark_store::object_store::ObjectStoreExt;
use daymark_store::{Listing, Location};
use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

/// Most consecutive snapshot days built together in a run (one set-based query where the
/// pipeline takes it): long enough that the per-query cost is shared, short enough that a
/// stop or a lost lock is seen within minutes.
const DAYS_PER_RANGE: usize = 31;

/// What to run.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// The pipeline file (read again by every run, so a watch picks up edits).
    pub pipeline: PathBuf,
    /// Output folder or URL (default: the pipeline's `output`, else `out` beside it).
    pub out: Option<String>,
    /// Forced knowledge mode (`None`: each source's own).
    pub mode: KnowledgeOverride,
    /// First snapshot day considered.
    pub from: Option<NaiveDate>,
    /// Last snapshot day considered.
    pub until: Option<NaiveDate>,
    /// Engine memory limit in bytes.
    pub memory_limit: Option<usize>,
    /// Plan only.
    pub dry_run: bool,
    /// Wait for the lock instead of giving up.
    pub wait: bool,
    /// Lease of the lock (renewed every third of it).
    pub lease: Duration,
    /// `run` or `watch`, written into the lock.
    pub command: String,
}

/// What a run tells the person or scheduler watching it, as it happens.
#[derive(Debug)]
pub enum Event<'a> {
    /// The plan was made.
    Planned(&'a Plan),
    /// Another run holds the lock and `--wait` was given.
    WaitingForLock(&'a LockInfo),
    /// An expired or orphaned lock was taken over.
    LockTakenOver(&'a str),
    /// Files left in staging by a killed run were removed.
    StagingCleaned(usize),
    /// Tiles of one source are current.
    Tiles {
        /// The source.
        source: &'a str,
        /// What it cost.
        stats: &'a TileStats,
    },
    /// A snapshot was published.
    Snapshot {
        /// 1-based position among this run's snapshot steps.
        index: usize,
        /// Number of snapshot steps.
        total: usize,
        /// What the engine did.
        report: &'a DayReport,
        /// Why it was due.
        why: &'a str,
    },
    /// A snapshot failed a check set to fail; nothing was published for it.
    ChecksFailed {
        /// The day.
        day: NaiveDate,
        /// One line per failed check.
        failures: &'a [String],
    },
    /// A step was skipped.
    Skipped {
        /// The step.
        step: &'a str,
        /// Why.
        reason: String,
    },
    /// Labels of matured snapshot days were back-filled.
    Labels {
        /// Label files written by this run.
        written: usize,
        /// Label rows written.
        rows: u64,
        /// Built snapshot days whose labels have not matured yet.
        pending: usize,
    },
    /// A stop was asked for; the run stops after the current step.
    Stopping,
}

/// How a run ended (the CLI maps it to an exit code).
#[derive(Debug, Clone, PartialEq)]
pub enum RunOutcome {
    /// Work was done.
    Done,
    /// Nothing was due.
    NothingDue,
    /// Nothing could be done: inputs are not complete yet.
    Waiting,
    /// Another run holds the lock.
    LockHeld(LockInfo),
    /// At least one snapshot failed a check set to fail (others may have been published).
    ChecksFailed,
    /// Stopped on request before all due work was done (what was done is published).
    Stopped,
}

/// The result of a run.
#[derive(Debug, Clone)]
pub struct Summary {
    /// How it ended.
    pub outcome: RunOutcome,
    /// The plan it followed (None when it never got to plan).
    pub plan: Option<Plan>,
    /// Snapshots published: day and rows.
    pub published: Vec<(NaiveDate, u64)>,
    /// Days that failed a check set to fail.
    pub checks_failed: Vec<NaiveDate>,
    /// Wall-clock seconds.
    pub seconds: f64,
}

/// Reads and validates the pipeline file.
pub fn load_pipeline(path: &Path) -> Result<Pipeline, RunnerError> {
    daymark_spec::load_file(path).map_err(|e| RunnerError::Invalid(e.to_string()))
}

/// The output location of a run.
pub fn output_location(pipeline: &Pipeline, out: Option<&str>) -> Result<Location, RunnerError> {
    let text = out
        .map(str::to_string)
        .or_else(|| pipeline.file.output.clone())
        .unwrap_or_else(|| "out".to_string());
    let base = if out.is_some() {
        None
    } else {
        pipeline.base_dir.as_deref()
    };
    daymark_store::resolve(&text, base).map_err(|e| RunnerError::Invalid(e.to_string()))
}

/// What the planner looks at: the sources' listings, the latest ledger entry of each day
/// and the days whose snapshot file exists.
pub struct Observed {
    /// Listings of every source.
    pub listings: BTreeMap<String, Listing>,
    /// Latest snapshot ledger entry per day, for this knowledge scope.
    pub latest: BTreeMap<NaiveDate, Entry>,
    /// Days whose snapshot file exists.
    pub published: BTreeSet<NaiveDate>,
}

/// Lists the sources, the ledger and the published snapshots (no Parquet footers read).
pub async fn observe(
    pipeline: &Pipeline,
    out: &Location,
    mode: KnowledgeOverride,
) -> Result<Observed, RunnerError> {
    let mut listings = BTreeMap::new();
    for (name, src) in &pipeline.sources {
        let loc = daymark_store::resolve(&src.spec.location, pipeline.base_dir.as_deref())
            .map_err(|e| RunnerError::Invalid(format!("sources.{name}.location: {e}")))?;
        let listing = daymark_store::list_days(&loc, &src.spec.day_partition)
            .await
            .map_err(|e| RunnerError::Invalid(format!("sources.{name}: {e}")))?;
        listings.insert(name.clone(), listing);
    }
    let scope = plan::scope_of(mode);
    let latest = ledger::latest(out, Kind::Snapshot)
        .await?
        .into_iter()
        .filter(|((_, s), _)| s == scope)
        .map(|((d, _), e)| (d, e))
        .collect();
    let dir = child(&out.prefix, &[snapshots_dir(mode)]);
    let files = ledger::list_all(out, &dir).await?;
    let skip = dir.parts().count();
    let published = files
        .iter()
        .filter_map(|m| {
            let parts: Vec<String> = m
                .location
                .parts()
                .skip(skip)
                .map(|p| p.as_ref().to_string())
                .collect();
            match parts.as_slice() {
                [folder, name] if name == "part-0.parquet" => {
                    folder.strip_prefix("dt=")?.parse::<NaiveDate>().ok()
                }
                _ => None,
            }
        })
        .collect();
    Ok(Observed {
        listings,
        latest,
        published,
    })
}

/// Makes the plan for `opts` without taking the lock (what `status` and `--dry-run` show).
pub async fn make_plan(pipeline: &Pipeline, opts: &RunOptions) -> Result<Plan, RunnerError> {
    let out = output_location(pipeline, opts.out.as_deref())?;
    let seen = observe(pipeline, &out, opts.mode).await?;
    let mut plan = plan::plan(
        pipeline,
        &seen.listings,
        &seen.latest,
        &seen.published,
        opts.mode,
        opts.from,
        opts.until,
        true,
    );
    // Matured days are due for labels only when their label file is missing or older than
    // the snapshot (or the snapshot is about to be rebuilt): re-runs do nothing.
    if plan.steps.iter().any(|s| matches!(s, Step::Labels { .. })) {
        let store_err = |e: daymark_labels::LabelError| RunnerError::Store {
            path: out.display(),
            reason: e.to_string(),
        };
        let snapshots = daymark_labels::list_partitions(&out, snapshots_dir(opts.mode))
            .await
            .map_err(store_err)?;
        let labels = daymark_labels::list_partitions(&out, daymark_labels::labels_dir(opts.mode))
            .await
            .map_err(store_err)?;
        let rebuilt: BTreeSet<NaiveDate> = plan.snapshot_days().into_iter().collect();
        for step in plan.steps.iter_mut() {
            if let Step::Labels { days } = step {
                days.retain(|d| {
                    rebuilt.contains(d)
                        || match (snapshots.get(d), labels.get(d)) {
                            (Some(s), Some(l)) => l.last_modified < s.last_modified,
                            (Some(_), None) => true,
                            (None, _) => false,
                        }
                });
            }
        }
        plan.steps
            .retain(|s| !matches!(s, Step::Labels { days } if days.is_empty()));
    }
    Ok(plan)
}

/// Snapshot days whose labels are due in `plan`.
fn labels_due(plan: &Plan) -> usize {
    plan.steps
        .iter()
        .map(|s| match s {
            Step::Labels { days } => days.len(),
            _ => 0,
        })
        .sum()
}

/// Removes everything in `<out>/_staging/`: files of runs that were killed. Only called
/// with the lock held, when no other writer can be using staging.
pub async fn clean_staging(out: &Location) -> Result<usize, RunnerError> {
    let dir = child(&out.prefix, &["_staging"]);
    let mut removed = 0;
    if let Some(local) = &out.local_dir {
        // The local store hides its own half-written temporary files (`name#N`) from
        // listings, so a local output is cleaned through the file system.
        let path = local.join("_staging");
        if let Ok(entries) = std::fs::read_dir(&path) {
            for e in entries.flatten() {
                if std::fs::remove_file(e.path()).is_ok() {
                    removed += 1;
                }
            }
        }
        return Ok(removed);
    }
    let files = ledger::list_all(out, &dir).await?;
    for m in files {
        if out.store.delete(&m.location).await.is_ok() {
            removed += 1;
        }
    }
    Ok(removed)
}

fn outcome_of_plan(plan: &Plan) -> RunOutcome {
    if !plan.snapshot_days().is_empty() || labels_due(plan) > 0 {
        RunOutcome::Done
    } else if plan.pending() > 0 {
        RunOutcome::Waiting
    } else {
        RunOutcome::NothingDue
    }
}

/// One run: plan; if work is due, take the lock (or report who holds it), clean staging,
/// plan again under the lock and do the steps in order. `stop` is checked between steps.
pub async fn run_once(
    opts: &RunOptions,
    on: &(dyn Fn(Event) + Sync),
    stop: &AtomicBool,
) -> Result<Summary, RunnerError> {
    let t0 = Instant::now();
    let summary = |outcome, plan| Summary {
        outcome,
        plan,
        published: vec![],
        checks_failed: vec![],
        seconds: t0.elapsed().as_secs_f64(),
    };
    let pipeline = load_pipeline(&opts.pipeline)?;
    let out = output_location(&pipeline, opts.out.as_deref())?;
    let first = make_plan(&pipeline, opts).await?;
    if opts.dry_run || (first.snapshot_days().is_empty() && labels_due(&first) == 0) {
        on(Event::Planned(&first));
        let outcome = outcome_of_plan(&first);
        let outcome = if opts.dry_run || outcome != RunOutcome::Done {
            outcome
        } else {
            RunOutcome::NothingDue
        };
        return Ok(summary(outcome, Some(first)));
    }
    let me = RunIdentity::current();
    let guard = loop {
        match lock::acquire(&out, &me, &opts.command, opts.lease).await? {
            Acquire::Acquired(g, note) => {
                if let Some(n) = note {
                    on(Event::LockTakenOver(&n));
                }
                break *g;
            }
            Acquire::Held(info) => {
                if !opts.wait {
                    return Ok(summary(RunOutcome::LockHeld(info), Some(first)));
                }
                on(Event::WaitingForLock(&info));
                tokio::time::sleep(Duration::from_secs(2)).await;
                if stop.load(Ordering::SeqCst) {
                    return Ok(summary(RunOutcome::Stopped, Some(first)));
                }
            }
        }
    };
    let result = locked(&pipeline, &out, opts, &me, &guard, on, stop, t0).await;
    let released = guard.release().await;
    let s = result?;
    released?;
    Ok(s)
}

#[allow(clippy::too_many_arguments)]
async fn locked(
    pipeline: &Pipeline,
    out: &Location,
    opts: &RunOptions,
    me: &RunIdentity,
    guard: &LockGuard,
    on: &(dyn Fn(Event) + Sync),
    stop: &AtomicBool,
    t0: Instant,
) -> Result<Summary, RunnerError> {
    let cleaned = clean_staging(out).await?;
    if cleaned > 0 {
        on(Event::StagingCleaned(cleaned));
    }
    // Plan again: another run may have finished the work while we waited for the lock.
    let plan = make_plan(pipeline, opts).await?;
    on(Event::Planned(&plan));
    let days = plan.snapshot_days();
    let mut summary = Summary {
        outcome: outcome_of_plan(&plan),
        plan: None,
        published: vec![],
        checks_failed: vec![],
        seconds: 0.0,
    };
    if !days.is_empty() {
        build_days(
            pipeline,
            out,
            opts,
            me,
            guard,
            on,
            stop,
            &plan,
            &mut summary,
        )
        .await?;
    }
    let stopped = summary.outcome == RunOutcome::Stopped;
    if labels_due(&plan) > 0 && !stopped {
        guard.ensure_held()?;
        back_fill_labels(pipeline, out, opts, me, on).await?;
        if days.is_empty() {
            summary.outcome = RunOutcome::Done;
        }
    }
    summary.plan = Some(plan);
    summary.seconds = t0.elapsed().as_secs_f64();
    Ok(summary)
}

#[allow(clippy::too_many_arguments)]
async fn build_days(
    pipeline: &Pipeline,
    out: &Location,
    opts: &RunOptions,
    me: &RunIdentity,
    guard: &LockGuard,
    on: &(dyn Fn(Event) + Sync),
    stop: &AtomicBool,
    plan: &Plan,
    summary: &mut Summary,
) -> Result<(), RunnerError> {
    let days = plan.snapshot_days();
    let reports = daymark_engine::inspect_sources_with(pipeline, Some(out)).await;
    let mut problems: Vec<String> = reports
        .values()
        .flat_map(|r| r.problems.iter().map(|d| d.to_string()))
        .collect();
    let (schema_problems, types) =
        daymark_engine::check_against_schemas(pipeline, &daymark_engine::schemas_of(&reports));
    problems.extend(schema_problems.iter().map(|d| d.to_string()));
    if !problems.is_empty() {
        return Err(RunnerError::Invalid(format!(
            "{} problem(s) in {}:\n  {}",
            problems.len(),
            opts.pipeline.display(),
            problems.join("\n  ")
        )));
    }
    let listings: BTreeMap<String, Listing> = reports
        .iter()
        .map(|(k, r)| (k.clone(), r.listing.clone()))
        .collect();
    let ctx = daymark_engine::session::session(&daymark_engine::session::EngineOptions {
        memory_limit: opts.memory_limit,
        target_partitions: None,
        ..Default::default()
    })?;
    daymark_engine::register_sources(&ctx, pipeline, &reports).await?;
    daymark_engine::build::write_dictionary(pipeline, &types, out, opts.mode).await?;
    let layouts = daymark_engine::tiles::layouts(pipeline);
    let prepare =
        daymark_engine::tiles::prepare(&ctx, pipeline, &reports, &layouts, out, &days, opts.mode);
    // Tiles are published one partition at a time, each with its fingerprint written last:
    // abandoning this step on a stop leaves only staging files, cleaned by the next run.
    let stats = tokio::select! {
        r = prepare => r?,
        _ = wait_for(stop) => {
            on(Event::Stopping);
            summary.outcome = RunOutcome::Stopped;
            return Ok(());
        }
    };
    for (source, s) in &stats {
        on(Event::Tiles { source, stats: s });
    }
    record_tiles(pipeline, out, &listings, &layouts, &days, opts.mode, me).await?;
    let whys: BTreeMap<NaiveDate, &str> = plan
        .steps
        .iter()
        .filter_map(|s| match s {
            Step::Snapshot { day, why } => Some((*day, why.as_str())),
            _ => None,
        })
        .collect();
    let scope = plan::scope_of(opts.mode);
    // Population change and drift checks on every snapshot, as `daymark build` runs them.
    let checks = daymark_audit::quality::DailyChecks::new(pipeline, opts.mode);
    // Each snapshot is published only while the lock is still ours.
    let checks = crate::lock::LeaseCheck {
        guard,
        then: Some(&checks),
    };
    // Consecutive days are built together (as `daymark build` builds a range), in runs
    // short enough that a stop or a lost lock is noticed soon.
    let new_entry = |day: NaiveDate| {
        let mut entry = Entry::new(Kind::Snapshot, day, scope, pipeline, me);
        entry.inputs = plan::inputs_of(pipeline, &listings, day, opts.mode);
        entry.finished = chrono::Utc::now().to_rfc3339();
        entry
    };
    let sources = &reports;
    let mut next = 0;
    while next < days.len() {
        if stop.load(Ordering::SeqCst) {
            on(Event::Stopping);
            summary.outcome = RunOutcome::Stopped;
            return Ok(());
        }
        guard.ensure_held()?;
        let mut end = next + 1;
        while end < days.len()
            && end - next < DAYS_PER_RANGE
            && days[end].pred_opt() == Some(days[end - 1])
        {
            end += 1;
        }
        let run = &days[next..end];
        let mut reports: Vec<DayReport> = Vec::new();
        let mut on_day = |r: &DayReport| {
            on(Event::Snapshot {
                index: next + reports.len() + 1,
                total: days.len(),
                report: r,
                why: whys.get(&r.day).copied().unwrap_or(""),
            });
            reports.push(r.clone());
        };
        // One day reads its pieces (tiles at its windows' edges, roll-ups between); a run
        // of days is one set-based query where that is cheaper (`build_days`).
        let result = daymark_engine::backfill::build_days(
            &ctx,
            pipeline,
            sources,
            &layouts,
            out,
            run,
            opts.mode,
            Some(&checks),
            &mut on_day,
        )
        .await
        .map(|_| ());
        // Ledger entries of the days published, in order.
        for report in &reports {
            let mut entry = new_entry(report.day);
            entry.rows = report.rows;
            entry.bytes = report.bytes;
            entry.seconds = report.seconds;
            entry.messages = report.warnings.clone();
            entry.output = Some(format!(
                "{}/dt={}/part-0.parquet",
                snapshots_dir(opts.mode),
                report.day
            ));
            ledger::write(out, &entry).await?;
            summary.published.push((report.day, report.rows));
        }
        next += reports.len();
        match result {
            Ok(()) => {}
            Err(BuildError::ChecksFailed { day, failures }) => {
                let mut entry = new_entry(day);
                entry.outcome = Outcome::ChecksFailed;
                entry.messages = failures.clone();
                ledger::write(out, &entry).await?;
                summary.checks_failed.push(day);
                on(Event::ChecksFailed {
                    day,
                    failures: &failures,
                });
                // The days after it are built by the next run of consecutive days.
                next = days.iter().position(|d| *d == day).map_or(end, |p| p + 1);
            }
            Err(e) => {
                // Another run may own the output now: write nothing more to it.
                guard.ensure_held()?;
                // `next` is the first day of the run that was not published.
                let mut entry = new_entry(days[next]);
                entry.outcome = Outcome::Failed;
                entry.messages = vec![e.to_string()];
                let _ = ledger::write(out, &entry).await;
                return Err(e.into());
            }
        }
    }
    summary.outcome = if summary.checks_failed.is_empty() {
        RunOutcome::Done
    } else {
        RunOutcome::ChecksFailed
    };
    Ok(())
}

/// Back-fills the labels of every built snapshot whose label window has closed (the
/// labels crate decides maturity from the sources' watermarks and skips files that are
/// current), with a `labels` ledger entry per file written.
async fn back_fill_labels(
    pipeline: &Pipeline,
    out: &Location,
    opts: &RunOptions,
    me: &RunIdentity,
    on: &(dyn Fn(Event) + Sync),
) -> Result<(), RunnerError> {
    let reports = daymark_engine::inspect_sources_with(pipeline, Some(out)).await;
    let ctx = daymark_engine::session::session(&daymark_engine::session::EngineOptions {
        memory_limit: opts.memory_limit,
        target_partitions: None,
        ..Default::default()
    })?;
    daymark_engine::register_sources(&ctx, pipeline, &reports).await?;
    let watermarks = daymark_labels::source_watermarks(pipeline, &reports);
    let result = daymark_labels::backfill(&ctx, pipeline, &watermarks, out, opts.mode, opts.until)
        .await
        .map_err(|e| RunnerError::Store {
            path: out.display(),
            reason: e.to_string(),
        })?;
    let scope = plan::scope_of(opts.mode);
    let (mut written, mut rows) = (0, 0);
    for d in result.labeled.iter().filter(|d| d.written) {
        let mut entry = Entry::new(Kind::Labels, d.day, scope, pipeline, me);
        entry.rows = d.rows;
        entry.finished = chrono::Utc::now().to_rfc3339();
        entry.output = Some(format!(
            "{}/dt={}/part-0.parquet",
            daymark_labels::labels_dir(opts.mode),
            d.day
        ));
        ledger::write(out, &entry).await?;
        written += 1;
        rows += d.rows;
    }
    on(Event::Labels {
        written,
        rows,
        pending: result.pending.len(),
    });
    Ok(())
}

/// Writes a `tiles` ledger entry for every tile partition the snapshots of `days` read
/// whose raw files (or layout) differ from its latest entry: the tile was built from them.
async fn record_tiles(
    pipeline: &Pipeline,
    out: &Location,
    listings: &BTreeMap<String, Listing>,
    layouts: &BTreeMap<String, daymark_engine::tiles::TileLayout>,
    days: &[NaiveDate],
    mode: KnowledgeOverride,
    me: &RunIdentity,
) -> Result<(), RunnerError> {
    let latest = ledger::latest(out, Kind::Tiles).await?;
    let mut needed: BTreeMap<&str, BTreeSet<NaiveDate>> = BTreeMap::new();
    for day in days {
        for (source, read) in daymark_engine::snapshot_query(pipeline, *day, mode).reads {
            let (Some(listing), Some((name, _))) =
                (listings.get(&source), layouts.get_key_value(&source))
            else {
                continue;
            };
            let set = needed.entry(name.as_str()).or_default();
            for d in listing.days.keys() {
                if read.first_day.is_none_or(|f| *d >= f) && *d <= read.last_day {
                    set.insert(*d);
                }
            }
        }
    }
    for (source, set) in needed {
        let layout = &layouts[source];
        let listing = &listings[source];
        for d in set {
            let rel = format!("tiles/{source}/{}/dt={d}/part-0.parquet", layout.hash);
            let files = ledger::fingerprint_range(listing, Some(d), d);
            let current = latest.get(&(d, source.to_string())).is_some_and(|e| {
                e.output.as_deref() == Some(rel.as_str())
                    && e.inputs.get(source).map(|i| &i.partitions) == Some(&files)
            });
            if current {
                continue;
            }
            let path = child(&layout.dir(out), &[&format!("dt={d}"), "part-0.parquet"]);
            let Ok(meta) = out.store.head(&path).await else {
                continue; // no tile (the partition was not needed after all)
            };
            let file = daymark_store::DataFile {
                path: meta.location.clone(),
                size: meta.size,
                modified: meta.last_modified,
                etag: meta.e_tag.clone(),
            };
            let rows = daymark_store::read_footer(out, &file)
                .await
                .map(|f| f.rows)
                .unwrap_or(0);
            let mut entry = Entry::new(Kind::Tiles, d, source, pipeline, me);
            entry.inputs.insert(
                source.to_string(),
                ledger::SourceInputs {
                    knowledge: "all".into(),
                    first_day: Some(d.to_string()),
                    last_day: d.to_string(),
                    partitions: files,
                },
            );
            entry.rows = rows;
            entry.bytes = meta.size;
            entry.output = Some(rel);
            ledger::write(out, &entry).await?;
        }
    }
    Ok(())
}

/// Resolves once `stop` is set.
pub async fn wait_for(stop: &AtomicBool) {
    while !stop.load(Ordering::SeqCst) {
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}
