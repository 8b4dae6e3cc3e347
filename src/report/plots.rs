//! PNG plots of a group's metrics against the site's clock time, and cutouts around
//! anomalies. Each plot carries its own legend (verdict colors, twilight and Moon
//! bands, the rules' warn and reject lines) so it reads without the page around it.
//! Pure: data in, PNG bytes out. Text is drawn with a font kept in the repository
//! (DejaVu Sans), so no system font is needed.
//!
//! Longer than most modules: a plot's scale, limits, twilight and Moon bands and legend
//! make one picture and share its drawing; the cutouts (the last functions) share its PNG
//! encoding and font; the rest is tests.

use std::sync::Once;

use chrono_tz::Tz;
use ndarray::Array2;
use plotters::coord::Shift;
use plotters::prelude::*;

use crate::contract::NightFrameRecord;
use crate::measure::stats::median_f64;
use crate::rules::{Limit, Metric, Verdict};
use crate::sky::Twilight;

/// One plotted metric: its key in plot names, its title, and the smallest span of its
/// axis (so that noise far below anything that matters does not fill the plot).
#[derive(Debug, Clone, Copy)]
pub struct Plotted {
    pub key: &'static str,
    pub title: &'static str,
    min_span: f64,
}

/// The metrics plotted for every group, in page order.
pub const PLOTTED: [Plotted; 7] = [
    Plotted {
        key: "fwhm",
        title: "FWHM",
        min_span: 1.0,
    },
    Plotted {
        key: "eccentricity",
        title: "eccentricity",
        min_span: 0.2,
    },
    Plotted {
        key: "background_adu",
        title: "sky background",
        min_span: 0.0,
    },
    Plotted {
        key: "star_count",
        title: "stars detected",
        min_span: 10.0,
    },
    Plotted {
        key: "transparency_loss_mag",
        title: "transparency loss",
        min_span: 0.5,
    },
    // With a catalogue only (no values, no plot).
    Plotted {
        key: "limit_mag",
        title: "depth",
        min_span: 1.0,
    },
    Plotted {
        key: "zero_point_mag",
        title: "zero point",
        min_span: 0.5,
    },
];

pub fn plot_name(group: usize, key: &str) -> String {
    format!("plot-{group}-{key}.png")
}

pub fn cutout_name(anomaly: usize) -> String {
    format!("cutout-{anomaly}.png")
}

// Colors of the points, bands and lines; the legend names each.
const OK_COLOR: RGBColor = RGBColor(30, 90, 200);
const WARN_COLOR: RGBColor = RGBColor(230, 140, 0);
const REJECT_COLOR: RGBColor = RGBColor(200, 0, 0);
const TWILIGHT_COLOR: RGBColor = RGBColor(215, 215, 215);
const MOON_COLOR: RGBColor = RGBColor(250, 240, 190);
const LINE_COLOR: RGBColor = RGBColor(150, 150, 175);

const WIDTH: u32 = 640;
const CHART_HEIGHT: u32 = 210;
const LEGEND_HEIGHT: u32 = 40;

static FONT: Once = Once::new();

pub(super) fn register_font() {
    FONT.call_once(|| {
        let bytes: &'static [u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
        let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, bytes);
    });
}

/// PNG at the strongest compression: the plots travel by mail.
pub(super) fn encode_png(
    pixels: &[u8],
    w: u32,
    h: u32,
    color: image::ColorType,
) -> Option<Vec<u8>> {
    use image::codecs::png::{CompressionType, FilterType, PngEncoder};
    use image::ImageEncoder;
    let mut out = Vec::new();
    PngEncoder::new_with_quality(&mut out, CompressionType::Best, FilterType::Adaptive)
        .write_image(pixels, w, h, color)
        .ok()?;
    Some(out)
}

