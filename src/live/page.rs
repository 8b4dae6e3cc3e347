//! The status page's HTML from the view, written with maud's templates, which escape
//! every value: a value from a file or a header cannot become markup. A function per
//! section; `part` is the content the script swaps in when the view changes.

use maud::{html, Markup, PreEscaped, DOCTYPE};

use super::assets::RED_ONLY_FILTER;
use super::{
    Health, LatestFrame, LiveAlert, LiveFrame, LivePlot, LiveRig, LiveView, SkyNow, CLOCKS_APART_S,
    FRAME_CLOCK, FRAME_CLOCK_LABEL, PC_CLOCK, PC_CLOCK_LABEL,
};

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
            (super::plans::section(&v.plans))
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
    use super::super::*;
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
