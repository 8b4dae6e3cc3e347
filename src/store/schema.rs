//! The store's schema: each migration in order, written once for both back ends. SQLite
//! keeps how many a store has had in `PRAGMA user_version`, PostgreSQL in the table
//! `schema_version`. A migration is never changed once released, only followed.
//! PostgreSQL reads each one with its own type names (`postgres_ddl`); where SQLite's
//! limits made a migration rebuild a table, PostgreSQL alters it instead
//! (`POSTGRES_INSTEAD`), and a test holds the two schemas to the same tables, columns
//! and types.

use super::db::{values, Conn, DbError, Kind};
use super::StoreError;

pub const SCHEMA_VERSION: i64 = 13;

/// Migrations (numbered from 1) that rebuild a table, run with foreign keys off.
const REBUILDS_TABLES: &[usize] = &[10];

pub(crate) const MIGRATIONS: &[&str] = &[
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
    // 11: the rig of each alert, mail and catalogue, where several rigs share a store:
    // each rig's alerts keep their own rate limit, each daemon sends its own mail, and a
    // target's catalogues from every rig are one history (two rigs on one target in one
    // night keep a catalogue each). Rows from before are the unnamed rig's ('').
    "ALTER TABLE alerts ADD COLUMN rig TEXT NOT NULL DEFAULT '';
     ALTER TABLE outbox ADD COLUMN rig TEXT NOT NULL DEFAULT '';
     CREATE TABLE catalog_nights_by_rig (
        target TEXT NOT NULL, filter TEXT NOT NULL DEFAULT '', night TEXT NOT NULL,
        limit_mag REAL NOT NULL, footprint_json TEXT, rig TEXT NOT NULL DEFAULT '',
        PRIMARY KEY (target, filter, night, rig)
     );
     INSERT INTO catalog_nights_by_rig (target, filter, night, limit_mag, footprint_json)
        SELECT target, filter, night, limit_mag, footprint_json FROM catalog_nights;
     DROP TABLE catalog_nights;
     ALTER TABLE catalog_nights_by_rig RENAME TO catalog_nights;
     ALTER TABLE catalog ADD COLUMN rig TEXT NOT NULL DEFAULT '';
     DROP INDEX catalog_target;
     CREATE INDEX catalog_target ON catalog (target, filter, night, rig);",
    // 12: the order of a frame's stars and rejected detections, and of a catalogue's
    // sources, kept as written: PostgreSQL, unlike SQLite, promises no order of rows
    // read back. Rows from before keep SQLite's own order (their rowid).
    "ALTER TABLE stars ADD COLUMN seq INTEGER;
     UPDATE stars SET seq = rowid;
     ALTER TABLE rejected ADD COLUMN seq INTEGER;
     UPDATE rejected SET seq = rowid;
     ALTER TABLE catalog ADD COLUMN seq INTEGER;
     UPDATE catalog SET seq = rowid;",
    // 13: the limits each group of a rig's night was judged against, written with the
    // verdicts when its daemon judges the night, so that a site's summary draws every
    // rig's own limits. A store from before has none: its summary says so.
    "CREATE TABLE night_limits (
        rig TEXT NOT NULL DEFAULT '',
        night TEXT NOT NULL,
        target TEXT,
        filter TEXT,
        limits_json TEXT NOT NULL
     );
     CREATE INDEX night_limits_night ON night_limits (rig, night);",
];

/// Migrations PostgreSQL runs in place of SQLite's text (which rebuilds a table there).
const POSTGRES_INSTEAD: &[(usize, &str)] = &[
    (
        10,
        "ALTER TABLE frames ADD COLUMN rig TEXT NOT NULL DEFAULT '';
         ALTER TABLE frames DROP CONSTRAINT frames_path_size_mtime_ns_key;
         DROP INDEX frames_path;
         CREATE UNIQUE INDEX frames_rig_path ON frames (rig, path);
         ALTER TABLE reading ADD COLUMN rig TEXT NOT NULL DEFAULT '';
         ALTER TABLE reading DROP CONSTRAINT reading_pkey;
         ALTER TABLE reading ADD PRIMARY KEY (rig, path);",
    ),
    (
        11,
        "ALTER TABLE alerts ADD COLUMN rig TEXT NOT NULL DEFAULT '';
         ALTER TABLE outbox ADD COLUMN rig TEXT NOT NULL DEFAULT '';
         ALTER TABLE catalog_nights ADD COLUMN rig TEXT NOT NULL DEFAULT '';
         ALTER TABLE catalog_nights DROP CONSTRAINT catalog_nights_by_filter_pkey;
         ALTER TABLE catalog_nights ADD PRIMARY KEY (target, filter, night, rig);
         ALTER TABLE catalog ADD COLUMN rig TEXT NOT NULL DEFAULT '';
         DROP INDEX catalog_target;
         CREATE INDEX catalog_target ON catalog (target, filter, night, rig);",
    ),
    (
        12,
        "ALTER TABLE stars ADD COLUMN seq INTEGER;
         ALTER TABLE rejected ADD COLUMN seq INTEGER;
         ALTER TABLE catalog ADD COLUMN seq INTEGER;",
    ),
];

