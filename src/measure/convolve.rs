//! Separable convolution of a frame with a 1-D kernel along both axes (the matched
//! filter of detection), band by band in parallel. NaN pixels count as zero.
//!
//! The same sums run on every machine with the same rounding: each output value is its
//! taps added in kernel order from zero, each product rounded, then each sum, never a
//! fused multiply-add. So the filtered values, and with them every detection, are equal
//! bit for bit on x86-64 with or without AVX2 and on aarch64 with NEON. The vector paths
//! are chosen at run time where the processor may lack them (AVX2) and always on aarch64
//! (NEON is part of its base instruction set); `tests` hold each to the scalar sums.

use ndarray::Array2;
use rayon::prelude::*;

/// Rows per band of the convolution.
const BAND: usize = 32;
/// Output columns summed together in registers.
const LANES: usize = 16;

/// Separable convolution with `kernel` along both axes; NaN pixels count as zero.
/// Rows are processed in parallel bands so the only full-size allocation is the output,
/// which is written once (never zeroed first).
pub fn convolve_separable(image: &Array2<f32>, kernel: &[f32]) -> Array2<f32> {
    let (h, w) = image.dim();
    let mut out: Vec<f32> = Vec::with_capacity(h * w);
    out.spare_capacity_mut()[..h * w]
        .par_chunks_mut(BAND * w)
        .enumerate()
        .for_each_init(Scratch::default, |scratch, (band, rows)| {
            convolve_band(image, kernel, band * BAND, rows, scratch);
        });
    // SAFETY: the bands cover all h·w elements and `convolve_band` writes every one.
    unsafe { out.set_len(h * w) };
    Array2::from_shape_vec((h, w), out).expect("shape matches")
}

/// The convolution band by band without keeping it: each band of output rows (its
/// first row index and its values) goes to `visit` while still in cache, and the
/// visits' results come back in band order. Memory: one band per worker.
pub fn convolve_visit<T: Send>(
    image: &Array2<f32>,
    kernel: &[f32],
    visit: impl Fn(usize, &[f32]) -> T + Sync,
) -> Vec<T> {
    let (h, w) = image.dim();
    (0..h.div_ceil(BAND))
        .into_par_iter()
        .map_init(
            || (Scratch::default(), Vec::new()),
            |(scratch, band_out), band| {
                let y0 = band * BAND;
                let rows = BAND.min(h - y0);
                band_out.clear();
                band_out.reserve(rows * w);
                convolve_band(
                    image,
                    kernel,
                    y0,
                    &mut band_out.spare_capacity_mut()[..rows * w],
                    scratch,
                );
                // SAFETY: `convolve_band` wrote all rows·w elements.
                unsafe { band_out.set_len(rows * w) };
                visit(y0, band_out)
            },
        )
        .collect()
}

/// Scratch rows a worker keeps from band to band.
#[derive(Default)]
struct Scratch {
    horiz: Vec<f32>,
    padded: Vec<f32>,
}

/// Filtered rows `y0 .. y0 + out.len()/w` into `out`, every element written, by the
/// fastest path this processor has (all paths give the same bits).
fn convolve_band(
    image: &Array2<f32>,
    kernel: &[f32],
    y0: usize,
    out: &mut [std::mem::MaybeUninit<f32>],
    scratch: &mut Scratch,
) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the processor was just found to support AVX2.
        unsafe { convolve_band_avx2(image, kernel, y0, out, scratch) };
        return;
    }
    #[cfg(target_arch = "aarch64")]
    band_passes::<neon::Neon>(image, kernel, y0, out, scratch);
    #[cfg(not(target_arch = "aarch64"))]
    band_passes::<Portable>(image, kernel, y0, out, scratch);
}

/// The portable passes compiled for 8-lane AVX2 vectors. Only AVX2 is enabled, not FMA:
/// each multiply and add is rounded as in the portable build.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn convolve_band_avx2(
    image: &Array2<f32>,
    kernel: &[f32],
    y0: usize,
    out: &mut [std::mem::MaybeUninit<f32>],
    scratch: &mut Scratch,
) {
    band_passes::<Portable>(image, kernel, y0, out, scratch);
}

