//! Outcomes of a model's scores: matured labels attached to (key, date, score) rows, and
//! per scoring day the base rate, ROC AUC, precision at the top and calibration by decile.
//!
//! ROC AUC is the Mann–Whitney statistic: (sum of the positives' ranks − P(P+1)/2) / (P·N),
//! with tied scores given their average rank, which counts a tied positive–negative pair as
//! one half. Precision at top k takes the k highest scores (ties broken by key, ascending);
//! top percent takes ceil(p/100 · rows) rows the same way. Deciles are `ntile(10)` over
//! scores ascending (ties broken by key): decile 1 holds the lowest scores.

use crate::backfill::labels_dir;
use crate::{list_partitions, object_url, LabelError};
use arrow::array::{Array, AsArray, RecordBatch};
use arrow::datatypes::{DataType, Date32Type, Float64Type, Int64Type};
use chrono::{Duration, NaiveDate};
use datafusion::prelude::{CsvReadOptions, ParquetReadOptions, SessionContext};
use daymark_engine::build::snapshots_dir;
use daymark_engine::sql::{ident, KnowledgeOverride};
use daymark_spec::Pipeline;
use daymark_store::object_store::ObjectStoreExt;
use daymark_store::Location;
use futures::TryStreamExt;
use std::collections::BTreeMap;

/// Where the scores are and how their columns are named.
#[derive(Debug, Clone)]
pub struct ScoreInput {
    /// A Parquet or CSV file, or a folder of them.
    pub location: Location,
    /// The key column (default: the pipeline's key).
    pub key: String,
    /// The scoring day column (a date, or text `YYYY-MM-DD`).
    pub date: String,
    /// The score column (higher: more likely to be positive).
    pub score: String,
}

/// Options of the measurement.
#[derive(Debug, Clone, Default)]
pub struct OutcomeOptions {
    /// Precision among the k highest scores of each day.
    pub top_k: Option<u64>,
    /// Precision among the highest p percent of each day.
    pub top_percent: Option<f64>,
    /// Knowledge mode of the snapshots and labels to read.
    pub mode: KnowledgeOverride,
}

/// Observed rate in one score decile.
#[derive(Debug, Clone, PartialEq)]
pub struct Decile {
    /// 1 (lowest scores) to 10.
    pub decile: u32,
    /// Rows.
    pub rows: u64,
    /// Mean score.
    pub mean_score: f64,
    /// Share of positives.
    pub observed_rate: f64,
}

/// Measures of one scoring day.
#[derive(Debug, Clone, PartialEq)]
pub struct DayOutcome {
    /// The scoring (snapshot) day.
    pub day: NaiveDate,
    /// Scored rows with a matured label.
    pub rows: u64,
    /// Positives among them.
    pub positives: u64,
    /// positives / rows.
    pub base_rate: f64,
    /// ROC AUC; `None` when the day has only one class.
    pub auc: Option<f64>,
    /// Precision among the top k (k capped at the rows).
    pub precision_at_k: Option<f64>,
    /// Precision among the top percent.
    pub precision_at_percent: Option<f64>,
    /// Rows counted in the top percent.
    pub percent_rows: Option<u64>,
    /// Calibration by decile.
    pub deciles: Vec<Decile>,
}

/// Score rows that could not be measured, by reason.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Unmatched {
    /// Score rows read.
    pub score_rows: u64,
    /// Rows with a null key, date or score.
    pub null_rows: u64,
    /// Rows dated on a day without a snapshot.
    pub no_snapshot_rows: u64,
    /// Those days.
    pub no_snapshot_days: Vec<NaiveDate>,
    /// Rows dated on a day whose labels have not matured.
    pub not_matured_rows: u64,
    /// Those days.
    pub not_matured_days: Vec<NaiveDate>,
    /// Rows whose key is not in that day's snapshot.
    pub unknown_key_rows: u64,
}

/// The result of `outcomes`.
#[derive(Debug, Clone)]
pub struct Outcomes {
    /// Per scoring day, in date order.
    pub days: Vec<DayOutcome>,
    /// What could not be measured.
    pub unmatched: Unmatched,
}

fn epoch() -> NaiveDate {
    NaiveDate::from_ymd_opt(1970, 1, 1).expect("valid date")
}

fn col_i64(b: &RecordBatch, i: usize) -> Result<Vec<Option<i64>>, LabelError> {
    let a = arrow::compute::cast(b.column(i), &DataType::Int64)
        .map_err(|e| LabelError::Invalid(e.to_string()))?;
    let a = a.as_primitive::<Int64Type>();
    Ok((0..a.len())
        .map(|j| (!a.is_null(j)).then(|| a.value(j)))
        .collect())
}

