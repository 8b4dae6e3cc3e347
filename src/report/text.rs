//! The summary as plain text: the mail's text part and what `night` and `report` print.
//! Counts first, then the warned and rejected frames with their reasons, then what
//! deserves a look; hot pixels as positions, cosmic-ray hits as a count (listed with
//! `all`). Every value from a header is put on one line.

use std::fmt::Write as _;

use super::{
    brightness_words, catalogue_words, episodes_sentence, file_name, plural, sexagesimal, to_stack,
    what, FrameLine, Summary,
};
use crate::text::single_line;

/// Lines of flagged frames: time, verdict and file, then each reason indented.
fn flagged_lines<'a>(t: &mut String, frames: impl IntoIterator<Item = &'a FrameLine>) {
    for f in frames {
        let _ = writeln!(
            t,
            "    {}  {:<6}  {}",
            f.local_time.as_deref().unwrap_or("--:--:--"),
            f.verdict.as_str(),
            single_line(&f.file)
        );
        for e in &f.explanations {
            let _ = writeln!(t, "        {}", single_line(e));
        }
    }
}

/// The plain-text summary; `all` adds every frame and every cosmic-ray hit.
pub fn text(s: &Summary, all: bool) -> String {
    let mut t = String::new();
    counts(&mut t, s);
    calibration(&mut t, s);
    flagged(&mut t, s);
    notable(&mut t, s);
    to_stack_lines(&mut t, s);
    if all {
        every_frame(&mut t, s);
    }
    t
}

/// The night's and each group's counts, episodes and frames not placed, and the
/// anomalies by kind.
fn counts(t: &mut String, s: &Summary) {
    let _ = writeln!(
        t,
        "Night {}: {}: {} ok, {} warn, {} reject. Clock times are {}.",
        s.night,
        plural(s.frames, "frame", "frames"),
        s.ok,
        s.warned,
        s.rejected,
        s.tz.name()
    );
    for g in &s.groups {
        let fwhm = match (g.median_fwhm_arcsec, g.median_fwhm_px) {
            (Some(f), _) => format!("; median FWHM {f:.2}″"),
            (None, Some(f)) => format!("; median FWHM {f:.2} px"),
            _ => String::new(),
        };
        let _ = writeln!(
            t,
            "  {}: {}: {} ok, {} warn, {} reject; to stack {}{fwhm}{}",
            single_line(&g.heading()),
            plural(g.frames, "frame", "frames"),
            g.ok,
            g.warn,
            g.reject,
            to_stack(g),
            g.depth_words(),
        );
        let episodes = episodes_sentence(&g.episodes);
        if !episodes.is_empty() {
            let _ = writeln!(t, "    {episodes}");
        }
        for (note, n) in &g.unplaced {
            let _ = writeln!(
                t,
                "    {} not placed on the sky: {}",
                plural(*n, "frame", "frames"),
                single_line(note)
            );
        }
        if let Some(missing) = &g.limits_missing {
            let _ = writeln!(t, "    {}", single_line(missing));
        }
    }
    for p in &s.plans {
        let _ = writeln!(t, "  Plan: {}", single_line(p));
    }
    let counts = s.kind_counts();
    let _ = writeln!(
        t,
        "Anomalies: {}",
        if counts.is_empty() {
            "none".to_string()
        } else {
            counts
                .iter()
                .map(|(k, n)| format!("{n} {k}"))
                .collect::<Vec<_>>()
                .join(", ")
        }
    );
}

/// The calibration frames by kind, the flagged ones with why, and what is missing.
fn calibration(t: &mut String, s: &Summary) {
    let cal = &s.calibration;
    if !cal.is_empty() {
        let _ = writeln!(
            t,
            "Calibration: {}",
            if cal.counts.is_empty() {
                "no darks, flats or bias frames tonight".to_string()
            } else {
                cal.counts
                    .iter()
                    .map(|(k, n, w, r)| {
                        let many = if *k == "bias" {
                            "bias frames".to_string()
                        } else {
                            format!("{k}s")
                        };
                        let one = if *k == "bias" { "bias frame" } else { k };
                        format!("{} ({w} warn, {r} reject)", plural(*n, one, &many))
                    })
                    .collect::<Vec<_>>()
                    .join(", ")
            }
        );
        flagged_lines(t, &cal.flagged);
        for n in &cal.notes {
            let _ = writeln!(t, "    {}", single_line(n));
        }
    }
}

