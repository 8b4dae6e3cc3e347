//! The `subwatch` command line: parse, dispatch to a command (`commands`), report errors.
//! No logic lives here.

mod commands;

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};

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

/// Where the configuration is read from.
#[derive(clap::Args)]
struct ConfigFile {
    /// The configuration file; config/subwatch.toml documents every key.
    #[arg(
        long = "config",
        value_name = "FILE",
        default_value_os_t = default_config()
    )]
    path: PathBuf,
}

/// The system-wide install's configuration: /etc/subwatch/subwatch.toml on Linux,
/// %ProgramData%\subwatch\subwatch.toml on Windows.
fn default_config() -> PathBuf {
    subwatch::os::system_folder("config").join("subwatch.toml")
}

#[derive(Subcommand)]
enum ServiceAction {
    /// Register subwatch as a Windows service started with Windows, running the daemon
    /// on this configuration (run from a prompt opened as administrator).
    Install {
        #[command(flatten)]
        config: ConfigFile,
    },
    /// Stop the service and remove it (its log, store and reports stay).
    Uninstall,
    /// Start the installed service now.
    Start,
    /// Stop the service; it finishes the frames being read first.
    Stop,
    /// The daemon under the service control manager (the manager starts this).
    #[command(hide = true)]
    Run {
        #[command(flatten)]
        config: ConfigFile,
    },
}

#[derive(Subcommand)]
enum CatalogueAction {
    /// Check the configured catalogue files and index them for cone queries (done
    /// otherwise by the first command that needs them).
    Import {
        #[command(flatten)]
        config: ConfigFile,
        /// Build the index again even when it is current.
        #[arg(long)]
        force: bool,
    },
}

#[derive(Subcommand)]
enum StoreAction {
    /// Copy an SQLite store into a PostgreSQL database a site's rigs share: every row, in
    /// one transaction, verified by counting each table on both sides. The SQLite store
    /// is only read.
    Copy {
        /// The SQLite store file.
        #[arg(long)]
        from: PathBuf,
        /// The database: postgresql://USER@HOST:PORT/DATABASE
        #[arg(long)]
        to: String,
        /// The file holding the database password (this user's alone: mode 600).
        #[arg(long)]
        password_file: Option<PathBuf>,
        /// The authority (PEM) that signed the server's certificate, where the address
        /// asks for TLS (sslmode=require) and it is a site's own.
        #[arg(long)]
        ca_file: Option<PathBuf>,
        /// Name the rig whose frames these are, where the store was kept without one.
        #[arg(long)]
        rig: Option<String>,
    },
}

