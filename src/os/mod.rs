//! What differs by operating system, in one place: a Unix half (`unix.rs`, Linux) and a
//! Windows half (`windows.rs`) behind one set of functions, so the rest of the code names
//! no platform. Each function here says what it promises; each half says how it keeps it.

use std::fs::File;
use std::io;
use std::path::Path;
use std::process::{Child, Command, ExitStatus};
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

#[cfg(unix)]
#[path = "unix.rs"]
mod imp;
#[cfg(windows)]
#[path = "windows.rs"]
mod imp;

/// Physical memory of this machine, bytes (0 when unknown).
pub fn physical_memory() -> u64 {
    imp::physical_memory()
}

/// The most address space (bytes) this process may give a child it starts: the hard
/// limit it runs under itself (a batch scheduler's, a container's, `LimitAS=` in a unit).
/// `None` when there is no such limit.
pub fn address_space_ceiling() -> Option<u64> {
    imp::address_space_ceiling()
}

/// A worker process confined to a memory limit, with no core dump or error dialog, that
/// dies with this process. Dropping it kills the worker if it is still running.
pub struct Confined {
    pub child: Child,
    _guard: imp::Guard,
}

/// Start `cmd` confined to `memory_bytes` of memory (lowered to what this process may
/// give, never refused for it).
pub fn spawn_confined(cmd: &mut Command, memory_bytes: u64) -> io::Result<Confined> {
    let (child, guard) = imp::spawn_confined(cmd, memory_bytes)?;
    Ok(Confined {
        child,
        _guard: guard,
    })
}

/// How a process ended, in the terms a reader of the log needs.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Ending {
    /// Ended by itself with this code.
    Exited(i32),
    /// Killed from outside (SIGKILL; a job's or the system's memory killer).
    Killed,
    /// A fault or an abort: how the system names it ("signal 11", "exception
    /// 0xC0000005") and what it is ("segmentation fault", "access violation").
    Crashed { code: String, what: &'static str },
}

/// How a finished process ended.
pub fn ending(status: &ExitStatus) -> Ending {
    imp::ending(status)
}

/// Rename `from` to `to` unless `to` exists: `Ok(false)` when it does. Never replaces a
/// file. An error for which [`is_cross_device`] holds when the two are on different
/// file systems.
pub fn rename_no_replace(from: &Path, to: &Path) -> io::Result<bool> {
    imp::rename_no_replace(from, to)
}

/// The absolute path of an existing file or folder, links resolved, as a user writes it:
/// on Windows without the `\\?\` prefix the system's own form carries (`C:\frames`,
/// `\\server\share\frames`), so messages, documents and the store name it so.
pub fn canonical(path: &Path) -> io::Result<std::path::PathBuf> {
    imp::canonical(path)
}

/// Make the names in `folder` (a file renamed into it, one created) survive a power cut.
pub fn sync_folder(folder: &Path) -> io::Result<()> {
    imp::sync_folder(folder)
}

/// Whether a rename failed because its two names are on different file systems.
pub fn is_cross_device(e: &io::Error) -> bool {
    imp::is_cross_device(e)
}

/// Whether an error says the disk is full.
pub fn is_disk_full(e: &io::Error) -> bool {
    imp::is_disk_full(e)
}

/// Whether opening or reading a file failed because another program holds it open
/// without sharing, or has locked the bytes read (a capture program still writing it, on
/// Windows): the file is still being written, not unreadable. Always false on Unix, where
/// a file being written is read as it grows.
pub fn is_still_being_written(e: &io::Error) -> bool {
    imp::is_still_being_written(e)
}

/// Windows' system error codes for a file another process holds: ERROR_SHARING_VIOLATION
/// (32, "The process cannot access the file because it is being used by another process")
/// and ERROR_LOCK_VIOLATION (33, "another process has locked a portion of the file").
/// Kept apart from the Windows half so the table is checked on every system.
#[cfg_attr(not(windows), allow(dead_code))]
fn is_sharing_refusal(code: i32) -> bool {
    const ERROR_SHARING_VIOLATION: i32 = 32;
    const ERROR_LOCK_VIOLATION: i32 = 33;
    matches!(code, ERROR_SHARING_VIOLATION | ERROR_LOCK_VIOLATION)
}

/// Take a lock on `file` without waiting: exclusive, or shared with other shared
/// holders. `Ok(false)` when another process holds a lock that conflicts. The system
/// lets it go when the file is closed or the process ends, however it ends. The file's
/// bytes stay readable by others while it is held.
pub fn try_lock(file: &File, exclusive: bool) -> io::Result<bool> {
    imp::try_lock(file, exclusive)
}

/// Which file system holds `path` (a value equal for two paths on the same one).
pub fn file_system_of(path: &Path) -> Option<String> {
    imp::file_system_of(path)
}

/// Free bytes (available to this user) on the file system holding `folder`.
pub fn free_bytes(folder: &Path) -> Option<u64> {
    imp::free_bytes(folder)
}

