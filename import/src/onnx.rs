//! ONNX files that skl2onnx writes for scikit-learn's tree ensembles and
//! linear models (ai.onnx.ml `TreeEnsembleRegressor`,
//! `TreeEnsembleClassifier`, `LinearRegressor`, `LinearClassifier`):
//! converted to the trees or linear estimator instead of running the
//! graph, with scikit-learn's arithmetic.
//!
//! scikit-learn's trees compare `float32(x) <= threshold` with a double
//! threshold; skl2onnx writes each threshold rounded *down* to float32, so
//! `float32(x) <= float32_down(t)` decides exactly as scikit-learn does.
//! Leaf values are written as float32: scikit-learn's double leaves are lost
//! to 24 bits, so predictions agree within `Σ |leaf| · 2⁻²⁴` (the sums are
//! kept in double precision, in tree order, as scikit-learn adds them).
//! HistGradientBoosting compares double inputs with double thresholds,
//! which skl2onnx rounds to the nearest float32: exported with a double
//! input, decisions differ only for a value between the two.
//!
//! Linear models: coefficients are float32 in the file, inputs stay double
//! (as scikit-learn computes), so a score agrees within
//! `(|intercept| + Σ |weightᵢ·xᵢ|) · 2⁻²⁴`; the logistic and softmax links
//! are glibc's `exp` as scipy's `expit` and scikit-learn's softmax call it.
//!
//! Only the protobuf messages and fields read here are declared (field
//! numbers from onnx.proto); prost skips the rest.

use std::collections::BTreeMap;

use paddock_guest::{
    Bounds, Branch, Combine, Feature, LinearParams, Link, Node, Output, OutputLink, Precision, SplitRule, Tree,
    TreesParams,
};
use prost::Message;

use crate::ensemble::{ContractDraft, NodeRules, same_lengths};
use crate::flatten::flatten;
use crate::{Blame, EstimatorParams, Format, ImportError, Imported, Origin};

#[derive(Clone, PartialEq, Message)]
struct ModelProto {
    #[prost(string, tag = "2")]
    producer_name: String,
    #[prost(string, tag = "3")]
    producer_version: String,
    #[prost(message, optional, tag = "7")]
    graph: Option<GraphProto>,
}

#[derive(Clone, PartialEq, Message)]
struct GraphProto {
    #[prost(message, repeated, tag = "1")]
    node: Vec<NodeProto>,
    #[prost(message, repeated, tag = "11")]
    input: Vec<ValueInfoProto>,
}

#[derive(Clone, PartialEq, Message)]
struct NodeProto {
    #[prost(string, tag = "3")]
    name: String,
    #[prost(string, tag = "4")]
    op_type: String,
    #[prost(message, repeated, tag = "5")]
    attribute: Vec<AttributeProto>,
    #[prost(string, tag = "7")]
    domain: String,
}

#[derive(Clone, PartialEq, Message)]
struct AttributeProto {
    #[prost(string, tag = "1")]
    name: String,
    #[prost(int64, tag = "3")]
    i: i64,
    #[prost(bytes = "vec", tag = "4")]
    s: Vec<u8>,
    #[prost(message, optional, tag = "5")]
    t: Option<TensorProto>,
    #[prost(float, repeated, tag = "7")]
    floats: Vec<f32>,
    #[prost(int64, repeated, tag = "8")]
    ints: Vec<i64>,
    #[prost(bytes = "vec", repeated, tag = "9")]
    strings: Vec<Vec<u8>>,
}

#[derive(Clone, PartialEq, Message)]
struct TensorProto {
    #[prost(int32, tag = "2")]
    data_type: i32,
    #[prost(float, repeated, tag = "4")]
    float_data: Vec<f32>,
    #[prost(bytes = "vec", tag = "9")]
    raw_data: Vec<u8>,
    #[prost(double, repeated, tag = "10")]
    double_data: Vec<f64>,
}

#[derive(Clone, PartialEq, Message)]
struct ValueInfoProto {
    #[prost(string, tag = "1")]
    name: String,
    #[prost(message, optional, tag = "2")]
    r#type: Option<TypeProto>,
}

#[derive(Clone, PartialEq, Message)]
struct TypeProto {
    #[prost(message, optional, tag = "1")]
    tensor_type: Option<TensorTypeProto>,
}

#[derive(Clone, PartialEq, Message)]
struct TensorTypeProto {
    #[prost(int32, tag = "1")]
    elem_type: i32,
    #[prost(message, optional, tag = "2")]
    shape: Option<TensorShapeProto>,
}

#[derive(Clone, PartialEq, Message)]
struct TensorShapeProto {
    #[prost(message, repeated, tag = "1")]
    dim: Vec<Dimension>,
}

