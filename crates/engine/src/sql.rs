//! The point-in-time snapshot of one day as one plain SQL query (the naive path).
//!
//! The query filters raw events for that one cutoff: no tiles, no reuse. It is what
//! `daymark explain` shows, and it is deliberately simple so that it can serve as the
//! in-project oracle for the tiled engine. It uses only DataFusion built-in functions.

use crate::time;
use chrono::{DateTime, Duration, NaiveDate, Utc};
use daymark_spec::{
    Aggregation, DerivedOp, Feature, FeatureDef, FillValue, Knowledge, Pipeline, Population, Window,
};
use std::collections::{BTreeMap, BTreeSet, HashSet};

/// Quotes an identifier for SQL.
pub fn ident(name: &str) -> String {
    format!("\"{}\"", name.replace('"', "\"\""))
}

/// Quotes a string literal for SQL.
pub fn literal(text: &str) -> String {
    format!("'{}'", text.replace('\'', "''"))
}

/// A condition on a Hive day-partition column `col` (text, `YYYY-MM-DD`) that holds for
/// exactly the partitions `days`. When every folder name of the table is a date
/// (`names_are_dates`: daymark's own tile folders, or a source whose listing ignored
/// nothing), it is a range per run of consecutive days (`>=`, `<=`, on names of 10
/// characters, so that a date written without its zeros stays out as it would of a list);
/// otherwise, or when the days are scattered into more than [`MAX_PARTITION_RUNS`] runs,
/// an `IN` list. DataFusion 55 plans a partition filter anew for every file of the table
/// it lists (`filter_partitioned_file`), so an `IN` list of a few hundred days cost a hash
/// set per file: about 8% of a backfill's CPU time (docs/benchmarks.md, eleventh
/// measurement).
pub fn partition_condition(col: &str, days: &BTreeSet<NaiveDate>, names_are_dates: bool) -> String {
    let mut runs: Vec<(NaiveDate, NaiveDate)> = Vec::new();
    for d in days {
        match runs.last_mut() {
            Some((_, last)) if *last + Duration::days(1) == *d => *last = *d,
            _ => runs.push((*d, *d)),
        }
    }
    if runs.is_empty() {
        return "FALSE".to_string();
    }
    let lit = |d: &NaiveDate| literal(&d.to_string());
    if !names_are_dates || runs.len() > MAX_PARTITION_RUNS {
        let list: Vec<String> = days.iter().map(lit).collect();
        return format!("{col} IN ({})", list.join(", "));
    }
    let terms: Vec<String> = runs
        .iter()
        .map(|(a, b)| match a == b {
            true => format!("{col} = {}", lit(a)),
            false => format!(
                "({col} >= {} AND {col} <= {} AND character_length({col}) = 10)",
                lit(a),
                lit(b)
            ),
        })
        .collect();
    format!("({})", terms.join(" OR "))
}

/// Runs of consecutive days beyond which [`partition_condition`] lists the days instead.
pub const MAX_PARTITION_RUNS: usize = 8;

/// A UTC instant as a SQL timestamp literal with the UTC zone.
pub fn ts_literal(t: DateTime<Utc>) -> String {
    format!(
        "arrow_cast({}, 'Timestamp(Microsecond, Some(\"UTC\"))')",
        literal(&t.format("%Y-%m-%dT%H:%M:%S%.6fZ").to_string())
    )
}

pub(crate) fn fill_sql(fill: &FillValue) -> String {
    match fill {
        FillValue::Null => "NULL".into(),
        FillValue::Bool(b) => b.to_string(),
        FillValue::Int(i) => i.to_string(),
        FillValue::Float(f) if f.is_finite() => format!("CAST({f:?} AS DOUBLE)"),
        FillValue::Float(f) if f.is_nan() => "CAST('NaN' AS DOUBLE)".into(),
        FillValue::Float(f) => format!(
            "CAST('{}Infinity' AS DOUBLE)",
            if *f < 0.0 { "-" } else { "" }
        ),
        FillValue::Text(t) => literal(t),
    }
}

