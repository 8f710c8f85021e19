//! `paddock history`: the kept revisions of a shared store's routes,
//! features plan or limits.

use anyhow::Result;
use paddock_serve::shared::FileEntry;

use crate::Outcome;
use crate::common::text_table;
use crate::place::{SharedArgs, file_entry};

/// List the revisions a shared store keeps of its routes, features or
/// limits (the last 64), oldest first; `paddock restore` puts one back.
#[derive(clap::Args)]
pub struct Args {
    /// The entry: routes, features or limits.
    #[arg(value_parser = file_entry)]
    entry: FileEntry,
    #[command(flatten)]
    shared: SharedArgs,
}

/// Lists the revisions.
pub fn run(args: Args) -> Result<Outcome> {
    let (runtime, store) = args.shared.connect(false)?;
    let revisions = runtime.block_on(store.history(args.entry))?;
    let last = revisions.last().map(|r| r.revision);
    let rows: Vec<Vec<String>> = revisions
        .iter()
        .map(|r| {
            vec![
                r.revision.to_string(),
                r.at.clone(),
                match &r.text {
                    Some(t) => format!("{} lines", t.lines().count()),
                    None => "removed".into(),
                },
                if Some(r.revision) == last { "current".into() } else { String::new() },
            ]
        })
        .collect();
    if rows.is_empty() {
        outln!("{} has no {} yet", store.address(), args.entry)?;
    } else {
        out!("{}", text_table(&["revision", "written", "text", ""], &rows))?;
    }
    Ok(Outcome::Ok)
}
