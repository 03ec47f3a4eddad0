//! The Population Stability Index (PSI) of a feature between a reference and a current
//! distribution, and how values are put into bins.
//!
//! Binning, exactly:
//! - The edges are the 10%, 20%, ..., 90% quantiles of the reference's non-null values,
//!   computed with linear interpolation (the values of DataFusion's `percentile_cont`,
//!   found by selecting the ranks they need: `quality::quantiles`), sorted, with
//!   repeated edges kept once. So a feature with many ties (a count that is mostly 0) has
//!   fewer than 10 value bins.
//! - With edges e1 < ... < ek, value bin j (1..=k+1) holds values v with e(j-1) <= v < e(j)
//!   (e0 = -inf, e(k+1) = +inf), compared as SQL compares doubles (NaN above every
//!   edge, -0 equal to +0); bin 0 holds nulls, so a change in the null share is drift.
//! - Shares are counts divided by the number of rows. A bin empty on both sides is left
//!   out; a bin empty on one side only gets the share [`EMPTY_BIN_SHARE`] on that side, so
//!   that the logarithm stays finite (common practice).
//! - PSI = sum over bins of (current - reference) * ln(current / reference).
//!
//! Thresholds 0.1 (warn) and 0.25 (fail) are common practice.

/// The quantiles of the reference whose values are the bin edges.
pub const QUANTILES: [f64; 9] = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9];

/// Share given to a bin that is empty on one side only.
pub const EMPTY_BIN_SHARE: f64 = 1e-4;

/// Bin edges from the reference's quantiles: finite values, sorted, each once.
pub fn edges(quantiles: &[Option<f64>]) -> Vec<f64> {
    let mut e: Vec<f64> = quantiles
        .iter()
        .flatten()
        .copied()
        .filter(|v| v.is_finite())
        .collect();
    e.sort_by(|a, b| a.total_cmp(b));
    e.dedup();
    e
}

/// The bin of a value: 0 for null, else 1 + the number of edges (sorted, as [`edges`]
/// gives them) less than or equal to it, compared as SQL compares doubles: NaN above
/// everything, -0 equal to +0.
pub fn bin_of(value: Option<f64>, edges: &[f64]) -> usize {
    // Adding +0 turns -0 into +0 and leaves every other value as it is.
    let key = |x: f64| x + 0.0;
    match value {
        None => 0,
        Some(v) => 1 + edges.partition_point(|e| key(*e).total_cmp(&key(v)).is_le()),
    }
}

/// PSI from bin counts of the reference and the current distribution (same bins).
/// `None` when either side has no rows.
pub fn psi(reference: &[u64], current: &[u64]) -> Option<f64> {
    let (nr, nc) = (
        reference.iter().sum::<u64>() as f64,
        current.iter().sum::<u64>() as f64,
    );
    if nr == 0.0 || nc == 0.0 || reference.len() != current.len() {
        return None;
    }
    let mut total = 0.0;
    for (r, c) in reference.iter().zip(current) {
        if *r == 0 && *c == 0 {
            continue;
        }
        let e = if *r == 0 {
            EMPTY_BIN_SHARE
        } else {
            *r as f64 / nr
        };
        let a = if *c == 0 {
            EMPTY_BIN_SHARE
        } else {
            *c as f64 / nc
        };
        total += (a - e) * (a / e).ln();
    }
    Some(total)
}

/// The 1-based ranks, among `n` sorted values, that quantile `q` is interpolated from
/// (one rank when it falls on a value): see [`quantile_from_ranks`].
pub fn quantile_ranks(q: f64, n: u64) -> (u64, u64) {
    let at = q * (n.saturating_sub(1)) as f64;
    (at.floor() as u64 + 1, at.ceil() as u64 + 1)
}

/// Quantile `q` of `n` sorted values from the values at its [`quantile_ranks`], with
/// DataFusion's `percentile_cont` arithmetic (the definition this module uses, checked bit
/// for bit in the tests of `quality.rs`): at index i = q (n - 1), the value there when i is
/// whole, else lower + (upper - lower) x w, with w = i - floor(i) truncated to six
/// decimals.
pub fn quantile_from_ranks(q: f64, n: u64, lower: f64, upper: f64) -> f64 {
    let at = q * (n.saturating_sub(1)) as f64;
    if n <= 1 || at.floor() == at.ceil() {
        return lower;
    }
    let weight = ((at - at.floor()) * 1_000_000.0) as u64 as f64 / 1_000_000.0;
    lower + (upper - lower) * weight
}

