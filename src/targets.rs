//! A target across nights, from the store to the files: its summary (`season`) with the
//! configuration's rules and plan, written as a JSON document, a plot and the lists of
//! frames to stack across all nights; and each planned target's progress line for the
//! morning summary and the status page. A shell over `store`, `season`, `report::season`
//! and `lists`.

use std::path::{Path, PathBuf};

use crate::config::Config;
use crate::season::{self, Best, TargetDocument};
use crate::store::{Store, StoreError};

#[derive(Debug, thiserror::Error)]
pub enum TargetError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("{0}")]
    Write(String),
}

/// A target's summary across every night the store holds of it (this rig's, or every
/// rig's for a site handle), judged with the configuration's rules and plan.
pub fn document(
    store: &Store,
    config: &Config,
    target: &str,
    best: Best,
) -> Result<TargetDocument, StoreError> {
    let mut frames = store.target_frames(target)?;
    // Frames recorded before their brightest stars' SNR was kept with them: from their
    // stars in the store, once each.
    for f in frames.iter_mut().filter(|f| f.readable) {
        if let Some(q) = f.quality.as_mut().filter(|q| q.bright_snr.is_none()) {
            let stars = store.frame_star_records(f.id)?;
            q.bright_snr = Some(season::weight::bright_snr(
                stars.iter().map(|s| (s.flux, s.snr)),
            ));
        }
    }
    let rules = config.rule_specs();
    Ok(season::summarise(
        target,
        &frames,
        season::Settings {
            stack_warned: config.actions.stack_warned,
            rules: &rules,
            best,
            plan: config.plan_for(target),
        },
    ))
}

/// The files of a target's summary.
#[derive(Debug, Clone)]
pub struct TargetFiles {
    pub folder: PathBuf,
    pub json: PathBuf,
    pub text: PathBuf,
    pub plot: Option<PathBuf>,
    /// Per filter, the list of frames to stack across all nights, and the best list
    /// when one was asked for.
    pub lists: Vec<PathBuf>,
}

fn write(path: &Path, bytes: &[u8]) -> Result<(), TargetError> {
    std::fs::write(path, bytes).map_err(|e| {
        TargetError::Write(format!(
            "cannot write {}: {}",
            path.display(),
            crate::text::io_reason(&e)
        ))
    })
}

/// Write a target's summary into `folder/target-<name>/`: `summary.json` (the
/// document), `summary.txt`, `quality.png` (the nights against the date) and, per
/// filter, `<filter>.txt` (every frame the nights keep) and `<filter>-best.txt` (the
/// best, when a fraction or hours were asked for), one path per line, best first, as
/// the nightly lists are written.
pub fn write_files(doc: &TargetDocument, folder: &Path) -> Result<TargetFiles, TargetError> {
    let folder = folder.join(format!("target-{}", crate::lists::file_part(&doc.target)));
    std::fs::create_dir_all(&folder).map_err(|e| {
        TargetError::Write(format!(
            "cannot make {}: {}",
            folder.display(),
            crate::text::io_reason(&e)
        ))
    })?;
    let json = folder.join("summary.json");
    write(&json, &serde_json::to_vec(doc).unwrap_or_default())?;
    let text = folder.join("summary.txt");
    write(&text, crate::report::season::text(doc).as_bytes())?;
    let plot = match crate::report::season::plot(doc) {
        Some(png) => {
            let p = folder.join("quality.png");
            write(&p, &png)?;
            Some(p)
        }
        None => None,
    };
    let mut lists = Vec::new();
    for f in &doc.filters {
        let name = crate::lists::file_part(f.filter.as_deref().unwrap_or(crate::text::NO_FILTER));
        let all: Vec<String> = f.stack.iter().map(|s| s.path.clone()).collect();
        let file = folder.join(format!("{name}.txt"));
        crate::lists::write_list(&file, &all).map_err(TargetError::Write)?;
        lists.push(file);
        if doc.best_rule != Best::All {
            let best: Vec<String> = f
                .stack
                .iter()
                .filter(|s| s.best)
                .map(|s| s.path.clone())
                .collect();
            let file = folder.join(format!("{name}-best.txt"));
            crate::lists::write_list(&file, &best).map_err(TargetError::Write)?;
            lists.push(file);
        }
    }
    Ok(TargetFiles {
        folder,
        json,
        text,
        plot,
        lists,
    })
}

/// Each planned target (`[[targets]]`) imaged on `night`: its progress over the nights
/// up to and including it, at that night's usable rate (`which` names it: "last
/// night's" in the morning, "tonight's" on the status page).
pub fn plan_progress(
    store: &Store,
    config: &Config,
    night: &str,
) -> Result<Vec<season::plan::PlanProgress>, StoreError> {
    if config.targets.is_empty() {
        return Ok(Vec::new());
    }
    let imaged: Vec<String> = store
        .night_groups(night)?
        .into_iter()
        .filter_map(|(t, _)| t)
        .collect();
    let mut out = Vec::new();
    for plan in config.targets.iter().filter(|p| imaged.contains(&p.name)) {
        let usable = store.target_usable(&plan.name, config.actions.stack_warned)?;
        out.push(season::plan::progress(plan, &usable, night));
    }
    Ok(out)
}

/// [`plan_progress`] as lines of words.
pub fn plan_lines(
    store: &Store,
    config: &Config,
    night: &str,
    which: &str,
) -> Result<Vec<String>, StoreError> {
    Ok(plan_progress(store, config, night)?
        .iter()
        .map(|p| p.line(which))
        .collect())
}
