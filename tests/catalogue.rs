//! The star catalogue through the real binary: `catalogue import` names a bad row's file,
//! row and column and survives a hostile FITS table; `measure --config` fits a frame with
//! no WCS to the catalogue and places its stars where the frame's true WCS puts them.
//! Accuracy against astropy lives in tests/crosscheck/skyfit_crosscheck.py.

mod common;

use std::path::Path;
use std::process::Command;

use subwatch::frame::cards::OutValue;
use subwatch::frame::wcs::Wcs;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::{base_cd, render, SimParams};

fn config(dir: &Path, files: &[&str]) -> std::path::PathBuf {
    let list: Vec<String> = files
        .iter()
        .map(|f| format!("\"{}\"", dir.join(f).display()))
        .collect();
    let text = format!(
        "[watch]\nfolders = [\"{d}\"]\n[store]\npath = \"{d}/store.sqlite\"\n[catalogue]\nfiles = [{}]\nindex = \"{d}/index.sqlite\"\n",
        list.join(", "),
        d = dir.display()
    );
    let path = dir.join("subwatch.toml");
    std::fs::write(&path, text).unwrap();
    path
}

fn import(config: &Path) -> (i32, String, String) {
    let out = Command::new(common::binary())
        .args(["catalogue", "import", "--config"])
        .arg(config)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn a_bad_row_is_named_by_file_row_and_column() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("stars.csv"),
        "id,ra_deg,dec_deg,mag\nA,10.0,20.0,12.1\nB,10.1,twenty,12.5\n",
    )
    .unwrap();
    let (code, _, err) = import(&config(dir.path(), &["stars.csv"]));
    assert_ne!(code, 0);
    assert!(
        err.contains("stars.csv: row 2 (line 3), column \"dec_deg\": \"twenty\" is not a number"),
        "{err}"
    );
    // A missing column names the columns there are.
    std::fs::write(dir.path().join("stars.csv"), "id,ra,dec_deg,mag\n").unwrap();
    let (code, _, err) = import(&config(dir.path(), &["stars.csv"]));
    assert_ne!(code, 0);
    assert!(err.contains("no column \"ra_deg\""), "{err}");
}

/// A catalogue edited mid-night with a bad row: the daemon still starts and records
/// frames (with the index of the catalogue's last good version), `report` still
/// reports, and the problem is said with its file, row and column; `check-config` says
/// it too and fails, without writing anything.
#[test]
fn a_bad_row_added_mid_night_stops_nothing_and_is_said() {
    let s = common::daemon::site("");
    let stars = s.root.join("stars.csv");
    std::fs::write(&stars, "id,ra_deg,dec_deg,mag\nA,10.0,20.0,12.1\n").unwrap();
    let mut text = std::fs::read_to_string(&s.config).unwrap();
    text.push_str(&format!(
        "[catalogue]\nfiles = [\"{}\"]\nindex = \"{}\"\n",
        stars.display(),
        s.root.join("index.sqlite").display()
    ));
    std::fs::write(&s.config, text).unwrap();
    assert_eq!(import(&s.config).0, 0);
    let index_before = std::fs::read(s.root.join("index.sqlite")).unwrap();
    let mut csv = std::fs::read_to_string(&stars).unwrap();
    csv.push_str("BAD,NaN,1,2\n");
    std::fs::write(&stars, csv).unwrap();
    let check = Command::new(common::binary())
        .args(["check-config", "--config"])
        .arg(&s.config)
        .output()
        .unwrap();
    let said = String::from_utf8_lossy(&check.stdout);
    assert_eq!(check.status.code(), Some(1), "{said}");
    assert!(
        said.contains("stars.csv: row 2 (line 3), column \"ra_deg\": \"NaN\" is not a number"),
        "{said}"
    );
    let d = common::daemon::Logged::start(&s.config);
    assert!(
        d.wait_log(" started: config", std::time::Duration::from_secs(20)),
        "{}",
        d.log()
    );
    std::fs::write(
        s.capture.join("kfa_001.fits"),
        common::daemon::frame_bytes(7, &s.root, "Light"),
    )
    .unwrap();
    let rows = common::daemon::wait_for(&s.db, 1, std::time::Duration::from_secs(30));
    let log = d.stop();
    assert_eq!(rows.len(), 1, "{log}");
    assert_eq!(rows[0].1, "ok", "{rows:?}");
    assert!(
        log.contains("row 2 (line 3), column \"ra_deg\": \"NaN\" is not a number")
            && log.contains("last good version stays in use"),
        "{log}"
    );
    assert_eq!(
        std::fs::read(s.root.join("index.sqlite")).unwrap(),
        index_before,
        "the last good index is kept as it was"
    );
    let report = Command::new(common::binary())
        .args(["report", "--json", "--config"])
        .arg(&s.config)
        .output()
        .unwrap();
    assert_eq!(
        report.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&report.stderr)
    );
}

