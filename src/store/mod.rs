//! The store: an SQLite file on one PC, or a PostgreSQL database a site's rigs share; the
//! only module that speaks SQL, through one connection type (`db`) for both. A schema
//! version and forward migrations, kept in one place for both back ends. A frame and its
//! stars are written in one transaction, and a path holds one record per rig: the same
//! file (path, size, modification time) is recorded once however often the daemon is
//! killed and restarted, and a newer version of a file replaces its earlier record, stars
//! and verdict. Files being read are remembered, so one that was in the reader when the
//! process died is not retried for ever.

use std::path::{Path, PathBuf};

mod alerts;
mod archive;
mod catalog;
pub mod catalogue_index;
mod connect;
mod copy;
pub(crate) mod db;
mod frames;
mod limits;
mod lock;
mod outbox;
mod schema;
mod targets;

pub use archive::ArchivedFrame;
pub use connect::{
    claim_configured, claim_rig, configured_daemon_pid, probe, rig_daemon, Claim, Location, PgClaim,
};
pub use copy::{copy, Copied};
pub use db::{DbError, Kind};
pub use frames::{
    GroupKey, Interrupted, LiveFrame, NightCounts, Recorded, TargetFilter, VerdictChange,
};
pub use lock::{claim, daemon_pid, DaemonLock};
pub use outbox::OutboxMessage;
pub use schema::SCHEMA_VERSION;

use db::{values, Conn};

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
    #[error("store {store}: {source}")]
    Database {
        store: String,
        #[source]
        source: DbError,
    },
    #[error("{path}: a query around one frame found more than {limit} catalogue stars; give a catalogue limited to the stars your camera reaches")]
    TooMany { path: PathBuf, limit: usize },
    #[error("{path}: {source}")]
    File {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("store {store}: schema version {found} is newer than this program understands ({known}); upgrade subwatch")]
    TooNew {
        store: String,
        found: i64,
        known: i64,
    },
    #[error("store {store}: {message}")]
    Settings { store: String, message: String },
}

impl StoreError {
    /// Whether the store's server is away (not reachable, connection broken), as
    /// opposed to a statement or a file failing: the daemon waits for it to come back.
    pub fn is_unreachable(&self) -> bool {
        matches!(self, StoreError::Database { source, .. } if source.is_connection())
    }

    /// Whether the store's server refused this daemon's login (the password in
    /// `password_file` no longer the role's, or a role or host it does not let in).
    pub fn is_login_refused(&self) -> bool {
        matches!(self, StoreError::Database { source, .. } if source.is_login_refused())
    }
}

pub struct Store {
    conn: Conn,
    /// Where the store is, for messages: the SQLite file, or the server and database
    /// (never a password).
    place: String,
    /// The rig whose frames this handle records and reads ('' unnamed): paths and files
    /// being read are kept per rig.
    rig: String,
    /// Reads see every rig's frames (a site's summary), not only this rig's.
    site: bool,
}

impl Store {
    /// Open (creating if needed) and migrate an SQLite store.
    pub fn open(path: &Path) -> Result<Self, StoreError> {
        Self::connect(&Location::File(path.to_path_buf()))
    }

    /// Open (creating the schema if needed) and migrate the store at `location`.
    pub fn connect(location: &Location) -> Result<Self, StoreError> {
        let mut store = Store {
            conn: connect::open(location)?,
            place: location.to_string(),
            rig: String::new(),
            site: false,
        };
        store.migrate()?;
        Ok(store)
    }

    /// Open the store of a named rig (`[rig] name`; '' for an unnamed one). Rows an
    /// unnamed rig recorded become the named rig's, so naming a rig later records nothing
    /// twice.
    pub fn open_for_rig(path: &Path, rig: &str) -> Result<Self, StoreError> {
        Self::connect_for_rig(&Location::File(path.to_path_buf()), rig)
    }

    /// The configured store, as the configured rig's.
    pub fn open_configured(cfg: &crate::config::Config) -> Result<Self, StoreError> {
        Self::connect_for_rig(&Location::from_config(&cfg.store), &cfg.rig.name)
    }

    /// [`Store::open_for_rig`] at any location.
    pub fn connect_for_rig(location: &Location, rig: &str) -> Result<Self, StoreError> {
        let mut store = Store::connect(location)?;
        if !rig.is_empty() {
            store.adopt_unnamed(rig)?;
            store.rig = rig.to_string();
        }
        Ok(store)
    }

