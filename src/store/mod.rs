//! The SQLite store: the only module that speaks SQL. One file, WAL mode, a schema version
//! and forward migrations. A frame and its stars are written in one transaction, and a
//! path holds one record: the same file (path, size, modification time) is recorded
//! once however often the daemon is killed and restarted, and a newer version of a file
//! replaces its earlier record, stars and verdict. Files being read are remembered, so
//! one that was in the reader when the process died is not retried for ever.

use std::path::{Path, PathBuf};

use rusqlite::Connection;

mod alerts;
mod catalog;
pub mod catalogue_index;
mod frames;
mod lock;
mod outbox;
mod schema;

pub use frames::{
    GroupKey, Interrupted, LiveFrame, NightCounts, Recorded, TargetFilter, VerdictChange,
};
pub use lock::{claim, daemon_pid, DaemonLock};
pub use outbox::OutboxMessage;
pub use schema::SCHEMA_VERSION;
use schema::{MIGRATIONS, REBUILDS_TABLES};

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
    #[error("{path}: a query around one frame found more than {limit} catalogue stars; give a catalogue limited to the stars your camera reaches")]
    TooMany { path: PathBuf, limit: usize },
    #[error("{path}: {source}")]
    File {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("store {path}: schema version {found} is newer than this program understands ({known}); upgrade subwatch")]
    TooNew {
        path: PathBuf,
        found: i64,
        known: i64,
    },
}

