//! One anomaly as a VOEvent 2.0 document (IVOA Recommendation, 2011), the open format
//! networks of observers exchange events in: Who (the observatory's own authority
//! identifier, from the configuration), What (the kind, magnitude where known, SNR,
//! frames, the cutout's file name), WhereWhen (ICRS position with its error radius and
//! the time of the first detection, UTC, topocentric), How (the instrument as the headers
//! name it) and Why (the kind in words). subwatch writes these files; it sends nothing.
//! Pure: the caller gives the time the document is written.

use std::fmt::Write as _;

use crate::contract::AnomalyRecord;

/// Text for an XML 1.0 document: markup characters escaped, and every character XML
/// forbids (controls other than tab and line ends, U+FFFE, U+FFFF; XML 1.0, section 2.2,
/// production `Char`) replaced by U+FFFD, so a file name holding one cannot make the
/// document unreadable.
fn escape(s: &str) -> String {
    let allowed = |c: char| {
        matches!(c, '\u{9}' | '\u{A}' | '\u{D}')
            || ('\u{20}'..='\u{D7FF}').contains(&c)
            || ('\u{E000}'..='\u{FFFD}').contains(&c)
            || ('\u{10000}'..='\u{10FFFF}').contains(&c)
    };
    let clean: String = s
        .chars()
        .map(|c| if allowed(c) { c } else { '\u{FFFD}' })
        .collect();
    crate::text::escape_html(&clean)
}

/// What the document needs beyond the anomaly.
#[derive(Debug, Clone)]
pub struct EventContext<'a> {
    /// `ivo://...`: the observatory's own authority (and stream) identifier.
    pub authority: &'a str,
    /// The observatory's name, for Who/Author.
    pub author: Option<&'a str>,
    /// When the document is written, ISO 8601 UTC.
    pub written_utc: &'a str,
    /// The first detection's time, ISO 8601 UTC.
    pub first_utc: Option<String>,
    /// The position's error radius, degrees.
    pub error_deg: f64,
    /// The instrument and telescope as the headers name them.
    pub instrument: Option<&'a str>,
    pub telescope: Option<&'a str>,
    /// The cutout's file name, when one is written beside the document.
    pub cutout: Option<&'a str>,
    pub night: &'a str,
    /// A short, stable identifier of the anomaly (its kind and first detection).
    pub local_id: &'a str,
}

/// The document's IVORN: the authority, then `#` and the night and anomaly.
pub fn ivorn(ctx: &EventContext<'_>) -> String {
    format!(
        "{}#{}_{}",
        ctx.authority.trim_end_matches('/'),
        ctx.night,
        ctx.local_id
    )
}

/// Whether an authority identifier is usable: `ivo://` and a name, no spaces or `#`.
pub fn valid_authority(a: &str) -> bool {
    a.strip_prefix("ivo://").is_some_and(|rest| {
        !rest.is_empty()
            && rest
                .chars()
                .all(|c| c.is_ascii_graphic() && c != '#' && c != '"' && c != '<' && c != '>')
    })
}

/// The VOEvent 2.0 XML of one anomaly; `None` without a sky position (an event must say
/// where it is).
pub fn voevent_xml(a: &AnomalyRecord, ctx: &EventContext<'_>) -> Option<String> {
    let (ra, dec) = (a.ra_deg?, a.dec_deg?);
    if !(ra.is_finite() && dec.is_finite()) {
        return None;
    }
    let mut x = String::new();
    let _ = write!(
        x,
        "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n\
         <voe:VOEvent xmlns:voe=\"http://www.ivoa.net/xml/VOEvent/v2.0\" \
         xmlns:xsi=\"http://www.w3.org/2001/XMLSchema-instance\" \
         xsi:schemaLocation=\"http://www.ivoa.net/xml/VOEvent/v2.0 http://www.ivoa.net/xml/VOEvent/VOEvent-v2.0.xsd\" \
         version=\"2.0\" role=\"observation\" ivorn=\"{}\">\n",
        escape(&ivorn(ctx))
    );
    who(&mut x, ctx);
    what(&mut x, a, ctx);
    where_when(&mut x, ctx, ra, dec);
    how(&mut x, ctx);
    why(&mut x, a.kind);
    x.push_str("</voe:VOEvent>\n");
    Some(x)
}

/// `<Who>`: the authority, when the document was written, and the author.
fn who(x: &mut String, ctx: &EventContext<'_>) {
    let _ = write!(
        x,
        "  <Who>\n    <AuthorIVORN>{}</AuthorIVORN>\n    <Date>{}</Date>\n",
        escape(ctx.authority),
        escape(ctx.written_utc)
    );
    if let Some(author) = ctx.author {
        let _ = write!(
            x,
            "    <Author>\n      <title>{}</title>\n    </Author>\n",
            escape(author)
        );
    }
    x.push_str("  </Who>\n");
}

/// One `<Param>` of `<What>`, with its unit and UCD where it has them.
fn param(x: &mut String, name: &str, value: &str, kind: &str, unit: &str, ucd: &str) {
    let _ = writeln!(
        x,
        "    <Param name=\"{name}\" value=\"{}\" dataType=\"{kind}\"{}{}/>",
        escape(value),
        if unit.is_empty() {
            String::new()
        } else {
            format!(" unit=\"{unit}\"")
        },
        if ucd.is_empty() {
            String::new()
        } else {
            format!(" ucd=\"{ucd}\"")
        }
    );
}

