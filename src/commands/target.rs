//! `subwatch report --target NAME` (a target across all its nights) and `report
//! --list-targets`: printed as text with the files written, or as JSON.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Result;
use subwatch::season::Best;

/// What `report --target` is asked for.
pub struct TargetOptions {
    /// The target; `None` lists the targets.
    pub target: Option<String>,
    pub json: bool,
    /// Every rig of the site, not only this one.
    pub site: bool,
    pub out: Option<PathBuf>,
    pub best_fraction: Option<f64>,
    pub best_hours: Option<f64>,
}

/// Which frames make the best list, checked.
fn best(options: &TargetOptions) -> Result<Best> {
    match (options.best_fraction, options.best_hours) {
        (Some(f), _) if !(f > 0.0 && f <= 1.0) => anyhow::bail!(
            "--best-fraction {f} is not a fraction of the frames: give a number above 0 and at most 1, such as 0.8"
        ),
        (Some(f), _) => Ok(Best::Fraction(f)),
        (_, Some(h)) if !(h > 0.0 && h.is_finite()) => {
            anyhow::bail!("--best-hours {h} is not a number of hours: give one above 0, such as 10")
        }
        (_, Some(h)) => Ok(Best::Hours(h)),
        _ => Ok(Best::All),
    }
}

/// `subwatch report --target NAME` / `--list-targets`.
pub fn run(config: &Path, options: TargetOptions) -> Result<ExitCode> {
    let best = best(&options)?;
    let cfg = subwatch::config::load(config)?;
    let store = subwatch::store::Store::open_configured(&cfg)?;
    let store = if options.site {
        store.whole_site()
    } else {
        store
    };
    let Some(target) = options.target.as_deref() else {
        let targets = store.targets()?;
        if options.json {
            outln!("{}", serde_json::to_string(&targets)?)?;
        } else {
            outln!("target                          nights  frames  first       last")?;
            for t in &targets {
                outln!(
                    "{:<32} {:>5} {:>7}  {:<10}  {:<10}",
                    subwatch::text::single_line(&t.target),
                    t.nights,
                    t.frames,
                    t.first_night.as_deref().unwrap_or("-"),
                    t.last_night.as_deref().unwrap_or("-")
                )?;
            }
        }
        return Ok(ExitCode::SUCCESS);
    };
    let doc = subwatch::targets::document(&store, &cfg, target, best)?;
    if doc.frames.total() == 0 {
        let known: Vec<String> = store.targets()?.into_iter().map(|t| t.target).collect();
        let names: Vec<&str> = known.iter().map(String::as_str).collect();
        let hint = subwatch::text::nearest(target, &names)
            .map(|n| format!("; did you mean {n:?}?"))
            .unwrap_or_default();
        anyhow::bail!(
            "no frames of target {target:?} in the store {}{hint} (`subwatch report --list-targets` lists the {} target(s) it holds)",
            subwatch::store::Location::from_config(&cfg.store),
            known.len()
        );
    }
    if options.json {
        // The document for scripts; nothing written.
        outln!("{}", serde_json::to_string(&doc)?)?;
        return Ok(ExitCode::SUCCESS);
    }
    out!("{}", subwatch::report::season::text(&doc))?;
    let folder = options
        .out
        .unwrap_or_else(|| subwatch::morning::report_folder(&cfg));
    let files = subwatch::targets::write_files(&doc, &folder)?;
    eprintln!(
        "target {}: written in {}: summary.json, summary.txt{}{}",
        subwatch::text::single_line(target),
        files.folder.display(),
        if files.plot.is_some() {
            ", quality.png"
        } else {
            ""
        },
        files
            .lists
            .iter()
            .filter_map(|p| p.file_name())
            .map(|n| format!(", {}", n.to_string_lossy()))
            .collect::<String>()
    );
    Ok(ExitCode::SUCCESS)
}
