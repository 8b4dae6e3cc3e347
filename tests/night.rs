//! `subwatch night` on rendered nights whose events are known: every injected anomaly
//! must be found, with at most two false ones of any kind per 40 frames on each of three
//! seeded nights, and the registration must match the rendered dithers and meridian flip.

mod common;

use std::path::Path;
use std::process::Command;

use serde_json::Value;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::night::{render_night, NightFrame, NightPlan, TrueAnomaly};

fn write_night(dir: &Path, plan: &NightPlan) -> (Vec<NightFrame>, Vec<TrueAnomaly>) {
    std::fs::create_dir_all(dir).unwrap();
    let (frames, truth) = render_night(plan);
    for f in &frames {
        write_frame(&dir.join(&f.name), &f.pixels, Encoding::Unsigned16, &f.keys).unwrap();
    }
    (frames, truth)
}

fn run_night(dir: &Path, config: Option<&Path>) -> Value {
    let mut args = vec!["night".as_ref(), dir.as_os_str(), "--json".as_ref()];
    if let Some(c) = config {
        args.extend(["--config".as_ref(), c.as_os_str()]);
    }
    common::json_of(&args)
}

/// Per kind: (injected, found among them, reported, false reports).
fn score(
    doc: &Value,
    frames: &[NightFrame],
    truth: &[TrueAnomaly],
    kind: &str,
) -> (usize, usize, usize, usize) {
    let reported: Vec<&Value> = doc["anomalies"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["kind"] == kind)
        .collect();
    let tol = if kind == "trail" { 30.0 } else { 3.0 };
    let matches = |t: &TrueAnomaly, a: &Value| {
        a["detections"].as_array().unwrap().iter().any(|d| {
            let path = d["path"].as_str().unwrap();
            t.frames.iter().enumerate().any(|(k, &fi)| {
                let pos = t.positions[k.min(t.positions.len() - 1)];
                (kind == "hot_pixel" || path.ends_with(&frames[fi].name))
                    && (d["x"].as_f64().unwrap() - pos.0).hypot(d["y"].as_f64().unwrap() - pos.1)
                        < tol
            })
        })
    };
    let injected: Vec<&TrueAnomaly> = truth.iter().filter(|t| t.kind == kind).collect();
    let found = injected
        .iter()
        .filter(|t| reported.iter().any(|a| matches(t, a)))
        .count();
    let false_reports = reported
        .iter()
        .filter(|a| !injected.iter().any(|t| matches(t, a)))
        .count();
    (injected.len(), found, reported.len(), false_reports)
}

/// The full rendered night, judged once and shared by the tests that read it.
struct FullNight {
    _dir: tempfile::TempDir,
    plan: NightPlan,
    frames: Vec<NightFrame>,
    truth: Vec<TrueAnomaly>,
    doc: Value,
}

fn full_night() -> &'static FullNight {
    static NIGHT: std::sync::OnceLock<FullNight> = std::sync::OnceLock::new();
    NIGHT.get_or_init(|| {
        let dir = tempfile::tempdir().unwrap();
        let plan = NightPlan::full(3);
        let (frames, truth) = write_night(dir.path(), &plan);
        let doc = run_night(dir.path(), None);
        FullNight {
            _dir: dir,
            plan,
            frames,
            truth,
            doc,
        }
    })
}

fn every_injected_one_is_found(kind: &str) {
    let n = full_night();
    let (injected, found, reported, false_reports) = score(&n.doc, &n.frames, &n.truth, kind);
    println!(
        "{kind}: injected {injected}, found {found}, reported {reported}, false {false_reports}"
    );
    assert!(injected > 0, "{kind}: the scenario injects it");
    assert_eq!(found, injected, "{kind}: every injected one is found");
}

#[test]
fn every_transient_is_found() {
    every_injected_one_is_found("transient");
}

#[test]
fn every_trail_is_found() {
    every_injected_one_is_found("trail");
}

#[test]
fn the_moving_object_is_found() {
    every_injected_one_is_found("moving");
}

