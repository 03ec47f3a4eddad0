"""Every cell of daymark's snapshots equals an independent computation in DuckDB.

Source of the expected values: DuckDB reading the same generated Parquet with plain SQL
written here from the feature definitions (no daymark code), plus plain Python for the
derived features and transforms. Floats are compared to 1e-9 relative.
Days include the daylight-saving change of America/Chicago (2026-03-08, from the IANA
rules: second Sunday of March), in both knowledge modes.
"""

import datetime as dt
import math
import pathlib
import subprocess
from zoneinfo import ZoneInfo

import duckdb
import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]
TZ = "America/Chicago"

# name, source, aggregation, expression, filter, window in days (None: all history), fill
FEATURES = [
    ("plays_7d", "plays", "count", None, None, 7, 0),
    ("plays_28d", "plays", "count", None, None, 28, 0),
    ("plays_91d", "plays", "count", None, None, 91, 0),
    ("minutes_watched_7d", "plays", "sum", "seconds_played / 60.0", None, 7, 0),
    ("minutes_watched_28d", "plays", "sum", "seconds_played / 60.0", None, 28, 0),
    ("minutes_watched_91d", "plays", "sum", "seconds_played / 60.0", None, 91, 0),
    ("active_days_7d", "plays", "active_days", None, None, 7, 0),
    ("active_days_28d", "plays", "active_days", None, None, 28, 0),
    ("active_days_91d", "plays", "active_days", None, None, 91, 0),
    ("distinct_titles_28d", "plays", "distinct", "title_id", None, 28, 0),
    ("distinct_titles_91d", "plays", "distinct", "title_id", None, 91, 0),
    ("distinct_genres_28d", "plays", "distinct", "genre", None, 28, 0),
    ("phone_minutes_7d", "plays", "sum", "seconds_played / 60.0", "device = 'phone'", 7, 0),
    ("phone_minutes_28d", "plays", "sum", "seconds_played / 60.0", "device = 'phone'", 28, 0),
    ("tv_minutes_28d", "plays", "sum", "seconds_played / 60.0", "device = 'tv'", 28, 0),
    ("completed_plays_28d", "plays", "count", None, "completed", 28, 0),
    ("completion_rate_28d", "plays", "mean", "CASE WHEN completed THEN 1.0 ELSE 0.0 END", None, 28, None),
    ("longest_play_minutes_28d", "plays", "max", "seconds_played / 60.0", None, 28, 0),
    ("days_since_last_play", "plays", "days_since_last", None, None, None, None),
    ("minutes_watched_28d_log", "plays", "sum", "seconds_played / 60.0", None, 28, 0),
    ("support_contacts_28d", "support", "count", None, None, 28, 0),
    ("support_contacts_91d", "support", "count", None, None, 91, 0),
    ("billing_contacts_28d", "support", "count", None, "topic = 'billing'", 28, 0),
    ("unresolved_contacts_91d", "support", "count", None, "NOT resolved", 91, 0),
    ("mean_wait_minutes_91d", "support", "mean", "wait_minutes", None, 91, None),
    ("current_plan", "subscriptions", "last", "plan", None, None, "unknown"),
    ("monthly_fee", "subscriptions", "last", "monthly_fee", None, None, None),
    ("tenure_days", "subscriptions", "days_since_first", None, "kind = 'started'", None, None),
    ("tenure_band", "subscriptions", "days_since_first", None, "kind = 'started'", None, None),
    ("current_spell_days", "subscriptions", "days_since_last", None, "kind IN ('started', 'resumed')", None, None),
    ("past_cancellations", "subscriptions", "count", None, "kind = 'cancelled'", None, 0),
    ("payment_failures_91d", "subscriptions", "count", None, "kind = 'payment_failed'", 91, 0),
    ("plan_changes", "subscriptions", "count", None, "kind = 'plan_changed'", None, 0),
]
SOURCES = {
    "plays": ("event_time", "event_id"),
    "subscriptions": ("changed_at", "change_id"),
    "support": ("opened_at", "contact_id"),
}
DAYS = [dt.date(2026, 3, 7), dt.date(2026, 3, 9), dt.date(2026, 4, 2)]


def cutoff(day):
    return dt.datetime.combine(day, dt.time(0), ZoneInfo(TZ)).astimezone(dt.timezone.utc)


def aggregate(agg, expr, ev, day):
    local_day = f"CAST(({ev} AT TIME ZONE '{TZ}') AS DATE)"
    return {
        "count": "count(*)",
        "sum": f"sum({expr})",
        "mean": f"avg({expr})",
        "max": f"max({expr})",
        "distinct": f"count(DISTINCT {expr})",
        "active_days": f"count(DISTINCT {local_day})",
        "last": f"last({expr} ORDER BY {ev}, arrived_at, {expr})",
        "days_since_first": f"DATE '{day}' - min({local_day})",
        "days_since_last": f"DATE '{day}' - max({local_day})",
    }[agg]


