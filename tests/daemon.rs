//! The watch daemon as a user runs it: a real process, real folders, a real SQLite file.
//! Frames written slowly, renamed into place, dropped by the hundred, mixed with broken
//! files and calibration frames; the process killed with SIGKILL and restarted. Each
//! frame must be recorded exactly once.

mod common;

use std::io::Write;
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use common::daemon::{feed_one_by_one, frame_bytes, recorded, site, wait_for, Daemon};
use subwatch::frame::write::{write_frame, Encoding};

#[test]
fn slow_writes_renames_bad_files_and_calibration_frames() {
    let s = site("");
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(500));

    // Written in chunks over ~2 s: must be measured once, complete.
    let slow = frame_bytes(1, &s.root, "Light Frame");
    let slow_path = s.capture.join("slow.fits");
    {
        let mut f = std::fs::File::create(&slow_path).unwrap();
        for chunk in slow.chunks(slow.len() / 8 + 1) {
            f.write_all(chunk).unwrap();
            f.flush().unwrap();
            std::thread::sleep(Duration::from_millis(250));
        }
    }
    // Temporary name, then renamed into place.
    let tmp = s.capture.join("renamed.fits.part");
    std::fs::write(&tmp, frame_bytes(2, &s.root, "Light Frame")).unwrap();
    std::fs::rename(&tmp, s.capture.join("renamed.fits")).unwrap();
    // Broken files among good ones; a dark frame; a nested folder.
    std::fs::write(s.capture.join("junk.fits"), b"not a frame at all").unwrap();
    std::fs::write(s.capture.join("empty.fits"), b"").unwrap();
    std::fs::create_dir_all(s.capture.join("night2/sub")).unwrap();
    std::fs::write(
        s.capture.join("night2/sub/nested.fits"),
        frame_bytes(3, &s.root, "Light Frame"),
    )
    .unwrap();
    std::fs::write(
        s.capture.join("dark_001.fits"),
        frame_bytes(4, &s.root, "Dark Frame"),
    )
    .unwrap();
    std::fs::write(s.capture.join("notes.txt"), b"not a frame").unwrap();

    let rows = wait_for(&s.db, 6, Duration::from_secs(30));
    assert_eq!(d.terminate().code(), Some(0), "SIGTERM gives a clean exit");
    let by_name = |n: &str| {
        rows.iter()
            .find(|r| r.0.ends_with(n))
            .unwrap_or_else(|| panic!("{n} not recorded: {rows:?}"))
    };
    assert_eq!(rows.len(), 6, "{rows:?}");
    assert_eq!(by_name("/slow.fits").1, "ok");
    assert_eq!(by_name("/renamed.fits").1, "ok");
    assert_eq!(by_name("/nested.fits").1, "ok");
    assert_eq!(by_name("/dark_001.fits").1, "skipped");
    let junk = by_name("/junk.fits");
    assert_eq!(junk.1, "error");
    assert!(
        junk.2.as_deref().unwrap().contains("not a FITS file"),
        "{junk:?}"
    );
    assert!(by_name("/empty.fits")
        .2
        .as_deref()
        .unwrap()
        .contains("empty"));
}

#[test]
fn polling_mode_finds_frames_without_file_events() {
    let s = site("poll_seconds = 0.5");
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    for i in 0..5 {
        std::fs::write(
            s.capture.join(format!("p{i}.fits")),
            frame_bytes(10 + i, &s.root, "Light Frame"),
        )
        .unwrap();
    }
    let rows = wait_for(&s.db, 5, Duration::from_secs(30));
    d.kill9();
    assert_eq!(rows.len(), 5, "{rows:?}");
    assert!(rows.iter().all(|r| r.1 == "ok"));
}

