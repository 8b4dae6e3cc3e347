//! What the status page shows, built from the store on a thread of its own: the night
//! so far (frames, verdicts, alerts, health, the sky now) every couple of seconds, and,
//! while someone is looking, the night's analysis, plots and cutouts at most every
//! `ANALYSIS_EVERY` and the latest frame's picture once per frame. Every request is then
//! answered from the last [`Snapshot`], so a flood of requests costs copies of bytes
//! already made, never a query or a frame read; and this thread runs at a lower CPU
//! priority than the daemon's ingestion. What it shows is for anyone who can open the
//! page: a message that names a frame's path or a folder of the PC shows file and folder
//! names only ([`Viewer`]).
//!
//! Longer than most modules: the snapshot is one thing built from many reads of the
//! store, a function for each part of the page (what the page shows is `live`'s); the
//! rest is tests.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, RwLock};
use std::time::{Duration, Instant};

use bytes::Bytes;

use crate::clock::Clock;
use crate::config::Config;
use crate::live::{self, LiveView};
use crate::report::{self, plots};
use crate::rules::Verdict;
use crate::store::Store;

/// The night's analysis (anomalies, plots, cutouts) is run again at most this often, and
/// only while the page is being looked at.
pub(super) const ANALYSIS_EVERY: Duration = Duration::from_secs(30);
/// The page counts as looked at for this long after a request.
const LOOKED_AT_FOR: f64 = 120.0;
/// The cutouts the page carries (the most interesting anomalies first).
const PAGE_CUTOUTS: usize = 8;
/// The latest frame's picture, longer side in pixels.
const PREVIEW_SIDE: usize = 640;
/// Stars drawn over the picture, brightest first.
const PREVIEW_STARS: usize = 300;
/// The daemon counts as running while its watching loop said so this recently (it says
/// so every 2 s; a busy store can hold it up a while).
const DAEMON_HEARD_WITHIN_S: f64 = 30.0;

/// Messages as a viewer sees them: the folders the daemon works in (watched, written,
/// the calibration library) named by their last part, and whatever lies under them by
/// its path from there.
struct Viewer {
    /// (folder as a message writes it, its last part), longest first.
    folders: Vec<(String, String)>,
}

impl Viewer {
    fn from_config(config: &Config) -> Viewer {
        let mut all: Vec<PathBuf> = super::checks::written_folders(config);
        all.extend(config.calibration.library.clone());
        let mut folders: Vec<(String, String)> = all
            .iter()
            .filter(|f| f.parent().is_some())
            .map(|f| {
                let name = f
                    .file_name()
                    .map_or(String::new(), |n| n.to_string_lossy().into_owned());
                (crate::logging::shown(f), name)
            })
            .filter(|(full, name)| !full.is_empty() && !name.is_empty())
            .collect();
        folders.sort_by(|a, b| b.0.len().cmp(&a.0.len()).then(a.0.cmp(&b.0)));
        folders.dedup();
        Viewer { folders }
    }

    /// `text` with each folder's path shortened, only where the whole folder is named
    /// (`/data/capture2` is not `/data/capture`).
    fn text(&self, text: &str) -> String {
        let mut out = text.to_string();
        for (full, name) in &self.folders {
            let mut shown = String::with_capacity(out.len());
            let mut rest = out.as_str();
            while let Some(at) = rest.find(full.as_str()) {
                let after = &rest[at + full.len()..];
                shown.push_str(&rest[..at]);
                match after.chars().next() {
                    Some(c) if std::path::is_separator(c) => {
                        rest = &after[c.len_utf8()..];
                    }
                    Some(c) if c.is_alphanumeric() || "-_.".contains(c) => {
                        shown.push_str(full);
                        rest = after;
                    }
                    _ => {
                        shown.push_str(name);
                        rest = after;
                    }
                }
            }
            shown.push_str(rest);
            out = shown;
        }
        out
    }

