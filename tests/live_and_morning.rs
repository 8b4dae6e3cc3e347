//! One night, one judgement. The daemon judges a rendered night frame by frame as it
//! lands; `subwatch night` judges the same folder in one go; `report` judges the store's
//! night in the morning. Required:
//! - the morning judgement (`report`) and the batch one (`night DIR`) agree on every
//!   frame: verdict, reasons and transparency;
//! - every live verdict is the night model applied to the night so far (the frames of its
//!   group recorded until then), which is the documented live rule of `night::judge`;
//!   where a live verdict differs from the morning's, that rule is the whole reason;
//! - a reference frame whose file is rewritten mid-night is judged on its new stars, and
//!   every frame placed on its old stars is placed again: the daemon's verdicts then are
//!   a batch run's over the final files.

mod common;

use std::collections::BTreeMap;
use std::time::{Duration, Instant};

use common::daemon::{feed_one_by_one, site, Daemon};
use ndarray::Array2;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::night::judge::{judge_records, reference, time_order};
use subwatch::record::FrameRecord;
use subwatch::sim::night::{render_night, NightFrame, NightPlan};
use subwatch::sim::SimParams;
use subwatch::store::Store;

#[test]
fn live_verdicts_are_the_night_model_on_the_night_so_far_and_the_morning_is_the_batch() {
    let site_line = format!(
        "[site]\nlatitude = {}\nlongitude = {}\nelevation_m = {}\ntimezone = \"Europe/Madrid\"\n",
        subwatch::demo::SITE.0,
        subwatch::demo::SITE.1,
        subwatch::demo::SITE.2
    );
    let s = site("");
    let cfg = std::fs::read_to_string(&s.config)
        .unwrap()
        .replace("[site]\ntimezone = \"UTC\"\n", &site_line);
    std::fs::write(&s.config, cfg).unwrap();
    // A whole invented night: dithers, a meridian flip, cloud, a gust, focus drift,
    // satellites, an asteroid, a variable.
    let (frames, _) = render_night(&NightPlan::full(7));
    let d = Daemon::start(&s.config);
    std::thread::sleep(std::time::Duration::from_millis(300));
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    feed_one_by_one(&s, &conn, &frames);
    d.terminate();

    // What was decided live, in the order the frames landed.
    let mut st = conn
        .prepare("SELECT id, path, live_verdict, live_reasons_json FROM frames ORDER BY id")
        .unwrap();
    let live: Vec<(i64, String, String, Vec<String>)> = st
        .query_map([], |r| {
            let reasons: String = r.get(3)?;
            Ok((
                r.get(0)?,
                r.get(1)?,
                r.get(2)?,
                serde_json::from_str(&reasons).unwrap(),
            ))
        })
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert_eq!(live.len(), frames.len());
    let night: String = conn
        .query_row("SELECT night FROM frames LIMIT 1", [], |r| r.get(0))
        .unwrap();

    // The morning (report, from the store) and the batch (night, from the folder).
    let run = common::json_of::<&str>;
    let config = s.config.to_string_lossy().into_owned();
    let morning = run(&["report", "--config", &config, "--night", &night, "--json"]);
    let batch = run(&[
        "night",
        &s.capture.to_string_lossy(),
        "--json",
        "--config",
        &config,
    ]);
    let by_path = |doc: &serde_json::Value| -> BTreeMap<String, serde_json::Value> {
        doc["frames"]
            .as_array()
            .unwrap()
            .iter()
            .map(|f| (f["path"].as_str().unwrap().to_string(), f.clone()))
            .collect()
    };
    let (morning, batch) = (by_path(&morning), by_path(&batch));
    assert_eq!(morning.len(), frames.len());
    assert_eq!(
        morning.keys().collect::<Vec<_>>(),
        batch.keys().collect::<Vec<_>>()
    );
    for (path, m) in &morning {
        let b = &batch[path];
        assert_eq!(m["verdict"], b["verdict"], "{path}");
        assert_eq!(m["reasons"], b["reasons"], "{path}");
        assert_eq!(
            m["transparency_loss_mag"], b["transparency_loss_mag"],
            "{path}"
        );
    }

    // Every live verdict is the model applied to the night so far.
    let store = subwatch::store::Store::open(&s.db).unwrap();
    let records = store.night_records(&night).unwrap();
    let config = subwatch::config::load(&s.config).unwrap();
    let order_landed: Vec<&str> = live.iter().map(|l| l.1.as_str()).collect();
    let mut differ = Vec::new();
    for (k, (_, path, verdict, reasons)) in live.iter().enumerate() {
        let me = records.iter().find(|r| &r.identity.path == path).unwrap();
        // The frames of its group that had landed by then, itself included.
        let so_far: Vec<&FrameRecord> = records
            .iter()
            .filter(|r| r.target == me.target && r.filter == me.filter)
            .filter(|r| order_landed[..=k].contains(&r.identity.path.as_str()))
            .collect();
        // Nothing kept: every frame placed afresh, each named by its position.
        let judged = judge_records(&so_far, &config.rule_specs(), config.site_position()).frames;
        let at = so_far
            .iter()
            .position(|r| &r.identity.path == path)
            .unwrap();
        assert_eq!(judged[at].judgement.verdict.as_str(), verdict, "{path}");
        assert_eq!(&judged[at].judgement.reasons, reasons, "{path}");
        let m = &morning[path];
        if m["verdict"] != verdict.as_str() || m["reasons"] != serde_json::json!(reasons) {
            differ.push(format!(
                "{}: live {verdict} {reasons:?}, morning {} {}",
                path.rsplit('/').next().unwrap(),
                m["verdict"],
                m["reasons"]
            ));
        }
    }
    println!(
        "{} frames: morning = batch for all; live = model on the night so far for all; {} live verdict(s) differ from the morning's, by the live rule:",
        live.len(),
        differ.len()
    );
    for d in &differ {
        println!("  {d}");
    }
}

