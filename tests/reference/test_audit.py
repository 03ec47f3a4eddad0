"""The leakage audit, the feature analysis and the checks of every build.

Outside references, named beside each assertion:
- ROC AUC: scikit-learn's `roc_auc_score`.
- Pearson and Spearman correlations: scipy's `scipy.stats.pearsonr` and `spearmanr`.
- Labels: computed here with DuckDB SQL straight from the generated Parquet (a simple churn
  label in the published label format), not by daymark.
Planted leaks: a source read past the cutoff through the test-only environment variable
DAYMARK_TEST_ONLY_READ_PAST_CUTOFF, and a feature computed from the label event itself.
"""

import datetime as dt
import json
import math
import os
import pathlib
import re
import shutil
import subprocess
from zoneinfo import ZoneInfo

import duckdb
import pytest
from scipy.stats import pearsonr, spearmanr
from sklearn.metrics import roc_auc_score

REPO = pathlib.Path(__file__).resolve().parents[2]
TZ = "America/Chicago"  # the demo pipeline's time zone
START = dt.date(2026, 1, 1)
DAYS = 100
# Snapshot days whose 30-day horizon and 7-day grace close inside the world (matured).
FIRST, LAST = dt.date(2026, 2, 26), dt.date(2026, 2, 28)


def cutoff(day):
    return dt.datetime.combine(day, dt.time(0), ZoneInfo(TZ)).astimezone(dt.timezone.utc)


def run(daymark, *args, env=None, check=True):
    e = dict(os.environ)
    e.pop("DAYMARK_TEST_ONLY_READ_PAST_CUTOFF", None)
    e.update(env or {})
    p = subprocess.run([str(daymark), *map(str, args)], capture_output=True, text=True, env=e)
    if check and p.returncode != 0:
        raise AssertionError(f"{args} exited {p.returncode}\n{p.stdout}\n{p.stderr}")
    return p


def demo_pipeline(world, extra_sources="", extra_features="", checks=None):
    text = (REPO / "pipelines" / "demo.yaml").read_text().replace("../demo-data/world/", f"{world}/")
    if extra_sources:
        text = text.replace("\nsources:\n", "\nsources:\n" + extra_sources)
    if extra_features:
        text = text.replace("\nfeatures:\n", "\nfeatures:\n" + extra_features)
    if checks:
        text = text[: text.index("\nchecks:\n")] + "\n" + checks
    return text


def write_labels(world, out, days):
    """Writes labels/dt=D/part-0.parquet in the published label format, with DuckDB.

    Label (simple churn): the key has an `ended` row in (cutoff, cutoff + 30 days] not
    followed within 7 days by a `resumed` or `started` row.
    """
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"CREATE VIEW subs AS SELECT * FROM read_parquet('{world}/subscriptions/*/*.parquet')")
    for day in days:
        snap = f"{out}/snapshots/dt={day}/part-0.parquet"
        target = pathlib.Path(out) / "labels" / f"dt={day}"
        target.mkdir(parents=True, exist_ok=True)
        c, h = cutoff(day), cutoff(day + dt.timedelta(days=30))
        con.execute(
            f"""
            COPY (
              WITH ends AS (
                SELECT e.customer_id, min(e.changed_at) AS ended_at FROM subs e
                WHERE e.kind = 'ended' AND e.changed_at > $c AND e.changed_at <= $h
                  AND NOT EXISTS (
                    SELECT 1 FROM subs r
                    WHERE r.customer_id = e.customer_id AND r.kind IN ('resumed', 'started')
                      AND r.changed_at > e.changed_at
                      AND r.changed_at <= e.changed_at + INTERVAL 7 DAY)
                GROUP BY e.customer_id)
              SELECT s.customer_id, s.snapshot_date,
                     e.customer_id IS NOT NULL AS churned_30d,
                     CAST(date_diff('day', $c, e.ended_at) AS INTEGER) AS days_to_event,
                     false AS censored,
                     CAST($m AS TIMESTAMPTZ) AS matured_at
              FROM read_parquet('{snap}') s LEFT JOIN ends e USING (customer_id)
            ) TO '{target}/part-0.parquet' (FORMAT PARQUET)
            """,
            {"c": c, "h": h, "m": cutoff(day + dt.timedelta(days=37))},
        )


@pytest.fixture(scope="module")
def small_world(daymark, tmp_path_factory):
    out = tmp_path_factory.mktemp("audit_world")
    run(daymark, "generate", "--out", out / "world", "--customers", 400, "--days", DAYS,
        "--start", START, "--seed", 3)
    return out


