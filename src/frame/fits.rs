//! FITS decoding through the bundled cfitsio: the first image HDU (primary or
//! extension, tile-compressed included, gzip-wrapped files included) into `f32`
//! physical values with BZERO/BSCALE applied and BLANK/NaN pixels as NaN.
//!
//! This module opens files and nothing else reads pixels from disk. It never writes
//! to the file it reads.

use std::ffi::{CStr, CString};
use std::os::raw::{c_char, c_int};
use std::path::Path;
use std::sync::Mutex;

use fitsio::sys;
use ndarray::Array2;

use super::header::{parse_card, HeaderCard};
use super::FrameError;

/// cfitsio keeps its error-message stack in global state; one decode at a time keeps
/// messages attached to the right file. Decoding is a small part of a frame's cost.
static CFITSIO: Mutex<()> = Mutex::new(());

/// What the decoder hands to the rest of the program.
pub struct DecodedImage {
    pub pixels: Array2<f32>,
    pub cards: Vec<HeaderCard>,
    /// BITPIX of the stored data as the file declares it (after tile decompression).
    pub bitpix: i32,
    /// 0-based HDU index the image came from.
    pub hdu_index: usize,
}

/// Limits applied before any allocation sized from the header.
#[derive(Debug, Clone, Copy)]
pub struct DecodeLimits {
    pub max_pixels: u64,
}

impl Default for DecodeLimits {
    fn default() -> Self {
        // 400 megapixels: larger than any camera sensor in use by the users we serve,
        // and 1.6 GB as f32, which a 4 GB observatory PC can still hold.
        Self {
            max_pixels: 400_000_000,
        }
    }
}

struct OpenFile(*mut sys::fitsfile);

impl Drop for OpenFile {
    fn drop(&mut self) {
        let mut status = 0;
        // SAFETY: the pointer came from a successful ffdkopn and is closed once.
        unsafe {
            sys::ffclos(self.0, &mut status);
        }
    }
}

