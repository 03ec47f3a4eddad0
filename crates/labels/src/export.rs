//! Training sets: snapshots joined with matured labels over a date range, split by
//! snapshot date into train, validation and test with an embargo between the parts.
//!
//! The label of a row on day d looks at events up to d + horizon + grace. A later part's
//! first rows must not be dated before that, or a model selected on them has seen their
//! future through the earlier part's labels. So consecutive parts are at least `embargo`
//! days apart (first day of a part minus last day of the part before), and the embargo
//! must be at least horizon + grace unless forced.

use crate::backfill::labels_dir;
use crate::{list_partitions, object_url, LabelError};
use arrow::array::{Array, AsArray, RecordBatch};
use arrow::datatypes::{DataType, Int64Type, SchemaRef};
use chrono::{Duration, NaiveDate};
use datafusion::prelude::{ParquetReadOptions, SessionContext};
use daymark_engine::build::{child, snapshots_dir, write_query};
use daymark_engine::sql::{ident, literal, KnowledgeOverride};
use daymark_spec::Pipeline;
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::{ObjectStoreExt, PutPayload};
use daymark_store::Location;
use futures::StreamExt;
use serde_json::json;

/// Names of the parts, in time order.
pub const PARTS: [&str; 3] = ["train", "validation", "test"];

/// How the labeled days are split.
#[derive(Debug, Clone, PartialEq)]
pub enum Split {
    /// Shares of the labeled days (after the embargo gaps) for train, validation, test.
    /// A zero share leaves that part out.
    Fractions([f64; 3]),
    /// The first day of validation and the first day of test; the embargo is taken from
    /// the end of the part before each.
    Dates {
        /// First day of the validation part.
        validation: NaiveDate,
        /// First day of the test part.
        test: NaiveDate,
    },
}

impl Split {
    /// Parses `0.7,0.15,0.15` (shares summing to 1) or `2026-03-01,2026-04-01` (first days
    /// of validation and test).
    pub fn parse(text: &str) -> Result<Split, String> {
        let items: Vec<&str> = text.split(',').map(str::trim).collect();
        let help = "use shares `0.7,0.15,0.15` (train, validation, test; summing to 1) or first days `2026-03-01,2026-04-01` (validation, test)";
        if items.len() == 2 {
            let (Ok(v), Ok(t)) = (items[0].parse(), items[1].parse()) else {
                return Err(format!("--split `{text}`: {help}"));
            };
            if t <= v {
                return Err(format!(
                    "--split `{text}`: the test part must start after the validation part"
                ));
            }
            return Ok(Split::Dates {
                validation: v,
                test: t,
            });
        }
        if items.len() != 3 {
            return Err(format!("--split `{text}`: {help}"));
        }
        let mut f = [0.0; 3];
        for (i, item) in items.iter().enumerate() {
            f[i] = item
                .parse::<f64>()
                .ok()
                .filter(|x| x.is_finite() && *x >= 0.0)
                .ok_or_else(|| {
                    format!("--split `{text}`: `{item}` is not a share from 0 to 1; {help}")
                })?;
        }
        let sum: f64 = f.iter().sum();
        if (sum - 1.0).abs() > 1e-6 {
            return Err(format!(
                "--split `{text}`: the shares add up to {sum}, not 1"
            ));
        }
        Ok(Split::Fractions(f))
    }
}

/// One part's calendar days (inclusive).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PartRange {
    /// `train`, `validation` or `test`.
    pub name: &'static str,
    /// First snapshot day.
    pub first: NaiveDate,
    /// Last snapshot day.
    pub last: NaiveDate,
}

