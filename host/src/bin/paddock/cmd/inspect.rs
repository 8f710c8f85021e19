//! `paddock inspect`: what an artifact is, carries, and promises.

use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::artifact::{Surface, inspect_bytes};
use paddock_host::{Contract, Digest};
use serde::Serialize;

use crate::Outcome;
use crate::common::{LoadArgs, print_json, table};

/// Show an artifact's digest, size, sections, imports, exports and (when it
/// loads) its contract.
#[derive(clap::Args)]
pub struct Args {
    /// The artifact (or any WebAssembly file).
    artifact: PathBuf,
    /// Print as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    limits: LoadArgs,
}

#[derive(Serialize)]
struct Report {
    path: PathBuf,
    digest: Digest,
    bytes: usize,
    #[serde(flatten)]
    surface: Surface,
    contract: Option<Contract>,
    load_error: Option<String>,
}

/// Reads the file, tries to load it, prints what it found.
pub fn run(args: Args) -> Result<Outcome> {
    let bytes = std::fs::read(&args.artifact).with_context(|| format!("reading {}", args.artifact.display()))?;
    let surface = inspect_bytes(&bytes).with_context(|| format!("in {}", args.artifact.display()))?;
    let (contract, load_error) = match args.limits.load(&args.artifact) {
        Ok((_, model)) => (Some(model.contract().clone()), None),
        Err(e) => (None, Some(format!("{e:#}"))),
    };
    let report = Report { path: args.artifact, digest: Digest::of(&bytes), bytes: bytes.len(), surface, contract, load_error };
    if args.json {
        print_json(&report)?;
        return Ok(if report.load_error.is_some() { Outcome::Failed } else { Outcome::Ok });
    }
    println!("{}", report.path.display());
    println!("  digest   {}", report.digest);
    println!("  size     {} bytes, WebAssembly {}", report.bytes, report.surface.encoding);
    let none = |v: &[String]| if v.is_empty() { "none".to_owned() } else { v.join(", ") };
    println!("  imports  {}", none(&report.surface.imports));
    println!("  exports  {}", none(&report.surface.exports));
    if !report.surface.type_names.is_empty() {
        println!("  types    {} (type definitions, not capabilities)", report.surface.type_names.join(", "));
    }
    for s in &report.surface.sections {
        println!("  section  {} ({} bytes)", s.name, s.bytes);
    }
    if let Some(err) = &report.load_error {
        println!("\ndoes not load: {err}");
        return Ok(Outcome::Failed);
    }
    if let Some(c) = &report.contract {
        println!("\n{} {}", c.name, c.version);
        if !c.about.is_empty() {
            println!("{}", c.about);
        }
        let opt = |u: &Option<String>| u.clone().unwrap_or_default();
        let features: Vec<Vec<String>> = c
            .features
            .iter()
            .enumerate()
            .map(|(i, f)| {
                let req = if f.required { "yes" } else { "no" };
                vec![i.to_string(), f.name.clone(), f.domain.to_string(), opt(&f.unit), req.into(), f.about.clone()]
            })
            .collect();
        println!("\nfeatures\n{}", table(&["#", "name", "domain", "unit", "required", "about"], &features));
        let outputs: Vec<Vec<String>> = c
            .outputs
            .iter()
            .enumerate()
            .map(|(i, o)| vec![i.to_string(), o.name.clone(), o.bounds.to_string(), opt(&o.unit), o.about.clone()])
            .collect();
        println!("outputs\n{}", table(&["#", "name", "bounds", "unit", "about"], &outputs));
    }
    Ok(Outcome::Ok)
}
