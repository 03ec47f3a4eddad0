//! The watch service: polls the sources, runs what is due, serves `/health` and `/metrics`.
//!
//! Each cycle is one [`run_once`]: planning reads only listings and the ledger, so a quiet
//! poll is cheap and takes no lock; a cycle with work takes the lock for its duration. A
//! stop request (SIGTERM, SIGINT) lets the current snapshot finish (or abandons tile
//! building, which leaves only staging files) and then ends the service.
//!
//! The HTTP side is a minimal HTTP/1.1 responder on a `TcpListener` for two GET paths,
//! bound to loopback by default; everything else gets 404.

use crate::run::{run_once, wait_for, Event, RunOptions, RunOutcome};
use crate::RunnerError;
use chrono::NaiveDate;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpListener;

/// Counters and gauges served at `/metrics`.
#[derive(Debug, Default, Clone)]
pub struct Metrics {
    /// Runs started (cycles that had work or tried to).
    pub runs: u64,
    /// Runs that failed.
    pub failures: u64,
    /// Polls (every cycle, with or without work).
    pub polls: u64,
    /// Snapshots published by this service.
    pub snapshots_published: u64,
    /// Latest snapshot day published by this service.
    pub last_published: Option<NaiveDate>,
    /// Seconds the last run with work took.
    pub last_run_seconds: f64,
    /// Unix time the last cycle ended.
    pub last_poll_unix: i64,
    /// Snapshot days waiting for inputs at the last poll.
    pub pending_days: u64,
    /// Snapshot days due at the last poll (before running them).
    pub due_days: u64,
    /// Cycles skipped because another run held the lock.
    pub lock_held: u64,
    /// The last error, if the last cycle failed.
    pub last_error: Option<String>,
}

impl Metrics {
    /// The Prometheus text exposition format (version 0.0.4).
    pub fn render(&self) -> String {
        let mut s = String::new();
        let mut metric = |name: &str, kind: &str, help: &str, value: String| {
            s.push_str(&format!(
                "# HELP {name} {help}\n# TYPE {name} {kind}\n{name} {value}\n"
            ));
        };
        metric(
            "daymark_polls_total",
            "counter",
            "Polls of the sources.",
            self.polls.to_string(),
        );
        metric(
            "daymark_runs_total",
            "counter",
            "Runs that had work to do.",
            self.runs.to_string(),
        );
        metric(
            "daymark_run_failures_total",
            "counter",
            "Runs that failed.",
            self.failures.to_string(),
        );
        metric(
            "daymark_lock_held_total",
            "counter",
            "Runs skipped because another run held the lock.",
            self.lock_held.to_string(),
        );
        metric(
            "daymark_snapshots_published_total",
            "counter",
            "Snapshots published by this service.",
            self.snapshots_published.to_string(),
        );
        metric(
            "daymark_last_published_snapshot_date_seconds",
            "gauge",
            "Latest snapshot day published by this service, as Unix time of its UTC midnight (0: none yet).",
            self.last_published
                .and_then(|d| d.and_hms_opt(0, 0, 0))
                .map(|t| t.and_utc().timestamp())
                .unwrap_or(0)
                .to_string(),
        );
        metric(
            "daymark_last_run_duration_seconds",
            "gauge",
            "Wall-clock seconds of the last run that had work.",
            format!("{:.3}", self.last_run_seconds),
        );
        metric(
            "daymark_last_poll_timestamp_seconds",
            "gauge",
            "Unix time the last poll ended.",
            self.last_poll_unix.to_string(),
        );
        metric(
            "daymark_pending_days",
            "gauge",
            "Snapshot days waiting for incomplete inputs at the last poll.",
            self.pending_days.to_string(),
        );
        metric(
            "daymark_due_days",
            "gauge",
            "Snapshot days due at the last poll.",
            self.due_days.to_string(),
        );
        if let Some(d) = self.last_published {
            s.push_str(&format!(
                "# HELP daymark_last_published_snapshot Latest snapshot day published, as a label.\n# TYPE daymark_last_published_snapshot gauge\ndaymark_last_published_snapshot{{date=\"{d}\"}} 1\n"
            ));
        }
        s
    }
}

/// Watch settings.
#[derive(Debug, Clone)]
pub struct WatchOptions {
    /// What each cycle runs.
    pub run: RunOptions,
    /// Time between polls.
    pub interval: Duration,
    /// Address of the HTTP endpoint (None: no endpoint).
    pub listen: Option<SocketAddr>,
}

