//! Imports between the top-level modules run one way (source → engine → sinks, with
//! config and service on top): no module reaches, directly or through others, back into
//! itself.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

/// Top-level module → the other top-level modules its files name as `crate::X`.
fn imports() -> BTreeMap<String, BTreeSet<String>> {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut graph: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    let mut todo = vec![src.clone()];
    while let Some(dir) = todo.pop() {
        for entry in std::fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                todo.push(path);
                continue;
            }
            if path.extension().is_none_or(|e| e != "rs") {
                continue;
            }
            let rel = path.strip_prefix(&src).unwrap();
            let top =
                rel.components().next().unwrap().as_os_str().to_string_lossy().trim_end_matches(".rs").to_string();
            if top == "main" || top == "lib" || top == "cli" {
                continue; // the binary and the crate root use everything by design
            }
            let text = std::fs::read_to_string(&path).unwrap();
            let deps = graph.entry(top.clone()).or_default();
            for (i, _) in text.match_indices("crate::") {
                let name: String =
                    text[i + 7..].chars().take_while(|c| c.is_ascii_alphanumeric() || *c == '_').collect();
                if !name.is_empty() && name != top {
                    deps.insert(name);
                }
            }
        }
    }
    graph
}

/// A cycle through `node`, if there is one, as the path that closes it.
fn cycle_from(graph: &BTreeMap<String, BTreeSet<String>>, path: &mut Vec<String>) -> Option<Vec<String>> {
    let node = path.last().unwrap().clone();
    for next in graph.get(&node).into_iter().flatten() {
        if path.contains(next) {
            let mut c = path.clone();
            c.push(next.clone());
            return Some(c);
        }
        path.push(next.clone());
        if let Some(c) = cycle_from(graph, path) {
            return Some(c);
        }
        path.pop();
    }
    None
}

#[test]
fn top_level_modules_import_one_way() {
    let graph = imports();
    assert!(graph.contains_key("engine") && graph.contains_key("source"), "{graph:?}");
    for start in graph.keys() {
        if let Some(c) = cycle_from(&graph, &mut vec![start.clone()]) {
            panic!("import cycle: {}\nall imports: {graph:#?}", c.join(" → "));
        }
    }
    // The engine stands alone: frame in, report out.
    let engine = &graph["engine"];
    assert!(engine.iter().all(|m| m == "bundle"), "engine imports {engine:?}");
}

#[test]
fn the_cycle_check_finds_a_cycle() {
    let mut g: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    g.entry("a".into()).or_default().insert("b".into());
    g.entry("b".into()).or_default().insert("c".into());
    g.entry("c".into()).or_default().insert("a".into());
    assert_eq!(
        cycle_from(&g, &mut vec!["a".into()]),
        Some(vec!["a", "b", "c", "a"].into_iter().map(String::from).collect())
    );
    g.get_mut("c").unwrap().clear();
    assert_eq!(cycle_from(&g, &mut vec!["a".into()]), None);
}
