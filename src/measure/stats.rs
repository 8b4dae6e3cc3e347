//! Robust statistics on samples of pixel values: median, MAD, sigma clipping and the
//! sky-mode estimate. Pure functions on slices; they never allocate more than a copy of
//! their input.

/// 1.4826 turns a median absolute deviation into the standard deviation of a normal
/// distribution (1 / Φ⁻¹(3/4); Rousseeuw & Croux 1993).
pub const MAD_TO_SIGMA: f64 = 1.482_602_218_505_602;

/// Median of `values`, reordering them in place. `None` for an empty slice.
pub fn median_in_place(values: &mut [f32]) -> Option<f64> {
    let n = values.len();
    if n == 0 {
        return None;
    }
    let mid = n / 2;
    let (lower, upper_mid, _) = values.select_nth_unstable_by(mid, f32::total_cmp);
    let upper = f64::from(*upper_mid);
    if n % 2 == 1 {
        Some(upper)
    } else {
        let lower_max = lower.iter().copied().fold(f32::NEG_INFINITY, f32::max);
        Some(0.5 * (f64::from(lower_max) + upper))
    }
}

/// Median of a copy of `values`.
pub fn median(values: &[f32]) -> Option<f64> {
    median_in_place(&mut values.to_vec())
}

/// Median of f64 values (small samples: per-star statistics).
pub fn median_f64(values: &[f64]) -> Option<f64> {
    let mut v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
    let n = v.len();
    if n == 0 {
        return None;
    }
    v.sort_by(f64::total_cmp);
    Some(if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    })
}

/// Median and robust standard deviation (1.4826 × the median absolute deviation about
/// that median) of f64 values, the non-finite ones left out. `None` when none is finite.
pub fn median_and_sigma_f64(values: &[f64]) -> Option<(f64, f64)> {
    let m = median_f64(values)?;
    let dev: Vec<f64> = values.iter().map(|x| (x - m).abs()).collect();
    median_f64(&dev).map(|d| (m, d * MAD_TO_SIGMA))
}

/// Robust standard deviation (1.4826 × MAD) of f64 values: [`median_and_sigma_f64`]'s σ.
pub fn robust_sigma_f64(values: &[f64]) -> Option<f64> {
    median_and_sigma_f64(values).map(|(_, sigma)| sigma)
}

/// Robust standard deviation 1.4826 × MAD about `center`, reordering `scratch`.
pub fn mad_sigma(values: &[f32], center: f64, scratch: &mut Vec<f32>) -> Option<f64> {
    scratch.clear();
    scratch.extend(values.iter().map(|&v| (f64::from(v) - center).abs() as f32));
    median_in_place(scratch).map(|m| m * MAD_TO_SIGMA)
}

/// The standard deviation of a normal distribution truncated at ±3σ is 0.98658σ
/// (variance 1 − 2·3·φ(3)/(2Φ(3) − 1) = 0.97334); dividing by it undoes the clipping.
pub const CLIP3_STD_CORRECTION: f64 = 0.986_58;

/// Result of iterative sigma clipping.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClippedStats {
    pub mean: f64,
    pub median: f64,
    pub std: f64,
    /// How many values survived the clipping.
    pub kept: usize,
}

impl ClippedStats {
    /// The sky mode estimate of Bertin & Arnouts (1996, A&AS 117, 393):
    /// mode ≈ 2.5 × median − 1.5 × mean, falling back to the median when the
    /// distribution is too skewed for the estimate to hold ((mean − median) / σ > 0.3).
    pub fn mode(&self) -> f64 {
        if self.std > 0.0 && ((self.mean - self.median) / self.std).abs() > 0.3 {
            self.median
        } else {
            2.5 * self.median - 1.5 * self.mean
        }
    }
}

/// Iterative ±`kappa` σ clipping about the median until nothing more is clipped
/// (at most `max_iter` passes). Non-finite values are ignored. `values` is reordered
/// (sorted).
///
/// The sample is sorted once; every pass is then two binary searches and a few
/// differences of running sums, instead of a filter, two sums and a selection.
pub fn sigma_clip(values: &mut Vec<f32>, kappa: f64, max_iter: usize) -> Option<ClippedStats> {
    sigma_clip_on(values, kappa, max_iter, None)
}

