//! Alerts raised (which also carry their rate limit across restarts) and the key-value
//! table of small facts (the daemon's heartbeat, what was already alerted or mailed).

use super::db::{values, DbError};
use super::{Store, StoreError};

impl Store {
    /// When an alert of `kind` last went out, and how many went out for `night`.
    pub fn alert_history(
        &self,
        night: &str,
        kind: &str,
    ) -> Result<(Option<f64>, usize), StoreError> {
        let read = || -> Result<(Option<f64>, i64), DbError> {
            let last = self
                .conn
                .query_one(
                    "SELECT MAX(created_unix) FROM alerts WHERE kind = ?1 AND rig = ?2",
                    values![kind, self.rig],
                )?
                .get(0)?;
            let count = self
                .conn
                .query_one(
                    "SELECT COUNT(*) FROM alerts WHERE night = ?1 AND rig = ?2",
                    values![night, self.rig],
                )?
                .get(0)?;
            Ok((last, count))
        };
        let (last, count) = read().map_err(|e| self.err(e))?;
        Ok((last, count as usize))
    }

    /// Whether this exact alert (night, kind, message) was raised already.
    pub fn alert_exists(&self, night: &str, kind: &str, message: &str) -> Result<bool, StoreError> {
        Ok(!self
            .rows(
                "SELECT 1 FROM alerts WHERE night = ?1 AND kind = ?2 AND message = ?3 AND rig = ?4",
                values![night, kind, message, self.rig],
            )?
            .is_empty())
    }

    pub fn add_alert(
        &self,
        night: &str,
        kind: &str,
        message: &str,
        now_unix: f64,
    ) -> Result<(), StoreError> {
        self.run(
            "INSERT INTO alerts (night, kind, created_unix, message, rig)
             VALUES (?1, ?2, ?3, ?4, ?5)",
            values![night, kind, now_unix, message, self.rig],
        )
    }

    /// The alerts raised for `night`, oldest first: (time, kind, message).
    pub fn night_alerts(&self, night: &str) -> Result<Vec<(f64, String, String)>, StoreError> {
        self.rows(
            "SELECT created_unix, kind, message FROM alerts
             WHERE night = ?1 AND (rig = ?2 OR ?2 IS NULL)
             ORDER BY created_unix, id",
            values![night, self.scope()],
        )?
        .iter()
        .map(|r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// Keep a small fact of this rig's (a named rig's keys are its own in a shared store).
    pub fn set_meta(&self, key: &str, value: &str) -> Result<(), StoreError> {
        self.run(
            "INSERT INTO meta (key, value) VALUES (?1, ?2)
             ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            values![self.meta_key(key), value],
        )
    }

    /// A small fact of this rig's.
    pub fn meta(&self, key: &str) -> Result<Option<String>, StoreError> {
        match self
            .rows(
                "SELECT value FROM meta WHERE key = ?1",
                values![self.meta_key(key)],
            )?
            .first()
        {
            Some(r) => r.get(0).map(Some).map_err(|e| self.err(e)),
            None => Ok(None),
        }
    }

    /// A small fact of another rig's (its daemon's heartbeat, for a site's page).
    pub fn rig_meta(&self, rig: &str, key: &str) -> Result<Option<String>, StoreError> {
        let key = if rig.is_empty() {
            key.to_string()
        } else {
            format!("rig {rig}: {key}")
        };
        match self
            .rows("SELECT value FROM meta WHERE key = ?1", values![key])?
            .first()
        {
            Some(r) => r.get(0).map(Some).map_err(|e| self.err(e)),
            None => Ok(None),
        }
    }

    /// The key this rig keeps `key` under: as given for an unnamed rig, "rig NAME: key"
    /// for a named one.
    fn meta_key(&self, key: &str) -> String {
        if self.rig.is_empty() {
            key.to_string()
        } else {
            format!("rig {}: {key}", self.rig)
        }
    }
}
