#!/usr/bin/env python3
"""Backfill benchmark: daymark (tiled) against the same job as plain DuckDB SQL.

Not a test: it prints figures and ratios for docs/benchmarks.md. Run it on a release build:

    cargo build --release -p daymark-cli
    python3 tests/bench/build_bench.py --customers 30000 --days 400

It generates the demo world, then over the last 365 days builds daily snapshots of a
benchmark pipeline (plays counts, minutes and active days over 7, 28 and 91 days, for the
subscribers active at each cutoff) three ways, all in event-time mode and all writing one
Parquet file per day:
  1. daymark build, tiled (a 365-day backfill), then the next day alone (daily build);
  2. DuckDB: daily rollups per key and day, window functions over them, an as-of join for
     the population (the straightforward way to write this job in SQL);
  3. the I/O floor: a bare DataFusion scan (the `datafusion` Python package, the same
     engine) of the event columns the job reads, plus writing one Parquet dataset with the
     output's rows and columns;
and reports seconds, events per second, peak memory, and the ratios. It also times the
daily build of the next day with the longest window at 91 and at 365 days (same tiles; the
365-day pipeline builds the day before first, untimed, for its roll-ups), each the median
of three runs (the first is printed too).
"""

import argparse
import datetime as dt
import json
import os
import pathlib
import resource
import shutil
import subprocess
import sys
import time

REPO = pathlib.Path(__file__).resolve().parents[2]

PIPELINE = """
daymark: 1
name: bench
timezone: America/Chicago
key: customer_id
output: {out}
sources:
  plays: {{ location: {world}/plays, event_time: event_time, arrival_time: arrived_at, dedupe_on: [event_id] }}
  subscriptions: {{ location: {world}/subscriptions, event_time: changed_at, arrival_time: arrived_at, dedupe_on: [change_id] }}
population:
  state: {{ source: subscriptions, column: status, values: [active, cancelling] }}
features:
  - {{ name: plays, source: plays, agg: count, windows: [7d, 28d, {long}d] }}
  - {{ name: minutes, source: plays, agg: sum, expr: seconds_played / 60.0, windows: [7d, 28d, {long}d], fill: 0 }}
  - {{ name: active_days, source: plays, agg: active_days, windows: [7d, 28d, {long}d] }}
"""


def timed(cmd):
    """Runs cmd in a child; returns (seconds, peak RSS MiB of that child, stdout)."""
    wrapper = (
        "import resource, subprocess, sys, time\n"
        "t = time.perf_counter()\n"
        "r = subprocess.run(sys.argv[1:], capture_output=True, text=True)\n"
        "sys.stderr.write(r.stderr)\n"
        "print(r.returncode, time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
        "print(r.stdout)\n"
    )
    out = subprocess.run([sys.executable, "-c", wrapper, *map(str, cmd)], capture_output=True, text=True, check=True)
    first, _, rest = out.stdout.partition("\n")
    code, secs, rss = first.split()
    if int(code) != 0:
        raise SystemExit(f"{cmd[0]} failed:\n{out.stderr}\n{rest}")
    return float(secs), int(rss) / 1024, rest


