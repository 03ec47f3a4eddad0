//! Checks run on every build, on the staged snapshot before it is published: population
//! size against the previous day, and drift (PSI, see [`crate::psi`]) of every numeric
//! feature against the previous day and against a reference window of published days.
//! Declared expectations (ranges, allowed values, null shares) are tallied by the engine
//! while writing (`daymark_engine::build`); these checks add what needs earlier days.

use crate::psi;
use crate::tables::{self, collect, count};
use crate::AuditError;
use chrono::{Duration, NaiveDate};
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::datasource::file_format::parquet::ParquetFormat;
use datafusion::datasource::listing::{
    ListingOptions, ListingTable, ListingTableConfig, ListingTableUrl,
};
use datafusion::prelude::SessionContext;
use daymark_engine::build::{snapshots_dir, StagedCheck, StagedCheckFuture, FEATURE_HASHES_KEY};
use daymark_engine::sql::{literal, KnowledgeOverride};
use daymark_spec::{OnFail, Pipeline};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::Location;
use std::collections::{BTreeMap, BTreeSet};
use std::sync::Arc;

/// Table names used while checking.
const STAGED: &str = "__staged";
const PUBLISHED: &str = "__published";

/// Feature values held in memory at once while computing drift: the reference rows'
/// values of as many features as fit are read together (all of a wide pipeline's over a
/// 28-day reference window at a few hundred thousand keys), feature by feature beyond.
/// 32M doubles are 256 MiB.
const VALUES_IN_MEMORY: u64 = 32 << 20;

/// PSI of each feature between a reference (rows of `ref_table` matching `ref_filter`) and
/// a current distribution, binned by the reference's deciles. Features with no reference
/// or no current rows are left out.
///
/// The values are read once into memory and binned there: the deciles by selecting only
/// the ranks they need ([`quantiles`]), the bins by the edges. One SQL query per feature
/// of row numbers over a sort of its values, and a second of bin counts, took about
/// 2.4 s of each day of a backfill of the demo pipeline at 35,000 keys
/// (docs/benchmarks.md, twenty-sixth measurement).
pub async fn psi_between(
    ctx: &SessionContext,
    ref_table: &str,
    ref_filter: &str,
    cur_table: &str,
    cur_filter: &str,
    features: &[String],
) -> Result<BTreeMap<String, f64>, AuditError> {
    let mut out = BTreeMap::new();
    if features.is_empty() {
        return Ok(out);
    }
    let n_ref = count(
        &collect(
            ctx,
            &format!(
                "SELECT COUNT(*) FROM {} WHERE {ref_filter}",
                daymark_engine::sql::ident(ref_table)
            ),
            "reference rows",
        )
        .await?,
    )
    .max(1) as u64;
    let per_read = (VALUES_IN_MEMORY / n_ref).max(1) as usize;
    for group in features.chunks(per_read) {
        let reference = read_values(ctx, ref_table, ref_filter, group).await?;
        let current = read_values(ctx, cur_table, cur_filter, group).await?;
        for ((f, mut r), c) in group.iter().zip(reference).zip(current) {
            let e = psi::edges(&quantiles(&mut r.values));
            if let Some(v) = psi::psi(&r.bin_counts(&e), &c.bin_counts(&e)) {
                out.insert(f.clone(), v);
            }
        }
    }
    Ok(out)
}

/// One feature's values over some rows, as doubles.
#[derive(Debug, Default)]
pub struct FeatureValues {
    /// The values that are not NULL, in no particular order.
    pub values: Vec<f64>,
    /// The number of NULLs.
    pub nulls: u64,
}

impl FeatureValues {
    /// Counts per bin of [`psi::bin_of`] (NULLs, then below the first edge, then from each
    /// edge on).
    fn bin_counts(&self, edges: &[f64]) -> Vec<u64> {
        let mut counts = vec![0u64; edges.len() + 2];
        counts[0] = self.nulls;
        for v in &self.values {
            counts[psi::bin_of(Some(*v), edges)] += 1;
        }
        counts
    }
}

