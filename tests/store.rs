//! The store's behaviour, one test body run against both back ends: an SQLite file and a
//! PostgreSQL database of the test's own on the throwaway server `.ci/postgres` starts.

mod common;

use common::postgres::TestDatabase;
use subwatch::night::register::Placement;
use subwatch::record::{FrameRecord, FrameStatus, Identity, StarRecord};
use subwatch::store::{Interrupted, Location, Recorded, Store};

/// Where one run of a test body keeps its store, and what to clean up after it.
enum Backend {
    Sqlite(tempfile::TempDir),
    Postgres(TestDatabase),
}

impl Backend {
    fn location(&self) -> Location {
        match self {
            Backend::Sqlite(dir) => Location::File(dir.path().join("s.db")),
            Backend::Postgres(db) => db.location(),
        }
    }
}

/// Run `body` once on SQLite and once on PostgreSQL, each with an empty store.
fn on_both(body: impl Fn(&Location)) {
    for backend in [
        Backend::Sqlite(tempfile::tempdir().unwrap()),
        Backend::Postgres(TestDatabase::new()),
    ] {
        body(&backend.location());
    }
}

fn record(path: &str, size: u64) -> FrameRecord {
    FrameRecord {
        identity: Identity {
            path: path.into(),
            size,
            mtime_ns: 7,
        },
        status: FrameStatus::Ok,
        error: None,
        night: Some("2026-03-14".into()),
        target: Some("Kestrel Field A".into()),
        filter: Some("L".into()),
        time_unix: Some(1.0),
        header: None,
        metrics: None,
        stars: Vec::new(),
        rejected: Vec::new(),
        wcs: None,
        calibration: None,
    }
}

/// The limits of the night's one group: a reject line on FWHM at `fwhm_px`.
fn limits(fwhm_px: f64) -> subwatch::contract::GroupLimits {
    subwatch::contract::GroupLimits {
        rig: None,
        target: Some("Kestrel Field A".into()),
        filter: Some("L".into()),
        limits: vec![subwatch::rules::Limit {
            reason: "fwhm_high".into(),
            metric: subwatch::rules::Metric::FwhmPx,
            verdict: subwatch::rules::Verdict::Reject,
            value: fwhm_px,
            above: true,
        }],
        missing: None,
    }
}

fn star(x: f64, y: f64) -> StarRecord {
    StarRecord {
        x,
        y,
        flux: 1.0,
        fwhm_px: 3.0,
        eccentricity: 0.1,
        snr: 50.0,
        flux_err: 0.1,
        hfr_px: None,
        fwhm_major_px: 3.0,
        fwhm_minor_px: 3.0,
        angle_deg: 0.0,
        psf_flux: 1.0,
        psf_model: subwatch::measure::psf::PsfModel::Gaussian,
        moffat_beta: None,
        peak_adu: 1.0,
        blended: true,
        ra_deg: Some(150.25),
        dec_deg: None,
        rgb: Some([Some(1.0), None, Some(0.5)]),
    }
}

#[test]
fn a_path_holds_one_record_and_a_newer_file_replaces_it() {
    on_both(|at| {
        let mut s = Store::connect(at).unwrap();
        let first = s.record_frame(&record("/a.fits", 10), 1.0).unwrap();
        assert!(matches!(first, Recorded::New(_)), "{at}");
        s.set_verdict(
            first.id().unwrap(),
            subwatch::rules::Verdict::Reject,
            &["fwhm_high".into()],
        )
        .unwrap();
        assert_eq!(
            s.record_frame(&record("/a.fits", 10), 2.0).unwrap(),
            Recorded::Already
        );
        let mut newer = record("/a.fits", 11);
        newer.stars.push(star(1.0, 2.0));
        let replaced = s.record_frame(&newer, 3.0).unwrap();
        let Recorded::Replaced { id, earlier } = replaced else {
            panic!("{at}: {replaced:?}")
        };
        assert_eq!(earlier.filter.as_deref(), Some("L"));
        assert_eq!(s.night_counts("2026-03-14").unwrap().frames, 1);
        // The earlier version's stars and verdict went with its record; the star's
        // values come back as they went in.
        let stars = s.frame_star_records(id).unwrap();
        assert_eq!(stars.len(), 1, "{at}");
        assert_eq!((stars[0].x, stars[0].y, stars[0].blended), (1.0, 2.0, true));
        assert_eq!(stars[0].ra_deg, Some(150.25));
        assert_eq!(stars[0].dec_deg, None);
        assert_eq!(stars[0].rgb, Some([Some(1.0), None, Some(0.5)]));
        assert_eq!(s.frames_without_verdict().unwrap().len(), 1);
        // Reopening migrates nothing and keeps the row.
        drop(s);
        let s = Store::connect(at).unwrap();
        assert_eq!(s.recorded_versions().unwrap()["/a.fits"], (11, 7));
    });
}

