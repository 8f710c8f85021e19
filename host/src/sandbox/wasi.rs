//! The WASI policy: an empty world for models built by toolchains that
//! always import WASI (componentize-py, componentize-js, wasm32-wasip2).
//!
//! Off by default: without a [`WasiPolicy`] in the load options an artifact
//! that imports any `wasi:*` interface is refused, naming the imports. With
//! one, WASI 0.2 is linked, but the world behind it is empty:
//!
//! - no preopened directories, so every filesystem call finds nothing;
//! - no environment variables, no arguments, stdin closed;
//! - sockets linked but every use refused (TCP, UDP, name lookup off, no
//!   address allowed);
//! - stdout and stderr captured, at most [`WasiPolicy::output_bytes`] per
//!   call, and written to the log (target `paddock::guest`);
//! - clocks and randomness fixed (the default: same answers on every run)
//!   or real, by setting;
//! - a wait that would outlast the call's deadline stops the call at once
//!   with the deadline limit: a model cannot stall its host thread asleep.
//!
//! This module is not a general WASI host: it links exactly what
//! wasmtime-wasi provides for WASI 0.2 and takes every capability away.

use std::pin::Pin;
use std::sync::{Arc, Mutex};
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use serde::Serialize;

use crate::limits::LimitHit;
use sha2::{Digest as _, Sha256};
use wasmtime::component::{Linker, Resource, ResourceTable};
use wasmtime_wasi::cli::{IsTerminal, StdoutStream};
use wasmtime_wasi::p2::{DynPollable, OutputStream, Pollable, StreamError, StreamResult};
use wasmtime_wasi::{HostMonotonicClock, HostWallClock, WasiCtx, WasiCtxBuilder};

/// The WASI release linked (wasmtime-wasi 48's WIT). Imports of an earlier
/// 0.2 release are satisfied by it.
pub const WASI_VERSION: &str = "0.2.12";

/// Whether clocks and randomness are the machine's or fixed.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Ambient {
    /// Fixed: the wall clock reads [`WasiPolicy::fixed_time`], the monotonic
    /// clock advances 1 µs per reading, randomness is a stream derived from
    /// [`WasiPolicy::seed`]. Same answers on every run. Default.
    #[default]
    Fixed,
    /// The host's clocks and its secure random generator.
    Real,
}

/// What a model that imports WASI gets. See the module doc for the world.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct WasiPolicy {
    /// Clocks: fixed (default) or real.
    pub clocks: Ambient,
    /// Randomness: fixed (default) or real.
    pub random: Ambient,
    /// The wall-clock time a fixed clock reads, seconds since the Unix
    /// epoch. Default 1 767 225 600 (2026-01-01T00:00:00Z).
    pub fixed_time: u64,
    /// The seed of fixed randomness. Not secret, not for security.
    pub seed: u64,
    /// Bytes of stdout and of stderr kept per call; the rest is counted and
    /// dropped (the model never sees a failed write). Default 4096.
    pub output_bytes: usize,
}

impl Default for WasiPolicy {
    fn default() -> Self {
        WasiPolicy {
            clocks: Ambient::Fixed,
            random: Ambient::Fixed,
            fixed_time: 1_767_225_600,
            seed: 0,
            output_bytes: 4096,
        }
    }
}

/// Whether an import name is a WASI interface (`wasi:…`).
pub fn is_wasi(import: &str) -> bool {
    import.starts_with("wasi:")
}

