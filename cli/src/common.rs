//! What several subcommands share: limit flags, loading a model, printing.

use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context, Result};
use paddock_host::{
    Admission, Artifact, Isolation, Limits, Model, ModelOptions, Runtime, RuntimeConfig, TrustPolicy, Vouch,
    WasiPolicy, sandbox::wasi,
};
use paddock_serve::RegistryOptions;

use crate::place::{self, NatsArgs, Opened, Place};

/// What every command that loads one artifact takes: the file, `--json`,
/// and how to load it.
#[derive(clap::Args, Clone, Debug)]
pub struct ArtifactArgs {
    /// The artifact (its vouch is read from ARTIFACT.vouch if present).
    pub artifact: PathBuf,
    /// Print the result as JSON.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub load: LoadArgs,
}

/// How to load a model: what must vouch for it, its limits, and whether it
/// may import WASI.
#[derive(clap::Args, Clone, Debug, Default)]
pub struct LoadArgs {
    #[command(flatten)]
    pub trust: TrustArgs,
    #[command(flatten)]
    pub limits: LimitArgs,
    #[command(flatten)]
    pub wasi: WasiArgs,
}

/// What must vouch for an artifact before it is admitted.
#[derive(clap::Args, Clone, Debug, Default)]
pub struct TrustArgs {
    /// Admit only artifacts vouched for (ARTIFACT.vouch) by a voucher in this directory of `.voucher` files.
    #[arg(long, value_name = "DIR")]
    pub trust: Option<PathBuf>,
    /// Admit an artifact with this digest (`sha256:…`) without a vouch; repeatable.
    #[arg(long, value_name = "DIGEST")]
    pub pin: Vec<String>,
}

/// The limits a model runs under (defaults are the library's).
#[derive(clap::Args, Clone, Debug, Default)]
pub struct LimitArgs {
    /// Wall-clock deadline per call, in milliseconds [default: 50].
    #[arg(long, value_name = "MS", value_parser = clap::value_parser!(u64).range(1..=3_600_000))]
    pub deadline_ms: Option<u64>,
    /// Wall-clock deadline for `init` + `describe` when an instance starts, in milliseconds [default: 2000].
    #[arg(long, value_name = "MS", value_parser = clap::value_parser!(u64).range(1..=3_600_000))]
    pub start_deadline_ms: Option<u64>,
    /// Fuel (instructions) per scoring call; turns on fuel metering.
    #[arg(long, value_name = "UNITS", value_parser = clap::value_parser!(u64).range(1..))]
    pub fuel: Option<u64>,
    /// Fuel for `init` + `describe` when an instance starts [default: no limit, the start deadline binds].
    #[arg(long, value_name = "UNITS", value_parser = clap::value_parser!(u64).range(1..), requires = "fuel")]
    pub start_fuel: Option<u64>,
    /// Largest linear memory of an instance, in MiB [default: 64].
    #[arg(long, value_name = "MIB", value_parser = clap::value_parser!(u64).range(1..=4096))]
    pub max_memory_mib: Option<u64>,
    /// Largest artifact accepted, in MiB [default: 64].
    #[arg(long, value_name = "MIB", value_parser = clap::value_parser!(u64).range(1..=4096))]
    pub max_artifact_mib: Option<u64>,
    /// Start a fresh instance for every call instead of reusing warm ones.
    #[arg(long)]
    pub fresh: bool,
}

/// Whether models that import WASI may load.
#[derive(clap::Args, Clone, Debug, Default)]
pub struct WasiArgs {
    /// Let models that import WASI (Python, JavaScript guests) load into an
    /// empty WASI world: no files, environment, arguments or sockets;
    /// output captured into the log.
    #[arg(long)]
    pub wasi: bool,
    /// Under `--wasi`, give models the host's real clocks instead of fixed ones.
    #[arg(long, requires = "wasi")]
    pub wasi_real_clocks: bool,
    /// Under `--wasi`, give models real randomness instead of a fixed stream.
    #[arg(long, requires = "wasi")]
    pub wasi_real_random: bool,
}

