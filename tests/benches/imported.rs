//! What imported models cost: a 500-tree LightGBM model, a 300-tree
//! XGBoost model and a deep LightGBM model (255 leaves per tree) scoring a
//! batch of 1 024 rows and single rows in the sandbox, against the same
//! params evaluated natively and against the toolkit's own single-threaded
//! predict (timed by `scripts/bench_imports.py` in the same run), and the
//! time to import and pack a 1 000-tree model. Then the same batch explained (per-row contributions) in the sandbox, natively
//! and by the toolkit's own contribution call, and scoring with the covers
//! contributions need against scoring the same trees without them.
//!
//! `python3 scripts/bench_imports.py` trains the models (scikit-learn's
//! Friedman #1 generator, 20 000 rows), times the toolkits, runs
//! `cargo bench -p paddock-tests --bench imported` and writes its table
//! into BENCHMARKS.md. Under `cargo test` the bench runs once on the
//! fidelity exports (`target/paddock/imports`) to show it still works.

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::time::Duration;

use paddock_guest::ndarray::{Array2, ArrayView2};
use paddock_guest::{Evaluate, Trees};
use paddock_host::{Artifact, Model, ModelOptions, Runtime};
use paddock_import::{EstimatorParams, Format, import};
use paddock_tests::{guest, root, time};
use serde_json::Value;

fn read(path: &Path) -> Vec<u8> {
    std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}; run `python3 scripts/bench_imports.py`", path.display()))
}

/// Imports a model file and packs it with the trees guest.
fn packed(path: &Path) -> (Vec<u8>, Trees, usize) {
    let (imported, trees) = imported(path);
    let count = trees.trees.len();
    let native = Trees::new(trees).unwrap();
    (paddock_host::pack(&guest("paddock-model-trees"), Some(&imported.params()), None).unwrap(), native, count)
}

fn imported(path: &Path) -> (paddock_import::Imported, paddock_guest::TreesParams) {
    let bytes = read(path);
    let format = Format::recognise(&bytes).expect("a model file");
    let imported = import(&bytes, format, &path.display().to_string(), None).unwrap();
    let EstimatorParams::Trees(trees) = imported.estimator.clone() else {
        panic!("{}: not a tree ensemble", path.display())
    };
    (imported, trees)
}

/// The same model packed without its covers: what scoring cost before
/// models carried them.
fn packed_without_covers(path: &Path) -> Vec<u8> {
    let (mut imported, mut trees) = imported(path);
    trees.covers.clear();
    imported.estimator = EstimatorParams::Trees(trees);
    paddock_host::pack(&guest("paddock-model-trees"), Some(&imported.params()), None).unwrap()
}

/// Loads an artifact with deadlines a whole batch's contributions fit in.
fn loaded(runtime: &Runtime, artifact: Vec<u8>) -> Model {
    let limits = paddock_host::Limits {
        deadline: Duration::from_secs(60),
        init_deadline: Duration::from_secs(60),
        ..paddock_host::Limits::default()
    };
    let options = ModelOptions { limits, ..ModelOptions::default() };
    Model::load_with(runtime, Artifact::from_bytes(artifact, u64::MAX).unwrap(), options).unwrap()
}

fn median(mut v: Vec<Duration>) -> Duration {
    v.sort();
    v[v.len() / 2]
}

struct Measured {
    name: String,
    trees: usize,
    sandbox: Duration,
    native: Duration,
    /// One row at a time (median over the batch's rows in turn).
    row_sandbox: Duration,
    row_native: Duration,
    /// Scoring the same trees packed without covers, alternating with
    /// `sandbox`; the contributions' figures, when asked for.
    without_covers: Duration,
    explained: Duration,
    explained_native: Duration,
    /// Explained in a runtime that leaves NaNs as the processor makes them.
    explained_plain_nans: Duration,
}

