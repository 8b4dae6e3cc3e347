//! FITS decoding: the first image of a file (primary or extension, tile-compressed
//! included, gzip-wrapped files included) into `f32` physical values with BZERO/BSCALE
//! applied and BLANK/NaN pixels as NaN.
//!
//! Every file is hostile until read. Its structure is walked by `layout` (pure Rust, every
//! size checked) before anything is allocated; plain images are converted here, straight
//! from the file or from the inflated bytes; only a tile-compressed image reaches the
//! bundled cfitsio, and only after `layout::check_compressed` has checked every keyword
//! the decompressor divides by or indexes with. A gzip-wrapped file is inflated here, not
//! by cfitsio, and never past what its headers promise, so a small file cannot inflate
//! into gigabytes. What still runs C code on file bytes runs in a worker process
//! (`reader`), so a fault there costs one file.
//!
//! This module opens files and nothing else reads pixels from disk. It never writes to
//! the file it reads.

use std::io::Read;
use std::path::Path;

use ndarray::Array2;

use super::cards::HeaderCard;
use super::cfitsio::Fits;
use super::layout::CompressedImage;
use super::layout::{self, BlockSource, ImageHdu, PlainImage, Promise, BLOCK};
use super::FrameError;

/// What the decoder hands to the rest of the program.
pub struct DecodedImage {
    pub pixels: Array2<f32>,
    pub cards: Vec<HeaderCard>,
    /// BITPIX of the stored data as the file declares it (ZBITPIX for a compressed image).
    pub bitpix: i32,
    /// 0-based HDU index the image came from.
    pub hdu_index: usize,
}

/// Limits applied before any allocation sized from the header.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
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

impl DecodeLimits {
    fn promise(&self) -> Promise {
        Promise {
            max_pixels: self.max_pixels,
        }
    }

    /// The most bytes a gzip-wrapped file may inflate to: the largest image the pixel
    /// limit allows (as BITPIX -64) with room for its headers and a small table before it.
    fn max_inflated_bytes(&self) -> u64 {
        self.promise().max_image_bytes().saturating_add(64 << 20)
    }
}

/// Blocks read from a plain file on disk.
struct FileBlocks {
    file: std::fs::File,
    len: u64,
}

impl BlockSource for FileBlocks {
    fn block(&mut self, offset: u64) -> Result<Option<Box<[u8; 2880]>>, String> {
        if offset.saturating_add(BLOCK) > self.len {
            return Ok(None);
        }
        let mut b = Box::new([0u8; 2880]);
        crate::os::read_exact_at(&self.file, &mut b[..], offset)
            .map_err(|e| format!("reading at byte {offset}: {e}"))?;
        Ok(Some(b))
    }
}

/// A gzip-wrapped file, inflated only as far as it is read, and never past `cap` bytes.
struct Inflated {
    decoder: flate2::read::MultiGzDecoder<std::io::BufReader<std::fs::File>>,
    bytes: Vec<u8>,
    cap: u64,
    ended: bool,
}

impl Inflated {
    /// Inflate until `end` bytes are held; false when the stream ends first.
    fn ensure(&mut self, end: u64) -> Result<bool, String> {
        if end > self.cap {
            return Err(format!(
                "the headers promise {end} bytes once inflated, over the limit of {} (raise max_pixels if this is real)",
                self.cap
            ));
        }
        let end = end as usize;
        while self.bytes.len() < end && !self.ended {
            let want = (end - self.bytes.len()).min(4 << 20);
            self.bytes
                .try_reserve(want)
                .map_err(|_| format!("cannot allocate {end} bytes to inflate into"))?;
            let at = self.bytes.len();
            self.bytes.resize(at + want, 0);
            let got = self
                .decoder
                .read(&mut self.bytes[at..])
                .map_err(|e| format!("the gzip stream is damaged: {e}"))?;
            self.bytes.truncate(at + got);
            if got == 0 {
                self.ended = true;
            }
        }
        Ok(self.bytes.len() >= end)
    }
}

