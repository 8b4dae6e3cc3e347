//! Hostile files. A seeded corpus of broken and mutated FITS files (byte flips in header
//! and data, truncations, absurd NAXISn/BITPIX/BSCALE/BZERO/BLANK, every tile-compression
//! keyword set to 0, negative or huge, gzip bombs, cubes, missing and duplicated END)
//! goes through `subwatch measure`, `subwatch night` and a live daemon with good frames
//! mixed in. Required: no crash and no hang of subwatch itself, a clear one-line reason
//! for every file that cannot be measured, every good frame recorded, the daemon's
//! process the same at the end. The corpus is made here, from a fixed seed, so a
//! failure replays.
// Unix only: a crash is told by the signal, peak memory by wait4's rusage, and the daemon
// is stopped by SIGTERM.
#![cfg(unix)]

mod common;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
use subwatch::frame::write::{write_frame, Compression, Encoding};
use subwatch::sim::{render, SimParams};

const SEED: u64 = 20_261_202;
/// The corpus file that makes the bundled cfitsio itself fault.
const HEAP_FAULT: &str = "hcomp-heap-byte-11151.fits";

/// One 80-column card (FITS Standard 4.0, section 4.1): keyword, "= ", value.
fn card(key: &str, value: &str) -> [u8; 80] {
    let text = format!("{key:<8}= {value:>20}");
    let mut c = [b' '; 80];
    c[..text.len().min(80)].copy_from_slice(&text.as_bytes()[..text.len().min(80)]);
    c
}

/// Byte offsets of the cards of the header starting at `start`, up to END (exclusive),
/// and the END card's offset.
fn cards(bytes: &[u8], start: usize) -> (Vec<usize>, Option<usize>) {
    let mut out = Vec::new();
    let mut at = start;
    while at + 80 <= bytes.len() {
        let key = String::from_utf8_lossy(&bytes[at..at + 8])
            .trim_end()
            .to_string();
        if key == "END" {
            return (out, Some(at));
        }
        out.push(at);
        at += 80;
    }
    (out, None)
}

/// `bytes` with `key` in the header at `start` set to `value` (added before END when
/// the header lacks it and the END block has room).
fn set_key(bytes: &[u8], start: usize, key: &str, value: &str) -> Option<Vec<u8>> {
    let mut b = bytes.to_vec();
    let (list, end) = cards(&b, start);
    let found = list
        .iter()
        .find(|&&at| String::from_utf8_lossy(&b[at..at + 8]).trim_end() == key);
    match (found, end) {
        (Some(&at), _) => b[at..at + 80].copy_from_slice(&card(key, value)),
        (None, Some(end)) if (end + 80) % 2880 != 0 => {
            b[end..end + 80].copy_from_slice(&card(key, value));
            b[end + 80..end + 160].copy_from_slice(&format!("{:<80}", "END").into_bytes());
        }
        _ => return None,
    }
    Some(b)
}

/// Where each HDU's header starts (walking by the sizes the headers give).
fn hdu_starts(bytes: &[u8]) -> Vec<usize> {
    let mut starts = vec![0];
    let (list, end) = cards(bytes, 0);
    let Some(end) = end else { return starts };
    let value = |key: &str, list: &[usize]| -> i64 {
        list.iter()
            .find(|&&at| String::from_utf8_lossy(&bytes[at..at + 8]).trim_end() == key)
            .and_then(|&at| {
                String::from_utf8_lossy(&bytes[at + 10..at + 80])
                    .split('/')
                    .next()
                    .and_then(|v| v.trim().parse().ok())
            })
            .unwrap_or(0)
    };
    let naxis = value("NAXIS", &list);
    let mut size: i64 = if naxis == 0 { 0 } else { 1 };
    for n in 1..=naxis {
        size *= value(&format!("NAXIS{n}"), &list);
    }
    size = size * value("BITPIX", &list).abs() / 8 + value("PCOUNT", &list);
    let data = (end / 2880 + 1) * 2880;
    let next = data + (size as usize).div_ceil(2880) * 2880;
    if next + 80 <= bytes.len() && bytes[next..].starts_with(b"XTENSION") {
        starts.push(next);
    }
    starts
}

