//! A training profile: how the training rows' features and the training
//! predictions were spread, which an artifact carries so live inputs can be
//! compared with them. Written by the notebook helper (`paddock_handoff`),
//! carried by `paddock pack --profile`, checked against the contract at
//! every load.
//!
//! Per feature or output, fixed bins: the deciles of the training values
//! as edges for a number (bin `i` holds the values above edge `i − 1` and
//! at most edge `i`; the first bin everything up to the first edge, the
//! last everything above the last), or one bin per label and one for
//! labels never seen in training; then one bin for missing values. Each
//! bin's share of the training rows, and for numbers their least, greatest,
//! mean and standard deviation.
//!
//! This module is the format, its checks and the binning; comparing live
//! values with it is [`crate::drift`].

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::contract::{Contract, Domain};

/// How far a field's shares may sum from 1 (they are written rounded).
pub const SHARES_SUM_WITHIN: f64 = 1e-6;

/// Why a profile is refused.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ProfileError {
    /// The JSON does not parse into a profile.
    #[error("the profile does not parse: {0}")]
    Json(serde_json::Error),
    /// A field of the profile does not fit the contract or is malformed.
    #[error("the profile's {kind} `{name}`: {problem}")]
    Field {
        /// `feature` or `output`.
        kind: &'static str,
        /// Its name.
        name: String,
        /// What is wrong.
        problem: String,
    },
}

/// The bins of one feature or output.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Bins {
    /// A number's bin edges, strictly increasing and finite.
    Edges(Vec<f64>),
    /// A label's bins: one per label, then one for labels never seen.
    Labels(Vec<String>),
}

/// The profile of one feature or output.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FieldProfile {
    /// Its bins.
    #[serde(flatten)]
    pub bins: Bins,
    /// Each bin's share of the training rows, then the missing values'
    /// share; they sum to 1.
    pub shares: Vec<f64>,
    /// Summary of the values present (numbers only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub summary: Option<Summary>,
}

/// The values present of a number, summarised.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    /// The least.
    pub min: f64,
    /// The greatest.
    pub max: f64,
    /// The mean.
    pub mean: f64,
    /// The standard deviation (population).
    pub sd: f64,
}

/// A training profile (see the module docs).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Profile {
    /// Where it came from: the tool, the rows, the versions.
    pub source: String,
    /// How many training rows it summarises.
    pub rows: u64,
    /// Per feature, by contract name.
    pub features: BTreeMap<String, FieldProfile>,
    /// Per output, over the training predictions.
    #[serde(default)]
    pub outputs: BTreeMap<String, FieldProfile>,
}

impl Profile {
    /// Parses a profile (JSON).
    ///
    /// # Errors
    /// [`ProfileError::Json`] when it does not parse.
    pub fn from_json(bytes: &[u8]) -> Result<Profile, ProfileError> {
        serde_json::from_slice(bytes).map_err(ProfileError::Json)
    }

    /// The profile as JSON.
    pub fn to_json(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a profile serializes")
    }

    /// Checks the profile against the model's contract: every field it
    /// profiles is one of the contract's, binned as its kind is (labels for
    /// a label, edges for the rest), edges finite and strictly increasing,
    /// one share per bin, each in [0, 1], summing to 1. A contract field
    /// the profile leaves out is not an error: its drift is unavailable.
    ///
    /// # Errors
    /// [`ProfileError::Field`] for the first field that does not fit.
    pub fn check(&self, contract: &Contract) -> Result<(), ProfileError> {
        for (name, field) in &self.features {
            let feature = contract.features.iter().find(|f| &f.name == name);
            let fail = |problem: String| ProfileError::Field { kind: "feature", name: name.clone(), problem };
            let feature = feature.ok_or_else(|| fail("the contract has no such feature".into()))?;
            let labelled = matches!(feature.domain, Domain::Label(_));
            match (&field.bins, labelled) {
                (Bins::Labels(_), false) => return Err(fail("labels for a feature that is not a label".into())),
                (Bins::Edges(_), true) => return Err(fail("edges for a label feature (it needs labels)".into())),
                _ => {}
            }
            field.check().map_err(fail)?;
        }
        for (name, field) in &self.outputs {
            let fail = |problem: String| ProfileError::Field { kind: "output", name: name.clone(), problem };
            if !contract.outputs.iter().any(|o| &o.name == name) {
                return Err(fail("the contract has no such output".into()));
            }
            if matches!(field.bins, Bins::Labels(_)) {
                return Err(fail("labels for an output (outputs are numbers)".into()));
            }
            field.check().map_err(fail)?;
        }
        Ok(())
    }

    /// The profile with features and outputs renamed (`from → to`), as
    /// pack's overrides rename the contract.
    #[must_use]
    pub fn renamed(mut self, features: &[(&str, &str)], outputs: &[(&str, &str)]) -> Profile {
        // Each name looked up once, so swapped names (`a`→`b`, `b`→`a`) do not collide.
        let rename = |map: BTreeMap<String, FieldProfile>, pairs: &[(&str, &str)]| {
            map.into_iter()
                .map(|(k, v)| (pairs.iter().find(|(from, _)| *from == k).map_or(k, |(_, to)| (*to).to_owned()), v))
                .collect()
        };
        self.features = rename(self.features, features);
        self.outputs = rename(self.outputs, outputs);
        self
    }
}

