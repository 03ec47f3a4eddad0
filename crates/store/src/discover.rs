//! Finding a source's day partitions and reading what the Parquet footers say.

use crate::location::Location;
use arrow::datatypes::SchemaRef;
use chrono::{DateTime, NaiveDate, Utc};
use futures::{StreamExt, TryStreamExt};
use object_store::path::Path as StorePath;
use object_store::ObjectStoreExt;
use parquet::arrow::parquet_to_arrow_schema;
use parquet::file::metadata::{FooterTail, ParquetMetaDataReader};
use std::collections::BTreeMap;
use std::sync::Arc;

/// Errors reading a source.
#[derive(Debug, thiserror::Error)]
pub enum DiscoverError {
    /// Listing the store failed.
    #[error("cannot list {location}: {source}")]
    List {
        /// Where.
        location: String,
        /// Why.
        source: object_store::Error,
    },
    /// A Parquet file could not be read.
    #[error("{file} is not a readable Parquet file: {reason}")]
    Unreadable {
        /// The file.
        file: String,
        /// Why.
        reason: String,
    },
    /// Files disagree on the schema.
    #[error("{first} and {second} have different schemas: {difference}")]
    SchemaMismatch {
        /// A file with the first schema seen.
        first: String,
        /// A file whose schema differs.
        second: String,
        /// The columns that differ.
        difference: String,
    },
}

/// One data file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DataFile {
    /// Path in the store.
    pub path: StorePath,
    /// Size in bytes.
    pub size: u64,
    /// Last modification time.
    pub modified: DateTime<Utc>,
    /// Entity tag, where the store gives one.
    pub etag: Option<String>,
}

/// The files of a source, by day partition.
#[derive(Debug, Clone, Default)]
pub struct Listing {
    /// Day partitions and their Parquet files, in date order.
    pub days: BTreeMap<NaiveDate, Vec<DataFile>>,
    /// Files and folders that do not fit `<day_partition>=YYYY-MM-DD/` (reported, not read).
    pub ignored: Vec<String>,
    /// Marker files (names starting with `_`) by day, such as completeness markers.
    pub markers: BTreeMap<NaiveDate, Vec<String>>,
}

impl Listing {
    /// All data files, in date then path order.
    pub fn files(&self) -> impl Iterator<Item = &DataFile> {
        self.days.values().flatten()
    }

    /// Total bytes of all data files.
    pub fn bytes(&self) -> u64 {
        self.files().map(|f| f.size).sum()
    }
}

/// Lists the day partitions of a source at `loc`.
pub async fn list_days(loc: &Location, day_partition: &str) -> Result<Listing, DiscoverError> {
    let listed = match &loc.local_dir {
        // A local folder: the same entries as the store's listing, with a third of the
        // file system calls (see `local_listing.rs`). The folder is the prefix's, under
        // the local store's root `/` (a location derived from another keeps its
        // `local_dir` only as a sign of the store).
        Some(_) => {
            let prefix = loc.prefix.clone();
            tokio::task::spawn_blocking(move || crate::local_listing::list_local(&prefix))
                .await
                .unwrap_or_else(|e| {
                    Err(object_store::Error::Generic {
                        store: "LocalFileSystem",
                        source: Box::new(e),
                    })
                })
        }
        None => loc.store.list(Some(&loc.prefix)).try_collect().await,
    };
    let metas: Vec<object_store::ObjectMeta> = listed.map_err(|e| DiscoverError::List {
        location: loc.display(),
        source: e,
    })?;
    let mut listing = Listing::default();
    let prefix_parts = loc.prefix.parts().count();
    let wanted = format!("{day_partition}=");
    for m in metas {
        let parts: Vec<String> = m
            .location
            .parts()
            .skip(prefix_parts)
            .map(|p| p.as_ref().to_string())
            .collect();
        let name = parts.last().cloned().unwrap_or_default();
        if parts.len() == 1
            && (name.starts_with('_') || name.starts_with('.') || name.ends_with(".json"))
        {
            continue; // files about the log itself, beside the partitions
        }
        let day = parts
            .first()
            .and_then(|p| p.strip_prefix(&wanted))
            .and_then(|d| NaiveDate::parse_from_str(d, "%Y-%m-%d").ok());
        let Some(day) = day.filter(|_| parts.len() == 2) else {
            listing.ignored.push(m.location.to_string());
            continue;
        };
        if name.starts_with('_') || name.starts_with('.') {
            listing.markers.entry(day).or_default().push(name);
            continue;
        }
        if !name.ends_with(".parquet") {
            listing.ignored.push(m.location.to_string());
            continue;
        }
        listing.days.entry(day).or_default().push(DataFile {
            path: m.location,
            size: m.size,
            modified: m.last_modified,
            etag: m.e_tag,
        });
    }
    for files in listing.days.values_mut() {
        files.sort_by(|a, b| a.path.cmp(&b.path));
    }
    Ok(listing)
}

/// What the footer of one Parquet file says.
#[derive(Debug, Clone)]
pub struct Footer {
    /// Arrow schema of the file.
    pub schema: SchemaRef,
    /// Rows in the file.
    pub rows: u64,
}

