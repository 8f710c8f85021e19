//! A small gradient-boosting trainer (squared loss, histogram splits,
//! learned missing-value direction) that writes [`TreesParams`]. Enough to
//! train the demo model; not a general-purpose library.

use paddock_guest::ndarray::Array2;
use paddock_guest::{Branch, Evaluate, Node, SplitRule, Tree, Trees, TreesParams};

/// Training settings.
#[derive(Clone)]
pub struct Settings {
    pub trees: usize,
    pub depth: usize,
    pub learning_rate: f64,
    pub min_leaf: usize,
    pub bins: usize,
    pub lambda: f64,
}

const MISSING: u16 = u16::MAX;

/// Fits a boosted ensemble to rows (`x[i]` has `features` values, NaN for
/// missing) and targets `y`.
pub fn fit(x: &[Vec<f64>], y: &[f64], features: usize, s: &Settings) -> TreesParams {
    let n = y.len();
    // Cut points per feature from quantiles of the non-missing values.
    let cuts: Vec<Vec<f64>> = (0..features)
        .map(|f| {
            let mut v: Vec<f64> = x.iter().map(|r| r[f]).filter(|v| !v.is_nan()).collect();
            v.sort_by(f64::total_cmp);
            v.dedup();
            let step = (v.len() as f64 / s.bins as f64).max(1.0);
            let mut c: Vec<f64> =
                (1..s.bins).map(|k| (k as f64 * step) as usize).filter(|&i| i < v.len()).map(|i| v[i]).collect();
            c.dedup();
            c
        })
        .collect();
    // bin(x) = number of cut points ≤ x; "bins ≤ k go left" ⇔ x < cuts[k].
    let binned: Vec<Vec<u16>> = (0..features)
        .map(|f| {
            x.iter()
                .map(|r| if r[f].is_nan() { MISSING } else { cuts[f].partition_point(|c| *c <= r[f]) as u16 })
                .collect()
        })
        .collect();
    let base = y.iter().sum::<f64>() / n as f64;
    let rows_x = Array2::from_shape_fn((n, features), |(i, f)| x[i][f]);
    let mut gained = Array2::zeros((n, 1));
    let mut pred = vec![base; n];
    let mut trees = Vec::with_capacity(s.trees);
    for _ in 0..s.trees {
        let grad: Vec<f64> = y.iter().zip(&pred).map(|(y, p)| y - p).collect();
        let mut nodes = Vec::new();
        let rows: Vec<u32> = (0..n as u32).collect();
        grow(&mut nodes, &rows, &grad, &binned, &cuts, s, 0);
        let tree = Tree { output: 0, nodes };
        // What the new tree adds to each row, walked by the estimator itself.
        let one = Trees::new(TreesParams::boosted(features as u32, 0.0, SplitRule::Less, vec![tree.clone()]))
            .expect("the trainer grows well-formed trees");
        one.evaluate(rows_x.view(), gained.view_mut());
        for (p, g) in pred.iter_mut().zip(gained.column(0)) {
            *p += g;
        }
        trees.push(tree);
    }
    TreesParams::boosted(features as u32, base, SplitRule::Less, trees)
}

struct Best {
    gain: f64,
    feature: usize,
    cut: usize,
    missing_left: bool,
}

fn grow(
    nodes: &mut Vec<Node>,
    rows: &[u32],
    grad: &[f64],
    binned: &[Vec<u16>],
    cuts: &[Vec<f64>],
    s: &Settings,
    depth: usize,
) -> u32 {
    let me = nodes.len();
    let total: f64 = rows.iter().map(|&r| grad[r as usize]).sum();
    let value = s.learning_rate * total / (rows.len() as f64 + s.lambda);
    nodes.push(Node::Leaf { value });
    if depth >= s.depth || rows.len() < 2 * s.min_leaf {
        return me as u32;
    }
    let score = |g: f64, c: f64| g * g / (c + s.lambda);
    let parent = score(total, rows.len() as f64);
    let mut best: Option<Best> = None;
    for (f, col) in binned.iter().enumerate() {
        let nb = cuts[f].len() + 1;
        let mut hist_g = vec![0.0; nb];
        let mut hist_c = vec![0usize; nb];
        let (mut miss_g, mut miss_c) = (0.0, 0usize);
        for &r in rows {
            let b = col[r as usize];
            if b == MISSING {
                miss_g += grad[r as usize];
                miss_c += 1;
            } else {
                hist_g[b as usize] += grad[r as usize];
                hist_c[b as usize] += 1;
            }
        }
        let (mut lg, mut lc) = (0.0, 0usize);
        for k in 0..nb - 1 {
            lg += hist_g[k];
            lc += hist_c[k];
            for missing_left in [true, false] {
                let (gl, cl) = if missing_left { (lg + miss_g, lc + miss_c) } else { (lg, lc) };
                let (gr, cr) = (total - gl, rows.len() - cl);
                if cl < s.min_leaf || cr < s.min_leaf {
                    continue;
                }
                let gain = score(gl, cl as f64) + score(gr, cr as f64) - parent;
                if gain > best.as_ref().map_or(1e-9, |b| b.gain) {
                    best = Some(Best { gain, feature: f, cut: k, missing_left });
                }
            }
        }
    }
    let Some(b) = best else { return me as u32 };
    let col = &binned[b.feature];
    let goes_left = |r: &u32| {
        let bin = col[*r as usize];
        if bin == MISSING { b.missing_left } else { bin as usize <= b.cut }
    };
    let (left_rows, right_rows): (Vec<u32>, Vec<u32>) = rows.iter().partition(|r| goes_left(r));
    let left = grow(nodes, &left_rows, grad, binned, cuts, s, depth + 1);
    let right = grow(nodes, &right_rows, grad, binned, cuts, s, depth + 1);
    nodes[me] = Node::Split {
        feature: b.feature as u32,
        threshold: cuts[b.feature][b.cut],
        left,
        right,
        missing: if b.missing_left { Branch::Left } else { Branch::Right },
    };
    me as u32
}
