//! Stream workers on NATS JetStream: many processes, on many machines,
//! share one durable pull consumer, so events spread over them with no
//! coordination of ours; each event is gathered, routed and scored as the
//! NDJSON stream does it, its answer published, and only then acked.
//!
//! An event is one request of the wire (`{"id": "e-17", "model": …,
//! "context": …, "rows": […]}`); its `id` is the event id (the stream
//! sequence when it has none).
//!
//! Delivery:
//! - **At least once in, one answer out.** The answer is published to the
//!   answers subject with the event id as its `Nats-Msg-Id`: the answers
//!   stream drops a second answer to a redelivered event within its
//!   duplicate window. The event is acked only after the answer's publish
//!   is confirmed.
//! - **Bad events** (not JSON, unknown model, invalid rows) and **model
//!   faults** (trap, limit, bad output) go to the dead-letter subject — the
//!   original payload and the typed error — and are acked: never lost,
//!   never retried forever.
//! - **Infrastructure faults** (an answer not confirmed, a feature source
//!   unavailable where the plan says the row must fail, a version not
//!   loaded) are not acked: the event comes back after a pause, up to the
//!   consumer's maximum deliveries, and then goes to dead-letter with the
//!   reason.
//! - **Bounded**: at most `in_flight` events per worker are being handled,
//!   scoring runs on `threads` blocking threads, and a slow model slows the
//!   pulling instead of growing memory.
//! - **Stopping** (the `shutdown` future resolves): no more pulling; the
//!   events in hand are finished and acked; then [`run`] returns.
//!
//! What it is not: a stream engine. Ordering, partitioning and storage are
//! JetStream's; this module only consumes and answers.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use async_nats::jetstream::{self, AckKind, consumer, stream};
use futures_util::StreamExt;
use serde::Serialize;
use tokio::sync::Semaphore;

use super::wire::{ErrorBody, ErrorDetail};
use crate::registry::Registry;
use paddock_host::contract::rows::ContractRule;

/// The header naming the worker that published an answer or dead letter.
pub const WORKER_HEADER: &str = "Paddock-Worker";

/// Where a worker reads and writes, and how much it takes on.
#[derive(Clone, Debug)]
pub struct WorkerOptions {
    /// The NATS server (`nats://host:4222`; several, comma-separated).
    pub url: String,
    /// The stream holding the events; made (capturing `events`) if missing.
    pub events_stream: String,
    /// The subject events are published to.
    pub events: String,
    /// The durable consumer every worker shares.
    pub consumer: String,
    /// The stream holding answers and dead letters; made (capturing both
    /// subjects, with `duplicate_window`) if missing.
    pub answers_stream: String,
    /// The subject answers are published to.
    pub answers: String,
    /// The subject dead letters are published to.
    pub dead_letters: String,
    /// How long the answers stream remembers a message id.
    pub duplicate_window: Duration,
    /// Events delivered to the consumer and not yet acked, over all workers.
    pub max_ack_pending: i64,
    /// Deliveries of one event before it goes to dead-letter.
    pub max_deliver: i64,
    /// How long the server waits for an ack before delivering again.
    pub ack_wait: Duration,
    /// Events one worker handles at once.
    pub in_flight: usize,
    /// Events asked for per pull.
    pub batch: usize,
    /// Threads scoring at once.
    pub threads: usize,
    /// The pause before an event that met an infrastructure fault comes back.
    pub retry_after: Duration,
    /// This worker's name, in the `Paddock-Worker` header of everything it
    /// publishes (default `pid-<process id>`).
    pub name: String,
}

impl Default for WorkerOptions {
    fn default() -> Self {
        let threads = std::thread::available_parallelism().map_or(2, usize::from);
        WorkerOptions {
            url: "nats://127.0.0.1:4222".into(),
            events_stream: "PADDOCK_EVENTS".into(),
            events: "paddock.events".into(),
            consumer: "paddock-workers".into(),
            answers_stream: "PADDOCK_ANSWERS".into(),
            answers: "paddock.answers".into(),
            dead_letters: "paddock.dead".into(),
            duplicate_window: Duration::from_secs(120),
            max_ack_pending: 1024,
            max_deliver: 5,
            ack_wait: Duration::from_secs(30),
            in_flight: 256,
            batch: 128,
            threads,
            retry_after: Duration::from_millis(500),
            name: format!("pid-{}", std::process::id()),
        }
    }
}

