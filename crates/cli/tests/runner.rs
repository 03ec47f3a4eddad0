//! `daymark run`, `status` and `watch` end to end on a small demo world: crash safety under
//! SIGKILL, one writer at a time, stale snapshots after a definition change or late data,
//! and the watch service publishing newly landed days.
//!
//! Worlds: one world of 30 days is generated, and "landing" is simulated by copying its
//! files in by arrival day (`dt=E/arrived-A-k.parquet` lands on day A), with the
//! `_complete` marker of a day copied last, as a loader would.

use arrow::array::Array;
use std::collections::{BTreeMap, BTreeSet};
use std::io::{BufRead, Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

fn daymark() -> Command {
    Command::new(env!("CARGO_BIN_EXE_daymark"))
}

const START: &str = "2026-03-01";

/// A small pipeline over the plays log only (its tiles build in about a second).
fn pipeline_text(world: &Path, out: &Path, minutes_expr: &str) -> String {
    format!(
        r#"daymark: 1
name: runner_test
description: Small pipeline for the runner tests.
timezone: America/Chicago
key: customer_id
output: {out}
sources:
  plays:
    location: {world}/plays
    event_time: event_time
    arrival_time: arrived_at
    dedupe_on: [event_id]
population:
  recent_activity:
    source: plays
    within: 14d
features:
  - name: plays
    source: plays
    agg: count
    windows: [7d]
  - name: minutes_watched
    source: plays
    agg: sum
    expr: {minutes_expr}
    windows: [7d]
    fill: 0
  - name: last_device
    source: plays
    agg: last
    expr: device
    window: 7d
    fill: none
"#,
        out = out.display(),
        world = world.display()
    )
}

/// Generates the full 30-day world once per test.
fn full_world(dir: &Path) -> PathBuf {
    let world = dir.join("full");
    let out = daymark()
        .args([
            "generate",
            "--out",
            world.to_str().unwrap(),
            "--customers",
            "200",
            "--days",
            "30",
            "--start",
            START,
            "--seed",
            "3",
        ])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    world
}

fn day(s: &str) -> chrono_free::Day {
    chrono_free::Day::parse(s)
}

/// Tiny date arithmetic so the test needs no date crate.
mod chrono_free {
    #[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
    pub struct Day(pub i64);
    impl Day {
        pub fn parse(s: &str) -> Day {
            let p: Vec<i64> = s.split('-').map(|x| x.parse().unwrap()).collect();
            Day(days_from_civil(p[0], p[1], p[2]))
        }
        pub fn show(self) -> String {
            let (y, m, d) = civil_from_days(self.0);
            format!("{y:04}-{m:02}-{d:02}")
        }
    }
    // Howard Hinnant's days_from_civil / civil_from_days (public-domain algorithms).
    fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
        let y = if m <= 2 { y - 1 } else { y };
        let era = if y >= 0 { y } else { y - 399 } / 400;
        let yoe = y - era * 400;
        let mp = (m + 9) % 12;
        let doy = (153 * mp + 2) / 5 + d - 1;
        let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
        era * 146097 + doe - 719468
    }
    fn civil_from_days(z: i64) -> (i64, i64, i64) {
        let z = z + 719468;
        let era = if z >= 0 { z } else { z - 146096 } / 146097;
        let doe = z - era * 146097;
        let yoe = (doe - doe / 1460 + doe / 36524 - doe / 146096) / 365;
        let y = yoe + era * 400;
        let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
        let mp = (5 * doy + 2) / 153;
        let d = doy - (153 * mp + 2) / 5 + 1;
        let m = if mp < 10 { mp + 3 } else { mp - 9 };
        (if m <= 2 { y + 1 } else { y }, m, d)
    }
}

/// The arrival day in a world file name `arrived-YYYY-MM-DD-k.parquet`.
fn arrival_of(name: &str) -> Option<chrono_free::Day> {
    let rest = name.strip_prefix("arrived-")?;
    Some(day(rest.get(..10)?))
}

/// Copies into `dest` everything of `full` that had landed by the end of day `last`.
fn cut_world(full: &Path, dest: &Path, last: &str) {
    let last = day(last);
    for source in ["plays", "subscriptions", "support"] {
        for part in std::fs::read_dir(full.join(source)).unwrap() {
            let part = part.unwrap().path();
            let Some(pday) = part
                .file_name()
                .unwrap()
                .to_str()
                .unwrap()
                .strip_prefix("dt=")
                .map(day)
            else {
                continue;
            };
            if pday > last {
                continue;
            }
            let to = dest.join(source).join(part.file_name().unwrap());
            std::fs::create_dir_all(&to).unwrap();
            for f in std::fs::read_dir(&part).unwrap() {
                let f = f.unwrap().path();
                let name = f.file_name().unwrap().to_str().unwrap().to_string();
                let keep = match arrival_of(&name) {
                    Some(a) => a <= last,
                    None => true, // the _complete marker of a day up to `last`
                };
                if keep {
                    std::fs::copy(&f, to.join(&name)).unwrap();
                }
            }
        }
    }
}

