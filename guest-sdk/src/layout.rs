//! Trees laid out for scoring: every walk step one record, one load of the
//! row's value, one comparison and no test of its own for absent values or
//! for having reached a leaf.
//!
//! Two layouts, chosen per tree:
//! - **by levels**, for trees no deeper than [`DEEPEST_LEVELLED`] (those
//!   that toolkits grow depth by depth are all like this): every path made
//!   as long as the deepest, slot `s`'s children at `2s + 1` and `2s + 2`,
//!   so a row takes exactly `depth` steps. A leaf above the last level
//!   becomes a split that sends every row left (threshold NaN: no value is
//!   at or above it) down to a copy of its value at the bottom.
//! - **siblings side by side**, for deeper trees (those grown leaf by
//!   leaf): nodes breadth first, a split's right child right after its
//!   left; a leaf is its own left child with a NaN threshold, so a row that
//!   reached it stays there, and a group of rows stops when no row moved.
//!
//! Absent values: a row is read twice over ([`Doubled`]: its values with NaN
//! as −∞, then with NaN as +∞), and each split reads the copy that sends an
//! absent value its way. With finite thresholds one comparison then agrees
//! with the node-by-node walk on every value, NaN and the infinities
//! included (`v < t` goes left: `−∞ < t`, `+∞ ≥ t`), so the answers are the
//! same bits. Trees with any other node (zero-as-absent, categorical,
//! per-output leaves) or a non-finite threshold are walked node by node.

use crate::trees::{Branch, Node, Tree};

/// The deepest tree laid out by levels (2⁸ slots): the padding doubles
/// with every level.
const DEEPEST_LEVELLED: u32 = 8;

/// Rows that walk a tree together: their steps do not depend on each
/// other, so the processor overlaps them (eight measured best in the
/// sandbox; more spill registers).
pub(crate) const LANES: usize = 8;

/// Where one tree sits in a [`Layout`].
#[derive(Clone, Copy, Debug)]
pub(crate) enum Laid {
    /// `2^depth` slots from `at`.
    Levels { depth: u32, at: usize },
    /// `len` nodes from `at`; `depth` steps reach every leaf.
    Siblings { depth: u32, at: usize, len: usize },
}

/// The laid-out trees of an ensemble, end to end, each from its `at` in
/// the slot arrays and `leaves`: by levels, the splits' slots, then the
/// bottom level's leaves in order; side by side, each node at its place
/// (a leaf's value at its own place in `leaves`).
#[derive(Clone, Debug, Default)]
pub(crate) struct Layout {
    /// Values per row: a split reads feature `f` as `f` when absent values
    /// go left, as `features + f` when they go right.
    features: usize,
    /// Per slot: which value of the doubled row a split reads, the
    /// threshold it compares that with, and (siblings side by side only)
    /// where its left child is, its right child next to it.
    reads: Vec<u32>,
    thresholds: Vec<f64>,
    lefts: Vec<u32>,
    leaves: Vec<f64>,
    /// `leaves` rounded to `f32`, for sums kept in single precision.
    leaves_single: Vec<f32>,
}

impl Layout {
    /// No trees yet, for rows of `features` values.
    pub(crate) fn new(features: usize) -> Layout {
        Layout { features, ..Layout::default() }
    }

    /// Lays `tree` out, or `None` when it has a node other than a numeric
    /// split with a finite threshold or a single-value leaf, or a node with
    /// two parents. The tree must be valid (children after their parent
    /// and within the tree, features below `features`).
    pub(crate) fn lay(&mut self, tree: &Tree) -> Option<Laid> {
        let depth = depth(tree)?;
        let at = self.reads.len();
        let laid = if depth <= DEEPEST_LEVELLED { self.levels(tree, depth) } else { self.siblings(tree, depth) };
        self.leaves.resize(self.reads.len(), 0.0);
        self.leaves_single.extend(self.leaves[at..].iter().map(|&v| v as f32));
        Some(laid)
    }

