//! One frame's way in: decode → measure. Every command that measures a file (and, later,
//! the daemon) goes through here, so they cannot differ.

use std::path::Path;

use crate::frame::{read_frame, DecodeLimits, Frame, FrameError};
use crate::measure::{
    measure_image, measure_mosaic, FrameMeasurement, MeasureError, MeasureParams,
};

/// Settings that come from the configuration rather than the file.
#[derive(Debug, Clone, Copy, Default)]
pub struct MeasureOptions {
    pub limits: DecodeLimits,
    pub params: MeasureParams,
    pub focal_length_mm: Option<f64>,
    pub pixel_size_um: Option<f64>,
}

#[derive(Debug, thiserror::Error)]
pub enum PipelineError {
    #[error(transparent)]
    Frame(#[from] FrameError),
    #[error("{path}: {source}")]
    Measure {
        path: String,
        #[source]
        source: MeasureError,
    },
}

impl PipelineError {
    /// The reason alone, without the path.
    pub fn reason(&self) -> String {
        match self {
            PipelineError::Frame(e) => e.reason(),
            PipelineError::Measure { source, .. } => source.to_string(),
        }
    }
}

pub struct MeasuredFrame {
    pub frame_header: crate::frame::FrameHeader,
    pub measurement: FrameMeasurement,
    pub plate_scale: Option<f64>,
}

/// Decode and measure one file.
pub fn measure_file(path: &Path, opts: &MeasureOptions) -> Result<MeasuredFrame, PipelineError> {
    let frame = read_frame(path, opts.limits)?;
    measure_frame(frame, opts).map_err(|source| PipelineError::Measure {
        path: path.display().to_string(),
        source,
    })
}

/// Measure a decoded frame with header-derived settings (gain, saturation, Bayer).
pub fn measure_frame(frame: Frame, opts: &MeasureOptions) -> Result<MeasuredFrame, MeasureError> {
    let Frame { pixels, header, .. } = frame;
    let mut params = opts.params;
    params.gain_e_per_adu = params.gain_e_per_adu.or(header.gain_e_per_adu);
    params.saturation_adu = params.saturation_adu.or(header.saturation_adu);
    let measurement = match header.bayer {
        Some(pattern) => measure_mosaic(pixels, pattern, &params)?,
        None => measure_image(pixels, &params)?,
    };
    let plate_scale = header
        .plate_scale(opts.focal_length_mm, opts.pixel_size_um)
        .or_else(|| header.wcs.as_ref().map(|w| w.scale_arcsec()));
    Ok(MeasuredFrame {
        frame_header: header,
        measurement,
        plate_scale,
    })
}
