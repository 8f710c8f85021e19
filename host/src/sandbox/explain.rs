//! Per-row contributions from a model's `contributions` export
//! (paddock:model 0.2.0), checked before they leave the host: each row's
//! baseline and features' values must add up to the margin the row's
//! scoring computed.
//!
//! What contributions are not: causes. They say how the model arrived at
//! its number, not why the world turned out as it did.

use serde::Serialize;

use super::model::{ScoreError, Usage};
use crate::bindings::explaining;

/// What an output's contributions add up to: its margin, on the scale the
/// model's link maps to the output.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum ContributionScale {
    /// The output itself (no link).
    Output,
    /// Log-odds: the output is `1 / (1 + e^(−scale·margin))`.
    LogOdds,
    /// The output's logarithm: the output is `e^margin`.
    Log,
    /// A class's logit: the outputs are the softmax of the margins.
    ClassLogit,
}

impl From<explaining::MarginLink> for ContributionScale {
    fn from(link: explaining::MarginLink) -> Self {
        match link {
            explaining::MarginLink::Identity => ContributionScale::Output,
            explaining::MarginLink::Logistic => ContributionScale::LogOdds,
            explaining::MarginLink::Exp => ContributionScale::Log,
            explaining::MarginLink::Softmax => ContributionScale::ClassLogit,
        }
    }
}

/// How far a row's baseline plus contributions may be from its margin,
/// as a share of the terms' magnitudes (the baseline's, each
/// contribution's and the margin's, summed): room for a single-precision
/// toolkit's rounding over some thousands of trees; a term left out or
/// counted twice shows unless it is smaller than that.
pub const ADDS_UP_WITHIN: f64 = 1e-4;

/// One row's contributions to one output.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Attribution<'a> {
    /// One value per feature, in contract order.
    pub features: &'a [f64],
    /// The model's expected margin over its training rows.
    pub baseline: f64,
    /// The row's margin: the baseline plus the features' values.
    pub margin: f64,
}

/// The contributions of one call: per row and output, one value per
/// feature, the baseline and the margin.
#[derive(Clone, Debug, PartialEq)]
pub struct Explanation {
    features: usize,
    outputs: usize,
    /// The contract's feature names, in order.
    feature_names: Vec<String>,
    /// The contract's output names, in order.
    output_names: Vec<String>,
    scales: Vec<ContributionScale>,
    /// rows × outputs × (features + 2), row-major.
    values: Vec<f64>,
    usage: Usage,
}

impl Explanation {
    /// Checks a guest's answer for `rows` rows of the contract's features
    /// and outputs.
    pub(crate) fn checked(
        answer: explaining::Contributions,
        rows: usize,
        contract: &crate::contract::Contract,
        usage: Usage,
    ) -> Result<Explanation, ExplainError> {
        let (features, outputs) = (contract.features.len(), contract.outputs.len());
        let width = outputs * (features + 2);
        if answer.values.len() != rows * width || answer.links.len() != outputs {
            return Err(ExplainError::Malformed {
                problem: format!(
                    "{} values and {} links for {rows} rows of {outputs} outputs and {features} features \
                     (expected {} and {outputs})",
                    answer.values.len(),
                    answer.links.len(),
                    rows * width
                ),
            });
        }
        let explanation = Explanation {
            features,
            outputs,
            feature_names: contract.features.iter().map(|f| f.name.clone()).collect(),
            output_names: contract.outputs.iter().map(|o| o.name.clone()).collect(),
            scales: answer.links.into_iter().map(ContributionScale::from).collect(),
            values: answer.values,
            usage,
        };
        for index in 0..rows {
            for output in 0..outputs {
                let a = explanation.of(index, output);
                let sum = a.features.iter().sum::<f64>() + a.baseline;
                let size = a.features.iter().map(|v| v.abs()).sum::<f64>() + a.baseline.abs() + a.margin.abs();
                let bound = ADDS_UP_WITHIN * size;
                if !((sum - a.margin).abs() <= bound) {
                    return Err(ExplainError::DoesNotAddUp {
                        row: index + 1,
                        output: explanation.output_names[output].clone(),
                        sum,
                        margin: a.margin,
                        bound,
                    });
                }
            }
        }
        Ok(explanation)
    }

    /// How many rows were explained.
    pub fn row_count(&self) -> usize {
        self.values.len() / (self.outputs * (self.features + 2)).max(1)
    }

    /// What output `output`'s contributions add up to.
    ///
    /// # Panics
    /// When `output` is not below the contract's output count.
    pub fn scale(&self, output: usize) -> ContributionScale {
        self.scales[output]
    }