/// How the policy answers one WASI interface, for the audit report;
/// `None` for an interface the host does not provide (the artifact will
/// not link).
pub fn satisfied_by(import: &str, policy: &WasiPolicy) -> Option<String> {
    let name = import.split('@').next().unwrap_or(import);
    let source = |s: Ambient, fixed: String| match s {
        Ambient::Fixed => fixed,
        Ambient::Real => "the host's (real)".to_owned(),
    };
    Some(match name {
        "wasi:cli/environment" => "empty: no variables, no arguments, no working directory".into(),
        "wasi:cli/exit" => "exit ends the call as a trap".into(),
        "wasi:cli/stdin" | "wasi:cli/terminal-stdin" => "closed".into(),
        "wasi:cli/stdout" | "wasi:cli/stderr" => {
            format!("captured into the log, first {} bytes per call", policy.output_bytes)
        }
        "wasi:cli/terminal-input"
        | "wasi:cli/terminal-output"
        | "wasi:cli/terminal-stdout"
        | "wasi:cli/terminal-stderr" => "no terminal".into(),
        "wasi:clocks/wall-clock" => {
            source(policy.clocks, format!("fixed at {} s after the Unix epoch", policy.fixed_time))
        }
        "wasi:clocks/monotonic-clock" => {
            source(policy.clocks, "fixed, 1 µs per reading".into()) + "; a wait past the call's deadline stops the call"
        }
        "wasi:random/random" | "wasi:random/insecure" | "wasi:random/insecure-seed" => {
            source(policy.random, format!("fixed stream from seed {}", policy.seed))
        }
        "wasi:filesystem/types" | "wasi:filesystem/preopens" => "no directories".into(),
        "wasi:sockets/network" | "wasi:sockets/instance-network" => "no network".into(),
        "wasi:sockets/tcp"
        | "wasi:sockets/tcp-create-socket"
        | "wasi:sockets/udp"
        | "wasi:sockets/udp-create-socket" => "every use refused".into(),
        "wasi:sockets/ip-name-lookup" => "every lookup refused".into(),
        "wasi:io/poll" | "wasi:io/streams" | "wasi:io/error" => "streams and waits on the above only".into(),
        _ => return None,
    })
}

/// One instance's WASI state: its context, its resources, its captured output.
pub(crate) struct WasiState {
    ctx: WasiCtx,
    table: ResourceTable,
    stdout: Capture,
    stderr: Capture,
    monotonic: Monotonic,
    /// The random draws made so far, when priming (see [`link_for_priming`]).
    drawn: Vec<Draw>,
}

impl WasiState {
    /// A fresh empty world under `start`'s policy (the fixed random
    /// streams from the start's own copy).
    fn new(start: &WasiStart) -> Self {
        let policy = &start.policy;
        let stdout = Capture::new(policy.output_bytes);
        let stderr = Capture::new(policy.output_bytes);
        let mut b = WasiCtxBuilder::new();
        b.stdout(stdout.clone()).stderr(stderr.clone());
        b.allow_tcp(false).allow_udp(false).allow_ip_name_lookup(false);
        let monotonic = match policy.clocks {
            Ambient::Fixed => {
                b.wall_clock(FixedWall(Duration::from_secs(policy.fixed_time)));
                Monotonic::Fixed(Arc::default())
            }
            Ambient::Real => Monotonic::Real(Instant::now()),
        };
        b.monotonic_clock(monotonic.clone());
        if let Some(streams) = &start.streams {
            b.secure_random(wasmtime_wasi::Deterministic::new(streams.secure.clone()));
            b.insecure_random(wasmtime_wasi::Deterministic::new(streams.insecure.clone()));
            b.insecure_random_seed(u128::from(policy.seed));
        }
        WasiState { ctx: b.build(), table: ResourceTable::new(), stdout, stderr, monotonic, drawn: Vec::new() }
    }

    /// A fresh world under `start`'s policy, brought to where the primed
    /// snapshot's `init` left its own: the fixed monotonic clock at the
    /// reading it had reached, and the fixed random streams past what
    /// `init` drew (the same draws made again, so the streams stand exactly
    /// where they stood).
    pub(crate) fn start(start: &WasiStart) -> Self {
        let mut state = WasiState::new(start);
        if let Monotonic::Fixed(n) = &state.monotonic {
            n.store(start.carry.monotonic, std::sync::atomic::Ordering::Relaxed);
        }
        for draw in &start.carry.draws {
            // Replaying a draw that succeeded while priming cannot fail.
            let _ = draw.make(state.ctx.random());
        }
        state
    }

    /// What this world has handed out so far: the fixed monotonic clock's
    /// reading and the random draws recorded while priming.
    pub(crate) fn carry(&self) -> Carry {
        let monotonic = match &self.monotonic {
            Monotonic::Fixed(n) => n.load(std::sync::atomic::Ordering::Relaxed),
            Monotonic::Real(_) => 0,
        };
        Carry { monotonic, draws: self.drawn.clone() }
    }

