//! Generation speed and peak memory of the demo world (a benchmark, not a test).
//!
//! Run: `cargo run --release -p daymark-worldgen --example world_bench -- CUSTOMERS DAYS [OUT]`
//! Prints rows written, seconds, rows per second and the process's peak resident memory.

use daymark_worldgen::{generate, WorldConfig};

fn peak_rss_mib() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / 1024.0)
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let customers: u32 = args.get(1).and_then(|s| s.parse().ok()).unwrap_or(10_000);
    let days: u32 = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(120);
    let out = args
        .get(3)
        .cloned()
        .unwrap_or_else(|| "target/world-bench".into());
    let _ = std::fs::remove_dir_all(&out);
    let cfg = WorldConfig::new(&out, customers, days);
    let t0 = std::time::Instant::now();
    let summary = match generate(&cfg) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("error: {e}");
            std::process::exit(1);
        }
    };
    let secs = t0.elapsed().as_secs_f64();
    let rows: u64 = summary.sources.values().map(|s| s.rows).sum();
    let plays = summary.sources["plays"].rows;
    let bytes: u64 = daymark_worldgen::generate::list_parquet(std::path::Path::new(&out))
        .iter()
        .filter_map(|p| std::fs::metadata(p).ok())
        .map(|m| m.len())
        .sum();
    println!(
        "customers={customers} days={days} rows={rows} (plays {plays}) seconds={secs:.1} rows_per_second={:.0} parquet_bytes={bytes} bytes_per_row={:.1} peak_rss_mib={:.0} threads={}",
        rows as f64 / secs,
        bytes as f64 / rows as f64,
        peak_rss_mib().unwrap_or(f64::NAN),
        std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
    );
}
