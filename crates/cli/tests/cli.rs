//! The `daymark` binary end to end: generate a small world, check and explain the demo
//! pipeline on it, and refuse broken input with the documented exit codes.

use std::path::{Path, PathBuf};
use std::process::Command;

/// The crate's folder, read when the test runs (`cargo test` sets it): a test binary
/// reused from a shared target folder keeps the compile-time path of the checkout that
/// built it, which may be gone.
fn manifest_dir() -> String {
    std::env::var("CARGO_MANIFEST_DIR").unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into())
}

fn daymark() -> Command {
    Command::new(env!("CARGO_BIN_EXE_daymark"))
}

fn demo_pipeline_for(world: &Path) -> String {
    let text =
        std::fs::read_to_string(PathBuf::from(manifest_dir()).join("../../pipelines/demo.yaml"))
            .unwrap();
    text.replace("../demo-data/world/", &format!("{}/", world.display()))
}

#[test]
fn generate_then_check_and_explain_the_demo_pipeline() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let out = daymark()
        .args([
            "generate",
            "--out",
            world.to_str().unwrap(),
            "--customers",
            "300",
            "--days",
            "40",
            "--start",
            "2026-02-20",
            "--seed",
            "9",
        ])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let pipeline = dir.path().join("demo.yaml");
    std::fs::write(&pipeline, demo_pipeline_for(&world)).unwrap();

    let out = daymark()
        .args(["check", pipeline.to_str().unwrap()])
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{stdout}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        stdout.contains("40 day partitions 2026-02-20 .. 2026-03-31 (no missing days)"),
        "{stdout}"
    );
    assert!(stdout.contains("features (36):"), "{stdout}");
    assert!(stdout.contains("ok: no problems found"));
    assert!(
        stdout.contains("complete up to 2026-04-01T00:00:00Z (end of dt=2026-03-31, the newest partition marked _complete)"),
        "{stdout}"
    );

    // The JSON report agrees with the files on disk.
    let out = daymark()
        .args(["check", pipeline.to_str().unwrap(), "--json"])
        .output()
        .unwrap();
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let plays = &report["sources"]["plays"];
    assert_eq!(plays["partitions"], 40);
    let files_on_disk = walk(&world.join("plays")).len() as u64;
    assert_eq!(plays["files"].as_u64().unwrap(), files_on_disk);
    assert_eq!(report["features"].as_array().unwrap().len(), 36);
    // Every partition 02-20 .. 03-31 carries `_complete`: complete up to the end of 03-31 UTC.
    assert_eq!(
        plays["watermark"],
        serde_json::json!({"at": "2026-04-01T00:00:00Z", "basis": "marker", "day": "2026-03-31"})
    );

    // explain plans the snapshot across the daylight-saving change (2026-03-08 in Chicago).
    let out = daymark()
        .args([
            "explain",
            pipeline.to_str().unwrap(),
            "--date",
            "2026-03-09",
            "--plan",
        ])
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(stdout.contains("cutoff 2026-03-09T05:00:00Z"), "{stdout}");
    assert!(stdout.contains("DataFusion's optimised logical plan"));
    // The 7-day window starts at local midnight seven days earlier, still in winter time.
    assert!(stdout.contains("2026-03-02T06:00:00.000000Z"), "{stdout}");

    // A build reads the raw partitions once; the next day's build reads only the new
    // partition of each source (a day reads partitions up to its own: rows are filed by
    // event day, and a snapshot sees event days before its own).
    let out_dir = dir.path().join("out");
    let build_events = |day: &str| {
        let out = daymark()
            .args([
                "build",
                pipeline.to_str().unwrap(),
                "--date",
                day,
                "--out",
                out_dir.to_str().unwrap(),
                "--log-format",
                "json",
            ])
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout)
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect::<Vec<serde_json::Value>>()
    };
    let build = |day: &str| {
        build_events(day)
            .into_iter()
            .find(|e| e["event"] == "read")
            .unwrap()
    };
    let first = build("2026-03-30");
    assert!(first["raw_files"].as_u64().unwrap() > 100, "{first}");
    assert_eq!(first["partitions_reused"], 0);
    // The first build reads every raw footer (schemas and row counts); later ones take
    // the footers of unchanged files from the output store's footer cache and read one
    // footer per source for its schema.
    let sources = ["plays", "subscriptions", "support"];
    let all_files: u64 = sources
        .iter()
        .map(|s| walk(&world.join(s)).len() as u64)
        .sum();
    assert_eq!(first["footers_read"].as_u64(), Some(all_files), "{first}");
    assert_eq!(first["footers_cached"], 0, "{first}");
    let second = build("2026-03-31");
    let new_files: u64 = sources
        .iter()
        .map(|s| {
            let part = world.join(s).join("dt=2026-03-31");
            if part.exists() {
                walk(&part).len() as u64
            } else {
                0
            }
        })
        .sum();
    assert!(new_files > 0);
    assert_eq!(second["raw_files"].as_u64(), Some(new_files), "{second}");
    assert!(
        second["partitions_built"].as_u64().unwrap() <= 3,
        "{second}"
    );
    assert!(second["partitions_reused"].as_u64().unwrap() > 40);
    assert_eq!(
        second["footers_read"].as_u64(),
        Some(sources.len() as u64),
        "{second}"
    );
    assert_eq!(
        second["footers_cached"].as_u64(),
        Some(all_files),
        "{second}"
    );
    let snapshot = out_dir.join("snapshots/dt=2026-03-31/part-0.parquet");
    let published = std::fs::read(&snapshot).unwrap();
    // A rerun reads no raw file and publishes the same bytes (float sums are added
    // exactly, so the order parallel aggregation merges them in does not show).
    let third = build("2026-03-31");
    assert_eq!(third["raw_files"], 0, "{third}");
    assert_eq!(third["partitions_built"], 0, "{third}");
    assert!(
        std::fs::read(&snapshot).unwrap() == published,
        "a rerun changed {}",
        snapshot.display()
    );
    assert!(out_dir.join("snapshots/_features.json").exists());

    // `build` takes the output lock that `run` and `watch` take: while another process
    // holds it, nothing is built (exit code 12); an expired lock is taken over.
    let lock = out_dir.join("_lock/owner.json");
    let lock_text = |expires: &str| {
        serde_json::json!({"owner": "20260101T000000.000000Z-1", "host": "another-host", "pid": 1,
            "command": "run", "started": "2026-01-01T00:00:00+00:00", "expires": expires})
        .to_string()
    };
    std::fs::create_dir_all(lock.parent().unwrap()).unwrap();
    std::fs::write(&lock, lock_text("2999-01-01T00:00:00+00:00")).unwrap();
    let held = daymark()
        .args(["build", pipeline.to_str().unwrap(), "--date", "2026-03-29"])
        .args(["--out", out_dir.to_str().unwrap()])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&held.stderr);
    assert_eq!(held.status.code(), Some(12), "{stderr}");
    assert!(
        stderr.contains("another run holds the output lock: `daymark run` (run 20260101T000000.000000Z-1, process 1 on another-host"),
        "{stderr}"
    );
    assert!(!out_dir.join("snapshots/dt=2026-03-29").exists());
    std::fs::write(&lock, lock_text("2026-01-01T00:02:00+00:00")).unwrap();
    let taken = daymark()
        .args(["build", pipeline.to_str().unwrap(), "--date", "2026-03-29"])
        .args(["--out", out_dir.to_str().unwrap()])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&taken.stderr);
    assert_eq!(taken.status.code(), Some(0), "{stderr}");
    assert!(
        stderr.contains("took over the lock of `daymark run`")
            && stderr.contains("its lease ended at 2026-01-01T00:02:00+00:00"),
        "{stderr}"
    );
    assert!(out_dir
        .join("snapshots/dt=2026-03-29/part-0.parquet")
        .exists());
    assert!(!lock.exists(), "the lock is released");

    // A changed definition gives the plays tiles a new folder; `tidy` lists the old ones
    // (and only those) and removes them with `--apply`, under the lock.
    let edited = std::fs::read_to_string(&pipeline)
        .unwrap()
        .replace("expr: seconds_played / 60.0", "expr: seconds_played / 60");
    assert!(edited.contains("seconds_played / 60\n"));
    std::fs::write(&pipeline, edited).unwrap();
    let events = build_events("2026-03-31");
    let rebuilt = events.iter().find(|e| e["event"] == "read").unwrap();
    // Every plays partition again (40 days), nothing of the other sources.
    assert_eq!(rebuilt["partitions_built"], 40, "{rebuilt}");
    // The published days before it hold minutes_watched as a double, now it is an integer:
    // the daily drift checks leave the changed features out (they are not drift) instead
    // of failing to read the published days.
    let snapshot = events.iter().find(|e| e["event"] == "snapshot").unwrap();
    let warnings: Vec<&str> = snapshot["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap())
        .collect();
    // The features of pipelines/demo.yaml over `seconds_played / 60.0`, and the ones
    // derived from them (a derived feature's hash covers its operands).
    let changed = "minutes_watched_7d, minutes_watched_28d, minutes_watched_91d, phone_minutes_7d, phone_minutes_28d, tv_minutes_28d, longest_play_minutes_28d, minutes_watched_28d_log, minutes_trend_7_28, minutes_per_play_28d";
    assert_eq!(
        warnings,
        [
            format!("drift: {changed} not compared with the previous day 2026-03-30: built under another definition"),
            format!("drift: {changed} not compared with the reference window 2026-03-03 .. 2026-03-30: built under another definition"),
        ],
        "{snapshot}"
    );
    // An audit over days of both definitions says why it cannot read them.
    let audit = daymark()
        .args(["audit", pipeline.to_str().unwrap()])
        .args(["--outputs", out_dir.to_str().unwrap()])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&audit.stderr);
    assert_eq!(audit.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("published days disagree on a column's type: a feature's definition changed since some of them were built"),
        "{stderr}"
    );
    let tidy = |extra: &[&str]| {
        daymark()
            .args(["tidy", pipeline.to_str().unwrap(), "--json"])
            .args(["--out", out_dir.to_str().unwrap()])
            .args(extra)
            .output()
            .unwrap()
    };
    let listed = tidy(&[]);
    assert_eq!(listed.status.code(), Some(0));
    let report: serde_json::Value = serde_json::from_slice(&listed.stdout).unwrap();
    let unused = report["unused"].as_array().unwrap();
    let tile_folders = |source: &str| -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(out_dir.join("tiles").join(source))
            .unwrap()
            .map(|e| {
                format!(
                    "tiles/{source}/{}",
                    e.unwrap().file_name().to_string_lossy()
                )
            })
            .collect();
        v.sort();
        v
    };
    let plays_before = tile_folders("plays");
    let listed_paths: Vec<&str> = unused.iter().map(|u| u["path"].as_str().unwrap()).collect();
    // The old day tiles and the old distinct-value tiles at least; each listed folder's
    // file count is what is on disk; no other source is touched.
    assert!(listed_paths.len() >= 2, "{report}");
    assert!(listed_paths.len() < plays_before.len(), "{report}");
    for u in unused {
        let path = u["path"].as_str().unwrap();
        assert!(path.starts_with("tiles/plays/"), "{report}");
        assert_eq!(
            u["files"].as_u64(),
            Some(count_files(&out_dir.join(path))),
            "{path}"
        );
        assert_eq!(u["removed"], false);
    }
    assert!(listed_paths
        .iter()
        .all(|p| plays_before.contains(&p.to_string())));
    // Nothing removed without --apply, nor while another run holds the lock.
    assert_eq!(tile_folders("plays"), plays_before);
    std::fs::write(&lock, lock_text("2999-01-01T00:00:00+00:00")).unwrap();
    let held = tidy(&["--apply"]);
    assert_eq!(held.status.code(), Some(12));
    assert_eq!(tile_folders("plays"), plays_before);
    // `labels` takes the same lock: nothing labelled while another run holds it.
    let held = daymark()
        .args(["labels", pipeline.to_str().unwrap()])
        .args(["--out", out_dir.to_str().unwrap()])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&held.stderr);
    assert_eq!(held.status.code(), Some(12), "{stderr}");
    assert!(stderr.ends_with("; nothing labelled\n"), "{stderr}");
    assert!(!out_dir.join("labels").exists());
    std::fs::remove_file(&lock).unwrap();
    let applied = tidy(&["--apply"]);
    assert_eq!(
        applied.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&applied.stderr)
    );
    let report: serde_json::Value = serde_json::from_slice(&applied.stdout).unwrap();
    assert!(report["unused"]
        .as_array()
        .unwrap()
        .iter()
        .all(|u| u["removed"] == true));
    let plays_after = tile_folders("plays");
    assert_eq!(plays_after.len(), plays_before.len() - listed_paths.len());
    assert!(plays_after
        .iter()
        .all(|p| !listed_paths.contains(&p.as_str())));
    // What the pipeline reads is all still there: a rebuild reads no raw file.
    let again = build("2026-03-31");
    assert_eq!(again["raw_files"], 0, "{again}");
    let report: serde_json::Value = serde_json::from_slice(&tidy(&[]).stdout).unwrap();
    assert_eq!(report["unused"], serde_json::json!([]));
}