#[derive(Clone, PartialEq, Message)]
struct Dimension {
    #[prost(int64, optional, tag = "1")]
    dim_value: Option<i64>,
}

/// ONNX element types (onnx.proto `TensorProto.DataType`).
const FLOAT: i32 = 1;
const DOUBLE: i32 = 11;

/// The attributes of one node, by name.
struct Attributes<'a> {
    blame: &'a Blame<'a>,
    place: String,
    by_name: BTreeMap<&'a str, &'a AttributeProto>,
}

impl<'a> Attributes<'a> {
    fn of(blame: &'a Blame<'a>, node: &'a NodeProto) -> Self {
        Attributes {
            blame,
            place: format!("node `{}` ({})", node.name, node.op_type),
            by_name: node.attribute.iter().map(|a| (a.name.as_str(), a)).collect(),
        }
    }

    fn int(&self, name: &str, default: i64) -> i64 {
        self.by_name.get(name).map_or(default, |a| a.i)
    }

    fn ints(&self, name: &str) -> Vec<i64> {
        self.by_name.get(name).map(|a| a.ints.clone()).unwrap_or_default()
    }

    fn text(&self, name: &str, default: &str) -> String {
        self.by_name.get(name).map_or(default.to_owned(), |a| String::from_utf8_lossy(&a.s).into_owned())
    }

    fn texts(&self, name: &str) -> Vec<String> {
        self.by_name
            .get(name)
            .map(|a| a.strings.iter().map(|s| String::from_utf8_lossy(s).into_owned()).collect())
            .unwrap_or_default()
    }

    /// A list of numbers given as `NAME` (floats) or `NAME_as_tensor` (a
    /// float or double tensor); `None` when neither is there.
    fn numbers(&self, name: &str) -> Result<Option<Vec<f64>>, ImportError> {
        if let Some(a) = self.by_name.get(name) {
            return Ok(Some(a.floats.iter().map(|v| f64::from(*v)).collect()));
        }
        let Some(t) = self.by_name.get(format!("{name}_as_tensor").as_str()).and_then(|a| a.t.as_ref()) else {
            return Ok(None);
        };
        let bad =
            |problem: String| self.blame.malformed(&format!("{} attribute {name}_as_tensor", self.place), problem);
        Ok(Some(match t.data_type {
            FLOAT if !t.float_data.is_empty() => t.float_data.iter().map(|v| f64::from(*v)).collect(),
            FLOAT => {
                t.raw_data.chunks_exact(4).map(|b| f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]]))).collect()
            }
            DOUBLE if !t.double_data.is_empty() => t.double_data.clone(),
            DOUBLE => {
                t.raw_data.chunks_exact(8).map(|b| f64::from_le_bytes(b.try_into().expect("chunks of 8"))).collect()
            }
            other => return Err(bad(format!("element type {other}, not float or double"))),
        }))
    }
}

/// The operators converted to a built-in estimator.
const MODELS: [&str; 4] = ["TreeEnsembleRegressor", "TreeEnsembleClassifier", "LinearRegressor", "LinearClassifier"];

/// What the model node computes, which names the outputs.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Task {
    /// One value per target (a regression).
    Values(usize),
    /// The probability of the second of two classes.
    Probability,
    /// One probability per class.
    Probabilities(usize),
    /// One decision score per class (no link), or one for two classes.
    Scores(usize),
}

impl Task {
    fn columns(self) -> usize {
        match self {
            Task::Probability => 1,
            Task::Values(n) | Task::Probabilities(n) | Task::Scores(n) => n,
        }
    }

    /// The outputs, and what each is. Probabilities are bounded to
    /// [0, 1 + `slack`]: 0 when a link makes them so, the float32 rounding
    /// of the leaves when they are sums of leaf probabilities (a forest's
    /// averaged votes may pass 1 by that much); unbounded when `slack` is
    /// `None` (nothing is known of their sum).
    fn outputs(self, labels: &[String], slack: Option<f64>) -> (Vec<Output>, Vec<String>) {
        let named = |stem: &str, n: usize| -> Vec<String> {
            if n == 1 { vec![stem.to_owned()] } else { (0..n).map(|k| format!("{stem}_{k}")).collect() }
        };
        let label = |k: usize| labels.get(k).map_or_else(|| k.to_string(), Clone::clone);
        let (names, about, bounds): (Vec<String>, Vec<String>, Bounds) = match self {
            Task::Values(n) => (named("value", n), (0..n).map(|k| format!("target {k}")).collect(), Bounds::OPEN),
            Task::Probability => (
                vec!["probability".into()],
                vec![format!("the probability of class {}", label(1))],
                Bounds::between(0.0, 1.0),
            ),
            Task::Probabilities(n) => (
                (0..n).map(|k| format!("probability_{k}")).collect(),
                (0..n).map(|k| format!("the probability of class {}", label(k))).collect(),
                Bounds::between(0.0, 1.0),
            ),
            Task::Scores(n) => (
                named("score", n),
                (0..n).map(|k| format!("the decision score of class {}", label(k + usize::from(n == 1)))).collect(),
                Bounds::OPEN,
            ),
        };
        let bounds = match slack {
            Some(slack) if bounds.max == Some(1.0) => Bounds::between(0.0, 1.0 + slack),
            _ => Bounds::OPEN,
        };
        (names.iter().map(|n| Output::new(n, bounds)).collect(), about)
    }
}

