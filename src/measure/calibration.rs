//! What a calibration frame (dark, flat, bias) is measured for: its level against the
//! camera's full scale, its noise, clipped and hot pixels, and its shape on a coarse grid
//! (each block's median over the frame's median), which is what shows a flat that
//! departs from its set (a moved dust shadow, a flickering panel, a light leak) and a
//! gradient in a dark. Pure.

use ndarray::Array2;
use serde::{Deserialize, Serialize};

use crate::finite::{finite, finite_num, nan_if_null};
use crate::measure::stats::{median_in_place, MAD_TO_SIGMA};

/// The grid's side, in blocks.
pub const GRID: usize = 24;

#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct CalibrationStats {
    /// "dark", "flat" or "bias", as the header or the folder says.
    #[serde(default)]
    pub kind: String,
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub median_adu: f64,
    /// Pixel noise from neighbouring pixels' differences (robust, blind to gradients).
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub noise_adu: f64,
    /// The camera's full scale used: SATURATE, else the data type's range.
    #[serde(serialize_with = "finite")]
    pub full_scale_adu: Option<f64>,
    /// The median over the full scale.
    #[serde(serialize_with = "finite")]
    pub level_fraction: Option<f64>,
    /// Pixels at or above 99.9 % of full scale.
    pub clipped_fraction: f64,
    /// Pixels more than 10 σ above the median (hot pixels in a dark or a bias).
    pub hot_pixel_count: usize,
    /// Groups of 5 or more touching pixels above 5 σ: stars or a lit patch, which a
    /// dark or a bias never holds (a light leak); hot pixels stand alone.
    #[serde(default)]
    pub source_count: usize,
    /// Each block's median over the frame's median, row by row from the first row
    /// (`GRID` × `GRID`; fewer when the frame is smaller).
    pub grid: Vec<f32>,
    pub grid_width: usize,
    pub grid_height: usize,
    /// The grid's highest minus lowest block, over the median: a gradient or a glow.
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub gradient_fraction: f64,
    /// The same difference in units of the noise of a block's median: whether the
    /// gradient is real or the noise's.
    #[serde(serialize_with = "finite_num", deserialize_with = "nan_if_null")]
    pub gradient_sigmas: f64,
}

/// The statistics of one calibration frame. `full_scale` as the caller knows it.
pub fn calibration_stats(pixels: &Array2<f32>, full_scale: Option<f64>) -> CalibrationStats {
    let (h, w) = pixels.dim();
    let mut values: Vec<f32> = pixels.iter().copied().filter(|v| v.is_finite()).collect();
    let n = values.len();
    let med = median_in_place(&mut values).unwrap_or(f64::NAN);
    // The noise from differences of pixels two apart in a row (1.4826 × their median absolute
    // value / √2; common practice), which a gradient or vignetting does not inflate.
    let mut diffs: Vec<f32> = pixels
        .rows()
        .into_iter()
        .flat_map(|row| {
            // Two pixels apart: the same colour of a Bayer mosaic.
            row.windows(3)
                .into_iter()
                .map(|p| (p[2] - p[0]).abs())
                .filter(|d| d.is_finite())
                .collect::<Vec<f32>>()
        })
        .collect();
    let noise =
        MAD_TO_SIGMA * median_in_place(&mut diffs).unwrap_or(f64::NAN) / std::f64::consts::SQRT_2;
    drop(diffs);
    let clip = full_scale.map(|f| 0.999 * f);
    let clipped = clip.map_or(0, |c| values.iter().filter(|v| f64::from(**v) >= c).count());
    let hot_limit = med + 10.0 * noise.max(1e-6);
    let hot = values.iter().filter(|v| f64::from(**v) > hot_limit).count();
    drop(values);
    let sources = sources_above(pixels, med + 5.0 * noise.max(1e-6), 5);

    let (gw, gh) = (GRID.min(w), GRID.min(h));
    let mut grid = Vec::with_capacity(gw * gh);
    let mut block_sizes = Vec::with_capacity(gw * gh);
    for by in 0..gh {
        let (y0, y1) = (by * h / gh, (by + 1) * h / gh);
        for bx in 0..gw {
            let (x0, x1) = (bx * w / gw, (bx + 1) * w / gw);
            let mut block: Vec<f32> = pixels
                .slice(ndarray::s![y0..y1, x0..x1])
                .iter()
                .copied()
                .filter(|v| v.is_finite())
                .collect();
            block_sizes.push(block.len());
            grid.push(if med.abs() > 0.0 {
                (median_in_place(&mut block).unwrap_or(f64::NAN) / med) as f32
            } else {
                f32::NAN
            });
        }
    }
    let finite_grid = grid.iter().copied().filter(|g| g.is_finite());
    let (lo, hi) = finite_grid.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), g| {
        (lo.min(f64::from(g)), hi.max(f64::from(g)))
    });
    let gradient = if hi >= lo { hi - lo } else { f64::NAN };
    // A block median's noise: 1.2533 σ/√n for a Gaussian (Kendall & Stuart).
    let smallest = block_sizes.iter().copied().min().unwrap_or(0).max(1) as f64;
    let block_noise = 1.2533 * noise / smallest.sqrt();
    CalibrationStats {
        kind: String::new(),
        median_adu: med,
        noise_adu: noise,
        full_scale_adu: full_scale,
        level_fraction: full_scale.filter(|f| *f > 0.0).map(|f| med / f),
        clipped_fraction: if n > 0 {
            clipped as f64 / n as f64
        } else {
            0.0
        },
        hot_pixel_count: hot,
        source_count: sources,
        grid,
        grid_width: gw,
        grid_height: gh,
        gradient_fraction: gradient,
        gradient_sigmas: gradient * med.abs() / block_noise.max(1e-9),
    }
}

