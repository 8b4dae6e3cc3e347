//! The summary's words: positions, magnitudes with their uncertainty and whether they are
//! calibrated, rates with their units, counts with their plurals, and what each anomaly
//! is, in one place for the text, the HTML, the live page, alerts and VOEvent documents.

use super::{AnomalyRecord, Episode, GroupSummary, Summary};
use crate::night::Detail;

/// Sexagesimal RA (hours) and Dec (degrees) for a J2000 position.
pub fn sexagesimal(ra_deg: f64, dec_deg: f64) -> String {
    // Round once, in the last unit shown, so 59.999 s never prints as 60.00 s.
    let cs = (ra_deg.rem_euclid(360.0) / 15.0 * 360_000.0).round() as i64 % (24 * 360_000);
    let (hh, mm, ss) = (cs / 360_000, (cs / 6_000) % 60, (cs % 6_000) as f64 / 100.0);
    let sign = if dec_deg < 0.0 { '-' } else { '+' };
    let ds = (dec_deg.abs() * 36_000.0).round() as i64;
    let (dd, dm, dsec) = (ds / 36_000, (ds / 600) % 60, (ds % 600) as f64 / 10.0);
    format!("{hh:02}h{mm:02}m{ss:05.2}s {sign}{dd:02}°{dm:02}′{dsec:04.1}″")
}

/// A signed value to two decimals, never "-0.00".
pub(super) fn signed(x: f64) -> String {
    let r = (x * 100.0).round() / 100.0 + 0.0;
    format!("{r:+.2}")
}

