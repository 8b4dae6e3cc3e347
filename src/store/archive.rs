//! What `subwatch archive` asks of the store: the frames a rig holds (to read only what
//! is not recorded yet, and to judge the nights left without verdicts), a night's
//! fingerprint (to judge it again when another process added to it meanwhile), and the
//! leases on folders that let several archives share one tree without reading a frame
//! twice.

use std::collections::HashMap;

use super::db::{values, DbError};
use super::{Store, StoreError};
use crate::rules::Verdict;

/// A frame a rig holds, as an archive sees it.
#[derive(Debug, Clone, PartialEq)]
pub struct ArchivedFrame {
    pub size: u64,
    pub mtime_ns: i64,
    pub night: Option<String>,
    pub target: Option<String>,
    /// A light frame (not a dark, flat or bias).
    pub light: bool,
    /// Measured (status ok; a calibration frame with its statistics).
    pub measured: bool,
    pub verdict: Option<Verdict>,
}

/// The lease key of one folder of an archive.
fn unit_key(rig: &str, unit: &str) -> String {
    format!("archive of rig {rig}: {unit}")
}

impl Store {
    /// Every frame this rig holds, by path.
    pub fn archived_frames(&self) -> Result<HashMap<String, ArchivedFrame>, StoreError> {
        self.rows(
            "SELECT path, size, mtime_ns, night, target, status, verdict,
                calibration_json IS NOT NULL
             FROM frames WHERE rig = ?1",
            values![self.rig],
        )?
        .iter()
        .map(|r| {
            let status: String = r.get(5)?;
            let verdict: Option<String> = r.get(6)?;
            let calibrated: bool = r.get(7)?;
            Ok((
                r.get(0)?,
                ArchivedFrame {
                    size: r.get::<i64>(1)? as u64,
                    mtime_ns: r.get(2)?,
                    night: r.get(3)?,
                    target: r.get(4)?,
                    light: status != "skipped",
                    measured: status == "ok" || (status == "skipped" && calibrated),
                    verdict: verdict.as_deref().and_then(Verdict::from_name),
                },
            ))
        })
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// The version (size, modification time) of `path` this rig holds, if any.
    pub fn recorded_version(&self, path: &str) -> Result<Option<(u64, i64)>, StoreError> {
        self.conn
            .query_opt(
                "SELECT size, mtime_ns FROM frames WHERE rig = ?1 AND path = ?2",
                values![self.rig, path],
            )
            .and_then(|r| {
                r.map(|r| Ok((r.get::<i64>(0)? as u64, r.get(1)?)))
                    .transpose()
            })
            .map_err(|e| self.err(e))
    }

    /// What this rig's frames of `night` are now: how many, and the newest record's id
    /// (a new or replaced frame changes it).
    pub fn night_fingerprint(&self, night: &str) -> Result<(i64, Option<i64>), StoreError> {
        self.conn
            .query_one(
                "SELECT COUNT(*), MAX(id) FROM frames WHERE night = ?1 AND rig = ?2",
                values![night, self.rig],
            )
            .and_then(|r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(|e| self.err(e))
    }

    /// Take the lease on one folder of an archive for `holder` until `now + seconds`:
    /// taken when nobody holds it or its holder let it run out (that process died).
    /// Returns the lease, or `None` while another archive holds it.
    pub fn take_archive_unit(
        &self,
        unit: &str,
        holder: &str,
        now: f64,
        seconds: f64,
    ) -> Result<Option<String>, StoreError> {
        self.take_lease(&unit_key(&self.rig, unit), holder, now, seconds)
    }

    /// Hold a folder's lease longer: the new lease, or `None` when it is no longer
    /// this holder's (it ran out and another took it).
    pub fn renew_archive_unit(
        &self,
        unit: &str,
        lease: &str,
        holder: &str,
        now: f64,
        seconds: f64,
    ) -> Result<Option<String>, StoreError> {
        let held = serde_json::json!({"held_by": holder, "until": now + seconds}).to_string();
        let swapped = self
            .conn
            .execute(
                "UPDATE meta SET value = ?3 WHERE key = ?1 AND value = ?2",
                values![
                    format!("site {}", unit_key(&self.rig, unit)),
                    lease,
                    held.clone()
                ],
            )
            .map_err(|e| self.err(e))?;
        Ok((swapped == 1).then_some(held))
    }

    /// A folder's lease given back (its frames are recorded, or the archive stops).
    pub fn release_archive_unit(&self, unit: &str, lease: &str) -> Result<(), StoreError> {
        self.release_lease(&unit_key(&self.rig, unit), lease)
    }
}
