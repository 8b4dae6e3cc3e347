//! Pixels no star can make: after the background is subtracted, the pixels standing far
//! above it are flagged in the same pass, and those far above the median of their eight
//! neighbours (hot pixels, cosmic-ray hits) are replaced by that median before detection,
//! so their filtered wings cannot swallow a star nearby. Each group is reported once.

use ndarray::Array2;
use rayon::prelude::*;

use super::background::BackgroundMap;
use super::{RejectKind, Rejected};

/// How many times its brightest neighbour a pixel can stand above and still be a star's
/// centre. A Gaussian star centred on a pixel, its profile averaged over the pixels, has
/// its centre 3.5 times its brightest neighbour at an optical FWHM of 1.3 px, 6.4 times
/// at 1.0 px and 8.5 times at 0.9 px (analytic: the ratio of the error-function
/// integrals over the centre and the side pixel); a star centred off a pixel's centre
/// shares its light and stands lower still. Above 8, the pixel is a hot pixel or a
/// cosmic-ray hit: no star sharper than 0.9 px FWHM is expected on a camera's sensor.
pub(super) const STAR_LIMIT: f64 = 8.0;

/// Subtract the background map row by row and, in the same pass, list the interior
/// pixels standing more than 6σ above it with that σ: the only ones
/// `clean_sharp_pixels` needs to look at.
pub(super) fn subtract_and_flag(
    img: &mut Array2<f32>,
    bkg: &BackgroundMap,
) -> Vec<(usize, usize, f32)> {
    let (h, w) = img.dim();
    img.as_slice_mut()
        .expect("standard layout")
        .par_chunks_mut(w)
        .enumerate()
        .flat_map_iter(|(y, row)| {
            let mut level = vec![0.0f32; w];
            let mut rms = vec![0.0f32; w];
            bkg.level_row(y, &mut level);
            bkg.rms_row(y, &mut rms);
            for (v, l) in row.iter_mut().zip(&level) {
                *v -= l;
            }
            let mut flagged = Vec::new();
            if y == 0 || y + 1 >= h {
                return flagged;
            }
            // Blocks of 32 pixels are first tested whole (a vectorised maximum of the
            // excess over 6σ); nearly all of them hold no such pixel.
            for (b, (vals, sigmas)) in row.chunks(32).zip(rms.chunks(32)).enumerate() {
                let excess = vals
                    .iter()
                    .zip(sigmas)
                    .fold(f32::NEG_INFINITY, |m, (&v, &s)| m.max(v - 6.0 * s));
                if excess > 0.0 {
                    for (k, (&v, &s)) in vals.iter().zip(sigmas).enumerate() {
                        let x = 32 * b + k;
                        if v > 6.0 * s && x >= 1 && x + 1 < w {
                            flagged.push((x, y, s));
                        }
                    }
                }
            }
            flagged
        })
        .collect()
}

/// The test of `clean_sharp_pixels` for one interior pixel: its value and the median
/// of its eight neighbours (what replaces it) when it is sharp. A pixel is sharp when it
/// is the top of its neighbourhood and stands more than 6σ and more than [`STAR_LIMIT`]
/// times above every neighbour off its brightest axis (the pair of opposite neighbours,
/// along a row, a column or a diagonal, that holds its brightest neighbour). A hot pixel
/// has no bright neighbour at all, and a cosmic-ray track a pixel wide has them on one
/// axis only; a star, however narrow, spreads over two dimensions.
fn sharp_pixel(img: &Array2<f32>, x: usize, y: usize, sigma: f32) -> Option<(f32, f32)> {
    let v = img[(y, x)];
    if v.is_nan() || v <= 6.0 * sigma {
        return None;
    }
    let at = |dx: isize, dy: isize| {
        let u = img[((y as isize + dy) as usize, (x as isize + dx) as usize)];
        if u.is_finite() {
            u
        } else {
            0.0
        }
    };
    // Opposite pairs: the row, the column and the two diagonals.
    let axes = [
        [(-1, 0), (1, 0)],
        [(0, -1), (0, 1)],
        [(-1, -1), (1, 1)],
        [(1, -1), (-1, 1)],
    ];
    let values: Vec<[f32; 2]> = axes
        .iter()
        .map(|a| [at(a[0].0, a[0].1), at(a[1].0, a[1].1)])
        .collect();
    let axis_max = |k: usize| values[k][0].max(values[k][1]);
    if (0..4).any(|k| axis_max(k) > v) {
        return None;
    }
    let brightest_axis = (0..4)
        .max_by(|&a, &b| axis_max(a).total_cmp(&axis_max(b)))
        .expect("four axes");
    let off_axis = (0..4)
        .filter(|&k| k != brightest_axis)
        .map(axis_max)
        .fold(f32::NEG_INFINITY, f32::max);
    let mut n: Vec<f32> = values.iter().flatten().copied().collect();
    n.sort_unstable_by(f32::total_cmp);
    let med = 0.5 * (n[3] + n[4]);
    (v - off_axis > 6.0 * sigma && f64::from(v) > STAR_LIMIT * f64::from(off_axis.max(sigma)))
        .then_some((v, med))
}

