//! XGBoost's JSON model (`save_model("m.json")`), gbtree booster.
//!
//! XGBoost evaluates in single precision: features are stored as `float`,
//! a row goes left when `x < split_condition` (both `float`), absent values
//! follow the split's `default_left`, leaves are `float`, and each row's
//! margin starts at the base margin and adds one leaf per tree, in tree
//! order, in `float`. The objective's link follows in `float` too
//! (`common::Sigmoid`, `expf`, softmax with a double-precision sum). The
//! params say all that ([`Precision::Single`]), so the artifact gives
//! XGBoost's predictions bit for bit.
//!
//! The base margin is computed here, once, from `base_score` as XGBoost
//! does at load (`−logf(1/p − 1)` for logistic objectives, `logf(p)` for
//! log-link ones), with this machine's `logf`: on Linux the same glibc
//! function XGBoost calls.

use paddock_guest::{
    Bounds, Branch, Combine, Feature, Node, Output, OutputLink, Precision, SplitRule, Tree, TreesParams,
};
use serde_json::Value;

use crate::ensemble::{ContractDraft, NodeRules, same_lengths};
use crate::flatten::flatten;
use crate::{Blame, EstimatorParams, Format, ImportError, Imported, Origin};

/// How an objective's margin becomes its outputs.
#[derive(Clone, Copy, PartialEq)]
enum Task {
    /// The margin itself (regression): output `value`.
    Value,
    /// The margin itself, a score with no scale of its own: output `score`.
    Score,
    /// Logistic of the margin: output `probability`.
    Probability,
    /// `e^margin` (log-link regression): output `value`.
    Exp,
    /// Softmax over the classes: `probability_0`, `probability_1`, …
    Classes,
}

fn task_of(objective: &str) -> Option<Task> {
    Some(match objective {
        "reg:squarederror" | "reg:linear" | "reg:absoluteerror" | "reg:pseudohubererror" | "reg:squaredlogerror" => {
            Task::Value
        }
        "binary:logitraw" | "rank:pairwise" | "rank:ndcg" | "rank:map" => Task::Score,
        "reg:logistic" | "binary:logistic" => Task::Probability,
        "count:poisson" | "reg:gamma" | "reg:tweedie" => Task::Exp,
        "multi:softprob" | "multi:softmax" => Task::Classes,
        _ => return None,
    })
}

/// Reading the JSON, with the file named in every error.
impl Blame<'_> {
    fn get<'v>(&self, v: &'v Value, path: &str, key: &str) -> Result<&'v Value, ImportError> {
        v.get(key).ok_or_else(|| self.malformed(path, format!("no `{key}`")))
    }

    fn str<'v>(&self, v: &'v Value, path: &str, key: &str) -> Result<&'v str, ImportError> {
        self.get(v, path, key)?.as_str().ok_or_else(|| self.malformed(&format!("{path}.{key}"), "not a string"))
    }

    fn array<'v>(&self, v: &'v Value, path: &str, key: &str) -> Result<&'v [Value], ImportError> {
        self.get(v, path, key)?
            .as_array()
            .map(Vec::as_slice)
            .ok_or_else(|| self.malformed(&format!("{path}.{key}"), "not a list"))
    }

    fn ints(&self, v: &Value, path: &str, key: &str) -> Result<Vec<i64>, ImportError> {
        self.array(v, path, key)?
            .iter()
            .enumerate()
            .map(|(i, x)| x.as_i64().ok_or_else(|| self.malformed(&format!("{path}.{key}[{i}]"), "not a whole number")))
            .collect()
    }

    fn floats(&self, v: &Value, path: &str, key: &str) -> Result<Vec<f32>, ImportError> {
        self.array(v, path, key)?
            .iter()
            .enumerate()
            // XGBoost writes each float32 in its shortest decimal form;
            // parsed to double and rounded once more it is that float32.
            .map(|(i, x)| {
                x.as_f64()
                    .map(|d| d as f32)
                    .ok_or_else(|| self.malformed(&format!("{path}.{key}[{i}]"), "not a number"))
            })
            .collect()
    }

    /// A number XGBoost stores as a string (`"3"`, `"5E-1"`).
    fn number_text(&self, v: &Value, path: &str, key: &str) -> Result<f64, ImportError> {
        let text = self.str(v, path, key)?;
        text.trim().parse().map_err(|_| self.malformed(&format!("{path}.{key}"), format!("`{text}` is not a number")))
    }
}