/// `<What>`: the kind, the measured values, where it was first seen, and in words.
fn what(x: &mut String, a: &AnomalyRecord, ctx: &EventContext<'_>) {
    x.push_str("  <What>\n");
    param(x, "kind", a.kind.name(), "string", "", "meta.code.class");
    if let Some(m) = a.detail.instrumental_mag() {
        // Instrumental: −2.5 log10 of the flux in ADU, with no zero point.
        param(
            x,
            "instrumental_mag",
            &format!("{m:.3}"),
            "float",
            "mag",
            "phot.mag",
        );
    }
    if let crate::night::Detail::Transient(t) = &a.detail {
        if let Some(snr) = t.snr {
            param(x, "snr", &format!("{snr:.1}"), "float", "", "stat.snr");
        }
    }
    param(
        x,
        "frames",
        &a.detections.len().to_string(),
        "int",
        "",
        "meta.number",
    );
    if let Some(first) = a.detections.first() {
        let file = crate::report::file_name(&first.path);
        param(x, "first_frame", &file, "string", "", "meta.file");
        param(
            x,
            "first_pixel",
            &format!("{:.2} {:.2}", first.x, first.y),
            "string",
            "pix",
            "pos.cartesian",
        );
    }
    if let Some(c) = ctx.cutout {
        param(x, "cutout", c, "string", "", "meta.file");
    }
    for (name, v) in [("target", &a.target), ("filter", &a.filter)] {
        if let Some(v) = v {
            param(x, name, v, "string", "", "meta.id");
        }
    }
    let _ = write!(
        x,
        "    <Description>{}</Description>\n  </What>\n",
        escape(&crate::report::what(a))
    );
}

/// `<WhereWhen>`: the first detection's time and the position, with its error.
fn where_when(x: &mut String, ctx: &EventContext<'_>, ra: f64, dec: f64) {
    let _ = write!(
        x,
        "  <WhereWhen>\n    <ObsDataLocation>\n      <ObservatoryLocation id=\"TOPOCENTER\"/>\n      \
         <ObservationLocation>\n        <AstroCoordSystem id=\"UTC-ICRS-TOPO\"/>\n        \
         <AstroCoords coord_system_id=\"UTC-ICRS-TOPO\">\n"
    );
    if let Some(t) = &ctx.first_utc {
        let _ = write!(
            x,
            "          <Time unit=\"s\">\n            <TimeInstant>\n              <ISOTime>{}</ISOTime>\n            </TimeInstant>\n          </Time>\n",
            escape(t)
        );
    }
    let _ = write!(
        x,
        "          <Position2D unit=\"deg\">\n            <Name1>RA</Name1>\n            <Name2>Dec</Name2>\n            \
         <Value2>\n              <C1>{ra:.8}</C1>\n              <C2>{dec:.8}</C2>\n            </Value2>\n            \
         <Error2Radius>{:.6}</Error2Radius>\n          </Position2D>\n        </AstroCoords>\n      \
         </ObservationLocation>\n    </ObsDataLocation>\n  </WhereWhen>\n",
        ctx.error_deg
    );
}

/// `<How>`: what found it, with the telescope and instrument where the frames name them.
fn how(x: &mut String, ctx: &EventContext<'_>) {
    let instrument = [ctx.telescope, ctx.instrument]
        .into_iter()
        .flatten()
        .collect::<Vec<_>>()
        .join(", ");
    let _ = write!(
        x,
        "  <How>\n    <Description>{}</Description>\n  </How>\n",
        escape(&format!(
            "found by subwatch {} in the night's frames{}",
            env!("CARGO_PKG_VERSION"),
            if instrument.is_empty() {
                String::new()
            } else {
                format!(" taken with {instrument}")
            }
        ))
    );
}

/// `<Why>`: what kind of thing it is, in words.
fn why(x: &mut String, kind: crate::night::AnomalyKind) {
    let concept = match kind {
        crate::night::AnomalyKind::NewSource => "a source not seen on earlier nights",
        crate::night::AnomalyKind::Moving => "a source moving across the frames",
        crate::night::AnomalyKind::Variable => "a source whose brightness changed",
        crate::night::AnomalyKind::Color => "a source whose color is far from the field's",
        crate::night::AnomalyKind::Transient => "a source in one frame only",
        crate::night::AnomalyKind::Trail => "a streak across the frame",
        crate::night::AnomalyKind::HotPixel => "a hot pixel",
    };
    let _ = write!(
        x,
        "  <Why>\n    <Concept>{}</Concept>\n  </Why>\n",
        escape(concept)
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn authority_identifiers_are_checked() {
        assert!(valid_authority("ivo://kestrel-ridge.example/subwatch"));
        assert!(!valid_authority("http://kestrel-ridge.example"));
        assert!(!valid_authority("ivo://"));
        assert!(!valid_authority("ivo://a b"));
        assert!(!valid_authority("ivo://a#b"));
    }

    #[test]
    fn characters_xml_forbids_never_reach_the_document() {
        // XML 1.0 (Fifth Edition), section 2.2: Char excludes U+FFFE, U+FFFF and the C0
        // controls but tab, LF and CR.
        let e = escape("kfa\u{FFFE}_0\u{FFFF}1\u{1}.fits <&>");
        assert_eq!(e, "kfa\u{FFFD}_0\u{FFFD}1\u{FFFD}.fits &lt;&amp;&gt;");
    }
}
