//! Fidelity of the importers against the toolkits themselves (outside
//! references): XGBoost and LightGBM models trained on datasets shipped
//! inside scikit-learn (diabetes, breast cancer, wine, iris; some cells
//! made absent), saved by the toolkit (`save_model`), imported, packed with
//! the generic trees guest and scored in the sandbox, must give the
//! toolkit's own `Booster.predict` on every row, bit for bit.
//!
//! `tests/imports/export.py` trains the models and writes each file with a
//! checks file of every row and the toolkit's prediction (through
//! `handoff/`, the notebook helper); `cargo xtask test` runs it with the
//! pinned XGBoost (3.2.x) and LightGBM (4.7.0). Each checks file records
//! the versions, and each assertion message repeats them.

use std::path::PathBuf;

use paddock_guest::{Combine, Node};
use paddock_host::{Checks, Model, Runtime};
use paddock_import::{EstimatorParams, Format, ImportError, Overrides, import};
use paddock_tests::{guest, load, root, unhurried};

/// Every model the export writes: a test fails if one is missing.
const CASES: [&str; 21] = [
    "xgb-diabetes-squarederror",
    "xgb-diabetes-poisson",
    "xgb-diabetes-gamma",
    "xgb-diabetes-tweedie",
    "xgb-diabetes-absoluteerror",
    "xgb-cancer-logistic",
    "xgb-cancer-reglogistic",
    "xgb-cancer-logitraw",
    "xgb-wine-softprob",
    "xgb-iris-softmax",
    "lgb-diabetes-regression",
    "lgb-diabetes-poisson",
    "lgb-diabetes-gamma",
    "lgb-diabetes-tweedie",
    "lgb-diabetes-forest",
    "lgb-diabetes-missing-none",
    "lgb-diabetes-zero-missing",
    "lgb-cancer-binary",
    "lgb-cancer-binary-sigmoid",
    "lgb-wine-categorical",
    "lgb-iris-one-vs-rest",
];

fn dir() -> PathBuf {
    root().join("target/paddock/imports")
}

/// The model file and checks of one case.
fn case(name: &str) -> (PathBuf, Vec<u8>, Checks) {
    let model = ["json", "txt"].iter().map(|ext| dir().join(format!("{name}.{ext}"))).find(|p| p.exists()).unwrap_or_else(|| {
        panic!(
            "{name}: no model file in {}. Export the references first: `python3 tests/imports/export.py target/paddock/imports` \
             (needs xgboost, lightgbm and ./handoff; `cargo xtask test` does it)",
            dir().display()
        )
    });
    let bytes = std::fs::read(&model).unwrap();
    let checks = Checks::from_json(&std::fs::read(dir().join(format!("{name}.checks.json"))).unwrap()).unwrap();
    (model, bytes, checks)
}

fn imported_model(runtime: &Runtime, path: &std::path::Path, bytes: &[u8]) -> Model {
    let format = Format::recognise(bytes).unwrap_or_else(|| panic!("{}: format not recognised", path.display()));
    let imported = import(bytes, format, &path.file_name().unwrap().to_string_lossy(), None).unwrap();
    load(runtime, &guest(imported.guest()), &imported.params(), unhurried())
}

#[test]
fn imported_models_give_the_toolkits_predictions_bit_for_bit() {
    let runtime = Runtime::new().unwrap();
    let mut summary = Vec::new();
    for name in CASES {
        let (path, bytes, checks) = case(name);
        let model = imported_model(&runtime, &path, &bytes);
        let rows: Vec<_> = checks.cases.iter().map(|c| c.row.clone()).collect();
        let got = model.score(&rows).unwrap_or_else(|e| panic!("{name}: {e}"));
        let outputs: Vec<String> = model.contract().outputs.iter().map(|o| o.name.clone()).collect();
        let mut compared = 0;
        for (i, c) in checks.cases.iter().enumerate() {
            for (k, output) in outputs.iter().enumerate() {
                let want = c.expect[output];
                let have = got.values_at(i)[k];
                assert!(
                    have.to_bits() == want.to_bits(),
                    "{name} row {} {output}: paddock {have:e}, toolkit {want:e} ({})",
                    i + 1,
                    checks.source
                );
                compared += 1;
            }
        }
        summary.push(format!("{name}: {compared} outputs over {} rows", checks.cases.len()));
    }
    eprintln!("bit for bit:\n  {}", summary.join("\n  "));
}

/// The checks the notebook helper writes pass when `paddock pack` (here its
/// library calls) runs them, and the origin record says where the contract
/// came from.
#[test]
fn handed_off_checks_pass_and_the_origin_is_recorded() {
    let (path, bytes, checks) = case("lgb-wine-categorical");
    let imported = import(&bytes, Format::LightgbmText, "lgb-wine-categorical.txt", None).unwrap();
    let artifact = paddock_host::pack_imported(paddock_host::Parts {
        wasm: &guest("paddock-model-trees"),
        params: Some(&imported.params()),
        checks: Some(&checks),
        origin: Some(&imported.origin.to_map()),
        profile: None,
    })
    .unwrap();
    let artifact = paddock_host::Artifact::from_bytes(artifact, u64::MAX).unwrap();
    let origin = paddock_import::Origin::from_map(artifact.origin().unwrap().unwrap()).unwrap();
    assert_eq!(origin.format, "LightGBM text model", "{}", path.display());
    assert!(origin.task.starts_with("multiclass: one probability per class"), "{}", origin.task);
    let band = origin.contract.iter().find(|s| s.part == "feature alcohol_band").expect("the categorical feature");
    assert!(band.from.contains("category code"), "{}", band.from);
    assert_eq!(
        origin.contract.iter().find(|s| s.part == "name").unwrap().from,
        "the file's name (set `name` in the overrides to change it)"
    );
    let model = Model::load(&Runtime::new().unwrap(), artifact).unwrap();
    let report = model.run_checks(&checks).unwrap();
    assert!(report.ok(), "{report:?}");
    assert_eq!(report.cases, 178);
}

