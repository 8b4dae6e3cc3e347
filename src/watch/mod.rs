//! The daemon: decides *when* a file goes through the pipeline. File events (or polling)
//! name candidate files; the settle tracker says when each is complete; a bounded number
//! of workers measure them; the store records each exactly once. A periodic rescan of
//! the folders against the store catches anything an event missed, and at start-up it
//! catches up on frames that landed while the daemon was down.
//!
//! This module reads the wall clock and the file system; measurement and recording live
//! in `pipeline` and `store`.

pub mod alerts;
pub mod patterns;
pub mod settle;

use std::collections::{HashSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use notify::Watcher;
use tokio::sync::mpsc;
use tokio::task::JoinSet;

use crate::config::Config;
use crate::pipeline::{MeasureOptions, RecordOptions};
use crate::store::{FrameStatus, Identity, Store, StoreError};
use settle::{Observation, SettleTracker};

#[derive(Debug, thiserror::Error)]
pub enum WatchError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("cannot watch {path}: {source}")]
    Notify {
        path: PathBuf,
        #[source]
        source: notify::Error,
    },
    #[error("cannot start the runtime: {0}")]
    Runtime(std::io::Error),
}

fn unix_now() -> f64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0.0, |d| d.as_secs_f64())
}

fn observe(path: &Path) -> Option<(Observation, SystemTime)> {
    let m = std::fs::metadata(path).ok()?;
    if !m.is_file() {
        return None;
    }
    let mtime = m.modified().ok()?;
    let mtime_ns = mtime
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as i64);
    Some((
        Observation {
            size: m.len(),
            mtime_ns,
        },
        mtime,
    ))
}

/// Options derived from the configuration for each frame.
pub fn record_options(config: &Config) -> RecordOptions {
    let mut measure = MeasureOptions {
        focal_length_mm: config.optics.focal_length_mm,
        pixel_size_um: config.optics.pixel_size_um,
        ..Default::default()
    };
    measure.limits.max_pixels = config.measure.max_pixels;
    measure.params.detect.sigma = config.measure.detect_sigma;
    measure.params.gain_e_per_adu = config.optics.gain_e_per_adu;
    measure.params.saturation_adu = config.optics.saturation_adu;
    RecordOptions {
        measure,
        timezone: config.timezone(),
        calibration_folders: config
            .watch
            .calibration_folders
            .iter()
            .map(|s| s.to_lowercase())
            .collect(),
        measure_calibration: false,
    }
}

/// Every candidate frame under the watched folders (recursively).
fn scan(config: &Config) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack: Vec<PathBuf> = config.watch.folders.clone();
    while let Some(dir) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&dir) else {
            tracing::warn!("cannot read folder {}", dir.display());
            continue;
        };
        for e in entries.flatten() {
            let path = e.path();
            let Ok(ft) = e.file_type() else { continue };
            let name = e.file_name().to_string_lossy().into_owned();
            if ft.is_dir() {
                if !name.starts_with('.') && !config.ignored_folder(&name) {
                    stack.push(path);
                }
            } else if ft.is_file()
                && patterns::is_candidate(&name, &config.watch.include, &config.watch.exclude)
            {
                out.push(path);
            }
        }
    }
    out
}

/// Tell systemd (Type=notify) about our state, when it is listening.
fn sd_notify(state: &str) {
    let Some(socket) = std::env::var_os("NOTIFY_SOCKET") else {
        return;
    };
    let Ok(sock) = std::os::unix::net::UnixDatagram::unbound() else {
        return;
    };
    let name = socket.to_string_lossy().into_owned();
    let sent = if let Some(abstract_name) = name.strip_prefix('@') {
        #[cfg(target_os = "linux")]
        {
            use std::os::linux::net::SocketAddrExt;
            std::os::unix::net::SocketAddr::from_abstract_name(abstract_name.as_bytes())
                .and_then(|addr| sock.send_to_addr(state.as_bytes(), &addr))
        }
        #[cfg(not(target_os = "linux"))]
        {
            let _ = abstract_name;
            Ok(0)
        }
    } else {
        sock.send_to(state.as_bytes(), &name)
    };
    if let Err(e) = sent {
        tracing::debug!("sd_notify {state}: {e}");
    }
}

