//! Recording a file: one record per path and rig, written with its stars in one
//! transaction, recorded once per version of the file and replaced by a newer version;
//! and the marks of files being read, which outlive a crash of the process reading them.

use super::group_key;
use super::GroupKey;
use crate::record::{FrameRecord, Identity};
use crate::store::db::{values, DbError, Value};
use crate::store::{Store, StoreError};

/// What recording a frame did.
#[derive(Debug, Clone, PartialEq)]
pub enum Recorded {
    /// This version of the file was already recorded; nothing was written.
    Already,
    /// A new record, with its id.
    New(i64),
    /// The file changed since it was recorded: the earlier record (its group given, so
    /// its list can be rewritten) was replaced by the new one.
    Replaced { id: i64, earlier: GroupKey },
}

impl Recorded {
    pub fn id(&self) -> Option<i64> {
        match self {
            Recorded::Already => None,
            Recorded::New(id) | Recorded::Replaced { id, .. } => Some(*id),
        }
    }
}

/// A file that was being read when the process reading it stopped.
#[derive(Debug, Clone, PartialEq)]
pub struct Interrupted {
    pub identity: Identity,
    /// How many times a process stopped while reading this version of the file.
    pub interruptions: i64,
}

impl Store {
    /// Record a frame with its stars, atomically: nothing when this version of the file
    /// is recorded already, a new record, or the replacement of an older version's
    /// record (its stars, rejected detections and verdict go with it). The file's
    /// reading mark is cleared in the same transaction.
    pub fn record_frame(&mut self, f: &FrameRecord, now_unix: f64) -> Result<Recorded, StoreError> {
        let c = &self.conn;
        let rig = &self.rig;
        c.transaction(|| {
            let existing = c.query_opt(
                "SELECT id, size, mtime_ns, night, target, filter, status FROM frames
                 WHERE rig = ?2 AND path = ?1",
                values![f.identity.path, rig],
            )?;
            let mut earlier = None;
            if let Some(row) = existing {
                let (id, size, mtime_ns): (i64, i64, i64) = (row.get(0)?, row.get(1)?, row.get(2)?);
                if size == f.identity.size as i64 && mtime_ns == f.identity.mtime_ns {
                    c.execute(
                        "DELETE FROM reading WHERE rig = ?2 AND path = ?1",
                        values![f.identity.path, rig],
                    )?;
                    return Ok(Recorded::Already);
                }
                // Stars and rejected detections go with the row (ON DELETE CASCADE).
                c.execute("DELETE FROM frames WHERE id = ?1", values![id])?;
                earlier = Some(group_key(&row, 3)?);
            }
            let m = f.metrics.as_ref();
            let json = |v: Option<String>| v;
            let frame_id: i64 = c
                .query_one(
                    "INSERT INTO frames (path, size, mtime_ns, status, error, night, target, filter,
                        time_unix, header_json, metrics_json, star_count, fwhm_px, eccentricity,
                        background_adu, noise_adu, recorded_at, wcs_json, calibration_json, rig)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16,
                        ?17, ?18, ?19, ?20)
                     RETURNING id",
                    values![
                        f.identity.path,
                        f.identity.size,
                        f.identity.mtime_ns,
                        f.status.as_str(),
                        f.error,
                        f.night,
                        f.target,
                        f.filter,
                        f.time_unix,
                        json(f.header.as_ref().map(|h| serde_json::to_string(h).unwrap_or_default())),
                        json(m.map(|m| serde_json::to_string(m).unwrap_or_default())),
                        m.map(|m| m.star_count),
                        m.and_then(|m| m.fwhm_px),
                        m.and_then(|m| m.eccentricity),
                        m.map(|m| m.background_adu),
                        m.map(|m| m.noise_adu),
                        now_unix,
                        f.wcs.as_ref().and_then(|w| serde_json::to_string(w).ok()),
                        f.calibration.as_ref().and_then(|c| serde_json::to_string(c).ok()),
                        rig,
                    ],
                )?
                .get(0)?;
            let stars: Vec<Vec<Value>> = f
                .stars
                .iter()
                .enumerate()
                .map(|(seq, s)| {
                    let rgb = |i: usize| s.rgb.and_then(|c| c[i]);
                    values![
                        frame_id,
                        seq,
                        s.x,
                        s.y,
                        s.flux,
                        s.fwhm_px,
                        s.eccentricity,
                        s.snr,
                        s.ra_deg,
                        s.dec_deg,
                        rgb(0),
                        rgb(1),
                        rgb(2),
                        s.flux_err,
                        s.blended
                    ]
                    .to_vec()
                })
                .collect();
            c.insert_rows(
                "stars",
                &[
                    "frame_id",
                    "seq",
                    "x",
                    "y",
                    "flux",
                    "fwhm_px",
                    "eccentricity",
                    "snr",
                    "ra_deg",
                    "dec_deg",
                    "r",
                    "g",
                    "b",
                    "flux_err",
                    "blended",
                ],
                &stars,
            )?;
            let rejected: Vec<Vec<Value>> = f
                .rejected
                .iter()
                .enumerate()
                .map(|(seq, r)| {
                    values![frame_id, seq, r.x, r.y, r.kind.as_str(), r.peak_adu].to_vec()
                })
                .collect();
            c.insert_rows(
                "rejected",
                &["frame_id", "seq", "x", "y", "kind", "peak_adu"],
                &rejected,
            )?;
            c.execute(
                "DELETE FROM reading WHERE rig = ?2 AND path = ?1",
                values![f.identity.path, rig],
            )?;
            Ok::<_, DbError>(match earlier {
                Some(earlier) => Recorded::Replaced {
                    id: frame_id,
                    earlier,
                },
                None => Recorded::New(frame_id),
            })
        })
        .map_err(|e| self.err(e))
    }

    /// Mark a file as being read (before its reader starts). A mark left from an earlier
    /// process for this same version of the file keeps its count of interruptions.
    pub fn begin_reading(&self, id: &Identity, now_unix: f64) -> Result<(), StoreError> {
        self.run(
            "INSERT INTO reading (path, size, mtime_ns, started_unix, rig) VALUES (?1, ?2, ?3, ?4, ?5)
             ON CONFLICT (rig, path) DO UPDATE SET started_unix = excluded.started_unix,
                interruptions = CASE WHEN reading.size = excluded.size
                                      AND reading.mtime_ns = excluded.mtime_ns
                                     THEN reading.interruptions ELSE 0 END,
                size = excluded.size, mtime_ns = excluded.mtime_ns",
            values![id.path, id.size, id.mtime_ns, now_unix, self.rig],
        )
    }

    /// Take a file's mark away without a record: its reader found it still being written,
    /// so it was not read (and that is no interruption to count).
    pub fn end_reading(&self, id: &Identity) -> Result<(), StoreError> {
        self.run(
            "DELETE FROM reading WHERE rig = ?2 AND path = ?1",
            values![id.path, self.rig],
        )
    }

    /// Files marked as being read that no record cleared: the process reading them
    /// stopped. Each one's count of interruptions goes up by one here (call once, at
    /// start-up, before any file is read).
    pub fn take_interrupted(&mut self) -> Result<Vec<Interrupted>, StoreError> {
        let c = &self.conn;
        c.transaction(|| {
            c.execute(
                "UPDATE reading SET interruptions = interruptions + 1 WHERE rig = ?1",
                values![self.rig],
            )?;
            c.query(
                "SELECT path, size, mtime_ns, interruptions FROM reading WHERE rig = ?1
                 ORDER BY path",
                values![self.rig],
            )?
            .iter()
            .map(|r| {
                Ok(Interrupted {
                    identity: Identity {
                        path: r.get(0)?,
                        size: r.get::<i64>(1)? as u64,
                        mtime_ns: r.get(2)?,
                    },
                    interruptions: r.get(3)?,
                })
            })
            .collect::<Result<Vec<_>, DbError>>()
        })
        .map_err(|e| self.err(e))
    }

    /// The recorded version (size, modification time) of every path, for the catch-up
    /// scan: a path whose file now differs is read again and its record replaced.
    pub fn recorded_versions(
        &self,
    ) -> Result<std::collections::HashMap<String, (u64, i64)>, StoreError> {
        self.rows(
            "SELECT path, size, mtime_ns FROM frames WHERE rig = ?1",
            values![self.rig],
        )?
        .iter()
        .map(|r| Ok((r.get(0)?, (r.get::<i64>(1)? as u64, r.get(2)?))))
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// A recorded frame's file moved (the rejected-frames action). A stale record of a
    /// file that was once at the new path (and is not there now) gives way.
    pub fn set_path(&mut self, id: i64, path: &str) -> Result<(), StoreError> {
        let c = &self.conn;
        c.transaction(|| {
            c.execute(
                "DELETE FROM frames WHERE rig = ?3 AND path = ?2 AND id != ?1",
                values![id, path, self.rig],
            )?;
            c.execute(
                "UPDATE frames SET path = ?2 WHERE id = ?1",
                values![id, path],
            )
        })
        .map(|_| ())
        .map_err(|e| self.err(e))
    }
}