impl BlockSource for Inflated {
    fn block(&mut self, offset: u64) -> Result<Option<Box<[u8; 2880]>>, String> {
        let end = offset.saturating_add(BLOCK);
        if !self.ensure(end)? {
            return Ok(None);
        }
        let b: [u8; 2880] = self.bytes[offset as usize..end as usize]
            .try_into()
            .expect("one block");
        Ok(Some(Box::new(b)))
    }
}

enum Source {
    File(FileBlocks),
    Inflated(Box<Inflated>),
}

impl BlockSource for Source {
    fn block(&mut self, offset: u64) -> Result<Option<Box<[u8; 2880]>>, String> {
        match self {
            Source::File(f) => f.block(offset),
            Source::Inflated(i) => i.block(offset),
        }
    }
}

/// Open `path` for decoding: a regular, non-empty file that begins as FITS or gzip does.
fn open(path: &Path, limits: &DecodeLimits) -> Result<Source, FrameError> {
    let io = |source| FrameError::Io {
        path: path.to_path_buf(),
        source,
    };
    let fail = |reason: &str| FrameError::Decode {
        path: path.to_path_buf(),
        reason: reason.into(),
    };
    let meta = std::fs::metadata(path).map_err(io)?;
    if !meta.is_file() {
        return Err(fail("not a regular file"));
    }
    // Opened before its size is judged: a file its writer still holds (Windows) is said
    // as such, not as empty.
    let mut file = std::fs::File::open(path).map_err(io)?;
    if meta.len() == 0 {
        return Err(fail("empty file (0 bytes)"));
    }
    let mut head = [0u8; 6];
    let got = crate::os::read_at(&file, &mut head, 0).map_err(io)?;
    if head[..got].starts_with(&[0x1f, 0x8b]) {
        // The decoder reads in order from the start; a positioned read may have moved it.
        std::io::Seek::seek(&mut file, std::io::SeekFrom::Start(0)).map_err(io)?;
        let mut inflated = Inflated {
            decoder: flate2::read::MultiGzDecoder::new(std::io::BufReader::new(file)),
            bytes: Vec::new(),
            cap: limits.max_inflated_bytes(),
            ended: false,
        };
        inflated.ensure(6).map_err(|e| fail(&e))?;
        if !inflated.bytes.starts_with(b"SIMPLE") {
            return Err(fail(
                "not a FITS file inside the gzip wrapper (it does not begin with the SIMPLE keyword)",
            ));
        }
        return Ok(Source::Inflated(Box::new(inflated)));
    }
    if !head[..got].starts_with(b"SIMPLE") {
        return Err(fail(
            "not a FITS file (it does not begin with the SIMPLE keyword)",
        ));
    }
    Ok(Source::File(FileBlocks {
        file,
        len: meta.len(),
    }))
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
    let mut source = open(path, &limits)?;
    let (mut hdus, image) =
        layout::find_image(&mut source, limits.promise()).map_err(|e| fail(e.to_string()))?;
    let hdu = hdus.pop().expect("the image's HDU is the last walked");
    let (width, height, bitpix) = match &image {
        ImageHdu::Plain(p) => (p.width, p.height, p.bitpix),
        ImageHdu::Compressed(c) => (c.width, c.height, c.zbitpix),
    };
    let mut decoded = DecodedImage {
        pixels: Array2::zeros((0, 0)),
        cards: hdu.cards,
        bitpix,
        hdu_index: hdu.index,
    };
    if !with_pixels {
        return Ok(decoded);
    }
    let data = match (&image, &mut source) {
        (ImageHdu::Plain(p), Source::File(f)) => read_plain(&f.file, f.len, p),
        (ImageHdu::Plain(p), Source::Inflated(i)) => {
            let end = p.data_start + p.bytes();
            if !i.ensure(end).map_err(&fail)? {
                return Err(fail(TRUNCATED.into()));
            }
            convert_plain(&i.bytes[p.data_start as usize..end as usize], p)
        }
        (ImageHdu::Compressed(c), Source::File(_)) => read_compressed(Opened::Path(path), c),
        (ImageHdu::Compressed(c), Source::Inflated(i)) => {
            let end = hdu
                .data_start
                .saturating_add(layout::padded(hdu.data_bytes).unwrap_or(u64::MAX));
            i.ensure(end).map_err(&fail)?;
            if (i.bytes.len() as u64) < hdu.data_start + hdu.data_bytes {
                return Err(fail(TRUNCATED.into()));
            }
            read_compressed(Opened::Memory(&mut i.bytes), c)
        }
    }
    .map_err(&fail)?;
    decoded.pixels = Array2::from_shape_vec((height as usize, width as usize), data)
        .map_err(|e| fail(format!("bad image shape: {e}")))?;
    Ok(decoded)
}