#[test]
fn a_file_in_the_reader_when_the_process_died_is_counted_not_retried_for_ever() {
    on_both(|at| {
        let mut s = Store::connect(at).unwrap();
        let a = record("/a.fits", 10).identity;
        s.begin_reading(&a, 1.0).unwrap();
        // The process died; at each start the mark counts one more interruption.
        for n in 1..=3 {
            let left = s.take_interrupted().unwrap();
            assert_eq!(
                left,
                vec![Interrupted {
                    identity: a.clone(),
                    interruptions: n
                }],
                "{at}"
            );
            s.begin_reading(&a, 2.0).unwrap();
        }
        // A changed file starts counting again; a record clears the mark.
        let mut b = a.clone();
        b.size = 12;
        s.begin_reading(&b, 3.0).unwrap();
        assert_eq!(s.take_interrupted().unwrap()[0].interruptions, 1);
        s.record_frame(&record("/a.fits", 12), 4.0).unwrap();
        assert!(s.take_interrupted().unwrap().is_empty());
    });
}

#[test]
fn each_rig_records_a_path_once_and_an_unnamed_store_becomes_the_rigs() {
    on_both(|at| {
        {
            // Recorded before the rig had a name, with a file in the reader.
            let mut s = Store::connect(at).unwrap();
            s.record_frame(&record("/a.fits", 10), 1.0).unwrap();
            s.begin_reading(&record("/b.fits", 10).identity, 1.0)
                .unwrap();
            s.set_night_limits("2026-03-14", &[limits(4.0)]).unwrap();
        }
        let mut north = Store::connect_for_rig(at, "north pier").unwrap();
        assert_eq!(north.rig(), "north pier");
        assert_eq!(
            north.night_limits("2026-03-14").unwrap()[0].limits,
            limits(4.0).limits,
            "{at}: the unnamed rig's limits became the named rig's"
        );
        assert_eq!(
            north.record_frame(&record("/a.fits", 10), 2.0).unwrap(),
            Recorded::Already,
            "{at}: the unnamed record became the named rig's"
        );
        assert_eq!(north.take_interrupted().unwrap().len(), 1);
        // Another rig of the site with a file at the same path records it for itself.
        let mut south = Store::connect_for_rig(at, "south-pier").unwrap();
        assert!(south.recorded_versions().unwrap().is_empty());
        assert!(matches!(
            south.record_frame(&record("/a.fits", 10), 3.0).unwrap(),
            Recorded::New(_)
        ));
        assert!(south.take_interrupted().unwrap().is_empty());
        assert!(south.night_limits("2026-03-14").unwrap().is_empty());
        assert_eq!(
            south.record_frame(&record("/a.fits", 10), 4.0).unwrap(),
            Recorded::Already
        );
        assert_eq!(north.recorded_versions().unwrap().len(), 1);
        // Each rig reads its own night; a site handle reads both.
        assert_eq!(north.night_counts("2026-03-14").unwrap().frames, 1);
        let site = Store::connect_for_rig(at, "north pier")
            .unwrap()
            .whole_site();
        assert_eq!(site.night_counts("2026-03-14").unwrap().frames, 2, "{at}");
        assert_eq!(site.night_records("2026-03-14").unwrap().len(), 2);
    });
}

