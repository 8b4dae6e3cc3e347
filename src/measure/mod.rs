//! Measurement of one frame: image in, numbers out. No files, clocks or network here.
//!
//! The way through: background map (`background`) → matched-filter detection and
//! deblending (`detect`) → per-candidate PSF fits (`psf`) → rejection of what no PSF can
//! produce (hot pixels, cosmic rays), saturated and edge-clipped sources → aperture
//! photometry, half-flux radius and SNR (`photometry`) → frame metrics.

pub mod background;
pub mod detect;
pub mod photometry;
pub mod psf;
pub mod stats;

use ndarray::Array2;
use rayon::prelude::*;
use serde::Serialize;

use crate::frame::bayer::{channel_plane, superpixel_luminance, BayerPattern, Channel};
use background::{BackgroundMap, BackgroundParams};
use detect::{detect, Candidate, DetectParams};
use psf::{fit_gaussian, fit_profile, Guess, PsfFit, PsfModel, Stamp};
use stats::{mad_sigma, median_f64, median_in_place, sigma_clip_on, Grid, CLIP3_STD_CORRECTION};

#[derive(Debug, Clone, Copy, Serialize, serde::Deserialize)]
pub struct MeasureParams {
    pub background: BackgroundParams,
    pub detect: DetectParams,
    /// Electrons per ADU, for the source shot noise in the SNR.
    pub gain_e_per_adu: Option<f64>,
    /// Pixel value (physical units) at which the sensor saturates. When absent, a
    /// plateau of several pixels at the image maximum is taken as saturation.
    pub saturation_adu: Option<f64>,
    /// Stars below this SNR do not vote on the frame's FWHM and eccentricity.
    pub min_shape_snr: f64,
    /// Detections below this SNR are not reported as stars: their positions and shapes
    /// are mostly noise.
    pub min_snr: f64,
    /// Set for a colour mosaic's superpixel image: widths are reported as sampled by
    /// pixels of this side (0.5 superpixel = one mosaic pixel). 0 = the image's own.
    pub report_pixel: f64,
}

impl Default for MeasureParams {
    fn default() -> Self {
        Self {
            background: BackgroundParams::default(),
            detect: DetectParams::default(),
            gain_e_per_adu: None,
            saturation_adu: None,
            min_shape_snr: 20.0,
            min_snr: 7.0,
            report_pixel: 0.0,
        }
    }
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum MeasureError {
    #[error("the image has no valid pixels (all NaN or blank)")]
    NoValidPixels,
    #[error(
        "the image has too few valid pixels to measure ({valid} of {total}; the rest are NaN or blank)"
    )]
    TooFewValidPixels { valid: usize, total: usize },
    #[error("the image is too small to measure ({width} x {height} pixels)")]
    TooSmall { width: usize, height: usize },
}

/// One measured star. Positions are FITS 1-based (centre of the first pixel is 1.0).
#[derive(Debug, Clone, Serialize)]
pub struct Star {
    pub x: f64,
    pub y: f64,
    /// Background-subtracted total in the aperture (radius 2.5 × frame FWHM), ADU.
    pub flux: f64,
    pub fwhm_px: f64,
    pub eccentricity: f64,
    pub snr: f64,
    /// 1σ uncertainty of `flux` (CCD equation for the same aperture), ADU.
    pub flux_err: f64,
    pub fwhm_major_px: f64,
    pub fwhm_minor_px: f64,
    pub angle_deg: f64,
    pub hfr_px: Option<f64>,
    /// Integral of the fitted PSF model, ADU.
    pub psf_flux: f64,
    pub psf_model: PsfModel,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub moffat_beta: Option<f64>,
    /// Highest background-subtracted pixel, ADU.
    pub peak_adu: f64,
    pub blended: bool,
    /// Shape components (see `PsfFit::shape_components`).
    #[serde(skip)]
    pub shape_e: (f64, f64),
    /// [r, g, b] fluxes for one-shot-colour frames.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rgb: Option<[f64; 3]>,
}

/// Why a detection was not counted as a star.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RejectKind {
    /// Sharper than any PSF: a hot pixel or a cosmic-ray hit.
    Sharp,
    Saturated,
    EdgeClipped,
    /// The PSF fit failed or ran away from the detection.
    Unfit,
    /// Much wider than the frame's stars.
    Extended,
}

impl RejectKind {
    const ALL: [RejectKind; 5] = [
        RejectKind::Sharp,
        RejectKind::Saturated,
        RejectKind::EdgeClipped,
        RejectKind::Unfit,
        RejectKind::Extended,
    ];

    /// The name used in JSON and in the store.
    pub fn as_str(self) -> &'static str {
        match self {
            RejectKind::Sharp => "sharp",
            RejectKind::Saturated => "saturated",
            RejectKind::EdgeClipped => "edge_clipped",
            RejectKind::Unfit => "unfit",
            RejectKind::Extended => "extended",
        }
    }

    pub fn from_name(name: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|k| k.as_str() == name)
    }
}

#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct Rejected {
    pub x: f64,
    pub y: f64,
    pub kind: RejectKind,
    #[serde(deserialize_with = "crate::finite::nan_if_null")]
    pub peak_adu: f64,
}

/// Everything measured on one frame.
#[derive(Debug, Clone, Serialize)]
pub struct FrameMeasurement {
    pub width: usize,
    pub height: usize,
    pub star_count: usize,
    pub fwhm_px: Option<f64>,
    pub eccentricity: Option<f64>,
    pub background_adu: f64,
    pub noise_adu: f64,
    pub snr_median: Option<f64>,
    pub hfr_px: Option<f64>,
    pub saturated_count: usize,
    pub sharp_count: usize,
    /// Largest minus smallest sky level over the background mesh, ADU.
    pub background_range_adu: f64,
    /// Stars that voted on the frame's FWHM and eccentricity.
    pub shape_star_count: usize,
    /// Streaks across the frame.
    pub trails: Vec<detect::Trail>,
    pub stars: Vec<Star>,
    pub rejected: Vec<Rejected>,
}