/// The graph around the model node: its input and who wrote it.
struct Graph<'a> {
    blame: Blame<'a>,
    producer: String,
    input: &'a str,
    features: usize,
    precision: Precision,
}

pub(crate) fn import(bytes: &[u8], file: &str) -> Result<Imported, ImportError> {
    let blame = Blame { file };
    let wrong = || ImportError::WrongFormat {
        file: file.to_owned(),
        expected: Format::SklearnOnnx.name(),
        looks_like: crate::looks_like(bytes),
    };
    let model = ModelProto::decode(bytes).map_err(|_| wrong())?;
    let graph = model.graph.as_ref().ok_or_else(wrong)?;
    let producer = format!("{} {}", model.producer_name, model.producer_version).trim().to_owned();
    let ops: Vec<&str> = graph.node.iter().map(|n| n.op_type.as_str()).collect();
    let models: Vec<&NodeProto> = graph.node.iter().filter(|n| MODELS.contains(&n.op_type.as_str())).collect();
    let node = match models[..] {
        [one] => one,
        [] => {
            return Err(blame.unsupported(
                "graph",
                format!("a graph of {} (no tree ensemble or linear model)", ops.join(", ")),
                "pack it as an ONNX graph with a manifest (`InputKind::OnnxGraph`; tract runs it), or export a scikit-learn tree ensemble or linear model",
            ));
        }
        _ => {
            return Err(blame.unsupported(
                &format!("node `{}`", models[1].name),
                format!("{} model operators in one graph ({})", models.len(), models.iter().map(|n| n.op_type.as_str()).collect::<Vec<_>>().join(", ")),
                "export one model per file; for one probability per class, train a multinomial classifier, not one-vs-rest",
            ));
        }
    };
    let a = Attributes::of(&blame, node);
    let softmax = a.text("post_transform", "NONE") == "SOFTMAX";
    for other in graph.node.iter().filter(|n| !std::ptr::eq(*n, node)) {
        // Cast and Identity pass values on; ZipMap only reshapes the
        // probabilities; an L1 Normalizer after a softmax divides by a sum of 1.
        let passes = match other.op_type.as_str() {
            "Identity" | "Cast" | "ZipMap" => true,
            "Normalizer" => softmax && Attributes::of(&blame, other).text("norm", "MAX") == "L1",
            _ => false,
        };
        if !passes {
            return Err(blame.unsupported(
                &format!("node `{}`", other.name),
                format!("operator {} beside the {}", other.op_type, node.op_type),
                "export the model alone (skl2onnx: no pipeline steps; a multinomial, not one-vs-rest, classifier)",
            ));
        }
    }
    let input = graph.input.first().ok_or_else(|| blame.malformed("graph", "no input"))?;
    let tensor = input
        .r#type
        .as_ref()
        .and_then(|t| t.tensor_type.as_ref())
        .ok_or_else(|| blame.malformed("graph input", "not a tensor"))?;
    let features = tensor
        .shape
        .as_ref()
        .and_then(|s| s.dim.get(1))
        .and_then(|d| d.dim_value)
        .filter(|&n| (1..=1_000_000).contains(&n))
        .ok_or_else(|| blame.malformed("graph input", "its shape does not give the feature count (rows × features)"))?
        as usize;
    let precision = match tensor.elem_type {
        FLOAT => Precision::Single,
        DOUBLE => Precision::Double,
        other => {
            return Err(blame.unsupported(
                "graph input",
                format!("element type {other}"),
                "export with FloatTensorType or DoubleTensorType",
            ));
        }
    };
    let g = Graph { blame: Blame { file }, producer, input: &input.name, features, precision };
    match node.op_type.as_str() {
        "TreeEnsembleRegressor" | "TreeEnsembleClassifier" => trees(&g, &a),
        _ => linear(&g, &a),
    }
}

/// The class labels of a classifier, as text.
fn labels(a: &Attributes<'_>) -> Vec<String> {
    let ints = a.ints("classlabels_int64s");
    let ints = if ints.is_empty() { a.ints("classlabels_ints") } else { ints };
    if ints.is_empty() { a.texts("classlabels_strings") } else { ints.iter().map(i64::to_string).collect() }
}

