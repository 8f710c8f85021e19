//! The registry: a whole suite of model versions served from a store
//! directory, routed by context and time, swapped without a restart.
//!
//! A request travels artifact → contract → sandbox → **registry** → surface.
//! The registry holds one immutable snapshot of what it serves (loaded
//! versions + routes). A request takes the snapshot, picks a version by the
//! routes, and scores on it; a reload builds a whole new snapshot beside the
//! old one and swaps it in atomically. A request in flight keeps the
//! version it started on until it returns.
//!
//! A new or changed artifact passes a gate before any route may point to it:
//! trust (vouch / pin) → parse → compile → instantiate and read its
//! contract → its name and version match its place in the store → the
//! checks it carries pass. A refusal keeps the previous state serving and
//! is reported in [`Status`] and the log. A routes file that does not parse,
//! or names a version that is not loaded, is refused as a whole.
//!
//! What it is not: a deployment tool. It never writes to the store; putting
//! artifacts and routes there (atomically: write, then rename) is the
//! operator's job.

pub mod layout;
pub mod ledger;
pub mod metrics;
pub mod routes;
mod shadow;
mod usage_file;
mod watch;

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use arc_swap::ArcSwap;
use jiff::Timestamp;
use semver::Version;
use serde::Serialize;
use sha2::{Digest as _, Sha256};

use crate::artifact::Artifact;
use crate::digest::Digest;
use crate::checking::{self, CheckReport};
use crate::codecache::{CacheError, CodeCache, CodeSource};
use crate::model::{Estimates, Model, ModelOptions, ScoreError};
use crate::rows::{Row, RowError};
use crate::sandbox::Runtime;
use crate::trust::{Admission, TrustPolicy, Vouch};

pub use layout::{ROUTES_FILE, STATE_DIR, artifact_path};
pub use ledger::{SavedWall, ShadowUsage, UsageReport, VersionUsage, Wall};
pub use usage_file::{SavedUsage, usage_path};
pub use routes::{Clock, Context, ManualClock, Reason, Routes, RoutesError, SystemClock};
pub use watch::Watcher;

/// How a registry loads and serves.
#[derive(Clone, Debug)]
pub struct RegistryOptions {
    /// Limits and isolation for every model version.
    pub model: ModelOptions,
    /// Which artifacts may load.
    pub trust: TrustPolicy,
    /// Refuse artifacts that carry no checks. Off by default.
    pub require_checks: bool,
    /// Where the host keeps its state (code cache, usage file).
    /// Default: `<store>/.paddock`.
    pub state_dir: Option<PathBuf>,
    /// Keep compiled code on disk under the state directory. On by default.
    pub code_cache: bool,
    /// The clock for requests that carry no timestamp.
    pub clock: Arc<dyn Clock>,
    /// Shadow requests waiting at most; more are dropped (and counted).
    /// Default 1024.
    pub shadow_queue: usize,
    /// Keep the usage ledger in `<state>/usage.json`: add what it holds at
    /// open, write it back this often and when the registry is dropped.
    /// Keeping usage takes the state directory's lock: a second process on
    /// it is refused. `None`: no usage file, no lock (a read-only look at a
    /// store, as `paddock status` takes). Default 10 s.
    pub usage_flush: Option<Duration>,
}

impl Default for RegistryOptions {
    fn default() -> Self {
        RegistryOptions {
            model: ModelOptions::default(),
            trust: TrustPolicy::default(),
            require_checks: false,
            state_dir: None,
            code_cache: true,
            clock: Arc::new(SystemClock),
            shadow_queue: 1024,
            usage_flush: Some(Duration::from_secs(10)),
        }
    }
}

