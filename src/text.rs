//! Text made safe for where it goes: HTML, a single line (a mail subject, a table
//! cell), base64 for data URIs. A leaf; the values come from users' files and headers.

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

#[cfg(test)]
mod tests {
    use super::*;

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