/// Lands in `dest` the files of `full` that arrived on `d` (late files of older partitions
/// and the on-time files of `d`); with `marker`, then marks partition `d` complete.
/// Returns the partitions that received files.
fn land(full: &Path, dest: &Path, d: &str, marker: bool) -> BTreeSet<String> {
    let target = day(d);
    let mut touched = BTreeSet::new();
    for source in ["plays", "subscriptions", "support"] {
        for part in std::fs::read_dir(full.join(source)).unwrap() {
            let part = part.unwrap().path();
            let pname = part.file_name().unwrap().to_str().unwrap().to_string();
            let to = dest.join(source).join(&pname);
            for f in std::fs::read_dir(&part).unwrap() {
                let f = f.unwrap().path();
                let name = f.file_name().unwrap().to_str().unwrap().to_string();
                if arrival_of(&name) == Some(target) {
                    std::fs::create_dir_all(&to).unwrap();
                    // Land atomically: copy under a hidden name, then rename.
                    let tmp = to.join(format!(".landing-{name}"));
                    std::fs::copy(&f, &tmp).unwrap();
                    std::fs::rename(&tmp, to.join(&name)).unwrap();
                    touched.insert(format!("{source}/{pname}"));
                }
            }
        }
        if marker {
            let to = dest.join(source).join(format!("dt={d}"));
            std::fs::create_dir_all(&to).unwrap();
            std::fs::write(to.join("_complete"), b"").unwrap();
        }
    }
    touched
}

/// Every row of every `dt=*/part-0.parquet` under `dir`, formatted and sorted, by day.
fn snapshot_rows(dir: &Path) -> BTreeMap<String, Vec<String>> {
    let mut out = BTreeMap::new();
    let Ok(entries) = std::fs::read_dir(dir) else {
        return out;
    };
    for e in entries {
        let p = e.unwrap().path();
        let Some(d) = p.file_name().unwrap().to_str().unwrap().strip_prefix("dt=") else {
            continue;
        };
        let file = p.join("part-0.parquet");
        if file.exists() {
            out.insert(d.to_string(), read_rows(&file).unwrap());
        }
    }
    out
}

/// Asserts two sets of snapshots are equal, naming only the days that differ.
#[track_caller]
fn assert_same(a: &BTreeMap<String, Vec<String>>, b: &BTreeMap<String, Vec<String>>, what: &str) {
    let days: BTreeSet<&String> = a.keys().chain(b.keys()).collect();
    let differ: Vec<String> = days
        .into_iter()
        .filter(|d| a.get(*d) != b.get(*d))
        .map(|d| {
            let (x, y) = (a.get(d), b.get(d));
            let first = match (x, y) {
                (Some(x), Some(y)) => x
                    .iter()
                    .zip(y)
                    .find(|(p, q)| p != q)
                    .map(|(p, q)| format!("{p} vs {q}"))
                    .unwrap_or_default(),
                _ => String::new(),
            };
            format!(
                "{d}: {} vs {} rows {first}",
                x.map_or(0, |v| v.len()),
                y.map_or(0, |v| v.len())
            )
        })
        .collect();
    assert!(
        differ.is_empty(),
        "{what}: {} day(s) differ: {differ:?}",
        differ.len()
    );
}

fn read_rows(file: &Path) -> Result<Vec<String>, String> {
    use arrow::util::display::{ArrayFormatter, FormatOptions};
    let f = std::fs::File::open(file).map_err(|e| e.to_string())?;
    let reader = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(f)
        .map_err(|e| e.to_string())?
        .build()
        .map_err(|e| e.to_string())?;
    let mut rows = Vec::new();
    for batch in reader {
        let batch = batch.map_err(|e| e.to_string())?;
        let opts = FormatOptions::default().with_null("NULL");
        let cols: Vec<ArrayFormatter> = batch
            .columns()
            .iter()
            .map(|c| ArrayFormatter::try_new(c.as_ref(), &opts).unwrap())
            .collect();
        for r in 0..batch.num_rows() {
            let cells: Vec<String> = batch
                .columns()
                .iter()
                .zip(&cols)
                .map(|(array, f)| {
                    // Sums of doubles are combined in parallel, so their last bits depend on
                    // the order partial sums meet: compare them to 12 significant digits.
                    match array.as_any().downcast_ref::<arrow::array::Float64Array>() {
                        Some(a) if a.is_valid(r) => format!("{:.11e}", a.value(r)),
                        _ => f.value(r).to_string(),
                    }
                })
                .collect();
            rows.push(cells.join("|"));
        }
    }
    rows.sort();
    Ok(rows)
}

struct Ran {
    code: Option<i32>,
    stdout: String,
    stderr: String,
}

fn run(args: &[&str]) -> Ran {
    let out = daymark().args(args).output().unwrap();
    Ran {
        code: out.status.code(),
        stdout: String::from_utf8_lossy(&out.stdout).into(),
        stderr: String::from_utf8_lossy(&out.stderr).into(),
    }
}

/// The JSON events of a `--log-format json` run.
fn events(r: &Ran) -> Vec<serde_json::Value> {
    r.stdout
        .lines()
        .filter_map(|l| serde_json::from_str(l).ok())
        .collect()
}

/// Days published by a `--log-format json` run, from its final event.
fn published(r: &Ran) -> BTreeSet<String> {
    events(r)
        .iter()
        .filter(|e| e.get("published").is_some())
        .flat_map(|e| {
            e["published"]
                .as_array()
                .unwrap()
                .iter()
                .map(|d| d.as_str().unwrap().to_string())
                .collect::<Vec<_>>()
        })
        .collect()
}