#[test]
fn verdicts_alerts_meta_outbox_and_catalogues_keep_what_was_stored() {
    on_both(|at| {
        let mut s = Store::connect(at).unwrap();
        let mut night = vec![record("/a.fits", 1), record("/b.fits", 1)];
        night[1].time_unix = Some(2.0);
        night[1].filter = None;
        for r in &night {
            s.record_frame(r, 1.0).unwrap();
        }
        use subwatch::rules::Verdict;
        let changed = s
            .update_verdicts(&[
                ("/a.fits".into(), Verdict::Ok, vec![]),
                ("/b.fits".into(), Verdict::Warn, vec!["fwhm_high".into()]),
            ])
            .unwrap();
        assert_eq!(changed.len(), 2, "{at}");
        // The same verdicts again change nothing.
        let again = s
            .update_verdicts(&[("/a.fits".into(), Verdict::Ok, vec![])])
            .unwrap();
        assert!(again.is_empty(), "{at}");
        let counts = s.night_counts("2026-03-14").unwrap();
        assert_eq!((counts.frames, counts.measured, counts.warned), (2, 2, 1));
        assert_eq!(counts.last_frame_time_unix, Some(2.0));
        // A group with no filter is its own group, named by NULL, ordered first.
        assert_eq!(
            s.night_groups("2026-03-14").unwrap(),
            vec![
                (Some("Kestrel Field A".into()), None),
                (Some("Kestrel Field A".into()), Some("L".into()))
            ]
        );
        assert_eq!(
            s.accepted_paths("2026-03-14", Some("Kestrel Field A"), None, true)
                .unwrap(),
            vec!["/b.fits".to_string()]
        );
        assert!(s
            .accepted_paths("2026-03-14", Some("Kestrel Field A"), None, false)
            .unwrap()
            .is_empty());
        assert_eq!(s.nights().unwrap(), vec!["2026-03-14".to_string()]);

        s.add_alert("2026-03-14", "transient", "a flash", 10.0)
            .unwrap();
        assert!(s
            .alert_exists("2026-03-14", "transient", "a flash")
            .unwrap());
        assert_eq!(
            s.alert_history("2026-03-14", "transient").unwrap(),
            (Some(10.0), 1)
        );
        s.set_meta("k", "one").unwrap();
        s.set_meta("k", "two").unwrap();
        assert_eq!(s.meta("k").unwrap().as_deref(), Some("two"));
        assert_eq!(s.meta("nothing").unwrap(), None);

        let msg = subwatch::store::OutboxMessage {
            subject: "night".into(),
            from: "a@example.org".into(),
            to: vec!["b@example.org".into()],
            bytes: vec![0, 159, 255, 10],
        };
        let id = s.enqueue_mail(&msg, 5.0).unwrap();
        let due = s.due_mail(6.0).unwrap();
        assert_eq!(due, vec![(id, msg.clone(), 0)], "{at}");
        s.mail_failed(id, "refused", 100.0).unwrap();
        assert_eq!(s.outbox_state().unwrap(), (1, Some("refused".into())));
        assert!(s.due_mail(6.0).unwrap().is_empty());
        // "Now, whatever its wait" asks for everything due by +∞.
        assert_eq!(s.due_mail(f64::INFINITY).unwrap().len(), 1, "{at}");
        s.mail_done(id, "sent", 101.0).unwrap();
        assert_eq!(s.outbox_state().unwrap(), (0, None));

        let src = |mag: f64| subwatch::night::CatalogSource {
            ra_deg: 10.0,
            dec_deg: 20.0,
            mag: Some(mag),
        };
        s.save_catalog("T", "V", "2026-03-02", 19.0, &[(1.0, 2.0)], &[src(12.5)])
            .unwrap();
        // Saving a night again replaces it.
        s.save_catalog("T", "V", "2026-03-02", 19.5, &[(1.0, 2.0)], &[src(12.0)])
            .unwrap();
        let v = s.earlier_catalogs("T", "V", "2026-03-05").unwrap();
        assert_eq!(v.len(), 1);
        assert_eq!((v[0].limit_mag, v[0].sources.len()), (19.5, 1));
        assert_eq!(v[0].sources[0].mag, Some(12.0));
        assert_eq!(v[0].footprint, vec![(1.0, 2.0)]);
    });
}