impl FrameMeasurement {
    fn empty(width: usize, height: usize, background: f64, noise: f64) -> Self {
        Self {
            width,
            height,
            star_count: 0,
            fwhm_px: None,
            eccentricity: None,
            background_adu: background,
            noise_adu: noise,
            snr_median: None,
            hfr_px: None,
            saturated_count: 0,
            sharp_count: 0,
            background_range_adu: 0.0,
            shape_star_count: 0,
            trails: Vec::new(),
            stars: Vec::new(),
            rejected: Vec::new(),
        }
    }
}

/// Median of values with weights: the smallest value at which the cumulative weight
/// reaches half the total.
fn weighted_median(pairs: &[(f64, f64)]) -> Option<f64> {
    let mut v: Vec<(f64, f64)> = pairs
        .iter()
        .copied()
        .filter(|(x, w)| x.is_finite() && *w > 0.0)
        .collect();
    if v.is_empty() {
        return None;
    }
    v.sort_by(|a, b| a.0.total_cmp(&b.0));
    let total: f64 = v.iter().map(|p| p.1).sum();
    let mut acc = 0.0;
    for &(x, w) in &v {
        acc += w;
        if acc >= 0.5 * total {
            return Some(x);
        }
    }
    v.last().map(|p| p.0)
}

/// Saturation level from a plateau at the image maximum (at least 3 pixels share it).
fn plateau_saturation(pixels: &Array2<f32>, max: f32) -> Option<f64> {
    let tol = (max.abs() * 1e-6).max(1e-3);
    let data = pixels.as_slice()?;
    let floor = max - tol;
    let at_max: usize = data
        .par_chunks(1 << 16)
        .map(|c| c.iter().map(|&v| usize::from(v >= floor)).sum::<usize>())
        .sum();
    (at_max >= 3).then_some(f64::from(max))
}

/// Largest finite pixel value; −∞ when there is none.
fn finite_max(pixels: &Array2<f32>) -> f32 {
    pixels.as_slice().map_or(f32::NEG_INFINITY, |d| {
        d.par_chunks(1 << 16)
            .map(|c| {
                // Eight running maxima, so the loop is a vector compare-and-select;
                // NaN fails both comparisons and +∞ the second, so neither is taken.
                let mut lanes = [f32::NEG_INFINITY; 8];
                let mut parts = c.chunks_exact(8);
                for part in &mut parts {
                    for (m, &v) in lanes.iter_mut().zip(part) {
                        *m = if v > *m && v < f32::INFINITY { v } else { *m };
                    }
                }
                parts
                    .remainder()
                    .iter()
                    .chain(&lanes)
                    .copied()
                    .filter(|v| v.is_finite())
                    .fold(f32::NEG_INFINITY, f32::max)
            })
            .reduce(|| f32::NEG_INFINITY, f32::max)
    })
}