/// What the query for one day reads from each source.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SourceRead {
    /// First day partition read (`None`: from the beginning).
    pub first_day: Option<NaiveDate>,
    /// Last day partition read.
    pub last_day: NaiveDate,
    /// Knowledge mode used.
    pub knowledge: Knowledge,
    /// Event times (and, as-known, arrival times) read are before this instant: the cutoff,
    /// unless the test-only [`TEST_ONLY_LEAK_ENV`] moves it (the audit checks it).
    pub until: DateTime<Utc>,
}

/// TEST ONLY, never for real builds: `source:Nd` (e.g. `plays:3d`) makes the naive path
/// read that source N days past the cutoff, so that tests can plant a leak and check that
/// `daymark audit` catches it. Undocumented for users on purpose.
pub const TEST_ONLY_LEAK_ENV: &str = "DAYMARK_TEST_ONLY_READ_PAST_CUTOFF";

/// The instant up to which `source` is read for a snapshot whose cutoff is `cutoff`: the
/// cutoff itself, unless a test plants a leak with [`TEST_ONLY_LEAK_ENV`].
pub fn read_until(source: &str, cutoff: DateTime<Utc>) -> DateTime<Utc> {
    let Ok(spec) = std::env::var(TEST_ONLY_LEAK_ENV) else {
        return cutoff;
    };
    let Some((name, days)) = spec.split_once(':') else {
        return cutoff;
    };
    match days.trim_end_matches('d').parse::<i64>() {
        Ok(n) if name == source => cutoff + Duration::days(n),
        _ => cutoff,
    }
}

/// The plan of one snapshot: cutoff, reads and SQL.
#[derive(Debug, Clone)]
pub struct SnapshotQuery {
    /// The snapshot day.
    pub day: NaiveDate,
    /// The cutoff instant.
    pub cutoff: DateTime<Utc>,
    /// What is read from each source.
    pub reads: BTreeMap<String, SourceRead>,
    /// The SQL, over tables named after the sources (with the day partition column).
    pub sql: String,
}

/// Overrides of the knowledge mode: `None` keeps each source's own.
pub type KnowledgeOverride = Option<Knowledge>;

/// The day an instant belongs to: days run from one cutoff to the next, so with the
/// default 00:00 cutoff this is the calendar date in the pipeline time zone.
pub(crate) fn day_of_sql(pipeline: &Pipeline, ts_sql: &str) -> String {
    let local = format!(
        "to_local_time(arrow_cast({ts_sql}, 'Timestamp(Microsecond, Some(\"{}\"))'))",
        pipeline.timezone.name()
    );
    let shift = pipeline
        .cutoff_time
        .signed_duration_since(chrono::NaiveTime::MIN)
        .num_seconds();
    if shift == 0 {
        format!("CAST({local} AS DATE)")
    } else {
        format!("CAST({local} - INTERVAL '{shift} seconds' AS DATE)")
    }
}