/// Why a registry cannot open or reload at all. (A refused artifact or
/// routes file is not an error: it is reported in [`Status`].)
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum RegistryError {
    /// The store directory cannot be read.
    #[error("store {path}: {source}")]
    Store {
        /// The directory.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// The code cache cannot be used.
    #[error(transparent)]
    Cache(#[from] CacheError),
    /// Another process keeps its state in this state directory.
    #[error(
        "{path} is held by {} (a serving host keeps its code cache and usage there); stop it, or give this one its own state directory (--state)",
        holder.map_or("another process".to_owned(), |p| format!("process {p}"))
    )]
    Locked {
        /// The lock file.
        path: PathBuf,
        /// The process id written in it, when readable.
        holder: Option<u32>,
    },
    /// The state directory or its lock file cannot be used.
    #[error("{path}: {source}")]
    State {
        /// The directory or file.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// The directory watcher cannot start.
    #[error("cannot watch {path}: {reason}")]
    Watch {
        /// The directory.
        path: PathBuf,
        /// What went wrong.
        reason: String,
    },
}

/// Why a request got no estimates.
#[derive(Debug, Clone, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum RequestError {
    /// No model of that name is routed.
    #[error("no model `{model}` is served (served: {})", .served.join(", "))]
    UnknownModel {
        /// The name asked for.
        model: String,
        /// The models that are served.
        served: Vec<String>,
    },
    /// The routes named a version that is not loaded. The registry only
    /// accepts routes whose versions are all loaded, so this is a bug in
    /// paddock; it is an error rather than a crash of the caller.
    #[error("{model} {version} was routed to but is not loaded")]
    NotLoaded {
        /// The model.
        model: String,
        /// The version the routes named.
        version: Version,
    },
    /// The chosen version failed to score the rows.
    #[error("{model} {version} ({reason}): {error}")]
    Score {
        /// The model.
        model: String,
        /// The version that was asked.
        version: Version,
        /// Why that version.
        reason: Arc<Reason>,
        /// What went wrong.
        error: ScoreError,
    },
}

impl RequestError {
    /// A short stable name for the kind of error, for metrics and logs.
    pub fn kind(&self) -> &'static str {
        match self {
            RequestError::UnknownModel { .. } => "unknown_model",
            RequestError::NotLoaded { .. } => "not_loaded",
            RequestError::Score { error, .. } => error.kind(),
        }
    }
}

/// One request to the registry.
#[derive(Clone, Copy, Debug)]
pub struct Request<'a> {
    /// The model's name.
    pub model: &'a str,
    /// Context for the routes (`region`, `site`…).
    pub context: &'a Context,
    /// When the request happened, for time windows; `None` means now (the
    /// registry's clock).
    pub at: Option<Timestamp>,
    /// The rows to score.
    pub rows: &'a [Row],
}

/// Estimates, and which version produced them and why.
#[derive(Clone, Debug, Serialize)]
pub struct Answer {
    /// The model.
    pub model: String,
    /// The version that answered.
    pub version: Version,
    /// Its artifact's digest.
    pub digest: Digest,
    /// Why that version (shared with the routes: no copy per request).
    pub reason: Arc<Reason>,
    /// The registry generation the request was routed in.
    pub generation: u64,
    /// The names of the estimates' columns: the answering version's outputs.
    pub outputs: Arc<[String]>,
    /// Rows in the request.
    pub requested: usize,
    /// The estimates of the valid rows, in request order.
    pub estimates: Estimates,
    /// The number (from 1) of the request row behind each estimate row.
    pub scored: Vec<usize>,
    /// Every problem of the rows that broke the contract, each naming its
    /// row; those rows got no estimate.
    pub problems: Vec<RowError>,
}

impl Answer {
    /// Every request row in order: its outputs, or `None` when it broke the
    /// contract (see [`Answer::problems`]).
    pub fn rows(&self) -> impl Iterator<Item = Option<&[f64]>> {
        let mut next = self.scored.iter().copied().enumerate().peekable();
        (1..=self.requested).map(move |n| match next.peek() {
            Some(&(k, m)) if m == n => {
                next.next();
                Some(self.estimates.row(k))
            }
            _ => None,
        })
    }
}

/// A version that passed the gate.
pub(crate) struct Loaded {
    pub model: Model,
    pub outputs: Arc<[String]>,
    pub rel: PathBuf,
    pub admission: Admission,
    pub checks: Option<CheckReport>,
    pub ledger: Arc<ledger::VersionLedger>,
}

/// The stage at which an artifact was refused.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(rename_all = "snake_case")]
pub enum Stage {
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

/// Why an artifact was refused.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct Refusal {
    /// Where in the gate.
    pub stage: Stage,
    /// What was wrong.
    pub reason: String,
}

impl std::fmt::Display for Refusal {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let stage = match self.stage {
            Stage::Layout => "its place in the store",
            Stage::Read => "reading it",
            Stage::Trust => "the trust check",
            Stage::Parse => "parsing it",
            Stage::Load => "loading it",
            Stage::Identity => "matching its name and version to its place",
            Stage::Checks => "its checks",
        };
        write!(f, "refused at {stage}: {}", self.reason)
    }
}

