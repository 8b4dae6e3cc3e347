//! The configuration file: TOML read into typed settings once, at start. Every value is
//! parsed into its type here (numbers into their range, times of day, time zones, mail
//! addresses by lettre's own parser, security modes, anomaly kinds, rules), and every
//! problem is collected with its key, its line and what was expected in plain words, so
//! a user fixes them all in one go and nothing wrong is found later, at dawn. Unknown
//! keys are errors. Checks against the machine (folders exist, the store's folder is
//! writable, the password file's owner and mode) are separate: `check_environment`.
//!
//! Longer than most modules: it declares the settings of every section in one place (the
//! reading is `read`), with what each means; the rest is tests.

mod environment;
mod read;

use std::path::{Path, PathBuf};

use lettre::message::Mailbox;

pub use read::{parse, parse_summary_time, rig_name_ok};

use crate::night::AnomalyKind;
use crate::rules::RuleSpec;

#[derive(Debug, Clone)]
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
    /// Measurement workers; 0 = one per core.
    pub workers: usize,
    /// Compare the folders with the store this often, in case a file event was missed.
    pub rescan_seconds: f64,
    /// At most this many frames wait for a worker; more are picked up by the next rescan.
    pub queue_limit: usize,
    /// How often the daemon checks for frames that stopped, low disk, anomalies worth an
    /// alert, the summary's time and the outbox.
    pub checks_seconds: f64,
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
            checks_seconds: 60.0,
        }
    }
}

#[derive(Debug, Clone)]
pub struct StoreConfig {
    /// The SQLite file (when no `url` is given).
    pub path: PathBuf,
    /// A PostgreSQL database a site's rigs share (`postgresql://USER@HOST:PORT/DB`).
    pub url: Option<String>,
    /// The file holding the database password, this user's alone.
    pub password_file: Option<PathBuf>,
    /// The authority (PEM) that signed the database server's certificate, where it is a
    /// site's own.
    pub ca_file: Option<PathBuf>,
}

impl Default for StoreConfig {
    fn default() -> Self {
        Self {
            path: PathBuf::from("subwatch.db"),
            url: None,
            password_file: None,
            ca_file: None,
        }
    }
}

/// `[rig]`: which telescope and camera this daemon watches, where several share a site.
/// Unnamed (empty) where a rig keeps a store of its own.
#[derive(Debug, Clone, Default)]
pub struct RigConfig {
    pub name: String,
}

#[derive(Debug, Clone)]
pub struct SiteConfig {
    /// Degrees, north positive; unset: no Sun, Moon or twilight context.
    pub latitude: Option<f64>,
    /// Degrees, east positive.
    pub longitude: Option<f64>,
    pub elevation_m: f64,
    pub timezone: chrono_tz::Tz,
}

impl Default for SiteConfig {
    fn default() -> Self {
        Self {
            latitude: None,
            longitude: None,
            elevation_m: 0.0,
            timezone: chrono_tz::UTC,
        }
    }
}

#[derive(Debug, Clone, Default)]
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

#[derive(Debug, Clone)]
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

#[derive(Debug, Clone)]
pub struct ActionsConfig {
    /// Write per-night, per-target, per-filter lists of accepted frames.
    pub accepted_lists: bool,
    /// Where the lists go (default: beside the store).
    pub lists_folder: Option<PathBuf>,
    /// Frames that only warned go into the lists to stack (marked in the summary);
    /// `false` leaves them out.
    pub stack_warned: bool,
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
            stack_warned: true,
            move_rejected: false,
            rejected_folder: "rejected".into(),
        }
    }
}

/// How the connection to the mail server is protected.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Security {
    #[default]
    StartTls,
    Tls,
    None,
}

/// When the daemon mails the morning summary.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SummaryTime {
    /// At this local time of day (hour, minute), before noon.
    At(u32, u32),
    /// 30 minutes after astronomical dawn at the site.
    Dawn,
}

#[derive(Debug, Clone, Default)]
pub struct MailConfig {
    pub smtp_host: Option<String>,
    pub smtp_port: Option<u16>,
    pub security: Security,
    pub username: Option<String>,
    pub password_file: Option<PathBuf>,
    /// An extra certificate authority (PEM) to trust for the mail server: one on the
    /// observatory's own network with a certificate of its own making.
    pub ca_file: Option<PathBuf>,
    pub from: Option<Mailbox>,
    pub to: Vec<Mailbox>,
    pub summary_time: Option<SummaryTime>,
    /// The scheduled summary covers every rig sharing the store (`summary_of = "site"`),
    /// sent by one daemon of the site, rather than this rig alone.
    pub summary_of_site: bool,
    /// The user's explicit consent to send the password over a connection that is not
    /// encrypted (`security = "none"`).
    pub send_password_unencrypted: bool,
}