/// Measure a single-channel image. Takes ownership so the background can be removed
/// in place (memory is the limit on large frames).
pub fn measure_image(
    mut pixels: Array2<f32>,
    params: &MeasureParams,
) -> Result<FrameMeasurement, MeasureError> {
    let (h, w) = pixels.dim();
    if w < 8 || h < 8 {
        return Err(MeasureError::TooSmall {
            width: w,
            height: h,
        });
    }
    let max = finite_max(&pixels);
    if max == f32::NEG_INFINITY {
        return Err(MeasureError::NoValidPixels);
    }
    let saturation = params
        .saturation_adu
        .or_else(|| plateau_saturation(&pixels, max));
    let mut background_params = params.background;
    background_params.grid = background_params.grid.or_else(|| raw_grid(&pixels));
    let mut bkg = BackgroundMap::estimate(&pixels, None, background_params).ok_or_else(|| {
        // Every mesh box is less than 30 % valid: a few scattered values, no sky.
        MeasureError::TooFewValidPixels {
            valid: pixels.iter().filter(|v| v.is_finite()).count(),
            total: pixels.len(),
        }
    })?;
    let bright = subtract_and_flag(&mut pixels, &bkg);
    if bkg.median_rms() <= 0.0 {
        // A constant image (or a fully saturated one): nothing to detect.
        return Ok(FrameMeasurement::empty(w, h, bkg.median_level(), 0.0));
    }

    // Hot pixels and cosmic-ray hits are taken out before detection, so their filtered
    // wings cannot swallow a star nearby; they are reported as sharp detections.
    let cleaned = clean_sharp_pixels(&mut pixels, &bkg, &bright);

    // Detection with a kernel matched to the stars: the configured one, unless the
    // brightest peaks of the cleaned frame show a PSF much wider or narrower; and once
    // more with a matched kernel if the detected stars still disagree with it.
    let mut dparams = params.detect;
    let peaks = bright_peaks(&pixels, &bright);
    if let Some(seen) = estimate_fwhm(&pixels, &peaks, &bkg, saturation, dparams.kernel_fwhm) {
        if (seen / dparams.kernel_fwhm - 1.0).abs() > 0.35 {
            dparams.kernel_fwhm = seen.clamp(1.5, 15.0);
        }
    }
    let mut found = detect(&pixels, &bkg, &dparams);
    let mut candidates = std::mem::take(&mut found.candidates);
    let mut fwhm_guess = estimate_fwhm(&pixels, &candidates, &bkg, saturation, dparams.kernel_fwhm)
        .unwrap_or(dparams.kernel_fwhm);
    if (fwhm_guess / dparams.kernel_fwhm - 1.0).abs() > 0.35 {
        let start = fwhm_guess;
        dparams.kernel_fwhm = fwhm_guess.clamp(1.5, 15.0);
        found = detect(&pixels, &bkg, &dparams);
        candidates = std::mem::take(&mut found.candidates);
        fwhm_guess = estimate_fwhm(&pixels, &candidates, &bkg, saturation, start).unwrap_or(start);
    }

    // Mask the sources and re-estimate the sky without them (crowded fields), then the
    // noise as the robust scatter of the unmasked pixels about the local background.
    let mask = source_mask(w, h, &candidates, fwhm_guess);
    // Clipping alone copes with a sparse field; the masked second estimate is worth its
    // cost only when sources cover a noticeable part of the sky.
    let masked: usize = mask
        .par_chunks(1 << 16)
        .map(|c| c.iter().filter(|&&m| m).count())
        .sum();
    let masked_fraction = masked as f64 / mask.len() as f64;
    let raw_free = (masked_fraction > 0.03)
        .then(|| {
            BackgroundMap::estimate_with_offset(&pixels, Some(&mask), Some(&bkg), background_params)
        })
        .flatten();
    if let Some(better) = raw_free {
        // Both maps share their mesh, and the spline is linear in the mesh values, so
        // the change is one spline of the differences.
        subtract_rows(&mut pixels, &better.minus(&bkg));
        bkg = better;
    }
    let noise =
        robust_noise(&pixels, &mask, background_params.grid).unwrap_or_else(|| bkg.median_rms());
    let background_adu = bkg.median_level();

    let sat_residual =
        |x: usize, y: usize| saturation.map(|s| s - bkg.level_at(x as f64, y as f64));
    let grid = CandidateGrid::new(&candidates, w, h, 32);
    let half = ((1.6 * fwhm_guess + 2.0).ceil() as usize).clamp(4, 30);
    // A star whose centre lies half a FWHM inside the frame still shows its core.
    let edge_margin = (0.5 * fwhm_guess).max(1.0);
    // Narrow PSFs are fitted with the model averaged over each pixel (see `psf::Stamp`).
    let subsample = if fwhm_guess < 2.8 || params.report_pixel > 0.0 {
        3
    } else {
        1
    };

    // A detection's matched-filter significance is about 1.25 times the SNR it can reach
    // in the 1-FWHM aperture (PSF-weighted against flat-aperture SNR of a Gaussian star:
    // 1/sqrt(4π) against 0.94/sqrt(π·2.355²), analytic), so candidates below 0.9 × the
    // reporting limit would be dropped after their fit anyway; they are not fitted, but
    // stay in the neighbour grid so their light is still masked out of other stamps.
    let fit_floor = 0.9 * params.min_snr;
    let outcomes: Vec<Outcome> = candidates
        .par_iter()
        .enumerate()
        .filter(|(_, c)| c.significance >= fit_floor)
        .map(|(i, c)| {
            measure_candidate(
                &pixels,
                c,
                i,
                &candidates,
                &grid,
                half,
                edge_margin,
                noise,
                sat_residual(c.x, c.y),
                fwhm_guess,
                (subsample, params.report_pixel),
                0.8 * params.min_shape_snr,
            )
        })
        .collect();

    // Sharper than any PSF this frame shows: a fitted (optical) minor FWHM under half
    // the typical one. The principle of van Dokkum (2001, PASP 113, 1420): a cosmic ray
    // or hot pixel changes faster from pixel to pixel than the seeing allows. The floor
    // sits just above the narrowest width a fit may take (0.5 px, see `psf`), or at
    // 0.8 px where the model is fitted to pixel centres (which then carry the pixel's
    // own width of ~0.7 px FWHM on top).
    let floor = if subsample > 1 { 0.55 } else { 0.8 };
    let typical_minor = median_f64(
        &outcomes
            .iter()
            .filter_map(|o| match o {
                Outcome::Fitted(f) if !f.blended && f.fit.model_axes().1 >= 1.5 * floor => {
                    Some(f.fit.model_axes().1)
                }
                _ => None,
            })
            .collect::<Vec<_>>(),
    )
    .unwrap_or(fwhm_guess);
    let sharp_limit = (0.5 * typical_minor).max(floor);
    let typical_fwhm = median_f64(
        &outcomes
            .iter()
            .filter_map(|o| match o {
                Outcome::Fitted(f) if !f.blended && f.fit.model_axes().1 >= sharp_limit => {
                    Some(f.fit.fwhm())
                }
                _ => None,
            })
            .collect::<Vec<_>>(),
    )
    .unwrap_or(fwhm_guess);
    let typical_major = median_f64(
        &outcomes
            .iter()
            .filter_map(|o| match o {
                Outcome::Fitted(f) if !f.blended && f.fit.model_axes().1 >= sharp_limit => {
                    Some(f.fit.fwhm_axes().0)
                }
                _ => None,
            })
            .collect::<Vec<_>>(),
    )
    .unwrap_or(fwhm_guess);

    let mut fitted = Vec::new();
    let mut rejected = cleaned;
    for o in outcomes {
        match o {
            Outcome::Fitted(f) if f.fit.model_axes().1 < sharp_limit => rejected.push(Rejected {
                x: f.fit.x0 + 1.0,
                y: f.fit.y0 + 1.0,
                kind: RejectKind::Sharp,
                peak_adu: f.peak,
            }),
            // A position known no better than a quarter of the FWHM is noise or a
            // fit that wandered, not a star worth reporting.
            Outcome::Fitted(f) if f.fit.pos_err.0.hypot(f.fit.pos_err.1) > 0.25 * typical_fwhm => {
                rejected.push(Rejected {
                    x: f.fit.x0 + 1.0,
                    y: f.fit.y0 + 1.0,
                    kind: RejectKind::Unfit,
                    peak_adu: f.peak,
                })
            }
            // Much wider than the stars, or much longer along one axis: a galaxy, a blend
            // of faint stars, or noise around a faint star.
            Outcome::Fitted(f)
                if f.fit.fwhm() > 1.5 * typical_fwhm
                    || f.fit.fwhm_axes().0 > 1.6 * typical_major =>
            {
                rejected.push(Rejected {
                    x: f.fit.x0 + 1.0,
                    y: f.fit.y0 + 1.0,
                    kind: RejectKind::Extended,
                    peak_adu: f.peak,
                })
            }
            Outcome::Fitted(f) => fitted.push(f),
            Outcome::Rejected(r) => rejected.push(r),
        }
    }

    // The frame's FWHM from the stars fit well enough to vote; then photometry with an
    // aperture scaled to it.
    let frame_fwhm = median_f64(
        &fitted
            .iter()
            .filter(|f| !f.blended)
            .map(|f| f.fit.fwhm())
            .collect::<Vec<_>>(),
    )
    .unwrap_or(fwhm_guess);
    let r_ap = (2.5 * frame_fwhm).max(3.0);
    let r_snr = frame_fwhm.max(1.5);
    let r_in = r_ap + 2.0;
    let r_out = r_in + (1.5 * frame_fwhm).max(6.0);
    let gain = params.gain_e_per_adu;
    // A grid a twentieth of the noise or finer does not bias a median noticeably.
    let coarse_grid = background_params.grid.filter(|g| g.step > 0.05 * noise);
    let mut stars: Vec<Star> = fitted
        .par_iter()
        .filter_map(|f| {
            let (cx, cy) = (f.fit.x0, f.fit.y0);
            // SNR in an aperture of radius 1 × FWHM, near the radius that maximises it
            // for a faint star (Howell 1989, PASP 101, 616), with the same local sky.
            let sky = photometry::SkyAnnulus {
                r_in,
                r_out,
                grid: coarse_grid.map(|g| (g, bkg.level_at(cx, cy))),
            };
            let [ap, core] = photometry::apertures(&pixels, cx, cy, [r_ap, r_snr], sky)?;
            let snr = photometry::ccd_snr(core.flux, core.n_pix, core.n_sky, noise, gain);
            if snr < params.min_snr {
                return None;
            }
            // Out to 3.5 FWHM: heavy Moffat wings (β ≈ 2.5) still hold 1 % of the light
            // beyond 2.5 FWHM, which would pull the half-flux radius in.
            let hfr = photometry::half_flux_radius(&pixels, cx, cy, 3.5 * frame_fwhm, ap.local_sky);
            let (major, minor) = f.fit.fwhm_axes();
            Some(Star {
                x: cx + 1.0,
                y: cy + 1.0,
                flux: ap.flux,
                flux_err: photometry::ccd_flux_error(ap.flux, ap.n_pix, ap.n_sky, noise, gain),
                fwhm_px: f.fit.fwhm(),
                eccentricity: f.fit.eccentricity(),
                snr,
                fwhm_major_px: major,
                fwhm_minor_px: minor,
                angle_deg: f.fit.angle_deg(),
                hfr_px: hfr,
                psf_flux: f.fit.total_flux(),
                psf_model: f.fit.model,
                moffat_beta: (f.fit.model == PsfModel::Moffat).then_some(f.fit.beta),
                peak_adu: f.peak,
                blended: f.blended,
                shape_e: f.fit.shape_components(),
                rgb: None,
            })
        })
        .collect();
    stars.sort_by(|a, b| b.flux.total_cmp(&a.flux));

    let mut shape: Vec<&Star> = stars
        .iter()
        .filter(|s| !s.blended && s.snr >= params.min_shape_snr)
        .collect();
    if shape.len() < 5 {
        shape = stars.iter().filter(|s| !s.blended).collect();
    }
    let med = |f: &dyn Fn(&Star) -> Option<f64>| {
        median_f64(&shape.iter().filter_map(|s| f(s)).collect::<Vec<_>>())
    };
    let fwhm_px = med(&|s| Some(s.fwhm_px));
    // Near round, one star's eccentricity is dominated by noise (it grows as the
    // square root of the noise in its shape, so a round star at SNR 100 reads about
    // 0.2 before correction). Each star's value is corrected for that bias (see
    // `PsfFit::eccentricity`), and the median is weighted by SNR (capped at 300), so
    // the better-measured stars count for more without a few bright ones deciding.
    let eccentricity = weighted_median(
        &shape
            .iter()
            .map(|s| (s.eccentricity, s.snr.min(300.0)))
            .collect::<Vec<_>>(),
    );
    let hfr_px = med(&|s| s.hfr_px);
    let snr_median = median_f64(&stars.iter().map(|s| s.snr).collect::<Vec<_>>());
    let saturated_count = rejected
        .iter()
        .filter(|r| r.kind == RejectKind::Saturated)
        .count();
    let sharp_count = rejected
        .iter()
        .filter(|r| r.kind == RejectKind::Sharp)
        .count();
    Ok(FrameMeasurement {
        width: w,
        height: h,
        star_count: stars.len(),
        fwhm_px,
        eccentricity,
        background_adu,
        noise_adu: noise,
        snr_median,
        hfr_px,
        saturated_count,
        sharp_count,
        background_range_adu: bkg.level_range(),
        shape_star_count: shape.len(),
        trails: found.trails,
        stars,
        rejected,
    })
}

