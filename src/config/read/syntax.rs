//! The file as TOML, its mistakes said in words with their key and line. A number too
//! large for TOML (which holds 64-bit whole numbers and finite floats) does not stop the
//! reading: a date stands in for it, which no setting takes, so its key's own reading
//! refuses it and says the range that key takes, and every other key is still read.
//! Any other mistake stops the reading there: past it the parser cannot know what the
//! file means.

use super::{assigned_key, find_line, header_name, key_at, line_of};
use crate::config::ConfigProblem;

/// A number too large for TOML, found where `key` (when known) is given.
pub(super) struct Oversized {
    pub(super) key: Option<String>,
    pub(super) line: usize,
    /// As the file writes it.
    pub(super) literal: String,
    /// A whole number (else a float).
    pub(super) whole: bool,
    /// A key's reading has said it.
    pub(super) used: bool,
}

/// What stands in for a number too large: a local date, a value no setting takes.
const STAND_IN: &str = "1970-01-01";

/// Past this many numbers too large, the file is refused at the next one.
const MAX_OVERSIZED: usize = 100;

/// The file's table, with the numbers too large for TOML that stand in as dates in it.
pub(super) fn table(text: &str) -> Result<(toml::Table, Vec<Oversized>), ConfigProblem> {
    let mut working = text.to_string();
    let mut oversized: Vec<Oversized> = Vec::new();
    loop {
        let e = match working.parse::<toml::Table>() {
            Ok(t) => return Ok((t, oversized)),
            Err(e) => e,
        };
        let span = e.span();
        let line = span.as_ref().map(|s| line_of(&working, s.start));
        let literal = span.clone().and_then(|s| working.get(s)).unwrap_or("");
        if let (Some(s), Some(line), Some(whole)) = (span.clone(), line, too_large(literal)) {
            if oversized.len() < MAX_OVERSIZED {
                // A number holds no line break, nor does the date: every line keeps its
                // number.
                oversized.push(Oversized {
                    key: key_at(text, line),
                    line,
                    literal: literal.to_string(),
                    whole,
                    used: false,
                });
                working.replace_range(s, STAND_IN);
                continue;
            }
        }
        return Err(described(text, e.message(), line, literal));
    }
}

/// Whether a literal TOML refused is a number too large for it: `Some(true)` for a whole
/// number beyond 64 bits, `Some(false)` for a float beyond the largest finite one.
fn too_large(literal: &str) -> Option<bool> {
    let s = literal.replace('_', "");
    let (negative, unsigned) = match s.strip_prefix(['+', '-']) {
        Some(rest) => (s.starts_with('-'), rest),
        None => (false, s.as_str()),
    };
    let (radix, digits) = match unsigned.get(..2) {
        Some("0x") => (16, &unsigned[2..]),
        Some("0o") => (8, &unsigned[2..]),
        Some("0b") => (2, &unsigned[2..]),
        _ => (10, unsigned),
    };
    if !digits.is_empty() && digits.chars().all(|c| c.is_digit(radix)) {
        let signed = if negative {
            format!("-{digits}")
        } else {
            digits.to_string()
        };
        return i64::from_str_radix(&signed, radix).is_err().then_some(true);
    }
    let float = unsigned.contains(['.', 'e', 'E'])
        && unsigned
            .chars()
            .all(|c| c.is_ascii_digit() || matches!(c, '.' | 'e' | 'E' | '+' | '-'));
    (float && s.parse::<f64>().is_ok_and(f64::is_infinite)).then_some(false)
}

/// A parser's refusal as a located problem in words.
fn described(text: &str, message: &str, line: Option<usize>, span: &str) -> ConfigProblem {
    if message.trim() == "duplicate key" {
        if let Some(line) = line {
            return duplicate(text, line);
        }
    }
    ConfigProblem {
        key: line
            .and_then(|l| key_at(text, l))
            .unwrap_or_else(|| "(syntax)".into()),
        line,
        message: plain_syntax(message, span),
    }
}

/// A key or a section given twice, named with the line of its first appearance.
fn duplicate(text: &str, line: usize) -> ConfigProblem {
    let this = text.lines().nth(line - 1).unwrap_or("");
    let earlier = |found: Option<usize>| found.filter(|l| *l < line);
    if let Some(name) = header_name(this) {
        let first = earlier(
            text.lines()
                .enumerate()
                .find(|(_, l)| header_name(l).as_deref() == Some(name.as_str()))
                .map(|(i, _)| i + 1),
        )
        .or_else(|| {
            // A section named like a key given before (`[watch.v]` after `v = 1`).
            let (parent, last) = name.rsplit_once('.')?;
            earlier(find_line(text, Some(parent), last))
        });
        let message = match first {
            Some(f) => format!(
                "[{name}] is given twice (first on line {f}): put its keys under one [{name}] line"
            ),
            None => format!("[{name}] is given twice: put its keys under one [{name}] line"),
        };
        return ConfigProblem {
            key: name,
            line: Some(line),
            message,
        };
    }
    let key = key_at(text, line).unwrap_or_else(|| "(syntax)".into());
    let written = assigned_key(this);
    // The first line in the same section that assigns the same key.
    let first = written.as_ref().and_then(|k| {
        let mut section: Option<String> = None;
        let mut here: Option<String> = None;
        let mut first = None;
        for (i, l) in text.lines().enumerate() {
            if let Some(name) = header_name(l) {
                section = Some(name);
            } else if i + 1 < line && first.is_none() && assigned_key(l).as_ref() == Some(k) {
                first = Some((i + 1, section.clone()));
            }
            if i + 1 == line {
                here = section.clone();
            }
        }
        first.filter(|(_, s)| *s == here).map(|(l, _)| l)
    });
    let message = match first {
        Some(f) => format!("given twice (first on line {f}): keep one"),
        None => "given twice: keep one".to_string(),
    };
    ConfigProblem {
        key,
        line: Some(line),
        message,
    }
}

/// The parser's common refusals in words a user can act on; its own words for the rest.
fn plain_syntax(message: &str, span: &str) -> String {
    let m = message.trim();
    let starts = |p: &str| m.starts_with(p);
    if starts("string values must be quoted") {
        if span.trim().is_empty() {
            "no value after =: give one (text in quotes, a number, true or false)".into()
        } else {
            format!(
                "{} is no value: text goes in quotes (such as \"/srv/capture\"); numbers, true and false go without",
                span.trim()
            )
        }
    } else if starts("unclosed array") {
        "a list opened with [ is not closed with ]".into()
    } else if starts("unclosed inline table") {
        "a table opened with { is not closed with } on its line".into()
    } else if starts("unclosed table") {
        "a section name opened with [ is not closed with ]".into()
    } else if starts("key with no value") {
        "a key without = and a value (a key with spaces goes in quotes)".into()
    } else if starts("missing escaped value") || starts("invalid escape") {
        "a backslash in double quotes starts an escape: write \\\\ for a backslash, or put the text in single quotes ('C:\\frames')".into()
    } else if starts("invalid basic string") || starts("invalid literal string") {
        "text opened with a quote is not closed on its line".into()
    } else if starts("invalid boolean") {
        "true and false are written in small letters, without quotes".into()
    } else if starts("unexpected leading zero") {
        "a number does not start with 0 (write 7, not 007)".into()
    } else if starts("unexpected key or value") {
        "more after the value on this line: one key = value per line (a comment starts with #)"
            .into()
    } else {
        format!("not valid TOML: {m}")
    }
}
