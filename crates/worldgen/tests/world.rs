//! The demo world is deterministic and has the documented fault rates.

use arrow::array::{Array, AsArray};
use arrow::datatypes::{Int64Type, TimestampMicrosecondType};
use daymark_worldgen::generate::list_parquet;
use daymark_worldgen::{generate, WorldConfig};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use std::collections::HashMap;
use std::path::Path;

fn small(out: &Path, seed: u64) -> WorldConfig {
    let mut cfg = WorldConfig::new(out, 1500, 60);
    cfg.seed = seed;
    cfg
}

fn files_bytes(dir: &Path) -> Vec<(String, Vec<u8>)> {
    list_parquet(dir)
        .into_iter()
        .map(|p| {
            (
                p.strip_prefix(dir).unwrap().display().to_string(),
                std::fs::read(&p).unwrap(),
            )
        })
        .collect()
}

#[test]
fn same_seed_same_bytes_different_seed_different_bytes() {
    let a = tempfile::tempdir().unwrap();
    let b = tempfile::tempdir().unwrap();
    let c = tempfile::tempdir().unwrap();
    let mut cfg = small(a.path(), 11);
    cfg.threads = 1;
    generate(&cfg).unwrap();
    let mut cfg = small(b.path(), 11);
    cfg.threads = 3; // a different number of workers must not matter
    generate(&cfg).unwrap();
    generate(&small(c.path(), 12)).unwrap();
    let fa = files_bytes(a.path());
    let fb = files_bytes(b.path());
    assert!(fa.len() > 100, "{} files", fa.len());
    assert_eq!(fa.len(), fb.len());
    for ((na, ba), (nb, bb)) in fa.iter().zip(&fb) {
        assert_eq!(na, nb);
        assert!(ba == bb, "{na} differs between two runs with the same seed");
    }
    assert_eq!(
        std::fs::read(a.path().join("world.json")).unwrap(),
        std::fs::read(b.path().join("world.json")).unwrap()
    );
    let fc = files_bytes(c.path());
    assert!(fa != fc, "different seeds gave the same world");
}

struct Rows {
    total: usize,
    late: usize,
    copies: usize,
    null_keys: usize,
    negative: usize,
    future: usize,
}

/// Reads a source the plain way (parquet crate, no daymark code) and counts faults.
fn scan(dir: &Path, id_col: &str, time_col: &str, now_micros: i64) -> Rows {
    let mut seen: HashMap<String, usize> = HashMap::new();
    let mut r = Rows {
        total: 0,
        late: 0,
        copies: 0,
        null_keys: 0,
        negative: 0,
        future: 0,
    };
    for path in list_parquet(dir) {
        let Ok(file) = std::fs::File::open(&path) else {
            continue;
        };
        let Ok(builder) = ParquetRecordBatchReaderBuilder::try_new(file) else {
            continue;
        };
        for batch in builder.build().unwrap() {
            let batch = batch.unwrap();
            let ids = batch.column_by_name(id_col).unwrap().as_string::<i32>();
            let keys = batch.column_by_name("customer_id").unwrap();
            let ev = batch
                .column_by_name(time_col)
                .unwrap()
                .as_primitive::<TimestampMicrosecondType>();
            let ar = batch
                .column_by_name("arrived_at")
                .unwrap()
                .as_primitive::<TimestampMicrosecondType>();
            let secs = batch
                .column_by_name("seconds_played")
                .map(|c| c.as_primitive::<Int64Type>().clone());
            for i in 0..batch.num_rows() {
                r.total += 1;
                *seen.entry(ids.value(i).to_string()).or_default() += 1;
                if ar.value(i) - ev.value(i) >= 86_400_000_000 {
                    r.late += 1;
                }
                if keys.is_null(i) {
                    r.null_keys += 1;
                }
                if secs.as_ref().is_some_and(|s| s.value(i) < 0) {
                    r.negative += 1;
                }
                if ev.value(i) > now_micros {
                    r.future += 1;
                }
            }
        }
    }
    r.copies = seen.values().map(|n| n - 1).sum();
    r
}

#[test]
fn fault_rates_match_the_documented_shares() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = small(dir.path(), 5);
    let summary = generate(&cfg).unwrap();
    let now = (cfg.start + chrono::Duration::days(cfg.days as i64))
        .and_hms_opt(0, 0, 0)
        .unwrap()
        .and_utc()
        .timestamp_micros();
    let plays = scan(&dir.path().join("plays"), "event_id", "event_time", now);
    assert!(plays.total > 50_000, "{} plays", plays.total);
    // The summary's counts are those of the files as read back.
    let counted = &summary.sources["plays"];
    assert_eq!(
        (counted.rows, counted.late_rows, counted.duplicate_rows),
        (plays.total as u64, plays.late as u64, plays.copies as u64)
    );
    let late = plays.late as f64 / plays.total as f64;
    // 2% are drawn late; those whose arrival falls after the world's end are not written
    // yet, which removes a few percent of them.
    assert!((0.016..0.022).contains(&late), "late share {late}");
    let dup = plays.copies as f64 / plays.total as f64;
    assert!((0.0035..0.0065).contains(&dup), "duplicate share {dup}");
    assert_eq!((plays.null_keys, plays.negative, plays.future), (0, 0, 0));
    let subs = scan(
        &dir.path().join("subscriptions"),
        "change_id",
        "changed_at",
        now,
    );
    assert!(subs.total > 3_000);
    let late = subs.late as f64 / subs.total as f64;
    assert!(
        (0.01..0.03).contains(&late),
        "subscription late share {late}"
    );
}

#[test]
fn dirty_worlds_have_every_kind_of_malformed_row() {
    let dir = tempfile::tempdir().unwrap();
    let mut cfg = small(dir.path(), 5);
    cfg.dirty = true;
    let summary = generate(&cfg).unwrap();
    let now = (cfg.start + chrono::Duration::days(cfg.days as i64))
        .and_hms_opt(0, 0, 0)
        .unwrap()
        .and_utc()
        .timestamp_micros();
    let plays = scan(&dir.path().join("plays"), "event_id", "event_time", now);
    assert!(plays.null_keys > 10, "{}", plays.null_keys);
    assert!(plays.negative > 10, "{}", plays.negative);
    assert!(plays.future > 3, "{}", plays.future);
    assert_eq!(
        summary.sources["plays"].null_key_rows as usize,
        plays.null_keys
    );
    assert_eq!(summary.corrupt_files.len(), 1);
    let corrupt = std::fs::File::open(&summary.corrupt_files[0]).unwrap();
    assert!(ParquetRecordBatchReaderBuilder::try_new(corrupt).is_err());
}

#[test]
fn refuses_impossible_configurations() {
    let dir = tempfile::tempdir().unwrap();
    let mut cfg = small(dir.path(), 1);
    cfg.customers = 0;
    assert!(generate(&cfg)
        .unwrap_err()
        .to_string()
        .contains("at least 1"));
    let mut cfg = small(dir.path(), 1);
    cfg.late_share = 0.9;
    assert!(generate(&cfg).is_err());
}
