//! The daemon: decides *when* a file goes through the pipeline. File events (or polling)
//! name candidate files; the settle tracker says when each is complete; a bounded number
//! of workers have them read (each in a reader process of its own) and recorded, once
//! per path. A periodic rescan of the folders against the store catches anything an
//! event missed, and at start-up it catches up on frames that landed while the daemon
//! was down. A record the store refuses (a full disk) is kept and stored again once the
//! store works, without a restart.
//!
//! Durability at each hand-off: a file is *being read* in the store before its reader
//! starts (so a crash of this process while reading it is counted, and a file that
//! keeps doing that is given up after three tries); its record, stars and the clearing
//! of that mark are one transaction; its verdict follows in a second one, and frames left
//! without one are judged at start and once a minute; lists are rewritten whole.
//!
//! This module reads the wall clock and the file system; reading, recording and judging
//! live in `reader`, `store` and `judge`.

pub mod alerts;
mod checks;
mod frame;
pub mod judge;
mod outage;
pub mod page;
pub mod schedule;
pub mod settle;
mod systemd;
pub mod web;

use std::collections::{HashMap, HashSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use notify::Watcher;
use tokio::sync::mpsc;
use tokio::task::JoinSet;

use crate::clock::{Clock, SystemClock};
use crate::config::Config;
use crate::logging::shown;
use crate::pipeline::RecordOptions;
use crate::record::{FrameRecord, Identity};
use crate::store::{Store, StoreError};
use frame::{process, settle_interrupted, store_record, LogLine, Outcome};
pub use judge::{judge_in_store, Judging};
use settle::{Observation, SettleTracker};
use systemd::sd_notify;

#[derive(Debug, thiserror::Error)]
pub enum WatchError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("cannot watch {path}: {source}")]
    Notify {
        path: PathBuf,
        #[source]
        source: notify::Error,
    },
    #[error("cannot start the runtime: {0}")]
    Runtime(std::io::Error),
}

/// At most this many records wait in memory for a failing store; older ones are let go
/// and read again from their files once the store works.
const PENDING_LIMIT: usize = 100;

/// The file at `path` now, if it is a regular file.
pub(super) fn observe(path: &Path) -> Option<Identity> {
    let m = std::fs::metadata(path).ok()?;
    m.is_file().then(|| Identity::from_metadata(path, &m))
}

fn observation(id: &Identity) -> Observation {
    Observation {
        size: id.size,
        mtime_ns: id.mtime_ns,
    }
}

pub(super) struct Shared {
    clock: Arc<dyn Clock>,
    outage: outage::Outage,
    store: Mutex<Store>,
    options: RecordOptions,
    reader: crate::reader::Reader,
    judging: Judging,
    config: Config,
}

/// Run the daemon until SIGTERM or SIGINT.
pub fn run(config: Config) -> Result<(), WatchError> {
    run_until(config, Arc::new(AtomicBool::new(false)))
}

/// Run the daemon until SIGTERM, SIGINT, or `stop` becoming true (the demo's way to end
/// it); frames in flight are finished either way.
pub fn run_until(config: Config, stop: Arc<AtomicBool>) -> Result<(), WatchError> {
    run_with_clock(config, stop, Arc::new(SystemClock))
}

/// As [`run_until`], telling the time by `clock`.
pub fn run_with_clock(
    config: Config,
    stop: Arc<AtomicBool>,
    clock: Arc<dyn Clock>,
) -> Result<(), WatchError> {
    let workers = if config.watch.workers == 0 {
        std::thread::available_parallelism().map_or(2, |n| n.get())
    } else {
        config.watch.workers
    };
    // Past a file-size limit a write fails (and is retried) instead of ending the daemon.
    crate::os::prepare_daemon_process();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .max_blocking_threads(workers.max(1) + 2)
        .enable_all()
        .build()
        .map_err(WatchError::Runtime)?;
    runtime.block_on(daemon(config, workers, stop, clock))
}

/// How mail goes, in words for the start line.
fn mail_state(c: &Config) -> String {
    if c.mail.to.is_empty() {
        return "mail off (no [mail] to)".into();
    }
    match &c.mail.smtp_host {
        Some(host) => format!("mail to {} recipient(s) through {host}", c.mail.to.len()),
        None => format!(
            "mail to {} recipient(s) written as .eml files into {} (no smtp_host)",
            c.mail.to.len(),
            shown(&crate::morning::report_folder(c))
        ),
    }
}

