//! Pixels no star can make: after the background is subtracted, the pixels standing far
//! above it are flagged in the same pass, and those far above the median of their eight
//! neighbours (hot pixels, cosmic-ray hits) are replaced by that median before detection,
//! so their filtered wings cannot swallow a star nearby. Each group is reported once.

use ndarray::Array2;
use rayon::prelude::*;

use super::background::BackgroundMap;
use super::{RejectKind, Rejected};

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
/// of its eight neighbours when it is sharp.
fn sharp_pixel(img: &Array2<f32>, x: usize, y: usize, sigma: f32) -> Option<(f32, f32)> {
    let v = img[(y, x)];
    if v.is_nan() || v <= 6.0 * sigma {
        return None;
    }
    let mut n = [0.0f32; 8];
    let mut k = 0;
    for dy in 0..3 {
        for dx in 0..3 {
            if dx == 1 && dy == 1 {
                continue;
            }
            let u = img[(y + dy - 1, x + dx - 1)];
            // Only the top of a peak can be sharp: the corner pixel of a narrow star has
            // five neighbours of sky and would otherwise stand far above their median.
            if u > v {
                return None;
            }
            n[k] = if u.is_finite() { u } else { 0.0 };
            k += 1;
        }
    }
    n.sort_unstable_by(f32::total_cmp);
    let med = 0.5 * (n[3] + n[4]);
    (v - med > 6.0 * sigma && v > 8.0 * med.max(sigma)).then_some((v, med))
}

/// Find pixels at the top of a peak that stand far above the median of their eight
/// neighbours (more than 6σ, and more than eight times that median): no pixel-sampled
/// star is that sharp (the centre of a star of FWHM 1.3 px is about 5.5 times the median
/// of its neighbours, analytic: erf(0.64)² against the mean of a side and a corner).
/// This is the Laplacian-edge idea of van Dokkum (2001, PASP 113, 1420) in the form of
/// a median contrast. Flagged pixels are replaced by that median, and each group of
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