pub(crate) fn import(bytes: &[u8], file: &str) -> Result<Imported, ImportError> {
    let r = Blame { file };
    let wrong = || ImportError::WrongFormat {
        file: file.to_owned(),
        expected: Format::XgboostJson.name(),
        looks_like: crate::looks_like(bytes),
    };
    let doc: Value = serde_json::from_slice(bytes).map_err(|e| {
        if bytes.trim_ascii_start().starts_with(b"{") {
            r.malformed(&format!("line {} column {}", e.line(), e.column()), format!("not JSON: {e}"))
        } else {
            wrong()
        }
    })?;
    let learner = doc.get("learner").ok_or_else(wrong)?;
    let version = match doc.get("version").and_then(Value::as_array) {
        Some(v) => v.iter().map(|n| n.to_string()).collect::<Vec<_>>().join("."),
        None => "(version not recorded)".to_owned(),
    };
    let model = gbtree_model(&r, learner)?;
    let head = Head::read(&r, learner)?;
    let (trees, covers) = read_trees(&r, model, &head)?;
    let params = TreesParams {
        features: head.features as u32,
        base: head.base.clone(),
        combine: Combine::Sum,
        split: SplitRule::Less,
        trees,
        inputs: Precision::Single,
        arithmetic: Precision::Single,
        link: match head.task {
            Task::Value | Task::Score => OutputLink::Identity,
            Task::Probability => OutputLink::Logistic { scale: 1.0 },
            Task::Exp => OutputLink::Exp,
            Task::Classes => OutputLink::Softmax,
        },
        sets: Vec::new(),
        vectors: Vec::new(),
        covers: covers.unwrap_or_default(),
    };
    let (outputs, task_text) = outputs(head.task, head.classes, &head.objective);
    let mut draft = contract_features(&r, learner, head.features)?;
    for o in outputs {
        draft.output(o, format!("the objective {}", head.objective));
    }
    let origin = Origin {
        format: Format::XgboostJson.name().to_owned(),
        file: file.to_owned(),
        toolkit: format!("XGBoost {version}"),
        task: task_text,
        arithmetic: "single precision as XGBoost computes: features, thresholds, leaves and sums in float32; left when x < split_condition; absent values their split's default way".to_owned(),
        estimator: format!("{} trees", params.trees.len()),
        contract: Vec::new(),
    };
    Ok(draft.finish(EstimatorParams::Trees(params), origin))
}

/// The booster's model, refusing boosters other than `gbtree`.
fn gbtree_model<'v>(r: &Blame<'_>, learner: &'v Value) -> Result<&'v Value, ImportError> {
    let booster = r.get(learner, "learner", "gradient_booster")?;
    let booster_name = r.str(booster, "learner.gradient_booster", "name")?;
    if booster_name != "gbtree" {
        let instead = match booster_name {
            "dart" => {
                "train with booster=\"gbtree\" (dart scales trees at prediction time by weights paddock does not reproduce)"
            }
            "gblinear" => "train with booster=\"gbtree\", or export the linear weights to a linear model",
            _ => "train with booster=\"gbtree\"",
        };
        return Err(r.unsupported("learner.gradient_booster.name", format!("booster `{booster_name}`"), instead));
    }
    r.get(booster, "learner.gradient_booster", "model")
}

/// What `learner_model_param` and the objective say: the shape of the
/// model and how its margin starts and ends.
struct Head {
    features: usize,
    objective: String,
    task: Task,
    classes: usize,
    /// The base margin per output, in XGBoost's float32, widened.
    base: Vec<f64>,
}