fn col_f64(b: &RecordBatch, i: usize) -> Result<Vec<Option<f64>>, LabelError> {
    let a = arrow::compute::cast(b.column(i), &DataType::Float64)
        .map_err(|e| LabelError::Invalid(e.to_string()))?;
    let a = a.as_primitive::<Float64Type>();
    Ok((0..a.len())
        .map(|j| (!a.is_null(j)).then(|| a.value(j)))
        .collect())
}

fn col_day(b: &RecordBatch, i: usize) -> Vec<Option<NaiveDate>> {
    let a = b.column(i).as_primitive::<Date32Type>();
    (0..a.len())
        .map(|j| (!a.is_null(j)).then(|| epoch() + Duration::days(a.value(j) as i64)))
        .collect()
}

async fn collect(
    ctx: &SessionContext,
    sql: &str,
    what: &str,
) -> Result<Vec<RecordBatch>, LabelError> {
    ctx.sql(sql)
        .await
        .map_err(LabelError::engine(what))?
        .collect()
        .await
        .map_err(LabelError::engine(what))
}

/// Registers the scores as table `__scores_raw`: a file read by its extension, or a
/// folder read as Parquet when it holds `.parquet` files, else as CSV.
async fn register_scores(ctx: &SessionContext, input: &ScoreInput) -> Result<(), LabelError> {
    let loc = &input.location;
    ctx.register_object_store(&loc.root_url, loc.store.clone());
    let is_file = loc.store.head(&loc.prefix).await.is_ok();
    let (url, csv) = if is_file {
        let url = loc.url().trim_end_matches('/').to_string();
        let csv = url.to_ascii_lowercase().ends_with(".csv");
        (url, csv)
    } else {
        let metas: Vec<_> = loc
            .store
            .list(Some(&loc.prefix))
            .try_collect()
            .await
            .map_err(|e| LabelError::Store {
                path: loc.display(),
                reason: e.to_string(),
            })?;
        let parquet = metas
            .iter()
            .any(|m| m.location.as_ref().ends_with(".parquet"));
        let csv = metas.iter().any(|m| m.location.as_ref().ends_with(".csv"));
        if !parquet && !csv {
            return Err(LabelError::Invalid(format!(
                "{}: no .parquet or .csv file found",
                loc.display()
            )));
        }
        (loc.url(), !parquet)
    };
    let what = format!("reading scores {}", loc.display());
    let df = if csv {
        ctx.read_csv(url, CsvReadOptions::new().has_header(true))
            .await
    } else {
        ctx.read_parquet(url, ParquetReadOptions::default()).await
    }
    .map_err(|e| LabelError::Invalid(format!("{what}: {e}")))?;
    let names: Vec<String> = df
        .schema()
        .fields()
        .iter()
        .map(|f| f.name().clone())
        .collect();
    for (role, c) in [
        ("key", &input.key),
        ("date", &input.date),
        ("score", &input.score),
    ] {
        if !names.contains(c) {
            return Err(LabelError::Invalid(format!(
                "{}: no {role} column `{c}` (columns: {}); name it with --{role}-column",
                loc.display(),
                names.join(", ")
            )));
        }
    }
    let _ = ctx.deregister_table("__scores_raw");
    ctx.register_table("__scores_raw", df.into_view())
        .map_err(LabelError::engine(what))?;
    Ok(())
}

