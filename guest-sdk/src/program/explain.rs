//! Per-row contributions of a scoring program, for the programs whose
//! value is a sum of parts that each read one feature:
//!
//! - **regression tables** (PMML's `RegressionModel`): each term goes to
//!   the one feature it reads (through derived fields that read only that
//!   feature), the intercept and terms reading no feature to the baseline —
//!   the uncentred form, as for linear models. The margin is the table's
//!   score before `normalizationMethod`: none, `exp`, `logit` (and a
//!   two-class `logit`, whose second class is the first's complement),
//!   `softmax`.
//! - **trees** (PMML's `TreeModel`), alone or as the segments of a sum,
//!   average, weighted average or (weighted) majority vote: the
//!   path-dependent algorithm of the trees guest, generalised to nodes with
//!   any number of children. Covers are each `Node`'s `recordCount`; each
//!   node's children must all test the same feature.
//!
//! Anything else — model chains, `selectFirst`, segments with conditions,
//! terms reading several features, clamped or rounded targets, other
//! normalisations — is declined, naming the PMML element.

use ndarray::{ArrayView2, ArrayViewMut2};

use super::{
    Cast, Choice, Emit, Ensemble, Expr, Kind, Normalize, Predicate, Program, RegressionTable, Rescale, Submodel,
    TreeNode, WhenUnknown, choose, eval,
};
use crate::MarginLink;
use crate::contributions::{PathTree, Split, Walk, contribute_tree};

/// Deepest tree explained: the path buffer grows with its square.
const DEEPEST: usize = 256;

/// The features a value depends on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Source {
    /// None: a constant.
    Constant,
    /// One feature (contract index).
    Feature(u32),
    /// More than one.
    Several,
}

impl Source {
    fn join(self, other: Source) -> Source {
        match (self, other) {
            (Source::Constant, x) | (x, Source::Constant) => x,
            (Source::Feature(a), Source::Feature(b)) if a == b => Source::Feature(a),
            _ => Source::Several,
        }
    }
}

/// Each slot's source, features first, then derived fields in the order
/// they are computed: the program's, then its model's and its segments'.
struct Sources(Vec<Source>);

impl Sources {
    fn of(program: &Program) -> Sources {
        let p = &program.params;
        let mut sources = vec![Source::Constant; p.slots as usize];
        for (f, s) in sources.iter_mut().enumerate().take(p.inputs.len()) {
            *s = Source::Feature(f as u32);
        }
        let mut this = Sources(sources);
        for (slot, e) in &p.derived {
            this.0[*slot as usize] = this.expr(e);
        }
        this.model(&p.model);
        this
    }

    fn model(&mut self, m: &Submodel) {
        for (slot, e) in &m.derived {
            self.0[*slot as usize] = self.expr(e);
        }
        if let Kind::Segments { segments, .. } = &m.kind {
            for s in segments {
                self.model(&s.model);
            }
        }
    }

    fn slot(&self, s: u32) -> Source {
        self.0[s as usize]
    }

    fn expr(&self, e: &Expr) -> Source {
        match e {
            Expr::Constant(_) => Source::Constant,
            Expr::Field(f)
            | Expr::Norm { field: f, .. }
            | Expr::Indicator { field: f, .. }
            | Expr::Bins { field: f, .. } => self.slot(*f),
            Expr::Lookup { fields, .. } => fields.iter().fold(Source::Constant, |a, f| a.join(self.slot(*f))),
            Expr::Apply { args, .. } => args.iter().fold(Source::Constant, |a, e| a.join(self.expr(e))),
        }
    }

    fn predicate(&self, p: &Predicate) -> Source {
        match p {
            Predicate::True | Predicate::False => Source::Constant,
            Predicate::Compare { field, .. }
            | Predicate::IsMissing(field)
            | Predicate::IsNotMissing(field)
            | Predicate::InSet { field, .. } => self.slot(*field),
            Predicate::Compound { parts, .. } => parts.iter().fold(Source::Constant, |a, q| a.join(self.predicate(q))),
        }
    }
}

/// An affine map of the margin (a `Target`'s factor and constant).
#[derive(Clone, Copy, Debug)]
struct Affine {
    factor: f64,
    constant: f64,
}

impl Affine {
    const NONE: Affine = Affine { factor: 1.0, constant: 0.0 };

