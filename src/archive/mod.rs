//! `subwatch archive ROOT`: the past nights under a folder tree recorded into the store as
//! the daemon would have recorded them, then each night judged as the daemon's morning
//! judges it. A composition over `walk`, `reader`, `store` and `morning`.
//!
//! - **The same rules as the daemon.** The tree is walked as the daemon walks its
//!   folders (`walk`), each file read by a reader process of its own (`reader`), one
//!   record per rig and path (`store`), calibration frames judged as calibration; a
//!   frame's night is its DATE-OBS's, whatever folder it is in. Each night that got
//!   frames is judged by the night model with the rules as configured now
//!   (`morning::judge_night`), oldest first (a night's new sources are looked for in
//!   the catalogues of the nights before it), and its calibration frames' verdicts kept.
//! - **Every core.** `workers` reader processes at once; the records are written by one
//!   thread, in one transaction each.
//! - **Safe to stop at any moment.** A record is one transaction, so after SIGKILL or a
//!   power cut a new run reads only what is not recorded (a file's size and time say
//!   so) and judges the nights left without verdicts. Nothing is recorded twice: the
//!   store holds one record per rig and path.
//! - **Shared, never doubled.** The tree is cut into folders (each folder holding
//!   frames, by its path under the root), and a folder is read by the archive holding
//!   its lease in the store (`Store::take_archive_unit`), renewed while it works and let
//!   go when its frames are recorded; a lease whose holder died runs out after
//!   [`LEASE_S`]. A second archive of the same tree, on this PC or another, takes the
//!   folders nobody holds and waits for the rest; the daemon beside it records its own
//!   folders, and a frame both come to is recorded once. `--shard K/N` takes a fixed
//!   share of the folders (`Shard`), for a scheduler's array of tasks.

use std::collections::{BTreeMap, BTreeSet, HashMap, VecDeque};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use serde::Serialize;

use crate::config::Config;
use crate::store::{Store, StoreError};

mod recorder;
use recorder::Recorder;

/// How long a folder's lease lasts without being renewed: what a second archive waits
/// for the folders of one that died.
pub const LEASE_S: f64 = 30.0;
/// How often the leases held are renewed.
const RENEW_EVERY: Duration = Duration::from_secs(5);

#[derive(Debug, thiserror::Error)]
pub enum ArchiveError {
    #[error("{path}: {reason}")]
    Root { path: PathBuf, reason: String },
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Morning(#[from] crate::morning::MorningError),
}

/// A fixed share of an archive's folders: the `k`-th of `n` (from 1).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Shard {
    pub k: u64,
    pub n: u64,
}

impl Shard {
    /// Every folder.
    pub const WHOLE: Shard = Shard { k: 1, n: 1 };

    /// "K/N", 1 ≤ K ≤ N.
    pub fn parse(text: &str) -> Result<Shard, String> {
        let bad = || {
            format!(
                "{text:?} is not a share: write K/N, the K-th of N shares (1 ≤ K ≤ N), such as 2/4"
            )
        };
        let (k, n) = text.split_once('/').ok_or_else(bad)?;
        let (k, n): (u64, u64) = (
            k.trim().parse().map_err(|_| bad())?,
            n.trim().parse().map_err(|_| bad())?,
        );
        if k == 0 || k > n {
            return Err(bad());
        }
        Ok(Shard { k, n })
    }

    /// Whether this share takes the folder named `unit` (its path under the root):
    /// FNV-1a of the name, modulo N. The same on every machine and for every task,
    /// whatever else the tree holds, so tasks started at different times agree.
    pub fn takes(&self, unit: &str) -> bool {
        fnv1a(unit.as_bytes()) % self.n == self.k - 1
    }
}

impl std::fmt::Display for Shard {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.k, self.n)
    }
}

/// The 64-bit FNV-1a hash (Fowler, Noll & Vo; the IETF draft
/// draft-eastlake-fnv's offset basis and prime).
fn fnv1a(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in bytes {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// The folder a frame belongs to for sharing the work: its folder's path under the
/// root, with `/` between names ("." for the root itself).
pub fn unit_of(root: &Path, file: &Path) -> String {
    let folder = file.parent().unwrap_or(root);
    let rel = folder.strip_prefix(root).unwrap_or(folder);
    let parts: Vec<String> = rel
        .components()
        .map(|c| c.as_os_str().to_string_lossy().into_owned())
        .collect();
    if parts.is_empty() {
        ".".into()
    } else {
        parts.join("/")
    }
}

/// What an archive is asked to do.
#[derive(Debug, Clone)]
pub struct ArchiveOptions {
    pub root: PathBuf,
    pub shard: Shard,
    /// Reader processes at once; 0 = one per core.
    pub workers: usize,
}

/// Where an archive is.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Stage {
    Reading,
    Judging,
}

/// An archive's progress, for a progress bar or a log line.
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    pub stage: Stage,
    pub done: usize,
    pub total: usize,
    /// Frames read per second so far in this run.
    pub per_s: f64,
    /// At that rate, the seconds left reading.
    pub left_s: Option<f64>,
}

