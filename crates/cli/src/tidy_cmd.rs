//! `daymark tidy`: lists the tile folders the pipeline no longer reads and, with
//! `--apply`, removes them under the output lock.

use crate::commands::{human_bytes, take_output_lock};
use crate::exit;
use crate::run_cmd::cli_error;
use anyhow::Result;
use std::path::PathBuf;

/// Arguments of `daymark tidy`.
#[derive(clap::Args)]
pub struct TidyArgs {
    /// The pipeline file.
    pub pipeline: PathBuf,
    /// Output store (default: the pipeline's `output`).
    #[arg(long)]
    pub out: Option<String>,
    /// Remove the folders listed (without it, nothing is removed).
    #[arg(long)]
    pub apply: bool,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// Lease of the output lock while `daymark tidy --apply` removes folders.
const TIDY_LOCK_LEASE: std::time::Duration = std::time::Duration::from_secs(120);

/// `daymark tidy`.
pub async fn tidy(args: TidyArgs) -> Result<u8> {
    let pipeline = daymark_runner::run::load_pipeline(&args.pipeline).map_err(cli_error)?;
    let out =
        daymark_runner::run::output_location(&pipeline, args.out.as_deref()).map_err(cli_error)?;
    // Removing needs the lock a build takes: a build running now may be filling a folder
    // that a pipeline file edited since would call unused.
    let guard = if args.apply {
        match take_output_lock(&out, "tidy", TIDY_LOCK_LEASE, "nothing removed").await? {
            Some(guard) => Some(guard),
            None => return Ok(exit::LOCK_HELD),
        }
    } else {
        None
    };
    let result = tidy_with(&args, &pipeline, &out, guard.as_deref()).await;
    if let Some(g) = guard {
        let released = g.release().await;
        let code = result?;
        released.map_err(cli_error)?;
        return Ok(code);
    }
    result
}

async fn tidy_with(
    args: &TidyArgs,
    pipeline: &daymark_spec::Pipeline,
    out: &daymark_store::Location,
    guard: Option<&daymark_runner::lock::LockGuard>,
) -> Result<u8> {
    let unused = daymark_engine::tidy::unused_folders(pipeline, out).await?;
    let (files, bytes) = unused
        .iter()
        .fold((0, 0), |(f, b), u| (f + u.files, b + u.bytes));
    let mut removed = Vec::new();
    if let Some(guard) = guard {
        for u in &unused {
            guard.ensure_held().map_err(cli_error)?;
            daymark_engine::tidy::remove_folder(out, u).await?;
            removed.push(u.path.clone());
        }
    }
    if args.json {
        let folders: Vec<serde_json::Value> = unused
            .iter()
            .map(|u| {
                serde_json::json!({
                    "path": u.path,
                    "source": u.source,
                    "files": u.files,
                    "bytes": u.bytes,
                    "last_written": u.last_written.map(|t| t.to_rfc3339()),
                    "removed": removed.contains(&u.path),
                })
            })
            .collect();
        let v = serde_json::json!({
            "output": out.display(),
            "unused": folders,
            "files": files,
            "bytes": bytes,
            "applied": guard.is_some(),
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(exit::OK);
    }
    if unused.is_empty() {
        println!(
            "output {}: every tile folder is read by the pipeline; nothing to remove",
            out.display()
        );
        return Ok(exit::OK);
    }
    println!(
        "output {}: {} tile folder(s) the pipeline no longer reads, {} file(s), {}:",
        out.display(),
        unused.len(),
        files,
        human_bytes(bytes)
    );
    for u in &unused {
        println!(
            "  {}  {} file(s), {}, last written {}",
            u.path,
            u.files,
            human_bytes(u.bytes),
            u.last_written
                .map(|t| t.format("%Y-%m-%d %H:%M UTC").to_string())
                .unwrap_or_else(|| "-".into())
        );
    }
    if guard.is_some() {
        println!(
            "removed {} folder(s), {}",
            removed.len(),
            human_bytes(bytes)
        );
    } else {
        println!("nothing removed: run again with --apply to remove them");
    }
    Ok(exit::OK)
}
