//! The gate every new or changed artifact passes before any route may
//! point to it: trust (vouch / pin) → parse → compile, start and read its
//! contract → its name and version match its place → its checks pass.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use semver::Version;
use sha2::{Digest as _, Sha256};

use super::status::Refusal;
use super::{RegistryOptions, Shared, layout, ledger};
use paddock_host::artifact::Artifact;
use paddock_host::artifact::checks::CheckReport;
use paddock_host::artifact::digest::Digest;
use paddock_host::artifact::trust::{Admission, Vouch};
use paddock_host::sandbox::Runtime;
use paddock_host::sandbox::codecache::CodeCache;
use paddock_host::sandbox::model::{LoadError, Model, ModelOptions};

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
pub(super) fn gate(
    shared: &Shared,
    f: &layout::Found,
    (model, version): (&str, &Version),
    bytes: Vec<u8>,
    vouch: Option<&[u8]>,
    chosen: &ModelOptions,
) -> Result<Loaded, Refusal> {
    let (loaded, admission) = admit(&shared.runtime, &shared.options, shared.cache.as_ref(), bytes, vouch, chosen)?;
    let contract = loaded.contract();
    if contract.name != model || Version::parse(&contract.version).ok().as_ref() != Some(version) {
        return Err(Refusal::Identity {
            name: contract.name.clone(),
            version: contract.version.clone(),
            path: f.rel.clone(),
        });
    }
    let report = loaded.carried_checks().cloned();
    Ok(Loaded {
        ledger: shared.ledger.version(model, version),
        outputs: loaded.contract().outputs.iter().map(|o| o.name.clone()).collect(),
        model: loaded,
        rel: f.rel.clone(),
        admission,
        checks: report,
    })
}

/// Trust → parse → compile, start, contract → checks: every step of the
/// gate but the identity, which depends on where the bytes sit.
fn admit(
    runtime: &Runtime,
    options: &RegistryOptions,
    cache: Option<&CodeCache>,
    bytes: Vec<u8>,
    vouch: Option<&[u8]>,
    chosen: &ModelOptions,
) -> Result<(Model, Admission), Refusal> {
    let digest = Digest::of(&bytes);
    let vouch = vouch.map(Vouch::from_bytes).transpose().map_err(|e| Refusal::VouchText(Arc::new(e)))?;
    let admission = options.trust.admit(digest, vouch.as_ref()).map_err(|e| Refusal::Trust(Arc::new(e)))?;
    let artifact = Artifact::from_bytes(bytes, options.size_cap).map_err(|e| Refusal::Parse(Arc::new(e)))?;
    if !artifact.carries_checks() && options.require_checks {
        return Err(Refusal::NoChecks);
    }
    // Loading parses and runs the checks the artifact carries (once).
    let chosen = ModelOptions { skip_carried_checks: false, ..chosen.clone() };
    let loaded = match cache {
        Some(cache) => Model::load_cached(runtime, artifact, chosen, cache),
        None => Model::load_with(runtime, artifact, chosen),
    }
    .map_err(|e| match e {
        LoadError::ChecksUnreadable(e) => Refusal::Parse(Arc::new(e)),
        LoadError::ChecksDidNotRun(e) => Refusal::ChecksDidNotRun(e),
        LoadError::ChecksFailed { report } => Refusal::ChecksFailed {
            failed: report.cases - report.passed,
            cases: report.cases,
            first: report.failures.first().cloned(),
        },
        e => Refusal::Load(Arc::new(e)),
    })?;
    Ok((loaded, admission))
}

/// A version that passed the gate before it was put in any store.
#[derive(Clone, Debug)]
#[non_exhaustive]
pub struct Passed {
    /// The model its contract names.
    pub model: String,
    /// The version its contract declares.
    pub version: Version,
    /// The digest of its bytes.
    pub digest: Digest,
    /// Why the trust policy admitted it.
    pub admission: Admission,
    /// Its carried checks, run (`None`: it carries none).
    pub checks: Option<CheckReport>,
}

/// Runs an artifact through the gate a host runs (trust under
/// `options.trust`, size cap, load under the options its model and version
/// would get, contract, carried checks, `require_checks`), outside any
/// store: what a publisher checks before anything reaches the hosts. The
/// model and version are the ones its contract declares.
///
/// # Errors
/// The [`Refusal`] a host's gate would report.
pub fn check_version(
    runtime: &Runtime,
    bytes: Vec<u8>,
    vouch: Option<&[u8]>,
    options: &RegistryOptions,
) -> Result<Passed, Refusal> {
    let digest = Digest::of(&bytes);
    // The options of the model and version are known only once the contract
    // is read: load under the store-wide ones, then again only if the
    // model's own differ.
    // A shared code cache, when one is named: the hosts then find the code
    // the publisher compiled.
    let cache = options.code_cache_dir.as_deref().filter(|_| options.code_cache).and_then(|d| CodeCache::open(d).ok());
    let (loaded, admission) = admit(runtime, options, cache.as_ref(), bytes.clone(), vouch, &options.model)?;
    let contract = loaded.contract();
    let version = Version::parse(&contract.version).map_err(|_| Refusal::Identity {
        name: contract.name.clone(),
        version: contract.version.clone(),
        path: PathBuf::new(),
    })?;
    let model = contract.name.clone();
    let chosen = options.model_options(&model, &version);
    let loaded = if *chosen == options.model {
        loaded
    } else {
        admit(runtime, options, cache.as_ref(), bytes, vouch, chosen)?.0
    };
    Ok(Passed { model, version, digest, admission, checks: loaded.carried_checks().cloned() })
}

/// [`fingerprint`], also over the options the version loads with.
pub(super) fn fingerprint_with(bytes: &[u8], vouch: Option<&[u8]>, options: &ModelOptions) -> Fingerprint {
    let mut h = Sha256::new();
    h.update(fingerprint(bytes, vouch));
    h.update(format!("{options:?}"));
    h.finalize().into()
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
    let read = |e: std::io::Error| Refusal::Read(Arc::new(e));
    let size = std::fs::metadata(path).map_err(read)?.len();
    if size > limit {
        return Err(Refusal::TooLarge(paddock_host::limits::LimitHit::ArtifactSize { limit, actual: size }));
    }
    let bytes = std::fs::read(path).map_err(read)?;
    let vouch_path = Vouch::path_for(path);
    let vouch = match std::fs::read(&vouch_path) {
        Ok(s) => Some(s),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => None,
        Err(e) => return Err(Refusal::VouchUnreadable { path: vouch_path, source: Arc::new(e) }),
    };
    Ok((bytes, vouch))
}
