//! Text made safe for where it goes: HTML, a single line (a mail subject, a table
//! cell), base64 for data URIs; an operating system's error in words; the known name
//! nearest to a mistyped one. A leaf; the values come from users' files and headers.

/// What a group without a FILTER value is called, wherever it is named (summaries,
/// the page, calibration notes, list files).
pub const NO_FILTER: &str = "no filter";
/// What a group without an OBJECT value (or folder) is called.
pub const NO_TARGET: &str = "no target";

/// Escape text for HTML (header values are the user's, or anyone's, strings).
pub fn escape_html(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c if c.is_control() => out.push(' '),
            c => out.push(c),
        }
    }
    out
}

/// One line, printable: control characters (CR, LF, …) become spaces. For mail subjects
/// and any other single-line field.
pub fn single_line(s: &str) -> String {
    s.chars()
        .map(|c| if c.is_control() { ' ' } else { c })
        .collect()
}

/// FNV-1a, 64 bits (Fowler, Noll and Vo): a short name that stays the same for the same
/// text across runs (files and URLs named by what they show). Not for secrets.
pub fn stable_hash(text: &str) -> u64 {
    text.bytes().fold(0xcbf2_9ce4_8422_2325, |h, b| {
        (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3)
    })
}

/// Standard base64 (RFC 4648) for data URIs and inline images.
pub fn base64(bytes: &[u8]) -> String {
    use base64::Engine;
    base64::engine::general_purpose::STANDARD.encode(bytes)
}

/// What an operating system's error says, in its words only: the system's description
/// without the error number it appends ("No such file or directory", not "... (os error
/// 2)"), so a message that quotes it says it once and in words.
pub fn io_reason(e: &std::io::Error) -> String {
    let text = e.to_string();
    match text.rfind(" (os error ") {
        Some(i) if text.ends_with(')') => text[..i].to_string(),
        _ => text,
    }
}

/// The name of `known` nearest to `given`, when it is close enough to be what was meant:
/// one edit per four letters at most (insertions, deletions, substitutions and swaps of
/// two neighbours: the optimal string alignment distance), or `given` is the start of
/// exactly one name up to an underscore ("settle" for "settle_seconds"). Case is ignored.
pub fn nearest<'k>(given: &str, known: &[&'k str]) -> Option<&'k str> {
    let g = given.to_lowercase();
    if g.is_empty() {
        return None;
    }
    let allowed = (g.chars().count() / 4).max(1);
    let best = known
        .iter()
        .map(|k| (edit_distance(&g, &k.to_lowercase()), *k))
        .filter(|(d, _)| *d <= allowed)
        .min_by_key(|(d, _)| *d);
    if let Some((_, k)) = best {
        return Some(k);
    }
    let mut starting = known
        .iter()
        .filter(|k| k.to_lowercase().starts_with(&format!("{g}_")));
    match (starting.next(), starting.next()) {
        (Some(k), None) => Some(k),
        _ => None,
    }
}

/// The optimal string alignment distance (Damerau 1964's four edits, each substring
/// edited once), by the usual dynamic programme over characters.
fn edit_distance(a: &str, b: &str) -> usize {
    let (a, b): (Vec<char>, Vec<char>) = (a.chars().collect(), b.chars().collect());
    let mut d = vec![vec![0usize; b.len() + 1]; a.len() + 1];
    for (i, row) in d.iter_mut().enumerate() {
        row[0] = i;
    }
    for j in 0..=b.len() {
        d[0][j] = j;
    }
    for i in 1..=a.len() {
        for j in 1..=b.len() {
            let cost = usize::from(a[i - 1] != b[j - 1]);
            let mut v = (d[i - 1][j] + 1)
                .min(d[i][j - 1] + 1)
                .min(d[i - 1][j - 1] + cost);
            if i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1] {
                v = v.min(d[i - 2][j - 2] + 1);
            }
            d[i][j] = v;
        }
    }
    d[a.len()][b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_os_error_is_said_once_in_words() {
        let e = std::io::Error::from_raw_os_error(2);
        let reason = io_reason(&e);
        assert!(!reason.contains("os error"), "{reason}");
        assert!(!reason.is_empty());
        // Errors that are not the system's keep their words.
        let own = std::io::Error::other("took too long");
        assert_eq!(io_reason(&own), "took too long");
    }

    #[test]
    fn the_nearest_name_only_when_close() {
        let watch = [
            "folders",
            "poll_seconds",
            "settle_seconds",
            "include",
            "exclude",
        ];
        assert_eq!(nearest("pol_seconds", &watch), Some("poll_seconds"));
        assert_eq!(nearest("Poll_Seconds", &watch), Some("poll_seconds"));
        assert_eq!(nearest("setle_secnods", &watch), Some("settle_seconds"));
        assert_eq!(nearest("settle", &watch), Some("settle_seconds"));
        assert_eq!(nearest("folder", &watch), Some("folders"));
        assert_eq!(nearest("tz", &watch), None);
        assert_eq!(nearest("colour", &watch), None);
        // A swap of two neighbours is one edit: "mial" is "mail".
        assert_eq!(nearest("mial", &["watch", "mail", "site"]), Some("mail"));
        assert_eq!(edit_distance("mial", "mail"), 1);
        assert_eq!(edit_distance("kitten", "sitting"), 3);
        assert_eq!(edit_distance("", "abc"), 3);
    }

    #[test]
    fn escaping_and_single_line() {
        assert_eq!(
            escape_html("<script>alert('x')</script>"),
            "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;"
        );
        assert_eq!(single_line("a\r\nBcc: b"), "a  Bcc: b");
    }

    #[test]
    fn base64_of_rfc4648_test_vectors() {
        // RFC 4648 section 10.
        for (i, o) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(i.as_bytes()), o);
        }
    }
}