/// The warned and rejected light frames per group, each reason on its line.
fn flagged(t: &mut String, s: &Summary) {
    if s.groups.iter().any(|g| g.flagged().next().is_some()) {
        let _ = writeln!(t, "\nWarned and rejected frames");
    }
    for g in s.groups.iter().filter(|g| g.flagged().next().is_some()) {
        let _ = writeln!(t, "  {}", single_line(&g.heading()));
        flagged_lines(t, g.flagged());
        if g.warned_left_out > 0 {
            let _ = writeln!(
                t,
                "    ({} warned frame(s) left out of the frames to stack by [actions] stack_warned = false)",
                g.warned_left_out
            );
        }
    }
}

/// What deserves a look, with position, brightness and where first seen; hot pixels as
/// positions and cosmic-ray hits as a count.
fn notable(t: &mut String, s: &Summary) {
    if !s.notable.is_empty() {
        let _ = writeln!(t, "\nWorth a look ({})", s.notable.len());
    }
    for a in &s.notable {
        let pos = match (a.ra_deg, a.dec_deg) {
            (Some(r), Some(d)) => format!("{} ({r:.5}, {d:+.5})", sexagesimal(r, d)),
            _ => "no sky position".into(),
        };
        let mag = brightness_words(a).map_or(String::new(), |m| format!("; {m}"));
        let known = catalogue_words(a).map_or(String::new(), |c| format!("; {c}"));
        let first = a
            .detections
            .first()
            .map(|d| {
                format!(
                    "; first in {} at x={:.1} y={:.1}",
                    file_name(&d.path),
                    d.x,
                    d.y
                )
            })
            .unwrap_or_default();
        let _ = writeln!(t, "  {:<10} {pos}", a.kind.name());
        let _ = writeln!(
            t,
            "             {}{mag}{}; {}{}",
            single_line(&what(a)),
            single_line(&known),
            plural(a.detections.len(), "frame", "frames"),
            single_line(&first)
        );
    }

    if !s.hot_pixels.is_empty() {
        let _ = writeln!(
            t,
            "\nHot pixels: {} (detector x, y): {}",
            s.hot_pixels.len(),
            s.hot_pixels
                .iter()
                .map(|h| format!("({:.0}, {:.0})", h.x, h.y))
                .collect::<Vec<_>>()
                .join(" ")
        );
    }
    if !s.cosmic_rays.is_empty() {
        let _ = writeln!(t, "Cosmic-ray hits: {}", s.cosmic_rays.len());
    }
}

/// The frames to stack, per group (warned ones marked).
fn to_stack_lines(t: &mut String, s: &Summary) {
    if s.groups.iter().any(|g| !g.stack.is_empty()) {
        let _ = writeln!(t, "\nFrames to stack");
    }
    for g in s.groups.iter().filter(|g| !g.stack.is_empty()) {
        let _ = writeln!(t, "  {} ({})", single_line(&g.heading()), to_stack(g));
        for e in &g.stack {
            let _ = writeln!(
                t,
                "    {}{}",
                single_line(&e.path),
                if e.warned { "  (warned)" } else { "" }
            );
        }
    }
}

/// Every frame with its verdict and whether it is stacked, and every cosmic-ray hit.
fn every_frame(t: &mut String, s: &Summary) {
    let _ = writeln!(t, "\nEvery frame");
    for g in &s.groups {
        let _ = writeln!(t, "  {}", single_line(&g.heading()));
        for f in &g.lines {
            let stacked = g.stack.iter().any(|e| e.path == f.path);
            let _ = writeln!(
                t,
                "    {}  {:<6} {:<5}  {}  {}",
                f.local_time.as_deref().unwrap_or("--:--:--"),
                f.verdict.as_str(),
                if stacked { "stack" } else { "" },
                single_line(&f.path),
                f.reasons.join(",")
            );
        }
    }
    if !s.cosmic_rays.is_empty() {
        let _ = writeln!(t, "\nCosmic-ray hits (file, x, y)");
        for (file, x, y) in &s.cosmic_rays {
            let _ = writeln!(t, "  {}  {x:.1}  {y:.1}", single_line(file));
        }
    }
}
