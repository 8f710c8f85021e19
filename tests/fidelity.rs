//! The sandbox computes what outside references compute.
//!
//! - Linear: smartcore's `LinearRegression` fitted on the diabetes dataset
//!   (Efron, Hastie, Johnstone & Tibshirani, "Least Angle Regression",
//!   Annals of Statistics 2004; the copy shipped in smartcore's `datasets`).
//! - Linear, two rows per SIMD register in the sandbox: bit for bit against
//!   the sum `b + w₁x₁ + w₂x₂ + …` written out in this file, one row at a
//!   time in feature order.
//! - Trees: the sandbox against native evaluation of the same params, bit
//!   for bit, and a small ensemble against values computed by hand.
//! - A hand-written WAT model, no SDK: the contract is language-neutral.

use paddock_guest::ndarray::{Array2, ArrayView2};
use paddock_guest::{
    Branch, Evaluate, LinearParams, Link, Node, Packaged, SplitRule, Tree, Trees, TreesParams, encode_params,
};
use paddock_host::{Model, Row, Runtime};
use paddock_tests::{demo_artifact, fixture, guest, load, open_contract, random_cells, random_ensemble, unhurried};
use smartcore::linalg::basic::arrays::Array;
use smartcore::linalg::basic::matrix::DenseMatrix;
use smartcore::linear::linear_regression::LinearRegression;

#[test]
fn linear_regression_on_diabetes_matches_smartcore_within_1e_12() {
    let data = smartcore::dataset::diabetes::load_dataset();
    let (n, k) = (data.num_samples, data.num_features);
    let rows: Vec<Vec<f64>> = (0..n).map(|i| (0..k).map(|j| f64::from(data.data[i * k + j])).collect()).collect();
    let y: Vec<f64> = data.target.iter().map(|&v| f64::from(v)).collect();
    let x = DenseMatrix::from_2d_vec(&rows).unwrap();
    let fit = LinearRegression::<f64, f64, DenseMatrix<f64>, Vec<f64>>::fit(&x, &y, Default::default()).unwrap();
    let reference = fit.predict(&x).unwrap();
    let weights: Vec<f64> = (0..k).map(|j| *fit.coefficients().get((j, 0))).collect();

    let names: Vec<String> = data.feature_names.iter().map(|s| s.to_lowercase()).collect();
    let params = encode_params(&Packaged {
        contract: open_contract("diabetes-progression", &names, "progression"),
        params: LinearParams {
            link: Link::Identity,
            intercepts: vec![*fit.intercept()],
            weights: vec![weights],
            impute: vec![],
        },
    });
    let runtime = Runtime::new().unwrap();
    let model = load(&runtime, &guest("paddock-model-linear"), &params, unhurried());
    let requests: Vec<Row> = rows.iter().map(|r| names.iter().cloned().zip(r.iter().copied()).collect()).collect();
    let estimates = model.score(&requests).unwrap();
    assert_eq!(estimates.row_count(), n);
    let worst = reference
        .iter()
        .enumerate()
        .map(|(i, want)| ((estimates.values_at(i)[0] - want) / want).abs())
        .fold(0.0, f64::max);
    eprintln!("diabetes: largest relative difference from smartcore {worst:e}");
    assert!(worst <= 1e-12, "largest relative difference from smartcore: {worst:e}");
}

/// The sandbox scores eight rows per loop turn, two per SIMD register; the
/// sums must still be the plain left-to-right sums, bit for bit: with
/// absent inputs imputed, with row counts that leave a remainder, and with
/// several outputs.
#[test]
fn linear_models_in_the_sandbox_equal_the_written_out_sum_bit_for_bit() {
    let features = 11;
    let names: Vec<String> = (0..features).map(|i| format!("f{i}")).collect();
    let runtime = Runtime::new().unwrap();
    let coefficients = random_cells(5, 3, features + 2, 0.0);
    let mut contract = open_contract("lanes", &names, "a");
    contract.features.iter_mut().for_each(|f| f.required = false);
    contract.outputs.push(contract.outputs[0].clone());
    contract.outputs[1].name = "b".into();
    for impute in [true, false] {
        let weights: Vec<Vec<f64>> = (0..2)
            .map(|k| coefficients[k * (features + 2)..][..features].iter().map(|w| w * 7.0 - 3.0).collect())
            .collect();
        let intercepts = vec![coefficients[features] * 100.0, -coefficients[features + 1]];
        let fill: Vec<f64> = if impute { coefficients[2 * (features + 2)..][..features].to_vec() } else { vec![] };
        let params = LinearParams {
            link: Link::Identity,
            intercepts: intercepts.clone(),
            weights: weights.clone(),
            impute: fill.clone(),
        };
        let blob = encode_params(&Packaged { contract: contract.clone(), params });
        let model = load(&runtime, &guest("paddock-model-linear"), &blob, unhurried());
        for rows in [1, 7, 8, 9, 1021] {
            let cells = random_cells(rows as u64, rows, features, if impute { 0.2 } else { 0.0 });
            let sandboxed = model.score_cells_unchecked(rows, &cells).unwrap();
            for r in 0..rows {
                let x = &cells[r * features..][..features];
                for k in 0..2 {
                    let mut sum = intercepts[k];
                    for j in 0..features {
                        let v = if x[j].is_nan() { fill[j] } else { x[j] };
                        sum += weights[k][j] * v;
                    }
                    let have = sandboxed.values_at(r)[k];
                    assert_eq!(
                        have.to_bits(),
                        sum.to_bits(),
                        "{rows} rows, impute {impute}: row {r} output {k}: {have} against {sum}"
                    );
                }
            }
        }
    }
}

