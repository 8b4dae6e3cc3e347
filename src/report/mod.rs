//! The morning summary: a model built from the night document (pure), and its plain
//! text, HTML (every value from a header escaped) and CSV forms. Plots and cutouts are
//! PNG bytes made in `plots`; the HTML takes them as references (`cid:` in mail, data
//! URIs in the stand-alone file).

pub mod plots;

use std::collections::BTreeMap;
use std::fmt::Write as _;

use serde::Serialize;

use crate::contract::{AnomalyRecord, NightDocument, NightFrameRecord};
use crate::measure::stats::median_f64;
use crate::rules::Verdict;
use crate::text::{escape_html, single_line};

/// One target-and-filter group of the night.
#[derive(Debug, Clone, Serialize)]
pub struct GroupSummary {
    pub target: String,
    pub filter: String,
    pub frames: usize,
    pub ok: usize,
    pub warn: usize,
    pub reject: usize,
    /// Reason code → frames.
    pub reasons: BTreeMap<String, usize>,
    /// Exposure of the frames worth stacking (ok and warn), seconds.
    pub usable_seconds: f64,
    pub median_fwhm_arcsec: Option<f64>,
    pub median_fwhm_px: Option<f64>,
    pub best: Option<String>,
    pub worst: Option<String>,
    pub accepted: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    pub night: String,
    pub site: Option<String>,
    pub groups: Vec<GroupSummary>,
    pub anomalies: Vec<AnomalyRecord>,
    pub frames: usize,
    pub rejected: usize,
}

fn file_name(path: &str) -> String {
    std::path::Path::new(path)
        .file_name()
        .map_or(path.to_string(), |n| n.to_string_lossy().into_owned())
}

/// Build the summary of a night document. `exposure` gives a frame's exposure time.
pub fn summarise(
    night: &str,
    doc: &NightDocument,
    exposure: &dyn Fn(&NightFrameRecord) -> Option<f64>,
) -> Summary {
    let mut groups: BTreeMap<(String, String), Vec<&NightFrameRecord>> = BTreeMap::new();
    for f in &doc.frames {
        groups
            .entry((
                f.target.clone().unwrap_or_else(|| "(unknown)".into()),
                f.filter.clone().unwrap_or_else(|| "-".into()),
            ))
            .or_default()
            .push(f);
    }
    let groups = groups
        .into_iter()
        .map(|((target, filter), frames)| {
            let count = |v: Verdict| frames.iter().filter(|f| f.verdict == v).count();
            let mut reasons = BTreeMap::new();
            for f in &frames {
                for r in &f.reasons {
                    *reasons.entry(r.clone()).or_insert(0) += 1;
                }
            }
            let usable: Vec<&&NightFrameRecord> = frames
                .iter()
                .filter(|f| f.verdict != Verdict::Reject && f.status == "ok")
                .collect();
            let fwhm = |f: &NightFrameRecord| f.metrics.as_ref().and_then(|m| m.fwhm_px);
            let mut ranked: Vec<&&NightFrameRecord> =
                frames.iter().filter(|f| fwhm(f).is_some()).collect();
            ranked.sort_by(|a, b| {
                fwhm(a)
                    .unwrap_or(f64::MAX)
                    .total_cmp(&fwhm(b).unwrap_or(f64::MAX))
            });
            GroupSummary {
                target,
                filter,
                frames: frames.len(),
                ok: count(Verdict::Ok),
                warn: count(Verdict::Warn),
                reject: count(Verdict::Reject),
                reasons,
                usable_seconds: usable.iter().filter_map(|f| exposure(f)).sum(),
                median_fwhm_arcsec: median_f64(
                    &usable
                        .iter()
                        .filter_map(|f| f.metrics.as_ref().and_then(|m| m.fwhm_arcsec))
                        .collect::<Vec<_>>(),
                ),
                median_fwhm_px: median_f64(
                    &usable.iter().filter_map(|f| fwhm(f)).collect::<Vec<_>>(),
                ),
                best: ranked.first().map(|f| file_name(&f.path)),
                worst: ranked.last().map(|f| file_name(&f.path)),
                accepted: usable.iter().map(|f| f.path.clone()).collect(),
            }
        })
        .collect::<Vec<_>>();
    Summary {
        night: night.to_string(),
        site: None,
        frames: doc.frames.len(),
        rejected: doc
            .frames
            .iter()
            .filter(|f| f.verdict == Verdict::Reject)
            .count(),
        groups,
        anomalies: doc.anomalies.clone(),
    }
}