struct Shared {
    store: Mutex<Store>,
    options: RecordOptions,
    reader: crate::reader::Reader,
    judging: Judging,
    config: Config,
}

/// Move a frame into `folder` (created): a rename on the same file system; across file
/// systems a copy that is synced and compared byte for byte before the original is
/// removed. An existing file of the same name is never replaced.
pub fn move_file(src: &Path, folder: &Path) -> std::io::Result<PathBuf> {
    std::fs::create_dir_all(folder)?;
    let name = src
        .file_name()
        .ok_or_else(|| std::io::Error::other("no file name"))?;
    let mut dest = folder.join(name);
    let mut k = 1;
    while dest.exists() {
        dest = folder.join(format!("{}.{k}", name.to_string_lossy()));
        k += 1;
    }
    match std::fs::rename(src, &dest) {
        Ok(()) => Ok(dest),
        Err(e) if e.raw_os_error() == Some(libc::EXDEV) => {
            let part = dest.with_extension("part");
            std::fs::copy(src, &part)?;
            std::fs::File::open(&part)?.sync_all()?;
            if std::fs::read(&part)? != std::fs::read(src)? {
                let _ = std::fs::remove_file(&part);
                return Err(std::io::Error::other(
                    "the copy differs from the original; original kept",
                ));
            }
            std::fs::rename(&part, &dest)?;
            std::fs::remove_file(src)?;
            Ok(dest)
        }
        Err(e) => Err(e),
    }
}

/// Record an alert and, when mail is set up, queue and send it. Rate-limited per kind
/// and per night (see `alerts`). Returns what happened, for the log.
fn raise_alert(
    store: &Store,
    config: &Config,
    night: &str,
    kind: &str,
    message: &str,
) -> Option<String> {
    let now = unix_now();
    let limits = config.alerts.limits();
    let (last, tonight) = store.alert_history(night, kind).ok()?;
    if !alerts::allowed(&limits, now, last, tonight) {
        return None;
    }
    store.add_alert(night, kind, message, now).ok()?;
    let mailed = if config.alerts.enabled && !config.mail.to.is_empty() {
        let sent = crate::mail::MailSettings::from_config(config).and_then(|s| {
            crate::mail::compose_note(
                &s,
                &format!("subwatch alert ({kind}), night {night}"),
                message,
            )
        });
        match sent {
            Ok(c) => {
                let _ = store.enqueue_mail(&c, now);
                let _ = crate::morning::flush(store, config, now);
                " (mailed)"
            }
            Err(e) => {
                tracing::warn!("alert not mailed: {e}");
                ""
            }
        }
    } else {
        ""
    };
    Some(format!("alert {kind}: {message}{mailed}"))
}

/// Once a minute: frames stopped arriving, disk space, the scheduled summary, the outbox.
fn minute_checks(shared: &Shared) {
    let config = &shared.config;
    let now = unix_now();
    let tz = config.timezone();
    let Some(night) = crate::sky::night_label(now, tz) else {
        return;
    };
    let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
    let limits = config.alerts.limits();
    let dark = config.site_position().map(|(lat, lon, _)| {
        crate::sky::sun_altitude(crate::sky::julian_date(now), lat, lon) < -18.0
    });
    if let Ok(counts) = store.night_counts(&night) {
        if let Some(msg) = alerts::frames_stopped(&limits, now, counts.last_recorded_unix, dark) {
            if let Some(line) = raise_alert(&store, config, &night, "frames_stopped", &msg) {
                tracing::warn!("{line}");
            }
        }
    }
    for folder in &config.watch.folders {
        if let Some(free) = free_bytes(folder) {
            if let Some(msg) = alerts::low_disk(&limits, &folder.display().to_string(), free) {
                if let Some(line) = raise_alert(&store, config, &night, "low_disk", &msg) {
                    tracing::warn!("{line}");
                }
            }
        }
    }
    anomaly_alerts(&store, config, &night);
    summary_if_due(&store, config, now);
    if let Err(e) = crate::morning::flush(&store, config, now) {
        tracing::warn!("outbox: {e}");
    }
}