impl MailConfig {
    /// Whether a password would be sent (a password file, or the environment's).
    pub fn has_password(&self) -> bool {
        self.password_file.is_some() || std::env::var_os("SUBWATCH_SMTP_PASSWORD").is_some()
    }
}

#[derive(Debug, Clone)]
pub struct AlertsConfig {
    /// Send live alerts by mail (they need `[mail] to`).
    pub enabled: bool,
    pub stopped_minutes: f64,
    pub reject_streak: usize,
    pub min_free_gb: f64,
    pub repeat_minutes: f64,
    pub max_per_night: usize,
    /// Anomaly kinds worth an alert as soon as the night analysis finds them.
    pub anomaly_kinds: Vec<AnomalyKind>,
}

impl Default for AlertsConfig {
    fn default() -> Self {
        AlertsConfig {
            enabled: true,
            stopped_minutes: 20.0,
            reject_streak: 3,
            min_free_gb: 5.0,
            repeat_minutes: 60.0,
            max_per_night: 6,
            anomaly_kinds: vec![AnomalyKind::NewSource, AnomalyKind::Moving],
        }
    }
}

#[derive(Debug, Clone, Default)]
pub struct ReportConfig {
    pub folder: Option<PathBuf>,
}

/// `[log]`: the Windows service's daily log files.
#[derive(Debug, Clone)]
pub struct LogConfig {
    /// Days of files kept, today's included.
    pub keep_days: u32,
}

impl Default for LogConfig {
    fn default() -> Self {
        Self { keep_days: 14 }
    }
}

/// Calibration frames kept from earlier nights.
#[derive(Debug, Clone, Default)]
pub struct CalibrationConfig {
    /// A folder of darks, flats and bias frames (or masters) with IMAGETYP, watched with
    /// the capture folders; each is recorded under the night its DATE-OBS gives.
    pub library: Option<PathBuf>,
    /// How many nights back earlier calibration frames count, and the flats' level band.
    pub settings: crate::night::calibration::CalibrationSettings,
}

/// The user's star catalogue: off unless `files` is set.
#[derive(Debug, Clone, Default)]
pub struct CatalogueConfig {
    /// CSV files or FITS binary tables, read once into `index`.
    pub files: Vec<PathBuf>,
    /// Where the index is kept (default: a file in the system's temporary folder named
    /// by the files it holds).
    pub index: Option<PathBuf>,
    pub columns: crate::catalogue::Columns,
    /// The catalogue band that calibrates each filter (frame filter → band); a filter
    /// not listed uses the band of its own name, else the catalogue's first band.
    pub filter_bands: Vec<(String, String)>,
    /// How far a frame's true centre may be from its header's pointing, degrees.
    pub search_deg: f64,
}

/// VOEvent documents of anomalies: off unless `folder` is set.
#[derive(Debug, Clone)]
pub struct VoEventConfig {
    pub folder: Option<PathBuf>,
    pub kinds: Vec<AnomalyKind>,
    /// The observatory's own authority identifier, `ivo://...`.
    pub authority: Option<String>,
    /// The observatory's name, for the documents' Who.
    pub author: Option<String>,
    /// Attach the night's documents to the morning mail.
    pub attach: bool,
}

impl Default for VoEventConfig {
    fn default() -> Self {
        Self {
            folder: None,
            kinds: vec![
                AnomalyKind::NewSource,
                AnomalyKind::Moving,
                AnomalyKind::Transient,
            ],
            authority: None,
            author: None,
            attach: false,
        }
    }
}

/// The live status page: off unless `listen` is set.
#[derive(Debug, Clone, Default)]
pub struct WebConfig {
    /// Where the page is served (`127.0.0.1:8480`); `None` = no page.
    pub listen: Option<std::net::SocketAddr>,
    /// A file holding the access token (owned by this user, readable by nobody else).
    pub token_file: Option<PathBuf>,
    /// Serve to the network without a token: the explicit, clearly named opt-out.
    pub open_without_token: bool,
}

