//! One function per section of the file, each reading its keys into the section's
//! settings in the order `config/subwatch.toml` lists them; checks within a section stay
//! with it, checks between sections are `Config::cross_checks`.

use std::path::PathBuf;

use lettre::message::Mailbox;

use super::{number_of, rig_name_ok, Reader};
use crate::config::*;

fn seconds(range: &str) -> String {
    format!("a number of seconds {range}")
}

/// `[watch]`: the folders, which files in them are frames, and the daemon's pace.
pub(super) fn watch(r: &mut Reader<'_>) -> WatchConfig {
    let d = WatchConfig::default();
    WatchConfig {
        folders: r
            .texts(
                "watch",
                "folders",
                Vec::new(),
                "a list of folders (such as [\"/srv/capture\"])",
            )
            .iter()
            .map(|f| r.absolute(f))
            .collect(),
        poll_seconds: r.number(
            "watch",
            "poll_seconds",
            d.poll_seconds,
            (0.0, 86_400.0),
            &seconds("from 0 (file events) to 86400"),
        ),
        settle_seconds: r.number(
            "watch",
            "settle_seconds",
            d.settle_seconds,
            (0.0, 3600.0),
            &seconds("from 0 to 3600"),
        ),
        include: r.texts(
            "watch",
            "include",
            d.include.clone(),
            "a list of file-name patterns (such as [\"*.fits\"])",
        ),
        exclude: r.texts(
            "watch",
            "exclude",
            d.exclude.clone(),
            "a list of file-name patterns (such as [\"*_preview*\"])",
        ),
        calibration_folders: r.texts(
            "watch",
            "calibration_folders",
            d.calibration_folders.clone(),
            "a list of folder names (such as [\"darks\", \"flats\"])",
        ),
        workers: r.whole(
            "watch",
            "workers",
            0,
            (0, 256),
            "a whole number of workers from 0 (one per core) to 256",
        ) as usize,
        rescan_seconds: r.number(
            "watch",
            "rescan_seconds",
            d.rescan_seconds,
            (1.0, 86_400.0),
            &seconds("from 1 to 86400"),
        ),
        queue_limit: r.whole(
            "watch",
            "queue_limit",
            d.queue_limit as u64,
            (1, 1_000_000),
            "a whole number from 1 to 1000000",
        ) as usize,
        checks_seconds: r.number(
            "watch",
            "checks_seconds",
            d.checks_seconds,
            (1.0, 3600.0),
            &seconds("from 1 to 3600"),
        ),
    }
}

/// A PostgreSQL address the client can read, with no password in it.
fn postgres_url_ok(url: &str) -> bool {
    (url.starts_with("postgresql://") || url.starts_with("postgres://"))
        && url
            .replace("sslmode=verify-full", "sslmode=require")
            .replace("sslmode=verify-ca", "sslmode=require")
            .parse::<postgres::Config>()
            .is_ok_and(|c| c.get_password().is_none())
}

/// `[store]`: an SQLite file, or a PostgreSQL database with its password and authority.
pub(super) fn store(r: &mut Reader<'_>) -> StoreConfig {
    let path = r.path("store", "path");
    let url: Option<String> = r.read("store", "url", None, |v| {
        v.as_str()
            .filter(|s| postgres_url_ok(s))
            .map(|s| Some(s.to_string()))
            .ok_or_else(|| {
                "a PostgreSQL address \"postgresql://USER@HOST:PORT/DATABASE\", without a password (that goes in password_file)"
                    .to_string()
            })
    });
    if url.is_some() && path.is_some() {
        r.problem(
            "store",
            "url",
            "give path (an SQLite file on this PC) or url (a PostgreSQL database), not both".into(),
        );
    }
    let password_file = r.path("store", "password_file");
    if password_file.is_some() && url.is_none() {
        r.problem(
            "store",
            "password_file",
            "only a PostgreSQL store (url) takes a password".into(),
        );
    }
    let ca_file = r.path("store", "ca_file");
    if ca_file.is_some() && url.is_none() {
        r.problem(
            "store",
            "ca_file",
            "only a PostgreSQL store (url) is reached over TLS".into(),
        );
    }
    StoreConfig {
        path: path.unwrap_or_else(|| r.absolute("subwatch.db")),
        url,
        password_file,
        ca_file,
    }
}

/// `[rig]`: this rig's name where several share a store.
pub(super) fn rig(r: &mut Reader<'_>) -> RigConfig {
    RigConfig {
        name: r.read("rig", "name", String::new(), |v| {
            v.as_str()
                .filter(|s| rig_name_ok(s))
                .map(str::to_string)
                .ok_or_else(|| {
                    "a name of 1 to 64 letters, digits, spaces, dots, dashes or underscores, unique at the site"
                        .to_string()
                })
        }),
    }
}

