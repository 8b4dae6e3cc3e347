//! The daemon's checks once a minute and its alerts: frames stopped arriving, low disk
//! space where frames, the store or the reports are written, anomalies of the chosen
//! kinds, the morning summary when it is due, and the outbox. Decisions are made by
//! the pure `alerts`; this module gathers the facts, records and sends.

use std::path::{Path, PathBuf};

use super::{alerts, Shared};
use crate::config::Config;
use crate::store::Store;

/// Record an alert and, when mail is set up, queue and send it. Rate-limited per kind
/// and per night (see `alerts`). Returns what happened, for the log.
pub(super) fn raise_alert(
    store: &Store,
    config: &Config,
    night: &str,
    kind: &str,
    message: &str,
    now: f64,
) -> Option<String> {
    let limits = alerts::AlertLimits::from_config(&config.alerts);
    let (last, tonight) = store.alert_history(night, kind).ok()?;
    if !alerts::allowed(&limits, now, last, tonight) {
        return None;
    }
    store.add_alert(night, kind, message, now).ok()?;
    let mailed = if !config.alerts.enabled {
        " (not delivered: [alerts] enabled = false)"
    } else if config.mail.to.is_empty() {
        " (not delivered: no [mail] recipients configured)"
    } else {
        let sent = crate::mail::MailSettings::from_config(config).and_then(|s| {
            crate::mail::compose_note(
                &s,
                &format!("subwatch alert ({kind}), night {night}"),
                message,
            )
        });
        match sent {
            Ok(c) => match crate::outbox::queue(store, c, now) {
                Ok(_) => {
                    flush_outbox(store, config, now);
                    " (mail queued)"
                }
                Err(e) => {
                    tracing::error!("alert not queued for mail: {e}");
                    " (not delivered: the outbox refused it)"
                }
            },
            Err(e) => {
                tracing::warn!("alert not mailed: {e}");
                " (not delivered: the mail settings are incomplete)"
            }
        }
    };
    Some(format!("alert {kind}: {message}{mailed}"))
}

/// Once a minute: frames stopped arriving, disk space, the scheduled summary, the outbox.
pub(super) fn minute_checks(shared: &Shared) {
    let config = &shared.config;
    let now = shared.clock.now_unix();
    let tz = config.timezone();
    let Some(night) = crate::sky::night_label(now, tz) else {
        return;
    };
    let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
    // While the store is away the checks wait for it (the frames kept say when it is
    // back); they would only fail, each with its own line.
    match store.night_counts(&night) {
        Ok(_) => shared.outage.answered(now, 0),
        Err(e) if shared.outage.failed(&e, now) => return,
        Err(_) => {}
    }
    let limits = alerts::AlertLimits::from_config(&config.alerts);
    let dark = super::schedule::dark(now, config.site_position());
    if let Ok(counts) = store.night_counts(&night) {
        if let Some(msg) = alerts::frames_stopped(&limits, now, counts.last_recorded_unix, dark) {
            if let Some(line) = raise_alert(&store, config, &night, "frames_stopped", &msg, now) {
                tracing::warn!("{line}");
            }
        }
    }
    let free: Vec<(String, u64)> = free_space(&written_folders(&shared.config))
        .into_iter()
        .map(|(folder, bytes)| (crate::logging::shown(&folder), bytes))
        .collect();
    if let Some(msg) = alerts::low_disk(&limits, &free) {
        if let Some(line) = raise_alert(&store, config, &night, "low_disk", &msg, now) {
            tracing::warn!("{line}");
        }
    }
    // Frames recorded while their verdict could not be stored (a failing store).
    match super::judge::judge_missing(&store, &shared.judging) {
        Ok(0) => {}
        Ok(n) => tracing::info!("judged {n} frame(s) recorded earlier without a verdict"),
        Err(e) => tracing::error!("judging frames left without a verdict: {e}"),
    }
    // Anomalies belong to the night the frames' DATE-OBS place them in, which is not
    // the clock's night when frames of another night are copied in.
    let frames_night = store
        .latest_dated_night()
        .ok()
        .flatten()
        .unwrap_or_else(|| night.clone());
    anomaly_alerts(&store, config, &frames_night, now);
    summary_if_due(&store, config, now);
    flush_outbox(&store, config, now);
}

