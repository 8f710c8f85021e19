//! The sandbox: one wasmtime engine per [`Runtime`], one store per model
//! instance, and every call armed with its limits.
//!
//! Models import nothing, so the linker is empty: a model can compute on
//! the bytes it is given and nothing else. The one exception is a model
//! loaded under a [`WasiPolicy`]: its linker has WASI 0.2 over an empty
//! world (see [`crate::sandbox::wasi`]). Each instance lives in its own `Store`,
//! which is dropped (never reused) after a trap or a limit hit.

pub mod codecache;
pub mod explain;
pub mod model;
pub mod pool;
pub mod prime;
pub mod verify;
pub mod wasi;

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use serde::Serialize;
use wasmtime::component::Linker;
use wasmtime::{Config, Engine, InstanceAllocationStrategy, PoolingAllocationConfig, ResourceLimiter, Store, Trap};

use crate::bindings::{Estimator, EstimatorPre, explaining};
use crate::contract::{Contract, Fault};
use crate::limits::{LimitHit, Limits, SettingProblem};
use crate::tool_error::ToolError;
use wasi::{WasiPolicy, WasiStart, WasiState};

/// The wasmtime release compiled into this binary, as wasmtime itself
/// reports it (`48.0.10`), whichever lock file the build used.
///
/// wasmtime exposes its full version only through the `Hash` of its
/// default [`wasmtime::ModuleVersionStrategy`], which hashes the version
/// text; this reads that text back. `unknown` if a later wasmtime hashes
/// something that is not a version.
pub fn wasmtime_version() -> &'static str {
    static VERSION: std::sync::LazyLock<String> = std::sync::LazyLock::new(|| {
        /// A hasher that keeps the bytes it is given.
        struct Kept(Vec<u8>);
        impl std::hash::Hasher for Kept {
            fn finish(&self) -> u64 {
                0
            }
            fn write(&mut self, bytes: &[u8]) {
                self.0.extend_from_slice(bytes);
            }
        }
        let mut kept = Kept(Vec::new());
        std::hash::Hash::hash(&wasmtime::ModuleVersionStrategy::WasmtimeVersion, &mut kept);
        // `str` hashes as its bytes and a 0xff terminator.
        let text = kept.0.strip_suffix(&[0xff]).and_then(|b| std::str::from_utf8(b).ok()).unwrap_or("");
        let major = wasmtime::ModuleVersionStrategy::WasmtimeVersion.as_str().to_owned();
        let looks_right = text.split('.').count() >= 3
            && text.split(['.', '-', '+']).next() == Some(major.as_str())
            && text.chars().all(|c| c.is_ascii_alphanumeric() || ".-+".contains(c));
        if looks_right { text.to_owned() } else { "unknown".to_owned() }
    });
    &VERSION
}

/// What a guest's `score` returned, and the fuel the call used (when fuel is on).
type GuestAnswer = (Result<Vec<f64>, Fault>, Option<u64>);

/// What a guest's `contributions` returned.
pub(crate) type GuestExplanation = Result<explaining::Contributions, Fault>;

/// Bytes of each instance slot's memory kept resident between instances.
const KEEP_RESIDENT: usize = 1 << 20;

/// How often the runtime's clock ticks; deadlines are exact to one tick.
pub const TICK: Duration = Duration::from_millis(1);

/// Engine-wide settings, fixed when a [`Runtime`] is created.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct RuntimeConfig {
    /// Meter fuel (WebAssembly instructions) so models can have a fuel
    /// limit. Metering slows guest code (wasmtime's own figures put it at
    /// about twice the cost of the epoch checks); off by default.
    pub fuel: bool,
    /// Pre-reserve instance slots (the pooling allocator): fresh instances
    /// start several times faster. On by default; if the system refuses
    /// the reservation the runtime falls back to on-demand allocation.
    pub pooling: bool,
    /// Most model instances alive at once across all models (pooling only).
    /// Default 256.
    pub max_instances: u32,
    /// Freed instance slots kept warm (their first pages resident) for the
    /// next instance of the same model (pooling only). More makes fresh
    /// instances of many models start faster; fewer keeps the resident
    /// memory of a long-running host that loads and unloads versions flat.
    /// Default 8.
    pub warm_slots: u32,
    /// Largest memory cap any model may be given, in bytes. Default 1 GiB.
    pub max_memory_bytes: u64,
    /// Largest table cap any model may be given, in elements. Default 100 000.
    pub max_table_elements: u64,
    /// Stack a model may use, in bytes. Default 512 KiB.
    pub stack_bytes: usize,
    /// Replace every NaN a float operation produces with the one canonical
    /// NaN, so results are the same bits on every machine. On by default;
    /// costs about 30 % of float-heavy scoring (see BENCHMARKS.md).
    pub canonical_nans: bool,
}

