"""Malformed input: an unreadable file stops the build and is named; null keys and rows
whose event time is after their arrival are ignored or kept, and counted exactly.

Source of the expected counts: DuckDB reading the same Parquet (distinct event ids, since
re-delivered copies count once).
"""

import json
import pathlib
import subprocess

import duckdb

REPO = pathlib.Path(__file__).resolve().parents[2]


def test_dirty_world(daymark, tmp_path):
    world = tmp_path / "world"
    subprocess.run(
        [str(daymark), "generate", "--out", str(world), "--customers", "400", "--days", "30",
         "--start", "2026-06-01", "--seed", "5", "--dirty"],
        check=True, capture_output=True,
    )
    text = (REPO / "pipelines" / "demo.yaml").read_text().replace("../demo-data/world/", f"{world}/")
    text = text.replace("output: ../demo-data/out", f"output: {tmp_path / 'out'}")
    pipeline = tmp_path / "demo.yaml"
    pipeline.write_text(text)

    build = [str(daymark), "build", str(pipeline), "--date", "2026-07-01", "--log-format", "json"]
    run = subprocess.run(build, capture_output=True, text=True)
    assert run.returncode == 2, run.stdout + run.stderr
    assert "arrived-corrupt.parquet is not a readable Parquet file" in run.stderr
    assert not (tmp_path / "out" / "snapshots" / "dt=2026-07-01").exists()

    corrupt = next(world.glob("plays/*/arrived-corrupt.parquet"))
    corrupt.unlink()
    run = subprocess.run(build, capture_output=True, text=True)
    assert run.returncode == 0, run.stdout + run.stderr
    events = [json.loads(line) for line in run.stdout.splitlines()]
    read = next(e for e in events if e["event"] == "read")

    con = duckdb.connect()
    plays = f"read_parquet('{world}/plays/*/*.parquet')"
    null_keys = con.execute(f"SELECT count(DISTINCT event_id) FROM {plays} WHERE customer_id IS NULL").fetchone()[0]
    ahead = con.execute(
        f"SELECT count(DISTINCT event_id) FROM {plays} WHERE event_time > arrived_at + INTERVAL 5 MINUTE"
    ).fetchone()[0]
    assert null_keys > 5 and ahead > 1
    assert read["null_key_rows"] == null_keys
    assert read["event_after_arrival_rows"] == ahead
    # No row of the snapshot has a null key.
    snap = tmp_path / "out" / "snapshots" / "dt=2026-07-01" / "part-0.parquet"
    assert con.execute(f"SELECT count(*) FROM read_parquet('{snap}') WHERE customer_id IS NULL").fetchone()[0] == 0
