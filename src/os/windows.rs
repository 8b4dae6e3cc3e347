//! The Windows half of `os`: a Job Object per reader worker (a memory limit, killed when
//! the job's handle closes, no error dialogs), `MoveFileExW` without replacing,
//! `LockFileEx` on a byte past the data, `GetDiskFreeSpaceExW`, and secret files checked
//! by their access list. Every `unsafe` block calls one documented Win32 function with
//! buffers this function owns.
//!
//! Longer than most modules: it is one half of `os`'s interface, a function for each of
//! its functions, with their tests (the service is `windows::service`).

use std::ffi::OsStr;
use std::fs::File;
use std::io;
use std::os::windows::ffi::OsStrExt;
use std::os::windows::fs::FileExt;
use std::os::windows::io::AsRawHandle;
use std::os::windows::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus};

use windows_sys::Win32::Foundation::{
    CloseHandle, LocalFree, ERROR_ALREADY_EXISTS, ERROR_DISK_FULL, ERROR_FILE_EXISTS,
    ERROR_HANDLE_DISK_FULL, ERROR_LOCK_VIOLATION, ERROR_NOT_SAME_DEVICE, GENERIC_ALL, GENERIC_READ,
    HANDLE,
};
use windows_sys::Win32::Security::Authorization::{
    GetNamedSecurityInfoW, SetNamedSecurityInfoW, SE_FILE_OBJECT,
};
use windows_sys::Win32::Security::{
    AddAccessAllowedAce, CreateWellKnownSid, EqualSid, GetAce, GetLengthSid, GetTokenInformation,
    InitializeAcl, TokenUser, WinBuiltinAdministratorsSid, WinLocalSystemSid, ACCESS_ALLOWED_ACE,
    ACL, ACL_REVISION, DACL_SECURITY_INFORMATION, OWNER_SECURITY_INFORMATION,
    PROTECTED_DACL_SECURITY_INFORMATION, PSID, SECURITY_MAX_SID_SIZE, TOKEN_QUERY, TOKEN_USER,
};
use windows_sys::Win32::Storage::FileSystem::{
    GetDiskFreeSpaceExW, GetVolumePathNameW, LockFileEx, MoveFileExW, FILE_ALL_ACCESS,
    FILE_READ_DATA, LOCKFILE_EXCLUSIVE_LOCK, LOCKFILE_FAIL_IMMEDIATELY, MOVEFILE_WRITE_THROUGH,
};
use windows_sys::Win32::System::Diagnostics::Debug::{
    SetErrorMode, SEM_FAILCRITICALERRORS, SEM_NOGPFAULTERRORBOX, SEM_NOOPENFILEERRORBOX,
};
use windows_sys::Win32::System::JobObjects::{
    AssignProcessToJobObject, CreateJobObjectW, JobObjectExtendedLimitInformation,
    QueryInformationJobObject, SetInformationJobObject, JOBOBJECT_EXTENDED_LIMIT_INFORMATION,
    JOB_OBJECT_LIMIT_DIE_ON_UNHANDLED_EXCEPTION, JOB_OBJECT_LIMIT_JOB_MEMORY,
    JOB_OBJECT_LIMIT_KILL_ON_JOB_CLOSE, JOB_OBJECT_LIMIT_PROCESS_MEMORY,
};
use windows_sys::Win32::System::SystemInformation::{GlobalMemoryStatusEx, MEMORYSTATUSEX};
use windows_sys::Win32::System::Threading::{
    GetCurrentProcess, GetCurrentThread, OpenProcessToken, SetThreadPriority,
    THREAD_PRIORITY_BELOW_NORMAL,
};

use super::Ending;

/// A console program started from a service or a window opens no console of its own.
const CREATE_NO_WINDOW: u32 = 0x0800_0000;
/// An access-allowed entry of an access list (winnt.h).
const ACCESS_ALLOWED_ACE_TYPE: u8 = 0;
/// Where the daemon's lock lives in its lock file: one byte far past any data, so the
/// file's text (the daemon's process id) stays readable while the lock is held
/// (LockFileEx locks are mandatory for reads of the locked range).
const LOCK_OFFSET: u64 = 1 << 62;