fn measure(
    runtimes: [&Runtime; 2],
    name: &str,
    path: &Path,
    cells: &[f64],
    rows: usize,
    reps: (usize, usize),
) -> Measured {
    let [runtime, plain] = runtimes;
    let (artifact, native, trees) = packed(path);
    let plain = loaded(plain, artifact.clone());
    let model = loaded(runtime, artifact);
    let bare = loaded(runtime, packed_without_covers(path));
    let features = model.contract().features.len();
    let outputs = model.contract().outputs.len();
    assert_eq!(cells.len(), rows * features, "{name}: rows do not fit the model");
    // Same bits both ways, or the comparison means nothing.
    let in_sandbox = model.score_cells_unchecked(rows, cells).unwrap();
    let mut out = Array2::zeros((rows, outputs));
    native.evaluate(ArrayView2::from_shape((rows, features), cells).unwrap(), out.view_mut());
    assert!(
        in_sandbox.values().iter().zip(out.iter()).all(|(a, b)| a.to_bits() == b.to_bits()),
        "{name}: sandbox and native differ"
    );
    // Alternating, so drift on a shared machine hits all alike.
    let (scoring, explaining) = reps;
    let (mut sandbox, mut native_times, mut bare_times) = (Vec::new(), Vec::new(), Vec::new());
    for _ in 0..scoring {
        sandbox.push(time(1, || model.score_cells_unchecked(rows, black_box(cells)).unwrap()));
        native_times.push(time(1, || {
            native.evaluate(ArrayView2::from_shape((rows, features), black_box(cells)).unwrap(), out.view_mut());
            out[[0, 0]]
        }));
        bare_times.push(time(1, || bare.score_cells_unchecked(rows, black_box(cells)).unwrap()));
    }
    // Single rows one after another, each way in a run of its own (as the
    // toolkit's are timed): alternating would leave each a cold cache.
    let one_by_one =
        || (0..rows).cycle().take(scoring * ROWS_PER_BATCH_REP).map(|r| &cells[r * features..][..features]);
    let row_sandbox: Vec<Duration> =
        one_by_one().map(|row| time(1, || model.score_cells_unchecked(1, black_box(row)).unwrap())).collect();
    let mut one = Array2::zeros((1, outputs));
    let row_native: Vec<Duration> = one_by_one()
        .map(|row| {
            time(1, || {
                native.evaluate(ArrayView2::from_shape((1, features), black_box(row)).unwrap(), one.view_mut());
                one[[0, 0]]
            })
        })
        .collect();
    let (sandbox, native_time, row_sandbox, row_native, without_covers) =
        (median(sandbox), median(native_times), median(row_sandbox), median(row_native), median(bare_times));
    let mut measured = Measured {
        name: name.to_owned(),
        trees,
        sandbox,
        native: native_time,
        row_sandbox,
        row_native,
        without_covers,
        explained: Duration::ZERO,
        explained_native: Duration::ZERO,
        explained_plain_nans: Duration::ZERO,
    };
    if explaining == 0 {
        return measured;
    }
    // Contributions: the same numbers both ways, then timed.
    let blocks = outputs * (features + 2);
    let mut why = Array2::zeros((rows, blocks));
    let view = ArrayView2::from_shape((rows, features), cells).unwrap();
    native.explain(view, why.view_mut()).unwrap();
    let sandboxed = model.explain_cells_unchecked(rows, cells).unwrap();
    for i in 0..rows {
        let a = sandboxed.of(i, 0);
        let got: Vec<f64> = a.features.iter().copied().chain([a.baseline, a.margin]).collect();
        assert!(
            got.iter().zip(why.row(i)).all(|(g, w)| g.to_bits() == w.to_bits()),
            "{name} row {}: sandbox and native contributions differ",
            i + 1
        );
    }
    let (mut explained, mut explained_native, mut explained_plain) = (Vec::new(), Vec::new(), Vec::new());
    for _ in 0..explaining {
        explained.push(time(1, || model.explain_cells_unchecked(rows, black_box(cells)).unwrap()));
        explained_plain.push(time(1, || plain.explain_cells_unchecked(rows, black_box(cells)).unwrap()));
        explained_native.push(time(1, || {
            native.explain(ArrayView2::from_shape((rows, features), black_box(cells)).unwrap(), why.view_mut()).unwrap()
        }));
    }
    measured.explained = median(explained);
    measured.explained_native = median(explained_native);
    measured.explained_plain_nans = median(explained_plain);
    measured
}

/// Single rows timed per batch timed (the batch's rows in turn).
const ROWS_PER_BATCH_REP: usize = 20;

