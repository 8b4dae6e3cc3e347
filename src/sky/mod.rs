//! Time and sky context, pure. For now: which night a moment belongs to.

use chrono::{DateTime, Duration, TimeZone, Utc};
use chrono_tz::Tz;

/// The night label: the local date (in the site's zone) of the evening on which the
/// night began. The label rolls over at local noon, so 23:30 and 04:10 of one night share
/// a label, and noon starts the next.
pub fn night_label(unix_seconds: f64, tz: Tz) -> Option<String> {
    let secs = unix_seconds.floor();
    let nanos = ((unix_seconds - secs) * 1e9) as u32;
    let utc: DateTime<Utc> = Utc.timestamp_opt(secs as i64, nanos).single()?;
    let local = utc.with_timezone(&tz) - Duration::hours(12);
    Some(local.format("%Y-%m-%d").to_string())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::frame::header::parse_iso_time;

    fn label(iso: &str, tz: &str) -> String {
        night_label(parse_iso_time(iso).unwrap(), tz.parse().unwrap()).unwrap()
    }

    #[test]
    fn a_night_keeps_its_evening_date_across_midnight() {
        // Europe/Madrid is UTC+1 in March (before the last-Sunday change, common knowledge).
        assert_eq!(label("2026-03-14T21:30:00", "Europe/Madrid"), "2026-03-14");
        assert_eq!(label("2026-03-15T03:10:00", "Europe/Madrid"), "2026-03-14");
        // 10:59 UTC = 11:59 local: still the same night; 11:01 UTC = 12:01: the next.
        assert_eq!(label("2026-03-15T10:59:00", "Europe/Madrid"), "2026-03-14");
        assert_eq!(label("2026-03-15T11:01:00", "Europe/Madrid"), "2026-03-15");
    }

    #[test]
    fn zones_far_from_utc() {
        // Pacific/Auckland is UTC+13 in January (daylight time, common knowledge):
        // 2026-01-10T08:00Z is 21:00 local on the 10th.
        assert_eq!(
            label("2026-01-10T08:00:00", "Pacific/Auckland"),
            "2026-01-10"
        );
        // America/Santiago, UTC−3 in January: 02:00Z on the 11th is 23:00 on the 10th.
        assert_eq!(
            label("2026-01-11T02:00:00", "America/Santiago"),
            "2026-01-10"
        );
    }
}
