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
