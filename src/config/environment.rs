//! Checks against the machine, separate from reading the file: the watched folders
//! exist, the store's folder is writable, a secret file is this user's and nobody else's,
//! the certificate authority can be read; and the loud warnings (a store reached without
//! encryption, mail written to files for want of a server). Each names its key and, where
//! the file gives it, its line.

use std::path::Path;

use super::{Config, ConfigProblem, Security};
use crate::text::io_reason;

impl Config {
    /// Checks against the machine: folders exist, the store's folder is writable, a
    /// password file is owned by this user and readable by nobody else. Returns
    /// (errors, warnings), each as "line N: key: what is wrong".
    pub fn check_environment(&self) -> (Vec<String>, Vec<String>) {
        let (errors, warnings) = self.environment_problems();
        let said = |p: Vec<ConfigProblem>| p.iter().map(ToString::to_string).collect();
        (said(errors), said(warnings))
    }

    /// As [`Config::check_environment`], each problem with its key and line apart.
    pub fn environment_problems(&self) -> (Vec<ConfigProblem>, Vec<ConfigProblem>) {
        let mut errors = Vec::new();
        let mut warnings = Vec::new();
        let mut error = |key: &str, message: String| errors.push(self.located(key, message));
        for f in &self.watch.folders {
            if let Some(wrong) = not_a_folder(f) {
                error("watch.folders", wrong);
            }
        }
        if let Some(lib) = &self.calibration.library {
            if let Some(wrong) = not_a_folder(lib) {
                error("calibration.library", wrong);
            }
        }
        if self.store.url.is_none() {
            let store_dir = self.store.path.parent().unwrap_or(Path::new("."));
            if !store_dir.is_dir() {
                error(
                    "store.path",
                    format!("folder {} does not exist", store_dir.display()),
                );
            } else {
                let probe = store_dir.join(format!(".subwatch-write-test-{}", std::process::id()));
                match std::fs::write(&probe, b"") {
                    Ok(()) => {
                        let _ = std::fs::remove_file(&probe);
                    }
                    Err(e) => error(
                        "store.path",
                        format!("cannot write in {}: {}", store_dir.display(), io_reason(&e)),
                    ),
                }
            }
        }
        for (key, file) in [
            ("store.ca_file", &self.store.ca_file),
            ("mail.ca_file", &self.mail.ca_file),
        ] {
            if let Some(ca) = file {
                if let Err(e) = std::fs::read(ca) {
                    error(key, format!("{}: {}", ca.display(), io_reason(&e)));
                }
            }
        }
        for (key, file) in [
            ("store.password_file", &self.store.password_file),
            ("mail.password_file", &self.mail.password_file),
        ] {
            if let Some(pw) = file {
                if let Err(e) = crate::os::check_private_file(pw) {
                    error(key, e);
                }
            }
        }
        if let Some(token) = &self.web.token_file {
            if let Err(e) = crate::os::check_private_file(token) {
                error("web.token_file", e);
            } else if let Err(e) = self.web.token() {
                error("web.token_file", e.to_string());
            }
        }
        let mut warn = |key: &str, message: String| warnings.push(self.located(key, message));
        if self.mail.security == Security::None && self.mail.has_password() {
            warn(
                "mail.security",
                "\"none\" with send_password_unencrypted = true: the SMTP password travels UNENCRYPTED; anyone on the network path can read it".into(),
            );
        }
        if let Some(url) = &self.store.url {
            if let Some(why) = unencrypted_store(url) {
                warn("store.url", why);
            }
        }
        if self.mail.to.is_empty() {
            warn(
                "mail.to",
                "no recipient: no morning summary or alert is mailed (`subwatch report` writes the summary's files: HTML, CSV, JSON)".into(),
            );
        } else if self.mail.smtp_host.is_none() {
            warn(
                "mail.to",
                format!(
                    "no [mail] smtp_host: the morning summary and alerts are not sent but written as .eml files into {}; set smtp_host to send them",
                    self.report_folder().display()
                ),
            );
        }
        (errors, warnings)
    }
}

/// Why `path` cannot be watched as a folder, in words; `None` when it can.
fn not_a_folder(path: &Path) -> Option<String> {
    match std::fs::metadata(path) {
        Ok(m) if m.is_dir() => None,
        Ok(_) => Some(format!("{} is a file, not a folder", path.display())),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            Some(format!("{} does not exist", path.display()))
        }
        Err(e) => Some(format!("{}: {}", path.display(), io_reason(&e))),
    }
}