def expected(con, world, day, as_known):
    c = cutoff(day)
    known = "AND arrived_at < $c" if as_known else ""
    rows = {}
    for source, (ev, ident) in SOURCES.items():
        # Rows known at the cutoff, de-duplicated (earliest arrival kept).
        con.execute(
            f"""CREATE OR REPLACE TEMP VIEW {source}_rows AS
            SELECT * EXCLUDE (rn) FROM (
              SELECT *, row_number() OVER (PARTITION BY {ident} ORDER BY arrived_at) AS rn
              FROM read_parquet('{world}/{source}/*/*.parquet')
              WHERE {ev} < $c {known} AND customer_id IS NOT NULL)
            WHERE rn = 1""".replace("$c", f"TIMESTAMPTZ '{c.isoformat()}'")
        )
    population = [
        r[0]
        for r in con.execute(
            """SELECT customer_id FROM (
                 SELECT customer_id, status, row_number() OVER (
                   PARTITION BY customer_id ORDER BY changed_at DESC, arrived_at DESC) AS rn
                 FROM subscriptions_rows)
               WHERE rn = 1 AND status IN ('active', 'cancelling')"""
        ).fetchall()
    ]
    for key in population:
        rows[key] = {}
    for name, source, agg, expr, flt, window, fill in FEATURES:
        ev = SOURCES[source][0]
        conds = []
        if window is not None:
            start = cutoff(day - dt.timedelta(days=window))
            conds.append(f"{ev} >= TIMESTAMPTZ '{start.isoformat()}'")
        if flt:
            conds.append(f"({flt})")
        where = f"WHERE {' AND '.join(conds)}" if conds else ""
        values = dict(
            con.execute(
                f"SELECT customer_id, {aggregate(agg, expr, ev, day)} FROM {source}_rows {where} GROUP BY customer_id"
            ).fetchall()
        )
        for key in population:
            v = values.get(key)
            rows[key][name] = fill if v is None else v
    for r in rows.values():
        r["longest_play_minutes_28d"] = min(max(float(r["longest_play_minutes_28d"]), 0.0), 240.0)
        r["minutes_watched_28d_log"] = math.log1p(float(r["minutes_watched_28d_log"]))
        t = r["tenure_band"]
        r["tenure_band"] = None if t is None else sum(1 for e in (30, 90, 180, 365) if t >= e)
        m28 = r["minutes_watched_28d"]
        r["minutes_trend_7_28"] = 0 if not m28 else r["minutes_watched_7d"] / m28
        r["minutes_per_play_28d"] = 0 if not r["plays_28d"] else m28 / r["plays_28d"]
        r["active_days_weeks_2_to_4"] = r["active_days_28d"] - r["active_days_7d"]
    return rows


def same(a, b):
    if a is None or b is None:
        return a is None and b is None
    if isinstance(a, float) or isinstance(b, float):
        return math.isclose(float(a), float(b), rel_tol=1e-9, abs_tol=1e-12)
    return a == b


@pytest.fixture(scope="module")
def built(daymark, tmp_path_factory):
    base = tmp_path_factory.mktemp("snap")
    world = base / "world"
    subprocess.run(
        [str(daymark), "generate", "--out", str(world), "--customers", "600", "--days", "80",
         "--start", "2026-01-20", "--seed", "21"],
        check=True, capture_output=True,
    )
    text = (REPO / "pipelines" / "demo.yaml").read_text().replace("../demo-data/world/", f"{world}/")
    text = text.replace("output: ../demo-data/out", f"output: {base / 'out'}")
    pipeline = base / "demo.yaml"
    pipeline.write_text(text)
    for day in DAYS:
        subprocess.run([str(daymark), "build", str(pipeline), "--date", str(day)], check=True, capture_output=True)
    subprocess.run(
        [str(daymark), "build", str(pipeline), "--date", str(DAYS[1]), "--knowledge", "event-time"],
        check=True, capture_output=True,
    )
    return world, base / "out"


@pytest.mark.parametrize("day,as_known", [(d, True) for d in DAYS] + [(DAYS[1], False)])
def test_every_cell_matches_duckdb(built, day, as_known):
    world, out = built
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    want = expected(con, world, day, as_known)
    folder = "snapshots" if as_known else "snapshots-event-time"
    r = con.execute(f"SELECT * FROM read_parquet('{out}/{folder}/dt={day}/part-0.parquet', hive_partitioning = false)")
    cols = [d[0] for d in r.description]
    got = {row[0]: dict(zip(cols, row)) for row in r.fetchall()}
    assert len(want) > 200
    assert set(got) == set(want), "population differs"
    names = [f[0] for f in FEATURES] + ["minutes_trend_7_28", "minutes_per_play_28d", "active_days_weeks_2_to_4"]
    mismatches = []
    for key, w in want.items():
        assert got[key]["snapshot_date"] == day
        for name in names:
            if not same(got[key][name], w[name]):
                mismatches.append((key, name, got[key][name], w[name]))
    assert not mismatches, mismatches[:10]
