//! The status page's own files and fixed markup: its script, its style sheet with the
//! three sets of colours, the red mode's picture filter, its icon, and the
//! Content-Security-Policy every answer carries. Served as files, so the policy allows
//! no inline code.

/// The page's script: sets the chosen colours before the page is drawn (so a page
/// opened in the dome is never white for a moment: it loads in the head, undeferred),
/// offers the choice and remembers it; polls the view's version and fetches the page's
/// content again when it changed. No library, nothing from outside.
pub const SCRIPT: &str = r##""use strict";
(function () {
  var KEY = "subwatch-page-mode";
  var MODES = ["light", "dark", "red"];
  var root = document.documentElement;
  function saved() {
    try {
      var m = window.localStorage.getItem(KEY);
      return MODES.indexOf(m) >= 0 ? m : null;
    } catch (e) { return null; }
  }
  function preferred() {
    return window.matchMedia && window.matchMedia("(prefers-color-scheme: dark)").matches ? "dark" : "light";
  }
  function show(mode) {
    root.setAttribute("data-mode", mode);
    var buttons = document.querySelectorAll("#modes button[data-mode]");
    for (var i = 0; i < buttons.length; i++) {
      buttons[i].setAttribute("aria-pressed", String(buttons[i].getAttribute("data-mode") === mode));
    }
  }
  show(saved() || preferred());
  // Another tab of the page chose: follow it.
  window.addEventListener("storage", function (e) {
    if (e.key === KEY) { show(saved() || preferred()); }
  });

  function start() {
    var modes = document.getElementById("modes");
    if (modes) {
      modes.hidden = false;
      modes.addEventListener("click", function (e) {
        var b = e.target && e.target.closest ? e.target.closest("button[data-mode]") : null;
        if (!b) { return; }
        var mode = b.getAttribute("data-mode");
        // Without storage (a private window) the choice lasts as long as the page.
        try { window.localStorage.setItem(KEY, mode); } catch (err) { }
        show(mode);
      });
    }
    show(root.getAttribute("data-mode") || "light");

    var main = document.getElementById("live");
    var seen = main ? main.getAttribute("data-version") : null;
    function tick() {
      var note = document.getElementById("updated");
      fetch("api/version", { cache: "no-store", credentials: "same-origin" })
        .then(function (r) { return r.ok ? r.json() : null; })
        .then(function (v) {
          if (!v) { return; }
          if (String(v.version) === seen) {
            if (note) { note.textContent = "up to date"; }
            return;
          }
          return fetch("part", { cache: "no-store", credentials: "same-origin" })
            .then(function (r) { return r.ok ? r.text() : null; })
            .then(function (html) {
              if (html === null) { return; }
              main.innerHTML = html;
              seen = String(v.version);
              main.setAttribute("data-version", seen);
            });
        })
        .catch(function () { if (note) { note.textContent = "daemon not answering"; } });
    }
    if (main) { window.setInterval(tick, 3000); }
  }
  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", start);
  } else {
    start();
  }
})();
"##;