/// Files of any kind under `dir`.
fn count_files(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| {
            let p = e.unwrap().path();
            if p.is_dir() {
                count_files(&p)
            } else {
                1
            }
        })
        .sum()
}

fn walk(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(walk(&p));
        } else if p.extension().is_some_and(|x| x == "parquet") {
            out.push(p);
        }
    }
    out
}

#[test]
fn broken_input_gets_located_errors_and_exit_code_2() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("p.yaml");
    std::fs::write(&file, "daymark: 1\nname: x\nkey: k\ntimzone: UTC\n").unwrap();
    let out = daymark()
        .args(["check", file.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains(&format!(
            "{}:4:1: unknown key `timzone`: did you mean `timezone`?",
            file.display()
        )),
        "{stderr}"
    );

    // Sources that do not exist are reported by name, with every other problem.
    let world = dir.path().join("nowhere");
    std::fs::write(&file, demo_pipeline_for(&world)).unwrap();
    let out = daymark()
        .args(["check", file.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("3 problems"), "{stderr}");
    assert!(
        stderr.contains("sources.plays.location: no `dt=YYYY-MM-DD/` partition"),
        "{stderr}"
    );

    let out = daymark()
        .args(["check", "/no/such/file.yaml"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("cannot read the pipeline file"));
}

#[test]
fn a_dirty_world_names_the_unreadable_file() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let out = daymark()
        .args([
            "generate",
            "--out",
            world.to_str().unwrap(),
            "--customers",
            "100",
            "--days",
            "10",
            "--dirty",
        ])
        .output()
        .unwrap();
    assert!(out.status.success());
    let pipeline = dir.path().join("demo.yaml");
    std::fs::write(&pipeline, demo_pipeline_for(&world)).unwrap();
    let out = daymark()
        .args(["check", pipeline.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("dt=2026-01-06/arrived-corrupt.parquet is not a readable Parquet file"),
        "{stderr}"
    );
}

/// Standard output closed before the command writes (`daymark ... | head` once `head` has
/// gone): no panic, the command ends as it would have. Rust's own `println!` panics here.
#[test]
fn a_closed_standard_output_is_not_a_panic() {
    let (reader, writer) = std::io::pipe().unwrap();
    drop(reader);
    let out = daymark()
        .arg("schema")
        .stdout(writer)
        .stderr(std::process::Stdio::piped())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!stderr.contains("panicked"), "{stderr}");
    assert_eq!(out.status.code(), Some(0), "{stderr}");
}
