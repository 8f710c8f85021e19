//! `paddock vouch`: vouch for an artifact with a vouching key.

use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::{Artifact, Vouch, VouchingKey};

use crate::Outcome;
use crate::common::print_json;

/// Vouch for an artifact: sign its sha256 with a voucher's ed25519 key and
/// write ARTIFACT.vouch (or --out).
#[derive(clap::Args)]
pub struct Args {
    /// The artifact.
    artifact: PathBuf,
    /// The vouching key (`NAME.vouching-key`, from `paddock voucher`).
    #[arg(long = "as", value_name = "FILE")]
    key: PathBuf,
    /// Where to write the vouch [default: ARTIFACT.vouch].
    #[arg(long, short, value_name = "FILE")]
    out: Option<PathBuf>,
    /// Print the vouch as JSON on stdout too.
    #[arg(long)]
    json: bool,
}

/// Reads the artifact, vouches for its digest, writes the vouch.
pub fn run(args: Args) -> Result<Outcome> {
    let artifact = Artifact::read(&args.artifact, u64::MAX)?;
    let key = VouchingKey::read(&args.key)?;
    let vouch = key.vouch(artifact.digest());
    let out = args.out.unwrap_or_else(|| Vouch::path_for(&args.artifact));
    std::fs::write(&out, vouch.to_text()).with_context(|| format!("writing {}", out.display()))?;
    if args.json {
        print_json(&vouch)?;
    } else {
        let name = key.voucher().name().to_owned();
        outln!(
            "{name} (voucher {}) vouches for {} ({}): {}",
            vouch.voucher,
            args.artifact.display(),
            artifact.digest(),
            out.display()
        )?;
    }
    Ok(Outcome::Ok)
}
