//! One night, one judgement. The daemon judges a rendered night frame by frame as it
//! lands; `subwatch night` judges the same folder in one go; `report` judges the store's
//! night in the morning. Required:
//! - the morning judgement (`report`) and the batch one (`night DIR`) agree on every
//!   frame: verdict, reasons and transparency;
//! - every live verdict is the night model applied to the night so far (the frames of its
//!   group recorded until then), which is the documented live rule of `night::judge`;
//!   where a live verdict differs from the morning's, that rule is the whole reason.

mod common;

use std::collections::BTreeMap;
use std::process::Command;

use common::daemon::{feed_one_by_one, site, Daemon};
use subwatch::night::judge::{judge_group, place_all, time_order};
use subwatch::record::FrameRecord;
use subwatch::sim::night::{render_night, NightPlan};

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
    let run = |args: &[&str]| -> serde_json::Value {
        let out = Command::new(common::binary()).args(args).output().unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_slice(&out.stdout).unwrap()
    };
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
        let order = time_order(&so_far);
        let sorted: Vec<&FrameRecord> = order.iter().map(|&i| so_far[i]).collect();
        let judged = judge_group(
            &sorted,
            &place_all(&sorted),
            &config.rule_specs(),
            config.site_position(),
        );
        let at = sorted
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
