//! A database of its own for each test on the PostgreSQL server `.ci/postgres start`
//! runs (its address in SUBWATCH_TEST_POSTGRES), dropped when the test ends. Without a
//! server the test fails: a check that cannot run is not passed.

use std::sync::atomic::{AtomicUsize, Ordering};

pub const ENV: &str = "SUBWATCH_TEST_POSTGRES";

/// The server's address for tests; fails the test when there is none.
pub fn server() -> String {
    std::env::var(ENV).unwrap_or_else(|_| {
        panic!(
            "{ENV} is not set: these tests need a PostgreSQL server. Start a throwaway one with \
             `eval \"$(.ci/postgres start)\"` (bash .ci/run does), then run the tests again"
        )
    })
}

/// A fresh database, dropped (with any connection still on it) when this goes.
pub struct TestDatabase {
    pub url: String,
    admin: String,
    name: String,
}

impl TestDatabase {
    pub fn new() -> Self {
        static N: AtomicUsize = AtomicUsize::new(0);
        let admin = server();
        let name = format!(
            "subwatch_test_{}_{}",
            std::process::id(),
            N.fetch_add(1, Ordering::Relaxed)
        );
        let mut c = postgres::Client::connect(&admin, postgres::NoTls)
            .unwrap_or_else(|e| panic!("PostgreSQL at {admin}: {e}"));
        // One statement per call: a batch would run in one transaction, which these refuse.
        c.batch_execute(&format!("DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
            .unwrap();
        c.batch_execute(&format!("CREATE DATABASE {name}")).unwrap();
        let base = admin.rsplit_once('/').map_or(admin.as_str(), |(b, _)| b);
        TestDatabase {
            url: format!("{base}/{name}"),
            admin,
            name,
        }
    }

    pub fn location(&self) -> subwatch::store::Location {
        subwatch::store::Location::Server {
            url: self.url.clone(),
            password_file: None,
            ca_file: None,
        }
    }
}

impl Drop for TestDatabase {
    fn drop(&mut self) {
        if let Ok(mut c) = postgres::Client::connect(&self.admin, postgres::NoTls) {
            let _ = c.batch_execute(&format!(
                "DROP DATABASE IF EXISTS {} WITH (FORCE)",
                self.name
            ));
        }
    }
}

/// The folder `.ci/postgres start` made (SUBWATCH_TEST_POSTGRES_DIR), whose pg_hba.conf a
/// test may add a line to; fails the test when there is none.
fn server_folder() -> std::path::PathBuf {
    std::env::var_os("SUBWATCH_TEST_POSTGRES_DIR")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(|| {
            panic!(
                "SUBWATCH_TEST_POSTGRES_DIR is not set: this test changes the throwaway server's \
                 pg_hba.conf. Start one with `eval \"$(.ci/postgres start)\"`, then run the tests again"
            )
        })
}

/// A database owned by a role of its own that must log in with a password (the server
/// asks for it by a pg_hba.conf line for this role and database alone, scram-sha-256),
/// all dropped, and the line taken out again, when this goes.
pub struct PasswordRole {
    /// `postgresql://ROLE@HOST:PORT/DATABASE`, no password in it.
    pub url: String,
    pub role: String,
    admin: String,
    line: String,
    hba: std::path::PathBuf,
}

impl PasswordRole {
    pub fn new(password: &str) -> Self {
        static N: AtomicUsize = AtomicUsize::new(0);
        let admin = server();
        let hba = server_folder().join("data").join("pg_hba.conf");
        let role = format!(
            "subwatch_login_{}_{}",
            std::process::id(),
            N.fetch_add(1, Ordering::Relaxed)
        );
        let mut c = postgres::Client::connect(&admin, postgres::NoTls)
            .unwrap_or_else(|e| panic!("PostgreSQL at {admin}: {e}"));
        c.batch_execute(&format!("DROP DATABASE IF EXISTS {role} WITH (FORCE)"))
            .unwrap();
        c.batch_execute(&format!("DROP ROLE IF EXISTS {role}"))
            .unwrap();
        c.batch_execute(&format!("CREATE ROLE {role} LOGIN PASSWORD '{password}'"))
            .unwrap();
        c.batch_execute(&format!("CREATE DATABASE {role} OWNER {role}"))
            .unwrap();
        // First in the file, so it is the line that matches this role and database; the
        // server's own lines (trust) still serve every other test.
        let line = format!("host {role} {role} 127.0.0.1/32 scram-sha-256\n");
        let before = std::fs::read_to_string(&hba).unwrap();
        std::fs::write(&hba, format!("{line}{before}")).unwrap();
        c.batch_execute("SELECT pg_reload_conf()").unwrap();
        let base = admin
            .rsplit_once('/')
            .map_or(admin.as_str(), |(b, _)| b)
            .replacen("postgres@", &format!("{role}@"), 1);
        let url = format!("{base}/{role}");
        let made = PasswordRole {
            url,
            role,
            admin,
            line,
            hba,
        };
        // The reload takes effect soon after it is asked for: wait until a login without
        // the password is refused.
        let start = std::time::Instant::now();
        while postgres::Client::connect(&made.url, postgres::NoTls).is_ok() {
            assert!(
                start.elapsed() < std::time::Duration::from_secs(10),
                "the server still lets {} in without a password",
                made.role
            );
            std::thread::sleep(std::time::Duration::from_millis(50));
        }
        made
    }

    fn admin(&self) -> postgres::Client {
        postgres::Client::connect(&self.admin, postgres::NoTls).unwrap()
    }

    /// The role's password changed, as a site's administrator would.
    pub fn set_password(&self, password: &str) {
        self.admin()
            .batch_execute(&format!("ALTER ROLE {} PASSWORD '{password}'", self.role))
            .unwrap();
    }

    /// Every connection of the role ended by the server (as a restart would).
    pub fn end_sessions(&self) {
        self.admin()
            .execute(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE usename = $1",
                &[&self.role],
            )
            .unwrap();
    }

    /// One number the database answers, asked as the server's administrator.
    pub fn count(&self, sql: &str) -> i64 {
        let url = format!(
            "{}/{}",
            self.admin
                .rsplit_once('/')
                .map_or(self.admin.as_str(), |(b, _)| b),
            self.role
        );
        postgres::Client::connect(&url, postgres::NoTls)
            .and_then(|mut c| c.query_one(sql, &[]))
            .map_or(-1, |r| r.get(0))
    }
}

impl Drop for PasswordRole {
    fn drop(&mut self) {
        if let Ok(text) = std::fs::read_to_string(&self.hba) {
            let _ = std::fs::write(&self.hba, text.replacen(&self.line, "", 1));
        }
        if let Ok(mut c) = postgres::Client::connect(&self.admin, postgres::NoTls) {
            let _ = c.batch_execute("SELECT pg_reload_conf()");
            let _ = c.batch_execute(&format!(
                "DROP DATABASE IF EXISTS {} WITH (FORCE)",
                self.role
            ));
            let _ = c.batch_execute(&format!("DROP ROLE IF EXISTS {}", self.role));
        }
    }
}
