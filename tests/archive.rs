//! `subwatch archive` and `report --target` on the real binary: a tree of past nights
//! recorded, killed with SIGKILL mid-way and run again (every frame recorded once,
//! nothing recorded before touched again, every night judged), two archives of one
//! tree at once and two shares of it (each frame read once), and a target across its
//! nights agreeing with the nights' own verdicts.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::night::{render_night, NightPlan};

const TARGET: &str = "Kestrel Field A";

/// Write a frame at `path`, by way of a plain name (the FITS writer reads parentheses in
/// a path as its own syntax; subwatch's reader does not).
fn write_into(
    root: &Path,
    path: &Path,
    pixels: &ndarray::Array2<f32>,
    keys: &[(String, subwatch::frame::cards::OutValue)],
) -> PathBuf {
    let scratch = root.with_extension("scratch.fits");
    write_frame(&scratch, pixels, Encoding::Unsigned16, keys).unwrap();
    std::fs::rename(&scratch, path).unwrap();
    path.to_path_buf()
}

/// Three nights of Kestrel Field A through L (10 frames each), in folders named as a
/// user's disk names them: by date, by session, and one night split in two; and three
/// darks with the first night. Returns every file.
fn season_tree(root: &Path) -> Vec<PathBuf> {
    let nights = [
        ("2026-03-10T20:30:00", vec!["2026-03-10/light"]),
        ("2026-03-11T21:00:00", vec!["session 2 (old disk)"]),
        (
            "2026-03-12T20:45:00",
            vec!["n3/first half", "n3/second half"],
        ),
    ];
    let mut files = Vec::new();
    for (k, (start, folders)) in nights.iter().enumerate() {
        let mut plan = NightPlan::full(300 + k as u64).quiet();
        plan.frames = 10;
        plan.width = 320;
        plan.height = 320;
        plan.star_count = 90;
        plan.cosmic_rays_per_frame = 0.0;
        plan.start = start.to_string();
        // The second night's frames 7 and 8 under cloud: rejected by their night.
        if k == 1 {
            plan.cloud_frames = vec![7, 8];
        }
        let (frames, _) = render_night(&plan);
        for (i, f) in frames.iter().enumerate() {
            let folder = root.join(folders[i * folders.len() / frames.len()]);
            std::fs::create_dir_all(&folder).unwrap();
            files.push(write_into(root, &folder.join(&f.name), &f.pixels, &f.keys));
        }
    }
    let darks = root.join("2026-03-10/darks");
    std::fs::create_dir_all(&darks).unwrap();
    for f in subwatch::sim::calibration::demo_set(192, "2026-03-10T19:00:00")
        .iter()
        .filter(|f| f.name.starts_with("dark"))
        .take(3)
    {
        files.push(write_into(root, &darks.join(&f.name), &f.pixels, &f.keys));
    }
    files
}

/// A configuration of a store `db` (SQLite) watching nothing in particular.
fn config(dir: &Path, db: &Path) -> PathBuf {
    let cfg = dir.join("subwatch.toml");
    std::fs::write(
        &cfg,
        format!(
            "[watch]\nfolders = [\"{}\"]\n[store]\npath = \"{}\"\n",
            dir.display(),
            db.display()
        ),
    )
    .unwrap();
    cfg
}

