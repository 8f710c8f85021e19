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
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    let stop = crate::common::shutdown_signal(&runtime, "stopping: finishing the requests in flight")?;
    let registry = args.store.open()?;
    let refused = registry.status().problems().count();
    if refused > 0 {
        let what = if refused == 1 { "1 artifact is" } else { &format!("{refused} artifacts are") };
        eprintln!("warning: {what} not loaded as on disk; see GET /store or `paddock status`");
    }
    let watch = registry.watch(Duration::from_millis(200), Duration::from_secs(args.rescan_secs.max(1)))?;
    let defaults = ServeOptions::default();
    let options = ServeOptions {
        max_body_bytes: args.max_body_kib << 10,
        concurrency: args.concurrency.unwrap_or(defaults.concurrency),
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
    drop(watch);
    let saved = registry.save_usage()?;
    eprintln!("stopped; usage written to {}", saved.display());
    Ok(Outcome::Ok)
}
