"""The demo world carries real churn signal, measured outside daymark.

Source of every number here: DuckDB reading the generated Parquet directly with plain SQL,
and scikit-learn's `roc_auc_score`. No daymark code computes features or labels here.
"""

import datetime as dt
from zoneinfo import ZoneInfo

import duckdb
from sklearn.metrics import roc_auc_score

TZ = "America/Chicago"  # the demo world's local time zone
START = dt.date(2026, 1, 1)
DAYS = 150


def cutoff(day):
    return dt.datetime.combine(day, dt.time(0), ZoneInfo(TZ)).astimezone(dt.timezone.utc)


def test_28_day_activity_predicts_churn(world):
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"CREATE VIEW plays AS SELECT * FROM read_parquet('{world}/plays/*/*.parquet')")
    con.execute(f"CREATE VIEW subs AS SELECT * FROM read_parquet('{world}/subscriptions/*/*.parquet')")
    labels, scores, population = [], [], 0
    # Snapshot days whose label window (30 days + 7 days grace) closes inside the world.
    for offset in range(35, DAYS - 37, 7):
        day = START + dt.timedelta(days=offset)
        c = cutoff(day)
        start28 = cutoff(day - dt.timedelta(days=28))
        horizon = cutoff(day + dt.timedelta(days=30))
        rows = con.execute(
            f"""
            WITH pop AS (
              SELECT customer_id FROM (
                SELECT customer_id, status,
                       row_number() OVER (PARTITION BY customer_id ORDER BY changed_at DESC) AS rn
                FROM subs WHERE changed_at < $c)
              WHERE rn = 1 AND status IN ('active', 'cancelling')),
            act AS (
              SELECT customer_id,
                     count(DISTINCT CAST(event_time AT TIME ZONE '{TZ}' AS DATE)) AS active_days
              FROM plays WHERE event_time >= $s AND event_time < $c
              GROUP BY customer_id),
            ends AS (
              SELECT e.customer_id FROM subs e
              WHERE e.kind = 'ended' AND e.changed_at > $c AND e.changed_at <= $h
                AND NOT EXISTS (
                  SELECT 1 FROM subs r
                  WHERE r.customer_id = e.customer_id AND r.kind IN ('resumed', 'started')
                    AND r.changed_at > e.changed_at
                    AND r.changed_at <= e.changed_at + INTERVAL 7 DAY))
            SELECT coalesce(a.active_days, 0) AS active_days,
                   (p.customer_id IN (SELECT customer_id FROM ends))::INT AS churned
            FROM pop p LEFT JOIN act a USING (customer_id)
            """,
            {"c": c, "s": start28, "h": horizon},
        ).fetchall()
        population += len(rows)
        for active_days, churned in rows:
            scores.append(-active_days)  # fewer active days, more likely to leave
            labels.append(churned)
    rate = sum(labels) / len(labels)
    auc = roc_auc_score(labels, scores)
    print(f"rows={population} churn rate={rate:.4f} AUC(active_days_28d)={auc:.4f}")
    assert population > 10_000
    assert 0.01 < rate < 0.2, rate
    assert auc > 0.6, auc
