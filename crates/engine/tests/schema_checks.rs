//! Pipeline files checked against real schemas: the `# expect-with-data:` cases of
//! `tests/malformed/`, the demo pipeline, and random mutations of it (never a panic).

use arrow::datatypes::SchemaRef;
use daymark_engine::check_against_schemas;
use daymark_worldgen::generate::{plays_schema, subscriptions_schema, support_schema};
use proptest::prelude::*;
use std::collections::HashMap;
use std::path::PathBuf;

/// The crate's folder, read when the test runs (`cargo test` sets it): a test binary
/// reused from a shared target folder keeps the compile-time path of the checkout that
/// built it, which may be gone.
fn manifest_dir() -> String {
    std::env::var("CARGO_MANIFEST_DIR").unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into())
}

fn world_schemas() -> HashMap<String, Option<SchemaRef>> {
    HashMap::from([
        ("plays".to_string(), Some(plays_schema())),
        ("subscriptions".to_string(), Some(subscriptions_schema())),
        ("support".to_string(), Some(support_schema())),
    ])
}

fn repo_file(rel: &str) -> PathBuf {
    PathBuf::from(manifest_dir()).join("../..").join(rel)
}

#[test]
fn malformed_files_against_the_demo_world_schemas() {
    let dir = repo_file("tests/malformed");
    let mut checked = 0;
    let mut failures = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let path = e.unwrap().path();
        let text = std::fs::read_to_string(&path).unwrap();
        let Some(expect) = text
            .lines()
            .next()
            .unwrap()
            .strip_prefix("# expect-with-data: ")
        else {
            continue;
        };
        checked += 1;
        let pipeline = match daymark_spec::load_str(&text, None) {
            Ok(p) => p,
            Err(e) => {
                failures.push(format!(
                    "{}: failed before the data checks:\n{e}",
                    path.display()
                ));
                continue;
            }
        };
        let (mut diags, _) = check_against_schemas(&pipeline, &world_schemas());
        daymark_spec::locate(&mut diags, &text);
        let hit = diags
            .iter()
            .find(|d| format!("{}: {}", d.path, d.message).contains(expect));
        match hit {
            None => failures.push(format!(
                "{}: expected `{expect}`, got: {:?}",
                path.display(),
                diags.iter().map(|d| d.to_string()).collect::<Vec<_>>()
            )),
            Some(d) if d.line.is_none() => {
                failures.push(format!("{}: `{d}` has no line", path.display()))
            }
            Some(_) => {}
        }
    }
    assert!(checked >= 10, "only {checked} cases with data");
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn the_demo_pipeline_fits_the_demo_world() {
    let text = std::fs::read_to_string(repo_file("pipelines/demo.yaml")).unwrap();
    let pipeline = daymark_spec::load_str(&text, None).expect("the demo pipeline is valid");
    let (diags, types) = check_against_schemas(&pipeline, &world_schemas());
    assert!(diags.is_empty(), "{diags:?}");
    assert_eq!(types.len(), pipeline.features.len());
    assert!(pipeline.features.len() >= 30);
    assert_eq!(types["current_plan"].to_string(), "Utf8");
    assert_eq!(types["minutes_trend_7_28"].to_string(), "Float64");
    assert_eq!(types["tenure_band"].to_string(), "Int64");
}

/// Mutations of the demo pipeline text: each picks a line and a way to break it.
fn mutate(text: &str, ops: &[(usize, u8, usize, char)]) -> String {
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    for &(at, kind, pos, ch) in ops {
        if lines.is_empty() {
            break;
        }
        let i = at % lines.len();
        let len = lines[i].chars().count();
        match kind % 8 {
            0 => {
                lines.remove(i);
            }
            1 => {
                let l = lines[i].clone();
                lines.insert(i, l);
            }
            2 => {
                let mut c: Vec<char> = lines[i].chars().collect();
                c.insert(pos % (len + 1), ch);
                lines[i] = c.into_iter().collect();
            }
            3 if len > 0 => {
                let mut c: Vec<char> = lines[i].chars().collect();
                c.remove(pos % len);
                lines[i] = c.into_iter().collect();
            }
            4 => lines[i] = format!("  {}", lines[i]),
            5 => lines[i] = lines[i].trim_start().to_string(),
            6 => {
                let j = pos % lines.len();
                lines.swap(i, j);
            }
            _ => {
                // Replace a value by another kind of value.
                if let Some((k, _)) = lines[i].split_once(':') {
                    let v = [
                        "", " 7d", " -3", " [a, b]", " {x: 1}", " null", " 1e400", " '", " *a",
                        " &a x",
                    ][pos % 10];
                    lines[i] = format!("{k}:{v}");
                }
            }
        }
    }
    lines.join("\n")
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, failure_persistence: None, ..ProptestConfig::default() })]

    /// The parser and validator never panic: every mutation is an error or a valid pipeline,
    /// and every valid one survives the schema checks without panicking.
    #[test]
    fn mutations_never_panic(ops in proptest::collection::vec((0usize..200, 0u8..8, 0usize..200, proptest::char::any()), 1..4)) {
        let text = std::fs::read_to_string(repo_file("pipelines/demo.yaml")).unwrap();
        let mutated = mutate(&text, &ops);
        match daymark_spec::load_str(&mutated, None) {
            Ok(p) => {
                let _ = check_against_schemas(&p, &world_schemas());
            }
            Err(e) => prop_assert!(!e.0.is_empty()),
        }
    }
}
