//! The status page's plan lines: how far each planned target imaged tonight is
//! (`[[targets]]`, `season::plan`), under the night's counts. Pure; every line escaped
//! (a target's name comes from the frames' headers).

use crate::text::escape_html;

/// The lines as a list for the page's "Frames so far" section; nothing without a plan.
pub fn section(lines: &[String]) -> String {
    if lines.is_empty() {
        return String::new();
    }
    let mut h = String::from("<ul id=\"plans\">");
    for l in lines {
        h.push_str("<li>");
        h.push_str(&escape_html(l));
        h.push_str("</li>");
    }
    h.push_str("</ul>");
    h
}

#[cfg(test)]
mod tests {
    #[test]
    fn a_plan_line_is_escaped() {
        let h = super::section(&["<b>Field</b>: L 1.0 of 2 h; the plan is complete".into()]);
        assert_eq!(
            h,
            "<ul id=\"plans\"><li>&lt;b&gt;Field&lt;/b&gt;: L 1.0 of 2 h; the plan is complete</li></ul>"
        );
        assert_eq!(super::section(&[]), "");
    }
}
