//! A target across its nights in words and in one picture: per filter the nights, the
//! verdicts and the usable time against the plan, a small table of the quality night by
//! night with what the target's whole record says of each night, the frames to stack
//! and the best of them; and a plot of the nights' medians (FWHM, eccentricity, sky
//! background, depth) against the date, one series per filter. Pure.

use std::fmt::Write as _;

use plotters::prelude::*;

use crate::season::{FilterSummary, TargetDocument};
use crate::text::single_line;

/// Exposure in hours and minutes: "8 h 30 min", "25 min".
pub fn hours_minutes(seconds: f64) -> String {
    let m = (seconds / 60.0).round() as i64;
    if m >= 60 {
        format!("{} h {:02} min", m / 60, m % 60)
    } else {
        format!("{m} min")
    }
}

fn num(v: Option<f64>, digits: usize) -> String {
    v.filter(|x| x.is_finite())
        .map_or("-".into(), |x| format!("{x:.digits$}"))
}

fn filter_name(f: &FilterSummary) -> String {
    single_line(f.filter.as_deref().unwrap_or(crate::text::NO_FILTER))
}

/// The target's summary as text (what `report --target` prints).
pub fn text(doc: &TargetDocument) -> String {
    let mut t = String::new();
    let _ = writeln!(
        t,
        "{}: {} night(s){}, {} frames: {} ok, {} warn, {} reject{}; usable {}",
        single_line(&doc.target),
        doc.nights,
        match (&doc.first_night, &doc.last_night) {
            (Some(a), Some(b)) if a != b => format!(" from {a} to {b}"),
            (Some(a), _) => format!(" ({a})"),
            _ => String::new(),
        },
        doc.frames.total(),
        doc.frames.ok,
        doc.frames.warn,
        doc.frames.reject,
        if doc.frames.unjudged > 0 {
            format!(", {} not judged yet", doc.frames.unjudged)
        } else {
            String::new()
        },
        hours_minutes(doc.usable_s)
    );
    for f in &doc.filters {
        filter_text(&mut t, f, doc);
    }
    let _ = writeln!(
        t,
        "\nWeights: {}. Against the record: the rules applied to every night of the filter as one group.",
        doc.weight_method
    );
    t
}

fn filter_text(t: &mut String, f: &FilterSummary, doc: &TargetDocument) {
    let plan = match (f.planned_s, f.to_go_s) {
        (Some(p), Some(left)) if left > 0.0 => {
            format!(
                " of {} planned, {} to go",
                hours_minutes(p),
                hours_minutes(left)
            )
        }
        (Some(p), _) => format!(" of {} planned: done", hours_minutes(p)),
        _ => String::new(),
    };
    let _ = writeln!(
        t,
        "\n{}: {} night(s), {} frames: {} ok, {} warn, {} reject; usable {}{plan}",
        filter_name(f),
        f.nights,
        f.frames.total(),
        f.frames.ok,
        f.frames.warn,
        f.frames.reject,
        hours_minutes(f.usable_s)
    );
    if f.per_night.is_empty() {
        return;
    }
    let arcsec = f.record.fwhm_arcsec.is_some();
    let _ = writeln!(
        t,
        "  night       frames  ok warn rej   usable  FWHM{} ecc   background  depth  weight",
        if arcsec { "\"" } else { "px" }
    );
    for n in &f.per_night {
        let q = &n.quality;
        let _ = writeln!(
            t,
            "  {:<10} {:>6} {:>3} {:>4} {:>3} {:>8}  {:>6} {:>4} {:>11} {:>6} {:>7}",
            n.night,
            n.frames.total(),
            n.frames.ok,
            n.frames.warn,
            n.frames.reject,
            hours_minutes(n.usable_s),
            num(if arcsec { q.fwhm_arcsec } else { q.fwhm_px }, 2),
            num(q.eccentricity, 2),
            num(q.background_adu, 1),
            num(q.limit_mag, 2),
            num(n.relative_weight, 2),
        );
        for note in &n.notes {
            let _ = writeln!(t, "      {}", single_line(note));
        }
    }
    let q = &f.record;
    let _ = writeln!(
        t,
        "  whole record: FWHM {}, eccentricity {}, background {} ADU, depth {}",
        if arcsec {
            format!("{}\"", num(q.fwhm_arcsec, 2))
        } else {
            format!("{} px", num(q.fwhm_px, 2))
        },
        num(q.eccentricity, 2),
        num(q.background_adu, 1),
        num(q.limit_mag, 2)
    );
    let _ = writeln!(
        t,
        "  to stack: {} frames, {}{}",
        f.stack.len(),
        hours_minutes(f.usable_s),
        match doc.best_rule {
            crate::season::Best::All => String::new(),
            crate::season::Best::Fraction(x) => format!(
                "; the best {:.0} %: {} frames, {}",
                100.0 * x,
                f.best.frames,
                hours_minutes(f.best.exposure_s)
            ),
            crate::season::Best::Hours(h) => format!(
                "; the best up to {h} h: {} frames, {}",
                f.best.frames,
                hours_minutes(f.best.exposure_s)
            ),
        }
    );
}

// One color per filter, in the order filters are listed.
const SERIES: [RGBColor; 6] = [
    RGBColor(30, 90, 200),
    RGBColor(200, 0, 0),
    RGBColor(0, 140, 60),
    RGBColor(230, 140, 0),
    RGBColor(120, 60, 170),
    RGBColor(90, 90, 90),
];

