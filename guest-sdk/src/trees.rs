//! Tree ensembles: boosted sums of regression trees with a base score, or
//! averaged trees (forests), with a missing-value direction at every split,
//! numeric or categorical splits, one tree group per class, and an output
//! link, in the precision the training toolkit used.

use ndarray::{ArrayView2, ArrayViewMut2};
use serde::{Deserialize, Serialize};

use crate::MarginLink;
use crate::exp;
use crate::generic::Evaluate;
use crate::layout::{Doubled, LANES as LANES_OF_TREES, Laid, Layout};

/// How a split compares a feature with its threshold to go left.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum SplitRule {
    /// Left when `value < threshold` (the usual rule of gradient-boosting libraries).
    Less,
    /// Left when `value <= threshold` (the usual rule of CART implementations).
    LessOrEqual,
}

/// Where a row whose feature is absent (NaN) goes at a split.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Branch {
    /// To the left child.
    Left,
    /// To the right child.
    Right,
}

/// How the trees of one output combine.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Combine {
    /// `base + leaf₁ + leaf₂ + …`, added in tree order (boosting).
    Sum,
    /// `base + (leaf₁ + leaf₂ + …) / n`, n the output's tree count (forests).
    Mean,
}

/// The precision of a step of the evaluation.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Precision {
    /// IEEE double precision throughout.
    Double,
    /// Rounded to IEEE single precision (`f32`) at every step, as toolkits
    /// that store features, thresholds and sums as `float` compute.
    Single,
}

/// What is applied to each row's combined outputs.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub enum OutputLink {
    /// The combined value itself.
    Identity,
    /// `1 / (1 + e^(−scale·x))` on each output.
    Logistic {
        /// Multiplies the value first (1 for the plain logistic function).
        scale: f64,
    },
    /// `e^x` on each output (log-link regressions: counts, durations).
    Exp,
    /// `e^(xₖ − max) / Σ e^(xⱼ − max)` over the outputs: one probability per
    /// class. The sum is kept in double precision in both precisions.
    Softmax,
}

/// One node of a tree.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub enum Node {
    /// An inner node. Children must have larger indices than their parent,
    /// which rules out cycles.
    Split {
        /// Feature index, in contract order.
        feature: u32,
        /// Threshold compared by the ensemble's [`SplitRule`].
        threshold: f64,
        /// Index of the left child in the tree's node list.
        left: u32,
        /// Index of the right child in the tree's node list.
        right: u32,
        /// Where an absent value goes.
        missing: Branch,
    },
    /// A leaf and its value.
    Leaf {
        /// What this tree adds for rows that end here.
        value: f64,
    },
    /// As [`Node::Split`], but a value within ±1e-35 (as `f32`) of zero is
    /// absent too and goes the `missing` way (LightGBM's "zero as missing").
    SplitZeroAbsent {
        /// Feature index, in contract order.
        feature: u32,
        /// Threshold compared by the ensemble's [`SplitRule`].
        threshold: f64,
        /// Index of the left child.
        left: u32,
        /// Index of the right child.
        right: u32,
        /// Where an absent (NaN or zero) value goes.
        missing: Branch,
    },
    /// A categorical split: the value, truncated to a whole number, is
    /// looked up in a set of categories. A negative value, or one past the
    /// set's last word, is not in the set.
    Member {
        /// Feature index, in contract order.
        feature: u32,
        /// Index of the set in [`TreesParams::sets`].
        set: u32,
        /// Index of the left child.
        left: u32,
        /// Index of the right child.
        right: u32,
        /// Where an absent value goes.
        missing: Branch,
        /// Where a value in the set goes; every other value goes the other way.
        members: Branch,
    },
    /// A leaf adding one value to every output (forests of classifiers,
    /// whose leaves hold a probability per class).
    Leaves {
        /// Index in [`TreesParams::vectors`] of the first of the outputs' values.
        first: u32,
    },
}

/// One regression tree; node 0 is the root.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Tree {
    /// The output this tree's [`Node::Leaf`]s contribute to (its class, for
    /// one tree per class and round). A tree with [`Node::Leaves`] feeds
    /// every output and ignores this.
    pub output: u32,
    /// The nodes; node 0 is the root.
    pub nodes: Vec<Node>,
}

/// Parameters of a tree ensemble, as training code (or an importer) writes them.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TreesParams {
    /// Number of features each row carries.
    pub features: u32,
    /// One base score per output (its length sets the number of outputs).
    pub base: Vec<f64>,
    /// How trees combine.
    pub combine: Combine,
    /// How splits compare.
    pub split: SplitRule,
    /// The trees, in the order their leaves are added.
    pub trees: Vec<Tree>,
    /// Whether feature values are rounded to `f32` before any split.
    pub inputs: Precision,
    /// The precision of the sums, the mean and the link.
    pub arithmetic: Precision,
    /// What turns the combined values into the outputs.
    pub link: OutputLink,
    /// Category sets of [`Node::Member`] splits: bit `c % 32` of word
    /// `c / 32` is set when category `c` is in the set.
    pub sets: Vec<Vec<u32>>,
    /// Values of [`Node::Leaves`] leaves, one per output each.
    pub vectors: Vec<f64>,
    /// Each tree's node covers, one list per tree and one number per node
    /// in node order — the training rows (or hessian) that reached each
    /// node, as the toolkit recorded — or none. Per-row contributions
    /// need them ([`Trees::with_covers`]); scoring does not read them.
    pub covers: Vec<Vec<f64>>,
}

impl TreesParams {
    /// Boosted regression trees in double precision with no link: the
    /// parameters of a plain gradient-boosted ensemble.
    pub fn boosted(features: u32, base: f64, split: SplitRule, trees: Vec<Tree>) -> Self {
        TreesParams {
            features,
            base: vec![base],
            combine: Combine::Sum,
            split,
            trees,
            inputs: Precision::Double,
            arithmetic: Precision::Double,
            link: OutputLink::Identity,
            sets: Vec::new(),
            vectors: Vec::new(),
            covers: Vec::new(),
        }
    }
}

/// Node kinds in the flattened form.
/// Ordered so one comparison picks the common path: kinds below
/// `ZERO_ABSENT` step by a plain comparison (a leaf's children are itself).
const NUMERIC: u8 = 0;
const LEAF: u8 = 1;
const LEAVES: u8 = 2;
const ZERO_ABSENT: u8 = 3;
const MEMBER: u8 = 4;

/// Whether a flattened node is a leaf of either kind.
#[inline(always)]
fn is_leaf(kind: u8) -> bool {
    kind.wrapping_sub(LEAF) < 2
}

