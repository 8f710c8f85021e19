//! Checks: example rows with the outputs recorded where the model was
//! trained, and a tolerance. An artifact carries them so anyone can prove
//! the deployed file computes what the training code computed.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::artifact::ArtifactError;
use crate::model::{Model, ScoreError};
use crate::rows::Row;

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
    /// Parses checks from JSON.
    ///
    /// # Errors
    /// [`ArtifactError::Checks`] with the parser's message (line and column).
    pub fn from_json(bytes: &[u8]) -> Result<Checks, ArtifactError> {
        let checks: Checks = serde_json::from_slice(bytes).map_err(|e| ArtifactError::Checks(e.to_string()))?;
        let t = checks.tolerance;
        if !(t.abs >= 0.0 && t.rel >= 0.0 && t.abs.is_finite() && t.rel.is_finite()) {
            return Err(ArtifactError::Checks(format!("tolerance must be finite and ≥ 0, got abs {} rel {}", t.abs, t.rel)));
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

/// Runs checks against a model.
///
/// # Errors
/// [`ScoreError`] when the model fails to score the valid rows at all (a
/// trap or limit hit); invalid rows and mismatches are reported in the
/// [`CheckReport`], not as errors.
pub fn run(model: &Model, checks: &Checks) -> Result<CheckReport, ScoreError> {
    let schema = model.schema();
    let mut report = CheckReport {
        cases: checks.cases.len(),
        passed: 0,
        max_abs_error: 0.0,
        max_rel_error: 0.0,
        tolerance: checks.tolerance,
        failures: Vec::new(),
    };
    let mut cells = Vec::new();
    let mut scored = Vec::new();
    for (i, case) in checks.cases.iter().enumerate() {
        match schema.encode_row(i + 1, &case.row, &mut cells) {
            Ok(()) => scored.push(i),
            Err(e) => {
                let error = e.iter().map(ToString::to_string).collect::<Vec<_>>().join("; ");
                report.failures.push((i, CaseFailure::InvalidRow { error }));
            }
        }
    }
    let chunk = model.options().limits.rows_per_call.max(1);
    let width = schema.width();
    let outputs = &model.contract().outputs;
    for (batch, positions) in scored.chunks(chunk).enumerate() {
        let start = batch * chunk * width;
        let estimates = model.score_cells(positions.len(), &cells[start..start + positions.len() * width])?;
        for (r, &case_index) in positions.iter().enumerate() {
            let case = &checks.cases[case_index];
            let mut failed = None;
            for (name, &expected) in &case.expect {
                let Some(k) = outputs.iter().position(|o| &o.name == name) else {
                    failed.get_or_insert(CaseFailure::UnknownOutput { output: name.clone() });
                    continue;
                };
                let actual = estimates.row(r)[k];
                let abs_error = (actual - expected).abs();
                let rel_error = if expected == 0.0 { abs_error } else { abs_error / expected.abs() };
                report.max_abs_error = report.max_abs_error.max(abs_error);
                report.max_rel_error = report.max_rel_error.max(rel_error);
                let t = checks.tolerance;
                if !(abs_error <= t.abs + t.rel * expected.abs()) {
                    failed.get_or_insert(CaseFailure::Mismatch { output: name.clone(), expected, actual, abs_error, rel_error });
                }
            }
            match failed {
                None => report.passed += 1,
                Some(f) => report.failures.push((case_index, f)),
            }
        }
    }
    report.failures.sort_by_key(|(i, _)| *i);
    Ok(report)
}