#[derive(Subcommand)]
enum Command {
    /// Measure frames: FWHM, eccentricity, background, noise, star count, SNR.
    Measure(commands::measure::MeasureArgs),
    /// Watch the configured folders and record every frame in the store (the daemon).
    Watch {
        #[command(flatten)]
        config: ConfigFile,
    },
    /// Check a configuration file: every key, the folders, the store, the password file.
    CheckConfig {
        #[command(flatten)]
        config: ConfigFile,
        /// Also send a test mail through the configured server now.
        #[arg(long)]
        send_test: bool,
    },
    /// Tonight so far: frames seen, measured, errors, last frame, the daemon's queue.
    Status {
        #[command(flatten)]
        config: ConfigFile,
        /// Night label (YYYY-MM-DD); default: the night in progress.
        #[arg(long)]
        night: Option<String>,
        #[arg(long)]
        json: bool,
        /// Also every rig that shares the store: its frames and whether its daemon runs.
        #[arg(long)]
        site: bool,
    },
    /// Process every light frame under DIR as one night and report verdicts and anomalies.
    Night {
        dir: PathBuf,
        /// Print the night document as JSON.
        #[arg(long)]
        json: bool,
        /// Also list every frame and every cosmic-ray hit.
        #[arg(long, conflicts_with = "json")]
        all: bool,
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
        #[command(flatten)]
        config: ConfigFile,
        /// Night label (YYYY-MM-DD): the local date of the evening the night began;
        /// default: the newest night with frames, by their DATE-OBS.
        #[arg(long)]
        night: Option<String>,
        /// Print the night document as JSON (and write no files, unless --send).
        #[arg(long)]
        json: bool,
        /// Also list every frame and every cosmic-ray hit.
        #[arg(long, conflicts_with = "json")]
        all: bool,
        /// Also mail the summary (to a .eml file without a server). Without it the summary
        /// files (HTML, CSV, JSON) are written and the summary printed.
        #[arg(long)]
        send: bool,
        /// Write the summary files here instead of [report] folder.
        #[arg(long)]
        out: Option<PathBuf>,
        /// Every rig of the site that shares this store, not only this one: each frame
        /// names its rig, and the summary has a group per rig, target and filter.
        #[arg(long)]
        site: bool,
        /// A target across all its nights (as its frames name it): per filter the nights,
        /// verdicts, usable time, quality night by night, and the frames to stack.
        #[arg(long, value_name = "NAME", conflicts_with_all = ["night", "send", "all"])]
        target: Option<String>,
        /// List the targets the store holds, with their nights and frames.
        #[arg(long, conflicts_with_all = ["night", "send", "all", "target"])]
        list_targets: bool,
        /// With --target: list the best fraction (0 to 1] of the frames to stack, by
        /// weight.
        #[arg(long, value_name = "FRACTION", requires = "target")]
        best_fraction: Option<f64>,
        /// With --target: list the best frames up to this many hours, by weight.
        #[arg(
            long,
            value_name = "HOURS",
            requires = "target",
            conflicts_with = "best_fraction"
        )]
        best_hours: Option<f64>,
    },
    /// Deliver the mail waiting in the outbox (it is retried with growing waits).
    Outbox {
        #[command(flatten)]
        config: ConfigFile,
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
        /// A target's RA of date, degrees (also converted to J2000); needs --dec.
        #[arg(long, allow_hyphen_values = true, requires = "dec")]
        ra: Option<f64>,
        /// The target's Dec of date, degrees; needs --ra.
        #[arg(long, allow_hyphen_values = true, requires = "ra")]
        dec: Option<f64>,
    },
    /// A whole invented night, end to end: frames land in a watched folder, the daemon
    /// measures and judges them, and the morning summary is written (no setup needed).
    Demo {
        /// Where to put it all (created; an earlier demo's folder is replaced). Default:
        /// subwatch-demo in the system's temporary folder, so a checkout stays clean.
        #[arg(long)]
        out: Option<PathBuf>,
        /// Serve the night's live status page on this machine at this port while the
        /// demo runs (another free port when it is taken; 0 = no page).
        #[arg(long, default_value_t = 8480)]
        page_port: u16,
        /// After the morning, keep the status page (and the daemon) running until Ctrl-C.
        #[arg(long)]
        keep_page: bool,
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
        /// A one-shot-color sequence with one very red star.
        #[arg(long)]
        color: bool,
        /// Number of frames (default: 40, or 10 for color).
        #[arg(long)]
        frames: Option<usize>,
        /// The first frame's DATE-OBS, UTC (default: the scenario's, 2026-03-14T20:40:00).
        #[arg(long, value_name = "YYYY-MM-DDTHH:MM:SS")]
        start: Option<String>,
        /// Frames of this many pixels a side (default 768).
        #[arg(long, value_name = "PIXELS")]
        size: Option<usize>,
        /// Stars in the field (default 260).
        #[arg(long)]
        stars: Option<usize>,
        /// A night without events (clouds, gusts, trails, focus drift, meridian flip,
        /// moving object, flash).
        #[arg(long)]
        quiet: bool,
    },
    /// The star catalogue: `import` checks the configured files and indexes them once.
    Catalogue {
        #[command(subcommand)]
        action: CatalogueAction,
    },
    /// The store: `copy` moves an SQLite store into a shared PostgreSQL database.
    Store {
        #[command(subcommand)]
        action: StoreAction,
    },
    /// Record the past nights under a folder tree into the store, as the daemon would
    /// have, and judge each night (safe to stop and run again; `--shard K/N` for a
    /// scheduler's array of tasks).
    Archive(commands::archive::ArchiveArgs),
    /// The daemon as a Windows service: install, uninstall, start, stop (on Linux the
    /// systemd unit in systemd/ runs it instead).
    Service {
        #[command(subcommand)]
        action: ServiceAction,
    },
    /// Read one file for another subwatch process (request on stdin, record on stdout).
    #[command(name = "read-worker", hide = true)]
    ReadWorker,
    /// Render a synthetic frame with known truth (for tests and demonstrations).
    Render(commands::render::RenderArgs),
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    // The daemon says what it is doing by default; one-shot commands only warn. The
    // service logs into its daily files, set up once its configuration is read.
    match cli.command {
        Command::Service {
            action: ServiceAction::Run { .. },
        } => {}
        Command::Watch { .. } | Command::Archive(_) => subwatch::logging::init("info"),
        _ => subwatch::logging::init("warn"),
    }
    // A panic anywhere is reported as one line.
    std::panic::set_hook(Box::new(|info| {
        tracing::error!("internal error: {info}");
    }));
    match run(cli) {
        Ok(code) => code,
        // The reader of the output closed the pipe (`| head`): quiet, as standard tools
        // are; the status a shell gives a command that SIGPIPE ended (128 + 13).
        Err(e) if closed_pipe(&e) => ExitCode::from(141),
        Err(e) => {
            eprintln!("subwatch: {}", describe(&e));
            ExitCode::from(2)
        }
    }
}