/// The value plotted for a frame, and the axis title with its unit.
fn value(f: &NightFrameRecord, key: &str, arcsec: bool) -> Option<f64> {
    let m = f.metrics.as_ref()?;
    match key {
        "fwhm" if arcsec => m.fwhm_arcsec,
        "fwhm" => m.fwhm_px,
        "eccentricity" => m.eccentricity,
        "background_adu" => Some(m.background_adu),
        "star_count" => Some(m.star_count as f64),
        "transparency_loss_mag" => f.transparency_loss_mag,
        "limit_mag" => m.limit_mag,
        "zero_point_mag" => m.zero_point_mag,
        _ => None,
    }
}

fn axis_title(key: &str, arcsec: bool) -> &'static str {
    match key {
        "fwhm" if arcsec => "FWHM (arcsec)",
        "fwhm" => "FWHM (px)",
        "eccentricity" => "eccentricity (0 = round)",
        "background_adu" => "background (ADU, log scale)",
        "star_count" => "stars (count)",
        "limit_mag" => "limiting magnitude, 5σ (mag)",
        "zero_point_mag" => "zero point (mag for 1 ADU/s)",
        _ => "transparency loss (mag)",
    }
}

/// The limits that apply to a plotted metric, in its plotted unit: FWHM limits in pixels
/// are drawn in arcseconds with the group's own pixel scale, and the other way round.
fn limits_for(
    key: &str,
    arcsec: bool,
    limits: &[Limit],
    frames: &[&NightFrameRecord],
) -> Vec<(Verdict, f64, bool)> {
    let scale = median_f64(
        &frames
            .iter()
            .filter_map(|f| {
                let m = f.metrics.as_ref()?;
                Some(m.fwhm_arcsec? / m.fwhm_px?)
            })
            .filter(|s| s.is_finite() && *s > 0.0)
            .collect::<Vec<_>>(),
    );
    limits
        .iter()
        .filter_map(|l| {
            let v = match (key, l.metric) {
                ("fwhm", Metric::FwhmPx) if arcsec => l.value * scale?,
                ("fwhm", Metric::FwhmArcsec) if !arcsec => l.value / scale?,
                ("fwhm", Metric::FwhmPx | Metric::FwhmArcsec) => l.value,
                ("eccentricity", Metric::Eccentricity)
                | ("background_adu", Metric::BackgroundAdu)
                | ("star_count", Metric::StarCount)
                | ("transparency_loss_mag", Metric::TransparencyLossMag)
                | ("limit_mag", Metric::LimitMag)
                | ("zero_point_mag", Metric::ZeroPointMag) => l.value,
                _ => return None,
            };
            v.is_finite().then_some((l.verdict, v, l.above))
        })
        .collect()
}

/// Local clock time of a moment, "HH:MM".
fn clock(t_unix: f64, tz: Tz) -> String {
    chrono::DateTime::from_timestamp(t_unix.round() as i64, 0)
        .map(|t| t.with_timezone(&tz).format("%H:%M").to_string())
        .unwrap_or_default()
}

/// The moment of the local midnight that began the day of `t_unix` on the site's clock:
/// the time axis counts hours from it, so the axis's round numbers (0.1, 0.5, 1 h) fall
/// on round clock times (hh:06, hh:30, hh:00).
fn local_midnight(t_unix: f64, tz: Tz) -> f64 {
    use chrono::Timelike;
    chrono::DateTime::from_timestamp(t_unix.floor() as i64, 0)
        .map(|t| {
            let local = t.with_timezone(&tz);
            t_unix - f64::from(local.num_seconds_from_midnight())
        })
        .unwrap_or(t_unix)
}

/// How a metric's values are drawn: the sky background on a log scale when it stays
/// positive and spans a factor of two or more (a cloud's dip and dawn's rise both show);
/// everything else as it is.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Scale {
    Linear,
    Log,
}

impl Scale {
    fn of(key: &str, values: &[f64]) -> Scale {
        let (lo, hi) = values
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
                (a.min(*v), b.max(*v))
            });
        if key == "background_adu" && lo > 0.0 && hi / lo >= 2.0 {
            Scale::Log
        } else {
            Scale::Linear
        }
    }

    fn onto_axis(self, v: f64) -> f64 {
        match self {
            Scale::Linear => v,
            Scale::Log => v.log10(),
        }
    }

    fn off_axis(self, y: f64) -> f64 {
        match self {
            Scale::Linear => y,
            Scale::Log => 10f64.powf(y),
        }
    }
}

