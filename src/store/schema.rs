//! The store's schema: each migration in order; `PRAGMA user_version` says how many a
//! store has had. A migration is never changed once released, only followed.

pub const SCHEMA_VERSION: i64 = 10;

/// Migrations (numbered from 1) that rebuild a table, run with foreign keys off.
pub(super) const REBUILDS_TABLES: &[usize] = &[10];

pub(super) const MIGRATIONS: &[&str] = &[
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
    // 7: the live verdict's explanations, so an alert can say what was measured.
    "ALTER TABLE frames ADD COLUMN live_explanations_json TEXT;",
    // 8: what a calibration frame (dark, flat, bias) measured.
    "ALTER TABLE frames ADD COLUMN calibration_json TEXT;",
    // 9: the catalogue of persistent sources per target and filter (two filters of one
    // target no longer overwrite each other's night); earlier rows keep filter ''.
    "CREATE TABLE catalog_nights_by_filter (
        target TEXT NOT NULL, filter TEXT NOT NULL DEFAULT '', night TEXT NOT NULL,
        limit_mag REAL NOT NULL, footprint_json TEXT,
        PRIMARY KEY (target, filter, night)
     );
     INSERT INTO catalog_nights_by_filter (target, filter, night, limit_mag, footprint_json)
        SELECT target, '', night, limit_mag, footprint_json FROM catalog_nights;
     DROP TABLE catalog_nights;
     ALTER TABLE catalog_nights_by_filter RENAME TO catalog_nights;
     ALTER TABLE catalog ADD COLUMN filter TEXT NOT NULL DEFAULT '';
     DROP INDEX catalog_target;
     CREATE INDEX catalog_target ON catalog (target, filter, night);",
    // 10: the rig each frame came from, where several rigs share a site: a path is
    // recorded once per rig. Rows from before are the unnamed rig's ('').
    // The table is rebuilt (SQLite cannot drop the first migration's UNIQUE constraint
    // of path, size and modification time), as SQLite's documented procedure for
    // schema changes does, with foreign keys off while it runs (see `Store::migrate`).
    "CREATE TABLE frames_by_rig (
        id INTEGER PRIMARY KEY,
        rig TEXT NOT NULL DEFAULT '',
        path TEXT NOT NULL,
        size INTEGER NOT NULL,
        mtime_ns INTEGER NOT NULL,
        status TEXT NOT NULL,
        error TEXT, night TEXT, target TEXT, filter TEXT, time_unix REAL,
        header_json TEXT, metrics_json TEXT, star_count INTEGER, fwhm_px REAL,
        eccentricity REAL, background_adu REAL, noise_adu REAL,
        recorded_at REAL NOT NULL,
        wcs_json TEXT, verdict TEXT, transparency_loss_mag REAL, registration_rms_px REAL,
        reasons_json TEXT, placement_json TEXT, live_verdict TEXT, live_reasons_json TEXT,
        live_explanations_json TEXT, calibration_json TEXT
     );
     INSERT INTO frames_by_rig (id, rig, path, size, mtime_ns, status, error, night, target,
        filter, time_unix, header_json, metrics_json, star_count, fwhm_px, eccentricity,
        background_adu, noise_adu, recorded_at, wcs_json, verdict, transparency_loss_mag,
        registration_rms_px, reasons_json, placement_json, live_verdict, live_reasons_json,
        live_explanations_json, calibration_json)
        SELECT id, '', path, size, mtime_ns, status, error, night, target,
        filter, time_unix, header_json, metrics_json, star_count, fwhm_px, eccentricity,
        background_adu, noise_adu, recorded_at, wcs_json, verdict, transparency_loss_mag,
        registration_rms_px, reasons_json, placement_json, live_verdict, live_reasons_json,
        live_explanations_json, calibration_json FROM frames;
     DROP TABLE frames;
     ALTER TABLE frames_by_rig RENAME TO frames;
     CREATE INDEX frames_night ON frames (night, target, filter);
     CREATE UNIQUE INDEX frames_rig_path ON frames (rig, path);
     CREATE TABLE reading_by_rig (
        rig TEXT NOT NULL DEFAULT '',
        path TEXT NOT NULL,
        size INTEGER NOT NULL,
        mtime_ns INTEGER NOT NULL,
        started_unix REAL NOT NULL,
        interruptions INTEGER NOT NULL DEFAULT 0,
        PRIMARY KEY (rig, path)
     );
     INSERT INTO reading_by_rig (rig, path, size, mtime_ns, started_unix, interruptions)
        SELECT '', path, size, mtime_ns, started_unix, interruptions FROM reading;
     DROP TABLE reading;
     ALTER TABLE reading_by_rig RENAME TO reading;",
];
