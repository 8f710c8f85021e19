//! A loaded model: one artifact, compiled once, served from a pool of warm
//! instances (or a fresh instance per call) to any number of threads.

use std::sync::Arc;
use std::time::Duration;

use crate::artifact::checks::{CaseFailure, CheckReport, Checks};
use crate::artifact::digest::Digest;
use crate::artifact::profile::Profile;
use crate::artifact::{Artifact, ArtifactError};
use crate::bindings::EstimatorPre;
use crate::contract::rows::{Row, RowError};
use crate::contract::schema::{OutputFault, Schema};
use crate::contract::{Contract, ContractError, Fault};
use crate::drift::{DriftReport, DriftWatch, DriftWindow, FallbackCause};
use crate::limits::{LimitHit, Limits, LimitsError};
use crate::sandbox::codecache::{self, CodeCache, CodeSource};
use crate::sandbox::explain::{ExplainError, Explanation};
use crate::sandbox::pool::Pool;
use crate::sandbox::prime::{self, PrimeError, PrimeState};
use crate::sandbox::wasi::{self, Carry, WasiPolicy, WasiStart};
use crate::sandbox::{self, Instance, Runtime, SandboxError, StartError, State};
use crate::tool_error::ToolError;
use serde::Serialize;
use wasmtime::component::Component;

/// Whether instances are reused between calls.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum Isolation {
    /// Keep instances warm and reuse them for later calls (fast). An
    /// instance that trapped, hit a limit or returned a bad answer is
    /// discarded, never reused. Default.
    #[default]
    Reuse,
    /// A fresh instance for every call, dropped afterwards: no state can
    /// pass from one call to the next. Several µs slower per call.
    FreshPerCall,
}

/// How to load a model.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ModelOptions {
    /// The limits that bind it.
    pub limits: Limits,
    /// Instance reuse.
    pub isolation: Isolation,
    /// Lets a model that imports WASI load into an empty WASI world. `None`
    /// (the default) refuses every import.
    pub wasi: Option<WasiPolicy>,
    /// Whether new instances start from a snapshot taken after `init`
    /// (see [`crate::sandbox::prime`]).
    pub priming: Priming,
    /// Load without running the checks the artifact carries. Off by
    /// default: every load runs them and refuses an artifact whose checks
    /// fail ([`LoadError::ChecksFailed`]), so a tampered or mispacked file
    /// never scores. Skip them only where something else runs them (and
    /// reports each case), as the audit does.
    pub skip_carried_checks: bool,
    /// Count live values against the training profile the artifact
    /// carries, over this window ([`Model::drift`]); `None` counts nothing.
    /// On by default (a default [`DriftWindow`]); an artifact without a profile
    /// counts nothing either way.
    pub drift: Option<DriftWindow>,
}

impl Default for ModelOptions {
    fn default() -> Self {
        ModelOptions {
            limits: Limits::default(),
            isolation: Isolation::default(),
            wasi: None,
            priming: Priming::default(),
            skip_carried_checks: false,
            drift: Some(DriftWindow::default()),
        }
    }
}

/// When to prime a model: snapshot it after `init(params)` at load so new
/// instances start initialized. A model whose start-up or `init` calls an
/// import (WASI) is not primed, and says why (see [`crate::sandbox::prime`]).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum Priming {
    /// Never: each new instance runs `init(params)`.
    Off,
    /// When the model is loaded with [`Isolation::FreshPerCall`], where a
    /// new instance serves every call. Default.
    #[default]
    WhenFresh,
    /// Always: also warm instances made after a trap start primed.
    Always,
}

/// The primed component and what its `init` took from its WASI world, when
/// `options` ask for one and it can be made (or is in `cache`); otherwise
/// what the model's [`PrimeState`] is.
fn primed_component(
    runtime: &Runtime,
    artifact: &Artifact,
    options: &ModelOptions,
    cache: Option<&CodeCache>,
) -> Result<(Component, CodeSource, Carry), PrimeState> {
    let wanted = match options.priming {
        Priming::Off => false,
        Priming::WhenFresh => options.isolation == Isolation::FreshPerCall,
        Priming::Always => true,
    };
    if !wanted {
        return Err(PrimeState::Off);
    }
    let unprimed = |e: PrimeError| PrimeState::Unprimed { reason: e.to_string() };
    let wasi = options.wasi.as_ref();
    let make = || prime::prime(runtime, artifact.bytes(), artifact.params(), &options.limits, wasi);
    match cache {
        Some(cache) => {
            if let Some(reason) = cache.unprimable(runtime, artifact, wasi) {
                return Err(PrimeState::Unprimed { reason });
            }
            cache.primed(runtime, artifact, wasi, make).map_err(|e| {
                if e.is_lasting() {
                    cache.remember_unprimable(runtime, artifact, wasi, &e.to_string());
                }
                unprimed(e)
            })
        }
        None => make().map(|(c, carry)| (c, CodeSource::Compiled, carry)).map_err(unprimed),
    }
}

