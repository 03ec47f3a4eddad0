//! What is due: the state of every snapshot day in a range, and the steps to run.
//!
//! A snapshot day is
//! - **built** when its latest ledger entry is a publish whose pipeline definitions and
//!   inputs still match;
//! - **new** (due) when it has no entry and its sources are complete up to its cutoff;
//! - **stale** (due) when the population or a feature it holds changed (named), when a
//!   partition it read changed (named), or when its published file is gone;
//! - **failed** (due again) when its latest build failed;
//! - **pending** when a partition it needs is not complete yet (named).
//!
//! Which input changes make a snapshot stale depends on the knowledge mode it used for the
//! source. In `event-time` mode any added, changed or removed file in a partition it read
//! makes it stale: late rows belong to it. In `as-known` mode a new file is a late arrival,
//! and late rows arrived after the cutoff, which as-known excludes by definition, so the
//! snapshot stays valid; only a changed or removed file (history rewritten) makes it stale.

use crate::complete;
use crate::ledger::{fingerprint_range, Entry, FileFingerprint, Outcome, SourceInputs};
use chrono::{Duration, NaiveDate};
use daymark_engine::sql::KnowledgeOverride;
use daymark_spec::{Knowledge, Pipeline};
use daymark_store::Listing;
use serde_json::json;
use std::collections::{BTreeMap, BTreeSet};

/// The ledger scope of a knowledge override.
pub fn scope_of(mode: KnowledgeOverride) -> &'static str {
    match mode {
        None => "per-source",
        Some(Knowledge::AsKnown) => "as-known",
        Some(Knowledge::EventTime) => "event-time",
    }
}

/// The state of one snapshot day.
#[derive(Debug, Clone, PartialEq)]
pub enum DayState {
    /// Published and current.
    Built,
    /// Never built; its inputs are complete.
    New,
    /// Built, but out of date; the reasons say why.
    Stale(Vec<String>),
    /// The last build failed.
    Failed(String),
    /// Its inputs are not complete yet; the reasons name the partitions.
    Pending(Vec<String>),
}

impl DayState {
    /// `built`, `new`, `stale`, `failed` or `pending`.
    pub fn name(&self) -> &'static str {
        match self {
            DayState::Built => "built",
            DayState::New => "new",
            DayState::Stale(_) => "stale",
            DayState::Failed(_) => "failed",
            DayState::Pending(_) => "pending",
        }
    }

    /// Whether a run builds it.
    pub fn is_due(&self) -> bool {
        matches!(
            self,
            DayState::New | DayState::Stale(_) | DayState::Failed(_)
        )
    }

    /// The reasons, as lines.
    pub fn reasons(&self) -> Vec<String> {
        match self {
            DayState::Stale(r) | DayState::Pending(r) => r.clone(),
            DayState::Failed(m) => vec![m.clone()],
            _ => vec![],
        }
    }
}

/// One day of the plan.
#[derive(Debug, Clone)]
pub struct DayStatus {
    /// Snapshot day.
    pub day: NaiveDate,
    /// Its state.
    pub state: DayState,
    /// Its latest ledger entry.
    pub entry: Option<Entry>,
}

/// One unit of work, in the order it runs.
#[derive(Debug, Clone, PartialEq)]
pub enum Step {
    /// Build and publish snapshot `day` (tiles it needs are prepared first).
    Snapshot {
        /// The day.
        day: NaiveDate,
        /// `new`, `stale` or `failed`, with reasons.
        why: String,
    },
    /// Back-fill the labels of snapshot days whose label window has closed. Runs after the
    /// snapshots; skipped with a message when this daymark has no label back-fill.
    Labels {
        /// Snapshot days whose labels matured.
        days: Vec<NaiveDate>,
    },
}