/// Why a worker could not start or go on.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum WorkerError {
    /// The NATS server could not be reached.
    #[error("cannot connect to {url}: {problem}")]
    Connect {
        /// The server.
        url: String,
        /// What the client said.
        problem: String,
    },
    /// A stream or the consumer could not be made or read.
    #[error("JetStream {what}: {problem}")]
    JetStream {
        /// Which stream or consumer, and what was done to it.
        what: String,
        /// What the server said.
        problem: String,
    },
}

/// What a worker has done, counted as it goes.
#[derive(Debug, Default)]
pub struct WorkerCounts {
    events: AtomicU64,
    answered: AtomicU64,
    duplicates: AtomicU64,
    dead_lettered: AtomicU64,
    redelivered: AtomicU64,
    retried: AtomicU64,
    pending: AtomicU64,
}

/// [`WorkerCounts`] read at one moment.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct WorkerSummary {
    /// Events taken from the consumer (redeliveries included).
    pub events: u64,
    /// Answers published and confirmed.
    pub answered: u64,
    /// Of those, answers the answers stream already had (a redelivered
    /// event answered before): not stored twice.
    pub duplicates: u64,
    /// Events sent to dead-letter.
    pub dead_lettered: u64,
    /// Events that came more than once.
    pub redelivered: u64,
    /// Events left unacked after an infrastructure fault, to come back.
    pub retried: u64,
    /// Events the consumer had not delivered yet, as of the last event taken.
    pub pending: u64,
}

impl WorkerCounts {
    /// The counts now.
    pub fn summary(&self) -> WorkerSummary {
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed);
        WorkerSummary {
            events: get(&self.events),
            answered: get(&self.answered),
            duplicates: get(&self.duplicates),
            dead_lettered: get(&self.dead_lettered),
            redelivered: get(&self.redelivered),
            retried: get(&self.retried),
            pending: get(&self.pending),
        }
    }

    /// The counts as OpenMetrics families (named `paddock_worker_*`).
    pub fn families(&self) -> Vec<crate::registry::metrics::SurfaceFamily> {
        let s = self.summary();
        let family =
            |name, counter, help, value| crate::registry::metrics::SurfaceFamily { name, help, counter, value };
        vec![
            family("worker_events", true, "Events taken from the consumer, redeliveries included.", s.events),
            family("worker_answered", true, "Answers published and confirmed.", s.answered),
            family(
                "worker_duplicate_answers",
                true,
                "Answers the answers stream already held (a redelivered event answered before).",
                s.duplicates,
            ),
            family("worker_dead_lettered", true, "Events sent to dead-letter.", s.dead_lettered),
            family("worker_redelivered", true, "Events delivered more than once.", s.redelivered),
            family("worker_retried", true, "Events left unacked after an infrastructure fault.", s.retried),
            family(
                "worker_pending",
                false,
                "Events the consumer had not delivered yet, as of the last event taken.",
                s.pending,
            ),
        ]
    }
}

/// The worker's `GET /metrics`: the registry's families (per model
/// version: calls, rows, errors, time, fuel; feature sources; artifacts;
/// drift) and the worker's own (`paddock_worker_*`), in the OpenMetrics
/// text format; and `GET /store`, the registry's status as JSON (each
/// served version's drift report among it), as the HTTP surface serves it.
/// Serve it with [`super::http::serve`].
#[cfg(feature = "http")]
pub fn metrics_router(registry: Registry, counts: Arc<WorkerCounts>) -> axum::Router {
    use axum::http::header;
    let status = registry.clone();
    let store = move || {
        let body = serde_json::to_vec(&status.status()).unwrap_or_default();
        ([(header::CONTENT_TYPE, "application/json")], body)
    };
    let text = move || {
        let text = crate::registry::metrics::render(
            registry.usage(),
            &registry.status(),
            registry.source_usage(),
            counts.families(),
        );
        ([(header::CONTENT_TYPE, crate::registry::metrics::CONTENT_TYPE)], text)
    };
    axum::Router::new()
        .route("/metrics", axum::routing::get(move || std::future::ready(text())))
        .route("/store", axum::routing::get(move || std::future::ready(store())))
}

/// A dead letter: the event as it came, and why it was not answered.
#[derive(Serialize)]
struct DeadLetter<'a> {
    /// The event id.
    event: &'a str,
    /// The subject it came on.
    subject: &'a str,
    /// Deliveries so far.
    deliveries: i64,
    /// The typed error.
    error: &'a ErrorDetail,
    /// The payload: JSON when it parsed, text (lossy UTF-8) when not.
    payload: serde_json::Value,
}