/// "1 frame", "2 frames": a count with its noun.
pub fn plural(n: usize, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// Minutes of exposure, for people (never "-0 min").
pub fn minutes(s: f64) -> String {
    format!("{:.0} min", (s / 60.0).max(0.0) + 0.0)
}

/// The time to stack in a group, in words: "42 min in 21 frames", or "nothing".
pub fn to_stack(g: &GroupSummary) -> String {
    if g.stack.is_empty() {
        "nothing".into()
    } else {
        format!(
            "{} in {}",
            minutes(g.usable_seconds),
            plural(g.stack.len(), "frame", "frames")
        )
    }
}

/// A value and its uncertainty rounded together: the uncertainty to two significant
/// digits when its first three digits are 100 to 354, else to one (950 to 999 round up
/// to 1000 and keep two), and the value to the same decimal place (Particle Data Group,
/// Review of Particle Physics, Introduction, section 5.3, "Rounding").
pub fn with_uncertainty(value: f64, err: f64) -> String {
    if !(err.is_finite() && err > 0.0 && value.is_finite()) {
        return format!("{value:.2}");
    }
    let exponent = err.log10().floor() as i32;
    // The three highest digits, 100 to 999.
    let lead = (err / 10f64.powi(exponent - 2)).round() as i64;
    let digits = if lead <= 354 || lead >= 950 { 2 } else { 1 };
    let (mut e, mut exp) = (err, exponent);
    if lead >= 950 {
        e = 10f64.powi(exponent + 1);
        exp += 1;
    }
    let decimals = (-(exp - (digits - 1))).max(0) as usize;
    let step = 10f64.powi(exp - (digits - 1));
    let e = (e / step).round() * step;
    let v = (value / step).round() * step + 0.0;
    format!("{v:.decimals$} ± {e:.decimals$}")
}

/// The anomaly's instrumental magnitude, when the analysis gave one.
pub fn instrumental_mag(a: &AnomalyRecord) -> Option<f64> {
    a.detail.instrumental_mag()
}

/// The anomaly's brightness in words, saying which kind of magnitude it is: calibrated
/// (in the catalogue's band, through the frame's zero point measured on the catalogue's
/// stars) with its uncertainty, else instrumental (−2.5 log₁₀ of the flux in ADU).
pub fn brightness_words(a: &AnomalyRecord) -> Option<String> {
    match (a.mag, a.mag_err) {
        (Some(m), Some(e)) => Some(format!(
            "mag {}{}, calibrated by the frame's zero point on the catalogue's stars",
            with_uncertainty(m, e),
            a.mag_band
                .as_deref()
                .map_or(String::new(), |b| format!(" in {b}"))
        )),
        _ => instrumental_mag(a).map(|m| format!("instrumental mag {}", signed(m))),
    }
}

/// The anomaly against the catalogue, in words; `None` without a catalogue.
pub fn catalogue_words(a: &AnomalyRecord) -> Option<String> {
    match (&a.catalogue, a.catalogue_depth_mag) {
        (Some(c), _) => Some(format!(
            "catalogued: {} ({}) {:.1}″ away",
            c.id,
            match (c.mag, c.band.as_deref()) {
                (Some(m), Some(b)) => format!("{b} {m:.2}"),
                (Some(m), None) => format!("mag {m:.2}"),
                _ => "no magnitude".into(),
            },
            c.separation_arcsec
        )),
        (None, Some(d)) => Some(format!(
            "not in the catalogue down to mag {d:.1} (calibrated)"
        )),
        _ => None,
    }
}

impl GroupSummary {
    /// "; depth 18.45 mag in V at 5σ, zero point 23.12 (calibrated on the catalogue)"
    /// where a catalogue gave them.
    pub fn depth_words(&self) -> String {
        let band = self
            .zero_point_band
            .as_deref()
            .map_or(String::new(), |b| format!(" in {b}"));
        match (self.median_limit_mag, self.median_zero_point_mag) {
            (Some(l), Some(z)) => format!(
                "; depth {l:.2} mag{band} at 5σ, zero point {z:.2} (calibrated on the catalogue's stars)"
            ),
            (None, Some(z)) => format!("; zero point {z:.2}{band} (calibrated on the catalogue's stars)"),
            _ => String::new(),
        }
    }
}

/// A rate on the sky: arcseconds per minute where the plate scale is known, pixels per
/// minute beside (or alone).
fn rate_words(arcsec: Option<f64>, px: f64, position_angle: Option<f64>) -> String {
    let towards = position_angle.map_or(String::new(), |pa| {
        format!(" towards position angle {pa:.0}°")
    });
    match arcsec {
        Some(r) => format!("{r:.2}″/min ({px:.2} px/min){towards}"),
        None => format!("{px:.2} px/min{towards}"),
    }
}

/// What was seen, in plain words with its values.
pub fn what(a: &AnomalyRecord) -> String {
    match &a.detail {
        Detail::NewSource(n) => format!(
            "not seen on {} (that night reached instrumental mag {} on tonight's scale); instrumental mag {} tonight",
            n.absent_on,
            signed(n.earlier_limit_mag),
            signed(n.instrumental_mag)
        ),
        Detail::Moving(m) => format!(
            "moving {}",
            rate_words(
                m.rate_arcsec_per_min,
                m.rate_px_per_min,
                m.position_angle_deg
            )
        ),
        Detail::Variable(v) => format!(
            "brightness changed by {:.2} mag over {} (false-alarm probability {})",
            v.amplitude_mag,
            plural(v.frames, "frame", "frames"),
            if v.false_alarm_probability < 1e-6 {
                "below 1e-6".to_string()
            } else {
                format!("{:.1e}", v.false_alarm_probability)
            }
        ),
        Detail::Color(c) => format!(
            "color R−G {} mag, B−G {} mag against the field's {} and {} ({:.1} and {:.1} robust σ)",
            signed(c.color_rg_mag),
            signed(c.color_bg_mag),
            signed(c.field_rg_mag),
            signed(c.field_bg_mag),
            c.z_rg,
            c.z_bg
        ),
        Detail::BandColor(c) => format!(
            "{} − {} = {} mag against the field's {} ({:.1} robust σ; flux ratio {:.2} against {:.2}; false-alarm probability {:.1e} over {})",
            c.bands[0],
            c.bands[1],
            signed(c.color_mag),
            signed(c.field_color_mag),
            c.z,
            c.flux_ratio,
            c.field_flux_ratio,
            c.false_alarm_probability,
            plural(c.tested, "star", "stars")
        ),
        Detail::Transient(t) => format!(
            "{}{}",
            t.reason,
            t.snr.map_or(String::new(), |s| format!(", SNR {s:.0}"))
        ),
        Detail::Trail(t) => format!(
            "streak {:.0} px long, {:.1} px wide, at {:.0}° from the x axis",
            t.trail.length_px, t.trail.width_px, t.trail.angle_deg
        ),
        Detail::HotPixel(h) => format!(
            "fixed at detector ({:.0}, {:.0}) in {} of {} frames",
            h.detector_x, h.detector_y, h.frames, h.frames_total
        ),
    }
}

/// Subject line of the morning mail (one line, whatever the headers hold).
pub fn subject(s: &Summary) -> String {
    crate::text::single_line(&format!(
        "subwatch night {}: {}, {} rejected, {} warned, {} worth a look",
        s.night,
        plural(s.frames, "frame", "frames"),
        s.rejected,
        s.warned,
        s.notable.len()
    ))
}

/// The name a kind is listed under: the contract's spelling.
pub(super) fn kind_label(a: &AnomalyRecord) -> &'static str {
    a.kind.name()
}

