//! Hand-written files: the smallest models each format allows, and every
//! way of breaking them the importers must name.

use paddock_guest::{Branch, Node, OutputLink, Precision};

use crate::{EstimatorParams, Format, import};

/// XGBoost JSON with one stump (x0 < 0.5 → −1, else 2; absent → right).
fn xgboost(tree: &str) -> String {
    format!(
        r#"{{"learner": {{"feature_names": [], "feature_types": [],
  "gradient_booster": {{"name": "gbtree", "model": {{"tree_info": [0], "trees": [{tree}]}}}},
  "learner_model_param": {{"base_score": "[5E-1]", "num_class": "0", "num_feature": "2", "num_target": "1"}},
  "objective": {{"name": "reg:squarederror"}}}}, "version": [3, 2, 0]}}"#
    )
}

const STUMP: &str = r#"{"left_children": [1, -1, -1], "right_children": [2, -1, -1], "split_indices": [0, 0, 0],
  "split_conditions": [0.5, -1.0, 2.0], "default_left": [0, 0, 0], "split_type": [0, 0, 0]}"#;

fn err(bytes: &str, format: Format) -> String {
    import(bytes.as_bytes(), format, "m", None).unwrap_err().to_string()
}

#[test]
fn a_stump_from_xgboost_becomes_single_precision_params() {
    let imported = import(xgboost(STUMP).as_bytes(), Format::XgboostJson, "dir/stump.json", None).unwrap();
    let EstimatorParams::Trees(p) = &imported.estimator else { panic!("trees") };
    assert_eq!((p.inputs, p.arithmetic, p.link), (Precision::Single, Precision::Single, OutputLink::Identity));
    assert_eq!(p.base, vec![0.5]);
    assert_eq!(
        p.trees[0].nodes[0],
        Node::Split { feature: 0, threshold: 0.5, left: 1, right: 2, missing: Branch::Right }
    );
    let c = &imported.contract;
    assert_eq!(c.name, "stump");
    assert_eq!(c.features.iter().map(|f| f.name.as_str()).collect::<Vec<_>>(), ["f0", "f1"]);
    assert_eq!(c.outputs[0].name, "value");
}

#[test]
fn broken_xgboost_files_are_refused_naming_the_place() {
    let cases = [
        (
            xgboost(&STUMP.replace("[1, -1, -1]", "[1, -1]")),
            "m: learner.gradient_booster.model.trees[0].right_children: 3 entries but left_children has 2",
        ),
        (xgboost(&STUMP.replace("[2, -1, -1]", "[7, -1, -1]")), "m: tree 0 node 0: child 7 but the tree has 3 nodes"),
        (
            xgboost(&STUMP.replace("[1, -1, -1], \"right", "[1, 0, -1], \"right").replace("[2, -1, -1]", "[2, 2, -1]")),
            "m: learner.gradient_booster.model.trees[0]: a node is reached twice: the children do not form a tree",
        ),
        (
            xgboost(&STUMP.replace("[0, 0, 0],\n  \"split_conditions", "[5, 0, 0],\n  \"split_conditions")),
            "m: tree 0 node 0: split on feature 5 but the model has 2 features",
        ),
        (
            xgboost(STUMP).replace("reg:squarederror", "survival:aft"),
            "m: learner.objective.name: objective `survival:aft` is not supported; use a regression",
        ),
        (
            xgboost(STUMP).replace("\"gbtree\"", "\"dart\""),
            "m: learner.gradient_booster.name: booster `dart` is not supported; train with booster=\"gbtree\"",
        ),
        (
            xgboost(STUMP).replace("[5E-1]", "[half]"),
            "m: learner.learner_model_param.base_score: `[half]` is not a number",
        ),
        (xgboost(STUMP)[..40].to_owned(), "m: line 1 column 40: not JSON"),
        (
            "plain text".to_owned(),
            "m: not the XGBoost JSON model asked for; it looks like text in no format paddock imports",
        ),
    ];
    for (file, want) in cases {
        let got = err(&file, Format::XgboostJson);
        assert!(got.starts_with(want), "got  {got}\nwant {want}…");
    }
}

