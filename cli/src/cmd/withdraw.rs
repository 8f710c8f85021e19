//! `paddock withdraw`: take a version out of a shared store.

use anyhow::Result;
use paddock_serve::Version;

use crate::Outcome;
use crate::place::SharedArgs;

/// Withdraw a version from a shared store: every host stops serving it.
/// Refused while a route uses it.
#[derive(clap::Args)]
pub struct Args {
    /// The model.
    model: String,
    /// The version.
    version: Version,
    #[command(flatten)]
    shared: SharedArgs,
}

/// Withdraws the version.
pub fn run(args: Args) -> Result<Outcome> {
    let (runtime, store) = args.shared.connect(false)?;
    let revision = runtime.block_on(store.withdraw(&args.model, &args.version))?;
    outln!("withdrew {} {} from {} (store revision {revision})", args.model, args.version, store.address())?;
    Ok(Outcome::Ok)
}
