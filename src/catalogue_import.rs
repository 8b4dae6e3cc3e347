//! The user's catalogue files into the index, once: each configured file is read a
//! batch of rows at a time (`catalogue::Reader`) and indexed (`store::catalogue_index`),
//! so memory stays bounded whatever the catalogue's size; an index built from the same
//! files (path, size, modification time) and the same column settings is reused. The
//! index is built beside its place and renamed into it only when every file was read:
//! a file that fails leaves the last good index where it was. `check` reads the files
//! the same way and writes nothing (`check-config`).

use std::path::{Path, PathBuf};

use crate::catalogue::{CatalogueError, BATCH_ROWS};
use crate::config::CatalogueConfig;
use crate::store::catalogue_index::{CatalogueIndex, IndexWriter, SourceFile};
use crate::store::StoreError;

#[derive(Debug, thiserror::Error)]
pub enum ImportError {
    /// The system's reason in words, once (not chained as a source too).
    #[error("catalogue file {path}: {}", crate::text::io_reason(.reason))]
    Read {
        path: PathBuf,
        reason: std::io::Error,
    },
    #[error(transparent)]
    Parse(#[from] CatalogueError),
    #[error("catalogue index: {0}")]
    Store(#[from] StoreError),
}

/// What `ensure` found or did.
#[derive(Debug, Clone)]
pub struct Imported {
    pub index: PathBuf,
    pub stars: u64,
    /// Whether the index was built now (rather than reused).
    pub built: bool,
}

/// The settings an index depends on, as text to compare.
fn settings_key(cfg: &CatalogueConfig) -> String {
    serde_json::to_string(&cfg.columns).unwrap_or_default()
}

/// Where the index lives: `[catalogue] index`, else a file in the user's cache folder
/// named by the files it holds. `None` without catalogue files.
pub fn index_path(cfg: &CatalogueConfig) -> Option<PathBuf> {
    if cfg.files.is_empty() {
        return None;
    }
    cfg.index.clone().or_else(|| {
        let names: Vec<String> = cfg.files.iter().map(|p| p.display().to_string()).collect();
        let hash = crate::text::stable_hash(&names.join("\n"));
        // The user's own cache folder; the shared temporary folder only without one, and
        // then under a name with the user's id.
        let folder = std::env::var_os("XDG_CACHE_HOME")
            .map(PathBuf::from)
            .filter(|p| p.is_absolute())
            .or_else(|| {
                std::env::var_os("HOME")
                    .map(PathBuf::from)
                    .filter(|p| p.is_absolute() && p.is_dir())
                    .map(|h| h.join(".cache"))
            })
            .map(|c| c.join("subwatch"));
        Some(match folder {
            Some(f) => f.join(format!("catalogue-{hash:016x}.sqlite")),
            None => std::env::temp_dir().join(format!(
                "subwatch-{}-catalogue-{hash:016x}.sqlite",
                crate::os::user_tag()
            )),
        })
    })
}

fn source_of(path: &Path) -> Result<SourceFile, ImportError> {
    let meta = std::fs::metadata(path).map_err(|reason| ImportError::Read {
        path: path.to_path_buf(),
        reason,
    })?;
    let mtime_ns = meta
        .modified()
        .ok()
        .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map_or(0, |d| d.as_nanos() as i64);
    Ok(SourceFile {
        path: path.display().to_string(),
        size: meta.len(),
        mtime_ns,
    })
}

/// Stars one catalogue file holds, read through a batch at a time as an import reads
/// it, writing nothing.
fn count_stars(path: &Path, cfg: &CatalogueConfig) -> Result<u64, ImportError> {
    let file = std::fs::File::open(path).map_err(|reason| ImportError::Read {
        path: path.to_path_buf(),
        reason,
    })?;
    let name = path.display().to_string();
    let mut reader = crate::catalogue::Reader::open(&name, file, &cfg.columns)?;
    let mut stars = 0u64;
    loop {
        let batch = reader.next_batch(BATCH_ROWS)?;
        if batch.is_empty() {
            return Ok(stars);
        }
        stars += batch.len() as u64;
    }
}

/// What `check` found, having written nothing.
#[derive(Debug, Clone)]
pub struct Checked {
    /// Where the index is (or would be built).
    pub index: PathBuf,
    /// Rows the files hold, read now (rows of one star in several bands count each).
    pub stars: u64,
    /// Whether the index there was built from these very files and settings (else the
    /// first command that needs it builds it).
    pub current: bool,
}

/// Every configured file read through as an import would, and the index looked at,
/// without writing anything: every file's problem, not only the first. `Ok(None)` when
/// no catalogue is configured.
pub fn check(cfg: &CatalogueConfig) -> Result<Option<Checked>, Vec<ImportError>> {
    let Some(index) = index_path(cfg) else {
        return Ok(None);
    };
    let mut problems = Vec::new();
    let mut sources = Vec::new();
    let mut stars = 0u64;
    for path in &cfg.files {
        let read = source_of(path).and_then(|source| Ok((source, count_stars(path, cfg)?)));
        match read {
            Ok((source, n)) => {
                sources.push(source);
                stars += n;
            }
            Err(e) => problems.push(e),
        }
    }
    if !problems.is_empty() {
        return Err(problems);
    }
    // Opened to read only: a look leaves the index as it was.
    let current = index.exists()
        && CatalogueIndex::open(&index).is_ok_and(|i| i.is_current(&sources, &settings_key(cfg)));
    Ok(Some(Checked {
        index,
        stars,
        current,
    }))
}

/// Build the index if it is missing or stale (or `force`), and say what it holds.
/// `None` when no catalogue is configured.
pub fn ensure(cfg: &CatalogueConfig, force: bool) -> Result<Option<Imported>, ImportError> {
    let Some(index) = index_path(cfg) else {
        return Ok(None);
    };
    let sources = cfg
        .files
        .iter()
        .map(|p| source_of(p))
        .collect::<Result<Vec<_>, _>>()?;
    let key = settings_key(cfg);
    if !force && index.exists() {
        if let Ok(existing) = CatalogueIndex::open(&index) {
            if existing.is_current(&sources, &key) {
                return Ok(Some(Imported {
                    stars: existing.count()?,
                    index,
                    built: false,
                }));
            }
        }
    }
    if let Some(parent) = index.parent() {
        std::fs::create_dir_all(parent).map_err(|reason| ImportError::Read {
            path: parent.to_path_buf(),
            reason,
        })?;
    }
    let mut writer = IndexWriter::create(&index)?;
    for path in &cfg.files {
        let file = std::fs::File::open(path).map_err(|reason| ImportError::Read {
            path: path.clone(),
            reason,
        })?;
        let name = path.display().to_string();
        let mut reader = crate::catalogue::Reader::open(&name, file, &cfg.columns)?;
        writer.begin_file(reader.has_ids())?;
        loop {
            let batch = reader.next_batch(BATCH_ROWS)?;
            if batch.is_empty() {
                break;
            }
            writer.add(&batch)?;
        }
    }
    let built = writer.finish(&sources, &key)?;
    Ok(Some(Imported {
        stars: built.count()?,
        index,
        built: true,
    }))
}
