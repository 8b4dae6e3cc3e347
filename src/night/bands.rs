//! The star that is bright in one band only: for a target imaged through two or more
//! filters, each persistent source's color index between every pair of filters against
//! the field's. Pure: each filter group's catalogue of the night in, outliers out.
//!
//! Sources are matched on the sky (each group's fit to the sky places them), the color
//! index is m₁ − m₂ of instrumental magnitudes, the field's locus is its median and its
//! spread the median absolute deviation × 1.4826 (robust against the outliers sought).
//! A source is flagged when its robust z-score is beyond both [`MIN_Z`] and the z at
//! which the stars tested, all pairs of filters counted, would give a false alarm with
//! probability [`FALSE_ALARM`] under Gaussian tails.

use crate::measure::stats::median_and_sigma_f64;
use crate::night::CatalogSource;

/// The night's chance of one false color anomaly per target, Gaussian tails assumed.
pub const FALSE_ALARM: f64 = 0.01;
/// Never below this many robust σ: stellar colors have heavier tails than a Gaussian.
pub const MIN_Z: f64 = 5.0;
/// Only sources this much brighter than each group's limit take part (SNR ≳ 12).
pub const BRIGHT_MARGIN_MAG: f64 = 1.0;
/// Fewest stars matched between two filters for a locus.
pub const MIN_STARS: usize = 8;

/// One filter group of a target.
#[derive(Debug, Clone)]
pub struct BandGroup<'a> {
    pub filter: &'a str,
    pub sources: &'a [CatalogSource],
    /// The group's limiting instrumental magnitude.
    pub limit_mag: Option<f64>,
}

/// A source far from the field's color between two filters.
#[derive(Debug, Clone, PartialEq)]
pub struct BandOutlier {
    /// Indices of the two groups, and of the source in each.
    pub groups: (usize, usize),
    pub sources: (usize, usize),
    pub ra_deg: f64,
    pub dec_deg: f64,
    pub color_mag: f64,
    pub field_color_mag: f64,
    pub sigma_mag: f64,
    pub z: f64,
    pub tested: usize,
    pub false_alarm_probability: f64,
}

/// Two-sided Gaussian tail P(|Z| > z), by the complementary error function of
/// Numerical Recipes (Press et al. 2007, §6.2.2; fractional error below 1.2e-7, so
/// small tails keep their precision).
pub fn two_sided_tail(z: f64) -> f64 {
    let x = z.abs() / std::f64::consts::SQRT_2;
    let t = 1.0 / (1.0 + 0.5 * x);
    let poly = -x * x - 1.265_512_23
        + t * (1.000_023_68
            + t * (0.374_091_96
                + t * (0.096_784_18
                    + t * (-0.186_288_06
                        + t * (0.278_868_07
                            + t * (-1.135_203_98
                                + t * (1.488_515_87 + t * (-0.822_152_23 + t * 0.170_872_77))))))));
    (t * poly.exp()).min(1.0)
}

