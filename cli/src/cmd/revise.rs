//! `paddock revise`: change a shared store's routes, features plan or
//! limits, on top of the revision the change was based on.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use paddock_serve::features::Plan;
use paddock_serve::shared::FileEntry;
use paddock_serve::shared::publish::revision_in;

use crate::Outcome;
use crate::place::{SharedArgs, file_entry};

/// Change a shared store's routes, features or limits. The change is
/// written only if the entry is still at the revision it was based on (the
/// `# revision N` line `paddock show` starts a file with, or --based-on): of
/// two people changing it at once, the second is refused and told both
/// revisions. A features plan's tables are published with it.
#[derive(clap::Args)]
pub struct Args {
    /// The entry: routes, features or limits.
    #[arg(value_parser = file_entry)]
    entry: FileEntry,
    /// The file holding its new text.
    file: PathBuf,
    /// The revision this change is based on [default: the file's `# revision N` line; none: a new entry].
    #[arg(long, value_name = "REVISION")]
    based_on: Option<u64>,
    #[command(flatten)]
    shared: SharedArgs,
}

/// Checks and writes the change.
pub fn run(args: Args) -> Result<Outcome> {
    let text = std::fs::read_to_string(&args.file).with_context(|| format!("reading {}", args.file.display()))?;
    let based_on = args.based_on.or_else(|| revision_in(&text));
    // The `# revision N` line says what the change is based on; it is not
    // part of the text.
    let text = match revision_in(&text) {
        Some(_) => text.split_once('\n').map_or(String::new(), |(_, rest)| rest.to_owned()),
        None => text,
    };
    let (runtime, store) = args.shared.connect(true)?;
    if based_on.is_none()
        && let Some((current, _)) = runtime.block_on(store.file(args.entry))?
    {
        anyhow::bail!(paddock_serve::shared::SharedError::NoBase { entry: args.entry, current });
    }
    if args.entry == FileEntry::Features {
        publish_tables(&runtime, &store, &text, args.file.parent().unwrap_or(Path::new(".")))?;
    }
    let revision = runtime.block_on(store.put_file(args.entry, &text, based_on))?;
    outln!("{} of {} is at revision {revision}", args.entry, store.address())?;
    Ok(Outcome::Ok)
}

/// Publishes every table the plan names, read relative to the plan's file.
fn publish_tables(
    runtime: &tokio::runtime::Runtime,
    store: &paddock_serve::shared::SharedStore,
    text: &str,
    dir: &Path,
) -> Result<()> {
    let plan = Plan::parse(text, "features", Path::new("")).map_err(|e| anyhow::anyhow!("{e}"))?;
    for table in plan.table_paths() {
        let name = table.to_string_lossy();
        let bytes = std::fs::read(dir.join(table)).with_context(|| format!("reading the table {name}"))?;
        runtime.block_on(store.put_table(&name, bytes))?;
        outln!("table {name} published")?;
    }
    Ok(())
}