    /// A regression's `Target` rescaling, if it is affine.
    fn of(rescale: Option<Rescale>) -> Result<Affine, String> {
        match rescale {
            None => Ok(Affine::NONE),
            Some(r) if r.min == f64::NEG_INFINITY && r.max == f64::INFINITY && r.cast == Cast::None => {
                Ok(Affine { factor: r.factor, constant: r.constant })
            }
            Some(_) => Err("a Target with min, max or castInteger (the value is clamped or rounded, not a sum)".into()),
        }
    }
}

/// How one program is explained.
enum Plan<'a> {
    /// Regression tables; per output: the table and the sign its margin takes.
    Tables { model: &'a Submodel, outputs: Vec<(usize, f64)>, affine: Affine, links: Vec<MarginLink> },
    /// Trees, each with its share of the whole.
    Trees { trees: Vec<(&'a Submodel, f64)>, vote: bool, affine: Affine },
}

/// Contributions of `program` for `rows` into `out` (per output: features,
/// baseline, margin), or why it cannot give them.
pub(super) fn explain(
    program: &Program,
    rows: ArrayView2<'_, f64>,
    mut out: ArrayViewMut2<'_, f64>,
) -> Result<Vec<MarginLink>, String> {
    let sources = Sources::of(program);
    let plan = plan(program, &sources)?;
    let (features, outputs) = (program.params.inputs.len(), program.params.outputs.len());
    let width = outputs * (features + 2);
    crate::contributions::fits(rows.dim(), out.dim(), features, width)?;
    let mut slots = Vec::with_capacity(program.params.slots as usize);
    let mut scores = vec![0.0; outputs];
    for (r, (x, mut o)) in rows.outer_iter().zip(out.outer_iter_mut()).enumerate() {
        let x = x.to_vec();
        program.row(&x, &mut slots, &mut scores);
        if let Some(k) = scores.iter().position(|v| v.is_nan()) {
            return Err(format!("row {}: the program gives no prediction for output {k} to explain", r + 1));
        }
        program.prepare(&x, &mut slots);
        let block = o.as_slice_mut().ok_or("contributions: the output rows are not contiguous")?;
        block.iter_mut().for_each(|v| *v = 0.0);
        match &plan {
            Plan::Tables { model, outputs, affine, .. } => tables(model, outputs, *affine, &sources, &mut slots, block),
            Plan::Trees { trees, vote, affine } => {
                let walked = Walked { program, sources: &sources, vote: *vote, affine: *affine };
                walked.trees(trees, &mut slots, &scores, block);
            }
        }
        if block.iter().any(|v| v.is_nan()) {
            return Err(format!(
                "row {}: a path the contributions weigh gives no prediction (a node with no score, or no \
                 child chosen)",
                r + 1
            ));
        }
    }
    Ok(match plan {
        Plan::Tables { links, .. } => links,
        Plan::Trees { .. } => vec![MarginLink::Identity; outputs],
    })
}

/// Whether `program` can be explained, or why not.
pub(super) fn explains(program: &Program) -> Result<(), String> {
    plan(program, &Sources::of(program)).map(|_| ())
}

/// How `program` is explained, or why it is not.
fn plan<'a>(program: &'a Program, sources: &Sources) -> Result<Plan<'a>, String> {
    let m = &program.params.model;
    let emits = &program.params.outputs;
    match &m.kind {
        Kind::Regression { tables, normalize } => {
            for t in tables {
                let reads = t
                    .numeric
                    .iter()
                    .map(|(s, _, _)| sources.slot(*s))
                    .chain(t.categorical.iter().map(|(s, _, _)| sources.slot(*s)))
                    .chain(
                        t.products
                            .iter()
                            .map(|(ss, _)| ss.iter().fold(Source::Constant, |a, s| a.join(sources.slot(*s)))),
                    );
                if reads.into_iter().any(|s| s == Source::Several) {
                    return Err("a RegressionTable term (a PredictorTerm, or a predictor on a derived field) reads \
                                several features: contributions need each term to read one"
                        .into());
                }
            }
            let (outputs, links) = table_outputs(m, tables, *normalize, emits)?;
            let affine = if *normalize == Normalize::None { Affine::of(m.rescale)? } else { Affine::NONE };
            if *normalize != Normalize::None && m.rescale.is_some() {
                return Err("a Target rescaling after a normalizationMethod: the value is not the margin's sum".into());
            }
            Ok(Plan::Tables { model: m, outputs, affine, links })
        }
        Kind::Tree { .. } => {
            check_tree(m, sources)?;
            Ok(Plan::Trees { trees: vec![(m, 1.0)], vote: false, affine: Affine::of(m.rescale)? })
        }
        Kind::Segments { method, segments } => {
            let weighted = matches!(method, Ensemble::WeightedAverage | Ensemble::WeightedMajorityVote);
            let vote = matches!(method, Ensemble::MajorityVote | Ensemble::WeightedMajorityVote);
            let divides = !matches!(method, Ensemble::Sum);
            if matches!(method, Ensemble::Chain | Ensemble::SelectFirst) {
                let name = if *method == Ensemble::Chain { "modelChain" } else { "selectFirst" };
                return Err(format!(
                    "a Segmentation multipleModelMethod=\"{name}\": contributions are given for \
                                    sums, averages and votes of trees"
                ));
            }
            if vote && m.classes == 0 {
                return Err("a Segmentation vote over regressions".into());
            }
            let total: f64 = segments.iter().map(|s| if weighted { s.weight } else { 1.0 }).sum();
            let mut trees = Vec::with_capacity(segments.len());
            for (i, s) in segments.iter().enumerate() {
                if s.predicate != Predicate::True {
                    return Err(format!(
                        "Segment {}: a predicate other than <True/> (the segments a row uses vary)",
                        i + 1
                    ));
                }
                if !matches!(s.model.kind, Kind::Tree { .. }) || s.model.rescale.is_some() {
                    return Err(format!("Segment {}: not a TreeModel without Targets", i + 1));
                }
                check_tree(&s.model, sources).map_err(|e| format!("Segment {}: {e}", i + 1))?;
                let w = if weighted { s.weight } else { 1.0 };
                trees.push((&s.model, if divides { w / total } else { w }));
            }
            Ok(Plan::Trees { trees, vote, affine: Affine::of(m.rescale)? })
        }
    }
}

