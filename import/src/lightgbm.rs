//! LightGBM's text model (`booster.save_model("m.txt")`).
//!
//! LightGBM evaluates in double precision: a row goes left when
//! `x ≤ threshold`; each split's `decision_type` holds whether it is
//! categorical, whether absent values go left, and its missing type —
//! `None` (an absent value counts as 0), `Zero` (0 and absent values both
//! go the default way) or `NaN` (absent values go the default way).
//! Categorical splits send a category left when its bit is set in the
//! split's `cat_threshold` words; absent, negative and unknown categories
//! go right. Leaf values already carry the shrinkage. Trees add up per
//! class (tree `i` feeds class `i mod num_tree_per_iteration`) in file
//! order, averaged for random forests (`average_output`), then the
//! objective's link in double precision: sigmoid with its scale, `exp` for
//! poisson/gamma/tweedie, softmax for multiclass.

use paddock_guest::{
    Bounds, Branch, Combine, Feature, Node, Output, OutputLink, Precision, SplitRule, Tree, TreesParams,
};

use crate::ensemble::{ContractDraft, NodeRules};
use crate::flatten::flatten;
use crate::{Blame, EstimatorParams, Format, ImportError, Imported, Origin};

/// The `key=value` lines of one block, with the line each came from.
struct Block<'a> {
    /// Where the block is, for messages (`header`, `tree 3`).
    name: String,
    lines: Vec<(usize, &'a str, &'a str)>,
}

impl<'a> Block<'a> {
    fn get(&self, key: &str) -> Option<(usize, &'a str)> {
        self.lines.iter().find(|(_, k, _)| *k == key).map(|(line, _, v)| (*line, *v))
    }

    fn need(&self, r: &Blame<'_>, key: &str) -> Result<(usize, &'a str), ImportError> {
        self.get(key).ok_or_else(|| r.malformed(&self.name, format!("no `{key}=` line")))
    }

    fn list<T: std::str::FromStr>(&self, r: &Blame<'_>, key: &str, len: usize) -> Result<Vec<T>, ImportError> {
        let (line, text) = self.need(r, key)?;
        let items: Vec<T> = text
            .split_ascii_whitespace()
            .enumerate()
            .map(|(i, t)| {
                t.parse().map_err(|_| {
                    r.malformed(&format!("{} line {line}", self.name), format!("{key}[{i}] `{t}` is not a number"))
                })
            })
            .collect::<Result<_, _>>()?;
        if items.len() != len {
            return Err(r.malformed(
                &format!("{} line {line}", self.name),
                format!("{key} has {} values, expected {len}", items.len()),
            ));
        }
        Ok(items)
    }

    fn number<T: std::str::FromStr>(&self, r: &Blame<'_>, key: &str) -> Result<T, ImportError> {
        let (line, text) = self.need(r, key)?;
        text.trim()
            .parse()
            .map_err(|_| r.malformed(&format!("{} line {line}", self.name), format!("{key} `{text}` is not a number")))
    }
}

/// How the summed scores become outputs.
#[derive(Clone, Copy, PartialEq)]
enum Task {
    Value,
    Score,
    Probability(f64),
    Exp,
    Classes,
    ClassesOneVsRest(f64),
}