#[test]
fn five_hundred_frames_at_once_are_each_recorded_once_in_bounded_memory() {
    let s = site("");
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    // 512 x 512 frames: 1 MiB of pixels each, 500 MiB for the burst, so a daemon that
    // held every frame (or even a tenth of them) could not stay under the bound below.
    let scratch = s.root.join("scratch.fits");
    let (pixels, keys, _) = subwatch::sim::render(&subwatch::sim::SimParams {
        width: 512,
        height: 512,
        star_count: 80,
        seed: 20,
        ..Default::default()
    });
    write_frame(&scratch, &pixels, Encoding::Unsigned16, &keys).unwrap();
    let bytes = std::fs::read(&scratch).unwrap();
    for i in 0..500 {
        std::fs::write(s.capture.join(format!("burst_{i:03}.fits")), &bytes).unwrap();
    }
    let mut peak_kib = 0;
    let start = Instant::now();
    let rows = loop {
        if let Ok(status) = std::fs::read_to_string(format!("/proc/{}/status", d.pid())) {
            if let Some(v) = status.lines().find(|l| l.starts_with("VmHWM:")) {
                peak_kib = v
                    .split_whitespace()
                    .nth(1)
                    .and_then(|n| n.parse().ok())
                    .unwrap_or(peak_kib);
            }
        }
        let rows = recorded(&s.db);
        if rows.len() >= 500 || start.elapsed() > Duration::from_secs(300) {
            break rows;
        }
        std::thread::sleep(Duration::from_millis(200));
    };
    std::thread::sleep(Duration::from_millis(500));
    let rows_after = recorded(&s.db);
    d.kill9();
    assert_eq!(rows.len(), 500);
    assert_eq!(rows_after.len(), 500, "nothing recorded twice");
    assert!(rows.iter().all(|r| r.1 == "ok"));
    println!(
        "500 frames in {:.1} s, peak resident memory {} MiB",
        start.elapsed().as_secs_f64(),
        peak_kib / 1024
    );
    // The daemon holds paths and records, never pixels: those stay in the readers.
    assert!(peak_kib < 64 * 1024, "peak resident memory {peak_kib} KiB");
}