/// The params a new instance's `init` is called with: none when it starts
/// from a primed component.
fn init_params<'a>(primed: &PrimeState, artifact: &'a Artifact) -> Option<&'a [u8]> {
    (*primed != PrimeState::Primed).then(|| artifact.params())
}

/// Why a model could not be loaded.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum LoadError {
    /// The artifact imports something other than WASI (named, with every
    /// WASI import too when no WASI policy is set); models may import
    /// nothing else.
    #[error("the artifact imports {}; a model may import nothing (but WASI, under a WASI policy)", list(.0))]
    Imports(Vec<String>),
    /// The artifact imports WASI interfaces and no WASI policy was given.
    #[error("the artifact imports {}; WASI imports load only under a WASI policy (`ModelOptions::wasi`)", list(.0))]
    WasiImports(Vec<String>),
    /// wasmtime refused to compile the component.
    #[error("the component does not compile: {0}")]
    Compile(ToolError),
    /// The component's exports do not match the `estimator` world.
    #[error("the component does not implement the paddock:model/estimator world: {0}")]
    World(ToolError),
    /// The images new instances start their memory from could not be made
    /// (on Linux: a sealed memfd per memory), even after a few attempts.
    #[error("the model's initial memory image could not be made: {0}")]
    MemoryImage(ToolError),
    /// The first instance failed to start.
    #[error("the model failed to start: {0}")]
    Start(StartError),
    /// The declared contract is invalid.
    #[error("{0}")]
    Contract(ContractError),
    /// `describe()` answered differently when asked twice.
    #[error("the model's contract changed between two calls to describe")]
    ContractUnstable,
    /// The options ask for something the runtime cannot give.
    #[error(transparent)]
    Options(#[from] OptionsError),
    /// The checks section the artifact carries cannot be read.
    #[error("the checks the artifact carries cannot be read: {0}")]
    ChecksUnreadable(ArtifactError),
    /// The training profile the artifact carries does not parse, or does
    /// not fit the model's contract (the field named).
    #[error("the training profile the artifact carries: {0}")]
    Profile(ArtifactError),
    /// The checks the artifact carries could not be scored at all (a trap
    /// or a limit hit).
    #[error("the checks the artifact carries could not run: {0}")]
    ChecksDidNotRun(ScoreError),
    /// Some of the checks the artifact carries fail: it does not compute
    /// what it was packed to compute.
    #[error("{} of {} checks the artifact carries fail{}", .report.cases - .report.passed, .report.cases,
        .report.failures.first().map(|(i, f)| format!("; first: case {i}: {f}")).unwrap_or_default())]
    ChecksFailed {
        /// Every case, with each failure.
        report: Box<CheckReport>,
    },
}

/// Model options a runtime cannot honour.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum OptionsError {
    /// Limits that cannot mean what they say (each field named).
    #[error(transparent)]
    Limits(#[from] LimitsError),
    /// A fuel limit on a runtime that does not meter fuel.
    #[error("a fuel limit needs a runtime that meters fuel (RuntimeConfig::fuel)")]
    FuelNotMetered,
    /// A memory cap above what the runtime reserves per instance.
    #[error("memory cap of {asked} bytes is above the runtime's maximum of {max} bytes")]
    MemoryOverRuntime {
        /// The cap asked for.
        asked: u64,
        /// The runtime's maximum (`RuntimeConfig::max_memory_bytes`).
        max: u64,
    },
    /// A table cap above what the runtime reserves per instance.
    #[error("table cap of {asked} elements is above the runtime's maximum of {max}")]
    TableOverRuntime {
        /// The cap asked for.
        asked: u64,
        /// The runtime's maximum (`RuntimeConfig::max_table_elements`).
        max: u64,
    },
}

