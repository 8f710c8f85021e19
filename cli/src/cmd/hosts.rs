//! `paddock hosts`: every host serving a shared store, what each serves,
//! and which are behind, refused something or went silent.

use anyhow::Result;

use crate::Outcome;
use crate::common::text_table;
use crate::place::SharedArgs;

/// List the hosts serving a shared store: the store revision and
/// generation each serves, its versions, and flags for a host behind the
/// store's latest revision, one that refused an artifact or could not take
/// an entry, one whose mirror is stale, and one that stopped reporting.
/// Exit 1 when any host is flagged.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    shared: SharedArgs,
    /// Print the hosts as JSON.
    #[arg(long)]
    json: bool,
}

/// `model v1 v2; other v1`.
fn serving(served: &[paddock_serve::shared::presence::Served]) -> String {
    let mut by: std::collections::BTreeMap<&str, Vec<&str>> = std::collections::BTreeMap::new();
    for s in served {
        by.entry(s.model.as_str()).or_default().push(s.version.as_str());
    }
    by.iter().map(|(m, vs)| format!("{m} {}", vs.join(" "))).collect::<Vec<_>>().join("; ")
}

/// Lists the hosts.
pub fn run(args: Args) -> Result<Outcome> {
    let (runtime, store) = args.shared.connect(false)?;
    let (latest, hosts) = runtime.block_on(store.hosts())?;
    let flagged = hosts.iter().any(|h| !h.flags.is_empty());
    if args.json {
        let list: Vec<serde_json::Value> =
            hosts.iter().map(|h| serde_json::json!({"presence": h.presence, "flags": h.flags})).collect();
        crate::common::print_json(&serde_json::json!({"latest": latest, "hosts": list}))?;
    } else {
        let rows: Vec<Vec<String>> = hosts
            .iter()
            .map(|h| {
                let p = &h.presence;
                vec![
                    p.host.clone(),
                    format!("{}/{latest}", p.revision),
                    p.generation.to_string(),
                    serving(&p.serving),
                    if h.flags.is_empty() { "ok".into() } else { h.flags.join("; ") },
                ]
            })
            .collect();
        outln!("{}: latest revision {latest}, {} hosts", store.address(), hosts.len())?;
        out!("{}", text_table(&["host", "revision", "generation", "serving", "state"], &rows))?;
    }
    Ok(if flagged { Outcome::Failed } else { Outcome::Ok })
}
