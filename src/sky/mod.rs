//! Time and sky context, pure: which night a moment belongs to, where the Sun and the Moon
//! are, twilight, a target's altitude and airmass, and precession of header coordinates
//! to J2000. Low-precision published formulas, enough to grade frames (a few hundredths of
//! a degree for the Sun, a few tenths for the Moon); not for pointing a telescope.

use chrono::{DateTime, Duration, TimeZone, Utc};
use chrono_tz::Tz;
use serde::Serialize;

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

/// Julian Date (UTC-based; the difference from TT, about a minute, is below the
/// precision of these formulas).
pub fn julian_date(unix_seconds: f64) -> f64 {
    unix_seconds / 86_400.0 + 2_440_587.5
}

fn norm360(x: f64) -> f64 {
    x.rem_euclid(360.0)
}

/// Geocentric apparent RA and Dec of the Sun, degrees: the low-precision formula of the
/// Astronomical Almanac (section C; about 0.01° from 1950 to 2050).
pub fn sun_radec(jd: f64) -> (f64, f64) {
    let n = jd - 2_451_545.0;
    let l = norm360(280.460 + 0.985_647_4 * n);
    let g = norm360(357.528 + 0.985_600_3 * n).to_radians();
    let lambda = (l + 1.915 * g.sin() + 0.020 * (2.0 * g).sin()).to_radians();
    let eps = (23.439 - 0.000_000_4 * n).to_radians();
    let ra = (eps.cos() * lambda.sin()).atan2(lambda.cos()).to_degrees();
    let dec = (eps.sin() * lambda.sin()).asin().to_degrees();
    (norm360(ra), dec)
}

/// Geocentric RA, Dec (degrees) and horizontal parallax (degrees) of the Moon: the
/// low-precision series of the Astronomical Almanac (section D; about 0.3° in longitude,
/// 0.2° in latitude), from memory of its coefficients.
pub fn moon_radec(jd: f64) -> (f64, f64, f64) {
    let t = (jd - 2_451_545.0) / 36_525.0;
    let s = |a: f64, b: f64| (a + b * t).to_radians().sin();
    let c = |a: f64, b: f64| (a + b * t).to_radians().cos();
    let lambda = 218.32 + 481_267.881 * t + 6.29 * s(135.0, 477_198.87)
        - 1.27 * s(259.3, -413_335.36)
        + 0.66 * s(235.7, 890_534.22)
        + 0.21 * s(269.9, 954_397.74)
        - 0.19 * s(357.5, 35_999.05)
        - 0.11 * s(186.5, 966_404.03);
    let beta = 5.13 * s(93.3, 483_202.02) + 0.28 * s(228.2, 960_400.89)
        - 0.28 * s(318.3, 6_003.15)
        - 0.17 * s(217.6, -407_332.21);
    let parallax = 0.9508
        + 0.0518 * c(135.0, 477_198.87)
        + 0.0095 * c(259.3, -413_335.36)
        + 0.0078 * c(235.7, 890_534.22)
        + 0.0028 * c(269.9, 954_397.74);
    let (l, b) = (lambda.to_radians(), beta.to_radians());
    let eps = (23.439_291 - 0.013_004_2 * t).to_radians();
    let x = b.cos() * l.cos();
    let y = eps.cos() * b.cos() * l.sin() - eps.sin() * b.sin();
    let z = eps.sin() * b.cos() * l.sin() + eps.cos() * b.sin();
    (
        norm360(y.atan2(x).to_degrees()),
        z.asin().to_degrees(),
        parallax,
    )
}

/// Greenwich mean sidereal time, degrees (IAU 1982 expression in UT1 ≈ UTC).
pub fn gmst_deg(jd: f64) -> f64 {
    let d = jd - 2_451_545.0;
    let t = d / 36_525.0;
    norm360(
        280.460_618_37 + 360.985_647_366_29 * d + 0.000_387_933 * t * t - t * t * t / 38_710_000.0,
    )
}

