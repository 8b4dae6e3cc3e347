//! Copying an SQLite store into a shared PostgreSQL database (`subwatch store copy`): every
//! row of every table, in one transaction, frames given new ids (other rigs' frames may
//! hold the old ones) and their stars, rejected detections and placements (which name
//! their reference frame's record) following them; then each table's rows counted on
//! both sides.
//!
//! The source is opened read-only and never written, not even migrated: a daemon may be
//! running on it, and a copy that fails must leave it as it was. Rows an unnamed rig
//! recorded are named in what is inserted (the same rules as `Store::adopt_unnamed`:
//! a path, a catalogue night or a night's limits the rig has under its name already keeps
//! that row).

use std::collections::HashMap;

use super::db::{values, Conn, DbError, Value};
use super::{Location, Store, StoreError};
use crate::night::register::Placement;

/// Tables whose rows are copied as they are (every column), in this order.
const PLAIN_TABLES: &[&str] = &["reading", "catalog_nights", "catalog", "night_limits"];
/// Tables with an id of their own, which the destination gives anew.
const ID_TABLES: &[&str] = &["alerts", "outbox"];
/// Tables that belong to a frame (`frame_id`).
const FRAME_TABLES: &[&str] = &["stars", "rejected"];

/// What was copied: rows per table, each counted in the source and found in the
/// destination.
#[derive(Debug, Clone, PartialEq)]
pub struct Copied {
    pub tables: Vec<(String, i64)>,
}

fn columns(from: &Store, table: &str) -> Result<Vec<String>, StoreError> {
    Ok(from
        .schema()?
        .into_iter()
        .filter(|(t, _, _)| t == table)
        .map(|(_, c, _)| c)
        .collect())
}

fn placeholders(n: usize, first: usize) -> String {
    (first..first + n)
        .map(|i| format!("?{i}"))
        .collect::<Vec<_>>()
        .join(", ")
}

fn count(conn: &Conn, sql: &str, params: &[Value]) -> Result<i64, DbError> {
    conn.query_one(sql, params)?.get(0)
}

/// How the source's rows are read when an unnamed rig's rows are to be named `rig` (`?1`
/// in every query): the rig column's value, and which rows are left out because the rig
/// has the same row under its name already.
struct Naming<'a> {
    rig: Option<&'a str>,
}

impl Naming<'_> {
    /// The parameters of `sql`, a query this naming wrote (the rig, where it names it).
    fn params(&self, sql: &str) -> Vec<Value> {
        match self.rig {
            Some(r) if sql.contains("?1") => vec![Value::Text(r.to_string())],
            _ => Vec::new(),
        }
    }

    /// Every row `sql` (a query this naming wrote) reads from `source`.
    fn rows(&self, source: &Store, sql: &str) -> Result<Vec<super::db::Row>, StoreError> {
        source.rows(sql, &self.params(sql))
    }

    /// `cols` as a select list, the rig column named.
    fn select(&self, cols: &[String]) -> String {
        cols.iter()
            .map(|c| match (c.as_str(), self.rig) {
                ("rig", Some(_)) => "CASE WHEN rig = '' THEN ?1 ELSE rig END".to_string(),
                _ => c.clone(),
            })
            .collect::<Vec<_>>()
            .join(", ")
    }

    /// The rows of `table` to copy.
    fn filter(&self, table: &str) -> String {
        if self.rig.is_none() {
            return String::new();
        }
        match table {
            "frames" | "reading" => format!(
                " WHERE NOT (rig = '' AND path IN (SELECT path FROM {table} WHERE rig = ?1))"
            ),
            "catalog_nights" | "catalog" => format!(
                " WHERE NOT (rig = '' AND EXISTS (SELECT 1 FROM catalog_nights n WHERE n.rig = ?1
                   AND n.target = {table}.target AND n.filter = {table}.filter
                   AND n.night = {table}.night))"
            ),
            "night_limits" => " WHERE NOT (rig = '' AND night IN
                   (SELECT night FROM night_limits WHERE rig = ?1))"
                .to_string(),
            "stars" | "rejected" => format!(
                " WHERE frame_id IN (SELECT id FROM frames{})",
                self.filter("frames")
            ),
            _ => String::new(),
        }
    }

    /// The small facts' key: an unnamed rig's facts are the rig's (`rig NAME: key`).
    fn meta_key(&self) -> &'static str {
        match self.rig {
            Some(_) => {
                "CASE WHEN key NOT LIKE 'rig %' AND key NOT LIKE 'daemon of rig %'
                AND key NOT LIKE 'site %' THEN 'rig ' || ?1 || ': ' || key ELSE key END"
            }
            None => "key",
        }
    }
}