/// `[site]`: where the observatory is, and its clock.
pub(super) fn site(r: &mut Reader<'_>) -> SiteConfig {
    SiteConfig {
        latitude: r.optional_number(
            "site",
            "latitude",
            (-90.0, 90.0),
            "a latitude in degrees from -90 to 90 (north positive)",
        ),
        longitude: r.optional_number(
            "site",
            "longitude",
            (-180.0, 360.0),
            "a longitude in degrees from -180 to 360 (east positive)",
        ),
        elevation_m: r.number(
            "site",
            "elevation_m",
            0.0,
            (-500.0, 9000.0),
            "an elevation in metres from -500 to 9000",
        ),
        timezone: r.read("site", "timezone", chrono_tz::UTC, |v| {
            v.as_str()
                .and_then(|s| s.parse().ok())
                .ok_or_else(|| "an IANA time-zone name (such as \"Europe/Madrid\")".to_string())
        }),
    }
}

/// `[optics]`: what a frame's header may leave out.
pub(super) fn optics(r: &mut Reader<'_>) -> OpticsConfig {
    let positive = "a positive number";
    OpticsConfig {
        focal_length_mm: r.optional_number(
            "optics",
            "focal_length_mm",
            (1e-3, 1e6),
            "a focal length in mm (a positive number)",
        ),
        pixel_size_um: r.optional_number(
            "optics",
            "pixel_size_um",
            (1e-3, 1e4),
            "a pixel size in micrometres (a positive number)",
        ),
        gain_e_per_adu: r.optional_number("optics", "gain_e_per_adu", (1e-6, 1e6), positive),
        saturation_adu: r.optional_number("optics", "saturation_adu", (1e-6, 1e20), positive),
    }
}

/// `[measure]`: the measurement's limits and threshold.
pub(super) fn measure(r: &mut Reader<'_>) -> MeasureConfig {
    let d = MeasureConfig::default();
    MeasureConfig {
        max_pixels: r.whole(
            "measure",
            "max_pixels",
            d.max_pixels,
            (1, 1 << 40),
            "a whole number of pixels of 1 or more",
        ),
        detect_sigma: r.number(
            "measure",
            "detect_sigma",
            d.detect_sigma,
            (2.0, 100.0),
            "a number from 2 to 100",
        ),
        reader_memory_mb: r.whole(
            "measure",
            "reader_memory_mb",
            0,
            (0, 1 << 30),
            "a whole number of MiB (0 = automatic)",
        ),
        reader_timeout_seconds: r.number(
            "measure",
            "reader_timeout_seconds",
            d.reader_timeout_seconds,
            (1.0, 86_400.0),
            &seconds("from 1 to 86400"),
        ),
    }
}

/// `[actions]`: the lists to stack, and rejected frames moved aside.
pub(super) fn actions(r: &mut Reader<'_>) -> ActionsConfig {
    let d = ActionsConfig::default();
    ActionsConfig {
        accepted_lists: r.flag("actions", "accepted_lists", false),
        lists_folder: r.path("actions", "lists_folder"),
        stack_warned: r.flag("actions", "stack_warned", true),
        move_rejected: r.flag("actions", "move_rejected", false),
        rejected_folder: r.read("actions", "rejected_folder", d.rejected_folder, |v| {
            v.as_str()
                .filter(|s| !s.is_empty() && !s.contains(['/', '\\']) && !s.starts_with('.'))
                .map(String::from)
                .ok_or_else(|| {
                    "a plain folder name (no slashes, not hidden), such as \"rejected\"".to_string()
                })
        }),
    }
}

