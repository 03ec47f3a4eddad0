//! The HTML report: one self-contained file, charts drawn as inline SVG (no scripts, no
//! fonts or styles fetched from anywhere).
//!
//! Charts: population and label rate over time, per-feature distributions on the last
//! day, a drift heat map (PSI of each feature against the previous day, feature x day),
//! single-feature ROC AUC bars, null shares over time (feature x day), the correlation
//! matrix, and the audit results.

use crate::checks::{audit, register_scan, AuditOptions, Status};
use crate::quality::{days_filter, psi_between};
use crate::stats::analyse;
use crate::tables::{self, collect, value_f64, value_text};
use crate::AuditError;
use chrono::NaiveDate;
use datafusion::prelude::SessionContext;
use daymark_engine::build::snapshots_dir;
use daymark_engine::sql::{ident, literal};
use daymark_spec::Pipeline;
use daymark_store::Location;
use std::collections::BTreeMap;
use std::fmt::Write;

/// A written report.
pub struct ReportPage {
    /// The HTML text.
    pub html: String,
    /// Charts drawn.
    pub charts: usize,
    /// Snapshot days covered.
    pub days: usize,
    /// Whether the audit passed.
    pub audit_passed: bool,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn fmt_num(v: f64) -> String {
    if v == 0.0 {
        "0".into()
    } else if v.abs() >= 1000.0 {
        format!("{v:.0}")
    } else if v.abs() >= 10.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.3}")
    }
}

/// Small hand-written SVG charts.
pub mod svg {
    use super::{esc, fmt_num};
    use std::fmt::Write;

    /// A line chart of one series over labelled x positions.
    pub fn line(title: &str, x: &[String], y: &[Option<f64>], y_label: &str) -> String {
        let (w, h, l, r, t, b) = (640.0, 240.0, 60.0, 16.0, 28.0, 40.0);
        let vals: Vec<f64> = y.iter().flatten().copied().collect();
        let lo = vals.iter().copied().fold(f64::INFINITY, f64::min).min(0.0);
        let mut hi = vals.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if !hi.is_finite() || hi <= lo {
            hi = lo + 1.0;
        }
        let n = x.len().max(2) as f64 - 1.0;
        let px = |i: usize| l + (w - l - r) * i as f64 / n;
        let py = |v: f64| t + (h - t - b) * (1.0 - (v - lo) / (hi - lo));
        let mut s = format!(
            r#"<svg class="chart" xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" role="img" aria-label="{}">"#,
            esc(title)
        );
        let _ = write!(
            s,
            r#"<text x="{l}" y="16" class="title">{}</text>"#,
            esc(title)
        );
        let _ = write!(
            s,
            r#"<line x1="{l}" y1="{}" x2="{}" y2="{}" class="axis"/><line x1="{l}" y1="{t}" x2="{l}" y2="{}" class="axis"/>"#,
            h - b,
            w - r,
            h - b,
            h - b
        );
        for k in 0..=4 {
            let v = lo + (hi - lo) * k as f64 / 4.0;
            let _ = write!(
                s,
                r#"<text x="{}" y="{:.1}" class="tick" text-anchor="end">{}</text>"#,
                l - 4.0,
                py(v) + 4.0,
                fmt_num(v)
            );
        }
        let step = (x.len() / 6).max(1);
        for (i, lab) in x.iter().enumerate().step_by(step) {
            let _ = write!(
                s,
                r#"<text x="{:.1}" y="{}" class="tick" text-anchor="middle">{}</text>"#,
                px(i),
                h - b + 16.0,
                esc(lab)
            );
        }
        let _ = write!(
            s,
            r#"<text x="12" y="{:.1}" class="tick" transform="rotate(-90 12 {:.1})" text-anchor="middle">{}</text>"#,
            (t + h - b) / 2.0,
            (t + h - b) / 2.0,
            esc(y_label)
        );
        let pts: Vec<String> = y
            .iter()
            .enumerate()
            .filter_map(|(i, v)| v.map(|v| format!("{:.1},{:.1}", px(i), py(v))))
            .collect();
        let _ = write!(
            s,
            r#"<polyline points="{}" class="series"/>"#,
            pts.join(" ")
        );
        for (i, v) in y.iter().enumerate() {
            if let Some(v) = v {
                let _ = write!(
                    s,
                    r#"<circle cx="{:.1}" cy="{:.1}" r="3" class="dot"><title>{}: {}</title></circle>"#,
                    px(i),
                    py(*v),
                    esc(&x[i]),
                    fmt_num(*v)
                );
            }
        }
        s.push_str("</svg>");
        s
    }

