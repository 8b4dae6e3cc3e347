//! Checks against the machine, separate from reading the file: the watched folders
//! exist, the store's folder is writable, a secret file is this user's and nobody else's,
//! the certificate authority can be read; and the loud warnings.

use std::path::Path;

use super::{Config, Security};

impl Config {
    /// Checks against the machine: folders exist, the store's folder is writable, a
    /// password file is owned by this user and readable by nobody else. Returns
    /// (errors, warnings).
    pub fn check_environment(&self) -> (Vec<String>, Vec<String>) {
        let mut errors = Vec::new();
        let mut warnings = Vec::new();
        for f in &self.watch.folders {
            if !f.is_dir() {
                errors.push(format!("watch.folders: {} is not a folder", f.display()));
            }
        }
        if let Some(lib) = &self.calibration.library {
            if !lib.is_dir() {
                errors.push(format!(
                    "calibration.library: {} is not a folder",
                    lib.display()
                ));
            }
        }
        if self.store.url.is_none() {
            let store_dir = self.store.path.parent().unwrap_or(Path::new("."));
            if !store_dir.is_dir() {
                errors.push(format!(
                    "store.path: folder {} does not exist",
                    store_dir.display()
                ));
            } else {
                let probe = store_dir.join(format!(".subwatch-write-test-{}", std::process::id()));
                match std::fs::write(&probe, b"") {
                    Ok(()) => {
                        let _ = std::fs::remove_file(&probe);
                    }
                    Err(e) => errors.push(format!(
                        "store.path: cannot write in {}: {e}",
                        store_dir.display()
                    )),
                }
            }
        }
        if let Some(ca) = &self.store.ca_file {
            if let Err(e) = std::fs::read(ca) {
                errors.push(format!("store.ca_file: {}: {e}", ca.display()));
            }
        }
        if let Some(pw) = &self.store.password_file {
            if let Err(e) = crate::os::check_private_file(pw) {
                errors.push(format!("store.password_file: {e}"));
            }
        }
        if let Some(pw) = &self.mail.password_file {
            if let Err(e) = crate::os::check_private_file(pw) {
                errors.push(format!("mail.password_file: {e}"));
            }
        }
        if let Some(token) = &self.web.token_file {
            if let Err(e) = crate::os::check_private_file(token) {
                errors.push(format!("web.token_file: {e}"));
            } else if let Err(e) = self.web.token() {
                errors.push(format!("web.token_file: {e}"));
            }
        }
        if let Some(ca) = &self.mail.ca_file {
            if let Err(e) = std::fs::read(ca) {
                errors.push(format!("mail.ca_file: {}: {e}", ca.display()));
            }
        }
        if self.mail.security == Security::None && self.mail.has_password() {
            warnings.push(
                "mail.security: \"none\" with send_password_unencrypted = true: the SMTP password travels UNENCRYPTED; anyone on the network path can read it".into(),
            );
        }
        if self.mail.to.is_empty() {
            warnings.push(
                "mail.to is empty: no morning summary or alert is mailed (report --send writes the summary's files only)".into(),
            );
        }
        (errors, warnings)
    }
}
