//! The daemon left alone: one regression test per way it could stop, lose a frame,
//! record one twice, keep silent, or take a bad setting. Each runs the real binary on
//! real folders with a real SQLite file.
// Unix only: the regressions are Unix's (file-size and address-space rlimits, modes,
// nanosecond modification times, SIGTERM).
#![cfg(unix)]

mod common;

use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant, SystemTime};

use common::daemon::{frame_bytes, recorded, site, wait_for, Daemon, Logged};

fn subwatch(args: &[&str], config: &Path) -> std::process::Output {
    Command::new(common::binary())
        .args(args)
        .arg("--config")
        .arg(config)
        .output()
        .unwrap()
}

#[test]
fn the_daemon_says_what_it_does_by_default_and_names_cannot_forge_lines() {
    let s = site("");
    std::fs::write(
        s.capture.join("k001.fits"),
        frame_bytes(1, &s.root, "Light"),
    )
    .unwrap();
    let forged = "evil\n2026-12-02T00:00:00Z  INFO subwatch::watch: forged.fits";
    std::fs::write(s.capture.join(forged), b"not an image").unwrap();
    let d = Logged::start(&s.config);
    wait_for(&s.db, 2, Duration::from_secs(30));
    assert!(d.wait_log("k001.fits measured: ", Duration::from_secs(10)));
    let log = d.stop();
    let lines: Vec<&str> = log.lines().collect();
    let has =
        |level: &str, words: &str| lines.iter().any(|l| l.contains(level) && l.contains(words));
    assert!(
        has("INFO", "subwatch 0.1.0 started: config") && has("INFO", "mail off"),
        "{log}"
    );
    assert!(has("INFO", "k001.fits measured: "), "{log}");
    assert!(has("WARN", "unreadable: not a FITS file"), "{log}");
    assert!(
        has("INFO", "subwatch stopped: 2 frame(s) recorded"),
        "{log}"
    );
    // The name with a newline is one escaped line; nothing starts with the forged text.
    assert!(log.contains("evil\\n2026-12-02T00:00:00Z"), "{log}");
    assert!(
        !lines
            .iter()
            .any(|l| l.starts_with("2026-12-02T00:00:00Z  INFO")),
        "{log}"
    );
}

/// The padded length of a FITS file is a whole number of 2880-byte blocks; this is the
/// length before the last block's padding.
fn unpadded(bytes: &[u8]) -> usize {
    // Header to END, rounded to a block, then 160 x 120 pixels of 2 bytes (frame_bytes).
    let end = bytes
        .chunks(80)
        .position(|c| c.starts_with(b"END "))
        .unwrap();
    (end * 80 / 2880 + 1) * 2880 + 160 * 120 * 2
}