/// Overrides rename and narrow; overrides naming nothing are refused.
#[test]
fn overrides_change_the_files_contract_and_say_so() {
    let (_, bytes, _) = case("xgb-diabetes-squarederror");
    let overrides = Overrides::from_toml(
        r#"
name = "progression"
version = "1.2.0"
[features.bmi]
name = "body_mass_index"
required = true
[outputs.value]
name = "progression"
min = 0.0
"#,
    )
    .unwrap();
    let imported = import(&bytes, Format::XgboostJson, "m.json", Some(&overrides)).unwrap();
    let c = &imported.contract;
    assert_eq!((c.name.as_str(), c.version.as_str()), ("progression", "1.2.0"));
    let bmi = c.features.iter().find(|f| f.name == "body_mass_index").unwrap();
    assert!(bmi.required);
    assert_eq!(c.outputs[0].name, "progression");
    assert_eq!(c.outputs[0].bounds.min, Some(0.0));
    let from = &imported.origin.contract.iter().find(|s| s.part.starts_with("feature body_mass_index")).unwrap().from;
    assert!(from.contains("required, name from the overrides"), "{from}");
    let wrong = Overrides::from_toml("[features.bmx]\nunit = \"kg\"\n").unwrap();
    let err = import(&bytes, Format::XgboostJson, "m.json", Some(&wrong)).unwrap_err();
    assert!(matches!(err, ImportError::Overrides { .. }), "{err}");
    assert!(err.to_string().contains("features.bmx: the file has no feature `bmx`; it has age, sex, bmi"), "{err}");
}

/// The file's own (pre-order) id of a tree's node, from an error message
/// `tree T node N`.
fn tree_and_node(message: &str) -> (usize, usize) {
    let at = message.find("tree ").expect("names a tree");
    let mut words = message[at..].split([' ', ':']);
    let t = words.nth(1).unwrap().parse().unwrap();
    assert_eq!(words.next(), Some("node"), "{message}");
    let n = words.next().unwrap().parse().unwrap();
    (t, n)
}

/// XGBoost's categorical splits are refused, naming a tree and node that
/// really is a categorical split in the file (XGBoost 3.2 with
/// `enable_categorical`, written by the export).
#[test]
fn refusals_name_the_tree_and_node() {
    let path = dir().join("refused-xgb-categorical.json");
    let bytes =
        std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e} (run tests/imports/export.py)", path.display()));
    let err = import(&bytes, Format::XgboostJson, "refused-xgb-categorical.json", None).unwrap_err();
    assert!(matches!(err, ImportError::Unsupported { .. }), "{err}");
    let message = err.to_string();
    assert!(message.starts_with("refused-xgb-categorical.json: tree "), "{message}");
    assert!(message.contains("a categorical split is not supported; encode the categories"), "{message}");
    let (t, n) = tree_and_node(&message);
    let doc: serde_json::Value = serde_json::from_slice(&bytes).unwrap();
    assert_eq!(doc["learner"]["gradient_booster"]["model"]["trees"][t]["split_type"][n], 1, "{message}");

    let bytes = std::fs::read(dir().join("refused-lgb-linear.txt")).unwrap();
    let err = import(&bytes, Format::LightgbmText, "refused-lgb-linear.txt", None).unwrap_err();
    let message = err.to_string();
    assert!(message.starts_with("refused-lgb-linear.txt: tree 0 (line "), "{message}");
    assert!(
        message.ends_with("a linear tree (linear_tree) is not supported; train with linear_tree=false"),
        "{message}"
    );

    // One-vs-rest probabilities (scikit-learn's OneVsRestClassifier: a
    // logistic per class, then normalised) are refused naming the node; a
    // graph with no tree ensemble or linear model goes to the ONNX evaluator.
    let ovr = std::fs::read(dir().join("refused-skl-one-vs-rest.onnx")).unwrap();
    let err = import(&ovr, Format::SklearnOnnx, "refused-skl-one-vs-rest.onnx", None).unwrap_err().to_string();
    assert!(err.starts_with("refused-skl-one-vs-rest.onnx: node `"), "{err}");
    assert!(err.contains("is not supported; ") && err.contains("one-vs-rest"), "{err}");
    let mlp = root().join("target/paddock/sklearn/onnx-mlp.onnx");
    let graph = std::fs::read(&mlp).unwrap_or_else(|e| panic!("{}: {e} (run tests/sklearn/export.py)", mlp.display()));
    assert_eq!(
        Format::recognise(&graph),
        None,
        "a graph without a tree ensemble or linear model goes to the ONNX evaluator"
    );
    let err = import(&graph, Format::SklearnOnnx, "onnx-mlp.onnx", None).unwrap_err().to_string();
    assert!(
        err.contains("(no tree ensemble or linear model) is not supported; pack it as an ONNX graph with a manifest (`InputKind::OnnxGraph`;"),
        "{err}"
    );

    // A file in the other format names the format it looks like.
    let err = import(&bytes, Format::XgboostJson, "refused-lgb-linear.txt", None).unwrap_err();
    assert_eq!(
        err.to_string(),
        "refused-lgb-linear.txt: not the XGBoost JSON model asked for; it looks like a LightGBM text model"
    );
}

/// Every scikit-learn model the export hands off through skl2onnx.
const SKLEARN: [&str; 17] = [
    "skl-cancer-forest-missing",
    "skl-diabetes-tree",
    "skl-diabetes-forest",
    "skl-diabetes-extra",
    "skl-diabetes-boosted",
    "skl-diabetes-hist",
    "skl-diabetes-linear",
    "skl-diabetes-ridge",
    "skl-cancer-tree",
    "skl-cancer-boosted",
    "skl-cancer-hist",
    "skl-cancer-logistic",
    "skl-iris-forest",
    "skl-iris-boosted",
    "skl-iris-logistic",
    "skl-wine-extra",
    "skl-wine-hist",
];

