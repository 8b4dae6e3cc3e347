//! The SQLite store: the only module that speaks SQL. One file, WAL mode, a schema version
//! and forward migrations. A frame and its stars are written in one transaction, and a
//! path holds one record: the same file (path, size, modification time) is recorded
//! once however often the daemon is killed and restarted, and a newer version of a file
//! replaces its earlier record, stars and verdict. Files being read are remembered, so
//! one that was in the reader when the process died is not retried for ever.

use std::path::{Path, PathBuf};

use rusqlite::{params, Connection, OptionalExtension};
use serde::Serialize;

use crate::measure::Rejected;
use crate::night::judge::Placement;
use crate::record::{FrameRecord, FrameStatus, Identity, StarRecord};

#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("another subwatch daemon (process {pid}) is using the store {path}; stop it first, or give this one a store of its own")]
    InUse { path: PathBuf, pid: String },
    #[error("store {path}: cannot take the daemon's lock {lock}: {source}")]
    Lock {
        path: PathBuf,
        lock: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("store {path}: {source}")]
    Sqlite {
        path: PathBuf,
        #[source]
        source: rusqlite::Error,
    },
    #[error("store {path}: schema version {found} is newer than this program understands ({known}); upgrade subwatch")]
    TooNew {
        path: PathBuf,
        found: i64,
        known: i64,
    },
}

/// A message in the outbox: formatted bytes (RFC 5322) and the envelope.
#[derive(Debug, Clone, PartialEq)]
pub struct OutboxMessage {
    pub subject: String,
    pub from: String,
    pub to: Vec<String>,
    pub bytes: Vec<u8>,
}

/// A row for reports and status.
#[derive(Debug, Clone, Serialize)]
pub struct StoredFrame {
    pub id: i64,
    pub path: String,
    pub status: String,
    pub error: Option<String>,
    pub night: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    pub time_unix: Option<f64>,
    pub metrics: Option<serde_json::Value>,
    pub recorded_at: f64,
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
    pub last_frame_time_unix: Option<f64>,
    pub last_recorded_unix: Option<f64>,
}

pub const SCHEMA_VERSION: i64 = 6;