/// What counting drift costs a warm call: the helper's profiled diabetes
/// model (60 trees, 10 features; tests/imports/export.py) loaded twice from
/// the same artifact, counting on and off, scoring the same typed rows
/// alternately (median of `reps` per batch size). (rows, on, off) per size.
fn drift_cost(runtime: &Runtime, reps: usize) -> Vec<(usize, Duration, Duration)> {
    let dir = root().join("target/paddock/imports");
    let bytes = read(&dir.join("lgb-diabetes-profiled.txt"));
    let imported = import(&bytes, Format::LightgbmText, "lgb-diabetes-profiled.txt", None).unwrap();
    let profile = paddock_host::Profile::from_json(&read(&dir.join("lgb-diabetes-profiled.profile.json"))).unwrap();
    let wasm = guest(imported.guest());
    let params = imported.params();
    let parts =
        paddock_host::Parts { wasm: &wasm, params: Some(&params), profile: Some(&profile), ..Default::default() };
    let artifact = Artifact::from_bytes(paddock_host::pack_imported(parts).unwrap(), u64::MAX).unwrap();
    let on = Model::load_with(runtime, artifact.clone(), ModelOptions::default()).unwrap();
    let off = Model::load_with(runtime, artifact, ModelOptions { drift: None, ..ModelOptions::default() }).unwrap();
    let checks: Value = serde_json::from_slice(&read(&dir.join("lgb-diabetes-profiled.checks.json"))).unwrap();
    let rows: Vec<paddock_host::Row> = checks["cases"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| paddock_host::Row::from_json(c["row"].clone()).unwrap())
        .collect();
    let batch: Vec<paddock_host::Row> = rows.iter().cycle().take(64).cloned().collect();
    [(1, &rows[..1]), (64, &batch[..])]
        .into_iter()
        .map(|(n, rows)| {
            let (mut with, mut without) = (Vec::with_capacity(reps), Vec::with_capacity(reps));
            for _ in 0..reps {
                with.push(time(1, || on.score(black_box(rows)).unwrap()));
                without.push(time(1, || off.score(black_box(rows)).unwrap()));
            }
            assert!(on.drift().unwrap().fields.iter().all(|f| f.count > 0), "counting on counts");
            assert!(off.drift().is_none(), "counting off counts nothing");
            (n, median(with), median(without))
        })
        .collect()
}

fn cells_of(value: &Value) -> (Vec<f64>, usize) {
    let rows = value.as_array().unwrap();
    let cells =
        rows.iter().flat_map(|r| r.as_array().unwrap().iter().map(|v| v.as_f64().unwrap_or(f64::NAN))).collect();
    (cells, rows.len())
}