    /// A frame's message: its own path made its file name, then the folders shortened.
    fn frame_text(&self, path: &str, text: &str) -> String {
        self.text(&text.replace(path, &report::file_name(path)))
    }
}

/// Everything the server answers with, made once per change.
#[derive(Debug, Default)]
pub struct Snapshot {
    pub version: u64,
    pub page: Bytes,
    pub part: Bytes,
    pub night_json: Bytes,
    pub version_json: Bytes,
    /// Plots, cutouts and the latest frame's picture, by their URL path without the
    /// leading slash (`plot/0/fwhm.png`, `cutout/2.png`, `preview/17.png`).
    pub images: HashMap<String, Bytes>,
}

/// Shared between the page builder and the server.
#[derive(Default)]
pub struct PageState {
    pub snapshot: RwLock<Arc<Snapshot>>,
    /// When the page was last asked for (Unix seconds × 1000).
    pub asked_ms: AtomicU64,
    pub stop: AtomicBool,
}

impl PageState {
    pub fn current(&self) -> Arc<Snapshot> {
        self.snapshot
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .clone()
    }

    pub fn asked(&self, now_unix: f64) {
        self.asked_ms
            .store((now_unix * 1000.0) as u64, Ordering::Relaxed);
    }

    fn looked_at(&self, now_unix: f64) -> bool {
        let asked = self.asked_ms.load(Ordering::Relaxed) as f64 / 1000.0;
        asked > 0.0 && now_unix - asked < LOOKED_AT_FOR
    }
}

/// The analysis part of the view, kept between runs.
#[derive(Default)]
struct Analysis {
    /// (frames, last recorded) when it ran.
    stamp: Option<(i64, Option<f64>)>,
    at: Option<Instant>,
    analysed_unix: Option<f64>,
    anomalies: Vec<live::LiveAnomaly>,
    hot_pixels: usize,
    cosmic_rays: usize,
    plots: Vec<live::LivePlot>,
    images: HashMap<String, Bytes>,
    /// (path, x, y) of every anomaly on each frame, for the picture's marks.
    marks: Vec<(String, f64, f64, String)>,
    cutouts: HashMap<String, Bytes>,
}

/// Build snapshots until `state.stop`, every `every` (sooner while someone looks).
pub fn run(config: Config, clock: Arc<dyn Clock>, state: Arc<PageState>) {
    let reading = FrameReading {
        reader: crate::reader::Reader::from_config(&config.measure),
        limits: crate::frame::DecodeLimits {
            max_pixels: config.measure.max_pixels,
        },
    };
    let mut store: Option<Store> = None;
    let mut analysis = Analysis::default();
    let mut pictures = Pictures::default();
    let mut last_part = String::new();
    let mut version = 0u64;
    // A store that fails (a shared server away) is said once, not at every refresh.
    let mut said = false;
    while !state.stop.load(Ordering::Relaxed) {
        let now = clock.now_unix();
        let looked_at = state.looked_at(now);
        if store.is_none() {
            store = match &config.store.url {
                None => Store::open_read_only(&config.store.path, &config.rig.name),
                // A shared database has no read-only file to open: the page's own
                // connection only ever reads.
                Some(_) => Store::open_configured(&config),
            }
            .map_err(|e| {
                if !said {
                    tracing::warn!("status page: {e} (said once until it works again)");
                    said = true;
                }
            })
            .ok();
        }
        if let Some(s) = &store {
            match build(
                s,
                &config,
                now,
                looked_at,
                &reading,
                &mut analysis,
                &mut pictures,
            ) {
                Ok((mut view, images)) => {
                    said = false;
                    let part = live::part(&view);
                    if part != last_part {
                        version += 1;
                        last_part = part;
                    }
                    view.version = version;
                    let snapshot = Snapshot {
                        version,
                        page: Bytes::from(live::html(&view)),
                        part: Bytes::from(last_part.clone()),
                        night_json: Bytes::from(serde_json::to_string(&view).unwrap_or_default()),
                        version_json: Bytes::from(format!("{{\"version\":{version}}}")),
                        images,
                    };
                    *state.snapshot.write().unwrap_or_else(|p| p.into_inner()) = Arc::new(snapshot);
                }
                Err(e) => {
                    if !said {
                        tracing::warn!("status page: {e} (said once until it works again)");
                        said = true;
                    }
                    store = None;
                }
            }
        }
        // Two seconds while someone looks, ten otherwise; the stop flag is seen within
        // a quarter of a second.
        let pause = if looked_at { 2.0 } else { 10.0 };
        let until = Instant::now() + Duration::from_secs_f64(pause);
        while Instant::now() < until && !state.stop.load(Ordering::Relaxed) {
            if !looked_at && state.looked_at(clock.now_unix()) {
                break;
            }
            std::thread::sleep(Duration::from_millis(250));
        }
    }
}