/// `[mail]`: the server, the addresses and when the summary goes.
pub(super) fn mail(r: &mut Reader<'_>) -> MailConfig {
    let address =
        "an e-mail address such as \"observer@example.org\" or \"Observer <observer@example.org>\"";
    MailConfig {
        smtp_host: r.text(
            "mail",
            "smtp_host",
            "a server name (such as \"mail.example.org\")",
        ),
        smtp_port: r.read("mail", "smtp_port", None, |v| {
            v.as_integer()
                .and_then(|p| u16::try_from(p).ok())
                .filter(|p| *p > 0)
                .map(Some)
                .ok_or_else(|| "a port number from 1 to 65535 (such as 587)".to_string())
        }),
        security: r.read("mail", "security", Security::default(), |v| {
            match v.as_str() {
                Some("starttls") => Ok(Security::StartTls),
                Some("tls") => Ok(Security::Tls),
                Some("none") => Ok(Security::None),
                _ => Err("one of \"starttls\", \"tls\", \"none\"".to_string()),
            }
        }),
        username: r.text("mail", "username", "a login name (text)"),
        password_file: r.path("mail", "password_file"),
        ca_file: r.path("mail", "ca_file"),
        from: r.read("mail", "from", None, |v| {
            v.as_str()
                .and_then(|s| s.parse::<Mailbox>().ok())
                .map(Some)
                .ok_or_else(|| address.to_string())
        }),
        to: r.read("mail", "to", Vec::new(), |v| {
            let list = v
                .as_array()
                .ok_or_else(|| format!("a list of addresses ({address})"))?;
            list.iter()
                .map(|a| {
                    let s = a
                        .as_str()
                        .ok_or_else(|| format!("a list of addresses ({address})"))?;
                    // The parser's own reason ("Invalid input") tells a user nothing the
                    // example does not.
                    s.parse::<Mailbox>()
                        .map_err(|_| format!("a list of addresses: {s:?} is not {address}"))
                })
                .collect()
        }),
        summary_time: r.read("mail", "summary_time", None, |v| {
            v.as_str()
                .and_then(super::parse_summary_time)
                .map(Some)
                .ok_or_else(|| {
                    "a time of day before noon such as \"06:30\" (24-hour clock), or \"dawn\""
                        .to_string()
                })
        }),
        send_password_unencrypted: r.flag("mail", "send_password_unencrypted", false),
        summary_of_site: r.read("mail", "summary_of", false, |v| match v.as_str() {
            Some("rig") => Ok(false),
            Some("site") => Ok(true),
            _ => Err("\"rig\" (this rig's frames) or \"site\" (every rig sharing the store; one daemon sends it)".to_string()),
        }),
    }
}

/// `[alerts]`: what is worth a mail during the night, and how often.
pub(super) fn alerts(r: &mut Reader<'_>) -> AlertsConfig {
    let d = AlertsConfig::default();
    AlertsConfig {
        enabled: r.flag("alerts", "enabled", true),
        stopped_minutes: r.number(
            "alerts",
            "stopped_minutes",
            d.stopped_minutes,
            (1.0, 1440.0),
            "a number of minutes from 1 to 1440",
        ),
        reject_streak: r.whole(
            "alerts",
            "reject_streak",
            d.reject_streak as u64,
            (1, 10_000),
            "a whole number of frames of 1 or more",
        ) as usize,
        min_free_gb: r.number(
            "alerts",
            "min_free_gb",
            d.min_free_gb,
            (0.0, 1e6),
            "a number of GB of 0 or more",
        ),
        repeat_minutes: r.number(
            "alerts",
            "repeat_minutes",
            d.repeat_minutes,
            (0.0, 10_080.0),
            "a number of minutes from 0 to 10080",
        ),
        max_per_night: r.whole(
            "alerts",
            "max_per_night",
            d.max_per_night as u64,
            (0, 10_000),
            "a whole number of alerts",
        ) as usize,
        anomaly_kinds: r.kinds("alerts", "anomaly_kinds", d.anomaly_kinds),
    }
}

/// `[report]`: where the summary's files go.
pub(super) fn report(r: &mut Reader<'_>) -> ReportConfig {
    ReportConfig {
        folder: r.path("report", "folder"),
    }
}

/// `[web]`: the status page's address and its guard.
pub(super) fn web(r: &mut Reader<'_>) -> WebConfig {
    WebConfig {
        listen: r.read("web", "listen", None, |v| {
            v.as_str()
                .and_then(|s| s.parse::<std::net::SocketAddr>().ok())
                .map(Some)
                .ok_or_else(|| {
                    "an address and port such as \"127.0.0.1:8480\" (an IPv6 address in brackets: \"[::1]:8480\")"
                        .to_string()
                })
        }),
        token_file: r.path("web", "token_file"),
        open_without_token: r.flag("web", "open_without_token", false),
    }
}

/// `[voevent]`: the anomalies written as VOEvent documents, and by whom.
pub(super) fn voevent(r: &mut Reader<'_>) -> VoEventConfig {
    VoEventConfig {
        folder: r.path("voevent", "folder"),
        kinds: r.kinds("voevent", "kinds", VoEventConfig::default().kinds),
        authority: r.read("voevent", "authority", None, |v| {
            v.as_str()
                .filter(|a| crate::voevent::valid_authority(a))
                .map(|a| Some(a.to_string()))
                .ok_or_else(|| {
                    "your observatory's own authority identifier, such as \"ivo://kestrel-ridge.example/subwatch\" (ivo:// and a name, no spaces or #)".to_string()
                })
        }),
        author: r.text("voevent", "author", "the observatory's name (text)"),
        attach: r.flag("voevent", "attach", false),
    }
}

