//! Aperture photometry with a local sky annulus, the half-flux radius, and the CCD
//! equation for signal-to-noise. Pure functions over a background-subtracted image.

use ndarray::Array2;

use super::stats::{sigma_clip_on, Grid};

/// Result of one aperture measurement.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Aperture {
    /// Sum inside the aperture minus the local sky times the aperture area, ADU.
    pub flux: f64,
    /// Effective number of pixels in the aperture (fractional pixels counted by area).
    pub n_pix: f64,
    /// Pixels used for the local sky.
    pub n_sky: usize,
    /// Local residual sky level per pixel from the annulus, ADU.
    pub local_sky: f64,
}

/// Fraction of the pixel at offset (dx, dy) from the centre of a circle of radius r
/// that lies inside it, by 5×5 sub-sampling near the edge (exact 0 or 1 elsewhere; a
/// pixel's corners lie within 0.7072 px of its centre).
fn overlap(dx: f64, dy: f64, r: f64) -> f64 {
    let d2 = dx * dx + dy * dy;
    let inner = r - 0.7072;
    if inner > 0.0 && d2 <= inner * inner {
        return 1.0;
    }
    if d2 >= (r + 0.7072) * (r + 0.7072) {
        return 0.0;
    }
    let r2 = r * r;
    let mut inside = 0;
    for i in 0..5 {
        for j in 0..5 {
            let sx = dx - 0.4 + 0.2 * f64::from(i);
            let sy = dy - 0.4 + 0.2 * f64::from(j);
            if sx * sx + sy * sy <= r2 {
                inside += 1;
            }
        }
    }
    f64::from(inside) / 25.0
}

/// Circular aperture of radius `r` at 0-based (cx, cy), sky from the annulus
/// [r_in, r_out] (sigma-clipped median). NaN pixels are skipped. `None` when the
/// aperture holds no valid pixel.
pub fn aperture(
    residual: &Array2<f32>,
    cx: f64,
    cy: f64,
    r: f64,
    r_in: f64,
    r_out: f64,
) -> Option<Aperture> {
    let sky = SkyAnnulus {
        r_in,
        r_out,
        grid: None,
    };
    apertures(residual, cx, cy, [r], sky).map(|[a]| a)
}

/// The annulus an aperture's local sky is taken from.
#[derive(Debug, Clone, Copy)]
pub struct SkyAnnulus {
    pub r_in: f64,
    pub r_out: f64,
    /// When the raw values sit on a grid that is coarse against the sky noise: the grid
    /// and the background level subtracted near the star. That level is added back to
    /// the annulus values, which brings them next to the grid again, and their median is
    /// taken as that of grouped data; a plain median would snap to the grid, off by up
    /// to half a step in every pixel of the aperture.
    pub grid: Option<(Grid, f64)>,
}

/// Several concentric apertures sharing one sky annulus, in one pass over the pixels.
/// `None` when any of them holds no valid pixel.
pub fn apertures<const N: usize>(
    residual: &Array2<f32>,
    cx: f64,
    cy: f64,
    radii: [f64; N],
    sky_annulus: SkyAnnulus,
) -> Option<[Aperture; N]> {
    let SkyAnnulus { r_in, r_out, grid } = sky_annulus;
    let (h, w) = residual.dim();
    let x0 = (cx - r_out).floor().max(0.0) as usize;
    let x1 = ((cx + r_out).ceil() as usize).min(w.saturating_sub(1));
    let y0 = (cy - r_out).floor().max(0.0) as usize;
    let y1 = ((cy + r_out).ceil() as usize).min(h.saturating_sub(1));
    let (in2, out2) = (r_in * r_in, r_out * r_out);
    let mut sum = [0.0; N];
    let mut n_pix = [0.0; N];
    let mut sky: Vec<f32> = Vec::new();
    for y in y0..=y1 {
        let dy = y as f64 - cy;
        for x in x0..=x1 {
            let v = residual[(y, x)];
            if !v.is_finite() {
                continue;
            }
            let dx = x as f64 - cx;
            let d2 = dx * dx + dy * dy;
            if d2 >= in2 && d2 <= out2 {
                sky.push(v);
            }
            for k in 0..N {
                let f = overlap(dx, dy, radii[k]);
                if f > 0.0 {
                    sum[k] += f * f64::from(v);
                    n_pix[k] += f;
                }
            }
        }
    }
    if n_pix.iter().any(|&n| n <= 0.0) {
        return None;
    }
    let n_sky = sky.len();
    let local_sky = if n_sky >= 8 {
        match grid {
            Some((g, level)) => {
                sky.iter_mut()
                    .for_each(|v| *v = (f64::from(*v) + level) as f32);
                sigma_clip_on(&mut sky, 3.0, 5, Some(g)).map(|s| s.median - level)
            }
            None => sigma_clip_on(&mut sky, 3.0, 5, None).map(|s| s.median),
        }
        .unwrap_or(0.0)
    } else {
        0.0
    };
    Some(std::array::from_fn(|k| Aperture {
        flux: sum[k] - local_sky * n_pix[k],
        n_pix: n_pix[k],
        n_sky,
        local_sky,
    }))
}