/// Altitude and azimuth (degrees; azimuth from north through east) of (ra, dec) of date.
pub fn alt_az(ra: f64, dec: f64, jd: f64, lat: f64, lon_east: f64) -> (f64, f64) {
    let h = (gmst_deg(jd) + lon_east - ra).to_radians();
    let (phi, d) = (lat.to_radians(), dec.to_radians());
    let alt = (phi.sin() * d.sin() + phi.cos() * d.cos() * h.cos())
        .clamp(-1.0, 1.0)
        .asin();
    let az = (-d.cos() * h.sin()).atan2(d.sin() * phi.cos() - d.cos() * h.cos() * phi.sin());
    (alt.to_degrees(), norm360(az.to_degrees()))
}

/// The Sun's geometric altitude (no refraction), degrees.
pub fn sun_altitude(jd: f64, lat: f64, lon_east: f64) -> f64 {
    let (ra, dec) = sun_radec(jd);
    alt_az(ra, dec, jd, lat, lon_east).0
}

/// The Moon's topocentric altitude (parallax applied, no refraction), degrees.
pub fn moon_altitude(jd: f64, lat: f64, lon_east: f64) -> f64 {
    let (ra, dec, parallax) = moon_radec(jd);
    let geo = alt_az(ra, dec, jd, lat, lon_east).0;
    // Parallax in altitude: p·cos(alt) for a spherical Earth.
    geo - parallax * geo.to_radians().cos()
}

/// Illuminated fraction of the Moon from the Sun–Moon elongation (Meeus, Astronomical
/// Algorithms, ch. 48, with the phase angle taken as 180° − elongation).
pub fn moon_illumination(jd: f64) -> f64 {
    let (sr, sd) = sun_radec(jd);
    let (mr, md, _) = moon_radec(jd);
    let (sr, sd, mr, md) = (
        sr.to_radians(),
        sd.to_radians(),
        mr.to_radians(),
        md.to_radians(),
    );
    let cos_e = sd.sin() * md.sin() + sd.cos() * md.cos() * (sr - mr).cos();
    (1.0 - cos_e) / 2.0
}

