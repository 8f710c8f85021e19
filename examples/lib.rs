//! Embedding examples for paddock; see `embed.rs`, `limits.rs`,
//! `store.rs` and `service.rs`. This library only finds the demo artifacts for them.

use std::path::PathBuf;

/// Path of a demo artifact written by `cargo xtask build`.
pub fn demo_artifact(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../target/paddock/artifacts").join(format!("{name}.wasm"))
}

/// The demo store assembled by `cargo xtask build`.
pub fn demo_store() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../target/paddock/store")
}