/// How far a score (before the link) may be from scikit-learn's, for a
/// row: the file holds leaves and coefficients in float32, each within a
/// relative 2⁻²⁴ of scikit-learn's double.
/// - Trees: (max|base| + Σ over trees of its largest |leaf|) × 2⁻²⁴, divided
///   by the tree count for an average. A wrong decision moves a score by a
///   whole leaf, far beyond that.
/// - Linear: (|intercept| + Σ |weightᵢ·xᵢ|) × 2⁻²³ (2⁻²⁴ for the float32
///   coefficients, as much again for the double sums).
fn score_bound(estimator: &EstimatorParams, row: &[f64]) -> f64 {
    match estimator {
        EstimatorParams::Trees(p) => {
            let largest = |t: &paddock_guest::Tree| {
                t.nodes
                    .iter()
                    .map(|n| match n {
                        Node::Leaf { value } => value.abs(),
                        Node::Leaves { first } => {
                            p.vectors[*first as usize..][..p.base.len()].iter().fold(0.0, |m, v| v.abs().max(m))
                        }
                        _ => 0.0,
                    })
                    .fold(0.0, f64::max)
            };
            let leaves: f64 = p.trees.iter().map(largest).sum();
            let spread = if p.combine == Combine::Mean { leaves / p.trees.len() as f64 } else { leaves };
            (p.base.iter().fold(0.0, |m, b| b.abs().max(m)) + spread) * 2f64.powi(-24)
        }
        EstimatorParams::Linear(p) => p
            .weights
            .iter()
            .zip(&p.intercepts)
            .map(|(w, b)| (b.abs() + w.iter().zip(row).map(|(w, x)| (w * x).abs()).sum::<f64>()) * 2f64.powi(-23))
            .fold(0.0, f64::max),
        _ => unreachable!("scikit-learn files import to trees or linear models"),
    }
}

/// scikit-learn tree ensembles and linear models exported by skl2onnx,
/// imported instead of run by an ONNX runtime, against scikit-learn's own
/// `predict`, `predict_proba` (outside references) on every row of the
/// diabetes, breast cancer, iris and wine data (HistGradientBoosting with
/// absent cells, which it routes as it learned). Decisions are exact:
/// skl2onnx rounds tree thresholds down to float32 and scikit-learn's
/// trees compare float32 inputs; HistGradientBoosting is exported with a
/// double input, and the notebook helper writes its thresholds, leaves and
/// baseline as doubles (skl2onnx rounds them to float32; a value between
/// a threshold and its rounding went the other way on the diabetes data),
/// so its scores are scikit-learn's bit for bit. The others' scores may
/// differ by [`score_bound`] ε; through a logistic link a probability p
/// moves by at most p·ε, through a softmax by p·2ε (each score moves by
/// ε), plus the link's own rounding: scikit-learn's softmax calls numpy's
/// `exp`, which on a CPU with AVX-512 is numpy's own and not glibc's, a
/// last-bit difference now and then (2⁻⁴⁹ relative allowed).
#[test]
fn scikit_learn_models_from_skl2onnx_give_its_predictions_within_float32_rounding() {
    let runtime = Runtime::new().unwrap();
    for name in SKLEARN {
        let path = dir().join(format!("{name}.onnx"));
        let bytes =
            std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e} (run tests/imports/export.py)", path.display()));
        assert_eq!(Format::recognise(&bytes), Some(Format::SklearnOnnx), "{name}");
        // The helper names the columns in overrides when it knows them.
        let overrides =
            std::fs::read_to_string(dir().join(format!("{name}.toml"))).ok().map(|t| Overrides::from_toml(&t).unwrap());
        let imported = import(&bytes, Format::SklearnOnnx, &format!("{name}.onnx"), overrides.as_ref()).unwrap();
        if name == "skl-diabetes-linear" {
            assert_eq!(imported.contract.features[2].name, "bmi", "the helper's overrides name the columns");
        }
        if name.contains("forest") && name.contains("cancer") || name == "skl-iris-forest" {
            // Averaged votes: probabilities, bounded to 1 plus the leaves' float32 rounding.
            let max = imported.contract.outputs[0].bounds.max.unwrap();
            assert!(max > 1.0 && max < 1.0 + 1e-6, "{name}: {:?}", imported.contract.outputs[0].bounds);
            assert_eq!(imported.contract.outputs[0].bounds.min, Some(0.0));
        }
        let linked = match &imported.estimator {
            EstimatorParams::Trees(p) => p.link != paddock_guest::OutputLink::Identity,
            EstimatorParams::Linear(p) => p.link != paddock_guest::Link::Identity,
            _ => unreachable!(),
        };
        // The helper's checks use the file's names (x0, x1…); renamed as `paddock pack` renames them.
        let checks = Checks::from_json(&std::fs::read(dir().join(format!("{name}.checks.json"))).unwrap()).unwrap();
        let checks = match &overrides {
            Some(o) => checks.renamed(&o.feature_renames(), &o.output_renames()),
            None => checks,
        };
        let model = load(&runtime, &guest(imported.guest()), &imported.params(), unhurried());
        let order: Vec<String> = imported.contract.features.iter().map(|f| f.name.clone()).collect();
        let outputs: Vec<String> = imported.contract.outputs.iter().map(|o| o.name.clone()).collect();
        let rows: Vec<_> = checks.cases.iter().map(|c| c.row.clone()).collect();
        let got = model.score(&rows).unwrap_or_else(|e| panic!("{name}: {e}"));
        let (mut worst, mut widest) = (0.0f64, 0.0f64);
        for (i, c) in checks.cases.iter().enumerate() {
            let cell = |f: &String| match c.row.fields().iter().find(|(n, _)| n == f).map(|(_, v)| v) {
                Some(paddock_host::Value::Number(x)) => *x,
                Some(paddock_host::Value::Integer(x)) => *x as f64,
                _ => f64::NAN,
            };
            let cells: Vec<f64> = order.iter().map(cell).collect();
            let eps = if name.ends_with("-hist") { 0.0 } else { score_bound(&imported.estimator, &cells) };
            widest = widest.max(eps);
            for (k, output) in outputs.iter().enumerate() {
                let (have, want) = (got.values_at(i)[k], c.expect[output]);
                let bound = if linked { want.abs() * (2.0 * eps + 2f64.powi(-49)) } else { eps };
                assert!(
                    (have - want).abs() <= bound,
                    "{name} row {} {output}: paddock {have:e}, scikit-learn {want:e}, bound {bound:e} ({})",
                    i + 1,
                    checks.source
                );
                if want != 0.0 {
                    worst = worst.max((have - want).abs() / want.abs());
                }
            }
        }
        // The helper's checks, with the tolerance it derived from the same
        // rounding, pass when the model is scored against them.
        let report = model.run_checks(&checks).unwrap();
        assert!(report.ok(), "{name}: the handed-off checks fail: {report:?}");
        eprintln!(
            "{name}: largest relative difference {worst:.1e} over {} rows, score bound up to {widest:.1e} ({})",
            rows.len(),
            checks.source
        );
    }
}

