//! The layering ARCHITECTURE.md documents, held to the code, module by module (every file
//! is a module: `night::classify::orphans`, `store::frames`):
//! - every module sits in a layer of the table between `<!-- layers -->` and
//!   `<!-- /layers -->` (its own row, or the row of its nearest listed parent), and
//!   imports only from its own layer or lower ones;
//! - no two modules import each other, directly or round a loop, at any level: an import
//!   from `night::classify::orphans` of `night::judge` is an import of `night::judge` by
//!   `night::classify`, and the siblings of every module must form no loop. A module and
//!   its own parent (a `mod.rs` declaring and re-exporting its children) are one unit
//!   for loops.
//!
//! A module's imports are every path it names (`use` trees, expressions, types) that
//! starts with `crate::`, `super::` or `self::`, resolved to the module holding the
//! item; code under `#[cfg(test)]` is left out. Files are parsed with `syn`.

#[path = "common/sources.rs"]
mod sources;

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

use sources::{is_cfg_test, rust_files};
use syn::visit::Visit;

type Graph = BTreeMap<String, BTreeSet<String>>;

/// The module a file is: `night/classify/orphans.rs` → `night::classify::orphans`,
/// `store/mod.rs` → `store`.
fn module_of(rel: &Path) -> String {
    rel.with_extension("")
        .iter()
        .map(|p| p.to_string_lossy().into_owned())
        .filter(|p| p != "mod")
        .collect::<Vec<_>>()
        .join("::")
}

/// Every path a file names from its own crate, as segments (`super`, `self` and
/// `crate` kept for resolving).
#[derive(Default)]
struct Paths(Vec<Vec<String>>);

impl Paths {
    fn add(&mut self, segments: Vec<String>) {
        if matches!(
            segments.first().map(String::as_str),
            Some("crate" | "super" | "self")
        ) {
            self.0.push(segments);
        }
    }

    fn use_tree(&mut self, prefix: &mut Vec<String>, tree: &syn::UseTree) {
        match tree {
            syn::UseTree::Path(p) => {
                prefix.push(p.ident.to_string());
                self.use_tree(prefix, &p.tree);
                prefix.pop();
            }
            syn::UseTree::Name(n) => {
                let mut full = prefix.clone();
                if n.ident != "self" {
                    full.push(n.ident.to_string());
                }
                self.add(full);
            }
            syn::UseTree::Rename(r) => {
                let mut full = prefix.clone();
                full.push(r.ident.to_string());
                self.add(full);
            }
            syn::UseTree::Glob(_) => self.add(prefix.clone()),
            syn::UseTree::Group(g) => {
                for t in &g.items {
                    self.use_tree(prefix, t);
                }
            }
        }
    }
}

impl<'ast> Visit<'ast> for Paths {
    fn visit_item(&mut self, item: &'ast syn::Item) {
        let attrs: &[syn::Attribute] = match item {
            syn::Item::Mod(m) => &m.attrs,
            syn::Item::Fn(f) => &f.attrs,
            syn::Item::Use(u) => &u.attrs,
            syn::Item::Impl(i) => &i.attrs,
            syn::Item::Struct(s) => &s.attrs,
            syn::Item::Enum(e) => &e.attrs,
            syn::Item::Const(c) => &c.attrs,
            syn::Item::Static(s) => &s.attrs,
            _ => &[],
        };
        if is_cfg_test(attrs) {
            return;
        }
        if let syn::Item::Use(u) = item {
            self.use_tree(&mut Vec::new(), &u.tree);
        }
        syn::visit::visit_item(self, item);
    }

    fn visit_impl_item_fn(&mut self, f: &'ast syn::ImplItemFn) {
        if !is_cfg_test(&f.attrs) {
            syn::visit::visit_impl_item_fn(self, f);
        }
    }

    fn visit_visibility(&mut self, _: &'ast syn::Visibility) {
        // `pub(super)` names who may see an item, not an import.
    }

    fn visit_path(&mut self, path: &'ast syn::Path) {
        self.add(path.segments.iter().map(|s| s.ident.to_string()).collect());
        syn::visit::visit_path(self, path);
    }

