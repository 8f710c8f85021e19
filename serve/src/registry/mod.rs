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

pub mod capture;
mod gate;
pub use gate::{Passed, check_version};
pub mod layout;
pub mod ledger;
pub(crate) mod limits_file;
pub mod metrics;
mod reload;
pub mod routes;
mod shadow;
mod status;
mod usage_file;
mod watch;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicU64;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use arc_swap::ArcSwap;
use jiff::Timestamp;
use semver::Version;
use serde::Serialize;

use crate::features::{Fetched, GatherError, VersionPlan};
use paddock_host::FallbackCause;
use paddock_host::artifact::digest::Digest;
use paddock_host::artifact::trust::TrustPolicy;
use paddock_host::contract::rows::{Row, RowError};
use paddock_host::sandbox::Runtime;
use paddock_host::sandbox::codecache::{CacheError, CodeCache};
use paddock_host::sandbox::explain::{ExplainError, Explanation};
use paddock_host::sandbox::model::{Estimates, Model, ModelOptions, ScoreError, Scored};

use gate::Loaded;
use reload::LastSeen;

pub use layout::{FEATURES_FILE, ROUTES_FILE, STATE_DIR, artifact_path};
pub use ledger::{SavedWall, ShadowUsage, UsageReport, VersionUsage, Wall};
pub use limits_file::LIMITS_FILE;
pub use routes::{Clock, ManualClock, Reason, RequestContext, Routes, RoutesError, SystemClock};
pub use status::{
    ArtifactState, ArtifactStatus, CaptureState, FeaturesState, GateStep, LimitsState, MirrorState, Refusal,
    RefusedFile, ReloadReport, RoutesState, ServerStatus, Status, SyncProblem, TableStatus,
};
pub use usage_file::{SavedUsage, usage_path};
pub use watch::Watcher;

/// How a registry loads and serves.
#[derive(Clone, Debug)]
pub struct RegistryOptions {
    /// Limits and isolation for every model version, unless `per_model`
    /// or `per_version` says otherwise.
    pub model: ModelOptions,
    /// Limits and isolation for every version of the named models, in
    /// place of `model`.
    pub per_model: BTreeMap<String, ModelOptions>,
    /// Limits and isolation for one version, in place of its model's.
    pub per_version: BTreeMap<(String, Version), ModelOptions>,
    /// Which artifacts may load.
    pub trust: TrustPolicy,
    /// Largest artifact file read, in bytes; larger ones are refused
    /// without being read. Default [`DEFAULT_SIZE_CAP`](paddock_host::artifact::DEFAULT_SIZE_CAP).
    pub size_cap: u64,
    /// Refuse artifacts that carry no checks. Off by default.
    pub require_checks: bool,
    /// Where the host keeps its state (code cache, usage file).
    /// Default: `<store>/.paddock`.
    pub state_dir: Option<PathBuf>,
    /// Keep compiled code on disk under the state directory. On by default.
    pub code_cache: bool,
    /// Where compiled code is kept, when not `STATE/code`: hosts on one
    /// machine (several servers, a server and its workers, a publisher)
    /// may share one directory and compile each artifact once. Entries are
    /// replaced by rename and checked when read, so sharing is safe.
    pub code_cache_dir: Option<PathBuf>,
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
    /// Capture a sample of the answered requests, with their answers, to
    /// files ([`capture`]). Off (`None`) by default.
    pub capture: Option<CaptureOptions>,
}

impl Default for RegistryOptions {
    fn default() -> Self {
        RegistryOptions {
            model: ModelOptions::default(),
            per_model: BTreeMap::new(),
            per_version: BTreeMap::new(),
            trust: TrustPolicy::default(),
            size_cap: paddock_host::artifact::DEFAULT_SIZE_CAP,
            require_checks: false,
            state_dir: None,
            code_cache: true,
            code_cache_dir: None,
            clock: Arc::new(SystemClock),
            shadow_queue: 1024,
            usage_flush: Some(Duration::from_secs(10)),
            capture: None,
        }
    }
}

impl RegistryOptions {
    /// The options a version loads with: its own in `per_version`, else its
    /// model's in `per_model`, else `model`. The store's `limits.toml`
    /// ([`LIMITS_FILE`]) then goes over these.
    pub fn model_options(&self, model: &str, version: &Version) -> &ModelOptions {
        self.per_version
            .get(&(model.to_owned(), version.clone()))
            .or_else(|| self.per_model.get(model))
            .unwrap_or(&self.model)
    }
}