/// As [`sigma_clip`], for values known to lie on `grid` (up to small offsets); the
/// median is then that of grouped data. Without a grid one is looked for in the sample
/// itself.
pub fn sigma_clip_on(
    values: &mut Vec<f32>,
    kappa: f64,
    max_iter: usize,
    grid: Option<Grid>,
) -> Option<ClippedStats> {
    values.retain(|v| v.is_finite());
    if values.is_empty() {
        return None;
    }
    radix_sort(values);
    let v = &values[..];
    let step = grid.map(|g| g.step).or_else(|| grid_step(v));
    // Running sums about the middle value keep the variance free of cancellation.
    let shift = f64::from(v[v.len() / 2]);
    let mut s1 = vec![0.0; v.len() + 1];
    let mut s2 = vec![0.0; v.len() + 1];
    let (mut a1, mut a2) = (0.0, 0.0);
    for ((&x, p1), p2) in v.iter().zip(&mut s1[1..]).zip(&mut s2[1..]) {
        let d = f64::from(x) - shift;
        a1 += d;
        a2 += d * d;
        *p1 = a1;
        *p2 = a2;
    }
    let stats_of = |lo: usize, hi: usize| {
        let n = hi - lo;
        let sum = s1[hi] - s1[lo];
        let mean = sum / n as f64;
        let var = ((s2[hi] - s2[lo]) - sum * mean).max(0.0) / n.max(2).saturating_sub(1) as f64;
        let median = sorted_median(&v[lo..hi], step);
        ClippedStats {
            mean: shift + mean,
            median,
            std: var.sqrt(),
            kept: n,
        }
    };
    let (mut lo, mut hi) = (0, v.len());
    let mut stats = stats_of(lo, hi);
    // On a grid, never clip closer than one and a half steps: where the noise is under
    // a third of a step, κσ would cut the neighbouring steps, which are the noise.
    let floor = step.map_or(0.0, |q| 1.5 * q);
    for _ in 0..max_iter {
        let reach = (kappa * stats.std).max(floor);
        let low = stats.median - reach;
        let high = stats.median + reach;
        // What a pass removes stays removed: the new bounds only narrow the range.
        let new_lo = lo + v[lo..hi].partition_point(|&x| f64::from(x) < low);
        let new_hi = lo + v[lo..hi].partition_point(|&x| f64::from(x) <= high);
        if new_hi <= new_lo {
            return Some(stats);
        }
        let unchanged = new_hi - new_lo == hi - lo;
        (lo, hi) = (new_lo, new_hi);
        stats = stats_of(lo, hi);
        if unchanged {
            break;
        }
    }
    Some(stats)
}

/// The step of a sorted sample whose values sit on a grid: whole ADU from a camera, or
/// steps of 4 or 16 from a 14- or 12-bit sensor scaled to 16 bits. Such a sample's
/// median and MAD snap to the grid, off by up to half a step, which is a sizeable part
/// of the sky noise when the noise spans only a few steps. `Some(step)` when at most a
/// quarter of the values are distinct; the step is the smallest gap between them.
fn grid_step(sorted: &[f32]) -> Option<f64> {
    let n = sorted.len();
    if n < 20 {
        return None;
    }
    let mut distinct = 1;
    let mut gap = f64::INFINITY;
    for pair in sorted.windows(2) {
        if pair[1] != pair[0] {
            distinct += 1;
            gap = gap.min(f64::from(pair[1]) - f64::from(pair[0]));
        }
    }
    (distinct * 4 <= n && gap.is_finite() && gap > 0.0).then_some(gap)
}

/// Median of sorted values. On a grid of `step`, the median of grouped data: each
/// value taken as spread evenly over its step, m − step/2 + step·(n/2 − below)/at,
/// with `below` and `at` the counts under and within half a step of the middle value
/// m (within, not equal: values taken off the grid by a smooth level and put back, or
/// by float rounding of a scaled grid, still group together).
fn sorted_median(v: &[f32], step: Option<f64>) -> f64 {
    let n = v.len();
    let mid = n / 2;
    match step {
        Some(q) if n > 0 => {
            let m = f64::from(v[mid]);
            let below = v.partition_point(|&x| f64::from(x) < m - 0.5 * q);
            let at = v.partition_point(|&x| f64::from(x) < m + 0.5 * q) - below;
            m - 0.5 * q + q * (0.5 * n as f64 - below as f64) / at as f64
        }
        _ if n % 2 == 1 => f64::from(v[mid]),
        _ if n > 0 => 0.5 * (f64::from(v[mid - 1]) + f64::from(v[mid])),
        _ => f64::NAN,
    }
}

/// The grid a camera's raw values sit on: whole multiples of `step` from some origin.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Grid {
    pub step: f64,
}

impl Grid {
    /// The grid of a sample of raw pixel values (reordered), if it has one.
    pub fn of_sample(values: &mut [f32]) -> Option<Grid> {
        radix_sort(values);
        grid_step(values).map(|step| Grid { step })
    }
}