fn wide(s: &OsStr) -> Vec<u16> {
    s.encode_wide().chain(std::iter::once(0)).collect()
}

fn last_error() -> io::Error {
    io::Error::last_os_error()
}

/// A handle closed when this goes.
struct Owned(HANDLE);

impl Drop for Owned {
    fn drop(&mut self) {
        if !self.0.is_null() {
            // SAFETY: a handle this process opened and owns alone.
            unsafe { CloseHandle(self.0) };
        }
    }
}

// SAFETY: a job handle may be used and closed from any thread.
unsafe impl Send for Owned {}
unsafe impl Sync for Owned {}

pub fn physical_memory() -> u64 {
    let mut status = MEMORYSTATUSEX {
        dwLength: std::mem::size_of::<MEMORYSTATUSEX>() as u32,
        ..Default::default()
    };
    // SAFETY: a MEMORYSTATUSEX with its length set, as the function requires.
    if unsafe { GlobalMemoryStatusEx(&mut status) } != 0 {
        status.ullTotalPhys
    } else {
        0
    }
}

pub fn address_space_ceiling() -> Option<u64> {
    // A process started inside a job (a scheduler's, a service host's) has that job's
    // limits over it too: a job the worker is put in nests under it.
    let mut info = JOBOBJECT_EXTENDED_LIMIT_INFORMATION::default();
    // SAFETY: a null job names the caller's own job; the buffer is the size given.
    let ok = unsafe {
        QueryInformationJobObject(
            std::ptr::null_mut(),
            JobObjectExtendedLimitInformation,
            (&mut info as *mut JOBOBJECT_EXTENDED_LIMIT_INFORMATION).cast(),
            std::mem::size_of::<JOBOBJECT_EXTENDED_LIMIT_INFORMATION>() as u32,
            std::ptr::null_mut(),
        )
    };
    if ok == 0 {
        return None;
    }
    let flags = info.BasicLimitInformation.LimitFlags;
    let mut ceiling: Option<u64> = None;
    if flags & JOB_OBJECT_LIMIT_PROCESS_MEMORY != 0 {
        ceiling = Some(info.ProcessMemoryLimit as u64);
    }
    if flags & JOB_OBJECT_LIMIT_JOB_MEMORY != 0 {
        let job = info.JobMemoryLimit as u64;
        ceiling = Some(ceiling.map_or(job, |c| c.min(job)));
    }
    ceiling
}

/// The job holding a worker: closing it kills the worker, so a worker never outlives
/// the process that asked (the daemon's handles close however it ends).
pub struct Guard {
    _job: Owned,
}

pub fn spawn_confined(cmd: &mut Command, memory_bytes: u64) -> io::Result<(Child, Guard)> {
    // SAFETY: no attributes, no name: a new anonymous job.
    let job = Owned(unsafe { CreateJobObjectW(std::ptr::null(), std::ptr::null()) });
    if job.0.is_null() {
        return Err(last_error());
    }
    let mut info = JOBOBJECT_EXTENDED_LIMIT_INFORMATION::default();
    info.BasicLimitInformation.LimitFlags = JOB_OBJECT_LIMIT_PROCESS_MEMORY
        | JOB_OBJECT_LIMIT_KILL_ON_JOB_CLOSE
        | JOB_OBJECT_LIMIT_DIE_ON_UNHANDLED_EXCEPTION;
    info.ProcessMemoryLimit = usize::try_from(memory_bytes).unwrap_or(usize::MAX);
    // SAFETY: the job just made, and a limit structure of the size given.
    let ok = unsafe {
        SetInformationJobObject(
            job.0,
            JobObjectExtendedLimitInformation,
            (&info as *const JOBOBJECT_EXTENDED_LIMIT_INFORMATION).cast(),
            std::mem::size_of::<JOBOBJECT_EXTENDED_LIMIT_INFORMATION>() as u32,
        )
    };
    if ok == 0 {
        return Err(last_error());
    }
    // No dialog box for a fault, a missing disk or a missing DLL: the worker's failure
    // is a record, never a window waiting for a click on an unattended PC. The error
    // mode is inherited by the child.
    quiet_errors();
    cmd.creation_flags(CREATE_NO_WINDOW);
    let mut child = cmd.spawn()?;
    // The worker does nothing before it reads its request, which the caller writes
    // after this: it is inside the job before it reads a byte of the file.
    // SAFETY: the job above and the child's process handle, both open.
    if unsafe { AssignProcessToJobObject(job.0, child.as_raw_handle() as HANDLE) } == 0 {
        let e = last_error();
        let _ = child.kill();
        let _ = child.wait();
        return Err(e);
    }
    Ok((child, Guard { _job: job }))
}

