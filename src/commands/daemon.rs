//! The daemon's commands: `watch`, `check-config`, `status` and `outbox`.

use std::path::Path;
use std::process::ExitCode;

use anyhow::{Context, Result};

/// `subwatch watch`: the settings checked, then the daemon until it is stopped.
pub fn watch(config: &Path) -> Result<ExitCode> {
    let cfg = subwatch::config::load(config)?;
    let (errors, warnings) = cfg.check_environment();
    // Said before anything else, where the start's log begins (a store reached
    // unencrypted, mail written to files).
    for w in &warnings {
        tracing::warn!("{w}");
    }
    if !errors.is_empty() {
        anyhow::bail!("{}: {}", config.display(), errors.join("; "));
    }
    crate::commands::catalogue::prepare(&cfg.catalogue);
    subwatch::watch::run(cfg)?;
    Ok(ExitCode::SUCCESS)
}

/// `subwatch check-config`: every setting and the machine checked, each problem with its
/// key and line; the catalogue read and the shared store reached, nothing written; a test
/// mail on request.
pub fn check_config(config: &Path, send_test: bool) -> Result<ExitCode> {
    let cfg = subwatch::config::load(config)?;
    let (mut errors, warnings) = cfg.environment_problems();
    for w in &warnings {
        outln!("warning: {w}")?;
    }
    // Read and parsed as an import would, and the index only looked at: building it is
    // the first daemon's (or `catalogue import`'s) to do.
    match subwatch::catalogue_import::check(&cfg.catalogue) {
        Ok(None) => {}
        Ok(Some(c)) => outln!(
            "catalogue: {} rows in {} file(s) read without a problem; {}",
            c.stars,
            cfg.catalogue.files.len(),
            if c.current {
                format!("their index in {} is current", c.index.display())
            } else {
                format!(
                    "the first command that needs their index builds it in {} (the daemon at its start, or `subwatch catalogue import` now)",
                    c.index.display()
                )
            }
        )?,
        Err(problems) => errors.extend(
            problems
                .iter()
                .map(|e| cfg.located("catalogue.files", e.to_string())),
        ),
    }
    for e in &errors {
        outln!("error: {e}")?;
    }
    if !errors.is_empty() {
        return Ok(ExitCode::from(1));
    }
    if cfg.store.url.is_some() {
        // A shared store is reached now (address, password, TLS), and left as it is.
        let location = subwatch::store::Location::from_config(&cfg.store);
        match subwatch::store::probe(&location) {
            Ok(0) => {
                outln!("store: reached {location} (no tables yet: the first daemon makes them)")?
            }
            Ok(v) => outln!("store: reached {location} (schema version {v})")?,
            Err(e) => {
                let key = if e.is_login_refused() && cfg.store.password_file.is_some() {
                    "store.password_file"
                } else {
                    "store.url"
                };
                outln!("error: {}", cfg.located(key, e.to_string()))?;
                return Ok(ExitCode::from(1));
            }
        }
    }
    match subwatch::os::service_log_folder() {
        Some(folder) => outln!(
            "log: the service writes a file a day into {} and keeps {} day(s) of them",
            folder.display(),
            cfg.log.keep_days
        )?,
        None if cfg.lines.contains_key("log.keep_days") => outln!(
            "note: {}",
            cfg.located(
                "log.keep_days",
                "applies to the Windows service's daily files; here the log goes to stderr (the journal under systemd)".into()
            )
        )?,
        None => {}
    }
    outln!("{}: ok", config.display())?;
    if send_test {
        let settings = subwatch::mail::MailSettings::from_config(&cfg)?;
        let note = subwatch::mail::compose_note(
                &settings,
                "subwatch test mail",
                "This is a test of subwatch's mail settings. Morning summaries and alerts will come this way.",
            )?;
        let folder = subwatch::morning::report_folder(&cfg);
        match subwatch::outbox::deliver(&settings, &note.into(), &folder, "subwatch-test.eml")? {
            subwatch::outbox::Delivered::Sent => outln!(
                "test mail sent through {}:{}",
                settings.host.as_deref().unwrap_or(""),
                settings.port
            )?,
            subwatch::outbox::Delivered::Written(path) => {
                outln!("no smtp_host: test mail written to {}", path.display())?
            }
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// `subwatch outbox`: deliver what waits in the outbox.
pub fn outbox(config: &Path, now: bool) -> Result<ExitCode> {
    let cfg = subwatch::config::load(config)?;
    let store = subwatch::store::Store::open_configured(&cfg)?;
    let r = subwatch::morning::flush_outbox(
        &store,
        &cfg,
        subwatch::clock::now_unix(),
        if now {
            subwatch::outbox::Due::Now
        } else {
            subwatch::outbox::Due::AsScheduled
        },
    )?;
    outln!(
        "sent {}, written {}, failed {}",
        r.sent,
        r.written.len(),
        r.failed.len()
    )?;
    for f in &r.failed {
        eprintln!("{f}");
    }
    Ok(if r.failed.is_empty() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(3)
    })
}

/// `subwatch status`: tonight so far, and whether the daemon runs.
pub fn status(config: &Path, night: Option<String>, json: bool, site: bool) -> Result<ExitCode> {
    let night = night
        .as_deref()
        .map(super::night::night_label)
        .transpose()?;
    let cfg = subwatch::config::load(config)?;
    let now = subwatch::clock::now_unix();
    let store = subwatch::store::Store::open_configured(&cfg)?;
    // The night in progress is the one the frames' own DATE-OBS put the latest frame in
    // (frames of an earlier night, copied in today, are still that night); the wall
    // clock decides only before any dated frame is recorded.
    let (night, placed_by) = match night {
        Some(n) => (n, "as asked"),
        None => match super::night::latest_night(&store)? {
            Some(chosen) => chosen,
            None => (
                subwatch::sky::night_label(now, cfg.timezone()).context("clock out of range")?,
                "tonight by the clock: no frame recorded yet",
            ),
        },
    };
    let counts = store.night_counts(&night)?;
    let daemon: Option<serde_json::Value> = store
        .meta("daemon")?
        .and_then(|s| serde_json::from_str(&s).ok());
    // Running means holding the store's daemon lock, which goes when the process does,
    // however it ends; a heartbeat alone would outlive a killed daemon.
    let running_pid = subwatch::store::configured_daemon_pid(&cfg);
    let alive = running_pid.is_some();
    let rigs = if site {
        site_status(store, &cfg, &night)?
    } else {
        Vec::new()
    };
    if json {
        let mut doc = serde_json::json!({
            "night": night,
            "night_placed_by": placed_by,
            "counts": counts,
            "daemon": daemon,
            "daemon_running": alive,
            "daemon_pid": running_pid,
        });
        if site {
            doc["rigs"] = serde_json::to_value(&rigs)?;
        }
        outln!("{doc}")?;
    } else {
        outln!("night {night} ({placed_by})")?;
        outln!(
            "  frames {}  measured {}  errors {}  skipped {}  warned {}  rejected {}",
            counts.frames,
            counts.measured,
            counts.errors,
            counts.skipped,
            counts.warned,
            counts.rejected
        )?;
        if counts.undated > 0 {
            outln!(
                "  {} frame(s) without a readable DATE-OBS, placed in this night by the file's time",
                counts.undated
            )?;
        }
        if let Some(t) = counts.last_recorded_unix {
            outln!("  last frame recorded {:.0} s ago", now - t)?;
        }
        match (&daemon, running_pid) {
            (Some(d), Some(pid)) => outln!(
                "  daemon running (process {pid}): {} waiting, {} being read",
                d["waiting"],
                d["in_flight"]
            )?,
            (None, Some(pid)) => outln!("  daemon running (process {pid})")?,
            (_, None) => outln!("  daemon not running")?,
        }
        for r in &rigs {
            outln!(
                "rig {}: frames {}  measured {}  warned {}  rejected {}  daemon {}",
                if r.rig.is_empty() {
                    "(unnamed)"
                } else {
                    &r.rig
                },
                r.counts.frames,
                r.counts.measured,
                r.counts.warned,
                r.counts.rejected,
                r.daemon
                    .as_deref()
                    .map_or("not running".to_string(), |d| format!(
                        "running (process {d})"
                    ))
            )?;
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// One rig of the site in `status --site`.
#[derive(serde::Serialize)]
struct RigStatus {
    rig: String,
    counts: subwatch::store::NightCounts,
    /// The daemon holding the rig now ("PID on HOST"), if one does.
    daemon: Option<String>,
}

/// Every rig with frames in `night`, with its counts and whether its daemon runs.
fn site_status(
    mut store: subwatch::store::Store,
    cfg: &subwatch::config::Config,
    night: &str,
) -> Result<Vec<RigStatus>> {
    let location = subwatch::store::Location::from_config(&cfg.store);
    let mut out = Vec::new();
    for rig in store.night_rigs(night)? {
        let counts = store.as_rig(&rig, |s| s.night_counts(night))?;
        let daemon = match &location {
            subwatch::store::Location::File(path) => (rig == cfg.rig.name)
                .then(|| subwatch::store::daemon_pid(path).map(|p| p.to_string()))
                .flatten(),
            server => subwatch::store::rig_daemon(server, &rig),
        };
        out.push(RigStatus {
            rig,
            counts,
            daemon,
        });
    }
    Ok(out)
}