/// The page's style sheet: one column on a phone, two on a wide screen; three sets of
/// colours, chosen by `data-mode` on the root element. Light; dark; and red, for the
/// dome, where only red light keeps the eyes dark-adapted (common practice at the
/// telescope): every colour there has no green or blue, and every picture is drawn in
/// red through the `red-only` filter (`RED_ONLY_FILTER`). Each text colour stands at
/// least 4.5:1 against its background (WCAG 2.1, success criterion 1.4.3).
pub const STYLE: &str = r#":root{--bg:#fafaf7;--fg:#222;--quiet:#555;--line:#ccc;--head:#ecece6;--ok:#275;--warn:#960;--bad:#a00;--star:#3c3;--mark:#f33;--note-bg:#fdf2d0;--note-line:#c90;--focus:#05a;color-scheme:light}
:root[data-mode=dark]{--bg:#111315;--fg:#ddd;--quiet:#a8a8a8;--line:#3a3d42;--head:#202327;--ok:#6c9;--warn:#e0b050;--bad:#ff7b72;--star:#4c4;--mark:#f55;--note-bg:#2a2410;--note-line:#a80;--focus:#6af;color-scheme:dark}
:root[data-mode=red]{--bg:#000;--fg:#f00;--quiet:#e00;--line:#500;--head:#100;--ok:#f00;--warn:#f00;--bad:#f00;--star:#c00;--mark:#f00;--note-bg:#200;--note-line:#a00;--focus:#f00;color-scheme:dark}
html{color:var(--fg);background:var(--bg);scrollbar-color:var(--line) var(--bg)}
body{font-family:sans-serif;margin:0 auto;max-width:1200px;padding:0 10px;line-height:1.35;color:var(--fg);background:var(--bg)}
h1{font-size:1.4em;margin:10px 0 2px}h2{font-size:1.15em;margin:16px 0 6px;border-bottom:1px solid var(--line)}
table{border-collapse:collapse;margin:4px 0 10px;max-width:100%}
td,th{border:1px solid var(--line);padding:2px 6px;text-align:left;vertical-align:top}
th{background:var(--head)}td.n{text-align:right;white-space:nowrap}
.reject{color:var(--bad)}.warn{color:var(--warn)}.ok{color:var(--ok)}
:root[data-mode=red] .reject{font-weight:bold}
.file{word-break:break-all;font-family:monospace;font-size:92%}
ul.why{margin:2px 0;padding-left:18px}
.grid{display:grid;grid-template-columns:1fr;gap:0 24px}
.plots{display:grid;grid-template-columns:1fr;gap:0 16px}h3{font-size:1em;margin:10px 0 2px}
@media (min-width:900px){.grid,.plots{grid-template-columns:1fr 1fr}}
.grid>section{min-width:0}
.scroll{overflow-x:auto}
.pic{position:relative;max-width:100%}
.pic img{display:block;width:100%;height:auto;background:#000}
.pic svg{position:absolute;left:0;top:0;width:100%;height:100%}
.star{fill:none;stroke:var(--star);stroke-width:1.2}
.mark{fill:none;stroke:var(--mark);stroke-width:2}
img.plot{display:block;max-width:100%;height:auto;margin:6px 0}
:root[data-mode=dark] img.plot{filter:invert(.9) hue-rotate(180deg)}
:root[data-mode=red] img{filter:url(#red-only)}
:root[data-mode=red] img.plot{filter:invert(1) url(#red-only)}
.anomaly{overflow:hidden;border-top:1px solid var(--line);padding:6px 0}
.anomaly img{float:left;margin:0 10px 4px 0;max-width:40%}
.kind{font-weight:bold}small,.quiet{color:var(--quiet)}
.notice{background:var(--note-bg);border-left:4px solid var(--note-line);padding:4px 8px}
dl.facts{display:grid;grid-template-columns:auto 1fr;gap:2px 10px;margin:4px 0}dl.facts dt{color:var(--quiet)}dl.facts dd{margin:0}
.modes{display:flex;flex-wrap:wrap;gap:6px;align-items:center;justify-content:flex-end;margin:8px 0 0;font-size:.9em;color:var(--quiet)}
.modes[hidden]{display:none}
.modes button{font:inherit;color:var(--fg);background:var(--head);border:1px solid var(--line);border-radius:4px;padding:2px 10px;cursor:pointer}
.modes button[aria-pressed=true]{border-color:var(--fg);font-weight:bold}
:focus-visible{outline:2px solid var(--focus);outline-offset:2px}
::selection{background:var(--fg);color:var(--bg)}
.defs{position:absolute;width:0;height:0;overflow:hidden}
"#;

/// The filter the red mode draws pictures through: each pixel's luminance (Rec. 709
/// weights, as sRGB's) into red, green and blue set to 0.
pub const RED_ONLY_FILTER: &str = "<svg class=\"defs\" aria-hidden=\"true\" focusable=\"false\"><filter id=\"red-only\" color-interpolation-filters=\"sRGB\"><feColorMatrix type=\"matrix\" values=\"0.2126 0.7152 0.0722 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 1 0\"/></filter></svg>";

/// The page's icon: a ring round a dot, in the page's own colours.
pub const ICON: &str = "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 16 16\"><circle cx=\"8\" cy=\"8\" r=\"6\" fill=\"none\" stroke=\"#275\" stroke-width=\"2\"/><circle cx=\"8\" cy=\"8\" r=\"2\" fill=\"#222\"/></svg>";

/// Content-Security-Policy of every answer: only this server's own script, style and
/// images; no frames, forms or outside connections.
pub const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeMap;

    /// The custom properties a `:root...{}` rule of the style sheet sets.
    fn palette(selector: &str) -> BTreeMap<String, String> {
        let at = STYLE.find(&format!("{selector}{{")).expect(selector) + selector.len() + 1;
        let body = &STYLE[at..at + STYLE[at..].find('}').unwrap()];
        body.split(';')
            .filter_map(|d| d.split_once(':'))
            .filter(|(k, _)| k.starts_with("--"))
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect()
    }

    /// A `#rgb` or `#rrggbb` colour as 0..=255 channels.
    fn rgb(hex: &str) -> [u8; 3] {
        let h = hex.trim_start_matches('#');
        let wide: String = if h.len() == 3 {
            h.chars().flat_map(|c| [c, c]).collect()
        } else {
            h.to_string()
        };
        let c = |i: usize| u8::from_str_radix(&wide[i..i + 2], 16).unwrap();
        [c(0), c(2), c(4)]
    }

    /// Relative luminance and contrast ratio as WCAG 2.1 defines them (its glossary:
    /// "relative luminance", "contrast ratio"), from sRGB channels.
    fn contrast(a: [u8; 3], b: [u8; 3]) -> f64 {
        let lum = |c: [u8; 3]| {
            let lin = |v: u8| {
                let s = f64::from(v) / 255.0;
                if s <= 0.04045 {
                    s / 12.92
                } else {
                    ((s + 0.055) / 1.055).powf(2.4)
                }
            };
            0.2126 * lin(c[0]) + 0.7152 * lin(c[1]) + 0.0722 * lin(c[2])
        };
        let (x, y) = (lum(a), lum(b));
        (x.max(y) + 0.05) / (x.min(y) + 0.05)
    }

    #[test]
    fn the_red_mode_has_no_green_or_blue_anywhere() {
        let light = palette(":root");
        let red = palette(":root[data-mode=red]");
        let dark = palette(":root[data-mode=dark]");
        // Every colour the page uses is set by each mode: none leaks from the light one.
        let names = |p: &BTreeMap<String, String>| p.keys().cloned().collect::<Vec<_>>();
        assert_eq!(names(&red), names(&light));
        assert_eq!(names(&dark), names(&light));
        for (k, v) in &red {
            let [_, g, b] = rgb(v);
            assert_eq!((g, b), (0, 0), "{k}: {v}");
        }
        // Colours written outright (not through the properties) are black or red too.
        let outside: String = STYLE
            .lines()
            .filter(|l| !l.starts_with(":root{") && !l.starts_with(":root[data-mode=dark]{"))
            .collect();
        let mut rest = outside.as_str();
        while let Some(at) = rest.find('#') {
            let hex: String = rest[at + 1..]
                .chars()
                .take_while(|c| c.is_ascii_hexdigit())
                .collect();
            if hex.len() == 3 || hex.len() == 6 {
                let [_, g, b] = rgb(&hex);
                assert_eq!((g, b), (0, 0), "#{hex}");
            }
            rest = &rest[at + 1..];
        }
        // Pictures go through a matrix whose green and blue rows are zero.
        let values = RED_ONLY_FILTER.split("values=\"").nth(1).unwrap();
        let m: Vec<f64> = values
            .split('"')
            .next()
            .unwrap()
            .split_whitespace()
            .map(|x| x.parse().unwrap())
            .collect();
        assert_eq!(m.len(), 20);
        assert!(m[5..15].iter().all(|x| *x == 0.0), "{m:?}");
        assert!(STYLE.contains(":root[data-mode=red] img{filter:url(#red-only)}"));
    }

    #[test]
    fn every_text_colour_stands_out_from_its_background_in_every_mode() {
        // WCAG 2.1 success criterion 1.4.3 (contrast, minimum): 4.5:1 for text.
        for mode in [":root", ":root[data-mode=dark]", ":root[data-mode=red]"] {
            let p = palette(mode);
            let c = |k: &str| rgb(&p[k]);
            for (text, ground) in [
                ("--fg", "--bg"),
                ("--quiet", "--bg"),
                ("--ok", "--bg"),
                ("--warn", "--bg"),
                ("--bad", "--bg"),
                ("--fg", "--head"),
                ("--fg", "--note-bg"),
                ("--quiet", "--head"),
            ] {
                let r = contrast(c(text), c(ground));
                assert!(r >= 4.5, "{mode}: {text} on {ground} is {r:.2}:1");
            }
        }
        // The computation against WCAG's own extremes: black on white is 21:1.
        assert!((contrast([0, 0, 0], [255, 255, 255]) - 21.0).abs() < 1e-9);
    }
}