const TRUNCATED: &str =
    "pixel data unreadable (truncated file?): the file ends inside the image data";

/// Where cfitsio reads a compressed image from.
enum Opened<'a> {
    Path(&'a Path),
    /// Inflated bytes, which cfitsio reads in place and must not outlive.
    Memory(&'a mut Vec<u8>),
}

/// Decompress a tile-compressed image with cfitsio. The keywords were checked by
/// `layout::check_compressed`; cfitsio still reads tile bytes that nothing checked,
/// which is why decoding runs in a worker process.
fn read_compressed(from: Opened<'_>, image: &CompressedImage) -> Result<Vec<f32>, String> {
    let mut file = match from {
        Opened::Path(path) => Fits::open_path(path)?,
        Opened::Memory(bytes) => Fits::open_memory(bytes)?,
    };
    file.move_to(image.hdu)?;
    file.read_f32((image.width * image.height) as usize)
}

/// Pixels converted in parallel chunks of this many.
const CHUNK: usize = 1 << 18;

/// Read and convert a plain image's big-endian pixels from the file in parallel chunks.
fn read_plain(file: &std::fs::File, len: u64, image: &PlainImage) -> Result<Vec<f32>, String> {
    use rayon::prelude::*;
    if image.data_start.saturating_add(image.bytes()) > len {
        return Err(TRUNCATED.into());
    }
    let count = image.pixels() as usize;
    let width = (image.bitpix.unsigned_abs() / 8) as usize;
    let mut data = uninit(count)?;
    data.spare_capacity_mut()[..count]
        .par_chunks_mut(CHUNK)
        .enumerate()
        // One byte buffer per worker, reused from chunk to chunk.
        .try_for_each_init(Vec::new, |bytes: &mut Vec<u8>, (k, dst)| {
            bytes.resize(dst.len() * width, 0);
            let offset = image.data_start + (k * CHUNK * width) as u64;
            crate::os::read_exact_at(file, bytes, offset).map_err(|e| {
                if e.kind() == std::io::ErrorKind::UnexpectedEof {
                    TRUNCATED.to_string()
                } else {
                    format!("pixel data unreadable: {e}")
                }
            })?;
            convert(dst, bytes, image);
            Ok::<(), String>(())
        })?;
    // SAFETY: every chunk of the first `count` elements was written above (an error in
    // any chunk returned before this point).
    unsafe { data.set_len(count) };
    Ok(data)
}

/// Convert a plain image's pixels held in memory.
fn convert_plain(bytes: &[u8], image: &PlainImage) -> Result<Vec<f32>, String> {
    use rayon::prelude::*;
    let count = image.pixels() as usize;
    let width = (image.bitpix.unsigned_abs() / 8) as usize;
    // What makes `set_len` below sound, checked here rather than trusted to the caller:
    // with fewer bytes the zip would stop early and leave elements unwritten.
    assert!(
        count.checked_mul(width).is_some_and(|n| bytes.len() >= n),
        "{} bytes for {count} pixels of {width} bytes",
        bytes.len()
    );
    let mut data = uninit(count)?;
    data.spare_capacity_mut()[..count]
        .par_chunks_mut(CHUNK)
        .zip(bytes.par_chunks(CHUNK * width))
        .for_each(|(dst, src)| convert(dst, src, image));
    // SAFETY: the chunks cover all `count` elements: `bytes` holds at least count × width
    // bytes (asserted above), so every chunk of `data` has a full chunk of bytes.
    unsafe { data.set_len(count) };
    Ok(data)
}

fn uninit(count: usize) -> Result<Vec<f32>, String> {
    let mut data: Vec<f32> = Vec::new();
    data.try_reserve_exact(count)
        .map_err(|_| format!("cannot allocate {count} pixels"))?;
    Ok(data)
}

/// Physical value = BZERO + BSCALE × stored value, BLANK and NaN as NaN (FITS Standard
/// 4.0, sections 4.4.2 and 5.3). The output is written once, never zeroed first.
fn convert(dst: &mut [std::mem::MaybeUninit<f32>], bytes: &[u8], image: &PlainImage) {
    let PlainImage {
        zero, scale, blank, ..
    } = *image;
    let identity = zero == 0.0 && scale == 1.0;
    let physical = move |raw: f64| (zero + scale * raw) as f32;
    let integer = |raw: i64| {
        if blank == Some(raw) {
            f32::NAN
        } else {
            physical(raw as f64)
        }
    };
    match image.bitpix {
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
        // layout admits no other BITPIX.
        _ => fill(dst, bytes, |b| physical(f64::from_be_bytes(b))),
    }
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

/// Whether a plain (not gzip-wrapped) FITS file holds all the bytes its headers promise,
/// final padding included (see `layout::is_complete`). `Ok(None)` when the file is not
/// plain FITS or cannot be read for a reason of its own (then only the settle time
/// decides, and the reader says what is wrong). `Err` when its writer still holds it
/// (`os::is_still_being_written`): not finished, whatever its size says. Reads only
/// headers.
pub fn looks_complete(path: &Path) -> std::io::Result<Option<bool>> {
    let held = |e: std::io::Error| {
        if crate::os::is_still_being_written(&e) {
            Err(e)
        } else {
            Ok(None)
        }
    };
    let file = match std::fs::File::open(path) {
        Ok(f) => f,
        Err(e) => return held(e),
    };
    let Ok(len) = file.metadata().map(|m| m.len()) else {
        return Ok(None);
    };
    let mut magic = [0u8; 6];
    if let Err(e) = crate::os::read_exact_at(&file, &mut magic, 0) {
        return held(e);
    }
    if &magic != b"SIMPLE" {
        // Not plain FITS (gzip, or not FITS at all): only the settle time can decide.
        return Ok(None);
    }
    Ok(layout::is_complete(&mut FileBlocks { file, len }, len))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn image(width: u64, height: u64) -> PlainImage {
        PlainImage {
            hdu: 0,
            data_start: 0,
            bitpix: 16,
            width,
            height,
            zero: 32768.0,
            scale: 1.0,
            blank: None,
        }
    }

    #[test]
    fn a_plain_image_converts_every_pixel_it_holds() {
        // BITPIX 16 with BZERO 32768: stored -32768 and 32767 are 0 and 65535 (FITS
        // Standard 4.0, section 5.3).
        let bytes = [0x80, 0x00, 0x7f, 0xff, 0x00, 0x01];
        assert_eq!(
            convert_plain(&bytes, &image(3, 1)).unwrap(),
            [0.0, 65535.0, 32769.0]
        );
    }

    #[test]
    #[should_panic(expected = "5 bytes for 3 pixels of 2 bytes")]
    fn fewer_bytes_than_the_pixels_need_stop_before_any_is_exposed() {
        let _ = convert_plain(&[0u8; 5], &image(3, 1));
    }
}