@pytest.fixture(scope="module")
def clean(daymark, small_world):
    """The demo pipeline built for three matured days; audits before and after labels."""
    path = small_world / "clean.yaml"
    path.write_text(demo_pipeline(small_world / "world"))
    out = small_world / "clean_out"
    run(daymark, "build", path, "--from", FIRST, "--to", LAST, "--out", out)
    before = run(daymark, "audit", path, "--outputs", out, "--json", "--sample", 60, "--sample-days", 1)
    write_labels(small_world / "world", out, [FIRST + dt.timedelta(days=i) for i in range(3)])
    after = run(daymark, "audit", path, "--outputs", out, "--json", "--sample", 60, "--sample-days", 1)
    return {"pipeline": path, "out": out, "before": json.loads(before.stdout),
            "after": json.loads(after.stdout)}


def statuses(report):
    return {c["name"]: c["status"] for c in report["checks"]}


def test_clean_pipeline_passes(clean):
    before, after = clean["before"], clean["after"]
    # Without labels the label scan degrades to "skipped", not a failure.
    assert statuses(before)["label scan"] == "skipped"
    assert "no matured labels yet" in [c for c in before["checks"] if c["number"] == 4][0]["summary"]
    assert before["passed"] is True
    assert statuses(after) == {"plan": "pass", "provenance": "pass", "recomputation": "pass",
                               "label scan": "pass", "skew": "pass"}, after["checks"]
    rec = [c for c in after["checks"] if c["name"] == "recomputation"][0]
    assert rec["evidence"]["rows_compared"] == 60
    # Provenance recorded in the footer: every latest event before the cutoff (checked
    # here again from the published file's metadata with DuckDB).
    con = duckdb.connect()
    meta = con.execute(
        f"SELECT value FROM parquet_kv_metadata('{clean['out']}/snapshots/dt={LAST}/part-0.parquet') "
        "WHERE key = 'daymark.provenance'").fetchone()[0]
    prov = json.loads(meta)
    c = cutoff(LAST)
    for source, p in prov["sources"].items():
        t = dt.datetime.fromisoformat(p["max_event_time"].replace("Z", "+00:00"))
        assert t < c, (source, t, c)
        assert c - t < dt.timedelta(days=2), (source, t)  # the latest rows are recent


def matured_frame(out):
    con = duckdb.connect()
    return con.execute(
        f"""SELECT s.*, l.churned_30d::INT AS y
            FROM read_parquet('{out}/snapshots/*/*.parquet', hive_partitioning = false) s
            JOIN read_parquet('{out}/labels/*/*.parquet', hive_partitioning = false) l
            USING (customer_id, snapshot_date)"""
    ).fetchdf()


def test_auc_and_correlations_match_scikit_learn_and_scipy(clean):
    df = matured_frame(clean["out"])
    analysis = clean["after"]["analysis"]
    assert analysis["rows"] == len(df)
    assert analysis["positives"] == int(df["y"].sum())
    checked = 0
    for f in analysis["features"]:
        col = df[f["name"]].astype(float)
        mask = col.notna()
        x, y = col[mask], df["y"][mask]
        if x.nunique() < 2 or y.nunique() < 2:
            continue
        # Source: scikit-learn roc_auc_score.
        assert f["auc"] == pytest.approx(roc_auc_score(y, x), abs=1e-9), f["name"]
        # Source: scipy.stats.pearsonr and spearmanr.
        assert f["pearson"] == pytest.approx(pearsonr(x, y).statistic, abs=1e-9), f["name"]
        assert f["spearman"] == pytest.approx(spearmanr(x, y).statistic, abs=1e-9), f["name"]
        checked += 1
    assert checked >= 20, checked
    # Between features: pairs where neither has nulls (ranks are then the textbook ones).
    names = [f["name"] for f in analysis["features"]]
    full = [i for i, n in enumerate(names)
            if df[n].notna().all() and df[n].astype(float).nunique() > 1]
    pairs = 0
    for a in full[:12]:
        for b in full[:12]:
            if a < b:
                xa, xb = df[names[a]].astype(float), df[names[b]].astype(float)
                assert analysis["pearson"][a][b] == pytest.approx(pearsonr(xa, xb).statistic, abs=1e-9)
                assert analysis["spearman"][a][b] == pytest.approx(spearmanr(xa, xb).statistic, abs=1e-9)
                pairs += 1
    assert pairs >= 20, pairs
    # A feature and its own log1p are monotone: Spearman 1 (flagged redundant at 0.95).
    red = {(a, b) for a, b, _, _ in clean["after"]["redundant"]}
    assert ("minutes_watched_28d", "minutes_watched_28d_log") in red