/// A migration's text in PostgreSQL's type names: 64-bit integers and identity keys,
/// double precision, bytea, and text compared byte by byte as SQLite compares it (so
/// both order names alike).
pub(super) fn postgres_ddl(sql: &str) -> String {
    let sql = sql.replace(
        "INTEGER PRIMARY KEY",
        "BIGINT GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY",
    );
    let mut out = String::with_capacity(sql.len() + 64);
    let mut word = String::new();
    let mut quoted = false;
    let flush = |word: &mut String, out: &mut String| {
        out.push_str(match word.as_str() {
            "INTEGER" => "BIGINT",
            "REAL" => "DOUBLE PRECISION",
            "BLOB" => "BYTEA",
            "TEXT" => "TEXT COLLATE \"C\"",
            w => w,
        });
        word.clear();
    };
    for c in sql.chars() {
        if !quoted && (c.is_ascii_alphanumeric() || c == '_') {
            word.push(c);
            continue;
        }
        flush(&mut word, &mut out);
        if c == '\'' {
            quoted = !quoted;
        }
        out.push(c);
    }
    flush(&mut word, &mut out);
    out
}

/// The text migration `n` (from 1) runs on a back end.
pub(super) fn migration_text(kind: Kind, n: usize) -> String {
    match kind {
        Kind::Sqlite => MIGRATIONS[n - 1].to_string(),
        Kind::Postgres => match POSTGRES_INSTEAD.iter().find(|(m, _)| *m == n) {
            Some((_, sql)) => postgres_ddl(sql),
            None => postgres_ddl(MIGRATIONS[n - 1]),
        },
    }
}

/// Bring a store's schema up to [`SCHEMA_VERSION`].
pub(super) fn migrate(conn: &Conn, place: &str) -> Result<(), StoreError> {
    let err = |source| StoreError::Database {
        store: place.to_string(),
        source,
    };
    let too_new = |found: i64| StoreError::TooNew {
        store: place.to_string(),
        found,
        known: SCHEMA_VERSION,
    };
    match conn.kind() {
        Kind::Sqlite => migrate_sqlite(conn, too_new).map_err(|e| match e {
            Migration::Db(e) => err(e),
            Migration::Store(e) => e,
        }),
        Kind::Postgres => migrate_postgres(conn, too_new).map_err(|e| match e {
            Migration::Db(e) => err(e),
            Migration::Store(e) => e,
        }),
    }
}

enum Migration {
    Db(DbError),
    Store(StoreError),
}

impl From<DbError> for Migration {
    fn from(e: DbError) -> Self {
        Migration::Db(e)
    }
}

/// The schema version of an SQLite store, read without changing it.
pub(super) fn version_of(conn: &Conn) -> Result<i64, DbError> {
    conn.query_one("PRAGMA user_version", &[])?.get(0)
}

fn migrate_sqlite(conn: &Conn, too_new: impl Fn(i64) -> StoreError) -> Result<(), Migration> {
    let version: i64 = conn.query_one("PRAGMA user_version", &[])?.get(0)?;
    if version > SCHEMA_VERSION {
        return Err(Migration::Store(too_new(version)));
    }
    for n in (version as usize + 1)..=MIGRATIONS.len() {
        // A migration that rebuilds a table runs with foreign keys off (a dropped table
        // would take its stars with it) and is checked before it commits: SQLite's
        // documented procedure for schema changes. The others keep them on, so their
        // deletes cascade. The pragma has no effect inside a transaction.
        let rebuilds = REBUILDS_TABLES.contains(&n);
        if rebuilds {
            conn.batch("PRAGMA foreign_keys = OFF")?;
        }
        let migrated = conn.transaction(|| {
            // Another process opening the same new store (two archives started at once)
            // may have run it since the version was read: the transaction holds the
            // write lock, so what it reads now stays true until it commits.
            let now: i64 = conn.query_one("PRAGMA user_version", &[])?.get(0)?;
            if now >= n as i64 {
                return Ok(());
            }
            conn.batch(&migration_text(Kind::Sqlite, n))?;
            let broken: i64 = conn
                .query_one("SELECT COUNT(*) FROM pragma_foreign_key_check", &[])?
                .get(0)?;
            if broken > 0 {
                return Err(DbError::Other(format!(
                    "migration {n} left {broken} rows without their frame"
                )));
            }
            conn.batch(&format!("PRAGMA user_version = {n}"))
        });
        let on = if rebuilds {
            conn.batch("PRAGMA foreign_keys = ON")
        } else {
            Ok(())
        };
        migrated.and(on)?;
    }
    Ok(())
}

/// Any key of PostgreSQL's advisory locks, the same for every subwatch: the daemons of a
/// site starting at once migrate one after the other, never two at a time.
const MIGRATION_LOCK: i64 = 0x7375_6277_6d69_6772; // "subwmigr"

fn migrate_postgres(conn: &Conn, too_new: impl Fn(i64) -> StoreError) -> Result<(), Migration> {
    // PostgreSQL changes a schema inside a transaction: all of it lands, or none.
    conn.transaction(|| {
        conn.execute("SELECT pg_advisory_xact_lock(?1)", values![MIGRATION_LOCK])?;
        let exists: bool = conn
            .query_one("SELECT to_regclass('schema_version') IS NOT NULL", &[])?
            .get(0)?;
        if !exists {
            conn.batch(
                "CREATE TABLE schema_version (version BIGINT NOT NULL);
                 INSERT INTO schema_version (version) VALUES (0);",
            )?;
        }
        let version: i64 = conn
            .query_one("SELECT version FROM schema_version", &[])?
            .get(0)?;
        if version > SCHEMA_VERSION {
            return Err(Migration::Store(too_new(version)));
        }
        for n in (version as usize + 1)..=MIGRATIONS.len() {
            conn.batch(&migration_text(Kind::Postgres, n))?;
            conn.execute("UPDATE schema_version SET version = ?1", values![n])?;
        }
        Ok(())
    })
}
