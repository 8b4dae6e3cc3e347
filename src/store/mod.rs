//! The SQLite store: the only module that speaks SQL. One file, WAL mode, a schema version
//! and forward migrations. A frame and its stars are written in one transaction, and a
//! frame's identity (path, size, modification time) is unique, so a frame is recorded
//! exactly once however often the daemon is killed and restarted.

use std::path::{Path, PathBuf};

use rusqlite::{params, Connection, OptionalExtension};
use serde::Serialize;

use crate::contract::{HeaderFacts, Metrics, StarRecord};
use crate::measure::Rejected;

#[derive(Debug, thiserror::Error)]
pub enum StoreError {
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

/// What makes a file the same file: replacing it (new size or time) makes a new frame.
#[derive(Debug, Clone, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
pub struct Identity {
    pub path: String,
    pub size: u64,
    pub mtime_ns: i64,
}

impl Identity {
    pub fn of(path: &Path) -> std::io::Result<Self> {
        let m = std::fs::metadata(path)?;
        let mtime = m.modified()?;
        let mtime_ns = match mtime.duration_since(std::time::UNIX_EPOCH) {
            Ok(d) => d.as_nanos() as i64,
            Err(e) => -(e.duration().as_nanos() as i64),
        };
        Ok(Self {
            path: path.to_string_lossy().into_owned(),
            size: m.len(),
            mtime_ns,
        })
    }
}

/// How a frame ended up.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum FrameStatus {
    Ok,
    Error,
    /// Not a light frame (dark, flat, bias).
    Skipped,
}

impl FrameStatus {
    fn as_str(self) -> &'static str {
        match self {
            FrameStatus::Ok => "ok",
            FrameStatus::Error => "error",
            FrameStatus::Skipped => "skipped",
        }
    }
}

/// Everything recorded about one frame.
#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct FrameRecord {
    pub identity: Identity,
    pub status: FrameStatus,
    pub error: Option<String>,
    pub night: Option<String>,
    /// OBJECT, else the frame's folder name.
    pub target: Option<String>,
    pub filter: Option<String>,
    pub time_unix: Option<f64>,
    pub header: Option<HeaderFacts>,
    pub metrics: Option<Metrics>,
    pub stars: Vec<StarRecord>,
    pub rejected: Vec<Rejected>,
    /// The frame's celestial WCS, when it has one.
    pub wcs: Option<crate::frame::wcs::Wcs>,
}

impl FrameRecord {
    /// A record of a file that could not be measured, with the reason.
    pub fn failed(identity: Identity, reason: &str) -> Self {
        FrameRecord {
            identity,
            status: FrameStatus::Error,
            error: Some(reason.to_string()),
            night: None,
            target: None,
            filter: None,
            time_unix: None,
            header: None,
            metrics: None,
            stars: Vec::new(),
            rejected: Vec::new(),
            wcs: None,
        }
    }
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
#[derive(Debug, Clone)]
pub struct GroupKey {
    pub night: Option<String>,
    pub target: Option<String>,
    pub filter: Option<String>,
    pub ok: bool,
    pub skipped: bool,
}

/// One frame of a night-target-filter group, for live verdicts.
#[derive(Debug, Clone)]
pub struct GroupFrame {
    pub id: i64,
    pub status: String,
    pub metrics: Option<Metrics>,
    pub transparency_loss_mag: Option<f64>,
    pub registration_rms_px: Option<f64>,
    pub time_unix: Option<f64>,
}

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

pub const SCHEMA_VERSION: i64 = 4;

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
];

pub struct Store {
    conn: Connection,
    path: PathBuf,
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

    /// Record a frame with its stars, atomically. Returns false when that identity was
    /// already recorded (nothing is written then).
    pub fn record(&mut self, f: &FrameRecord, now_unix: f64) -> Result<bool, StoreError> {
        self.record_returning_id(f, now_unix).map(|id| id.is_some())
    }