/// Radius enclosing half of the flux inside `r_max`, pixels. Each pixel is split into
/// 4×4 parts so the growth curve is smooth at small radii. `None` for no positive flux.
pub fn half_flux_radius(
    residual: &Array2<f32>,
    cx: f64,
    cy: f64,
    r_max: f64,
    local_sky: f64,
) -> Option<f64> {
    // Only pixels near the centre need splitting: a pixel whose centre lies beyond
    // `fine` has all its parts beyond fine − 0.54, so when the half-flux radius falls
    // inside that, where its light is binned does not change the answer. Otherwise the
    // growth curve is made again with every pixel split.
    let fine = (0.5 * r_max).max(4.0);
    match growth_curve_half(residual, cx, cy, r_max, local_sky, fine)? {
        r if r < fine - 0.54 || fine >= r_max => Some(r),
        _ => growth_curve_half(residual, cx, cy, r_max, local_sky, r_max + 1.0),
    }
}

/// The half-flux radius from a growth curve in which pixels with centres within `fine`
/// are split into 4×4 parts and the rest are binned at their centres.
fn growth_curve_half(
    residual: &Array2<f32>,
    cx: f64,
    cy: f64,
    r_max: f64,
    local_sky: f64,
    fine: f64,
) -> Option<f64> {
    let (h, w) = residual.dim();
    let x0 = (cx - r_max).floor().max(0.0) as usize;
    let x1 = ((cx + r_max).ceil() as usize).min(w.saturating_sub(1));
    let y0 = (cy - r_max).floor().max(0.0) as usize;
    let y1 = ((cy + r_max).ceil() as usize).min(h.saturating_sub(1));
    // A growth curve in radial bins of 1/32 px: linear in the number of pixels, no sort.
    const BIN: f64 = 1.0 / 32.0;
    let nbins = (r_max / BIN).ceil() as usize + 1;
    let mut bins = vec![0.0f64; nbins];
    let r2_max = r_max * r_max;
    let fine2 = fine * fine;
    let mut add = |d2: f64, value: f64| {
        if d2 <= r2_max {
            bins[((d2.sqrt() / BIN) as usize).min(nbins - 1)] += value;
        }
    };
    for y in y0..=y1 {
        for x in x0..=x1 {
            let v = residual[(y, x)];
            if !v.is_finite() {
                continue;
            }
            let (dx, dy) = (x as f64 - cx, y as f64 - cy);
            let value = f64::from(v) - local_sky;
            if dx * dx + dy * dy > fine2 {
                // Beyond the split zone the parts of a pixel straddle r_max only within
                // 0.54 px of it; those pixels are still split so the edge stays exact.
                if (dx * dx + dy * dy).sqrt() + 0.54 < r_max {
                    add(dx * dx + dy * dy, value);
                    continue;
                }
            }
            for i in 0..4 {
                for j in 0..4 {
                    let sx = dx - 0.375 + 0.25 * f64::from(i);
                    let sy = dy - 0.375 + 0.25 * f64::from(j);
                    add(sx * sx + sy * sy, value / 16.0);
                }
            }
        }
    }
    let total: f64 = bins.iter().sum();
    if total.is_nan() || total <= 0.0 {
        return None;
    }
    let mut acc = 0.0;
    for (k, &v) in bins.iter().enumerate() {
        let next = acc + v;
        if next >= 0.5 * total {
            // Interpolate inside the bin.
            let t = if v > 0.0 {
                (0.5 * total - acc) / v
            } else {
                1.0
            };
            return Some((k as f64 + t.clamp(0.0, 1.0)) * BIN);
        }
        acc = next;
    }
    Some(r_max)
}

/// The 1σ uncertainty of an aperture flux by the same CCD equation, ADU.
pub fn ccd_flux_error(
    flux: f64,
    n_pix: f64,
    n_sky: usize,
    sky_sigma: f64,
    gain: Option<f64>,
) -> f64 {
    let shot = gain.filter(|g| *g > 0.0).map_or(0.0, |g| flux.max(0.0) / g);
    let sky = n_pix * (1.0 + n_pix / n_sky.max(1) as f64) * sky_sigma * sky_sigma;
    (shot + sky).sqrt()
}

