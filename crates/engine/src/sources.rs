//! Opening a pipeline's sources: locations, day partitions, footers, and DataFusion tables.

use arrow::datatypes::{DataType, SchemaRef};
use chrono::NaiveDate;
use datafusion::datasource::file_format::parquet::ParquetFormat;
use datafusion::datasource::listing::{
    ListingOptions, ListingTable, ListingTableConfig, ListingTableUrl,
};
use datafusion::prelude::SessionContext;
use daymark_spec::{Diagnostic, Pipeline};
use daymark_store::{
    list_days, read_shape, read_shape_cached, resolve, FooterCache, FooterReads, Listing, Location,
};
use std::collections::{BTreeMap, HashMap};
use std::sync::Arc;

/// What was found for one source.
#[derive(Debug)]
pub struct SourceReport {
    /// Source name.
    pub name: String,
    /// Resolved location (None when it could not be resolved).
    pub location: Option<Location>,
    /// Day partitions and files.
    pub listing: Listing,
    /// Schema agreed by the files.
    pub schema: Option<SchemaRef>,
    /// Rows according to the Parquet footers.
    pub rows: u64,
    /// Problems found reading the source.
    pub problems: Vec<Diagnostic>,
    /// Parquet footers read from files and taken from the footer cache.
    pub footer_reads: FooterReads,
}

impl SourceReport {
    /// First and last day partition.
    pub fn range(&self) -> Option<(NaiveDate, NaiveDate)> {
        let days = || self.listing.days.keys().chain(self.listing.markers.keys());
        Some((*days().min()?, *days().max()?))
    }

    /// Whether day `d` has files or a marker (a quiet day with no rows is not missing).
    pub fn has_day(&self, d: NaiveDate) -> bool {
        self.listing.days.contains_key(&d) || self.listing.markers.contains_key(&d)
    }

    /// Days missing between `from` and `to` (inclusive; default: the first and last
    /// partition found).
    pub fn gaps(&self, from: Option<NaiveDate>, to: Option<NaiveDate>) -> Vec<NaiveDate> {
        let Some((a, b)) = self.range() else {
            return vec![];
        };
        let (a, b) = (from.unwrap_or(a).max(a), to.unwrap_or(b));
        a.iter_days()
            .take_while(|d| *d <= b)
            .filter(|d| !self.has_day(*d))
            .collect()
    }
}

/// Resolves, lists and reads the footers of every source of `pipeline`.
pub async fn inspect_sources(pipeline: &Pipeline) -> BTreeMap<String, SourceReport> {
    inspect_sources_with(pipeline, None).await
}

/// Folder of the output store that holds the footer caches, one JSON file per source.
pub const FOOTER_CACHE_DIR: &str = "_footers";

/// Like [`inspect_sources`]; with `cache` (the pipeline's output store), footers of files
/// unchanged since an earlier run come from `_footers/<source>.json` there, and new ones
/// are added to it (see [`daymark_store::footer_cache`]). Runs use it so that a daily
/// build does not read the footer of every file of the history.
pub async fn inspect_sources_with(
    pipeline: &Pipeline,
    cache: Option<&Location>,
) -> BTreeMap<String, SourceReport> {
    // Sources side by side: listing a local folder runs on a blocking thread, so two
    // sources list on two cores.
    let each = pipeline.sources.iter().map(|(name, src)| async move {
        let path = format!("sources.{name}.location");
        let mut report = SourceReport {
            name: name.clone(),
            location: None,
            listing: Listing::default(),
            schema: None,
            rows: 0,
            problems: Vec::new(),
            footer_reads: FooterReads::default(),
        };
        match resolve(&src.spec.location, pipeline.base_dir.as_deref()) {
            Err(e) => report.problems.push(Diagnostic::at(path, e.to_string())),
            Ok(loc) => {
                match list_days(&loc, &src.spec.day_partition).await {
                    Err(e) => report
                        .problems
                        .push(Diagnostic::at(path.clone(), e.to_string())),
                    Ok(listing) => {
                        if listing.days.is_empty() {
                            report.problems.push(Diagnostic::at(
                                path.clone(),
                                format!(
                                    "no `{}=YYYY-MM-DD/` partition with Parquet files was found in {}",
                                    src.spec.day_partition,
                                    loc.display()
                                ),
                            ));
                        }
                        let shape = match cache {
                            Some(at) => {
                                let cache = FooterCache {
                                    at: at.clone(),
                                    path: crate::build::child(
                                        &at.prefix,
                                        &[FOOTER_CACHE_DIR, &format!("{name}.json")],
                                    ),
                                };
                                let (shape, reads) =
                                    read_shape_cached(&loc, &listing, &cache).await;
                                report.footer_reads = reads;
                                shape
                            }
                            None => {
                                let shape = read_shape(&loc, &listing).await;
                                report.footer_reads.read = listing.files().count();
                                shape
                            }
                        };
                        report.schema = shape.schema;
                        report.rows = shape.rows;
                        for p in shape.problems {
                            report
                                .problems
                                .push(Diagnostic::at(format!("sources.{name}"), p.to_string()));
                        }
                        report.listing = listing;
                    }
                }
                report.location = Some(loc);
            }
        }
        (name.clone(), report)
    });
    futures::future::join_all(each).await.into_iter().collect()
}

/// The schemas found, for [`crate::check::check_against_schemas`].
pub fn schemas_of(reports: &BTreeMap<String, SourceReport>) -> HashMap<String, Option<SchemaRef>> {
    reports
        .iter()
        .map(|(k, r)| (k.clone(), r.schema.clone()))
        .collect()
}

/// Registers each source as a table named after it, with its day partition column (a
/// string `YYYY-MM-DD`), so the SQL of [`crate::sql`] can run.
pub async fn register_sources(
    ctx: &SessionContext,
    pipeline: &Pipeline,
    reports: &BTreeMap<String, SourceReport>,
) -> datafusion::error::Result<()> {
    for (name, r) in reports {
        let (Some(loc), Some(schema)) = (&r.location, &r.schema) else {
            continue;
        };
        let src = &pipeline.sources[name];
        let url = ListingTableUrl::parse(loc.url())?;
        ctx.register_object_store(&loc.root_url, loc.store.clone());
        let options = ListingOptions::new(Arc::new(
            ParquetFormat::default().with_force_view_types(false),
        ))
        .with_file_extension(".parquet")
        .with_table_partition_cols(vec![(src.spec.day_partition.clone(), DataType::Utf8)]);
        let config = ListingTableConfig::new(url)
            .with_listing_options(options)
            .with_schema(schema.clone());
        let table = ListingTable::try_new(config)?;
        ctx.register_table(name.as_str(), Arc::new(table))?;
    }
    Ok(())
}