fn file_name(path: &str) -> String {
    std::path::Path::new(path)
        .file_name()
        .unwrap()
        .to_string_lossy()
        .into_owned()
}

/// A frame's pixels seen through cloud: the light above the bias (stars and sky alike)
/// scaled by `transmission`, so each star keeps its signal-to-noise ratio and is
/// detected as before, and `extra` faint stars added where the field has none (Gaussian,
/// FWHM 3 px, signal-to-noise ratio about 30), so the frame holds more stars than any
/// other of its night.
fn dimmed_with_faint_stars(pixels: &Array2<f32>, transmission: f32, extra: usize) -> Array2<f32> {
    use rand::{Rng, SeedableRng};
    let bias = SimParams::default().bias_adu as f32;
    let mut out = pixels.mapv(|v| bias + transmission * (v - bias));
    let (h, w) = out.dim();
    let mut rng = rand::rngs::StdRng::seed_from_u64(5);
    let sigma = 3.0 / (8.0 * 2f64.ln()).sqrt();
    let flux = 2000.0;
    for _ in 0..extra {
        let (x0, y0) = (
            rng.gen_range(20.0..w as f64 - 20.0),
            rng.gen_range(20.0..h as f64 - 20.0),
        );
        for y in (y0 as usize - 8)..(y0 as usize + 8) {
            for x in (x0 as usize - 8)..(x0 as usize + 8) {
                let r2 = (x as f64 - x0).powi(2) + (y as f64 - y0).powi(2);
                let v = flux / (2.0 * std::f64::consts::PI * sigma * sigma)
                    * (-r2 / (2.0 * sigma * sigma)).exp();
                out[[y, x]] += v as f32;
            }
        }
    }
    out
}

