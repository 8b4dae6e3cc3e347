//! `subwatch archive ROOT`: past nights recorded into the store and judged, with a
//! progress bar on a terminal (a log line every N frames elsewhere), ending with the
//! counts per night and per target.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, Result};
use subwatch::archive::{ArchiveOptions, ArchiveReport, Progress, Shard, Stage};

#[derive(clap::Args)]
pub struct ArchiveArgs {
    /// The folder tree of past nights (any depth and naming: each frame's night is its
    /// DATE-OBS's).
    root: PathBuf,
    #[command(flatten)]
    config: crate::ConfigFile,
    /// Take the K-th of N fixed shares of the tree's folders (a scheduler's array of
    /// tasks, each with its own K); every share together is the whole tree.
    #[arg(long, value_name = "K/N")]
    shard: Option<String>,
    /// Reader processes at once (default: one per core).
    #[arg(long, default_value_t = 0)]
    workers: usize,
    /// Away from a terminal, a log line every this many frames.
    #[arg(long, value_name = "N", default_value_t = 100)]
    log_every: usize,
    /// Print what was done as JSON (the counts per night and per target).
    #[arg(long)]
    json: bool,
    /// Only list the folders of this share (one per line) and the frames in each.
    #[arg(long, conflicts_with = "json")]
    list: bool,
}

/// Seconds as "1 h 02 min", "3 min 05 s" or "12 s".
fn duration(s: f64) -> String {
    let s = s.max(0.0).round() as u64;
    match (s / 3600, s / 60 % 60, s % 60) {
        (0, 0, sec) => format!("{sec} s"),
        (0, m, sec) => format!("{m} min {sec:02} s"),
        (h, m, _) => format!("{h} h {m:02} min"),
    }
}

pub fn run(args: ArchiveArgs) -> Result<ExitCode> {
    let cfg = subwatch::config::load(&args.config.path)?;
    let shard = match &args.shard {
        Some(s) => Shard::parse(s).map_err(|e| anyhow::anyhow!("--shard {e}"))?,
        None => Shard::WHOLE,
    };
    if args.list {
        for (unit, files) in subwatch::archive::share(&cfg, &args.root, shard)? {
            outln!("{unit}\t{}", files.len())?;
        }
        return Ok(ExitCode::SUCCESS);
    }
    crate::commands::catalogue::prepare(&cfg.catalogue);
    let options = ArchiveOptions {
        root: args.root.clone(),
        shard,
        workers: args.workers,
    };
    let terminal = std::io::IsTerminal::is_terminal(&std::io::stderr());
    let bar = terminal.then(|| {
        let bar = indicatif::ProgressBar::new(0);
        bar.set_style(
            indicatif::ProgressStyle::with_template("{prefix} [{bar:30}] {pos}/{len} {msg}")
                .expect("a valid template")
                .progress_chars("=> "),
        );
        bar
    });
    let every = args.log_every.max(1);
    let mut progress = |p: &Progress| {
        let (stage, what) = match p.stage {
            Stage::Reading => ("reading", "frames"),
            Stage::Judging => ("judging", "nights"),
        };
        let rate = match (p.stage, p.left_s) {
            (Stage::Reading, Some(left)) => {
                format!(", {:.2} frames/s, about {} left", p.per_s, duration(left))
            }
            (Stage::Reading, None) => format!(", {:.2} frames/s", p.per_s),
            (Stage::Judging, _) => String::new(),
        };
        match &bar {
            Some(b) => {
                b.set_prefix(stage);
                b.set_length(p.total as u64);
                b.set_position(p.done as u64);
                b.set_message(format!("{what}{rate}"));
            }
            None if p.done % every == 0 || p.done == p.total => {
                tracing::info!("archive: {stage}: {} of {} {what}{rate}", p.done, p.total);
            }
            None => {}
        }
    };
    let report = subwatch::archive::run(&cfg, &options, &mut progress)
        .with_context(|| format!("archive of {}", args.root.display()))?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    if args.json {
        outln!("{}", serde_json::to_string(&report)?)?;
    } else {
        print_report(&report)?;
    }
    Ok(ExitCode::SUCCESS)
}

/// What an archive did, then its counts per night and per target.
fn print_report(r: &ArchiveReport) -> Result<()> {
    outln!(
        "Archive of {} (share {}): {} frames; {} recorded before, {} recorded now ({} replacing a changed file's record), {} recorded meanwhile by another process, {} unreadable; {} night(s) judged; {}",
        r.root,
        r.shard,
        r.files,
        r.recorded_before,
        r.new + r.replaced,
        r.replaced,
        r.recorded_by_others,
        r.unreadable,
        r.judged.len(),
        duration(r.seconds)
    )?;
    outln!("\nnight        lights     ok   warn reject unreadable calibration")?;
    for n in &r.nights {
        outln!(
            "{:<12} {:>6} {:>6} {:>6} {:>6} {:>10} {:>11}",
            n.night,
            n.lights,
            n.ok,
            n.warn,
            n.reject,
            n.unreadable,
            n.calibration
        )?;
    }
    outln!("\ntarget                          nights frames     ok   warn reject")?;
    for t in &r.targets {
        outln!(
            "{:<32} {:>5} {:>6} {:>6} {:>6} {:>6}",
            subwatch::text::single_line(&t.target),
            t.nights,
            t.frames,
            t.ok,
            t.warn,
            t.reject
        )?;
    }
    outln!("\n(`subwatch report --target NAME` for a target across its nights)")?;
    Ok(())
}