/// Days `status --json` reports in `state`, with their reasons.
fn status_days(pipeline: &Path, extra: &[&str], state: &str) -> BTreeMap<String, Vec<String>> {
    let mut args = vec!["status", pipeline.to_str().unwrap(), "--json"];
    args.extend_from_slice(extra);
    let r = run(&args);
    assert_eq!(r.code, Some(0), "{}{}", r.stdout, r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    v["days"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|d| d["state"] == state)
        .map(|d| {
            (
                d["date"].as_str().unwrap().to_string(),
                d["reasons"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|x| x.as_str().unwrap().to_string())
                    .collect(),
            )
        })
        .collect()
}

/// Days from `a` to `b` inclusive.
fn span(a: &str, b: &str) -> BTreeSet<String> {
    let (a, b) = (day(a), day(b));
    (a.0..=b.0).map(|d| chrono_free::Day(d).show()).collect()
}

/// A small deterministic generator for kill moments (xorshift64*).
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
}

#[test]
fn killed_runs_leave_no_partial_output_and_rerun_to_identical_results() {
    let dir = tempfile::tempdir().unwrap();
    let world = full_world(dir.path());
    let reference_out = dir.path().join("reference");
    let out = dir.path().join("out");
    let pipeline = dir.path().join("p.yaml");
    std::fs::write(
        &pipeline,
        pipeline_text(&world, &out, "seconds_played / 60.0"),
    )
    .unwrap();
    let p = pipeline.to_str().unwrap();
    let range = ["--from", "2026-03-18", "--until", "2026-03-30"];

    // The uninterrupted run.
    let t0 = std::time::Instant::now();
    let mut args = vec!["run", p, "--out", reference_out.to_str().unwrap()];
    args.extend_from_slice(&range);
    let r = run(&args);
    assert_eq!(r.code, Some(0), "{}{}", r.stdout, r.stderr);
    let whole = t0.elapsed();
    let reference = snapshot_rows(&reference_out.join("snapshots"));
    assert_eq!(reference.len(), 13);
    let expected_rows: BTreeMap<String, usize> = reference
        .iter()
        .map(|(d, r)| (d.clone(), r.len()))
        .collect();

    // A reader polls the snapshot folders the whole time: every file it can see must open
    // as whole Parquet with the snapshot's full row count.
    let stop = Arc::new(AtomicBool::new(false));
    let seen = Arc::new(AtomicU64::new(0));
    let bad = Arc::new(Mutex::new(Vec::<String>::new()));
    let reader = {
        let (stop, seen, bad) = (stop.clone(), seen.clone(), bad.clone());
        let dir = out.join("snapshots");
        let expected_rows = expected_rows.clone();
        std::thread::spawn(move || {
            while !stop.load(Ordering::SeqCst) {
                let Ok(parts) = std::fs::read_dir(&dir) else {
                    continue;
                };
                for part in parts.flatten() {
                    let name = part.file_name().to_string_lossy().to_string();
                    let Some(d) = name.strip_prefix("dt=") else {
                        continue;
                    };
                    let Ok(files) = std::fs::read_dir(part.path()) else {
                        continue;
                    };
                    for f in files.flatten() {
                        let path = f.path();
                        if std::fs::File::open(&path).is_err() {
                            continue; // removed between listing and opening
                        }
                        seen.fetch_add(1, Ordering::SeqCst);
                        match read_rows(&path) {
                            Ok(rows) if Some(&rows.len()) == expected_rows.get(d) => {}
                            Ok(rows) => bad.lock().unwrap().push(format!(
                                "{}: {} rows",
                                path.display(),
                                rows.len()
                            )),
                            Err(e) => bad.lock().unwrap().push(format!("{}: {e}", path.display())),
                        }
                    }
                }
            }
        })
    };

    // 20 SIGKILLs at seeded random moments; each killed run is followed by another run on
    // the same output, so the backfill advances across kills.
    let mut rng = Rng(0x5eed_2026);
    let mut args = vec!["run", p, "--log-format", "json"];
    args.extend_from_slice(&range);
    let mut kills = 0;
    let mut finished_on_their_own = 0;
    let mut takeovers = 0;
    let mut attempts = 0;
    while kills < 20 {
        attempts += 1;
        assert!(attempts < 200, "the runs kept finishing before their kill");
        let delay = whole.mul_f64((rng.next() % 1000) as f64 / 1000.0 * 0.6);
        let mut child = daymark()
            .args(&args)
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(delay);
        let done_already = child.try_wait().unwrap().is_some();
        if !done_already {
            child.kill().unwrap(); // SIGKILL
            kills += 1;
        }
        let status = child.wait().unwrap();
        let mut text = String::new();
        child
            .stdout
            .take()
            .unwrap()
            .read_to_string(&mut text)
            .unwrap();
        takeovers += text.matches("took over the lock").count();
        if done_already {
            // It finished: its output must already equal the reference; then start over so
            // that the remaining kills again land in a backfill.
            assert!(matches!(status.code(), Some(0) | Some(10)), "{text}");
            finished_on_their_own += 1;
            assert_same(
                &snapshot_rows(&out.join("snapshots")),
                &reference,
                "finished run",
            );
            std::fs::remove_dir_all(&out).unwrap();
        }
    }
    // Re-run to the end.
    let r = run(&args);
    assert!(
        matches!(r.code, Some(0) | Some(10)),
        "{}{}",
        r.stdout,
        r.stderr
    );
    takeovers += r.stdout.matches("took over the lock").count();
    let again = run(&args);
    assert_eq!(
        again.code,
        Some(10),
        "a second run finds nothing due: {}",
        again.stdout
    );
    stop.store(true, Ordering::SeqCst);
    reader.join().unwrap();

    assert_same(
        &snapshot_rows(&out.join("snapshots")),
        &reference,
        "after the kills",
    );
    assert!(
        bad.lock().unwrap().is_empty(),
        "partial snapshots seen: {:?}",
        bad.lock().unwrap()
    );
    assert!(
        seen.load(Ordering::SeqCst) > 0,
        "the reader saw no snapshot at all"
    );
    // A killed run leaves its lock behind; the next run on this host takes it over.
    assert!(takeovers > 0);
    // No staging file is left once a run has finished.
    let staging: Vec<_> = std::fs::read_dir(out.join("_staging"))
        .map(|d| d.flatten().collect())
        .unwrap_or_default();
    assert!(staging.is_empty(), "{staging:?}");
    eprintln!(
        "kills {kills}, runs that finished before their kill {finished_on_their_own}, takeovers {takeovers}, reader checks {}",
        seen.load(Ordering::SeqCst)
    );
}

