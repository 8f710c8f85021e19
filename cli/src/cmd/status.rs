//! `paddock status`: open a store as a host would, and list every artifact
//! (loaded, refused and why, kept), which routes use it, whether the
//! routes file was taken, and the features file's tables (rows, age, when
//! loaded) and Redis sources. Exits 1 when anything was refused: run it before publishing a
//! store.

use anyhow::Result;
use paddock_host::{CodeSource, PrimeState};
use paddock_serve::registry::{ArtifactState, FeaturesState, LimitsState, RoutesState};

use crate::Outcome;
use crate::common::{StoreArgs, print_json, text_table};

/// Load a store and list what it would serve and what it refuses.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    store: StoreArgs,
    /// Print the status as JSON.
    #[arg(long)]
    json: bool,
}

/// Opens the store and prints its status.
pub fn run(args: Args) -> Result<Outcome> {
    let opened = args.store.open_to_look()?;
    let status = opened.registry.status();
    let refused = status
        .problems()
        .any(|a| matches!(a.state, ArtifactState::Refused { .. } | ArtifactState::KeptAfterRefusal { .. }))
        || matches!(status.routes, RoutesState::Refused { .. } | RoutesState::PartlyTaken { .. })
        || matches!(status.features, FeaturesState::Refused { .. })
        || matches!(status.limits, LimitsState::Refused { .. })
        || status.mirror.as_ref().is_some_and(|m| !m.problems.is_empty());
    if args.json {
        print_json(&status)?;
    } else {
        let rows: Vec<Vec<String>> = status
            .artifacts
            .iter()
            .map(|a| {
                let state = match &a.state {
                    ArtifactState::Loaded => "loaded".to_owned(),
                    ArtifactState::Refused { refusal } => crate::flags::named(&format!("refused: {refusal}")),
                    ArtifactState::KeptAfterRefusal { refusal, .. } => {
                        crate::flags::named(&format!("old bytes kept; new {refusal}"))
                    }
                    ArtifactState::KeptAfterRemoval => "file removed; kept while routed".to_owned(),
                    other => format!("{other:?}"),
                };
                vec![
                    a.path.display().to_string(),
                    a.digest.map(|d| d.short()).unwrap_or_default(),
                    state,
                    if a.used_by.is_empty() { "-".into() } else { a.used_by.join(", ") },
                    a.checks.clone().unwrap_or_default(),
                    match &a.code {
                        Some(CodeSource::Cache) => "from cache".into(),
                        Some(CodeSource::Compiled | CodeSource::CompiledAndCached) => "compiled".into(),
                        Some(CodeSource::CompiledCacheFailed { reason }) => format!("compiled ({reason})"),
                        None => "-".into(),
                    },
                    match &a.primed {
                        Some(PrimeState::Primed) => "yes".into(),
                        Some(PrimeState::Unprimed { reason }) => format!("no: {reason}"),
                        _ => "-".into(),
                    },
                    match (&a.drift, &a.state) {
                        (Some(d), _) => d.summary(),
                        (None, ArtifactState::Loaded) => "no profile".into(),
                        (None, _) => "-".into(),
                    },
                ]
            })
            .collect();
        match &status.mirror {
            None => outln!("store {} (generation {})\n", status.store.display(), status.generation)?,
            Some(m) => {
                let state = match (&m.stale_since, m.connected) {
                    (None, _) => "up to date".to_owned(),
                    (Some(since), true) => format!("catching up since {since}"),
                    (Some(since), false) => format!("out of reach, stale since {since}"),
                };
                outln!(
                    "store {} at revision {} of {} ({state}; generation {})",
                    m.source,
                    m.revision,
                    m.latest,
                    status.generation
                )?;
                for p in &m.problems {
                    outln!("  not taken: {} (revision {}): {}", p.key, p.revision, p.reason)?;
                }
                outln!()?;
            }
        }
        out!(
            "{}",
            text_table(&["artifact", "digest", "state", "used by", "checks", "code", "primed", "drift"], &rows)
        )?;
        match &status.routes {
            RoutesState::Accepted => outln!("\nroutes: {} accepted", paddock_serve::registry::ROUTES_FILE)?,
            RoutesState::Missing => {
                outln!("\nroutes: no {} — nothing is served", paddock_serve::registry::ROUTES_FILE)?
            }
            RoutesState::PartlyTaken { models, problems } => {
                outln!(
                    "\nroutes: {} taken, except for {} (each keeps the routes it had):",
                    paddock_serve::registry::ROUTES_FILE,
                    models.join(", ")
                )?;
                for p in problems {
                    outln!("  - {p}")?;
                }
            }
            RoutesState::Refused { problems } => {
                outln!("\nroutes: refused (the previous routes would keep serving):")?;
                for p in problems {
                    outln!("  - {p}")?;
                }
            }
            other => outln!("\nroutes: {other:?}")?,
        }
        let limits = paddock_serve::registry::LIMITS_FILE;
        match &status.limits {
            LimitsState::Missing => {}
            LimitsState::Accepted => outln!("limits: {limits} accepted")?,
            LimitsState::Refused { problems } => {
                outln!("limits: {limits} refused (the limits last taken would stay):")?;
                for p in problems {
                    outln!("  - {p}")?;
                }
            }
            other => outln!("limits: {other:?}")?,
        }
        let features = paddock_serve::registry::FEATURES_FILE;
        match &status.features {
            FeaturesState::Missing => outln!("features: no {features} — rows carry their features")?,
            FeaturesState::Accepted { tables, servers } => {
                outln!("features: {features} accepted")?;
                let rows: Vec<Vec<String>> = tables
                    .iter()
                    .map(|t| {
                        vec![
                            t.source.clone(),
                            t.file.display().to_string(),
                            t.rows.to_string(),
                            age(&t.changed),
                            t.changed.clone(),
                            t.loaded.clone(),
                        ]
                    })
                    .collect();
                if !rows.is_empty() {
                    out!("{}", text_table(&["source", "table", "rows", "age", "file changed", "loaded"], &rows))?;
                }
                let rows: Vec<Vec<String>> = servers
                    .iter()
                    .map(|s| {
                        let kind = serde_json::to_value(s.kind).ok().and_then(|k| k.as_str().map(str::to_owned));
                        vec![
                            s.source.clone(),
                            kind.unwrap_or_default(),
                            s.url.clone(),
                            format!("{} ms", s.budget_ms),
                            s.unchecked.as_ref().map_or_else(|| "checked".to_owned(), |u| format!("not checked: {u}")),
                        ]
                    })
                    .collect();
                if !rows.is_empty() {
                    out!("{}", text_table(&["source", "server", "url", "budget", "query"], &rows))?;
                }
            }
            FeaturesState::Refused { problems } => {
                outln!("features: refused (the previous plan and tables would keep serving):")?;
                for p in problems {
                    outln!("  - {p}")?;
                }
            }
        }
        if !status.unrouted.is_empty() {
            outln!("loaded but not routed: {}", status.unrouted.join(", "))?;
        }
    }
    Ok(if refused { Outcome::Failed } else { Outcome::Ok })
}

/// How long ago an RFC 3339 time was, in the largest whole unit (`3 h`).
fn age(when: &str) -> String {
    let Ok(t) = when.parse::<jiff::Timestamp>() else { return "?".to_owned() };
    let s = (jiff::Timestamp::now().as_second() - t.as_second()).max(0);
    match s {
        0..60 => format!("{s} s"),
        60..3600 => format!("{} min", s / 60),
        3600..86_400 => format!("{} h", s / 3600),
        _ => format!("{} d", s / 86_400),
    }
}
