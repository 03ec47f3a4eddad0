//! Tile folders the pipeline no longer reads (`daymark tidy`).
//!
//! A tile folder's name is the hash of every definition its tiles serve, so a changed
//! feature, filter or source gives the tiles a new folder and the next build fills it; the
//! old folder is never read again but stays in the output store until removed. A week or
//! month roll-up folder is named the same way. This module tells the folders the current
//! pipeline reads from the others and removes the others on request. Nothing here runs on
//! its own: a definition put back as it was would otherwise find its tiles gone and have
//! to rebuild them.

use crate::build::{child, BuildError};
use crate::rollups::Level;
use chrono::{DateTime, Utc};
use daymark_spec::Pipeline;
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::ObjectStoreExt;
use daymark_store::Location;
use futures::TryStreamExt;
use std::collections::BTreeSet;

/// A folder under `<output>/tiles/` that the pipeline does not read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct UnusedFolder {
    /// Its path inside the output, such as `tiles/plays/0123456789abcdef`.
    pub path: String,
    /// The source folder it is in (`tiles/<source>/`).
    pub source: String,
    /// Files in it.
    pub files: u64,
    /// Their total size.
    pub bytes: u64,
    /// When its newest file was written.
    pub last_written: Option<DateTime<Utc>>,
}

/// The folders under `<output>/tiles/` that `pipeline` reads, as paths inside the output
/// (`tiles/<source>/<folder>`): each source's day tiles, distinct-value tiles and their
/// week, month and history roll-ups.
pub fn folders_in_use(pipeline: &Pipeline, out: &Location) -> BTreeSet<String> {
    let mut used = BTreeSet::new();
    let mut add = |p: StorePath| {
        used.insert(relative(out, &p));
    };
    for layout in crate::tiles::layouts(pipeline).values() {
        add(layout.dir(out));
        for (i, _, _) in &layout.distinct {
            add(layout.distinct_dir(out, *i));
        }
        add(crate::rollups::dir(layout, pipeline, out, Level::History));
        for level in [Level::Week, Level::Month] {
            add(crate::rollups::dir(layout, pipeline, out, level));
            for (i, _, _) in &layout.distinct {
                add(crate::rollups::distinct_dir(layout, out, *i, level));
            }
        }
    }
    used
}

/// The tile folders of `out` that `pipeline` does not read (see [`folders_in_use`]),
/// with what they hold, in path order. A source folder the pipeline has no tiles of is
/// listed by its folders.
pub async fn unused_folders(
    pipeline: &Pipeline,
    out: &Location,
) -> Result<Vec<UnusedFolder>, BuildError> {
    let used = folders_in_use(pipeline, out);
    let tiles = child(&out.prefix, &["tiles"]);
    let mut unused = Vec::new();
    for source_dir in subfolders(out, &tiles).await? {
        let source = source_dir.filename().unwrap_or_default().to_string();
        for folder in subfolders(out, &source_dir).await? {
            let path = relative(out, &folder);
            if used.contains(&path) {
                continue;
            }
            let (mut files, mut bytes, mut last_written) = (0u64, 0u64, None);
            let mut listing = out.store.list(Some(&folder));
            while let Some(meta) = listing.try_next().await.map_err(|e| store(&folder, e))? {
                files += 1;
                bytes += meta.size;
                last_written = last_written.max(Some(meta.last_modified));
            }
            unused.push(UnusedFolder {
                path,
                source: source.clone(),
                files,
                bytes,
                last_written,
            });
        }
    }
    unused.sort_by(|a, b| a.path.cmp(&b.path));
    Ok(unused)
}

/// Removes `folder` (a path inside `out`, as [`unused_folders`] gives it) with everything in
/// it; returns the files removed. Call it only with the output lock held: a build writing
/// into the folder at the same time would lose its files.
pub async fn remove_folder(out: &Location, folder: &UnusedFolder) -> Result<u64, BuildError> {
    let rel: Vec<&str> = folder.path.split('/').filter(|p| !p.is_empty()).collect();
    if rel.len() != 3 || rel[0] != "tiles" || rel.iter().any(|p| *p == "." || *p == "..") {
        return Err(BuildError::Store {
            path: folder.path.clone(),
            reason: "not a tile folder (tiles/<source>/<folder>)".into(),
        });
    }
    let dir = child(&out.prefix, &rel);
    if let Some(local) = &out.local_dir {
        // Through the file system: the local store leaves empty folders behind, and hides
        // its own half-written temporary files from listings.
        let path = rel.iter().fold(local.clone(), |p, part| p.join(part));
        let files = count_files(&path);
        match std::fs::remove_dir_all(&path) {
            Ok(()) => {}
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(0),
            Err(e) => {
                return Err(BuildError::Store {
                    path: path.display().to_string(),
                    reason: e.to_string(),
                })
            }
        }
        // The source folder goes too once it is empty.
        if let Some(parent) = path.parent() {
            let _ = std::fs::remove_dir(parent);
        }
        return Ok(files);
    }
    let mut removed = 0;
    let metas: Vec<_> = out
        .store
        .list(Some(&dir))
        .try_collect()
        .await
        .map_err(|e| store(&dir, e))?;
    for meta in metas {
        out.store
            .delete(&meta.location)
            .await
            .map_err(|e| store(&meta.location, e))?;
        removed += 1;
    }
    Ok(removed)
}

