//! Each star's shape, helped by the frame's: the stars of one frame are images of one
//! PSF, so a star's measured shape is the frame's shape plus a star-to-star spread (the
//! PSF changing over the field, a blend, a galaxy) plus the fit's noise.
//!
//! That is the random-effects model of a meta-analysis: measured components
//! εᵢ = μ + uᵢ + nᵢ, with uᵢ of variance τ² and nᵢ of the known variance σᵢ². μ and τ² are
//! estimated as DerSimonian & Laird (1986, Controlled Clinical Trials 7, 177) do, and each
//! star's shape is its best linear unbiased prediction, μ + τ²/(τ² + σᵢ²)·(εᵢ − μ): the
//! empirical Bayes estimate of Efron & Morris (1973, JASA 68, 117). A star measured
//! much better than the spread keeps its own shape; a noisy star takes the frame's.
//!
//! Why: near round, one star's |ε| is mostly noise, and removing the noise's bias (as
//! `PsfFit::eccentricity` does) sets half of the stars of a frame with a true
//! eccentricity of 0.1–0.15 to 0. Averaged over the frame, the noise is gone.

/// Shape components (e1, e2) of one star as sampled (see `PsfFit::shape_components`)
/// and the variance of each component.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Shape {
    pub e1: f64,
    pub e2: f64,
    pub variance: f64,
}

/// Eccentricity sqrt(1 − (b/a)²) of a shape of modulus |ε| = (1 − q²)/(1 + q²).
pub fn eccentricity_of(modulus: f64) -> f64 {
    let e = modulus.clamp(0.0, 0.999_999);
    (2.0 * e / (1.0 + e)).sqrt()
}

/// Eccentricity of shape components (e1, e2) that carry noise of `variance` per
/// component, with the noise's upward bias removed: |ε| is biased upwards like a
/// polarisation amplitude, and the estimator of Wardle & Kronberg (1974, ApJ 194, 249),
/// |ε|² − 2σ² (σ² per component), takes it away.
pub fn debiased_eccentricity(e1: f64, e2: f64, variance: f64) -> f64 {
    eccentricity_of((e1 * e1 + e2 * e2 - 2.0 * variance).max(0.0).sqrt())
}

/// Each star's eccentricity with the frame's shape as the prior. `voters` marks the
/// stars that estimate the frame's shape and spread (isolated, bright enough); every
/// star gets an estimate. Fewer than five voters: each star on its own.
pub fn shrink(shapes: &[Shape], voters: &[bool]) -> Vec<f64> {
    let alone = |s: &Shape| debiased_eccentricity(s.e1, s.e2, s.variance);
    let voting: Vec<&Shape> = shapes
        .iter()
        .zip(voters)
        .filter(|(s, &v)| v && s.variance > 0.0 && s.e1.is_finite() && s.e2.is_finite())
        .map(|(s, _)| s)
        .collect();
    let Some(frame) = FrameShape::estimate(&voting) else {
        return shapes.iter().map(alone).collect();
    };
    shapes
        .iter()
        .map(|s| {
            if !(s.variance > 0.0 && s.e1.is_finite() && s.e2.is_finite()) {
                return alone(s);
            }
            let k = frame.spread / (frame.spread + s.variance);
            let e1 = frame.e1 + k * (s.e1 - frame.e1);
            let e2 = frame.e2 + k * (s.e2 - frame.e2);
            // What noise is left in the estimate, per component, biases |ε| upwards as
            // for one star: removed the same way.
            let noise = (1.0 - k).powi(2) * frame.mean_variance + k * k * s.variance;
            debiased_eccentricity(e1, e2, noise)
        })
        .collect()
}

/// The frame's mean shape μ = (e1, e2), the variance of that mean, and the spread τ² of
/// the stars' true shapes about it (per component).
struct FrameShape {
    e1: f64,
    e2: f64,
    mean_variance: f64,
    spread: f64,
}

