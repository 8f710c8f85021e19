//! ONNX files that skl2onnx writes for scikit-learn tree ensembles
//! (`TreeEnsembleRegressor`, ai.onnx.ml): converted to the trees estimator
//! instead of running the graph, with scikit-learn's arithmetic.
//!
//! scikit-learn's trees compare `float32(x) <= threshold` with a double
//! threshold; skl2onnx writes each threshold rounded *down* to float32, so
//! `float32(x) <= float32_down(t)` decides exactly as scikit-learn does.
//! Leaf values are written as float32: scikit-learn's double leaves are lost
//! to 24 bits, so predictions agree within `Σ |leaf| · 2⁻²⁴` (the sums are
//! kept in double precision, in tree order, as scikit-learn adds them).
//!
//! Only the protobuf messages and fields read here are declared (field
//! numbers from onnx.proto); prost skips the rest.

use std::collections::BTreeMap;

use paddock_guest::{
    Bounds, Branch, Combine, Contract, Feature, Node, Output, OutputLink, Packaged, Precision, SplitRule, Tree, TreesParams,
};
use prost::Message;

use crate::flatten::flatten;
use crate::{Blame, Format, ImportError, Imported, Origin, Source};

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

    fn ints(&self, name: &str) -> Vec<i64> {
        self.by_name.get(name).map(|a| a.ints.clone()).unwrap_or_default()
    }

    fn text(&self, name: &str, default: &str) -> String {
        self.by_name.get(name).map_or(default.to_owned(), |a| String::from_utf8_lossy(&a.s).into_owned())
    }

    fn texts(&self, name: &str) -> Vec<String> {
        self.by_name.get(name).map(|a| a.strings.iter().map(|s| String::from_utf8_lossy(s).into_owned()).collect()).unwrap_or_default()
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
        let bad = |problem: String| self.blame.malformed(&format!("{} attribute {name}_as_tensor", self.place), problem);
        Ok(Some(match t.data_type {
            FLOAT if !t.float_data.is_empty() => t.float_data.iter().map(|v| f64::from(*v)).collect(),
            FLOAT => t.raw_data.chunks_exact(4).map(|b| f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]]))).collect(),
            DOUBLE if !t.double_data.is_empty() => t.double_data.clone(),
            DOUBLE => t.raw_data.chunks_exact(8).map(|b| f64::from_le_bytes(b.try_into().expect("chunks of 8"))).collect(),
            other => return Err(bad(format!("element type {other}, not float or double"))),
        }))
    }
}

