//! The bundled cfitsio behind a safe interface: opening a file (by path, without cfitsio's
//! extended-filename syntax, or from bytes in memory), moving to an HDU, reading an image
//! as `f32`, deleting a keyword, and cfitsio's error messages. Every unsafe block of the
//! project that calls cfitsio is here, each with its reason. cfitsio keeps its message
//! stack in global state, so every call happens under one lock, the `fitsio` crate's
//! calls in `frame::write` too (`hold`).

use std::ffi::{CStr, CString};
use std::marker::PhantomData;
use std::os::raw::{c_char, c_int, c_void};
use std::path::Path;
use std::sync::{Mutex, MutexGuard};

use fitsio::sys;

static CFITSIO: Mutex<()> = Mutex::new(());

/// An open file; closed when dropped. `'a` is the life of the bytes it may read from.
pub struct Fits<'a> {
    file: *mut sys::fitsfile,
    // cfitsio keeps the addresses of these two for a file opened in memory; boxed, so
    // they stay put while the file is open.
    _memory: Option<Box<(*mut c_void, usize)>>,
    _guard: MutexGuard<'static, ()>,
    _bytes: PhantomData<&'a mut [u8]>,
}

impl Drop for Fits<'_> {
    fn drop(&mut self) {
        let mut status = 0;
        // SAFETY: `file` came from a successful open and is closed once, here.
        unsafe { sys::ffclos(self.file, &mut status) };
    }
}

fn lock() -> MutexGuard<'static, ()> {
    let guard = CFITSIO.lock().unwrap_or_else(|p| p.into_inner());
    // SAFETY: clears cfitsio's global message stack; no pointer is involved.
    unsafe { sys::ffcmsg() };
    guard
}

/// cfitsio's words for `status`, with the first line of its message stack.
pub fn message(status: c_int) -> String {
    let mut text = [0 as c_char; 32];
    // SAFETY: ffgerr writes at most 30 characters and a NUL into the 32 given.
    unsafe { sys::ffgerr(status, text.as_mut_ptr()) };
    // SAFETY: `text` was zeroed and ffgerr leaves it NUL-terminated within its length.
    let short = unsafe { CStr::from_ptr(text.as_ptr()) }
        .to_string_lossy()
        .trim()
        .to_string();
    // Drain the detailed message stack; keep its first line, which names the cause.
    let mut detail = String::new();
    let mut buf = [0 as c_char; 81];
    loop {
        // SAFETY: ffgmsg writes at most 80 characters and a NUL into the 81 given.
        let got = unsafe { sys::ffgmsg(buf.as_mut_ptr()) };
        if got == 0 {
            break;
        }
        if detail.is_empty() {
            // SAFETY: ffgmsg returned a message, NUL-terminated within `buf`.
            detail = unsafe { CStr::from_ptr(buf.as_ptr()) }
                .to_string_lossy()
                .trim()
                .to_string();
        }
    }
    if detail.is_empty() || detail.eq_ignore_ascii_case(&short) {
        format!("{short} (cfitsio status {status})")
    } else {
        format!("{short}: {detail} (cfitsio status {status})")
    }
}

fn checked(status: c_int, what: &str) -> Result<(), String> {
    if status == 0 {
        Ok(())
    } else {
        Err(format!("{what}: {}", message(status)))
    }
}

