//! Linear models: `link(intercept + Σ weight × feature)`, one set of
//! coefficients per output.

use ndarray::{ArrayView2, ArrayViewMut2};
use serde::{Deserialize, Serialize};

use crate::MarginLink;
use crate::exp;
use crate::generic::Evaluate;
use crate::lanes::F64x2;

/// How the linear score becomes an output.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Link {
    /// The output is the linear score itself (linear regression).
    Identity,
    /// The output is `1 / (1 + e^-score)` (logistic regression, a probability).
    Logistic,
    /// The outputs are `e^(scoreₖ − max) / Σ e^(scoreⱼ − max)`: one
    /// probability per class (multinomial logistic regression). Needs two
    /// outputs or more.
    Softmax,
}

/// Parameters of a linear model, as training code writes them.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LinearParams {
    /// Link applied to every output.
    pub link: Link,
    /// One intercept per output.
    pub intercepts: Vec<f64>,
    /// One row per output, one weight per feature, in contract order.
    pub weights: Vec<Vec<f64>>,
    /// Empty, or one value per feature that replaces an absent (NaN) input
    /// (mean imputation, say). When empty, an absent input makes the output
    /// NaN, which the host reports as a model fault.
    pub impute: Vec<f64>,
}

/// A linear model ready to evaluate.
#[derive(Clone, Debug)]
pub struct Linear {
    link: Link,
    features: usize,
    intercepts: Vec<f64>,
    /// outputs × features, row-major.
    weights: Vec<f64>,
    impute: Option<Vec<f64>>,
}

impl Linear {
    /// Checks the parameters and builds the model.
    ///
    /// # Errors
    /// When there is no output, the weight rows differ in length or do not
    /// match the intercepts, the impute list has the wrong length, or any
    /// number is not finite.
    pub fn new(params: LinearParams) -> Result<Self, String> {
        let outputs = params.intercepts.len();
        if outputs == 0 {
            return Err("linear params: no intercepts (at least one output is needed)".into());
        }
        if params.weights.len() != outputs {
            return Err(format!("linear params: {} weight rows for {outputs} intercepts", params.weights.len()));
        }
        let features = params.weights[0].len();
        let mut weights = Vec::with_capacity(outputs * features);
        for (k, row) in params.weights.iter().enumerate() {
            if row.len() != features {
                return Err(format!("linear params: weight row {k} has {} weights, row 0 has {features}", row.len()));
            }
            weights.extend_from_slice(row);
        }
        if !params.impute.is_empty() && params.impute.len() != features {
            return Err(format!("linear params: {} impute values for {features} features", params.impute.len()));
        }
        if params.link == Link::Softmax && outputs < 2 {
            return Err("linear params: softmax needs at least two outputs".into());
        }
        let all = params.intercepts.iter().chain(&weights).chain(&params.impute);
        if let Some(bad) = all.into_iter().find(|v| !v.is_finite()) {
            return Err(format!("linear params: non-finite coefficient {bad}"));
        }
        Ok(Linear {
            link: params.link,
            features,
            intercepts: params.intercepts,
            weights,
            impute: (!params.impute.is_empty()).then_some(params.impute),
        })
    }

    /// One row's outputs.
    fn row(&self, x: &[f64], out: &mut [f64]) {
        self.margins(x, out);
        self.link(out);
    }

    /// One row's linear scores (margins), before the link.
    fn margins(&self, x: &[f64], out: &mut [f64]) {
        for ((o, &b), w) in out.iter_mut().zip(&self.intercepts).zip(self.weights.chunks_exact(self.features)) {
            *o = x.iter().zip(w).enumerate().fold(b, |acc, (j, (x, w))| acc + w * self.input(j, *x));
        }
    }

    /// Feature `j`'s value as the model reads it: an absent one imputed
    /// when the model has imputation values.
    #[inline(always)]
    fn input(&self, j: usize, x: f64) -> f64 {
        match &self.impute {
            Some(fill) if x.is_nan() => fill[j],
            _ => x,
        }
    }

    /// Turns one row's linear scores into its outputs.
    fn link(&self, out: &mut [f64]) {
        match self.link {
            // glibc's exp computed in the crate, not std's: the same bits
            // natively and in the sandbox, and the bits scipy's `expit`
            // gets on Linux.
            Link::Logistic => out.iter_mut().for_each(|z| *z = 1.0 / (1.0 + exp::exp(-*z))),
            Link::Identity => {}
            Link::Softmax => exp::softmax(out),
        }
    }
}

/// Rows scored together by [`Linear::groups`]: two per register, in
/// independent sums, so the processor overlaps them.
const GROUP: usize = 2 * PAIRS;
const PAIRS: usize = 4;