/// Why a registry cannot open or reload at all. (A refused artifact or
/// routes file is not an error: it is reported in [`Status`].)
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum RegistryError {
    /// The store directory cannot be read.
    #[error("store {path}: {cause}")]
    Store {
        /// The directory.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// The code cache cannot be used.
    #[error(transparent)]
    Cache(#[from] CacheError),
    /// Another process keeps its state in this state directory.
    #[error(
        "{path} is held by {} (a serving host keeps its code cache and usage there); stop it, or give this one its own state directory (`RegistryOptions::state_dir`)",
        holder.map_or("another process".to_owned(), |p| format!("process {p}"))
    )]
    Locked {
        /// The lock file.
        path: PathBuf,
        /// The process id written in it, when readable.
        holder: Option<u32>,
    },
    /// The state directory keeps the usage of another store or another
    /// machine (a copied store brings its state directory along).
    #[error(
        "{} holds the usage of store {} on {host}, not this one: a copied store brings its state directory along. \
         Remove the file to start this store's usage at zero, or give this registry a state directory of its own \
         (`RegistryOptions::state_dir`)",
        .path.display(), .store.display()
    )]
    ForeignState {
        /// The usage file.
        path: PathBuf,
        /// The store it names.
        store: PathBuf,
        /// The machine it names.
        host: String,
    },
    /// The state directory or its lock file cannot be used.
    #[error("{path}: {cause}")]
    State {
        /// The directory or file.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// Capture cannot start: its share, its directory, or its thread.
    #[error(transparent)]
    Capture(#[from] CaptureError),
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
    /// No model of that name is loaded or routed.
    #[error("no model `{model}` is served ({})", served_list(.served))]
    UnknownModel {
        /// The name asked for.
        model: String,
        /// The models that are served.
        served: Vec<String>,
    },
    /// The model is loaded, but no route serves it: the store has no routes
    /// file, its routes file was refused, or it names no route for this
    /// model (`why` says which).
    #[error("model `{model}` is loaded ({}) but not routed: {why}", list_versions(.loaded))]
    NotRouted {
        /// The model.
        model: String,
        /// Its loaded versions.
        loaded: Vec<Version>,
        /// Why no route serves it.
        why: String,
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
    /// The request asked for contributions and the chosen version gave
    /// none: it cannot explain, or its explanation was at fault.
    #[error("{model} {version} ({reason}): {error}")]
    Explain {
        /// The model.
        model: String,
        /// The version that was asked.
        version: Version,
        /// Why that version.
        reason: Arc<Reason>,
        /// Why there are no contributions.
        error: ExplainError,
    },
}

fn served_list(served: &[String]) -> String {
    match served {
        [] => "the store routes no model".to_owned(),
        names => format!("served: {}", names.join(", ")),
    }
}

fn list_versions(versions: &[Version]) -> String {
    versions.iter().map(ToString::to_string).collect::<Vec<_>>().join(", ")
}

/// Why a loaded model has no route, from the state of the routes file.
fn not_routed_why(routes: &RoutesState, model: &str) -> String {
    match routes {
        RoutesState::Missing => format!("the store has no {ROUTES_FILE}"),
        RoutesState::Refused { problems } => format!("{ROUTES_FILE} was refused: {}", problems.join("; ")),
        RoutesState::PartlyTaken { models, problems } if models.iter().any(|m| m == model) => {
            let own: Vec<&str> = problems.iter().filter(|p| p.contains(model)).map(String::as_str).collect();
            let own = if own.is_empty() { problems.iter().map(String::as_str).collect() } else { own };
            format!("its routes in {ROUTES_FILE} were refused: {}", own.join("; "))
        }
        _ => format!("{ROUTES_FILE} has no [models.{model}] table"),
    }
}

impl RequestError {
    /// A short stable name for the kind of error, for metrics and logs.
    pub fn kind(&self) -> &'static str {
        match self {
            RequestError::UnknownModel { .. } => "unknown_model",
            RequestError::NotRouted { .. } => "not_routed",
            RequestError::NotLoaded { .. } => "not_loaded",
            RequestError::Score { error, .. } => error.kind(),
            RequestError::Explain { error, .. } => match error {
                ExplainError::Score(e) => e.kind(),
                ExplainError::NoExport { .. } | ExplainError::Declined { .. } => "cannot_explain",
                _ => "explanation_fault",
            },
        }
    }
}

/// One request to the registry.
#[derive(Clone, Copy, Debug)]
pub struct Request<'a> {
    /// The model's name.
    pub model: &'a str,
    /// Context for the routes (`region`, `site`…).
    pub context: &'a RequestContext,
    /// When the request happened, for time windows; `None` means now (the
    /// registry's clock).
    pub at: Option<Timestamp>,
    /// The rows to score.
    pub rows: &'a [Row],
    /// How much the answer says of the features looked up.
    pub lookups: Lookups,
    /// Whether the answer carries each scored row's contributions.
    pub contributions: bool,
}

