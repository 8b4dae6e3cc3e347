//! Measurement of one frame: image in, numbers out. No files, clocks or network here.
//!
//! The way through (`measure_image` below orchestrates it): background map
//! (`background`) → subtract it and flag bright pixels in one pass, clean the pixels no
//! star can make (`sharp`) → the stars' width from the brightest (`seeing`) →
//! matched-filter detection and deblending (`detect`) → the sky again with the sources
//! masked, and its noise (`noise`) → each candidate fitted or rejected (`candidate`,
//! with the PSF models of `psf`) → aperture photometry, half-flux radius and SNR
//! (`photometry`) → frame metrics. Color mosaics go through `mosaic`.

pub mod background;
pub mod calibration;
mod candidate;
pub mod convolve;
pub mod detect;
mod mosaic;
mod noise;
pub mod photometry;
mod pixels;
pub mod psf;
mod seeing;
pub mod shape;
mod sharp;
pub mod stats;

use ndarray::Array2;
use rayon::prelude::*;
use serde::Serialize;

use background::{BackgroundMap, BackgroundParams};
use candidate::{sort_outcomes, CandidateGrid, FittedStar, Fitting, Outcome};
use detect::{detect, DetectParams};
pub use mosaic::measure_mosaic;
use noise::{raw_grid, robust_noise, source_mask};
use pixels::{finite_max, plateau_saturation, subtract_rows};
use psf::PsfModel;
use seeing::{bright_peaks, estimate_fwhm};
use sharp::{clean_sharp_pixels, subtract_and_flag};
use stats::{median_f64, weighted_median};

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
    /// Set for a color mosaic's superpixel image: widths are reported as sampled by
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
    /// Shape components and their noise (see `shape`).
    #[serde(skip)]
    pub shape: shape::Shape,
    /// [r, g, b] fluxes for one-shot-color frames.
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
    let bkg = BackgroundMap::estimate(&pixels, None, background_params).ok_or_else(|| {
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
    let sources = detect_matched(&pixels, &bkg, &bright, saturation, params.detect);
    let (bkg, noise) = sky_without_sources(&mut pixels, bkg, &sources, background_params);
    let sky = Sky {
        bkg: &bkg,
        noise,
        grid: background_params.grid,
        saturation,
    };
    let (fitted, rejected) = fit_sources(&pixels, &sky, &sources, cleaned, params);
    let mut stars = photometry_of(&fitted, &pixels, &sky, sources.fwhm_guess, params);
    let shape = frame_shape(&mut stars, params.min_shape_snr);
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
        fwhm_px: shape.fwhm_px,
        eccentricity: shape.eccentricity,
        background_adu: bkg.median_level(),
        noise_adu: noise,
        snr_median,
        hfr_px: shape.hfr_px,
        saturated_count,
        sharp_count,
        background_range_adu: bkg.level_range(),
        shape_star_count: shape.voters,
        trails: sources.trails,
        stars,
        rejected,
    })
}

/// What detection found, and the stars' width (FWHM, px) as the frame shows it.
struct Sources {
    candidates: Vec<detect::Candidate>,
    trails: Vec<detect::Trail>,
    fwhm_guess: f64,
}

/// Detection with a kernel matched to the stars: the configured one, unless the
/// brightest peaks of the cleaned frame show a PSF much wider or narrower; and once more
/// with a matched kernel if the detected stars still disagree with it.
fn detect_matched(
    pixels: &Array2<f32>,
    bkg: &BackgroundMap,
    bright: &[(usize, usize, f32)],
    saturation: Option<f64>,
    mut dparams: DetectParams,
) -> Sources {
    let peaks = bright_peaks(pixels, bright);
    if let Some(seen) = estimate_fwhm(pixels, &peaks, bkg, saturation, dparams.kernel_fwhm) {
        if (seen / dparams.kernel_fwhm - 1.0).abs() > 0.35 {
            dparams.kernel_fwhm = seen.clamp(1.5, 15.0);
        }
    }
    let mut found = detect(pixels, bkg, &dparams);
    let mut candidates = std::mem::take(&mut found.candidates);
    let mut fwhm_guess = estimate_fwhm(pixels, &candidates, bkg, saturation, dparams.kernel_fwhm)
        .unwrap_or(dparams.kernel_fwhm);
    if (fwhm_guess / dparams.kernel_fwhm - 1.0).abs() > 0.35 {
        let start = fwhm_guess;
        dparams.kernel_fwhm = fwhm_guess.clamp(1.5, 15.0);
        found = detect(pixels, bkg, &dparams);
        candidates = std::mem::take(&mut found.candidates);
        fwhm_guess = estimate_fwhm(pixels, &candidates, bkg, saturation, start).unwrap_or(start);
    }
    Sources {
        candidates,
        trails: found.trails,
        fwhm_guess,
    }
}

