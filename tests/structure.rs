//! The length of every function of the program, held to a limit: a function longer than
//! [`MAX_LINES`] lines holds more than one idea, and its parts want names of their own.
//!
//! A function's length runs from its `fn` keyword to its closing brace (attributes and
//! doc comments not counted), for free functions, methods and trait methods with a body,
//! nested ones included. Left out: code under `#[cfg(test)]`, `#[test]` functions, and
//! the synthetic renderer (`src/sim/`), whose scenes are long lists of what to draw.
//! A file longer than [`LONG_FILE`] lines says why in its top comment.
//! Files are parsed with `syn` (line numbers from `proc-macro2`'s span locations).

#[path = "common/sources.rs"]
mod sources;

use std::path::Path;

use sources::{is_cfg_test, rust_files};
use syn::spanned::Spanned;
use syn::visit::Visit;

/// The longest a function may be, in lines.
const MAX_LINES: usize = 150;

/// A file longer than this many lines says why at its top (ARCHITECTURE.md).
const LONG_FILE: usize = 600;

/// Files under `src` longer than `max` lines whose top comment (`//!`) does not say why
/// ("Longer than most modules", or "length past 600 lines"), as `path (N lines)`.
fn unexplained_long_files(src: &Path, max: usize) -> Vec<String> {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let mut found = Vec::new();
    for file in files {
        let text = std::fs::read_to_string(&file).unwrap();
        let n = text.lines().count();
        let top: String = text
            .lines()
            .take_while(|l| l.starts_with("//!"))
            .map(|l| l.trim_start_matches("//!").trim())
            .collect::<Vec<_>>()
            .join(" ");
        let says_why = top.contains("Longer than most modules")
            || top.contains(&format!("length past {LONG_FILE} lines"));
        if n > max && !says_why {
            let rel = file.strip_prefix(src).unwrap();
            found.push(format!("{} ({n} lines)", rel.display()));
        }
    }
    found.sort();
    found
}

/// `#[cfg(test)]` or `#[test]`.
fn is_test(attrs: &[syn::Attribute]) -> bool {
    is_cfg_test(attrs) || attrs.iter().any(|a| a.path().is_ident("test"))
}

/// Every function of one file outside test code: (name, first line, lines).
#[derive(Default)]
struct Lengths(Vec<(String, usize, usize)>);

impl Lengths {
    fn add(&mut self, name: &syn::Ident, fn_token: &syn::token::Fn, body: &syn::Block) {
        let first = fn_token.span().start().line;
        let last = body.span().end().line;
        self.0.push((name.to_string(), first, last + 1 - first));
    }
}

impl<'ast> Visit<'ast> for Lengths {
    fn visit_item_mod(&mut self, m: &'ast syn::ItemMod) {
        if !is_test(&m.attrs) {
            syn::visit::visit_item_mod(self, m);
        }
    }

    fn visit_item_impl(&mut self, i: &'ast syn::ItemImpl) {
        if !is_test(&i.attrs) {
            syn::visit::visit_item_impl(self, i);
        }
    }

    fn visit_item_fn(&mut self, f: &'ast syn::ItemFn) {
        if !is_test(&f.attrs) {
            self.add(&f.sig.ident, &f.sig.fn_token, &f.block);
            syn::visit::visit_item_fn(self, f);
        }
    }

    fn visit_impl_item_fn(&mut self, f: &'ast syn::ImplItemFn) {
        if !is_test(&f.attrs) {
            self.add(&f.sig.ident, &f.sig.fn_token, &f.block);
            syn::visit::visit_impl_item_fn(self, f);
        }
    }

    fn visit_trait_item_fn(&mut self, f: &'ast syn::TraitItemFn) {
        if is_test(&f.attrs) {
            return;
        }
        if let Some(body) = &f.default {
            self.add(&f.sig.ident, &f.sig.fn_token, body);
        }
        syn::visit::visit_trait_item_fn(self, f);
    }
}

