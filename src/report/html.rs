//! The summary as one HTML page, for the mail and the stand-alone report file. Sections
//! in reading order: counts, warned and rejected frames with why, what deserves a look,
//! plots, frames to stack. The layout reflows down to a phone's width (no table wider
//! than three short columns, long file names broken anywhere). Written with maud's
//! templates, which escape every value: a value from a file cannot become markup.

use maud::{html as page, Markup, PreEscaped, DOCTYPE};

use super::{
    brightness_words, catalogue_words, episodes_sentence, plots, plural, sexagesimal, to_stack,
    what, FrameLine, GroupSummary, Summary,
};

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
fn flagged_rows<'a>(frames: impl IntoIterator<Item = &'a FrameLine>) -> Markup {
    page! {
        @for f in frames {
            tr {
                td { (f.local_time.as_deref().unwrap_or("-")) }
                td class=(f.verdict.as_str()) { (f.verdict.as_str()) }
                td {
                    span class="file" { (f.file) }
                    ul class="why" { @for x in &f.explanations { li { (x) } } }
                }
            }
        }
    }
}

fn counts(s: &Summary) -> Markup {
    let kinds = s.kind_counts();
    page! {
        section id="counts" {
            table {
                tr { th { "target / filter" } th { "ok" } th { "warn" } th { "reject" } th { "to stack" } th { "FWHM" } }
                @for g in &s.groups {
                    tr {
                        td { (g.heading()) (g.depth_words()) }
                        td class="n" { (g.ok) }
                        td class="n warn" { (g.warn) }
                        td class="n reject" { (g.reject) }
                        td class="n" { (to_stack(g)) }
                        td class="n" {
                            @match (g.median_fwhm_arcsec, g.median_fwhm_px) {
                                (Some(a), Some(p)) => { (format!("{a:.2}″ ({p:.2} px)")) }
                                (Some(a), None) => { (format!("{a:.2}″")) }
                                (None, Some(p)) => { (format!("{p:.2} px")) }
                                _ => { "-" }
                            }
                        }
                    }
                }
            }
            @for g in &s.groups {
                @let said = episodes_sentence(&g.episodes);
                @if !said.is_empty() || !g.unplaced.is_empty() || g.limits_missing.is_some() {
                    p class="episodes" {
                        b { (g.heading()) ": " }
                        (said)
                        @for (note, n) in &g.unplaced {
                            " " (plural(*n, "frame", "frames")) " not placed on the sky: " (note) "."
                        }
                        @if let Some(missing) = &g.limits_missing {
                            " " (missing) "."
                        }
                    }
                }
            }
            @if !s.plans.is_empty() {
                ul id="plans" { @for l in &s.plans { li { (l) } } }
            }
            p {
                "Anomalies: "
                @if kinds.is_empty() { "none" } @else {
                    (kinds.iter().map(|(k, n)| format!("{n} {k}")).collect::<Vec<_>>().join(", "))
                }
                "."
            }
        }
    }
}

fn flagged(s: &Summary) -> Markup {
    page! {
        section id="flagged" {
            h2 { "Warned and rejected frames" }
            @if s.groups.iter().all(|g| g.flagged().next().is_none()) {
                p { "None: every frame passed." }
            }
            @for g in s.groups.iter().filter(|g| g.flagged().next().is_some()) {
                h3 { (g.heading()) }
                table {
                    tr { th { "time" } th { "verdict" } th { "file, and why" } }
                    (flagged_rows(g.flagged()))
                }
                @if g.warned_left_out > 0 {
                    p { small { (plural(g.warned_left_out, "warned frame is", "warned frames are")) " left out of the frames to stack ([actions] stack_warned = false)." } }
                }
            }
        }
    }
}

fn calibration(s: &Summary) -> Markup {
    let cal = &s.calibration;
    page! {
        @if !cal.is_empty() {
            section id="calibration" {
                h2 { "Calibration" }
                p {
                    @if cal.counts.is_empty() { "No darks, flats or bias frames tonight." } @else {
                        (cal.counts.iter().map(|(k, n, w, r)| format!("{n} {k}: {w} warn, {r} reject")).collect::<Vec<_>>().join("; "))
                    }
                }
                @if !cal.flagged.is_empty() {
                    table {
                        tr { th { "time" } th { "verdict" } th { "file, and why" } }
                        (flagged_rows(&cal.flagged))
                    }
                }
                @if !cal.notes.is_empty() {
                    ul { @for n in &cal.notes { li { (n) } } }
                }
            }
        }
    }
}

