//! The `subwatch` command line: parse, dispatch, report errors. No logic lives here.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, Result};
use clap::{Parser, Subcommand, ValueEnum};

use subwatch::contract::MeasureRecord;
use subwatch::frame::bayer::BayerPattern;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::pipeline::{MeasureOptions, RecordOptions};
use subwatch::sim::{render, PsfShape, SimParams};

#[derive(Parser)]
#[command(
    name = "subwatch",
    version,
    about = "Grades every sub of an imaging night as it lands and flags what is unusual."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Measure frames: FWHM, eccentricity, background, noise, star count, SNR.
    Measure {
        /// Print one JSON object per file (JSON Lines) instead of a table.
        #[arg(long)]
        json: bool,
        /// Include every measured star in the JSON output.
        #[arg(long)]
        stars: bool,
        /// Refuse images with more pixels than this (checked before allocating).
        #[arg(long, default_value_t = 400_000_000)]
        max_pixels: u64,
        /// Focal length (mm) when the header has no FOCALLEN.
        #[arg(long)]
        focal_length_mm: Option<f64>,
        /// Unbinned pixel size (µm) when the header has no XPIXSZ.
        #[arg(long)]
        pixel_size_um: Option<f64>,
        #[arg(required = true)]
        files: Vec<PathBuf>,
    },
    /// Watch the configured folders and record every frame in the store (the daemon).
    Watch {
        #[arg(long)]
        config: PathBuf,
    },
    /// Check a configuration file: every key, the folders, the store, the password file.
    CheckConfig {
        #[arg(long)]
        config: PathBuf,
        /// Also send a test mail through the configured server now.
        #[arg(long)]
        send_test: bool,
    },
    /// Tonight so far: frames seen, measured, errors, last frame, the daemon's queue.
    Status {
        #[arg(long)]
        config: PathBuf,
        /// Night label (YYYY-MM-DD); default: the night in progress.
        #[arg(long)]
        night: Option<String>,
        #[arg(long)]
        json: bool,
    },
    /// Process every light frame under DIR as one night and report verdicts and anomalies.
    Night {
        dir: PathBuf,
        /// Print the night document as JSON.
        #[arg(long)]
        json: bool,
        /// Configuration (site time zone, optics, patterns, and the store whose earlier
        /// nights are compared for new sources).
        #[arg(long)]
        config: Option<PathBuf>,
        /// Write the summary (HTML with plots and cutouts, CSV) into this folder.
        #[arg(long)]
        report: Option<PathBuf>,
    },
    /// The night document (frames with verdicts, anomalies) from the daemon's store;
    /// with --send, the morning summary (HTML and CSV in the report folder) by mail now.
    Report {
        #[arg(long)]
        config: PathBuf,
        /// Night label (YYYY-MM-DD): the local date of the evening the night began.
        #[arg(long)]
        night: Option<String>,
        #[arg(long)]
        json: bool,
        /// Write the summary files and mail the summary (to a .eml file without a server).
        #[arg(long)]
        send: bool,
    },
    /// Deliver the mail waiting in the outbox (it is retried with growing waits).
    Outbox {
        #[arg(long)]
        config: PathBuf,
        /// Try every waiting message now, whatever its wait.
        #[arg(long)]
        now: bool,
    },
    /// Sun, Moon, twilight and a target's altitude for a site and moment (JSON).
    Sky {
        #[arg(long, allow_hyphen_values = true)]
        latitude: f64,
        /// East positive.
        #[arg(long, allow_hyphen_values = true)]
        longitude: f64,
        /// UTC, ISO 8601.
        #[arg(long)]
        time: String,
        /// A target's RA and Dec of date, degrees (also converted to J2000).
        #[arg(long, allow_hyphen_values = true)]
        ra: Option<f64>,
        #[arg(long, allow_hyphen_values = true)]
        dec: Option<f64>,
    },
    /// A whole invented night, end to end: frames land in a watched folder, the daemon
    /// measures and judges them, and the morning summary is written (no setup needed).
    Demo {
        /// Where to put it all (created; an earlier demo's folder is replaced).
        #[arg(long, default_value = "subwatch-demo")]
        out: PathBuf,
    },
    /// Render a synthetic night of frames with known events into a folder.
    RenderNight {
        #[arg(long)]
        out: PathBuf,
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// The same field a night later, with one new source.
        #[arg(long)]
        second_night: bool,
        /// A one-shot-colour sequence with one very red star.
        #[arg(long)]
        colour: bool,
        /// Number of frames (default: 40, or 10 for colour).
        #[arg(long)]
        frames: Option<usize>,
    },
    /// Read one file for another subwatch process (request on stdin, record on stdout).
    #[command(name = "read-worker", hide = true)]
    ReadWorker,
    /// Render a synthetic frame with known truth (for tests and demonstrations).
    Render {
        #[arg(long)]
        out: PathBuf,
        /// Where to write the truth as JSON.
        #[arg(long)]
        truth: Option<PathBuf>,
        #[arg(long, default_value_t = 1)]
        seed: u64,
        #[arg(long, default_value_t = 1024)]
        width: usize,
        #[arg(long, default_value_t = 1024)]
        height: usize,
        #[arg(long, default_value_t = 300)]
        stars: usize,
        #[arg(long, value_enum, default_value_t = PsfArg::Moffat)]
        psf: PsfArg,
        /// Optical FWHM in pixels (geometric mean of the axes).
        #[arg(long, default_value_t = 3.5)]
        fwhm: f64,
        #[arg(long, default_value_t = 3.5)]
        beta: f64,
        #[arg(long, default_value_t = 0.0)]
        eccentricity: f64,
        #[arg(long, default_value_t = 0.0)]
        angle: f64,
        /// Sky level in electrons per pixel.
        #[arg(long, default_value_t = 800.0)]
        sky: f64,
        /// Sky change across the frame (fraction of the sky level) along x and y.
        #[arg(long, num_args = 2, value_names = ["GX", "GY"])]
        gradient: Option<Vec<f64>>,
        #[arg(long, default_value_t = 1.0)]
        gain: f64,
        #[arg(long, default_value_t = 0)]
        hot_pixels: usize,
        #[arg(long, default_value_t = 0)]
        cosmic_rays: usize,
        /// Render a one-shot-colour mosaic with this pattern (RGGB, BGGR, GRBG, GBRG).
        #[arg(long)]
        bayer: Option<String>,
        /// Store as float32 instead of 16-bit unsigned.
        #[arg(long)]
        float: bool,
        /// OBJECT keyword.
        #[arg(long)]
        object: Option<String>,
        /// DATE-OBS keyword (UTC, ISO 8601).
        #[arg(long)]
        date_obs: Option<String>,
        /// Scale every star's flux by this factor (thin cloud: below 1).
        #[arg(long, default_value_t = 1.0)]
        transparency: f64,
    },
}