fn gzip(bytes: &[u8]) -> Vec<u8> {
    let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
    e.write_all(bytes).unwrap();
    e.finish().unwrap()
}

/// A small frame with stars, as a camera writes it (or compressed, or as float).
fn base(dir: &Path, name: &str, encoding: Encoding, seed: u64) -> Vec<u8> {
    let params = SimParams {
        width: 160,
        height: 120,
        star_count: 40,
        seed,
        ..Default::default()
    };
    let (pixels, keys, _) = render(&params);
    let path = dir.join(format!("base-{name}.fits"));
    let _ = std::fs::remove_file(&path);
    write_frame(&path, &pixels, encoding, &keys).unwrap();
    let b = std::fs::read(&path).unwrap();
    std::fs::remove_file(&path).unwrap();
    b
}

/// A plain header and data of zeros, for shapes no writer would make.
fn raw_image(lines: &[(&str, &str)], data_bytes: usize) -> Vec<u8> {
    let mut b = Vec::new();
    for (k, v) in lines {
        b.extend_from_slice(&card(k, v));
    }
    b.extend(format!("{:<80}", "END").into_bytes());
    b.resize(b.len().div_ceil(2880) * 2880, b' ');
    b.resize(b.len() + data_bytes.div_ceil(2880) * 2880, 0);
    b
}