/// The characters an access token may hold, as a user reads them: RFC 3986's unreserved
/// characters, which pass unchanged in an address's query, in an `Authorization: Bearer`
/// header (RFC 6750 §2.1, b64token) and in a cookie's value (RFC 6265 §4.1.1,
/// cookie-octet). Anything else (`;`, `&`, `#`, `"`, a space, a letter outside ASCII)
/// is cut, split or escaped by one of the three on its way, and the token never matches.
pub const TOKEN_CHARACTERS: &str = "A-Z a-z 0-9 - . _ ~";
/// 16 characters carry at least 64 bits when each is a random hex digit (the smallest
/// alphabet token generators print), the least OWASP's Session Management Cheat Sheet
/// asks of a session identifier; from the whole set above they carry 96.
pub const TOKEN_MIN_CHARS: usize = 16;
/// Enough for any generator, and small beside the 16 KiB a request's head may take.
pub const TOKEN_MAX_CHARS: usize = 512;
/// Fewer different characters than this is a placeholder ("aaaa...", "abab..."), not a
/// random token: 16 random hex digits use fewer with a probability of about 1e-9.
pub const TOKEN_MIN_DISTINCT: usize = 4;
/// The token file is read this far; a token file is one short line.
const TOKEN_FILE_MAX_BYTES: u64 = 4096;

/// Why a token file cannot open the status page.
#[derive(Debug, thiserror::Error)]
pub enum TokenError {
    #[error("cannot read {}: {}", .path.display(), crate::text::io_reason(.reason))]
    Read {
        path: PathBuf,
        reason: std::io::Error,
    },
    #[error("{}, line {line}: {problem}", .path.display())]
    Invalid {
        path: PathBuf,
        line: usize,
        problem: TokenProblem,
    },
}

/// What is wrong with a token file's text.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum TokenProblem {
    #[error("no token: write it on the file's first line")]
    Empty,
    #[error("character {column} is {shown}, which a token cannot hold: use only {TOKEN_CHARACTERS} (they pass unchanged in an address, a header and a cookie)")]
    Character { column: usize, shown: String },
    #[error("the token has {chars} characters; it needs at least {TOKEN_MIN_CHARS} (16 random hex digits carry 64 bits), for example from `openssl rand -hex 16`")]
    Short { chars: usize },
    #[error("the token has {chars} characters; at most {TOKEN_MAX_CHARS}")]
    Long { chars: usize },
    #[error("the token uses only {distinct} different characters, which no random token does; make one with `openssl rand -hex 16`")]
    Repetitive { distinct: usize },
    #[error("the file goes on after the token: only its first line is read, so it must hold the token alone")]
    MoreLines,
    #[error("the file is longer than {TOKEN_FILE_MAX_BYTES} bytes: it must hold the token alone")]
    TooLarge,
}

/// A character as an error message names it.
fn shown_character(c: char) -> String {
    match c {
        ' ' => "a space".into(),
        '\t' => "a tab".into(),
        char::REPLACEMENT_CHARACTER => "a byte that is not UTF-8".into(),
        c if c.is_control() => format!("the control character U+{:04X}", c as u32),
        c if !c.is_ascii() => format!("'{c}' (U+{:04X}, not ASCII)", c as u32),
        c => format!("'{c}'"),
    }
}

/// The token a token file's bytes hold, or the line and what is wrong there. Blanks
/// around the token (an editor's final newline, a stray space) are not part of it.
pub fn parse_token(bytes: &[u8]) -> Result<String, (usize, TokenProblem)> {
    if bytes.len() as u64 > TOKEN_FILE_MAX_BYTES {
        return Err((1, TokenProblem::TooLarge));
    }
    let text = String::from_utf8_lossy(bytes);
    let mut lines = text.lines();
    let first = lines.next().unwrap_or("");
    let lead = first.len() - first.trim_start().len();
    let token = first.trim();
    if token.is_empty() {
        return Err((1, TokenProblem::Empty));
    }
    if let Some(extra) = lines.position(|l| !l.trim().is_empty()) {
        return Err((extra + 2, TokenProblem::MoreLines));
    }
    let allowed = |c: char| c.is_ascii_alphanumeric() || "-._~".contains(c);
    if let Some((k, c)) = token.chars().enumerate().find(|(_, c)| !allowed(*c)) {
        let column = first[..lead].chars().count() + k + 1;
        return Err((
            1,
            TokenProblem::Character {
                column,
                shown: shown_character(c),
            },
        ));
    }
    let chars = token.len();
    if chars < TOKEN_MIN_CHARS {
        return Err((1, TokenProblem::Short { chars }));
    }
    if chars > TOKEN_MAX_CHARS {
        return Err((1, TokenProblem::Long { chars }));
    }
    let distinct = token
        .bytes()
        .collect::<std::collections::BTreeSet<u8>>()
        .len();
    if distinct < TOKEN_MIN_DISTINCT {
        return Err((1, TokenProblem::Repetitive { distinct }));
    }
    Ok(token.to_string())
}