/// Number of the deciles a number's edges are made of.
const DECILES: usize = 9;

impl Profile {
    /// The profile of training rows as the contract encodes them — `cells`
    /// (`rows` × features: numbers, a label as its index in the contract's
    /// list, absent as NaN) — and of the model's answers to them, `values`
    /// (`rows` × outputs; a label index the contract does not have counts
    /// as missing), the way the notebook helper makes one: a
    /// number's edges are the deciles of its values present (NumPy's
    /// default, linear, quantiles; repeated edges dropped), a label feature
    /// gets a bin per label the rows use. `source` says where the rows came
    /// from.
    ///
    /// # Panics
    /// When `cells` or `values` is not `rows` times the contract's width.
    pub fn of_rows(source: &str, contract: &Contract, rows: usize, cells: &[f64], values: &[f64]) -> Profile {
        let (features, outputs) = (contract.features.len(), contract.outputs.len());
        assert_eq!((cells.len(), values.len()), (rows * features, rows * outputs), "rows × the contract's width");
        fn column(data: &[f64], width: usize, j: usize) -> impl Iterator<Item = f64> + '_ {
            data.iter().skip(j).step_by(width.max(1)).copied()
        }
        let features = contract
            .features
            .iter()
            .enumerate()
            .map(|(j, f)| {
                let profile = match &f.domain {
                    Domain::Label(labels) => FieldProfile::of_labels(
                        column(cells, features, j)
                            .map(|v| labels.get(v as usize).filter(|_| v >= 0.0).map(String::as_str)),
                    ),
                    _ => FieldProfile::of_numbers(column(cells, features, j)),
                };
                (f.name.clone(), profile)
            })
            .collect();
        let outputs = contract
            .outputs
            .iter()
            .enumerate()
            .map(|(k, o)| (o.name.clone(), FieldProfile::of_numbers(column(values, outputs, k))))
            .collect();
        Profile { source: source.to_owned(), rows: rows as u64, features, outputs }
    }
}

impl FieldProfile {
    /// A number's profile from its training values (NaN: missing).
    pub fn of_numbers(values: impl Iterator<Item = f64>) -> FieldProfile {
        let mut total = 0usize;
        let mut present: Vec<f64> = values.inspect(|_| total += 1).filter(|v| !v.is_nan()).collect();
        present.sort_by(f64::total_cmp);
        let mut edges: Vec<f64> = (1..=DECILES).filter_map(|q| quantile(&present, q as f64 / 10.0)).collect();
        edges.dedup();
        let mut shares = vec![0.0; edges.len() + 2];
        for v in &present {
            shares[edges.partition_point(|e| e < v)] += 1.0;
        }
        shares[edges.len() + 1] = (total - present.len()) as f64;
        shares.iter_mut().for_each(|s| *s /= total.max(1) as f64);
        let summary = (!present.is_empty()).then(|| {
            let n = present.len() as f64;
            let mean = present.iter().sum::<f64>() / n;
            let sd = (present.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n).sqrt();
            Summary { min: present[0], max: present[present.len() - 1], mean, sd }
        });
        FieldProfile { bins: Bins::Edges(edges), shares, summary }
    }