/// Read into `buf` from byte `offset` of `file`. Whether the file's own position moves
/// differs by system (it stays on Unix, it moves on Windows): a caller that then reads
/// the file in order seeks first.
pub fn read_at(file: &File, buf: &mut [u8], offset: u64) -> io::Result<usize> {
    imp::read_at(file, buf, offset)
}

/// Fill `buf` from byte `offset` of `file` (an error at the end of the file); the file's
/// position as [`read_at`] leaves it.
pub fn read_exact_at(file: &File, buf: &mut [u8], offset: u64) -> io::Result<()> {
    imp::read_exact_at(file, buf, offset)
}

/// A file holding a secret (a password, a token) must be this user's and readable by
/// nobody else; the reason in words when it is not.
pub fn check_private_file(path: &Path) -> Result<(), String> {
    imp::check_private_file(path)
}

/// Make `path` readable and writable by its owner only (a test's or a setup's secret).
pub fn make_private(path: &Path) -> io::Result<()> {
    imp::make_private(path)
}

/// A short name for the user this process runs as, for per-user temporary names.
pub fn user_tag() -> String {
    imp::user_tag()
}

/// Lower the calling thread's CPU priority (the status page yields to ingestion).
pub fn lower_thread_priority() {
    imp::lower_thread_priority()
}

/// Prepare the process for a long run: where the system would end it for a write past a
/// file-size limit, the write fails instead (and is retried).
pub fn prepare_daemon_process() {
    imp::prepare_daemon_process()
}

/// Tell the service manager how the daemon stands ("READY=1", "STOPPING=1"): systemd's
/// notify socket on Linux (`Type=notify` units); nothing elsewhere (a Windows service
/// reports its state through the service control manager, in `service`).
pub fn notify_service_manager(state: &str) {
    imp::notify_service_manager(state)
}

/// The requests to stop a running daemon that the system delivers: SIGTERM and SIGINT on
/// Unix, Ctrl-C, Ctrl-Break and the console closing on Windows.
pub struct StopRequests(imp::StopRequests);

impl StopRequests {
    /// Listen for them (inside a tokio runtime).
    pub fn listen() -> io::Result<Self> {
        imp::StopRequests::listen().map(StopRequests)
    }

    /// The next request, named ("SIGTERM", "Ctrl-C").
    pub async fn next(&mut self) -> &'static str {
        self.0.next().await
    }
}

/// The name the service is registered under with the system's service manager.
pub const SERVICE_NAME: &str = "subwatch";

/// The daemon a service runs: given the flag the service's stop control raises, it runs
/// until that flag (or anything else) ends it; the reason in words when it failed.
pub type Daemon = Box<dyn FnOnce(Arc<AtomicBool>) -> Result<(), String> + Send>;

/// What went wrong with the service.
#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    #[error("`subwatch service` is for Windows; on Linux run the daemon under systemd with the unit in systemd/ (systemd/README.md says how)")]
    NotWindows,
    #[error("`subwatch service run` is started by the Windows service control manager, not from a prompt; use `subwatch service start`, or `subwatch watch` to run in this console")]
    NotUnderManager,
    #[error("{action}: {source}{}", manager_hint(.source))]
    Manager {
        action: &'static str,
        #[source]
        source: io::Error,
    },
}

/// What to do about the service control manager's commonest refusals, by their system
/// error codes (Microsoft, "System Error Codes": 5 ERROR_ACCESS_DENIED, 1060
/// ERROR_SERVICE_DOES_NOT_EXIST, 1062 ERROR_SERVICE_NOT_ACTIVE, 1056
/// ERROR_SERVICE_ALREADY_RUNNING, 1073 ERROR_SERVICE_EXISTS, 1072
/// ERROR_SERVICE_MARKED_FOR_DELETE).
fn manager_hint(e: &io::Error) -> &'static str {
    match e.raw_os_error() {
        Some(5) => " (run it from a prompt opened as administrator)",
        Some(1060) => " (it is not installed: subwatch service install --config FILE)",
        Some(1062) => " (it is not running)",
        Some(1056) => " (it is running already)",
        Some(1073) => " (it is installed already: subwatch service uninstall first to change it)",
        Some(1072) => " (it is being removed: close the Services window and try again)",
        _ => "",
    }
}

/// `Ok` where the `service` commands apply (Windows); `NotWindows` elsewhere, said
/// before anything else is looked at.
pub fn service_manager_here() -> Result<(), ServiceError> {
    imp::service_log_folder()
        .map(|_| ())
        .ok_or(ServiceError::NotWindows)
}

/// Register the daemon as a service of the system, started at boot, that runs this
/// program as `service run --config CONFIG` (an absolute path). Writes nothing else.
pub fn service_install(config: &Path) -> Result<(), ServiceError> {
    imp::service_install(config)
}

/// Stop the service if it runs, and remove it.
pub fn service_uninstall() -> Result<(), ServiceError> {
    imp::service_uninstall()
}

/// Ask the service manager to start the service.
pub fn service_start() -> Result<(), ServiceError> {
    imp::service_start()
}

/// Ask the service manager to stop the service (it finishes the frames in hand first).
pub fn service_stop() -> Result<(), ServiceError> {
    imp::service_stop()
}