fn quiet_errors() {
    // SAFETY: SetErrorMode takes flags and has no preconditions.
    unsafe {
        SetErrorMode(SEM_FAILCRITICALERRORS | SEM_NOGPFAULTERRORBOX | SEM_NOOPENFILEERRORBOX)
    };
}

pub fn ending(status: &ExitStatus) -> Ending {
    let Some(code) = status.code() else {
        return Ending::Killed;
    };
    let raw = code as u32;
    // NTSTATUS error codes (severity bits 11): the process ended by an exception.
    if raw & 0xC000_0000 == 0xC000_0000 {
        let what = match raw {
            0xC000_0005 => "access violation",
            0xC000_008E | 0xC000_0094 | 0xC000_0091 | 0xC000_0093 => "arithmetic fault",
            0xC000_001D => "illegal instruction",
            0xC000_00FD => "stack overflow",
            0xC000_0017 => "out of memory",
            0xC000_0135 => "a DLL it needs was not found",
            // __fastfail: how Rust's abort and the C runtime's abort end a process.
            0xC000_0409 => "abort",
            _ => "exception",
        };
        return Ending::Crashed {
            code: format!("exception 0x{raw:08X}"),
            what,
        };
    }
    Ending::Exited(code)
}

pub fn rename_no_replace(from: &Path, to: &Path) -> io::Result<bool> {
    let (a, b) = (wide(from.as_os_str()), wide(to.as_os_str()));
    // SAFETY: two NUL-terminated wide strings; without MOVEFILE_REPLACE_EXISTING an
    // existing destination is refused, without MOVEFILE_COPY_ALLOWED another volume is.
    if unsafe { MoveFileExW(a.as_ptr(), b.as_ptr(), MOVEFILE_WRITE_THROUGH) } != 0 {
        return Ok(true);
    }
    let e = last_error();
    match e.raw_os_error().map(|c| c as u32) {
        Some(ERROR_ALREADY_EXISTS) | Some(ERROR_FILE_EXISTS) => Ok(false),
        _ => Err(e),
    }
}

pub fn canonical(path: &Path) -> io::Result<PathBuf> {
    let full = std::fs::canonicalize(path)?;
    // A name that is not valid Unicode is left in the system's form, never altered.
    Ok(match full.to_str() {
        Some(s) => PathBuf::from(without_verbatim_prefix(s)),
        None => full,
    })
}

/// `\\?\C:\x` as `C:\x` and `\\?\UNC\server\share` as `\\server\share`; any other
/// verbatim path (a device, a name too long without it) as it is.
fn without_verbatim_prefix(p: &str) -> String {
    if let Some(rest) = p.strip_prefix(r"\\?\UNC\") {
        return format!(r"\\{rest}");
    }
    match p.strip_prefix(r"\\?\") {
        Some(rest)
            if rest.len() < 248
                && rest.as_bytes().get(1) == Some(&b':')
                && rest.as_bytes()[0].is_ascii_alphabetic() =>
        {
            rest.to_string()
        }
        _ => p.to_string(),
    }
}

pub fn sync_folder(_folder: &Path) -> io::Result<()> {
    // Nothing to do: a folder cannot be opened as a file here, NTFS journals its names,
    // and the moves that must last are made with MOVEFILE_WRITE_THROUGH, which returns
    // only once the move is on disk.
    Ok(())
}

pub fn is_cross_device(e: &io::Error) -> bool {
    e.raw_os_error().map(|c| c as u32) == Some(ERROR_NOT_SAME_DEVICE)
}

pub fn is_disk_full(e: &io::Error) -> bool {
    matches!(
        e.raw_os_error().map(|c| c as u32),
        Some(ERROR_DISK_FULL) | Some(ERROR_HANDLE_DISK_FULL)
    )
}

