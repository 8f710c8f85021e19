//! Running an artifact's checks against a loaded model: every case's row
//! through the contract and the sandbox, every output against its recorded
//! value and the tolerance ([`run`]); and packing an artifact that is
//! written only once it loads and passes its checks ([`pack_verified`]).
//! The checks format is [`crate::artifact::checks`].

use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::artifact::checks::{Checks, Tolerance};
use crate::artifact::{Artifact, ArtifactError, pack_imported};
use crate::sandbox::Runtime;
use crate::sandbox::model::{LoadError, Model, ModelOptions, ScoreError};

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

/// What goes into an artifact (see [`pack_imported`]).
#[derive(Clone, Copy, Debug, Default)]
pub struct Parts<'a> {
    /// A component, a core module built for `wasm32-unknown-unknown`, or WebAssembly text.
    pub wasm: &'a [u8],
    /// The parameter blob the model decodes in `init`.
    pub params: Option<&'a [u8]>,
    /// The checks it carries.
    pub checks: Option<&'a Checks>,
    /// An importer's record of where the model came from.
    pub origin: Option<&'a serde_json::Map<String, serde_json::Value>>,
}

/// What [`pack_verified`] wrote and found.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Packed {
    /// Where the artifact was written.
    pub artifact: PathBuf,
    /// Its digest (`sha256:…`).
    pub digest: String,
    /// Its size in bytes.
    pub bytes: usize,
    /// The model's name and version, when it was loaded.
    pub model: Option<String>,
    /// Its checks' report, when it carries checks and was loaded.
    pub checks: Option<CheckReport>,
}

/// Why [`pack_verified`] wrote nothing.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PackError {
    /// The parts do not make an artifact.
    #[error(transparent)]
    Pack(ArtifactError),
    /// The packed artifact does not load.
    #[error("{} was not written: the packed artifact does not load: {source}", path.display())]
    Load {
        /// Where it was to be written.
        path: PathBuf,
        /// Why it does not load.
        source: LoadError,
    },
    /// Its checks could not be scored at all (a trap or a limit hit).
    #[error("{} was not written: {source}", path.display())]
    Score {
        /// Where it was to be written.
        path: PathBuf,
        /// What the model did.
        source: ScoreError,
    },
    /// Some of its checks fail.
    #[error("{} was not written: {} of {} checks fail{}", path.display(), .report.cases - .report.passed, .report.cases,
        .report.failures.first().map(|(i, f)| format!("; first: case {i}: {f}")).unwrap_or_default())]
    ChecksFail {
        /// Where it was to be written.
        path: PathBuf,
        /// The report.
        report: Box<CheckReport>,
    },
    /// The file could not be written.
    #[error("writing {}: {source}", path.display())]
    Write {
        /// The file.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
}

/// Packs `parts` into an artifact and, unless `verify` is `None`, loads it
/// with that runtime and those options and runs the checks it carries;
/// only then writes it to `out` (atomically, creating `out`'s directory).
/// A broken artifact is never left where it could be signed or served.
///
/// # Errors
/// [`PackError::Pack`] when the parts do not make an artifact,
/// [`PackError::Load`] when it does not load, [`PackError::Score`] /
/// [`PackError::ChecksFail`] when its checks cannot run or fail,
/// [`PackError::Write`] when the file cannot be written. Nothing is written
/// in any of these cases.
pub fn pack_verified(
    out: &Path,
    parts: Parts<'_>,
    verify: Option<(&Runtime, ModelOptions)>,
) -> Result<Packed, PackError> {
    let bytes = pack_imported(parts.wasm, parts.params, parts.checks, parts.origin).map_err(PackError::Pack)?;
    let artifact = Artifact::from_bytes(bytes, u64::MAX).map_err(PackError::Pack)?;
    let mut packed = Packed {
        artifact: out.to_owned(),
        digest: artifact.digest().to_string(),
        bytes: artifact.bytes().len(),
        model: None,
        checks: None,
    };
    let path = || out.to_owned();
    if let Some((runtime, options)) = verify {
        let model = Model::load_with(runtime, artifact.clone(), options)
            .map_err(|source| PackError::Load { path: path(), source })?;
        packed.model = Some(format!("{} {}", model.contract().name, model.contract().version));
        if let Some(checks) = parts.checks {
            let report = run(&model, checks).map_err(|source| PackError::Score { path: path(), source })?;
            if !report.ok() {
                return Err(PackError::ChecksFail { path: path(), report: Box::new(report) });
            }
            packed.checks = Some(report);
        }
    }
    if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir).map_err(|source| PackError::Write { path: dir.to_owned(), source })?;
    }
    crate::atomic_file::write_readable(out, artifact.bytes())
        .map_err(|source| PackError::Write { path: path(), source })?;
    Ok(packed)
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
