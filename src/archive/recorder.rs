//! The recording half of an archive: leases folders, hands their frames to the reader
//! processes (one thread each) and writes what comes back, one record per transaction,
//! on the calling thread.

use std::collections::{BTreeMap, BTreeSet, VecDeque};
use std::path::PathBuf;
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use super::{ArchiveError, Progress, Stage, LEASE_S, RENEW_EVERY};
use crate::config::Config;
use crate::reader::NotRecorded;
use crate::record::{FrameRecord, FrameStatus};
use crate::store::{Recorded, Store};

/// A frame for a reader process: its folder and path.
struct Job {
    unit: String,
    path: PathBuf,
}

/// A folder this archive holds the lease of.
struct Held {
    lease: String,
    queued: VecDeque<PathBuf>,
    in_flight: usize,
}

/// The recording half of an archive: leases folders, hands their frames to the reader
/// processes and writes what comes back.
pub(super) struct Recorder<'s> {
    store: &'s mut Store,
    holder: String,
    /// Folders not leased yet, with the frames they had to read.
    waiting: VecDeque<(String, Vec<PathBuf>)>,
    /// Folders another archive holds: tried again at the time given.
    deferred: Vec<(Instant, String, Vec<PathBuf>)>,
    held: BTreeMap<String, Held>,
    renewed: Instant,
    in_flight: usize,
    total: usize,
    done: usize,
    started: Instant,
    pub(super) new: usize,
    pub(super) replaced: usize,
    pub(super) others: usize,
    pub(super) unreadable: usize,
    pub(super) store_s: f64,
    nights: BTreeSet<String>,
}

impl<'s> Recorder<'s> {
    pub(super) fn new(
        store: &'s mut Store,
        waiting: VecDeque<(String, Vec<PathBuf>)>,
        total: usize,
        holder: String,
    ) -> Self {
        Recorder {
            store,
            holder,
            waiting,
            deferred: Vec::new(),
            held: BTreeMap::new(),
            renewed: Instant::now(),
            in_flight: 0,
            total,
            done: 0,
            started: Instant::now(),
            new: 0,
            replaced: 0,
            others: 0,
            unreadable: 0,
            store_s: 0.0,
            nights: BTreeSet::new(),
        }
    }

    /// Read and record every waiting folder's frames with `workers` reader processes
    /// at once. Returns the nights it recorded frames into.
    pub(super) fn record(
        &mut self,
        config: &Config,
        workers: usize,
        progress: &mut dyn FnMut(&Progress),
    ) -> Result<BTreeSet<String>, ArchiveError> {
        let reader = crate::reader::Reader::from_config(&config.measure);
        let options = crate::pipeline::RecordOptions::from_config(config);
        // At most this many frames handed out and not yet written: the memory bound.
        let cap = 2 * workers;
        let (job_tx, job_rx) = mpsc::sync_channel::<Job>(cap);
        let job_rx = Arc::new(Mutex::new(job_rx));
        let (done_tx, done_rx) = mpsc::channel::<(String, Option<FrameRecord>)>();
        std::thread::scope(|s| {
            for _ in 0..workers {
                let (rx, tx, reader, options) =
                    (job_rx.clone(), done_tx.clone(), &reader, &options);
                s.spawn(move || loop {
                    let job = rx.lock().unwrap_or_else(|p| p.into_inner()).recv();
                    let Ok(job) = job else { break };
                    let patience = crate::reader::HELD_PATIENCE;
                    let record = match reader.record_once_let_go(&job.path, options, patience) {
                        Ok(record) => Some(record),
                        // A file that went since the walk is left out.
                        Err(NotRecorded::Gone(_)) => None,
                        // Left for the next run, which records what is not in the store.
                        Err(held) => {
                            tracing::warn!("{}: {held}", job.path.display());
                            None
                        }
                    };
                    if tx.send((job.unit, record)).is_err() {
                        break;
                    }
                });
            }
            drop(done_tx);
            let result = self.drive(&job_tx, &done_rx, cap, progress);
            drop(job_tx);
            result
        })?;
        Ok(std::mem::take(&mut self.nights))
    }

    /// The writing thread's loop: keep the readers busy, write what they return, renew
    /// the leases, wait for folders other archives hold.
    fn drive(
        &mut self,
        jobs: &mpsc::SyncSender<Job>,
        done: &mpsc::Receiver<(String, Option<FrameRecord>)>,
        cap: usize,
        progress: &mut dyn FnMut(&Progress),
    ) -> Result<(), ArchiveError> {
        loop {
            self.fill(jobs, cap)?;
            if self.in_flight == 0 {
                if self.waiting.is_empty() && self.deferred.is_empty() {
                    return Ok(());
                }
                // Only folders another archive holds are left: wait for it.
                std::thread::sleep(Duration::from_millis(500));
                self.renew()?;
                continue;
            }
            match done.recv_timeout(Duration::from_secs(1)) {
                Ok((unit, record)) => {
                    self.write(&unit, record)?;
                    let elapsed = self.started.elapsed().as_secs_f64().max(1e-3);
                    let per_s = self.done as f64 / elapsed;
                    progress(&Progress {
                        stage: Stage::Reading,
                        done: self.done,
                        total: self.total,
                        per_s,
                        left_s: (per_s > 0.0)
                            .then(|| self.total.saturating_sub(self.done) as f64 / per_s),
                    });
                }
                Err(mpsc::RecvTimeoutError::Timeout) => {}
                Err(mpsc::RecvTimeoutError::Disconnected) => return Ok(()),
            }
            self.renew()?;
        }
    }