impl WebConfig {
    /// The access token: the token file's one line, checked by [`parse_token`].
    /// `Ok(None)` without a token file.
    pub fn token(&self) -> Result<Option<String>, TokenError> {
        let Some(path) = &self.token_file else {
            return Ok(None);
        };
        use std::io::Read;
        let mut bytes = Vec::new();
        std::fs::File::open(path)
            .and_then(|f| f.take(TOKEN_FILE_MAX_BYTES + 1).read_to_end(&mut bytes))
            .map_err(|reason| TokenError::Read {
                path: path.clone(),
                reason,
            })?;
        parse_token(&bytes)
            .map(Some)
            .map_err(|(line, problem)| TokenError::Invalid {
                path: path.clone(),
                line,
                problem,
            })
    }
}

/// The whole file, typed.
#[derive(Debug, Clone, Default)]
pub struct Config {
    pub watch: WatchConfig,
    pub store: StoreConfig,
    pub rig: RigConfig,
    pub site: SiteConfig,
    pub optics: OpticsConfig,
    pub measure: MeasureConfig,
    pub actions: ActionsConfig,
    pub mail: MailConfig,
    pub alerts: AlertsConfig,
    pub report: ReportConfig,
    pub web: WebConfig,
    pub voevent: VoEventConfig,
    pub calibration: CalibrationConfig,
    pub catalogue: CatalogueConfig,
    pub log: LogConfig,
    pub rules: Vec<RuleSpec>,
    /// Plans of targets (`[[targets]]`): hours of usable exposure per filter.
    pub targets: Vec<crate::season::plan::TargetPlan>,
    /// The line of every key the file gives ("section.key") and of its sections, for
    /// the problems found after reading (`check_environment`, the store reached).
    pub lines: std::collections::BTreeMap<String, usize>,
    /// The file this configuration was read from.
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
    /// The system's reason is said in words, once (it is not chained as a source too).
    #[error("cannot read the configuration file {path}: {}{}", crate::text::io_reason(.reason), if .reason.kind() == std::io::ErrorKind::NotFound { EXAMPLE_HINT } else { "" })]
    Read {
        path: PathBuf,
        reason: std::io::Error,
    },
    #[error("{path}: {} problem(s):\n  {}", .problems.len(), .problems.iter().map(|p| p.to_string()).collect::<Vec<_>>().join("\n  "))]
    Invalid {
        path: PathBuf,
        problems: Vec<ConfigProblem>,
    },
}

/// Where a new user finds a configuration to start from.
const EXAMPLE_HINT: &str = ". Start from the example, config/subwatch.toml in subwatch's source (it documents every key): copy it there and edit it";

/// Read, parse and validate a configuration file. Checks that need the file system
/// (folders exist, store writable) are in [`Config::check_environment`].
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|reason| ConfigError::Read {
        path: path.to_path_buf(),
        reason,
    })?;
    // Relative paths in the file are relative to the file's own folder.
    let folder = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    // Made absolute as written (no links resolved, and on Windows no `\\?\` prefix).
    let base = std::path::absolute(folder).unwrap_or_else(|_| folder.to_path_buf());
    let mut config = parse(&text, &base).map_err(|problems| ConfigError::Invalid {
        path: path.to_path_buf(),
        problems,
    })?;
    config.source = Some(path.to_path_buf());
    Ok(config)
}

impl Config {
    /// The plan of a target (`[[targets]]`), by the name its frames give it.
    pub fn plan_for(&self, target: &str) -> Option<&crate::season::plan::TargetPlan> {
        self.targets.iter().find(|p| p.name == target)
    }

    /// The site's position (latitude, east longitude, elevation), when configured.
    pub fn site_position(&self) -> Option<(f64, f64, f64)> {
        Some((
            self.site.latitude?,
            self.site.longitude?,
            self.site.elevation_m,
        ))
    }

    /// The site's time zone.
    pub fn timezone(&self) -> chrono_tz::Tz {
        self.site.timezone
    }

    /// The verdict rules of the file.
    pub fn rule_specs(&self) -> Vec<RuleSpec> {
        self.rules.clone()
    }