/// Run `daemon` as the service, reporting its state to the service manager until it ends;
/// the manager's Stop and Shutdown controls raise its stop flag.
pub fn run_service(daemon: Daemon) -> Result<(), ServiceError> {
    imp::run_service(daemon)
}

/// Where the service writes its daily log files (`%ProgramData%\subwatch\logs`), where
/// it does; `None` where the service manager keeps the log (systemd's journal).
pub fn service_log_folder() -> Option<std::path::PathBuf> {
    imp::service_log_folder()
}

/// The folder where a system-wide install keeps its configuration, store, reports and
/// logs: `/etc/subwatch` and `/var/lib/subwatch` on Linux, `%ProgramData%\subwatch` on
/// Windows. `kind` is "config", "data" or "logs".
pub fn system_folder(kind: &str) -> std::path::PathBuf {
    imp::system_folder(kind)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_rename_never_replaces_and_says_so() {
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("a"), dir.path().join("b"));
        std::fs::write(&a, "one").unwrap();
        std::fs::write(&b, "two").unwrap();
        assert!(!rename_no_replace(&a, &b).unwrap());
        assert_eq!(std::fs::read_to_string(&b).unwrap(), "two");
        std::fs::remove_file(&b).unwrap();
        assert!(rename_no_replace(&a, &b).unwrap());
        assert!(!a.exists());
        assert_eq!(std::fs::read_to_string(&b).unwrap(), "one");
    }

    #[test]
    fn the_file_system_and_its_free_space_are_known_for_a_folder() {
        let dir = tempfile::tempdir().unwrap();
        let sub = dir.path().join("sub");
        std::fs::create_dir(&sub).unwrap();
        assert!(file_system_of(dir.path()).is_some());
        assert_eq!(file_system_of(dir.path()), file_system_of(&sub));
        assert!(free_bytes(dir.path()).is_some_and(|b| b > 0));
    }

    #[test]
    fn a_private_file_passes_and_an_open_one_does_not() {
        let dir = tempfile::tempdir().unwrap();
        let pw = dir.path().join("pw");
        std::fs::write(&pw, "secret\n").unwrap();
        make_private(&pw).unwrap();
        assert_eq!(check_private_file(&pw), Ok(()));
    }

    #[test]
    fn reading_at_an_offset_reads_those_bytes() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("f");
        std::fs::write(&p, b"0123456789").unwrap();
        let f = File::open(&p).unwrap();
        let mut buf = [0u8; 3];
        assert_eq!(read_at(&f, &mut buf, 4).unwrap(), 3);
        assert_eq!(&buf, b"456");
    }

    #[test]
    fn a_lock_is_refused_while_held_and_its_file_stays_readable() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("lock");
        std::fs::write(&p, "4242\n").unwrap();
        let holder = File::options().read(true).write(true).open(&p).unwrap();
        assert!(try_lock(&holder, true).unwrap());
        let other = File::open(&p).unwrap();
        assert!(!try_lock(&other, false).unwrap());
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "4242\n");
        drop(holder);
        assert!(try_lock(&other, false).unwrap());
    }

    #[test]
    fn only_the_two_sharing_codes_mean_still_being_written() {
        // Microsoft, "System Error Codes (0-499)" (learn.microsoft.com, winerror.h):
        // 32 ERROR_SHARING_VIOLATION, 33 ERROR_LOCK_VIOLATION; their neighbours 5
        // ERROR_ACCESS_DENIED, 2 ERROR_FILE_NOT_FOUND, 31 ERROR_GEN_FAILURE and 34
        // ERROR_WRONG_DISK are other failures.
        assert!(is_sharing_refusal(32));
        assert!(is_sharing_refusal(33));
        for other in [0, 2, 5, 31, 34, 112] {
            assert!(!is_sharing_refusal(other), "{other}");
        }
    }

    #[cfg(unix)]
    #[test]
    fn on_unix_no_error_means_still_being_written() {
        // On Linux 32 is EPIPE and 33 EDOM (errno(3), asm-generic/errno-base.h): the
        // Windows codes must not be read into them.
        for code in [32, 33, libc::EACCES, libc::EAGAIN, libc::EBUSY] {
            assert!(!is_still_being_written(&io::Error::from_raw_os_error(code)));
        }
    }

    #[cfg(windows)]
    #[test]
    fn a_file_held_open_without_sharing_is_still_being_written() {
        use std::os::windows::fs::OpenOptionsExt;
        // CreateFileW with dwShareMode 0: "Prevents other processes from opening a file
        // ... if they request delete, read, or write access" (Microsoft, CreateFileW).
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("writing.fits");
        let _writer = File::options()
            .write(true)
            .create_new(true)
            .share_mode(0)
            .open(&p)
            .unwrap();
        let e = File::open(&p).unwrap_err();
        assert_eq!(e.raw_os_error(), Some(32));
        assert!(is_still_being_written(&e));
        assert!(!is_still_being_written(&io::Error::from_raw_os_error(5)));
    }

    #[test]
    fn the_machine_has_memory() {
        assert!(physical_memory() > 0);
    }
}