#[test]
fn the_variable_is_found() {
    every_injected_one_is_found("variable");
}

#[test]
fn every_hot_pixel_is_found() {
    every_injected_one_is_found("hot_pixel");
}

/// The nights, beside the full night's (seed 3), whose false anomalies are counted too:
/// one night's count says little of a rate.
const MORE_SEEDS: [u64; 2] = [4, 5];

/// The reports that match no injected anomaly, by kind: every kind the contract has and
/// any other a report names.
fn false_anomalies(
    doc: &Value,
    frames: &[NightFrame],
    truth: &[TrueAnomaly],
) -> Vec<(String, usize)> {
    let mut kinds: std::collections::BTreeSet<String> = subwatch::night::AnomalyKind::ALL
        .iter()
        .map(|k| k.name().to_string())
        .collect();
    kinds.extend(
        doc["anomalies"]
            .as_array()
            .unwrap()
            .iter()
            .map(|a| a["kind"].as_str().unwrap().to_string()),
    );
    kinds
        .into_iter()
        .map(|k| {
            let false_reports = score(doc, frames, truth, &k).3;
            (k, false_reports)
        })
        .filter(|(_, n)| *n > 0)
        .collect()
}

#[test]
fn at_most_two_false_anomalies_in_forty_frames() {
    let n = full_night();
    let mut nights = vec![(
        n.plan.seed,
        n.frames.len(),
        false_anomalies(&n.doc, &n.frames, &n.truth),
    )];
    // The other nights rendered and judged side by side.
    nights.extend(std::thread::scope(|s| {
        let runs: Vec<_> = MORE_SEEDS
            .iter()
            .map(|&seed| {
                s.spawn(move || {
                    let dir = tempfile::tempdir().unwrap();
                    let (frames, truth) = write_night(dir.path(), &NightPlan::full(seed));
                    let doc = run_night(dir.path(), None);
                    (seed, frames.len(), false_anomalies(&doc, &frames, &truth))
                })
            })
            .collect();
        runs.into_iter()
            .map(|r| r.join().unwrap())
            .collect::<Vec<_>>()
    }));
    for (seed, frames, found) in &nights {
        println!("seed {seed}: {frames} frames, false anomalies {found:?}");
    }
    for (seed, frames, found) in &nights {
        let total: usize = found.iter().map(|(_, n)| n).sum();
        assert!(
            total * 40 <= 2 * frames,
            "seed {seed}: {total} false anomalies in {frames} frames ({found:?}): at most two per 40 frames"
        );
    }
}

/// The count on a planted document: a kind no night injects and a kind the contract
/// does not have are both counted.
#[test]
fn the_false_anomaly_count_takes_every_kind_a_report_names() {
    let doc = serde_json::json!({"anomalies": [
        {"kind": "new_source", "detections": [{"path": "a.fits", "x": 1.0, "y": 1.0}]},
        {"kind": "comet", "detections": [{"path": "a.fits", "x": 5.0, "y": 5.0}]},
    ]});
    assert_eq!(
        false_anomalies(&doc, &[], &[]),
        [("comet".to_string(), 1), ("new_source".to_string(), 1)]
    );
}

fn verdict(n: &FullNight, i: usize) -> (String, Value) {
    let f = n.doc["frames"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["path"].as_str().unwrap().ends_with(&n.frames[i].name))
        .unwrap();
    (
        f["verdict"].as_str().unwrap().to_string(),
        f["reasons"].clone(),
    )
}

#[test]
fn the_gust_is_rejected() {
    let n = full_night();
    assert_eq!(verdict(n, 7).0, "reject", "{:?}", verdict(n, 7));
}

#[test]
fn the_cloud_is_rejected_for_transparency() {
    let n = full_night();
    for i in n.plan.cloud_frames.clone() {
        let (v, reasons) = verdict(n, i);
        assert_eq!(v, "reject");
        assert!(
            reasons
                .as_array()
                .unwrap()
                .iter()
                .any(|r| r == "transparency_low"),
            "{reasons}"
        );
    }
}

