//! `paddock inspect`: what an artifact is, carries, and promises.

use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::artifact::{Inventory, inspect_bytes};
use paddock_host::{Artifact, Bins, Digest, Profile};
use paddock_import::Origin;
use paddock_serve::surface::openapi::ContractDoc;
use serde::Serialize;

use crate::Outcome;
use crate::common::{ArtifactArgs, contract_text, print_json};

/// Show an artifact's digest, size, sections, imports, exports and (when it
/// loads) its contract.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    target: ArtifactArgs,
}

#[derive(Serialize)]
struct Report {
    path: PathBuf,
    digest: Digest,
    bytes: usize,
    #[serde(flatten)]
    inventory: Inventory,
    /// Spelt as manifests spell it (`{"real": …}`), as `GET /contract` answers.
    contract: Option<ContractDoc>,
    /// Where an imported model came from (`None` for one packed from WebAssembly).
    origin: Option<Origin>,
    /// The training profile it carries, if any.
    profile: Option<Profile>,
    load_error: Option<String>,
}

/// Reads the file, tries to load it, prints what it found.
pub fn run(args: Args) -> Result<Outcome> {
    let args = args.target;
    let bytes = std::fs::read(&args.artifact).with_context(|| format!("reading {}", args.artifact.display()))?;
    let inventory = inspect_bytes(&bytes).with_context(|| format!("in {}", args.artifact.display()))?;
    let artifact =
        Artifact::from_bytes(bytes.clone(), u64::MAX).with_context(|| format!("in {}", args.artifact.display()))?;
    let profile = artifact.profile().with_context(|| format!("in {}", args.artifact.display()))?;
    let origin = artifact
        .origin()
        .with_context(|| format!("in {}", args.artifact.display()))?
        .map(Origin::from_map)
        .transpose()
        .with_context(|| format!("in {}: the origin section is not an importer's record", args.artifact.display()))?;
    let (contract, load_error) = match args.load.load(&args.artifact) {
        Ok((_, model)) => (Some(model.contract().clone()), None),
        Err(e) => (None, Some(crate::message(&e))),
    };
    let report = Report {
        path: args.artifact,
        digest: Digest::of(&bytes),
        bytes: bytes.len(),
        inventory,
        contract: contract.as_ref().map(ContractDoc::from),
        origin,
        profile,
        load_error,
    };
    if args.json {
        print_json(&report)?;
        return Ok(if report.load_error.is_some() { Outcome::Failed } else { Outcome::Ok });
    }
    outln!("{}", report.path.display())?;
    outln!("  digest   {}", report.digest)?;
    outln!("  size     {} bytes, WebAssembly {}", report.bytes, report.inventory.encoding)?;
    let none = |v: &[String]| if v.is_empty() { "none".to_owned() } else { v.join(", ") };
    outln!("  imports  {}", none(&report.inventory.imports))?;
    outln!("  exports  {}", none(&report.inventory.exports))?;
    if !report.inventory.type_names.is_empty() {
        outln!("  types    {} (type definitions, not capabilities)", report.inventory.type_names.join(", "))?;
    }
    for s in &report.inventory.sections {
        outln!("  section  {} ({} bytes)", s.name, s.bytes)?;
    }
    if let Some(err) = &report.load_error {
        outln!("\ndoes not load: {err}")?;
        return Ok(Outcome::Failed);
    }
    if let Some(c) = &contract {
        out!("\n{}", contract_text(c))?;
    }
    if let Some(o) = &report.origin {
        outln!("\nimported from {} ({}, {})", o.file, o.format, o.estimator)?;
        outln!("  toolkit     {}", o.toolkit)?;
        outln!("  task        {}", o.task)?;
        outln!("  arithmetic  {}", o.arithmetic)?;
        outln!("  contract, part by part:")?;
        let width = o.contract.iter().map(|s| s.part.chars().count()).max().unwrap_or(0);
        for s in &o.contract {
            outln!("    {:width$}  {}", s.part, s.from)?;
        }
    }
    if let Some(p) = &report.profile {
        print_profile(p)?;
    }
    Ok(Outcome::Ok)
}

/// A number to four significant digits.
fn short(v: f64) -> String {
    if v == 0.0 || !v.is_finite() {
        return v.to_string();
    }
    let digits = 3 - v.abs().log10().floor() as i32;
    if (0..=8).contains(&digits) { format!("{v:.0$}", digits as usize) } else { format!("{v:.3e}") }
}

/// The training profile, a line per field: its bins, missing share and summary.
fn print_profile(p: &Profile) -> Result<()> {
    outln!(
        "
training profile: {} rows ({})",
        p.rows,
        p.source
    )?;
    let width = p.features.keys().chain(p.outputs.keys()).map(|n| n.chars().count()).max().unwrap_or(0);
    for (kind, fields) in [("feature", &p.features), ("output", &p.outputs)] {
        for (name, f) in fields {
            let bins = match &f.bins {
                Bins::Edges(e) => format!("{} bins", e.len() + 1),
                Bins::Labels(l) => format!("{} labels", l.len()),
            };
            let summary = f.summary.map_or(String::new(), |s| {
                format!(", {} to {}, mean {} sd {}", short(s.min), short(s.max), short(s.mean), short(s.sd))
            });
            outln!("  {kind:7} {name:width$}  {bins}, {:.1} % missing{summary}", f.missing_share() * 100.0)?;
        }
    }
    Ok(())
}