impl RuntimeConfig {
    /// Refuses settings no runtime could serve a model with: no instance
    /// slots, a memory cap under one WebAssembly page, no stack, no warm
    /// slot budget larger than the slots.
    ///
    /// # Errors
    /// [`RuntimeConfigError`] listing a [`SettingProblem`] for each field.
    pub fn check(&self) -> Result<(), RuntimeConfigError> {
        let mut problems = Vec::new();
        let mut problem = |field, value: String, allowed| problems.push(SettingProblem { field, value, allowed });
        if self.max_instances == 0 {
            problem("max_instances", "0".into(), "no model could start an instance; give at least 1");
        }
        if self.warm_slots > self.max_instances {
            problem("warm_slots", self.warm_slots.to_string(), "at most max_instances: only that many slots exist");
        }
        if self.max_memory_bytes < 65_536 {
            problem("max_memory_bytes", self.max_memory_bytes.to_string(), "one WebAssembly page (65536) is the least");
        }
        if self.stack_bytes == 0 {
            problem("stack_bytes", "0".into(), "no call could run; give the stack some bytes (default 512 KiB)");
        }
        if problems.is_empty() { Ok(()) } else { Err(RuntimeConfigError { problems }) }
    }
}

/// Settings refused by [`RuntimeConfig::check`]: every field out of range.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("runtime settings refused: {}", .problems.iter().map(ToString::to_string).collect::<Vec<_>>().join("; "))]
#[non_exhaustive]
pub struct RuntimeConfigError {
    /// Each field out of range.
    pub problems: Vec<SettingProblem>,
}

/// How a runtime gets memory for model instances.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum Allocator {
    /// Slots reserved up front (`RuntimeConfig::pooling`): fresh instances
    /// start several times faster.
    Pooling,
    /// Memory mapped when each instance starts.
    OnDemand {
        /// Why not pooling: it was turned off, or the system refused the
        /// reservation the settings ask for (with the figures).
        reason: String,
    },
}

impl std::fmt::Display for Allocator {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Allocator::Pooling => f.write_str("pooling (instance slots reserved up front)"),
            Allocator::OnDemand { reason } => write!(f, "on demand: {reason}"),
        }
    }
}

impl Default for RuntimeConfig {
    fn default() -> Self {
        RuntimeConfig {
            fuel: false,
            pooling: true,
            max_instances: 256,
            warm_slots: 8,
            max_memory_bytes: 1 << 30,
            max_table_elements: 100_000,
            stack_bytes: 512 << 10,
            canonical_nans: true,
        }
    }
}

/// Why the runtime could not start.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum RuntimeError {
    /// wasmtime cannot build an engine with these settings on this host.
    #[error("cannot start the WebAssembly engine: {0}")]
    Engine(ToolError),
    /// The settings cannot mean what they say (each field named).
    #[error(transparent)]
    Config(#[from] RuntimeConfigError),
    /// The thread that ticks deadlines cannot be started.
    #[error("cannot start the clock thread: {0}")]
    Clock(std::io::Error),
}

/// What the sandbox reports when a call does not return normally.
#[derive(Clone, Debug, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum SandboxError {
    /// A limit stopped the call.
    #[error("{0}")]
    Limit(LimitHit),
    /// The model trapped (`unreachable`, a bad memory access, a panic…).
    #[error("the model trapped: {message}")]
    Trap {
        /// What wasmtime reported.
        message: String,
    },
}