/// What became of one event.
enum Verdict {
    /// Answered: publish the answer.
    Answer(Vec<u8>),
    /// The event's or the model's fault: dead-letter it.
    Dead(ErrorBody),
    /// The infrastructure's fault: let it come back.
    Retry(ErrorBody),
}

/// Connects, makes the streams and the durable consumer, and opens the
/// message stream [`run`] pulls from (public so a benchmark can hold a bare
/// consumer to the same settings).
///
/// # Errors
/// [`WorkerError`] when the server cannot be reached, or the streams or
/// the consumer cannot be made.
pub async fn open_consumer(
    options: &WorkerOptions,
) -> Result<(jetstream::Context, consumer::pull::Stream), WorkerError> {
    let client = async_nats::ConnectOptions::new()
        .name("paddock worker")
        .connect(options.url.as_str())
        .await
        .map_err(|e| WorkerError::Connect { url: options.url.clone(), problem: e.to_string() })?;
    let js = jetstream::new(client);
    let js_error = |what: String, e: &dyn std::fmt::Display| WorkerError::JetStream { what, problem: e.to_string() };
    let events = js
        .get_or_create_stream(stream::Config {
            name: options.events_stream.clone(),
            subjects: vec![options.events.clone()],
            ..Default::default()
        })
        .await
        .map_err(|e| js_error(format!("stream {}", options.events_stream), &e))?;
    js.get_or_create_stream(stream::Config {
        name: options.answers_stream.clone(),
        subjects: vec![options.answers.clone(), options.dead_letters.clone()],
        duplicate_window: options.duplicate_window,
        ..Default::default()
    })
    .await
    .map_err(|e| js_error(format!("stream {}", options.answers_stream), &e))?;
    let consumer: consumer::PullConsumer = events
        .get_or_create_consumer(
            &options.consumer,
            consumer::pull::Config {
                durable_name: Some(options.consumer.clone()),
                ack_policy: consumer::AckPolicy::Explicit,
                ack_wait: options.ack_wait,
                max_deliver: options.max_deliver,
                max_ack_pending: options.max_ack_pending,
                ..Default::default()
            },
        )
        .await
        .map_err(|e| js_error(format!("consumer {}", options.consumer), &e))?;
    let messages = consumer
        .stream()
        .max_messages_per_batch(options.batch)
        .heartbeat(Duration::from_secs(5))
        .messages()
        .await
        .map_err(|e| js_error(format!("messages of consumer {}", options.consumer), &e))?;
    Ok((js, messages))
}

/// Runs a worker until `shutdown` resolves (or the consumer ends): pulls
/// events, scores them with `registry`, publishes answers and dead letters.
/// `counts` is updated as it goes (for metrics).
///
/// # Errors
/// [`WorkerError`] when the server cannot be reached at start, or the
/// streams or the consumer cannot be made.
pub async fn run(
    registry: Registry,
    options: WorkerOptions,
    counts: Arc<WorkerCounts>,
    shutdown: impl std::future::Future<Output = ()>,
) -> Result<(), WorkerError> {
    let mut shutdown = std::pin::pin!(shutdown);
    // Told to stop while still connecting or making the streams: nothing is
    // in hand yet, so stop at once.
    let setup = open_consumer(&options);
    let (js, messages) = tokio::select! {
        () = &mut shutdown => return Ok(()),
        ready = setup => ready?,
    };
    let in_flight = Arc::new(Semaphore::new(options.in_flight));
    let scoring = Arc::new(Semaphore::new(options.threads.max(1)));
    let options = Arc::new(options);
    // The events already delivered, up to a batch at a time: one thread hop
    // to score them, their answers' publishes under way together.
    let mut batches = messages.ready_chunks(options.batch.clamp(1, options.in_flight.max(1)));
    loop {
        let batch = tokio::select! {
            () = &mut shutdown => break,
            b = batches.next() => b,
        };
        let Some(batch) = batch else { break };
        let mut taken = Vec::with_capacity(batch.len());
        for m in batch {
            match m {
                Ok(m) => taken.push(m),
                // Missed heartbeats and the like while the server is away:
                // the stream goes on once it is back.
                Err(e) => tracing::warn!(error = %e, "pulling events"),
            }
        }
        if taken.is_empty() {
            // A short pause keeps a lasting fault from spinning.
            tokio::select! {
                () = &mut shutdown => break,
                () = tokio::time::sleep(Duration::from_millis(100)) => continue,
            }
        }
        // Bounded: a batch waits for room among the events under way (one
        // not started before a stop comes back, unacked, to another worker).
        let permits = tokio::select! {
            () = &mut shutdown => break,
            p = in_flight.clone().acquire_many_owned(u32::try_from(taken.len()).unwrap_or(u32::MAX)) => {
                p.expect("the semaphore is never closed")
            }
        };
        let (registry, js, options, counts, scoring) =
            (registry.clone(), js.clone(), options.clone(), counts.clone(), scoring.clone());
        tokio::spawn(async move {
            handle(&registry, &js, &options, &counts, &scoring, taken).await;
            drop(permits);
        });
    }
    drop(batches);
    // Finish what is in hand: every permit back means every event acked or left to come back.
    let _all = in_flight.acquire_many(u32::try_from(options.in_flight).unwrap_or(u32::MAX)).await;
    Ok(())
}