/// The whole plan.
#[derive(Debug, Clone)]
pub struct Plan {
    /// Ledger scope (knowledge mode).
    pub scope: String,
    /// First day considered.
    pub from: Option<NaiveDate>,
    /// Last day considered.
    pub until: Option<NaiveDate>,
    /// Every day considered.
    pub days: Vec<DayStatus>,
    /// The work, in dependency order.
    pub steps: Vec<Step>,
    /// Watermark of each source (last day up to which every partition is complete).
    pub watermarks: BTreeMap<String, Option<NaiveDate>>,
}

impl Plan {
    /// Snapshot steps only.
    pub fn snapshot_days(&self) -> Vec<NaiveDate> {
        self.steps
            .iter()
            .filter_map(|s| match s {
                Step::Snapshot { day, .. } => Some(*day),
                _ => None,
            })
            .collect()
    }

    /// Days waiting for inputs.
    pub fn pending(&self) -> usize {
        self.days
            .iter()
            .filter(|d| matches!(d.state, DayState::Pending(_)))
            .count()
    }

    /// Count of days in each state.
    pub fn counts(&self) -> BTreeMap<&'static str, usize> {
        let mut m = BTreeMap::new();
        for d in &self.days {
            *m.entry(d.state.name()).or_insert(0) += 1;
        }
        m
    }

    /// The plan as JSON (for `status --json` and `run --dry-run --log-format json`).
    pub fn to_json(&self) -> serde_json::Value {
        json!({
            "scope": self.scope,
            "from": self.from.map(|d| d.to_string()),
            "until": self.until.map(|d| d.to_string()),
            "watermarks": self.watermarks.iter().map(|(k, v)| (k.clone(), json!(v.map(|d| d.to_string())))).collect::<serde_json::Map<_, _>>(),
            "counts": self.counts(),
            "days": self.days.iter().map(|d| json!({
                "date": d.day.to_string(),
                "state": d.state.name(),
                "reasons": d.state.reasons(),
                "rows": d.entry.as_ref().filter(|e| e.outcome == Outcome::Published).map(|e| e.rows),
                "built_at": d.entry.as_ref().map(|e| e.finished.clone()),
            })).collect::<Vec<_>>(),
            "steps": self.steps.iter().map(|s| match s {
                Step::Snapshot { day, why } => json!({"step": "snapshot", "date": day.to_string(), "why": why}),
                Step::Labels { days } => json!({"step": "labels", "dates": days.iter().map(|d| d.to_string()).collect::<Vec<_>>()}),
            }).collect::<Vec<_>>(),
        })
    }
}

/// What a snapshot of `day` reads, as the ledger records it (fingerprints now).
pub fn inputs_of(
    pipeline: &Pipeline,
    listings: &BTreeMap<String, Listing>,
    day: NaiveDate,
    mode: KnowledgeOverride,
) -> BTreeMap<String, SourceInputs> {
    let q = daymark_engine::snapshot_query(pipeline, day, mode);
    let last = complete::last_needed_partition(pipeline.timezone, q.cutoff);
    q.reads
        .iter()
        .map(|(source, read)| {
            let empty = Listing::default();
            let listing = listings.get(source).unwrap_or(&empty);
            (
                source.clone(),
                SourceInputs {
                    knowledge: read.knowledge.as_str().into(),
                    first_day: read.first_day.map(|d| d.to_string()),
                    last_day: last.to_string(),
                    partitions: fingerprint_range(listing, read.first_day, last),
                },
            )
        })
        .collect()
}

/// The partitions (named) that snapshot `day` needs and are not complete.
fn waiting_for(
    pipeline: &Pipeline,
    listings: &BTreeMap<String, Listing>,
    day: NaiveDate,
    mode: KnowledgeOverride,
) -> Vec<String> {
    let q = daymark_engine::snapshot_query(pipeline, day, mode);
    let last = complete::last_needed_partition(pipeline.timezone, q.cutoff);
    let mut out = Vec::new();
    for (source, read) in &q.reads {
        let empty = Listing::default();
        let listing = listings.get(source).unwrap_or(&empty);
        let missing = complete::incomplete(listing, read.first_day, last);
        if !missing.is_empty() {
            let shown: Vec<String> = missing.iter().take(3).map(|d| format!("dt={d}")).collect();
            out.push(format!(
                "{source}: {} partition(s) not complete: {}{}",
                missing.len(),
                shown.join(", "),
                if missing.len() > 3 { ", ..." } else { "" }
            ));
        }
    }
    out
}