type Built = (LiveView, HashMap<String, Bytes>);

/// What reads frames for the page (the latest picture, the cutouts).
struct FrameReading {
    reader: crate::reader::Reader,
    limits: crate::frame::DecodeLimits,
}

/// A frame's picture: (record id, PNG, width, height).
type Picture = (i64, Bytes, usize, usize);

/// The latest frame's picture, made once per frame, and the one before it, which stays
/// served a while: a page fetched just before a new frame still shows its own.
#[derive(Default)]
struct Pictures {
    latest: Option<Picture>,
    previous: Option<Picture>,
}

impl Pictures {
    /// Frame `f`'s picture made, unless it is the latest already; a picture that cannot
    /// be made leaves the latest as it was.
    fn make(&mut self, f: &crate::store::LiveFrame, reading: &FrameReading) {
        if self.latest.as_ref().map(|p| p.0) == Some(f.id) {
            return;
        }
        let Some(m) = f.record.metrics.as_ref() else {
            return;
        };
        let made = reading
            .reader
            .preview(
                Path::new(&f.record.identity.path),
                PREVIEW_SIDE,
                reading.limits,
            )
            .map(|p| (f.id, Bytes::from(p.png), m.width, m.height));
        if made.is_some() {
            self.previous = std::mem::replace(&mut self.latest, made);
        }
    }

    /// Both pictures into `images`; the address of frame `id`'s, when it is the latest.
    fn serve(&self, id: i64, images: &mut HashMap<String, Bytes>) -> Option<String> {
        if let Some((id, png, _, _)) = self.previous.as_ref() {
            images.insert(format!("preview/{id}.png"), png.clone());
        }
        let latest = self.latest.as_ref().filter(|p| p.0 == id)?;
        let url = format!("preview/{}.png", latest.0);
        images.insert(url.clone(), latest.1.clone());
        Some(url)
    }
}

