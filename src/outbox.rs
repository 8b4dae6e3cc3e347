//! The outbox's delivery: every message waits in the store until a server took it (or,
//! with no server configured, until it was written as an .eml file), and a failed one
//! is tried again after 1, 2, 4, … minutes (at most an hour). A shell between `store`,
//! which keeps the messages, and `mail`, which composes and sends them.

use std::path::{Path, PathBuf};

use crate::mail::{send_raw, Composed, MailError, MailSettings};
use crate::store::{OutboxMessage, Store, StoreError};

impl From<Composed> for OutboxMessage {
    fn from(c: Composed) -> Self {
        OutboxMessage {
            subject: c.subject,
            from: c.from,
            to: c.to,
            bytes: c.bytes,
        }
    }
}

/// Put a composed message in the outbox; returns its id.
pub fn queue(store: &Store, message: Composed, now_unix: f64) -> Result<i64, StoreError> {
    store.enqueue_mail(&message.into(), now_unix)
}

/// Where one delivery went.
#[derive(Debug, Clone, PartialEq)]
pub enum Delivered {
    /// The server took it.
    Sent,
    /// No server is configured: written as an .eml file.
    Written(PathBuf),
}

/// Deliver one message now: to the server, or into `eml_folder` as `name` without one.
pub fn deliver(
    settings: &MailSettings,
    m: &OutboxMessage,
    eml_folder: &Path,
    name: &str,
) -> Result<Delivered, MailError> {
    if settings.host.is_none() {
        return write_eml(eml_folder, name, &m.bytes)
            .map(Delivered::Written)
            .map_err(|e| {
                MailError::Settings(format!(
                    "cannot write {name} into {}: {e}",
                    eml_folder.display()
                ))
            });
    }
    send_raw(settings, &m.from, &m.to, &m.bytes).map(|_| Delivered::Sent)
}

/// Write a message as an .eml file.
fn write_eml(folder: &Path, name: &str, bytes: &[u8]) -> std::io::Result<PathBuf> {
    std::fs::create_dir_all(folder)?;
    let path = folder.join(name);
    std::fs::write(&path, bytes)?;
    Ok(path)
}

/// Which messages a pass over the outbox tries.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Due {
    /// Those whose wait after a failure is over.
    AsScheduled,
    /// All of them, now (`subwatch outbox --now`).
    Now,
}

impl Due {
    /// The latest next-attempt time a message may have to be tried at `now`.
    pub fn by(self, now_unix: f64) -> f64 {
        match self {
            Due::AsScheduled => now_unix,
            Due::Now => f64::INFINITY,
        }
    }
}

/// What one pass over the outbox did.
#[derive(Debug, Default, Clone, PartialEq)]
pub struct FlushReport {
    pub sent: usize,
    pub written: Vec<PathBuf>,
    pub failed: Vec<String>,
}

/// How long a message waits after its `attempts`-th failure: 1, 2, 4, … minutes, at
/// most an hour.
pub fn retry_wait(attempts: i64) -> f64 {
    (60.0 * 2f64.powi(attempts.clamp(0, 6) as i32)).min(3600.0)
}

/// Deliver every message due by `due_unix`, stamping the outcome at `now_unix`. A
/// delivered message is never sent again.
pub fn flush(
    store: &Store,
    settings: &MailSettings,
    eml_folder: &Path,
    due_unix: f64,
    now_unix: f64,
) -> Result<FlushReport, StoreError> {
    let mut report = FlushReport::default();
    for (id, msg, attempts) in store.due_mail(due_unix)? {
        match deliver(
            settings,
            &msg,
            eml_folder,
            &format!("subwatch-mail-{id}.eml"),
        ) {
            Ok(Delivered::Sent) => {
                store.mail_done(id, "sent", now_unix)?;
                report.sent += 1;
            }
            Ok(Delivered::Written(p)) => {
                store.mail_done(id, "written", now_unix)?;
                report.written.push(p);
            }
            Err(e) => {
                let wait = retry_wait(attempts);
                store.mail_failed(id, &e.to_string(), now_unix + wait)?;
                report
                    .failed
                    .push(format!("message {id}: {e} (next try in {wait:.0} s)"));
            }
        }
    }
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn waits_double_to_an_hour() {
        let waits: Vec<f64> = (0..8).map(retry_wait).collect();
        assert_eq!(
            waits,
            [60.0, 120.0, 240.0, 480.0, 960.0, 1920.0, 3600.0, 3600.0]
        );
    }
}
