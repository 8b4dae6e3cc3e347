//! The demo as a newcomer runs it: `subwatch demo` with nothing configured. Its night
//! holds every situation the tool is for, and the summary must find them all.

mod common;

use std::process::Command;

#[test]
fn the_demo_night_finds_everything_it_holds() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("demo");
    let run = Command::new(common::binary())
        .arg("demo")
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&run.stdout);
    assert!(
        run.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&run.stderr)
    );
    println!("{stdout}");
    let doc: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("reports/night-2026-03-14.json")).unwrap())
            .unwrap();
    let all = doc["frames"].as_array().unwrap();
    let frames: Vec<&serde_json::Value> = all.iter().filter(|f| f["kind"] == "light").collect();
    assert_eq!(frames.len(), 62);
    // Fields A and C carry no WCS: every frame of theirs is fitted to the demo's
    // catalogue and calibrated (zero point and depth); Field B is not in the catalogue.
    for f in &frames {
        let target = f["target"].as_str().unwrap();
        if target == "Kestrel Field B" {
            continue;
        }
        assert_eq!(f["sky_fit"]["source"], "fitted", "{}", f["path"]);
        assert!(f["sky_fit"]["rms_arcsec"].as_f64().unwrap() < 0.6);
        // V from 25 − 2.5 log10(e⁻/s) with a gain of 1: the zero point is 25, less the
        // light outside the photometric aperture (Moffat wings, a few per cent); through
        // the cloud of frames 12–14 (30 % of the light) 2.5 log10(0.3) = 1.31 mag less.
        let zp = f["zero_point_mag"].as_f64().unwrap();
        let path = f["path"].as_str().unwrap();
        let cloud = ["a_012.fits", "a_013.fits", "a_014.fits"]
            .iter()
            .any(|n| path.ends_with(n));
        let expected = if cloud { 25.0 - 1.307 } else { 25.0 };
        assert!(
            (expected - 0.1..=expected + 0.02).contains(&zp),
            "{path}: {zp}"
        );
        assert!(f["limit_mag"].as_f64().is_some());
    }
    // The evening's calibration set: one frame of each fault found with its own reason,
    // and not one false warning on the good frames.
    let calibration: Vec<&serde_json::Value> =
        all.iter().filter(|f| f["kind"] != "light").collect();
    assert_eq!(calibration.len(), 22);
    let faulty = |name: &str| {
        calibration
            .iter()
            .find(|f| f["path"].as_str().unwrap().ends_with(name))
            .map(|f| f["reasons"].clone())
            .unwrap()
    };
    for (name, reason) in [
        ("flat-l_006.fits", "flat_level_low"),
        ("flat-l_007.fits", "flat_level_high"),
        ("flat-l_008.fits", "flat_departs"),
        ("dark-120s_006.fits", "dark_temperature_mismatch"),
        ("dark-120s_007.fits", "dark_exposure_mismatch"),
        ("dark-120s_008.fits", "light_leak"),
        ("bias_006.fits", "bias_noise_high"),
    ] {
        let reasons = faulty(name);
        assert!(
            reasons.as_array().unwrap().iter().any(|r| r == reason),
            "{name}: {reasons}"
        );
    }
    let flagged = calibration.iter().filter(|f| f["verdict"] != "ok").count();
    assert_eq!(flagged, 7, "only the faulty frames are flagged");
    let has_reason = |r: &str| {
        frames
            .iter()
            .any(|f| f["reasons"].as_array().unwrap().iter().any(|x| x == r))
    };
    for reason in [
        "fwhm_high",
        "eccentricity_high",
        "transparency_low",
        "twilight",
        "trail",
    ] {
        assert!(has_reason(reason), "a frame is flagged {reason}");
    }
    let ok = frames.iter().filter(|f| f["verdict"] == "ok").count();
    assert!(ok >= 25, "good frames stay good: {ok}");
    let anomalies = doc["anomalies"].as_array().unwrap();
    let kinds: std::collections::BTreeSet<&str> = anomalies
        .iter()
        .map(|a| a["kind"].as_str().unwrap())
        .collect();
    for kind in [
        "transient",
        "trail",
        "moving",
        "variable",
        "color",
        "hot_pixel",
        "new_source",
    ] {
        assert!(
            kinds.contains(kind),
            "the summary finds a {kind}: {kinds:?}"
        );
    }
    // The star bright in one band only, between Field C's V and I frames, found and
    // known to the catalogue; no other color anomaly between filters.
    let band: Vec<&serde_json::Value> = anomalies
        .iter()
        .filter(|a| a["kind"] == "color" && a["detail"]["bands"].is_array())
        .collect();
    assert_eq!(band.len(), 1, "{band:?}");
    assert!(band[0]["detail"]["z"].as_f64().unwrap().abs() > 5.0);
    assert!(band[0]["catalogue"]["id"].is_string());
    // Nothing flashes in Field C: a bright star measured in one frame and saturated in
    // the others is not a transient.
    let field_c_transients: Vec<&serde_json::Value> = anomalies
        .iter()
        .filter(|a| a["kind"] == "transient" && a["target"] == "Kestrel Field C")
        .collect();
    assert!(field_c_transients.is_empty(), "{field_c_transients:?}");
    // Tonight's new source is not in the catalogue, and so leads the list.
    let new: Vec<&serde_json::Value> = anomalies
        .iter()
        .filter(|a| a["kind"] == "new_source")
        .collect();
    assert!(new
        .iter()
        .any(|a| a["catalogue"].is_null() && a["catalogue_depth_mag"].is_number()));
    let cosmic = anomalies
        .iter()
        .filter(|a| a["detail"]["cosmic_ray"] == true)
        .count();
    assert!(cosmic >= 10, "cosmic rays told apart: {cosmic}");
    // The files a newcomer opens.
    let html = std::fs::read_to_string(out.join("reports/night-2026-03-14.html")).unwrap();
    assert!(
        html.contains("<img src=\"data:image/png;base64,"),
        "plots inside the HTML"
    );
    assert!(html.contains("new_source"));
    // Field A is planned (4 h of L) and the store holds an earlier night of it: the
    // morning gives its progress, from the usable exposure the nights' stored verdicts
    // keep (read here from the store itself), at tonight's rate.
    let store = rusqlite::Connection::open_with_flags(
        out.join("state/subwatch.db"),
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap();
    let mut usable: std::collections::BTreeMap<String, f64> = Default::default();
    let mut rows = store
        .prepare(
            "SELECT night, header_json FROM frames WHERE target = 'Kestrel Field A'
               AND filter = 'L' AND status = 'ok' AND verdict IN ('ok', 'warn')",
        )
        .unwrap();
    for row in rows
        .query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?)))
        .unwrap()
    {
        let (night, header) = row.unwrap();
        let header: serde_json::Value = serde_json::from_str(&header).unwrap();
        *usable.entry(night).or_default() += header["exposure_s"].as_f64().unwrap();
    }
    assert_eq!(usable.len(), 2, "two nights of Field A: {usable:?}");
    let done: f64 = usable.values().sum();
    let tonight = usable["2026-03-14"];
    let expected = format!(
        "Kestrel Field A: L {:.1} of 4 h; at last night's usable rate about {} more nights",
        done / 3600.0,
        ((4.0 * 3600.0 - done) / tonight).ceil()
    );
    assert!(
        stdout.contains(&format!("plan: {expected}")),
        "{expected}\n{stdout}"
    );
    assert!(
        html.contains(&expected) || html.contains(&expected.replace('\'', "&#39;")),
        "{expected}"
    );
    let mails: Vec<_> = std::fs::read_dir(out.join("reports"))
        .unwrap()
        .flatten()
        .filter(|e| e.path().extension().is_some_and(|x| x == "eml"))
        .collect();
    assert!(!mails.is_empty(), "the mail, as an .eml file");
    // Running it again replaces the earlier demo's folder.
    let again = Command::new(common::binary())
        .arg("demo")
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    assert!(again.status.success());
}