def test_planted_read_past_cutoff_is_caught(daymark, small_world, clean):
    out = small_world / "leak_out"
    leak = {"DAYMARK_TEST_ONLY_READ_PAST_CUTOFF": "plays:3d"}
    run(daymark, "build", clean["pipeline"], "--from", LAST - dt.timedelta(days=1), "--to", LAST,
        "--out", out, "--engine", "naive", env=leak)
    p = run(daymark, "audit", clean["pipeline"], "--outputs", out, "--json", "--sample", 80,
            "--sample-days", 1, check=False)
    assert p.returncode == 3, p.stderr
    report = json.loads(p.stdout)
    s = statuses(report)
    # The footer shows plays events after the cutoff; recomputation without the leak differs.
    assert s["provenance"] == "fail" and s["recomputation"] == "fail", report["checks"]
    prov = [c for c in report["checks"] if c["name"] == "provenance"][0]
    assert {e["source"] for e in prov["evidence"]["after_cutoff"]} == {"plays"}
    # With the same setting, the plan check sees the read ending 3 days after the cutoff.
    p = run(daymark, "audit", clean["pipeline"], "--outputs", out, "--json", "--sample", 10,
            "--sample-days", 1, env=leak, check=False)
    plan = [c for c in json.loads(p.stdout)["checks"] if c["name"] == "plan"][0]
    assert plan["status"] == "fail"
    first = plan["evidence"]["reads_past_cutoff"][0]
    assert first["source"] == "plays" and "plays_7d" in first["features"]


def test_feature_derived_from_the_label_event_is_caught(daymark, small_world):
    """A source whose rows are the subscription ends, stamped 29 days early (the kind of
    table a careless join produces): a count over it encodes the label."""
    world = small_world / "world"
    flags = world / "end_flags"
    if flags.exists():
        shutil.rmtree(flags)
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    rows = con.execute(
        f"""SELECT change_id AS flag_id, customer_id, changed_at - INTERVAL 29 DAY AS flagged_at
            FROM read_parquet('{world}/subscriptions/*/*.parquet') WHERE kind = 'ended'""").fetchdf()
    con.register("flags_df", rows)
    for d in range(DAYS):
        day = START + dt.timedelta(days=d)
        (flags / f"dt={day}").mkdir(parents=True)
        con.execute(
            f"""COPY (SELECT flag_id, customer_id, flagged_at, flagged_at AS arrived_at FROM flags_df
                     WHERE CAST(timezone('{TZ}', flagged_at) AS DATE) = DATE '{day}')
                TO '{flags}/dt={day}/part-0.parquet' (FORMAT PARQUET)""")
        (flags / f"dt={day}" / "_complete").write_text("")
    src = (f"  end_flags:\n    location: {flags}\n    event_time: flagged_at\n"
           "    arrival_time: arrived_at\n")
    feat = "  - name: end_flags_30d\n    source: end_flags\n    agg: count\n    window: 30d\n"
    path = small_world / "label_leak.yaml"
    path.write_text(demo_pipeline(world, extra_sources=src, extra_features=feat))
    out = small_world / "label_leak_out"
    run(daymark, "build", path, "--from", FIRST, "--to", LAST, "--out", out)
    write_labels(world, out, [FIRST + dt.timedelta(days=i) for i in range(3)])
    p = run(daymark, "audit", path, "--outputs", out, "--json", "--sample", 20, "--sample-days", 1,
            check=False)
    assert p.returncode == 3, p.stderr
    report = json.loads(p.stdout)
    scan = [c for c in report["checks"] if c["name"] == "label scan"][0]
    assert scan["status"] == "fail"
    flagged = {f["feature"]: f["auc"] for f in scan["evidence"]["flagged"]}
    assert set(flagged) == {"end_flags_30d"}, flagged
    # Source: scikit-learn roc_auc_score on the same rows.
    df = matured_frame(out)
    assert flagged["end_flags_30d"] == pytest.approx(
        roc_auc_score(df["y"], df["end_flags_30d"].astype(float)), abs=1e-9)
    # Everything else about the build is clean.
    s = statuses(report)
    assert s["plan"] == s["provenance"] == s["recomputation"] == "pass", report["checks"]


@pytest.mark.parametrize("checks, expected", [
    ("checks:\n  on_fail: fail\n  max_population_change: 0.000001\n", "population:"),
    ("checks:\n  on_fail: fail\n  drift: { warn: 0.0000001, fail: 0.0000002, reference: 28d }\n",
     "drift:"),
])
def test_failing_build_check_publishes_nothing(daymark, small_world, clean, checks, expected):
    path = small_world / "strict.yaml"
    path.write_text(demo_pipeline(small_world / "world", checks=checks))
    day = LAST + dt.timedelta(days=1)
    p = run(daymark, "build", path, "--date", day, "--out", clean["out"], check=False)
    assert p.returncode == 3, p.stdout + p.stderr
    assert expected in p.stderr
    assert not (clean["out"] / "snapshots" / f"dt={day}").exists()
    assert not any((clean["out"] / "_staging").glob("*")) if (clean["out"] / "_staging").exists() else True