/// What the registry did with one artifact file.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
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
    pub version: Option<String>,
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
}

/// Whether the routes file was taken.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
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
    /// Models whose versions are loaded but which no route serves.
    pub unrouted: Vec<String>,
}

impl Status {
    /// Artifacts in a state other than loaded.
    pub fn problems(&self) -> impl Iterator<Item = &ArtifactStatus> {
        self.artifacts.iter().filter(|a| a.state != ArtifactState::Loaded)
    }
}

/// One immutable view of what is served.
struct Snapshot {
    generation: u64,
    routes: Arc<Routes>,
    versions: BTreeMap<String, BTreeMap<Version, Arc<Loaded>>>,
    /// Per model with a shadow: everything a request needs, resolved once.
    shadows: BTreeMap<String, ShadowPlan>,
    status: Status,
}

/// A model's shadow, resolved when the snapshot is built.
struct ShadowPlan {
    loaded: Arc<Loaded>,
    ledger: Arc<ledger::ShadowLedger>,
    sample: f64,
    tolerance: f64,
}

/// What a reload saw last time, so unchanged files are not gated again.
#[derive(Default)]
struct Memory {
    /// Per artifact path: fingerprint of its bytes and vouch, and the outcome.
    files: HashMap<PathBuf, (Fingerprint, Outcome)>,
    /// Fingerprint of the routes file last read, and whether it was accepted.
    routes: Option<(Fingerprint, RoutesState)>,
}

type Fingerprint = [u8; 32];

#[derive(Clone)]
enum Outcome {
    Loaded(Arc<Loaded>),
    Refused(Refusal, Option<Digest>),
}

/// A store being served. Cheap to clone; `Send + Sync`.
#[derive(Clone)]
pub struct Registry {
    inner: Arc<Shared>,
}

struct Shared {
    dir: PathBuf,
    state_dir: PathBuf,
    runtime: Runtime,
    options: RegistryOptions,
    cache: Option<CodeCache>,
    current: ArcSwap<Snapshot>,
    memory: Mutex<Memory>,
    ledger: ledger::Ledger,
    shadows: shadow::Shadows,
    reloads: AtomicU64,
    /// Held while usage is kept (the state directory's lock).
    lock: Option<usage_file::StateLock>,
    /// Dropping it stops the flush thread.
    flush_stop: Mutex<Option<std::sync::mpsc::Sender<()>>>,
}

impl Drop for Shared {
    fn drop(&mut self) {
        if self.lock.is_some() {
            if let Err(e) = usage_file::save(&self.state_dir, &self.dir, &self.ledger) {
                tracing::warn!(error = %e, "cannot write the usage file");
            }
        }
    }
}

impl std::fmt::Debug for Registry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Registry").field("store", &self.inner.dir).field("generation", &self.generation()).finish()
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

impl Registry {
    /// Opens a store and loads it: every artifact through the gate, then
    /// the routes. Refusals do not make this fail; see [`Registry::status`].
    ///
    /// # Errors
    /// [`RegistryError::Store`] when the directory cannot be read,
    /// [`RegistryError::Cache`] when the code cache cannot be used.
    pub fn open(runtime: &Runtime, dir: &Path, options: RegistryOptions) -> Result<Registry, RegistryError> {
        let dir = dir.to_owned();
        std::fs::read_dir(&dir).map_err(|source| RegistryError::Store { path: dir.clone(), source })?;
        let state_dir = options.state_dir.clone().unwrap_or_else(|| dir.join(STATE_DIR));
        let lock = match options.usage_flush {
            Some(_) => Some(usage_file::StateLock::take(&state_dir)?),
            None => None,
        };
        let cache = if options.code_cache { Some(CodeCache::open(&state_dir.join("code"))?) } else { None };
        let ledger = ledger::Ledger::default();
        if lock.is_some() {
            usage_file::merge(&state_dir, &ledger);
        }
        let empty = Snapshot {
            generation: 0,
            routes: Arc::new(Routes::empty()),
            versions: BTreeMap::new(),
            shadows: BTreeMap::new(),
            status: Status {
                store: dir.clone(),
                generation: 0,
                since: Timestamp::now().to_string(),
                artifacts: Vec::new(),
                routes: RoutesState::Missing,
                unrouted: Vec::new(),
            },
        };
        let registry = Registry {
            inner: Arc::new(Shared {
                shadows: shadow::Shadows::start(options.shadow_queue),
                dir,
                state_dir,
                runtime: runtime.clone(),
                options,
                cache,
                current: ArcSwap::from_pointee(empty),
                memory: Mutex::new(Memory::default()),
                ledger,
                reloads: AtomicU64::new(0),
                lock,
                flush_stop: Mutex::new(None),
            }),
        };
        if let Some(every) = registry.inner.options.usage_flush {
            registry.flush_every(every);
        }
        registry.reload()?;
        Ok(registry)
    }

