//! The core of paddock: load one sandboxed model, check rows against its
//! contract, and score them under hard limits.
//!
//! A request travels artifact → contract → sandbox, and the modules follow
//! it: [`artifact`] (the file, its digest, the checks it carries, trust),
//! [`contract`] (what the model reads and writes; rows and row files),
//! [`sandbox`] (the engine, loaded models, instances, WASI, priming, the
//! code cache, running the checks).
//!
//! ```no_run
//! use paddock_host::{Artifact, Model, Row, Runtime};
//!
//! # fn main() -> Result<(), Box<dyn std::error::Error>> {
//! let runtime = Runtime::new()?;
//! let artifact = Artifact::read("charge-minutes.wasm".as_ref(), 64 << 20)?;
//! let model = Model::load(&runtime, artifact)?;
//! let row = Row::new()
//!     .with("charger_kw", 11.0)
//!     .with("battery_kwh", 64.0)
//!     .with("soc_start", 0.2)
//!     .with("soc_target", 0.8)
//!     .with("hour_of_week", 42i64)
//!     .with("connector", "type2")
//!     .with("fleet", false);
//! let estimates = model.score(&[row])?;
//! println!("{} minutes", estimates.values_at(0)[0]);
//! # Ok(()) }
//! ```
//!
//! Core concepts:
//! - [`Artifact`]: one model version as a file — a WebAssembly component
//!   with its params and checks in custom sections; identity is its sha256.
//! - [`Contract`] / [`Schema`]: what the model reads and writes, validated
//!   on load; every row is checked against it before it enters the sandbox.
//! - [`Runtime`]: the engine and its clock; one per process.
//! - [`Model`]: a loaded artifact serving many threads under its
//!   [`Limits`]; a call that hits a limit fails with [`LimitHit`].
//! - [`Checks`]: example rows with recorded outputs; every load runs the
//!   ones an artifact carries ([`Model::carried_checks`]), and
//!   [`Model::run_checks`] runs any others.
//! - [`TrustPolicy`]: which vouchers and pinned digests a host admits,
//!   checked before an artifact is loaded ([`Voucher`], [`Vouch`]).
//! - [`WasiPolicy`]: off by default; lets models built by toolchains that
//!   import WASI (Python, JavaScript) load into an empty WASI world.
//!
//! The path an embedder takes: one [`Runtime`] per process → [`Artifact`]
//! read from a file (its size capped) → [`Model::load`] (compiled, started,
//! its contract validated, the checks it carries run; every failure a
//! [`LoadError`] variant) → [`Model::score`] (rows checked against the
//! contract, then scored under the [`Limits`]; a [`ScoreError`] names the
//! row, the limit or the fault). For a store of versions with routes,
//! swaps and feature lookups, open a `paddock_serve::Registry` on the same
//! `Runtime` (`examples/store.rs`); `examples/checked.rs` handles every
//! error of this crate by type.
//!
//! Cargo features: `openapi` (off by default) derives OpenAPI schemas for
//! the types the HTTP surface sends (utoipa); `paddock-serve`'s `http`
//! feature turns it on. Nothing else is optional: the crate is the engine,
//! the contract and the artifact format.
//!
//! What it is not: a server, a store or a feature source — those are
//! `paddock-serve`, built on this crate — nor a training library. It links
//! no HTTP, Redis, Parquet or NATS crate (`cargo xtask deps` checks).

#![deny(missing_docs)]

pub mod artifact;
pub mod atomic_file;
pub mod audit;
mod bindings;
pub mod contract;
pub mod drift;
pub mod limits;
#[cfg(feature = "openapi")]
pub mod openapi;
pub mod sandbox;
pub mod tool_error;

pub use artifact::checks::{CaseFailure, CheckReport, Checks, ChecksError, Tolerance};
pub use artifact::digest::{Digest, DigestError};
pub use artifact::profile::{Bins, FieldProfile, Profile, ProfileError, Summary};
pub use artifact::trust::{Admission, TrustError, TrustPolicy, Vouch, Voucher, VouchingKey};
pub use artifact::{Artifact, ArtifactError, DEFAULT_SIZE_CAP, Parts, pack, pack_imported};
pub use contract::rows::{ContractRule, Row, RowError, Value};
pub use contract::schema::{OutputFault, Schema};
pub use contract::{Bounds, Contract, ContractError, Domain, Fault, Feature, Output};
pub use drift::{DriftLevel, DriftReport, DriftWatch, DriftWindow, FallbackCause, FallbackCounts, FieldDrift};
pub use limits::{LimitHit, Limits, LimitsError, SettingProblem};
pub use sandbox::codecache::{CacheError, CodeCache, CodeSource};
pub use sandbox::explain::{ADDS_UP_WITHIN, Attribution, ContributionScale, ExplainError, Explanation};
pub use sandbox::model::{
    Estimates, Isolation, LoadError, Model, ModelOptions, OptionsError, Priming, ScoreError, Scored, Usage,
};
pub use sandbox::prime::PrimeState;
pub use sandbox::verify::{PackError, Packed, pack_verified};
pub use sandbox::wasi::WasiPolicy;
pub use sandbox::{Allocator, Runtime, RuntimeConfig, RuntimeConfigError, RuntimeError, SandboxError};
pub use tool_error::ToolError;
