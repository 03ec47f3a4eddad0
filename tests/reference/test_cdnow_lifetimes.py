"""daymark reproduces published purchase statistics of the CDNOW sample.

Source: the CDNOW purchase log sample (2,357 customers, 1997-01 to 1998-06) that ships
inside the `lifetimes` PyPI package, and that package's own
`summary_data_from_transaction_data` as the reference for each customer's repeat-purchase
frequency, recency and age T. The aggregate figures (frequency sum 2457, 1411 customers
with no repeat purchase, mean recency 47.920661858294444 days, calibration period ending
1997-09-30) are the ones `lifetimes` gives on this sample. Same-day purchases collapse
into one purchase day, as in `lifetimes`.
"""

import os
import pathlib
import subprocess

import duckdb
import lifetimes
import pandas as pd
import pytest
from lifetimes.utils import summary_data_from_transaction_data

PIPELINE = """
daymark: 1
name: cdnow_repeat_purchases
timezone: UTC
key: customer_id
output: {out}
sources:
  purchases:
    location: {log}
    event_time: purchased_at
population:
  recent_activity: {{ source: purchases, within: 400d }}
features:
  - name: purchase_days
    description: Distinct days with a purchase.
    source: purchases
    agg: active_days
    window: all
  - name: has_purchase
    source: purchases
    agg: count_distinct
    expr: "1"
    window: all
  - name: frequency
    description: Repeat purchase days (lifetimes' frequency).
    difference: [purchase_days, has_purchase]
  - name: days_since_first
    source: purchases
    agg: days_since_first
    fill: null
  - name: days_since_last
    source: purchases
    agg: days_since_last
    fill: null
  - name: recency
    description: Days from first to last purchase (lifetimes' recency).
    difference: [days_since_first, days_since_last]
"""


def load_sample():
    path = os.path.join(os.path.dirname(lifetimes.__file__), "datasets", "CDNOW_sample.txt")
    df = pd.read_csv(path, sep=r"\s+", header=None, names=["master_id", "customer_id", "date", "cds", "dollars"],
                     dtype={"master_id": str, "customer_id": str, "date": str})
    df["date"] = pd.to_datetime(df["date"], format="%Y%m%d")
    return df


def test_cdnow_frequency_and_recency_match_lifetimes(daymark, tmp_path):
    df = load_sample()
    assert df["customer_id"].nunique() == 2357
    log = tmp_path / "purchases"
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("sample", df)
    # The log as daymark expects it: Parquet partitioned by purchase day.
    con.execute(
        f"""COPY (SELECT customer_id, CAST(date AS TIMESTAMPTZ) AS purchased_at, cds, dollars,
                  strftime(date, '%Y-%m-%d') AS dt FROM sample)
            TO '{log}' (FORMAT PARQUET, PARTITION_BY (dt))"""
    )
    pipeline = tmp_path / "cdnow.yaml"
    pipeline.write_text(PIPELINE.format(out=tmp_path / "out", log=log))
    run = subprocess.run([str(daymark), "build", str(pipeline), "--date", "1997-10-01"], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr + run.stdout

    got = con.execute(
        f"SELECT customer_id, frequency, recency, days_since_first FROM "
        f"read_parquet('{tmp_path}/out/snapshots/dt=1997-10-01/part-0.parquet', hive_partitioning = false)"
    ).fetchall()
    got = {c: (f, r, t) for c, f, r, t in got}
    # Published figures for the calibration period ending 1997-09-30 (lifetimes).
    assert len(got) == 2357
    assert sum(v[0] for v in got.values()) == 2457
    assert sum(1 for v in got.values() if v[0] == 0) == 1411
    assert sum(v[1] for v in got.values()) / len(got) == pytest.approx(47.920661858294444, rel=1e-12)

    ref = summary_data_from_transaction_data(df, "customer_id", "date", observation_period_end="1997-09-30")
    for customer, row in ref.iterrows():
        frequency, recency, age = got[customer]
        assert frequency == row["frequency"], customer
        assert recency == row["recency"], customer
        # lifetimes counts T to the last day of the period (1997-09-30); daymark counts
        # days to the snapshot day (1997-10-01), one more.
        assert age - 1 == row["T"], customer


BACKFILL_PIPELINE = """
daymark: 1
name: cdnow_backfill
timezone: UTC
key: customer_id
output: {out}
sources:
  purchases:
    location: {log}
    event_time: purchased_at
population:
  recent_activity: {{ source: purchases, within: 400d }}
features:
  - name: purchase_days
    source: purchases
    agg: active_days
    window: all
  - name: days_since_first
    source: purchases
    agg: days_since_first
    fill: null
  - name: days_since_last
    source: purchases
    agg: days_since_last
    fill: null
  - name: purchases_28d
    source: purchases
    agg: count
    window: 28d
  - name: dollars_28d
    source: purchases
    agg: sum
    expr: dollars
    window: 28d
    fill: null
"""


def test_cdnow_backfill_matches_lifetimes_on_every_checked_day(daymark, tmp_path):
    """A 31-day backfill (one set-based query: counts, sums, active days and days since,
    the backfill's windowed-total path) gives, on its first and last day, lifetimes'
    frequency (purchase days - 1), recency and T for the calibration period ending the day
    before; and its 28-day purchase counts and dollar sums equal pandas' over the sample."""
    df = load_sample()
    log = tmp_path / "purchases"
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("sample", df)
    con.execute(
        f"""COPY (SELECT customer_id, CAST(date AS TIMESTAMPTZ) AS purchased_at, cds, dollars,
                  strftime(date, '%Y-%m-%d') AS dt FROM sample)
            TO '{log}' (FORMAT PARQUET, PARTITION_BY (dt))"""
    )
    pipeline = tmp_path / "cdnow_backfill.yaml"
    pipeline.write_text(BACKFILL_PIPELINE.format(out=tmp_path / "out", log=log))
    run = subprocess.run([str(daymark), "build", str(pipeline), "--from", "1997-09-01", "--to", "1997-10-01"],
                         capture_output=True, text=True)
    assert run.returncode == 0, run.stderr + run.stdout

    for day, period_end in [("1997-09-01", "1997-08-31"), ("1997-10-01", "1997-09-30")]:
        got = con.execute(
            f"SELECT customer_id, purchase_days, days_since_first, days_since_last, purchases_28d, dollars_28d FROM "
            f"read_parquet('{tmp_path}/out/snapshots/dt={day}/part-0.parquet', hive_partitioning = false)"
        ).fetchall()
        got = {row[0]: row[1:] for row in got}
        ref = summary_data_from_transaction_data(df, "customer_id", "date", observation_period_end=period_end)
        assert len(got) == len(ref) == 2357, day
        for customer, row in ref.iterrows():
            purchase_days, first, last, _, _ = got[customer]
            assert purchase_days - 1 == row["frequency"], (day, customer)
            assert first - last == row["recency"], (day, customer)
            assert first - 1 == row["T"], (day, customer)
        # 28 days before the snapshot day, the day itself excluded (pandas, straight from the sample).
        end = pd.Timestamp(day)
        window = df[(df["date"] >= end - pd.Timedelta(days=28)) & (df["date"] < end)]
        counts = window.groupby("customer_id").size()
        dollars = window.groupby("customer_id")["dollars"].sum()
        assert counts.sum() > 100, day
        for customer, (_, _, _, n, total) in got.items():
            assert n == counts.get(customer, 0), (day, customer)
            if customer in dollars.index:
                assert total == pytest.approx(dollars[customer], rel=1e-9), (day, customer)
            else:
                assert total is None, (day, customer)