    /// Vertical bars for a histogram (`edges` has one more entry than `counts`).
    pub fn histogram(title: &str, edges: &[f64], counts: &[u64], nulls: u64) -> String {
        let (w, h, l, b, t) = (300.0, 170.0, 8.0, 30.0, 24.0);
        let max = counts.iter().copied().max().unwrap_or(1).max(1) as f64;
        let bw = (w - 2.0 * l) / counts.len().max(1) as f64;
        let mut s = format!(
            r#"<svg class="chart" xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" role="img" aria-label="{}">"#,
            esc(title)
        );
        let _ = write!(
            s,
            r#"<text x="{l}" y="15" class="title">{}</text>"#,
            esc(title)
        );
        for (i, c) in counts.iter().enumerate() {
            let bh = (h - t - b) * *c as f64 / max;
            let _ = write!(
                s,
                r#"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" class="bar"><title>[{}, {}): {c}</title></rect>"#,
                l + bw * i as f64,
                h - b - bh,
                (bw - 1.0).max(1.0),
                bh.max(0.5),
                fmt_num(edges[i]),
                fmt_num(edges[i + 1])
            );
        }
        let _ = write!(
            s,
            r#"<line x1="{l}" y1="{}" x2="{}" y2="{}" class="axis"/>"#,
            h - b,
            w - l,
            h - b
        );
        let _ = write!(
            s,
            r#"<text x="{l}" y="{}" class="tick">{}</text><text x="{}" y="{}" class="tick" text-anchor="end">{}</text>"#,
            h - b + 14.0,
            fmt_num(edges[0]),
            w - l,
            h - b + 14.0,
            fmt_num(*edges.last().unwrap_or(&0.0))
        );
        let _ = write!(
            s,
            r#"<text x="{}" y="{}" class="tick" text-anchor="middle">nulls: {nulls}</text>"#,
            w / 2.0,
            h - 4.0
        );
        s.push_str("</svg>");
        s
    }