#[test]
fn both_back_ends_have_the_same_tables_columns_and_types() {
    let sqlite = tempfile::tempdir().unwrap();
    let postgres = TestDatabase::new();
    let a = Store::connect(&Location::File(sqlite.path().join("s.db")))
        .unwrap()
        .schema()
        .unwrap();
    let b = Store::connect(&postgres.location())
        .unwrap()
        .schema()
        .unwrap();
    assert!(a.len() > 60, "{a:?}");
    assert_eq!(a, b);
}

#[test]
fn a_daemon_claims_its_rig_in_a_shared_database_and_a_second_is_refused() {
    let db = TestDatabase::new();
    let at = db.location();
    let first = subwatch::store::claim_rig(&at, "north").unwrap();
    let refused = subwatch::store::claim_rig(&at, "north")
        .err()
        .expect("a second claim of the rig is refused");
    assert!(
        refused
            .to_string()
            .contains(&format!("process {} on", std::process::id())),
        "{refused}"
    );
    assert!(subwatch::store::rig_daemon(&at, "north").is_some());
    // Another rig of the site is free to start.
    let _south = subwatch::store::claim_rig(&at, "south").unwrap();
    drop(first);
    assert_eq!(subwatch::store::rig_daemon(&at, "north"), None);
    assert!(subwatch::store::claim_rig(&at, "north").is_ok());
}

#[test]
fn a_broken_connection_is_opened_again_at_the_next_call() {
    let db = TestDatabase::new();
    let mut s = Store::connect(&db.location()).unwrap();
    s.record_frame(&record("/a.fits", 1), 1.0).unwrap();
    // The server ends every connection to the database (as a restart would).
    let mut admin =
        postgres::Client::connect(&common::postgres::server(), postgres::NoTls).unwrap();
    let name = db.url.rsplit('/').next().unwrap().to_string();
    admin
        .execute(
            "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = $1",
            &[&name],
        )
        .unwrap();
    // The first call after may see the broken connection; the one after works.
    let first = s.night_counts("2026-03-14");
    if let Err(e) = &first {
        assert!(e.is_unreachable(), "{e}");
    }
    assert_eq!(s.night_counts("2026-03-14").unwrap().frames, 1);
    assert!(matches!(
        s.record_frame(&record("/b.fits", 1), 2.0).unwrap(),
        Recorded::New(_)
    ));
}

#[test]
fn one_daemon_of_a_site_takes_a_lease_and_a_dead_holders_lease_runs_out() {
    on_both(|at| {
        let a = Store::connect_for_rig(at, "north").unwrap();
        let b = Store::connect_for_rig(at, "south").unwrap();
        let key = "summary:2026-03-14";
        let norths = a
            .take_lease(key, "north", 100.0, 600.0)
            .unwrap()
            .expect("free");
        assert!(
            b.take_lease(key, "south", 200.0, 600.0).unwrap().is_none(),
            "{at}"
        );
        assert!(a
            .take_lease(key, "north again", 300.0, 600.0)
            .unwrap()
            .is_none());
        // North stalled holding it: once its time ran out, south takes it, and north's
        // late finish or release does not touch south's lease.
        let souths = b
            .take_lease(key, "south", 701.0, 600.0)
            .unwrap()
            .expect("expired");
        assert!(a.take_lease(key, "north", 702.0, 600.0).unwrap().is_none());
        assert!(!a.finish_lease(key, &norths, "north", 703.0).unwrap());
        a.release_lease(key, &norths).unwrap();
        assert!(a.take_lease(key, "third", 704.0, 600.0).unwrap().is_none());
        assert!(b.finish_lease(key, &souths, "south", 710.0).unwrap());
        // Done is done, however long after.
        assert!(a.take_lease(key, "north", 1.0e9, 600.0).unwrap().is_none());
        // Given back undone, it is free at once.
        let other = a.take_lease("other", "north", 1.0, 600.0).unwrap().unwrap();
        a.release_lease("other", &other).unwrap();
        assert!(b
            .take_lease("other", "south", 2.0, 600.0)
            .unwrap()
            .is_some());
    });
}