/// Measure a one-shot-colour mosaic: shape on 2×2 superpixel luminance, positions and
/// widths reported in mosaic pixels, and per-star [r, g, b] aperture fluxes.
pub fn measure_mosaic(
    mosaic: Array2<f32>,
    pattern: BayerPattern,
    params: &MeasureParams,
) -> Result<FrameMeasurement, MeasureError> {
    let (h, w) = mosaic.dim();
    let planes: Vec<Array2<f32>> = [Channel::Red, Channel::Green, Channel::Blue]
        .iter()
        .map(|&c| channel_plane(&mosaic, pattern, c))
        .collect();
    let lum = superpixel_luminance(&mosaic);
    drop(mosaic);
    let mut p = *params;
    p.saturation_adu = params.saturation_adu.map(|s| 4.0 * s);
    p.detect.kernel_fwhm = (params.detect.kernel_fwhm / 2.0).max(1.5);
    p.report_pixel = 0.5;
    let mut m = measure_image(lum, &p)?;
    // Per-channel residual planes for colour photometry.
    let residual_planes: Vec<Array2<f32>> = planes
        .into_iter()
        .filter_map(|mut plane| {
            let b = BackgroundMap::estimate(&plane, None, params.background)?;
            subtract_rows(&mut plane, &b);
            Some(plane)
        })
        .collect();
    let frame_fwhm_sp = m.fwhm_px.unwrap_or(2.0);
    let r_ap = (2.5 * frame_fwhm_sp).max(3.0);
    for s in m.stars.iter_mut() {
        let (cx, cy) = (s.x - 1.0, s.y - 1.0);
        if residual_planes.len() == 3 {
            let mut rgb = [0.0; 3];
            for (k, plane) in residual_planes.iter().enumerate() {
                rgb[k] = photometry::aperture(
                    plane,
                    cx,
                    cy,
                    r_ap,
                    r_ap + 2.0,
                    r_ap + 2.0 + (1.5 * frame_fwhm_sp).max(6.0),
                )
                .map_or(f64::NAN, |a| a.flux);
            }
            s.rgb = Some(rgb);
        }
        to_mosaic_star(s);
    }
    for t in m.trails.iter_mut() {
        (t.x0, t.y0, t.x1, t.y1) = (
            2.0 * t.x0 - 0.5,
            2.0 * t.y0 - 0.5,
            2.0 * t.x1 - 0.5,
            2.0 * t.y1 - 0.5,
        );
        t.width_px *= 2.0;
        t.length_px *= 2.0;
    }
    for r in m.rejected.iter_mut() {
        r.x = 2.0 * r.x - 0.5;
        r.y = 2.0 * r.y - 0.5;
    }
    m.width = w;
    m.height = h;
    m.fwhm_px = m.fwhm_px.map(|f| 2.0 * f);
    m.hfr_px = m.hfr_px.map(|f| 2.0 * f);
    // Per mosaic pixel: a superpixel holds four, whose noises add in quadrature.
    m.background_adu /= 4.0;
    m.noise_adu /= 2.0;
    m.background_range_adu /= 4.0;
    Ok(m)
}

