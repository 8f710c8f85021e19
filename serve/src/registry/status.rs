//! What the registry reports about itself: each artifact's state and why
//! one was refused ([`Refusal`], at a [`GateStep`]), the routes file's
//! state, and what a reload changed.

use std::path::PathBuf;
use std::time::Duration;

use semver::Version;
use serde::Serialize;

use std::sync::Arc;

use super::gate::Loaded;
use super::layout::{self, PlaceError};
use paddock_host::artifact::ArtifactError;
use paddock_host::artifact::checks::CaseFailure;
use paddock_host::artifact::digest::Digest;
use paddock_host::artifact::trust::{Admission, TrustError, VouchTextError};
use paddock_host::drift::DriftReport;
use paddock_host::limits::LimitHit;
use paddock_host::sandbox::codecache::CodeSource;
use paddock_host::sandbox::model::{LoadError, ScoreError};
use paddock_host::sandbox::prime::PrimeState;

/// The stage at which an artifact was refused.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(rename_all = "snake_case")]
pub enum GateStep {
    /// Its place in the store names no model and version.
    Layout,
    /// It could not be read.
    Read,
    /// Its vouch or digest is not admitted.
    Trust,
    /// It is not a well-formed artifact.
    Parse,
    /// It does not compile, start, or declare a valid contract.
    Load,
    /// Its contract's name or version differ from its place in the store.
    Identity,
    /// The checks it carries fail (or it carries none and they are required).
    Checks,
}

/// Why an artifact was refused: each cause with its typed source. In JSON
/// (status, reload reports) it is `{"stage": GateStep, "reason": text}`.
#[derive(Clone, Debug)]
#[non_exhaustive]
pub enum Refusal {
    /// Its place in the store names no model and version.
    Place(PlaceError),
    /// The artifact could not be read.
    Read(Arc<std::io::Error>),
    /// The artifact is over the size cap (refused before reading it all).
    TooLarge(LimitHit),
    /// Its `.vouch` file could not be read.
    VouchUnreadable {
        /// The vouch file.
        path: PathBuf,
        /// What the system said.
        source: Arc<std::io::Error>,
    },
    /// Its `.vouch` file is not a vouch.
    VouchText(Arc<VouchTextError>),
    /// The trust policy does not admit it.
    Trust(Arc<TrustError>),
    /// It is not a well-formed artifact (or its checks section does not parse).
    Parse(Arc<ArtifactError>),
    /// It does not compile, start, or declare a valid contract.
    Load(Arc<LoadError>),
    /// Its contract's name or version differ from its place in the store.
    Identity {
        /// The name its contract declares.
        name: String,
        /// The version its contract declares.
        version: String,
        /// Its place, relative to the store.
        path: PathBuf,
    },
    /// Its checks could not run at all (a trap or a limit).
    ChecksDidNotRun(ScoreError),
    /// Some of its checks fail.
    ChecksFailed {
        /// Cases that failed.
        failed: usize,
        /// Cases run.
        cases: usize,
        /// The first failure: case position and why.
        first: Option<(usize, CaseFailure)>,
    },
    /// It carries no checks, and the registry requires them.
    NoChecks,
}

impl Refusal {
    /// The step of the gate that refused it.
    pub fn step(&self) -> GateStep {
        match self {
            Refusal::Place(_) => GateStep::Layout,
            Refusal::Read(_) | Refusal::TooLarge(_) | Refusal::VouchUnreadable { .. } => GateStep::Read,
            Refusal::VouchText(_) | Refusal::Trust(_) => GateStep::Trust,
            Refusal::Parse(_) => GateStep::Parse,
            Refusal::Load(_) => GateStep::Load,
            Refusal::Identity { .. } => GateStep::Identity,
            Refusal::ChecksDidNotRun(_) | Refusal::ChecksFailed { .. } | Refusal::NoChecks => GateStep::Checks,
        }
    }

    /// What was wrong, in one line (without the step).
    pub fn reason(&self) -> String {
        match self {
            Refusal::Place(e) => e.to_string(),
            Refusal::Read(e) => e.to_string(),
            Refusal::TooLarge(hit) => hit.to_string(),
            Refusal::VouchUnreadable { path, source } => format!("{}: {source}", path.display()),
            Refusal::VouchText(e) => format!("its .vouch file: {e}"),
            Refusal::Trust(e) => e.to_string(),
            Refusal::Parse(e) => e.to_string(),
            Refusal::Load(e) => e.to_string(),
            Refusal::Identity { name, version, path } => {
                format!(
                    "the contract says {name} {version}, but the file is at {} (`<model>/<version>.wasm`)",
                    path.display()
                )
            }
            Refusal::ChecksDidNotRun(e) => format!("the checks could not run: {e}"),
            Refusal::ChecksFailed { failed, cases, first } => {
                let first = first.as_ref().map(|(i, f)| format!("; first: case {i}: {f}")).unwrap_or_default();
                format!("{failed} of {cases} checks failed{first}")
            }
            Refusal::NoChecks => "it carries no checks, and this registry requires them".into(),
        }
    }
}

