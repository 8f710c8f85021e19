//! `paddock admit`: would a host with this trust policy admit the artifact?

use anyhow::Result;
use paddock_host::{Admission, Artifact};

use crate::Outcome;
use crate::common::{TrustArgs, print_json};

/// Check an artifact (and ARTIFACT.vouch, if present) against a trust
/// policy: `--trust DIR` of `.voucher` files and/or `--pin DIGEST`. Exits 1
/// when it would be refused.
#[derive(clap::Args)]
pub struct Args {
    /// The artifact (its vouch is read from ARTIFACT.vouch if present).
    artifact: std::path::PathBuf,
    /// Print the verdict as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    trust: TrustArgs,
}

/// Applies the policy and says on whose word the artifact gets in.
pub fn run(args: Args) -> Result<Outcome> {
    let artifact = Artifact::read(&args.artifact, u64::MAX)?;
    let verdict = args.trust.admit(&args.artifact, &artifact);
    let (ok, text) = match &verdict {
        Ok(Admission::Vouch { voucher, name }) => {
            (true, format!("admitted: vouched for by trusted voucher {name} ({voucher})"))
        }
        Ok(Admission::Pin) => (true, "admitted: its digest is pinned".to_owned()),
        Ok(Admission::OpenPolicy) => (true, "admitted: the policy requires nothing (give --trust or --pin)".to_owned()),
        Ok(other) => (true, format!("admitted: {other:?}")),
        Err(e) => (false, format!("refused: {}", crate::message(e))),
    };
    if args.json {
        print_json(&serde_json::json!({
            "artifact": args.artifact,
            "digest": artifact.digest(),
            "admitted": ok,
            "admission": verdict.as_ref().ok(),
            "error": verdict.as_ref().err().map(crate::message),
        }))?;
    } else {
        outln!("{} {}\n{text}", args.artifact.display(), artifact.digest())?;
    }
    Ok(if ok { Outcome::Ok } else { Outcome::Failed })
}
