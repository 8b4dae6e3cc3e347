//! `subwatch catalogue import`: the configured catalogue files checked and indexed once,
//! and the same step run quietly by every command that fits frames to the sky.

use std::process::ExitCode;

use anyhow::{Context, Result};

/// Build the catalogue's index when it is missing or stale, saying so on stderr (a
/// million stars take some seconds, once).
pub fn prepare(cfg: &subwatch::config::CatalogueConfig) -> Result<()> {
    if cfg.files.is_empty() {
        return Ok(());
    }
    let started = std::time::Instant::now();
    if let Some(done) = subwatch::catalogue_import::ensure(cfg, false)
        .context("the star catalogue ([catalogue] files)")?
    {
        if done.built {
            tracing::info!(
                "catalogue: {} stars from {} file(s) indexed into {} in {:.1} s",
                done.stars,
                cfg.files.len(),
                done.index.display(),
                started.elapsed().as_secs_f64()
            );
        }
    }
    Ok(())
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
    println!(
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
    );
    Ok(ExitCode::SUCCESS)
}