    fn visit_macro(&mut self, mac: &'ast syn::Macro) {
        // Paths inside macro calls (format!, matches!, tracing's) are tokens to syn:
        // read them as paths where they parse as expressions.
        if let Ok(args) = mac.parse_body_with(
            syn::punctuated::Punctuated::<syn::Expr, syn::Token![,]>::parse_terminated,
        ) {
            for e in &args {
                self.visit_expr(e);
            }
        }
        syn::visit::visit_macro(self, mac);
    }
}

/// The module a path names, resolved from `module` (the file naming it) to the longest
/// known module that holds the item.
fn resolve(module: &str, path: &[String], known: &BTreeSet<String>) -> String {
    let mut at: Vec<String> = if module.is_empty() {
        Vec::new()
    } else {
        module.split("::").map(str::to_string).collect()
    };
    // `super` in a file `a/b.rs` (module a::b) is `a`, and in `a/b/mod.rs` too.
    let mut rest = path;
    match path.first().map(String::as_str) {
        Some("crate") => {
            at.clear();
            rest = &path[1..];
        }
        Some("self") => rest = &path[1..],
        Some("super") => {
            while rest.first().map(String::as_str) == Some("super") {
                at.pop();
                rest = &rest[1..];
            }
        }
        _ => {}
    }
    let mut best = at.join("::");
    for seg in rest {
        at.push(seg.clone());
        let candidate = at.join("::");
        if known.contains(&candidate) {
            best = candidate;
        } else {
            break;
        }
    }
    best
}

/// Module → modules it imports, from the library's sources under `src` (the binary's
/// `main.rs` and `commands/` are above every layer and left out; `lib.rs` only declares).
fn imports(src: &Path) -> Graph {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let skip = |rel: &Path| {
        let first = rel.iter().next().unwrap().to_string_lossy().into_owned();
        first == "main.rs" || first == "commands" || first == "lib.rs" || first == "bin"
    };
    let known: BTreeSet<String> = files
        .iter()
        .map(|f| f.strip_prefix(src).unwrap())
        .filter(|rel| !skip(rel))
        .map(module_of)
        .collect();
    let mut graph = Graph::new();
    for file in files {
        let rel = file.strip_prefix(src).unwrap();
        if skip(rel) {
            continue;
        }
        let module = module_of(rel);
        let text = std::fs::read_to_string(&file).unwrap();
        let parsed = syn::parse_file(&text).unwrap_or_else(|e| panic!("{}: {e}", file.display()));
        let mut paths = Paths::default();
        paths.visit_file(&parsed);
        let targets = graph.entry(module.clone()).or_default();
        for p in &paths.0 {
            let t = resolve(&module, p, &known);
            if !t.is_empty() && t != module {
                targets.insert(t);
            }
        }
    }
    graph
}

/// Module → layer, from ARCHITECTURE.md's table.
fn layers(doc: &str) -> BTreeMap<String, usize> {
    let table = doc
        .split("<!-- layers -->")
        .nth(1)
        .and_then(|t| t.split("<!-- /layers -->").next())
        .expect("ARCHITECTURE.md has a layers table");
    let mut out = BTreeMap::new();
    for row in table
        .lines()
        .filter(|l| l.starts_with("| ") && !l.starts_with("| layer"))
    {
        let cells: Vec<&str> = row.split('|').map(str::trim).collect();
        let layer: usize = cells[1]
            .split_whitespace()
            .next()
            .and_then(|n| n.parse().ok())
            .expect("a layer number");
        for m in cells[2].split(',') {
            out.insert(m.trim().trim_matches('`').to_string(), layer);
        }
    }
    out
}

/// A module's layer: its own row, or its nearest listed parent's.
fn layer_of(module: &str, layers: &BTreeMap<String, usize>) -> Option<usize> {
    let mut m = module;
    loop {
        if let Some(&l) = layers.get(m) {
            return Some(l);
        }
        m = &m[..m.rfind("::")?];
    }
}

