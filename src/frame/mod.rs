//! Input: a FITS file on disk becomes a [`Frame`]: pixels in physical units plus the
//! typed header. Decoding lives in `fits`, keyword parsing in `header`, sky coordinates
//! in `wcs`, color mosaics in `bayer`. Nothing here measures anything.

pub mod bayer;
pub mod cards;
mod cfitsio;
pub mod fits;
pub mod header;
pub mod layout;
pub mod wcs;
pub mod write;

use std::path::{Path, PathBuf};

use ndarray::Array2;

pub use cards::HeaderCard;
pub use fits::DecodeLimits;
pub use header::{FrameHeader, ImageKind};

#[derive(Debug, thiserror::Error)]
pub enum FrameError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path}: {reason}")]
    Decode { path: PathBuf, reason: String },
    #[error("{path}: cannot write FITS: {reason}")]
    Write { path: PathBuf, reason: String },
}

impl FrameError {
    /// The reason alone, without the path (the JSON record carries the path already).
    pub fn reason(&self) -> String {
        match self {
            FrameError::Io { source, .. } => source.to_string(),
            FrameError::Decode { reason, .. } | FrameError::Write { reason, .. } => reason.clone(),
        }
    }

    /// Whether the file could not be opened or read because its writer still holds it
    /// (`os::is_still_being_written`): it is not finished, rather than unreadable.
    pub fn is_still_being_written(&self) -> bool {
        matches!(self, FrameError::Io { source, .. } if crate::os::is_still_being_written(source))
    }
}

/// A decoded frame.
pub struct Frame {
    /// Physical pixel values, shape (rows = NAXIS2, columns = NAXIS1); NaN where undefined.
    pub pixels: Array2<f32>,
    pub header: FrameHeader,
    pub cards: Vec<HeaderCard>,
    pub bitpix: i32,
}

impl Frame {
    pub fn width(&self) -> usize {
        self.pixels.ncols()
    }
    pub fn height(&self) -> usize {
        self.pixels.nrows()
    }
}

/// Read a frame from disk. Any problem comes back as an error naming the file.
pub fn read_frame(path: &Path, limits: DecodeLimits) -> Result<Frame, FrameError> {
    let decoded = fits::decode(path, limits)?;
    let header = FrameHeader::from_cards(&decoded.cards);
    Ok(Frame {
        pixels: decoded.pixels,
        header,
        cards: decoded.cards,
        bitpix: decoded.bitpix,
    })
}
