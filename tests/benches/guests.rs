//! What each kind of guest costs: the same model written in Rust, Python
//! and JavaScript, and scikit-learn models run by the Rust generic guests
//! against the ONNX evaluator — artifact size, cold load (compile, start,
//! contract), load with a warm code cache, a fresh instance, peak memory,
//! one row, and per row in a batch. One run measures every kind.
//!
//! `cargo bench -p paddock-tests --bench guests` measures and writes the
//! table to target/paddock/bench-guests.md (`scripts/bench_guests.py` puts
//! it in BENCHMARKS.md). Under `cargo test` each kind is loaded and scored
//! once, from the tests' code cache, to show the bench still runs.
//!
//! Needs `cargo xtask guests` (the artifacts) and the scikit-learn exports
//! (`cargo xtask test` writes both).

use std::time::Duration;

use paddock_guest::{LinearParams, Link, Packaged, encode_params};
use paddock_host::{Artifact, CodeCache, Isolation, Model, ModelOptions, PrimeState, Row, Runtime, WasiPolicy};
use paddock_tests::{foreign_artifact, guest, load_foreign, open_contract, packed, root, time};
use serde_json::Value;

/// One kind of guest, ready to load.
struct Kind {
    model: &'static str,
    guest: &'static str,
    artifact: Artifact,
    wasi: bool,
    /// Which earlier row is the baseline for the per-row ratio.
    baseline: Option<usize>,
}

fn export(name: &str) -> Value {
    let path = root().join("target/paddock/sklearn").join(format!("{name}.json"));
    serde_json::from_slice(
        &std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e}; run `cargo xtask test`", path.display())),
    )
    .unwrap()
}

fn onnx(name: &str) -> Artifact {
    let dir = root().join("target/paddock/sklearn");
    let read = |ext: &str| std::fs::read(dir.join(format!("{name}.{ext}"))).unwrap();
    let manifest = paddock_import::onnx_graph::read_manifest(&String::from_utf8(read("toml")).unwrap()).unwrap();
    let params = paddock_import::onnx_graph::params(&manifest, &read("onnx")).unwrap();
    packed(&guest("paddock-model-onnx"), &params, None)
}

fn kinds() -> Vec<Kind> {
    let linear = export("linear");
    let features: Vec<String> =
        linear["features"].as_array().unwrap().iter().map(|f| f.as_str().unwrap().to_owned()).collect();
    let floats = |v: &Value| v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect::<Vec<_>>();
    let params = LinearParams {
        link: Link::Identity,
        intercepts: vec![linear["intercept"].as_f64().unwrap()],
        weights: vec![floats(&linear["coef"])],
        impute: vec![],
    };
    let blob = encode_params(&Packaged { contract: open_contract("onnx-linear", &features, "progression"), params });
    let kind = |model, guest, artifact, wasi, baseline| Kind { model, guest, artifact, wasi, baseline };
    vec![
        kind("charge-taper", "Rust", foreign_artifact("charge-taper-rs"), false, None),
        kind("charge-taper", "Python (componentize-py)", foreign_artifact("charge-taper-py"), true, Some(0)),
        kind("charge-taper", "JavaScript (componentize-js)", foreign_artifact("charge-taper-js"), true, Some(0)),
        kind(
            "diabetes linear",
            "Rust generic linear",
            packed(&guest("paddock-model-linear"), &blob, None),
            false,
            None,
        ),
        kind("diabetes linear", "ONNX evaluator (tract)", onnx("onnx-linear"), false, Some(3)),
        kind("diabetes MLP 10-16-1", "ONNX evaluator (tract)", onnx("onnx-mlp"), false, Some(3)),
    ]
}

fn options(kind: &Kind, isolation: Isolation) -> ModelOptions {
    ModelOptions { isolation, wasi: kind.wasi.then(WasiPolicy::default), ..ModelOptions::default() }
}

/// A row every model of this kind accepts.
fn row(model: &Model) -> Row {
    let mut row = Row::new();
    for (i, f) in model.contract().features.iter().enumerate() {
        let v = match f.name.as_str() {
            "charger_kw" => 22.0,
            "battery_kwh" => 64.0,
            "soc_start" => 0.2,
            "soc_target" => 0.9,
            _ => 0.01 * (i as f64 + 1.0),
        };
        row = row.with(&f.name, v);
    }
    row
}