/// What breaks the layering in `graph`: modules in no layer, upward imports, loops.
fn problems(graph: &Graph, layers: &BTreeMap<String, usize>) -> Vec<String> {
    let mut problems = Vec::new();
    for (module, targets) in graph {
        let Some(mine) = layer_of(module, layers) else {
            problems.push(format!("{module} is in no layer of ARCHITECTURE.md"));
            continue;
        };
        for t in targets {
            match layer_of(t, layers) {
                None => problems.push(format!("{module} imports {t}, which is in no layer")),
                Some(theirs) if theirs > mine => problems.push(format!(
                    "{module} (layer {mine}) imports {t} (layer {theirs}): upward"
                )),
                _ => {}
            }
        }
    }
    // Loops among siblings, at every level: each import seen from the nearest parent
    // the two modules share, as an import between its children.
    let mut siblings = Graph::new();
    for (module, targets) in graph {
        for t in targets {
            let a: Vec<&str> = module.split("::").collect();
            let b: Vec<&str> = t.split("::").collect();
            let common = a.iter().zip(&b).take_while(|(x, y)| x == y).count();
            if common == a.len() || common == b.len() {
                continue; // a module and its own parent or child
            }
            siblings
                .entry(a[..=common].join("::"))
                .or_default()
                .insert(b[..=common].join("::"));
        }
    }
    fn visit(
        m: &str,
        graph: &Graph,
        path: &mut Vec<String>,
        done: &mut BTreeSet<String>,
        loops: &mut Vec<String>,
    ) {
        if let Some(at) = path.iter().position(|p| p == m) {
            loops.push(format!("{} -> {m}", path[at..].join(" -> ")));
            return;
        }
        if !done.insert(m.to_string()) {
            return;
        }
        path.push(m.to_string());
        for t in graph.get(m).into_iter().flatten() {
            visit(t, graph, path, done, loops);
        }
        path.pop();
    }
    let mut loops = Vec::new();
    let mut done = BTreeSet::new();
    for m in siblings.keys() {
        visit(m, &siblings, &mut Vec::new(), &mut done, &mut loops);
    }
    problems.extend(loops.into_iter().map(|l| format!("a loop: {l}")));
    problems
}

#[test]
fn imports_run_down_the_documented_layers_and_never_in_a_loop() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let graph = imports(&root.join("src"));
    let layer = layers(&std::fs::read_to_string(root.join("ARCHITECTURE.md")).unwrap());
    let found = problems(&graph, &layer);
    assert!(found.is_empty(), "{}", found.join("\n"));
    println!(
        "{} modules, {} imports, all down the layers, no loop at any level",
        graph.len(),
        graph.values().map(BTreeSet::len).sum::<usize>()
    );
}

/// The checker on a planted source tree: the same functions the real check runs.
#[test]
fn the_checker_finds_a_planted_loop_between_submodules_and_an_upward_import() {
    let dir = tempfile::tempdir().unwrap();
    let src = dir.path();
    let write = |rel: &str, text: &str| sources::plant(src, rel, text);
    write("lib.rs", "pub mod night; pub mod store;");
    // night::judge and night::classify::orphans import each other: a loop between the
    // siblings judge and classify, which the top level (one unit `night`) cannot see.
    write(
        "night/mod.rs",
        "pub mod classify; pub mod judge; pub use judge::judge;",
    );
    write(
        "night/judge.rs",
        "pub(super) struct Placement; pub fn judge() { crate::night::classify::orphans::find(); }",
    );
    write("night/classify/mod.rs", "pub mod orphans;");
    write(
        "night/classify/orphans.rs",
        "use super::super::{judge::Placement};\npub fn find() -> Option<Placement> { None }\n#[cfg(test)]\nmod tests { use crate::store::Store; }",
    );
    // An upward import, inside a macro call.
    write(
        "store/mod.rs",
        "pub struct Store;\npub fn f() { let _ = format!(\"{:?}\", crate::night::judge::judge()); }",
    );
    let graph = imports(src);
    assert_eq!(
        graph["night::classify::orphans"],
        ["night::judge".to_string()].into(),
        "the test module's import is left out"
    );
    let doc = "<!-- layers -->\n| layer | modules |\n|---|---|\n| 1 core | `store` |\n| 2 above | `night` |\n<!-- /layers -->";
    let found = problems(&graph, &layers(doc));
    assert!(
        found.iter().any(|p| p.contains("a loop")
            && p.contains("night::classify")
            && p.contains("night::judge")),
        "{found:?}"
    );
    assert!(
        found
            .iter()
            .any(|p| p == "store (layer 1) imports night::judge (layer 2): upward"),
        "{found:?}"
    );
    assert_eq!(layer_of("night::classify::orphans", &layers(doc)), Some(2));
    assert_eq!(
        module_of(Path::new("night/classify/mod.rs")),
        "night::classify"
    );
}
