//! Frames: one record per path (recorded once, replaced by a newer version of the file),
//! their stars and rejected detections, the marks of files being read, placements and
//! verdicts, and the queries of a night's frames.
//! About 600 lines: every query of the frames table, in one place beside its schema.

use rusqlite::{params, OptionalExtension};
use serde::Serialize;

use super::{Store, StoreError};
use crate::measure::Rejected;
use crate::night::judge::Placement;
use crate::record::{FrameRecord, FrameStatus, Identity, StarRecord};
use crate::rules::Verdict;

/// A frame whose stored judgement changed when its night was judged again.
#[derive(Debug, Clone, PartialEq)]
pub struct VerdictChange {
    pub path: String,
    /// The verdict before; `None` when the frame had none stored yet.
    pub before: Option<Verdict>,
    pub after: Verdict,
}

/// A frame of a night as the daemon judged it when it landed (for the status page).
#[derive(Debug, Clone)]
pub struct LiveFrame {
    pub id: i64,
    /// Stars and rejected detections left empty.
    pub record: FrameRecord,
    pub verdict: Option<Verdict>,
    pub explanations: Vec<String>,
}

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

/// What places a frame in its group, for judging it.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupKey {
    pub night: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    pub ok: bool,
    pub skipped: bool,
}

/// A group's target and filter (either may be unknown).
pub type TargetFilter = (Option<String>, Option<String>);

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