/// The y range: the values, the limits near them, and at least the metric's smallest
/// span (for the background, 20 times the group's noise).
fn y_range(values: &[f64], limits: &[(Verdict, f64, bool)], min_span: f64) -> (f64, f64) {
    let (lo, hi) = values
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(*v), b.max(*v))
        });
    let reach = 2.0 * (hi - lo).max(min_span);
    let (mut lo, mut hi) = limits
        .iter()
        .map(|l| l.1)
        .filter(|v| *v >= lo - reach && *v <= hi + reach)
        .fold((lo, hi), |(a, b), v| (a.min(v), b.max(v)));
    if hi - lo < min_span {
        let mid = 0.5 * (hi + lo);
        (lo, hi) = (mid - 0.5 * min_span, mid + 0.5 * min_span);
    }
    let pad = ((hi - lo) * 0.08).max(1e-6);
    (lo - pad, hi + pad)
}

/// One plot of the night: its group's place in the summary, the metric, the PNG.
pub struct NightPlot {
    pub group: usize,
    pub plotted: &'static Plotted,
    pub png: Vec<u8>,
}

/// Every plot of a night's summary: each group's frames, each plotted metric, with the
/// group's limits (what the morning mail and the status page both show).
pub fn night_plots(
    doc: &crate::contract::NightDocument,
    summary: &super::Summary,
    tz: Tz,
) -> Vec<NightPlot> {
    let mut out = Vec::new();
    for (k, g) in summary.groups.iter().enumerate() {
        let frames: Vec<&NightFrameRecord> = doc
            .frames
            .iter()
            .filter(|f| g.is(f.target.as_deref(), f.filter.as_deref()))
            .collect();
        for p in &PLOTTED {
            let limits = g.limits_missing.is_none().then_some(g.limits.as_slice());
            if let Some(png) = metric_plot(&frames, p, limits, tz) {
                out.push(NightPlot {
                    group: k,
                    plotted: p,
                    png,
                });
            }
        }
    }
    out
}

