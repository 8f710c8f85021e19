//! Compiled code kept on disk, so a restart does not recompile every model.
//!
//! An entry is the machine code wasmtime made for one artifact under one
//! engine configuration. Its file name is a sha256 over the artifact's
//! digest, the wasmtime version and the engine's compatibility hash (every
//! setting that changes the code), so a changed artifact, a new wasmtime or
//! a different [`RuntimeConfig`](crate::RuntimeConfig) simply misses.
//!
//! Loading machine code is trusting it: wasmtime cannot check it. So the
//! cache only ever loads entries it wrote itself, and guards them:
//! - the directory is created private (0700) and refused if anyone but its
//!   owner may write to it;
//! - beside each entry lies a checksum of it (`<entry>.sum`, XXH3 of 128
//!   bits: it catches accidents, not forgeries, which the directory's
//!   permissions are for; it reads 30 MB of machine code in about a
//!   millisecond where sha256 took a third of a cached load); an entry
//!   whose checksum does not hold (a torn write, a flipped bit, an edit) or
//!   is missing is deleted and the artifact compiled again;
//! - a sound entry is mapped, not copied: wasmtime runs the code from the
//!   file's pages, so an entry's file must never change in place (none of
//!   paddock's writes does: see the next point);
//! - entries are written to a temporary file and renamed into place, so a
//!   reader never sees half an entry.
//!
//! What it does not defend against: someone who can write to the cache
//! directory as the host's own user. Such a user can already replace the
//! host binary; keep the cache on a path only the host's user can write.

use std::fs;
use std::hash::{Hash, Hasher};
use std::path::{Path, PathBuf};

use serde::Serialize;
use sha2::{Digest as _, Sha256};
use wasmtime::component::Component;

use crate::artifact::Artifact;
use crate::sandbox::Runtime;
use crate::sandbox::wasi::{Carry, WasiPolicy};
use crate::tool_error::ToolError;

/// Tag mixed into every key: bump it if the entry format changes.
const FORMAT: &[u8] = b"paddock-code-v2";

/// Bytes of an entry's checksum.
const SUM: usize = 16;

/// Bytes read at a time while checking an entry.
const CHUNK: usize = 1 << 20;

/// The checksum of an entry's code.
fn checksum(code: &[u8]) -> [u8; SUM] {
    xxhash_rust::xxh3::xxh3_128(code).to_le_bytes()
}

/// A directory of compiled models.
#[derive(Clone, Debug)]
pub struct CodeCache {
    dir: PathBuf,
}

/// Why the cache cannot be used.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CacheError {
    /// The directory cannot be created or read.
    #[error("code cache {path}: {cause}")]
    Io {
        /// The directory.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// Someone other than its owner may write to the directory.
    #[error(
        "code cache {path}: others may write to it (mode {mode:o}); it holds machine code, so it must be writable by its owner only"
    )]
    Unsafe {
        /// The directory.
        path: PathBuf,
        /// Its permission bits.
        mode: u32,
    },
}

/// Where a model's code came from.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
#[serde(tag = "from", rename_all = "snake_case")]
pub enum CodeSource {
    /// Compiled now (no cache).
    Compiled,
    /// Loaded from a cache entry.
    Cache,
    /// Compiled now and written to the cache.
    CompiledAndCached,
    /// Compiled now; the cache entry could not be used or written (why).
    CompiledCacheFailed {
        /// What went wrong with the entry.
        reason: String,
    },
}

impl CodeCache {
    /// Opens (creating, private) a cache directory.
    ///
    /// # Errors
    /// [`CacheError::Io`] when it cannot be created or read;
    /// [`CacheError::Unsafe`] when group or others may write to it.
    pub fn open(dir: &Path) -> Result<CodeCache, CacheError> {
        let io = |cause| CacheError::Io { path: dir.to_owned(), cause };
        if !dir.exists() {
            create_private(dir).map_err(io)?;
        }
        let meta = fs::metadata(dir).map_err(io)?;
        if !meta.is_dir() {
            return Err(io(std::io::Error::new(std::io::ErrorKind::NotADirectory, "not a directory")));
        }
        check_private(dir, &meta)?;
        Ok(CodeCache { dir: dir.to_owned() })
    }

