//! The live verdict: a frame just recorded is judged by the night model
//! (`night::judge::judge_group`) applied to its group's night so far, as that module's
//! live rule says; its verdict is stored (and kept as its live verdict) and its group's
//! list rewritten. This shell only reads and writes the store: it hands the model the
//! group's records with the placements stored for them and reads the stars the model
//! asks for (the frames it must place: the new one, or every one when the group's
//! reference record changed), and stores the placements the model made.

use std::borrow::Cow;

use crate::night::judge::{self, Held, Site};
use crate::record::FrameRecord;
use crate::rules::Verdict;
use crate::store::{GroupKey, Store, StoreError};

/// What the live verdict needs besides the store.
#[derive(Debug, Clone, Default)]
pub struct Judging {
    pub rules: Vec<crate::rules::RuleSpec>,
    pub site: Option<Site>,
    /// The lists of frames to stack, when that action is on.
    pub lists: Option<crate::lists::Lists>,
    /// How darks, flats and bias frames are judged (and how far back the library goes).
    pub calibration: crate::night::calibration::CalibrationSettings,
}

/// A live verdict with its reasons.
#[derive(Debug, Clone, PartialEq)]
pub struct Judged {
    pub verdict: Verdict,
    pub reasons: Vec<String>,
}

impl std::fmt::Display for Judged {
    /// "reject (fwhm_high,trail)", as the log line shows it.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.verdict.as_str())?;
        if !self.reasons.is_empty() {
            write!(f, " ({})", self.reasons.join(","))?;
        }
        Ok(())
    }
}

/// Judge a just-recorded frame against the night so far, store the verdict, and refresh
/// the group's list when asked to. A calibration frame is judged as the morning judges
/// it (`night::calibration`), over the night's calibration frames and lights so far:
/// a flat set too faint at dusk can still be taken again. `None` for a frame that is
/// not judged (one without a night, or a calibration frame that could not be measured).
pub fn judge_in_store(
    store: &Store,
    record: &FrameRecord,
    id: i64,
    judging: &Judging,
) -> Result<Option<Judged>, StoreError> {
    let key = GroupKey {
        night: record.night.clone(),
        target: record.target.clone(),
        filter: record.filter.clone(),
        ok: record.status == crate::record::FrameStatus::Ok,
        skipped: record.status == crate::record::FrameStatus::Skipped,
    };
    judge_frame(store, &key, id, judging)
}

/// Frames recorded without a verdict (the daemon stopped, or the store failed, between
/// the two writes) are judged at start-up and once a minute.
pub fn judge_missing(store: &Store, judging: &Judging) -> Result<usize, StoreError> {
    let missing = store.frames_without_verdict()?;
    for (id, key) in &missing {
        judge_frame(store, key, *id, judging)?;
    }
    Ok(missing.len())
}

/// The live verdict of a calibration frame: the night model's calibration judgement of
/// the night so far (records without their stars). Every calibration frame of the night
/// gets its judgement again, as its set grew.
fn judge_calibration_frame(
    store: &Store,
    night: &str,
    id: i64,
    judging: &Judging,
) -> Result<Option<Judged>, StoreError> {
    let rows = store.night_frames(night)?;
    let records: Vec<&FrameRecord> = rows.iter().map(|r| &r.1).collect();
    let earlier = store.earlier_calibration(night, judging.calibration.library_days)?;
    let earlier: Vec<&FrameRecord> = earlier.iter().collect();
    let judged =
        crate::night::calibration::judge_calibration(&records, &earlier, &judging.calibration);
    let mut mine = None;
    for c in &judged.frames {
        let frame_id = rows[c.index].0;
        store.set_live_verdict(frame_id, &c.judgement, None)?;
        if frame_id == id {
            mine = Some(Judged {
                verdict: c.judgement.verdict,
                reasons: c.judgement.reasons.clone(),
            });
        }
    }
    Ok(mine)
}

fn judge_frame(
    store: &Store,
    key: &GroupKey,
    id: i64,
    judging: &Judging,
) -> Result<Option<Judged>, StoreError> {
    let Some(night) = key.night.as_deref() else {
        return Ok(None);
    };
    if key.skipped {
        return judge_calibration_frame(store, night, id, judging);
    }
    let group = store.group_records(night, key.target.as_deref(), key.filter.as_deref())?;
    let held: Vec<Held> = group
        .iter()
        .map(|(id, record, known)| Held {
            record,
            id: *id,
            known: known.as_ref(),
        })
        .collect();
    let stars = |i: usize| store.frame_star_records(group[i].0).map(Cow::Owned);
    let judged = judge::judge_group(&held, stars, &judging.rules, judging.site)?;
    for &i in &judged.placed {
        if let Some(p) = &judged.frames[i].placement {
            store.set_placement(group[i].0, p)?;
        }
    }
    let Some(k) = group.iter().position(|g| g.0 == id) else {
        return Ok(None);
    };
    let j = &judged.frames[k];
    let verdict = j.judgement.verdict;
    store.set_live_verdict(id, &j.judgement, j.transparency_loss_mag)?;
    let (target, filter) = (key.target.as_deref(), key.filter.as_deref());
    store.set_group_limits(night, target, filter, &judged.limits)?;
    if let Some(lists) = judging.lists.as_ref() {
        if let Err(e) = crate::lists::rewrite(
            store,
            lists,
            night,
            key.target.as_deref(),
            key.filter.as_deref(),
        ) {
            tracing::warn!("{e}");
        }
    }
    Ok(Some(Judged {
        verdict,
        reasons: j.judgement.reasons.clone(),
    }))
}