    /// Rows recorded before the rig had a name become its own; a path the rig recorded
    /// under its name already keeps that record. Where several rigs share one store
    /// only a store that held no named rig's rows adopts them (whose they were is not
    /// known otherwise).
    fn adopt_unnamed(&self, rig: &str) -> Result<(), StoreError> {
        self.conn
            .transaction(|| {
                let others = self
                    .conn
                    .query_one(
                        "SELECT COUNT(*) FROM frames WHERE rig != '' AND rig != ?1",
                        values![rig],
                    )?
                    .get::<i64>(0)?;
                if others > 0 {
                    return Ok(());
                }
                self.conn.execute(
                    "DELETE FROM frames WHERE rig = '' AND path IN
                        (SELECT path FROM frames WHERE rig = ?1)",
                    values![rig],
                )?;
                self.conn
                    .execute("UPDATE frames SET rig = ?1 WHERE rig = ''", values![rig])?;
                self.conn.execute(
                    "UPDATE reading SET rig = ?1 WHERE rig = '' AND path NOT IN
                        (SELECT path FROM reading WHERE rig = ?1)",
                    values![rig],
                )?;
                self.conn
                    .execute("DELETE FROM reading WHERE rig = ''", &[])?;
                // A catalogue the rig kept under its name already stays.
                for table in ["catalog_nights", "catalog"] {
                    self.conn.execute(
                        &format!(
                            "DELETE FROM {table} WHERE rig = '' AND EXISTS (
                                SELECT 1 FROM catalog_nights n WHERE n.rig = ?1
                                  AND n.target = {table}.target AND n.filter = {table}.filter
                                  AND n.night = {table}.night)"
                        ),
                        values![rig],
                    )?;
                }
                // As are the limits of a night the rig judged under its name already.
                self.conn.execute(
                    "DELETE FROM night_limits WHERE rig = '' AND night IN
                        (SELECT night FROM night_limits WHERE rig = ?1)",
                    values![rig],
                )?;
                for table in [
                    "alerts",
                    "outbox",
                    "catalog_nights",
                    "catalog",
                    "night_limits",
                ] {
                    self.conn.execute(
                        &format!("UPDATE {table} SET rig = ?1 WHERE rig = ''"),
                        values![rig],
                    )?;
                }
                // The unnamed rig's small facts (alerts and summaries already sent).
                self.conn.execute(
                    "UPDATE meta SET key = ?1 || key
                     WHERE key NOT LIKE 'rig %' AND key NOT LIKE 'daemon of rig %'
                       AND key NOT LIKE 'site %' AND ?1 || key NOT IN (SELECT key FROM meta)",
                    values![format!("rig {rig}: ")],
                )?;
                Ok::<_, DbError>(())
            })
            .map_err(|e| self.err(e))
    }

    /// Reads from here on cover every rig of the store (a site's night), not only this
    /// handle's rig.
    pub fn whole_site(mut self) -> Self {
        self.site = true;
        self
    }

    /// Reads from here on cover this handle's rig alone again.
    pub fn own_rig(mut self) -> Self {
        self.site = false;
        self
    }

    /// Run `f` with this handle reading and writing as `rig`'s (a site's summary judges
    /// each rig's night in turn); the handle is its own rig's again after.
    pub fn as_rig<T>(&mut self, rig: &str, f: impl FnOnce(&mut Store) -> T) -> T {
        let own = std::mem::replace(&mut self.rig, rig.to_string());
        let site = std::mem::replace(&mut self.site, false);
        let out = f(self);
        self.rig = own;
        self.site = site;
        out
    }

    /// The rigs that recorded frames of `night`, in name order ('' for an unnamed one).
    pub fn night_rigs(&self, night: &str) -> Result<Vec<String>, StoreError> {
        self.rows(
            "SELECT DISTINCT rig FROM frames WHERE night = ?1 ORDER BY rig",
            values![night],
        )?
        .iter()
        .map(|r| r.get(0))
        .collect::<Result<_, _>>()
        .map_err(|e| self.err(e))
    }

    /// Take the site-wide lease `key` (one daemon of a site does a job: the site's
    /// morning summary) for `holder` until `now + seconds`. Taken when nobody holds it,
    /// or when its holder's time ran out without it being done (that daemon died); never
    /// when it is done. Atomic on both back ends: an insert that does nothing on a
    /// conflict, and a compare-and-set of the expired value. Returns the lease (what
    /// finishing or giving it back names), or `None` when another holds it or it is done.
    pub fn take_lease(
        &self,
        key: &str,
        holder: &str,
        now: f64,
        seconds: f64,
    ) -> Result<Option<String>, StoreError> {
        let key = format!("site {key}");
        let held = serde_json::json!({"held_by": holder, "until": now + seconds}).to_string();
        let inserted = self
            .conn
            .execute(
                "INSERT INTO meta (key, value) VALUES (?1, ?2) ON CONFLICT (key) DO NOTHING",
                values![key, held],
            )
            .map_err(|e| self.err(e))?;
        if inserted == 1 {
            return Ok(Some(held));
        }
        let Some(before) = self
            .rows("SELECT value FROM meta WHERE key = ?1", values![key])?
            .first()
            .map(|r| r.get::<String>(0))
            .transpose()
            .map_err(|e| self.err(e))?
        else {
            return Ok(None);
        };
        let parsed: serde_json::Value = serde_json::from_str(&before).unwrap_or_default();
        let expired = parsed.get("done_by").is_none()
            && parsed
                .get("until")
                .and_then(serde_json::Value::as_f64)
                .is_none_or(|until| until < now);
        if !expired {
            return Ok(None);
        }
        let swapped = self
            .conn
            .execute(
                "UPDATE meta SET value = ?3 WHERE key = ?1 AND value = ?2",
                values![key, before, held],
            )
            .map_err(|e| self.err(e))?;
        Ok((swapped == 1).then_some(held))
    }

    /// The lease `key` done: nobody takes it again. Only while `lease` (what
    /// [`Store::take_lease`] returned) is still the one held: a holder whose time ran
    /// out and was taken over does not mark the new holder's done. Returns whether it
    /// was.
    pub fn finish_lease(
        &self,
        key: &str,
        lease: &str,
        holder: &str,
        now: f64,
    ) -> Result<bool, StoreError> {
        self.conn
            .execute(
                "UPDATE meta SET value = ?3 WHERE key = ?1 AND value = ?2",
                values![
                    format!("site {key}"),
                    lease,
                    serde_json::json!({"done_by": holder, "at": now}).to_string()
                ],
            )
            .map(|n| n == 1)
            .map_err(|e| self.err(e))
    }

    /// The lease `key` given back undone (the job failed): another may take it now. Only
    /// while `lease` is still the one held.
    pub fn release_lease(&self, key: &str, lease: &str) -> Result<(), StoreError> {
        self.run(
            "DELETE FROM meta WHERE key = ?1 AND value = ?2",
            values![format!("site {key}"), lease],
        )
    }

    /// The rig this handle records for ('' unnamed).
    pub fn rig(&self) -> &str {
        &self.rig
    }

    /// Which kind of database this store is.
    pub fn kind(&self) -> Kind {
        self.conn.kind()
    }

    /// Open an existing SQLite store to read only, as `rig`'s (the status page's own
    /// connection: WAL lets it read while the daemon writes, and it can never change a
    /// row).
    pub fn open_read_only(path: &Path, rig: &str) -> Result<Self, StoreError> {
        Ok(Store {
            conn: connect::open_sqlite_read_only(path)?,
            place: path.display().to_string(),
            rig: rig.to_string(),
            site: false,
        })
    }

    fn err(&self, source: DbError) -> StoreError {
        StoreError::Database {
            store: self.place.clone(),
            source,
        }
    }

    /// Run one statement that returns no rows.
    fn run(&self, sql: &str, values: &[db::Value]) -> Result<(), StoreError> {
        self.conn
            .execute(sql, values)
            .map(|_| ())
            .map_err(|e| self.err(e))
    }

    /// Every row of a query.
    fn rows(&self, sql: &str, values: &[db::Value]) -> Result<Vec<db::Row>, StoreError> {
        self.conn.query(sql, values).map_err(|e| self.err(e))
    }

    /// The value of a read's rig condition, written `(rig = ?N OR ?N IS NULL)`: this
    /// rig's rows, or (NULL) every rig's for a site handle.
    fn scope(&self) -> Option<&str> {
        (!self.site).then_some(self.rig.as_str())
    }

    /// Every table's columns with their kind of value ("integer", "real", "text",
    /// "bytes"), sorted: what both back ends must agree on.
    pub fn schema(&self) -> Result<Vec<(String, String, String)>, StoreError> {
        let sql = match self.conn.kind() {
            Kind::Sqlite => {
                "SELECT m.name, p.name, lower(p.type) FROM sqlite_master m, pragma_table_info(m.name) p
                 WHERE m.type = 'table' AND m.name NOT LIKE 'sqlite_%'"
            }
            Kind::Postgres => {
                "SELECT table_name::text, column_name::text, data_type::text
                 FROM information_schema.columns
                 WHERE table_schema = current_schema() AND table_name != 'schema_version'"
            }
        };
        let mut out = self
            .rows(sql, &[])?
            .iter()
            .map(|r| {
                let kind: String = r.get(2)?;
                let kind = match kind.as_str() {
                    "integer" | "bigint" => "integer",
                    "real" | "double precision" => "real",
                    "text" => "text",
                    "blob" | "bytea" => "bytes",
                    other => other,
                };
                Ok((r.get(0)?, r.get(1)?, kind.to_string()))
            })
            .collect::<Result<Vec<_>, DbError>>()
            .map_err(|e| self.err(e))?;
        out.sort();
        Ok(out)
    }

    fn migrate(&mut self) -> Result<(), StoreError> {
        schema::migrate(&self.conn, &self.place)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rusqlite::{params, Connection};
    use schema::MIGRATIONS;

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
            .query_one("SELECT id FROM frames", &[])
            .unwrap()
            .get(0)
            .unwrap();
        assert_eq!(s.frame_star_records(id).unwrap().len(), 1);
        let fk: bool = s
            .conn
            .query_one("PRAGMA foreign_keys", &[])
            .unwrap()
            .get(0)
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
}