    /// The directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Where the entry for this artifact under this runtime lives.
    pub fn entry_path(&self, runtime: &Runtime, artifact: &Artifact) -> PathBuf {
        self.key_path(runtime, artifact, &[], "code")
    }

    /// Where the entry for this artifact's primed component (see
    /// [`crate::sandbox::prime`]) under this runtime lives: the key also names the
    /// pre-initializer and its snapshot format, and the WASI policy the
    /// model was primed under (its fixed clock and random streams are part
    /// of what `init` saw).
    pub fn primed_path(&self, runtime: &Runtime, artifact: &Artifact, wasi: Option<&WasiPolicy>) -> PathBuf {
        self.key_path(runtime, artifact, &primed_tag(wasi), "primed")
    }

    fn key_path(&self, runtime: &Runtime, artifact: &Artifact, tag: &[u8], extension: &str) -> PathBuf {
        let mut key = KeyHasher(Sha256::new());
        key.0.update(FORMAT);
        key.0.update(tag);
        key.0.update(artifact.digest().0);
        key.0.update(crate::sandbox::wasmtime_version().as_bytes());
        runtime.engine().precompile_compatibility_hash().hash(&mut key);
        let hex = hex::encode(key.0.finalize());
        self.dir.join(format!("{hex}.{extension}"))
    }

    /// The compiled component for an artifact: from its entry if there is a
    /// sound one, otherwise compiled and written back.
    ///
    /// # Errors
    /// Only the [`ToolError`] wasmtime gave when compiling fails; problems
    /// with the entry itself ([`EntryProblem`]) are reported in the
    /// [`CodeSource`], never fatal.
    pub fn component(&self, runtime: &Runtime, artifact: &Artifact) -> Result<(Component, CodeSource), ToolError> {
        self.entry(runtime, &self.entry_path(runtime, artifact), || compile(runtime, artifact))
    }

    /// The compiled primed component for an artifact, with what its `init`
    /// took from its WASI world: from its entry if there is a sound one
    /// with its carry beside it, otherwise made by `make` and written back.
    ///
    /// # Errors
    /// Only `make`'s.
    pub(crate) fn primed<E>(
        &self,
        runtime: &Runtime,
        artifact: &Artifact,
        wasi: Option<&WasiPolicy>,
        make: impl FnOnce() -> Result<(Component, Carry), E>,
    ) -> Result<(Component, CodeSource, Carry), E> {
        let path = self.primed_path(runtime, artifact, wasi);
        let carry_path = path.with_extension("carry");
        let stored: Option<Carry> = fs::read(&carry_path).ok().and_then(|b| serde_json::from_slice(&b).ok());
        if stored.is_none() {
            // An entry without its carry is not used: it is made again.
            remove_entry(&path);
        }
        let mut made = None;
        let (component, source) = self.entry(runtime, &path, || {
            make().map(|(component, carry)| {
                made = Some(carry);
                component
            })
        })?;
        let carry = match (made, stored) {
            (Some(carry), _) => {
                let _ = serde_json::to_vec(&carry).map(|bytes| crate::atomic_file::write(&carry_path, &bytes));
                carry
            }
            (None, Some(carry)) => carry,
            (None, None) => unreachable!("an entry without its carry was removed, so it was made"),
        };
        Ok((component, source, carry))
    }

    /// Why this artifact could not be primed under `wasi`, when an earlier
    /// load found a lasting reason (see
    /// [`crate::sandbox::prime::PrimeError::is_lasting`]): the attempt, which
    /// compiles an instrumented copy of the component, is then not made
    /// again.
    pub(crate) fn unprimable(
        &self,
        runtime: &Runtime,
        artifact: &Artifact,
        wasi: Option<&WasiPolicy>,
    ) -> Option<String> {
        let text = fs::read(self.key_path(runtime, artifact, &primed_tag(wasi), "unprimed")).ok()?;
        (text.len() <= MAX_REASON).then(|| String::from_utf8(text).ok()).flatten()
    }