impl WasiArgs {
    /// The WASI policy these flags describe, if any.
    pub fn policy(&self) -> Option<WasiPolicy> {
        let source = |real| if real { wasi::Ambient::Real } else { wasi::Ambient::Fixed };
        self.wasi.then(|| WasiPolicy {
            clocks: source(self.wasi_real_clocks),
            random: source(self.wasi_real_random),
            ..WasiPolicy::default()
        })
    }
}

impl TrustArgs {
    /// The trust policy these flags describe: nothing required unless
    /// `--trust` or `--pin` is given.
    pub fn policy(&self) -> Result<TrustPolicy> {
        let mut policy = TrustPolicy::default();
        if let Some(dir) = &self.trust {
            policy = policy.trust_dir(dir)?;
        }
        for pin in &self.pin {
            policy.pinned.push(pin.parse().map_err(anyhow::Error::msg).with_context(|| format!("--pin {pin}"))?);
            policy.required = true;
        }
        Ok(policy)
    }

    /// Checks an artifact against the trust policy, reading its vouch from
    /// ARTIFACT.vouch when that file exists.
    pub fn admit(&self, path: &Path, artifact: &Artifact) -> Result<Admission> {
        let vouch_path = Vouch::path_for(path);
        let vouch = if vouch_path.exists() { Some(Vouch::read(&vouch_path)?) } else { None };
        self.policy()?.admit(artifact.digest(), vouch.as_ref()).with_context(|| format!("refusing {}", path.display()))
    }
}

impl LoadArgs {
    /// The model options these flags describe.
    pub fn options(&self) -> ModelOptions {
        let l = &self.limits;
        let mut limits = Limits::default();
        if let Some(ms) = l.deadline_ms {
            limits.deadline = Duration::from_millis(ms);
        }
        if let Some(ms) = l.start_deadline_ms {
            limits.init_deadline = Duration::from_millis(ms);
        }
        limits.fuel = l.fuel;
        limits.init_fuel = l.start_fuel;
        if let Some(mib) = l.max_memory_mib {
            limits.memory_bytes = mib << 20;
        }
        let isolation = if l.fresh { Isolation::FreshPerCall } else { Isolation::Reuse };
        ModelOptions { limits, isolation, wasi: self.wasi.policy(), ..ModelOptions::default() }
    }

    /// The largest artifact file read, in bytes.
    pub fn size_cap(&self) -> u64 {
        self.limits.max_artifact_mib.map_or(paddock_host::artifact::DEFAULT_SIZE_CAP, |mib| mib << 20)
    }

    /// A runtime able to enforce these limits. Says so (a warning) when
    /// the system refused the pooling allocator's reservation.
    pub fn runtime(&self) -> Result<Runtime> {
        let runtime =
            Runtime::with_config(RuntimeConfig { fuel: self.limits.fuel.is_some(), ..RuntimeConfig::default() })?;
        if let paddock_host::Allocator::OnDemand { reason } = runtime.allocator() {
            tracing::warn!(%reason, "model instances are allocated on demand: fresh instances start slower");
        }
        Ok(runtime)
    }

    /// Reads an artifact, checks it against the trust policy, and loads it
    /// under these limits, running the checks it carries.
    pub fn load(&self, path: &Path) -> Result<(Runtime, Model)> {
        self.load_with(path, self.options())
    }

    /// [`LoadArgs::load`] with other options (`check` skips the carried
    /// checks at load, to run them itself and report every case).
    pub fn load_with(&self, path: &Path, options: ModelOptions) -> Result<(Runtime, Model)> {
        let runtime = self.runtime()?;
        let artifact = Artifact::read(path, self.size_cap())?;
        self.trust.admit(path, &artifact)?;
        let model =
            Model::load_with(&runtime, artifact, options).with_context(|| format!("loading {}", path.display()))?;
        Ok((runtime, model))
    }
}

