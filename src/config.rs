//! The configuration file: TOML read into typed settings, validated once at start.
//! Every problem is collected with the key (and line, where the file has one) that
//! caused it, so a user fixes them all in one go. Unknown keys are errors.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::Deserialize;

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct WatchConfig {
    pub folders: Vec<PathBuf>,
    /// 0 = native file events; otherwise scan the folders every this many seconds.
    pub poll_seconds: f64,
    /// A file must keep its size and time this long before it is measured.
    pub settle_seconds: f64,
    /// File-name patterns (`*` and `?`, case-insensitive) that are frames.
    pub include: Vec<String>,
    pub exclude: Vec<String>,
    /// Folders whose name says they hold calibration frames (compared case-insensitively).
    pub calibration_folders: Vec<String>,
    /// Measurement threads; 0 = one per core.
    pub workers: usize,
    /// Compare the folders with the store this often, in case a file event was missed.
    pub rescan_seconds: f64,
    /// At most this many frames wait for a worker; more are picked up by the next rescan.
    pub queue_limit: usize,
}

impl Default for WatchConfig {
    fn default() -> Self {
        Self {
            folders: Vec::new(),
            poll_seconds: 0.0,
            settle_seconds: 5.0,
            include: [
                "*.fits",
                "*.fit",
                "*.fts",
                "*.fits.fz",
                "*.fits.gz",
                "*.fit.gz",
                "*.fts.gz",
            ]
            .map(String::from)
            .to_vec(),
            exclude: Vec::new(),
            calibration_folders: [
                "dark", "darks", "flat", "flats", "bias", "biases", "offset", "offsets",
            ]
            .map(String::from)
            .to_vec(),
            workers: 0,
            rescan_seconds: 300.0,
            queue_limit: 2000,
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct StoreConfig {
    pub path: PathBuf,
}

impl Default for StoreConfig {
    fn default() -> Self {
        Self {
            path: PathBuf::from("subwatch.db"),
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct SiteConfig {
    /// Degrees, north positive; unset: no Sun, Moon or twilight context.
    pub latitude: Option<f64>,
    /// Degrees, east positive.
    pub longitude: Option<f64>,
    pub elevation_m: f64,
    /// IANA time-zone name, e.g. "Europe/Madrid".
    pub timezone: String,
}

impl Default for SiteConfig {
    fn default() -> Self {
        Self {
            latitude: None,
            longitude: None,
            elevation_m: 0.0,
            timezone: "UTC".into(),
        }
    }
}

#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct OpticsConfig {
    /// Used when a frame's header has no FOCALLEN.
    pub focal_length_mm: Option<f64>,
    /// Unbinned pixel size, used when a header has no XPIXSZ.
    pub pixel_size_um: Option<f64>,
    /// Electrons per ADU, when headers carry no EGAIN.
    pub gain_e_per_adu: Option<f64>,
    /// Saturation level in ADU, when headers carry no SATURATE.
    pub saturation_adu: Option<f64>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MeasureConfig {
    /// Frames with more pixels are refused before any allocation.
    pub max_pixels: u64,
    /// Detection threshold, in σ of the matched-filtered noise.
    pub detect_sigma: f64,
    /// Memory a file's reader (a worker process) may use, MiB; 0 = automatic.
    pub reader_memory_mb: u64,
    /// A file's reader is stopped after this many seconds.
    pub reader_timeout_seconds: f64,
}

impl Default for MeasureConfig {
    fn default() -> Self {
        Self {
            max_pixels: 400_000_000,
            detect_sigma: 5.0,
            reader_memory_mb: 0,
            reader_timeout_seconds: 300.0,
        }
    }
}

impl MeasureConfig {
    /// How frames are read: in a worker process with these limits.
    pub fn reader(&self) -> crate::reader::Reader {
        crate::reader::Reader::Isolated(crate::reader::Isolation::new(
            self.max_pixels,
            self.reader_memory_mb,
            self.reader_timeout_seconds,
        ))
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ActionsConfig {
    /// Write per-night, per-target, per-filter lists of accepted frames.
    pub accepted_lists: bool,
    /// Where the lists go (default: beside the store).
    pub lists_folder: Option<PathBuf>,
    /// Move frames judged "reject" into a folder of this name beside them (off by
    /// default; never on by surprise). Such folders are not watched.
    pub move_rejected: bool,
    pub rejected_folder: String,
}

impl Default for ActionsConfig {
    fn default() -> Self {
        ActionsConfig {
            accepted_lists: false,
            lists_folder: None,
            move_rejected: false,
            rejected_folder: "rejected".into(),
        }
    }
}

#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MailConfig {
    pub smtp_host: Option<String>,
    pub smtp_port: Option<u16>,
    pub security: Option<String>,
    pub username: Option<String>,
    pub password_file: Option<PathBuf>,
    /// An extra certificate authority (PEM) to trust for the mail server: one on the
    /// observatory's own network with a certificate of its own making.
    pub ca_file: Option<PathBuf>,
    pub from: Option<String>,
    pub to: Vec<String>,
    pub summary_time: Option<String>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct AlertsConfig {
    /// Send live alerts by mail (they need `[mail] to`).
    pub enabled: bool,
    pub stopped_minutes: f64,
    pub reject_streak: usize,
    pub min_free_gb: f64,
    pub repeat_minutes: f64,
    pub max_per_night: usize,
    /// Anomaly kinds worth an alert as soon as the night analysis finds them.
    pub anomaly_kinds: Vec<String>,
}

impl Default for AlertsConfig {
    fn default() -> Self {
        let l = crate::watch::alerts::AlertLimits::default();
        AlertsConfig {
            enabled: true,
            stopped_minutes: l.stopped_minutes,
            reject_streak: l.reject_streak,
            min_free_gb: l.min_free_gb,
            repeat_minutes: l.repeat_minutes,
            max_per_night: l.max_per_night,
            anomaly_kinds: vec!["new_source".into(), "moving".into()],
        }
    }
}

impl AlertsConfig {
    pub fn limits(&self) -> crate::watch::alerts::AlertLimits {
        crate::watch::alerts::AlertLimits {
            stopped_minutes: self.stopped_minutes,
            reject_streak: self.reject_streak,
            min_free_gb: self.min_free_gb,
            repeat_minutes: self.repeat_minutes,
            max_per_night: self.max_per_night,
        }
    }
}

#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ReportConfig {
    pub folder: Option<PathBuf>,
}

/// The whole file.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Config {
    pub watch: WatchConfig,
    pub store: StoreConfig,
    pub site: SiteConfig,
    pub optics: OpticsConfig,
    pub measure: MeasureConfig,
    pub actions: ActionsConfig,
    pub mail: MailConfig,
    pub alerts: AlertsConfig,
    pub report: ReportConfig,
    /// Rule tables; their contents are checked by the rules module.
    pub rules: Vec<toml::Table>,
    /// The file this configuration was read from.
    #[serde(skip)]
    pub source: Option<PathBuf>,
}

/// One problem with a configuration, located.
#[derive(Debug, Clone, PartialEq)]
pub struct ConfigProblem {
    pub key: String,
    pub line: Option<usize>,
    pub message: String,
}

impl std::fmt::Display for ConfigProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.line {
            Some(l) => write!(f, "line {l}: {}: {}", self.key, self.message),
            None => write!(f, "{}: {}", self.key, self.message),
        }
    }
}

#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("{path}: {source}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path}: {} problem(s):\n  {}", .problems.len(), .problems.iter().map(|p| p.to_string()).collect::<Vec<_>>().join("\n  "))]
    Invalid {
        path: PathBuf,
        problems: Vec<ConfigProblem>,
    },
}

/// Read, parse and validate a configuration file. Checks that need the file system
/// (folders exist, store writable) are in [`Config::check_environment`].
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    // Relative paths in the file are relative to the file's own folder.
    let folder = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let base = std::fs::canonicalize(folder).unwrap_or_else(|_| folder.to_path_buf());
    let mut config = parse(&text, &base).map_err(|problems| ConfigError::Invalid {
        path: path.to_path_buf(),
        problems,
    })?;
    config.source = Some(path.to_path_buf());
    Ok(config)
}

/// Parse configuration text; relative paths are taken from `base` (the file's folder).
pub fn parse(text: &str, base: &Path) -> Result<Config, Vec<ConfigProblem>> {
    let table: toml::Table = text.parse().map_err(|e: toml::de::Error| {
        vec![ConfigProblem {
            key: "(syntax)".into(),
            line: e.span().map(|s| line_of(text, s.start)),
            message: e.message().to_string(),
        }]
    })?;
    let mut problems = unknown_keys(&table, text);
    if !problems.is_empty() {
        return Err(problems);
    }
    let mut config: Config = match Config::deserialize(toml::Value::Table(table)) {
        Ok(c) => c,
        Err(e) => {
            return Err(vec![ConfigProblem {
                key: "(value)".into(),
                line: None,
                message: e.to_string().trim().to_string(),
            }])
        }
    };
    let absolute = |p: &PathBuf| {
        if p.is_absolute() {
            p.clone()
        } else {
            base.join(p)
        }
    };
    config.watch.folders = config.watch.folders.iter().map(absolute).collect();
    config.store.path = absolute(&config.store.path);
    config.actions.lists_folder = config.actions.lists_folder.as_ref().map(absolute);
    config.report.folder = config.report.folder.as_ref().map(absolute);
    config.mail.password_file = config.mail.password_file.as_ref().map(absolute);
    config.mail.ca_file = config.mail.ca_file.as_ref().map(absolute);
    problems.extend(config.validate(text));
    if problems.is_empty() {
        Ok(config)
    } else {
        Err(problems)
    }
}

fn line_of(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// The line where `key` is assigned inside `[section]` (best effort, for messages).
fn find_line(text: &str, section: Option<&str>, key: &str) -> Option<usize> {
    let mut current: Option<String> = None;
    for (i, line) in text.lines().enumerate() {
        let t = line.trim();
        if t.starts_with('[') {
            current = Some(t.trim_matches(|c| c == '[' || c == ']').trim().to_string());
            if section.is_none() && t.trim_matches(|c| c == '[' || c == ']').trim() == key {
                return Some(i + 1);
            }
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
    None
}

/// Every key the schema knows, by section.
fn schema() -> BTreeMap<&'static str, &'static [&'static str]> {
    BTreeMap::from([
        (
            "watch",
            &[
                "folders",
                "poll_seconds",
                "settle_seconds",
                "include",
                "exclude",
                "calibration_folders",
                "workers",
                "rescan_seconds",
                "queue_limit",
            ][..],
        ),
        ("store", &["path"][..]),
        (
            "site",
            &["latitude", "longitude", "elevation_m", "timezone"][..],
        ),
        (
            "optics",
            &[
                "focal_length_mm",
                "pixel_size_um",
                "gain_e_per_adu",
                "saturation_adu",
            ][..],
        ),
        (
            "measure",
            &[
                "max_pixels",
                "detect_sigma",
                "reader_memory_mb",
                "reader_timeout_seconds",
            ][..],
        ),
        (
            "actions",
            &[
                "accepted_lists",
                "lists_folder",
                "move_rejected",
                "rejected_folder",
            ][..],
        ),
        (
            "mail",
            &[
                "smtp_host",
                "smtp_port",
                "security",
                "username",
                "password_file",
                "ca_file",
                "from",
                "to",
                "summary_time",
            ][..],
        ),
        ("report", &["folder"][..]),
        (
            "alerts",
            &[
                "enabled",
                "stopped_minutes",
                "reject_streak",
                "min_free_gb",
                "repeat_minutes",
                "max_per_night",
                "anomaly_kinds",
            ][..],
        ),
    ])
}

fn unknown_keys(table: &toml::Table, text: &str) -> Vec<ConfigProblem> {
    let schema = schema();
    let mut problems = Vec::new();
    for (section, value) in table {
        if section == "rules" {
            continue;
        }
        let Some(known) = schema.get(section.as_str()) else {
            problems.push(ConfigProblem {
                key: section.clone(),
                line: find_line(text, None, section),
                message: format!(
                    "unknown section (known: {})",
                    schema.keys().copied().collect::<Vec<_>>().join(", ")
                ),
            });
            continue;
        };
        let Some(inner) = value.as_table() else {
            problems.push(ConfigProblem {
                key: section.clone(),
                line: find_line(text, None, section),
                message: "must be a table ([section])".into(),
            });
            continue;
        };
        for key in inner.keys() {
            if !known.contains(&key.as_str()) {
                problems.push(ConfigProblem {
                    key: format!("{section}.{key}"),
                    line: find_line(text, Some(section), key),
                    message: format!("unknown key (known in [{section}]: {})", known.join(", ")),
                });
            }
        }
    }
    problems
}

impl Config {
    fn validate(&self, text: &str) -> Vec<ConfigProblem> {
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
        if !(self.watch.poll_seconds >= 0.0 && self.watch.poll_seconds <= 86_400.0) {
            bad(
                "watch",
                "poll_seconds",
                "must be between 0 (file events) and 86400".into(),
            );
        }
        if !(self.watch.settle_seconds >= 0.0 && self.watch.settle_seconds <= 3600.0) {
            bad(
                "watch",
                "settle_seconds",
                "must be between 0 and 3600".into(),
            );
        }
        if self.watch.rescan_seconds.is_nan() || self.watch.rescan_seconds < 1.0 {
            bad("watch", "rescan_seconds", "must be at least 1".into());
        }
        if self.watch.queue_limit == 0 {
            bad("watch", "queue_limit", "must be at least 1".into());
        }
        if self.actions.move_rejected
            && (self.actions.rejected_folder.is_empty()
                || self.actions.rejected_folder.contains(['/', '\\'])
                || self.actions.rejected_folder.starts_with('.'))
        {
            bad(
                "actions",
                "rejected_folder",
                "must be a plain folder name (no slashes, not hidden)".into(),
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
            bad(
                "site",
                "latitude",
                "give both latitude and longitude, or neither".into(),
            );
        }
        if self
            .site
            .latitude
            .is_some_and(|l| !(-90.0..=90.0).contains(&l))
        {
            bad(
                "site",
                "latitude",
                "must be between -90 and 90 degrees".into(),
            );
        }
        if self
            .site
            .longitude
            .is_some_and(|l| !(-180.0..=360.0).contains(&l))
        {
            bad(
                "site",
                "longitude",
                "must be between -180 and 360 degrees (east positive)".into(),
            );
        }
        if self.site.timezone.parse::<chrono_tz::Tz>().is_err() {
            bad(
                "site",
                "timezone",
                format!(
                    "{:?} is not an IANA time-zone name (e.g. \"Europe/Madrid\")",
                    self.site.timezone
                ),
            );
        }
        for (key, v) in [
            ("focal_length_mm", self.optics.focal_length_mm),
            ("pixel_size_um", self.optics.pixel_size_um),
            ("gain_e_per_adu", self.optics.gain_e_per_adu),
            ("saturation_adu", self.optics.saturation_adu),
        ] {
            if v.is_some_and(|v| !(v > 0.0 && v.is_finite())) {
                bad("optics", key, "must be a positive number".into());
            }
        }
        if self.measure.max_pixels == 0 {
            bad("measure", "max_pixels", "must be positive".into());
        }
        if !(self.measure.reader_timeout_seconds >= 1.0
            && self.measure.reader_timeout_seconds <= 86_400.0)
        {
            bad(
                "measure",
                "reader_timeout_seconds",
                "must be between 1 and 86400".into(),
            );
        }
        if !(self.measure.detect_sigma >= 2.0 && self.measure.detect_sigma <= 100.0) {
            bad(
                "measure",
                "detect_sigma",
                "must be between 2 and 100".into(),
            );
        }
        const KINDS: [&str; 7] = [
            "transient",
            "trail",
            "moving",
            "variable",
            "color",
            "hot_pixel",
            "new_source",
        ];
        for k in &self.alerts.anomaly_kinds {
            if !KINDS.contains(&k.as_str()) {
                bad(
                    "alerts",
                    "anomaly_kinds",
                    format!("{k:?} is not one of {}", KINDS.join(", ")),
                );
            }
        }
        if let Some(sec) = &self.mail.security {
            if !["starttls", "tls", "none"].contains(&sec.as_str()) {
                bad(
                    "mail",
                    "security",
                    format!("{sec:?} is not one of \"starttls\", \"tls\", \"none\""),
                );
            }
        }
        for (k, t) in self.rules.iter().enumerate() {
            let key = format!("rules[{}]", k + 1);
            match crate::rules::RuleSpec::deserialize(toml::Value::Table(t.clone())) {
                Ok(r) => {
                    for problem in r.problems() {
                        p.push(ConfigProblem {
                            key: key.clone(),
                            line: None,
                            message: problem,
                        });
                    }
                }
                Err(e) => p.push(ConfigProblem {
                    key,
                    line: None,
                    message: e.to_string().trim().to_string(),
                }),
            }
        }
        p
    }

    /// Checks against the machine: folders exist, the store's folder is writable, a
    /// password file is not readable by others. Returns (errors, warnings).
    pub fn check_environment(&self) -> (Vec<String>, Vec<String>) {
        let mut errors = Vec::new();
        let mut warnings = Vec::new();
        for f in &self.watch.folders {
            if !f.is_dir() {
                errors.push(format!("watch.folders: {} is not a folder", f.display()));
            }
        }
        let store_dir = self.store.path.parent().unwrap_or(Path::new("."));
        if !store_dir.is_dir() {
            errors.push(format!(
                "store.path: folder {} does not exist",
                store_dir.display()
            ));
        } else {
            let probe = store_dir.join(format!(".subwatch-write-test-{}", std::process::id()));
            match std::fs::write(&probe, b"") {
                Ok(()) => {
                    let _ = std::fs::remove_file(&probe);
                }
                Err(e) => errors.push(format!(
                    "store.path: cannot write in {}: {e}",
                    store_dir.display()
                )),
            }
        }
        if let Some(pw) = &self.mail.password_file {
            #[cfg(unix)]
            {
                use std::os::unix::fs::PermissionsExt;
                match std::fs::metadata(pw) {
                    Ok(m) if m.permissions().mode() & 0o044 != 0 => warnings.push(format!(
                        "mail.password_file: {} is readable by other users; chmod 600 it",
                        pw.display()
                    )),
                    Ok(_) => {}
                    Err(e) => errors.push(format!("mail.password_file: {}: {e}", pw.display())),
                }
            }
        }
        if let Some(ca) = &self.mail.ca_file {
            if let Err(e) = std::fs::read(ca) {
                errors.push(format!("mail.ca_file: {}: {e}", ca.display()));
            }
        }
        (errors, warnings)
    }

    /// The `[[rules]]` tables as rules (validated at load; a table that does not read is
    /// left out here and was reported by `load`).
    pub fn rule_specs(&self) -> Vec<crate::rules::RuleSpec> {
        self.rules
            .iter()
            .filter_map(|t| crate::rules::RuleSpec::deserialize(toml::Value::Table(t.clone())).ok())
            .collect()
    }

    /// Folder names never looked into: calibration folders are measured as skipped, but
    /// the folder rejected frames are moved to is not looked at all.
    pub fn ignored_folder(&self, name: &str) -> bool {
        self.actions.move_rejected && name.eq_ignore_ascii_case(&self.actions.rejected_folder)
    }

    /// The site's position (latitude, east longitude, elevation), when configured.
    pub fn site_position(&self) -> Option<(f64, f64, f64)> {
        Some((
            self.site.latitude?,
            self.site.longitude?,
            self.site.elevation_m,
        ))
    }

    /// The site's time zone (validated at load).
    pub fn timezone(&self) -> chrono_tz::Tz {
        self.site.timezone.parse().unwrap_or(chrono_tz::UTC)
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
        assert_eq!(problems.len(), 2, "{problems:?}");
        assert_eq!(problems[0].key, "site.tz");
        assert_eq!(problems[0].line, Some(7));
        assert_eq!(problems[1].key, "watch.settle");
        assert_eq!(problems[1].line, Some(3));
    }

    #[test]
    fn the_example_config_is_valid() {
        // config/subwatch.toml documents every key; it must parse (folders aside).
        let text = include_str!("../config/subwatch.toml");
        let problems = parse(text, Path::new("/")).err().unwrap_or_default();
        assert!(problems.is_empty(), "{problems:?}");
    }

    #[test]
    fn rules_are_read_and_checked() {
        let ok = "[watch]\nfolders = [\"/tmp\"]\n[[rules]]\nreason = \"soft\"\nmetric = \"fwhm_arcsec\"\ntest = \"above\"\nvalue = 4.5\nverdict = \"reject\"\n";
        let c = parse(ok, Path::new("/")).unwrap();
        assert_eq!(c.rule_specs().len(), 1);
        let bad = "[watch]\nfolders = [\"/tmp\"]\n[[rules]]\nreason = \"soft\"\nmetric = \"seeing\"\ntest = \"above\"\nvalue = 4.5\nverdict = \"reject\"\n";
        let problems = parse(bad, Path::new("/")).unwrap_err();
        assert_eq!(problems[0].key, "rules[1]");
        assert!(problems[0].message.contains("seeing"), "{problems:?}");
    }

    #[test]
    fn bad_values_are_all_collected() {
        let text = "[watch]\nfolders = []\npoll_seconds = -1\n[site]\nlatitude = 123\nlongitude = 0\ntimezone = \"Mars/Olympus\"\n";
        let problems = parse(text, Path::new("/")).unwrap_err();
        let keys: Vec<&str> = problems.iter().map(|p| p.key.as_str()).collect();
        assert_eq!(
            keys,
            [
                "watch.folders",
                "watch.poll_seconds",
                "site.latitude",
                "site.timezone"
            ]
        );
    }
}
