//! The morning summary's shell: from the store to the files and the mail. Reads the
//! night from the store, draws the plots, cuts out each anomaly from its frame on disk,
//! writes the stand-alone HTML and CSV into the report folder, and queues the mail.

use std::path::{Path, PathBuf};

use crate::config::Config;
use crate::contract::{GroupLimits, NightDocument};
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
    /// The night document (the contract's JSON), as `report --json` prints it.
    pub json_path: PathBuf,
    /// (name, PNG) of every plot and cutout.
    pub images: Vec<(String, Vec<u8>)>,
}

/// Where the report files go: `[report] folder`, else beside the store.
pub fn report_folder(c: &Config) -> PathBuf {
    c.report_folder()
}

/// The summary's settings from the configuration: the site's clock, and whether warned
/// frames are stacked.
pub fn settings(c: &Config) -> report::Settings {
    report::Settings {
        tz: c.timezone(),
        stack_warned: c.actions.stack_warned,
    }
}

/// Build the night's summary and write its HTML (images inside as data URIs) and CSV.
pub fn prepare(store: &mut Store, c: &Config, night: &str) -> Result<Prepared, MorningError> {
    let judged = if c.mail.summary_of_site {
        judge_site(store, c, night)?
    } else {
        judge_night(store, c, night)?
    };
    let plans = plan_lines(store, c, night)?;
    write_files_with_plans(
        judged.doc,
        night,
        &report_folder(c),
        &c.measure,
        settings(c),
        plans,
    )
}

/// The morning's line for each planned target imaged on `night` (`[[targets]]`): how
/// far its plan is, at that night's usable rate.
pub fn plan_lines(store: &Store, c: &Config, night: &str) -> Result<Vec<String>, MorningError> {
    Ok(crate::targets::plan_lines(store, c, night, "last night's")?)
}

/// A recorded night judged again: the document, and the frames whose stored verdict
/// or reasons changed (a rule changed since they were judged).
pub struct Rejudged {
    pub doc: NightDocument,
    pub changed: Vec<crate::store::VerdictChange>,
}

/// A recorded night's frames through the night analysis with the configuration's rules,
/// then matched to the star catalogue.
fn analyse(
    records: &[crate::record::FrameRecord],
    c: &Config,
    catalogues: crate::batch::Catalogues,
) -> Result<NightDocument, MorningError> {
    let mut doc = crate::batch::analyse_records(
        records,
        &c.rule_specs(),
        c.site_position(),
        catalogues,
        &c.calibration.settings,
    )?;
    crate::batch::cross_match(&mut doc, &c.catalogue)?;
    Ok(doc)
}

/// Judge a recorded night with the configuration's rules, keep the verdicts in the store
/// with the limits each group was judged against and, when lists are kept, rewrite the
/// night's lists where a verdict changed.
pub fn judge_night(store: &mut Store, c: &Config, night: &str) -> Result<Rejudged, MorningError> {
    let records = store.night_records(night)?;
    let mut doc = analyse(&records, c, crate::batch::Catalogues::Keep(store))?;
    doc.set_rig(&c.rig.name);
    let verdicts: Vec<(String, crate::rules::Verdict, Vec<String>)> = doc
        .frames
        .iter()
        .map(|f| (f.path.clone(), f.verdict, f.reasons.clone()))
        .collect();
    let changed = store.update_verdicts(&verdicts)?;
    store.set_night_limits(night, &doc.limits)?;
    if let (false, Some(lists)) = (changed.is_empty(), crate::lists::Lists::from_config(c)) {
        for written in crate::lists::rewrite_night(store, &lists, night) {
            if let Err(e) = written {
                tracing::warn!("{e}");
            }
        }
    }
    Ok(Rejudged { doc, changed })
}

/// Judge every rig's frames of a recorded night (a site's summary): this daemon's rig as
/// [`judge_night`] does, its verdicts kept; every other rig's night analysed (anomalies)
/// without storing anything, its frames keeping the verdicts their own daemon gave them
/// by that rig's rules (a frame it has not judged yet gets this daemon's), and its groups
/// the limits that rig's daemon stored with them ([`own_limits`]). Each frame names its
/// rig.
pub fn judge_site(store: &mut Store, c: &Config, night: &str) -> Result<Rejudged, MorningError> {
    let mut site = NightDocument::default();
    let mut changed = Vec::new();
    for rig in store.night_rigs(night)? {
        let doc = if rig == c.rig.name {
            let own = judge_night(store, c, night)?;
            changed = own.changed;
            own.doc
        } else {
            store.as_rig(&rig, |s| -> Result<NightDocument, MorningError> {
                let records = s.night_records(night)?;
                let mut doc = analyse(&records, c, crate::batch::Catalogues::Read(s))?;
                let stored = s.stored_verdicts(night)?;
                for f in &mut doc.frames {
                    if let Some((verdict, reasons)) = stored.get(&f.path) {
                        if (f.verdict, &f.reasons) != (*verdict, reasons) {
                            f.explanations.clear();
                        }
                        f.verdict = *verdict;
                        f.reasons = reasons.clone();
                    }
                }
                doc.limits = own_limits(&doc.limits, s.night_limits(night)?, &rig);
                doc.set_rig(&rig);
                Ok(doc)
            })?
        };
        site.append(doc);
    }
    Ok(Rejudged { doc: site, changed })
}

