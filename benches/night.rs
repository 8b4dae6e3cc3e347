//! The night's incremental cost: a long rendered night (300 frames) goes frame by frame
//! through the daemon's path (measure, record, live verdict with registration against the
//! night's reference); the live step is timed at frame 10 and frame 300. Then the whole
//! night's analysis from the store (what `subwatch report` does) is timed, with the
//! process's peak memory. `cargo bench --bench night`.

use std::time::Instant;

use subwatch::frame::write::{write_frame, Encoding};
use subwatch::pipeline::record_file;
use subwatch::sim::night::{render_night, NightPlan};
use subwatch::store::Store;

fn main() {
    let frames_total = 300;
    let dir = tempfile::tempdir().expect("temp dir");
    let mut plan = NightPlan::full(21);
    plan.frames = frames_total;
    plan.width = 512;
    plan.height = 512;
    plan.star_count = 180;
    plan.cadence_s = 60.0;
    plan.flip_at = Some(150);
    plan.cloud_frames = vec![40, 41];
    plan.trail_frames = vec![100];
    plan.focus_drift_from = Some(280);
    let t = Instant::now();
    let (frames, _) = render_night(&plan);
    println!(
        "rendered {frames_total} frames of 512x512 in {:.1} s",
        t.elapsed().as_secs_f64()
    );
    let mut store = Store::open(&dir.path().join("night.db")).expect("store");
    let config = subwatch::config::Config::default();
    let options = subwatch::pipeline::RecordOptions::from_config(&config);
    let mut live_ms = Vec::new();
    let mut measure_ms = Vec::new();
    for (i, f) in frames.iter().enumerate() {
        let path = dir.path().join(&f.name);
        write_frame(&path, &f.pixels, Encoding::Unsigned16, &f.keys).expect("write");
        let identity = subwatch::walk::identity(&path).expect("identity");
        let t = Instant::now();
        let record = record_file(&path, identity, f.time_unix, &options);
        measure_ms.push(t.elapsed().as_secs_f64() * 1e3);
        let t = Instant::now();
        let id = store
            .record_frame(&record, 0.0)
            .expect("record")
            .id()
            .expect("new");
        subwatch::watch::judge_in_store(&store, &record, id, &Default::default()).expect("judge");
        live_ms.push(t.elapsed().as_secs_f64() * 1e3);
        let _ = i;
    }
    let around = |v: &[f64], k: usize| {
        let lo = k.saturating_sub(3);
        let mut w: Vec<f64> = v[lo..(k + 3).min(v.len())].to_vec();
        w.sort_by(f64::total_cmp);
        w[w.len() / 2]
    };
    println!(
        "per frame, record + live verdict: {:.2} ms at frame 10, {:.2} ms at frame 300 (median of neighbours)",
        around(&live_ms, 9),
        around(&live_ms, frames_total - 1)
    );
    println!(
        "per frame, decode + measure: {:.1} ms at frame 10, {:.1} ms at frame 300",
        around(&measure_ms, 9),
        around(&measure_ms, frames_total - 1)
    );
    drop(frames);
    drop(store);
    // The whole-night analysis as `subwatch report` runs it, in its own process so its
    // peak memory is its own.
    let config = dir.path().join("bench.toml");
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = [\"{}\"]\n[store]\npath = \"night.db\"\n",
            dir.path().display()
        ),
    )
    .expect("config");
    let t = Instant::now();
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_subwatch"))
        .args(["report", "--json", "--night", "2026-03-14", "--config"])
        .arg(&config)
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("report");
    // The child's own high-water mark (VmHWM belongs to its address space after exec;
    // the rusage figure would also count this large parent at the moment of the fork).
    let status_path = format!("/proc/{}/status", child.id());
    let mut stdout = child.stdout.take().expect("stdout");
    let reader = std::thread::spawn(move || {
        let mut buf = Vec::new();
        std::io::Read::read_to_end(&mut stdout, &mut buf).map(|_| buf)
    });
    let mut peak_kib = 0.0f64;
    while child.try_wait().expect("wait").is_none() {
        if let Some(v) = std::fs::read_to_string(&status_path).ok().and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1)?.parse::<f64>().ok())
        }) {
            peak_kib = peak_kib.max(v);
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    let elapsed = t.elapsed().as_secs_f64();
    let out = reader.join().expect("reader").expect("read");
    let doc: serde_json::Value = serde_json::from_slice(&out).expect("json");
    let usage_mib = peak_kib / 1024.0;
    println!(
        "whole-night analysis from the store (subwatch report): {} frames, {} anomalies in {:.2} s, peak resident memory {:.0} MiB",
        doc["frames"].as_array().map_or(0, |f| f.len()),
        doc["anomalies"].as_array().map_or(0, |a| a.len()),
        elapsed,
        usage_mib
    );
}
