//! The morning summary's shell: from the store to the files and the mail. Reads the
//! night from the store, draws the plots, cuts out each anomaly from its frame on disk,
//! writes the stand-alone HTML and CSV into the report folder, and queues the mail.

use std::path::{Path, PathBuf};

use crate::config::Config;
use crate::contract::{NightDocument, NightFrameRecord};
use crate::mail::{compose, Inline, MailSettings};
use crate::report::{self, plots};
use crate::store::{Store, StoreError};

#[derive(Debug, thiserror::Error)]
pub enum MorningError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Mail(#[from] crate::mail::MailError),
    #[error("writing {path}: {source}")]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

pub struct Prepared {
    pub doc: NightDocument,
    pub summary: report::Summary,
    pub html_path: PathBuf,
    pub csv_path: PathBuf,
    /// (name, PNG) of every plot and cutout.
    pub images: Vec<(String, Vec<u8>)>,
}

/// Where the report files go: `[report] folder`, else beside the store.
pub fn report_folder(c: &Config) -> PathBuf {
    c.report.folder.clone().unwrap_or_else(|| {
        c.store
            .path
            .parent()
            .unwrap_or(Path::new("."))
            .join("reports")
    })
}

/// Build the night's summary and write its HTML (images inside as data URIs) and CSV.
pub fn prepare(store: &mut Store, c: &Config, night: &str) -> Result<Prepared, MorningError> {
    let doc = judge_night(store, c, night)?;
    write_files(doc, night, &report_folder(c), &c.measure)
}

/// Judge a recorded night with the configuration's rules, keep the verdicts in the store
/// and, when lists are kept, rewrite the night's lists where a verdict changed.
pub fn judge_night(
    store: &mut Store,
    c: &Config,
    night: &str,
) -> Result<NightDocument, MorningError> {
    let records = store.night_records(night)?;
    let doc =
        crate::batch::analyse_records(&records, &c.rule_specs(), c.site_position(), Some(store))?;
    let verdicts: Vec<(String, crate::rules::Verdict, Vec<String>)> = doc
        .frames
        .iter()
        .map(|f| (f.path.clone(), f.verdict, f.reasons.clone()))
        .collect();
    let changed = store.update_verdicts(&verdicts)?;
    if let (true, Some(folder)) = (changed > 0, lists_folder(c)) {
        for written in crate::lists::rewrite_night(store, &folder, night) {
            if let Err(e) = written {
                tracing::warn!("{e}");
            }
        }
    }
    Ok(doc)
}

/// Where the lists of frames to stack go, when they are kept: `[actions] lists_folder`,
/// else `accepted` beside the store.
pub fn lists_folder(c: &Config) -> Option<PathBuf> {
    c.actions.accepted_lists.then(|| {
        c.actions.lists_folder.clone().unwrap_or_else(|| {
            c.store
                .path
                .parent()
                .unwrap_or(Path::new("."))
                .join("accepted")
        })
    })
}

/// The summary, plots and cutouts of a night document, written as stand-alone HTML and
/// CSV into `folder` (used for the store's nights and for `subwatch night --report`).
pub fn write_files(
    doc: NightDocument,
    night: &str,
    folder: &Path,
    measure: &crate::config::MeasureConfig,
) -> Result<Prepared, MorningError> {
    let reader = crate::reader::Reader::from_config(measure);
    let limits = crate::frame::DecodeLimits {
        max_pixels: measure.max_pixels,
    };
    let summary = report::summarise(night, &doc, &|f: &NightFrameRecord| f.exposure_s);
    let mut images = Vec::new();
    for (k, g) in summary.groups.iter().enumerate() {
        let frames: Vec<&NightFrameRecord> = doc
            .frames
            .iter()
            .filter(|f| {
                f.target.as_deref().unwrap_or("(unknown)") == g.target
                    && f.filter.as_deref().unwrap_or("-") == g.filter
            })
            .collect();
        for (key, label) in plots::PLOTTED {
            if let Some(png) = plots::metric_plot(&frames, key, label) {
                images.push((plots::plot_name(k, key), png));
            }
        }
    }
    for (k, a) in summary.anomalies.iter().enumerate() {
        if a.detail.is_cosmic_ray() {
            continue;
        }
        let Some(d) = a.detections.first() else {
            continue;
        };
        // A frame that has gone since is simply not cut out. The file is read by a
        // worker, as every frame is.
        if let Some(png) = reader.cutout(Path::new(&d.path), d.x, d.y, 24, limits) {
            images.push((plots::cutout_name(k), png));
        }
    }
    let folder = folder.to_path_buf();
    std::fs::create_dir_all(&folder).map_err(|source| MorningError::Write {
        path: folder.clone(),
        source,
    })?;
    let data_uri = |name: &str| {
        images
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, png)| format!("data:image/png;base64,{}", crate::text::base64(png)))
    };
    let html = report::html(&summary, &data_uri);
    let html_path = folder.join(format!("night-{night}.html"));
    std::fs::write(&html_path, html).map_err(|source| MorningError::Write {
        path: html_path.clone(),
        source,
    })?;
    let csv_path = folder.join(format!("night-{night}.csv"));
    std::fs::write(&csv_path, report::csv(&doc)).map_err(|source| MorningError::Write {
        path: csv_path.clone(),
        source,
    })?;
    Ok(Prepared {
        doc,
        summary,
        html_path,
        csv_path,
        images,
    })
}

/// Queue the summary mail in the outbox; returns the outbox id.
pub fn queue_mail(
    store: &Store,
    c: &Config,
    p: &Prepared,
    now_unix: f64,
) -> Result<i64, MorningError> {
    let settings = MailSettings::from_config(c)?;
    let inline: Vec<Inline> = p
        .images
        .iter()
        .map(|(name, png)| Inline {
            content_id: name.trim_end_matches(".png").to_string(),
            png: png.clone(),
        })
        .collect();
    let cid = |name: &str| {
        p.images
            .iter()
            .any(|(n, _)| n == name)
            .then(|| format!("cid:{}", name.trim_end_matches(".png")))
    };
    let html = report::html(&p.summary, &cid);
    let composed = compose(
        &settings,
        &report::subject(&p.summary),
        &report::text(&p.summary),
        &html,
        &inline,
        &format!("night-{}.csv", p.summary.night),
        &report::csv(&p.doc),
    )?;
    Ok(crate::outbox::queue(store, composed, now_unix)?)
}

/// Deliver whatever is due in the outbox.
pub fn flush(
    store: &Store,
    c: &Config,
    now_unix: f64,
) -> Result<crate::outbox::FlushReport, MorningError> {
    flush_outbox(store, c, now_unix, crate::outbox::Due::AsScheduled)
}

/// Deliver the outbox's messages: those due by now, or all of them now.
pub fn flush_outbox(
    store: &Store,
    c: &Config,
    now_unix: f64,
    due: crate::outbox::Due,
) -> Result<crate::outbox::FlushReport, MorningError> {
    let settings = MailSettings::from_config(c)?;
    Ok(crate::outbox::flush(
        store,
        &settings,
        &report_folder(c),
        due.by(now_unix),
        now_unix,
    )?)
}