impl<'a> Request<'a> {
    /// A request for `model`, routed and keyed by `context`, scoring `rows`
    /// now, its answer naming only the looked-up features that fell back.
    pub fn new(model: &'a str, context: &'a RequestContext, rows: &'a [Row]) -> Self {
        Request { model, context, at: None, rows, lookups: Lookups::Fallbacks, contributions: false }
    }

    /// The same request, its answer carrying each scored row's
    /// contributions ([`Answer::contributions`]); a model that cannot
    /// give them fails the request ([`RequestError::Explain`]).
    #[must_use]
    pub fn with_contributions(mut self) -> Self {
        self.contributions = true;
        self
    }

    /// The same request, happening at `at` (for time windows).
    #[must_use]
    pub fn at(mut self, at: Option<Timestamp>) -> Self {
        self.at = at;
        self
    }

    /// The same request, its answer saying where every looked-up feature came from.
    #[must_use]
    pub fn every_lookup(mut self) -> Self {
        self.lookups = Lookups::All;
        self
    }
}

pub use crate::features::Lookups;
pub use capture::{CaptureCounts, CaptureError, CaptureOptions};

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
    /// Per request row, the features looked up for it (all of them, or
    /// only those that fell back, as the request asked); empty when the
    /// model has no features plan.
    pub lookups: Vec<Vec<Fetched>>,
    /// When the request asked: each scored row's contributions, in the
    /// order of [`Answer::estimates`] (the surfaces write their own form).
    #[serde(skip)]
    pub contributions: Option<Explanation>,
}

impl Answer {
    /// Every request row in order: its outputs, or `None` when it broke the
    /// contract (see [`Answer::problems`]).
    pub fn rows(&self) -> impl Iterator<Item = Option<&[f64]>> {
        let mut next = self.scored.iter().copied().enumerate().peekable();
        (1..=self.requested).map(move |n| match next.peek() {
            Some(&(k, m)) if m == n => {
                next.next();
                Some(self.estimates.values_at(k))
            }
            _ => None,
        })
    }
}

/// A request's rows completed by the features plan.
struct Gathered {
    /// The rows that could be completed.
    rows: Vec<Row>,
    /// The request number (from 1) of each.
    numbers: Vec<usize>,
    /// The rows that could not, each naming why.
    problems: Vec<RowError>,
    /// Per request row, what was looked up.
    lookups: Vec<Vec<Fetched>>,
}

fn gather(plan: &VersionPlan, request: &Request<'_>, now: Timestamp) -> Gathered {
    let seconds = now.as_millisecond() as f64 / 1000.0;
    Gathered::of(plan.gather_rows(request.context, request.rows, seconds, request.lookups), request.rows.len())
}

/// As [`gather`], awaiting the sources.
async fn gather_async(plan: &VersionPlan, request: &Request<'_>, now: Timestamp) -> Gathered {
    let seconds = now.as_millisecond() as f64 / 1000.0;
    let rows = plan.gather_rows_async(request.context, request.rows, seconds, request.lookups).await;
    Gathered::of(rows, request.rows.len())
}