/// A group's repeated reasons as episodes, in one sentence: "Lost 4 frames to cloud
/// 04:49–04:54; 2 frames to elongated stars 01:10–01:14; twilight from 05:51." Empty
/// when no reason repeated.
pub fn episodes_sentence(episodes: &[Episode]) -> String {
    let parts: Vec<String> = episodes
        .iter()
        .enumerate()
        .map(|(k, e)| {
            let when = match (e.from_start, e.to_end) {
                (false, true) => format!("from {}", e.start),
                (true, false) => format!("until {}", e.end),
                _ => format!("{}–{}", e.start, e.end),
            };
            let frames = plural(e.frames, "frame", "frames");
            match (e.cause, k) {
                ("twilight", _) => format!("twilight {when} ({frames})"),
                (cause, 0) => format!("lost {frames} to {cause} {when}"),
                (cause, _) => format!("{frames} to {cause} {when}"),
            }
        })
        .collect();
    if parts.is_empty() {
        return String::new();
    }
    let mut s = parts.join("; ");
    if let Some(first) = s.get(..1) {
        s = first.to_uppercase() + &s[1..];
    }
    s + "."
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_uncertainty_is_rounded_to_its_significant_digits_and_the_value_with_it() {
        // Particle Data Group rounding: 0.0034 → 0.0034 (lead 340: two digits); 0.0036 →
        // 0.004 (lead 360: one digit); 0.0097 → 0.010 (lead 970: up to 1000, two digits).
        assert_eq!(with_uncertainty(17.28341, 0.0034), "17.2834 ± 0.0034");
        assert_eq!(with_uncertainty(17.28341, 0.0036), "17.283 ± 0.004");
        assert_eq!(with_uncertainty(17.28341, 0.0097), "17.283 ± 0.010");
        assert_eq!(with_uncertainty(9.87, 0.12), "9.87 ± 0.12");
        assert_eq!(with_uncertainty(-8.034, 0.5), "-8.0 ± 0.5");
        assert_eq!(with_uncertainty(1234.0, 25.0), "1234 ± 25");
        assert_eq!(with_uncertainty(1234.0, 60.0), "1230 ± 60");
    }

    #[test]
    fn counts_read_as_words_and_nothing_to_stack_says_so() {
        assert_eq!(plural(1, "frame", "frames"), "1 frame");
        assert_eq!(plural(0, "frame", "frames"), "0 frames");
        // An empty sum of f64 is −0.0 in Rust; no "-0 min".
        assert_eq!(minutes(std::iter::empty::<f64>().sum()), "0 min");
        assert_eq!(minutes(90.0 * 60.0), "90 min");
    }

    #[test]
    fn a_rate_gives_arcseconds_with_pixels_beside() {
        assert_eq!(
            rate_words(Some(4.554), 2.34, Some(87.4)),
            "4.55″/min (2.34 px/min) towards position angle 87°"
        );
        assert_eq!(rate_words(None, 2.34, None), "2.34 px/min");
    }
}
