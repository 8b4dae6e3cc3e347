//! One frame's way in: decode → measure. Every command that measures a file (and, later,
//! the daemon) goes through here, so they cannot differ.

use std::path::Path;

use crate::frame::{read_frame, DecodeLimits, Frame, FrameError};
use crate::measure::{
    measure_image, measure_mosaic, FrameMeasurement, MeasureError, MeasureParams,
};

/// Settings that come from the configuration rather than the file.
#[derive(Debug, Clone, Copy, Default, serde::Serialize, serde::Deserialize)]
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

/// What it takes to turn a file into a stored record.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct RecordOptions {
    pub measure: MeasureOptions,
    #[serde(with = "tz_name")]
    pub timezone: chrono_tz::Tz,
    /// Folder names that mark calibration frames (lower case).
    pub calibration_folders: Vec<String>,
    /// Measure darks, flats and bias frames as well, instead of setting them aside (the
    /// `measure` command measures whatever it is given).
    pub measure_calibration: bool,
    /// Fit each light frame to the sky from the catalogue's index (`sky_fit`).
    pub sky: Option<crate::sky_fit::SkyOptions>,
}

impl Default for RecordOptions {
    fn default() -> Self {
        RecordOptions {
            measure: MeasureOptions::default(),
            timezone: chrono_tz::UTC,
            calibration_folders: Vec::new(),
            measure_calibration: false,
            sky: None,
        }
    }
}

impl RecordOptions {
    /// The options a configuration gives every frame.
    pub fn from_config(config: &crate::config::Config) -> Self {
        let mut measure = MeasureOptions {
            focal_length_mm: config.optics.focal_length_mm,
            pixel_size_um: config.optics.pixel_size_um,
            ..Default::default()
        };
        measure.limits.max_pixels = config.measure.max_pixels;
        measure.params.detect.sigma = config.measure.detect_sigma;
        measure.params.gain_e_per_adu = config.optics.gain_e_per_adu;
        measure.params.saturation_adu = config.optics.saturation_adu;
        RecordOptions {
            measure,
            timezone: config.timezone(),
            calibration_folders: config
                .watch
                .calibration_folders
                .iter()
                .map(|s| s.to_lowercase())
                .collect(),
            measure_calibration: false,
            sky: crate::catalogue_import::index_path(&config.catalogue).map(|index| {
                crate::sky_fit::SkyOptions {
                    index,
                    search_deg: config.catalogue.search_deg,
                    filter_bands: config.catalogue.filter_bands.clone(),
                }
            }),
        }
    }
}

/// A time zone travels by its IANA name.
mod tz_name {
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(tz: &chrono_tz::Tz, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(tz.name())
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<chrono_tz::Tz, D::Error> {
        let name = String::deserialize(d)?;
        name.parse().map_err(serde::de::Error::custom)
    }
}

/// Why a file is not measured as a light frame, if it is not.
fn calibration_kind(
    path: &Path,
    header: &crate::frame::FrameHeader,
    folders: &[String],
) -> Option<String> {
    use crate::frame::ImageKind;
    match header.image_kind {
        Some(ImageKind::Dark) => return Some("dark frame (IMAGETYP)".into()),
        Some(ImageKind::Flat) => return Some("flat frame (IMAGETYP)".into()),
        Some(ImageKind::Bias) => return Some("bias frame (IMAGETYP)".into()),
        Some(ImageKind::Light) => return None,
        _ => {}
    }
    path.parent()?.components().find_map(|c| {
        let name = c.as_os_str().to_string_lossy().to_lowercase();
        folders
            .contains(&name)
            .then(|| format!("calibration folder {name:?}"))
    })
}

/// A file its writer still holds open without sharing (Windows): not read, and not a
/// problem of the file; the daemon reads it once it is let go.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, thiserror::Error, serde::Serialize, serde::Deserialize,
)]
#[error("still being written: another program holds it open without sharing")]
pub struct StillBeingWritten;

/// Decode, classify and measure one file into the record the store keeps. Never fails:
/// a problem, a file still being written included, becomes a record with status "error"
/// naming it.
pub fn record_file(
    path: &Path,
    identity: crate::record::Identity,
    mtime_unix: f64,
    opts: &RecordOptions,
) -> crate::record::FrameRecord {
    try_record_file(path, identity.clone(), mtime_unix, opts).unwrap_or_else(|e| {
        let mut rec = crate::record::FrameRecord::failed(identity, &e.to_string());
        rec.night = crate::sky::night_label(mtime_unix, opts.timezone);
        rec
    })
}

