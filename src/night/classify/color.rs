//! Color outliers on one-shot-color frames: bright persistent sources whose colors
//! (−2.5 log10 R/G and B/G) lie more than 5 robust σ from the field's.

use super::ensemble::{mag, Ensemble};
use super::{anomaly, detections_of, Night};
use crate::measure::stats::{median_f64, robust_sigma_f64};
use crate::night::detail::{ColorDetail, Detail};
use crate::night::{Anomaly, AnomalyKind, Detection};

pub(super) fn color_outliers(night: &Night, ensemble: &Ensemble) -> Vec<Anomaly> {
    let Night {
        frames, sources, ..
    } = night;
    let bright = &ensemble.bright;
    let mut anomalies = Vec::new();
    // Color: one-shot-color frames, persistent bright sources far from the field's locus.
    let colors: Vec<(usize, f64, f64)> = bright
        .iter()
        .filter_map(|&s| {
            let (c1, c2): (Vec<f64>, Vec<f64>) = sources[s]
                .points
                .iter()
                .filter_map(|p| {
                    let c = p.rgb?;
                    (c[0] > 0.0 && c[1] > 0.0 && c[2] > 0.0)
                        .then(|| (-2.5 * (c[0] / c[1]).log10(), -2.5 * (c[2] / c[1]).log10()))
                })
                .unzip();
            Some((s, median_f64(&c1)?, median_f64(&c2)?))
        })
        .collect();
    if colors.len() >= 8 {
        let c1: Vec<f64> = colors.iter().map(|c| c.1).collect();
        let c2: Vec<f64> = colors.iter().map(|c| c.2).collect();
        let (m1, m2) = (
            median_f64(&c1).unwrap_or(0.0),
            median_f64(&c2).unwrap_or(0.0),
        );
        let (s1, s2) = (
            robust_sigma_f64(&c1).unwrap_or(1.0).max(0.02),
            robust_sigma_f64(&c2).unwrap_or(1.0).max(0.02),
        );
        for &(s, a, b) in &colors {
            let (z1, z2) = ((a - m1) / s1, (b - m2) / s2);
            if z1.abs() > 5.0 || z2.abs() > 5.0 {
                let dets: Vec<Detection> = detections_of(&sources[s]);
                anomalies.push(anomaly(
                    frames,
                    AnomalyKind::Color,
                    dets,
                    Detail::Color(ColorDetail {
                        instrumental_mag: median_f64(
                            &sources[s].points.iter().map(mag).collect::<Vec<_>>(),
                        ),
                        color_rg_mag: a,
                        color_bg_mag: b,
                        z_rg: z1,
                        z_bg: z2,
                        field_rg_mag: m1,
                        field_bg_mag: m2,
                        index:
                            "-2.5 log10(R/G) and -2.5 log10(B/G), robust z-score against the field",
                    }),
                ));
            }
        }
    }

    anomalies
}
