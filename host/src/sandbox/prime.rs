//! Primed components: a model's memories and globals as they stand after
//! `init(params)`, written back into its component as data, so that a new
//! instance starts already initialized and `init` is not run again.
//!
//! A fresh instance of a primed component is mapped copy-on-write from
//! that image by wasmtime, which is what makes a fresh instance per call
//! cheap: a 200-tree ensemble no longer decodes its nodes on every call.
//!
//! How: wasmtime's pre-initializer (`wasmtime-wizer`) instruments the
//! component so that its memories and globals can be read, paddock
//! instantiates that once in its own sandbox (same limits as a load) and
//! calls `init(params)`, and the pre-initializer writes what it reads back
//! into a copy of the original component. The artifact itself is never
//! changed: its digest stays the identity of what was signed, and the
//! primed component is derived from it at load (and kept in the code cache
//! under the artifact's digest).
//!
//! What a snapshot may capture: only what `init` computed from its params,
//! and what every new instance can be given again. While priming, every
//! import the component has answers with a trap, except, for a model
//! loaded under a WASI policy, the parts of WASI whose answers can be
//! carried: the (empty) environment, and under fixed clocks and randomness
//! the clocks' readings and the random streams (see
//! `sandbox::wasi::link_for_priming`). Every new instance of a primed
//! model then starts its WASI world where `init` left the priming one: the
//! monotonic clock at the reading it had reached, each random stream past
//! the draws `init` made. Its first call sees exactly what an unprimed
//! instance's first call would. A model whose start-up or `init` calls
//! anything else (prints, opens a file, waits, or reads a real clock or
//! real randomness, which a snapshot would freeze) is not primed, the
//! reason naming the import; it runs `init` on each new instance. Tables
//! are not captured: a component whose code mutates tables is refused by
//! the pre-initializer and loads unprimed.
//!
//! What this is not: a way to share state between calls. Each instance
//! starts from the same image; what a call writes is its own copy.

use std::future::Future;
use std::pin::pin;
use std::task::{Context, Poll, Waker};

use serde::Serialize;
use wasmtime::Store;
use wasmtime::component::{Component, Instance, Lift, Linker, WasmList};

use crate::bindings::Estimator;
use crate::limits::Limits;
use crate::sandbox::wasi::{Carry, WasiPolicy, WasiStart, WasiState};
use crate::sandbox::{Runtime, State};
use crate::tool_error::ToolError;

/// The pre-initializer and snapshot format a primed component was made
/// with: part of its code cache key.
pub(crate) const PRIMER: &str = "wasmtime-wizer 48.0.8, paddock-primed-v2";

/// Whether a model's new instances start from a primed component.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
#[serde(tag = "state", rename_all = "snake_case")]
#[non_exhaustive]
pub enum PrimeState {
    /// Not asked for: each new instance runs `init(params)`.
    Off,
    /// New instances start from the snapshot taken after `init`.
    Primed,
    /// Asked for but not possible; each new instance runs `init(params)`.
    Unprimed {
        /// Why.
        reason: String,
    },
}

/// Why a component could not be primed. The model still loads, unprimed.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum PrimeError {
    /// Starting the model or its `init` called an import (named): a
    /// snapshot could freeze the world outside its params into every
    /// instance.
    #[error("init calls {0}, outside its params")]
    Import(String),
    /// The pre-initializer cannot snapshot a component of this shape.
    #[error("the component cannot be snapshotted: {0}")]
    Shape(String),
    /// wasmtime refused the instrumented or the primed component.
    #[error("{0}")]
    Compile(String),
    /// The instrumented component failed to start, or `init` failed.
    #[error("init failed while priming: {0}")]
    Init(String),
    /// Reading a memory or global of the initialized instance failed.
    #[error("reading the initialized state failed: {0}")]
    Read(String),
}

impl PrimeError {
    /// Whether the same artifact would fail the same way on every attempt
    /// with this wasmtime: what it calls from `init`, or its shape. A
    /// failed `init` (a deadline on a busy machine, say) or a failed read
    /// may not recur.
    pub fn is_lasting(&self) -> bool {
        matches!(self, PrimeError::Import(_) | PrimeError::Shape(_))
    }
}