impl std::fmt::Display for Refusal {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let stage = match self.step() {
            GateStep::Layout => "its place in the store",
            GateStep::Read => "reading it",
            GateStep::Trust => "the trust check",
            GateStep::Parse => "parsing it",
            GateStep::Load => "loading it",
            GateStep::Identity => "matching its name and version to its place",
            GateStep::Checks => "its checks",
        };
        write!(f, "refused at {stage}: {}", self.reason())
    }
}

/// No `source()`: the message already holds the cause's text (each
/// variant keeps the cause itself, typed, for a caller to match on).
impl std::error::Error for Refusal {}

/// Two refusals are the same when they name the same step and reason.
impl PartialEq for Refusal {
    fn eq(&self, other: &Self) -> bool {
        self.step() == other.step() && self.reason() == other.reason()
    }
}

impl Serialize for Refusal {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        RefusalWire { stage: self.step(), reason: self.reason() }.serialize(s)
    }
}

// The JSON form of a `Refusal`, and the schema the API documents.
/// Why an artifact was refused: the step of the gate and what was wrong.
#[derive(Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[cfg_attr(feature = "http", schema(as = Refusal))]
struct RefusalWire {
    /// The step of the gate that refused it.
    stage: GateStep,
    /// What was wrong, in one line.
    reason: String,
}

#[cfg(feature = "http")]
impl utoipa::PartialSchema for Refusal {
    fn schema() -> utoipa::openapi::RefOr<utoipa::openapi::schema::Schema> {
        <RefusalWire as utoipa::PartialSchema>::schema()
    }
}

#[cfg(feature = "http")]
impl utoipa::ToSchema for Refusal {
    fn name() -> std::borrow::Cow<'static, str> {
        "Refusal".into()
    }

    fn schemas(schemas: &mut Vec<(String, utoipa::openapi::RefOr<utoipa::openapi::schema::Schema>)>) {
        <RefusalWire as utoipa::ToSchema>::schemas(schemas);
    }
}

/// What the registry did with one artifact file.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
#[non_exhaustive]
pub enum ArtifactState {
    /// It passed the gate and may be routed to.
    Loaded,
    /// It was refused and nothing of it is served.
    Refused {
        /// Why.
        refusal: Refusal,
    },
    /// New bytes were refused; the version loaded before keeps serving.
    KeptAfterRefusal {
        /// The digest still served.
        serving: Digest,
        /// Why the new bytes were refused.
        refusal: Refusal,
    },
    /// The file is gone, but routes still use the version, so it stays
    /// loaded until they stop.
    KeptAfterRemoval,
}

/// One artifact in the status listing.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct ArtifactStatus {
    /// Path relative to the store.
    #[cfg_attr(feature = "http", schema(value_type = String))]
    pub path: PathBuf,
    /// The model, when the path names one.
    pub model: Option<String>,
    /// The version, when the path names one.
    #[cfg_attr(feature = "http", schema(value_type = Option<String>))]
    pub version: Option<Version>,
    /// The digest of the file's bytes, when it could be read.
    pub digest: Option<Digest>,
    /// What happened to it.
    #[serde(flatten)]
    pub state: ArtifactState,
    /// The routes that use this version (`default`, `rule NAME`, `canary`, `shadow`).
    pub used_by: Vec<String>,
    /// On whose word the served bytes were admitted.
    pub admission: Option<Admission>,
    /// The served bytes' checks: `"40/40 passed"`, or `"none carried"`.
    pub checks: Option<String>,
    /// Where the served code came from (compiled or the code cache).
    pub code: Option<CodeSource>,
    /// Whether new instances start from a snapshot taken after `init`.
    pub primed: Option<PrimeState>,
    /// Live inputs and outputs against the training profile the artifact
    /// carries (`None`: it carries none, or the version is not loaded —
    /// drift unavailable, not zero).
    #[cfg_attr(feature = "http", schema(value_type = Option<Object>))]
    pub drift: Option<DriftReport>,
}