    /// Horizontal bars with values in `[lo, hi]` and a reference line at `mark`.
    pub fn hbars(
        title: &str,
        labels: &[String],
        values: &[f64],
        lo: f64,
        hi: f64,
        mark: f64,
    ) -> String {
        let (l, r, row, t) = (230.0, 60.0, 16.0, 28.0);
        let w = 640.0;
        let h = t + row * labels.len() as f64 + 24.0;
        let px = |v: f64| l + (w - l - r) * ((v - lo) / (hi - lo)).clamp(0.0, 1.0);
        let mut s = format!(
            r#"<svg class="chart" xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" role="img" aria-label="{}">"#,
            esc(title)
        );
        let _ = write!(
            s,
            r#"<text x="8" y="16" class="title">{}</text>"#,
            esc(title)
        );
        for (i, (lab, v)) in labels.iter().zip(values).enumerate() {
            let y = t + row * i as f64;
            let (a, b) = (px(mark), px(*v));
            let cls = if (*v - mark).abs() >= 0.45 * (hi - lo) {
                "bar alert"
            } else {
                "bar"
            };
            let _ = write!(
                s,
                r#"<text x="{}" y="{:.1}" class="tick" text-anchor="end">{}</text><rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" class="{cls}"><title>{}: {v:.4}</title></rect><text x="{:.1}" y="{:.1}" class="tick">{v:.3}</text>"#,
                l - 6.0,
                y + 11.0,
                esc(lab),
                a.min(b),
                y + 2.0,
                (a - b).abs().max(1.0),
                row - 4.0,
                esc(lab),
                a.max(b) + 4.0,
                y + 11.0
            );
        }
        let _ = write!(
            s,
            r#"<line x1="{:.1}" y1="{t}" x2="{:.1}" y2="{:.1}" class="axis"/>"#,
            px(mark),
            px(mark),
            h - 20.0
        );
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{:.1}" class="tick" text-anchor="middle">{}</text><text x="{:.1}" y="{:.1}" class="tick" text-anchor="middle">{}</text>"#,
            px(lo),
            h - 6.0,
            fmt_num(lo),
            px(hi),
            h - 6.0,
            fmt_num(hi)
        );
        s.push_str("</svg>");
        s
    }

    /// A heat map: rows x columns of values, colored from `lo` (light) to `hi` (dark);
    /// `diverging` colors negative values blue and positive red.
    pub fn heat(
        title: &str,
        rows: &[String],
        cols: &[String],
        cells: &[Vec<Option<f64>>],
        lo: f64,
        hi: f64,
        diverging: bool,
    ) -> String {
        let (l, t) = (230.0, 40.0);
        let cw = (560.0 / cols.len().max(1) as f64).clamp(6.0, 28.0);
        let ch = 14.0;
        // Wide enough for the title even with few columns.
        let w = (l + cw * cols.len() as f64 + 20.0).max(640.0);
        let h = t + ch * rows.len() as f64 + 60.0;
        let mut s = format!(
            r#"<svg class="chart" xmlns="http://www.w3.org/2000/svg" width="{w:.0}" height="{h:.0}" viewBox="0 0 {w:.0} {h:.0}" role="img" aria-label="{}">"#,
            esc(title)
        );
        let _ = write!(
            s,
            r#"<text x="8" y="16" class="title">{}</text>"#,
            esc(title)
        );
        for (i, lab) in rows.iter().enumerate() {
            let _ = write!(
                s,
                r#"<text x="{}" y="{:.1}" class="tick" text-anchor="end">{}</text>"#,
                l - 4.0,
                t + ch * i as f64 + 11.0,
                esc(lab)
            );
            for (j, v) in cells[i].iter().enumerate() {
                let fill = match v {
                    None => "#eeeeee".to_string(),
                    Some(v) if diverging => {
                        let x = (v / hi.abs().max(1e-12)).clamp(-1.0, 1.0);
                        let k = (255.0 * (1.0 - x.abs())) as u8;
                        if x >= 0.0 {
                            format!("rgb(255,{k},{k})")
                        } else {
                            format!("rgb({k},{k},255)")
                        }
                    }
                    Some(v) => {
                        let x = ((v - lo) / (hi - lo)).clamp(0.0, 1.0);
                        let k = (255.0 * (1.0 - x)) as u8;
                        format!("rgb(255,{k},{k})")
                    }
                };
                let tip = v.map(|v| format!("{v:.4}")).unwrap_or_else(|| "n/a".into());
                let _ = write!(
                    s,
                    r#"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="{fill}" class="cell"><title>{} / {}: {tip}</title></rect>"#,
                    l + cw * j as f64,
                    t + ch * i as f64,
                    cw - 1.0,
                    ch - 1.0,
                    esc(&rows[i]),
                    esc(&cols[j])
                );
            }
        }
        let step = (cols.len() / 8).max(1);
        for (j, lab) in cols.iter().enumerate().step_by(step) {
            let x = l + cw * j as f64 + cw / 2.0;
            let y = t + ch * rows.len() as f64 + 8.0;
            let _ = write!(
                s,
                r#"<text x="{x:.1}" y="{y:.1}" class="tick" transform="rotate(40 {x:.1} {y:.1})">{}</text>"#,
                esc(lab)
            );
        }
        s.push_str("</svg>");
        s
    }
}