fn worth_a_look(s: &Summary, image: &dyn Fn(&str) -> Option<String>) -> Markup {
    let with_cutout = (0..s.notable.len())
        .filter(|k| image(&plots::cutout_name(*k)).is_some())
        .count();
    page! {
        section id="look" {
            h2 { "Worth a look" }
            @if s.notable.is_empty() {
                p { "Nothing unusual in the sky." }
            } @else {
                p { small {
                    "Positions are J2000 (ICRS). Each magnitude says what it is: calibrated (in the catalogue's band, through the frame's zero point measured on the catalogue's stars, with its uncertainty) or instrumental (−2.5 log₁₀ of the flux in ADU)."
                    @if with_cutout < s.notable.len() {
                        " Cutouts of " (with_cutout) " of the " (s.notable.len()) "; the report file has the others."
                    }
                } }
            }
            @for (k, a) in s.notable.iter().enumerate() {
                div class="anomaly" {
                    @if let Some(src) = image(&plots::cutout_name(k)) {
                        img src=(src) alt=(format!("cutout around the {}", a.kind.name())) width="98" height="98";
                    }
                    span class="kind" { (a.kind.name()) }
                    " "
                    @match (a.ra_deg, a.dec_deg) {
                        (Some(r), Some(d)) => { (format!("{} ({r:.5}, {d:+.5})", sexagesimal(r, d))) }
                        _ => { "no sky position" }
                    }
                    br;
                    (what(a))
                    @if let Some(m) = brightness_words(a) { "; " (m) }
                    @if let Some(c) = catalogue_words(a) { "; " (c) }
                    "; " (plural(a.detections.len(), "frame", "frames"))
                    @if let Some(d) = a.detections.first() {
                        br;
                        "first in " span class="file" { (super::file_name(&d.path)) }
                        (format!(" at x = {:.1}, y = {:.1}", d.x, d.y))
                    }
                }
            }
            @if !s.hot_pixels.is_empty() {
                p id="hot-pixels" {
                    "Hot pixels: " (s.hot_pixels.len()) " at detector (x, y): "
                    (s.hot_pixels.iter().map(|p| format!("({:.0}, {:.0})", p.x, p.y)).collect::<Vec<_>>().join(" "))
                }
            }
            @if !s.cosmic_rays.is_empty() {
                p id="cosmic-rays" {
                    "Cosmic-ray hits: " (s.cosmic_rays.len()) " (not listed; " code { "subwatch report --all" } " lists them)."
                }
            }
        }
    }
}

fn night_plots(s: &Summary, image: &dyn Fn(&str) -> Option<String>) -> Markup {
    page! {
        section id="plots" {
            h2 { "The night in plots" }
            @for (k, g) in s.groups.iter().enumerate() {
                h3 { (g.heading()) }
                @for p in &plots::PLOTTED {
                    @if let Some(src) = image(&plots::plot_name(k, p.key)) {
                        img class="plot" src=(src) alt=(format!("{} against local time", p.title)) width="640" height="250";
                    }
                }
            }
        }
    }
}

fn stack_list(g: &GroupSummary) -> Markup {
    let warned = g.stack.iter().filter(|x| x.warned).count();
    page! {
        h3 { (g.heading()) }
        p {
            "To stack: " (to_stack(g))
            @if warned > 0 { "; " (warned) " of them warned (marked)" }
            "."
        }
        ol class="files" {
            @for x in &g.stack {
                li { (x.path) @if x.warned { " " span class="warn" { "(warned)" } } }
            }
        }
    }
}

/// The HTML summary. `image` maps a plot or cutout name to its `src` (a `cid:` or a data
/// URI); images without one are left out, and the page says how many cutouts it holds.
pub fn html(s: &Summary, image: &dyn Fn(&str) -> Option<String>) -> String {
    page! {
        (DOCTYPE)
        html lang="en" {
            head {
                meta charset="utf-8";
                meta name="viewport" content="width=device-width, initial-scale=1";
                title { "subwatch night " (s.night) }
                style { (PreEscaped(STYLE)) }
            }
            body {
                h1 { "Night " (s.night) }
                p {
                    (plural(s.frames, "frame", "frames")) ": " (s.ok) " ok, "
                    span class="warn" { (s.warned) " warn" } ", "
                    span class="reject" { (s.rejected) " reject" }
                    ". Clock times are " (s.tz.name()) "."
                }
                (counts(s))
                (flagged(s))
                (calibration(s))
                (worth_a_look(s, image))
                (night_plots(s, image))
                section id="stack" {
                    h2 { "Frames to stack" }
                    @for g in &s.groups { (stack_list(g)) }
                }
                p { small { "subwatch grades images; it is not a safety interlock and must not close a roof or park a mount." } }
            }
        }
    }
    .into_string()
}
