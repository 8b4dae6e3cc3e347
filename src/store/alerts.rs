//! Alerts raised (which also carry their rate limit across restarts) and the key-value
//! table of small facts (the daemon's heartbeat, what was already alerted or mailed).

use rusqlite::{params, OptionalExtension};

use super::{Store, StoreError};

impl Store {
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

    /// The alerts raised for `night`, oldest first: (time, kind, message).
    pub fn night_alerts(&self, night: &str) -> Result<Vec<(f64, String, String)>, StoreError> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT created_unix, kind, message FROM alerts WHERE night = ?1 ORDER BY created_unix, id",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map(params![night], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
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