#[test]
fn killed_at_random_moments_nothing_is_lost_or_doubled() {
    let s = site("");
    // Full-size sample frames, so that a kill lands while frames are being measured.
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-frames");
    let bytes: Vec<Vec<u8>> = [
        "kfa-001-good.fits",
        "kfa-014-soft-focus.fits",
        "kfa-021-wind.fits",
        "kfa-033-cloud.fits",
    ]
    .iter()
    .map(|n| std::fs::read(sample.join(n)).unwrap())
    .collect();
    // Seeded "random" kill moments, so a failure replays.
    let mut state: u64 = 0x5eed;
    let mut next = || {
        state = state
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (state >> 33) % 600
    };
    let mut written = 0;
    let mut kills_in_flight = 0;
    for round in 0..4 {
        let d = Daemon::start(&s.config);
        for _ in 0..40 {
            std::fs::write(
                s.capture.join(format!("k{written:03}.fits")),
                &bytes[written % 4],
            )
            .unwrap();
            written += 1;
        }
        std::thread::sleep(Duration::from_millis(150 + next()));
        d.kill9();
        // What the kill interrupted: frames still waiting, and files marked as being read
        // at that moment (the store's marks of work in flight).
        let done = recorded(&s.db).len();
        let reading: i64 = rusqlite::Connection::open(&s.db)
            .unwrap()
            .query_row("SELECT COUNT(*) FROM reading", [], |r| r.get(0))
            .unwrap();
        println!("round {round}: {done} of {written} recorded, {reading} being read when killed");
        kills_in_flight += usize::from(done < written && reading > 0);
    }
    // The seeded moments must land in the middle of the work, or the test tests nothing.
    assert!(
        kills_in_flight >= 3,
        "only {kills_in_flight} of 4 kills landed while frames were being read"
    );
    let d = Daemon::start(&s.config);
    let rows = wait_for(&s.db, written, Duration::from_secs(60));
    std::thread::sleep(Duration::from_millis(1000));
    let rows_after = recorded(&s.db);
    d.kill9();
    assert_eq!(
        rows.len(),
        written,
        "every frame recorded after the restarts"
    );
    assert_eq!(rows_after.len(), written, "and none twice");
    let mut paths: Vec<&String> = rows_after.iter().map(|r| &r.0).collect();
    paths.dedup();
    assert_eq!(paths.len(), written);
    // A kill between recording a frame and judging it is mended at the next start.
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    let unjudged: i64 = conn
        .query_row(
            "SELECT COUNT(*) FROM frames WHERE verdict IS NULL AND status != 'skipped'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(unjudged, 0);
}

#[test]
fn check_config_names_every_unknown_key_with_its_line() {
    let s = site("");
    let bad = s.root.join("bad.toml");
    std::fs::write(
        &bad,
        format!(
            "[watch]\nfolders = [\"{}\"]\nsettle = 2\n[site]\ntimezone = \"Nowhere/Special\"\n[mial]\nto = []\n",
            s.capture.display()
        ),
    )
    .unwrap();
    let out = Command::new(common::binary())
        .args(["check-config", "--config"])
        .arg(&bad)
        .output()
        .unwrap();
    assert!(!out.status.success());
    let text = String::from_utf8_lossy(&out.stderr);
    assert!(text.contains("line 3: watch.settle: unknown key"), "{text}");
    assert!(text.contains("line 6: mial: unknown section"), "{text}");
    let ok = Command::new(common::binary())
        .args(["check-config", "--config"])
        .arg(&s.config)
        .output()
        .unwrap();
    assert!(
        ok.status.success(),
        "{}",
        String::from_utf8_lossy(&ok.stdout)
    );
}

#[test]
fn live_verdicts_and_the_accepted_list() {
    use subwatch::sim::night::{render_night, NightPlan};
    let s = site("");
    let mut cfg = std::fs::read_to_string(&s.config).unwrap();
    cfg.push_str(&format!(
        "[actions]\naccepted_lists = true\nlists_folder = \"{}\"\n",
        s.root.join("lists").display()
    ));
    std::fs::write(&s.config, cfg).unwrap();
    let mut plan = NightPlan::full(11);
    plan.frames = 8;
    plan.flip_at = None;
    plan.gust_frames = vec![6];
    plan.cloud_frames = vec![7];
    plan.trail_frames.clear();
    plan.focus_drift_from = None;
    let (frames, _) = render_night(&plan);
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    for f in &frames {
        write_frame(
            &s.capture.join(&f.name),
            &f.pixels,
            Encoding::Unsigned16,
            &f.keys,
        )
        .unwrap();
        // One at a time, as a camera delivers them: each verdict sees the night so far.
        let start = Instant::now();
        while recorded(&s.db).len() < frames.iter().position(|g| g.name == f.name).unwrap() + 1
            && start.elapsed() < Duration::from_secs(20)
        {
            std::thread::sleep(Duration::from_millis(50));
        }
    }
    // Every frame judged (the verdict is written just after the frame itself).
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    let start = Instant::now();
    while start.elapsed() < Duration::from_secs(20) {
        let judged: i64 = conn
            .query_row(
                "SELECT COUNT(*) FROM frames WHERE verdict IS NOT NULL",
                [],
                |r| r.get(0),
            )
            .unwrap();
        if judged == frames.len() as i64 {
            break;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    d.kill9();
    let verdict = |name: &str| -> (String, String) {
        conn.query_row(
            "SELECT verdict, reasons_json FROM frames WHERE path LIKE ?1",
            [format!("%{name}")],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap()
    };
    assert_eq!(verdict(&frames[2].name).0, "ok");
    let gust = verdict(&frames[6].name);
    assert_eq!(gust.0, "reject", "{gust:?}");
    assert!(gust.1.contains("eccentricity_high"));
    let cloud = verdict(&frames[7].name);
    assert_eq!(cloud.0, "reject", "{cloud:?}");
    assert!(cloud.1.contains("transparency_low"), "{cloud:?}");
    let list =
        std::fs::read_to_string(s.root.join("lists/2026-03-14/Kestrel_Field_A__L.txt")).unwrap();
    assert_eq!(list.lines().count(), 6, "{list}");
    assert!(!list.contains(&frames[6].name) && !list.contains(&frames[7].name));
}

#[test]
fn a_streak_of_rejections_raises_one_alert() {
    use subwatch::sim::night::{render_night, NightPlan};
    let s = site("");
    let mut cfg = std::fs::read_to_string(&s.config).unwrap();
    cfg.push_str(&format!(
        "[mail]\nfrom = \"subwatch@kestrel-ridge.example\"\nto = [\"observer@kestrel-ridge.example\"]\n[report]\nfolder = \"{}\"\n",
        s.root.join("reports").display()
    ));
    std::fs::write(&s.config, cfg).unwrap();
    let mut plan = NightPlan::full(12);
    plan.frames = 9;
    plan.flip_at = None;
    plan.gust_frames = vec![5, 6, 7, 8];
    plan.cloud_frames.clear();
    plan.trail_frames.clear();
    plan.focus_drift_from = None;
    let (frames, _) = render_night(&plan);
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    feed_one_by_one(&s, &conn, &frames);
    std::thread::sleep(Duration::from_millis(300));
    d.kill9();
    let alerts: Vec<(String, String)> = conn
        .prepare("SELECT kind, message FROM alerts")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    // Four rejections in a row: the third raises the alert, the fourth is held back by
    // the rate limit.
    assert_eq!(alerts.len(), 1, "{alerts:?}");
    assert_eq!(alerts[0].0, "reject_streak");
    // It names the group, the three frames and what was measured in each.
    let message = &alerts[0].1;
    assert!(
        message.starts_with("Kestrel Field A / L: the last 3 frames were all rejected: "),
        "{message}"
    );
    for f in &frames[5..8] {
        assert!(message.contains(&f.name), "{} in {message}", f.name);
    }
    assert_eq!(
        message.matches("eccentricity ").count(),
        3,
        "each frame's measured eccentricity: {message}"
    );
    let mails: Vec<_> = std::fs::read_dir(s.root.join("reports"))
        .unwrap()
        .flatten()
        .collect();
    assert_eq!(
        mails.len(),
        1,
        "no mail server: the alert is written as one .eml file"
    );
}

#[test]
fn rejected_frames_can_be_moved_aside_when_asked() {
    use subwatch::sim::night::{render_night, NightPlan};
    let s = site("");
    let mut cfg = std::fs::read_to_string(&s.config).unwrap();
    cfg.push_str("[actions]\nmove_rejected = true\n");
    std::fs::write(&s.config, cfg).unwrap();
    let mut plan = NightPlan::full(13);
    plan.frames = 6;
    plan.flip_at = None;
    plan.gust_frames = vec![5];
    plan.cloud_frames.clear();
    plan.trail_frames.clear();
    plan.focus_drift_from = None;
    let (frames, _) = render_night(&plan);
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    feed_one_by_one(&s, &conn, &frames);
    // Let a rescan pass (every 2 s here): the moved frame must not come back as new.
    std::thread::sleep(Duration::from_millis(2500));
    d.kill9();
    let gust = &frames[5].name;
    assert!(!s.capture.join(gust).exists());
    let moved = s.capture.join("rejected").join(gust);
    assert!(moved.exists(), "moved to {}", moved.display());
    let rows = recorded(&s.db);
    assert_eq!(rows.len(), frames.len(), "{rows:?}");
    assert!(
        rows.iter().any(|r| r.0 == moved.to_string_lossy()),
        "the store follows the move"
    );
    assert!(
        frames[..5].iter().all(|f| s.capture.join(&f.name).exists()),
        "accepted frames stay"
    );
}

#[test]
fn a_moving_object_raises_its_alert_on_its_own_night() {
    // Anomaly alerts look at the night the frames' DATE-OBS place them in (the plan's
    // night in March 2026), whatever the wall clock says.
    use subwatch::sim::night::{render_night, NightPlan};
    // The checks run every 2 s here instead of every minute ([watch] checks_seconds).
    let s = site("checks_seconds = 2");
    let mut cfg = std::fs::read_to_string(&s.config).unwrap();
    cfg.push_str("[alerts]\nanomaly_kinds = [\"moving\"]\n");
    std::fs::write(&s.config, cfg).unwrap();
    let mut plan = NightPlan::full(14).quiet();
    plan.moving_object = true;
    plan.frames = 8;
    let (frames, truth) = render_night(&plan);
    assert!(truth.iter().any(|a| a.kind == "moving"));
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    feed_one_by_one(&s, &conn, &frames);
    let deadline = Instant::now() + Duration::from_secs(30);
    let mut alerts: Vec<(String, String)> = Vec::new();
    while Instant::now() < deadline {
        alerts = conn
            .prepare("SELECT kind, message FROM alerts WHERE kind LIKE 'anomaly_%'")
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .unwrap()
            .map(Result::unwrap)
            .collect();
        if !alerts.is_empty() {
            break;
        }
        std::thread::sleep(Duration::from_millis(500));
    }
    d.kill9();
    assert_eq!(alerts.len(), 1, "{alerts:?}");
    assert_eq!(alerts[0].0, "anomaly_moving");
    // The alert says what happened: the group, where, how fast, and in which frames.
    let message = &alerts[0].1;
    assert!(
        message.starts_with("Kestrel Field A / L: moving at "),
        "{message}"
    );
    assert!(
        message.contains("″/min") && message.contains("kestrel-field-a_001.fits"),
        "{message}"
    );
}

/// `check-config` on `config`: (success, stdout and stderr together).
fn check_config(config: &Path, env: &[(&str, &Path)]) -> (bool, String) {
    let out = Command::new(common::binary())
        .args(["check-config", "--config"])
        .arg(config)
        .envs(env.iter().copied())
        .output()
        .unwrap();
    (
        out.status.success(),
        format!(
            "{}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        ),
    )
}

/// What the machine lacks is said like every other problem: its key, its line, and the
/// system's reason once, in words.
#[test]
fn check_config_names_what_the_machine_lacks_with_its_key_and_line() {
    let s = site("");
    let cfg = s.root.join("lacks.toml");
    let r = s.root.display();
    std::fs::write(
        &cfg,
        format!(
            "[watch]\nfolders = [\"{r}/gone\"]\n[store]\npath = \"{r}/s.db\"\n[mail]\nto = [\"o@example.org\"]\npassword_file = \"{r}/no-password\"\n[catalogue]\nfiles = [\"{r}/stars.csv\"]\n"
        ),
    )
    .unwrap();
    let (ok, text) = check_config(&cfg, &[]);
    assert!(!ok, "{text}");
    for words in [
        format!("error: line 2: watch.folders: {r}/gone does not exist"),
        format!("error: line 7: mail.password_file: {r}/no-password: No such file or directory\n"),
        format!("error: line 9: catalogue.files: catalogue file {r}/stars.csv: No such file or directory\n"),
    ] {
        assert!(text.contains(&words), "{words:?} not in: {text}");
    }
    assert!(!text.contains("os error"), "{text}");
    assert_eq!(text.matches("No such file").count(), 2, "{text}");
}

/// The file's own mistakes, in words: a key given twice, a section given twice, a number
/// too large for TOML, an unknown key with the nearest known one, an address.
#[test]
fn check_config_says_the_files_mistakes_in_words() {
    let s = site("");
    let cfg = s.root.join("mistakes.toml");
    let said = |text: &str| {
        std::fs::write(&cfg, text).unwrap();
        let (ok, said) = check_config(&cfg, &[]);
        assert!(!ok, "{said}");
        said
    };
    let folders = format!("[watch]\nfolders = [\"{}\"]\n", s.capture.display());
    let text = said(&format!("{folders}poll_seconds = 1\npoll_seconds = 2\n"));
    assert!(
        text.contains("line 4: watch.poll_seconds: given twice (first on line 3): keep one"),
        "{text}"
    );
    let text = said(&format!(
        "{folders}[site]\ntimezone = \"UTC\"\n[watch]\nsettle_seconds = 1\n"
    ));
    assert!(
        text.contains("line 5: watch: [watch] is given twice (first on line 1)"),
        "{text}"
    );
    let text = said(&format!(
        "{folders}queue_limit = 99999999999999999999999\n[site]\ntimezone = \"Nowhere/Special\"\n"
    ));
    assert!(
        text.contains("line 3: watch.queue_limit: 99999999999999999999999 is out of range: give a whole number from 1 to 1000000"),
        "{text}"
    );
    assert!(text.contains("line 5: site.timezone:"), "{text}");
    assert!(
        !text.contains("i128") && !text.contains("(syntax)"),
        "{text}"
    );
    let text = said(&format!(
        "{folders}pol_seconds = 3\n[mail]\nto = [\"not-an-address\"]\n"
    ));
    assert!(
        text.contains("line 3: watch.pol_seconds: unknown key; did you mean `poll_seconds`?"),
        "{text}"
    );
    assert!(text.contains("line 5: mail.to:"), "{text}");
    assert!(!text.contains("Invalid input"), "{text}");
}

/// Recipients without a server: the mail is written as .eml files, and check-config says
/// where (the outbox writes it into the report folder).
#[test]
fn check_config_says_mail_without_a_server_is_written_to_files() {
    let s = site("");
    let cfg = s.root.join("files.toml");
    let mut text = std::fs::read_to_string(&s.config).unwrap();
    text.push_str(&format!(
        "[mail]\nto = [\"observer@kestrel-ridge.example\"]\n[report]\nfolder = \"{}/reports\"\n",
        s.root.display()
    ));
    std::fs::write(&cfg, &text).unwrap();
    let (ok, said) = check_config(&cfg, &[]);
    assert!(ok, "{said}");
    let line = text.lines().position(|l| l.starts_with("to = ")).unwrap() + 1;
    assert!(
        said.contains(&format!(
            "warning: line {line}: mail.to: no [mail] smtp_host: the morning summary and alerts are not sent but written as .eml files into {}/reports",
            s.root.display()
        )),
        "{said}"
    );
}

#[test]
fn a_missing_configuration_names_the_example_to_start_from() {
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("subwatch.toml");
    let (ok, said) = check_config(&missing, &[]);
    assert!(!ok);
    assert!(said.contains("config/subwatch.toml"), "{said}");
    assert_eq!(
        said.matches(&*missing.to_string_lossy()).count(),
        1,
        "{said}"
    );
    assert!(!said.contains("os error"), "{said}");
}

/// check-config reads the catalogue as an import would, says what is wrong with its
/// file, row and column, and writes no index (nor anything else).
#[test]
fn check_config_reads_the_catalogue_and_writes_nothing() {
    let s = site("");
    let home = s.root.join("home");
    std::fs::create_dir_all(&home).unwrap();
    let stars = s.root.join("stars.csv");
    std::fs::write(
        &stars,
        "id,ra_deg,dec_deg,mag\nK1,10.0,20.0,11.2\nK2,10.1,20.1,12.5\n",
    )
    .unwrap();
    let cfg = s.root.join("catalogue.toml");
    let mut text = std::fs::read_to_string(&s.config).unwrap();
    text.push_str(&format!("[catalogue]\nfiles = [\"{}\"]\n", stars.display()));
    std::fs::write(&cfg, &text).unwrap();
    let line = text.lines().count();
    let env = [("HOME", home.as_path()), ("XDG_CACHE_HOME", home.as_path())];
    let tree = || {
        let mut all: Vec<String> = Vec::new();
        let mut stack = vec![s.root.clone()];
        while let Some(d) = stack.pop() {
            for e in std::fs::read_dir(&d).unwrap() {
                let p = e.unwrap().path();
                if p.is_dir() {
                    stack.push(p.clone());
                }
                all.push(p.display().to_string());
            }
        }
        all.sort();
        all
    };
    let before = tree();
    let (ok, said) = check_config(&cfg, &env);
    assert!(ok, "{said}");
    assert!(said.contains("catalogue: 2 rows in 1 file(s) read without a problem; the first command that needs their index builds it in"), "{said}");
    assert_eq!(tree(), before, "check-config wrote something");
    // Built once, then said current.
    let out = Command::new(common::binary())
        .args(["catalogue", "import", "--config"])
        .arg(&cfg)
        .envs(env)
        .output()
        .unwrap();
    assert!(out.status.success());
    let (ok, said) = check_config(&cfg, &env);
    assert!(ok && said.contains("is current"), "{said}");
    // A bad row appended: said with its file, row and column, at the key's line.
    let mut f = std::fs::OpenOptions::new()
        .append(true)
        .open(&stars)
        .unwrap();
    f.write_all(b"K3,BAD,NaN,1\n").unwrap();
    let (ok, said) = check_config(&cfg, &env);
    assert!(!ok, "{said}");
    assert!(
        said.contains(&format!(
            "error: line {line}: catalogue.files: {}: row 3 (line 4), column \"ra_deg\": \"BAD\" is not a number",
            stars.display()
        )),
        "{said}"
    );
}

/// A shared store reached without TLS is said loudly, at check-config and at the
/// daemon's start, with the fix; a store on this machine (loopback) is not, since that
/// traffic never leaves it.
#[test]
fn a_store_reached_unencrypted_is_said_loudly_unless_it_is_on_this_machine() {
    let s = site("");
    let base = std::fs::read_to_string(&s.config)
        .unwrap()
        .replace(&format!("[store]\npath = '{}'\n", s.db.display()), "");
    let with_url = |name: &str, url: &str| {
        let p = s.root.join(name);
        std::fs::write(&p, format!("{base}[store]\nurl = \"{url}\"\n")).unwrap();
        p
    };
    // A name that resolves nowhere (RFC 2606 reserves .invalid): the warning comes
    // before the store is tried.
    let remote = with_url(
        "remote.toml",
        "postgresql://subwatch@db.kestrel-ridge.invalid:5432/site",
    );
    let line = base.lines().count() + 2;
    let (ok, said) = check_config(&remote, &[]);
    assert!(!ok, "the store cannot be reached: {said}");
    assert!(
        said.contains(&format!("warning: line {line}: store.url: frames, verdicts and queued mail travel to db.kestrel-ridge.invalid UNENCRYPTED (no sslmode in the address)"))
            && said.contains("Add ?sslmode=require to the address"),
        "{said}"
    );
    let tls = with_url(
        "tls.toml",
        "postgresql://subwatch@db.kestrel-ridge.invalid:5432/site?sslmode=require",
    );
    assert!(!check_config(&tls, &[]).1.contains("UNENCRYPTED"));
    let local = with_url("local.toml", "postgresql://subwatch@127.0.0.1:9/site");
    let (_, said) = check_config(&local, &[]);
    assert!(!said.contains("UNENCRYPTED"), "{said}");
    assert!(
        said.contains(&format!("error: line {line}: store.url:")),
        "{said}"
    );
    // The daemon says it first thing, as a warning.
    let d = common::daemon::Logged::start(&remote);
    assert!(
        d.wait_log("UNENCRYPTED", Duration::from_secs(20)),
        "{}",
        d.log()
    );
    let log = d.stop();
    let said = log.lines().find(|l| l.contains("UNENCRYPTED")).unwrap();
    assert!(
        said.contains("WARN") && said.contains("store.url"),
        "{said}"
    );
}

/// The store's password changed mid-night (PostgreSQL, a role that logs in with a
/// password): the daemon names the refused login (SQLSTATE 28P01, PostgreSQL's
/// invalid_password) rather than a broken connection, keeps the frames, and records them
/// once the password file holds the new password.
#[test]
fn a_store_password_changed_mid_night_is_named_and_taken_up_from_the_file() {
    let role = common::postgres::PasswordRole::new("first-pass-7Q");
    let s = site("");
    let pw = s.root.join("db-password");
    std::fs::write(&pw, "first-pass-7Q\n").unwrap();
    subwatch::os::make_private(&pw).unwrap();
    let base = std::fs::read_to_string(&s.config)
        .unwrap()
        .replace(&format!("[store]\npath = '{}'\n", s.db.display()), "");
    let cfg = s.root.join("shared.toml");
    std::fs::write(
        &cfg,
        format!(
            "{base}[store]\nurl = \"{}\"\npassword_file = \"{}\"\n",
            role.url,
            pw.display()
        ),
    )
    .unwrap();
    let (ok, said) = check_config(&cfg, &[]);
    assert!(ok, "{said}");
    // A wrong password is named at check-config, at the password file's line.
    std::fs::write(&pw, "wrong\n").unwrap();
    let (ok, said) = check_config(&cfg, &[]);
    let line = base.lines().count() + 3;
    assert!(!ok, "{said}");
    assert!(
        said.contains(&format!("error: line {line}: store.password_file: store {}: the server refused the login: password authentication failed for user \"{}\" (SQLSTATE 28P01 invalid_password)", role.url, role.role)),
        "{said}"
    );
    std::fs::write(&pw, "first-pass-7Q\n").unwrap();

    let d = common::daemon::Logged::start(&cfg);
    let frames = |n: i64| {
        let start = Instant::now();
        while start.elapsed() < Duration::from_secs(60) {
            if role.count("SELECT COUNT(*) FROM frames") >= n {
                return true;
            }
            std::thread::sleep(Duration::from_millis(200));
        }
        false
    };
    std::fs::write(s.capture.join("k1.fits"), frame_bytes(1, &s.root, "Light")).unwrap();
    assert!(frames(1), "{}", d.log());
    role.set_password("second-pass-8R");
    role.end_sessions();
    std::fs::write(s.capture.join("k2.fits"), frame_bytes(2, &s.root, "Light")).unwrap();
    assert!(
        d.wait_log(
            "the store refuses this daemon's login",
            Duration::from_secs(60)
        ),
        "{}",
        d.log()
    );
    assert_eq!(role.count("SELECT COUNT(*) FROM frames"), 1);
    // The new password in the file: read at the next try, the kept frame recorded.
    std::fs::write(&pw, "second-pass-8R\n").unwrap();
    assert!(frames(2), "{}", d.log());
    assert!(
        d.wait_log("the store is back", Duration::from_secs(30)),
        "{}",
        d.log()
    );
    let log = d.stop();
    let refused = log
        .lines()
        .find(|l| l.contains("the store refuses this daemon's login"))
        .unwrap();
    assert!(
        refused.contains("ERROR")
            && refused.contains("password authentication failed")
            && refused.contains("SQLSTATE 28P01")
            && refused.contains("[store] password_file"),
        "{refused}"
    );
    assert_eq!(
        log.matches("the store refuses this daemon's login").count(),
        1,
        "{log}"
    );
}

/// Calibration frames are judged as they land, as the morning judges them: a flat too
/// faint at dusk is said while it can still be taken again, with its reason, in the
/// store's live verdict and on the status page's JSON.
#[test]
fn a_flat_too_faint_is_judged_as_it_lands() {
    use subwatch::frame::cards::OutValue;
    use subwatch::sim::calibration::{flat, Fault};
    let s = site("");
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(500));
    for (k, level) in [0.45, 0.46, 0.02].into_iter().enumerate() {
        let keys = vec![
            ("IMAGETYP".to_string(), OutValue::Text("Flat Field".into())),
            ("EXPTIME".into(), OutValue::Real(2.0)),
            ("FILTER".into(), OutValue::Text("L".into())),
            ("XBINNING".into(), OutValue::Int(1)),
            (
                "DATE-OBS".into(),
                OutValue::Text(format!("2026-03-14T18:5{k}:00")),
            ),
        ];
        let pixels = flat(256, level, Fault::None, 40 + k as u64);
        write_frame(
            &s.capture.join(format!("flat_L_{k:03}.fits")),
            &pixels,
            Encoding::Unsigned16,
            &keys,
        )
        .unwrap();
    }
    let conn = rusqlite::Connection::open(&s.db).ok();
    let judged = || -> Vec<(String, Option<String>, Option<String>)> {
        let Some(c) = conn.as_ref() else {
            return Vec::new();
        };
        c.prepare("SELECT path, live_verdict, live_explanations_json FROM frames ORDER BY path")
            .and_then(|mut st| {
                st.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
                    .map(|rows| rows.filter_map(Result::ok).collect())
            })
            .unwrap_or_default()
    };
    let start = Instant::now();
    let mut rows = judged();
    while start.elapsed() < Duration::from_secs(30)
        && !(rows.len() == 3 && rows.iter().all(|r| r.1.is_some()))
    {
        std::thread::sleep(Duration::from_millis(200));
        rows = judged();
    }
    d.terminate();
    assert_eq!(rows.len(), 3, "{rows:?}");
    let faint = rows
        .iter()
        .find(|r| r.0.ends_with("flat_L_002.fits"))
        .unwrap();
    assert_eq!(faint.1.as_deref(), Some("reject"), "{rows:?}");
    assert!(
        faint.2.as_deref().unwrap_or("").contains("full scale"),
        "the reason names the flat's level: {faint:?}"
    );
    for good in rows.iter().filter(|r| !r.0.ends_with("flat_L_002.fits")) {
        assert_eq!(good.1.as_deref(), Some("ok"), "{rows:?}");
    }
}
