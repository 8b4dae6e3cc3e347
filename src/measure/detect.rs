//! Source detection on a background-subtracted image: a matched filter (a normalised
//! Gaussian near the expected PSF), a threshold at k σ of the filtered noise, 8-connected
//! components, and deblending of close pairs by the depth of the saddle between peaks.
//! Pure: arrays in, candidate list out.

use ndarray::Array2;
use rayon::prelude::*;

use super::background::BackgroundMap;

#[derive(Debug, Clone, Copy)]
pub struct DetectParams {
    /// Threshold in units of the filtered image's noise.
    pub sigma: f64,
    /// FWHM of the Gaussian matched filter, pixels.
    pub kernel_fwhm: f64,
    /// Smallest component (pixels above threshold) kept.
    pub min_area: usize,
    /// A secondary peak is its own source when the saddle towards a brighter peak is at
    /// least this fraction of its height below it...
    pub deblend_contrast: f64,
    /// ...and at least this many filtered-noise σ below it.
    pub deblend_sigma: f64,
}

impl Default for DetectParams {
    fn default() -> Self {
        Self {
            sigma: 5.0,
            kernel_fwhm: 3.0,
            min_area: 3,
            deblend_contrast: 0.1,
            deblend_sigma: 5.0,
        }
    }
}

/// A straight streak found as one long, thin component (satellite, aircraft, meteor).
/// Positions are FITS 1-based.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Trail {
    pub x0: f64,
    pub y0: f64,
    pub x1: f64,
    pub y1: f64,
    /// Direction from +x towards +y, degrees in [0, 180).
    pub angle_deg: f64,
    /// Full width across the streak (from its second moment, as a FWHM), pixels.
    pub width_px: f64,
    pub length_px: f64,
}

/// What detection found.
#[derive(Debug, Clone, Default)]
pub struct Detections {
    pub candidates: Vec<Candidate>,
    pub trails: Vec<Trail>,
}

/// A component's shape from the second moments of its pixel positions: a trail when
/// it is long (at least `min_length` px) and thin (length over width at least 6).
fn as_trail(pixels: &[u32], w: usize, min_length: f64) -> Option<Trail> {
    let n = pixels.len() as f64;
    if n < 20.0 {
        return None;
    }
    let (mut sx, mut sy) = (0.0, 0.0);
    for &p in pixels {
        sx += (p as usize % w) as f64;
        sy += (p as usize / w) as f64;
    }
    let (mx, my) = (sx / n, sy / n);
    let (mut cxx, mut cyy, mut cxy) = (0.0, 0.0, 0.0);
    for &p in pixels {
        let (dx, dy) = ((p as usize % w) as f64 - mx, (p as usize / w) as f64 - my);
        cxx += dx * dx;
        cyy += dy * dy;
        cxy += dx * dy;
    }
    let (cxx, cyy, cxy) = (cxx / n, cyy / n, cxy / n);
    let mean = 0.5 * (cxx + cyy);
    let d = (0.25 * (cxx - cyy).powi(2) + cxy * cxy).sqrt();
    let (major, minor) = (mean + d, (mean - d).max(1.0 / 12.0));
    let theta = 0.5 * (2.0 * cxy).atan2(cxx - cyy);
    let (ux, uy) = (theta.cos(), theta.sin());
    // Extent along the axis from the extreme projections.
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for &p in pixels {
        let t = ((p as usize % w) as f64 - mx) * ux + ((p as usize / w) as f64 - my) * uy;
        lo = lo.min(t);
        hi = hi.max(t);
    }
    let length = hi - lo;
    // A uniform bar of width W has variance W²/12 across it.
    let width = (12.0 * minor).sqrt();
    let _ = major;
    (length >= min_length && length >= 6.0 * width).then(|| Trail {
        x0: mx + lo * ux + 1.0,
        y0: my + lo * uy + 1.0,
        x1: mx + hi * ux + 1.0,
        y1: my + hi * uy + 1.0,
        angle_deg: theta.to_degrees().rem_euclid(180.0),
        width_px: width,
        length_px: length,
    })
}

/// A detected peak, before any measurement.
#[derive(Debug, Clone)]
pub struct Candidate {
    /// 0-based column and row of the filtered-image peak.
    pub x: usize,
    pub y: usize,
    /// Filtered value at the peak, in units of the filtered noise there.
    pub significance: f64,
    /// Component pixel count.
    pub area: usize,
    /// Other peaks deblended out of the same component.
    pub blended: bool,
    pub component: usize,
}

