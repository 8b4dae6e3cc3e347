//! Reading the configuration text: every known key into its type, with its line and
//! what was expected in words; unknown keys; the `[[rules]]` tables; and the checks that
//! involve more than one key. Longer than most modules because `parse` is the table of
//! every key the file may hold, one entry each, in the order of `config/subwatch.toml`.

use std::path::{Path, PathBuf};

use lettre::message::Mailbox;

use super::*;
use crate::night::AnomalyKind;
use crate::rules::RuleSpec;

/// Walks the parsed TOML, reading each known key into its type and noting every problem
/// with its key and line; what it was never asked for is an unknown key.
struct Reader<'a> {
    root: &'a toml::Table,
    text: &'a str,
    base: &'a Path,
    problems: Vec<ConfigProblem>,
    /// Keys read, as "section.key" (or "section" for a whole section).
    known: Vec<String>,
}

impl<'a> Reader<'a> {
    fn problem(&mut self, section: &str, key: &str, message: String) {
        self.problems.push(ConfigProblem {
            key: if key.is_empty() {
                section.to_string()
            } else {
                format!("{section}.{key}")
            },
            line: find_line(self.text, Some(section), key),
            message,
        });
    }

    fn value(&mut self, section: &str, key: &str) -> Option<&'a toml::Value> {
        self.known.push(format!("{section}.{key}"));
        self.root.get(section)?.as_table()?.get(key)
    }

    /// A value read by `convert` (which says what it expected when it fails), or the
    /// default when the key is absent.
    fn read<T>(
        &mut self,
        section: &str,
        key: &str,
        default: T,
        convert: impl FnOnce(&toml::Value) -> Result<T, String>,
    ) -> T {
        match self.value(section, key) {
            None => default,
            Some(v) => match convert(v) {
                Ok(t) => t,
                Err(expected) => {
                    let found = shown_value(v);
                    self.problem(section, key, format!("{found} is not {expected}"));
                    default
                }
            },
        }
    }

    fn number(
        &mut self,
        section: &str,
        key: &str,
        default: f64,
        range: (f64, f64),
        expected: &str,
    ) -> f64 {
        self.read(section, key, default, |v| {
            number_of(v)
                .filter(|x| *x >= range.0 && *x <= range.1)
                .ok_or_else(|| expected.to_string())
        })
    }

    fn optional_number(
        &mut self,
        section: &str,
        key: &str,
        range: (f64, f64),
        expected: &str,
    ) -> Option<f64> {
        self.read(section, key, None, |v| {
            number_of(v)
                .filter(|x| *x >= range.0 && *x <= range.1)
                .map(Some)
                .ok_or_else(|| expected.to_string())
        })
    }

    fn whole(
        &mut self,
        section: &str,
        key: &str,
        default: u64,
        range: (u64, u64),
        expected: &str,
    ) -> u64 {
        self.read(section, key, default, |v| {
            v.as_integer()
                .and_then(|i| u64::try_from(i).ok())
                .filter(|x| *x >= range.0 && *x <= range.1)
                .ok_or_else(|| expected.to_string())
        })
    }

    fn flag(&mut self, section: &str, key: &str, default: bool) -> bool {
        self.read(section, key, default, |v| {
            v.as_bool().ok_or_else(|| "true or false".to_string())
        })
    }

    fn text(&mut self, section: &str, key: &str, expected: &str) -> Option<String> {
        self.read(section, key, None, |v| {
            v.as_str()
                .filter(|s| !s.trim().is_empty())
                .map(|s| Some(s.to_string()))
                .ok_or_else(|| expected.to_string())
        })
    }

    fn texts(
        &mut self,
        section: &str,
        key: &str,
        default: Vec<String>,
        expected: &str,
    ) -> Vec<String> {
        self.read(section, key, default, |v| {
            v.as_array()
                .and_then(|a| {
                    a.iter()
                        .map(|x| x.as_str().map(String::from))
                        .collect::<Option<Vec<_>>>()
                })
                .ok_or_else(|| expected.to_string())
        })
    }

    fn absolute(&self, p: &str) -> PathBuf {
        let p = PathBuf::from(p);
        if p.is_absolute() {
            p
        } else {
            self.base.join(p)
        }
    }

    fn path(&mut self, section: &str, key: &str) -> Option<PathBuf> {
        self.text(section, key, "a path (text, such as \"/var/lib/subwatch\")")
            .map(|p| self.absolute(&p))
    }

    /// Every section the file has that nothing read, and every key in a known section
    /// that nothing read.
    fn unknown(&mut self) {
        let sections: Vec<&str> = SECTIONS.to_vec();
        for (section, value) in self.root {
            if section == "rules" {
                continue;
            }
            if !sections.contains(&section.as_str()) {
                self.problems.push(ConfigProblem {
                    key: section.clone(),
                    line: find_line(self.text, None, section),
                    message: format!("unknown section (known: {})", sections.join(", ")),
                });
                continue;
            }
            let Some(inner) = value.as_table() else {
                self.problems.push(ConfigProblem {
                    key: section.clone(),
                    line: find_line(self.text, None, section),
                    message: "must be a table ([section])".into(),
                });
                continue;
            };
            let known: Vec<String> = self
                .known
                .iter()
                .filter_map(|k| k.strip_prefix(&format!("{section}.")).map(String::from))
                .collect();
            for key in inner.keys() {
                if !known.contains(key) {
                    self.problems.push(ConfigProblem {
                        key: format!("{section}.{key}"),
                        line: find_line(self.text, Some(section), key),
                        message: format!(
                            "unknown key (known in [{section}]: {})",
                            known.join(", ")
                        ),
                    });
                }
            }
        }
    }
}

