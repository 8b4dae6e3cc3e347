//! The JSON shapes of the command-line contract (`subwatch measure --json`): field names
//! and meanings other tools rely on. Built from measurements; no logic beyond unit
//! conversion. Non-finite numbers become `null`, so the output is always strict JSON.

use serde::{Deserialize, Deserializer, Serialize, Serializer};

use crate::frame::header::FrameHeader;
use crate::measure::{FrameMeasurement, Star};

fn finite<S: Serializer>(v: &Option<f64>, s: S) -> Result<S::Ok, S::Error> {
    match v {
        Some(x) if x.is_finite() => s.serialize_f64(*x),
        _ => s.serialize_none(),
    }
}

fn finite_num<S: Serializer>(v: &f64, s: S) -> Result<S::Ok, S::Error> {
    finite(&Some(*v), s)
}

/// The way back from [`finite_num`]: `null` is a number that was not finite.
pub fn nan_if_null<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Option::<f64>::deserialize(d).map(|v| v.unwrap_or(f64::NAN))
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct StarRecord {
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub x: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub y: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub flux: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub fwhm_px: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub eccentricity: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub snr: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub flux_err: f64,
    #[serde(serialize_with = "finite")]
    pub hfr_px: Option<f64>,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub fwhm_major_px: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub fwhm_minor_px: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub angle_deg: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub psf_flux: f64,
    pub psf_model: crate::measure::psf::PsfModel,
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub moffat_beta: Option<f64>,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub peak_adu: f64,
    pub blended: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ra_deg: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dec_deg: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rgb: Option<[Option<f64>; 3]>,
}

impl StarRecord {
    pub fn new(s: &Star, header: &FrameHeader) -> Self {
        let sky = header.wcs.as_ref().map(|w| w.pixel_to_sky(s.x, s.y));
        let f = |v: f64| v.is_finite().then_some(v);
        StarRecord {
            x: s.x,
            y: s.y,
            flux: s.flux,
            fwhm_px: s.fwhm_px,
            eccentricity: s.eccentricity,
            snr: s.snr,
            flux_err: s.flux_err,
            hfr_px: s.hfr_px,
            fwhm_major_px: s.fwhm_major_px,
            fwhm_minor_px: s.fwhm_minor_px,
            angle_deg: s.angle_deg,
            psf_flux: s.psf_flux,
            psf_model: s.psf_model,
            moffat_beta: s.moffat_beta,
            peak_adu: s.peak_adu,
            blended: s.blended,
            ra_deg: sky.map(|p| p.0),
            dec_deg: sky.map(|p| p.1),
            rgb: s.rgb.map(|c| [f(c[0]), f(c[1]), f(c[2])]),
        }
    }
}

/// Frame metrics (the contract's fields plus extras).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Metrics {
    pub width: usize,
    pub height: usize,
    pub star_count: usize,
    #[serde(serialize_with = "finite")]
    pub fwhm_px: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub fwhm_arcsec: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub eccentricity: Option<f64>,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub background_adu: f64,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub noise_adu: f64,
    #[serde(serialize_with = "finite")]
    pub snr_median: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub hfr_px: Option<f64>,
    pub saturated_count: usize,
    /// Detections sharper than any PSF (hot pixels, cosmic rays).
    pub sharp_count: usize,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub background_range_adu: f64,
    #[serde(serialize_with = "finite")]
    pub plate_scale_arcsec: Option<f64>,
    /// Streaks found (satellites, aircraft, meteors), FITS 1-based end points.
    #[serde(default)]
    pub trails: Vec<crate::measure::detect::Trail>,
}

