//! What a host does with a shared store: keep a directory copy of it (the
//! mirror) in its state directory, and have its registry serve that copy.
//!
//! Every change is taken in store order (a watch from the last revision
//! applied, so a host that was cut off catches up on everything published
//! meanwhile). An object is checked before it is written: its size against
//! the size cap (from the entry, before any byte is fetched), its bytes
//! against the digest the entry names. Files are replaced whole. When the
//! mirror has caught up, the registry reloads it: the same gate as a
//! directory store (trust, checks, code cache) and the same swap, so a
//! request never sees half a change and a refused object leaves the
//! previous version serving.
//!
//! At start, a host that cannot reach the server serves the mirror it has
//! (and says since when it is stale); a host with no mirror yet waits and
//! keeps retrying, saying so, rather than serve an empty store.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use async_nats::jetstream::kv;
use futures_util::StreamExt as _;
use jiff::Timestamp;
use serde::{Deserialize, Serialize};
use tokio::io::AsyncReadExt as _;

use super::publish::relative_inside;
use super::{
    Credentials, FileEntry, Key, SharedError, SharedStore, StoreAddress, TableRecord, VersionRecord, artifact_object,
    presence, table_object,
};
use crate::registry::{MirrorState, Registry, RegistryOptions, SyncProblem};
use paddock_host::artifact::digest::Digest;
use paddock_host::artifact::trust::Vouch;
use paddock_host::sandbox::Runtime;

/// The mirror's directory inside the host's state directory.
pub const MIRROR_DIR: &str = "mirror";

/// The file beside it saying what it mirrors and how far it got.
pub const MARKER_FILE: &str = "mirror.json";

/// How a host follows a shared store.
#[derive(Clone, Debug)]
#[non_exhaustive]
pub struct MirrorOptions {
    /// This host's name in the store's presence list. Default:
    /// `HOSTNAME-PID`.
    pub host: String,
    /// How often the host reports its presence and retries entries it could
    /// not take. Default 2 s.
    pub heartbeat: Duration,
    /// The pause between attempts to reach the server. Default 1 s.
    pub retry: Duration,
}

impl Default for MirrorOptions {
    fn default() -> Self {
        MirrorOptions {
            host: presence::default_host_name(),
            heartbeat: Duration::from_secs(2),
            retry: Duration::from_secs(1),
        }
    }
}

/// What the marker file says.
#[derive(Debug, Serialize, Deserialize)]
struct Marker {
    source: String,
    revision: u64,
    #[serde(default)]
    routes_revision: Option<u64>,
    synced_at: String,
}

/// A host's mirror of a shared store, followed on a thread of its own
/// until dropped.
pub struct Mirror {
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl std::fmt::Debug for Mirror {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Mirror").finish_non_exhaustive()
    }
}

