//! Trees laid out for scoring: every walk step one record, one load of the
//! row's value, one comparison and no test of its own for absent values or
//! for having reached a leaf.
//!
//! Two layouts, chosen per tree, in one array of slots:
//! - **by levels**, for trees no deeper than [`DEEPEST_LEVELLED`] and not
//!   too sparse ([`MOST_PADDING`]; those that toolkits grow depth by depth
//!   are all like this): every path made
//!   as long as the deepest, slot `s`'s children at `2s + 1` and `2s + 2`,
//!   so a row takes exactly `depth` steps and the walk computes the next
//!   slot rather than loading it. A leaf above the last level becomes a
//!   split that sends every row left (threshold NaN: no value is at or
//!   above it) down to a copy of its value at the bottom.
//! - **siblings side by side**, for deeper trees (those grown leaf by
//!   leaf): nodes breadth first, a split's right child right after its
//!   left.
//!
//! In both a leaf is a slot of its own, its own left child with a NaN
//! threshold, so a row that reached it stays there: a group of walks stops
//! when no walk moved. Rows in groups of [`LANES`] walk a tree together;
//! a row left over walks [`LANES`] trees at once.
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

/// A tree is laid out by levels only when its bottom level has at most
/// this many slots per node it has: memory stays a few times the params'.
const MOST_PADDING: usize = 8;

/// Rows that walk a tree together: their steps do not depend on each
/// other, so the processor overlaps them (eight measured best in the
/// sandbox; more spill registers).
pub(crate) const LANES: usize = 8;

/// Where one tree sits in a [`Layout`]: its slots from `at`, `depth`
/// steps reaching every leaf.
#[derive(Clone, Copy, Debug, Default)]
pub(crate) struct Laid {
    at: usize,
    depth: u32,
    /// Laid out by levels: `2·2^depth` slots (the splits', then the bottom
    /// level's leaves, then one unused); else siblings side by side.
    levels: bool,
}

/// The laid-out trees of an ensemble, end to end. A slot is a split (which
/// value of the doubled row it reads, the threshold it compares that with,
/// and where its left child is, its right child next to it) or a leaf (a
/// NaN threshold, itself as its left child, and its value in `leaves`).
#[derive(Clone, Debug, Default)]
pub(crate) struct Layout {
    /// Values per row: a split reads feature `f` as `f` when absent values
    /// go left, as `features + f` when they go right.
    features: usize,
    reads: Vec<u32>,
    thresholds: Vec<f64>,
    /// Absolute slot indices.
    lefts: Vec<u32>,
    leaves: Vec<f64>,
    /// `leaves` rounded to `f32`, for sums kept in single precision.
    leaves_single: Vec<f32>,
}

impl Laid {
    /// Whether the tree is laid out by levels (else siblings side by side).
    #[cfg(test)]
    pub(crate) fn by_levels(&self) -> bool {
        self.levels
    }
}

impl Layout {
    /// No trees yet, for rows of `features` values.
    pub(crate) fn new(features: usize) -> Layout {
        Layout { features, ..Layout::default() }
    }

    /// Lays `tree` out, or `None` when it has a node other than a numeric
    /// split with a finite threshold or a single-value leaf, or a node with
    /// two parents, or the layout would pass 2³² slots. The tree must be
    /// valid (children after their parent and within the tree, features
    /// below `features`).
    pub(crate) fn lay(&mut self, tree: &Tree) -> Option<Laid> {
        let depth = depth(tree)?;
        if self.reads.len() + 2 * tree.nodes.len().max(1 << DEEPEST_LEVELLED) > u32::MAX as usize {
            return None;
        }
        // By levels only where the padding stays within a few times the
        // tree's own nodes (a long thin tree would be mostly padding).
        let levelled = depth <= DEEPEST_LEVELLED && (1usize << depth) <= MOST_PADDING * tree.nodes.len();
        let laid = if levelled { self.levels(tree, depth) } else { self.siblings(tree, depth) };
        self.leaves_single.extend(self.leaves[laid.at..].iter().map(|&v| v as f32));
        Some(laid)
    }

