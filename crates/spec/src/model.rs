//! The pipeline file as written: the serde types that YAML is read into.
//!
//! Every struct rejects unknown keys. Doc comments here become the descriptions in the
//! shipped JSON Schema (`schema/pipeline.schema.json`), so they are written for users.

use crate::window::{DayCount, Window};
use schemars::JsonSchema;
use serde::{Deserialize, Deserializer, Serialize};
use std::collections::BTreeMap;

/// A daymark pipeline file: sources, key, population, features, label and checks.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct PipelineFile {
    /// Version of the pipeline file format. Must be `1`.
    pub daymark: u32,
    /// Name of the pipeline: letters, digits and `_`.
    pub name: String,
    /// What the pipeline is for. Not part of any hash.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub description: Option<String>,
    /// IANA time zone in which days and cutoffs are counted, e.g. `Europe/Lisbon`. Default `UTC`.
    #[serde(default = "default_timezone")]
    pub timezone: String,
    /// Time of day (`HH:MM` or `HH:MM:SS`, in `timezone`) at which snapshot D is taken on day D.
    /// Default `00:00`: the snapshot for D sees everything before D begins.
    #[serde(default = "default_cutoff_time")]
    pub cutoff_time: String,
    /// The customer identifier column, shared by all sources unless a source names its own.
    pub key: String,
    /// Where outputs (tiles, snapshots, labels, ledger) are written: a local folder or an
    /// object-store URL. Relative paths are relative to the pipeline file. Default `./out`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub output: Option<String>,
    /// The event logs, by name.
    pub sources: BTreeMap<String, SourceSpec>,
    /// Who gets a row on day D.
    pub population: PopulationSpec,
    /// The feature columns of each snapshot, in output order.
    pub features: Vec<FeatureSpec>,
    /// The outcome observed after the cutoff (back-filled once it matures).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub label: Option<LabelSpec>,
    /// What happens when a declared expectation or check fails.
    #[serde(default)]
    pub checks: ChecksSpec,
}

fn default_timezone() -> String {
    "UTC".to_string()
}

fn default_cutoff_time() -> String {
    "00:00".to_string()
}

/// A Parquet event log partitioned by day into `<day_partition>=YYYY-MM-DD/` folders.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct SourceSpec {
    /// Folder or URL holding the day partitions: a local path (relative to the pipeline file),
    /// `file://`, `s3://`, `gs://` or `az://`.
    pub location: String,
    /// File format of the log. Only `parquet` is supported.
    #[serde(default)]
    pub format: SourceFormat,
    /// Name of the Hive-style day partition folder (`dt` for `dt=2026-01-31/`). Default `dt`.
    #[serde(default = "default_day_partition")]
    pub day_partition: String,
    /// Column holding when the event happened (a timestamp).
    pub event_time: String,
    /// Column holding when the row landed in the log (a timestamp). Enables `as-known` mode.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub arrival_time: Option<String>,
    /// The key column in this source, when it differs from the pipeline's `key`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub key: Option<String>,
    /// Columns that identify a row: rows repeating them are counted once.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub dedupe_on: Vec<String>,
    /// What a snapshot may know of this source. Default: `as-known` when `arrival_time` is
    /// set, `event-time` otherwise.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub knowledge: Option<Knowledge>,
    /// Used only when no day partition carries a `_complete` marker: the source is taken to
    /// be complete up to the end of its newest day partition minus this lag (the watermark
    /// that decides when labels mature). Default `1d`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub watermark_lag: Option<DayCount>,
}

fn default_day_partition() -> String {
    "dt".to_string()
}

/// File format of a source.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum SourceFormat {
    /// Apache Parquet files.
    #[default]
    Parquet,
}

/// Which events a snapshot may use.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum Knowledge {
    /// Every event whose event time is before the cutoff, whenever it arrived.
    EventTime,
    /// Events whose event time and arrival time are both before the cutoff: what a daily
    /// run on that day could have seen.
    AsKnown,
}

impl Knowledge {
    /// The spelling used in pipeline files and on the command line.
    pub fn as_str(&self) -> &'static str {
        match self {
            Knowledge::EventTime => "event-time",
            Knowledge::AsKnown => "as-known",
        }
    }
}