/// Makes and compiles the primed component of `component` (an artifact's
/// component bytes) with `params`, under the init limits of `limits` and,
/// for a model that imports WASI, in a world under `wasi`. Returns it with
/// what `init` took from that world, for every new instance's to start from.
///
/// # Errors
/// [`PrimeError`] when it cannot be done.
pub(crate) fn prime(
    runtime: &Runtime,
    component: &[u8],
    params: &[u8],
    limits: &Limits,
    wasi: Option<&WasiPolicy>,
) -> Result<(Component, Carry), PrimeError> {
    let compile = |bytes: &[u8]| {
        Component::new(runtime.engine(), bytes).map_err(|e| PrimeError::Compile(ToolError::from(e).to_string()))
    };
    let wizer = wasmtime_wizer::Wizer::new();
    let (cx, instrumented) = wizer.instrument_component(component).map_err(|e| PrimeError::Shape(format!("{e:#}")))?;
    let compiled = compile(&instrumented)?;
    // Every import traps but those whose answers a snapshot may keep: what
    // init reads must come from its params, or be carried to every instance.
    let mut linker = Linker::<State>::new(runtime.engine());
    let link = |e: wasmtime::Error| PrimeError::Compile(format!("{e:#}"));
    if let Some(policy) = wasi {
        let imports: Vec<String> =
            compiled.component_type().imports(runtime.engine()).map(|(name, _)| name.to_owned()).collect();
        crate::sandbox::wasi::link_for_priming(&mut linker, policy, &imports).map_err(link)?;
    }
    linker.define_unknown_imports_as_traps(&compiled).map_err(link)?;
    let pre = linker.instantiate_pre(&compiled).map_err(link)?;
    crate::sandbox::make_memory_images(&compiled).map_err(|e| PrimeError::Init(e.to_string()))?;
    let start = wasi.map(|policy| WasiStart::new(policy.clone(), Carry::default()));
    let mut store = crate::sandbox::init_store(runtime, limits, start.as_ref());
    let failed = |e: wasmtime::Error| match import_called(&e) {
        Some(name) => PrimeError::Import(name),
        None => PrimeError::Init(format!("{e:#}")),
    };
    let instance = pre.instantiate(&mut store).map_err(failed)?;
    let api = Estimator::new(&mut store, &instance).map_err(|e| PrimeError::Init(format!("{e:#}")))?;
    match api.call_init(&mut store, params) {
        Ok(Ok(())) => {}
        Ok(Err(refused)) => return Err(PrimeError::Init(format!("init refused the params: {refused}"))),
        Err(e) => return Err(failed(e)),
    }
    let carry = store.data().wasi_state().map(WasiState::carry).unwrap_or_default();
    // The reads get a deadline of their own.
    crate::sandbox::arm(&mut store, runtime, limits.init_deadline, limits.init_fuel);
    let mut access = Access { store: &mut store, instance, failed: None };
    let primed = at_once(wizer.snapshot_component(&cx, &mut access));
    if let Some(problem) = access.failed {
        return Err(PrimeError::Read(problem));
    }
    Ok((compile(&primed.map_err(|e| PrimeError::Shape(format!("{e:#}")))?)?, carry))
}

/// The import a trap of [`Linker::define_unknown_imports_as_traps`] names
/// (`wasi:cli/stdout@0.2.6#get-stdout`), when that is what stopped the call.
fn import_called(e: &wasmtime::Error) -> Option<String> {
    let text = format!("{e:#}");
    let rest = &text[text.find("unknown import: `")? + "unknown import: `".len()..];
    Some(format!("`{}`", &rest[..rest.find('`')?]))
}

/// Runs a future whose every await completes at once (the snapshot's
/// reads are plain synchronous calls).
fn at_once<F: Future>(future: F) -> F::Output {
    match pin!(future).poll(&mut Context::from_waker(Waker::noop())) {
        Poll::Ready(v) => v,
        Poll::Pending => unreachable!("the snapshot's reads never wait"),
    }
}

/// The initialized instance, read through the accessors the
/// pre-initializer added. A failed read is kept (the trait cannot return
/// it) and reported after the snapshot.
struct Access<'a> {
    store: &'a mut Store<State>,
    instance: Instance,
    failed: Option<String>,
}

impl Access<'_> {
    /// Calls the accessor `func` of the exported `instance`; `None` (the
    /// problem kept) when that fails.
    fn get<R: Lift + 'static>(&mut self, instance: &str, func: &str) -> Option<R> {
        let store = &mut *self.store;
        let got = (|| {
            let (_, scope) =
                self.instance.get_export(&mut *store, None, instance).ok_or_else(|| format!("no export {instance}"))?;
            let (_, index) = self
                .instance
                .get_export(&mut *store, Some(&scope), func)
                .ok_or_else(|| format!("no export {instance}#{func}"))?;
            let f = self
                .instance
                .get_typed_func::<(), (R,)>(&mut *store, index)
                .map_err(|e| format!("{instance}#{func}: {e:#}"))?;
            f.call(&mut *store, ()).map(|(r,)| r).map_err(|e| format!("{instance}#{func}: {e:#}"))
        })();
        got.map_err(|problem| self.failed.get_or_insert(problem)).ok()
    }
}

impl wasmtime_wizer::ComponentInstanceState for Access<'_> {
    async fn call_func_ret_list_u8(&mut self, instance: &str, func: &str, contents: impl FnOnce(&[u8]) + Send) {
        match self.get::<WasmList<u8>>(instance, func) {
            Some(list) => contents(list.as_le_slice(&*self.store)),
            None => contents(&[]),
        }
    }

    async fn call_func_ret_s32(&mut self, instance: &str, func: &str) -> i32 {
        self.get(instance, func).unwrap_or_default()
    }

    async fn call_func_ret_s64(&mut self, instance: &str, func: &str) -> i64 {
        self.get(instance, func).unwrap_or_default()
    }

    async fn call_func_ret_f32(&mut self, instance: &str, func: &str) -> u32 {
        self.get(instance, func).map_or(0, f32::to_bits)
    }

    async fn call_func_ret_f64(&mut self, instance: &str, func: &str) -> u64 {
        self.get(instance, func).map_or(0, f64::to_bits)
    }
}
