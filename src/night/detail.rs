//! What each kind of anomaly says about itself: typed data, one shape per kind, written
//! in the night document's `detail` object (the JSON contract).

use serde::Serialize;

use crate::finite::finite;

/// A streak across one frame (satellite, aircraft, meteor): as measured, and its ends
/// on the sky.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TrailDetail {
    #[serde(flatten)]
    pub trail: crate::measure::detect::Trail,
    /// The ends on the sky (RA, Dec degrees), with a WCS.
    pub start_radec_deg: Option<[f64; 2]>,
    pub end_radec_deg: Option<[f64; 2]>,
}

/// A defect fixed on the detector while the sky moved.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HotPixelDetail {
    pub detector_x: f64,
    pub detector_y: f64,
    /// Frames it shows in, of the frames of the night.
    pub frames: usize,
    pub frames_total: usize,
}

/// Something in one frame only: a cosmic-ray hit (sharper than the PSF) or a PSF-shaped
/// flash.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TransientDetail {
    pub cosmic_ray: bool,
    pub reason: &'static str,
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub snr: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub flux_adu: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub fwhm_px: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "finite")]
    pub instrumental_mag: Option<f64>,
}

impl TransientDetail {
    /// A cosmic-ray hit: a detection sharper than the PSF, with no photometry of its own.
    pub fn cosmic_ray() -> Self {
        TransientDetail {
            cosmic_ray: true,
            reason: "sharper than the PSF",
            snr: None,
            flux_adu: None,
            fwhm_px: None,
            instrumental_mag: None,
        }
    }
}

/// A source moving steadily across three or more frames.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MovingDetail {
    #[serde(serialize_with = "finite")]
    pub rate_arcsec_per_min: Option<f64>,
    /// East of north, degrees.
    #[serde(serialize_with = "finite")]
    pub position_angle_deg: Option<f64>,
    pub rate_px_per_min: f64,
    pub frames: usize,
    #[serde(serialize_with = "finite")]
    pub instrumental_mag: Option<f64>,
}

/// One point of a variable's light curve.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LightCurvePoint {
    #[serde(serialize_with = "finite")]
    pub time_unix: Option<f64>,
    pub delta_mag: f64,
    pub error_mag: f64,
}

/// A persistent source whose flux changes beyond its noise.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariableDetail {
    pub amplitude_mag: f64,
    pub index: &'static str,
    pub chi2_reduced: f64,
    pub false_alarm_probability: f64,
    pub frames: usize,
    pub mean_instrumental_mag: f64,
    pub instrumental_mag: f64,
    pub light_curve: Vec<LightCurvePoint>,
}

/// A persistent source whose color lies far from the field's.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ColorDetail {
    #[serde(serialize_with = "finite")]
    pub instrumental_mag: Option<f64>,
    pub color_rg_mag: f64,
    pub color_bg_mag: f64,
    pub z_rg: f64,
    pub z_bg: f64,
    pub field_rg_mag: f64,
    pub field_bg_mag: f64,
    pub index: &'static str,
}

/// A source whose brightness in one filter against another lies far from the field's:
/// the same kind as a mosaic's color outlier, from two filter groups of one target.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BandColorDetail {
    /// The two filters, and the color index between them: m(first) − m(second).
    pub bands: [String; 2],
    pub color_mag: f64,
    pub field_color_mag: f64,
    /// The flux ratio first / second, and the field's.
    pub flux_ratio: f64,
    pub field_flux_ratio: f64,
    /// Robust z-score against the field (σ from the median absolute deviation).
    pub z: f64,
    pub sigma_mag: f64,
    /// Stars compared across every pair of filters, and the chance of so large a z among
    /// them all (Gaussian tails).
    pub tested: usize,
    pub false_alarm_probability: f64,
    #[serde(serialize_with = "finite")]
    pub instrumental_mag: Option<f64>,
    pub index: &'static str,
}

/// A source persistent tonight and absent from an earlier night that could have seen it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NewSourceDetail {
    pub absent_on: String,
    pub instrumental_mag: f64,
    pub earlier_limit_mag: f64,
}

/// The detail of an anomaly, by kind.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(untagged)]
pub enum Detail {
    Trail(TrailDetail),
    HotPixel(HotPixelDetail),
    Transient(TransientDetail),
    Moving(MovingDetail),
    Variable(VariableDetail),
    Color(ColorDetail),
    BandColor(BandColorDetail),
    NewSource(NewSourceDetail),
}

impl Detail {
    /// A hit on the detector rather than an event in the sky.
    pub fn is_cosmic_ray(&self) -> bool {
        matches!(self, Detail::Transient(t) if t.cosmic_ray)
    }

    /// The instrumental magnitude −2.5 log10(flux), where the analysis gave one.
    pub fn instrumental_mag(&self) -> Option<f64> {
        match self {
            Detail::Transient(t) => t.instrumental_mag,
            Detail::Moving(m) => m.instrumental_mag,
            Detail::Variable(v) => Some(v.instrumental_mag),
            Detail::Color(c) => c.instrumental_mag,
            Detail::BandColor(c) => c.instrumental_mag,
            Detail::NewSource(n) => Some(n.instrumental_mag),
            Detail::Trail(_) | Detail::HotPixel(_) => None,
        }
    }
}