const SECTIONS: [&str; 14] = [
    "watch",
    "store",
    "rig",
    "site",
    "optics",
    "measure",
    "actions",
    "mail",
    "alerts",
    "report",
    "web",
    "voevent",
    "calibration",
    "catalogue",
];

/// A rig's name goes into every record and the site's summary: plain characters only,
/// so it reads the same in a mail subject, a file name and a database.
/// A PostgreSQL address the client can read, with no password in it.
fn postgres_url_ok(url: &str) -> bool {
    (url.starts_with("postgresql://") || url.starts_with("postgres://"))
        && url
            .replace("sslmode=verify-full", "sslmode=require")
            .replace("sslmode=verify-ca", "sslmode=require")
            .parse::<postgres::Config>()
            .is_ok_and(|c| c.get_password().is_none())
}

/// A rig name: 1 to 64 letters, digits, spaces, dots, dashes or underscores.
pub fn rig_name_ok(s: &str) -> bool {
    let t = s.trim();
    !t.is_empty()
        && t == s
        && s.chars().count() <= 64
        && s.chars()
            .all(|c| c.is_alphanumeric() || matches!(c, ' ' | '.' | '-' | '_'))
}

/// `[catalogue]`: the files, the index, and which columns hold what.
fn read_catalogue(r: &mut Reader<'_>) -> CatalogueConfig {
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
    let mags = if magnitudes.is_empty() {
        vec![(column(r, "mag_column", "mag"), None)]
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

/// A number from an integer or a float.
fn number_of(v: &toml::Value) -> Option<f64> {
    v.as_float()
        .or_else(|| v.as_integer().map(|i| i as f64))
        .filter(|x| x.is_finite())
}

/// A value as the user wrote it, for messages.
fn shown_value(v: &toml::Value) -> String {
    let s = v.to_string();
    if s.chars().count() > 60 {
        format!("{}…", s.chars().take(60).collect::<String>())
    } else {
        s
    }
}

/// "06:30" (24-hour clock, before noon) or "dawn".
pub fn parse_summary_time(s: &str) -> Option<SummaryTime> {
    if s == "dawn" {
        return Some(SummaryTime::Dawn);
    }
    let (h, m) = s.split_once(':')?;
    let ok = |t: &str, max: u32| -> Option<u32> {
        (t.len() == 2 && t.bytes().all(|b| b.is_ascii_digit()))
            .then(|| t.parse().ok())
            .flatten()
            .filter(|v| *v <= max)
    };
    // The morning belongs to the night until local noon.
    let (h, m) = (ok(h, 11)?, ok(m, 59)?);
    Some(SummaryTime::At(h, m))
}

/// Parse configuration text; relative paths are taken from `base` (the file's folder).
pub fn parse(text: &str, base: &Path) -> Result<Config, Vec<ConfigProblem>> {
    let root: toml::Table = text.parse().map_err(|e: toml::de::Error| {
        vec![ConfigProblem {
            key: "(syntax)".into(),
            line: e.span().map(|s| line_of(text, s.start)),
            message: e.message().to_string(),
        }]
    })?;
    let mut r = Reader {
        root: &root,
        text,
        base,
        problems: Vec::new(),
        known: Vec::new(),
    };
    let d = Config::default();
    let secs = |range: &str| format!("a number of seconds {range}");

    let watch = WatchConfig {
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
            d.watch.poll_seconds,
            (0.0, 86_400.0),
            &secs("from 0 (file events) to 86400"),
        ),
        settle_seconds: r.number(
            "watch",
            "settle_seconds",
            d.watch.settle_seconds,
            (0.0, 3600.0),
            &secs("from 0 to 3600"),
        ),
        include: r.texts(
            "watch",
            "include",
            d.watch.include.clone(),
            "a list of file-name patterns (such as [\"*.fits\"])",
        ),
        exclude: r.texts(
            "watch",
            "exclude",
            d.watch.exclude.clone(),
            "a list of file-name patterns (such as [\"*_preview*\"])",
        ),
        calibration_folders: r.texts(
            "watch",
            "calibration_folders",
            d.watch.calibration_folders.clone(),
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
            d.watch.rescan_seconds,
            (1.0, 86_400.0),
            &secs("from 1 to 86400"),
        ),
        queue_limit: r.whole(
            "watch",
            "queue_limit",
            d.watch.queue_limit as u64,
            (1, 1_000_000),
            "a whole number from 1 to 1000000",
        ) as usize,
        checks_seconds: r.number(
            "watch",
            "checks_seconds",
            d.watch.checks_seconds,
            (1.0, 3600.0),
            &secs("from 1 to 3600"),
        ),
    };
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
    let store = StoreConfig {
        path: path.unwrap_or_else(|| r.absolute("subwatch.db")),
        url,
        password_file,
        ca_file,
    };
    let rig = RigConfig {
        name: r.read("rig", "name", String::new(), |v| {
            v.as_str()
                .filter(|s| rig_name_ok(s))
                .map(str::to_string)
                .ok_or_else(|| {
                    "a name of 1 to 64 letters, digits, spaces, dots, dashes or underscores, unique at the site"
                        .to_string()
                })
        }),
    };
    let site = SiteConfig {
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
    };
    let positive = "a positive number";
    let optics = OpticsConfig {
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
    };
    let measure = MeasureConfig {
        max_pixels: r.whole(
            "measure",
            "max_pixels",
            d.measure.max_pixels,
            (1, 1 << 40),
            "a whole number of pixels of 1 or more",
        ),
        detect_sigma: r.number(
            "measure",
            "detect_sigma",
            d.measure.detect_sigma,
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
            d.measure.reader_timeout_seconds,
            (1.0, 86_400.0),
            &secs("from 1 to 86400"),
        ),
    };
    let actions = ActionsConfig {
        accepted_lists: r.flag("actions", "accepted_lists", false),
        lists_folder: r.path("actions", "lists_folder"),
        stack_warned: r.flag("actions", "stack_warned", true),
        move_rejected: r.flag("actions", "move_rejected", false),
        rejected_folder: r.read(
            "actions",
            "rejected_folder",
            d.actions.rejected_folder.clone(),
            |v| {
                v.as_str()
                    .filter(|s| !s.is_empty() && !s.contains(['/', '\\']) && !s.starts_with('.'))
                    .map(String::from)
                    .ok_or_else(|| {
                        "a plain folder name (no slashes, not hidden), such as \"rejected\""
                            .to_string()
                    })
            },
        ),
    };
    let address =
        "an e-mail address such as \"observer@example.org\" or \"Observer <observer@example.org>\"";
    let mail = MailConfig {
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
                    s.parse::<Mailbox>()
                        .map_err(|e| format!("a list of addresses: {s:?} is not {address} ({e})"))
                })
                .collect()
        }),
        summary_time: r.read("mail", "summary_time", None, |v| {
            v.as_str()
                .and_then(parse_summary_time)
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
    };
    let alerts = AlertsConfig {
        enabled: r.flag("alerts", "enabled", true),
        stopped_minutes: r.number(
            "alerts",
            "stopped_minutes",
            d.alerts.stopped_minutes,
            (1.0, 1440.0),
            "a number of minutes from 1 to 1440",
        ),
        reject_streak: r.whole(
            "alerts",
            "reject_streak",
            d.alerts.reject_streak as u64,
            (1, 10_000),
            "a whole number of frames of 1 or more",
        ) as usize,
        min_free_gb: r.number(
            "alerts",
            "min_free_gb",
            d.alerts.min_free_gb,
            (0.0, 1e6),
            "a number of GB of 0 or more",
        ),
        repeat_minutes: r.number(
            "alerts",
            "repeat_minutes",
            d.alerts.repeat_minutes,
            (0.0, 10_080.0),
            "a number of minutes from 0 to 10080",
        ),
        max_per_night: r.whole(
            "alerts",
            "max_per_night",
            d.alerts.max_per_night as u64,
            (0, 10_000),
            "a whole number of alerts",
        ) as usize,
        anomaly_kinds: r.read(
            "alerts",
            "anomaly_kinds",
            d.alerts.anomaly_kinds.clone(),
            |v| {
                let expected = || {
                    format!(
                        "a list of anomaly kinds from {}",
                        AnomalyKind::NAMES.join(", ")
                    )
                };
                v.as_array()
                    .ok_or_else(expected)?
                    .iter()
                    .map(|k| {
                        k.as_str().and_then(AnomalyKind::from_name).ok_or_else(|| {
                            format!("{}: {} is not one of them", expected(), shown_value(k))
                        })
                    })
                    .collect()
            },
        ),
    };
    let report = ReportConfig {
        folder: r.path("report", "folder"),
    };
    let web = WebConfig {
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
    };
    let kinds_expected = || {
        format!(
            "a list of anomaly kinds from {}",
            AnomalyKind::NAMES.join(", ")
        )
    };
    let voevent = VoEventConfig {
        folder: r.path("voevent", "folder"),
        kinds: r.read(
            "voevent",
            "kinds",
            VoEventConfig::default().kinds,
            |v| {
                v.as_array()
                    .ok_or_else(kinds_expected)?
                    .iter()
                    .map(|k| {
                        k.as_str().and_then(AnomalyKind::from_name).ok_or_else(|| {
                            format!("{}: {} is not one of them", kinds_expected(), shown_value(k))
                        })
                    })
                    .collect()
            },
        ),
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
    };
    let cal_default = crate::night::calibration::CalibrationSettings::default();
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
    let calibration = CalibrationConfig {
        library: r.path("calibration", "library"),
        settings: crate::night::calibration::CalibrationSettings {
            library_days: r.whole(
                "calibration",
                "library_days",
                cal_default.library_days as u64,
                (0, 3650),
                "a whole number of nights from 0 to 3650",
            ) as u32,
            flat_level_warn: r.read(
                "calibration",
                "flat_level_warn",
                cal_default.flat_level_warn,
                band,
            ),
            flat_level_reject: r.read(
                "calibration",
                "flat_level_reject",
                cal_default.flat_level_reject,
                band,
            ),
        },
    };
    let catalogue = read_catalogue(&mut r);
    let rules = read_rules(&mut r);
    r.unknown();
    let mut problems = std::mem::take(&mut r.problems);
    let config = Config {
        watch,
        store,
        rig,
        site,
        optics,
        measure,
        actions,
        mail,
        alerts,
        report,
        web,
        voevent,
        calibration,
        catalogue,
        rules,
        source: None,
    };
    let reported: Vec<String> = problems.iter().map(|p| p.key.clone()).collect();
    problems.extend(
        config
            .cross_checks(text)
            .into_iter()
            // One problem per key: a value already refused is not reported again.
            .filter(|p| !reported.contains(&p.key)),
    );
    if problems.is_empty() {
        Ok(config)
    } else {
        Err(problems)
    }
}