/// The folders directly inside `dir` (none when it does not exist).
async fn subfolders(out: &Location, dir: &StorePath) -> Result<Vec<StorePath>, BuildError> {
    match out.store.list_with_delimiter(Some(dir)).await {
        Ok(l) => Ok(l.common_prefixes),
        Err(daymark_store::object_store::Error::NotFound { .. }) => Ok(Vec::new()),
        Err(e) => Err(store(dir, e)),
    }
}

/// `path` relative to the output's prefix.
fn relative(out: &Location, path: &StorePath) -> String {
    let (p, base) = (path.as_ref(), out.prefix.as_ref());
    if base.is_empty() {
        return p.to_string();
    }
    p.strip_prefix(base)
        .map(|r| r.trim_start_matches('/'))
        .unwrap_or(p)
        .to_string()
}

fn store(path: &StorePath, e: daymark_store::object_store::Error) -> BuildError {
    BuildError::Store {
        path: path.to_string(),
        reason: e.to_string(),
    }
}

/// Files under a local folder, at any depth.
fn count_files(dir: &std::path::Path) -> u64 {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return 0;
    };
    entries
        .flatten()
        .map(|e| match e.file_type() {
            Ok(t) if t.is_dir() => count_files(&e.path()),
            Ok(_) => 1,
            Err(_) => 0,
        })
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pipeline(features: &str) -> Pipeline {
        let text = format!(
            "daymark: 1\nname: t\ntimezone: UTC\nkey: k\noutput: out\nsources:\n  s: {{ location: s, event_time: t, dedupe_on: [id] }}\n  u: {{ location: u, event_time: t }}\npopulation:\n  recent_activity: {{ source: s, within: 30d }}\nfeatures:\n{features}"
        );
        daymark_spec::load_str(&text, None).unwrap()
    }

    #[tokio::test]
    async fn only_folders_the_pipeline_does_not_read_are_listed_and_removed() {
        let dir = tempfile::tempdir().unwrap();
        let out = daymark_store::resolve(dir.path().to_str().unwrap(), None).unwrap();
        let old = pipeline("  - { name: n, source: s, agg: count, windows: [7d] }\n  - { name: d, source: s, agg: count_distinct, expr: v, windows: [7d] }\n");
        let new = pipeline("  - { name: n, source: s, agg: count, windows: [7d, 28d] }\n");
        let old_used = folders_in_use(&old, &out);
        let new_used = folders_in_use(&new, &out);
        // Day tiles, one distinct-value tile, week and month roll-ups of each, and the
        // history roll-ups of the day tiles.
        assert_eq!(old_used.len(), 7, "{old_used:?}");
        assert_eq!(new_used.len(), 4, "{new_used:?}");
        let layout = &crate::tiles::layouts(&new)["s"];
        assert!(new_used.contains(&relative(&out, &layout.dir(&out))));
        assert!(old_used.is_disjoint(&new_used));
        // Files of both pipelines' folders, plus a source the new one does not read.
        let write = |rel: &str, bytes: usize| {
            let p = dir.path().join(rel);
            std::fs::create_dir_all(p.parent().unwrap()).unwrap();
            std::fs::write(p, vec![b'x'; bytes]).unwrap();
        };
        for f in old_used.iter().chain(&new_used) {
            write(&format!("{f}/dt=2026-01-01/part-0.parquet"), 10);
            write(&format!("{f}/dt=2026-01-02/part-0.parquet"), 5);
        }
        write("tiles/gone/abc/dt=2026-01-01/part-0.parquet", 7);
        let unused = unused_folders(&new, &out).await.unwrap();
        let paths: Vec<&str> = unused.iter().map(|u| u.path.as_str()).collect();
        let mut expected: Vec<String> = old_used.iter().cloned().collect();
        expected.push("tiles/gone/abc".into());
        expected.sort();
        assert_eq!(paths, expected);
        // `tiles/gone/` sorts first.
        assert_eq!(
            (unused[0].source.as_str(), unused[0].files, unused[0].bytes),
            ("gone", 1, 7)
        );
        assert!(unused[1..]
            .iter()
            .all(|u| u.source == "s" && u.files == 2 && u.bytes == 15));
        for u in &unused {
            assert_eq!(remove_folder(&out, u).await.unwrap(), u.files);
        }
        assert!(unused_folders(&new, &out).await.unwrap().is_empty());
        assert!(!dir.path().join("tiles/gone").exists());
        for f in &new_used {
            assert!(dir
                .path()
                .join(f)
                .join("dt=2026-01-02/part-0.parquet")
                .exists());
        }
        // Only tile folders can be removed.
        let outside = UnusedFolder {
            path: "snapshots/dt=2026-01-01".into(),
            source: String::new(),
            files: 0,
            bytes: 0,
            last_written: None,
        };
        assert!(remove_folder(&out, &outside).await.is_err());
    }
}