/// Another rig's groups (`analysed`: this daemon's analysis of its night, whose limits
/// are not that rig's) with the limits that rig's daemon stored: a group it has judged
/// no frame of has none, and says why.
fn own_limits(analysed: &[GroupLimits], stored: Vec<GroupLimits>, rig: &str) -> Vec<GroupLimits> {
    analysed
        .iter()
        .map(|g| {
            match stored
                .iter()
                .find(|s| s.target == g.target && s.filter == g.filter)
            {
                Some(s) => GroupLimits {
                    limits: s.limits.clone(),
                    ..g.clone()
                },
                None => GroupLimits {
                    limits: Vec::new(),
                    missing: Some(format!(
                        "no limits drawn: rig '{rig}' has stored none for this group (its daemon has judged none of its frames)"
                    )),
                    ..g.clone()
                },
            }
        })
        .collect()
}

/// How many cutouts the mail carries (the most interesting anomalies first); the report
/// file has them all. With the plots this keeps the mail well under 1 MB.
pub const MAIL_CUTOUTS: usize = 8;

/// The summary, plots and cutouts of a night document, written as stand-alone HTML and
/// CSV into `folder` (used for the store's nights and for `subwatch night --report`).
pub fn write_files(
    doc: NightDocument,
    night: &str,
    folder: &Path,
    measure: &crate::config::MeasureConfig,
    settings: report::Settings,
) -> Result<Prepared, MorningError> {
    write_files_with_plans(doc, night, folder, measure, settings, Vec::new())
}

/// [`write_files`] with the lines of the planned targets imaged that night
/// ([`plan_lines`]) in the summary.
pub fn write_files_with_plans(
    doc: NightDocument,
    night: &str,
    folder: &Path,
    measure: &crate::config::MeasureConfig,
    settings: report::Settings,
    plans: Vec<String>,
) -> Result<Prepared, MorningError> {
    let reader = crate::reader::Reader::from_config(measure);
    let limits = crate::frame::DecodeLimits {
        max_pixels: measure.max_pixels,
    };
    let mut summary = report::summarise(night, &doc, settings);
    summary.plans = plans;
    let mut images: Vec<(String, Vec<u8>)> = plots::night_plots(&doc, &summary, settings.tz)
        .into_iter()
        .map(|p| (plots::plot_name(p.group, p.plotted.key), p.png))
        .collect();
    for (k, a) in summary.notable.iter().enumerate() {
        let Some(d) = a.detections.first() else {
            continue;
        };
        // A frame that has gone since is simply not cut out. The file is read by a
        // worker, as every frame is.
        if let Some(png) = reader.cutout(Path::new(&d.path), d.x, d.y, 16, limits) {
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
    std::fs::write(&csv_path, report::csv(&doc, settings.tz)).map_err(|source| {
        MorningError::Write {
            path: csv_path.clone(),
            source,
        }
    })?;
    let json_path = folder.join(format!("night-{night}.json"));
    let json = serde_json::to_vec(&doc).unwrap_or_default();
    std::fs::write(&json_path, json).map_err(|source| MorningError::Write {
        path: json_path.clone(),
        source,
    })?;
    Ok(Prepared {
        doc,
        summary,
        html_path,
        csv_path,
        json_path,
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
    // Plots, and the first cutouts only: the mail is read on phones over slow links.
    let in_mail = |name: &str| {
        (0..MAIL_CUTOUTS).any(|k| plots::cutout_name(k) == name) || !name.starts_with("cutout-")
    };
    let inline: Vec<Inline> = p
        .images
        .iter()
        .filter(|(name, _)| in_mail(name))
        .map(|(name, png)| Inline {
            content_id: name.trim_end_matches(".png").to_string(),
            png: png.clone(),
        })
        .collect();
    let cid = |name: &str| {
        (in_mail(name) && p.images.iter().any(|(n, _)| n == name))
            .then(|| format!("cid:{}", name.trim_end_matches(".png")))
    };
    let html = report::html(&p.summary, &cid);
    // The night's VOEvent documents: written now if the daemon has not yet, and attached
    // when asked for.
    let mut files = vec![crate::mail::Attached {
        name: format!("night-{}.csv", p.summary.night),
        content_type: "text/csv; charset=utf-8".into(),
        bytes: report::csv(&p.doc, p.summary.tz).into_bytes(),
    }];
    if c.voevent.folder.is_some() {
        if let Err(e) = crate::events::write_voevents(&p.doc, c, &p.summary.night, now_unix) {
            tracing::warn!("{e}");
        }
    }
    if let (true, Some(folder)) = (c.voevent.attach, &c.voevent.folder) {
        let prefix = format!("{}_", p.summary.night);
        let mut names: Vec<std::path::PathBuf> = std::fs::read_dir(folder)
            .map(|d| {
                d.flatten()
                    .map(|e| e.path())
                    .filter(|p| {
                        p.extension().is_some_and(|x| x == "xml")
                            && p.file_name()
                                .is_some_and(|n| n.to_string_lossy().starts_with(&prefix))
                    })
                    .collect()
            })
            .unwrap_or_default();
        names.sort();
        for path in names {
            if let Ok(bytes) = std::fs::read(&path) {
                files.push(crate::mail::Attached {
                    name: report::file_name(&path.to_string_lossy()),
                    content_type: "application/xml".into(),
                    bytes,
                });
            }
        }
    }
    let composed = compose(
        &settings,
        &report::subject(&p.summary),
        &report::text(&p.summary, false),
        &html,
        &inline,
        &files,
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
