//! Scoring cost, sandboxed against native on the same params, in one run.
//!
//! ```text
//! cargo xtask build && cargo bench -p paddock-tests --bench scoring
//! python3 scripts/bench_table.py   # writes the table in BENCHMARKS.md
//! ```
//!
//! For a linear model (9 features) and a 200-tree depth-6 ensemble:
//! - `single_warm`: one typed row end to end (validate, encode, call, check
//!   outputs) on a warm instance;
//! - `single_fresh`: the same with a fresh instance per call (pooling
//!   allocator, pre-instantiated, primed: each instance starts from the
//!   snapshot taken after `init`);
//! - `single_fresh_unprimed`: a fresh instance per call that runs
//!   `init(params)` itself (the baseline priming is measured against);
//! - `batch_1024`: 1024 dense rows through the sandbox;
//! - `batch_nans_as_is_1024`: the same on a runtime that does not
//!   canonicalize NaNs (the cost of bit-identical floats across machines);
//! - `single_warm_2_threads` / `single_fresh_2_threads`: two threads
//!   sharing one model, time per call;
//! - `native_1024` / `native_single`: the same estimator code natively.

use std::hint::black_box;

use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use paddock_guest::ndarray::{Array2, ArrayView2};
use paddock_guest::{
    Bounds, Contract, Evaluate, Feature, Linear, LinearParams, Link, Output, Packaged, Trees, encode_params,
};
use paddock_host::model::Isolation;
use paddock_host::{ModelOptions, PrimeState, Priming, Row, Runtime, RuntimeConfig};
use paddock_tests::{guest, load, random_cells, random_ensemble};

const FEATURES: usize = 9;
const BATCH: usize = 1024;

fn contract() -> Contract {
    Contract {
        name: "bench".into(),
        version: "1.0.0".into(),
        about: String::new(),
        features: (0..FEATURES).map(|i| Feature::real(&format!("f{i}"), Bounds::OPEN).optional()).collect(),
        outputs: vec![Output::new("y", Bounds::OPEN)],
    }
}

fn linear_params() -> LinearParams {
    LinearParams {
        link: Link::Identity,
        intercepts: vec![0.25],
        weights: vec![(0..FEATURES).map(|i| 0.1 * (i as f64 + 1.0)).collect()],
        impute: vec![0.5; FEATURES],
    }
}

fn row(cells: &[f64]) -> Row {
    cells.iter().enumerate().map(|(i, v)| (format!("f{i}"), *v)).collect()
}

fn bench_model<E: Evaluate>(c: &mut Criterion, name: &str, module: &str, params: E::Params)
where
    E::Params: Clone,
{
    let runtime = Runtime::new().unwrap();
    let loose = Runtime::with_config(RuntimeConfig { canonical_nans: false, ..RuntimeConfig::default() }).unwrap();
    let blob = encode_params(&Packaged { contract: contract(), params: params.clone() });
    let warm = load(&runtime, &guest(module), &blob, ModelOptions::default());
    let fresh = load(&runtime, &guest(module), &blob, ModelOptions { isolation: Isolation::FreshPerCall, ..Default::default() });
    assert_eq!(fresh.prime_state(), &PrimeState::Primed);
    let unprimed = load(&runtime, &guest(module), &blob, ModelOptions { isolation: Isolation::FreshPerCall, priming: Priming::Off, ..Default::default() });
    let uncanonical = load(&loose, &guest(module), &blob, ModelOptions::default());
    let native = E::build(params).unwrap();
    let cells = random_cells(3, BATCH, FEATURES, 0.0);
    let one = row(&cells[..FEATURES]);

    let mut g = c.benchmark_group(name);
    g.throughput(Throughput::Elements(1));
    g.bench_function("single_warm", |b| b.iter(|| black_box(warm.score(std::slice::from_ref(black_box(&one))).unwrap())));
    g.bench_function("single_fresh", |b| b.iter(|| black_box(fresh.score(std::slice::from_ref(black_box(&one))).unwrap())));
    g.bench_function("single_fresh_unprimed", |b| b.iter(|| black_box(unprimed.score(std::slice::from_ref(black_box(&one))).unwrap())));
    // Two threads sharing one model: time per call at full load (half the
    // single-thread figure would be perfect scaling on two cores).
    for (label, model) in [("single_warm_2_threads", &warm), ("single_fresh_2_threads", &fresh)] {
        g.bench_function(label, |b| {
            b.iter_custom(|iters| {
                let started = std::time::Instant::now();
                std::thread::scope(|s| {
                    for _ in 0..2 {
                        s.spawn(|| {
                            for _ in 0..iters.div_ceil(2) {
                                black_box(model.score(std::slice::from_ref(&one)).unwrap());
                            }
                        });
                    }
                });
                started.elapsed()
            })
        });
    }
    g.bench_function("native_single", |b| {
        let mut out = Array2::zeros((1, 1));
        b.iter(|| {
            native.evaluate(ArrayView2::from_shape((1, FEATURES), black_box(&cells[..FEATURES])).unwrap(), out.view_mut());
            black_box(out[[0, 0]])
        })
    });
    g.throughput(Throughput::Elements(BATCH as u64));
    g.bench_with_input(BenchmarkId::new("batch", BATCH), &cells, |b, cells| {
        b.iter(|| black_box(warm.score_cells(BATCH, black_box(cells)).unwrap()))
    });
    g.bench_with_input(BenchmarkId::new("batch_nans_as_is", BATCH), &cells, |b, cells| {
        b.iter(|| black_box(uncanonical.score_cells(BATCH, black_box(cells)).unwrap()))
    });
    g.bench_with_input(BenchmarkId::new("native", BATCH), &cells, |b, cells| {
        let mut out = Array2::zeros((BATCH, 1));
        b.iter(|| {
            native.evaluate(ArrayView2::from_shape((BATCH, FEATURES), black_box(cells)).unwrap(), out.view_mut());
            black_box(out[[0, 0]])
        })
    });
    g.finish();
}

fn benches(c: &mut Criterion) {
    bench_model::<Linear>(c, "linear", "paddock-model-linear", linear_params());
    bench_model::<Trees>(c, "trees", "paddock-model-trees", random_ensemble(5, 200, 6, FEATURES as u32));
}

criterion_group!(scoring, benches);
criterion_main!(scoring);