/// A LightGBM model trained on a pandas DataFrame (scikit-learn's diabetes
/// data with a categorical column of text labels, an ordered category, a
/// nullable integer column with missing values; tests/imports/export.py)
/// and handed over with its columns in another order, its name and version:
/// the categorical feature takes the labels the file keeps
/// (`pandas_categorical`), the ordered one stays a number over its codes,
/// and the helper's checks — LightGBM's own `predict`, labels in the rows —
/// pass bit for bit.
#[test]
fn a_lightgbm_model_from_a_dataframe_takes_its_category_labels() {
    let name = "lgb-diabetes-pandas";
    let (path, bytes, checks) = case(name);
    let text = std::fs::read_to_string(dir().join(format!("{name}.toml"))).unwrap();
    let overrides = Overrides::from_toml(&text).unwrap();
    let imported = import(&bytes, Format::LightgbmText, &path.display().to_string(), Some(&overrides)).unwrap();
    let c = &imported.contract;
    assert_eq!((c.name.as_str(), c.version.as_str()), ("progression", "1.2.0"));
    let sex = c.features.iter().find(|f| f.name == "sex").unwrap();
    assert_eq!(sex.domain, paddock_guest::Domain::Label(vec!["sex_hi".into(), "sex_lo".into()]));
    let band = c.features.iter().find(|f| f.name == "age_band").unwrap();
    assert!(matches!(band.domain, paddock_guest::Domain::Real(_)), "{:?}", band.domain);
    let from = |part: &str| imported.origin.contract.iter().find(|p| p.part == part).unwrap().from.clone();
    assert!(from("feature sex").contains("category labels from pandas_categorical"), "{}", from("feature sex"));
    assert!(from("feature age_band").contains("an ordered category, split on its code (0 = band_a"));
    assert!(checks.cases.iter().any(|case| {
        case.row.fields().iter().any(|(n, v)| n == "sex" && *v == paddock_host::Value::Label("sex_lo".into()))
    }));
    let runtime = Runtime::new().unwrap();
    let model = load(&runtime, &guest(imported.guest()), &imported.params(), unhurried());
    let report = model.run_checks(&checks).unwrap();
    assert!(report.ok(), "{report:?}");
    assert_eq!((report.cases, report.max_abs_error), (442, 0.0));
}

/// How far apart two doubles are, in units in the last place.
fn ulps(a: f64, b: f64) -> u64 {
    if a == b {
        return 0;
    }
    let key = |v: f64| {
        let bits = v.to_bits() as i64;
        if bits < 0 { i64::MIN - bits } else { bits }
    };
    key(a).abs_diff(key(b))
}

/// The toolkit's contributions of one case (tests/imports/export.py): its
/// rows (absent cells NaN), its per-row contributions, and their source.
fn contributions_reference(name: &str) -> (paddock_guest::ndarray::Array2<f64>, Vec<Vec<f64>>, String) {
    let path = dir().join(format!("{name}.contrib.json"));
    let text = std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e} (run tests/imports/export.py)", path.display()));
    let doc: serde_json::Value = serde_json::from_slice(&text).unwrap();
    let x: Vec<Vec<f64>> = doc["x"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r.as_array().unwrap().iter().map(|v| v.as_f64().unwrap_or(f64::NAN)).collect())
        .collect();
    let contrib: Vec<Vec<f64>> = doc["contrib"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r.as_array().unwrap().iter().map(|v| v.as_f64().unwrap()).collect())
        .collect();
    let width = x[0].len();
    let rows = paddock_guest::ndarray::Array2::from_shape_vec((x.len(), width), x.concat()).unwrap();
    (rows, contrib, doc["source"].as_str().unwrap().to_owned())
}

