//! `subwatch night` (a folder as one night) and `subwatch report` (a night from the
//! store, and the morning summary by mail), and how a night is printed: the summary's
//! text (counts, warned and rejected frames with why, what deserves a look) or the JSON
//! document.

use std::process::ExitCode;

use anyhow::Result;

/// A progress bar on stderr while files are read, shown only on a terminal and never
/// with JSON output (systemd and pipes get nothing).
fn progress_bar(show: bool) -> Option<indicatif::ProgressBar> {
    show.then(|| {
        let bar = indicatif::ProgressBar::new(0);
        bar.set_style(
            indicatif::ProgressStyle::with_template(
                "{msg} [{bar:30}] {pos}/{len} frames, {elapsed} (about {eta} left)",
            )
            .expect("a valid template")
            .progress_chars("=> "),
        );
        bar.set_message("measuring");
        bar
    })
}

/// `subwatch night DIR`.
pub fn night(
    dir: &std::path::Path,
    json: bool,
    all: bool,
    config: Option<&std::path::Path>,
    report: Option<&std::path::Path>,
) -> Result<ExitCode> {
    if !dir.is_dir() {
        anyhow::bail!("{} is not a folder", dir.display());
    }
    let cfg = match config {
        Some(p) => Some(subwatch::config::load(p)?),
        None => None,
    };
    let defaults = subwatch::config::Config::default();
    let c = cfg.as_ref().unwrap_or(&defaults);
    crate::commands::catalogue::prepare(&c.catalogue);
    let mut store = match &cfg {
        Some(c) => Some(subwatch::store::Store::open_configured(c)?),
        None => None,
    };
    let bar = progress_bar(!json && std::io::IsTerminal::is_terminal(&std::io::stderr()));
    let doc = subwatch::batch::run_night(dir, c, store.as_mut(), |done, total| {
        if let Some(b) = &bar {
            b.set_length(total as u64);
            b.set_position(done as u64);
        }
    })?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    if doc.frames.is_empty() {
        anyhow::bail!(
            "no light frames under {} (file names matching {}; hidden files, calibration frames and the \"{}\" folder are left out)",
            dir.display(),
            c.watch.include.join(", "),
            c.actions.rejected_folder
        );
    }
    let night = subwatch::batch::night_of(&doc).unwrap_or_else(|| "night".into());
    let events = subwatch::events::write_voevents(&doc, c, &night, subwatch::clock::now_unix())?;
    if let Some(folder) = c.voevent.folder.as_ref().filter(|_| !events.is_empty()) {
        eprintln!(
            "VOEvent: {} document(s) written to {}",
            events.len(),
            folder.display()
        );
    }
    if let Some(folder) = report {
        let prepared = subwatch::morning::write_files(
            doc.clone(),
            &night,
            folder,
            &c.measure,
            subwatch::morning::settings(c),
        )?;
        eprintln!("report: {}", prepared.html_path.display());
        eprintln!("frames: {}", prepared.csv_path.display());
    }
    print_night(&doc, &night, subwatch::morning::settings(c), json, all, &[])
}

/// A night label as the contract writes it: a real date, YYYY-MM-DD.
pub fn night_label(text: &str) -> Result<String> {
    let parsed = chrono::NaiveDate::parse_from_str(text, "%Y-%m-%d")
        .ok()
        .filter(|d| d.format("%Y-%m-%d").to_string() == text);
    match parsed {
        Some(_) => Ok(text.to_string()),
        None => anyhow::bail!(
            "--night {text:?} is not a night label: write the local date of the evening the night began as YYYY-MM-DD, such as 2026-03-14"
        ),
    }
}

/// What `subwatch report` is asked for.
pub struct ReportOptions {
    /// The night document as JSON.
    pub json: bool,
    /// Every frame and cosmic-ray hit in the text.
    pub all: bool,
    /// Write the files and mail the summary.
    pub send: bool,
    /// Every rig sharing the store, not only this one.
    pub site: bool,
    /// Where the summary files go instead of `[report] folder`.
    pub out: Option<std::path::PathBuf>,
}

/// The night a command means when none is named: the newest night with frames, by the
/// frames' own DATE-OBS (a frame of an earlier night copied in today is still that
/// night), else the newest night any frame was recorded under; `status` and `report`
/// alike. `None` when the store holds no frame. Also how it was chosen, in words.
pub fn latest_night(store: &subwatch::store::Store) -> Result<Option<(String, &'static str)>> {
    if let Some(n) = store.latest_dated_night()? {
        return Ok(Some((n, "the newest night with frames, by their DATE-OBS")));
    }
    Ok(store
        .nights()?
        .pop()
        .map(|n| (n, "the newest night with frames (none has a DATE-OBS)")))
}