/// Run the night analysis over tonight's frames so far and alert on anomalies of the
/// chosen kinds, each once (same kind and place).
fn anomaly_alerts(store: &Store, config: &Config, night: &str) {
    if config.alerts.anomaly_kinds.is_empty() {
        return;
    }
    // Only when frames arrived since the last look.
    let stamp = store
        .night_counts(night)
        .ok()
        .and_then(|c| c.last_recorded_unix)
        .unwrap_or(0.0);
    let key = format!("anomaly_check:{night}");
    if store
        .meta(&key)
        .ok()
        .flatten()
        .and_then(|v| v.parse::<f64>().ok())
        == Some(stamp)
    {
        return;
    }
    let _ = store.set_meta(&key, &stamp.to_string());
    let Ok(records) = store.night_records(night) else {
        return;
    };
    if records.len() < 3 {
        return;
    }
    let Ok(doc) = crate::batch::analyse_records(&records, &[], config.site_position(), None) else {
        return;
    };
    for a in &doc.anomalies {
        let kind = serde_json::to_value(a.kind)
            .ok()
            .and_then(|v| v.as_str().map(String::from))
            .unwrap_or_default();
        if !config.alerts.anomaly_kinds.contains(&kind)
            || a.detail.get("cosmic_ray").and_then(|v| v.as_bool()) == Some(true)
        {
            continue;
        }
        let place = match (a.ra_deg, a.dec_deg) {
            (Some(r), Some(d)) => format!("at {} (J2000)", crate::report::sexagesimal(r, d)),
            _ => a.detections.first().map_or(String::new(), |d| {
                format!("at x={:.0} y={:.0} of {}", d.x, d.y, d.path)
            }),
        };
        let message = format!("{kind} {place}, seen in {} frame(s)", a.detections.len());
        let alert_kind = format!("anomaly_{kind}");
        // Once per anomaly: its count of frames and (for a moving object) its mean
        // position change as frames arrive, its first detection does not.
        let identity = alert_identity(night, &alert_kind, a);
        if store.meta(&identity).ok().flatten().is_some()
            || store
                .alert_exists(night, &alert_kind, &message)
                .unwrap_or(true)
        {
            continue;
        }
        if let Some(line) = raise_alert(store, config, night, &alert_kind, &message) {
            let _ = store.set_meta(&identity, &message);
            tracing::warn!("{line}");
        }
    }
}

/// A key that names one anomaly across the night's repeated analyses: its kind and its
/// first detection (frame and pixel, rounded), which later frames do not change.
fn alert_identity(night: &str, alert_kind: &str, a: &crate::contract::AnomalyRecord) -> String {
    let first = a.detections.first().map_or(String::new(), |d| {
        format!("{}:{:.0}:{:.0}", d.path, d.x, d.y)
    });
    format!("alerted:{night}:{alert_kind}:{first}")
}

/// Free bytes on the file system holding `folder`.
fn free_bytes(folder: &Path) -> Option<u64> {
    let c = std::ffi::CString::new(folder.as_os_str().as_encoded_bytes()).ok()?;
    let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
    // SAFETY: a valid C string and an out-pointer to a zeroed struct.
    let rc = unsafe { libc::statvfs(c.as_ptr(), &mut st) };
    (rc == 0).then(|| st.f_bavail as u64 * st.f_frsize as u64)
}

