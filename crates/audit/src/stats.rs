//! Single-feature ROC AUC, Pearson and Spearman correlations, computed by one DataFusion
//! plan over a table of numeric features and a 0/1 label column.
//!
//! - Ranks are average ranks (ties share the mean of the ranks they span): `rank()` plus
//!   half the tie count minus one, over the feature's non-null values.
//! - ROC AUC is the Mann-Whitney statistic from those ranks over rows where the feature is
//!   not null: (sum of the positives' ranks - n1 (n1 + 1) / 2) / (n1 n0).
//! - Pearson is DataFusion's `corr` over rows where both values are present; Spearman is
//!   Pearson of the average ranks. Between two features the ranks are those of each
//!   feature over all its non-null values (not recomputed on the rows both have), which
//!   equals the textbook value whenever neither feature has nulls.

use crate::tables::{collect, first_row};
use crate::AuditError;
use datafusion::prelude::SessionContext;
use daymark_engine::sql::ident;
use serde::Serialize;

/// Statistics of one feature against the label.
#[derive(Debug, Clone, Serialize)]
pub struct FeatureStats {
    /// Feature name.
    pub name: String,
    /// Rows with a value.
    pub rows: i64,
    /// ROC AUC of the feature as a score for the label.
    pub auc: Option<f64>,
    /// Pearson correlation with the label.
    pub pearson: Option<f64>,
    /// Spearman correlation with the label.
    pub spearman: Option<f64>,
}

/// The analysis of a feature table.
#[derive(Debug, Clone, Serialize)]
pub struct Analysis {
    /// Rows analysed.
    pub rows: i64,
    /// Rows with a positive label.
    pub positives: i64,
    /// Per feature, in the order given.
    pub features: Vec<FeatureStats>,
    /// Pearson correlation between features (`[i][j]`, same order).
    pub pearson: Vec<Vec<Option<f64>>>,
    /// Spearman correlation between features.
    pub spearman: Vec<Vec<Option<f64>>>,
}

impl Analysis {
    /// Pairs of features whose absolute Pearson or Spearman correlation is at least
    /// `threshold`: (first, second, Pearson, Spearman).
    pub fn redundant(&self, threshold: f64) -> Vec<(String, String, f64, f64)> {
        let mut out = Vec::new();
        for i in 0..self.features.len() {
            for j in i + 1..self.features.len() {
                let p = self.pearson[i][j].unwrap_or(0.0);
                let s = self.spearman[i][j].unwrap_or(0.0);
                if p.abs() >= threshold || s.abs() >= threshold {
                    out.push((
                        self.features[i].name.clone(),
                        self.features[j].name.clone(),
                        p,
                        s,
                    ));
                }
            }
        }
        out
    }
}

/// Analyses `features` of `table` against the 0/1 column `label` (rows with a null label
/// are left out). With `pairs`, also the correlation matrices between features.
pub async fn analyse(
    ctx: &SessionContext,
    table: &str,
    label: &str,
    features: &[String],
    pairs: bool,
) -> Result<Analysis, AuditError> {
    let y = ident(label);
    let mut cols = vec![format!("CAST({y} AS DOUBLE) AS __y")];
    for (i, f) in features.iter().enumerate() {
        let v = format!("CAST({} AS DOUBLE)", ident(f));
        cols.push(format!("{v} AS v{i}"));
        cols.push(format!(
            "CASE WHEN {v} IS NULL THEN NULL ELSE CAST(rank() OVER (ORDER BY {v} ASC NULLS LAST) AS DOUBLE) + (CAST(COUNT(*) OVER (PARTITION BY {v}) AS DOUBLE) - 1.0) / 2.0 END AS r{i}"
        ));
    }
    let base = format!(
        "SELECT {} FROM {} WHERE {y} IS NOT NULL",
        cols.join(", "),
        ident(table)
    );
    let mut aggs = vec!["COUNT(*) AS n".to_string(), "SUM(__y) AS n1".to_string()];
    for i in 0..features.len() {
        aggs.push(format!("COUNT(v{i}) AS c{i}"));
        aggs.push(format!("SUM(r{i}) FILTER (WHERE __y = 1.0) AS s{i}"));
        aggs.push(format!("COUNT(r{i}) FILTER (WHERE __y = 1.0) AS p{i}"));
        aggs.push(format!("corr(v{i}, __y) AS pl{i}"));
        aggs.push(format!("corr(r{i}, __y) AS sl{i}"));
    }
    if pairs {
        for i in 0..features.len() {
            for j in i + 1..features.len() {
                aggs.push(format!("corr(v{i}, v{j}) AS pp{i}_{j}"));
                aggs.push(format!("corr(r{i}, r{j}) AS sp{i}_{j}"));
            }
        }
    }
    let sql = format!("SELECT {} FROM ({base})", aggs.join(", "));
    let row = first_row(&collect(ctx, &sql, "feature statistics").await?);
    let get = |k: usize| row.get(k).copied().flatten();
    let rows = get(0).unwrap_or(0.0) as i64;
    let positives = get(1).unwrap_or(0.0) as i64;
    let mut stats = Vec::new();
    for (i, f) in features.iter().enumerate() {
        let at = 2 + i * 5;
        let n = get(at).unwrap_or(0.0);
        let s1 = get(at + 1).unwrap_or(0.0);
        let n1 = get(at + 2).unwrap_or(0.0);
        let n0 = n - n1;
        let auc = (n1 > 0.0 && n0 > 0.0).then(|| (s1 - n1 * (n1 + 1.0) / 2.0) / (n1 * n0));
        stats.push(FeatureStats {
            name: f.clone(),
            rows: n as i64,
            auc,
            pearson: get(at + 3).filter(|v| v.is_finite()),
            spearman: get(at + 4).filter(|v| v.is_finite()),
        });
    }
    let k = features.len();
    let mut pearson = vec![vec![None; k]; k];
    let mut spearman = vec![vec![None; k]; k];
    if pairs {
        let mut at = 2 + k * 5;
        for i in 0..k {
            pearson[i][i] = Some(1.0);
            spearman[i][i] = Some(1.0);
            for j in i + 1..k {
                let p = get(at).filter(|v| v.is_finite());
                let s = get(at + 1).filter(|v| v.is_finite());
                pearson[i][j] = p;
                pearson[j][i] = p;
                spearman[i][j] = s;
                spearman[j][i] = s;
                at += 2;
            }
        }
    }
    Ok(Analysis {
        rows,
        positives,
        features: stats,
        pearson,
        spearman,
    })
}
