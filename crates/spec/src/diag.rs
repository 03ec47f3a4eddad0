//! Diagnostics: one problem in a pipeline file, with where it is.

use std::fmt;
use std::path::PathBuf;

/// One problem found in a pipeline file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Diagnostic {
    /// The file, when the pipeline was read from one.
    pub file: Option<PathBuf>,
    /// 1-based line, when known.
    pub line: Option<usize>,
    /// 1-based column, when known.
    pub column: Option<usize>,
    /// The key path, such as `features[3].windows[1]` (empty for the whole file).
    pub path: String,
    /// What is wrong and, where possible, how to fix it.
    pub message: String,
}

impl Diagnostic {
    /// A diagnostic at a key path, with no position yet.
    pub fn at(path: impl Into<String>, message: impl Into<String>) -> Self {
        Diagnostic {
            file: None,
            line: None,
            column: None,
            path: path.into(),
            message: message.into(),
        }
    }
}

impl fmt::Display for Diagnostic {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut wrote = false;
        if let Some(file) = &self.file {
            write!(f, "{}", file.display())?;
            wrote = true;
        }
        if let Some(line) = self.line {
            if wrote {
                f.write_str(":")?;
            }
            write!(f, "{line}")?;
            if let Some(col) = self.column {
                write!(f, ":{col}")?;
            }
            wrote = true;
        }
        if !self.path.is_empty() {
            if wrote {
                f.write_str(": ")?;
            }
            write!(f, "{}", self.path)?;
            wrote = true;
        }
        if wrote {
            f.write_str(": ")?;
        }
        f.write_str(&self.message)
    }
}

/// Every problem found in a pipeline file (never empty).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub struct SpecErrors(pub Vec<Diagnostic>);

impl fmt::Display for SpecErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let n = self.0.len();
        writeln!(
            f,
            "{n} problem{} in the pipeline file:",
            if n == 1 { "" } else { "s" }
        )?;
        for d in &self.0 {
            writeln!(f, "  {d}")?;
        }
        Ok(())
    }
}

/// Suggests the nearest of `candidates` to `word`, when one is close enough to be a typo.
pub fn nearest<'a>(word: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let mut best: Option<(&str, f64)> = None;
    for c in candidates {
        let score = strsim::jaro_winkler(word, c);
        if score > best.map(|b| b.1).unwrap_or(0.0) {
            best = Some((c, score));
        }
    }
    best.filter(|b| b.1 >= 0.75).map(|b| b.0)
}
