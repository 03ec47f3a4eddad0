//! `daymark audit`: the leakage audit of built snapshots, as a table or JSON.

use crate::commands::{inspect, invalid, load, parse_day, parse_mode, print_problems};
use crate::exit;
use anyhow::Result;
use daymark_audit::checks::{audit, AuditOptions, AuditOutcome, Status};
use daymark_engine::register_sources;
use daymark_spec::Pipeline;
use std::path::PathBuf;

/// Arguments shared by `daymark audit` and `daymark report`.
#[derive(clap::Args, Clone)]
pub struct AuditArgs {
    /// The pipeline file.
    pub pipeline: PathBuf,
    /// First snapshot day audited (default: the first published).
    #[arg(long)]
    pub from: Option<String>,
    /// Last snapshot day audited (default: the last published).
    #[arg(long)]
    pub to: Option<String>,
    /// (key, day) rows recomputed by the naive path.
    #[arg(long, default_value_t = 200)]
    pub sample: usize,
    /// Days sampled for the recomputation and the skew check.
    #[arg(long, default_value_t = 3)]
    pub sample_days: usize,
    /// Seed of the samples: the same seed picks the same rows.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Flag a feature whose ROC AUC is within this distance of 0 or 1.
    #[arg(long, default_value_t = 0.05)]
    pub auc_margin: f64,
    /// Flag feature pairs whose absolute Pearson or Spearman correlation is at least this.
    #[arg(long, default_value_t = 0.95)]
    pub redundant_above: f64,
    /// Largest accepted share of rows, or of one feature's values, that differ between
    /// as-known and event-time snapshots on a sampled day.
    #[arg(long, default_value_t = 0.5)]
    pub max_skew: f64,
    /// Audit the snapshots built with this forced knowledge mode (`as-known`, `event-time`).
    #[arg(long)]
    pub knowledge: Option<String>,
    /// Output folder or URL of the builds (default: the pipeline's `output`).
    #[arg(long)]
    pub outputs: Option<String>,
}

/// What the audit and the report need: the pipeline, a session with its sources, the
/// output location and the options.
pub struct Prepared {
    /// The pipeline.
    pub pipeline: Pipeline,
    /// Session with the sources registered.
    pub ctx: daymark_audit::SessionContext,
    /// Where builds are.
    pub out: daymark_store::Location,
    /// Audit options.
    pub options: AuditOptions,
}

/// Loads and checks the pipeline and registers its sources. `Err(code)` to exit with.
pub async fn prepare(args: &AuditArgs) -> Result<std::result::Result<Prepared, u8>> {
    let mode = parse_mode(args.knowledge.as_deref())?;
    let from = args.from.as_deref().map(parse_day).transpose()?;
    let to = args.to.as_deref().map(parse_day).transpose()?;
    if let (Some(a), Some(b)) = (from, to) {
        if b < a {
            return Err(invalid(format!("--to {b} is before --from {a}")));
        }
    }
    if !(0.0..0.5).contains(&args.auc_margin) {
        return Err(invalid(
            "--auc-margin must be at least 0 and below 0.5".into(),
        ));
    }
    let pipeline = match load(&args.pipeline) {
        Ok(p) => p,
        Err(code) => return Ok(Err(code)),
    };
    let (reports, problems, _) = inspect(&pipeline, &args.pipeline, None).await;
    if !problems.is_empty() {
        print_problems(&problems);
        return Ok(Err(exit::INVALID));
    }
    let out_text = args
        .outputs
        .clone()
        .or_else(|| pipeline.file.output.clone())
        .unwrap_or_else(|| "out".to_string());
    let base = if args.outputs.is_some() {
        None
    } else {
        pipeline.base_dir.as_deref()
    };
    let out = daymark_store::resolve(&out_text, base)?;
    let ctx = daymark_engine::session::session(&Default::default())?;
    register_sources(&ctx, &pipeline, &reports).await?;
    let options = AuditOptions {
        from,
        to,
        sample: args.sample,
        sample_days: args.sample_days,
        seed: args.seed,
        auc_margin: args.auc_margin,
        redundant_above: args.redundant_above,
        max_skew: args.max_skew,
        mode,
    };
    Ok(Ok(Prepared {
        pipeline,
        ctx,
        out,
        options,
    }))
}

/// `daymark audit`.
pub async fn run(args: AuditArgs, json: bool) -> Result<u8> {
    let p = match prepare(&args).await? {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let outcome = audit(&p.ctx, &p.pipeline, &p.out, &p.options).await?;
    if json {
        let mut v = serde_json::to_value(&outcome)?;
        v["passed"] = serde_json::json!(outcome.passed());
        v["pipeline"] = serde_json::json!(p.pipeline.file.name);
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        print_table(&outcome, &p.options);
    }
    Ok(if outcome.passed() {
        exit::OK
    } else {
        exit::CHECK_FAILED
    })
}

fn print_table(o: &AuditOutcome, opts: &AuditOptions) {
    println!(
        "audit of {} snapshot day(s), {} .. {}",
        o.days.len(),
        o.days.first().map(String::as_str).unwrap_or("-"),
        o.days.last().map(String::as_str).unwrap_or("-")
    );
    println!();
    println!("  #  check          status   evidence");
    for c in &o.checks {
        let status = match c.status {
            Status::Pass => "pass",
            Status::Fail => "FAIL",
            Status::Skipped => "skipped",
        };
        println!("  {}  {:13}  {:7}  {}", c.number, c.name, status, c.summary);
    }
    if let Some(a) = &o.analysis {
        println!();
        println!(
            "features against the label ({} matured rows, {} positive):",
            a.rows, a.positives
        );
        println!(
            "  {:32} {:>7} {:>8} {:>8}",
            "feature", "AUC", "Pearson", "Spearman"
        );
        let f = |v: Option<f64>| v.map(|x| format!("{x:.3}")).unwrap_or_else(|| "-".into());
        for s in &a.features {
            println!(
                "  {:32} {:>7} {:>8} {:>8}",
                s.name,
                f(s.auc),
                f(s.pearson),
                f(s.spearman)
            );
        }
    }
    if !o.redundant.is_empty() {
        println!();
        println!(
            "redundant pairs (absolute correlation at least {}):",
            opts.redundant_above
        );
        for (a, b, p, s) in &o.redundant {
            println!("  {a} ~ {b}: Pearson {p:.3}, Spearman {s:.3}");
        }
    }
    println!();
    println!(
        "{}",
        if o.passed() {
            "audit passed"
        } else {
            "audit FAILED"
        }
    );
}