fn archive(root: &Path, cfg: &Path, extra: &[&str]) -> Value {
    let out = Command::new(common::binary())
        .arg("archive")
        .arg(root)
        .arg("--config")
        .arg(cfg)
        .arg("--json")
        .args(extra)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn subwatch(args: &[&str]) -> Value {
    let out = Command::new(common::binary()).args(args).output().unwrap();
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// (id, path, verdict) of every row, by path.
fn rows(db: &Path) -> BTreeMap<String, (i64, Option<String>)> {
    let c = rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
        .unwrap();
    let mut st = c.prepare("SELECT path, id, verdict FROM frames").unwrap();
    st.query_map([], |r| Ok((r.get(0)?, (r.get(1)?, r.get(2)?))))
        .unwrap()
        .map(Result::unwrap)
        .collect()
}

fn row_count(db: &Path) -> (i64, i64) {
    let Ok(c) =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
    else {
        return (0, 0);
    };
    c.query_row(
        "SELECT COUNT(*), COUNT(DISTINCT path) FROM frames",
        [],
        |r| Ok((r.get(0)?, r.get(1)?)),
    )
    .unwrap_or((0, 0))
}

#[test]
fn an_archive_killed_mid_way_and_run_again_records_every_frame_once() {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path().join("past nights");
    let files = season_tree(&root);
    let db = dir.path().join("state/subwatch.db");
    std::fs::create_dir_all(db.parent().unwrap()).unwrap();
    let cfg = config(dir.path(), &db);

    // The first run, killed with SIGKILL once a few frames are in.
    let mut child = Command::new(common::binary())
        .arg("archive")
        .arg(&root)
        .arg("--config")
        .arg(&cfg)
        .args(["--workers", "2"])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let deadline = Instant::now() + Duration::from_secs(120);
    while row_count(&db).0 < 8 && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(20));
    }
    child.kill().unwrap();
    child.wait().unwrap();
    let first = rows(&db);
    assert!(
        first.len() >= 8 && first.len() < files.len(),
        "killed mid-way: {} of {} recorded",
        first.len(),
        files.len()
    );

    // Run again: it reads only what is not recorded, and judges every night.
    let report = archive(&root, &cfg, &["--workers", "2"]);
    let after = rows(&db);
    assert_eq!(row_count(&db), (files.len() as i64, files.len() as i64));
    assert_eq!(report["files"], files.len());
    assert_eq!(report["recorded_before"], first.len());
    assert_eq!(report["new"], files.len() - first.len());
    assert_eq!(report["recorded_by_others"], 0);
    for (path, (id, _)) in &first {
        assert_eq!(
            after[path].0, *id,
            "{path}: recorded before, left as it was"
        );
    }
    for (path, (_, verdict)) in &after {
        assert!(verdict.is_some(), "{path} has its night's verdict");
    }
    let nights: Vec<&str> = report["nights"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n["night"].as_str().unwrap())
        .collect();
    assert_eq!(nights, ["2026-03-10", "2026-03-11", "2026-03-12"]);
    assert_eq!(report["nights"][0]["calibration"], 3);
    for n in report["nights"].as_array().unwrap() {
        assert_eq!(n["lights"], 10, "{n}");
    }
    assert_eq!(report["targets"][0]["target"], TARGET);
    assert_eq!(report["targets"][0]["nights"], 3);
    // The cloud of the second night is rejected by the night model.
    assert!(
        report["nights"][1]["reject"].as_u64().unwrap() >= 2,
        "{report}"
    );

    // A third run has nothing to do.
    let again = archive(&root, &cfg, &[]);
    assert_eq!(again["recorded_before"], files.len());
    assert_eq!(again["new"], 0);
    assert_eq!(again["judged"].as_array().unwrap().len(), 0);
    assert_eq!(rows(&db), after);

    // `report --night` works for an archived night, with the verdicts the archive kept.
    let doc = subwatch(&[
        "report",
        "--config",
        cfg.to_str().unwrap(),
        "--night",
        "2026-03-12",
        "--json",
    ]);
    let frames: Vec<&Value> = doc["frames"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["kind"] == "light")
        .collect();
    assert_eq!(frames.len(), 10);
    for f in frames {
        let path = f["path"].as_str().unwrap();
        assert_eq!(after[path].1.as_deref(), f["verdict"].as_str(), "{path}");
    }
}

