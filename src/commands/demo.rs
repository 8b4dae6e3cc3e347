//! `subwatch demo`: the invented night end to end, with its progress and what to open.

use std::process::ExitCode;

use anyhow::Result;

/// A free address on this machine for the status page: `port` when it is free, else one
/// the system picks.
fn page_address(port: u16) -> Option<std::net::SocketAddr> {
    if port == 0 {
        return None;
    }
    let bound = std::net::TcpListener::bind(("127.0.0.1", port))
        .or_else(|_| std::net::TcpListener::bind(("127.0.0.1", 0)))
        .ok()?;
    bound.local_addr().ok()
}

/// `subwatch demo`.
pub fn run(out: &std::path::Path, page_port: u16, keep_page: bool) -> Result<ExitCode> {
    let page = page_address(page_port);
    if let Some(addr) = page {
        eprintln!("The night's status page, while the demo runs: http://{addr}/");
    }
    // A progress bar on a terminal; elsewhere (a pipe, CI) one line per stage.
    let bar = std::io::IsTerminal::is_terminal(&std::io::stderr()).then(|| {
        let bar = indicatif::ProgressBar::new(0);
        bar.set_style(
            indicatif::ProgressStyle::with_template("{msg:<28} [{bar:30}] {pos}/{len}")
                .expect("a valid template")
                .progress_chars("=> "),
        );
        bar
    });
    let mut last = String::new();
    let mut progress = |stage: &str, done: usize, total: usize| {
        match &bar {
            Some(b) => {
                b.set_message(stage.to_string());
                b.set_length(total as u64);
                b.set_position(done as u64);
            }
            None if stage != last => eprintln!("{stage}"),
            None => {}
        }
        last = stage.to_string();
    };
    let outcome = subwatch::demo::run(out, page, &mut progress)?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let doc = &outcome.doc;
    let count = |v: subwatch::rules::Verdict| doc.frames.iter().filter(|f| f.verdict == v).count();
    outln!(
        "Night {} at the Kestrel Ridge Observatory (invented): {} frames in {:.0} s",
        outcome.night,
        doc.frames.len(),
        outcome.seconds
    )?;
    outln!(
        "  verdicts: {} ok, {} warn, {} reject",
        count(subwatch::rules::Verdict::Ok),
        count(subwatch::rules::Verdict::Warn),
        count(subwatch::rules::Verdict::Reject)
    )?;
    let mut reasons: std::collections::BTreeMap<&str, usize> = Default::default();
    for f in &doc.frames {
        for r in &f.reasons {
            *reasons.entry(r.as_str()).or_default() += 1;
        }
    }
    outln!(
        "  reasons: {}",
        reasons
            .iter()
            .map(|(r, n)| format!("{r} {n}"))
            .collect::<Vec<_>>()
            .join(", ")
    )?;
    let mut kinds: std::collections::BTreeMap<String, usize> = Default::default();
    for a in &doc.anomalies {
        let k = a.kind.name().to_string();
        let cosmic = a.detail.is_cosmic_ray();
        *kinds
            .entry(if cosmic { "cosmic ray".into() } else { k })
            .or_default() += 1;
    }
    outln!(
        "  anomalies: {}",
        kinds
            .iter()
            .map(|(k, n)| format!("{k} {n}"))
            .collect::<Vec<_>>()
            .join(", ")
    )?;
    let cal = &doc.calibration;
    let flagged: Vec<String> = cal
        .iter()
        .filter(|f| f.verdict != subwatch::rules::Verdict::Ok)
        .flat_map(|f| f.reasons.iter().cloned())
        .collect();
    outln!(
        "  calibration: {} darks, {} flats, {} bias; {} flagged ({})",
        cal.iter().filter(|f| f.kind == "dark").count(),
        cal.iter().filter(|f| f.kind == "flat").count(),
        cal.iter().filter(|f| f.kind == "bias").count(),
        cal.iter()
            .filter(|f| f.verdict != subwatch::rules::Verdict::Ok)
            .count(),
        flagged.join(", ")
    )?;
    for note in &doc.calibration_notes {
        outln!("    {note}")?;
    }
    for plan in &outcome.plans {
        outln!("  plan: {plan}")?;
    }
    outln!("Open:")?;
    outln!("  report  {}", outcome.html.display())?;
    outln!("  frames  {}", outcome.csv.display())?;
    outln!("  night   {}", outcome.json.display())?;
    for m in &outcome.mails {
        outln!("  mail    {}", m.display())?;
    }
    outln!("Next:")?;
    outln!(
        "  open the report in a browser:   xdg-open {}",
        outcome.html.display()
    )?;
    outln!("  measure your own frames:        subwatch measure /path/to/your/*.fits")?;
    outln!("  grade a night you already have: subwatch night /path/to/night-folder --report /tmp/night-report")?;
    outln!("  watch every night as a service: see systemd/README.md (config/subwatch.toml documents every key)")?;
    match (page, keep_page) {
        (Some(addr), true) => {
            outln!("The status page stays at http://{addr}/ until Ctrl-C.")?;
            subwatch::watch::run(subwatch::demo::demo_config(&outcome.out, Some(addr)))?;
        }
        (Some(_), false) => outln!(
            "  see the night's status page again: subwatch demo --keep-page (it stays open until Ctrl-C)"
        )?,
        _ => {}
    }
    Ok(ExitCode::SUCCESS)
}