/// Whether an error is the output's reader having gone.
fn closed_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
            || c.downcast_ref::<serde_json::Error>()
                .and_then(|j| j.io_error_kind())
                == Some(std::io::ErrorKind::BrokenPipe)
    })
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
    use commands::*;
    match cli.command {
        Command::Watch { config } => daemon::watch(&config.path),
        Command::CheckConfig { config, send_test } => daemon::check_config(&config.path, send_test),
        Command::Status {
            config,
            night,
            json,
            site,
        } => daemon::status(&config.path, night, json, site),
        Command::Outbox { config, now } => daemon::outbox(&config.path, now),
        Command::Night {
            dir,
            json,
            all,
            config,
            report,
        } => night::night(&dir, json, all, config.as_deref(), report.as_deref()),
        Command::Report {
            config,
            json,
            site,
            out,
            target,
            list_targets,
            best_fraction,
            best_hours,
            ..
        } if target.is_some() || list_targets => target::run(
            &config.path,
            target::TargetOptions {
                target,
                json,
                site,
                out,
                best_fraction,
                best_hours,
            },
        ),
        Command::Report {
            config,
            night,
            json,
            all,
            send,
            site,
            out,
            ..
        } => night::report(
            &config.path,
            night,
            night::ReportOptions {
                json,
                all,
                send,
                site,
                out,
            },
        ),
        Command::Demo {
            out,
            page_port,
            keep_page,
        } => demo::run(
            &out.unwrap_or_else(|| std::env::temp_dir().join("subwatch-demo")),
            page_port,
            keep_page,
        ),
        Command::ReadWorker => {
            subwatch::reader::serve(std::io::stdin().lock(), std::io::stdout().lock())
                .context("read-worker")?;
            Ok(ExitCode::SUCCESS)
        }
        Command::Sky {
            latitude,
            longitude,
            time,
            ra,
            dec,
        } => sky::run(latitude, longitude, &time, ra, dec),
        Command::RenderNight {
            out,
            seed,
            second_night,
            color,
            frames,
            start,
            size,
            stars,
            quiet,
        } => render::night(
            &out,
            seed,
            second_night,
            color,
            render::NightChanges {
                frames,
                start,
                size,
                stars,
                quiet,
            },
        ),
        Command::Measure(args) => measure::run(args),
        Command::Archive(args) => archive::run(args),
        Command::Catalogue {
            action: CatalogueAction::Import { config, force },
        } => commands::catalogue::import(&config.path, force),
        Command::Render(args) => render::frame(args),
        Command::Service { action } => match action {
            ServiceAction::Install { config } => service::install(&config.path),
            ServiceAction::Uninstall => service::uninstall(),
            ServiceAction::Start => service::start(),
            ServiceAction::Stop => service::stop(),
            ServiceAction::Run { config } => service::run(config.path),
        },
        Command::Store {
            action:
                StoreAction::Copy {
                    from,
                    to,
                    password_file,
                    ca_file,
                    rig,
                },
        } => commands::store::copy(&from, &to, password_file, ca_file, rig.as_deref()),
    }
}