/// Copy the SQLite store at `from` into the database at `to`, which must hold none of
/// the rigs `from` holds; with `rig`, the rows `from` recorded without a rig's name are
/// copied as `rig`'s. `from` is only read. Returns the rows copied per table, verified by
/// counting.
pub fn copy(
    from: &std::path::Path,
    to: &Location,
    rig: Option<&str>,
) -> Result<Copied, StoreError> {
    let dest = Store::connect(to)?;
    let source = Store::open_read_only(from, "")?;
    let job = Job {
        source: &source,
        dest: &dest,
        naming: Naming { rig },
    };
    job.source_is_current()?;
    job.rigs_are_new()?;
    let dc = &dest.conn;
    // One snapshot for the counts before and after: rigs still recording meanwhile
    // change nothing this transaction sees but its own rows.
    dc.batch(match dc.kind() {
        super::Kind::Postgres => "BEGIN ISOLATION LEVEL REPEATABLE READ",
        super::Kind::Sqlite => "BEGIN",
    })
    .map_err(|e| dest.err(e))?;
    let result = job.counts(dc).and_then(|before| {
        let copied = job.rows()?;
        job.verify(&copied, &before)?;
        Ok(copied)
    });
    match result {
        Ok(copied) => {
            dc.batch("COMMIT").map_err(|e| dest.err(e))?;
            Ok(Copied { tables: copied })
        }
        Err(e) => {
            let _ = dc.batch("ROLLBACK");
            Err(e)
        }
    }
}

/// One copy: its two stores and how rows are named on the way.
struct Job<'a> {
    source: &'a Store,
    dest: &'a Store,
    naming: Naming<'a>,
}