const MIGRATIONS: &[&str] = &[
    // 1: frames, their stars and rejected detections, and a key-value table.
    "CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
     CREATE TABLE frames (
        id INTEGER PRIMARY KEY,
        path TEXT NOT NULL,
        size INTEGER NOT NULL,
        mtime_ns INTEGER NOT NULL,
        status TEXT NOT NULL,
        error TEXT,
        night TEXT,
        target TEXT,
        filter TEXT,
        time_unix REAL,
        header_json TEXT,
        metrics_json TEXT,
        star_count INTEGER,
        fwhm_px REAL,
        eccentricity REAL,
        background_adu REAL,
        noise_adu REAL,
        recorded_at REAL NOT NULL,
        UNIQUE (path, size, mtime_ns)
     );
     CREATE INDEX frames_night ON frames (night, target, filter);
     CREATE TABLE stars (
        frame_id INTEGER NOT NULL REFERENCES frames (id) ON DELETE CASCADE,
        x REAL NOT NULL, y REAL NOT NULL, flux REAL, fwhm_px REAL, eccentricity REAL,
        snr REAL, ra_deg REAL, dec_deg REAL, r REAL, g REAL, b REAL
     );
     CREATE INDEX stars_frame ON stars (frame_id);
     CREATE TABLE rejected (
        frame_id INTEGER NOT NULL REFERENCES frames (id) ON DELETE CASCADE,
        x REAL NOT NULL, y REAL NOT NULL, kind TEXT NOT NULL, peak_adu REAL
     );",
    // 2: each frame's WCS; the catalogue of persistent sources each night, per target,
    // against which later nights look for new sources.
    "ALTER TABLE frames ADD COLUMN wcs_json TEXT;
     ALTER TABLE stars ADD COLUMN flux_err REAL;
     ALTER TABLE stars ADD COLUMN blended INTEGER;
     ALTER TABLE frames ADD COLUMN verdict TEXT;
     ALTER TABLE frames ADD COLUMN transparency_loss_mag REAL;
     ALTER TABLE frames ADD COLUMN registration_rms_px REAL;
     ALTER TABLE frames ADD COLUMN reasons_json TEXT;
     CREATE TABLE catalog_nights (
        target TEXT NOT NULL, night TEXT NOT NULL, limit_mag REAL NOT NULL,
        footprint_json TEXT,
        PRIMARY KEY (target, night)
     );
     CREATE TABLE catalog (
        target TEXT NOT NULL, night TEXT NOT NULL,
        ra_deg REAL NOT NULL, dec_deg REAL NOT NULL, mag REAL
     );
     CREATE INDEX catalog_target ON catalog (target, night);",
    // 3: the mail outbox. A message waits here until the server took it, across
    // restarts, so a summary is never lost.
    "CREATE TABLE outbox (
        id INTEGER PRIMARY KEY,
        created_unix REAL NOT NULL,
        subject TEXT NOT NULL,
        envelope_from TEXT NOT NULL,
        envelope_to TEXT NOT NULL,
        message BLOB NOT NULL,
        status TEXT NOT NULL DEFAULT 'queued',
        attempts INTEGER NOT NULL DEFAULT 0,
        next_attempt_unix REAL NOT NULL,
        last_error TEXT,
        done_unix REAL
     );",
    // 4: live alerts sent, which also carry the rate limit across restarts.
    "CREATE TABLE alerts (
        id INTEGER PRIMARY KEY,
        night TEXT NOT NULL,
        kind TEXT NOT NULL,
        created_unix REAL NOT NULL,
        message TEXT NOT NULL
     );",
    // 5: one record per path (a rewritten file replaces its record; where a file was
    // recorded twice before, the newer record stays), and the files being read, which
    // outlive a crash of the process reading them.
    "DELETE FROM frames WHERE id NOT IN (SELECT MAX(id) FROM frames GROUP BY path);
     CREATE UNIQUE INDEX frames_path ON frames (path);
     CREATE TABLE reading (
        path TEXT PRIMARY KEY,
        size INTEGER NOT NULL,
        mtime_ns INTEGER NOT NULL,
        started_unix REAL NOT NULL,
        interruptions INTEGER NOT NULL DEFAULT 0
     );",
    // 6: each frame's placement on its group's reference (the night model's first step,
    // kept so a live verdict registers only the new frame), and the verdict it got live.
    "ALTER TABLE frames ADD COLUMN placement_json TEXT;
     ALTER TABLE frames ADD COLUMN live_verdict TEXT;
     ALTER TABLE frames ADD COLUMN live_reasons_json TEXT;",
];

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

pub struct Store {
    conn: Connection,
    path: PathBuf,
}

/// A daemon's claim on its store: an exclusive lock (flock) on `<store>.lock`, which
/// holds the daemon's process id. The kernel releases it when the process ends, however
/// it ends, so a killed daemon never leaves a stale claim behind.
pub struct DaemonLock {
    _file: std::fs::File,
}

fn lock_path(store: &Path) -> PathBuf {
    let mut name = store.as_os_str().to_owned();
    name.push(".lock");
    PathBuf::from(name)
}

fn try_flock(file: &std::fs::File, mode: libc::c_int) -> std::io::Result<bool> {
    use std::os::fd::AsRawFd;
    // SAFETY: flock on a file descriptor this function borrows.
    if unsafe { libc::flock(file.as_raw_fd(), mode | libc::LOCK_NB) } == 0 {
        return Ok(true);
    }
    let e = std::io::Error::last_os_error();
    if e.raw_os_error() == Some(libc::EWOULDBLOCK) {
        Ok(false)
    } else {
        Err(e)
    }
}

/// Claim `store` for this daemon; refused while another daemon holds it.
pub fn claim(store: &Path) -> Result<DaemonLock, StoreError> {
    use std::io::{Seek, Write};
    let lock = lock_path(store);
    let fail = |source| StoreError::Lock {
        path: store.to_path_buf(),
        lock: lock.clone(),
        source,
    };
    let mut file = std::fs::OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .open(&lock)
        .map_err(fail)?;
    if !try_flock(&file, libc::LOCK_EX).map_err(fail)? {
        let pid = std::fs::read_to_string(&lock).unwrap_or_default();
        return Err(StoreError::InUse {
            path: store.to_path_buf(),
            pid: pid.trim().to_string(),
        });
    }
    file.set_len(0).map_err(fail)?;
    file.rewind().map_err(fail)?;
    writeln!(file, "{}", std::process::id()).map_err(fail)?;
    Ok(DaemonLock { _file: file })
}

