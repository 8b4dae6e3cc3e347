//! A small picture of a whole frame for the status page: binned down to fit a side of a
//! few hundred pixels and stretched for the eye with the asinh stretch of Lupton et al.
//! (2004, PASP 116, 133), its black point just under the sky and its softening a few
//! times the sky's noise, so faint stars show and bright ones do not burn out. Pure.

use ndarray::Array2;

use super::plots::encode_png;

/// A preview: PNG bytes and the picture's size, and how many frame pixels one picture
/// pixel spans on a side.
#[derive(Debug, Clone)]
pub struct Preview {
    pub png: Vec<u8>,
    pub width: u32,
    pub height: u32,
    pub bin: usize,
}

/// The whole frame binned by a whole factor to at most `max_side` pixels on its longer
/// side (the mean of each block, blank pixels left out), rows flipped so FITS y runs up
/// the picture, grey levels from an asinh stretch of the binned sky.
pub fn preview_png(pixels: &Array2<f32>, max_side: usize) -> Option<Preview> {
    let (h, w) = pixels.dim();
    if w == 0 || h == 0 || max_side == 0 {
        return None;
    }
    let bin = w.max(h).div_ceil(max_side).max(1);
    let (bw, bh) = (w.div_ceil(bin), h.div_ceil(bin));
    let mut binned = vec![f32::NAN; bw * bh];
    for by in 0..bh {
        for bx in 0..bw {
            let (mut sum, mut n) = (0.0f64, 0u32);
            for y in by * bin..((by + 1) * bin).min(h) {
                for x in bx * bin..((bx + 1) * bin).min(w) {
                    let v = pixels[(y, x)];
                    if v.is_finite() {
                        sum += f64::from(v);
                        n += 1;
                    }
                }
            }
            if n > 0 {
                binned[by * bw + bx] = (sum / f64::from(n)) as f32;
            }
        }
    }
    let mut finite: Vec<f32> = binned.iter().copied().filter(|v| v.is_finite()).collect();
    if finite.is_empty() {
        return None;
    }
    finite.sort_by(f32::total_cmp);
    let at = |q: f64| f64::from(finite[((finite.len() - 1) as f64 * q) as usize]);
    let sky = at(0.5);
    // The noise from the median absolute deviation, scaled to a Gaussian's sigma
    // (1.4826; common practice).
    let mut dev: Vec<f64> = finite.iter().map(|v| (f64::from(*v) - sky).abs()).collect();
    dev.sort_by(f64::total_cmp);
    let sigma = (1.4826 * dev[dev.len() / 2]).max(1e-6);
    let black = sky - 1.5 * sigma;
    let soft = 3.0 * sigma;
    // The white point: the brightest pixels, but never less than 100 σ above the sky,
    // so that a sparse field's sky is not stretched into grey fog.
    let white = at(0.9995).max(sky + 100.0 * sigma);
    let top = ((white - black) / soft).asinh();
    let mut grey = vec![0u8; bw * bh];
    for py in 0..bh {
        // The picture's top row is the frame's last row.
        let src = (bh - 1 - py) * bw;
        for px in 0..bw {
            let v = binned[src + px];
            let t = if v.is_finite() {
                (((f64::from(v) - black) / soft).max(0.0).asinh() / top).clamp(0.0, 1.0)
            } else {
                0.0
            };
            grey[py * bw + px] = (t * 255.0).round() as u8;
        }
    }
    let png = encode_png(&grey, bw as u32, bh as u32, image::ColorType::L8)?;
    Some(Preview {
        png,
        width: bw as u32,
        height: bh as u32,
        bin,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_frame_is_binned_to_fit_and_its_star_is_bright_where_fits_puts_it() {
        // A 1000 x 600 frame of flat sky 100 ADU with a little noise, and one bright
        // square "star" near FITS (801, 101): x to the right, y up.
        let mut px = Array2::<f32>::from_shape_fn((600, 1000), |(y, x)| {
            100.0 + ((x * 7 + y * 13) % 11) as f32 - 5.0
        });
        for y in 95..106 {
            for x in 795..806 {
                px[(y, x)] = 5000.0;
            }
        }
        let p = preview_png(&px, 250).unwrap();
        assert_eq!((p.bin, p.width, p.height), (4, 250, 150));
        let img = image::load_from_memory(&p.png).unwrap().to_luma8();
        assert_eq!(img.dimensions(), (250, 150));
        // The star: column 800/4 = 200, and near the bottom (y up): row 149 - 100/4.
        let star = img.get_pixel(200, 149 - 25)[0];
        let sky = img.get_pixel(20, 20)[0];
        assert!(star > 200 && sky < 90, "star {star}, sky {sky}");
    }

    #[test]
    fn a_blank_or_empty_frame_has_no_preview() {
        assert!(preview_png(&Array2::<f32>::from_elem((4, 4), f32::NAN), 100).is_none());
        assert!(preview_png(&Array2::<f32>::zeros((0, 0)), 100).is_none());
    }
}
