//! Every frame of a night as CSV (RFC 4180, written by the `csv` crate), one row per
//! frame with the site's local clock time beside the Unix time. The columns are one
//! table of names and readers, so the header and the rows cannot drift apart. A cell
//! that came from a file and that a spreadsheet would run as a formula is neutralised.

use chrono_tz::Tz;

use crate::contract::{NightDocument, NightFrameRecord};

type Cell = fn(&NightFrameRecord, Tz) -> String;

fn number(v: Option<f64>) -> String {
    v.filter(|x| x.is_finite())
        .map_or(String::new(), |x| format!("{x:.4}"))
}

/// The columns, in order: name and how a frame's cell is written.
const COLUMNS: &[(&str, Cell)] = &[
    ("path", |f, _| neutralised(&f.path)),
    ("target", |f, _| {
        neutralised(f.target.as_deref().unwrap_or(""))
    }),
    ("filter", |f, _| {
        neutralised(f.filter.as_deref().unwrap_or(""))
    }),
    ("time_unix", |f, _| number(f.time_unix)),
    ("local_time", |f, tz| {
        f.time_unix
            .and_then(|t| chrono::DateTime::from_timestamp(t.floor() as i64, 0))
            .map_or(String::new(), |t| {
                t.with_timezone(&tz).format("%Y-%m-%d %H:%M:%S").to_string()
            })
    }),
    ("verdict", |f, _| f.verdict.as_str().to_string()),
    ("reasons", |f, _| neutralised(&f.reasons.join(";"))),
    ("star_count", |f, _| {
        f.metrics
            .as_ref()
            .map_or(String::new(), |m| m.star_count.to_string())
    }),
    ("fwhm_px", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.fwhm_px))
    }),
    ("fwhm_arcsec", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.fwhm_arcsec))
    }),
    ("eccentricity", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.eccentricity))
    }),
    ("background_adu", |f, _| {
        number(f.metrics.as_ref().map(|m| m.background_adu))
    }),
    ("noise_adu", |f, _| {
        number(f.metrics.as_ref().map(|m| m.noise_adu))
    }),
    ("snr_median", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.snr_median))
    }),
    ("hfr_px", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.hfr_px))
    }),
    ("transparency_loss_mag", |f, _| {
        number(f.transparency_loss_mag)
    }),
    ("explanations", |f, _| {
        neutralised(&f.explanations.join(" | "))
    }),
    ("zero_point_mag", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.zero_point_mag))
    }),
    ("limit_mag", |f, _| {
        number(f.metrics.as_ref().and_then(|m| m.limit_mag))
    }),
];

/// Every light frame's metrics as CSV, times also on the site's clock `tz`.
pub fn csv(doc: &NightDocument, tz: Tz) -> String {
    let mut w = ::csv::WriterBuilder::new()
        .terminator(::csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let _ = w.write_record(COLUMNS.iter().map(|(name, _)| *name));
    for f in &doc.frames {
        let _ = w.write_record(COLUMNS.iter().map(|(_, cell)| cell(f, tz)));
    }
    String::from_utf8(w.into_inner().unwrap_or_default()).unwrap_or_default()
}

/// A text cell with a spreadsheet's formula starts (`=`, `+`, `-`, `@`, a tab or a
/// carriage return) neutralised with a leading apostrophe, as the OWASP guidance on CSV
/// injection advises. Numbers are written by the columns and never pass through here.
fn neutralised(s: &str) -> String {
    if s.starts_with(['=', '+', '-', '@', '\t', '\r']) {
        format!("'{s}")
    } else {
        s.to_string()
    }
}

/// One text cell as a CSV file holds it: neutralised, then quoted where RFC 4180 needs.
pub fn csv_text(s: &str) -> String {
    let mut w = ::csv::WriterBuilder::new()
        .terminator(::csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let _ = w.write_record([neutralised(s)]);
    let bytes = w.into_inner().unwrap_or_default();
    String::from_utf8_lossy(&bytes)
        .trim_end_matches('\n')
        .to_string()
}
