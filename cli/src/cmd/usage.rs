//! `paddock usage`: the usage ledger a host wrote for a store — per model
//! version, calls, rows, errors by kind, limit hits, wall time and fuel;
//! per shadow, how its answers differed from the served ones.

use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_serve::registry::{STATE_DIR, SavedUsage, usage_path};

use crate::Outcome;
use crate::common::{print_json, text_table};

/// Show what each model version has cost, from the usage file a host wrote.
#[derive(clap::Args)]
pub struct Args {
    /// The store whose usage to show.
    #[arg(long, value_name = "DIR")]
    store: PathBuf,
    /// The host's state directory [default: STORE/.paddock].
    #[arg(long, value_name = "DIR")]
    state: Option<PathBuf>,
    /// Print the ledger as JSON.
    #[arg(long)]
    json: bool,
}

fn counts(map: &std::collections::BTreeMap<String, u64>) -> String {
    if map.is_empty() { "-".into() } else { map.iter().map(|(k, v)| format!("{k} {v}")).collect::<Vec<_>>().join(", ") }
}

/// Reads and prints the usage file.
pub fn run(args: Args) -> Result<Outcome> {
    let state = args.state.unwrap_or_else(|| args.store.join(STATE_DIR));
    let path = usage_path(&state);
    let text = std::fs::read(&path).with_context(|| {
        format!(
            "reading {} (`paddock serve`, `paddock stream` and `paddock work` write it while they serve the store)",
            path.display()
        )
    })?;
    let saved: SavedUsage =
        serde_json::from_slice(&text).with_context(|| format!("{} is not a usage file", path.display()))?;
    if args.json {
        print_json(&saved)?;
        return Ok(Outcome::Ok);
    }
    outln!("usage of {} by process {}, written {}\n", saved.store.display(), saved.pid, saved.written)?;
    let rows: Vec<Vec<String>> = saved
        .usage
        .versions
        .iter()
        .map(|v| {
            vec![
                v.model.clone(),
                v.version.to_string(),
                v.calls.to_string(),
                v.rows.to_string(),
                counts(&v.errors),
                counts(&v.limit_hits),
                format!("{:.1}", v.wall_us.p50),
                format!("{:.1}", v.wall_us.p90),
                format!("{:.1}", v.wall_us.p99),
                format!("{:.1}", v.wall_us.max),
                v.fuel.map_or("-".into(), |f| f.to_string()),
                format!("{} KiB", v.peak_memory_bytes >> 10),
            ]
        })
        .collect();
    let header = [
        "model",
        "version",
        "calls",
        "rows",
        "errors",
        "limit hits",
        "p50 µs",
        "p90 µs",
        "p99 µs",
        "max µs",
        "fuel",
        "peak memory",
    ];
    out!("{}", text_table(&header, &rows))?;
    if !saved.usage.shadows.is_empty() {
        let rows: Vec<Vec<String>> = saved
            .usage
            .shadows
            .iter()
            .map(|s| {
                vec![
                    s.model.clone(),
                    s.version.to_string(),
                    s.compared.to_string(),
                    format!("{:.3}", s.max_abs_diff),
                    s.over_tolerance.to_string(),
                    counts(&s.errors),
                    s.dropped.to_string(),
                ]
            })
            .collect();
        outln!("\nshadows:")?;
        out!(
            "{}",
            text_table(&["model", "shadow", "compared", "max |diff|", "over tolerance", "errors", "dropped"], &rows)
        )?;
    }
    Ok(Outcome::Ok)
}