/// Why the pipeline's current definitions differ from those `entry` was built with.
fn definition_changes(pipeline: &Pipeline, entry: &Entry) -> Vec<String> {
    let mut out = Vec::new();
    if entry.population_hash != pipeline.population_hash {
        out.push("pipeline: the population changed".to_string());
    }
    let old: BTreeMap<&str, &str> = entry
        .features
        .iter()
        .map(|f| (f.name.as_str(), f.hash.as_str()))
        .collect();
    let new: BTreeMap<&str, &str> = pipeline
        .features
        .iter()
        .map(|f| (f.name.as_str(), f.hash.as_str()))
        .collect();
    let changed: Vec<&str> = new
        .iter()
        .filter(|(n, h)| old.get(*n).is_some_and(|o| o != *h))
        .map(|(n, _)| *n)
        .collect();
    let added: Vec<&str> = new
        .keys()
        .filter(|n| !old.contains_key(*n))
        .copied()
        .collect();
    let removed: Vec<&str> = old
        .keys()
        .filter(|n| !new.contains_key(*n))
        .copied()
        .collect();
    if !changed.is_empty() {
        out.push(format!(
            "pipeline: feature(s) changed: {}",
            changed.join(", ")
        ));
    }
    if !added.is_empty() {
        out.push(format!("pipeline: feature(s) added: {}", added.join(", ")));
    }
    if !removed.is_empty() {
        out.push(format!(
            "pipeline: feature(s) removed: {}",
            removed.join(", ")
        ));
    }
    if out.is_empty() {
        let old_order: Vec<&str> = entry.features.iter().map(|f| f.name.as_str()).collect();
        let new_order: Vec<&str> = pipeline.features.iter().map(|f| f.name.as_str()).collect();
        if old_order != new_order {
            out.push("pipeline: the order of the feature columns changed".to_string());
        }
    }
    out
}

/// Why the inputs now differ from those `entry` read, honouring each source's knowledge
/// mode (see the module documentation).
fn input_changes(entry: &Entry, now: &BTreeMap<String, SourceInputs>) -> Vec<String> {
    let mut out = Vec::new();
    for (source, cur) in now {
        let Some(old) = entry.inputs.get(source) else {
            out.push(format!("inputs: {source} was not read before"));
            continue;
        };
        let as_known = old.knowledge == "as-known";
        let days: BTreeSet<&String> = old.partitions.keys().chain(cur.partitions.keys()).collect();
        let mut parts = Vec::new();
        for d in days {
            let empty = Vec::new();
            let a: BTreeMap<&str, &FileFingerprint> = old
                .partitions
                .get(d)
                .unwrap_or(&empty)
                .iter()
                .map(|f| (f.file.as_str(), f))
                .collect();
            let b: BTreeMap<&str, &FileFingerprint> = cur
                .partitions
                .get(d)
                .unwrap_or(&empty)
                .iter()
                .map(|f| (f.file.as_str(), f))
                .collect();
            let added = b.keys().filter(|n| !a.contains_key(*n)).count();
            let removed = a.keys().filter(|n| !b.contains_key(*n)).count();
            let changed = b
                .iter()
                .filter(|(n, f)| a.get(*n).is_some_and(|o| o != *f))
                .count();
            let counts = |what: &[(usize, &str)]| -> String {
                what.iter()
                    .filter(|(n, _)| *n > 0)
                    .map(|(n, w)| format!("{n} file(s) {w}"))
                    .collect::<Vec<_>>()
                    .join(", ")
            };
            if as_known {
                if removed + changed > 0 {
                    parts.push(format!(
                        "dt={d} ({})",
                        counts(&[(changed, "changed"), (removed, "removed")])
                    ));
                }
            } else if added + removed + changed > 0 {
                parts.push(format!(
                    "dt={d} ({})",
                    counts(&[(added, "added"), (changed, "changed"), (removed, "removed")])
                ));
            }
        }
        if !parts.is_empty() {
            out.push(format!("inputs: {source} {}", parts.join(", ")));
        }
    }
    out
}