/// Splits the calendar days `first..=last` into parts, each next part starting at least
/// `embargo` days (at least 1) after the previous part's last day.
pub fn plan_parts(
    first: NaiveDate,
    last: NaiveDate,
    split: &Split,
    embargo: u32,
) -> Result<Vec<PartRange>, String> {
    let gap = embargo.max(1) as i64;
    match split {
        Split::Fractions(f) => {
            let wanted: Vec<(usize, f64)> = f
                .iter()
                .copied()
                .enumerate()
                .filter(|(_, x)| *x > 0.0)
                .collect();
            let n = (last - first).num_days() + 1;
            let usable = n - (wanted.len() as i64 - 1) * (gap - 1);
            if usable < wanted.len() as i64 {
                return Err(format!(
                    "the labeled days {first} .. {last} ({n} days) are too few for {} part(s) with {}-day embargo gaps between them",
                    wanted.len(),
                    gap
                ));
            }
            let mut parts = Vec::new();
            let mut cum = 0.0;
            let mut done = 0i64;
            let mut start = first;
            for (i, (idx, share)) in wanted.iter().enumerate() {
                cum += share;
                let end = if i + 1 == wanted.len() {
                    usable
                } else {
                    (cum * usable as f64).round() as i64
                };
                let size = end - done;
                if size < 1 {
                    return Err(format!(
                        "the {} part would get no day of {first} .. {last} after the embargo gaps: widen the range or change the shares",
                        PARTS[*idx]
                    ));
                }
                let part_last = start + Duration::days(size - 1);
                parts.push(PartRange {
                    name: PARTS[*idx],
                    first: start,
                    last: part_last,
                });
                done = end;
                start = part_last + Duration::days(gap);
            }
            Ok(parts)
        }
        Split::Dates { validation, test } => {
            let g = Duration::days(gap);
            let parts = vec![
                PartRange {
                    name: "train",
                    first,
                    last: *validation - g,
                },
                PartRange {
                    name: "validation",
                    first: *validation,
                    last: *test - g,
                },
                PartRange {
                    name: "test",
                    first: *test,
                    last,
                },
            ];
            for p in &parts {
                if p.last < p.first {
                    return Err(format!(
                        "the {} part is empty: with {gap}-day embargo gaps and labeled days {first} .. {last}, it would run from {} to {}",
                        p.name, p.first, p.last
                    ));
                }
            }
            Ok(parts)
        }
    }
}

/// What to export.
#[derive(Debug, Clone)]
pub struct ExportOptions {
    /// First snapshot day.
    pub from: NaiveDate,
    /// Last snapshot day (inclusive).
    pub to: NaiveDate,
    /// Where the training set goes.
    pub dest: Location,
    /// Also write CSV.
    pub csv: bool,
    /// How to split.
    pub split: Split,
    /// The split's text as given (for the manifest).
    pub split_text: String,
    /// Minimum days between parts (`None`: horizon + grace).
    pub embargo: Option<u32>,
    /// Accept an embargo shorter than horizon + grace.
    pub force_embargo: bool,
    /// Row filter: SQL condition over the snapshot's columns.
    pub filter: Option<String>,
    /// Only these features (empty: all).
    pub include: Vec<String>,
    /// Not these features.
    pub exclude: Vec<String>,
    /// Keep at most this many rows per snapshot day, chosen by a seeded hash.
    pub sample_per_day: Option<u64>,
    /// Seed of the sample.
    pub seed: u64,
    /// Knowledge mode of the snapshots read.
    pub mode: KnowledgeOverride,
}

/// One written part.
#[derive(Debug, Clone)]
pub struct PartReport {
    /// Its calendar range.
    pub range: PartRange,
    /// Snapshot days with rows.
    pub days: Vec<NaiveDate>,
    /// Rows written.
    pub rows: u64,
    /// Rows whose label is true.
    pub positives: u64,
}

/// What an export wrote.
#[derive(Debug, Clone)]
pub struct ExportReport {
    /// The parts.
    pub parts: Vec<PartReport>,
    /// The embargo applied.
    pub embargo: u32,
    /// Feature columns written.
    pub features: Vec<String>,
    /// Snapshot days in the range without matured labels, and their rows (after the filter).
    pub unlabeled_days: Vec<NaiveDate>,
    /// Rows left out for lack of a matured label.
    pub unlabeled_rows: u64,
    /// Labeled days that fell into embargo gaps, and their rows.
    pub embargoed_days: Vec<NaiveDate>,
    /// Rows left out by the embargo.
    pub embargoed_rows: u64,
    /// The manifest written (also at `manifest.json`).
    pub manifest: serde_json::Value,
}