/// The morning summary of the night that just ended, once, at `summary_time` ("HH:MM"
/// local) or 30 minutes after astronomical dawn ("dawn", needs the site).
fn summary_if_due(store: &Store, config: &Config, now: f64) {
    let Some(when) = config.mail.summary_time.as_deref() else {
        return;
    };
    let tz = config.timezone();
    let Some(night) = crate::sky::night_label(now, tz) else {
        return;
    };
    let key = format!("summary:{night}");
    if store.meta(&key).ok().flatten().is_some() {
        return;
    }
    let local = chrono::DateTime::from_timestamp(now as i64, 0).map(|d| d.with_timezone(&tz));
    let Some(local) = local else { return };
    use chrono::Timelike;
    let minutes_now = local.hour() * 60 + local.minute();
    // The morning belongs to the night only before local noon.
    if minutes_now >= 12 * 60 {
        return;
    }
    let due = if when == "dawn" {
        let Some((lat, lon, _)) = config.site_position() else {
            return;
        };
        let evening = now - 86_400.0 * 0.75;
        match crate::sky::sun_crossings(evening, -18.0, lat, lon).1 {
            Some(dawn) => now >= dawn + 1800.0,
            None => false,
        }
    } else {
        let mut parts = when.split(':');
        let (h, m): (u32, u32) = match (
            parts.next().and_then(|x| x.parse().ok()),
            parts.next().and_then(|x| x.parse().ok()),
        ) {
            (Some(h), Some(m)) => (h, m),
            _ => return,
        };
        minutes_now >= h * 60 + m
    };
    if !due {
        return;
    }
    // The store is locked by the caller; prepare reads it through a second connection.
    let result = Store::open(&config.store.path)
        .map_err(crate::morning::MorningError::from)
        .and_then(|mut s| {
            let p = crate::morning::prepare(&mut s, config, &night)?;
            crate::morning::queue_mail(&s, config, &p, now)
        });
    match result {
        Ok(_) => {
            let _ = store.set_meta(&key, &now.to_string());
            tracing::info!("morning summary of {night} queued");
        }
        Err(e) => tracing::warn!("morning summary of {night}: {e}"),
    }
}

/// Measure and record one file on a worker thread. Returns what to log.
fn process(shared: &Shared, path: &Path) -> Option<String> {
    let (obs, mtime) = observe(path)?;
    let identity = Identity {
        path: path.to_string_lossy().into_owned(),
        size: obs.size,
        mtime_ns: obs.mtime_ns,
    };
    let mtime_unix = mtime
        .duration_since(UNIX_EPOCH)
        .map_or(0.0, |d| d.as_secs_f64());
    let record = shared
        .reader
        .record(path, identity, mtime_unix, &shared.options);
    let line = match (&record.status, &record.metrics) {
        (FrameStatus::Ok, Some(m)) => format!(
            "{} ok stars={} fwhm_px={} ecc={} bkg={:.1} noise={:.2}",
            path.display(),
            m.star_count,
            m.fwhm_px.map_or("-".into(), |v| format!("{v:.2}")),
            m.eccentricity.map_or("-".into(), |v| format!("{v:.2}")),
            m.background_adu,
            m.noise_adu
        ),
        (FrameStatus::Skipped, _) => format!(
            "{} skipped: {}",
            path.display(),
            record.error.as_deref().unwrap_or("")
        ),
        _ => format!(
            "{} error: {}",
            path.display(),
            record.error.as_deref().unwrap_or("")
        ),
    };
    let mut store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
    match store.record_returning_id(&record, unix_now()) {
        Ok(Some(id)) => {
            let verdict = judge_in_store(&store, &record, id, &shared.judging);
            let mut moved = String::new();
            if shared.config.actions.move_rejected
                && verdict
                    .as_ref()
                    .is_ok_and(|v| v.as_deref().is_some_and(|v| v.starts_with("reject")))
            {
                let folder = path
                    .parent()
                    .unwrap_or(Path::new("."))
                    .join(&shared.config.actions.rejected_folder);
                match move_file(path, &folder) {
                    Ok(dest) => {
                        let _ = store.set_path(id, &dest.to_string_lossy());
                        moved = format!(" moved to {}", dest.display());
                    }
                    Err(e) => moved = format!(" (not moved: {e})"),
                }
            }
            if let (Some(night), true) = (
                record.night.as_deref(),
                verdict.as_ref().is_ok_and(|v| v.is_some()),
            ) {
                let verdicts = store
                    .group_verdicts(night, record.target.as_deref(), record.filter.as_deref())
                    .unwrap_or_default();
                if let Some(msg) = alerts::reject_streak(&shared.config.alerts.limits(), &verdicts)
                {
                    if let Some(line) =
                        raise_alert(&store, &shared.config, night, "reject_streak", &msg)
                    {
                        tracing::warn!("{line}");
                    }
                }
            }
            Some(match verdict {
                Ok(Some(v)) => format!("{line} verdict={v}{moved}"),
                Ok(None) => line,
                Err(e) => format!("{line} (verdict not recorded: {e})"),
            })
        }
        Ok(None) => None,
        Err(e) => Some(format!("{}: not recorded: {e}", path.display())),
    }
}