    /// Hand out frames until `cap` are out: from the folders held, leasing the next
    /// folder when they have none left.
    fn fill(&mut self, jobs: &mpsc::SyncSender<Job>, cap: usize) -> Result<(), ArchiveError> {
        while self.in_flight < cap {
            let next = self
                .held
                .iter_mut()
                .find_map(|(u, h)| h.queued.pop_front().map(|p| (u.clone(), p, h)));
            if let Some((unit, path, h)) = next {
                h.in_flight += 1;
                self.in_flight += 1;
                // The readers outlive this loop; a closed channel means they stopped.
                if jobs.send(Job { unit, path }).is_err() {
                    return Ok(());
                }
                continue;
            }
            if !self.lease_next()? {
                return Ok(());
            }
        }
        Ok(())
    }

    /// Lease the next folder nobody holds, with the frames it still has to read (what
    /// another process recorded meanwhile is left out). Returns whether one was leased.
    fn lease_next(&mut self) -> Result<bool, ArchiveError> {
        let now = Instant::now();
        let due = self.deferred.iter().position(|(at, _, _)| *at <= now);
        let (unit, files) = match (due, self.waiting.pop_front()) {
            (_, Some(next)) => next,
            (Some(i), None) => {
                let (_, u, f) = self.deferred.swap_remove(i);
                (u, f)
            }
            (None, None) => return Ok(false),
        };
        let wall = crate::clock::now_unix();
        let Some(lease) = self
            .store
            .take_archive_unit(&unit, &self.holder, wall, LEASE_S)?
        else {
            self.deferred
                .push((now + Duration::from_secs(2), unit, files));
            return Ok(true);
        };
        let mut queued = VecDeque::new();
        for f in files {
            let Ok(id) = crate::walk::identity(&f) else {
                self.done += 1;
                continue;
            };
            if self.store.recorded_version(&id.path)? == Some((id.size, id.mtime_ns)) {
                // Recorded by another process since this run began.
                self.done += 1;
                continue;
            }
            queued.push_back(f);
        }
        if queued.is_empty() {
            self.store.release_archive_unit(&unit, &lease)?;
        } else {
            self.held.insert(
                unit,
                Held {
                    lease,
                    queued,
                    in_flight: 0,
                },
            );
        }
        Ok(true)
    }

    /// Write one record (`None`: the file went before it was read); a folder whose
    /// frames are all written lets its lease go.
    fn write(&mut self, unit: &str, record: Option<FrameRecord>) -> Result<(), ArchiveError> {
        self.in_flight -= 1;
        self.done += 1;
        let t = Instant::now();
        if let Some(record) = record {
            let now = crate::clock::now_unix();
            // A conflict with another writer of the same path (the daemon) is settled
            // by writing again: the store then finds the record there.
            let recorded = match self.store.record_frame(&record, now) {
                Ok(r) => r,
                Err(_) => self.store.record_frame(&record, now)?,
            };
            let wrote = recorded != Recorded::Already;
            match recorded {
                Recorded::New(_) => self.new += 1,
                Recorded::Replaced { earlier, .. } => {
                    self.replaced += 1;
                    self.nights.extend(earlier.night);
                }
                Recorded::Already => self.others += 1,
            }
            if wrote {
                self.nights.extend(record.night.clone());
                if record.status == FrameStatus::Error {
                    self.unreadable += 1;
                }
            }
        }
        self.store_s += t.elapsed().as_secs_f64();
        if let Some(h) = self.held.get_mut(unit) {
            h.in_flight -= 1;
            if h.in_flight == 0 && h.queued.is_empty() {
                let lease = h.lease.clone();
                self.held.remove(unit);
                self.store.release_archive_unit(unit, &lease)?;
            }
        }
        Ok(())
    }

    /// Renew the leases held, every [`RENEW_EVERY`]. A lease that ran out and was taken
    /// by another archive is that archive's now: this one stops handing out its frames.
    fn renew(&mut self) -> Result<(), ArchiveError> {
        if self.renewed.elapsed() < RENEW_EVERY {
            return Ok(());
        }
        self.renewed = Instant::now();
        let now = crate::clock::now_unix();
        let mut lost = Vec::new();
        for (unit, h) in self.held.iter_mut() {
            match self
                .store
                .renew_archive_unit(unit, &h.lease, &self.holder, now, LEASE_S)?
            {
                Some(lease) => h.lease = lease,
                None => lost.push(unit.clone()),
            }
        }
        for unit in lost {
            if let Some(h) = self.held.get_mut(&unit) {
                tracing::warn!(
                    "archive: the lease on {unit} ran out and another archive took it; leaving its {} frame(s) to it",
                    h.queued.len()
                );
                self.done += h.queued.len();
                h.queued.clear();
            }
        }
        Ok(())
    }

    /// Let every lease go (the archive ends, or failed).
    pub(super) fn release_all(&mut self) {
        for (unit, h) in std::mem::take(&mut self.held) {
            if let Err(e) = self.store.release_archive_unit(&unit, &h.lease) {
                tracing::warn!("archive: {e} (letting go of {unit}; it runs out in {LEASE_S} s)");
            }
        }
    }
}