/// Reads the footer of `file` (one ranged read for most files, two for large footers).
pub async fn read_footer(loc: &Location, file: &DataFile) -> Result<Footer, DiscoverError> {
    let unreadable = |reason: String| DiscoverError::Unreadable {
        file: file.path.to_string(),
        reason,
    };
    if file.size < 12 {
        return Err(unreadable(format!("it is only {} bytes long", file.size)));
    }
    let tail_len = file.size.min(64 * 1024);
    let tail = loc
        .store
        .get_range(&file.path, (file.size - tail_len)..file.size)
        .await
        .map_err(|e| unreadable(e.to_string()))?;
    let last8: [u8; 8] = tail[tail.len() - 8..].try_into().expect("8 bytes");
    let footer = FooterTail::try_new(&last8).map_err(|e| unreadable(e.to_string()))?;
    let meta_len = footer.metadata_length() as u64;
    if meta_len + 8 > file.size {
        return Err(unreadable("its footer is longer than the file".into()));
    }
    let meta = if meta_len + 8 <= tail_len {
        let start = (tail_len - 8 - meta_len) as usize;
        ParquetMetaDataReader::decode_metadata(&tail[start..tail.len() - 8])
    } else {
        let bytes = loc
            .store
            .get_range(&file.path, (file.size - 8 - meta_len)..(file.size - 8))
            .await
            .map_err(|e| unreadable(e.to_string()))?;
        ParquetMetaDataReader::decode_metadata(&bytes)
    }
    .map_err(|e| unreadable(e.to_string()))?;
    let fm = meta.file_metadata();
    let schema = parquet_to_arrow_schema(fm.schema_descr(), fm.key_value_metadata())
        .map_err(|e| unreadable(e.to_string()))?;
    Ok(Footer {
        schema: Arc::new(schema),
        rows: fm.num_rows().max(0) as u64,
    })
}

/// A source's shape: its schema (agreed by all files) and row count from the footers.
#[derive(Debug)]
pub struct SourceShape {
    /// The common schema (the first file's when files disagree).
    pub schema: Option<SchemaRef>,
    /// Rows over all readable files.
    pub rows: u64,
    /// Problems: unreadable files, disagreeing schemas.
    pub problems: Vec<DiscoverError>,
}

/// Reads every footer of `listing` (a few at a time) and checks that the schemas agree.
pub async fn read_shape(loc: &Location, listing: &Listing) -> SourceShape {
    let files: Vec<&DataFile> = listing.files().collect();
    let footers = read_footers(loc, &files).await;
    let mut shape = SourceShape {
        schema: None,
        rows: 0,
        problems: Vec::new(),
    };
    let mut first_file = String::new();
    fold_footers(&mut shape, &mut first_file, &files, footers);
    shape
}

/// Reads the footers of `files`, 16 at a time, returned in the files' order.
pub(crate) async fn read_footers(
    loc: &Location,
    files: &[&DataFile],
) -> Vec<Result<Footer, DiscoverError>> {
    futures::stream::iter(files.iter())
        .map(|f| read_footer(loc, f))
        .buffered(16)
        .collect()
        .await
}

/// Adds `footers` (of `files`) to `shape`: their rows, and their schemas checked against
/// the shape's (the first one seen becomes the shape's when it has none; `first_file`
/// names the file it came from). Returns the files whose footers were read and whose
/// schema agreed, with their rows.
pub(crate) fn fold_footers(
    shape: &mut SourceShape,
    first_file: &mut String,
    files: &[&DataFile],
    footers: Vec<Result<Footer, DiscoverError>>,
) -> Vec<(usize, u64)> {
    let mut agreed = Vec::new();
    for (i, r) in footers.into_iter().enumerate() {
        match r {
            Ok(footer) => {
                shape.rows += footer.rows;
                match &shape.schema {
                    None => {
                        shape.schema = Some(footer.schema.clone());
                        *first_file = files[i].path.to_string();
                        agreed.push((i, footer.rows));
                    }
                    Some(s) => match schema_difference(s, &footer.schema) {
                        Some(difference) => shape.problems.push(DiscoverError::SchemaMismatch {
                            first: first_file.clone(),
                            second: files[i].path.to_string(),
                            difference,
                        }),
                        None => agreed.push((i, footer.rows)),
                    },
                }
            }
            Err(e) => shape.problems.push(e),
        }
    }
    agreed
}

/// Describes how two schemas differ, ignoring nullability and field metadata.
pub fn schema_difference(a: &SchemaRef, b: &SchemaRef) -> Option<String> {
    let mut out = Vec::new();
    for f in a.fields() {
        match b.field_with_name(f.name()) {
            Ok(g) if g.data_type() == f.data_type() => {}
            Ok(g) => out.push(format!(
                "`{}` is {} in one and {} in the other",
                f.name(),
                f.data_type(),
                g.data_type()
            )),
            Err(_) => out.push(format!("`{}` is missing from the second", f.name())),
        }
    }
    for g in b.fields() {
        if a.field_with_name(g.name()).is_err() {
            out.push(format!("`{}` is only in the second", g.name()));
        }
    }
    if out.is_empty() {
        None
    } else {
        Some(out.join("; "))
    }
}