pub(crate) fn import(bytes: &[u8], file: &str) -> Result<Imported, ImportError> {
    let r = Blame { file };
    if Format::recognise(bytes) != Some(Format::LightgbmText) {
        return Err(ImportError::WrongFormat {
            file: file.to_owned(),
            expected: Format::LightgbmText.name(),
            looks_like: crate::looks_like(bytes),
        });
    }
    let text = std::str::from_utf8(bytes).map_err(|e| {
        let line = bytes[..e.valid_up_to()].iter().filter(|&&b| b == b'\n').count() + 1;
        r.malformed(&format!("line {line}"), "not UTF-8 text")
    })?;
    let (header, blocks) = split_blocks(text);
    let version = header.get("version").map_or("(version not recorded)", |(_, v)| v);
    let features = header
        .number::<usize>(&r, "max_feature_idx")?
        .checked_add(1)
        .filter(|&n| n <= 1_000_000)
        .ok_or_else(|| r.malformed("header", "max_feature_idx out of range"))?;
    let per_iteration: usize = header.number(&r, "num_tree_per_iteration")?;
    if !(1..=10_000).contains(&per_iteration) {
        return Err(r.malformed("header", format!("num_tree_per_iteration {per_iteration}")));
    }
    let (objective_line, objective) = header.need(&r, "objective")?;
    let task = task_of(&r, objective, objective_line, per_iteration)?;
    let names: Vec<String> = header.need(&r, "feature_names")?.1.split_ascii_whitespace().map(str::to_owned).collect();
    if names.len() != features {
        return Err(r.malformed("header", format!("feature_names has {} names for {features} features", names.len())));
    }
    let infos: Vec<&str> = match header.get("feature_infos") {
        Some((_, v)) => v.split_ascii_whitespace().collect(),
        None => vec![""; features],
    };
    let average = header.lines.iter().any(|(_, k, _)| *k == "average_output");
    let mut sets: Vec<Vec<u32>> = Vec::new();
    let mut trees = Vec::with_capacity(blocks.len());
    // Each node's training-row count, where the file records them all.
    let mut covers = Some(Vec::with_capacity(blocks.len()));
    for (t, block) in blocks.iter().enumerate() {
        let (nodes, counts) = read_tree(&r, block, t, features, &mut sets)?;
        trees.push(Tree { output: (t % per_iteration) as u32, nodes });
        covers = covers.zip(counts).map(|(mut all, c)| {
            all.push(c);
            all
        });
    }
    if trees.is_empty() {
        return Err(r.malformed("trees", "the model has no trees"));
    }
    let params = TreesParams {
        features: features as u32,
        base: vec![0.0; per_iteration],
        combine: if average { Combine::Mean } else { Combine::Sum },
        split: SplitRule::LessOrEqual,
        trees,
        inputs: Precision::Double,
        arithmetic: Precision::Double,
        link: match task {
            Task::Value | Task::Score => OutputLink::Identity,
            Task::Probability(scale) | Task::ClassesOneVsRest(scale) => OutputLink::Logistic { scale },
            Task::Exp => OutputLink::Exp,
            Task::Classes => OutputLink::Softmax,
        },
        sets,
        vectors: Vec::new(),
        covers: covers.unwrap_or_default(),
    };
    let name = objective.split_ascii_whitespace().next().unwrap_or("");
    let (outs, task_text) = outputs(task, name, per_iteration);
    let categories = pandas_categorical(&r, text)?;
    let mut draft = contract_features(&names, &infos, categories.as_deref());
    for o in outs {
        draft.output(o, format!("the objective {name}"));
    }
    let origin = Origin {
        format: Format::LightgbmText.name().to_owned(),
        file: file.to_owned(),
        toolkit: format!("LightGBM (model format {version})"),
        task: task_text,
        arithmetic: format!(
            "double precision as LightGBM computes: left when x ≤ threshold; each split's missing type (None: absent counts as 0; Zero; NaN) and default direction; categorical splits by bitset{}",
            if average { "; trees averaged (random forest)" } else { "" }
        ),
        estimator: format!("{} trees", params.trees.len()),
        contract: Vec::new(),
    };
    Ok(draft.finish(EstimatorParams::Trees(params), origin))
}

/// The outputs an objective gives, and the task in words.
fn outputs(task: Task, name: &str, outputs: usize) -> (Vec<Output>, String) {
    match task {
        Task::Value => (vec![Output::new("value", Bounds::OPEN)], format!("{name}: one value (the summed scores)")),
        Task::Score => {
            (vec![Output::new("score", Bounds::OPEN)], format!("{name}: one score (the summed scores, no link)"))
        }
        Task::Probability(scale) => (
            vec![Output::new("probability", Bounds::between(0.0, 1.0))],
            format!("{name}: one probability (sigmoid of {scale} × the summed scores)"),
        ),
        Task::Exp => {
            (vec![Output::new("value", Bounds::at_least(0.0))], format!("{name}: one value (e to the summed scores)"))
        }
        Task::Classes => (
            (0..outputs).map(|k| Output::new(&format!("probability_{k}"), Bounds::between(0.0, 1.0))).collect(),
            format!("{name}: one probability per class (softmax)"),
        ),
        Task::ClassesOneVsRest(scale) => (
            (0..outputs).map(|k| Output::new(&format!("probability_{k}"), Bounds::between(0.0, 1.0))).collect(),
            format!(
                "{name}: one probability per class, each a sigmoid of {scale} × its scores (they need not sum to 1)"
            ),
        ),
    }
}