/// The sky again with the sources masked (crowded fields), taken out of `pixels`, then
/// the noise as the robust scatter of the unmasked pixels about the local background.
fn sky_without_sources(
    pixels: &mut Array2<f32>,
    bkg: BackgroundMap,
    sources: &Sources,
    background_params: BackgroundParams,
) -> (BackgroundMap, f64) {
    let (h, w) = pixels.dim();
    let mask = source_mask(w, h, &sources.candidates, sources.fwhm_guess);
    // Clipping alone copes with a sparse field; the masked second estimate is worth its
    // cost only when sources cover a noticeable part of the sky.
    let masked: usize = mask
        .par_chunks(1 << 16)
        .map(|c| c.iter().filter(|&&m| m).count())
        .sum();
    let masked_fraction = masked as f64 / mask.len() as f64;
    let raw_free = (masked_fraction > 0.03)
        .then(|| {
            BackgroundMap::estimate_with_offset(pixels, Some(&mask), Some(&bkg), background_params)
        })
        .flatten();
    let bkg = match raw_free {
        Some(better) => {
            // Both maps share their mesh, and the spline is linear in the mesh values, so
            // the change is one spline of the differences.
            subtract_rows(pixels, &better.minus(&bkg));
            better
        }
        None => bkg,
    };
    let noise =
        robust_noise(pixels, &mask, background_params.grid).unwrap_or_else(|| bkg.median_rms());
    (bkg, noise)
}

/// The sky under the sources, as fitting and photometry use it.
struct Sky<'a> {
    bkg: &'a BackgroundMap,
    noise: f64,
    /// The grid the raw values sit on, if any.
    grid: Option<stats::Grid>,
    /// The sensor's saturation level, when known.
    saturation: Option<f64>,
}

/// Every candidate worth it fitted (in parallel), then sorted over the frame into stars
/// and what is not a star (`cleaned` holds the sharp pixels already taken out).
fn fit_sources(
    pixels: &Array2<f32>,
    sky: &Sky<'_>,
    sources: &Sources,
    cleaned: Vec<Rejected>,
    params: &MeasureParams,
) -> (Vec<FittedStar>, Vec<Rejected>) {
    let (h, w) = pixels.dim();
    let (candidates, fwhm_guess) = (&sources.candidates, sources.fwhm_guess);
    let sat_residual = |x: usize, y: usize| {
        sky.saturation
            .map(|s| s - sky.bkg.level_at(x as f64, y as f64))
    };
    let grid = CandidateGrid::new(candidates, w, h, 32);
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
    let fitting = Fitting {
        residual: pixels,
        all: candidates,
        grid,
        half,
        edge_margin,
        noise: sky.noise,
        fwhm_guess,
        subsample,
        report_pixel: params.report_pixel,
        moffat_min_snr: 0.8 * params.min_shape_snr,
    };
    let outcomes: Vec<Outcome> = candidates
        .par_iter()
        .enumerate()
        .filter(|(_, c)| c.significance >= fit_floor)
        .map(|(i, c)| fitting.candidate(i, sat_residual(c.x, c.y)))
        .collect();
    sort_outcomes(outcomes, cleaned, fwhm_guess, subsample)
}