/// Refuses limits the runtime cannot enforce.
fn check_options(runtime: &Runtime, limits: &Limits) -> Result<(), LoadError> {
    let rc = runtime.config();
    limits.check().map_err(OptionsError::Limits)?;
    if (limits.fuel.is_some() || limits.init_fuel.is_some()) && !rc.fuel {
        return Err(OptionsError::FuelNotMetered.into());
    }
    if limits.memory_bytes > rc.max_memory_bytes {
        return Err(OptionsError::MemoryOverRuntime { asked: limits.memory_bytes, max: rc.max_memory_bytes }.into());
    }
    if limits.table_elements > rc.max_table_elements {
        return Err(OptionsError::TableOverRuntime { asked: limits.table_elements, max: rc.max_table_elements }.into());
    }
    Ok(())
}

/// Refuses imports other than WASI, and WASI without a policy. Without a
/// policy every import is named; with one, those it does not cover.
fn check_imports(imports: &[String], policy: Option<&WasiPolicy>) -> Result<(), LoadError> {
    let other: Vec<String> = imports.iter().filter(|i| !wasi::is_wasi(i)).cloned().collect();
    if !other.is_empty() {
        return Err(LoadError::Imports(if policy.is_some() { other } else { imports.to_vec() }));
    }
    if !imports.is_empty() && policy.is_none() {
        return Err(LoadError::WasiImports(imports.to_vec()));
    }
    Ok(())
}

fn invalid_rows(errors: &[RowError]) -> String {
    let mut rows: Vec<usize> = errors.iter().map(|e| e.row).collect();
    rows.dedup();
    let first = errors.first().map(ToString::to_string).unwrap_or_default();
    match (rows.len(), errors.len()) {
        (1, 1) => first,
        (1, n) => format!("{n} problems in row {}; first: {first}", rows[0]),
        (r, n) => format!("{n} problems in {r} rows; first: {first}"),
    }
}

fn list(names: &[String]) -> String {
    names.iter().map(|n| format!("`{n}`")).collect::<Vec<_>>().join(", ")
}

/// Why a call did not produce estimates.
#[derive(Debug, Clone, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum ScoreError {
    /// One or more rows break the contract; nothing entered the sandbox.
    #[error("{}", invalid_rows(.errors))]
    InvalidRows {
        /// Every invalid row.
        errors: Vec<RowError>,
    },
    /// Dense cells that do not make whole rows.
    #[error("{cells} cells do not make {rows} rows of {width} features")]
    Shape {
        /// Cells given.
        cells: usize,
        /// Rows claimed.
        rows: usize,
        /// Features per row.
        width: usize,
    },
    /// The call carried more rows than the model's limit.
    #[error("{0}")]
    TooManyRows(LimitHit),
    /// A limit stopped the call, or the model trapped.
    #[error("{0}")]
    Sandbox(SandboxError),
    /// A fresh instance for this call failed to start.
    #[error("a new instance failed to start: {0}")]
    Start(StartError),
    /// A new instance declared a different contract from the loaded one.
    #[error("a new instance declared a different contract from the one loaded")]
    ContractChanged,
    /// The model returned a fault.
    #[error("{0}")]
    Fault(Fault),
    /// The model's answer breaks the contract.
    #[error("the answer breaks the contract: {0}")]
    Output(OutputFault),
}

impl ScoreError {
    /// A short stable name for the kind of error, for metrics and logs.
    pub fn kind(&self) -> &'static str {
        match self {
            ScoreError::InvalidRows { .. } => "invalid_rows",
            ScoreError::Shape { .. } => "shape",
            ScoreError::TooManyRows(_) => "too_many_rows",
            ScoreError::Sandbox(SandboxError::Limit(_)) => "limit",
            ScoreError::Sandbox(SandboxError::Trap { .. }) => "trap",
            ScoreError::Start(_) => "start",
            ScoreError::ContractChanged => "contract_changed",
            ScoreError::Fault(_) => "fault",
            ScoreError::Output(_) => "output",
        }
    }

    /// Whether the request, not the model, is at fault: rows that break
    /// the contract, cells that do not make rows, too many rows. Nothing
    /// entered the sandbox.
    pub fn is_request_fault(&self) -> bool {
        matches!(self, ScoreError::InvalidRows { .. } | ScoreError::Shape { .. } | ScoreError::TooManyRows(_))
    }

    /// The same error with the rows it names renumbered by `f` (from the
    /// call's own numbering, 1 to n, to the caller's: a file's record
    /// numbers, a request's rows).
    #[must_use]
    pub fn renumber(self, f: impl Fn(usize) -> usize) -> Self {
        match self {
            ScoreError::Output(fault) => ScoreError::Output(fault.renumber(f)),
            ScoreError::InvalidRows { mut errors } => {
                for e in &mut errors {
                    e.row = f(e.row);
                }
                ScoreError::InvalidRows { errors }
            }
            other => other,
        }
    }

    /// The limit this error reports, if it is a limit hit.
    pub fn limit(&self) -> Option<&LimitHit> {
        match self {
            ScoreError::Sandbox(SandboxError::Limit(hit))
            | ScoreError::TooManyRows(hit)
            | ScoreError::Start(StartError::Sandbox { error: SandboxError::Limit(hit), .. }) => Some(hit),
            _ => None,
        }
    }
}