    /// Starts the thread that writes the usage file every `every`; it
    /// holds no strong reference, and ends when the registry is dropped.
    fn flush_every(&self, every: Duration) {
        let (tx, rx) = std::sync::mpsc::channel::<()>();
        let weak = Arc::downgrade(&self.inner);
        let started = std::thread::Builder::new().name("paddock-usage".into()).spawn(move || {
            while let Err(std::sync::mpsc::RecvTimeoutError::Timeout) = rx.recv_timeout(every) {
                let Some(shared) = weak.upgrade() else { return };
                if let Err(e) = usage_file::save(&shared.state_dir, &shared.dir, &shared.ledger) {
                    tracing::warn!(error = %e, "cannot write the usage file");
                }
            }
        });
        match started {
            Ok(_) => *self.inner.flush_stop.lock().unwrap_or_else(|e| e.into_inner()) = Some(tx),
            Err(e) => tracing::warn!(error = %e, "cannot start the usage flush thread; usage is written at shutdown only"),
        }
    }

    /// The store directory.
    pub fn dir(&self) -> &Path {
        &self.inner.dir
    }

    /// Where the host keeps its state for this store.
    pub fn state_dir(&self) -> &Path {
        &self.inner.state_dir
    }

    /// The generation serving now.
    pub fn generation(&self) -> u64 {
        self.inner.current.load().generation
    }

    /// Scores a request on the version its routes pick.
    ///
    /// # Errors
    /// [`RequestError::UnknownModel`] when no route serves the model;
    /// [`RequestError::Score`] carrying the version, the reason it was
    /// picked and the [`ScoreError`] (invalid rows, limit hits, traps…).
    pub fn score(&self, request: &Request<'_>) -> Result<Answer, RequestError> {
        let shared = &*self.inner;
        let snapshot = shared.current.load();
        let Some(routes) = snapshot.routes.model(request.model) else {
            shared.ledger.record_rejected("unknown_model");
            return Err(RequestError::UnknownModel {
                model: request.model.to_owned(),
                served: snapshot.routes.models().map(str::to_owned).collect(),
            });
        };
        let at = request.at.unwrap_or_else(|| shared.options.clock.now());
        let route = routes.route(request.model, request.context, at);
        // Routes are only accepted when every version they name is loaded.
        let Some(served) = snapshot.versions.get(request.model).and_then(|v| v.get(route.version)).cloned() else {
            return Err(RequestError::NotLoaded { model: request.model.to_owned(), version: route.version.clone() });
        };
        let (version, reason) = (route.version.clone(), route.reason.clone());
        let shadow = snapshot
            .shadows
            .get(request.model)
            .filter(|s| s.ledger.sampled(s.sample))
            .map(|s| (s.loaded.clone(), s.tolerance, s.ledger.clone()));
        let generation = snapshot.generation;
        drop(snapshot);

        let started = Instant::now();
        let in_flight = served.ledger.enter();
        let result = served.model.score_valid(request.rows);
        drop(in_flight);
        match result {
            Ok(scored) => {
                served.ledger.record_ok(scored.estimates.usage());
                if !scored.problems.is_empty() {
                    served.ledger.record_refused(request.rows.len() - scored.scored.len(), "invalid_rows");
                }
                if let Some((shadow, tolerance, ledger)) = shadow {
                    // The shadow sees the rows that were served.
                    let rows = if scored.problems.is_empty() {
                        request.rows.to_vec()
                    } else {
                        scored.scored.iter().map(|&n| request.rows[n - 1].clone()).collect()
                    };
                    shared.shadows.submit(shadow::Job {
                        served: served.clone(),
                        shadow,
                        rows,
                        answer: scored.estimates.clone(),
                        tolerance,
                        ledger,
                    });
                }
                Ok(Answer {
                    model: request.model.to_owned(),
                    version,
                    digest: served.model.digest(),
                    reason,
                    generation,
                    outputs: served.outputs.clone(),
                    requested: request.rows.len(),
                    estimates: scored.estimates,
                    scored: scored.scored,
                    problems: scored.problems,
                })
            }
            Err(error) => {
                if error.is_request_fault() {
                    served.ledger.record_refused(request.rows.len(), error.kind());
                } else {
                    served.ledger.record_error(request.rows.len(), &error, started.elapsed());
                }
                Err(RequestError::Score {
                    model: request.model.to_owned(),
                    version,
                    reason,
                    error,
                })
            }
        }
    }