/// The category labels LightGBM's Python package saves after the model
/// (`pandas_categorical:[["Harbour", "Mill Road"], …]`, one list per
/// categorical column of the DataFrame it was trained on, in column order;
/// a category's code is its position). `None` when the file has none, or
/// when a list holds anything but strings (labels must be text).
fn pandas_categorical(r: &Blame<'_>, text: &str) -> Result<Option<Vec<Vec<String>>>, ImportError> {
    let Some((n, line)) = text.lines().enumerate().find(|(_, l)| l.starts_with("pandas_categorical:")) else {
        return Ok(None);
    };
    let json = &line["pandas_categorical:".len()..];
    let value: serde_json::Value = serde_json::from_str(json.trim())
        .map_err(|e| r.malformed(&format!("line {} (pandas_categorical)", n + 1), format!("not JSON: {e}")))?;
    let Some(lists) = value.as_array() else { return Ok(None) };
    let mut out = Vec::with_capacity(lists.len());
    for list in lists {
        let labels: Option<Vec<String>> =
            list.as_array().and_then(|l| l.iter().map(|v| v.as_str().map(str::to_owned)).collect());
        match labels {
            Some(labels) => out.push(labels),
            None => return Ok(None),
        }
    }
    Ok(Some(out))
}

/// Which pandas category list (`pandas_categorical`) belongs to which
/// feature. LightGBM saves one list per category column of the DataFrame,
/// in column order, but treats only unordered ones as categorical; an
/// ordered one is a numeric feature over its codes (`feature_infos` an
/// integer range from 0). The lists go to the categorical features and to
/// as many such integer-range features as there are lists left over, when
/// that is exactly every one of them and every code fits its list; else
/// to none (`None`).
fn category_columns(infos: &[&str], lists: &[Vec<String>]) -> Option<Vec<Option<usize>>> {
    let categorical = |info: &str| !(info.starts_with('[') || info == "none" || info.is_empty());
    let code_range = |info: &str| -> Option<(f64, f64)> {
        let (lo, hi) = info.strip_prefix('[')?.strip_suffix(']')?.split_once(':')?;
        let (lo, hi): (f64, f64) = (lo.parse().ok()?, hi.parse().ok()?);
        (lo >= 0.0 && lo.fract() == 0.0 && hi.fract() == 0.0).then_some((lo, hi))
    };
    let cats = infos.iter().filter(|i| categorical(i)).count();
    let ordered: Vec<usize> = (0..infos.len()).filter(|&i| code_range(infos[i]).is_some()).collect();
    let surplus = lists.len().checked_sub(cats)?;
    if surplus != 0 && surplus != ordered.len() {
        return None;
    }
    let mut next = 0;
    let mut owner = vec![None; infos.len()];
    for (i, info) in infos.iter().enumerate() {
        let takes = categorical(info) || (surplus != 0 && ordered.contains(&i));
        if !takes {
            continue;
        }
        let list = lists.get(next)?;
        // Every code the file saw must name a label of the list.
        let largest = match code_range(info) {
            Some((_, hi)) => hi,
            None => info.split(':').filter_map(|c| c.parse::<f64>().ok()).fold(-1.0, f64::max),
        };
        if largest >= list.len() as f64 {
            return None;
        }
        owner[i] = Some(next);
        next += 1;
    }
    (next == lists.len()).then_some(owner)
}

/// The features: names from `feature_names`, domains from `feature_infos`
/// (a range for a real number, a list of categories for a code); a
/// categorical feature whose labels the file carries (`pandas_categorical`)
/// takes those labels, and an ordered category stays a number over its codes.
fn contract_features(names: &[String], infos: &[&str], categories: Option<&[Vec<String>]>) -> ContractDraft {
    let is_real = |info: &str| info.starts_with('[') || info == "none" || info.is_empty();
    let owners = categories.and_then(|lists| category_columns(infos, lists));
    let list_of = |i: usize| Some(&categories?[owners.as_ref()?[i]?]);
    let mut draft = ContractDraft::default();
    for (i, name) in names.iter().enumerate() {
        let info = infos.get(i).copied().unwrap_or("");
        let labelled = list_of(i);
        let (feature, domain_from) = if let (Some(labels), false) = (labelled, is_real(info)) {
            let as_str: Vec<&str> = labels.iter().map(String::as_str).collect();
            (
                Feature::label(name, &as_str),
                format!(
                    "category labels from pandas_categorical in the file (codes 0…{} in that order; feature_infos lists {info})",
                    labels.len().saturating_sub(1)
                ),
            )
        } else if let Some(labels) = labelled {
            (
                Feature::real(name, Bounds::OPEN),
                format!(
                    "an ordered category, split on its code (0 = {}, …, {} = {}; pandas_categorical in the file)",
                    labels[0],
                    labels.len() - 1,
                    labels[labels.len() - 1]
                ),
            )
        } else if is_real(info) {
            (
                Feature::real(name, Bounds::OPEN),
                format!("real number (feature_infos {})", if info.is_empty() { "absent" } else { info }),
            )
        } else {
            (
                Feature::whole(name, Bounds::OPEN),
                format!("category code, a whole number (feature_infos lists the categories {info})"),
            )
        };
        draft.feature(
            feature.optional(),
            format!("name from feature_names in the file; {domain_from}; optional by default: LightGBM sends an absent value its split's missing-value way"),
        );
    }
    draft
}