impl Job<'_> {
    /// The source's schema must be this program's: columns are copied by name.
    fn source_is_current(&self) -> Result<(), StoreError> {
        let source = self.source;
        let version = super::schema::version_of(&source.conn).map_err(|e| source.err(e))?;
        if version != super::SCHEMA_VERSION {
            return Err(StoreError::Settings {
                store: source.place.clone(),
                message: format!(
                    "is at schema version {version}, this program's is {}; run this version's daemon or `subwatch status` on it once so it is brought up to date, then copy it",
                    super::SCHEMA_VERSION
                ),
            });
        }
        Ok(())
    }

    /// Every rig of the source has a name, and the destination holds none of them.
    fn rigs_are_new(&self) -> Result<(), StoreError> {
        let (source, dest, naming) = (self.source, self.dest, &self.naming);
        let rigs: Vec<String> = naming
            .rows(
                source,
                &format!(
                    "SELECT DISTINCT {} FROM frames{} ORDER BY 1",
                    naming.select(&["rig".to_string()]),
                    naming.filter("frames")
                ),
            )?
            .iter()
            .map(|r| r.get(0))
            .collect::<Result<_, _>>()
            .map_err(|e| source.err(e))?;
        if rigs.iter().any(String::is_empty) {
            return Err(StoreError::Settings {
                store: source.place.clone(),
                message: "holds frames of a rig without a name; name it (store copy --rig NAME) so the site can tell its frames from another rig's".into(),
            });
        }
        for rig in &rigs {
            let there = count(
                &dest.conn,
                "SELECT COUNT(*) FROM frames WHERE rig = ?1",
                values![rig],
            )
            .map_err(|e| dest.err(e))?;
            if there > 0 {
                return Err(StoreError::Settings {
                    store: dest.place.clone(),
                    message: format!(
                        "already holds {there} frame(s) of rig '{rig}'; copy a store into a database that does not have its rigs yet"
                    ),
                });
            }
        }
        Ok(())
    }

    /// Each copied table's rows in the destination before the copy.
    fn counts(&self, dc: &Conn) -> Result<HashMap<&'static str, i64>, StoreError> {
        let mut before = HashMap::new();
        for table in ["frames"]
            .iter()
            .chain(FRAME_TABLES)
            .chain(PLAIN_TABLES)
            .chain(ID_TABLES)
        {
            let n = count(dc, &format!("SELECT COUNT(*) FROM {table}"), &[])
                .map_err(|e| self.dest.err(e))?;
            before.insert(*table, n);
        }
        Ok(before)
    }

    /// Every row, in the destination's open transaction: frames with new ids, the rows
    /// hanging from them, the other tables, and the small facts the destination lacks.
    fn rows(&self) -> Result<Vec<(String, i64)>, StoreError> {
        let new_id = self.frames()?;
        let mut copied = vec![("frames".to_string(), new_id.len() as i64)];
        for table in FRAME_TABLES {
            copied.push((table.to_string(), self.frame_table(table, &new_id)?));
        }
        for (table, keep_id) in PLAIN_TABLES
            .iter()
            .map(|t| (t, true))
            .chain(ID_TABLES.iter().map(|t| (t, false)))
        {
            copied.push((table.to_string(), self.plain_table(table, keep_id)?));
        }
        self.meta()?;
        Ok(copied)
    }

    /// The frames, each with a new id: the source's id to the destination's.
    fn frames(&self) -> Result<HashMap<i64, i64>, StoreError> {
        let (source, naming, dc) = (self.source, &self.naming, &self.dest.conn);
        let frame_columns: Vec<String> = columns(source, "frames")?
            .into_iter()
            .filter(|c| c != "id")
            .collect();
        let insert_frame = format!(
            "INSERT INTO frames ({}) VALUES ({}) RETURNING id",
            frame_columns.join(", "),
            placeholders(frame_columns.len(), 1)
        );
        let mut new_id: HashMap<i64, i64> = HashMap::new();
        let placement_at = frame_columns.iter().position(|c| c == "placement_json");
        let mut placed = Vec::new();
        for row in naming.rows(
            source,
            &format!(
                "SELECT id, {} FROM frames{} ORDER BY id",
                naming.select(&frame_columns),
                naming.filter("frames")
            ),
        )? {
            let old: i64 = row.get(0).map_err(|e| source.err(e))?;
            let id: i64 = dc
                .query_one(&insert_frame, &row.0[1..])
                .and_then(|r| r.get(0))
                .map_err(|e| self.dest.err(e))?;
            new_id.insert(old, id);
            if let Some(Value::Text(json)) = placement_at.map(|k| &row.0[1 + k]) {
                placed.push((id, super::frames::stored_placement(json)));
            }
        }
        self.placements(placed, &new_id)?;
        Ok(new_id)
    }

    /// A placement names its reference by record id: each copied one is pointed at the
    /// reference's new id. One whose reference was not copied, or stored in the form
    /// before ids, is left out: the frame is placed again when its group is next judged.
    fn placements(
        &self,
        placed: Vec<(i64, Option<Placement>)>,
        new_id: &HashMap<i64, i64>,
    ) -> Result<(), StoreError> {
        for (id, placement) in placed {
            let moved = placement.and_then(|mut p| {
                p.reference = *new_id.get(&p.reference)?;
                serde_json::to_string(&p).ok()
            });
            self.dest
                .conn
                .execute(
                    "UPDATE frames SET placement_json = ?2 WHERE id = ?1",
                    values![id, moved],
                )
                .map_err(|e| self.dest.err(e))?;
        }
        Ok(())
    }

    /// A table of rows hanging from frames, pointed at the frames' new ids.
    fn frame_table(&self, table: &str, new_id: &HashMap<i64, i64>) -> Result<i64, StoreError> {
        let source = self.source;
        let cols: Vec<String> = columns(source, table)?
            .into_iter()
            .filter(|c| c != "frame_id")
            .collect();
        let mut rows = Vec::new();
        for row in self.naming.rows(
            source,
            &format!(
                "SELECT frame_id, {} FROM {table}{}",
                cols.join(", "),
                self.naming.filter(table)
            ),
        )? {
            let old: i64 = row.get(0).map_err(|e| source.err(e))?;
            let Some(id) = new_id.get(&old) else { continue };
            let mut values = vec![Value::Int(*id)];
            values.extend_from_slice(&row.0[1..]);
            rows.push(values);
        }
        let mut names = vec!["frame_id"];
        names.extend(cols.iter().map(String::as_str));
        self.dest
            .conn
            .insert_rows(table, &names, &rows)
            .map_err(|e| self.dest.err(e))?;
        Ok(rows.len() as i64)
    }

    /// A table of its own, its ids kept (`keep_id`) or given anew.
    fn plain_table(&self, table: &str, keep_id: bool) -> Result<i64, StoreError> {
        let cols: Vec<String> = columns(self.source, table)?
            .into_iter()
            .filter(|c| keep_id || c != "id")
            .collect();
        let insert = format!(
            "INSERT INTO {table} ({}) VALUES ({})",
            cols.join(", "),
            placeholders(cols.len(), 1)
        );
        let rows = self.naming.rows(
            self.source,
            &format!(
                "SELECT {} FROM {table}{}",
                self.naming.select(&cols),
                self.naming.filter(table)
            ),
        )?;
        for row in &rows {
            self.dest
                .conn
                .execute(&insert, &row.0)
                .map_err(|e| self.dest.err(e))?;
        }
        Ok(rows.len() as i64)
    }

    /// The small facts, where the destination does not have them already.
    fn meta(&self) -> Result<(), StoreError> {
        let rows = self.naming.rows(
            self.source,
            &format!("SELECT {}, value FROM meta", self.naming.meta_key()),
        )?;
        for row in &rows {
            self.dest
                .conn
                .execute(
                    "INSERT INTO meta (key, value) VALUES (?1, ?2) ON CONFLICT (key) DO NOTHING",
                    &row.0,
                )
                .map_err(|e| self.dest.err(e))?;
        }
        Ok(())
    }

    /// Verified by counting: each table's source rows, and what the destination gained.
    fn verify(
        &self,
        copied: &[(String, i64)],
        before: &HashMap<&'static str, i64>,
    ) -> Result<(), StoreError> {
        let (source, dest, naming) = (self.source, self.dest, &self.naming);
        for (table, n) in copied {
            let sql = format!("SELECT COUNT(*) FROM {table}");
            let filtered = format!("{sql}{}", naming.filter(table));
            let in_source = count(&source.conn, &filtered, &naming.params(&filtered))
                .map_err(|e| source.err(e))?;
            let gained =
                count(&dest.conn, &sql, &[]).map_err(|e| dest.err(e))? - before[table.as_str()];
            if in_source != *n || gained != *n {
                return Err(StoreError::Settings {
                    store: dest.place.clone(),
                    message: format!(
                        "{table}: {in_source} row(s) in the source, {n} copied, {gained} more in the database; nothing was copied"
                    ),
                });
            }
        }
        Ok(())
    }
}