/// `LANES` output values at once: for each tap (its weight and where its `LANES` inputs
/// start in `src`), `acc += weight * input`, in tap order from zero.
trait Lanes {
    fn sum(src: &[f32], taps: impl Iterator<Item = (f32, usize)>) -> [f32; LANES];
}

/// Plain loops, which the compiler turns into whatever vectors the build allows
/// (without contracting a multiply and an add into one rounding).
#[cfg_attr(target_arch = "aarch64", allow(dead_code))]
struct Portable;

impl Lanes for Portable {
    #[inline(always)]
    fn sum(src: &[f32], taps: impl Iterator<Item = (f32, usize)>) -> [f32; LANES] {
        let mut acc = [0.0f32; LANES];
        for (kv, at) in taps {
            for (a, &v) in acc.iter_mut().zip(&src[at..at + LANES]) {
                *a += kv * v;
            }
        }
        acc
    }
}

/// NEON's 4-lane vectors, four of them for `LANES` columns: a multiply (`vmulq_f32`)
/// then an add (`vaddq_f32`), each rounded, never the fused `vfmaq_f32`.
#[cfg(target_arch = "aarch64")]
mod neon {
    use super::LANES;
    use std::arch::aarch64::{vaddq_f32, vdupq_n_f32, vld1q_f32, vmulq_f32, vst1q_f32};

    pub(super) struct Neon;

    impl super::Lanes for Neon {
        #[inline(always)]
        fn sum(src: &[f32], taps: impl Iterator<Item = (f32, usize)>) -> [f32; LANES] {
            sum_taps(src, taps)
        }
    }

    #[inline(always)]
    fn sum_taps(src: &[f32], taps: impl Iterator<Item = (f32, usize)>) -> [f32; LANES] {
        let mut out = [0.0f32; LANES];
        // SAFETY: NEON is part of aarch64's base instruction set; every load reads
        // `src[at..at + LANES]`, checked in bounds first, and every store writes `out`.
        unsafe {
            let mut acc = [vdupq_n_f32(0.0); 4];
            for (kv, at) in taps {
                let lanes = &src[at..at + LANES];
                let k = vdupq_n_f32(kv);
                for (j, a) in acc.iter_mut().enumerate() {
                    let v = vld1q_f32(lanes.as_ptr().add(4 * j));
                    *a = vaddq_f32(*a, vmulq_f32(k, v));
                }
            }
            for (j, a) in acc.iter().enumerate() {
                vst1q_f32(out.as_mut_ptr().add(4 * j), *a);
            }
        }
        out
    }
}

