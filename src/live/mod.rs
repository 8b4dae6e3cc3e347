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

mod assets;
mod page;
pub mod plans;

pub use assets::{CONTENT_SECURITY_POLICY, ICON, RED_ONLY_FILTER, SCRIPT, STYLE};
pub use page::{html, part};

use std::collections::BTreeMap;

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
    /// One line per planned target imaged tonight: how far its plan is, at tonight's
    /// usable rate (`[[targets]]`).
    pub plans: Vec<String>,
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

#[cfg(test)]
mod tests {
    use super::*;

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
}