    /// The loaded model of one version, e.g. to read its contract.
    pub fn model(&self, model: &str, version: &Version) -> Option<Model> {
        self.inner.current.load().versions.get(model)?.get(version).map(|l| l.model.clone())
    }

    /// The loaded versions of a model, oldest first (none for a name no
    /// model has).
    pub fn versions(&self, model: &str) -> Vec<Version> {
        self.inner.current.load().versions.get(model).map(|v| v.keys().cloned().collect()).unwrap_or_default()
    }

    /// The version a request would be routed to now, and why, without
    /// scoring anything.
    pub fn route(&self, model: &str, context: &Context, at: Option<Timestamp>) -> Option<(Version, Arc<Reason>)> {
        let snapshot = self.inner.current.load();
        let at = at.unwrap_or_else(|| self.inner.options.clock.now());
        let route = snapshot.routes.model(model)?.route(model, context, at);
        Some((route.version.clone(), route.reason.clone()))
    }

    /// The routes serving now.
    pub fn routes(&self) -> Arc<Routes> {
        self.inner.current.load().routes.clone()
    }

    /// What is served and what was refused.
    pub fn status(&self) -> Status {
        self.inner.current.load().status.clone()
    }

    /// Counts a request a surface refused before asking the registry
    /// (malformed, too large, overloaded), under a fixed `kind`.
    pub fn count_rejected(&self, kind: &'static str) {
        self.inner.ledger.record_rejected(kind);
    }

    /// The usage ledger now.
    pub fn usage(&self) -> UsageReport {
        self.inner.ledger.report()
    }

    /// Whether this registry keeps the usage file (and holds the state
    /// directory's lock).
    pub fn keeps_usage(&self) -> bool {
        self.inner.lock.is_some()
    }

    /// Writes the usage ledger to `<state>/usage.json` (atomically), for
    /// `paddock usage`. With [`RegistryOptions::usage_flush`] set this also
    /// happens every interval and when the registry is dropped.
    ///
    /// # Errors
    /// The I/O error.
    /// [`std::io::ErrorKind::Unsupported`] when this registry keeps no
    /// usage (writing would replace the figures of earlier processes).
    pub fn save_usage(&self) -> std::io::Result<PathBuf> {
        if !self.keeps_usage() {
            return Err(std::io::Error::new(
                std::io::ErrorKind::Unsupported,
                "this registry keeps no usage file (opened without RegistryOptions::usage_flush)",
            ));
        }
        usage_file::save(&self.inner.state_dir, &self.inner.dir, &self.inner.ledger)
    }

    /// Waits until every queued shadow request has been compared, at most
    /// `timeout`; says whether the queue drained.
    pub fn drain_shadows(&self, timeout: Duration) -> bool {
        self.inner.shadows.drain(timeout)
    }

    /// Watches the store and reloads on changes (after they settle for
    /// `settle`), and every `rescan` whatever happens, until the returned
    /// [`Watcher`] is dropped.
    ///
    /// # Errors
    /// [`RegistryError::Watch`] when the system watcher cannot start (the
    /// periodic rescan alone would still work: use [`Watcher::polling`]).
    pub fn watch(&self, settle: Duration, rescan: Duration) -> Result<Watcher, RegistryError> {
        Watcher::start(self.clone(), settle, rescan, true)
    }