/// One snapshot of the page: the night so far from the store, the analysis when it is
/// due, the latest frame with its picture, the sky now and the daemon's health.
fn build(
    store: &Store,
    config: &Config,
    now: f64,
    looked_at: bool,
    reading: &FrameReading,
    analysis: &mut Analysis,
    pictures: &mut Pictures,
) -> Result<Built, crate::store::StoreError> {
    let tz = config.timezone();
    let clock_of = |t: f64| report::local_clock(t, tz);
    let viewer = Viewer::from_config(config);
    let (night, placed_by) = match store.latest_dated_night()? {
        Some(n) => (
            Some(n),
            "the night of the latest frame recorded, by its DATE-OBS",
        ),
        None => (
            crate::sky::night_label(now, tz),
            "tonight by the clock: no dated frame recorded yet",
        ),
    };
    let mut view = LiveView {
        night: night.clone(),
        night_placed_by: placed_by.into(),
        now_unix: now,
        timezone: tz.name().into(),
        ..Default::default()
    };
    let night = night.unwrap_or_default();
    let frames = store.night_live_frames(&night)?;
    let counts = store.night_counts(&night)?;
    // Where rigs share the store, every rig of the night.
    if config.store.url.is_some() {
        view.rigs = rigs(store, &night, now, tz)?;
    }
    view.groups = groups(&frames, config.actions.stack_warned);
    view.plans = crate::targets::plan_lines(store, config, &night, "tonight's")?;
    view.frames = frames
        .iter()
        .rev()
        .map(|f| live_frame(f, &viewer, tz))
        .collect();
    view.alerts = store
        .night_alerts(&night)?
        .into_iter()
        .map(|(t, kind, message)| live::LiveAlert {
            time_unix: t,
            time_local: clock_of(t),
            kind,
            message: viewer.text(&message),
        })
        .collect();

    // The night's analysis, while someone looks and when frames came since.
    let stamp = (counts.frames, counts.last_recorded_unix);
    let due =
        analysis.stamp != Some(stamp) && analysis.at.is_none_or(|t| t.elapsed() >= ANALYSIS_EVERY);
    if looked_at && due && frames.len() >= 3 {
        analyse(store, config, &night, now, reading, analysis)?;
        analysis.stamp = Some(stamp);
        analysis.at = Some(Instant::now());
    }
    view.analysed_unix = analysis.analysed_unix;
    view.anomalies = analysis.anomalies.clone();
    view.hot_pixels = analysis.hot_pixels;
    view.cosmic_rays = analysis.cosmic_rays;
    view.plots = analysis.plots.clone();
    let mut images = analysis.images.clone();

    // The latest measured frame and its picture.
    if let Some(f) = frames.iter().rev().find(|f| f.record.metrics.is_some()) {
        if looked_at {
            pictures.make(f, reading);
        }
        let preview_url = pictures.serve(f.id, &mut images);
        view.latest = Some(latest_frame(store, f, preview_url, &analysis.marks, tz)?);
    }
    view.sky = config
        .site_position()
        .map(|(lat, lon, _)| sky_now(now, lat, lon, tz));
    view.health = health(store, config, &counts, now)?;
    view.frame_time_behind_s = frame_time_behind(&frames, &counts);
    Ok((view, images))
}

/// Every rig with frames tonight, with when its daemon last said it was alive (its
/// heartbeat).
fn rigs(
    store: &Store,
    night: &str,
    now: f64,
    tz: chrono_tz::Tz,
) -> Result<Vec<live::LiveRig>, crate::store::StoreError> {
    let mut rigs = Vec::new();
    for (rig, c) in store.night_counts_by_rig(night)? {
        let heard = store
            .rig_meta(&rig, "daemon")?
            .and_then(|d| serde_json::from_str::<serde_json::Value>(&d).ok())
            .and_then(|d| d["updated_unix"].as_f64())
            .map(|t| (now - t).max(0.0));
        rigs.push(live::LiveRig {
            rig,
            frames: c.frames,
            warned: c.warned,
            rejected: c.rejected,
            last_recorded_local: c
                .last_recorded_unix
                .and_then(|t| report::local_clock(t, tz)),
            heard_s_ago: heard,
        });
    }
    Ok(rigs)
}

/// Counts and usable time per group, in the summary's order (target, then filter).
fn groups(frames: &[crate::store::LiveFrame], stack_warned: bool) -> Vec<live::LiveGroup> {
    let mut groups: Vec<live::LiveGroup> = Vec::new();
    for f in frames {
        let r = &f.record;
        if r.status == crate::record::FrameStatus::Skipped {
            continue;
        }
        let i = match groups
            .iter()
            .position(|g| g.target == r.target && g.filter == r.filter)
        {
            Some(i) => i,
            None => {
                groups.push(live::LiveGroup {
                    target: r.target.clone(),
                    filter: r.filter.clone(),
                    heading: report::group_heading(r.target.as_deref(), r.filter.as_deref()),
                    ..Default::default()
                });
                groups.len() - 1
            }
        };
        let g = &mut groups[i];
        let exposure = r.header.as_ref().and_then(|h| h.exposure_s).unwrap_or(0.0);
        match f.verdict {
            Some(Verdict::Ok) => {
                g.ok += 1;
                g.usable_s += exposure;
            }
            Some(Verdict::Warn) => {
                g.warn += 1;
                if stack_warned {
                    g.usable_s += exposure;
                }
            }
            Some(Verdict::Reject) => g.reject += 1,
            _ => g.other += 1,
        }
    }
    groups.sort_by(|a, b| (&a.target, &a.filter).cmp(&(&b.target, &b.filter)));
    groups
}

