//! `paddock work`: a stream worker on NATS JetStream. Every worker started
//! with the same consumer shares its events; each event's answer is
//! published once, bad events and model faults go to dead-letter (see
//! `paddock_serve::surface::worker`). Watches the store like `serve`; stops
//! on Ctrl-C or SIGTERM after the events in hand are answered and acked,
//! and writes the usage ledger as `serve` does.

use std::time::Duration;

use anyhow::{Context, Result};
use paddock_serve::surface::http;
use paddock_serve::surface::worker::{self, WorkerCounts, WorkerOptions};

use crate::Outcome;
use crate::common::StoreArgs;

/// Consume events from NATS JetStream, score them, publish the answers.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    store: StoreArgs,
    #[command(flatten)]
    capture: crate::common::CaptureArgs,
    /// The NATS server (several: comma-separated).
    #[arg(long, default_value = "nats://127.0.0.1:4222", value_name = "URL")]
    nats: String,
    /// The subject events are published to.
    #[arg(long, default_value = "paddock.events", value_name = "SUBJECT")]
    events: String,
    /// The stream holding the events (made, capturing the subject, if missing).
    #[arg(long, default_value = "PADDOCK_EVENTS", value_name = "NAME")]
    events_stream: String,
    /// The durable consumer the workers share.
    #[arg(long, default_value = "paddock-workers", value_name = "NAME")]
    consumer: String,
    /// The subject answers are published to.
    #[arg(long, default_value = "paddock.answers", value_name = "SUBJECT")]
    answers: String,
    /// The subject dead letters are published to.
    #[arg(long, default_value = "paddock.dead", value_name = "SUBJECT")]
    dead_letters: String,
    /// The stream holding answers and dead letters (made if missing).
    #[arg(long, default_value = "PADDOCK_ANSWERS", value_name = "NAME")]
    answers_stream: String,
    /// Events this worker handles at once.
    #[arg(long, default_value_t = 256, value_name = "N")]
    in_flight: usize,
    /// Events delivered and not acked, over all workers (the consumer's limit).
    #[arg(long, default_value_t = 1024, value_name = "N")]
    max_ack_pending: i64,
    /// Deliveries of one event before it goes to dead-letter.
    #[arg(long, default_value_t = 5, value_name = "N")]
    max_deliver: i64,
    /// Seconds the server waits for an ack before delivering an event again.
    #[arg(long, default_value_t = 30, value_name = "SECS")]
    ack_wait_secs: u64,
    /// Threads scoring at once [default: the number of cores].
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
    /// This worker's name, in the `Paddock-Worker` header of what it
    /// publishes [default: pid-<process id>].
    #[arg(long, value_name = "NAME")]
    name: Option<String>,
    /// Serve `GET /metrics` (OpenMetrics: this worker's events, answers,
    /// dead letters, redeliveries and the consumer's backlog, and per-model
    /// scoring and drift) and `GET /store` (the status as JSON, which
    /// `paddock drift` reads) on this address; the first line on stdout
    /// names it.
    #[arg(long, value_name = "ADDR")]
    metrics: Option<std::net::SocketAddr>,
    /// Seconds between rescans of the store (besides file-system events).
    #[arg(long, default_value_t = 30, value_name = "SECS")]
    rescan_secs: u64,
}

/// Opens the store, watches it, and works until told to stop.
pub fn run(args: Args) -> Result<Outcome> {
    // Opened before the signals are taken, as `serve` does.
    let mut opened = args.store.open_capturing(args.capture.options())?;
    let registry = opened.registry.clone();
    opened.keep_current(Duration::from_secs(args.rescan_secs.max(1)))?;
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    let stop = crate::common::shutdown_signal(&runtime, "stopping: finishing the events in hand")?;
    let defaults = WorkerOptions::default();
    let options = WorkerOptions {
        url: args.nats,
        events_stream: args.events_stream,
        events: args.events,
        consumer: args.consumer,
        answers_stream: args.answers_stream,
        answers: args.answers,
        dead_letters: args.dead_letters,
        in_flight: args.in_flight.max(1),
        max_ack_pending: args.max_ack_pending,
        max_deliver: args.max_deliver,
        ack_wait: Duration::from_secs(args.ack_wait_secs.max(1)),
        threads: args.threads.unwrap_or(defaults.threads),
        name: args.name.unwrap_or(defaults.name.clone()),
        ..defaults
    };
    let counts = std::sync::Arc::new(WorkerCounts::default());
    let url = options.url.clone();
    runtime.block_on(async {
        if let Some(addr) = args.metrics {
            let listener = tokio::net::TcpListener::bind(addr).await.with_context(|| format!("listening on {addr}"))?;
            // The first line on stdout is the address, for scripts that asked for port 0.
            outln!("metrics on http://{}/metrics", listener.local_addr()?)?;
            use std::io::Write;
            std::io::stdout().flush()?;
            // Served until the runtime is dropped, after the worker stops.
            tokio::spawn(http::serve(
                listener,
                worker::metrics_router(registry.clone(), counts.clone()),
                std::future::pending(),
            ));
        }
        worker::run(registry.clone(), options, counts.clone(), stop).await.with_context(|| format!("working on {url}"))
    })?;
    drop(runtime);
    opened.stop();
    crate::common::finish_capture(&registry);
    let saved = registry.save_usage()?;
    let s = counts.summary();
    eprintln!(
        "stopped: {} events, {} answered ({} already answered), {} dead-lettered, {} redelivered, {} left to come back; usage written to {}",
        s.events,
        s.answered,
        s.duplicates,
        s.dead_lettered,
        s.redelivered,
        s.retried,
        saved.display()
    );
    Ok(Outcome::Ok)
}