impl Linear {
    /// Scores whole groups of [`GROUP`] rows (`cells` and `dest` hold a
    /// multiple of it), lane by lane: each lane does what [`Linear::row`]
    /// does for its row, in the same order, so the bits are the same. One
    /// loop turn moves a group: in the sandbox, one interruption check and
    /// one NaN canonicalization per operation serve two rows.
    #[cfg_attr(target_arch = "wasm32", target_feature(enable = "simd128"))]
    fn groups(&self, cells: &[f64], dest: &mut [f64]) {
        let (f, m) = (self.features, self.outputs());
        for (x, o) in cells.chunks_exact(GROUP * f).zip(dest.chunks_exact_mut(GROUP * m)) {
            let row = |r: usize| &x[r * f..(r + 1) * f];
            let rows: [&[f64]; GROUP] = std::array::from_fn(row);
            for (k, (&b, w)) in self.intercepts.iter().zip(self.weights.chunks_exact(f)).enumerate() {
                let acc = match self.impute.as_deref() {
                    None => sums::<false>(b, w, &[], &rows),
                    Some(fill) => sums::<true>(b, w, fill, &rows),
                };
                for (p, a) in acc.iter().enumerate() {
                    let (z0, z1) = a.lanes();
                    o[2 * p * m + k] = z0;
                    o[(2 * p + 1) * m + k] = z1;
                }
            }
            for r in 0..GROUP {
                self.link(&mut o[r * m..(r + 1) * m]);
            }
        }
    }
}

/// `b + Σ wⱼ·xⱼ` for each row of a group, two rows per register, features
/// added in order; with `IMPUTE`, an absent (NaN) input counts as its
/// `fill` value.
#[cfg_attr(target_arch = "wasm32", target_feature(enable = "simd128"))]
#[inline]
fn sums<const IMPUTE: bool>(b: f64, w: &[f64], fill: &[f64], rows: &[&[f64]; GROUP]) -> [F64x2; PAIRS] {
    let mut acc = [F64x2::splat(b); PAIRS];
    for j in 0..w.len() {
        let wj = F64x2::splat(w[j]);
        for (p, a) in acc.iter_mut().enumerate() {
            let mut x = F64x2::new(rows[2 * p][j], rows[2 * p + 1][j]);
            if IMPUTE {
                x = x.nan_to(F64x2::splat(fill[j]));
            }
            *a = a.add(wj.mul(x));
        }
    }
    acc
}

impl Evaluate for Linear {
    type Params = LinearParams;

    fn build(params: LinearParams) -> Result<Self, String> {
        Linear::new(params)
    }

    fn features(&self) -> usize {
        self.features
    }

    fn outputs(&self) -> usize {
        self.intercepts.len()
    }

    fn evaluate(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) {
        match (rows.as_slice(), out.as_slice_mut()) {
            (Some(cells), Some(dest)) if self.features > 0 => {
                let (f, m) = (self.features, self.outputs());
                let grouped = cells.len() / f / GROUP * GROUP;
                let (groups, last) = cells.split_at(grouped * f);
                let (group_out, last_out) = dest.split_at_mut(grouped * m);
                // In the sandbox this runs WebAssembly SIMD, which wasmtime
                // validates at load.
                self.groups(groups, group_out);
                for (x, o) in last.chunks_exact(f).zip(last_out.chunks_exact_mut(m)) {
                    self.row(x, o);
                }
            }
            _ => {
                for (x, mut o) in rows.outer_iter().zip(out.outer_iter_mut()) {
                    let x = x.to_vec();
                    let mut buf = vec![0.0; self.outputs()];
                    self.row(&x, &mut buf);
                    o.assign(&ndarray::ArrayView1::from(&buf));
                }
            }
        }
    }

