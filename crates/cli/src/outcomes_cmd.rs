//! `daymark outcomes`: how well a model's scores match the labels that matured since.

use crate::commands::{invalid, load, parse_mode};
use crate::exit;
use crate::export_cmd::user_error;
use crate::labels_cmd::out_location;
use anyhow::{Context, Result};
use daymark_labels::outcomes::{outcomes as measure, OutcomeOptions, ScoreInput};
use serde_json::json;
use std::path::PathBuf;

/// Arguments of `daymark outcomes`.
#[derive(clap::Args)]
pub struct OutcomesArgs {
    /// The pipeline file.
    pipeline: PathBuf,
    /// Scores: a Parquet or CSV file, or a folder of them, with key, date and score columns.
    #[arg(long)]
    scores: String,
    /// The key column of the scores (default: the pipeline's key).
    #[arg(long)]
    key_column: Option<String>,
    /// The scoring day column of the scores.
    #[arg(long, default_value = "snapshot_date")]
    date_column: String,
    /// The score column (higher: more likely to churn).
    #[arg(long, default_value = "score")]
    score_column: String,
    /// Precision among the k highest scores of each day.
    #[arg(long)]
    top_k: Option<u64>,
    /// Precision among the highest P percent of each day's scores.
    #[arg(long)]
    top_percent: Option<f64>,
    /// Exit with code 3 when a day's ROC AUC is below this floor.
    #[arg(long)]
    min_auc: Option<f64>,
    /// Also write the results as JSON to this file.
    #[arg(long)]
    json: Option<PathBuf>,
    /// Read snapshots and labels built with this forced knowledge mode.
    #[arg(long)]
    knowledge: Option<String>,
    /// Folder or URL of the pipeline's outputs (default: the pipeline's `output`).
    #[arg(long)]
    data: Option<String>,
}

fn opt(x: Option<f64>, digits: usize) -> String {
    x.map(|v| format!("{v:.digits$}"))
        .unwrap_or_else(|| "-".into())
}

/// `daymark outcomes`.
pub async fn outcomes(args: OutcomesArgs) -> Result<u8> {
    let mode = parse_mode(args.knowledge.as_deref())?;
    if let Some(f) = args.min_auc {
        if !(0.0..=1.0).contains(&f) {
            return Err(invalid(format!("--min-auc {f}: give a value from 0 to 1")));
        }
    }
    let pipeline = match load(&args.pipeline) {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let out = out_location(&pipeline, args.data.as_deref())?;
    let input = ScoreInput {
        location: daymark_store::resolve(&args.scores, None).map_err(|e| invalid(e.to_string()))?,
        key: args
            .key_column
            .clone()
            .unwrap_or_else(|| pipeline.file.key.clone()),
        date: args.date_column.clone(),
        score: args.score_column.clone(),
    };
    let ctx = daymark_engine::session::session(&Default::default())?;
    let opts = OutcomeOptions {
        top_k: args.top_k,
        top_percent: args.top_percent,
        mode,
    };
    let r = measure(&ctx, &pipeline, &out, &input, &opts)
        .await
        .map_err(user_error)?;
    let below: Vec<String> = match args.min_auc {
        Some(floor) => r
            .days
            .iter()
            .filter(|d| d.auc.is_some_and(|a| a < floor))
            .map(|d| d.day.to_string())
            .collect(),
        None => vec![],
    };
    println!(
        "{:10}  {:>7}  {:>9}  {:>7}  {:>10}  {:>12}",
        "day",
        "rows",
        "base rate",
        "ROC AUC",
        args.top_k
            .map(|k| format!("prec@{k}"))
            .unwrap_or_else(|| "prec@k".into()),
        args.top_percent
            .map(|p| format!("prec@{p}%"))
            .unwrap_or_else(|| "prec@%".into())
    );
    for d in &r.days {
        println!(
            "{:10}  {:>7}  {:>9.4}  {:>7}  {:>10}  {:>12}{}",
            d.day.to_string(),
            d.rows,
            d.base_rate,
            opt(d.auc, 4),
            opt(d.precision_at_k, 4),
            opt(d.precision_at_percent, 4),
            if below.contains(&d.day.to_string()) {
                "  below --min-auc"
            } else {
                ""
            }
        );
    }
    for d in &r.days {
        let cal: Vec<String> = d
            .deciles
            .iter()
            .map(|c| format!("{}:{:.3}/{:.3}", c.decile, c.mean_score, c.observed_rate))
            .collect();
        println!(
            "calibration {} (decile:mean score/observed rate) {}",
            d.day,
            cal.join(" ")
        );
    }
    let u = &r.unmatched;
    println!(
        "{} score row(s): {} measured; not measured: {} with a null key, date or score, {} for days without a snapshot, {} for days whose labels have not matured, {} for keys not in that day's snapshot",
        u.score_rows,
        r.days.iter().map(|d| d.rows).sum::<u64>(),
        u.null_rows,
        u.no_snapshot_rows,
        u.not_matured_rows,
        u.unknown_key_rows
    );
    if let Some(path) = &args.json {
        let doc = json!({
            "pipeline": pipeline.file.name,
            "label": pipeline.label.as_ref().map(|l| l.name.clone()),
            "scores": args.scores,
            "top_k": args.top_k,
            "top_percent": args.top_percent,
            "min_auc": args.min_auc,
            "days": r.days.iter().map(|d| json!({
                "day": d.day.to_string(),
                "rows": d.rows,
                "positives": d.positives,
                "base_rate": d.base_rate,
                "auc": d.auc,
                "precision_at_k": d.precision_at_k,
                "precision_at_percent": d.precision_at_percent,
                "percent_rows": d.percent_rows,
                "calibration": d.deciles.iter().map(|c| json!({
                    "decile": c.decile, "rows": c.rows, "mean_score": c.mean_score, "observed_rate": c.observed_rate,
                })).collect::<Vec<_>>(),
            })).collect::<Vec<_>>(),
            "not_measured": {
                "score_rows": u.score_rows,
                "null_rows": u.null_rows,
                "no_snapshot_rows": u.no_snapshot_rows,
                "no_snapshot_days": u.no_snapshot_days.iter().map(|d| d.to_string()).collect::<Vec<_>>(),
                "not_matured_rows": u.not_matured_rows,
                "not_matured_days": u.not_matured_days.iter().map(|d| d.to_string()).collect::<Vec<_>>(),
                "unknown_key_rows": u.unknown_key_rows,
            },
            "below_min_auc": below,
        });
        std::fs::write(path, serde_json::to_vec_pretty(&doc)?)
            .with_context(|| format!("writing {}", path.display()))?;
    }
    if !below.is_empty() {
        eprintln!(
            "ROC AUC below {} on {} day(s): {}",
            args.min_auc.unwrap_or_default(),
            below.len(),
            below.join(", ")
        );
        return Ok(exit::CHECK_FAILED);
    }
    Ok(exit::OK)
}
