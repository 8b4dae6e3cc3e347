//! Reading untrusted files in a worker process. Decoding runs C code (cfitsio's tile
//! decompressors) on bytes nobody has checked, and measuring allocates by the size a
//! header declares; a fault there must cost one file, not the daemon or a batch run.
//!
//! Each file is read by a fresh `subwatch read-worker` process: the request (a path and
//! the measuring options) goes in on its stdin as JSON, the record comes back on its
//! stdout. The worker runs under an address-space limit (RLIMIT_AS), no core dumps, and
//! a wall-clock limit enforced here. A worker that dies by a signal, runs out of memory
//! or overruns its time becomes a record with status "error" and a plain-words reason,
//! and the caller goes on. A process per file rather than one per batch: a worker's
//! start costs a few milliseconds against a frame's tenth of a second or more, and no
//! state (cfitsio's globals, a heap a bad file fragmented) outlives the file that made it.
//!
//! Longer than most modules: the parent's side (start, feed, read back, the limits, how a
//! worker ended in words) and the worker's side (`serve`) are one protocol, kept in one
//! place; its last 130 lines are tests.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};

use crate::pipeline::{RecordOptions, StillBeingWritten};
use crate::record::{FrameRecord, Identity};

/// The hidden subcommand the worker runs as.
pub const WORKER_COMMAND: &str = "read-worker";

/// What a worker is asked to do with one file.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub enum Request {
    /// Decode, classify and measure into the record the store keeps.
    Record {
        path: PathBuf,
        identity: Identity,
        mtime_unix: f64,
        options: Box<RecordOptions>,
    },
    /// A PNG cutout of `half` pixels around (x, y) (FITS 1-based) for the summary.
    Cutout {
        path: PathBuf,
        x: f64,
        y: f64,
        half: usize,
        limits: crate::frame::DecodeLimits,
    },
    /// A stretched picture of the whole frame, at most `max_side` pixels on a side.
    Preview {
        path: PathBuf,
        max_side: usize,
        limits: crate::frame::DecodeLimits,
    },
}

/// A worker's answer.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub enum Reply {
    Record(Box<FrameRecord>),
    /// The file's writer still holds it open: nothing was read.
    StillBeingWritten,
    Cutout(Option<Vec<u8>>),
    /// PNG, width, height and binning of a preview.
    Preview(Option<(Vec<u8>, u32, u32, usize)>),
}

/// How files are read.
#[derive(Debug, Clone)]
pub enum Reader {
    /// In a worker process per file (what every command uses).
    Isolated(Isolation),
    /// In this process: for tests and benchmarks of the measurement itself, on files
    /// they made.
    InProcess,
}

/// A worker's limits.
#[derive(Debug, Clone)]
pub struct Isolation {
    /// The program to run as the worker (this program).
    pub program: PathBuf,
    /// Address-space limit (RLIMIT_AS), bytes.
    pub memory_bytes: u64,
    /// Wall-clock limit per file.
    pub timeout: Duration,
}

static PROGRAM: OnceLock<PathBuf> = OnceLock::new();

/// Use `program` as the worker from now on, instead of the running executable (tests
/// whose executable is a test harness point this at the `subwatch` binary).
pub fn use_program(program: &Path) {
    let _ = PROGRAM.set(program.to_path_buf());
}

fn program() -> PathBuf {
    PROGRAM
        .get()
        .cloned()
        .or_else(|| std::env::current_exe().ok())
        .unwrap_or_else(|| PathBuf::from("subwatch"))
}