/// Groups of at least `min_pixels` 4-connected pixels above `level`.
fn sources_above(pixels: &Array2<f32>, level: f64, min_pixels: usize) -> usize {
    let (h, w) = pixels.dim();
    let above = |y: usize, x: usize| f64::from(pixels[(y, x)]) > level;
    let mut seen = vec![false; h * w];
    let mut count = 0;
    let mut stack = Vec::new();
    for y in 0..h {
        for x in 0..w {
            if seen[y * w + x] || !above(y, x) {
                continue;
            }
            seen[y * w + x] = true;
            stack.push((y, x));
            let mut size = 0;
            while let Some((cy, cx)) = stack.pop() {
                size += 1;
                let mut visit = |ny: usize, nx: usize| {
                    if !seen[ny * w + nx] && above(ny, nx) {
                        seen[ny * w + nx] = true;
                        stack.push((ny, nx));
                    }
                };
                if cy > 0 {
                    visit(cy - 1, cx);
                }
                if cy + 1 < h {
                    visit(cy + 1, cx);
                }
                if cx > 0 {
                    visit(cy, cx - 1);
                }
                if cx + 1 < w {
                    visit(cy, cx + 1);
                }
            }
            if size >= min_pixels {
                count += 1;
            }
        }
    }
    count
}

/// Full scale from the data type: what the camera could write (BITPIX with BZERO's
/// unsigned convention, FITS Standard 4.0 §4.4.2.5); `None` for floating point.
pub fn data_type_full_scale(bitpix: i32, bzero: Option<f64>) -> Option<f64> {
    let unsigned = |offset: f64| bzero.is_some_and(|z| (z - offset).abs() < 0.5);
    match bitpix {
        8 => Some(255.0),
        16 if unsigned(32768.0) => Some(65535.0),
        16 => Some(32767.0),
        32 if unsigned(2_147_483_648.0) => Some(4_294_967_295.0),
        32 => Some(2_147_483_647.0),
        _ => None,
    }
}

/// The largest departure of one flat's grid from the set's (both normalised to their
/// own medians), as a fraction: what a moved dust shadow, a flicker or a leak leaves.
pub fn grid_departure(grid: &[f32], reference: &[f32]) -> Option<f64> {
    if grid.len() != reference.len() || grid.is_empty() {
        return None;
    }
    grid.iter()
        .zip(reference)
        .filter(|(a, b)| a.is_finite() && b.is_finite() && **b != 0.0)
        .map(|(a, b)| (f64::from(*a) / f64::from(*b) - 1.0).abs())
        .fold(None, |m: Option<f64>, d| Some(m.map_or(d, |m| m.max(d))))
}