/// `subwatch report`.
pub fn report(
    config: &std::path::Path,
    night: Option<String>,
    options: ReportOptions,
) -> Result<ExitCode> {
    let ReportOptions {
        json,
        all,
        send,
        site,
        out,
    } = options;
    let night = night.as_deref().map(night_label).transpose()?;
    let cfg = subwatch::config::load(config)?;
    crate::commands::catalogue::prepare(&cfg.catalogue);
    let now = subwatch::clock::now_unix();
    if send && cfg.mail.to.is_empty() {
        anyhow::bail!(
            "report --send: [mail] to is empty in {}, so there is nobody to send to; add recipients, or run report without --send (it writes the summary files)",
            config.display()
        );
    }
    let mut store = subwatch::store::Store::open_configured(&cfg)?;
    let night = match night {
        Some(n) => n,
        None => {
            // A site's report: the newest night of any rig.
            let whole = if site { store.whole_site() } else { store };
            let latest = latest_night(&whole)?;
            store = whole.own_rig();
            match latest {
                Some((n, _)) => n,
                None => anyhow::bail!(
                    "the store {} holds no frames yet",
                    subwatch::store::Location::from_config(&cfg.store)
                ),
            }
        }
    };
    let frames = if site {
        store.night_rigs(&night)?.len()
    } else {
        store.night_counts(&night)?.frames as usize
    };
    if frames == 0 {
        let known = store.nights()?;
        anyhow::bail!(
            "no frames of night {night} in the store {}{}",
            subwatch::store::Location::from_config(&cfg.store),
            match known.last() {
                Some(last) => format!(" (nights recorded: {}, the latest {last})", known.len()),
                None => " (it holds no frames yet)".into(),
            }
        );
    }
    let rejudged = if site {
        subwatch::morning::judge_site(&mut store, &cfg, &night)?
    } else {
        subwatch::morning::judge_night(&mut store, &cfg, &night)?
    };
    tell_changes(&rejudged.changed);
    let settings = subwatch::morning::settings(&cfg);
    if json && !send {
        // The document for scripts; nothing written.
        return print_night(&rejudged.doc, &night, settings, true, false, &[]);
    }
    let folder = out.unwrap_or_else(|| subwatch::morning::report_folder(&cfg));
    let plans = subwatch::morning::plan_lines(&store, &cfg, &night)?;
    let prepared = subwatch::morning::write_files_with_plans(
        rejudged.doc,
        &night,
        &folder,
        &cfg.measure,
        settings,
        plans.clone(),
    )?;
    print_night(&prepared.doc, &night, settings, json, all, &plans)?;
    eprintln!(
        "night {night}: the summary is written in {}: {}, {}, {}",
        folder.display(),
        file_name(&prepared.html_path),
        file_name(&prepared.csv_path),
        file_name(&prepared.json_path)
    );
    if !send {
        return Ok(ExitCode::SUCCESS);
    }
    subwatch::morning::queue_mail(&store, &cfg, &prepared, now)?;
    let flushed = subwatch::morning::flush(&store, &cfg, now)?;
    for p in &flushed.written {
        eprintln!("mail (no server configured): {}", p.display());
    }
    if flushed.sent > 0 {
        eprintln!("mail sent ({} message(s))", flushed.sent);
    }
    for f in &flushed.failed {
        eprintln!("mail not sent yet, kept in the outbox: {f}");
    }
    Ok(if flushed.failed.is_empty() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(3)
    })
}

fn file_name(p: &std::path::Path) -> String {
    p.file_name().map_or_else(
        || p.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    )
}

/// Say which frames changed verdict when the night was judged again (rules changed
/// since): on stderr, so the printed document stays as it is.
fn tell_changes(changed: &[subwatch::store::VerdictChange]) {
    let moved: Vec<_> = changed
        .iter()
        .filter_map(|c| Some((c, c.before?)).filter(|(c, b)| *b != c.after))
        .collect();
    if moved.is_empty() {
        return;
    }
    eprintln!(
        "{} frame(s) changed verdict with the rules as configured now (the lists of frames to stack are rewritten):",
        moved.len()
    );
    for (c, before) in moved {
        eprintln!(
            "  {}: {} -> {}",
            subwatch::text::single_line(&c.path),
            before.as_str(),
            c.after.as_str()
        );
    }
}

/// Print a night: the JSON document, or the summary's text (`all` adds every frame and
/// every cosmic-ray hit; `plans`, the lines of the planned targets imaged that night).
pub fn print_night(
    doc: &subwatch::contract::NightDocument,
    night: &str,
    settings: subwatch::report::Settings,
    json: bool,
    all: bool,
    plans: &[String],
) -> Result<ExitCode> {
    if json {
        outln!("{}", serde_json::to_string(doc)?)?;
    } else {
        let mut summary = subwatch::report::summarise(night, doc, settings);
        summary.plans = plans.to_vec();
        out!("{}", subwatch::report::text(&summary, all))?;
        if !all {
            outln!("(--all lists every frame and every cosmic-ray hit)")?;
        }
    }
    Ok(ExitCode::SUCCESS)
}