impl Store {
    /// Record a frame with its stars, atomically: nothing when this version of the file
    /// is recorded already, a new record, or the replacement of an older version's
    /// record (its stars, rejected detections and verdict go with it). The file's
    /// reading mark is cleared in the same transaction.
    pub fn record_frame(&mut self, f: &FrameRecord, now_unix: f64) -> Result<Recorded, StoreError> {
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        let existing: Option<(i64, i64, i64, GroupKey)> = tx
            .query_row(
                "SELECT id, size, mtime_ns, night, target, filter, status FROM frames
                 WHERE rig = ?2 AND path = ?1",
                params![f.identity.path, self.rig],
                |r| {
                    let status: String = r.get(6)?;
                    Ok((
                        r.get(0)?,
                        r.get(1)?,
                        r.get(2)?,
                        GroupKey {
                            night: r.get(3)?,
                            target: r.get(4)?,
                            filter: r.get(5)?,
                            ok: status == "ok",
                            skipped: status == "skipped",
                        },
                    ))
                },
            )
            .optional()
            .map_err(err)?;
        let mut earlier = None;
        if let Some((id, size, mtime_ns, key)) = existing {
            if size == f.identity.size as i64 && mtime_ns == f.identity.mtime_ns {
                tx.execute(
                    "DELETE FROM reading WHERE rig = ?2 AND path = ?1",
                    params![f.identity.path, self.rig],
                )
                .map_err(err)?;
                tx.commit().map_err(err)?;
                return Ok(Recorded::Already);
            }
            // Stars and rejected detections go with the row (ON DELETE CASCADE).
            tx.execute("DELETE FROM frames WHERE id = ?1", params![id])
                .map_err(err)?;
            earlier = Some(key);
        }
        let metrics_json = f
            .metrics
            .as_ref()
            .map(|m| serde_json::to_string(m).unwrap_or_default());
        let header_json = f
            .header
            .as_ref()
            .map(|h| serde_json::to_string(h).unwrap_or_default());
        let m = f.metrics.as_ref();
        tx.execute(
            "INSERT INTO frames (path, size, mtime_ns, status, error, night, target, filter,
                time_unix, header_json, metrics_json, star_count, fwhm_px, eccentricity,
                background_adu, noise_adu, recorded_at, wcs_json, calibration_json, rig)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20)",
            params![
                f.identity.path,
                f.identity.size as i64,
                f.identity.mtime_ns,
                f.status.as_str(),
                f.error,
                f.night,
                f.target,
                f.filter,
                f.time_unix,
                header_json,
                metrics_json,
                m.map(|m| m.star_count as i64),
                m.and_then(|m| m.fwhm_px),
                m.and_then(|m| m.eccentricity),
                m.map(|m| m.background_adu),
                m.map(|m| m.noise_adu),
                now_unix,
                f.wcs.as_ref().and_then(|w| serde_json::to_string(w).ok()),
                f.calibration.as_ref().and_then(|c| serde_json::to_string(c).ok()),
                self.rig,
            ],
        )
        .map_err(err)?;
        let frame_id = tx.last_insert_rowid();
        {
            let mut st = tx
                .prepare_cached(
                    "INSERT INTO stars (frame_id, x, y, flux, fwhm_px, eccentricity, snr, ra_deg, dec_deg, r, g, b,
                        flux_err, blended)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14)",
                )
                .map_err(err)?;
            for s in &f.stars {
                let c = |i: usize| s.rgb.and_then(|c| c[i]);
                st.execute(params![
                    frame_id,
                    s.x,
                    s.y,
                    s.flux,
                    s.fwhm_px,
                    s.eccentricity,
                    s.snr,
                    s.ra_deg,
                    s.dec_deg,
                    c(0),
                    c(1),
                    c(2),
                    s.flux_err,
                    s.blended
                ])
                .map_err(err)?;
            }
            let mut rj = tx
                .prepare_cached("INSERT INTO rejected (frame_id, x, y, kind, peak_adu) VALUES (?1, ?2, ?3, ?4, ?5)")
                .map_err(err)?;
            for r in &f.rejected {
                rj.execute(params![frame_id, r.x, r.y, r.kind.as_str(), r.peak_adu])
                    .map_err(err)?;
            }
        }
        tx.execute(
            "DELETE FROM reading WHERE rig = ?2 AND path = ?1",
            params![f.identity.path, self.rig],
        )
        .map_err(err)?;
        tx.commit().map_err(err)?;
        Ok(match earlier {
            Some(earlier) => Recorded::Replaced {
                id: frame_id,
                earlier,
            },
            None => Recorded::New(frame_id),
        })
    }

    /// Mark a file as being read (before its reader starts). A mark left from an earlier
    /// process for this same version of the file keeps its count of interruptions.
    pub fn begin_reading(&self, id: &Identity, now_unix: f64) -> Result<(), StoreError> {
        self.run(
            "INSERT INTO reading (path, size, mtime_ns, started_unix, rig) VALUES (?1, ?2, ?3, ?4, ?5)
             ON CONFLICT (rig, path) DO UPDATE SET started_unix = excluded.started_unix,
                interruptions = CASE WHEN size = excluded.size AND mtime_ns = excluded.mtime_ns
                                     THEN interruptions ELSE 0 END,
                size = excluded.size, mtime_ns = excluded.mtime_ns",
            params![id.path, id.size as i64, id.mtime_ns, now_unix, self.rig],
        )
    }

    /// Files marked as being read that no record cleared: the process reading them
    /// stopped. Each one's count of interruptions goes up by one here (call once, at
    /// start-up, before any file is read).
    pub fn take_interrupted(&mut self) -> Result<Vec<Interrupted>, StoreError> {
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        tx.execute(
            "UPDATE reading SET interruptions = interruptions + 1 WHERE rig = ?1",
            params![self.rig],
        )
        .map_err(err)?;
        let rows = {
            let mut st = tx
                .prepare(
                    "SELECT path, size, mtime_ns, interruptions FROM reading WHERE rig = ?1
                     ORDER BY path",
                )
                .map_err(err)?;
            let rows = st
                .query_map(params![self.rig], |r| {
                    Ok(Interrupted {
                        identity: Identity {
                            path: r.get(0)?,
                            size: r.get::<_, i64>(1)? as u64,
                            mtime_ns: r.get(2)?,
                        },
                        interruptions: r.get(3)?,
                    })
                })
                .map_err(err)?
                .collect::<Result<Vec<_>, _>>()
                .map_err(err)?;
            rows
        };
        tx.commit().map_err(err)?;
        Ok(rows)
    }

    /// The recorded version (size, modification time) of every path, for the catch-up
    /// scan: a path whose file now differs is read again and its record replaced.
    pub fn recorded_versions(
        &self,
    ) -> Result<std::collections::HashMap<String, (u64, i64)>, StoreError> {
        let mut st = self
            .conn
            .prepare("SELECT path, size, mtime_ns FROM frames WHERE rig = ?1")
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![self.rig], |r| {
                Ok((r.get(0)?, (r.get::<_, i64>(1)? as u64, r.get(2)?)))
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Everything recorded for one night, rebuilt as records for the night analysis,
    /// stars and rejected detections included.
    pub fn night_records(&self, night: &str) -> Result<Vec<FrameRecord>, StoreError> {
        let rows = self.frame_rows("WHERE night = ?1", params![night])?;
        let mut out = Vec::with_capacity(rows.len());
        for (id, mut rec, _) in rows {
            rec.stars = self.frame_star_records(id)?;
            rec.rejected = self.frame_rejected(id)?;
            out.push(rec);
        }
        Ok(out)
    }

    /// Every frame of one night with its live verdict and explanations, in time order,
    /// without stars.
    pub fn night_live_frames(&self, night: &str) -> Result<Vec<LiveFrame>, StoreError> {
        let rows = self.frame_rows("WHERE night = ?1", params![night])?;
        let mut st = self
            .conn
            .prepare_cached("SELECT live_verdict, live_explanations_json FROM frames WHERE id = ?1")
            .map_err(|e| self.err(e))?;
        let mut out = Vec::with_capacity(rows.len());
        for (id, record, _) in rows {
            let (verdict, explanations): (Option<String>, Option<String>) = st
                .query_row(params![id], |r| Ok((r.get(0)?, r.get(1)?)))
                .map_err(|e| self.err(e))?;
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

    /// Calibration frames (darks, flats, bias, with their measurements) of the `days`
    /// nights before `night`, newest first: the library a night's lights can fall back on.
    pub fn earlier_calibration(
        &self,
        night: &str,
        days: u32,
    ) -> Result<Vec<FrameRecord>, StoreError> {
        let rows = self.frame_rows(
            "WHERE status = 'skipped' AND calibration_json IS NOT NULL AND night < ?1
               AND night >= date(?1, '-' || ?2 || ' days')",
            params![night, days],
        )?;
        let mut out: Vec<FrameRecord> = rows.into_iter().map(|(_, r, _)| r).collect();
        out.reverse();
        Ok(out)
    }

    /// The frames of one night, target and filter recorded so far, without their stars
    /// (for the live verdict): (id, record, placement on the group's reference).
    pub fn group_records(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
    ) -> Result<Vec<(i64, FrameRecord, Option<Placement>)>, StoreError> {
        self.frame_rows(
            "WHERE night = ?1 AND target IS ?2 AND filter IS ?3 AND status != 'skipped'",
            params![night, target, filter],
        )
    }

    /// Frame rows as records (stars and rejected detections left empty), in time order.
    fn frame_rows(
        &self,
        filter: &str,
        values: impl rusqlite::Params,
    ) -> Result<Vec<(i64, FrameRecord, Option<Placement>)>, StoreError> {
        let mut st = self
            .conn
            .prepare(&format!(
                "SELECT id, path, size, mtime_ns, status, error, night, target, filter, time_unix,
                        metrics_json, wcs_json, header_json, placement_json, calibration_json
                 FROM frames {filter} ORDER BY COALESCE(time_unix, recorded_at), id"
            ))
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(values, |r| {
                let status: String = r.get(4)?;
                let json = |k: usize| -> rusqlite::Result<Option<String>> { r.get(k) };
                Ok((
                    r.get(0)?,
                    FrameRecord {
                        identity: Identity {
                            path: r.get(1)?,
                            size: r.get::<_, i64>(2)? as u64,
                            mtime_ns: r.get(3)?,
                        },
                        status: FrameStatus::from_name(&status),
                        error: r.get(5)?,
                        night: r.get(6)?,
                        target: r.get(7)?,
                        filter: r.get(8)?,
                        time_unix: r.get(9)?,
                        header: json(12)?.and_then(|h| serde_json::from_str(&h).ok()),
                        metrics: json(10)?.and_then(|m| serde_json::from_str(&m).ok()),
                        stars: Vec::new(),
                        rejected: Vec::new(),
                        wcs: json(11)?.and_then(|w| serde_json::from_str(&w).ok()),
                        calibration: json(14)?.and_then(|c| serde_json::from_str(&c).ok()),
                    },
                    json(13)?.and_then(|p| serde_json::from_str(&p).ok()),
                ))
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// The stars of one frame. Star fields the store does not keep (half-flux radius,
    /// axes, angle, PSF model) come back as their simplest stand-ins.
    pub fn frame_star_records(&self, id: i64) -> Result<Vec<StarRecord>, StoreError> {
        let mut stars = self
            .conn
            .prepare_cached(
                "SELECT x, y, flux, fwhm_px, eccentricity, snr, ra_deg, dec_deg, r, g, b, flux_err, blended
                 FROM stars WHERE frame_id = ?1",
            )
            .map_err(|e| self.err(e))?;
        let rows = stars
            .query_map(params![id], |r| {
                let flux: f64 = r.get::<_, Option<f64>>(2)?.unwrap_or(0.0);
                let fwhm: f64 = r.get::<_, Option<f64>>(3)?.unwrap_or(f64::NAN);
                let rgb: [Option<f64>; 3] = [r.get(8)?, r.get(9)?, r.get(10)?];
                Ok(StarRecord {
                    x: r.get(0)?,
                    y: r.get(1)?,
                    flux,
                    fwhm_px: fwhm,
                    eccentricity: r.get::<_, Option<f64>>(4)?.unwrap_or(f64::NAN),
                    snr: r.get::<_, Option<f64>>(5)?.unwrap_or(0.0),
                    flux_err: r.get::<_, Option<f64>>(11)?.unwrap_or(f64::NAN),
                    hfr_px: None,
                    fwhm_major_px: fwhm,
                    fwhm_minor_px: fwhm,
                    angle_deg: 0.0,
                    psf_flux: flux,
                    psf_model: crate::measure::psf::PsfModel::Gaussian,
                    moffat_beta: None,
                    peak_adu: f64::NAN,
                    blended: r.get::<_, Option<i64>>(12)?.unwrap_or(0) != 0,
                    ra_deg: r.get(6)?,
                    dec_deg: r.get(7)?,
                    rgb: rgb.iter().any(|c| c.is_some()).then_some(rgb),
                })
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    fn frame_rejected(&self, id: i64) -> Result<Vec<Rejected>, StoreError> {
        let mut rejected = self
            .conn
            .prepare_cached("SELECT x, y, kind, peak_adu FROM rejected WHERE frame_id = ?1")
            .map_err(|e| self.err(e))?;
        let rows = rejected
            .query_map(params![id], |r| {
                let kind: String = r.get(2)?;
                Ok(Rejected {
                    x: r.get(0)?,
                    y: r.get(1)?,
                    kind: crate::measure::RejectKind::from_name(&kind)
                        .unwrap_or(crate::measure::RejectKind::Unfit),
                    peak_adu: r.get::<_, Option<f64>>(3)?.unwrap_or(0.0),
                })
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Frames that have no verdict yet (oldest first).
    pub fn frames_without_verdict(&self) -> Result<Vec<(i64, GroupKey)>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT id, night, target, filter, status FROM frames
                 WHERE verdict IS NULL AND status != 'skipped' ORDER BY id",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([], |r| {
                let status: String = r.get(4)?;
                Ok((
                    r.get(0)?,
                    GroupKey {
                        night: r.get(1)?,
                        target: r.get(2)?,
                        filter: r.get(3)?,
                        ok: status == "ok",
                        skipped: false,
                    },
                ))
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// A recorded frame's file moved (the rejected-frames action). A stale record of a
    /// file that was once at the new path (and is not there now) gives way.
    pub fn set_path(&mut self, id: i64, path: &str) -> Result<(), StoreError> {
        let err_path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: err_path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        tx.execute(
            "DELETE FROM frames WHERE rig = ?3 AND path = ?2 AND id != ?1",
            params![id, path, self.rig],
        )
        .map_err(err)?;
        tx.execute(
            "UPDATE frames SET path = ?2 WHERE id = ?1",
            params![id, path],
        )
        .map_err(err)?;
        tx.commit().map_err(err)
    }

    /// Record where a frame sits on its group's reference frame.
    pub fn set_placement(&self, id: i64, p: &Placement) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET placement_json = ?2, registration_rms_px = ?3 WHERE id = ?1",
            params![id, serde_json::to_string(p).ok(), p.rms_px],
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
            params![
                id,
                judgement.verdict.as_str(),
                reasons,
                transparency_loss_mag,
                explanations
            ],
        )
    }

    /// The last `n` judged frames of one night-target-filter group, newest last: path,
    /// live verdict and its explanations.
    pub fn latest_live_judgements(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
        n: usize,
    ) -> Result<Vec<(String, Verdict, Vec<String>)>, StoreError> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT path, live_verdict, live_explanations_json FROM frames
                 WHERE night = ?1 AND target IS ?2 AND filter IS ?3 AND live_verdict IS NOT NULL
                 ORDER BY COALESCE(time_unix, recorded_at) DESC, id DESC LIMIT ?4",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![night, target, filter, n as i64], |r| {
                Ok((
                    r.get::<_, String>(0)?,
                    r.get::<_, String>(1)?,
                    r.get::<_, Option<String>>(2)?,
                ))
            })
            .map_err(|e| self.err(e))?;
        let mut out = Vec::new();
        for row in rows {
            let (path, verdict, explanations) = row.map_err(|e| self.err(e))?;
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

    /// Record a frame's verdict and reasons.
    pub fn set_verdict(
        &self,
        id: i64,
        verdict: Verdict,
        reasons: &[String],
    ) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET verdict = ?2, reasons_json = ?3 WHERE id = ?1",
            params![
                id,
                verdict.as_str(),
                serde_json::to_string(reasons).unwrap_or_default()
            ],
        )
    }

    /// Store verdicts judged again for the whole night (path, verdict, reasons), in one
    /// transaction. Returns the frames whose verdict or reasons changed.
    pub fn update_verdicts(
        &mut self,
        verdicts: &[(String, Verdict, Vec<String>)],
    ) -> Result<Vec<VerdictChange>, StoreError> {
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        let mut changed = Vec::new();
        {
            let mut before = tx
                .prepare_cached("SELECT verdict FROM frames WHERE rig = ?2 AND path = ?1")
                .map_err(err)?;
            let mut st = tx
                .prepare_cached(
                    "UPDATE frames SET verdict = ?2, reasons_json = ?3
                     WHERE rig = ?4 AND path = ?1 AND (verdict IS NOT ?2 OR reasons_json IS NOT ?3)",
                )
                .map_err(err)?;
            for (p, verdict, reasons) in verdicts {
                let reasons = serde_json::to_string(reasons).unwrap_or_default();
                let was: Option<String> = before
                    .query_row(params![p, self.rig], |row| row.get(0))
                    .optional()
                    .map_err(err)?
                    .flatten();
                if st
                    .execute(params![p, verdict.as_str(), reasons, self.rig])
                    .map_err(err)?
                    > 0
                {
                    changed.push(VerdictChange {
                        path: p.clone(),
                        before: was.as_deref().and_then(Verdict::from_name),
                        after: *verdict,
                    });
                }
            }
        }
        tx.commit().map_err(err)?;
        Ok(changed)
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
            "SELECT path FROM frames WHERE night = ?1 AND target IS ?2 AND filter IS ?3
             AND status = 'ok' AND (verdict = 'ok' OR (?4 AND verdict = 'warn'))
             ORDER BY COALESCE(time_unix, recorded_at), id",
            params![night, target, filter, with_warned],
        )
    }

    /// The (target, filter) groups of one night's frames.
    pub fn night_groups(&self, night: &str) -> Result<Vec<TargetFilter>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT DISTINCT target, filter FROM frames WHERE night = ?1 AND status != 'skipped'
                 ORDER BY target, filter",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![night], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Counts for one night.
    /// The night of the frame recorded last that carries a readable DATE-OBS: the
    /// night in progress as the frames themselves place it.
    pub fn latest_dated_night(&self) -> Result<Option<String>, StoreError> {
        Ok(self
            .strings(
                "SELECT night FROM frames WHERE time_unix IS NOT NULL AND night IS NOT NULL
                 ORDER BY recorded_at DESC, id DESC LIMIT 1",
                [],
            )?
            .pop())
    }

    /// The night labels that hold frames, oldest first.
    pub fn nights(&self) -> Result<Vec<String>, StoreError> {
        self.strings(
            "SELECT DISTINCT night FROM frames WHERE night IS NOT NULL ORDER BY night",
            [],
        )
    }

    pub fn night_counts(&self, night: &str) -> Result<NightCounts, StoreError> {
        self.conn
            .query_row(
                "SELECT COUNT(*),
                        COALESCE(SUM(status = 'ok'), 0),
                        COALESCE(SUM(status = 'error'), 0),
                        COALESCE(SUM(status = 'skipped'), 0),
                        COALESCE(SUM(verdict = 'warn'), 0),
                        COALESCE(SUM(verdict = 'reject'), 0),
                        COALESCE(SUM(time_unix IS NULL), 0),
                        MAX(time_unix), MAX(recorded_at)
                 FROM frames WHERE night = ?1",
                params![night],
                |r| {
                    Ok(NightCounts {
                        frames: r.get(0)?,
                        measured: r.get(1)?,
                        errors: r.get(2)?,
                        skipped: r.get(3)?,
                        warned: r.get(4)?,
                        rejected: r.get(5)?,
                        undated: r.get(6)?,
                        last_frame_time_unix: r.get(7)?,
                        last_recorded_unix: r.get(8)?,
                    })
                },
            )
            .map_err(|e| self.err(e))
    }

    /// The first column of every row of a query, as text.
    fn strings(&self, sql: &str, values: impl rusqlite::Params) -> Result<Vec<String>, StoreError> {
        let mut st = self.conn.prepare(sql).map_err(|e| self.err(e))?;
        let rows = st
            .query_map(values, |r| r.get(0))
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }
}
