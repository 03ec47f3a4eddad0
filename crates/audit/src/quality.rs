//! Checks run on every build, on the staged snapshot before it is published: population
//! size against the previous day, and drift (PSI, see [`crate::psi`]) of every numeric
//! feature against the previous day and against a reference window of published days.
//! Declared expectations (ranges, allowed values, null shares) are tallied by the engine
//! while writing (`daymark_engine::build`); these checks add what needs earlier days.

use crate::psi;
use crate::tables::{self, collect, count, first_row};
use crate::AuditError;
use chrono::{Duration, NaiveDate};
use datafusion::prelude::SessionContext;
use daymark_engine::build::{snapshots_dir, StagedCheck, StagedCheckFuture, FEATURE_HASHES_KEY};
use daymark_engine::sql::{ident, literal, KnowledgeOverride};
use daymark_spec::{OnFail, Pipeline};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::Location;
use std::collections::{BTreeMap, BTreeSet};

/// Table names used while checking.
const STAGED: &str = "__staged";
const PUBLISHED: &str = "__published";

/// PSI of each feature between a reference (rows of `ref_table` matching `ref_filter`) and
/// a current distribution, binned by the reference's deciles. Features with no reference
/// or no current rows are left out.
pub async fn psi_between(
    ctx: &SessionContext,
    ref_table: &str,
    ref_filter: &str,
    cur_table: &str,
    cur_filter: &str,
    features: &[String],
) -> Result<BTreeMap<String, f64>, AuditError> {
    if features.is_empty() {
        return Ok(BTreeMap::new());
    }
    let q = first_row(
        &collect(
            ctx,
            &psi::quantiles_sql(ref_table, ref_filter, features),
            "reference quantiles",
        )
        .await?,
    );
    let binned: Vec<(String, Vec<f64>)> = features
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let qs = q.get(i * 9..i * 9 + 9).unwrap_or(&[]);
            (f.clone(), psi::edges(qs))
        })
        .collect();
    let batches = collect(
        ctx,
        &psi::bin_counts_sql((ref_table, ref_filter), (cur_table, cur_filter), &binned),
        "bin counts",
    )
    .await?;
    let (mut r, mut c) = (Vec::new(), Vec::new());
    for b in &batches {
        for row in 0..b.num_rows() {
            let counts: Vec<u64> = (1..b.num_columns())
                .map(|i| tables::value_f64(b.column(i), row).unwrap_or(0.0) as u64)
                .collect();
            match tables::value_f64(b.column(0), row) {
                Some(0.0) => r = counts,
                _ => c = counts,
            }
        }
    }
    let mut out = BTreeMap::new();
    let mut at = 0;
    for (f, e) in &binned {
        let n = e.len() + 2;
        if let (Some(rs), Some(cs)) = (r.get(at..at + n), c.get(at..at + n)) {
            if let Some(v) = psi::psi(rs, cs) {
                out.insert(f.clone(), v);
            }
        }
        at += n;
    }
    Ok(out)
}

/// SQL condition selecting published days `from..=to` (partition column `dt`).
pub fn days_filter(from: NaiveDate, to: NaiveDate) -> String {
    format!(
        "dt >= {} AND dt <= {}",
        literal(&from.to_string()),
        literal(&to.to_string())
    )
}

/// The checks of every build that compare with published days.
pub struct DailyChecks {
    pipeline: Pipeline,
    mode: KnowledgeOverride,
}

impl DailyChecks {
    /// Checks for builds of `pipeline` in `mode` (compared with days published in the same
    /// snapshots folder).
    pub fn new(pipeline: &Pipeline, mode: KnowledgeOverride) -> DailyChecks {
        DailyChecks {
            pipeline: pipeline.clone(),
            mode,
        }
    }