impl Isolation {
    /// Limits for frames of up to `max_pixels`: `memory_mb` MiB of address space (0 =
    /// automatic: 16 bytes per pixel of the largest allowed frame plus 1 GiB for code,
    /// threads and their arenas, but at most three quarters of this machine's memory),
    /// and `timeout_s` seconds per file.
    pub fn new(max_pixels: u64, memory_mb: u64, timeout_s: f64) -> Self {
        let needed = max_pixels.saturating_mul(16).saturating_add(1 << 30);
        let wanted = if memory_mb > 0 {
            memory_mb.saturating_mul(1 << 20)
        } else {
            match crate::os::physical_memory() {
                0 => needed,
                ram => needed.min(ram / 4 * 3).max(1 << 30),
            }
        };
        let memory_bytes = within_ceiling(wanted, needed, crate::os::address_space_ceiling());
        Isolation {
            program: program(),
            memory_bytes,
            timeout: Duration::from_secs_f64(timeout_s.max(1.0)),
        }
    }
}

/// The worker's address-space limit: `wanted`, lowered to the `ceiling` this process
/// runs under itself (a scheduler's, a container's, `LimitAS=`), which a child cannot
/// exceed. Said once in the log when that is less than the largest allowed frame
/// (`needed`) takes: such a frame will then fail as out of memory, and nothing else.
fn within_ceiling(wanted: u64, needed: u64, ceiling: Option<u64>) -> u64 {
    static SAID: std::sync::Once = std::sync::Once::new();
    let Some(ceiling) = ceiling else {
        return wanted;
    };
    if ceiling < wanted.min(needed) {
        SAID.call_once(|| {
            tracing::warn!(
                "this process runs under an address-space limit of {} MiB, less than the {} MiB the largest allowed frame ([measure] max_pixels) takes to read; larger frames will fail as out of memory",
                ceiling >> 20,
                needed >> 20
            )
        });
    }
    wanted.min(ceiling)
}

impl Reader {
    /// Frames read in a worker process with the configured limits.
    pub fn from_config(measure: &crate::config::MeasureConfig) -> Self {
        Reader::Isolated(Isolation::new(
            measure.max_pixels,
            measure.reader_memory_mb,
            measure.reader_timeout_seconds,
        ))
    }
}

impl Default for Reader {
    fn default() -> Self {
        Self::from_config(&crate::config::MeasureConfig::default())
    }
}

/// A frame too large for the worker's memory limit, in words.
fn out_of_memory(iso: &Isolation) -> String {
    let mib = iso.memory_bytes >> 20;
    let limit = if mib < 1024 {
        format!("{mib} MiB")
    } else {
        format!("{:.1} GiB", mib as f64 / 1024.0)
    };
    format!(
        "the FITS reader ran out of memory on this file (limit {limit}); raise [measure] reader_memory_mb if the frame is real"
    )
}

/// Why a worker gave no answer, in words for the frame's record.
fn failure_reason(status: std::process::ExitStatus, stderr: &str, iso: &Isolation) -> String {
    // The last thing the worker (or the C library under it) said, backtrace notes aside.
    let last = stderr
        .lines()
        .rev()
        .map(str::trim)
        .find(|l| {
            !l.is_empty()
                && !l.starts_with("note:")
                && !l.starts_with("skipping backtrace")
                && !l.starts_with("stack backtrace")
        })
        .unwrap_or("");
    if stderr.contains("memory allocation of") || stderr.contains("out of memory") {
        return out_of_memory(iso);
    }
    let said = if last.is_empty() {
        String::new()
    } else {
        format!(": {}", crate::logging::one_line(last))
    };
    match crate::os::ending(&status) {
        crate::os::Ending::Killed => {
            "the FITS reader was killed on this file (out of memory under the service's limit?)"
                .to_string()
        }
        // What the C library said before it went, when it said anything.
        crate::os::Ending::Crashed { code, what } => {
            format!("the FITS reader crashed on this file ({code}, {what}{said})")
        }
        crate::os::Ending::Exited(101) => {
            format!("internal error while measuring (a bug; please report it){said}")
        }
        crate::os::Ending::Exited(code) => {
            format!("the FITS reader stopped on this file (exit {code}){said}")
        }
    }
}