/// Rows that walk a tree together (node by node).
const LANES: usize = 4;

/// Rows scored together through every tree, a block at a time (256 measured
/// best in the sandbox, against 64 and every row at once: 2.7 ms against
/// 2.75 and 2.9 for 1 024 rows through 300 trees).
const BLOCK_ROWS: usize = 256;

/// LightGBM's `kZeroThreshold`, a `float` literal.
const ZERO: f64 = 1e-35f32 as f64;

/// A flattened node. A leaf's value is kept in `threshold`, and both its
/// children are itself, so stepping from a leaf stays there; [`Node::Leaves`]
/// keeps its first index in `start`; a [`Node::Member`] keeps its set as
/// (`start`, `words`) in the flattened words.
#[derive(Clone, Copy, Debug)]
struct Flat {
    threshold: f64,
    feature: u32,
    left: u32,
    right: u32,
    start: u32,
    words: u16,
    kind: u8,
    /// Bit 0: absent values go left; bit 1: members go left.
    goes_left: u8,
}

/// A tree ensemble ready to evaluate.
#[derive(Clone, Debug)]
pub struct Trees {
    features: usize,
    base: Vec<f64>,
    combine: Combine,
    less_or_equal: bool,
    inputs: Precision,
    arithmetic: Precision,
    link: OutputLink,
    /// (first node, output) of each tree in `nodes`.
    roots: Vec<(usize, usize)>,
    /// Each tree's place in `layout`, for the trees laid out there
    /// (scoring walks those there; contributions walk `nodes`).
    laid: Vec<Option<Laid>>,
    layout: Layout,
    nodes: Vec<Flat>,
    words: Vec<u32>,
    vectors: Vec<f64>,
    /// Trees feeding each output (the divisor of [`Combine::Mean`]).
    counts: Vec<f64>,
    /// What contributions need, once [`Trees::with_covers`] gave it.
    explain: Option<Explain>,
}

/// Each node's cover (aligned with the flattened nodes), each tree's
/// expected value per output over its training rows (`outputs` per tree;
/// `None` for an output the tree does not feed), and the deepest tree's depth.
#[derive(Clone, Debug)]
struct Explain {
    covers: Vec<f64>,
    expected: Vec<Option<f64>>,
    depth: usize,
}

impl Trees {
    /// Checks the parameters and builds the ensemble.
    ///
    /// # Errors
    /// When there is no output, a tree is empty or names an unknown output,
    /// a split names an unknown feature, set or a child that is not after it
    /// in the tree, a tree mixes [`Node::Leaf`] and [`Node::Leaves`], the
    /// link is softmax over one output, a number is not finite, or covers
    /// are given that do not fit ([`Trees::with_covers`]). The message
    /// names tree and node.
    pub fn new(mut params: TreesParams) -> Result<Self, String> {
        validate(&params)?;
        let covers = std::mem::take(&mut params.covers);
        let trees = Trees::flatten(params);
        if covers.is_empty() { Ok(trees) } else { trees.with_covers(&covers) }
    }

    /// Lays valid params out for evaluation: every tree's nodes in one
    /// array (children as absolute indices, leaves pointing at themselves),
    /// every set's words in another, and the number of trees per output.
    fn flatten(params: TreesParams) -> Trees {
        let outputs = params.base.len();
        let mut set_at = Vec::with_capacity(params.sets.len());
        let mut words = Vec::new();
        for set in &params.sets {
            set_at.push((words.len() as u32, set.len() as u16));
            words.extend_from_slice(set);
        }
        let mut nodes = Vec::with_capacity(params.trees.iter().map(|t| t.nodes.len()).sum());
        let mut roots = Vec::with_capacity(params.trees.len());
        let mut layout = Layout::new(params.features as usize);
        let laid = params.trees.iter().map(|tree| layout.lay(tree)).collect();
        let mut counts = vec![0.0f64; outputs];
        let side = |missing: Branch, members: Branch| {
            u8::from(missing == Branch::Left) | (u8::from(members == Branch::Left) << 1)
        };
        for tree in &params.trees {
            let (offset, output) = (nodes.len(), tree.output as usize);
            roots.push((offset, output));
            let at = |child: u32| (offset + child as usize) as u32;
            let blank =
                Flat { threshold: 0.0, feature: 0, left: 0, right: 0, start: 0, words: 0, kind: LEAF, goes_left: 0 };
            for node in &tree.nodes {
                let me = nodes.len() as u32;
                nodes.push(match *node {
                    Node::Leaf { value } => Flat { threshold: value, left: me, right: me, ..blank },
                    Node::Leaves { first } => Flat { left: me, right: me, start: first, kind: LEAVES, ..blank },
                    Node::Split { feature, threshold, left, right, missing }
                    | Node::SplitZeroAbsent { feature, threshold, left, right, missing } => Flat {
                        threshold,
                        feature,
                        left: at(left),
                        right: at(right),
                        kind: if matches!(node, Node::Split { .. }) { NUMERIC } else { ZERO_ABSENT },
                        goes_left: side(missing, Branch::Right),
                        ..blank
                    },
                    Node::Member { feature, set, left, right, missing, members } => {
                        let (start, words) = set_at[set as usize];
                        Flat {
                            feature,
                            left: at(left),
                            right: at(right),
                            start,
                            words,
                            kind: MEMBER,
                            goes_left: side(missing, members),
                            ..blank
                        }
                    }
                });
            }
            if tree.nodes.iter().any(|n| matches!(n, Node::Leaves { .. })) {
                counts.iter_mut().for_each(|c| *c += 1.0);
            } else {
                counts[output] += 1.0;
            }
        }
        Trees {
            features: params.features as usize,
            base: params.base,
            combine: params.combine,
            less_or_equal: params.split == SplitRule::LessOrEqual,
            inputs: params.inputs,
            arithmetic: params.arithmetic,
            link: params.link,
            roots,
            laid,
            layout,
            nodes,
            words,
            vectors: params.vectors,
            counts,
            explain: None,
        }
    }

