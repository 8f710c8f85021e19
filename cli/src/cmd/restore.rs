//! `paddock restore`: put an earlier revision of a shared store's routes,
//! features plan or limits back.

use anyhow::Result;
use paddock_serve::shared::FileEntry;

use crate::Outcome;
use crate::place::{SharedArgs, file_entry};

/// Put an earlier revision of a shared store's routes, features or limits
/// back, as a new revision (checked as any change is). Written only if the
/// entry is still at --based-on, when given.
#[derive(clap::Args)]
pub struct Args {
    /// The entry: routes, features or limits.
    #[arg(value_parser = file_entry)]
    entry: FileEntry,
    /// The revision to put back (`paddock history` lists them).
    revision: u64,
    /// The revision the entry must be at [default: whichever it is at].
    #[arg(long, value_name = "REVISION")]
    based_on: Option<u64>,
    #[command(flatten)]
    shared: SharedArgs,
}

/// Restores the revision.
pub fn run(args: Args) -> Result<Outcome> {
    let (runtime, store) = args.shared.connect(false)?;
    let now = runtime.block_on(store.restore(args.entry, args.revision, args.based_on))?;
    outln!("{} of {} is revision {}'s text again, at revision {now}", args.entry, store.address(), args.revision)?;
    Ok(Outcome::Ok)
}