/// The task of a classifier of `labels.len()` classes whose scores fill
/// `columns` columns, from its `post_transform`.
fn classifier_task(a: &Attributes<'_>, classes: usize, columns: usize) -> Result<(Task, OutputLink), ImportError> {
    let place = &a.place;
    let transform = a.text("post_transform", "NONE");
    if classes < 2 {
        return Err(a.blame.malformed(place, format!("{classes} class labels")));
    }
    Ok(match (transform.as_str(), classes, columns) {
        // Two classes, one column: the score of the second class.
        ("NONE", 2, 1) => (Task::Probability, OutputLink::Identity),
        ("LOGISTIC", 2, 1) => (Task::Probability, OutputLink::Logistic { scale: 1.0 }),
        ("NONE", _, c) if c == classes => (Task::Probabilities(c), OutputLink::Identity),
        ("SOFTMAX", _, c) if c == classes => (Task::Probabilities(c), OutputLink::Softmax),
        (other, _, c) => {
            return Err(a.blame.unsupported(
                place,
                format!("post_transform {other} over {c} score column(s) for {classes} classes"),
                "export a binary classifier, or a multiclass one with a softmax (multinomial) or none",
            ));
        }
    })
}

fn trees(g: &Graph<'_>, a: &Attributes<'_>) -> Result<Imported, ImportError> {
    let blame = &g.blame;
    let place = a.place.clone();
    let bad = |problem: String| blame.malformed(&place, problem);
    let classifier = a.place.contains("TreeEnsembleClassifier");
    let nodes = NodeArrays::read(a)?;
    let list = if classifier { "class" } else { "target" };
    let leaves = LeafArrays::read(a, list)?;
    let labels = labels(a);
    let (task, link) = if classifier {
        let columns = leaves.ids.iter().copied().max().map_or(1, |m| m.max(0) as usize + 1);
        let columns = if labels.len() > 2 { labels.len() } else { columns };
        classifier_task(a, labels.len(), columns)?
    } else {
        regressor_task(a)?
    };
    let outputs = task.columns();
    let leaf_count = nodes.modes.iter().filter(|m| *m == "LEAF").count();
    if outputs > 1 && leaf_count.saturating_mul(outputs) > 1 << 24 {
        return Err(bad(format!(
            "{leaf_count} leaves × {outputs} outputs: more leaf values than paddock holds (16 M)"
        )));
    }
    let base = match a.numbers("base_values")? {
        None => vec![0.0; outputs],
        Some(b) if b.len() == outputs => b,
        Some(b) => return Err(bad(format!("{} base_values for {outputs} outputs", b.len()))),
    };
    let combine = match a.text("aggregate_function", "SUM").as_str() {
        "SUM" => Combine::Sum,
        "AVERAGE" => Combine::Mean,
        other => {
            return Err(blame.unsupported(
                &place,
                format!("aggregate_function {other}"),
                "export a sum or an average of trees",
            ));
        }
    };
    let split = nodes.split_rule(blame)?;
    let weights = leaves.by_leaf(blame, &place, list, outputs)?;
    let mut vectors = Vec::new();
    let mut params_trees = Vec::new();
    let mut hitrates = Vec::new();
    for (&t, by_id) in &nodes.trees() {
        let only = if outputs == 1 { Some(0) } else { weights.tree_output.get(&t).copied().unwrap_or(Some(0)) };
        let walk = TreeWalk { g, nodes: &nodes, weights: &weights, outputs, only };
        let (tree_nodes, rates) = walk.flatten(t, by_id, &mut vectors)?;
        params_trees.push(Tree { output: only.unwrap_or(0) as u32, nodes: tree_nodes });
        hitrates.push(rates);
    }
    if params_trees.is_empty() {
        return Err(bad("no trees".into()));
    }
    // Absent values: the exporter records a way for them only when the
    // model learned one (HistGradientBoosting, trees fitted on missing values).
    let learned_missing = nodes.tracks_true.iter().any(|&t| t != 0);
    let missing_text = if learned_missing {
        "optional: the file sends an absent value its split's missing-value way"
    } else {
        "required: the file records no way for absent values"
    };
    let trees_count = params_trees.len();
    let (covers, covers_text) = match covers(&params_trees, hitrates) {
        Ok(c) => (c, "each node's cover from nodes_hitrates (contributions can be asked for)".to_owned()),
        Err(why) => (
            Vec::new(),
            format!("no covers: {why}; contributions are declined (the notebook helper writes scikit-learn's covers)"),
        ),
    };
    let (kind, arithmetic) =
        if classifier { ("TreeEnsembleClassifier", "probabilities") } else { ("TreeEnsembleRegressor", "values") };
    let inputs_text = match g.precision {
        Precision::Single => {
            "features rounded to float32 (the graph input is float), thresholds (float32, rounded down by skl2onnx for scikit-learn's trees) compared with ≤"
        }
        Precision::Double => {
            "features in double precision (the graph input is double), compared with ≤ to float32 thresholds"
        }
    };
    let params = TreesParams {
        features: g.features as u32,
        base,
        combine,
        split,
        trees: params_trees,
        inputs: g.precision,
        arithmetic: Precision::Double,
        link,
        sets: Vec::new(),
        vectors,
        covers,
    };
    finish(
        g,
        (task, probability_slack(link != OutputLink::Identity, &params)),
        &labels,
        (learned_missing, missing_text),
        EstimatorParams::Trees(params),
        format!("{kind}: {} ({})", task_text(task), link_text(link)),
        format!(
            "as scikit-learn computes {arithmetic}: {inputs_text}; leaves (float32 in the file) summed in double precision in tree order"
        ),
        format!("{trees_count} trees; {covers_text}"),
    )
}

