//! PNG plots of the night's metrics against time (rejected frames marked, twilight and
//! moonlight shaded) and cutouts around anomalies. Pure: data in, PNG bytes out. Text is
//! drawn with a font kept in the repository (DejaVu Sans), so no system font is needed.

use std::sync::Once;

use ndarray::Array2;
use plotters::prelude::*;

use crate::contract::NightFrameRecord;
use crate::rules::Verdict;
use crate::sky::Twilight;

/// (key, label) of each plotted metric.
pub const PLOTTED: [(&str, &str); 5] = [
    ("fwhm", "FWHM"),
    ("eccentricity", "eccentricity"),
    ("background_adu", "background (ADU)"),
    ("star_count", "stars"),
    ("transparency_loss_mag", "transparency loss (mag)"),
];

pub fn plot_name(group: usize, key: &str) -> String {
    format!("plot-{group}-{key}.png")
}

pub fn cutout_name(anomaly: usize) -> String {
    format!("cutout-{anomaly}.png")
}

static FONT: Once = Once::new();

fn register_font() {
    FONT.call_once(|| {
        let bytes: &'static [u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
        let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, bytes);
    });
}

fn encode_png(rgb: &[u8], w: u32, h: u32) -> Option<Vec<u8>> {
    use image::ImageEncoder;
    let mut out = Vec::new();
    image::codecs::png::PngEncoder::new(&mut out)
        .write_image(rgb, w, h, image::ColorType::Rgb8)
        .ok()?;
    Some(out)
}

fn value(f: &NightFrameRecord, key: &str) -> Option<f64> {
    let m = f.metrics.as_ref()?;
    match key {
        "fwhm" => m.fwhm_arcsec.or(m.fwhm_px),
        "eccentricity" => m.eccentricity,
        "background_adu" => Some(m.background_adu),
        "star_count" => Some(m.star_count as f64),
        "transparency_loss_mag" => f.transparency_loss_mag,
        _ => None,
    }
}

/// One metric of one group against time; `None` when there is nothing to plot.
pub fn metric_plot(frames: &[&NightFrameRecord], key: &str, label: &str) -> Option<Vec<u8>> {
    register_font();
    let pts: Vec<(f64, f64, Verdict)> = frames
        .iter()
        .filter_map(|f| Some((f.time_unix?, value(f, key)?, f.verdict)))
        .filter(|p| p.1.is_finite())
        .collect();
    if pts.len() < 2 {
        return None;
    }
    let t0 = pts.iter().map(|p| p.0).fold(f64::INFINITY, f64::min);
    let hours = |t: f64| (t - t0) / 3600.0;
    let x_max = pts.iter().map(|p| hours(p.0)).fold(0.0, f64::max).max(0.05);
    let (lo, hi) = pts
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), p| {
            (a.min(p.1), b.max(p.1))
        });
    let pad = ((hi - lo) * 0.1).max(1e-3);
    let label_y = if key == "fwhm"
        && frames
            .iter()
            .any(|f| f.metrics.as_ref().is_some_and(|m| m.fwhm_arcsec.is_some()))
    {
        "FWHM (arcsec)".to_string()
    } else if key == "fwhm" {
        "FWHM (px)".to_string()
    } else {
        label.to_string()
    };
    let (w, h) = (720u32, 240u32);
    let mut buf = vec![255u8; (w * h * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        root.fill(&WHITE).ok()?;
        let mut chart = ChartBuilder::on(&root)
            .margin(8)
            .x_label_area_size(30)
            .y_label_area_size(60)
            .build_cartesian_2d(0.0..x_max, (lo - pad)..(hi + pad))
            .ok()?;
        // Twilight (grey) and a Moon above the horizon (pale yellow) behind the points.
        for f in frames {
            let (Some(t), Some(sky)) = (f.time_unix, f.sky.as_ref()) else {
                continue;
            };
            let colour = if sky.twilight != Twilight::Night {
                Some(RGBColor(215, 215, 215))
            } else if sky.moon_alt_deg > 0.0 {
                Some(RGBColor(250, 240, 190))
            } else {
                None
            };
            if let Some(c) = colour {
                let x = hours(t);
                let half = 0.5 * x_max / pts.len().max(1) as f64;
                chart
                    .draw_series(std::iter::once(Rectangle::new(
                        [(x - half, lo - pad), (x + half, hi + pad)],
                        c.filled(),
                    )))
                    .ok()?;
            }
        }
        chart
            .configure_mesh()
            .x_desc("hours since the first frame")
            .y_desc(label_y)
            .label_style(("sans-serif", 12))
            .draw()
            .ok()?;
        chart
            .draw_series(LineSeries::new(
                pts.iter().map(|p| (hours(p.0), p.1)),
                RGBColor(120, 120, 160),
            ))
            .ok()?;
        chart
            .draw_series(pts.iter().map(|p| {
                let colour = match p.2 {
                    Verdict::Ok => RGBColor(30, 90, 200),
                    Verdict::Warn => RGBColor(230, 140, 0),
                    Verdict::Reject => RGBColor(200, 0, 0),
                };
                Circle::new(
                    (hours(p.0), p.1),
                    if p.2 == Verdict::Reject { 5 } else { 3 },
                    colour.filled(),
                )
            }))
            .ok()?;
        root.present().ok()?;
    }
    encode_png(&buf, w, h)
}

