//! One-shot-color mosaics: measured on 2×2 superpixel luminance, with positions, widths
//! and levels reported in mosaic pixels and each star's [r, g, b] aperture fluxes taken
//! on the color planes.

use ndarray::Array2;

use super::background::BackgroundMap;
use super::pixels::subtract_rows;
use super::{measure_image, photometry, FrameMeasurement, MeasureError, MeasureParams, Star};
use crate::frame::bayer::{channel_plane, superpixel_luminance, BayerPattern, Channel};

/// Measure a one-shot-color mosaic: shape on 2×2 superpixel luminance, positions and
/// widths reported in mosaic pixels, and per-star [r, g, b] aperture fluxes.
pub fn measure_mosaic(
    mosaic: Array2<f32>,
    pattern: BayerPattern,
    params: &MeasureParams,
) -> Result<FrameMeasurement, MeasureError> {
    let (h, w) = mosaic.dim();
    let planes: Vec<Array2<f32>> = [Channel::Red, Channel::Green, Channel::Blue]
        .iter()
        .map(|&c| channel_plane(&mosaic, pattern, c))
        .collect();
    let lum = superpixel_luminance(&mosaic);
    drop(mosaic);
    let mut p = *params;
    p.saturation_adu = params.saturation_adu.map(|s| 4.0 * s);
    p.detect.kernel_fwhm = (params.detect.kernel_fwhm / 2.0).max(1.5);
    p.report_pixel = 0.5;
    let mut m = measure_image(lum, &p)?;
    // Per-channel residual planes for color photometry.
    let residual_planes: Vec<Array2<f32>> = planes
        .into_iter()
        .filter_map(|mut plane| {
            let b = BackgroundMap::estimate(&plane, None, params.background)?;
            subtract_rows(&mut plane, &b);
            Some(plane)
        })
        .collect();
    let frame_fwhm_sp = m.fwhm_px.unwrap_or(2.0);
    let r_ap = (2.5 * frame_fwhm_sp).max(3.0);
    for s in m.stars.iter_mut() {
        let (cx, cy) = (s.x - 1.0, s.y - 1.0);
        if residual_planes.len() == 3 {
            let mut rgb = [0.0; 3];
            for (k, plane) in residual_planes.iter().enumerate() {
                rgb[k] = photometry::aperture(
                    plane,
                    cx,
                    cy,
                    r_ap,
                    r_ap + 2.0,
                    r_ap + 2.0 + (1.5 * frame_fwhm_sp).max(6.0),
                )
                .map_or(f64::NAN, |a| a.flux);
            }
            s.rgb = Some(rgb);
        }
        to_mosaic_star(s);
    }
    for t in m.trails.iter_mut() {
        (t.x0, t.y0, t.x1, t.y1) = (
            2.0 * t.x0 - 0.5,
            2.0 * t.y0 - 0.5,
            2.0 * t.x1 - 0.5,
            2.0 * t.y1 - 0.5,
        );
        t.width_px *= 2.0;
        t.length_px *= 2.0;
    }
    for r in m.rejected.iter_mut() {
        r.x = 2.0 * r.x - 0.5;
        r.y = 2.0 * r.y - 0.5;
    }
    m.width = w;
    m.height = h;
    m.fwhm_px = m.fwhm_px.map(|f| 2.0 * f);
    m.hfr_px = m.hfr_px.map(|f| 2.0 * f);
    // Per mosaic pixel: a superpixel holds four, whose noises add in quadrature.
    m.background_adu /= 4.0;
    m.noise_adu /= 2.0;
    m.background_range_adu /= 4.0;
    Ok(m)
}

/// Superpixel (FITS X_s) to mosaic (FITS X_m): superpixel 1 covers mosaic pixels 1 and 2,
/// so X_m = 2·X_s − 0.5; widths double.
fn to_mosaic_star(s: &mut Star) {
    s.x = 2.0 * s.x - 0.5;
    s.y = 2.0 * s.y - 0.5;
    s.fwhm_px *= 2.0;
    s.fwhm_major_px *= 2.0;
    s.fwhm_minor_px *= 2.0;
    s.hfr_px = s.hfr_px.map(|v| 2.0 * v);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn superpixel_positions_and_widths_map_to_mosaic_pixels() {
        // Superpixel 1 (FITS) covers mosaic pixels 1 and 2: its centre is mosaic 1.5.
        let mut s = Star {
            x: 1.0,
            y: 10.0,
            flux: 1.0,
            fwhm_px: 2.0,
            eccentricity: 0.0,
            snr: 10.0,
            flux_err: 0.1,
            fwhm_major_px: 2.0,
            fwhm_minor_px: 1.5,
            angle_deg: 0.0,
            hfr_px: Some(1.0),
            psf_flux: 1.0,
            psf_model: crate::measure::psf::PsfModel::Gaussian,
            moffat_beta: None,
            peak_adu: 1.0,
            blended: false,
            shape: Default::default(),
            rgb: None,
        };
        to_mosaic_star(&mut s);
        assert_eq!((s.x, s.y), (1.5, 19.5));
        assert_eq!(
            (s.fwhm_px, s.fwhm_minor_px, s.hfr_px),
            (4.0, 3.0, Some(2.0))
        );
    }
}
