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
//! The daemon is a value, [`Daemon`], whose methods are its hand-offs: [`Daemon::start`]
//! (claim, catch-up), a file event ([`Daemon::file_event`]), a rescan, a tick of the
//! settle tracker ([`Daemon::tick`]), a finished job ([`Daemon::job_done`]), the periodic
//! checks and heartbeat, and [`Daemon::shutdown`]. [`run_with_clock`] drives it from
//! tokio's timers and the system's stop requests; a Windows service drives the same
//! value, its stop control raising the same `stop` flag.
//!
//! This module reads the wall clock and the file system; reading, recording and judging
//! live in `reader`, `store` and `judge`.
//!
//! Longer than most modules: `Daemon` and its hand-offs are one state machine, kept
//! together so each row of ARCHITECTURE.md's durability table is one of its methods; what
//! a hand-off does lives in `frame`, `judge` and `checks`.

pub mod alerts;
mod checks;
mod frame;
pub mod judge;
mod outage;
pub mod page;
pub mod schedule;
pub mod settle;
pub mod web;

use std::collections::{HashMap, HashSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use notify::{RecommendedWatcher, Watcher};
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

/// Each job's answer: whether it stored kept records again, and what became of its files.
type JobResult = (bool, Vec<Outcome>);

/// The running daemon between hand-offs: what it watches, what waits, what is being
/// read, and what the store has not taken yet.
struct Daemon {
    config: Config,
    workers: usize,
    wall: Arc<dyn Clock>,
    shared: Arc<Shared>,
    claim: Arc<Mutex<crate::store::Claim>>,
    filter: crate::walk::FrameFilter,
    /// The version (size, modification time) of each path the store holds.
    recorded: HashMap<String, (u64, i64)>,
    tracker: SettleTracker,
    ready: VecDeque<PathBuf>,
    in_flight: HashSet<PathBuf>,
    /// Records the store refused, oldest first, and their paths.
    pending: VecDeque<Box<FrameRecord>>,
    pending_paths: HashSet<PathBuf>,
    retrying: bool,
    stored_this_run: usize,
    /// File events were dropped (the channel was full): the next tick rescans.
    overflow: Arc<AtomicBool>,
    started: Instant,
    _web: Option<web::WebServer>,
    _watcher: Option<RecommendedWatcher>,
}

/// Why the daemon stopped, in words for the log.
type StopReason = &'static str;

impl Daemon {
    /// Start: claim the store (waiting for a shared one's server), judge what was left
    /// without a verdict, serve the page, watch the folders, and find what landed while
    /// the daemon was down. The file events come on the channel returned.
    async fn start(
        mut config: Config,
        workers: usize,
        stop: &AtomicBool,
        stop_requests: &mut crate::os::StopRequests,
        wall: Arc<dyn Clock>,
    ) -> Result<Option<(Daemon, mpsc::Receiver<PathBuf>)>, WatchError> {
        prepare_folders(&mut config)?;
        let Some((claim, mut store)) = claim_store(&config, stop, stop_requests).await? else {
            return Ok(None);
        };
        settle_interrupted(&mut store, wall.now_unix())?;
        let web = start_page(&config, &wall);
        let recorded = store.recorded_versions()?;
        let shared = Arc::new(Shared {
            clock: wall.clone(),
            outage: outage::Outage::default(),
            store: Mutex::new(store),
            options: RecordOptions::from_config(&config),
            reader: crate::reader::Reader::from_config(&config.measure),
            judging: Judging {
                rules: config.rule_specs(),
                site: config.site_position(),
                lists: crate::lists::Lists::from_config(&config),
                calibration: config.calibration.settings.clone(),
            },
            config: config.clone(),
        });
        let overflow = Arc::new(AtomicBool::new(false));
        let (watcher, events) = watch_folders(&config, overflow.clone())?;
        let mut d = Daemon {
            filter: crate::walk::FrameFilter::from_config(&config),
            config,
            workers,
            wall,
            shared,
            claim: Arc::new(Mutex::new(claim)),
            recorded,
            tracker: SettleTracker::default(),
            ready: VecDeque::new(),
            in_flight: HashSet::new(),
            pending: VecDeque::new(),
            pending_paths: HashSet::new(),
            retrying: false,
            stored_this_run: 0,
            overflow,
            started: Instant::now(),
            _web: web,
            _watcher: watcher,
        };
        {
            let store = d.shared.store.lock().unwrap_or_else(|p| p.into_inner());
            let judged = judge::judge_missing(&store, &d.shared.judging)?;
            if judged > 0 {
                tracing::info!(
                    "judged {judged} frame(s) recorded before the last stop without a verdict"
                );
            }
        }
        // Catch up: everything in the folders whose present version is not recorded.
        let mut initial = d.filter.walk(&d.config.watch.folders);
        initial.sort_by_key(|p| observe(p).map_or(0, |id| id.mtime_ns));
        for p in initial {
            d.consider(p);
        }
        tracing::info!(
            "subwatch {} started: config {}; watching {}; store {}; {}; {} frame(s) to catch up on; {} worker(s)",
            env!("CARGO_PKG_VERSION"),
            d.config
                .source
                .as_deref()
                .map_or("(built in)".into(), shown),
            d.config
                .watch
                .folders
                .iter()
                .map(|f| shown(f))
                .collect::<Vec<_>>()
                .join(", "),
            crate::store::Location::from_config(&d.config.store),
            mail_state(&d.config),
            d.tracker.len(),
            d.workers
        );
        crate::os::notify_service_manager("READY=1");
        Ok(Some((d, events)))
    }

    /// Seconds since the start, the settle tracker's clock.
    fn elapsed(&self) -> f64 {
        self.started.elapsed().as_secs_f64()
    }

    /// Whether a path is already on its way (read, queued, or waiting for the store).
    fn busy(&self, p: &PathBuf) -> bool {
        self.in_flight.contains(p) || self.ready.contains(p) || self.pending_paths.contains(p)
    }

    /// A path that may be a new frame, or a new version of one: tracked until it
    /// settles, unless it is on its way already, left out, or recorded as it is.
    fn consider(&mut self, path: PathBuf) {
        if self.busy(&path)
            || self.tracker.contains(&path)
            || !self.filter.wants(&self.config.watch.folders, &path)
        {
            return;
        }
        let Some(id) = observe(&path) else {
            return;
        };
        if self.recorded.get(&id.path) == Some(&(id.size, id.mtime_ns)) {
            return;
        }
        let age = (self.wall.now_unix() - id.mtime_unix()).max(0.0);
        let now = self.elapsed();
        self.tracker.track(path, observation(&id), now, age);
    }

    /// A file event (durable only in memory: the rescan is what makes sure).
    fn file_event(&mut self, path: PathBuf) {
        self.consider(path);
    }

    /// Every frame in the folders against what is recorded.
    fn rescan(&mut self) {
        for p in self.filter.walk(&self.config.watch.folders) {
            self.consider(p);
        }
    }

    /// A tick of the settle tracker: files that stopped changing (and are complete, or
    /// were given up on) become ready; a dropped file event makes a rescan.
    fn tick(&mut self) {
        if self.overflow.swap(false, Ordering::Relaxed) {
            self.rescan();
        }
        let now = self.elapsed();
        let settle = self.config.watch.settle_seconds;
        for path in self.tracker.paths() {
            if self.ready.len() >= self.config.watch.queue_limit {
                break;
            }
            let obs = observe(&path).map(|id| observation(&id));
            if self.tracker.observe(&path, obs, now, settle) {
                // A file its writer still holds open (Windows refuses to share it) is not
                // finished, however long its size has not changed: it settles again
                // once it is let go.
                let complete = match crate::frame::fits::looks_complete(&path) {
                    Ok(c) => c,
                    Err(_) => {
                        self.tracker.restart(&path, now);
                        continue;
                    }
                };
                // Complete by the header's own account (plain FITS, padding included), or
                // not checkable (compressed): the settle time alone decides. A file that
                // stays short for a long time was cut off (a crash mid-write): it is
                // read, and recorded with its error.
                let given_up = self.tracker.stable_for(&path, now) > (10.0 * settle).max(60.0);
                if given_up || complete != Some(false) {
                    self.tracker.forget(&path);
                    self.ready.push_back(path);
                }
            }
        }
    }

    /// Hand ready files to the workers, up to their number: each is marked as being read
    /// in the store before its reader starts (`frame::process`).
    fn dispatch(&mut self, jobs: &mut JoinSet<JobResult>) {
        while self.in_flight.len() < self.workers {
            let Some(path) = self.ready.pop_front() else {
                break;
            };
            self.in_flight.insert(path.clone());
            let shared = self.shared.clone();
            jobs.spawn_blocking(move || (false, vec![process(&shared, &path)]));
        }
    }

    /// Store again what the store refused, as one job.
    fn retry_pending(&mut self, jobs: &mut JoinSet<JobResult>) {
        if self.pending.is_empty() || self.retrying {
            return;
        }
        self.retrying = true;
        let batch: Vec<Box<FrameRecord>> = self.pending.drain(..).collect();
        let shared = self.shared.clone();
        jobs.spawn_blocking(move || {
            (
                true,
                batch
                    .into_iter()
                    .map(|r| store_record(&shared, *r))
                    .collect(),
            )
        });
    }

    /// A finished job: what it stored is recorded as recorded, what the store refused is
    /// kept (at most `PENDING_LIMIT`), and each frame's line is logged.
    fn job_done(&mut self, done: Result<JobResult, tokio::task::JoinError>) {
        let (was_retry, outcomes) = match done {
            Ok(o) => o,
            Err(e) => {
                tracing::error!("worker failed: {e}");
                (false, Vec::new())
            }
        };
        if was_retry {
            self.retrying = false;
        }
        let mut retry_failed: Option<String> = None;
        for outcome in outcomes {
            match outcome {
                Outcome::Stored { path, version, log } => {
                    self.shared
                        .outage
                        .answered(self.wall.now_unix(), self.pending.len());
                    self.in_flight.remove(&path);
                    self.pending_paths.remove(&path);
                    self.recorded
                        .insert(path.to_string_lossy().into_owned(), version);
                    self.log_stored(log);
                }
                Outcome::NotStored { record, error } => {
                    let path = PathBuf::from(&record.identity.path);
                    self.in_flight.remove(&path);
                    if !was_retry && !self.shared.outage.away() {
                        tracing::error!(
                            "{} not recorded: {error}; kept, and stored again every 15 s until the store takes it",
                            shown(&path)
                        );
                    } else {
                        retry_failed = Some(error);
                    }
                    self.keep_pending(path, record);
                }
                Outcome::Gone(path) => {
                    self.in_flight.remove(&path);
                }
                Outcome::StillBeingWritten(path) => {
                    self.in_flight.remove(&path);
                    self.settle_again(path);
                }
            }
        }
        if let (Some(error), false) = (retry_failed, self.shared.outage.away()) {
            tracing::error!(
                "the store still fails ({} frame(s) waiting to be stored): {error}",
                self.pending.len()
            );
        }
    }

    /// A file its reader found still held by its writer: tracked again, its settle time
    /// started anew (its age since the last change does not count).
    fn settle_again(&mut self, path: PathBuf) {
        tracing::debug!(
            "{} is still being written; it is read once it is let go",
            shown(&path)
        );
        self.consider(path.clone());
        let now = self.elapsed();
        self.tracker.restart(&path, now);
    }

    fn log_stored(&mut self, log: Option<LogLine>) {
        match log {
            Some(LogLine::Info(l)) => {
                self.stored_this_run += 1;
                tracing::info!("{l}");
            }
            Some(LogLine::Warn(l)) => {
                self.stored_this_run += 1;
                tracing::warn!("{l}");
            }
            None => {}
        }
    }

    fn keep_pending(&mut self, path: PathBuf, record: Box<FrameRecord>) {
        self.pending_paths.insert(path);
        self.pending.push_back(record);
        if self.pending.len() > PENDING_LIMIT {
            if let Some(dropped) = self.pending.pop_front() {
                let p = PathBuf::from(&dropped.identity.path);
                self.pending_paths.remove(&p);
                tracing::warn!(
                    "{} let go while the store fails; it is read again from its file once the store works",
                    shown(&p)
                );
            }
        }
    }

    /// The periodic checks (stopped frames, disk, alerts, the summary, the outbox).
    async fn checks(&self) {
        let shared = self.shared.clone();
        let _ = tokio::task::spawn_blocking(move || checks::minute_checks(&shared)).await;
    }

    /// The heartbeat: the daemon's state in the store, and its claim on the rig kept.
    /// `Err` with the reason when another daemon took the rig meanwhile (this one stops).
    async fn heartbeat(&self) -> Result<(), StopReason> {
        let state = serde_json::json!({
            "pid": std::process::id(),
            "waiting": self.tracker.len() + self.ready.len(),
            "in_flight": self.in_flight.len(),
            "not_stored": self.pending.len(),
            "updated_unix": self.wall.now_unix(),
        });
        let shared = self.shared.clone();
        let claim = self.claim.clone();
        let kept = tokio::task::spawn_blocking(move || {
            if !shared.outage.away() {
                let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
                if let Err(e) = store.set_meta("daemon", &state.to_string()) {
                    tracing::debug!("heartbeat: {e}");
                }
            }
            // A shared store's server that restarted took the rig's claim with it: taken
            // again, unless another daemon of this rig took it first.
            claim.lock().unwrap_or_else(|p| p.into_inner()).keep()
        })
        .await;
        match kept {
            Ok(Ok(false)) => {
                tracing::error!(
                    "another daemon took rig '{}' while the store's server was away; this one stops (give each daemon its own rig name)",
                    self.config.rig.name
                );
                Err("another daemon holds this rig")
            }
            Ok(Err(e)) => {
                tracing::debug!("claim: {e}");
                Ok(())
            }
            _ => Ok(()),
        }
    }

    /// Stop: finish the frames being read (two minutes at most), say what the store did
    /// not take (read again at the next start), and let the claim go.
    async fn shutdown(mut self, mut jobs: JoinSet<JobResult>, why: StopReason) {
        tracing::info!(
            "stopping ({why}): finishing {} frame(s) being read",
            self.in_flight.len()
        );
        crate::os::notify_service_manager("STOPPING=1");
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
                            Outcome::Stored { log, .. } => self.log_stored(log),
                            Outcome::NotStored { record, error } => tracing::error!(
                                "{} not recorded: {error}; it is read again at the next start",
                                shown(Path::new(&record.identity.path))
                            ),
                            Outcome::Gone(_) | Outcome::StillBeingWritten(_) => {}
                        }
                    }
                }
            }
        }
        if !self.pending.is_empty() {
            tracing::error!(
                "{} frame(s) the store did not take are read again at the next start",
                self.pending.len()
            );
        }
        tracing::info!(
            "subwatch stopped: {} frame(s) recorded in this run",
            self.stored_this_run
        );
    }
}