    /// The value of leaf slot `slot` (as the walks name it).
    pub(crate) fn leaf(&self, slot: usize) -> f64 {
        self.leaves[slot]
    }

    /// The value of leaf slot `slot`, rounded to `f32`.
    pub(crate) fn leaf_single(&self, slot: usize) -> f32 {
        self.leaves_single[slot]
    }

    /// Adds a slot: a split on `feature` whose absent values go `missing`
    /// and whose left child is slot `left`.
    fn push_split(&mut self, feature: u32, threshold: f64, missing: Branch, left: usize) {
        let absent_right = if missing == Branch::Right { self.features } else { 0 };
        self.reads.push((absent_right + feature as usize) as u32);
        self.thresholds.push(threshold);
        self.lefts.push(left as u32);
        self.leaves.push(0.0);
    }

    /// Adds a leaf slot of value `value`.
    fn push_leaf(&mut self, value: f64) {
        let me = self.reads.len() as u32;
        self.reads.push(0);
        self.thresholds.push(f64::NAN);
        self.lefts.push(me);
        self.leaves.push(value);
    }

    fn levels(&mut self, tree: &Tree, depth: u32) -> Laid {
        let at = self.reads.len();
        let width = 1usize << depth;
        // Every split slot all-left (threshold NaN) until a split fills it;
        // the bottom level's slots leaves of value 0 until a leaf fills one.
        for slot in 0..width - 1 {
            self.push_split(0, f64::NAN, Branch::Left, at + 2 * slot + 1);
        }
        for _ in 0..=width {
            self.push_leaf(0.0);
        }
        // (node, slot, level): fill each slot from the node that sits there.
        let mut stack = vec![(0usize, 0usize, 0u32)];
        while let Some((n, slot, level)) = stack.pop() {
            match tree.nodes[n] {
                Node::Leaf { value } if level == depth => self.leaves[at + slot] = value,
                // The slot stays all-left: every row goes on to this leaf again.
                Node::Leaf { .. } => stack.push((n, 2 * slot + 1, level + 1)),
                Node::Split { feature, threshold, missing, left, right } => {
                    let absent_right = if missing == Branch::Right { self.features } else { 0 };
                    self.reads[at + slot] = (absent_right + feature as usize) as u32;
                    self.thresholds[at + slot] = threshold;
                    stack.push((left as usize, 2 * slot + 1, level + 1));
                    stack.push((right as usize, 2 * slot + 2, level + 1));
                }
                _ => unreachable!("depth() admits numeric splits and single-value leaves only"),
            }
        }
        Laid { at, depth, levels: true }
    }

    fn siblings(&mut self, tree: &Tree, depth: u32) -> Laid {
        let at = self.reads.len();
        // Breadth first: the children of the i-th split placed are the
        // (2i+1)-th and (2i+2)-th nodes placed after the root.
        let mut queue = std::collections::VecDeque::from([0usize]);
        let mut free = at + 1;
        while let Some(n) = queue.pop_front() {
            match tree.nodes[n] {
                Node::Leaf { value } => self.push_leaf(value),
                Node::Split { feature, threshold, left, right, missing } => {
                    self.push_split(feature, threshold, missing, free);
                    free += 2;
                    queue.extend([left as usize, right as usize]);
                }
                _ => unreachable!("depth() admits numeric splits and single-value leaves only"),
            }
        }
        Laid { at, depth, levels: false }
    }