/// A square cutout (side 2·half+1 pixels, shown 3× larger) around FITS (x, y): an asinh
/// stretch between the median and the 99.5th percentile, and a red ring at the position.
pub fn cutout_png(pixels: &Array2<f32>, x: f64, y: f64, half: usize) -> Option<Vec<u8>> {
    let (h, w) = pixels.dim();
    let (cx, cy) = ((x - 1.0).round() as i64, (y - 1.0).round() as i64);
    let side = 2 * half + 1;
    let mut patch = vec![f32::NAN; side * side];
    for dy in 0..side {
        for dx in 0..side {
            let (px, py) = (cx - half as i64 + dx as i64, cy - half as i64 + dy as i64);
            if px >= 0 && py >= 0 && (px as usize) < w && (py as usize) < h {
                patch[dy * side + dx] = pixels[(py as usize, px as usize)];
            }
        }
    }
    let mut finite: Vec<f32> = patch.iter().copied().filter(|v| v.is_finite()).collect();
    if finite.is_empty() {
        return None;
    }
    finite.sort_by(f32::total_cmp);
    let lo = f64::from(finite[finite.len() / 2]);
    let hi = f64::from(finite[((finite.len() - 1) as f64 * 0.995) as usize]).max(lo + 1e-6);
    let scale = 3usize;
    let (ow, oh) = ((side * scale) as u32, (side * scale) as u32);
    let mut rgb = vec![0u8; (ow * oh * 3) as usize];
    for oy in 0..oh as usize {
        for ox in 0..ow as usize {
            // Rows go up the image, as FITS y does.
            let v = patch[(side - 1 - oy / scale) * side + ox / scale];
            let t = if v.is_finite() {
                ((f64::from(v) - lo) / (hi - lo)).clamp(0.0, 1.0)
            } else {
                0.0
            };
            let g = ((10.0 * t).asinh() / 10f64.asinh() * 255.0) as u8;
            let k = (oy * ow as usize + ox) * 3;
            rgb[k..k + 3].copy_from_slice(&[g, g, g]);
            // The marker: a ring of radius ~ half/3 cutout pixels.
            let (rx, ry) = (
                ox as f64 / scale as f64 - half as f64 - 0.5 + (x - 1.0 - cx as f64),
                (side - 1) as f64 - oy as f64 / scale as f64 - half as f64 + 0.5
                    - (y - 1.0 - cy as f64),
            );
            let r = rx.hypot(ry);
            let ring = (half as f64 / 3.0).max(3.0);
            if (r - ring).abs() < 0.4 {
                rgb[k..k + 3].copy_from_slice(&[230, 30, 30]);
            }
        }
    }
    encode_png(&rgb, ow, oh)
}