/// Relative airmass at an apparent altitude (degrees): Kasten & Young (1989, Appl. Opt.
/// 28, 4735), X = 1 / (sin h + 0.50572 (h + 6.07995°)^−1.6364).
pub fn airmass(alt_deg: f64) -> Option<f64> {
    (alt_deg > -1.0)
        .then(|| 1.0 / (alt_deg.to_radians().sin() + 0.50572 * (alt_deg + 6.07995).powf(-1.6364)))
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Twilight {
    Day,
    Civil,
    Nautical,
    Astronomical,
    Night,
}

/// Twilight class from the Sun's altitude: civil to −6°, nautical to −12°, astronomical
/// to −18° (common practice).
pub fn twilight(sun_alt: f64) -> Twilight {
    match sun_alt {
        a if a > 0.0 => Twilight::Day,
        a if a > -6.0 => Twilight::Civil,
        a if a > -12.0 => Twilight::Nautical,
        a if a > -18.0 => Twilight::Astronomical,
        _ => Twilight::Night,
    }
}

/// When the Sun crosses `alt` going down after `start` and going up after that, within
/// 24 hours (Unix seconds, to about a second); `None` for a night it never crosses.
pub fn sun_crossings(
    start_unix: f64,
    alt: f64,
    lat: f64,
    lon_east: f64,
) -> (Option<f64>, Option<f64>) {
    let f = |t: f64| sun_altitude(julian_date(t), lat, lon_east) - alt;
    let refine = |mut a: f64, mut b: f64| {
        for _ in 0..40 {
            let m = 0.5 * (a + b);
            if (f(a) > 0.0) == (f(m) > 0.0) {
                a = m;
            } else {
                b = m;
            }
        }
        0.5 * (a + b)
    };
    let step = 600.0;
    let mut down = None;
    let mut up = None;
    let mut t = start_unix;
    while t < start_unix + 86_400.0 {
        let (a, b) = (f(t), f(t + step));
        if a > 0.0 && b <= 0.0 && down.is_none() {
            down = Some(refine(t, t + step));
        } else if a <= 0.0 && b > 0.0 && down.is_some() && up.is_none() {
            up = Some(refine(t, t + step));
        }
        t += step;
    }
    (down, up)
}

/// The night around a moment, for the Sun's altitude `alt`: when the Sun went below it
/// and when it comes back above. At a moment when the Sun is below `alt`, that is the
/// dusk before and the dawn after it; when the Sun is above, the coming dusk and the
/// dawn that follows. `None` for a crossing that does not happen within a day (polar
/// summer or winter).
pub fn night_around(t_unix: f64, alt: f64, lat: f64, lon_east: f64) -> (Option<f64>, Option<f64>) {
    let dark = sun_altitude(julian_date(t_unix), lat, lon_east) <= alt;
    if !dark {
        return sun_crossings(t_unix, alt, lat, lon_east);
    }
    // The dusk: the last downward crossing in the day before; the dawn: the first
    // upward crossing after the moment.
    let (mut dusk, mut dawn) = (None, None);
    let mut start = t_unix - 86_400.0;
    while let (Some(down), _) = sun_crossings(start, alt, lat, lon_east) {
        if down > t_unix {
            break;
        }
        dusk = Some(down);
        start = down + 60.0;
    }
    let mut t = t_unix;
    let step = 600.0;
    let above = |t: f64| sun_altitude(julian_date(t), lat, lon_east) > alt;
    while t < t_unix + 86_400.0 {
        if above(t + step) {
            let (mut a, mut b) = (t, t + step);
            for _ in 0..40 {
                let m = 0.5 * (a + b);
                if above(m) {
                    b = m;
                } else {
                    a = m;
                }
            }
            dawn = Some(0.5 * (a + b));
            break;
        }
        t += step;
    }
    (dusk, dawn)
}

/// Precession matrix from J2000 to the mean equator and equinox of `jd` (IAU 2006,
/// Capitaine et al. 2003, A&A 412, 567: the angles ζ_A, z_A, θ_A; coefficients from
/// memory of that paper).
pub fn precession_matrix(jd: f64) -> [[f64; 3]; 3] {
    let t = (jd - 2_451_545.0) / 36_525.0;
    let as2r = |a: f64| (a / 3600.0).to_radians();
    let zeta = as2r(
        2.650_545
            + t * (2_306.083_227
                + t * (0.298_849_9
                    + t * (0.018_018_28 + t * (-0.000_005_971 - t * 0.000_000_317_3)))),
    );
    let z = as2r(
        -2.650_545
            + t * (2_306.077_181
                + t * (1.092_734_8
                    + t * (0.018_268_37 + t * (-0.000_028_596 - t * 0.000_000_290_4)))),
    );
    let theta = as2r(
        t * (2_004.191_903
            + t * (-0.429_493_4
                + t * (-0.041_822_64 + t * (-0.000_007_089 - t * 0.000_000_127_4)))),
    );
    let (sz, cz) = zeta.sin_cos();
    let (sq, cq) = z.sin_cos();
    let (st, ct) = theta.sin_cos();
    [
        [cq * ct * cz - sq * sz, -cq * ct * sz - sq * cz, -cq * st],
        [sq * ct * cz + cq * sz, -sq * ct * sz + cq * cz, -sq * st],
        [st * cz, -st * sz, ct],
    ]
}

/// Mean RA/Dec of the equinox of `jd` → J2000 (degrees).
pub fn to_j2000(ra: f64, dec: f64, jd: f64) -> (f64, f64) {
    let p = precession_matrix(jd);
    let (r, d) = (ra.to_radians(), dec.to_radians());
    let v = [d.cos() * r.cos(), d.cos() * r.sin(), d.sin()];
    // The inverse of a rotation is its transpose.
    let w = [
        p[0][0] * v[0] + p[1][0] * v[1] + p[2][0] * v[2],
        p[0][1] * v[0] + p[1][1] * v[1] + p[2][1] * v[2],
        p[0][2] * v[0] + p[1][2] * v[1] + p[2][2] * v[2],
    ];
    (
        norm360(w[1].atan2(w[0]).to_degrees()),
        w[2].clamp(-1.0, 1.0).asin().to_degrees(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::frame::header::parse_iso_time;

    fn label(iso: &str, tz: &str) -> String {
        night_label(parse_iso_time(iso).unwrap(), tz.parse().unwrap()).unwrap()
    }

    #[test]
    fn the_night_around_midnight_is_the_night_that_began_at_dusk() {
        // Asked at noon, the coming dusk and dawn; asked at midnight, the same pair (the
        // dusk before the moment and the dawn after it), not the next night's.
        let (lat, lon) = (40.4, -3.7);
        let noon = parse_iso_time("2026-03-14T12:00:00").unwrap();
        let midnight = parse_iso_time("2026-03-15T00:00:00").unwrap();
        let by_day = night_around(noon, -12.0, lat, lon);
        let by_night = night_around(midnight, -12.0, lat, lon);
        let (dusk, dawn) = (by_day.0.unwrap(), by_day.1.unwrap());
        assert!(dusk < midnight && midnight < dawn, "{by_day:?}");
        assert!(
            (by_night.0.unwrap() - dusk).abs() < 2.0,
            "{by_night:?} {by_day:?}"
        );
        assert!(
            (by_night.1.unwrap() - dawn).abs() < 2.0,
            "{by_night:?} {by_day:?}"
        );
        // The Sun is at −12° at both (the crossings' own definition).
        for t in [dusk, dawn] {
            assert!((sun_altitude(julian_date(t), lat, lon) + 12.0).abs() < 0.01);
        }
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

    #[test]
    fn sun_at_the_equinox_and_solstice() {
        // Near the March 2000 equinox (20 March 07:35 UT) the Sun's declination is ~0;
        // at the June 2000 solstice it is +23.44° (handbook values).
        let eq = julian_date(parse_iso_time("2000-03-20T07:35:00").unwrap());
        assert!(sun_radec(eq).1.abs() < 0.02);
        let sol = julian_date(parse_iso_time("2000-06-21T01:48:00").unwrap());
        assert!((sun_radec(sol).1 - 23.44).abs() < 0.02);
    }

    #[test]
    fn airmass_at_the_zenith_and_low_down() {
        // Kasten & Young (1989) give 1.0 at the zenith and about 38 at the horizon.
        assert!((airmass(90.0).unwrap() - 1.0).abs() < 1e-3);
        assert!((airmass(0.0).unwrap() - 37.92).abs() < 0.1);
        assert!((airmass(30.0).unwrap() - 1.995).abs() < 0.01);
    }

    #[test]
    fn precession_is_the_identity_at_j2000_and_about_50_arcsec_a_year() {
        let (ra, dec) = to_j2000(10.0, 20.0, 2_451_545.0);
        assert!((ra - 10.0).abs() < 1e-6 && (dec - 20.0).abs() < 2e-6);
        // General precession in longitude ≈ 50.3″/yr (handbook value): after 26 years a
        // star on the equator at RA 0 moves by about 26 × 46.1″ in RA (m = 3.07 s/yr).
        let jd = 2_451_545.0 + 26.0 * 365.25;
        let (ra, _) = to_j2000(0.0, 0.0, jd);
        let shift = (360.0 - ra) * 3600.0;
        assert!((shift - 26.0 * 46.1).abs() < 5.0, "{shift}");
    }
}

/// What the sky was doing during one exposure (at its middle).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FrameSky {
    pub sun_alt_deg: f64,
    pub twilight: Twilight,
    pub moon_alt_deg: f64,
    pub moon_illumination: f64,
    pub target_alt_deg: Option<f64>,
    pub airmass: Option<f64>,
}

/// Sky context of a frame: `mid_unix` the middle of the exposure, the site, and the
/// target's J2000 position when known (its altitude needs no better than J2000).
pub fn frame_sky(mid_unix: f64, lat: f64, lon_east: f64, target: Option<(f64, f64)>) -> FrameSky {
    let jd = julian_date(mid_unix);
    let sun = sun_altitude(jd, lat, lon_east);
    let target_alt = target.map(|(ra, dec)| alt_az(ra, dec, jd, lat, lon_east).0);
    FrameSky {
        sun_alt_deg: sun,
        twilight: twilight(sun),
        moon_alt_deg: moon_altitude(jd, lat, lon_east),
        moon_illumination: moon_illumination(jd),
        target_alt_deg: target_alt,
        airmass: target_alt.and_then(airmass),
    }
}
