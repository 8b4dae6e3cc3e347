//! The daemon as a user runs it, for the integration tests: a real process on real
//! folders with a real SQLite file.

use std::io::Read;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use subwatch::frame::cards::OutValue;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::{render, SimParams};

pub struct Daemon {
    pub child: Child,
}

/// `subwatch watch` started as its own process group on Windows, so that a Ctrl-Break
/// sent to that group reaches it alone.
fn daemon_command() -> Command {
    let mut cmd = Command::new(super::binary());
    #[cfg(windows)]
    {
        use std::os::windows::process::CommandExt;
        // CREATE_NEW_PROCESS_GROUP (Microsoft, "Process Creation Flags").
        cmd.creation_flags(0x0000_0200);
    }
    cmd.args(["watch", "--config"]);
    cmd
}

/// Ask a daemon to stop as its system does: SIGTERM on Unix, Ctrl-Break to its process
/// group on Windows (the requests the daemon listens for, `os::StopRequests`).
fn ask_to_stop(child: &Child) {
    // SAFETY: signalling our own child.
    #[cfg(unix)]
    unsafe {
        libc::kill(child.id() as i32, libc::SIGTERM);
    }
    // SAFETY: a control event for the process group our child leads (its id).
    #[cfg(windows)]
    unsafe {
        use windows_sys::Win32::System::Console::{GenerateConsoleCtrlEvent, CTRL_BREAK_EVENT};
        GenerateConsoleCtrlEvent(CTRL_BREAK_EVENT, child.id());
    }
}

impl Daemon {
    pub fn start(config: &Path) -> Daemon {
        let child = daemon_command()
            .arg(config)
            .env("SUBWATCH_LOG", "info")
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start daemon");
        Daemon { child }
    }

    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    pub fn kill9(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// SIGTERM (Ctrl-Break on Windows), then the exit status.
    pub fn terminate(mut self) -> std::process::ExitStatus {
        ask_to_stop(&self.child);
        self.child.wait().expect("wait")
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A daemon started as a user starts it (no SUBWATCH_LOG), its log collected.
pub struct Logged {
    pub child: Child,
    log: Arc<Mutex<String>>,
}

impl Logged {
    pub fn start(config: &Path) -> Logged {
        let mut child = daemon_command()
            .arg(config)
            .env_remove("SUBWATCH_LOG")
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .expect("start daemon");
        let mut err = child.stderr.take().unwrap();
        let log = Arc::new(Mutex::new(String::new()));
        let sink = log.clone();
        std::thread::spawn(move || {
            let mut buf = [0u8; 4096];
            while let Ok(n) = err.read(&mut buf) {
                if n == 0 {
                    break;
                }
                sink.lock()
                    .unwrap()
                    .push_str(&String::from_utf8_lossy(&buf[..n]));
            }
        });
        Logged { child, log }
    }

    pub fn log(&self) -> String {
        self.log.lock().unwrap().clone()
    }

    pub fn wait_log(&self, words: &str, limit: Duration) -> bool {
        let start = Instant::now();
        while start.elapsed() < limit {
            if self.log().contains(words) {
                return true;
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        false
    }

    /// SIGTERM, then the whole log.
    pub fn stop(mut self) -> String {
        ask_to_stop(&self.child);
        let _ = self.child.wait();
        std::thread::sleep(Duration::from_millis(200));
        self.log()
    }
}

impl Drop for Logged {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

pub struct Site {
    pub _dir: tempfile::TempDir,
    pub root: PathBuf,
    pub capture: PathBuf,
    pub config: PathBuf,
    pub db: PathBuf,
}

pub fn site(extra_watch: &str) -> Site {
    let dir = tempfile::tempdir().unwrap();
    let root = subwatch::os::canonical(dir.path()).unwrap();
    let capture = root.join("capture");
    std::fs::create_dir_all(&capture).unwrap();
    let config = root.join("subwatch.toml");
    let db = root.join("subwatch.db");
    // Literal strings: a Windows path's backslashes are not escapes.
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = ['{}']\nsettle_seconds = 0.5\nrescan_seconds = 2\n{extra_watch}\n[store]\npath = '{}'\n[site]\ntimezone = \"UTC\"\n",
            capture.display(),
            db.display()
        ),
    )
    .unwrap();
    Site {
        _dir: dir,
        root,
        capture,
        config,
        db,
    }
}

/// A small rendered frame as FITS bytes (written to a scratch file and read back).
pub fn frame_bytes(seed: u64, scratch: &Path, image_type: &str) -> Vec<u8> {
    let params = SimParams {
        width: 160,
        height: 120,
        star_count: 25,
        seed,
        ..Default::default()
    };
    let (pixels, mut keys, _) = render(&params);
    for (k, v) in keys.iter_mut() {
        if k == "IMAGETYP" {
            *v = OutValue::Text(image_type.into());
        }
    }
    let path = scratch.join(format!("scratch-{seed}-{image_type}.fits"));
    let _ = std::fs::remove_file(&path);
    write_frame(&path, &pixels, Encoding::Unsigned16, &keys).unwrap();
    let bytes = std::fs::read(&path).unwrap();
    std::fs::remove_file(&path).unwrap();
    bytes
}

/// (path, status, error) for every recorded frame.
pub fn recorded(db: &Path) -> Vec<(String, String, Option<String>)> {
    let Ok(conn) =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
    else {
        return Vec::new();
    };
    let Ok(mut st) = conn.prepare("SELECT path, status, error FROM frames ORDER BY path") else {
        return Vec::new();
    };
    st.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .map(|rows| rows.filter_map(Result::ok).collect())
        .unwrap_or_default()
}

pub fn wait_for(db: &Path, count: usize, limit: Duration) -> Vec<(String, String, Option<String>)> {
    let start = Instant::now();
    loop {
        let rows = recorded(db);
        if rows.len() >= count || start.elapsed() > limit {
            return rows;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// Write rendered frames into the capture folder one at a time, as a camera delivers
/// them, each once the previous ones are judged (so each verdict sees the night so far).
pub fn feed_one_by_one(
    s: &Site,
    conn: &rusqlite::Connection,
    frames: &[subwatch::sim::night::NightFrame],
) {
    for (k, f) in frames.iter().enumerate() {
        write_frame(
            &s.capture.join(&f.name),
            &f.pixels,
            Encoding::Unsigned16,
            &f.keys,
        )
        .unwrap();
        let start = Instant::now();
        while start.elapsed() < Duration::from_secs(20) {
            let judged: i64 = conn
                .query_row(
                    "SELECT COUNT(*) FROM frames WHERE verdict IS NOT NULL",
                    [],
                    |r| r.get(0),
                )
                .unwrap_or(0);
            if judged as usize > k {
                break;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    }
}