impl FrameShape {
    fn estimate(voting: &[&Shape]) -> Option<Self> {
        let k = voting.len();
        if k < 5 {
            return None;
        }
        // DerSimonian–Laird: the fixed-effect mean and Cochran's Q give the spread by the
        // method of moments, pooled over the two components (2(k − 1) degrees of freedom).
        let w: Vec<f64> = voting.iter().map(|s| 1.0 / s.variance).collect();
        let sw: f64 = w.iter().sum();
        let sw2: f64 = w.iter().map(|w| w * w).sum();
        let mean =
            |f: fn(&Shape) -> f64| voting.iter().zip(&w).map(|(s, w)| w * f(s)).sum::<f64>() / sw;
        let (m1, m2) = (mean(|s| s.e1), mean(|s| s.e2));
        let q: f64 = voting
            .iter()
            .zip(&w)
            .map(|(s, w)| w * ((s.e1 - m1).powi(2) + (s.e2 - m2).powi(2)))
            .sum();
        let dof = 2.0 * (k as f64 - 1.0);
        let spread = ((q - dof) / (2.0 * (sw - sw2 / sw))).max(0.0);
        // The random-effects mean, weighted by 1/(σᵢ² + τ²).
        let w: Vec<f64> = voting.iter().map(|s| 1.0 / (s.variance + spread)).collect();
        let sw: f64 = w.iter().sum();
        let e1 = voting.iter().zip(&w).map(|(s, w)| w * s.e1).sum::<f64>() / sw;
        let e2 = voting.iter().zip(&w).map(|(s, w)| w * s.e2).sum::<f64>() / sw;
        Some(FrameShape {
            e1,
            e2,
            mean_variance: 1.0 / sw,
            spread,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_distr::{Distribution, Normal};

    /// Stars of one true shape |ε| (at 30°) measured with noise σ from 0.01 to 0.06 per
    /// component (SNR of about 300 down to 50 for a 3.5 px star).
    fn frame(modulus: f64, n: usize, seed: u64) -> Vec<Shape> {
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let (s, c) = 60f64.to_radians().sin_cos();
        (0..n)
            .map(|_| {
                let sigma: f64 = rng.gen_range(0.01..0.06);
                let noise = Normal::new(0.0, sigma).unwrap();
                Shape {
                    e1: modulus * c + noise.sample(&mut rng),
                    e2: modulus * s + noise.sample(&mut rng),
                    variance: sigma * sigma,
                }
            })
            .collect()
    }

    fn median(mut v: Vec<f64>) -> f64 {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    }

    #[test]
    fn eccentricity_and_modulus_agree_with_the_axis_ratio() {
        // b/a = 0.8: e = 0.6 (analytic), |ε| = (1 − 0.64)/(1 + 0.64).
        let modulus = 0.36 / 1.64;
        assert!((eccentricity_of(modulus) - 0.6).abs() < 1e-12);
    }

    #[test]
    fn slightly_elongated_stars_keep_their_shape_and_round_ones_stay_round() {
        for (truth, seed) in [(0.1, 1), (0.15, 2), (0.3, 3)] {
            // e = sqrt(2|ε|/(1 + |ε|)) inverted: |ε| = e²/(2 − e²).
            let modulus = truth * truth / (2.0 - truth * truth);
            let shapes = frame(modulus, 80, seed);
            let voters = vec![true; shapes.len()];
            let alone = median(
                shapes
                    .iter()
                    .map(|s| {
                        eccentricity_of(
                            (s.e1.hypot(s.e2).powi(2) - 2.0 * s.variance)
                                .max(0.0)
                                .sqrt(),
                        )
                    })
                    .collect(),
            );
            let shrunk = median(shrink(&shapes, &voters));
            assert!(
                (shrunk - truth).abs() < 0.05,
                "e {truth}: median {shrunk} (each star alone: {alone})"
            );
        }
        let round = median(shrink(&frame(0.0, 80, 4), &[true; 80]));
        assert!(round < 0.08, "round stars: median {round}");
    }

    #[test]
    fn a_star_measured_far_off_the_frame_shape_keeps_its_own() {
        let mut shapes = frame(0.005, 60, 5);
        // A well-measured elongated source (a galaxy, a blend): e = 0.8, |ε| = 0.47.
        shapes.push(Shape {
            e1: 0.47,
            e2: 0.0,
            variance: 1e-4,
        });
        let e = shrink(&shapes, &vec![true; shapes.len()]);
        assert!((e[60] - 0.8).abs() < 0.03, "{}", e[60]);
    }

    #[test]
    fn too_few_voters_leave_each_star_on_its_own() {
        let shapes = frame(0.2, 4, 6);
        let e = shrink(&shapes, &[true; 4]);
        for (s, e) in shapes.iter().zip(e) {
            let own = eccentricity_of(
                (s.e1.hypot(s.e2).powi(2) - 2.0 * s.variance)
                    .max(0.0)
                    .sqrt(),
            );
            // `hypot` is the C library's, within an ulp of the true value on each
            // platform (glibc's manual lists its known errors per architecture): the
            // same number to 1e-12, not always to the bit.
            assert!((e - own).abs() <= 1e-12 * own.abs(), "{e} {own}");
        }
    }
}
