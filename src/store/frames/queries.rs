//! The queries of a night's frames: its records with their stars for the night model,
//! its frames and groups, the frames to stack, the calibration library of earlier
//! nights, and the counts `status` and the page show.

use serde::Serialize;

use super::TargetFilter;
use crate::night::register::Placement;
use crate::record::FrameRecord;
use crate::store::db::{values, DbError, Row, Value};
use crate::store::{Store, StoreError};

/// Counts for `subwatch status`.
#[derive(Debug, Clone, Default, Serialize)]
pub struct NightCounts {
    pub frames: i64,
    pub measured: i64,
    pub errors: i64,
    pub skipped: i64,
    pub warned: i64,
    pub rejected: i64,
    /// Frames without a readable DATE-OBS (their night comes from the file's time).
    pub undated: i64,
    pub last_frame_time_unix: Option<f64>,
    pub last_recorded_unix: Option<f64>,
}

/// The aggregates a night's counts are read from, in the order `counts_from_row` reads.
const COUNT_COLUMNS: &str = "COUNT(*),
    COUNT(CASE WHEN status = 'ok' THEN 1 END),
    COUNT(CASE WHEN status = 'error' THEN 1 END),
    COUNT(CASE WHEN status = 'skipped' THEN 1 END),
    COUNT(CASE WHEN verdict = 'warn' THEN 1 END),
    COUNT(CASE WHEN verdict = 'reject' THEN 1 END),
    COUNT(CASE WHEN time_unix IS NULL THEN 1 END),
    MAX(time_unix), MAX(recorded_at)";

/// A night's counts from the `COUNT_COLUMNS` of a row, starting at column `at`.
fn counts_from_row(r: &Row, at: usize) -> Result<NightCounts, DbError> {
    Ok(NightCounts {
        frames: r.get(at)?,
        measured: r.get(at + 1)?,
        errors: r.get(at + 2)?,
        skipped: r.get(at + 3)?,
        warned: r.get(at + 4)?,
        rejected: r.get(at + 5)?,
        undated: r.get(at + 6)?,
        last_frame_time_unix: r.get(at + 7)?,
        last_recorded_unix: r.get(at + 8)?,
    })
}

/// The night `days` nights before `night` (both YYYY-MM-DD); `None` when `night` is not
/// a date.
fn nights_before(night: &str, days: u32) -> Option<String> {
    let d = chrono::NaiveDate::parse_from_str(night, "%Y-%m-%d").ok()?;
    Some(
        d.checked_sub_days(chrono::Days::new(days.into()))?
            .format("%Y-%m-%d")
            .to_string(),
    )
}

impl Store {
    /// Everything recorded for one night, rebuilt as records for the night analysis,
    /// stars and rejected detections included.
    pub fn night_records(&self, night: &str) -> Result<Vec<FrameRecord>, StoreError> {
        let rows = self.frame_rows(
            "WHERE night = ?1 AND (rig = ?2 OR ?2 IS NULL)",
            values![night, self.scope()],
        )?;
        let mut out = Vec::with_capacity(rows.len());
        for (id, mut rec, _) in rows {
            rec.stars = self.frame_star_records(id)?;
            rec.rejected = self.frame_rejected(id)?;
            out.push(rec);
        }
        Ok(out)
    }

    /// Every frame of one night (lights and calibration frames), without stars, in time
    /// order: (id, record, placement).
    pub fn night_frames(
        &self,
        night: &str,
    ) -> Result<Vec<(i64, FrameRecord, Option<Placement>)>, StoreError> {
        self.frame_rows(
            "WHERE night = ?1 AND (rig = ?2 OR ?2 IS NULL)",
            values![night, self.scope()],
        )
    }

    /// Calibration frames (darks, flats, bias, with their measurements) of the `days`
    /// nights before `night`, newest first: the library a night's lights can fall back on.
    pub fn earlier_calibration(
        &self,
        night: &str,
        days: u32,
    ) -> Result<Vec<FrameRecord>, StoreError> {
        let Some(first) = nights_before(night, days) else {
            return Ok(Vec::new());
        };
        let rows = self.frame_rows(
            "WHERE status = 'skipped' AND calibration_json IS NOT NULL AND night < ?1
               AND night >= ?2 AND (rig = ?3 OR ?3 IS NULL)",
            values![night, first, self.scope()],
        )?;
        let mut out: Vec<FrameRecord> = rows.into_iter().map(|(_, r, _)| r).collect();
        out.reverse();
        Ok(out)
    }