/// A `TreeEnsembleRegressor`'s outputs and link.
fn regressor_task(a: &Attributes<'_>) -> Result<(Task, OutputLink), ImportError> {
    let targets = usize::try_from(a.int("n_targets", 1))
        .ok()
        .filter(|&k| (1..=10_000).contains(&k))
        .ok_or_else(|| a.blame.malformed(&a.place, "n_targets out of range"))?;
    let link = match a.text("post_transform", "NONE").as_str() {
        "NONE" => OutputLink::Identity,
        "LOGISTIC" => OutputLink::Logistic { scale: 1.0 },
        "SOFTMAX" if targets >= 2 => OutputLink::Softmax,
        other => return Err(a.blame.unsupported(&a.place, format!("post_transform {other}"), "export without it")),
    };
    Ok((Task::Values(targets), link))
}

/// The ONNX-ML ensemble's `nodes_*` arrays, one entry per node of every tree.
struct NodeArrays {
    tree_ids: Vec<i64>,
    node_ids: Vec<i64>,
    feature_ids: Vec<i64>,
    values: Vec<f64>,
    modes: Vec<String>,
    true_ids: Vec<i64>,
    false_ids: Vec<i64>,
    tracks_true: Vec<i64>,
    /// How often each node is reached (`nodes_hitrates`): empty when the
    /// file has none.
    hitrates: Vec<f64>,
}

impl NodeArrays {
    fn read(a: &Attributes<'_>) -> Result<NodeArrays, ImportError> {
        let tree_ids = a.ints("nodes_treeids");
        let n = tree_ids.len();
        let mut tracks_true = a.ints("nodes_missing_value_tracks_true");
        if tracks_true.is_empty() {
            tracks_true = vec![0; n];
        }
        let arrays = NodeArrays {
            node_ids: a.ints("nodes_nodeids"),
            feature_ids: a.ints("nodes_featureids"),
            values: a.numbers("nodes_values")?.ok_or_else(|| a.blame.malformed(&a.place, "no nodes_values"))?,
            modes: a.texts("nodes_modes"),
            true_ids: a.ints("nodes_truenodeids"),
            false_ids: a.ints("nodes_falsenodeids"),
            tracks_true,
            hitrates: a.numbers("nodes_hitrates")?.unwrap_or_default(),
            tree_ids,
        };
        same_lengths(
            a.blame,
            &a.place,
            ("nodes_treeids", n),
            &[
                ("nodes_nodeids", arrays.node_ids.len()),
                ("nodes_featureids", arrays.feature_ids.len()),
                ("nodes_values", arrays.values.len()),
                ("nodes_modes", arrays.modes.len()),
                ("nodes_truenodeids", arrays.true_ids.len()),
                ("nodes_falsenodeids", arrays.false_ids.len()),
                ("nodes_missing_value_tracks_true", arrays.tracks_true.len()),
                ("nodes_hitrates", if arrays.hitrates.is_empty() { n } else { arrays.hitrates.len() }),
            ],
        )?;
        Ok(arrays)
    }

    /// The split rule: one comparison family for the whole ensemble.
    fn split_rule(&self, blame: &Blame<'_>) -> Result<SplitRule, ImportError> {
        let mut rule = None;
        for (i, m) in self.modes.iter().enumerate() {
            let at = || format!("tree {} node {}", self.tree_ids[i], self.node_ids[i]);
            let family = match m.as_str() {
                "LEAF" => continue,
                "BRANCH_LEQ" | "BRANCH_GT" => SplitRule::LessOrEqual,
                "BRANCH_LT" | "BRANCH_GTE" => SplitRule::Less,
                other => {
                    return Err(blame.unsupported(&at(), format!("split mode {other}"), "export ordered splits only"));
                }
            };
            match rule {
                None => rule = Some(family),
                Some(r) if r != family => {
                    return Err(blame.unsupported(
                        &at(),
                        format!("split mode {m} mixed with the other comparison"),
                        "export one comparison for every split",
                    ));
                }
                Some(_) => {}
            }
        }
        Ok(rule.unwrap_or(SplitRule::LessOrEqual))
    }

