//! Log output: tracing to stderr (or, for the Windows service, to a file a day:
//! `daily`), one event per line, whatever text an event carries.
//! File names and header values come from users' files and capture programs; a name
//! with a newline or an escape sequence in it must not forge a log line or drive a
//! terminal, so every control character in a formatted line is written escaped.

use std::io::Write;

pub mod daily;

/// `s` with its control characters escaped (`\n`, `\t`, `\u{1b}`, ...), so it stays one
/// line of plain text.
pub fn one_line(s: &str) -> String {
    if !s.chars().any(char::is_control) {
        return s.to_string();
    }
    s.chars()
        .map(|c| {
            if c.is_control() {
                c.escape_default().to_string()
            } else {
                c.to_string()
            }
        })
        .collect()
}

/// A path as shown in logs: lossy text, control characters escaped.
pub fn shown(path: &std::path::Path) -> String {
    one_line(&path.to_string_lossy())
}

/// Writes each formatted event with its control characters escaped, keeping only the
/// final newline.
struct Escaping<W: Write>(W);

impl<W: Write> Write for Escaping<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let text = String::from_utf8_lossy(buf);
        let (body, newline) = match text.strip_suffix('\n') {
            Some(b) => (b, "\n"),
            None => (&*text, ""),
        };
        self.0
            .write_all(format!("{}{newline}", one_line(body)).as_bytes())?;
        Ok(buf.len())
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.0.flush()
    }
}

/// Install the subscriber: `default` is the level when `SUBWATCH_LOG` is unset (the
/// daemon says what it does at "info"; one-shot commands only warn); `SUBWATCH_LOG`
/// takes tracing's filter syntax ("debug", "subwatch=trace", ...).
pub fn init(default: &str) {
    let _ = tracing_subscriber::fmt()
        .with_writer(|| Escaping(std::io::stderr()))
        // Color codes are control characters too; plain text everywhere.
        .with_ansi(false)
        .with_env_filter(filter(default))
        .try_init();
}

/// `SUBWATCH_LOG`'s filter, or `default` when it is unset or unreadable.
fn filter(default: &str) -> tracing_subscriber::EnvFilter {
    tracing_subscriber::EnvFilter::try_from_env("SUBWATCH_LOG")
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn control_characters_cannot_forge_a_line() {
        assert_eq!(one_line("kfa_001.fits"), "kfa_001.fits");
        assert_eq!(
            one_line("a.fits\n2026-12-02 INFO fake"),
            "a.fits\\n2026-12-02 INFO fake"
        );
        assert_eq!(one_line("x\u{1b}[31m\r"), "x\\u{1b}[31m\\r");
        let mut out = Vec::new();
        Escaping(&mut out).write_all(b"one\ntwo\n").unwrap();
        assert_eq!(out, b"one\\ntwo\n");
    }
}