/// Read at most `limit` bytes from `r`, then drain the rest (so the writer never blocks).
fn read_bounded(mut r: impl Read, limit: usize) -> Vec<u8> {
    let mut out = Vec::new();
    let _ = (&mut r).take(limit as u64).read_to_end(&mut out);
    let _ = std::io::copy(&mut r, &mut std::io::sink());
    out
}

/// Run one request in a worker process.
pub fn run_isolated(iso: &Isolation, request: &Request) -> Result<Reply, String> {
    let input = serde_json::to_vec(request).map_err(|e| format!("encoding the request: {e}"))?;
    let mut cmd = Command::new(&iso.program);
    cmd.arg(WORKER_COMMAND)
        // A fault's story is one line, not a backtrace.
        .env("RUST_BACKTRACE", "0")
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let confined = crate::os::spawn_confined(&mut cmd, iso.memory_bytes).map_err(|e| {
        format!(
            "the FITS reader could not be started ({}): {e}",
            iso.program.display()
        )
    })?;
    // The guard (Windows: the job that holds the worker) lives until this returns.
    let mut confined = confined;
    let child = &mut confined.child;
    let mut stdin = child.stdin.take().expect("piped stdin");
    let stdout = child.stdout.take().expect("piped stdout");
    let stderr = child.stderr.take().expect("piped stderr");
    let (tx, rx) = std::sync::mpsc::channel();
    let out_thread = std::thread::spawn(move || {
        let out = read_bounded(stdout, 1 << 30);
        let _ = tx.send(());
        out
    });
    let err_thread = std::thread::spawn(move || read_bounded(stderr, 64 << 10));
    // A worker that died at once closes its stdin: that is its exit status's story.
    let _ = stdin.write_all(&input);
    drop(stdin);
    let deadline = Instant::now() + iso.timeout;
    let timed_out = rx.recv_timeout(iso.timeout).is_err();
    let status = if timed_out {
        let _ = child.kill();
        child.wait()
    } else {
        // stdout closed: the worker is exiting; wait for it within what is left.
        loop {
            match child.try_wait() {
                Ok(Some(s)) => break Ok(s),
                Ok(None) if Instant::now() < deadline => {
                    std::thread::sleep(Duration::from_millis(2))
                }
                Ok(None) => {
                    let _ = child.kill();
                    break child.wait();
                }
                Err(e) => break Err(e),
            }
        }
    }
    .map_err(|e| format!("waiting for the FITS reader: {e}"))?;
    let out = out_thread.join().unwrap_or_default();
    let err = String::from_utf8_lossy(&err_thread.join().unwrap_or_default()).into_owned();
    if timed_out {
        return Err(format!(
            "the FITS reader took longer than {:.0} s on this file and was stopped",
            iso.timeout.as_secs_f64()
        ));
    }
    if !status.success() {
        return Err(failure_reason(status, &err, iso));
    }
    serde_json::from_slice(&out)
        .map_err(|e| format!("the FITS reader's answer was not understood: {e}"))
}

/// The worker's side: one request from stdin, its reply on stdout.
pub fn serve(input: impl Read, output: impl Write) -> std::io::Result<()> {
    start_worker_threads();
    let request: Request = serde_json::from_reader(input)
        .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidData, e))?;
    let reply = answer(request);
    let mut output = std::io::BufWriter::new(output);
    serde_json::to_writer(&mut output, &reply).map_err(std::io::Error::other)?;
    output.flush()
}