    /// Per output: each feature's weight × its value (imputed where the
    /// model imputes), the intercept as the baseline, and the linear score.
    /// The uncentred form, as XGBoost's linear booster reports it: the
    /// baseline is the score of a row of zeros, not of an average row.
    fn explain(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) -> Result<Vec<MarginLink>, String> {
        let (f, m) = (self.features, self.outputs());
        let mut margin = vec![0.0; m];
        for (r, (x, mut o)) in rows.outer_iter().zip(out.outer_iter_mut()).enumerate() {
            let x = x.to_vec();
            if let Some(j) = x.iter().position(|v| v.is_nan()).filter(|_| self.impute.is_none()) {
                return Err(format!("row {}: feature {j} is absent and the model imputes nothing", r + 1));
            }
            self.margins(&x, &mut margin);
            for (k, w) in self.weights.chunks_exact(f).enumerate() {
                let at = k * (f + 2);
                for j in 0..f {
                    o[at + j] = w[j] * self.input(j, x[j]);
                }
                o[at + f] = self.intercepts[k];
                o[at + f + 1] = margin[k];
            }
        }
        let link = match self.link {
            Link::Identity => MarginLink::Identity,
            Link::Logistic => MarginLink::Logistic,
            Link::Softmax => MarginLink::Softmax,
        };
        Ok(vec![link; m])
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    #[test]
    fn identity_and_logistic_match_hand_computation() {
        // Hand-computed: 0.5 + 2·1 − 1·3 = −0.5; logistic(−0.5) = 0.3775406687981454 (from memory, checked with a calculator).
        let params =
            |link| LinearParams { link, intercepts: vec![0.5], weights: vec![vec![2.0, -1.0]], impute: vec![] };
        let rows = array![[1.0, 3.0]];
        let mut out = Array2::zeros((1, 1));
        Linear::new(params(Link::Identity)).unwrap().evaluate(rows.view(), out.view_mut());
        assert_eq!(out[[0, 0]], -0.5);
        Linear::new(params(Link::Logistic)).unwrap().evaluate(rows.view(), out.view_mut());
        assert!((out[[0, 0]] - 0.377_540_668_798_145_4).abs() < 1e-15);
    }

    #[test]
    fn softmax_gives_one_probability_per_class() {
        // Scores 0, ln 3 and ln 3 − ln 2 (intercepts; weights zero): e^s is
        // 1, 3 and 1.5, so the probabilities are 1/5.5, 3/5.5 and 1.5/5.5.
        let params = |intercepts: Vec<f64>| LinearParams {
            link: Link::Softmax,
            weights: vec![vec![0.0]; intercepts.len()],
            intercepts,
            impute: vec![],
        };
        let model = Linear::new(params(vec![0.0, 3f64.ln(), 1.5f64.ln()])).unwrap();
        let mut out = Array2::zeros((1, 3));
        model.evaluate(array![[7.0]].view(), out.view_mut());
        for (have, want) in out.iter().zip([1.0 / 5.5, 3.0 / 5.5, 1.5 / 5.5]) {
            assert!((have - want).abs() < 1e-15, "{have} against {want}");
        }
        let err = Linear::new(params(vec![0.0])).unwrap_err();
        assert!(err.contains("softmax needs at least two outputs"), "{err}");
    }

    /// Rows scored two at a time give, bit for bit, what each row scored
    /// alone gives: odd row counts, absent inputs, several outputs, links.
    #[test]
    fn paired_rows_have_the_bits_of_single_rows() {
        let mut seed = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = move || {
            seed ^= seed << 13;
            seed ^= seed >> 7;
            seed ^= seed << 17;
            (seed >> 11) as f64 / (1u64 << 53) as f64 * 200.0 - 100.0
        };
        for (link, outputs, impute) in [
            (Link::Identity, 1, true),
            (Link::Logistic, 2, true),
            (Link::Softmax, 3, false),
            (Link::Identity, 1, false),
        ] {
            let features = 7;
            let model = Linear::new(LinearParams {
                link,
                intercepts: (0..outputs).map(|_| next()).collect(),
                weights: (0..outputs).map(|_| (0..features).map(|_| next() / 37.0).collect()).collect(),
                impute: if impute { (0..features).map(|_| next()).collect() } else { vec![] },
            })
            .unwrap();
            let rows = 9;
            let cells: Vec<f64> =
                (0..rows * features).map(|i| if impute && i % 5 == 3 { f64::NAN } else { next() }).collect();
            let mut out = Array2::zeros((rows, outputs));
            model.evaluate(ArrayView2::from_shape((rows, features), &cells).unwrap(), out.view_mut());
            for r in 0..rows {
                let mut alone = vec![0.0; outputs];
                model.row(&cells[r * features..(r + 1) * features], &mut alone);
                for k in 0..outputs {
                    assert_eq!(out[[r, k]].to_bits(), alone[k].to_bits(), "{link:?} row {r} output {k}");
                }
            }
        }
    }

    #[test]
    fn impute_replaces_absent_inputs() {
        let model = Linear::new(LinearParams {
            link: Link::Identity,
            intercepts: vec![1.0],
            weights: vec![vec![1.0, 10.0]],
            impute: vec![0.0, 0.25],
        })
        .unwrap();
        let rows = array![[2.0, f64::NAN]];
        let mut out = Array2::zeros((1, 1));
        model.evaluate(rows.view(), out.view_mut());
        assert_eq!(out[[0, 0]], 1.0 + 2.0 + 2.5);
    }

    #[test]
    fn malformed_params_are_refused_with_the_reason() {
        let err = Linear::new(LinearParams {
            link: Link::Identity,
            intercepts: vec![1.0, 2.0],
            weights: vec![vec![1.0]],
            impute: vec![],
        })
        .unwrap_err();
        assert!(err.contains("1 weight rows for 2 intercepts"), "{err}");
        let err = Linear::new(LinearParams {
            link: Link::Identity,
            intercepts: vec![f64::INFINITY],
            weights: vec![vec![1.0]],
            impute: vec![],
        })
        .unwrap_err();
        assert!(err.contains("non-finite"), "{err}");
    }
}
