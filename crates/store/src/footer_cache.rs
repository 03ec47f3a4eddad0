//! Remembering what the Parquet footers of a source said, so that a daily run reads the
//! footers of new files only (reading all of them grows with the length of the history:
//! about 0.6 s for the 10,981 files of the 10M-event benchmark world).
//!
//! The cache is a small JSON file kept in the output store. A file's entry is used only
//! while its path, size, modification time and entity tag (where the store gives one) are
//! the same as when its footer was read; anything else is read again. Only files whose
//! schema agreed with the source's are remembered, so an unreadable or disagreeing file
//! is reported on every run until it is fixed. The cached files' schema is not stored:
//! it is read again from one of them (one ranged read), so the cache never holds a schema
//! that no file has.

use crate::discover::{fold_footers, read_footer, read_footers};
use crate::discover::{DataFile, Listing, SourceShape};
use crate::location::Location;
use object_store::path::Path as StorePath;
use object_store::{ObjectStoreExt, PutPayload};
use serde::{Deserialize, Serialize};
use std::collections::HashMap;

/// Format version of the cache file; a file of another version is ignored.
const VERSION: u32 = 1;

/// Where a source's footer cache lives and which source it belongs to.
#[derive(Debug, Clone)]
pub struct FooterCache {
    /// The store holding the cache file (the pipeline's output store).
    pub at: Location,
    /// The cache file's path in that store.
    pub path: StorePath,
}

#[derive(Debug, Serialize, Deserialize)]
struct CacheFile {
    version: u32,
    /// The source location the entries belong to (a cache of another location is ignored).
    source: String,
    files: Vec<CachedFooter>,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
struct CachedFooter {
    path: String,
    size: u64,
    /// Modification time, microseconds since the Unix epoch.
    modified_us: i64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    etag: Option<String>,
    rows: u64,
}

impl CachedFooter {
    fn of(file: &DataFile, rows: u64) -> Self {
        CachedFooter {
            path: file.path.to_string(),
            size: file.size,
            modified_us: file.modified.timestamp_micros(),
            etag: file.etag.clone(),
            rows,
        }
    }

    fn matches(&self, file: &DataFile) -> bool {
        self.size == file.size
            && self.modified_us == file.modified.timestamp_micros()
            && (self.etag.is_none() || file.etag.is_none() || self.etag == file.etag)
    }
}

/// What a cached read did, for the run summary and for tests.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct FooterReads {
    /// Footers read from the files.
    pub read: usize,
    /// Footers taken from the cache.
    pub cached: usize,
}

impl FooterReads {
    /// Adds `other`'s counts (of another source).
    pub fn add(&mut self, other: &FooterReads) {
        self.read += other.read;
        self.cached += other.cached;
    }
}

/// Like [`crate::read_shape`], but takes the footers of unchanged files from `cache` and
/// remembers the new ones there. Problems reading or writing the cache itself are not
/// errors: the footers are then read from the files, as without a cache.
pub async fn read_shape_cached(
    loc: &Location,
    listing: &Listing,
    cache: &FooterCache,
) -> (SourceShape, FooterReads) {
    let source = loc.display();
    let known: HashMap<String, CachedFooter> = match load(cache).await {
        Some(c) if c.version == VERSION && c.source == source => {
            c.files.into_iter().map(|f| (f.path.clone(), f)).collect()
        }
        _ => HashMap::new(),
    };
    let mut hits: Vec<(&DataFile, u64)> = Vec::new();
    let mut misses: Vec<&DataFile> = Vec::new();
    for f in listing.files() {
        match known.get(f.path.as_ref()) {
            Some(c) if c.matches(f) => hits.push((f, c.rows)),
            _ => misses.push(f),
        }
    }
    let mut shape = SourceShape {
        schema: None,
        rows: 0,
        problems: Vec::new(),
    };
    let mut first_file = String::new();
    // The cached files' schema, from the first of them (one ranged read). When that
    // fails, every footer is read as without a cache.
    let mut witness_read = 0;
    if let Some((f, _)) = hits.first() {
        witness_read = 1;
        match read_footer(loc, f).await {
            Ok(footer) => {
                shape.schema = Some(footer.schema);
                shape.rows = hits.iter().map(|(_, rows)| rows).sum();
                first_file = f.path.to_string();
            }
            Err(_) => {
                misses = listing.files().collect();
                hits.clear();
            }
        }
    }
    let footers = read_footers(loc, &misses).await;
    let agreed = fold_footers(&mut shape, &mut first_file, &misses, footers);
    let reads = FooterReads {
        read: misses.len() + witness_read,
        cached: hits.len(),
    };
    // Rewrite the cache when files came or went (entries of vanished files are dropped).
    if !agreed.is_empty() || known.len() != hits.len() {
        let entries = hits
            .iter()
            .map(|(f, rows)| CachedFooter::of(f, *rows))
            .chain(
                agreed
                    .iter()
                    .map(|(i, rows)| CachedFooter::of(misses[*i], *rows)),
            )
            .collect();
        store(cache, &source, entries).await;
    }
    (shape, reads)
}

async fn load(cache: &FooterCache) -> Option<CacheFile> {
    let bytes = cache
        .at
        .store
        .get(&cache.path)
        .await
        .ok()?
        .bytes()
        .await
        .ok()?;
    serde_json::from_slice(&bytes).ok()
}

async fn store(cache: &FooterCache, source: &str, files: Vec<CachedFooter>) {
    let file = CacheFile {
        version: VERSION,
        source: source.to_string(),
        files,
    };
    let Ok(bytes) = serde_json::to_vec(&file) else {
        return;
    };
    // A put is atomic in the stores daymark uses (the local store writes a temporary
    // file and renames it), so a reader never sees half a cache; a failed write only
    // means the next run reads those footers again.
    let _ = cache
        .at
        .store
        .put(&cache.path, PutPayload::from(bytes))
        .await;
}