    /// Looks at the store again: gates new and changed artifacts, reads the
    /// routes, and swaps in a new snapshot if anything changed. Safe to call
    /// from any thread; reloads run one at a time.
    ///
    /// # Errors
    /// [`RegistryError::Store`] when the store directory cannot be read
    /// (the current snapshot keeps serving).
    pub fn reload(&self) -> Result<ReloadReport, RegistryError> {
        let started = Instant::now();
        let shared = &*self.inner;
        let mut memory = shared.memory.lock().unwrap_or_else(|e| e.into_inner());
        let old = shared.current.load_full();
        let found = layout::scan(&shared.dir).map_err(|source| RegistryError::Store { path: shared.dir.clone(), source })?;
        let mut report = ReloadReport::default();

        // 1. Artifacts through the gate (or remembered, when unchanged).
        let mut versions: BTreeMap<String, BTreeMap<Version, Arc<Loaded>>> = BTreeMap::new();
        let mut statuses: Vec<ArtifactStatus> = Vec::new();
        let mut files = HashMap::new();
        for f in &found {
            let (model, version) = match &f.identity {
                Ok(id) => id.clone(),
                Err(reason) => {
                    statuses.push(refused_status(f, None, None, Refusal { stage: Stage::Layout, reason: reason.clone() }));
                    continue;
                }
            };
            let limit = shared.options.model.limits.artifact_bytes;
            let (bytes, vouch) = match read_artifact(&f.path, limit) {
                Ok(read) => read,
                Err(refusal) => {
                    statuses.push(refused_status(f, Some(&(model, version)), None, refusal));
                    continue;
                }
            };
            let fingerprint = fingerprint(&bytes, vouch.as_deref());
            let outcome = match memory.files.get(&f.path) {
                Some((fp, outcome)) if *fp == fingerprint => outcome.clone(),
                _ => {
                    let digest = Digest::of(&bytes);
                    match self.gate(f, &model, &version, bytes, vouch.as_deref()) {
                        Ok(loaded) => Outcome::Loaded(Arc::new(loaded)),
                        Err(refusal) => {
                            tracing::warn!(artifact = %f.rel.display(), %refusal, "artifact refused");
                            report.refused.push(RefusedFile { path: f.rel.clone(), refusal: refusal.clone() });
                            Outcome::Refused(refusal, Some(digest))
                        }
                    }
                }
            };
            files.insert(f.path.clone(), (fingerprint, outcome.clone()));
            match outcome {
                Outcome::Loaded(loaded) => {
                    statuses.push(loaded_status(&loaded, ArtifactState::Loaded));
                    versions.entry(model).or_default().insert(version, loaded);
                }
                Outcome::Refused(refusal, digest) => {
                    // New bytes that fail keep the old version of this path serving.
                    let kept = old.versions.get(&model).and_then(|v| v.get(&version)).filter(|l| l.rel == f.rel);
                    match kept {
                        Some(loaded) => {
                            statuses.push(ArtifactStatus {
                                digest,
                                ..loaded_status(loaded, ArtifactState::KeptAfterRefusal { serving: loaded.model.digest(), refusal })
                            });
                            versions.entry(model).or_default().insert(version, loaded.clone());
                        }
                        None => statuses.push(refused_status(f, Some(&(model, version)), digest, refusal)),
                    }
                }
            }
        }
        memory.files = files;

        // 2. Versions whose files are gone: kept if routes still use them.
        let mut removed: BTreeMap<String, BTreeMap<Version, Arc<Loaded>>> = BTreeMap::new();
        for (model, vs) in &old.versions {
            for (version, loaded) in vs {
                if !versions.get(model).is_some_and(|v| v.contains_key(version)) {
                    removed.entry(model.clone()).or_default().insert(version.clone(), loaded.clone());
                }
            }
        }

        // 3. The routes: the file in the store if it holds, else the old ones.
        let routes_path = shared.dir.join(ROUTES_FILE);
        let available = |m: &str, v: &Version| {
            versions.get(m).is_some_and(|vs| vs.contains_key(v)) || removed.get(m).is_some_and(|vs| vs.contains_key(v))
        };
        let (routes, routes_state) = match std::fs::read(&routes_path) {
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                // Still no routes file: the same (empty) routes, no new generation.
                let routes = if matches!(old.status.routes, RoutesState::Missing) { old.routes.clone() } else { Arc::new(Routes::empty()) };
                (routes, RoutesState::Missing)
            }
            Err(e) => {
                (old.routes.clone(), RoutesState::Refused { problems: vec![format!("{}: {e}", routes_path.display())] })
            }
            Ok(bytes) => {
                let parsed = std::str::from_utf8(&bytes)
                    .map_err(|e| RoutesError { problems: vec![format!("not UTF-8 text: {e}")] })
                    .and_then(Routes::parse)
                    .and_then(|r| r.check_versions(available).map(|()| r));
                match parsed {
                    Ok(r) => {
                        let fp = fingerprint(&bytes, None);
                        let same = matches!(&memory.routes, Some((last, RoutesState::Accepted)) if *last == fp);
                        let routes = if same { old.routes.clone() } else { Arc::new(r) };
                        memory.routes = Some((fp, RoutesState::Accepted));
                        (routes, RoutesState::Accepted)
                    }
                    Err(e) => {
                        let first_time = memory.routes.as_ref().is_none_or(|(fp, _)| *fp != fingerprint(&bytes, None));
                        if first_time {
                            tracing::warn!(routes = %routes_path.display(), problems = %e.problems.join("; "), "routes refused; the previous routes keep serving");
                            report.routes_refused = e.problems.clone();
                        }
                        let state = RoutesState::Refused { problems: e.problems };
                        memory.routes = Some((fingerprint(&bytes, None), state.clone()));
                        (old.routes.clone(), state)
                    }
                }
            }
        };
        report.routes_changed = !Arc::ptr_eq(&routes, &old.routes);