    /// Writes what the model printed since the last call to the log.
    pub(crate) fn drain(&self, who: &str) {
        self.stdout.drain(who, "stdout");
        self.stderr.drain(who, "stderr");
    }

    /// The context and resource table, for wasmtime-wasi.
    pub(crate) fn view(&mut self) -> wasmtime_wasi::WasiCtxView<'_> {
        wasmtime_wasi::WasiCtxView { ctx: &mut self.ctx, table: &mut self.table }
    }

    /// The resource table, for the host's own WASI functions.
    fn table(&mut self) -> &mut ResourceTable {
        &mut self.table
    }
}

/// The bytes of a fixed random stream: 4 KiB of sha256 blocks of the seed.
fn stream(seed: u64, purpose: &[u8]) -> Vec<u8> {
    let mut bytes = Vec::with_capacity(128 * 32);
    for block in 0u32..128 {
        let mut h = Sha256::new();
        h.update(seed.to_le_bytes());
        h.update(purpose);
        h.update(block.to_le_bytes());
        bytes.extend_from_slice(&h.finalize());
    }
    bytes
}

struct FixedWall(Duration);

impl HostWallClock for FixedWall {
    fn resolution(&self) -> Duration {
        Duration::from_secs(1)
    }
    fn now(&self) -> Duration {
        self.0
    }
}

/// The monotonic clock, shared by WASI and the host's own waits: fixed
/// (advances 1 µs each time it is read) or real (nanoseconds since the
/// instance started).
#[derive(Clone)]
enum Monotonic {
    Fixed(Arc<std::sync::atomic::AtomicU64>),
    Real(Instant),
}

impl HostMonotonicClock for Monotonic {
    fn resolution(&self) -> u64 {
        1_000
    }
    fn now(&self) -> u64 {
        match self {
            Monotonic::Fixed(n) => n.fetch_add(1_000, std::sync::atomic::Ordering::Relaxed),
            Monotonic::Real(start) => start.elapsed().as_nanos() as u64,
        }
    }
}

/// What the host stores need for WASI: their state and the end of the call
/// under way.
pub(crate) trait WasiHost: wasmtime_wasi::WasiView + 'static {
    /// The WASI state (present whenever WASI is linked).
    fn wasi(&mut self) -> &mut WasiState;
    /// When the call under way must end.
    fn call_ends(&self) -> Instant;
    /// The deadline of the call under way.
    fn deadline(&self) -> Duration;
}

/// Links WASI 0.2 into `linker`, with the monotonic clock's waits cut off at
/// the call's deadline.
///
/// # Errors
/// When wasmtime-wasi cannot link (a programming error).
pub(crate) fn link<T: WasiHost>(linker: &mut Linker<T>) -> Result<(), crate::tool_error::ToolError> {
    wasmtime_wasi::p2::add_to_linker_sync(linker)?;
    linker.allow_shadowing(true);
    let mut clock = linker.instance(&format!("wasi:clocks/monotonic-clock@{WASI_VERSION}"))?;
    clock.func_wrap("subscribe-duration", |mut store: wasmtime::StoreContextMut<'_, T>, (nanos,): (u64,)| {
        nap(store.data_mut(), Duration::from_nanos(nanos))
    })?;
    clock.func_wrap("subscribe-instant", |mut store: wasmtime::StoreContextMut<'_, T>, (when,): (u64,)| {
        let host = store.data_mut();
        let now = host.wasi().monotonic.now();
        nap(host, Duration::from_nanos(when.saturating_sub(now)))
    })?;
    linker.allow_shadowing(false);
    Ok(())
}

/// How a new instance's WASI world starts: the policy, and what a primed
/// snapshot's `init` had already taken from the world (nothing, for an
/// instance that runs `init` itself).
#[derive(Clone, Debug)]
pub(crate) struct WasiStart {
    pub(crate) policy: WasiPolicy,
    pub(crate) carry: Carry,
    /// The fixed random streams' bytes under a fixed-randomness policy,
    /// hashed once per model rather than once per instance (256 SHA-256
    /// blocks were a tenth of a fresh JavaScript instance).
    streams: Option<Arc<FixedStreams>>,
}

