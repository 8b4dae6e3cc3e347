//! Importing a large catalogue: a generated CSV of `SUBWATCH_BENCH_ROWS` rows (10 million
//! by default, about 400 MB) indexed by `subwatch catalogue import` in a child process,
//! whose wall time and peak resident memory (getrusage's ru_maxrss of the child) are
//! printed with the file's size. Memory must not grow with the file: the run also
//! imports a tenth of the rows and prints both peaks, so their ratio is read from one
//! run. `cargo bench --bench catalogue_import`.

// The bench runs on Unix only (wait4); elsewhere its main says so.
#[cfg(unix)]
use std::{io::Write, path::Path, time::Instant};

/// A deterministic pseudo-random sequence in [0, 1) (SplitMix64).
#[cfg(unix)]
fn uniform(state: &mut u64) -> f64 {
    *state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
}

/// Stars uniform on the sphere, with ids and one magnitude each.
#[cfg(unix)]
fn write_catalogue(path: &Path, rows: u64) -> u64 {
    let mut out = std::io::BufWriter::new(std::fs::File::create(path).expect("create"));
    writeln!(out, "id,ra_deg,dec_deg,mag").unwrap();
    let mut state = 7u64;
    for k in 0..rows {
        let ra = uniform(&mut state) * 360.0;
        let dec = (2.0 * uniform(&mut state) - 1.0).asin().to_degrees();
        let mag = 8.0 + 12.0 * uniform(&mut state);
        writeln!(out, "KR{k},{ra:.7},{dec:.7},{mag:.3}").unwrap();
    }
    out.flush().unwrap();
    std::fs::metadata(path).unwrap().len()
}

// The child is reaped by wait4, which clippy does not see.
#[cfg(unix)]
#[allow(clippy::zombie_processes)]
fn run_import(config: &Path) -> (f64, u64) {
    let started = Instant::now();
    let child = std::process::Command::new(env!("CARGO_BIN_EXE_subwatch"))
        .args(["catalogue", "import", "--force", "--config"])
        .arg(config)
        .spawn()
        .expect("run subwatch");
    let mut status = 0;
    // SAFETY: an rusage owned here, for a child of this process.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let pid = unsafe { libc::wait4(child.id() as i32, &mut status, 0, &mut usage) };
    assert_eq!(pid, child.id() as i32);
    assert!(
        libc::WIFEXITED(status) && libc::WEXITSTATUS(status) == 0,
        "import failed"
    );
    // Linux reports ru_maxrss in KiB (getrusage(2)).
    (
        started.elapsed().as_secs_f64(),
        usage.ru_maxrss as u64 * 1024,
    )
}

#[cfg(unix)]
fn main() {
    let rows: u64 = std::env::var("SUBWATCH_BENCH_ROWS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10_000_000);
    let dir =
        tempfile::tempdir_in(std::env::var_os("SUBWATCH_BENCH_DIR").unwrap_or_else(|| ".".into()))
            .expect("temp dir");
    let mut peaks = Vec::new();
    for n in [rows / 10, rows] {
        let csv = dir.path().join(format!("stars-{n}.csv"));
        let t = Instant::now();
        let bytes = write_catalogue(&csv, n);
        let written = t.elapsed().as_secs_f64();
        let config = dir.path().join("subwatch.toml");
        std::fs::write(
            &config,
            format!(
                "[watch]\nfolders = [\"{d}\"]\n[store]\npath = \"{d}/store.sqlite\"\n[catalogue]\nfiles = [\"{}\"]\nindex = \"{d}/index-{n}.sqlite\"\n",
                csv.display(),
                d = dir.path().display()
            ),
        )
        .unwrap();
        let (seconds, peak) = run_import(&config);
        let index = std::fs::metadata(dir.path().join(format!("index-{n}.sqlite")))
            .map(|m| m.len())
            .unwrap_or(0);
        println!(
            "import of {n} rows ({:.0} MB of CSV, written in {written:.1} s): {seconds:.1} s, {:.0} rows/s, peak memory {:.0} MiB ({:.2} x the file), index {:.0} MB",
            bytes as f64 / 1e6,
            n as f64 / seconds,
            peak as f64 / (1 << 20) as f64,
            peak as f64 / bytes as f64,
            index as f64 / 1e6
        );
        peaks.push(peak);
        std::fs::remove_file(&csv).ok();
    }
    println!(
        "peak memory, {rows} rows against {}: {:.2} x (bounded memory reads 1)",
        rows / 10,
        peaks[1] as f64 / peaks[0] as f64
    );
}

#[cfg(not(unix))]
fn main() {
    eprintln!("catalogue_import bench: peak memory is read with wait4, on Unix only");
}
