//! The module graph: imports only point down.
//!
//! Reads every file under `src/`, collects the `crate::...` paths it names (in `use` lines
//! and in code), and checks that no module imports one that imports it back, directly or
//! through others. Two levels are checked: the crate's top-level modules (a folder such as
//! `sim/` counts as one), and, inside each folder, its files against each other (`mod.rs`
//! is the folder's own face and may use its children; `super::name::...` in a child names a
//! sibling).

use std::collections::{BTreeMap, BTreeSet};
use std::fs;
use std::path::Path;

/// Source text with comments and string literals blanked, so a path mentioned in prose
/// or in a message is not taken for an import.
fn code_only(text: &str) -> String {
    let bytes = text.as_bytes();
    let mut out = String::with_capacity(text.len());
    let mut i = 0;
    while i < bytes.len() {
        let rest = &text[i..];
        if rest.starts_with("//") {
            let end = rest.find('\n').map_or(text.len(), |n| i + n);
            i = end;
        } else if let Some(raw) = rest.strip_prefix("r#\"") {
            let end = raw.find("\"#").map_or(text.len(), |n| i + 3 + n + 2);
            out.push(' ');
            i = end;
        } else if bytes[i] == b'"' {
            let mut j = i + 1;
            while j < bytes.len() && bytes[j] != b'"' {
                j += if bytes[j] == b'\\' { 2 } else { 1 };
            }
            out.push(' ');
            i = j + 1;
        } else if rest.starts_with("'\"'") {
            i += 3;
        } else {
            let c = rest.chars().next().expect("not at the end");
            out.push(c);
            i += c.len_utf8();
        }
    }
    out
}

fn ident_at(s: &str) -> String {
    s.chars().take_while(|c| c.is_ascii_alphanumeric() || *c == '_').collect()
}

/// The first path segments named after `prefix` (`crate::` or `super::`), including the
/// braced form `prefix{a::x, b}`.
fn named_after(code: &str, prefix: &str) -> BTreeSet<String> {
    let mut names = BTreeSet::new();
    let mut from = 0;
    while let Some(at) = code[from..].find(prefix) {
        let start = from + at + prefix.len();
        from = start;
        let before = code[..from - prefix.len()].chars().next_back();
        if before.is_some_and(|c| c.is_ascii_alphanumeric() || c == '_') {
            continue;
        }
        let rest = &code[start..];
        if let Some(inner) = rest.strip_prefix('{') {
            // Top-level items of the brace list.
            let mut depth = 0;
            let mut item_start = true;
            for (k, c) in inner.char_indices() {
                match c {
                    '{' => depth += 1,
                    '}' if depth == 0 => break,
                    '}' => depth -= 1,
                    ',' if depth == 0 => item_start = true,
                    c if c.is_whitespace() => {}
                    _ if item_start && depth == 0 => {
                        item_start = false;
                        let name = ident_at(&inner[k..]);
                        if !name.is_empty() {
                            names.insert(name);
                        }
                    }
                    _ => {}
                }
            }
        } else {
            let name = ident_at(rest);
            if !name.is_empty() {
                names.insert(name);
            }
        }
    }
    names
}

/// `(module, file stem inside it or "" for a top-level file or mod.rs, code)`.
fn sources() -> Vec<(String, String, String)> {
    fn visit(dir: &Path, top: Option<&str>, out: &mut Vec<(String, String, String)>) {
        let mut entries: Vec<_> =
            fs::read_dir(dir).expect("src is readable").map(|e| e.expect("entry").path()).collect();
        entries.sort();
        for path in entries {
            let stem = path.file_stem().and_then(|s| s.to_str()).expect("a file name").to_string();
            if path.is_dir() {
                visit(&path, Some(top.unwrap_or(&stem)), out);
            } else if path.extension().is_some_and(|e| e == "rs") {
                let code = code_only(&fs::read_to_string(&path).expect("readable source"));
                match top {
                    None => out.push((stem, String::new(), code)),
                    Some(t) => {
                        let child = if stem == "mod" { String::new() } else { stem };
                        out.push((t.to_string(), child, code));
                    }
                }
            }
        }
    }
    let mut out = Vec::new();
    visit(Path::new("src"), None, &mut out);
    out
}

