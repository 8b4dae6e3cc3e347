//! The live verdict: a frame just recorded, judged against the night so far (same
//! night, target and filter), its verdict stored and its group's list rewritten.

use std::path::PathBuf;

use crate::record::FrameStatus;
use crate::store::{Store, StoreError};

/// What the live verdict needs besides the store.
#[derive(Debug, Clone, Default)]
pub struct Judging {
    pub rules: Vec<crate::rules::RuleSpec>,
    /// Latitude, east longitude, elevation.
    pub site: Option<(f64, f64, f64)>,
    /// Where accepted-frame lists go, when that action is on.
    pub lists_folder: Option<PathBuf>,
}

/// Judge a just-recorded frame against the night so far (same target and filter), store
/// the verdict, and refresh the accepted-frames list when asked to. Later frames do not
/// change an earlier frame's verdict: what was logged stays what was decided.
pub fn judge_in_store(
    store: &Store,
    record: &crate::record::FrameRecord,
    id: i64,
    judging: &Judging,
) -> Result<Option<String>, StoreError> {
    let stars: Vec<(f64, f64, f64, f64)> = record
        .stars
        .iter()
        .map(|s| (s.x, s.y, s.flux, s.snr))
        .collect();
    let key = crate::store::GroupKey {
        night: record.night.clone(),
        target: record.target.clone(),
        filter: record.filter.clone(),
        ok: record.status == FrameStatus::Ok,
        skipped: record.status == FrameStatus::Skipped,
    };
    judge_frame(store, &key, &stars, id, judging)
}

/// Frames recorded without a verdict (the daemon was stopped between the two writes)
/// are judged at start-up.
pub fn judge_missing(store: &Store, judging: &Judging) -> Result<usize, StoreError> {
    let missing = store.frames_without_verdict()?;
    for (id, key) in &missing {
        let stars = store.frame_stars(*id)?;
        judge_frame(store, key, &stars, *id, judging)?;
    }
    Ok(missing.len())
}

fn judge_frame(
    store: &Store,
    record: &crate::store::GroupKey,
    stars: &[(f64, f64, f64, f64)],
    id: i64,
    judging: &Judging,
) -> Result<Option<String>, StoreError> {
    let site = judging.site;
    let Some(night) = record.night.as_deref() else {
        return Ok(None);
    };
    if record.skipped {
        return Ok(None);
    }
    let mut group =
        store.group_metrics(night, record.target.as_deref(), record.filter.as_deref())?;
    // Transparency against the night's reference: the frame with the most stars among
    // the first ten of the group (fixed early, so each frame costs one registration).
    let reference = group
        .iter()
        .take(10)
        .filter(|g| g.status == "ok")
        .max_by_key(|g| g.metrics.as_ref().map_or(0, |m| m.star_count))
        .map(|g| g.id);
    if let (Some(r), true) = (reference, record.ok) {
        let (loss, rms) = if r == id {
            (Some(0.0), Some(0.0))
        } else {
            match crate::night::transparency_against(&store.frame_stars(r)?, stars) {
                Some((loss, rms)) => (loss, Some(rms)),
                None => (None, None),
            }
        };
        store.set_registration(id, loss, rms)?;
        if let Some(g) = group.iter_mut().find(|g| g.id == id) {
            g.transparency_loss_mag = loss;
            g.registration_rms_px = rms;
        }
    }
    let facts: Vec<crate::rules::FrameFacts> = group
        .iter()
        .map(|g| {
            let m = g.metrics.as_ref().filter(|_| g.status == "ok");
            let mut facts =
                crate::rules::FrameFacts::from_metrics(m, g.transparency_loss_mag, None);
            facts.sun_alt_deg = site.zip(g.time_unix).map(|((lat, lon, _), t)| {
                crate::sky::sun_altitude(crate::sky::julian_date(t), lat, lon)
            });
            facts
        })
        .collect();
    let judged = crate::rules::judge_group_with(&facts, &judging.rules);
    let Some(k) = group.iter().position(|g| g.id == id) else {
        return Ok(None);
    };
    let j = &judged[k];
    let verdict = serde_json::to_value(j.verdict)
        .ok()
        .and_then(|v| v.as_str().map(String::from))
        .unwrap_or_default();
    store.set_verdict(id, &verdict, &j.reasons)?;
    if let Some(folder) = judging.lists_folder.as_deref() {
        if let Err(e) = crate::lists::rewrite(
            store,
            folder,
            night,
            record.target.as_deref(),
            record.filter.as_deref(),
        ) {
            tracing::warn!("{e}");
        }
    }
    let reasons = if j.reasons.is_empty() {
        String::new()
    } else {
        format!(" ({})", j.reasons.join(","))
    };
    Ok(Some(format!("{verdict}{reasons}")))
}
