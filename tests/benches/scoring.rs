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
//! - `native_1024` / `native_single`: the same estimator code natively;
//! - `native_by_hand_1024`: a careful native implementation of the same
//!   arithmetic written here, apart from the estimator code (the baseline
//!   is whichever native is faster, so the sandbox is never measured
//!   against a slow native).

use std::hint::black_box;

use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use paddock_guest::ndarray::{Array2, ArrayView2};
use paddock_guest::{
    Bounds, Branch, Contract, Evaluate, Feature, Linear, LinearParams, Link, Node, Output, Packaged, Trees,
    TreesParams, encode_params,
};
use paddock_host::sandbox::model::Isolation;
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

/// The linear model by hand: four rows per loop turn, each with its own
/// sum, features in order (a known feature count, so the compiler unrolls
/// it), absent inputs imputed.
fn linear_by_hand(p: &LinearParams, cells: &[f64], out: &mut [f64]) {
    let (w, fill, b) = (&p.weights[0][..FEATURES], &p.impute[..FEATURES], p.intercepts[0]);
    for (x, o) in cells.chunks_exact(4 * FEATURES).zip(out.chunks_exact_mut(4)) {
        let mut acc = [b; 4];
        for j in 0..FEATURES {
            for (r, a) in acc.iter_mut().enumerate() {
                let v = x[r * FEATURES + j];
                *a += w[j] * if v.is_nan() { fill[j] } else { v };
            }
        }
        o.copy_from_slice(&acc);
    }
}

/// The ensemble by hand: each row walks each tree's nodes as the params
/// hold them, summing leaves in tree order.
fn trees_by_hand(p: &TreesParams, cells: &[f64], out: &mut [f64]) {
    for (x, o) in cells.chunks_exact(FEATURES).zip(out.iter_mut()) {
        let mut sum = p.base[0];
        for tree in &p.trees {
            let mut i = 0;
            sum += loop {
                match tree.nodes[i] {
                    Node::Leaf { value } => break value,
                    Node::Split { feature, threshold, left, right, missing } => {
                        let v = x[feature as usize];
                        let go_left = if v.is_nan() { missing == Branch::Left } else { v < threshold };
                        i = if go_left { left } else { right } as usize;
                    }
                    _ => unreachable!("random ensembles hold numeric splits and leaves"),
                }
            };
        }
        *o = sum;
    }
}

fn row(cells: &[f64]) -> Row {
    cells.iter().enumerate().map(|(i, v)| (format!("f{i}"), *v)).collect()
}

fn bench_model<E: Evaluate>(
    c: &mut Criterion,
    name: &str,
    module: &str,
    params: E::Params,
    by_hand: fn(&E::Params, &[f64], &mut [f64]),
) where
    E::Params: Clone,
{
    let runtime = Runtime::new().unwrap();
    let loose = Runtime::with_config(RuntimeConfig { canonical_nans: false, ..RuntimeConfig::default() }).unwrap();
    let blob = encode_params(&Packaged { contract: contract(), params: params.clone() });
    let warm = load(&runtime, &guest(module), &blob, ModelOptions::default());
    let fresh = load(
        &runtime,
        &guest(module),
        &blob,
        ModelOptions { isolation: Isolation::FreshPerCall, ..Default::default() },
    );
    assert_eq!(fresh.prime_state(), &PrimeState::Primed);
    let unprimed = load(
        &runtime,
        &guest(module),
        &blob,
        ModelOptions { isolation: Isolation::FreshPerCall, priming: Priming::Off, ..Default::default() },
    );
    let uncanonical = load(&loose, &guest(module), &blob, ModelOptions::default());
    let native = E::build(params.clone()).unwrap();
    let cells = random_cells(3, BATCH, FEATURES, 0.0);
    // Both natives compute the sandbox's bits, or neither is a baseline.
    let mut sdk = Array2::zeros((BATCH, 1));
    native.evaluate(ArrayView2::from_shape((BATCH, FEATURES), &cells).unwrap(), sdk.view_mut());
    let mut hand = vec![0.0; BATCH];
    by_hand(&params, &cells, &mut hand);
    let sandboxed = warm.score_cells_unchecked(BATCH, &cells).unwrap();
    for (r, ((s, h), b)) in sdk.iter().zip(&hand).zip(sandboxed.values()).enumerate() {
        assert!(
            s.to_bits() == h.to_bits() && s.to_bits() == b.to_bits(),
            "{name} row {r}: {s} native, {h} by hand, {b} sandboxed"
        );
    }
    let one = row(&cells[..FEATURES]);

    let mut g = c.benchmark_group(name);
    g.throughput(Throughput::Elements(1));
    g.bench_function("single_warm", |b| {
        b.iter(|| black_box(warm.score(std::slice::from_ref(black_box(&one))).unwrap()))
    });
    g.bench_function("single_fresh", |b| {
        b.iter(|| black_box(fresh.score(std::slice::from_ref(black_box(&one))).unwrap()))
    });
    g.bench_function("single_fresh_unprimed", |b| {
        b.iter(|| black_box(unprimed.score(std::slice::from_ref(black_box(&one))).unwrap()))
    });
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
            native.evaluate(
                ArrayView2::from_shape((1, FEATURES), black_box(&cells[..FEATURES])).unwrap(),
                out.view_mut(),
            );
            black_box(out[[0, 0]])
        })
    });
    g.throughput(Throughput::Elements(BATCH as u64));
    g.bench_with_input(BenchmarkId::new("batch", BATCH), &cells, |b, cells| {
        b.iter(|| black_box(warm.score_cells_unchecked(BATCH, black_box(cells)).unwrap()))
    });
    g.bench_with_input(BenchmarkId::new("batch_nans_as_is", BATCH), &cells, |b, cells| {
        b.iter(|| black_box(uncanonical.score_cells_unchecked(BATCH, black_box(cells)).unwrap()))
    });
    g.bench_with_input(BenchmarkId::new("native", BATCH), &cells, |b, cells| {
        let mut out = Array2::zeros((BATCH, 1));
        b.iter(|| {
            native.evaluate(ArrayView2::from_shape((BATCH, FEATURES), black_box(cells)).unwrap(), out.view_mut());
            black_box(out[[0, 0]])
        })
    });
    g.bench_with_input(BenchmarkId::new("native_by_hand", BATCH), &cells, |b, cells| {
        let mut out = vec![0.0; BATCH];
        b.iter(|| {
            by_hand(&params, black_box(cells), &mut out);
            black_box(out[0])
        })
    });
    g.finish();
}

fn benches(c: &mut Criterion) {
    bench_model::<Linear>(c, "linear", "paddock-model-linear", linear_params(), linear_by_hand);
    bench_model::<Trees>(c, "trees", "paddock-model-trees", random_ensemble(5, 200, 6, FEATURES as u32), trees_by_hand);
}

criterion_group!(scoring, benches);
criterion_main!(scoring);