impl<'a> Fits<'a> {
    /// Open `path` read-only. ffdkopn takes the name literally: brackets or a leading
    /// '!' in a user's path are not cfitsio's extended syntax here.
    pub fn open_path(path: &Path) -> Result<Fits<'static>, String> {
        let c_path = CString::new(path.as_os_str().as_encoded_bytes())
            .map_err(|_| "path contains a NUL byte".to_string())?;
        let guard = lock();
        let mut status: c_int = 0;
        let mut file: *mut sys::fitsfile = std::ptr::null_mut();
        // SAFETY: a valid C string and out-pointers that live through the call.
        unsafe { sys::ffdkopn(&mut file, c_path.as_ptr(), 0, &mut status) };
        if status != 0 || file.is_null() {
            return Err(format!("not a readable FITS file: {}", message(status)));
        }
        Ok(Fits {
            file,
            _memory: None,
            _guard: guard,
            _bytes: PhantomData,
        })
    }

    /// Open bytes in memory read-only (an inflated gzip stream). The bytes are borrowed
    /// for as long as the file is open.
    pub fn open_memory(bytes: &'a mut [u8]) -> Result<Fits<'a>, String> {
        let guard = lock();
        let mut memory = Box::new((bytes.as_mut_ptr().cast::<c_void>(), bytes.len()));
        let name = CString::new("inflated.fits").expect("no NUL");
        let mut status: c_int = 0;
        let mut file: *mut sys::fitsfile = std::ptr::null_mut();
        let (ptr, size) = &mut *memory;
        // SAFETY: the bytes outlive the file (borrowed for 'a), the boxed address and size
        // cfitsio keeps stay put until the file is closed, and read-only mode (0) with no
        // reallocation function means cfitsio never writes or resizes the buffer.
        unsafe { sys::ffomem(&mut file, name.as_ptr(), 0, ptr, size, 0, None, &mut status) };
        if status != 0 || file.is_null() {
            return Err(format!("not a readable FITS file: {}", message(status)));
        }
        Ok(Fits {
            file,
            _memory: Some(memory),
            _guard: guard,
            _bytes: PhantomData,
        })
    }

    /// Move to HDU `index` (0-based).
    pub fn move_to(&mut self, index: usize) -> Result<(), String> {
        let mut status: c_int = 0;
        let mut hdu_type: c_int = 0;
        let number = c_int::try_from(index + 1).map_err(|_| "HDU number out of range")?;
        // SAFETY: an open file and out-pointers that live through the call.
        unsafe { sys::ffmahd(self.file, number, &mut hdu_type, &mut status) };
        checked(status, &format!("moving to HDU {number}"))
    }

    /// The current HDU's image as `count` physical values, BLANK pixels as NaN.
    pub fn read_f32(&mut self, count: usize) -> Result<Vec<f32>, String> {
        let mut data: Vec<f32> = crate::buffer::try_zeroed(count)
            .ok_or_else(|| format!("cannot allocate {count} pixels"))?;
        let n = sys::LONGLONG::try_from(count).map_err(|_| "too many pixels")?;
        let mut any_null: c_int = 0;
        let mut status: c_int = 0;
        // A NaN null value makes cfitsio replace BLANK (integer) pixels by NaN.
        // SAFETY: `data` holds exactly `count` elements for cfitsio to fill.
        unsafe {
            sys::ffgpve(
                self.file,
                0,
                1,
                n,
                f32::NAN,
                data.as_mut_ptr(),
                &mut any_null,
                &mut status,
            )
        };
        if status != 0 {
            return Err(format!(
                "pixel data unreadable (truncated file?): {}",
                message(status)
            ));
        }
        Ok(data)
    }
}

/// cfitsio held for a writer that calls it through the `fitsio` crate (`frame::write`):
/// while this lives, that crate's calls run under the same lock as every other call.
pub struct Held {
    _guard: MutexGuard<'static, ()>,
}

/// Take the lock for a run of `fitsio` calls; let go when the value drops.
pub fn hold() -> Held {
    Held { _guard: lock() }
}

/// Delete a keyword from the current HDU of a file the `fitsio` crate opened for writing,
/// under the lock the writer holds.
pub fn delete_key(_held: &Held, file: &mut fitsio::FitsFile, key: &str) -> Result<(), String> {
    let name = CString::new(key).map_err(|_| "keyword contains a NUL byte".to_string())?;
    let mut status: c_int = 0;
    // SAFETY: the file is open (borrowed mutably for the call) and `name` lives through it.
    unsafe { sys::ffdkey(file.as_raw(), name.as_ptr(), &mut status) };
    if status == sys::KEY_NO_EXIST as c_int {
        return Ok(());
    }
    checked(status, &format!("deleting {key}"))
}