/// The worker's threads for the parallel parts of measuring, started before anything
/// large is allocated: under a tight address-space limit a thread started later (rayon
/// starts its pool on first use) finds no room for its stack and rayon panics, where the
/// frame's own allocation should have been what failed, as "out of memory". As many
/// threads as the limit leaves room for, down to none beside this one.
fn start_worker_threads() {
    let wanted = std::thread::available_parallelism().map_or(1, |n| n.get());
    // Probe: the threads rayon would start, held until all are up, then let go.
    let (release, hold) = std::sync::mpsc::channel::<()>();
    let hold = std::sync::Arc::new(std::sync::Mutex::new(hold));
    let probes: Vec<_> = (0..wanted)
        .map_while(|_| {
            let hold = hold.clone();
            std::thread::Builder::new()
                .spawn(move || {
                    let _ = hold.lock().map(|h| h.recv());
                })
                .ok()
        })
        .collect();
    let room = probes.len();
    drop(release);
    for p in probes {
        let _ = p.join();
    }
    let builder = rayon::ThreadPoolBuilder::new();
    let built = if room >= 1 {
        builder.num_threads(room).build_global()
    } else {
        builder.num_threads(1).use_current_thread().build_global()
    };
    if let Err(e) = built {
        tracing::debug!("the reader's threads: {e}");
    }
}

/// What a request asks, done in this process.
fn answer(request: Request) -> Reply {
    match request {
        Request::Record {
            path,
            identity,
            mtime_unix,
            options,
        } => match crate::pipeline::try_record_file(&path, identity, mtime_unix, &options) {
            Ok(r) => Reply::Record(Box::new(r)),
            Err(StillBeingWritten) => Reply::StillBeingWritten,
        },
        Request::Cutout {
            path,
            x,
            y,
            half,
            limits,
        } => Reply::Cutout(
            crate::frame::read_frame(&path, limits)
                .ok()
                .and_then(|f| crate::report::plots::cutout_png(&f.pixels, x, y, half)),
        ),
        Request::Preview {
            path,
            max_side,
            limits,
        } => Reply::Preview(
            crate::frame::read_frame(&path, limits)
                .ok()
                .and_then(|f| crate::report::preview::preview_png(&f.pixels, max_side))
                .map(|p| (p.png, p.width, p.height, p.bin)),
        ),
    }
}

/// Why a one-shot command did not record a file ([`Reader::record_once_let_go`]).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum NotRecorded {
    /// It went, or cannot be looked at, between the listing and now.
    #[error("{0}")]
    Gone(String),
    /// Another program still held it open without sharing when the patience ran out: left
    /// for a later run, not recorded as unreadable.
    #[error("another program still holds it open (still being written) after {} s; run again once it is let go", .0.as_secs())]
    StillHeld(Duration),
}

/// How long `measure`, `night` and `archive` wait for a file another program holds open.
pub const HELD_PATIENCE: Duration = Duration::from_secs(120);

impl Reader {
    /// Decode, classify and measure one file into its record. Never fails: a problem,
    /// the worker's crash and a file still being written included, becomes a record with
    /// status "error" naming it.
    pub fn record(
        &self,
        path: &Path,
        identity: Identity,
        mtime_unix: f64,
        options: &RecordOptions,
    ) -> FrameRecord {
        self.try_record(path, identity.clone(), mtime_unix, options)
            .unwrap_or_else(|e| {
                let mut r = FrameRecord::failed(identity, &e.to_string());
                r.night = crate::sky::night_label(mtime_unix, options.timezone);
                r
            })
    }

    /// A file recorded once its writer lets it go, for the one-shot commands (`measure`,
    /// `night`, `archive`), which have no settle tracker to come back to it: while another
    /// program holds it open without sharing (a capture program writing it, on Windows)
    /// this asks again every second, for up to `patience`. Its identity is taken when it
    /// is read, as the file it was being written into is another file.
    pub fn record_once_let_go(
        &self,
        path: &Path,
        options: &RecordOptions,
        patience: Duration,
    ) -> Result<FrameRecord, NotRecorded> {
        let start = Instant::now();
        let mut said = false;
        loop {
            let identity = crate::walk::identity(path)
                .map_err(|e| NotRecorded::Gone(crate::text::io_reason(&e)))?;
            let mtime = identity.mtime_unix();
            match self.try_record(path, identity, mtime, options) {
                Ok(record) => return Ok(record),
                Err(StillBeingWritten) if start.elapsed() < patience => {
                    if !said {
                        tracing::info!(
                            "{}: another program holds it open (still being written); waiting up to {} s",
                            path.display(),
                            patience.as_secs()
                        );
                        said = true;
                    }
                    std::thread::sleep(Duration::from_secs(1));
                }
                Err(StillBeingWritten) => return Err(NotRecorded::StillHeld(patience)),
            }
        }
    }

