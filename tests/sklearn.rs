//! Fidelity against scikit-learn (an outside reference): models trained by
//! scikit-learn, exported to the built-in estimators' params, packed with the
//! generic guests and scored in the sandbox, must give scikit-learn's own
//! predictions within 1e-9 relative.
//!
//! Dataset: the diabetes data shipped inside scikit-learn
//! (`sklearn.datasets.load_diabetes`; Efron et al., Annals of Statistics 2004),
//! all 442 rows. The reference models and predictions come from
//! `tests/sklearn/export.py`, which `cargo xtask test` runs with the pinned
//! scikit-learn (1.9.1; the exported files record the exact scikit-learn,
//! numpy and Python versions, and each assertion message repeats them).

use paddock_guest::{Branch, LinearParams, Link, Node, Packaged, SplitRule, Tree, TreesParams, encode_params};
use paddock_host::{Model, Row, Runtime};
use paddock_tests::{guest, load, open_contract, root, unhurried};
use serde_json::Value;

/// The export for one model, written by tests/sklearn/export.py.
fn export(name: &str) -> Value {
    let path = root().join("target/paddock/sklearn").join(format!("{name}.json"));
    let text = std::fs::read(&path).unwrap_or_else(|e| {
        panic!(
            "{}: {e}. Export the scikit-learn references first: `python3 tests/sklearn/export.py target/paddock/sklearn` \
             (needs scikit-learn; `cargo xtask test` does both)",
            path.display()
        )
    });
    serde_json::from_slice(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

/// The exported rows, as named rows.
fn rows(e: &Value, features: &[String]) -> Vec<Row> {
    e["rows"].as_array().unwrap().iter().map(|r| features.iter().cloned().zip(floats(r)).collect()).collect()
}

/// Scores every exported row in one call and returns the largest relative
/// difference from scikit-learn's predictions.
fn worst_relative_error(model: &Model, e: &Value, features: &[String]) -> f64 {
    let rows = rows(e, features);
    let want = floats(&e["predictions"]);
    assert_eq!(rows.len(), 442);
    let got = model.score(&rows).unwrap();
    (0..rows.len()).map(|i| ((got.values_at(i)[0] - want[i]) / want[i]).abs()).fold(0.0, f64::max)
}

fn versions(e: &Value) -> String {
    format!("{} on {}", e["model"], e["versions"])
}

#[test]
fn linear_regression_from_scikit_learn_matches_its_predictions_within_1e_9() {
    let e = export("linear");
    let features: Vec<String> =
        e["features"].as_array().unwrap().iter().map(|f| f.as_str().unwrap().to_owned()).collect();
    let params = LinearParams {
        link: Link::Identity,
        intercepts: vec![e["intercept"].as_f64().unwrap()],
        weights: vec![floats(&e["coef"])],
        impute: vec![],
    };
    let blob =
        encode_params(&Packaged { contract: open_contract("diabetes-linear", &features, "progression"), params });
    let model = load(&Runtime::new().unwrap(), &guest("paddock-model-linear"), &blob, unhurried());
    let worst = worst_relative_error(&model, &e, &features);
    assert!(worst <= 1e-9, "largest relative error {worst:e} ({})", versions(&e));
    eprintln!("LinearRegression: largest relative error {worst:e} over 442 rows ({})", versions(&e));
}

#[test]
fn gradient_boosting_from_scikit_learn_matches_its_predictions_within_1e_9() {
    let e = export("boosted");
    let features: Vec<String> =
        e["features"].as_array().unwrap().iter().map(|f| f.as_str().unwrap().to_owned()).collect();
    let rate = e["learning_rate"].as_f64().unwrap();
    // scikit-learn adds `learning_rate × leaf value` to the initial
    // prediction tree by tree, and sends a row left when
    // `x <= threshold`: the same products, added in the same order.
    let trees = e["trees"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| {
            let left = t["children_left"].as_array().unwrap();
            let right = t["children_right"].as_array().unwrap();
            let feature = t["feature"].as_array().unwrap();
            let threshold = floats(&t["threshold"]);
            let value = floats(&t["value"]);
            let nodes = (0..left.len())
                .map(|i| match left[i].as_i64().unwrap() {
                    -1 => Node::Leaf { value: rate * value[i] },
                    l => Node::Split {
                        feature: feature[i].as_u64().unwrap() as u32,
                        threshold: threshold[i],
                        left: l as u32,
                        right: right[i].as_u64().unwrap() as u32,
                        missing: Branch::Left,
                    },
                })
                .collect();
            Tree { output: 0, nodes }
        })
        .collect();
    let params =
        TreesParams::boosted(features.len() as u32, e["init"].as_f64().unwrap(), SplitRule::LessOrEqual, trees);
    let blob =
        encode_params(&Packaged { contract: open_contract("diabetes-boosted", &features, "progression"), params });
    let model = load(&Runtime::new().unwrap(), &guest("paddock-model-trees"), &blob, unhurried());
    let worst = worst_relative_error(&model, &e, &features);
    assert!(worst <= 1e-9, "largest relative error {worst:e} ({})", versions(&e));
    eprintln!("GradientBoostingRegressor: largest relative error {worst:e} over 442 rows ({})", versions(&e));
}

/// Largest ONNX error allowed, relative to the prediction's size (at least
/// 1). skl2onnx exports float32 graphs: inputs and weights are rounded to 24
/// significant bits (6e-8 relative each) and the graph sums float32
/// products, so the ONNX answer differs from scikit-learn's float64 one by
/// a few 1e-7 relative on this data. 1e-5 (about 170 float32 steps) leaves
/// headroom for the order of the sums and still catches any real mistake: a
/// wrong weight or feature order moves predictions by 1e-3 or more.
const FLOAT32_TOLERANCE: f64 = 1e-5;

/// Packs an skl2onnx export with the ONNX evaluator guest, as
/// `paddock pack MODEL.onnx --manifest MODEL.toml` does.
fn onnx_model(name: &str) -> Model {
    let dir = root().join("target/paddock/sklearn");
    let read = |ext: &str| std::fs::read(dir.join(format!("{name}.{ext}"))).unwrap();
    let manifest = paddock_import::onnx_graph::read_manifest(&String::from_utf8(read("toml")).unwrap()).unwrap();
    let params = paddock_import::onnx_graph::params(&manifest, &read("onnx")).unwrap();
    load(&Runtime::new().unwrap(), &guest("paddock-model-onnx"), &params, unhurried())
}

#[test]
fn onnx_exports_from_skl2onnx_match_scikit_learn_within_float32_tolerance() {
    for (name, op) in [("onnx-linear", "ONNX-ML LinearRegressor"), ("onnx-mlp", "MatMul, Add, Relu")] {
        let e = export(name);
        let model = onnx_model(name);
        let features: Vec<String> = model.contract().features.iter().map(|f| f.name.clone()).collect();
        assert_eq!(features, e["features"].as_array().unwrap().iter().map(|f| f.as_str().unwrap()).collect::<Vec<_>>());
        let rows = rows(&e, &features);
        let want = floats(&e["predictions"]);
        let got = model.score(&rows).unwrap();
        let mut worst = 0.0f64;
        for (i, w) in want.iter().enumerate() {
            let err = (got.values_at(i)[0] - w).abs() / w.abs().max(1.0);
            assert!(
                err <= FLOAT32_TOLERANCE,
                "{name} row {i}: {} vs scikit-learn {w} ({})",
                got.values_at(i)[0],
                versions(&e)
            );
            worst = worst.max(err);
        }
        // Not bit-equal either: the graph really ran in float32.
        assert!(worst > 0.0, "{name}: identical to float64 scikit-learn, so the graph did not run in float32");
        eprintln!("{name} ({op}): largest relative error {worst:e} over 442 rows ({})", versions(&e));
    }
}
