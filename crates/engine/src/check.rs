//! Checks of a pipeline against its sources' real schemas: columns exist, types fit, and
//! filters and expressions are scalar SQL over the source's own columns only.
//!
//! Expressions are parsed and typed by DataFusion's own SQL planner, the one that later
//! runs them, so what passes here plans the same way at build time.

use arrow::datatypes::{DataType, SchemaRef};
use datafusion::common::tree_node::TreeNode;
use datafusion::common::DFSchema;
use datafusion::logical_expr::{Expr, ExprSchemable};
use datafusion::prelude::SessionContext;
use daymark_spec::diag::nearest;
use daymark_spec::{
    Aggregation, DerivedOp, Diagnostic, FeatureDef, FillValue, Pipeline, Population,
};
use std::collections::{BTreeMap, HashMap};

/// Functions whose value depends on when or where a build runs: a snapshot must depend
/// only on its cutoff and its inputs.
const UNSTABLE_FUNCTIONS: &[&str] = &[
    "now",
    "current_date",
    "current_time",
    "current_timestamp",
    "localtime",
    "localtimestamp",
    "random",
    "uuid",
    "today",
];

const SUBQUERY: &str =
    "subqueries are not allowed: the expression may read only this source's own columns";

/// Whether the SQL text contains a SELECT keyword (a subquery), by DataFusion's tokenizer.
fn has_select(sql: &str) -> bool {
    use datafusion::sql::sqlparser::dialect::GenericDialect;
    use datafusion::sql::sqlparser::keywords::Keyword;
    use datafusion::sql::sqlparser::tokenizer::{Token, Tokenizer};
    Tokenizer::new(&GenericDialect {}, sql)
        .tokenize()
        .map(|tokens| {
            tokens
                .iter()
                .any(|t| matches!(t, Token::Word(w) if w.keyword == Keyword::SELECT))
        })
        .unwrap_or(false)
}

/// Output types of every feature, by name, once the schemas are known.
pub type FeatureTypes = BTreeMap<String, DataType>;

/// Parses a scalar SQL expression over one source's columns and returns its type.
///
/// Rejects subqueries, aggregates, window functions, placeholders, references to other
/// tables, and functions whose value depends on the time of the build.
pub fn check_expr(
    ctx: &SessionContext,
    sql: &str,
    source: &str,
    schema: &SchemaRef,
) -> Result<(Expr, DataType), String> {
    let df_schema = DFSchema::try_from(schema.as_ref().clone()).map_err(|e| e.to_string())?;
    if has_select(sql) {
        return Err(SUBQUERY.to_string());
    }
    let expr = ctx
        .parse_sql_expr(sql, &df_schema)
        .map_err(|e| explain_error(&e.to_string(), source, schema))?;
    let mut problem: Option<String> = None;
    let _ = expr.apply(|e| {
        let msg = match e {
            Expr::ScalarSubquery(_) | Expr::Exists(_) | Expr::InSubquery(_) | Expr::SetComparison(_) => {
                Some(SUBQUERY.to_string())
            }
            Expr::AggregateFunction(f) => Some(format!(
                "`{}` is an aggregate: an expression here is computed per event; choose the aggregation with `agg`",
                f.func.name()
            )),
            Expr::WindowFunction(_) => Some("window functions are not allowed: an expression here is computed per event".to_string()),
            Expr::Placeholder(_) => Some("placeholders (`$1`) are not allowed".to_string()),
            Expr::OuterReferenceColumn(..) => Some("references to other tables are not allowed".to_string()),
            Expr::GroupingSet(_) | Expr::Unnest(_) => Some("only scalar expressions are allowed".to_string()),
            Expr::ScalarFunction(f) if UNSTABLE_FUNCTIONS.contains(&f.func.name()) => Some(format!(
                "`{}()` depends on when the build runs: a snapshot may depend only on its cutoff and its inputs",
                f.func.name()
            )),
            Expr::ScalarVariable(..) => Some("variables (`@name`) are not allowed".to_string()),
            _ => None,
        };
        if let Some(m) = msg {
            problem = Some(m);
            return Ok(datafusion::common::tree_node::TreeNodeRecursion::Stop);
        }
        Ok(datafusion::common::tree_node::TreeNodeRecursion::Continue)
    });
    if let Some(p) = problem {
        return Err(p);
    }
    if expr.is_volatile() {
        return Err("volatile functions (such as `random()`) are not allowed: a rebuild must give the same snapshot".into());
    }
    let ty = expr.get_type(&df_schema).map_err(|e| e.to_string())?;
    Ok((expr, ty))
}