#[test]
fn an_sqlite_store_copied_into_postgresql_reads_the_same_and_is_copied_once() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("s.db");
    {
        let mut s = Store::open_for_rig(&db, "north").unwrap();
        for (i, path) in ["/a.fits", "/b.fits", "/c.fits"].iter().enumerate() {
            let mut r = record(path, 10 + i as u64);
            r.stars = (0..70).map(|k| star(k as f64, i as f64)).collect();
            s.record_frame(&r, 1.0).unwrap();
        }
        s.add_alert("2026-03-14", "transient", "a flash", 10.0)
            .unwrap();
        s.set_meta("summary:2026-03-14", "sent").unwrap();
        s.save_catalog("T", "V", "2026-03-14", 19.0, &[], &[])
            .unwrap();
        s.set_night_limits("2026-03-14", &[limits(4.0)]).unwrap();
    }
    let pg = TestDatabase::new();
    let copied = subwatch::store::copy(&db, &pg.location(), None).unwrap();
    let n = |t: &str| copied.tables.iter().find(|(name, _)| name == t).unwrap().1;
    assert_eq!(
        (
            n("frames"),
            n("stars"),
            n("alerts"),
            n("catalog_nights"),
            n("night_limits")
        ),
        (3, 210, 1, 1, 1)
    );
    let sqlite = Store::open_for_rig(&db, "north").unwrap();
    let shared = Store::connect_for_rig(&pg.location(), "north").unwrap();
    let read = |s: &Store| {
        let mut r = s.night_records("2026-03-14").unwrap();
        r.sort_by(|a, b| a.identity.path.cmp(&b.identity.path));
        r.iter()
            .map(|f| (f.identity.clone(), f.stars.len(), f.stars[5].x))
            .collect::<Vec<_>>()
    };
    assert_eq!(read(&sqlite), read(&shared));
    assert_eq!(
        shared.night_limits("2026-03-14").unwrap()[0].limits,
        limits(4.0).limits
    );
    assert_eq!(
        shared.meta("summary:2026-03-14").unwrap().as_deref(),
        Some("sent")
    );
    // A second copy of the same rig is refused, and adds nothing.
    let again = subwatch::store::copy(&db, &pg.location(), None).unwrap_err();
    assert!(
        again
            .to_string()
            .contains("already holds 3 frame(s) of rig 'north'"),
        "{again}"
    );
    assert_eq!(shared.night_counts("2026-03-14").unwrap().frames, 3);
}

/// Placements name their reference frame by its record id; a copy gives every frame a new
/// id (here another rig's frame holds the first one), so each placement follows its
/// reference to the new id, and one stored in the earlier form (naming a path) is left
/// out, to be made again.
#[test]
fn a_copy_points_each_placement_at_its_reference_s_new_id() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("s.db");
    let ids: Vec<i64> = {
        let mut s = Store::open_for_rig(&db, "north").unwrap();
        let ids: Vec<i64> = ["/a.fits", "/b.fits", "/c.fits"]
            .iter()
            .enumerate()
            .map(|(i, path)| {
                let mut r = record(path, 10 + i as u64);
                r.stars = (0..5).map(|k| star(k as f64, i as f64)).collect();
                s.record_frame(&r, 1.0).unwrap().id().unwrap()
            })
            .collect();
        for &id in &ids[..2] {
            let p = Placement {
                reference: ids[0],
                registered: true,
                matched: 5,
                ..Default::default()
            };
            s.set_placement(id, &p).unwrap();
        }
        ids
    };
    rusqlite::Connection::open(&db)
        .unwrap()
        .execute(
            "UPDATE frames SET placement_json = ?2 WHERE id = ?1",
            rusqlite::params![
                ids[2],
                r#"{"reference":"/a.fits","registered":true,"matched":5}"#
            ],
        )
        .unwrap();
    let pg = TestDatabase::new();
    let mut south = Store::connect_for_rig(&pg.location(), "south").unwrap();
    south.record_frame(&record("/z.fits", 1), 1.0).unwrap();
    subwatch::store::copy(&db, &pg.location(), None).unwrap();
    let shared = Store::connect_for_rig(&pg.location(), "north").unwrap();
    let group = shared
        .group_records("2026-03-14", Some("Kestrel Field A"), Some("L"))
        .unwrap();
    let id_of = |path: &str| group.iter().find(|g| g.1.identity.path == path).unwrap().0;
    assert_ne!(id_of("/a.fits"), ids[0]);
    let placement = |path: &str| {
        group
            .iter()
            .find(|g| g.1.identity.path == path)
            .unwrap()
            .2
            .clone()
    };
    for path in ["/a.fits", "/b.fits"] {
        assert_eq!(
            placement(path).unwrap().reference,
            id_of("/a.fits"),
            "{path}"
        );
    }
    assert_eq!(placement("/c.fits"), None);
}