#[test]
fn the_end_of_the_focus_drift_is_rejected() {
    assert_eq!(verdict(full_night(), 39).0, "reject");
}

#[test]
fn a_trail_is_named_and_a_calm_frame_passes() {
    let n = full_night();
    assert!(verdict(n, 5)
        .1
        .as_array()
        .unwrap()
        .iter()
        .any(|r| r == "trail"));
    assert_eq!(verdict(n, 2).0, "ok");
}

#[test]
fn registration_matches_the_rendered_geometry() {
    let n = full_night();
    let (plan, frames, doc) = (&n.plan, &n.frames, &n.doc);
    // Registration against the rendered geometry: map each frame's corners to the
    // reference frame both ways and compare.
    let records = doc["frames"].as_array().unwrap();
    let reference = records
        .iter()
        .position(|f| f["registration_rms_px"].as_f64() == Some(0.0))
        .unwrap();
    let ref_frame = frames
        .iter()
        .find(|f| {
            records[reference]["path"]
                .as_str()
                .unwrap()
                .ends_with(&f.name)
        })
        .unwrap();
    let c = (
        (plan.width as f64 + 1.0) / 2.0,
        (plan.height as f64 + 1.0) / 2.0,
    );
    // Frame FITS position → rendered field position (inverse of the renderer's placement).
    let to_field = |f: &NightFrame, p: (f64, f64)| {
        let (s, co) = f.rotation_deg.to_radians().sin_cos();
        let (x, y) = (p.0 - c.0 - f.dither.0, p.1 - c.1 - f.dither.1);
        (co * x + s * y + c.0, -s * x + co * y + c.1)
    };
    let from_field = |f: &NightFrame, p: (f64, f64)| {
        let (s, co) = f.rotation_deg.to_radians().sin_cos();
        let (x, y) = (p.0 - c.0, p.1 - c.1);
        (
            co * x - s * y + c.0 + f.dither.0,
            s * x + co * y + c.1 + f.dither.1,
        )
    };
    let mut worst: f64 = 0.0;
    for rec in records {
        let f = frames
            .iter()
            .find(|f| rec["path"].as_str().unwrap().ends_with(&f.name))
            .unwrap();
        let t: Vec<f64> = rec["registration_transform"]
            .as_array()
            .expect("registered")
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        for corner in [(50.0, 50.0), (700.0, 60.0), (60.0, 700.0), (700.0, 700.0)] {
            let ours = (
                t[0] * corner.0 + t[1] * corner.1 + t[4],
                t[2] * corner.0 + t[3] * corner.1 + t[5],
            );
            let truth = from_field(ref_frame, to_field(f, corner));
            worst = worst.max((ours.0 - truth.0).hypot(ours.1 - truth.1));
        }
    }
    println!("registration: worst transform error at the frame corners {worst:.4} px");
    assert!(worst <= 0.05, "registration error {worst} px");
}

#[test]
fn color_night_finds_the_very_red_star() {
    let dir = tempfile::tempdir().unwrap();
    let mut plan = NightPlan::full(5).quiet();
    plan.object = "Kestrel Field B".into();
    plan.field_seed = 91;
    plan.bayer = subwatch::frame::bayer::BayerPattern::parse("RGGB");
    plan.red_star = true;
    plan.frames = 10;
    let (frames, truth) = write_night(dir.path(), &plan);
    let doc = run_night(dir.path(), None);
    let (injected, found, reported, false_reports) = score(&doc, &frames, &truth, "color");
    assert_eq!((injected, found, reported, false_reports), (1, 1, 1, 0));
    let red = doc["anomalies"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["kind"] == "color")
        .unwrap();
    assert!(
        red["detail"]["color_rg_mag"].as_f64().unwrap() < -0.8,
        "{red}"
    );
    assert!(red["ra_deg"].is_number() && red["dec_deg"].is_number());
    // The batch command writes the same summary as the daemon's morning report.
    let report = dir.path().join("report");
    let out = Command::new(common::binary())
        .arg("night")
        .arg(dir.path())
        .arg("--report")
        .arg(&report)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let html = std::fs::read_to_string(report.join("night-2026-03-14.html")).unwrap();
    assert!(
        html.contains("<span class=\"kind\">color</span>")
            && html.contains("data:image/png;base64,")
            && html.contains("no filter"),
        "the color outlier with its cutout, under a heading that says the frames had no filter"
    );
    assert!(report.join("night-2026-03-14.csv").exists());
}