/// Rewrites DataFusion's planner errors into a message about the pipeline file.
fn explain_error(raw: &str, source: &str, schema: &SchemaRef) -> String {
    let first_line = raw.lines().next().unwrap_or(raw);
    if let Some(rest) = first_line.split("No field named ").nth(1) {
        let name = rest
            .split(['.', ' ', ','])
            .next()
            .unwrap_or("")
            .trim_matches(['"', '`', '\'']);
        let name = name.rsplit('.').next().unwrap_or(name);
        let fields: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
        let hint = nearest(name, fields.iter().copied())
            .map(|n| format!(": did you mean `{n}`?"))
            .unwrap_or_else(|| format!(" (its columns: {})", fields.join(", ")));
        return format!("unknown column `{name}` in source `{source}`{hint}");
    }
    if first_line.contains("table") && first_line.contains("not found") {
        return format!(
            "the expression may read only the columns of source `{source}`: {first_line}"
        );
    }
    format!(
        "cannot use the expression: {}",
        first_line.trim_start_matches("Error during planning: ")
    )
}

fn is_timestamp(t: &DataType) -> bool {
    matches!(t, DataType::Timestamp(..))
}

fn is_key_type(t: &DataType) -> bool {
    matches!(
        t,
        DataType::Utf8
            | DataType::LargeUtf8
            | DataType::Utf8View
            | DataType::Int32
            | DataType::Int64
            | DataType::UInt32
            | DataType::UInt64
    )
}

fn is_orderable(t: &DataType) -> bool {
    t.is_numeric()
        || is_timestamp(t)
        || matches!(
            t,
            DataType::Utf8
                | DataType::LargeUtf8
                | DataType::Utf8View
                | DataType::Date32
                | DataType::Date64
                | DataType::Boolean
        )
}

fn is_textual(t: &DataType) -> bool {
    matches!(
        t,
        DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View | DataType::Dictionary(..)
    )
}

/// The type of a feature before transforms.
fn aggregate_type(agg: Aggregation, expr_type: Option<&DataType>) -> DataType {
    match agg {
        Aggregation::Count
        | Aggregation::CountDistinct
        | Aggregation::ActiveDays
        | Aggregation::DaysSinceFirst
        | Aggregation::DaysSinceLast => DataType::Int64,
        Aggregation::Mean => DataType::Float64,
        Aggregation::Sum => match expr_type {
            Some(t) if t.is_integer() => DataType::Int64,
            _ => DataType::Float64,
        },
        Aggregation::Min | Aggregation::Max | Aggregation::First | Aggregation::Last => {
            match expr_type {
                Some(t) if t.is_integer() => DataType::Int64,
                Some(t)
                    if t.is_floating()
                        || matches!(t, DataType::Decimal128(..) | DataType::Decimal256(..)) =>
                {
                    DataType::Float64
                }
                Some(t) if is_textual(t) => DataType::Utf8,
                Some(t) => t.clone(),
                None => DataType::Null,
            }
        }
    }
}

