//! One frame's way through the daemon: read (in a reader process), recorded once,
//! judged live, moved aside when rejected and asked to, a streak of rejections alerted,
//! and one line logged; and the files a stopped daemon left in the reader.

use std::path::{Path, PathBuf};

use super::{alerts, checks, judge_in_store, observe, Shared};
use crate::logging::shown;
use crate::record::{FrameRecord, FrameStatus};
use crate::rules::Verdict;
use crate::store::{Recorded, Store, StoreError};

/// A file that was being read when the daemon stopped this many times is not read again
/// until it changes: it is recorded as unreadable.
const GIVE_UP_AFTER_INTERRUPTIONS: i64 = 3;
/// A line for the log, at its level.
pub(super) enum LogLine {
    Info(String),
    Warn(String),
}

/// What became of one file, or of one record kept for a failing store.
pub(super) enum Outcome {
    /// In the store, now or before: the version recorded, and what to log.
    Stored {
        path: PathBuf,
        version: (u64, i64),
        log: Option<LogLine>,
    },
    /// Read, but the store did not take it: kept to store again.
    NotStored {
        record: Box<FrameRecord>,
        error: String,
    },
    /// The file went before it could be read.
    Gone(PathBuf),
    /// Its writer still holds it open: not read, to be settled again.
    StillBeingWritten(PathBuf),
}

/// One line per frame: its numbers under the night document's names, or why it was set
/// aside or could not be read. A frame without a readable DATE-OBS says so, since its
/// night then comes from the file's time.
fn frame_line(record: &FrameRecord) -> LogLine {
    let path = shown(Path::new(&record.identity.path));
    let reason = || crate::logging::one_line(record.error.as_deref().unwrap_or(""));
    let undated = if record.time_unix.is_none() {
        " (no readable DATE-OBS: night taken from the file's time)"
    } else {
        ""
    };
    match (&record.status, &record.metrics) {
        (FrameStatus::Ok, Some(m)) => LogLine::Info(format!(
            "{path} measured: night={} star_count={} fwhm_px={} eccentricity={} background_adu={:.1} noise_adu={:.2}{undated}{}",
            record.night.as_deref().unwrap_or("-"),
            m.star_count,
            m.fwhm_px.map_or("-".into(), |v| format!("{v:.2}")),
            m.eccentricity.map_or("-".into(), |v| format!("{v:.2}")),
            m.background_adu,
            m.noise_adu,
            m.sky_fit_note
                .as_ref()
                .map_or(String::new(), |n| format!(
                    "; not placed on the sky: {}",
                    crate::logging::one_line(n)
                ))
        )),
        (FrameStatus::Skipped, _) => LogLine::Info(format!("{path} skipped: {}", reason())),
        _ => LogLine::Warn(format!("{path} unreadable: {}", reason())),
    }
}

/// Read one file (in a reader process) and store its record.
pub(super) fn process(shared: &Shared, path: &Path) -> Outcome {
    let Some(identity) = observe(path) else {
        return Outcome::Gone(path.to_path_buf());
    };
    {
        let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
        let now = shared.clock.now_unix();
        if let Err(e) = store.begin_reading(&identity, now) {
            if !shared.outage.failed(&e, now) {
                tracing::error!("{e} (marking {} as being read)", shown(path));
            }
        }
    }
    let mtime_unix = identity.mtime_unix();
    match shared
        .reader
        .try_record(path, identity.clone(), mtime_unix, &shared.options)
    {
        Ok(record) => store_record(shared, record),
        Err(_) => {
            // Taken back in hand between the settle and the read: not finished after all.
            let store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
            if let Err(e) = store.end_reading(&identity) {
                tracing::debug!("{e} (clearing the mark of {})", shown(path));
            }
            Outcome::StillBeingWritten(path.to_path_buf())
        }
    }
}