/// The engine that compiles and runs models, with its clock. Cheap to clone;
/// share one per process.
#[derive(Clone)]
pub struct Runtime {
    inner: Arc<RuntimeInner>,
}

struct RuntimeInner {
    engine: Engine,
    config: RuntimeConfig,
    allocator: Allocator,
    stop: Arc<AtomicBool>,
    ticker: Option<JoinHandle<()>>,
}

impl Drop for RuntimeInner {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.ticker.take() {
            let _ = t.join();
        }
    }
}

impl std::fmt::Debug for Runtime {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Runtime").field("config", &self.inner.config).field("allocator", &self.inner.allocator).finish()
    }
}

impl Runtime {
    /// A runtime with the default [`RuntimeConfig`].
    ///
    /// # Errors
    /// [`RuntimeError::Engine`] when wasmtime cannot build an engine on this
    /// host; [`RuntimeError::Clock`] when the clock thread cannot start.
    pub fn new() -> Result<Self, RuntimeError> {
        Self::with_config(RuntimeConfig::default())
    }

    /// A runtime with the given settings.
    ///
    /// When the settings ask for pooling and the system refuses the
    /// reservation (`max_instances` slots of `max_memory_bytes` each, plus
    /// guard pages, must fit the address space), the runtime allocates on
    /// demand instead and [`Runtime::allocator`] says why.
    ///
    /// # Errors
    /// [`RuntimeError::Config`] naming each setting that cannot mean what
    /// it says ([`RuntimeConfig::check`]); [`RuntimeError::Engine`] when
    /// wasmtime cannot build an engine with these settings on this host;
    /// [`RuntimeError::Clock`] when the clock thread cannot start.
    pub fn with_config(config: RuntimeConfig) -> Result<Self, RuntimeError> {
        config.check()?;
        let pooled = match config.pooling {
            true => Engine::new(&engine_config(&config, true)).map_err(|e| {
                let reserve = u128::from(config.max_instances) * u128::from(config.max_memory_bytes);
                format!(
                    "the system refused to reserve {} instance slots of {} bytes ({} GiB in all, RuntimeConfig::max_instances × max_memory_bytes): {}",
                    config.max_instances,
                    config.max_memory_bytes,
                    reserve >> 30,
                    ToolError::from(e)
                )
            }),
            false => Err("pooling is off (RuntimeConfig::pooling)".to_owned()),
        };
        let (engine, allocator) = match pooled {
            Ok(engine) => (engine, Allocator::Pooling),
            Err(reason) => (
                Engine::new(&engine_config(&config, false)).map_err(|e| RuntimeError::Engine(e.into()))?,
                Allocator::OnDemand { reason },
            ),
        };
        let stop = Arc::new(AtomicBool::new(false));
        let ticker = {
            let engine = engine.clone();
            let stop = stop.clone();
            std::thread::Builder::new()
                .name("paddock-clock".into())
                .spawn(move || {
                    while !stop.load(Ordering::Relaxed) {
                        std::thread::sleep(TICK);
                        engine.increment_epoch();
                    }
                })
                .map_err(RuntimeError::Clock)?
        };
        Ok(Runtime { inner: Arc::new(RuntimeInner { engine, config, allocator, stop, ticker: Some(ticker) }) })
    }

    /// The wasmtime engine.
    pub fn engine(&self) -> &Engine {
        &self.inner.engine
    }

    /// The settings this runtime was created with.
    pub fn config(&self) -> &RuntimeConfig {
        &self.inner.config
    }

    /// Whether instance slots are pre-reserved (the pooling allocator is in use).
    pub fn pooled(&self) -> bool {
        self.inner.allocator == Allocator::Pooling
    }

    /// How this runtime allocates instances, and why not pooling when not.
    pub fn allocator(&self) -> &Allocator {
        &self.inner.allocator
    }