/// The process id of the daemon that holds `store` now, if one does.
pub fn daemon_pid(store: &Path) -> Option<u32> {
    let lock = lock_path(store);
    let file = std::fs::File::open(&lock).ok()?;
    match try_flock(&file, libc::LOCK_SH) {
        // Nobody holds it (the lock goes when this file closes).
        Ok(true) => None,
        Ok(false) => std::fs::read_to_string(&lock).ok()?.trim().parse().ok(),
        Err(_) => None,
    }
}

impl Store {
    /// Open (creating if needed) and migrate the store.
    pub fn open(path: &Path) -> Result<Self, StoreError> {
        let err = |source| StoreError::Sqlite {
            path: path.to_path_buf(),
            source,
        };
        let conn = Connection::open(path).map_err(err)?;
        conn.busy_timeout(std::time::Duration::from_secs(10))
            .map_err(err)?;
        conn.execute_batch(
            "PRAGMA journal_mode = WAL; PRAGMA synchronous = NORMAL; PRAGMA foreign_keys = ON;",
        )
        .map_err(err)?;
        let mut store = Store {
            conn,
            path: path.to_path_buf(),
        };
        store.migrate()?;
        Ok(store)
    }

    fn err(&self, source: rusqlite::Error) -> StoreError {
        StoreError::Sqlite {
            path: self.path.clone(),
            source,
        }
    }

