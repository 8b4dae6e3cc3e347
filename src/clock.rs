//! The wall clock, read in one place. Everything that decides by the time of day takes
//! the time as an argument (`watch::schedule`, `watch::alerts`, `watch::settle`); the
//! daemon reads it through a [`Clock`] it is given, so a test can give it another.

/// A source of the current time.
pub trait Clock: Send + Sync {
    /// Seconds since 1970-01-01T00:00:00 UTC.
    fn now_unix(&self) -> f64;
}

/// The system's clock.
#[derive(Debug, Clone, Copy, Default)]
pub struct SystemClock;

impl Clock for SystemClock {
    fn now_unix(&self) -> f64 {
        std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64())
    }
}

/// Now, by the system's clock (for the one-shot commands).
pub fn now_unix() -> f64 {
    SystemClock.now_unix()
}
