//! The summary as one HTML page, for the mail and the stand-alone report file. Sections
//! in reading order: counts, warned and rejected frames with why, what deserves a look,
//! plots, frames to stack. The layout reflows down to a phone's width (no table wider
//! than three short columns, long file names broken anywhere). Every value that came
//! from a file is escaped.

use std::fmt::Write as _;

use super::{
    brightness_words, catalogue_words, minutes, plots, sexagesimal, what, FrameLine, Summary,
};
use crate::text::escape_html;

const STYLE: &str =
    "body{font-family:sans-serif;max-width:1000px;margin:auto;padding:0 8px;line-height:1.35}\
table{border-collapse:collapse;margin:4px 0 10px}\
td,th{border:1px solid #bbb;padding:2px 6px;text-align:left;vertical-align:top}\
th{background:#eee}td.n{text-align:right}\
.reject{color:#a00}.warn{color:#a60}\
.file{word-break:break-all;font-family:monospace}\
ul.why{margin:2px 0;padding-left:18px}\
img{max-width:100%;height:auto}\
.plot{display:block;margin:6px 0}\
.anomaly{overflow:hidden;border-top:1px solid #ddd;padding:6px 0}\
.anomaly img{float:left;margin:0 10px 4px 0}\
.kind{font-weight:bold}\
ol.files{padding-left:28px}ol.files li{word-break:break-all;font-family:monospace;font-size:90%}\
small{color:#555}";

/// Table rows of flagged frames: time, verdict, the file and each reason.
fn flagged_rows<'a>(h: &mut String, frames: impl IntoIterator<Item = &'a FrameLine>) {
    let e = escape_html;
    for f in frames {
        let _ = write!(
            h,
            "<tr><td>{}</td><td class=\"{v}\">{v}</td><td><span class=\"file\">{}</span><ul class=\"why\">",
            e(f.local_time.as_deref().unwrap_or("-")),
            e(&f.file),
            v = f.verdict.as_str(),
        );
        for x in &f.explanations {
            let _ = write!(h, "<li>{}</li>", e(x));
        }
        h.push_str("</ul></td></tr>");
    }
}