/// Checks `pipeline` against the schemas of its sources (`None` for a source whose schema
/// could not be read: its own problem is reported elsewhere). Returns every problem found
/// and the output type of each feature that could be typed.
pub fn check_against_schemas(
    pipeline: &Pipeline,
    schemas: &HashMap<String, Option<SchemaRef>>,
) -> (Vec<Diagnostic>, FeatureTypes) {
    let ctx = SessionContext::new();
    let mut errs = Vec::new();
    let mut types = FeatureTypes::new();

    for (name, src) in &pipeline.sources {
        let Some(Some(schema)) = schemas.get(name) else {
            continue;
        };
        let p = format!("sources.{name}");
        let fields: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
        let mut column =
            |key: &str, col: &str, want: &str, ok: &dyn Fn(&DataType) -> bool| match schema
                .field_with_name(col)
            {
                Ok(f) if ok(f.data_type()) => {}
                Ok(f) => errs.push(Diagnostic::at(
                    format!("{p}.{key}"),
                    format!(
                        "column `{col}` of source `{name}` is {}, but {key} needs {want}",
                        f.data_type()
                    ),
                )),
                Err(_) => {
                    let hint = nearest(col, fields.iter().copied())
                        .map(|n| format!(": did you mean `{n}`?"))
                        .unwrap_or_else(|| format!(" (its columns: {})", fields.join(", ")));
                    errs.push(Diagnostic::at(
                        format!("{p}.{key}"),
                        format!("source `{name}` has no column `{col}`{hint}"),
                    ));
                }
            };
        column(
            "event_time",
            &src.spec.event_time,
            "a timestamp",
            &is_timestamp,
        );
        if let Some(a) = &src.spec.arrival_time {
            column("arrival_time", a, "a timestamp", &is_timestamp);
        }
        let key_path = if src.spec.key.is_some() {
            "key"
        } else {
            "key (the pipeline's key)"
        };
        column(key_path, &src.key, "a string or integer", &is_key_type);
        for c in &src.spec.dedupe_on {
            column("dedupe_on", c, "any type", &|_| true);
        }
        if schema.field_with_name(&src.spec.day_partition).is_ok() {
            errs.push(Diagnostic::at(
                format!("{p}.day_partition"),
                format!("`{}` is both the day partition folder name and a column in the files: rename one", src.spec.day_partition),
            ));
        }
    }

    let schema_of = |source: &str| schemas.get(source).and_then(|s| s.clone());

    match &pipeline.population {
        Population::State(s) => {
            if let Some(schema) = schema_of(&s.source) {
                match schema.field_with_name(&s.column) {
                    Ok(f) if is_textual(f.data_type()) => {}
                    Ok(f) => errs.push(Diagnostic::at(
                        "population.state.column",
                        format!(
                            "column `{}` is {}: states are compared as strings",
                            s.column,
                            f.data_type()
                        ),
                    )),
                    Err(_) => errs.push(Diagnostic::at(
                        "population.state.column",
                        format!("source `{}` has no column `{}`", s.source, s.column),
                    )),
                }
            }
        }
        Population::RecentActivity(a) => {
            if let (Some(schema), Some(filter)) = (schema_of(&a.source), &a.filter) {
                check_condition(
                    &ctx,
                    filter,
                    &a.source,
                    &schema,
                    "population.recent_activity.filter",
                    &mut errs,
                );
            }
        }
    }

    // Source features first (their types feed derived features).
    for f in &pipeline.features {
        let FeatureDef::Aggregate {
            source,
            agg,
            expr,
            filter,
            ..
        } = &f.def
        else {
            continue;
        };
        let Some(schema) = schema_of(source) else {
            continue;
        };
        if let Some(filter) = filter {
            check_condition(
                &ctx,
                filter,
                source,
                &schema,
                &format!("{}.filter", f.path),
                &mut errs,
            );
        }
        let expr_type = match expr {
            Some(sql) => match check_expr(&ctx, sql, source, &schema) {
                Ok((_, t)) => Some(t),
                Err(m) => {
                    errs.push(Diagnostic::at(format!("{}.expr", f.path), m));
                    continue;
                }
            },
            None => None,
        };
        if let Some(t) = &expr_type {
            let bad = match agg {
                Aggregation::Sum | Aggregation::Mean if !t.is_numeric() => Some("a number"),
                Aggregation::Min | Aggregation::Max if !is_orderable(t) => {
                    Some("values that can be ordered")
                }
                _ if t.is_nested() => Some("a single value per event (not a list or struct)"),
                _ => None,
            };
            if let Some(want) = bad {
                errs.push(Diagnostic::at(
                    format!("{}.expr", f.path),
                    format!(
                        "`{}` needs {want}, but `{}` is {t}",
                        agg.as_str(),
                        expr.as_deref().unwrap_or("")
                    ),
                ));
                continue;
            }
        }
        let out = aggregate_type(*agg, expr_type.as_ref());
        check_fill(
            f.fill.as_ref(),
            &out,
            &format!("{}.fill", f.path),
            &mut errs,
        );
        if f.transform.is_some() && !out.is_numeric() {
            errs.push(Diagnostic::at(
                format!("{}.transform", f.path),
                format!("transforms apply to numbers; `{}` is {out}", f.name),
            ));
        }
        types.insert(f.name.clone(), transformed_type(f, out));
    }
    // Derived features, in dependency order (validation already rejected cycles).
    let mut pending: Vec<_> = pipeline
        .features
        .iter()
        .filter(|f| matches!(f.def, FeatureDef::Derived { .. }))
        .collect();
    let mut progress = true;
    while progress && !pending.is_empty() {
        progress = false;
        pending.retain(|f| {
            let FeatureDef::Derived { op, left, right } = &f.def else {
                return false;
            };
            let (Some(l), Some(r)) = (types.get(left).cloned(), types.get(right).cloned()) else {
                return true;
            };
            progress = true;
            for (side, name, t) in [(0, left, &l), (1, right, &r)] {
                if !t.is_numeric() {
                    errs.push(Diagnostic::at(
                        format!("{}.{}[{side}]", f.path, op.as_str()),
                        format!("`{name}` is {t}: `{}` combines numbers", op.as_str()),
                    ));
                    return false;
                }
            }
            let out = match op {
                DerivedOp::Ratio => DataType::Float64,
                DerivedOp::Difference if l.is_integer() && r.is_integer() => DataType::Int64,
                DerivedOp::Difference => DataType::Float64,
            };
            check_fill(
                f.fill.as_ref(),
                &out,
                &format!("{}.fill", f.path),
                &mut errs,
            );
            types.insert(f.name.clone(), transformed_type(f, out));
            false
        });
    }

    if let Some(label) = &pipeline.label {
        if let Some(schema) = schema_of(&label.source) {
            check_condition(
                &ctx,
                &label.ended,
                &label.source,
                &schema,
                "label.ended",
                &mut errs,
            );
            if let Some(r) = &label.resumed {
                check_condition(&ctx, r, &label.source, &schema, "label.resumed", &mut errs);
            }
        }
    }
    (errs, types)
}