/// Find the pixels no star sampled by pixels can make (see `sharp_pixel`): hot pixels
/// and cosmic-ray hits. This is the Laplacian-edge idea of van Dokkum (2001, PASP 113,
/// 1420) in the form of a contrast with the brightest neighbours, which a star centred
/// near a pixel's corner or edge (sharing its light with its neighbours) never passes,
/// however narrow.
/// Flagged pixels are replaced by the median of their neighbours, and each group of
/// adjacent flagged pixels is returned once as a sharp rejection.
pub(super) fn clean_sharp_pixels(
    residual: &mut Array2<f32>,
    bkg: &BackgroundMap,
    bright: &[(usize, usize, f32)],
) -> Vec<Rejected> {
    let (h, w) = residual.dim();
    let img = &*residual;
    let mut found: Vec<(usize, usize, f32, f32)> = bright
        .par_iter()
        .filter_map(|&(x, y, sigma)| sharp_pixel(img, x, y, sigma).map(|(v, med)| (x, y, v, med)))
        .collect();
    let mut flagged = Vec::new();
    // Replacing a pixel of a cosmic-ray track can expose its neighbour as the next sharp
    // one; look again only around what was just replaced.
    for _ in 0..3 {
        if found.is_empty() {
            break;
        }
        for &(x, y, _, med) in &found {
            residual[(y, x)] = med;
        }
        let mut again: Vec<(usize, usize)> = found
            .iter()
            .flat_map(|&(x, y, _, _)| {
                (y - 1..=y + 1).flat_map(move |ny| (x - 1..=x + 1).map(move |nx| (nx, ny)))
            })
            .filter(|&(nx, ny)| nx >= 1 && ny >= 1 && nx < w - 1 && ny < h - 1)
            .collect();
        again.sort_unstable();
        again.dedup();
        flagged.append(&mut found);
        let img = &*residual;
        found = again
            .into_iter()
            .filter_map(|(x, y)| {
                let sigma = bkg.rms_at(x as f64, y as f64) as f32;
                sharp_pixel(img, x, y, sigma).map(|(v, med)| (x, y, v, med))
            })
            .collect();
    }
    flagged.append(&mut found);
    // Group adjacent pixels (a cosmic-ray track) into one rejection at the brightest.
    flagged.sort_by(|a, b| b.2.total_cmp(&a.2));
    let mut groups: Vec<Rejected> = Vec::new();
    for &(x, y, v, _) in &flagged {
        let (fx, fy) = (x as f64 + 1.0, y as f64 + 1.0);
        if !groups
            .iter()
            .any(|g| (g.x - fx).abs() <= 3.0 && (g.y - fy).abs() <= 3.0)
        {
            groups.push(Rejected {
                x: fx,
                y: fy,
                kind: RejectKind::Sharp,
                peak_adu: f64::from(v),
            });
        }
    }
    groups
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::background::BackgroundParams;

    /// A flat sky of 1000 with unit noise from a fixed pattern (deterministic).
    fn sky(w: usize, h: usize) -> Array2<f32> {
        Array2::from_shape_fn((h, w), |(y, x)| {
            1000.0 + (((x * 7 + y * 13) % 11) as f32 - 5.0) * 0.3
        })
    }

    /// A Gaussian star as a sensor records it: the profile averaged over each pixel
    /// (8 x 8 samples a pixel), `flux` in all.
    fn gaussian(img: &mut Array2<f32>, cx: f64, cy: f64, fwhm: f64, flux: f64) {
        let s = fwhm / (8.0 * std::f64::consts::LN_2).sqrt();
        let norm = flux / (2.0 * std::f64::consts::PI * s * s) / 64.0;
        for ((y, x), v) in img.indexed_iter_mut() {
            if (x as f64 - cx).abs() > 6.0 || (y as f64 - cy).abs() > 6.0 {
                continue;
            }
            let mut sum = 0.0;
            for i in 0..8 {
                for j in 0..8 {
                    let (dx, dy) = (
                        x as f64 - 0.4375 + 0.125 * i as f64 - cx,
                        y as f64 - 0.4375 + 0.125 * j as f64 - cy,
                    );
                    sum += (-(dx * dx + dy * dy) / (2.0 * s * s)).exp();
                }
            }
            *v += (norm * sum) as f32;
        }
    }

    #[test]
    fn hot_pixels_and_a_track_are_cleaned_and_a_sharp_star_is_not() {
        let mut img = sky(128, 128);
        img[(30, 40)] += 500.0; // a hot pixel
        for k in 0..3 {
            img[(80 + k, 90 + k)] += 400.0; // a cosmic-ray track
        }
        // The sharpest star a sensor can sample (FWHM 1.3 px) must survive.
        gaussian(&mut img, 100.0, 20.0, 1.3, 600.0);
        let bkg = BackgroundMap::estimate(&img, None, BackgroundParams::default()).unwrap();
        let bright = subtract_and_flag(&mut img, &bkg);
        let rejected = clean_sharp_pixels(&mut img, &bkg, &bright);
        let at: Vec<(f64, f64)> = rejected.iter().map(|r| (r.x, r.y)).collect();
        assert_eq!(rejected.len(), 2, "{at:?}");
        assert!(at.contains(&(41.0, 31.0)), "FITS 1-based: {at:?}");
        assert!(rejected.iter().all(|r| r.kind == RejectKind::Sharp));
        // Replaced by the neighbours' median; the star's core is untouched.
        assert!(img[(30, 40)].abs() < 5.0);
        assert!(img[(20, 100)] > 150.0, "{}", img[(20, 100)]);
    }
}