/// What one call cost.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
pub struct Usage {
    /// Rows scored.
    pub rows: usize,
    /// Wall time from taking an instance to checking the outputs
    /// (in JSON: `wall_us`, microseconds).
    #[serde(rename = "wall_us", serialize_with = "ser_micros")]
    #[cfg_attr(feature = "openapi", schema(value_type = f64))]
    pub wall: Duration,
    /// Fuel the call used, when the runtime meters fuel.
    pub fuel: Option<u64>,
    /// Whether the call started a new instance.
    pub fresh_instance: bool,
    /// Largest linear memory of the instance so far, in bytes.
    pub peak_memory_bytes: u64,
}

fn ser_micros<S: serde::Serializer>(d: &Duration, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_f64(d.as_secs_f64() * 1e6)
}

/// The estimates for one call: `rows × outputs` values, row-major, in the
/// contract's output order.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Estimates {
    values: Vec<f64>,
    outputs: usize,
    usage: Usage,
}

impl Estimates {
    /// How many rows were scored.
    pub fn row_count(&self) -> usize {
        self.values.len() / self.outputs
    }

    /// The output values of the scored row at `index` (from 0, over the
    /// rows scored), in contract order. A request's row *numbers* count
    /// from 1 over every row sent ([`Scored::scored`] maps one to the
    /// other).
    ///
    /// # Panics
    /// When `index` is not below [`Estimates::row_count`].
    pub fn values_at(&self, index: usize) -> &[f64] {
        &self.values[index * self.outputs..(index + 1) * self.outputs]
    }

    /// All values, row-major.
    pub fn values(&self) -> &[f64] {
        &self.values
    }

    /// What the call cost.
    pub fn usage(&self) -> &Usage {
        &self.usage
    }
}

/// The answer to rows of which some may break the contract.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Scored {
    /// Estimates of the valid rows, in the order given.
    pub estimates: Estimates,
    /// The number (from 1) of the request row behind each estimate row.
    pub scored: Vec<usize>,
    /// Every problem of the rows that broke the contract (none entered the
    /// sandbox), each naming its row.
    pub problems: Vec<RowError>,
}

/// A loaded model. `Send + Sync`: share it (it is cheap to clone) and call
/// it from any number of threads.
#[derive(Clone)]
pub struct Model {
    inner: Arc<Inner>,
}

struct Inner {
    runtime: Runtime,
    artifact: Artifact,
    pre: EstimatorPre<State>,
    schema: Schema,
    options: ModelOptions,
    code: CodeSource,
    primed: PrimeState,
    /// How each new instance's WASI world starts, for a model under a policy.
    wasi: Option<WasiStart>,
    idle: Pool<Instance>,
    who: Arc<str>,
    /// The report of the carried checks run at load, when they were.
    checks: std::sync::OnceLock<CheckReport>,
    /// The training profile the artifact carries, checked against the contract.
    profile: Option<Profile>,
    /// Live counts against the profile, once the carried checks have run.
    watch: std::sync::OnceLock<DriftWatch>,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model")
            .field("name", &self.contract().name)
            .field("version", &self.contract().version)
            .field("digest", &self.digest())
            .finish()
    }
}

impl Model {
    /// Loads a model with default options: size cap, refuse imports,
    /// compile, instantiate, `init(params)`, `describe()`, validate the
    /// contract, run the checks the artifact carries.
    ///
    /// # Errors
    /// See [`Model::load_with`].
    pub fn load(runtime: &Runtime, artifact: Artifact) -> Result<Model, LoadError> {
        Self::load_with(runtime, artifact, ModelOptions::default())
    }

