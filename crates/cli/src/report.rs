//! What a long command tells the person or the scheduler watching it: text lines or JSON
//! lines on stdout, and a progress line on stderr only when stderr is a terminal.

use serde_json::Value;
use std::io::{IsTerminal, Write};
use std::time::Instant;

/// Output settings of one command run.
pub struct Report {
    json: bool,
    progress: bool,
    started: Instant,
}

impl Report {
    /// `format` is `text` or `json`.
    pub fn new(format: &str) -> Report {
        let json = format == "json";
        Report {
            json,
            progress: !json && std::io::stderr().is_terminal(),
            started: Instant::now(),
        }
    }

    /// One event: `text` for people, `fields` (plus `event`) for machines.
    pub fn event(&self, event: &str, text: impl FnOnce() -> String, mut fields: Value) {
        if self.json {
            if let Value::Object(map) = &mut fields {
                map.insert("event".into(), Value::from(event));
            }
            println!("{fields}");
        } else {
            self.clear();
            println!("{}", text());
        }
    }

    /// Updates the progress line: steps done, rows per second, time left.
    pub fn progress(&self, done: usize, total: usize, rows: u64) {
        if !self.progress || total == 0 {
            return;
        }
        let secs = self.started.elapsed().as_secs_f64().max(1e-6);
        let left = if done == 0 {
            0.0
        } else {
            secs / done as f64 * (total - done) as f64
        };
        eprint!(
            "\r{:>5.1}% [{done}/{total}] {:.0} rows/s, about {} left   ",
            100.0 * done as f64 / total as f64,
            rows as f64 / secs,
            duration(left)
        );
        let _ = std::io::stderr().flush();
    }

    /// Removes the progress line before other output.
    pub fn clear(&self) {
        if self.progress {
            eprint!("\r{:60}\r", "");
        }
    }
}

fn duration(secs: f64) -> String {
    let s = secs.round() as u64;
    if s >= 3600 {
        format!("{}h{:02}m", s / 3600, (s % 3600) / 60)
    } else if s >= 60 {
        format!("{}m{:02}s", s / 60, s % 60)
    } else {
        format!("{s}s")
    }
}