/// Who gets a row on day D. Give exactly one of `state` or `recent_activity`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct PopulationSpec {
    /// Keys whose latest row in a change log, as of the cutoff, has `column` in `values`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub state: Option<StatePopulation>,
    /// Keys with at least one (matching) event in the last `within` days before the cutoff.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub recent_activity: Option<ActivityPopulation>,
}

/// Population from the latest state in a change log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct StatePopulation {
    /// The change-log source.
    pub source: String,
    /// The column holding the state after each change.
    pub column: String,
    /// States that put a key in the population.
    pub values: Vec<String>,
}

/// Population from recent events.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct ActivityPopulation {
    /// The source whose events count.
    pub source: String,
    /// How far back an event counts, e.g. `28d`.
    pub within: Window,
    /// Only events matching this SQL condition over the source's columns count.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub filter: Option<String>,
}

/// How values of a source feature are combined over a window.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum Aggregation {
    /// Number of events (or of non-null `expr` values when `expr` is given).
    Count,
    /// Sum of `expr`.
    Sum,
    /// Arithmetic mean of `expr`.
    Mean,
    /// Smallest value of `expr`.
    Min,
    /// Largest value of `expr`.
    Max,
    /// Number of distinct values of `expr` (exact).
    CountDistinct,
    /// Number of distinct days with at least one event. Days run from one cutoff to the
    /// next in the pipeline time zone: calendar days with the default 00:00 cutoff.
    ActiveDays,
    /// Value of `expr` at the earliest event in the window.
    First,
    /// Value of `expr` at the latest event in the window: with `window: all`, the current
    /// value of a change log as of the cutoff.
    Last,
    /// Days (cutoff to cutoff) from the first event ever (before the cutoff) to day D: tenure.
    DaysSinceFirst,
    /// Days (cutoff to cutoff) from the latest event (before the cutoff) to day D: recency.
    DaysSinceLast,
}

impl Aggregation {
    /// The spelling used in pipeline files.
    pub fn as_str(&self) -> &'static str {
        match self {
            Aggregation::Count => "count",
            Aggregation::Sum => "sum",
            Aggregation::Mean => "mean",
            Aggregation::Min => "min",
            Aggregation::Max => "max",
            Aggregation::CountDistinct => "count_distinct",
            Aggregation::ActiveDays => "active_days",
            Aggregation::First => "first",
            Aggregation::Last => "last",
            Aggregation::DaysSinceFirst => "days_since_first",
            Aggregation::DaysSinceLast => "days_since_last",
        }
    }

    /// Whether the aggregation reads a value expression (`expr`).
    pub fn needs_expr(&self) -> bool {
        matches!(
            self,
            Aggregation::Sum
                | Aggregation::Mean
                | Aggregation::Min
                | Aggregation::Max
                | Aggregation::CountDistinct
                | Aggregation::First
                | Aggregation::Last
        )
    }

    /// Whether an empty window has a true value (0) so that no `fill` is needed.
    pub fn empty_is_zero(&self) -> bool {
        matches!(
            self,
            Aggregation::Count | Aggregation::CountDistinct | Aggregation::ActiveDays
        )
    }

    /// Whether the aggregation always looks back without bound.
    pub fn is_unbounded(&self) -> bool {
        matches!(
            self,
            Aggregation::DaysSinceFirst | Aggregation::DaysSinceLast
        )
    }
}

/// One feature, or with `windows`, one feature per window named `<name>_<window>`.
///
/// A source feature has `source` and `agg`; a derived feature has `ratio` or `difference`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct FeatureSpec {
    /// Column name: lower-case letters, digits and `_`, starting with a letter.
    pub name: String,
    /// What the feature means. Not part of any hash.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub description: Option<String>,
    /// The source the feature aggregates.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub source: Option<String>,
    /// The aggregation.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agg: Option<Aggregation>,
    /// The value aggregated: a column or a scalar SQL expression over the source's columns.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub expr: Option<String>,
    /// Only events matching this SQL condition over the source's columns are aggregated.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub filter: Option<String>,
    /// The look-back window (`7d`, `all`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub window: Option<Window>,
    /// Several windows: expands into one feature per window, named `<name>_<window>`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub windows: Option<Vec<Window>>,
    /// Derived feature: the first named feature divided by the second.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ratio: Option<Vec<String>>,
    /// Derived feature: the first named feature minus the second.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub difference: Option<Vec<String>>,
    /// Value used when the window holds no event (or a ratio divides by zero). Write
    /// `fill: null` to keep nulls. Required unless the aggregation is a count.
    #[serde(
        default,
        deserialize_with = "present",
        skip_serializing_if = "Option::is_none"
    )]
    #[schemars(with = "Option<FillValue>")]
    pub fill: Option<FillValue>,
    /// Applied after the fill, in the order clip, log1p, bucket.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub transform: Option<TransformSpec>,
    /// What values are expected; checked on every build.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub expect: Option<Expectations>,
    /// Overrides `checks.on_fail` for this feature's expectations.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub on_fail: Option<OnFail>,
}

