//! `paddock serve`: serve a store over HTTP (the API in
//! `serve/src/surface/openapi.json`, also at `GET /openapi.json`). Watches
//! the store and swaps versions without a restart; stops on Ctrl-C or
//! SIGTERM after the requests in flight finish.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use anyhow::{Context, Result};
use paddock_serve::surface::http::{self, ServeOptions};

use crate::Outcome;
use crate::common::StoreArgs;

/// Serve a store over HTTP.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    store: StoreArgs,
    #[command(flatten)]
    capture: crate::common::CaptureArgs,
    /// Address to listen on; port 0 picks a free one. Loopback by default:
    /// put a proxy in front before exposing it.
    #[arg(long, default_value = "127.0.0.1:7340", value_name = "ADDR")]
    listen: SocketAddr,
    /// Largest request body, in KiB.
    #[arg(long, default_value_t = 1024, value_name = "KIB")]
    max_body_kib: usize,
    /// Requests scored at once per model [default: the number of cores].
    #[arg(long, value_name = "N")]
    concurrency: Option<usize>,
    /// Sandbox calls running at once across every model [default: the
    /// number of cores; more than that and calls miss their wall-clock
    /// deadlines while descheduled].
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u64).range(1..=4096))]
    score_threads: Option<u64>,
    /// Requests waiting per model beyond those; more get 503 + Retry-After.
    #[arg(long, default_value_t = 256, value_name = "N")]
    queue: usize,
    /// File holding the bearer token for administrative routes (else the
    /// PADDOCK_ADMIN_TOKEN environment variable; neither: they are off).
    #[arg(long, value_name = "FILE")]
    admin_token_file: Option<PathBuf>,
    /// Seconds between rescans of the store (besides file-system events).
    #[arg(long, default_value_t = 30, value_name = "SECS")]
    rescan_secs: u64,
}

fn admin_token(file: Option<&PathBuf>) -> Result<Option<String>> {
    let token = match file {
        Some(f) => {
            Some(std::fs::read_to_string(f).with_context(|| format!("reading the admin token from {}", f.display()))?)
        }
        None => std::env::var("PADDOCK_ADMIN_TOKEN").ok(),
    };
    let token = token.map(|t| t.trim().to_owned()).filter(|t| !t.is_empty());
    if let Some(t) = &token {
        anyhow::ensure!(t.len() >= 16, "the admin token is {} characters long; use at least 16", t.len());
    }
    Ok(token)
}

/// Opens the store, watches it, and serves until told to stop.
pub fn run(args: Args) -> Result<Outcome> {
    // Opened before the signals are taken: a host still waiting for a
    // shared store it has no mirror of stops at the first Ctrl-C.
    let mut opened = args.store.open_capturing(args.capture.options())?;
    let registry = opened.registry.clone();
    for line in served_lines(&registry.status()) {
        eprintln!("{line}");
    }
    opened.keep_current(Duration::from_secs(args.rescan_secs.max(1)))?;
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    let stop = crate::common::shutdown_signal(&runtime, "stopping: finishing the requests in flight")?;
    let defaults = ServeOptions::default();
    let options = ServeOptions {
        max_body_bytes: args.max_body_kib << 10,
        concurrency: args.concurrency.unwrap_or(defaults.concurrency),
        score_threads: args.score_threads.map_or(defaults.score_threads, |n| n as usize),
        queue: args.queue,
        admin_token: admin_token(args.admin_token_file.as_ref())?,
        ..defaults
    };
    let router = http::router(registry.clone(), options);
    runtime.block_on(async {
        let listener = tokio::net::TcpListener::bind(args.listen)
            .await
            .with_context(|| format!("listening on {}", args.listen))?;
        let addr = listener.local_addr()?;
        // The first line on stdout is the address, for scripts that asked for port 0.
        outln!("listening on http://{addr}")?;
        use std::io::Write;
        std::io::stdout().flush()?;
        http::serve(listener, router, stop).await?;
        anyhow::Ok(())
    })?;
    opened.stop();
    crate::common::finish_capture(&registry);
    let saved = registry.save_usage()?;
    eprintln!("stopped; usage written to {}", saved.display());
    Ok(Outcome::Ok)
}

/// What a store serves and what it refused, in a few lines for the start:
/// one per model served (each version with the routes that use it), one per
/// artifact refused or kept, and the routes file's state when it was not taken.
fn served_lines(status: &paddock_serve::Status) -> Vec<String> {
    use paddock_serve::registry::{ArtifactState, LIMITS_FILE, LimitsState, ROUTES_FILE, RoutesState};
    let mut models: std::collections::BTreeMap<&str, Vec<String>> = std::collections::BTreeMap::new();
    let mut lines = Vec::new();
    for a in &status.artifacts {
        match (&a.state, &a.model, &a.version) {
            (ArtifactState::Loaded, Some(model), Some(version)) => {
                let used = if a.used_by.is_empty() { "unrouted".to_owned() } else { a.used_by.join(", ") };
                models.entry(model).or_default().push(format!("{version} ({used})"));
            }
            (ArtifactState::Loaded, ..) => {}
            (ArtifactState::Refused { refusal }, ..) => {
                lines.push(crate::flags::named(&format!("refused {}: {refusal}", a.path.display())))
            }
            (ArtifactState::KeptAfterRefusal { refusal, .. }, ..) => lines.push(crate::flags::named(&format!(
                "kept the old bytes of {}: the new ones are refused: {refusal}",
                a.path.display()
            ))),
            (ArtifactState::KeptAfterRemoval, ..) => {
                lines.push(format!("kept {} while routed: its file was removed", a.path.display()))
            }
            (other, ..) => lines.push(format!("{}: {other:?}", a.path.display())),
        }
    }
    let mut out: Vec<String> =
        models.into_iter().map(|(model, versions)| format!("serving {model}: {}", versions.join(", "))).collect();
    if out.is_empty() {
        out.push(format!("serving no model yet ({} in {})", status.store.display(), ROUTES_FILE));
    }
    out.extend(lines);
    match &status.routes {
        RoutesState::Accepted => {}
        RoutesState::Missing => out.push(format!("no {ROUTES_FILE}: nothing is routed")),
        RoutesState::Refused { problems } => out.push(format!("{ROUTES_FILE} refused: {}", problems.join("; "))),
        RoutesState::PartlyTaken { models, problems } => out.push(format!(
            "{ROUTES_FILE}: not taken for {} (each keeps the routes it had): {}",
            models.join(", "),
            problems.join("; ")
        )),
        other => out.push(format!("{ROUTES_FILE}: {other:?}")),
    }
    if let LimitsState::Refused { problems } = &status.limits {
        out.push(format!("{LIMITS_FILE} refused (the limits last taken stay): {}", problems.join("; ")));
    }
    if status.problems().next().is_some() || !matches!(status.routes, RoutesState::Accepted) {
        out.push("see GET /store or `paddock status` for every artifact".into());
    }
    out
}
