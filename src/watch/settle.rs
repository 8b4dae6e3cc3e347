//! Deciding when a file is complete: its size and modification time unchanged for the
//! settle time (a capture program writes over several seconds), and, for plain FITS, all
//! the bytes its header promises present. Pure bookkeeping; the caller observes the files.

use std::collections::HashMap;
use std::path::PathBuf;

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observation {
    pub size: u64,
    pub mtime_ns: i64,
}

#[derive(Debug, Clone)]
struct Watched {
    last: Observation,
    /// Seconds (on the caller's clock) since which `last` has not changed.
    stable_since: f64,
}

/// Files seen but not yet handed on.
#[derive(Debug, Default)]
pub struct SettleTracker {
    files: HashMap<PathBuf, Watched>,
}

impl SettleTracker {
    pub fn len(&self) -> usize {
        self.files.len()
    }

    pub fn is_empty(&self) -> bool {
        self.files.is_empty()
    }

    pub fn contains(&self, path: &PathBuf) -> bool {
        self.files.contains_key(path)
    }

    /// Start (or keep) tracking a file. `already_stable_for` lets files found at start-up
    /// that have not changed for a long time count as settled at once.
    pub fn track(&mut self, path: PathBuf, obs: Observation, now: f64, already_stable_for: f64) {
        self.files.entry(path).or_insert(Watched {
            last: obs,
            stable_since: now - already_stable_for.max(0.0),
        });
    }

    pub fn forget(&mut self, path: &PathBuf) {
        self.files.remove(path);
    }

    pub fn paths(&self) -> Vec<PathBuf> {
        self.files.keys().cloned().collect()
    }

    /// How long a tracked file has been unchanged.
    pub fn stable_for(&self, path: &PathBuf, now: f64) -> f64 {
        self.files.get(path).map_or(0.0, |w| now - w.stable_since)
    }

    /// A tracked file its writer still holds open (a sharing violation on Windows): not
    /// settled, whatever its size and time say, as if it had just changed. Its settle time
    /// starts again from `now`, so it is read `settle` seconds after the writer lets go,
    /// and a file held for long is never taken for one cut off mid-write.
    pub fn restart(&mut self, path: &PathBuf, now: f64) {
        if let Some(w) = self.files.get_mut(path) {
            w.stable_since = now;
        }
    }

    /// Record a new observation of a tracked file (None: it is gone). Returns true when
    /// the file has been unchanged for `settle` seconds.
    pub fn observe(
        &mut self,
        path: &PathBuf,
        obs: Option<Observation>,
        now: f64,
        settle: f64,
    ) -> bool {
        let Some(obs) = obs else {
            self.files.remove(path);
            return false;
        };
        let Some(w) = self.files.get_mut(path) else {
            return false;
        };
        if w.last != obs {
            w.last = obs;
            w.stable_since = now;
            return false;
        }
        now - w.stable_since >= settle
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_growing_file_settles_only_after_it_stops_changing() {
        let mut t = SettleTracker::default();
        let p = PathBuf::from("/f.fits");
        let o = |size| Observation {
            size,
            mtime_ns: size as i64,
        };
        t.track(p.clone(), o(100), 0.0, 0.0);
        assert!(!t.observe(&p, Some(o(200)), 1.0, 2.0));
        assert!(!t.observe(&p, Some(o(300)), 2.0, 2.0));
        assert!(!t.observe(&p, Some(o(300)), 3.5, 2.0));
        assert!(t.observe(&p, Some(o(300)), 4.0, 2.0));
        // Deleted before it settled: forgotten.
        assert!(!t.observe(&p, None, 5.0, 2.0));
        assert!(t.is_empty());
    }

    #[test]
    fn a_file_still_held_by_its_writer_settles_only_after_it_is_let_go() {
        let mut t = SettleTracker::default();
        let p = PathBuf::from("/f.fits");
        let o = Observation {
            size: 2880,
            mtime_ns: 1,
        };
        // Found at start-up, unchanged for an hour: settled at once...
        t.track(p.clone(), o, 0.0, 3600.0);
        assert!(t.observe(&p, Some(o), 0.0, 2.0));
        // ...but its writer holds it: the settle time starts again, as for a change.
        t.restart(&p, 0.0);
        assert!(t.stable_for(&p, 1.0) < 2.0);
        assert!(!t.observe(&p, Some(o), 1.0, 2.0));
        assert!(t.observe(&p, Some(o), 2.0, 2.0));
    }
}