/// Per output: the table its margin is and the sign it takes; and its link.
type TableOutputs = (Vec<(usize, f64)>, Vec<MarginLink>);

/// Per output: the table its margin is and its sign, and its link.
fn table_outputs(
    m: &Submodel,
    tables: &[RegressionTable],
    normalize: Normalize,
    emits: &[Emit],
) -> Result<TableOutputs, String> {
    let method = |n: Normalize| format!("{n:?}").to_lowercase();
    let mut outputs = Vec::with_capacity(emits.len());
    let mut links = Vec::with_capacity(emits.len());
    for e in emits {
        let (at, link) = match (m.classes, normalize, *e) {
            (0, Normalize::None, _) => ((0, 1.0), MarginLink::Identity),
            (0, Normalize::Exp, _) => ((0, 1.0), MarginLink::Exp),
            (0, Normalize::Logit | Normalize::Softmax, _) => ((0, 1.0), MarginLink::Logistic),
            (_, Normalize::Softmax, Emit::Probability(k)) => {
                let t = tables.iter().position(|t| t.class == k).ok_or("a class with no RegressionTable")?;
                ((t, 1.0), MarginLink::Softmax)
            }
            // Two classes: the first table's logistic, the second class its complement.
            (2, Normalize::Logit, Emit::Probability(k)) => {
                ((0, if tables[0].class == k { 1.0 } else { -1.0 }), MarginLink::Logistic)
            }
            (_, n, _) => {
                return Err(format!(
                    "a RegressionModel normalizationMethod=\"{}\" over {} classes: contributions are given on the \
                     scale of none, exp, logit (up to two classes) and softmax",
                    method(n),
                    m.classes
                ));
            }
        };
        outputs.push(at);
        links.push(link);
    }
    Ok((outputs, links))
}

