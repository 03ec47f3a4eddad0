//! The validated pipeline: windows expanded, defaults applied, hashes computed.

use crate::model::{
    ActivityPopulation, Aggregation, ChecksSpec, Expectations, FillValue, Knowledge, LabelSpec,
    OnFail, PipelineFile, SourceSpec, StatePopulation, TransformSpec,
};
use crate::window::Window;
use chrono::NaiveTime;
use chrono_tz::Tz;
use std::collections::BTreeMap;
use std::path::PathBuf;

/// A pipeline that passed static validation (schema checks against real data come later,
/// in the engine).
#[derive(Debug, Clone)]
pub struct Pipeline {
    /// The file as written (after defaults).
    pub file: PipelineFile,
    /// Folder of the pipeline file: relative locations are resolved against it.
    pub base_dir: Option<PathBuf>,
    /// The pipeline time zone.
    pub timezone: Tz,
    /// Time of day of each cutoff.
    pub cutoff_time: NaiveTime,
    /// Sources by name.
    pub sources: BTreeMap<String, Source>,
    /// Who gets a row.
    pub population: Population,
    /// Output features, windows expanded, in output order.
    pub features: Vec<Feature>,
    /// The label, if declared.
    pub label: Option<LabelSpec>,
    /// Checks configuration.
    pub checks: ChecksSpec,
    /// Canonical hash of everything that gives outputs their meaning.
    pub hash: String,
    /// Hash of the population definition (a change makes every snapshot stale).
    pub population_hash: String,
}

/// A source with defaults resolved.
#[derive(Debug, Clone)]
pub struct Source {
    /// Name in the pipeline file.
    pub name: String,
    /// As written.
    pub spec: SourceSpec,
    /// The key column in this source.
    pub key: String,
    /// Knowledge mode, resolved from the declared one or the presence of an arrival column.
    pub knowledge: Knowledge,
}

/// Who gets a row on day D.
#[derive(Debug, Clone, PartialEq)]
pub enum Population {
    /// Keys whose latest change-log state is one of the listed values.
    State(StatePopulation),
    /// Keys with recent events.
    RecentActivity(ActivityPopulation),
}

impl Population {
    /// The source the population reads.
    pub fn source(&self) -> &str {
        match self {
            Population::State(s) => &s.source,
            Population::RecentActivity(a) => &a.source,
        }
    }
}

/// One output feature column.
#[derive(Debug, Clone, PartialEq)]
pub struct Feature {
    /// Column name (with the window suffix when expanded from `windows`).
    pub name: String,
    /// Key path of the declaration, e.g. `features[4]`, for messages.
    pub path: String,
    /// Description as written.
    pub description: Option<String>,
    /// How the value is computed.
    pub def: FeatureDef,
    /// Value for empty windows (`None`: the aggregation's own 0 for counts).
    pub fill: Option<FillValue>,
    /// Transforms.
    pub transform: Option<TransformSpec>,
    /// Expectations checked on every build.
    pub expect: Option<Expectations>,
    /// What a failed expectation does.
    pub on_fail: OnFail,
    /// Hash of the feature's meaning, including its sources and inputs.
    pub hash: String,
}

/// How a feature's value is computed.
#[derive(Debug, Clone, PartialEq)]
pub enum FeatureDef {
    /// An aggregation of one source's events over a window.
    Aggregate {
        /// Source name.
        source: String,
        /// Aggregation.
        agg: Aggregation,
        /// Value expression (SQL over the source's columns).
        expr: Option<String>,
        /// Row filter (SQL condition over the source's columns).
        filter: Option<String>,
        /// Look-back window.
        window: Window,
    },
    /// A combination of two other features.
    Derived {
        /// Operation.
        op: DerivedOp,
        /// First operand (a feature name).
        left: String,
        /// Second operand (a feature name).
        right: String,
    },
}

/// Operation of a derived feature.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DerivedOp {
    /// left / right.
    Ratio,
    /// left - right.
    Difference,
}

impl DerivedOp {
    /// The key used in pipeline files.
    pub fn as_str(&self) -> &'static str {
        match self {
            DerivedOp::Ratio => "ratio",
            DerivedOp::Difference => "difference",
        }
    }
}

impl Feature {
    /// The feature as JSON, for reports and the feature dictionary: name, hash, fill,
    /// transform, description, and either source/agg/expr/filter/window or the derivation.
    pub fn describe(&self) -> serde_json::Value {
        let mut v = serde_json::json!({
            "name": self.name,
            "hash": self.hash,
            "description": self.description,
            "fill": self.fill,
            "transform": self.transform,
        });
        match &self.def {
            FeatureDef::Aggregate {
                source,
                agg,
                expr,
                filter,
                window,
            } => {
                v["source"] = serde_json::json!(source);
                v["agg"] = serde_json::json!(agg.as_str());
                v["expr"] = serde_json::json!(expr);
                v["filter"] = serde_json::json!(filter);
                v["window"] = serde_json::json!(window.suffix());
            }
            FeatureDef::Derived { op, left, right } => {
                v[op.as_str()] = serde_json::json!([left, right]);
            }
        }
        v
    }
}

impl Pipeline {
    /// A feature by name.
    pub fn feature(&self, name: &str) -> Option<&Feature> {
        self.features.iter().find(|f| f.name == name)
    }
}