/// Whether the store's limits file ([`super::LIMITS_FILE`]) was taken.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
#[non_exhaustive]
pub enum LimitsState {
    /// No limits file: the code's options hold.
    Missing,
    /// Taken: its limits go over the code's.
    Accepted,
    /// Refused whole; the limits last taken stay.
    Refused {
        /// Every problem, naming its place.
        problems: Vec<String>,
    },
}

/// Whether the routes file was taken.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
#[non_exhaustive]
pub enum RoutesState {
    /// There is no routes file: nothing is served.
    Missing,
    /// The routes file in the store is the one serving.
    Accepted,
    /// The routes file in the store was refused; the routes accepted
    /// before keep serving (none, if none ever was).
    Refused {
        /// Every problem found.
        problems: Vec<String>,
    },
    /// The routes file was taken for every model but those whose routes
    /// name a version that is not loaded; each of those keeps the routes
    /// accepted before (none, if none ever were), and the others serve.
    PartlyTaken {
        /// The models whose routes were not taken.
        models: Vec<String>,
        /// Every problem found, each naming its model.
        problems: Vec<String>,
    },
}

/// Whether the features file was taken.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
pub enum FeaturesState {
    /// There is no features file: rows carry every feature themselves.
    Missing,
    /// The features file in the store, and the tables it names, are serving.
    Accepted {
        /// Each table loaded.
        tables: Vec<TableStatus>,
        /// Each server source (Redis, PostgreSQL).
        #[serde(default)]
        servers: Vec<ServerStatus>,
    },
    /// The features file or a table it names was refused; the plan and
    /// tables accepted before keep serving (none, if none ever were).
    Refused {
        /// Every problem found.
        problems: Vec<String>,
    },
}

/// One server source serving.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct ServerStatus {
    /// The source's name in the features file.
    pub source: String,
    /// What kind of server.
    pub kind: crate::features::SourceKind,
    /// The server's URL, its password (if any) hidden.
    pub url: String,
    /// The time each request gives it, in milliseconds.
    pub budget_ms: u64,
    /// What could not be checked when the plan loaded, and why (a
    /// PostgreSQL server that could not be reached: its columns' types
    /// are then checked as values are read).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unchecked: Option<String>,
}

/// One embedded table serving.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct TableStatus {
    /// The source's name in the features file.
    pub source: String,
    /// The file, relative to the store.
    #[cfg_attr(feature = "http", schema(value_type = String))]
    pub file: PathBuf,
    /// Rows held.
    pub rows: usize,
    /// When the file was last changed (RFC 3339).
    pub changed: String,
    /// When it was loaded (RFC 3339).
    pub loaded: String,
}

/// What the registry serves, and what it refused.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct Status {
    /// The store directory.
    #[cfg_attr(feature = "http", schema(value_type = String))]
    pub store: PathBuf,
    /// Counts up by one at every reload that changed anything.
    pub generation: u64,
    /// When this generation was built.
    pub since: String,
    /// Every artifact file, and versions kept loaded after removal.
    pub artifacts: Vec<ArtifactStatus>,
    /// The routes file.
    pub routes: RoutesState,
    /// The limits file.
    pub limits: LimitsState,
    /// The features file and its tables.
    pub features: FeaturesState,
    /// Models whose versions are loaded but which no route serves.
    pub unrouted: Vec<String>,
    /// When the store is the mirror of a shared store: how far it has
    /// caught up ([`crate::shared`]).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mirror: Option<MirrorState>,
    /// When the host captures traffic: where, how much, and what became
    /// of what it sampled ([`crate::registry::capture`]).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub capture: Option<CaptureState>,
}

/// How a host's capture of traffic stands.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[non_exhaustive]
pub struct CaptureState {
    /// The directory the files go to.
    #[cfg_attr(feature = "http", schema(value_type = String))]
    pub dir: PathBuf,
    /// The share of answered requests sampled.
    pub share: f64,
    /// What became of them.
    pub counts: super::capture::CaptureCounts,
}

/// How a host's mirror of a shared store stands.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[non_exhaustive]
pub struct MirrorState {
    /// The shared store: its server and name, never credentials.
    pub source: String,
    /// The store revision this host has applied (0: none yet).
    pub revision: u64,
    /// The store's latest revision, as last seen.
    pub latest: u64,
    /// The store revision of the routes the mirror holds (`None`: no routes).
    pub routes_revision: Option<u64>,
    /// Whether the host is connected to the store's server now.
    pub connected: bool,
    /// When the mirror last caught up with the store (RFC 3339).
    pub synced_at: Option<String>,
    /// Since when it may be behind: it lost the server, or has not reached
    /// it since it started (RFC 3339). `None` while it is up to date.
    pub stale_since: Option<String>,
    /// Entries whose objects were refused before the gate (digest
    /// mismatch, over the size cap, missing), one per entry.
    pub problems: Vec<SyncProblem>,
}

