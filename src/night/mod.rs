//! Across the night: the one judgement of every frame (`judge`: reference, registration,
//! transparency, verdicts), registration itself (`register`), per-source tracks across
//! frames (`tracks`), and the classification of what is unusual (`classify`). Pure:
//! frame records in, judgements and anomalies out. The daemon, `night`, `report` and
//! the morning summary all come through `judge`.

pub mod bands;
pub mod calibration;
pub mod classify;
pub mod detail;
pub mod judge;
pub mod register;
pub mod tracks;

use serde::Serialize;

use crate::frame::wcs::Wcs;
use crate::measure::detect::Trail;
use crate::measure::RejectKind;
use crate::record::{FrameRecord, StarRecord};
pub use detail::Detail;

/// One frame as the analysis of what is unusual sees it: a view of its record, with its
/// rejected detections sorted into sharp ones and extended ones.
#[derive(Debug, Clone)]
pub struct FrameInput<'a> {
    pub path: &'a str,
    pub time_unix: Option<f64>,
    pub width: usize,
    pub height: usize,
    pub fwhm_px: Option<f64>,
    pub noise_adu: f64,
    pub stars: &'a [StarRecord],
    /// Detections sharper than any PSF (hot pixels, cosmic rays): FITS x, y and the
    /// peak above the sky in ADU.
    pub sharp: Vec<(f64, f64, f64)>,
    pub trails: &'a [Trail],
    /// Detections set aside as wider than the stars (galaxies, blends), FITS pixels.
    pub extended: Vec<(f64, f64)>,
    /// Detections set aside but for sharpness (saturated, clipped by the edge, unfit,
    /// extended), FITS pixels: a star measured in one frame may be set aside in the next
    /// (at the edge of saturation, dithered onto the edge, blended), and it was there.
    pub set_aside: Vec<(f64, f64)>,
    pub wcs: Option<&'a Wcs>,
    /// Arcseconds per pixel, where the header or the configuration gave it.
    pub plate_scale_arcsec: Option<f64>,
}

impl<'a> FrameInput<'a> {
    pub fn of(r: &'a FrameRecord) -> Self {
        let m = r.metrics.as_ref();
        let of_kind = |kind: RejectKind| r.rejected.iter().filter(move |x| x.kind == kind);
        FrameInput {
            path: &r.identity.path,
            time_unix: r.time_unix,
            width: m.map_or(0, |m| m.width),
            height: m.map_or(0, |m| m.height),
            fwhm_px: m.and_then(|m| m.fwhm_px),
            noise_adu: m.map_or(0.0, |m| m.noise_adu),
            stars: &r.stars,
            sharp: of_kind(RejectKind::Sharp)
                .map(|x| (x.x, x.y, x.peak_adu))
                .collect(),
            trails: m.map_or(&[], |m| &m.trails),
            extended: of_kind(RejectKind::Extended).map(|x| (x.x, x.y)).collect(),
            set_aside: r
                .rejected
                .iter()
                .filter(|x| x.kind != RejectKind::Sharp)
                .map(|x| (x.x, x.y))
                .collect(),
            wcs: r.wcs.as_ref(),
            plate_scale_arcsec: m.and_then(|m| m.plate_scale_arcsec),
        }
    }
}

/// A star's color as three fluxes, when all three were measured.
pub fn rgb(s: &StarRecord) -> Option<[f64; 3]> {
    s.rgb.and_then(|c| Some([c[0]?, c[1]?, c[2]?]))
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, PartialOrd, Ord)]
#[serde(rename_all = "snake_case")]
pub enum AnomalyKind {
    Transient,
    Trail,
    Moving,
    Variable,
    Color,
    HotPixel,
    NewSource,
}

impl AnomalyKind {
    pub const ALL: [AnomalyKind; 7] = [
        AnomalyKind::Transient,
        AnomalyKind::Trail,
        AnomalyKind::Moving,
        AnomalyKind::Variable,
        AnomalyKind::Color,
        AnomalyKind::HotPixel,
        AnomalyKind::NewSource,
    ];
    /// The contract's spelling of each kind, in the order of [`AnomalyKind::ALL`].
    pub const NAMES: [&'static str; 7] = [
        "transient",
        "trail",
        "moving",
        "variable",
        "color",
        "hot_pixel",
        "new_source",
    ];

    pub fn name(self) -> &'static str {
        Self::NAMES[Self::ALL
            .iter()
            .position(|k| *k == self)
            .expect("every kind is listed")]
    }

    pub fn from_name(name: &str) -> Option<Self> {
        Self::NAMES
            .iter()
            .position(|n| *n == name)
            .map(|i| Self::ALL[i])
    }
}

/// Where an anomaly was seen: frame index into the input and FITS position there.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Detection {
    pub frame: usize,
    pub x: f64,
    pub y: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Anomaly {
    pub kind: AnomalyKind,
    pub ra_deg: Option<f64>,
    pub dec_deg: Option<f64>,
    pub detections: Vec<Detection>,
    pub detail: Detail,
}

/// A persistent source of a night, for the catalogue kept between nights.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CatalogSource {
    pub ra_deg: f64,
    pub dec_deg: f64,
    /// Instrumental magnitude −2.5 log10(flux) on the night's reference-frame scale;
    /// `None` for objects seen but not measured as persistent stars (blends, extended
    /// objects, sources at the detection limit), which still count as "was there".
    pub mag: Option<f64>,
}

/// An earlier night's catalogue of the same target.
#[derive(Debug, Clone)]
pub struct EarlierNight {
    pub night: String,
    pub sources: Vec<CatalogSource>,
    pub limit_mag: f64,
    /// Corners of the area that night covered (RA, Dec degrees); empty when unknown.
    pub footprint: Vec<(f64, f64)>,
}

/// Whether (ra, dec) lies inside a small sky polygon, at least `margin_deg` from its
/// edges: the polygon is projected on the plane tangent at its first corner (fine for
/// a camera's field).
pub fn inside_footprint(poly: &[(f64, f64)], ra: f64, dec: f64, margin_deg: f64) -> bool {
    if poly.len() < 3 {
        return false;
    }
    let (ra0, dec0) = poly[0];
    let plane = |r: f64, d: f64| {
        let dra = ((r - ra0 + 540.0).rem_euclid(360.0) - 180.0) * dec0.to_radians().cos();
        (dra, d - dec0)
    };
    let pts: Vec<(f64, f64)> = poly.iter().map(|&(r, d)| plane(r, d)).collect();
    let p = plane(ra, dec);
    let mut inside = false;
    let mut min_edge = f64::INFINITY;
    for k in 0..pts.len() {
        let (a, b) = (pts[k], pts[(k + 1) % pts.len()]);
        if (a.1 > p.1) != (b.1 > p.1) && p.0 < a.0 + (p.1 - a.1) * (b.0 - a.0) / (b.1 - a.1) {
            inside = !inside;
        }
        let (dx, dy) = (b.0 - a.0, b.1 - a.1);
        let u = (((p.0 - a.0) * dx + (p.1 - a.1) * dy) / (dx * dx + dy * dy).max(1e-18))
            .clamp(0.0, 1.0);
        min_edge = min_edge.min((p.0 - (a.0 + u * dx)).hypot(p.1 - (a.1 + u * dy)));
    }
    inside && min_edge >= margin_deg
}
