//! What several subcommands share: limit flags, loading a model, printing.

use std::path::Path;
use std::time::Duration;

use anyhow::{Context, Result};
use paddock_host::{Artifact, Isolation, Limits, Model, ModelOptions, Runtime, RuntimeConfig};

/// Flags that set a model's limits; defaults are the library's.
#[derive(clap::Args, Clone, Debug)]
pub struct LimitArgs {
    /// Wall-clock deadline per call, in milliseconds [default: 50].
    #[arg(long, value_name = "MS")]
    pub deadline_ms: Option<u64>,
    /// Fuel (instructions) per call; turns on fuel metering.
    #[arg(long, value_name = "UNITS")]
    pub fuel: Option<u64>,
    /// Linear memory cap, in MiB [default: 64].
    #[arg(long, value_name = "MIB")]
    pub memory_mib: Option<u64>,
    /// Largest artifact accepted, in MiB [default: 64].
    #[arg(long, value_name = "MIB")]
    pub max_artifact_mib: Option<u64>,
    /// Start a fresh instance for every call instead of reusing warm ones.
    #[arg(long)]
    pub fresh: bool,
}

impl LimitArgs {
    /// The model options these flags describe.
    pub fn options(&self) -> ModelOptions {
        let mut limits = Limits::default();
        if let Some(ms) = self.deadline_ms {
            limits.deadline = Duration::from_millis(ms);
        }
        limits.fuel = self.fuel;
        if let Some(mib) = self.memory_mib {
            limits.memory_bytes = mib << 20;
        }
        if let Some(mib) = self.max_artifact_mib {
            limits.artifact_bytes = mib << 20;
        }
        let isolation = if self.fresh { Isolation::FreshPerCall } else { Isolation::Reuse };
        ModelOptions { limits, isolation }
    }

    /// A runtime able to enforce these limits.
    pub fn runtime(&self) -> Result<Runtime> {
        Ok(Runtime::with_config(RuntimeConfig { fuel: self.fuel.is_some(), ..RuntimeConfig::default() })?)
    }

    /// Reads and loads an artifact under these limits.
    pub fn load(&self, path: &Path) -> Result<(Runtime, Model)> {
        let runtime = self.runtime()?;
        let options = self.options();
        let artifact = Artifact::read(path, options.limits.artifact_bytes)?;
        let model = Model::load_with(&runtime, artifact, options).with_context(|| format!("loading {}", path.display()))?;
        Ok((runtime, model))
    }
}

/// Prints a value as pretty JSON on stdout.
pub fn print_json<T: serde::Serialize>(value: &T) -> Result<()> {
    println!("{}", serde_json::to_string_pretty(value)?);
    Ok(())
}

/// Lays out rows of cells as a plain text table with a header rule.
pub fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    for row in rows {
        for (w, cell) in widths.iter_mut().zip(row) {
            *w = (*w).max(cell.chars().count());
        }
    }
    let line = |cells: Vec<&str>| {
        let mut s = String::new();
        for (i, (cell, w)) in cells.iter().zip(&widths).enumerate() {
            if i > 0 {
                s.push_str("  ");
            }
            s.push_str(cell);
            if i + 1 < cells.len() {
                s.push_str(&" ".repeat(w - cell.chars().count()));
            }
        }
        s.push('\n');
        s
    };
    let mut out = line(header.to_vec());
    out.push_str(&line(widths.iter().map(|w| "─".repeat(*w)).collect::<Vec<_>>().iter().map(String::as_str).collect()));
    for row in rows {
        out.push_str(&line(row.iter().map(String::as_str).collect()));
    }
    out
}