/// Sexagesimal RA (hours) and Dec (degrees) for a J2000 position.
pub fn sexagesimal(ra_deg: f64, dec_deg: f64) -> String {
    // Round once, in the last unit shown, so 59.999 s never prints as 60.00 s.
    let cs = (ra_deg.rem_euclid(360.0) / 15.0 * 360_000.0).round() as i64 % (24 * 360_000);
    let (hh, mm, ss) = (cs / 360_000, (cs / 6_000) % 60, (cs % 6_000) as f64 / 100.0);
    let sign = if dec_deg < 0.0 { '-' } else { '+' };
    let ds = (dec_deg.abs() * 36_000.0).round() as i64;
    let (dd, dm, dsec) = (ds / 36_000, (ds / 600) % 60, (ds % 600) as f64 / 10.0);
    format!("{hh:02}h{mm:02}m{ss:05.2}s {sign}{dd:02}°{dm:02}′{dsec:04.1}″")
}

fn hours(s: f64) -> String {
    format!("{:.0} min", s / 60.0)
}

/// Subject line of the morning mail (one line, whatever the headers hold).
pub fn subject(s: &Summary) -> String {
    single_line(&format!(
        "subwatch night {}: {} frames, {} rejected, {} anomalies",
        s.night,
        s.frames,
        s.rejected,
        s.anomalies.iter().filter(|a| !is_cosmic_ray(a)).count()
    ))
}

fn is_cosmic_ray(a: &AnomalyRecord) -> bool {
    a.detail.is_cosmic_ray()
}

/// The anomaly's instrumental magnitude, when the analysis gave one.
pub fn instrumental_mag(a: &AnomalyRecord) -> Option<f64> {
    a.detail.instrumental_mag()
}

fn kind_name(a: &AnomalyRecord) -> String {
    a.kind.name().to_string()
}

/// The plain-text summary.
pub fn text(s: &Summary) -> String {
    let mut t = String::new();
    let _ = writeln!(
        t,
        "Night {}: {} frames, {} rejected.",
        s.night, s.frames, s.rejected
    );
    for g in &s.groups {
        let _ = writeln!(
            t,
            "\n{} / {}: {} frames: {} ok, {} warn, {} reject; usable {}",
            single_line(&g.target),
            single_line(&g.filter),
            g.frames,
            g.ok,
            g.warn,
            g.reject,
            hours(g.usable_seconds)
        );
        if let Some(f) = g.median_fwhm_arcsec {
            let _ = writeln!(t, "  median FWHM {f:.2}″");
        } else if let Some(f) = g.median_fwhm_px {
            let _ = writeln!(t, "  median FWHM {f:.2} px");
        }
        for (r, n) in &g.reasons {
            let _ = writeln!(t, "  {r}: {n}");
        }
        if let (Some(b), Some(w)) = (&g.best, &g.worst) {
            let _ = writeln!(
                t,
                "  sharpest {}, softest {}",
                single_line(b),
                single_line(w)
            );
        }
    }
    let notable: Vec<&AnomalyRecord> = s.anomalies.iter().filter(|a| !is_cosmic_ray(a)).collect();
    let _ = writeln!(
        t,
        "\nAnomalies ({}; cosmic-ray hits not listed: {}):",
        notable.len(),
        s.anomalies.len() - notable.len()
    );
    for a in notable {
        let pos = match (a.ra_deg, a.dec_deg) {
            (Some(r), Some(d)) => format!("{} ({r:.5}, {d:+.5})", sexagesimal(r, d)),
            _ => "no sky position".into(),
        };
        let first = a
            .detections
            .first()
            .map(|d| format!("{} x={:.1} y={:.1}", file_name(&d.path), d.x, d.y))
            .unwrap_or_default();
        let mag =
            instrumental_mag(a).map_or(String::new(), |m| format!(", mag {m:.2} (instrumental)"));
        let _ = writeln!(
            t,
            "  {:<10} {pos}{mag}  in {} frame(s), first {}",
            kind_name(a),
            a.detections.len(),
            single_line(&first)
        );
    }
    t
}

