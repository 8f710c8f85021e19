//! Serve a store of paddock model versions: routing by context and time,
//! swaps without a restart, feature lookups, and the surfaces a service
//! reaches them through.
//!
//! A request travels artifact → contract → sandbox (the `paddock-host`
//! crate) → **registry** → surface; feature sources sit between the
//! registry and the sandbox:
//!
//! - [`registry`]: the versions a store holds, loaded behind the gate
//!   (trust, load, contract, checks), routed per request, swapped in whole
//!   when the store changes, with usage accounting;
//! - [`features`]: a row's missing features looked up by the request's keys
//!   in the tables and Redis sources a store's features plan names;
//! - [`surface`]: the JSON wire shapes, NDJSON streams, the HTTP API
//!   (feature `http`) and NATS JetStream workers (feature `workers`);
//! - `shared` (feature `shared`): a store kept in NATS JetStream, published
//!   to once and followed by every host through a mirror of its own;
//! - [`replay`]: traffic a host captured, scored again by a candidate and
//!   compared with what the host answered;
//! - [`parquet`]: Parquet files read as a model's rows, a batch at a time
//!   (batch scoring's input).
//!
//! ```no_run
//! use paddock_host::{Row, Runtime};
//! use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};
//!
//! # fn main() -> Result<(), Box<dyn std::error::Error>> {
//! let runtime = Runtime::new()?;
//! let registry = Registry::open(&runtime, "store".as_ref(), RegistryOptions::default())?;
//! let rows = [Row::new().with("charger_kw", 11.0)];
//! let answer = registry.score(&Request::new("charge-minutes", &RequestContext::default(), &rows))?;
//! println!("{} answered", answer.version);
//! # Ok(()) }
//! ```
//!
//! Cargo features (all on by default):
//! - `http`: the HTTP surface ([`surface::http`], `paddock serve`): axum
//!   and utoipa, and `paddock-host/openapi`;
//! - `workers`: NATS JetStream workers ([`surface::worker`], `paddock work`):
//!   async-nats;
//! - `shared`: a store kept in NATS JetStream and followed by every host
//!   ([`shared`]): async-nats.
//!
//! With `default-features = false` the crate is the registry, the feature
//! sources (tables from Parquet/Arrow/CSV, Redis, on tokio) and the NDJSON
//! stream: no HTTP server, no NATS client.
//!
//! What it is not: a deployment tool or a feature store. A host never
//! writes models into the store it serves (a publisher does, through
//! `shared::publish`), and it computes no feature: it reads
//! what a batch job or another service wrote. A service that only loads
//! and scores one model needs `paddock-host` alone.

#![deny(missing_docs)]

pub mod features;
pub mod parquet;
pub mod registry;
pub mod replay;
#[cfg(feature = "shared")]
pub mod shared;
pub mod surface;

pub use registry::{Answer, Registry, RegistryError, RegistryOptions, Request, RequestContext, RequestError, Status};

/// The time a request is scored at (`Request::at`), re-exported so an
/// embedder needs no direct `jiff` dependency.
pub use jiff::Timestamp;
/// A model's version, re-exported so an embedder needs no direct `semver` dependency.
pub use semver::Version;