/// What every command about a store takes.
#[derive(clap::Args, Clone, Debug)]
pub struct StoreArgs {
    /// The store: a directory of `<model>/<version>.wasm` files and
    /// `routes.toml`, or a shared store's address, nats://HOST:PORT/NAME.
    #[arg(long, value_name = "DIR|ADDRESS", value_parser = Place::parse)]
    pub store: Place,
    /// Where the host keeps its state (code cache, usage file; a shared store's mirror)
    /// [default: STORE/.paddock for a directory; a shared store needs one].
    #[arg(long, value_name = "DIR")]
    pub state: Option<PathBuf>,
    /// For a shared store: this host's name in its list of hosts [default: HOSTNAME-PID].
    #[arg(long, value_name = "NAME")]
    pub host_name: Option<String>,
    #[command(flatten)]
    pub nats: NatsArgs,
    /// Refuse artifacts that carry no checks.
    #[arg(long)]
    pub require_checks: bool,
    /// Compile every artifact afresh instead of using the code cache.
    #[arg(long)]
    pub no_code_cache: bool,
    /// Seconds between writes of the usage file (STATE/usage.json); a
    /// crash loses at most this much usage.
    #[arg(long, default_value_t = 10, value_name = "SECS", value_parser = clap::value_parser!(u64).range(1..=86_400))]
    pub usage_every_secs: u64,
    #[command(flatten)]
    pub load: LoadArgs,
    #[command(flatten)]
    pub drift: DriftArgs,
}

/// `input` as its bytes were before compression when `path` ends in `.gz`
/// (every gzip member, as `gzip -d` reads them), else as it is.
pub fn decompressed(path: &std::path::Path, input: Box<dyn std::io::Read>) -> Box<dyn std::io::Read> {
    if path.extension().is_some_and(|e| e.eq_ignore_ascii_case("gz")) {
        Box::new(flate2::read::MultiGzDecoder::new(input))
    } else {
        input
    }
}

/// Whether a host captures a sample of its traffic, and how.
#[derive(clap::Args, Clone, Debug)]
pub struct CaptureArgs {
    /// Capture a sample of answered requests, each with its answer, into
    /// this directory (gzip NDJSON files that `paddock replay`, `stream`
    /// and `score --from requests` read); keys and features the features
    /// plan marks private are dropped or hashed first. Off by default.
    #[arg(long, value_name = "DIR")]
    pub capture_dir: Option<PathBuf>,
    /// The share of answered requests captured.
    #[arg(long, default_value_t = 0.01, value_name = "SHARE", requires = "capture_dir")]
    pub capture_share: f64,
    /// Close a capture file once it holds this many MiB of lines (before compression).
    #[arg(long, default_value_t = 64, value_name = "MIB", requires = "capture_dir",
          value_parser = clap::value_parser!(u64).range(1..=4096))]
    pub capture_file_mib: u64,
    /// Closed capture files kept; the oldest beyond are deleted.
    #[arg(long, default_value_t = 48, value_name = "N", requires = "capture_dir",
          value_parser = clap::value_parser!(u64).range(1..=100_000))]
    pub capture_keep: u64,
}

impl CaptureArgs {
    /// The capture these flags describe, or `None` without `--capture-dir`
    /// (the registry refuses a share outside (0, 1] as it opens).
    pub fn options(&self) -> Option<paddock_serve::registry::CaptureOptions> {
        let dir = self.capture_dir.as_ref()?;
        Some(paddock_serve::registry::CaptureOptions {
            share: self.capture_share,
            file_bytes: self.capture_file_mib << 20,
            keep_files: self.capture_keep as usize,
            ..paddock_serve::registry::CaptureOptions::new(dir)
        })
    }
}