/// SQL of one query returning, per side (`__side` 0: reference rows of `ref_table`
/// matching `ref_filter`, 1: current rows of `cur_table` matching `cur_filter`), the count
/// of every bin of every feature (columns `b{feature index}_{bin}` after `__side`).
#[cfg(test)]
pub(crate) fn bin_counts_sql(
    (ref_table, ref_filter): (&str, &str),
    (cur_table, cur_filter): (&str, &str),
    features: &[(String, Vec<f64>)],
) -> String {
    use daymark_engine::sql::ident;
    let names: Vec<String> = features.iter().map(|(f, _)| ident(f)).collect();
    let from = format!(
        "(SELECT 0 AS __side, {c} FROM {} WHERE {ref_filter} UNION ALL SELECT 1 AS __side, {c} FROM {} WHERE {cur_filter})",
        ident(ref_table),
        ident(cur_table),
        c = names.join(", ")
    );
    let mut cols = vec!["__side".to_string()];
    for (i, (f, e)) in features.iter().enumerate() {
        let v = format!("CAST({} AS DOUBLE)", ident(f));
        cols.push(format!("COUNT(*) FILTER (WHERE {v} IS NULL) AS b{i}_0"));
        for j in 0..=e.len() {
            let mut c = vec![format!("{v} IS NOT NULL")];
            if j > 0 {
                c.push(format!("{v} >= {:?}", e[j - 1]));
            }
            if j < e.len() {
                c.push(format!("{v} < {:?}", e[j]));
            }
            cols.push(format!(
                "COUNT(*) FILTER (WHERE {}) AS b{i}_{}",
                c.join(" AND "),
                j + 1
            ));
        }
    }
    format!("SELECT {} FROM {from} GROUP BY __side", cols.join(", "))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn psi_worked_by_hand() {
        // Worked by hand: four equally filled reference bins (0.25 each) against current
        // shares 0.1, 0.2, 0.3, 0.4 (no nulls on either side, so bin 0 is left out):
        //   (0.1-0.25) ln(0.1/0.25) = -0.15 * -0.916291 = 0.137444
        //   (0.2-0.25) ln(0.2/0.25) = -0.05 * -0.223144 = 0.011157
        //   (0.3-0.25) ln(0.3/0.25) =  0.05 *  0.182322 = 0.009116
        //   (0.4-0.25) ln(0.4/0.25) =  0.15 *  0.470004 = 0.070501
        //   sum                                          = 0.228217 (< 0.25: a warning, not a failure)
        let got = psi(&[0, 25, 25, 25, 25], &[0, 10, 20, 30, 40]).unwrap();
        assert!((got - 0.228217).abs() < 1e-6, "{got}");

        // Worked by hand, with a bin empty in the reference: reference shares 0.5, 0.5, 0
        // (the empty bin gets 0.0001), current 0.4, 0.4, 0.2:
        //   2 * (0.4-0.5) ln(0.4/0.5)    = 2 * -0.1 * -0.223144 = 0.044629
        //   (0.2-0.0001) ln(0.2/0.0001)  = 0.1999 * 7.600902    = 1.519420
        //   sum                                                 = 1.564049
        let got = psi(&[0, 50, 50, 0], &[0, 40, 40, 20]).unwrap();
        assert!((got - 1.564049).abs() < 1e-6, "{got}");

        // Identical distributions: 0.
        assert_eq!(psi(&[3, 5, 7], &[6, 10, 14]), Some(0.0));
        assert_eq!(psi(&[0, 0], &[1, 2]), None);
    }

    #[test]
    fn bins_follow_the_edges() {
        // Repeated quantiles collapse into one edge; nulls and NaN are no edges.
        let e = edges(&[Some(2.0), Some(2.0), Some(5.0), None, Some(f64::NAN)]);
        assert_eq!(e, vec![2.0, 5.0]);
        assert_eq!(bin_of(None, &e), 0);
        assert_eq!(bin_of(Some(1.9), &e), 1);
        assert_eq!(bin_of(Some(2.0), &e), 2);
        assert_eq!(bin_of(Some(4.99), &e), 2);
        assert_eq!(bin_of(Some(5.0), &e), 3);
    }
}
