//! Tree ensembles: boosted sums of regression trees with a base score, or
//! averaged trees (forests), with a missing-value direction at every split.

use ndarray::{ArrayView2, ArrayViewMut2};
use serde::{Deserialize, Serialize};

use crate::generic::Evaluate;

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
}

/// One regression tree; node 0 is the root.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Tree {
    /// The output this tree contributes to.
    pub output: u32,
    /// The nodes; node 0 is the root.
    pub nodes: Vec<Node>,
}

/// Parameters of a tree ensemble, as training code writes them.
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
}

/// A flattened node: `left == 0` marks a leaf (no child can be node 0),
/// whose value is kept in `threshold`.
#[derive(Clone, Copy, Debug)]
struct Flat {
    threshold: f64,
    feature: u32,
    left: u32,
    right: u32,
    missing_left: bool,
}

/// A tree ensemble ready to evaluate.
#[derive(Clone, Debug)]
pub struct Trees {
    features: usize,
    base: Vec<f64>,
    combine: Combine,
    less_or_equal: bool,
    /// (first node, output) of each tree in `nodes`.
    roots: Vec<(usize, usize)>,
    nodes: Vec<Flat>,
    per_output: Vec<f64>,
}

impl Trees {
    /// Checks the parameters and builds the ensemble.
    ///
    /// # Errors
    /// When there is no output, a tree is empty or names an unknown output,
    /// a split names an unknown feature or a child that is not after it in
    /// the tree, or a number is not finite. The message names tree and node.
    pub fn new(params: TreesParams) -> Result<Self, String> {
        let outputs = params.base.len();
        if outputs == 0 {
            return Err("tree params: empty base (at least one output is needed)".into());
        }
        if let Some(bad) = params.base.iter().find(|v| !v.is_finite()) {
            return Err(format!("tree params: non-finite base score {bad}"));
        }
        let mut nodes = Vec::with_capacity(params.trees.iter().map(|t| t.nodes.len()).sum());
        let mut roots = Vec::with_capacity(params.trees.len());
        let mut counts = vec![0usize; outputs];
        for (t, tree) in params.trees.iter().enumerate() {
            let output = tree.output as usize;
            if output >= outputs {
                return Err(format!("tree {t}: output {output} but only {outputs} outputs"));
            }
            if tree.nodes.is_empty() {
                return Err(format!("tree {t}: no nodes"));
            }
            counts[output] += 1;
            let offset = nodes.len();
            roots.push((offset, output));
            let len = tree.nodes.len();
            for (i, node) in tree.nodes.iter().enumerate() {
                nodes.push(match *node {
                    Node::Leaf { value } => {
                        if !value.is_finite() {
                            return Err(format!("tree {t} node {i}: non-finite leaf {value}"));
                        }
                        Flat { threshold: value, feature: 0, left: 0, right: 0, missing_left: false }
                    }
                    Node::Split { feature, threshold, left, right, missing } => {
                        if feature >= params.features {
                            return Err(format!(
                                "tree {t} node {i}: feature {feature} but rows have {}",
                                params.features
                            ));
                        }
                        if threshold.is_nan() {
                            return Err(format!("tree {t} node {i}: threshold is NaN"));
                        }
                        for child in [left, right] {
                            let c = child as usize;
                            if c <= i || c >= len {
                                return Err(format!(
                                    "tree {t} node {i}: child {child} must come after the node and within the {len} nodes"
                                ));
                            }
                        }
                        Flat {
                            threshold,
                            feature,
                            left: (offset + left as usize) as u32,
                            right: (offset + right as usize) as u32,
                            missing_left: missing == Branch::Left,
                        }
                    }
                });
            }
        }
        // Leaf test relies on no child pointing at the first node overall.
        let per_output = counts.iter().map(|&n| if n == 0 { 0.0 } else { 1.0 / n as f64 }).collect();
        Ok(Trees {
            features: params.features as usize,
            base: params.base,
            combine: params.combine,
            less_or_equal: params.split == SplitRule::LessOrEqual,
            roots,
            nodes,
            per_output,
        })
    }