impl WasiStart {
    /// How instances start under `policy`, after what priming `carry`s.
    pub(crate) fn new(policy: WasiPolicy, carry: Carry) -> Self {
        let streams = (policy.random == Ambient::Fixed).then(|| {
            Arc::new(FixedStreams {
                secure: stream(policy.seed, b"secure"),
                insecure: stream(policy.seed, b"insecure"),
            })
        });
        WasiStart { policy, carry, streams }
    }
}

/// The bytes the fixed `random` and `insecure` streams cycle through.
struct FixedStreams {
    secure: Vec<u8>,
    insecure: Vec<u8>,
}

impl std::fmt::Debug for FixedStreams {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "FixedStreams({} + {} bytes)", self.secure.len(), self.insecure.len())
    }
}

/// What a model's `init` took from a fixed WASI world while it was primed:
/// the monotonic clock's reading after it, and every random draw, in order.
#[derive(Clone, Debug, Default, PartialEq, Eq, Serialize, serde::Deserialize)]
pub(crate) struct Carry {
    pub(crate) monotonic: u64,
    pub(crate) draws: Vec<Draw>,
}

/// One draw from a random stream.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, serde::Deserialize)]
pub(crate) enum Draw {
    /// `wasi:random/random#get-random-bytes` of this many bytes.
    Bytes(u64),
    /// `wasi:random/random#get-random-u64`.
    U64,
    /// `wasi:random/insecure#get-insecure-random-bytes` of this many bytes.
    InsecureBytes(u64),
    /// `wasi:random/insecure#get-insecure-random-u64`.
    InsecureU64,
}

/// Draws a priming may record; an `init` drawing more is not primed.
const MAX_DRAWS: usize = 4096;

impl Draw {
    /// Makes the draw from `random` (wasmtime-wasi's own functions, so the
    /// stream moves exactly as it does for the model).
    fn make(self, random: &mut wasmtime_wasi::random::WasiRandomCtx) -> wasmtime::Result<Vec<u8>> {
        use wasmtime_wasi::p2::bindings::random::{insecure::Host as _, random::Host as _};
        Ok(match self {
            Draw::Bytes(len) => random.get_random_bytes(len)?,
            Draw::U64 => random.get_random_u64()?.to_le_bytes().to_vec(),
            Draw::InsecureBytes(len) => random.get_insecure_random_bytes(len)?,
            Draw::InsecureU64 => random.get_insecure_random_u64()?.to_le_bytes().to_vec(),
        })
    }
}