/// The HTML summary. `image` maps a plot or cutout name to its `src` (a `cid:` or a data
/// URI); images without one are left out.
pub fn html(s: &Summary, image: &dyn Fn(&str) -> Option<String>) -> String {
    let e = escape_html;
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html><html><head><meta charset=\"utf-8\"><title>subwatch night {}</title>\
         <style>body{{font-family:sans-serif;max-width:1000px;margin:auto}}table{{border-collapse:collapse}}\
         td,th{{border:1px solid #bbb;padding:2px 6px;text-align:right}}th{{background:#eee}}\
         .reject{{color:#a00}}.warn{{color:#a60}}</style></head><body>",
        e(&s.night)
    );
    let _ = write!(
        h,
        "<h1>Night {}</h1><p>{} frames, {} rejected.</p>",
        e(&s.night),
        s.frames,
        s.rejected
    );
    for (k, g) in s.groups.iter().enumerate() {
        let _ = write!(
            h,
            "<h2>{} / {}</h2><table><tr><th>frames</th><th>ok</th><th>warn</th><th>reject</th><th>usable</th><th>median FWHM</th></tr>\
             <tr><td>{}</td><td>{}</td><td class=\"warn\">{}</td><td class=\"reject\">{}</td><td>{}</td><td>{}</td></tr></table>",
            e(&g.target),
            e(&g.filter),
            g.frames,
            g.ok,
            g.warn,
            g.reject,
            hours(g.usable_seconds),
            g.median_fwhm_arcsec.map_or_else(|| g.median_fwhm_px.map_or("-".into(), |f| format!("{f:.2} px")), |f| format!("{f:.2}″"))
        );
        if !g.reasons.is_empty() {
            let _ = write!(
                h,
                "<p>Reasons: {}</p>",
                g.reasons
                    .iter()
                    .map(|(r, n)| format!("{} × {n}", e(r)))
                    .collect::<Vec<_>>()
                    .join(", ")
            );
        }
        for metric in plots::PLOTTED {
            if let Some(src) = image(&plots::plot_name(k, metric.0)) {
                let _ = write!(
                    h,
                    "<img src=\"{}\" alt=\"{} against time\" width=\"640\">",
                    e(&src),
                    e(metric.1)
                );
            }
        }
    }
    let notable: Vec<(usize, &AnomalyRecord)> = s
        .anomalies
        .iter()
        .enumerate()
        .filter(|(_, a)| !is_cosmic_ray(a))
        .collect();
    let _ = write!(
        h,
        "<h2>Anomalies</h2><p>{} listed; {} cosmic-ray hits not listed. Magnitudes are instrumental (−2.5 log₁₀ of the flux in ADU).</p><table><tr><th>kind</th><th>RA, Dec (J2000)</th><th>degrees</th><th>mag</th><th>frames</th><th>first seen</th><th>cutout</th></tr>",
        notable.len(),
        s.anomalies.len() - notable.len()
    );
    for (k, a) in notable {
        let (sexa, deg) = match (a.ra_deg, a.dec_deg) {
            (Some(r), Some(d)) => (sexagesimal(r, d), format!("{r:.5}, {d:+.5}")),
            _ => ("-".into(), "-".into()),
        };
        let first = a
            .detections
            .first()
            .map(|d| format!("{} ({:.1}, {:.1})", file_name(&d.path), d.x, d.y))
            .unwrap_or_default();
        let cut = image(&plots::cutout_name(k)).map_or(String::new(), |src| {
            format!("<img src=\"{}\" alt=\"cutout\" width=\"96\">", e(&src))
        });
        let _ = write!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{cut}</td></tr>",
            e(&kind_name(a)),
            e(&sexa),
            e(&deg),
            instrumental_mag(a).map_or("-".into(), |m| format!("{m:.2}")),
            a.detections.len(),
            e(&first)
        );
    }
    h.push_str("</table>");
    for g in &s.groups {
        let _ = write!(
            h,
            "<h3>Frames to stack: {} / {}</h3><pre>",
            e(&g.target),
            e(&g.filter)
        );
        for p in &g.accepted {
            let _ = writeln!(h, "{}", e(p));
        }
        h.push_str("</pre>");
    }
    h.push_str("<p><small>subwatch grades images; it is not a safety interlock and must not close a roof or park a mount.</small></p></body></html>");
    h
}

