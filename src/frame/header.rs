//! FITS header cards and the typed metadata subwatch uses from them. Pure: text in,
//! values out. Unknown or malformed keywords are ignored, never fatal.

use serde::Serialize;

use super::bayer::BayerPattern;
use super::cards::{CardValue, Cards, HeaderCard};
use super::wcs::Wcs;

/// What a frame is, from IMAGETYP.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ImageKind {
    Light,
    Dark,
    Flat,
    Bias,
    Unknown,
}

impl ImageKind {
    /// Capture programs spell these many ways ("Light Frame", "LIGHT", "Flat Field",
    /// "Bias Frame", "Offset", "Object"); match on the word, not the spelling.
    pub fn from_imagetyp(value: &str) -> Self {
        let v = value.to_ascii_lowercase();
        if v.contains("dark") {
            ImageKind::Dark
        } else if v.contains("flat") {
            ImageKind::Flat
        } else if v.contains("bias") || v.contains("offset") || v.contains("zero") {
            ImageKind::Bias
        } else if v.contains("light") || v.contains("object") || v.contains("science") {
            ImageKind::Light
        } else {
            ImageKind::Unknown
        }
    }
}

/// The metadata subwatch uses, typed. Every field is optional: headers vary widely.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct FrameHeader {
    pub date_obs: Option<String>,
    /// DATE-OBS as seconds since 1970-01-01T00:00:00 UTC.
    pub time_unix: Option<f64>,
    pub exposure_s: Option<f64>,
    pub filter: Option<String>,
    pub object: Option<String>,
    /// INSTRUME and TELESCOP as written.
    pub instrument: Option<String>,
    pub telescope: Option<String>,
    pub image_kind: Option<ImageKind>,
    pub x_binning: Option<f64>,
    pub y_binning: Option<f64>,
    /// Unbinned pixel size in micrometres (XPIXSZ).
    pub pixel_size_um: Option<f64>,
    pub pixel_size_y_um: Option<f64>,
    pub focal_length_mm: Option<f64>,
    pub ccd_temp_c: Option<f64>,
    /// The cooler's set point (SET-TEMP), °C.
    pub set_temp_c: Option<f64>,
    /// OFFSET as written (a camera's offset setting).
    pub offset: Option<f64>,
    /// GAIN as written: often a camera's gain setting rather than electrons per ADU.
    pub gain_setting: Option<f64>,
    /// Electrons per ADU, from EGAIN, or from GAIN when its value is plausible for e-/ADU.
    pub gain_e_per_adu: Option<f64>,
    pub saturation_adu: Option<f64>,
    #[serde(skip)]
    pub bayer: Option<BayerPattern>,
    pub bayer_pattern: Option<String>,
    /// Pointing from RA/DEC (or OBJCTRA/OBJCTDEC), degrees, equinox as written.
    pub ra_deg: Option<f64>,
    pub dec_deg: Option<f64>,
    #[serde(skip)]
    pub wcs: Option<Wcs>,
}

impl FrameHeader {
    pub fn from_cards(cards: &[HeaderCard]) -> Self {
        let date_obs = cards.text("DATE-OBS");
        let time_unix = date_obs.as_deref().and_then(parse_iso_time);
        let gain_setting = cards.number("GAIN");
        let gain_e_per_adu = cards
            .number("EGAIN")
            .filter(|g| *g > 0.0)
            // A GAIN between 0.05 and 20 reads as e-/ADU; larger values are camera
            // gain settings (common practice among camera drivers).
            .or(gain_setting.filter(|g| (0.05..=20.0).contains(g)));
        let bayer_pattern = cards.text("BAYERPAT");
        let (ra_deg, dec_deg) = pointing(cards);
        FrameHeader {
            date_obs,
            time_unix,
            exposure_s: cards.number("EXPTIME").or_else(|| cards.number("EXPOSURE")),
            filter: cards.text("FILTER").filter(|f| !means_no_filter(f)),
            object: cards.text("OBJECT"),
            instrument: cards.text("INSTRUME"),
            telescope: cards.text("TELESCOP"),
            image_kind: cards
                .text("IMAGETYP")
                .or_else(|| cards.text("FRAME"))
                .map(|t| ImageKind::from_imagetyp(&t)),
            x_binning: cards.number("XBINNING").filter(|b| *b >= 1.0),
            y_binning: cards.number("YBINNING").filter(|b| *b >= 1.0),
            pixel_size_um: cards.number("XPIXSZ").filter(|p| *p > 0.0),
            pixel_size_y_um: cards.number("YPIXSZ").filter(|p| *p > 0.0),
            focal_length_mm: cards.number("FOCALLEN").filter(|f| *f > 0.0),
            ccd_temp_c: cards.number("CCD-TEMP"),
            set_temp_c: cards.number("SET-TEMP"),
            offset: cards.number("OFFSET"),
            gain_setting,
            gain_e_per_adu,
            saturation_adu: cards.number("SATURATE").filter(|s| *s > 0.0),
            bayer: bayer_pattern.as_deref().and_then(BayerPattern::parse),
            bayer_pattern,
            ra_deg,
            dec_deg,
            wcs: Wcs::from_cards(cards),
        }
    }