/// Why a PostgreSQL store at `url` would be reached without encryption, where it leaves
/// this machine; `None` when the address asks for TLS, or when every host it names is
/// this machine (a loopback address, `localhost` or a local socket): that traffic never
/// leaves the machine, so nobody on a network can read or change it, and TLS there would
/// guard nothing. The client in `store` speaks TLS only for sslmode=require (or
/// verify-full, verify-ca); "prefer", the default, is plain text here.
fn unencrypted_store(url: &str) -> Option<String> {
    let config: postgres::Config = url
        .replace("sslmode=verify-full", "sslmode=require")
        .replace("sslmode=verify-ca", "sslmode=require")
        .parse()
        .ok()?;
    if config.get_ssl_mode() == postgres::config::SslMode::Require {
        return None;
    }
    let remote: Vec<String> = config
        .get_hosts()
        .iter()
        .filter_map(|h| match h {
            postgres::config::Host::Tcp(name) => {
                // A socket's folder (a name starting with '/') is a Unix socket, which
                // the client has only on Unix; it never leaves the machine either way.
                let local = name.starts_with('/')
                    || name.eq_ignore_ascii_case("localhost")
                    || name
                        .trim_matches(['[', ']'])
                        .parse::<std::net::IpAddr>()
                        .is_ok_and(|ip| ip.is_loopback());
                (!local).then(|| name.clone())
            }
            #[cfg(unix)]
            postgres::config::Host::Unix(_) => None,
        })
        .collect();
    if remote.is_empty() {
        return None;
    }
    let asked = match url.split_once("sslmode=") {
        Some((_, mode)) => format!(
            "sslmode={}",
            mode.split(['&', '#']).next().unwrap_or_default()
        ),
        None => "no sslmode in the address".into(),
    };
    let fix = if url.contains("sslmode=") {
        "Set sslmode=require in the address"
    } else if url.contains('?') {
        "Add &sslmode=require to the address"
    } else {
        "Add ?sslmode=require to the address"
    };
    Some(format!(
        "frames, verdicts and queued mail travel to {} UNENCRYPTED ({asked}); anyone on the network path can read and change them. {fix} (and [store] ca_file where the server's certificate is the site's own)",
        remote.join(", ")
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_store_reached_unencrypted_is_said_unless_it_stays_on_this_machine() {
        let said =
            unencrypted_store("postgresql://subwatch@db.kestrel-ridge.example:5432/site").unwrap();
        assert!(
            said.contains("db.kestrel-ridge.example UNENCRYPTED (no sslmode in the address)")
                && said.contains("Add ?sslmode=require to the address"),
            "{said}"
        );
        let said =
            unencrypted_store("postgresql://s@192.168.1.20/site?application_name=north").unwrap();
        assert!(said.contains("Add &sslmode=require"), "{said}");
        // "prefer" (the client library's default) is plain text with this client.
        for mode in ["disable", "prefer"] {
            let said = unencrypted_store(&format!("postgresql://s@db.example/site?sslmode={mode}"))
                .unwrap();
            assert!(
                said.contains(&format!("(sslmode={mode})"))
                    && said.contains("Set sslmode=require in the address"),
                "{said}"
            );
        }
        for tls in ["require", "verify-full", "verify-ca"] {
            assert_eq!(
                unencrypted_store(&format!("postgresql://s@db.example/site?sslmode={tls}")),
                None
            );
        }
        // Loopback and a local socket never leave the machine.
        for local in [
            "postgresql://s@127.0.0.1:5432/site",
            "postgresql://s@127.3.2.1/site",
            "postgresql://s@localhost/site",
            "postgresql://s@[::1]:5432/site",
            "postgresql://s@%2Fvar%2Frun%2Fpostgresql/site",
        ] {
            assert_eq!(unencrypted_store(local), None, "{local}");
        }
        // One host of several off the machine is enough.
        let said = unencrypted_store("postgresql://s@localhost,db2.example/site").unwrap();
        assert!(said.contains("to db2.example UNENCRYPTED"), "{said}");
    }

    #[test]
    fn what_the_machine_lacks_is_said_at_its_key_and_line() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("a-file");
        std::fs::write(&file, "x").unwrap();
        let text = format!(
            // Literal strings: a Windows path's backslashes are not escapes.
            "[watch]\nfolders = ['{0}/gone', '{1}']\n[mail]\nto = [\"o@example.org\"]\nca_file = '{0}/ca.pem'\n",
            dir.path().display(),
            file.display()
        );
        let c = crate::config::parse(&text, dir.path()).unwrap();
        let (errors, warnings) = c.check_environment();
        let d = dir.path().display();
        // The system's own words for a missing file, without its number.
        let missing = io_reason(&std::fs::read(dir.path().join("ca.pem")).unwrap_err());
        assert!(!missing.contains("os error"), "{missing}");
        assert_eq!(
            errors,
            [
                format!("line 2: watch.folders: {d}/gone does not exist"),
                format!(
                    "line 2: watch.folders: {} is a file, not a folder",
                    file.display()
                ),
                format!("line 5: mail.ca_file: {d}/ca.pem: {missing}"),
            ]
        );
        // Without a server the mail is written as files, and where is said.
        assert_eq!(
            warnings,
            [format!(
                "line 4: mail.to: no [mail] smtp_host: the morning summary and alerts are not sent but written as .eml files into {}; set smtp_host to send them",
                dir.path().join("reports").display()
            )]
        );
    }
}