#[test]
fn two_archives_at_once_and_two_shares_read_each_frame_once() {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path().join("archive");
    let files = season_tree(&root);

    // Two archives of the same tree into one store at the same time.
    let db = dir.path().join("both.db");
    let cfg = config(dir.path(), &db);
    let spawn = || {
        Command::new(common::binary())
            .arg("archive")
            .arg(&root)
            .arg("--config")
            .arg(&cfg)
            .args(["--workers", "1", "--json"])
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap()
    };
    let (a, b) = (spawn(), spawn());
    let reports: Vec<Value> = [a, b]
        .into_iter()
        .map(|c| {
            let out = c.wait_with_output().unwrap();
            assert!(
                out.status.success(),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
            serde_json::from_slice(&out.stdout).unwrap()
        })
        .collect();
    let read: u64 = reports
        .iter()
        .map(|r| r["new"].as_u64().unwrap() + r["recorded_by_others"].as_u64().unwrap())
        .sum();
    assert_eq!(
        read,
        files.len() as u64,
        "each frame read once: {reports:?}"
    );
    assert!(
        reports.iter().all(|r| r["new"].as_u64().unwrap() > 0),
        "both shared the work: {reports:?}"
    );
    assert_eq!(row_count(&db), (files.len() as i64, files.len() as i64));
    assert!(rows(&db).values().all(|(_, v)| v.is_some()));

    // Two shares, one after the other, into a store of their own: the folders split
    // between them, and the target's summary as one archive of the whole tree gives it.
    let sharded = dir.path().join("shards.db");
    let shard_cfg = dir.path().join("shards.toml");
    std::fs::write(
        &shard_cfg,
        format!(
            "[watch]\nfolders = [\"{}\"]\n[store]\npath = \"{}\"\n",
            dir.path().display(),
            sharded.display()
        ),
    )
    .unwrap();
    let list = |k: &str| -> BTreeSet<String> {
        let out = Command::new(common::binary())
            .arg("archive")
            .arg(&root)
            .arg("--config")
            .arg(&shard_cfg)
            .args(["--shard", k, "--list"])
            .output()
            .unwrap();
        String::from_utf8(out.stdout)
            .unwrap()
            .lines()
            .map(|l| l.split('\t').next().unwrap().to_string())
            .collect()
    };
    let (one, two) = (list("1/2"), list("2/2"));
    assert!(one.is_disjoint(&two));
    assert_eq!(one.len() + two.len(), 5, "{one:?} {two:?}");
    let r1 = archive(&root, &shard_cfg, &["--shard", "1/2"]);
    let r2 = archive(&root, &shard_cfg, &["--shard", "2/2"]);
    assert_eq!(
        r1["files"].as_u64().unwrap() + r2["files"].as_u64().unwrap(),
        files.len() as u64
    );
    assert_eq!(
        row_count(&sharded),
        (files.len() as i64, files.len() as i64)
    );
    let target = |c: &Path| {
        subwatch(&[
            "report",
            "--config",
            c.to_str().unwrap(),
            "--target",
            TARGET,
            "--json",
        ])
    };
    assert_eq!(target(&shard_cfg), target(&cfg));
}

/// Per night: frames ok, warn, reject, and the usable exposure.
type NightCounts = BTreeMap<String, (u64, u64, u64, f64)>;

/// The usable exposure and verdict counts per night, and the frames kept, from the
/// nights' own documents (`report --night --json`).
fn from_the_nights(cfg: &Path, nights: &[&str]) -> (NightCounts, BTreeSet<String>) {
    let mut per_night = BTreeMap::new();
    let mut kept = BTreeSet::new();
    for n in nights {
        let doc = subwatch(&[
            "report",
            "--config",
            cfg.to_str().unwrap(),
            "--night",
            n,
            "--json",
        ]);
        let (mut ok, mut warn, mut reject, mut usable) = (0, 0, 0, 0.0);
        for f in doc["frames"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|f| f["kind"] == "light")
        {
            match f["verdict"].as_str().unwrap() {
                "ok" => ok += 1,
                "warn" => warn += 1,
                _ => reject += 1,
            }
            // Warned frames are stacked by default ([actions] stack_warned).
            if f["status"] == "ok" && f["verdict"] != "reject" {
                usable += f["exposure_s"].as_f64().unwrap();
                kept.insert(f["path"].as_str().unwrap().to_string());
            }
        }
        per_night.insert(n.to_string(), (ok, warn, reject, usable));
    }
    (per_night, kept)
}

#[test]
fn a_target_across_its_nights_agrees_with_the_nights_own_verdicts() {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path().join("archive");
    season_tree(&root);
    let db = dir.path().join("s.db");
    let cfg = config(dir.path(), &db);
    archive(&root, &cfg, &[]);
    let nights = ["2026-03-10", "2026-03-11", "2026-03-12"];
    let (per_night, kept) = from_the_nights(&cfg, &nights);

    let doc = subwatch(&[
        "report",
        "--config",
        cfg.to_str().unwrap(),
        "--target",
        TARGET,
        "--json",
    ]);
    assert_eq!(doc["target"], TARGET);
    assert_eq!(doc["nights"], 3);
    let filters = doc["filters"].as_array().unwrap();
    assert_eq!(filters.len(), 1);
    let l = &filters[0];
    assert_eq!(l["filter"], "L");
    assert_eq!(l["nights"], 3);
    let total = |k: usize| per_night.values().map(|c| [c.0, c.1, c.2][k]).sum::<u64>();
    assert_eq!(l["frames"]["ok"], total(0));
    assert_eq!(l["frames"]["warn"], total(1));
    assert_eq!(l["frames"]["reject"], total(2));
    let usable: f64 = per_night.values().map(|c| c.3).sum();
    assert_eq!(l["usable_s"].as_f64().unwrap(), usable);
    assert_eq!(doc["usable_s"].as_f64().unwrap(), usable);
    for row in l["per_night"].as_array().unwrap() {
        let (ok, warn, reject, usable) = per_night[row["night"].as_str().unwrap()];
        assert_eq!(
            (
                row["frames"]["ok"].as_u64(),
                row["frames"]["warn"].as_u64(),
                row["frames"]["reject"].as_u64()
            ),
            (Some(ok), Some(warn), Some(reject)),
            "{row}"
        );
        assert_eq!(row["usable_s"].as_f64().unwrap(), usable);
        assert!(row["fwhm_px"].as_f64().unwrap() > 1.0);
    }
    // The frames to stack across all nights are the ones the nights keep, best first.
    let stack: BTreeSet<String> = l["stack"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["path"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(stack, kept);
    let rates: Vec<f64> = l["stack"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["weight_per_s"].as_f64().unwrap())
        .collect();
    assert!(rates.windows(2).all(|w| w[0] >= w[1]), "{rates:?}");

    // The best half, written as list files beside the summary and its plot.
    let out = dir.path().join("reports");
    let run = Command::new(common::binary())
        .args([
            "report",
            "--config",
            cfg.to_str().unwrap(),
            "--target",
            TARGET,
        ])
        .args(["--best-fraction", "0.5", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let text = String::from_utf8_lossy(&run.stdout);
    assert!(text.contains("2026-03-11"), "{text}");
    let folder = out.join("target-Kestrel_Field_A");
    let lines = |name: &str| -> Vec<String> {
        std::fs::read_to_string(folder.join(name))
            .unwrap()
            .lines()
            .map(str::to_string)
            .collect()
    };
    assert_eq!(lines("L.txt").len(), kept.len());
    let best = lines("L-best.txt");
    assert!(
        !best.is_empty() && best.len() <= kept.len().div_ceil(2),
        "{}",
        best.len()
    );
    let png = std::fs::read(folder.join("quality.png")).unwrap();
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n");
    let written: Value =
        serde_json::from_slice(&std::fs::read(folder.join("summary.json")).unwrap()).unwrap();
    assert_eq!(written["filters"][0]["best"]["frames"], best.len());

    // The targets the store holds.
    let list = subwatch(&[
        "report",
        "--config",
        cfg.to_str().unwrap(),
        "--list-targets",
        "--json",
    ]);
    assert_eq!(list[0]["target"], TARGET);
    assert_eq!(
        (list[0]["nights"].as_u64(), list[0]["frames"].as_u64()),
        (Some(3), Some(30))
    );
    // A target the store does not hold is named with the nearest it does.
    let wrong = Command::new(common::binary())
        .args([
            "report",
            "--config",
            cfg.to_str().unwrap(),
            "--target",
            "Kestrel Feld A",
        ])
        .output()
        .unwrap();
    assert_eq!(wrong.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&wrong.stderr).contains("did you mean \"Kestrel Field A\"?"));
}
