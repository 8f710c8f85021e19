//! `paddock publish`: put a version into a shared store, after the gate
//! every host runs.

use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::{Admission, Vouch};
use paddock_serve::RegistryOptions;

use crate::Outcome;
use crate::common::LoadArgs;
use crate::place::SharedArgs;

/// Publish a version to a shared store: check it as a host would (trust
/// policy, load, contract, its own checks), then put the artifact and its
/// vouch (ARTIFACT.vouch, if present) where every host takes it. A version
/// is immutable: other bytes under a published version are refused.
#[derive(clap::Args)]
pub struct Args {
    /// The artifact.
    artifact: PathBuf,
    #[command(flatten)]
    shared: SharedArgs,
    /// Refuse an artifact that carries no checks.
    #[arg(long)]
    require_checks: bool,
    #[command(flatten)]
    load: LoadArgs,
}

/// Checks the artifact and publishes it.
pub fn run(args: Args) -> Result<Outcome> {
    let bytes = std::fs::read(&args.artifact).with_context(|| format!("reading {}", args.artifact.display()))?;
    let vouch_path = Vouch::path_for(&args.artifact);
    let vouch = match std::fs::read_to_string(&vouch_path) {
        Ok(text) => Some(text),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => None,
        Err(e) => return Err(e).with_context(|| format!("reading {}", vouch_path.display())),
    };
    let options = RegistryOptions {
        model: args.load.options(),
        trust: args.load.trust.policy()?,
        size_cap: args.load.size_cap(),
        require_checks: args.require_checks,
        ..RegistryOptions::default()
    };
    let wasmtime = args.load.runtime()?;
    let (runtime, store) = args.shared.connect(true)?;
    let by = format!("{}@{}", std::env::var("USER").unwrap_or_else(|_| "someone".into()), host_name());
    let published = runtime.block_on(store.publish(&wasmtime, bytes, vouch, &options, &by))?;
    let p = &published.passed;
    let checks =
        p.checks.as_ref().map_or("no checks carried".to_owned(), |r| format!("checks {}/{} passed", r.passed, r.cases));
    if published.already {
        outln!(
            "{} {} ({}) was already published in {}: nothing changed",
            p.model,
            p.version,
            p.digest,
            store.address()
        )?;
    } else {
        outln!(
            "published {} {} ({}; {checks}; {}) to {} at revision {}",
            p.model,
            p.version,
            p.digest,
            match &p.admission {
                Admission::Vouch { name, .. } => format!("vouched for by {name}"),
                Admission::Pin => "pinned".to_owned(),
                Admission::OpenPolicy => "no vouch asked for".to_owned(),
                _ => "admitted".to_owned(),
            },
            store.address(),
            published.revision
        )?;
    }
    Ok(Outcome::Ok)
}

fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname").map(|h| h.trim().to_owned()).unwrap_or_default()
}