/// Every frame's metrics as CSV (RFC 4180 quoting).
pub fn csv(doc: &NightDocument) -> String {
    let q = |s: &str| csv_text(s);
    let n = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x:.4}"));
    let mut out = String::from("path,target,filter,time_unix,verdict,reasons,star_count,fwhm_px,fwhm_arcsec,eccentricity,background_adu,noise_adu,snr_median,hfr_px,transparency_loss_mag\n");
    for f in &doc.frames {
        let m = f.metrics.as_ref();
        let verdict = f.verdict.as_str();
        let _ = writeln!(
            out,
            "{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
            q(&f.path),
            q(f.target.as_deref().unwrap_or("")),
            q(f.filter.as_deref().unwrap_or("")),
            n(f.time_unix),
            verdict,
            q(&f.reasons.join(";")),
            m.map_or(String::new(), |m| m.star_count.to_string()),
            n(m.and_then(|m| m.fwhm_px)),
            n(m.and_then(|m| m.fwhm_arcsec)),
            n(m.and_then(|m| m.eccentricity)),
            n(m.map(|m| m.background_adu)),
            n(m.map(|m| m.noise_adu)),
            n(m.and_then(|m| m.snr_median)),
            n(m.and_then(|m| m.hfr_px)),
            n(f.transparency_loss_mag),
        );
    }
    out
}

/// A text cell of the CSV: quoted where RFC 4180 needs it, and a cell a spreadsheet
/// would run as a formula (one that starts with `=`, `+`, `-`, `@`, a tab or a carriage
/// return) neutralised with a leading apostrophe, as the OWASP guidance on CSV
/// injection advises. Numbers are written by the caller and never pass through here.
pub fn csv_text(s: &str) -> String {
    let s = if s.starts_with(['=', '+', '-', '@', '\t', '\r']) {
        format!("'{s}")
    } else {
        s.to_string()
    };
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_cells_from_headers_cannot_become_formulas() {
        // OWASP, "CSV Injection": cells starting with = + - @ tab or CR are neutralised.
        for (cell, written) in [
            (
                "=HYPERLINK(\"http://x\")",
                "\"'=HYPERLINK(\"\"http://x\"\")\"",
            ),
            ("+1", "'+1"),
            ("-2+3", "'-2+3"),
            ("@SUM(A1)", "'@SUM(A1)"),
            ("\tx", "'\tx"),
            ("Kestrel Field A", "Kestrel Field A"),
            ("a,b", "\"a,b\""),
        ] {
            assert_eq!(csv_text(cell), written, "{cell:?}");
        }
    }

    #[test]
    fn sexagesimal_of_known_positions() {
        assert_eq!(sexagesimal(84.25, 27.6), "05h37m00.00s +27°36′00.0″");
        assert_eq!(sexagesimal(201.3, -12.4), "13h25m12.00s -12°24′00.0″");
    }
}
