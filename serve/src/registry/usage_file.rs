//! The usage file (`<state>/usage.json`) and the lock that gives one
//! process a state directory.
//!
//! A registry that keeps usage takes `<state>/lock` (an advisory lock the
//! system drops when the process ends, however it ends), adds what the
//! file holds to its ledger, and writes the whole ledger back every flush
//! interval and when it is dropped — each write atomic, so a `kill -9`
//! loses at most the calls since the last flush. A second process on the
//! same state directory is refused, naming the one that holds it.

use std::fs::{File, OpenOptions};
use std::io::{Read as _, Seek as _, Write as _};
use std::path::{Path, PathBuf};

use jiff::Timestamp;
use serde::{Deserialize, Serialize};

use super::RegistryError;
use super::ledger::{Ledger, SavedWall, UsageReport};

/// The path of the usage file in a state directory.
pub fn usage_path(state_dir: &Path) -> PathBuf {
    state_dir.join("usage.json")
}

/// The usage file: a registry's ledger, written by
/// [`Registry::save_usage`](super::Registry::save_usage).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SavedUsage {
    /// The store served (its full path, since usage files name it so).
    pub store: PathBuf,
    /// The machine it was served on (its host name), when known.
    #[serde(default)]
    pub host: Option<String>,
    /// The process that wrote it last.
    pub pid: u32,
    /// When (RFC 3339).
    pub written: String,
    /// The figures, summed over every process that served the store with
    /// this state directory.
    pub usage: UsageReport,
    /// Each version's wall-time histogram, so percentiles add up across
    /// restarts too.
    #[serde(default)]
    pub walls: Vec<SavedWall>,
}

/// The lock on a state directory, held while the value lives.
#[derive(Debug)]
pub(crate) struct StateLock {
    _file: File,
}

impl StateLock {
    /// Takes `<state>/lock`, writing this process's id into it.
    pub(crate) fn take(state_dir: &Path) -> Result<StateLock, RegistryError> {
        let path = state_dir.join("lock");
        let io = |cause| RegistryError::State { path: path.clone(), cause };
        std::fs::create_dir_all(state_dir)
            .map_err(|cause| RegistryError::State { path: state_dir.to_owned(), cause })?;
        let mut file =
            OpenOptions::new().read(true).write(true).create(true).truncate(false).open(&path).map_err(io)?;
        match file.try_lock() {
            Ok(()) => {}
            Err(std::fs::TryLockError::WouldBlock) => {
                let mut holder = String::new();
                let _ = file.read_to_string(&mut holder);
                let holder = holder.trim().parse::<u32>().ok();
                return Err(RegistryError::Locked { path, holder });
            }
            Err(std::fs::TryLockError::Error(e)) => return Err(io(e)),
        }
        file.set_len(0).map_err(io)?;
        file.rewind().map_err(io)?;
        write!(file, "{}", std::process::id()).map_err(io)?;
        Ok(StateLock { _file: file })
    }
}

/// This machine's host name, when the system says it (Linux).
fn host_name() -> Option<String> {
    let name = std::fs::read_to_string("/proc/sys/kernel/hostname").ok()?;
    Some(name.trim().to_owned()).filter(|n| !n.is_empty())
}

/// Refuses a state directory whose usage file belongs to another store or
/// another machine: a store copied with `cp -r` (or shared over a network
/// file system) brings its state directory along, and its figures are not
/// this host's. A file from before paddock recorded full paths and hosts
/// (a relative store path, no host) is taken as it is.
pub(crate) fn refuse_foreign(state_dir: &Path, store: &Path) -> Result<(), RegistryError> {
    let path = usage_path(state_dir);
    let Ok(bytes) = std::fs::read(&path) else { return Ok(()) };
    let Ok(saved) = serde_json::from_slice::<SavedUsage>(&bytes) else { return Ok(()) };
    let here = std::fs::canonicalize(store).unwrap_or_else(|_| store.to_owned());
    let other_store = saved.store.is_absolute() && saved.store != here;
    let this_host = host_name();
    let other_host = saved.host.is_some() && this_host.is_some() && saved.host != this_host;
    if other_store || other_host {
        return Err(RegistryError::ForeignState {
            path,
            store: saved.store,
            host: saved.host.unwrap_or_else(|| "an unnamed host".to_owned()),
        });
    }
    Ok(())
}

/// Adds the usage file's figures to `ledger`. A file that does not parse
/// is moved aside (`usage.json.unreadable`), never overwritten, and said.
pub(crate) fn merge(state_dir: &Path, ledger: &Ledger) {
    let path = usage_path(state_dir);
    let bytes = match std::fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return,
        Err(e) => {
            tracing::warn!(file = %path.display(), error = %e, "cannot read the usage file; usage starts again from zero");
            return;
        }
    };
    match serde_json::from_slice::<SavedUsage>(&bytes) {
        Ok(saved) => ledger.absorb(&saved.usage, &saved.walls),
        Err(e) => {
            let aside = path.with_extension("json.unreadable");
            let moved = std::fs::rename(&path, &aside);
            tracing::warn!(
                file = %path.display(),
                error = %e,
                kept_as = %aside.display(),
                moved = moved.is_ok(),
                "the usage file does not parse; it was kept aside and usage starts again from zero"
            );
        }
    }
}

/// Writes the ledger to the usage file, atomically.
pub(crate) fn save(state_dir: &Path, store: &Path, ledger: &Ledger) -> std::io::Result<PathBuf> {
    let path = usage_path(state_dir);
    std::fs::create_dir_all(state_dir)?;
    let saved = SavedUsage {
        store: std::fs::canonicalize(store).unwrap_or_else(|_| store.to_owned()),
        host: host_name(),
        pid: std::process::id(),
        written: Timestamp::now().to_string(),
        usage: ledger.report(),
        walls: ledger.walls(),
    };
    let bytes = serde_json::to_vec_pretty(&saved).map_err(std::io::Error::other)?;
    paddock_host::atomic_file::write(&path, &bytes)?;
    Ok(path)
}