    /// Remembers why this artifact cannot be primed under `wasi`. A failure
    /// to write is not reported: the next load tries again.
    pub(crate) fn remember_unprimable(
        &self,
        runtime: &Runtime,
        artifact: &Artifact,
        wasi: Option<&WasiPolicy>,
        reason: &str,
    ) {
        let path = self.key_path(runtime, artifact, &primed_tag(wasi), "unprimed");
        let end = reason.floor_char_boundary(MAX_REASON);
        let _ = crate::atomic_file::write(&path, &reason.as_bytes()[..end]);
    }

    fn entry<E>(
        &self,
        runtime: &Runtime,
        path: &Path,
        make: impl FnOnce() -> Result<Component, E>,
    ) -> Result<(Component, CodeSource), E> {
        let mut trouble = None;
        match load(runtime, path) {
            Ok(component) => return Ok((component, CodeSource::Cache)),
            Err(EntryProblem::Io(e)) if e.kind() == std::io::ErrorKind::NotFound => {}
            Err(problem) => {
                remove_entry(path);
                trouble = Some(format!("entry {} dropped: {problem}", path.display()));
            }
        }
        let component = make()?;
        let source = match store(path, &component) {
            Ok(()) => match trouble {
                None => CodeSource::CompiledAndCached,
                Some(reason) => CodeSource::CompiledCacheFailed { reason },
            },
            Err(problem) => {
                CodeSource::CompiledCacheFailed { reason: format!("writing {}: {problem}", path.display()) }
            }
        };
        Ok((component, source))
    }
}

/// Why a cache entry could not be used or written. Never fatal: the model
/// is compiled instead, and the problem is reported in its [`CodeSource`].
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum EntryProblem {
    /// The entry has no checksum beside it (or not one of 16 bytes).
    #[error("no checksum beside it")]
    NoChecksum,
    /// The entry's bytes do not match its checksum.
    #[error("checksum does not match its contents")]
    Checksum,
    /// wasmtime refused the compiled code.
    #[error("{0}")]
    Code(ToolError),
    /// The entry was replaced (by another process writing the same entry)
    /// between its check and its mapping.
    #[error("replaced while it was loaded")]
    Replaced,
    /// The file could not be read or written.
    #[error("{0}")]
    Io(std::io::Error),
}

/// What keys a primed entry besides the artifact and the engine: the
/// pre-initializer and, for a WASI model, the policy it was primed under.
fn primed_tag(wasi: Option<&WasiPolicy>) -> Vec<u8> {
    let mut tag = crate::sandbox::prime::PRIMER.as_bytes().to_vec();
    if let Some(policy) = wasi {
        tag.extend(serde_json::to_vec(policy).unwrap_or_default());
    }
    tag
}

/// The longest reason [`CodeCache::remember_unprimable`] keeps.
const MAX_REASON: usize = 4096;

/// Compiles an artifact's component.
pub(crate) fn compile(runtime: &Runtime, artifact: &Artifact) -> Result<Component, ToolError> {
    Ok(Component::new(runtime.engine(), artifact.bytes())?)
}

/// Feeds `Hash` output into sha256, so the key is stable across processes
/// (std's default hasher is randomly seeded).
struct KeyHasher(Sha256);

impl Hasher for KeyHasher {
    fn write(&mut self, bytes: &[u8]) {
        self.0.update(bytes);
    }
    fn finish(&self) -> u64 {
        0
    }
}

/// The file beside an entry that holds its checksum.
fn sum_path(entry: &Path) -> PathBuf {
    let mut name = entry.as_os_str().to_owned();
    name.push(".sum");
    PathBuf::from(name)
}

/// Removes an entry and its checksum, as far as it can.
fn remove_entry(entry: &Path) {
    let _ = fs::remove_file(entry);
    let _ = fs::remove_file(sum_path(entry));
}

