//! Which files under the capture folders are frames, decided one way for every command
//! (the daemon's scans and file events, `subwatch night`): file-name patterns with `*`
//! and `?` (case-insensitive), hidden files and folders left out (capture programs write
//! partial files there), and the folder rejected frames are moved to (`[actions]
//! rejected_folder`, "rejected" unless configured) never entered.

use std::path::{Path, PathBuf};

use crate::record::Identity;

/// The identity of the file at `path` now (its symbolic links followed): the file system
/// read here, so that `record` stays data.
pub fn identity(path: &Path) -> std::io::Result<Identity> {
    Ok(Identity::from_metadata(path, &std::fs::metadata(path)?))
}

/// Whether `name` matches `pattern` (`*` any run, `?` one character), ignoring case.
pub fn glob_match(pattern: &str, name: &str) -> bool {
    let p: Vec<char> = pattern.to_lowercase().chars().collect();
    let n: Vec<char> = name.to_lowercase().chars().collect();
    // Iterative matching with one backtrack point for the last `*`.
    let (mut pi, mut ni) = (0, 0);
    let (mut star, mut mark) = (None, 0);
    while ni < n.len() {
        if pi < p.len() && (p[pi] == '?' || p[pi] == n[ni]) {
            pi += 1;
            ni += 1;
        } else if pi < p.len() && p[pi] == '*' {
            star = Some(pi);
            mark = ni;
            pi += 1;
        } else if let Some(s) = star {
            pi = s + 1;
            mark += 1;
            ni = mark;
        } else {
            return false;
        }
    }
    while pi < p.len() && p[pi] == '*' {
        pi += 1;
    }
    pi == p.len()
}

/// A file is a candidate frame when its name matches an include pattern and no exclude
/// pattern. Hidden files (a leading dot, as capture programs use for partial writes) are
/// never candidates.
pub fn is_candidate(name: &str, include: &[String], exclude: &[String]) -> bool {
    !name.starts_with('.')
        && include.iter().any(|p| glob_match(p, name))
        && !exclude.iter().any(|p| glob_match(p, name))
}

/// The rule for one configuration.
#[derive(Debug, Clone, Default)]
pub struct FrameFilter {
    pub include: Vec<String>,
    pub exclude: Vec<String>,
    /// Folder names never entered (compared case-insensitively).
    pub skipped_folders: Vec<String>,
}

impl FrameFilter {
    pub fn from_config(c: &crate::config::Config) -> Self {
        FrameFilter {
            include: c.watch.include.clone(),
            exclude: c.watch.exclude.clone(),
            // Whether or not moving is on now: frames moved there earlier were judged.
            skipped_folders: vec![c.actions.rejected_folder.to_lowercase()],
        }
    }

    fn enters(&self, folder_name: &str) -> bool {
        !folder_name.starts_with('.')
            && !self
                .skipped_folders
                .iter()
                .any(|s| s.eq_ignore_ascii_case(folder_name))
    }

    /// Every frame under `roots`, recursively, sorted by path. Symbolic links to folders
    /// are not followed (they could loop).
    pub fn walk(&self, roots: &[PathBuf]) -> Vec<PathBuf> {
        let mut out = Vec::new();
        let mut stack: Vec<PathBuf> = roots.to_vec();
        while let Some(dir) = stack.pop() {
            let entries = match std::fs::read_dir(&dir) {
                Ok(e) => e,
                Err(e) => {
                    tracing::warn!("cannot read folder {}: {e}", crate::logging::shown(&dir));
                    continue;
                }
            };
            for e in entries.flatten() {
                let name = e.file_name().to_string_lossy().into_owned();
                let Ok(ft) = e.file_type() else { continue };
                if ft.is_dir() {
                    if self.enters(&name) {
                        stack.push(e.path());
                    }
                } else if ft.is_file() && is_candidate(&name, &self.include, &self.exclude) {
                    out.push(e.path());
                }
            }
        }
        out.sort();
        out
    }

    /// Whether `path` (named by a file event) is a frame the walk would find under one
    /// of `roots`.
    pub fn wants(&self, roots: &[PathBuf], path: &Path) -> bool {
        let Some(name) = path.file_name().map(|n| n.to_string_lossy().into_owned()) else {
            return false;
        };
        is_candidate(&name, &self.include, &self.exclude)
            && roots.iter().any(|root| {
                path.strip_prefix(root).is_ok_and(|rel| {
                    rel.parent().into_iter().flat_map(|p| p.components()).all(|c| {
                        matches!(c, std::path::Component::Normal(n) if self.enters(&n.to_string_lossy()))
                    })
                })
            })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn patterns() {
        assert!(glob_match("*.fits", "Light_001.FITS"));
        assert!(glob_match("*.fits.gz", "a.fits.gz"));
        assert!(!glob_match("*.fits", "a.fits.tmp"));
        assert!(glob_match("l?ght*", "Light_001.fit"));
        assert!(glob_match("*", ""));
        let inc = vec!["*.fits".to_string()];
        assert!(!is_candidate(".partial.fits", &inc, &[]));
        assert!(!is_candidate("x.fits", &inc, &["x*".to_string()]));
    }

    #[test]
    fn the_walk_and_the_events_agree() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path().to_path_buf();
        for p in [
            "a/kfa_001.fits",
            "a/.scratch/kfa_002.fits",
            "a/Rejected/kfa_003.fits",
            "a/flats/flat_001.fits",
            ".hidden.fits",
            "notes.txt",
        ] {
            let p = root.join(p);
            std::fs::create_dir_all(p.parent().unwrap()).unwrap();
            std::fs::write(&p, b"").unwrap();
        }
        let filter = FrameFilter {
            include: vec!["*.fits".into()],
            exclude: Vec::new(),
            skipped_folders: vec!["rejected".into()],
        };
        let roots = vec![root.clone()];
        let found = filter.walk(&roots);
        assert_eq!(
            found,
            vec![
                root.join("a/flats/flat_001.fits"),
                root.join("a/kfa_001.fits")
            ]
        );
        for p in [
            "a/kfa_001.fits",
            "a/.scratch/kfa_002.fits",
            "a/Rejected/kfa_003.fits",
            "a/flats/flat_001.fits",
            ".hidden.fits",
            "notes.txt",
        ] {
            let p = root.join(p);
            assert_eq!(
                filter.wants(&roots, &p),
                found.contains(&p),
                "{}",
                p.display()
            );
        }
        assert!(!filter.wants(&roots, Path::new("/elsewhere/kfa_001.fits")));
        // The rejected frames' folder is left out by default, moving on or not.
        let defaults = FrameFilter::from_config(&crate::config::Config::default());
        assert_eq!(defaults.skipped_folders, ["rejected"]);
    }
}