/// Superpixel (FITS X_s) to mosaic (FITS X_m): superpixel 1 covers mosaic pixels 1 and 2,
/// so X_m = 2·X_s − 0.5; widths double.
fn to_mosaic_star(s: &mut Star) {
    s.x = 2.0 * s.x - 0.5;
    s.y = 2.0 * s.y - 0.5;
    s.fwhm_px *= 2.0;
    s.fwhm_major_px *= 2.0;
    s.fwhm_minor_px *= 2.0;
    s.hfr_px = s.hfr_px.map(|v| 2.0 * v);
}

fn subtract_rows(img: &mut Array2<f32>, bkg: &BackgroundMap) {
    let w = img.ncols();
    img.as_slice_mut()
        .expect("standard layout")
        .par_chunks_mut(w)
        .enumerate()
        .for_each(|(y, row)| {
            let mut level = vec![0.0f32; w];
            bkg.level_row(y, &mut level);
            for (v, l) in row.iter_mut().zip(&level) {
                *v -= l;
            }
        });
}

/// Subtract the background map row by row and, in the same pass, list the interior
/// pixels standing more than 6σ above it with that σ: the only ones
/// `clean_sharp_pixels` needs to look at.
fn subtract_and_flag(img: &mut Array2<f32>, bkg: &BackgroundMap) -> Vec<(usize, usize, f32)> {
    let (h, w) = img.dim();
    img.as_slice_mut()
        .expect("standard layout")
        .par_chunks_mut(w)
        .enumerate()
        .flat_map_iter(|(y, row)| {
            let mut level = vec![0.0f32; w];
            let mut rms = vec![0.0f32; w];
            bkg.level_row(y, &mut level);
            bkg.rms_row(y, &mut rms);
            for (v, l) in row.iter_mut().zip(&level) {
                *v -= l;
            }
            let mut flagged = Vec::new();
            if y == 0 || y + 1 >= h {
                return flagged;
            }
            // Blocks of 32 pixels are first tested whole (a vectorised maximum of the
            // excess over 6σ); nearly all of them hold no such pixel.
            for (b, (vals, sigmas)) in row.chunks(32).zip(rms.chunks(32)).enumerate() {
                let excess = vals
                    .iter()
                    .zip(sigmas)
                    .fold(f32::NEG_INFINITY, |m, (&v, &s)| m.max(v - 6.0 * s));
                if excess > 0.0 {
                    for (k, (&v, &s)) in vals.iter().zip(sigmas).enumerate() {
                        let x = 32 * b + k;
                        if v > 6.0 * s && x >= 1 && x + 1 < w {
                            flagged.push((x, y, s));
                        }
                    }
                }
            }
            flagged
        })
        .collect()
}

