//! Every file in `tests/malformed/` is a broken pipeline file whose first line says which
//! message it must produce: `# expect: [@LINE:COL] text` (checked here, without data) or
//! `# expect-with-data: ...` (checked by daymark-engine against the demo world's schemas).

use std::path::PathBuf;

/// The crate's folder, read when the test runs (`cargo test` sets it): a test binary
/// reused from a shared target folder keeps the compile-time path of the checkout that
/// built it, which may be gone.
fn manifest_dir() -> String {
    std::env::var("CARGO_MANIFEST_DIR").unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into())
}

fn cases() -> Vec<(PathBuf, String, String)> {
    let dir = PathBuf::from(manifest_dir()).join("../../tests/malformed");
    let mut out = Vec::new();
    for e in std::fs::read_dir(&dir).expect("tests/malformed exists") {
        let path = e.expect("entry").path();
        let text = std::fs::read_to_string(&path).expect("readable");
        let first = text.lines().next().unwrap_or("").to_string();
        if let Some(expect) = first.strip_prefix("# expect: ") {
            out.push((path, expect.to_string(), text));
        }
    }
    out.sort();
    out
}

/// Splits an optional `@LINE:COL ` prefix off an expectation.
fn split_position(expect: &str) -> (Option<(usize, usize)>, &str) {
    if let Some(rest) = expect.strip_prefix('@') {
        if let Some((pos, msg)) = rest.split_once(' ') {
            if let Some((l, c)) = pos.split_once(':') {
                if let (Ok(l), Ok(c)) = (l.parse(), c.parse()) {
                    return (Some((l, c)), msg);
                }
            }
        }
    }
    (None, expect)
}

#[test]
fn each_malformed_file_gives_its_message() {
    let cases = cases();
    assert!(cases.len() >= 20, "only {} static cases", cases.len());
    let mut failures = Vec::new();
    for (path, expect, text) in &cases {
        let (position, message) = split_position(expect);
        match daymark_spec::load_str(text, None) {
            Ok(_) => failures.push(format!(
                "{}: accepted, expected `{message}`",
                path.display()
            )),
            Err(errs) => {
                let found = errs.0.iter().find(|d| {
                    let rendered = if d.path.is_empty() {
                        d.message.clone()
                    } else {
                        format!("{}: {}", d.path, d.message)
                    };
                    rendered.contains(message)
                });
                match found {
                    None => failures.push(format!(
                        "{}: expected `{message}`, got:\n{errs}",
                        path.display()
                    )),
                    Some(d) => {
                        if let Some((l, c)) = position {
                            if d.line != Some(l) || d.column != Some(c) {
                                failures.push(format!(
                                    "{}: expected position {l}:{c}, got {:?}:{:?}",
                                    path.display(),
                                    d.line,
                                    d.column
                                ));
                            }
                        }
                        // Every problem in a file that is valid YAML can be located.
                        if text.lines().count() > 2 && d.line.is_none() {
                            failures.push(format!("{}: no line for `{d}`", path.display()));
                        }
                    }
                }
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}