#[test]
fn one_record_per_path_whatever_happens_to_the_file() {
    let s = site("\n[actions]\naccepted_lists = true\n");
    let paths: Vec<PathBuf> = (0..3)
        .map(|k| s.capture.join(format!("k{k}.fits")))
        .collect();
    for (k, p) in paths.iter().enumerate() {
        std::fs::write(p, frame_bytes(10 + k as u64, &s.root, "Light")).unwrap();
    }
    let d = Daemon::start(&s.config);
    assert_eq!(wait_for(&s.db, 3, Duration::from_secs(30)).len(), 3);
    std::thread::sleep(Duration::from_millis(500));
    d.terminate();
    // Touched while the daemon was stopped: a newer version, which replaces the record.
    let later = SystemTime::now() + Duration::from_secs(5);
    std::fs::File::options()
        .write(true)
        .open(&paths[0])
        .unwrap()
        .set_modified(later)
        .unwrap();
    let d = Daemon::start(&s.config);
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    let mtime_of = |p: &Path| -> i64 {
        conn.query_row(
            "SELECT mtime_ns FROM frames WHERE path = ?1",
            [p.to_string_lossy()],
            |r| r.get(0),
        )
        .unwrap_or(0)
    };
    let want = std::fs::metadata(&paths[0]).unwrap();
    let want = want.mtime() * 1_000_000_000 + want.mtime_nsec();
    let start = Instant::now();
    while mtime_of(&paths[0]) != want && start.elapsed() < Duration::from_secs(30) {
        std::thread::sleep(Duration::from_millis(100));
    }
    assert_eq!(mtime_of(&paths[0]), want, "the touched file was read again");
    // Rewritten while the daemon runs: replaced too.
    std::fs::write(&paths[1], frame_bytes(99, &s.root, "Light")).unwrap();
    // A frame whose final padding is not there yet is not recorded until it is.
    let late = s.capture.join("k9.fits");
    let bytes = frame_bytes(42, &s.root, "Light");
    std::fs::write(&late, &bytes[..unpadded(&bytes)]).unwrap();
    std::thread::sleep(Duration::from_secs(4));
    assert!(
        !recorded(&s.db).iter().any(|r| r.0.ends_with("k9.fits")),
        "recorded before its padding was written"
    );
    std::fs::write(&late, &bytes).unwrap();
    let rows = wait_for(&s.db, 4, Duration::from_secs(30));
    std::thread::sleep(Duration::from_secs(2));
    d.terminate();
    let rows_after = recorded(&s.db);
    assert_eq!(rows.len(), 4);
    assert_eq!(rows_after.len(), 4, "{rows_after:?}");
    assert!(rows_after.iter().all(|r| r.1 == "ok"), "{rows_after:?}");
    // The report and the list of frames to stack hold each path once.
    let night: String = conn
        .query_row("SELECT night FROM frames LIMIT 1", [], |r| r.get(0))
        .unwrap();
    let out = subwatch(&["report", "--night", &night, "--json"], &s.config);
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let mut listed: Vec<&str> = doc["frames"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["path"].as_str().unwrap())
        .collect();
    let n = listed.len();
    listed.sort();
    listed.dedup();
    assert_eq!((n, listed.len()), (4, 4));
    let lists = s.root.join("accepted").join(&night);
    for entry in std::fs::read_dir(&lists).unwrap() {
        let text = std::fs::read_to_string(entry.unwrap().path()).unwrap();
        let mut lines: Vec<&str> = text.lines().collect();
        let n = lines.len();
        lines.sort();
        lines.dedup();
        assert_eq!(n, lines.len(), "a path twice in a list: {text}");
    }
}

#[test]
fn a_second_daemon_is_refused_and_a_killed_one_is_not_called_running() {
    let s = site("");
    let d = Daemon::start(&s.config);
    let pid = d.pid();
    let start = Instant::now();
    while !s.root.join("subwatch.db.lock").exists() && start.elapsed() < Duration::from_secs(10) {
        std::thread::sleep(Duration::from_millis(50));
    }
    std::thread::sleep(Duration::from_millis(500));
    let second = Command::new(common::binary())
        .args(["watch", "--config"])
        .arg(&s.config)
        .output()
        .unwrap();
    assert!(!second.status.success());
    let err = String::from_utf8_lossy(&second.stderr);
    assert!(
        err.contains(&format!("another subwatch daemon (process {pid})")),
        "{err}"
    );
    let status = subwatch(&["status"], &s.config);
    let text = String::from_utf8_lossy(&status.stdout);
    assert!(
        text.contains(&format!("daemon running (process {pid})")),
        "{text}"
    );
    d.kill9();
    // Within the old heartbeat's 10 s, a killed daemon was still called running.
    let status = subwatch(&["status", "--json"], &s.config);
    let doc: serde_json::Value = serde_json::from_slice(&status.stdout).unwrap();
    assert_eq!(doc["daemon_running"], false, "{doc}");
}

/// Limit how large a file the daemon may write (RLIMIT_FSIZE): its store's writes fail as
/// on a full disk, and come back when the limit goes.
fn limit_file_size(pid: u32, bytes: u64) {
    let limit = libc::rlimit {
        rlim_cur: bytes as libc::rlim_t,
        rlim_max: libc::RLIM_INFINITY,
    };
    // SAFETY: a valid rlimit for a process of ours.
    let rc = unsafe {
        libc::prlimit(
            pid as libc::pid_t,
            libc::RLIMIT_FSIZE as _,
            &limit,
            std::ptr::null_mut(),
        )
    };
    assert_eq!(rc, 0, "prlimit: {}", std::io::Error::last_os_error());
}

