//! Models written in Python and JavaScript (models/charge-taper), built by
//! componentize-py 0.25.1 and componentize-js 0.23.0 (`cargo xtask guests`)
//! and run under the same contract and limits as Rust guests, with a WASI
//! policy; the same model in Rust (no WASI) alongside.
//!
//! Outside reference: SciPy. `tests/guests/taper_reference.py` integrates
//! the model's taper numerically with `scipy.integrate.quad` (QUADPACK) over
//! `numpy.interp`; the guests work the same integral out in closed form.
//! The reference file records the SciPy, NumPy and Python versions (1.17.1,
//! 2.4.6, 3.11.7 when this was written), and each message repeats them.

use paddock_host::{LimitHit, Limits, LoadError, Model, ModelOptions, Row, Runtime, ScoreError, WasiPolicy};
use paddock_tests::{foreign_artifact, load_foreign, root};
use serde_json::Value;

const GUESTS: [&str; 2] = ["charge-taper-py", "charge-taper-js"];

fn reference() -> Value {
    let path = root().join("target/paddock/reference/taper-reference.json");
    let text = std::fs::read(&path)
        .unwrap_or_else(|e| panic!("{}: {e}. Run `cargo xtask guests` (it writes SciPy's values)", path.display()));
    serde_json::from_slice(&text).unwrap()
}

/// The WASI policy's defaults, and a minute-long deadline: a call to a
/// Python or JavaScript guest on a machine busy with other builds must
/// not be late.
fn wasi() -> ModelOptions {
    ModelOptions { wasi: Some(WasiPolicy::default()), ..paddock_tests::unhurried() }
}

fn rows(r: &Value) -> Vec<Row> {
    let features: Vec<String> =
        r["features"].as_array().unwrap().iter().map(|f| f.as_str().unwrap().to_owned()).collect();
    r["rows"]
        .as_array()
        .unwrap()
        .iter()
        .map(|row| features.iter().cloned().zip(row.as_array().unwrap().iter().map(|v| v.as_f64().unwrap())).collect())
        .collect()
}

fn score_all(model: &Model, rows: &[Row]) -> Vec<f64> {
    model.score(rows).unwrap().values().to_vec()
}

#[test]
fn python_and_javascript_guests_match_scipy_within_1e_9_relative() {
    let r = reference();
    let rows = rows(&r);
    let want: Vec<f64> = r["minutes"].as_array().unwrap().iter().map(|v| v.as_f64().unwrap()).collect();
    assert_eq!(rows.len(), 308);
    let runtime = Runtime::new().unwrap();
    let mut answers = Vec::new();
    for name in ["charge-taper-rs", "charge-taper-py", "charge-taper-js"] {
        // The Rust guest imports nothing and needs no WASI policy.
        let options = if name.ends_with("-rs") { ModelOptions::default() } else { wasi() };
        let model = load_foreign(&runtime, name, options).unwrap();
        let got = score_all(&model, &rows);
        // None of them explains: the Rust model implements no
        // contributions and says so; the others, built for the `estimator`
        // world, have no such export.
        let why = model.explain(&rows[..1]).unwrap_err();
        match name {
            "charge-taper-rs" => assert_eq!(
                why.to_string(),
                "model `charge-taper` cannot give contributions: this model gives no contributions"
            ),
            _ => assert!(matches!(why, paddock_host::ExplainError::NoExport { .. }), "{name}: {why}"),
        }
        let mut worst = 0.0f64;
        for (i, (g, w)) in got.iter().zip(&want).enumerate() {
            if *w == 0.0 {
                assert_eq!(*g, 0.0, "{name} row {i}: scipy says 0 minutes");
            } else {
                let rel = ((g - w) / w).abs();
                assert!(rel <= 1e-9, "{name} row {i}: {g} vs scipy {w} (rel {rel:e}; {})", r["versions"]);
                worst = worst.max(rel);
            }
        }
        eprintln!("{name}: worst relative error against scipy {worst:e} over {} rows", rows.len());
        answers.push(got);
    }
    // Three languages, one formula: they agree far closer than with the
    // numerical reference (their log() may differ in the last bit).
    for other in [1, 2] {
        for (i, (a, b)) in answers[0].iter().zip(&answers[other]).enumerate() {
            assert!((a - b).abs() <= 1e-12 * a.abs().max(1.0), "row {i}: rust {a} vs guest {other}: {b}");
        }
    }
}