/// Checks that a tree can be walked: covers on every node (a split's
/// positive), each split's children testing one feature, leaves with a
/// score, and not too deep.
fn check_tree(m: &Submodel, sources: &Sources) -> Result<(), String> {
    let Kind::Tree { nodes, .. } = &m.kind else { unreachable!("checked by the caller") };
    if nodes[0].predicate != Predicate::True {
        return Err("a TreeModel whose root Node has a predicate other than <True/>".into());
    }
    for (i, n) in nodes.iter().enumerate() {
        if !(n.cover >= 0.0 && n.cover.is_finite()) {
            return Err(format!("tree node {i}: a Node without recordCount (contributions need each node's)"));
        }
        if n.children.is_empty() {
            if n.score.is_nan() {
                return Err(format!("tree node {i}: a leaf Node without a score"));
            }
            continue;
        }
        if n.cover <= 0.0 {
            return Err(format!("tree node {i}: recordCount 0 on a Node with children"));
        }
        let read =
            n.children.iter().fold(Source::Constant, |a, c| a.join(sources.predicate(&nodes[*c as usize].predicate)));
        if !matches!(read, Source::Feature(_)) {
            let what = if read == Source::Constant { "no feature" } else { "several features" };
            return Err(format!(
                "tree node {i}: its child Nodes' predicates read {what}: contributions need each split to read one"
            ));
        }
    }
    let deepest = depth(nodes);
    if deepest > DEEPEST {
        return Err(format!("a TreeModel {deepest} levels deep: contributions are given up to {DEEPEST}"));
    }
    Ok(())
}

/// A tree's depth (a lone node: 0).
fn depth(nodes: &[TreeNode]) -> usize {
    let mut level = vec![0usize; nodes.len()];
    for i in 0..nodes.len() {
        for &c in &nodes[i].children {
            level[c as usize] = level[i] + 1;
        }
    }
    level.into_iter().max().unwrap_or(0)
}

/// A row's terms, each to its feature, for each output's table.
fn tables(
    m: &Submodel,
    outputs: &[(usize, f64)],
    affine: Affine,
    sources: &Sources,
    slots: &mut [f64],
    block: &mut [f64],
) {
    for (slot, e) in &m.derived {
        slots[*slot as usize] = eval(e, slots);
    }
    let Kind::Regression { tables, .. } = &m.kind else { unreachable!("a regression plan") };
    let features = block.len() / outputs.len() - 2;
    for (k, &(t, sign)) in outputs.iter().enumerate() {
        let table = &tables[t];
        let out = &mut block[k * (features + 2)..(k + 1) * (features + 2)];
        let mut add = |source: Source, v: f64| match source {
            Source::Feature(f) => out[f as usize] += v,
            _ => out[features] += v,
        };
        // The margin in scoring's order: the intercept, then each term.
        let mut y = table.intercept;
        add(Source::Constant, table.intercept);
        for (s, exponent, c) in &table.numeric {
            let x = slots[*s as usize];
            let v = c * if *exponent == 1.0 { x } else { libm::pow(x, *exponent) };
            y += v;
            add(sources.slot(*s), v);
        }
        for (s, value, c) in &table.categorical {
            let v = if slots[*s as usize] == *value { *c } else { 0.0 };
            y += v;
            add(sources.slot(*s), v);
        }
        for (ss, c) in &table.products {
            let v = c * ss.iter().map(|s| slots[*s as usize]).product::<f64>();
            y += v;
            add(ss.iter().fold(Source::Constant, |a, s| a.join(sources.slot(*s))), v);
        }
        out.iter_mut().take(features + 1).for_each(|v| *v *= sign * affine.factor);
        out[features] += affine.constant;
        out[features + 1] = sign * y * affine.factor + affine.constant;
    }
}

/// Trees of a program being walked.
struct Walked<'a> {
    program: &'a Program,
    sources: &'a Sources,
    vote: bool,
    affine: Affine,
}

impl Walked<'_> {
    fn trees(&self, trees: &[(&Submodel, f64)], slots: &mut [f64], scores: &[f64], block: &mut [f64]) {
        let (features, outputs) = (self.program.params.inputs.len(), self.program.params.outputs.len());
        let blocks = features + 1;
        let mut phi = vec![0.0; outputs * blocks];
        let deepest = trees.iter().map(|(m, _)| tree_nodes(m).map_or(0, depth)).max().unwrap_or(0);
        for &(m, share) in trees {
            for (slot, e) in &m.derived {
                slots[*slot as usize] = eval(e, slots);
            }
            let Kind::Tree { nodes, unknown, last_when_no_child } = &m.kind else { unreachable!("a tree plan") };
            let tree = ProgramTree {
                nodes,
                unknown: *unknown,
                last_when_no_child: *last_when_no_child,
                sources: self.sources,
                emits: &self.program.params.outputs,
                features,
                vote: self.vote,
                share,
            };
            for (k, expected) in tree.expected().into_iter().enumerate() {
                phi[k * blocks + features] += expected;
            }
            // One more level than the tree: a row may stop at a node.
            let mut walk = Walk::new(slots, &mut phi, deepest + 1);
            contribute_tree(&tree, &mut walk, 0, 0);
        }
        for k in 0..outputs {
            let out = &mut block[k * (features + 2)..(k + 1) * (features + 2)];
            for (o, p) in out.iter_mut().zip(&phi[k * blocks..(k + 1) * blocks]) {
                *o = p * self.affine.factor;
            }
            out[features] += self.affine.constant;
            out[features + 1] = scores[k];
        }
    }
}