fn native(params: &TreesParams, rows: usize, cells: &[f64]) -> Vec<f64> {
    let trees = Trees::new(params.clone()).unwrap();
    let view = ArrayView2::from_shape((rows, params.features as usize), cells).unwrap();
    let mut out = Array2::zeros((rows, 1));
    trees.evaluate(view, out.view_mut());
    out.into_raw_vec_and_offset().0
}

#[test]
fn tree_ensemble_in_the_sandbox_equals_native_bit_for_bit() {
    let features = 9;
    let params = random_ensemble(7, 200, 6, features);
    let names: Vec<String> = (0..features).map(|i| format!("f{i}")).collect();
    let mut named = open_contract("random-forest", &names, "score");
    named.features.iter_mut().for_each(|f| f.required = false);
    let blob = encode_params(&Packaged { contract: named, params: params.clone() });
    let runtime = Runtime::new().unwrap();
    let model = load(&runtime, &guest("paddock-model-trees"), &blob, unhurried());
    let rows = 2000;
    let cells = random_cells(11, rows, features as usize, 0.1);
    let sandboxed = model.score_cells_unchecked(rows, &cells).unwrap();
    let expected = native(&params, rows, &cells);
    for (i, (a, b)) in sandboxed.values().iter().zip(&expected).enumerate() {
        assert_eq!(a.to_bits(), b.to_bits(), "row {i}: sandbox {a} native {b}");
    }
}

/// base 10; stump A adds 1 if x0 < 5 else 2 (absent → right); stump B adds
/// 0.5 if x1 < 0 else −0.25 (absent → left). By hand: (4, −1) → 11.5;
/// (5, 0) → 11.75; (absent, absent) → 12.5; (−3, 9) → 10.75.
#[test]
fn small_ensemble_in_the_sandbox_matches_hand_computed_values() {
    let stump = |feature, threshold, lo, hi, missing| Tree {
        output: 0,
        nodes: vec![
            Node::Split { feature, threshold, left: 1, right: 2, missing },
            Node::Leaf { value: lo },
            Node::Leaf { value: hi },
        ],
    };
    let params = TreesParams::boosted(
        2,
        10.0,
        SplitRule::Less,
        vec![stump(0, 5.0, 1.0, 2.0, Branch::Right), stump(1, 0.0, 0.5, -0.25, Branch::Left)],
    );
    let mut named = open_contract("stumps", &["a".into(), "b".into()], "y");
    named.features.iter_mut().for_each(|f| f.required = false);
    let runtime = Runtime::new().unwrap();
    let model = load(
        &runtime,
        &guest("paddock-model-trees"),
        &encode_params(&Packaged { contract: named, params }),
        unhurried(),
    );
    let rows = vec![
        Row::new().with("a", 4.0).with("b", -1.0),
        Row::new().with("a", 5.0).with("b", 0.0),
        Row::new(),
        Row::new().with("a", -3.0).with("b", 9i64),
    ];
    assert_eq!(model.score(&rows).unwrap().values(), &[11.5, 11.75, 12.5, 10.75]);
}

#[test]
fn hand_written_wat_model_scores_through_the_same_contract() {
    let runtime = Runtime::new().unwrap();
    let model = load(&runtime, &fixture("affine.wat"), &[], unhurried());
    let c = model.contract();
    assert_eq!((c.name.as_str(), c.version.as_str()), ("affine", "1.0.0"));
    assert_eq!(c.features.len(), 1);
    assert_eq!(c.features[0].name, "x");
    assert_eq!(c.outputs[0].name, "y");
    let rows = [Row::new().with("x", 1.5), Row::new().with("x", -2i64), Row::new().with("x", 1e6)];
    assert_eq!(model.score(&rows).unwrap().values(), &[4.0, -3.0, 2_000_001.0]);
}

#[test]
fn demo_artifacts_reproduce_their_training_outputs_exactly() {
    let runtime = Runtime::new().unwrap();
    for name in ["charge-minutes", "overstay-risk"] {
        let artifact = paddock_host::Artifact::read(&demo_artifact(name), u64::MAX).unwrap();
        let model = Model::load(&runtime, artifact).unwrap();
        let carried = model.artifact().checks().unwrap().expect("demo artifacts carry checks");
        assert!(carried.cases.len() >= 20);
        let report = model.run_checks(&carried).unwrap();
        assert!(report.ok(), "{name}: {report:?}");
        assert_eq!(report.max_abs_error, 0.0, "{name}: same code, same params, same bits");
    }
}
