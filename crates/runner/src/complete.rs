//! When a source's day partition is complete, and which partitions a cutoff needs.
//!
//! The rule lives here, in one small module, so that it can be replaced by the project's
//! watermark function without touching the planner:
//!
//! - A partition is complete when it holds a `_complete` marker file (written by whatever
//!   loads the log once a day's on-time rows are all in).
//! - A source that has no `_complete` marker anywhere is judged by its folders instead: a
//!   partition is complete once a later day's partition exists (the loader has moved on).
//! - The watermark of a source is the last day W such that every partition from the
//!   source's first one up to W is complete.

use chrono::{DateTime, Duration, NaiveDate, NaiveDateTime, NaiveTime, Utc};
use chrono_tz::Tz;
use daymark_store::Listing;

/// Name of the marker file that says a day partition is complete.
pub const COMPLETE_MARKER: &str = "_complete";

/// The last day partition that can hold an event from before `cutoff`.
///
/// Rows are filed under the partition of their event day, counted in UTC or in the
/// pipeline's zone; a partition can hold events before the cutoff only if it starts before
/// it, in either reckoning.
pub fn last_needed_partition(tz: Tz, cutoff: DateTime<Utc>) -> NaiveDate {
    let last = |t: NaiveDateTime| {
        if t.time() == NaiveTime::MIN {
            t.date() - Duration::days(1)
        } else {
            t.date()
        }
    };
    last(cutoff.naive_utc()).max(last(cutoff.with_timezone(&tz).naive_local()))
}

/// Whether the source uses `_complete` markers at all.
pub fn uses_markers(listing: &Listing) -> bool {
    listing
        .markers
        .values()
        .any(|names| names.iter().any(|n| n == COMPLETE_MARKER))
}

/// First and last day partition seen (with files or markers).
pub fn range(listing: &Listing) -> Option<(NaiveDate, NaiveDate)> {
    let days = || listing.days.keys().chain(listing.markers.keys());
    Some((*days().min()?, *days().max()?))
}

/// Whether partition `day` is complete (see the module documentation).
pub fn is_complete(listing: &Listing, day: NaiveDate) -> bool {
    if uses_markers(listing) {
        listing
            .markers
            .get(&day)
            .is_some_and(|names| names.iter().any(|n| n == COMPLETE_MARKER))
    } else {
        range(listing).is_some_and(|(_, last)| last > day)
    }
}

/// Partitions from `from` (default: the source's first) to `to`, inclusive, that are not
/// complete yet. Days before the source's first partition are not asked for: a window may
/// reach back before a log began.
pub fn incomplete(listing: &Listing, from: Option<NaiveDate>, to: NaiveDate) -> Vec<NaiveDate> {
    let Some((first, _)) = range(listing) else {
        return vec![to];
    };
    let from = from.map_or(first, |f| f.max(first));
    from.iter_days()
        .take_while(|d| *d <= to)
        .filter(|d| !is_complete(listing, *d))
        .collect()
}

/// The source's watermark: the last day up to which every partition is complete.
pub fn watermark(listing: &Listing) -> Option<NaiveDate> {
    let (first, last) = range(listing)?;
    let mut w = None;
    for d in first.iter_days().take_while(|d| *d <= last) {
        if !is_complete(listing, d) {
            break;
        }
        w = Some(d);
    }
    w
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    fn day(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    #[test]
    fn partitions_a_cutoff_needs() {
        // Chicago midnight is 05:00 or 06:00 UTC: UTC-filed partition D holds earlier events.
        let tz: Tz = "America/Chicago".parse().unwrap();
        let cutoff = Utc.with_ymd_and_hms(2026, 3, 10, 5, 0, 0).unwrap();
        assert_eq!(last_needed_partition(tz, cutoff), day("2026-03-10"));
        // In UTC with a midnight cutoff, day D's partition starts at the cutoff.
        let utc: Tz = "UTC".parse().unwrap();
        let cutoff = Utc.with_ymd_and_hms(2026, 3, 10, 0, 0, 0).unwrap();
        assert_eq!(last_needed_partition(utc, cutoff), day("2026-03-09"));
        // Tokyo midnight is 15:00 UTC the day before; local partition D-1 and UTC D-1.
        let tokyo: Tz = "Asia/Tokyo".parse().unwrap();
        let cutoff = Utc.with_ymd_and_hms(2026, 3, 9, 15, 0, 0).unwrap();
        assert_eq!(last_needed_partition(tokyo, cutoff), day("2026-03-09"));
    }

    #[test]
    fn markers_and_watermarks() {
        let mut l = Listing::default();
        for d in ["2026-03-01", "2026-03-02", "2026-03-04"] {
            l.markers.insert(day(d), vec![COMPLETE_MARKER.into()]);
        }
        l.days.insert(day("2026-03-03"), vec![]);
        assert_eq!(watermark(&l), Some(day("2026-03-02")));
        assert_eq!(
            incomplete(&l, Some(day("2026-02-20")), day("2026-03-05")),
            vec![day("2026-03-03"), day("2026-03-05")]
        );
        // Without any marker, a partition is complete once a later one exists.
        let mut l = Listing::default();
        l.days.insert(day("2026-03-01"), vec![]);
        l.days.insert(day("2026-03-02"), vec![]);
        assert!(is_complete(&l, day("2026-03-01")));
        assert!(!is_complete(&l, day("2026-03-02")));
        assert_eq!(watermark(&l), Some(day("2026-03-01")));
    }
}
