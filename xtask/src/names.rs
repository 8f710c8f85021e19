//! One meaning per name: no two public types of the library crates share a
//! name (the glossary in DEVELOPERS.md gives each word one meaning, and a
//! reader should be able to guess a type's file from its name).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{Result, bail};

/// The public types (`pub struct|enum|trait|type NAME`) declared in every
/// `.rs` file under `src`, each with the file that declares it.
pub fn public_types(src: &Path) -> Result<Vec<(String, PathBuf)>> {
    let mut found = Vec::new();
    for (path, text) in crate::modules::rust_sources(src)? {
        found.extend(declared(&text).into_iter().map(|name| (name, path.clone())));
    }
    Ok(found)
}

/// The names a file's code declares as public types, tests left out.
fn declared(text: &str) -> Vec<String> {
    let code = text.split("#[cfg(test)]\nmod tests").next().unwrap_or(text);
    code.lines()
        .filter_map(|line| {
            let rest = line.trim_start().strip_prefix("pub ")?;
            let rest = ["struct ", "enum ", "trait ", "type "].iter().find_map(|k| rest.strip_prefix(k))?;
            let name: String = rest.chars().take_while(|c| c.is_alphanumeric() || *c == '_').collect();
            (!name.is_empty()).then_some(name)
        })
        .collect()
}

/// Fails naming every public type name declared more than once across `sources`.
pub fn check(root: &Path, sources: &[&str]) -> Result<()> {
    let mut by_name: BTreeMap<String, Vec<PathBuf>> = BTreeMap::new();
    for src in sources {
        for (name, file) in public_types(&root.join(src))? {
            by_name.entry(name).or_default().push(file.strip_prefix(root).unwrap_or(&file).to_owned());
        }
    }
    let shared: Vec<String> = by_name
        .iter()
        .filter(|(_, files)| files.len() > 1)
        .map(|(name, files)| {
            format!("{name} ({})", files.iter().map(|f| f.display().to_string()).collect::<Vec<_>>().join(", "))
        })
        .collect();
    if !shared.is_empty() {
        bail!("public types of the library crates share names: {}", shared.join("; "));
    }
    eprintln!("xtask: the {} public types of {} have names of their own", by_name.len(), sources.join(", "));
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn public_types_are_read_from_declarations_but_not_tests() {
        let text = "pub struct A;\n  pub enum B { X }\npub(crate) struct C;\npub fn d() {}\npub type E = u8;\n\
                    #[cfg(test)]\nmod tests { pub struct F; }\n";
        assert_eq!(declared(text), ["A", "B", "E"]);
    }
}