/// Per-row contributions from imported covers, natively, against the
/// toolkits' own (outside reference: LightGBM 4.7 `pred_contrib=True`,
/// XGBoost 3.2 `pred_contribs=True`, on every row of each case; the cases
/// of `imported_models_give_the_toolkits_predictions_bit_for_bit` but the
/// one trained without absent values).
///
/// - LightGBM computes the same algorithm in double precision: within 4
///   units in the last place (the baseline's leaves are summed in another
///   order). Its random forest's contributions add up to its trees' total,
///   which its `predict` divides by their number (measured on this case:
///   the sum of a row's contributions is 60 times its prediction); ours add
///   up to the prediction, so the reference is divided by the tree count.
/// - XGBoost computes in single precision: each tree's terms are rounded
///   to float32 at every step and summed in float32 over the trees, so a
///   contribution may be off by about one float32 rounding (2⁻²⁴ relative)
///   per tree. Bound: trees per output × 2⁻²⁴ × the largest magnitude in
///   the row's contributions.
#[test]
fn contributions_are_the_toolkits_own() {
    use paddock_guest::Trees;
    let mut summary = Vec::new();
    for name in CASES.iter().filter(|n| **n != "lgb-diabetes-missing-none") {
        let (path, bytes, _) = case(name);
        let format = Format::recognise(&bytes).unwrap();
        let imported = import(&bytes, format, &path.file_name().unwrap().to_string_lossy(), None).unwrap();
        let EstimatorParams::Trees(params) = imported.estimator else { panic!("{name}: not trees") };
        assert!(!params.covers.is_empty(), "{name}: the file records no covers");
        let outputs = params.base.len();
        let per_output = (params.trees.len() / outputs) as f64;
        let forest = params.combine == Combine::Mean;
        let single = params.arithmetic == paddock_guest::Precision::Single;
        // The margin: the same trees, no link.
        let margins =
            Trees::new(paddock_guest::TreesParams { link: paddock_guest::OutputLink::Identity, ..params.clone() })
                .unwrap();
        let trees = Trees::new(params).unwrap();
        let (rows, want, source) = contributions_reference(name);
        let mut got = paddock_guest::ndarray::Array2::zeros((rows.nrows(), want[0].len()));
        trees.contributions(rows.view(), got.view_mut()).unwrap();
        let mut margin = paddock_guest::ndarray::Array2::from_elem((rows.nrows(), outputs), f64::NAN);
        paddock_guest::Evaluate::evaluate(&margins, rows.view(), margin.view_mut());
        // Baseline and contributions add up to the margin our own scoring
        // computes: to rounding in double precision (1e-12 relative per
        // tree), to float32 rounding per tree where the toolkit sums in float32.
        let blocks = want[0].len() / outputs;
        for i in 0..rows.nrows() {
            for k in 0..outputs {
                let block = got.row(i).to_vec()[k * blocks..(k + 1) * blocks].to_vec();
                let sum: f64 = block.iter().sum();
                let largest = block.iter().fold(0f64, |m, v| m.max(v.abs())).max(margin[[i, k]].abs());
                let bound = per_output * largest * if single { 2f64.powi(-24) } else { 1e-12 };
                assert!(
                    (sum - margin[[i, k]]).abs() <= bound,
                    "{name} row {} output {k}: contributions add up to {sum:e}, the margin is {:e}",
                    i + 1,
                    margin[[i, k]]
                );
            }
        }
        let (mut worst_ulps, mut worst_share) = (0u64, 0f64);
        for (i, w) in want.iter().enumerate() {
            let largest = w.iter().fold(0f64, |m, v| m.max(v.abs()));
            for (j, &v) in w.iter().enumerate() {
                let (g, v) = (got[[i, j]], if forest { v / per_output } else { v });
                if name.starts_with("lgb") {
                    let u = ulps(g, v);
                    worst_ulps = worst_ulps.max(u);
                    assert!(u <= 4, "{name} row {} column {j}: paddock {g:e}, {source} {v:e}: {u} ULP apart", i + 1);
                } else {
                    let bound = per_output * 2f64.powi(-24) * largest;
                    worst_share = worst_share.max((g - v).abs() / bound);
                    assert!(
                        (g - v).abs() <= bound,
                        "{name} row {} column {j}: paddock {g:e}, {source} {v:e}: {:e} apart, bound {bound:e}",
                        i + 1,
                        (g - v).abs()
                    );
                }
            }
        }
        summary.push(if name.starts_with("lgb") {
            format!("{name}: worst {worst_ulps} ULP ({source})")
        } else {
            format!("{name}: worst {:.0} % of the float32 bound ({source})", worst_share * 100.0)
        });
    }
    eprintln!("contributions:\n  {}", summary.join("\n  "));
}

/// scikit-learn's tree models through the notebook helper, which writes
/// each node's cover (`tree_.weighted_n_node_samples`, a HistGradientBoosting
/// node's `count`) into the ONNX file's hit rates: per-row contributions
/// against the `shap` package's path-dependent tree explainer on the same
/// fitted model (outside reference, PyPI `shap`; tests/imports/export.py),
/// on every row (the forest fitted with holes and HistGradientBoosting's
/// cases have absent cells, routed by each split's learned side).
///
/// Bound: the file keeps leaves in float32, `shap` reads scikit-learn's
/// doubles. A contribution is a weighted sum, weights summing to 1, of
/// differences between two averages of the tree's leaves, so rounding the
/// leaves moves it by at most twice the largest leaf rounding of each tree
/// summed: 2 × [`score_bound`] (HistGradientBoosting's leaves are written
/// as doubles: only the order of sums differs, 10⁻¹² relative per tree).
/// The baseline moves by one [`score_bound`]. Measured worst printed.
#[test]
fn scikit_learn_contributions_are_shaps() {
    use paddock_guest::Trees;
    let mut summary = Vec::new();
    for name in [
        "skl-diabetes-tree",
        "skl-diabetes-forest",
        "skl-diabetes-extra",
        "skl-diabetes-boosted",
        "skl-diabetes-hist",
        "skl-cancer-tree",
        "skl-cancer-boosted",
        "skl-cancer-hist",
        "skl-cancer-forest-missing",
        "skl-iris-forest",
        "skl-wine-extra",
        "skl-wine-hist",
    ] {
        let path = dir().join(format!("{name}.onnx"));
        let bytes =
            std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e} (run tests/imports/export.py)", path.display()));
        let imported = import(&bytes, Format::SklearnOnnx, name, None).unwrap();
        let EstimatorParams::Trees(params) = imported.estimator.clone() else { panic!("{name}: not trees") };
        assert!(!params.covers.is_empty(), "{name}: no covers ({})", imported.origin.estimator);
        let outputs = params.base.len();
        let per_output = (params.trees.len() / outputs) as f64;
        let trees = Trees::new(params).unwrap();
        let (rows, want, source) = contributions_reference(name);
        let mut got = paddock_guest::ndarray::Array2::zeros((rows.nrows(), want[0].len()));
        trees.contributions(rows.view(), got.view_mut()).unwrap();
        let blocks = rows.ncols() + 1;
        let mut worst = 0f64;
        for (i, w) in want.iter().enumerate() {
            let eps = score_bound(&imported.estimator, rows.row(i).as_slice().unwrap());
            let largest = w.iter().fold(0f64, |m, v| m.max(v.abs()));
            for (j, &v) in w.iter().enumerate() {
                let g = got[[i, j]];
                let arithmetic = per_output * largest * 1e-12;
                let rounding = if name.contains("hist") {
                    0.0
                } else if j % blocks == blocks - 1 {
                    eps
                } else {
                    2.0 * eps
                };
                let bound = rounding + arithmetic;
                worst = worst.max((g - v).abs() / bound);
                assert!(
                    (g - v).abs() <= bound,
                    "{name} row {} column {j}: paddock {g:e}, {source} {v:e}: {:e} apart, bound {bound:e}",
                    i + 1,
                    (g - v).abs()
                );
            }
        }
        summary.push(format!("{name}: worst {:.1} % of the bound ({source})", worst * 100.0));
    }
    eprintln!("contributions:\n  {}", summary.join("\n  "));
}

