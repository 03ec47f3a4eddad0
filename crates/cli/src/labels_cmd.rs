//! `daymark labels`: back-fill the labels of built snapshots that have matured.

use crate::commands::{
    inspect, invalid, load, parse_day, parse_mode, print_problems, take_output_lock,
};
use crate::exit;
use anyhow::Result;
use chrono::Duration;
use daymark_labels::backfill::label_times;
use daymark_spec::Pipeline;
use daymark_store::Location;
use serde_json::json;
use std::path::PathBuf;

/// Lease of the output lock while `daymark labels` works (renewed while held).
const LABELS_LOCK_LEASE: std::time::Duration = std::time::Duration::from_secs(120);

/// Arguments of `daymark labels`.
#[derive(clap::Args)]
pub struct LabelsArgs {
    /// The pipeline file.
    pipeline: PathBuf,
    /// Label snapshot days up to this day only (YYYY-MM-DD).
    #[arg(long)]
    until: Option<String>,
    /// Label the snapshots built with this forced knowledge mode (`as-known` or
    /// `event-time`, as given to `daymark build`); labels go to `labels-<mode>/`.
    #[arg(long)]
    knowledge: Option<String>,
    /// Output folder or URL (default: the pipeline's `output`, else `out` beside it).
    #[arg(long)]
    out: Option<String>,
    /// Print a JSON report instead of text.
    #[arg(long)]
    json: bool,
}

/// The output location, as `daymark build` finds it.
pub(crate) fn out_location(pipeline: &Pipeline, out: Option<&str>) -> Result<Location> {
    let text = out
        .map(str::to_string)
        .or_else(|| pipeline.file.output.clone())
        .unwrap_or_else(|| "out".to_string());
    let base = if out.is_some() {
        None
    } else {
        pipeline.base_dir.as_deref()
    };
    Ok(daymark_store::resolve(&text, base)?)
}

fn instant(t: chrono::DateTime<chrono::Utc>) -> String {
    t.format("%Y-%m-%dT%H:%M:%SZ").to_string()
}

/// `daymark labels`.
pub async fn labels(args: LabelsArgs) -> Result<u8> {
    let mode = parse_mode(args.knowledge.as_deref())?;
    let until = args.until.as_deref().map(parse_day).transpose()?;
    let pipeline = match load(&args.pipeline) {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let Some(label) = pipeline.label.clone() else {
        return Err(invalid(format!(
            "{}: the pipeline declares no `label`",
            args.pipeline.display()
        )));
    };
    let out = out_location(&pipeline, args.out.as_deref())?;
    // Footers of files an earlier build or run read come from the output's footer cache,
    // as in `build` (reading all of them grows with the history).
    let (reports, problems, _) = inspect(&pipeline, &args.pipeline, Some(&out)).await;
    if !problems.is_empty() {
        print_problems(&problems);
        return Ok(exit::INVALID);
    }
    let mut footers = daymark_store::FooterReads::default();
    for r in reports.values() {
        footers.add(&r.footer_reads);
    }
    let ctx = daymark_engine::session::session(&Default::default())?;
    daymark_engine::register_sources(&ctx, &pipeline, &reports).await?;
    let watermarks = daymark_labels::source_watermarks(&pipeline, &reports);
    // The lock `run` takes: labels and their staging files would otherwise race a run
    // that is writing them, or one cleaning `_staging/` as it starts.
    let Some(guard) =
        take_output_lock(&out, "labels", LABELS_LOCK_LEASE, "nothing labelled").await?
    else {
        return Ok(exit::LOCK_HELD);
    };
    let t0 = std::time::Instant::now();
    let result = daymark_labels::backfill(&ctx, &pipeline, &watermarks, &out, mode, until).await;
    let released = guard.release().await;
    let result = result?;
    released?;
    let secs = t0.elapsed().as_secs_f64();
    let written = result.labeled.iter().filter(|l| l.written).count();
    let matures_on = |day| day + Duration::days(label.horizon.0 as i64 + label.grace.0 as i64);
    let dir = daymark_labels::labels_dir(mode);
    if args.json {
        let doc = json!({
            "pipeline": pipeline.file.name,
            "label": label.name,
            "source": label.source,
            "watermark": watermarks.get(&label.source).cloned().flatten().map(|w| w.to_json()),
            "output": format!("{}/{dir}", out.display().trim_end_matches('/')),
            "labeled": result.labeled.iter().map(|l| json!({
                "day": l.day.to_string(),
                "rows": l.rows,
                "positives": l.positives,
                "label_rate": if l.rows == 0 { None } else { Some(l.positives as f64 / l.rows as f64) },
                "censored": l.censored,
                "written": l.written,
                "matured_at": instant(l.matured_at),
            })).collect::<Vec<_>>(),
            "pending": result.pending.iter().map(|p| json!({
                "day": p.day.to_string(),
                "matured_at": instant(p.matured_at),
                "matures_on": matures_on(p.day).to_string(),
            })).collect::<Vec<_>>(),
            "written": written,
            "seconds": secs,
            "footers_read": footers.read,
            "footers_cached": footers.cached,
        });
        println!("{}", serde_json::to_string_pretty(&doc)?);
        return Ok(exit::OK);
    }
    println!(
        "labels `{}` of {}: `{}` in {} within {}d after the cutoff, cancelled by `{}` within {}d",
        label.name,
        pipeline.file.name,
        label.ended,
        label.source,
        label.horizon.0,
        label.resumed.as_deref().unwrap_or("(nothing)"),
        label.grace.0
    );
    match watermarks.get(&label.source).cloned().flatten() {
        Some(w) => println!("  {} complete up to {}", label.source, w.describe()),
        None => println!("  {}: no day partitions, nothing can mature", label.source),
    }
    if result.labeled.is_empty() && result.pending.is_empty() {
        println!(
            "  no snapshot built under {}/{}: build snapshots first (`daymark build`)",
            out.display().trim_end_matches('/'),
            daymark_engine::build::snapshots_dir(mode)
        );
    }
    for l in &result.labeled {
        println!(
            "  {}  {:>7} rows  label rate {:.4}  censored {:>5}  {}",
            l.day,
            l.rows,
            if l.rows == 0 {
                0.0
            } else {
                l.positives as f64 / l.rows as f64
            },
            l.censored,
            if l.written { "written" } else { "up to date" }
        );
    }
    if !result.pending.is_empty() {
        println!(
            "pending ({} snapshot day(s) not matured):",
            result.pending.len()
        );
        for p in &result.pending {
            let t = label_times(&pipeline, &label, p.day);
            println!(
                "  {}  matures on {} (window closes {})",
                p.day,
                matures_on(p.day),
                instant(t.matured_at)
            );
        }
    }
    println!(
        "{} day(s) labeled ({written} written, {} up to date), {} pending, in {secs:.1} s, under {}/{dir}",
        result.labeled.len(),
        result.labeled.len() - written,
        result.pending.len(),
        out.display().trim_end_matches('/'),
    );
    Ok(exit::OK)
}