/// The test of `clean_sharp_pixels` for one interior pixel: its value and the median
/// of its eight neighbours when it is sharp.
fn sharp_pixel(img: &Array2<f32>, x: usize, y: usize, sigma: f32) -> Option<(f32, f32)> {
    let v = img[(y, x)];
    if v.is_nan() || v <= 6.0 * sigma {
        return None;
    }
    let mut n = [0.0f32; 8];
    let mut k = 0;
    for dy in 0..3 {
        for dx in 0..3 {
            if dx == 1 && dy == 1 {
                continue;
            }
            let u = img[(y + dy - 1, x + dx - 1)];
            n[k] = if u.is_finite() { u } else { 0.0 };
            k += 1;
        }
    }
    n.sort_unstable_by(f32::total_cmp);
    let med = 0.5 * (n[3] + n[4]);
    (v - med > 6.0 * sigma && v > 8.0 * med.max(sigma)).then_some((v, med))
}

/// Find pixels that stand far above the median of their eight neighbours (more than
/// 6σ, and more than eight times that median): no pixel-sampled star is that sharp (the
/// centre of a star of FWHM 1.3 px is about 5.5 times the median of its neighbours).
/// This is the Laplacian-edge idea of van Dokkum (2001, PASP 113, 1420) in the form of
/// a median contrast. Flagged pixels are replaced by that median, and each group of
/// adjacent flagged pixels is returned once as a sharp rejection.
fn clean_sharp_pixels(
    residual: &mut Array2<f32>,
    bkg: &BackgroundMap,
    bright: &[(usize, usize, f32)],
) -> Vec<Rejected> {
    let (h, w) = residual.dim();
    let img = &*residual;
    let mut found: Vec<(usize, usize, f32, f32)> = bright
        .par_iter()
        .filter_map(|&(x, y, sigma)| sharp_pixel(img, x, y, sigma).map(|(v, med)| (x, y, v, med)))
        .collect();
    let mut flagged = Vec::new();
    // Replacing a pixel of a cosmic-ray track can expose its neighbour as the next sharp
    // one; look again only around what was just replaced.
    for _ in 0..3 {
        if found.is_empty() {
            break;
        }
        for &(x, y, _, med) in &found {
            residual[(y, x)] = med;
        }
        let mut again: Vec<(usize, usize)> = found
            .iter()
            .flat_map(|&(x, y, _, _)| {
                (y - 1..=y + 1).flat_map(move |ny| (x - 1..=x + 1).map(move |nx| (nx, ny)))
            })
            .filter(|&(nx, ny)| nx >= 1 && ny >= 1 && nx < w - 1 && ny < h - 1)
            .collect();
        again.sort_unstable();
        again.dedup();
        flagged.append(&mut found);
        let img = &*residual;
        found = again
            .into_iter()
            .filter_map(|(x, y)| {
                let sigma = bkg.rms_at(x as f64, y as f64) as f32;
                sharp_pixel(img, x, y, sigma).map(|(v, med)| (x, y, v, med))
            })
            .collect();
    }
    flagged.append(&mut found);
    // Group adjacent pixels (a cosmic-ray track) into one rejection at the brightest.
    flagged.sort_by(|a, b| b.2.total_cmp(&a.2));
    let mut groups: Vec<Rejected> = Vec::new();
    for &(x, y, v, _) in &flagged {
        let (fx, fy) = (x as f64 + 1.0, y as f64 + 1.0);
        if !groups
            .iter()
            .any(|g| (g.x - fx).abs() <= 3.0 && (g.y - fy).abs() <= 3.0)
        {
            groups.push(Rejected {
                x: fx,
                y: fy,
                kind: RejectKind::Sharp,
                peak_adu: f64::from(v),
            });
        }
    }
    groups
}

/// Circles around detections, wider for brighter ones, so their wings stay out of the
/// sky statistics.
fn source_mask(w: usize, h: usize, candidates: &[Candidate], fwhm: f64) -> Vec<bool> {
    let mut mask = crate::buffer::zeroed::<bool>(w * h);
    for c in candidates {
        let r = fwhm * (1.5 + c.significance.max(1.0).log10());
        let ri = r.ceil() as i64;
        for dy in -ri..=ri {
            for dx in -ri..=ri {
                if ((dx * dx + dy * dy) as f64) > r * r {
                    continue;
                }
                let (x, y) = (c.x as i64 + dx, c.y as i64 + dy);
                if x >= 0 && y >= 0 && (x as usize) < w && (y as usize) < h {
                    mask[y as usize * w + x as usize] = true;
                }
            }
        }
    }
    mask
}

/// The grid of the raw pixel values (whole ADU, or the steps of a 12- or 14-bit sensor
/// scaled to 16 bits), from about twenty thousand pixels spread over the frame.
fn raw_grid(pixels: &Array2<f32>) -> Option<Grid> {
    let data = pixels.as_slice()?;
    let stride = (data.len() / 20_000).max(1);
    let mut sample: Vec<f32> = data
        .iter()
        .step_by(stride)
        .copied()
        .filter(|v| v.is_finite())
        .collect();
    Grid::of_sample(&mut sample)
}

/// The sky's pixel-to-pixel scatter from the unmasked residual pixels; at most about
/// half a million are sampled. 1.4826 × MAD, whose efficiency for normal data is 37 %
/// (from memory), so its relative standard error is about 1.16/√n: 0.2 % at that size.
/// When the raw values sit on a grid coarser than a twentieth of that scatter, the MAD
/// snaps to the grid (off by up to a fifth on a 12-bit sensor with a dark sky), and the
/// 3σ-clipped standard deviation is used instead: it holds the quantisation's q²/12
/// (Sheppard 1898) as the pixels themselves do, whatever the grid's phase.
fn robust_noise(residual: &Array2<f32>, mask: &[bool], grid: Option<Grid>) -> Option<f64> {
    let data = residual.as_slice()?;
    let stride = (data.len() / 500_000).max(1);
    let mut sample: Vec<f32> = data
        .iter()
        .zip(mask)
        .step_by(stride)
        .filter(|(v, m)| !**m && v.is_finite())
        .map(|(v, _)| *v)
        .collect();
    if sample.len() < 10 {
        return None;
    }
    let center = median_in_place(&mut sample)?;
    let mad = mad_sigma(&sample, center, &mut Vec::new())?;
    match grid {
        Some(g) if g.step > 0.05 * mad => {
            sigma_clip_on(&mut sample, 3.0, 10, grid).map(|s| s.std / CLIP3_STD_CORRECTION)
        }
        _ => Some(mad),
    }
}

