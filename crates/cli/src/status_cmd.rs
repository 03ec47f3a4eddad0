//! `daymark status`: what is built, pending and stale (and why), from the ledger.

use crate::exit;
use crate::run_cmd::{cli_error, options, Scope};
use anyhow::Result;
use daymark_runner::plan::DayState;

/// Arguments of `daymark status`.
#[derive(clap::Args)]
pub struct StatusArgs {
    #[command(flatten)]
    pub scope: Scope,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `daymark status`.
pub async fn status(args: StatusArgs) -> Result<u8> {
    let opts = options(&args.scope, "status")?;
    let pipeline = daymark_runner::run::load_pipeline(&opts.pipeline).map_err(cli_error)?;
    let out =
        daymark_runner::run::output_location(&pipeline, opts.out.as_deref()).map_err(cli_error)?;
    let plan = daymark_runner::run::make_plan(&pipeline, &opts)
        .await
        .map_err(cli_error)?;
    let holder = daymark_runner::lock::read(&out).await.map_err(cli_error)?;
    if args.json {
        let mut v = plan.to_json();
        v["pipeline"] = serde_json::json!(pipeline.file.name);
        v["pipeline_hash"] = serde_json::json!(pipeline.hash);
        v["output"] = serde_json::json!(out.display());
        v["lock"] = serde_json::json!(holder.map(|h| h.0));
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(exit::OK);
    }
    println!(
        "pipeline {} (hash {}), output {}",
        pipeline.file.name,
        &pipeline.hash[..12],
        out.display()
    );
    for (source, w) in &plan.watermarks {
        println!(
            "  source {source}: complete through {}",
            w.map(|d| d.to_string())
                .unwrap_or_else(|| "(nothing yet)".into())
        );
    }
    if let Some((h, _)) = &holder {
        println!("  lock: held by {}", h.describe());
    }
    let c = plan.counts();
    let n = |k: &str| c.get(k).copied().unwrap_or(0);
    println!(
        "snapshots {} .. {} ({}): {} built, {} stale, {} new, {} failed, {} pending",
        plan.from
            .map(|d| d.to_string())
            .unwrap_or_else(|| "-".into()),
        plan.until
            .map(|d| d.to_string())
            .unwrap_or_else(|| "-".into()),
        plan.scope,
        n("built"),
        n("stale"),
        n("new"),
        n("failed"),
        n("pending")
    );
    // Runs of consecutive days in the same plain state are shown as one line.
    let mut i = 0;
    while i < plan.days.len() {
        let d = &plan.days[i];
        let plain = matches!(d.state, DayState::Built | DayState::New);
        let mut j = i + 1;
        if plain {
            while j < plan.days.len() && plan.days[j].state == d.state {
                j += 1;
            }
        }
        let last = &plan.days[j - 1];
        let span = if j - i > 1 {
            format!("{} .. {}", d.day, last.day)
        } else {
            d.day.to_string()
        };
        match &d.state {
            DayState::Built => {
                let rows: u64 = plan.days[i..j]
                    .iter()
                    .filter_map(|x| x.entry.as_ref().map(|e| e.rows))
                    .sum();
                println!("  {span:24} built    {} day(s), {rows} rows", j - i)
            }
            DayState::New => println!("  {span:24} new      {} day(s), inputs complete", j - i),
            other => {
                println!(
                    "  {span:24} {:8} {}",
                    other.name(),
                    other.reasons().join("; ")
                );
            }
        }
        i = j;
    }
    Ok(exit::OK)
}