/// Checks an entry against its checksum, then maps it.
fn load(runtime: &Runtime, path: &Path) -> Result<Component, EntryProblem> {
    let mut file = fs::File::open(path).map_err(EntryProblem::Io)?;
    let identity = file_identity(&file.metadata().map_err(EntryProblem::Io)?);
    let sum = fs::read(sum_path(path)).map_err(|_| EntryProblem::NoChecksum)?;
    if sum.len() != SUM {
        return Err(EntryProblem::NoChecksum);
    }
    let mut hasher = xxhash_rust::xxh3::Xxh3::new();
    let mut chunk = vec![0u8; CHUNK];
    loop {
        match std::io::Read::read(&mut file, &mut chunk) {
            Ok(0) => break,
            Ok(n) => hasher.update(&chunk[..n]),
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(EntryProblem::Io(e)),
        }
    }
    if hasher.digest128().to_le_bytes() != sum.as_slice() {
        return Err(EntryProblem::Checksum);
    }
    let component = deserialize_file(runtime, path).map_err(EntryProblem::Code)?;
    // wasmtime opened the path again: it must still be the file checked.
    match fs::metadata(path) {
        Ok(now) if file_identity(&now) == identity => Ok(component),
        _ => Err(EntryProblem::Replaced),
    }
}

/// What tells one file from another at the same path.
#[cfg(unix)]
fn file_identity(meta: &fs::Metadata) -> (u64, u64, u64) {
    use std::os::unix::fs::MetadataExt;
    (meta.dev(), meta.ino(), meta.len())
}

#[cfg(not(unix))]
fn file_identity(meta: &fs::Metadata) -> (u64, u64, u64) {
    (
        meta.len(),
        meta.modified()
            .ok()
            .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
            .map_or(0, |d| d.as_nanos() as u64),
        0,
    )
}

/// The one unsafe call in paddock.
#[allow(unsafe_code)]
fn deserialize_file(runtime: &Runtime, path: &Path) -> Result<Component, ToolError> {
    // SAFETY: wasmtime requires that the file holds what
    // `Component::serialize` made on a compatible engine, unaltered, and
    // that it does not change while the component lives (its pages are
    // mapped, not copied). The file is an entry this cache wrote (`store`)
    // in a directory only its owner may write (`check_private`); its
    // checksum was checked just now, and `load` makes sure after this call
    // that the path still names the file checked. Entries are only ever
    // replaced by renaming a new file over them or removed, never changed
    // in place, so a mapped file keeps its bytes. wasmtime itself refuses
    // code from another version or configuration.
    Ok(unsafe { Component::deserialize_file(runtime.engine(), path) }?)
}

/// Writes an entry, then its checksum; a reader finding the entry
/// without its checksum (or with an older one) drops it.
fn store(path: &Path, component: &Component) -> Result<(), EntryProblem> {
    let code = component.serialize().map_err(|e| EntryProblem::Code(e.into()))?;
    crate::atomic_file::write(path, &code).map_err(EntryProblem::Io)?;
    crate::atomic_file::write(&sum_path(path), &checksum(&code)).map_err(EntryProblem::Io)
}

#[cfg(unix)]
fn create_private(dir: &Path) -> std::io::Result<()> {
    use std::os::unix::fs::DirBuilderExt;
    fs::DirBuilder::new().recursive(true).mode(0o700).create(dir)
}

#[cfg(not(unix))]
fn create_private(dir: &Path) -> std::io::Result<()> {
    fs::create_dir_all(dir)
}

#[cfg(unix)]
fn check_private(dir: &Path, meta: &fs::Metadata) -> Result<(), CacheError> {
    use std::os::unix::fs::PermissionsExt;
    let mode = meta.permissions().mode() & 0o777;
    if mode & 0o022 != 0 {
        return Err(CacheError::Unsafe { path: dir.to_owned(), mode });
    }
    Ok(())
}

#[cfg(not(unix))]
fn check_private(_dir: &Path, _meta: &fs::Metadata) -> Result<(), CacheError> {
    Ok(())
}