fn tree_nodes(m: &Submodel) -> Option<&[TreeNode]> {
    match &m.kind {
        Kind::Tree { nodes, .. } => Some(nodes),
        _ => None,
    }
}

/// One program tree, as the path-dependent algorithm walks it.
struct ProgramTree<'a> {
    nodes: &'a [TreeNode],
    unknown: WhenUnknown,
    last_when_no_child: bool,
    sources: &'a Sources,
    emits: &'a [Emit],
    features: usize,
    /// Whether the tree votes for its class (a majority vote's segment).
    vote: bool,
    /// Its share of the whole.
    share: f64,
}

impl ProgramTree<'_> {
    /// Node `n`'s answer for output `e`, times the tree's share (NaN: none).
    fn value(&self, n: usize, e: Emit) -> f64 {
        let node = &self.nodes[n];
        if node.score.is_nan() {
            return f64::NAN;
        }
        let v = match e {
            Emit::Value => node.score,
            Emit::Probability(k) if self.vote || node.probabilities.is_empty() => {
                f64::from(u8::from(k as f64 == node.score))
            }
            Emit::Probability(k) => node.probabilities[k as usize],
        };
        v * self.share
    }

    /// The tree's expected value per output: each child weighed by its
    /// share of its parent's cover, from the leaves up.
    fn expected(&self) -> Vec<f64> {
        let mut at: Vec<Vec<f64>> = vec![Vec::new(); self.nodes.len()];
        for n in (0..self.nodes.len()).rev() {
            let node = &self.nodes[n];
            at[n] = if node.children.is_empty() {
                self.emits.iter().map(|e| self.value(n, *e)).collect()
            } else {
                let mut sum = vec![0.0; self.emits.len()];
                for &c in &node.children {
                    let w = self.nodes[c as usize].cover / node.cover;
                    sum.iter_mut().zip(&at[c as usize]).for_each(|(s, v)| *s += w * v);
                }
                sum
            };
        }
        std::mem::take(&mut at[0])
    }
}

