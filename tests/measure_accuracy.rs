//! The measurement contract's accuracy targets, checked by running the real binary on
//! rendered frames whose truth is known analytically (the PSF's parameters; its
//! pixel-sampled FWHM by numerical integration of the same analytic profile).
//!
//! Targets (from the measurement issue): median FWHM within 3 %, median eccentricity
//! within 0.05, centroid RMS ≤ 0.1 px for SNR > 50, background within 0.5 σ, noise
//! within 5 %, recall ≥ 0.9 for SNR > 20, precision ≥ 0.97.

mod common;

use common::{measure, render_to, score};
use subwatch::frame::write::Encoding;
use subwatch::sim::{PsfShape, SimParams};

fn scenario(seed: u64, psf: PsfShape, fwhm: f64, ecc: f64, angle: f64) -> SimParams {
    SimParams {
        seed,
        star_count: 400,
        psf,
        fwhm_px: fwhm,
        eccentricity: ecc,
        angle_deg: angle,
        hot_pixels: 20,
        cosmic_rays: 30,
        gradient: (0.2, -0.1),
        ..Default::default()
    }
}

/// Render one case, measure it with the real binary, and hold it to every target.
fn meets_the_targets(name: &str, params: SimParams) {
    let dir = tempfile::tempdir().unwrap();
    let (path, truth) = render_to(
        dir.path(),
        &format!("{name}.fits"),
        &params,
        Encoding::Unsigned16,
    );
    let (records, code) = measure(&[&path], true);
    assert_eq!(code, 0);
    let s = score(&records[0], &truth);
    println!("{name}: {s:?}");
    let checks = [
        ("FWHM within 3%", s.fwhm_rel_err.abs() <= 0.03),
        ("eccentricity within 0.05", s.ecc_err.abs() <= 0.05),
        ("centroid RMS <= 0.1 px", s.centroid_rms <= 0.1),
        (
            "background within 0.5 sigma",
            s.background_err_sigma.abs() <= 0.5,
        ),
        ("noise within 5%", s.noise_rel_err.abs() <= 0.05),
        ("recall >= 0.9 (SNR > 20)", s.recall_snr20 >= 0.9),
        ("precision >= 0.97", s.precision >= 0.97),
    ];
    let failures: Vec<String> = checks
        .iter()
        .filter(|(_, ok)| !ok)
        .map(|(what, _)| format!("{name}: {what}: {s:?}"))
        .collect();
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn gaussian_2_0_round() {
    meets_the_targets(
        "gauss-2.0-round",
        scenario(11, PsfShape::Gaussian, 2.0, 0.0, 0.0),
    );
}

/// Undersampled: an optical FWHM of 1.3 px (1.49 px as the pixels sample it). Before the
/// sharp-pixel test looked at the brightest neighbours, the corner pixels of such stars
/// were taken for hot pixels and a fifth of the bright stars went missing.
#[test]
fn gaussian_1_3_undersampled() {
    meets_the_targets(
        "gauss-1.3-round",
        scenario(17, PsfShape::Gaussian, 1.3, 0.0, 0.0),
    );
}

#[test]
fn gaussian_2_5_elongated() {
    meets_the_targets(
        "gauss-2.5-e0.5",
        scenario(12, PsfShape::Gaussian, 2.5, 0.5, 30.0),
    );
}

#[test]
fn moffat_2_5_fwhm_4_elongated() {
    meets_the_targets(
        "moffat2.5-4.0-e0.5",
        scenario(13, PsfShape::Moffat { beta: 2.5 }, 4.0, 0.5, 75.0),
    );
}

#[test]
fn moffat_4_5_fwhm_6_round() {
    meets_the_targets(
        "moffat4.5-6.0-round",
        scenario(14, PsfShape::Moffat { beta: 4.5 }, 6.0, 0.0, 0.0),
    );
}

#[test]
fn moffat_3_fwhm_3_slightly_elongated() {
    meets_the_targets(
        "moffat3.0-3.0-e0.3",
        scenario(15, PsfShape::Moffat { beta: 3.0 }, 3.0, 0.3, 120.0),
    );
}

/// A flat, dark sky stored in coarse steps (24 e⁻ per ADU: the sky's noise is 1.23
/// steps, as on a 12-bit sensor scaled to 16 bits): a plain median and MAD snap to the
/// steps; before they were treated as grouped data this frame read 0.61 σ low in
/// background and 19 % high in noise.
#[test]
fn a_flat_sky_on_coarse_steps() {
    meets_the_targets(
        "coarse-steps-flat-sky",
        SimParams {
            gain_e_per_adu: 24.0,
            gradient: (0.0, 0.0),
            ..scenario(16, PsfShape::Moffat { beta: 3.5 }, 3.5, 0.0, 0.0)
        },
    );
}

/// Faint stars' aperture fluxes against the truth, in units of their own error: the
/// median of (measured − true) / error for stars under SNR 30, and the median ratio
/// measured / true for the brighter ones.
fn flux_bias(record: &serde_json::Value, truth: &subwatch::sim::SimTruth) -> (f64, f64, usize) {
    let mut faint = Vec::new();
    let mut bright = Vec::new();
    for s in record["stars"].as_array().expect("stars") {
        let (x, y) = (s["x"].as_f64().unwrap(), s["y"].as_f64().unwrap());
        let Some(t) = truth
            .stars
            .iter()
            .find(|t| (t.x - x).hypot(t.y - y) < 1.0 && !t.saturated)
        else {
            continue;
        };
        let (flux, err, snr) = (
            s["flux"].as_f64().unwrap(),
            s["flux_err"].as_f64().unwrap(),
            s["snr"].as_f64().unwrap(),
        );
        if snr < 30.0 {
            faint.push((flux - t.flux) / err);
        } else {
            bright.push(flux / t.flux);
        }
    }
    let median = |v: &mut Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let n = faint.len();
    (median(&mut faint), median(&mut bright), n)
}

#[test]
fn faint_fluxes_are_unbiased_when_the_sky_sits_on_coarse_steps() {
    // The coarse-steps frame of the accuracy test: with the local sky's median snapped
    // to the steps, faint stars read 3 σ bright and bright ones 9 % bright.
    let dir = tempfile::tempdir().unwrap();
    let params = SimParams {
        gain_e_per_adu: 24.0,
        gradient: (0.0, 0.0),
        ..scenario(16, PsfShape::Moffat { beta: 3.5 }, 3.5, 0.0, 0.0)
    };
    let (path, truth) = render_to(dir.path(), "coarse.fits", &params, Encoding::Unsigned16);
    let (records, code) = measure(&[&path], true);
    assert_eq!(code, 0);
    let (faint_z, bright_ratio, n) = flux_bias(&records[0], &truth);
    println!("coarse steps: {n} faint stars, median (measured - true)/error {faint_z:+.2}; bright measured/true {bright_ratio:.4}");
    assert!(n >= 30, "{n} faint stars");
    assert!(faint_z.abs() < 0.5, "{faint_z}");
    // A Moffat profile of β 3.5 leaves (1 + (r/α)²)^(1−β) = 0.8 % of its light outside
    // r = 2.5 FWHM (Moffat 1969, enclosed flux; analytic), so bright stars read 0.992,
    // a little less as the sky annulus holds some of the wing too (measured: 0.988).
    assert!((bright_ratio - 0.992).abs() < 0.01, "{bright_ratio}");
}

#[test]
fn float32_and_unsigned16_encodings_measure_the_same() {
    let dir = tempfile::tempdir().unwrap();
    let params = scenario(21, PsfShape::Moffat { beta: 3.5 }, 3.5, 0.2, 10.0);
    let (a, _) = render_to(dir.path(), "u16.fits", &params, Encoding::Unsigned16);
    let (b, _) = render_to(dir.path(), "f32.fits", &params, Encoding::Float32);
    let (r, code) = measure(&[&a, &b], false);
    assert_eq!(code, 0);
    for key in [
        "star_count",
        "fwhm_px",
        "eccentricity",
        "background_adu",
        "noise_adu",
        "snr_median",
    ] {
        let (x, y) = (r[0][key].as_f64().unwrap(), r[1][key].as_f64().unwrap());
        assert!(
            (x - y).abs() <= 1e-6 * x.abs().max(1.0),
            "{key}: {x} vs {y}"
        );
    }
}

#[test]
fn gzip_wrapped_frame_measures_like_the_plain_one() {
    use std::io::Write;
    let dir = tempfile::tempdir().unwrap();
    let params = scenario(31, PsfShape::Gaussian, 3.0, 0.0, 0.0);
    let (plain, _) = render_to(dir.path(), "plain.fits", &params, Encoding::Unsigned16);
    let gz = dir.path().join("wrapped.fits.gz");
    let mut enc = flate2::write::GzEncoder::new(
        std::fs::File::create(&gz).unwrap(),
        flate2::Compression::fast(),
    );
    enc.write_all(&std::fs::read(&plain).unwrap()).unwrap();
    enc.finish().unwrap();
    let (r, code) = measure(&[&plain, &gz], false);
    assert_eq!(code, 0);
    assert_eq!(r[0]["fwhm_px"], r[1]["fwhm_px"]);
    assert_eq!(r[0]["star_count"], r[1]["star_count"]);
}

#[test]
fn color_mosaic_reports_mosaic_positions_widths_and_colors() {
    let dir = tempfile::tempdir().unwrap();
    let mut params = scenario(41, PsfShape::Moffat { beta: 3.0 }, 3.0, 0.0, 0.0);
    params.bayer = subwatch::frame::bayer::BayerPattern::parse("GRBG");
    params.hot_pixels = 0;
    params.cosmic_rays = 0;
    let (path, truth) = render_to(dir.path(), "osc.fits", &params, Encoding::Unsigned16);
    let (r, code) = measure(&[&path], true);
    assert_eq!(code, 0);
    let s = score(&r[0], &truth);
    assert!(s.fwhm_rel_err.abs() < 0.03, "{s:?}");
    assert!(s.recall_snr20 >= 0.9 && s.precision >= 0.97, "{s:?}");
    // Color: the measured R/G and B/G of bright stars follow the rendered weights.
    let mut ratios = Vec::new();
    for star in r[0]["stars"].as_array().unwrap() {
        if star["snr"].as_f64().unwrap() < 50.0 {
            continue;
        }
        let (x, y) = (star["x"].as_f64().unwrap(), star["y"].as_f64().unwrap());
        let t = truth
            .stars
            .iter()
            .min_by(|a, b| {
                (a.x - x)
                    .hypot(a.y - y)
                    .total_cmp(&(b.x - x).hypot(b.y - y))
            })
            .unwrap();
        let w = t.rgb_weights.unwrap();
        let rgb: Vec<f64> = star["rgb"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        ratios.push((rgb[0] / rgb[1]) / (w[0] / w[1]));
        ratios.push((rgb[2] / rgb[1]) / (w[2] / w[1]));
    }
    ratios.sort_by(f64::total_cmp);
    let median = ratios[ratios.len() / 2];
    assert!(
        ratios.len() > 20 && (median - 1.0).abs() < 0.03,
        "median color ratio {median}"
    );
}
