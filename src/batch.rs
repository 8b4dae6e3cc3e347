//! `subwatch night DIR`: every light frame under a folder as one night, read as the
//! daemon reads them (`reader`), judged by the one night model (`night::judge`), as one
//! document. Also the document of recorded frames, for `report` and the summary.

use std::collections::BTreeMap;
use std::path::Path;

use crate::contract::{
    AnomalyRecord, CatalogueMatch, DetectionRecord, GroupLimits, NightDocument, NightFrameRecord,
};
use crate::night::judge::{judge_night, FrameJudgement, NightJudgement, Site};
use crate::reader::NotRecorded;
use crate::record::{FrameRecord, FrameStatus};
use crate::rules::RuleSpec;
use crate::store::{Store, StoreError};

/// Where the analysis finds earlier nights' catalogues (for new sources), and whether it
/// keeps tonight's.
pub enum Catalogues<'a> {
    /// Neither: no new sources.
    None,
    /// Earlier nights' from the store, tonight's not kept (the status page).
    Read(&'a Store),
    /// Earlier nights' from the store, and tonight's kept there.
    Keep(&'a mut Store),
}

impl Catalogues<'_> {
    /// The store earlier nights are read from, if any.
    fn store(&self) -> Option<&Store> {
        match self {
            Catalogues::None => None,
            Catalogues::Read(s) => Some(s),
            Catalogues::Keep(s) => Some(s),
        }
    }
}

/// Judge already-recorded frames as one night through the night model, group by group
/// (target and filter; unreadable frames stay in their group).
/// `calibration`: how many nights back earlier calibration frames (the library in the
/// store) count, and the flats' level band.
pub fn analyse_records(
    records: &[FrameRecord],
    rules: &[RuleSpec],
    site: Option<Site>,
    store: Catalogues<'_>,
    calibration: &crate::night::calibration::CalibrationSettings,
) -> Result<NightDocument, StoreError> {
    let mut groups: BTreeMap<(String, String), Vec<&FrameRecord>> = BTreeMap::new();
    for r in records.iter().filter(|r| r.status != FrameStatus::Skipped) {
        let key = (
            r.target.clone().unwrap_or_default(),
            r.filter.clone().unwrap_or_default(),
        );
        groups.entry(key).or_default().push(r);
    }
    let mut analysis = Analysis {
        doc: NightDocument::default(),
        bands: BTreeMap::new(),
        store,
        rules,
        site,
    };
    for ((target, filter), frames) in groups {
        analysis.group(&target, &filter, &frames)?;
    }
    analysis.colors_between_bands()?;
    analysis.calibration(records, calibration)?;
    let mut doc = analysis.doc;
    doc.frames.sort_by(|a, b| {
        a.time_unix
            .unwrap_or(0.0)
            .total_cmp(&b.time_unix.unwrap_or(0.0))
            .then(a.path.cmp(&b.path))
    });
    Ok(doc)
}

/// A night's document as it is built, group by group.
struct Analysis<'a, 's> {
    doc: NightDocument,
    /// Per target, tonight's label and each filter group's catalogue of the night with
    /// its reference frame, for the colors between filters.
    bands: BTreeMap<String, (Option<String>, Vec<BandEntry>)>,
    store: Catalogues<'s>,
    rules: &'a [RuleSpec],
    site: Option<Site>,
}

