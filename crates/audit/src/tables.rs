//! Published snapshots, labels and staged files as DataFusion tables, and small readers.

use crate::{engine, AuditError};
use arrow::array::{Array, AsArray, RecordBatch};
use arrow::datatypes::{DataType, Float64Type, Int64Type};
use chrono::NaiveDate;
use datafusion::datasource::file_format::parquet::ParquetFormat;
use datafusion::datasource::listing::{
    ListingOptions, ListingTable, ListingTableConfig, ListingTableUrl,
};
use datafusion::prelude::SessionContext;
use daymark_engine::build::child;
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::Location;
use std::collections::BTreeMap;
use std::sync::Arc;

/// Where labels are published: `labels/dt=D/part-0.parquet` (written by the label stage).
pub const LABELS_DIR: &str = "labels";

/// `out` moved to the sub-folder `dir`.
pub fn sub(out: &Location, dir: &str) -> Location {
    Location {
        prefix: child(&out.prefix, &[dir]),
        original: format!("{}/{dir}", out.original.trim_end_matches('/')),
        local_dir: out.local_dir.as_ref().map(|d| d.join(dir)),
        ..out.clone()
    }
}

/// Days published under `<out>/<dir>/dt=D/`, each with its files.
pub async fn published_days(
    out: &Location,
    dir: &str,
) -> Result<BTreeMap<NaiveDate, Vec<daymark_store::DataFile>>, AuditError> {
    let loc = sub(out, dir);
    match daymark_store::list_days(&loc, "dt").await {
        Ok(l) => Ok(l.days.into_iter().filter(|(_, f)| !f.is_empty()).collect()),
        Err(e) => Err(AuditError::Store {
            path: loc.display(),
            reason: e.to_string(),
        }),
    }
}

/// Registers `<out>/<dir>/` (Hive-partitioned by `dt`, a string) as `table`. Returns false
/// (and registers nothing) when no day is published there.
pub async fn register_dir(
    ctx: &SessionContext,
    out: &Location,
    dir: &str,
    table: &str,
) -> Result<bool, AuditError> {
    let days = published_days(out, dir).await?;
    if days.is_empty() {
        return Ok(false);
    }
    ctx.register_object_store(&out.root_url, out.store.clone());
    let loc = sub(out, dir);
    let ctx_err = engine(format!("reading {}", loc.display()));
    let url = match ListingTableUrl::parse(loc.url()) {
        Ok(u) => u,
        Err(e) => return Err(ctx_err(e)),
    };
    let options = ListingOptions::new(Arc::new(ParquetFormat::default()))
        .with_file_extension(".parquet")
        .with_table_partition_cols(vec![("dt".to_string(), DataType::Utf8)]);
    let state = ctx.state();
    let config = ListingTableConfig::new(url).with_listing_options(options);
    let result = async {
        let config = config.infer_schema(&state).await?;
        let table_ref = ListingTable::try_new(config)?;
        let _ = ctx.deregister_table(table);
        ctx.register_table(table, Arc::new(table_ref))?;
        Ok::<_, datafusion::error::DataFusionError>(())
    }
    .await;
    result.map_err(|e| {
        // Days built before and after a feature changed type cannot be read as one table.
        let hint = if e.to_string().contains("Fail to merge schema") {
            " (published days disagree on a column's type: a feature's definition changed \
             since some of them were built; rebuild the stale days, which `daymark status` \
             lists, with `daymark run`)"
        } else {
            ""
        };
        engine(format!("reading {}{hint}", loc.display()))(e)
    })?;
    Ok(true)
}

/// Registers one Parquet object (any name) as `table`.
pub async fn register_file(
    ctx: &SessionContext,
    out: &Location,
    path: &StorePath,
    table: &str,
) -> Result<(), AuditError> {
    ctx.register_object_store(&out.root_url, out.store.clone());
    let mut url = out.root_url.to_string();
    if !url.ends_with('/') {
        url.push('/');
    }
    url.push_str(path.as_ref());
    let _ = ctx.deregister_table(table);
    ctx.register_parquet(
        table,
        &url,
        datafusion::prelude::ParquetReadOptions::default().file_extension(""),
    )
    .await
    .map_err(engine(format!("reading {path}")))
}

/// Runs `sql` and collects its batches.
pub async fn collect(
    ctx: &SessionContext,
    sql: &str,
    what: &str,
) -> Result<Vec<RecordBatch>, AuditError> {
    let df = ctx.sql(sql).await.map_err(engine(what))?;
    df.collect().await.map_err(engine(what))
}

/// The first row of a one-row result as numbers (`None` for null or non-numeric values).
pub fn first_row(batches: &[RecordBatch]) -> Vec<Option<f64>> {
    let Some(b) = batches.iter().find(|b| b.num_rows() > 0) else {
        return Vec::new();
    };
    b.columns().iter().map(|c| value_f64(c, 0)).collect()
}

/// One cell as a number.
pub fn value_f64(col: &dyn Array, row: usize) -> Option<f64> {
    if col.is_null(row) {
        return None;
    }
    let cast = arrow::compute::cast(&col.slice(row, 1), &DataType::Float64).ok()?;
    let a = cast.as_primitive::<Float64Type>();
    (!a.is_null(0)).then(|| a.value(0))
}

/// One cell as text (for keys and messages).
pub fn value_text(col: &dyn Array, row: usize) -> Option<String> {
    if col.is_null(row) {
        return None;
    }
    let cast = arrow::compute::cast(&col.slice(row, 1), &DataType::Utf8).ok()?;
    Some(cast.as_string::<i32>().value(0).to_string())
}

/// A single count from `SELECT COUNT(*) ...`.
pub fn count(batches: &[RecordBatch]) -> i64 {
    batches
        .iter()
        .find(|b| b.num_rows() > 0)
        .map(|b| b.column(0).as_primitive::<Int64Type>().value(0))
        .unwrap_or(0)
}

/// Whether a column type is a number (or a boolean, read as 0/1) the statistics cover.
pub fn is_numeric(t: &DataType) -> bool {
    t.is_numeric() || matches!(t, DataType::Boolean)
}

/// The numeric feature columns of a snapshot table, in declared order.
pub async fn numeric_features(
    ctx: &SessionContext,
    table: &str,
    pipeline: &daymark_spec::Pipeline,
) -> Result<Vec<String>, AuditError> {
    let t = ctx
        .table(table)
        .await
        .map_err(engine(format!("reading {table}")))?;
    let schema = t.schema().clone();
    Ok(pipeline
        .features
        .iter()
        .filter(|f| {
            schema
                .field_with_unqualified_name(&f.name)
                .is_ok_and(|c| is_numeric(c.data_type()))
        })
        .map(|f| f.name.clone())
        .collect())
}
