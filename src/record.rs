//! What is recorded about a frame: the file's identity, how reading it ended, its
//! header facts, its metrics and its stars. Plain data shared by every stage after the
//! measurement (the store keeps it, the night model judges it, the reports show it), so
//! there is one star record and one frame record, not one per stage. Non-finite numbers
//! are written as `null` and read back as NaN (`finite`).

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::finite::{finite, finite_num, nan_if_null};
use crate::frame::header::FrameHeader;
use crate::measure::{FrameMeasurement, Rejected, Star};

/// What makes a file the same file: a new size or time at the same path is a newer
/// version of the frame, which replaces the record of the older one.
#[derive(Debug, Clone, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
pub struct Identity {
    pub path: String,
    pub size: u64,
    pub mtime_ns: i64,
}

impl Identity {
    /// The identity from metadata a shell read (`walk::identity`); times before 1970
    /// count negative.
    pub fn from_metadata(path: &Path, m: &std::fs::Metadata) -> Self {
        let nanos = |d: std::time::Duration| i64::try_from(d.as_nanos()).unwrap_or(i64::MAX);
        let mtime_ns = match m.modified() {
            Ok(t) => match t.duration_since(std::time::UNIX_EPOCH) {
                Ok(after) => nanos(after),
                Err(before) => -nanos(before.duration()),
            },
            Err(_) => 0,
        };
        Identity {
            path: path.to_string_lossy().into_owned(),
            size: m.len(),
            mtime_ns,
        }
    }

    /// The modification time, seconds since 1970 (UTC).
    pub fn mtime_unix(&self) -> f64 {
        self.mtime_ns as f64 / 1e9
    }
}

/// How a frame ended up.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum FrameStatus {
    Ok,
    Error,
    /// Not a light frame (dark, flat, bias).
    Skipped,
}

impl FrameStatus {
    pub fn as_str(self) -> &'static str {
        match self {
            FrameStatus::Ok => "ok",
            FrameStatus::Error => "error",
            FrameStatus::Skipped => "skipped",
        }
    }

    /// The status a name stands for (anything else reads as an error).
    pub fn from_name(name: &str) -> Self {
        match name {
            "ok" => FrameStatus::Ok,
            "skipped" => FrameStatus::Skipped,
            _ => FrameStatus::Error,
        }
    }
}

/// Everything recorded about one frame.
#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct FrameRecord {
    pub identity: Identity,
    pub status: FrameStatus,
    pub error: Option<String>,
    pub night: Option<String>,
    /// OBJECT, else the frame's folder name.
    pub target: Option<String>,
    pub filter: Option<String>,
    pub time_unix: Option<f64>,
    pub header: Option<HeaderFacts>,
    pub metrics: Option<Metrics>,
    pub stars: Vec<StarRecord>,
    pub rejected: Vec<Rejected>,
    /// The frame's celestial WCS, when it has one.
    pub wcs: Option<crate::frame::wcs::Wcs>,
    /// What a calibration frame (dark, flat, bias) measured.
    #[serde(default)]
    pub calibration: Option<crate::measure::calibration::CalibrationStats>,
}

impl FrameRecord {
    /// A record of a file that could not be measured, with the reason.
    pub fn failed(identity: Identity, reason: &str) -> Self {
        FrameRecord {
            identity,
            status: FrameStatus::Error,
            error: Some(reason.to_string()),
            night: None,
            target: None,
            filter: None,
            time_unix: None,
            header: None,
            metrics: None,
            stars: Vec::new(),
            rejected: Vec::new(),
            wcs: None,
            calibration: None,
        }
    }
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

/// How a frame's place on the sky was found (`astrometry`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FitSource {
    /// Fitted here to the catalogue.
    Fitted,
    /// The header's WCS, checked against the catalogue (no fit was accepted).
    Header,
    /// Fitted on the group's reference frame and carried through the registration.
    Carried,
}

/// A frame's place on the sky, as recorded and printed (`sky_fit`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SkyFit {
    pub source: FitSource,
    pub matched: usize,
    /// RMS distance between matched stars and their catalogue positions, arcsec.
    pub rms_arcsec: f64,
    /// log10 of the probability that the matches are chance alignments, trials counted.
    pub chance_log10: f64,
    /// When the header had a WCS: its largest disagreement with the fit over the frame, px.
    pub header_offset_px: Option<f64>,
    pub wcs: crate::frame::wcs::Wcs,
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
    /// The frame's place on the sky from the catalogue, when one is configured.
    #[serde(default)]
    pub sky_fit: Option<SkyFit>,
    /// With a catalogue configured, why the frame was not placed on the sky (no
    /// pointing in the header, too few matches, ...); `None` when it was, or without one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sky_fit_note: Option<String>,
    /// Magnitude of a source giving 1 ADU per second in the photometric aperture, in
    /// `zero_point_band` (`astrometry::photometric`).
    #[serde(default, serialize_with = "finite")]
    pub zero_point_mag: Option<f64>,
    #[serde(default, serialize_with = "finite")]
    pub zero_point_err_mag: Option<f64>,
    #[serde(default)]
    pub zero_point_stars: usize,
    #[serde(default)]
    pub zero_point_band: Option<String>,
    /// Magnitude of a point source at SNR 5 (CCD equation).
    #[serde(default, serialize_with = "finite")]
    pub limit_mag: Option<f64>,
    /// The SNR of the brightest unsaturated stars, brightest first (at most
    /// `season::weight::KEPT`): what weighs the frame against a target's other nights.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub bright_snr: Vec<f64>,
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
            sky_fit: None,
            sky_fit_note: None,
            zero_point_mag: None,
            zero_point_err_mag: None,
            zero_point_stars: 0,
            zero_point_band: None,
            limit_mag: None,
            bright_snr: crate::season::weight::bright_snr(m.stars.iter().map(|s| (s.flux, s.snr))),
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
    pub image_type: Option<crate::frame::header::ImageKind>,
    pub bayer_pattern: Option<String>,
    pub ccd_temp_c: Option<f64>,
    pub has_wcs: bool,
    #[serde(default)]
    pub set_temp_c: Option<f64>,
    #[serde(default)]
    pub binning: Option<f64>,
    #[serde(default)]
    pub gain_setting: Option<f64>,
    #[serde(default)]
    pub offset: Option<f64>,
    #[serde(default)]
    pub instrument: Option<String>,
    #[serde(default)]
    pub telescope: Option<String>,
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
            set_temp_c: h.set_temp_c,
            binning: h.x_binning,
            gain_setting: h.gain_setting,
            offset: h.offset,
            instrument: h.instrument.clone(),
            telescope: h.telescope.clone(),
        }
    }
}
