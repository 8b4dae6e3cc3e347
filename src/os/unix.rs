//! The Unix (Linux) half of `os`: rlimits and the parent-death signal for the reader's
//! worker, renameat2 for moves that never replace, flock for the daemon's claim, secret files
//! checked by owner and mode, statvfs for free space. Safe calls through rustix wherever it has them.

use std::fs::File;
use std::io;
use std::os::unix::fs::{FileExt, MetadataExt, PermissionsExt};
use std::os::unix::process::{CommandExt, ExitStatusExt};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus};

use rustix::process::{Resource, Rlimit};

use super::Ending;

pub fn physical_memory() -> u64 {
    let info = rustix::system::sysinfo();
    (info.totalram as u64).saturating_mul(u64::from(info.mem_unit.max(1)))
}

pub fn address_space_ceiling() -> Option<u64> {
    rustix::process::getrlimit(Resource::As).maximum
}

/// Nothing to hold on Unix: the worker's limits live in the worker itself.
pub struct Guard;

pub fn spawn_confined(cmd: &mut Command, memory_bytes: u64) -> io::Result<(Child, Guard)> {
    // SAFETY: between fork and exec only raw system calls run (getrlimit, setrlimit,
    // prctl through rustix): no allocation, no lock.
    unsafe {
        cmd.pre_exec(move || {
            // The caller may run under a hard limit of its own (a scheduler's, a
            // container's, LimitAS=): never ask for more than it may give, and never
            // fail for it (the limit is a safeguard, not a condition of reading).
            let ceiling = rustix::process::getrlimit(Resource::As).maximum;
            let value = ceiling.map_or(memory_bytes, |c| c.min(memory_bytes));
            let _ = rustix::process::setrlimit(
                Resource::As,
                Rlimit {
                    current: Some(value),
                    maximum: Some(value),
                },
            );
            let _ = rustix::process::setrlimit(
                Resource::Core,
                Rlimit {
                    current: Some(0),
                    maximum: Some(0),
                },
            );
            // A worker does not outlive the process that asked (a killed daemon).
            rustix::process::set_parent_process_death_signal(Some(rustix::process::Signal::KILL))?;
            Ok(())
        });
    }
    Ok((cmd.spawn()?, Guard))
}

pub fn ending(status: &ExitStatus) -> Ending {
    match (status.signal(), status.code()) {
        (Some(libc::SIGKILL), _) => Ending::Killed,
        (Some(sig), _) => Ending::Crashed {
            code: format!("signal {sig}"),
            what: match sig {
                libc::SIGSEGV => "segmentation fault",
                libc::SIGFPE => "arithmetic fault",
                libc::SIGBUS => "bus error",
                libc::SIGABRT => "abort",
                libc::SIGILL => "illegal instruction",
                libc::SIGXCPU => "CPU time limit",
                _ => "signal",
            },
        },
        (None, code) => Ending::Exited(code.unwrap_or(-1)),
    }
}

pub fn rename_no_replace(from: &Path, to: &Path) -> io::Result<bool> {
    use rustix::fs::{renameat_with, RenameFlags, CWD};
    match renameat_with(CWD, from, CWD, to, RenameFlags::NOREPLACE) {
        Ok(()) => Ok(true),
        Err(rustix::io::Errno::EXIST) => Ok(false),
        // File systems without RENAME_NOREPLACE: a hard link refuses an existing name too.
        Err(rustix::io::Errno::INVAL) | Err(rustix::io::Errno::NOSYS) => {
            match std::fs::hard_link(from, to) {
                Ok(()) => std::fs::remove_file(from).map(|_| true),
                Err(e) if e.kind() == io::ErrorKind::AlreadyExists => Ok(false),
                Err(e) => Err(e),
            }
        }
        Err(e) => Err(e.into()),
    }
}

pub fn canonical(path: &Path) -> io::Result<PathBuf> {
    std::fs::canonicalize(path)
}

pub fn sync_folder(folder: &Path) -> io::Result<()> {
    // A rename is durable once the folder holding the new name is synced (fsync(2)).
    std::fs::File::open(folder)?.sync_all()
}

pub fn is_cross_device(e: &io::Error) -> bool {
    e.raw_os_error() == Some(libc::EXDEV)
}

pub fn is_disk_full(e: &io::Error) -> bool {
    matches!(e.raw_os_error(), Some(libc::ENOSPC) | Some(libc::EDQUOT))
}

pub fn is_still_being_written(_e: &io::Error) -> bool {
    // Unix has no opens that refuse sharing: a file being written is read as it grows.
    false
}

pub fn try_lock(file: &File, exclusive: bool) -> io::Result<bool> {
    use rustix::fs::FlockOperation;
    let op = if exclusive {
        FlockOperation::NonBlockingLockExclusive
    } else {
        FlockOperation::NonBlockingLockShared
    };
    match rustix::fs::flock(file, op) {
        Ok(()) => Ok(true),
        Err(rustix::io::Errno::WOULDBLOCK) => Ok(false),
        Err(e) => Err(e.into()),
    }
}

pub fn file_system_of(path: &Path) -> Option<String> {
    std::fs::metadata(path).ok().map(|m| m.dev().to_string())
}