/// Sort finite f32 values ascending by LSD radix on their bit patterns (flipped so
/// that unsigned order is numeric order), skipping the byte passes in which every value
/// agrees, as the high bytes of one patch of sky do.
fn radix_sort(values: &mut [f32]) {
    let key = |v: f32| {
        let b = v.to_bits();
        if b >> 31 == 1 {
            !b
        } else {
            b | 0x8000_0000
        }
    };
    let mut keys: Vec<u32> = values.iter().map(|&v| key(v)).collect();
    let n = keys.len();
    // All four byte histograms in one pass.
    let mut counts = [[0u32; 256]; 4];
    for &k in &keys {
        for (b, count) in counts.iter_mut().enumerate() {
            count[((k >> (8 * b)) & 0xff) as usize] += 1;
        }
    }
    let mut scratch = vec![0u32; n];
    for (b, count) in counts.iter_mut().enumerate() {
        if count.iter().any(|&c| c as usize == n) {
            continue;
        }
        let mut at = 0;
        for c in count.iter_mut() {
            let here = *c;
            *c = at;
            at += here;
        }
        let shift = 8 * b;
        for &k in &keys {
            let d = ((k >> shift) & 0xff) as usize;
            scratch[count[d] as usize] = k;
            count[d] += 1;
        }
        std::mem::swap(&mut keys, &mut scratch);
    }
    for (v, &k) in values.iter_mut().zip(&keys) {
        let b = if k >> 31 == 1 { k & 0x7fff_ffff } else { !k };
        *v = f32::from_bits(b);
    }
}