    /// As [`Store::record`], returning the new row's id.
    pub fn record_returning_id(
        &mut self,
        f: &FrameRecord,
        now_unix: f64,
    ) -> Result<Option<i64>, StoreError> {
        let path = self.path.clone();
        let err = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        let tx = self.conn.transaction().map_err(err)?;
        let metrics_json = f
            .metrics
            .as_ref()
            .map(|m| serde_json::to_string(m).unwrap_or_default());
        let header_json = f
            .header
            .as_ref()
            .map(|h| serde_json::to_string(h).unwrap_or_default());
        let m = f.metrics.as_ref();
        let inserted = tx
            .execute(
                "INSERT OR IGNORE INTO frames (path, size, mtime_ns, status, error, night, target, filter,
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
        if inserted == 0 {
            return Ok(None);
        }
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
                let kind = serde_json::to_value(r.kind)
                    .ok()
                    .and_then(|v| v.as_str().map(String::from))
                    .unwrap_or_default();
                rj.execute(params![frame_id, r.x, r.y, kind, r.peak_adu])
                    .map_err(err)?;
            }
        }
        tx.commit().map_err(err)?;
        Ok(Some(frame_id))
    }

    /// All recorded identities (for the catch-up scan).
    pub fn identities(&self) -> Result<std::collections::HashSet<Identity>, StoreError> {
        let mut st = self
            .conn
            .prepare("SELECT path, size, mtime_ns FROM frames")
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([], |r| {
                Ok(Identity {
                    path: r.get(0)?,
                    size: r.get::<_, i64>(1)? as u64,
                    mtime_ns: r.get(2)?,
                })
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Everything recorded for one night, rebuilt as records for the night analysis.
    /// Star fields the store does not keep (half-flux radius, axes, angle, PSF model)
    /// come back as their simplest stand-ins.
    pub fn night_records(&self, night: &str) -> Result<Vec<FrameRecord>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT id, path, size, mtime_ns, status, error, night, target, filter, time_unix,
                        metrics_json, wcs_json, header_json
                 FROM frames WHERE night = ?1 ORDER BY COALESCE(time_unix, recorded_at), id",
            )
            .map_err(|e| self.err(e))?;
        type Row = (i64, FrameRecord);
        let rows: Vec<Row> = st
            .query_map(params![night], |r| {
                let status: String = r.get(4)?;
                let metrics: Option<String> = r.get(10)?;
                let wcs: Option<String> = r.get(11)?;
                let header: Option<String> = r.get(12)?;
                Ok((
                    r.get(0)?,
                    FrameRecord {
                        identity: Identity {
                            path: r.get(1)?,
                            size: r.get::<_, i64>(2)? as u64,
                            mtime_ns: r.get(3)?,
                        },
                        status: match status.as_str() {
                            "ok" => FrameStatus::Ok,
                            "skipped" => FrameStatus::Skipped,
                            _ => FrameStatus::Error,
                        },
                        error: r.get(5)?,
                        night: r.get(6)?,
                        target: r.get(7)?,
                        filter: r.get(8)?,
                        time_unix: r.get(9)?,
                        header: header.and_then(|h| serde_json::from_str(&h).ok()),
                        metrics: metrics.and_then(|m| serde_json::from_str(&m).ok()),
                        stars: Vec::new(),
                        rejected: Vec::new(),
                        wcs: wcs.and_then(|w| serde_json::from_str(&w).ok()),
                    },
                ))
            })
            .map_err(|e| self.err(e))?
            .collect::<Result<_, _>>()
            .map_err(|e| self.err(e))?;
        let mut out = Vec::with_capacity(rows.len());
        let mut stars = self
            .conn
            .prepare_cached(
                "SELECT x, y, flux, fwhm_px, eccentricity, snr, ra_deg, dec_deg, r, g, b, flux_err, blended
                 FROM stars WHERE frame_id = ?1",
            )
            .map_err(|e| self.err(e))?;
        let mut rejected = self
            .conn
            .prepare_cached("SELECT x, y, kind, peak_adu FROM rejected WHERE frame_id = ?1")
            .map_err(|e| self.err(e))?;
        for (id, mut rec) in rows {
            rec.stars = stars
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
                .map_err(|e| self.err(e))?
                .collect::<Result<_, _>>()
                .map_err(|e| self.err(e))?;
            rec.rejected = rejected
                .query_map(params![id], |r| {
                    let kind: String = r.get(2)?;
                    Ok(Rejected {
                        x: r.get(0)?,
                        y: r.get(1)?,
                        kind: serde_json::from_value(serde_json::Value::String(kind))
                            .unwrap_or(crate::measure::RejectKind::Unfit),
                        peak_adu: r.get::<_, Option<f64>>(3)?.unwrap_or(0.0),
                    })
                })
                .map_err(|e| self.err(e))?
                .collect::<Result<_, _>>()
                .map_err(|e| self.err(e))?;
            out.push(rec);
        }
        Ok(out)
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

    /// Metrics of the frames of one night, target and filter recorded so far, in the
    /// order they were recorded: (id, status, metrics).
    pub fn group_metrics(
        &self,
        night: &str,
        target: Option<&str>,
        filter: Option<&str>,
    ) -> Result<Vec<GroupFrame>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT id, status, metrics_json, transparency_loss_mag, registration_rms_px, time_unix FROM frames
                 WHERE night = ?1 AND target IS ?2 AND filter IS ?3 AND status != 'skipped'
                 ORDER BY id",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![night, target, filter], |r| {
                let m: Option<String> = r.get(2)?;
                Ok(GroupFrame {
                    id: r.get(0)?,
                    status: r.get(1)?,
                    metrics: m.and_then(|m| serde_json::from_str(&m).ok()),
                    transparency_loss_mag: r.get(3)?,
                    registration_rms_px: r.get(4)?,
                    time_unix: r.get(5)?,
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

    /// The stars of one frame: (x, y, flux, snr).
    pub fn frame_stars(&self, id: i64) -> Result<Vec<(f64, f64, f64, f64)>, StoreError> {
        let mut st = self
            .conn
            .prepare_cached("SELECT x, y, flux, snr FROM stars WHERE frame_id = ?1")
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![id], |r| {
                Ok((
                    r.get(0)?,
                    r.get(1)?,
                    r.get::<_, Option<f64>>(2)?.unwrap_or(0.0),
                    r.get::<_, Option<f64>>(3)?.unwrap_or(0.0),
                ))
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Record what registration against the night's reference frame found.
    pub fn set_registration(
        &self,
        id: i64,
        transparency_loss_mag: Option<f64>,
        rms_px: Option<f64>,
    ) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET transparency_loss_mag = ?2, registration_rms_px = ?3 WHERE id = ?1",
            params![id, transparency_loss_mag, rms_px],
        )
    }

    /// A recorded frame's file moved (the rejected-frames action).
    pub fn set_path(&self, id: i64, path: &str) -> Result<(), StoreError> {
        self.run(
            "UPDATE frames SET path = ?2 WHERE id = ?1",
            params![id, path],
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

    /// Put a composed message in the outbox; returns its id.
    pub fn enqueue_mail(
        &self,
        c: &crate::mail::Composed,
        now_unix: f64,
    ) -> Result<i64, StoreError> {
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
    pub fn due_mail(
        &self,
        now_unix: f64,
    ) -> Result<Vec<(i64, crate::mail::Composed, i64)>, StoreError> {
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
                    crate::mail::Composed {
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
    fn a_frame_is_recorded_once_and_a_replaced_file_again() {
        let dir = tempfile::tempdir().unwrap();
        let mut s = Store::open(&dir.path().join("s.db")).unwrap();
        assert!(s.record(&record("/a.fits", 10), 1.0).unwrap());
        assert!(!s.record(&record("/a.fits", 10), 2.0).unwrap());
        assert!(s.record(&record("/a.fits", 11), 3.0).unwrap());
        assert_eq!(s.night_counts("2026-03-14").unwrap().frames, 2);
        // Reopening migrates nothing and keeps the rows.
        drop(s);
        let s = Store::open(&dir.path().join("s.db")).unwrap();
        assert_eq!(s.identities().unwrap().len(), 2);
    }
}
