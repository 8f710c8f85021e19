//! Packing an artifact that is written only once it loads and passes the
//! checks it carries ([`pack_verified`]). Loading runs the checks
//! ([`Model::load_with`]); their format and report are
//! [`crate::artifact::checks`].

use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::artifact::checks::CheckReport;
use crate::artifact::{Artifact, ArtifactError, Parts, pack_imported};
use crate::sandbox::Runtime;
use crate::sandbox::model::{LoadError, Model, ModelOptions, ScoreError};

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
    #[error("{} was not written: the packed artifact does not load: {cause}", path.display())]
    Load {
        /// Where it was to be written.
        path: PathBuf,
        /// Why it does not load.
        cause: LoadError,
    },
    /// Its checks could not be scored at all (a trap or a limit hit).
    #[error("{} was not written: {cause}", path.display())]
    Score {
        /// Where it was to be written.
        path: PathBuf,
        /// What the model did.
        cause: ScoreError,
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
    #[error("writing {}: {cause}", path.display())]
    Write {
        /// The file.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
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
    let bytes = pack_imported(parts).map_err(PackError::Pack)?;
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
        let options = ModelOptions { skip_carried_checks: false, ..options };
        let model = Model::load_with(runtime, artifact.clone(), options).map_err(|source| match source {
            LoadError::ChecksDidNotRun(cause) => PackError::Score { path: path(), cause },
            LoadError::ChecksFailed { report } => PackError::ChecksFail { path: path(), report },
            cause => PackError::Load { path: path(), cause },
        })?;
        packed.model = Some(format!("{} {}", model.contract().name, model.contract().version));
        packed.checks = model.carried_checks().cloned();
    }
    if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir).map_err(|cause| PackError::Write { path: dir.to_owned(), cause })?;
    }
    crate::atomic_file::write_readable(out, artifact.bytes())
        .map_err(|cause| PackError::Write { path: path(), cause })?;
    Ok(packed)
}
