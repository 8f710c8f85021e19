//! `paddock drift`: ask a running host (`paddock serve`, or a worker's
//! metrics address) how the values it has scored compare with each served
//! version's training profile, and draw it: per field the stability index,
//! its level and notes, and the training against the live shares as bars.

use std::time::Duration;

use anyhow::{Context, Result, bail};
use paddock_host::{DriftLevel, DriftReport};
use serde::Deserialize;

use crate::Outcome;

/// Show a running host's drift: per served version and profiled field, the
/// stability index of the live values against the training profile, its
/// level, notes (missing values, labels never seen, features plan
/// fallbacks) and bars. Exit 1 when any field has reached `act`.
#[derive(clap::Args)]
pub struct Args {
    /// The host's address: `paddock serve`'s, or a worker's `--metrics` address.
    host: String,
    /// Only this model.
    #[arg(long)]
    model: Option<String>,
    /// Print the reports as JSON.
    #[arg(long)]
    json: bool,
}

/// The part of a host's `GET /store` this command reads.
#[derive(Deserialize)]
struct Store {
    artifacts: Vec<Served>,
}

#[derive(Deserialize)]
struct Served {
    model: Option<String>,
    version: Option<String>,
    state: String,
    drift: Option<DriftReport>,
}

/// Fetches the host's status and prints its drift.
pub fn run(args: Args) -> Result<Outcome> {
    let base = args.host.trim_end_matches('/');
    let base = if base.contains("://") { base.to_owned() } else { format!("http://{base}") };
    let url = format!("{base}/store");
    let agent: ureq::Agent =
        ureq::Agent::config_builder().timeout_global(Some(Duration::from_secs(30))).build().new_agent();
    let text = agent
        .get(&url)
        .call()
        .and_then(|mut r| r.body_mut().read_to_string())
        .with_context(|| format!("could not read {url}"))?;
    let store: Store = serde_json::from_str(&text).with_context(|| format!("{url} is not a paddock host's status"))?;
    let served: Vec<Served> = store
        .artifacts
        .into_iter()
        .filter(|a| a.state == "loaded" && a.model.is_some())
        .filter(|a| args.model.is_none() || a.model == args.model)
        .collect();
    if served.is_empty() {
        bail!("{base} serves no {}", args.model.as_deref().map_or("model".to_owned(), |m| format!("model `{m}`")));
    }
    let acting =
        served.iter().filter_map(|a| a.drift.as_ref()).flat_map(|d| &d.fields).any(|f| f.level == DriftLevel::Act);
    if args.json {
        let list: Vec<serde_json::Value> = served
            .iter()
            .map(|a| serde_json::json!({"model": a.model, "version": a.version, "drift": a.drift}))
            .collect();
        crate::common::print_json(&list)?;
    } else {
        for a in &served {
            let (model, version) = (a.model.as_deref().unwrap_or_default(), a.version.as_deref().unwrap_or("-"));
            match &a.drift {
                None => outln!("{model} {version}: no training profile, drift unavailable\n")?,
                Some(report) => {
                    outln!("{model} {version}: {}", report.summary())?;
                    let window = window_text(report.window);
                    out!("{}", crate::bars::drift_text(report, &format!("live, last {window}")))?;
                    outln!()?;
                }
            }
        }
    }
    Ok(if acting { Outcome::Failed } else { Outcome::Ok })
}

/// `1 h`, `15 min`, `40 s`.
fn window_text(d: Duration) -> String {
    let s = d.as_secs();
    if s >= 3600 && s.is_multiple_of(3600) {
        format!("{} h", s / 3600)
    } else if s >= 60 && s.is_multiple_of(60) {
        format!("{} min", s / 60)
    } else {
        format!("{} s", d.as_secs_f64())
    }
}
