//! Static validation: everything that can be checked without reading the data.
//!
//! Collects every problem it finds rather than stopping at the first. Checks that need the
//! sources' real schemas (unknown columns, types, filter expressions) are the engine's.

use crate::diag::{nearest, Diagnostic};
use crate::hash;
use crate::model::{Aggregation, FeatureSpec, FillValue, Knowledge, OnFail, PipelineFile};
use crate::resolved::{DerivedOp, Feature, FeatureDef, Pipeline, Population, Source};
use crate::window::Window;
use chrono::NaiveTime;
use chrono_tz::Tz;
use std::collections::{BTreeMap, HashMap, HashSet};
use std::path::PathBuf;

/// Column names a snapshot uses for itself.
pub const RESERVED_COLUMNS: &[&str] = &["snapshot_date"];

/// Whether `name` is a valid output column name: `[a-z][a-z0-9_]*`, at most 128 characters.
pub fn is_identifier(name: &str) -> bool {
    let mut chars = name.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_lowercase())
        && chars.all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
        && name.len() <= 128
}

/// Validates a parsed pipeline file.
pub fn validate(
    file: PipelineFile,
    base_dir: Option<PathBuf>,
) -> Result<Pipeline, Vec<Diagnostic>> {
    let mut errs = Vec::new();
    let mut err = |path: String, msg: String| errs.push(Diagnostic::at(path, msg));

    if file.daymark != 1 {
        err(
            "daymark".into(),
            format!(
                "format version {} is not supported: this daymark reads version 1",
                file.daymark
            ),
        );
    }
    if !is_identifier(&file.name) {
        err(
            "name".into(),
            format!(
                "`{}` is not a valid name: use lower-case letters, digits and `_`, starting with a letter",
                file.name
            ),
        );
    }
    let timezone: Tz = match file.timezone.parse() {
        Ok(tz) => tz,
        Err(_) => {
            err(
                "timezone".into(),
                format!(
                    "`{}` is not an IANA time zone name (for example `UTC`, `Europe/Lisbon`, `America/Chicago`)",
                    file.timezone
                ),
            );
            Tz::UTC
        }
    };
    let cutoff_time = match NaiveTime::parse_from_str(&file.cutoff_time, "%H:%M:%S")
        .or_else(|_| NaiveTime::parse_from_str(&file.cutoff_time, "%H:%M"))
    {
        Ok(t) => t,
        Err(_) => {
            err(
                "cutoff_time".into(),
                format!(
                    "`{}` is not a time of day: write `HH:MM` or `HH:MM:SS`, for example `00:00`",
                    file.cutoff_time
                ),
            );
            NaiveTime::MIN
        }
    };
    if file.key.trim().is_empty() {
        err("key".into(), "the key column name is empty".into());
    }

    // Sources.
    if file.sources.is_empty() {
        err("sources".into(), "no source is declared".into());
    }
    let mut sources = BTreeMap::new();
    for (name, spec) in &file.sources {
        let p = format!("sources.{name}");
        if !is_identifier(name) {
            err(
                p.clone(),
                format!(
                    "`{name}` is not a valid source name: use lower-case letters, digits and `_`"
                ),
            );
        }
        if spec.location.trim().is_empty() {
            err(format!("{p}.location"), "the location is empty".into());
        }
        for (k, v) in [
            ("event_time", Some(&spec.event_time)),
            ("arrival_time", spec.arrival_time.as_ref()),
            ("key", spec.key.as_ref()),
            ("day_partition", Some(&spec.day_partition)),
        ] {
            if let Some(v) = v {
                if v.trim().is_empty() {
                    err(format!("{p}.{k}"), "the column name is empty".into());
                }
            }
        }
        if spec.arrival_time.as_deref() == Some(spec.event_time.as_str()) {
            err(
                format!("{p}.arrival_time"),
                "the arrival time must be a different column from the event time".into(),
            );
        }
        let mut seen = HashSet::new();
        for (i, c) in spec.dedupe_on.iter().enumerate() {
            if !seen.insert(c) {
                err(
                    format!("{p}.dedupe_on[{i}]"),
                    format!("`{c}` is listed twice"),
                );
            }
        }
        let knowledge = match (spec.knowledge, &spec.arrival_time) {
            (Some(Knowledge::AsKnown), None) => {
                err(
                    format!("{p}.knowledge"),
                    "`as-known` needs an `arrival_time` column: without one, what was known at the cutoff cannot be told apart from what arrived later".into(),
                );
                Knowledge::EventTime
            }
            (Some(k), _) => k,
            (None, Some(_)) => Knowledge::AsKnown,
            (None, None) => Knowledge::EventTime,
        };
        sources.insert(
            name.clone(),
            Source {
                name: name.clone(),
                key: spec.key.clone().unwrap_or_else(|| file.key.clone()),
                spec: spec.clone(),
                knowledge,
            },
        );
    }
    let source_names: Vec<&str> = file.sources.keys().map(|s| s.as_str()).collect();
    let check_source = |path: String, name: &str, errs: &mut Vec<Diagnostic>| {
        if !file.sources.contains_key(name) {
            let hint = nearest(name, source_names.iter().copied())
                .map(|n| format!(": did you mean `{n}`?"))
                .unwrap_or_else(|| {
                    format!(" (declared: {})", quoted_list(source_names.iter().copied()))
                });
            errs.push(Diagnostic::at(
                path,
                format!("unknown source `{name}`{hint}"),
            ));
        }
    };

    // Population.
    let population = match (&file.population.state, &file.population.recent_activity) {
        (Some(s), None) => {
            check_source("population.state.source".into(), &s.source, &mut errs);
            if s.column.trim().is_empty() {
                errs.push(Diagnostic::at(
                    "population.state.column",
                    "the column name is empty",
                ));
            }
            if s.values.is_empty() {
                errs.push(Diagnostic::at(
                    "population.state.values",
                    "no state is listed: list the states that put a key in the population, for example `[active]`",
                ));
            }
            Some(Population::State(s.clone()))
        }
        (None, Some(a)) => {
            check_source(
                "population.recent_activity.source".into(),
                &a.source,
                &mut errs,
            );
            if a.within == Window::All {
                errs.push(Diagnostic::at(
                    "population.recent_activity.within",
                    "`all` would keep every key ever seen: give a number of days, for example `28d`",
                ));
            }
            Some(Population::RecentActivity(a.clone()))
        }
        (Some(_), Some(_)) => {
            errs.push(Diagnostic::at(
                "population",
                "give exactly one of `state` or `recent_activity`, not both",
            ));
            None
        }
        (None, None) => {
            errs.push(Diagnostic::at(
                "population",
                "give exactly one of `state` (keys whose latest change-log state is listed) or `recent_activity` (keys with recent events)",
            ));
            None
        }
    };

    // Features: expand windows, check each declaration.
    if file.features.is_empty() {
        errs.push(Diagnostic::at("features", "no feature is declared"));
    }
    let mut features: Vec<Feature> = Vec::new();
    let mut declared_at: HashMap<String, String> = HashMap::new();
    for (i, spec) in file.features.iter().enumerate() {
        let path = format!("features[{i}]");
        for f in expand_feature(spec, &path, file.checks.on_fail, &mut errs) {
            if let FeatureDef::Aggregate { source, .. } = &f.def {
                check_source(format!("{path}.source"), source, &mut errs);
            }
            if f.name == file.key || RESERVED_COLUMNS.contains(&f.name.as_str()) {
                errs.push(Diagnostic::at(
                    format!("{path}.name"),
                    format!(
                        "`{}` is reserved for the snapshot's own column: choose another name",
                        f.name
                    ),
                ));
            }
            if let Some(first) = declared_at.get(&f.name) {
                errs.push(Diagnostic::at(
                    format!("{path}.name"),
                    format!("feature `{}` is already declared at {first}", f.name),
                ));
                continue;
            }
            declared_at.insert(f.name.clone(), path.clone());
            features.push(f);
        }
    }
    if let Some(label) = &file.label {
        if declared_at.contains_key(&label.name) || label.name == file.key {
            errs.push(Diagnostic::at(
                "label.name",
                format!("`{}` is already a column of the snapshot", label.name),
            ));
        }
        if !is_identifier(&label.name) {
            errs.push(Diagnostic::at(
                "label.name",
                format!("`{}` is not a valid column name", label.name),
            ));
        }
        check_source("label.source".into(), &label.source, &mut errs);
        if label.horizon.0 == 0 {
            errs.push(Diagnostic::at(
                "label.horizon",
                "the horizon must be at least `1d`",
            ));
        }
        if label.ended.trim().is_empty() {
            errs.push(Diagnostic::at("label.ended", "the condition is empty"));
        }
    }
    check_derived(&features, &declared_at, &mut errs);
    check_checks(&file, &mut errs);

    if !errs.is_empty() {
        return Err(errs);
    }
    let population = population.expect("population is set when there are no errors");
    let mut pipeline = Pipeline {
        base_dir,
        timezone,
        cutoff_time,
        sources,
        population,
        features,
        label: file.label.clone(),
        checks: file.checks.clone(),
        hash: String::new(),
        population_hash: String::new(),
        file,
    };
    hash::assign_hashes(&mut pipeline);
    Ok(pipeline)
}