/// The horizontal then the vertical pass of one band, `LANES` columns at a time by
/// `sum`, the leftover columns one at a time.
#[inline(always)]
fn band_passes<L: Lanes>(
    image: &Array2<f32>,
    kernel: &[f32],
    y0: usize,
    out: &mut [std::mem::MaybeUninit<f32>],
    scratch: &mut Scratch,
) {
    let (h, w) = image.dim();
    let r = kernel.len() / 2;
    let src = image.as_slice().expect("standard layout");
    let rows = out.len() / w;
    let lo = y0.saturating_sub(r);
    let hi = (y0 + rows + r).min(h);
    let Scratch { horiz, padded } = scratch;
    let whole = w / LANES * LANES;
    // Horizontal pass for the rows this band needs, on a zero-padded copy of each row
    // (NaN counts as zero) so the inner loop is a plain dot product.
    horiz.clear();
    horiz.resize((hi - lo) * w, 0.0);
    padded.clear();
    padded.resize(w + 2 * r, 0.0);
    for y in lo..hi {
        for (p, &v) in padded[r..r + w].iter_mut().zip(&src[y * w..(y + 1) * w]) {
            *p = if v.is_finite() { v } else { 0.0 };
        }
        let d = &mut horiz[(y - lo) * w..(y - lo + 1) * w];
        for (c, chunk) in d[..whole].chunks_exact_mut(LANES).enumerate() {
            let x = c * LANES;
            let taps = kernel.iter().enumerate().map(|(k, &kv)| (kv, x + k));
            chunk.copy_from_slice(&L::sum(padded, taps));
        }
        for (x, o) in d.iter_mut().enumerate().skip(whole) {
            let mut acc = 0.0f32;
            for (k, &kv) in kernel.iter().enumerate() {
                acc += kv * padded[x + k];
            }
            *o = acc;
        }
    }
    // Vertical pass, over the rows of the kernel's reach that exist.
    for dy in 0..rows {
        let y = y0 + dy;
        let o = &mut out[dy * w..(dy + 1) * w];
        let k0 = y.saturating_sub(r);
        let k1 = (y + r).min(h - 1);
        let taps = (k0..=k1).map(|yy| (kernel[yy + r - y], (yy - lo) * w));
        for (c, chunk) in o[..whole].chunks_exact_mut(LANES).enumerate() {
            let x = c * LANES;
            let at = taps.clone().map(|(kv, row)| (kv, row + x));
            for (o, a) in chunk.iter_mut().zip(L::sum(horiz, at)) {
                o.write(a);
            }
        }
        for (x, o) in o.iter_mut().enumerate().skip(whole) {
            let mut acc = 0.0f32;
            for (kv, row) in taps.clone() {
                acc += kv * horiz[row + x];
            }
            o.write(acc);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::detect::gaussian_kernel;

    /// The convolution one value at a time, in the order the module's comment states:
    /// the reference every vector path must equal bit for bit.
    fn scalar(image: &Array2<f32>, kernel: &[f32]) -> Array2<f32> {
        let (h, w) = image.dim();
        let r = kernel.len() as i64 / 2;
        let at = |y: usize, x: i64| -> f32 {
            if x < 0 || x >= w as i64 {
                return 0.0;
            }
            let v = image[(y, x as usize)];
            if v.is_finite() {
                v
            } else {
                0.0
            }
        };
        let mut horiz = Array2::<f32>::zeros((h, w));
        for y in 0..h {
            for x in 0..w {
                let mut acc = 0.0f32;
                for (k, &kv) in kernel.iter().enumerate() {
                    acc += kv * at(y, x as i64 + k as i64 - r);
                }
                horiz[(y, x)] = acc;
            }
        }
        let mut out = Array2::<f32>::zeros((h, w));
        for y in 0..h {
            for x in 0..w {
                let mut acc = 0.0f32;
                for (k, &kv) in kernel.iter().enumerate() {
                    let yy = y as i64 + k as i64 - r;
                    if yy >= 0 && yy < h as i64 {
                        acc += kv * horiz[(yy as usize, x)];
                    }
                }
                out[(y, x)] = acc;
            }
        }
        out
    }

    #[test]
    fn every_path_equals_the_scalar_sums_bit_for_bit() {
        // Widths that are and are not multiples of the lanes, bands cut short, NaNs.
        let mut state = 11u64;
        let mut next = || {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1);
            ((state >> 40) as f32 / (1u64 << 24) as f32) * 1000.0 - 100.0
        };
        for (h, w, fwhm) in [(70, 97, 2.5), (33, 16, 4.0), (5, 130, 1.2), (64, 48, 6.0)] {
            let mut img = Array2::from_shape_fn((h, w), |_| next());
            img[(h / 2, w / 3)] = f32::NAN;
            img[(0, w - 1)] = f32::INFINITY;
            let k = gaussian_kernel(fwhm);
            let fast = convolve_separable(&img, &k);
            let slow = scalar(&img, &k);
            for (a, b) in fast.iter().zip(slow.iter()) {
                assert_eq!(a.to_bits(), b.to_bits(), "{h}x{w}, FWHM {fwhm}: {a} {b}");
            }
        }
    }

    #[test]
    fn the_portable_sums_equal_the_scalar_sums_bit_for_bit() {
        // The path this processor does not take by default, run directly.
        let img = Array2::from_shape_fn((40, 50), |(y, x)| ((x * 7 + y * 13) % 17) as f32 * 1.37);
        let k = gaussian_kernel(3.0);
        let (h, w) = img.dim();
        let mut out = vec![std::mem::MaybeUninit::<f32>::uninit(); h * w];
        band_passes::<Portable>(&img, &k, 0, &mut out, &mut Scratch::default());
        let slow = scalar(&img, &k);
        for (o, b) in out.iter().zip(slow.iter()) {
            // SAFETY: `band_passes` writes every element.
            assert_eq!(unsafe { o.assume_init() }.to_bits(), b.to_bits());
        }
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
