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