#[test]
fn two_runs_at_once_only_one_writes() {
    let dir = tempfile::tempdir().unwrap();
    let world = full_world(dir.path());
    let out = dir.path().join("out");
    let pipeline = dir.path().join("p.yaml");
    std::fs::write(
        &pipeline,
        pipeline_text(&world, &out, "seconds_played / 60.0"),
    )
    .unwrap();
    let p = pipeline.to_str().unwrap();
    let args = [
        "run",
        p,
        "--from",
        "2026-03-20",
        "--until",
        "2026-03-30",
        "--log-format",
        "json",
    ];
    let spawn = || {
        daymark()
            .args(args)
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap()
    };
    let (a, b) = (spawn(), spawn());
    let (a, b) = (a.wait_with_output().unwrap(), b.wait_with_output().unwrap());
    let mut codes = vec![a.status.code().unwrap(), b.status.code().unwrap()];
    codes.sort();
    assert_eq!(
        codes,
        vec![0, 12],
        "{}\n{}",
        String::from_utf8_lossy(&a.stdout),
        String::from_utf8_lossy(&b.stdout)
    );
    let loser = if a.status.code() == Some(12) { &a } else { &b };
    assert!(String::from_utf8_lossy(&loser.stdout).contains("lock_held"));
    // Every ledger entry was written by one run.
    let mut runs = BTreeSet::new();
    let mut entries = 0;
    for d in std::fs::read_dir(out.join("_ledger/snapshot")).unwrap() {
        for f in std::fs::read_dir(d.unwrap().path()).unwrap() {
            let v: serde_json::Value =
                serde_json::from_slice(&std::fs::read(f.unwrap().path()).unwrap()).unwrap();
            runs.insert(v["run_id"].as_str().unwrap().to_string());
            entries += 1;
        }
    }
    assert_eq!(entries, 11);
    assert_eq!(runs.len(), 1, "{runs:?}");
    assert!(
        !out.join("_lock/owner.json").exists(),
        "the lock is released"
    );

    // With --wait the second run waits for the first, then finds nothing due.
    let out2 = dir.path().join("out2");
    let args2 = [
        "run",
        p,
        "--from",
        "2026-03-20",
        "--until",
        "2026-03-30",
        "--out",
        out2.to_str().unwrap(),
    ];
    let mut first = daymark().args(args2).stdout(Stdio::null()).spawn().unwrap();
    // Start the waiting run once the first holds the lock (or has already finished).
    while !out2.join("_lock/owner.json").exists() && first.try_wait().unwrap().is_none() {
        std::thread::sleep(std::time::Duration::from_millis(10));
    }
    let mut second_args = args2.to_vec();
    second_args.push("--wait");
    let second = daymark().args(&second_args).output().unwrap();
    let first = first.wait_with_output().unwrap();
    assert_eq!(first.status.code(), Some(0));
    assert_eq!(
        second.status.code(),
        Some(10),
        "{}",
        String::from_utf8_lossy(&second.stdout)
    );
}