    /// Each tree's nodes: node id → position in the arrays.
    fn trees(&self) -> BTreeMap<i64, BTreeMap<i64, usize>> {
        let mut trees: BTreeMap<i64, BTreeMap<i64, usize>> = BTreeMap::new();
        for (i, (&t, &id)) in self.tree_ids.iter().zip(&self.node_ids).enumerate() {
            trees.entry(t).or_default().insert(id, i);
        }
        trees
    }
}

/// The ensemble's `target_*` (or `class_*`) arrays: one weight per leaf and output.
struct LeafArrays {
    trees: Vec<i64>,
    nodes: Vec<i64>,
    ids: Vec<i64>,
    weights: Vec<f64>,
}

/// The leaf weights by (tree, node), one per output, and the one output
/// each tree's leaves feed (None when they feed several).
struct LeafWeights {
    by_leaf: BTreeMap<(i64, i64), Vec<f64>>,
    tree_output: BTreeMap<i64, Option<usize>>,
}

impl LeafArrays {
    fn read(a: &Attributes<'_>, list: &str) -> Result<LeafArrays, ImportError> {
        let arrays = LeafArrays {
            trees: a.ints(&format!("{list}_treeids")),
            nodes: a.ints(&format!("{list}_nodeids")),
            ids: a.ints(&format!("{list}_ids")),
            weights: a.numbers(&format!("{list}_weights"))?.unwrap_or_default(),
        };
        same_lengths(
            a.blame,
            &a.place,
            (&format!("{list}_treeids"), arrays.trees.len()),
            &[
                (&format!("{list}_nodeids"), arrays.nodes.len()),
                (&format!("{list}_ids"), arrays.ids.len()),
                (&format!("{list}_weights"), arrays.weights.len()),
            ],
        )?;
        Ok(arrays)
    }

    fn by_leaf(&self, blame: &Blame<'_>, place: &str, list: &str, outputs: usize) -> Result<LeafWeights, ImportError> {
        let mut by_leaf: BTreeMap<(i64, i64), Vec<f64>> = BTreeMap::new();
        let mut tree_output: BTreeMap<i64, Option<usize>> = BTreeMap::new();
        for j in 0..self.trees.len() {
            let k = usize::try_from(self.ids[j]).ok().filter(|&k| k < outputs).ok_or_else(|| {
                blame.malformed(place, format!("{list}_ids[{j}] = {} but there are {outputs} outputs", self.ids[j]))
            })?;
            by_leaf.entry((self.trees[j], self.nodes[j])).or_insert_with(|| vec![0.0; outputs])[k] += self.weights[j];
            tree_output
                .entry(self.trees[j])
                .and_modify(|o| {
                    if *o != Some(k) {
                        *o = None
                    }
                })
                .or_insert(Some(k));
        }
        Ok(LeafWeights { by_leaf, tree_output })
    }
}

/// One tree of the ensemble, walked from its root into the estimator's nodes.
struct TreeWalk<'a> {
    g: &'a Graph<'a>,
    nodes: &'a NodeArrays,
    weights: &'a LeafWeights,
    outputs: usize,
    /// The one output the tree's leaves feed, or None (vector leaves).
    only: Option<usize>,
}