fn task_of(r: &Blame<'_>, objective: &str, line: usize, per_iteration: usize) -> Result<Task, ImportError> {
    let mut words = objective.split_ascii_whitespace();
    let name = words.next().unwrap_or("");
    let mut sigmoid = 1.0;
    for w in words {
        if w == "sqrt" {
            return Err(r.unsupported(
                &format!("line {line}"),
                "objective with reg_sqrt",
                "train without reg_sqrt (the square root of the label), or square the output yourself",
            ));
        }
        if let Some(v) = w.strip_prefix("sigmoid:") {
            sigmoid = v
                .parse()
                .map_err(|_| r.malformed(&format!("line {line}"), format!("sigmoid `{v}` is not a number")))?;
        }
    }
    let one = |task| {
        if per_iteration == 1 {
            Ok(task)
        } else {
            Err(r.malformed(&format!("line {line}"), format!("{name} with {per_iteration} trees per iteration")))
        }
    };
    match name {
        "regression" | "regression_l2" | "regression_l1" | "huber" | "fair" | "quantile" | "mape" => one(Task::Value),
        "poisson" | "gamma" | "tweedie" => one(Task::Exp),
        "binary" => one(Task::Probability(sigmoid)),
        "cross_entropy" | "xentropy" => one(Task::Probability(1.0)),
        "lambdarank" | "rank_xendcg" | "custom" => one(Task::Score),
        "multiclass" | "softmax" if per_iteration >= 2 => Ok(Task::Classes),
        "multiclassova" | "multiclass_ova" | "ova" | "ovr" if per_iteration >= 2 => Ok(Task::ClassesOneVsRest(sigmoid)),
        _ => Err(r.unsupported(
            &format!("line {line}"),
            format!("objective `{objective}`"),
            "use a regression (regression, poisson, gamma, tweedie…), binary, multiclass or ranking objective",
        )),
    }
}

/// The header's lines and each `Tree=` block's, up to `end of trees`.
fn split_blocks(text: &str) -> (Block<'_>, Vec<Block<'_>>) {
    let mut header = Block { name: "header".into(), lines: Vec::new() };
    let mut trees: Vec<Block<'_>> = Vec::new();
    for (n, line) in text.lines().enumerate() {
        let line = line.trim_end_matches('\r');
        if line == "end of trees" {
            break;
        }
        let (key, value) = line.split_once('=').unwrap_or((line, ""));
        if key == "Tree" {
            trees.push(Block { name: format!("tree {}", trees.len()), lines: Vec::new() });
            continue;
        }
        if line.is_empty() {
            continue;
        }
        match trees.last_mut() {
            Some(tree) => tree.lines.push((n + 1, key, value)),
            None => header.lines.push((n + 1, key, value)),
        }
    }
    (header, trees)
}

