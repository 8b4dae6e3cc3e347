//! The decision rule's statistics: how likely as many matches between the frame's stars
//! and the catalogue's are by chance, every hypothesis tried counted (the module
//! documentation of `astrometry` gives the rule).

use super::{brightness, in_frame, SkyStar, MATCH_TOLERANCE_PX, MAX_CHANCE_LOG10, MIN_MATCHED};
use crate::frame::wcs::Wcs;
use crate::pairs::nearest_pairs;

/// log10 of the probability that as many of the frame's stars fall within the match
/// tolerance of a catalogue star by chance, `trials` hypotheses counted; `None` when
/// the fit fails the decision rule. Only the brightest m = max(3N, 100) catalogue stars
/// inside the frame take part, so a catalogue far deeper than the frame does not make
/// chance matches likely; `fitted` stars' worth of matches are not counted (they fixed
/// the hypothesis).
pub(super) fn chance_log10(
    pos: &[(f64, f64)],
    cat: &[SkyStar],
    wcs: &Wcs,
    width: usize,
    height: usize,
    trials: f64,
    fitted: usize,
) -> Option<f64> {
    let mut cat_px = in_frame(wcs, cat, width, height, 0.0);
    let mut inside: Vec<usize> = (0..cat.len()).filter(|&j| cat_px[j].is_some()).collect();
    inside.sort_by(|&a, &b| brightness(&cat[b]).total_cmp(&brightness(&cat[a])));
    let m = inside.len().min((3 * pos.len()).max(100));
    for &j in &inside[m..] {
        cat_px[j] = None;
    }
    let k = nearest_pairs(pos, &cat_px, MATCH_TOLERANCE_PX).len();
    let area = (width * height) as f64;
    // Poisson: the chance that a random point lies within r of one of m stars.
    let p = -(-(m as f64) * std::f64::consts::PI * MATCH_TOLERANCE_PX.powi(2) / area).exp_m1();
    let n = pos.len().saturating_sub(fitted);
    let c = (ln_binomial_tail(n, p, k.saturating_sub(fitted)) / std::f64::consts::LN_10
        + trials.max(1.0).log10())
    .clamp(-999.0, 0.0);
    (k >= MIN_MATCHED && c <= MAX_CHANCE_LOG10).then_some(c)
}

/// ln of the binomial tail P(K ≥ k) for K ~ Bin(n, p).
fn ln_binomial_tail(n: usize, p: f64, k: usize) -> f64 {
    if k == 0 {
        return 0.0;
    }
    if k > n || p <= 0.0 {
        return f64::NEG_INFINITY;
    }
    if p >= 1.0 {
        return 0.0;
    }
    let ln_choose = |n: usize, j: usize| ln_factorial(n) - ln_factorial(j) - ln_factorial(n - j);
    let term = |j: usize| ln_choose(n, j) + j as f64 * p.ln() + (n - j) as f64 * (-p).ln_1p();
    // Sum of terms j = k..n in log space, largest first for stability.
    let terms: Vec<f64> = (k..=n).map(term).collect();
    let max = terms.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    max + terms.iter().map(|t| (t - max).exp()).sum::<f64>().ln()
}

fn ln_factorial(n: usize) -> f64 {
    if n < 2 {
        return 0.0;
    }
    if n < 64 {
        return (2..=n).map(|i| (i as f64).ln()).sum();
    }
    // Stirling's series (Abramowitz & Stegun 6.1.41), exact to ~1e-12 here.
    let x = n as f64;
    x * x.ln() - x + 0.5 * (2.0 * std::f64::consts::PI * x).ln() + 1.0 / (12.0 * x)
        - 1.0 / (360.0 * x.powi(3))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn binomial_tail_matches_a_direct_sum() {
        // P(K ≥ 2) for Bin(3, 0.5) = 4/8.
        assert!((ln_binomial_tail(3, 0.5, 2).exp() - 0.5).abs() < 1e-12);
        assert!((ln_factorial(100) - 363.739_375_555_563_5).abs() < 1e-9);
    }
}