fn main() {
    let full = std::env::args().any(|a| a == "--bench");
    let runtime = Runtime::new().unwrap();
    let plain_nans =
        Runtime::with_config(paddock_host::RuntimeConfig { canonical_nans: false, ..Default::default() }).unwrap();
    let runtimes = [&runtime, &plain_nans];
    if !full {
        // Under `cargo test`: once, on a fidelity export's rows.
        let dir = root().join("target/paddock/imports");
        let checks: Value = serde_json::from_slice(&read(&dir.join("lgb-diabetes-regression.checks.json"))).unwrap();
        let bytes = read(&dir.join("lgb-diabetes-regression.txt"));
        let imported = import(&bytes, Format::LightgbmText, "lgb-diabetes-regression.txt", None).unwrap();
        let order: Vec<String> = imported.contract.features.iter().map(|f| f.name.clone()).collect();
        let cases = checks["cases"].as_array().unwrap();
        let cells: Vec<f64> = cases
            .iter()
            .flat_map(|c| order.iter().map(move |f| c["row"].get(f).and_then(Value::as_f64).unwrap_or(f64::NAN)))
            .collect();
        let m = measure(runtimes, "lgb", &dir.join("lgb-diabetes-regression.txt"), &cells, cases.len(), (1, 1));
        eprintln!(
            "imports bench runs: {} trees, sandbox {:?}, native {:?}, explained {:?}",
            m.trees, m.sandbox, m.native, m.explained
        );
        let cost = drift_cost(&runtime, 1);
        eprintln!("drift counting runs: {cost:?}");
        return;
    }
    let dir: PathBuf = root().join("target/paddock/bench-imports");
    let rows: Value = serde_json::from_slice(&read(&dir.join("rows.json"))).unwrap();
    let (cells, n) = cells_of(&rows);
    let toolkit: Value = serde_json::from_slice(&read(&dir.join("toolkit.json"))).unwrap();
    let reps = (101, 5);
    let results = [
        measure(runtimes, "LightGBM", &dir.join("lgb-500.txt"), &cells, n, reps),
        measure(runtimes, "XGBoost", &dir.join("xgb-300.json"), &cells, n, reps),
        // Scoring only: the deep model's contributions are not part of the comparison.
        measure(runtimes, "LightGBM deep", &dir.join("lgb-deep.txt"), &cells, n, (reps.0, 0)),
    ];
    let pack_path = dir.join("lgb-1000.txt");
    let pack = time(5, || packed(&pack_path));
    let (artifact, _, pack_trees) = packed(&pack_path);
    let load = time(3, || {
        Model::load_with(&runtime, Artifact::from_bytes(artifact.clone(), u64::MAX).unwrap(), ModelOptions::default())
            .unwrap()
    });
    let us = |d: Duration| format!("{:.0}", d.as_secs_f64() * 1e6);
    // Sandbox, native, their ratio, the toolkit's time (µs) and paddock's speed against it.
    let against = |sandbox: Duration, native: Duration, theirs: f64| {
        format!(
            "{} µs | {} µs | {:.2}× native speed | {theirs:.0} µs | {:.2}×",
            us(sandbox),
            us(native),
            native.as_secs_f64() / sandbox.as_secs_f64(),
            theirs / (sandbox.as_secs_f64() * 1e6)
        )
    };
    let ratio = |sandbox: Duration, theirs_ns: f64| theirs_ns / (sandbox.as_secs_f64() * 1e9);
    let status = |ratio: f64, aim: f64| if ratio >= aim { "met" } else { "not met" };
    let mut table = vec![
        format!(
            "| model | trees | sandbox, {n} rows | native, same params | sandbox / native | toolkit's own predict, 1 thread | paddock's speed vs the toolkit's | ≥ 1.5× | one row: sandbox | native | toolkit's own | paddock's speed vs the toolkit's | ≥ 2× |"
        ),
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|".to_owned(),
    ];
    for m in &results {
        let theirs = &toolkit[m.name.as_str()];
        let (batch_ns, row_ns) = (theirs["batch_ns"].as_f64().unwrap(), theirs["row_ns"].as_f64().unwrap());
        let (batch, row) = (ratio(m.sandbox, batch_ns), ratio(m.row_sandbox, row_ns));
        table.push(format!(
            "| {} {} | {} | {} | {} | {:.2} µs | {:.2} µs | {:.1} µs | {row:.2}× | {} |",
            m.name,
            theirs["version"].as_str().unwrap_or("?"),
            m.trees,
            against(m.sandbox, m.native, batch_ns / 1e3),
            status(batch, 1.5),
            m.row_sandbox.as_secs_f64() * 1e6,
            m.row_native.as_secs_f64() * 1e6,
            row_ns / 1e3,
            status(row, 2.0),
        ));
    }
    table.push(String::new());
    table.push(format!(
        "| model | explained in the sandbox, {n} rows | natively, same code | sandbox / native | toolkit's own contributions, 1 thread | paddock's speed vs the toolkit's | sandbox, NaNs not canonicalized | scoring with covers / without |"
    ));
    table.push("|---|---|---|---|---|---|---|---|".to_owned());
    for m in results.iter().filter(|m| m.explained > Duration::ZERO) {
        let theirs = toolkit[m.name.as_str()]["contrib_ns"].as_f64().unwrap() / 1e3;
        table.push(format!(
            "| {} {} trees | {} | {} µs: {:.2}× native speed | {:.2} ({} vs {} µs) |",
            m.name,
            m.trees,
            against(m.explained, m.explained_native, theirs),
            us(m.explained_plain_nans),
            m.explained_native.as_secs_f64() / m.explained_plain_nans.as_secs_f64(),
            m.sandbox.as_secs_f64() / m.without_covers.as_secs_f64(),
            us(m.sandbox),
            us(m.without_covers),
        ));
    }
    table.push(String::new());
    table.push(
        "| drift counting: warm call, 60-tree profiled model (10 features, 1 output) | counting on | off | on / off |"
            .to_owned(),
    );
    table.push("|---|---|---|---|".to_owned());
    for (rows, on, off) in drift_cost(&runtime, 2001) {
        table.push(format!(
            "| {rows} row{} | {:.2} µs | {:.2} µs | {:.3} |",
            if rows == 1 { "" } else { "s" },
            on.as_secs_f64() * 1e6,
            off.as_secs_f64() * 1e6,
            on.as_secs_f64() / off.as_secs_f64()
        ));
    }
    table.push(String::new());
    table.push(format!(
        "Import and pack a {pack_trees}-tree LightGBM model ({} KiB text): {:.0} ms (median of 5); loading the artifact (compile, instance, `init`): {:.0} ms (median of 3).",
        read(&pack_path).len() / 1024,
        pack.as_secs_f64() * 1e3,
        load.as_secs_f64() * 1e3
    ));
    std::fs::write(root().join("target/paddock/bench-imported.md"), table.join("\n") + "\n").unwrap();
    println!("{}", table.join("\n"));
}
