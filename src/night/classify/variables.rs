//! Variables: bright persistent sources whose differential magnitudes against the
//! ensemble scatter beyond their noise, by the reduced χ² of those magnitudes and its
//! false-alarm probability (counting every star tested), robust to a few bad frames.

use super::ensemble::{mag, mag_err, Ensemble};
use super::{anomaly, chi2_tail, detections_of, Night};
use crate::measure::stats::{median_f64, robust_sigma_f64};
use crate::night::detail::{Detail, LightCurvePoint, VariableDetail};
use crate::night::tracks::TrackPoint;
use crate::night::{Anomaly, AnomalyKind, Detection};

pub(super) fn variables(night: &Night, ensemble: &Ensemble) -> Vec<Anomaly> {
    let Night {
        frames,
        sources,
        transparency_loss,
        ..
    } = night;
    let Ensemble {
        bright,
        zp,
        mean_mag,
    } = ensemble;
    let (n, fwhm) = (night.n, night.fwhm);
    let mut anomalies = Vec::new();
    // Extra scatter of each frame beyond photon noise (cloud, seeing, focus).
    let extra: Vec<f64> = (0..n)
        .map(|i| {
            let (res, phot): (Vec<f64>, Vec<f64>) = bright
                .iter()
                .zip(mean_mag.iter())
                .filter_map(|(&s, m)| {
                    sources[s]
                        .in_frame(i)
                        .map(|p| (mag(p) - zp[i] - m, mag_err(p)))
                })
                .unzip();
            match (robust_sigma_f64(&res), median_f64(&phot)) {
                (Some(r), Some(ph)) if res.len() >= 5 => (r * r - ph * ph).max(0.0),
                _ => 0.01,
            }
        })
        .collect();
    let trials = bright.len().max(1) as f64;
    // Points fit for photometry: not blended, not cut by the frame's edge, well above
    // the noise, and not from frames that lost much of their light.
    let usable = |p: &TrackPoint| {
        let f = &frames[p.frame];
        let margin = 2.5 * f.fwhm_px.unwrap_or(fwhm) + 3.0;
        !p.blended
            && p.snr >= 10.0
            && p.x > margin
            && p.y > margin
            && p.x < f.width as f64 - margin
            && p.y < f.height as f64 - margin
            && transparency_loss[p.frame].is_none_or(|l| l < 0.5)
            // In a soft frame the aperture (2.5 × FWHM) reaches faint neighbours that
            // sharp frames leave out; such frames are not used to judge variability.
            && f.fwhm_px.is_none_or(|w| w <= 1.3 * fwhm)
    };
    for (k, &s) in bright.iter().enumerate() {
        let pts: Vec<&TrackPoint> = sources[s].points.iter().filter(|p| usable(p)).collect();
        if pts.len() < 8 {
            continue;
        }
        let terms: Vec<(f64, f64)> = pts
            .iter()
            .map(|p| {
                let r = mag(p) - zp[p.frame] - mean_mag[k];
                let var = mag_err(p).powi(2) + extra[p.frame] + 0.003f64.powi(2);
                (r, var)
            })
            .collect();
        let chi2: f64 = terms.iter().map(|(r, v)| r * r / v).sum();
        // Robust to a few bad frames (a neighbour creeping into the aperture, a hit on
        // the star): the test must also pass without the worst tenth of the points. A real
        // variable deviates in many frames; a glitch in a few.
        let mut contributions: Vec<f64> = terms.iter().map(|(r, v)| r * r / v).collect();
        contributions.sort_by(|a, b| b.total_cmp(a));
        let drop = (terms.len() / 10).max(1);
        let worst: f64 = contributions[..drop].iter().sum();
        let dof = (terms.len() - 1) as f64;
        let fap = chi2_tail(chi2, dof) * trials;
        let fap_without_worst = chi2_tail(chi2 - worst, dof - drop as f64) * trials;
        let mut residuals: Vec<f64> = terms.iter().map(|t| t.0).collect();
        let pts = &pts;
        residuals.sort_by(f64::total_cmp);
        let q = |f: f64| residuals[((residuals.len() - 1) as f64 * f).round() as usize];
        let amplitude = q(0.95) - q(0.05);
        if fap < 1e-3 && fap_without_worst < 1e-3 && amplitude > 0.05 {
            let dets: Vec<Detection> = detections_of(&sources[s]);
            anomalies.push(anomaly(
                frames,
                AnomalyKind::Variable,
                dets,
                Detail::Variable(VariableDetail {
                    amplitude_mag: amplitude,
                    index: "reduced chi-square of differential magnitudes against the ensemble",
                    chi2_reduced: chi2 / dof,
                    false_alarm_probability: fap.min(1.0),
                    frames: pts.len(),
                    mean_instrumental_mag: mean_mag[k],
                    instrumental_mag: mean_mag[k],
                    light_curve: pts
                        .iter()
                        .zip(&terms)
                        .map(|(p, t)| LightCurvePoint {
                            time_unix: frames[p.frame].time_unix,
                            delta_mag: t.0,
                            error_mag: t.1.sqrt(),
                        })
                        .collect(),
                }),
            ));
        }
    }

    anomalies
}