/// Links, for priming a model under `policy`, the WASI functions whose
/// answers a snapshot may keep, recording what they hand out; the caller
/// makes every other import trap. These are:
///
/// - the environment: empty in every world paddock makes;
/// - under fixed clocks, both clocks' readings: the wall clock is a
///   constant, and the monotonic clock's reading is carried to every new
///   instance;
/// - under fixed randomness, the random streams and the insecure seed:
///   every draw is made again in each new instance's world.
///
/// Real clocks and randomness are not linked: a snapshot would freeze one
/// reading or one draw into every instance. Waits, streams, files and
/// sockets are not linked: they hand out handles a snapshot cannot carry.
///
/// What `init` took is then read from the store's WASI state with
/// [`WasiState::carry`].
///
/// # Errors
/// When wasmtime refuses a definition (a programming error).
pub(crate) fn link_for_priming<T: WasiHost>(
    linker: &mut Linker<T>,
    policy: &WasiPolicy,
    imports: &[String],
) -> wasmtime::Result<()> {
    for name in imports {
        let Some(interface) = name.strip_prefix("wasi:").and_then(|n| n.split_once('@')).map(|(i, _)| i) else {
            continue;
        };
        let mut at = linker.instance(name)?;
        match interface {
            "cli/environment" => {
                at.func_wrap("get-environment", |_, ()| Ok((Vec::<(String, String)>::new(),)))?;
                at.func_wrap("get-arguments", |_, ()| Ok((Vec::<String>::new(),)))?;
                at.func_wrap("initial-cwd", |_, ()| Ok((None::<String>,)))?;
            }
            "clocks/monotonic-clock" if policy.clocks == Ambient::Fixed => {
                at.func_wrap("now", |mut store: wasmtime::StoreContextMut<'_, T>, ()| {
                    Ok((store.data_mut().wasi().monotonic.now(),))
                })?;
                at.func_wrap("resolution", |mut store: wasmtime::StoreContextMut<'_, T>, ()| {
                    Ok((store.data_mut().wasi().monotonic.resolution(),))
                })?;
            }
            "clocks/wall-clock" if policy.clocks == Ambient::Fixed => {
                let now = Datetime { seconds: policy.fixed_time, nanoseconds: 0 };
                at.func_wrap("now", move |_, ()| Ok((now,)))?;
                at.func_wrap("resolution", |_, ()| Ok((Datetime { seconds: 1, nanoseconds: 0 },)))?;
            }
            "random/random" | "random/insecure" if policy.random == Ambient::Fixed => {
                let insecure = interface == "random/insecure";
                let (bytes, word) = if insecure {
                    ("get-insecure-random-bytes", "get-insecure-random-u64")
                } else {
                    ("get-random-bytes", "get-random-u64")
                };
                // Draws are recorded, at most MAX_DRAWS, and then made.
                let draw = |host: &mut T, draw: Draw| -> wasmtime::Result<Vec<u8>> {
                    let state = host.wasi();
                    if state.drawn.len() >= MAX_DRAWS {
                        wasmtime::bail!("init draws randomness more than {MAX_DRAWS} times");
                    }
                    state.drawn.push(draw);
                    draw.make(state.ctx.random())
                };
                at.func_wrap(bytes, move |mut store: wasmtime::StoreContextMut<'_, T>, (len,): (u64,)| {
                    Ok((draw(store.data_mut(), if insecure { Draw::InsecureBytes(len) } else { Draw::Bytes(len) })?,))
                })?;
                at.func_wrap(word, move |mut store: wasmtime::StoreContextMut<'_, T>, ()| {
                    let bytes = draw(store.data_mut(), if insecure { Draw::InsecureU64 } else { Draw::U64 })?;
                    Ok((u64::from_le_bytes(bytes.try_into().expect("eight bytes")),))
                })?;
            }
            "random/insecure-seed" if policy.random == Ambient::Fixed => {
                let seed = u128::from(policy.seed);
                at.func_wrap("insecure-seed", move |_, ()| Ok(((seed as u64, (seed >> 64) as u64),)))?;
            }
            _ => {}
        }
    }
    Ok(())
}

/// `wasi:clocks/wall-clock`'s `datetime`.
#[derive(Clone, Copy, wasmtime::component::ComponentType, wasmtime::component::Lower)]
#[component(record)]
struct Datetime {
    seconds: u64,
    nanoseconds: u32,
}

/// A wait of `wanted`. A wait that would end after the call's deadline can
/// never finish in time: the call stops at once with the deadline limit,
/// instead of holding its host thread asleep.
fn nap<T: WasiHost>(host: &mut T, wanted: Duration) -> wasmtime::Result<(Resource<DynPollable>,)> {
    let until = Instant::now() + wanted;
    if until > host.call_ends() {
        return Err(wasmtime::Error::new(LimitHit::Deadline { limit: host.deadline() }));
    }
    let nap = host.wasi().table().push(Nap(tokio::time::Instant::from_std(until)))?;
    Ok((wasmtime_wasi::p2::subscribe(host.wasi().table(), nap)?,))
}

/// A wait that ends at a fixed instant.
struct Nap(tokio::time::Instant);

#[wasmtime_wasi::async_trait]
impl Pollable for Nap {
    async fn ready(&mut self) {
        tokio::time::sleep_until(self.0).await;
    }
}

/// Keeps the first `cap` bytes written since the last drain; counts the rest.
#[derive(Clone)]
struct Capture {
    cap: usize,
    inner: Arc<Mutex<Captured>>,
}

#[derive(Default)]
struct Captured {
    kept: Vec<u8>,
    dropped: u64,
}

impl Capture {
    fn new(cap: usize) -> Self {
        Capture { cap, inner: Arc::default() }
    }

    fn push(&self, bytes: &[u8]) {
        let mut c = self.inner.lock().unwrap_or_else(|p| p.into_inner());
        let room = self.cap.saturating_sub(c.kept.len());
        let take = room.min(bytes.len());
        c.kept.extend_from_slice(&bytes[..take]);
        c.dropped += (bytes.len() - take) as u64;
    }