impl Analysis<'_, '_> {
    /// One target and filter judged by the night model: its frames, limits and anomalies
    /// into the document, its catalogue kept (with `Catalogues::Keep`) and noted for the
    /// colors between filters.
    fn group(
        &mut self,
        target: &str,
        filter: &str,
        frames: &[&FrameRecord],
    ) -> Result<(), StoreError> {
        let night_label = majority(
            frames
                .iter()
                .filter(|r| r.status == FrameStatus::Ok)
                .filter_map(|r| r.night.clone()),
        );
        let earlier = match (self.store.store(), &night_label) {
            (Some(s), Some(n)) if !target.is_empty() => s.earlier_catalogs(target, filter, n)?,
            _ => Vec::new(),
        };
        let judged = judge_night(frames, &earlier, self.rules, self.site);
        self.doc.limits.push(GroupLimits {
            rig: None,
            target: Some(target.to_string()).filter(|t| !t.is_empty()),
            filter: Some(filter.to_string()).filter(|t| !t.is_empty()),
            limits: judged.limits.clone(),
            missing: None,
        });
        let found = &judged.findings;
        self.note_band(target, filter, &night_label, frames, &judged);
        if let (Catalogues::Keep(s), Some(n), Some(limit)) =
            (&mut self.store, &night_label, found.limit_mag)
        {
            if !target.is_empty() && !found.catalog.is_empty() {
                s.save_catalog(target, filter, n, limit, &found.footprint, &found.catalog)?;
            }
        }
        let reference = judged.reference.map(|i| frames[i]);
        let carried: Vec<Option<crate::astrometry::SkyFit>> = frames
            .iter()
            .zip(&judged.frames)
            .map(|(r, j)| carried_fit(r, j.placement.as_ref(), reference))
            .collect();
        for ((r, j), carried) in frames.iter().zip(&judged.frames).zip(&carried) {
            self.doc.frames.push(light_record(r, j, carried));
        }
        for a in &found.anomalies {
            // A position through a fit carried from the reference, where the frame had none.
            let (ra_deg, dec_deg) = match (a.ra_deg, a.dec_deg, a.detections.first()) {
                (None, None, Some(d)) => carried[judged.readable[d.frame]]
                    .as_ref()
                    .map(|f| f.wcs.pixel_to_sky(d.x, d.y))
                    .map_or((None, None), |(ra, dec)| (Some(ra), Some(dec))),
                (ra, dec, _) => (ra, dec),
            };
            self.doc.anomalies.push(AnomalyRecord {
                kind: a.kind,
                ra_deg,
                dec_deg,
                detections: a
                    .detections
                    .iter()
                    .map(|d| DetectionRecord {
                        path: frames[judged.readable[d.frame]].identity.path.clone(),
                        x: d.x,
                        y: d.y,
                    })
                    .collect(),
                detail: a.detail.clone(),
                target: Some(target.to_string()).filter(|t| !t.is_empty()),
                filter: Some(filter.to_string()).filter(|t| !t.is_empty()),
                catalogue: None,
                catalogue_depth_mag: None,
                mag: None,
                mag_err: None,
                mag_band: None,
            });
        }
        Ok(())
    }

    /// The group's catalogue of the night, seen in its reference frame, for the colors
    /// between the target's filters.
    fn note_band(
        &mut self,
        target: &str,
        filter: &str,
        night_label: &Option<String>,
        frames: &[&FrameRecord],
        judged: &NightJudgement,
    ) {
        let found = &judged.findings;
        let reference = judged.reference.map(|r| frames[r]);
        if let (Some(r), false, false) = (reference, target.is_empty(), filter.is_empty()) {
            if let (Some(wcs), false) = (r.wcs.clone(), found.catalog.is_empty()) {
                let entries = self.bands.entry(target.to_string()).or_default();
                entries.0 = entries.0.take().or(night_label.clone());
                entries.1.push(BandEntry {
                    filter: filter.to_string(),
                    sources: found.catalog.clone(),
                    limit_mag: found.limit_mag,
                    seen: Some((r.identity.path.clone(), wcs.clone())),
                    scale_arcsec: wcs.scale_arcsec(),
                });
            }
        }
    }

    /// Sources far from the field's color between a target's filters, tonight's and,
    /// for filters not imaged tonight, the newest earlier night's the store holds.
    fn colors_between_bands(&mut self) -> Result<(), StoreError> {
        for (target, (tonight, entries)) in &mut self.bands {
            let earlier = match (self.store.store(), tonight.as_deref()) {
                (Some(s), Some(n)) => s.catalogs_before(target, n)?,
                _ => Vec::new(),
            };
            let scale = entries.first().map_or(1.0, |e| e.scale_arcsec);
            for (filter, night) in earlier {
                if filter.is_empty() || entries.iter().any(|e| e.filter == filter) {
                    continue;
                }
                entries.push(BandEntry {
                    filter: format!("{filter} ({})", night.night),
                    sources: night.sources,
                    limit_mag: Some(night.limit_mag),
                    seen: None,
                    scale_arcsec: scale,
                });
            }
            self.doc.anomalies.extend(band_colors(target, entries));
        }
        Ok(())
    }

