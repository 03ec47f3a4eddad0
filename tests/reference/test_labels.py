"""Labels, training sets and score outcomes checked against tools outside daymark.

Sources of the expected values, named at each assertion:
- DuckDB: labels recomputed with plain SQL written here from the label definition in the
  README ("Semantics": labels), over the same generated Parquet; cutoffs from Python's
  zoneinfo (IANA rules).
- scikit-learn: `roc_auc_score` for ROC AUC; `LogisticRegression` trains on the export.
- pyarrow: reads the exported training set.
The world is small (400 customers, 120 days) and only a few snapshot days are built.
"""

import datetime as dt
import json
import pathlib
import subprocess
from zoneinfo import ZoneInfo

import duckdb
import pyarrow.parquet as pq
import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]
TZ = "America/Chicago"
START = dt.date(2026, 1, 1)
DAYS = 120  # partitions 2026-01-01 .. 2026-04-30, all marked _complete

# A short-horizon pipeline: a handful of features, the demo label with horizon 3d, grace 1d.
SHORT = """
daymark: 1
name: short_churn
timezone: America/Chicago
key: customer_id
output: out
sources:
  plays:
    location: {world}/plays
    event_time: event_time
    arrival_time: arrived_at
    dedupe_on: [event_id]
  subscriptions:
    location: {world}/subscriptions
    event_time: changed_at
    arrival_time: arrived_at
    dedupe_on: [change_id]
population:
  state: {{ source: subscriptions, column: status, values: [active, cancelling] }}
features:
  - name: plays
    source: plays
    agg: count
    windows: [7d, 28d]
  - name: active_days_28d
    source: plays
    agg: active_days
    window: 28d
  - name: minutes_watched_28d
    source: plays
    agg: sum
    expr: seconds_played / 60.0
    window: 28d
    fill: 0
  - name: tenure_days
    source: subscriptions
    agg: days_since_first
    filter: kind = 'started'
    fill: null
  - name: past_cancellations
    source: subscriptions
    agg: count
    filter: kind = 'cancelled'
    window: all
label:
  name: churned
  source: subscriptions
  horizon: {horizon}d
  grace: {grace}d
  ended: kind = 'ended'
  resumed: kind IN ('resumed', 'started')
"""


def run(daymark, *args, check=True):
    p = subprocess.run([str(daymark), *map(str, args)], capture_output=True, text=True)
    if check and p.returncode != 0:
        raise AssertionError(f"{args} -> {p.returncode}\n{p.stdout}\n{p.stderr}")
    return p


def cutoff(day):
    return dt.datetime.combine(day, dt.time(0), ZoneInfo(TZ)).astimezone(dt.timezone.utc)


@pytest.fixture(scope="module")
def small_world(daymark, tmp_path_factory):
    out = tmp_path_factory.mktemp("labels_world")
    run(daymark, "generate", "--out", out / "world", "--customers", 400, "--days", DAYS,
        "--start", START, "--seed", 5)
    return out


@pytest.fixture(scope="module")
def short(daymark, small_world):
    """Short-horizon pipeline, snapshots 2026-03-01 .. 2026-03-16 (across the DST change
    of 2026-03-08), labels back-filled."""
    path = small_world / "short.yaml"
    path.write_text(SHORT.format(world=small_world / "world", horizon=3, grace=1))
    run(daymark, "build", path, "--from", "2026-03-01", "--to", "2026-03-16")
    first = json.loads(run(daymark, "labels", path, "--json").stdout)
    second = json.loads(run(daymark, "labels", path, "--json").stdout)
    return path, small_world / "out", first, second