#[test]
fn without_a_wasi_policy_foreign_guests_are_refused_naming_their_imports() {
    let runtime = Runtime::new().unwrap();
    for name in GUESTS {
        match load_foreign(&runtime, name, ModelOptions::default()) {
            Err(LoadError::WasiImports(imports)) => {
                assert!(imports.iter().any(|i| i.starts_with("wasi:filesystem/preopens@0.2.")), "{name}: {imports:?}");
                assert!(imports.iter().all(|i| i.starts_with("wasi:")), "{name}: {imports:?}");
                let message = LoadError::WasiImports(imports.clone()).to_string();
                assert!(message.contains("`wasi:cli/stdout@0.2.") && message.contains("WASI policy"), "{message}");
            }
            other => panic!("{name}: expected a refusal naming the WASI imports, got {other:?}"),
        }
    }
}

#[test]
fn foreign_guests_are_held_to_the_same_contract_and_limits() {
    let runtime = Runtime::new().unwrap();
    for name in GUESTS {
        let model = load_foreign(&runtime, name, wasi()).unwrap();
        let c = model.contract();
        assert_eq!((c.name.as_str(), c.version.as_str()), ("charge-taper", "1.0.0"), "{name}");
        // A row outside the contract never reaches the guest.
        let bad = Row::new()
            .with("charger_kw", 11.0)
            .with("battery_kwh", 64.0)
            .with("soc_start", 1.5)
            .with("soc_target", 0.9);
        match model.score(&[bad]) {
            Err(ScoreError::InvalidRows { errors }) => {
                assert_eq!(errors.len(), 1);
                assert!(errors[0].to_string().contains("soc_start"), "{name}: {}", errors[0]);
            }
            other => panic!("{name}: expected the row refused by the contract, got {other:?}"),
        }
        // A memory cap below what the engine's first instance needs stops it at start.
        let tight = ModelOptions { limits: Limits { memory_bytes: 4 << 20, ..Limits::default() }, ..wasi() };
        match load_foreign(&runtime, name, tight) {
            Err(LoadError::Start(e)) => assert!(e.to_string().contains("memory"), "{name}: {e}"),
            other => panic!("{name}: expected the 4 MiB memory cap to stop the start, got {other:?}"),
        }
        // Rows per call bind as for any model.
        let few = ModelOptions { limits: Limits { rows_per_call: 2, ..Limits::default() }, ..wasi() };
        let model = load_foreign(&runtime, name, few).unwrap();
        let row = Row::new()
            .with("charger_kw", 11.0)
            .with("battery_kwh", 64.0)
            .with("soc_start", 0.2)
            .with("soc_target", 0.9);
        match model.score(&vec![row; 3]) {
            Err(ScoreError::TooManyRows(LimitHit::Rows { limit: 2, actual: 3 })) => {}
            other => panic!("{name}: expected the row limit, got {other:?}"),
        }
    }
    // The artifacts carry SciPy's values as checks, and pass them.
    for name in GUESTS {
        let checks = foreign_artifact(name).checks().unwrap().expect("packed with checks");
        assert!(checks.source.contains("scipy.integrate.quad"), "{}", checks.source);
        let model = load_foreign(&runtime, name, wasi()).unwrap();
        let report = model.run_checks(&checks).unwrap();
        assert!(report.ok(), "{name}: {report:?}");
    }
}