pub fn is_still_being_written(e: &io::Error) -> bool {
    e.raw_os_error().is_some_and(super::is_sharing_refusal)
}

pub fn try_lock(file: &File, exclusive: bool) -> io::Result<bool> {
    let mut flags = LOCKFILE_FAIL_IMMEDIATELY;
    if exclusive {
        flags |= LOCKFILE_EXCLUSIVE_LOCK;
    }
    let mut at = windows_sys::Win32::System::IO::OVERLAPPED::default();
    at.Anonymous.Anonymous.Offset = LOCK_OFFSET as u32;
    at.Anonymous.Anonymous.OffsetHigh = (LOCK_OFFSET >> 32) as u32;
    // SAFETY: a handle the caller's File owns, and an OVERLAPPED naming the byte; the
    // call does not wait (FAIL_IMMEDIATELY), so the OVERLAPPED outlives it.
    if unsafe { LockFileEx(file.as_raw_handle() as HANDLE, flags, 0, 1, 0, &mut at) } != 0 {
        return Ok(true);
    }
    let e = last_error();
    if e.raw_os_error().map(|c| c as u32) == Some(ERROR_LOCK_VIOLATION) {
        Ok(false)
    } else {
        Err(e)
    }
}

pub fn file_system_of(path: &Path) -> Option<String> {
    let name = wide(path.as_os_str());
    let mut root = vec![0u16; 32_768];
    // SAFETY: a NUL-terminated path and a buffer of the length given.
    if unsafe { GetVolumePathNameW(name.as_ptr(), root.as_mut_ptr(), root.len() as u32) } == 0 {
        return None;
    }
    let end = root.iter().position(|&c| c == 0).unwrap_or(root.len());
    Some(String::from_utf16_lossy(&root[..end]).to_lowercase())
}

pub fn free_bytes(folder: &Path) -> Option<u64> {
    let name = wide(folder.as_os_str());
    let mut available = 0u64;
    // SAFETY: a NUL-terminated folder name and one out value; the others may be null.
    let ok = unsafe {
        GetDiskFreeSpaceExW(
            name.as_ptr(),
            &mut available,
            std::ptr::null_mut(),
            std::ptr::null_mut(),
        )
    };
    (ok != 0).then_some(available)
}

pub fn read_at(file: &File, buf: &mut [u8], offset: u64) -> io::Result<usize> {
    file.seek_read(buf, offset)
}