/// One frame as a viewer sees it.
fn live_frame(f: &crate::store::LiveFrame, viewer: &Viewer, tz: chrono_tz::Tz) -> live::LiveFrame {
    let r = &f.record;
    let m = r.metrics.as_ref();
    live::LiveFrame {
        id: f.id,
        file: report::file_name(&r.identity.path),
        time_unix: r.time_unix,
        time_local: r.time_unix.and_then(|t| report::local_clock(t, tz)),
        target: r.target.clone(),
        filter: r.filter.clone(),
        verdict: f.verdict.map(|v| v.as_str().to_string()),
        status: r.status.as_str().to_string(),
        kind: crate::night::calibration::kind_of(r)
            .unwrap_or("light")
            .to_string(),
        error: r
            .error
            .as_deref()
            .map(|e| viewer.frame_text(&r.identity.path, e)),
        explanations: f
            .explanations
            .iter()
            .map(|x| viewer.frame_text(&r.identity.path, x))
            .collect(),
        exposure_s: r.header.as_ref().and_then(|h| h.exposure_s),
        star_count: m.map(|m| m.star_count),
        fwhm_px: m.and_then(|m| m.fwhm_px),
        fwhm_arcsec: m.and_then(|m| m.fwhm_arcsec),
        eccentricity: m.and_then(|m| m.eccentricity),
        background_adu: m.map(|m| m.background_adu).filter(|v| v.is_finite()),
        noise_adu: m.map(|m| m.noise_adu).filter(|v| v.is_finite()),
        snr_median: m.and_then(|m| m.snr_median),
    }
}

/// The latest measured frame `f` with its brightest stars (circles of twice their
/// FWHM) and the marks of the anomalies on it.
fn latest_frame(
    store: &Store,
    f: &crate::store::LiveFrame,
    preview_url: Option<String>,
    marks: &[(String, f64, f64, String)],
    tz: chrono_tz::Tz,
) -> Result<live::LatestFrame, crate::store::StoreError> {
    let m = f.record.metrics.as_ref().expect("found with metrics");
    let mut stars = store.frame_star_records(f.id)?;
    stars.sort_by(|a, b| b.flux.total_cmp(&a.flux));
    Ok(live::LatestFrame {
        id: f.id,
        file: report::file_name(&f.record.identity.path),
        time_local: f.record.time_unix.and_then(|t| report::local_clock(t, tz)),
        width: m.width,
        height: m.height,
        preview_url,
        stars: stars
            .iter()
            .filter(|s| s.x.is_finite() && s.y.is_finite())
            .take(PREVIEW_STARS)
            .map(|s| {
                let r = if s.fwhm_px.is_finite() {
                    (2.0 * s.fwhm_px).clamp(4.0, 40.0)
                } else {
                    6.0
                };
                [s.x, s.y, r]
            })
            .collect(),
        marks: marks
            .iter()
            .filter(|(p, ..)| *p == f.record.identity.path)
            .map(|(_, x, y, k)| (*x, *y, k.clone()))
            .collect(),
    })
}