/// The days since 1970 of a night label (YYYY-MM-DD).
fn day(night: &str) -> Option<f64> {
    let d = chrono::NaiveDate::parse_from_str(night, "%Y-%m-%d").ok()?;
    Some(
        d.signed_duration_since(chrono::NaiveDate::default())
            .num_days() as f64,
    )
}

fn date_label(day: f64) -> String {
    chrono::NaiveDate::default()
        .checked_add_signed(chrono::Duration::days(day.round() as i64))
        .map(|d| d.format("%Y-%m-%d").to_string())
        .unwrap_or_default()
}

/// One panel's values: (day, value) per filter.
type Panel = Vec<Vec<(f64, f64)>>;

/// The nights' medians against the date, one panel per quality that has values (FWHM,
/// eccentricity, sky background, depth) and one series per filter. `None` without two
/// nights to draw.
pub fn plot(doc: &TargetDocument) -> Option<Vec<u8>> {
    super::plots::register_font();
    let arcsec = doc.filters.iter().any(|f| f.record.fwhm_arcsec.is_some());
    let series = |get: &dyn Fn(&crate::season::Quality) -> Option<f64>| -> Panel {
        doc.filters
            .iter()
            .map(|f| {
                f.per_night
                    .iter()
                    .filter_map(|n| Some((day(&n.night)?, get(&n.quality)?)))
                    .filter(|p| p.1.is_finite())
                    .collect()
            })
            .collect()
    };
    let panels: Vec<(&str, Panel)> = [
        (
            if arcsec { "FWHM (arcsec)" } else { "FWHM (px)" },
            series(&|q| if arcsec { q.fwhm_arcsec } else { q.fwhm_px }),
        ),
        ("eccentricity", series(&|q| q.eccentricity)),
        ("background (ADU)", series(&|q| q.background_adu)),
        ("depth, 5σ (mag)", series(&|q| q.limit_mag)),
    ]
    .into_iter()
    .filter(|(_, s)| s.iter().any(|v| !v.is_empty()))
    .collect();
    let days: Vec<f64> = panels
        .iter()
        .flat_map(|(_, s)| s.iter().flatten().map(|p| p.0))
        .collect();
    let (first, last) = days
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), d| {
            (a.min(*d), b.max(*d))
        });
    if panels.is_empty() || last.partial_cmp(&first) != Some(std::cmp::Ordering::Greater) {
        return None;
    }
    let pad = ((last - first) * 0.03).max(0.5);
    let (w, panel_h, legend_h) = (640u32, 160u32, 28u32);
    let h = panel_h * panels.len() as u32 + legend_h;
    let mut buf = vec![255u8; (w * h * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        root.fill(&WHITE).ok()?;
        let (charts, legend) = root.split_vertically(panel_h * panels.len() as u32);
        let areas = charts.split_evenly((panels.len(), 1));
        for (area, (title, panel)) in areas.iter().zip(&panels) {
            let values: Vec<f64> = panel.iter().flatten().map(|p| p.1).collect();
            let (lo, hi) = values
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
                    (a.min(*v), b.max(*v))
                });
            let span = (hi - lo).max(hi.abs() * 0.05).max(1e-3);
            let mut chart = ChartBuilder::on(area)
                .margin(6)
                .margin_right(14)
                .x_label_area_size(26)
                .y_label_area_size(58)
                .build_cartesian_2d(first - pad..last + pad, lo - 0.1 * span..hi + 0.1 * span)
                .ok()?;
            chart
                .configure_mesh()
                .y_desc(*title)
                .x_labels(6)
                .y_labels(4)
                .x_label_formatter(&|d| date_label(*d))
                .label_style(("sans-serif", 11))
                .axis_desc_style(("sans-serif", 11))
                .bold_line_style(RGBColor(225, 225, 225))
                .light_line_style(WHITE.mix(0.0))
                .draw()
                .ok()?;
            for (k, s) in panel.iter().enumerate() {
                let color = SERIES[k % SERIES.len()];
                chart
                    .draw_series(LineSeries::new(s.iter().copied(), color))
                    .ok()?;
                chart
                    .draw_series(s.iter().map(|p| Circle::new(*p, 3, color.filled())))
                    .ok()?;
            }
        }
        let font = ("sans-serif", 12).into_font().color(&BLACK);
        let mut x = 64;
        for (k, f) in doc.filters.iter().enumerate() {
            let color = SERIES[k % SERIES.len()];
            legend.draw(&Circle::new((x, 12), 4, color.filled())).ok()?;
            let name = filter_name(f);
            legend
                .draw(&Text::new(name.clone(), (x + 8, 5), font.clone()))
                .ok()?;
            x += 24 + 7 * name.chars().count() as i32;
        }
        legend
            .draw(&Text::new(
                "each point: the night's median",
                (x + 8, 5),
                font.clone(),
            ))
            .ok()?;
        root.present().ok()?;
    }
    super::plots::encode_png(&buf, w, h, image::ColorType::Rgb8)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn night_labels_are_days_and_back() {
        let d = day("2026-03-14").unwrap();
        assert_eq!(date_label(d), "2026-03-14");
        assert_eq!(day("2026-03-15").unwrap() - d, 1.0);
        assert_eq!(hours_minutes(8.5 * 3600.0), "8 h 30 min");
        assert_eq!(hours_minutes(25.0 * 60.0), "25 min");
    }
}
