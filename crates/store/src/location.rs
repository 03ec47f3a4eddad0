//! Resolving a location (local path or URL) to an object store and a prefix in it.

use object_store::local::LocalFileSystem;
use object_store::path::Path as StorePath;
use object_store::ObjectStore;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use url::Url;

/// Errors resolving a location.
#[derive(Debug, thiserror::Error)]
pub enum LocationError {
    /// The text is neither a path nor a supported URL.
    #[error("`{location}` is not a usable location: {reason}")]
    Invalid {
        /// As written.
        location: String,
        /// Why.
        reason: String,
    },
    /// The URL scheme needs the `cloud` build feature.
    #[error("`{location}` is in an object store ({scheme}://), and this daymark was built without object-store support: rebuild with `--features cloud`")]
    NeedsCloud {
        /// As written.
        location: String,
        /// The scheme.
        scheme: String,
    },
}

/// A resolved place in an object store.
#[derive(Debug, Clone)]
pub struct Location {
    /// As written in the pipeline file (or on the command line).
    pub original: String,
    /// The store.
    pub store: Arc<dyn ObjectStore>,
    /// The prefix inside the store.
    pub prefix: StorePath,
    /// The URL of the store's root (`file:///`, `s3://bucket/`), for registering the store
    /// with a query engine.
    pub root_url: Url,
    /// The local folder, when the store is the local file system.
    pub local_dir: Option<PathBuf>,
}

impl Location {
    /// The URL of the prefix itself, with a trailing slash.
    pub fn url(&self) -> String {
        let mut u = self.root_url.to_string();
        if !u.ends_with('/') {
            u.push('/');
        }
        let p = self.prefix.as_ref();
        if !p.is_empty() {
            u.push_str(p);
            u.push('/');
        }
        u
    }

    /// Shows the location as a person would write it.
    pub fn display(&self) -> String {
        match &self.local_dir {
            Some(d) => d.display().to_string(),
            None => self.url(),
        }
    }
}

/// Resolves `location`: a local path (relative to `base_dir`), a `file://` URL, or with the
/// `cloud` feature an `s3://`, `gs://` or `az://` URL (credentials from the environment).
pub fn resolve(location: &str, base_dir: Option<&Path>) -> Result<Location, LocationError> {
    let invalid = |reason: &str| LocationError::Invalid {
        location: location.to_string(),
        reason: reason.to_string(),
    };
    let text = location.trim();
    if text.is_empty() {
        return Err(invalid("it is empty"));
    }
    if let Some((scheme, _)) = text.split_once("://") {
        let url = Url::parse(text).map_err(|e| invalid(&e.to_string()))?;
        if scheme == "file" {
            let path = url
                .to_file_path()
                .map_err(|_| invalid("a file:// URL needs an absolute path"))?;
            return local(location, &path);
        }
        return remote(location, scheme, &url);
    }
    let path = Path::new(text);
    let path = match base_dir {
        Some(b) if path.is_relative() => b.join(path),
        _ => path.to_path_buf(),
    };
    local(location, &path)
}

fn local(original: &str, path: &Path) -> Result<Location, LocationError> {
    let abs = if path.is_absolute() {
        path.to_path_buf()
    } else {
        std::env::current_dir()
            .map_err(|e| LocationError::Invalid {
                location: original.to_string(),
                reason: format!("cannot read the current folder: {e}"),
            })?
            .join(path)
    };
    let abs = normalise(&abs);
    let prefix = StorePath::from_absolute_path(&abs).map_err(|e| LocationError::Invalid {
        location: original.to_string(),
        reason: e.to_string(),
    })?;
    Ok(Location {
        original: original.to_string(),
        store: Arc::new(LocalFileSystem::new()),
        prefix,
        root_url: Url::parse("file:///").expect("static URL"),
        local_dir: Some(abs),
    })
}

/// Removes `.` and `..` components without touching the file system (the folder may not
/// exist yet).
fn normalise(p: &Path) -> PathBuf {
    let mut out = PathBuf::new();
    for c in p.components() {
        match c {
            std::path::Component::CurDir => {}
            std::path::Component::ParentDir => {
                out.pop();
            }
            other => out.push(other.as_os_str()),
        }
    }
    out
}

#[cfg(feature = "cloud")]
fn remote(original: &str, _scheme: &str, url: &Url) -> Result<Location, LocationError> {
    let opts: Vec<(String, String)> = std::env::vars()
        .filter(|(k, _)| {
            k.starts_with("AWS_") || k.starts_with("GOOGLE_") || k.starts_with("AZURE_")
        })
        .map(|(k, v)| (k.to_ascii_lowercase(), v))
        .collect();
    let (store, prefix) =
        object_store::parse_url_opts(url, opts).map_err(|e| LocationError::Invalid {
            location: original.to_string(),
            reason: e.to_string(),
        })?;
    let mut root = url.clone();
    root.set_path("/");
    Ok(Location {
        original: original.to_string(),
        store: Arc::from(store),
        prefix,
        root_url: root,
        local_dir: None,
    })
}

#[cfg(not(feature = "cloud"))]
fn remote(original: &str, scheme: &str, _url: &Url) -> Result<Location, LocationError> {
    match scheme {
        "s3" | "s3a" | "gs" | "az" | "azure" | "abfs" | "abfss" => Err(LocationError::NeedsCloud {
            location: original.to_string(),
            scheme: scheme.to_string(),
        }),
        other => Err(LocationError::Invalid {
            location: original.to_string(),
            reason: format!("the scheme `{other}://` is not supported (use a path, file://, s3://, gs:// or az://)"),
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_paths_follow_the_base() {
        let l = resolve("data/plays", Some(Path::new("/srv/pipes"))).unwrap();
        assert_eq!(
            l.local_dir.as_deref(),
            Some(Path::new("/srv/pipes/data/plays"))
        );
        assert_eq!(l.url(), "file:///srv/pipes/data/plays/");
        let l = resolve("../x", Some(Path::new("/srv/pipes"))).unwrap();
        assert_eq!(l.local_dir.as_deref(), Some(Path::new("/srv/x")));
        let l = resolve("file:///tmp/a", None).unwrap();
        assert_eq!(l.local_dir.as_deref(), Some(Path::new("/tmp/a")));
    }

    #[test]
    fn unknown_schemes_are_refused() {
        let e = resolve("ftp://host/x", None).unwrap_err().to_string();
        assert!(e.contains("not supported"), "{e}");
        assert!(resolve("   ", None).is_err());
    }
}