/// In the sandbox, an imported model's contributions are the native ones
/// bit for bit (the same guest code, compiled twice), each row's margin is
/// the one scoring computes, and the host's check that they add up passes.
/// Rows as the checks file gives them, encoded by the model's contract.
#[test]
fn contributions_in_the_sandbox_are_the_native_ones_bit_for_bit() {
    use paddock_guest::{Evaluate, Trees, ndarray::Array2};
    let runtime = Runtime::new().unwrap();
    for name in ["lgb-wine-categorical", "lgb-diabetes-forest", "xgb-iris-softmax", "lgb-cancer-binary"] {
        let (path, bytes, checks) = case(name);
        let model = imported_model(&runtime, &path, &bytes);
        let imported = import(&bytes, Format::recognise(&bytes).unwrap(), name, None).unwrap();
        let EstimatorParams::Trees(params) = imported.estimator else { panic!("{name}: not trees") };
        let trees = Trees::new(params).unwrap();
        let rows: Vec<_> = checks.cases.iter().map(|c| c.row.clone()).collect();
        let mut cells = Vec::new();
        for (i, row) in rows.iter().enumerate() {
            model.schema().encode_row(i + 1, row, &mut cells).unwrap();
        }
        let (features, outputs) = (model.contract().features.len(), model.contract().outputs.len());
        let cells = Array2::from_shape_vec((rows.len(), features), cells).unwrap();
        let mut native = Array2::from_elem((rows.len(), outputs * (features + 2)), f64::NAN);
        trees.explain(cells.view(), native.view_mut()).unwrap();
        let sandboxed = model.explain(&rows).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(sandboxed.row_count(), rows.len());
        let scores = model.score(&rows).unwrap();
        for i in 0..rows.len() {
            for k in 0..outputs {
                let a = sandboxed.of(i, k);
                let at = k * (features + 2);
                let want = native.row(i).to_vec();
                let got: Vec<f64> = a.features.iter().copied().chain([a.baseline, a.margin]).collect();
                assert!(
                    got.iter().zip(&want[at..at + features + 2]).all(|(g, w)| g.to_bits() == w.to_bits()),
                    "{name} row {} output {k}: sandbox {got:?}, native {:?}",
                    i + 1,
                    &want[at..at + features + 2]
                );
                // The margin through the model's link is its score.
                let link = sandboxed.scale(k);
                let value = scores.values_at(i)[k];
                if link == paddock_host::ContributionScale::Output {
                    assert_eq!(a.margin.to_bits(), value.to_bits(), "{name} row {} output {k}", i + 1);
                }
            }
        }
    }
}

/// A model that cannot explain says why, in a typed error: a random forest
/// as skl2onnx alone writes it (every node's hit rate 1.0, which are not
/// covers) imports and scores, its import says why it has no covers, and
/// asking it for contributions is declined naming the reason.
#[test]
fn a_model_without_covers_declines_naming_why() {
    let runtime = Runtime::new().unwrap();
    let path = dir().join("refused-skl-forest-no-covers.onnx");
    let bytes =
        std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e} (run tests/imports/export.py)", path.display()));
    let imported = import(&bytes, Format::SklearnOnnx, "refused-skl-forest-no-covers.onnx", None).unwrap();
    assert!(
        imported.origin.estimator.contains(
            "no covers: nodes_hitrates are not node covers (tree 0's node 0 in walk order: 1, its children's 2)"
        ),
        "{}",
        imported.origin.estimator
    );
    let model = imported_model(&runtime, &path, &bytes);
    let checks =
        Checks::from_json(&std::fs::read(dir().join("skl-cancer-forest-missing.checks.json")).unwrap()).unwrap();
    let row = checks.cases[0].row.clone();
    let scores = model.score(std::slice::from_ref(&row)).unwrap();
    let want = checks.cases[0].expect["probability"];
    assert!((scores.values_at(0)[0] - want).abs() < 1e-6, "scores as scikit-learn does");
    let err = model.explain(&[row]).unwrap_err();
    assert!(matches!(err, paddock_host::ExplainError::Declined { .. }), "{err:?}");
    assert!(err.to_string().ends_with("these trees carry no covers: contributions need each node's cover"), "{err}");
}

/// A linear model's contributions are weight × value per feature and the
/// intercept as the baseline (the uncentred form), against NumPy computing
/// the same from scikit-learn's own `coef_` and `intercept_` (outside
/// reference; tests/imports/export.py). skl2onnx stores the coefficients
/// as float32 and the importer reads the inputs as float32 too, so each
/// contribution may be off by two float32 roundings: 2⁻²³ of its size.
/// In the sandbox the answer is the native one, bit for bit.
#[test]
fn linear_contributions_are_weight_times_value() {
    use paddock_guest::{Evaluate, Linear, ndarray::Array2};
    let runtime = Runtime::new().unwrap();
    for name in ["skl-diabetes-linear", "skl-diabetes-ridge", "skl-cancer-logistic"] {
        let path = dir().join(format!("{name}.onnx"));
        let bytes =
            std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e} (run tests/imports/export.py)", path.display()));
        let imported = import(&bytes, Format::SklearnOnnx, name, None).unwrap();
        let EstimatorParams::Linear(params) = imported.estimator.clone() else { panic!("{name}: not linear") };
        let linear = Linear::new(params).unwrap();
        let (rows, want, source) = contributions_reference(name);
        let f = rows.ncols();
        let mut got = Array2::from_elem((rows.nrows(), f + 2), f64::NAN);
        linear.explain(rows.view(), got.view_mut()).unwrap();
        let mut worst = 0f64;
        for (i, w) in want.iter().enumerate() {
            for (j, &v) in w.iter().enumerate() {
                let g = got[[i, j]];
                let bound = 2f64.powi(-23) * v.abs();
                worst = worst.max((g - v).abs() / bound.max(f64::MIN_POSITIVE));
                assert!((g - v).abs() <= bound, "{name} row {} column {j}: paddock {g:e}, {source} {v:e}", i + 1);
            }
        }
        eprintln!("{name}: worst {:.0} % of the float32 bound ({source})", worst * 100.0);
        // In the sandbox: the same bits.
        let model = load(&runtime, &guest(imported.guest()), &imported.params(), unhurried());
        let named: Vec<paddock_host::Row> = (0..rows.nrows())
            .map(|i| {
                model
                    .contract()
                    .features
                    .iter()
                    .enumerate()
                    .map(|(j, feat)| (feat.name.clone(), rows[[i, j]]))
                    .collect()
            })
            .collect();
        let explained = model.explain(&named).unwrap();
        for i in 0..rows.nrows() {
            let a = explained.of(i, 0);
            let sandboxed: Vec<f64> = a.features.iter().copied().chain([a.baseline, a.margin]).collect();
            assert!(
                sandboxed.iter().zip(got.row(i)).all(|(s, n)| s.to_bits() == n.to_bits()),
                "{name} row {}: sandbox {sandboxed:?}, native {:?}",
                i + 1,
                got.row(i)
            );
        }
    }
}

