//! The live status page as data and HTML: what the daemon serves on `[web] listen`.
//! `LiveView` is the night so far (per group counts and usable time, every frame with
//! its verdict and reasons, the latest frame, anomalies, alerts, the sky now, the
//! daemon's health); it is the JSON view for scripts as it stands, and `html` renders
//! the page from it. It tells a viewer what a viewer needs: file names, not where they
//! are on the PC; whether the daemon is running, not its process; low disk space as a
//! warning, not which disk holds how much. Every time it shows names its clock: the
//! frame's own (DATE-OBS) or this PC's, which part when frames are replayed. The page is
//! written with maud's templates, which escape every value: a value from a file or a
//! header cannot become markup. The page loads its own script and
//! style sheet (no inline code, so a strict Content-Security-Policy holds) and fetches
//! its own content again when the view's version changes. Pure.

use std::collections::BTreeMap;

use maud::{html, Markup, PreEscaped, DOCTYPE};
use serde::Serialize;

/// The night so far, as the page and the JSON view show it.
#[derive(Debug, Clone, Default, Serialize)]
pub struct LiveView {
    /// Changes whenever anything shown changes; the page polls it.
    pub version: u64,
    pub night: Option<String>,
    /// How the night was chosen, in words.
    pub night_placed_by: String,
    pub now_unix: f64,
    /// The site's time zone; every clock time on the page is on it.
    pub timezone: String,
    pub groups: Vec<LiveGroup>,
    /// Every frame of the night, newest first.
    pub frames: Vec<LiveFrame>,
    pub latest: Option<LatestFrame>,
    pub alerts: Vec<LiveAlert>,
    /// What the night analysis found so far, most interesting first.
    pub anomalies: Vec<LiveAnomaly>,
    /// Hot pixels and cosmic-ray hits found, counted rather than listed.
    pub hot_pixels: usize,
    pub cosmic_rays: usize,
    /// When the anomalies and plots were computed, if they were.
    pub analysed_unix: Option<f64>,
    pub plots: Vec<LivePlot>,
    pub sky: Option<SkyNow>,
    pub health: Health,
    /// Every rig with frames tonight, where several share the store (empty otherwise).
    pub rigs: Vec<LiveRig>,
    /// How far the latest frame's time (its DATE-OBS plus its exposure) is behind this
    /// PC's clock when the last frame was recorded: a minute or so while frames come
    /// from the camera, hours or days when they are replayed or copied in (negative:
    /// the frame's clock is ahead).
    pub frame_time_behind_s: Option<f64>,
    /// Which clock each time of this view is on.
    pub clocks: Clocks,
}

/// The frame's clock: the time its header gives.
pub const FRAME_CLOCK: &str = "frame";
/// This PC's clock: when the daemon saw, recorded or worked something out.
pub const PC_CLOCK: &str = "pc";
/// How each clock is labelled on the page.
pub const FRAME_CLOCK_LABEL: &str = "frame time (DATE-OBS)";
pub const PC_CLOCK_LABEL: &str = "this PC's clock";
/// Beyond this many seconds between the two clocks, the page says they do not line up.
pub const CLOCKS_APART_S: f64 = 600.0;

/// Which clock each time of the view is on, for scripts.
#[derive(Debug, Clone, Serialize)]
pub struct Clocks {
    /// What "frame" means.
    pub frame: &'static str,
    /// What "pc" means.
    pub pc: &'static str,
    /// Every time of the view, by its place (`frames[].time_unix`), and its clock.
    pub fields: BTreeMap<&'static str, &'static str>,
}

impl Default for Clocks {
    fn default() -> Self {
        let (f, p) = (FRAME_CLOCK, PC_CLOCK);
        Clocks {
            frame: "the frame's own time: DATE-OBS in its header (when its exposure began), shown on the site's time zone",
            pc: "this PC's clock: when the daemon saw, recorded or worked it out",
            fields: BTreeMap::from([
                ("now_unix", p),
                ("analysed_unix", p),
                ("frame_time_behind_s", p),
                ("frames[].time_unix", f),
                ("frames[].time_local", f),
                ("latest.time_local", f),
                ("alerts[].time_unix", p),
                ("alerts[].time_local", p),
                ("sky.astronomical_dawn_unix", p),
                ("sky.astronomical_dawn_local", p),
                ("sky.minutes_to_astronomical_dawn", p),
                ("health.daemon_heard_s_ago", p),
                ("health.last_frame_unix", p),
                ("health.last_frame_local", p),
                ("health.seconds_since_last_frame", p),
                ("rigs[].last_recorded_local", p),
                ("rigs[].heard_s_ago", p),
            ]),
        }
    }
}