impl TreeWalk<'_> {
    /// The tree's nodes, and each one's hit rate in the same order (NaN
    /// where the file has none).
    fn flatten(
        &self,
        t: i64,
        by_id: &BTreeMap<i64, usize>,
        vectors: &mut Vec<f64>,
    ) -> Result<(Vec<Node>, Vec<f64>), ImportError> {
        let (blame, n) = (&self.g.blame, self.nodes);
        let mut hitrates = Vec::with_capacity(by_id.len());
        let ids: Vec<i64> = by_id.keys().copied().collect();
        // The root is the node no other node names as a child.
        let children: std::collections::BTreeSet<i64> =
            by_id.values().filter(|&&i| n.modes[i] != "LEAF").flat_map(|&i| [n.true_ids[i], n.false_ids[i]]).collect();
        let root = ids
            .iter()
            .position(|id| !children.contains(id))
            .ok_or_else(|| blame.malformed(&format!("tree {t}"), "every node is some node's child: no root"))?
            as u32;
        let raw_id = |id: i64, at: &str| -> Result<u32, ImportError> {
            ids.binary_search(&id)
                .map(|p| p as u32)
                .map_err(|_| blame.malformed(at, format!("child {id} is not a node of tree {t}")))
        };
        let rules = NodeRules { blame, features: self.g.features };
        flatten(
            root,
            ids.len(),
            |p| {
                let i = by_id[&ids[p as usize]];
                hitrates.push(n.hitrates.get(i).copied().unwrap_or(f64::NAN));
                let at = format!("tree {t} node {}", n.node_ids[i]);
                if n.modes[i] == "LEAF" {
                    let w = self.weights.by_leaf.get(&(t, n.node_ids[i])).cloned();
                    let w = w.unwrap_or_else(|| vec![0.0; self.outputs]);
                    for &v in &w {
                        rules.leaf(&at, v)?;
                    }
                    return Ok(match self.only {
                        Some(k) => Node::Leaf { value: w[k] },
                        None => {
                            vectors.extend_from_slice(&w);
                            Node::Leaves { first: (vectors.len() - self.outputs) as u32 }
                        }
                    });
                }
                let (yes, no) = (raw_id(n.true_ids[i], &at)?, raw_id(n.false_ids[i], &at)?);
                // GT and GTE are the other side of LEQ and LT.
                let flipped = matches!(n.modes[i].as_str(), "BRANCH_GT" | "BRANCH_GTE");
                let children = if flipped { (no, yes) } else { (yes, no) };
                let missing_true = n.tracks_true[i] != 0;
                let missing = if missing_true != flipped { Branch::Left } else { Branch::Right };
                rules.split(&at, (n.feature_ids[i], n.values[i]), children, missing)
            },
            || blame.malformed(&format!("tree {t}"), "a node is reached twice: the children do not form a tree"),
        )
        .map(|nodes| (nodes, hitrates))
    }
}

/// The trees' hit rates as node covers, if they are covers: every node's
/// positive and every split's the sum of its children's (to 10⁻⁹, for
/// sums of sample weights); otherwise why not, naming the first node that
/// is not (skl2onnx writes 1.0 for every node).
fn covers(trees: &[Tree], hitrates: Vec<Vec<f64>>) -> Result<Vec<Vec<f64>>, String> {
    for (t, (tree, rates)) in trees.iter().zip(&hitrates).enumerate() {
        for (i, node) in tree.nodes.iter().enumerate() {
            let here = rates[i];
            if here.is_nan() {
                return Err("the file has no nodes_hitrates".into());
            }
            let children = match node {
                Node::Split { left, right, .. }
                | Node::SplitZeroAbsent { left, right, .. }
                | Node::Member { left, right, .. } => Some(rates[*left as usize] + rates[*right as usize]),
                Node::Leaf { .. } | Node::Leaves { .. } => None,
            };
            let consistent = here > 0.0 && children.is_none_or(|c| (here - c).abs() <= 1e-9 * here);
            if !consistent {
                let sum = children.map_or(String::new(), |c| format!(", its children's {c}"));
                return Err(format!(
                    "nodes_hitrates are not node covers (tree {t}'s node {i} in walk order: {here}{sum})"
                ));
            }
        }
    }
    Ok(hitrates)
}

/// How far above 1 a tree ensemble's probability may come: 0 through a
/// link; else twice the float32 rounding of the largest leaf of each tree
/// summed (the leaves are float32 in the file; a forest's leaves are its
/// votes divided by the tree count, which can sum to a hair above 1).
fn probability_slack(linked: bool, params: &TreesParams) -> Option<f64> {
    if linked {
        return Some(0.0);
    }
    let largest = |nodes: &[Node]| {
        nodes.iter().fold(0.0f64, |m, n| match n {
            Node::Leaf { value } => m.max(value.abs()),
            _ => m,
        })
    };
    let leaves: f64 = params.trees.iter().map(|t| largest(&t.nodes)).sum::<f64>()
        + params.vectors.iter().fold(0.0f64, |m, v| m.max(v.abs())) * params.trees.len() as f64;
    let base = params.base.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    Some((base + leaves) * f64::from(f32::EPSILON))
}

fn task_text(task: Task) -> String {
    match task {
        Task::Values(n) => format!("{n} value(s)"),
        Task::Probability => "the probability of the second class".into(),
        Task::Probabilities(n) => format!("one probability per class ({n})"),
        Task::Scores(n) => format!("{n} decision score(s)"),
    }
}

fn link_text(link: OutputLink) -> &'static str {
    match link {
        OutputLink::Identity => "no link",
        OutputLink::Logistic { .. } => "logistic link",
        OutputLink::Exp => "exp link",
        OutputLink::Softmax => "softmax",
    }
}