pub(crate) fn import(bytes: &[u8], file: &str) -> Result<Imported, ImportError> {
    let blame = Blame { file };
    let wrong = || ImportError::WrongFormat { file: file.to_owned(), expected: Format::SklearnOnnx.name(), looks_like: crate::looks_like(bytes) };
    let model = ModelProto::decode(bytes).map_err(|_| wrong())?;
    let graph = model.graph.as_ref().ok_or_else(wrong)?;
    let producer = format!("{} {}", model.producer_name, model.producer_version).trim().to_owned();
    let ops: Vec<&str> = graph.node.iter().map(|n| n.op_type.as_str()).collect();
    let ensemble = match graph.node.iter().filter(|n| n.op_type.starts_with("TreeEnsemble")).collect::<Vec<_>>()[..] {
        [one] => one,
        [] => {
            return Err(blame.unsupported(
                "graph",
                format!("a graph of {} (no tree ensemble)", ops.join(", ")),
                "pack it as an ONNX model with --manifest (tract runs it), or export a scikit-learn tree ensemble",
            ));
        }
        _ => return Err(blame.unsupported("graph", "more than one tree ensemble", "export one model per file")),
    };
    if let Some(other) = graph.node.iter().find(|n| !std::ptr::eq(*n, ensemble) && !matches!(n.op_type.as_str(), "Identity" | "Cast")) {
        return Err(blame.unsupported(
            &format!("node `{}`", other.name),
            format!("operator {} beside the tree ensemble", other.op_type),
            "export the tree ensemble alone (skl2onnx: options={'zipmap': False}, no pipeline steps)",
        ));
    }
    if ensemble.op_type != "TreeEnsembleRegressor" {
        return Err(blame.unsupported(
            &format!("node `{}`", ensemble.name),
            format!("operator {}", ensemble.op_type),
            "only scikit-learn's tree regressors are imported so far; XGBoost and LightGBM classifiers are, from their own files",
        ));
    }
    let input = graph.input.first().ok_or_else(|| blame.malformed("graph", "no input"))?;
    let tensor = input.r#type.as_ref().and_then(|t| t.tensor_type.as_ref()).ok_or_else(|| blame.malformed("graph input", "not a tensor"))?;
    let features = tensor
        .shape
        .as_ref()
        .and_then(|s| s.dim.get(1))
        .and_then(|d| d.dim_value)
        .filter(|&n| (1..=1_000_000).contains(&n))
        .ok_or_else(|| blame.malformed("graph input", "its shape does not give the feature count (rows × features)"))? as usize;
    let inputs = match tensor.elem_type {
        FLOAT => Precision::Single,
        DOUBLE => Precision::Double,
        other => return Err(blame.unsupported("graph input", format!("element type {other}"), "export with FloatTensorType")),
    };
    let a = Attributes::of(&blame, ensemble);
    let place = a.place.clone();
    let bad = |problem: String| blame.malformed(&place, problem);
    let tree_ids = a.ints("nodes_treeids");
    let node_ids = a.ints("nodes_nodeids");
    let feature_ids = a.ints("nodes_featureids");
    let values = a.numbers("nodes_values")?.ok_or_else(|| bad("no nodes_values".into()))?;
    let modes = a.texts("nodes_modes");
    let true_ids = a.ints("nodes_truenodeids");
    let false_ids = a.ints("nodes_falsenodeids");
    let mut tracks_true = a.ints("nodes_missing_value_tracks_true");
    let n = tree_ids.len();
    if tracks_true.is_empty() {
        tracks_true = vec![0; n];
    }
    for (name, len) in [("nodes_nodeids", node_ids.len()), ("nodes_featureids", feature_ids.len()), ("nodes_values", values.len()), ("nodes_modes", modes.len()), ("nodes_truenodeids", true_ids.len()), ("nodes_falsenodeids", false_ids.len()), ("nodes_missing_value_tracks_true", tracks_true.len())] {
        if len != n {
            return Err(bad(format!("{name} has {len} entries but nodes_treeids has {n}")));
        }
    }
    let outputs = usize::try_from(a.by_name.get("n_targets").map_or(1, |t| t.i)).ok().filter(|&k| (1..=10_000).contains(&k)).ok_or_else(|| bad("n_targets out of range".into()))?;
    let leaf_count = modes.iter().filter(|m| *m == "LEAF").count();
    if outputs > 1 && leaf_count.saturating_mul(outputs) > 1 << 24 {
        return Err(bad(format!("{leaf_count} leaves × {outputs} targets: more leaf values than paddock holds (16 M)")));
    }
    let target_trees = a.ints("target_treeids");
    let target_nodes = a.ints("target_nodeids");
    let target_ids = a.ints("target_ids");
    let weights = a.numbers("target_weights")?.unwrap_or_default();
    if [target_nodes.len(), target_ids.len(), weights.len()].iter().any(|&l| l != target_trees.len()) {
        return Err(bad("target_treeids, target_nodeids, target_ids and target_weights differ in length".into()));
    }
    let base = a.numbers("base_values")?.unwrap_or_else(|| vec![0.0; outputs]);
    if base.len() != outputs {
        return Err(bad(format!("{} base_values for {outputs} targets", base.len())));
    }
    let combine = match a.text("aggregate_function", "SUM").as_str() {
        "SUM" => Combine::Sum,
        "AVERAGE" => Combine::Mean,
        other => return Err(blame.unsupported(&place, format!("aggregate_function {other}"), "export a sum or an average of trees")),
    };
    let link = match a.text("post_transform", "NONE").as_str() {
        "NONE" => OutputLink::Identity,
        "LOGISTIC" => OutputLink::Logistic { scale: 1.0 },
        "SOFTMAX" if outputs >= 2 => OutputLink::Softmax,
        other => return Err(blame.unsupported(&place, format!("post_transform {other}"), "export without it")),
    };
    // The split rule: one family for the whole ensemble.
    let mut rule = None;
    for (i, m) in modes.iter().enumerate() {
        let family = match m.as_str() {
            "LEAF" => continue,
            "BRANCH_LEQ" | "BRANCH_GT" => SplitRule::LessOrEqual,
            "BRANCH_LT" | "BRANCH_GTE" => SplitRule::Less,
            other => {
                return Err(blame.unsupported(&format!("tree {} node {}", tree_ids[i], node_ids[i]), format!("split mode {other}"), "export ordered splits only"));
            }
        };
        match rule {
            None => rule = Some(family),
            Some(r) if r != family => {
                return Err(blame.unsupported(&format!("tree {} node {}", tree_ids[i], node_ids[i]), format!("split mode {m} mixed with the other comparison"), "export one comparison for every split"));
            }
            Some(_) => {}
        }
    }
    let split = rule.unwrap_or(SplitRule::LessOrEqual);
    // Each tree's nodes by id, and each leaf's weights by output.
    let mut trees: BTreeMap<i64, BTreeMap<i64, usize>> = BTreeMap::new();
    for i in 0..n {
        trees.entry(tree_ids[i]).or_default().insert(node_ids[i], i);
    }
    let mut leaf_weights: BTreeMap<(i64, i64), Vec<f64>> = BTreeMap::new();
    for j in 0..target_trees.len() {
        let k = usize::try_from(target_ids[j]).ok().filter(|&k| k < outputs).ok_or_else(|| bad(format!("target_ids[{j}] = {} but there are {outputs} targets", target_ids[j])))?;
        leaf_weights.entry((target_trees[j], target_nodes[j])).or_insert_with(|| vec![0.0; outputs])[k] += weights[j];
    }
    let mut vectors = Vec::new();
    let mut params_trees = Vec::with_capacity(trees.len());
    for (&t, nodes) in &trees {
        let ids: Vec<i64> = nodes.keys().copied().collect();
        // The root is the node no other node names as a child.
        let children: std::collections::BTreeSet<i64> =
            nodes.values().filter(|&&i| modes[i] != "LEAF").flat_map(|&i| [true_ids[i], false_ids[i]]).collect();
        let root = ids
            .iter()
            .position(|id| !children.contains(id))
            .ok_or_else(|| blame.malformed(&format!("tree {t}"), "every node is some node's child: no root"))? as u32;
        let raw_id = |id: i64, at: &str| -> Result<u32, ImportError> {
            ids.binary_search(&id).map(|p| p as u32).map_err(|_| blame.malformed(at, format!("child {id} is not a node of tree {t}")))
        };
        let tree_nodes = flatten(
            root,
            ids.len(),
            |p| {
                let i = nodes[&ids[p as usize]];
                let at = format!("tree {t} node {}", node_ids[i]);
                if modes[i] == "LEAF" {
                    let w = leaf_weights.get(&(t, node_ids[i])).cloned().unwrap_or_else(|| vec![0.0; outputs]);
                    if let Some(bad) = w.iter().find(|v| !v.is_finite()) {
                        return Err(blame.malformed(&at, format!("leaf weight {bad}")));
                    }
                    return Ok(if outputs == 1 {
                        Node::Leaf { value: w[0] }
                    } else {
                        vectors.extend_from_slice(&w);
                        Node::Leaves { first: (vectors.len() - outputs) as u32 }
                    });
                }
                let feature = u32::try_from(feature_ids[i]).ok().filter(|&f| (f as usize) < features).ok_or_else(|| blame.malformed(&at, format!("feature {} but the input has {features}", feature_ids[i])))?;
                if values[i].is_nan() {
                    return Err(blame.malformed(&at, "threshold is NaN"));
                }
                let (yes, no) = (raw_id(true_ids[i], &at)?, raw_id(false_ids[i], &at)?);
                // GT and GTE are the other side of LEQ and LT.
                let flipped = matches!(modes[i].as_str(), "BRANCH_GT" | "BRANCH_GTE");
                let (left, right) = if flipped { (no, yes) } else { (yes, no) };
                let missing_true = tracks_true[i] != 0;
                let missing = if missing_true != flipped { Branch::Left } else { Branch::Right };
                Ok(Node::Split { feature, threshold: values[i], left, right, missing })
            },
            || blame.malformed(&format!("tree {t}"), "a node is reached twice: the children do not form a tree"),
        )?;
        params_trees.push(Tree { output: 0, nodes: tree_nodes });
    }
    if params_trees.is_empty() {
        return Err(bad("no trees".into()));
    }
    let names: Vec<String> = (0..features).map(|i| format!("x{i}")).collect();
    let outs: Vec<Output> = if outputs == 1 {
        vec![Output::new("value", Bounds::OPEN)]
    } else {
        (0..outputs).map(|k| Output::new(&format!("value_{k}"), Bounds::OPEN)).collect()
    };
    let mut sources: Vec<Source> = names
        .iter()
        .map(|n| Source {
            part: format!("feature {n}"),
            from: format!("by position in the graph input `{}` (ONNX names no columns; name them in a manifest); required: scikit-learn's trees need every value", input.name),
        })
        .collect();
    for o in &outs {
        sources.push(Source { part: format!("output {}", o.name), from: "the tree ensemble's targets".into() });
    }
    let trees_count = params_trees.len();
    Ok(Imported {
        packaged: Packaged {
            contract: Contract {
                name: String::new(),
                version: String::new(),
                about: String::new(),
                features: names.iter().map(|n| Feature::real(n, Bounds::OPEN)).collect(),
                outputs: outs,
            },
            params: TreesParams {
                features: features as u32,
                base,
                combine,
                split,
                trees: params_trees,
                inputs,
                arithmetic: Precision::Double,
                link,
                sets: Vec::new(),
                vectors,
            },
        },
        origin: Origin {
            format: Format::SklearnOnnx.name().to_owned(),
            file: file.to_owned(),
            toolkit: if producer.is_empty() { "(producer not recorded)".into() } else { producer },
            task: format!("TreeEnsembleRegressor: {outputs} value(s)"),
            arithmetic: "as scikit-learn computes: features rounded to float32, thresholds (float32, rounded down by skl2onnx) compared with ≤, leaves (float32 in the file) summed in double precision in tree order".into(),
            trees: trees_count,
            contract: sources,
        },
    })
}
