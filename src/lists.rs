//! The lists of frames worth stacking: one text file per night, target and filter
//! (`<folder>/<night>/<target>__<filter>.txt`), one path per line, each path once. A
//! list is rewritten whole whenever a verdict in its group changes (a new frame, a
//! replaced record, a summary judged with other rules): written beside, synced, then
//! renamed over the old one, so a stacking program never reads half a list. A sink: it
//! reads the store and writes in subwatch's own folder, never beside a user's frames.

use std::io::Write;
use std::path::{Path, PathBuf};

use crate::config::Config;
use crate::store::Store;

/// Where the lists go and what they hold.
#[derive(Debug, Clone)]
pub struct Lists {
    pub folder: PathBuf,
    /// Frames that only warned are listed too.
    pub stack_warned: bool,
}

impl Lists {
    /// The lists the configuration asks for (`[actions] accepted_lists`), in
    /// `[actions] lists_folder`, else `accepted` beside the store.
    pub fn from_config(c: &Config) -> Option<Lists> {
        c.actions.accepted_lists.then(|| Lists {
            folder: c.actions.lists_folder.clone().unwrap_or_else(|| {
                c.store
                    .path
                    .parent()
                    .unwrap_or(Path::new("."))
                    .join("accepted")
            }),
            stack_warned: c.actions.stack_warned,
        })
    }
}

/// A name made safe for a file name: letters, digits, `-` and `_`; anything else `_`.
pub fn file_part(s: &str) -> String {
    s.chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect()
}

/// Where the list of one group lives.
pub fn list_path(
    folder: &Path,
    night: &str,
    target: Option<&str>,
    filter: Option<&str>,
) -> PathBuf {
    folder.join(file_part(night)).join(format!(
        "{}__{}.txt",
        file_part(target.unwrap_or(crate::text::NO_TARGET)),
        file_part(filter.unwrap_or(crate::text::NO_FILTER))
    ))
}

/// Rewrite the list of one group from the store's verdicts. Returns the list's path.
pub fn rewrite(
    store: &Store,
    lists: &Lists,
    night: &str,
    target: Option<&str>,
    filter: Option<&str>,
) -> Result<PathBuf, String> {
    let file = list_path(&lists.folder, night, target, filter);
    let paths = store
        .accepted_paths(night, target, filter, lists.stack_warned)
        .map_err(|e| e.to_string())?;
    write_list(&file, &paths)?;
    Ok(file)
}

/// Write a list of paths, one per line, as every list is written: beside, synced, then
/// renamed over the old one, and the folder synced.
pub fn write_list(file: &Path, paths: &[String]) -> Result<(), String> {
    let dir = file.parent().unwrap_or(Path::new("."));
    let write = || -> std::io::Result<()> {
        std::fs::create_dir_all(dir)?;
        let tmp = file.with_extension("txt.tmp");
        let mut f = std::fs::File::create(&tmp)?;
        for p in paths {
            writeln!(f, "{p}")?;
        }
        f.sync_all()?;
        std::fs::rename(&tmp, file)?;
        crate::os::sync_folder(dir)
    };
    write().map_err(|e| format!("cannot write {}: {e}", file.display()))
}

/// Rewrite the lists of every group of a night (after its verdicts were judged again).
pub fn rewrite_night(store: &Store, lists: &Lists, night: &str) -> Vec<Result<PathBuf, String>> {
    match store.night_groups(night) {
        Ok(groups) => groups
            .iter()
            .map(|(target, filter)| {
                rewrite(store, lists, night, target.as_deref(), filter.as_deref())
            })
            .collect(),
        Err(e) => vec![Err(e.to_string())],
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_from_headers_cannot_leave_the_folder() {
        let p = list_path(
            Path::new("/lists"),
            "2026-03-14",
            Some("../../etc/x"),
            Some("L\n"),
        );
        assert_eq!(p, Path::new("/lists/2026-03-14/______etc_x__L_.txt"));
    }
}
