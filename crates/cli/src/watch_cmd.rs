//! `daymark watch`: the long-running service.

use crate::exit;
use crate::report::Report;
use crate::run_cmd::{cli_error, options, parse_duration, print_event, stop_on_signals, Scope};
use anyhow::Result;
use daymark_runner::watch::{serve_http, watch, Metrics, WatchOptions};
use daymark_runner::Event;
use std::net::SocketAddr;
use std::sync::atomic::AtomicBool;
use std::sync::{Arc, Mutex};

/// Arguments of `daymark watch`.
#[derive(clap::Args)]
pub struct WatchArgs {
    #[command(flatten)]
    pub scope: Scope,
    /// Time between polls of the sources (e.g. `30s`, `5m`).
    #[arg(long, default_value = "30s")]
    pub interval: String,
    /// Address of the `/health` and `/metrics` endpoint (port 0: any free port).
    #[arg(long, default_value = "127.0.0.1:9797")]
    pub listen: String,
    /// Serve no HTTP endpoint.
    #[arg(long, conflicts_with = "listen")]
    pub no_listen: bool,
    /// Lease of the output lock while a cycle works.
    #[arg(long, default_value = "120s")]
    pub lease: String,
    /// `text` (default) or `json` lines on stdout.
    #[arg(long, default_value = "text", value_parser = ["text", "json"])]
    pub log_format: String,
}

/// `daymark watch`.
pub async fn watch_cmd(args: WatchArgs) -> Result<u8> {
    let mut run = options(&args.scope, "watch")?;
    run.lease = parse_duration(&args.lease)?;
    // A watch waits for nothing: a held lock just skips this cycle.
    run.wait = false;
    let interval = parse_duration(&args.interval)?;
    // Fail early on an unusable pipeline file; later edits are re-read every cycle.
    daymark_runner::run::load_pipeline(&run.pipeline).map_err(cli_error)?;
    let listen: Option<SocketAddr> = if args.no_listen {
        None
    } else {
        Some(args.listen.parse().map_err(|_| {
            crate::commands::invalid(format!(
                "--listen `{}` is not an address such as 127.0.0.1:9797",
                args.listen
            ))
        })?)
    };
    let log = Report::new(&args.log_format);
    let metrics = Arc::new(Mutex::new(Metrics::default()));
    if let Some(addr) = listen {
        let (bound, _task) = serve_http(addr, metrics.clone()).await.map_err(cli_error)?;
        log.event(
            "listening",
            || format!("serving /health and /metrics on http://{bound}"),
            serde_json::json!({"address": bound.to_string()}),
        );
    }
    log.event(
        "watching",
        || {
            format!(
                "watching {} every {} (stop with SIGTERM or Ctrl-C)",
                run.pipeline.display(),
                args.interval
            )
        },
        serde_json::json!({"pipeline": run.pipeline.display().to_string(), "interval_seconds": interval.as_secs_f64()}),
    );
    let stop = Arc::new(AtomicBool::new(false));
    stop_on_signals(stop.clone());
    // A quiet poll says nothing; a plan is shown when it has work.
    let on = |e: Event| match &e {
        Event::Planned(p) if p.snapshot_days().is_empty() => {}
        // Matured labels would be reported on every poll; `run` and `status` show them.
        Event::Skipped { step: "labels", .. } => {}
        _ => print_event(&log, e),
    };
    let on_error = |e: &daymark_runner::RunnerError| {
        log.event(
            "error",
            || format!("error: {e}"),
            serde_json::json!({"error": e.to_string()}),
        )
    };
    let opts = WatchOptions {
        run,
        interval,
        listen,
    };
    watch(&opts, metrics.clone(), &on, &on_error, stop).await;
    let m = metrics.lock().map(|m| m.clone()).unwrap_or_default();
    log.event(
        "stopped",
        || {
            format!(
                "stopped: {} poll(s), {} run(s), {} failure(s), {} snapshot(s) published",
                m.polls, m.runs, m.failures, m.snapshots_published
            )
        },
        serde_json::json!({"polls": m.polls, "runs": m.runs, "failures": m.failures, "snapshots_published": m.snapshots_published}),
    );
    Ok(exit::OK)
}