/// The corpus: (file name, bytes). Hostile files only; good frames are added by tests.
fn corpus(scratch: &Path) -> Vec<(String, Vec<u8>)> {
    let mut rng = rand::rngs::StdRng::seed_from_u64(SEED);
    let bases: Vec<(&str, Vec<u8>)> = vec![
        ("u16", base(scratch, "u16", Encoding::Unsigned16, 1)),
        ("f32", base(scratch, "f32", Encoding::Float32, 2)),
        (
            "rice",
            base(scratch, "rice", Encoding::Compressed(Compression::Rice), 3),
        ),
        (
            "gzip1",
            base(scratch, "gzip1", Encoding::Compressed(Compression::Gzip), 4),
        ),
        (
            "hcomp",
            base(
                scratch,
                "hcomp",
                Encoding::Compressed(Compression::Hcompress),
                5,
            ),
        ),
        (
            "plio",
            base(scratch, "plio", Encoding::Compressed(Compression::Plio), 6),
        ),
    ];
    let mut out: Vec<(String, Vec<u8>)> = Vec::new();
    for (name, b) in &bases {
        let starts = hdu_starts(b);
        let last = *starts.last().unwrap();
        let (_, end) = cards(b, last);
        let header_end = end.unwrap() + 80;
        // Byte flips in the header and in the data.
        for k in 0..6 {
            let mut h = b.clone();
            for _ in 0..8 {
                let at = rng.gen_range(last..header_end);
                h[at] = rng.gen();
            }
            out.push((format!("{name}-header-flip-{k}.fits"), h));
            let mut d = b.clone();
            let data_start = header_end.div_ceil(2880) * 2880;
            for _ in 0..64 {
                let at = rng.gen_range(data_start..d.len());
                d[at] ^= 1 << rng.gen_range(0..8);
            }
            out.push((format!("{name}-data-flip-{k}.fits"), d));
        }
        // Truncations, on and off block boundaries.
        for k in 0..5 {
            let len = if k == 0 {
                2880
            } else {
                rng.gen_range(1..b.len())
            };
            out.push((format!("{name}-cut-{k}.fits"), b[..len].to_vec()));
        }
        // Wrapped in gzip, whole and cut.
        let gz = gzip(b);
        out.push((format!("{name}-wrapped.fits.gz"), gz.clone()));
        out.push((
            format!("{name}-wrapped-cut.fits.gz"),
            gz[..gz.len() / 2].to_vec(),
        ));
        // Missing and duplicated END.
        let mut no_end = b.clone();
        no_end[end.unwrap()..end.unwrap() + 3].copy_from_slice(b"   ");
        out.push((format!("{name}-no-end.fits"), no_end));
        let (list, _) = cards(b, last);
        let mut early_end = b.clone();
        let at = list[list.len() / 2];
        early_end[at..at + 80].copy_from_slice(&format!("{:<80}", "END").into_bytes());
        out.push((format!("{name}-early-end.fits"), early_end));
    }
    // Absurd structure and scaling keywords on the plain images.
    let absurd: [(&str, &[&str]); 6] = [
        (
            "NAXIS1",
            &["0", "-1", "2147483648", "4611686018427387904", "'abc'"],
        ),
        ("NAXIS2", &["0", "-1", "2147483648", "4611686018427387904"]),
        ("BITPIX", &["7", "0", "-16", "99999", "'x'"]),
        ("BSCALE", &["0", "1E300", "'NaN'", "'x'"]),
        ("BZERO", &["1E308", "-1E308", "'x'"]),
        ("NAXIS", &["3", "999", "-1", "1", "0"]),
    ];
    for (name, b) in &bases[..2] {
        for (key, values) in absurd {
            for (k, v) in values.iter().enumerate() {
                if let Some(m) = set_key(b, 0, key, v) {
                    out.push((format!("{name}-{key}-{k}.fits"), m));
                }
            }
        }
        for (k, v) in ["1E20", "-1", "'x'"].iter().enumerate() {
            if let Some(m) = set_key(b, 0, "BLANK", v) {
                out.push((format!("{name}-BLANK-{k}.fits"), m));
            }
        }
    }
    // Every tile-compression keyword set to 0, negative and huge.
    let compression_keys = [
        "ZNAXIS", "ZNAXIS1", "ZNAXIS2", "ZTILE1", "ZTILE2", "ZBITPIX", "ZVAL1", "ZVAL2", "NAXIS1",
        "NAXIS2", "PCOUNT", "TFIELDS", "ZDITHER0", "THEAP", "ZCMPTYPE",
    ];
    for (name, b) in &bases[2..] {
        let table = hdu_starts(b)[1];
        for key in compression_keys {
            for (k, v) in ["0", "-1", "1099511627776"].iter().enumerate() {
                if let Some(m) = set_key(b, table, key, v) {
                    out.push((format!("{name}-{key}-{k}.fits"), m));
                }
            }
        }
        // A tile size missing with an empty axis (the default tile is the axis itself).
        let cut = set_key(b, table, "ZNAXIS1", "0").unwrap();
        let mut no_tile = cut.clone();
        let (list, _) = cards(&cut, table);
        if let Some(&at) = list
            .iter()
            .find(|&&at| cut[at..at + 8].starts_with(b"ZTILE1"))
        {
            no_tile[at..at + 80].copy_from_slice(&card("COMMENT", "'gone'"));
        }
        out.push((format!("{name}-znaxis1-0-no-ztile.fits"), no_tile));
    }
    // One byte of an HCOMPRESS tile's stream set to 0xFF: found by a seeded search, it
    // corrupts the heap inside cfitsio's decompressor (glibc aborts: "double free or
    // corruption"). Nothing in the keywords is wrong, so only the worker process can
    // contain it.
    let mut heap_fault = bases[4].1.clone();
    heap_fault[11_151] = 0xFF;
    out.push((HEAP_FAULT.into(), heap_fault));
    // Cubes and shapes no camera writes.
    out.push((
        "cube-3-planes.fits".into(),
        raw_image(
            &[
                ("SIMPLE", "T"),
                ("BITPIX", "16"),
                ("NAXIS", "3"),
                ("NAXIS1", "40"),
                ("NAXIS2", "30"),
                ("NAXIS3", "3"),
            ],
            40 * 30 * 3 * 2,
        ),
    ));
    out.push((
        "cube-4-axes.fits".into(),
        raw_image(
            &[
                ("SIMPLE", "T"),
                ("BITPIX", "16"),
                ("NAXIS", "4"),
                ("NAXIS1", "40"),
                ("NAXIS2", "30"),
                ("NAXIS3", "1"),
                ("NAXIS4", "2"),
            ],
            40 * 30 * 2 * 2,
        ),
    ));
    out.push((
        "huge-promise.fits".into(),
        raw_image(
            &[
                ("SIMPLE", "T"),
                ("BITPIX", "-64"),
                ("NAXIS", "2"),
                ("NAXIS1", "100000"),
                ("NAXIS2", "100000"),
            ],
            0,
        ),
    ));
    // Not FITS at all, or FITS only at first sight.
    out.push(("empty.fits".into(), Vec::new()));
    out.push((
        "text.fits".into(),
        b"observing log, not an image\n".to_vec(),
    ));
    let noise: Vec<u8> = (0..10_000).map(|_| rng.gen()).collect();
    out.push(("noise.fits".into(), noise.clone()));
    let mut fake = b"SIMPLE  =                    T".to_vec();
    fake.extend(&noise);
    out.push(("simple-then-noise.fits".into(), fake));
    out.push(("gzip-of-text.fits.gz".into(), gzip(b"not an image at all")));
    let mut damaged = gzip(&bases[0].1);
    let mid = damaged.len() / 2;
    damaged[mid..mid + 64].fill(0xAA);
    out.push(("gzip-damaged.fits.gz".into(), damaged));
    out
}

