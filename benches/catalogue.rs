//! The catalogue's costs, measured in one run: importing a generated million-star CSV,
//! a frame-sized cone query from it (cold and warm), and the sky fit of a night's frames
//! with no WCS (per frame, against the frame's measurement), plus the fit of a frame whose
//! field is not in the catalogue (every tile searched before it is refused).
//! `cargo bench --bench catalogue`.

use std::time::Instant;

use subwatch::frame::cards::OutValue;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::pipeline::{record_file, RecordOptions};
use subwatch::sim::night::{field_on_sky, render_night, NightPlan};

/// A deterministic pseudo-random sequence in [0, 1) (SplitMix64).
fn uniform(state: &mut u64) -> f64 {
    *state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
}

fn main() {
    let dir = tempfile::tempdir().expect("temp dir");
    let mut plan = NightPlan::full(5).quiet();
    plan.frames = 30;
    plan.width = 1024;
    plan.height = 768;
    plan.star_count = 400;
    plan.cosmic_rays_per_frame = 0.0;
    plan.hot_pixels = 0;
    // The field's own stars, then a million more over the whole sky (uniform on the
    // sphere) and a quarter of them around the field, too faint for the frames, as a
    // deep survey export would hold.
    let mut csv = String::from("id,ra_deg,dec_deg,mag\n");
    for (k, (ra, dec, flux_s, _, _)) in field_on_sky(&plan).into_iter().enumerate() {
        csv.push_str(&format!(
            "F{k},{ra:.7},{dec:.7},{:.3}\n",
            25.0 - 2.5 * flux_s.log10()
        ));
    }
    let mut state = 42u64;
    for k in 0..1_000_000u32 {
        let (ra, dec) = if k % 4 == 0 {
            // Around the field: 3 degrees square.
            (
                plan.center_deg.0 + (uniform(&mut state) - 0.5) * 3.0,
                plan.center_deg.1 + (uniform(&mut state) - 0.5) * 3.0,
            )
        } else {
            (
                uniform(&mut state) * 360.0,
                (2.0 * uniform(&mut state) - 1.0).asin().to_degrees(),
            )
        };
        // Around the field, fainter than the frames reach (a catalogue deeper than the
        // camera); elsewhere any magnitude.
        let mag = if k % 4 == 0 {
            23.0 + 2.0 * uniform(&mut state)
        } else {
            12.0 + 9.0 * uniform(&mut state).powf(0.3)
        };
        csv.push_str(&format!("R{k},{ra:.7},{dec:.7},{mag:.3}\n"));
    }
    let catalogue = dir.path().join("stars.csv");
    std::fs::write(&catalogue, &csv).expect("write catalogue");
    let mut config = subwatch::config::Config::default();
    config.catalogue.files = vec![catalogue];
    config.catalogue.index = Some(dir.path().join("index.sqlite"));
    let t = Instant::now();
    let imported = subwatch::catalogue_import::ensure(&config.catalogue, true)
        .expect("import")
        .expect("configured");
    println!(
        "import: {} stars ({:.0} MB of CSV) indexed in {:.1} s",
        imported.stars,
        csv.len() as f64 / 1e6,
        t.elapsed().as_secs_f64()
    );
    let index =
        subwatch::store::catalogue_index::CatalogueIndex::open(&imported.index).expect("open");
    for (label, radius) in [
        ("frame-sized cone (0.5°)", 0.5),
        ("search cone (1.8°)", 1.8),
    ] {
        let mut times = Vec::new();
        let mut found = 0;
        for k in 0..50 {
            let ra = plan.center_deg.0 + 0.01 * f64::from(k);
            let t = Instant::now();
            found = index
                .cone_positions(ra, plan.center_deg.1, radius)
                .expect("cone")
                .len();
            times.push(t.elapsed().as_secs_f64() * 1e3);
        }
        let cold = times[0];
        times.sort_by(f64::total_cmp);
        println!(
            "cone query, {label}: {found} stars; first {cold:.1} ms, median {:.1} ms",
            times[times.len() / 2]
        );
    }
    // A night of frames without WCS: pointing keywords only.
    let (frames, _) = render_night(&plan);
    let mut with_sky = RecordOptions::from_config(&config);
    with_sky.measure_calibration = false;
    let without_sky = RecordOptions {
        sky: None,
        ..with_sky.clone()
    };
    let mut fitted = 0;
    let (mut t_with, mut t_without) = (0.0, 0.0);
    for f in &frames {
        let mut keys = f.keys.clone();
        keys.retain(|(k, _)| {
            !["CTYPE", "CRPIX", "CRVAL", "CD1_", "CD2_"]
                .iter()
                .any(|p| k.starts_with(p))
        });
        keys.push(("RA".into(), OutValue::Real(plan.center_deg.0 + 0.3)));
        keys.push(("DEC".into(), OutValue::Real(plan.center_deg.1 - 0.2)));
        let path = dir.path().join(&f.name);
        write_frame(&path, &f.pixels, Encoding::Unsigned16, &keys).expect("write");
        let id = subwatch::walk::identity(&path).expect("identity");
        let t = Instant::now();
        let plain = record_file(&path, id.clone(), f.time_unix, &without_sky);
        t_without += t.elapsed().as_secs_f64();
        let t = Instant::now();
        let rec = record_file(&path, id, f.time_unix, &with_sky);
        t_with += t.elapsed().as_secs_f64();
        assert_eq!(plain.stars.len(), rec.stars.len());
        fitted += usize::from(rec.metrics.as_ref().is_some_and(|m| m.sky_fit.is_some()));
    }
    let n = frames.len() as f64;
    println!(
        "sky fit: {fitted} of {} frames of 1024x768 fitted; measuring {:.0} ms per frame, with the fit {:.0} ms: the fit costs {:.0} ms per frame ({:.2} of the measurement), {:.1} s for the night",
        frames.len(),
        1e3 * t_without / n,
        1e3 * t_with / n,
        1e3 * (t_with - t_without) / n,
        (t_with - t_without) / t_without,
        t_with - t_without
    );
    // A frame of a field the catalogue does not hold: every tile is searched.
    let mut elsewhere = plan.clone();
    elsewhere.field_seed = 999;
    elsewhere.frames = 1;
    let (other, _) = render_night(&elsewhere);
    let mut keys = other[0].keys.clone();
    keys.retain(|(k, _)| {
        !["CTYPE", "CRPIX", "CRVAL", "CD1_", "CD2_"]
            .iter()
            .any(|p| k.starts_with(p))
    });
    keys.push(("RA".into(), OutValue::Real(plan.center_deg.0)));
    keys.push(("DEC".into(), OutValue::Real(plan.center_deg.1)));
    let path = dir.path().join("elsewhere.fits");
    write_frame(&path, &other[0].pixels, Encoding::Unsigned16, &keys).expect("write");
    let id = subwatch::walk::identity(&path).expect("identity");
    let t = Instant::now();
    let plain = record_file(&path, id.clone(), 0.0, &without_sky);
    let t_plain = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let rec = record_file(&path, id, 0.0, &with_sky);
    let t_all = t.elapsed().as_secs_f64();
    assert_eq!(plain.stars.len(), rec.stars.len());
    println!(
        "a field not in the catalogue: {} (search of every tile {:.2} s)",
        if rec.metrics.as_ref().is_some_and(|m| m.sky_fit.is_some()) {
            "WRONGLY fitted"
        } else {
            "refused"
        },
        t_all - t_plain
    );
}