/// One rig of a site sharing the store, as the page lists it.
#[derive(Debug, Clone, Default, Serialize)]
pub struct LiveRig {
    pub rig: String,
    pub frames: i64,
    pub warned: i64,
    pub rejected: i64,
    /// The site's clock when its last frame was recorded.
    pub last_recorded_local: Option<String>,
    /// Seconds since its daemon last said it was alive, if it ever did.
    pub heard_s_ago: Option<f64>,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct LiveGroup {
    pub target: Option<String>,
    pub filter: Option<String>,
    pub heading: String,
    pub ok: usize,
    pub warn: usize,
    pub reject: usize,
    /// Frames not judged (unreadable, or waiting for a verdict).
    pub other: usize,
    /// Exposure of the frames that go to the stack (ok, and warned ones when they are
    /// stacked), seconds.
    pub usable_s: f64,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct LiveFrame {
    /// The store's id: the only way a URL names a frame.
    pub id: i64,
    /// The file's name (where it is on the PC is not the viewer's business).
    pub file: String,
    /// DATE-OBS.
    pub time_unix: Option<f64>,
    /// DATE-OBS on the site's time zone, "HH:MM:SS".
    pub time_local: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    /// ok, warn, reject; `None` before a verdict or for an unreadable frame.
    pub verdict: Option<String>,
    /// "ok", "error" or "skipped": whether the frame could be measured.
    pub status: String,
    /// "light", or the calibration frame's kind ("dark", "flat", "bias"), judged live as
    /// calibration.
    pub kind: String,
    pub error: Option<String>,
    pub explanations: Vec<String>,
    pub exposure_s: Option<f64>,
    pub star_count: Option<usize>,
    pub fwhm_px: Option<f64>,
    pub fwhm_arcsec: Option<f64>,
    pub eccentricity: Option<f64>,
    pub background_adu: Option<f64>,
    pub noise_adu: Option<f64>,
    pub snr_median: Option<f64>,
}

/// The latest measured frame, with what to draw over its picture.
#[derive(Debug, Clone, Default, Serialize)]
pub struct LatestFrame {
    pub id: i64,
    pub file: String,
    pub time_local: Option<String>,
    /// The frame's size in pixels.
    pub width: usize,
    pub height: usize,
    /// Where its picture is served, once made.
    pub preview_url: Option<String>,
    /// Measured stars: FITS x, y and a marker radius, pixels.
    pub stars: Vec<[f64; 3]>,
    /// Anomalies seen on this frame: FITS x, y and the kind.
    pub marks: Vec<(f64, f64, String)>,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct LiveAlert {
    pub time_unix: f64,
    pub time_local: Option<String>,
    pub kind: String,
    pub message: String,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct LiveAnomaly {
    pub kind: String,
    /// The group, "target / filter".
    pub group: String,
    /// What it is, in words with its measured values.
    pub what: String,
    pub frames: usize,
    pub file: Option<String>,
    pub x: Option<f64>,
    pub y: Option<f64>,
    pub ra_deg: Option<f64>,
    pub dec_deg: Option<f64>,
    /// J2000 in sexagesimal, where known.
    pub position: Option<String>,
    pub cutout_url: Option<String>,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct LivePlot {
    pub group: String,
    pub title: String,
    pub url: String,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct SkyNow {
    pub sun_alt_deg: f64,
    pub moon_alt_deg: f64,
    /// Fraction of the Moon's disc lit, 0 to 1.
    pub moon_illumination: f64,
    /// day, civil, nautical, astronomical or night.
    pub twilight: String,
    /// The Sun's next rise through −18°.
    pub astronomical_dawn_unix: Option<f64>,
    pub astronomical_dawn_local: Option<String>,
    pub minutes_to_astronomical_dawn: Option<f64>,
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct Health {
    /// The daemon's watching loop said it was alive within the last half minute (it says
    /// so every 2 s).
    pub daemon_running: bool,
    /// Seconds since it last said so, if it ever did.
    pub daemon_heard_s_ago: Option<f64>,
    /// Frames noticed and not yet read.
    pub waiting: Option<u64>,
    pub being_read: Option<u64>,
    /// Records the store has not taken yet (a full disk).
    pub not_stored: Option<u64>,
    /// When the last frame was recorded.
    pub last_frame_unix: Option<f64>,
    pub last_frame_local: Option<String>,
    pub seconds_since_last_frame: Option<f64>,
    /// A file system the daemon writes to (frames, the store, reports, lists) has less
    /// free space than `[alerts] min_free_gb`.
    pub low_disk: bool,
    pub min_free_gb: f64,
    pub outbox_waiting: usize,
    /// The last attempt at the waiting mail failed (`subwatch outbox` on the PC says
    /// why).
    pub outbox_failing: bool,
}

/// The page's script: sets the chosen colours before the page is drawn (so a page
/// opened in the dome is never white for a moment: it loads in the head, undeferred),
/// offers the choice and remembers it; polls the view's version and fetches the page's
/// content again when it changed. No library, nothing from outside.
pub const SCRIPT: &str = r##""use strict";
(function () {
  var KEY = "subwatch-page-mode";
  var MODES = ["light", "dark", "red"];
  var root = document.documentElement;
  function saved() {
    try {
      var m = window.localStorage.getItem(KEY);
      return MODES.indexOf(m) >= 0 ? m : null;
    } catch (e) { return null; }
  }
  function preferred() {
    return window.matchMedia && window.matchMedia("(prefers-color-scheme: dark)").matches ? "dark" : "light";
  }
  function show(mode) {
    root.setAttribute("data-mode", mode);
    var buttons = document.querySelectorAll("#modes button[data-mode]");
    for (var i = 0; i < buttons.length; i++) {
      buttons[i].setAttribute("aria-pressed", String(buttons[i].getAttribute("data-mode") === mode));
    }
  }
  show(saved() || preferred());
  // Another tab of the page chose: follow it.
  window.addEventListener("storage", function (e) {
    if (e.key === KEY) { show(saved() || preferred()); }
  });

  function start() {
    var modes = document.getElementById("modes");
    if (modes) {
      modes.hidden = false;
      modes.addEventListener("click", function (e) {
        var b = e.target && e.target.closest ? e.target.closest("button[data-mode]") : null;
        if (!b) { return; }
        var mode = b.getAttribute("data-mode");
        // Without storage (a private window) the choice lasts as long as the page.
        try { window.localStorage.setItem(KEY, mode); } catch (err) { }
        show(mode);
      });
    }
    show(root.getAttribute("data-mode") || "light");

    var main = document.getElementById("live");
    var seen = main ? main.getAttribute("data-version") : null;
    function tick() {
      var note = document.getElementById("updated");
      fetch("api/version", { cache: "no-store", credentials: "same-origin" })
        .then(function (r) { return r.ok ? r.json() : null; })
        .then(function (v) {
          if (!v) { return; }
          if (String(v.version) === seen) {
            if (note) { note.textContent = "up to date"; }
            return;
          }
          return fetch("part", { cache: "no-store", credentials: "same-origin" })
            .then(function (r) { return r.ok ? r.text() : null; })
            .then(function (html) {
              if (html === null) { return; }
              main.innerHTML = html;
              seen = String(v.version);
              main.setAttribute("data-version", seen);
            });
        })
        .catch(function () { if (note) { note.textContent = "daemon not answering"; } });
    }
    if (main) { window.setInterval(tick, 3000); }
  }
  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", start);
  } else {
    start();
  }
})();
"##;

/// The page's style sheet: one column on a phone, two on a wide screen; three sets of
/// colours, chosen by `data-mode` on the root element. Light; dark; and red, for the
/// dome, where only red light keeps the eyes dark-adapted (common practice at the
/// telescope): every colour there has no green or blue, and every picture is drawn in
/// red through the `red-only` filter (`RED_ONLY_FILTER`). Each text colour stands at
/// least 4.5:1 against its background (WCAG 2.1, success criterion 1.4.3).
pub const STYLE: &str = r#":root{--bg:#fafaf7;--fg:#222;--quiet:#555;--line:#ccc;--head:#ecece6;--ok:#275;--warn:#960;--bad:#a00;--star:#3c3;--mark:#f33;--note-bg:#fdf2d0;--note-line:#c90;--focus:#05a;color-scheme:light}
:root[data-mode=dark]{--bg:#111315;--fg:#ddd;--quiet:#a8a8a8;--line:#3a3d42;--head:#202327;--ok:#6c9;--warn:#e0b050;--bad:#ff7b72;--star:#4c4;--mark:#f55;--note-bg:#2a2410;--note-line:#a80;--focus:#6af;color-scheme:dark}
:root[data-mode=red]{--bg:#000;--fg:#f00;--quiet:#e00;--line:#500;--head:#100;--ok:#f00;--warn:#f00;--bad:#f00;--star:#c00;--mark:#f00;--note-bg:#200;--note-line:#a00;--focus:#f00;color-scheme:dark}
html{color:var(--fg);background:var(--bg);scrollbar-color:var(--line) var(--bg)}
body{font-family:sans-serif;margin:0 auto;max-width:1200px;padding:0 10px;line-height:1.35;color:var(--fg);background:var(--bg)}
h1{font-size:1.4em;margin:10px 0 2px}h2{font-size:1.15em;margin:16px 0 6px;border-bottom:1px solid var(--line)}
table{border-collapse:collapse;margin:4px 0 10px;max-width:100%}
td,th{border:1px solid var(--line);padding:2px 6px;text-align:left;vertical-align:top}
th{background:var(--head)}td.n{text-align:right;white-space:nowrap}
.reject{color:var(--bad)}.warn{color:var(--warn)}.ok{color:var(--ok)}
:root[data-mode=red] .reject{font-weight:bold}
.file{word-break:break-all;font-family:monospace;font-size:92%}
ul.why{margin:2px 0;padding-left:18px}
.grid{display:grid;grid-template-columns:1fr;gap:0 24px}
.plots{display:grid;grid-template-columns:1fr;gap:0 16px}h3{font-size:1em;margin:10px 0 2px}
@media (min-width:900px){.grid,.plots{grid-template-columns:1fr 1fr}}
.grid>section{min-width:0}
.scroll{overflow-x:auto}
.pic{position:relative;max-width:100%}
.pic img{display:block;width:100%;height:auto;background:#000}
.pic svg{position:absolute;left:0;top:0;width:100%;height:100%}
.star{fill:none;stroke:var(--star);stroke-width:1.2}
.mark{fill:none;stroke:var(--mark);stroke-width:2}
img.plot{display:block;max-width:100%;height:auto;margin:6px 0}
:root[data-mode=dark] img.plot{filter:invert(.9) hue-rotate(180deg)}
:root[data-mode=red] img{filter:url(#red-only)}
:root[data-mode=red] img.plot{filter:invert(1) url(#red-only)}
.anomaly{overflow:hidden;border-top:1px solid var(--line);padding:6px 0}
.anomaly img{float:left;margin:0 10px 4px 0;max-width:40%}
.kind{font-weight:bold}small,.quiet{color:var(--quiet)}
.notice{background:var(--note-bg);border-left:4px solid var(--note-line);padding:4px 8px}
dl.facts{display:grid;grid-template-columns:auto 1fr;gap:2px 10px;margin:4px 0}dl.facts dt{color:var(--quiet)}dl.facts dd{margin:0}
.modes{display:flex;flex-wrap:wrap;gap:6px;align-items:center;justify-content:flex-end;margin:8px 0 0;font-size:.9em;color:var(--quiet)}
.modes[hidden]{display:none}
.modes button{font:inherit;color:var(--fg);background:var(--head);border:1px solid var(--line);border-radius:4px;padding:2px 10px;cursor:pointer}
.modes button[aria-pressed=true]{border-color:var(--fg);font-weight:bold}
:focus-visible{outline:2px solid var(--focus);outline-offset:2px}
::selection{background:var(--fg);color:var(--bg)}
.defs{position:absolute;width:0;height:0;overflow:hidden}
"#;

/// The filter the red mode draws pictures through: each pixel's luminance (Rec. 709
/// weights, as sRGB's) into red, green and blue set to 0.
pub const RED_ONLY_FILTER: &str = "<svg class=\"defs\" aria-hidden=\"true\" focusable=\"false\"><filter id=\"red-only\" color-interpolation-filters=\"sRGB\"><feColorMatrix type=\"matrix\" values=\"0.2126 0.7152 0.0722 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 1 0\"/></filter></svg>";

/// The choice of colours, shown once the script runs (without it there is no choice).
fn modes() -> Markup {
    html! {
        nav id="modes" class="modes" hidden aria-label="colours of the page" {
            "colours: "
            button type="button" data-mode="light" aria-pressed="false" { "light" }
            button type="button" data-mode="dark" aria-pressed="false" { "dark" }
            button type="button" data-mode="red" aria-pressed="false" { "red (night)" }
        }
    }
}

/// The page's icon: a ring round a dot, in the page's own colours.
pub const ICON: &str = "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 16 16\"><circle cx=\"8\" cy=\"8\" r=\"6\" fill=\"none\" stroke=\"#275\" stroke-width=\"2\"/><circle cx=\"8\" cy=\"8\" r=\"2\" fill=\"#222\"/></svg>";

/// Content-Security-Policy of every answer: only this server's own script, style and
/// images; no frames, forms or outside connections.
pub const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

/// The whole page: head, and the content in `<main id="live">`.
pub fn html(v: &LiveView) -> String {
    html! {
        (DOCTYPE)
        html lang="en" {
            head {
                meta charset="utf-8";
                meta name="viewport" content="width=device-width, initial-scale=1";
                title { "subwatch: night " (v.night.as_deref().unwrap_or("")) }
                link rel="stylesheet" href="style.css";
                link rel="icon" href="icon.svg";
                // In the head and not deferred: the chosen colours apply before the
                // page is first drawn.
                script src="app.js" {}
            }
            body {
                (modes())
                (PreEscaped(RED_ONLY_FILTER))
                main id="live" data-version=(v.version) { (content(v)) }
            }
        }
    }
    .into_string()
}

/// The page's content: what `GET /part` answers and the script swaps in.
pub fn part(v: &LiveView) -> String {
    content(v).into_string()
}

fn content(v: &LiveView) -> Markup {
    html! {
        (heading(v))
        div class="grid" {
            (groups(v))
            @if v.rigs.len() > 1 { (rigs(&v.rigs)) }
            (latest(v.latest.as_ref()))
        }
        (anomalies(v))
        div class="grid" {
            (alerts(&v.alerts))
            (sky_and_daemon(v.sky.as_ref(), &v.health))
        }
        (plots(&v.plots))
        (frames(&v.frames))
        p class="quiet" {
            "JSON for scripts: " code { "api/night" } " (everything here), " code { "api/version" } "."
        }
    }
}

fn num(x: Option<f64>, digits: usize) -> String {
    x.filter(|v| v.is_finite())
        .map_or("-".into(), |v| format!("{v:.digits$}"))
}

/// A time shown on the page, marked with the clock it is on (`FRAME_CLOCK`, `PC_CLOCK`).
fn time(t: &str, clock: &str) -> Markup {
    html! { time data-clock=(clock) { (t) } }
}

/// A long stretch in words: "3 days 4 h", "5 h 12 min", "25 min".
fn stretch(seconds: f64) -> String {
    let m = (seconds.abs() / 60.0).round() as i64;
    let (d, h, m) = (m / 1440, m / 60 % 24, m % 60);
    match (d, h) {
        (0, 0) => format!("{m} min"),
        (0, _) => format!("{h} h {m:02} min"),
        (1, _) => format!("1 day {h} h"),
        _ => format!("{d} days {h} h"),
    }
}

fn minutes(seconds: f64) -> String {
    let m = (seconds / 60.0).round() as i64;
    if m >= 60 {
        format!("{} h {:02} min", m / 60, m % 60)
    } else {
        format!("{m} min")
    }
}

/// The night, its clocks, and a word when the frame clock and this PC's do not line up.
fn heading(v: &LiveView) -> Markup {
    html! {
        h1 { "Night " (v.night.as_deref().unwrap_or("(no frame yet)")) }
        p class="quiet" {
            (v.night_placed_by) ". Times are on " (v.timezone) ". Frame times are the DATE-OBS \
            in each frame's header; alerts, the sky and the daemon's times are on "
            (PC_CLOCK_LABEL) ". "
            span id="updated" { "updates by itself" }
        }
        @match v.frame_time_behind_s {
            Some(b) if b > CLOCKS_APART_S => {
                p class="notice" id="clocks-apart" {
                    "Frame times are " (stretch(b)) " behind " (PC_CLOCK_LABEL) ": these frames \
                    were taken long before they reached the daemon (replayed or copied in), so \
                    frame times (DATE-OBS) and times on " (PC_CLOCK_LABEL) " below do not line up."
                }
            }
            Some(b) if b < -CLOCKS_APART_S => {
                p class="notice" id="clocks-apart" {
                    "Frame times are " (stretch(b)) " ahead of " (PC_CLOCK_LABEL) ": the camera's \
                    clock or this PC's is wrong, so frame times (DATE-OBS) and times on "
                    (PC_CLOCK_LABEL) " below do not line up."
                }
            }
            _ => {}
        }
    }
}

/// Counts and usable time per target and filter.
fn groups(v: &LiveView) -> Markup {
    html! {
        section id="groups" {
            h2 { "Frames so far" }
            @if v.groups.is_empty() {
                p { "No frame recorded for this night yet." }
            } @else {
                div class="scroll" {
                    table {
                        tr { th { "target / filter" } th { "ok" } th { "warn" } th { "reject" } th { "other" } th { "usable" } }
                        @for g in &v.groups {
                            tr {
                                td { (g.heading) }
                                td class="n ok" { (g.ok) }
                                td class="n warn" { (g.warn) }
                                td class="n reject" { (g.reject) }
                                td class="n" { (g.other) }
                                td class="n" { (minutes(g.usable_s)) }
                            }
                        }
                    }
                }
            }
        }
    }
}

/// The rigs sharing the store, with when each last recorded and was heard.
fn rigs(rigs: &[LiveRig]) -> Markup {
    html! {
        section id="rigs" {
            h2 { "Rigs of the site" }
            div class="scroll" {
                table {
                    tr {
                        th { "rig" } th { "frames" } th { "warn" } th { "reject" }
                        th { "last recorded (" (PC_CLOCK_LABEL) ")" } th { "daemon" }
                    }
                    @for r in rigs {
                        tr {
                            td { (if r.rig.is_empty() { "(unnamed)" } else { &r.rig }) }
                            td class="n" { (r.frames) }
                            td class="n warn" { (r.warned) }
                            td class="n reject" { (r.rejected) }
                            td {
                                @match &r.last_recorded_local {
                                    Some(t) => { (time(t, PC_CLOCK)) }
                                    None => { "-" }
                                }
                            }
                            td {
                                @match r.heard_s_ago {
                                    Some(s) if s <= 60.0 => { "heard " (format!("{s:.0}")) " s ago" }
                                    Some(s) => { "silent for " (minutes(s)) }
                                    None => { "never heard" }
                                }
                            }
                        }
                    }
                }
            }
        }
    }
}

/// The latest measured frame: its picture with its stars ringed and its anomalies boxed.
fn latest(latest: Option<&LatestFrame>) -> Markup {
    html! {
        section id="latest" {
            h2 { "Latest frame" }
            @match latest {
                Some(l) => {
                    p {
                        span class="file" { (l.file) }
                        @if let Some(t) = &l.time_local {
                            " " (time(t, FRAME_CLOCK)) " " small { (FRAME_CLOCK_LABEL) }
                        }
                    }
                    @match &l.preview_url {
                        Some(url) if l.width > 0 && l.height > 0 => { (picture(l, url)) }
                        _ => { p class="quiet" { "Its picture is being made." } }
                    }
                }
                None => { p { "No frame measured yet." } }
            }
        }
    }
}

/// The latest frame's picture with its marks. FITS pixel centres are whole numbers from
/// 1, y up; the picture's y runs down. Shapes are closed by end tags: inside `<svg>` an
/// element the HTML parser sees unclosed would hold the next one.
fn picture(l: &LatestFrame, url: &str) -> Markup {
    let side = (l.width.max(l.height) as f64 / 40.0).max(8.0);
    let h = l.height as f64;
    html! {
        div class="pic" {
            img src=(url) alt="the latest frame, stretched";
            svg viewBox=(format!("0 0 {} {}", l.width, l.height)) preserveAspectRatio="none" aria-hidden="true" {
                @for [x, y, r] in &l.stars {
                    circle class="star" vector-effect="non-scaling-stroke"
                        cx=(format!("{:.1}", x - 0.5)) cy=(format!("{:.1}", h - (y - 0.5)))
                        r=(format!("{r:.1}")) {}
                }
                @for (x, y, _) in &l.marks {
                    rect class="mark" vector-effect="non-scaling-stroke"
                        x=(format!("{:.1}", x - 0.5 - side / 2.0))
                        y=(format!("{:.1}", h - (y - 0.5) - side / 2.0))
                        width=(format!("{side:.1}")) height=(format!("{side:.1}")) {}
                }
            }
        }
        // Shapes, not colours: the red mode draws both in red.
        p class="quiet" {
            (l.stars.len()) " stars ringed"
            @if !l.marks.is_empty() { ", " (l.marks.len()) " anomalies boxed" }
            "."
        }
    }
}

/// What the night's analysis found so far, and the hot pixels and cosmic rays counted.
fn anomalies(v: &LiveView) -> Markup {
    html! {
        section id="anomalies" {
            h2 { "Worth a look" }
            @match v.analysed_unix {
                None => { p class="quiet" { "The night's analysis has not run yet." } }
                Some(_) if v.anomalies.is_empty() => { p { "Nothing unusual found so far." } }
                Some(_) => {
                    @for a in &v.anomalies {
                        div class="anomaly" {
                            @if let Some(url) = &a.cutout_url {
                                img src=(url) alt=(format!("cutout of the {}", a.kind));
                            }
                            span class="kind" { (a.kind) } " " (a.position.as_deref().unwrap_or("")) " "
                            small { (a.group) }
                            br;
                            (a.what)
                            br;
                            small {
                                (a.frames) " frame(s)"
                                @if let (Some(f), Some(x), Some(y)) = (&a.file, a.x, a.y) {
                                    ", first in " (f) " at x " (format!("{x:.0}")) ", y " (format!("{y:.0}"))
                                }
                            }
                        }
                    }
                }
            }
            @if v.hot_pixels + v.cosmic_rays > 0 {
                p class="quiet" {
                    "Also " (v.hot_pixels) " hot pixel(s) and " (v.cosmic_rays)
                    " cosmic-ray hit(s), counted, not listed."
                }
            }
        }
    }
}

/// Tonight's alerts, on this PC's clock.
fn alerts(alerts: &[LiveAlert]) -> Markup {
    html! {
        section id="alerts" {
            h2 { "Alerts tonight" }
            @if alerts.is_empty() {
                p { "None." }
            } @else {
                p class="quiet" { "Times on " (PC_CLOCK_LABEL) "." }
                ul {
                    @for a in alerts {
                        li {
                            @if let Some(t) = &a.time_local { (time(t, PC_CLOCK)) }
                            " " b { (a.kind) } ": " (a.message)
                        }
                    }
                }
            }
        }
    }
}

/// The Sun and Moon now, and the daemon's health as a viewer may know it.
fn sky_and_daemon(sky: Option<&SkyNow>, d: &Health) -> Markup {
    html! {
        section id="sky" {
            h2 { "Sky and daemon" }
            p class="quiet" { "Now, and times on " (PC_CLOCK_LABEL) "." }
            dl class="facts" {
                @match sky {
                    Some(s) => {
                        dt { "Sun" } dd { (format!("{:.1}", s.sun_alt_deg)) "° (" (s.twilight) ")" }
                        dt { "Moon" }
                        dd { (format!("{:.1}°, {:.0} % lit", s.moon_alt_deg, 100.0 * s.moon_illumination)) }
                        @if let (Some(at), Some(m)) = (&s.astronomical_dawn_local, s.minutes_to_astronomical_dawn) {
                            dt { "astronomical dawn" }
                            dd { (time(at, PC_CLOCK)) " (in " (minutes(m * 60.0)) ")" }
                        }
                    }
                    None => {
                        dt { "sky" } dd { "set [site] latitude and longitude to see the Sun and Moon" }
                    }
                }
                dt { "daemon" }
                dd {
                    @match d.daemon_heard_s_ago {
                        Some(s) if d.daemon_running => { "watching (heard " (format!("{s:.0}")) " s ago)" }
                        Some(s) => { span class="reject" { "not heard from for " (minutes(s)) } }
                        None => { span class="reject" { "not heard from yet" } }
                    }
                    ": " (d.waiting.unwrap_or(0)) " waiting, " (d.being_read.unwrap_or(0)) " being read"
                    @if let Some(n) = d.not_stored.filter(|n| *n > 0) {
                        ", " span class="reject" { (n) " not stored yet" }
                    }
                }
                @if let (Some(t), Some(ago)) = (&d.last_frame_local, d.seconds_since_last_frame) {
                    dt { "last frame recorded" } dd { (time(t, PC_CLOCK)) " (" (minutes(ago)) " ago)" }
                }
                dt { "disk space" }
                dd {
                    @if d.low_disk {
                        span class="reject" {
                            "low: under " (d.min_free_gb) " GB free where frames, the store or reports are written"
                        }
                    } @else {
                        "enough (over " (d.min_free_gb) " GB free where the daemon writes)"
                    }
                }
                dt { "outbox" }
                dd {
                    (d.outbox_waiting) " message(s) waiting"
                    @if d.outbox_failing {
                        "; " span class="reject" { "the last attempt failed" } " ("
                        code { "subwatch outbox" } " on the PC says why)"
                    }
                }
            }
        }
    }
}

/// The night's plots, under a heading per group.
fn plots(plots: &[LivePlot]) -> Markup {
    // Runs of plots of one group, in the order given.
    let mut runs: Vec<(&str, Vec<&LivePlot>)> = Vec::new();
    for p in plots {
        match runs.last_mut() {
            Some((group, run)) if *group == p.group => run.push(p),
            _ => runs.push((&p.group, vec![p])),
        }
    }
    html! {
        section id="plots" {
            h2 { "The night's plots" }
            @if plots.is_empty() {
                p class="quiet" { "Drawn once a few frames are in." }
            } @else {
                p class="quiet" { "Plotted against " (FRAME_CLOCK_LABEL) "." }
            }
            @for (group, run) in &runs {
                h3 { (group) }
                div class="plots" {
                    @for p in run {
                        img class="plot" src=(p.url) alt=(format!("{}: {}", p.group, p.title));
                    }
                }
            }
        }
    }
}

/// Every frame of the night, newest first, with why where it was not simply ok.
fn frames(frames: &[LiveFrame]) -> Markup {
    html! {
        section id="frames" {
            h2 { "Tonight's frames, newest first" }
            @if frames.is_empty() {
                p { "None yet." }
            } @else {
                div class="scroll" {
                    table {
                        tr {
                            th { (FRAME_CLOCK_LABEL) } th { "verdict" } th { "file, and why" }
                            th { "FWHM" } th { "ecc." } th { "sky ADU" } th { "stars" }
                        }
                        @for f in frames { (frame_row(f)) }
                    }
                }
            }
        }
    }
}

fn frame_row(f: &LiveFrame) -> Markup {
    let verdict = f.verdict.as_deref().unwrap_or(match f.status.as_str() {
        "error" => "unreadable",
        "skipped" => "not a light",
        _ => "waiting",
    });
    let class = match verdict {
        "reject" | "unreadable" => "reject",
        "warn" => "warn",
        "ok" => "ok",
        _ => "quiet",
    };
    let fwhm = match (f.fwhm_arcsec, f.fwhm_px) {
        (Some(a), _) => format!("{a:.2}″"),
        (None, Some(p)) => format!("{p:.2} px"),
        _ => "-".into(),
    };
    let why: Vec<&String> = f.explanations.iter().chain(f.error.iter()).collect();
    html! {
        tr {
            td {
                @match &f.time_local {
                    Some(t) => { (time(t, FRAME_CLOCK)) }
                    None => { "-" }
                }
            }
            td class=(class) { (verdict) }
            td {
                span class="file" { (f.file) }
                @if f.kind != "light" && !f.kind.is_empty() { " " small { "(" (f.kind) ")" } }
                @if !why.is_empty() && verdict != "ok" {
                    ul class="why" { @for w in &why { li { (w) } } }
                }
            }
            td class="n" { (fwhm) }
            td class="n" { (num(f.eccentricity, 2)) }
            td class="n" { (num(f.background_adu, 0)) }
            td class="n" {
                @match f.star_count {
                    Some(n) => { (n) }
                    None => { "-" }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_site_lists_its_rigs_and_one_rig_does_not() {
        let rig = |name: &str, heard: Option<f64>| LiveRig {
            rig: name.into(),
            frames: 100,
            warned: 3,
            rejected: 2,
            last_recorded_local: Some("01:02:03".into()),
            heard_s_ago: heard,
        };
        let mut v = LiveView {
            rigs: vec![rig("north <pier>", Some(4.0))],
            ..Default::default()
        };
        assert!(!part(&v).contains("Rigs of the site"));
        v.rigs.push(rig("south pier", Some(600.0)));
        let h = part(&v);
        assert!(h.contains("Rigs of the site"), "{h}");
        assert!(h.contains("north &lt;pier&gt;") && h.contains("heard 4 s ago"));
        assert!(h.contains("silent for 10 min"));
    }

    #[test]
    fn values_from_files_are_escaped_everywhere_they_show() {
        let hostile = "<script>alert(1)</script>\"'&";
        let v = LiveView {
            night: Some(hostile.into()),
            night_placed_by: hostile.into(),
            timezone: "UTC".into(),
            groups: vec![LiveGroup {
                heading: hostile.into(),
                ..Default::default()
            }],
            frames: vec![LiveFrame {
                file: hostile.into(),
                verdict: Some("reject".into()),
                explanations: vec![hostile.into()],
                ..Default::default()
            }],
            latest: Some(LatestFrame {
                file: hostile.into(),
                ..Default::default()
            }),
            alerts: vec![LiveAlert {
                kind: hostile.into(),
                message: hostile.into(),
                ..Default::default()
            }],
            analysed_unix: Some(0.0),
            anomalies: vec![LiveAnomaly {
                kind: hostile.into(),
                group: hostile.into(),
                what: hostile.into(),
                file: Some(hostile.into()),
                x: Some(1.0),
                y: Some(1.0),
                ..Default::default()
            }],
            ..Default::default()
        };
        let page = html(&v);
        assert!(!page.contains("<script>alert"), "{page}");
        assert_eq!(
            page.matches("<script").count(),
            1,
            "only the page's own script"
        );
        assert!(page.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
        assert!(
            !page.contains(" style="),
            "no inline style: the CSP forbids it"
        );
    }

    /// A view with every part filled, so that every field is in its JSON.
    fn full_view() -> LiveView {
        LiveView {
            night: Some("2026-12-04".into()),
            now_unix: 1.8e9,
            timezone: "UTC".into(),
            frames: vec![LiveFrame {
                file: "a.fits".into(),
                time_unix: Some(1.7e9),
                time_local: Some("01:02:03".into()),
                verdict: Some("ok".into()),
                ..Default::default()
            }],
            latest: Some(LatestFrame {
                file: "a.fits".into(),
                time_local: Some("01:02:03".into()),
                ..Default::default()
            }),
            alerts: vec![LiveAlert {
                time_unix: 1.8e9,
                time_local: Some("03:04:05".into()),
                kind: "frames_stopped".into(),
                message: "no new frame for 20 minutes".into(),
            }],
            analysed_unix: Some(1.8e9),
            sky: Some(SkyNow {
                astronomical_dawn_unix: Some(1.8e9 + 3600.0),
                astronomical_dawn_local: Some("04:04:05".into()),
                minutes_to_astronomical_dawn: Some(60.0),
                ..Default::default()
            }),
            health: Health {
                daemon_running: true,
                daemon_heard_s_ago: Some(1.0),
                last_frame_unix: Some(1.8e9 - 60.0),
                last_frame_local: Some("03:03:05".into()),
                seconds_since_last_frame: Some(60.0),
                ..Default::default()
            },
            rigs: vec![
                LiveRig {
                    rig: "north".into(),
                    last_recorded_local: Some("03:03:05".into()),
                    heard_s_ago: Some(2.0),
                    ..Default::default()
                },
                LiveRig {
                    rig: "south".into(),
                    ..Default::default()
                },
            ],
            frame_time_behind_s: Some(1e8),
            ..Default::default()
        }
    }

    /// Every key of a JSON value, as `a.b[].c`.
    fn keys(v: &serde_json::Value, at: &str, out: &mut Vec<String>) {
        match v {
            serde_json::Value::Object(m) => {
                for (k, x) in m {
                    let here = if at.is_empty() {
                        k.clone()
                    } else {
                        format!("{at}.{k}")
                    };
                    out.push(here.clone());
                    keys(x, &here, out);
                }
            }
            serde_json::Value::Array(a) => {
                for x in a {
                    keys(x, &format!("{at}[]"), out);
                }
            }
            _ => {}
        }
    }

    #[test]
    fn every_time_in_the_json_names_its_clock() {
        let v = full_view();
        let json = serde_json::to_value(&v).unwrap();
        let mut all = Vec::new();
        keys(&json, "", &mut all);
        let times: Vec<&String> = all
            .iter()
            .filter(|k| !k.starts_with("clocks."))
            .filter(|k| {
                k.ends_with("_unix")
                    || k.ends_with("_local")
                    || k.ends_with("_ago")
                    || k.ends_with("behind_s")
                    || k.ends_with("since_last_frame")
                    || k.ends_with("to_astronomical_dawn")
            })
            .collect();
        assert!(times.len() >= 15, "{times:?}");
        for k in times {
            let clock = v.clocks.fields.get(k.as_str());
            assert!(
                matches!(clock, Some(&FRAME_CLOCK) | Some(&PC_CLOCK)),
                "{k} has no clock"
            );
        }
        // And nothing is named that the JSON does not hold.
        for k in v.clocks.fields.keys() {
            assert!(all.iter().any(|a| a == k), "{k} is not in the view");
        }
        assert_eq!(json["clocks"]["fields"]["frames[].time_unix"], "frame");
        assert_eq!(json["clocks"]["fields"]["alerts[].time_unix"], "pc");
    }

    #[test]
    fn every_time_on_the_page_names_its_clock() {
        let mut v = full_view();
        let page = part(&v);
        let shown = page.matches("<time ").count();
        // The frame's time in the list and under the picture; the alert, dawn, the last
        // frame recorded and the rig's last record on this PC's clock.
        assert_eq!(
            page.matches("<time data-clock=\"frame\">").count(),
            2,
            "{page}"
        );
        assert_eq!(
            page.matches("<time data-clock=\"pc\">").count(),
            4,
            "{page}"
        );
        assert_eq!(shown, 6);
        assert!(page.contains(FRAME_CLOCK_LABEL) && page.contains(PC_CLOCK_LABEL));
        // Frames taken 1e8 s before they were recorded: said, in words.
        assert!(
            page.contains("id=\"clocks-apart\">Frame times are 1157 days 9 h behind"),
            "{page}"
        );
        v.frame_time_behind_s = Some(90.0);
        assert!(!part(&v).contains("clocks-apart"));
        v.frame_time_behind_s = Some(-7200.0);
        assert!(part(&v).contains("Frame times are 2 h 00 min ahead"));
    }

    #[test]
    fn the_view_tells_a_viewer_no_path_process_or_free_bytes() {
        let json = serde_json::to_string(&full_view()).unwrap();
        for gone in [
            "\"path\"",
            "daemon_pid",
            "\"disks\"",
            "\"free_gb\"",
            "outbox_last_error",
        ] {
            assert!(!json.contains(gone), "{gone} in {json}");
        }
        let mut v = full_view();
        v.health.low_disk = true;
        v.health.min_free_gb = 5.0;
        v.health.outbox_failing = true;
        let page = part(&v);
        assert!(page.contains("low: under 5 GB free"), "{page}");
        assert!(page.contains("the last attempt failed"), "{page}");
        assert!(page.contains("watching (heard 1 s ago)"), "{page}");
    }

    /// The custom properties a `:root...{}` rule of the style sheet sets.
    fn palette(selector: &str) -> BTreeMap<String, String> {
        let at = STYLE.find(&format!("{selector}{{")).expect(selector) + selector.len() + 1;
        let body = &STYLE[at..at + STYLE[at..].find('}').unwrap()];
        body.split(';')
            .filter_map(|d| d.split_once(':'))
            .filter(|(k, _)| k.starts_with("--"))
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect()
    }

    /// A `#rgb` or `#rrggbb` colour as 0..=255 channels.
    fn rgb(hex: &str) -> [u8; 3] {
        let h = hex.trim_start_matches('#');
        let wide: String = if h.len() == 3 {
            h.chars().flat_map(|c| [c, c]).collect()
        } else {
            h.to_string()
        };
        let c = |i: usize| u8::from_str_radix(&wide[i..i + 2], 16).unwrap();
        [c(0), c(2), c(4)]
    }

    /// Relative luminance and contrast ratio as WCAG 2.1 defines them (its glossary:
    /// "relative luminance", "contrast ratio"), from sRGB channels.
    fn contrast(a: [u8; 3], b: [u8; 3]) -> f64 {
        let lum = |c: [u8; 3]| {
            let lin = |v: u8| {
                let s = f64::from(v) / 255.0;
                if s <= 0.04045 {
                    s / 12.92
                } else {
                    ((s + 0.055) / 1.055).powf(2.4)
                }
            };
            0.2126 * lin(c[0]) + 0.7152 * lin(c[1]) + 0.0722 * lin(c[2])
        };
        let (x, y) = (lum(a), lum(b));
        (x.max(y) + 0.05) / (x.min(y) + 0.05)
    }

    #[test]
    fn the_red_mode_has_no_green_or_blue_anywhere() {
        let light = palette(":root");
        let red = palette(":root[data-mode=red]");
        let dark = palette(":root[data-mode=dark]");
        // Every colour the page uses is set by each mode: none leaks from the light one.
        let names = |p: &BTreeMap<String, String>| p.keys().cloned().collect::<Vec<_>>();
        assert_eq!(names(&red), names(&light));
        assert_eq!(names(&dark), names(&light));
        for (k, v) in &red {
            let [_, g, b] = rgb(v);
            assert_eq!((g, b), (0, 0), "{k}: {v}");
        }
        // Colours written outright (not through the properties) are black or red too.
        let outside: String = STYLE
            .lines()
            .filter(|l| !l.starts_with(":root{") && !l.starts_with(":root[data-mode=dark]{"))
            .collect();
        let mut rest = outside.as_str();
        while let Some(at) = rest.find('#') {
            let hex: String = rest[at + 1..]
                .chars()
                .take_while(|c| c.is_ascii_hexdigit())
                .collect();
            if hex.len() == 3 || hex.len() == 6 {
                let [_, g, b] = rgb(&hex);
                assert_eq!((g, b), (0, 0), "#{hex}");
            }
            rest = &rest[at + 1..];
        }
        // Pictures go through a matrix whose green and blue rows are zero.
        let values = RED_ONLY_FILTER.split("values=\"").nth(1).unwrap();
        let m: Vec<f64> = values
            .split('"')
            .next()
            .unwrap()
            .split_whitespace()
            .map(|x| x.parse().unwrap())
            .collect();
        assert_eq!(m.len(), 20);
        assert!(m[5..15].iter().all(|x| *x == 0.0), "{m:?}");
        assert!(STYLE.contains(":root[data-mode=red] img{filter:url(#red-only)}"));
    }

    #[test]
    fn every_text_colour_stands_out_from_its_background_in_every_mode() {
        // WCAG 2.1 success criterion 1.4.3 (contrast, minimum): 4.5:1 for text.
        for mode in [":root", ":root[data-mode=dark]", ":root[data-mode=red]"] {
            let p = palette(mode);
            let c = |k: &str| rgb(&p[k]);
            for (text, ground) in [
                ("--fg", "--bg"),
                ("--quiet", "--bg"),
                ("--ok", "--bg"),
                ("--warn", "--bg"),
                ("--bad", "--bg"),
                ("--fg", "--head"),
                ("--fg", "--note-bg"),
                ("--quiet", "--head"),
            ] {
                let r = contrast(c(text), c(ground));
                assert!(r >= 4.5, "{mode}: {text} on {ground} is {r:.2}:1");
            }
        }
        // The computation against WCAG's own extremes: black on white is 21:1.
        assert!((contrast([0, 0, 0], [255, 255, 255]) - 21.0).abs() < 1e-9);
    }

    #[test]
    fn the_page_offers_its_modes_and_loads_its_script_before_drawing() {
        let page = html(&LiveView::default());
        for mode in ["light", "dark", "red"] {
            assert!(page.contains(&format!("data-mode=\"{mode}\"")), "{mode}");
            assert!(SCRIPT.contains(&format!("\"{mode}\"")), "{mode}");
        }
        assert!(page.contains("<filter id=\"red-only\""));
        // In the head and not deferred: the mode is set before the body is drawn.
        let head = &page[..page.find("</head>").unwrap()];
        assert!(head.contains("<script src=\"app.js\"></script>"), "{head}");
        assert!(SCRIPT.contains("localStorage"));
    }

    #[test]
    fn markers_sit_on_the_fits_pixels_of_the_picture() {
        // A star at FITS (1, 1), the first pixel's centre, is half a pixel in from the
        // picture's bottom-left corner.
        let v = LiveView {
            latest: Some(LatestFrame {
                width: 100,
                height: 50,
                preview_url: Some("preview/1.png".into()),
                stars: vec![[1.0, 1.0, 4.0]],
                ..Default::default()
            }),
            ..Default::default()
        };
        assert!(part(&v).contains("cx=\"0.5\" cy=\"49.5\" r=\"4.0\""));
    }
}