    /// The ensemble with each node's *cover* — the training rows (or the
    /// hessian) that reached it, as the toolkit recorded — so it can give
    /// per-row contributions ([`Trees::contributions`]). `covers` holds
    /// one list per tree, one number per node in the params' node order.
    ///
    /// # Errors
    /// When the lists do not match the trees and their nodes, a cover is
    /// negative or not finite, or a split's cover is zero. The message
    /// names tree and node.
    pub fn with_covers(mut self, covers: &[Vec<f64>]) -> Result<Trees, String> {
        if covers.len() != self.roots.len() {
            return Err(format!("covers: {} lists for {} trees", covers.len(), self.roots.len()));
        }
        let mut flat = Vec::with_capacity(self.nodes.len());
        for (t, (list, &(root, _))) in covers.iter().zip(&self.roots).enumerate() {
            let end = self.roots.get(t + 1).map_or(self.nodes.len(), |&(next, _)| next);
            if list.len() != end - root {
                return Err(format!("covers: tree {t} has {} nodes but {} covers", end - root, list.len()));
            }
            for (i, &c) in list.iter().enumerate() {
                let split = !is_leaf(self.nodes[root + i].kind);
                if !c.is_finite() || c < 0.0 || (split && c == 0.0) {
                    return Err(format!("covers: tree {t} node {i} has cover {c}"));
                }
            }
            flat.extend_from_slice(list);
        }
        let outputs = self.base.len();
        let mut explain = Explain { covers: flat, expected: Vec::with_capacity(self.roots.len() * outputs), depth: 0 };
        for &(root, k) in &self.roots {
            let (expected, depth) = self.expected_and_depth(root, k, &explain.covers);
            explain.expected.extend(expected);
            explain.depth = explain.depth.max(depth);
        }
        self.explain = Some(explain);
        Ok(self)
    }

    /// Whether the ensemble carries covers and so can give contributions.
    pub fn explains(&self) -> bool {
        self.explain.is_some()
    }

    /// Per-row contributions: for each row of `rows`, per output, one
    /// number per feature (contract order) and then the baseline; they
    /// sum to the output's combined value before the link (its margin).
    /// `out` has one row per row and `outputs × (features + 1)` columns,
    /// output by output.
    ///
    /// # Errors
    /// When the ensemble carries no covers, or `out` has the wrong shape.
    pub fn contributions(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) -> Result<(), String> {
        let Some(explain) = &self.explain else {
            return Err("these trees carry no covers: contributions need each node's cover".into());
        };
        let blocks = self.features + 1;
        let width = self.base.len() * blocks;
        crate::contributions::fits(rows.dim(), out.dim(), self.features, width)?;
        let mut row = vec![0.0; self.features];
        let mut phi = vec![0.0; width];
        for (x, mut o) in rows.outer_iter().zip(out.outer_iter_mut()) {
            for (r, &v) in row.iter_mut().zip(x.iter()) {
                *r = if self.inputs == Precision::Single { f64::from(v as f32) } else { v };
            }
            phi.iter_mut().for_each(|v| *v = 0.0);
            let mut walk = crate::contributions::Walk::new(&row, &mut phi, explain.depth);
            let outputs = self.base.len();
            for (t, &(root, k)) in self.roots.iter().enumerate() {
                for (j, e) in explain.expected[t * outputs..(t + 1) * outputs].iter().enumerate() {
                    if let Some(e) = e {
                        walk.phi[j * blocks + self.features] += e;
                    }
                }
                crate::contributions::contribute_tree(self, &mut walk, root, k);
            }
            for (k, base) in self.base.iter().enumerate() {
                let block = &mut phi[k * blocks..(k + 1) * blocks];
                // A forest's trees are averaged: so are their contributions.
                if self.combine == Combine::Mean {
                    block.iter_mut().for_each(|v| *v /= self.counts[k]);
                }
                block[self.features] += base;
            }
            for (o, p) in o.iter_mut().zip(&phi) {
                *o = *p;
            }
        }
        Ok(())
    }

    /// A tree's expected value over its training rows per output (each
    /// leaf's value weighed by its share of the root's cover, leaves in
    /// node order; `None` for outputs it does not feed) and its depth (a
    /// lone leaf: 0). `output` is the output of its single-value leaves.
    fn expected_and_depth(&self, root: usize, output: usize, covers: &[f64]) -> (Vec<Option<f64>>, usize) {
        let total = covers[root];
        let mut expected = vec![None; self.base.len()];
        let mut depth = 0;
        let mut stack = vec![(root, 0usize)];
        let mut leaves = Vec::new();
        while let Some((n, d)) = stack.pop() {
            let node = &self.nodes[n];
            if is_leaf(node.kind) {
                leaves.push(n);
                depth = depth.max(d);
            } else {
                stack.push((node.right as usize, d + 1));
                stack.push((node.left as usize, d + 1));
            }
        }
        leaves.sort_unstable();
        for n in leaves {
            for (k, value) in self.leaf_values(n, output) {
                // A lone leaf is its tree's value, whatever its cover.
                let share = if n == root { value } else { (covers[n] / total) * value };
                *expected[k].get_or_insert(0.0) += share;
            }
        }
        (expected, depth)
    }

    /// What leaf `n` adds, output by output: (output, value); `output` is
    /// its tree's, for a single-value leaf.
    fn leaf_values(&self, n: usize, output: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        let node = &self.nodes[n];
        let (first, count, single) =
            if node.kind == LEAF { (0, 1, Some(node.threshold)) } else { (node.start as usize, self.base.len(), None) };
        (0..count).map(move |j| match single {
            Some(v) => (output, v),
            None => (j, self.vectors[first + j]),
        })
    }

    /// The leaf one tree sends a row to.
    #[inline]
    fn leaf<const LE: bool>(&self, root: usize, x: &[f64]) -> &Flat {
        let mut n = &self.nodes[root];
        // Four steps per loop turn: in the sandbox every loop back-edge
        // carries an interruption check, and a tree walk is little else.
        loop {
            for _ in 0..4 {
                if is_leaf(n.kind) {
                    return n;
                }
                n = &self.nodes[self.child::<LE>(n, x) as usize];
            }
        }
    }

    /// Which child of a node a row goes to (a leaf's are itself). `LE`:
    /// left when `value <= threshold`, else when `value < threshold`.
    #[inline(always)]
    fn child<const LE: bool>(&self, n: &Flat, x: &[f64]) -> u32 {
        let v = x[n.feature as usize];
        let missing_left = n.goes_left & 1 != 0;
        let below = |v: f64| if LE { v <= n.threshold } else { v < n.threshold };
        let left = if n.kind < ZERO_ABSENT {
            // Branch-free: NaN compares false, then takes its own way.
            below(v) | (v.is_nan() & missing_left)
        } else if v.is_nan() || (n.kind == ZERO_ABSENT && (-ZERO..=ZERO).contains(&v)) {
            missing_left
        } else if n.kind == MEMBER {
            self.is_member(n, v) == (n.goes_left & 2 != 0)
        } else {
            below(v)
        };
        if left { n.left } else { n.right }
    }

