//! FITS header cards: one 80-character card into a keyword and a typed value (FITS
//! Standard 4.0, section 4.2), and look-ups over a list of cards. A leaf: the structure
//! walker (`layout`), the typed header (`header`) and the WCS (`wcs`) all read cards
//! through here, and this module knows none of them. Pure; never fails on odd text.

/// A keyword value as written in a card (FITS Standard 4.0, section 4.2).
#[derive(Debug, Clone, PartialEq)]
pub enum CardValue {
    Text(String),
    Logical(bool),
    Number(f64),
    /// A value field we could not read as any of the above.
    Other(String),
}

#[derive(Debug, Clone, PartialEq)]
pub struct HeaderCard {
    pub key: String,
    pub value: CardValue,
}

/// One raw card as text. FITS headers are restricted to ASCII 0x20–0x7E (section 4.1.1);
/// any other byte becomes `?`, so a hostile byte can neither split a character nor put a
/// control character into a log line.
pub fn card_text(raw: &[u8]) -> String {
    raw.iter()
        .map(|&b| {
            if (0x20..=0x7e).contains(&b) {
                b as char
            } else {
                '?'
            }
        })
        .collect()
}

/// The keyword of a raw card (columns 1–8, trailing blanks removed).
pub fn keyword(raw: &[u8]) -> String {
    card_text(&raw[..raw.len().min(8)]).trim_end().to_string()
}

/// Parse one 80-character card. Comment-only cards (COMMENT, HISTORY, blank) give `None`.
pub fn parse_card(card: &str) -> Option<HeaderCard> {
    let (key, rest) = if let Some(h) = card.strip_prefix("HIERARCH ") {
        let eq = h.find('=')?;
        (h.get(..eq)?.trim().to_string(), h.get(eq + 1..)?)
    } else {
        if card.as_bytes().get(8..10) != Some(b"= ") {
            return None;
        }
        (card.get(..8)?.trim().to_string(), card.get(10..)?)
    };
    if key.is_empty() {
        return None;
    }
    Some(HeaderCard {
        key: key.to_ascii_uppercase(),
        value: parse_value(rest),
    })
}

fn parse_value(field: &str) -> CardValue {
    let field = field.trim_start();
    if let Some(body) = field.strip_prefix('\'') {
        // A string: '' inside stands for one quote; trailing blanks are not significant.
        let mut out = String::new();
        let mut chars = body.chars().peekable();
        while let Some(c) = chars.next() {
            if c == '\'' {
                if chars.peek() == Some(&'\'') {
                    chars.next();
                    out.push('\'');
                } else {
                    break;
                }
            } else {
                out.push(c);
            }
        }
        return CardValue::Text(out.trim_end().to_string());
    }
    let value = field.split('/').next().unwrap_or("").trim();
    match value {
        "T" => CardValue::Logical(true),
        "F" => CardValue::Logical(false),
        _ => value
            .replace(['D', 'd'], "E")
            .parse::<f64>()
            .map(CardValue::Number)
            .unwrap_or_else(|_| CardValue::Other(value.to_string())),
    }
}

/// Look-ups over a card list.
pub trait Cards {
    fn card(&self, key: &str) -> Option<&CardValue>;
    fn number(&self, key: &str) -> Option<f64> {
        match self.card(key)? {
            CardValue::Number(v) if v.is_finite() => Some(*v),
            // Some writers quote numbers.
            CardValue::Text(s) => s.trim().parse::<f64>().ok().filter(|v| v.is_finite()),
            _ => None,
        }
    }
    /// An integer-valued keyword (a number with no fractional part).
    fn integer(&self, key: &str) -> Option<i64> {
        self.number(key)
            .filter(|v| v.fract() == 0.0 && v.abs() < 9.0e18)
            .map(|v| v as i64)
    }
    fn text(&self, key: &str) -> Option<String> {
        match self.card(key)? {
            CardValue::Text(s) if !s.trim().is_empty() => Some(s.trim().to_string()),
            CardValue::Number(v) => Some(format!("{v}")),
            _ => None,
        }
    }
    fn logical(&self, key: &str) -> Option<bool> {
        match self.card(key)? {
            CardValue::Logical(b) => Some(*b),
            _ => None,
        }
    }
}

impl Cards for [HeaderCard] {
    fn card(&self, key: &str) -> Option<&CardValue> {
        self.iter().find(|c| c.key == key).map(|c| &c.value)
    }
}

/// A header keyword to write.
#[derive(Debug, Clone, PartialEq)]
pub enum OutValue {
    Text(String),
    Int(i64),
    Real(f64),
}

#[cfg(test)]
mod tests {
    use super::*;

    fn card(s: &str) -> HeaderCard {
        parse_card(&format!("{s:<80}")).unwrap()
    }

    #[test]
    fn parses_the_value_kinds_of_the_fits_standard() {
        assert_eq!(
            card("OBJECT  = 'It''s M  '  / name").value,
            CardValue::Text("It's M".into())
        );
        assert_eq!(
            card("SIMPLE  =                    T").value,
            CardValue::Logical(true)
        );
        assert_eq!(
            card("EXPTIME =                120.5 / s").value,
            CardValue::Number(120.5)
        );
        assert_eq!(
            card("CDELT1  =              1.5D-04").value,
            CardValue::Number(1.5e-4)
        );
        assert!(parse_card("COMMENT hello").is_none());
        assert_eq!(card("HIERARCH ESO DET GAIN = 2.5").key, "ESO DET GAIN");
    }

    #[test]
    fn hostile_bytes_never_split_a_character_or_reach_a_log() {
        let mut raw: [u8; 80] = format!("{:<80}", "OBJECT  = 'a'")
            .into_bytes()
            .try_into()
            .unwrap();
        raw[7] = 0xff;
        raw[12] = b'\n';
        let text = card_text(&raw);
        assert_eq!(text.len(), 80);
        assert!(!text.contains('\n'));
        assert_eq!(parse_card(&text).unwrap().key, "OBJECT ?");
        // Any text at all parses or is passed over, never a panic.
        for s in [
            "",
            "é",
            "ABCDEFG\u{e9}= 1",
            "HIERARCH",
            "HIERARCH =",
            "KEY     = '",
        ] {
            let _ = parse_card(s);
        }
    }

    #[test]
    fn integers_are_whole_numbers_only() {
        let cards = [
            card("NAXIS1  =                  300"),
            card("BSCALE  =                  1.5"),
        ];
        assert_eq!(cards.integer("NAXIS1"), Some(300));
        assert_eq!(cards.integer("BSCALE"), None);
    }
}