#[test]
fn frames_the_store_could_not_take_are_stored_when_it_can_without_a_restart() {
    let s = site("");
    let d = Logged::start(&s.config);
    let pid = d.child.id();
    std::fs::write(
        s.capture.join("k000.fits"),
        frame_bytes(1, &s.root, "Light"),
    )
    .unwrap();
    assert_eq!(wait_for(&s.db, 1, Duration::from_secs(30)).len(), 1);
    limit_file_size(pid, 1);
    for k in 1..6 {
        std::fs::write(
            s.capture.join(format!("k{k:03}.fits")),
            frame_bytes(k, &s.root, "Light"),
        )
        .unwrap();
    }
    assert!(
        d.wait_log("not recorded:", Duration::from_secs(30)),
        "{}",
        d.log()
    );
    assert_eq!(recorded(&s.db).len(), 1, "the store was refusing writes");
    let failing = d.log();
    assert!(
        failing
            .lines()
            .any(|l| l.contains("ERROR") && l.contains("not recorded:")),
        "a failing store is logged as an error: {failing}"
    );
    limit_file_size(pid, u64::MAX);
    let rows = wait_for(&s.db, 6, Duration::from_secs(60));
    assert_eq!(rows.len(), 6, "stored again once the store worked");
    assert!(rows.iter().all(|r| r.1 == "ok"), "{rows:?}");
    assert_eq!(d.child.id(), pid);
    d.stop();
}

#[test]
fn a_file_in_the_reader_at_three_deaths_is_recorded_as_unreadable_not_read_again() {
    let s = site("");
    // The store, made as the daemon would make it.
    assert!(subwatch(&["status"], &s.config).status.success());
    let frame = s.capture.join("k000.fits");
    std::fs::write(&frame, frame_bytes(1, &s.root, "Light")).unwrap();
    let m = std::fs::metadata(&frame).unwrap();
    // Two earlier daemons died while reading it (as one that a file kills would).
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    conn.execute(
        "INSERT INTO reading (path, size, mtime_ns, started_unix, interruptions) VALUES (?1, ?2, ?3, 0, 2)",
        rusqlite::params![
            frame.to_string_lossy(),
            m.len() as i64,
            m.mtime() * 1_000_000_000 + m.mtime_nsec()
        ],
    )
    .unwrap();
    let d = Daemon::start(&s.config);
    let rows = wait_for(&s.db, 1, Duration::from_secs(30));
    std::thread::sleep(Duration::from_secs(2));
    d.terminate();
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0].1, "error");
    assert!(
        rows[0]
            .2
            .as_deref()
            .unwrap()
            .contains("subwatch stopped 3 times while reading this file"),
        "{rows:?}"
    );
    assert_eq!(recorded(&s.db).len(), 1);
}

#[test]
fn a_frame_larger_than_the_readers_memory_costs_that_frame_only() {
    let s = site("\n[measure]\nreader_memory_mb = 60\n");
    let big = s.capture.join("big.fits");
    let out = Command::new(common::binary())
        .args([
            "render", "--width", "3000", "--height", "3000", "--stars", "300", "--out",
        ])
        .arg(&big)
        .output()
        .unwrap();
    assert!(out.status.success());
    let d = Daemon::start(&s.config);
    let pid = d.pid();
    std::thread::sleep(Duration::from_secs(2));
    std::fs::write(
        s.capture.join("small.fits"),
        frame_bytes(3, &s.root, "Light"),
    )
    .unwrap();
    let rows = wait_for(&s.db, 2, Duration::from_secs(60));
    assert_eq!(d.pid(), pid);
    d.terminate();
    let by_name = |n: &str| rows.iter().find(|r| r.0.ends_with(n)).unwrap().clone();
    let big = by_name("big.fits");
    assert_eq!(big.1, "error");
    assert!(
        big.2
            .as_deref()
            .unwrap()
            .contains("ran out of memory on this file (limit 60 MiB)"),
        "{big:?}"
    );
    assert_eq!(by_name("small.fits").1, "ok");
}