    /// Pre-resolves a compiled component against the empty linker, or
    /// against WASI over an empty world when a policy is given.
    pub(crate) fn prepare(
        &self,
        component: &wasmtime::component::Component,
        wasi: Option<&WasiPolicy>,
    ) -> Result<EstimatorPre<State>, ToolError> {
        let mut linker = Linker::<State>::new(self.engine());
        if wasi.is_some() {
            wasi::link(&mut linker)?;
        }
        let pre = linker.instantiate_pre(component)?;
        Ok(EstimatorPre::new(pre)?)
    }
}

/// Makes the copy-on-write images every instance of `component` starts
/// from, before the first instance needs them.
///
/// On Linux each image is a sealed memfd. Sealing it fails with `EBUSY`
/// while the kernel still holds a transient reference to a page just
/// written (seen under load on a busy 2-core machine), so a failure is
/// tried again a few times, pausing a little longer each time, before it
/// is reported.
///
/// # Errors
/// wasmtime's last error when every attempt failed.
pub(crate) fn make_memory_images(component: &wasmtime::component::Component) -> Result<(), ToolError> {
    const ATTEMPTS: u32 = 5;
    let mut attempt = 1;
    loop {
        match component.initialize_copy_on_write_image() {
            Ok(()) => return Ok(()),
            Err(e) if attempt == ATTEMPTS => return Err(e.into()),
            Err(_) => {
                std::thread::sleep(Duration::from_millis(10 << attempt));
                attempt += 1;
            }
        }
    }
}

fn engine_config(rc: &RuntimeConfig, pooling: bool) -> Config {
    let mut c = Config::new();
    c.epoch_interruption(true);
    c.consume_fuel(rc.fuel);
    // Same bits on every run and every machine.
    c.cranelift_nan_canonicalization(rc.canonical_nans);
    c.relaxed_simd_deterministic(true);
    c.max_wasm_stack(rc.stack_bytes);
    if pooling {
        let mut p = PoolingAllocationConfig::default();
        p.total_component_instances(rc.max_instances)
            .total_core_instances(rc.max_instances)
            .total_memories(rc.max_instances)
            .total_tables(rc.max_instances)
            .max_memory_size(rc.max_memory_bytes as usize)
            .table_elements(rc.max_table_elements as usize);
        // Reset the first pages of a freed slot with memset rather than
        // returning them to the kernel: a fresh instance then starts without
        // page faults or TLB shootdowns (measured: 26 µs → 16 µs per fresh
        // single-row call). Costs up to this much resident memory per slot.
        p.linear_memory_keep_resident(KEEP_RESIDENT).table_keep_resident(KEEP_RESIDENT);
        // Where the kernel can say which pages an instance dirtied (Linux
        // 6.7 and later), reset only those, and keep the rest mapped: a
        // primed 200-tree ensemble then starts without faulting in its
        // nodes again (measured, fresh single-row call: 103 µs → 26 µs; a
        // small linear model pays the scan, 5.0 µs → 6.3 µs).
        p.pagemap_scan(wasmtime::Enabled::Auto);
        // Bounds the resident memory those kept pages add up to.
        p.max_unused_warm_slots(rc.warm_slots);
        c.allocation_strategy(InstanceAllocationStrategy::Pooling(p));
    }
    c
}

/// What a store carries: the limiter, the peak memory it has seen, and
/// the WASI world when the model was loaded under a policy.
pub(crate) struct State {
    memory_cap: u64,
    table_cap: u64,
    peak_memory: u64,
    /// Deadline and fuel of the call under way, for error messages.
    deadline: Duration,
    fuel: Option<u64>,
    /// When the call under way was armed.
    armed: Instant,
    wasi: Option<WasiState>,
}

impl State {
    /// The WASI world of a store made with one.
    pub(crate) fn wasi_state(&self) -> Option<&WasiState> {
        self.wasi.as_ref()
    }
}

impl wasmtime_wasi::WasiView for State {
    fn ctx(&mut self) -> wasmtime_wasi::WasiCtxView<'_> {
        wasi::WasiHost::wasi(self).view()
    }
}

