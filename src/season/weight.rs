//! A frame's weight across nights: how much one frame of a target adds to a stack of all
//! its nights. Pure.
//!
//! **The method.** Frames are stacked after each is scaled to a common flux, and the
//! stack's noise is least when each frame is weighted by the inverse of its variance
//! (the weighted mean, w = 1/σ²: Bevington & Robinson 2003, *Data Reduction and Error
//! Analysis for the Physical Sciences*, 3rd ed., eq. 4.17). A frame scaled so that a
//! reference star has flux 1 has variance 1/SNR² there, so its weight is
//!
//! ```text
//! w = SNR²
//! ```
//!
//! with the SNR of that star as the CCD equation gives it (Merline & Howell 1995), which
//! is what `measure` reports per star. One number carries the frame's transparency, its
//! seeing (a wider star sums more sky), its sky's noise and its exposure; ranked per
//! second of exposure (w / t, the weight's rate) it says which frames give the most for
//! the time they took.
//!
//! **The reference stars.** A target's frames show the same field, so the same stars
//! are found by their rank in brightness: the stars ranked [`WINDOW`] in flux, counted
//! from the brightest *including* the saturated ones (a sharp frame saturates more stars
//! than a soft one, and without counting them its window would slide to fainter stars).
//! Where a target's frames saturate, the window starts after what most of its frames
//! saturate (`window_start`). A star of the window that a frame saturates counts as
//! measured better than any other, one it did not detect as SNR 0; the frame's
//! reference SNR is the median over the window.

use serde::Serialize;

/// The flux ranks whose stars are the reference: the 5th to the 20th brightest where
/// nothing saturates. The brightest four are left out (they saturate first, and an
/// edge, a blend or a dither takes one out of a frame now and then).
pub const WINDOW: (usize, usize) = (5, 20);

/// How many of a frame's brightest unsaturated stars are kept for the weight
/// (`Metrics::bright_snr`): the window, wherever saturation puts it.
pub const KEPT: usize = 64;

/// A frame's brightest unsaturated stars' SNR, brightest first, at most [`KEPT`]:
/// (flux, snr) pairs in, SNR out. Stars with a non-finite or non-positive flux are not
/// stars for this.
pub fn bright_snr(stars: impl IntoIterator<Item = (f64, f64)>) -> Vec<f64> {
    let mut v: Vec<(f64, f64)> = stars
        .into_iter()
        .filter(|(f, s)| f.is_finite() && *f > 0.0 && s.is_finite())
        .collect();
    v.sort_by(|a, b| b.0.total_cmp(&a.0));
    v.truncate(KEPT);
    // One decimal is all a weight needs, and keeps the stored record small.
    v.into_iter()
        .map(|(_, s)| (s * 10.0).round() / 10.0)
        .collect()
}

/// Where a group of frames' window starts (a flux rank, 1 = brightest): after the
/// number of stars that nine in ten of its frames saturate, so that the window is
/// measured, not saturated, in nearly every frame.
pub fn window_start(saturated: &[usize]) -> usize {
    let mut s = saturated.to_vec();
    s.sort_unstable();
    let p90 = if s.is_empty() {
        0
    } else {
        s[((s.len() - 1) as f64 * 0.9).round() as usize]
    };
    // Never so far down that a frame's kept stars cannot reach the window's end.
    (WINDOW.0 + p90).min(KEPT - (WINDOW.1 - WINDOW.0))
}

/// A frame's reference SNR: the median over the window of flux ranks starting at
/// `start`, from its brightest unsaturated stars' SNR (`bright`, brightest first) and
/// how many stars it saturated. A saturated rank counts as the best measured, a rank
/// with no star as 0. `None` when the frame has no stars recorded at all.
pub fn reference_snr(bright: &[f64], saturated: usize, start: usize) -> Option<f64> {
    if bright.is_empty() && saturated == 0 {
        return None;
    }
    let len = WINDOW.1 - WINDOW.0 + 1;
    let mut window: Vec<f64> = (start..start + len)
        .map(|rank| {
            if rank <= saturated {
                f64::INFINITY
            } else {
                bright.get(rank - saturated - 1).copied().unwrap_or(0.0)
            }
        })
        .collect();
    window.sort_by(f64::total_cmp);
    let (a, b) = (window[len / 2 - 1], window[len / 2]);
    let median = if a.is_infinite() || b.is_infinite() {
        // More than half the window saturated: the measured half's best.
        window
            .iter()
            .copied()
            .filter(|v| v.is_finite())
            .fold(0.0, f64::max)
    } else {
        0.5 * (a + b)
    };
    Some(median.max(0.0))
}

/// A frame's weight and its rate per second of exposure.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Weight {
    /// w = SNR² of the reference stars.
    pub weight: f64,
    /// w / exposure (per second); the weight itself when the exposure is unknown.
    pub per_s: f64,
}