    /// Darks, flats and bias frames, judged as calibration for these lights (with the
    /// store's earlier calibration frames as the library).
    fn calibration(
        &mut self,
        records: &[FrameRecord],
        calibration: &crate::night::calibration::CalibrationSettings,
    ) -> Result<(), StoreError> {
        let all: Vec<&FrameRecord> = records.iter().collect();
        let tonight = majority(records.iter().filter_map(|r| r.night.clone()));
        let earlier = match (self.store.store(), &tonight) {
            (Some(s), Some(n)) => s.earlier_calibration(n, calibration.library_days)?,
            _ => Vec::new(),
        };
        let earlier: Vec<&FrameRecord> = earlier.iter().collect();
        let judged = crate::night::calibration::judge_calibration(&all, &earlier, calibration);
        // In time order, then by path, as the lights: the same night gives the same
        // document whatever order its frames were recorded in.
        let mut frames: Vec<_> = judged.frames.iter().collect();
        frames.sort_by(|a, b| {
            let (a, b) = (all[a.index], all[b.index]);
            let time = |r: &FrameRecord| r.time_unix.unwrap_or(f64::NEG_INFINITY);
            time(a)
                .total_cmp(&time(b))
                .then_with(|| a.identity.path.cmp(&b.identity.path))
        });
        for c in frames {
            let r = all[c.index];
            self.doc.calibration.push(NightFrameRecord {
                kind: c.kind,
                status: if r.calibration.is_some() {
                    "ok"
                } else {
                    "error"
                },
                error: r.calibration.is_none().then(|| r.error.clone()).flatten(),
                verdict: c.judgement.verdict,
                reasons: c.judgement.reasons.clone(),
                explanations: c.judgement.explanations.clone(),
                ..frame_facts(r)
            });
        }
        self.doc.calibration_notes = judged.notes;
        Ok(())
    }
}

/// A light frame's entry in the document: its record, its judgement, and a fit carried
/// from the reference where it had none.
fn light_record(
    r: &FrameRecord,
    j: &FrameJudgement,
    carried: &Option<crate::astrometry::SkyFit>,
) -> NightFrameRecord {
    let p = j.placement.as_ref();
    let metrics = r.metrics.clone().map(|mut m| {
        if m.sky_fit.is_none() && carried.is_some() {
            m.sky_fit = carried.clone();
            m.sky_fit_note = None;
        }
        m
    });
    let mut explanations = j.judgement.explanations.clone();
    // After the verdict's own explanations (one per reason), why the frame has no place
    // on the sky, where a catalogue was there to give it one.
    if let Some(note) = metrics.as_ref().and_then(|m| m.sky_fit_note.as_ref()) {
        explanations.push(format!("not placed on the sky: {note}"));
    }
    NightFrameRecord {
        kind: "light",
        status: if r.status == FrameStatus::Ok {
            "ok"
        } else {
            "error"
        },
        error: r.error.clone(),
        metrics,
        verdict: j.judgement.verdict,
        reasons: j.judgement.reasons.clone(),
        explanations,
        registered: p.is_some_and(|p| p.registered),
        registration_rms_px: p.and_then(|p| p.rms_px),
        registration_transform: p.and_then(|p| p.transform),
        sky: j.sky,
        transparency_loss_mag: j.transparency_loss_mag,
        instrument: r.header.as_ref().and_then(|h| {
            let named: Vec<&str> = [h.telescope.as_deref(), h.instrument.as_deref()]
                .into_iter()
                .flatten()
                .collect();
            (!named.is_empty()).then(|| named.join(", "))
        }),
        ..frame_facts(r)
    }
}

/// What the document says of any frame from its record alone (path, night, group, time,
/// exposure); what its kind and judgement say is left empty, unmeasured and unplaced.
fn frame_facts(r: &FrameRecord) -> NightFrameRecord {
    NightFrameRecord {
        path: r.identity.path.clone(),
        rig: None,
        kind: "",
        status: "",
        error: None,
        metrics: None,
        verdict: crate::rules::Verdict::Ok,
        reasons: Vec::new(),
        explanations: Vec::new(),
        night: r.night.clone(),
        target: r.target.clone(),
        filter: r.filter.clone(),
        time_unix: r.time_unix,
        exposure_s: r.header.as_ref().and_then(|h| h.exposure_s),
        registered: false,
        registration_rms_px: None,
        registration_transform: None,
        sky: None,
        transparency_loss_mag: None,
        instrument: None,
    }
}

/// One filter group of a target, for the colors between filters: tonight's, with the
/// reference frame it was seen in, or an earlier night's from the store (its filter then
/// names the night).
struct BandEntry {
    filter: String,
    sources: Vec<crate::night::CatalogSource>,
    limit_mag: Option<f64>,
    seen: Option<(String, crate::frame::wcs::Wcs)>,
    scale_arcsec: f64,
}

