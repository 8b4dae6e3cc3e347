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
    /// The morning's line for each planned target imaged tonight.
    pub plans: Vec<String>,
}

const MARKER: &str = ".subwatch-demo";
/// An invented site (not a real observatory): its latitude, east longitude, height.
pub const SITE: (f64, f64, f64) = (39.4172, -2.0865, 1210.0);
const FIELD_A: (f64, f64) = (246.5, 27.6);
const FIELD_C: (f64, f64) = (231.8, 48.3);
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
    // The observatory's catalogue of its fields, in V and I.
    c.catalogue.files = vec![out.join("catalogue").join("kestrel-fields.csv")];
    c.catalogue.index = Some(out.join("state").join("catalogue-index.sqlite"));
    c.catalogue.columns.mags = vec![
        ("vmag".into(), Some("V".into())),
        ("imag".into(), Some("I".into())),
    ];
    c.catalogue.filter_bands = vec![("L".into(), "V".into())];
    c.catalogue.search_deg = 1.0;
    // Field A is a project of several nights: the night before tonight is in the store.
    c.targets = vec![crate::season::plan::TargetPlan {
        name: "Kestrel Field A".into(),
        hours: vec![("L".into(), PLAN_HOURS)],
    }];
    c
}

/// The hours of L the demo's observer plans for Kestrel Field A.
pub const PLAN_HOURS: f64 = 4.0;

/// The plans of Kestrel Field C, imaged through V then I, with one star far brighter in
/// I than its color says.
fn field_c_plans(start: f64, cadence: f64) -> [NightPlan; 2] {
    let base = NightPlan {
        object: "Kestrel Field C".into(),
        center_deg: FIELD_C,
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
        start: iso(start),
        ..base.clone()
    };
    let i = NightPlan {
        seed: 44,
        filter: "I".into(),
        color_term: 1.0,
        band_star_factor: Some(BAND_STAR_FACTOR),
        start: iso(start + 6.0 * cadence),
        ..base
    };
    [v, i]
}

/// How much brighter the star of Field C is in I than in V (2.26 mag).
const BAND_STAR_FACTOR: f64 = 8.0;

/// The catalogue of the demo's fields, as an observatory would have prepared it: every
/// star of Fields A and C with V and I magnitudes (V from the flux a 1 e⁻/ADU camera
/// collects, 25 − 2.5 log10(e⁻/s); I from the star's color). Tonight's new source is not
/// in it, as it would not be.
fn catalogue_csv(plans: &[&NightPlan]) -> String {
    let mut out = String::from("id,ra_deg,dec_deg,vmag,imag\n");
    for (k, plan) in plans.iter().enumerate() {
        for (n, (ra, dec, flux_s, color, band_star)) in crate::sim::night::field_on_sky(plan)
            .into_iter()
            .enumerate()
        {
            let v = 25.0 - 2.5 * flux_s.log10();
            let i = if band_star {
                v - 2.5 * BAND_STAR_FACTOR.log10()
            } else {
                v - color
            };
            out.push_str(&format!(
                "KRC-{}{n:04},{ra:.7},{dec:.7},{v:.3},{i:.3}\n",
                ["A", "C"][k.min(1)]
            ));
        }
    }
    out
}

