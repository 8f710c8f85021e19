//! `paddock sign`: vouch for an artifact with a secret key.

use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::{Artifact, SecretKey, Signature};

use crate::Outcome;
use crate::common::print_json;

/// Sign an artifact's sha256 with an ed25519 key; writes ARTIFACT.sig
/// (or --out).
#[derive(clap::Args)]
pub struct Args {
    /// The artifact.
    artifact: PathBuf,
    /// The secret key file (from `paddock keygen`).
    #[arg(long, value_name = "FILE")]
    key: PathBuf,
    /// Where to write the signature [default: ARTIFACT.sig].
    #[arg(long, short, value_name = "FILE")]
    out: Option<PathBuf>,
    /// Print the signature as JSON on stdout too.
    #[arg(long)]
    json: bool,
}

/// Reads the artifact, signs its digest, writes the signature.
pub fn run(args: Args) -> Result<Outcome> {
    let artifact = Artifact::read(&args.artifact, u64::MAX)?;
    let key = SecretKey::read(&args.key)?;
    let signature = key.sign(artifact.digest());
    let out = args.out.unwrap_or_else(|| Signature::path_for(&args.artifact));
    std::fs::write(&out, signature.to_json()).with_context(|| format!("writing {}", out.display()))?;
    if args.json {
        print_json(&signature)?;
    } else {
        println!("signed {} ({}) with key {}: {}", args.artifact.display(), artifact.digest(), signature.key_id, out.display());
    }
    Ok(Outcome::Ok)
}