/// Sources far from the field's color between two of a target's filters
/// (`night::bands`), as color anomalies seen in each filter's reference frame.
fn band_colors(target: &str, entries: &[BandEntry]) -> Vec<AnomalyRecord> {
    use crate::night::bands::{band_outliers, BandGroup};
    if entries.len() < 2 {
        return Vec::new();
    }
    let groups: Vec<BandGroup<'_>> = entries
        .iter()
        .map(|e| BandGroup {
            filter: &e.filter,
            sources: &e.sources,
            limit_mag: e.limit_mag,
        })
        .collect();
    let scale = entries
        .iter()
        .map(|e| e.scale_arcsec)
        .fold(0.0, f64::max)
        .max(1.0);
    band_outliers(&groups, 1.5 * scale / 3600.0)
        .into_iter()
        // Between two earlier nights is not tonight's news.
        .filter(|o| entries[o.groups.0].seen.is_some() || entries[o.groups.1].seen.is_some())
        .map(|o| {
            let (a, b) = (&entries[o.groups.0], &entries[o.groups.1]);
            let detections: Vec<DetectionRecord> = [a, b]
                .iter()
                .filter_map(|e| {
                    let (path, wcs) = e.seen.as_ref()?;
                    let (x, y) = wcs.sky_to_pixel(o.ra_deg, o.dec_deg)?;
                    Some(DetectionRecord {
                        path: path.clone(),
                        x,
                        y,
                    })
                })
                .collect();
            let ratio = |m: f64| 10f64.powf(-0.4 * m);
            AnomalyRecord {
                kind: crate::night::AnomalyKind::Color,
                ra_deg: Some(o.ra_deg),
                dec_deg: Some(o.dec_deg),
                detections,
                detail: crate::night::Detail::BandColor(crate::night::detail::BandColorDetail {
                    bands: [a.filter.clone(), b.filter.clone()],
                    color_mag: o.color_mag,
                    field_color_mag: o.field_color_mag,
                    flux_ratio: ratio(o.color_mag),
                    field_flux_ratio: ratio(o.field_color_mag),
                    z: o.z,
                    sigma_mag: o.sigma_mag,
                    tested: o.tested,
                    false_alarm_probability: o.false_alarm_probability,
                    instrumental_mag: a.sources[o.sources.0].mag,
                    index: "m(first) - m(second), instrumental, robust z-score against the field",
                }),
                target: Some(target.to_string()),
                filter: Some(format!("{}, {}", a.filter, b.filter)),
                catalogue: None,
                catalogue_depth_mag: None,
                mag: None,
                mag_err: None,
                mag_band: None,
            }
        })
        .collect()
}

/// A frame without a sky fit of its own that registered on its group's reference frame,
/// which has one: the reference's fit carried through the registration
/// (`astrometry::carry`).
fn carried_fit(
    r: &FrameRecord,
    placement: Option<&crate::night::register::Placement>,
    reference: Option<&FrameRecord>,
) -> Option<crate::astrometry::SkyFit> {
    let m = r.metrics.as_ref()?;
    if m.sky_fit.is_some() {
        return None;
    }
    let p = placement.filter(|p| p.registered)?;
    let affine = p.affine()?;
    let reference = reference?;
    let fit = reference.metrics.as_ref()?.sky_fit.as_ref()?;
    let wcs = crate::astrometry::carry(&fit.wcs, affine.a, affine.t, m.width, m.height)?;
    Some(crate::astrometry::SkyFit {
        source: crate::astrometry::FitSource::Carried,
        header_offset_px: None,
        wcs,
        ..fit.clone()
    })
}