#[test]
fn a_second_night_shows_its_new_source() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    std::fs::create_dir_all(&store).unwrap();
    let config = store.join("subwatch.toml");
    std::fs::write(
        &config,
        format!("[watch]\nfolders = ['{}']\n[store]\npath = \"subwatch.db\"\n[site]\ntimezone = \"Europe/Madrid\"\n", store.display()),
    )
    .unwrap();
    let mut first = NightPlan::full(7).quiet();
    first.frames = 12;
    first.flip_at = Some(6);
    let mut second = first.clone();
    second.seed = 8;
    second.start = "2026-03-15T20:40:00".into();
    second.new_source = true;
    write_night(&dir.path().join("n1"), &first);
    let (frames, truth) = write_night(&dir.path().join("n2"), &second);
    let first_doc = run_night(&dir.path().join("n1"), Some(&config));
    assert!(!first_doc["anomalies"]
        .as_array()
        .unwrap()
        .iter()
        .any(|a| a["kind"] == "new_source"));
    let doc = run_night(&dir.path().join("n2"), Some(&config));
    let (injected, found, reported, false_reports) = score(&doc, &frames, &truth, "new_source");
    for a in doc["anomalies"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["kind"] == "new_source")
    {
        println!("new source: {} at {}", a["detail"], a["detections"][0]);
    }
    assert_eq!((injected, found, reported, false_reports), (1, 1, 1, 0));
}

#[test]
fn the_daemon_store_gives_the_same_night_as_the_batch_command() {
    let dir = tempfile::tempdir().unwrap();
    let root = subwatch::os::canonical(dir.path()).unwrap();
    let capture = root.join("capture");
    let config = root.join("subwatch.toml");
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = ['{}']\nsettle_seconds = 0.2\n[store]\npath = '{}'\n[site]\ntimezone = \"Europe/Madrid\"\n",
            capture.display(),
            root.join("s.db").display()
        ),
    )
    .unwrap();
    let mut plan = NightPlan::full(9);
    plan.frames = 12;
    plan.flip_at = Some(6);
    plan.cloud_frames = vec![4];
    plan.gust_frames = vec![8];
    plan.trail_frames = vec![3];
    plan.focus_drift_from = None;
    plan.flash_frame = Some(5);
    let (frames, _) = write_night(&capture, &plan);
    let mut daemon = Command::new(common::binary())
        .args(["watch", "--config"])
        .arg(&config)
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let db = root.join("s.db");
    let start = std::time::Instant::now();
    loop {
        let done: i64 = rusqlite::Connection::open(&db)
            .and_then(|c| {
                c.query_row(
                    "SELECT COUNT(*) FROM frames WHERE verdict IS NOT NULL",
                    [],
                    |r| r.get(0),
                )
            })
            .unwrap_or(0);
        if done as usize == frames.len() || start.elapsed().as_secs() > 60 {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(100));
    }
    let _ = daemon.kill();
    let _ = daemon.wait();
    let out = Command::new(common::binary())
        .args(["report", "--json", "--night", "2026-03-14", "--config"])
        .arg(&config)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let from_store: Value = serde_json::from_slice(&out.stdout).unwrap();
    let batch = run_night(&capture, None);
    let summary = |d: &Value| {
        let mut kinds: Vec<(String, usize)> = d["anomalies"]
            .as_array()
            .unwrap()
            .iter()
            .map(|a| {
                (
                    a["kind"].as_str().unwrap().to_string(),
                    a["detections"].as_array().unwrap().len(),
                )
            })
            .collect();
        kinds.sort();
        let verdicts: Vec<(String, String)> = d["frames"]
            .as_array()
            .unwrap()
            .iter()
            .map(|f| {
                (
                    f["path"].as_str().unwrap().to_string(),
                    f["verdict"].as_str().unwrap().to_string(),
                )
            })
            .collect();
        (kinds, verdicts)
    };
    assert_eq!(summary(&from_store), summary(&batch));
    assert_eq!(from_store["frames"].as_array().unwrap().len(), frames.len());
}