/// Each block's median over a set of grids (the set's own shape).
pub fn median_grid(grids: &[&[f32]]) -> Vec<f32> {
    let Some(first) = grids.first() else {
        return Vec::new();
    };
    (0..first.len())
        .map(|k| {
            let mut v: Vec<f32> = grids
                .iter()
                .filter_map(|g| g.get(k).copied())
                .filter(|x| x.is_finite())
                .collect();
            median_in_place(&mut v).unwrap_or(f64::NAN) as f32
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_distr::{Distribution, Normal};

    fn noisy(h: usize, w: usize, level: f64, sigma: f64, seed: u64) -> Array2<f32> {
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let n = Normal::new(level, sigma).unwrap();
        Array2::from_shape_fn((h, w), |_| n.sample(&mut rng) as f32)
    }

    #[test]
    fn level_noise_and_hot_pixels_of_a_dark() {
        let mut px = noisy(240, 320, 1000.0, 12.0, 1);
        let mut rng = rand::rngs::StdRng::seed_from_u64(2);
        for _ in 0..30 {
            px[(rng.gen_range(0..240), rng.gen_range(0..320))] = 9000.0;
        }
        let s = calibration_stats(&px, data_type_full_scale(16, Some(32768.0)));
        let mut leak = px.clone();
        for (cy, cx) in [(50usize, 60usize), (150, 200), (200, 100)] {
            for y in cy - 2..=cy + 2 {
                for x in cx - 2..=cx + 2 {
                    leak[(y, x)] += 500.0;
                }
            }
        }
        assert_eq!(calibration_stats(&leak, None).source_count, 3);
        // The median and 1.4826 MAD of a Gaussian are its mean and σ (common practice).
        assert!((s.median_adu - 1000.0).abs() < 0.5, "{}", s.median_adu);
        assert!((s.noise_adu - 12.0).abs() < 0.3, "{}", s.noise_adu);
        // 10 σ: a Gaussian never reaches it in 76,800 draws (P ≈ 1.5e-23 each).
        assert_eq!(s.hot_pixel_count, 30);
        assert_eq!(s.source_count, 0, "hot pixels stand alone");
        assert!((s.level_fraction.unwrap() - 1000.0 / 65535.0).abs() < 1e-5);
        assert_eq!(s.clipped_fraction, 0.0);
        assert!(s.gradient_sigmas < 6.0, "{}", s.gradient_sigmas);
    }

    #[test]
    fn a_glow_is_a_gradient_and_a_moved_shadow_a_departure() {
        let flat = noisy(240, 320, 20000.0, 100.0, 3);
        let mut glow = flat.clone();
        for ((y, _), v) in glow.indexed_iter_mut() {
            *v += (y as f32) * 4.0;
        }
        let a = calibration_stats(&flat, Some(65535.0));
        let g = calibration_stats(&glow, Some(65535.0));
        assert!(
            g.gradient_fraction > 0.04 && g.gradient_sigmas > 50.0,
            "{g:?}"
        );
        // A dust shadow 8 % deep over a 30 px disc, moved.
        let mut dusty = flat.clone();
        for ((y, x), v) in dusty.indexed_iter_mut() {
            let r = ((y as f64 - 120.0).powi(2) + (x as f64 - 160.0).powi(2)).sqrt();
            if r < 30.0 {
                *v *= 0.92;
            }
        }
        let d = calibration_stats(&dusty, Some(65535.0));
        let dep = grid_departure(&d.grid, &a.grid).unwrap();
        assert!(dep > 0.05, "{dep}");
        let same = calibration_stats(&noisy(240, 320, 20000.0, 100.0, 4), Some(65535.0));
        assert!(grid_departure(&same.grid, &a.grid).unwrap() < 0.01);
    }

    #[test]
    fn full_scale_follows_the_data_type() {
        assert_eq!(data_type_full_scale(16, Some(32768.0)), Some(65535.0));
        assert_eq!(data_type_full_scale(16, None), Some(32767.0));
        assert_eq!(data_type_full_scale(8, None), Some(255.0));
        assert_eq!(data_type_full_scale(-32, None), None);
    }
}
