//! VOEvent documents written into `[voevent] folder`: one per anomaly of the chosen
//! kinds that has a sky position, with its cutout (PNG) beside it under the same name,
//! named by the night, the kind and the first detection,
//! so the same anomaly found again (a later analysis of the same night) is written once.
//! Each is written beside its final name and renamed into place, never over a file.

use std::path::PathBuf;

use crate::config::Config;
use crate::contract::NightDocument;
use crate::voevent::{voevent_xml, EventContext};

#[derive(Debug, thiserror::Error)]
#[error("writing VOEvent {path}: {source}")]
pub struct EventError {
    pub path: PathBuf,
    #[source]
    pub source: std::io::Error,
}

fn iso_utc(t: f64) -> Option<String> {
    chrono::DateTime::from_timestamp_millis((t * 1000.0).round() as i64)
        .map(|d| d.format("%Y-%m-%dT%H:%M:%S%.3f").to_string())
}

/// Write the documents of `doc`'s anomalies that are not written yet; returns the files
/// written. Nothing happens without `[voevent] folder` and `authority`.
pub fn write_voevents(
    doc: &NightDocument,
    c: &Config,
    night: &str,
    now_unix: f64,
) -> Result<Vec<PathBuf>, EventError> {
    let (Some(folder), Some(authority)) = (&c.voevent.folder, &c.voevent.authority) else {
        return Ok(Vec::new());
    };
    let mut written = Vec::new();
    let now = iso_utc(now_unix).unwrap_or_default();
    // Cutouts are read from the frames by a worker, as every frame is.
    let reader = crate::reader::Reader::from_config(&c.measure);
    let limits = crate::frame::DecodeLimits {
        max_pixels: c.measure.max_pixels,
    };
    for a in &doc.anomalies {
        if !c.voevent.kinds.contains(&a.kind) || a.detail.is_cosmic_ray() {
            continue;
        }
        let Some(first) = a.detections.first() else {
            continue;
        };
        let local_id = format!(
            "{}_{:016x}",
            a.kind.name(),
            crate::text::stable_hash(&format!("{}@{:.0},{:.0}", first.path, first.x, first.y))
        );
        let path = folder.join(format!("{night}_{local_id}.xml"));
        if path.exists() {
            continue;
        }
        let frame = doc.frames.iter().find(|f| f.path == first.path);
        // A position from a header WCS is good to about a pixel (common practice); 2″
        // when the plate scale is unknown.
        let scale = frame
            .and_then(|f| f.metrics.as_ref())
            .and_then(|m| m.plate_scale_arcsec)
            .unwrap_or(2.0);
        let cutout_name = format!("{night}_{local_id}.png");
        let base = EventContext {
            authority,
            author: c.voevent.author.as_deref(),
            written_utc: &now,
            first_utc: frame.and_then(|f| f.time_unix).and_then(iso_utc),
            error_deg: scale / 3600.0,
            instrument: frame.and_then(|f| f.instrument.as_deref()),
            telescope: None,
            cutout: None,
            night,
            local_id: &local_id,
        };
        // No document (no sky position): no cutout either.
        if voevent_xml(a, &base).is_none() {
            continue;
        }
        // The cutout beside the document, made once, when its frame can still be read.
        let cutout_path = folder.join(&cutout_name);
        let cutout = if cutout_path.exists() {
            Some(cutout_name.as_str())
        } else {
            reader
                .cutout(
                    std::path::Path::new(&first.path),
                    first.x,
                    first.y,
                    16,
                    limits,
                )
                .and_then(|png| {
                    std::fs::create_dir_all(folder).ok()?;
                    let part = cutout_path.with_extension("png.part");
                    std::fs::write(&part, png).ok()?;
                    let placed = crate::os::rename_no_replace(&part, &cutout_path).ok();
                    let _ = std::fs::remove_file(&part);
                    placed.map(|_| cutout_name.as_str())
                })
        };
        let ctx = EventContext {
            cutout,
            ..base.clone()
        };
        let Some(xml) = voevent_xml(a, &ctx) else {
            continue;
        };
        let err = |source| EventError {
            path: path.clone(),
            source,
        };
        std::fs::create_dir_all(folder).map_err(err)?;
        let part = path.with_extension("xml.part");
        std::fs::write(&part, xml).map_err(err)?;
        let placed = crate::os::rename_no_replace(&part, &path);
        let _ = std::fs::remove_file(&part);
        if placed.map_err(err)? {
            written.push(path);
        }
    }
    Ok(written)
}