    /// Loads a model with the given options.
    ///
    /// # Errors
    /// [`LoadError::Imports`]
    /// naming every import, [`LoadError::WasiImports`] when it imports WASI
    /// and no WASI policy is set, [`LoadError::Compile`] / [`LoadError::World`]
    /// for components wasmtime refuses, [`LoadError::Start`] when
    /// instantiation, `init` or `describe` trap, hit a limit or refuse the
    /// params, [`LoadError::Contract`] listing every problem with the
    /// declared contract, [`LoadError::ContractUnstable`] when a second
    /// `describe()` answers differently, [`LoadError::Options`] (an
    /// [`OptionsError`]) for limits the runtime cannot enforce;
    /// [`LoadError::ChecksUnreadable`], [`LoadError::ChecksDidNotRun`] or
    /// [`LoadError::ChecksFailed`] when the checks it carries cannot be
    /// read, cannot run or fail (unless
    /// [`ModelOptions::skip_carried_checks`]).
    pub fn load_with(runtime: &Runtime, artifact: Artifact, options: ModelOptions) -> Result<Model, LoadError> {
        Self::load_inner(runtime, artifact, options, None)
    }

    /// Loads a model as [`Model::load_with`] does, taking its compiled code
    /// from `cache` when the cache holds a sound entry for it, and writing
    /// the entry otherwise. [`Model::code_source`] says which happened.
    ///
    /// # Errors
    /// As [`Model::load_with`]; a broken or missing cache entry is never an
    /// error (the artifact is compiled instead).
    pub fn load_cached(
        runtime: &Runtime,
        artifact: Artifact,
        options: ModelOptions,
        cache: &CodeCache,
    ) -> Result<Model, LoadError> {
        Self::load_inner(runtime, artifact, options, Some(cache))
    }

    fn load_inner(
        runtime: &Runtime,
        artifact: Artifact,
        options: ModelOptions,
        cache: Option<&CodeCache>,
    ) -> Result<Model, LoadError> {
        let limits = &options.limits;
        check_imports(artifact.imports(), options.wasi.as_ref())?;
        check_options(runtime, limits)?;
        let (component, code, primed, carry) = match primed_component(runtime, &artifact, &options, cache) {
            Ok((component, code, carry)) => (component, code, PrimeState::Primed, carry),
            Err(state) => {
                let (component, code) = match cache {
                    Some(cache) => cache.component(runtime, &artifact),
                    None => codecache::compile(runtime, &artifact).map(|c| (c, CodeSource::Compiled)),
                }
                .map_err(LoadError::Compile)?;
                (component, code, state, Carry::default())
            }
        };
        let wasi = options.wasi.clone().map(|policy| WasiStart::new(policy, carry));
        let pre = runtime.prepare(&component, options.wasi.as_ref()).map_err(LoadError::World)?;
        sandbox::make_memory_images(&component).map_err(LoadError::MemoryImage)?;
        let who: Arc<str> = artifact.digest().to_string().into();
        let init = init_params(&primed, &artifact);
        let (mut first, contract) =
            Instance::start(runtime, &pre, limits, init, true, wasi.as_ref(), &who).map_err(LoadError::Start)?;
        let contract = contract.expect("describe was asked for");
        // A contract is a promise: it must not change from one call to the next.
        if first.describe(runtime, limits).map_err(LoadError::Start)? != contract {
            return Err(LoadError::ContractUnstable);
        }
        let schema = Schema::new(contract).map_err(LoadError::Contract)?;
        // What the model prints is logged under its name and version.
        let who: Arc<str> = format!("{}@{}", schema.contract().name, schema.contract().version).into();
        first.rename(who.clone());
        let idle = Pool::new(std::thread::available_parallelism().map_or(4, |n| n.get() * 2));
        if options.isolation == Isolation::Reuse {
            idle.put(first);
        }
        let carried = match options.skip_carried_checks {
            true => None,
            false => artifact.checks().map_err(LoadError::ChecksUnreadable)?,
        };
        let profile = artifact.profile().map_err(LoadError::Profile)?;
        if let Some(p) = &profile {
            p.check(schema.contract()).map_err(|e| LoadError::Profile(e.into()))?;
        }
        let model = Model {
            inner: Arc::new(Inner {
                who,
                runtime: runtime.clone(),
                artifact,
                pre,
                schema,
                options,
                code,
                primed,
                wasi,
                idle,
                checks: std::sync::OnceLock::new(),
                profile,
                watch: std::sync::OnceLock::new(),
            }),
        };
        if let Some(checks) = carried {
            let report = run_checks(&model, &checks).map_err(LoadError::ChecksDidNotRun)?;
            if !report.ok() {
                return Err(LoadError::ChecksFailed { report: Box::new(report) });
            }
            // Set once, here, before the model is returned.
            let _ = model.inner.checks.set(report);
        }
        // Counting starts after the checks: they are not live traffic.
        if let (Some(profile), Some(window)) = (&model.inner.profile, &model.inner.options.drift) {
            let _ = model.inner.watch.set(DriftWatch::new(profile, model.contract(), window.clone()));
        }
        Ok(model)
    }