/// `features` of the rows of `table` matching `filter`, cast to doubles.
pub async fn read_values(
    ctx: &SessionContext,
    table: &str,
    filter: &str,
    features: &[String],
) -> Result<Vec<FeatureValues>, AuditError> {
    use datafusion::arrow::array::{Array, AsArray};
    use datafusion::arrow::datatypes::Float64Type;
    use daymark_engine::sql::ident;
    let mut out: Vec<FeatureValues> = features.iter().map(|_| Default::default()).collect();
    if features.is_empty() {
        return Ok(out);
    }
    let columns: Vec<String> = features
        .iter()
        .map(|f| format!("CAST({} AS DOUBLE) AS {}", ident(f), ident(f)))
        .collect();
    let sql = format!(
        "SELECT {} FROM {} WHERE {filter}",
        columns.join(", "),
        ident(table)
    );
    for b in collect(ctx, &sql, "feature values").await? {
        for (c, into) in b.columns().iter().zip(out.iter_mut()) {
            let Some(a) = c.as_primitive_opt::<Float64Type>() else {
                continue;
            };
            into.nulls += a.null_count() as u64;
            if a.null_count() == 0 {
                into.values.extend_from_slice(a.values());
            } else {
                into.values.extend(a.iter().flatten());
            }
        }
    }
    Ok(out)
}

/// The nine quantiles of [`psi::QUANTILES`] of `values` (`None` for each when there are
/// none), exactly as DataFusion's `percentile_cont` gives them: linear interpolation
/// between the values at the ranks around `q * (n - 1)`, values in IEEE 754's total order.
///
/// Only the ranks the quantiles need are put in place (nested selections around them),
/// not the whole of `values`, which is left reordered.
pub fn quantiles(values: &mut [f64]) -> Vec<Option<f64>> {
    let n = values.len() as u64;
    if n == 0 {
        return vec![None; psi::QUANTILES.len()];
    }
    let ranks: BTreeSet<usize> = psi::QUANTILES
        .iter()
        .flat_map(|q| {
            let (lo, hi) = psi::quantile_ranks(*q, n);
            [lo as usize - 1, hi as usize - 1]
        })
        .collect();
    let ranks: Vec<usize> = ranks.into_iter().collect();
    select_ranks(values, &ranks);
    psi::QUANTILES
        .iter()
        .map(|q| {
            let (lo, hi) = psi::quantile_ranks(*q, n);
            let at = |r: u64| values[r as usize - 1];
            Some(psi::quantile_from_ranks(*q, n, at(lo), at(hi)))
        })
        .collect()
}

/// Puts the values of `ranks` (ascending, 0-based, below `values.len()`) where a sort of
/// `values` in total order would: the middle rank first, then the ranks on each side within
/// their side.
fn select_ranks(values: &mut [f64], ranks: &[usize]) {
    if ranks.is_empty() || values.is_empty() {
        return;
    }
    let mid = ranks.len() / 2;
    let r = ranks[mid];
    values.select_nth_unstable_by(r, f64::total_cmp);
    let (below, above) = values.split_at_mut(r);
    select_ranks(below, &ranks[..mid]);
    let shifted: Vec<usize> = ranks[mid + 1..].iter().map(|x| x - r - 1).collect();
    select_ranks(&mut above[1..], &shifted);
}

/// SQL condition selecting published days `from..=to` (partition column `dt`).
pub fn days_filter(from: NaiveDate, to: NaiveDate) -> String {
    format!(
        "dt >= {} AND dt <= {}",
        literal(&from.to_string()),
        literal(&to.to_string())
    )
}

