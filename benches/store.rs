//! The store's cost per frame on each back end, measured in one run: what the daemon asks
//! of the store for each frame that lands (the reading mark, the record with its stars,
//! the group so far for the live verdict, the verdict) into an SQLite file and into a
//! PostgreSQL database on the loopback server `.ci/postgres start` gives
//! (SUBWATCH_TEST_POSTGRES). `cargo bench --bench store`.

use std::time::Instant;

use subwatch::record::{FrameRecord, FrameStatus, Identity, StarRecord};
use subwatch::rules::{Judgement, Verdict};
use subwatch::store::{Location, Store};

const FRAMES: usize = 200;
const STARS: usize = 500;

fn frame(i: usize) -> FrameRecord {
    FrameRecord {
        identity: Identity {
            path: format!("/capture/kestrel-field-a_{i:04}.fits"),
            size: 2_108_160,
            mtime_ns: 1_000 + i as i64,
        },
        status: FrameStatus::Ok,
        error: None,
        night: Some("2026-03-14".into()),
        target: Some("Kestrel Field A".into()),
        filter: Some("L".into()),
        time_unix: Some(1.773e9 + 120.0 * i as f64),
        header: None,
        metrics: None,
        stars: (0..STARS)
            .map(|k| StarRecord {
                x: (k * 37 % 1024) as f64 + 0.25,
                y: (k * 53 % 768) as f64 + 0.5,
                flux: 1000.0 + k as f64,
                fwhm_px: 3.2,
                eccentricity: 0.1,
                snr: 50.0,
                flux_err: 20.0,
                hfr_px: None,
                fwhm_major_px: 3.3,
                fwhm_minor_px: 3.1,
                angle_deg: 10.0,
                psf_flux: 1000.0,
                psf_model: subwatch::measure::psf::PsfModel::Moffat,
                moffat_beta: Some(3.5),
                peak_adu: 900.0,
                blended: false,
                ra_deg: Some(150.0 + k as f64 * 1e-3),
                dec_deg: Some(20.0),
                rgb: None,
            })
            .collect(),
        rejected: Vec::new(),
        wcs: None,
        calibration: None,
    }
}

/// Milliseconds per frame of the daemon's store work over `FRAMES` frames.
fn per_frame(at: &Location) -> f64 {
    let mut store = Store::connect_for_rig(at, "north pier").expect("store");
    let frames: Vec<FrameRecord> = (0..FRAMES).map(frame).collect();
    let judgement = Judgement {
        verdict: Verdict::Ok,
        reasons: Vec::new(),
        explanations: Vec::new(),
    };
    let t = Instant::now();
    for f in &frames {
        store.begin_reading(&f.identity, 1.0).expect("mark");
        let id = store
            .record_frame(f, 2.0)
            .expect("record")
            .id()
            .expect("new");
        let group = store
            .group_records("2026-03-14", Some("Kestrel Field A"), Some("L"))
            .expect("group");
        assert!(!group.is_empty());
        store
            .set_live_verdict(id, &judgement, None)
            .expect("verdict");
    }
    t.elapsed().as_secs_f64() * 1e3 / FRAMES as f64
}

fn main() {
    let server = std::env::var("SUBWATCH_TEST_POSTGRES")
        .expect("SUBWATCH_TEST_POSTGRES: start a server with eval \"$(.ci/postgres start)\"");
    let name = format!("subwatch_bench_{}", std::process::id());
    let mut admin = postgres::Client::connect(&server, postgres::NoTls).expect("server");
    admin
        .batch_execute(&format!("CREATE DATABASE {name}"))
        .expect("database");
    let dir = tempfile::tempdir().expect("temp dir");
    let sqlite = per_frame(&Location::File(dir.path().join("bench.db")));
    let pg = per_frame(&Location::Server {
        url: format!("{}/{name}", server.rsplit_once('/').expect("url").0),
        password_file: None,
        ca_file: None,
    });
    admin
        .batch_execute(&format!("DROP DATABASE {name} WITH (FORCE)"))
        .expect("drop");
    println!(
        "store work per frame ({FRAMES} frames of {STARS} stars, group read back each time): SQLite {sqlite:.2} ms, PostgreSQL on loopback {pg:.2} ms (ratio {:.1})",
        pg / sqlite
    );
}
