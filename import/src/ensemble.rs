//! What every tree-ensemble importer shares, so each importer reads only
//! its own file's fields: the checks on a toolkit's parallel node arrays
//! ([`same_lengths`], [`NodeRules`]: one length, a feature in range, a
//! threshold that is a number, a finite leaf), and the assembly of the
//! contract with where each part came from ([`ContractDraft`]) into an
//! [`Imported`].
//!
//! What it is not: a reader. Each toolkit lays its nodes out its own way
//! (XGBoost's child arrays with `-1` leaves, LightGBM's negative leaf ids,
//! ONNX-ML's node-id lists); the importers walk them with
//! [`crate::flatten`] and call these rules on each node.

use paddock_guest::{Branch, Contract, Feature, Node, Output};

use crate::{Blame, EstimatorParams, ImportError, Imported, Origin, Provenance};

/// Checks that parallel arrays have the length of the first, naming the
/// first that does not (`PATH.KEY: 3 entries but left_children has 2`).
///
/// # Errors
/// [`ImportError::Malformed`] at `path.key` of the first array of another length.
pub(crate) fn same_lengths(
    blame: &Blame<'_>,
    path: &str,
    (first, n): (&str, usize),
    rest: &[(&str, usize)],
) -> Result<usize, ImportError> {
    for &(key, len) in rest {
        if len != n {
            return Err(blame.malformed(&format!("{path}.{key}"), format!("{len} entries but {first} has {n}")));
        }
    }
    Ok(n)
}

/// The rules every node of an imported tree meets, with the errors that
/// name the tree and node (`tree 3 node 7`).
pub(crate) struct NodeRules<'a> {
    /// Names the file.
    pub blame: &'a Blame<'a>,
    /// The number of features a split may test.
    pub features: usize,
}

impl NodeRules<'_> {
    /// A leaf adding `value`, which must be finite.
    pub fn leaf(&self, place: &str, value: f64) -> Result<Node, ImportError> {
        if !value.is_finite() {
            return Err(self.blame.malformed(place, format!("leaf value {value}")));
        }
        Ok(Node::Leaf { value })
    }

    /// A feature index, which must name one of the model's features.
    pub fn feature(&self, place: &str, feature: i64) -> Result<u32, ImportError> {
        u32::try_from(feature).ok().filter(|&f| (f as usize) < self.features).ok_or_else(|| {
            self.blame
                .malformed(place, format!("split on feature {feature} but the model has {} features", self.features))
        })
    }

    /// A threshold, which must be a number.
    pub fn threshold(&self, place: &str, threshold: f64) -> Result<f64, ImportError> {
        if threshold.is_nan() {
            return Err(self.blame.malformed(place, "threshold is NaN"));
        }
        Ok(threshold)
    }

    /// An ordered split (`Node::Split`): feature and threshold checked, children as the file's ids.
    pub fn split(
        &self,
        place: &str,
        (feature, threshold): (i64, f64),
        (left, right): (u32, u32),
        missing: Branch,
    ) -> Result<Node, ImportError> {
        let feature = self.feature(place, feature)?;
        let threshold = self.threshold(place, threshold)?;
        Ok(Node::Split { feature, threshold, left, right, missing })
    }
}

/// An imported model's contract as the importer reads it, each part with
/// where it came from.
#[derive(Default)]
pub(crate) struct ContractDraft {
    features: Vec<Feature>,
    outputs: Vec<Output>,
    provenance: Vec<Provenance>,
}

impl ContractDraft {
    /// Adds a feature, and where it came from.
    pub fn feature(&mut self, feature: Feature, from: String) {
        self.provenance.push(Provenance { part: format!("feature {}", feature.name), from });
        self.features.push(feature);
    }

    /// Adds an output, and where it came from.
    pub fn output(&mut self, output: Output, from: String) {
        self.provenance.push(Provenance { part: format!("output {}", output.name), from });
        self.outputs.push(output);
    }

    /// The import: this contract (its name and version left for the
    /// overrides), the estimator's params, and `origin` with its contract
    /// list replaced by this contract's provenance.
    pub fn finish(self, estimator: EstimatorParams, origin: Origin) -> Imported {
        Imported {
            contract: Contract {
                name: String::new(),
                version: String::new(),
                about: String::new(),
                features: self.features,
                outputs: self.outputs,
            },
            estimator,
            origin: Origin { contract: self.provenance, ..origin },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use paddock_guest::Bounds;

    #[test]
    fn node_rules_name_the_place_and_what_is_wrong() {
        let blame = Blame { file: "m.json" };
        let rules = NodeRules { blame: &blame, features: 3 };
        assert_eq!(rules.leaf("tree 0 node 1", 0.5).unwrap(), Node::Leaf { value: 0.5 });
        let e = rules.leaf("tree 0 node 1", f64::INFINITY).unwrap_err();
        assert_eq!(e.to_string(), "m.json: tree 0 node 1: leaf value inf");
        let e = rules.split("tree 2 node 0", (3, 1.0), (1, 2), Branch::Left).unwrap_err();
        assert_eq!(e.to_string(), "m.json: tree 2 node 0: split on feature 3 but the model has 3 features");
        let e = rules.split("tree 2 node 0", (-1, 1.0), (1, 2), Branch::Left).unwrap_err();
        assert!(e.to_string().contains("split on feature -1"), "{e}");
        let e = rules.split("tree 2 node 0", (0, f64::NAN), (1, 2), Branch::Left).unwrap_err();
        assert_eq!(e.to_string(), "m.json: tree 2 node 0: threshold is NaN");
        let e = same_lengths(&blame, "trees[0]", ("left_children", 2), &[("right_children", 2), ("split_indices", 3)])
            .unwrap_err();
        assert_eq!(e.to_string(), "m.json: trees[0].split_indices: 3 entries but left_children has 2");
    }

    #[test]
    fn the_draft_keeps_each_part_beside_where_it_came_from() {
        let mut draft = ContractDraft::default();
        draft.feature(Feature::real("f0", Bounds::OPEN), "by position".into());
        draft.output(Output::new("value", Bounds::OPEN), "the objective".into());
        let origin = Origin {
            format: "f".into(),
            file: "m".into(),
            toolkit: "t".into(),
            task: "k".into(),
            arithmetic: "a".into(),
            estimator: "e".into(),
            contract: Vec::new(),
        };
        let params = EstimatorParams::Linear(paddock_guest::LinearParams {
            link: paddock_guest::Link::Identity,
            intercepts: vec![0.0],
            weights: vec![vec![1.0]],
            impute: Vec::new(),
        });
        let imported = draft.finish(params, origin);
        assert_eq!(imported.contract.features[0].name, "f0");
        let parts: Vec<&str> = imported.origin.contract.iter().map(|p| p.part.as_str()).collect();
        assert_eq!(parts, ["feature f0", "output value"]);
    }
}