/// One night's frames of the archive, as judged.
#[derive(Debug, Clone, Default, Serialize)]
pub struct NightLine {
    pub night: String,
    pub lights: usize,
    pub ok: usize,
    pub warn: usize,
    pub reject: usize,
    pub unreadable: usize,
    pub calibration: usize,
}

/// One target's frames of the archive.
#[derive(Debug, Clone, Default, Serialize)]
pub struct TargetLine {
    pub target: String,
    pub nights: usize,
    pub frames: usize,
    pub ok: usize,
    pub warn: usize,
    pub reject: usize,
}

/// What an archive did.
#[derive(Debug, Clone, Default, Serialize)]
pub struct ArchiveReport {
    pub root: String,
    pub shard: String,
    /// Frames of this share of the tree.
    pub files: usize,
    /// Recorded before this run (nothing to do).
    pub recorded_before: usize,
    /// Read and recorded by this run: new records, and records of changed files replaced.
    pub new: usize,
    pub replaced: usize,
    /// Read by this run but recorded meanwhile by another process (nothing written).
    pub recorded_by_others: usize,
    /// Of those read, the ones that could not be measured.
    pub unreadable: usize,
    /// Nights judged by this run.
    pub judged: Vec<String>,
    pub nights: Vec<NightLine>,
    pub targets: Vec<TargetLine>,
    pub seconds: f64,
    /// Time the writing thread spent in the store, and judging nights.
    pub store_s: f64,
    pub judging_s: f64,
}

/// This process's name in a lease: the host and the process id.
fn holder_name() -> String {
    let host = std::env::var("HOSTNAME")
        .ok()
        .or_else(|| std::fs::read_to_string("/proc/sys/kernel/hostname").ok())
        .map(|h| h.trim().to_string())
        .filter(|h| !h.is_empty())
        .unwrap_or_else(|| "this PC".into());
    format!("{host} process {}", std::process::id())
}

/// The frames of this share of the tree, by folder.
pub fn share(
    config: &Config,
    root: &Path,
    shard: Shard,
) -> Result<BTreeMap<String, Vec<PathBuf>>, ArchiveError> {
    let root = crate::os::canonical(root).map_err(|e| ArchiveError::Root {
        path: root.to_path_buf(),
        reason: crate::text::io_reason(&e),
    })?;
    if !root.is_dir() {
        return Err(ArchiveError::Root {
            path: root,
            reason: "not a folder".into(),
        });
    }
    let mut units: BTreeMap<String, Vec<PathBuf>> = BTreeMap::new();
    for file in crate::walk::FrameFilter::from_config(config).walk(std::slice::from_ref(&root)) {
        let unit = unit_of(&root, &file);
        if shard.takes(&unit) {
            units.entry(unit).or_default().push(file);
        }
    }
    Ok(units)
}

/// Record every frame of this share of the tree not recorded yet, then judge the
/// nights that need it. `progress` is called after each frame and each night.
pub fn run(
    config: &Config,
    options: &ArchiveOptions,
    progress: &mut dyn FnMut(&Progress),
) -> Result<ArchiveReport, ArchiveError> {
    let started = Instant::now();
    let units = share(config, &options.root, options.shard)?;
    let mut store = Store::open_configured(config)?;
    let before = store.archived_frames()?;
    let is_recorded = |p: &Path| -> bool {
        let Ok(id) = crate::walk::identity(p) else {
            // Gone since the walk: nothing to read.
            return true;
        };
        before
            .get(&id.path)
            .is_some_and(|a| (a.size, a.mtime_ns) == (id.size, id.mtime_ns))
    };
    let files: Vec<&PathBuf> = units.values().flatten().collect();
    let pending: VecDeque<(String, Vec<PathBuf>)> = units
        .iter()
        .map(|(u, fs)| {
            (
                u.clone(),
                fs.iter().filter(|f| !is_recorded(f)).cloned().collect(),
            )
        })
        .filter(|(_, fs): &(String, Vec<PathBuf>)| !fs.is_empty())
        .collect();
    let to_read: usize = pending.iter().map(|(_, f)| f.len()).sum();
    let mut report = ArchiveReport {
        root: options.root.display().to_string(),
        shard: options.shard.to_string(),
        files: files.len(),
        recorded_before: files.len() - to_read,
        ..Default::default()
    };
    tracing::info!(
        "archive of {} (share {}): {} frames, {} recorded before, {} to read",
        options.root.display(),
        options.shard,
        report.files,
        report.recorded_before,
        to_read
    );
    let workers = match options.workers {
        0 => std::thread::available_parallelism().map_or(2, |n| n.get()),
        n => n,
    };
    let mut recorder = Recorder::new(&mut store, pending, to_read, holder_name());
    let recorded = recorder.record(config, workers, progress);
    recorder.release_all();
    let touched = recorded?;
    report.new = recorder.new;
    report.replaced = recorder.replaced;
    report.recorded_by_others = recorder.others;
    report.unreadable = recorder.unreadable;
    report.store_s = recorder.store_s;

    // The nights to judge: those this run added to, and those of this share holding
    // lights without a verdict (a run stopped before it judged them).
    let now = store.archived_frames()?;
    let mut nights: BTreeSet<String> = touched;
    for f in &files {
        if let Some(a) = now.get(&*f.to_string_lossy()) {
            if let (Some(night), true, None) = (&a.night, a.light, a.verdict) {
                nights.insert(night.clone());
            }
        }
    }
    let t = Instant::now();
    let total = nights.len();
    for (k, night) in nights.iter().enumerate() {
        judge(&mut store, config, night)?;
        progress(&Progress {
            stage: Stage::Judging,
            done: k + 1,
            total,
            per_s: 0.0,
            left_s: None,
        });
    }
    report.judging_s = t.elapsed().as_secs_f64();
    report.judged = nights.into_iter().collect();
    let now = store.archived_frames()?;
    (report.nights, report.targets) = counts(&files, &now);
    report.seconds = started.elapsed().as_secs_f64();
    Ok(report)
}