#[test]
fn a_changed_feature_makes_exactly_its_snapshots_stale() {
    let dir = tempfile::tempdir().unwrap();
    let world = full_world(dir.path());
    let out = dir.path().join("out");
    let pipeline = dir.path().join("p.yaml");
    std::fs::write(
        &pipeline,
        pipeline_text(&world, &out, "seconds_played / 60.0"),
    )
    .unwrap();
    let p = pipeline.to_str().unwrap();
    let range = ["--from", "2026-03-18", "--until", "2026-03-25"];
    let mut args = vec!["run", p, "--log-format", "json"];
    args.extend_from_slice(&range);
    let r = run(&args);
    assert_eq!(r.code, Some(0), "{}{}", r.stdout, r.stderr);
    assert_eq!(published(&r), span("2026-03-18", "2026-03-25"));
    let before = snapshot_rows(&out.join("snapshots"));

    // A description is not part of any hash: nothing becomes stale.
    let text = std::fs::read_to_string(&pipeline).unwrap();
    std::fs::write(
        &pipeline,
        text.replace("Small pipeline for the runner tests.", "Reworded."),
    )
    .unwrap();
    assert!(status_days(&pipeline, &range, "stale").is_empty());

    // Minutes become half-minutes: only minutes_watched_7d changes.
    std::fs::write(
        &pipeline,
        pipeline_text(&world, &out, "seconds_played / 30.0"),
    )
    .unwrap();
    let stale = status_days(&pipeline, &range, "stale");
    assert_eq!(
        stale.keys().cloned().collect::<BTreeSet<_>>(),
        span("2026-03-18", "2026-03-25")
    );
    for reasons in stale.values() {
        assert_eq!(
            reasons,
            &vec!["pipeline: feature(s) changed: minutes_watched_7d".to_string()]
        );
    }
    // A run limited to the first four days rebuilds those, and only those.
    let r = run(&[
        "run",
        p,
        "--from",
        "2026-03-18",
        "--until",
        "2026-03-21",
        "--log-format",
        "json",
    ]);
    assert_eq!(r.code, Some(0), "{}{}", r.stdout, r.stderr);
    assert_eq!(published(&r), span("2026-03-18", "2026-03-21"));
    let stale = status_days(&pipeline, &range, "stale");
    assert_eq!(
        stale.keys().cloned().collect::<BTreeSet<_>>(),
        span("2026-03-22", "2026-03-25")
    );
    let r = run(&args);
    assert_eq!(published(&r), span("2026-03-22", "2026-03-25"));
    assert_eq!(run(&args).code, Some(10));

    // The rebuilt snapshots equal a fresh build of the changed pipeline, and differ from
    // the old ones exactly in the changed column (column 4: key, date, plays_7d, minutes).
    let fresh = dir.path().join("fresh");
    let mut fresh_args = vec!["run", p, "--out", fresh.to_str().unwrap()];
    fresh_args.extend_from_slice(&range);
    assert_eq!(run(&fresh_args).code, Some(0));
    let after = snapshot_rows(&out.join("snapshots"));
    assert_same(
        &after,
        &snapshot_rows(&fresh.join("snapshots")),
        "rebuilt vs fresh",
    );
    for (d, rows) in &after {
        let old = &before[d];
        assert_eq!(rows.len(), old.len());
        let strip = |r: &String| {
            let mut c: Vec<&str> = r.split('|').collect();
            c.remove(3);
            c.join("|")
        };
        let mut a: Vec<String> = rows.iter().map(strip).collect();
        let mut b: Vec<String> = old.iter().map(strip).collect();
        a.sort();
        b.sort();
        assert!(a == b, "{d}: only minutes_watched_7d changes");
        assert!(rows != old, "{d}: minutes_watched_7d did change");
    }
}