/// Each fitted star's photometry with an aperture scaled to the frame's FWHM (from the
/// stars fit well enough to vote), brightest first; stars below the reporting SNR are
/// left out.
fn photometry_of(
    fitted: &[FittedStar],
    pixels: &Array2<f32>,
    sky: &Sky<'_>,
    fwhm_guess: f64,
    params: &MeasureParams,
) -> Vec<Star> {
    let frame_fwhm = median_f64(
        &fitted
            .iter()
            .filter(|f| !f.blended)
            .map(|f| f.fit.fwhm())
            .collect::<Vec<_>>(),
    )
    .unwrap_or(fwhm_guess);
    let (bkg, noise) = (sky.bkg, sky.noise);
    let r_ap = (2.5 * frame_fwhm).max(3.0);
    let r_snr = frame_fwhm.max(1.5);
    let r_in = r_ap + 2.0;
    let r_out = r_in + (1.5 * frame_fwhm).max(6.0);
    let gain = params.gain_e_per_adu;
    // A grid a twentieth of the noise or finer does not bias a median noticeably.
    let coarse_grid = sky.grid.filter(|g| g.step > 0.05 * noise);
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
            let [ap, core] = photometry::apertures(pixels, cx, cy, [r_ap, r_snr], sky)?;
            let snr = photometry::ccd_snr(core.flux, core.n_pix, core.n_sky, noise, gain);
            if snr < params.min_snr {
                return None;
            }
            // Out to 3.5 FWHM: heavy Moffat wings (β ≈ 2.5) still hold 1 % of the light
            // beyond 2.5 FWHM, which would pull the half-flux radius in.
            let hfr = photometry::half_flux_radius(pixels, cx, cy, 3.5 * frame_fwhm, ap.local_sky);
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
                shape: {
                    let (e1, e2) = f.fit.shape_components();
                    shape::Shape {
                        e1,
                        e2,
                        variance: f.fit.shape_variance(),
                    }
                },
                rgb: None,
            })
        })
        .collect();
    stars.sort_by(|a, b| b.flux.total_cmp(&a.flux));
    stars
}

/// The frame's shape from its stars.
struct FrameShape {
    fwhm_px: Option<f64>,
    eccentricity: Option<f64>,
    hfr_px: Option<f64>,
    /// Stars that voted.
    voters: usize,
}

/// Each star's eccentricity helped by the frame's shape (see `shape`), then the frame's
/// FWHM, eccentricity and half-flux radius from the stars that vote: unblended, at least
/// `min_shape_snr` (every unblended star when fewer than five are).
fn frame_shape(stars: &mut [Star], min_shape_snr: f64) -> FrameShape {
    let mut voters: Vec<bool> = stars
        .iter()
        .map(|s| !s.blended && s.snr >= min_shape_snr)
        .collect();
    if voters.iter().filter(|&&v| v).count() < 5 {
        voters = stars.iter().map(|s| !s.blended).collect();
    }
    let shapes: Vec<shape::Shape> = stars.iter().map(|s| s.shape).collect();
    for (star, e) in stars.iter_mut().zip(shape::shrink(&shapes, &voters)) {
        star.eccentricity = e;
    }
    let shape: Vec<&Star> = stars
        .iter()
        .zip(&voters)
        .filter(|(_, &v)| v)
        .map(|(s, _)| s)
        .collect();
    let med = |f: &dyn Fn(&Star) -> Option<f64>| {
        median_f64(&shape.iter().filter_map(|s| f(s)).collect::<Vec<_>>())
    };
    // Near round, one star's eccentricity is dominated by noise (it grows as the
    // square root of the noise in its shape, so a round star at SNR 100 reads about
    // 0.2 before correction). Each star's value is helped by the frame's shape, and the
    // median is weighted by SNR (capped at 300), so the better-measured stars count for
    // more without a few bright ones deciding.
    let eccentricity = weighted_median(
        &shape
            .iter()
            .map(|s| (s.eccentricity, s.snr.min(300.0)))
            .collect::<Vec<_>>(),
    );
    FrameShape {
        fwhm_px: med(&|s| Some(s.fwhm_px)),
        eccentricity,
        hfr_px: med(&|s| s.hfr_px),
        voters: shape.len(),
    }
}