/// The z beyond which `n` tests give a false alarm with probability `alpha`.
fn z_threshold(n: usize, alpha: f64) -> f64 {
    let target = alpha / n.max(1) as f64;
    let (mut lo, mut hi) = (0.0, 40.0);
    for _ in 0..100 {
        let mid = 0.5 * (lo + hi);
        if two_sided_tail(mid) > target {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    hi
}

/// Unique nearest pairs within `radius_deg` (small fields: RA scaled by cos Dec).
fn pairs(a: &[CatalogSource], b: &[CatalogSource], radius_deg: f64) -> Vec<(usize, usize)> {
    let mut cand = Vec::new();
    for (i, p) in a.iter().enumerate() {
        let c = p.dec_deg.to_radians().cos();
        for (j, q) in b.iter().enumerate() {
            let dra = ((q.ra_deg - p.ra_deg + 540.0).rem_euclid(360.0) - 180.0) * c;
            let d = dra.hypot(q.dec_deg - p.dec_deg);
            if d <= radius_deg {
                cand.push((i, j, d));
            }
        }
    }
    cand.sort_by(|x, y| x.2.total_cmp(&y.2));
    let (mut ua, mut ub) = (vec![false; a.len()], vec![false; b.len()]);
    cand.into_iter()
        .filter(|&(i, j, _)| {
            let fresh = !ua[i] && !ub[j];
            if fresh {
                ua[i] = true;
                ub[j] = true;
            }
            fresh
        })
        .map(|(i, j, _)| (i, j))
        .collect()
}

/// Color outliers between every pair of a target's filter groups. `radius_deg`: how
/// close two detections of one source are on the sky (a couple of pixels).
pub fn band_outliers(groups: &[BandGroup<'_>], radius_deg: f64) -> Vec<BandOutlier> {
    let bright = |g: &BandGroup<'_>, s: &CatalogSource| -> Option<f64> {
        let m = s.mag?;
        match g.limit_mag {
            Some(l) if m > l - BRIGHT_MARGIN_MAG => None,
            _ => Some(m),
        }
    };
    // Every pair's matched colors first: the trial count covers them all.
    let mut loci = Vec::new();
    for a in 0..groups.len() {
        for b in a + 1..groups.len() {
            let colors: Vec<(usize, usize, f64)> =
                pairs(groups[a].sources, groups[b].sources, radius_deg)
                    .into_iter()
                    .filter_map(|(i, j)| {
                        let ma = bright(&groups[a], &groups[a].sources[i])?;
                        let mb = bright(&groups[b], &groups[b].sources[j])?;
                        Some((i, j, ma - mb))
                    })
                    .collect();
            if colors.len() >= MIN_STARS {
                loci.push(((a, b), colors));
            }
        }
    }
    let tested: usize = loci.iter().map(|l| l.1.len()).sum();
    let z_min = z_threshold(tested, FALSE_ALARM).max(MIN_Z);
    let mut out = Vec::new();
    for ((a, b), colors) in loci {
        let c: Vec<f64> = colors.iter().map(|x| x.2).collect();
        let Some((median, sigma)) = median_and_sigma_f64(&c) else {
            continue;
        };
        let sigma = sigma.max(0.02);
        for &(i, j, color) in &colors {
            let z = (color - median) / sigma;
            if z.abs() > z_min {
                let (p, q) = (&groups[a].sources[i], &groups[b].sources[j]);
                out.push(BandOutlier {
                    groups: (a, b),
                    sources: (i, j),
                    ra_deg: p.ra_deg,
                    dec_deg: 0.5 * (p.dec_deg + q.dec_deg),
                    color_mag: color,
                    field_color_mag: median,
                    sigma_mag: sigma,
                    z,
                    tested,
                    false_alarm_probability: (tested as f64 * two_sided_tail(z)).min(1.0),
                });
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_gaussian_tail_matches_handbook_values() {
        // P(|Z| > 1.96) = 0.05 and P(|Z| > 5) = 5.733e-7 (Abramowitz & Stegun table 26.1).
        assert!((two_sided_tail(1.959_964) - 0.05).abs() < 1e-6);
        assert!((two_sided_tail(5.0) / 5.733_031e-7 - 1.0).abs() < 1e-5);
    }

    #[test]
    fn one_star_bright_in_one_band_only_is_found_and_no_other() {
        // 300 stars with a realistic spread of colors (σ 0.3 mag, a few very red ones at
        // 3 σ), one star 2.5 mag brighter in the second band than its color predicts.
        let mut state = 7u64;
        let mut uniform = || {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            ((state >> 11) as f64 + 0.5) / (1u64 << 53) as f64
        };
        let mut a = Vec::new();
        let mut b = Vec::new();
        for k in 0..300 {
            let ra = 84.0 + uniform() * 0.5;
            let dec = 27.5 + uniform() * 0.5;
            let m = 12.0 + 5.0 * uniform();
            // Box–Muller for the color spread.
            let g = (-2.0 * uniform().ln()).sqrt() * (std::f64::consts::TAU * uniform()).cos();
            let color = 0.6 + 0.3 * g + if k == 17 { 2.5 } else { 0.0 };
            a.push(CatalogSource {
                ra_deg: ra,
                dec_deg: dec,
                mag: Some(m),
            });
            b.push(CatalogSource {
                ra_deg: ra + 1e-5,
                dec_deg: dec,
                mag: Some(m - color),
            });
        }
        let groups = [
            BandGroup {
                filter: "V",
                sources: &a,
                limit_mag: Some(19.0),
            },
            BandGroup {
                filter: "I",
                sources: &b,
                limit_mag: Some(19.0),
            },
        ];
        let found = band_outliers(&groups, 2.0 / 3600.0);
        assert_eq!(found.len(), 1, "{found:?}");
        assert_eq!(found[0].sources.0, 17);
        assert!(found[0].z > 5.0);
    }
}