/// Judge a just-recorded frame against the night so far (same target and filter), store
/// the verdict, and refresh the accepted-frames list when asked to. Later frames do not
/// change an earlier frame's verdict: what was logged stays what was decided.
/// What the live verdict needs besides the store.
#[derive(Debug, Clone, Default)]
pub struct Judging {
    pub rules: Vec<crate::rules::RuleSpec>,
    /// Latitude, east longitude, elevation.
    pub site: Option<(f64, f64, f64)>,
    /// Where accepted-frame lists go, when that action is on.
    pub lists_folder: Option<PathBuf>,
}

pub fn judge_in_store(
    store: &Store,
    record: &crate::store::FrameRecord,
    id: i64,
    judging: &Judging,
) -> Result<Option<String>, StoreError> {
    let stars: Vec<(f64, f64, f64, f64)> = record
        .stars
        .iter()
        .map(|s| (s.x, s.y, s.flux, s.snr))
        .collect();
    let key = crate::store::GroupKey {
        night: record.night.clone(),
        target: record.target.clone(),
        filter: record.filter.clone(),
        ok: record.status == FrameStatus::Ok,
        skipped: record.status == FrameStatus::Skipped,
    };
    judge_frame(store, &key, &stars, id, judging)
}

/// Frames recorded without a verdict (the daemon was stopped between the two writes)
/// are judged at start-up.
fn judge_missing(store: &Store, judging: &Judging) -> Result<usize, StoreError> {
    let missing = store.frames_without_verdict()?;
    for (id, key) in &missing {
        let stars = store.frame_stars(*id)?;
        judge_frame(store, key, &stars, *id, judging)?;
    }
    Ok(missing.len())
}

fn judge_frame(
    store: &Store,
    record: &crate::store::GroupKey,
    stars: &[(f64, f64, f64, f64)],
    id: i64,
    judging: &Judging,
) -> Result<Option<String>, StoreError> {
    let site = judging.site;
    let Some(night) = record.night.as_deref() else {
        return Ok(None);
    };
    if record.skipped {
        return Ok(None);
    }
    let mut group =
        store.group_metrics(night, record.target.as_deref(), record.filter.as_deref())?;
    // Transparency against the night's reference: the frame with the most stars among
    // the first ten of the group (fixed early, so each frame costs one registration).
    let reference = group
        .iter()
        .take(10)
        .filter(|g| g.status == "ok")
        .max_by_key(|g| g.metrics.as_ref().map_or(0, |m| m.star_count))
        .map(|g| g.id);
    if let (Some(r), true) = (reference, record.ok) {
        let (loss, rms) = if r == id {
            (Some(0.0), Some(0.0))
        } else {
            match crate::night::transparency_against(&store.frame_stars(r)?, stars) {
                Some((loss, rms)) => (loss, Some(rms)),
                None => (None, None),
            }
        };
        store.set_registration(id, loss, rms)?;
        if let Some(g) = group.iter_mut().find(|g| g.id == id) {
            g.transparency_loss_mag = loss;
            g.registration_rms_px = rms;
        }
    }
    let facts: Vec<crate::rules::FrameFacts> = group
        .iter()
        .map(|g| {
            let m = g.metrics.as_ref().filter(|_| g.status == "ok");
            let mut facts =
                crate::rules::FrameFacts::from_metrics(m, g.transparency_loss_mag, None);
            facts.sun_alt_deg = site.zip(g.time_unix).map(|((lat, lon, _), t)| {
                crate::sky::sun_altitude(crate::sky::julian_date(t), lat, lon)
            });
            facts
        })
        .collect();
    let judged = crate::rules::judge_group_with(&facts, &judging.rules);
    let Some(k) = group.iter().position(|g| g.id == id) else {
        return Ok(None);
    };
    let j = &judged[k];
    let verdict = serde_json::to_value(j.verdict)
        .ok()
        .and_then(|v| v.as_str().map(String::from))
        .unwrap_or_default();
    store.set_verdict(id, &verdict, &j.reasons)?;
    if let Some(folder) = judging.lists_folder.as_deref() {
        write_accepted_list(
            store,
            folder,
            night,
            record.target.as_deref(),
            record.filter.as_deref(),
        );
    }
    let reasons = if j.reasons.is_empty() {
        String::new()
    } else {
        format!(" ({})", j.reasons.join(","))
    };
    Ok(Some(format!("{verdict}{reasons}")))
}