    /// Calls `add(r, slot)` with the leaf slot each row of `rows`' groups
    /// reaches in tree `laid` (for [`Layout::leaf`]), rows in order; the
    /// rows left over are [`Layout::walk_trees`]'. `LE`: left when
    /// `value <= threshold`, else when `value < threshold`.
    #[inline]
    pub(crate) fn walk<const LE: bool>(&self, laid: Laid, rows: &Doubled, add: impl FnMut(usize, usize)) {
        if !laid.levels {
            return self.walk_siblings::<LE>(laid, rows, add);
        }
        // One copy of the walk per depth: the slot indices are masked to a
        // size the compiler knows.
        macro_rules! by_depth {
            ($($d:literal)*) => {
                match laid.depth {
                    $($d => self.walk_levels::<LE, { 1 << $d }>(laid.at, rows, add),)*
                    deeper => unreachable!("a tree laid out by levels with depth {deeper}"),
                }
            };
        }
        by_depth!(0 1 2 3 4 5 6 7 8);
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
        for (first, group) in rows.groups() {
            let mut s = [0usize; LANES];
            for _ in 0..levels {
                for (j, s) in s.iter_mut().enumerate() {
                    let slot = *s & (W - 1);
                    let right = goes_right::<LE>(group.value(reads[slot] as usize, j), thresholds[slot]);
                    *s = 2 * slot + 1 + usize::from(right);
                }
            }
            for (j, &s) in s.iter().enumerate() {
                // After the last level a slot is a leaf's: W−1 ..= 2W−2.
                add(first + j, at + s);
            }
        }
    }

    #[inline(always)]
    fn walk_siblings<const LE: bool>(&self, laid: Laid, rows: &Doubled, mut add: impl FnMut(usize, usize)) {
        let slots = self.slots();
        for (first, group) in rows.groups() {
            let mut s = [laid.at; LANES];
            for _ in 0..laid.depth {
                let mut moved = false;
                for (j, s) in s.iter_mut().enumerate() {
                    let to = slots.step::<LE>(*s, |read| group.value(read, j));
                    moved |= to != *s;
                    *s = to;
                }
                if !moved {
                    break;
                }
            }
            for (j, &s) in s.iter().enumerate() {
                add(first + j, s);
            }
        }
    }

    /// Walks one doubled row `x` through up to [`LANES`] trees at once
    /// (their walks do not depend on each other), and calls `add(i, slot)`
    /// with the leaf slot reached in `trees[i]`, in order.
    #[inline]
    pub(crate) fn walk_trees<const LE: bool>(&self, trees: &[Laid], x: &[f64], mut add: impl FnMut(usize, usize)) {
        let Some(last) = trees.last() else { return };
        let mut s: [usize; LANES] = std::array::from_fn(|i| trees.get(i).unwrap_or(last).at);
        let depth = trees.iter().map(|t| t.depth).max().unwrap_or(0);
        let slots = self.slots();
        for _ in 0..depth {
            let mut moved = false;
            for s in s.iter_mut() {
                let to = slots.step::<LE>(*s, |read| x[read.min(x.len() - 1)]);
                moved |= to != *s;
                *s = to;
            }
            if !moved {
                break;
            }
        }
        for (i, &s) in s.iter().take(trees.len()).enumerate() {
            add(i, s);
        }
    }

    /// The slots, as a walk steps through them.
    fn slots(&self) -> Slots<'_> {
        let len = self.reads.len();
        Slots { reads: &self.reads[..len], thresholds: &self.thresholds[..len], lefts: &self.lefts[..len] }
    }
}

/// Every slot of a [`Layout`], the three arrays of one length.
#[derive(Clone, Copy)]
struct Slots<'a> {
    reads: &'a [u32],
    thresholds: &'a [f64],
    lefts: &'a [u32],
}

impl Slots<'_> {
    /// The slot after slot `s` for a row whose values `value(read)` gives.
    /// Slots are within the layout by construction; clamped all the same,
    /// so the compiler sees no index out of range (no branch).
    #[inline(always)]
    fn step<const LE: bool>(self, s: usize, value: impl Fn(usize) -> f64) -> usize {
        let s = s.min(self.reads.len() - 1);
        self.lefts[s] as usize + usize::from(goes_right::<LE>(value(self.reads[s] as usize), self.thresholds[s]))
    }
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
    pub(crate) grouped: usize,
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

    /// Each row left over (fewer than [`LANES`]), with its index.
    pub(crate) fn rest(&self) -> impl Iterator<Item = (usize, &[f64])> {
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
