//! Frames: one record per path (recorded once, replaced by a newer version of the file),
//! their stars and rejected detections, the marks of files being read, placements and
//! verdicts, and the queries of a night's frames.
//! About 600 lines: every query of the frames table, in one place beside its schema.

use serde::Serialize;

use super::db::{values, DbError, Row, Value};
use super::{Store, StoreError};
use crate::measure::Rejected;
use crate::night::register::Placement;
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

/// A frame row's group, from columns night, target, filter, status at `at`.
fn group_key(r: &Row, at: usize) -> Result<GroupKey, DbError> {
    let status: String = r.get(at + 3)?;
    Ok(GroupKey {
        night: r.get(at)?,
        target: r.get(at + 1)?,
        filter: r.get(at + 2)?,
        ok: status == "ok",
        skipped: status == "skipped",
    })
}

/// The columns `frame_rows` reads, in the order `frame_from_row` expects.
const FRAME_COLUMNS: &str = "id, path, size, mtime_ns, status, error, night, target, filter,
    time_unix, metrics_json, wcs_json, header_json, placement_json, calibration_json";

fn frame_from_row(r: &Row) -> Result<(i64, FrameRecord, Option<Placement>), DbError> {
    let status: String = r.get(4)?;
    let json = |k: usize| -> Result<Option<String>, DbError> { r.get(k) };
    Ok((
        r.get(0)?,
        FrameRecord {
            identity: Identity {
                path: r.get(1)?,
                size: r.get::<i64>(2)? as u64,
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
}

fn star_from_row(r: &Row) -> Result<StarRecord, DbError> {
    let flux: f64 = r.get::<Option<f64>>(2)?.unwrap_or(0.0);
    let fwhm: f64 = r.get::<Option<f64>>(3)?.unwrap_or(f64::NAN);
    let rgb: [Option<f64>; 3] = [r.get(8)?, r.get(9)?, r.get(10)?];
    Ok(StarRecord {
        x: r.get(0)?,
        y: r.get(1)?,
        flux,
        fwhm_px: fwhm,
        eccentricity: r.get::<Option<f64>>(4)?.unwrap_or(f64::NAN),
        snr: r.get::<Option<f64>>(5)?.unwrap_or(0.0),
        flux_err: r.get::<Option<f64>>(11)?.unwrap_or(f64::NAN),
        hfr_px: None,
        fwhm_major_px: fwhm,
        fwhm_minor_px: fwhm,
        angle_deg: 0.0,
        psf_flux: flux,
        psf_model: crate::measure::psf::PsfModel::Gaussian,
        moffat_beta: None,
        peak_adu: f64::NAN,
        blended: r.get::<Option<i64>>(12)?.unwrap_or(0) != 0,
        ra_deg: r.get(6)?,
        dec_deg: r.get(7)?,
        rgb: rgb.iter().any(|c| c.is_some()).then_some(rgb),
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

    /// Frame rows as records (stars and rejected detections left empty), in time order.
    fn frame_rows(
        &self,
        filter: &str,
        values: &[super::db::Value],
    ) -> Result<Vec<(i64, FrameRecord, Option<Placement>)>, StoreError> {
        self.rows(
            &format!(
                "SELECT {FRAME_COLUMNS} FROM frames {filter}
                 ORDER BY COALESCE(time_unix, recorded_at), id"
            ),
            values,
        )?
        .iter()
        .map(frame_from_row)
        .collect::<Result<_, _>>()
        .map_err(|e| self.err(e))
    }

    /// The stars of one frame. Star fields the store does not keep (half-flux radius,
    /// axes, angle, PSF model) come back as their simplest stand-ins.
    pub fn frame_star_records(&self, id: i64) -> Result<Vec<StarRecord>, StoreError> {
        self.rows(
            "SELECT x, y, flux, fwhm_px, eccentricity, snr, ra_deg, dec_deg, r, g, b, flux_err,
                blended
             FROM stars WHERE frame_id = ?1 ORDER BY seq",
            values![id],
        )?
        .iter()
        .map(star_from_row)
        .collect::<Result<_, _>>()
        .map_err(|e| self.err(e))
    }

    fn frame_rejected(&self, id: i64) -> Result<Vec<Rejected>, StoreError> {
        self.rows(
            "SELECT x, y, kind, peak_adu FROM rejected WHERE frame_id = ?1 ORDER BY seq",
            values![id],
        )?
        .iter()
        .map(|r| {
            let kind: String = r.get(2)?;
            Ok(Rejected {
                x: r.get(0)?,
                y: r.get(1)?,
                kind: crate::measure::RejectKind::from_name(&kind)
                    .unwrap_or(crate::measure::RejectKind::Unfit),
                peak_adu: r.get::<Option<f64>>(3)?.unwrap_or(0.0),
            })
        })
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
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

    /// Record where a frame sits on its group's reference frame.
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

    /// Record a frame's verdict and reasons.
    pub fn set_verdict(
        &self,
        id: i64,
        verdict: Verdict,
        reasons: &[String],
    ) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET verdict = ?2, reasons_json = ?3 WHERE id = ?1",
            values![
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
        let c = &self.conn;
        let rig = &self.rig;
        c.transaction(|| {
            let mut changed = Vec::new();
            for (p, verdict, reasons) in verdicts {
                let reasons = serde_json::to_string(reasons).unwrap_or_default();
                let was: Option<String> = match c.query_opt(
                    "SELECT verdict FROM frames WHERE rig = ?2 AND path = ?1",
                    values![p, rig],
                )? {
                    Some(row) => row.get(0)?,
                    None => None,
                };
                let updated = c.execute(
                    "UPDATE frames SET verdict = ?2, reasons_json = ?3
                     WHERE rig = ?4 AND path = ?1
                       AND (verdict IS DISTINCT FROM ?2 OR reasons_json IS DISTINCT FROM ?3)",
                    values![p, verdict.as_str(), reasons, rig],
                )?;
                if updated > 0 {
                    changed.push(VerdictChange {
                        path: p.clone(),
                        before: was.as_deref().and_then(Verdict::from_name),
                        after: *verdict,
                    });
                }
            }
            Ok::<_, DbError>(changed)
        })
        .map_err(|e| self.err(e))
    }

    /// The verdicts this rig's frames of `night` hold in the store, by path: (verdict,
    /// reasons). A frame not judged yet is left out.
    pub fn stored_verdicts(
        &self,
        night: &str,
    ) -> Result<std::collections::HashMap<String, (Verdict, Vec<String>)>, StoreError> {
        let rows = self.rows(
            "SELECT path, verdict, reasons_json FROM frames
             WHERE night = ?1 AND rig = ?2 AND verdict IS NOT NULL",
            values![night, self.rig],
        )?;
        let mut out = std::collections::HashMap::new();
        for r in &rows {
            let read = || -> Result<(String, String, Option<String>), DbError> {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            };
            let (path, verdict, reasons) = read().map_err(|e| self.err(e))?;
            if let Some(v) = Verdict::from_name(&verdict) {
                let reasons = reasons
                    .and_then(|j| serde_json::from_str(&j).ok())
                    .unwrap_or_default();
                out.insert(path, (v, reasons));
            }
        }
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
    fn strings(&self, sql: &str, values: &[super::db::Value]) -> Result<Vec<String>, StoreError> {
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
