//! What subwatch does to a user's frames, and only when the configuration asks: moving a
//! rejected frame into a folder beside it. A move never replaces an existing file, and
//! across file systems the original is removed only after its copy was synced, compared
//! byte for byte and named, and the destination folder synced; a failed copy leaves no
//! partial file behind.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};

/// Sync a folder, so a rename or a new name in it survives a power cut.
fn sync_dir(dir: &Path) -> std::io::Result<()> {
    crate::os::sync_folder(dir)
}

/// Candidate names in `folder` for a file called `name`: `name`, `name.1`, `name.2`, ...
fn candidates<'a>(folder: &'a Path, name: &std::ffi::OsStr) -> impl Iterator<Item = PathBuf> + 'a {
    let name = name.to_owned();
    (0u32..10_000).map(move |k| {
        if k == 0 {
            folder.join(&name)
        } else {
            folder.join(format!("{}.{k}", name.to_string_lossy()))
        }
    })
}

/// Move a frame into `folder` (created). Returns where it went.
pub fn move_aside(src: &Path, folder: &Path) -> std::io::Result<PathBuf> {
    std::fs::create_dir_all(folder)?;
    let name = src
        .file_name()
        .ok_or_else(|| std::io::Error::other("no file name"))?;
    for dest in candidates(folder, name) {
        match crate::os::rename_no_replace(src, &dest) {
            Ok(true) => {
                sync_dir(folder)?;
                if let Some(parent) = src.parent() {
                    sync_dir(parent)?;
                }
                return Ok(dest);
            }
            Ok(false) => continue,
            Err(e) if crate::os::is_cross_device(&e) => {
                return copy_across(src, folder, std::io::copy)
            }
            Err(e) => return Err(e),
        }
    }
    Err(std::io::Error::other("no free name in the folder"))
}

/// The move across file systems: copy into a new hidden part file (never one that
/// exists), sync it, compare it with the original, give it its name, sync the folder,
/// and only then remove the original. Any failure removes the part file and keeps the
/// original. `copy` does the copying (a parameter so a test can make it fail).
fn copy_across(
    src: &Path,
    folder: &Path,
    copy: impl FnOnce(&mut std::fs::File, &mut std::fs::File) -> std::io::Result<u64>,
) -> std::io::Result<PathBuf> {
    let name = src
        .file_name()
        .ok_or_else(|| std::io::Error::other("no file name"))?;
    let (part, mut out) = (0u32..10_000)
        .find_map(|k| {
            let part = folder.join(format!(".{}.{k}.part", name.to_string_lossy()));
            std::fs::OpenOptions::new()
                .write(true)
                .create_new(true)
                .open(&part)
                .ok()
                .map(|f| (part, f))
        })
        .ok_or_else(|| std::io::Error::other("cannot create a part file"))?;
    let result = (|| {
        let mut input = std::fs::File::open(src)?;
        copy(&mut input, &mut out)?;
        out.flush()?;
        out.sync_all()?;
        if !same_bytes(src, &part)? {
            return Err(std::io::Error::other(
                "the copy differs from the original; original kept",
            ));
        }
        for dest in candidates(folder, name) {
            if crate::os::rename_no_replace(&part, &dest)? {
                sync_dir(folder)?;
                return Ok(dest);
            }
        }
        Err(std::io::Error::other("no free name in the folder"))
    })();
    match result {
        Ok(dest) => {
            std::fs::remove_file(src)?;
            if let Some(parent) = src.parent() {
                sync_dir(parent)?;
            }
            Ok(dest)
        }
        Err(e) => {
            let _ = std::fs::remove_file(&part);
            Err(e)
        }
    }
}

/// Whether two files hold the same bytes (compared in chunks, never whole in memory).
fn same_bytes(a: &Path, b: &Path) -> std::io::Result<bool> {
    let (mut fa, mut fb) = (std::fs::File::open(a)?, std::fs::File::open(b)?);
    if fa.metadata()?.len() != fb.metadata()?.len() {
        return Ok(false);
    }
    let (mut ba, mut bb) = (vec![0u8; 1 << 16], vec![0u8; 1 << 16]);
    loop {
        let n = fa.read(&mut ba)?;
        if n == 0 {
            return Ok(true);
        }
        fb.read_exact(&mut bb[..n])?;
        if ba[..n] != bb[..n] {
            return Ok(false);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn setup() -> (tempfile::TempDir, PathBuf, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let src = dir.path().join("kfa_001.fits");
        std::fs::write(&src, vec![7u8; 100_000]).unwrap();
        let folder = dir.path().join("rejected");
        std::fs::create_dir(&folder).unwrap();
        (dir, src, folder)
    }

    fn listing(folder: &Path) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(folder)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    #[test]
    fn a_move_never_replaces_an_existing_file() {
        let (_d, src, folder) = setup();
        std::fs::write(folder.join("kfa_001.fits"), b"earlier").unwrap();
        let dest = move_aside(&src, &folder).unwrap();
        assert_eq!(dest, folder.join("kfa_001.fits.1"));
        assert_eq!(
            std::fs::read(folder.join("kfa_001.fits")).unwrap(),
            b"earlier"
        );
        assert!(!src.exists());
    }

    #[test]
    fn a_copy_that_fails_half_way_leaves_no_part_file_and_keeps_the_original() {
        let (_d, src, folder) = setup();
        let err = copy_across(&src, &folder, |from, to| {
            let mut half = vec![0u8; 50_000];
            from.read_exact(&mut half)?;
            to.write_all(&half)?;
            Err(std::io::Error::new(
                std::io::ErrorKind::StorageFull,
                "disk full",
            ))
        })
        .unwrap_err();
        assert_eq!(err.kind(), std::io::ErrorKind::StorageFull);
        assert!(listing(&folder).is_empty(), "{:?}", listing(&folder));
        assert_eq!(std::fs::read(&src).unwrap().len(), 100_000);
    }

    #[test]
    fn a_copy_never_overwrites_an_existing_part_file_and_is_verified() {
        let (_d, src, folder) = setup();
        let someone_elses = folder.join(".kfa_001.fits.0.part");
        std::fs::write(&someone_elses, b"not ours").unwrap();
        let dest = copy_across(&src, &folder, std::io::copy).unwrap();
        assert_eq!(dest, folder.join("kfa_001.fits"));
        assert_eq!(std::fs::read(&someone_elses).unwrap(), b"not ours");
        assert_eq!(std::fs::read(&dest).unwrap(), vec![7u8; 100_000]);
        assert!(!src.exists());
        // A copy that comes out different keeps the original and leaves nothing.
        let (_d, src, folder) = setup();
        let err =
            copy_across(&src, &folder, |_, to| to.write_all(b"short").map(|_| 5)).unwrap_err();
        assert!(err.to_string().contains("differs"));
        assert!(src.exists());
        assert!(listing(&folder).is_empty());
    }
}
