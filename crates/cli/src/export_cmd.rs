//! `daymark export`: a training set from snapshots and matured labels.

use crate::commands::{invalid, load, parse_day, parse_mode};
use crate::exit;
use crate::labels_cmd::out_location;
use anyhow::Result;
use daymark_labels::export::{export as run_export, ExportOptions, Split};
use daymark_labels::LabelError;
use std::path::PathBuf;

/// Arguments of `daymark export`.
#[derive(clap::Args)]
pub struct ExportArgs {
    /// The pipeline file.
    pipeline: PathBuf,
    /// First snapshot day (YYYY-MM-DD).
    #[arg(long)]
    from: String,
    /// Last snapshot day, inclusive (YYYY-MM-DD).
    #[arg(long)]
    to: String,
    /// Folder or URL to write `train/`, `validation/`, `test/` and `manifest.json` into.
    #[arg(long)]
    out: String,
    /// Also write each part as CSV (`part-0.csv`).
    #[arg(long)]
    csv: bool,
    /// Shares of the labeled days for train, validation, test (`0.7,0.15,0.15`; a 0 leaves
    /// a part out), or the first days of validation and test (`2026-03-01,2026-04-01`).
    #[arg(long, default_value = "0.7,0.15,0.15")]
    split: String,
    /// Least number of days from the last day of a part to the first day of the next, e.g.
    /// `37d` (default: the label's horizon + grace).
    #[arg(long)]
    embargo: Option<String>,
    /// Accept an embargo shorter than horizon + grace (the parts then share label time).
    #[arg(long)]
    force_embargo: bool,
    /// Keep only rows matching this SQL condition over the snapshot's columns, e.g.
    /// `tenure_days < 90`.
    #[arg(long = "where")]
    filter: Option<String>,
    /// Only these features (comma-separated or repeated).
    #[arg(long, value_delimiter = ',')]
    include: Vec<String>,
    /// Leave out these features (comma-separated or repeated).
    #[arg(long, value_delimiter = ',')]
    exclude: Vec<String>,
    /// Keep at most N rows per snapshot day, chosen by a hash of key, day and --seed.
    #[arg(long)]
    sample_per_day: Option<u64>,
    /// Seed of the per-day sample.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Read snapshots and labels built with this forced knowledge mode.
    #[arg(long)]
    knowledge: Option<String>,
    /// Folder or URL of the pipeline's outputs (default: the pipeline's `output`).
    #[arg(long)]
    data: Option<String>,
}

/// Turns the library's input errors into exit code 2.
pub(crate) fn user_error(e: LabelError) -> anyhow::Error {
    match e {
        LabelError::Invalid(m) => invalid(m),
        LabelError::NoLabel => invalid(e.to_string()),
        other => other.into(),
    }
}

fn parse_days(text: &str) -> Result<u32> {
    text.strip_suffix('d')
        .and_then(|n| n.parse::<u32>().ok())
        .ok_or_else(|| {
            invalid(format!(
                "--embargo `{text}`: write whole days as `Nd`, e.g. `37d`"
            ))
        })
}

/// `daymark export`.
pub async fn export(args: ExportArgs) -> Result<u8> {
    let mode = parse_mode(args.knowledge.as_deref())?;
    let (from, to) = (parse_day(&args.from)?, parse_day(&args.to)?);
    let split = Split::parse(&args.split).map_err(invalid)?;
    let embargo = args.embargo.as_deref().map(parse_days).transpose()?;
    if args.sample_per_day == Some(0) {
        return Err(invalid("--sample-per-day must be at least 1".into()));
    }
    let pipeline = match load(&args.pipeline) {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let out = out_location(&pipeline, args.data.as_deref())?;
    let dest = daymark_store::resolve(&args.out, None)?;
    let ctx = daymark_engine::session::session(&Default::default())?;
    let opts = ExportOptions {
        from,
        to,
        dest,
        csv: args.csv,
        split,
        split_text: args.split.clone(),
        embargo,
        force_embargo: args.force_embargo,
        filter: args.filter.clone(),
        include: args.include.clone(),
        exclude: args.exclude.clone(),
        sample_per_day: args.sample_per_day,
        seed: args.seed,
        mode,
    };
    let t0 = std::time::Instant::now();
    let r = run_export(&ctx, &pipeline, &out, &opts)
        .await
        .map_err(user_error)?;
    let required = r.manifest["required_embargo_days"].as_u64().unwrap_or(0);
    if (r.embargo as u64) < required {
        eprintln!(
            "warning: embargo {}d is shorter than horizon + grace ({required}d): forced",
            r.embargo
        );
    }
    println!(
        "training set of {} into {} ({} features, embargo {}d)",
        pipeline.file.name,
        args.out,
        r.features.len(),
        r.embargo
    );
    for p in &r.parts {
        println!(
            "  {:10} {} .. {}  {:>3} day(s)  {:>8} rows  label rate {}",
            p.range.name,
            p.range.first,
            p.range.last,
            p.days.len(),
            p.rows,
            if p.rows == 0 {
                "-".to_string()
            } else {
                format!("{:.4}", p.positives as f64 / p.rows as f64)
            }
        );
    }
    if !r.unlabeled_days.is_empty() {
        println!(
            "  left out: {} row(s) on {} snapshot day(s) without matured labels ({} .. {})",
            r.unlabeled_rows,
            r.unlabeled_days.len(),
            r.unlabeled_days[0],
            r.unlabeled_days[r.unlabeled_days.len() - 1]
        );
    }
    if !r.embargoed_days.is_empty() {
        println!(
            "  left out: {} row(s) on {} labeled day(s) inside embargo gaps",
            r.embargoed_rows,
            r.embargoed_days.len()
        );
    }
    println!("wrote manifest.json in {:.1} s", t0.elapsed().as_secs_f64());
    Ok(exit::OK)
}
