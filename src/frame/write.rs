//! Writing frames: used by the synthetic renderer's command and by tests, never on a
//! user's files. Writes a new file and refuses to overwrite an existing one.

use std::path::Path;

use fitsio::images::{ImageDescription, ImageType};
use fitsio::FitsFile;
use ndarray::Array2;

use super::cards::OutValue;
use super::FrameError;

/// How to store the pixels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Encoding {
    /// BITPIX 16 with BZERO 32768, as most cameras write: values rounded and clamped
    /// to 0..=65535.
    Unsigned16,
    Float32,
    /// As `Unsigned16`, tile-compressed into a binary-table extension after an empty
    /// primary HDU (FITS Standard 4.0, section 10), by cfitsio.
    Compressed(Compression),
}

/// The tile-compression algorithms cfitsio writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Compression {
    Rice,
    Gzip,
    Hcompress,
    Plio,
}

pub fn write_frame(
    path: &Path,
    pixels: &Array2<f32>,
    encoding: Encoding,
    keys: &[(String, OutValue)],
) -> Result<(), FrameError> {
    let fail = |reason: String| FrameError::Write {
        path: path.to_path_buf(),
        reason,
    };
    if path.exists() {
        return Err(fail("file exists; refusing to overwrite".into()));
    }
    // Every cfitsio call below, the file's closing included (`file` drops before
    // `held`), under the one lock.
    let held = super::cfitsio::hold();
    let dims = [pixels.nrows(), pixels.ncols()];
    let desc = ImageDescription {
        data_type: match encoding {
            Encoding::Float32 => ImageType::Float,
            _ => ImageType::UnsignedShort,
        },
        dimensions: &dims,
    };
    // cfitsio's own file-name syntax asks for compression; the images land in HDU 2.
    let (target, hdu_index) = match encoding {
        Encoding::Compressed(c) => {
            let code = match c {
                Compression::Rice => "R",
                Compression::Gzip => "G",
                Compression::Hcompress => "H",
                Compression::Plio => "P",
            };
            (format!("{}[compress {code}]", path.display()), 1)
        }
        _ => (path.display().to_string(), 0),
    };
    let mut file = FitsFile::create(target)
        .with_custom_primary(&desc)
        .open()
        .map_err(|e| fail(e.to_string()))?;
    let hdu = file.hdu(hdu_index).map_err(|e| fail(e.to_string()))?;
    // The writing library names the primary HDU "_PRIMARY"; a camera's file has no
    // EXTNAME there, so remove it.
    super::cfitsio::delete_key(&held, &mut file, "EXTNAME").map_err(fail)?;
    let flat: Vec<f32> = pixels.iter().copied().collect();
    match encoding {
        Encoding::Unsigned16 | Encoding::Compressed(_) => {
            let data: Vec<u16> = flat
                .iter()
                .map(|&v| {
                    if v.is_finite() {
                        v.round().clamp(0.0, 65535.0) as u16
                    } else {
                        0
                    }
                })
                .collect();
            hdu.write_image(&mut file, &data)
        }
        Encoding::Float32 => hdu.write_image(&mut file, &flat),
    }
    .map_err(|e| fail(e.to_string()))?;
    for (key, value) in keys {
        match value {
            OutValue::Text(s) => hdu.write_key(&mut file, key, s.as_str()),
            OutValue::Int(i) => hdu.write_key(&mut file, key, *i),
            OutValue::Real(r) => hdu.write_key(&mut file, key, *r),
        }
        .map_err(|e| fail(format!("keyword {key}: {e}")))?;
    }
    Ok(())
}
