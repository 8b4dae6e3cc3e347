//! The frame's star width before detection: the cores of the brightest stars, found from
//! the flagged bright pixels, and the median FWHM of Gaussian fits to the brightest
//! isolated, unsaturated detections. It chooses the matched filter and the fit's start.

use ndarray::Array2;
use rayon::prelude::*;

use super::background::BackgroundMap;
use super::detect::Candidate;
use super::psf::{fit_gaussian, Guess, Stamp};
use super::stats::median_f64;

/// Bright pixels (from `subtract_and_flag`) that stand above every other pixel within
/// 2 px in the cleaned residual: the cores of the brightest stars, found before any
/// detection so the matched filter can be chosen to fit them. Significance is the
/// pixel's own SNR.
pub(super) fn bright_peaks(
    residual: &Array2<f32>,
    bright: &[(usize, usize, f32)],
) -> Vec<Candidate> {
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
pub(super) fn estimate_fwhm(
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::background::BackgroundParams;

    #[test]
    fn the_width_of_gaussian_stars_is_estimated_from_the_brightest() {
        let fwhm = 3.5;
        let s = fwhm / (8.0 * std::f64::consts::LN_2).sqrt();
        let centres: Vec<(f64, f64)> = (0..8)
            .map(|k| {
                (
                    30.0 + 40.0 * (k % 4) as f64 + 0.3,
                    40.0 + 60.0 * (k / 4) as f64 - 0.2,
                )
            })
            .collect();
        let img = Array2::from_shape_fn((160, 180), |(y, x)| {
            centres
                .iter()
                .map(|&(cx, cy)| {
                    800.0
                        * (-((x as f64 - cx).powi(2) + (y as f64 - cy).powi(2)) / (2.0 * s * s))
                            .exp()
                })
                .sum::<f64>() as f32
        });
        let bkg = BackgroundMap::estimate(
            &Array2::<f32>::zeros((160, 180)),
            None,
            BackgroundParams::default(),
        )
        .unwrap();
        let bright: Vec<(usize, usize, f32)> = centres
            .iter()
            .map(|&(cx, cy)| (cx.round() as usize, cy.round() as usize, 1.0))
            .collect();
        let peaks = bright_peaks(&img, &bright);
        assert_eq!(peaks.len(), 8);
        let seen = estimate_fwhm(&img, &peaks, &bkg, None, 3.0).unwrap();
        // Gaussian fits at pixel centres read the profile's own FWHM.
        assert!((seen / fwhm - 1.0).abs() < 0.02, "{seen}");
    }
}