impl wasi::WasiHost for State {
    fn wasi(&mut self) -> &mut WasiState {
        // WASI is linked only for models loaded with a policy, and their
        // stores always carry the state (`Instance::start`).
        self.wasi.as_mut().expect("WASI functions are linked only for stores that carry WASI state")
    }
    fn call_ends(&self) -> Instant {
        self.armed + self.deadline
    }
    fn deadline(&self) -> Duration {
        self.deadline
    }
}

impl ResourceLimiter for State {
    fn memory_growing(&mut self, _current: usize, desired: usize, _maximum: Option<usize>) -> wasmtime::Result<bool> {
        let desired = desired as u64;
        if desired > self.memory_cap {
            return Err(wasmtime::Error::new(LimitHit::Memory { limit: self.memory_cap, requested: desired }));
        }
        self.peak_memory = self.peak_memory.max(desired);
        Ok(true)
    }

    fn table_growing(&mut self, _current: usize, desired: usize, _maximum: Option<usize>) -> wasmtime::Result<bool> {
        let desired = desired as u64;
        if desired > self.table_cap {
            return Err(wasmtime::Error::new(LimitHit::Table { limit: self.table_cap, requested: desired }));
        }
        Ok(true)
    }
}

/// One live model instance in its own store.
pub(crate) struct Instance {
    store: Store<State>,
    api: Estimator,
    /// The component's `contributions` export (paddock:model 0.2.0), if it has one.
    contributions: Option<wasmtime::component::Func>,
    /// Names the model in what it prints (WASI only).
    who: Arc<str>,
}

/// Where in an instance's start-up something went wrong.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum StartStep {
    /// Creating the instance (memory, tables, start function).
    Instantiate,
    /// The model's `init`.
    Init,
    /// The model's `describe`.
    Describe,
}

impl std::fmt::Display for StartStep {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            StartStep::Instantiate => "instantiate",
            StartStep::Init => "init",
            StartStep::Describe => "describe",
        })
    }
}

/// Why a new instance could not start.
#[derive(Clone, Debug, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum StartError {
    /// The sandbox stopped it at some stage.
    #[error("{stage}: {error}")]
    Sandbox {
        /// The stage.
        stage: StartStep,
        /// What stopped it.
        error: SandboxError,
    },
    /// The model's `init` refused its params.
    #[error("init refused the params: {0}")]
    Refused(String),
}

impl Instance {
    /// Instantiates and calls `init(params)` (unless `init` is `None`: a
    /// primed component starts initialized) under the init deadline, then
    /// (when `describe` is set) `describe()`, and returns the instance with
    /// the contract it declared.
    ///
    /// `wasi` gives the instance an empty WASI world (the model must have
    /// been prepared with the same policy), started where a primed
    /// snapshot's `init` left it; `who` names it in the log.
    pub(crate) fn start(
        runtime: &Runtime,
        pre: &EstimatorPre<State>,
        limits: &Limits,
        init: Option<&[u8]>,
        describe: bool,
        wasi: Option<&WasiStart>,
        who: &Arc<str>,
    ) -> Result<(Instance, Option<Contract>), StartError> {
        let mut store = init_store(runtime, limits, wasi);
        let started = Self::init(&mut store, runtime, pre, init, describe);
        drain(&store, who);
        let (api, contributions, contract) = started?;
        Ok((Instance { store, api, contributions, who: who.clone() }, contract))
    }

    /// The start-up calls of [`Instance::start`], on an armed store.
    fn init(
        store: &mut Store<State>,
        runtime: &Runtime,
        pre: &EstimatorPre<State>,
        init: Option<&[u8]>,
        describe: bool,
    ) -> Result<(Estimator, Option<wasmtime::component::Func>, Option<Contract>), StartError> {
        let fail = |stage, store: &Store<State>, e| StartError::Sandbox { stage, error: classify(e, runtime, store) };
        let instance =
            pre.instance_pre().instantiate(&mut *store).map_err(|e| fail(StartStep::Instantiate, store, e))?;
        let api = Estimator::new(&mut *store, &instance).map_err(|e| fail(StartStep::Instantiate, store, e))?;
        let contributions = instance.get_func(&mut *store, "contributions");
        if let Some(params) = init {
            match api.call_init(&mut *store, params) {
                Ok(Ok(())) => {}
                Ok(Err(message)) => return Err(StartError::Refused(message)),
                Err(e) => return Err(fail(StartStep::Init, store, e)),
            }
        }
        let contract = match describe {
            true => Some(api.call_describe(&mut *store).map_err(|e| fail(StartStep::Describe, store, e))?),
            false => None,
        };
        Ok((api, contributions, contract))
    }