/// Candidates bucketed on a coarse grid, to find a stamp's neighbours quickly.
struct CandidateGrid {
    cell: usize,
    nx: usize,
    buckets: Vec<Vec<usize>>,
}

impl CandidateGrid {
    fn new(c: &[Candidate], w: usize, h: usize, cell: usize) -> Self {
        let nx = w.div_ceil(cell);
        let ny = h.div_ceil(cell);
        let mut buckets = vec![Vec::new(); nx * ny];
        for (i, k) in c.iter().enumerate() {
            buckets[(k.y / cell) * nx + k.x / cell].push(i);
        }
        Self { cell, nx, buckets }
    }

    fn near(&self, x: usize, y: usize, radius: usize) -> impl Iterator<Item = usize> + '_ {
        let ny = self.buckets.len() / self.nx;
        let (cx0, cx1) = (
            x.saturating_sub(radius) / self.cell,
            ((x + radius) / self.cell).min(self.nx - 1),
        );
        let (cy0, cy1) = (
            y.saturating_sub(radius) / self.cell,
            ((y + radius) / self.cell).min(ny - 1),
        );
        (cy0..=cy1).flat_map(move |cy| {
            (cx0..=cx1).flat_map(move |cx| self.buckets[cy * self.nx + cx].iter().copied())
        })
    }
}

struct FittedStar {
    fit: PsfFit,
    peak: f64,
    blended: bool,
}

enum Outcome {
    Fitted(FittedStar),
    Rejected(Rejected),
}

#[allow(clippy::too_many_arguments)]
fn measure_candidate(
    residual: &Array2<f32>,
    c: &Candidate,
    index: usize,
    all: &[Candidate],
    grid: &CandidateGrid,
    half: usize,
    edge_margin: f64,
    noise: f64,
    saturation_residual: Option<f64>,
    fwhm_guess: f64,
    (subsample, report_pixel): (usize, f64),
    moffat_min_snr: f64,
) -> Outcome {
    let (h, w) = residual.dim();
    // Brightest pixel near the filtered peak.
    let (mut px, mut py, mut peak) = (c.x, c.y, f32::NEG_INFINITY);
    for y in c.y.saturating_sub(1)..=(c.y + 1).min(h - 1) {
        for x in c.x.saturating_sub(1)..=(c.x + 1).min(w - 1) {
            let v = residual[(y, x)];
            if v.is_finite() && v > peak {
                (px, py, peak) = (x, y, v);
            }
        }
    }
    let peak = f64::from(peak);
    let reject = |kind, x: f64, y: f64| {
        Outcome::Rejected(Rejected {
            x: x + 1.0,
            y: y + 1.0,
            kind,
            peak_adu: peak,
        })
    };
    if !peak.is_finite() {
        return reject(RejectKind::Unfit, c.x as f64, c.y as f64);
    }
    // Saturated: any pixel of the core at the saturation level.
    if let Some(sat) = saturation_residual {
        let r = 2usize;
        for y in py.saturating_sub(r)..=(py + r).min(h - 1) {
            for x in px.saturating_sub(r)..=(px + r).min(w - 1) {
                if f64::from(residual[(y, x)]) >= sat - 0.5 {
                    return reject(RejectKind::Saturated, px as f64, py as f64);
                }
            }
        }
    }
    // A single pixel far above its four neighbours cannot be a star however sharp the
    // seeing (a pixel-sampled PSF of FWHM 1.3 px still has the centre only ~3.6 times
    // its side neighbours); the Laplacian test of van Dokkum (2001) in its simplest form.
    let neighbours: Vec<f64> = [(0i64, -1i64), (0, 1), (-1, 0), (1, 0)]
        .iter()
        .filter_map(|&(dx, dy)| {
            let (x, y) = (px as i64 + dx, py as i64 + dy);
            (x >= 0 && y >= 0 && (x as usize) < w && (y as usize) < h)
                .then(|| f64::from(residual[(y as usize, x as usize)]))
        })
        .filter(|v| v.is_finite())
        .collect();
    let mean4 = neighbours.iter().sum::<f64>() / neighbours.len().max(1) as f64;
    if peak > 5.0 * noise && peak > 5.0 * mean4.max(0.0) + 2.0 * noise {
        return reject(RejectKind::Sharp, px as f64, py as f64);
    }
    let (fx, fy) = (px as f64, py as f64);
    // Distances to the physical edge of the sensor (pixel centres sit 0.5 px inside).
    if fx + 0.5 < edge_margin
        || fy + 0.5 < edge_margin
        || (w as f64 - 0.5) - fx < edge_margin
        || (h as f64 - 0.5) - fy < edge_margin
    {
        return reject(RejectKind::EdgeClipped, fx, fy);
    }

    // The stamp, leaving out pixels nearer to another detection than to this one.
    let others: Vec<(f64, f64)> = grid
        .near(px, py, 2 * half)
        .filter(|&j| j != index)
        .map(|j| (all[j].x as f64, all[j].y as f64))
        .collect();
    let (x0, x1) = (px.saturating_sub(half), (px + half).min(w - 1));
    let (y0, y1) = (py.saturating_sub(half), (py + half).min(h - 1));
    let mut stamp = Stamp {
        x_range: (x0 as f64, x1 as f64),
        y_range: (y0 as f64, y1 as f64),
        subsample,
        report_pixel,
        core_radius: 1.5 * fwhm_guess,
        ..Default::default()
    };
    let reach2 = (half as f64 + 0.5).powi(2);
    for y in y0..=y1 {
        for x in x0..=x1 {
            let v = residual[(y, x)];
            if !v.is_finite() {
                continue;
            }
            let (xf, yf) = (x as f64, y as f64);
            let d_self = (xf - fx).powi(2) + (yf - fy).powi(2);
            // A round stamp: the square's corners are sky a little farther out, which
            // adds fitting time (a fifth of the pixels) and little else.
            if d_self > reach2 {
                continue;
            }
            if others
                .iter()
                .any(|&(ox, oy)| (xf - ox).powi(2) + (yf - oy).powi(2) < d_self)
            {
                continue;
            }
            stamp.x.push(xf);
            stamp.y.push(yf);
            stamp.v.push(f64::from(v));
        }
    }
    let guess = Guess {
        sky: 0.0,
        amplitude: peak.max(noise),
        x0: fx,
        y0: fy,
        fwhm: fwhm_guess,
    };
    // The Moffat profile's extra freedom (its wings) is only measurable on stars well
    // above the noise; stars fainter than the ones that vote on the frame's shape keep
    // the Gaussian, which halves the fitting time on a typical frame. The SNR here is
    // the Gaussian's flux over the noise in its optimal footprint, 4πσ_aσ_b pixels.
    let worth_moffat = |gauss: &PsfFit| {
        let (ga, gb) = gauss.model_axes();
        let footprint = 4.0 * std::f64::consts::PI * (ga / 2.3548) * (gb / 2.3548);
        gauss.total_flux() / (noise * footprint.max(1.0).sqrt()) >= moffat_min_snr
    };
    let Some(fit) = fit_profile(&stamp, guess, worth_moffat) else {
        return reject(RejectKind::Unfit, fx, fy);
    };
    // A fit whose centre wandered off the detection found something else.
    if (fit.x0 - fx).hypot(fit.y0 - fy) > 0.5 * fwhm_guess + 1.5 {
        return reject(RejectKind::Unfit, fx, fy);
    }
    Outcome::Fitted(FittedStar {
        fit,
        peak,
        // Another detection inside the flux aperture (2.5 × FWHM) makes the aperture sum
        // not this star's alone. Sharing a detection component with a star farther away
        // (bright stars' components reach far) does not.
        blended: others
            .iter()
            .any(|&(ox, oy)| (ox - fx).hypot(oy - fy) <= 2.5 * fwhm_guess + 2.0),
    })
}

