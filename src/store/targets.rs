//! A target across nights: every light frame of a target with what its summary reads
//! (`season`), the targets the store holds, and each night's usable exposure of a
//! target for its plan.

use std::collections::BTreeMap;

use serde::Deserialize;

use super::db::{values, DbError, Row};
use super::{Store, StoreError};
use crate::rules::Verdict;
use crate::season::plan::NightUsable;
use crate::season::{FrameQuality, TargetFrame, TargetNights};

/// The one header fact a target's summary reads.
#[derive(Deserialize)]
struct Exposure {
    #[serde(default)]
    exposure_s: Option<f64>,
}

fn exposure_of(header_json: Option<String>) -> Option<f64> {
    header_json
        .and_then(|h| serde_json::from_str::<Exposure>(&h).ok())
        .and_then(|e| e.exposure_s)
}

fn target_frame(r: &Row) -> Result<TargetFrame, DbError> {
    let status: String = r.get(6)?;
    let verdict: Option<String> = r.get(7)?;
    let metrics: Option<String> = r.get(9)?;
    let quality: Option<FrameQuality> = metrics.and_then(|m| serde_json::from_str(&m).ok());
    Ok(TargetFrame {
        id: r.get(0)?,
        path: r.get(1)?,
        rig: r.get(2)?,
        night: r.get::<Option<String>>(3)?.unwrap_or_default(),
        filter: r.get(4)?,
        time_unix: r.get(5)?,
        readable: status == "ok" && quality.is_some(),
        verdict: verdict.as_deref().and_then(Verdict::from_name),
        exposure_s: exposure_of(r.get(8)?),
        quality,
    })
}

impl Store {
    /// Every light frame of `target` (this rig's; every rig's for a site handle), in
    /// time order, with its night's verdict and the metrics a target's summary reads.
    pub fn target_frames(&self, target: &str) -> Result<Vec<TargetFrame>, StoreError> {
        self.rows(
            "SELECT id, path, rig, night, filter, time_unix, status, verdict, header_json,
                metrics_json
             FROM frames WHERE target = ?1 AND status != 'skipped' AND (rig = ?2 OR ?2 IS NULL)
             ORDER BY COALESCE(time_unix, recorded_at), id",
            values![target, self.scope()],
        )?
        .iter()
        .map(target_frame)
        .collect::<Result<_, _>>()
        .map_err(|e| self.err(e))
    }

    /// The targets with light frames (this rig's; every rig's for a site handle), by
    /// name: how many nights and frames, the first and last night.
    pub fn targets(&self) -> Result<Vec<TargetNights>, StoreError> {
        self.rows(
            "SELECT target, COUNT(DISTINCT night), COUNT(*), MIN(night), MAX(night)
             FROM frames WHERE target IS NOT NULL AND status != 'skipped'
               AND (rig = ?1 OR ?1 IS NULL)
             GROUP BY target ORDER BY target",
            values![self.scope()],
        )?
        .iter()
        .map(|r| {
            Ok(TargetNights {
                target: r.get(0)?,
                nights: r.get(1)?,
                frames: r.get(2)?,
                first_night: r.get(3)?,
                last_night: r.get(4)?,
            })
        })
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// A target's usable exposure per night and filter: the summed exposure of the
    /// frames its nights keep (verdict ok, and warn when `with_warned`), as the lists
    /// of frames to stack hold them.
    pub fn target_usable(
        &self,
        target: &str,
        with_warned: bool,
    ) -> Result<Vec<NightUsable>, StoreError> {
        let rows = self.rows(
            "SELECT night, filter, header_json FROM frames
             WHERE target = ?1 AND status = 'ok' AND (rig = ?3 OR ?3 IS NULL)
               AND (verdict = 'ok' OR (?2 AND verdict = 'warn'))",
            values![target, with_warned, self.scope()],
        )?;
        let mut sums: BTreeMap<(String, Option<String>), f64> = BTreeMap::new();
        type Texts = (Option<String>, Option<String>, Option<String>);
        for r in &rows {
            let read = || -> Result<Texts, DbError> { Ok((r.get(0)?, r.get(1)?, r.get(2)?)) };
            let (night, filter, header) = read().map_err(|e| self.err(e))?;
            *sums.entry((night.unwrap_or_default(), filter)).or_default() +=
                exposure_of(header).unwrap_or(0.0);
        }
        Ok(sums
            .into_iter()
            .map(|((night, filter), usable_s)| NightUsable {
                night,
                filter,
                usable_s,
            })
            .collect())
    }
}