impl Gathered {
    /// The rows completed and the problems of those that could not be.
    fn of(results: Vec<Result<(Row, Vec<Fetched>), GatherError>>, rows: usize) -> Gathered {
        let mut g =
            Gathered { rows: Vec::with_capacity(rows), numbers: Vec::new(), problems: Vec::new(), lookups: Vec::new() };
        for (i, result) in results.into_iter().enumerate() {
            match result {
                Ok((row, fetched)) => {
                    g.rows.push(row);
                    g.numbers.push(i + 1);
                    g.lookups.push(fetched);
                }
                Err(e) => {
                    let (feature, value) = e.place();
                    g.problems.push(if matches!(e, GatherError::Unavailable { .. }) {
                        RowError::unavailable(i + 1, feature, e.to_string())
                    } else {
                        RowError::lookup(i + 1, feature, &value, e.to_string())
                    });
                    g.lookups.push(Vec::new());
                }
            }
        }
        g
    }
}

impl Gathered {
    /// Counts, for the model's drift report, the features of the `scored`
    /// rows (numbered among the gathered rows, from 1) that were the plan's
    /// fallback, by cause.
    fn count_fallbacks(&self, model: &paddock_host::Model, scored: &[usize]) {
        let mut counts: BTreeMap<(&str, FallbackCause), u64> = BTreeMap::new();
        for &n in scored {
            for fetched in self.lookups.get(n.wrapping_sub(1)).into_iter().flatten() {
                if let Some(cause) = fetched.outcome.fallback_cause() {
                    *counts.entry((fetched.feature.as_str(), cause)).or_default() += 1;
                }
            }
        }
        for ((feature, cause), n) in counts {
            model.count_fallbacks(feature, cause, n);
        }
    }

    /// The scoring result with rows numbered as the request numbered them,
    /// and the lookup problems among the others.
    fn renumber(&self, result: Result<Scored, ScoreError>) -> Result<Scored, ScoreError> {
        let number = |n: usize| self.numbers.get(n.wrapping_sub(1)).copied().unwrap_or(n);
        let merge = |mut problems: Vec<RowError>| {
            for p in &mut problems {
                p.row = number(p.row);
            }
            problems.extend(self.problems.iter().cloned());
            problems.sort_by_key(|p| p.row);
            problems
        };
        match result {
            Ok(mut scored) => {
                scored.scored = scored.scored.iter().map(|&n| number(n)).collect();
                scored.problems = merge(scored.problems);
                Ok(scored)
            }
            Err(ScoreError::InvalidRows { errors }) => Err(ScoreError::InvalidRows { errors: merge(errors) }),
            Err(e) => Err(e.renumber(number)),
        }
    }
}

/// A request routed and its features gathered ([`Registry::prepare`]),
/// ready to score on a thread that may block ([`Registry::score_prepared`]).
pub struct Prepared {
    routed: Routed,
    gathered: Option<Gathered>,
}

impl std::fmt::Debug for Prepared {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Prepared").field("version", &self.routed.version).finish_non_exhaustive()
    }
}

/// Where a request goes and what scoring it needs, read from one snapshot.
struct Routed {
    served: Arc<Loaded>,
    version: Version,
    reason: Arc<Reason>,
    generation: u64,
    /// The features plan of the version, if the store has one for it.
    plan: Option<Arc<VersionPlan>>,
    /// The shadow to score beside it, when this request is sampled.
    shadow: Option<(Arc<Loaded>, f64, Arc<ledger::ShadowLedger>)>,
    /// The request's time (its own, or the clock's).
    at: Timestamp,
}

/// What a request's scoring gave: the scored rows, and their
/// contributions when it asked.
type ScoredExplained = (Scored, Option<Result<Explanation, ExplainError>>);

/// Scores the rows (as gathered, when the version has a features plan) on
/// the served version, counting the call in flight, and numbers the result
/// as the request numbered its rows; when the request asks, explains the
/// rows as scored (completed by the plan) on the same version.
fn score_and_explain(
    served: &Loaded,
    request: &Request<'_>,
    gathered: Option<&Gathered>,
) -> Result<ScoredExplained, ScoreError> {
    let rows = gathered.map_or(request.rows, |g| &g.rows[..]);
    let in_flight = served.ledger.enter();
    let result = if rows.is_empty() && gathered.is_some() && !request.rows.is_empty() {
        Err(ScoreError::InvalidRows { errors: Vec::new() })
    } else {
        served.model.score_valid(rows)
    };
    // The rows scored, as scored (completed by the plan where it has one).
    let explained = match (&result, request.contributions) {
        (Ok(scored), true) => {
            let valid: Vec<Row> = scored.scored.iter().map(|&n| rows[n - 1].clone()).collect();
            Some(served.model.explain(&valid))
        }
        _ => None,
    };
    drop(in_flight);
    if let (Ok(scored), Some(g)) = (&result, gathered) {
        g.count_fallbacks(&served.model, &scored.scored);
    }
    let result = match gathered {
        None => result,
        Some(g) => g.renumber(result),
    };
    result.map(|scored| (scored, explained))
}

