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
    let build = |day: &str| {
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
        let events: Vec<serde_json::Value> = String::from_utf8_lossy(&out.stdout)
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
        events.into_iter().find(|e| e["event"] == "read").unwrap()
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