/// The profile the notebook helper wrote from every training row of the
/// diabetes data (tests/imports/export.py), and the model it profiles.
fn profiled() -> (Vec<u8>, Vec<u8>, paddock_host::Profile) {
    let bytes = std::fs::read(dir().join("lgb-diabetes-profiled.txt")).unwrap();
    let imported = import(&bytes, Format::LightgbmText, "lgb-diabetes-profiled.txt", None).unwrap();
    let text = std::fs::read(dir().join("lgb-diabetes-profiled.profile.json")).unwrap();
    (guest(imported.guest()), imported.params(), paddock_host::Profile::from_json(&text).unwrap())
}

/// Packs with a profile and loads: the load's error, if any.
fn pack_with_profile(runtime: &Runtime, profile: &paddock_host::Profile) -> Result<Model, String> {
    let (wasm, params, _) = profiled();
    let parts =
        paddock_host::Parts { wasm: &wasm, params: Some(&params), profile: Some(profile), ..Default::default() };
    let bytes = paddock_host::pack_imported(parts).unwrap();
    let artifact = paddock_host::Artifact::from_bytes(bytes, u64::MAX).unwrap();
    Model::load_with(runtime, artifact, unhurried()).map_err(|e| e.to_string())
}

/// A profile travels in the artifact and is checked against the contract
/// at load: one naming a feature the contract lacks, with edges out of
/// order or with shares that do not sum to 1 is refused, naming the field.
#[test]
fn a_training_profile_is_carried_and_checked_against_the_contract() {
    let runtime = Runtime::new().unwrap();
    let (_, _, profile) = profiled();
    assert_eq!(profile.rows, 442);
    let model = pack_with_profile(&runtime, &profile).unwrap();
    assert_eq!(model.profile(), Some(&profile));
    let bmi = &profile.features["bmi"];
    let mut unknown = profile.clone();
    unknown.features.insert("bmi_squared".into(), bmi.clone());
    let mut unordered = profile.clone();
    if let paddock_host::Bins::Edges(e) = &mut unordered.features.get_mut("bmi").unwrap().bins {
        e.swap(2, 3);
    }
    let mut unsummed = profile.clone();
    unsummed.outputs.get_mut("value").unwrap().shares[0] += 0.01;
    for (bad, says) in [
        (unknown, "the profile's feature `bmi_squared`: the contract has no such feature"),
        (unordered, "the profile's feature `bmi`: edges are not increasing: edge 3"),
        (unsummed, "the profile's output `value`: shares sum to 1.01"),
    ] {
        let err = pack_with_profile(&runtime, &bad).unwrap_err();
        assert!(err.contains(says), "{err}");
    }
}

/// A profile made in Rust (`Profile::of_rows`, for trainers and embedders
/// that are not notebooks) is the notebook helper's: from the same 442
/// diabetes rows, and the model's own answers to them, the same edges
/// (NumPy's linear deciles, to 1e-15 relative) and shares (exactly), and
/// the same summaries to 1e-12 (NumPy sums pairwise).
#[test]
fn a_profile_made_in_rust_is_the_notebook_helpers() {
    let runtime = Runtime::new().unwrap();
    let (_, _, helper) = profiled();
    let model = pack_with_profile(&runtime, &helper).unwrap();
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(dir().join("drift.json")).unwrap()).unwrap();
    let names: Vec<String> = serde_json::from_value(doc["names"].clone()).unwrap();
    let training: Vec<Vec<f64>> = serde_json::from_value(doc["training"].clone()).unwrap();
    let rows: Vec<paddock_host::Row> =
        training.iter().map(|r| names.iter().cloned().zip(r.iter().copied()).collect()).collect();
    let contract = model.contract();
    let order: Vec<usize> =
        contract.features.iter().map(|f| names.iter().position(|n| *n == f.name).unwrap()).collect();
    let cells: Vec<f64> = training.iter().flat_map(|r| order.iter().map(|&j| r[j])).collect();
    let values = model.score(&rows).unwrap().values().to_vec();
    let made = paddock_host::Profile::of_rows("rust", contract, training.len(), &cells, &values);
    assert_eq!(made.rows, helper.rows);
    for (kind, ours, theirs) in
        [("feature", &made.features, &helper.features), ("output", &made.outputs, &helper.outputs)]
    {
        assert_eq!(ours.keys().collect::<Vec<_>>(), theirs.keys().collect::<Vec<_>>(), "{kind}s");
        for (name, field) in ours {
            let want = &theirs[name];
            let (paddock_host::Bins::Edges(a), paddock_host::Bins::Edges(b)) = (&field.bins, &want.bins) else {
                panic!("{kind} {name}: numbers")
            };
            assert_eq!(a.len(), b.len(), "{kind} {name}: {a:?} against {b:?}");
            for (x, y) in a.iter().zip(b) {
                assert!((x - y).abs() <= 1e-15 * y.abs(), "{kind} {name}: edge {x} against NumPy's {y}");
            }
            assert_eq!(field.shares, want.shares, "{kind} {name}: shares");
            let (s, t) = (field.summary.unwrap(), want.summary.unwrap());
            assert_eq!((s.min, s.max), (t.min, t.max), "{kind} {name}");
            for (x, y) in [(s.mean, t.mean), (s.sd, t.sd)] {
                assert!((x - y).abs() <= 1e-12 * y.abs().max(1.0), "{kind} {name}: {x} against NumPy's {y}");
            }
        }
    }
}