/// Normalised 1-D Gaussian kernel (sum 1), radius ⌈3σ⌉.
pub fn gaussian_kernel(fwhm: f64) -> Vec<f32> {
    let sigma = (fwhm / (2.0 * (2.0 * std::f64::consts::LN_2).sqrt())).max(0.3);
    let r = (3.0 * sigma).ceil() as i64;
    let k: Vec<f64> = (-r..=r)
        .map(|i| (-(i * i) as f64 / (2.0 * sigma * sigma)).exp())
        .collect();
    let sum: f64 = k.iter().sum();
    k.iter().map(|v| (v / sum) as f32).collect()
}

/// Separable convolution with `kernel` along both axes; NaN pixels count as zero.
/// Rows are processed in parallel bands so the only full-size allocation is the output.
pub fn convolve_separable(image: &Array2<f32>, kernel: &[f32]) -> Array2<f32> {
    let (h, w) = image.dim();
    let r = kernel.len() / 2;
    let src = image.as_slice().expect("standard layout");
    let mut out =
        Array2::from_shape_vec((h, w), crate::buffer::zeroed(h * w)).expect("shape matches");
    const BAND: usize = 32;
    out.as_slice_mut()
        .expect("standard layout")
        .par_chunks_mut(BAND * w)
        .enumerate()
        .for_each(|(band, out_rows)| {
            let y0 = band * BAND;
            let rows = out_rows.len() / w;
            let lo = y0.saturating_sub(r);
            let hi = (y0 + rows + r).min(h);
            // Horizontal pass for the rows this band needs, on a zero-padded copy of each
            // row (NaN counts as zero) so the inner loop is a plain dot product.
            let mut horiz = vec![0.0f32; (hi - lo) * w];
            let mut padded = vec![0.0f32; w + 2 * r];
            for y in lo..hi {
                for (p, &v) in padded[r..r + w].iter_mut().zip(&src[y * w..(y + 1) * w]) {
                    *p = if v.is_finite() { v } else { 0.0 };
                }
                let d = &mut horiz[(y - lo) * w..(y - lo + 1) * w];
                // One shifted multiply-add per tap: long, vectorisable loops.
                for (k, &kv) in kernel.iter().enumerate() {
                    for (o, &p) in d.iter_mut().zip(&padded[k..k + w]) {
                        *o += kv * p;
                    }
                }
            }
            // Vertical pass into the output band.
            for dy in 0..rows {
                let y = y0 + dy;
                let o = &mut out_rows[dy * w..(dy + 1) * w];
                let k0 = y.saturating_sub(r);
                let k1 = (y + r).min(h - 1);
                for yy in k0..=k1 {
                    let kv = kernel[yy + r - y];
                    let hrow = &horiz[(yy - lo) * w..(yy - lo + 1) * w];
                    for (o, &hv) in o.iter_mut().zip(hrow) {
                        *o += kv * hv;
                    }
                }
            }
        });
    out
}