impl Metrics {
    pub fn new(m: &FrameMeasurement, plate_scale: Option<f64>) -> Self {
        Metrics {
            width: m.width,
            height: m.height,
            star_count: m.star_count,
            fwhm_px: m.fwhm_px,
            fwhm_arcsec: m.fwhm_px.zip(plate_scale).map(|(f, s)| f * s),
            eccentricity: m.eccentricity,
            background_adu: m.background_adu,
            noise_adu: m.noise_adu,
            snr_median: m.snr_median,
            hfr_px: m.hfr_px,
            saturated_count: m.saturated_count,
            sharp_count: m.sharp_count,
            background_range_adu: m.background_range_adu,
            plate_scale_arcsec: plate_scale,
            trails: m.trails.clone(),
        }
    }
}

/// Header facts worth showing with the metrics.
#[derive(Debug, Clone, Serialize, Deserialize, Default)]
pub struct HeaderFacts {
    pub object: Option<String>,
    pub filter: Option<String>,
    pub date_obs: Option<String>,
    pub exposure_s: Option<f64>,
    pub image_type: Option<crate::frame::ImageKind>,
    pub bayer_pattern: Option<String>,
    pub ccd_temp_c: Option<f64>,
    pub has_wcs: bool,
}

impl HeaderFacts {
    pub fn new(h: &FrameHeader) -> Self {
        HeaderFacts {
            object: h.object.clone(),
            filter: h.filter.clone(),
            date_obs: h.date_obs.clone(),
            exposure_s: h.exposure_s,
            image_type: h.image_kind,
            bayer_pattern: h.bayer.and(h.bayer_pattern.clone()),
            ccd_temp_c: h.ccd_temp_c,
            has_wcs: h.wcs.is_some(),
        }
    }
}

/// One line of `subwatch measure --json`.
#[derive(Debug, Clone, Serialize)]
pub struct MeasureRecord {
    pub path: String,
    pub status: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub metrics: Option<Metrics>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub header: Option<HeaderFacts>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stars: Option<Vec<StarRecord>>,
    /// Detections not counted as stars (hot pixels, cosmic rays, saturated, edge-clipped).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rejected: Option<Vec<crate::measure::Rejected>>,
}

impl MeasureRecord {
    pub fn error(path: &str, reason: String) -> Self {
        MeasureRecord {
            path: path.to_string(),
            status: "error",
            error: Some(reason),
            metrics: None,
            header: None,
            stars: None,
            rejected: None,
        }
    }
}

/// One frame of `subwatch night --json`: the measure fields plus the verdict.
#[derive(Debug, Clone, Serialize)]
pub struct NightFrameRecord {
    pub path: String,
    pub status: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub metrics: Option<Metrics>,
    pub verdict: crate::rules::Verdict,
    pub reasons: Vec<String>,
    pub explanations: Vec<String>,
    pub night: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    #[serde(serialize_with = "finite")]
    pub time_unix: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub exposure_s: Option<f64>,
    pub registered: bool,
    #[serde(serialize_with = "finite")]
    pub registration_rms_px: Option<f64>,
    /// Frame → reference transform [a00, a01, a10, a11, t0, t1] in FITS pixels.
    pub registration_transform: Option<[f64; 6]>,
    /// Sun, Moon, twilight and the target's altitude at mid-exposure (with a site).
    pub sky: Option<crate::sky::FrameSky>,
    #[serde(serialize_with = "finite")]
    pub transparency_loss_mag: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct DetectionRecord {
    pub path: String,
    pub x: f64,
    pub y: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct AnomalyRecord {
    pub kind: crate::night::AnomalyKind,
    #[serde(serialize_with = "finite")]
    pub ra_deg: Option<f64>,
    #[serde(serialize_with = "finite")]
    pub dec_deg: Option<f64>,
    pub detections: Vec<DetectionRecord>,
    pub detail: serde_json::Value,
    pub target: Option<String>,
    pub filter: Option<String>,
}

/// The document `subwatch night --json` prints.
#[derive(Debug, Clone, Serialize)]
pub struct NightDocument {
    pub frames: Vec<NightFrameRecord>,
    pub anomalies: Vec<AnomalyRecord>,
}
