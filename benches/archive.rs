//! The archive's throughput: nights of 2048×2048 16-bit frames (500 by default, 5 nights of
//! 100, each a rendered night of the scenario with its events) measured by `subwatch
//! measure` one by one, then archived into a new store by `subwatch archive` with one
//! reader process at a time (the same reading, plus the store and the night analysis)
//! and with one per core. The archive's own account says where its time went (the store,
//! the nights judged). `cargo bench --bench archive [-- FRAMES]`.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Instant;

use subwatch::frame::cards::OutValue;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::night::{render_night, NightPlan};

const NIGHTS: usize = 5;

/// The same DATE-OBS `days` later.
fn later(keys: &[(String, OutValue)], days: i64) -> Vec<(String, OutValue)> {
    keys.iter()
        .map(|(k, v)| match (k.as_str(), v) {
            ("DATE-OBS", OutValue::Text(t)) => {
                let d = chrono::NaiveDateTime::parse_from_str(t, "%Y-%m-%dT%H:%M:%S")
                    .expect("the renderer's DATE-OBS")
                    + chrono::Duration::days(days);
                (
                    k.clone(),
                    OutValue::Text(d.format("%Y-%m-%dT%H:%M:%S").to_string()),
                )
            }
            _ => (k.clone(), v.clone()),
        })
        .collect()
}

fn run(what: &str, cmd: &mut Command) -> (f64, String) {
    let t = Instant::now();
    let out = cmd.stderr(Stdio::inherit()).output().expect(what);
    assert!(out.status.success(), "{what} failed");
    (
        t.elapsed().as_secs_f64(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
    )
}

fn archive(
    bin: &str,
    root: &Path,
    dir: &Path,
    name: &str,
    workers: usize,
) -> (f64, serde_json::Value) {
    let config = dir.join(format!("{name}.toml"));
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = [\"{}\"]\n[store]\npath = \"{}\"\n",
            root.display(),
            dir.join(format!("{name}.db")).display()
        ),
    )
    .expect("config");
    let (s, out) = run(
        "archive",
        Command::new(bin)
            .arg("archive")
            .arg(root)
            .arg("--config")
            .arg(&config)
            .args(["--json", "--workers", &workers.to_string()]),
    );
    (s, serde_json::from_str(&out).expect("the archive's JSON"))
}

fn main() {
    let total: usize = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .and_then(|a| a.parse().ok())
        .unwrap_or(500);
    let per_night = total.div_ceil(NIGHTS);
    let bin = env!("CARGO_BIN_EXE_subwatch");
    let dir = tempfile::tempdir().expect("temp dir");
    let root = dir.path().join("archive");
    let mut plan = NightPlan::full(61);
    plan.frames = per_night;
    plan.width = 2048;
    plan.height = 2048;
    plan.star_count = 1200;
    plan.start = "2026-01-10T19:30:00".into();
    plan.flip_at = Some(per_night / 2);
    plan.cloud_frames = vec![per_night / 3, per_night / 3 + 1];
    plan.trail_frames = vec![per_night / 4];
    plan.focus_drift_from = Some(per_night - per_night / 10);
    let t = Instant::now();
    let (frames, _) = render_night(&plan);
    let mut files: Vec<PathBuf> = Vec::new();
    for n in 0..NIGHTS {
        let folder = root.join(format!("night {}", n + 1));
        std::fs::create_dir_all(&folder).expect("folder");
        for f in &frames {
            let path = folder.join(&f.name);
            write_frame(
                &path,
                &f.pixels,
                Encoding::Unsigned16,
                &later(&f.keys, n as i64),
            )
            .expect("write");
            files.push(path);
        }
    }
    drop(frames);
    let bytes: u64 = files
        .iter()
        .filter_map(|f| std::fs::metadata(f).ok())
        .map(|m| m.len())
        .sum();
    println!(
        "{} frames of 2048x2048 ({NIGHTS} nights, {:.1} GB) rendered and written in {:.0} s",
        files.len(),
        bytes as f64 / 1e9,
        t.elapsed().as_secs_f64()
    );

    // Every file read once, so that no pass is the one that reads them from the disk.
    for f in &files {
        let _ = std::fs::read(f);
    }
    let measure = || {
        run(
            "measure",
            Command::new(bin).args(["measure", "--json"]).args(&files),
        )
        .0
    };
    let n = files.len() as f64;
    let measure_s = measure();
    println!(
        "measure, one by one:           {measure_s:7.1} s, {:.2} frames/s",
        n / measure_s
    );
    let (one_s, one) = archive(bin, &root, dir.path(), "one", 1);
    println!(
        "archive, one reader at a time: {one_s:7.1} s, {:.2} frames/s; store {:.1} s, nights judged {:.1} s; {:+.1} % against measure",
        n / one_s,
        one["store_s"].as_f64().unwrap_or(0.0),
        one["judging_s"].as_f64().unwrap_or(0.0),
        100.0 * (one_s / measure_s - 1.0)
    );
    // This machine is shared: measure again after the archive, and compare with both.
    let again_s = measure();
    println!(
        "measure again, one by one:     {again_s:7.1} s, {:.2} frames/s; the archive {:+.1} % against the mean of both",
        n / again_s,
        100.0 * (2.0 * one_s / (measure_s + again_s) - 1.0)
    );
    let (all_s, all) = archive(bin, &root, dir.path(), "all", 0);
    println!(
        "archive, one reader per core:  {all_s:7.1} s, {:.2} frames/s; store {:.1} s, nights judged {:.1} s ({} nights, {} frames recorded)",
        n / all_s,
        all["store_s"].as_f64().unwrap_or(0.0),
        all["judging_s"].as_f64().unwrap_or(0.0),
        all["judged"].as_array().map_or(0, |j| j.len()),
        all["new"]
    );
}