/// Detect candidates in `residual` (image minus background).
pub fn detect(
    residual: &Array2<f32>,
    background: &BackgroundMap,
    params: &DetectParams,
) -> Detections {
    let (h, w) = residual.dim();
    let mut trails = Vec::new();
    if h == 0 || w == 0 {
        return Detections::default();
    }
    let kernel = gaussian_kernel(params.kernel_fwhm);
    // White noise filtered by k has σ_f = σ · sqrt(Σ k²) (2-D kernel = outer product).
    let k2: f64 = kernel.iter().map(|&v| f64::from(v).powi(2)).sum::<f64>();
    let noise_gain = k2; // sqrt(Σ_2D k²) = Σ_1D k² for a separable kernel
    let filtered = convolve_separable(residual, &kernel);
    let f = filtered.as_slice().expect("standard layout");

    // 1 = above threshold, 2 = above and already assigned to a component.
    let mut above = crate::buffer::zeroed::<u8>(h * w);
    above.par_chunks_mut(w).enumerate().for_each(|(y, row)| {
        let mut rms = vec![0.0f32; w];
        background.rms_row(y, &mut rms);
        for x in 0..w {
            let sigma_f = f64::from(rms[x]) * noise_gain;
            if sigma_f > 0.0 && f64::from(f[y * w + x]) > params.sigma * sigma_f {
                row[x] = 1;
            }
        }
    });
    let noise_at = |x: usize, y: usize| background.rms_at(x as f64, y as f64) * noise_gain;

    let mut candidates = Vec::new();
    let mut stack = Vec::new();
    let mut pixels: Vec<u32> = Vec::new();
    let mut component = 0usize;
    for start in 0..h * w {
        if above[start] != 1 {
            continue;
        }
        // Flood fill (8-connected); mark visited as 2.
        pixels.clear();
        stack.push(start as u32);
        above[start] = 2;
        while let Some(p) = stack.pop() {
            pixels.push(p);
            let (px, py) = ((p as usize) % w, (p as usize) / w);
            for dy in -1i64..=1 {
                for dx in -1i64..=1 {
                    let (nx, ny) = (px as i64 + dx, py as i64 + dy);
                    if nx < 0 || ny < 0 || nx >= w as i64 || ny >= h as i64 {
                        continue;
                    }
                    let q = ny as usize * w + nx as usize;
                    if above[q] == 1 {
                        above[q] = 2;
                        stack.push(q as u32);
                    }
                }
            }
        }
        if pixels.len() < params.min_area {
            continue;
        }
        // A streak is reported whole; its peaks are not stars.
        if let Some(t) = as_trail(&pixels, w, 10.0 * params.kernel_fwhm.max(2.0)) {
            trails.push(t);
            continue;
        }
        component += 1;
        // Local maxima of the filtered image inside the component.
        let mut peaks: Vec<(usize, f32)> = pixels
            .iter()
            .map(|&p| p as usize)
            .filter(|&p| is_local_max(f, w, h, p))
            .map(|p| (p, f[p]))
            .collect();
        peaks.sort_by(|a, b| b.1.total_cmp(&a.1));
        peaks.truncate(500);
        let sigma_here = noise_at(peaks[0].0 % w, peaks[0].0 / w).max(1e-30);
        let mut kept: Vec<(usize, f32)> = Vec::new();
        for &(p, v) in &peaks {
            let isolated = kept.iter().all(|&(q, _)| {
                let saddle = min_along_segment(f, w, p, q);
                let depth = f64::from(v - saddle);
                depth >= params.deblend_contrast * f64::from(v)
                    && depth >= params.deblend_sigma * sigma_here
            });
            if isolated {
                kept.push((p, v));
            }
        }
        let blended = kept.len() > 1;
        for &(p, v) in &kept {
            let (x, y) = (p % w, p / w);
            candidates.push(Candidate {
                x,
                y,
                significance: f64::from(v) / noise_at(x, y).max(1e-30),
                area: pixels.len(),
                blended,
                component,
            });
        }
    }
    Detections { candidates, trails }
}

fn is_local_max(f: &[f32], w: usize, h: usize, p: usize) -> bool {
    let (x, y) = (p % w, p / w);
    let v = f[p];
    for dy in -1i64..=1 {
        for dx in -1i64..=1 {
            if dx == 0 && dy == 0 {
                continue;
            }
            let (nx, ny) = (x as i64 + dx, y as i64 + dy);
            if nx < 0 || ny < 0 || nx >= w as i64 || ny >= h as i64 {
                continue;
            }
            let q = ny as usize * w + nx as usize;
            // Ties (flat saturated tops) go to the earlier pixel, so a plateau gives one peak.
            if f[q] > v || (f[q] == v && q < p) {
                return false;
            }
        }
    }
    true
}

/// Smallest filtered value on the straight segment between two pixels.
fn min_along_segment(f: &[f32], w: usize, a: usize, b: usize) -> f32 {
    let (ax, ay) = ((a % w) as f64, (a / w) as f64);
    let (bx, by) = ((b % w) as f64, (b / w) as f64);
    let steps = ((bx - ax).abs().max((by - ay).abs()).ceil() as usize).max(1) * 2;
    (0..=steps)
        .map(|i| {
            let t = i as f64 / steps as f64;
            let x = (ax + t * (bx - ax)).round() as usize;
            let y = (ay + t * (by - ay)).round() as usize;
            f[y * w + x]
        })
        .fold(f32::INFINITY, f32::min)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kernel_is_normalised_and_symmetric() {
        let k = gaussian_kernel(3.0);
        let s: f32 = k.iter().sum();
        assert!((s - 1.0).abs() < 1e-6);
        assert_eq!(k.first(), k.last());
    }

    #[test]
    fn convolution_of_a_delta_is_the_kernel_product() {
        let mut img = Array2::<f32>::zeros((40, 40));
        img[(20, 20)] = 1.0;
        let k = gaussian_kernel(2.5);
        let out = convolve_separable(&img, &k);
        let r = k.len() / 2;
        assert!((out[(20, 20)] - k[r] * k[r]).abs() < 1e-7);
        assert!((out[(21, 18)] - k[r + 1] * k[r - 2]).abs() < 1e-7);
        assert!((out.sum() - 1.0).abs() < 1e-5);
    }
}