/// One metric of one group against the site's clock time, with the group's limits drawn
/// as dashed lines (`None`: they are not known, and the legend says so); `None` when
/// there is nothing to plot.
pub fn metric_plot(
    frames: &[&NightFrameRecord],
    plotted: &Plotted,
    limits: Option<&[Limit]>,
    tz: Tz,
) -> Option<Vec<u8>> {
    register_font();
    let key = plotted.key;
    let arcsec = key == "fwhm"
        && frames
            .iter()
            .any(|f| f.metrics.as_ref().is_some_and(|m| m.fwhm_arcsec.is_some()));
    let mut pts: Vec<(f64, f64, Verdict)> = frames
        .iter()
        .filter_map(|f| Some((f.time_unix?, value(f, key, arcsec)?, f.verdict)))
        .filter(|p| p.0.is_finite() && p.1.is_finite())
        .collect();
    if pts.len() < 2 {
        return None;
    }
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    let lines = limits_for(key, arcsec, limits.unwrap_or_default(), frames);
    let min_span = if key == "background_adu" {
        let noise: Vec<f64> = frames
            .iter()
            .filter_map(|f| f.metrics.as_ref().map(|m| m.noise_adu))
            .collect();
        median_f64(&noise).map_or(1.0, |n| 20.0 * n)
    } else if key == "star_count" {
        // A tenth of the stars gone is worth seeing; a handful is not.
        median_f64(&values_of(&pts)).map_or(plotted.min_span, |m| (0.3 * m).max(plotted.min_span))
    } else {
        plotted.min_span
    };
    let scale = Scale::of(key, &values_of(&pts));
    if scale == Scale::Log {
        for p in &mut pts {
            p.1 = scale.onto_axis(p.1);
        }
    }
    // Limits on the drawn scale (a limit at or below zero has no place on a log axis).
    let drawn: Vec<(Verdict, f64, bool)> = lines
        .iter()
        .filter(|l| scale == Scale::Linear || l.1 > 0.0)
        .map(|l| (l.0, scale.onto_axis(l.1), l.2))
        .collect();
    let min_span = match scale {
        Scale::Linear => min_span,
        Scale::Log => 0.3,
    };
    let values = values_of(&pts);
    let (y_lo, y_hi) = y_range(&values, &drawn, min_span);
    let t0 = local_midnight(pts[0].0, tz);
    let hours = |t: f64| (t - t0) / 3600.0;
    let x_first = hours(pts[0].0);
    let x_last = hours(pts[pts.len() - 1].0).max(x_first + 0.05);
    let x_pad = 0.02 * (x_last - x_first);
    let bands = bands(frames, &pts);
    let (w, h) = (WIDTH, CHART_HEIGHT + LEGEND_HEIGHT);
    let mut buf = vec![255u8; (w * h * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        root.fill(&WHITE).ok()?;
        let (chart_area, legend_area) = root.split_vertically(CHART_HEIGHT);
        let formatter = |x: &f64| clock(t0 + x * 3600.0, tz);
        // As many decimals as the label step needs (six labels over the span).
        let decimals = (-((y_hi - y_lo) / 6.0).log10().floor()).clamp(0.0, 4.0) as usize;
        let y_formatter = |y: &f64| match scale {
            Scale::Linear => format!("{y:.decimals$}"),
            Scale::Log => significant(scale.off_axis(*y)),
        };
        let mut chart = ChartBuilder::on(&chart_area)
            .margin(6)
            .margin_right(14)
            .x_label_area_size(34)
            .y_label_area_size(58)
            .build_cartesian_2d(x_first - x_pad..x_last + x_pad, y_lo..y_hi)
            .ok()?;
        for (left, right, color) in &bands {
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(hours(*left), y_lo), (hours(*right), y_hi)],
                    color.filled(),
                )))
                .ok()?;
        }
        chart
            .configure_mesh()
            .x_desc(format!("local time ({})", tz.name()))
            .y_desc(axis_title(key, arcsec))
            .x_labels(8)
            .y_labels(6)
            .x_label_formatter(&formatter)
            .y_label_formatter(&y_formatter)
            .label_style(("sans-serif", 12))
            .axis_desc_style(("sans-serif", 12))
            .bold_line_style(RGBColor(225, 225, 225))
            .light_line_style(WHITE.mix(0.0))
            .draw()
            .ok()?;
        for (verdict, v, _) in &drawn {
            if *v < y_lo || *v > y_hi {
                continue;
            }
            let color = if *verdict == Verdict::Reject {
                REJECT_COLOR
            } else {
                WARN_COLOR
            };
            chart
                .draw_series(DashedLineSeries::new(
                    [(x_first - x_pad, *v), (x_last + x_pad, *v)],
                    6,
                    4,
                    color.stroke_width(1),
                ))
                .ok()?;
        }
        chart
            .draw_series(LineSeries::new(
                pts.iter().map(|p| (hours(p.0), p.1)),
                LINE_COLOR,
            ))
            .ok()?;
        chart
            .draw_series(pts.iter().map(|p| {
                Circle::new(
                    (hours(p.0), p.1),
                    if p.2 == Verdict::Ok { 3 } else { 4 },
                    verdict_color(p.2).filled(),
                )
            }))
            .ok()?;
        let shown: Vec<(Verdict, f64, bool, bool)> = lines
            .iter()
            .map(|l| {
                let y = scale.onto_axis(l.1);
                (l.0, l.1, l.2, y.is_finite() && y >= y_lo && y <= y_hi)
            })
            .collect();
        legend(&legend_area, &shown, key, arcsec, limits.is_some())?;
        root.present().ok()?;
    }
    encode_png(&buf, w, h, image::ColorType::Rgb8)
}

fn values_of(pts: &[(f64, f64, Verdict)]) -> Vec<f64> {
    pts.iter().map(|p| p.1).collect()
}