impl Head {
    fn read(r: &Blame<'_>, learner: &Value) -> Result<Head, ImportError> {
        let param = r.get(learner, "learner", "learner_model_param")?;
        let features = r.number_text(param, "learner.learner_model_param", "num_feature")?;
        let num_class = r.number_text(param, "learner.learner_model_param", "num_class")?;
        let num_target = param
            .get("num_target")
            .map(|_| r.number_text(param, "learner.learner_model_param", "num_target"))
            .transpose()?;
        if num_target.is_some_and(|t| t != 1.0) {
            return Err(r.unsupported(
                "learner.learner_model_param.num_target",
                format!("a model with {} targets", num_target.unwrap_or(0.0)),
                "train one model per target",
            ));
        }
        if !(features.fract() == 0.0 && (0.0..=1e6).contains(&features)) {
            return Err(
                r.malformed("learner.learner_model_param.num_feature", format!("{features} is not a feature count"))
            );
        }
        let objective = r.str(r.get(learner, "learner", "objective")?, "learner.objective", "name")?;
        let task = task_of(objective).ok_or_else(|| {
            r.unsupported(
                "learner.objective.name",
                format!("objective `{objective}`"),
                "use a regression (reg:squarederror, count:poisson, reg:gamma, reg:tweedie), binary (binary:logistic, binary:logitraw) or multi-class (multi:softprob) objective",
            )
        })?;
        let classes = if task == Task::Classes {
            if !(num_class.fract() == 0.0 && (2.0..=1e4).contains(&num_class)) {
                return Err(r.malformed(
                    "learner.learner_model_param.num_class",
                    format!("{num_class} classes for {objective}"),
                ));
            }
            num_class as usize
        } else {
            1
        };
        let base =
            base_margins(r, r.str(param, "learner.learner_model_param", "base_score")?, task, classes, objective)?;
        Ok(Head { features: features as usize, objective: objective.to_owned(), task, classes, base })
    }
}

/// The base margin of each output from `base_score` (one number, or one
/// per class), as XGBoost computes it at load.
fn base_margins(
    r: &Blame<'_>,
    base_text: &str,
    task: Task,
    classes: usize,
    objective: &str,
) -> Result<Vec<f64>, ImportError> {
    let place = "learner.learner_model_param.base_score";
    let base_scores: Vec<f32> = base_text
        .trim()
        .trim_start_matches('[')
        .trim_end_matches(']')
        .split(',')
        .map(|t| t.trim().parse::<f32>())
        .collect::<Result<_, _>>()
        .map_err(|_| r.malformed(place, format!("`{base_text}` is not a number or a list of numbers")))?;
    let base_scores = match (base_scores.len(), classes) {
        (1, k) => vec![base_scores[0]; k],
        (n, k) if n == k => base_scores,
        (n, k) => return Err(r.malformed(place, format!("{n} values for {k} outputs"))),
    };
    let mut base = Vec::with_capacity(classes);
    for p in base_scores {
        base.push(f64::from(match task {
            Task::Probability => {
                if !(p > 0.0 && p < 1.0) {
                    return Err(r.malformed(place, format!("{p} is not a probability for {objective}")));
                }
                -(1.0f32 / p - 1.0f32).ln()
            }
            Task::Exp => {
                if p.is_nan() || p <= 0.0 {
                    return Err(r.malformed(place, format!("{p} must be positive for {objective}")));
                }
                p.ln()
            }
            Task::Value | Task::Score | Task::Classes => p,
        }));
    }
    Ok(base)
}

/// Every tree, each feeding the class `tree_info` names.
/// Each tree's node covers, in the params' node order.
type Covers = Vec<Vec<f64>>;

