//! `paddock show`: a shared store's routes, features plan or limits, as a
//! file to edit and give back to `paddock revise`.

use anyhow::Result;
use paddock_serve::shared::FileEntry;

use crate::Outcome;
use crate::place::{SharedArgs, file_entry};

/// Print a shared store's routes, features or limits, after a
/// `# revision N` line that `paddock revise` reads back: a change made to
/// this text is based on this revision.
#[derive(clap::Args)]
pub struct Args {
    /// The entry: routes, features or limits.
    #[arg(value_parser = file_entry)]
    entry: FileEntry,
    /// An earlier revision [default: the current one].
    #[arg(long, value_name = "REVISION")]
    revision: Option<u64>,
    #[command(flatten)]
    shared: SharedArgs,
}

/// Prints the entry.
pub fn run(args: Args) -> Result<Outcome> {
    let (runtime, store) = args.shared.connect(false)?;
    let found = match args.revision {
        None => runtime.block_on(store.file(args.entry))?,
        Some(r) => runtime
            .block_on(store.history(args.entry))?
            .into_iter()
            .find(|rev| rev.revision == r)
            .and_then(|rev| Some((rev.revision, rev.text?))),
    };
    let Some((revision, text)) = found else {
        anyhow::bail!(match args.revision {
            Some(revision) =>
                paddock_serve::shared::SharedError::NoRevision { entry: args.entry, revision }.to_string(),
            None => format!("{} has no {} yet", store.address(), args.entry),
        });
    };
    out!("# revision {revision}\n{text}")?;
    Ok(Outcome::Ok)
}