fn linear(g: &Graph<'_>, a: &Attributes<'_>) -> Result<Imported, ImportError> {
    let blame = &g.blame;
    let place = a.place.clone();
    let bad = |problem: String| blame.malformed(&place, problem);
    let classifier = a.place.contains("LinearClassifier");
    let coefficients = a.numbers("coefficients")?.ok_or_else(|| bad("no coefficients".into()))?;
    let intercepts = a.numbers("intercepts")?.unwrap_or_default();
    let rows = coefficients.len() / g.features;
    if rows == 0 || coefficients.len() % g.features != 0 {
        return Err(bad(format!(
            "{} coefficients do not fill rows of the input's {} features",
            coefficients.len(),
            g.features
        )));
    }
    let intercepts = match intercepts.len() {
        0 => vec![0.0; rows],
        l if l == rows => intercepts,
        l => return Err(bad(format!("{l} intercepts for {rows} rows of coefficients"))),
    };
    if let Some(v) = coefficients.iter().chain(&intercepts).find(|v| !v.is_finite()) {
        return Err(bad(format!("coefficient {v}")));
    }
    let weights: Vec<Vec<f64>> = coefficients.chunks(g.features).map(<[f64]>::to_vec).collect();
    let labels = labels(a);
    let transform = a.text("post_transform", "NONE");
    let (task, link, weights, intercepts) = if classifier {
        let classes = labels.len();
        match (transform.as_str(), classes, rows) {
            // Two classes: skl2onnx writes the score of each (−s and s); the
            // probability of the second is the logistic of its score.
            ("LOGISTIC", 2, 1 | 2) => {
                (Task::Probability, Link::Logistic, vec![weights[rows - 1].clone()], vec![intercepts[rows - 1]])
            }
            ("NONE", 2, 1 | 2) => {
                (Task::Scores(1), Link::Identity, vec![weights[rows - 1].clone()], vec![intercepts[rows - 1]])
            }
            ("SOFTMAX", c, r) if c == r && c > 2 => (Task::Probabilities(c), Link::Softmax, weights, intercepts),
            ("NONE", c, r) if c == r && c > 2 => (Task::Scores(c), Link::Identity, weights, intercepts),
            (other, c, r) => {
                return Err(blame.unsupported(
                    &place,
                    format!("post_transform {other} over {r} rows of coefficients for {c} classes"),
                    "export a binary classifier, or a multinomial one (softmax); one-vs-rest probabilities are not reproduced",
                ));
            }
        }
    } else {
        if transform != "NONE" {
            return Err(blame.unsupported(
                &place,
                format!("post_transform {transform}"),
                "export a plain linear regression",
            ));
        }
        (Task::Values(rows), Link::Identity, weights, intercepts)
    };
    let size = format!("linear: {} output(s) × {} weights", intercepts.len(), g.features);
    let kind = if classifier { "LinearClassifier" } else { "LinearRegressor" };
    let link_name = match link {
        Link::Identity => "no link",
        Link::Logistic => "logistic link",
        _ => "softmax",
    };
    finish(
        g,
        (task, (link != Link::Identity).then_some(0.0)),
        &labels,
        (false, "required: a linear score needs every value"),
        EstimatorParams::Linear(LinearParams { link, intercepts, weights, impute: Vec::new() }),
        format!("{kind}: {} ({link_name})", task_text(task)),
        "as scikit-learn computes: features in double precision, coefficients (float32 in the file) summed in double precision; glibc's exp in the link".into(),
        size,
    )
}

/// The contract and origin every ONNX import shares.
#[allow(clippy::too_many_arguments)]
fn finish(
    g: &Graph<'_>,
    (task, slack): (Task, Option<f64>),
    labels: &[String],
    (optional, missing_text): (bool, &str),
    estimator: EstimatorParams,
    task_line: String,
    arithmetic: String,
    size: String,
) -> Result<Imported, ImportError> {
    let mut draft = ContractDraft::default();
    for i in 0..g.features {
        let feature = Feature::real(&format!("x{i}"), Bounds::OPEN);
        draft.feature(
            if optional { feature.optional() } else { feature },
            format!(
                "by position in the graph input `{}` (ONNX names no columns; name them in the overrides); {missing_text}",
                g.input
            ),
        );
    }
    let (outputs, about) = task.outputs(labels, slack);
    for (o, about) in outputs.into_iter().zip(about) {
        let from = format!("the model: {about}");
        draft.output(o.about(&about), from);
    }
    let origin = Origin {
        format: Format::SklearnOnnx.name().to_owned(),
        file: g.blame.file.to_owned(),
        toolkit: if g.producer.is_empty() { "(producer not recorded)".into() } else { g.producer.clone() },
        task: task_line,
        arithmetic,
        estimator: size,
        contract: Vec::new(),
    };
    Ok(draft.finish(estimator, origin))
}