/// The Sun, the Moon and the next astronomical dawn at the site, now.
fn sky_now(now: f64, lat: f64, lon: f64, tz: chrono_tz::Tz) -> live::SkyNow {
    let jd = crate::sky::julian_date(now);
    let sun = crate::sky::sun_altitude(jd, lat, lon);
    let dawn = crate::sky::night_around(now, -18.0, lat, lon).1;
    live::SkyNow {
        sun_alt_deg: sun,
        moon_alt_deg: crate::sky::moon_altitude(jd, lat, lon),
        moon_illumination: crate::sky::moon_illumination(jd),
        twilight: serde_json::to_value(crate::sky::twilight(sun))
            .ok()
            .and_then(|v| v.as_str().map(str::to_string))
            .unwrap_or_default(),
        astronomical_dawn_unix: dawn,
        astronomical_dawn_local: dawn.and_then(|d| report::local_clock(d, tz)),
        minutes_to_astronomical_dawn: dawn.map(|d| (d - now) / 60.0),
    }
}

/// The daemon's health as a viewer may know it: whether it runs, what waits, low disk
/// and a failing outbox, without paths or numbers of the PC.
fn health(
    store: &Store,
    config: &Config,
    counts: &crate::store::NightCounts,
    now: f64,
) -> Result<live::Health, crate::store::StoreError> {
    let daemon: Option<serde_json::Value> = store
        .meta("daemon")?
        .and_then(|s| serde_json::from_str(&s).ok());
    let field = |k: &str| daemon.as_ref().and_then(|d| d[k].as_u64());
    let heard = daemon
        .as_ref()
        .and_then(|d| d["updated_unix"].as_f64())
        .map(|t| (now - t).max(0.0));
    let (outbox_waiting, outbox_last_error) = store.outbox_state()?;
    let min_free_gb = config.alerts.min_free_gb;
    Ok(live::Health {
        daemon_running: heard.is_some_and(|s| s <= DAEMON_HEARD_WITHIN_S),
        daemon_heard_s_ago: heard,
        waiting: field("waiting"),
        being_read: field("in_flight"),
        not_stored: field("not_stored"),
        last_frame_unix: counts.last_recorded_unix,
        last_frame_local: counts
            .last_recorded_unix
            .and_then(|t| report::local_clock(t, config.timezone())),
        seconds_since_last_frame: counts.last_recorded_unix.map(|t| (now - t).max(0.0)),
        low_disk: super::checks::free_space(&super::checks::written_folders(config))
            .iter()
            .any(|(_, free)| (*free as f64 / 1e9) < min_free_gb),
        min_free_gb,
        outbox_waiting,
        outbox_failing: outbox_last_error.is_some(),
    })
}

/// The latest frame's end of exposure against this PC's clock when the last frame was
/// recorded: far apart when frames are replayed.
fn frame_time_behind(
    frames: &[crate::store::LiveFrame],
    counts: &crate::store::NightCounts,
) -> Option<f64> {
    let latest_end = frames
        .iter()
        .filter_map(|f| {
            let r = &f.record;
            let exposure = r.header.as_ref().and_then(|h| h.exposure_s).unwrap_or(0.0);
            r.time_unix.map(|t| t + exposure.max(0.0))
        })
        .filter(|t| t.is_finite())
        .max_by(f64::total_cmp);
    counts
        .last_recorded_unix
        .zip(latest_end)
        .map(|(recorded, taken)| recorded - taken)
}