def duckdb_labels(world, snap_file, day, horizon, grace):
    """The label definition, in DuckDB SQL written from the README (no daymark code)."""
    c, h, m = cutoff(day), cutoff(day + dt.timedelta(days=horizon)), cutoff(
        day + dt.timedelta(days=horizon + grace))
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"CREATE VIEW subs AS SELECT * FROM read_parquet('{world}/subscriptions/*/*.parquet')")
    rows = con.execute(
        f"""
        WITH keys AS (SELECT customer_id FROM read_parquet('{snap_file}')),
        kept AS (
          SELECT e.customer_id, min(e.changed_at) AS t FROM subs e
          WHERE e.kind = 'ended' AND e.changed_at > $c AND e.changed_at <= $h
            AND NOT EXISTS (
              SELECT 1 FROM subs r
              WHERE r.customer_id = e.customer_id AND r.kind IN ('resumed', 'started')
                AND r.changed_at > e.changed_at
                -- wall clocks in the zone: the resumption's local time is at most the end's + grace days
                AND timezone('{TZ}', r.changed_at) <= timezone('{TZ}', e.changed_at) + INTERVAL {grace} DAY)
          GROUP BY e.customer_id),
        latest AS (
          SELECT customer_id,
                 max(changed_at) FILTER (WHERE kind = 'ended') AS last_end,
                 max(changed_at) FILTER (WHERE kind IN ('resumed', 'started')) AS last_res
          FROM subs WHERE changed_at <= $c GROUP BY customer_id)
        SELECT k.customer_id, kept.t,
               kept.t IS NULL AND l.last_end IS NOT NULL
                 AND (l.last_res IS NULL OR l.last_res < l.last_end) AS censored
        FROM keys k LEFT JOIN kept USING (customer_id) LEFT JOIN latest l USING (customer_id)
        ORDER BY k.customer_id
        """,
        {"c": c, "h": h},
    ).fetchall()
    bounds = [cutoff(day + dt.timedelta(days=k)) for k in range(horizon + 1)]
    out = {}
    for key, t, censored in rows:
        dte = None
        if t is not None:
            dte = next(k for k in range(1, horizon + 1) if bounds[k - 1] < t <= bounds[k])
        out[key] = (t is not None, dte, bool(censored))
    return out, m


def daymark_labels(file):
    t = pq.read_table(file).to_pylist()
    return {r["customer_id"]: (r["churned"] if "churned" in r else r["churned_30d"],
                               r["days_to_event"], r["censored"], r["matured_at"]) for r in t}


def test_labels_equal_duckdb_and_rerun_changes_nothing(short, small_world):
    path, out, first, second = short
    days = [START + dt.timedelta(days=59 + i) for i in range(16)]  # 03-01 .. 03-16
    # All sixteen matured (data complete to 2026-05-01 00:00Z); none pending.
    assert [d["day"] for d in first["labeled"]] == [str(d) for d in days]
    assert first["pending"] == []
    assert all(d["written"] for d in first["labeled"])
    # Idempotence: the second run writes nothing.
    assert second["written"] == 0 and not any(d["written"] for d in second["labeled"])
    positives = 0
    for day in days:
        lab = out / "labels" / f"dt={day}" / "part-0.parquet"
        snap = out / "snapshots" / f"dt={day}" / "part-0.parquet"
        expected, matured = duckdb_labels(small_world / "world", snap, day, 3, 1)
        got = daymark_labels(lab)
        assert set(got) == set(expected)  # one row per snapshot key
        for key, (label, dte, censored) in expected.items():
            # Source: DuckDB SQL above, from the label definition.
            assert got[key][:3] == (label, dte, censored), (day, key)
            assert got[key][3] == matured
        positives += sum(1 for v in expected.values() if v[0])
    assert positives > 0


def test_labels_read_footers_from_the_builds_cache(short, small_world):
    """`labels` takes the footers of files the build already read from the output's footer
    cache (common practice: a daily job should not re-read years of file footers); it reads
    one footer per source, for its schema."""
    _, _, first, second = short
    files = sum(1 for source in ("plays", "subscriptions")
                for _ in (small_world / "world" / source).glob("dt=*/*.parquet"))
    for report in (first, second):
        assert report["footers_cached"] == files, report
        assert report["footers_read"] <= 2, report


