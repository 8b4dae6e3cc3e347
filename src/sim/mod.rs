//! Synthetic frames with known truth, for tests, benchmarks and the demo: stars rendered
//! by integrating the PSF over each pixel, on a sky with a gradient, through a camera
//! model (bias pedestal, gain, Poisson and read noise, 16-bit saturation), with hot
//! pixels and cosmic rays. Pure and seeded: the same parameters give the same frame.
//! Its length past 600 lines is the camera model and its tests; one renderer, one truth.

use ndarray::Array2;

pub mod calibration;
pub mod night;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal, Poisson};
use serde::Serialize;

use crate::frame::bayer::{BayerPattern, Channel};
use crate::frame::cards::OutValue;

#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum PsfShape {
    Gaussian,
    Moffat { beta: f64 },
}

/// A star placed by the caller: 0-based pixel position, electrons, color weights.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SceneStar {
    pub x: f64,
    pub y: f64,
    pub flux_e: f64,
    pub rgb: Option<[f64; 3]>,
}

/// A straight streak (satellite, aircraft, meteor): 0-based end points, electrons per
/// pixel of length, with the PSF's width across it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrailSpec {
    pub from: (f64, f64),
    pub to: (f64, f64),
    pub flux_per_px_e: f64,
}

/// An explicit scene instead of a random field: used to render nights, where the same
/// stars appear frame after frame.
#[derive(Debug, Clone, Default)]
pub struct Scene {
    pub stars: Vec<SceneStar>,
    /// Fixed detector defects: 0-based column, row, and ADU added.
    pub hot_pixels: Vec<(usize, usize, f64)>,
    pub trails: Vec<TrailSpec>,
    /// The frame's WCS: FITS CRPIX and CD matrix (the reference value stays `center_deg`).
    pub crpix: Option<(f64, f64)>,
    pub cd: Option<[[f64; 2]; 2]>,
}

#[derive(Debug, Clone)]
pub struct SimParams {
    pub width: usize,
    pub height: usize,
    pub seed: u64,
    pub star_count: usize,
    pub psf: PsfShape,
    /// Optical FWHM (geometric mean of the axes), pixels.
    pub fwhm_px: f64,
    pub eccentricity: f64,
    /// Position angle of the major axis, degrees from +x towards +y.
    pub angle_deg: f64,
    /// Sky, electrons per pixel, at the frame centre.
    pub sky_e: f64,
    /// Sky change across the full width and height, as a fraction of `sky_e`.
    pub gradient: (f64, f64),
    pub gain_e_per_adu: f64,
    pub read_noise_e: f64,
    pub bias_adu: f64,
    /// Brightest and faintest star, electrons.
    pub flux_range_e: (f64, f64),
    pub hot_pixels: usize,
    pub cosmic_rays: usize,
    pub bayer: Option<BayerPattern>,
    /// Sky position of the frame centre (RA, Dec degrees), plate scale (arcsec/px) and
    /// rotation of the WCS (degrees).
    pub center_deg: (f64, f64),
    pub scale_arcsec: f64,
    pub rotation_deg: f64,
    pub date_obs: String,
    pub object: String,
    pub exposure_s: f64,
    pub filter: String,
    pub scene: Option<Scene>,
}