        // 4. Keep removed versions the routes still use; drop the rest.
        let uses = routes.uses();
        for (model, vs) in removed {
            for (version, loaded) in vs {
                if uses.get(model.as_str()).is_some_and(|u| u.contains_key(&version)) {
                    let model = model.clone();
                    tracing::warn!(model = %model, version = %version, "artifact removed but still routed; kept loaded");
                    statuses.push(loaded_status(&loaded, ArtifactState::KeptAfterRemoval));
                    versions.entry(model).or_default().insert(version, loaded);
                } else {
                    report.unloaded.push(format!("{model} {version}"));
                }
            }
        }
        for s in &mut statuses {
            let served = !matches!(s.state, ArtifactState::Refused { .. });
            if let (Some(m), Some(v), true) = (&s.model, &s.version, served)
                && let Some(users) = Version::parse(v).ok().and_then(|v| uses.get(m.as_str())?.get(&v).cloned())
            {
                s.used_by = users;
            }
        }
        statuses.sort_by(|a, b| a.path.cmp(&b.path));

        // 5. Swap, if anything changed.
        let before: BTreeSet<(String, Version, Digest)> = flatten(&old.versions);
        let after: BTreeSet<(String, Version, Digest)> = flatten(&versions);
        report.loaded = after.difference(&before).map(|(m, v, _)| format!("{m} {v}")).collect();
        let changed = before != after || report.routes_changed || statuses != old.status.artifacts || routes_state != old.status.routes;
        report.changed = changed;
        if changed {
            let generation = shared.reloads.fetch_add(1, Ordering::SeqCst) + 1;
            let routed: BTreeSet<&str> = routes.models().collect();
            let unrouted = versions.keys().filter(|m| !routed.contains(m.as_str())).cloned().collect();
            let status = Status {
                store: shared.dir.clone(),
                generation,
                since: Timestamp::now().to_string(),
                artifacts: statuses,
                routes: routes_state,
                unrouted,
            };
            let shadows = routes
                .models()
                .filter_map(|m| {
                    let s = routes.model(m)?.shadow()?;
                    let plan = ShadowPlan {
                        loaded: versions.get(m)?.get(&s.version)?.clone(),
                        ledger: shared.ledger.shadow(m, &s.version),
                        sample: s.sample,
                        tolerance: s.tolerance,
                    };
                    Some((m.to_owned(), plan))
                })
                .collect();
            shared.current.store(Arc::new(Snapshot { generation, routes, versions, shadows, status }));
            for v in &report.loaded {
                tracing::info!(version = %v, generation, "serving");
            }
            for v in &report.unloaded {
                tracing::info!(version = %v, generation, "unloaded");
            }
            report.generation = generation;
        } else {
            report.generation = old.generation;
        }
        report.took = started.elapsed();
        Ok(report)
    }

    /// The gate: trust → parse → compile, start, contract → identity → checks.
    fn gate(&self, f: &layout::Found, model: &str, version: &Version, bytes: Vec<u8>, vouch: Option<&[u8]>) -> Result<Loaded, Refusal> {
        let shared = &*self.inner;
        let refuse = |stage, reason: String| Refusal { stage, reason };
        let digest = Digest::of(&bytes);
        let vouch = vouch.map(Vouch::from_bytes).transpose().map_err(|e| refuse(Stage::Trust, format!("its .vouch file: {e}")))?;
        let admission = shared.options.trust.admit(digest, vouch.as_ref()).map_err(|e| refuse(Stage::Trust, e.to_string()))?;
        let limit = shared.options.model.limits.artifact_bytes;
        let artifact = Artifact::from_bytes(bytes, limit).map_err(|e| refuse(Stage::Parse, e.to_string()))?;
        let checks = artifact.checks().map_err(|e| refuse(Stage::Parse, e.to_string()))?;
        let options = shared.options.model.clone();
        let loaded = match &shared.cache {
            Some(cache) => Model::load_cached(&shared.runtime, artifact, options, cache),
            None => Model::load_with(&shared.runtime, artifact, options),
        }
        .map_err(|e| refuse(Stage::Load, e.to_string()))?;
        let contract = loaded.contract();
        if contract.name != model || Version::parse(&contract.version).ok().as_ref() != Some(version) {
            return Err(refuse(
                Stage::Identity,
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
                let report = checking::run(&loaded, c).map_err(|e| refuse(Stage::Checks, format!("the checks could not run: {e}")))?;
                if !report.ok() {
                    let first = report.failures.first().map(|(i, f)| format!("; first: case {i}: {f}")).unwrap_or_default();
                    return Err(refuse(
                        Stage::Checks,
                        format!("{} of {} checks failed{first}", report.cases - report.passed, report.cases),
                    ));
                }
                Some(report)
            }
            None if shared.options.require_checks => {
                return Err(refuse(Stage::Checks, "it carries no checks, and this registry requires them".into()));
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
}

fn flatten(versions: &BTreeMap<String, BTreeMap<Version, Arc<Loaded>>>) -> BTreeSet<(String, Version, Digest)> {
    versions
        .iter()
        .flat_map(|(m, vs)| vs.iter().map(move |(v, l)| (m.clone(), v.clone(), l.model.digest())))
        .collect()
}

fn fingerprint(bytes: &[u8], vouch: Option<&[u8]>) -> Fingerprint {
    let mut h = Sha256::new();
    h.update(Sha256::digest(bytes));
    if let Some(s) = vouch {
        h.update(Sha256::digest(s));
    }
    h.finalize().into()
}

/// Reads an artifact (refusing it over the size cap without reading it all)
/// and its vouch file, if any.
fn read_artifact(path: &Path, limit: u64) -> Result<(Vec<u8>, Option<Vec<u8>>), Refusal> {
    let read = |reason: String| Refusal { stage: Stage::Read, reason };
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

fn loaded_status(loaded: &Loaded, state: ArtifactState) -> ArtifactStatus {
    let contract = loaded.model.contract();
    ArtifactStatus {
        path: loaded.rel.clone(),
        model: Some(contract.name.clone()),
        version: Some(contract.version.clone()),
        digest: Some(loaded.model.digest()),
        state,
        used_by: Vec::new(),
        admission: Some(loaded.admission.clone()),
        checks: Some(match &loaded.checks {
            Some(r) => format!("{}/{} passed", r.passed, r.cases),
            None => "none carried".into(),
        }),
        code: Some(loaded.model.code_source().clone()),
    }
}

fn refused_status(f: &layout::Found, id: Option<&(String, Version)>, digest: Option<Digest>, refusal: Refusal) -> ArtifactStatus {
    ArtifactStatus {
        path: f.rel.clone(),
        model: id.map(|(m, _)| m.clone()),
        version: id.map(|(_, v)| v.to_string()),
        digest,
        state: ArtifactState::Refused { refusal },
        used_by: Vec::new(),
        admission: None,
        checks: None,
        code: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_refusal_names_its_stage_in_words() {
        let r = Refusal { stage: Stage::Checks, reason: "3 of 40 checks failed".into() };
        assert_eq!(r.to_string(), "refused at its checks: 3 of 40 checks failed");
    }
}