def test_demo_label_matures_exactly_when_the_data_allows(daymark, small_world):
    """The demo pipeline (30d + 7d grace): with data complete to 2026-05-01 00:00Z, the
    snapshot of 03-24 matures (its window closes 04-30 05:00Z) and 03-25's does not
    (05-01 05:00Z). Cutoffs from Python's zoneinfo; labels equal DuckDB's."""
    text = (REPO / "pipelines" / "demo.yaml").read_text().replace("../demo-data/world", str(small_world / "world"))
    text = text.replace("../demo-data/out", str(small_world / "demo-out"))
    path = small_world / "demo.yaml"
    path.write_text(text)
    run(daymark, "build", path, "--from", "2026-03-24", "--to", "2026-03-25")
    report = json.loads(run(daymark, "labels", path, "--json").stdout)
    day = dt.date(2026, 3, 24)
    assert [d["day"] for d in report["labeled"]] == ["2026-03-24"]
    assert report["pending"] == [{"day": "2026-03-25", "matured_at": "2026-05-01T05:00:00Z",
                                  "matures_on": "2026-05-01"}]
    assert cutoff(dt.date(2026, 5, 1)).isoformat() == "2026-05-01T05:00:00+00:00"
    assert not (small_world / "demo-out" / "labels" / "dt=2026-03-25").exists()
    expected, matured = duckdb_labels(small_world / "world",
                                      small_world / "demo-out/snapshots/dt=2026-03-24/part-0.parquet",
                                      day, 30, 7)
    got = daymark_labels(small_world / "demo-out/labels/dt=2026-03-24/part-0.parquet")
    assert {k: v[:3] for k, v in got.items()} == expected  # source: DuckDB
    assert report["labeled"][0]["positives"] == sum(1 for v in expected.values() if v[0])


def test_export_trains_and_respects_the_embargo(daymark, short, tmp_path):
    from sklearn.linear_model import LogisticRegression
    path, out, _, _ = short
    # An embargo below horizon + grace (4 days) is refused, saying why.
    p = run(daymark, "export", path, "--from", "2026-03-01", "--to", "2026-03-16",
            "--out", tmp_path / "bad", "--embargo", "2d", check=False)
    assert p.returncode == 2 and "horizon + grace" in p.stderr, p.stderr
    dest = tmp_path / "ts"
    run(daymark, "export", path, "--from", "2026-03-01", "--to", "2026-03-16", "--out", dest,
        "--split", "0.5,0.25,0.25", "--csv")
    manifest = json.loads((dest / "manifest.json").read_text())
    assert manifest["embargo_days"] == 4
    parts = {}
    for part in ("train", "validation", "test"):
        t = pq.read_table(dest / part / "part-0.parquet")  # source: pyarrow reads it
        df = t.to_pandas()
        parts[part] = df
        m = next(x for x in manifest["parts"] if x["name"] == part)
        assert len(df) == m["rows"] > 0
        assert abs(df["churned"].mean() - m["label_rate"]) < 1e-12
        assert t.column_names[:2] == ["customer_id", "snapshot_date"]
        assert t.column_names[-3:] == ["churned", "days_to_event", "censored"]
        csv = (dest / part / "part-0.csv").read_text().splitlines()
        assert len(csv) == len(df) + 1
    # No two parts share a snapshot date within the embargo (4 days).
    order = ["train", "validation", "test"]
    for a, b in zip(order, order[1:]):
        last_a = max(parts[a]["snapshot_date"])
        first_b = min(parts[b]["snapshot_date"])
        assert (first_b - last_a).days >= 4, (a, b, last_a, first_b)
    for a in order:
        for b in order:
            if a < b:
                assert not set(parts[a]["snapshot_date"]) & set(parts[b]["snapshot_date"])
    # scikit-learn trains on the training part and scores the test part.
    feats = manifest["features"]
    X = parts["train"][feats].fillna(0).astype(float)
    y = parts["train"]["churned"].astype(int)
    assert y.nunique() == 2, "the training part needs both classes"
    model = LogisticRegression(max_iter=2000).fit(X, y)
    proba = model.predict_proba(parts["test"][feats].fillna(0).astype(float))[:, 1]
    assert len(proba) == len(parts["test"]) and ((proba >= 0) & (proba <= 1)).all()
    # A filter, an include list and a seeded sample: same seed, same rows.
    for name in ("s1", "s2"):
        run(daymark, "export", path, "--from", "2026-03-01", "--to", "2026-03-16",
            "--out", tmp_path / name, "--where", "tenure_days < 400", "--include",
            "plays_7d,tenure_days", "--sample-per-day", 20, "--seed", 9)
    a = pq.read_table(tmp_path / "s1/train/part-0.parquet").to_pandas()
    b = pq.read_table(tmp_path / "s2/train/part-0.parquet").to_pandas()
    assert a.equals(b)
    assert list(a.columns) == ["customer_id", "snapshot_date", "plays_7d", "tenure_days",
                               "churned", "days_to_event", "censored"]
    assert (a.groupby("snapshot_date").size() <= 20).all()
    assert (a["tenure_days"] < 400).all()