fn transformed_type(f: &daymark_spec::Feature, out: DataType) -> DataType {
    match &f.transform {
        Some(t) if t.bucket.is_some() => DataType::Int64,
        Some(t) if t.log1p || t.clip.is_some() => DataType::Float64,
        _ => out,
    }
}

fn check_condition(
    ctx: &SessionContext,
    sql: &str,
    source: &str,
    schema: &SchemaRef,
    path: &str,
    errs: &mut Vec<Diagnostic>,
) {
    match check_expr(ctx, sql, source, schema) {
        Ok((_, DataType::Boolean | DataType::Null)) => {}
        Ok((_, t)) => errs.push(Diagnostic::at(
            path,
            format!("a condition must be true or false, but `{sql}` is {t}"),
        )),
        Err(m) => errs.push(Diagnostic::at(path, m)),
    }
}

fn check_fill(fill: Option<&FillValue>, out: &DataType, path: &str, errs: &mut Vec<Diagnostic>) {
    let ok = match fill {
        None | Some(FillValue::Null) => true,
        Some(FillValue::Int(_)) | Some(FillValue::Float(_)) => out.is_numeric(),
        Some(FillValue::Bool(_)) => matches!(out, DataType::Boolean),
        Some(FillValue::Text(_)) => is_textual(out),
    };
    if !ok {
        errs.push(Diagnostic::at(
            path,
            format!("the fill does not fit the feature's type ({out})"),
        ));
    }
}
