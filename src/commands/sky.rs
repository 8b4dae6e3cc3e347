//! `subwatch sky`: the Sun, the Moon, twilight and a target for a site and moment.

use std::process::ExitCode;

use anyhow::{Context, Result};

/// `subwatch sky`.
pub fn run(
    latitude: f64,
    longitude: f64,
    time: &str,
    ra: Option<f64>,
    dec: Option<f64>,
) -> Result<ExitCode> {
    use subwatch::sky;
    let t = subwatch::frame::header::parse_iso_time(time)
        .with_context(|| format!("not an ISO 8601 time: {time}"))?;
    let jd = sky::julian_date(t);
    let (sra, sdec) = sky::sun_radec(jd);
    let (sun_alt, sun_az) = sky::alt_az(sra, sdec, jd, latitude, longitude);
    // The night around the moment: during the night, the dusk that began it and the
    // coming dawn; by day, the coming dusk and the dawn after it.
    let iso = |t: Option<f64>| {
        t.and_then(|t| chrono::DateTime::from_timestamp(t.round() as i64, 0))
            .map(|t| t.format("%Y-%m-%dT%H:%M:%SZ").to_string())
    };
    let crossing = |alt: f64| {
        let (down, up) = sky::night_around(t, alt, latitude, longitude);
        serde_json::json!({"sets_unix": down, "rises_unix": up, "sets_utc": iso(down), "rises_utc": iso(up)})
    };
    let target = ra.zip(dec).map(|(r, d)| {
        let (alt, az) = sky::alt_az(r, d, jd, latitude, longitude);
        let (r2000, d2000) = sky::to_j2000(r, d, jd);
        serde_json::json!({"alt_deg": alt, "az_deg": az, "airmass": sky::airmass(alt), "ra_j2000_deg": r2000, "dec_j2000_deg": d2000})
    });
    let doc = serde_json::json!({
        "jd": jd,
        "sun_alt_deg": sun_alt,
        "sun_az_deg": sun_az,
        "twilight": sky::twilight(sun_alt),
        "moon_alt_deg": sky::moon_altitude(jd, latitude, longitude),
        "moon_illumination": sky::moon_illumination(jd),
        "civil": crossing(-6.0),
        "nautical": crossing(-12.0),
        "astronomical": crossing(-18.0),
        "target": target,
    });
    outln!("{doc}")?;
    Ok(ExitCode::SUCCESS)
}