/// Write `frame` into the capture folder and wait until the daemon judged it: `judged`
/// frames hold a verdict once it has.
fn land(s: &common::daemon::Site, conn: &rusqlite::Connection, frame: &NightFrame, judged: i64) {
    write_frame(
        &s.capture.join(&frame.name),
        &frame.pixels,
        Encoding::Unsigned16,
        &frame.keys,
    )
    .unwrap();
    let start = Instant::now();
    while start.elapsed() < Duration::from_secs(30) {
        let n: i64 = conn
            .query_row(
                "SELECT COUNT(*) FROM frames WHERE verdict IS NOT NULL",
                [],
                |r| r.get(0),
            )
            .unwrap_or(0);
        if n >= judged {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("{} was not judged within 30 s", frame.name);
}

/// The group's reference frame is rewritten mid-night, after later frames landed: the
/// file at its path gets other content, which stays the group's reference (it has the
/// most stars) while its stars are fainter. The store gives the new content a new record
/// with new stars; every placement made on the old stars must be made again, so that the
/// daemon's verdicts, once everything has landed, are a batch run's over the final files,
/// frame by frame. (A calm night: nothing in it depends on how much of the night existed
/// when a frame was judged, so the live rule alone cannot make the two differ.)
#[test]
fn a_rewritten_reference_frame_is_judged_on_its_new_stars_as_a_batch_run_judges_it() {
    let s = site("");
    let plan = NightPlan {
        frames: 12,
        ..NightPlan::full(11).quiet()
    };
    let (frames, _) = render_night(&plan);
    let d = Daemon::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    let before = 10;
    for (k, f) in frames[..before].iter().enumerate() {
        land(&s, &conn, f, k as i64 + 1);
    }

    // The group's reference now, by the model's own rule over what the store holds.
    let night: String = conn
        .query_row("SELECT night FROM frames LIMIT 1", [], |r| r.get(0))
        .unwrap();
    let reference_name = |records: &[FrameRecord]| -> String {
        let all: Vec<&FrameRecord> = records.iter().collect();
        let sorted: Vec<&FrameRecord> = time_order(&all).iter().map(|&i| all[i]).collect();
        let r = reference(&sorted).expect("a reference");
        file_name(&sorted[r].identity.path)
    };
    let store = Store::open_read_only(&s.db, "").unwrap();
    let name = reference_name(&store.night_records(&night).unwrap());
    let r = frames.iter().position(|f| f.name == name).unwrap();
    assert!(
        r + 1 < before,
        "the reference ({name}) must have later frames landed after it"
    );
    let (old_id, old_stars): (i64, i64) = conn
        .query_row(
            "SELECT id, star_count FROM frames WHERE path LIKE ?1",
            [format!("%{name}")],
            |row| Ok((row.get(0)?, row.get(1)?)),
        )
        .unwrap();

    // What is written over it: the same frame seen through cloud, its stars and sky
    // 1.3 mag fainter, with faint stars besides, so that it stays the reference.
    // Written beside the folder and renamed over the file, as a capture program saving
    // again would.
    let rewritten = dimmed_with_faint_stars(&frames[r].pixels, 0.3, 80);
    let scratch = s.root.join(&name);
    write_frame(&scratch, &rewritten, Encoding::Unsigned16, &frames[r].keys).unwrap();
    std::fs::rename(&scratch, s.capture.join(&name)).unwrap();
    let start = Instant::now();
    let new_stars = loop {
        let row: Option<(i64, Option<String>, i64)> = conn
            .query_row(
                "SELECT id, verdict, star_count FROM frames WHERE path LIKE ?1",
                [format!("%{name}")],
                |row| Ok((row.get(0)?, row.get(1)?, row.get(2)?)),
            )
            .ok();
        if let Some((id, Some(_), stars)) = row {
            if id != old_id {
                break stars;
            }
        }
        assert!(
            start.elapsed() < Duration::from_secs(30),
            "the rewritten {name} was not judged again"
        );
        std::thread::sleep(Duration::from_millis(50));
    };
    for (k, f) in frames[before..].iter().enumerate() {
        land(&s, &conn, f, (before + k + 1) as i64);
    }
    d.terminate();

    // The rewritten file is still the group's reference, with new stars.
    let store = Store::open_read_only(&s.db, "").unwrap();
    assert_eq!(
        reference_name(&store.night_records(&night).unwrap()),
        name,
        "the rewritten frame ({old_stars} stars, now {new_stars}) must stay the reference"
    );

    // The batch run over the final files.
    let batch = common::json_of(&[
        "night".as_ref(),
        s.capture.as_os_str(),
        "--json".as_ref(),
        "--config".as_ref(),
        s.config.as_os_str(),
    ]);
    let batch: BTreeMap<String, (String, Vec<String>)> = batch["frames"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| {
            (
                f["path"].as_str().unwrap().to_string(),
                (
                    f["verdict"].as_str().unwrap().to_string(),
                    serde_json::from_value(f["reasons"].clone()).unwrap(),
                ),
            )
        })
        .collect();
    // The test means something only if the new stars change the verdict: fainter than
    // every other frame's, the rewritten frame lost transparency.
    let (_, reasons) = &batch[&s.capture.join(&name).to_string_lossy().into_owned()];
    assert!(
        reasons.contains(&"transparency_low".to_string()),
        "{name}: {reasons:?}"
    );

    let mut st = conn
        .prepare("SELECT path, live_verdict, live_reasons_json FROM frames ORDER BY path")
        .unwrap();
    let live: BTreeMap<String, (String, Vec<String>)> = st
        .query_map([], |row| {
            let reasons: String = row.get(2)?;
            Ok((
                row.get(0)?,
                (row.get(1)?, serde_json::from_str(&reasons).unwrap()),
            ))
        })
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert_eq!(live.len(), frames.len());
    assert_eq!(
        live.keys().collect::<Vec<_>>(),
        batch.keys().collect::<Vec<_>>()
    );
    let differ: Vec<String> = live
        .iter()
        .filter(|(path, l)| batch[*path] != **l)
        .map(|(path, l)| format!("{}: live {l:?}, batch {:?}", file_name(path), batch[path]))
        .collect();
    assert!(differ.is_empty(), "{differ:#?}");
    println!(
        "{} frames, {name} rewritten ({old_stars} stars, then {new_stars}): live = batch for all",
        live.len()
    );
}
