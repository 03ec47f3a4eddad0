//! The pipeline hash ignores layout and comments and follows meaning; the shipped JSON
//! Schema is the one generated from the types.

use std::path::PathBuf;

/// The crate's folder, read when the test runs (`cargo test` sets it): a test binary
/// reused from a shared target folder keeps the compile-time path of the checkout that
/// built it, which may be gone.
fn manifest_dir() -> String {
    std::env::var("CARGO_MANIFEST_DIR").unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into())
}

const BASE: &str = r#"
daymark: 1
name: h
key: customer_id
sources:
  plays:
    location: data/plays
    event_time: event_time
    arrival_time: arrived_at
population:
  recent_activity: { source: plays, within: 28d }
features:
  - name: minutes
    description: Minutes watched.
    source: plays
    agg: sum
    expr: seconds_played / 60.0
    filter: device = 'tv'
    windows: [7d, 28d]
    fill: 0
  - name: trend
    ratio: [minutes_7d, minutes_28d]
    fill: 0
"#;

/// The same pipeline with keys reordered, flow style, comments and other spacing.
const REORDERED: &str = r#"
# a comment that changes nothing
features:
  - fill: 0          # same fill
    windows: [ 7d , 28d ]
    filter: "device = 'tv'"
    expr: 'seconds_played / 60.0'
    agg: sum
    source: plays
    name: minutes
    description: Another description, which is not part of the meaning.
  - {name: trend, fill: 0, ratio: [minutes_7d, minutes_28d]}
population:
  recent_activity:
    within: 28d
    source: plays
sources:
  plays: {arrival_time: arrived_at, event_time: event_time, location: data/plays}
key: customer_id
name: h
daymark: 1
"#;

fn load(text: &str) -> daymark_spec::Pipeline {
    daymark_spec::load_str(text, None).unwrap_or_else(|e| panic!("{e}"))
}

fn feature_hash(p: &daymark_spec::Pipeline, name: &str) -> String {
    p.feature(name).unwrap().hash.clone()
}

#[test]
fn layout_order_comments_and_descriptions_do_not_change_hashes() {
    let a = load(BASE);
    let b = load(REORDERED);
    assert_eq!(a.hash, b.hash);
    assert_eq!(a.population_hash, b.population_hash);
    for f in &a.features {
        assert_eq!(f.hash, feature_hash(&b, &f.name), "{}", f.name);
    }
    assert_eq!(a.hash.len(), 64);
}

#[test]
fn meaning_changes_change_hashes() {
    let a = load(BASE);
    let changes = [
        (
            "filter: device = 'tv'",
            "filter: device = 'phone'",
            vec!["minutes_7d", "minutes_28d", "trend"],
        ),
        (
            "windows: [7d, 28d]",
            "windows: [7d, 28d, 91d]",
            vec!["minutes_91d"],
        ),
        (
            "    fill: 0\n  - name: trend",
            "    fill: -1\n  - name: trend",
            vec!["minutes_7d", "minutes_28d", "trend"],
        ),
        (
            "expr: seconds_played / 60.0",
            "expr: seconds_played / 3600.0",
            vec!["minutes_7d", "minutes_28d", "trend"],
        ),
        (
            "ratio: [minutes_7d, minutes_28d]",
            "ratio: [minutes_28d, minutes_7d]",
            vec!["trend"],
        ),
        (
            "arrival_time: arrived_at",
            "arrival_time: landed_at",
            vec!["minutes_7d", "minutes_28d", "trend"],
        ),
        (
            "agg: sum",
            "agg: max",
            vec!["minutes_7d", "minutes_28d", "trend"],
        ),
    ];
    for (old, new, changed) in changes {
        let b = load(&BASE.replace(old, new));
        assert_ne!(a.hash, b.hash, "{old} -> {new}");
        for f in &b.features {
            let before = a.feature(&f.name).map(|x| x.hash.clone());
            if changed.contains(&f.name.as_str()) {
                assert_ne!(
                    before.as_deref(),
                    Some(f.hash.as_str()),
                    "{} should change with {new}",
                    f.name
                );
            } else {
                assert_eq!(
                    before.as_deref(),
                    Some(f.hash.as_str()),
                    "{} should not change with {new}",
                    f.name
                );
            }
        }
    }
    // A population change leaves features alone but changes the population hash.
    let b = load(&BASE.replace("within: 28d", "within: 14d"));
    assert_ne!(a.population_hash, b.population_hash);
    assert_eq!(
        feature_hash(&a, "minutes_7d"),
        feature_hash(&b, "minutes_7d")
    );
    // Time zone and cutoff change what every window covers.
    let b = load(&BASE.replace(
        "key: customer_id",
        "key: customer_id\ntimezone: Europe/Lisbon",
    ));
    assert_ne!(
        feature_hash(&a, "minutes_7d"),
        feature_hash(&b, "minutes_7d")
    );
}

#[test]
fn shipped_json_schema_is_current() {
    let path = PathBuf::from(manifest_dir()).join("../../pipelines/pipeline.schema.json");
    let shipped = std::fs::read_to_string(&path).unwrap_or_default();
    assert!(
        shipped == daymark_spec::json_schema(),
        "pipelines/pipeline.schema.json is out of date: run `cargo run -p daymark-cli -- schema > pipelines/pipeline.schema.json`"
    );
    let v: serde_json::Value = serde_json::from_str(&shipped).unwrap();
    assert!(v["properties"]["features"].is_object());
    assert!(v["required"]
        .as_array()
        .unwrap()
        .iter()
        .any(|k| k == "sources"));
}

#[test]
fn window_lists_expand_with_predictable_names() {
    let p = load(BASE);
    let names: Vec<&str> = p.features.iter().map(|f| f.name.as_str()).collect();
    assert_eq!(names, ["minutes_7d", "minutes_28d", "trend"]);
}

#[test]
fn the_readme_example_is_a_valid_pipeline() {
    let readme =
        std::fs::read_to_string(PathBuf::from(manifest_dir()).join("../../README.md")).unwrap();
    let start = readme.find("```yaml\n").expect("a yaml block") + "```yaml\n".len();
    let end = start + readme[start..].find("```").unwrap();
    let p = load(&readme[start..end]);
    assert!(p.feature("minutes_watched_91d").is_some());
    assert!(p.label.is_some());
}