    /// A problem found after reading, at the line of `key` ("section.key") where the file
    /// gives it, else at its section's line where the file has that section.
    pub fn located(&self, key: &str, message: String) -> ConfigProblem {
        let section = key.split('.').next().unwrap_or(key);
        ConfigProblem {
            key: key.to_string(),
            line: self.lines.get(key).or(self.lines.get(section)).copied(),
            message,
        }
    }

    /// Where the summary's files go, and mail without a server (as .eml files):
    /// `[report] folder`, else a `reports` folder beside the store.
    pub fn report_folder(&self) -> PathBuf {
        self.report.folder.clone().unwrap_or_else(|| {
            self.store
                .path
                .parent()
                .unwrap_or(Path::new("."))
                .join("reports")
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_token_holds_only_characters_that_pass_unchanged_everywhere_it_travels() {
        let good = "kestrel-ridge_0123.456~789";
        assert_eq!(parse_token(format!("{good}\n").as_bytes()).unwrap(), good);
        assert_eq!(
            parse_token(format!("  {good} \r\n\n").as_bytes()).unwrap(),
            good
        );
        // Each of these is cut, split or escaped by a query string, a header or a cookie
        // (RFC 3986 §2.2 reserved characters, RFC 6265 §4.1.1 cookie-octet).
        for (bad, shown) in [
            (";", "';'"),
            ("&", "'&'"),
            ("#", "'#'"),
            ("\"", "'\"'"),
            (" ", "a space"),
            ("=", "'='"),
            ("+", "'+'"),
            ("%", "'%'"),
            ("é", "'é' (U+00E9, not ASCII)"),
            ("\u{7f}", "the control character U+007F"),
        ] {
            let text = format!(" kestrel-ridge{bad}0123456789");
            assert_eq!(
                parse_token(text.as_bytes()),
                Err((
                    1,
                    TokenProblem::Character {
                        column: 15,
                        shown: shown.into()
                    }
                )),
                "{bad:?}"
            );
        }
        let mut bytes = b"kestrel-ridge-0123456789".to_vec();
        bytes[3] = 0xff;
        assert!(matches!(
            parse_token(&bytes),
            Err((1, TokenProblem::Character { column: 4, ref shown })) if shown.contains("not UTF-8")
        ));
    }

    #[test]
    fn a_token_is_long_and_varied_enough_and_alone_in_its_file() {
        assert_eq!(parse_token(b""), Err((1, TokenProblem::Empty)));
        assert_eq!(
            parse_token(b"\nkestrel-ridge-0123456789"),
            Err((1, TokenProblem::Empty))
        );
        // 15 hex digits are 60 bits; 16 are 64 (common practice: random hex tokens).
        assert_eq!(
            parse_token(b"0123456789abcde"),
            Err((1, TokenProblem::Short { chars: 15 }))
        );
        assert!(parse_token(b"0123456789abcdef").is_ok());
        assert_eq!(
            parse_token("a".repeat(40).as_bytes()),
            Err((1, TokenProblem::Repetitive { distinct: 1 }))
        );
        assert_eq!(
            parse_token("abc".repeat(8).as_bytes()),
            Err((1, TokenProblem::Repetitive { distinct: 3 }))
        );
        assert_eq!(
            parse_token("0123456789abcdef".repeat(33).as_bytes()),
            Err((1, TokenProblem::Long { chars: 528 }))
        );
        assert_eq!(
            parse_token(b"0123456789abcdef\n\nsecond line\n"),
            Err((3, TokenProblem::MoreLines))
        );
        assert_eq!(parse_token(&[b'a'; 5000]), Err((1, TokenProblem::TooLarge)));
    }

    #[test]
    fn a_token_file_problem_names_the_file_and_line() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("token");
        std::fs::write(&path, "kestrel;ridge-0123456789\n").unwrap();
        let web = WebConfig {
            token_file: Some(path.clone()),
            ..Default::default()
        };
        let said = web.token().unwrap_err().to_string();
        assert!(
            said.contains(&format!("{}, line 1: character 8 is ';'", path.display())),
            "{said}"
        );
        let missing = WebConfig {
            token_file: Some(dir.path().join("nothing")),
            ..Default::default()
        };
        let said = missing.token().unwrap_err().to_string();
        // The system's reason said once, in words (no "(os error 2)" after it): its
        // words for a missing file, which differ by system.
        let words = std::fs::read(dir.path().join("nothing"))
            .unwrap_err()
            .to_string();
        let words = words.split(" (os error").next().unwrap();
        assert_eq!(said.matches(words).count(), 1, "{said}");
        assert!(!said.contains("os error"), "{said}");
    }
}