/// Attaches matured labels to the scores and measures each scoring day. Duplicate
/// (key, date) rows are an error naming the first of them.
pub async fn outcomes(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    input: &ScoreInput,
    opts: &OutcomeOptions,
) -> Result<Outcomes, LabelError> {
    let label = pipeline.label.as_ref().ok_or(LabelError::NoLabel)?;
    if let Some(p) = opts.top_percent {
        if !(p > 0.0 && p <= 100.0) {
            return Err(LabelError::Invalid(format!(
                "--top-percent {p}: give a share from 0 (excluded) to 100"
            )));
        }
    }
    if opts.top_k == Some(0) {
        return Err(LabelError::Invalid("--top-k must be at least 1".into()));
    }
    register_scores(ctx, input).await?;
    ctx.register_object_store(&out.root_url, out.store.clone());
    let snapshots = list_partitions(out, snapshots_dir(opts.mode)).await?;
    let labels = list_partitions(out, labels_dir(opts.mode)).await?;

    let mut unmatched = Unmatched::default();
    // The scores, typed: the key as the labels' key, the date as a date, the score as a double.
    let key_type = if let Some((_, m)) = labels.iter().next() {
        let df = ctx
            .read_parquet(object_url(out, &m.location), ParquetReadOptions::default())
            .await
            .map_err(LabelError::engine("reading labels"))?;
        df.schema()
            .field_with_unqualified_name(&pipeline.file.key)
            .map(|f| f.data_type().clone())
            .unwrap_or(DataType::Utf8)
    } else {
        DataType::Utf8
    };
    let scores_sql = format!(
        "SELECT arrow_cast({}, '{key_type}') AS __k, CAST({} AS DATE) AS __d, CAST({} AS DOUBLE) AS __s FROM __scores_raw",
        ident(&input.key),
        ident(&input.date),
        ident(&input.score)
    );
    let df = ctx
        .sql(&scores_sql)
        .await
        .map_err(|e| LabelError::Invalid(format!("{}: {e}", input.location.display())))?;
    let _ = ctx.deregister_table("__scores");
    ctx.register_table("__scores", df.into_view())
        .map_err(LabelError::engine("reading scores"))?;
    let totals = collect(
        ctx,
        "SELECT count(*), count(*) FILTER (WHERE __k IS NULL OR __d IS NULL OR __s IS NULL OR isnan(__s)) FROM __scores",
        "reading scores",
    )
    .await
    .map_err(|e| LabelError::Invalid(format!("{}: {e}", input.location.display())))?;
    if let Some(b) = totals.first() {
        unmatched.score_rows = col_i64(b, 0)?[0].unwrap_or(0) as u64;
        unmatched.null_rows = col_i64(b, 1)?[0].unwrap_or(0) as u64;
    }
    let dups = collect(
        ctx,
        "SELECT arrow_cast(__k, 'Utf8'), __d, count(*) AS n, count(*) OVER () AS pairs FROM __scores WHERE __k IS NOT NULL AND __d IS NOT NULL GROUP BY __k, __d HAVING count(*) > 1 ORDER BY __d, __k LIMIT 5",
        "checking duplicate scores",
    )
    .await?;
    let mut first_dups = Vec::new();
    for b in &dups {
        let keys = b.column(0).as_string::<i32>();
        let days = col_day(b, 1);
        let n = col_i64(b, 2)?;
        for i in 0..b.num_rows() {
            first_dups.push(format!(
                "({}, {}) x{}",
                keys.value(i),
                days[i].map(|d| d.to_string()).unwrap_or_default(),
                n[i].unwrap_or(0)
            ));
        }
    }
    if !first_dups.is_empty() {
        let total = dups
            .first()
            .map(|b| col_i64(b, 3))
            .transpose()?
            .and_then(|v| v[0])
            .unwrap_or(first_dups.len() as i64);
        return Err(LabelError::Invalid(format!(
            "{}: {total} (key, date) pair(s) are scored more than once; first: {}",
            input.location.display(),
            first_dups.join(", ")
        )));
    }

    // Rows per scoring day, and those that found a label.
    let label_urls: Vec<String> = labels
        .values()
        .map(|m| object_url(out, &m.location))
        .collect();
    let _ = ctx.deregister_table("__lab");
    let key = ident(&pipeline.file.key);
    let joined_from = if label_urls.is_empty() {
        "(SELECT __k, __d, __s, CAST(NULL AS INT) AS __y FROM __scores)".to_string()
    } else {
        let labs = ctx
            .read_parquet(label_urls, ParquetReadOptions::default())
            .await
            .map_err(LabelError::engine("reading labels"))?;
        ctx.register_table("__lab", labs.into_view())
            .map_err(LabelError::engine("reading labels"))?;
        format!(
            "(SELECT s.__k, s.__d, s.__s, CASE WHEN l.{lab} THEN 1 WHEN NOT l.{lab} THEN 0 END AS __y FROM __scores s LEFT JOIN __lab l ON l.{key} = s.__k AND l.snapshot_date = s.__d)",
            lab = ident(&label.name)
        )
    };
    let per_day = collect(
        ctx,
        &format!(
            "SELECT __d, count(*), count(__y) FROM {joined_from} WHERE __k IS NOT NULL AND __d IS NOT NULL AND __s IS NOT NULL AND NOT isnan(__s) GROUP BY __d ORDER BY __d"
        ),
        "attaching labels",
    )
    .await?;
    for b in &per_day {
        let days = col_day(b, 0);
        let n = col_i64(b, 1)?;
        let matched = col_i64(b, 2)?;
        for i in 0..b.num_rows() {
            let Some(day) = days[i] else { continue };
            let missing = (n[i].unwrap_or(0) - matched[i].unwrap_or(0)).max(0) as u64;
            if labels.contains_key(&day) {
                unmatched.unknown_key_rows += missing;
            } else if snapshots.contains_key(&day) {
                unmatched.not_matured_rows += missing;
                unmatched.not_matured_days.push(day);
            } else {
                unmatched.no_snapshot_rows += missing;
                unmatched.no_snapshot_days.push(day);
            }
        }
    }

    // The measures, one plan over the matched rows.
    let k = opts
        .top_k
        .map(|k| k.to_string())
        .unwrap_or_else(|| "0".into());
    let pct = opts.top_percent.unwrap_or(0.0);
    let ranked = format!(
        "WITH j AS (SELECT * FROM {joined_from} WHERE __y IS NOT NULL AND __s IS NOT NULL AND NOT isnan(__s)),
r AS (SELECT __d, __k, __s, __y,
        rank() OVER (PARTITION BY __d ORDER BY __s) + (count(*) OVER (PARTITION BY __d, __s) - 1) / 2.0 AS __rank,
        row_number() OVER (PARTITION BY __d ORDER BY __s DESC, __k) AS __pos,
        count(*) OVER (PARTITION BY __d) AS __n,
        ntile(10) OVER (PARTITION BY __d ORDER BY __s, __k) AS __decile
      FROM j)"
    );
    let day_sql = format!(
        "{ranked}
SELECT __d, count(*), sum(__y), sum(CASE WHEN __y = 1 THEN __rank ELSE 0 END),
       sum(CASE WHEN __pos <= {k} THEN __y ELSE 0 END),
       sum(CASE WHEN __pos <= ceil({pct:?} / 100.0 * __n) THEN __y ELSE 0 END),
       max(ceil({pct:?} / 100.0 * __n))
FROM r GROUP BY __d ORDER BY __d"
    );
    let decile_sql = format!(
        "{ranked}
SELECT __d, __decile, count(*), avg(__s), avg(CAST(__y AS DOUBLE)) FROM r GROUP BY __d, __decile ORDER BY __d, __decile"
    );
    let mut deciles: BTreeMap<NaiveDate, Vec<Decile>> = BTreeMap::new();
    for b in collect(ctx, &decile_sql, "measuring scores").await? {
        let days = col_day(&b, 0);
        let dec = col_i64(&b, 1)?;
        let n = col_i64(&b, 2)?;
        let ms = col_f64(&b, 3)?;
        let rate = col_f64(&b, 4)?;
        for i in 0..b.num_rows() {
            let Some(day) = days[i] else { continue };
            deciles.entry(day).or_default().push(Decile {
                decile: dec[i].unwrap_or(0) as u32,
                rows: n[i].unwrap_or(0) as u64,
                mean_score: ms[i].unwrap_or(f64::NAN),
                observed_rate: rate[i].unwrap_or(f64::NAN),
            });
        }
    }
    let mut result = Vec::new();
    for b in collect(ctx, &day_sql, "measuring scores").await? {
        let days = col_day(&b, 0);
        let n = col_i64(&b, 1)?;
        let pos = col_i64(&b, 2)?;
        let rank_sum = col_f64(&b, 3)?;
        let hits_k = col_i64(&b, 4)?;
        let hits_p = col_i64(&b, 5)?;
        let rows_p = col_f64(&b, 6)?;
        for i in 0..b.num_rows() {
            let Some(day) = days[i] else { continue };
            let rows = n[i].unwrap_or(0) as u64;
            let p = pos[i].unwrap_or(0) as u64;
            let neg = rows - p;
            let auc = (p > 0 && neg > 0).then(|| {
                (rank_sum[i].unwrap_or(0.0) - (p as f64) * (p as f64 + 1.0) / 2.0)
                    / (p as f64 * neg as f64)
            });
            let precision_at_k = opts.top_k.map(|k| {
                let taken = k.min(rows).max(1);
                hits_k[i].unwrap_or(0) as f64 / taken as f64
            });
            let percent_rows = opts
                .top_percent
                .map(|_| rows_p[i].unwrap_or(0.0).max(0.0) as u64);
            let precision_at_percent = percent_rows
                .filter(|r| *r > 0)
                .map(|r| hits_p[i].unwrap_or(0) as f64 / r as f64);
            result.push(DayOutcome {
                day,
                rows,
                positives: p,
                base_rate: if rows == 0 {
                    0.0
                } else {
                    p as f64 / rows as f64
                },
                auc,
                precision_at_k,
                precision_at_percent,
                percent_rows,
                deciles: deciles.remove(&day).unwrap_or_default(),
            });
        }
    }
    Ok(Outcomes {
        days: result,
        unmatched,
    })
}