/// `[log]`: how many days of the Windows service's daily files are kept.
pub(super) fn log(r: &mut Reader<'_>) -> LogConfig {
    LogConfig {
        keep_days: r.whole(
            "log",
            "keep_days",
            u64::from(LogConfig::default().keep_days),
            (1, 3650),
            "a whole number of days from 1 to 3650",
        ) as u32,
    }
}

/// `[calibration]`: earlier nights' frames, and the flats' level band.
pub(super) fn calibration(r: &mut Reader<'_>) -> CalibrationConfig {
    let d = crate::night::calibration::CalibrationSettings::default();
    let band = |v: &toml::Value| -> Result<(f64, f64), String> {
        let expected = "two fractions of full scale, low then high, such as [0.25, 0.65]";
        let list = v.as_array().ok_or_else(|| expected.to_string())?;
        match list.as_slice() {
            [a, b] => match (number_of(a), number_of(b)) {
                (Some(a), Some(b)) if 0.0 <= a && a < b && b <= 1.0 => Ok((a, b)),
                _ => Err(expected.to_string()),
            },
            _ => Err(expected.to_string()),
        }
    };
    CalibrationConfig {
        library: r.path("calibration", "library"),
        settings: crate::night::calibration::CalibrationSettings {
            library_days: r.whole(
                "calibration",
                "library_days",
                d.library_days as u64,
                (0, 3650),
                "a whole number of nights from 0 to 3650",
            ) as u32,
            flat_level_warn: r.read("calibration", "flat_level_warn", d.flat_level_warn, band),
            flat_level_reject: r.read(
                "calibration",
                "flat_level_reject",
                d.flat_level_reject,
                band,
            ),
        },
    }
}

/// `[catalogue]`: the files, the index, and which columns hold what.
pub(super) fn catalogue(r: &mut Reader<'_>) -> CatalogueConfig {
    let d = crate::catalogue::Columns::default();
    let files: Vec<PathBuf> = r
        .texts("catalogue", "files", Vec::new(), "a list of file paths")
        .iter()
        .map(|p| r.absolute(p))
        .collect();
    let column = |r: &mut Reader<'_>, key: &str, default: &str| {
        r.text("catalogue", key, "a column name (text)")
            .unwrap_or_else(|| default.to_string())
    };
    let names = |v: &toml::Value| -> Result<Vec<(String, String)>, String> {
        let expected = "a table of names, such as { V = \"vmag\", R = \"rmag\" }";
        v.as_table()
            .ok_or_else(|| expected.to_string())?
            .iter()
            .map(|(k, v)| {
                v.as_str()
                    .filter(|s| !s.trim().is_empty())
                    .map(|s| (k.clone(), s.to_string()))
                    .ok_or_else(|| expected.to_string())
            })
            .collect()
    };
    let magnitudes = r.read("catalogue", "magnitudes", Vec::new(), names);
    // Read whether or not `magnitudes` is given, so that giving both is said as such
    // rather than as an unknown key.
    let mag_column = r.text("catalogue", "mag_column", "a column name (text)");
    if !magnitudes.is_empty() && mag_column.is_some() {
        r.problem(
            "catalogue",
            "mag_column",
            "give magnitudes (a column per band) or mag_column (one column), not both".into(),
        );
    }
    let mags = if magnitudes.is_empty() {
        vec![(mag_column.unwrap_or_else(|| "mag".to_string()), None)]
    } else {
        magnitudes
            .into_iter()
            .map(|(band, col)| (col, Some(band)))
            .collect()
    };
    let columns = crate::catalogue::Columns {
        ra: column(r, "ra_column", &d.ra),
        dec: column(r, "dec_column", &d.dec),
        mags,
        id: column(r, "id_column", &d.id),
        band: column(r, "band_column", &d.band),
        pm_ra: column(r, "pm_ra_column", &d.pm_ra),
        pm_dec: column(r, "pm_dec_column", &d.pm_dec),
        epoch: r.number(
            "catalogue",
            "epoch",
            d.epoch,
            (1800.0, 2200.0),
            "a Julian year such as 2000.0 or 2016.0",
        ),
        file_band: r.text("catalogue", "band", "a band name (text), such as \"V\""),
    };
    CatalogueConfig {
        files,
        index: r.path("catalogue", "index"),
        columns,
        filter_bands: r.read("catalogue", "filter_bands", Vec::new(), names),
        search_deg: r.number(
            "catalogue",
            "search_deg",
            1.0,
            (0.0, 10.0),
            "degrees from 0 to 10",
        ),
    }
}
