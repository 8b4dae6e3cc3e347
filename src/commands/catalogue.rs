//! `subwatch catalogue import`: the configured catalogue files checked and indexed once,
//! and the same step run quietly by every command that fits frames to the sky.

use std::process::ExitCode;

use anyhow::{Context, Result};

/// Build the catalogue's index when it is missing or stale, saying so (a million stars
/// take some seconds, once). A catalogue that cannot be read stops nothing: frames are
/// still measured and judged, with the last good index (the one built before the files
/// changed) or without one, and the problem is logged as an error naming the file, the
/// row and the column. A catalogue edited mid-night must not keep a daemon from
/// starting, nor a restart loop from a unit's `Restart=on-failure`.
pub fn prepare(cfg: &subwatch::config::CatalogueConfig) {
    if cfg.files.is_empty() {
        return;
    }
    let started = std::time::Instant::now();
    match subwatch::catalogue_import::ensure(cfg, false) {
        Ok(Some(done)) if done.built => tracing::info!(
            "catalogue: {} stars from {} file(s) indexed into {} in {:.1} s",
            done.stars,
            cfg.files.len(),
            done.index.display(),
            started.elapsed().as_secs_f64()
        ),
        Ok(_) => {}
        Err(e) => {
            let kept = subwatch::catalogue_import::index_path(cfg).filter(|p| p.exists());
            let instead = match kept {
                Some(p) => format!(
                    "the index built from the files' last good version stays in use ({})",
                    p.display()
                ),
                None => "frames are measured and judged without a catalogue".to_string(),
            };
            tracing::error!(
                "the star catalogue ([catalogue] files) cannot be read: {e}; {instead}; fix the file, then `subwatch catalogue import` (or a restart) indexes it"
            );
        }
    }
}

/// `subwatch catalogue import --config CFG [--force]`.
pub fn import(config: &std::path::Path, force: bool) -> Result<ExitCode> {
    let c = subwatch::config::load(config)?;
    if c.catalogue.files.is_empty() {
        anyhow::bail!(
            "{}: no [catalogue] files to import; name them with files = [\"stars.csv\"]",
            config.display()
        );
    }
    let started = std::time::Instant::now();
    let done = subwatch::catalogue_import::ensure(&c.catalogue, force)
        .context("the star catalogue ([catalogue] files)")?
        .context("no catalogue index path")?;
    outln!(
        "{} stars from {} file(s) {} {} ({:.1} s)",
        done.stars,
        c.catalogue.files.len(),
        if done.built {
            "indexed into"
        } else {
            "already indexed in"
        },
        done.index.display(),
        started.elapsed().as_secs_f64()
    )?;
    Ok(ExitCode::SUCCESS)
}