/// SQL condition selecting snapshot dates `from..=to` of [`PUBLISHED`]: on the files'
/// own column, so that a query skips the other days' files by their statistics.
fn dates_filter(from: NaiveDate, to: NaiveDate) -> String {
    format!(
        "snapshot_date >= DATE {} AND snapshot_date <= DATE {}",
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
        let prev_filter = dates_filter(prev, prev);
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
                            dates_filter(first, prev)
                        ),
                        "reference rows",
                    )
                    .await?,
                );
                if n_ref > 0 {
                    comparisons.push((
                        format!("the reference window {first} .. {prev}"),
                        dates_filter(first, prev),
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
        Ok((fail, warn))
    }

    /// Registers as [`PUBLISHED`] the published days `first..=prev` (`snapshot_date`, then
    /// each of `features` as a double; select days with [`dates_filter`]). Returns, per
    /// day, the features whose definition that day was built under is today's (by the
    /// hashes in its footer; a file written before they were kept counts as today's when
    /// it has the column as a number); `None` when no day of the range is published.
    ///
    /// Only these days' files are read, with the features as doubles: a feature whose type
    /// changed with its definition would make one table over all published days fail to
    /// open (the schemas cannot be merged).
    async fn register_published(
        &self,
        ctx: &SessionContext,
        out: &Location,
        first: NaiveDate,
        prev: NaiveDate,
        features: &[String],
    ) -> Result<Option<BTreeMap<NaiveDate, BTreeSet<String>>>, AuditError> {
        let published = tables::published_days(out, snapshots_dir(self.mode)).await?;
        let files: Vec<(NaiveDate, &daymark_store::DataFile)> = published
            .range(first..=prev)
            .flat_map(|(d, fs)| fs.iter().map(move |f| (*d, f)))
            .collect();
        if files.is_empty() {
            return Ok(None);
        }
        let footers = futures::future::join_all(
            files
                .iter()
                .map(|(_, f)| daymark_store::read_footer(out, f)),
        )
        .await;
        let current: BTreeMap<&str, &str> = self
            .pipeline
            .features
            .iter()
            .map(|f| (f.name.as_str(), f.hash.as_str()))
            .collect();
        let mut comparable: BTreeMap<NaiveDate, BTreeSet<String>> = BTreeMap::new();
        for ((day, file), footer) in files.iter().zip(footers) {
            let footer = footer.map_err(|e| AuditError::Store {
                path: file.path.to_string(),
                reason: e.to_string(),
            })?;
            let hashes: Option<BTreeMap<String, String>> = footer
                .schema
                .metadata()
                .get(FEATURE_HASHES_KEY)
                .and_then(|t| serde_json::from_str(t).ok());
            let same = comparable
                .entry(*day)
                .or_insert_with(|| features.iter().cloned().collect());
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
        }
        // One table over the files, with the schema given: each file's columns are cast to
        // it as they are read, and only the columns a query names are.
        let mut fields = vec![Field::new("snapshot_date", DataType::Date32, true)];
        fields.extend(
            features
                .iter()
                .map(|f| Field::new(f, DataType::Float64, true)),
        );
        let mut root = out.root_url.to_string();
        if !root.ends_with('/') {
            root.push('/');
        }
        let urls = files
            .iter()
            .map(|(_, f)| ListingTableUrl::parse(format!("{root}{}", f.path)))
            .collect::<Result<Vec<_>, _>>()
            .map_err(crate::engine("published days"))?;
        let options =
            ListingOptions::new(Arc::new(ParquetFormat::default())).with_file_extension(".parquet");
        let config = ListingTableConfig::new_with_multi_paths(urls)
            .with_listing_options(options)
            .with_schema(Arc::new(Schema::new(fields)));
        ctx.register_object_store(&out.root_url, out.store.clone());
        let _ = ctx.deregister_table(PUBLISHED);
        ListingTable::try_new(config)
            .and_then(|t| ctx.register_table(PUBLISHED, Arc::new(t)))
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

#[cfg(test)]
mod tests {
    use super::*;

    /// The bins counted in memory are the bins of the SQL definition
    /// ([`psi::bin_counts_sql`], DataFusion comparing the doubles) on values with NULLs,
    /// ties, both zeros, infinities and NaN, over edges from the reference's deciles and
    /// over edges at 0 and at a repeated value.
    #[tokio::test]
    async fn bins_in_memory_equal_the_sql_definition() {
        use datafusion::arrow::array::{Float64Array, Int64Array, RecordBatch};
        let mut x: Vec<Option<f64>> = vec![
            None,
            Some(f64::NAN),
            Some(-0.0),
            Some(0.0),
            Some(f64::INFINITY),
            Some(f64::NEG_INFINITY),
            Some(2.5),
            Some(2.5),
            Some(-1.0),
        ];
        x.extend((0..200).map(|i| (i % 7 != 0).then(|| ((i * 37) % 23) as f64 / 4.0 - 2.0)));
        let side: Vec<i64> = (0..x.len() as i64).map(|i| i % 2).collect();
        let schema = Arc::new(Schema::new(vec![
            Field::new("side", DataType::Int64, false),
            Field::new("x", DataType::Float64, true),
        ]));
        let batch = RecordBatch::try_new(
            schema,
            vec![
                Arc::new(Int64Array::from(side)),
                Arc::new(Float64Array::from(x)),
            ],
        )
        .unwrap();
        let ctx = SessionContext::new();
        ctx.register_batch("t", batch).unwrap();
        let features = vec!["x".to_string()];
        let mut reference = read_values(&ctx, "t", "side = 0", &features).await.unwrap();
        let current = read_values(&ctx, "t", "side = 1", &features).await.unwrap();
        assert!(current[0].values.iter().any(|v| v.is_nan()));
        let deciles = psi::edges(&quantiles(&mut reference[0].values));
        assert!(deciles.len() >= 5, "{deciles:?}");
        for edges in [deciles, vec![0.0], vec![-0.0, 2.5], vec![]] {
            let sql = psi::bin_counts_sql(
                ("t", "side = 0"),
                ("t", "side = 1"),
                &[("x".to_string(), edges.clone())],
            );
            let batches = collect(&ctx, &sql, "test").await.unwrap();
            let mut by_side: BTreeMap<u64, Vec<u64>> = BTreeMap::new();
            for b in &batches {
                for row in 0..b.num_rows() {
                    let counts = (1..b.num_columns())
                        .map(|c| tables::value_f64(b.column(c), row).unwrap() as u64)
                        .collect();
                    by_side.insert(tables::value_f64(b.column(0), row).unwrap() as u64, counts);
                }
            }
            assert_eq!(reference[0].bin_counts(&edges), by_side[&0], "{edges:?}");
            assert_eq!(current[0].bin_counts(&edges), by_side[&1], "{edges:?}");
        }
    }

    /// [`quantiles`] gives DataFusion's `percentile_cont` bit for bit (the definition
    /// `psi.rs` documents) on data with ties, nulls, integers, one value, two values and
    /// no values.
    #[tokio::test]
    async fn quantiles_equal_percentile_cont() {
        use datafusion::arrow::array::{Float64Array, Int64Array, RecordBatch};
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        let n: i64 = 5_000;
        let mut x: Vec<Option<f64>> = (0..n)
            .map(|_| (rng.random::<f64>() > 0.1).then(|| rng.random::<f64>() * 1e3 - 100.0))
            .collect();
        // The first two rows as one value and as two values (filters `i = 0`, `i <= 1`).
        x[0] = Some(5.0);
        x[1] = Some(-3.25);
        let k: Vec<Option<i64>> = (0..n)
            .map(|_| (rng.random::<f64>() > 0.3).then(|| rng.random_range(0..7)))
            .collect();
        let schema = Arc::new(Schema::new(vec![
            Field::new("i", DataType::Int64, false),
            Field::new("g", DataType::Int64, false),
            Field::new("x", DataType::Float64, true),
            Field::new("k", DataType::Int64, true),
        ]));
        let batch = RecordBatch::try_new(
            schema,
            vec![
                Arc::new(Int64Array::from_iter_values(0..n)),
                Arc::new(Int64Array::from_iter_values((0..n).map(|i| i % 4))),
                Arc::new(Float64Array::from(x)),
                Arc::new(Int64Array::from(k)),
            ],
        )
        .unwrap();
        let ctx = SessionContext::new();
        ctx.register_batch("t", batch).unwrap();
        let features = vec!["x".to_string(), "k".to_string()];
        let bits = |v: &[Option<f64>]| v.iter().map(|x| x.map(f64::to_bits)).collect::<Vec<_>>();
        // All rows; a quarter; few rows with many ties of k; one value; two; none.
        for filter in [
            "TRUE",
            "g = 2",
            "k = 6 AND g = 1",
            "i = 0",
            "i <= 1",
            "FALSE",
        ] {
            let ours: Vec<Option<f64>> = read_values(&ctx, "t", filter, &features)
                .await
                .unwrap()
                .into_iter()
                .flat_map(|mut v| quantiles(&mut v.values))
                .collect();
            let mut calls = Vec::new();
            for f in &features {
                for q in psi::QUANTILES {
                    calls.push(format!(
                        "percentile_cont({q:?}) WITHIN GROUP (ORDER BY CAST({f} AS DOUBLE))"
                    ));
                }
            }
            let sql = format!("SELECT {} FROM t WHERE {filter}", calls.join(", "));
            let theirs = tables::first_row(&collect(&ctx, &sql, "test").await.unwrap());
            assert_eq!(
                bits(&ours),
                bits(&theirs),
                "{filter}: {ours:?} against {theirs:?}"
            );
            // x's quantiles exist wherever rows do (the comparison is not of nulls only).
            assert_eq!(ours[..9].iter().all(Option::is_some), filter != "FALSE");
        }
    }
}
