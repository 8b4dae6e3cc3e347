//! The store's server away (a shared database restarting, the network to it down) or
//! refusing the daemon's login (its password changed mid-night): said once when it
//! starts, again only when the reason changes (a server back with another password), and
//! once when the store answers again, however many frames land meanwhile. The frames are
//! kept and recorded when it returns; nothing here waits or retries.

use std::sync::Mutex;

use crate::store::StoreError;

/// Why the store does not take frames.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Reason {
    Away,
    LoginRefused,
}

#[derive(Default)]
pub(super) struct Outage {
    /// Since when the store has not taken frames, and the last reason said.
    since: Mutex<Option<(f64, Reason)>>,
}

impl Outage {
    /// A store error was met. Returns whether it is the store being away or refusing
    /// the login: then it was logged (when it began or its reason changed) and the
    /// caller says nothing more.
    pub(super) fn failed(&self, e: &StoreError, now: f64) -> bool {
        let reason = if e.is_login_refused() {
            Reason::LoginRefused
        } else if e.is_unreachable() {
            Reason::Away
        } else {
            return false;
        };
        let mut since = self.since.lock().unwrap_or_else(|p| p.into_inner());
        if since.is_none_or(|(_, said)| said != reason) {
            *since = Some((since.map_or(now, |(t, _)| t), reason));
            match reason {
                Reason::Away => tracing::error!(
                    "the store cannot be reached: {e}; frames go on being read and are kept, and recorded once it is back (said once)"
                ),
                Reason::LoginRefused => tracing::error!(
                    "the store refuses this daemon's login: {e}; put the role's password in [store] password_file (it is read again at every try) or let this host in; frames go on being read and are kept, and recorded once it is back (said once)"
                ),
            }
        }
        true
    }

    /// The store answered: if it was away, say for how long.
    pub(super) fn answered(&self, now: f64, waiting: usize) {
        let mut since = self.since.lock().unwrap_or_else(|p| p.into_inner());
        if let Some((t, _)) = since.take() {
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
