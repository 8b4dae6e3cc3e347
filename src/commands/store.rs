//! `subwatch store copy`: an SQLite store into a shared PostgreSQL database.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{Context, Result};

pub fn copy(
    from: &Path,
    to: &str,
    password_file: Option<PathBuf>,
    ca_file: Option<PathBuf>,
    rig: Option<&str>,
) -> Result<ExitCode> {
    if !from.is_file() {
        anyhow::bail!("store copy: {} is not a store file", from.display());
    }
    if let Some(rig) = rig {
        if !subwatch::config::rig_name_ok(rig) {
            anyhow::bail!(
                "store copy --rig {rig:?}: a name of 1 to 64 letters, digits, spaces, dots, dashes or underscores"
            );
        }
    }
    let to = subwatch::store::Location::Server {
        url: to.to_string(),
        password_file,
        ca_file,
    };
    let copied = subwatch::store::copy(from, &to, rig)
        .with_context(|| format!("copying {} into {to}", from.display()))?;
    outln!(
        "copied {} into {to}, every table counted on both sides:",
        from.display()
    )?;
    for (table, n) in &copied.tables {
        outln!("  {table}: {n}")?;
    }
    Ok(ExitCode::SUCCESS)
}