#[derive(Clone, Copy, ValueEnum)]
enum PsfArg {
    Gaussian,
    Moffat,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    // The daemon says what it is doing by default; one-shot commands only warn.
    subwatch::logging::init(match cli.command {
        Command::Watch { .. } => "info",
        _ => "warn",
    });
    // A panic anywhere is reported as one line.
    std::panic::set_hook(Box::new(|info| {
        tracing::error!("internal error: {info}");
    }));
    match run(cli) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("subwatch: {}", describe(&e));
            ExitCode::from(2)
        }
    }
}

/// An error and its causes on one line, each cause once: a library error that already
/// quotes its source is not followed by the source again.
fn describe(e: &anyhow::Error) -> String {
    let mut out = String::new();
    for cause in e.chain() {
        let text = cause.to_string();
        if out.contains(&text) {
            continue;
        }
        if !out.is_empty() {
            out.push_str(": ");
        }
        out.push_str(&text);
    }
    out
}

fn run(cli: Cli) -> Result<ExitCode> {
    match cli.command {
        Command::Watch { config } => {
            let cfg = subwatch::config::load(&config)?;
            let (errors, warnings) = cfg.check_environment();
            for w in &warnings {
                tracing::warn!("{w}");
            }
            if !errors.is_empty() {
                anyhow::bail!("{}: {}", config.display(), errors.join("; "));
            }
            subwatch::watch::run(cfg)?;
            Ok(ExitCode::SUCCESS)
        }
        Command::CheckConfig { config, send_test } => {
            let cfg = subwatch::config::load(&config)?;
            let (errors, warnings) = cfg.check_environment();
            for w in &warnings {
                println!("warning: {w}");
            }
            for e in &errors {
                println!("error: {e}");
            }
            if !errors.is_empty() {
                return Ok(ExitCode::from(1));
            }
            println!("{}: ok", config.display());
            if send_test {
                let settings = subwatch::mail::MailSettings::from_config(&cfg)?;
                let note = subwatch::mail::compose_note(
                    &settings,
                    "subwatch test mail",
                    "This is a test of subwatch's mail settings. Morning summaries and alerts will come this way.",
                )?;
                let folder = subwatch::morning::report_folder(&cfg);
                match subwatch::outbox::deliver(
                    &settings,
                    &note.into(),
                    &folder,
                    "subwatch-test.eml",
                )? {
                    subwatch::outbox::Delivered::Sent => println!(
                        "test mail sent through {}:{}",
                        settings.host.as_deref().unwrap_or(""),
                        settings.port
                    ),
                    subwatch::outbox::Delivered::Written(path) => {
                        println!("no smtp_host: test mail written to {}", path.display())
                    }
                }
            }
            Ok(ExitCode::SUCCESS)
        }
        Command::Status {
            config,
            night,
            json,
        } => status_command(&config, night, json),
        Command::Night {
            dir,
            json,
            config,
            report,
        } => night_command(&dir, json, config.as_deref(), report.as_deref()),
        Command::Report {
            config,
            night,
            json,
            send,
        } => report_command(&config, night, json, send),
        Command::Demo { out } => demo_command(&out),
        Command::ReadWorker => {
            subwatch::reader::serve(std::io::stdin().lock(), std::io::stdout().lock())
                .context("read-worker")?;
            Ok(ExitCode::SUCCESS)
        }
        Command::Outbox { config, now } => {
            let cfg = subwatch::config::load(&config)?;
            let store = subwatch::store::Store::open(&cfg.store.path)?;
            let r = subwatch::morning::flush_outbox(
                &store,
                &cfg,
                subwatch::clock::now_unix(),
                if now {
                    subwatch::outbox::Due::Now
                } else {
                    subwatch::outbox::Due::AsScheduled
                },
            )?;
            println!(
                "sent {}, written {}, failed {}",
                r.sent,
                r.written.len(),
                r.failed.len()
            );
            for f in &r.failed {
                eprintln!("{f}");
            }
            Ok(if r.failed.is_empty() {
                ExitCode::SUCCESS
            } else {
                ExitCode::from(3)
            })
        }
        Command::Sky {
            latitude,
            longitude,
            time,
            ra,
            dec,
        } => sky_command(latitude, longitude, &time, ra, dec),
        Command::RenderNight {
            out,
            seed,
            second_night,
            colour,
            frames,
        } => render_night_command(&out, seed, second_night, colour, frames),
        Command::Measure {
            json,
            stars,
            max_pixels,
            focal_length_mm,
            pixel_size_um,
            files,
        } => {
            let mut measure = MeasureOptions {
                focal_length_mm,
                pixel_size_um,
                ..Default::default()
            };
            measure.limits.max_pixels = max_pixels;
            let opts = RecordOptions {
                measure,
                measure_calibration: true,
                ..Default::default()
            };
            let reader = subwatch::reader::Reader::from_config(&subwatch::config::MeasureConfig {
                max_pixels,
                ..Default::default()
            });
            measure_command(&files, &opts, &reader, json, stars)
        }
        Command::Render {
            out,
            truth,
            seed,
            width,
            height,
            stars,
            psf,
            fwhm,
            beta,
            eccentricity,
            angle,
            sky,
            gradient,
            gain,
            hot_pixels,
            cosmic_rays,
            bayer,
            float,
            object,
            date_obs,
            transparency,
        } => {
            let bayer = match bayer {
                Some(name) => Some(
                    BayerPattern::parse(&name)
                        .with_context(|| format!("unknown Bayer pattern {name:?}"))?,
                ),
                None => None,
            };
            let defaults = SimParams::default();
            let (lo, hi) = defaults.flux_range_e;
            let params = SimParams {
                object: object.unwrap_or(defaults.object.clone()),
                date_obs: date_obs.unwrap_or(defaults.date_obs.clone()),
                flux_range_e: (lo * transparency, hi * transparency),
                width,
                height,
                seed,
                star_count: stars,
                psf: match psf {
                    PsfArg::Gaussian => PsfShape::Gaussian,
                    PsfArg::Moffat => PsfShape::Moffat { beta },
                },
                fwhm_px: fwhm,
                eccentricity,
                angle_deg: angle,
                sky_e: sky,
                gradient: gradient.map_or((0.0, 0.0), |g| (g[0], g[1])),
                gain_e_per_adu: gain,
                hot_pixels,
                cosmic_rays,
                bayer,
                ..Default::default()
            };
            let (pixels, keys, t) = render(&params);
            let encoding = if float {
                Encoding::Float32
            } else {
                Encoding::Unsigned16
            };
            write_frame(&out, &pixels, encoding, &keys)?;
            if let Some(path) = truth {
                let text = serde_json::to_string_pretty(&t)?;
                std::fs::write(&path, text)
                    .with_context(|| format!("writing {}", path.display()))?;
            }
            Ok(ExitCode::SUCCESS)
        }
    }
}