/// Run a command with a time bound; a hang is a failure. Returns (stdout, exit code).
fn run_bounded(cmd: &mut Command, bound: Duration) -> (String, Option<i32>) {
    let mut child = cmd
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("start subwatch");
    let mut stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut s = String::new();
        let _ = std::io::Read::read_to_string(&mut stdout, &mut s);
        s
    });
    let start = Instant::now();
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if start.elapsed() > bound {
            let _ = child.kill();
            panic!("subwatch hung for more than {bound:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    use std::os::unix::process::ExitStatusExt;
    assert_eq!(status.signal(), None, "subwatch itself died by a signal");
    (reader.join().unwrap(), status.code())
}

fn write_corpus(dir: &Path) -> Vec<PathBuf> {
    let scratch = dir.join(".scratch");
    std::fs::create_dir_all(&scratch).unwrap();
    let files = corpus(&scratch);
    std::fs::remove_dir_all(&scratch).unwrap();
    files
        .into_iter()
        .map(|(name, bytes)| {
            let p = dir.join(name);
            std::fs::write(&p, bytes).unwrap();
            p
        })
        .collect()
}

#[test]
fn the_corpus_through_measure_and_night_never_stops_them() {
    let dir = tempfile::tempdir().unwrap();
    let files = write_corpus(dir.path());
    let good: Vec<PathBuf> = (0..3)
        .map(|k| {
            let p = dir.path().join(format!("good-{k}.fits"));
            std::fs::write(
                &p,
                base(dir.path(), &format!("g{k}"), Encoding::Unsigned16, 100 + k),
            )
            .unwrap();
            p
        })
        .collect();
    let mut all: Vec<PathBuf> = files.clone();
    all.extend(good.iter().cloned());
    let start = Instant::now();
    let (out, code) = run_bounded(
        Command::new(common::binary())
            .arg("measure")
            .arg("--json")
            .args(&all),
        Duration::from_secs(600),
    );
    let seconds = start.elapsed().as_secs_f64();
    assert_eq!(code, Some(1), "some files failed, so the exit code is 1");
    let records: Vec<serde_json::Value> = out
        .lines()
        .map(|l| serde_json::from_str(l).expect("one JSON object per line"))
        .collect();
    assert_eq!(records.len(), all.len(), "one line per file, in order");
    let mut errors = 0;
    let mut reader_crashes = Vec::new();
    for (path, rec) in all.iter().zip(&records) {
        assert_eq!(rec["path"], path.display().to_string());
        if rec["status"] == "error" {
            errors += 1;
            let msg = rec["error"].as_str().expect("a reason");
            assert!(!msg.is_empty() && !msg.contains('\n'), "{msg:?}");
            if msg.contains("reader crashed") || msg.contains("reader was killed") {
                reader_crashes.push(format!("{}: {msg}", path.display()));
            }
        }
    }
    // The file that faults inside cfitsio cost that file and nothing else.
    let fault = &records[all.iter().position(|p| p.ends_with(HEAP_FAULT)).unwrap()];
    assert!(
        fault["error"]
            .as_str()
            .unwrap()
            .contains("the FITS reader crashed on this file (signal"),
        "{fault}"
    );
    for g in &good {
        let rec = &records[all.iter().position(|p| p == g).unwrap()];
        assert_eq!(rec["status"], "ok", "{rec}");
        assert!(rec["star_count"].as_u64().unwrap() > 5, "{rec}");
    }
    println!(
        "measure: {} files ({} hostile), {errors} refused with a reason, {} measured, 0 crashes of subwatch, {} crash(es) of the reader contained, {seconds:.1} s",
        all.len(),
        files.len(),
        all.len() - errors,
        reader_crashes.len()
    );
    for c in &reader_crashes {
        println!("  contained: {c}");
    }
    // The same folder as a night.
    let (out, code) = run_bounded(
        Command::new(common::binary())
            .arg("night")
            .arg(dir.path())
            .arg("--json"),
        Duration::from_secs(600),
    );
    assert_eq!(code, Some(0), "night exits 0 even with unreadable frames");
    let doc: serde_json::Value = serde_json::from_str(&out).expect("one JSON document");
    assert_eq!(doc["frames"].as_array().unwrap().len(), all.len());
}

/// Peak resident memory (KiB) of a command and everything it waited for, and its exit.
/// The child is reaped by `wait4` here, which also reports its resource use.
#[allow(clippy::zombie_processes)]
fn peak_kib(cmd: &mut Command) -> (i64, i32) {
    let child = cmd
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut status = 0;
    // SAFETY: an all-zero rusage is a valid value to be overwritten.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: waiting for our own child with valid out-pointers.
    let pid = unsafe { libc::wait4(child.id() as i32, &mut status, 0, &mut usage) };
    assert_eq!(pid, child.id() as i32);
    assert!(libc::WIFEXITED(status), "subwatch died by a signal");
    (usage.ru_maxrss, libc::WEXITSTATUS(status))
}

#[test]
fn gzip_bombs_are_stopped_at_the_size_the_header_promises() {
    let dir = tempfile::tempdir().unwrap();
    // A 64 x 64 image followed by 1 GiB of zeros: inflating it whole took a gigabyte.
    let header = raw_image(
        &[
            ("SIMPLE", "T"),
            ("BITPIX", "16"),
            ("NAXIS", "2"),
            ("NAXIS1", "64"),
            ("NAXIS2", "64"),
        ],
        64 * 64 * 2,
    );
    let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
    e.write_all(&header).unwrap();
    let zeros = vec![0u8; 1 << 24];
    for _ in 0..64 {
        e.write_all(&zeros).unwrap();
    }
    let trailing = dir.path().join("trailing-gigabyte.fits.gz");
    std::fs::write(&trailing, e.finish().unwrap()).unwrap();
    // A header that promises 30000 x 30000 doubles (7.2 GB), then zeros.
    let header = raw_image(
        &[
            ("SIMPLE", "T"),
            ("BITPIX", "-64"),
            ("NAXIS", "2"),
            ("NAXIS1", "30000"),
            ("NAXIS2", "30000"),
        ],
        0,
    );
    let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
    e.write_all(&header).unwrap();
    for _ in 0..64 {
        e.write_all(&zeros).unwrap();
    }
    let promise = dir.path().join("promises-too-much.fits.gz");
    std::fs::write(&promise, e.finish().unwrap()).unwrap();
    for (path, status) in [(&trailing, 0), (&promise, 1)] {
        let size = std::fs::metadata(path).unwrap().len();
        let (kib, code) = peak_kib(
            Command::new(common::binary())
                .args(["measure", "--json"])
                .arg(path),
        );
        println!(
            "{}: {} KB on disk, peak resident memory {:.1} MiB, exit {code}",
            path.file_name().unwrap().to_string_lossy(),
            size / 1000,
            kib as f64 / 1024.0
        );
        assert_eq!(code, status);
        assert!(kib < 100 * 1024, "peak {kib} KiB");
    }
}

/// The daemon with the corpus and good frames dropped in together.
#[test]
fn a_live_daemon_survives_the_corpus_and_records_every_good_frame() {
    let dir = tempfile::tempdir().unwrap();
    let root = subwatch::os::canonical(dir.path()).unwrap();
    let capture = root.join("capture");
    let hostile = capture.join("hostile");
    std::fs::create_dir_all(&hostile).unwrap();
    let db = root.join("s.db");
    let config = root.join("subwatch.toml");
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = [\"{}\"]\nsettle_seconds = 0.3\nrescan_seconds = 2\n[store]\npath = \"{}\"\n[measure]\nreader_timeout_seconds = 30\n",
            capture.display(),
            db.display()
        ),
    )
    .unwrap();
    let mut daemon = Command::new(common::binary())
        .args(["watch", "--config"])
        .arg(&config)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let pid = daemon.id();
    // Good frames first, then the corpus, then good frames again.
    let good = |k: u64| {
        let p = capture.join(format!("good-{k:02}.fits"));
        std::fs::write(
            &p,
            base(&root, &format!("g{k}"), Encoding::Unsigned16, 200 + k),
        )
        .unwrap();
    };
    for k in 0..5 {
        good(k);
    }
    let files = write_corpus(&hostile);
    for k in 5..10 {
        good(k);
    }
    let total = files.len() + 10;
    let start = Instant::now();
    let rows = loop {
        let rows: Vec<(String, String)> = rusqlite::Connection::open(&db)
            .ok()
            .and_then(|c| {
                let mut st = c.prepare("SELECT path, status FROM frames").ok()?;
                let rows = st
                    .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
                    .ok()?
                    .filter_map(Result::ok)
                    .collect();
                Some(rows)
            })
            .unwrap_or_default();
        assert!(daemon.try_wait().unwrap().is_none(), "the daemon stopped");
        if rows.len() >= total || start.elapsed() > Duration::from_secs(300) {
            break rows;
        }
        std::thread::sleep(Duration::from_millis(200));
    };
    let seconds = start.elapsed().as_secs_f64();
    assert!(daemon.try_wait().unwrap().is_none(), "the daemon stopped");
    assert_eq!(daemon.id(), pid);
    assert_eq!(rows.len(), total, "every file recorded, each once");
    let good_ok = rows
        .iter()
        .filter(|(p, s)| p.contains("/good-") && s == "ok")
        .count();
    assert_eq!(good_ok, 10, "every good frame recorded and measured");
    println!(
        "daemon: {} hostile files and 10 good frames recorded in {seconds:.0} s; good frames ok: {good_ok}; process {pid} still running",
        files.len()
    );
    // SAFETY: signalling our own child.
    unsafe { libc::kill(pid as i32, libc::SIGTERM) };
    let status = daemon.wait().unwrap();
    assert!(status.success(), "{status:?}");
}