/// `<folder>/<night>/<target>__<filter>.txt`: one accepted frame path per line, replaced
/// atomically (written beside, then renamed).
fn write_accepted_list(
    store: &Store,
    folder: &Path,
    night: &str,
    target: Option<&str>,
    filter: Option<&str>,
) {
    let clean = |s: Option<&str>| {
        s.unwrap_or("unknown")
            .chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                    c
                } else {
                    '_'
                }
            })
            .collect::<String>()
    };
    let dir = folder.join(night);
    let file = dir.join(format!("{}__{}.txt", clean(target), clean(filter)));
    let result = store
        .accepted_paths(night, target, filter)
        .map_err(|e| e.to_string())
        .and_then(|paths| {
            std::fs::create_dir_all(&dir).map_err(|e| e.to_string())?;
            let tmp = file.with_extension("txt.tmp");
            std::fs::write(&tmp, paths.join("\n") + "\n").map_err(|e| e.to_string())?;
            std::fs::rename(&tmp, &file).map_err(|e| e.to_string())
        });
    if let Err(e) = result {
        tracing::warn!("cannot write {}: {e}", file.display());
    }
}

/// Run the daemon until SIGTERM or SIGINT.
pub fn run(config: Config) -> Result<(), WatchError> {
    run_until(config, Arc::new(AtomicBool::new(false)))
}

/// Run the daemon until SIGTERM, SIGINT, or `stop` becoming true (the demo's way to end
/// it); frames in flight are finished either way.
pub fn run_until(config: Config, stop: Arc<AtomicBool>) -> Result<(), WatchError> {
    let workers = if config.watch.workers == 0 {
        std::thread::available_parallelism().map_or(2, |n| n.get())
    } else {
        config.watch.workers
    };
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .max_blocking_threads(workers.max(1) + 1)
        .enable_all()
        .build()
        .map_err(WatchError::Runtime)?;
    runtime.block_on(daemon(config, workers, stop))
}