#[test]
fn late_data_makes_event_time_snapshots_stale_and_leaves_as_known_ones_valid() {
    let dir = tempfile::tempdir().unwrap();
    let full = full_world(dir.path());
    let world = dir.path().join("world");
    cut_world(&full, &world, "2026-03-25");
    let out = dir.path().join("out");
    let pipeline = dir.path().join("p.yaml");
    std::fs::write(
        &pipeline,
        pipeline_text(&world, &out, "seconds_played / 60.0"),
    )
    .unwrap();
    let p = pipeline.to_str().unwrap();
    let range = ["--from", "2026-03-12", "--until", "2026-03-25"];
    let with = |mode: &'static str| {
        let mut a: Vec<&str> = vec!["run", p, "--knowledge", mode, "--log-format", "json"];
        a.extend_from_slice(&range);
        a
    };
    for mode in ["event-time", "as-known"] {
        let r = run(&with(mode));
        assert_eq!(r.code, Some(0), "{}{}", r.stdout, r.stderr);
        assert_eq!(published(&r).len(), 14);
    }
    let et_before = snapshot_rows(&out.join("snapshots-event-time"));
    let ak_dir = out.join("snapshots-as-known");
    let ak_bytes_before: BTreeMap<String, Vec<u8>> = span("2026-03-12", "2026-03-25")
        .into_iter()
        .map(|d| {
            let b = std::fs::read(ak_dir.join(format!("dt={d}/part-0.parquet"))).unwrap();
            (d, b)
        })
        .collect();

    // The late files that arrived on 2026-03-26 in older partitions land (not yet the
    // on-time files of the 26th, and no new marker).
    let touched = land(&full, &world, "2026-03-26", false);
    let late_plays: BTreeSet<String> = touched
        .iter()
        .filter_map(|t| t.strip_prefix("plays/").map(str::to_string))
        .filter(|t| t.as_str() <= "dt=2026-03-25")
        .collect();
    assert!(
        !late_plays.is_empty(),
        "the world has late plays: {touched:?}"
    );

    let mut et_args = vec!["--knowledge", "event-time"];
    et_args.extend_from_slice(&range);
    let stale = status_days(&pipeline, &et_args, "stale");
    assert!(!stale.is_empty());
    for (d, reasons) in &stale {
        // Each reason names a partition that received a late file.
        assert_eq!(reasons.len(), 1, "{d}: {reasons:?}");
        assert!(
            reasons[0].starts_with("inputs: plays dt="),
            "{d}: {reasons:?}"
        );
        assert!(
            late_plays
                .iter()
                .any(|part| reasons[0].contains(part.as_str())),
            "{d}: {reasons:?} names none of {late_plays:?}"
        );
    }
    let mut ak_args = vec!["--knowledge", "as-known"];
    ak_args.extend_from_slice(&range);
    assert!(status_days(&pipeline, &ak_args, "stale").is_empty());

    // The event-time run rebuilds exactly the stale days; the as-known run has nothing due.
    let r = run(&with("event-time"));
    assert_eq!(r.code, Some(0), "{}{}", r.stdout, r.stderr);
    assert_eq!(published(&r), stale.keys().cloned().collect());
    let r = run(&with("as-known"));
    assert_eq!(r.code, Some(10), "{}{}", r.stdout, r.stderr);
    for (d, bytes) in &ak_bytes_before {
        let now = std::fs::read(ak_dir.join(format!("dt={d}/part-0.parquet"))).unwrap();
        assert!(&now == bytes, "as-known snapshot {d} changed");
    }

    // Both outputs equal fresh builds on the world with the late files: nothing stale was
    // missed, and the late rows really are invisible to as-known.
    let fresh = dir.path().join("fresh");
    for mode in ["event-time", "as-known"] {
        let mut a = with(mode);
        a.extend_from_slice(&["--out", fresh.to_str().unwrap()]);
        assert_eq!(run(&a).code, Some(0));
    }
    let et_after = snapshot_rows(&out.join("snapshots-event-time"));
    assert_same(
        &et_after,
        &snapshot_rows(&fresh.join("snapshots-event-time")),
        "event-time vs fresh",
    );
    assert_same(
        &snapshot_rows(&ak_dir),
        &snapshot_rows(&fresh.join("snapshots-as-known")),
        "as-known vs fresh",
    );
    // The late rows changed at least one event-time snapshot, and only stale days changed.
    let changed: BTreeSet<String> = et_after
        .iter()
        .filter(|(d, rows)| et_before.get(*d) != Some(rows))
        .map(|(d, _)| d.clone())
        .collect();
    assert!(!changed.is_empty());
    assert!(changed.iter().all(|d| stale.contains_key(d)), "{changed:?}");
}

fn http_get(addr: &str, path: &str) -> (String, String) {
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    write!(s, "GET {path} HTTP/1.1\r\nHost: {addr}\r\n\r\n").unwrap();
    let mut text = String::new();
    s.read_to_string(&mut text).unwrap();
    let (head, body) = text.split_once("\r\n\r\n").unwrap();
    (head.lines().next().unwrap().to_string(), body.to_string())
}

fn metric(body: &str, name: &str) -> f64 {
    body.lines()
        .find_map(|l| l.strip_prefix(&format!("{name} ")))
        .unwrap_or_else(|| panic!("{name} missing from\n{body}"))
        .parse()
        .unwrap()
}

/// Polls `/metrics` until `ok` holds (a guard against hanging, not a timing check).
fn wait_for_metrics(addr: &str, ok: impl Fn(&str) -> bool) -> String {
    for _ in 0..600 {
        let (_, body) = http_get(addr, "/metrics");
        if ok(&body) {
            return body;
        }
        std::thread::sleep(std::time::Duration::from_millis(200));
    }
    panic!("the watch never got there");
}

#[test]
fn watch_publishes_newly_landed_days_and_stops_on_sigterm() {
    let dir = tempfile::tempdir().unwrap();
    let full = full_world(dir.path());
    let world = dir.path().join("world");
    cut_world(&full, &world, "2026-03-26");
    let out = dir.path().join("out");
    let pipeline = dir.path().join("p.yaml");
    std::fs::write(
        &pipeline,
        pipeline_text(&world, &out, "seconds_played / 60.0"),
    )
    .unwrap();
    let mut child = daymark()
        .args([
            "watch",
            pipeline.to_str().unwrap(),
            "--from",
            "2026-03-25",
            "--interval",
            "1s",
            "--listen",
            "127.0.0.1:0",
            "--log-format",
            "json",
        ])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut lines = std::io::BufReader::new(child.stdout.take().unwrap()).lines();
    let addr = loop {
        let line = lines.next().expect("watch printed its address").unwrap();
        let v: serde_json::Value = serde_json::from_str(&line).unwrap();
        if v["event"] == "listening" {
            break v["address"].as_str().unwrap().to_string();
        }
    };
    let rest = std::thread::spawn(move || lines.map_while(Result::ok).collect::<Vec<_>>());
    let (status, body) = http_get(&addr, "/health");
    assert_eq!(status, "HTTP/1.1 200 OK");
    assert!(body.contains("\"status\":\"ok\""), "{body}");
    assert_eq!(http_get(&addr, "/nothing").0, "HTTP/1.1 404 Not Found");

    // The two days already complete are published first.
    let body = wait_for_metrics(&addr, |b| {
        b.contains("daymark_last_published_snapshot{date=\"2026-03-26\"} 1")
    });
    assert_eq!(metric(&body, "daymark_snapshots_published_total"), 2.0);

    // Two new days land, each with its marker last.
    land(&full, &world, "2026-03-27", true);
    land(&full, &world, "2026-03-28", true);
    let body = wait_for_metrics(&addr, |b| {
        b.contains("daymark_last_published_snapshot{date=\"2026-03-28\"} 1")
    });
    assert_eq!(metric(&body, "daymark_snapshots_published_total"), 4.0);
    assert_eq!(metric(&body, "daymark_run_failures_total"), 0.0);
    // 2026-03-28 00:00 UTC as Unix time (2026-03-28 is day 20540 since 1970-01-01).
    assert_eq!(
        metric(&body, "daymark_last_published_snapshot_date_seconds"),
        20540.0 * 86400.0
    );
    for d in ["2026-03-27", "2026-03-28"] {
        assert!(out
            .join(format!("snapshots/dt={d}/part-0.parquet"))
            .exists());
    }

    let kill = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(kill.success());
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(0));
    let lines = rest.join().unwrap();
    assert!(
        lines.iter().any(|l| l.contains("\"event\":\"stopped\"")),
        "{lines:?}"
    );
    assert!(!out.join("_lock/owner.json").exists());
}

