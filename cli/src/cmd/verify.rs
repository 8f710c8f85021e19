//! `paddock verify`: would a host with this policy accept the artifact?

use anyhow::Result;
use paddock_host::{Artifact, Vouch};

use crate::Outcome;
use crate::common::{ArtifactArgs, print_json};

/// Check an artifact (and ARTIFACT.sig, if present) against a trust policy:
/// `--trust DIR` of public keys and/or `--pin DIGEST`. Exits 1 when refused.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    target: ArtifactArgs,
}

/// Applies the policy and reports who vouched.
pub fn run(args: Args) -> Result<Outcome> {
    let args = args.target;
    let artifact = Artifact::read(&args.artifact, u64::MAX)?;
    let verdict = args.load.vouch(&args.artifact, &artifact);
    let (ok, text) = match &verdict {
        Ok(Vouch::Signature { key_id }) => (true, format!("accepted: signed by trusted key {key_id}")),
        Ok(Vouch::Pin) => (true, "accepted: digest is pinned".to_owned()),
        Ok(Vouch::Nobody) => (true, "accepted: the policy requires nothing (give --trust or --pin)".to_owned()),
        Err(e) => (false, format!("refused: {e:#}")),
    };
    if args.json {
        print_json(&serde_json::json!({
            "artifact": args.artifact,
            "digest": artifact.digest(),
            "accepted": ok,
            "vouch": verdict.as_ref().ok(),
            "error": verdict.as_ref().err().map(|e| format!("{e:#}")),
        }))?;
    } else {
        println!("{} {}\n{text}", args.artifact.display(), artifact.digest());
    }
    Ok(if ok { Outcome::Ok } else { Outcome::Failed })
}
