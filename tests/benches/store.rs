//! Opening a store, and what routing costs per request.
//!
//! - `store_open/cold`: open the demo store (six versions) with an empty
//!   code cache: every artifact is compiled, then gated (checks run).
//! - `store_open/warm`: the same with the cache filled by an earlier open:
//!   compiled code is loaded, not recompiled. Their ratio is the restart
//!   speed-up the cache buys.
//! - `route/registry_single`: one row to `charge-minutes` through the
//!   registry (snapshot, routes with a time-window rule and a canary hash,
//!   ledger) against `route/model_single`, the same row on the same loaded
//!   version directly.
//!
//! Needs `cargo xtask build` first (it assembles target/paddock/store).

use std::hint::black_box;
use std::path::Path;

use criterion::{Criterion, criterion_group, criterion_main};
use paddock_host::{Row, Runtime};
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};

fn options(state: &Path) -> RegistryOptions {
    // Several registries share the state directory's code cache here; none
    // keeps a usage file (which would take the directory's lock).
    RegistryOptions { state_dir: Some(state.to_owned()), usage_flush: None, ..RegistryOptions::default() }
}

fn benches(c: &mut Criterion) {
    let store = paddock_tests::root().join("target/paddock/store");
    assert!(store.join("routes.toml").exists(), "{} is missing: run `cargo xtask build`", store.display());
    let runtime = Runtime::new().unwrap();
    let state = tempfile::tempdir().unwrap();

    let mut g = c.benchmark_group("store_open");
    g.sample_size(10);
    g.bench_function("cold", |b| {
        b.iter_batched(
            || {
                let _ = std::fs::remove_dir_all(state.path());
            },
            |()| black_box(Registry::open(&runtime, &store, options(state.path())).unwrap()),
            criterion::BatchSize::PerIteration,
        )
    });
    Registry::open(&runtime, &store, options(state.path())).unwrap();
    g.bench_function("warm", |b| {
        b.iter(|| black_box(Registry::open(&runtime, &store, options(state.path())).unwrap()))
    });
    g.finish();

    let registry = Registry::open(&runtime, &store, options(state.path())).unwrap();
    let context: RequestContext =
        [("site", "Market Hall"), ("region", "centre")].map(|(k, v)| (k.to_owned(), v.to_owned())).into();
    let at = Some("2026-12-01T17:05:00Z".parse().unwrap());
    let row = vec![
        Row::new()
            .with("charger_kw", 22.0)
            .with("battery_kwh", 40.0)
            .with("soc_start", 0.35)
            .with("soc_target", 0.9)
            .with("ambient_c", 14.0)
            .with("hour_of_week", 42i64)
            .with("connector", "type2")
            .with("fleet", false),
    ];
    let (version, _) = registry.route("charge-minutes", &context, at).unwrap();
    let model = registry.model("charge-minutes", &version).unwrap();
    // The demo routes shadow every charge-minutes request; measure routing
    // alone with the shadow off.
    let quiet = tempfile::tempdir().unwrap();
    copy_without_shadow(&store, quiet.path());
    let registry = Registry::open(&runtime, quiet.path(), options(state.path())).unwrap();
    let mut g = c.benchmark_group("route");
    g.bench_function("model_single", |b| b.iter(|| black_box(model.score(black_box(&row)).unwrap())));
    g.bench_function("registry_single", |b| {
        b.iter(|| {
            let request = Request::new("charge-minutes", &context, black_box(&row)).at(at);
            black_box(registry.score(&request).unwrap())
        })
    });
    g.finish();
}

/// Copies the demo store's artifacts, and its routes minus the shadow table.
fn copy_without_shadow(from: &Path, to: &Path) {
    for model in ["charge-minutes", "overstay-risk"] {
        std::fs::create_dir_all(to.join(model)).unwrap();
        for e in std::fs::read_dir(from.join(model)).unwrap() {
            let e = e.unwrap();
            std::fs::copy(e.path(), to.join(model).join(e.file_name())).unwrap();
        }
    }
    let routes = std::fs::read_to_string(from.join("routes.toml")).unwrap();
    let start = routes.find("[models.charge-minutes.shadow]").expect("the demo routes have a shadow");
    let end = routes[start..].find("\n\n").map_or(routes.len(), |e| start + e);
    std::fs::write(to.join("routes.toml"), format!("{}{}", &routes[..start], &routes[end..])).unwrap();
}

criterion_group!(store, benches);
criterion_main!(store);