/// Every row of an SQLite store as text, table by table: what "unchanged" compares.
fn dump(db: &std::path::Path) -> String {
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    let mut out = String::new();
    for table in [
        "frames",
        "reading",
        "alerts",
        "outbox",
        "meta",
        "catalog_nights",
        "catalog",
        "night_limits",
    ] {
        let mut stmt = conn
            .prepare(&format!("SELECT * FROM {table} ORDER BY 1, 2"))
            .unwrap();
        let n = stmt.column_count();
        let rows = stmt
            .query_map([], |r| {
                Ok((0..n)
                    .map(|i| format!("{:?}", r.get_ref(i).unwrap()))
                    .collect::<Vec<_>>()
                    .join("|"))
            })
            .unwrap();
        for row in rows {
            out.push_str(&format!("{table}: {}\n", row.unwrap()));
        }
    }
    out
}

/// A store an unnamed rig kept, with a path it also recorded under the name `pier`
/// (that record wins, as when a daemon names its rig).
fn unnamed_store(db: &std::path::Path) {
    let mut s = Store::open(db).unwrap();
    for (i, path) in ["/a.fits", "/b.fits", "/c.fits"].iter().enumerate() {
        let mut r = record(path, 10 + i as u64);
        r.stars = (0..5).map(|k| star(k as f64, i as f64)).collect();
        s.record_frame(&r, 1.0).unwrap();
    }
    s.add_alert("2026-03-14", "transient", "a flash", 10.0)
        .unwrap();
    s.set_meta("summary:2026-03-14", "sent").unwrap();
    s.save_catalog("T", "V", "2026-03-14", 19.0, &[], &[])
        .unwrap();
    s.set_night_limits("2026-03-14", &[limits(4.0)]).unwrap();
}