/// Store a record, judge it, and do what the configuration asks with it.
pub(super) fn store_record(shared: &Shared, record: FrameRecord) -> Outcome {
    let path = PathBuf::from(&record.identity.path);
    let version = (record.identity.size, record.identity.mtime_ns);
    let mut store = shared.store.lock().unwrap_or_else(|p| p.into_inner());
    let now = shared.clock.now_unix();
    let recorded = match store.record_frame(&record, now) {
        Ok(r) => r,
        Err(e) => {
            shared.outage.failed(&e, now);
            return Outcome::NotStored {
                record: Box::new(record),
                error: e.to_string(),
            };
        }
    };
    let (mut line, warn) = match frame_line(&record) {
        LogLine::Info(l) => (l, false),
        LogLine::Warn(l) => (l, true),
    };
    let id = match recorded {
        Recorded::Already => {
            return Outcome::Stored {
                path,
                version,
                log: None,
            }
        }
        Recorded::New(id) => id,
        Recorded::Replaced { id, earlier } => {
            line.push_str(" (a newer version of this file: its earlier record was replaced)");
            let same_group = earlier.night == record.night
                && earlier.target == record.target
                && earlier.filter == record.filter;
            if let (Some(lists), Some(night), false) = (
                shared.judging.lists.as_ref(),
                earlier.night.as_deref(),
                same_group,
            ) {
                if let Err(e) = crate::lists::rewrite(
                    &store,
                    lists,
                    night,
                    earlier.target.as_deref(),
                    earlier.filter.as_deref(),
                ) {
                    tracing::warn!("{e}");
                }
            }
            id
        }
    };
    let verdict = judge_in_store(&store, &record, id, &shared.judging);
    let rejected = verdict
        .as_ref()
        .is_ok_and(|v| v.as_ref().is_some_and(|j| j.verdict == Verdict::Reject));
    let mut moved = String::new();
    if shared.config.actions.move_rejected && rejected && record.status != FrameStatus::Skipped {
        let folder = path
            .parent()
            .unwrap_or(Path::new("."))
            .join(&shared.config.actions.rejected_folder);
        match crate::actions::move_aside(&path, &folder) {
            Ok(dest) => {
                if let Err(e) = store.set_path(id, &dest.to_string_lossy()) {
                    tracing::error!("{e} (recording the move of {})", shown(&path));
                }
                moved = format!(" moved to {}", shown(&dest));
            }
            Err(e) => moved = format!(" (not moved: {e})"),
        }
    }
    if let (Some(night), true) = (
        record.night.as_deref(),
        verdict.as_ref().is_ok_and(|v| v.is_some()),
    ) {
        let limits = alerts::AlertLimits::from_config(&shared.config.alerts);
        let latest = store
            .latest_live_judgements(
                night,
                record.target.as_deref(),
                record.filter.as_deref(),
                limits.reject_streak.max(1),
            )
            .unwrap_or_default();
        let group =
            crate::report::group_heading(record.target.as_deref(), record.filter.as_deref());
        if let Some(msg) = alerts::reject_streak(&limits, &group, &latest) {
            if let Some(alert) = checks::raise_alert(
                &store,
                &shared.config,
                night,
                "reject_streak",
                &msg,
                shared.clock.now_unix(),
            ) {
                tracing::warn!("{alert}");
            }
        }
    }
    let line = match verdict {
        Ok(Some(v)) => format!("{line} verdict={v}{moved}"),
        Ok(None) => line,
        Err(e) => {
            tracing::error!(
                "{e} (storing the verdict of {}; judged again within a minute)",
                shown(&path)
            );
            format!("{line} (verdict not stored yet)")
        }
    };
    Outcome::Stored {
        path,
        version,
        log: Some(if warn {
            LogLine::Warn(line)
        } else {
            LogLine::Info(line)
        }),
    }
}

/// Files that were in the reader when the daemon last stopped: counted, and given up
/// after the third time (recorded as unreadable, so they are not read again until they
/// change).
pub(super) fn settle_interrupted(store: &mut Store, now: f64) -> Result<(), StoreError> {
    for left in store.take_interrupted()? {
        let path = shown(Path::new(&left.identity.path));
        if left.interruptions >= GIVE_UP_AFTER_INTERRUPTIONS {
            let reason = format!(
                "subwatch stopped {} times while reading this file; it is not read again until the file changes",
                left.interruptions
            );
            let mut record = FrameRecord::failed(left.identity.clone(), &reason);
            record.night = crate::sky::night_label(left.identity.mtime_unix(), chrono_tz::UTC);
            store.record_frame(&record, now)?;
            tracing::warn!("{path} unreadable: {reason}");
        } else {
            tracing::warn!(
                "{path} was being read when subwatch last stopped ({} of {} tries); reading it again",
                left.interruptions,
                GIVE_UP_AFTER_INTERRUPTIONS
            );
        }
    }
    Ok(())
}
