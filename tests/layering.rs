//! The layering ARCHITECTURE.md documents, held to the code: every module sits in a
//! layer of the table between `<!-- layers -->` and `<!-- /layers -->`, imports only from
//! its own layer or lower ones, and no two modules import each other, directly or round
//! a loop. A module's imports are its `crate::...` paths (and, inside `frame`, its
//! `super::...` paths to sibling modules), tests left out.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

const FRAME_CHILDREN: [&str; 8] = [
    "bayer", "cards", "cfitsio", "fits", "header", "layout", "wcs", "write",
];

/// The module a file belongs to for layering: a top-level module, or `frame::child`.
fn unit_of(rel: &Path) -> String {
    let parts: Vec<String> = rel
        .with_extension("")
        .iter()
        .map(|p| p.to_string_lossy().into_owned())
        .filter(|p| p != "mod")
        .collect();
    match parts.as_slice() {
        [f, child, ..] if f == "frame" => format!("frame::{child}"),
        [top, ..] => top.clone(),
        [] => String::new(),
    }
}

/// The unit a `crate::a::b...` path names.
fn unit_of_path(path: &str) -> String {
    let mut parts = path.split("::");
    let top = parts.next().unwrap_or("").to_string();
    if top == "frame" {
        if let Some(child) = parts.next() {
            if FRAME_CHILDREN.contains(&child) {
                return format!("frame::{child}");
            }
        }
    }
    top
}

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// Every identifier path after `prefix` in `code` (`crate::store::Store` → `store::Store`).
fn paths_after<'a>(code: &'a str, prefix: &'a str) -> impl Iterator<Item = String> + 'a {
    code.match_indices(prefix).map(move |(i, _)| {
        code[i + prefix.len()..]
            .chars()
            .take_while(|c| c.is_alphanumeric() || *c == '_' || *c == ':')
            .collect::<String>()
    })
}

/// Module → modules it imports, from the library's sources.
fn imports(src: &Path) -> BTreeMap<String, BTreeSet<String>> {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let mut graph: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for file in files {
        let rel = file.strip_prefix(src).unwrap();
        let first = rel.iter().next().unwrap().to_string_lossy();
        // The binary is above every layer; lib.rs only declares the modules.
        if first == "main.rs" || first == "commands" || first == "lib.rs" {
            continue;
        }
        let unit = unit_of(rel);
        let text = std::fs::read_to_string(&file).unwrap();
        let code = text.split("#[cfg(test)]").next().unwrap();
        let code: String = code
            .lines()
            .filter(|l| !l.trim_start().starts_with("//"))
            .collect::<Vec<_>>()
            .join("\n");
        let targets = graph.entry(unit.clone()).or_default();
        for p in paths_after(&code, "crate::") {
            let u = unit_of_path(&p);
            if !u.is_empty() && u != unit {
                targets.insert(u);
            }
        }
        if unit.starts_with("frame::") && rel.iter().count() == 2 {
            for p in paths_after(&code, "super::") {
                let child = p.split("::").next().unwrap_or("");
                let u = if FRAME_CHILDREN.contains(&child) {
                    format!("frame::{child}")
                } else {
                    "frame".to_string()
                };
                if u != unit {
                    targets.insert(u);
                }
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

#[test]
fn imports_run_down_the_documented_layers_and_never_in_a_loop() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let graph = imports(&root.join("src"));
    let layer = layers(&std::fs::read_to_string(root.join("ARCHITECTURE.md")).unwrap());
    let mut problems = Vec::new();
    for (module, targets) in &graph {
        let Some(&mine) = layer.get(module) else {
            problems.push(format!("{module} is in no layer of ARCHITECTURE.md"));
            continue;
        };
        for t in targets {
            match layer.get(t) {
                None => problems.push(format!("{module} imports {t}, which is in no layer")),
                Some(&theirs) if theirs > mine => problems.push(format!(
                    "{module} (layer {mine}) imports {t} (layer {theirs}): upward"
                )),
                _ => {}
            }
        }
    }
    // Loops: a depth-first search that meets a module already on its path.
    fn visit(
        m: &str,
        graph: &BTreeMap<String, BTreeSet<String>>,
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
    for m in graph.keys() {
        visit(m, &graph, &mut Vec::new(), &mut done, &mut loops);
    }
    problems.extend(loops.into_iter().map(|l| format!("a loop: {l}")));
    assert!(problems.is_empty(), "{}", problems.join("\n"));
    println!(
        "{} modules, {} imports, all down the layers, no loop",
        graph.len(),
        graph.values().map(BTreeSet::len).sum::<usize>()
    );
}

#[test]
fn the_checker_sees_an_upward_import_and_a_loop() {
    // The checker itself, on a made-up pair of modules.
    let mut graph: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    graph.insert("measure".into(), ["store".to_string()].into());
    graph.insert("store".into(), ["measure".to_string()].into());
    let layer = layers(
        "<!-- layers -->\n| layer | modules |\n|---|---|\n| 1 core | `measure` |\n| 3 shells | `store` |\n<!-- /layers -->",
    );
    assert_eq!(layer["measure"], 1);
    assert_eq!(layer["store"], 3);
    assert!(graph["measure"].iter().any(|t| layer[t] > layer["measure"]));
    assert_eq!(unit_of_path("frame::header::FrameHeader"), "frame::header");
    assert_eq!(unit_of_path("frame::FrameError"), "frame");
    assert_eq!(unit_of(Path::new("frame/layout/tiles.rs")), "frame::layout");
    assert_eq!(unit_of(Path::new("store/frames.rs")), "store");
}