pub fn free_bytes(folder: &Path) -> Option<u64> {
    let st = rustix::fs::statvfs(folder).ok()?;
    Some(st.f_bavail.saturating_mul(st.f_frsize))
}

pub fn read_at(file: &File, buf: &mut [u8], offset: u64) -> io::Result<usize> {
    file.read_at(buf, offset)
}

pub fn read_exact_at(file: &File, buf: &mut [u8], offset: u64) -> io::Result<()> {
    file.read_exact_at(buf, offset)
}

pub fn check_private_file(path: &Path) -> Result<(), String> {
    let m = std::fs::metadata(path)
        .map_err(|e| format!("{}: {}", path.display(), crate::text::io_reason(&e)))?;
    let me = rustix::process::geteuid().as_raw();
    if m.uid() != me {
        return Err(format!(
            "{} belongs to user id {}, not to the user subwatch runs as ({me}); chown it",
            path.display(),
            m.uid()
        ));
    }
    if m.mode() & 0o077 != 0 {
        return Err(format!(
            "{} can be read or written by other users (mode {:o}); chmod 600 it",
            path.display(),
            m.mode() & 0o777
        ));
    }
    Ok(())
}

pub fn make_private(path: &Path) -> io::Result<()> {
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o600))
}

pub fn user_tag() -> String {
    rustix::process::getuid().as_raw().to_string()
}

pub fn lower_thread_priority() {
    // On Linux a thread id names the thread for setpriority; a failure leaves the
    // priority as it was.
    let _ = rustix::process::setpriority_process(Some(rustix::thread::gettid()), 10);
}

pub fn prepare_daemon_process() {
    // SAFETY: setting a signal's disposition to "ignore" has no preconditions.
    unsafe { libc::signal(libc::SIGXFSZ, libc::SIG_IGN) };
}

pub fn notify_service_manager(state: &str) {
    let Some(socket) = std::env::var_os("NOTIFY_SOCKET") else {
        return;
    };
    let Ok(sock) = std::os::unix::net::UnixDatagram::unbound() else {
        return;
    };
    let name = socket.to_string_lossy().into_owned();
    let sent = if let Some(abstract_name) = name.strip_prefix('@') {
        use std::os::linux::net::SocketAddrExt;
        std::os::unix::net::SocketAddr::from_abstract_name(abstract_name.as_bytes())
            .and_then(|addr| sock.send_to_addr(state.as_bytes(), &addr))
    } else {
        sock.send_to(state.as_bytes(), &name)
    };
    if let Err(e) = sent {
        tracing::debug!("sd_notify {state}: {e}");
    }
}

pub struct StopRequests {
    term: tokio::signal::unix::Signal,
    int: tokio::signal::unix::Signal,
}

impl StopRequests {
    pub fn listen() -> io::Result<Self> {
        use tokio::signal::unix::{signal, SignalKind};
        Ok(StopRequests {
            term: signal(SignalKind::terminate())?,
            int: signal(SignalKind::interrupt())?,
        })
    }

    pub async fn next(&mut self) -> &'static str {
        tokio::select! {
            _ = self.term.recv() => "SIGTERM",
            _ = self.int.recv() => "SIGINT",
        }
    }
}

// The service commands are Windows'; under systemd the unit runs `subwatch watch`.

pub fn service_install(_config: &Path) -> Result<(), super::ServiceError> {
    Err(super::ServiceError::NotWindows)
}

pub fn service_uninstall() -> Result<(), super::ServiceError> {
    Err(super::ServiceError::NotWindows)
}

pub fn service_start() -> Result<(), super::ServiceError> {
    Err(super::ServiceError::NotWindows)
}

pub fn service_stop() -> Result<(), super::ServiceError> {
    Err(super::ServiceError::NotWindows)
}

pub fn run_service(_daemon: super::Daemon) -> Result<(), super::ServiceError> {
    Err(super::ServiceError::NotWindows)
}

pub fn service_log_folder() -> Option<PathBuf> {
    // systemd's journal keeps the daemon's stderr.
    None
}

pub fn system_folder(kind: &str) -> PathBuf {
    PathBuf::from(match kind {
        "config" => "/etc/subwatch",
        "logs" => "/var/log/subwatch",
        _ => "/var/lib/subwatch",
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_open_or_foreign_secret_file_is_refused_with_the_fix() {
        let dir = tempfile::tempdir().unwrap();
        let pw = dir.path().join("pw");
        std::fs::write(&pw, "secret\n").unwrap();
        for mode in [0o640, 0o604, 0o660] {
            std::fs::set_permissions(&pw, std::fs::Permissions::from_mode(mode)).unwrap();
            let e = check_private_file(&pw).unwrap_err();
            assert!(e.contains("chmod 600"), "{e}");
        }
    }

    #[test]
    fn a_signal_is_named_and_a_kill_is_a_kill() {
        let status = |raw| ExitStatus::from_raw(raw);
        assert_eq!(ending(&status(9)), Ending::Killed);
        assert_eq!(
            ending(&status(11)),
            Ending::Crashed {
                code: "signal 11".into(),
                what: "segmentation fault"
            }
        );
        assert_eq!(ending(&status(3 << 8)), Ending::Exited(3));
    }
}
