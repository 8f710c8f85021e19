//! Per-row feature contributions of a tree ensemble: why each row's
//! combined value (its margin, before the link) is what it is.
//!
//! The path-dependent algorithm of Lundberg, Erion and Lee (2018,
//! "Consistent individualized feature attribution for tree ensembles",
//! arXiv:1802.03888, Algorithm 2; Nature Machine Intelligence 2, 56–67,
//! 2020). Each node's *cover* — how many training rows (or how much
//! hessian) reached it — weighs the branch a row does not take. Per output
//! the contributions are one number per feature and a baseline (the
//! expected value of the trees over the training rows they saw, plus the
//! base score) that sum to the row's margin. Arithmetic follows the
//! toolkits' own implementations step for step, in double precision.
//!
//! What it is not: a statement about the world. The numbers say how the
//! model arrived at its value, not what causes the outcome.

/// One step of the path from the root to a node: the feature split on, the
/// share of cover that follows the path (`zero`), whether the row follows
/// it (`one`), and the step's weight among the orderings of the path.
#[derive(Clone, Copy, Debug, Default)]
struct Step {
    feature: i64,
    zero: f64,
    one: f64,
    weight: f64,
}

/// Adds a step for `feature` at `depth`, reweighting the steps before it.
///
/// `one` is 0 or 1 (whether the row follows the path), so the toolkits'
/// `one × weight` is the weight or nothing: skipping the product gives the
/// same bits (weights are never negative zero) with fewer operations,
/// which matters in the sandbox, where every float operation's result is
/// checked for NaN.
fn extend(path: &mut [Step], depth: usize, zero: f64, one: f64, feature: i64) {
    debug_assert!(one == 0.0 || one == 1.0, "one fraction {one}");
    path[depth] = Step { feature, zero, one, weight: if depth == 0 { 1.0 } else { 0.0 } };
    let d1 = (depth + 1) as f64;
    for i in (0..depth).rev() {
        if one != 0.0 {
            path[i + 1].weight += path[i].weight * (i + 1) as f64 / d1;
        }
        path[i].weight = zero * path[i].weight * (depth - i) as f64 / d1;
    }
}

/// Removes step `index` (a feature met again lower down), undoing what
/// [`extend`] did for it.
fn unwind(path: &mut [Step], depth: usize, index: usize) {
    let Step { zero, one, .. } = path[index];
    let d1 = (depth + 1) as f64;
    let mut next = path[depth].weight;
    for i in (0..depth).rev() {
        if one != 0.0 {
            let kept = path[i].weight;
            path[i].weight = next * d1 / ((i + 1) as f64 * one);
            next = kept - path[i].weight * zero * (depth - i) as f64 / d1;
        } else {
            path[i].weight = (path[i].weight * d1) / (zero * (depth - i) as f64);
        }
    }
    for i in index..depth {
        let after = path[i + 1];
        path[i] = Step { weight: path[i].weight, ..after };
    }
}

/// The total weight of the path with step `index` left out.
fn unwound_sum(path: &[Step], depth: usize, index: usize) -> f64 {
    unwound_sums(path, depth, [index, index])[0]
}

/// [`unwound_sum`] for two steps at once, each with the very same
/// operations in the same order (so the same bits): two independent chains
/// of arithmetic in one loop keep the processor busy, and the ratio of
/// orderings both use is worked out once.
fn unwound_sums(path: &[Step], depth: usize, index: [usize; 2]) -> [f64; 2] {
    let steps = [path[index[0]], path[index[1]]];
    let d1 = (depth + 1) as f64;
    let mut next = [path[depth].weight; 2];
    let mut total = [0.0; 2];
    for i in (0..depth).rev() {
        let ratio = (depth - i) as f64 / d1;
        for k in 0..2 {
            let Step { zero, one, .. } = steps[k];
            if one != 0.0 {
                // `(i + 1) × one` is `i + 1`: one is 1 here.
                let part = next[k] * d1 / (i + 1) as f64;
                total[k] += part;
                next[k] = path[i].weight - part * zero * ratio;
            } else {
                total[k] += (path[i].weight / zero) / ratio;
            }
        }
    }
    total
}

/// Checks that `rows` (rows × `features`) fit an output of `out`'s shape
/// (rows × `width`).
///
/// # Errors
/// Both shapes, when they do not fit.
pub(crate) fn fits(rows: (usize, usize), out: (usize, usize), features: usize, width: usize) -> Result<(), String> {
    if out.1 != width || out.0 != rows.0 || rows.1 != features {
        return Err(format!(
            "contributions: {} rows of {} features into {}×{}, expected {}×{width}",
            rows.0, rows.1, out.0, out.1, rows.0
        ));
    }
    Ok(())
}

/// What a walk adds to: the row, its contributions (one block of
/// `features + 1` per output), and the path buffer every level shares.
pub(crate) struct Walk<'a> {
    pub(crate) row: &'a [f64],
    pub(crate) phi: &'a mut [f64],
    path: Vec<Step>,
    /// The output of the tree being walked.
    output: usize,
}

impl<'a> Walk<'a> {
    /// A walk for trees up to `depth` levels deep.
    pub(crate) fn new(row: &'a [f64], phi: &'a mut [f64], depth: usize) -> Walk<'a> {
        // Each level copies its parent's path after it: 1 + 2 + … + (depth + 2).
        let room = (depth + 2) * (depth + 3) / 2;
        Walk { row, phi, path: vec![Step::default(); room], output: 0 }
    }
}