    /// Paths of the frames of one night, target and filter to stack: verdict ok, and
    /// warn when `with_warned`.
    pub fn accepted_paths(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
        with_warned: bool,
    ) -> Result<Vec<String>, StoreError> {
        self.strings(
            "SELECT path FROM frames WHERE night = ?1 AND target IS NOT DISTINCT FROM ?2
               AND filter IS NOT DISTINCT FROM ?3 AND (rig = ?5 OR ?5 IS NULL)
               AND status = 'ok' AND (verdict = 'ok' OR (?4 AND verdict = 'warn'))
             ORDER BY COALESCE(time_unix, recorded_at), id",
            values![night, target, filter, with_warned, self.scope()],
        )
    }

    /// The (target, filter) groups of one night's frames.
    pub fn night_groups(&self, night: &str) -> Result<Vec<TargetFilter>, StoreError> {
        self.rows(
            "SELECT DISTINCT target, filter FROM frames
             WHERE night = ?1 AND status != 'skipped' AND (rig = ?2 OR ?2 IS NULL)
             ORDER BY target NULLS FIRST, filter NULLS FIRST",
            values![night, self.scope()],
        )?
        .iter()
        .map(|r| Ok((r.get(0)?, r.get(1)?)))
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// The night of the newest frame by its DATE-OBS (the order frames were recorded in
    /// does not matter: an archive of old nights recorded today leaves it alone): the
    /// night in progress as the frames themselves place it.
    pub fn latest_dated_night(&self) -> Result<Option<String>, StoreError> {
        Ok(self
            .strings(
                "SELECT night FROM frames
                 WHERE time_unix IS NOT NULL AND night IS NOT NULL AND (rig = ?1 OR ?1 IS NULL)
                 ORDER BY time_unix DESC, id DESC LIMIT 1",
                values![self.scope()],
            )?
            .pop())
    }

    /// The night labels that hold frames, oldest first.
    pub fn nights(&self) -> Result<Vec<String>, StoreError> {
        self.strings(
            "SELECT DISTINCT night FROM frames
             WHERE night IS NOT NULL AND (rig = ?1 OR ?1 IS NULL) ORDER BY night",
            values![self.scope()],
        )
    }

    /// Counts for one night.
    pub fn night_counts(&self, night: &str) -> Result<NightCounts, StoreError> {
        self.conn
            .query_one(
                &format!(
                    "SELECT {COUNT_COLUMNS} FROM frames
                     WHERE night = ?1 AND (rig = ?2 OR ?2 IS NULL)"
                ),
                values![night, self.scope()],
            )
            .and_then(|r| counts_from_row(&r, 0))
            .map_err(|e| self.err(e))
    }

    /// Every rig's counts for one night, by rig name (a site's page).
    pub fn night_counts_by_rig(
        &self,
        night: &str,
    ) -> Result<Vec<(String, NightCounts)>, StoreError> {
        self.rows(
            &format!(
                "SELECT rig, {COUNT_COLUMNS} FROM frames WHERE night = ?1
                 GROUP BY rig ORDER BY rig"
            ),
            values![night],
        )?
        .iter()
        .map(|r| Ok((r.get(0)?, counts_from_row(r, 1)?)))
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// The first column of every row of a query, as text.
    fn strings(&self, sql: &str, values: &[Value]) -> Result<Vec<String>, StoreError> {
        self.rows(sql, values)?
            .iter()
            .map(|r| r.get(0))
            .collect::<Result<_, _>>()
            .map_err(|e| self.err(e))
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn nights_before_counts_back_across_months() {
        assert_eq!(
            super::nights_before("2026-03-02", 3).as_deref(),
            Some("2026-02-27")
        );
        assert_eq!(super::nights_before("not a date", 3), None);
    }
}