#[test]
fn a_copy_never_writes_its_source_and_names_the_rig_only_in_the_destination() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("s.db");
    unnamed_store(&db);
    let before = dump(&db);
    // The real binary, a server that is not there: the copy fails and the source stays
    // as it was (before, the source's rows were renamed first).
    let out = std::process::Command::new(common::binary())
        .args(["store", "copy", "--from"])
        .arg(&db)
        .args(["--to", "postgresql://nobody@127.0.0.1:9/x", "--rig", "pier"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    assert_eq!(dump(&db), before, "the source changed");
    // Into a real database: every row is the rig's there, and still unnamed here.
    let pg = TestDatabase::new();
    let copied = subwatch::store::copy(&db, &pg.location(), Some("pier")).unwrap();
    let n = |t: &str| copied.tables.iter().find(|(name, _)| name == t).unwrap().1;
    assert_eq!((n("frames"), n("stars"), n("alerts")), (3, 15, 1));
    assert_eq!(dump(&db), before, "the source changed");
    let shared = Store::connect(&pg.location()).unwrap();
    assert_eq!(
        shared.night_rigs("2026-03-14").unwrap(),
        vec!["pier".to_string()]
    );
    let pier = Store::connect_for_rig(&pg.location(), "pier").unwrap();
    assert_eq!(pier.night_counts("2026-03-14").unwrap().frames, 3);
    assert_eq!(pier.night_limits("2026-03-14").unwrap().len(), 1);
    assert_eq!(
        pier.meta("summary:2026-03-14").unwrap().as_deref(),
        Some("sent")
    );
    // The same source, named as the daemon would name it, reads the same.
    let named = dir.path().join("named.db");
    std::fs::copy(&db, &named).unwrap();
    let local = Store::open_for_rig(&named, "pier").unwrap();
    let read = |s: &Store| {
        let mut r = s.night_records("2026-03-14").unwrap();
        r.sort_by(|a, b| a.identity.path.cmp(&b.identity.path));
        r.iter()
            .map(|f| (f.identity.clone(), f.stars.len()))
            .collect::<Vec<_>>()
    };
    assert_eq!(read(&local), read(&pier));
}

#[test]
fn a_claim_lost_with_the_servers_sessions_is_taken_again_unless_another_daemon_has_it() {
    let db = TestDatabase::new();
    let at = db.location();
    let name = db.url.rsplit('/').next().unwrap().to_string();
    let end_sessions = || {
        let mut admin =
            postgres::Client::connect(&common::postgres::server(), postgres::NoTls).unwrap();
        admin
            .execute(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = $1",
                &[&name],
            )
            .unwrap();
    };
    // The first answer after the break may still be the broken connection's.
    let settled = |c: &subwatch::store::PgClaim| {
        let _ = c.keep();
        c.keep().unwrap()
    };
    let north = subwatch::store::claim_rig(&at, "north").unwrap();
    assert!(north.keep().unwrap());
    end_sessions();
    assert!(settled(&north), "nobody else wanted it: taken again");
    assert!(subwatch::store::rig_daemon(&at, "north").is_some());
    end_sessions();
    let usurper = subwatch::store::claim_rig(&at, "north").unwrap();
    assert!(!settled(&north), "another daemon took the rig first");
    drop(usurper);
}

/// A measured light frame of `target` on `night`, `exposure_s` long, with the metrics a
/// target's summary reads.
fn measured(path: &str, night: &str, target: &str, t: f64, exposure_s: f64) -> FrameRecord {
    let mut r = record(path, 10);
    r.night = Some(night.into());
    r.target = Some(target.into());
    r.time_unix = Some(t);
    r.header = Some(subwatch::record::HeaderFacts {
        exposure_s: Some(exposure_s),
        ..Default::default()
    });
    r.metrics = Some(
        serde_json::from_value(serde_json::json!({
            "width": 100, "height": 100, "star_count": 120, "fwhm_px": 3.1,
            "fwhm_arcsec": null, "eccentricity": 0.1, "background_adu": 1000.0,
            "noise_adu": 10.0, "snr_median": 40.0, "hfr_px": 1.6, "saturated_count": 2,
            "sharp_count": 0, "background_range_adu": 3.0, "plate_scale_arcsec": null,
            "bright_snr": [300.0, 200.0, 150.0, 120.0, 100.0]
        }))
        .unwrap(),
    );
    r
}

#[test]
fn a_targets_frames_across_nights_and_an_archives_folder_leases() {
    use subwatch::rules::Verdict;
    on_both(|at| {
        let mut s = Store::connect(at).unwrap();
        let frames = [
            measured("/n2/b.fits", "2026-03-11", "Kestrel Field A", 200.0, 300.0),
            measured("/n1/a.fits", "2026-03-10", "Kestrel Field A", 100.0, 300.0),
            measured("/n1/c.fits", "2026-03-10", "Kestrel Field A", 110.0, 120.0),
            measured("/n1/z.fits", "2026-03-10", "Kestrel Field C", 120.0, 60.0),
        ];
        let mut ids = Vec::new();
        for f in &frames {
            ids.push(s.record_frame(f, 1.0).unwrap().id().unwrap());
        }
        let mut dark = record("/n1/dark.fits", 10);
        dark.status = subwatch::record::FrameStatus::Skipped;
        dark.night = Some("2026-03-10".into());
        dark.target = Some("Kestrel Field A".into());
        s.record_frame(&dark, 1.0).unwrap();
        s.set_verdict(ids[0], Verdict::Warn, &["fwhm_high".into()])
            .unwrap();
        s.set_verdict(ids[1], Verdict::Ok, &[]).unwrap();
        s.set_verdict(ids[2], Verdict::Reject, &["trail".into()])
            .unwrap();

        // A target's light frames in time order, with their night's verdict, exposure
        // and metrics (the dark is not one of them; nor is another target's frame).
        let got = s.target_frames("Kestrel Field A").unwrap();
        let paths: Vec<&str> = got.iter().map(|f| f.path.as_str()).collect();
        assert_eq!(paths, ["/n1/a.fits", "/n1/c.fits", "/n2/b.fits"], "{at}");
        assert_eq!(got[0].verdict, Some(Verdict::Ok));
        assert_eq!(got[2].verdict, Some(Verdict::Warn));
        assert_eq!(got[1].exposure_s, Some(120.0));
        assert!(got.iter().all(|f| f.readable));
        let q = got[0].quality.as_ref().unwrap();
        assert_eq!((q.fwhm_px, q.saturated_count), (Some(3.1), 2));
        assert_eq!(q.bright_snr.as_ref().unwrap().len(), 5);
        let targets = s.targets().unwrap();
        assert_eq!(targets.len(), 2);
        assert_eq!(
            (targets[0].nights, targets[0].frames),
            (2, 3),
            "{:?}",
            targets[0]
        );
        assert_eq!(targets[0].first_night.as_deref(), Some("2026-03-10"));
        // Usable exposure per night and filter: the frames the nights keep.
        let usable = s.target_usable("Kestrel Field A", true).unwrap();
        let of = |u: &[subwatch::season::plan::NightUsable], n: &str| {
            u.iter().find(|x| x.night == n).map(|x| x.usable_s)
        };
        assert_eq!(of(&usable, "2026-03-10"), Some(300.0));
        assert_eq!(of(&usable, "2026-03-11"), Some(300.0));
        let without_warned = s.target_usable("Kestrel Field A", false).unwrap();
        assert_eq!(of(&without_warned, "2026-03-11"), None);

        // What an archive reads: every frame held, a night's fingerprint.
        let held = s.archived_frames().unwrap();
        assert_eq!(held.len(), 5);
        assert!(!held["/n1/dark.fits"].light);
        assert_eq!(held["/n1/c.fits"].verdict, Some(Verdict::Reject));
        assert_eq!(held["/n1/z.fits"].verdict, None);
        assert_eq!(s.recorded_version("/n1/a.fits").unwrap(), Some((10, 7)));
        assert_eq!(s.recorded_version("/n9/none.fits").unwrap(), None);
        let before = s.night_fingerprint("2026-03-10").unwrap();
        assert_eq!(before.0, 4);
        s.record_frame(
            &measured("/n1/d.fits", "2026-03-10", "Kestrel Field A", 130.0, 300.0),
            2.0,
        )
        .unwrap();
        assert_ne!(s.night_fingerprint("2026-03-10").unwrap(), before);

        // A folder's lease: one holder at a time, renewed while held, taken over once it
        // ran out, and let go.
        let unit = "2026-03-10/L";
        let lease = s
            .take_archive_unit(unit, "pc1 process 1", 100.0, 30.0)
            .unwrap()
            .expect("a free folder is leased");
        assert_eq!(
            s.take_archive_unit(unit, "pc2 process 2", 110.0, 30.0)
                .unwrap(),
            None
        );
        let renewed = s
            .renew_archive_unit(unit, &lease, "pc1 process 1", 120.0, 30.0)
            .unwrap()
            .expect("its holder renews it");
        assert_eq!(
            s.take_archive_unit(unit, "pc2 process 2", 140.0, 30.0)
                .unwrap(),
            None,
            "renewed until 150"
        );
        let taken = s
            .take_archive_unit(unit, "pc2 process 2", 151.0, 30.0)
            .unwrap()
            .expect("a lease that ran out is taken over");
        assert_eq!(
            s.renew_archive_unit(unit, &renewed, "pc1 process 1", 152.0, 30.0)
                .unwrap(),
            None,
            "the first holder lost it"
        );
        s.release_archive_unit(unit, &taken).unwrap();
        assert!(s
            .take_archive_unit(unit, "pc3 process 3", 153.0, 30.0)
            .unwrap()
            .is_some());
    });
}