/// Signal-to-noise ratio by the CCD equation (Merline & Howell 1995, Exp. Astron. 6, 163):
/// SNR = F / sqrt(F/g + n_pix·(1 + n_pix/n_sky)·σ²), all in ADU, with σ² the measured
/// per-pixel sky variance (which holds the sky, dark and read-noise terms of the
/// equation) and g the gain in e⁻/ADU. Without a gain the source's own shot noise is
/// left out, which overstates the SNR of bright stars only.
pub fn ccd_snr(flux: f64, n_pix: f64, n_sky: usize, sky_sigma: f64, gain: Option<f64>) -> f64 {
    if flux.is_nan() || flux <= 0.0 {
        return 0.0;
    }
    let shot = gain.filter(|g| *g > 0.0).map_or(0.0, |g| flux / g);
    let sky_term = if n_sky > 0 {
        n_pix * (1.0 + n_pix / n_sky as f64) * sky_sigma * sky_sigma
    } else {
        n_pix * sky_sigma * sky_sigma
    };
    let var = shot + sky_term;
    if var > 0.0 {
        flux / var.sqrt()
    } else {
        f64::INFINITY
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn gaussian_image(sigma: f64, flux: f64) -> Array2<f32> {
        // Pixel-integrated circular Gaussian via erf differences (exact separable form).
        let (cx, cy) = (30.3, 29.6);
        let cdf = |t: f64| 0.5 * (1.0 + libm_erf(t / (sigma * std::f64::consts::SQRT_2)));
        Array2::from_shape_fn((60, 60), |(y, x)| {
            let fx = cdf(x as f64 + 0.5 - cx) - cdf(x as f64 - 0.5 - cx);
            let fy = cdf(y as f64 + 0.5 - cy) - cdf(y as f64 - 0.5 - cy);
            (flux * fx * fy) as f32
        })
    }

    /// erf by Abramowitz & Stegun 7.1.26 (|error| < 1.5e-7).
    fn libm_erf(x: f64) -> f64 {
        let t = 1.0 / (1.0 + 0.327_591_1 * x.abs());
        let y = 1.0
            - (((((1.061_405_429 * t - 1.453_152_027) * t) + 1.421_413_741) * t - 0.284_496_736)
                * t
                + 0.254_829_592)
                * t
                * (-x * x).exp();
        if x >= 0.0 {
            y
        } else {
            -y
        }
    }

    #[test]
    fn aperture_recovers_the_total_flux() {
        let img = gaussian_image(2.0, 10_000.0);
        let a = aperture(&img, 30.3, 29.6, 12.0, 15.0, 25.0).unwrap();
        assert!((a.flux - 10_000.0).abs() < 5.0, "{a:?}");
        // Analytic: a circular Gaussian holds 1 − exp(−r²/2σ²) of its flux within r; the
        // pixels widen σ² by 1/12 px², and an edge pixel's light counts as spread evenly
        // over it, which at r = σ costs a few per cent.
        let sky = SkyAnnulus {
            r_in: 15.0,
            r_out: 25.0,
            grid: None,
        };
        let [inner, outer] = apertures(&img, 30.3, 29.6, [2.0, 12.0], sky).unwrap();
        assert_eq!(outer, a);
        let expected = 10_000.0 * (1.0 - (-(2.0f64 * 2.0) / (2.0 * (4.0 + 1.0 / 12.0))).exp());
        assert!(
            (inner.flux - expected).abs() / expected < 0.03,
            "{inner:?} vs {expected}"
        );
        // Exact overlap: the area of the circle, π r².
        assert!(
            (inner.n_pix - std::f64::consts::PI * 4.0).abs() < 0.1,
            "{inner:?}"
        );
    }

    #[test]
    fn half_flux_radius_of_a_gaussian_is_half_its_fwhm() {
        // Analytic: the enclosed fraction 1 − exp(−r²/2σ²) is ½ at r = σ·sqrt(2 ln 2)
        // = FWHM/2. The pixel sampling widens σ² by 1/12 px² (variance of a unit box).
        let sigma: f64 = 3.0;
        let img = gaussian_image(sigma, 50_000.0);
        let r = half_flux_radius(&img, 30.3, 29.6, 20.0, 0.0).unwrap();
        let expected = (sigma * sigma + 1.0 / 12.0).sqrt() * (2.0 * std::f64::consts::LN_2).sqrt();
        assert!((r - expected).abs() / expected < 0.01, "{r} vs {expected}");
    }

    #[test]
    fn snr_follows_the_ccd_equation() {
        // Worked example: F = 10000 ADU, g = 2, 50 px, 200 sky px, σ = 10 ADU:
        // var = 5000 + 50·1.25·100 = 11250, SNR = 10000/106.066 = 94.28.
        let s = ccd_snr(10_000.0, 50.0, 200, 10.0, Some(2.0));
        assert!((s - 94.280_904).abs() < 1e-4, "{s}");
    }
}
