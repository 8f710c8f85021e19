//! Running an artifact's checks against a loaded model: every case's row
//! through the contract and the sandbox, every output against its recorded
//! value and the tolerance. The checks format is [`crate::artifact::checks`].

use serde::Serialize;

use crate::artifact::checks::{Checks, Tolerance};
use crate::sandbox::model::{Model, ScoreError};

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
                    failed.get_or_insert(CaseFailure::Mismatch {
                        output: name.clone(),
                        expected,
                        actual,
                        abs_error,
                        rel_error,
                    });
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