def test_outcomes_auc_matches_scikit_learn(daymark, short, tmp_path):
    import pyarrow as pa
    from sklearn.metrics import roc_auc_score
    path, out, _, _ = short
    days = [dt.date(2026, 3, 1) + dt.timedelta(days=i) for i in range(16)]
    keys, dates, scores, labels = [], [], [], {}
    for day in days:
        snap = pq.read_table(out / "snapshots" / f"dt={day}" / "part-0.parquet").to_pylist()
        lab = pq.read_table(out / "labels" / f"dt={day}" / "part-0.parquet").to_pylist()
        labels[day] = {r["customer_id"]: r["churned"] for r in lab}
        for r in snap:
            keys.append(r["customer_id"])
            dates.append(day)
            scores.append(-float(r["active_days_28d"]))  # integer scores: many ties
    # One unknown key and one day without a snapshot.
    keys += ["nobody", keys[0]]
    dates += [days[0], dt.date(2026, 4, 20)]
    scores += [1.0, 1.0]
    table = pa.table({"cid": keys, "day": dates, "s": scores})
    pq.write_table(table, tmp_path / "scores.parquet")
    res = tmp_path / "outcomes.json"
    run(daymark, "outcomes", path, "--scores", tmp_path / "scores.parquet", "--key-column", "cid",
        "--date-column", "day", "--score-column", "s", "--top-k", 10, "--top-percent", 10,
        "--json", res)
    report = json.loads(res.read_text())
    assert report["not_measured"]["unknown_key_rows"] == 1
    assert report["not_measured"]["no_snapshot_rows"] == 1
    assert report["not_measured"]["no_snapshot_days"] == ["2026-04-20"]
    by_day = {d["day"]: d for d in report["days"]}
    checked = 0
    for day in days:
        rows = [(k, s) for k, d, s in zip(keys, dates, scores) if d == day and k in labels[day]]
        y = [int(labels[day][k]) for k, _ in rows]
        s = [x for _, x in rows]
        r = by_day[str(day)]
        assert r["rows"] == len(rows)
        assert abs(r["base_rate"] - sum(y) / len(y)) < 1e-12
        if 0 < sum(y) < len(y):
            # Source: scikit-learn roc_auc_score on the same rows (ties: half credit).
            assert abs(r["auc"] - roc_auc_score(y, s)) < 1e-9, day
            checked += 1
        # Precision at top 10: highest scores, ties by key ascending (our documented rule).
        top = sorted(rows, key=lambda ks: (-ks[1], ks[0]))[:10]
        assert abs(r["precision_at_k"] - sum(labels[day][k] for k, _ in top) / 10) < 1e-12
        assert sum(c["rows"] for c in r["calibration"]) == len(rows)
    assert checked >= 5
    # The same scores as CSV give the same measures.
    csv = tmp_path / "scores.csv"
    csv.write_text("cid,day,s\n" + "".join(f"{k},{d},{s}\n" for k, d, s in zip(keys, dates, scores)))
    res2 = tmp_path / "outcomes2.json"
    run(daymark, "outcomes", path, "--scores", csv, "--key-column", "cid", "--date-column", "day",
        "--score-column", "s", "--top-k", 10, "--top-percent", 10, "--json", res2)
    assert json.loads(res2.read_text())["days"] == report["days"]
    # A floor above every AUC exits 3; duplicates are an error naming them (exit 2).
    p = run(daymark, "outcomes", path, "--scores", tmp_path / "scores.parquet", "--key-column",
            "cid", "--date-column", "day", "--score-column", "s", "--min-auc", 0.99, check=False)
    assert p.returncode == 3, p.stderr
    dup = pa.table({"cid": [keys[0], keys[0]], "day": [dates[0], dates[0]], "s": [0.1, 0.2]})
    pq.write_table(dup, tmp_path / "dup.parquet")
    p = run(daymark, "outcomes", path, "--scores", tmp_path / "dup.parquet", "--key-column", "cid",
            "--date-column", "day", "--score-column", "s", check=False)
    assert p.returncode == 2 and keys[0] in p.stderr and "more than once" in p.stderr, p.stderr