struct Measured {
    bytes: usize,
    cold: Duration,
    warm: Duration,
    /// A fresh-per-call load from the cache, when the model is primed.
    primed: Option<Duration>,
    fresh: Duration,
    peak: u64,
    one: Duration,
    per_row: Duration,
}

const BATCH: usize = 256;

fn measure(runtime: &Runtime, kind: &Kind, cache: &CodeCache, full: bool) -> Measured {
    let (cold_runs, warm_runs, calls) = if full { (3, 5, 2000) } else { (0, 1, 3) };
    let load = |c: Option<&CodeCache>, isolation| match c {
        Some(c) => Model::load_cached(runtime, kind.artifact.clone(), options(kind, isolation), c).unwrap(),
        None => Model::load_with(runtime, kind.artifact.clone(), options(kind, isolation)).unwrap(),
    };
    let cold = if cold_runs > 0 { time(cold_runs, || load(None, Isolation::Reuse)) } else { Duration::ZERO };
    let _ = load(Some(cache), Isolation::Reuse); // fills the cache
    let warm = time(warm_runs, || load(Some(cache), Isolation::Reuse));
    let model = load(Some(cache), Isolation::Reuse);
    let one_row = [row(&model)];
    let batch = vec![one_row[0].clone(); BATCH];
    let peak = model.score(&batch).unwrap().usage().peak_memory_bytes;
    let one = time(calls, || model.score(&one_row).unwrap());
    let per_row = time(calls / 10 + 1, || model.score(&batch).unwrap()) / BATCH as u32;
    let fresh_model = load(Some(cache), Isolation::FreshPerCall);
    let fresh = time(calls / 20 + 1, || fresh_model.score(&one_row).unwrap());
    // With the primed component in the cache now: a fresh-per-call load.
    let primed = (fresh_model.prime_state() == &PrimeState::Primed)
        .then(|| time(warm_runs, || load(Some(cache), Isolation::FreshPerCall)));
    Measured { bytes: kind.artifact.bytes().len(), cold, warm, primed, fresh, peak, one, per_row }
}

fn main() {
    let full = std::env::args().any(|a| a == "--bench");
    let runtime = Runtime::new().unwrap();
    let cache = if full {
        let dir = root().join("target/paddock/bench-code-cache");
        let _ = std::fs::remove_dir_all(&dir);
        CodeCache::open(&dir).unwrap()
    } else {
        // The tests' cache: under `cargo test` nothing is compiled twice.
        let _ = load_foreign(&runtime, "charge-taper-rs", ModelOptions::default());
        CodeCache::open(&root().join("target/paddock/test-code-cache")).unwrap()
    };
    let kinds = kinds();
    let results: Vec<Measured> = kinds.iter().map(|k| measure(&runtime, k, &cache, full)).collect();
    let ms = |d: Duration| format!("{:.1}", d.as_secs_f64() * 1e3);
    let us = |d: Duration| format!("{:.2}", d.as_secs_f64() * 1e6);
    let mut table = vec![
        "| model | guest | artifact | cold load | warm load | primed load | fresh instance + 1 row | peak memory | 1 row | per row, 256-row batch | per row vs Rust |".to_owned(),
        "|---|---|---|---|---|---|---|---|---|---|---|".to_owned(),
    ];
    for (k, m) in kinds.iter().zip(&results) {
        let ratio = k.baseline.map_or("baseline".to_owned(), |b| {
            format!("{:.1}×", m.per_row.as_secs_f64() / results[b].per_row.as_secs_f64())
        });
        table.push(format!(
            "| {} | {} | {:.2} MiB | {} ms | {} ms | {} | {} µs | {:.1} MiB | {} µs | {} µs | {ratio} |",
            k.model,
            k.guest,
            m.bytes as f64 / (1 << 20) as f64,
            ms(m.cold),
            ms(m.warm),
            m.primed.map_or("not primed".to_owned(), |d| format!("{} ms", ms(d))),
            us(m.fresh),
            m.peak as f64 / (1 << 20) as f64,
            us(m.one),
            us(m.per_row),
        ));
    }
    let table = table.join("\n");
    println!("{table}");
    if full {
        let out = root().join("target/paddock/bench-guests.md");
        std::fs::write(&out, format!("{table}\n")).unwrap();
        eprintln!("wrote {}", out.display());
    }
}