    /// Calls `describe()` again under the init deadline.
    pub(crate) fn describe(&mut self, runtime: &Runtime, limits: &Limits) -> Result<Contract, StartError> {
        arm(&mut self.store, runtime, limits.init_deadline, limits.init_fuel);
        let contract = self
            .api
            .call_describe(&mut self.store)
            .map_err(|e| StartError::Sandbox { stage: StartStep::Describe, error: classify(e, runtime, &self.store) });
        drain(&self.store, &self.who);
        contract
    }

    /// Calls `score(rows, cells)` under the call limits. Returns the model's
    /// answer and the fuel it used (when fuel is metered).
    pub(crate) fn score(
        &mut self,
        runtime: &Runtime,
        limits: &Limits,
        rows: u32,
        cells: &[f64],
    ) -> Result<GuestAnswer, SandboxError> {
        let budget = arm(&mut self.store, runtime, limits.deadline, limits.fuel);
        let answer = self.api.call_score(&mut self.store, rows, cells);
        drain(&self.store, &self.who);
        let answer = answer.map_err(|e| classify(e, runtime, &self.store))?;
        let used = budget.map(|b| b.saturating_sub(self.store.get_fuel().unwrap_or(0)));
        Ok((answer, used))
    }

    /// Calls `contributions(rows, cells)` under the call limits, when the
    /// component exports it (`None` when it does not).
    pub(crate) fn contributions(
        &mut self,
        runtime: &Runtime,
        limits: &Limits,
        rows: u32,
        cells: &[f64],
    ) -> Option<Result<GuestExplanation, SandboxError>> {
        let func = self.contributions?;
        type Answer = (Result<explaining::Contributions, explaining::ExplainFault>,);
        let typed = match func.typed::<(u32, &[f64]), Answer>(&self.store) {
            Ok(t) => t,
            Err(e) => return Some(Err(classify(e, runtime, &self.store))),
        };
        arm(&mut self.store, runtime, limits.deadline, limits.fuel);
        let answer = typed.call(&mut self.store, (rows, cells)).map(|(a,)| a);
        drain(&self.store, &self.who);
        Some(answer.map_err(|e| classify(e, runtime, &self.store)).map(|a| {
            a.map_err(|f| match f {
                explaining::ExplainFault::Rejected(m) => Fault::Rejected(m),
                explaining::ExplainFault::Failed(m) => Fault::Failed(m),
            })
        }))
    }

    /// Names the model in what it prints from now on.
    pub(crate) fn rename(&mut self, who: Arc<str>) {
        self.who = who;
    }

    /// The largest linear memory this instance has had, in bytes.
    pub(crate) fn peak_memory(&self) -> u64 {
        self.store.data().peak_memory
    }
}

/// A store for a new instance: its limiter, its WASI world when `wasi` is
/// given, armed with the init deadline and fuel.
pub(crate) fn init_store(runtime: &Runtime, limits: &Limits, wasi: Option<&WasiStart>) -> Store<State> {
    let state = State {
        memory_cap: limits.memory_bytes,
        table_cap: limits.table_elements,
        peak_memory: 0,
        deadline: limits.init_deadline,
        fuel: limits.init_fuel,
        armed: Instant::now(),
        wasi: wasi.map(WasiState::start),
    };
    let mut store = Store::new(runtime.engine(), state);
    store.limiter(|s| s as &mut dyn ResourceLimiter);
    arm(&mut store, runtime, limits.init_deadline, limits.init_fuel);
    store
}

/// Writes what a WASI model printed during the last call to the log.
fn drain(store: &Store<State>, who: &str) {
    if let Some(w) = &store.data().wasi {
        w.drain(who);
    }
}

