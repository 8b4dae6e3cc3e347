//! The library's sources as the checks that parse them (`layering`, `structure`) read
//! them: every `.rs` file under a folder, and whether an item is test code.

use std::path::{Path, PathBuf};

/// Every `.rs` file under `dir`, into `out`.
pub fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// Whether an item is compiled only for tests (`#[cfg(test)]`).
pub fn is_cfg_test(attrs: &[syn::Attribute]) -> bool {
    attrs.iter().any(|a| {
        a.path().is_ident("cfg")
            && a.parse_args::<syn::Meta>()
                .is_ok_and(|m| m.path().is_ident("test"))
    })
}

/// Write `text` into the file `rel` under `root`, making its folders: a planted tree for
/// a check to be tried on.
pub fn plant(root: &Path, rel: &str, text: &str) {
    let p = root.join(rel);
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    std::fs::write(p, text).unwrap();
}