impl MirrorState {
    /// A mirror of `source` that has applied nothing yet.
    pub fn new(source: String) -> Self {
        MirrorState {
            source,
            revision: 0,
            latest: 0,
            routes_revision: None,
            connected: false,
            synced_at: None,
            stale_since: None,
            problems: Vec::new(),
        }
    }
}

/// One entry of a shared store a mirror could not take.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, serde::Deserialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[non_exhaustive]
pub struct SyncProblem {
    /// The entry's key (`version.charge-minutes.1.2.0`, `routes`).
    pub key: String,
    /// The store revision of the entry.
    pub revision: u64,
    /// Why it was not taken.
    pub reason: String,
}

impl Status {
    /// Artifacts in a state other than loaded.
    pub fn problems(&self) -> impl Iterator<Item = &ArtifactStatus> {
        self.artifacts.iter().filter(|a| a.state != ArtifactState::Loaded)
    }
}

/// What a reload changed.
#[derive(Clone, Debug, Default, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct ReloadReport {
    /// The generation now serving.
    pub generation: u64,
    /// Whether anything changed (a new generation was built).
    pub changed: bool,
    /// Versions that started serving (`model version`).
    pub loaded: Vec<String>,
    /// Versions no longer loaded.
    pub unloaded: Vec<String>,
    /// Artifacts refused in this reload, with why.
    pub refused: Vec<RefusedFile>,
    /// Whether the routes changed.
    pub routes_changed: bool,
    /// The routes file's problems, when it was refused in this reload.
    pub routes_refused: Vec<String>,
    /// The features file's (or its tables') problems, when refused in this reload.
    pub features_refused: Vec<String>,
    /// The limits file's problems, when refused in this reload.
    pub limits_refused: Vec<String>,
    /// How long the reload took.
    #[serde(rename = "took_ms", serialize_with = "ser_ms")]
    #[cfg_attr(feature = "http", schema(value_type = f64))]
    pub took: Duration,
}

/// An artifact refused by a reload.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct RefusedFile {
    /// Its path, relative to the store.
    #[cfg_attr(feature = "http", schema(value_type = String))]
    pub path: PathBuf,
    /// Why it was refused.
    pub refusal: Refusal,
}

fn ser_ms<S: serde::Serializer>(d: &Duration, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_f64(d.as_secs_f64() * 1e3)
}

pub(super) fn loaded_status(loaded: &Loaded, state: ArtifactState) -> ArtifactStatus {
    let contract = loaded.model.contract();
    ArtifactStatus {
        path: loaded.rel.clone(),
        model: Some(contract.name.clone()),
        // The gate checked that the contract's version is the path's.
        version: Version::parse(&contract.version).ok(),
        digest: Some(loaded.model.digest()),
        state,
        used_by: Vec::new(),
        admission: Some(loaded.admission.clone()),
        checks: Some(match &loaded.checks {
            Some(r) => format!("{}/{} passed", r.passed, r.cases),
            None => "none carried".into(),
        }),
        code: Some(loaded.model.code_source().clone()),
        primed: Some(loaded.model.prime_state().clone()),
        drift: loaded.model.drift(),
    }
}

pub(super) fn refused_status(
    f: &layout::Found,
    id: Option<&(String, Version)>,
    digest: Option<Digest>,
    refusal: Refusal,
) -> ArtifactStatus {
    ArtifactStatus {
        path: f.rel.clone(),
        model: id.map(|(m, _)| m.clone()),
        version: id.map(|(_, v)| v.clone()),
        digest,
        state: ArtifactState::Refused { refusal },
        used_by: Vec::new(),
        admission: None,
        checks: None,
        code: None,
        primed: None,
        drift: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_refusal_names_its_stage_in_words() {
        let r = Refusal::ChecksFailed { failed: 3, cases: 40, first: None };
        assert_eq!(r.step(), GateStep::Checks);
        assert_eq!(r.to_string(), "refused at its checks: 3 of 40 checks failed");
        let json = serde_json::to_value(&r).unwrap();
        assert_eq!(json, serde_json::json!({"stage": "checks", "reason": "3 of 40 checks failed"}));
    }
}
