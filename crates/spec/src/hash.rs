//! Canonical hashes: of the whole pipeline, of the population and of each feature.
//!
//! A hash is SHA-256 over canonical JSON (keys sorted, no whitespace) of the parsed, typed
//! pipeline, so key order, comments, quoting and layout never change it. Descriptions are
//! left out: they do not change what is computed.

use crate::resolved::{Feature, FeatureDef, Pipeline};
use serde_json::{json, Value};
use sha2::{Digest, Sha256};
use std::collections::HashMap;

/// Writes `v` as canonical JSON: object keys sorted, `description` keys dropped.
pub fn canonical_json(v: &Value) -> String {
    let mut out = String::new();
    write_canonical(v, &mut out);
    out
}

fn write_canonical(v: &Value, out: &mut String) {
    match v {
        Value::Object(map) => {
            let mut keys: Vec<&String> = map.keys().filter(|k| *k != "description").collect();
            keys.sort();
            out.push('{');
            for (i, k) in keys.iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                out.push_str(&Value::String((*k).clone()).to_string());
                out.push(':');
                write_canonical(&map[*k], out);
            }
            out.push('}');
        }
        Value::Array(items) => {
            out.push('[');
            for (i, item) in items.iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                write_canonical(item, out);
            }
            out.push(']');
        }
        other => out.push_str(&other.to_string()),
    }
}

/// SHA-256 of the canonical JSON of `v`, as 64 hex digits.
pub fn hash_value(v: &Value) -> String {
    hash_canonical(canonical_json(v).as_bytes())
}

/// SHA-256 of text that is already canonical JSON, as 64 hex digits: what [`hash_value`]
/// gives for the value that text stands for. For callers that write a large value's
/// canonical form directly instead of building it as a [`Value`] first.
pub fn hash_canonical(text: &[u8]) -> String {
    hex::encode(Sha256::digest(text))
}

fn without_key(mut v: Value, key: &str) -> Value {
    if let Value::Object(map) = &mut v {
        map.remove(key);
    }
    v
}

fn to_value<T: serde::Serialize>(t: &T) -> Value {
    serde_json::to_value(t).unwrap_or(Value::Null)
}

/// Fills in `pipeline.hash`, `pipeline.population_hash` and every feature's hash.
pub(crate) fn assign_hashes(p: &mut Pipeline) {
    p.hash = hash_value(&to_value(&p.file));
    let time = json!({ "timezone": p.file.timezone, "cutoff_time": p.file.cutoff_time, "key": p.file.key });
    let source_value = |name: &str| -> Value {
        match p.sources.get(name) {
            Some(s) => json!({
                // The lag decides when labels mature, never what a feature or tile holds.
                "spec": without_key(to_value(&s.spec), "watermark_lag"),
                "key": s.key,
                "knowledge": s.knowledge.as_str(),
            }),
            None => Value::Null,
        }
    };
    p.population_hash = hash_value(&json!({
        "population": to_value(&p.file.population),
        "source": source_value(p.population.source()),
        "time": time,
    }));
    let by_name: HashMap<String, Feature> = p
        .features
        .iter()
        .map(|f| (f.name.clone(), f.clone()))
        .collect();
    let mut memo: HashMap<String, String> = HashMap::new();
    fn feature_hash(
        name: &str,
        by_name: &HashMap<String, Feature>,
        memo: &mut HashMap<String, String>,
        source_value: &dyn Fn(&str) -> Value,
        time: &Value,
        depth: usize,
    ) -> String {
        if let Some(h) = memo.get(name) {
            return h.clone();
        }
        let Some(f) = by_name.get(name) else {
            return String::new();
        };
        let def = match &f.def {
            FeatureDef::Aggregate {
                source,
                agg,
                expr,
                filter,
                window,
            } => json!({
                "kind": "aggregate",
                "source": source,
                "source_def": source_value(source),
                "agg": agg.as_str(),
                "expr": expr,
                "filter": filter,
                "window": window.suffix(),
            }),
            FeatureDef::Derived { op, left, right } => {
                // Validation rejects cycles; the depth guard only protects against misuse.
                let (l, r) = if depth < 64 {
                    (
                        feature_hash(left, by_name, memo, source_value, time, depth + 1),
                        feature_hash(right, by_name, memo, source_value, time, depth + 1),
                    )
                } else {
                    (String::new(), String::new())
                };
                json!({ "kind": "derived", "op": op.as_str(), "left": [left, l], "right": [right, r] })
            }
        };
        let h = hash_value(&json!({
            "name": f.name,
            "def": def,
            "fill": to_value(&f.fill),
            "transform": to_value(&f.transform),
            "time": time,
        }));
        memo.insert(name.to_string(), h.clone());
        h
    }
    for f in p.features.iter_mut() {
        f.hash = feature_hash(&f.name, &by_name, &mut memo, &source_value, &time, 0);
    }
}