    /// Whether `v` (not NaN) is in a [`Node::Member`]'s set.
    fn is_member(&self, n: &Flat, v: f64) -> bool {
        if v < 0.0 || v >= 32.0 * f64::from(n.words) {
            return false;
        }
        let c = v as u32; // truncates toward zero
        let word = self.words[n.start as usize + (c / 32) as usize];
        (word >> (c % 32)) & 1 == 1
    }

    /// Each row's sum of leaves per output, from the base (boosting) or
    /// zero (forests), into `out`.
    fn sums<S: Sum, const LE: bool>(&self, cells: &[f64], rows: usize, out: &mut ArrayViewMut2<'_, f64>) {
        let start = |k: usize| match self.combine {
            Combine::Sum => S::of(self.base[k]),
            Combine::Mean => S::of(0.0),
        };
        let (f, outputs) = (self.features, self.base.len());
        let mut sums: Vec<S> = (0..rows * outputs).map(|i| start(i % outputs)).collect();
        // A block of rows at a time through every tree: the block's
        // doubled rows stay in cache while the trees stream past.
        for (b, sums) in sums.chunks_mut(BLOCK_ROWS * outputs).enumerate() {
            let block = sums.len() / outputs;
            self.accumulate::<S, LE>(&cells[b * BLOCK_ROWS * f..][..block * f], block, sums);
        }
        for (o, sum) in out.iter_mut().zip(&sums) {
            *o = sum.value();
        }
    }

    /// Adds every tree's leaves to `sums` (which holds the starting
    /// values; row-major, one per output), tree by tree in order.
    fn accumulate<S: Sum, const LE: bool>(&self, cells: &[f64], rows: usize, sums: &mut [S]) {
        let (f, outputs) = (self.features, self.base.len());
        let doubled = self.laid.iter().any(Option::is_some).then(|| Doubled::new(cells, f, rows));
        // Rows in groups go tree by tree: each tree stays in cache while
        // it runs, and a group's rows walk it together.
        let grouped = doubled.as_ref().map_or(rows, |d| d.grouped);
        for (&(root, k), laid) in self.roots.iter().zip(&self.laid) {
            match (*laid, &doubled) {
                (Some(laid), Some(doubled)) => self.layout.walk::<LE>(laid, doubled, |r, slot| {
                    let sum = &mut sums[r * outputs + k];
                    *sum = sum.plus(S::leaf(&self.layout, slot));
                }),
                _ => self.walk_nodes::<S, LE>(root, k, &cells[..grouped * f], &mut sums[..grouped * outputs]),
            }
        }
        // The rows left over go one by one, through several trees at once.
        for (r, x) in doubled.iter().flat_map(Doubled::rest) {
            let sums = &mut sums[r * outputs..][..outputs];
            let mut t = 0;
            while t < self.roots.len() {
                // The laid-out trees from `t` on, up to one per lane.
                let mut run = [Laid::default(); LANES_OF_TREES];
                let mut n = 0;
                for (slot, laid) in run.iter_mut().zip(self.laid[t..].iter().map_while(|l| *l)) {
                    *slot = laid;
                    n += 1;
                }
                let run = &run[..n];
                if run.is_empty() {
                    let (root, k) = self.roots[t];
                    self.walk_nodes::<S, LE>(root, k, &cells[r * f..][..f], sums);
                    t += 1;
                    continue;
                }
                self.layout.walk_trees::<LE>(run, x, |i, slot| {
                    let k = self.roots[t + i].1;
                    sums[k] = sums[k].plus(S::leaf(&self.layout, slot));
                });
                t += run.len();
            }
        }
    }

    /// Adds tree `root`'s leaves (`k` its output) to the sums of `cells`'
    /// rows, walking node by node.
    fn walk_nodes<S: Sum, const LE: bool>(&self, root: usize, k: usize, cells: &[f64], sums: &mut [S]) {
        let (f, outputs) = (self.features, self.base.len());
        let rows = sums.len() / outputs;
        // Four rows walk a tree together: their steps do not depend on
        // each other, so the processor overlaps them, and in the sandbox
        // one loop turn (one interruption check) moves four walks. Leaves
        // step to themselves, so a walk that has ended waits for the others.
        let mut r = 0;
        while r + LANES <= rows {
            let x: [&[f64]; LANES] = std::array::from_fn(|j| &cells[(r + j) * f..(r + j + 1) * f]);
            let mut at = [root; LANES];
            loop {
                let mut ended = true;
                for j in 0..LANES {
                    let n = &self.nodes[at[j]];
                    ended &= is_leaf(n.kind);
                    at[j] = self.child::<LE>(n, x[j]) as usize;
                }
                if ended {
                    break;
                }
            }
            for (j, &leaf) in at.iter().enumerate() {
                self.add_leaf(&self.nodes[leaf], k, &mut sums[(r + j) * outputs..][..outputs]);
            }
            r += LANES;
        }
        for r in r..rows {
            let leaf = self.leaf::<LE>(root, &cells[r * f..(r + 1) * f]);
            self.add_leaf(leaf, k, &mut sums[r * outputs..][..outputs]);
        }
    }

    /// Adds what a leaf holds to a row's sums (output `k`'s, for a
    /// single-value leaf).
    #[inline(always)]
    fn add_leaf<S: Sum>(&self, leaf: &Flat, k: usize, sums: &mut [S]) {
        if leaf.kind == LEAF {
            sums[k] = sums[k].plus(S::of(leaf.threshold));
        } else {
            let first = leaf.start as usize;
            for (sum, &v) in sums.iter_mut().zip(&self.vectors[first..first + self.base.len()]) {
                *sum = sum.plus(S::of(v));
            }
        }
    }

    /// Applies the link to one row's combined values.
    fn apply_link(&self, o: &mut [f64]) {
        let single = self.arithmetic == Precision::Single;
        match self.link {
            OutputLink::Identity => {}
            OutputLink::Logistic { scale } => {
                for v in o.iter_mut() {
                    *v = if single {
                        // XGBoost's `common::Sigmoid`: exp's argument capped
                        // against overflow, and an epsilon lost in rounding.
                        let x = (-(*v as f32) * scale as f32).min(88.7);
                        f64::from(1.0 / (exp::expf(x) + 1.0 + 1e-16))
                    } else {
                        1.0 / (1.0 + exp::exp(-scale * *v))
                    };
                }
            }
            OutputLink::Exp => {
                for v in o.iter_mut() {
                    *v = if single { f64::from(exp::expf(*v as f32)) } else { exp::exp(*v) };
                }
            }
            OutputLink::Softmax if !single => exp::softmax(o),
            OutputLink::Softmax => {
                // The exponentials in single precision, their sum in double.
                let max = o.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let mut sum = 0.0f64;
                for v in o.iter_mut() {
                    *v = f64::from(exp::expf(*v as f32 - max as f32));
                    sum += *v;
                }
                for v in o.iter_mut() {
                    *v = f64::from(*v as f32 / sum as f32);
                }
            }
        }
    }
}

