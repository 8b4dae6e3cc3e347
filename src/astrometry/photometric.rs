//! A frame's photometric zero point in a catalogue's band, from its stars matched to the
//! catalogue, and its depth: the magnitude of a point source detected at SNR 5, by the
//! CCD equation (Merline & Howell 1995, Exp. Astron. 6, 163). Pure.
//!
//! The zero point is the magnitude of a source giving 1 ADU per second of exposure in
//! the photometric aperture: m = ZP − 2.5·log10(flux / exposure), or per ADU in the
//! frame when the exposure is unknown.

use serde::{Deserialize, Serialize};

use crate::measure::stats::median_and_sigma_f64;

/// Stars with an SNR below this do not vote for the zero point: a star found near the
/// detection limit is found more often when the noise adds to it than when it takes
/// away (Eddington 1913), so faint stars' fluxes run high (+7 % at SNR 10–30 on
/// rendered frames, +1 % at 30–100, none above).
pub const MIN_SNR: f64 = 30.0;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ZeroPoint {
    pub mag: f64,
    /// Standard error of the mean of the clipped differences, mag.
    pub err_mag: f64,
    pub stars: usize,
}

/// The zero point from pairs (flux ADU, SNR, catalogue magnitude): a 3σ-clipped mean of
/// catalogue minus instrumental magnitudes, σ from the median absolute deviation
/// (× 1.4826, the normal distribution's factor). Needs three stars.
pub fn zero_point(pairs: &[(f64, f64, f64)], exposure_s: Option<f64>) -> Option<ZeroPoint> {
    let t = exposure_s
        .filter(|t| *t > 0.0 && t.is_finite())
        .unwrap_or(1.0);
    let mut d: Vec<f64> = pairs
        .iter()
        .filter(|(f, snr, m)| *f > 0.0 && *snr >= MIN_SNR && m.is_finite())
        .map(|(f, _, m)| m + 2.5 * (f / t).log10())
        .collect();
    for _ in 0..5 {
        if d.len() < 3 {
            return None;
        }
        let (med, sigma) = median_and_sigma_f64(&d)?;
        let sigma = sigma.max(0.005);
        let before = d.len();
        d.retain(|v| (v - med).abs() <= 3.0 * sigma);
        if d.len() == before {
            break;
        }
    }
    if d.len() < 3 {
        return None;
    }
    let n = d.len() as f64;
    let mean = d.iter().sum::<f64>() / n;
    let var = d.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    Some(ZeroPoint {
        mag: mean,
        err_mag: (var / n).sqrt(),
        stars: d.len(),
    })
}

/// What the depth needs of a frame's measurement.
#[derive(Debug, Clone, Copy)]
pub struct DepthInputs {
    pub zero_point_mag: f64,
    pub exposure_s: Option<f64>,
    pub fwhm_px: f64,
    /// Per-pixel sky noise, ADU.
    pub noise_adu: f64,
    pub gain_e_per_adu: Option<f64>,
}

/// The magnitude of a point source at SNR 5 in the SNR aperture the measurement uses
/// (radius max(FWHM, 1.5 px), sky from the annulus around the photometric aperture),
/// converted to the total flux by the share of a Gaussian profile inside that radius.
pub fn limit_mag(d: DepthInputs) -> Option<f64> {
    const SNR: f64 = 5.0;
    let f = d.fwhm_px;
    if !(f.is_finite() && f > 0.0 && d.noise_adu.is_finite() && d.noise_adu > 0.0) {
        return None;
    }
    let r = f.max(1.5);
    let n_pix = std::f64::consts::PI * r * r;
    let r_ap = (2.5 * f).max(3.0);
    let r_in = r_ap + 2.0;
    let r_out = r_in + (1.5 * f).max(6.0);
    let n_sky = std::f64::consts::PI * (r_out * r_out - r_in * r_in);
    let sky_var = n_pix * (1.0 + n_pix / n_sky) * d.noise_adu * d.noise_adu;
    // SNR = C / sqrt(C/g + sky_var) solved for C (a quadratic).
    let inv_g = d
        .gain_e_per_adu
        .filter(|g| *g > 0.0)
        .map_or(0.0, |g| 1.0 / g);
    let b = SNR * SNR * inv_g;
    let core = 0.5 * (b + (b * b + 4.0 * SNR * SNR * sky_var).sqrt());
    let share = 1.0 - (-4.0 * std::f64::consts::LN_2 * r * r / (f * f)).exp();
    let total = core / share;
    let t = d
        .exposure_s
        .filter(|t| *t > 0.0 && t.is_finite())
        .unwrap_or(1.0);
    let m = d.zero_point_mag - 2.5 * (total / t).log10();
    m.is_finite().then_some(m)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_zero_point_is_the_clipped_mean_offset() {
        // Stars of flux 10^(-0.4(m - 25)) · 60 ADU in 60 s: ZP = 25 exactly; one outlier.
        let mut pairs: Vec<(f64, f64, f64)> = (0..20)
            .map(|i| {
                let m = 12.0 + 0.2 * f64::from(i);
                (60.0 * 10f64.powf(-0.4 * (m - 25.0)), 100.0, m)
            })
            .collect();
        pairs.push((1000.0, 100.0, 12.0));
        let zp = zero_point(&pairs, Some(60.0)).unwrap();
        assert!((zp.mag - 25.0).abs() < 1e-9, "{zp:?}");
        assert_eq!(zp.stars, 20);
    }

    #[test]
    fn the_limit_solves_the_ccd_equation_at_snr_5() {
        // Worked by hand: F = 3 px, σ = 10 ADU, g = 1: r = 3, n_pix = 9π = 28.274,
        // r_ap = 7.5, r_in = 9.5, r_out = 15.5, n_sky = 150π = 471.24, sky_var = 2997.08;
        // C = (25 + sqrt(625 + 100 · 2997.08))/2 = 286.513 ADU; share = 1 − 2⁻⁴ = 0.9375;
        // total = 305.614 ADU in 1 s: m = 25 − 2.5 log10(305.614) = 18.7871.
        let m = limit_mag(DepthInputs {
            zero_point_mag: 25.0,
            exposure_s: Some(1.0),
            fwhm_px: 3.0,
            noise_adu: 10.0,
            gain_e_per_adu: Some(1.0),
        })
        .unwrap();
        assert!((m - 18.7871).abs() < 1e-3, "{m}");
    }
}