impl Drop for Mirror {
    fn drop(&mut self) {
        if let Some(stop) = self.stop.take() {
            let _ = stop.send(());
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// Why a mirror could not be opened.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum MirrorError {
    /// A shared store's mirror lives in the host's state directory: none was given.
    #[error("a shared store is mirrored into the host's state directory: give one (`RegistryOptions::state_dir`)")]
    NoStateDir,
    /// The state directory mirrors another store.
    #[error("{path} mirrors {source_store}, not {asked}: give this store a state directory of its own")]
    Foreign {
        /// The marker file.
        path: PathBuf,
        /// The store it mirrors.
        source_store: String,
        /// The store asked for.
        asked: String,
    },
    /// The mirror's directory or marker could not be used.
    #[error("{path}: {cause}")]
    Io {
        /// The file or directory.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// The mirror's thread could not start, or stopped before it was ready.
    #[error("the mirror's thread: {0}")]
    Thread(String),
    /// The registry could not be opened on the mirror.
    #[error(transparent)]
    Registry(#[from] crate::registry::RegistryError),
}

impl Mirror {
    /// Opens a registry on this host's mirror of `address`: catches the
    /// mirror up first when the server answers; serves the mirror as it is
    /// (stale, and saying so) when it does not; waits, retrying, when there
    /// is no mirror yet. Then follows the store on a thread of its own until
    /// the returned [`Mirror`] is dropped.
    ///
    /// `options.state_dir` is required: the mirror is `STATE/mirror`.
    ///
    /// # Errors
    /// [`MirrorError::NoStateDir`], [`MirrorError::Foreign`] when the state
    /// directory mirrors another store, [`MirrorError::Io`],
    /// [`MirrorError::Registry`] as [`Registry::open`].
    pub fn open(
        runtime: &Runtime,
        address: &StoreAddress,
        credentials: &Credentials,
        options: RegistryOptions,
        mirror: MirrorOptions,
    ) -> Result<(Registry, Mirror), MirrorError> {
        let state_dir = options.state_dir.clone().ok_or(MirrorError::NoStateDir)?;
        let dir = state_dir.join(MIRROR_DIR);
        std::fs::create_dir_all(&dir).map_err(|cause| MirrorError::Io { path: dir.clone(), cause })?;
        let marker_path = state_dir.join(MARKER_FILE);
        let marker = read_marker(&marker_path)?;
        if let Some(m) = &marker
            && m.source != address.to_string()
        {
            return Err(MirrorError::Foreign {
                path: marker_path,
                source_store: m.source.clone(),
                asked: address.to_string(),
            });
        }
        let follower = Follower {
            address: address.clone(),
            credentials: credentials.clone(),
            dir: dir.clone(),
            marker_path,
            size_cap: options.size_cap,
            options: mirror,
            state: MirrorState::new(address.to_string()),
            problems: BTreeMap::new(),
            retries: BTreeMap::new(),
            beats: 0,
            dirty: false,
        };
        let had_mirror = marker.is_some();
        let revision = marker.as_ref().map_or(0, |m| m.revision);
        let routes_revision = marker.as_ref().and_then(|m| m.routes_revision);
        let synced_at = marker.map(|m| m.synced_at);
        let (ready_tx, ready_rx) = std::sync::mpsc::channel::<MirrorState>();
        let (registry_tx, registry_rx) = tokio::sync::oneshot::channel::<Registry>();
        let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
        let thread = std::thread::Builder::new()
            .name("paddock-mirror".into())
            .spawn(move || {
                let rt = match tokio::runtime::Builder::new_current_thread().enable_all().build() {
                    Ok(rt) => rt,
                    Err(e) => {
                        tracing::error!(error = %e, "cannot start the mirror's runtime");
                        return;
                    }
                };
                let mut follower = follower;
                follower.state.revision = revision;
                follower.state.routes_revision = routes_revision;
                follower.state.synced_at = synced_at;
                rt.block_on(follower.run(had_mirror, ready_tx, registry_rx, stop_rx));
            })
            .map_err(|e| MirrorError::Thread(e.to_string()))?;
        let mut handle = Mirror { stop: Some(stop_tx), thread: Some(thread) };
        let state = ready_rx
            .recv()
            .map_err(|_| MirrorError::Thread("it stopped before the mirror was ready (see the log)".into()))?;
        let registry = Registry::open(runtime, &dir, options)?;
        registry.set_mirror_state(state);
        if registry_tx.send(registry.clone()).is_err() {
            handle.stop.take();
            return Err(MirrorError::Thread("it stopped while the registry opened (see the log)".into()));
        }
        Ok((registry, handle))
    }
}

fn read_marker(path: &Path) -> Result<Option<Marker>, MirrorError> {
    match std::fs::read(path) {
        Ok(bytes) => Ok(serde_json::from_slice(&bytes).ok()),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
        Err(cause) => Err(MirrorError::Io { path: path.to_owned(), cause }),
    }
}

/// The mirror's thread.
struct Follower {
    address: StoreAddress,
    credentials: Credentials,
    dir: PathBuf,
    marker_path: PathBuf,
    size_cap: u64,
    options: MirrorOptions,
    state: MirrorState,
    problems: BTreeMap<String, SyncProblem>,
    /// When each refused entry is tried again: every heartbeat at first,
    /// then half as often after each failure (at most every 32 beats), so
    /// a tampered 18 MiB object is not fetched every two seconds.
    retries: BTreeMap<String, (u32, u64)>,
    /// Heartbeats so far.
    beats: u64,
    /// The mirror changed since the registry last reloaded it.
    dirty: bool,
}

/// How following the store ended.
enum Ended {
    Stopped,
    Lost(String),
}

impl Follower {
    async fn run(
        mut self,
        had_mirror: bool,
        ready: std::sync::mpsc::Sender<MirrorState>,
        registry: tokio::sync::oneshot::Receiver<Registry>,
        mut stop: tokio::sync::oneshot::Receiver<()>,
    ) {
        let since = Timestamp::now().to_string();
        self.state.stale_since = Some(since.clone());
        // Until the mirror is ready: catch up, or serve the one there is.
        let store = loop {
            match self.catch_up_once().await {
                Ok(store) => break Some(store),
                Err(e) if had_mirror => {
                    tracing::warn!(store = %self.address, error = %e, revision = self.state.revision,
                        "cannot reach the shared store: serving the mirror as it is, stale, and retrying");
                    break None;
                }
                Err(e) => {
                    tracing::warn!(store = %self.address, error = %e, retry_ms = self.options.retry.as_millis() as u64,
                        "cannot reach the shared store and there is no mirror yet: nothing to serve; retrying");
                }
            }
            tokio::select! {
                _ = &mut stop => return,
                () = tokio::time::sleep(self.options.retry) => {}
            }
        };
        if ready.send(self.state.clone()).is_err() {
            return;
        }
        let registry = tokio::select! {
            _ = &mut stop => return,
            r = registry => match r { Ok(r) => r, Err(_) => return },
        };
        // The registry opened on the mirror as it is now: nothing to reload.
        self.dirty = false;
        let mut store = store;
        loop {
            let s = match store.take() {
                Some(s) => s,
                None => match SharedStore::connect(&self.address, &self.credentials, false).await {
                    Ok(s) => s,
                    Err(e) => {
                        tracing::debug!(store = %self.address, error = %e, "the shared store is still out of reach");
                        self.lost(&registry);
                        tokio::select! {
                            _ = &mut stop => return,
                            () = tokio::time::sleep(self.options.retry) => continue,
                        }
                    }
                },
            };
            match self.follow(&s, &registry, &mut stop).await {
                Ended::Stopped => return,
                Ended::Lost(why) => {
                    tracing::warn!(store = %self.address, reason = %why, "lost the shared store's watch; catching up again");
                    self.lost(&registry);
                    // The client reconnects by itself: keep it, follow again.
                    store = Some(s);
                    tokio::select! {
                        _ = &mut stop => return,
                        () = tokio::time::sleep(self.options.retry) => {}
                    }
                }
            }
        }
    }

    /// Marks the mirror stale (from now, unless it already was) and says so.
    fn lost(&mut self, registry: &Registry) {
        self.state.connected = false;
        if self.state.stale_since.is_none() {
            self.state.stale_since = Some(Timestamp::now().to_string());
        }
        registry.set_mirror_state(self.state.clone());
    }

    /// Connects and applies every change up to the store's latest revision.
    async fn catch_up_once(&mut self) -> Result<SharedStore, SharedError> {
        let store = SharedStore::connect(&self.address, &self.credentials, false).await?;
        let latest = store.latest_revision().await?;
        self.state.latest = latest;
        if latest > self.state.revision {
            let mut watch = store
                .entries
                .watch_all_from_revision(self.state.revision + 1)
                .await
                .map_err(|e| SharedError::js("watching the store", e))?;
            while let Some(entry) = watch.next().await {
                let entry = entry.map_err(|e| SharedError::js("watching the store", e))?;
                let (revision, pending) = (entry.revision, entry.delta);
                self.apply(&store, entry).await;
                if pending == 0 || revision >= latest {
                    break;
                }
            }
        }
        self.synced();
        Ok(store)
    }

    /// Follows the store until told to stop or the watch is lost; reloads
    /// the registry each time the mirror has caught up.
    async fn follow(
        &mut self,
        store: &SharedStore,
        registry: &Registry,
        stop: &mut tokio::sync::oneshot::Receiver<()>,
    ) -> Ended {
        let latest = match store.latest_revision().await {
            Ok(l) => l,
            Err(e) => return Ended::Lost(e.to_string()),
        };
        self.state.latest = latest;
        self.state.connected = true;
        let mut watch = match store.entries.watch_all_from_revision(self.state.revision + 1).await {
            Ok(w) => w,
            Err(e) => return Ended::Lost(e.to_string()),
        };
        if latest <= self.state.revision {
            self.caught_up(registry).await;
        }
        let mut tick = tokio::time::interval(self.options.heartbeat);
        // Heartbeats without progress while the store is ahead of us.
        let mut stalled = 0u32;
        loop {
            tokio::select! {
                _ = &mut *stop => return Ended::Stopped,
                entry = watch.next() => match entry {
                    Some(Ok(entry)) => {
                        stalled = 0;
                        let pending = entry.delta;
                        self.state.latest = self.state.latest.max(entry.revision);
                        self.apply(store, entry).await;
                        if pending == 0 {
                            self.caught_up(registry).await;
                        }
                    }
                    Some(Err(e)) => return Ended::Lost(e.to_string()),
                    None => return Ended::Lost("the watch ended".into()),
                },
                _ = tick.tick() => {
                    self.state.connected = store.connected();
                    if !self.state.connected {
                        self.lost(registry);
                        continue;
                    }
                    match store.latest_revision().await {
                        Ok(latest) => {
                            self.state.latest = latest;
                            if latest > self.state.revision {
                                stalled += 1;
                                // The watch went quiet (a server restart drops
                                // its consumer): make a new one.
                                if stalled >= 2 {
                                    return Ended::Lost(format!("no change arrived while the store is at revision {latest}"));
                                }
                            } else if self.state.stale_since.is_some() {
                                self.caught_up(registry).await;
                            }
                        }
                        Err(e) => return Ended::Lost(e.to_string()),
                    }
                    self.retry_problems(store, registry).await;
                    presence::beat(store, &self.options, registry.status(), self.state.clone()).await;
                }
            }
        }
    }

    /// The mirror holds every change up to the latest revision: reload the
    /// registry if anything changed, and record it.
    async fn caught_up(&mut self, registry: &Registry) {
        if std::mem::take(&mut self.dirty) {
            let r = registry.clone();
            match tokio::task::spawn_blocking(move || r.reload()).await {
                Ok(Ok(report)) => tracing::info!(store = %self.address, revision = self.state.revision,
                    loaded = ?report.loaded, refused = report.refused.len(), "mirror caught up"),
                Ok(Err(e)) => tracing::warn!(store = %self.address, error = %e, "cannot reload the mirror"),
                Err(e) => tracing::warn!(store = %self.address, error = %e, "the reload panicked"),
            }
        }
        self.state.connected = true;
        self.synced();
        registry.set_mirror_state(self.state.clone());
    }

    /// Records that the mirror holds the store up to its revision now.
    fn synced(&mut self) {
        let now = Timestamp::now().to_string();
        self.state.synced_at = Some(now.clone());
        self.state.stale_since = None;
        self.state.problems = self.problems.values().cloned().collect();
        let marker = Marker {
            source: self.address.to_string(),
            revision: self.state.revision,
            routes_revision: self.state.routes_revision,
            synced_at: now,
        };
        let bytes = serde_json::to_vec_pretty(&marker).expect("a marker serialises");
        if let Err(e) = paddock_host::atomic_file::write(&self.marker_path, &bytes) {
            tracing::warn!(file = %self.marker_path.display(), error = %e, "cannot write the mirror's marker");
        }
    }

    /// Applies one change to the mirror's files.
    async fn apply(&mut self, store: &SharedStore, entry: kv::Entry) {
        let revision = entry.revision;
        let key = entry.key.clone();
        let outcome = match Key::parse(&key) {
            None => Ok(false),
            Some(Key::File(file)) => self.apply_file(file, &entry),
            Some(Key::Version(model, version)) => {
                let path = self.dir.join(&model).join(format!("{version}.wasm"));
                self.apply_version(store, &path, &entry).await
            }
            Some(Key::Table(path)) => self.apply_table(store, &path, &entry).await,
        };
        match outcome {
            Ok(changed) => {
                self.dirty |= changed;
                self.problems.remove(&key);
                self.retries.remove(&key);
            }
            Err(reason) => {
                tracing::warn!(store = %self.address, key = %key, revision, reason = %reason,
                    "refused a change from the shared store; what was there before stays");
                let failures = self.retries.get(&key).map_or(0, |(f, _)| f + 1);
                self.retries.insert(key.clone(), (failures, self.beats + (1u64 << failures.min(5))));
                self.problems.insert(key.clone(), SyncProblem { key, revision, reason });
            }
        }
        self.state.revision = self.state.revision.max(revision);
        self.state.problems = self.problems.values().cloned().collect();
    }

    fn apply_file(&mut self, file: FileEntry, entry: &kv::Entry) -> Result<bool, String> {
        let path = self.dir.join(file.file());
        if file == FileEntry::Routes {
            self.state.routes_revision = (entry.operation == kv::Operation::Put).then_some(entry.revision);
        }
        if entry.operation == kv::Operation::Put { write(&path, &entry.value) } else { remove(&path) }
    }

    async fn apply_version(&self, store: &SharedStore, path: &Path, entry: &kv::Entry) -> Result<bool, String> {
        let vouch_path = Vouch::path_for(path);
        if entry.operation != kv::Operation::Put {
            let a = remove(path)?;
            let b = remove(&vouch_path)?;
            return Ok(a || b);
        }
        let record: VersionRecord =
            serde_json::from_slice(&entry.value).map_err(|e| format!("the entry is not a version record: {e}"))?;
        let has = std::fs::read(path).ok().map(|b| Digest::of(&b));
        let vouch_changed = match &record.vouch {
            Some(text) => write(&vouch_path, text.as_bytes())?,
            None => remove(&vouch_path)?,
        };
        if has == Some(record.digest) {
            return Ok(vouch_changed);
        }
        let bytes = self.fetch(store, &artifact_object(&record.digest), record.digest, record.bytes).await?;
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent).map_err(|e| format!("{}: {e}", parent.display()))?;
        }
        write(path, &bytes)?;
        Ok(true)
    }

    async fn apply_table(&self, store: &SharedStore, rel: &str, entry: &kv::Entry) -> Result<bool, String> {
        if !relative_inside(rel) {
            return Err(format!("the table path {rel} is not relative to the store, or leaves it"));
        }
        let path = self.dir.join(rel);
        if entry.operation != kv::Operation::Put {
            return remove(&path);
        }
        let record: TableRecord =
            serde_json::from_slice(&entry.value).map_err(|e| format!("the entry is not a table record: {e}"))?;
        if std::fs::read(&path).ok().map(|b| Digest::of(&b)) == Some(record.digest) {
            return Ok(false);
        }
        let bytes = self.fetch(store, &table_object(&record.digest), record.digest, record.bytes).await?;
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent).map_err(|e| format!("{}: {e}", parent.display()))?;
        }
        write(&path, &bytes)?;
        Ok(true)
    }

