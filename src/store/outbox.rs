//! The outbox's rows: messages kept until a server took them, with their attempts.

use rusqlite::params;

use super::{Store, StoreError};

/// A message in the outbox: formatted bytes (RFC 5322) and the envelope.
#[derive(Debug, Clone, PartialEq)]
pub struct OutboxMessage {
    pub subject: String,
    pub from: String,
    pub to: Vec<String>,
    pub bytes: Vec<u8>,
}

impl Store {
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

    /// The outbox at a glance: messages waiting, and the last error of any that failed.
    pub fn outbox_state(&self) -> Result<(usize, Option<String>), StoreError> {
        self.conn
            .query_row(
                "SELECT COUNT(*), (SELECT last_error FROM outbox WHERE status = 'queued' AND last_error IS NOT NULL ORDER BY id DESC LIMIT 1)
                 FROM outbox WHERE status = 'queued'",
                [],
                |r| Ok((r.get::<_, i64>(0)? as usize, r.get(1)?)),
            )
            .map_err(|e| self.err(e))
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
}