/// A running sum of leaves, in the precision of the ensemble's arithmetic:
/// `f32` sums are rounded at every addition, as the toolkits that keep
/// them in `float` add (and in the sandbox, one addition is one NaN check,
/// where rounding an `f64` sum each time would be four).
trait Sum: Copy {
    /// `v` in this precision.
    fn of(v: f64) -> Self;
    /// The value of a laid-out leaf slot.
    fn leaf(layout: &Layout, slot: usize) -> Self;
    fn plus(self, leaf: Self) -> Self;
    fn value(self) -> f64;
}

impl Sum for f64 {
    fn of(v: f64) -> Self {
        v
    }
    fn leaf(layout: &Layout, slot: usize) -> Self {
        layout.leaf(slot)
    }
    fn plus(self, leaf: Self) -> Self {
        self + leaf
    }
    fn value(self) -> f64 {
        self
    }
}

impl Sum for f32 {
    fn of(v: f64) -> Self {
        v as f32
    }
    fn leaf(layout: &Layout, slot: usize) -> Self {
        layout.leaf_single(slot)
    }
    fn plus(self, leaf: Self) -> Self {
        self + leaf
    }
    fn value(self) -> f64 {
        f64::from(self)
    }
}

/// Checks tree params: everything [`Trees::new`] documents, so that
/// [`Trees::flatten`] cannot fail and evaluation never indexes out of range.
fn validate(params: &TreesParams) -> Result<(), String> {
    let outputs = params.base.len();
    if outputs == 0 {
        return Err("tree params: empty base (at least one output is needed)".into());
    }
    if let Some(bad) = params.base.iter().find(|v| !v.is_finite()) {
        return Err(format!("tree params: non-finite base score {bad}"));
    }
    match params.link {
        OutputLink::Softmax if outputs < 2 => return Err("tree params: softmax needs at least two outputs".into()),
        OutputLink::Logistic { scale } if !scale.is_finite() => {
            return Err(format!("tree params: non-finite logistic scale {scale}"));
        }
        _ => {}
    }
    if let Some(bad) = params.vectors.iter().find(|v| !v.is_finite()) {
        return Err(format!("tree params: non-finite leaf value {bad} in vectors"));
    }
    for (s, set) in params.sets.iter().enumerate() {
        if set.len() > usize::from(u16::MAX) {
            return Err(format!("tree params: set {s} has {} words (at most {})", set.len(), u16::MAX));
        }
    }
    for (t, tree) in params.trees.iter().enumerate() {
        let output = tree.output as usize;
        if output >= outputs {
            return Err(format!("tree {t}: output {output} but only {outputs} outputs"));
        }
        if tree.nodes.is_empty() {
            return Err(format!("tree {t}: no nodes"));
        }
        let (mut scalar, mut vector) = (false, false);
        for (i, node) in tree.nodes.iter().enumerate() {
            validate_node(params, (t, i), tree.nodes.len(), node)?;
            scalar |= matches!(node, Node::Leaf { .. });
            vector |= matches!(node, Node::Leaves { .. });
        }
        if scalar && vector {
            return Err(format!("tree {t}: mixes single-value and per-output leaves"));
        }
    }
    Ok(())
}

/// Checks node `i` of tree `t` (of `len` nodes): children after it and
/// within the tree, a known feature and set, finite leaves, a threshold
/// that is a number, per-output leaves within `vectors`.
fn validate_node(params: &TreesParams, (t, i): (usize, usize), len: usize, node: &Node) -> Result<(), String> {
    let child = |child: u32| {
        let c = child as usize;
        if c <= i || c >= len {
            return Err(format!(
                "tree {t} node {i}: child {child} must come after the node and within the {len} nodes"
            ));
        }
        Ok(())
    };
    let feature_ok = |feature: u32| {
        if feature >= params.features {
            return Err(format!("tree {t} node {i}: feature {feature} but rows have {}", params.features));
        }
        Ok(())
    };
    match *node {
        Node::Leaf { value } if !value.is_finite() => Err(format!("tree {t} node {i}: non-finite leaf {value}")),
        Node::Leaf { .. } => Ok(()),
        Node::Leaves { first } => {
            let end = first as usize + params.base.len();
            if end > params.vectors.len() {
                return Err(format!(
                    "tree {t} node {i}: leaf values {first}..{end} but vectors has {}",
                    params.vectors.len()
                ));
            }
            Ok(())
        }
        Node::Split { feature, threshold, left, right, .. }
        | Node::SplitZeroAbsent { feature, threshold, left, right, .. } => {
            if threshold.is_nan() {
                return Err(format!("tree {t} node {i}: threshold is NaN"));
            }
            feature_ok(feature)?;
            child(left)?;
            child(right)
        }
        Node::Member { feature, set, left, right, .. } => {
            if set as usize >= params.sets.len() {
                return Err(format!("tree {t} node {i}: set {set} but there are {}", params.sets.len()));
            }
            feature_ok(feature)?;
            child(left)?;
            child(right)
        }
    }
}

impl Evaluate for Trees {
    type Params = TreesParams;

    fn build(params: TreesParams) -> Result<Self, String> {
        Trees::new(params)
    }

    fn features(&self) -> usize {
        self.features
    }

    fn outputs(&self) -> usize {
        self.base.len()
    }

    fn evaluate(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) {
        self.margins(rows, out.view_mut());
        if self.link == OutputLink::Identity {
            return;
        }
        for mut o in out.outer_iter_mut() {
            match o.as_slice_mut() {
                Some(values) => self.apply_link(values),
                None => {
                    let mut values = o.to_vec();
                    self.apply_link(&mut values);
                    o.iter_mut().zip(values).for_each(|(v, w)| *v = w);
                }
            }
        }
    }

