//! `subwatch demo`: the invented night end to end, with its progress and what to open.

use std::process::ExitCode;

use anyhow::Result;

/// `subwatch demo`.
pub fn run(out: &std::path::Path) -> Result<ExitCode> {
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
    let outcome = subwatch::demo::run(out, &mut progress)?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let doc = &outcome.doc;
    let count = |v: subwatch::rules::Verdict| doc.frames.iter().filter(|f| f.verdict == v).count();
    println!(
        "Night {} at the Kestrel Ridge Observatory (invented): {} frames in {:.0} s",
        outcome.night,
        doc.frames.len(),
        outcome.seconds
    );
    println!(
        "  verdicts: {} ok, {} warn, {} reject",
        count(subwatch::rules::Verdict::Ok),
        count(subwatch::rules::Verdict::Warn),
        count(subwatch::rules::Verdict::Reject)
    );
    let mut reasons: std::collections::BTreeMap<&str, usize> = Default::default();
    for f in &doc.frames {
        for r in &f.reasons {
            *reasons.entry(r.as_str()).or_default() += 1;
        }
    }
    println!(
        "  reasons: {}",
        reasons
            .iter()
            .map(|(r, n)| format!("{r} {n}"))
            .collect::<Vec<_>>()
            .join(", ")
    );
    let mut kinds: std::collections::BTreeMap<String, usize> = Default::default();
    for a in &doc.anomalies {
        let k = a.kind.name().to_string();
        let cosmic = a.detail.is_cosmic_ray();
        *kinds
            .entry(if cosmic { "cosmic ray".into() } else { k })
            .or_default() += 1;
    }
    println!(
        "  anomalies: {}",
        kinds
            .iter()
            .map(|(k, n)| format!("{k} {n}"))
            .collect::<Vec<_>>()
            .join(", ")
    );
    println!("Open:");
    println!("  report  {}", outcome.html.display());
    println!("  frames  {}", outcome.csv.display());
    println!("  night   {}", outcome.json.display());
    for m in &outcome.mails {
        println!("  mail    {}", m.display());
    }
    println!("Next:");
    println!(
        "  open the report in a browser:   xdg-open {}",
        outcome.html.display()
    );
    println!("  measure your own frames:        subwatch measure /path/to/your/*.fits");
    println!("  grade a night you already have: subwatch night /path/to/night-folder --report /tmp/night-report");
    println!("  watch every night as a service: see systemd/README.md (config/subwatch.toml documents every key)");
    Ok(ExitCode::SUCCESS)
}