/// A sampled request's line for capture: every request row, completed by
/// the plan where it was, and each one's values or none.
fn taken(
    request: &Request<'_>,
    at: Timestamp,
    version: &Version,
    served: &Loaded,
    gathered: Option<&Gathered>,
    plan: Option<&VersionPlan>,
    scored: &Scored,
) -> capture::Taken {
    let mut rows = request.rows.to_vec();
    if let Some(g) = gathered {
        for (row, &n) in g.rows.iter().zip(&g.numbers) {
            rows[n - 1] = row.clone();
        }
    }
    // The scored rows are numbered as the request numbered them.
    let mut answers = vec![None; request.rows.len()];
    for (k, &n) in scored.scored.iter().enumerate() {
        if let Some(slot) = answers.get_mut(n.wrapping_sub(1)) {
            *slot = Some(scored.estimates.values_at(k).to_vec());
        }
    }
    capture::Taken {
        model: request.model.to_owned(),
        context: request.context.clone(),
        at,
        rows,
        version: version.clone(),
        digest: served.model.digest(),
        outputs: served.outputs.clone(),
        answers,
        private: plan.map(|p| p.private().clone()),
        queued_bytes: 0,
    }
}

/// One immutable view of what is served.
struct Snapshot {
    generation: u64,
    routes: Arc<Routes>,
    versions: BTreeMap<String, BTreeMap<Version, Arc<Loaded>>>,
    /// Per model with a shadow: everything a request needs, resolved once.
    shadows: BTreeMap<String, ShadowPlan>,
    /// The features plan, resolved per served version.
    features: Arc<FeatureSet>,
    status: Status,
}

/// The features plan resolved for each served version that has one.
#[derive(Default)]
struct FeatureSet {
    plans: BTreeMap<String, BTreeMap<Version, Arc<VersionPlan>>>,
    /// The sources serving, for their counters.
    sources: crate::features::Sources,
}

/// A model's shadow, resolved when the snapshot is built.
struct ShadowPlan {
    loaded: Arc<Loaded>,
    ledger: Arc<ledger::ShadowLedger>,
    sample: f64,
    tolerance: f64,
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
    last_seen: Mutex<LastSeen>,
    ledger: ledger::Ledger,
    shadows: shadow::Shadows,
    reloads: AtomicU64,
    /// Held while usage is kept (the state directory's lock).
    lock: Option<usage_file::StateLock>,
    /// Dropping it stops the flush thread.
    flush_stop: Mutex<Option<std::sync::mpsc::Sender<()>>>,
    /// Set when the store is a shared store's mirror.
    mirror: Mutex<Option<MirrorState>>,
    /// Captured traffic, when on.
    capture: Option<capture::Capture>,
}

impl Drop for Shared {
    fn drop(&mut self) {
        if self.lock.is_some()
            && let Err(e) = usage_file::save(&self.state_dir, &self.dir, &self.ledger)
        {
            tracing::warn!(error = %e, "cannot write the usage file");
        }
    }
}

impl std::fmt::Debug for Registry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Registry").field("store", &self.inner.dir).field("generation", &self.generation()).finish()
    }
}