def duckdb_backfill(world, out, first, last, long):
    import duckdb

    tz = "America/Chicago"
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    t = time.perf_counter()
    con.execute(f"""
      CREATE TEMP TABLE daily AS
      SELECT customer_id, CAST(event_time AT TIME ZONE '{tz}' AS DATE) AS d,
             count(*) AS n, sum(seconds_played / 60.0) AS m
      FROM (SELECT DISTINCT ON (event_id) * FROM read_parquet('{world}/plays/*/*.parquet')
            WHERE customer_id IS NOT NULL ORDER BY event_id, arrived_at)
      GROUP BY ALL""")
    con.execute(f"""
      CREATE TEMP TABLE spine AS
      WITH changes AS (
        SELECT customer_id, status, changed_at FROM read_parquet('{world}/subscriptions/*/*.parquet')),
      days AS (SELECT CAST(d AS DATE) AS d FROM range(DATE '{first}', DATE '{last}' + 1, INTERVAL 1 DAY) r(d)),
      grid AS (SELECT c.customer_id, days.d, timezone('{tz}', CAST(days.d AS TIMESTAMP)) AS cutoff
               FROM (SELECT DISTINCT customer_id FROM changes) c CROSS JOIN days)
      SELECT g.customer_id, g.d AS snapshot_date FROM grid g
      ASOF JOIN changes ch ON g.customer_id = ch.customer_id AND g.cutoff > ch.changed_at
      WHERE ch.status IN ('active', 'cancelling')""")
    con.execute(f"""
      CREATE TEMP TABLE dense AS
      SELECT s.customer_id, s.snapshot_date, coalesce(x.n, 0) AS n, coalesce(x.m, 0) AS m
      FROM (SELECT customer_id, d AS snapshot_date FROM daily
            UNION SELECT customer_id, snapshot_date FROM spine) s
      LEFT JOIN daily x ON x.customer_id = s.customer_id AND x.d = s.snapshot_date""")
    windows = ", ".join(
        f"sum(n) OVER w{w} AS plays_{w}d, sum(m) OVER w{w} AS minutes_{w}d, "
        f"count(*) FILTER (WHERE n > 0) OVER w{w} AS active_days_{w}d"
        for w in (7, 28, long)
    )
    defs = ", ".join(
        f"w{w} AS (PARTITION BY customer_id ORDER BY snapshot_date RANGE BETWEEN INTERVAL {w} DAY PRECEDING AND INTERVAL 1 DAY PRECEDING)"
        for w in (7, 28, long)
    )
    con.execute(f"""
      COPY (SELECT r.* FROM (SELECT customer_id, snapshot_date, {windows} FROM dense WINDOW {defs}) r
            JOIN spine USING (customer_id, snapshot_date))
      TO '{out}' (FORMAT PARQUET, PARTITION_BY (snapshot_date), OVERWRITE_OR_IGNORE)""")
    return time.perf_counter() - t, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def io_floor(world, out, rows, columns):
    """A bare scan of the event columns the job reads, then one Parquet dataset of the
    output's shape (rows x columns of doubles), both with DataFusion."""
    import datafusion

    ctx = datafusion.SessionContext()
    t = time.perf_counter()
    ctx.register_parquet("plays", f"{world}/plays/", file_extension=".parquet")
    ctx.register_parquet("subs", f"{world}/subscriptions/", file_extension=".parquet")
    # Touch every value of every column the job reads.
    ctx.sql("""SELECT count(event_id), count(DISTINCT customer_id), min(event_time), max(arrived_at),
               sum(seconds_played) FROM plays""").collect()
    ctx.sql("SELECT count(change_id), count(customer_id), min(changed_at), max(arrived_at), max(status) FROM subs").collect()
    cols = ", ".join(f"CAST(value % {97 + c} AS DOUBLE) AS c{c}" for c in range(columns))
    ctx.sql(f"SELECT value AS customer_id, {cols} FROM range({rows})").write_parquet(str(out))
    return time.perf_counter() - t


# Runs of each daily build; the median is reported. One run of a build this short (under a
# second) right after the backfill measured 0.5-0.9 s depending on what the machine was
# still flushing to disk (docs/benchmarks.md, seventeenth measurement).
DAILY_RUNS = 3


