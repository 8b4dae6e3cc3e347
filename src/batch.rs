//! `subwatch night DIR`: every light frame under a folder as one night, through the same
//! pipeline the daemon uses, then the night analysis and the verdicts, as one document.
//! An I/O shell around `pipeline`, `night` and `rules`.

use std::collections::BTreeMap;
use std::path::Path;

use crate::contract::{AnomalyRecord, DetectionRecord, NightDocument, NightFrameRecord};
use crate::measure::RejectKind;
use crate::night::{analyse, FrameInput, StarInput};
use crate::record::{FrameRecord, FrameStatus, Identity};
use crate::rules::{judge_group_with, FrameFacts, RuleSpec};
use crate::store::{Store, StoreError};

fn frame_input(r: &FrameRecord) -> FrameInput {
    let m = r.metrics.as_ref();
    FrameInput {
        path: r.identity.path.clone(),
        time_unix: r.time_unix,
        width: m.map_or(0, |m| m.width),
        height: m.map_or(0, |m| m.height),
        fwhm_px: m.and_then(|m| m.fwhm_px),
        noise_adu: m.map_or(0.0, |m| m.noise_adu),
        stars: r
            .stars
            .iter()
            .map(|s| StarInput {
                x: s.x,
                y: s.y,
                flux: s.flux,
                flux_err: s.flux_err,
                snr: s.snr,
                fwhm_px: s.fwhm_px,
                rgb: s.rgb.and_then(|c| Some([c[0]?, c[1]?, c[2]?])),
                blended: s.blended,
            })
            .collect(),
        sharp: r
            .rejected
            .iter()
            .filter(|x| x.kind == RejectKind::Sharp)
            .map(|x| (x.x, x.y, x.peak_adu))
            .collect(),
        trails: m.map(|m| m.trails.clone()).unwrap_or_default(),
        extended: r
            .rejected
            .iter()
            .filter(|x| x.kind == RejectKind::Extended)
            .map(|x| (x.x, x.y))
            .collect(),
        wcs: r.wcs.clone(),
    }
}

/// Analyse already-recorded frames as one night; `store` (optional) supplies earlier
/// nights' catalogues and keeps tonight's.
/// Sky context of a recorded frame: at mid-exposure when the exposure time is known,
/// the target at the WCS centre when there is one.
pub fn sky_of(r: &FrameRecord, site: Option<(f64, f64, f64)>) -> Option<crate::sky::FrameSky> {
    let (lat, lon, _) = site?;
    let start = r.time_unix?;
    let half = r.header.as_ref().and_then(|h| h.exposure_s).unwrap_or(0.0) / 2.0;
    let target =
        r.wcs.as_ref().zip(r.metrics.as_ref()).map(|(w, m)| {
            w.pixel_to_sky((m.width as f64 + 1.0) / 2.0, (m.height as f64 + 1.0) / 2.0)
        });
    Some(crate::sky::frame_sky(start + half, lat, lon, target))
}