/// The night so far through the night model (as the anomaly alerts see it): anomalies
/// most interesting first, plots per group, cutouts of the first few.
fn analyse(
    store: &Store,
    config: &Config,
    night: &str,
    now: f64,
    reading: &FrameReading,
    a: &mut Analysis,
) -> Result<(), crate::store::StoreError> {
    let viewer = Viewer::from_config(config);
    let records = store.night_records(night)?;
    let doc = crate::batch::analyse_records(
        &records,
        &config.rule_specs(),
        config.site_position(),
        crate::batch::Catalogues::Read(store),
        &config.calibration.settings,
    )?;
    let settings = crate::morning::settings(config);
    let summary = report::summarise(night, &doc, settings);
    a.images.clear();
    a.plots.clear();
    for p in plots::night_plots(&doc, &summary, settings.tz) {
        let url = format!("plot/{}/{}.png", p.group, p.plotted.key);
        a.images.insert(url.clone(), Bytes::from(p.png));
        a.plots.push(live::LivePlot {
            group: summary.groups[p.group].heading(),
            title: p.plotted.title.to_string(),
            url,
        });
    }
    a.marks = summary
        .notable
        .iter()
        .flat_map(|an| {
            an.detections
                .iter()
                .map(move |d| (d.path.clone(), d.x, d.y, an.kind.name().to_string()))
        })
        .collect();
    a.anomalies.clear();
    for (k, an) in summary.notable.iter().enumerate() {
        let first = an.detections.first();
        let mut cutout_url = None;
        if let (true, Some(d)) = (k < PAGE_CUTOUTS, first) {
            let key = format!("{}@{:.0},{:.0}", d.path, d.x, d.y);
            if !a.cutouts.contains_key(&key) {
                if let Some(png) =
                    reading
                        .reader
                        .cutout(Path::new(&d.path), d.x, d.y, 16, reading.limits)
                {
                    a.cutouts.insert(key.clone(), Bytes::from(png));
                }
            }
            if let Some(png) = a.cutouts.get(&key) {
                // Named by what it shows, so an older page never shows another's.
                let url = format!("cutout/{:016x}.png", crate::text::stable_hash(&key));
                a.images.insert(url.clone(), png.clone());
                cutout_url = Some(url);
            }
        }
        a.anomalies.push(live::LiveAnomaly {
            kind: an.kind.name().to_string(),
            group: report::group_heading(an.target.as_deref(), an.filter.as_deref()),
            what: viewer.text(&report::what(an)),
            frames: an.detections.len(),
            file: first.map(|d| report::file_name(&d.path)),
            x: first.map(|d| d.x),
            y: first.map(|d| d.y),
            ra_deg: an.ra_deg,
            dec_deg: an.dec_deg,
            position: an
                .ra_deg
                .zip(an.dec_deg)
                .map(|(r, d)| report::sexagesimal(r, d)),
            cutout_url,
        });
    }
    // Cutouts of anomalies no longer listed are let go.
    let listed: Vec<String> = summary
        .notable
        .iter()
        .filter_map(|an| an.detections.first())
        .map(|d| format!("{}@{:.0},{:.0}", d.path, d.x, d.y))
        .collect();
    a.cutouts.retain(|k, _| listed.contains(k));
    a.hot_pixels = summary.hot_pixels.len();
    a.cosmic_rays = summary.cosmic_rays.len();
    a.analysed_unix = Some(now);
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_viewer_sees_names_where_messages_name_the_pcs_folders() {
        let mut config = Config::default();
        config.watch.folders = vec![PathBuf::from("/srv/kestrel/capture")];
        config.store.path = PathBuf::from("/var/lib/subwatch/subwatch.db");
        config.report.folder = Some(PathBuf::from("/srv/kestrel/reports"));
        let v = Viewer::from_config(&config);
        assert_eq!(
            v.text("only 3.1 GB free where /srv/kestrel/capture is; only 1.0 GB free where /var/lib/subwatch is"),
            "only 3.1 GB free where capture is; only 1.0 GB free where subwatch is"
        );
        assert_eq!(
            v.text("/srv/kestrel/capture/2026-12-04/a.fits: not FITS"),
            "2026-12-04/a.fits: not FITS"
        );
        // Another folder that starts alike is left whole.
        assert_eq!(
            v.text("/srv/kestrel/capture2/a.fits"),
            "/srv/kestrel/capture2/a.fits"
        );
        assert_eq!(
            v.frame_text(
                "/srv/kestrel/capture/2026-12-04/a.fits",
                "/srv/kestrel/capture/2026-12-04/a.fits: truncated"
            ),
            "a.fits: truncated"
        );
    }
}