/// The default first day: the day after the latest first partition among the sources the
/// snapshots read (the first cutoff that sees a whole day of every log).
fn default_from(listings: &BTreeMap<String, Listing>) -> Option<NaiveDate> {
    listings
        .values()
        .filter_map(|l| complete::range(l).map(|r| r.0))
        .max()
        .map(|d| d + Duration::days(1))
}

/// The default last day: the latest day whose needed partitions have begun to land.
fn default_until(pipeline: &Pipeline, listings: &BTreeMap<String, Listing>) -> Option<NaiveDate> {
    let newest = listings
        .values()
        .filter_map(|l| complete::range(l).map(|r| r.1))
        .max()?;
    (-1..=2)
        .rev()
        .map(|k| newest + Duration::days(k))
        .find(|d| {
            let cutoff = daymark_engine::time::cutoff(pipeline.timezone, pipeline.cutoff_time, *d);
            complete::last_needed_partition(pipeline.timezone, cutoff) <= newest
        })
}

/// Works out the state of every day in `[from, until]` and the steps due.
///
/// `latest` holds the latest snapshot entries of this scope by day; `published` the days
/// whose snapshot file exists. Without `from`, the plan starts at the earliest day in the
/// ledger, else the day after the latest first partition of the sources; without `until`,
/// it ends at the latest day whose inputs have begun to land.
#[allow(clippy::too_many_arguments)]
pub fn plan(
    pipeline: &Pipeline,
    listings: &BTreeMap<String, Listing>,
    latest: &BTreeMap<NaiveDate, Entry>,
    published: &BTreeSet<NaiveDate>,
    mode: KnowledgeOverride,
    from: Option<NaiveDate>,
    until: Option<NaiveDate>,
    labels_available: bool,
) -> Plan {
    let from = from.or_else(|| {
        latest
            .keys()
            .next()
            .copied()
            .or_else(|| default_from(listings))
    });
    let until = until.or_else(|| default_until(pipeline, listings));
    let watermarks = listings
        .iter()
        .map(|(k, l)| (k.clone(), complete::watermark(l)))
        .collect();
    let mut days = Vec::new();
    if let (Some(a), Some(b)) = (from, until) {
        for day in a.iter_days().take_while(|d| *d <= b) {
            let entry = latest.get(&day).cloned();
            let waiting = waiting_for(pipeline, listings, day, mode);
            let state = match &entry {
                _ if !waiting.is_empty() => DayState::Pending(waiting),
                None => DayState::New,
                Some(e) if e.outcome != Outcome::Published => DayState::Failed(format!(
                    "last build {}: {}",
                    if e.outcome == Outcome::ChecksFailed {
                        "failed its checks"
                    } else {
                        "failed"
                    },
                    e.messages.join("; ")
                )),
                Some(e) => {
                    let mut why = definition_changes(pipeline, e);
                    why.extend(input_changes(e, &inputs_of(pipeline, listings, day, mode)));
                    if !published.contains(&day) {
                        why.push("output: the published snapshot is missing".into());
                    }
                    if why.is_empty() {
                        DayState::Built
                    } else {
                        DayState::Stale(why)
                    }
                }
            };
            days.push(DayStatus { day, state, entry });
        }
    }
    let mut steps: Vec<Step> = days
        .iter()
        .filter(|d| d.state.is_due())
        .map(|d| Step::Snapshot {
            day: d.day,
            why: match &d.state {
                DayState::New => "new".to_string(),
                s => format!("{}: {}", s.name(), s.reasons().join("; ")),
            },
        })
        .collect();
    if labels_available {
        let matured = matured_label_days(pipeline, listings, &days);
        if !matured.is_empty() {
            steps.push(Step::Labels { days: matured });
        }
    }
    Plan {
        scope: scope_of(mode).to_string(),
        from,
        until,
        days,
        steps,
        watermarks,
    }
}