/// Keeps an explicit `null` apart from an absent key.
fn present<'de, D: Deserializer<'de>>(d: D) -> Result<Option<FillValue>, D::Error> {
    FillValue::deserialize(d).map(Some)
}

/// A fill value: a number, a boolean, a string, or null.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(untagged)]
pub enum FillValue {
    /// Keep the empty value as null (declared, so never silent).
    Null,
    /// `true` or `false`.
    Bool(bool),
    /// A whole number.
    Int(i64),
    /// A number with a fraction.
    Float(f64),
    /// A string.
    Text(String),
}

/// Transforms applied to a feature's value, in the order clip, log1p, bucket.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct TransformSpec {
    /// `[low, high]`: values below `low` become `low`, values above `high` become `high`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub clip: Option<Vec<f64>>,
    /// `true`: replace x by ln(1 + x). Needs x > -1 (clip first if needed).
    #[serde(default, skip_serializing_if = "is_false")]
    pub log1p: bool,
    /// Strictly increasing edges `[e1, e2, ...]`: the value becomes the number of edges
    /// that are less than or equal to it (0 below e1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bucket: Option<Vec<f64>>,
}

fn is_false(b: &bool) -> bool {
    !*b
}

/// Expected values of a feature.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct Expectations {
    /// Smallest expected value (inclusive).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub min: Option<f64>,
    /// Largest expected value (inclusive).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max: Option<f64>,
    /// The only values expected (for string or categorical features).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub values: Option<Vec<String>>,
    /// Largest share of null values expected in a snapshot, from 0 to 1.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max_null_share: Option<f64>,
}

/// What a failed check does.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum OnFail {
    /// The build fails and nothing is published.
    #[default]
    Fail,
    /// The build publishes and reports a warning.
    Warn,
}

/// The outcome observed in `(cutoff, cutoff + horizon]`, confirmed after `grace`.
///
/// Default meaning (churn): the key has an `ended` row within the horizon and no `resumed`
/// row within `grace` after that end.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct LabelSpec {
    /// Name of the label column. Default `churned`.
    #[serde(default = "default_label_name")]
    pub name: String,
    /// The source whose rows decide the label (usually the subscription change log).
    pub source: String,
    /// How long after the cutoff an end counts, e.g. `30d`.
    pub horizon: DayCount,
    /// How long after an end a resumption cancels it, e.g. `7d`. Default `0d`.
    #[serde(default)]
    pub grace: DayCount,
    /// SQL condition over the source's columns marking a row that ends the subscription.
    pub ended: String,
    /// SQL condition marking a row that resumes it (cancels an end within the grace).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub resumed: Option<String>,
}

fn default_label_name() -> String {
    "churned".to_string()
}

/// Checks run on every build.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct ChecksSpec {
    /// What a failed expectation does unless a feature says otherwise. Default `fail`.
    #[serde(default)]
    pub on_fail: OnFail,
    /// Largest accepted change in population size against the previous day, as a share
    /// (0.2 = 20%).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max_population_change: Option<f64>,
    /// Population Stability Index thresholds for feature drift.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub drift: Option<DriftSpec>,
}

/// Population Stability Index thresholds (0.1 and 0.25 are common practice).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct DriftSpec {
    /// PSI at or above which a warning is reported. Default 0.1.
    #[serde(default = "default_psi_warn")]
    pub warn: f64,
    /// PSI at or above which the check fails. Default 0.25.
    #[serde(default = "default_psi_fail")]
    pub fail: f64,
    /// Days before D forming the reference distribution. Default `28d`.
    #[serde(default = "default_reference")]
    pub reference: Window,
}

fn default_psi_warn() -> f64 {
    0.1
}

fn default_psi_fail() -> f64 {
    0.25
}

fn default_reference() -> Window {
    Window::Days(28)
}
