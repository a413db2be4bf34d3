//! The layers of `src/` point only down: a top-level module imports only the
//! modules listed before it in `LAYERS` (the order `src/lib.rs` documents),
//! and inside a module folder a file imports only sibling files, by their own
//! path, never the folder's `mod.rs`, with no circle among them.
//!
//! A reference is `crate::name` or `super::name` outside comments and outside
//! `#[cfg(test)]` code (tests may reach anywhere), the same rule as the
//! review's `layers.py`.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// Top-level modules from the bottom up.
const LAYERS: &[&str] = &[
    "text",
    "frame",
    "synth",
    "decode",
    "encode",
    "analysis",
    "naming",
    "pipeline",
    "store",
    "qc",
    "watch",
    "settings",
    "status",
    "export",
    "html_report",
    "daemon",
    "analyze",
    "reprocess",
    "demo",
];

/// The non-test code of a file with comments removed, one entry per line.
fn code_lines(path: &Path) -> Vec<String> {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let code = text.split("#[cfg(test)]").next().unwrap_or_default();
    code.lines()
        .map(|l| l.split("//").next().unwrap_or_default().to_string())
        .collect()
}

/// Every `prefix::name` on the lines (`name` an identifier).
fn references(lines: &[String], prefix: &str) -> Vec<(usize, String)> {
    let mut out = Vec::new();
    for (i, line) in lines.iter().enumerate() {
        let mut rest = line.as_str();
        while let Some(at) = rest.find(prefix) {
            let before = rest[..at].chars().last();
            rest = &rest[at + prefix.len()..];
            if before.is_some_and(|c| c.is_alphanumeric() || c == '_') {
                continue;
            }
            let name: String = rest
                .chars()
                .take_while(|c| c.is_alphanumeric() || *c == '_')
                .collect();
            if !name.is_empty() {
                out.push((i + 1, name));
            }
        }
    }
    out
}

fn rust_files(dir: &Path) -> Vec<PathBuf> {
    let mut files = Vec::new();
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            files.extend(rust_files(&path));
        } else if path.extension().is_some_and(|e| e == "rs") {
            files.push(path);
        }
    }
    files.sort();
    files
}

fn src() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("src")
}

#[test]
fn top_level_modules_import_only_modules_below_them() {
    let src = src();
    let mut problems = Vec::new();
    let mut seen = BTreeSet::new();
    for file in rust_files(&src) {
        let rel = file.strip_prefix(&src).unwrap();
        let top = rel
            .components()
            .next()
            .unwrap()
            .as_os_str()
            .to_string_lossy()
            .trim_end_matches(".rs")
            .to_string();
        if top == "main" || top == "lib" {
            continue;
        }
        seen.insert(top.clone());
        let Some(rank) = LAYERS.iter().position(|l| *l == top) else {
            problems.push(format!("{}: module {top} is not in LAYERS", rel.display()));
            continue;
        };
        for (line, name) in references(&code_lines(&file), "crate::") {
            match LAYERS.iter().position(|l| *l == name) {
                Some(r) if r < rank || name == top => {}
                Some(_) => problems.push(format!(
                    "{}:{line}: {top} imports {name}, which is not below it",
                    rel.display()
                )),
                None => problems.push(format!(
                    "{}:{line}: crate::{name} is not a listed module",
                    rel.display()
                )),
            }
        }
    }
    for layer in LAYERS {
        if !seen.contains(*layer) {
            problems.push(format!("LAYERS lists {layer}, which src/ does not have"));
        }
    }
    assert!(problems.is_empty(), "{}", problems.join("\n"));
}

#[test]
fn files_inside_a_module_import_only_siblings_and_no_circle() {
    let src = src();
    let mut problems = Vec::new();
    for entry in std::fs::read_dir(&src).unwrap() {
        let folder = entry.unwrap().path();
        if !folder.is_dir() {
            continue;
        }
        let module = folder.file_name().unwrap().to_string_lossy().to_string();
        let children: BTreeSet<String> = rust_files(&folder)
            .iter()
            .filter(|f| f.parent() == Some(folder.as_path()))
            .map(|f| f.file_stem().unwrap().to_string_lossy().to_string())
            .filter(|stem| stem != "mod")
            .collect();
        let mut edges: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
        for child in &children {
            let file = folder.join(format!("{child}.rs"));
            let lines = code_lines(&file);
            let own = format!("crate::{module}::");
            let refs = references(&lines, &own)
                .into_iter()
                .chain(references(&lines, "super::"));
            for (line, name) in refs {
                if children.contains(&name) {
                    if name != *child {
                        edges.entry(child.clone()).or_default().insert(name);
                    }
                } else {
                    problems.push(format!(
                        "src/{module}/{child}.rs:{line}: imports {name} from {module}'s mod.rs; import it from the file that defines it"
                    ));
                }
            }
        }
        // A circle among the files: depth-first search with colours.
        fn visit(
            n: &str,
            edges: &BTreeMap<String, BTreeSet<String>>,
            state: &mut BTreeMap<String, u8>,
            path: &mut Vec<String>,
        ) -> Option<Vec<String>> {
            match state.get(n) {
                Some(2) => return None,
                Some(1) => {
                    let start = path.iter().position(|p| p == n).unwrap_or(0);
                    let mut circle = path[start..].to_vec();
                    circle.push(n.to_string());
                    return Some(circle);
                }
                _ => {}
            }
            state.insert(n.to_string(), 1);
            path.push(n.to_string());
            for m in edges.get(n).into_iter().flatten() {
                if let Some(c) = visit(m, edges, state, path) {
                    return Some(c);
                }
            }
            path.pop();
            state.insert(n.to_string(), 2);
            None
        }
        let mut state = BTreeMap::new();
        for child in &children {
            if let Some(circle) = visit(child, &edges, &mut state, &mut Vec::new()) {
                problems.push(format!("circle in src/{module}: {}", circle.join(" -> ")));
                break;
            }
        }
    }
    assert!(problems.is_empty(), "{}", problems.join("\n"));
}

#[test]
fn the_checks_see_what_they_look_for() {
    // The reference finder itself, on literal lines: comments are not code,
    // and a longer identifier that merely ends in `crate` is not a path.
    let lines = vec![
        "use crate::analysis::Method; ".to_string(),
        "let x = mycrate::foo; ".to_string(),
        "super::params::X".to_string(),
    ];
    assert_eq!(
        references(&lines, "crate::"),
        vec![(1, "analysis".to_string())]
    );
    assert_eq!(
        references(&lines, "super::"),
        vec![(3, "params".to_string())]
    );
}