    /// Run one statement that returns no rows.
    fn run(&self, sql: &str, values: impl rusqlite::Params) -> Result<(), StoreError> {
        self.conn
            .execute(sql, values)
            .map(|_| ())
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

    fn migrate(&mut self) -> Result<(), StoreError> {
        let version: i64 = self
            .conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(|e| self.err(e))?;
        if version > SCHEMA_VERSION {
            return Err(StoreError::TooNew {
                path: self.path.clone(),
                found: version,
                known: SCHEMA_VERSION,
            });
        }
        for (i, sql) in MIGRATIONS.iter().enumerate().skip(version as usize) {
            let tx = self.conn.transaction().map_err(|e| StoreError::Sqlite {
                path: self.path.clone(),
                source: e,
            })?;
            tx.execute_batch(sql)
                .and_then(|_| tx.execute_batch(&format!("PRAGMA user_version = {}", i + 1)))
                .and_then(|_| tx.commit())
                .map_err(|e| StoreError::Sqlite {
                    path: self.path.clone(),
                    source: e,
                })?;
        }
        Ok(())
    }

    /// Whether this exact file (path, size, time) is already recorded.
    pub fn contains(&self, id: &Identity) -> Result<bool, StoreError> {
        self.conn
            .query_row(
                "SELECT 1 FROM frames WHERE path = ?1 AND size = ?2 AND mtime_ns = ?3",
                params![id.path, id.size as i64, id.mtime_ns],
                |_| Ok(()),
            )
            .optional()
            .map(|r| r.is_some())
            .map_err(|e| self.err(e))
    }

    /// Record a frame with its stars, atomically. Returns false when this version of the
    /// file was already recorded (nothing is written then).
    pub fn record(&mut self, f: &FrameRecord, now_unix: f64) -> Result<bool, StoreError> {
        self.record_frame(f, now_unix)
            .map(|r| r != Recorded::Already)
    }

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
                "SELECT id, size, mtime_ns, night, target, filter, status FROM frames WHERE path = ?1",
                params![f.identity.path],
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
                    "DELETE FROM reading WHERE path = ?1",
                    params![f.identity.path],
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
                background_adu, noise_adu, recorded_at, wcs_json)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18)",
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
            "DELETE FROM reading WHERE path = ?1",
            params![f.identity.path],
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
            "INSERT INTO reading (path, size, mtime_ns, started_unix) VALUES (?1, ?2, ?3, ?4)
             ON CONFLICT (path) DO UPDATE SET started_unix = excluded.started_unix,
                interruptions = CASE WHEN size = excluded.size AND mtime_ns = excluded.mtime_ns
                                     THEN interruptions ELSE 0 END,
                size = excluded.size, mtime_ns = excluded.mtime_ns",
            params![id.path, id.size as i64, id.mtime_ns, now_unix],
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
        tx.execute("UPDATE reading SET interruptions = interruptions + 1", [])
            .map_err(err)?;
        let rows = {
            let mut st = tx
                .prepare("SELECT path, size, mtime_ns, interruptions FROM reading ORDER BY path")
                .map_err(err)?;
            let rows = st
                .query_map([], |r| {
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
            .prepare("SELECT path, size, mtime_ns FROM frames")
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([], |r| {
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
                        metrics_json, wcs_json, header_json, placement_json
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

    /// Frames of one night, in time order.
    pub fn frames_of_night(&self, night: &str) -> Result<Vec<StoredFrame>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT id, path, status, error, night, target, filter, time_unix, metrics_json, recorded_at
                 FROM frames WHERE night = ?1 ORDER BY COALESCE(time_unix, recorded_at), id",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![night], |r| {
                let metrics: Option<String> = r.get(8)?;
                Ok(StoredFrame {
                    id: r.get(0)?,
                    path: r.get(1)?,
                    status: r.get(2)?,
                    error: r.get(3)?,
                    night: r.get(4)?,
                    target: r.get(5)?,
                    filter: r.get(6)?,
                    time_unix: r.get(7)?,
                    metrics: metrics.and_then(|m| serde_json::from_str(&m).ok()),
                    recorded_at: r.get(9)?,
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
            "DELETE FROM frames WHERE path = ?2 AND id != ?1",
            params![id, path],
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
        verdict: &str,
        reasons: &[String],
        transparency_loss_mag: Option<f64>,
    ) -> Result<(), StoreError> {
        let reasons = serde_json::to_string(reasons).unwrap_or_default();
        self.run(
            "UPDATE frames SET verdict = ?2, reasons_json = ?3, live_verdict = ?2,
                live_reasons_json = ?3, transparency_loss_mag = ?4 WHERE id = ?1",
            params![id, verdict, reasons, transparency_loss_mag],
        )
    }

    /// Record a frame's verdict and reasons.
    pub fn set_verdict(
        &self,
        id: i64,
        verdict: &str,
        reasons: &[String],
    ) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET verdict = ?2, reasons_json = ?3 WHERE id = ?1",
            params![
                id,
                verdict,
                serde_json::to_string(reasons).unwrap_or_default()
            ],
        )
    }

    /// Store verdicts judged again for the whole night (path, verdict, reasons), in one
    /// transaction. Returns how many changed.
    pub fn update_verdicts(
        &mut self,
        verdicts: &[(String, String, Vec<String>)],
    ) -> Result<usize, StoreError> {
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        let mut changed = 0;
        {
            let mut st = tx
                .prepare_cached(
                    "UPDATE frames SET verdict = ?2, reasons_json = ?3
                     WHERE path = ?1 AND (verdict IS NOT ?2 OR reasons_json IS NOT ?3)",
                )
                .map_err(err)?;
            for (p, verdict, reasons) in verdicts {
                let reasons = serde_json::to_string(reasons).unwrap_or_default();
                changed += st.execute(params![p, verdict, reasons]).map_err(err)?;
            }
        }
        tx.commit().map_err(err)?;
        Ok(changed)
    }

    /// Paths of the frames of one night, target and filter whose verdict is not reject.
    pub fn accepted_paths(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
    ) -> Result<Vec<String>, StoreError> {
        self.strings(
            "SELECT path FROM frames WHERE night = ?1 AND target IS ?2 AND filter IS ?3
             AND status = 'ok' AND verdict IN ('ok', 'warn') ORDER BY COALESCE(time_unix, recorded_at), id",
            params![night, target, filter],
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
    pub fn night_counts(&self, night: &str) -> Result<NightCounts, StoreError> {
        self.conn
            .query_row(
                "SELECT COUNT(*),
                        COALESCE(SUM(status = 'ok'), 0),
                        COALESCE(SUM(status = 'error'), 0),
                        COALESCE(SUM(status = 'skipped'), 0),
                        COALESCE(SUM(verdict = 'warn'), 0),
                        COALESCE(SUM(verdict = 'reject'), 0),
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
                        last_frame_time_unix: r.get(6)?,
                        last_recorded_unix: r.get(7)?,
                    })
                },
            )
            .map_err(|e| self.err(e))
    }

    /// Replace the catalogue of `target` for `night`.
    pub fn save_catalog(
        &mut self,
        target: &str,
        night: &str,
        limit_mag: f64,
        footprint: &[(f64, f64)],
        sources: &[crate::night::CatalogSource],
    ) -> Result<(), StoreError> {
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        tx.execute(
            "DELETE FROM catalog WHERE target = ?1 AND night = ?2",
            params![target, night],
        )
        .map_err(err)?;
        tx.execute(
            "INSERT OR REPLACE INTO catalog_nights (target, night, limit_mag, footprint_json) VALUES (?1, ?2, ?3, ?4)",
            params![target, night, limit_mag, serde_json::to_string(footprint).ok()],
        )
        .map_err(err)?;
        {
            let mut st = tx
                .prepare_cached("INSERT INTO catalog (target, night, ra_deg, dec_deg, mag) VALUES (?1, ?2, ?3, ?4, ?5)")
                .map_err(err)?;
            for s in sources {
                st.execute(params![target, night, s.ra_deg, s.dec_deg, s.mag])
                    .map_err(err)?;
            }
        }
        tx.commit().map_err(err)
    }

    /// Catalogues of `target` from nights before `night`, newest first.
    pub fn earlier_catalogs(
        &self,
        target: &str,
        night: &str,
    ) -> Result<Vec<crate::night::EarlierNight>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT night, limit_mag, footprint_json FROM catalog_nights
                 WHERE target = ?1 AND night < ?2 ORDER BY night DESC",
            )
            .map_err(|e| self.err(e))?;
        let nights: Vec<(String, f64, Option<String>)> = st
            .query_map(params![target, night], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            })
            .map_err(|e| self.err(e))?
            .collect::<Result<_, _>>()
            .map_err(|e| self.err(e))?;
        let mut out = Vec::new();
        for (n, limit_mag, footprint) in nights {
            let footprint: Vec<(f64, f64)> = footprint
                .and_then(|f| serde_json::from_str(&f).ok())
                .unwrap_or_default();
            let mut q = self
                .conn
                .prepare(
                    "SELECT ra_deg, dec_deg, mag FROM catalog WHERE target = ?1 AND night = ?2",
                )
                .map_err(|e| self.err(e))?;
            let sources = q
                .query_map(params![target, n], |r| {
                    Ok(crate::night::CatalogSource {
                        ra_deg: r.get(0)?,
                        dec_deg: r.get(1)?,
                        mag: r.get(2)?,
                    })
                })
                .map_err(|e| self.err(e))?
                .collect::<Result<_, _>>()
                .map_err(|e| self.err(e))?;
            out.push(crate::night::EarlierNight {
                night: n,
                sources,
                limit_mag,
                footprint,
            });
        }
        Ok(out)
    }

    /// Put a message in the outbox; returns its id.
    pub fn enqueue_mail(&self, c: &OutboxMessage, now_unix: f64) -> Result<i64, StoreError> {
        self.conn
            .execute(
                "INSERT INTO outbox (created_unix, subject, envelope_from, envelope_to, message, next_attempt_unix)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?1)",
                params![now_unix, c.subject, c.from, serde_json::to_string(&c.to).unwrap_or_default(), c.bytes],
            )
            .map_err(|e| self.err(e))?;
        Ok(self.conn.last_insert_rowid())
    }

    /// Messages due for (another) attempt.
    pub fn due_mail(&self, now_unix: f64) -> Result<Vec<(i64, OutboxMessage, i64)>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT id, subject, envelope_from, envelope_to, message, attempts FROM outbox
                 WHERE status = 'queued' AND next_attempt_unix <= ?1 ORDER BY id",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![now_unix], |r| {
                let to: String = r.get(3)?;
                Ok((
                    r.get(0)?,
                    OutboxMessage {
                        subject: r.get(1)?,
                        from: r.get(2)?,
                        to: serde_json::from_str(&to).unwrap_or_default(),
                        bytes: r.get(4)?,
                    },
                    r.get(5)?,
                ))
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Mark a message delivered (`status` "sent") or written to a file ("written").
    pub fn mail_done(&self, id: i64, status: &str, now_unix: f64) -> Result<(), StoreError> {
        self.run(
            "UPDATE outbox SET status = ?2, done_unix = ?3 WHERE id = ?1",
            params![id, status, now_unix],
        )
    }

    /// Record a failed attempt and when to try again.
    pub fn mail_failed(
        &self,
        id: i64,
        error: &str,
        next_attempt_unix: f64,
    ) -> Result<(), StoreError> {
        self.run(
            "UPDATE outbox SET attempts = attempts + 1, last_error = ?2, next_attempt_unix = ?3 WHERE id = ?1",
            params![id, error, next_attempt_unix],
        )
    }

    /// When an alert of `kind` last went out, and how many went out for `night`.
    pub fn alert_history(
        &self,
        night: &str,
        kind: &str,
    ) -> Result<(Option<f64>, usize), StoreError> {
        let last: Option<f64> = self
            .conn
            .query_row(
                "SELECT MAX(created_unix) FROM alerts WHERE kind = ?1",
                params![kind],
                |r| r.get(0),
            )
            .map_err(|e| self.err(e))?;
        let count: i64 = self
            .conn
            .query_row(
                "SELECT COUNT(*) FROM alerts WHERE night = ?1",
                params![night],
                |r| r.get(0),
            )
            .map_err(|e| self.err(e))?;
        Ok((last, count as usize))
    }

    /// Whether this exact alert (night, kind, message) was raised already.
    pub fn alert_exists(&self, night: &str, kind: &str, message: &str) -> Result<bool, StoreError> {
        self.conn
            .query_row(
                "SELECT 1 FROM alerts WHERE night = ?1 AND kind = ?2 AND message = ?3",
                params![night, kind, message],
                |_| Ok(()),
            )
            .optional()
            .map(|r| r.is_some())
            .map_err(|e| self.err(e))
    }

    pub fn add_alert(
        &self,
        night: &str,
        kind: &str,
        message: &str,
        now_unix: f64,
    ) -> Result<(), StoreError> {
        self.run(
            "INSERT INTO alerts (night, kind, created_unix, message) VALUES (?1, ?2, ?3, ?4)",
            params![night, kind, now_unix, message],
        )
    }

    /// Verdicts of one night-target-filter group, oldest first.
    pub fn group_verdicts(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
    ) -> Result<Vec<String>, StoreError> {
        self.strings(
            "SELECT verdict FROM frames WHERE night = ?1 AND target IS ?2 AND filter IS ?3
             AND verdict IS NOT NULL ORDER BY COALESCE(time_unix, recorded_at), id",
            params![night, target, filter],
        )
    }

    pub fn set_meta(&self, key: &str, value: &str) -> Result<(), StoreError> {
        self.run(
            "INSERT INTO meta (key, value) VALUES (?1, ?2) ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            params![key, value],
        )
    }

    pub fn meta(&self, key: &str) -> Result<Option<String>, StoreError> {
        self.conn
            .query_row("SELECT value FROM meta WHERE key = ?1", params![key], |r| {
                r.get(0)
            })
            .optional()
            .map_err(|e| self.err(e))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn record(path: &str, size: u64) -> FrameRecord {
        FrameRecord {
            identity: Identity {
                path: path.into(),
                size,
                mtime_ns: 7,
            },
            status: FrameStatus::Ok,
            error: None,
            night: Some("2026-03-14".into()),
            target: Some("Kestrel Field A".into()),
            filter: Some("L".into()),
            time_unix: Some(1.0),
            header: None,
            metrics: None,
            stars: Vec::new(),
            rejected: Vec::new(),
            wcs: None,
        }
    }

    #[test]
    fn a_path_holds_one_record_and_a_newer_file_replaces_it() {
        let dir = tempfile::tempdir().unwrap();
        let mut s = Store::open(&dir.path().join("s.db")).unwrap();
        let first = s.record_frame(&record("/a.fits", 10), 1.0).unwrap();
        assert!(matches!(first, Recorded::New(_)));
        s.set_verdict(first.id().unwrap(), "reject", &["fwhm_high".into()])
            .unwrap();
        assert_eq!(
            s.record_frame(&record("/a.fits", 10), 2.0).unwrap(),
            Recorded::Already
        );
        let mut newer = record("/a.fits", 11);
        newer.stars.push(crate::record::StarRecord {
            x: 1.0,
            y: 2.0,
            ..star()
        });
        let replaced = s.record_frame(&newer, 3.0).unwrap();
        let Recorded::Replaced { id, earlier } = replaced else {
            panic!("{replaced:?}")
        };
        assert_eq!(earlier.filter.as_deref(), Some("L"));
        assert_eq!(s.night_counts("2026-03-14").unwrap().frames, 1);
        // The earlier version's stars and verdict went with its record.
        assert_eq!(s.frame_star_records(id).unwrap().len(), 1);
        assert_eq!(s.frames_without_verdict().unwrap().len(), 1);
        // Reopening migrates nothing and keeps the row.
        drop(s);
        let s = Store::open(&dir.path().join("s.db")).unwrap();
        assert_eq!(s.recorded_versions().unwrap()["/a.fits"], (11, 7));
    }

    #[test]
    fn a_second_daemon_is_refused_and_a_gone_one_leaves_no_claim() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("s.db");
        assert_eq!(daemon_pid(&db), None);
        let first = claim(&db).unwrap();
        assert_eq!(daemon_pid(&db), Some(std::process::id()));
        let refused = claim(&db).err().expect("a second claim is refused");
        assert!(
            refused
                .to_string()
                .contains(&format!("process {}", std::process::id())),
            "{refused}"
        );
        drop(first);
        assert_eq!(daemon_pid(&db), None);
        assert!(claim(&db).is_ok());
    }

    #[test]
    fn a_file_in_the_reader_when_the_process_died_is_counted_not_retried_for_ever() {
        let dir = tempfile::tempdir().unwrap();
        let mut s = Store::open(&dir.path().join("s.db")).unwrap();
        let a = record("/a.fits", 10).identity;
        s.begin_reading(&a, 1.0).unwrap();
        // The process died; at each start the mark counts one more interruption.
        for n in 1..=3 {
            let left = s.take_interrupted().unwrap();
            assert_eq!(
                left,
                vec![Interrupted {
                    identity: a.clone(),
                    interruptions: n
                }]
            );
            s.begin_reading(&a, 2.0).unwrap();
        }
        // A changed file starts counting again; a record clears the mark.
        let mut b = a.clone();
        b.size = 12;
        s.begin_reading(&b, 3.0).unwrap();
        assert_eq!(s.take_interrupted().unwrap()[0].interruptions, 1);
        s.record_frame(&record("/a.fits", 12), 4.0).unwrap();
        assert!(s.take_interrupted().unwrap().is_empty());
    }

    #[test]
    fn the_migration_keeps_the_newest_record_of_a_path_recorded_twice() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("s.db");
        {
            // A store as version 4 left it: the same path twice.
            let conn = Connection::open(&db).unwrap();
            for (i, sql) in MIGRATIONS.iter().take(4).enumerate() {
                conn.execute_batch(sql).unwrap();
                conn.execute_batch(&format!("PRAGMA user_version = {}", i + 1))
                    .unwrap();
            }
            for (size, t) in [(10, 1.0), (11, 2.0)] {
                conn.execute(
                    "INSERT INTO frames (path, size, mtime_ns, status, recorded_at) VALUES ('/a.fits', ?1, 7, 'ok', ?2)",
                    params![size, t],
                )
                .unwrap();
            }
        }
        let s = Store::open(&db).unwrap();
        assert_eq!(s.recorded_versions().unwrap().len(), 1);
        assert_eq!(s.recorded_versions().unwrap()["/a.fits"].0, 11);
    }

    fn star() -> crate::record::StarRecord {
        crate::record::StarRecord {
            x: 0.0,
            y: 0.0,
            flux: 1.0,
            fwhm_px: 3.0,
            eccentricity: 0.1,
            snr: 50.0,
            flux_err: 0.1,
            hfr_px: None,
            fwhm_major_px: 3.0,
            fwhm_minor_px: 3.0,
            angle_deg: 0.0,
            psf_flux: 1.0,
            psf_model: crate::measure::psf::PsfModel::Gaussian,
            moffat_beta: None,
            peak_adu: 1.0,
            blended: false,
            ra_deg: None,
            dec_deg: None,
            rgb: None,
        }
    }
}