async fn daemon(
    mut config: Config,
    workers: usize,
    stop: Arc<AtomicBool>,
    wall: Arc<dyn Clock>,
) -> Result<(), WatchError> {
    // The calibration library is watched as a capture folder: its frames are recorded
    // under the nights their DATE-OBS gives, for later nights to fall back on.
    if let Some(library) = config.calibration.library.clone() {
        if !config.watch.folders.contains(&library) {
            config.watch.folders.push(library);
        }
    }
    // One spelling per file: events, scans and the store all see canonical paths.
    for folder in config.watch.folders.iter_mut() {
        *folder = std::fs::canonicalize(&*folder).map_err(|e| WatchError::Notify {
            path: folder.clone(),
            source: notify::Error::io(e),
        })?;
    }
    // One daemon per store: a second one is refused, naming the first.
    // A shared database not reachable yet (the server starting with the PC) is waited
    // for, said once; anything else wrong with the store stops the start.
    let mut said = false;
    let (claim, mut store) = loop {
        let opened = crate::store::claim_configured(&config)
            .and_then(|claim| Ok((claim, Store::open_configured(&config)?)));
        match opened {
            Ok(pair) => break pair,
            Err(e) if e.is_unreachable() && !stop.load(Ordering::Relaxed) => {
                if !said {
                    tracing::error!(
                        "the store cannot be reached: {e}; trying again every 15 s (said once)"
                    );
                    said = true;
                }
                tokio::time::sleep(Duration::from_secs(15)).await;
            }
            Err(e) => return Err(e.into()),
        }
    };
    settle_interrupted(&mut store, wall.now_unix())?;
    // The status page: a failure to serve it costs the page, never the watching.
    let _web = match web::start(&config, wall.clone()) {
        Ok(Some(w)) => {
            tracing::info!(
                "status page at http://{}/ ({})",
                w.address,
                if config.web.token_file.is_some() {
                    "access token required"
                } else if w.address.ip().is_loopback() {
                    "this machine only"
                } else {
                    "open to the network without a token"
                }
            );
            Some(w)
        }
        Ok(None) => None,
        Err(e) => {
            tracing::error!("status page off: {e}");
            None
        }
    };
    let claim = Arc::new(Mutex::new(claim));
    let mut recorded: HashMap<String, (u64, i64)> = store.recorded_versions()?;
    let lists = crate::lists::Lists::from_config(&config);
    let filter = crate::walk::FrameFilter::from_config(&config);
    let shared = Arc::new(Shared {
        clock: wall.clone(),
        outage: outage::Outage::default(),
        store: Mutex::new(store),
        options: RecordOptions::from_config(&config),
        reader: crate::reader::Reader::from_config(&config.measure),
        judging: Judging {
            rules: config.rule_specs(),
            site: config.site_position(),
            lists,
            calibration: config.calibration.settings.clone(),
        },
        config: config.clone(),
    });

    // File events: notify runs its own thread and only forwards paths.
    let (tx, mut rx) = mpsc::channel::<PathBuf>(8192);
    let overflow = Arc::new(AtomicBool::new(false));
    let _watcher = if config.watch.poll_seconds == 0.0 {
        let overflow = overflow.clone();
        let mut w =
            notify::recommended_watcher(move |res: notify::Result<notify::Event>| match res {
                Ok(ev) => {
                    for p in ev.paths {
                        if tx.try_send(p).is_err() {
                            overflow.store(true, Ordering::Relaxed);
                        }
                    }
                }
                Err(_) => overflow.store(true, Ordering::Relaxed),
            })
            .map_err(|source| WatchError::Notify {
                path: PathBuf::new(),
                source,
            })?;
        for folder in &config.watch.folders {
            w.watch(folder, notify::RecursiveMode::Recursive)
                .map_err(|source| WatchError::Notify {
                    path: folder.clone(),
                    source,
                })?;
        }
        Some(w)
    } else {
        drop(tx);
        None
    };

    let settle = config.watch.settle_seconds;
    let start = Instant::now();
    let clock = || start.elapsed().as_secs_f64();
    let mut tracker = SettleTracker::default();
    let mut ready: VecDeque<PathBuf> = VecDeque::new();
    let mut in_flight: HashSet<PathBuf> = HashSet::new();
    // Records the store refused, oldest first, and their paths.
    let mut pending: VecDeque<Box<FrameRecord>> = VecDeque::new();
    let mut pending_paths: HashSet<PathBuf> = HashSet::new();
    let mut retrying = false;
    let mut stored_this_run = 0usize;
    // Each job: whether it stores kept records again, and what became of its files.
    let mut jobs: JoinSet<(bool, Vec<Outcome>)> = JoinSet::new();

    let consider = |path: PathBuf,
                    tracker: &mut SettleTracker,
                    recorded: &HashMap<String, (u64, i64)>,
                    busy: &dyn Fn(&PathBuf) -> bool,
                    now: f64| {
        if busy(&path) || tracker.contains(&path) || !filter.wants(&config.watch.folders, &path) {
            return;
        }
        let Some(id) = observe(&path) else {
            return;
        };
        if recorded.get(&id.path) == Some(&(id.size, id.mtime_ns)) {
            return;
        }
        let age = (wall.now_unix() - id.mtime_unix()).max(0.0);
        tracker.track(path, observation(&id), now, age);
    };

    {
        let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
        let judged = judge::judge_missing(&store, &shared.judging)?;
        if judged > 0 {
            tracing::info!(
                "judged {judged} frame(s) recorded before the last stop without a verdict"
            );
        }
    }
    // Catch up: everything in the folders whose present version is not recorded.
    let mut initial = filter.walk(&config.watch.folders);
    initial.sort_by_key(|p| observe(p).map_or(0, |id| id.mtime_ns));
    for p in initial {
        let busy = |_: &PathBuf| false;
        consider(p, &mut tracker, &recorded, &busy, clock());
    }
    tracing::info!(
        "subwatch {} started: config {}; watching {}; store {}; {}; {} frame(s) to catch up on; {} worker(s)",
        env!("CARGO_PKG_VERSION"),
        config
            .source
            .as_deref()
            .map_or("(built in)".into(), shown),
        config
            .watch
            .folders
            .iter()
            .map(|f| shown(f))
            .collect::<Vec<_>>()
            .join(", "),
        crate::store::Location::from_config(&config.store),
        mail_state(&config),
        tracker.len(),
        workers
    );
    sd_notify("READY=1");

    let tick = Duration::from_secs_f64((settle / 4.0).clamp(0.05, 1.0));
    let mut ticker = tokio::time::interval(tick);
    let rescan_every = if config.watch.poll_seconds > 0.0 {
        config.watch.poll_seconds
    } else {
        config.watch.rescan_seconds
    };
    let mut rescan = tokio::time::interval(Duration::from_secs_f64(rescan_every));
    rescan.tick().await;
    let mut heartbeat = tokio::time::interval(Duration::from_secs(2));
    let mut minute = tokio::time::interval(Duration::from_secs_f64(config.watch.checks_seconds));
    let mut retry = tokio::time::interval(Duration::from_secs(15));
    retry.tick().await;
    let mut sigterm = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
        .map_err(WatchError::Runtime)?;
    let mut sigint = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::interrupt())
        .map_err(WatchError::Runtime)?;

    let why_stopped = loop {
        let busy =
            |p: &PathBuf| in_flight.contains(p) || ready.contains(p) || pending_paths.contains(p);
        tokio::select! {
            _ = sigterm.recv() => break "SIGTERM",
            _ = sigint.recv() => break "SIGINT",
            Some(path) = rx.recv() => {
                consider(path, &mut tracker, &recorded, &busy, clock());
            }
            _ = rescan.tick() => {
                overflow.store(false, Ordering::Relaxed);
                for p in filter.walk(&config.watch.folders) {
                    consider(p, &mut tracker, &recorded, &busy, clock());
                }
            }
            _ = minute.tick() => {
                let shared = shared.clone();
                let _ = tokio::task::spawn_blocking(move || checks::minute_checks(&shared)).await;
            }
            _ = retry.tick(), if !pending.is_empty() && !retrying => {
                retrying = true;
                let batch: Vec<Box<FrameRecord>> = pending.drain(..).collect();
                let shared = shared.clone();
                jobs.spawn_blocking(move || {
                    (true, batch.into_iter().map(|r| store_record(&shared, *r)).collect())
                });
            }
            _ = heartbeat.tick() => {
                let state = serde_json::json!({
                    "pid": std::process::id(),
                    "waiting": tracker.len() + ready.len(),
                    "in_flight": in_flight.len(),
                    "not_stored": pending.len(),
                    "updated_unix": wall.now_unix(),
                });
                let shared = shared.clone();
                let claim = claim.clone();
                let kept = tokio::task::spawn_blocking(move || {
                    if !shared.outage.away() {
                        let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
                        if let Err(e) = store.set_meta("daemon", &state.to_string()) {
                            tracing::debug!("heartbeat: {e}");
                        }
                    }
                    // A shared store's server that restarted took the rig's claim with
                    // it: taken again, unless another daemon of this rig took it first.
                    claim.lock().unwrap_or_else(|p| p.into_inner()).keep()
                }).await;
                match kept {
                    Ok(Ok(false)) => {
                        tracing::error!(
                            "another daemon took rig '{}' while the store's server was away; this one stops (give each daemon its own rig name)",
                            config.rig.name
                        );
                        break "another daemon holds this rig";
                    }
                    Ok(Err(e)) => tracing::debug!("claim: {e}"),
                    _ => {}
                }
            }
            Some(done) = jobs.join_next() => {
                let (was_retry, outcomes) = match done {
                    Ok(o) => o,
                    Err(e) => {
                        tracing::error!("worker failed: {e}");
                        (false, Vec::new())
                    }
                };
                if was_retry {
                    retrying = false;
                }
                let mut retry_failed: Option<String> = None;
                for outcome in outcomes {
                    match outcome {
                        Outcome::Stored { path, version, log } => {
                            shared.outage.answered(wall.now_unix(), pending.len());
                            in_flight.remove(&path);
                            pending_paths.remove(&path);
                            recorded.insert(path.to_string_lossy().into_owned(), version);
                            match log {
                                Some(LogLine::Info(l)) => {
                                    stored_this_run += 1;
                                    tracing::info!("{l}");
                                }
                                Some(LogLine::Warn(l)) => {
                                    stored_this_run += 1;
                                    tracing::warn!("{l}");
                                }
                                None => {}
                            }
                        }
                        Outcome::NotStored { record, error } => {
                            let path = PathBuf::from(&record.identity.path);
                            in_flight.remove(&path);
                            if !was_retry && !shared.outage.away() {
                                tracing::error!(
                                    "{} not recorded: {error}; kept, and stored again every 15 s until the store takes it",
                                    shown(&path)
                                );
                            } else {
                                retry_failed = Some(error);
                            }
                            pending_paths.insert(path);
                            pending.push_back(record);
                            if pending.len() > PENDING_LIMIT {
                                if let Some(dropped) = pending.pop_front() {
                                    let p = PathBuf::from(&dropped.identity.path);
                                    pending_paths.remove(&p);
                                    tracing::warn!(
                                        "{} let go while the store fails; it is read again from its file once the store works",
                                        shown(&p)
                                    );
                                }
                            }
                        }
                        Outcome::Gone(path) => {
                            in_flight.remove(&path);
                        }
                    }
                }
                if let (Some(error), false) = (retry_failed, shared.outage.away()) {
                    tracing::error!(
                        "the store still fails ({} frame(s) waiting to be stored): {error}",
                        pending.len()
                    );
                }
            }
            _ = ticker.tick() => {
                if stop.load(Ordering::Relaxed) {
                    break "the demo's end";
                }
                if overflow.swap(false, Ordering::Relaxed) {
                    // Events were dropped: the folders themselves are the truth.
                    for p in filter.walk(&config.watch.folders) {
                        consider(p, &mut tracker, &recorded, &busy, clock());
                    }
                }
                let now = clock();
                for path in tracker.paths() {
                    if ready.len() >= config.watch.queue_limit {
                        break;
                    }
                    let obs = observe(&path).map(|id| observation(&id));
                    if tracker.observe(&path, obs, now, settle) {
                        // Complete by the header's own account (plain FITS, padding
                        // included), or not checkable (compressed): the settle time
                        // alone decides. A file that stays short for a long time was cut
                        // off (a crash mid-write): it is read, and recorded with its error.
                        let given_up = tracker.stable_for(&path, now) > (10.0 * settle).max(60.0);
                        if given_up || crate::frame::fits::looks_complete(&path) != Some(false) {
                            tracker.forget(&path);
                            ready.push_back(path);
                        }
                    }
                }
            }
        }
        while in_flight.len() < workers {
            let Some(path) = ready.pop_front() else { break };
            in_flight.insert(path.clone());
            let shared = shared.clone();
            jobs.spawn_blocking(move || (false, vec![process(&shared, &path)]));
        }
    };

    tracing::info!(
        "stopping ({why_stopped}): finishing {} frame(s) being read",
        in_flight.len()
    );
    sd_notify("STOPPING=1");
    let deadline = tokio::time::sleep(Duration::from_secs(120));
    tokio::pin!(deadline);
    while !jobs.is_empty() {
        tokio::select! {
            _ = &mut deadline => {
                tracing::warn!("gave up waiting for {} frame(s); they are read at the next start", jobs.len());
                break;
            }
            Some(done) = jobs.join_next() => {
                for outcome in done.map(|d| d.1).unwrap_or_default() {
                    match outcome {
                        Outcome::Stored { log: Some(LogLine::Info(l)), .. } => {
                            stored_this_run += 1;
                            tracing::info!("{l}");
                        }
                        Outcome::Stored { log: Some(LogLine::Warn(l)), .. } => {
                            stored_this_run += 1;
                            tracing::warn!("{l}");
                        }
                        Outcome::NotStored { record, error } => tracing::error!(
                            "{} not recorded: {error}; it is read again at the next start",
                            shown(Path::new(&record.identity.path))
                        ),
                        _ => {}
                    }
                }
            }
        }
    }
    if !pending.is_empty() {
        tracing::error!(
            "{} frame(s) the store did not take are read again at the next start",
            pending.len()
        );
    }
    tracing::info!("subwatch stopped: {stored_this_run} frame(s) recorded in this run");
    Ok(())
}
