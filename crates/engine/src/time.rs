//! Cutoffs and window bounds in the pipeline's time zone.
//!
//! Snapshot D's cutoff is D at `cutoff_time` in the pipeline time zone. A window of W days
//! starts at (D - W) at the same wall time, so across a daylight-saving change a window
//! covers 23 or 25 hours for that day, never a shifted day boundary.

use chrono::{DateTime, Duration, NaiveDate, NaiveTime, TimeZone, Utc};
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

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> NaiveDate {
        s.parse().unwrap()
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