fn verdict_color(v: Verdict) -> RGBColor {
    match v {
        Verdict::Ok => OK_COLOR,
        Verdict::Warn => WARN_COLOR,
        Verdict::Reject => REJECT_COLOR,
    }
}

/// Twilight and Moon-up bands: each frame's stretch of time reaches halfway to its
/// neighbours, so consecutive frames make one band.
fn bands(frames: &[&NightFrameRecord], pts: &[(f64, f64, Verdict)]) -> Vec<(f64, f64, RGBColor)> {
    let mut times: Vec<(f64, Option<RGBColor>)> = frames
        .iter()
        .filter_map(|f| {
            let t = f.time_unix.filter(|t| t.is_finite())?;
            let color = f.sky.as_ref().and_then(|sky| {
                if sky.twilight != Twilight::Night {
                    Some(TWILIGHT_COLOR)
                } else if sky.moon_alt_deg > 0.0 {
                    Some(MOON_COLOR)
                } else {
                    None
                }
            });
            Some((t, color))
        })
        .collect();
    times.sort_by(|a, b| a.0.total_cmp(&b.0));
    let typical = if pts.len() > 1 {
        (pts[pts.len() - 1].0 - pts[0].0) / (pts.len() - 1) as f64
    } else {
        60.0
    };
    let mut out = Vec::new();
    for (k, (t, color)) in times.iter().enumerate() {
        let Some(color) = color else { continue };
        let left = if k > 0 {
            0.5 * (times[k - 1].0 + t)
        } else {
            t - 0.5 * typical
        };
        let right = if k + 1 < times.len() {
            0.5 * (times[k + 1].0 + t)
        } else {
            t + 0.5 * typical
        };
        out.push((left, right, *color));
    }
    out
}

/// The legend strip under the chart: every color the chart can hold, then the limits
/// with their values.
/// Each limit is (verdict, value, crossed upwards, drawn): one outside the plotted range
/// is listed as such rather than drawn off the chart. Without `known` limits (another
/// rig's, not stored) the legend says so rather than that no rule limits the metric.
fn legend(
    area: &DrawingArea<BitMapBackend, Shift>,
    lines: &[(Verdict, f64, bool, bool)],
    key: &str,
    arcsec: bool,
    known: bool,
) -> Option<()> {
    let font = ("sans-serif", 12).into_font().color(&BLACK);
    let mut x = 64;
    let y = 12;
    // Points by verdict.
    for (verdict, name) in [
        (Verdict::Ok, "ok"),
        (Verdict::Warn, "warn"),
        (Verdict::Reject, "reject"),
    ] {
        area.draw(&Circle::new((x, y), 4, verdict_color(verdict).filled()))
            .ok()?;
        area.draw(&Text::new(name, (x + 8, y - 7), font.clone()))
            .ok()?;
        x += 20 + 7 * name.len() as i32;
    }
    for (color, name) in [(TWILIGHT_COLOR, "twilight"), (MOON_COLOR, "Moon up")] {
        area.draw(&Rectangle::new(
            [(x, y - 6), (x + 14, y + 6)],
            color.filled(),
        ))
        .ok()?;
        area.draw(&Text::new(name, (x + 18, y - 7), font.clone()))
            .ok()?;
        x += 30 + 7 * name.len() as i32;
    }
    // The limits, each with its value, on a second row.
    let (mut x, y) = (64, 30);
    let unit = match key {
        "fwhm" if arcsec => "″",
        "fwhm" => " px",
        "background_adu" => " ADU",
        "transparency_loss_mag" | "limit_mag" | "zero_point_mag" => " mag",
        _ => "",
    };
    let mut shown: Vec<(Verdict, f64, bool, bool)> = lines.to_vec();
    shown.sort_by(|a, b| a.0.cmp(&b.0).then(a.1.total_cmp(&b.1)));
    shown.dedup_by(|a, b| a.0 == b.0 && (a.1 - b.1).abs() < 1e-9);
    if shown.is_empty() {
        let said = if known {
            "no rule limits this metric"
        } else {
            "this rig's limits are not stored: none drawn"
        };
        area.draw(&Text::new(said, (x, y - 7), font.clone())).ok()?;
        return Some(());
    }
    for (verdict, v, above, drawn) in shown {
        let color = if verdict == Verdict::Reject {
            REJECT_COLOR
        } else {
            WARN_COLOR
        };
        area.draw(&PathElement::new(
            vec![(x, y), (x + 6, y)],
            color.stroke_width(2),
        ))
        .ok()?;
        area.draw(&PathElement::new(
            vec![(x + 10, y), (x + 16, y)],
            color.stroke_width(2),
        ))
        .ok()?;
        let text = format!(
            "{} {} {}{unit}{}",
            verdict.as_str(),
            if above { "above" } else { "below" },
            significant(v),
            if drawn { "" } else { " (off the plot)" }
        );
        area.draw(&Text::new(text.clone(), (x + 20, y - 7), font.clone()))
            .ok()?;
        x += 34 + 7 * text.chars().count() as i32;
    }
    Some(())
}