    /// The training profile the artifact carries, checked against the
    /// contract at load; `None` when it carries none (drift is then
    /// unavailable, not zero).
    pub fn profile(&self) -> Option<&Profile> {
        self.inner.profile.as_ref()
    }

    /// How the live values scored since load (over the window of
    /// [`ModelOptions::drift`]) compare with the training profile the
    /// artifact carries; `None` when it carries none or counting is off:
    /// drift is then unavailable, not zero.
    pub fn drift(&self) -> Option<DriftReport> {
        self.inner.watch.get().map(DriftWatch::report)
    }

    /// Counts `n` values of `feature` in rows about to be scored that were
    /// a features plan's fallback for `cause`, so the drift report can tell
    /// a source that is down from a world that moved
    /// ([`DriftWatch::record_fallbacks`]); nothing when drift is not counted.
    pub fn count_fallbacks(&self, feature: &str, cause: FallbackCause, n: u64) {
        if let Some(watch) = self.inner.watch.get() {
            watch.record_fallbacks(feature, cause, n);
        }
    }

    /// The report of the checks the artifact carries, run when it was
    /// loaded; `None` when it carries none or the load skipped them
    /// ([`ModelOptions::skip_carried_checks`]).
    pub fn carried_checks(&self) -> Option<&CheckReport> {
        self.inner.checks.get()
    }

    /// Runs `checks` (the artifact's own or any others) against this model:
    /// every case's row through the contract and the sandbox, every output
    /// against its recorded value and the tolerance.
    ///
    /// # Errors
    /// [`ScoreError`] when the model fails to score the valid rows at all (a
    /// trap or limit hit); invalid rows and mismatches are reported in the
    /// [`CheckReport`], not as errors.
    pub fn run_checks(&self, checks: &Checks) -> Result<CheckReport, ScoreError> {
        run_checks(self, checks)
    }

    /// The contract the model declared.
    pub fn contract(&self) -> &Contract {
        self.inner.schema.contract()
    }

    /// The contract with its lookups: encode rows and check outputs with it.
    pub fn schema(&self) -> &Schema {
        &self.inner.schema
    }

    /// The artifact's identity.
    pub fn digest(&self) -> Digest {
        self.inner.artifact.digest()
    }

    /// The artifact the model was loaded from.
    pub fn artifact(&self) -> &Artifact {
        &self.inner.artifact
    }

    /// Where the model's compiled code came from.
    pub fn code_source(&self) -> &CodeSource {
        &self.inner.code
    }

    /// Whether new instances start from a primed component, and if one was
    /// asked for but could not be made, why.
    pub fn prime_state(&self) -> &PrimeState {
        &self.inner.primed
    }

    /// The options the model was loaded with.
    pub fn options(&self) -> &ModelOptions {
        &self.inner.options
    }

    /// Checks every row against the contract, then scores them in one call;
    /// all or nothing.
    ///
    /// # Errors
    /// [`ScoreError::InvalidRows`] listing every problem of every invalid
    /// row (nothing is scored), otherwise as [`Model::score_cells_unchecked`].
    pub fn score(&self, rows: &[Row]) -> Result<Estimates, ScoreError> {
        let (cells, problems) = self.encode(rows, None)?;
        if !problems.is_empty() {
            return Err(ScoreError::InvalidRows { errors: problems });
        }
        self.score_cells_unchecked(rows.len(), &cells)
    }

    /// Checks every row against the contract and scores the valid ones in
    /// one call: every valid row is answered, every problem of the others
    /// reported. Rows are numbered from 1 in the order given.
    ///
    /// # Errors
    /// [`ScoreError::InvalidRows`] when no row is valid; otherwise as
    /// [`Model::score_cells_unchecked`], with the rows an output fault names
    /// numbered as in `rows`.
    pub fn score_valid(&self, rows: &[Row]) -> Result<Scored, ScoreError> {
        let mut scored = Vec::with_capacity(rows.len());
        let (cells, problems) = self.encode(rows, Some(&mut scored))?;
        if scored.is_empty() && !rows.is_empty() {
            return Err(ScoreError::InvalidRows { errors: problems });
        }
        let estimates = self
            .score_cells_unchecked(scored.len(), &cells)
            .map_err(|e| e.renumber(|r| scored.get(r - 1).copied().unwrap_or(r)))?;
        Ok(Scored { estimates, scored, problems })
    }

