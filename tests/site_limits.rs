//! A site's summary draws each rig's own limits: those its daemon judged the night
//! against, stored with its verdicts, not the limits of the daemon writing the summary.
//! One test body on both back ends (an SQLite file, and a PostgreSQL database on the
//! throwaway server `.ci/postgres` starts).

mod common;

use common::postgres::TestDatabase;
use subwatch::record::{FrameRecord, FrameStatus, HeaderFacts, Identity};
use subwatch::rules::{Limit, Verdict};
use subwatch::store::{Location, Store};

const NIGHT: &str = "2026-03-14";
const TARGET: &str = "Kestrel Field A";

/// A rig's configuration: its name and one rule replacing the built-in `fwhm_high` by
/// an absolute limit in pixels.
fn config(dir: &std::path::Path, rig: &str, fwhm_reject_px: f64) -> subwatch::config::Config {
    let capture = dir.join(format!("capture-{}", rig.replace(' ', "-")));
    std::fs::create_dir_all(&capture).unwrap();
    let path = dir.join(format!("{}.toml", rig.replace(' ', "-")));
    std::fs::write(
        &path,
        format!(
            "[watch]\nfolders = ['{}']\n[store]\npath = '{}'\n[site]\ntimezone = \"UTC\"\n\
             [rig]\nname = \"{rig}\"\n\
             [[rules]]\nreason = \"fwhm_high\"\nmetric = \"fwhm_px\"\ntest = \"above\"\n\
             value = {fwhm_reject_px}\nverdict = \"reject\"\n",
            capture.display(),
            dir.join("unused.db").display()
        ),
    )
    .unwrap();
    subwatch::config::load(&path).unwrap()
}

/// A measured light frame of the night with the FWHM given.
fn frame(rig: &str, k: usize, fwhm_px: f64) -> FrameRecord {
    FrameRecord {
        identity: Identity {
            path: format!("/capture/{rig}/f{k:02}.fits"),
            size: 10,
            mtime_ns: 7,
        },
        status: FrameStatus::Ok,
        error: None,
        night: Some(NIGHT.into()),
        target: Some(TARGET.into()),
        filter: Some("L".into()),
        time_unix: Some(1_773_511_200.0 + 300.0 * k as f64),
        header: Some(HeaderFacts {
            exposure_s: Some(300.0),
            ..Default::default()
        }),
        metrics: Some(
            serde_json::from_value(serde_json::json!({
                "width": 100, "height": 100, "star_count": 120, "fwhm_px": fwhm_px,
                "fwhm_arcsec": null, "eccentricity": 0.1, "background_adu": 1000.0,
                "noise_adu": 10.0, "snr_median": 40.0, "hfr_px": 1.6, "saturated_count": 2,
                "sharp_count": 0, "background_range_adu": 3.0, "plate_scale_arcsec": null,
                "bright_snr": [300.0, 200.0, 150.0, 120.0, 100.0]
            }))
            .unwrap(),
        ),
        stars: Vec::new(),
        rejected: Vec::new(),
        wcs: None,
        calibration: None,
    }
}

/// The FWHM of each rig's frames: 5.0 and 5.5 px are over 4 px (north's limit) and
/// under 6 px (south's).
const FWHM: [f64; 5] = [3.0, 3.5, 5.0, 3.2, 5.5];

fn fwhm_reject(limits: &[Limit]) -> Vec<f64> {
    limits
        .iter()
        .filter(|l| l.reason == "fwhm_high" && l.verdict == Verdict::Reject)
        .map(|l| l.value)
        .collect()
}