#[test]
fn a_run_back_fills_matured_labels_once() {
    let dir = tempfile::tempdir().unwrap();
    let world = full_world(dir.path());
    let out = dir.path().join("out");
    let pipeline = dir.path().join("p.yaml");
    // The small pipeline plus the subscription log and a churn label of 5 days + 2 days grace.
    let text = pipeline_text(&world, &out, "seconds_played / 60.0").replace(
        "population:",
        &format!(
            "  subscriptions:\n    location: {}/subscriptions\n    event_time: changed_at\n    arrival_time: arrived_at\n    dedupe_on: [change_id]\npopulation:",
            world.display()
        ),
    ) + "label:\n  name: churned_5d\n  source: subscriptions\n  horizon: 5d\n  grace: 2d\n  ended: kind = 'ended'\n  resumed: kind IN ('resumed', 'started')\n";
    std::fs::write(&pipeline, text).unwrap();
    let p = pipeline.to_str().unwrap();
    let args = [
        "run",
        p,
        "--from",
        "2026-03-20",
        "--until",
        "2026-03-28",
        "--log-format",
        "json",
    ];
    let first = run(&args);
    assert_eq!(first.code, Some(0), "{}\n{}", first.stdout, first.stderr);
    // Every partition up to 2026-03-30 (UTC) carries its completeness marker, so the label
    // of day D (window up to the cutoff of D + 7, 00:00 Chicago = 05:00 UTC of D + 7) has
    // matured exactly for D + 7 <= 2026-03-30: the days 03-20 to 03-23.
    let labelled: BTreeSet<String> = std::fs::read_dir(out.join("labels"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with("dt="))
        .collect();
    let expected: BTreeSet<String> = ["20", "21", "22", "23"]
        .iter()
        .map(|d| format!("dt=2026-03-{d}"))
        .collect();
    assert_eq!(labelled, expected);
    let ev = events(&first);
    let labels = ev.iter().find(|e| e["event"] == "labels").unwrap();
    assert_eq!(labels["written"], 4, "{labels}");
    assert_eq!(labels["pending"], 5, "{labels}");
    // One label row per snapshot row, and one ledger entry per label file.
    for d in &expected {
        let snap = read_rows(&out.join("snapshots").join(d).join("part-0.parquet")).unwrap();
        let lab = read_rows(&out.join("labels").join(d).join("part-0.parquet")).unwrap();
        assert_eq!(snap.len(), lab.len(), "{d}");
    }
    let entries: usize = std::fs::read_dir(out.join("_ledger/labels"))
        .unwrap()
        .map(|d| std::fs::read_dir(d.unwrap().path()).unwrap().count())
        .sum();
    assert_eq!(entries, 4);
    // Nothing is due right after: exit 10, no file rewritten.
    let before = std::fs::metadata(out.join("labels/dt=2026-03-20/part-0.parquet"))
        .unwrap()
        .modified()
        .unwrap();
    let second = run(&args);
    assert_eq!(
        second.code,
        Some(10),
        "{}\n{}",
        second.stdout,
        second.stderr
    );
    let after = std::fs::metadata(out.join("labels/dt=2026-03-20/part-0.parquet"))
        .unwrap()
        .modified()
        .unwrap();
    assert_eq!(before, after);
}

/// Every plan of a daily run (tiles, a backfill, drift and population checks, labels) and
/// of an audit (naive recomputation, label scan, leakage checks) runs the same when sent
/// through DataFusion's protobuf and decoded where only built-in functions are known, as on
/// a cluster (`DAYMARK_PLANS_THROUGH_PROTOBUF=1`, crate `daymark-codec`): same snapshots,
/// same labels, same audit verdicts.
#[test]
fn every_plan_of_a_run_and_an_audit_survives_protobuf() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let generated = run(&[
        "generate",
        "--out",
        world.to_str().unwrap(),
        "--customers",
        "100",
        "--days",
        "75",
        "--start",
        "2026-01-01",
        "--seed",
        "21",
    ]);
    assert_eq!(generated.code, Some(0), "{}", generated.stderr);
    let demo = std::fs::read_to_string(
        Path::new(
            &std::env::var("CARGO_MANIFEST_DIR")
                .unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into()),
        )
        .join("../../pipelines/demo.yaml"),
    )
    .unwrap()
    .replace("../demo-data/world/", &format!("{}/", world.display()));
    let pipeline = dir.path().join("demo.yaml");
    std::fs::write(&pipeline, demo).unwrap();
    let p = pipeline.to_str().unwrap();

    let mut outputs = Vec::new();
    for shipped in [false, true] {
        let out = dir
            .path()
            .join(if shipped { "shipped" } else { "in-place" });
        let o = out.to_str().unwrap();
        let with_env = |args: &[&str]| {
            let mut c = daymark();
            c.args(args);
            if shipped {
                c.env("DAYMARK_PLANS_THROUGH_PROTOBUF", "1");
            }
            let r = c.output().unwrap();
            (
                r.status.code(),
                String::from_utf8_lossy(&r.stdout).into_owned(),
                String::from_utf8_lossy(&r.stderr).into_owned(),
            )
        };
        let args = [
            "run",
            p,
            "--out",
            o,
            "--from",
            "2026-01-20",
            "--until",
            "2026-01-26",
        ];
        let (code, stdout, stderr) = with_env(&args);
        assert_eq!(code, Some(0), "{stdout}\n{stderr}");
        let audit = [
            "audit",
            p,
            "--outputs",
            o,
            "--json",
            "--sample",
            "30",
            "--sample-days",
            "2",
        ];
        let (code, audit_out, audit_err) = with_env(&audit);
        assert!(code.is_some(), "{audit_err}");
        if shipped {
            // The tally names daymark's functions: they arrived by the codec.
            for text in [&stderr, &audit_err] {
                let tally = text
                    .lines()
                    .find(|l| l.starts_with("DAYMARK_PLANS_THROUGH_PROTOBUF: "))
                    .unwrap_or_else(|| panic!("no tally in {text}"));
                let plans: u64 = tally
                    .trim_start_matches("DAYMARK_PLANS_THROUGH_PROTOBUF: ")
                    .split(' ')
                    .next()
                    .unwrap()
                    .parse()
                    .unwrap();
                assert!(plans >= 5, "{tally}");
            }
            assert!(stderr.contains("daymark_first_copy"), "{stderr}");
        } else {
            assert!(!stderr.contains("DAYMARK_PLANS_THROUGH_PROTOBUF"));
        }
        outputs.push((out, code, audit_out));
    }
    let (a, b) = (&outputs[0], &outputs[1]);
    let snapshots = snapshot_rows(&a.0.join("snapshots"));
    assert_eq!(snapshots.len(), 7);
    assert_same(
        &snapshots,
        &snapshot_rows(&b.0.join("snapshots")),
        "snapshots",
    );
    let labels = snapshot_rows(&a.0.join("labels"));
    assert!(!labels.is_empty());
    assert_same(&labels, &snapshot_rows(&b.0.join("labels")), "labels");
    assert_eq!(a.1, b.1, "audit exit codes");
    let verdicts = |text: &str| {
        let mut v: serde_json::Value = serde_json::from_str(text).unwrap();
        strip_volatile(&mut v);
        let mut flat = BTreeMap::new();
        flatten("", &v, &mut flat);
        flat
    };
    let (x, y) = (verdicts(&a.2), verdicts(&b.2));
    let differ: Vec<String> = x
        .keys()
        .chain(y.keys())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .filter(|k| match (x.get(*k), y.get(*k)) {
            (Some(Ok(p)), Some(Ok(q))) => (p - q).abs() > 1e-9 * p.abs().max(q.abs()).max(1e-9),
            (p, q) => p != q,
        })
        .map(|k| format!("{k}: {:?} vs {:?}", x.get(k), y.get(k)))
        .collect();
    assert!(differ.is_empty(), "audit: {differ:#?}");
    assert!(x.len() > 50, "{x:?}");
}