fn quoted_list<'a>(items: impl Iterator<Item = &'a str>) -> String {
    items
        .map(|s| format!("`{s}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// Turns one declaration into its output features (one per window).
fn expand_feature(
    spec: &FeatureSpec,
    path: &str,
    default_on_fail: OnFail,
    errs: &mut Vec<Diagnostic>,
) -> Vec<Feature> {
    let mut err = |k: &str, msg: String| {
        let p = if k.is_empty() {
            path.to_string()
        } else {
            format!("{path}.{k}")
        };
        errs.push(Diagnostic::at(p, msg));
    };
    let name = &spec.name;
    if !is_identifier(name) {
        err(
            "name",
            format!("`{name}` is not a valid feature name: use lower-case letters, digits and `_`, starting with a letter"),
        );
    }
    check_transform(spec, &mut err);
    check_expect(spec, &mut err);

    let derived = match (&spec.ratio, &spec.difference) {
        (Some(r), None) => Some((DerivedOp::Ratio, r)),
        (None, Some(d)) => Some((DerivedOp::Difference, d)),
        (Some(_), Some(_)) => {
            err(
                "",
                format!("feature `{name}` gives both `ratio` and `difference`: give one"),
            );
            return vec![];
        }
        (None, None) => None,
    };
    let base = |def: FeatureDef, fname: String| Feature {
        name: fname,
        path: path.to_string(),
        description: spec.description.clone(),
        def,
        fill: spec.fill.clone(),
        transform: spec.transform.clone(),
        expect: spec.expect.clone(),
        on_fail: spec.on_fail.unwrap_or(default_on_fail),
        hash: String::new(),
    };

    if let Some((op, operands)) = derived {
        for (k, present) in [
            ("source", spec.source.is_some()),
            ("agg", spec.agg.is_some()),
            ("expr", spec.expr.is_some()),
            ("filter", spec.filter.is_some()),
            ("window", spec.window.is_some()),
            ("windows", spec.windows.is_some()),
        ] {
            if present {
                err(
                    k,
                    format!(
                        "a derived feature (`{}`) takes no `{k}`: it combines two other features",
                        op.as_str()
                    ),
                );
            }
        }
        if operands.len() != 2 {
            err(
                op.as_str(),
                format!("`{}` takes exactly two feature names, for example `[minutes_7d, minutes_28d]`; got {}", op.as_str(), operands.len()),
            );
            return vec![];
        }
        if op == DerivedOp::Ratio && spec.fill.is_none() {
            err(
                "fill",
                format!("feature `{name}`: a ratio has no value when the divisor is 0 or missing; declare `fill` (for example `fill: 0` or `fill: null`)"),
            );
        }
        let def = FeatureDef::Derived {
            op,
            left: operands[0].clone(),
            right: operands[1].clone(),
        };
        return vec![base(def, name.clone())];
    }

    let Some(source) = &spec.source else {
        err("", format!("feature `{name}` needs `source` and `agg` (or `ratio`/`difference` for a derived feature)"));
        return vec![];
    };
    let Some(agg) = spec.agg else {
        err("agg", format!("feature `{name}` needs `agg`: one of count, sum, mean, min, max, count_distinct, active_days, first, last, days_since_first, days_since_last"));
        return vec![];
    };
    if agg.needs_expr() && spec.expr.as_deref().map(str::trim).unwrap_or("").is_empty() {
        err(
            "expr",
            format!(
                "`{}` needs `expr`: the column or expression to aggregate",
                agg.as_str()
            ),
        );
    }
    if !agg.needs_expr() && agg != Aggregation::Count && spec.expr.is_some() {
        err(
            "expr",
            format!(
                "`{}` takes no `expr`: it counts events or days",
                agg.as_str()
            ),
        );
    }
    if let Some(f) = &spec.filter {
        if f.trim().is_empty() {
            err(
                "filter",
                "the filter is empty: remove it or write a condition".into(),
            );
        }
    }
    if !agg.empty_is_zero() && spec.fill.is_none() {
        err(
            "fill",
            format!("feature `{name}`: `{}` has no value for an empty window; declare `fill` (for example `fill: 0` or `fill: null`)", agg.as_str()),
        );
    }
    if matches!(spec.fill, Some(FillValue::Text(_)))
        && !matches!(
            agg,
            Aggregation::First | Aggregation::Last | Aggregation::Min | Aggregation::Max
        )
    {
        err(
            "fill",
            format!(
                "`{}` gives a number: the fill must be a number or null",
                agg.as_str()
            ),
        );
    }
    let windows: Vec<Window> = match (&spec.window, &spec.windows) {
        (Some(_), Some(_)) => {
            err("windows", "give `window` or `windows`, not both".into());
            return vec![];
        }
        (Some(w), None) => vec![*w],
        (None, Some(ws)) => {
            if ws.is_empty() {
                err("windows", "the list of windows is empty".into());
                return vec![];
            }
            let mut seen = HashSet::new();
            let mut unique = Vec::new();
            for (j, w) in ws.iter().enumerate() {
                if seen.insert(*w) {
                    unique.push(*w);
                } else {
                    err(
                        &format!("windows[{j}]"),
                        format!("window `{w}` is listed twice"),
                    );
                }
            }
            // One message per repeated window, not a second one for the repeated name.
            unique
        }
        (None, None) if agg.is_unbounded() => vec![Window::All],
        (None, None) => {
            err("window", format!("feature `{name}` needs `window` (for example `window: 28d`, or `all`) or `windows`"));
            return vec![];
        }
    };
    if agg.is_unbounded() && windows.iter().any(|w| *w != Window::All) {
        err(
            "window",
            format!(
                "`{}` always looks back over all history: leave out the window or write `all`",
                agg.as_str()
            ),
        );
    }
    let expand = spec.windows.is_some();
    windows
        .into_iter()
        .map(|w| {
            let fname = if expand {
                format!("{name}_{}", w.suffix())
            } else {
                name.clone()
            };
            base(
                FeatureDef::Aggregate {
                    source: source.clone(),
                    agg,
                    expr: spec.expr.clone(),
                    filter: spec.filter.clone(),
                    window: w,
                },
                fname,
            )
        })
        .collect()
}

fn check_transform(spec: &FeatureSpec, err: &mut impl FnMut(&str, String)) {
    let Some(t) = &spec.transform else { return };
    if let Some(c) = &t.clip {
        if c.len() != 2 {
            err(
                "transform.clip",
                format!("`clip` takes `[low, high]`; got {} numbers", c.len()),
            );
        } else if !(c[0].is_finite() && c[1].is_finite()) || c[0] > c[1] {
            err(
                "transform.clip",
                format!(
                    "`clip` needs finite numbers with low <= high; got [{}, {}]",
                    c[0], c[1]
                ),
            );
        } else if t.log1p && c[0] <= -1.0 {
            err("transform.clip", "log1p after clip needs low > -1".into());
        }
    }
    if let Some(b) = &t.bucket {
        if b.is_empty() {
            err(
                "transform.bucket",
                "`bucket` needs at least one edge".into(),
            );
        }
        if b.iter().any(|x| !x.is_finite()) || b.windows(2).any(|w| w[0] >= w[1]) {
            err(
                "transform.bucket",
                "bucket edges must be finite and strictly increasing".into(),
            );
        }
    }
    if matches!(
        spec.fill,
        Some(FillValue::Text(_)) | Some(FillValue::Bool(_))
    ) {
        err(
            "transform",
            "transforms apply to numbers; this feature's fill is not a number".into(),
        );
    }
}

fn check_expect(spec: &FeatureSpec, err: &mut impl FnMut(&str, String)) {
    let Some(e) = &spec.expect else { return };
    if let (Some(lo), Some(hi)) = (e.min, e.max) {
        if lo > hi {
            err(
                "expect",
                format!("`min` ({lo}) is greater than `max` ({hi})"),
            );
        }
    }
    if let Some(s) = e.max_null_share {
        if !(0.0..=1.0).contains(&s) {
            err(
                "expect.max_null_share",
                format!("a share is between 0 and 1; got {s}"),
            );
        }
    }
    if let Some(v) = &e.values {
        if v.is_empty() {
            err(
                "expect.values",
                "the list of allowed values is empty".into(),
            );
        }
    }
}

/// Derived features must name declared features and must not depend on themselves.
fn check_derived(
    features: &[Feature],
    declared_at: &HashMap<String, String>,
    errs: &mut Vec<Diagnostic>,
) {
    let by_name: HashMap<&str, &Feature> = features.iter().map(|f| (f.name.as_str(), f)).collect();
    let names: Vec<&str> = features.iter().map(|f| f.name.as_str()).collect();
    for f in features {
        if let FeatureDef::Derived { op, left, right } = &f.def {
            for (j, operand) in [left, right].into_iter().enumerate() {
                if !declared_at.contains_key(operand) {
                    let hint = nearest(operand, names.iter().copied())
                        .map(|n| format!(": did you mean `{n}`?"))
                        .unwrap_or_default();
                    errs.push(Diagnostic::at(
                        format!("{}.{}[{j}]", f.path, op.as_str()),
                        format!("unknown feature `{operand}`{hint}"),
                    ));
                }
            }
        }
    }
    // Cycle search: depth-first with colours; report each cycle once, by its path.
    let mut state: HashMap<&str, u8> = HashMap::new();
    let mut reported = HashSet::new();
    fn visit<'a>(
        name: &'a str,
        by_name: &HashMap<&'a str, &'a Feature>,
        state: &mut HashMap<&'a str, u8>,
        stack: &mut Vec<&'a str>,
        reported: &mut HashSet<Vec<String>>,
        errs: &mut Vec<Diagnostic>,
    ) {
        match state.get(name) {
            Some(2) => return,
            Some(1) => {
                let start = stack.iter().position(|n| *n == name).unwrap_or(0);
                let mut cycle: Vec<String> = stack[start..].iter().map(|s| s.to_string()).collect();
                let mut key = cycle.clone();
                key.sort();
                if reported.insert(key) {
                    cycle.push(name.to_string());
                    let path = by_name
                        .get(name)
                        .map(|f| f.path.clone())
                        .unwrap_or_default();
                    errs.push(Diagnostic::at(
                        path,
                        format!("derived features form a cycle: {}", cycle.join(" -> ")),
                    ));
                }
                return;
            }
            _ => {}
        }
        let Some(f) = by_name.get(name) else { return };
        state.insert(name, 1);
        stack.push(name);
        if let FeatureDef::Derived { left, right, .. } = &f.def {
            for operand in [left, right] {
                if let Some((k, _)) = by_name.get_key_value(operand.as_str()) {
                    visit(k, by_name, state, stack, reported, errs);
                }
            }
        }
        stack.pop();
        state.insert(name, 2);
    }
    for f in features {
        let mut stack = Vec::new();
        visit(
            f.name.as_str(),
            &by_name,
            &mut state,
            &mut stack,
            &mut reported,
            errs,
        );
    }
}

fn check_checks(file: &PipelineFile, errs: &mut Vec<Diagnostic>) {
    if let Some(s) = file.checks.max_population_change {
        if !(s.is_finite() && s >= 0.0) {
            errs.push(Diagnostic::at(
                "checks.max_population_change",
                format!("a share is a number of at least 0 (0.2 = 20%); got {s}"),
            ));
        }
    }
    if let Some(d) = &file.checks.drift {
        if !(d.warn.is_finite() && d.fail.is_finite() && 0.0 < d.warn && d.warn <= d.fail) {
            errs.push(Diagnostic::at(
                "checks.drift",
                format!(
                    "PSI thresholds need 0 < warn <= fail; got warn {} and fail {}",
                    d.warn, d.fail
                ),
            ));
        }
        if d.reference == Window::All {
            errs.push(Diagnostic::at(
                "checks.drift.reference",
                "the reference must be a number of days",
            ));
        }
    }
}