    /// The value of leaf slot `slot` (as [`Layout::walk`] names it).
    pub(crate) fn leaf(&self, slot: usize) -> f64 {
        self.leaves[slot]
    }

    /// The value of leaf slot `slot`, rounded to `f32`.
    pub(crate) fn leaf_single(&self, slot: usize) -> f32 {
        self.leaves_single[slot]
    }

    /// Adds a slot: a split on `feature` whose absent values go `missing`
    /// and whose left child is at `left`.
    fn push(&mut self, feature: u32, threshold: f64, missing: Branch, left: u32) {
        let absent_right = if missing == Branch::Right { self.features } else { 0 };
        self.reads.push((absent_right + feature as usize) as u32);
        self.thresholds.push(threshold);
        self.lefts.push(left);
    }

    fn levels(&mut self, tree: &Tree, depth: u32) -> Laid {
        let at = self.reads.len();
        let width = 1usize << depth;
        // Every slot all-left (threshold NaN) until a split fills it.
        self.reads.resize(at + width, 0);
        self.thresholds.resize(at + width, f64::NAN);
        self.lefts.resize(at + width, 0);
        self.leaves.resize(at + width, 0.0);
        // (node, slot, level): fill each slot from the node that sits there.
        let mut stack = vec![(0usize, 0usize, 0u32)];
        while let Some((n, slot, level)) = stack.pop() {
            match tree.nodes[n] {
                // Leaves sit in the slots past the splits': slot − (width − 1).
                Node::Leaf { value } if level == depth => self.leaves[at + slot + 1 - width] = value,
                // The slot stays all-left: every row goes on to this leaf again.
                Node::Leaf { .. } => stack.push((n, 2 * slot + 1, level + 1)),
                Node::Split { feature, threshold, left, right, missing } => {
                    let absent_right = if missing == Branch::Right { self.features } else { 0 };
                    self.reads[at + slot] = (absent_right + feature as usize) as u32;
                    self.thresholds[at + slot] = threshold;
                    stack.push((left as usize, 2 * slot + 1, level + 1));
                    stack.push((right as usize, 2 * slot + 2, level + 1));
                }
                _ => unreachable!("depth() admits numeric splits and single-value leaves only"),
            }
        }
        Laid::Levels { depth, at }
    }

    fn siblings(&mut self, tree: &Tree, depth: u32) -> Laid {
        let at = self.reads.len();
        // Breadth first: the children of the i-th split placed are the
        // (2i+1)-th and (2i+2)-th nodes placed after the root.
        let mut queue = std::collections::VecDeque::from([0usize]);
        let mut free = 1u32;
        while let Some(n) = queue.pop_front() {
            let me = (self.reads.len() - at) as u32;
            match tree.nodes[n] {
                Node::Leaf { value } => {
                    self.push(0, f64::NAN, Branch::Left, me);
                    self.leaves.resize(self.reads.len() - 1, 0.0);
                    self.leaves.push(value);
                }
                Node::Split { feature, threshold, left, right, missing } => {
                    self.push(feature, threshold, missing, free);
                    free += 2;
                    queue.extend([left as usize, right as usize]);
                }
                _ => unreachable!("depth() admits numeric splits and single-value leaves only"),
            }
        }
        Laid::Siblings { depth, at, len: self.reads.len() - at }
    }

    /// Calls `add(r, slot)` with the leaf slot each row of `rows` reaches
    /// in tree `laid` (for [`Layout::leaf`]), rows in order. `LE`: left
    /// when `value <= threshold`, else when `value < threshold`.
    #[inline]
    pub(crate) fn walk<const LE: bool>(&self, laid: Laid, rows: &Doubled, add: impl FnMut(usize, usize)) {
        match laid {
            Laid::Siblings { depth, at, len } => {
                let tree = Slots {
                    reads: &self.reads[at..at + len],
                    thresholds: &self.thresholds[at..at + len],
                    lefts: &self.lefts[at..at + len],
                };
                self.walk_siblings::<LE>(depth, tree, at, rows, add)
            }
            Laid::Levels { depth, at } => {
                // One copy of the walk per depth: the slot indices are
                // masked to a size the compiler knows.
                macro_rules! by_depth {
                    ($($d:literal)*) => {
                        match depth {
                            $($d => self.walk_levels::<LE, { 1 << $d }>(at, rows, add),)*
                            deeper => unreachable!("a tree laid out by levels with depth {deeper}"),
                        }
                    };
                }
                by_depth!(0 1 2 3 4 5 6 7 8);
            }
        }
    }