/// A limit written with about three significant figures.
fn significant(v: f64) -> String {
    let a = v.abs();
    if a >= 100.0 {
        format!("{v:.0}")
    } else if a >= 10.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.2}")
    }
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
    encode_png(&rgb, ow, oh, image::ColorType::Rgb8)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_flat_metric_still_spans_its_smallest_range() {
        // Seeing steady to 0.02″ is shown on a 1″ axis, not blown up to fill the plot.
        let (lo, hi) = y_range(&[2.50, 2.51, 2.52], &[], 1.0);
        assert!(hi - lo >= 1.0 && lo < 2.5 && hi > 2.52, "{lo} {hi}");
    }

    #[test]
    fn limits_near_the_values_are_inside_the_axis_and_far_ones_are_not() {
        let near = (Verdict::Warn, 3.2, true);
        let far = (Verdict::Reject, 300.0, true);
        let (lo, hi) = y_range(&[2.0, 2.4, 2.6], &[near, far], 1.0);
        assert!(hi > 3.2 && hi < 10.0, "{lo} {hi}");
    }

    #[test]
    fn clock_labels_are_the_sites_local_time_across_midnight() {
        // 2026-03-14 23:30 UTC is 00:30 on the 15th in Madrid (UTC+1 in March; the IANA
        // tz database, common knowledge).
        let t = 1_773_531_000.0;
        assert_eq!(clock(t, chrono_tz::Europe::Madrid), "00:30");
        assert_eq!(clock(t, chrono_tz::UTC), "23:30");
    }

    #[test]
    fn hours_count_from_the_sites_midnight_so_round_numbers_are_round_times() {
        // 2026-03-14 23:30 UTC is 00:30 on the 15th in Madrid (UTC+1 in March; the IANA
        // tz database): its midnight is 23:00 UTC on the 14th.
        let t = 1_773_531_000.0;
        let m = local_midnight(t, chrono_tz::Europe::Madrid);
        assert_eq!(t - m, 1800.0);
        assert_eq!(clock(m + 0.5 * 3600.0, chrono_tz::Europe::Madrid), "00:30");
    }

    #[test]
    fn the_background_goes_on_a_log_scale_when_it_spans_a_factor_of_two() {
        assert_eq!(
            Scale::of("background_adu", &[900.0, 1000.0, 30_000.0]),
            Scale::Log
        );
        assert_eq!(
            Scale::of("background_adu", &[900.0, 1000.0, 1100.0]),
            Scale::Linear
        );
        // A bias-subtracted sky near zero stays linear (no log of zero).
        assert_eq!(
            Scale::of("background_adu", &[-3.0, 10.0, 400.0]),
            Scale::Linear
        );
        assert_eq!(Scale::of("fwhm", &[1.0, 9.0]), Scale::Linear);
        assert!((Scale::Log.off_axis(Scale::Log.onto_axis(2500.0)) - 2500.0).abs() < 1e-9);
    }
}
