//! The service's log: one file a day, `subwatch-YYYY-MM-DD.log` by the PC's local date,
//! the oldest removed past `keep_days`. A service has no console and Windows no journal
//! that keeps a program's text, so the daemon writes its own. Which files go is decided
//! by a pure function of their names and today's date ([`to_remove`]); the writer opens
//! the day's file on the first line of each day and prunes then.

use std::fs::File;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use chrono::{NaiveDate, TimeZone};

const PREFIX: &str = "subwatch-";
const SUFFIX: &str = ".log";

/// The name of a day's file.
pub fn file_name(day: NaiveDate) -> String {
    format!("{PREFIX}{}{SUFFIX}", day.format("%Y-%m-%d"))
}

/// The day a file of ours is for; `None` for any other name (never touched).
pub fn day_of(name: &str) -> Option<NaiveDate> {
    let date = name.strip_prefix(PREFIX)?.strip_suffix(SUFFIX)?;
    // Exactly YYYY-MM-DD: chrono alone would also take "2026-1-5".
    if date.len() != 10 {
        return None;
    }
    NaiveDate::parse_from_str(date, "%Y-%m-%d").ok()
}

/// Of the names in the log folder, the files to remove on `today` so that `keep_days`
/// days of files are left: today's and the `keep_days - 1` before it. Files dated after
/// today (a clock set back) stay; names not ours stay.
pub fn to_remove(names: &[String], today: NaiveDate, keep_days: u32) -> Vec<String> {
    let Some(oldest_kept) =
        today.checked_sub_days(chrono::Days::new(u64::from(keep_days.max(1)) - 1))
    else {
        return Vec::new();
    };
    let mut old: Vec<String> = names
        .iter()
        .filter(|n| day_of(n).is_some_and(|d| d < oldest_kept))
        .cloned()
        .collect();
    old.sort();
    old
}

/// The local date now, by the wall clock.
fn today() -> NaiveDate {
    let now = crate::clock::now_unix();
    chrono::Local
        .timestamp_opt(now.floor() as i64, 0)
        .single()
        // A local time the zone skips or repeats: the date of the same instant in UTC.
        .map_or_else(
            || {
                chrono::DateTime::from_timestamp(now.floor() as i64, 0)
                    .map_or(NaiveDate::MIN, |t| t.date_naive())
            },
            |t| t.date_naive(),
        )
}

struct Current {
    day: NaiveDate,
    file: File,
}

/// The daily file, shared by every writer the subscriber makes.
#[derive(Clone)]
pub struct DailyFile {
    folder: PathBuf,
    keep_days: u32,
    current: Arc<Mutex<Option<Current>>>,
}

impl DailyFile {
    /// Write into `folder` (made if missing), keeping `keep_days` days of files. Fails
    /// when the folder cannot be made or today's file opened.
    pub fn open(folder: &Path, keep_days: u32) -> io::Result<Self> {
        std::fs::create_dir_all(folder)?;
        let d = DailyFile {
            folder: folder.to_path_buf(),
            keep_days,
            current: Arc::new(Mutex::new(None)),
        };
        drop(d.file_for(today())?);
        Ok(d)
    }

    /// Today's file, opened (and the old ones pruned) when the day changed.
    fn file_for(&self, day: NaiveDate) -> io::Result<std::sync::MutexGuard<'_, Option<Current>>> {
        let mut current = self.current.lock().unwrap_or_else(|p| p.into_inner());
        if current.as_ref().is_none_or(|c| c.day != day) {
            let file = File::options()
                .create(true)
                .append(true)
                .open(self.folder.join(file_name(day)))?;
            *current = Some(Current { day, file });
            self.prune(day);
        }
        Ok(current)
    }

    /// Remove the files past `keep_days`; one that cannot be removed is tried again the
    /// next day.
    fn prune(&self, day: NaiveDate) {
        let Ok(entries) = std::fs::read_dir(&self.folder) else {
            return;
        };
        let names: Vec<String> = entries
            .filter_map(|e| e.ok()?.file_name().into_string().ok())
            .collect();
        for name in to_remove(&names, day, self.keep_days) {
            let _ = std::fs::remove_file(self.folder.join(name));
        }
    }
}

