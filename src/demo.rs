//! `subwatch demo`: a whole invented night at the invented Kestrel Ridge Observatory,
//! end to end through the real daemon path. A previous night goes into the store first;
//! then tonight's frames are written into the watched folder the way a capture program
//! writes them (in pieces, some under a temporary name then renamed), the daemon measures,
//! records, judges and alerts, and the morning summary (HTML, plots, CSV, and the mail as
//! an .eml file) is produced. A shell over `sim`, `watch`, `store` and `morning`.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use crate::config::Config;
use crate::contract::NightDocument;
use crate::frame::write::{write_frame, Encoding};
use crate::record::Identity;
use crate::sim::night::{render_night, NightFrame, NightPlan};
use crate::store::Store;

#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    #[error("{0}")]
    Folder(String),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(transparent)]
    Frame(#[from] crate::frame::FrameError),
    #[error(transparent)]
    Store(#[from] crate::store::StoreError),
    #[error(transparent)]
    Morning(#[from] crate::morning::MorningError),
    #[error(transparent)]
    Watch(#[from] crate::watch::WatchError),
    #[error("the daemon measured {done} of {total} frames in time")]
    Timeout { done: usize, total: usize },
}

pub struct DemoOutcome {
    pub out: PathBuf,
    pub night: String,
    pub doc: NightDocument,
    pub html: PathBuf,
    pub csv: PathBuf,
    pub json: PathBuf,
    pub mails: Vec<PathBuf>,
    pub seconds: f64,
}

const MARKER: &str = ".subwatch-demo";
/// An invented site (not a real observatory): its latitude, east longitude, height.
pub const SITE: (f64, f64, f64) = (39.4172, -2.0865, 1210.0);
const FIELD_A: (f64, f64) = (246.5, 27.6);
const NIGHT: &str = "2026-03-14";

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> DemoError + '_ {
    move |source| DemoError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// The demo's configuration (what a user would write in subwatch.toml).
/// `page`: where the status page is served during the night, if anywhere.
pub fn demo_config(out: &Path, page: Option<std::net::SocketAddr>) -> Config {
    let mut c = Config::default();
    c.web.listen = page;
    c.watch.folders = vec![out.join("capture")];
    c.watch.settle_seconds = 0.3;
    c.watch.rescan_seconds = 5.0;
    c.store.path = out.join("state").join("subwatch.db");
    c.site.latitude = Some(SITE.0);
    c.site.longitude = Some(SITE.1);
    c.site.elevation_m = SITE.2;
    c.site.timezone = chrono_tz::Europe::Madrid;
    c.mail.from = "subwatch@kestrel-ridge.example".parse().ok();
    c.mail.to = "observer@kestrel-ridge.example"
        .parse()
        .into_iter()
        .collect();
    c.report.folder = Some(out.join("reports"));
    c.actions.accepted_lists = true;
    c.actions.lists_folder = Some(out.join("accepted"));
    c
}

fn iso(t: f64) -> String {
    chrono::DateTime::from_timestamp(t as i64, 0)
        .map(|d| d.format("%Y-%m-%dT%H:%M:%S").to_string())
        .unwrap_or_default()
}

/// Render the nights: (previous night's frames, tonight's frames in time order, folder
/// of each of tonight's frames).
fn render_all(
    progress: &mut dyn FnMut(&str, usize, usize),
) -> (Vec<NightFrame>, Vec<(NightFrame, &'static str)>) {
    // Astronomical dawn at the site on the morning of the 15th: tonight ends in twilight.
    let evening = crate::frame::header::parse_iso_time("2026-03-14T18:00:00").unwrap_or(0.0);
    let dawn = crate::sky::sun_crossings(evening, -18.0, SITE.0, SITE.1)
        .1
        .unwrap_or(evening + 40_000.0);
    let cadence = 150.0;
    let mut a = NightPlan::full(41);
    a.center_deg = FIELD_A;
    a.new_source = true;
    a.twilight_from = Some(36);
    a.start = iso(dawn - 35.6 * cadence);
    let mut b = NightPlan::full(42).quiet();
    b.object = "Kestrel Field B".into();
    b.center_deg = (262.0, -12.4);
    b.field_seed = 91;
    b.bayer = crate::frame::bayer::BayerPattern::parse("RGGB");
    b.red_star = true;
    b.frames = 10;
    b.start = iso(dawn - 35.6 * cadence - 11.0 * cadence - 600.0);
    let mut prev = NightPlan::full(40).quiet();
    prev.center_deg = FIELD_A;
    prev.frames = 8;
    prev.start = iso(dawn - 86_400.0 - 20.0 * cadence);
    progress("rendering the previous night", 0, 3);
    let (previous, _) = render_night(&prev);
    progress("rendering tonight (color target)", 1, 3);
    let (color, _) = render_night(&b);
    progress("rendering tonight (Kestrel Field A)", 2, 3);
    let (mono, _) = render_night(&a);
    progress("rendered", 3, 3);
    let mut tonight: Vec<(NightFrame, &'static str)> =
        color.into_iter().map(|f| (f, "kestrel-field-b")).collect();
    tonight.extend(mono.into_iter().map(|f| (f, "kestrel-field-a")));
    (previous, tonight)
}

/// Run the demo into `out` (created; refused when it holds anything but an earlier demo).
pub fn run(
    out: &Path,
    page: Option<std::net::SocketAddr>,
    progress: &mut dyn FnMut(&str, usize, usize),
) -> Result<DemoOutcome, DemoError> {
    let started = Instant::now();
    if out.exists() {
        let empty = std::fs::read_dir(out).map_err(io(out))?.next().is_none();
        if !empty && !out.join(MARKER).exists() {
            return Err(DemoError::Folder(format!(
                "{} is not empty and not an earlier demo's folder; choose another with --out",
                out.display()
            )));
        }
        if !empty {
            std::fs::remove_dir_all(out).map_err(io(out))?;
        }
    }
    for sub in [
        "capture/kestrel-field-a",
        "capture/kestrel-field-b",
        "capture/calibration",
        "state",
        "previous",
        "scratch",
    ] {
        std::fs::create_dir_all(out.join(sub)).map_err(io(out))?;
    }
    std::fs::write(out.join(MARKER), b"made by subwatch demo\n").map_err(io(out))?;
    let out = std::fs::canonicalize(out).map_err(io(out))?;
    let config = demo_config(&out, page);

    let (previous, tonight) = render_all(progress);

    // The previous night goes straight into the store, as the daemon would have left it.
    {
        let mut store = Store::open(&config.store.path)?;
        let options = crate::pipeline::RecordOptions::from_config(&config);
        let reader = crate::reader::Reader::from_config(&config.measure);
        let judging = crate::watch::Judging {
            rules: Vec::new(),
            site: config.site_position(),
            lists: None,
        };
        let mut label = None;
        for f in &previous {
            let path = out.join("previous").join(&f.name);
            write_frame(&path, &f.pixels, Encoding::Unsigned16, &f.keys)?;
            let identity = Identity::of(&path).map_err(io(&path))?;
            let rec = reader.record(&path, identity, f.time_unix, &options);
            label = rec.night.clone();
            if let Some(id) = store.record_frame(&rec, f.time_unix)?.id() {
                crate::watch::judge_in_store(&store, &rec, id, &judging)?;
            }
        }
        if let Some(n) = label {
            let records = store.night_records(&n)?;
            crate::batch::analyse_records(
                &records,
                &[],
                config.site_position(),
                crate::batch::Catalogues::Keep(&mut store),
                &config.calibration.settings,
            )?;
        }
    }

    // Tonight, through the daemon.
    let stop = Arc::new(AtomicBool::new(false));
    let daemon = {
        let (config, stop) = (config.clone(), stop.clone());
        std::thread::spawn(move || crate::watch::run_until(config, stop))
    };
    std::thread::sleep(Duration::from_millis(300));
    // The evening's calibration set, with one frame of each fault, lands first.
    let calibration = crate::sim::calibration::demo_set(768, "2026-03-14T18:45:00");
    for f in &calibration {
        let dest = out.join("capture").join("calibration").join(&f.name);
        let tmp = dest.with_extension("fits.part");
        write_frame(&tmp, &f.pixels, Encoding::Unsigned16, &f.keys)?;
        std::fs::rename(&tmp, &dest).map_err(io(&dest))?;
    }
    let total = tonight.len() + calibration.len();
    for (k, (f, folder)) in tonight.iter().enumerate() {
        let scratch = out.join("scratch").join(&f.name);
        write_frame(&scratch, &f.pixels, Encoding::Unsigned16, &f.keys)?;
        let bytes = std::fs::read(&scratch).map_err(io(&scratch))?;
        std::fs::remove_file(&scratch).map_err(io(&scratch))?;
        let dest = out.join("capture").join(folder).join(&f.name);
        if k % 3 == 0 {
            // A temporary name, then renamed into place.
            let tmp = dest.with_extension("fits.part");
            std::fs::write(&tmp, &bytes).map_err(io(&tmp))?;
            std::fs::rename(&tmp, &dest).map_err(io(&dest))?;
        } else {
            // Written in two pieces, a moment apart.
            let mut file = std::fs::File::create(&dest).map_err(io(&dest))?;
            let half = bytes.len() / 2;
            file.write_all(&bytes[..half]).map_err(io(&dest))?;
            file.flush().map_err(io(&dest))?;
            std::thread::sleep(Duration::from_millis(40));
            file.write_all(&bytes[half..]).map_err(io(&dest))?;
        }
        progress("capturing", calibration.len() + k + 1, total);
        std::thread::sleep(Duration::from_millis(60));
    }
    // Wait until every frame is recorded and judged.
    let deadline = Instant::now() + Duration::from_secs(180);
    let done = loop {
        let judged = Store::open(&config.store.path)
            .and_then(|s| s.night_counts(NIGHT))
            .map(|c| c.frames as usize)
            .unwrap_or(0);
        progress("measuring", judged.min(total), total);
        if judged >= total || Instant::now() > deadline {
            break judged;
        }
        std::thread::sleep(Duration::from_millis(200));
    };
    std::thread::sleep(Duration::from_millis(300));
    stop.store(true, Ordering::Relaxed);
    match daemon.join() {
        Ok(r) => r?,
        Err(_) => return Err(DemoError::Folder("the daemon thread failed".into())),
    }
    if done < total {
        return Err(DemoError::Timeout { done, total });
    }

    // The morning.
    progress("writing the morning summary", 0, 1);
    let mut store = Store::open(&config.store.path)?;
    let prepared = crate::morning::prepare(&mut store, &config, NIGHT)?;
    let now = prepared
        .doc
        .frames
        .iter()
        .filter_map(|f| f.time_unix)
        .fold(0.0, f64::max)
        + 3600.0;
    crate::morning::queue_mail(&store, &config, &prepared, now)?;
    let flushed = crate::morning::flush(&store, &config, now)?;
    let json = crate::morning::report_folder(&config).join(format!("night-{NIGHT}.json"));
    std::fs::write(
        &json,
        serde_json::to_vec_pretty(&prepared.doc).unwrap_or_default(),
    )
    .map_err(io(&json))?;
    let _ = std::fs::remove_dir(out.join("scratch"));
    progress("done", 1, 1);
    let mut mails = flushed.written;
    if let Ok(dir) = std::fs::read_dir(crate::morning::report_folder(&config)) {
        for e in dir.flatten() {
            if e.path().extension().is_some_and(|x| x == "eml") && !mails.contains(&e.path()) {
                mails.push(e.path());
            }
        }
    }
    mails.sort();
    Ok(DemoOutcome {
        out,
        night: NIGHT.into(),
        html: prepared.html_path,
        csv: prepared.csv_path,
        json,
        mails,
        doc: prepared.doc,
        seconds: started.elapsed().as_secs_f64(),
    })
}
