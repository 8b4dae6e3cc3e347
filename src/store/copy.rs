//! Moving an SQLite store into a shared PostgreSQL database (`subwatch store copy`): every
//! row of every table, in one transaction, frames given new ids (other rigs' frames may
//! hold the old ones) and their stars and rejected detections following them; then each
//! table's rows counted on both sides.

use std::collections::HashMap;

use super::db::{values, Conn, DbError, Value};
use super::{Location, Store, StoreError};

/// Tables whose rows are copied as they are (every column), in this order.
const PLAIN_TABLES: &[&str] = &["reading", "catalog_nights", "catalog"];
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

/// Copy the SQLite store at `from` into the database at `to`, which must hold none of
/// the rigs `from` holds. Returns the rows copied per table, verified by counting.
pub fn copy(from: &std::path::Path, to: &Location) -> Result<Copied, StoreError> {
    let source = Store::open(from)?;
    let dest = Store::connect(to)?;
    let rigs: Vec<String> = source
        .rows("SELECT DISTINCT rig FROM frames ORDER BY rig", &[])?
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
    let mut copied = Vec::new();
    let dc = &dest.conn;
    // One snapshot for the counts before and after: rigs still recording meanwhile
    // change nothing this transaction sees but its own rows.
    dc.batch(match dc.kind() {
        super::Kind::Postgres => "BEGIN ISOLATION LEVEL REPEATABLE READ",
        super::Kind::Sqlite => "BEGIN",
    })
    .map_err(|e| dest.err(e))?;
    let mut before: HashMap<&str, i64> = HashMap::new();
    for table in ["frames"]
        .iter()
        .chain(FRAME_TABLES)
        .chain(PLAIN_TABLES)
        .chain(ID_TABLES)
    {
        match count(dc, &format!("SELECT COUNT(*) FROM {table}"), &[]) {
            Ok(n) => before.insert(table, n),
            Err(e) => {
                let _ = dc.batch("ROLLBACK");
                return Err(dest.err(e));
            }
        };
    }
    let result = (|| -> Result<(), StoreError> {
        let at_dest = |e| dest.err(e);
        let at_source = |e| source.err(e);
        // Frames, each with a new id.
        let frame_columns: Vec<String> = columns(&source, "frames")?
            .into_iter()
            .filter(|c| c != "id")
            .collect();
        let insert_frame = format!(
            "INSERT INTO frames ({}) VALUES ({}) RETURNING id",
            frame_columns.join(", "),
            placeholders(frame_columns.len(), 1)
        );
        let mut new_id: HashMap<i64, i64> = HashMap::new();
        for row in source.rows(
            &format!(
                "SELECT id, {} FROM frames ORDER BY id",
                frame_columns.join(", ")
            ),
            &[],
        )? {
            let old: i64 = row.get(0).map_err(at_source)?;
            let id: i64 = dc
                .query_one(&insert_frame, &row.0[1..])
                .and_then(|r| r.get(0))
                .map_err(at_dest)?;
            new_id.insert(old, id);
        }
        copied.push(("frames".to_string(), new_id.len() as i64));
        for table in FRAME_TABLES {
            let cols: Vec<String> = columns(&source, table)?
                .into_iter()
                .filter(|c| c != "frame_id")
                .collect();
            let mut rows = Vec::new();
            for row in source.rows(
                &format!("SELECT frame_id, {} FROM {table}", cols.join(", ")),
                &[],
            )? {
                let old: i64 = row.get(0).map_err(at_source)?;
                let Some(id) = new_id.get(&old) else { continue };
                let mut values = vec![Value::Int(*id)];
                values.extend_from_slice(&row.0[1..]);
                rows.push(values);
            }
            let mut names = vec!["frame_id"];
            names.extend(cols.iter().map(String::as_str));
            dc.insert_rows(table, &names, &rows).map_err(at_dest)?;
            copied.push((table.to_string(), rows.len() as i64));
        }
        for (table, keep_id) in PLAIN_TABLES
            .iter()
            .map(|t| (t, true))
            .chain(ID_TABLES.iter().map(|t| (t, false)))
        {
            let cols: Vec<String> = columns(&source, table)?
                .into_iter()
                .filter(|c| keep_id || c != "id")
                .collect();
            let insert = format!(
                "INSERT INTO {table} ({}) VALUES ({})",
                cols.join(", "),
                placeholders(cols.len(), 1)
            );
            let rows = source.rows(&format!("SELECT {} FROM {table}", cols.join(", ")), &[])?;
            for row in &rows {
                dc.execute(&insert, &row.0).map_err(at_dest)?;
            }
            copied.push((table.to_string(), rows.len() as i64));
        }
        // The small facts, where the destination does not have them already.
        let rows = source.rows("SELECT key, value FROM meta", &[])?;
        for row in &rows {
            dc.execute(
                "INSERT INTO meta (key, value) VALUES (?1, ?2) ON CONFLICT (key) DO NOTHING",
                &row.0,
            )
            .map_err(at_dest)?;
        }
        // Verified by counting: each table's source rows, and what the destination
        // gained.
        for (table, n) in &copied {
            let sql = format!("SELECT COUNT(*) FROM {table}");
            let in_source = count(&source.conn, &sql, &[]).map_err(at_source)?;
            let gained = count(dc, &sql, &[]).map_err(at_dest)? - before[table.as_str()];
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
    })();
    match result {
        Ok(()) => {
            dc.batch("COMMIT").map_err(|e| dest.err(e))?;
            Ok(Copied { tables: copied })
        }
        Err(e) => {
            let _ = dc.batch("ROLLBACK");
            Err(e)
        }
    }
}
