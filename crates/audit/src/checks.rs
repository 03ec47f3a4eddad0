//! The leakage audit over built snapshots: five checks, each passing or failing with
//! evidence.
//!
//! 1. plan: every source read (and so every feature window) ends at the cutoff, the label's
//!    source included; a source in as-known mode without an arrival column is flagged.
//! 2. provenance: the latest event time (and, as-known, arrival time) recorded in each
//!    snapshot's footer is before its cutoff.
//! 3. recomputation: a seeded sample of (key, day) rows recomputed by the naive path (raw
//!    events filtered per snapshot, no tiles) matches the published rows.
//! 4. label scan: on matured labels, single-feature ROC AUC too close to 0 or 1 is flagged.
//! 5. skew: for sampled days, the share of rows and of feature values that differ between
//!    as-known and event-time snapshots (the effect of late data).

use crate::stats::{analyse, Analysis};
use crate::tables::{self, collect, register_dir, value_f64, value_text};
use crate::{engine, AuditError};
use chrono::NaiveDate;
use datafusion::prelude::SessionContext;
use daymark_engine::build::snapshots_dir;
use daymark_engine::provenance::{parse_instant, Provenance, METADATA_KEY};
use daymark_engine::sql::{ident, literal, snapshot_query, KnowledgeOverride};
use daymark_spec::{FeatureDef, Knowledge, Pipeline};
use daymark_store::Location;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use serde::Serialize;
use serde_json::{json, Value};

/// How a check ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Status {
    /// Nothing wrong found.
    Pass,
    /// Something wrong found; the evidence says what.
    Fail,
    /// Could not run yet (e.g. no matured labels); not a failure.
    Skipped,
}

/// One check's result.
#[derive(Debug, Clone, Serialize)]
pub struct CheckResult {
    /// Number of the check (1 to 5).
    pub number: u8,
    /// Short name.
    pub name: &'static str,
    /// Outcome.
    pub status: Status,
    /// One line for people.
    pub summary: String,
    /// What was checked and found, for machines and for people digging in.
    pub evidence: Value,
}

/// Settings of an audit.
#[derive(Debug, Clone)]
pub struct AuditOptions {
    /// First day audited (default: the first published).
    pub from: Option<NaiveDate>,
    /// Last day audited (default: the last published).
    pub to: Option<NaiveDate>,
    /// (key, day) rows recomputed.
    pub sample: usize,
    /// Days sampled for recomputation and skew.
    pub sample_days: usize,
    /// Seed of the samples.
    pub seed: u64,
    /// A feature whose AUC is within this distance of 0 or 1 is flagged.
    pub auc_margin: f64,
    /// Feature pairs with an absolute correlation at least this are redundant.
    pub redundant_above: f64,
    /// Largest accepted share of rows, or of one feature's values, that differ between
    /// the knowledge modes.
    pub max_skew: f64,
    /// The snapshots audited: those of this forced knowledge mode, or the default ones.
    pub mode: KnowledgeOverride,
}

impl Default for AuditOptions {
    fn default() -> Self {
        AuditOptions {
            from: None,
            to: None,
            sample: 200,
            sample_days: 3,
            seed: 1,
            auc_margin: 0.05,
            redundant_above: 0.95,
            max_skew: 0.5,
            mode: None,
        }
    }
}

/// Everything an audit found.
#[derive(Debug, Clone, Serialize)]
pub struct AuditOutcome {
    /// Days audited.
    pub days: Vec<String>,
    /// The five checks.
    pub checks: Vec<CheckResult>,
    /// Feature analysis on matured labels (absent without labels).
    pub analysis: Option<Analysis>,
    /// Redundant pairs: (first, second, Pearson, Spearman).
    pub redundant: Vec<(String, String, f64, f64)>,
}

impl AuditOutcome {
    /// Whether every check passed or was skipped.
    pub fn passed(&self) -> bool {
        self.checks.iter().all(|c| c.status != Status::Fail)
    }
}

fn result(
    number: u8,
    name: &'static str,
    failed: bool,
    summary: String,
    evidence: Value,
) -> CheckResult {
    CheckResult {
        number,
        name,
        status: if failed { Status::Fail } else { Status::Pass },
        summary,
        evidence,
    }
}