    async fn run(
        &self,
        ctx: &SessionContext,
        out: &Location,
        staged: &StorePath,
        day: NaiveDate,
        rows: u64,
    ) -> Result<(Vec<String>, Vec<String>), AuditError> {
        let checks = &self.pipeline.checks;
        let (mut fail, mut warn) = (Vec::new(), Vec::new());
        if checks.max_population_change.is_none() && checks.drift.is_none() {
            return Ok((fail, warn));
        }
        let prev = day - Duration::days(1);
        let reference = checks
            .drift
            .as_ref()
            .and_then(|d| d.reference.days())
            .map(|n| day - Duration::days(n as i64));
        let first = reference.map_or(prev, |r| r.min(prev));
        tables::register_file(ctx, out, staged, STAGED).await?;
        let features = tables::numeric_features(ctx, STAGED, &self.pipeline).await?;
        let Some(comparable) = self
            .register_published(ctx, out, first, prev, &features)
            .await?
        else {
            let _ = ctx.deregister_table(STAGED);
            return Ok((fail, warn));
        };
        let prev_filter = days_filter(prev, prev);
        let prev_rows = count(
            &collect(
                ctx,
                &format!("SELECT COUNT(*) FROM {PUBLISHED} WHERE {prev_filter}"),
                "previous day's rows",
            )
            .await?,
        );
        let mut judge = |msg: String, failing: bool| {
            if failing && checks.on_fail == OnFail::Fail {
                fail.push(msg);
            } else {
                warn.push(msg);
            }
        };
        if let Some(max) = checks.max_population_change {
            if prev_rows > 0 {
                let change = (rows as f64 - prev_rows as f64) / prev_rows as f64;
                if change.abs() > max {
                    judge(
                        format!(
                            "population: {rows} rows against {prev_rows} on {prev}, a change of {:+.1}% (limit {:.1}%)",
                            change * 100.0,
                            max * 100.0
                        ),
                        true,
                    );
                }
            }
        }
        if let Some(drift) = &checks.drift {
            let mut comparisons = Vec::new();
            if prev_rows > 0 {
                comparisons.push((
                    format!("the previous day {prev}"),
                    prev_filter.clone(),
                    prev,
                ));
            }
            if let Some(first) = reference {
                let n_ref = count(
                    &collect(
                        ctx,
                        &format!(
                            "SELECT COUNT(*) FROM {PUBLISHED} WHERE {}",
                            days_filter(first, prev)
                        ),
                        "reference rows",
                    )
                    .await?,
                );
                if n_ref > 0 {
                    comparisons.push((
                        format!("the reference window {first} .. {prev}"),
                        days_filter(first, prev),
                        first,
                    ));
                }
            }
            for (what, filter, from) in comparisons {
                // Only features defined as now on every published day compared: a changed
                // definition is not drift.
                let (same, changed): (Vec<String>, Vec<String>) =
                    features.iter().cloned().partition(|f| {
                        comparable
                            .range(from..=prev)
                            .all(|(_, same)| same.contains(f))
                    });
                if !changed.is_empty() {
                    judge(
                        format!(
                            "drift: {} not compared with {what}: built under another definition",
                            changed.join(", ")
                        ),
                        false,
                    );
                }
                let values = psi_between(ctx, PUBLISHED, &filter, STAGED, "TRUE", &same).await?;
                for (f, v) in values {
                    if v >= drift.fail {
                        judge(
                            format!(
                                "drift: {f} PSI {v:.3} against {what} (fails at {})",
                                drift.fail
                            ),
                            true,
                        );
                    } else if v >= drift.warn {
                        judge(
                            format!(
                                "drift: {f} PSI {v:.3} against {what} (warns at {})",
                                drift.warn
                            ),
                            false,
                        );
                    }
                }
            }
        }
        let _ = ctx.deregister_table(STAGED);
        let _ = ctx.deregister_table(PUBLISHED);
        for i in 0..comparable.len() {
            let _ = ctx.deregister_table(format!("{PUBLISHED}_{i}"));
        }
        Ok((fail, warn))
    }