/// Every function under `src` (but `src/sim/`) longer than `max` lines, as
/// `path:line name (N lines)`, longest first.
fn long_functions(src: &Path, max: usize) -> Vec<String> {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let mut found = Vec::new();
    for file in files {
        let rel = file.strip_prefix(src).unwrap();
        if rel.starts_with("sim") {
            continue;
        }
        let text = std::fs::read_to_string(&file).unwrap();
        let parsed = syn::parse_file(&text).unwrap_or_else(|e| panic!("{}: {e}", file.display()));
        let mut lengths = Lengths::default();
        lengths.visit_file(&parsed);
        for (name, line, n) in lengths.0 {
            if n > max {
                found.push((n, format!("{}:{line} {name} ({n} lines)", rel.display())));
            }
        }
    }
    found.sort_by(|a, b| b.0.cmp(&a.0).then_with(|| a.1.cmp(&b.1)));
    found.into_iter().map(|(_, s)| s).collect()
}

#[test]
fn no_function_outside_tests_and_the_renderer_is_longer_than_150_lines() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let found = long_functions(&src, MAX_LINES);
    assert!(
        found.is_empty(),
        "functions longer than {MAX_LINES} lines:\n{}",
        found.join("\n")
    );
}

#[test]
fn every_file_over_600_lines_says_why_at_its_top() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let found = unexplained_long_files(&src, LONG_FILE);
    assert!(
        found.is_empty(),
        "files longer than {LONG_FILE} lines that do not say why at their top:\n{}",
        found.join("\n")
    );
}

#[test]
fn the_long_file_checker_finds_a_planted_file_without_its_reason() {
    let dir = tempfile::tempdir().unwrap();
    let src = dir.path();
    let body = "pub fn f() {}\n".repeat(600);
    let plant = |rel: &str, top: &str| sources::plant(src, rel, &format!("{top}{body}"));
    plant("silent.rs", "//! A module.\n");
    plant(
        "said.rs",
        "//! A module.\n//! Longer than most modules: one idea.\n",
    );
    plant(
        "tests.rs",
        "//! A module. Its length past 600\n//! lines is tests.\n",
    );
    sources::plant(src, "short.rs", "//! Short, and silent about it.\n");
    assert_eq!(
        unexplained_long_files(src, LONG_FILE),
        ["silent.rs (601 lines)"]
    );
}

/// The checker on a planted source tree: the same function the real check runs.
#[test]
fn the_checker_finds_a_planted_long_function_and_only_it() {
    let dir = tempfile::tempdir().unwrap();
    let src = dir.path();
    let write = |rel: &str, text: &str| sources::plant(src, rel, text);
    // A body of `n` statement lines: the function is n + 2 lines with its braces.
    let body = |n: usize| "    let _x = 1;\n".repeat(n);
    let long = format!(
        "/// Documented.\n#[inline]\npub fn long() {{\n{}}}\n\npub fn short() {{\n{}}}\n",
        body(149),
        body(148)
    );
    let methods = format!(
        "struct S;\nimpl S {{\n    fn method(&self) {{\n{}    }}\n}}\ntrait T {{\n    fn provided(&self) {{\n{}    }}\n}}\nfn outer() {{\n    fn inner() {{\n{}    }}\n}}\n",
        body(200),
        body(160),
        body(170)
    );
    let tests = format!(
        "#[cfg(test)]\nmod tests {{\n    fn helper() {{\n{}    }}\n}}\n#[test]\nfn alone() {{\n{}}}\n",
        body(300),
        body(300)
    );
    write("measure/long.rs", &long);
    write("night/methods.rs", &methods);
    write("tests_only.rs", &tests);
    write(
        "sim/scene.rs",
        &format!("pub fn scene() {{\n{}}}\n", body(400)),
    );
    let found = long_functions(src, 150);
    assert_eq!(
        found,
        [
            "night/methods.rs:3 method (202 lines)",
            "night/methods.rs:370 outer (174 lines)",
            "night/methods.rs:371 inner (172 lines)",
            "night/methods.rs:207 provided (162 lines)",
            "measure/long.rs:3 long (151 lines)",
        ],
        "the 150-line function, test code and the renderer pass"
    );
}