def daily(build, out, day):
    """Times the daily build of `day` DAILY_RUNS times, removing its snapshot before each run
    so that each does the same work; returns (median seconds, peak RSS MiB, first seconds)."""
    runs = []
    for _ in range(DAILY_RUNS):
        shutil.rmtree(out / "snapshots-event-time" / f"dt={day}", ignore_errors=True)
        runs.append(timed(build + ["--date", day]))
    # Later runs must do the first one's work: none of them may find roll-ups that the first
    # run had to build.
    for line in runs[0][2].splitlines():
        event = json.loads(line) if line.startswith("{") else {}
        if event.get("event") == "tiles" and event.get("rollups_built", 0) > 0:
            raise SystemExit(f"the daily build of {day} built roll-ups; the runs after it would not: {line}")
    secs = sorted(r[0] for r in runs)
    return secs[len(secs) // 2], max(r[1] for r in runs), runs[0][0]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--customers", type=int, default=30000)
    ap.add_argument("--days", type=int, default=400)
    ap.add_argument("--work", default=str(REPO / "target" / "bench"))
    ap.add_argument("--binary", default=str(REPO / "target" / "release" / "daymark"))
    ap.add_argument("--long", type=int, default=91, help="longest window in days")
    ap.add_argument("--backfill", type=int, default=365, help="days of snapshots to build")
    ap.add_argument("--memory-limit", default=None,
                    help="passed to daymark build (e.g. 256MiB); peak memory is then compared to it")
    args = ap.parse_args()
    work = pathlib.Path(args.work)
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    world = work / "world"
    start = dt.date(2025, 1, 1)
    secs, rss, out = timed([args.binary, "generate", "--out", world, "--customers", args.customers,
                            "--days", args.days, "--start", start, "--seed", 1])
    manifest = json.loads((world / "world.json").read_text())
    events = sum(s["rows"] for s in manifest["summary"]["sources"].values())
    print(f"world: {args.customers} customers, {args.days} days, {events} events, generated in {secs:.1f} s")

    last = start + dt.timedelta(days=args.days - 1)
    first = last - dt.timedelta(days=args.backfill - 1)
    pipeline = work / "bench.yaml"
    pipeline.write_text(PIPELINE.format(out=work / "out", world=world, long=args.long))
    build = [args.binary, "build", pipeline, "--knowledge", "event-time", "--log-format", "json"]
    if args.memory_limit:
        build += ["--memory-limit", args.memory_limit]
    b_secs, b_rss, _ = timed(build + ["--from", first, "--to", last])
    next_day = last + dt.timedelta(days=1)
    d_secs, d_rss, d_first = daily(build, work / "out", next_day)
    # The same daily build with a 365-day longest window. It shares the tiles and the
    # footer cache; the day before is built first (not timed), as a scheduler's previous
    # run would have, so that the roll-ups a 365-day window needs are in place as they are
    # for the 91-day pipeline after its backfill.
    pipeline365 = work / "bench365.yaml"
    pipeline365.write_text(PIPELINE.format(out=work / "out365", world=world, long=365))
    shutil.copytree(work / "out" / "tiles", work / "out365" / "tiles")
    shutil.copytree(work / "out" / "_footers", work / "out365" / "_footers")
    build365 = [args.binary, "build", pipeline365, "--knowledge", "event-time", "--log-format", "json"]
    timed(build365 + ["--date", last])
    d365_secs, _, d365_first = daily(build365, work / "out365", next_day)
    k_secs, k_rss = duckdb_backfill(world, work / "duckdb-out", first, last, args.long)
    import duckdb
    out_rows = duckdb.connect().execute(
        f"SELECT count(*) FROM read_parquet('{work}/out/snapshots-event-time/*/*.parquet')").fetchone()[0]
    f_secs = io_floor(world, work / "floor-out", out_rows, 9)

    n = args.backfill
    limit = f"  (--memory-limit {args.memory_limit})" if args.memory_limit else ""
    print(f"{n}-day backfill, daymark tiled: {b_secs:8.1f} s  {events / b_secs:12.0f} events/s  peak {b_rss:6.0f} MiB{limit}")
    print(f"{n}-day backfill, DuckDB {duckdb.__version__} SQL: {k_secs:8.1f} s  {events / k_secs:12.0f} events/s  peak {k_rss:6.0f} MiB")
    print(f"I/O floor (DataFusion scan + write {out_rows} rows): {f_secs:8.1f} s")
    print(f"daily build (next day), daymark: {d_secs:8.2f} s  peak {d_rss:6.0f} MiB  (longest window {args.long} d; median of {DAILY_RUNS}, first {d_first:.2f} s)")
    print(f"daily build, longest window 365 d: {d365_secs:6.2f} s  ratio 365/{args.long}: {d365_secs / d_secs:.2f}  (median of {DAILY_RUNS}, first {d365_first:.2f} s)")
    print(f"ratio DuckDB / daymark backfill: {k_secs / b_secs:.2f}")
    print(f"ratio daymark backfill / I/O floor: {b_secs / f_secs:.2f}")
    # The two agree (a sanity check, not the correctness test: that is tests/reference).
    import duckdb
    con = duckdb.connect()
    q = "SELECT count(*), sum(plays_28d), sum(active_days_{w}d) FROM read_parquet('{p}')"
    ours = con.execute(q.format(w=args.long, p=work / "out" / "snapshots-event-time" / f"dt={last}" / "part-0.parquet")).fetchone()
    theirs = con.execute(q.format(w=args.long, p=work / "duckdb-out" / f"snapshot_date={last}" / "*.parquet")).fetchone()
    print(f"last day, rows / sum(plays_28d) / sum(active_days): daymark {ours}, DuckDB {theirs}")
    print(f"ratio daily / backfill:          {d_secs / b_secs:.4f}")


if __name__ == "__main__":
    main()