    /// The cells of the valid rows and every problem of the others; the
    /// valid rows' numbers (from 1) go to `scored` when asked for.
    fn encode(
        &self,
        rows: &[Row],
        mut scored: Option<&mut Vec<usize>>,
    ) -> Result<(Vec<f64>, Vec<RowError>), ScoreError> {
        let schema = &self.inner.schema;
        self.check_row_count(rows.len())?;
        let mut cells = Vec::with_capacity(rows.len() * schema.width());
        let mut problems = Vec::new();
        for (i, row) in rows.iter().enumerate() {
            match schema.encode_row(i + 1, row, &mut cells) {
                Ok(()) => {
                    if let Some(scored) = scored.as_deref_mut() {
                        scored.push(i + 1);
                    }
                }
                Err(e) => problems.extend(e),
            }
        }
        Ok((cells, problems))
    }

    /// Scores rows already encoded as dense cells (row-major, contract
    /// order, NaN for absent). Skips the row checks: use it only with cells
    /// from [`Schema::encode_row`] or an equally careful encoder.
    ///
    /// # Errors
    /// [`ScoreError::Shape`] when `cells` is not `rows × features` long;
    /// [`ScoreError::TooManyRows`]; [`ScoreError::Start`] when a new instance
    /// fails to start; [`ScoreError::Sandbox`] for a limit hit or trap;
    /// [`ScoreError::Fault`] when the model declines; [`ScoreError::Output`]
    /// when its answer breaks the contract.
    pub fn score_cells_unchecked(&self, rows: usize, cells: &[f64]) -> Result<Estimates, ScoreError> {
        let inner = &*self.inner;
        let width = inner.schema.width();
        if cells.len() != rows * width {
            return Err(ScoreError::Shape { cells: cells.len(), rows, width });
        }
        self.check_row_count(rows)?;
        // The processor's cycle counter where it is steady (quanta falls back
        // to the system clock elsewhere): two readings of the system clock
        // were 8 % of a warm single-row call.
        let started = quanta::Instant::now();
        let (mut instance, fresh) = self.take()?;
        let limits = &inner.options.limits;
        let (answer, fuel) = instance.score(&inner.runtime, limits, rows as u32, cells).map_err(ScoreError::Sandbox)?;
        let values = match answer {
            Ok(values) => values,
            Err(fault) => {
                // A rejection is an ordinary answer; a failure may have left
                // the instance in a bad state, so it is not reused.
                if matches!(fault, Fault::Rejected(_)) {
                    self.give_back(instance);
                }
                return Err(ScoreError::Fault(fault));
            }
        };
        if let Err(fault) = inner.schema.check_outputs(rows, &values) {
            return Err(ScoreError::Output(fault));
        }
        let peak_memory_bytes = instance.peak_memory();
        self.give_back(instance);
        if let Some(watch) = inner.watch.get() {
            watch.record(rows, cells, &values);
        }
        let usage = Usage { rows, wall: started.elapsed(), fuel, fresh_instance: fresh, peak_memory_bytes };
        Ok(Estimates { values, outputs: inner.schema.outputs(), usage })
    }

    /// Per-row contributions for `rows`: for each row and output, how
    /// much each feature moved the output's margin away from the model's
    /// baseline, checked to add up to the margin before they are returned.
    /// Costs nothing unless called: scoring never computes them.
    ///
    /// # Errors
    /// [`ExplainError::Score`] for what stops [`Model::score`] (rows that
    /// break the contract, too many rows, a limit hit, a trap, a failure);
    /// [`ExplainError::NoExport`] when the component has no
    /// `contributions` export; [`ExplainError::Declined`] when the model
    /// says it cannot explain (trees without covers); [`ExplainError::Malformed`]
    /// or [`ExplainError::DoesNotAddUp`] when its answer is wrong.
    pub fn explain(&self, rows: &[Row]) -> Result<Explanation, ExplainError> {
        let (cells, problems) = self.encode(rows, None).map_err(ExplainError::Score)?;
        if !problems.is_empty() {
            return Err(ExplainError::Score(ScoreError::InvalidRows { errors: problems }));
        }
        self.explain_cells_unchecked(rows.len(), &cells)
    }