#[test]
fn a_hostile_fits_table_is_an_error_not_a_crash() {
    // A primary header, then a BINTABLE promising 10^15 rows of one 8-byte column.
    let card = |s: &str| format!("{s:<80}");
    let mut bytes = String::new();
    for c in [
        "SIMPLE  =                    T",
        "BITPIX  =                    8",
        "NAXIS   =                    0",
        "END",
    ] {
        bytes.push_str(&card(c));
    }
    while bytes.len() % 2880 != 0 {
        bytes.push(' ');
    }
    for c in [
        "XTENSION= 'BINTABLE'",
        "BITPIX  =                    8",
        "NAXIS   =                    2",
        "NAXIS1  =                   24",
        "NAXIS2  =     1000000000000000",
        "PCOUNT  =                    0",
        "GCOUNT  =                    1",
        "TFIELDS =                    3",
        "TTYPE1  = 'ra_deg  '",
        "TFORM1  = 'D       '",
        "TTYPE2  = 'dec_deg '",
        "TFORM2  = 'D       '",
        "TTYPE3  = 'mag     '",
        "TFORM3  = 'D       '",
        "END",
    ] {
        bytes.push_str(&card(c));
    }
    while bytes.len() % 2880 != 0 {
        bytes.push(' ');
    }
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("stars.fits"), bytes).unwrap();
    let (code, _, err) = import(&config(dir.path(), &["stars.fits"]));
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("stars.fits")
            && err.contains(
                "the table promises 1000000000000000 rows of 24 bytes; the file ends in row 1"
            ),
        "{err}"
    );
}

#[test]
fn a_frame_without_wcs_is_fitted_to_the_catalogue() {
    let dir = tempfile::tempdir().unwrap();
    let params = SimParams {
        width: 800,
        height: 600,
        star_count: 250,
        rotation_deg: 37.0,
        center_deg: (84.25, 27.6),
        scale_arcsec: 1.94,
        psf: subwatch::sim::PsfShape::Gaussian,
        fwhm_px: 3.0,
        seed: 11,
        ..Default::default()
    };
    let (pixels, mut keys, truth) = render(&params);
    let wcs = Wcs {
        crpix: [400.5, 300.5],
        crval: [84.25, 27.6],
        cd: base_cd(1.94, 37.0),
        lonpole: 180.0,
        sip: None,
    };
    // The catalogue: every rendered star at its true position, magnitudes from the flux
    // per second (25 − 2.5 log10(ADU/s)), plus stars too faint to see.
    let mut csv = String::from("id,ra_deg,dec_deg,mag\n");
    for (k, s) in truth.stars.iter().enumerate() {
        let (ra, dec) = wcs.pixel_to_sky(s.x, s.y);
        let mag = 25.0 - 2.5 * (s.flux / 120.0).log10();
        csv.push_str(&format!("S{k},{ra:.8},{dec:.8},{mag:.4}\n"));
    }
    for k in 0..400 {
        let (x, y) = (
            (k * 37 % 1400) as f64 - 300.0,
            (k * 53 % 1100) as f64 - 250.0,
        );
        let (ra, dec) = wcs.pixel_to_sky(x, y);
        csv.push_str(&format!("F{k},{ra:.8},{dec:.8},24.5\n"));
    }
    std::fs::write(dir.path().join("stars.csv"), csv).unwrap();
    // The header as a capture program without a solution writes it: pointing only, half
    // a degree off, and the focal length 7 % long.
    keys.retain(|(k, _)| {
        !k.starts_with("CTYPE")
            && !k.starts_with("CRPIX")
            && !k.starts_with("CRVAL")
            && !k.starts_with("CD")
    });
    for (k, v) in keys.iter_mut() {
        if k == "FOCALLEN" {
            if let OutValue::Real(f) = v {
                *f *= 1.07;
            }
        }
    }
    keys.push(("RA".into(), OutValue::Real(84.25 + 0.4)));
    keys.push(("DEC".into(), OutValue::Real(27.6 - 0.3)));
    let frame = dir.path().join("frame.fits");
    write_frame(&frame, &pixels, Encoding::Unsigned16, &keys).unwrap();
    let cfg = config(dir.path(), &["stars.csv"]);
    let out = Command::new(common::binary())
        .args(["measure", "--json", "--stars", "--config"])
        .arg(&cfg)
        .arg(&frame)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let rec: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let fit = &rec["sky_fit"];
    assert_eq!(fit["source"], "fitted", "{rec}");
    assert!(fit["matched"].as_u64().unwrap() >= 50, "{fit}");
    assert!(fit["chance_log10"].as_f64().unwrap() < -6.0);
    // Each star with SNR > 50 where the true WCS puts its measured position (0.05 px).
    let mut checked = 0;
    for s in rec["stars"].as_array().unwrap() {
        if s["snr"].as_f64().unwrap() < 50.0 {
            continue;
        }
        let (x, y) = (s["x"].as_f64().unwrap(), s["y"].as_f64().unwrap());
        let (ra, dec) = wcs.pixel_to_sky(x, y);
        let d = subwatch::astrometry::separation_deg(
            (ra, dec),
            (
                s["ra_deg"].as_f64().unwrap(),
                s["dec_deg"].as_f64().unwrap(),
            ),
        ) * 3600.0;
        assert!(d < 0.05 * 1.94, "{d} arcsec at ({x}, {y})");
        checked += 1;
    }
    assert!(checked >= 20, "{checked}");
    // The zero point is 25 by construction (a Gaussian holds all its light within the
    // photometric aperture of 2.5 FWHM).
    let zp = rec["zero_point_mag"].as_f64().unwrap();
    assert!((zp - 25.0).abs() < 0.02, "{zp}");
    assert!(rec["limit_mag"].as_f64().unwrap() > 20.0);
}