/// The watched folders as the daemon uses them: the calibration library among them (its
/// frames recorded under the nights their DATE-OBS gives, for later nights to fall back
/// on), each spelt canonically so events, scans and the store see one path per file.
fn prepare_folders(config: &mut Config) -> Result<(), WatchError> {
    if let Some(library) = config.calibration.library.clone() {
        if !config.watch.folders.contains(&library) {
            config.watch.folders.push(library);
        }
    }
    for folder in config.watch.folders.iter_mut() {
        *folder = crate::os::canonical(&*folder).map_err(|e| WatchError::Notify {
            path: folder.clone(),
            source: notify::Error::io(e),
        })?;
    }
    Ok(())
}

/// One daemon per store: a second one is refused, naming the first. A shared database
/// not reachable yet (the server starting with the PC) is waited for, said once;
/// anything else wrong with the store stops the start. A stop asked for while waiting
/// ends the wait (`None`): nothing was claimed, so nothing is left to finish.
async fn claim_store(
    config: &Config,
    stop: &AtomicBool,
    stop_requests: &mut crate::os::StopRequests,
) -> Result<Option<(crate::store::Claim, Store)>, WatchError> {
    let mut said = false;
    loop {
        let opened = crate::store::claim_configured(config)
            .and_then(|claim| Ok((claim, Store::open_configured(config)?)));
        match opened {
            Ok(pair) => return Ok(Some(pair)),
            Err(e) if e.is_unreachable() => {
                if !said {
                    tracing::error!(
                        "the store cannot be reached: {e}; trying again every 15 s (said once)"
                    );
                    said = true;
                }
                let retry = tokio::time::sleep(Duration::from_secs(15));
                tokio::pin!(retry);
                loop {
                    tokio::select! {
                        why = stop_requests.next() => {
                            tracing::info!("subwatch stopped ({why}) before the store could be reached: nothing recorded");
                            return Ok(None);
                        }
                        _ = &mut retry => break,
                        _ = tokio::time::sleep(Duration::from_millis(200)) => {
                            if stop.load(Ordering::Relaxed) {
                                return Ok(None);
                            }
                        }
                    }
                }
            }
            Err(e) => return Err(e.into()),
        }
    }
}