/// As [`record_file`], except that a file its writer still holds is said as such
/// (`Err`) rather than recorded as unreadable: it is not finished yet.
pub fn try_record_file(
    path: &Path,
    identity: crate::record::Identity,
    mtime_unix: f64,
    opts: &RecordOptions,
) -> Result<crate::record::FrameRecord, StillBeingWritten> {
    use crate::record::{FrameRecord, FrameStatus, HeaderFacts, Metrics, StarRecord};
    let held = |e: &FrameError| {
        if e.is_still_being_written() {
            Err(StillBeingWritten)
        } else {
            Ok(())
        }
    };
    let mut rec = FrameRecord {
        error: None,
        night: crate::sky::night_label(mtime_unix, opts.timezone),
        target: folder_name(path),
        ..FrameRecord::failed(identity, "")
    };
    let cards = match crate::frame::fits::read_header(path, opts.measure.limits) {
        Ok(c) => c,
        Err(e) => {
            held(&e)?;
            rec.error = Some(e.reason());
            return Ok(rec);
        }
    };
    let header = crate::frame::FrameHeader::from_cards(&cards);
    if let Some(t) = header.time_unix {
        rec.time_unix = Some(t);
        rec.night = crate::sky::night_label(t, opts.timezone);
    }
    rec.target = header.object.clone().or(rec.target);
    rec.filter = header.filter.clone();
    rec.header = Some(HeaderFacts::new(&header));
    rec.wcs = header.wcs.clone();
    if let Some(kind) = calibration_kind(path, &header, &opts.calibration_folders)
        .filter(|_| !opts.measure_calibration)
    {
        rec.status = FrameStatus::Skipped;
        // Not a light: measured as what it is, for the calibration checks.
        match read_frame(path, opts.measure.limits) {
            Ok(frame) => {
                let full_scale = header.saturation_adu.or_else(|| {
                    crate::measure::calibration::data_type_full_scale(
                        frame.bitpix,
                        crate::frame::cards::Cards::number(frame.cards.as_slice(), "BZERO"),
                    )
                });
                let mut stats =
                    crate::measure::calibration::calibration_stats(&frame.pixels, full_scale);
                let lower = kind.to_ascii_lowercase();
                stats.kind = ["dark", "flat", "bias"]
                    .into_iter()
                    .find(|k| lower.contains(k))
                    .unwrap_or("unknown")
                    .to_string();
                rec.calibration = Some(stats);
                rec.error = Some(kind);
            }
            Err(e) => {
                held(&e)?;
                rec.error = Some(format!("{kind}: {}", e.reason()));
            }
        }
        return Ok(rec);
    }
    match measure_file(path, &opts.measure) {
        Ok(m) => {
            rec.status = FrameStatus::Ok;
            rec.metrics = Some(Metrics::new(&m.measurement, m.plate_scale));
            rec.stars = m
                .measurement
                .stars
                .iter()
                .map(|s| StarRecord::new(s, &m.frame_header))
                .collect();
            rec.rejected = m.measurement.rejected;
            if let Some(sky) = &opts.sky {
                let gain = opts.measure.params.gain_e_per_adu.or(header.gain_e_per_adu);
                // Without its index the frame is still recorded, only not placed on the sky.
                let placed = crate::store::catalogue_index::CatalogueIndex::open(&sky.index)
                    .and_then(|index| {
                        crate::sky_fit::fit_record(&mut rec, &header, &index, sky, gain)
                    });
                if let Err(e) = placed {
                    tracing::warn!("{}: not fitted to the sky: {e}", path.display());
                    if let Some(m) = rec.metrics.as_mut() {
                        m.sky_fit_note =
                            Some(format!("the catalogue's index could not be read: {e}"));
                    }
                }
            }
        }
        Err(e) => {
            if let PipelineError::Frame(f) = &e {
                held(f)?;
            }
            rec.error = Some(e.reason());
        }
    }
    Ok(rec)
}

fn folder_name(path: &Path) -> Option<String> {
    path.parent()?
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
}