/// A frame as a capture program without a sky solution writes it: the mount's pointing
/// (RA, DEC) instead of a WCS.
fn pointing_only(keys: &mut Vec<(String, crate::frame::cards::OutValue)>, centre: (f64, f64)) {
    const WCS: [&str; 10] = [
        "CTYPE1", "CTYPE2", "CRPIX1", "CRPIX2", "CRVAL1", "CRVAL2", "CD1_1", "CD1_2", "CD2_1",
        "CD2_2",
    ];
    keys.retain(|(k, _)| !WCS.contains(&k.as_str()));
    keys.push(("RA".into(), crate::frame::cards::OutValue::Real(centre.0)));
    keys.push(("DEC".into(), crate::frame::cards::OutValue::Real(centre.1)));
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
) -> (Vec<NightFrame>, Vec<(NightFrame, &'static str)>, String) {
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
    b.start = iso(b_start_minus(dawn, cadence));
    let [c_v, c_i] = field_c_plans(b_start_minus(dawn, cadence) - 13.0 * cadence, cadence);
    let mut prev = NightPlan::full(40).quiet();
    prev.center_deg = FIELD_A;
    prev.frames = 8;
    prev.start = iso(dawn - 86_400.0 - 20.0 * cadence);
    progress("rendering the previous night", 0, 4);
    let (previous, _) = render_night(&prev);
    progress("rendering tonight (two filters)", 1, 4);
    let (mut band_frames, _) = render_night(&c_v);
    band_frames.extend(render_night(&c_i).0);
    progress("rendering tonight (color target)", 2, 4);
    let (color, _) = render_night(&b);
    progress("rendering tonight (Kestrel Field A)", 3, 4);
    let (mut mono, _) = render_night(&a);
    progress("rendered", 4, 4);
    // Fields A and C come without a sky solution in their headers: subwatch fits them.
    for f in &mut mono {
        pointing_only(&mut f.keys, FIELD_A);
    }
    for f in &mut band_frames {
        pointing_only(&mut f.keys, FIELD_C);
    }
    let mut tonight: Vec<(NightFrame, &'static str)> = band_frames
        .into_iter()
        .map(|f| (f, "kestrel-field-c"))
        .collect();
    tonight.extend(color.into_iter().map(|f| (f, "kestrel-field-b")));
    tonight.extend(mono.into_iter().map(|f| (f, "kestrel-field-a")));
    (previous, tonight, catalogue_csv(&[&a, &c_v]))
}

/// When the color target's sequence starts: before Field A's, which ends in twilight.
fn b_start_minus(dawn: f64, cadence: f64) -> f64 {
    dawn - 35.6 * cadence - 11.0 * cadence - 600.0
}

/// Run the demo into `out` (created; refused when it holds anything but an earlier demo).
pub fn run(
    out: &Path,
    page: Option<std::net::SocketAddr>,
    progress: &mut dyn FnMut(&str, usize, usize),
) -> Result<DemoOutcome, DemoError> {
    let started = Instant::now();
    let out = prepare_folder(out)?;
    let config = demo_config(&out, page);

    let (previous, tonight, catalogue) = render_all(progress);
    let catalogue_path = &config.catalogue.files[0];
    std::fs::write(catalogue_path, catalogue).map_err(io(catalogue_path))?;
    crate::catalogue_import::ensure(&config.catalogue, false)
        .map_err(|e| DemoError::Folder(format!("the demo's catalogue: {e}")))?;
    record_previous(&config, &out, &previous)?;
    capture_tonight(&config, &out, &tonight, progress)?;

    // The morning.
    progress("writing the morning summary", 0, 1);
    let mut store = Store::open_for_rig(&config.store.path, &config.rig.name)?;
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
        plans: prepared.summary.plans.clone(),
        doc: prepared.doc,
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// The demo's folder, emptied if an earlier demo left it, with its parts made; its
/// canonical path.
fn prepare_folder(out: &Path) -> Result<PathBuf, DemoError> {
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
        "capture/kestrel-field-c",
        "catalogue",
        "capture/calibration",
        "state",
        "previous",
        "scratch",
    ] {
        std::fs::create_dir_all(out.join(sub)).map_err(io(out))?;
    }
    std::fs::write(out.join(MARKER), b"made by subwatch demo\n").map_err(io(out))?;
    crate::os::canonical(out).map_err(io(out))
}

/// The previous night straight into the store, as the daemon would have left it: each
/// frame recorded and judged, the night's catalogue kept.
fn record_previous(config: &Config, out: &Path, previous: &[NightFrame]) -> Result<(), DemoError> {
    let mut store = Store::open_for_rig(&config.store.path, &config.rig.name)?;
    let options = crate::pipeline::RecordOptions::from_config(config);
    let reader = crate::reader::Reader::from_config(&config.measure);
    let judging = crate::watch::Judging {
        rules: Vec::new(),
        site: config.site_position(),
        lists: None,
        calibration: config.calibration.settings.clone(),
    };
    let mut label = None;
    for f in previous {
        let path = out.join("previous").join(&f.name);
        write_frame(&path, &f.pixels, Encoding::Unsigned16, &f.keys)?;
        let identity = crate::walk::identity(&path).map_err(io(&path))?;
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
    Ok(())
}

/// Tonight through the real daemon in a thread: the evening's calibration set, then
/// every frame written into its watched folder as a capture program would; until every
/// frame is recorded and judged.
fn capture_tonight(
    config: &Config,
    out: &Path,
    tonight: &[(NightFrame, &'static str)],
    progress: &mut dyn FnMut(&str, usize, usize),
) -> Result<(), DemoError> {
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
        let judged = Store::open_for_rig(&config.store.path, &config.rig.name)
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
    Ok(())
}