def test_failing_check_stops_a_backfill_at_that_day(daymark, small_world, tmp_path):
    """A backfill encodes several days at once but publishes them in order: the days before
    the first failing one are published, none from it on, and no staging file is left."""
    path = small_world / "strict_range.yaml"
    path.write_text(demo_pipeline(small_world / "world",
                                  checks="checks:\n  on_fail: fail\n  max_population_change: 0.000001\n"))
    out = tmp_path / "out"
    first = START + dt.timedelta(days=40)
    days = [first + dt.timedelta(days=i) for i in range(10)]
    p = run(daymark, "build", path, "--from", days[0], "--to", days[-1], "--out", out, check=False)
    assert p.returncode == 3, p.stdout + p.stderr
    m = re.search(r"snapshot (\d{4}-\d\d-\d\d): 1 check\(s\) failed[^\n]*\n\s+"
                  r"population: (\d+) rows against (\d+) on (\d{4}-\d\d-\d\d)", p.stderr)
    assert m, p.stderr
    failed, rows, prev_rows, prev = dt.date.fromisoformat(m[1]), int(m[2]), int(m[3]), m[4]
    assert days[0] < failed < days[-1]
    published = sorted(d.name for d in (out / "snapshots").glob("dt=*"))
    assert published == [f"dt={d}" for d in days if d < failed]
    # Read with DuckDB: the published days have equal populations (so they passed), and the
    # failing day's message names the previous day's row count as published.
    con = duckdb.connect()
    counts = [con.execute(f"SELECT count(*) FROM read_parquet('{out}/snapshots/{d}/*.parquet')").fetchone()[0]
              for d in published]
    assert len(set(counts)) == 1, counts
    assert published[-1] == f"dt={prev}" and counts[-1] == prev_rows != rows
    staging = out / "_staging"
    assert not staging.exists() or not any(staging.iterdir())


CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--enable-logging=stderr", "--v=0", "--window-size=1280,4000"]

PROBE = """<script>
window.__errors = [];
window.addEventListener('error', e => window.__errors.push(String(e.message)));
window.addEventListener('load', () => {
  const charts = [...document.querySelectorAll('svg.chart')].map(s => {
    const b = s.getBBox();
    return {label: s.getAttribute('aria-label'), shapes: s.querySelectorAll('rect,polyline,circle,line').length,
            width: b.width, height: b.height};
  });
  const pre = document.createElement('pre');
  pre.id = 'probe';
  pre.textContent = JSON.stringify({charts, errors: window.__errors});
  document.body.appendChild(pre);
});
</script></body>"""


def chromium(args, tmp_path):
    exe = shutil.which("chromium")
    assert exe, "chromium is missing: tests/run.sh installs the Debian package"
    profile = tmp_path / f"profile-{len(list(tmp_path.iterdir()))}"
    return subprocess.run([exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, text=True, timeout=300)


def test_report_renders_in_headless_chromium(daymark, clean, tmp_path):
    html = tmp_path / "report.html"
    p = run(daymark, "report", clean["pipeline"], "--outputs", clean["out"], "--out", html,
            "--sample", 10, "--sample-days", 1)
    charts = int(re.search(r"\((\d+) charts", p.stdout).group(1))
    text = html.read_text()
    # Self-contained: no scripts, no links, nothing fetched (the only URL is the SVG namespace).
    assert "<script" not in text and "<link" not in text
    assert set(re.findall(r"https?://[^\"' ]+", text)) == {"http://www.w3.org/2000/svg"}
    for title in ["Population", "Label rate", "PSI against the previous day", "ROC AUC",
                  "Share of null values", "Pearson correlation"]:
        assert title in text, title
    # Screenshot of the report as written; no console messages at all.
    shot = tmp_path / "report.png"
    s = chromium([f"--screenshot={shot}", html.as_uri()], tmp_path)
    assert shot.exists(), s.stderr
    png = shot.read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    assert int.from_bytes(png[16:20], "big") == 1280 and int.from_bytes(png[20:24], "big") == 4000
    assert len(png) > 50_000  # a blank page compresses to a few kilobytes
    assert "CONSOLE" not in s.stderr, s.stderr
    # Every chart rendered: a probe script added to a copy measures each SVG after layout.
    probed = tmp_path / "probed.html"
    probed.write_text(text.replace("</body>", PROBE))
    d = chromium(["--dump-dom", probed.as_uri()], tmp_path)
    found = re.search(r'<pre id="probe">(.*?)</pre>', d.stdout, re.S)
    assert found, d.stdout[-2000:] + d.stderr[-2000:]
    probe = json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&")
                       .replace("&lt;", "<").replace("&gt;", ">"))
    assert probe["errors"] == []
    assert len(probe["charts"]) == charts >= 30
    for c in probe["charts"]:
        assert c["shapes"] > 0 and c["width"] > 0 and c["height"] > 0, c
    assert "CONSOLE" not in d.stderr, d.stderr