impl Registry {
    /// Opens a store and loads it: every artifact through the gate, then
    /// the routes. Refusals do not make this fail; see [`Registry::status`].
    ///
    /// # Errors
    /// [`RegistryError::Store`] when the directory cannot be read,
    /// [`RegistryError::Cache`] when the code cache cannot be used,
    /// [`RegistryError::Locked`] when another process keeps its usage in the
    /// same state directory, [`RegistryError::ForeignState`] when its usage
    /// file belongs to another store or machine (a copied store),
    /// [`RegistryError::State`] when the state directory or its lock cannot
    /// be used.
    pub fn open(runtime: &Runtime, dir: &Path, options: RegistryOptions) -> Result<Registry, RegistryError> {
        let dir = dir.to_owned();
        std::fs::read_dir(&dir).map_err(|cause| RegistryError::Store { path: dir.clone(), cause })?;
        let state_dir = options.state_dir.clone().unwrap_or_else(|| dir.join(STATE_DIR));
        let lock = match options.usage_flush {
            Some(_) => Some(usage_file::StateLock::take(&state_dir)?),
            None => None,
        };
        let cache = match (&options.code_cache_dir, options.code_cache) {
            (_, false) => None,
            (Some(dir), true) => Some(CodeCache::open(dir)?),
            (None, true) => Some(CodeCache::open(&state_dir.join("code"))?),
        };
        let capture = options.capture.clone().map(capture::Capture::start).transpose()?;
        let ledger = ledger::Ledger::default();
        if lock.is_some() {
            usage_file::refuse_foreign(&state_dir, &dir)?;
            usage_file::merge(&state_dir, &ledger);
        }
        let empty = Snapshot {
            generation: 0,
            routes: Arc::new(Routes::empty()),
            versions: BTreeMap::new(),
            shadows: BTreeMap::new(),
            features: Arc::default(),
            status: Status {
                store: dir.clone(),
                generation: 0,
                since: Timestamp::now().to_string(),
                artifacts: Vec::new(),
                routes: RoutesState::Missing,
                limits: LimitsState::Missing,
                features: FeaturesState::Missing,
                unrouted: Vec::new(),
                mirror: None,
                capture: None,
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
                last_seen: Mutex::new(LastSeen::default()),
                ledger,
                reloads: AtomicU64::new(0),
                lock,
                flush_stop: Mutex::new(None),
                mirror: Mutex::new(None),
                capture,
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
            Err(e) => {
                tracing::warn!(error = %e, "cannot start the usage flush thread; usage is written at shutdown only")
            }
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
    /// picked and the [`ScoreError`] (invalid rows, limit hits, traps…);
    /// [`RequestError::NotLoaded`] if the routes named a version that is not
    /// loaded (never expected: routes are only taken when all are).
    pub fn score(&self, request: &Request<'_>) -> Result<Answer, RequestError> {
        let routed = self.pick(request)?;
        let gathered = routed.plan.as_deref().map(|plan| gather(plan, request, routed.at));
        let started = Instant::now();
        let result = score_and_explain(&routed.served, request, gathered.as_ref());
        self.account(request, routed, gathered, result, started)
    }

    /// The first half of [`Registry::score`], for a caller on an async
    /// runtime: picks the version and gathers the request's features,
    /// awaiting the sources without holding a thread. Score the result with
    /// [`Registry::score_prepared`] on a thread that may block.
    ///
    /// # Errors
    /// As [`Registry::score`] before scoring: the model is unknown, not
    /// routed, or its version not loaded.
    pub async fn prepare(&self, request: &Request<'_>) -> Result<Prepared, RequestError> {
        let routed = self.pick(request)?;
        let gathered = match routed.plan.as_deref() {
            Some(plan) => Some(gather_async(plan, request, routed.at).await),
            None => None,
        };
        Ok(Prepared { routed, gathered })
    }

    /// The second half of [`Registry::score`]: scores a request
    /// [`Registry::prepare`] made ready (the same request).
    ///
    /// # Errors
    /// As [`Registry::score`].
    pub fn score_prepared(&self, request: &Request<'_>, prepared: Prepared) -> Result<Answer, RequestError> {
        let Prepared { routed, gathered } = prepared;
        let started = Instant::now();
        let result = score_and_explain(&routed.served, request, gathered.as_ref());
        self.account(request, routed, gathered, result, started)
    }

    /// Whether requests for `model` look features up (its served versions
    /// have a features plan): what a surface asks before it lets a request
    /// wait on its sources.
    pub fn looks_up(&self, model: &str) -> bool {
        self.inner.current.load().features.plans.get(model).is_some_and(|v| !v.is_empty())
    }

    /// Picks the version a request goes to, and what scoring it needs,
    /// from one snapshot.
    fn pick(&self, request: &Request<'_>) -> Result<Routed, RequestError> {
        let shared = &*self.inner;
        let snapshot = shared.current.load();
        let Some(routes) = snapshot.routes.model(request.model) else {
            if let Some(loaded) = snapshot.versions.get(request.model).filter(|v| !v.is_empty()) {
                shared.ledger.record_rejected("not_routed");
                return Err(RequestError::NotRouted {
                    model: request.model.to_owned(),
                    loaded: loaded.keys().cloned().collect(),
                    why: not_routed_why(&snapshot.status.routes, request.model),
                });
            }
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
        let shadow = snapshot
            .shadows
            .get(request.model)
            .filter(|s| s.ledger.sampled(s.sample))
            .map(|s| (s.loaded.clone(), s.tolerance, s.ledger.clone()));
        Ok(Routed {
            plan: snapshot.features.plans.get(request.model).and_then(|v| v.get(route.version)).cloned(),
            version: route.version.clone(),
            reason: route.reason,
            generation: snapshot.generation,
            served,
            shadow,
            at,
        })
    }

    /// Records what a scoring cost or why it failed, hands the served rows
    /// to the shadow, and makes the answer.
    fn account(
        &self,
        request: &Request<'_>,
        routed: Routed,
        gathered: Option<Gathered>,
        result: Result<ScoredExplained, ScoreError>,
        started: Instant,
    ) -> Result<Answer, RequestError> {
        let Routed { served, version, reason, generation, shadow, plan, at } = routed;
        let (scored, explained) = match result {
            Ok(done) => done,
            Err(error) => {
                if error.is_request_fault() {
                    served.ledger.record_refused(request.rows.len(), error.kind());
                } else {
                    served.ledger.record_error(request.rows.len(), &error, started.elapsed());
                }
                return Err(RequestError::Score { model: request.model.to_owned(), version, reason, error });
            }
        };
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
            let answer = scored.estimates.clone();
            let job = shadow::Job { served: served.clone(), shadow, rows, answer, tolerance, ledger };
            self.inner.shadows.submit(job);
        }
        let contributions = match explained {
            None => None,
            Some(Ok(explanation)) => Some(explanation),
            Some(Err(error)) => {
                return Err(RequestError::Explain { model: request.model.to_owned(), version, reason, error });
            }
        };
        if let Some(capture) = &self.inner.capture
            && capture.samples()
        {
            capture.offer(taken(request, at, &version, &served, gathered.as_ref(), plan.as_deref(), &scored));
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
            lookups: gathered.map(|g| g.lookups).unwrap_or_default(),
            contributions,
        })
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
    pub fn route(
        &self,
        model: &str,
        context: &RequestContext,
        at: Option<Timestamp>,
    ) -> Option<(Version, Arc<Reason>)> {
        let snapshot = self.inner.current.load();
        let at = at.unwrap_or_else(|| self.inner.options.clock.now());
        let route = snapshot.routes.model(model)?.route(model, context, at);
        Some((route.version.clone(), route.reason))
    }

    /// The routes serving now.
    pub fn routes(&self) -> Arc<Routes> {
        self.inner.current.load().routes.clone()
    }

    /// What is served and what was refused.
    pub fn status(&self) -> Status {
        let current = self.inner.current.load();
        let mut status = current.status.clone();
        status.mirror = self.inner.mirror.lock().unwrap_or_else(|e| e.into_inner()).clone();
        // Drift is counted live: read now, not when the version loaded.
        for a in &mut status.artifacts {
            if let (Some(model), Some(version)) = (&a.model, &a.version)
                && let Some(loaded) = current.versions.get(model).and_then(|v| v.get(version))
                && Some(loaded.model.digest()) == a.digest
            {
                a.drift = loaded.model.drift();
            }
        }
        status.capture = self.inner.capture.as_ref().map(capture::Capture::state);
        status
    }

    /// Closes the capture file being written once every line queued before
    /// is in it, so what was captured so far can be read (a host does this
    /// as it stops); waits at most `timeout`. Says whether it was done;
    /// `false` too when capture is off.
    pub fn rotate_capture(&self, timeout: Duration) -> bool {
        self.inner.capture.as_ref().is_some_and(|c| c.rotate(timeout))
    }

    /// Records how the mirror this registry serves stands (what
    /// [`crate::shared`] calls as it syncs); [`Registry::status`] reports it.
    pub fn set_mirror_state(&self, state: MirrorState) {
        *self.inner.mirror.lock().unwrap_or_else(|e| e.into_inner()) = Some(state);
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

    /// What each feature source serving has done since the registry
    /// opened: lookups by outcome and, for Redis, round trips (not kept
    /// in the usage file).
    pub fn source_usage(&self) -> Vec<crate::features::SourceUsage> {
        self.inner.current.load().features.sources.usage()
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
}