/// Each anomaly with a sky position matched to the catalogue: the nearest star within
/// max(2″, 1.5 px), or the faintest magnitude the catalogue holds around it.
pub fn cross_match(
    doc: &mut NightDocument,
    catalogue: &crate::config::CatalogueConfig,
) -> Result<(), StoreError> {
    // The commands build the index before any frame is read (`catalogue_import::ensure`).
    let Some(path) = crate::catalogue_import::index_path(catalogue).filter(|p| p.exists()) else {
        return Ok(());
    };
    let index = crate::store::catalogue_index::CatalogueIndex::open(&path)?;
    let frames: BTreeMap<&str, &NightFrameRecord> =
        doc.frames.iter().map(|f| (f.path.as_str(), f)).collect();
    let mut found = Vec::with_capacity(doc.anomalies.len());
    let mut calibrated = Vec::with_capacity(doc.anomalies.len());
    for a in &doc.anomalies {
        calibrated.push(calibrated_mag(a, &frames));
        use crate::night::AnomalyKind::{HotPixel, Trail};
        // A streak or a detector defect lies on no star.
        let (Some(ra), Some(dec), false) =
            (a.ra_deg, a.dec_deg, matches!(a.kind, Trail | HotPixel))
        else {
            found.push((None, None));
            continue;
        };
        let first = a
            .detections
            .first()
            .and_then(|d| frames.get(d.path.as_str()));
        let scale = first
            .and_then(|f| f.metrics.as_ref())
            .and_then(|m| m.plate_scale_arcsec)
            .unwrap_or(1.0);
        let year = first
            .and_then(|f| f.time_unix)
            .map_or(2000.0, crate::sky_fit::julian_year);
        let band = first
            .and_then(|f| f.metrics.as_ref())
            .and_then(|m| m.zero_point_band.clone());
        let radius = (1.5 * scale).max(2.0);
        match crate::sky_fit::nearest(&index, ra, dec, radius, year)? {
            Some((star, d)) => found.push((
                Some(CatalogueMatch {
                    mag: star.mag(band.as_deref()).or_else(|| star.mag(None)),
                    band: band
                        .clone()
                        .or_else(|| star.mags.first().map(|m| m.0.clone())),
                    id: star.id,
                    separation_arcsec: d,
                }),
                None,
            )),
            None => {
                let around = index.cone(ra, dec, 10.0 / 60.0)?;
                let depth = around
                    .iter()
                    .filter_map(|s| s.mag(band.as_deref()).or_else(|| s.mag(None)))
                    .fold(None, |acc: Option<f64>, m| {
                        Some(acc.map_or(m, |a| a.max(m)))
                    });
                found.push((None, depth));
            }
        }
    }
    for ((a, (m, depth)), cal) in doc.anomalies.iter_mut().zip(found).zip(calibrated) {
        a.catalogue = m;
        a.catalogue_depth_mag = depth;
        if let Some((mag, err, band)) = cal {
            (a.mag, a.mag_err, a.mag_band) = (Some(mag), Some(err), band);
        }
    }
    Ok(())
}

/// An anomaly's instrumental magnitude through its first frame's zero point: m = ZP +
/// m_inst + 2.5 log10(t). The uncertainty adds the zero point's to the photon noise,
/// taken as sky-limited from the frame's depth (SNR = 5 · 10^(0.4 (m_limit − m)); for a
/// bright source the zero point's term dominates anyway).
fn calibrated_mag(
    a: &AnomalyRecord,
    frames: &BTreeMap<&str, &NightFrameRecord>,
) -> Option<(f64, f64, Option<String>)> {
    let inst = a.detail.instrumental_mag()?;
    let f = frames.get(a.detections.first()?.path.as_str())?;
    let m = f.metrics.as_ref()?;
    let zp = m.zero_point_mag?;
    let t = f.exposure_s.filter(|t| *t > 0.0).unwrap_or(1.0);
    let mag = inst + zp + 2.5 * t.log10();
    let photon = m
        .limit_mag
        .map_or(0.0, |lim| 1.0857 / (5.0 * 10f64.powf(0.4 * (lim - mag))));
    let err = m.zero_point_err_mag.unwrap_or(0.0).hypot(photon);
    mag.is_finite()
        .then(|| (mag, err, m.zero_point_band.clone()))
}

/// The night a document is mostly about (the label most of its frames carry).
pub fn night_of(doc: &NightDocument) -> Option<String> {
    majority(doc.frames.iter().filter_map(|f| f.night.clone()))
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
        match reader.record_once_let_go(path, &options, crate::reader::HELD_PATIENCE) {
            Ok(record) => records.push(record),
            // A file that went between the walk and now is left out.
            Err(NotRecorded::Gone(_)) => {}
            Err(held) => tracing::warn!("{}: {held}; left out of this night", path.display()),
        }
        progress(k + 1, total);
    }
    let mut doc = analyse_records(
        &records,
        &config.rule_specs(),
        config.site_position(),
        match store {
            Some(s) => Catalogues::Keep(s),
            None => Catalogues::None,
        },
        &config.calibration.settings,
    )?;
    cross_match(&mut doc, &config.catalogue)?;
    doc.set_rig(&config.rig.name);
    Ok(doc)
}