/// Bright pixels (from `subtract_and_flag`) that stand above every other pixel within
/// 2 px in the cleaned residual: the cores of the brightest stars, found before any
/// detection so the matched filter can be chosen to fit them. Significance is the
/// pixel's own SNR.
fn bright_peaks(residual: &Array2<f32>, bright: &[(usize, usize, f32)]) -> Vec<Candidate> {
    let (h, w) = residual.dim();
    bright
        .par_iter()
        .filter(|&&(x, y, _)| x >= 2 && y >= 2 && x + 2 < w && y + 2 < h)
        .filter_map(|&(x, y, sigma)| {
            let v = residual[(y, x)];
            let highest = (y - 2..=y + 2)
                .all(|yy| (x - 2..=x + 2).all(|xx| (xx == x && yy == y) || residual[(yy, xx)] < v));
            (highest && sigma > 0.0).then(|| Candidate {
                x,
                y,
                significance: f64::from(v / sigma),
                area: 1,
                blended: false,
                component: 0,
            })
        })
        .collect()
}

/// FWHM of the brightest isolated, unsaturated detections, from Gaussian fits.
fn estimate_fwhm(
    residual: &Array2<f32>,
    candidates: &[Candidate],
    bkg: &BackgroundMap,
    saturation: Option<f64>,
    start: f64,
) -> Option<f64> {
    let mut bright: Vec<&Candidate> = candidates.iter().filter(|c| !c.blended).collect();
    bright.sort_by(|a, b| b.significance.total_cmp(&a.significance));
    let (h, w) = residual.dim();
    let half = ((2.5 * start + 3.0).ceil() as usize).clamp(6, 30);
    let fits: Vec<f64> = bright
        .iter()
        .filter(|c| c.x >= half && c.y >= half && c.x + half < w && c.y + half < h)
        .filter(|c| {
            saturation.is_none_or(|s| {
                f64::from(residual[(c.y, c.x)]) < 0.5 * (s - bkg.level_at(c.x as f64, c.y as f64))
            })
        })
        .take(60)
        .filter_map(|c| {
            let mut stamp = Stamp {
                x_range: ((c.x - half) as f64, (c.x + half) as f64),
                y_range: ((c.y - half) as f64, (c.y + half) as f64),
                ..Default::default()
            };
            for y in c.y - half..=c.y + half {
                for x in c.x - half..=c.x + half {
                    let v = residual[(y, x)];
                    if v.is_finite() {
                        stamp.x.push(x as f64);
                        stamp.y.push(y as f64);
                        stamp.v.push(f64::from(v));
                    }
                }
            }
            let peak = f64::from(residual[(c.y, c.x)]);
            let fit = fit_gaussian(
                &stamp,
                Guess {
                    sky: 0.0,
                    amplitude: peak.max(1e-6),
                    x0: c.x as f64,
                    y0: c.y as f64,
                    fwhm: start,
                },
            )?;
            let (_, minor) = fit.fwhm_axes();
            (minor >= 0.8).then(|| fit.fwhm())
        })
        .collect();
    if fits.len() < 3 {
        return None;
    }
    median_f64(&fits)
}
