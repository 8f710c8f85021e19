//! The gate every new or changed artifact passes before any route may
//! point to it: trust (vouch / pin) → parse → compile, start and read its
//! contract → its name and version match its place → its checks pass.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use semver::Version;
use sha2::{Digest as _, Sha256};

use super::status::{GateStep, Refusal};
use super::{Shared, layout, ledger};
use crate::artifact::Artifact;
use crate::checking::{self, CheckReport};
use crate::digest::Digest;
use crate::model::Model;
use crate::trust::{Admission, Vouch};

/// A fingerprint of an artifact's bytes and its vouch: unchanged files are
/// not gated again.
pub(super) type Fingerprint = [u8; 32];

/// A version that passed the gate.
pub(crate) struct Loaded {
    pub model: Model,
    pub outputs: Arc<[String]>,
    pub rel: PathBuf,
    pub admission: Admission,
    pub checks: Option<CheckReport>,
    pub ledger: Arc<ledger::VersionLedger>,
}

/// The gate: trust → parse → compile, start, contract → identity → checks.
pub(super) fn gate(shared: &Shared, f: &layout::Found, model: &str, version: &Version, bytes: Vec<u8>, vouch: Option<&[u8]>) -> Result<Loaded, Refusal> {
    let refuse = |stage, reason: String| Refusal { stage, reason };
    let digest = Digest::of(&bytes);
    let vouch = vouch.map(Vouch::from_bytes).transpose().map_err(|e| refuse(GateStep::Trust, format!("its .vouch file: {e}")))?;
    let admission = shared.options.trust.admit(digest, vouch.as_ref()).map_err(|e| refuse(GateStep::Trust, e.to_string()))?;
    let limit = shared.options.model.limits.artifact_bytes;
    let artifact = Artifact::from_bytes(bytes, limit).map_err(|e| refuse(GateStep::Parse, e.to_string()))?;
    let checks = artifact.checks().map_err(|e| refuse(GateStep::Parse, e.to_string()))?;
    let options = shared.options.model.clone();
    let loaded = match &shared.cache {
        Some(cache) => Model::load_cached(&shared.runtime, artifact, options, cache),
        None => Model::load_with(&shared.runtime, artifact, options),
    }
    .map_err(|e| refuse(GateStep::Load, e.to_string()))?;
    let contract = loaded.contract();
    if contract.name != model || Version::parse(&contract.version).ok().as_ref() != Some(version) {
        return Err(refuse(
            GateStep::Identity,
            format!(
                "the contract says {} {}, but the file is at {} (`<model>/<version>.wasm`)",
                contract.name,
                contract.version,
                f.rel.display()
            ),
        ));
    }
    let report = match &checks {
        Some(c) => {
            let report = checking::run(&loaded, c).map_err(|e| refuse(GateStep::Checks, format!("the checks could not run: {e}")))?;
            if !report.ok() {
                let first = report.failures.first().map(|(i, f)| format!("; first: case {i}: {f}")).unwrap_or_default();
                return Err(refuse(
                    GateStep::Checks,
                    format!("{} of {} checks failed{first}", report.cases - report.passed, report.cases),
                ));
            }
            Some(report)
        }
        None if shared.options.require_checks => {
            return Err(refuse(GateStep::Checks, "it carries no checks, and this registry requires them".into()));
        }
        None => None,
    };
    Ok(Loaded {
        ledger: shared.ledger.version(model, version),
        outputs: loaded.contract().outputs.iter().map(|o| o.name.clone()).collect(),
        model: loaded,
        rel: f.rel.clone(),
        admission,
        checks: report,
    })
}

pub(super) fn fingerprint(bytes: &[u8], vouch: Option<&[u8]>) -> Fingerprint {
    let mut h = Sha256::new();
    h.update(Sha256::digest(bytes));
    if let Some(s) = vouch {
        h.update(Sha256::digest(s));
    }
    h.finalize().into()
}

/// Reads an artifact (refusing it over the size cap without reading it all)
/// and its vouch file, if any.
pub(super) fn read_artifact(path: &Path, limit: u64) -> Result<(Vec<u8>, Option<Vec<u8>>), Refusal> {
    let read = |reason: String| Refusal { stage: GateStep::Read, reason };
    let size = std::fs::metadata(path).map_err(|e| read(e.to_string()))?.len();
    if size > limit {
        return Err(read(crate::limits::LimitHit::ArtifactSize { limit, actual: size }.to_string()));
    }
    let bytes = std::fs::read(path).map_err(|e| read(e.to_string()))?;
    let vouch_path = Vouch::path_for(path);
    let vouch = match std::fs::read(&vouch_path) {
        Ok(s) => Some(s),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => None,
        Err(e) => return Err(read(format!("{}: {e}", vouch_path.display()))),
    };
    Ok((bytes, vouch))
}

