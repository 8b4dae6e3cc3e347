//! The sky's noise: the grid raw values sit on, a mask over the sources, and the robust
//! pixel-to-pixel scatter of what is left about the local background.

use ndarray::Array2;

use super::detect::Candidate;
use super::stats::{mad_sigma, median_in_place, sigma_clip_on, Grid, CLIP3_STD_CORRECTION};

/// Circles around detections, wider for brighter ones, so their wings stay out of the
/// sky statistics.
pub(super) fn source_mask(w: usize, h: usize, candidates: &[Candidate], fwhm: f64) -> Vec<bool> {
    let mut mask = crate::buffer::zeroed::<bool>(w * h);
    for c in candidates {
        let r = fwhm * (1.5 + c.significance.max(1.0).log10());
        let ri = r.ceil() as i64;
        for dy in -ri..=ri {
            for dx in -ri..=ri {
                if ((dx * dx + dy * dy) as f64) > r * r {
                    continue;
                }
                let (x, y) = (c.x as i64 + dx, c.y as i64 + dy);
                if x >= 0 && y >= 0 && (x as usize) < w && (y as usize) < h {
                    mask[y as usize * w + x as usize] = true;
                }
            }
        }
    }
    mask
}

/// The grid of the raw pixel values (whole ADU, or the steps of a 12- or 14-bit sensor
/// scaled to 16 bits), from about twenty thousand pixels spread over the frame.
pub(super) fn raw_grid(pixels: &Array2<f32>) -> Option<Grid> {
    let data = pixels.as_slice()?;
    let stride = (data.len() / 20_000).max(1);
    let mut sample: Vec<f32> = data
        .iter()
        .step_by(stride)
        .copied()
        .filter(|v| v.is_finite())
        .collect();
    Grid::of_sample(&mut sample)
}

/// The sky's pixel-to-pixel scatter from the unmasked residual pixels; at most about
/// half a million are sampled. 1.4826 × MAD, whose efficiency for normal data is 37 %
/// (from memory), so its relative standard error is about 1.16/√n: 0.2 % at that size.
/// When the raw values sit on a grid coarser than a twentieth of that scatter, the MAD
/// snaps to the grid (off by up to a fifth on a 12-bit sensor with a dark sky), and the
/// 3σ-clipped standard deviation is used instead: it holds the quantisation's q²/12
/// (Sheppard 1898) as the pixels themselves do, whatever the grid's phase.
pub(super) fn robust_noise(
    residual: &Array2<f32>,
    mask: &[bool],
    grid: Option<Grid>,
) -> Option<f64> {
    let data = residual.as_slice()?;
    let stride = (data.len() / 500_000).max(1);
    let mut sample: Vec<f32> = data
        .iter()
        .zip(mask)
        .step_by(stride)
        .filter(|(v, m)| !**m && v.is_finite())
        .map(|(v, _)| *v)
        .collect();
    if sample.len() < 10 {
        return None;
    }
    let center = median_in_place(&mut sample)?;
    let mad = mad_sigma(&sample, center, &mut Vec::new())?;
    match grid {
        Some(g) if g.step > 0.05 * mad => {
            sigma_clip_on(&mut sample, 3.0, 10, grid).map(|s| s.std / CLIP3_STD_CORRECTION)
        }
        _ => Some(mad),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};

    #[test]
    fn the_scatter_of_normal_noise_is_recovered_and_masked_pixels_are_left_out() {
        let mut rng = rand::rngs::StdRng::seed_from_u64(5);
        let normal = Normal::new(0.0, 12.0).unwrap();
        let mut img = Array2::from_shape_fn((512, 512), |_| normal.sample(&mut rng) as f32);
        // A bright source under the mask must not count.
        for y in 200..220 {
            for x in 200..220 {
                img[(y, x)] += 5000.0;
            }
        }
        let c = [Candidate {
            x: 210,
            y: 210,
            significance: 1000.0,
            area: 400,
            blended: false,
            component: 0,
        }];
        let mask = source_mask(512, 512, &c, 8.0);
        assert!(mask[210 * 512 + 210] && !mask[10 * 512 + 10]);
        let sigma = robust_noise(&img, &mask, None).unwrap();
        // 1.4826 × MAD of 262 000 normal values: standard error about 0.2 % (see above).
        assert!((sigma / 12.0 - 1.0).abs() < 0.01, "{sigma}");
    }

    #[test]
    fn whole_adu_values_sit_on_a_grid_of_one() {
        let img = Array2::from_shape_fn((200, 200), |(y, x)| (1000 + (x * 3 + y) % 17) as f32);
        assert_eq!(raw_grid(&img).map(|g| g.step), Some(1.0));
    }
}
