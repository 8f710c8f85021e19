//! Hard limits in action: a model that never returns is stopped at its
//! deadline with a typed error, and the host carries on serving.
//!
//! ```text
//! cargo run -p paddock-examples --example limits
//! ```

use std::time::{Duration, Instant};

use anyhow::Result;
use paddock_host::{Artifact, LimitHit, Limits, Model, ModelOptions, Row, Runtime, SandboxError, ScoreError};

/// A hand-written model whose `score` spins forever (`paddock pack` accepts
/// WebAssembly text and embeds the estimator world).
const SPIN: &str = include_str!("../tests/fixtures/affine.wat");

fn main() -> Result<()> {
    let runtime = Runtime::new()?;
    // Params byte 1 makes the fixture spin in `score`.
    let artifact = Artifact::from_bytes(paddock_host::pack(SPIN.as_bytes(), Some(&[1]), None)?, u64::MAX)?;
    let limits = Limits { deadline: Duration::from_millis(25), ..Limits::default() };
    let spinner = Model::load_with(&runtime, artifact, ModelOptions { limits, ..Default::default() })?;

    let started = Instant::now();
    match spinner.score(&[Row::new().with("x", 1.0)]) {
        Err(ScoreError::Sandbox(SandboxError::Limit(hit @ LimitHit::Deadline { .. }))) => {
            println!("stopped after {:?}: {hit} (limit `{}`)", started.elapsed(), hit.name());
        }
        other => anyhow::bail!("expected the deadline, got {other:?}"),
    }

    // The same fixture in its well-behaved mode answers y = 2x + 1.
    let healthy =
        Model::load(&runtime, Artifact::from_bytes(paddock_host::pack(SPIN.as_bytes(), None, None)?, u64::MAX)?)?;
    println!("healthy model still serving: y(20) = {}", healthy.score(&[Row::new().with("x", 20.0)])?.values_at(0)[0]);
    Ok(())
}