pub fn analyse_records(
    records: &[FrameRecord],
    rules: &[RuleSpec],
    site: Option<(f64, f64, f64)>,
    mut store: Option<&mut Store>,
) -> Result<NightDocument, StoreError> {
    let mut doc = NightDocument {
        frames: Vec::new(),
        anomalies: Vec::new(),
    };
    // Group by target and filter; unreadable frames form their own group.
    let mut groups: BTreeMap<(String, String), Vec<usize>> = BTreeMap::new();
    for (i, r) in records.iter().enumerate() {
        if r.status == FrameStatus::Skipped {
            continue;
        }
        let key = (
            r.target.clone().unwrap_or_default(),
            r.filter.clone().unwrap_or_default(),
        );
        groups.entry(key).or_default().push(i);
    }
    for ((target, filter), idx) in groups {
        let measured: Vec<usize> = idx
            .iter()
            .copied()
            .filter(|&i| records[i].status == FrameStatus::Ok)
            .collect();
        let inputs: Vec<FrameInput> = measured.iter().map(|&i| frame_input(&records[i])).collect();
        let night_label = majority(measured.iter().filter_map(|&i| records[i].night.clone()));
        let earlier = match (&mut store, &night_label) {
            (Some(s), Some(n)) if !target.is_empty() => s.earlier_catalogs(&target, n)?,
            _ => Vec::new(),
        };
        let result = analyse(&inputs, &earlier);
        if let (Some(s), Some(n), Some(limit)) = (&mut store, &night_label, result.limit_mag) {
            if !target.is_empty() && !result.catalog.is_empty() {
                s.save_catalog(&target, n, limit, &result.footprint, &result.catalog)?;
            }
        }
        // Verdicts over the whole group (unreadable frames included).
        let facts: Vec<FrameFacts> = idx
            .iter()
            .map(|&i| {
                let r = &records[i];
                let pos = measured.iter().position(|&m| m == i);
                let fr = pos.map(|p| &result.frames[p]);
                let metrics = r.metrics.as_ref().filter(|_| r.status == FrameStatus::Ok);
                let mut facts = FrameFacts::from_metrics(
                    metrics,
                    fr.and_then(|f| f.transparency_loss_mag),
                    fr.map(|f| f.registered),
                );
                facts.sun_alt_deg = sky_of(r, site).map(|s| s.sun_alt_deg);
                facts
            })
            .collect();
        let judged = judge_group_with(&facts, rules);
        for (k, &i) in idx.iter().enumerate() {
            let r = &records[i];
            let fr = measured
                .iter()
                .position(|&m| m == i)
                .map(|p| result.frames[p].clone())
                .unwrap_or_default();
            doc.frames.push(NightFrameRecord {
                path: r.identity.path.clone(),
                status: if r.status == FrameStatus::Ok {
                    "ok"
                } else {
                    "error"
                },
                error: r.error.clone(),
                metrics: r.metrics.clone(),
                verdict: judged[k].verdict,
                reasons: judged[k].reasons.clone(),
                explanations: judged[k].explanations.clone(),
                night: r.night.clone(),
                target: r.target.clone(),
                filter: r.filter.clone(),
                time_unix: r.time_unix,
                exposure_s: r.header.as_ref().and_then(|h| h.exposure_s),
                registered: fr.registered,
                registration_rms_px: fr.registration_rms_px,
                registration_transform: fr.transform,
                sky: sky_of(r, site),
                transparency_loss_mag: fr.transparency_loss_mag,
            });
        }
        for a in result.anomalies {
            doc.anomalies.push(AnomalyRecord {
                kind: a.kind,
                ra_deg: a.ra_deg,
                dec_deg: a.dec_deg,
                detections: a
                    .detections
                    .iter()
                    .map(|d| DetectionRecord {
                        path: inputs[d.frame].path.clone(),
                        x: d.x,
                        y: d.y,
                    })
                    .collect(),
                detail: a.detail,
                target: Some(target.clone()).filter(|t| !t.is_empty()),
                filter: Some(filter.clone()).filter(|t| !t.is_empty()),
            });
        }
    }
    doc.frames.sort_by(|a, b| {
        a.time_unix
            .unwrap_or(0.0)
            .total_cmp(&b.time_unix.unwrap_or(0.0))
            .then(a.path.cmp(&b.path))
    });
    Ok(doc)
}

fn majority(labels: impl Iterator<Item = String>) -> Option<String> {
    let mut counts: BTreeMap<String, usize> = BTreeMap::new();
    for l in labels {
        *counts.entry(l).or_default() += 1;
    }
    counts.into_iter().max_by_key(|(_, c)| *c).map(|(l, _)| l)
}

/// Measure every frame under `dir` (calibration frames left out) and analyse the night.
/// `progress` is called after each file with (done, total).
pub fn run_night(
    dir: &Path,
    config: &crate::config::Config,
    store: Option<&mut Store>,
    mut progress: impl FnMut(usize, usize),
) -> Result<NightDocument, StoreError> {
    let options = crate::pipeline::RecordOptions::from_config(config);
    let reader = crate::reader::Reader::from_config(&config.measure);
    let files = crate::walk::FrameFilter::from_config(config).walk(&[dir.to_path_buf()]);
    let total = files.len();
    let mut records = Vec::with_capacity(total);
    for (k, path) in files.iter().enumerate() {
        // A file that went between the walk and now is left out.
        let Ok(identity) = Identity::of(path) else {
            continue;
        };
        let mtime_unix = identity.mtime_unix();
        records.push(reader.record(path, identity, mtime_unix, &options));
        progress(k + 1, total);
    }
    analyse_records(
        &records,
        &config.rule_specs(),
        config.site_position(),
        store,
    )
}
