//! The store's server away (a shared database restarting, the network to it down): said
//! once when it goes and once when it is back, however many frames land meanwhile. The
//! frames are kept and recorded when it returns; nothing here waits or retries.

use std::sync::Mutex;

use crate::store::StoreError;

#[derive(Default)]
pub(super) struct Outage {
    /// When the store was first found away, while it is.
    since: Mutex<Option<f64>>,
}

impl Outage {
    /// A store error was met. Returns whether it is the store being away: then it was
    /// logged (the first time) and the caller says nothing more.
    pub(super) fn failed(&self, e: &StoreError, now: f64) -> bool {
        if !e.is_unreachable() {
            return false;
        }
        let mut since = self.since.lock().unwrap_or_else(|p| p.into_inner());
        if since.is_none() {
            *since = Some(now);
            tracing::error!(
                "the store cannot be reached: {e}; frames go on being read and are kept, and recorded once it is back (said once)"
            );
        }
        true
    }

    /// The store answered: if it was away, say for how long.
    pub(super) fn answered(&self, now: f64, waiting: usize) {
        let mut since = self.since.lock().unwrap_or_else(|p| p.into_inner());
        if let Some(t) = since.take() {
            let kept = if waiting > 0 {
                format!("; {waiting} frame(s) kept meanwhile are being recorded")
            } else {
                String::new()
            };
            tracing::info!("the store is back after {:.0} s{kept}", (now - t).max(0.0));
        }
    }

    pub(super) fn away(&self) -> bool {
        self.since
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .is_some()
    }
}