impl Default for SimParams {
    fn default() -> Self {
        Self {
            width: 1024,
            height: 1024,
            seed: 1,
            star_count: 300,
            psf: PsfShape::Moffat { beta: 3.5 },
            fwhm_px: 3.5,
            eccentricity: 0.0,
            angle_deg: 0.0,
            sky_e: 800.0,
            gradient: (0.0, 0.0),
            gain_e_per_adu: 1.0,
            read_noise_e: 5.0,
            bias_adu: 500.0,
            flux_range_e: (400.0, 4.0e6),
            hot_pixels: 0,
            cosmic_rays: 0,
            bayer: None,
            // An invented field of the demo scenario.
            center_deg: (84.25, 27.6),
            scale_arcsec: 1.94,
            rotation_deg: 0.0,
            date_obs: "2026-03-14T21:30:00".into(),
            object: "Kestrel Field A".into(),
            exposure_s: 120.0,
            filter: "L".into(),
            scene: None,
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct TrueStar {
    /// FITS 1-based position.
    pub x: f64,
    pub y: f64,
    /// Noise-free flux deposited in the frame, ADU (for a mosaic: summed over channels).
    pub flux: f64,
    /// CCD-equation SNR in an aperture of radius 1 × the sampled FWHM.
    pub snr: f64,
    pub saturated: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rgb_weights: Option<[f64; 3]>,
}

#[derive(Debug, Clone, Serialize)]
pub struct TruePoint {
    pub x: f64,
    pub y: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct SimTruth {
    pub width: usize,
    pub height: usize,
    /// FWHM of the PSF as the pixels sample it (optical PSF averaged over a pixel),
    /// geometric mean of the axes, pixels.
    pub fwhm_px: f64,
    pub fwhm_optical_px: f64,
    /// Eccentricity of the pixel-sampled PSF's half-maximum contour.
    pub eccentricity: f64,
    pub eccentricity_optical: f64,
    pub psf: PsfShape,
    /// Sky level at the frame centre (= median for a linear gradient), ADU.
    pub background_adu: f64,
    /// Per-pixel sky noise, ADU (Poisson sky, read noise and 1/12 ADU² quantisation).
    pub noise_adu: f64,
    pub gain: f64,
    pub stars: Vec<TrueStar>,
    pub hot_pixels: Vec<TruePoint>,
    pub cosmic_rays: Vec<TruePoint>,
}

/// The optical PSF, normalised to unit integral.
#[derive(Debug, Clone, Copy)]
pub struct Psf {
    shape: PsfShape,
    /// Semi-axis scales (σ for Gaussian, α for Moffat) along the major and minor axes.
    major: f64,
    minor: f64,
    cos: f64,
    sin: f64,
    norm: f64,
}

impl Psf {
    pub fn new(shape: PsfShape, fwhm: f64, eccentricity: f64, angle_deg: f64) -> Self {
        let q = (1.0 - eccentricity.clamp(0.0, 0.99).powi(2)).sqrt();
        let (fwhm_major, fwhm_minor) = (fwhm / q.sqrt(), fwhm * q.sqrt());
        let k = match shape {
            PsfShape::Gaussian => 2.0 * (2.0 * std::f64::consts::LN_2).sqrt(),
            PsfShape::Moffat { beta } => 2.0 * (2f64.powf(1.0 / beta) - 1.0).sqrt(),
        };
        let (major, minor) = (fwhm_major / k, fwhm_minor / k);
        let norm = match shape {
            PsfShape::Gaussian => 1.0 / (2.0 * std::f64::consts::PI * major * minor),
            PsfShape::Moffat { beta } => (beta - 1.0) / (std::f64::consts::PI * major * minor),
        };
        let (sin, cos) = angle_deg.to_radians().sin_cos();
        Self {
            shape,
            major,
            minor,
            cos,
            sin,
            norm,
        }
    }

    /// Value per unit area at offset (dx, dy) from the centre.
    pub fn at(&self, dx: f64, dy: f64) -> f64 {
        let u = (self.cos * dx + self.sin * dy) / self.major;
        let v = (-self.sin * dx + self.cos * dy) / self.minor;
        let r2 = u * u + v * v;
        self.norm
            * match self.shape {
                PsfShape::Gaussian => (-0.5 * r2).exp(),
                PsfShape::Moffat { beta } => (1.0 + r2).powf(-beta),
            }
    }

    /// Radius (pixels) holding all but 1/1000 of the flux along the major axis.
    fn render_radius(&self) -> f64 {
        let r = match self.shape {
            PsfShape::Gaussian => (2.0 * 1000f64.ln()).sqrt() * self.major,
            PsfShape::Moffat { beta } => {
                (0.001f64.powf(-1.0 / (beta - 1.0)) - 1.0).sqrt() * self.major
            }
        };
        r.min(80.0) + 1.0
    }

    /// The PSF averaged over a unit pixel centred at offset (dx, dy), by midpoint
    /// sub-sampling with `n`×`n` points.
    pub fn pixel_average(&self, dx: f64, dy: f64, n: usize) -> f64 {
        let step = 1.0 / n as f64;
        let mut s = 0.0;
        for i in 0..n {
            for j in 0..n {
                s += self.at(
                    dx - 0.5 + (i as f64 + 0.5) * step,
                    dy - 0.5 + (j as f64 + 0.5) * step,
                );
            }
        }
        s / (n * n) as f64
    }

    /// FWHM along the major and minor axes of the pixel-sampled PSF, by bisection on
    /// its half-maximum.
    pub fn sampled_fwhm_axes(&self) -> (f64, f64) {
        let peak = self.pixel_average(0.0, 0.0, 32);
        let half_width = |dir: (f64, f64)| {
            let (mut lo, mut hi) = (0.0, 10.0 * self.major.max(1.0));
            for _ in 0..60 {
                let mid = 0.5 * (lo + hi);
                if self.pixel_average(mid * dir.0, mid * dir.1, 32) > 0.5 * peak {
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            0.5 * (lo + hi)
        };
        (
            2.0 * half_width((self.cos, self.sin)),
            2.0 * half_width((-self.sin, self.cos)),
        )
    }
}

fn channel_index(c: Channel) -> usize {
    match c {
        Channel::Red => 0,
        Channel::Green => 1,
        Channel::Blue => 2,
    }
}

/// Render a frame. Returns the pixels (ADU, already quantised as a 16-bit camera
/// would), the header keywords to write with it, and the truth.
pub fn render(p: &SimParams) -> (Array2<f32>, Vec<(String, OutValue)>, SimTruth) {
    let mut rng = StdRng::seed_from_u64(p.seed);
    let (w, h) = (p.width, p.height);
    let psf = Psf::new(p.psf, p.fwhm_px, p.eccentricity, p.angle_deg);
    let (s_major, s_minor) = psf.sampled_fwhm_axes();
    let fwhm_sampled = (s_major * s_minor).sqrt();
    let gain = p.gain_e_per_adu;
    let channel_at = |x: usize, y: usize| p.bayer.map(|b| b.0[(y % 2) * 2 + x % 2]);

    // Expected electrons per pixel, noise-free.
    let mut signal = Array2::<f64>::zeros((h, w));
    let (cx, cy) = ((w as f64 - 1.0) / 2.0, (h as f64 - 1.0) / 2.0);
    for ((y, x), v) in signal.indexed_iter_mut() {
        let gx = p.gradient.0 * (x as f64 - cx) / w as f64;
        let gy = p.gradient.1 * (y as f64 - cy) / h as f64;
        *v = p.sky_e * (1.0 + gx + gy);
    }

    // Star fluxes: counts rising towards faint stars, dN/dm ∝ 10^(0.3 m) (a typical
    // slope of star counts; common practice for mock fields).
    let (f_lo, f_hi) = p.flux_range_e;
    let m_lo = -2.5 * f_hi.log10();
    let m_hi = -2.5 * f_lo.log10();
    let radius = psf.render_radius();
    let mut stars = Vec::with_capacity(p.star_count);
    let mut deposited = Vec::with_capacity(p.star_count);
    if let Some(scene) = &p.scene {
        stars.extend(scene.stars.iter().map(|s| (s.x, s.y, s.flux_e, s.rgb)));
    }
    let random_stars = if p.scene.is_some() { 0 } else { p.star_count };
    for _ in 0..random_stars {
        let u: f64 = rng.gen();
        // Inverse CDF of dN/dm ∝ 10^(0.3 m) between m_lo and m_hi.
        let a = 10f64.powf(0.3 * m_lo);
        let b = 10f64.powf(0.3 * m_hi);
        let m = (a + u * (b - a)).log10() / 0.3;
        let flux_e = 10f64.powf(-0.4 * m);
        let x = rng.gen_range(-0.5..w as f64 - 0.5);
        let y = rng.gen_range(-0.5..h as f64 - 0.5);
        let rgb = p.bayer.map(|_| {
            // Mild color spread about grey; a very red star is the demo's job, not this.
            let t: f64 = rng.gen_range(-0.3..0.3);
            [1.0 + t, 1.0, 1.0 - t]
        });
        stars.push((x, y, flux_e, rgb));
    }
    // The SNR aperture: radius 1 × sampled FWHM, as the measurement uses.
    let r_snr = fwhm_sampled.max(1.5);
    let mut core = Vec::with_capacity(stars.len());
    for &(sx, sy, flux_e, rgb) in &stars {
        let mut sum = 0.0;
        let (mut core_e, mut core_n) = (0.0, 0.0);
        let (x0, x1) = (
            (sx - radius).floor().max(0.0) as usize,
            ((sx + radius).ceil() as usize).min(w - 1),
        );
        let (y0, y1) = (
            (sy - radius).floor().max(0.0) as usize,
            ((sy + radius).ceil() as usize).min(h - 1),
        );
        for y in y0..=y1 {
            for x in x0..=x1 {
                let (dx, dy) = (x as f64 - sx, y as f64 - sy);
                let near = dx * dx + dy * dy < (3.0 * p.fwhm_px).powi(2);
                let n = if near { 9 } else { 3 };
                let weight = match (rgb, channel_at(x, y)) {
                    (Some(c), Some(ch)) => c[channel_index(ch)],
                    _ => 1.0,
                };
                let e = flux_e * weight * psf.pixel_average(dx, dy, n);
                signal[(y, x)] += e;
                sum += e;
                if dx.hypot(dy) <= r_snr {
                    core_e += e;
                    core_n += 1.0;
                }
            }
        }
        deposited.push(sum);
        core.push((core_e, core_n));
    }

    // Trails: the PSF's width (as a Gaussian) across a straight line.
    let sigma_across = fwhm_sampled / 2.354_820_045;
    for t in p.scene.iter().flat_map(|s| &s.trails) {
        let (ax, ay) = t.from;
        let (bx, by) = t.to;
        let len = (bx - ax).hypot(by - ay).max(1e-9);
        let (ux, uy) = ((bx - ax) / len, (by - ay) / len);
        let reach = 4.0 * sigma_across + 1.0;
        let (x0, x1) = (ax.min(bx) - reach, ax.max(bx) + reach);
        let (y0, y1) = (ay.min(by) - reach, ay.max(by) + reach);
        for y in (y0.floor().max(0.0) as usize)..=(y1.ceil().max(0.0) as usize).min(h - 1) {
            for x in (x0.floor().max(0.0) as usize)..=(x1.ceil().max(0.0) as usize).min(w - 1) {
                let (dx, dy) = (x as f64 - ax, y as f64 - ay);
                let along = dx * ux + dy * uy;
                if !(0.0..=len).contains(&along) {
                    continue;
                }
                let across = (dx * uy - dy * ux).abs();
                if across > reach {
                    continue;
                }
                let g = (-0.5 * (across / sigma_across).powi(2)).exp()
                    / (sigma_across * (2.0 * std::f64::consts::PI).sqrt());
                signal[(y, x)] += t.flux_per_px_e * g;
            }
        }
    }

    // Camera: Poisson electrons, read noise, gain, bias, 16-bit ADC.
    let read = Normal::new(0.0, p.read_noise_e.max(1e-9)).expect("valid normal");
    let mut pixels = Array2::<f32>::zeros((h, w));
    for ((y, x), out) in pixels.indexed_iter_mut() {
        let mean = signal[(y, x)].max(0.0);
        let e = if mean > 0.0 {
            Poisson::new(mean)
                .map(|d| d.sample(&mut rng))
                .unwrap_or(mean)
        } else {
            0.0
        };
        let adu = p.bias_adu + (e + read.sample(&mut rng)) / gain;
        *out = adu.round().clamp(0.0, 65535.0) as f32;
    }

    let mut hot = Vec::new();
    for &(x, y, adu) in p.scene.iter().flat_map(|s| &s.hot_pixels) {
        if x < w && y < h {
            pixels[(y, x)] = (pixels[(y, x)] + adu as f32).min(65535.0);
            hot.push(TruePoint {
                x: x as f64 + 1.0,
                y: y as f64 + 1.0,
            });
        }
    }
    for _ in 0..p.hot_pixels {
        let (x, y) = (rng.gen_range(0..w), rng.gen_range(0..h));
        let v = pixels[(y, x)] + rng.gen_range(3000.0..40000.0);
        pixels[(y, x)] = v.min(65535.0);
        hot.push(TruePoint {
            x: x as f64 + 1.0,
            y: y as f64 + 1.0,
        });
    }
    let mut rays = Vec::new();
    for _ in 0..p.cosmic_rays {
        let (x, y) = (
            rng.gen_range(2.0..w as f64 - 2.0),
            rng.gen_range(2.0..h as f64 - 2.0),
        );
        let len: f64 = rng.gen_range(0.0..5.0);
        let ang: f64 = rng.gen_range(0.0..std::f64::consts::PI);
        let energy_adu: f64 = rng.gen_range(2000.0..20000.0) / gain;
        let steps = (len * 4.0).ceil().max(1.0) as usize;
        for i in 0..steps {
            let t = if steps == 1 {
                0.0
            } else {
                i as f64 / (steps - 1) as f64 - 0.5
            };
            let (px, py) = (
                (x + t * len * ang.cos()).round(),
                (y + t * len * ang.sin()).round(),
            );
            if px >= 0.0 && py >= 0.0 && (px as usize) < w && (py as usize) < h {
                let v = &mut pixels[(py as usize, px as usize)];
                *v = (*v + (energy_adu / steps as f64) as f32)
                    .round()
                    .min(65535.0);
            }
        }
        rays.push(TruePoint {
            x: x + 1.0,
            y: y + 1.0,
        });
    }

    // Truth per star: saturation from the noise-free peak; SNR by the CCD equation in
    // an aperture of radius 1 × sampled FWHM (Merline & Howell 1995).
    let sky_var_e = p.sky_e + p.read_noise_e.powi(2) + gain * gain / 12.0;
    let truth_stars = stars
        .iter()
        .zip(&deposited)
        .zip(&core)
        .map(|((&(sx, sy, _flux_e, rgb), &dep), &(core_e, n_pix))| {
            let (ix, iy) = (
                sx.round().clamp(0.0, (w - 1) as f64) as usize,
                sy.round().clamp(0.0, (h - 1) as f64) as usize,
            );
            let mut saturated = false;
            for y in iy.saturating_sub(1)..=(iy + 1).min(h - 1) {
                for x in ix.saturating_sub(1)..=(ix + 1).min(w - 1) {
                    if p.bias_adu + signal[(y, x)] / gain >= 65535.0 {
                        saturated = true;
                    }
                }
            }
            TrueStar {
                x: sx + 1.0,
                y: sy + 1.0,
                flux: dep / gain,
                snr: core_e / (core_e + n_pix * sky_var_e).sqrt(),
                saturated,
                rgb_weights: rgb,
            }
        })
        .collect();

    let background_adu = p.bias_adu + p.sky_e / gain;
    let noise_adu = ((p.sky_e + p.read_noise_e.powi(2)) / (gain * gain) + 1.0 / 12.0).sqrt();
    let q_opt = (1.0 - p.eccentricity.clamp(0.0, 0.99).powi(2)).sqrt();
    let truth = SimTruth {
        width: w,
        height: h,
        fwhm_px: fwhm_sampled,
        fwhm_optical_px: p.fwhm_px,
        eccentricity: (1.0 - (s_minor / s_major).powi(2)).max(0.0).sqrt(),
        eccentricity_optical: (1.0 - q_opt * q_opt).sqrt(),
        psf: p.psf,
        background_adu,
        noise_adu,
        gain,
        stars: truth_stars,
        hot_pixels: hot,
        cosmic_rays: rays,
    };
    (pixels, header_keys(p), truth)
}

/// The CD matrix of a frame with this plate scale and rotation: east to the left (RA
/// grows towards −x), as on a sky image seen from the front.
pub fn base_cd(scale_arcsec: f64, rotation_deg: f64) -> [[f64; 2]; 2] {
    let s = scale_arcsec / 3600.0;
    let (sin, cos) = rotation_deg.to_radians().sin_cos();
    [[-s * cos, s * sin], [s * sin, s * cos]]
}

fn header_keys(p: &SimParams) -> Vec<(String, OutValue)> {
    use OutValue::*;
    let pixel_um = 3.76;
    let focal_mm = 206.264_806 * pixel_um / p.scale_arcsec;
    let crpix = p
        .scene
        .as_ref()
        .and_then(|s| s.crpix)
        .unwrap_or(((p.width as f64 + 1.0) / 2.0, (p.height as f64 + 1.0) / 2.0));
    let cd = p
        .scene
        .as_ref()
        .and_then(|s| s.cd)
        .unwrap_or_else(|| base_cd(p.scale_arcsec, p.rotation_deg));
    let mut keys = vec![
        ("IMAGETYP".into(), Text("Light Frame".into())),
        ("OBJECT".into(), Text(p.object.clone())),
        ("DATE-OBS".into(), Text(p.date_obs.clone())),
        ("EXPTIME".into(), Real(120.0)),
        (
            "FILTER".into(),
            Text(if p.bayer.is_some() {
                "None".into()
            } else {
                p.filter.clone()
            }),
        ),
        ("XBINNING".into(), Int(1)),
        ("YBINNING".into(), Int(1)),
        ("XPIXSZ".into(), Real(pixel_um)),
        ("YPIXSZ".into(), Real(pixel_um)),
        (
            "FOCALLEN".into(),
            Real((focal_mm * 1000.0).round() / 1000.0),
        ),
        ("CCD-TEMP".into(), Real(-10.0)),
        ("GAIN".into(), Int(120)),
        ("EGAIN".into(), Real(p.gain_e_per_adu)),
        ("TELESCOP".into(), Text("Kestrel Ridge 0.2m".into())),
        ("CTYPE1".into(), Text("RA---TAN".into())),
        ("CTYPE2".into(), Text("DEC--TAN".into())),
        ("CRPIX1".into(), Real(crpix.0)),
        ("CRPIX2".into(), Real(crpix.1)),
        ("CRVAL1".into(), Real(p.center_deg.0)),
        ("CRVAL2".into(), Real(p.center_deg.1)),
        ("CD1_1".into(), Real(cd[0][0])),
        ("CD1_2".into(), Real(cd[0][1])),
        ("CD2_1".into(), Real(cd[1][0])),
        ("CD2_2".into(), Real(cd[1][1])),
        ("RADESYS".into(), Text("ICRS".into())),
        ("EQUINOX".into(), Real(2000.0)),
    ];
    if let Some(b) = p.bayer {
        let name: String =
            b.0.iter()
                .map(|c| match c {
                    Channel::Red => 'R',
                    Channel::Green => 'G',
                    Channel::Blue => 'B',
                })
                .collect();
        keys.push(("BAYERPAT".into(), Text(name)));
    }
    keys
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn psf_is_normalised() {
        for shape in [PsfShape::Gaussian, PsfShape::Moffat { beta: 2.5 }] {
            let psf = Psf::new(shape, 3.0, 0.5, 20.0);
            let mut s = 0.0;
            for y in -200..=200 {
                for x in -200..=200 {
                    s += psf.pixel_average(f64::from(x), f64::from(y), 2);
                }
            }
            assert!((s - 1.0).abs() < 2e-3, "{shape:?}: {s}");
        }
    }

    #[test]
    fn sampled_gaussian_fwhm_adds_the_pixel_variance() {
        // A Gaussian convolved with a unit box has variance σ² + 1/12 and stays very
        // nearly Gaussian for σ ≳ 0.8 px (the box's excess kurtosis is diluted).
        let psf = Psf::new(PsfShape::Gaussian, 3.0, 0.0, 0.0);
        let (a, b) = psf.sampled_fwhm_axes();
        let sigma = 3.0 / 2.354_820_045;
        let expected = 2.354_820_045 * (sigma * sigma + 1.0 / 12.0f64).sqrt();
        assert!(
            (a - expected).abs() < 0.01 && (b - expected).abs() < 0.01,
            "{a} {b} {expected}"
        );
    }
}