    /// As [`Reader::record`], except that a file its writer still holds open is said as
    /// such (`Err`), for the daemon to read it once it is let go.
    pub fn try_record(
        &self,
        path: &Path,
        identity: Identity,
        mtime_unix: f64,
        options: &RecordOptions,
    ) -> Result<FrameRecord, StillBeingWritten> {
        let request = Request::Record {
            path: path.to_path_buf(),
            identity: identity.clone(),
            mtime_unix,
            options: Box::new(options.clone()),
        };
        let failed = |reason: String| {
            let mut r = FrameRecord::failed(identity.clone(), &reason);
            r.night = crate::sky::night_label(mtime_unix, options.timezone);
            r
        };
        match self.run(request) {
            Ok(Reply::Record(mut r)) => {
                // A refused allocation inside the worker is its memory limit speaking,
                // whichever allocation met it first.
                if let (Reader::Isolated(iso), Some(e)) = (self, &r.error) {
                    if e.starts_with("cannot allocate") {
                        r.error = Some(format!("{}: {e}", out_of_memory(iso)));
                    }
                }
                Ok(*r)
            }
            Ok(Reply::StillBeingWritten) => Err(StillBeingWritten),
            Ok(_) => Ok(failed("the FITS reader answered another question".into())),
            Err(reason) => Ok(failed(reason)),
        }
    }

    /// A PNG cutout around (x, y), or `None` when the file cannot be read.
    pub fn cutout(
        &self,
        path: &Path,
        x: f64,
        y: f64,
        half: usize,
        limits: crate::frame::DecodeLimits,
    ) -> Option<Vec<u8>> {
        let request = Request::Cutout {
            path: path.to_path_buf(),
            x,
            y,
            half,
            limits,
        };
        match self.run(request) {
            Ok(Reply::Cutout(png)) => png,
            _ => None,
        }
    }

    /// A stretched picture of the whole frame (see `report::preview`), or `None` when
    /// the file cannot be read.
    pub fn preview(
        &self,
        path: &Path,
        max_side: usize,
        limits: crate::frame::DecodeLimits,
    ) -> Option<crate::report::preview::Preview> {
        let request = Request::Preview {
            path: path.to_path_buf(),
            max_side,
            limits,
        };
        match self.run(request) {
            Ok(Reply::Preview(Some((png, width, height, bin)))) => {
                Some(crate::report::preview::Preview {
                    png,
                    width,
                    height,
                    bin,
                })
            }
            _ => None,
        }
    }

    fn run(&self, request: Request) -> Result<Reply, String> {
        match self {
            Reader::Isolated(iso) => run_isolated(iso, &request),
            Reader::InProcess => {
                std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| answer(request)))
                    .map_err(|_| "internal error while measuring (a bug; please report it)".into())
            }
        }
    }
}

// The stand-in workers are shell scripts that end by Unix signals: Unix only (the Windows
// worker's endings are classified, and tested, in `os::windows`).
#[cfg(all(test, unix))]
mod tests {
    use super::*;

