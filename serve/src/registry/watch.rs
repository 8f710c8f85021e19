//! Noticing changes to the store: the system's file watcher (inotify,
//! FSEvents…) through `notify`, with a periodic rescan as a fallback for
//! file systems that send no events (network mounts, some containers).
//!
//! Events are let settle before a reload, so an artifact copied in pieces
//! is read once, whole. A partly written file that is read anyway is
//! refused by the gate and read again on the next event or rescan; writing
//! to a temporary name and renaming into place avoids even that.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{RecvTimeoutError, channel};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use notify::{RecursiveMode, Watcher as _};

use super::{Registry, RegistryError};

/// Keeps a registry in step with its store until dropped.
pub struct Watcher {
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
    _system: Option<notify::RecommendedWatcher>,
}

impl std::fmt::Debug for Watcher {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Watcher").field("system_events", &self._system.is_some()).finish()
    }
}

impl Drop for Watcher {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::SeqCst);
        // Dropping the system watcher closes the channel and wakes the thread.
        self._system.take();
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl Watcher {
    /// Rescans every `rescan` only, with no system events.
    ///
    /// # Errors
    /// [`RegistryError::Watch`] when the thread cannot start.
    pub fn polling(registry: Registry, rescan: Duration) -> Result<Watcher, RegistryError> {
        Self::start(registry, Duration::ZERO, rescan, false)
    }

    pub(super) fn start(
        registry: Registry,
        settle: Duration,
        rescan: Duration,
        events: bool,
    ) -> Result<Watcher, RegistryError> {
        let dir = registry.dir().to_owned();
        let failed = |reason: String| RegistryError::Watch { path: dir.clone(), reason };
        let (tx, rx) = channel::<notify::Result<notify::Event>>();
        let system = if events {
            let mut w = notify::recommended_watcher(tx).map_err(|e| failed(e.to_string()))?;
            w.watch(&dir, RecursiveMode::Recursive).map_err(|e| failed(e.to_string()))?;
            Some(w)
        } else {
            drop(tx);
            None
        };
        let stop = Arc::new(AtomicBool::new(false));
        let thread_stop = stop.clone();
        let state_dir = registry.state_dir().to_owned();
        let thread = std::thread::Builder::new()
            .name("paddock-watch".into())
            .spawn(move || {
                let mut next_rescan = Instant::now() + rescan;
                while !thread_stop.load(Ordering::SeqCst) {
                    let wait = next_rescan.saturating_duration_since(Instant::now());
                    let wake = match rx.recv_timeout(wait.min(Duration::from_millis(250))) {
                        Ok(Ok(event)) => relevant(&event, &state_dir),
                        Ok(Err(e)) => {
                            tracing::warn!(error = %e, "file watcher error; relying on the periodic rescan");
                            false
                        }
                        Err(RecvTimeoutError::Timeout) => Instant::now() >= next_rescan,
                        // No system watcher (polling only, or it shut down).
                        Err(RecvTimeoutError::Disconnected) => {
                            std::thread::sleep(wait.min(Duration::from_millis(50)));
                            Instant::now() >= next_rescan
                        }
                    };
                    if !wake || thread_stop.load(Ordering::SeqCst) {
                        continue;
                    }
                    // Let a burst of events settle.
                    let quiet_until = Instant::now() + settle;
                    while rx.recv_timeout(quiet_until.saturating_duration_since(Instant::now())).is_ok() {}
                    match registry.reload() {
                        Ok(r) if r.changed => tracing::info!(
                            generation = r.generation,
                            took_ms = r.took.as_secs_f64() * 1e3,
                            "store reloaded"
                        ),
                        Ok(_) => {}
                        Err(e) => tracing::warn!(error = %e, "store reload failed; the current snapshot keeps serving"),
                    }
                    next_rescan = Instant::now() + rescan;
                }
            })
            .map_err(|e| failed(e.to_string()))?;
        Ok(Watcher { stop, thread: Some(thread), _system: system })
    }
}

/// Whether an event may change what is served: anything outside the
/// host's own state directory.
fn relevant(event: &notify::Event, state_dir: &Path) -> bool {
    if event.kind.is_access() {
        return false;
    }
    event.paths.is_empty() || event.paths.iter().any(|p| !p.starts_with(state_dir))
}
