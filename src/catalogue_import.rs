//! The user's catalogue files into the index, once: each configured file is read a
//! batch of rows at a time (`catalogue::Reader`) and indexed (`store::catalogue_index`),
//! so memory stays bounded whatever the catalogue's size; an index built from the same
//! files (path, size, modification time) and the same column settings is reused. The
//! index is built beside its place and renamed into it only when every file was read:
//! a file that fails leaves the last good index where it was.

use std::path::{Path, PathBuf};

use crate::catalogue::{CatalogueError, BATCH_ROWS};
use crate::config::CatalogueConfig;
use crate::store::catalogue_index::{CatalogueIndex, IndexWriter, SourceFile};
use crate::store::StoreError;

#[derive(Debug, thiserror::Error)]
pub enum ImportError {
    #[error("catalogue file {path}: {source}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
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
    let meta = std::fs::metadata(path).map_err(|source| ImportError::Read {
        path: path.to_path_buf(),
        source,
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

/// Read every configured file through as an import would, writing nothing: the stars
/// they hold, or the first problem with its file, row and column (`check-config`).
pub fn check(cfg: &CatalogueConfig) -> Result<u64, ImportError> {
    let mut stars = 0u64;
    for path in &cfg.files {
        let file = std::fs::File::open(path).map_err(|source| ImportError::Read {
            path: path.clone(),
            source,
        })?;
        let name = path.display().to_string();
        let mut reader = crate::catalogue::Reader::open(&name, file, &cfg.columns)?;
        loop {
            let batch = reader.next_batch(BATCH_ROWS)?;
            if batch.is_empty() {
                break;
            }
            stars += batch.len() as u64;
        }
    }
    Ok(stars)
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
        std::fs::create_dir_all(parent).map_err(|source| ImportError::Read {
            path: parent.to_path_buf(),
            source,
        })?;
    }
    let mut writer = IndexWriter::create(&index)?;
    for path in &cfg.files {
        let file = std::fs::File::open(path).map_err(|source| ImportError::Read {
            path: path.clone(),
            source,
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