/// What a row meets at a node of a tree being explained.
pub(crate) enum Split<'a> {
    /// A leaf.
    Leaf,
    /// A split on `feature`: the row goes to `hot`, `cold` is the other child.
    Two {
        /// The feature (contract index) the split reads.
        feature: i64,
        /// The child the row takes.
        hot: usize,
        /// The other child.
        cold: usize,
    },
    /// A split on `feature` into `children`, tried in order; the row takes
    /// `taken`, or stops at the node itself (`None`; no training row
    /// stopped there), where the node's own value answers if `answers`,
    /// else nothing does.
    Many {
        /// The feature (contract index) every child's condition reads.
        feature: i64,
        /// The children.
        children: &'a [u32],
        /// The child the row takes, if any.
        taken: Option<usize>,
        /// Whether the node answers when the row stops at it.
        answers: bool,
    },
}

/// A tree the path-dependent algorithm walks.
pub(crate) trait PathTree {
    /// Contributions per output block (features + 1 numbers each).
    fn features(&self) -> usize;
    /// Node `n`'s cover.
    fn cover(&self, n: usize) -> f64;
    /// What the row meets at node `n`.
    fn split(&self, n: usize, row: &[f64]) -> Split<'_>;
    /// What node `n` adds when it answers, output by output: (output,
    /// value); `output` is the walk's.
    fn values(&self, n: usize, output: usize) -> impl Iterator<Item = (usize, f64)> + '_;
}

/// Adds one tree's contributions for the walk's row: the tree rooted at
/// `root`, its answering nodes' values added to output `output`'s block
/// (or every output's, for per-output values).
pub(crate) fn contribute_tree<T: PathTree>(tree: &T, walk: &mut Walk<'_>, root: usize, output: usize) {
    walk.output = output;
    recurse(tree, walk, (root, false), 0, 0, (1.0, 1.0), -1);
}

/// One node of Algorithm 2: the path so far is `walk.path[parent..parent +
/// depth]`. `(node, stops)`: the node, and whether the row stops there (it
/// answers as a leaf). `(zero, one)`: the step's fractions.
fn recurse<T: PathTree>(
    tree: &T,
    walk: &mut Walk<'_>,
    (node, stops): (usize, bool),
    parent: usize,
    depth: usize,
    (zero, one): (f64, f64),
    feature: i64,
) {
    let start = parent + depth;
    walk.path.copy_within(parent..parent + depth, start);
    let mut depth = depth;
    extend(&mut walk.path[start..], depth, zero, one, feature);
    let split = if stops { Split::Leaf } else { tree.split(node, walk.row) };
    let split_feature = match split {
        Split::Leaf => {
            let blocks = tree.features() + 1;
            let add = |walk: &mut Walk<'_>, i: usize, w: f64| {
                let step = walk.path[start + i];
                for (k, value) in tree.values(node, walk.output) {
                    walk.phi[k * blocks + step.feature as usize] += w * (step.one - step.zero) * value;
                }
            };
            // Two steps at a time; contributions added in the steps' order.
            let mut i = 1;
            while i < depth {
                let w = unwound_sums(&walk.path[start..], depth, [i, i + 1]);
                add(walk, i, w[0]);
                add(walk, i + 1, w[1]);
                i += 2;
            }
            if i == depth {
                let w = unwound_sum(&walk.path[start..], depth, i);
                add(walk, i, w);
            }
            return;
        }
        Split::Two { feature, .. } | Split::Many { feature, .. } => feature,
    };
    let w = tree.cover(node);
    let (mut incoming_zero, mut incoming_one) = (1.0, 1.0);
    let path = &mut walk.path[start..];
    if let Some(index) = (0..=depth).find(|&i| path[i].feature == split_feature) {
        incoming_zero = path[index].zero;
        incoming_one = path[index].one;
        unwind(path, depth, index);
        depth -= 1;
    }
    let child = |walk: &mut Walk<'_>, c: (usize, bool), zero: f64, one: f64| {
        recurse(tree, walk, c, start, depth + 1, (zero * incoming_zero, one), split_feature);
    };
    match split {
        Split::Two { hot, cold, .. } => {
            child(walk, (hot, false), tree.cover(hot) / w, incoming_one);
            child(walk, (cold, false), tree.cover(cold) / w, 0.0);
        }
        Split::Many { children, taken, answers, .. } => {
            // A branch with no share of the training rows that the row
            // does not take either adds nothing (and would divide by zero).
            let branch = |walk: &mut Walk<'_>, c: (usize, bool), zero: f64, one: f64| {
                if zero * incoming_zero != 0.0 || one != 0.0 {
                    child(walk, c, zero, one);
                }
            };
            for &c in children {
                let (c, hot) = (c as usize, taken == Some(c as usize));
                branch(walk, (c, false), tree.cover(c) / w, if hot { incoming_one } else { 0.0 });
            }
            if taken.is_none() && !answers && incoming_one != 0.0 {
                // No prediction on a path the contributions weigh: none for the row.
                walk.phi.iter_mut().for_each(|v| *v = f64::NAN);
            } else if taken.is_none() {
                branch(walk, (node, true), 0.0, incoming_one);
            }
        }
        Split::Leaf => unreachable!("a leaf returned above"),
    }
}