/// The trees, and each node's `sum_hessian` in the params' node order
/// when every tree records it.
fn read_trees(r: &Blame<'_>, model: &Value, head: &Head) -> Result<(Vec<Tree>, Option<Covers>), ImportError> {
    let model_path = "learner.gradient_booster.model";
    let trees_json = r.array(model, model_path, "trees")?;
    let tree_info = r.ints(model, model_path, "tree_info")?;
    same_lengths(r, model_path, ("trees", trees_json.len()), &[("tree_info", tree_info.len())])?;
    let mut trees = Vec::with_capacity(trees_json.len());
    let mut covers = Some(Vec::with_capacity(trees_json.len()));
    for (t, (tree, &class)) in trees_json.iter().zip(&tree_info).enumerate() {
        if class < 0 || class as usize >= head.classes {
            return Err(r.malformed(
                &format!("{model_path}.tree_info[{t}]"),
                format!("class {class} but the model has {} outputs", head.classes),
            ));
        }
        let (nodes, hessians) = read_tree(r, tree, t, head.features)?;
        trees.push(Tree { output: class as u32, nodes });
        covers = covers.zip(hessians).map(|(mut all, h)| {
            all.push(h);
            all
        });
    }
    Ok((trees, covers))
}

/// The features: names from `feature_names`, domains from `feature_types`.
fn contract_features(r: &Blame<'_>, learner: &Value, features: usize) -> Result<ContractDraft, ImportError> {
    let names = feature_names(r, learner, features)?;
    let types = feature_types(r, learner, features)?;
    let named_from = if learner.get("feature_names").and_then(Value::as_array).is_some_and(|a| !a.is_empty()) {
        "name from feature_names in the file"
    } else {
        "name by position, as XGBoost names unnamed features (feature_names is empty)"
    };
    let mut draft = ContractDraft::default();
    for (name, kind) in names.iter().zip(&types) {
        let (feature, domain_from) = match kind.as_str() {
            "int" | "i" => (Feature::whole(name, Bounds::OPEN), "whole number from feature_types (int)"),
            "c" => (Feature::whole(name, Bounds::at_least(0.0)), "category code ≥ 0 from feature_types (c)"),
            "" => (Feature::real(name, Bounds::OPEN), "real number (feature_types is empty)"),
            other => (
                Feature::real(name, Bounds::OPEN),
                if other == "float" || other == "q" { "real number from feature_types" } else { "real number" },
            ),
        };
        draft.feature(
            feature.optional(),
            format!("{named_from}; {domain_from}; optional by default: XGBoost sends an absent value its split's default way"),
        );
    }
    Ok(draft)
}

fn outputs(task: Task, classes: usize, objective: &str) -> (Vec<Output>, String) {
    match task {
        Task::Value => (vec![Output::new("value", Bounds::OPEN)], format!("{objective}: one value (the margin)")),
        Task::Score => {
            (vec![Output::new("score", Bounds::OPEN)], format!("{objective}: one score (the margin, no link)"))
        }
        Task::Probability => (
            vec![Output::new("probability", Bounds::between(0.0, 1.0))],
            format!("{objective}: one probability (logistic of the margin)"),
        ),
        Task::Exp => {
            (vec![Output::new("value", Bounds::at_least(0.0))], format!("{objective}: one value (e to the margin)"))
        }
        Task::Classes => (
            (0..classes).map(|k| Output::new(&format!("probability_{k}"), Bounds::between(0.0, 1.0))).collect(),
            if objective == "multi:softmax" {
                format!(
                    "{objective}: one probability per class (softmax of the margins; XGBoost's predicted class is the most probable)"
                )
            } else {
                format!("{objective}: one probability per class (softmax of the margins)")
            },
        ),
    }
}

fn feature_names(r: &Blame<'_>, learner: &Value, features: usize) -> Result<Vec<String>, ImportError> {
    let given = learner.get("feature_names").and_then(Value::as_array).filter(|a| !a.is_empty());
    match given {
        None => Ok((0..features).map(|i| format!("f{i}")).collect()),
        Some(names) => {
            if names.len() != features {
                return Err(
                    r.malformed("learner.feature_names", format!("{} names for {features} features", names.len()))
                );
            }
            names
                .iter()
                .enumerate()
                .map(|(i, n)| {
                    n.as_str()
                        .map(str::to_owned)
                        .ok_or_else(|| r.malformed(&format!("learner.feature_names[{i}]"), "not a string"))
                })
                .collect()
        }
    }
}

