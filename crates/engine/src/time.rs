//! Cutoffs and window bounds in the pipeline's time zone.
//!
//! Snapshot D's cutoff is D at `cutoff_time` in the pipeline time zone. A window of W days
//! starts at (D - W) at the same wall time, so across a daylight-saving change a window
//! covers 23 or 25 hours for that day, never a shifted day boundary.

use chrono::{DateTime, Duration, NaiveDate, NaiveTime, Offset, TimeZone, Utc};
use chrono_tz::Tz;

/// The UTC instant of wall time `time` on `day` in `tz`.
///
/// A wall time skipped by a spring-forward change maps to the first instant after the gap;
/// a repeated wall time (fall back) maps to its first occurrence.
pub fn local_instant(tz: Tz, day: NaiveDate, time: NaiveTime) -> DateTime<Utc> {
    let naive = day.and_time(time);
    if let Some(t) = tz.from_local_datetime(&naive).earliest() {
        return t.with_timezone(&Utc);
    }
    // In a gap: step forward a minute at a time (gaps are at most a few hours).
    let mut probe = naive;
    for _ in 0..(24 * 60) {
        probe += Duration::minutes(1);
        if let Some(t) = tz.from_local_datetime(&probe).earliest() {
            return t.with_timezone(&Utc);
        }
    }
    naive.and_utc()
}

/// The cutoff instant of snapshot `day`.
pub fn cutoff(tz: Tz, time: NaiveTime, day: NaiveDate) -> DateTime<Utc> {
    local_instant(tz, day, time)
}

/// The start of a `days`-day window ending at the cutoff of `day`.
pub fn window_start(tz: Tz, time: NaiveTime, day: NaiveDate, days: u32) -> DateTime<Utc> {
    local_instant(tz, day - Duration::days(days as i64), time)
}

/// Seconds east of UTC of `tz` at instant `t`.
pub fn utc_offset(tz: Tz, t: DateTime<Utc>) -> i32 {
    tz.offset_from_utc_datetime(&t.naive_utc())
        .fix()
        .local_minus_utc()
}

/// The UTC offsets of `tz` over `[from, to)`: the offset at `from` (seconds east of UTC),
/// then each change inside the range as (first instant of the new offset, new offset).
///
/// The time-zone database gives offsets, not changes: this probes every quarter of an hour
/// and finds a change to the second by bisection. Two changes less than a quarter of an
/// hour apart would be missed; the database has none since 1970 (common knowledge, from
/// memory; the tests check the changes of several zones against the offsets).
pub fn offset_changes(
    tz: Tz,
    from: DateTime<Utc>,
    to: DateTime<Utc>,
) -> (i32, Vec<(DateTime<Utc>, i32)>) {
    let first = utc_offset(tz, from);
    let (mut at, mut current) = (from, first);
    let mut changes = Vec::new();
    while at < to {
        let next = (at + Duration::minutes(15)).min(to);
        if utc_offset(tz, next) != current {
            // The change is in (at, next]: bisect, in whole seconds (changes are at whole
            // seconds), to the first second of the new offset.
            let second = |s: i64| DateTime::from_timestamp(s, 0).unwrap_or(next);
            let (mut lo, mut hi) = (at.timestamp(), next.timestamp());
            while hi - lo > 1 {
                let mid = lo + (hi - lo) / 2;
                if utc_offset(tz, second(mid)) == current {
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            let hi = second(hi);
            current = utc_offset(tz, hi);
            if hi < to {
                changes.push((hi, current));
            }
        }
        at = next;
    }
    (first, changes)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> NaiveDate {
        s.parse().unwrap()
    }

    /// The offsets from [`offset_changes`] (the first plus each change) equal the zone's
    /// offset every 7 minutes of 2024-2026, and each change is the first second of its
    /// offset, in zones with changes of an hour, of half an hour (Lord Howe), none
    /// (Kolkata), and a zone that dropped daylight saving in 2019 (Sao Paulo).
    #[test]
    fn offset_changes_match_the_zone_offsets() {
        let utc = |s: &str| s.parse::<DateTime<Utc>>().unwrap();
        let (from, to) = (utc("2024-01-01T00:00:00Z"), utc("2027-01-01T00:00:00Z"));
        for zone in [
            "America/Chicago",
            "Europe/Lisbon",
            "Australia/Lord_Howe",
            "Asia/Kolkata",
            "America/Sao_Paulo",
        ] {
            let tz: Tz = zone.parse().unwrap();
            let (first, changes) = offset_changes(tz, from, to);
            let expected_changes = match zone {
                "Asia/Kolkata" | "America/Sao_Paulo" => 0,
                _ => 6,
            };
            assert_eq!(changes.len(), expected_changes, "{zone}: {changes:?}");
            let mut t = from;
            let (mut offset, mut next) = (first, 0);
            while t < to {
                while next < changes.len() && changes[next].0 <= t {
                    offset = changes[next].1;
                    next += 1;
                }
                assert_eq!(offset, utc_offset(tz, t), "{zone} at {t}");
                t += Duration::minutes(7);
            }
            for (at, new) in &changes {
                assert_eq!(utc_offset(tz, *at), *new);
                assert_ne!(
                    utc_offset(tz, *at - Duration::seconds(1)),
                    *new,
                    "{zone} {at}"
                );
            }
        }
    }

    #[test]
    fn windows_across_daylight_saving_are_calendar_days() {
        // America/Chicago moved from UTC-6 to UTC-5 at 2026-03-08 02:00 local (US rule:
        // second Sunday of March; common knowledge of the IANA rules).
        let tz: Tz = "America/Chicago".parse().unwrap();
        let midnight = NaiveTime::MIN;
        let c = cutoff(tz, midnight, d("2026-03-09"));
        assert_eq!(c.to_rfc3339(), "2026-03-09T05:00:00+00:00");
        let s = window_start(tz, midnight, d("2026-03-09"), 1);
        assert_eq!(s.to_rfc3339(), "2026-03-08T06:00:00+00:00");
        assert_eq!((c - s).num_hours(), 23);
        // A cutoff inside the gap moves to the first instant after it.
        let gap = cutoff(
            tz,
            NaiveTime::from_hms_opt(2, 30, 0).unwrap(),
            d("2026-03-08"),
        );
        assert_eq!(gap.to_rfc3339(), "2026-03-08T08:00:00+00:00");
    }
}