fn cfitsio_message(status: c_int) -> String {
    let mut text = [0 as c_char; 32];
    // SAFETY: ffgerr writes at most 31 characters plus NUL into a 31-char buffer.
    unsafe { sys::ffgerr(status, text.as_mut_ptr()) };
    let short = unsafe { CStr::from_ptr(text.as_ptr()) }
        .to_string_lossy()
        .trim()
        .to_string();
    // Drain the detailed message stack; keep its first line, which names the cause.
    let mut detail = String::new();
    let mut buf = [0 as c_char; 81];
    loop {
        // SAFETY: ffgmsg writes at most 80 characters plus NUL.
        let got = unsafe { sys::ffgmsg(buf.as_mut_ptr()) };
        if got == 0 {
            break;
        }
        if detail.is_empty() {
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

fn check(status: c_int, what: &str) -> Result<(), String> {
    if status == 0 {
        Ok(())
    } else {
        Err(format!("{what}: {}", cfitsio_message(status)))
    }
}

/// Decode the first image HDU with data in `path`.
pub fn decode(path: &Path, limits: DecodeLimits) -> Result<DecodedImage, FrameError> {
    decode_hdu(path, limits, true)
}

/// The header cards of the first image HDU with data, without reading its pixels.
pub fn read_header(path: &Path, limits: DecodeLimits) -> Result<Vec<HeaderCard>, FrameError> {
    decode_hdu(path, limits, false).map(|d| d.cards)
}

fn decode_hdu(
    path: &Path,
    limits: DecodeLimits,
    with_pixels: bool,
) -> Result<DecodedImage, FrameError> {
    let fail = |reason: String| FrameError::Decode {
        path: path.to_path_buf(),
        reason,
    };
    let meta = std::fs::metadata(path).map_err(|e| FrameError::Io {
        path: path.to_path_buf(),
        source: e,
    })?;
    if !meta.is_file() {
        return Err(fail("not a regular file".into()));
    }
    if meta.len() == 0 {
        return Err(fail("empty file (0 bytes)".into()));
    }
    // A FITS file starts with the SIMPLE card; a gzip stream with 1f 8b.
    let mut head = [0u8; 6];
    let got = std::fs::File::open(path)
        .and_then(|mut f| std::io::Read::read(&mut f, &mut head))
        .map_err(|e| FrameError::Io {
            path: path.to_path_buf(),
            source: e,
        })?;
    if !(head[..got].starts_with(b"SIMPLE") || head[..got].starts_with(&[0x1f, 0x8b])) {
        return Err(fail(
            "not a FITS file (it does not begin with the SIMPLE keyword)".into(),
        ));
    }
    let c_path = CString::new(path.as_os_str().as_encoded_bytes())
        .map_err(|_| fail("path contains a NUL byte".into()))?;

    let _guard = CFITSIO.lock().unwrap_or_else(|p| p.into_inner());
    unsafe { sys::ffcmsg() };
    let mut status: c_int = 0;
    let mut raw: *mut sys::fitsfile = std::ptr::null_mut();
    // ffdkopn: no extended-filename syntax, so brackets or a leading '!' in a user's
    // path are taken literally; gzip-wrapped files are still decompressed in memory.
    // SAFETY: valid C string and out-pointers.
    unsafe { sys::ffdkopn(&mut raw, c_path.as_ptr(), 0, &mut status) };
    if status != 0 || raw.is_null() {
        return Err(fail(format!(
            "not a readable FITS file: {}",
            cfitsio_message(status)
        )));
    }
    let file = OpenFile(raw);

    let mut hdu_count: c_int = 0;
    unsafe { sys::ffthdu(file.0, &mut hdu_count, &mut status) };
    check(status, "counting HDUs").map_err(fail)?;

    let mut seen = Vec::new();
    for hdu in 1..=hdu_count {
        let mut hdu_type: c_int = 0;
        unsafe { sys::ffmahd(file.0, hdu, &mut hdu_type, &mut status) };
        check(status, &format!("moving to HDU {hdu}")).map_err(fail)?;
        // ffghdt reports a tile-compressed image (a binary table underneath) as an image.
        unsafe { sys::ffghdt(file.0, &mut hdu_type, &mut status) };
        check(status, "reading HDU type").map_err(fail)?;
        if hdu_type != sys::IMAGE_HDU as c_int {
            seen.push(if hdu_type == sys::BINARY_TBL as c_int {
                "binary table"
            } else {
                "ASCII table"
            });
            continue;
        }
        let mut naxis: c_int = 0;
        unsafe { sys::ffgidm(file.0, &mut naxis, &mut status) };
        check(status, "reading NAXIS").map_err(fail)?;
        if naxis == 0 {
            seen.push("header without data");
            continue;
        }
        if !(2..=3).contains(&naxis) {
            return Err(fail(format!(
                "HDU {hdu} has NAXIS = {naxis}; only 2-D images (or a 3-D cube with one plane) are supported"
            )));
        }
        let mut axes = [0 as sys::LONGLONG; 3];
        unsafe { sys::ffgiszll(file.0, naxis, axes.as_mut_ptr(), &mut status) };
        check(status, "reading NAXISn").map_err(fail)?;
        if naxis == 3 && axes[2] != 1 {
            return Err(fail(format!(
                "HDU {hdu} is a {}-plane cube; colour-separated cubes are not supported (one plane expected)",
                axes[2]
            )));
        }
        let (width, height) = (axes[0], axes[1]);
        if width <= 0 || height <= 0 {
            seen.push("empty image");
            continue;
        }
        let pixels = (width as u64).saturating_mul(height as u64);
        if pixels > limits.max_pixels {
            return Err(fail(format!(
                "image is {width} x {height} = {pixels} pixels, over the limit of {} (raise max_pixels if this is real)",
                limits.max_pixels
            )));
        }
        let mut bitpix: c_int = 0;
        unsafe { sys::ffgiet(file.0, &mut bitpix, &mut status) };
        check(status, "reading BITPIX").map_err(fail)?;

        let cards = read_cards(file.0).map_err(fail)?;
        if !with_pixels {
            return Ok(DecodedImage {
                pixels: Array2::zeros((0, 0)),
                cards,
                bitpix,
                hdu_index: (hdu - 1) as usize,
            });
        }

        // A plain (not gzip-wrapped, not tile-compressed) image is read straight from the
        // file in parallel; cfitsio converts on one core, which on a 24-megapixel frame
        // took longer than several measurement stages together.
        let compressed = unsafe { sys::fits_is_compressed_image(file.0, &mut status) };
        check(status, "checking for tile compression").map_err(fail)?;
        let data = if head.starts_with(b"SIMPLE") && compressed == 0 {
            let layout = plain_layout(file.0).map_err(fail)?;
            // cfitsio is done with the file: close it while still holding the lock.
            drop(file);
            drop(_guard);
            read_plain(path, &layout, pixels as usize).map_err(fail)?
        } else {
            let mut data: Vec<f32> = crate::buffer::try_zeroed(pixels as usize)
                .ok_or_else(|| fail(format!("cannot allocate {pixels} pixels")))?;
            let mut any_null: c_int = 0;
            // A NaN null value makes cfitsio replace BLANK (integer) pixels by NaN.
            // SAFETY: `data` holds exactly `pixels` elements.
            unsafe {
                sys::ffgpve(
                    file.0,
                    0,
                    1,
                    pixels as sys::LONGLONG,
                    f32::NAN,
                    data.as_mut_ptr(),
                    &mut any_null,
                    &mut status,
                )
            };
            if status != 0 {
                return Err(fail(format!(
                    "pixel data unreadable (truncated file?): {}",
                    cfitsio_message(status)
                )));
            }
            data
        };
        let pixels = Array2::from_shape_vec((height as usize, width as usize), data)
            .map_err(|e| fail(format!("bad image shape: {e}")))?;
        return Ok(DecodedImage {
            pixels,
            cards,
            bitpix,
            hdu_index: (hdu - 1) as usize,
        });
    }
    Err(fail(if seen.is_empty() {
        "no HDU with image data".into()
    } else {
        format!("no image data (found: {})", seen.join(", "))
    }))
}

/// Where and how an uncompressed image's pixels are stored.
struct PlainLayout {
    /// Byte offset of the first pixel.
    data_start: u64,
    bitpix: i32,
    zero: f64,
    scale: f64,
    /// Integer images: the stored value that marks an undefined pixel.
    blank: Option<i64>,
}

/// A numeric keyword of the current HDU; `None` when it is absent.
fn key_f64(file: *mut sys::fitsfile, name: &str) -> Result<Option<f64>, String> {
    let key = CString::new(name).expect("keyword names have no NUL");
    let mut value = 0.0;
    let mut status: c_int = 0;
    // SAFETY: valid fitsfile, C string and out-pointers; a null comment pointer is allowed.
    unsafe {
        sys::ffgkyd(
            file,
            key.as_ptr(),
            &mut value,
            std::ptr::null_mut(),
            &mut status,
        )
    };
    match status {
        0 => Ok(Some(value)),
        s if s == sys::KEY_NO_EXIST as c_int => {
            unsafe { sys::ffcmsg() };
            Ok(None)
        }
        s => Err(format!("reading {name}: {}", cfitsio_message(s))),
    }
}

fn plain_layout(file: *mut sys::fitsfile) -> Result<PlainLayout, String> {
    let mut status: c_int = 0;
    // The stored BITPIX (not the equivalent type, which folds BZERO in).
    let mut bitpix: c_int = 0;
    // SAFETY: valid fitsfile and out-pointers.
    unsafe { sys::ffgidt(file, &mut bitpix, &mut status) };
    check(status, "reading BITPIX")?;
    let (mut head_start, mut data_start, mut data_end): (
        sys::LONGLONG,
        sys::LONGLONG,
        sys::LONGLONG,
    ) = (0, 0, 0);
    // SAFETY: valid fitsfile and out-pointers.
    unsafe {
        sys::ffghadll(
            file,
            &mut head_start,
            &mut data_start,
            &mut data_end,
            &mut status,
        )
    };
    check(status, "locating the pixel data")?;
    let blank = if bitpix > 0 {
        key_f64(file, "BLANK")?.map(|b| b as i64)
    } else {
        None
    };
    Ok(PlainLayout {
        data_start: u64::try_from(data_start).map_err(|_| "negative data offset".to_string())?,
        bitpix,
        zero: key_f64(file, "BZERO")?.unwrap_or(0.0),
        scale: key_f64(file, "BSCALE")?.unwrap_or(1.0),
        blank,
    })
}

/// Read and convert the `count` big-endian pixels of a plain image, in parallel chunks;
/// physical value = BZERO + BSCALE × stored value, BLANK and NaN as NaN (FITS Standard
/// 4.0, sections 4.4.2 and 5.3). The output is written once, never zeroed first.
fn read_plain(path: &Path, layout: &PlainLayout, count: usize) -> Result<Vec<f32>, String> {
    use rayon::prelude::*;
    use std::os::unix::fs::FileExt;
    let file = std::fs::File::open(path).map_err(|e| format!("reopening for pixels: {e}"))?;
    let mut data: Vec<f32> = Vec::new();
    data.try_reserve_exact(count)
        .map_err(|_| format!("cannot allocate {count} pixels"))?;
    let out = &mut data.spare_capacity_mut()[..count];
    let width = (layout.bitpix.unsigned_abs() / 8) as usize;
    const CHUNK: usize = 1 << 18;
    let PlainLayout {
        zero, scale, blank, ..
    } = *layout;
    let identity = zero == 0.0 && scale == 1.0;
    let physical = move |raw: f64| (zero + scale * raw) as f32;
    out.par_chunks_mut(CHUNK)
        .enumerate()
        // One byte buffer per worker, reused from chunk to chunk.
        .try_for_each_init(Vec::new, |bytes: &mut Vec<u8>, (k, dst)| {
            bytes.resize(dst.len() * width, 0);
            let offset = layout.data_start + (k * CHUNK * width) as u64;
            file.read_exact_at(bytes, offset).map_err(|e| {
                if e.kind() == std::io::ErrorKind::UnexpectedEof {
                    "pixel data unreadable (truncated file?): the file ends inside the image data"
                        .to_string()
                } else {
                    format!("pixel data unreadable: {e}")
                }
            })?;
            let integer = |raw: i64| {
                if blank == Some(raw) {
                    f32::NAN
                } else {
                    physical(raw as f64)
                }
            };
            match layout.bitpix {
                8 => fill(dst, bytes, |b: [u8; 1]| integer(i64::from(b[0]))),
                16 => fill(dst, bytes, |b| integer(i64::from(i16::from_be_bytes(b)))),
                32 => fill(dst, bytes, |b| integer(i64::from(i32::from_be_bytes(b)))),
                64 => fill(dst, bytes, |b| integer(i64::from_be_bytes(b))),
                -32 => fill(dst, bytes, |b| {
                    let v = f32::from_be_bytes(b);
                    if identity {
                        v
                    } else {
                        physical(f64::from(v))
                    }
                }),
                -64 => fill(dst, bytes, |b| physical(f64::from_be_bytes(b))),
                other => return Err(format!("unsupported BITPIX {other}")),
            }
            Ok(())
        })?;
    // SAFETY: every chunk of the first `count` elements was written above (an error in
    // any chunk returned before this point).
    unsafe { data.set_len(count) };
    Ok(data)
}

/// Convert stored words of `W` bytes into `dst`, one call of `convert` per pixel.
fn fill<const W: usize>(
    dst: &mut [std::mem::MaybeUninit<f32>],
    bytes: &[u8],
    convert: impl Fn([u8; W]) -> f32,
) {
    for (d, b) in dst.iter_mut().zip(bytes.chunks_exact(W)) {
        d.write(convert(b.try_into().expect("chunks of W bytes")));
    }
}

fn read_cards(file: *mut sys::fitsfile) -> Result<Vec<HeaderCard>, String> {
    let mut status: c_int = 0;
    let mut count: c_int = 0;
    let mut more: c_int = 0;
    unsafe { sys::ffghsp(file, &mut count, &mut more, &mut status) };
    check(status, "reading header size")?;
    let mut cards = Vec::with_capacity(count.max(0) as usize);
    let mut buf = [0 as c_char; 81];
    for n in 1..=count {
        // SAFETY: ffgrec writes one 80-character card plus NUL.
        unsafe { sys::ffgrec(file, n, buf.as_mut_ptr(), &mut status) };
        check(status, &format!("reading header card {n}"))?;
        let text = unsafe { CStr::from_ptr(buf.as_ptr()) }.to_string_lossy();
        if let Some(card) = parse_card(&text) {
            cards.push(card);
        }
    }
    Ok(cards)
}

/// Whether a plain (not gzip-wrapped) FITS file holds all the bytes its headers promise:
/// every header block up to END, and each HDU's data, |BITPIX|/8 × GCOUNT × (PCOUNT +
/// NAXIS1 × … × NAXISn) bytes rounded up to 2880 (FITS Standard 4.0, section 4.4.1).
/// `None` when the file cannot be read or is not plain FITS (then only the settle time
/// decides). Reads only the header blocks.
pub fn looks_complete(path: &Path) -> Option<bool> {
    use std::io::{Read, Seek, SeekFrom};
    let mut f = std::fs::File::open(path).ok()?;
    let len = f.metadata().ok()?.len();
    let mut magic = [0u8; 6];
    if f.read_exact(&mut magic).is_err() || &magic != b"SIMPLE" {
        // Not plain FITS (gzip, or not FITS at all): only the settle time can decide.
        return None;
    }
    let mut offset = 0u64;
    let mut first = true;
    let mut block = [0u8; 2880];
    loop {
        if offset == len && !first {
            return Some(true);
        }
        // Header: blocks until an END card.
        let mut values: std::collections::HashMap<String, i64> = std::collections::HashMap::new();
        let mut ended = false;
        let mut blocks = 0u64;
        while !ended {
            if offset + (blocks + 1) * 2880 > len {
                return Some(false);
            }
            f.seek(SeekFrom::Start(offset + blocks * 2880)).ok()?;
            f.read_exact(&mut block).ok()?;
            if !first && blocks == 0 && !block.starts_with(b"XTENSION") {
                // Trailing bytes that are not an extension: nothing more is promised.
                return Some(true);
            }
            blocks += 1;
            if blocks > 10_000 {
                return None;
            }
            for card in block.chunks(80) {
                let text = String::from_utf8_lossy(card);
                let key = text.get(..8).unwrap_or("").trim().to_string();
                if key == "END" {
                    ended = true;
                    break;
                }
                if key == "BITPIX" || key == "GCOUNT" || key == "PCOUNT" || key.starts_with("NAXIS")
                {
                    if let Some(v) = text
                        .get(10..)
                        .and_then(|v| v.split('/').next())
                        .and_then(|v| v.trim().parse::<i64>().ok())
                    {
                        values.insert(key, v);
                    }
                }
            }
        }
        offset += blocks * 2880;
        let naxis = *values.get("NAXIS").unwrap_or(&0);
        let bitpix = values.get("BITPIX").copied().unwrap_or(8).unsigned_abs();
        let mut data = if naxis == 0 { 0u64 } else { 1u64 };
        for i in 1..=naxis.clamp(0, 999) {
            let n = values
                .get(&format!("NAXIS{i}"))
                .copied()
                .unwrap_or(0)
                .max(0) as u64;
            data = data.saturating_mul(n);
        }
        let pcount = values.get("PCOUNT").copied().unwrap_or(0).max(0) as u64;
        let gcount = values.get("GCOUNT").copied().unwrap_or(1).max(1) as u64;
        let bytes = (bitpix / 8)
            .saturating_mul(gcount)
            .saturating_mul(data.saturating_add(if naxis == 0 { 0 } else { pcount }));
        let padded = bytes.div_ceil(2880).saturating_mul(2880);
        if offset.saturating_add(padded) > len {
            // The last data block may legally lack its padding; the data itself must be there.
            return Some(offset.saturating_add(bytes) <= len);
        }
        offset += padded;
        first = false;
        if offset >= len {
            return Some(true);
        }
    }
}