/// Run the night analysis over tonight's frames so far and alert on anomalies of the
/// chosen kinds, each once (same kind and place).
fn anomaly_alerts(store: &Store, config: &Config, night: &str, now: f64) {
    if config.alerts.anomaly_kinds.is_empty() && config.voevent.folder.is_none() {
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
    // Earlier nights' catalogues are read, so a new source can be alerted on tonight;
    // tonight's catalogue is kept by the morning's judgement, not here.
    let Ok(doc) = crate::batch::analyse_records(
        &records,
        &config.rule_specs(),
        config.site_position(),
        crate::batch::Catalogues::Read(store),
        &config.calibration.settings,
    ) else {
        return;
    };
    match crate::events::write_voevents(&doc, config, night, now) {
        Ok(written) => {
            for p in written {
                tracing::info!("VOEvent written: {}", crate::logging::shown(&p));
            }
        }
        Err(e) => tracing::warn!("{e}"),
    }
    for a in &doc.anomalies {
        let kind = a.kind.name();
        if !config.alerts.anomaly_kinds.contains(&a.kind) || a.detail.is_cosmic_ray() {
            continue;
        }
        let message = anomaly_message(a);
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
        if let Some(line) = raise_alert(store, config, night, &alert_kind, &message, now) {
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

/// Every folder the daemon reads frames from or writes into: the capture folders, the
/// store's folder, the reports and the lists.
pub(super) fn written_folders(c: &Config) -> Vec<PathBuf> {
    let mut folders = c.watch.folders.clone();
    if c.store.url.is_none() {
        folders.extend(c.store.path.parent().map(Path::to_path_buf));
    }
    folders.push(crate::morning::report_folder(c));
    folders.extend(crate::lists::Lists::from_config(c).map(|l| l.folder));
    folders
}

/// Free bytes of each file system holding one of `folders`, once per file system (the
/// first folder named for it). A folder not made yet counts by its nearest parent.
pub(super) fn free_space(folders: &[PathBuf]) -> Vec<(PathBuf, u64)> {
    let mut seen = std::collections::HashSet::new();
    let mut out = Vec::new();
    for folder in folders {
        let Some(existing) = folder.ancestors().find(|p| p.exists()) else {
            continue;
        };
        let Some(file_system) = crate::os::file_system_of(existing) else {
            continue;
        };
        if seen.insert(file_system) {
            if let Some(free) = crate::os::free_bytes(existing) {
                out.push((folder.clone(), free));
            }
        }
    }
    out
}

/// Deliver what is due in the outbox and say what happened.
pub(super) fn flush_outbox(store: &Store, config: &Config, now: f64) {
    match crate::morning::flush(store, config, now) {
        Ok(r) => {
            if r.sent > 0 {
                tracing::info!("mail sent: {} message(s)", r.sent);
            }
            for p in &r.written {
                tracing::info!(
                    "mail written to {} (no smtp_host)",
                    crate::logging::shown(p)
                );
            }
            for f in &r.failed {
                tracing::warn!("mail not sent yet, kept in the outbox: {f}");
            }
        }
        Err(e) => tracing::error!("outbox: {e}"),
    }
}

/// How long a daemon may take to make a site's summary before another may take over.
const SITE_SUMMARY_LEASE_SECONDS: f64 = 600.0;

/// The morning summary of the night that just ended, once, when `schedule` says it is
/// due.
fn summary_if_due(store: &Store, config: &Config, now: f64) {
    let Some(when) = config.mail.summary_time else {
        return;
    };
    let Some(night) =
        super::schedule::summary_due(when, now, config.timezone(), config.site_position())
    else {
        return;
    };
    let key = format!("summary:{night}");
    if store.meta(&key).ok().flatten().is_some() {
        return;
    }
    // A site's summary is sent by one daemon: the one that takes the site's lease. A
    // daemon that dies holding it lets it run out, and another sends the summary then.
    let site = config.mail.summary_of_site;
    let holder = format!("rig '{}' (process {})", config.rig.name, std::process::id());
    let lease = if site {
        match store.take_lease(&key, &holder, now, SITE_SUMMARY_LEASE_SECONDS) {
            Ok(Some(lease)) => Some(lease),
            Ok(None) => return,
            Err(e) => {
                tracing::error!("site summary of {night}: {e}");
                return;
            }
        }
    } else {
        None
    };
    // The store is locked by the caller; prepare reads it through a second connection.
    let result = Store::open_configured(config)
        .map_err(crate::morning::MorningError::from)
        .and_then(|mut s| {
            let p = crate::morning::prepare(&mut s, config, &night)?;
            crate::morning::queue_mail(&s, config, &p, now)
        });
    match result {
        Ok(_) => {
            if let Err(e) = store.set_meta(&key, &now.to_string()) {
                tracing::error!("morning summary of {night} queued, but not marked sent: {e}");
            }
            if let Some(lease) = &lease {
                match store.finish_lease(&key, lease, &holder, now) {
                    Ok(true) => {}
                    Ok(false) => tracing::warn!(
                        "site summary of {night}: queued after this daemon's lease ran out; another daemon may send it too"
                    ),
                    Err(e) => {
                        tracing::error!("site summary of {night} queued, but not marked sent: {e}")
                    }
                }
            }
            tracing::info!(
                "morning summary of {night}{} queued for mail",
                if site { " (every rig of the site)" } else { "" }
            );
        }
        Err(e) => {
            if let Some(lease) = &lease {
                let _ = store.release_lease(&key, lease);
            }
            tracing::error!("morning summary of {night} not made: {e}");
        }
    }
}

/// What an anomaly alert says: the group, the kind, where on the sky, what was measured,
/// and the frames it was seen in.
fn anomaly_message(a: &crate::contract::AnomalyRecord) -> String {
    let place = match (a.ra_deg, a.dec_deg) {
        (Some(r), Some(d)) => format!(" at {} (J2000)", crate::report::sexagesimal(r, d)),
        _ => String::new(),
    };
    let frames = match (a.detections.first(), a.detections.last()) {
        (Some(first), Some(last)) if a.detections.len() > 1 => format!(
            "seen in {} frames, from {} (x={:.0}, y={:.0}) to {}",
            a.detections.len(),
            crate::report::file_name(&first.path),
            first.x,
            first.y,
            crate::report::file_name(&last.path)
        ),
        (Some(d), _) => format!(
            "seen in {} (x={:.0}, y={:.0})",
            crate::report::file_name(&d.path),
            d.x,
            d.y
        ),
        _ => String::new(),
    };
    format!(
        "{}: {}{place}: {}; {frames}",
        crate::report::group_heading(a.target.as_deref(), a.filter.as_deref()),
        a.kind.name(),
        crate::report::what(a)
    )
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
            detail: crate::night::Detail::Moving(crate::night::detail::MovingDetail {
                rate_arcsec_per_min: None,
                position_angle_deg: None,
                rate_px_per_min: 3.0,
                frames,
                instrumental_mag: None,
            }),
            target: None,
            filter: None,
            catalogue: None,
            catalogue_depth_mag: None,
            mag: None,
            mag_err: None,
            mag_band: None,
        }
    }

    #[test]
    fn free_space_is_watched_where_frames_the_store_reports_and_lists_are() {
        let dir = tempfile::tempdir().unwrap();
        let mut c = Config::default();
        c.watch.folders = vec![dir.path().join("capture")];
        c.store.path = Path::new("/dev/shm/subwatch-test/s.db").to_path_buf();
        c.report.folder = Some(dir.path().join("reports/not-made-yet"));
        c.actions.accepted_lists = true;
        let folders = written_folders(&c);
        assert_eq!(
            folders,
            vec![
                dir.path().join("capture"),
                PathBuf::from("/dev/shm/subwatch-test"),
                dir.path().join("reports/not-made-yet"),
                PathBuf::from("/dev/shm/subwatch-test/accepted"),
            ]
        );
        // One entry per file system, named by the first folder on it; folders not made
        // yet count by their nearest parent.
        let free = free_space(&folders);
        let devices = |p: &Path| {
            crate::os::file_system_of(p.ancestors().find(|a| a.exists()).unwrap()).unwrap()
        };
        let distinct: std::collections::HashSet<String> =
            folders.iter().map(|f| devices(f)).collect();
        assert_eq!(free.len(), distinct.len());
        assert_eq!(free[0].0, dir.path().join("capture"));
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