pub struct Store {
    conn: Connection,
    path: PathBuf,
    /// The rig whose frames this handle records ('' unnamed): paths and files being read
    /// are kept per rig.
    rig: String,
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
            rig: String::new(),
        };
        store.migrate()?;
        Ok(store)
    }

    /// Open the store of a named rig (`[rig] name`; '' for an unnamed one). A store
    /// keeps one rig's frames: rows recorded before the rig was named become its own,
    /// so naming a rig later records nothing twice.
    pub fn open_for_rig(path: &Path, rig: &str) -> Result<Self, StoreError> {
        let mut store = Store::open(path)?;
        if !rig.is_empty() {
            // A path the rig recorded under its name already keeps that record.
            store.run(
                "DELETE FROM frames WHERE rig = '' AND path IN
                    (SELECT path FROM frames WHERE rig = ?1)",
                [rig],
            )?;
            store.run("UPDATE frames SET rig = ?1 WHERE rig = ''", [rig])?;
            store.run(
                "UPDATE reading SET rig = ?1 WHERE rig = '' AND path NOT IN
                    (SELECT path FROM reading WHERE rig = ?1)",
                [rig],
            )?;
            store.run("DELETE FROM reading WHERE rig = ''", [])?;
            store.rig = rig.to_string();
        }
        Ok(store)
    }

    /// The rig this handle records for ('' unnamed).
    pub fn rig(&self) -> &str {
        &self.rig
    }

    /// Open an existing store to read only (the status page's own connection: WAL lets
    /// it read while the daemon writes, and it can never change a row).
    pub fn open_read_only(path: &Path) -> Result<Self, StoreError> {
        let err = |source| StoreError::Sqlite {
            path: path.to_path_buf(),
            source,
        };
        let conn = Connection::open_with_flags(
            path,
            rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY | rusqlite::OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(err)?;
        conn.busy_timeout(std::time::Duration::from_secs(2))
            .map_err(err)?;
        Ok(Store {
            conn,
            path: path.to_path_buf(),
            rig: String::new(),
        })
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
            // A migration that rebuilds a table runs with foreign keys off (a dropped
            // table would take its stars with it) and is checked before it commits:
            // SQLite's documented procedure for schema changes. The others keep them
            // on, so their deletes cascade. The pragma has no effect inside a
            // transaction.
            let rebuilds = REBUILDS_TABLES.contains(&(i + 1));
            if rebuilds {
                self.conn
                    .execute_batch("PRAGMA foreign_keys = OFF")
                    .map_err(|e| self.err(e))?;
            }
            let migrated = (|| {
                let tx = self.conn.transaction()?;
                tx.execute_batch(sql)?;
                let broken: i64 =
                    tx.query_row("SELECT COUNT(*) FROM pragma_foreign_key_check", [], |r| {
                        r.get(0)
                    })?;
                if broken > 0 {
                    // Rolled back when the transaction drops.
                    return Err(rusqlite::Error::SqliteFailure(
                        rusqlite::ffi::Error::new(rusqlite::ffi::SQLITE_CONSTRAINT_FOREIGNKEY),
                        Some(format!(
                            "migration {} left {broken} rows without their frame",
                            i + 1
                        )),
                    ));
                }
                tx.execute_batch(&format!("PRAGMA user_version = {}", i + 1))?;
                tx.commit()
            })();
            let on = if rebuilds {
                self.conn.execute_batch("PRAGMA foreign_keys = ON")
            } else {
                Ok(())
            };
            migrated.and(on).map_err(|e| self.err(e))?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::{FrameRecord, FrameStatus, Identity};
    use rusqlite::params;

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
            calibration: None,
        }
    }

    #[test]
    fn a_path_holds_one_record_and_a_newer_file_replaces_it() {
        let dir = tempfile::tempdir().unwrap();
        let mut s = Store::open(&dir.path().join("s.db")).unwrap();
        let first = s.record_frame(&record("/a.fits", 10), 1.0).unwrap();
        assert!(matches!(first, Recorded::New(_)));
        s.set_verdict(
            first.id().unwrap(),
            crate::rules::Verdict::Reject,
            &["fwhm_high".into()],
        )
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
            conn.execute_batch(
                "INSERT INTO stars (frame_id, x, y) SELECT MAX(id), 1.0, 2.0 FROM frames",
            )
            .unwrap();
        }
        let s = Store::open(&db).unwrap();
        assert_eq!(s.recorded_versions().unwrap().len(), 1);
        assert_eq!(s.recorded_versions().unwrap()["/a.fits"].0, 11);
        // The rebuilt frames table (migration 10) kept the frame's stars and their link.
        let id: i64 = s
            .conn
            .query_row("SELECT id FROM frames", [], |r| r.get(0))
            .unwrap();
        assert_eq!(s.frame_star_records(id).unwrap().len(), 1);
        let fk: bool = s
            .conn
            .query_row("PRAGMA foreign_keys", [], |r| r.get(0))
            .unwrap();
        assert!(fk, "foreign keys are on again after migrating");
    }

    #[test]
    fn two_filters_of_a_target_keep_their_own_catalogues_and_old_ones_stay_readable() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("s.db");
        let src = |mag: f64| crate::night::CatalogSource {
            ra_deg: 10.0,
            dec_deg: 20.0,
            mag: Some(mag),
        };
        {
            // A store as version 8 left it: one catalogue per target and night.
            let conn = Connection::open(&db).unwrap();
            for (i, sql) in MIGRATIONS.iter().take(8).enumerate() {
                conn.execute_batch(sql).unwrap();
                conn.execute_batch(&format!("PRAGMA user_version = {}", i + 1))
                    .unwrap();
            }
            conn.execute_batch(
                "INSERT INTO catalog_nights (target, night, limit_mag) VALUES ('T', '2026-03-01', 18.0);
                 INSERT INTO catalog (target, night, ra_deg, dec_deg, mag) VALUES ('T', '2026-03-01', 10.0, 20.0, 12.0);",
            )
            .unwrap();
        }
        let mut s = Store::open(&db).unwrap();
        s.save_catalog("T", "V", "2026-03-02", 19.0, &[], &[src(12.5)])
            .unwrap();
        s.save_catalog("T", "I", "2026-03-02", 18.5, &[], &[src(11.5)])
            .unwrap();
        let v = s.earlier_catalogs("T", "V", "2026-03-05").unwrap();
        assert_eq!(
            v.iter().map(|n| n.night.as_str()).collect::<Vec<_>>(),
            ["2026-03-02", "2026-03-01"],
            "V's own night, then the one recorded before filters were named"
        );
        assert_eq!(v[0].sources[0].mag, Some(12.5));
        let all = s.catalogs_before("T", "2026-03-05").unwrap();
        let filters: Vec<&str> = all.iter().map(|(f, _)| f.as_str()).collect();
        assert_eq!(filters, ["I", "V", ""]);
    }

    #[test]
    fn each_rig_records_a_path_once_and_an_unnamed_store_becomes_the_rigs() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("s.db");
        {
            // Recorded before the rig had a name, with a file in the reader.
            let mut s = Store::open(&db).unwrap();
            s.record_frame(&record("/a.fits", 10), 1.0).unwrap();
            s.begin_reading(&record("/b.fits", 10).identity, 1.0)
                .unwrap();
        }
        let mut north = Store::open_for_rig(&db, "north pier").unwrap();
        assert_eq!(north.rig(), "north pier");
        assert_eq!(
            north.record_frame(&record("/a.fits", 10), 2.0).unwrap(),
            Recorded::Already,
            "the unnamed record became the named rig's"
        );
        assert_eq!(north.take_interrupted().unwrap().len(), 1);
        // Another rig of the site with a file at the same path records it for itself.
        let mut south = Store::open_for_rig(&db, "south-pier").unwrap();
        assert!(south.recorded_versions().unwrap().is_empty());
        assert!(matches!(
            south.record_frame(&record("/a.fits", 10), 3.0).unwrap(),
            Recorded::New(_)
        ));
        assert!(south.take_interrupted().unwrap().is_empty());
        assert_eq!(
            south.record_frame(&record("/a.fits", 10), 4.0).unwrap(),
            Recorded::Already
        );
        assert_eq!(north.recorded_versions().unwrap().len(), 1);
        let rows: i64 = north
            .conn
            .query_row("SELECT COUNT(*) FROM frames", [], |r| r.get(0))
            .unwrap();
        assert_eq!(rows, 2);
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