/// The status page: a failure to serve it costs the page, never the watching.
fn start_page(config: &Config, wall: &Arc<dyn Clock>) -> Option<web::WebServer> {
    match web::start(config, wall.clone()) {
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
    }
}

/// File events: notify runs its own thread and only forwards paths into a bounded
/// channel; a full channel raises `overflow` (a rescan follows). Polling mode watches
/// nothing (the channel stays empty).
fn watch_folders(
    config: &Config,
    overflow: Arc<AtomicBool>,
) -> Result<(Option<RecommendedWatcher>, mpsc::Receiver<PathBuf>), WatchError> {
    let (tx, rx) = mpsc::channel::<PathBuf>(8192);
    if config.watch.poll_seconds != 0.0 {
        return Ok((None, rx));
    }
    let mut w = notify::recommended_watcher(move |res: notify::Result<notify::Event>| match res {
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
    Ok((Some(w), rx))
}

/// Drive a daemon from tokio's timers, its file events and the system's stop requests,
/// until one of them, or `stop`, says to stop.
async fn daemon(
    config: Config,
    workers: usize,
    stop: Arc<AtomicBool>,
    wall: Arc<dyn Clock>,
) -> Result<(), WatchError> {
    let mut stop_requests = crate::os::StopRequests::listen().map_err(WatchError::Runtime)?;
    let Some((mut d, mut events)) =
        Daemon::start(config, workers, &stop, &mut stop_requests, wall).await?
    else {
        return Ok(());
    };
    let settle = d.config.watch.settle_seconds;
    let mut ticker =
        tokio::time::interval(Duration::from_secs_f64((settle / 4.0).clamp(0.05, 1.0)));
    let rescan_every = if d.config.watch.poll_seconds > 0.0 {
        d.config.watch.poll_seconds
    } else {
        d.config.watch.rescan_seconds
    };
    let mut rescan = tokio::time::interval(Duration::from_secs_f64(rescan_every));
    rescan.tick().await;
    let mut heartbeat = tokio::time::interval(Duration::from_secs(2));
    let mut checks = tokio::time::interval(Duration::from_secs_f64(d.config.watch.checks_seconds));
    let mut retry = tokio::time::interval(Duration::from_secs(15));
    retry.tick().await;
    let mut jobs: JoinSet<JobResult> = JoinSet::new();
    let why = loop {
        tokio::select! {
            why = stop_requests.next() => break why,
            Some(path) = events.recv() => d.file_event(path),
            _ = rescan.tick() => {
                d.overflow.store(false, Ordering::Relaxed);
                d.rescan();
            }
            _ = checks.tick() => d.checks().await,
            _ = retry.tick() => d.retry_pending(&mut jobs),
            _ = heartbeat.tick() => {
                if let Err(why) = d.heartbeat().await {
                    break why;
                }
            }
            Some(done) = jobs.join_next() => d.job_done(done),
            _ = ticker.tick() => {
                if stop.load(Ordering::Relaxed) {
                    break "asked to stop";
                }
                d.tick();
            }
        }
        d.dispatch(&mut jobs);
    };
    d.shutdown(jobs, why).await;
    Ok(())
}