/// Runs the audit. The pipeline's sources must be registered as tables in `ctx`.
pub async fn audit(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    opts: &AuditOptions,
) -> Result<AuditOutcome, AuditError> {
    let dir = snapshots_dir(opts.mode);
    let published = tables::published_days(out, dir).await?;
    let days: Vec<NaiveDate> = published
        .keys()
        .copied()
        .filter(|d| opts.from.is_none_or(|f| *d >= f) && opts.to.is_none_or(|t| *d <= t))
        .collect();
    if days.is_empty() {
        return Err(AuditError::Nothing(format!(
            "no snapshots published under {}/{dir} in the range asked: build some first",
            out.display().trim_end_matches('/')
        )));
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(opts.seed);
    let mut sampled: Vec<NaiveDate> = days.clone();
    sampled.shuffle(&mut rng);
    sampled.truncate(opts.sample_days.max(1));
    sampled.sort();

    let mut checks = vec![plan_check(pipeline, &days, opts.mode)];
    checks.push(provenance_check(out, &published, &days).await?);
    checks.push(recompute_check(ctx, pipeline, out, &sampled, opts, &mut rng).await?);
    let (scan, analysis, redundant) = label_scan(ctx, pipeline, out, &days, opts).await?;
    checks.push(scan);
    checks.push(skew_check(ctx, pipeline, &sampled, opts).await?);
    Ok(AuditOutcome {
        days: days.iter().map(|d| d.to_string()).collect(),
        checks,
        analysis,
        redundant,
    })
}

/// Check 1.
pub fn plan_check(pipeline: &Pipeline, days: &[NaiveDate], mode: KnowledgeOverride) -> CheckResult {
    let mut problems = Vec::new();
    let label_source = pipeline.label.as_ref().map(|l| l.source.clone());
    for day in days {
        let q = snapshot_query(pipeline, *day, mode);
        for (source, read) in &q.reads {
            if read.until != q.cutoff {
                let features: Vec<&str> = pipeline
                    .features
                    .iter()
                    .filter(|f| matches!(&f.def, FeatureDef::Aggregate { source: s, .. } if s == source))
                    .map(|f| f.name.as_str())
                    .collect();
                problems.push(json!({
                    "day": day.to_string(), "source": source,
                    "cutoff": daymark_engine::provenance::rfc3339(q.cutoff),
                    "reads_until": daymark_engine::provenance::rfc3339(read.until),
                    "label_source": label_source.as_deref() == Some(source.as_str()),
                    "features": features,
                }));
            }
        }
    }
    let mut no_arrival = Vec::new();
    for (name, src) in &pipeline.sources {
        let wanted = mode.or(src.spec.knowledge).unwrap_or(src.knowledge);
        if wanted == Knowledge::AsKnown && src.spec.arrival_time.is_none() {
            no_arrival.push(name.clone());
        }
    }
    let failed = !problems.is_empty() || !no_arrival.is_empty();
    let summary = if failed {
        let mut parts = Vec::new();
        if let Some(p) = problems.first() {
            parts.push(format!(
                "{} read(s) end after the cutoff, first {} on {} (until {}, cutoff {})",
                problems.len(),
                p["source"].as_str().unwrap_or(""),
                p["day"].as_str().unwrap_or(""),
                p["reads_until"].as_str().unwrap_or(""),
                p["cutoff"].as_str().unwrap_or("")
            ));
        }
        if !no_arrival.is_empty() {
            parts.push(format!(
                "as-known without an arrival column: {}",
                no_arrival.join(", ")
            ));
        }
        parts.join("; ")
    } else {
        format!(
            "{} day(s): every window of {} feature(s) ends at the cutoff; every as-known source has an arrival column",
            days.len(),
            pipeline.features.len()
        )
    };
    result(
        1,
        "plan",
        failed,
        summary,
        json!({"reads_past_cutoff": problems, "as_known_without_arrival": no_arrival, "label_source": label_source}),
    )
}

/// Check 2.
pub async fn provenance_check(
    out: &Location,
    published: &std::collections::BTreeMap<NaiveDate, Vec<daymark_store::DataFile>>,
    days: &[NaiveDate],
) -> Result<CheckResult, AuditError> {
    let mut problems = Vec::new();
    let mut missing = Vec::new();
    let mut latest = Vec::new();
    for day in days {
        let Some(file) = published.get(day).and_then(|f| f.first()) else {
            continue;
        };
        let footer =
            daymark_store::read_footer(out, file)
                .await
                .map_err(|e| AuditError::Store {
                    path: file.path.to_string(),
                    reason: e.to_string(),
                })?;
        let Some(text) = footer.schema.metadata().get(METADATA_KEY) else {
            missing.push(day.to_string());
            continue;
        };
        let Ok(p) = serde_json::from_str::<Provenance>(text) else {
            missing.push(day.to_string());
            continue;
        };
        let cutoff = parse_instant(&p.cutoff);
        for (source, s) in &p.sources {
            let late = |t: &Option<String>| {
                t.as_deref()
                    .and_then(parse_instant)
                    .zip(cutoff)
                    .is_some_and(|(t, c)| t >= c)
            };
            let event_late = late(&s.max_event_time);
            let arrival_late = s.knowledge == Knowledge::AsKnown && late(&s.max_arrival_time);
            if event_late || arrival_late {
                problems.push(
                    json!({"day": day.to_string(), "source": source, "cutoff": p.cutoff,
                    "max_event_time": s.max_event_time, "max_arrival_time": s.max_arrival_time,
                    "knowledge": s.knowledge.as_str()}),
                );
            }
        }
        latest.push(json!({"day": day.to_string(), "provenance": p}));
    }
    let failed = !problems.is_empty() || !missing.is_empty();
    let summary = if let Some(p) = problems.first() {
        format!(
            "{} source-day(s) read data at or after the cutoff, first {} on {}: latest event {}, cutoff {}",
            problems.len(),
            p["source"].as_str().unwrap_or(""),
            p["day"].as_str().unwrap_or(""),
            p["max_event_time"].as_str().unwrap_or("-"),
            p["cutoff"].as_str().unwrap_or("")
        )
    } else if !missing.is_empty() {
        format!(
            "{} snapshot(s) carry no provenance (built before it was recorded?), first {}",
            missing.len(),
            missing[0]
        )
    } else {
        format!(
            "{} snapshot(s): every latest event time, and as-known arrival time, is before the cutoff",
            latest.len()
        )
    };
    let shown: Vec<Value> = latest.into_iter().rev().take(5).collect();
    Ok(result(
        2,
        "provenance",
        failed,
        summary,
        json!({"after_cutoff": problems, "not_recorded": missing, "latest_snapshots": shown}),
    ))
}

/// Relative tolerance for floating-point cells: the tiled engine adds partial sums in a
/// different order than the naive query.
const FLOAT_TOLERANCE: f64 = 1e-9;

fn cells_match(a: &dyn arrow::array::Array, b: &dyn arrow::array::Array, row: usize) -> bool {
    match (a.is_null(row), b.is_null(row)) {
        (true, true) => return true,
        (false, false) => {}
        _ => return false,
    }
    if tables::is_numeric(a.data_type()) && tables::is_numeric(b.data_type()) {
        let (x, y) = (value_f64(a, row), value_f64(b, row));
        return match (x, y) {
            (Some(x), Some(y)) => {
                x == y
                    || (x - y).abs() <= FLOAT_TOLERANCE * x.abs().max(y.abs())
                    || (x.is_nan() && y.is_nan())
            }
            _ => false,
        };
    }
    value_text(a, row) == value_text(b, row)
}

/// Check 3.
async fn recompute_check(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    days: &[NaiveDate],
    opts: &AuditOptions,
    rng: &mut rand_chacha::ChaCha8Rng,
) -> Result<CheckResult, AuditError> {
    let dir = snapshots_dir(opts.mode);
    register_dir(ctx, out, dir, "__audit_published").await?;
    let key = ident(&pipeline.file.key);
    // All (day, key) of the sampled days, then a seeded sample of them.
    let day_list: Vec<String> = days.iter().map(|d| literal(&d.to_string())).collect();
    let batches = collect(
        ctx,
        &format!(
            "SELECT dt, CAST({key} AS VARCHAR) AS k FROM __audit_published WHERE dt IN ({}) ORDER BY dt, k",
            day_list.join(", ")
        ),
        "listing published keys",
    )
    .await?;
    let mut pairs: Vec<(String, String)> = Vec::new();
    for b in &batches {
        for r in 0..b.num_rows() {
            if let (Some(d), Some(k)) = (value_text(b.column(0), r), value_text(b.column(1), r)) {
                pairs.push((d, k));
            }
        }
    }
    pairs.shuffle(rng);
    pairs.truncate(opts.sample);
    pairs.sort();
    let mut mismatches = Vec::new();
    let mut population = Vec::new();
    let mut compared = 0usize;
    for day in days {
        let ds = day.to_string();
        let keys: Vec<String> = pairs
            .iter()
            .filter(|(d, _)| *d == ds)
            .map(|(_, k)| literal(k))
            .collect();
        let q = snapshot_query(pipeline, *day, opts.mode);
        let naive = ctx
            .sql(&q.sql)
            .await
            .map_err(engine(format!("naive snapshot of {day}")))?;
        let _ = ctx.deregister_table("__audit_naive");
        ctx.register_table("__audit_naive", naive.into_view())
            .map_err(engine("registering the naive snapshot"))?;
        let counts = collect(
            ctx,
            &format!(
                "SELECT (SELECT COUNT(*) FROM __audit_naive) AS n, (SELECT COUNT(*) FROM __audit_published WHERE dt = {}) AS p",
                literal(&ds)
            ),
            "counting rows",
        )
        .await?;
        let c = tables::first_row(&counts);
        let (n, p) = (c.first().copied().flatten(), c.get(1).copied().flatten());
        if n != p {
            mismatches
                .push(json!({"day": ds, "what": "population size", "published": p, "naive": n}));
        }
        population.push(json!({"day": ds, "published": p, "naive": n, "keys_sampled": keys.len()}));
        if keys.is_empty() {
            continue;
        }
        let mut cols = vec![
            format!("CAST(p.{key} AS VARCHAR) AS __k"),
            format!("n.{key} IS NULL AS __missing"),
        ];
        for (i, f) in pipeline.features.iter().enumerate() {
            cols.push(format!("p.{} AS p{i}", ident(&f.name)));
            cols.push(format!("n.{} AS n{i}", ident(&f.name)));
        }
        let sql = format!(
            "SELECT {} FROM __audit_published p LEFT JOIN __audit_naive n ON p.{key} = n.{key} WHERE p.dt = {} AND CAST(p.{key} AS VARCHAR) IN ({})",
            cols.join(", "),
            literal(&ds),
            keys.join(", ")
        );
        for b in collect(ctx, &sql, "comparing sampled rows").await? {
            for r in 0..b.num_rows() {
                compared += 1;
                let k = value_text(b.column(0), r).unwrap_or_default();
                if value_text(b.column(1), r).as_deref() == Some("true") {
                    mismatches.push(json!({"day": ds, "key": k, "what": "row missing from the naive recomputation"}));
                    continue;
                }
                for (i, f) in pipeline.features.iter().enumerate() {
                    let (a, n) = (b.column(2 + 2 * i), b.column(3 + 2 * i));
                    if !cells_match(a.as_ref(), n.as_ref(), r) {
                        mismatches.push(json!({"day": ds, "key": k, "feature": f.name,
                            "published": value_text(a.as_ref(), r), "naive": value_text(n.as_ref(), r)}));
                    }
                }
            }
        }
    }
    let _ = ctx.deregister_table("__audit_naive");
    let failed = !mismatches.is_empty();
    let summary = if let Some(m) = mismatches.first() {
        format!(
            "{} mismatch(es) in {compared} sampled row(s), first: {}",
            mismatches.len(),
            m
        )
    } else {
        format!(
            "{compared} sampled row(s) over {} day(s) equal their naive recomputation in all {} feature(s); population sizes equal",
            days.len(),
            pipeline.features.len()
        )
    };
    let shown: Vec<Value> = mismatches.iter().take(50).cloned().collect();
    Ok(result(
        3,
        "recomputation",
        failed,
        summary,
        json!({"seed": opts.seed, "rows_compared": compared, "days": population, "mismatches": mismatches.len(), "first_mismatches": shown, "float_tolerance": FLOAT_TOLERANCE}),
    ))
}

/// Registers `__audit_scan`: published snapshots joined with matured labels (label as
/// 0/1 column `__y`) for `days`. Returns the number of rows, or `None` without labels.
pub async fn register_scan(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    days: &[NaiveDate],
    mode: KnowledgeOverride,
) -> Result<Option<i64>, AuditError> {
    let Some(label) = &pipeline.label else {
        return Ok(None);
    };
    if !register_dir(ctx, out, snapshots_dir(mode), "__audit_snap").await? {
        return Ok(None);
    }
    if !register_dir(ctx, out, tables::LABELS_DIR, "__audit_labels").await? {
        return Ok(None);
    }
    let key = ident(&pipeline.file.key);
    let y = ident(&label.name);
    let (Some(first), Some(last)) = (days.first(), days.last()) else {
        return Ok(None);
    };
    let mut cols = vec![format!("s.{key}"), "s.snapshot_date".to_string()];
    cols.extend(
        pipeline
            .features
            .iter()
            .map(|f| format!("s.{}", ident(&f.name))),
    );
    let sql = format!(
        "SELECT {}, CASE WHEN l.{y} THEN 1 ELSE 0 END AS __y FROM __audit_snap s JOIN __audit_labels l ON s.{key} = l.{key} AND s.snapshot_date = l.snapshot_date WHERE l.{y} IS NOT NULL AND {}",
        cols.join(", "),
        crate::quality::days_filter(*first, *last).replace("dt", "s.dt")
    );
    let view = ctx
        .sql(&sql)
        .await
        .map_err(engine("joining snapshots and labels"))?;
    let _ = ctx.deregister_table("__audit_scan");
    ctx.register_table("__audit_scan", view.into_view())
        .map_err(engine("joining snapshots and labels"))?;
    let n = tables::count(
        &collect(
            ctx,
            "SELECT COUNT(*) FROM __audit_scan",
            "counting matured rows",
        )
        .await?,
    );
    Ok(Some(n))
}

/// Check 4 and the feature analysis.
async fn label_scan(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    days: &[NaiveDate],
    opts: &AuditOptions,
) -> Result<
    (
        CheckResult,
        Option<Analysis>,
        Vec<(String, String, f64, f64)>,
    ),
    AuditError,
> {
    let skipped = |summary: &str| CheckResult {
        number: 4,
        name: "label scan",
        status: Status::Skipped,
        summary: summary.to_string(),
        evidence: json!({}),
    };
    let n = match register_scan(ctx, pipeline, out, days, opts.mode).await? {
        None => return Ok((skipped("no matured labels yet"), None, Vec::new())),
        Some(0) => {
            return Ok((
                skipped("no matured labels yet for the days audited"),
                None,
                Vec::new(),
            ))
        }
        Some(n) => n,
    };
    let features = tables::numeric_features(ctx, "__audit_scan", pipeline).await?;
    let analysis = analyse(ctx, "__audit_scan", "__y", &features, true).await?;
    let flagged: Vec<Value> = analysis
        .features
        .iter()
        .filter(|f| f.auc.is_some_and(|a| a >= 1.0 - opts.auc_margin || a <= opts.auc_margin))
        .map(|f| json!({"feature": f.name, "auc": f.auc, "pearson": f.pearson, "spearman": f.spearman}))
        .collect();
    let redundant = analysis.redundant(opts.redundant_above);
    let failed = !flagged.is_empty();
    let summary = if failed {
        format!(
            "{} feature(s) separate the label almost perfectly (AUC within {} of 0 or 1): {}",
            flagged.len(),
            opts.auc_margin,
            flagged
                .iter()
                .map(|f| format!(
                    "{} {:.3}",
                    f["feature"].as_str().unwrap_or(""),
                    f["auc"].as_f64().unwrap_or(0.0)
                ))
                .collect::<Vec<_>>()
                .join(", ")
        )
    } else {
        let best = analysis
            .features
            .iter()
            .filter_map(|f| f.auc.map(|a| (f.name.clone(), a)))
            .max_by(|a, b| (a.1 - 0.5).abs().total_cmp(&(b.1 - 0.5).abs()));
        format!(
            "{n} matured row(s), {} positive; no feature's AUC within {} of 0 or 1{}",
            analysis.positives,
            opts.auc_margin,
            best.map(|(f, a)| format!(" (strongest {f} {a:.3})"))
                .unwrap_or_default()
        )
    };
    let check = result(
        4,
        "label scan",
        failed,
        summary,
        json!({"rows": n, "positives": analysis.positives, "auc_margin": opts.auc_margin, "flagged": flagged,
               "features": analysis.features}),
    );
    Ok((check, Some(analysis), redundant))
}

/// Check 5.
async fn skew_check(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    days: &[NaiveDate],
    opts: &AuditOptions,
) -> Result<CheckResult, AuditError> {
    let key = ident(&pipeline.file.key);
    let mut per_day = Vec::new();
    let mut worst: (f64, String) = (0.0, String::new());
    for day in days {
        for (name, mode) in [
            ("__audit_ak", Knowledge::AsKnown),
            ("__audit_et", Knowledge::EventTime),
        ] {
            let q = snapshot_query(pipeline, *day, Some(mode));
            let df = ctx
                .sql(&q.sql)
                .await
                .map_err(engine(format!("{} snapshot of {day}", mode.as_str())))?;
            let _ = ctx.deregister_table(name);
            ctx.register_table(name, df.into_view())
                .map_err(engine("registering a snapshot"))?;
        }
        let mut cols = vec![
            "COUNT(*) AS n".to_string(),
            format!("COUNT(*) FILTER (WHERE a.{key} IS NULL OR e.{key} IS NULL) AS only_one"),
            format!("COUNT(*) FILTER (WHERE a.{key} IS NOT NULL AND e.{key} IS NOT NULL) AS both_"),
        ];
        for (i, f) in pipeline.features.iter().enumerate() {
            let c = ident(&f.name);
            cols.push(format!(
                "COUNT(*) FILTER (WHERE a.{key} IS NOT NULL AND e.{key} IS NOT NULL AND a.{c} IS DISTINCT FROM e.{c}) AS d{i}"
            ));
        }
        let sql = format!(
            "SELECT {} FROM __audit_ak a FULL OUTER JOIN __audit_et e ON a.{key} = e.{key}",
            cols.join(", ")
        );
        let row = tables::first_row(&collect(ctx, &sql, "comparing knowledge modes").await?);
        let get = |i: usize| row.get(i).copied().flatten().unwrap_or(0.0);
        let (n, only, both) = (get(0), get(1), get(2));
        let row_share = if n > 0.0 { only / n } else { 0.0 };
        if row_share > worst.0 {
            worst = (row_share, format!("rows on {day}"));
        }
        let mut features = serde_json::Map::new();
        for (i, f) in pipeline.features.iter().enumerate() {
            let share = if both > 0.0 { get(3 + i) / both } else { 0.0 };
            if share > 0.0 {
                features.insert(f.name.clone(), json!(share));
            }
            if share > worst.0 {
                worst = (share, format!("{} on {day}", f.name));
            }
        }
        per_day.push(
            json!({"day": day.to_string(), "rows": n, "rows_in_one_mode_only": only,
            "row_share": row_share, "feature_value_share": features}),
        );
    }
    let _ = ctx.deregister_table("__audit_ak");
    let _ = ctx.deregister_table("__audit_et");
    let failed = worst.0 > opts.max_skew;
    let summary = format!(
        "{} day(s): largest share differing between as-known and event-time {:.4}{} (limit {})",
        days.len(),
        worst.0,
        if worst.1.is_empty() {
            String::new()
        } else {
            format!(" ({})", worst.1)
        },
        opts.max_skew
    );
    Ok(result(
        5,
        "skew",
        failed,
        summary,
        json!({"max_skew": opts.max_skew, "days": per_day}),
    ))
}