#[test]
fn every_setting_is_checked_before_dusk() {
    let s = site("");
    let base = std::fs::read_to_string(&s.config).unwrap();
    let check = |extra: &str| {
        let p = s.root.join("check.toml");
        std::fs::write(&p, format!("{base}{extra}")).unwrap();
        let out = subwatch(&["check-config"], &p);
        (
            out.status.success(),
            format!(
                "{}{}",
                String::from_utf8_lossy(&out.stdout),
                String::from_utf8_lossy(&out.stderr)
            ),
        )
    };
    let line = base.lines().count() + 3;
    for (extra, words) in [
        (
            "[mail]\nto = [\"o@example.org\"]\nsummary_time = \"25:99\"\n",
            format!("line {line}: mail.summary_time: \"25:99\" is not a time of day before noon such as \"06:30\""),
        ),
        (
            "[mail]\nto = [\"o@example.org\"]\nsummary_time = \"7.30am\"\n",
            format!("line {line}: mail.summary_time: \"7.30am\" is not a time of day"),
        ),
        (
            "[mail]\nto = [\"o@example.org\"]\nsummary_time = \"dawn\"\n",
            format!("line {line}: mail.summary_time: \"dawn\" needs the site"),
        ),
        (
            "[mail]\nto = [\"not-an-address\"]\n",
            format!("line {}: mail.to:", line - 1),
        ),
        (
            "[mail]\nsecurity = \"none\"\npassword_file = \"pw\"\n",
            format!("line {}: mail.security: \"none\" would send the password unencrypted", line - 1),
        ),
    ] {
        let (ok, text) = check(extra);
        assert!(!ok, "{extra:?} passed check-config: {text}");
        assert!(text.contains(&words), "{extra:?}: {text}");
    }
    // The password file: this user's, and nobody else's to read.
    use std::os::unix::fs::PermissionsExt;
    let pw = s.root.join("pw");
    std::fs::write(&pw, "secret\n").unwrap();
    std::fs::set_permissions(&pw, std::fs::Permissions::from_mode(0o640)).unwrap();
    let (ok, text) = check("[mail]\npassword_file = \"pw\"\n");
    assert!(!ok && text.contains("chmod 600"), "{text}");
    std::fs::set_permissions(&pw, std::fs::Permissions::from_mode(0o600)).unwrap();
    let (ok, text) = check(
        "[mail]\nsecurity = \"none\"\npassword_file = \"pw\"\nsend_password_unencrypted = true\n",
    );
    assert!(ok && text.contains("UNENCRYPTED"), "{text}");
    // report --send with nobody to send to says so.
    let out = subwatch(&["report", "--night", "2026-03-14", "--send"], &s.config);
    assert!(!out.status.success());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("[mail] to is empty"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // A missing file is named once.
    let missing = s.root.join("nowhere.toml");
    let out = subwatch(&["check-config"], &missing);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert_eq!(err.matches(&*missing.to_string_lossy()).count(), 1, "{err}");
    assert_eq!(err.matches("No such file").count(), 1, "{err}");
}

#[test]
fn low_disk_is_watched_where_frames_and_the_store_are() {
    let s = site("\n[alerts]\nmin_free_gb = 1000000\n");
    let d = Daemon::start(&s.config);
    let conn_ok = || rusqlite::Connection::open(&s.db).ok();
    let start = Instant::now();
    let message = loop {
        let m: Option<String> = conn_ok().and_then(|c| {
            c.query_row(
                "SELECT message FROM alerts WHERE kind = 'low_disk'",
                [],
                |r| r.get(0),
            )
            .ok()
        });
        if m.is_some() || start.elapsed() > Duration::from_secs(20) {
            break m;
        }
        std::thread::sleep(Duration::from_millis(200));
    };
    d.terminate();
    let message = message.expect("a low-disk alert");
    assert!(
        message.contains(&format!("where {} is", s.capture.display())),
        "{message}"
    );
}

#[test]
fn header_text_cannot_become_a_spreadsheet_formula() {
    let dir = tempfile::tempdir().unwrap();
    let night = dir.path().join("night");
    std::fs::create_dir_all(&night).unwrap();
    for k in 0..3 {
        let out = Command::new(common::binary())
            .args([
                "render", "--width", "256", "--height", "256", "--stars", "40",
            ])
            .args([
                "--seed",
                &k.to_string(),
                "--object",
                "=HYPERLINK(\"http://x\",\"y\")",
            ])
            .arg("--out")
            .arg(night.join(format!("f{k}.fits")))
            .output()
            .unwrap();
        assert!(out.status.success());
    }
    let report = dir.path().join("report");
    let out = Command::new(common::binary())
        .arg("night")
        .arg(&night)
        .arg("--report")
        .arg(&report)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let csv = std::fs::read_dir(&report)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|e| e == "csv"))
        .unwrap();
    let text = std::fs::read_to_string(csv).unwrap();
    // OWASP, "CSV Injection": the cell starts with an apostrophe, inside its quotes.
    assert!(
        text.contains(",\"'=HYPERLINK(\"\"http://x\"\",\"\"y\"\")\","),
        "{text}"
    );
    assert!(!text.contains(",=HYPERLINK"), "{text}");
}