/// Snapshot days (built or due) whose label window `(cutoff, cutoff + horizon + grace]`
/// lies within complete partitions of the label's source.
pub fn matured_label_days(
    pipeline: &Pipeline,
    listings: &BTreeMap<String, Listing>,
    days: &[DayStatus],
) -> Vec<NaiveDate> {
    let Some(label) = &pipeline.label else {
        return vec![];
    };
    let Some(listing) = listings.get(&label.source) else {
        return vec![];
    };
    let Some(w) = complete::watermark(listing) else {
        return vec![];
    };
    let span = label.horizon.0 as i64 + label.grace.0 as i64;
    days.iter()
        .filter(|d| {
            matches!(
                d.state,
                DayState::Built | DayState::New | DayState::Stale(_)
            )
        })
        .map(|d| d.day)
        .filter(|d| {
            let end = daymark_engine::time::cutoff(
                pipeline.timezone,
                pipeline.cutoff_time,
                *d + Duration::days(span),
            );
            complete::last_needed_partition(pipeline.timezone, end) <= w
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ledger::{Entry, Kind, RunIdentity};
    use daymark_store::object_store::path::Path as StorePath;
    use daymark_store::DataFile;

    fn pipeline(expr: &str) -> Pipeline {
        let text = format!(
            "daymark: 1\nname: t\ntimezone: UTC\nkey: k\nsources:\n  s:\n    location: /nowhere\n    event_time: t\n    arrival_time: a\npopulation:\n  recent_activity:\n    source: s\n    within: 3d\nfeatures:\n  - name: n\n    source: s\n    agg: count\n    window: 2d\n  - name: v\n    source: s\n    agg: sum\n    expr: {expr}\n    window: 2d\n    fill: 0\n"
        );
        daymark_spec::load_str(&text, None).unwrap()
    }

    fn day(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    fn file(d: &str, name: &str, size: u64) -> DataFile {
        DataFile {
            path: StorePath::from(format!("s/dt={d}/{name}")),
            size,
            modified: chrono::DateTime::from_timestamp(1_700_000_000, 0).unwrap(),
            etag: None,
        }
    }

    /// Ten complete partitions, one file each.
    fn listing() -> Listing {
        let mut l = Listing::default();
        for d in day("2026-03-01").iter_days().take(10) {
            l.days
                .insert(d, vec![file(&d.to_string(), "a.parquet", 100)]);
            l.markers.insert(d, vec![complete::COMPLETE_MARKER.into()]);
        }
        l
    }

    /// Ledger entries as a run over `days` would write them.
    fn built(
        p: &Pipeline,
        l: &BTreeMap<String, Listing>,
        days: &[NaiveDate],
        mode: KnowledgeOverride,
    ) -> BTreeMap<NaiveDate, Entry> {
        let run = RunIdentity::current();
        days.iter()
            .map(|d| {
                let mut e = Entry::new(Kind::Snapshot, *d, scope_of(mode), p, &run);
                e.inputs = inputs_of(p, l, *d, mode);
                (*d, e)
            })
            .collect()
    }

    fn states(plan: &Plan) -> Vec<(String, &'static str)> {
        plan.days
            .iter()
            .map(|d| (d.day.to_string(), d.state.name()))
            .collect()
    }

    #[test]
    fn new_built_pending_and_stale_days() {
        let p = pipeline("1");
        let mut l = BTreeMap::from([("s".to_string(), listing())]);
        let (from, until) = (Some(day("2026-03-05")), Some(day("2026-03-12")));
        // In UTC with a 00:00 cutoff, snapshot D needs partitions up to D-1.
        let plan0 = plan(
            &p,
            &l,
            &BTreeMap::new(),
            &BTreeSet::new(),
            None,
            from,
            until,
            false,
        );
        let s = states(&plan0);
        assert_eq!(s[0], ("2026-03-05".into(), "new"));
        assert_eq!(s[6], ("2026-03-11".into(), "new"));
        assert_eq!(s[7], ("2026-03-12".into(), "pending"));
        assert!(plan0.days[7].state.reasons()[0].contains("dt=2026-03-11"));

        let days: Vec<NaiveDate> = plan0.snapshot_days();
        let ledger = built(&p, &l, &days, None);
        let published: BTreeSet<NaiveDate> = days.iter().copied().collect();
        let again = plan(&p, &l, &ledger, &published, None, from, until, false);
        assert!(again.snapshot_days().is_empty());

        // A late file in dt=2026-03-06 (as-known): nothing stale.
        let part = l
            .get_mut("s")
            .unwrap()
            .days
            .get_mut(&day("2026-03-06"))
            .unwrap();
        part.push(file("2026-03-06", "b.parquet", 50));
        let late = plan(&p, &l, &ledger, &published, None, from, until, false);
        assert!(late.snapshot_days().is_empty(), "{:?}", states(&late));
        // The same late file in event-time mode: the days whose window read dt=2026-03-06.
        let et = Some(Knowledge::EventTime);
        let ledger_et = built(
            &p,
            &{
                let mut before = l.clone();
                before
                    .get_mut("s")
                    .unwrap()
                    .days
                    .get_mut(&day("2026-03-06"))
                    .unwrap()
                    .pop();
                before
            },
            &days,
            et,
        );
        let late_et = plan(&p, &l, &ledger_et, &published, et, from, until, false);
        // Snapshot D reads partitions D-3-1 .. D-1 (3-day population window, one day slack).
        assert_eq!(
            late_et.snapshot_days(),
            vec![
                day("2026-03-07"),
                day("2026-03-08"),
                day("2026-03-09"),
                day("2026-03-10")
            ]
        );
        assert!(late_et.days[2].state.reasons()[0].contains("dt=2026-03-06 (1 file(s) added)"));
        // A changed file (history rewritten) makes as-known snapshots stale too.
        l.get_mut("s")
            .unwrap()
            .days
            .get_mut(&day("2026-03-06"))
            .unwrap()[0]
            .size = 101;
        let rewritten = plan(&p, &l, &ledger, &published, None, from, until, false);
        assert_eq!(rewritten.snapshot_days().len(), 4);
        assert!(rewritten.days[2].state.reasons()[0].contains("1 file(s) changed"));
    }

    #[test]
    fn a_changed_feature_is_named_and_a_missing_file_noticed() {
        let p = pipeline("1");
        let l = BTreeMap::from([("s".to_string(), listing())]);
        let days = vec![day("2026-03-05"), day("2026-03-06")];
        let ledger = built(&p, &l, &days, None);
        let published: BTreeSet<NaiveDate> = [day("2026-03-05")].into();
        let (from, until) = (Some(days[0]), Some(days[1]));
        let changed = pipeline("2");
        let plan1 = plan(&changed, &l, &ledger, &published, None, from, until, false);
        assert_eq!(
            plan1.days[0].state,
            DayState::Stale(vec!["pipeline: feature(s) changed: v".into()])
        );
        assert_eq!(
            plan1.days[1].state,
            DayState::Stale(vec![
                "pipeline: feature(s) changed: v".into(),
                "output: the published snapshot is missing".into()
            ])
        );
    }
}
