//! One daemon per store: the daemon's claim is an exclusive lock on `<store>.lock`.

use std::path::{Path, PathBuf};

use super::StoreError;

/// A daemon's claim on its store: an exclusive lock (`os::try_lock`) on `<store>.lock`, which
/// holds the daemon's process id. The kernel releases it when the process ends, however
/// it ends, so a killed daemon never leaves a stale claim behind.
pub struct DaemonLock {
    _file: std::fs::File,
}

fn lock_path(store: &Path) -> PathBuf {
    let mut name = store.as_os_str().to_owned();
    name.push(".lock");
    PathBuf::from(name)
}

/// Claim `store` for this daemon; refused while another daemon holds it.
pub fn claim(store: &Path) -> Result<DaemonLock, StoreError> {
    use std::io::{Seek, Write};
    let lock = lock_path(store);
    let fail = |source| StoreError::Lock {
        path: store.to_path_buf(),
        lock: lock.clone(),
        source,
    };
    let mut file = std::fs::OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .open(&lock)
        .map_err(fail)?;
    if !crate::os::try_lock(&file, true).map_err(fail)? {
        let pid = std::fs::read_to_string(&lock).unwrap_or_default();
        return Err(StoreError::InUse {
            path: store.to_path_buf(),
            pid: pid.trim().to_string(),
        });
    }
    file.set_len(0).map_err(fail)?;
    file.rewind().map_err(fail)?;
    writeln!(file, "{}", std::process::id()).map_err(fail)?;
    Ok(DaemonLock { _file: file })
}

/// The process id of the daemon that holds `store` now, if one does.
pub fn daemon_pid(store: &Path) -> Option<u32> {
    let lock = lock_path(store);
    let file = std::fs::File::open(&lock).ok()?;
    match crate::os::try_lock(&file, false) {
        // Nobody holds it (the lock goes when this file closes).
        Ok(true) => None,
        Ok(false) => std::fs::read_to_string(&lock).ok()?.trim().parse().ok(),
        Err(_) => None,
    }
}
