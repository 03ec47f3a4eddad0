//! Reading YAML text into [`PipelineFile`], turning serde errors into located diagnostics.

use crate::diag::{nearest, Diagnostic};
use crate::model::PipelineFile;
use crate::positions::Positions;

/// Largest pipeline file accepted (a guard against reading something that is not one).
pub const MAX_PIPELINE_BYTES: usize = 4 * 1024 * 1024;

/// Parses pipeline YAML. On failure returns the (first) syntax or type error, located.
pub fn parse_yaml(text: &str) -> Result<PipelineFile, Diagnostic> {
    if text.len() > MAX_PIPELINE_BYTES {
        return Err(Diagnostic::at(
            "",
            format!(
                "the file is {} bytes; a pipeline file is at most {MAX_PIPELINE_BYTES}",
                text.len()
            ),
        ));
    }
    let nothing = matches!(
        serde_yaml::from_str::<serde_yaml::Value>(text),
        Ok(serde_yaml::Value::Null)
    );
    if text.trim().is_empty() || nothing {
        return Err(Diagnostic::at(
            "",
            "the file is empty: a pipeline file needs at least `daymark`, `name`, `key`, `sources`, `population` and `features`",
        ));
    }
    // serde_yaml expands aliases; a tiny file with nested aliases can expand enormously.
    // It guards against that itself and answers with an error, which we pass on.
    serde_yaml::from_str::<PipelineFile>(text).map_err(|e| translate(&e, text))
}

fn translate(e: &serde_yaml::Error, text: &str) -> Diagnostic {
    let mut message = e.to_string();
    // serde_yaml appends " at line L column C"; we report the position in our own fields.
    if let Some(cut) = message.rfind(" at line ") {
        if message[cut..].contains(" column ") {
            message.truncate(cut);
        }
    }
    let (path, body) = split_path(&message);
    let body = improve(body);
    let mut d = Diagnostic::at(path.clone(), body);
    if let Some(loc) = e.location() {
        d.line = Some(loc.line());
        d.column = Some(loc.column());
    } else if let Some((line, col)) = Positions::index(text).find(&path) {
        d.line = Some(line);
        d.column = Some(col);
    }
    d
}

/// serde_yaml prefixes messages with the key path (`features[0].agg: ...`).
fn split_path(message: &str) -> (String, &str) {
    if let Some((head, rest)) = message.split_once(": ") {
        let looks_like_path = !head.is_empty()
            && !head.contains(' ')
            && head
                .chars()
                .all(|c| c.is_alphanumeric() || "_-.[]".contains(c));
        if looks_like_path {
            return (head.to_string(), rest);
        }
    }
    (String::new(), message)
}

/// Adds a "did you mean" to unknown keys and values.
fn improve(body: &str) -> String {
    for (prefix, what) in [("unknown field `", "key"), ("unknown variant `", "value")] {
        let Some(rest) = body.strip_prefix(prefix) else {
            continue;
        };
        let Some((word, tail)) = rest.split_once('`') else {
            continue;
        };
        let options: Vec<&str> = tail.split('`').skip(1).step_by(2).collect();
        let mut out = format!("unknown {what} `{word}`");
        if let Some(best) = nearest(word, options.iter().copied()) {
            out.push_str(&format!(": did you mean `{best}`?"));
        }
        if !options.is_empty() {
            out.push_str(&format!(
                " (expected one of {})",
                options
                    .iter()
                    .map(|o| format!("`{o}`"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
        }
        return out;
    }
    body.to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn suggests_nearest_key() {
        let b = improve("unknown field `agregation`, expected one of `name`, `agg`, `expr`");
        assert!(b.starts_with("unknown key `agregation`"), "{b}");
        let b = improve("unknown field `windwos`, expected one of `window`, `windows`");
        assert!(b.contains("did you mean `windows`?"), "{b}");
    }
}
