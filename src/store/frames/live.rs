//! The live verdict's rows: a group's records as the night so far, the placements kept
//! so that only what must be placed is placed again, the verdict each frame got when it
//! landed, and the frames still waiting for one.

use super::{group_key, GroupKey};
use crate::night::register::Placement;
use crate::record::FrameRecord;
use crate::rules::Verdict;
use crate::store::db::{values, DbError};
use crate::store::{Store, StoreError};

/// A frame of a night as the daemon judged it when it landed (for the status page).
#[derive(Debug, Clone)]
pub struct LiveFrame {
    pub id: i64,
    /// Stars and rejected detections left empty.
    pub record: FrameRecord,
    pub verdict: Option<Verdict>,
    pub explanations: Vec<String>,
}

impl Store {
    /// The frames of one night, target and filter recorded so far, without their stars
    /// (for the live verdict): (id, record, placement on the group's reference).
    pub fn group_records(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
    ) -> Result<Vec<(i64, FrameRecord, Option<Placement>)>, StoreError> {
        self.frame_rows(
            "WHERE night = ?1 AND target IS NOT DISTINCT FROM ?2
               AND filter IS NOT DISTINCT FROM ?3 AND status != 'skipped'
               AND (rig = ?4 OR ?4 IS NULL)",
            values![night, target, filter, self.scope()],
        )
    }

    /// Every frame of one night with its live verdict and explanations, in time order,
    /// without stars.
    pub fn night_live_frames(&self, night: &str) -> Result<Vec<LiveFrame>, StoreError> {
        let rows = self.frame_rows(
            "WHERE night = ?1 AND (rig = ?2 OR ?2 IS NULL)",
            values![night, self.scope()],
        )?;
        let mut out = Vec::with_capacity(rows.len());
        for (id, record, _) in rows {
            let row = self
                .conn
                .query_one(
                    "SELECT live_verdict, live_explanations_json FROM frames WHERE id = ?1",
                    values![id],
                )
                .map_err(|e| self.err(e))?;
            let (verdict, explanations): (Option<String>, Option<String>) = (
                row.get(0).map_err(|e| self.err(e))?,
                row.get(1).map_err(|e| self.err(e))?,
            );
            out.push(LiveFrame {
                id,
                record,
                verdict: verdict.as_deref().and_then(Verdict::from_name),
                explanations: explanations
                    .and_then(|j| serde_json::from_str(&j).ok())
                    .unwrap_or_default(),
            });
        }
        Ok(out)
    }

    /// This rig's frames that have no verdict yet (oldest first).
    pub fn frames_without_verdict(&self) -> Result<Vec<(i64, GroupKey)>, StoreError> {
        self.rows(
            "SELECT id, night, target, filter, status FROM frames
             WHERE verdict IS NULL AND status != 'skipped' AND rig = ?1 ORDER BY id",
            values![self.rig],
        )?
        .iter()
        .map(|r| Ok((r.get(0)?, group_key(r, 1)?)))
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// Record where a frame sits on its group's reference frame (the placement names the
    /// reference's record id).
    pub fn set_placement(&self, id: i64, p: &Placement) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET placement_json = ?2, registration_rms_px = ?3 WHERE id = ?1",
            values![id, serde_json::to_string(p).ok(), p.rms_px],
        )
    }

    /// Record the verdict a frame got when it landed: it stays as its live verdict, and is
    /// its verdict until the night is judged again.
    pub fn set_live_verdict(
        &self,
        id: i64,
        judgement: &crate::rules::Judgement,
        transparency_loss_mag: Option<f64>,
    ) -> Result<(), StoreError> {
        let reasons = serde_json::to_string(&judgement.reasons).unwrap_or_default();
        let explanations = serde_json::to_string(&judgement.explanations).unwrap_or_default();
        self.run(
            "UPDATE frames SET verdict = ?2, reasons_json = ?3, live_verdict = ?2,
                live_reasons_json = ?3, transparency_loss_mag = ?4, live_explanations_json = ?5
             WHERE id = ?1",
            values![
                id,
                judgement.verdict.as_str(),
                reasons,
                transparency_loss_mag,
                explanations
            ],
        )
    }

    /// The last `n` judged frames of this rig's night-target-filter group, newest last:
    /// path, live verdict and its explanations.
    pub fn latest_live_judgements(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
        n: usize,
    ) -> Result<Vec<(String, Verdict, Vec<String>)>, StoreError> {
        let rows = self.rows(
            "SELECT path, live_verdict, live_explanations_json FROM frames
             WHERE night = ?1 AND target IS NOT DISTINCT FROM ?2
               AND filter IS NOT DISTINCT FROM ?3 AND live_verdict IS NOT NULL AND rig = ?5
             ORDER BY COALESCE(time_unix, recorded_at) DESC, id DESC LIMIT ?4",
            values![night, target, filter, n, self.rig],
        )?;
        let mut out = Vec::new();
        for r in &rows {
            let read = || -> Result<(String, String, Option<String>), DbError> {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            };
            let (path, verdict, explanations) = read().map_err(|e| self.err(e))?;
            let Some(verdict) = Verdict::from_name(&verdict) else {
                continue;
            };
            let explanations = explanations
                .and_then(|j| serde_json::from_str(&j).ok())
                .unwrap_or_default();
            out.push((path, verdict, explanations));
        }
        out.reverse();
        Ok(out)
    }
}