/// Binds the HTTP endpoint (so the caller can print the bound address) and serves it.
pub async fn serve_http(
    addr: SocketAddr,
    metrics: Arc<Mutex<Metrics>>,
) -> Result<(SocketAddr, tokio::task::JoinHandle<()>), RunnerError> {
    let listener = TcpListener::bind(addr)
        .await
        .map_err(|e| RunnerError::Invalid(format!("cannot listen on {addr}: {e}")))?;
    let bound = listener
        .local_addr()
        .map_err(|e| RunnerError::Invalid(format!("cannot listen on {addr}: {e}")))?;
    let task = tokio::spawn(async move {
        loop {
            let Ok((mut sock, _)) = listener.accept().await else {
                continue;
            };
            let metrics = metrics.clone();
            tokio::spawn(async move {
                let mut buf = Vec::with_capacity(1024);
                let mut chunk = [0u8; 1024];
                // Read the request head (at most 8 KiB); the body of a GET is ignored.
                while !buf.windows(4).any(|w| w == b"\r\n\r\n") && buf.len() < 8192 {
                    match tokio::time::timeout(Duration::from_secs(5), sock.read(&mut chunk)).await
                    {
                        Ok(Ok(n)) if n > 0 => buf.extend_from_slice(&chunk[..n]),
                        _ => break,
                    }
                }
                let head = String::from_utf8_lossy(&buf);
                let mut words = head.lines().next().unwrap_or("").split_whitespace();
                let (method, path) = (words.next().unwrap_or(""), words.next().unwrap_or(""));
                let path = path.split('?').next().unwrap_or("");
                let (status, kind, body) = match (method, path) {
                    ("GET", "/health") => {
                        let m = metrics.lock().map(|m| m.clone()).unwrap_or_default();
                        let body = serde_json::json!({
                            "status": "ok",
                            "last_error": m.last_error,
                            "last_published": m.last_published.map(|d| d.to_string()),
                        })
                        .to_string();
                        ("200 OK", "application/json", body)
                    }
                    ("GET", "/metrics") => {
                        let body = metrics.lock().map(|m| m.render()).unwrap_or_default();
                        ("200 OK", "text/plain; version=0.0.4", body)
                    }
                    ("GET", _) => ("404 Not Found", "text/plain", "not found\n".to_string()),
                    _ => (
                        "405 Method Not Allowed",
                        "text/plain",
                        "only GET\n".to_string(),
                    ),
                };
                let response = format!(
                    "HTTP/1.1 {status}\r\nContent-Type: {kind}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
                    body.len()
                );
                let _ = sock.write_all(response.as_bytes()).await;
                let _ = sock.shutdown().await;
            });
        }
    });
    Ok((bound, task))
}

/// Runs cycles every `interval` until `stop` is set. A failing cycle is counted and
/// reported, and the service carries on; an invalid pipeline file is reported each cycle
/// until it is fixed.
pub async fn watch(
    opts: &WatchOptions,
    metrics: Arc<Mutex<Metrics>>,
    on: &(dyn Fn(Event) + Sync),
    on_error: &(dyn Fn(&RunnerError) + Sync),
    stop: Arc<AtomicBool>,
) {
    while !stop.load(Ordering::SeqCst) {
        let result = run_once(&opts.run, on, &stop).await;
        if let Ok(mut m) = metrics.lock() {
            m.polls += 1;
            m.last_poll_unix = chrono::Utc::now().timestamp();
            match &result {
                Ok(s) => {
                    m.last_error = None;
                    if let Some(p) = &s.plan {
                        m.pending_days = p.pending() as u64;
                        m.due_days = p.snapshot_days().len() as u64;
                    }
                    match &s.outcome {
                        RunOutcome::NothingDue | RunOutcome::Waiting => {}
                        RunOutcome::LockHeld(_) => m.lock_held += 1,
                        RunOutcome::ChecksFailed => {
                            m.runs += 1;
                            m.failures += 1;
                            m.last_run_seconds = s.seconds;
                        }
                        RunOutcome::Done | RunOutcome::Stopped => {
                            m.runs += 1;
                            m.last_run_seconds = s.seconds;
                        }
                    }
                    m.snapshots_published += s.published.len() as u64;
                    if let Some(d) = s.published.iter().map(|p| p.0).max() {
                        m.last_published = Some(m.last_published.map_or(d, |l| l.max(d)));
                    }
                }
                Err(e) => {
                    m.runs += 1;
                    m.failures += 1;
                    m.last_error = Some(e.to_string());
                }
            }
        }
        if let Err(e) = &result {
            on_error(e);
        }
        tokio::select! {
            _ = tokio::time::sleep(opts.interval) => {}
            _ = wait_for(&stop) => {}
        }
    }
}
