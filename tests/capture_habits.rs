//! How capture programs write frames, met by the daemon on every system it runs on: frames
//! copied in at once, and one held open while it is written. On Windows that one is held
//! without sharing (share mode 0, as a capture program holds a file it writes), so every
//! open of it by another program fails with a sharing violation until it is closed
//! (Microsoft's CreateFileW documentation, "dwShareMode"): the daemon must wait for it as
//! for a file still growing, and record it, once, when it is complete. Runs on Linux,
//! under qemu-aarch64 and under Wine in CI.

mod common;

use std::io::Write;
use std::time::Duration;

use common::daemon::{frame_bytes, recorded, site, wait_for, Daemon};

/// The file opened for writing as a capture program opens it: on Windows, shared with
/// nobody; elsewhere an ordinary open (Unix has no share modes).
fn open_as_capture(path: &std::path::Path) -> std::fs::File {
    let mut o = std::fs::OpenOptions::new();
    o.write(true).create_new(true);
    #[cfg(windows)]
    std::os::windows::fs::OpenOptionsExt::share_mode(&mut o, 0);
    o.open(path).unwrap()
}

#[test]
fn frames_copied_in_and_one_held_while_written_are_each_recorded_once() {
    let s = site("");
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_secs(2));

    // The held frame: its first half now, the rest after several settle intervals.
    let held = s.capture.join("kfa_held.fits");
    let bytes = frame_bytes(41, &s.root, "Light");
    let mut f = open_as_capture(&held);
    f.write_all(&bytes[..bytes.len() / 2]).unwrap();
    f.flush().unwrap();

    // Meanwhile other frames are copied in whole.
    for k in 0..4u64 {
        std::fs::write(
            s.capture.join(format!("kfa_{k:03}.fits")),
            frame_bytes(50 + k, &s.root, "Light"),
        )
        .unwrap();
    }
    let copied = wait_for(&s.db, 4, Duration::from_secs(120));
    assert_eq!(copied.len(), 4, "the copied frames: {copied:?}");
    // Held for six settle intervals (settle_seconds = 0.5) after the others landed:
    // never recorded while held, never as unreadable.
    std::thread::sleep(Duration::from_secs(3));
    assert!(
        !recorded(&s.db)
            .iter()
            .any(|r| r.0.ends_with("kfa_held.fits")),
        "recorded while still being written: {:?}",
        recorded(&s.db)
    );
    f.write_all(&bytes[bytes.len() / 2..]).unwrap();
    drop(f);

    let rows = wait_for(&s.db, 5, Duration::from_secs(120));
    // A while longer: a second record of any frame would show now.
    std::thread::sleep(Duration::from_secs(3));
    let rows_after = recorded(&s.db);
    drop(d);
    assert_eq!(rows.len(), 5, "{rows:?}");
    assert_eq!(rows_after.len(), 5, "each frame once: {rows_after:?}");
    for (path, status, error) in &rows_after {
        assert_eq!(status, "ok", "{path}: {error:?}");
    }
}

/// A one-shot command meets a frame its writer still holds (`measure` here; `night` and
/// `archive` read through the same `Reader::record_once_let_go`): it waits for the writer
/// to let it go and measures the finished frame, rather than calling it unreadable.
/// Windows only: elsewhere nothing tells a one-shot reader that a file is unfinished.
#[cfg(windows)]
#[test]
fn a_one_shot_measure_waits_for_a_frame_its_writer_holds() {
    let dir = tempfile::tempdir().unwrap();
    let held = dir.path().join("kfa_held.fits");
    let bytes = frame_bytes(42, dir.path(), "Light");
    let mut f = open_as_capture(&held);
    f.write_all(&bytes[..bytes.len() / 2]).unwrap();
    f.flush().unwrap();
    let measure = std::process::Command::new(common::binary())
        .args(["measure", "--json"])
        .arg(&held)
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    std::thread::sleep(Duration::from_secs(3));
    f.write_all(&bytes[bytes.len() / 2..]).unwrap();
    drop(f);
    let out = measure.wait_with_output().unwrap();
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(doc["status"], "ok", "{doc}");
    assert!(doc["star_count"].as_u64().unwrap() > 0, "{doc}");
}
