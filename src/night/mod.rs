//! Across the night: registration (`register`), per-source tracks across frames
//! (`tracks`), and the classification of what is unusual (`classify`). Pure: frame
//! measurements in, anomalies out. The batch command and the daemon feed it alike.

pub mod classify;
pub mod register;
pub mod tracks;

use serde::Serialize;

use crate::frame::wcs::Wcs;
use crate::measure::detect::Trail;

/// One star of one frame, FITS pixels.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StarInput {
    pub x: f64,
    pub y: f64,
    pub flux: f64,
    pub flux_err: f64,
    pub snr: f64,
    pub fwhm_px: f64,
    pub rgb: Option<[f64; 3]>,
    /// Deblended from a neighbour: its aperture flux is not its own alone.
    pub blended: bool,
}

/// One frame as the night analysis sees it.
#[derive(Debug, Clone)]
pub struct FrameInput {
    pub path: String,
    pub time_unix: Option<f64>,
    pub width: usize,
    pub height: usize,
    pub fwhm_px: Option<f64>,
    pub noise_adu: f64,
    pub stars: Vec<StarInput>,
    /// Detections sharper than any PSF (hot pixels, cosmic rays): FITS x, y and the
    /// peak above the sky in ADU.
    pub sharp: Vec<(f64, f64, f64)>,
    pub trails: Vec<Trail>,
    /// Detections set aside as wider than the stars (galaxies, blends), FITS pixels.
    pub extended: Vec<(f64, f64)>,
    pub wcs: Option<Wcs>,
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
    pub detail: serde_json::Value,
}

/// Per-frame results of the analysis.
#[derive(Debug, Clone, Default, Serialize)]
pub struct FrameResult {
    pub registered: bool,
    /// Frame → reference-frame transform [a00, a01, a10, a11, t0, t1] (FITS pixels).
    pub transform: Option<[f64; 6]>,
    pub registration_rms_px: Option<f64>,
    pub matched_stars: usize,
    /// Extinction relative to the reference frame from matched stars, magnitudes
    /// (positive: less light came through).
    pub transparency_loss_mag: Option<f64>,
}

#[derive(Debug, Clone, Default)]
pub struct NightResult {
    pub frames: Vec<FrameResult>,
    pub anomalies: Vec<Anomaly>,
    /// Tonight's persistent sources, for comparing later nights.
    pub catalog: Vec<CatalogSource>,
    /// Faintest instrumental magnitude reliably detected in the reference frame.
    pub limit_mag: Option<f64>,
    /// The reference frame's corners on the sky (RA, Dec degrees), when it has a WCS:
    /// what tonight could have seen.
    pub footprint: Vec<(f64, f64)>,
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

/// Transparency of one frame against a reference frame, for live use: register the
/// stars, then the median magnitude difference of stars with SNR > 20 in both. Returns
/// (loss in magnitudes, registration RMS in pixels); `None` when registration fails.
/// Stars are (x, y, flux, snr). Its cost does not depend on how many frames came before.
pub fn transparency_against(
    reference: &[(f64, f64, f64, f64)],
    frame: &[(f64, f64, f64, f64)],
) -> Option<(Option<f64>, f64)> {
    use register::RegStar;
    let to = |v: &[(f64, f64, f64, f64)]| -> Vec<RegStar> {
        v.iter()
            .map(|s| RegStar {
                x: s.0,
                y: s.1,
                flux: s.2,
                snr: s.3,
            })
            .collect()
    };
    let (r, f) = (to(reference), to(frame));
    let reg = register::register(&r, &f)?;
    let t = reg.transform;
    let mut diffs = Vec::new();
    for s in f.iter().filter(|s| s.snr > 20.0 && s.flux > 0.0) {
        let (x, y) = t.apply((s.x, s.y));
        if let Some(m) = r
            .iter()
            .filter(|q| q.snr > 20.0 && q.flux > 0.0)
            .find(|q| (q.x - x).hypot(q.y - y) < 1.5)
        {
            diffs.push(-2.5 * (s.flux / m.flux).log10());
        }
    }
    let loss = if diffs.len() >= 3 {
        crate::measure::stats::median_f64(&diffs)
    } else {
        None
    };
    Some((loss, reg.rms_px))
}

/// Analyse one target-and-filter group of frames (any order; time order is used).
pub fn analyse(frames: &[FrameInput], earlier: &[EarlierNight]) -> NightResult {
    classify::analyse(frames, earlier)
}