impl Write for DailyFile {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        let mut current = self.file_for(today())?;
        match current.as_mut() {
            Some(c) => c.file.write_all(buf).map(|()| buf.len()),
            None => Ok(buf.len()),
        }
    }

    fn flush(&mut self) -> io::Result<()> {
        let mut current = self.current.lock().unwrap_or_else(|p| p.into_inner());
        current.as_mut().map_or(Ok(()), |c| c.file.flush())
    }
}

/// Install the subscriber writing into the daily files of `folder`, control characters
/// escaped as on stderr; `default` and `SUBWATCH_LOG` as for [`super::init`].
pub fn init(folder: &Path, keep_days: u32, default: &str) -> io::Result<()> {
    let file = DailyFile::open(folder, keep_days)?;
    let _ = tracing_subscriber::fmt()
        .with_writer(move || super::Escaping(file.clone()))
        .with_ansi(false)
        .with_env_filter(super::filter(default))
        .try_init();
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn day(s: &str) -> NaiveDate {
        NaiveDate::parse_from_str(s, "%Y-%m-%d").unwrap()
    }

    fn names(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn a_days_file_is_named_by_its_iso_8601_calendar_date() {
        // ISO 8601-1:2019, 5.2.2.1: the calendar date in extended format, YYYY-MM-DD.
        assert_eq!(file_name(day("2026-03-05")), "subwatch-2026-03-05.log");
        assert_eq!(day_of("subwatch-2026-03-05.log"), Some(day("2026-03-05")));
        for other in [
            "subwatch-2026-3-5.log",
            "subwatch-2026-02-30.log",
            "subwatch-2026-03-05.log.old",
            "notes.txt",
            "subwatch.log",
        ] {
            assert_eq!(day_of(other), None, "{other}");
        }
    }

    #[test]
    fn keep_days_files_are_left_today_included() {
        let folder = names(&[
            "subwatch-2026-03-01.log",
            "subwatch-2026-03-02.log",
            "subwatch-2026-03-03.log",
            "subwatch-2026-03-04.log",
            "subwatch-2026-03-05.log",
            "notes.txt",
            "subwatch-2026-3-1.log",
        ]);
        assert_eq!(
            to_remove(&folder, day("2026-03-05"), 3),
            names(&["subwatch-2026-03-01.log", "subwatch-2026-03-02.log"])
        );
        // One day: only today's.
        assert_eq!(to_remove(&folder, day("2026-03-05"), 1).len(), 4);
        // More days than files: nothing goes.
        assert!(to_remove(&folder, day("2026-03-05"), 14).is_empty());
    }

    #[test]
    fn the_count_runs_by_calendar_days_across_months_and_leap_days() {
        // 2028 is a leap year (Gregorian rule: divisible by 4, not a century), so
        // 14 days ending 2028-03-05 begin on 2028-02-21; in 2027 on 2027-02-20.
        let folder = names(&[
            "subwatch-2028-02-20.log",
            "subwatch-2028-02-21.log",
            "subwatch-2028-02-29.log",
        ]);
        assert_eq!(
            to_remove(&folder, day("2028-03-05"), 14),
            names(&["subwatch-2028-02-20.log"])
        );
        let folder = names(&["subwatch-2027-02-19.log", "subwatch-2027-02-20.log"]);
        assert_eq!(
            to_remove(&folder, day("2027-03-05"), 14),
            names(&["subwatch-2027-02-19.log"])
        );
    }

    #[test]
    fn files_dated_after_today_stay() {
        // A clock set back must not cost the newer days' logs.
        let folder = names(&["subwatch-2026-03-09.log"]);
        assert!(to_remove(&folder, day("2026-03-05"), 1).is_empty());
    }

    #[test]
    fn the_writer_appends_to_todays_file_and_prunes_old_ones() {
        let dir = tempfile::tempdir().unwrap();
        let old = dir.path().join("subwatch-2000-01-01.log");
        std::fs::write(&old, "old\n").unwrap();
        std::fs::write(dir.path().join("keep.txt"), "").unwrap();
        let mut f = DailyFile::open(dir.path(), 14).unwrap();
        f.write_all(b"one\n").unwrap();
        f.write_all(b"two\n").unwrap();
        f.flush().unwrap();
        assert!(!old.exists());
        assert!(dir.path().join("keep.txt").exists());
        let text = std::fs::read_to_string(dir.path().join(file_name(today()))).unwrap();
        assert_eq!(text, "one\ntwo\n");
    }
}