/// The HTML summary. `image` maps a plot or cutout name to its `src` (a `cid:` or a data
/// URI); images without one are left out, and the page says how many cutouts it holds.
pub fn html(s: &Summary, image: &dyn Fn(&str) -> Option<String>) -> String {
    let e = escape_html;
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>subwatch night {}</title><style>{STYLE}</style></head><body>",
        e(&s.night)
    );
    let _ = write!(
        h,
        "<h1>Night {}</h1><p>{} frames: {} ok, <span class=\"warn\">{} warn</span>, \
         <span class=\"reject\">{} reject</span>. Clock times are {}.</p>",
        e(&s.night),
        s.frames,
        s.ok,
        s.warned,
        s.rejected,
        e(s.tz.name())
    );

    // Counts per group, and anomalies per kind.
    h.push_str("<section id=\"counts\"><table><tr><th>target / filter</th><th>ok</th><th>warn</th><th>reject</th><th>to stack</th><th>FWHM</th></tr>");
    for g in &s.groups {
        let fwhm = match (g.median_fwhm_arcsec, g.median_fwhm_px) {
            (Some(f), _) => format!("{f:.2}″"),
            (None, Some(f)) => format!("{f:.2} px"),
            _ => "-".into(),
        };
        let _ = write!(
            h,
            "<tr><td>{}{}</td><td class=\"n\">{}</td><td class=\"n warn\">{}</td><td class=\"n reject\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>",
            e(&g.heading()),
            e(&g.depth_words()),
            g.ok,
            g.warn,
            g.reject,
            e(&minutes(g.usable_seconds)),
            e(&fwhm)
        );
    }
    h.push_str("</table>");
    let counts = s.kind_counts();
    let _ = write!(
        h,
        "<p>Anomalies: {}.</p></section>",
        if counts.is_empty() {
            "none".to_string()
        } else {
            counts
                .iter()
                .map(|(k, n)| format!("{n} {}", e(k)))
                .collect::<Vec<_>>()
                .join(", ")
        }
    );

    // Every warned and rejected frame, with each reason in plain words.
    h.push_str("<section id=\"flagged\"><h2>Warned and rejected frames</h2>");
    if s.groups.iter().all(|g| g.flagged().next().is_none()) {
        h.push_str("<p>None: every frame passed.</p>");
    }
    for g in s.groups.iter().filter(|g| g.flagged().next().is_some()) {
        let _ = write!(
            h,
            "<h3>{}</h3><table><tr><th>time</th><th>verdict</th><th>file, and why</th></tr>",
            e(&g.heading())
        );
        flagged_rows(&mut h, g.flagged());
        h.push_str("</table>");
        if g.warned_left_out > 0 {
            let _ = write!(
                h,
                "<p><small>{} warned frame(s) are left out of the frames to stack ([actions] stack_warned = false).</small></p>",
                g.warned_left_out
            );
        }
    }
    h.push_str("</section>");

    // Calibration frames, and what the lights lack.
    let cal = &s.calibration;
    if !cal.is_empty() {
        h.push_str("<section id=\"calibration\"><h2>Calibration</h2><p>");
        if cal.counts.is_empty() {
            h.push_str("No darks, flats or bias frames tonight.");
        } else {
            let words: Vec<String> = cal
                .counts
                .iter()
                .map(|(k, n, w, r)| format!("{n} {k}: {w} warn, {r} reject"))
                .collect();
            h.push_str(&e(&words.join("; ")));
        }
        h.push_str("</p>");
        if !cal.flagged.is_empty() {
            h.push_str("<table><tr><th>time</th><th>verdict</th><th>file, and why</th></tr>");
            flagged_rows(&mut h, &cal.flagged);
            h.push_str("</table>");
        }
        if !cal.notes.is_empty() {
            h.push_str("<ul>");
            for n in &cal.notes {
                let _ = write!(h, "<li>{}</li>", e(n));
            }
            h.push_str("</ul>");
        }
        h.push_str("</section>");
    }

    // What deserves a look, most interesting first.
    h.push_str("<section id=\"look\"><h2>Worth a look</h2>");
    if s.notable.is_empty() {
        h.push_str("<p>Nothing unusual in the sky.</p>");
    } else {
        let with_cutout = (0..s.notable.len())
            .filter(|k| image(&plots::cutout_name(*k)).is_some())
            .count();
        let _ = write!(
            h,
            "<p><small>Positions are J2000. Magnitudes are instrumental (−2.5 log₁₀ of the flux in ADU).{}</small></p>",
            if with_cutout < s.notable.len() {
                format!(" Cutouts of {with_cutout} of the {}; the report file has the others.", s.notable.len())
            } else {
                String::new()
            }
        );
    }
    for (k, a) in s.notable.iter().enumerate() {
        h.push_str("<div class=\"anomaly\">");
        if let Some(src) = image(&plots::cutout_name(k)) {
            let _ = write!(
                h,
                "<img src=\"{}\" alt=\"cutout around the {}\" width=\"98\" height=\"98\">",
                e(&src),
                e(a.kind.name())
            );
        }
        let pos = match (a.ra_deg, a.dec_deg) {
            (Some(r), Some(d)) => format!("{} ({r:.5}, {d:+.5})", sexagesimal(r, d)),
            _ => "no sky position".into(),
        };
        let _ = write!(
            h,
            "<span class=\"kind\">{}</span> {}<br>{}",
            e(a.kind.name()),
            e(&pos),
            e(&what(a))
        );
        if let Some(m) = brightness_words(a) {
            let _ = write!(h, "; {}", e(&m));
        }
        if let Some(c) = catalogue_words(a) {
            let _ = write!(h, "; {}", e(&c));
        }
        let _ = write!(h, "; {} frame(s)", a.detections.len());
        if let Some(d) = a.detections.first() {
            let _ = write!(
                h,
                "<br>first in <span class=\"file\">{}</span> at x = {:.1}, y = {:.1}",
                e(&super::file_name(&d.path)),
                d.x,
                d.y
            );
        }
        h.push_str("</div>");
    }
    if !s.hot_pixels.is_empty() {
        let _ = write!(
            h,
            "<p id=\"hot-pixels\">Hot pixels: {} at detector (x, y): {}</p>",
            s.hot_pixels.len(),
            s.hot_pixels
                .iter()
                .map(|p| format!("({:.0}, {:.0})", p.x, p.y))
                .collect::<Vec<_>>()
                .join(" ")
        );
    }
    if !s.cosmic_rays.is_empty() {
        let _ = write!(
            h,
            "<p id=\"cosmic-rays\">Cosmic-ray hits: {} (not listed; <code>subwatch report --all</code> lists them).</p>",
            s.cosmic_rays.len()
        );
    }
    h.push_str("</section>");

    // The plots, each with its own legend.
    h.push_str("<section id=\"plots\"><h2>The night in plots</h2>");
    for (k, g) in s.groups.iter().enumerate() {
        let _ = write!(h, "<h3>{}</h3>", e(&g.heading()));
        for p in &plots::PLOTTED {
            if let Some(src) = image(&plots::plot_name(k, p.key)) {
                let _ = write!(
                    h,
                    "<img class=\"plot\" src=\"{}\" alt=\"{} against local time\" width=\"640\" height=\"250\">",
                    e(&src),
                    e(p.title)
                );
            }
        }
    }
    h.push_str("</section>");

    // The lists to stack, warned frames marked.
    h.push_str("<section id=\"stack\"><h2>Frames to stack</h2>");
    for g in &s.groups {
        let warned = g.stack.iter().filter(|x| x.warned).count();
        let _ = write!(
            h,
            "<h3>{}</h3><p>{} frame(s), {}{}.</p><ol class=\"files\">",
            e(&g.heading()),
            g.stack.len(),
            e(&minutes(g.usable_seconds)),
            if warned > 0 {
                format!("; {warned} of them warned (marked)")
            } else {
                String::new()
            }
        );
        for x in &g.stack {
            let _ = write!(
                h,
                "<li>{}{}</li>",
                e(&x.path),
                if x.warned {
                    " <span class=\"warn\">(warned)</span>"
                } else {
                    ""
                }
            );
        }
        h.push_str("</ol>");
    }
    h.push_str("</section>");
    h.push_str("<p><small>subwatch grades images; it is not a safety interlock and must not close a roof or park a mount.</small></p></body></html>");
    h
}
