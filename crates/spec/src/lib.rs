//! The daymark pipeline file.
//!
//! A pipeline file is YAML that declares sources (day-partitioned Parquet event logs), the
//! key, the population, features, the label and checks. This crate reads it with exact,
//! located errors ([`load_str`], [`load_file`]), validates everything that does not need the
//! data, expands feature windows, and computes the canonical hashes the ledger uses to find
//! stale outputs. Checks against the sources' real schemas live in `daymark-engine`.

pub mod diag;
pub mod hash;
pub mod model;
pub mod parse;
pub mod positions;
pub mod resolved;
pub mod validate;
pub mod window;

pub use diag::{Diagnostic, SpecErrors};
pub use model::*;
pub use resolved::{DerivedOp, Feature, FeatureDef, Pipeline, Population, Source};
pub use window::{DayCount, Window};

use positions::Positions;
use std::path::Path;

/// Parses and validates pipeline YAML. `base_dir` resolves relative source locations.
///
/// Every error carries a key path and, where the YAML shows one, a line and column.
pub fn load_str(text: &str, base_dir: Option<&Path>) -> Result<Pipeline, SpecErrors> {
    let file = parse::parse_yaml(text).map_err(|d| SpecErrors(vec![d]))?;
    validate::validate(file, base_dir.map(Path::to_path_buf)).map_err(|mut diags| {
        locate(&mut diags, text);
        SpecErrors(diags)
    })
}

/// Reads, parses and validates a pipeline file; errors name the file.
pub fn load_file(path: &Path) -> Result<Pipeline, SpecErrors> {
    let text = std::fs::read_to_string(path).map_err(|e| {
        SpecErrors(vec![Diagnostic {
            file: Some(path.to_path_buf()),
            ..Diagnostic::at("", format!("cannot read the pipeline file: {e}"))
        }])
    })?;
    let base = path.parent().map(|p| {
        if p.as_os_str().is_empty() {
            Path::new(".")
        } else {
            p
        }
    });
    load_str(&text, base).map_err(|mut e| {
        for d in &mut e.0 {
            d.file = Some(path.to_path_buf());
        }
        e
    })
}

/// Fills in line and column of diagnostics from their key paths.
pub fn locate(diags: &mut [Diagnostic], text: &str) {
    let positions = Positions::index(text);
    for d in diags {
        if d.line.is_none() {
            if let Some((line, col)) = positions.find(&d.path) {
                d.line = Some(line);
                d.column = Some(col);
            }
        }
    }
}

/// The JSON Schema of the pipeline file, generated from the Rust types.
pub fn json_schema() -> String {
    let schema = schemars::schema_for!(PipelineFile);
    serde_json::to_string_pretty(&schema).unwrap_or_default() + "\n"
}
