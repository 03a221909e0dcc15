//! The layers of the library, checked: every `crate::` path in a module names a module of
//! a lower layer (or its own). An upward edge (say `data` using `fit`) fails here, so a
//! dependency cycle cannot pass the tests.

use super::common::root;

/// The layers, lowest first; modules on one line are of one layer and may not use each
/// other.
const LAYERS: &[&[&str]] = &[
    &["error", "numerics", "rng"],
    &["spec"],
    &["data", "simulate"],
    &["model"],
    &["fit"],
    &["inference"],
    &["compare"],
    &["pipeline"],
    &["render"],
    &["runfolder"],
    &["cli"],
];

fn layer(module: &str) -> Option<usize> {
    LAYERS.iter().position(|l| l.contains(&module))
}

/// The top-level modules the `crate::` paths of `text` name (`crate::a::b`,
/// `crate::{a, b::c}`, a group may run over several lines).
fn named(text: &str) -> Vec<String> {
    text.match_indices("crate::")
        .flat_map(|(at, _)| first_named(&text[at..]))
        .collect()
}

/// The top-level modules the `crate::` path at the start of `text` names.
fn first_named(text: &str) -> Vec<String> {
    let rest = &text["crate::".len()..];
    let mut out = Vec::new();
    if let Some(group) = rest.strip_prefix('{') {
        let mut depth = 0;
        let mut item = String::new();
        for c in group.chars() {
            match c {
                '{' => depth += 1,
                '}' if depth == 0 => break,
                '}' => depth -= 1,
                ',' if depth == 0 => {
                    out.push(std::mem::take(&mut item));
                    continue;
                }
                _ => {}
            }
            item.push(c);
        }
        out.push(item);
    } else {
        out.push(rest.to_string());
    }
    out.iter()
        .map(|p| {
            p.trim()
                .chars()
                .take_while(|c| c.is_alphanumeric() || *c == '_')
                .collect()
        })
        .filter(|s: &String| !s.is_empty())
        .collect()
}

/// The text with every `//` comment blanked out (lines kept, so line numbers hold).
fn without_comments(text: &str) -> String {
    text.lines()
        .map(|l| match l.find("//") {
            Some(at) => &l[..at],
            None => l,
        })
        .collect::<Vec<_>>()
        .join("\n")
}

fn rust_files(dir: &std::path::Path, out: &mut Vec<std::path::PathBuf>) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

/// Every edge of the source tree that goes up or sideways: (file:line, from, to).
fn upward_edges(src: &std::path::Path) -> Vec<String> {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let mut bad = Vec::new();
    for file in files {
        let rel = file.strip_prefix(src).unwrap();
        let top = rel.components().next().unwrap().as_os_str().to_string_lossy();
        let top = top.trim_end_matches(".rs").to_string();
        let Some(from) = layer(&top) else {
            assert!(
                top == "lib" || top == "main",
                "{} is in no layer: add it to LAYERS",
                rel.display()
            );
            continue;
        };
        let text = without_comments(&std::fs::read_to_string(&file).unwrap());
        for (at, _) in text.match_indices("crate::") {
            // The paths from here on, across lines (rustfmt breaks long groups).
            for to in first_named(&text[at..]) {
                let Some(layer_to) = layer(&to) else { continue };
                if to != top && layer_to >= from {
                    let line = text[..at].matches('\n').count() + 1;
                    bad.push(format!("{}:{line}: {top} uses {to}", rel.display()));
                }
            }
        }
    }
    bad
}

#[test]
fn modules_use_only_lower_layers() {
    let bad = upward_edges(&root("src"));
    assert!(bad.is_empty(), "upward or sideways uses:\n{}", bad.join("\n"));
}

/// What `lib.rs` re-exports comes from the lowest layer, so that a path such as
/// `crate::Error` (which the check above does not follow) cannot hide an upward edge.
#[test]
fn the_crate_root_re_exports_only_from_the_lowest_layer() {
    let lib = std::fs::read_to_string(root("src/lib.rs")).unwrap();
    for line in lib.lines().filter(|l| l.trim_start().starts_with("pub use")) {
        let module = line.trim_start().trim_start_matches("pub use").trim_start();
        let module: String = module
            .chars()
            .take_while(|c| c.is_alphanumeric() || *c == '_')
            .collect();
        assert_eq!(layer(&module), Some(0), "lib.rs re-exports from {module}: {line}");
    }
}

#[test]
fn the_layer_check_sees_grouped_paths() {
    assert_eq!(
        named("use crate::{\n    data::Dataset,\n    fit::{self, x},\n};"),
        ["data", "fit"]
    );
    assert_eq!(named("use crate::{data, fit::{self, x}};"), ["data", "fit"]);
    assert_eq!(named("let s = crate::spec::load(p, f);"), ["spec"]);
    assert_eq!(named("crate::numerics::hex(a) + crate::rng::x"), ["numerics", "rng"]);
}