    /// Row `index`'s (from 0) contributions to output `output`.
    ///
    /// # Panics
    /// When `index` or `output` is out of range.
    pub fn of(&self, index: usize, output: usize) -> Attribution<'_> {
        let width = self.features + 2;
        let at = (index * self.outputs + output) * width;
        let block = &self.values[at..at + width];
        Attribution {
            features: &block[..self.features],
            baseline: block[self.features],
            margin: block[self.features + 1],
        }
    }

    /// The features' names, in contract order (the order of
    /// [`Attribution::features`]).
    pub fn feature_names(&self) -> &[String] {
        &self.feature_names
    }

    /// The outputs' names, in contract order.
    pub fn output_names(&self) -> &[String] {
        &self.output_names
    }

    /// What the call cost.
    pub fn usage(&self) -> &Usage {
        &self.usage
    }
}

/// Why a call gave no contributions.
#[derive(Debug, Clone, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum ExplainError {
    /// The rows could not go through the model at all: they break the
    /// contract, a limit stopped the call, the model trapped or failed.
    #[error("{0}")]
    Score(ScoreError),
    /// The model's component has no `contributions` export: it was built
    /// against paddock:model 0.1.0, or by hand without it.
    #[error(
        "model `{model}` cannot give contributions: its component has no `contributions` export \
         (built before paddock:model 0.2.0?)"
    )]
    NoExport {
        /// The model's name.
        model: String,
    },
    /// The model cannot explain, and says why (trees without covers, an
    /// estimator that has no contributions).
    #[error("model `{model}` cannot give contributions: {why}")]
    Declined {
        /// The model's name.
        model: String,
        /// What the model said.
        why: String,
    },
    /// The answer does not have the shape the contract gives it: a model fault.
    #[error("the contributions break the contract: {problem}")]
    Malformed {
        /// What is wrong with it.
        problem: String,
    },
    /// A row's baseline and contributions do not add up to its margin
    /// within [`ADDS_UP_WITHIN`]: a model fault.
    #[error(
        "row {row}, output `{output}`: the contributions add up to {sum}, but the margin is {margin} \
         (allowed: {bound:.1e} apart)"
    )]
    DoesNotAddUp {
        /// The row, from 1.
        row: usize,
        /// The output's name.
        output: String,
        /// The baseline plus the features' values.
        sum: f64,
        /// The margin the model computed.
        margin: f64,
        /// How far apart they may be.
        bound: f64,
    },
}

#[cfg(test)]
mod tests {
    use super::*;

    fn answer(values: Vec<f64>) -> explaining::Contributions {
        explaining::Contributions { values, links: vec![explaining::MarginLink::Logistic] }
    }

    fn check(values: Vec<f64>) -> Result<Explanation, ExplainError> {
        // Two rows, two features, one output: per row x₁, x₂, baseline, margin.
        let features = ["x1", "x2"].map(|n| crate::Feature {
            name: n.into(),
            domain: crate::Domain::Real(crate::Bounds { min: None, max: None }),
            unit: None,
            required: true,
            about: String::new(),
        });
        let output = crate::Output {
            name: "risk".into(),
            unit: None,
            bounds: crate::Bounds { min: None, max: None },
            about: String::new(),
        };
        let contract = crate::Contract {
            name: "m".into(),
            version: "1.0.0".into(),
            features: features.to_vec(),
            outputs: vec![output],
            about: String::new(),
        };
        Explanation::checked(answer(values), 2, &contract, Usage::default())
    }

    #[test]
    fn rows_that_add_up_pass_and_read_back() {
        let e = check(vec![0.5, -0.25, 1.0, 1.25, 0.0, 0.0, -2.0, -2.0]).unwrap();
        assert_eq!(e.row_count(), 2);
        assert_eq!(e.scale(0), ContributionScale::LogOdds);
        assert_eq!(e.of(0, 0), Attribution { features: &[0.5, -0.25], baseline: 1.0, margin: 1.25 });
        assert_eq!(e.of(1, 0).margin, -2.0);
    }

    #[test]
    fn a_row_that_does_not_add_up_is_a_model_fault_naming_row_and_output() {
        let err = check(vec![0.5, -0.25, 1.0, 1.25, 0.5, 0.0, -2.0, -2.0]).unwrap_err();
        assert_eq!(
            err.to_string(),
            "row 2, output `risk`: the contributions add up to -1.5, but the margin is -2 (allowed: 4.5e-4 apart)"
        );
        let err = check(vec![f64::NAN, -0.25, 1.0, 1.25, 0.0, 0.0, -2.0, -2.0]).unwrap_err();
        assert!(matches!(err, ExplainError::DoesNotAddUp { row: 1, .. }), "{err}");
    }

    #[test]
    fn an_answer_of_the_wrong_shape_is_refused() {
        let err = check(vec![0.0; 7]).unwrap_err();
        assert_eq!(
            err.to_string(),
            "the contributions break the contract: 7 values and 1 links for 2 rows of 1 outputs and 2 features \
             (expected 8 and 1)"
        );
    }
}