    fn explain(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) -> Result<Vec<MarginLink>, String> {
        let (n, outputs, blocks) = (rows.nrows(), self.base.len(), self.features + 1);
        let mut phi = ndarray::Array2::zeros((n, outputs * blocks));
        self.contributions(rows, phi.view_mut())?;
        let mut margin = ndarray::Array2::from_elem((n, outputs), f64::NAN);
        self.margins(rows, margin.view_mut());
        for r in 0..n {
            for k in 0..outputs {
                for j in 0..blocks {
                    out[[r, k * (blocks + 1) + j]] = phi[[r, k * blocks + j]];
                }
                out[[r, k * (blocks + 1) + blocks]] = margin[[r, k]];
            }
        }
        let link = match self.link {
            OutputLink::Identity => MarginLink::Identity,
            OutputLink::Logistic { .. } => MarginLink::Logistic,
            OutputLink::Exp => MarginLink::Exp,
            OutputLink::Softmax => MarginLink::Softmax,
        };
        Ok(vec![link; outputs])
    }
}

impl crate::contributions::PathTree for Trees {
    fn features(&self) -> usize {
        self.features
    }

    fn cover(&self, n: usize) -> f64 {
        self.explain.as_ref().map_or(0.0, |e| e.covers[n])
    }

    fn split(&self, n: usize, row: &[f64]) -> crate::contributions::Split<'_> {
        let node = &self.nodes[n];
        if is_leaf(node.kind) {
            return crate::contributions::Split::Leaf;
        }
        let hot = if self.less_or_equal { self.child::<true>(node, row) } else { self.child::<false>(node, row) };
        let cold = if hot == node.left { node.right } else { node.left };
        crate::contributions::Split::Two { feature: i64::from(node.feature), hot: hot as usize, cold: cold as usize }
    }

    fn values(&self, n: usize, output: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        self.leaf_values(n, output)
    }
}