fn render_night_command(
    out: &std::path::Path,
    seed: u64,
    second_night: bool,
    colour: bool,
    frames: Option<usize>,
) -> Result<ExitCode> {
    use subwatch::sim::night::{render_night, NightPlan};
    let mut plan = if colour {
        NightPlan::colour(seed)
    } else if second_night {
        NightPlan::second_night(seed)
    } else {
        NightPlan::full(seed)
    };
    if let Some(n) = frames {
        plan.frames = n;
    }
    std::fs::create_dir_all(out).with_context(|| format!("creating {}", out.display()))?;
    let (frames, truth) = render_night(&plan);
    for f in &frames {
        write_frame(&out.join(&f.name), &f.pixels, Encoding::Unsigned16, &f.keys)?;
    }
    let names: Vec<&str> = frames.iter().map(|f| f.name.as_str()).collect();
    let doc = serde_json::json!({"frames": names, "anomalies": truth});
    std::fs::write(out.join("truth.json"), serde_json::to_string_pretty(&doc)?)?;
    Ok(ExitCode::SUCCESS)
}

fn demo_command(out: &std::path::Path) -> Result<ExitCode> {
    let terminal = std::io::IsTerminal::is_terminal(&std::io::stderr());
    let mut last = String::new();
    let mut progress = |stage: &str, done: usize, total: usize| {
        let width = 30;
        let filled = (done * width)
            .checked_div(total)
            .unwrap_or(width)
            .min(width);
        let line = format!(
            "[{}{}] {done}/{total} {stage}",
            "#".repeat(filled),
            ".".repeat(width - filled)
        );
        if terminal {
            eprint!("\r{line:<70}");
        } else if stage != last {
            eprintln!("{stage}");
        }
        last = stage.to_string();
    };
    let outcome = subwatch::demo::run(out, &mut progress)?;
    if terminal {
        eprintln!();
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
    Ok(ExitCode::SUCCESS)
}

fn sky_command(
    latitude: f64,
    longitude: f64,
    time: &str,
    ra: Option<f64>,
    dec: Option<f64>,
) -> Result<ExitCode> {
    use subwatch::sky;
    let t = subwatch::frame::header::parse_iso_time(time)
        .with_context(|| format!("not an ISO 8601 time: {time}"))?;
    let jd = sky::julian_date(t);
    let (sra, sdec) = sky::sun_radec(jd);
    let (sun_alt, sun_az) = sky::alt_az(sra, sdec, jd, latitude, longitude);
    let crossing = |alt: f64| {
        let (down, up) = sky::sun_crossings(t, alt, latitude, longitude);
        serde_json::json!({"sets_unix": down, "rises_unix": up})
    };
    let target = ra.zip(dec).map(|(r, d)| {
        let (alt, az) = sky::alt_az(r, d, jd, latitude, longitude);
        let (r2000, d2000) = sky::to_j2000(r, d, jd);
        serde_json::json!({"alt_deg": alt, "az_deg": az, "airmass": sky::airmass(alt), "ra_j2000_deg": r2000, "dec_j2000_deg": d2000})
    });
    let doc = serde_json::json!({
        "jd": jd,
        "sun_alt_deg": sun_alt,
        "sun_az_deg": sun_az,
        "twilight": sky::twilight(sun_alt),
        "moon_alt_deg": sky::moon_altitude(jd, latitude, longitude),
        "moon_illumination": sky::moon_illumination(jd),
        "civil": crossing(-6.0),
        "nautical": crossing(-12.0),
        "astronomical": crossing(-18.0),
        "target": target,
    });
    println!("{doc}");
    Ok(ExitCode::SUCCESS)
}

fn report_command(
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

fn print_night(doc: &subwatch::contract::NightDocument, json: bool) -> Result<ExitCode> {
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

fn night_command(
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

fn status_command(config: &std::path::Path, night: Option<String>, json: bool) -> Result<ExitCode> {
    let cfg = subwatch::config::load(config)?;
    let now = subwatch::clock::now_unix();
    let night = match night {
        Some(n) => n,
        None => subwatch::sky::night_label(now, cfg.timezone()).context("clock out of range")?,
    };
    let store = subwatch::store::Store::open(&cfg.store.path)?;
    let counts = store.night_counts(&night)?;
    let daemon: Option<serde_json::Value> = store
        .meta("daemon")?
        .and_then(|s| serde_json::from_str(&s).ok());
    // Running means holding the store's daemon lock, which goes when the process does,
    // however it ends; a heartbeat alone would outlive a killed daemon.
    let running_pid = subwatch::store::daemon_pid(&cfg.store.path);
    let alive = running_pid.is_some();
    if json {
        let doc = serde_json::json!({
            "night": night,
            "counts": counts,
            "daemon": daemon,
            "daemon_running": alive,
            "daemon_pid": running_pid,
        });
        println!("{doc}");
    } else {
        println!("night {night}");
        println!(
            "  frames {}  measured {}  errors {}  skipped {}  warned {}  rejected {}",
            counts.frames,
            counts.measured,
            counts.errors,
            counts.skipped,
            counts.warned,
            counts.rejected
        );
        if let Some(t) = counts.last_recorded_unix {
            println!("  last frame recorded {:.0} s ago", now - t);
        }
        match (&daemon, running_pid) {
            (Some(d), Some(pid)) => println!(
                "  daemon running (process {pid}): {} waiting, {} being read",
                d["waiting"], d["in_flight"]
            ),
            (None, Some(pid)) => println!("  daemon running (process {pid})"),
            (_, None) => println!("  daemon not running"),
        }
    }
    Ok(ExitCode::SUCCESS)
}

fn measure_command(
    files: &[PathBuf],
    opts: &RecordOptions,
    reader: &subwatch::reader::Reader,
    json: bool,
    with_stars: bool,
) -> Result<ExitCode> {
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut failed = false;
    if !json {
        writeln!(
            out,
            "{:<40} {:>6} {:>7} {:>7} {:>6} {:>9} {:>8} {:>7}",
            "file", "stars", "fwhm_px", "fwhm_\"", "ecc", "bkg_adu", "noise", "snr"
        )?;
    }
    for path in files {
        let shown = path.display().to_string();
        let identity =
            subwatch::record::Identity::of(path).unwrap_or_else(|_| subwatch::record::Identity {
                path: shown.clone(),
                size: 0,
                mtime_ns: 0,
            });
        let rec = reader.record(path, identity, 0.0, opts);
        let record = match (rec.status, rec.metrics) {
            (subwatch::record::FrameStatus::Ok, Some(metrics)) => MeasureRecord {
                path: shown.clone(),
                status: "ok",
                error: None,
                metrics: Some(metrics),
                header: rec.header,
                stars: with_stars.then_some(rec.stars),
                rejected: with_stars.then_some(rec.rejected),
            },
            _ => MeasureRecord::error(
                &shown,
                rec.error
                    .unwrap_or_else(|| "not measured (no reason given)".into()),
            ),
        };
        if record.status != "ok" {
            failed = true;
            tracing::warn!("{shown}: {}", record.error.as_deref().unwrap_or(""));
        }
        if json {
            serde_json::to_writer(&mut out, &record)?;
            writeln!(out)?;
        } else {
            print_row(&mut out, &record)?;
        }
    }
    Ok(if failed {
        ExitCode::from(1)
    } else {
        ExitCode::SUCCESS
    })
}

fn print_row(out: &mut impl Write, r: &MeasureRecord) -> Result<()> {
    let opt = |v: Option<f64>, p: usize| v.map_or("-".to_string(), |x| format!("{x:.p$}"));
    match &r.metrics {
        Some(m) => writeln!(
            out,
            "{:<40} {:>6} {:>7} {:>7} {:>6} {:>9.1} {:>8.2} {:>7}",
            r.path,
            m.star_count,
            opt(m.fwhm_px, 2),
            opt(m.fwhm_arcsec, 2),
            opt(m.eccentricity, 2),
            m.background_adu,
            m.noise_adu,
            opt(m.snr_median, 1)
        )?,
        None => writeln!(
            out,
            "{:<40} error: {}",
            r.path,
            r.error.as_deref().unwrap_or("unknown")
        )?,
    }
    Ok(())
}