    #[inline(always)]
    fn walk_levels<const LE: bool, const W: usize>(
        &self,
        at: usize,
        rows: &Doubled,
        mut add: impl FnMut(usize, usize),
    ) {
        let reads: &[u32; W] = self.reads[at..at + W].try_into().expect("W slots from `at`");
        let thresholds: &[f64; W] = self.thresholds[at..at + W].try_into().expect("W slots from `at`");
        let levels = W.trailing_zeros();
        // After the last level a slot is in W−1 ..= 2W−2: leaf slot − (W−1).
        let leaf = |s: usize| at + ((s + 1 - W) & (W - 1));
        for (first, group) in rows.groups() {
            let mut s = [0usize; LANES];
            for _ in 0..levels {
                for (j, s) in s.iter_mut().enumerate() {
                    *s = level_step::<LE, W>(reads, thresholds, *s, |read| group.value(read, j));
                }
            }
            for (j, &s) in s.iter().enumerate() {
                add(first + j, leaf(s));
            }
        }
        for (r, x) in rows.rest() {
            let mut s = 0;
            for _ in 0..levels {
                s = level_step::<LE, W>(reads, thresholds, s, |read| x[read]);
            }
            add(r, leaf(s));
        }
    }

    #[inline(always)]
    fn walk_siblings<const LE: bool>(
        &self,
        depth: u32,
        tree: Slots<'_>,
        at: usize,
        rows: &Doubled,
        mut add: impl FnMut(usize, usize),
    ) {
        let last = tree.reads.len() - 1;
        for (first, group) in rows.groups() {
            let mut s = [0usize; LANES];
            for _ in 0..depth {
                let mut moved = false;
                for (j, s) in s.iter_mut().enumerate() {
                    let to = sibling_step::<LE>(tree, *s, |read| group.value(read, j));
                    moved |= to != *s;
                    *s = to;
                }
                if !moved {
                    break;
                }
            }
            for (j, &s) in s.iter().enumerate() {
                add(first + j, at + s.min(last));
            }
        }
        for (r, x) in rows.rest() {
            let mut s = 0;
            for _ in 0..depth {
                s = sibling_step::<LE>(tree, s, |read| x[read]);
            }
            add(r, at + s.min(last));
        }
    }
}

/// The slot after slot `s` of a tree laid out by levels, for a row whose
/// values `value(read)` gives.
#[inline(always)]
fn level_step<const LE: bool, const W: usize>(
    reads: &[u32; W],
    thresholds: &[f64; W],
    s: usize,
    value: impl Fn(usize) -> f64,
) -> usize {
    let s = s & (W - 1);
    2 * s + 1 + usize::from(goes_right::<LE>(value(reads[s] as usize), thresholds[s]))
}

/// One tree's slots, laid out siblings side by side.
#[derive(Clone, Copy)]
struct Slots<'a> {
    reads: &'a [u32],
    thresholds: &'a [f64],
    lefts: &'a [u32],
}

/// The place after place `s` of a tree laid out siblings side by side, for
/// a row whose values `value(read)` gives. Places are below the tree's
/// length by construction; clamped all the same, so the compiler sees no
/// index out of range (no branch).
#[inline(always)]
fn sibling_step<const LE: bool>(tree: Slots<'_>, s: usize, value: impl Fn(usize) -> f64) -> usize {
    let s = s.min(tree.reads.len() - 1).min(tree.thresholds.len() - 1).min(tree.lefts.len() - 1);
    tree.lefts[s] as usize + usize::from(goes_right::<LE>(value(tree.reads[s] as usize), tree.thresholds[s]))
}