/// A cycle in the graph, as the list of its nodes, if there is one.
fn find_cycle(graph: &BTreeMap<String, BTreeSet<String>>) -> Option<Vec<String>> {
    fn dfs(
        node: &str,
        graph: &BTreeMap<String, BTreeSet<String>>,
        state: &mut BTreeMap<String, u8>,
        stack: &mut Vec<String>,
    ) -> Option<Vec<String>> {
        state.insert(node.to_string(), 1);
        stack.push(node.to_string());
        for next in graph.get(node).into_iter().flatten() {
            match state.get(next.as_str()).copied().unwrap_or(0) {
                1 => {
                    let from = stack.iter().position(|n| n == next).expect("on the stack");
                    let mut cycle = stack[from..].to_vec();
                    cycle.push(next.clone());
                    return Some(cycle);
                }
                0 => {
                    if let Some(c) = dfs(next, graph, state, stack) {
                        return Some(c);
                    }
                }
                _ => {}
            }
        }
        stack.pop();
        state.insert(node.to_string(), 2);
        None
    }
    let mut state = BTreeMap::new();
    for node in graph.keys() {
        if state.get(node.as_str()).copied().unwrap_or(0) == 0 {
            let mut stack = Vec::new();
            if let Some(c) = dfs(node, graph, &mut state, &mut stack) {
                return Some(c);
            }
        }
    }
    None
}

#[test]
fn the_scanner_reads_plain_and_braced_imports_and_skips_prose() {
    let code = code_only(
        "use crate::{a::X, b, c::{d, e}};\nuse crate::f;\n// crate::g in a comment\nlet s = \"crate::h\";\nlet t = pathfold_crate::i;",
    );
    let names: Vec<String> = named_after(&code, "crate::").into_iter().collect();
    assert_eq!(names, ["a", "b", "c", "f"]);
}

#[test]
fn the_cycle_finder_finds_a_cycle_through_a_third_module() {
    let mut g: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    g.entry("a".into()).or_default().insert("b".into());
    g.entry("b".into()).or_default().insert("c".into());
    assert_eq!(find_cycle(&g), None);
    g.entry("c".into()).or_default().insert("a".into());
    assert_eq!(find_cycle(&g).map(|c| c.len()), Some(4));
}

#[test]
fn top_level_modules_import_only_downwards() {
    let mut graph: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for (module, _, code) in sources() {
        let node = graph.entry(module.clone()).or_default();
        for name in named_after(&code, "crate::") {
            if name != module {
                node.insert(name);
            }
        }
    }
    assert!(graph.len() > 8, "the scan found the modules: {:?}", graph.keys());
    if let Some(cycle) = find_cycle(&graph) {
        panic!("modules import each other in a circle: {}", cycle.join(" → "));
    }
}

#[test]
fn files_inside_a_folder_import_only_downwards() {
    let mut folders: BTreeMap<String, BTreeMap<String, BTreeSet<String>>> = BTreeMap::new();
    for (module, child, code) in sources() {
        if child.is_empty() {
            continue;
        }
        let graph = folders.entry(module.clone()).or_default();
        let mut names = named_after(&code, "super::");
        // `crate::folder::sibling` names a sibling too.
        let own = format!("crate::{module}::");
        names.extend(named_after(&code, &own));
        let node = graph.entry(child.clone()).or_default();
        for name in names {
            if name != child {
                node.insert(name);
            }
        }
    }
    for (folder, mut graph) in folders {
        // Names that are not files of the folder are items of its mod.rs: not a sibling.
        let files: BTreeSet<String> = graph.keys().cloned().collect();
        for deps in graph.values_mut() {
            deps.retain(|d| files.contains(d));
        }
        if let Some(cycle) = find_cycle(&graph) {
            panic!("files of src/{folder}/ import each other in a circle: {}", cycle.join(" → "));
        }
    }
}