/// Live rows binned by the profile's edges and their stability index,
/// against NumPy on the same rows (outside reference: `numpy.searchsorted`
/// for the bins, `numpy.sum` and `numpy.log` for the index;
/// tests/imports/export.py): the counts equal, the index to 1e-12. Rows
/// drawn with replacement from the training data stay below 0.1 on every
/// feature; the same rows with `bmi` moved by one standard deviation put
/// `bmi` above 0.25 and leave every other feature below 0.1.
#[test]
fn bin_counts_and_stability_indexes_are_numpys() {
    let (_, _, profile) = profiled();
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(dir().join("drift.json")).unwrap()).unwrap();
    let names: Vec<String> = serde_json::from_value(doc["names"].clone()).unwrap();
    for case in doc["cases"].as_array().unwrap() {
        let name = case["case"].as_str().unwrap();
        let rows: Vec<Vec<Option<f64>>> = serde_json::from_value(case["rows"].clone()).unwrap();
        for (j, feature) in names.iter().enumerate() {
            let field = &profile.features[feature];
            let mut counts = vec![0u64; field.bin_count()];
            for row in &rows {
                counts[field.bin_of(row[j].unwrap_or(f64::NAN))] += 1;
            }
            let want: Vec<u64> = serde_json::from_value(case["counts"][feature].clone()).unwrap();
            assert_eq!(counts, want, "{name} {feature}: bin counts");
            let index = paddock_host::drift::stability_index(&field.shares, &counts).unwrap();
            let numpy = case["index"][feature].as_f64().unwrap();
            assert!((index - numpy).abs() <= 1e-12, "{name} {feature}: {index} against NumPy's {numpy}");
            let moved = (name == "bmi-shifted" && feature == "bmi") || (name == "s5-holes" && feature == "s5");
            if moved {
                assert!(index > 0.25, "{name} {feature}: {index}");
            } else {
                assert!(index < 0.1, "{name} {feature}: {index}");
            }
        }
    }
}

/// A host counts what it scores against the profile: rows drawn with
/// replacement from the training data stay steady on every feature; the
/// same rows with `bmi` moved by one standard deviation make `bmi` call for
/// action and nothing else; with `s5` missing in 30 % of the rows, `s5`
/// calls for action and the missing values are named. The live counts are
/// NumPy's (tests/imports/export.py), so the indexes are too, to 1e-12.
#[test]
fn scored_rows_are_counted_against_the_profile() {
    let runtime = Runtime::new().unwrap();
    let (_, _, profile) = profiled();
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(dir().join("drift.json")).unwrap()).unwrap();
    let names: Vec<String> = serde_json::from_value(doc["names"].clone()).unwrap();
    for case in doc["cases"].as_array().unwrap() {
        let name = case["case"].as_str().unwrap();
        let model = pack_with_profile(&runtime, &profile).unwrap();
        let report = model.drift().expect("a profile, counting on");
        assert!(report.fields.iter().all(|f| f.count == 0 && f.level == paddock_host::DriftLevel::TooFew));
        let rows: Vec<Vec<Option<f64>>> = serde_json::from_value(case["rows"].clone()).unwrap();
        let rows: Vec<paddock_host::Row> =
            rows.iter().map(|r| names.iter().zip(r).filter_map(|(n, v)| v.map(|v| (n.clone(), v))).collect()).collect();
        for chunk in rows.chunks(64) {
            model.score(chunk).unwrap();
        }
        let report = model.drift().unwrap();
        for f in report.fields.iter().filter(|f| f.kind == "feature") {
            let numpy = case["index"][&f.name].as_f64().unwrap();
            let index = f.index.unwrap();
            assert!((index - numpy).abs() <= 1e-12, "{name} {}: {index} against NumPy's {numpy}", f.name);
            let moved = (name == "bmi-shifted" && f.name == "bmi") || (name == "s5-holes" && f.name == "s5");
            let want = if moved { paddock_host::DriftLevel::Act } else { paddock_host::DriftLevel::Steady };
            assert_eq!(f.level, want, "{name} {}: index {index}", f.name);
            let named = f.notes.iter().any(|n| n.starts_with("missing values: "));
            assert_eq!(named, name == "s5-holes" && f.name == "s5", "{name} {}: {:?}", f.name, f.notes);
        }
        let output = report.fields.iter().find(|f| f.kind == "output").unwrap();
        assert_eq!(output.count, rows.len() as u64, "{name}: every prediction counted");
    }
}

/// A label the training rows never had is named on its own: a profile
/// whose `sex` saw only `sex_hi`, and live rows (the pandas case's checks)
/// with `sex_lo` too, which the contract allows.
#[test]
fn labels_never_seen_in_training_are_named() {
    let runtime = Runtime::new().unwrap();
    let (path, bytes, checks) = case("lgb-diabetes-pandas");
    let imported = import(&bytes, Format::LightgbmText, &path.display().to_string(), None).unwrap();
    let field = paddock_host::FieldProfile {
        bins: paddock_host::Bins::Labels(vec!["sex_hi".into()]),
        shares: vec![1.0, 0.0, 0.0],
        summary: None,
    };
    let profile = paddock_host::Profile {
        source: "by hand: training saw one label".into(),
        rows: 1,
        features: [("sex".to_owned(), field)].into(),
        outputs: Default::default(),
    };
    let wasm = guest(imported.guest());
    let params = imported.params();
    let parts =
        paddock_host::Parts { wasm: &wasm, params: Some(&params), profile: Some(&profile), ..Default::default() };
    let artifact = paddock_host::Artifact::from_bytes(paddock_host::pack_imported(parts).unwrap(), u64::MAX).unwrap();
    let model = Model::load_with(&runtime, artifact, unhurried()).unwrap();
    let rows: Vec<paddock_host::Row> = checks.cases.iter().map(|c| c.row.clone()).collect();
    model.score(&rows).unwrap();
    let sex = model.drift().unwrap().fields.into_iter().find(|f| f.name == "sex").unwrap();
    let lo = rows
        .iter()
        .filter(|r| r.fields().iter().any(|(n, v)| n == "sex" && *v == paddock_host::Value::Label("sex_lo".into())))
        .count();
    let share = lo as f64 / rows.len() as f64 * 100.0;
    assert!(lo > 0, "the rows have sex_lo");
    assert_eq!(sex.notes, vec![format!("labels never seen in training: {share:.1} % of live values")]);
}