    /// The leaf value one tree gives a row.
    #[inline]
    fn leaf(&self, root: usize, x: &[f64]) -> f64 {
        let mut n = &self.nodes[root];
        // Four steps per loop turn: in the sandbox every loop back-edge
        // carries an interruption check, and a tree walk is little else.
        loop {
            for _ in 0..4 {
                if n.left == 0 {
                    return n.threshold;
                }
                n = &self.nodes[self.child(n, x) as usize];
            }
        }
    }

    /// Which child of a split node a row goes to.
    #[inline(always)]
    fn child(&self, n: &Flat, x: &[f64]) -> u32 {
        let v = x[n.feature as usize];
        let left = if v.is_nan() {
            n.missing_left
        } else if self.less_or_equal {
            v <= n.threshold
        } else {
            v < n.threshold
        };
        if left { n.left } else { n.right }
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
        let outputs = self.outputs();
        let start = |k: usize| match self.combine {
            Combine::Sum => self.base[k],
            Combine::Mean => 0.0,
        };
        for mut o in out.outer_iter_mut() {
            for (k, v) in o.iter_mut().enumerate() {
                *v = start(k);
            }
        }
        // Tree by tree over all rows: each tree stays in cache while it runs.
        let contiguous = rows.as_slice();
        let mut scratch = vec![0.0; self.features];
        for &(root, k) in &self.roots {
            for (r, row) in rows.outer_iter().enumerate() {
                let x: &[f64] = match contiguous {
                    Some(cells) => &cells[r * self.features..(r + 1) * self.features],
                    None => {
                        scratch.iter_mut().zip(row.iter()).for_each(|(s, v)| *s = *v);
                        &scratch
                    }
                };
                out[[r, k]] += self.leaf(root, x);
            }
        }
        if self.combine == Combine::Mean {
            for mut o in out.outer_iter_mut() {
                for k in 0..outputs {
                    o[k] = self.base[k] + o[k] * self.per_output[k];
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
        let trees = Trees::new(TreesParams {
            features: 2,
            base: vec![10.0],
            combine: Combine::Sum,
            split: SplitRule::Less,
            trees: vec![
                stump(0, 0, 5.0, 1.0, 2.0, Branch::Right),
                stump(0, 1, 0.0, 0.5, -0.25, Branch::Left),
            ],
        })
        .unwrap();
        let rows = array![[4.0, -1.0], [5.0, 0.0], [f64::NAN, f64::NAN]];
        let mut out = Array2::zeros((3, 1));
        trees.evaluate(rows.view(), out.view_mut());
        assert_eq!(out.column(0).to_vec(), vec![11.5, 11.75, 12.5]);
    }

    #[test]
    fn less_or_equal_changes_the_tie() {
        let params = |split| TreesParams {
            features: 1,
            base: vec![0.0],
            combine: Combine::Sum,
            split,
            trees: vec![stump(0, 0, 5.0, 1.0, 2.0, Branch::Left)],
        };
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
            features: 1,
            base: vec![1.0, 0.0],
            combine: Combine::Mean,
            split: SplitRule::Less,
            trees: vec![
                stump(0, 0, 0.0, 0.0, 3.0, Branch::Left),
                stump(0, 0, 0.0, 0.0, 5.0, Branch::Left),
                stump(1, 0, 0.0, 0.0, 7.0, Branch::Left),
            ],
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
        let err = Trees::new(TreesParams {
            features: 1,
            base: vec![0.0],
            combine: Combine::Sum,
            split: SplitRule::Less,
            trees: vec![bad],
        })
        .unwrap_err();
        assert!(err.contains("tree 0 node 0: child 0 must come after"), "{err}");
        let err = Trees::new(TreesParams {
            features: 1,
            base: vec![0.0],
            combine: Combine::Sum,
            split: SplitRule::Less,
            trees: vec![stump(0, 3, 1.0, 1.0, 2.0, Branch::Left)],
        })
        .unwrap_err();
        assert!(err.contains("feature 3 but rows have 1"), "{err}");
    }
}
