//! Whole-frame passes over the pixels: the largest finite value, a saturation plateau,
//! and the background map taken off row by row. Each runs over row bands in parallel.

use ndarray::Array2;
use rayon::prelude::*;

use super::background::BackgroundMap;

/// Saturation level from a plateau at the image maximum (at least 3 pixels share it).
pub(super) fn plateau_saturation(pixels: &Array2<f32>, max: f32) -> Option<f64> {
    let tol = (max.abs() * 1e-6).max(1e-3);
    let data = pixels.as_slice()?;
    let floor = max - tol;
    let at_max: usize = data
        .par_chunks(1 << 16)
        .map(|c| c.iter().map(|&v| usize::from(v >= floor)).sum::<usize>())
        .sum();
    (at_max >= 3).then_some(f64::from(max))
}

/// Largest finite pixel value; −∞ when there is none.
pub(super) fn finite_max(pixels: &Array2<f32>) -> f32 {
    pixels.as_slice().map_or(f32::NEG_INFINITY, |d| {
        d.par_chunks(1 << 16)
            .map(|c| {
                // Eight running maxima, so the loop is a vector compare-and-select;
                // NaN fails both comparisons and +∞ the second, so neither is taken.
                let mut lanes = [f32::NEG_INFINITY; 8];
                let mut parts = c.chunks_exact(8);
                for part in &mut parts {
                    for (m, &v) in lanes.iter_mut().zip(part) {
                        *m = if v > *m && v < f32::INFINITY { v } else { *m };
                    }
                }
                parts
                    .remainder()
                    .iter()
                    .chain(&lanes)
                    .copied()
                    .filter(|v| v.is_finite())
                    .fold(f32::NEG_INFINITY, f32::max)
            })
            .reduce(|| f32::NEG_INFINITY, f32::max)
    })
}

pub(super) fn subtract_rows(img: &mut Array2<f32>, bkg: &BackgroundMap) {
    let w = img.ncols();
    img.as_slice_mut()
        .expect("standard layout")
        .par_chunks_mut(w)
        .enumerate()
        .for_each(|(y, row)| {
            let mut level = vec![0.0f32; w];
            bkg.level_row(y, &mut level);
            for (v, l) in row.iter_mut().zip(&level) {
                *v -= l;
            }
        });
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_largest_finite_value_ignores_nan_and_infinity() {
        let mut img = Array2::from_elem((300, 300), 5.0f32);
        img[(3, 4)] = f32::NAN;
        img[(7, 8)] = f32::INFINITY;
        img[(250, 299)] = 9.5;
        assert_eq!(finite_max(&img), 9.5);
        assert_eq!(
            finite_max(&Array2::from_elem((4, 4), f32::NAN)),
            f32::NEG_INFINITY
        );
    }

    #[test]
    fn three_pixels_at_the_maximum_make_a_plateau() {
        let mut img = Array2::from_elem((50, 50), 100.0f32);
        img[(1, 1)] = 65535.0;
        img[(1, 2)] = 65535.0;
        assert_eq!(plateau_saturation(&img, 65535.0), None);
        img[(2, 1)] = 65535.0;
        assert_eq!(plateau_saturation(&img, 65535.0), Some(65535.0));
    }
}
