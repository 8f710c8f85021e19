//! Checks: example rows with the outputs recorded where the model was
//! trained, and a tolerance. An artifact carries them so anyone can prove
//! the deployed file computes what the training code computed.
//!
//! This module is the format and the report; running checks against a
//! loaded model is [`Model::run_checks`](crate::sandbox::model::Model::run_checks),
//! which every load does unless told to skip them.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::contract::rows::Row;

/// Why a checks section or file is refused.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ChecksError {
    /// The JSON does not parse into checks.
    #[error("checks do not parse: {0}")]
    Json(serde_json::Error),
    /// The tolerance is negative, NaN or infinite.
    #[error("checks do not parse: tolerance must be finite and ≥ 0, got abs {abs} rel {rel}")]
    Tolerance {
        /// The absolute part given.
        abs: f64,
        /// The relative part given.
        rel: f64,
    },
}

/// How far an output may be from its recorded value: it passes when
/// `|actual − expected| ≤ abs + rel × |expected|` (the usual combined
/// absolute/relative test, as in numpy's `isclose`).
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Tolerance {
    /// Absolute part.
    pub abs: f64,
    /// Relative part.
    pub rel: f64,
}

/// One example: a request row and the outputs recorded for it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Case {
    /// The row, as a caller would send it.
    pub row: Row,
    /// Output name → recorded value.
    pub expect: BTreeMap<String, f64>,
}

/// A set of checks, stored as JSON in the artifact's `paddock-checks`
/// section or in a file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Checks {
    /// Where and how the expected values were recorded.
    #[serde(default)]
    pub source: String,
    /// The tolerance every case is held to.
    pub tolerance: Tolerance,
    /// The cases.
    pub cases: Vec<Case>,
}

impl Checks {
    /// The same checks with features and outputs renamed (`(from, to)`
    /// pairs): for checks recorded with a model file's names when the
    /// contract renames them.
    pub fn renamed(mut self, features: &[(&str, &str)], outputs: &[(&str, &str)]) -> Checks {
        // Two steps, so that swapped names (`a`→`b`, `b`→`a`) do not collide.
        let hold = |i: usize| format!("\u{0}renaming {i}");
        for case in &mut self.cases {
            for (i, (from, _)) in features.iter().enumerate() {
                case.row.rename(from, &hold(i));
            }
            for (i, (_, to)) in features.iter().enumerate() {
                case.row.rename(&hold(i), to);
            }
            let mut taken: Vec<(usize, f64)> = Vec::new();
            for (i, (from, _)) in outputs.iter().enumerate() {
                if let Some(v) = case.expect.remove(*from) {
                    taken.push((i, v));
                }
            }
            for (i, v) in taken {
                case.expect.insert(outputs[i].1.to_owned(), v);
            }
        }
        self
    }

    /// Parses checks from JSON.
    ///
    /// # Errors
    /// [`ChecksError::Json`] with the parser's message (line and column);
    /// [`ChecksError::Tolerance`] for a tolerance that is not finite and ≥ 0.
    pub fn from_json(bytes: &[u8]) -> Result<Checks, ChecksError> {
        let checks: Checks = serde_json::from_slice(bytes).map_err(ChecksError::Json)?;
        let t = checks.tolerance;
        if !(t.abs >= 0.0 && t.rel >= 0.0 && t.abs.is_finite() && t.rel.is_finite()) {
            return Err(ChecksError::Tolerance { abs: t.abs, rel: t.rel });
        }
        Ok(checks)
    }

    /// The checks as JSON.
    pub fn to_json(&self) -> Vec<u8> {
        serde_json::to_vec_pretty(self).unwrap_or_else(|e| panic!("checks serialize: {e}"))
    }
}

/// Why one case failed.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum CaseFailure {
    /// The row breaks the contract.
    InvalidRow {
        /// The row error.
        error: String,
    },
    /// The case expects an output the contract does not have.
    UnknownOutput {
        /// The name.
        output: String,
    },
    /// An output outside the tolerance.
    Mismatch {
        /// Output name.
        output: String,
        /// Recorded value.
        expected: f64,
        /// What the model gave.
        actual: f64,
        /// Absolute error.
        abs_error: f64,
        /// Relative error.
        rel_error: f64,
    },
}

impl std::fmt::Display for CaseFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            CaseFailure::InvalidRow { error } => write!(f, "invalid row: {error}"),
            CaseFailure::UnknownOutput { output } => write!(f, "no output named `{output}`"),
            CaseFailure::Mismatch { output, expected, actual, abs_error, .. } => {
                write!(f, "{output} = {actual}, expected {expected} (off by {abs_error:e})")
            }
        }
    }
}

/// The outcome of running checks.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct CheckReport {
    /// Cases run.
    pub cases: usize,
    /// Cases that passed.
    pub passed: usize,
    /// Largest absolute error over every compared output.
    pub max_abs_error: f64,
    /// Largest relative error over every compared output.
    pub max_rel_error: f64,
    /// The tolerance used.
    pub tolerance: Tolerance,
    /// Failed cases: (case position, why).
    pub failures: Vec<(usize, CaseFailure)>,
}

impl CheckReport {
    /// Whether every case passed.
    pub fn ok(&self) -> bool {
        self.failures.is_empty() && self.passed == self.cases
    }
}