impl PathTree for ProgramTree<'_> {
    fn features(&self) -> usize {
        self.features
    }

    fn cover(&self, n: usize) -> f64 {
        self.nodes[n].cover
    }

    fn split(&self, n: usize, row: &[f64]) -> Split<'_> {
        let node = &self.nodes[n];
        if node.children.is_empty() {
            return Split::Leaf;
        }
        let read = node
            .children
            .iter()
            .fold(Source::Constant, |a, c| a.join(self.sources.predicate(&self.nodes[*c as usize].predicate)));
        let Source::Feature(feature) = read else { unreachable!("checked: each split reads one feature") };
        let (taken, answers) = match choose(self.nodes, self.unknown, self.last_when_no_child, n, row) {
            Choice::Child(c) => (Some(c), true),
            Choice::Stop => (None, true),
            Choice::Nothing => (None, false),
        };
        Split::Many { feature: i64::from(feature), children: &node.children, taken, answers }
    }

    fn values(&self, n: usize, _output: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        self.emits.iter().enumerate().map(move |(k, e)| (k, self.value(n, *e)))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::program::{Compare, Input, Outliers, ProgramParams};
    use ndarray::Array2;

    fn node(predicate: Predicate, score: f64, cover: f64, children: Vec<u32>) -> TreeNode {
        TreeNode { predicate, score, probabilities: vec![], children, default_child: None, cover }
    }

    fn cmp(field: u32, op: Compare, value: f64) -> Predicate {
        Predicate::Compare { field, op, value }
    }

    /// A three-way split on x0, its middle child split on x1; a row whose
    /// x1 is absent stops at the middle child (lastPrediction).
    fn program() -> Program {
        let nodes = vec![
            node(Predicate::True, f64::NAN, 10.0, vec![1, 2, 5]),
            node(cmp(0, Compare::LessThan, 1.0), 1.0, 3.0, vec![]),
            node(cmp(0, Compare::LessThan, 2.0), 0.5, 5.0, vec![3, 4]),
            node(cmp(1, Compare::LessOrEqual, 0.0), 4.0, 2.0, vec![]),
            node(cmp(1, Compare::GreaterThan, 0.0), -2.0, 3.0, vec![]),
            node(cmp(0, Compare::GreaterOrEqual, 2.0), 7.0, 2.0, vec![]),
        ];
        let input = Input { replacement: f64::NAN, valid: vec![], outliers: Outliers::AsIs };
        Program::new(ProgramParams {
            inputs: vec![input.clone(), input],
            slots: 2,
            derived: vec![],
            model: Submodel {
                derived: vec![],
                kind: Kind::Tree { nodes, unknown: WhenUnknown::LastPrediction, last_when_no_child: false },
                classes: 0,
                rescale: None,
                passes: vec![],
                after: vec![],
            },
            outputs: vec![Emit::Value],
        })
        .unwrap()
    }

    /// The path-dependent value of the tree for a row knowing only the
    /// features in `known` (Lundberg et al. 2018, Algorithm 1): a known
    /// feature's split follows the row, an unknown one averages the
    /// children by cover.
    fn value(p: &Program, n: usize, row: &[f64], known: &[bool]) -> f64 {
        let Kind::Tree { nodes, unknown, last_when_no_child } = &p.params.model.kind else { unreachable!() };
        let node = &nodes[n];
        if node.children.is_empty() {
            return node.score;
        }
        let f = match nodes[node.children[0] as usize].predicate {
            Predicate::Compare { field, .. } => field as usize,
            _ => unreachable!(),
        };
        if known[f] {
            return match choose(nodes, *unknown, *last_when_no_child, n, row) {
                Choice::Child(c) => value(p, c, row, known),
                _ => node.score,
            };
        }
        node.children.iter().map(|&c| nodes[c as usize].cover / node.cover * value(p, c as usize, row, known)).sum()
    }

    /// Contributions of a tree with a three-way split and a row that stops
    /// at an inner node, against Shapley values worked out from their
    /// definition over every subset of the two features.
    #[test]
    fn multiway_splits_and_stops_give_the_shapley_values_of_the_paths() {
        let p = program();
        for row in [[0.5, 1.0], [1.5, -1.0], [1.5, f64::NAN], [3.0, f64::NAN]] {
            let v = |a: bool, b: bool| value(&p, 0, &row, &[a, b]);
            // Two features: φ₀ = ½(v({0}) − v(∅)) + ½(v({0,1}) − v({1})).
            let phi0 = 0.5 * (v(true, false) - v(false, false)) + 0.5 * (v(true, true) - v(false, true));
            let phi1 = 0.5 * (v(false, true) - v(false, false)) + 0.5 * (v(true, true) - v(true, false));
            let rows = Array2::from_shape_vec((1, 2), row.to_vec()).unwrap();
            let mut out = Array2::zeros((1, 4));
            let links = explain(&p, rows.view(), out.view_mut()).unwrap();
            assert_eq!(links, vec![MarginLink::Identity]);
            let want = [phi0, phi1, v(false, false), v(true, true)];
            for (g, w) in out.row(0).iter().zip(want) {
                assert!((g - w).abs() < 1e-12, "{row:?}: {:?}, want {want:?}", out.row(0));
            }
        }
    }

    /// A row the program gives no prediction for is refused, naming it.
    #[test]
    fn a_row_with_no_prediction_is_refused() {
        let mut p = program();
        let Kind::Tree { unknown, .. } = &mut p.params.model.kind else { unreachable!() };
        *unknown = WhenUnknown::NoPrediction;
        let rows = Array2::from_shape_vec((1, 2), vec![1.5, f64::NAN]).unwrap();
        let mut out = Array2::zeros((1, 4));
        let err = explain(&p, rows.view(), out.view_mut()).unwrap_err();
        assert_eq!(err, "row 1: the program gives no prediction for output 0 to explain");
    }
}