/// Writes a training set (see the module documentation).
pub async fn export(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    opts: &ExportOptions,
) -> Result<ExportReport, LabelError> {
    let label = pipeline.label.as_ref().ok_or(LabelError::NoLabel)?;
    let invalid = LabelError::Invalid;
    if opts.to < opts.from {
        return Err(invalid(format!(
            "--to {} is before --from {}",
            opts.to, opts.from
        )));
    }
    let required = label.horizon.0 + label.grace.0;
    let embargo = opts.embargo.unwrap_or(required);
    if embargo < required && !opts.force_embargo {
        return Err(invalid(format!(
            "an embargo of {embargo}d is shorter than the label's horizon + grace ({}d + {}d = {required}d): the label of a row on day d is decided by events up to d + {required}d, so a part starting sooner after the previous one shares label information with it (leakage). Use --embargo {required}d or more, or --force-embargo to accept it",
            label.horizon.0, label.grace.0
        )));
    }
    ctx.register_object_store(&out.root_url, out.store.clone());
    ctx.register_object_store(&opts.dest.root_url, opts.dest.store.clone());
    let in_range = |d: &NaiveDate| *d >= opts.from && *d <= opts.to;
    let snapshots: Vec<_> = list_partitions(out, snapshots_dir(opts.mode))
        .await?
        .into_iter()
        .filter(|(d, _)| in_range(d))
        .collect();
    let labels = list_partitions(out, labels_dir(opts.mode)).await?;
    if snapshots.is_empty() {
        return Err(invalid(format!(
            "no snapshot was built for {} .. {} under {}/{}",
            opts.from,
            opts.to,
            out.display().trim_end_matches('/'),
            snapshots_dir(opts.mode)
        )));
    }
    let labeled: Vec<NaiveDate> = snapshots
        .iter()
        .map(|(d, _)| *d)
        .filter(|d| labels.contains_key(d))
        .collect();
    let unlabeled_days: Vec<NaiveDate> = snapshots
        .iter()
        .map(|(d, _)| *d)
        .filter(|d| !labels.contains_key(d))
        .collect();
    let (Some(first), Some(last)) = (labeled.first().copied(), labeled.last().copied()) else {
        return Err(invalid(format!(
            "none of the {} snapshot day(s) in {} .. {} has matured labels: run `daymark labels` (it lists when each matures)",
            snapshots.len(),
            opts.from,
            opts.to
        )));
    };

    let snap_urls: Vec<String> = snapshots
        .iter()
        .map(|(_, m)| object_url(out, &m.location))
        .collect();
    let label_urls: Vec<String> = labeled
        .iter()
        .map(|d| object_url(out, &labels[d].location))
        .collect();
    let snap = ctx
        .read_parquet(snap_urls, ParquetReadOptions::default())
        .await
        .map_err(LabelError::engine("reading snapshots"))?;
    let schema: SchemaRef = std::sync::Arc::new(snap.schema().as_arrow().clone());
    let labs = ctx
        .read_parquet(label_urls, ParquetReadOptions::default())
        .await
        .map_err(LabelError::engine("reading labels"))?;
    for t in ["__snap", "__lab"] {
        let _ = ctx.deregister_table(t);
    }
    ctx.register_table("__snap", snap.into_view())
        .map_err(LabelError::engine("reading snapshots"))?;
    ctx.register_table("__lab", labs.into_view())
        .map_err(LabelError::engine("reading labels"))?;

    // Features: every snapshot column but the key and the date, narrowed by the lists.
    let key = &pipeline.file.key;
    let all: Vec<String> = schema
        .fields()
        .iter()
        .map(|f| f.name().clone())
        .filter(|n| n != key && n != "snapshot_date")
        .collect();
    for n in opts.include.iter().chain(&opts.exclude) {
        if !all.contains(n) {
            return Err(invalid(format!(
                "`{n}` is not a feature of these snapshots (features: {})",
                all.join(", ")
            )));
        }
    }
    let features: Vec<String> = all
        .iter()
        .filter(|n| opts.include.is_empty() || opts.include.contains(n))
        .filter(|n| !opts.exclude.contains(n))
        .cloned()
        .collect();
    for n in [label.name.as_str(), "days_to_event", "censored"] {
        if features.iter().any(|f| f == n) {
            return Err(invalid(format!(
                "the feature `{n}` has the name of a label column: leave it out with --exclude {n}"
            )));
        }
    }
    let filter = match &opts.filter {
        None => None,
        Some(f) => {
            let (_, ty) = daymark_engine::check_expr(ctx, f, "snapshot", &schema)
                .map_err(|e| invalid(format!("--where `{f}`: {e}")))?;
            if ty != DataType::Boolean && ty != DataType::Null {
                return Err(invalid(format!(
                    "--where `{f}` is {ty}, not a condition (true or false)"
                )));
            }
            Some(f.clone())
        }
    };
    let ranges = plan_parts(first, last, &opts.split, embargo).map_err(invalid)?;
    let cond = filter
        .as_ref()
        .map(|f| format!(" AND ({f})"))
        .unwrap_or_default();
    let day_list = |days: &[NaiveDate]| -> String {
        days.iter()
            .map(|d| format!("CAST({} AS DATE)", literal(&d.to_string())))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let count = |sql: String| async move {
        let batches = ctx
            .sql(&sql)
            .await
            .map_err(LabelError::engine("counting rows"))?
            .collect()
            .await
            .map_err(LabelError::engine("counting rows"))?;
        Ok::<u64, LabelError>(first_i64(&batches, 0))
    };
    let unlabeled_rows = if unlabeled_days.is_empty() {
        0
    } else {
        count(format!(
            "SELECT count(*) FROM __snap WHERE snapshot_date IN ({}){cond}",
            day_list(&unlabeled_days)
        ))
        .await?
    };
    let embargoed_days: Vec<NaiveDate> = labeled
        .iter()
        .copied()
        .filter(|d| !ranges.iter().any(|r| *d >= r.first && *d <= r.last))
        .collect();
    let embargoed_rows = if embargoed_days.is_empty() {
        0
    } else {
        count(format!(
            "SELECT count(*) FROM __snap WHERE snapshot_date IN ({}){cond}",
            day_list(&embargoed_days)
        ))
        .await?
    };

    let k = ident(key);
    let mut cols = vec![k.clone(), "snapshot_date".to_string()];
    cols.extend(features.iter().map(|f| ident(f)));
    cols.extend([
        ident(&label.name),
        "days_to_event".into(),
        "censored".into(),
    ]);
    let select_j: Vec<String> = std::iter::once(format!("s.{k} AS {k}"))
        .chain(std::iter::once(
            "s.snapshot_date AS snapshot_date".to_string(),
        ))
        .chain(features.iter().map(|f| format!("s.{0} AS {0}", ident(f))))
        .chain([
            format!("l.{0} AS {0}", ident(&label.name)),
            "l.days_to_event AS days_to_event".into(),
            "l.censored AS censored".into(),
        ])
        .collect();
    let mut parts = Vec::new();
    for r in &ranges {
        let sampled = match opts.sample_per_day {
            None => "j".to_string(),
            Some(n) => format!(
                "(SELECT * FROM (SELECT j.*, row_number() OVER (PARTITION BY snapshot_date ORDER BY encode(sha256(concat(CAST({k} AS VARCHAR), '|', CAST(snapshot_date AS VARCHAR), '|', {seed})), 'hex'), {k}) AS __pick FROM j) WHERE __pick <= {n})",
                seed = literal(&opts.seed.to_string())
            ),
        };
        let sql = format!(
            "WITH s AS (SELECT * FROM __snap WHERE snapshot_date BETWEEN CAST({a} AS DATE) AND CAST({b} AS DATE){cond}),
j AS (SELECT {select_j} FROM s JOIN __lab l ON l.{k} = s.{k} AND l.snapshot_date = s.snapshot_date)
SELECT {cols} FROM {sampled} ORDER BY snapshot_date, {k}",
            a = literal(&r.first.to_string()),
            b = literal(&r.last.to_string()),
            select_j = select_j.join(", "),
            cols = cols.join(", "),
        );
        let path = child(&opts.dest.prefix, &[r.name, "part-0.parquet"]);
        write_query(ctx, &sql, &opts.dest, &path, r.first, None).await?;
        if opts.csv {
            let csv_path = child(&opts.dest.prefix, &[r.name, "part-0.csv"]);
            write_csv(ctx, &sql, &opts.dest, &csv_path).await?;
        }
        // Summarise the published file.
        let df = ctx
            .read_parquet(object_url(&opts.dest, &path), ParquetReadOptions::default())
            .await
            .map_err(LabelError::engine(format!("reading {path}")))?;
        let _ = ctx.deregister_table("__part");
        ctx.register_table("__part", df.into_view())
            .map_err(LabelError::engine(format!("reading {path}")))?;
        let batches = ctx
            .sql(&format!(
                "SELECT snapshot_date, count(*), sum(CASE WHEN {} THEN 1 ELSE 0 END) FROM __part GROUP BY snapshot_date ORDER BY snapshot_date",
                ident(&label.name)
            ))
            .await
            .map_err(LabelError::engine(format!("reading {path}")))?
            .collect()
            .await
            .map_err(LabelError::engine(format!("reading {path}")))?;
        let _ = ctx.deregister_table("__part");
        let mut rep = PartReport {
            range: r.clone(),
            days: Vec::new(),
            rows: 0,
            positives: 0,
        };
        for b in &batches {
            let days = b.column(0).as_primitive::<arrow::datatypes::Date32Type>();
            let n = arrow::compute::cast(b.column(1), &DataType::Int64)
                .map_err(|e| LabelError::Invalid(e.to_string()))?;
            let p = arrow::compute::cast(b.column(2), &DataType::Int64)
                .map_err(|e| LabelError::Invalid(e.to_string()))?;
            for i in 0..b.num_rows() {
                rep.days.push(
                    NaiveDate::from_ymd_opt(1970, 1, 1).expect("valid date")
                        + Duration::days(days.value(i) as i64),
                );
                rep.rows += n.as_primitive::<Int64Type>().value(i).max(0) as u64;
                rep.positives += p.as_primitive::<Int64Type>().value(i).max(0) as u64;
            }
        }
        parts.push(rep);
    }
    let rate = |p: &PartReport| {
        if p.rows == 0 {
            None
        } else {
            Some(p.positives as f64 / p.rows as f64)
        }
    };
    let manifest = json!({
        "pipeline": pipeline.file.name,
        "pipeline_hash": pipeline.hash,
        "key": key,
        "knowledge": opts.mode.map(|m| m.as_str()).unwrap_or("per source"),
        "label": label.name,
        "label_columns": [label.name, "days_to_event", "censored"],
        "features": features,
        "from": opts.from.to_string(),
        "to": opts.to.to_string(),
        "split": opts.split_text,
        "embargo_days": embargo,
        "required_embargo_days": required,
        "embargo_forced": embargo < required,
        "filter": filter,
        "sample_per_day": opts.sample_per_day,
        "seed": opts.sample_per_day.map(|_| opts.seed),
        "parts": parts.iter().map(|p| json!({
            "name": p.range.name,
            "first_day": p.range.first.to_string(),
            "last_day": p.range.last.to_string(),
            "days": p.days.iter().map(|d| d.to_string()).collect::<Vec<_>>(),
            "rows": p.rows,
            "positives": p.positives,
            "label_rate": rate(p),
            "files": std::iter::once(format!("{}/part-0.parquet", p.range.name))
                .chain(opts.csv.then(|| format!("{}/part-0.csv", p.range.name)))
                .collect::<Vec<_>>(),
        })).collect::<Vec<_>>(),
        "left_out": {
            "days_without_matured_labels": unlabeled_days.iter().map(|d| d.to_string()).collect::<Vec<_>>(),
            "rows_without_matured_labels": unlabeled_rows,
            "days_in_embargo_gaps": embargoed_days.iter().map(|d| d.to_string()).collect::<Vec<_>>(),
            "rows_in_embargo_gaps": embargoed_rows,
        },
    });
    let body = serde_json::to_vec_pretty(&manifest).unwrap_or_default();
    put_atomic(
        &opts.dest,
        &child(&opts.dest.prefix, &["manifest.json"]),
        body,
    )
    .await?;
    Ok(ExportReport {
        parts,
        embargo,
        features,
        unlabeled_days,
        unlabeled_rows,
        embargoed_days,
        embargoed_rows,
        manifest,
    })
}

/// The first column of the first row as an integer (0 when absent).
pub(crate) fn first_i64(batches: &[RecordBatch], col: usize) -> u64 {
    batches
        .iter()
        .find(|b| b.num_rows() > 0)
        .and_then(|b| arrow::compute::cast(b.column(col), &DataType::Int64).ok())
        .map(|a| {
            let a = a.as_primitive::<Int64Type>();
            if a.is_null(0) {
                0
            } else {
                a.value(0).max(0) as u64
            }
        })
        .unwrap_or(0)
}

/// Writes `body` to a staging object, then renames it to `path`.
pub(crate) async fn put_atomic(
    loc: &Location,
    path: &StorePath,
    body: Vec<u8>,
) -> Result<(), LabelError> {
    let staging = child(
        &loc.prefix,
        &[
            "_staging",
            &format!("{}.{}", path.as_ref().replace('/', "_"), std::process::id()),
        ],
    );
    let err = |p: &StorePath, e: daymark_store::object_store::Error| LabelError::Store {
        path: p.to_string(),
        reason: e.to_string(),
    };
    loc.store
        .put(&staging, PutPayload::from(body))
        .await
        .map_err(|e| err(&staging, e))?;
    loc.store
        .rename(&staging, path)
        .await
        .map_err(|e| err(path, e))?;
    Ok(())
}

/// Runs `sql` and publishes its result as one CSV file with a header.
async fn write_csv(
    ctx: &SessionContext,
    sql: &str,
    dest: &Location,
    path: &StorePath,
) -> Result<(), LabelError> {
    let df = ctx
        .sql(sql)
        .await
        .map_err(LabelError::engine(format!("writing {path}")))?;
    let mut stream = df
        .execute_stream()
        .await
        .map_err(LabelError::engine(format!("writing {path}")))?;
    let mut buf = Vec::new();
    {
        let mut w = arrow::csv::WriterBuilder::new()
            .with_header(true)
            .build(&mut buf);
        while let Some(batch) = stream.next().await {
            let batch = batch.map_err(LabelError::engine(format!("writing {path}")))?;
            w.write(&batch).map_err(|e| LabelError::Store {
                path: path.to_string(),
                reason: e.to_string(),
            })?;
        }
    }
    put_atomic(dest, path, buf).await
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    #[test]
    fn shares_leave_embargo_gaps() {
        // 100 days, 10-day embargo: two gaps of 9 dropped days, 82 usable; cumulative
        // rounding: round(0.7 * 82) = 57, round(0.85 * 82) = 70, so 57 / 13 / 12 days.
        let parts = plan_parts(
            d("2026-01-01"),
            d("2026-04-10"),
            &Split::parse("0.7,0.15,0.15").unwrap(),
            10,
        )
        .unwrap();
        assert_eq!(parts[0].first, d("2026-01-01"));
        assert_eq!(parts[0].last, d("2026-02-26"));
        assert_eq!(parts[1].first, d("2026-03-08"));
        assert_eq!(parts[1].last, d("2026-03-20"));
        assert_eq!(parts[2].first, d("2026-03-30"));
        assert_eq!(parts[2].last, d("2026-04-10"));
        for w in parts.windows(2) {
            assert_eq!((w[1].first - w[0].last).num_days(), 10);
        }
    }

    #[test]
    fn dates_and_refusals() {
        let parts = plan_parts(
            d("2026-01-01"),
            d("2026-03-31"),
            &Split::parse("2026-02-01,2026-03-01").unwrap(),
            7,
        )
        .unwrap();
        assert_eq!(parts[0].last, d("2026-01-25"));
        assert_eq!(parts[1].last, d("2026-02-22"));
        assert_eq!(parts[2].first, d("2026-03-01"));
        assert!(plan_parts(
            d("2026-01-01"),
            d("2026-01-10"),
            &Split::parse("0.7,0.15,0.15").unwrap(),
            7
        )
        .is_err());
        assert!(Split::parse("0.5,0.5,0.5").is_err());
        assert!(Split::parse("2026-03-01,2026-02-01").is_err());
        assert!(Split::parse("train").is_err());
        let two = plan_parts(
            d("2026-01-01"),
            d("2026-01-20"),
            &Split::parse("0.5,0,0.5").unwrap(),
            5,
        )
        .unwrap();
        assert_eq!(two.len(), 2);
        assert_eq!(two[1].name, "test");
    }
}
