//! Helpers shared by the integration tests: render frames with known truth, run the
//! real binary, compare its output with the truth.
#![allow(dead_code)]

pub mod daemon;
pub mod postgres;

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::{render, SimParams, SimTruth};

pub fn binary() -> &'static str {
    env!("CARGO_BIN_EXE_subwatch")
}

/// Run the binary with `args`, which must succeed: its standard output read as JSON.
pub fn json_of<S: AsRef<std::ffi::OsStr>>(args: &[S]) -> Value {
    let out = Command::new(binary()).args(args).output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// Render `params` into `dir/name` and return the path and the truth.
pub fn render_to(
    dir: &Path,
    name: &str,
    params: &SimParams,
    encoding: Encoding,
) -> (PathBuf, SimTruth) {
    let (pixels, keys, truth) = render(params);
    let path = dir.join(name);
    write_frame(&path, &pixels, encoding, &keys).expect("write frame");
    (path, truth)
}

/// Run `subwatch measure --json [--stars]` and parse its JSON Lines; also the exit code.
pub fn measure(paths: &[&Path], stars: bool) -> (Vec<Value>, i32) {
    let mut cmd = Command::new(binary());
    cmd.arg("measure").arg("--json");
    if stars {
        cmd.arg("--stars");
    }
    cmd.args(paths);
    let out = cmd.output().expect("run subwatch");
    let stdout = String::from_utf8(out.stdout).expect("utf-8 output");
    let records = stdout
        .lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("not JSON ({e}): {l}")))
        .collect();
    (records, out.status.code().unwrap_or(-1))
}

/// Accuracy of one measured frame against the truth.
#[derive(Debug)]
pub struct Scores {
    pub fwhm_rel_err: f64,
    pub ecc_err: f64,
    pub centroid_rms: f64,
    pub background_err_sigma: f64,
    pub noise_rel_err: f64,
    pub recall_snr20: f64,
    pub precision: f64,
    pub measured: usize,
}

pub fn score(record: &Value, truth: &SimTruth) -> Scores {
    assert_eq!(record["status"], "ok", "{record}");
    let stars = record["stars"].as_array().expect("stars array");
    let pos: Vec<(f64, f64, f64)> = stars
        .iter()
        .map(|s| {
            (
                s["x"].as_f64().unwrap(),
                s["y"].as_f64().unwrap(),
                s["snr"].as_f64().unwrap_or(0.0),
            )
        })
        .collect();
    let nearest = |x: f64, y: f64, list: &mut dyn Iterator<Item = (f64, f64)>| {
        list.map(|(a, b)| (a - x).hypot(b - y))
            .fold(f64::INFINITY, f64::min)
    };
    // Recall: truth stars with SNR > 20 (not saturated) found within 1.5 px.
    let strong: Vec<_> = truth
        .stars
        .iter()
        .filter(|s| s.snr > 20.0 && !s.saturated)
        .collect();
    let found = strong
        .iter()
        .filter(|t| nearest(t.x, t.y, &mut pos.iter().map(|p| (p.0, p.1))) < 1.5)
        .count();
    // Precision: measured stars within 1.5 px of some truth star.
    let matched = pos
        .iter()
        .filter(|p| nearest(p.0, p.1, &mut truth.stars.iter().map(|t| (t.x, t.y))) < 1.5)
        .count();
    // Centroid RMS for truth stars with SNR > 50.
    let mut sq = Vec::new();
    for t in truth.stars.iter().filter(|s| s.snr > 50.0 && !s.saturated) {
        let d = nearest(t.x, t.y, &mut pos.iter().map(|p| (p.0, p.1)));
        if d < 1.5 {
            sq.push(d * d);
        }
    }
    let f = |k: &str| record[k].as_f64().unwrap_or(f64::NAN);
    Scores {
        fwhm_rel_err: f("fwhm_px") / truth.fwhm_px - 1.0,
        ecc_err: f("eccentricity") - truth.eccentricity,
        centroid_rms: (sq.iter().sum::<f64>() / sq.len().max(1) as f64).sqrt(),
        background_err_sigma: (f("background_adu") - truth.background_adu) / truth.noise_adu,
        noise_rel_err: f("noise_adu") / truth.noise_adu - 1.0,
        recall_snr20: found as f64 / strong.len().max(1) as f64,
        precision: matched as f64 / pos.len().max(1) as f64,
        measured: pos.len(),
    }
}