    /// A stand-in worker: a shell script that does what a faulty reader would.
    fn script(dir: &Path, body: &str) -> Isolation {
        use std::os::unix::fs::PermissionsExt;
        let path = dir.join("worker.sh");
        std::fs::write(&path, format!("#!/bin/sh\n{body}\n")).unwrap();
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o755)).unwrap();
        Isolation {
            program: path,
            memory_bytes: 1 << 30,
            timeout: Duration::from_secs(2),
        }
    }

    fn request() -> Request {
        Request::Record {
            path: "/frames/kfa_001.fits".into(),
            identity: Identity {
                path: "/frames/kfa_001.fits".into(),
                size: 1,
                mtime_ns: 1,
            },
            mtime_unix: 0.0,
            options: Box::default(),
        }
    }

    #[test]
    fn a_crashing_reader_costs_the_file_with_its_signal_named() {
        let dir = tempfile::tempdir().unwrap();
        for (signal, words) in [
            ("FPE", "crashed on this file (signal 8, arithmetic fault)"),
            (
                "SEGV",
                "crashed on this file (signal 11, segmentation fault)",
            ),
            ("ABRT", "crashed on this file (signal 6, abort)"),
        ] {
            let iso = script(dir.path(), &format!("cat > /dev/null; kill -{signal} $$"));
            let err = run_isolated(&iso, &request()).unwrap_err();
            assert!(err.contains(words), "{err}");
        }
    }

    #[test]
    fn a_reader_out_of_memory_or_out_of_time_is_named_as_such() {
        let dir = tempfile::tempdir().unwrap();
        let iso = script(
            dir.path(),
            "cat > /dev/null; echo 'memory allocation of 4294967296 bytes failed' >&2; kill -ABRT $$",
        );
        let err = run_isolated(&iso, &request()).unwrap_err();
        assert!(
            err.contains("ran out of memory on this file (limit 1.0 GiB)"),
            "{err}"
        );
        let iso = script(dir.path(), "cat > /dev/null; exec sleep 30");
        let start = Instant::now();
        let err = run_isolated(&iso, &request()).unwrap_err();
        assert!(err.contains("took longer than 2 s"), "{err}");
        assert!(start.elapsed() < Duration::from_secs(10));
    }

    #[test]
    fn a_reader_that_answers_nonsense_or_cannot_start_is_an_error_not_a_crash() {
        let dir = tempfile::tempdir().unwrap();
        let iso = script(dir.path(), "cat > /dev/null; echo '{not json'");
        assert!(run_isolated(&iso, &request())
            .unwrap_err()
            .contains("not understood"));
        let missing = Isolation {
            program: dir.path().join("no-such-program"),
            ..script(dir.path(), "")
        };
        assert!(run_isolated(&missing, &request())
            .unwrap_err()
            .contains("could not be started"));
        // The record says so, with the night the file's time gives.
        let rec = Reader::Isolated(missing).record(
            Path::new("/frames/kfa_001.fits"),
            Identity {
                path: "/frames/kfa_001.fits".into(),
                size: 1,
                mtime_ns: 1,
            },
            1_773_600_000.0,
            &RecordOptions::default(),
        );
        assert_eq!(rec.status, crate::record::FrameStatus::Error);
        assert!(rec.night.is_some());
    }
}

#[cfg(all(test, windows))]
mod windows_tests {
    use super::*;

    #[test]
    fn a_file_its_writer_holds_unshared_is_still_being_written_not_unreadable() {
        use std::os::windows::fs::OpenOptionsExt;
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("kfa_001.fits");
        // dwShareMode 0, as a capture program writing the frame holds it (Microsoft,
        // CreateFileW: other opens fail with ERROR_SHARING_VIOLATION).
        let writer = std::fs::File::options()
            .write(true)
            .create_new(true)
            .share_mode(0)
            .open(&p)
            .unwrap();
        let id = Identity {
            path: p.to_string_lossy().into_owned(),
            size: 0,
            mtime_ns: 0,
        };
        let opts = RecordOptions::default();
        assert_eq!(
            Reader::InProcess
                .try_record(&p, id.clone(), 0.0, &opts)
                .err(),
            Some(StillBeingWritten)
        );
        // Let go, the same file is read, and found wanting for a reason of its own.
        drop(writer);
        let rec = Reader::InProcess.try_record(&p, id, 0.0, &opts).unwrap();
        assert_eq!(rec.status, crate::record::FrameStatus::Error);
    }
}
