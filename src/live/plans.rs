//! The status page's plan lines: how far each planned target imaged tonight is
//! (`[[targets]]`, `season::plan`), under the night's counts. Pure; every line escaped by
//! maud (a target's name comes from the frames' headers).

use maud::{html, Markup};

/// The lines as a list for the page's "Frames so far" section; nothing without a plan.
pub fn section(lines: &[String]) -> Markup {
    html! {
        @if !lines.is_empty() {
            ul id="plans" {
                @for l in lines { li { (l) } }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn a_plan_line_is_escaped() {
        let h = super::section(&["<b>Field</b>: L 1.0 of 2 h; the plan is complete".into()]);
        assert_eq!(
            h.into_string(),
            "<ul id=\"plans\"><li>&lt;b&gt;Field&lt;/b&gt;: L 1.0 of 2 h; the plan is complete</li></ul>"
        );
        assert_eq!(super::section(&[]).into_string(), "");
    }
}
