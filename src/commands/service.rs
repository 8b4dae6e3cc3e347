//! `subwatch service`: the daemon as a Windows service (install, uninstall, start, stop,
//! and `run`, which the service control manager starts). Elsewhere each says that it is
//! for Windows and that systemd runs the daemon on Linux.

use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use anyhow::{Context, Result};

/// `service install`: register the service with the configuration's absolute path,
/// after the same check `watch` makes at its start.
pub fn install(config: &Path) -> Result<ExitCode> {
    subwatch::os::service_manager_here()?;
    let absolute = std::path::absolute(config)
        .with_context(|| format!("{}: cannot make the path absolute", config.display()))?;
    // A configuration that does not read is said now, not in the service's log at boot.
    subwatch::config::load(&absolute)?;
    subwatch::os::service_install(&absolute)?;
    outln!(
        "service '{}' installed: starts with Windows and runs `subwatch service run --config {}`",
        subwatch::os::SERVICE_NAME,
        absolute.display()
    )?;
    if let Some(logs) = subwatch::os::service_log_folder() {
        outln!(
            "start it now with `subwatch service start`; its log: {}",
            logs.display()
        )?;
    }
    Ok(ExitCode::SUCCESS)
}

pub fn uninstall() -> Result<ExitCode> {
    subwatch::os::service_uninstall()?;
    outln!(
        "service '{}' stopped and removed (its log, store and reports stay)",
        subwatch::os::SERVICE_NAME
    )?;
    Ok(ExitCode::SUCCESS)
}

pub fn start() -> Result<ExitCode> {
    subwatch::os::service_start()?;
    outln!("service '{}' starting", subwatch::os::SERVICE_NAME)?;
    Ok(ExitCode::SUCCESS)
}

pub fn stop() -> Result<ExitCode> {
    subwatch::os::service_stop()?;
    outln!(
        "service '{}' stopping (it finishes the frames being read first)",
        subwatch::os::SERVICE_NAME
    )?;
    Ok(ExitCode::SUCCESS)
}

/// `service run`: the daemon under the service control manager, logging into the daily
/// files. Its stop control raises `stop`, which ends `watch::run_until` as SIGTERM ends
/// `watch`.
pub fn run(config: PathBuf) -> Result<ExitCode> {
    subwatch::os::service_manager_here()?;
    let daemon: subwatch::os::Daemon = Box::new(move |stop: Arc<AtomicBool>| {
        let loaded = subwatch::config::load(&config);
        let keep_days = loaded
            .as_ref()
            .map_or(subwatch::config::LogConfig::default().keep_days, |c| {
                c.log.keep_days
            });
        if let Some(logs) = subwatch::os::service_log_folder() {
            if let Err(e) = subwatch::logging::daily::init(&logs, keep_days, "info") {
                return Err(format!("cannot write the log into {}: {e}", logs.display()));
            }
        }
        // A reason to stop is logged once, by the service as it reports it.
        let cfg = loaded.map_err(|e| e.to_string())?;
        let (errors, warnings) = cfg.check_environment();
        for w in &warnings {
            tracing::warn!("{w}");
        }
        if !errors.is_empty() {
            return Err(format!("{}: {}", config.display(), errors.join("; ")));
        }
        crate::commands::catalogue::prepare(&cfg.catalogue);
        subwatch::watch::run_until(cfg, stop).map_err(|e| e.to_string())
    });
    subwatch::os::run_service(daemon)?;
    Ok(ExitCode::SUCCESS)
}