/// Sets the deadline and fuel for the next call; returns the fuel budget.
pub(crate) fn arm(store: &mut Store<State>, runtime: &Runtime, deadline: Duration, fuel: Option<u64>) -> Option<u64> {
    store.data_mut().deadline = deadline;
    store.data_mut().fuel = fuel;
    if store.data().wasi.is_some() {
        store.data_mut().armed = Instant::now();
    }
    let ticks = deadline.as_nanos().div_ceil(TICK.as_nanos()) as u64 + 1;
    store.set_epoch_deadline(ticks);
    if runtime.config().fuel {
        let budget = fuel.unwrap_or(i64::MAX as u64);
        // Cannot fail: fuel metering is on.
        let _ = store.set_fuel(budget);
        Some(budget)
    } else {
        None
    }
}

/// Turns a wasmtime error into the limit it hit, or a trap.
fn classify(err: wasmtime::Error, runtime: &Runtime, store: &Store<State>) -> SandboxError {
    let armed = store.data();
    if let Some(hit) = err.downcast_ref::<LimitHit>() {
        return SandboxError::Limit(hit.clone());
    }
    match err.downcast_ref::<Trap>() {
        Some(Trap::Interrupt) => SandboxError::Limit(LimitHit::Deadline { limit: armed.deadline }),
        Some(Trap::OutOfFuel) => SandboxError::Limit(LimitHit::Fuel { limit: armed.fuel.unwrap_or(u64::MAX) }),
        Some(Trap::StackOverflow) => {
            SandboxError::Limit(LimitHit::Stack { limit: runtime.config().stack_bytes as u64 })
        }
        Some(trap) => SandboxError::Trap { message: trap.to_string() },
        None => SandboxError::Trap { message: format!("{err:#}") },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Settings no runtime could serve with are refused when the runtime is
    /// made, each field named, instead of every later load failing.
    #[test]
    fn impossible_runtime_settings_are_refused_naming_the_field() {
        let config = RuntimeConfig { max_instances: 0, stack_bytes: 0, ..RuntimeConfig::default() };
        let Err(RuntimeError::Config(e)) = Runtime::with_config(config) else { panic!("no instance slots accepted") };
        let fields: Vec<&str> = e.problems.iter().map(|p| p.field).collect();
        assert_eq!(fields, ["max_instances", "warm_slots", "stack_bytes"]);
        assert!(e.to_string().contains("max_instances is 0: no model could start an instance"), "{e}");
        let ok = Runtime::with_config(RuntimeConfig { pooling: false, ..RuntimeConfig::default() }).unwrap();
        assert_eq!(ok.allocator(), &Allocator::OnDemand { reason: "pooling is off (RuntimeConfig::pooling)".into() });
    }

    /// A memory cap whose slots do not fit the address space (256 × 1 TiB)
    /// turns pooling off, and the runtime says so with the figures.
    #[test]
    fn a_reservation_the_system_refuses_is_reported_not_silent() {
        let config = RuntimeConfig { max_memory_bytes: 1 << 40, ..RuntimeConfig::default() };
        let runtime = Runtime::with_config(config).unwrap();
        let Allocator::OnDemand { reason } = runtime.allocator() else { panic!("256 TiB reserved?") };
        assert!(reason.contains("refused to reserve 256 instance slots of 1099511627776 bytes"), "{reason}");
        assert!(!runtime.pooled());
    }

    /// The version the audit names is the one cargo resolved and compiled
    /// in: checked against `cargo tree`, while the host reads it from
    /// wasmtime itself (no build script, no lock file).
    #[test]
    fn the_wasmtime_version_is_the_one_cargo_resolved() {
        let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
        let out = std::process::Command::new(cargo)
            .args(["tree", "--offline", "-i", "wasmtime", "--depth", "0", "--prefix", "none", "--manifest-path"])
            .arg(concat!(env!("CARGO_MANIFEST_DIR"), "/Cargo.toml"))
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        let text = String::from_utf8(out.stdout).unwrap();
        assert_eq!(text.trim(), format!("wasmtime v{}", super::wasmtime_version()));
    }
}