/// The `[[rules]]` tables, each read into a rule and checked.
fn read_rules(r: &mut Reader<'_>) -> Vec<RuleSpec> {
    let Some(value) = r.root.get("rules") else {
        return Vec::new();
    };
    let Some(tables) = value.as_array() else {
        r.problems.push(ConfigProblem {
            key: "rules".into(),
            line: find_line(r.text, None, "rules"),
            message: "must be [[rules]] tables".into(),
        });
        return Vec::new();
    };
    let mut rules = Vec::new();
    for (k, t) in tables.iter().enumerate() {
        let key = format!("rules[{}]", k + 1);
        let line = nth_rules_line(r.text, k);
        match RuleSpec::deserialize_value(t) {
            Ok(rule) => {
                let problems = rule.problems();
                for message in &problems {
                    r.problems.push(ConfigProblem {
                        key: key.clone(),
                        line,
                        message: message.clone(),
                    });
                }
                if problems.is_empty() {
                    rules.push(rule);
                }
            }
            Err(message) => r.problems.push(ConfigProblem { key, line, message }),
        }
    }
    rules
}

fn line_of(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// The line of the `k`-th (0-based) `[[rules]]` header.
fn nth_rules_line(text: &str, k: usize) -> Option<usize> {
    text.lines()
        .enumerate()
        .filter(|(_, l)| l.trim().replace(' ', "") == "[[rules]]")
        .nth(k)
        .map(|(i, _)| i + 1)
}

/// The line where `key` is assigned inside `[section]` (best effort, for messages).
fn find_line(text: &str, section: Option<&str>, key: &str) -> Option<usize> {
    let mut current: Option<String> = None;
    for (i, line) in text.lines().enumerate() {
        let t = line.trim();
        if t.starts_with('[') {
            let name = t.trim_matches(|c| c == '[' || c == ']').trim().to_string();
            if section.is_none() && name == key {
                return Some(i + 1);
            }
            current = Some(name);
            continue;
        }
        let in_section = match section {
            Some(s) => current.as_deref() == Some(s),
            None => current.is_none(),
        };
        if in_section {
            if let Some((k, _)) = t.split_once('=') {
                if k.trim().trim_matches('"') == key {
                    return Some(i + 1);
                }
            }
        }
    }
    // A key left out is reported at its section.
    section.and_then(|s| find_line(text, None, s))
}

impl Config {
    /// Problems that involve more than one key.
    fn cross_checks(&self, text: &str) -> Vec<ConfigProblem> {
        let mut p = Vec::new();
        let mut bad = |section: &str, key: &str, message: String| {
            p.push(ConfigProblem {
                key: format!("{section}.{key}"),
                line: find_line(text, Some(section), key),
                message,
            })
        };
        if self.watch.folders.is_empty() {
            bad(
                "watch",
                "folders",
                "at least one folder to watch is required".into(),
            );
        }
        if self.watch.include.is_empty() {
            bad(
                "watch",
                "include",
                "no file pattern: nothing would be measured".into(),
            );
        }
        if self.site.latitude.is_some() != self.site.longitude.is_some() {
            let missing = if self.site.latitude.is_none() {
                "latitude"
            } else {
                "longitude"
            };
            bad(
                "site",
                missing,
                "give both latitude and longitude, or neither".into(),
            );
        }
        if self.mail.summary_time == Some(SummaryTime::Dawn) && self.site_position().is_none() {
            bad(
                "mail",
                "summary_time",
                "\"dawn\" needs the site: set [site] latitude and longitude, or give a time such as \"07:30\"".into(),
            );
        }
        if self.mail.summary_time.is_some() && self.mail.to.is_empty() {
            bad(
                "mail",
                "summary_time",
                "the summary would go nowhere: [mail] to is empty".into(),
            );
        }
        let (warn, reject) = (
            self.calibration.settings.flat_level_warn,
            self.calibration.settings.flat_level_reject,
        );
        if reject.0 > warn.0 || warn.1 > reject.1 {
            bad(
                "calibration",
                "flat_level_reject",
                format!(
                    "[{}, {}] must hold flat_level_warn [{}, {}]: a flat is rejected only beyond where it warns",
                    reject.0, reject.1, warn.0, warn.1
                ),
            );
        }
        if self.voevent.folder.is_some() && self.voevent.authority.is_none() {
            bad(
                "voevent",
                "folder",
                "VOEvent documents need [voevent] authority, your observatory's own identifier (\"ivo://...\")".into(),
            );
        }
        if let Some(addr) = self.web.listen {
            if !addr.ip().is_loopback()
                && self.web.token_file.is_none()
                && !self.web.open_without_token
            {
                bad(
                    "web",
                    "listen",
                    format!("{addr} is reachable from the network: set [web] token_file to a file holding an access token, or open_without_token = true to serve the page to anyone who can reach it"),
                );
            }
        }
        if self.web.token_file.is_some() && self.web.open_without_token {
            bad(
                "web",
                "open_without_token",
                "token_file is set as well: choose one".into(),
            );
        }
        if self.mail.security == Security::None
            && self.mail.password_file.is_some()
            && !self.mail.send_password_unencrypted
        {
            bad(
                "mail",
                "security",
                "\"none\" would send the password unencrypted; use \"starttls\" or \"tls\", or set send_password_unencrypted = true if the server is on this machine".into(),
            );
        }
        p
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn minimal_config_takes_defaults() {
        let c = parse("[watch]\nfolders = [\"/tmp\"]\n", Path::new("/etc")).unwrap();
        assert_eq!(c.watch.settle_seconds, 5.0);
        assert_eq!(c.store.path, PathBuf::from("/etc/subwatch.db"));
    }

    #[test]
    fn every_unknown_key_is_reported_with_its_line() {
        let text =
            "[watch]\nfolders = [\"/tmp\"]\nsettle = 3\n\n[site]\nlatitude = 40\ntz = \"UTC\"\n";
        let problems = parse(text, Path::new("/")).unwrap_err();
        let keys: Vec<(&str, Option<usize>)> =
            problems.iter().map(|p| (p.key.as_str(), p.line)).collect();
        assert!(keys.contains(&("site.tz", Some(7))), "{problems:?}");
        assert!(keys.contains(&("watch.settle", Some(3))), "{problems:?}");
    }

    #[test]
    fn the_example_config_is_valid() {
        // config/subwatch.toml documents every key; it must parse (folders aside).
        let text = include_str!("../../config/subwatch.toml");
        let problems = parse(text, Path::new("/")).err().unwrap_or_default();
        assert!(problems.is_empty(), "{problems:?}");
    }

    #[test]
    fn the_status_page_stays_on_this_machine_unless_a_token_guards_it() {
        let base = "[watch]\nfolders = [\"/tmp\"]\n[web]\n";
        let read = |web: &str| parse(&format!("{base}{web}"), Path::new("/"));
        let c = read("listen = \"127.0.0.1:8480\"\n").unwrap();
        assert_eq!(c.web.listen, Some("127.0.0.1:8480".parse().unwrap()));
        assert!(read("listen = \"[::1]:8480\"\n").is_ok());
        assert!(read("").unwrap().web.listen.is_none());
        let problems = read("listen = \"8480\"\n").unwrap_err();
        assert_eq!(
            (problems[0].key.as_str(), problems[0].line),
            ("web.listen", Some(4))
        );
        let problems = read("listen = \"0.0.0.0:8480\"\n").unwrap_err();
        assert!(problems[0].message.contains("token_file"), "{problems:?}");
        assert!(read("listen = \"0.0.0.0:8480\"\ntoken_file = \"/etc/t\"\n").is_ok());
        assert!(read("listen = \"0.0.0.0:8480\"\nopen_without_token = true\n").is_ok());
        let both =
            "listen = \"0.0.0.0:8480\"\ntoken_file = \"/etc/t\"\nopen_without_token = true\n";
        assert_eq!(read(both).unwrap_err()[0].key, "web.open_without_token");
    }

    #[test]
    fn voevent_documents_need_an_authority_of_the_observatorys_own() {
        let base = "[watch]\nfolders = [\"/tmp\"]\n[voevent]\nfolder = \"/tmp/ev\"\n";
        let read = |more: &str| parse(&format!("{base}{more}"), Path::new("/"));
        assert_eq!(read("").unwrap_err()[0].key, "voevent.folder");
        let problems = read("authority = \"http://x\"\n").unwrap_err();
        assert_eq!(
            (problems[0].key.as_str(), problems[0].line),
            ("voevent.authority", Some(5))
        );
        let c =
            read("authority = \"ivo://kestrel-ridge.example/subwatch\"\nkinds = [\"moving\"]\n")
                .unwrap();
        assert_eq!(c.voevent.kinds, vec![AnomalyKind::Moving]);
        assert!(read("authority = \"ivo://k.example\"\nkinds = [\"comet\"]\n").is_err());
    }

    #[test]
    fn the_flats_level_band_is_the_users_to_set() {
        let base = "[watch]\nfolders = [\"/tmp\"]\n[calibration]\n";
        let read = |more: &str| parse(&format!("{base}{more}"), Path::new("/"));
        let c = read("flat_level_warn = [0.3, 0.6]\nflat_level_reject = [0.05, 0.9]\n").unwrap();
        assert_eq!(c.calibration.settings.flat_level_warn, (0.3, 0.6));
        assert_eq!(c.calibration.settings.flat_level_reject, (0.05, 0.9));
        assert_eq!(
            read("flat_level_warn = [0.7, 0.6]\n").unwrap_err()[0].key,
            "calibration.flat_level_warn"
        );
        assert_eq!(
            read("flat_level_reject = [0.3, 0.9]\n").unwrap_err()[0].key,
            "calibration.flat_level_reject"
        );
    }

    #[test]
    fn rules_are_read_and_checked_with_their_line() {
        let ok = "[watch]\nfolders = [\"/tmp\"]\n[[rules]]\nreason = \"soft\"\nmetric = \"fwhm_arcsec\"\ntest = \"above\"\nvalue = 4.5\nverdict = \"reject\"\n";
        let c = parse(ok, Path::new("/")).unwrap();
        assert_eq!(c.rule_specs().len(), 1);
        let bad = "[watch]\nfolders = [\"/tmp\"]\n[[rules]]\nreason = \"soft\"\nmetric = \"seeing\"\ntest = \"above\"\nvalue = 4.5\nverdict = \"reject\"\n";
        let problems = parse(bad, Path::new("/")).unwrap_err();
        assert_eq!(problems[0].key, "rules[1]");
        assert_eq!(problems[0].line, Some(3));
        assert!(problems[0].message.contains("seeing"), "{problems:?}");
    }

    #[test]
    fn a_rig_name_is_plain_text() {
        let base = Path::new("/etc");
        let with = |rig: &str| parse(&format!("[watch]\nfolders = [\"/tmp\"]\n{rig}"), base);
        let c = with("[rig]\nname = \"north pier-2\"\n").unwrap();
        assert_eq!(c.rig.name, "north pier-2");
        assert_eq!(with("").unwrap().rig.name, "");
        let long = format!("\"{}\"", "r".repeat(65));
        for bad in [
            "\"\"",
            "\" north\"",
            "\"a/b\"",
            "\"x\\ny\"",
            "7",
            long.as_str(),
        ] {
            let problems = with(&format!("[rig]\nname = {bad}\n")).unwrap_err();
            assert_eq!(problems[0].key, "rig.name", "{bad}: {problems:?}");
        }
    }

    #[test]
    fn bad_values_are_all_collected() {
        let text = "[watch]\nfolders = []\npoll_seconds = -1\n[site]\nlatitude = 123\nlongitude = 0\ntimezone = \"Mars/Olympus\"\n";
        let problems = parse(text, Path::new("/")).unwrap_err();
        let keys: Vec<&str> = problems.iter().map(|p| p.key.as_str()).collect();
        assert_eq!(
            keys,
            [
                "watch.poll_seconds",
                "site.latitude",
                "site.timezone",
                "watch.folders",
            ]
        );
    }

    /// The findings of a new user's first evening: each refused with its key, its line
    /// and what was expected, in words.
    #[test]
    fn values_that_would_fail_at_dawn_are_refused_at_once() {
        let cases: [(&str, &str, &str); 9] = [
            (
                "[mail]\nto = [\"o@example.org\"]\nsummary_time = \"25:99\"\n",
                "mail.summary_time",
                "a time of day before noon such as \"06:30\"",
            ),
            (
                "[mail]\nto = [\"o@example.org\"]\nsummary_time = \"7.30am\"\n",
                "mail.summary_time",
                "a time of day before noon such as \"06:30\"",
            ),
            (
                "[mail]\nto = [\"o@example.org\"]\nsummary_time = \"dawn\"\n",
                "mail.summary_time",
                "\"dawn\" needs the site",
            ),
            (
                "[mail]\nto = [\"not-an-address\"]\n",
                "mail.to",
                "\"not-an-address\" is not an e-mail address",
            ),
            (
                "[mail]\nsummary_time = \"07:30\"\n",
                "mail.summary_time",
                "[mail] to is empty",
            ),
            (
                "[mail]\nsecurity = \"plain\"\n",
                "mail.security",
                "one of \"starttls\", \"tls\", \"none\"",
            ),
            (
                "settle_seconds = \"5\"\n",
                "watch.settle_seconds",
                "\"5\" is not a number of seconds from 0 to 3600",
            ),
            (
                "[alerts]\nanomaly_kinds = [\"hotpixel\"]\n",
                "alerts.anomaly_kinds",
                "\"hotpixel\" is not one of them",
            ),
            (
                "[mail]\nsecurity = \"none\"\npassword_file = \"/etc/pw\"\n",
                "mail.security",
                "unencrypted",
            ),
        ];
        for (extra, key, words) in cases {
            let text = format!("[watch]\nfolders = [\"/tmp\"]\n{extra}");
            let problems = parse(&text, Path::new("/")).unwrap_err();
            let p = problems
                .iter()
                .find(|p| p.key == key)
                .unwrap_or_else(|| panic!("{extra:?}: no problem for {key}: {problems:?}"));
            assert!(
                p.message.contains(words),
                "{extra:?}: {:?} lacks {words:?}",
                p.message
            );
            assert!(p.line.is_some(), "{p:?}");
            assert!(!p.message.contains("expected f64"), "{p:?}");
        }
        // The explicit opt-in lets it through (check_environment warns loudly then).
        let text = "[watch]\nfolders = [\"/tmp\"]\n[mail]\nsecurity = \"none\"\npassword_file = \"/etc/pw\"\nsend_password_unencrypted = true\n";
        let c = parse(text, Path::new("/")).unwrap();
        assert!(c
            .check_environment()
            .1
            .iter()
            .any(|w| w.contains("UNENCRYPTED")));
        assert_eq!(parse_summary_time("06:30"), Some(SummaryTime::At(6, 30)));
        assert_eq!(parse_summary_time("6:30"), None);
        assert_eq!(parse_summary_time("24:00"), None);
        assert_eq!(parse_summary_time("13:00"), None);
    }
}
