//! The outbox's rows: messages kept until a server took them, with their attempts.

use super::db::{values, DbError};
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
            .query_one(
                "INSERT INTO outbox (created_unix, subject, envelope_from, envelope_to, message,
                    next_attempt_unix, rig)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?1, ?6) RETURNING id",
                values![
                    now_unix,
                    c.subject,
                    c.from,
                    serde_json::to_string(&c.to).unwrap_or_default(),
                    c.bytes,
                    self.rig
                ],
            )
            .and_then(|r| r.get(0))
            .map_err(|e| self.err(e))
    }

    /// The outbox at a glance: messages waiting, and the last error of any that failed.
    pub fn outbox_state(&self) -> Result<(usize, Option<String>), StoreError> {
        self.conn
            .query_one(
                "SELECT COUNT(*), (SELECT last_error FROM outbox
                     WHERE status = 'queued' AND last_error IS NOT NULL AND rig = ?1
                     ORDER BY id DESC LIMIT 1)
                 FROM outbox WHERE status = 'queued' AND rig = ?1",
                values![self.rig],
            )
            .and_then(|r| Ok((r.get::<i64>(0)? as usize, r.get(1)?)))
            .map_err(|e| self.err(e))
    }

    /// This rig's messages due for (another) attempt: each daemon of a site sends its own.
    pub fn due_mail(&self, now_unix: f64) -> Result<Vec<(i64, OutboxMessage, i64)>, StoreError> {
        self.rows(
            "SELECT id, subject, envelope_from, envelope_to, message, attempts FROM outbox
             WHERE status = 'queued' AND next_attempt_unix <= ?1 AND rig = ?2 ORDER BY id",
            values![now_unix, self.rig],
        )?
        .iter()
        .map(|r| {
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
        .collect::<Result<_, DbError>>()
        .map_err(|e| self.err(e))
    }

    /// Mark a message delivered (`status` "sent") or written to a file ("written").
    pub fn mail_done(&self, id: i64, status: &str, now_unix: f64) -> Result<(), StoreError> {
        self.run(
            "UPDATE outbox SET status = ?2, done_unix = ?3 WHERE id = ?1",
            values![id, status, now_unix],
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
            "UPDATE outbox SET attempts = attempts + 1, last_error = ?2, next_attempt_unix = ?3
             WHERE id = ?1",
            values![id, error, next_attempt_unix],
        )
    }
}