/// One target through V tonight and through I the next night, with a star eight times
/// brighter in I than its color says: found between the nights the store holds, and
/// between the two filters of one night; no other star is called out.
#[test]
fn a_star_bright_in_one_band_only_is_found_between_filters() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    std::fs::create_dir_all(&store).unwrap();
    let config = store.join("subwatch.toml");
    std::fs::write(
        &config,
        format!("[watch]\nfolders = ['{}']\n[store]\npath = \"subwatch.db\"\n[site]\ntimezone = \"Europe/Madrid\"\n", store.display()),
    )
    .unwrap();
    let base = NightPlan {
        object: "Kestrel Field C".into(),
        field_seed: 63,
        frames: 6,
        star_count: 300,
        cosmic_rays_per_frame: 0.0,
        hot_pixels: 0,
        ..NightPlan::full(43).quiet()
    };
    let v = NightPlan {
        filter: "V".into(),
        band_star_factor: Some(1.0),
        start: "2026-03-14T21:00:00".into(),
        ..base.clone()
    };
    let i = NightPlan {
        seed: 44,
        filter: "I".into(),
        color_term: 1.0,
        band_star_factor: Some(8.0),
        start: "2026-03-15T21:00:00".into(),
        ..base.clone()
    };
    let band_colors = |doc: &Value| -> Vec<Value> {
        doc["anomalies"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|a| a["kind"] == "color" && a["detail"]["bands"].is_array())
            .cloned()
            .collect()
    };
    // Across nights: V into the store first, then I.
    write_night(&dir.path().join("v"), &v);
    let first = run_night(&dir.path().join("v"), Some(&config));
    assert!(band_colors(&first).is_empty(), "one filter alone: {first}");
    let (frames, _) = write_night(&dir.path().join("i"), &i);
    let second = run_night(&dir.path().join("i"), Some(&config));
    let found = band_colors(&second);
    assert_eq!(found.len(), 1, "{found:?}");
    let bands = found[0]["detail"]["bands"].to_string();
    assert!(
        bands.contains("\"I\"") && bands.contains("V (2026-03-14)"),
        "{bands}"
    );
    assert!(found[0]["detail"]["z"].as_f64().unwrap().abs() > 5.0);
    // Where the rendered star is: it was placed by the plan, not by the frames' seed.
    let star = subwatch::sim::night::field_on_sky(&i)
        .into_iter()
        .find(|s| s.4)
        .unwrap();
    let sep = subwatch::astrometry::separation_deg(
        (star.0, star.1),
        (
            found[0]["ra_deg"].as_f64().unwrap(),
            found[0]["dec_deg"].as_f64().unwrap(),
        ),
    ) * 3600.0;
    assert!(sep < 2.0, "{sep} arcsec from the star bright in I");
    assert_eq!(
        found[0]["detections"][0]["path"]
            .as_str()
            .map(|p| p.contains("-i_")),
        Some(true)
    );
    // Within one night: both filters in one folder.
    let both = dir.path().join("both");
    write_night(&both, &v);
    let same_night = NightPlan {
        start: "2026-03-14T21:20:00".into(),
        ..i
    };
    write_night(&both, &same_night);
    let doc = run_night(&both, None);
    let found = band_colors(&doc);
    assert_eq!(found.len(), 1, "{found:?}");
    assert_eq!(found[0]["detections"].as_array().unwrap().len(), 2);
    drop(frames);
}