    /// Registers as [`PUBLISHED`] the published days `first..=prev` (`dt`, then each of
    /// `features` as a double), one table per day file under it. Returns, per day, the
    /// features whose definition that day was built under is today's (by the hashes in its
    /// footer; a file written before they were kept counts as today's when it has the
    /// column as a number); `None` when no day of the range is published.
    ///
    /// Only these days are read, and each with its own schema: a feature whose type changed
    /// with its definition would make one table over all published days fail to open.
    async fn register_published(
        &self,
        ctx: &SessionContext,
        out: &Location,
        first: NaiveDate,
        prev: NaiveDate,
        features: &[String],
    ) -> Result<Option<BTreeMap<NaiveDate, BTreeSet<String>>>, AuditError> {
        let published = tables::published_days(out, snapshots_dir(self.mode)).await?;
        let current: BTreeMap<&str, &str> = self
            .pipeline
            .features
            .iter()
            .map(|f| (f.name.as_str(), f.hash.as_str()))
            .collect();
        let mut comparable: BTreeMap<NaiveDate, BTreeSet<String>> = BTreeMap::new();
        let mut branches = Vec::new();
        for (day, files) in published.range(first..=prev) {
            let same = comparable
                .entry(*day)
                .or_insert_with(|| features.iter().cloned().collect());
            for file in files {
                let footer =
                    daymark_store::read_footer(out, file)
                        .await
                        .map_err(|e| AuditError::Store {
                            path: file.path.to_string(),
                            reason: e.to_string(),
                        })?;
                let hashes: Option<BTreeMap<String, String>> = footer
                    .schema
                    .metadata()
                    .get(FEATURE_HASHES_KEY)
                    .and_then(|t| serde_json::from_str(t).ok());
                same.retain(|f| {
                    let numeric = footer
                        .schema
                        .field_with_name(f)
                        .is_ok_and(|c| tables::is_numeric(c.data_type()));
                    let defined_alike = hashes.as_ref().is_none_or(|h| {
                        h.get(f).map(String::as_str) == current.get(f.as_str()).copied()
                    });
                    numeric && defined_alike
                });
                let table = format!("{PUBLISHED}_{}", branches.len());
                tables::register_file(ctx, out, &file.path, &table).await?;
                branches.push((*day, table, footer.schema));
            }
        }
        if branches.is_empty() {
            return Ok(None);
        }
        let selects: Vec<String> = branches
            .iter()
            .map(|(day, table, schema)| {
                let mut cols = vec![format!("{} AS dt", literal(&day.to_string()))];
                for f in features {
                    let numeric = schema
                        .field_with_name(f)
                        .is_ok_and(|c| tables::is_numeric(c.data_type()));
                    cols.push(if numeric && comparable[day].contains(f) {
                        format!("CAST({} AS DOUBLE) AS {}", ident(f), ident(f))
                    } else {
                        format!("CAST(NULL AS DOUBLE) AS {}", ident(f))
                    });
                }
                format!("SELECT {} FROM {}", cols.join(", "), ident(table))
            })
            .collect();
        let view = ctx
            .sql(&selects.join(" UNION ALL "))
            .await
            .map_err(crate::engine("published days"))?
            .into_view();
        let _ = ctx.deregister_table(PUBLISHED);
        ctx.register_table(PUBLISHED, view)
            .map_err(crate::engine("published days"))?;
        Ok(Some(comparable))
    }
}

impl StagedCheck for DailyChecks {
    fn check<'a>(
        &'a self,
        ctx: &'a SessionContext,
        out: &'a Location,
        staged: &'a StorePath,
        day: NaiveDate,
        rows: u64,
    ) -> StagedCheckFuture<'a> {
        Box::pin(async move {
            self.run(ctx, out, staged, day, rows)
                .await
                .map_err(|e| format!("checking the staged snapshot failed: {e}"))
        })
    }
}