fn site_summary_draws_each_rigs_own_limits(at: &Location) {
    let dir = tempfile::tempdir().unwrap();
    let north = config(dir.path(), "north pier", 4.0);
    let south = config(dir.path(), "south pier", 6.0);
    for rig in ["north pier", "south pier", "roll-off 3"] {
        let mut s = Store::connect_for_rig(at, rig).unwrap();
        for (k, f) in FWHM.iter().enumerate() {
            s.record_frame(&frame(rig, k, *f), 1.0).unwrap();
        }
    }
    // Each of two rigs' daemons judges its night by its own rules; the third never did.
    let mut s = Store::connect_for_rig(at, "south pier").unwrap();
    subwatch::morning::judge_night(&mut s, &south, NIGHT).unwrap();
    let mut s = Store::connect_for_rig(at, "north pier").unwrap();
    subwatch::morning::judge_night(&mut s, &north, NIGHT).unwrap();
    // The limits stored with each rig's verdicts are its own (the configured values).
    assert_eq!(
        fwhm_reject(&s.night_limits(NIGHT).unwrap()[0].limits),
        [4.0]
    );
    let stored_south = s.as_rig("south pier", |s| s.night_limits(NIGHT).unwrap());
    assert_eq!(fwhm_reject(&stored_south[0].limits), [6.0]);
    assert!(s
        .as_rig("roll-off 3", |s| s.night_limits(NIGHT))
        .unwrap()
        .is_empty());

    // North's daemon writes the site's summary.
    let site = subwatch::morning::judge_site(&mut s, &north, NIGHT).unwrap();
    let summary =
        subwatch::report::summarise(NIGHT, &site.doc, subwatch::morning::settings(&north));
    let group = |rig: &str| {
        summary
            .groups
            .iter()
            .find(|g| g.heading().starts_with(&format!("{rig}:")))
            .unwrap_or_else(|| panic!("no group of {rig}"))
    };
    assert_eq!(fwhm_reject(&group("north pier").limits), [4.0]);
    assert_eq!(fwhm_reject(&group("south pier").limits), [6.0]);
    assert!(group("north pier").limits_missing.is_none());
    assert!(group("south pier").limits_missing.is_none());
    // A rig whose daemon stored no limits gets none drawn (not north's), and says so.
    let unjudged = group("roll-off 3");
    assert!(unjudged.limits.is_empty(), "{:?}", unjudged.limits);
    let said = unjudged.limits_missing.as_deref().unwrap();
    assert!(said.contains("roll-off 3"), "{said}");
    assert!(subwatch::report::text(&summary, false).contains(said));

    // Once roll-off 3's daemon judges its frames live (by its own rule, 5 px), the limits
    // of the night so far are stored with each live verdict, and the site draws them.
    let rolloff = config(dir.path(), "roll-off 3", 5.0);
    let judging = subwatch::watch::Judging {
        rules: rolloff.rule_specs(),
        ..Default::default()
    };
    let judged = s.as_rig("roll-off 3", |s| {
        subwatch::watch::judge::judge_missing(s, &judging)
    });
    assert_eq!(judged.unwrap(), FWHM.len());
    let live = subwatch::morning::judge_site(&mut s, &north, NIGHT).unwrap();
    let summary =
        subwatch::report::summarise(NIGHT, &live.doc, subwatch::morning::settings(&north));
    let rolloff_group = summary
        .groups
        .iter()
        .find(|g| g.heading().starts_with("roll-off 3:"))
        .unwrap();
    assert_eq!(fwhm_reject(&rolloff_group.limits), [5.0]);
    assert!(rolloff_group.limits_missing.is_none());

    // No drawn line contradicts a verdict shown: a frame is over its rig's drawn
    // reject line exactly when it shows fwhm_high.
    for rig in ["north pier", "south pier"] {
        let line = fwhm_reject(&group(rig).limits)[0];
        let frames: Vec<_> = site
            .doc
            .frames
            .iter()
            .filter(|f| f.rig.as_deref() == Some(rig))
            .collect();
        assert_eq!(frames.len(), FWHM.len());
        for f in frames {
            let fwhm = f.metrics.as_ref().and_then(|m| m.fwhm_px).unwrap();
            assert_eq!(
                f.reasons.iter().any(|r| r == "fwhm_high"),
                fwhm > line,
                "{rig}: {} at {fwhm} px against the drawn {line} px: {:?}",
                f.path,
                f.reasons
            );
        }
    }
}

#[test]
fn a_site_summary_draws_each_rigs_own_limits_on_sqlite() {
    let dir = tempfile::tempdir().unwrap();
    site_summary_draws_each_rigs_own_limits(&Location::File(dir.path().join("s.db")));
}

#[test]
fn a_site_summary_draws_each_rigs_own_limits_on_postgresql() {
    let db = TestDatabase::new();
    site_summary_draws_each_rigs_own_limits(&db.location());
}