const LGB: &str = "tree\nversion=v4\nnum_class=1\nnum_tree_per_iteration=1\nlabel_index=0\nmax_feature_idx=1\nobjective=binary sigmoid:2\n\
feature_names=a b\nfeature_infos=[0:1] 0:1:2\ntree_sizes=1\n\nTree=0\nnum_leaves=3\nnum_cat=1\nsplit_feature=1 0\n\
threshold=0 0.25\ndecision_type=1 10\nleft_child=1 -1\nright_child=-3 -2\nleaf_value=0.5 -0.5 1.5\ncat_boundaries=0 1\n\
cat_threshold=5\nis_linear=0\nshrinkage=1\n\n\nend of trees\n";

#[test]
fn a_lightgbm_tree_with_a_categorical_split_becomes_params() {
    let imported = import(LGB.as_bytes(), Format::LightgbmText, "m.txt", None).unwrap();
    let EstimatorParams::Trees(p) = &imported.estimator else { panic!("trees") };
    assert_eq!(p.link, OutputLink::Logistic { scale: 2.0 });
    assert_eq!(p.sets, vec![vec![5]]);
    // Root: feature b in {0, 2} goes left to the numeric split on a
    // (decision_type 10: NaN missing type, absent goes left).
    assert_eq!(
        p.trees[0].nodes[0],
        Node::Member { feature: 1, set: 0, left: 1, right: 4, missing: Branch::Right, members: Branch::Left }
    );
    assert_eq!(
        p.trees[0].nodes[1],
        Node::Split { feature: 0, threshold: 0.25, left: 2, right: 3, missing: Branch::Left }
    );
    assert_eq!(p.trees[0].nodes[4], Node::Leaf { value: 1.5 });
    let c = &imported.contract;
    assert!(matches!(c.features[1].domain, paddock_guest::Domain::Whole(_)));
    assert_eq!(c.outputs[0].name, "probability");
}

#[test]
fn broken_lightgbm_files_are_refused_naming_the_place() {
    let cases = [
        (
            LGB.replace("leaf_value=0.5 -0.5 1.5", "leaf_value=0.5 -0.5"),
            "m: tree 0 line 20: leaf_value has 2 values, expected 3",
        ),
        (
            LGB.replace("right_child=-3 -2", "right_child=-9 -2"),
            "m: tree 0 node 0: child -9 but the tree has 2 splits and 3 leaves",
        ),
        (LGB.replace("left_child=1 -1", "left_child=1 0"), "m: tree 0: a node is reached twice"),
        (
            LGB.replace("threshold=0 0.25", "threshold=4 0.25"),
            "m: tree 0 node 0: categorical split names set 4 but the tree has 1",
        ),
        (
            LGB.replace("is_linear=0", "is_linear=1"),
            "m: tree 0 (line 23): a linear tree (linear_tree) is not supported",
        ),
        (LGB.replace("binary sigmoid:2", "regression sqrt"), "m: line 7: objective with reg_sqrt is not supported"),
        (
            LGB.replace("binary sigmoid:2", "cross_entropy_lambda"),
            "m: line 7: objective `cross_entropy_lambda` is not supported",
        ),
        (LGB.replace("decision_type=1 10", "decision_type=1 14"), "m: tree 0 node 1: decision_type 14: missing type 3"),
        (
            LGB.replace("split_feature=1 0", "split_feature=1 x"),
            "m: tree 0 line 15: split_feature[1] `x` is not a number",
        ),
        (LGB.replace("Tree=0", "Tree=0\nnum_leaves=0"), "m: tree 0: num_leaves 0"),
        (
            "{\"learner\": {}}".to_owned(),
            "m: not the LightGBM text model asked for; it looks like an XGBoost JSON model",
        ),
    ];
    for (file, want) in cases {
        let got = err(&file, Format::LightgbmText);
        assert!(got.starts_with(want), "got  {got}\nwant {want}…");
    }
}

#[test]
fn formats_are_recognised_from_content() {
    assert_eq!(Format::recognise(LGB.as_bytes()), Some(Format::LightgbmText));
    assert_eq!(Format::recognise(xgboost(STUMP).as_bytes()), Some(Format::XgboostJson));
    assert_eq!(Format::recognise(b"\0asm\x01\0\0\0"), None);
    assert_eq!(crate::looks_like(b"<?xml version=\"1.0\"?>\n<PMML version=\"4.4\">"), "a PMML document");
    assert_eq!(Format::recognise(b"<?xml version=\"1.0\"?>\n<PMML version=\"4.4\">"), Some(Format::Pmml));
}
