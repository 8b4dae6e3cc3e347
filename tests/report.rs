//! The morning as a user meets it at the terminal: `night`, `report` and `status` print
//! counts first, then every warned and rejected frame with why, then what deserves a
//! look; mistakes on the command line are clear errors with a non-zero exit; alerts say
//! what happened and whether they were delivered; changing the rules and running
//! `report` again grades the night again and says which frames changed.

mod common;

use std::path::Path;
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use common::daemon::{feed_one_by_one, site, Logged};

fn run(args: &[&str]) -> Output {
    Command::new(common::binary())
        .args(args)
        .env_remove("SUBWATCH_LOG")
        .output()
        .expect("run subwatch")
}

fn text(o: &[u8]) -> String {
    String::from_utf8_lossy(o).into_owned()
}

/// A clear error: exit status 2, one line saying it on stderr, nothing on stdout.
fn refused(o: &Output, words: &str) {
    let err = text(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains(words), "{words:?} in {err}");
    assert!(o.stdout.is_empty(), "{}", text(&o.stdout));
    // Printed once, not once per layer that saw it.
    assert_eq!(err.matches(words).count(), 1, "{err}");
}

#[test]
fn command_line_mistakes_are_clear_errors() {
    let s = site("");
    let config = s.config.to_str().unwrap();
    // A malformed or impossible night label.
    refused(
        &run(&["report", "--config", config, "--night", "2026-3-14"]),
        "YYYY-MM-DD",
    );
    refused(
        &run(&["report", "--config", config, "--night", "2026-02-30"]),
        "YYYY-MM-DD",
    );
    refused(
        &run(&["status", "--config", config, "--night", "14/03/2026"]),
        "YYYY-MM-DD",
    );
    // A night with no frames in the store.
    refused(
        &run(&["report", "--config", config, "--night", "2026-03-14"]),
        "no frames of night 2026-03-14",
    );
    // A folder without a light frame, and something that is not a folder.
    let empty = s.root.join("empty");
    std::fs::create_dir_all(&empty).unwrap();
    refused(
        &run(&["night", empty.to_str().unwrap()]),
        "no light frames under",
    );
    refused(
        &run(&["night", empty.join("nothing").to_str().unwrap()]),
        "is not a folder",
    );
    // Flags that only mean something together.
    let o = run(&["measure", "--stars", "x.fits"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o.stderr).contains("--json"), "{}", text(&o.stderr));
    let o = run(&[
        "sky",
        "--latitude",
        "40",
        "--longitude",
        "-3",
        "--time",
        "2026-03-14T22:00:00",
        "--ra",
        "84",
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o.stderr).contains("--dec"), "{}", text(&o.stderr));
    // --config says what it is and where it is looked for by default.
    let help = text(&run(&["status", "--help"]).stdout);
    assert!(
        help.contains("--config <FILE>") && help.contains("/etc/subwatch/subwatch.toml"),
        "{help}"
    );
}