    /// A label's profile from its training values (`None`: missing): a bin
    /// per label seen, in sorted order, the unseen-label bin (share 0) and
    /// the missing bin.
    pub fn of_labels<'a>(values: impl Iterator<Item = Option<&'a str>>) -> FieldProfile {
        let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
        let (mut total, mut missing) = (0usize, 0usize);
        for v in values {
            total += 1;
            match v {
                Some(label) => *counts.entry(label).or_default() += 1,
                None => missing += 1,
            }
        }
        let share = |n: usize| n as f64 / total.max(1) as f64;
        let shares = counts.values().map(|&n| share(n)).chain([0.0, share(missing)]).collect();
        FieldProfile { bins: Bins::Labels(counts.keys().map(|l| (*l).to_owned()).collect()), shares, summary: None }
    }

    /// Bins for values: the value bins, the unseen-label bin for labels,
    /// and the missing bin.
    pub fn bin_count(&self) -> usize {
        match &self.bins {
            Bins::Edges(e) => e.len() + 2,
            Bins::Labels(l) => l.len() + 2,
        }
    }

    /// The bin of the missing values.
    pub fn missing_bin(&self) -> usize {
        self.bin_count() - 1
    }

    /// The missing values' share of the training rows.
    pub fn missing_share(&self) -> f64 {
        self.shares[self.missing_bin()]
    }

    /// The bin of a number (NaN: missing). For a label feature, `value` is
    /// the label's index in the contract's list, which
    /// [`Profile::check`] does not tie to the profile's labels: use
    /// [`FieldProfile::bin_of_label`] for labels.
    pub fn bin_of(&self, value: f64) -> usize {
        if value.is_nan() {
            return self.missing_bin();
        }
        match &self.bins {
            // The edges below the value: values at an edge go to the bin it closes.
            Bins::Edges(edges) => edges.partition_point(|e| *e < value),
            Bins::Labels(labels) => labels.len(),
        }
    }

    /// The bin of a label (`None`: missing); a label never seen in
    /// training goes to its own bin.
    pub fn bin_of_label(&self, label: Option<&str>) -> usize {
        let Some(label) = label else { return self.missing_bin() };
        match &self.bins {
            Bins::Labels(labels) => labels.iter().position(|l| l == label).unwrap_or(labels.len()),
            Bins::Edges(_) => self.missing_bin(),
        }
    }

    fn check(&self) -> Result<(), String> {
        if let Bins::Edges(edges) = &self.bins {
            if let Some(e) = edges.iter().find(|e| !e.is_finite()) {
                return Err(format!("edge {e} is not a finite number"));
            }
            if let Some(w) = edges.windows(2).position(|w| w[0] >= w[1]) {
                return Err(format!(
                    "edges are not increasing: edge {} ({}) is not below edge {} ({})",
                    w + 1,
                    edges[w],
                    w + 2,
                    edges[w + 1]
                ));
            }
        }
        if self.shares.len() != self.bin_count() {
            return Err(format!(
                "{} shares for {} bins (each value bin{}, then missing)",
                self.shares.len(),
                self.bin_count(),
                if matches!(self.bins, Bins::Labels(_)) { ", labels never seen" } else { "" }
            ));
        }
        if let Some((i, s)) = self.shares.iter().enumerate().find(|(_, s)| !(0.0..=1.0).contains(*s)) {
            return Err(format!("share {} of bin {} is not between 0 and 1", s, i + 1));
        }
        let sum: f64 = self.shares.iter().sum();
        if (sum - 1.0).abs() > SHARES_SUM_WITHIN {
            return Err(format!("shares sum to {sum}, not 1 (within {SHARES_SUM_WITHIN:e})"));
        }
        Ok(())
    }
}

/// The `q` quantile (0 to 1) of values sorted in increasing order, as
/// NumPy's default (`linear`) method computes it: at virtual index
/// q·(n − 1), between its neighbours, the difference weighted from the
/// nearer end as `numpy.lib._function_base_impl._lerp` does. `None` for no
/// values.
pub fn quantile(sorted: &[f64], q: f64) -> Option<f64> {
    let last = sorted.len().checked_sub(1)?;
    let at = q * last as f64;
    let below = (at.floor() as usize).min(last);
    let above = (below + 1).min(last);
    let (a, b, t) = (sorted[below], sorted[above], at - below as f64);
    let step = b - a;
    Some(if t >= 0.5 { b - step * (1.0 - t) } else { a + step * t })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn numbers(edges: Vec<f64>, shares: Vec<f64>) -> FieldProfile {
        FieldProfile { bins: Bins::Edges(edges), shares, summary: None }
    }

    #[test]
    fn values_at_an_edge_go_to_the_bin_it_closes() {
        let f = numbers(vec![1.0, 2.0], vec![0.25, 0.25, 0.25, 0.25]);
        assert_eq!([0.5, 1.0, 1.5, 2.0, 2.5, f64::NAN].map(|v| f.bin_of(v)), [0, 0, 1, 1, 2, 3]);
        let l = FieldProfile {
            bins: Bins::Labels(vec!["a".into(), "b".into()]),
            shares: vec![0.5, 0.5, 0.0, 0.0],
            summary: None,
        };
        assert_eq!([Some("b"), Some("new"), None].map(|v| l.bin_of_label(v)), [1, 2, 3]);
    }

    #[test]
    fn a_labels_profile_has_a_bin_per_label_seen() {
        let f = FieldProfile::of_labels([Some("b"), Some("a"), None, Some("b")].into_iter());
        assert_eq!(f.bins, Bins::Labels(vec!["a".into(), "b".into()]));
        assert_eq!(f.shares, [0.25, 0.5, 0.0, 0.25]);
        assert_eq!(f.check(), Ok(()));
    }

    #[test]
    fn malformed_fields_are_named() {
        assert_eq!(
            numbers(vec![1.0, 1.0], vec![0.5, 0.5, 0.0, 0.0]).check().unwrap_err(),
            "edges are not increasing: edge 1 (1) is not below edge 2 (1)"
        );
        assert_eq!(
            numbers(vec![1.0], vec![0.5, 0.4, 0.0]).check().unwrap_err(),
            "shares sum to 0.9, not 1 (within 1e-6)"
        );
        assert_eq!(
            numbers(vec![1.0], vec![0.5, 0.5]).check().unwrap_err(),
            "2 shares for 3 bins (each value bin, then missing)"
        );
    }
}