    /// Fetches an object, refusing it over the size cap (from the entry and
    /// the object's own size, before any byte is fetched) and unless its
    /// bytes have the digest the entry names.
    async fn fetch(&self, store: &SharedStore, object: &str, digest: Digest, bytes: u64) -> Result<Vec<u8>, String> {
        let cap = self.size_cap;
        let over = |size: u64| format!("{object} is {size} bytes, over the size cap of {cap} bytes; not fetched");
        if bytes > cap {
            return Err(over(bytes));
        }
        let mut reader = store.files.get(object).await.map_err(|e| format!("cannot fetch {object}: {e}"))?;
        let size = reader.info().size as u64;
        if size > cap {
            return Err(over(size));
        }
        let mut out = Vec::with_capacity(size as usize);
        (&mut reader)
            .take(cap + 1)
            .read_to_end(&mut out)
            .await
            .map_err(|e| format!("cannot fetch {object} whole: {e}"))?;
        if out.len() as u64 > cap {
            return Err(over(out.len() as u64));
        }
        let got = Digest::of(&out);
        if got != digest {
            return Err(format!("{object} holds bytes whose digest is {got}, not the {digest} its entry names"));
        }
        Ok(out)
    }

    /// Tries again the entries whose objects were refused (an object that
    /// was missing may have arrived).
    async fn retry_problems(&mut self, store: &SharedStore, registry: &Registry) {
        self.beats += 1;
        let due: Vec<String> =
            self.retries.iter().filter(|(_, (_, at))| *at <= self.beats).map(|(k, _)| k.clone()).collect();
        let keys: Vec<String> = due.into_iter().filter(|k| self.problems.contains_key(k)).collect();
        if keys.is_empty() {
            return;
        }
        for key in keys {
            if let Ok(Some(entry)) = store.entries.entry(&key).await {
                self.apply(store, entry).await;
            }
        }
        if self.dirty {
            self.caught_up(registry).await;
        }
    }
}

/// Writes `path` whole if its bytes differ; whether it changed.
fn write(path: &Path, bytes: &[u8]) -> Result<bool, String> {
    if std::fs::read(path).ok().as_deref() == Some(bytes) {
        return Ok(false);
    }
    paddock_host::atomic_file::write_readable(path, bytes).map_err(|e| format!("{}: {e}", path.display()))?;
    Ok(true)
}

/// Removes `path` if it is there; whether it was.
fn remove(path: &Path) -> Result<bool, String> {
    match std::fs::remove_file(path) {
        Ok(()) => Ok(true),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(false),
        Err(e) => Err(format!("{}: {e}", path.display())),
    }
}