/// `v` as (path, value) pairs: numbers as numbers (compared to 1e-9 relative: sums of
/// doubles are combined in parallel), anything else as text.
fn flatten(path: &str, v: &serde_json::Value, out: &mut BTreeMap<String, Result<f64, String>>) {
    match v {
        serde_json::Value::Object(m) => m
            .iter()
            .for_each(|(k, x)| flatten(&format!("{path}/{k}"), x, out)),
        serde_json::Value::Array(a) => a
            .iter()
            .enumerate()
            .for_each(|(i, x)| flatten(&format!("{path}/{i}"), x, out)),
        serde_json::Value::Number(n) => {
            out.insert(path.into(), n.as_f64().ok_or_else(|| n.to_string()));
        }
        other => {
            out.insert(path.into(), Err(other.to_string()));
        }
    }
}

/// Removes what differs between two runs of the same audit: timings and output paths.
fn strip_volatile(v: &mut serde_json::Value) {
    match v {
        serde_json::Value::Object(m) => {
            m.retain(|k, _| !k.contains("seconds") && !k.contains("elapsed") && k != "outputs");
            m.values_mut().for_each(strip_volatile);
        }
        serde_json::Value::Array(a) => a.iter_mut().for_each(strip_volatile),
        _ => {}
    }
}