/// One event taken: its message, how often it came, and its place in the stream.
struct Event {
    message: jetstream::Message,
    deliveries: i64,
    sequence: u64,
}

/// Handles a batch of events: gathers each one's features (awaited, no
/// thread held), scores them all on one blocking thread, publishes every
/// answer or dead letter, and acks each event once its publish is
/// confirmed.
async fn handle(
    registry: &Registry,
    js: &jetstream::Context,
    options: &WorkerOptions,
    counts: &WorkerCounts,
    scoring: &Arc<Semaphore>,
    messages: Vec<jetstream::Message>,
) {
    let mut events = Vec::with_capacity(messages.len());
    let mut requests = Vec::with_capacity(messages.len());
    for message in messages {
        counts.events.fetch_add(1, Ordering::Relaxed);
        let (deliveries, sequence) = match message.info() {
            Ok(i) => {
                counts.pending.store(i.pending, Ordering::Relaxed);
                (i.delivered, i.stream_sequence)
            }
            Err(_) => (1, 0),
        };
        if deliveries > 1 {
            counts.redelivered.fetch_add(1, Ordering::Relaxed);
        }
        requests.push(super::stream::parse(&message.payload));
        events.push(Event { message, deliveries, sequence });
    }
    // Lookups are awaited here, together, before a scoring thread is taken.
    let looking_up: Vec<Option<&super::stream::Parsed>> =
        requests.iter().map(|(_, parsed)| parsed.as_ref().ok().filter(|p| registry.looks_up(p.model()))).collect();
    let prepared = if looking_up.iter().any(Option::is_some) {
        let each = looking_up.into_iter().map(|p| async move {
            match p {
                Some(p) => Some(p.prepare(registry).await),
                None => None,
            }
        });
        futures_util::future::join_all(each).await
    } else {
        looking_up.into_iter().map(|_| None).collect()
    };
    let sequences: Vec<u64> = events.iter().map(|e| e.sequence).collect();
    let verdicts = {
        let _thread = scoring.clone().acquire_owned().await.expect("the semaphore is never closed");
        let registry = registry.clone();
        tokio::task::spawn_blocking(move || {
            requests
                .into_iter()
                .zip(prepared)
                .zip(sequences)
                .map(|(((id, parsed), prepared), sequence)| {
                    let result = parsed.and_then(|p| p.answer(&registry, prepared));
                    judge(id, result, sequence)
                })
                .collect::<Vec<_>>()
        })
        .await
    };
    let verdicts = match verdicts {
        Ok(v) => v,
        Err(e) => events
            .iter()
            .map(|ev| {
                let why = ErrorBody::new("server", format!("scoring stopped: {e}"));
                (format!("seq-{}", ev.sequence), Verdict::Retry(why))
            })
            .collect(),
    };
    // Every publish sent before any confirmation is awaited.
    let subjects =
        (async_nats::Subject::from(options.answers.as_str()), async_nats::Subject::from(options.dead_letters.as_str()));
    let mut sent = Vec::with_capacity(events.len());
    for (event, (name, verdict)) in events.into_iter().zip(verdicts) {
        if let Some(publish) = publish(js, options, &subjects, counts, &event, &name, verdict).await {
            sent.push((event, name, publish));
        }
    }
    // Each event acked as soon as its own publish is confirmed.
    let acks = sent.into_iter().map(|(event, name, (dead, publish))| async move {
        let confirmed = match publish {
            Ok(confirm) => confirm.await.map_err(|e| e.to_string()),
            Err(e) => Err(e),
        };
        match confirmed {
            Ok(ack) => {
                if dead {
                    counts.dead_lettered.fetch_add(1, Ordering::Relaxed);
                } else {
                    counts.answered.fetch_add(1, Ordering::Relaxed);
                    if ack.duplicate {
                        counts.duplicates.fetch_add(1, Ordering::Relaxed);
                    }
                }
                if let Err(e) = event.message.ack().await {
                    // The event comes back; its answer is a duplicate then.
                    tracing::warn!(event = %name, error = %e, "ack not sent");
                }
            }
            Err(e) => {
                tracing::warn!(event = %name, error = %e, "publish not confirmed; the event comes back");
                counts.retried.fetch_add(1, Ordering::Relaxed);
                let _ = event.message.ack_with(AckKind::Nak(Some(options.retry_after))).await;
            }
        }
    });
    futures_util::future::join_all(acks).await;
}