/// Judge one recorded night as the morning does, and keep its calibration frames'
/// verdicts. Judged again when another process added to the night meanwhile, so the
/// verdicts last written are those of the whole night.
fn judge(store: &mut Store, config: &Config, night: &str) -> Result<(), ArchiveError> {
    for _ in 0..5 {
        let before = store.night_fingerprint(night)?;
        let judged = crate::morning::judge_night(store, config, night)?;
        let calibration: Vec<(String, crate::rules::Verdict, Vec<String>)> = judged
            .doc
            .calibration
            .iter()
            .map(|f| (f.path.clone(), f.verdict, f.reasons.clone()))
            .collect();
        store.update_verdicts(&calibration)?;
        if store.night_fingerprint(night)? == before {
            break;
        }
    }
    Ok(())
}

/// Counts per night and per target of the share's frames, as the store holds them now.
fn counts(
    files: &[&PathBuf],
    held: &HashMap<String, crate::store::ArchivedFrame>,
) -> (Vec<NightLine>, Vec<TargetLine>) {
    use crate::rules::Verdict;
    let mut nights: BTreeMap<String, NightLine> = BTreeMap::new();
    let mut targets: BTreeMap<String, (TargetLine, BTreeSet<String>)> = BTreeMap::new();
    for f in files {
        let Some(a) = held.get(&*f.to_string_lossy()) else {
            continue;
        };
        let night = a.night.clone().unwrap_or_else(|| "(no night)".into());
        let n = nights.entry(night.clone()).or_insert_with(|| NightLine {
            night: night.clone(),
            ..Default::default()
        });
        if !a.light {
            n.calibration += 1;
            continue;
        }
        n.lights += 1;
        let target = a
            .target
            .clone()
            .unwrap_or_else(|| crate::text::NO_TARGET.into());
        let (t, seen) = targets.entry(target.clone()).or_insert_with(|| {
            (
                TargetLine {
                    target,
                    ..Default::default()
                },
                BTreeSet::new(),
            )
        });
        t.frames += 1;
        seen.insert(night);
        match a.verdict {
            _ if !a.measured => n.unreadable += 1,
            Some(Verdict::Ok) => (n.ok, t.ok) = (n.ok + 1, t.ok + 1),
            Some(Verdict::Warn) => (n.warn, t.warn) = (n.warn + 1, t.warn + 1),
            Some(Verdict::Reject) => (n.reject, t.reject) = (n.reject + 1, t.reject + 1),
            None => {}
        }
    }
    let targets = targets
        .into_values()
        .map(|(mut t, seen)| {
            t.nights = seen.len();
            t
        })
        .collect();
    (nights.into_values().collect(), targets)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a_gives_the_published_test_vectors() {
        // The FNV-1a 64-bit test vectors of the reference implementation (Noll's
        // test_fnv.c): "", "a", "foobar".
        assert_eq!(fnv1a(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a(b"foobar"), 0x8594_4171_f739_67e8);
    }

    #[test]
    fn shares_split_the_folders_once_each() {
        assert_eq!(Shard::parse("2/4"), Ok(Shard { k: 2, n: 4 }));
        for bad in ["0/4", "5/4", "2", "a/b", "1/0", "-1/3"] {
            assert!(Shard::parse(bad).is_err(), "{bad}");
        }
        let units: Vec<String> = (1..=40).map(|d| format!("2025/10/{d:02}")).collect();
        let shares: Vec<Shard> = (1..=4).map(|k| Shard { k, n: 4 }).collect();
        for u in &units {
            assert_eq!(shares.iter().filter(|s| s.takes(u)).count(), 1, "{u}");
            assert!(Shard::WHOLE.takes(u));
        }
        // Each share gets some of forty nights.
        for s in &shares {
            assert!(units.iter().filter(|u| s.takes(u)).count() >= 4, "{s}");
        }
    }

    #[test]
    fn a_frames_folder_is_named_by_its_path_under_the_root() {
        let root = Path::new("/srv/archive");
        assert_eq!(
            unit_of(root, Path::new("/srv/archive/2025-10-01/L/f1.fits")),
            "2025-10-01/L"
        );
        assert_eq!(unit_of(root, Path::new("/srv/archive/f1.fits")), ".");
    }
}