/// The weight of a frame of reference SNR `snr` and exposure `exposure_s`.
pub fn weight(snr: f64, exposure_s: Option<f64>) -> Weight {
    let w = snr * snr;
    Weight {
        weight: w,
        per_s: match exposure_s.filter(|t| *t > 0.0 && t.is_finite()) {
            Some(t) => w / t,
            None => w,
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sim::{render, PsfShape, SimParams};

    /// The CCD equation (Merline & Howell 1995) for a star of `e` electrons in an
    /// aperture of `n` pixels over a sky of `sky` e⁻/px with read noise `rn` e⁻.
    fn ccd_snr(e: f64, n: f64, sky: f64, rn: f64) -> f64 {
        e / (e + n * (sky + rn * rn)).sqrt()
    }

    #[test]
    fn the_weight_of_a_frame_is_the_inverse_variance_of_its_scaled_flux() {
        // Bevington & Robinson eq. 4.17: the weighted mean of frames scaled to one flux
        // has the least variance with w = 1/σ²; scaled to flux 1, σ = 1/SNR.
        let (a, b) = (
            ccd_snr(5e4, 50.0, 800.0, 5.0),
            ccd_snr(2e4, 80.0, 1500.0, 5.0),
        );
        let (wa, wb) = (weight(a, Some(120.0)), weight(b, Some(120.0)));
        let (va, vb) = (1.0 / (a * a), 1.0 / (b * b));
        let mean_var = |x: f64| x * x * va + (1.0 - x) * (1.0 - x) * vb;
        let best = wa.weight / (wa.weight + wb.weight);
        for x in [best - 0.05, best + 0.05, 0.5] {
            assert!(mean_var(best) < mean_var(x));
        }
        // Per second: twice the exposure at the same rate is twice the weight.
        let long = weight(a * 2f64.sqrt(), Some(240.0));
        assert!((long.per_s - wa.per_s).abs() < 1e-9 * wa.per_s);
    }

    #[test]
    fn the_window_counts_saturated_stars_among_the_brightest() {
        // Twenty stars of SNR 200, 190, ... One frame saturates its three brightest, the
        // other none: the same ranks (the same stars) make each one's reference.
        let all: Vec<f64> = (0..40).map(|k| 200.0 - 5.0 * k as f64).collect();
        let sharp = reference_snr(&all[3..], 3, 5).unwrap();
        let soft = reference_snr(&all, 0, 5).unwrap();
        assert_eq!(sharp, soft);
        // A star not detected counts as nothing; more than half missing is a poor frame.
        assert_eq!(reference_snr(&all[..10], 0, 5).unwrap(), 0.0);
        assert_eq!(reference_snr(&[], 0, 5), None);
        // Where most frames saturate eight stars, the window starts after them.
        assert_eq!(window_start(&[8, 8, 8, 7, 9, 8, 8, 8, 8, 8]), 13);
        assert_eq!(window_start(&[]), 5);
        assert_eq!(window_start(&[500]), KEPT - 15);
    }

    /// The reference SNR as the truth has it: the same window over the rendered stars
    /// (brightest first by their true flux), with each star's CCD-equation SNR.
    fn true_reference(truth: &crate::sim::SimTruth, start: usize) -> f64 {
        let mut stars: Vec<(f64, f64, bool)> = truth
            .stars
            .iter()
            .filter(|s| {
                // Away from the edges, where the measurement leaves stars out.
                let m = 12.0;
                s.x > m && s.y > m && s.x < truth.width as f64 - m && s.y < truth.height as f64 - m
            })
            .map(|s| (s.flux, s.snr, s.saturated))
            .collect();
        stars.sort_by(|a, b| b.0.total_cmp(&a.0));
        let saturated = stars.iter().take_while(|s| s.2).count();
        let bright: Vec<f64> = stars.iter().filter(|s| !s.2).map(|s| s.1).collect();
        reference_snr(&bright, saturated, start).unwrap()
    }

    #[test]
    fn weights_follow_the_ccd_equation_across_seeing_sky_and_transparency() {
        // Frames of one field (the same seed: the same stars) under a clear, sharp sky,
        // soft seeing, a bright sky and thin cloud, measured as `measure` does; each
        // frame's weight against the clear frame's, from the measured stars and from
        // the rendered stars' CCD-equation SNR (Merline & Howell 1995).
        let base = SimParams {
            width: 512,
            height: 512,
            seed: 11,
            star_count: 160,
            psf: PsfShape::Gaussian,
            fwhm_px: 2.8,
            sky_e: 600.0,
            flux_range_e: (600.0, 3.0e5),
            ..Default::default()
        };
        let frames = [
            base.clone(),
            SimParams {
                fwhm_px: 4.6,
                ..base.clone()
            },
            SimParams {
                sky_e: 2400.0,
                ..base.clone()
            },
            SimParams {
                flux_range_e: (300.0, 1.5e5),
                ..base.clone()
            },
        ];
        // The gain and full scale the frames' headers give `measure`.
        let params = crate::measure::MeasureParams {
            gain_e_per_adu: Some(1.0),
            saturation_adu: Some(65535.0),
            ..Default::default()
        };
        let mut measured = Vec::new();
        let mut truths = Vec::new();
        for p in &frames {
            let (pixels, _, truth) = render(p);
            let m = crate::measure::measure_image(pixels, &params).unwrap();
            let bright = bright_snr(m.stars.iter().map(|s| (s.flux, s.snr)));
            measured.push((bright, m.saturated_count));
            truths.push(truth);
        }
        let start = window_start(&measured.iter().map(|m| m.1).collect::<Vec<_>>());
        let w = |snr: f64| weight(snr, Some(120.0)).weight;
        let ours: Vec<f64> = measured
            .iter()
            .map(|(b, s)| w(reference_snr(b, *s, start).unwrap()))
            .collect();
        let truth: Vec<f64> = truths.iter().map(|t| w(true_reference(t, start))).collect();
        for k in 1..frames.len() {
            let (r, t) = (ours[k] / ours[0], truth[k] / truth[0]);
            assert!(
                (r / t - 1.0).abs() < 0.12,
                "frame {k}: weight {r:.3} of the clear frame's, the CCD equation says {t:.3}"
            );
            assert!(
                r < 0.9,
                "frame {k} weighs less than the clear frame: {r:.3}"
            );
        }
    }
}