/// A tree's nodes, and each node's training-row count in the same order
/// (`internal_count`, `leaf_count`) when the file has both.
fn read_tree(
    r: &Blame<'_>,
    block: &Block<'_>,
    t: usize,
    features: usize,
    sets: &mut Vec<Vec<u32>>,
) -> Result<(Vec<Node>, Option<Vec<f64>>), ImportError> {
    let leaves: usize = block.number(r, "num_leaves")?;
    if leaves == 0 || leaves > 1 << 24 {
        return Err(r.malformed(&block.name, format!("num_leaves {leaves}")));
    }
    if let Some((line, v)) = block.get("is_linear")
        && v.trim() != "0"
    {
        return Err(r.unsupported(
            &format!("tree {t} (line {line})"),
            "a linear tree (linear_tree)",
            "train with linear_tree=false",
        ));
    }
    let values: Vec<f64> = block.list(r, "leaf_value", leaves)?;
    let rules = NodeRules { blame: r, features };
    let leaf = |j: usize| rules.leaf(&format!("tree {t} leaf {j}"), values[j]);
    let leaf_count: Option<Vec<f64>> =
        block.get("leaf_count").map(|_| block.list(r, "leaf_count", leaves)).transpose()?;
    if leaves == 1 {
        return Ok((vec![leaf(0)?], leaf_count));
    }
    let inner = leaves - 1;
    let internal_count: Option<Vec<f64>> =
        block.get("internal_count").map(|_| block.list(r, "internal_count", inner)).transpose()?;
    let mut covers = Vec::with_capacity(inner + leaves);
    let feature: Vec<i64> = block.list(r, "split_feature", inner)?;
    let threshold: Vec<f64> = block.list(r, "threshold", inner)?;
    let decision: Vec<u8> = block.list(r, "decision_type", inner)?;
    let left: Vec<i64> = block.list(r, "left_child", inner)?;
    let right: Vec<i64> = block.list(r, "right_child", inner)?;
    let cats: usize = block.get("num_cat").map(|_| block.number(r, "num_cat")).transpose()?.unwrap_or(0);
    if cats > inner {
        return Err(r.malformed(&block.name, format!("num_cat {cats} but the tree has {inner} splits")));
    }
    let (bounds, words): (Vec<usize>, Vec<u32>) = if cats > 0 {
        let bounds: Vec<usize> = block.list(r, "cat_boundaries", cats + 1)?;
        let total = bounds.last().copied().unwrap_or(0);
        (bounds, block.list(r, "cat_threshold", total)?)
    } else {
        (Vec::new(), Vec::new())
    };
    // Raw ids: inner nodes 0..inner, leaf j is inner + j.
    let raw = |c: i64, place: &str| -> Result<u32, ImportError> {
        let id = if c >= 0 { c } else { inner as i64 + (-c - 1) };
        if c >= inner as i64 || id < 0 || id >= (inner + leaves) as i64 {
            return Err(r.malformed(place, format!("child {c} but the tree has {inner} splits and {leaves} leaves")));
        }
        Ok(id as u32)
    };
    let first_set = sets.len();
    let mut made: Vec<Option<u32>> = vec![None; cats];
    let mut new_sets: Vec<Vec<u32>> = Vec::new();
    let nodes = flatten(
        0,
        inner + leaves,
        |id| {
            let i = id as usize;
            covers.push(if i >= inner {
                leaf_count.as_ref().map_or(f64::NAN, |c| c[i - inner])
            } else {
                internal_count.as_ref().map_or(f64::NAN, |c| c[i])
            });
            if i >= inner {
                return leaf(i - inner);
            }
            let place = format!("tree {t} node {i}");
            let f = rules.feature(&place, feature[i])?;
            let (l, rt) = (raw(left[i], &place)?, raw(right[i], &place)?);
            let d = decision[i];
            let default_left = d & 2 != 0;
            let missing_type = (d >> 2) & 3;
            if d & 1 != 0 {
                let c = threshold[i];
                if !(c >= 0.0 && c.fract() == 0.0 && (c as usize) < cats) {
                    return Err(r.malformed(&place, format!("categorical split names set {c} but the tree has {cats}")));
                }
                let c = c as usize;
                let set = match made[c] {
                    Some(s) => s,
                    None => {
                        let (lo, hi) = (bounds[c], bounds[c + 1]);
                        if lo > hi || hi > words.len() {
                            return Err(r.malformed(
                                &place,
                                format!("cat_boundaries {lo}..{hi} outside cat_threshold's {} words", words.len()),
                            ));
                        }
                        new_sets.push(words[lo..hi].to_vec());
                        let s = (first_set + new_sets.len() - 1) as u32;
                        made[c] = Some(s);
                        s
                    }
                };
                return Ok(Node::Member {
                    feature: f,
                    set,
                    left: l,
                    right: rt,
                    missing: Branch::Right,
                    members: Branch::Left,
                });
            }
            let t_value = rules.threshold(&place, threshold[i])?;
            let way = |left: bool| if left { Branch::Left } else { Branch::Right };
            Ok(match missing_type {
                // None: an absent value is taken as 0.
                0 => Node::Split { feature: f, threshold: t_value, left: l, right: rt, missing: way(0.0 <= t_value) },
                1 => Node::SplitZeroAbsent {
                    feature: f,
                    threshold: t_value,
                    left: l,
                    right: rt,
                    missing: way(default_left),
                },
                2 => Node::Split { feature: f, threshold: t_value, left: l, right: rt, missing: way(default_left) },
                other => {
                    return Err(r.malformed(
                        &place,
                        format!("decision_type {d}: missing type {other} is not None, Zero or NaN"),
                    ));
                }
            })
        },
        || r.malformed(&block.name, "a node is reached twice: the children do not form a tree"),
    )?;
    sets.extend(new_sets);
    let recorded = leaf_count.is_some() && internal_count.is_some();
    Ok((nodes, recorded.then_some(covers)))
}