#[test]
fn a_folder_night_prints_counts_then_flagged_frames_then_what_to_look_at() {
    use subwatch::frame::write::{write_frame, Encoding};
    use subwatch::sim::night::{render_night, NightPlan};
    let dir = tempfile::tempdir().unwrap();
    let mut plan = NightPlan::full(21);
    plan.frames = 10;
    plan.flip_at = None;
    plan.cloud_frames.clear();
    plan.gust_frames = vec![4];
    plan.trail_frames = vec![7];
    plan.focus_drift_from = None;
    plan.flash_frame = None;
    plan.cosmic_rays_per_frame = 1.0;
    let (frames, _) = render_night(&plan);
    for f in &frames {
        write_frame(
            &dir.path().join(&f.name),
            &f.pixels,
            Encoding::Unsigned16,
            &f.keys,
        )
        .unwrap();
    }
    let o = run(&["night", dir.path().to_str().unwrap()]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let out = text(&o.stdout);
    let doc: serde_json::Value =
        serde_json::from_slice(&run(&["night", dir.path().to_str().unwrap(), "--json"]).stdout)
            .unwrap();
    let at = |words: &str| {
        out.find(words)
            .unwrap_or_else(|| panic!("{words:?} in\n{out}"))
    };
    // Counts first, for the night and per group, and anomalies per kind.
    assert!(out.starts_with("Night 2026-03-14: 10 frames: "), "{out}");
    let counts = at("  Kestrel Field A / L: 10 frames: ");
    let kinds = at("Anomalies: ");
    // Then every warned and rejected frame of the document, each with every reason in
    // plain words.
    let flagged = at("Warned and rejected frames");
    assert!(counts < kinds && kinds < flagged, "{out}");
    for f in doc["frames"].as_array().unwrap() {
        let name = Path::new(f["path"].as_str().unwrap())
            .file_name()
            .unwrap()
            .to_string_lossy()
            .into_owned();
        if f["verdict"] == "ok" {
            assert!(!out[flagged..].contains(&format!("  {name}\n")), "{out}");
            continue;
        }
        let line = at(&format!("  {name}\n"));
        assert!(line > flagged);
        for e in f["explanations"].as_array().unwrap() {
            assert!(out.contains(e.as_str().unwrap()), "{e} in\n{out}");
        }
    }
    // Then the anomalies worth a look, the moving object before the trail.
    let look = at("Worth a look");
    assert!(look > flagged && at("  moving ") < at("  trail "), "{out}");
    // Hot pixels with their positions, cosmic-ray hits as a count only.
    let hot = doc["anomalies"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["kind"] == "hot_pixel")
        .count();
    assert!(hot > 0);
    assert!(
        out.contains(&format!("Hot pixels: {hot} (detector x, y): (")),
        "{out}"
    );
    let cosmic = doc["anomalies"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["detail"]["cosmic_ray"] == true)
        .count();
    assert!(cosmic > 0);
    assert!(
        out.contains(&format!("Cosmic-ray hits: {cosmic}\n")),
        "{out}"
    );
    assert!(!out.contains("Cosmic-ray hits (file, x, y)"), "{out}");
    // --all lists each of them, and every frame.
    let all = text(&run(&["night", dir.path().to_str().unwrap(), "--all"]).stdout);
    assert!(all.contains("Cosmic-ray hits (file, x, y)"), "{all}");
    assert!(
        all.matches("kestrel-field-a_0").count() >= 10 + cosmic,
        "{all}"
    );
}

#[test]
fn the_daemons_night_reported_graded_again_and_its_alerts_told() {
    use subwatch::sim::night::{render_night, NightPlan};
    let s = site("");
    let lists = s.root.join("lists");
    let base = std::fs::read_to_string(&s.config).unwrap()
        + &format!(
            "[actions]\naccepted_lists = true\nlists_folder = \"{}\"\n",
            lists.display()
        );
    std::fs::write(&s.config, &base).unwrap();
    let mut plan = NightPlan::full(12);
    plan.frames = 9;
    plan.flip_at = None;
    plan.gust_frames = vec![5, 6, 7, 8];
    plan.cloud_frames.clear();
    plan.trail_frames.clear();
    plan.focus_drift_from = None;
    let (frames, _) = render_night(&plan);
    let d = Logged::start(&s.config);
    std::thread::sleep(Duration::from_millis(300));
    let conn = rusqlite::Connection::open(&s.db).unwrap();
    feed_one_by_one(&s, &conn, &frames);
    // The streak alert is logged, and without [mail] the log says it went nowhere.
    assert!(
        d.wait_log(
            "alert reject_streak: Kestrel Field A / L: the last 3 frames were all rejected: ",
            Duration::from_secs(10)
        ),
        "{}",
        d.log()
    );
    assert!(
        d.wait_log(
            "(not delivered: no [mail] recipients configured)",
            Duration::from_secs(5)
        ),
        "{}",
        d.log()
    );
    let log = d.stop();
    // Each frame's line says it was measured, with the document's names.
    assert!(
        log.contains(&format!(
            "{} measured: night=2026-03-14 star_count=",
            frames[0].name
        )),
        "{log}"
    );
    assert!(
        log.contains(" eccentricity=") && log.contains(" background_adu="),
        "{log}"
    );
    let config = s.config.to_str().unwrap();

    // status: the night the frames' DATE-OBS place them in, whatever today's date.
    let status = text(&run(&["status", "--config", config]).stdout);
    assert!(
        status.starts_with("night 2026-03-14 (the newest night with frames, by their DATE-OBS"),
        "{status}"
    );
    assert!(status.contains("frames 9 "), "{status}");

    // report without --night means the same night, and without mail it writes the
    // summary files (HTML, CSV, JSON) and says where; --out chooses the folder.
    let out_dir = s.root.join("summary here");
    let o = run(&[
        "report",
        "--config",
        config,
        "--out",
        out_dir.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(
        text(&o.stdout).starts_with("Night 2026-03-14: 9 frames: "),
        "{}",
        text(&o.stdout)
    );
    let said = text(&o.stderr);
    assert!(
        said.contains(&format!(
            "night 2026-03-14: the summary is written in {}: night-2026-03-14.html, night-2026-03-14.csv, night-2026-03-14.json",
            out_dir.display()
        )),
        "{said}"
    );
    let written: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out_dir.join("night-2026-03-14.json")).unwrap())
            .unwrap();
    assert_eq!(written["frames"].as_array().unwrap().len(), 9);
    assert!(
        std::fs::read_to_string(out_dir.join("night-2026-03-14.html"))
            .unwrap()
            .contains("<html")
    );
    // The default folder: [report] folder, else `reports` beside the store.
    let o = run(&["report", "--config", config]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(s.root.join("reports/night-2026-03-14.csv").exists());

    // A reader that closes the pipe before the document comes ends the command quietly,
    // as standard tools end (killed by SIGPIPE: status 128 + 13 in a shell): no panic,
    // no message.
    for args in [
        vec!["report", "--config", config, "--json"],
        vec!["night", s.capture.to_str().unwrap(), "--json"],
    ] {
        let mut child = Command::new(common::binary())
            .args(&args)
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .unwrap();
        drop(child.stdout.take());
        let out = child.wait_with_output().unwrap();
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(141), "{args:?}: {err}");
        assert!(err.is_empty(), "{args:?}: {err}");
    }

    // report: counts first, then the rejected frames with their reasons.
    let o = run(&["report", "--config", config, "--night", "2026-03-14"]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let out = text(&o.stdout);
    assert!(out.starts_with("Night 2026-03-14: 9 frames: "), "{out}");
    for f in &frames[5..9] {
        let at = out
            .find(&format!("reject  {}\n", f.name))
            .unwrap_or_else(|| panic!("{} rejected in\n{out}", f.name));
        assert!(out[at..].contains("eccentricity "), "{out}");
    }
    let list_path = lists.join("2026-03-14/Kestrel_Field_A__L.txt");
    let listed = || std::fs::read_to_string(&list_path).unwrap().lines().count();
    assert_eq!(listed(), 5);
    let verdicts = |o: &Output| -> Vec<(String, String)> {
        let doc: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        doc["frames"]
            .as_array()
            .unwrap()
            .iter()
            .map(|f| {
                (
                    f["path"].as_str().unwrap().to_string(),
                    f["verdict"].as_str().unwrap().to_string(),
                )
            })
            .collect()
    };
    let before = verdicts(&run(&[
        "report",
        "--config",
        config,
        "--night",
        "2026-03-14",
        "--json",
    ]));
    let rigs = |o: &Output| -> Vec<serde_json::Value> {
        let doc: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        doc["frames"]
            .as_array()
            .unwrap()
            .iter()
            .map(|f| f["rig"].clone())
            .collect()
    };
    let unnamed = run(&[
        "report",
        "--config",
        config,
        "--night",
        "2026-03-14",
        "--json",
    ]);
    assert!(rigs(&unnamed).iter().all(|r| r.is_null()));

    // The rig named afterwards: the frames recorded unnamed become its own, each once,
    // with the same verdicts, and the document names the rig on every frame.
    let base = base + "[rig]\nname = \"north pier\"\n";
    std::fs::write(&s.config, &base).unwrap();
    let named = run(&[
        "report",
        "--config",
        config,
        "--night",
        "2026-03-14",
        "--json",
    ]);
    assert!(named.status.success(), "{}", text(&named.stderr));
    assert_eq!(rigs(&named), vec![serde_json::json!("north pier"); 9]);
    assert_eq!(verdicts(&named), before);

    // New rules: eccentricity and FWHM judged leniently. `report` grades the night again,
    // says which frames changed verdict, and rewrites the list.
    std::fs::write(
        &s.config,
        base + "[[rules]]\nreason = \"eccentricity_high\"\nmetric = \"eccentricity\"\ntest = \"above\"\nvalue = 0.99\nverdict = \"reject\"\n\
                [[rules]]\nreason = \"fwhm_high\"\nmetric = \"fwhm_px\"\ntest = \"above_median_ratio\"\nvalue = 3.0\nverdict = \"reject\"\n",
    )
    .unwrap();
    let o = run(&[
        "report",
        "--config",
        config,
        "--night",
        "2026-03-14",
        "--json",
    ]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let err = text(&o.stderr);
    let after = verdicts(&o);
    let changed: Vec<_> = before
        .iter()
        .zip(&after)
        .filter(|(b, a)| b.1 != a.1)
        .collect();
    assert!(
        changed.iter().filter(|(b, _)| b.1 == "reject").count() >= 3,
        "the gusts pass the lenient rules: {changed:?}"
    );
    assert!(
        err.contains(&format!(
            "{} frame(s) changed verdict with the rules as configured now",
            changed.len()
        )),
        "{err}"
    );
    for (b, a) in &changed {
        assert_eq!(b.0, a.0);
        assert!(
            err.contains(&format!("{}: {} -> {}", a.0, b.1, a.1)),
            "{a:?} in {err}"
        );
    }
    let now_kept = after.iter().filter(|f| f.1 != "reject").count();
    let start = Instant::now();
    while listed() != now_kept && start.elapsed() < Duration::from_secs(5) {
        std::thread::sleep(Duration::from_millis(100));
    }
    assert_eq!(listed(), now_kept);
    // Judged again with the same rules: nothing changes, nothing is said.
    let o = run(&[
        "report",
        "--config",
        config,
        "--night",
        "2026-03-14",
        "--json",
    ]);
    assert!(
        !text(&o.stderr).contains("changed verdict"),
        "{}",
        text(&o.stderr)
    );
}