/// Whether a value goes right at a split (NaN thresholds send every value
/// left). `LE`: left when `value <= threshold`, else when `value < threshold`.
#[inline(always)]
fn goes_right<const LE: bool>(value: f64, threshold: f64) -> bool {
    if LE { value > threshold } else { value >= threshold }
}

/// A batch's rows as [`Layout::walk`] reads them, each row doubled (its
/// values with NaN as −∞, then with NaN as +∞): [`LANES`] rows at a time
/// value by value (`group[f][j]`: value `f` of the group's row `j`), so
/// that one address serves every lane, then the rows left over one by one.
pub(crate) struct Doubled {
    /// Values per doubled row (at least one, so rows without features
    /// still count).
    width: usize,
    groups: Vec<[f64; LANES]>,
    rest: Vec<f64>,
    /// Rows in the groups.
    grouped: usize,
}

/// One group of [`LANES`] doubled rows.
#[derive(Clone, Copy)]
pub(crate) struct Group<'a>(&'a [[f64; LANES]]);

impl Group<'_> {
    /// Value `read` of the group's row `j`. Reads are below the width by
    /// construction; clamped all the same, so the compiler sees no index
    /// out of range (no branch).
    #[inline(always)]
    fn value(self, read: usize, j: usize) -> f64 {
        self.0[read.min(self.0.len() - 1)][j]
    }
}

impl Doubled {
    /// Doubles and groups `cells`: `rows` rows of `features` values each,
    /// row-major.
    pub(crate) fn new(cells: &[f64], features: usize, rows: usize) -> Doubled {
        let doubled = |v: f64| if v.is_nan() { [f64::NEG_INFINITY, f64::INFINITY] } else { [v, v] };
        let width = 2 * features.max(1);
        let grouped = rows / LANES * LANES;
        let mut groups = vec![[0.0; LANES]; grouped / LANES * width];
        for (g, group) in groups.chunks_exact_mut(width).enumerate() {
            for j in 0..LANES {
                let row = &cells[(g * LANES + j) * features..][..features];
                for (f, &v) in row.iter().enumerate() {
                    [group[f][j], group[features + f][j]] = doubled(v);
                }
            }
        }
        let mut rest = vec![0.0; (rows - grouped) * width];
        for (r, x) in rest.chunks_exact_mut(width).enumerate() {
            let row = &cells[(grouped + r) * features..][..features];
            for (f, &v) in row.iter().enumerate() {
                [x[f], x[features + f]] = doubled(v);
            }
        }
        Doubled { width, groups, rest, grouped }
    }

    /// Each group with the index of its first row.
    fn groups(&self) -> impl Iterator<Item = (usize, Group<'_>)> {
        self.groups.chunks_exact(self.width).enumerate().map(|(g, group)| (g * LANES, Group(group)))
    }

    /// Each row left over, with its index.
    fn rest(&self) -> impl Iterator<Item = (usize, &[f64])> {
        self.rest.chunks_exact(self.width).enumerate().map(|(r, x)| (self.grouped + r, x))
    }
}

/// The depth of a valid tree (a lone leaf: 0), or `None` when a path from
/// its root has a node other than a numeric split with a finite threshold
/// or a single-value leaf, or a node has two parents.
fn depth(tree: &Tree) -> Option<u32> {
    let mut seen = vec![false; tree.nodes.len()];
    let mut deepest = 0;
    let mut stack = vec![(0usize, 0u32)];
    while let Some((n, level)) = stack.pop() {
        if std::mem::replace(&mut seen[n], true) {
            return None;
        }
        match tree.nodes[n] {
            Node::Leaf { .. } => deepest = deepest.max(level),
            Node::Split { left, right, threshold, .. } if threshold.is_finite() => {
                stack.extend([(left as usize, level + 1), (right as usize, level + 1)]);
            }
            _ => return None,
        }
    }
    Some(deepest)
}