/// As a host stops: closes the capture file being written and says what
/// was captured.
pub fn finish_capture(registry: &paddock_serve::Registry) {
    let Some(state) = registry.status().capture else { return };
    let closed = registry.rotate_capture(std::time::Duration::from_secs(10));
    let c = registry.status().capture.map_or(state.counts, |s| s.counts);
    eprintln!(
        "capture: {} sampled, {} written to {}{}, {} dropped (queue full), {} too long, {} lost to failed writes",
        c.sampled,
        c.written,
        state.dir.display(),
        if closed { "" } else { " (the last file could not be closed in time)" },
        c.dropped_queue_full,
        c.dropped_too_long,
        c.lost_write_failed
    );
}

/// How a host compares the values it scores with each version's training profile.
#[derive(clap::Args, Clone, Debug)]
pub struct DriftArgs {
    /// How far back live values count towards drift, in minutes.
    #[arg(long, default_value_t = 60, value_name = "MINUTES", value_parser = clap::value_parser!(u64).range(1..=10_080))]
    pub drift_window_mins: u64,
    /// Live values a field needs in the window before it gets an index.
    #[arg(long, default_value_t = 200, value_name = "N")]
    pub drift_min_values: u64,
    /// Stability index from which a field is worth watching (common practice, not a standard).
    #[arg(long, default_value_t = 0.1, value_name = "INDEX")]
    pub drift_watch: f64,
    /// Stability index from which a field calls for action (common practice, not a standard).
    #[arg(long, default_value_t = 0.25, value_name = "INDEX")]
    pub drift_act: f64,
    /// Count nothing for drift.
    #[arg(long, conflicts_with_all = ["drift_window_mins", "drift_min_values", "drift_watch", "drift_act"])]
    pub no_drift: bool,
}

impl DriftArgs {
    /// The drift window these flags describe, or `None` with `--no-drift`.
    ///
    /// # Errors
    /// When `--drift-watch` is not below `--drift-act`, or either is not a positive number.
    pub fn window(&self) -> Result<Option<paddock_host::DriftWindow>> {
        if self.no_drift {
            return Ok(None);
        }
        let (watch, act) = (self.drift_watch, self.drift_act);
        if !(watch > 0.0 && watch < act && act.is_finite()) {
            anyhow::bail!("--drift-watch ({watch}) must be above 0 and below --drift-act ({act})");
        }
        Ok(Some(paddock_host::DriftWindow {
            length: std::time::Duration::from_secs(60 * self.drift_window_mins),
            min_count: self.drift_min_values,
            watch,
            act,
            ..paddock_host::DriftWindow::default()
        }))
    }
}

impl StoreArgs {
    /// The registry options these flags describe.
    pub fn options(&self) -> Result<RegistryOptions> {
        Ok(RegistryOptions {
            model: paddock_host::ModelOptions { drift: self.drift.window()?, ..self.load.options() },
            trust: self.load.trust.policy()?,
            size_cap: self.load.size_cap(),
            require_checks: self.require_checks,
            state_dir: self.state.clone(),
            code_cache: !self.no_code_cache,
            usage_flush: Some(std::time::Duration::from_secs(self.usage_every_secs)),
            ..RegistryOptions::default()
        })
    }

    /// Opens the store to serve it: every artifact through the gate, then
    /// the routes; takes the state directory and keeps its usage file. A
    /// shared store is served from this host's mirror of it.
    pub fn open(&self) -> Result<Opened> {
        self.open_capturing(None)
    }

    /// As [`StoreArgs::open`], capturing traffic as `capture` says.
    pub fn open_capturing(&self, capture: Option<paddock_serve::registry::CaptureOptions>) -> Result<Opened> {
        let runtime = self.load.runtime()?;
        let options = RegistryOptions { capture, ..self.options()? };
        place::open(&self.store, &runtime, options, &self.nats, self.host_name.as_deref(), false)
    }