    fn drain(&self, who: &str, stream: &str) {
        let (kept, dropped) = {
            let mut c = self.inner.lock().unwrap_or_else(|p| p.into_inner());
            (std::mem::take(&mut c.kept), std::mem::take(&mut c.dropped))
        };
        if kept.is_empty() && dropped == 0 {
            return;
        }
        let text = String::from_utf8_lossy(&kept);
        if dropped > 0 {
            tracing::info!(target: "paddock::guest", model = who, stream, dropped, cap = self.cap, "{}", text.trim_end());
        } else {
            tracing::info!(target: "paddock::guest", model = who, stream, "{}", text.trim_end());
        }
    }
}

impl IsTerminal for Capture {
    fn is_terminal(&self) -> bool {
        false
    }
}

impl StdoutStream for Capture {
    fn p2_stream(&self) -> Box<dyn OutputStream> {
        Box::new(self.clone())
    }
    fn async_stream(&self) -> Box<dyn tokio::io::AsyncWrite + Send + Sync> {
        Box::new(self.clone())
    }
}

#[wasmtime_wasi::async_trait]
impl OutputStream for Capture {
    fn write(&mut self, bytes: bytes::Bytes) -> StreamResult<()> {
        self.push(&bytes);
        Ok(())
    }
    fn flush(&mut self) -> StreamResult<()> {
        Ok(())
    }
    fn check_write(&mut self) -> Result<usize, StreamError> {
        Ok(64 << 10)
    }
}

#[wasmtime_wasi::async_trait]
impl Pollable for Capture {
    async fn ready(&mut self) {}
}

impl tokio::io::AsyncWrite for Capture {
    fn poll_write(self: Pin<&mut Self>, _: &mut Context<'_>, buf: &[u8]) -> Poll<std::io::Result<usize>> {
        self.push(buf);
        Poll::Ready(Ok(buf.len()))
    }
    fn poll_flush(self: Pin<&mut Self>, _: &mut Context<'_>) -> Poll<std::io::Result<()>> {
        Poll::Ready(Ok(()))
    }
    fn poll_shutdown(self: Pin<&mut Self>, _: &mut Context<'_>) -> Poll<std::io::Result<()>> {
        Poll::Ready(Ok(()))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn capture_keeps_the_first_bytes_and_counts_the_rest() {
        let c = Capture::new(5);
        c.push(b"abc");
        c.push(b"defgh");
        let inner = c.inner.lock().unwrap();
        assert_eq!(inner.kept, b"abcde");
        assert_eq!(inner.dropped, 3);
    }

    #[test]
    fn every_wasi_interface_of_a_python_guest_has_an_answer() {
        // The imports componentize-py 0.25.1 gives a component (read from one).
        for name in [
            "wasi:io/poll",
            "wasi:clocks/monotonic-clock",
            "wasi:clocks/wall-clock",
            "wasi:random/random",
            "wasi:io/error",
            "wasi:io/streams",
            "wasi:cli/stdout",
            "wasi:cli/stderr",
            "wasi:cli/stdin",
            "wasi:cli/environment",
            "wasi:cli/exit",
            "wasi:cli/terminal-input",
            "wasi:cli/terminal-output",
            "wasi:cli/terminal-stdin",
            "wasi:cli/terminal-stdout",
            "wasi:cli/terminal-stderr",
            "wasi:filesystem/types",
            "wasi:filesystem/preopens",
            "wasi:sockets/network",
            "wasi:sockets/instance-network",
            "wasi:sockets/udp",
            "wasi:sockets/udp-create-socket",
            "wasi:sockets/tcp",
            "wasi:sockets/tcp-create-socket",
            "wasi:sockets/ip-name-lookup",
        ] {
            assert!(satisfied_by(&format!("{name}@0.2.9"), &WasiPolicy::default()).is_some(), "{name}");
        }
        assert_eq!(satisfied_by("wasi:http/types@0.2.9", &WasiPolicy::default()), None);
    }

    #[test]
    fn fixed_randomness_depends_on_the_seed_only() {
        assert_eq!(stream(7, b"secure"), stream(7, b"secure"));
        assert_ne!(stream(7, b"secure"), stream(8, b"secure"));
        assert_eq!(stream(7, b"secure").len(), 4096);
    }
}