pub fn read_exact_at(file: &File, mut buf: &mut [u8], mut offset: u64) -> io::Result<()> {
    while !buf.is_empty() {
        match file.seek_read(buf, offset) {
            Ok(0) => {
                return Err(io::Error::new(
                    io::ErrorKind::UnexpectedEof,
                    "failed to fill whole buffer",
                ))
            }
            Ok(n) => {
                buf = &mut buf[n..];
                offset += n as u64;
            }
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(())
}

/// The security identifier of the user this process runs as.
fn current_user_sid() -> io::Result<Vec<u8>> {
    let mut token: HANDLE = std::ptr::null_mut();
    // SAFETY: the pseudo-handle of this process and an out handle, closed below.
    if unsafe { OpenProcessToken(GetCurrentProcess(), TOKEN_QUERY, &mut token) } == 0 {
        return Err(last_error());
    }
    let token = Owned(token);
    let mut buf = vec![0u8; 256];
    let mut len = 0u32;
    // SAFETY: a query token and a buffer of the length given; the answer holds a
    // TOKEN_USER followed by the SID it points into.
    let ok = unsafe {
        GetTokenInformation(
            token.0,
            TokenUser,
            buf.as_mut_ptr().cast(),
            buf.len() as u32,
            &mut len,
        )
    };
    if ok == 0 {
        return Err(last_error());
    }
    // SAFETY: the buffer now starts with a TOKEN_USER (read unaligned: a Vec<u8>), and
    // its SID pointer points into the buffer, valid for GetLengthSid's length.
    unsafe {
        let user: TOKEN_USER = std::ptr::read_unaligned(buf.as_ptr().cast());
        let sid = user.User.Sid;
        let n = GetLengthSid(sid) as usize;
        Ok(std::slice::from_raw_parts(sid as *const u8, n).to_vec())
    }
}

fn well_known_sid(kind: i32) -> Option<Vec<u8>> {
    let mut buf = vec![0u8; SECURITY_MAX_SID_SIZE as usize];
    let mut len = buf.len() as u32;
    // SAFETY: a buffer of the length given, for a SID that needs no domain.
    let ok = unsafe {
        CreateWellKnownSid(
            kind,
            std::ptr::null_mut(),
            buf.as_mut_ptr().cast(),
            &mut len,
        )
    };
    (ok != 0).then(|| {
        buf.truncate(len as usize);
        buf
    })
}

fn sid_text(sid: PSID) -> String {
    let mut text: *mut u16 = std::ptr::null_mut();
    // SAFETY: a valid SID; the string is allocated by the system and freed below.
    unsafe {
        if windows_sys::Win32::Security::Authorization::ConvertSidToStringSidW(sid, &mut text) == 0
        {
            return "an unknown account".into();
        }
        let len = (0..).take_while(|&i| *text.add(i) != 0).count();
        let s = String::from_utf16_lossy(std::slice::from_raw_parts(text, len));
        LocalFree(text.cast());
        s
    }
}

pub fn check_private_file(path: &Path) -> Result<(), String> {
    std::fs::metadata(path)
        .map_err(|e| format!("{}: {}", path.display(), crate::text::io_reason(&e)))?;
    let name = wide(path.as_os_str());
    let mut owner: PSID = std::ptr::null_mut();
    let mut dacl: *mut ACL = std::ptr::null_mut();
    let mut descriptor = std::ptr::null_mut();
    // SAFETY: a NUL-terminated path and out pointers into a descriptor the system
    // allocates, freed with LocalFree at the end.
    let rc = unsafe {
        GetNamedSecurityInfoW(
            name.as_ptr(),
            SE_FILE_OBJECT,
            OWNER_SECURITY_INFORMATION | DACL_SECURITY_INFORMATION,
            &mut owner,
            std::ptr::null_mut(),
            &mut dacl,
            std::ptr::null_mut(),
            &mut descriptor,
        )
    };
    if rc != 0 {
        return Err(format!(
            "{}: its access list cannot be read: {}",
            path.display(),
            io::Error::from_raw_os_error(rc as i32)
        ));
    }
    let fix = format!(
        "icacls \"{}\" /inheritance:r /grant:r %USERNAME%:F",
        path.display()
    );
    let result = (|| {
        if dacl.is_null() {
            return Err(format!(
                "{} has no access list: everyone can read it; {fix}",
                path.display()
            ));
        }
        let mut trusted = vec![current_user_sid().map_err(|e| e.to_string())?];
        trusted.extend(well_known_sid(WinLocalSystemSid));
        trusted.extend(well_known_sid(WinBuiltinAdministratorsSid));
        let reads = FILE_READ_DATA | GENERIC_READ | GENERIC_ALL | FILE_ALL_ACCESS;
        // SAFETY: the access list the descriptor holds, read entry by entry through
        // GetAce; each entry's header says its type before its body is read.
        unsafe {
            for i in 0..u32::from((*dacl).AceCount) {
                let mut ace = std::ptr::null_mut();
                if GetAce(dacl, i, &mut ace) == 0 {
                    continue;
                }
                let allowed = ace as *const ACCESS_ALLOWED_ACE;
                if (*allowed).Header.AceType != ACCESS_ALLOWED_ACE_TYPE
                    || (*allowed).Mask & reads == 0
                {
                    continue;
                }
                let sid = std::ptr::addr_of!((*allowed).SidStart) as PSID;
                let known = trusted
                    .iter()
                    .any(|t| EqualSid(sid, t.as_ptr() as PSID) != 0)
                    || (!owner.is_null() && EqualSid(sid, owner) != 0);
                if !known {
                    return Err(format!(
                        "{} can be read by another account ({}); {fix}",
                        path.display(),
                        sid_text(sid)
                    ));
                }
            }
        }
        Ok(())
    })();
    // SAFETY: the descriptor the system allocated above.
    unsafe { LocalFree(descriptor) };
    result
}

pub fn make_private(path: &Path) -> io::Result<()> {
    let user = current_user_sid()?;
    // An access list with one entry: the user, full access.
    let size = std::mem::size_of::<ACL>() + std::mem::size_of::<ACCESS_ALLOWED_ACE>() + user.len();
    let mut acl = vec![0u64; size.div_ceil(8)];
    let acl_ptr = acl.as_mut_ptr() as *mut ACL;
    let name = wide(path.as_os_str());
    // SAFETY: an aligned buffer of `size` bytes for the list, the user's SID, and a
    // NUL-terminated path; the list is protected, so nothing is inherited into it.
    unsafe {
        if InitializeAcl(acl_ptr, size as u32, ACL_REVISION) == 0
            || AddAccessAllowedAce(
                acl_ptr,
                ACL_REVISION,
                FILE_ALL_ACCESS,
                user.as_ptr() as PSID,
            ) == 0
        {
            return Err(last_error());
        }
        let rc = SetNamedSecurityInfoW(
            name.as_ptr(),
            SE_FILE_OBJECT,
            DACL_SECURITY_INFORMATION | PROTECTED_DACL_SECURITY_INFORMATION,
            std::ptr::null_mut(),
            std::ptr::null_mut(),
            acl_ptr,
            std::ptr::null(),
        );
        if rc != 0 {
            return Err(io::Error::from_raw_os_error(rc as i32));
        }
    }
    Ok(())
}

pub fn user_tag() -> String {
    let name: String = std::env::var("USERNAME")
        .unwrap_or_default()
        .chars()
        .filter(|c| c.is_ascii_alphanumeric() || *c == '-' || *c == '_')
        .take(32)
        .collect();
    if name.is_empty() {
        "user".into()
    } else {
        name
    }
}

pub fn lower_thread_priority() {
    // SAFETY: the pseudo-handle of the calling thread; a failure leaves it as it was.
    unsafe { SetThreadPriority(GetCurrentThread(), THREAD_PRIORITY_BELOW_NORMAL) };
}

pub fn prepare_daemon_process() {
    // Windows has no file-size signal; what it has are dialog boxes, and an unattended
    // daemon must never wait on one.
    quiet_errors();
}

pub fn notify_service_manager(_state: &str) {
    // A Windows service reports its state to the service control manager (`service`).
}

pub struct StopRequests {
    ctrl_c: tokio::signal::windows::CtrlC,
    ctrl_break: tokio::signal::windows::CtrlBreak,
    close: tokio::signal::windows::CtrlClose,
}

impl StopRequests {
    pub fn listen() -> io::Result<Self> {
        Ok(StopRequests {
            ctrl_c: tokio::signal::windows::ctrl_c()?,
            ctrl_break: tokio::signal::windows::ctrl_break()?,
            close: tokio::signal::windows::ctrl_close()?,
        })
    }

    pub async fn next(&mut self) -> &'static str {
        tokio::select! {
            _ = self.ctrl_c.recv() => "Ctrl-C",
            _ = self.ctrl_break.recv() => "Ctrl-Break",
            _ = self.close.recv() => "the console closing",
        }
    }
}

#[path = "windows/service.rs"]
mod service;

pub use service::{
    install as service_install, run as run_service, start as service_start, stop as service_stop,
    uninstall as service_uninstall,
};

pub fn service_log_folder() -> Option<PathBuf> {
    Some(system_folder("logs"))
}

pub fn system_folder(kind: &str) -> PathBuf {
    // Environment names are case-insensitive on Windows; an unset or relative value (a
    // service started with a stripped environment) falls back to the usual place.
    let base = std::env::var_os("PROGRAMDATA")
        .map(PathBuf::from)
        .filter(|p| p.is_absolute())
        .unwrap_or_else(|| PathBuf::from(r"C:\ProgramData"));
    let root = base.join("subwatch");
    match kind {
        "config" => root,
        "logs" => root.join("logs"),
        _ => root.join("data"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_exception_is_named_and_an_exit_is_an_exit() {
        use std::os::windows::process::ExitStatusExt;
        assert_eq!(
            ending(&ExitStatus::from_raw(0xC000_0005)),
            Ending::Crashed {
                code: "exception 0xC0000005".into(),
                what: "access violation"
            }
        );
        assert_eq!(ending(&ExitStatus::from_raw(3)), Ending::Exited(3));
    }

    #[test]
    fn a_canonical_path_is_written_as_a_user_writes_it() {
        // The verbatim forms of Microsoft's "Naming Files, Paths, and Namespaces".
        assert_eq!(
            without_verbatim_prefix(r"\\?\C:\frames\a.fits"),
            r"C:\frames\a.fits"
        );
        assert_eq!(
            without_verbatim_prefix(r"\\?\UNC\pier\capture\a.fits"),
            r"\\pier\capture\a.fits"
        );
        assert_eq!(without_verbatim_prefix(r"\\.\COM1"), r"\\.\COM1");
        let dir = tempfile::tempdir().unwrap();
        let named = dir.path().join("Nébuleuse ü");
        std::fs::create_dir(&named).unwrap();
        let c = canonical(&named).unwrap();
        assert!(!c.to_string_lossy().starts_with(r"\\?\"), "{}", c.display());
        assert!(c.ends_with("Nébuleuse ü"));
    }

    #[test]
    fn the_sharing_codes_are_windows_own() {
        use windows_sys::Win32::Foundation::{ERROR_ACCESS_DENIED, ERROR_SHARING_VIOLATION};
        // winerror.h, as windows-sys carries it.
        for code in [ERROR_SHARING_VIOLATION, ERROR_LOCK_VIOLATION] {
            assert!(is_still_being_written(&io::Error::from_raw_os_error(
                code as i32
            )));
        }
        assert!(!is_still_being_written(&io::Error::from_raw_os_error(
            ERROR_ACCESS_DENIED as i32
        )));
    }

    #[test]
    fn system_folders_are_under_programdata() {
        // %ProgramData% (Microsoft, "Recognized environment variables"): a machine's
        // application data, the same for every user.
        let root = PathBuf::from(std::env::var_os("PROGRAMDATA").unwrap()).join("subwatch");
        assert_eq!(system_folder("config"), root);
        assert_eq!(system_folder("logs"), root.join("logs"));
        assert_eq!(system_folder("data"), root.join("data"));
    }

    #[test]
    fn a_file_everyone_can_read_is_refused_with_the_fix() {
        let dir = tempfile::tempdir().unwrap();
        let pw = dir.path().join("pw");
        std::fs::write(&pw, "secret\n").unwrap();
        // An access list granting Everyone (S-1-1-0) read, as a careless copy leaves it.
        let everyone = well_known_sid(windows_sys::Win32::Security::WinWorldSid).unwrap();
        let size = std::mem::size_of::<ACL>()
            + 2 * std::mem::size_of::<ACCESS_ALLOWED_ACE>()
            + 2 * SECURITY_MAX_SID_SIZE as usize;
        let mut acl = vec![0u64; size.div_ceil(8)];
        let acl_ptr = acl.as_mut_ptr() as *mut ACL;
        let user = current_user_sid().unwrap();
        let name = wide(pw.as_os_str());
        unsafe {
            assert_ne!(InitializeAcl(acl_ptr, size as u32, ACL_REVISION), 0);
            AddAccessAllowedAce(
                acl_ptr,
                ACL_REVISION,
                FILE_ALL_ACCESS,
                user.as_ptr() as PSID,
            );
            AddAccessAllowedAce(
                acl_ptr,
                ACL_REVISION,
                GENERIC_READ,
                everyone.as_ptr() as PSID,
            );
            assert_eq!(
                SetNamedSecurityInfoW(
                    name.as_ptr(),
                    SE_FILE_OBJECT,
                    DACL_SECURITY_INFORMATION | PROTECTED_DACL_SECURITY_INFORMATION,
                    std::ptr::null_mut(),
                    std::ptr::null_mut(),
                    acl_ptr,
                    std::ptr::null(),
                ),
                0
            );
        }
        let e = check_private_file(&pw).unwrap_err();
        assert!(e.contains("S-1-1-0") && e.contains("icacls"), "{e}");
        make_private(&pw).unwrap();
        assert_eq!(check_private_file(&pw), Ok(()));
    }
}
