//! Surfaces: how a service reaches a [`Registry`](crate::Registry) from
//! outside the process. The library API is the first surface; these are
//! the others.
//!
//! - [`wire`]: the JSON shapes every surface shares (request, answer, error);
//! - [`stream`]: NDJSON in, NDJSON out, one answer per line, in order;
//! - [`http`] (feature `http`, on by default): an HTTP API described by an
//!   OpenAPI 3.1 document that [`openapi`] generates from the wire types;
//! - [`worker`] (feature `workers`, on by default): workers sharing a NATS
//!   JetStream consumer, answering each event once.

#[cfg(feature = "http")]
pub mod http;
#[cfg(feature = "http")]
pub mod openapi;
pub mod stream;
pub mod wire;
#[cfg(feature = "workers")]
pub mod worker;