fn feature_types(r: &Blame<'_>, learner: &Value, features: usize) -> Result<Vec<String>, ImportError> {
    match learner.get("feature_types").and_then(Value::as_array).filter(|a| !a.is_empty()) {
        None => Ok(vec![String::new(); features]),
        Some(types) if types.len() == features => {
            Ok(types.iter().map(|t| t.as_str().unwrap_or("").to_owned()).collect())
        }
        Some(types) => {
            Err(r.malformed("learner.feature_types", format!("{} types for {features} features", types.len())))
        }
    }
}

/// A tree's nodes, and each node's `sum_hessian` in the same order when
/// the tree records it.
fn read_tree(
    r: &Blame<'_>,
    tree: &Value,
    t: usize,
    features: usize,
) -> Result<(Vec<Node>, Option<Vec<f64>>), ImportError> {
    let path = format!("learner.gradient_booster.model.trees[{t}]");
    if let Some(size) = tree.get("tree_param").and_then(|p| p.get("size_leaf_vector")).and_then(Value::as_str)
        && size != "1"
        && size != "0"
    {
        return Err(r.unsupported(
            &format!("tree {t}"),
            format!("a tree with vector leaves (size_leaf_vector {size})"),
            "train with multi_strategy=\"one_output_per_tree\"",
        ));
    }
    let left = r.ints(tree, &path, "left_children")?;
    let right = r.ints(tree, &path, "right_children")?;
    let index = r.ints(tree, &path, "split_indices")?;
    let cond = r.floats(tree, &path, "split_conditions")?;
    let default_left = r.ints(tree, &path, "default_left")?;
    let split_type = match tree.get("split_type") {
        Some(_) => r.ints(tree, &path, "split_type")?,
        None => vec![0; left.len()],
    };
    let n = same_lengths(
        r,
        &path,
        ("left_children", left.len()),
        &[
            ("right_children", right.len()),
            ("split_indices", index.len()),
            ("split_conditions", cond.len()),
            ("default_left", default_left.len()),
            ("split_type", split_type.len()),
        ],
    )?;
    if n == 0 {
        return Err(r.malformed(&path, "a tree with no nodes"));
    }
    let cycle = || r.malformed(&path, "a node is reached twice: the children do not form a tree");
    let rules = NodeRules { blame: r, features };
    let hessian = match tree.get("sum_hessian") {
        Some(_) => Some(r.floats(tree, &path, "sum_hessian")?).filter(|h| h.len() == n),
        None => None,
    };
    let mut covers = Vec::with_capacity(n);
    let nodes = flatten(
        0,
        n,
        |id| {
            let i = id as usize;
            let place = format!("tree {t} node {i}");
            if i >= n {
                return Err(r.malformed(&path, format!("a child points at node {i} but the tree has {n}")));
            }
            covers.push(hessian.as_ref().map_or(f64::NAN, |h| f64::from(h[i])));
            if left[i] == -1 {
                return rules.leaf(&place, f64::from(cond[i]));
            }
            if split_type[i] != 0 {
                return Err(r.unsupported(
                    &place,
                    "a categorical split",
                    "encode the categories as numbers (one-hot or ordinal) before training, or import it through LightGBM, whose categorical splits paddock reproduces",
                ));
            }
            let child = |c: i64| -> Result<u32, ImportError> {
                if c < 0 || c as usize >= n {
                    return Err(r.malformed(&place, format!("child {c} but the tree has {n} nodes")));
                }
                Ok(c as u32)
            };
            let missing = if default_left[i] != 0 { Branch::Left } else { Branch::Right };
            rules.split(&place, (index[i], f64::from(cond[i])), (child(left[i])?, child(right[i])?), missing)
        },
        cycle,
    )?;
    Ok((nodes, hessian.map(|_| covers)))
}