    /// Opens the store to look at it: no usage file, no lock, so it works
    /// beside a host serving the same store (a shared store: through a
    /// scratch mirror unless `--state` names one).
    pub fn open_to_look(&self) -> Result<Opened> {
        let runtime = self.load.runtime()?;
        let options = RegistryOptions { usage_flush: None, ..self.options()? };
        place::open(&self.store, &runtime, options, &self.nats, self.host_name.as_deref(), true)
    }
}

/// Sends the library's log lines to stderr: warnings and errors, or the
/// level named by `PADDOCK_LOG` (`error`, `warn`, `info`, `debug`, `trace`);
/// in colour only when stderr is a terminal, so a log file holds plain text.
pub fn init_logging() {
    use std::io::IsTerminal as _;
    let level = std::env::var("PADDOCK_LOG").ok().and_then(|l| l.parse().ok()).unwrap_or(tracing::Level::WARN);
    let _ = tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal())
        .with_max_level(level)
        .with_target(false)
        .try_init();
}

/// Prints a value as pretty JSON on stdout.
pub fn print_json<T: serde::Serialize>(value: &T) -> Result<()> {
    outln!("{}", serde_json::to_string_pretty(value)?)?;
    Ok(())
}

/// Lays out rows of cells as a plain text table with a header rule.
pub fn text_table(header: &[&str], rows: &[Vec<String>]) -> String {
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

/// A contract as text: name and version, what it is for, then its
/// features and outputs as tables.
pub fn contract_text(c: &paddock_host::Contract) -> String {
    let mut out = format!("{} {}\n", c.name, c.version);
    if !c.about.is_empty() {
        out.push_str(&format!("{}\n", c.about));
    }
    let opt = |u: &Option<String>| u.clone().unwrap_or_default();
    let features: Vec<Vec<String>> = c
        .features
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let req = if f.required { "yes" } else { "no" };
            vec![i.to_string(), f.name.clone(), f.domain.to_string(), opt(&f.unit), req.into(), f.about.clone()]
        })
        .collect();
    out.push_str(&format!(
        "\nfeatures\n{}",
        text_table(&["#", "name", "domain", "unit", "required", "about"], &features)
    ));
    let outputs: Vec<Vec<String>> = c
        .outputs
        .iter()
        .enumerate()
        .map(|(i, o)| vec![i.to_string(), o.name.clone(), o.bounds.to_string(), opt(&o.unit), o.about.clone()])
        .collect();
    out.push_str(&format!("\noutputs\n{}", text_table(&["#", "name", "bounds", "unit", "about"], &outputs)));
    out
}

/// Listens for Ctrl-C and SIGTERM from the moment it is called, and gives
/// a future that resolves (saying `stopping` on stderr) once either came.
///
/// Call it first, inside `runtime`, before opening the store: a signal that
/// arrives while models load is then held until the surface stops cleanly,
/// instead of killing the process with the default disposition.
///
/// # Errors
/// When the process cannot install its signal handlers.
pub fn shutdown_signal(
    runtime: &tokio::runtime::Runtime,
    stopping: &str,
) -> Result<impl std::future::Future<Output = ()> + Send + 'static> {
    let _inside = runtime.enter();
    let stopping = stopping.to_owned();
    #[cfg(unix)]
    {
        use tokio::signal::unix::{SignalKind, signal};
        let mut interrupt = signal(SignalKind::interrupt()).context("listening for Ctrl-C")?;
        let mut terminate = signal(SignalKind::terminate()).context("listening for SIGTERM")?;
        Ok(async move {
            tokio::select! {
                _ = interrupt.recv() => {},
                _ = terminate.recv() => {},
            }
            eprintln!("{stopping}");
        })
    }
    #[cfg(not(unix))]
    {
        let mut interrupt = tokio::signal::windows::ctrl_c().context("listening for Ctrl-C")?;
        Ok(async move {
            interrupt.recv().await;
            eprintln!("{stopping}");
        })
    }
}
