//! Reading the configuration text: the TOML itself (`syntax`: a number too large for it
//! read on as its key's problem, a duplicate or any other mistake named with its key and
//! line), every known key into its type with its line and what was expected in words
//! (`sections`, one function per section; `rules`, the `[[rules]]` tables), unknown keys
//! with the known key nearest to them, and the checks that involve more than one key.
//! Longer than most modules for its tests, one for each kind of mistake a user makes.

mod rules;
mod sections;
mod syntax;
mod targets;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::*;
use crate::night::AnomalyKind;

/// Walks the parsed TOML, reading each known key into its type and noting every problem
/// with its key and line; what it was never asked for is an unknown key.
struct Reader<'a> {
    root: &'a toml::Table,
    text: &'a str,
    base: &'a Path,
    problems: Vec<ConfigProblem>,
    /// Keys read, as "section.key" (or "section" for a whole section).
    known: Vec<String>,
    /// The line of every key the file gives, as "section.key", and of every known
    /// section it has.
    lines: BTreeMap<String, usize>,
    /// Numbers too large for TOML, standing in as dates until their key says what it
    /// takes (see `syntax`).
    oversized: Vec<syntax::Oversized>,
}

impl<'a> Reader<'a> {
    /// The `[[name]]` tables the file gives (none when it gives no `name`); a `name` that
    /// is not an array of tables is a problem, said with `what` it must be.
    fn array_of_tables(&mut self, name: &str, what: &str) -> &'a [toml::Value] {
        let root: &'a toml::Table = self.root;
        match root.get(name) {
            None => &[],
            Some(toml::Value::Array(tables)) => tables,
            Some(_) => {
                self.problems.push(ConfigProblem {
                    key: name.into(),
                    line: find_line(self.text, None, name),
                    message: what.into(),
                });
                &[]
            }
        }
    }

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
        let table = self.root.get(section)?.as_table()?;
        if !self.lines.contains_key(section) {
            if let Some(line) = find_line(self.text, None, section) {
                self.lines.insert(section.to_string(), line);
            }
        }
        let v = table.get(key)?;
        if let Some(line) = find_line(self.text, Some(section), key) {
            self.lines.insert(format!("{section}.{key}"), line);
        }
        Some(v)
    }

    /// The number too large for TOML that the file gives `key`, once.
    fn take_oversized(&mut self, key: &str) -> Option<String> {
        let o = self
            .oversized
            .iter_mut()
            .find(|o| !o.used && o.key.as_deref() == Some(key))?;
        o.used = true;
        Some(o.literal.clone())
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
                    let message = match self.take_oversized(&format!("{section}.{key}")) {
                        Some(literal) => format!("{literal} is out of range: give {expected}"),
                        None => format!("{} is not {expected}", shown_value(v)),
                    };
                    self.problem(section, key, message);
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

    /// A list of anomaly kinds, each by its name.
    fn kinds(&mut self, section: &str, key: &str, default: Vec<AnomalyKind>) -> Vec<AnomalyKind> {
        self.read(section, key, default, |v| {
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
    /// that nothing read, each with the known name it is nearest to.
    fn unknown(&mut self) {
        // Every known key, as (section, key).
        let everywhere: Vec<(String, String)> = self
            .known
            .iter()
            .filter_map(|k| k.split_once('.'))
            .map(|(s, k)| (s.to_string(), k.to_string()))
            .collect();
        let home_of = |key: &str| -> Vec<&str> {
            everywhere
                .iter()
                .filter(|(_, k)| k == key)
                .map(|(s, _)| s.as_str())
                .collect()
        };
        for (section, value) in self.root {
            if section == "rules" || section == "targets" {
                continue;
            }
            if !SECTIONS.contains(&section.as_str()) {
                let line = find_line(self.text, None, section);
                let homes = home_of(section);
                let message = if !value.is_table() && !homes.is_empty() {
                    format!(
                        "a key outside any section: `{section}` belongs in [{}] (move it below that line)",
                        homes.join("] or [")
                    )
                } else {
                    let hint = crate::text::nearest(section, &SECTIONS)
                        .map(|s| format!("; did you mean [{s}]?"))
                        .unwrap_or_default();
                    format!("unknown section{hint} (known: {})", SECTIONS.join(", "))
                };
                self.problems.push(ConfigProblem {
                    key: section.clone(),
                    line,
                    message,
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
            let known: Vec<&str> = everywhere
                .iter()
                .filter(|(s, _)| s == section)
                .map(|(_, k)| k.as_str())
                .collect();
            for key in inner.keys() {
                if known.contains(&key.as_str()) {
                    continue;
                }
                let elsewhere = home_of(key);
                let hint = match crate::text::nearest(key, &known) {
                    Some(k) => format!("; did you mean `{k}`?"),
                    None if !elsewhere.is_empty() => {
                        format!("; `{key}` belongs in [{}]", elsewhere.join("] or ["))
                    }
                    None => String::new(),
                };
                self.problems.push(ConfigProblem {
                    key: format!("{section}.{key}"),
                    line: find_line(self.text, Some(section), key),
                    message: format!(
                        "unknown key{hint} (known in [{section}]: {})",
                        known.join(", ")
                    ),
                });
            }
        }
    }

    /// Numbers too large for TOML that no key's reading took (an unknown key's, or one
    /// deep in a list): said with the range a number in the file can have.
    fn oversized_left(&mut self) {
        for o in std::mem::take(&mut self.oversized) {
            if o.used {
                continue;
            }
            let key = o.key.unwrap_or_else(|| "(syntax)".into());
            let prefix = format!("{key}.");
            if self
                .problems
                .iter()
                .any(|p| p.key == key || p.key.starts_with(&prefix))
            {
                continue;
            }
            let range = if o.whole {
                "whole numbers in the file run from -9223372036854775808 to 9223372036854775807"
            } else {
                "numbers in the file run up to about ±1.8e308"
            };
            self.problems.push(ConfigProblem {
                key,
                line: Some(o.line),
                message: format!("{} is out of range: {range}", o.literal),
            });
        }
    }
}

const SECTIONS: [&str; 15] = [
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
    "log",
];

/// A rig name: 1 to 64 letters, digits, spaces, dots, dashes or underscores.
pub fn rig_name_ok(s: &str) -> bool {
    let t = s.trim();
    !t.is_empty()
        && t == s
        && s.chars().count() <= 64
        && s.chars()
            .all(|c| c.is_alphanumeric() || matches!(c, ' ' | '.' | '-' | '_'))
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
    let (root, oversized) = syntax::table(text).map_err(|p| vec![p])?;
    let mut r = Reader {
        root: &root,
        text,
        base,
        problems: Vec::new(),
        known: Vec::new(),
        lines: BTreeMap::new(),
        oversized,
    };
    // In the order of config/subwatch.toml: the order problems are reported in.
    let watch = sections::watch(&mut r);
    let store = sections::store(&mut r);
    let rig = sections::rig(&mut r);
    let site = sections::site(&mut r);
    let optics = sections::optics(&mut r);
    let measure = sections::measure(&mut r);
    let actions = sections::actions(&mut r);
    let mail = sections::mail(&mut r);
    let alerts = sections::alerts(&mut r);
    let report = sections::report(&mut r);
    let web = sections::web(&mut r);
    let voevent = sections::voevent(&mut r);
    let calibration = sections::calibration(&mut r);
    let catalogue = sections::catalogue(&mut r);
    let log = sections::log(&mut r);
    let rules = rules::read(&mut r);
    let targets = targets::read(&mut r);
    r.unknown();
    r.oversized_left();
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
        log,
        rules,
        targets,
        lines: std::mem::take(&mut r.lines),
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

fn line_of(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// The name a table header line gives (`[site]` → "site", `[[rules]]` → "rules"), with
/// any comment after it left out; `None` for a line that is no header.
fn header_name(line: &str) -> Option<String> {
    let t = line.trim();
    let inner = if let Some(rest) = t.strip_prefix("[[") {
        rest.split("]]").next()?
    } else {
        t.strip_prefix('[')?.split(']').next()?
    };
    Some(inner.trim().to_string())
}

/// The key a line assigns (`poll_seconds = 3` → "poll_seconds"; a dotted key whole),
/// unquoted; `None` for a line that assigns nothing.
fn assigned_key(line: &str) -> Option<String> {
    let t = line.trim();
    if t.starts_with('[') || t.starts_with('#') {
        return None;
    }
    let (k, _) = t.split_once('=')?;
    let k = k.trim();
    // Bare keys are letters, digits, `_` and `-`; quoted ones anything.
    let plain = |c: char| c.is_ascii_alphanumeric() || matches!(c, '_' | '-' | '.' | ' ');
    let quoted = k.starts_with(['"', '\'']);
    (!k.is_empty() && (quoted || k.chars().all(plain))).then(|| {
        k.split('.')
            .map(|part| part.trim().trim_matches(['"', '\'']))
            .collect::<Vec<_>>()
            .join(".")
    })
}

/// The `k`-th (0-based) `[[rules]]` header's line, and the line of the next header (or
/// past the end): where that rule's keys are.
fn nth_rules_span(text: &str, k: usize) -> Option<(usize, usize)> {
    let headers: Vec<usize> = text
        .lines()
        .enumerate()
        .filter(|(_, l)| header_name(l).is_some())
        .map(|(i, _)| i + 1)
        .collect();
    let start = text
        .lines()
        .enumerate()
        .filter(|(_, l)| l.trim().replace(' ', "").starts_with("[[rules]]"))
        .nth(k)
        .map(|(i, _)| i + 1)?;
    let end = headers
        .iter()
        .copied()
        .find(|h| *h > start)
        .unwrap_or(usize::MAX);
    Some((start, end))
}

/// The key a line of the file belongs to, as "section.key": the key it assigns, or the
/// one whose value (a list over several lines) it continues; the section for a header.
fn key_at(text: &str, line: usize) -> Option<String> {
    let mut section: Option<String> = None;
    let mut key: Option<String> = None;
    for (i, l) in text.lines().enumerate().take(line) {
        if let Some(name) = header_name(l) {
            section = Some(name);
            key = None;
        } else if let Some(k) = assigned_key(l) {
            key = Some(k);
        }
        if i + 1 == line && header_name(l).is_some() {
            return section;
        }
    }
    match (section, key) {
        (Some(s), Some(k)) => Some(format!("{s}.{k}")),
        (None, Some(k)) => Some(k),
        (Some(s), None) => Some(s),
        (None, None) => None,
    }
}

/// The line where `key` is assigned inside `[section]` (best effort, for messages).
fn find_line(text: &str, section: Option<&str>, key: &str) -> Option<usize> {
    let mut current: Option<String> = None;
    for (i, line) in text.lines().enumerate() {
        if let Some(name) = header_name(line) {
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
            // A dotted key (`a.b = 1`) is found by its first part.
            if let Some(k) = assigned_key(line) {
                if k == key || k.split('.').next() == Some(key) {
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

/// Each key of an array's table that is not among `known`, in words, with the nearest
/// known key as a hint (`within`: "a rule", "a target").
fn unknown_keys(table: &toml::Table, known: &[&str], within: &str) -> Vec<String> {
    table
        .keys()
        .filter(|key| !known.contains(&key.as_str()))
        .map(|key| {
            let hint = crate::text::nearest(key, known)
                .map(|k| format!("; did you mean `{k}`?"))
                .unwrap_or_default();
            format!(
                "{key}: unknown key{hint} (known in {within}: {})",
                known.join(", ")
            )
        })
        .collect()
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
    fn the_service_keeps_fourteen_days_of_logs_unless_told_otherwise() {
        let watch = "[watch]\nfolders = [\"/tmp\"]\n";
        let c = parse(watch, Path::new("/etc")).unwrap();
        assert_eq!(c.log.keep_days, 14);
        let c = parse(&format!("{watch}[log]\nkeep_days = 3\n"), Path::new("/etc")).unwrap();
        assert_eq!(c.log.keep_days, 3);
        for bad in ["0", "-2", "3651", "1.5", "\"14\""] {
            let text = format!("{watch}[log]\nkeep_days = {bad}\n");
            let problems = parse(&text, Path::new("/")).unwrap_err();
            assert_eq!(problems.len(), 1, "{bad}: {problems:?}");
            assert_eq!(problems[0].key, "log.keep_days", "{bad}");
            assert_eq!(problems[0].line, Some(4), "{bad}");
            assert!(
                problems[0].message.contains("1 to 3650"),
                "{bad}: {}",
                problems[0].message
            );
        }
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

    /// Every problem of a file with many kinds of mistake.
    fn problems_of(text: &str) -> Vec<ConfigProblem> {
        parse(text, Path::new("/")).unwrap_err()
    }

    fn problem<'p>(problems: &'p [ConfigProblem], key: &str) -> &'p ConfigProblem {
        problems
            .iter()
            .find(|p| p.key == key)
            .unwrap_or_else(|| panic!("no problem for {key}: {problems:?}"))
    }

    /// TOML holds whole numbers in 64 bits (TOML 1.0, "Integer"); one beyond them is its
    /// key's problem, said with the range that key takes, and the rest is still read.
    #[test]
    fn a_number_too_large_for_toml_is_said_with_its_keys_range() {
        let text = "[watch]\nfolders = [\"/tmp\"]\nqueue_limit = 99999999999999999999999\nworkers = 1e400\nrescan_seconds = -99999999999999999999\n[site]\ntimezone = \"Mars/Olympus\"\n[[rules]]\nreason = \"soft\"\nmetric = \"fwhm_px\"\ntest = \"above\"\nvalue = 1_000_000_000_000_000_000_000\nverdict = \"warn\"\n[web]\nport = 123456789012345678901\n";
        let problems = problems_of(text);
        let q = problem(&problems, "watch.queue_limit");
        assert_eq!(q.line, Some(3));
        assert_eq!(
            q.message,
            "99999999999999999999999 is out of range: give a whole number from 1 to 1000000"
        );
        let w = problem(&problems, "watch.workers");
        assert_eq!(w.line, Some(4));
        assert!(
            w.message
                .starts_with("1e400 is out of range: give a whole number of workers from 0"),
            "{w:?}"
        );
        assert_eq!(problem(&problems, "watch.rescan_seconds").line, Some(5));
        // Read on past them: the time zone three lines later is found too.
        assert_eq!(problem(&problems, "site.timezone").line, Some(7));
        let rule = problem(&problems, "rules[1]");
        assert_eq!(rule.line, Some(8));
        assert_eq!(
            rule.message,
            "value: 1_000_000_000_000_000_000_000 is out of range: give a number"
        );
        // An unknown key is said as unknown, once.
        let port: Vec<_> = problems.iter().filter(|p| p.key == "web.port").collect();
        assert_eq!(port.len(), 1, "{problems:?}");
        assert!(port[0].message.starts_with("unknown key"), "{port:?}");
        for p in &problems {
            assert!(
                !p.message.contains("i128") && !p.message.contains("invalid type"),
                "{p:?}"
            );
        }
        // Alone in a list, the range of the file's numbers is said.
        let problems = problems_of("[watch]\nfolders = [\"/tmp\"]\n[alerts]\nenabled = true\n[catalogue]\nmagnitudes = { V = 99999999999999999999 }\n");
        assert_eq!(
            problem(&problems, "catalogue.magnitudes").message,
            "99999999999999999999 is out of range: give a table of names, such as { V = \"vmag\", R = \"rmag\" }"
        );
    }

    #[test]
    fn a_key_or_section_given_twice_is_named_with_both_lines() {
        let problems =
            problems_of("[watch]\nfolders = [\"/tmp\"]\npoll_seconds = 1\n\npoll_seconds = 2\n");
        assert_eq!(
            problems,
            [ConfigProblem {
                key: "watch.poll_seconds".into(),
                line: Some(5),
                message: "given twice (first on line 3): keep one".into(),
            }]
        );
        let problems = problems_of("[watch]\nfolders = [\"/tmp\"]\n[site]\ntimezone = \"UTC\"\n[watch]\nsettle_seconds = 1\n");
        assert_eq!(
            problems,
            [ConfigProblem {
                key: "watch".into(),
                line: Some(5),
                message:
                    "[watch] is given twice (first on line 1): put its keys under one [watch] line"
                        .into(),
            }]
        );
        // Quoted the second time, still the same key.
        let problems = problems_of("[mail]\nto = []\n\"to\" = []\n");
        assert_eq!(
            (problems[0].key.as_str(), problems[0].line),
            ("mail.to", Some(3))
        );
        assert!(
            problems[0].message.contains("first on line 2"),
            "{problems:?}"
        );
    }

    #[test]
    fn toml_mistakes_are_said_in_words_with_their_key_and_line() {
        let cases = [
            (
                "folders = [/srv/capture]",
                "watch.folders",
                "text goes in quotes",
            ),
            (
                "folders = [\"/srv/capture\"",
                "watch.folders",
                "not closed with ]",
            ),
            (
                "settle_seconds =",
                "watch.settle_seconds",
                "no value after =",
            ),
            (
                "include = \"a\\q\"",
                "watch.include",
                "write \\\\ for a backslash",
            ),
            (
                "poll_seconds = 007",
                "watch.poll_seconds",
                "does not start with 0",
            ),
            ("poll_seconds = True", "watch.poll_seconds", "small letters"),
            (
                "poll_seconds = 1 2",
                "watch.poll_seconds",
                "text goes in quotes",
            ),
            (
                "include = [\"*.fits\"] x",
                "watch.include",
                "one key = value per line",
            ),
        ];
        for (line, key, words) in cases {
            let text = format!("[site]\ntimezone = \"UTC\"\n[watch]\n{line}\n");
            let problems = problems_of(&text);
            assert_eq!(problems.len(), 1, "{line}: {problems:?}");
            let p = &problems[0];
            assert_eq!((p.key.as_str(), p.line), (key, Some(4)), "{line}: {p:?}");
            assert!(p.message.contains(words), "{line}: {p:?}");
            assert!(!p.message.contains('`'), "{line}: {p:?}");
        }
        // An unclosed section header names the section as far as it goes.
        let p = &problems_of("[watch]\nfolders = []\n[site\n")[0];
        assert_eq!(p.line, Some(3));
        assert!(p.message.contains("section name opened with ["), "{p:?}");
    }

    #[test]
    fn an_unknown_key_gets_the_known_key_nearest_to_it() {
        let text = "poll_seconds = 1\n[watch]\nfolders = [\"/tmp\"]\npol_seconds = 3\nsettle = 2\ntimezone = \"UTC\"\ncolour = 1\n[mial]\nto = []\n[[rules]]\nreason = \"soft\"\nmetrc = \"fwhm_px\"\nmetric = \"fwhm_px\"\ntest = \"above\"\nvalue = 3\nverdict = \"warn\"\n";
        let problems = problems_of(text);
        let said = |key: &str| problem(&problems, key).message.clone();
        assert!(said("watch.pol_seconds").starts_with("unknown key; did you mean `poll_seconds`? (known in [watch]: folders, poll_seconds,"), "{problems:?}");
        assert!(
            said("watch.settle").starts_with("unknown key; did you mean `settle_seconds`?"),
            "{problems:?}"
        );
        assert!(
            said("watch.timezone").starts_with("unknown key; `timezone` belongs in [site]"),
            "{problems:?}"
        );
        // Nothing near it: no guess.
        assert!(
            said("watch.colour").starts_with("unknown key (known in [watch]:"),
            "{problems:?}"
        );
        assert!(
            said("mial").starts_with("unknown section; did you mean [mail]?"),
            "{problems:?}"
        );
        assert_eq!(
            said("poll_seconds"),
            "a key outside any section: `poll_seconds` belongs in [watch] (move it below that line)"
        );
        assert_eq!(problem(&problems, "poll_seconds").line, Some(1));
        assert!(
            said("rules[1]").starts_with("metrc: unknown key; did you mean `metric`?"),
            "{problems:?}"
        );
    }

    #[test]
    fn a_rules_keys_are_said_one_by_one_in_words() {
        let rule = |body: &str| {
            problems_of(&format!("[watch]\nfolders = [\"/tmp\"]\n[[rules]]\n{body}"))
                .into_iter()
                .map(|p| {
                    assert_eq!((p.key.as_str(), p.line), ("rules[1]", Some(3)), "{p:?}");
                    p.message
                })
                .collect::<Vec<_>>()
        };
        let base = "reason = \"soft\"\nmetric = \"fwhm_px\"\ntest = \"above\"\n";
        assert_eq!(
            rule(&format!("{base}value = \"x\"\nverdict = \"warn\"\n")),
            ["value: \"x\" is not a number"]
        );
        assert_eq!(
            rule(&format!(
                "{base}value = 3\nverdict = \"warn\"\nframes = -1\n"
            )),
            ["frames: -1 is not a whole number of frames"]
        );
        assert_eq!(
            rule(&format!("{base}value = 3\nverdict = \"maybe\"\n")),
            ["verdict: \"maybe\" is not \"warn\" or \"reject\""]
        );
        assert_eq!(
            rule(&format!("{base}verdict = \"warn\"\n")),
            ["value: missing: give a number"]
        );
        let said = rule("reason = \"soft\"\nmetric = \"fwhm_px\"\ntest = \"abov\"\nvalue = 3\nverdict = \"warn\"\n");
        assert!(
            said[0].starts_with("test: \"abov\" is not a test: one of above, below,"),
            "{said:?}"
        );
        assert!(
            !said[0].contains("variant") && !said[0].contains("expected"),
            "{said:?}"
        );
        // A good rule as before.
        let c = parse(
            &format!(
                "[watch]\nfolders = [\"/tmp\"]\n[[rules]]\n{base}value = 3\nverdict = \"reject\"\n"
            ),
            Path::new("/"),
        )
        .unwrap();
        let r = &c.rules[0];
        assert_eq!(
            (
                r.reason.as_str(),
                r.metric,
                r.test,
                r.value,
                r.verdict,
                r.frames
            ),
            (
                "soft",
                crate::rules::Metric::FwhmPx,
                crate::rules::Test::Above,
                3.0,
                crate::rules::Verdict::Reject,
                None
            )
        );
    }

    #[test]
    fn magnitudes_and_mag_column_together_are_said_as_such() {
        let problems = problems_of("[watch]\nfolders = [\"/tmp\"]\n[catalogue]\nmagnitudes = { V = \"vmag\" }\nmag_column = \"m\"\n");
        assert_eq!(
            problems,
            [ConfigProblem {
                key: "catalogue.mag_column".into(),
                line: Some(5),
                message: "give magnitudes (a column per band) or mag_column (one column), not both"
                    .into(),
            }]
        );
    }

    /// A mail address the parser refuses is said without the parser's own words.
    #[test]
    fn a_bad_address_is_said_without_the_parsers_words() {
        let problems =
            problems_of("[watch]\nfolders = [\"/tmp\"]\n[mail]\nto = [\"not-an-address\"]\n");
        let p = problem(&problems, "mail.to");
        assert!(
            !p.message.contains("Invalid input") && !p.message.contains("("),
            "{p:?}"
        );
        assert!(p.message.ends_with("\"not-an-address\" is not an e-mail address such as \"observer@example.org\" or \"Observer <observer@example.org>\""), "{p:?}");
    }

    /// The lines of the keys given are kept for the checks made after reading.
    #[test]
    fn a_later_problem_is_placed_at_its_keys_line_or_its_sections() {
        let c = parse(
            "[watch]\nfolders = [\"/tmp\"]\n\n[mail]\nsmtp_host = \"m.example.org\"\n",
            Path::new("/"),
        )
        .unwrap();
        assert_eq!(c.located("watch.folders", "x".into()).line, Some(2));
        assert_eq!(c.located("mail.to", "x".into()).line, Some(4));
        assert_eq!(c.located("store.url", "x".into()).line, None);
        assert_eq!(
            c.located("watch.folders", "/srv/x does not exist".into())
                .to_string(),
            "line 2: watch.folders: /srv/x does not exist"
        );
    }
}
