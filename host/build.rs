//! Reads the wasmtime version this build resolved from the nearest
//! Cargo.lock, so the audit report names the engine actually linked.

use std::path::{Path, PathBuf};

fn main() {
    let manifest = PathBuf::from(std::env::var_os("CARGO_MANIFEST_DIR").expect("cargo sets CARGO_MANIFEST_DIR"));
    let version = match find_lock(&manifest) {
        Some(lock) => {
            println!("cargo::rerun-if-changed={}", lock.display());
            match std::fs::read_to_string(&lock).ok().and_then(|text| locked_version(&text, "wasmtime")) {
                Some(v) => v,
                None => {
                    println!("cargo::warning={} names no single wasmtime version", lock.display());
                    "unknown".to_owned()
                }
            }
        }
        None => {
            println!(
                "cargo::warning=no Cargo.lock above {}: the wasmtime version is reported as unknown",
                manifest.display()
            );
            "unknown".to_owned()
        }
    };
    println!("cargo::rustc-env=PADDOCK_WASMTIME_VERSION={version}");
}

fn find_lock(start: &Path) -> Option<PathBuf> {
    start.ancestors().map(|dir| dir.join("Cargo.lock")).find(|p| p.is_file())
}

/// The version of the one package called `name` in a Cargo.lock, or `None`
/// when there is none or more than one.
fn locked_version(lock: &str, name: &str) -> Option<String> {
    let mut found = Vec::new();
    let mut current: Option<&str> = None;
    for line in lock.lines() {
        let line = line.trim();
        if line == "[[package]]" {
            current = None;
        } else if let Some(n) = line.strip_prefix("name = ") {
            current = Some(n.trim_matches('"'));
        } else if let Some(v) = line.strip_prefix("version = ")
            && current == Some(name)
        {
            found.push(v.trim_matches('"').to_owned());
        }
    }
    if found.len() == 1 { found.pop() } else { None }
}