impl Trees {
    /// Each row's combined values before the link (its margins), into
    /// `out` (rows × outputs), as scoring computes them.
    pub fn margins(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) {
        let single = self.arithmetic == Precision::Single;
        let n = rows.nrows();
        // The cells as one row-major slice, rounded to f32 first if asked.
        let owned: Vec<f64>;
        let cells: &[f64] = match (rows.as_slice(), self.inputs) {
            (Some(cells), Precision::Double) => cells,
            (_, inputs) => {
                let round = |v: f64| if inputs == Precision::Single { f64::from(v as f32) } else { v };
                owned = rows.iter().map(|&v| round(v)).collect();
                &owned
            }
        };
        match (single, self.less_or_equal) {
            (true, true) => self.sums::<f32, true>(cells, n, &mut out),
            (true, false) => self.sums::<f32, false>(cells, n, &mut out),
            (false, true) => self.sums::<f64, true>(cells, n, &mut out),
            (false, false) => self.sums::<f64, false>(cells, n, &mut out),
        }
        for mut o in out.outer_iter_mut() {
            if self.combine == Combine::Mean {
                for (k, v) in o.iter_mut().enumerate() {
                    let count = self.counts[k].max(1.0);
                    *v = if single {
                        f64::from(self.base[k] as f32 + *v as f32 / count as f32)
                    } else {
                        self.base[k] + *v / count
                    };
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    fn stump(output: u32, feature: u32, threshold: f64, lo: f64, hi: f64, missing: Branch) -> Tree {
        Tree {
            output,
            nodes: vec![
                Node::Split { feature, threshold, left: 1, right: 2, missing },
                Node::Leaf { value: lo },
                Node::Leaf { value: hi },
            ],
        }
    }

    /// Hand-computed: base 10; stump A adds 1 if x0 < 5 else 2 (NaN → right);
    /// stump B adds 0.5 if x1 < 0 else −0.25 (NaN → left).
    #[test]
    fn boosted_sum_matches_hand_computation() {
        let trees = Trees::new(TreesParams::boosted(
            2,
            10.0,
            SplitRule::Less,
            vec![stump(0, 0, 5.0, 1.0, 2.0, Branch::Right), stump(0, 1, 0.0, 0.5, -0.25, Branch::Left)],
        ))
        .unwrap();
        let rows = array![[4.0, -1.0], [5.0, 0.0], [f64::NAN, f64::NAN]];
        let mut out = Array2::zeros((3, 1));
        trees.evaluate(rows.view(), out.view_mut());
        assert_eq!(out.column(0).to_vec(), vec![11.5, 11.75, 12.5]);
    }

    #[test]
    fn less_or_equal_changes_the_tie() {
        let params = |split| TreesParams::boosted(1, 0.0, split, vec![stump(0, 0, 5.0, 1.0, 2.0, Branch::Left)]);
        let rows = array![[5.0]];
        let mut out = Array2::zeros((1, 1));
        Trees::new(params(SplitRule::Less)).unwrap().evaluate(rows.view(), out.view_mut());
        assert_eq!(out[[0, 0]], 2.0);
        Trees::new(params(SplitRule::LessOrEqual)).unwrap().evaluate(rows.view(), out.view_mut());
        assert_eq!(out[[0, 0]], 1.0);
    }

    /// Hand-computed: two outputs; output 0 averages leaves 3 and 5 → 4 (+ base 1);
    /// output 1 has one tree giving 7 (+ base 0).
    #[test]
    fn mean_averages_per_output() {
        let trees = Trees::new(TreesParams {
            base: vec![1.0, 0.0],
            combine: Combine::Mean,
            ..TreesParams::boosted(
                1,
                0.0,
                SplitRule::Less,
                vec![
                    stump(0, 0, 0.0, 0.0, 3.0, Branch::Left),
                    stump(0, 0, 0.0, 0.0, 5.0, Branch::Left),
                    stump(1, 0, 0.0, 0.0, 7.0, Branch::Left),
                ],
            )
        })
        .unwrap();
        let rows = array![[1.0]];
        let mut out = Array2::zeros((1, 2));
        trees.evaluate(rows.view(), out.view_mut());
        assert_eq!(out.row(0).to_vec(), vec![5.0, 7.0]);
    }

    #[test]
    fn cycles_and_unknown_features_are_refused() {
        let mut bad = stump(0, 0, 1.0, 1.0, 2.0, Branch::Left);
        bad.nodes[0] = Node::Split { feature: 0, threshold: 1.0, left: 0, right: 2, missing: Branch::Left };
        let err = Trees::new(TreesParams::boosted(1, 0.0, SplitRule::Less, vec![bad])).unwrap_err();
        assert!(err.contains("tree 0 node 0: child 0 must come after"), "{err}");
        let err =
            Trees::new(TreesParams::boosted(1, 0.0, SplitRule::Less, vec![stump(0, 3, 1.0, 1.0, 2.0, Branch::Left)]))
                .unwrap_err();
        assert!(err.contains("feature 3 but rows have 1"), "{err}");
        let member = Tree {
            output: 0,
            nodes: vec![
                Node::Member { feature: 0, set: 2, left: 1, right: 2, missing: Branch::Left, members: Branch::Left },
                Node::Leaf { value: 1.0 },
                Node::Leaf { value: 2.0 },
            ],
        };
        let err = Trees::new(TreesParams::boosted(1, 0.0, SplitRule::Less, vec![member])).unwrap_err();
        assert!(err.contains("tree 0 node 0: set 2 but there are 0"), "{err}");
        let mixed = Tree {
            output: 0,
            nodes: vec![
                Node::Split { feature: 0, threshold: 0.0, left: 1, right: 2, missing: Branch::Left },
                Node::Leaf { value: 1.0 },
                Node::Leaves { first: 0 },
            ],
        };
        let err = Trees::new(TreesParams {
            vectors: vec![1.0],
            ..TreesParams::boosted(1, 0.0, SplitRule::Less, vec![mixed])
        })
        .unwrap_err();
        assert!(err.contains("tree 0: mixes"), "{err}");
        let err = Trees::new(TreesParams {
            link: OutputLink::Softmax,
            ..TreesParams::boosted(1, 0.0, SplitRule::Less, vec![])
        })
        .unwrap_err();
        assert!(err.contains("softmax needs at least two outputs"), "{err}");
    }

    fn score(params: TreesParams, rows: Array2<f64>) -> Array2<f64> {
        let trees = Trees::new(params).unwrap();
        let mut out = Array2::from_elem((rows.nrows(), trees.outputs()), f64::NAN);
        trees.evaluate(rows.view(), out.view_mut());
        out
    }

    /// Hand-computed: categories {1, 3, 40} go right; NaN goes left; −1,
    /// 2.9 (→ 2) and 64 (past the set's two words) are not members.
    #[test]
    fn member_splits_look_categories_up_in_the_set() {
        let tree = Tree {
            output: 0,
            nodes: vec![
                Node::Member { feature: 0, set: 0, left: 1, right: 2, missing: Branch::Left, members: Branch::Right },
                Node::Leaf { value: 10.0 },
                Node::Leaf { value: 20.0 },
            ],
        };
        let params = TreesParams {
            sets: vec![vec![(1 << 1) | (1 << 3), 1 << (40 - 32)]],
            ..TreesParams::boosted(1, 0.0, SplitRule::Less, vec![tree])
        };
        let out = score(params, array![[1.0], [3.5], [40.0], [f64::NAN], [-1.0], [2.9], [64.0], [0.0]]);
        assert_eq!(out.column(0).to_vec(), vec![20.0, 20.0, 20.0, 10.0, 10.0, 10.0, 10.0, 10.0]);
    }

    /// Hand-computed: zero (and ±1e-36) and NaN take the missing way
    /// (right) although 0 ≤ 0.5 would go left.
    #[test]
    fn zero_absent_splits_send_zero_the_missing_way() {
        let tree = Tree {
            output: 0,
            nodes: vec![
                Node::SplitZeroAbsent { feature: 0, threshold: 0.5, left: 1, right: 2, missing: Branch::Right },
                Node::Leaf { value: 1.0 },
                Node::Leaf { value: 2.0 },
            ],
        };
        let out = score(
            TreesParams::boosted(1, 0.0, SplitRule::LessOrEqual, vec![tree]),
            array![[0.0], [1e-36], [-1e-36], [f64::NAN], [0.25], [-3.0], [0.75]],
        );
        assert_eq!(out.column(0).to_vec(), vec![2.0, 2.0, 2.0, 2.0, 1.0, 1.0, 2.0]);
    }

    /// Hand-computed: 0.1 as f32 is 0.100000001490116…, so with inputs in
    /// single precision the row 0.1 is not below the f32 threshold 0.1; the
    /// sum 1 + 2^-30 rounds to 1 in single precision.
    #[test]
    fn single_precision_rounds_inputs_and_sums() {
        let t = f64::from(0.1f32);
        let params = |p: Precision| TreesParams {
            inputs: p,
            arithmetic: p,
            ..TreesParams::boosted(1, 1.0, SplitRule::Less, vec![stump(0, 0, t, 2f64.powi(-30), 5.0, Branch::Left)])
        };
        assert_eq!(score(params(Precision::Double), array![[0.1]])[[0, 0]], 1.0 + 2f64.powi(-30));
        assert_eq!(score(params(Precision::Single), array![[0.1]])[[0, 0]], 6.0);
        assert_eq!(score(params(Precision::Single), array![[0.05]])[[0, 0]], 1.0);
    }

    /// Hand-computed links: logistic(0) = ½, logistic with scale 2 at
    /// ln 3 / 2 is ¾, exp(0) = 1, softmax of (0, ln 3) is (¼, ¾).
    #[test]
    fn links_turn_sums_into_outputs() {
        let constant = |output, value| Tree { output, nodes: vec![Node::Leaf { value }] };
        let one = |link, value| TreesParams {
            link,
            ..TreesParams::boosted(1, 0.0, SplitRule::Less, vec![constant(0, value)])
        };
        let row = || array![[0.0]];
        assert_eq!(score(one(OutputLink::Logistic { scale: 1.0 }, 0.0), row())[[0, 0]], 0.5);
        assert!((score(one(OutputLink::Logistic { scale: 2.0 }, 3f64.ln() / 2.0), row())[[0, 0]] - 0.75).abs() < 1e-15);
        assert_eq!(score(one(OutputLink::Exp, 0.0), row())[[0, 0]], 1.0);
        let softmax = TreesParams {
            base: vec![0.0, 0.0],
            link: OutputLink::Softmax,
            ..TreesParams::boosted(1, 0.0, SplitRule::Less, vec![constant(0, 0.0), constant(1, 3f64.ln())])
        };
        let out = score(softmax, row());
        assert!((out[[0, 0]] - 0.25).abs() < 1e-15 && (out[[0, 1]] - 0.75).abs() < 1e-15, "{out}");
    }

    /// Hand-computed: two trees with per-class leaves, averaged: class
    /// fractions (1, 0) and (0.5, 0.5) average to (0.75, 0.25).
    #[test]
    fn per_output_leaves_feed_every_output() {
        let tree = |first| Tree { output: 0, nodes: vec![Node::Leaves { first }] };
        let params = TreesParams {
            base: vec![0.0, 0.0],
            combine: Combine::Mean,
            vectors: vec![1.0, 0.0, 0.5, 0.5],
            ..TreesParams::boosted(1, 0.0, SplitRule::LessOrEqual, vec![tree(0), tree(2)])
        };
        assert_eq!(score(params, array![[0.0]]).row(0).to_vec(), vec![0.75, 0.25]);
    }

    /// A stump on x (left leaf 1 with three training rows, right leaf 5
    /// with one) and a second feature it never reads: the expected value
    /// is (3·1 + 1·5) / 4 = 2, so a row going left owes −1 to x, nothing to
    /// the other feature (the Shapley value of one player, f(x) − E f, by hand).
    #[test]
    fn a_stumps_contributions_are_its_leaf_less_its_expected_value() {
        let params = TreesParams::boosted(2, 10.0, SplitRule::Less, vec![stump(0, 0, 0.5, 1.0, 5.0, Branch::Right)]);
        let trees = Trees::new(params).unwrap().with_covers(&[vec![4.0, 3.0, 1.0]]).unwrap();
        let mut out = ndarray::Array2::zeros((2, 3));
        trees.contributions(array![[0.0, 7.0], [f64::NAN, 7.0]].view(), out.view_mut()).unwrap();
        assert_eq!(out.row(0).to_vec(), vec![-1.0, 0.0, 12.0]);
        // Absent goes right: 5 − 2.
        assert_eq!(out.row(1).to_vec(), vec![3.0, 0.0, 12.0]);
    }

    #[test]
    fn covers_that_do_not_fit_are_refused_naming_tree_and_node() {
        let trees = || {
            Trees::new(TreesParams::boosted(
                1,
                0.0,
                SplitRule::Less,
                vec![stump(0, 0, 0.5, 1.0, 5.0, Branch::Right); 2],
            ))
            .unwrap()
        };
        let err = |covers: &[Vec<f64>]| trees().with_covers(covers).unwrap_err();
        assert_eq!(err(&[vec![4.0, 3.0, 1.0]]), "covers: 1 lists for 2 trees");
        assert_eq!(err(&[vec![4.0, 3.0, 1.0], vec![4.0, 3.0]]), "covers: tree 1 has 3 nodes but 2 covers");
        assert_eq!(err(&[vec![4.0, 3.0, 1.0], vec![0.0, 0.0, 0.0]]), "covers: tree 1 node 0 has cover 0");
        assert_eq!(err(&[vec![4.0, f64::NAN, 1.0], vec![4.0, 3.0, 1.0]]), "covers: tree 0 node 1 has cover NaN");
        let mut out = ndarray::Array2::zeros((1, 2));
        assert_eq!(
            trees().contributions(array![[0.0]].view(), out.view_mut()).unwrap_err(),
            "these trees carry no covers: contributions need each node's cover"
        );
    }

    /// A random tree of `leaves` leaves grown leaf by leaf (a random leaf
    /// split each time, so depths vary), thresholds from `cuts`, absent
    /// values either way; nodes renumbered so children follow parents.
    fn random_tree(next: &mut impl FnMut() -> u64, features: u32, leaves: usize, cuts: &[f64]) -> Tree {
        // Grown as (feature, threshold, missing, left, right) splits and leaves.
        let mut nodes = vec![Node::Leaf { value: 0.0 }];
        let mut open = vec![0usize];
        while open.len() < leaves {
            let at = open.swap_remove((next() % open.len() as u64) as usize);
            let (left, right) = (nodes.len() as u32, nodes.len() as u32 + 1);
            let missing = if next().is_multiple_of(2) { Branch::Left } else { Branch::Right };
            let threshold = cuts[(next() % cuts.len() as u64) as usize];
            let feature = (next() % u64::from(features)) as u32;
            nodes[at] = Node::Split { feature, threshold, left, right, missing };
            for _ in 0..2 {
                open.push(nodes.len());
                nodes.push(Node::Leaf { value: (next() % 2001) as f64 / 1000.0 - 1.0 + 1e-9 * (next() % 7) as f64 });
            }
        }
        Tree { output: 0, nodes }
    }

    /// The laid-out walks (by levels up to depth 8, siblings side by side
    /// beyond) give the node-by-node walk's bits: both split rules, both
    /// precisions, rows with NaN, ±∞ and values equal to thresholds, in
    /// groups of eight and alone.
    #[test]
    fn laid_out_trees_score_as_the_node_walk_does() {
        let mut state = 0x2545_f491_4f6c_dd1du64;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let cuts = [-2.5, -1.0, 0.0, 0.1, 0.5, 1.0, 3.25, 1e30];
        let values = [f64::NAN, f64::NEG_INFINITY, f64::INFINITY, -2.5, 0.0, 0.1, 0.10000001, 1.0, 7.0, -1e31];
        let features = 5u32;
        let mut trees: Vec<Tree> = [1usize, 2, 3, 8, 31, 64, 255, 500]
            .iter()
            .flat_map(|&leaves| {
                [random_tree(&mut next, features, leaves, &cuts), random_tree(&mut next, features, leaves, &cuts)]
            })
            .collect();
        // Walked node by node among the laid-out ones: an infinite threshold.
        trees.insert(5, stump(0, 2, f64::INFINITY, 0.25, 0.75, Branch::Right));
        let rows = 8 * 3 + 5;
        let cells: Vec<f64> =
            (0..rows * features as usize).map(|_| values[(next() % values.len() as u64) as usize]).collect();
        let rows = Array2::from_shape_vec((rows, features as usize), cells).unwrap();
        for split in [SplitRule::Less, SplitRule::LessOrEqual] {
            for precision in [Precision::Double, Precision::Single] {
                let params = TreesParams {
                    inputs: precision,
                    arithmetic: precision,
                    ..TreesParams::boosted(features, 0.5, split, trees.clone())
                };
                let laid = Trees::new(params.clone()).unwrap();
                assert_eq!(laid.laid.iter().filter(|l| l.is_none()).count(), 1, "all trees but one laid out");
                assert!(
                    laid.laid.iter().flatten().any(|l| !l.by_levels()),
                    "some trees are deeper than a level layout"
                );
                let mut walked = Trees::new(params).unwrap();
                walked.laid.fill(None);
                for n in [rows.nrows(), 8, 1] {
                    let block = rows.slice(ndarray::s![..n, ..]);
                    let (mut a, mut b) = (Array2::zeros((n, 1)), Array2::zeros((n, 1)));
                    laid.evaluate(block, a.view_mut());
                    walked.evaluate(block, b.view_mut());
                    for (r, (x, y)) in a.iter().zip(b.iter()).enumerate() {
                        assert_eq!(x.to_bits(), y.to_bits(), "{split:?} {precision:?}, {n} rows: row {r}: {x} vs {y}");
                    }
                }
            }
        }
    }
}