/// Builds the report over the published snapshots (and labels, when there are some).
/// The pipeline's sources must be registered in `ctx` (the audit recomputes samples).
pub async fn report(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    out: &Location,
    opts: &AuditOptions,
) -> Result<ReportPage, AuditError> {
    let outcome = audit(ctx, pipeline, out, opts).await?;
    let days: Vec<NaiveDate> = outcome.days.iter().filter_map(|d| d.parse().ok()).collect();
    let (first, last) = (days[0], days[days.len() - 1]);
    let in_range = days_filter(first, last);
    tables::register_dir(ctx, out, snapshots_dir(opts.mode), "__report_snap").await?;
    let features = tables::numeric_features(ctx, "__report_snap", pipeline).await?;
    let labels_x: Vec<String> = days.iter().map(|d| d.format("%m-%d").to_string()).collect();
    let mut charts = 0usize;
    let mut body = String::new();

    // Population and null shares per day.
    let mut cols = vec!["dt".to_string(), "COUNT(*)".to_string()];
    cols.extend(
        pipeline
            .features
            .iter()
            .map(|f| format!("COUNT({})", ident(&f.name))),
    );
    let batches = collect(
        ctx,
        &format!(
            "SELECT {} FROM __report_snap WHERE {in_range} GROUP BY dt ORDER BY dt",
            cols.join(", ")
        ),
        "population per day",
    )
    .await?;
    let mut per_day: BTreeMap<String, Vec<f64>> = BTreeMap::new();
    for b in &batches {
        for r in 0..b.num_rows() {
            let d = value_text(b.column(0), r).unwrap_or_default();
            let v: Vec<f64> = (1..b.num_columns())
                .map(|c| value_f64(b.column(c), r).unwrap_or(0.0))
                .collect();
            per_day.insert(d, v);
        }
    }
    let pop: Vec<Option<f64>> = days
        .iter()
        .map(|d| per_day.get(&d.to_string()).map(|v| v[0]))
        .collect();
    body.push_str("<h2>Population and label rate</h2><div class=\"row\">");
    body.push_str(&svg::line(
        "Population (rows per snapshot)",
        &labels_x,
        &pop,
        "rows",
    ));
    charts += 1;

    // Label rate over time.
    let scan = register_scan(ctx, pipeline, out, &days, opts.mode).await?;
    let has_labels = scan.is_some_and(|n| n > 0);
    if has_labels {
        let b = collect(ctx, "SELECT CAST(snapshot_date AS VARCHAR), AVG(CAST(__y AS DOUBLE)) FROM __audit_scan GROUP BY 1 ORDER BY 1", "label rate").await?;
        let mut rate = BTreeMap::new();
        for batch in &b {
            for r in 0..batch.num_rows() {
                rate.insert(
                    value_text(batch.column(0), r).unwrap_or_default(),
                    value_f64(batch.column(1), r),
                );
            }
        }
        let y: Vec<Option<f64>> = days
            .iter()
            .map(|d| rate.get(&d.to_string()).copied().flatten())
            .collect();
        let name = pipeline
            .label
            .as_ref()
            .map(|l| l.name.as_str())
            .unwrap_or("label");
        body.push_str(&svg::line(
            &format!("Label rate ({name}, matured rows)"),
            &labels_x,
            &y,
            "share",
        ));
        charts += 1;
    } else {
        body.push_str("<p class=\"empty\">Label rate: no matured labels yet.</p>");
    }
    body.push_str("</div>");

    // Distributions on the last day.
    let _ = write!(
        body,
        "<h2>Feature distributions on {last}</h2><div class=\"row\">"
    );
    let day_filter = format!("dt = {}", literal(&last.to_string()));
    for f in &features {
        let v = format!("CAST({} AS DOUBLE)", ident(f));
        let mm = tables::first_row(&collect(ctx, &format!("SELECT MIN({v}), MAX({v}), COUNT(*) - COUNT({v}) FROM __report_snap WHERE {day_filter}"), "feature range").await?);
        let (Some(lo), Some(hi)) = (mm.first().copied().flatten(), mm.get(1).copied().flatten())
        else {
            continue;
        };
        let nulls = mm.get(2).copied().flatten().unwrap_or(0.0) as u64;
        let nb = 20usize;
        let width = if hi > lo { (hi - lo) / nb as f64 } else { 1.0 };
        let b = collect(ctx, &format!("SELECT LEAST(CAST(floor(({v} - {lo:?}) / {width:?}) AS BIGINT), {}) AS b, COUNT(*) FROM __report_snap WHERE {day_filter} AND {v} IS NOT NULL GROUP BY 1", nb - 1), "histogram").await?;
        let mut counts = vec![0u64; nb];
        for batch in &b {
            for r in 0..batch.num_rows() {
                if let (Some(i), Some(c)) =
                    (value_f64(batch.column(0), r), value_f64(batch.column(1), r))
                {
                    if let Some(slot) = counts.get_mut(i.max(0.0) as usize) {
                        *slot += c as u64;
                    }
                }
            }
        }
        let edges: Vec<f64> = (0..=nb).map(|i| lo + width * i as f64).collect();
        body.push_str(&svg::histogram(f, &edges, &counts, nulls));
        charts += 1;
    }
    body.push_str("</div>");

    // Drift heat map: PSI against the previous day.
    let mut drift: Vec<Vec<Option<f64>>> = vec![vec![None; days.len()]; features.len()];
    for (j, d) in days.iter().enumerate().skip(1) {
        let prev = days[j - 1];
        if (*d - prev).num_days() != 1 {
            continue;
        }
        let values = psi_between(
            ctx,
            "__report_snap",
            &days_filter(prev, prev),
            "__report_snap",
            &days_filter(*d, *d),
            &features,
        )
        .await?;
        for (i, f) in features.iter().enumerate() {
            drift[i][j] = values.get(f).copied();
        }
    }
    let fail_at = pipeline
        .checks
        .drift
        .as_ref()
        .map(|d| d.fail)
        .unwrap_or(0.25);
    body.push_str("<h2>Drift</h2>");
    body.push_str(&svg::heat(
        &format!(
            "PSI against the previous day (dark at {fail_at} and above; grey: no previous day)"
        ),
        &features,
        &labels_x,
        &drift,
        0.0,
        fail_at,
        false,
    ));
    charts += 1;

    // AUC bars and the correlation matrix.
    body.push_str("<h2>Features against the label</h2>");
    let analysis = match &outcome.analysis {
        Some(a) => Some(a.clone()),
        None => {
            // Without labels the matrix is still useful: correlations between features.
            let view = ctx
                .sql(&format!(
                    "SELECT *, 0 AS __y FROM __report_snap WHERE {in_range}"
                ))
                .await
                .map_err(crate::engine("report rows"))?;
            let _ = ctx.deregister_table("__report_rows");
            ctx.register_table("__report_rows", view.into_view())
                .map_err(crate::engine("report rows"))?;
            Some(analyse(ctx, "__report_rows", "__y", &features, true).await?)
        }
    };
    if has_labels {
        if let Some(a) = &outcome.analysis {
            let labels: Vec<String> = a
                .features
                .iter()
                .filter(|f| f.auc.is_some())
                .map(|f| f.name.clone())
                .collect();
            let values: Vec<f64> = a.features.iter().filter_map(|f| f.auc).collect();
            body.push_str(&svg::hbars(
                "Single-feature ROC AUC (0.5 = no signal; red near 0 or 1)",
                &labels,
                &values,
                0.0,
                1.0,
                0.5,
            ));
            charts += 1;
        }
    } else {
        body.push_str("<p class=\"empty\">Single-feature AUC: no matured labels yet.</p>");
    }

    // Null shares over time.
    body.push_str("<h2>Null shares</h2>");
    let names: Vec<String> = pipeline.features.iter().map(|f| f.name.clone()).collect();
    let nulls: Vec<Vec<Option<f64>>> = (0..names.len())
        .map(|i| {
            days.iter()
                .map(|d| {
                    per_day
                        .get(&d.to_string())
                        .and_then(|v| (v[0] > 0.0).then(|| 1.0 - v[i + 1] / v[0]))
                })
                .collect()
        })
        .collect();
    body.push_str(&svg::heat(
        "Share of null values per feature and day",
        &names,
        &labels_x,
        &nulls,
        0.0,
        1.0,
        false,
    ));
    charts += 1;

    if let Some(a) = &analysis {
        body.push_str("<h2>Correlation between features</h2>");
        let short: Vec<String> = a.features.iter().map(|f| f.name.clone()).collect();
        body.push_str(&svg::heat(
            "Pearson correlation (red positive, blue negative)",
            &short,
            &short,
            &a.pearson,
            -1.0,
            1.0,
            true,
        ));
        charts += 1;
        if !outcome.redundant.is_empty() {
            body.push_str("<p>Redundant pairs: ");
            let items: Vec<String> = outcome
                .redundant
                .iter()
                .map(|(x, y, p, s)| {
                    format!("{} ~ {} (Pearson {p:.3}, Spearman {s:.3})", esc(x), esc(y))
                })
                .collect();
            body.push_str(&items.join("; "));
            body.push_str("</p>");
        }
    }

    // Audit results.
    body.push_str(
        "<h2>Audit</h2><table><tr><th>#</th><th>check</th><th>status</th><th>evidence</th></tr>",
    );
    for c in &outcome.checks {
        let (cls, word) = match c.status {
            Status::Pass => ("pass", "pass"),
            Status::Fail => ("fail", "FAIL"),
            Status::Skipped => ("skip", "skipped"),
        };
        let _ = write!(
            body,
            "<tr><td>{}</td><td>{}</td><td class=\"{cls}\">{word}</td><td>{}</td></tr>",
            c.number,
            esc(c.name),
            esc(&c.summary)
        );
    }
    body.push_str("</table>");

    let html = format!(
        r#"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>daymark report: {name}</title>
<style>
body {{ font-family: sans-serif; margin: 24px; color: #222; }}
h1 {{ font-size: 22px; }} h2 {{ font-size: 17px; margin-top: 28px; border-bottom: 1px solid #ddd; }}
.row {{ display: flex; flex-wrap: wrap; gap: 12px; }}
svg.chart {{ background: #fff; border: 1px solid #e4e4e4; }}
svg .title {{ font-size: 12px; font-weight: bold; fill: #222; }}
svg .tick {{ font-size: 10px; fill: #555; }}
svg .axis {{ stroke: #999; stroke-width: 1; }}
svg .series {{ fill: none; stroke: #1f6fb2; stroke-width: 2; }}
svg .dot {{ fill: #1f6fb2; }}
svg .bar {{ fill: #5b9bd5; }} svg .bar.alert {{ fill: #d9534f; }}
table {{ border-collapse: collapse; }} td, th {{ border: 1px solid #ddd; padding: 4px 8px; text-align: left; vertical-align: top; }}
.pass {{ color: #2e7d32; font-weight: bold; }} .fail {{ color: #c62828; font-weight: bold; }} .skip {{ color: #777; }}
.empty {{ color: #777; font-style: italic; }}
</style></head><body>
<h1>daymark report: {name}</h1>
<p>{n} snapshot day(s), {first} .. {last}; pipeline hash <code>{hash}</code>; audit {verdict}.</p>
{body}
</body></html>
"#,
        name = esc(&pipeline.file.name),
        n = days.len(),
        hash = &pipeline.hash[..pipeline.hash.len().min(16)],
        verdict = if outcome.passed() { "passed" } else { "FAILED" },
    );
    Ok(ReportPage {
        html,
        charts,
        days: days.len(),
        audit_passed: outcome.passed(),
    })
}