    /// As [`Model::explain`], for rows already encoded as dense cells (see
    /// [`Model::score_cells_unchecked`]: the row checks are skipped).
    ///
    /// # Errors
    /// As [`Model::explain`]; [`ScoreError::Shape`] (in
    /// [`ExplainError::Score`]) when `cells` is not `rows × features` long.
    pub fn explain_cells_unchecked(&self, rows: usize, cells: &[f64]) -> Result<Explanation, ExplainError> {
        let inner = &*self.inner;
        let width = inner.schema.width();
        if cells.len() != rows * width {
            return Err(ExplainError::Score(ScoreError::Shape { cells: cells.len(), rows, width }));
        }
        self.check_row_count(rows).map_err(ExplainError::Score)?;
        let contract = inner.schema.contract();
        let started = quanta::Instant::now();
        let (mut instance, fresh) = self.take().map_err(ExplainError::Score)?;
        let answer = match instance.contributions(&inner.runtime, &inner.options.limits, rows as u32, cells) {
            None => {
                self.give_back(instance);
                return Err(ExplainError::NoExport { model: contract.name.clone() });
            }
            Some(Err(e)) => return Err(ExplainError::Score(ScoreError::Sandbox(e))),
            Some(Ok(Err(Fault::Rejected(why)))) => {
                self.give_back(instance);
                return Err(ExplainError::Declined { model: contract.name.clone(), why });
            }
            Some(Ok(Err(fault))) => return Err(ExplainError::Score(ScoreError::Fault(fault))),
            Some(Ok(Ok(answer))) => answer,
        };
        let peak_memory_bytes = instance.peak_memory();
        self.give_back(instance);
        let usage = Usage { rows, wall: started.elapsed(), fuel: None, fresh_instance: fresh, peak_memory_bytes };
        Explanation::checked(answer, rows, contract, usage)
    }

    fn check_row_count(&self, rows: usize) -> Result<(), ScoreError> {
        let limit = self.inner.options.limits.rows_per_call;
        if rows > limit {
            return Err(ScoreError::TooManyRows(LimitHit::Rows { limit, actual: rows }));
        }
        Ok(())
    }

    /// An idle instance, or a new one. A new instance for the warm pool is
    /// checked to declare the same contract; a fresh per-call instance is
    /// not (it serves one call, and the host only ever uses the contract
    /// read at load).
    fn take(&self) -> Result<(Instance, bool), ScoreError> {
        let inner = &*self.inner;
        if let Some(instance) = inner.idle.take() {
            return Ok((instance, false));
        }
        let verify = inner.options.isolation == Isolation::Reuse;
        let options = &inner.options;
        let init = init_params(&inner.primed, &inner.artifact);
        let (instance, contract) =
            Instance::start(&inner.runtime, &inner.pre, &options.limits, init, verify, inner.wasi.as_ref(), &inner.who)
                .map_err(ScoreError::Start)?;
        if contract.is_some_and(|c| &c != inner.schema.contract()) {
            return Err(ScoreError::ContractChanged);
        }
        Ok((instance, true))
    }

    /// Returns a healthy instance to the pool when reuse is on and the pool
    /// has room; drops it otherwise.
    fn give_back(&self, instance: Instance) {
        let inner = &*self.inner;
        if inner.options.isolation == Isolation::FreshPerCall {
            return;
        }
        inner.idle.put(instance);
    }
}

/// Runs checks against a model: every case's row through the contract and
/// the sandbox, every output against its recorded value and the tolerance.
fn run_checks(model: &Model, checks: &Checks) -> Result<CheckReport, ScoreError> {
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
    // One case per call: each case is held to the limits of one call (a
    // per-call fuel budget or deadline sized for single rows must not fail
    // a load because the checks came in one batch).
    let chunk = 1;
    let width = schema.width();
    let outputs = &model.contract().outputs;
    for (batch, positions) in scored.chunks(chunk).enumerate() {
        let start = batch * chunk * width;
        let estimates = model.score_cells_unchecked(positions.len(), &cells[start..start + positions.len() * width])?;
        for (r, &case_index) in positions.iter().enumerate() {
            let case = &checks.cases[case_index];
            let mut failed = None;
            for (name, &expected) in &case.expect {
                let Some(k) = outputs.iter().position(|o| &o.name == name) else {
                    failed.get_or_insert(CaseFailure::UnknownOutput { output: name.clone() });
                    continue;
                };
                let actual = estimates.values_at(r)[k];
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