    /// Plate scale in arcsec per pixel: 206.265 × pixel size (µm) × binning / focal
    /// length (mm) (small-angle formula; common practice). `fallback_*` come from config.
    pub fn plate_scale(
        &self,
        fallback_focal_mm: Option<f64>,
        fallback_pixel_um: Option<f64>,
    ) -> Option<f64> {
        let pixel = self.pixel_size_um.or(fallback_pixel_um)?;
        let focal = self.focal_length_mm.or(fallback_focal_mm)?;
        let binning = self.x_binning.unwrap_or(1.0);
        Some(206.264_806 * pixel * binning / focal)
    }
}

fn pointing(cards: &[HeaderCard]) -> (Option<f64>, Option<f64>) {
    let ra = match cards.card("RA") {
        Some(CardValue::Number(v)) => Some(*v),
        Some(CardValue::Text(s)) => parse_sexagesimal(s).map(|h| h * 15.0),
        _ => None,
    }
    .or_else(|| {
        cards
            .text("OBJCTRA")
            .and_then(|s| parse_sexagesimal(&s))
            .map(|h| h * 15.0)
    });
    let dec = match cards.card("DEC") {
        Some(CardValue::Number(v)) => Some(*v),
        Some(CardValue::Text(s)) => parse_sexagesimal(s),
        _ => None,
    }
    .or_else(|| cards.text("OBJCTDEC").and_then(|s| parse_sexagesimal(&s)));
    (
        ra.filter(|r| (0.0..360.0).contains(r)),
        dec.filter(|d| (-90.0..=90.0).contains(d)),
    )
}

/// "12 34 56.7", "12:34:56.7", "-05 06 07" → decimal units of the first field.
pub fn parse_sexagesimal(s: &str) -> Option<f64> {
    let s = s.trim();
    let negative = s.starts_with('-');
    let parts: Vec<f64> = s
        .trim_start_matches(['-', '+'])
        .split([' ', ':', 'h', 'm', 's', 'd', '\''])
        .filter(|p| !p.is_empty())
        .map(|p| p.parse::<f64>())
        .collect::<Result<_, _>>()
        .ok()?;
    if parts.is_empty() || parts.len() > 3 {
        return None;
    }
    let value = parts
        .iter()
        .zip([1.0, 60.0, 3600.0])
        .map(|(p, d)| p / d)
        .sum::<f64>();
    Some(if negative { -value } else { value })
}

/// ISO 8601 "YYYY-MM-DD[Thh:mm:ss[.fff]]" (UTC, as FITS requires for DATE-OBS; a
/// trailing "Z" is allowed) to Unix seconds, by chrono's calendar: a date that does not
/// exist (31 February) is no time at all.
pub fn parse_iso_time(s: &str) -> Option<f64> {
    use chrono::{NaiveDate, NaiveDateTime};
    let s = s.trim().trim_end_matches('Z');
    let t = match s.split_once('T') {
        Some(_) => ["%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%dT%H:%M"]
            .iter()
            .find_map(|f| NaiveDateTime::parse_from_str(s, f).ok())?,
        None => NaiveDate::parse_from_str(s, "%Y-%m-%d")
            .ok()?
            .and_hms_opt(0, 0, 0)?,
    };
    let t = t.and_utc();
    Some(t.timestamp() as f64 + f64::from(t.timestamp_subsec_nanos()) * 1e-9)
}

/// Whether a FILTER value says there is none: capture programs write "None" (or leave
/// the value empty) for a camera without a filter wheel or a one-shot-color sensor
/// (common practice).
fn means_no_filter(value: &str) -> bool {
    let v = value.trim().to_ascii_lowercase();
    v.is_empty() || v == "none" || v == "no filter" || v == "n/a"
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unix_time_of_known_dates() {
        // 2000-01-01T12:00:00 UTC is Unix 946728000 (the J2000.0 epoch in UTC terms).
        assert_eq!(parse_iso_time("2000-01-01T12:00:00"), Some(946_728_000.0));
        assert_eq!(parse_iso_time("1970-01-01"), Some(0.0));
        assert_eq!(parse_iso_time("2026-13-01T00:00:00"), None);
        assert_eq!(parse_iso_time("2026-02-31T00:00:00"), None);
        assert_eq!(
            parse_iso_time("2026-03-14T20:40:00.250Z"),
            Some(1_773_520_800.25)
        );
        assert_eq!(parse_iso_time("2026-03-14T24:00:00"), None);
    }

    #[test]
    fn sexagesimal_fields() {
        assert_eq!(parse_sexagesimal("12 30 00"), Some(12.5));
        assert!((parse_sexagesimal("-05:30:36").unwrap() + 5.51).abs() < 1e-12);
    }

    #[test]
    fn image_kinds_from_common_spellings() {
        assert_eq!(ImageKind::from_imagetyp("Light Frame"), ImageKind::Light);
        assert_eq!(ImageKind::from_imagetyp("FLAT FIELD"), ImageKind::Flat);
        assert_eq!(ImageKind::from_imagetyp("Bias Frame"), ImageKind::Bias);
        assert_eq!(ImageKind::from_imagetyp("dark"), ImageKind::Dark);
    }
}