/// Builds the snapshot query for `day`.
pub fn snapshot_query(
    pipeline: &Pipeline,
    day: NaiveDate,
    mode: KnowledgeOverride,
) -> SnapshotQuery {
    let tz = pipeline.timezone;
    let cutoff = time::cutoff(tz, pipeline.cutoff_time, day);
    let start_of = |w: Window| {
        w.days()
            .map(|d| time::window_start(tz, pipeline.cutoff_time, day, d))
    };
    let key = ident(&pipeline.file.key);

    // Which windows each source needs.
    let mut needs: BTreeMap<String, Option<DateTime<Utc>>> = BTreeMap::new();
    let mut need = |source: &str, start: Option<DateTime<Utc>>| {
        let e = needs.entry(source.to_string()).or_insert(start);
        *e = match (*e, start) {
            (Some(a), Some(b)) => Some(a.min(b)),
            _ => None,
        };
    };
    match &pipeline.population {
        Population::State(s) => need(&s.source, None),
        Population::RecentActivity(a) => need(&a.source, start_of(a.within)),
    }
    for f in &pipeline.features {
        if let FeatureDef::Aggregate {
            source,
            agg,
            window,
            ..
        } = &f.def
        {
            let w = if agg.is_unbounded() {
                Window::All
            } else {
                *window
            };
            need(source, start_of(w));
        }
    }

    let mut ctes: Vec<String> = Vec::new();
    let mut reads = BTreeMap::new();
    for (name, start) in &needs {
        let Some(src) = pipeline.sources.get(name) else {
            continue;
        };
        let knowledge = mode.unwrap_or(src.knowledge);
        let knowledge = if src.spec.arrival_time.is_none() {
            Knowledge::EventTime
        } else {
            knowledge
        };
        let until = read_until(name, cutoff);
        // Rows are filed by event day; one day of slack each side covers any time zone.
        let first_day = start.map(|s| s.date_naive() - Duration::days(1));
        let last_day = until.date_naive() + Duration::days(1);
        reads.insert(
            name.clone(),
            SourceRead {
                first_day,
                last_day,
                knowledge,
                until,
            },
        );
        let dt = ident(&src.spec.day_partition);
        let ev = ident(&src.spec.event_time);
        let mut conds = vec![format!("{dt} <= {}", literal(&last_day.to_string()))];
        if let Some(d) = first_day {
            conds.push(format!("{dt} >= {}", literal(&d.to_string())));
        }
        conds.push(format!("{ev} < {}", ts_literal(until)));
        if let Some(s) = start {
            conds.push(format!("{ev} >= {}", ts_literal(*s)));
        }
        if let (Knowledge::AsKnown, Some(a)) = (knowledge, &src.spec.arrival_time) {
            conds.push(format!("{} < {}", ident(a), ts_literal(until)));
        }
        conds.push(format!("{} IS NOT NULL", ident(&src.key)));
        let base = format!(
            "SELECT *, {} AS __key FROM {} WHERE {}",
            ident(&src.key),
            ident(name),
            conds.join(" AND ")
        );
        let body = if src.spec.dedupe_on.is_empty() {
            base
        } else {
            let order = src
                .spec
                .arrival_time
                .as_ref()
                .map(|a| ident(a))
                .unwrap_or_else(|| ev.clone());
            let part: Vec<String> = src.spec.dedupe_on.iter().map(|c| ident(c)).collect();
            format!(
                "SELECT * FROM (SELECT *, row_number() OVER (PARTITION BY {} ORDER BY {order}) AS __copy FROM ({base})) WHERE __copy = 1",
                part.join(", ")
            )
        };
        ctes.push(format!("{} AS ({body})", ident(&format!("{name}__rows"))));
    }

    // Population.
    let pop = match &pipeline.population {
        Population::State(s) => {
            let src = &pipeline.sources[&s.source];
            let mut order = vec![format!("{} DESC", ident(&src.spec.event_time))];
            if let Some(a) = &src.spec.arrival_time {
                order.push(format!("{} DESC", ident(a)));
            }
            order.push(format!("{} DESC", ident(&s.column)));
            let values: Vec<String> = s.values.iter().map(|v| literal(v)).collect();
            format!(
                "SELECT __key FROM (SELECT __key, {} AS __state, row_number() OVER (PARTITION BY __key ORDER BY {}) AS __rank FROM {}) WHERE __rank = 1 AND __state IN ({})",
                ident(&s.column),
                order.join(", "),
                ident(&format!("{}__rows", s.source)),
                values.join(", ")
            )
        }
        Population::RecentActivity(a) => {
            let src = &pipeline.sources[&a.source];
            let mut conds = Vec::new();
            if let Some(s) = start_of(a.within) {
                conds.push(format!(
                    "{} >= {}",
                    ident(&src.spec.event_time),
                    ts_literal(s)
                ));
            }
            if let Some(f) = &a.filter {
                conds.push(format!("({f})"));
            }
            let wh = if conds.is_empty() {
                String::new()
            } else {
                format!(" WHERE {}", conds.join(" AND "))
            };
            format!(
                "SELECT DISTINCT __key FROM {}{wh}",
                ident(&format!("{}__rows", a.source))
            )
        }
    };
    ctes.push(format!("__population AS ({pop})"));

    // One aggregate per source feature.
    let d_days = (day - NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch")).num_days();
    let mut joins = Vec::new();
    let mut layer0 = vec![
        format!("p.__key AS {key}"),
        format!(
            "CAST({} AS DATE) AS snapshot_date",
            literal(&day.to_string())
        ),
    ];
    // One aggregation per source, every feature a filtered aggregate of it, so each
    // source's rows are read (and de-duplicated) once.
    let mut per_source: BTreeMap<&str, Vec<String>> = BTreeMap::new();
    for (i, f) in pipeline.features.iter().enumerate() {
        let FeatureDef::Aggregate {
            source,
            agg,
            expr,
            filter,
            window,
        } = &f.def
        else {
            continue;
        };
        let src = &pipeline.sources[source];
        let ev = ident(&src.spec.event_time);
        let e = expr
            .as_deref()
            .map(|x| format!("({x})"))
            .unwrap_or_default();
        let mut tiebreak = vec![ev.clone()];
        if let Some(a) = &src.spec.arrival_time {
            tiebreak.push(ident(a));
        }
        if !e.is_empty() {
            tiebreak.push(e.clone());
        }
        let mut conds = Vec::new();
        if let Some(s) = (!agg.is_unbounded()).then(|| start_of(*window)).flatten() {
            conds.push(format!("{ev} >= {}", ts_literal(s)));
        }
        if let Some(fl) = filter {
            conds.push(format!("({fl})"));
        }
        let only = if conds.is_empty() {
            String::new()
        } else {
            format!(" FILTER (WHERE {})", conds.join(" AND "))
        };
        let value = match agg {
            Aggregation::Count if e.is_empty() => format!("COUNT(*){only}"),
            Aggregation::Count => format!("COUNT({e}){only}"),
            Aggregation::Sum => format!("SUM({e}){only}"),
            Aggregation::Mean => format!("AVG(CAST({e} AS DOUBLE)){only}"),
            Aggregation::Min => format!("MIN({e}){only}"),
            Aggregation::Max => format!("MAX({e}){only}"),
            Aggregation::CountDistinct => format!("COUNT(DISTINCT {e}){only}"),
            Aggregation::ActiveDays => {
                format!("COUNT(DISTINCT {}){only}", day_of_sql(pipeline, &ev))
            }
            Aggregation::First => {
                format!("first_value({e} ORDER BY {}){only}", tiebreak.join(", "))
            }
            Aggregation::Last => {
                format!("last_value({e} ORDER BY {}){only}", tiebreak.join(", "))
            }
            Aggregation::DaysSinceFirst => format!(
                "{d_days} - CAST({} AS BIGINT)",
                day_of_sql(pipeline, &format!("MIN({ev}){only}"))
            ),
            Aggregation::DaysSinceLast => format!(
                "{d_days} - CAST({} AS BIGINT)",
                day_of_sql(pipeline, &format!("MAX({ev}){only}"))
            ),
        };
        let column = format!("__f{i}");
        per_source
            .entry(source.as_str())
            .or_default()
            .push(format!("{value} AS {column}"));
        let v = format!("{}.{column}", ident(&format!("{source}__agg")));
        layer0.push(feature_column(f, *agg, &v));
    }
    join_source_aggregates(&per_source, &mut ctes, &mut joins);

    let sql = finish(pipeline, &ctes, &layer0, &joins, Some(""));
    SnapshotQuery {
        day,
        cutoff,
        reads,
        sql,
    }
}

/// The output column of source feature `f` whose aggregate is the SQL value `v`: the fill
/// for an empty window (0 for counts), then the transforms.
pub(crate) fn feature_column(f: &Feature, agg: Aggregation, v: &str) -> String {
    let filled = match (&f.fill, agg.empty_is_zero()) {
        (Some(fill), _) => format!("COALESCE({v}, {})", fill_sql(fill)),
        (None, true) => format!("COALESCE({v}, 0)"),
        (None, false) => v.to_string(),
    };
    format!("{} AS {}", transform_sql(f, &filled), ident(&f.name))
}

/// One `<source>__agg` CTE per source (grouping its `<source>__rows` by key into the given
/// aggregate columns), each joined to the population.
pub(crate) fn join_source_aggregates(
    per_source: &BTreeMap<&str, Vec<String>>,
    ctes: &mut Vec<String>,
    joins: &mut Vec<String>,
) {
    for (source, columns) in per_source {
        let cte = ident(&format!("{source}__agg"));
        ctes.push(format!(
            "{cte} AS (SELECT __key, {} FROM {} GROUP BY __key)",
            columns.join(", "),
            ident(&format!("{source}__rows"))
        ));
        joins.push(format!("LEFT JOIN {cte} ON {cte}.__key = p.__key"));
    }
}

/// Adds derived features (in layers, each using features already computed) and the final
/// projection in declared order to the first layer `layer0` (key, date, source features)
/// over `__population p` and its `joins`, ordered by `order_prefix` then the key (`None`:
/// in no order).
pub(crate) fn finish(
    pipeline: &Pipeline,
    ctes: &[String],
    layer0: &[String],
    joins: &[String],
    order_prefix: Option<&str>,
) -> String {
    let key = ident(&pipeline.file.key);
    // Derived features in layers: each layer adds those whose operands exist.
    let mut available: HashSet<&str> = pipeline
        .features
        .iter()
        .filter(|f| matches!(f.def, FeatureDef::Aggregate { .. }))
        .map(|f| f.name.as_str())
        .collect();
    let mut sql = format!(
        "SELECT {} FROM __population p {}",
        layer0.join(", "),
        joins.join(" ")
    );
    let mut remaining: Vec<&Feature> = pipeline
        .features
        .iter()
        .filter(|f| matches!(f.def, FeatureDef::Derived { .. }))
        .collect();
    let mut layer = 0;
    while !remaining.is_empty() && layer < 64 {
        layer += 1;
        let (ready, rest): (Vec<&Feature>, Vec<&Feature>) =
            remaining.into_iter().partition(|f| match &f.def {
                FeatureDef::Derived { left, right, .. } => {
                    available.contains(left.as_str()) && available.contains(right.as_str())
                }
                _ => false,
            });
        if ready.is_empty() {
            break;
        }
        let mut cols = vec!["*".to_string()];
        for f in &ready {
            let FeatureDef::Derived { op, left, right } = &f.def else {
                continue;
            };
            let (l, r) = (ident(left), ident(right));
            let fill = f
                .fill
                .as_ref()
                .map(fill_sql)
                .unwrap_or_else(|| "NULL".into());
            let v = match op {
                DerivedOp::Ratio => format!("CASE WHEN {l} IS NULL OR {r} IS NULL OR {r} = 0 THEN CAST({fill} AS DOUBLE) ELSE CAST({l} AS DOUBLE) / CAST({r} AS DOUBLE) END"),
                DerivedOp::Difference if f.fill.is_some() => format!("COALESCE({l} - {r}, {fill})"),
                DerivedOp::Difference => format!("{l} - {r}"),
            };
            cols.push(format!("{} AS {}", transform_sql(f, &v), ident(&f.name)));
        }
        sql = format!("SELECT {} FROM ({sql})", cols.join(", "));
        for f in &ready {
            available.insert(f.name.as_str());
        }
        remaining = rest;
    }
    // Final projection in declared order.
    let mut out = vec![key.clone(), "snapshot_date".to_string()];
    out.extend(pipeline.features.iter().map(|f| ident(&f.name)));
    let order = match order_prefix {
        Some(prefix) => format!(" ORDER BY {prefix}{key}"),
        None => String::new(),
    };
    format!(
        "WITH {}\nSELECT {} FROM ({sql}){order}",
        ctes.join(",\n"),
        out.join(", ")
    )
}

/// Applies clip, log1p and bucket (in that order) to the SQL value `v`.
pub(crate) fn transform_sql(f: &Feature, v: &str) -> String {
    let Some(t) = &f.transform else {
        return v.to_string();
    };
    let mut x = v.to_string();
    if let Some(c) = &t.clip {
        if c.len() == 2 {
            x = format!(
                "LEAST(GREATEST(CAST({x} AS DOUBLE), {:?}), {:?})",
                c[0], c[1]
            );
        }
    }
    if t.log1p {
        x = format!("ln(1.0 + CAST({x} AS DOUBLE))");
    }
    if let Some(edges) = &t.bucket {
        let mut case = format!("CASE WHEN ({x}) IS NULL THEN NULL");
        for (i, e) in edges.iter().enumerate().rev() {
            case.push_str(&format!(" WHEN ({x}) >= {e:?} THEN {}", i + 1));
        }
        case.push_str(" ELSE 0 END");
        x = case;
    }
    x
}

#[cfg(test)]
mod tests {
    use super::{partition_condition, MAX_PARTITION_RUNS};
    use chrono::{Duration, NaiveDate};
    use datafusion::arrow::array::AsArray;
    use datafusion::prelude::SessionContext;
    use std::collections::BTreeSet;

    fn d(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    /// The partition names among `names` the condition keeps, evaluated by DataFusion.
    async fn kept(
        days: &BTreeSet<NaiveDate>,
        names_are_dates: bool,
        names: &[&str],
    ) -> Vec<String> {
        let values: Vec<String> = names.iter().map(|n| format!("('{n}')")).collect();
        let sql = format!(
            "SELECT dt FROM (VALUES {}) AS t(dt) WHERE {} ORDER BY dt",
            values.join(", "),
            partition_condition("dt", days, names_are_dates)
        );
        let batches = SessionContext::new()
            .sql(&sql)
            .await
            .unwrap()
            .collect()
            .await
            .unwrap();
        batches
            .iter()
            .flat_map(|b| {
                let c = b
                    .column(0)
                    .as_string_view_opt()
                    .map(|a| a.iter().map(|v| v.unwrap().to_string()).collect::<Vec<_>>());
                c.unwrap_or_else(|| {
                    b.column(0)
                        .as_string::<i32>()
                        .iter()
                        .map(|v| v.unwrap().to_string())
                        .collect()
                })
            })
            .collect()
    }

    #[tokio::test]
    async fn runs_of_days_keep_exactly_their_partitions() {
        // Two runs across a year's end and a lone day; a date written without its zeros
        // falls between the runs' bounds as text.
        let days: BTreeSet<NaiveDate> = ["2025-12-30", "2025-12-31", "2026-01-01", "2026-01-05"]
            .iter()
            .map(|s| d(s))
            .collect();
        let c = partition_condition("dt", &days, true);
        assert_eq!(c.matches(" OR ").count(), 1, "{c}");
        let names = [
            "2025-12-29",
            "2025-12-30",
            "2025-12-31",
            "2025-2-5",
            "2026-01-01",
            "2026-01-02",
            "2026-01-05",
            "2026-01-06",
        ];
        let want = ["2025-12-30", "2025-12-31", "2026-01-01", "2026-01-05"];
        assert_eq!(kept(&days, true, &names).await, want);
        // A folder name that is not a date can fall inside a range: such tables get a list.
        let mut names = names.to_vec();
        names.push("2025-12-3x");
        assert!(partition_condition("dt", &days, false).starts_with("dt IN ("));
        assert_eq!(kept(&days, false, &names).await, want);
    }

    #[tokio::test]
    async fn scattered_days_are_listed() {
        let first = d("2025-01-01");
        let days: BTreeSet<NaiveDate> = (0..=MAX_PARTITION_RUNS as i64)
            .map(|i| first + Duration::days(2 * i))
            .collect();
        let c = partition_condition("dt", &days, true);
        assert!(c.starts_with("dt IN ("), "{c}");
        let names: Vec<String> = (0..20)
            .map(|i| (first + Duration::days(i)).to_string())
            .collect();
        let names: Vec<&str> = names.iter().map(String::as_str).collect();
        let want: Vec<String> = days.iter().map(|d| d.to_string()).collect();
        assert_eq!(kept(&days, true, &names).await, want);
        assert_eq!(partition_condition("dt", &BTreeSet::new(), true), "FALSE");
    }
}
