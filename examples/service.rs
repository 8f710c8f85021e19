//! A small service that embeds paddock directly — no HTTP, no sidecar: its
//! workers take plug-in events from a queue and score them in-process
//! through a `Registry`, which routes each event by its site and time and
//! swaps versions when the store changes.
//!
//! ```text
//! cargo xtask build && cargo run -p paddock-examples --example service
//! ```

use std::sync::mpsc::sync_channel;
use std::time::{Duration, Instant};

use anyhow::Result;
use paddock_host::{Row, Runtime};
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext, RequestError};

/// An event the service receives when a car plugs in.
struct PlugIn {
    site: &'static str,
    region: &'static str,
    at: &'static str,
    expected_minutes: f64,
    occupancy: f64,
}

const SITES: [(&str, &str); 4] =
    [("Harbour Lot", "coast"), ("Depot North", "north"), ("Library Green", "centre"), ("Station Road", "north")];

fn main() -> Result<()> {
    let runtime = Runtime::new()?;
    let registry = Registry::open(&runtime, &paddock_examples::demo_store(), RegistryOptions::default())?;
    // Changes to the store are picked up while the service runs.
    let _watch = registry.watch(Duration::from_millis(200), Duration::from_secs(30))?;

    // A bounded queue: when the workers fall behind, the producer waits.
    let (tx, rx) = sync_channel::<PlugIn>(1024);
    let rx = std::sync::Arc::new(std::sync::Mutex::new(rx));
    let workers: Vec<_> = (0..2)
        .map(|_| {
            let (registry, rx) = (registry.clone(), rx.clone());
            std::thread::spawn(move || -> (u64, u64) {
                let (mut scored, mut refused) = (0, 0);
                loop {
                    let Ok(event) = rx.lock().unwrap().recv() else { return (scored, refused) };
                    let context: RequestContext = [("site", event.site), ("region", event.region)]
                        .map(|(k, v)| (k.to_owned(), v.to_owned()))
                        .into();
                    let rows = [Row::new()
                        .with("expected_minutes", event.expected_minutes)
                        .with("plugin_hour", 18i64)
                        .with("site_occupancy", event.occupancy)
                        .with("weekend", false)
                        .with("fleet", false)];
                    let request = Request::new("overstay-risk", &context, &rows).at(Some(event.at.parse().unwrap()));
                    match registry.score(&request) {
                        Ok(_) => scored += 1,
                        // A bad event is refused with the row, feature and rule; the service goes on.
                        Err(RequestError::Score { error, .. }) if error.kind() == "invalid_rows" => refused += 1,
                        Err(e) => panic!("{e}"),
                    }
                }
            })
        })
        .collect();

    let started = Instant::now();
    for i in 0..20_000u32 {
        let (site, region) = SITES[i as usize % SITES.len()];
        // One event in a thousand is broken: an occupancy above 100 %.
        let occupancy = if i % 1000 == 999 { 1.7 } else { f64::from(i % 100) / 100.0 };
        tx.send(PlugIn {
            site,
            region,
            at: "2026-12-01T18:05:00+01:00",
            expected_minutes: f64::from(30 + i % 200),
            occupancy,
        })?;
    }
    drop(tx);
    let (mut scored, mut refused) = (0, 0);
    for w in workers {
        let (s, r) = w.join().expect("a worker panicked");
        scored += s;
        refused += r;
    }
    let took = started.elapsed();
    println!(
        "{scored} events scored, {refused} refused as invalid, in {took:.2?} ({:.0} events/s on 2 workers)",
        (scored + refused) as f64 / took.as_secs_f64()
    );
    anyhow::ensure!(scored == 19_980 && refused == 20, "expected 19 980 scored and 20 refused");
    for v in registry.usage().versions.iter().filter(|v| v.model == "overstay-risk") {
        println!(
            "overstay-risk {}: {} calls, p50 {:.1} µs, p99 {:.1} µs",
            v.version, v.calls, v.wall_us.p50, v.wall_us.p99
        );
    }
    Ok(())
}