async fn daemon(
    mut config: Config,
    workers: usize,
    stop: Arc<AtomicBool>,
) -> Result<(), WatchError> {
    // One spelling per file: events, scans and the store all see canonical paths.
    for folder in config.watch.folders.iter_mut() {
        *folder = std::fs::canonicalize(&*folder).map_err(|e| WatchError::Notify {
            path: folder.clone(),
            source: notify::Error::io(e),
        })?;
    }
    let store = Store::open(&config.store.path)?;
    let mut recorded: HashSet<Identity> = store.identities()?;
    let lists_folder = config.actions.accepted_lists.then(|| {
        config.actions.lists_folder.clone().unwrap_or_else(|| {
            config
                .store
                .path
                .parent()
                .unwrap_or(Path::new("."))
                .join("accepted")
        })
    });
    let shared = Arc::new(Shared {
        store: Mutex::new(store),
        options: record_options(&config),
        reader: config.measure.reader(),
        judging: Judging {
            rules: config.rule_specs(),
            site: config.site_position(),
            lists_folder,
        },
        config: config.clone(),
    });

    // File events: notify runs its own thread and only forwards paths.
    let (tx, mut rx) = mpsc::channel::<PathBuf>(8192);
    let overflow = Arc::new(AtomicBool::new(false));
    let _watcher = if config.watch.poll_seconds == 0.0 {
        let overflow = overflow.clone();
        let mut w =
            notify::recommended_watcher(move |res: notify::Result<notify::Event>| match res {
                Ok(ev) => {
                    for p in ev.paths {
                        if tx.try_send(p).is_err() {
                            overflow.store(true, Ordering::Relaxed);
                        }
                    }
                }
                Err(_) => overflow.store(true, Ordering::Relaxed),
            })
            .map_err(|source| WatchError::Notify {
                path: PathBuf::new(),
                source,
            })?;
        for folder in &config.watch.folders {
            w.watch(folder, notify::RecursiveMode::Recursive)
                .map_err(|source| WatchError::Notify {
                    path: folder.clone(),
                    source,
                })?;
        }
        Some(w)
    } else {
        drop(tx);
        None
    };

    let settle = config.watch.settle_seconds;
    let start = Instant::now();
    let clock = || start.elapsed().as_secs_f64();
    let mut tracker = SettleTracker::default();
    let mut ready: VecDeque<PathBuf> = VecDeque::new();
    let mut in_flight: HashSet<PathBuf> = HashSet::new();
    let mut jobs: JoinSet<(PathBuf, Option<String>)> = JoinSet::new();

    let consider = |path: PathBuf,
                    tracker: &mut SettleTracker,
                    recorded: &HashSet<Identity>,
                    in_flight: &HashSet<PathBuf>,
                    ready: &VecDeque<PathBuf>,
                    now: f64| {
        if in_flight.contains(&path) || tracker.contains(&path) || ready.contains(&path) {
            return;
        }
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        if !patterns::is_candidate(&name, &config.watch.include, &config.watch.exclude) {
            return;
        }
        // Hidden folders (a capture program's scratch space) are left alone, as the
        // rescan leaves them.
        let hidden = config.watch.folders.iter().any(|f| {
            path.strip_prefix(f).is_ok_and(|rel| {
                rel.parent()
                    .into_iter()
                    .flat_map(|p| p.components())
                    .any(|c| {
                        let name = c.as_os_str().to_string_lossy();
                        name.starts_with('.') || config.ignored_folder(&name)
                    })
                    || rel
                        .file_name()
                        .is_some_and(|n| n.to_string_lossy().starts_with('.'))
            })
        });
        if hidden {
            return;
        }
        let Some((obs, mtime)) = observe(&path) else {
            return;
        };
        let id = Identity {
            path: path.to_string_lossy().into_owned(),
            size: obs.size,
            mtime_ns: obs.mtime_ns,
        };
        if recorded.contains(&id) {
            return;
        }
        let age = SystemTime::now()
            .duration_since(mtime)
            .map_or(0.0, |d| d.as_secs_f64());
        tracker.track(path, obs, now, age);
    };

    {
        let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
        let judged = judge_missing(&store, &shared.judging)?;
        if judged > 0 {
            tracing::info!(
                "judged {judged} frame(s) recorded before the last stop without a verdict"
            );
        }
    }
    // Catch up: everything already in the folders that the store has not recorded.
    let mut initial = scan(&config);
    initial.sort_by_key(|p| observe(p).map(|(o, _)| o.mtime_ns).unwrap_or(0));
    for p in initial {
        consider(p, &mut tracker, &recorded, &in_flight, &ready, clock());
    }
    tracing::info!(
        "watching {} folder(s), {} frame(s) to catch up on, {} worker(s)",
        config.watch.folders.len(),
        tracker.len(),
        workers
    );
    sd_notify("READY=1");

    let tick = Duration::from_secs_f64((settle / 4.0).clamp(0.05, 1.0));
    let mut ticker = tokio::time::interval(tick);
    let rescan_every = if config.watch.poll_seconds > 0.0 {
        config.watch.poll_seconds
    } else {
        config.watch.rescan_seconds
    };
    let mut rescan = tokio::time::interval(Duration::from_secs_f64(rescan_every));
    rescan.tick().await;
    let mut heartbeat = tokio::time::interval(Duration::from_secs(2));
    let mut minute = tokio::time::interval(Duration::from_secs(60));
    let mut sigterm = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
        .map_err(WatchError::Runtime)?;
    let mut sigint = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::interrupt())
        .map_err(WatchError::Runtime)?;

    loop {
        tokio::select! {
            _ = sigterm.recv() => break,
            _ = sigint.recv() => break,
            Some(path) = rx.recv() => {
                consider(path, &mut tracker, &recorded, &in_flight, &ready, clock());
            }
            _ = rescan.tick() => {
                overflow.store(false, Ordering::Relaxed);
                for p in scan(&config) {
                    consider(p, &mut tracker, &recorded, &in_flight, &ready, clock());
                }
            }
            _ = minute.tick() => {
                let shared = shared.clone();
                let _ = tokio::task::spawn_blocking(move || minute_checks(&shared)).await;
            }
            _ = heartbeat.tick() => {
                let state = serde_json::json!({
                    "pid": std::process::id(),
                    "waiting": tracker.len() + ready.len(),
                    "in_flight": in_flight.len(),
                    "updated_unix": unix_now(),
                });
                let shared = shared.clone();
                let _ = tokio::task::spawn_blocking(move || {
                    let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
                    store.set_meta("daemon", &state.to_string())
                }).await;
            }
            Some(done) = jobs.join_next() => {
                match done {
                    Ok((path, line)) => {
                        in_flight.remove(&path);
                        if let Some(line) = line {
                            tracing::info!("{line}");
                        }
                        if let Some((obs, _)) = observe(&path) {
                            recorded.insert(Identity {
                                path: path.to_string_lossy().into_owned(),
                                size: obs.size,
                                mtime_ns: obs.mtime_ns,
                            });
                        }
                    }
                    Err(e) => tracing::error!("worker failed: {e}"),
                }
            }
            _ = ticker.tick() => {
                if stop.load(Ordering::Relaxed) {
                    break;
                }
                if overflow.swap(false, Ordering::Relaxed) {
                    // Events were dropped: the folders themselves are the truth.
                    for p in scan(&config) {
                        consider(p, &mut tracker, &recorded, &in_flight, &ready, clock());
                    }
                }
                let now = clock();
                for path in tracker.paths() {
                    if ready.len() >= config.watch.queue_limit {
                        break;
                    }
                    let obs = observe(&path).map(|(o, _)| o);
                    if tracker.observe(&path, obs, now, settle) {
                        // Complete by the header's own account (plain FITS), or not
                        // checkable (compressed): the settle time alone decides.
                        // A file that stays short for a long time was cut off (a
                        // crash mid-write): it is measured, and recorded with its error.
                        let given_up = tracker.stable_for(&path, now) > (10.0 * settle).max(60.0);
                        if given_up || crate::frame::fits::looks_complete(&path) != Some(false) {
                            tracker.forget(&path);
                            ready.push_back(path);
                        }
                    }
                }
            }
        }
        while in_flight.len() < workers {
            let Some(path) = ready.pop_front() else { break };
            in_flight.insert(path.clone());
            let shared = shared.clone();
            jobs.spawn_blocking(move || {
                let line = process(&shared, &path);
                (path, line)
            });
        }
    }

    tracing::info!("stopping: finishing {} frame(s) in flight", in_flight.len());
    sd_notify("STOPPING=1");
    let deadline = tokio::time::sleep(Duration::from_secs(120));
    tokio::pin!(deadline);
    while !jobs.is_empty() {
        tokio::select! {
            _ = &mut deadline => {
                tracing::warn!("gave up waiting for {} frame(s); they will be measured at the next start", jobs.len());
                break;
            }
            Some(done) = jobs.join_next() => {
                if let Ok((_, Some(line))) = done {
                    tracing::info!("{line}");
                }
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::contract::{AnomalyRecord, DetectionRecord};
    use crate::night::AnomalyKind;

    fn moving(frames: usize, ra: f64) -> AnomalyRecord {
        AnomalyRecord {
            kind: AnomalyKind::Moving,
            ra_deg: Some(ra),
            dec_deg: Some(12.5),
            detections: (0..frames)
                .map(|i| DetectionRecord {
                    path: format!("/data/kfa_{i:03}.fits"),
                    x: 100.2 + 3.0 * i as f64,
                    y: 200.4,
                })
                .collect(),
            detail: serde_json::Value::Null,
            target: None,
            filter: None,
        }
    }

    #[test]
    fn a_growing_track_keeps_its_alert_identity() {
        // Later analyses of the same asteroid see more frames and a shifted mean position.
        let early = alert_identity("2026-12-01", "anomaly_moving", &moving(3, 40.01));
        let later = alert_identity("2026-12-01", "anomaly_moving", &moving(9, 40.03));
        assert_eq!(early, later);
        let mut other = moving(3, 40.01);
        other.detections[0].x += 50.0;
        assert_ne!(
            early,
            alert_identity("2026-12-01", "anomaly_moving", &other)
        );
        assert_ne!(
            early,
            alert_identity("2026-12-02", "anomaly_moving", &moving(3, 40.01))
        );
    }
}
