//! A target across many seasons: a generated SQLite store holding 10 seasons of one
//! target (30 nights a season, 300 frames a night, through L and R, G, B; each night its
//! own seeing, sky and transparency, verdicts as a night gives them), then the time
//! `subwatch report --target` takes over it (as JSON, and as text with its files: the
//! plot and the lists), and the plan's query the morning summary and the status page
//! make. `cargo bench --bench seasons [-- NIGHTS_PER_SEASON]`.

use std::process::{Command, Stdio};
use std::time::Instant;

use rand::{Rng, SeedableRng};
use subwatch::record::{FrameRecord, FrameStatus, HeaderFacts, Identity};
use subwatch::rules::Verdict;
use subwatch::store::Store;

const TARGET: &str = "Kestrel Field A";
const SEASONS: usize = 10;
const FRAMES_PER_NIGHT: usize = 300;

/// One generated frame: its record, and the verdict its night gave it.
fn frame(
    rng: &mut rand::rngs::StdRng,
    path: String,
    night: &str,
    filter: &str,
    t: f64,
    seeing: f64,
    transparency: f64,
) -> (FrameRecord, Verdict) {
    let fwhm = seeing * (1.0 + 0.05 * rng.gen::<f64>());
    let saturated = rng.gen_range(3..9);
    // Reference stars' SNR as the CCD equation scales it: transparency over seeing.
    let snr0 = 400.0 * transparency * 3.0 / fwhm;
    let bright: Vec<f64> = (0..64)
        .map(|k| (snr0 / (1.0 + 0.15 * k as f64) * 10.0).round() / 10.0)
        .collect();
    let metrics = serde_json::json!({
        "width": 4096, "height": 4096, "star_count": rng.gen_range(900..1400),
        "fwhm_px": fwhm, "fwhm_arcsec": fwhm * 1.2, "eccentricity": 0.05 + 0.1 * rng.gen::<f64>(),
        "background_adu": 800.0 + 600.0 * rng.gen::<f64>(), "noise_adu": 12.0,
        "snr_median": 35.0, "hfr_px": fwhm / 2.0, "saturated_count": saturated,
        "sharp_count": 4, "background_range_adu": 20.0, "plate_scale_arcsec": 1.2,
        "limit_mag": 19.5 + transparency - 0.3 * fwhm, "bright_snr": bright
    });
    let verdict = match rng.gen::<f64>() {
        x if x < 0.85 => Verdict::Ok,
        x if x < 0.93 => Verdict::Warn,
        _ => Verdict::Reject,
    };
    let record = FrameRecord {
        identity: Identity {
            path,
            size: 33_554_880,
            mtime_ns: t as i64 * 1_000_000_000,
        },
        status: FrameStatus::Ok,
        error: None,
        night: Some(night.to_string()),
        target: Some(TARGET.into()),
        filter: Some(filter.into()),
        time_unix: Some(t),
        header: Some(HeaderFacts {
            exposure_s: Some(120.0),
            filter: Some(filter.into()),
            object: Some(TARGET.into()),
            ..Default::default()
        }),
        metrics: Some(serde_json::from_value(metrics).expect("metrics")),
        stars: Vec::new(),
        rejected: Vec::new(),
        wcs: None,
        calibration: None,
    };
    (record, verdict)
}

fn main() {
    let nights_per_season: usize = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .and_then(|a| a.parse().ok())
        .unwrap_or(30);
    let dir = tempfile::tempdir().expect("temp dir");
    let db = dir.path().join("seasons.db");
    let mut store = Store::open(&db).expect("store");
    let mut rng = rand::rngs::StdRng::seed_from_u64(10);
    let t = Instant::now();
    let mut frames = 0;
    for season in 0..SEASONS {
        let start = chrono::NaiveDate::from_ymd_opt(2016 + season as i32, 10, 1).expect("date");
        for n in 0..nights_per_season {
            let date = start + chrono::Duration::days(3 * n as i64);
            let night = date.format("%Y-%m-%d").to_string();
            let dusk = date
                .and_hms_opt(19, 0, 0)
                .expect("time")
                .and_utc()
                .timestamp() as f64;
            // A night's seeing, one soft night in ten.
            let seeing = if rng.gen::<f64>() < 0.1 {
                5.0
            } else {
                2.6 + rng.gen::<f64>()
            };
            let transparency = 0.7 + 0.3 * rng.gen::<f64>();
            let filters: &[&str] = if n % 4 == 0 { &["R", "G", "B"] } else { &["L"] };
            let mut verdicts = Vec::with_capacity(FRAMES_PER_NIGHT);
            for k in 0..FRAMES_PER_NIGHT {
                let filter = filters[k * filters.len() / FRAMES_PER_NIGHT];
                let path = format!("/srv/archive/{night}/{filter}/kfa_{k:04}.fits");
                let (record, verdict) = frame(
                    &mut rng,
                    path.clone(),
                    &night,
                    filter,
                    dusk + 125.0 * k as f64,
                    seeing,
                    transparency,
                );
                store.record_frame(&record, 0.0).expect("record");
                verdicts.push((path, verdict, Vec::new()));
                frames += 1;
            }
            store.update_verdicts(&verdicts).expect("verdicts");
        }
    }
    println!(
        "generated: {frames} frames of {TARGET}, {SEASONS} seasons of {nights_per_season} nights, {FRAMES_PER_NIGHT} frames a night, in {:.0} s ({:.0} MB store)",
        t.elapsed().as_secs_f64(),
        std::fs::metadata(&db).map_or(0, |m| m.len()) as f64 / 1e6
    );

    // The plan's query, as the morning summary and the status page make it.
    let t = Instant::now();
    let usable = store.target_usable(TARGET, true).expect("usable");
    println!(
        "plan's query (usable exposure per night and filter): {} rows in {:.3} s",
        usable.len(),
        t.elapsed().as_secs_f64()
    );
    drop(store);

    let config = dir.path().join("bench.toml");
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = [\"{}\"]\n[store]\npath = \"{}\"\n[[targets]]\nname = \"{TARGET}\"\nhours = {{ L = 400.0, R = 40.0, G = 40.0, B = 40.0 }}\n",
            dir.path().display(),
            db.display()
        ),
    )
    .expect("config");
    let bin = env!("CARGO_BIN_EXE_subwatch");
    let time = |args: &[&str]| {
        let t = Instant::now();
        let out = Command::new(bin)
            .args(["report", "--config"])
            .arg(&config)
            .args(["--target", TARGET])
            .args(args)
            .stderr(Stdio::null())
            .output()
            .expect("report");
        assert!(out.status.success(), "report --target {args:?}");
        (t.elapsed().as_secs_f64(), out.stdout.len())
    };
    let (json_s, bytes) = time(&["--json"]);
    println!(
        "report --target --json: {json_s:.2} s ({:.1} MB of JSON)",
        bytes as f64 / 1e6
    );
    let out = dir.path().join("reports");
    let (text_s, _) = time(&[
        "--best-fraction",
        "0.5",
        "--out",
        out.to_str().expect("path"),
    ]);
    println!("report --target --best-fraction 0.5 (text, plot and lists written): {text_s:.2} s");
}