/// Median of values with weights: the smallest value at which the cumulative weight
/// reaches half the total.
pub fn weighted_median(pairs: &[(f64, f64)]) -> Option<f64> {
    let mut v: Vec<(f64, f64)> = pairs
        .iter()
        .copied()
        .filter(|(x, w)| x.is_finite() && *w > 0.0)
        .collect();
    if v.is_empty() {
        return None;
    }
    v.sort_by(|a, b| a.0.total_cmp(&b.0));
    let total: f64 = v.iter().map(|p| p.1).sum();
    let mut acc = 0.0;
    for &(x, w) in &v {
        acc += w;
        if acc >= 0.5 * total {
            return Some(x);
        }
    }
    v.last().map(|p| p.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weighted_median_reaches_half_the_weight() {
        assert_eq!(
            weighted_median(&[(1.0, 1.0), (2.0, 1.0), (3.0, 1.0)]),
            Some(2.0)
        );
        // A heavy value carries the median.
        assert_eq!(
            weighted_median(&[(1.0, 1.0), (2.0, 1.0), (9.0, 5.0)]),
            Some(9.0)
        );
        assert_eq!(weighted_median(&[(f64::NAN, 1.0), (4.0, 0.0)]), None);
    }

    #[test]
    fn median_of_odd_and_even_samples() {
        assert_eq!(median(&[3.0, 1.0, 2.0]), Some(2.0));
        assert_eq!(median(&[4.0, 1.0, 3.0, 2.0]), Some(2.5));
        assert_eq!(median(&[]), None);
    }

    #[test]
    fn mad_sigma_of_a_normal_sample_is_its_sigma() {
        // Deterministic normal quantiles: Φ⁻¹((i + 0.5)/n) for a perfect N(0, 2²) sample.
        let n = 2001;
        let values: Vec<f32> = (0..n)
            .map(|i| 2.0 * inverse_normal((i as f64 + 0.5) / n as f64) as f32)
            .collect();
        let s = mad_sigma(&values, 0.0, &mut Vec::new()).unwrap();
        assert!((s - 2.0).abs() < 0.01, "{s}");
    }

    #[test]
    fn radix_sort_orders_like_a_comparison_sort() {
        let mut v: Vec<f32> = (0..3000)
            .map(|i| ((i * 7919) % 3001) as f32 * 0.37 - 500.0)
            .chain([
                0.0,
                -0.0,
                f32::MIN,
                f32::MAX,
                1e-30,
                -1e-30,
                1000.25,
                1000.25,
            ])
            .collect();
        let mut expected = v.clone();
        expected.sort_by(f32::total_cmp);
        radix_sort(&mut v);
        assert_eq!(v, expected);
    }

    #[test]
    fn statistics_on_a_grid_do_not_snap_to_it() {
        // A normal sample (σ 1.2, mean 100.3) stored as whole numbers, as a camera with
        // a high gain stores the sky. The plain median snaps to the grid (100); the
        // grouped-data median does not. Rounding adds q²/12 to the variance (Sheppard
        // 1898), so the clipped scatter is sqrt(1.44 + 1/12) = 1.234 before the
        // clipping correction.
        let n = 20_001;
        let values: Vec<f32> = (0..n)
            .map(|i| (100.3 + 1.2 * inverse_normal((i as f64 + 0.5) / n as f64)).round() as f32)
            .collect();
        assert_eq!(median(&values), Some(100.0));
        let s = sigma_clip(&mut values.clone(), 3.0, 5).unwrap();
        assert!((s.median - 100.3).abs() < 0.03, "{s:?}");
        assert!((s.mode() - 100.3).abs() < 0.06, "{s:?}");
        assert!((s.std / 0.986_58 - 1.234).abs() < 0.03, "{s:?}");
        // The same values after a smooth level was taken off and put back (f32
        // rounding moves them slightly off the grid) give the same answer with the grid
        // known.
        let mut shaken: Vec<f32> = values
            .iter()
            .enumerate()
            .map(|(i, &v)| {
                let level = 37.123_f32 + 1e-4 * i as f32;
                (v - level) + level
            })
            .collect();
        let grid = Grid::of_sample(&mut values.clone()).unwrap();
        assert_eq!(grid.step, 1.0);
        let t = sigma_clip_on(&mut shaken, 3.0, 5, Some(grid)).unwrap();
        assert!((t.median - s.median).abs() < 1e-6, "{t:?} vs {s:?}");
    }

    #[test]
    fn noise_under_a_third_of_a_step_is_not_clipped_away() {
        // N(100.2, 0.3) rounded to whole numbers: 101 for the 15.9 % beyond +1σ, 99 for
        // the 1.0 % beyond −2.33σ (normal tail areas, from memory), 100 for the rest.
        // 3σ clipping about the median (±0.9) would keep only the 100s and read no
        // noise at all.
        let n = 20_001;
        let mut values: Vec<f32> = (0..n)
            .map(|i| (100.2 + 0.3 * inverse_normal((i as f64 + 0.5) / n as f64)).round() as f32)
            .collect();
        let s = sigma_clip(&mut values, 3.0, 10).unwrap();
        // The scatter of those stored values: sqrt(0.010·1.15² + 0.831·0.15² +
        // 0.159·0.85²) = 0.384.
        assert!((s.std - 0.384).abs() < 0.01, "{s:?}");
        // With the noise under a step, spreading each value over its step no longer
        // finds the true median (100.2); it still lands between the steps.
        assert!(s.median > 100.0 && s.median < 100.2, "{s:?}");
    }

    #[test]
    fn clipping_ignores_a_few_bright_outliers() {
        let mut values: Vec<f32> = (0..1000)
            .map(|i| 100.0 + 5.0 * inverse_normal((i as f64 + 0.5) / 1000.0) as f32)
            .collect();
        values.extend(std::iter::repeat_n(5000.0, 20));
        let s = sigma_clip(&mut values, 3.0, 10).unwrap();
        assert!((s.median - 100.0).abs() < 0.3, "{s:?}");
        assert!((s.std - 5.0).abs() < 0.3, "{s:?}");
        // Symmetric sample: the mode estimate equals the median.
        assert!((s.mode() - 100.0).abs() < 0.3, "{s:?}");
    }

    /// Acklam's rational approximation of the normal quantile (relative error < 1.2e-9),
    /// from memory; used only to build deterministic test samples.
    pub(crate) fn inverse_normal(p: f64) -> f64 {
        const A: [f64; 6] = [
            -3.969_683_028_665_376e1,
            2.209_460_984_245_205e2,
            -2.759_285_104_469_687e2,
            1.383_577_518_672_69e2,
            -3.066_479_806_614_716e1,
            2.506_628_277_459_239,
        ];
        const B: [f64; 5] = [
            -5.447_609_879_822_406e1,
            1.615_858_368_580_409e2,
            -1.556_989_798_598_866e2,
            6.680_131_188_771_972e1,
            -1.328_068_155_288_572e1,
        ];
        const C: [f64; 6] = [
            -7.784_894_002_430_293e-3,
            -3.223_964_580_411_365e-1,
            -2.400_758_277_161_838,
            -2.549_732_539_343_734,
            4.374_664_141_464_968,
            2.938_163_982_698_783,
        ];
        const D: [f64; 4] = [
            7.784_695_709_041_462e-3,
            3.224_671_290_700_398e-1,
            2.445_134_137_142_996,
            3.754_408_661_907_416,
        ];
        let plow = 0.02425;
        if p < plow {
            let q = (-2.0 * p.ln()).sqrt();
            (((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
                / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
        } else if p <= 1.0 - plow {
            let q = p - 0.5;
            let r = q * q;
            (((((A[0] * r + A[1]) * r + A[2]) * r + A[3]) * r + A[4]) * r + A[5]) * q
                / (((((B[0] * r + B[1]) * r + B[2]) * r + B[3]) * r + B[4]) * r + 1.0)
        } else {
            -inverse_normal(1.0 - p)
        }
    }
}
