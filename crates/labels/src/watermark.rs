//! Watermarks: the instant up to which a source is known to be complete.
//!
//! A source's watermark is the end of its newest day partition that carries a `_complete`
//! marker file. When no partition carries one, it is the end of the newest day partition
//! minus the source's `watermark_lag` (default 1 day). Day partitions are UTC days (the
//! demo world and the store file rows under the UTC day of their event time), so the end
//! of partition `dt=D` is D+1 00:00 UTC. Everything with an event time before the
//! watermark is taken to have landed.

use chrono::{DateTime, Duration, NaiveDate, Utc};
use daymark_engine::SourceReport;
use daymark_spec::Pipeline;
use daymark_store::Listing;
use serde_json::json;
use std::collections::BTreeMap;

/// Name of the file that marks a day partition as complete.
pub const COMPLETE_MARKER: &str = "_complete";

/// Lag used when a source declares none and has no completeness markers.
pub const DEFAULT_LAG_DAYS: u32 = 1;

/// Why a watermark has its value.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum WatermarkBasis {
    /// The newest day partition with a `_complete` marker.
    Marker {
        /// That partition's day.
        day: NaiveDate,
    },
    /// No markers: the newest day partition with data, minus a lag.
    Lag {
        /// The newest day partition.
        newest_day: NaiveDate,
        /// The lag in days.
        lag_days: u32,
    },
}

/// The instant up to which a source is complete, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Watermark {
    /// Everything with an event time before this instant has landed.
    pub at: DateTime<Utc>,
    /// How it was found.
    pub basis: WatermarkBasis,
}

impl Watermark {
    /// One line for people.
    pub fn describe(&self) -> String {
        let at = self.at.format("%Y-%m-%dT%H:%M:%SZ");
        match &self.basis {
            WatermarkBasis::Marker { day } => {
                format!("{at} (end of dt={day}, the newest partition marked {COMPLETE_MARKER})")
            }
            WatermarkBasis::Lag {
                newest_day,
                lag_days,
            } => format!(
                "{at} (end of the newest partition dt={newest_day} minus a {lag_days}d lag; no {COMPLETE_MARKER} markers)"
            ),
        }
    }

    /// As JSON: `at`, `basis` (`marker` or `lag`), and the day and lag behind it.
    pub fn to_json(&self) -> serde_json::Value {
        let at = self.at.format("%Y-%m-%dT%H:%M:%SZ").to_string();
        match &self.basis {
            WatermarkBasis::Marker { day } => {
                json!({"at": at, "basis": "marker", "day": day.to_string()})
            }
            WatermarkBasis::Lag {
                newest_day,
                lag_days,
            } => {
                json!({"at": at, "basis": "lag", "day": newest_day.to_string(), "lag_days": lag_days})
            }
        }
    }
}

/// The end of day partition `day`: the next day's 00:00 UTC.
pub fn partition_end(day: NaiveDate) -> DateTime<Utc> {
    (day + Duration::days(1))
        .and_time(chrono::NaiveTime::MIN)
        .and_utc()
}

/// The watermark of a source from its listing; `None` when it has no partitions at all.
pub fn watermark(listing: &Listing, lag_days: u32) -> Option<Watermark> {
    let marked = listing
        .markers
        .iter()
        .filter(|(_, names)| names.iter().any(|n| n == COMPLETE_MARKER))
        .map(|(d, _)| *d)
        .max();
    if let Some(day) = marked {
        return Some(Watermark {
            at: partition_end(day),
            basis: WatermarkBasis::Marker { day },
        });
    }
    let newest_day = *listing.days.keys().max()?;
    Some(Watermark {
        at: partition_end(newest_day) - Duration::days(lag_days as i64),
        basis: WatermarkBasis::Lag {
            newest_day,
            lag_days,
        },
    })
}

/// The watermark of every source of `pipeline` (from `daymark_engine::inspect_sources`).
pub fn source_watermarks(
    pipeline: &Pipeline,
    reports: &BTreeMap<String, SourceReport>,
) -> BTreeMap<String, Option<Watermark>> {
    pipeline
        .sources
        .iter()
        .map(|(name, src)| {
            let lag = src
                .spec
                .watermark_lag
                .map(|d| d.0)
                .unwrap_or(DEFAULT_LAG_DAYS);
            let w = reports.get(name).and_then(|r| watermark(&r.listing, lag));
            (name.clone(), w)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use daymark_store::DataFile;

    fn d(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    fn file(day: &str) -> DataFile {
        DataFile {
            path: format!("x/dt={day}/a.parquet").into(),
            size: 1,
            modified: Utc::now(),
            etag: None,
        }
    }

    #[test]
    fn marker_wins_over_newer_unmarked_data() {
        let mut l = Listing::default();
        l.days.insert(d("2026-03-01"), vec![file("2026-03-01")]);
        l.days.insert(d("2026-03-03"), vec![file("2026-03-03")]);
        l.markers
            .insert(d("2026-03-02"), vec![COMPLETE_MARKER.to_string()]);
        l.markers
            .insert(d("2026-03-03"), vec!["_other".to_string()]);
        let w = watermark(&l, 1).unwrap();
        assert_eq!(w.at.to_rfc3339(), "2026-03-03T00:00:00+00:00");
        assert_eq!(
            w.basis,
            WatermarkBasis::Marker {
                day: d("2026-03-02")
            }
        );
    }

    #[test]
    fn without_markers_the_lag_applies() {
        let mut l = Listing::default();
        l.days.insert(d("2026-03-03"), vec![file("2026-03-03")]);
        assert_eq!(
            watermark(&l, 1).unwrap().at.to_rfc3339(),
            "2026-03-03T00:00:00+00:00"
        );
        assert_eq!(
            watermark(&l, 0).unwrap().at.to_rfc3339(),
            "2026-03-04T00:00:00+00:00"
        );
        assert_eq!(
            watermark(&l, 3).unwrap().at.to_rfc3339(),
            "2026-03-01T00:00:00+00:00"
        );
        assert!(watermark(&Listing::default(), 1).is_none());
    }
}
