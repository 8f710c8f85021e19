//! The module graph of a crate's sources: which top-level module uses which
//! (`crate::x` paths, including `use crate::{x, y::z}` groups), read from the
//! text with comments and `#[cfg(test)]` modules left out. `check` fails
//! when any two modules depend on each other, directly or through others,
//! naming the cycle.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};

/// Module → the modules it uses.
pub type Graph = BTreeMap<String, BTreeSet<String>>;

/// Every `.rs` file under `src`, with its text.
pub fn rust_sources(src: &Path) -> Result<Vec<(PathBuf, String)>> {
    let mut files = Vec::new();
    let mut stack = vec![src.to_owned()];
    while let Some(dir) = stack.pop() {
        for entry in std::fs::read_dir(&dir).with_context(|| format!("reading {}", dir.display()))? {
            let path = entry?.path();
            if path.is_dir() {
                stack.push(path);
            } else if path.extension().is_some_and(|e| e == "rs") {
                let text = std::fs::read_to_string(&path).with_context(|| format!("reading {}", path.display()))?;
                files.push((path, text));
            }
        }
    }
    Ok(files)
}

/// Reads every `.rs` file under `src` into a graph of top-level modules.
pub fn graph(src: &Path) -> Result<Graph> {
    let mut graph = Graph::new();
    for (path, text) in rust_sources(src)? {
        let rel = path.strip_prefix(src)?;
        let top = rel.components().next().map(|c| c.as_os_str().to_string_lossy().trim_end_matches(".rs").to_owned());
        let Some(top) = top.filter(|t| t != "lib" && t != "main") else { continue };
        let uses = graph.entry(top.clone()).or_default();
        uses.extend(used_modules(&text).into_iter().filter(|m| *m != top));
    }
    Ok(graph)
}

/// The top-level modules a file's code names through `crate::`.
pub fn used_modules(text: &str) -> BTreeSet<String> {
    let code = without_tests(&without_comments(text));
    let mut found = BTreeSet::new();
    let mut rest = code.as_str();
    while let Some(at) = rest.find("crate::") {
        rest = &rest[at + "crate::".len()..];
        if let Some(group) = rest.strip_prefix('{') {
            let end = matching_brace(group).unwrap_or(group.len());
            for item in split_top_level(&group[..end]) {
                let name: String = item.trim().chars().take_while(|c| c.is_alphanumeric() || *c == '_').collect();
                if !name.is_empty() && name != "self" {
                    found.insert(name);
                }
            }
        } else {
            let name: String = rest.chars().take_while(|c| c.is_alphanumeric() || *c == '_').collect();
            if !name.is_empty() && name.chars().next().is_some_and(|c| c.is_lowercase()) {
                found.insert(name);
            }
        }
    }
    found
}

fn without_comments(text: &str) -> String {
    text.lines().map(|l| l.split("//").next().unwrap_or("")).collect::<Vec<_>>().join("\n")
}

fn without_tests(text: &str) -> String {
    match text.find("#[cfg(test)]\nmod tests") {
        Some(at) => text[..at].to_owned(),
        None => text.to_owned(),
    }
}

fn matching_brace(text: &str) -> Option<usize> {
    let mut depth = 0usize;
    for (i, c) in text.char_indices() {
        match c {
            '{' => depth += 1,
            '}' if depth == 0 => return Some(i),
            '}' => depth -= 1,
            _ => {}
        }
    }
    None
}

fn split_top_level(text: &str) -> Vec<&str> {
    let (mut items, mut depth, mut start) = (Vec::new(), 0usize, 0);
    for (i, c) in text.char_indices() {
        match c {
            '{' => depth += 1,
            '}' => depth = depth.saturating_sub(1),
            ',' if depth == 0 => {
                items.push(&text[start..i]);
                start = i + 1;
            }
            _ => {}
        }
    }
    items.push(&text[start..]);
    items
}

/// A cycle through the graph, if there is one: `[a, b, …, a]`.
pub fn cycle(graph: &Graph) -> Option<Vec<String>> {
    // Depth-first search; a module met again while still on the path closes a cycle.
    fn visit(m: &str, graph: &Graph, path: &mut Vec<String>, done: &mut BTreeSet<String>) -> Option<Vec<String>> {
        if let Some(at) = path.iter().position(|p| p == m) {
            let mut cycle = path[at..].to_vec();
            cycle.push(m.to_owned());
            return Some(cycle);
        }
        if done.contains(m) {
            return None;
        }
        path.push(m.to_owned());
        for next in graph.get(m).into_iter().flatten() {
            if let Some(c) = visit(next, graph, path, done) {
                return Some(c);
            }
        }
        path.pop();
        done.insert(m.to_owned());
        None
    }
    let mut done = BTreeSet::new();
    graph.keys().find_map(|m| visit(m, graph, &mut Vec::new(), &mut done))
}

/// Fails naming a cycle among the modules under `src`.
pub fn check(src: &Path) -> Result<()> {
    let graph = graph(src)?;
    if let Some(c) = cycle(&graph) {
        bail!("{}: modules depend on each other in a circle: {}", src.display(), c.join(" → "));
    }
    eprintln!("xtask: no cycle among the {} modules of {}", graph.len(), src.display());
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn uses_are_read_from_paths_and_groups_but_not_comments_or_tests() {
        let text = "use crate::a::X;\nuse crate::{b, c::{D, E}, self};\n// crate::commented\nfn f() { crate::g::h(); }\n\
                    #[cfg(test)]\nmod tests { use crate::only_in_tests; }\n";
        let found: Vec<String> = used_modules(text).into_iter().collect();
        assert_eq!(found, ["a", "b", "c", "g"]);
    }

    #[test]
    fn a_cycle_is_found_and_named_and_a_tree_has_none() {
        let mut g = Graph::new();
        g.entry("artifact".into()).or_default().insert("checks".into());
        g.entry("checks".into()).or_default().insert("model".into());
        g.entry("model".into()).or_default().insert("rows".into());
        assert_eq!(cycle(&g), None);
        g.entry("model".into()).or_default().insert("artifact".into());
        assert_eq!(cycle(&g).unwrap(), ["artifact", "checks", "model", "artifact"]);
    }
}