/// A publish under way: whether it is a dead letter, and its confirmation.
type Sent = (bool, Result<jetstream::context::PublishAckFuture, String>);

/// Sends an event's answer or dead letter (not awaiting its confirmation),
/// or naks an event to come back; `None` when there is nothing to confirm.
async fn publish(
    js: &jetstream::Context,
    options: &WorkerOptions,
    (answers, dead_letters): &(async_nats::Subject, async_nats::Subject),
    counts: &WorkerCounts,
    event: &Event,
    name: &str,
    verdict: Verdict,
) -> Option<Sent> {
    let message = &event.message;
    let dead = |error: &ErrorBody| {
        let letter = DeadLetter {
            event: name,
            subject: message.subject.as_str(),
            deliveries: event.deliveries,
            error: &error.error,
            payload: serde_json::from_slice(&message.payload)
                .unwrap_or_else(|_| String::from_utf8_lossy(&message.payload).into_owned().into()),
        };
        serde_json::to_vec(&letter).unwrap_or_default()
    };
    let (subject, body, id) = match verdict {
        Verdict::Answer(body) => (answers, body, name.to_owned()),
        Verdict::Dead(error) => (dead_letters, dead(&error), format!("dead:{name}")),
        Verdict::Retry(mut error) if event.deliveries >= options.max_deliver => {
            error.error.message = format!("gave up after {} deliveries: {}", event.deliveries, error.error.message);
            (dead_letters, dead(&error), format!("dead:{name}"))
        }
        Verdict::Retry(error) => {
            tracing::warn!(event = %name, deliveries = event.deliveries, error = %error.error.message, "event left to come back");
            counts.retried.fetch_add(1, Ordering::Relaxed);
            let _ = message.ack_with(AckKind::Nak(Some(options.retry_after))).await;
            return None;
        }
    };
    let built = jetstream::message::PublishMessage::build()
        .payload(body.into())
        .message_id(&id)
        .header(WORKER_HEADER, options.name.as_str());
    let sent = js.send_publish(subject.clone(), built).await.map_err(|e| e.to_string());
    Some((subject != answers, sent))
}

/// What to do with one event, given its answer: its id, and the verdict.
fn judge(
    id: Option<serde_json::Value>,
    result: Result<super::wire::EstimateAnswer, ErrorBody>,
    sequence: u64,
) -> (String, Verdict) {
    let event = match &id {
        Some(serde_json::Value::String(s)) => s.clone(),
        Some(v) => v.to_string(),
        None => format!("seq-{sequence}"),
    };
    let verdict = match result {
        Ok(mut answer) => match answer.problems.iter().find(|p| unavailable(p)) {
            Some(p) => Verdict::Retry(ErrorBody::new("unavailable", p.to_string())),
            None => {
                answer.id = Some(id.unwrap_or_else(|| event.clone().into()));
                Verdict::Answer(serde_json::to_vec(&answer).unwrap_or_default())
            }
        },
        Err(e) if matches!(e.error.kind.as_str(), "not_loaded" | "server" | "store" | "unavailable") => {
            Verdict::Retry(e)
        }
        Err(mut e) if e.error.rows.iter().any(unavailable) => {
            // Every row failed, some because a source was down: that is
            // what to retry for, and what a dead letter will say.
            e.error.kind = "unavailable".into();
            Verdict::Retry(e)
        }
        Err(e) => Verdict::Dead(e),
    };
    (event, verdict)
}

/// Whether a row failed because a feature source could not be read.
fn unavailable(p: &paddock_host::contract::rows::RowError) -> bool {
    matches!(p.rule, ContractRule::Unavailable { .. })
}
