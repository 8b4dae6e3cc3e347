//! When the daemon's timed work is due, decided from the time given: the morning summary
//! and whether the sky is dark. Pure; the daemon supplies the clock.

use crate::config::SummaryTime;
use crate::night::judge::Site;

/// The night whose morning summary is due at `now`, if one is: at the configured local
/// time of day, or 30 minutes after astronomical dawn (Sun at −18°), and only in the
/// morning (before local noon, when the morning still belongs to the night).
pub fn summary_due(
    when: SummaryTime,
    now: f64,
    tz: chrono_tz::Tz,
    site: Option<Site>,
) -> Option<String> {
    use chrono::Timelike;
    let night = crate::sky::night_label(now, tz)?;
    let local = chrono::DateTime::from_timestamp(now as i64, 0)?.with_timezone(&tz);
    let minutes_now = local.hour() * 60 + local.minute();
    if minutes_now >= 12 * 60 {
        return None;
    }
    let due = match when {
        SummaryTime::Dawn => {
            let (lat, lon, _) = site?;
            let evening = now - 86_400.0 * 0.75;
            crate::sky::sun_crossings(evening, -18.0, lat, lon)
                .1
                .is_some_and(|dawn| now >= dawn + 1800.0)
        }
        SummaryTime::At(h, m) => minutes_now >= h * 60 + m,
    };
    due.then_some(night)
}

/// Whether the Sun is below astronomical twilight (−18°) at `now`; `None` without a site.
pub fn dark(now: f64, site: Option<Site>) -> Option<bool> {
    site.map(|(lat, lon, _)| {
        crate::sky::sun_altitude(crate::sky::julian_date(now), lat, lon) < -18.0
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::frame::header::parse_iso_time;

    const SITE: Site = (39.4172, -2.0865, 1210.0);
    const MADRID: chrono_tz::Tz = chrono_tz::Europe::Madrid;

    #[test]
    fn a_summary_at_a_time_of_day_is_due_from_that_time_until_noon() {
        let at = |iso: &str| parse_iso_time(iso).unwrap();
        // 06:29 and 06:30 local on 15 March (UTC+1), and noon.
        assert_eq!(
            summary_due(
                SummaryTime::At(6, 30),
                at("2026-03-15T05:29:00"),
                MADRID,
                None
            ),
            None
        );
        assert_eq!(
            summary_due(
                SummaryTime::At(6, 30),
                at("2026-03-15T05:30:00"),
                MADRID,
                None
            )
            .as_deref(),
            Some("2026-03-14")
        );
        assert_eq!(
            summary_due(
                SummaryTime::At(6, 30),
                at("2026-03-15T11:00:00"),
                MADRID,
                None
            ),
            None
        );
    }

    #[test]
    fn a_summary_at_dawn_waits_half_an_hour_after_astronomical_dawn() {
        // Astronomical dawn at the site on 15 March 2026, by the project's own Sun
        // (which agrees with astropy within 5 s, tests/crosscheck/sky_crosscheck.py).
        let evening = parse_iso_time("2026-03-14T18:00:00").unwrap();
        let dawn = crate::sky::sun_crossings(evening, -18.0, SITE.0, SITE.1)
            .1
            .unwrap();
        assert_eq!(
            summary_due(SummaryTime::Dawn, dawn + 1799.0, MADRID, Some(SITE)),
            None
        );
        assert_eq!(
            summary_due(SummaryTime::Dawn, dawn + 1800.0, MADRID, Some(SITE)).as_deref(),
            Some("2026-03-14")
        );
        assert_eq!(
            summary_due(SummaryTime::Dawn, dawn + 1800.0, MADRID, None),
            None
        );
        assert_eq!(dark(dawn - 600.0, Some(SITE)), Some(true));
        assert_eq!(dark(dawn + 600.0, Some(SITE)), Some(false));
        assert_eq!(dark(dawn, None), None);
    }
}
