//! Differential photometry of the bright persistent sources against their ensemble
//! (the median of the others): each frame's zero point and each source's mean magnitude,
//! iterated three times. Shared by the variability test, the colors and the catalogue.

use super::Night;
use crate::measure::stats::median_f64;
use crate::night::tracks::TrackPoint;

/// Instrumental magnitude −2.5 log10(flux).
pub(super) fn mag(p: &TrackPoint) -> f64 {
    -2.5 * p.flux.max(1e-30).log10()
}

/// Its error: 2.5 / ln 10 × relative flux error.
pub(super) fn mag_err(p: &TrackPoint) -> f64 {
    1.085_736 * p.flux_err / p.flux.max(1e-30)
}

pub(super) struct Ensemble {
    /// Persistent sources with a median SNR of 30 or more.
    pub bright: Vec<usize>,
    /// Each frame's zero point against the ensemble.
    pub zp: Vec<f64>,
    /// Each bright source's mean magnitude on the ensemble's scale.
    pub mean_mag: Vec<f64>,
}

impl Ensemble {
    pub fn of(night: &Night) -> Self {
        let Night {
            sources,
            persistent,
            ..
        } = night;
        let n = night.n;
        // Differential photometry of persistent sources against the ensemble.
        let bright: Vec<usize> = (0..sources.len())
            .filter(|&s| {
                persistent[s]
                    && median_f64(&sources[s].points.iter().map(|p| p.snr).collect::<Vec<_>>())
                        .unwrap_or(0.0)
                        >= 30.0
            })
            .collect();
        let mut zp = vec![0.0f64; n];
        let mut mean_mag: Vec<f64> = bright
            .iter()
            .map(|&s| {
                median_f64(&sources[s].points.iter().map(mag).collect::<Vec<_>>()).unwrap_or(0.0)
            })
            .collect();
        for _ in 0..3 {
            for (i, z) in zp.iter_mut().enumerate() {
                let d: Vec<f64> = bright
                    .iter()
                    .zip(mean_mag.iter())
                    .filter_map(|(&s, m)| sources[s].in_frame(i).map(|p| mag(p) - m))
                    .collect();
                *z = median_f64(&d).unwrap_or(0.0);
            }
            for (k, &s) in bright.iter().enumerate() {
                mean_mag[k] = median_f64(
                    &sources[s]
                        .points
                        .iter()
                        .map(|p| mag(p) - zp[p.frame])
                        .collect::<Vec<_>>(),
                )
                .unwrap_or(0.0);
            }
        }
        Ensemble {
            bright,
            zp,
            mean_mag,
        }
    }
}
