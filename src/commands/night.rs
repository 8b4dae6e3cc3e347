//! `subwatch night` (a folder as one night) and `subwatch report` (a night from the
//! store, and the morning summary by mail), and how a night document is printed.

use std::process::ExitCode;

use anyhow::{Context, Result};

/// `subwatch night DIR`.
pub fn night(
    dir: &std::path::Path,
    json: bool,
    config: Option<&std::path::Path>,
    report: Option<&std::path::Path>,
) -> Result<ExitCode> {
    let cfg = match config {
        Some(p) => Some(subwatch::config::load(p)?),
        None => None,
    };
    let defaults = subwatch::config::Config::default();
    let c = cfg.as_ref().unwrap_or(&defaults);
    let mut store = match &cfg {
        Some(c) => Some(subwatch::store::Store::open(&c.store.path)?),
        None => None,
    };
    if !dir.is_dir() {
        anyhow::bail!("{} is not a folder", dir.display());
    }
    let show = !json && std::io::IsTerminal::is_terminal(&std::io::stderr());
    let doc = subwatch::batch::run_night(dir, c, store.as_mut(), |done, total| {
        if show {
            eprint!("\rmeasuring {done}/{total}");
        }
    })?;
    if show {
        eprintln!();
    }
    if let Some(folder) = report {
        let night = subwatch::batch::night_of(&doc).unwrap_or_else(|| "night".into());
        let prepared = subwatch::morning::write_files(doc.clone(), &night, folder, &c.measure)?;
        eprintln!("report: {}", prepared.html_path.display());
        eprintln!("frames: {}", prepared.csv_path.display());
    }
    print_night(&doc, json)
}

/// `subwatch report`.
pub fn report(
    config: &std::path::Path,
    night: Option<String>,
    json: bool,
    send: bool,
) -> Result<ExitCode> {
    let cfg = subwatch::config::load(config)?;
    let now = subwatch::clock::now_unix();
    let night = match night {
        Some(n) => n,
        None => subwatch::sky::night_label(now, cfg.timezone()).context("clock out of range")?,
    };
    let mut store = subwatch::store::Store::open(&cfg.store.path)?;
    if !send {
        let doc = subwatch::morning::judge_night(&mut store, &cfg, &night)?;
        return print_night(&doc, json);
    }
    if cfg.mail.to.is_empty() {
        anyhow::bail!(
            "report --send: [mail] to is empty in {}, so there is nobody to send to; add recipients, or run report without --send",
            config.display()
        );
    }
    let prepared = subwatch::morning::prepare(&mut store, &cfg, &night)?;
    if json {
        print_night(&prepared.doc, true)?;
    }
    let id = subwatch::morning::queue_mail(&store, &cfg, &prepared, now)?;
    let flushed = subwatch::morning::flush(&store, &cfg, now)?;
    eprintln!("report: {}", prepared.html_path.display());
    eprintln!("frames: {}", prepared.csv_path.display());
    for p in &flushed.written {
        eprintln!("mail (no server configured): {}", p.display());
    }
    if flushed.sent > 0 {
        eprintln!("mail sent ({} message(s))", flushed.sent);
    }
    for f in &flushed.failed {
        eprintln!("mail not sent yet, kept in the outbox: {f}");
    }
    let _ = id;
    Ok(if flushed.failed.is_empty() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(3)
    })
}

pub fn print_night(doc: &subwatch::contract::NightDocument, json: bool) -> Result<ExitCode> {
    if json {
        println!("{}", serde_json::to_string(doc)?);
    } else {
        for f in &doc.frames {
            println!(
                "{:<50} {:<7} {}",
                f.path,
                format!("{:?}", f.verdict).to_lowercase(),
                f.reasons.join(",")
            );
        }
        for a in &doc.anomalies {
            println!(
                "{:<10} ra={} dec={} seen in {} frame(s)",
                format!("{:?}", a.kind).to_lowercase(),
                a.ra_deg.map_or("-".into(), |v| format!("{v:.5}")),
                a.dec_deg.map_or("-".into(), |v| format!("{v:.5}")),
                a.detections.len()
            );
        }
    }
    Ok(ExitCode::SUCCESS)
}
