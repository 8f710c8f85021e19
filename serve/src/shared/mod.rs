//! A store kept in NATS JetStream and shared by every host: a version is
//! published once and every server and worker serves it.
//!
//! What it is: the same store as a directory ([`crate::registry::layout`]),
//! held in three JetStream buckets named after the store:
//!
//! ```text
//! paddock-NAME          key-value, history kept (64 revisions a key):
//!   routes                the routes file's text
//!   features              the features plan's text
//!   limits                the limits file's text
//!   version.MODEL.VERSION a published version: digest, size, vouch ("+" in a version is "_")
//!   table.PATH            a table the plan names: digest and size
//! paddock-NAME-files    object store: artifact/HEX, table/HEX (HEX: sha256 of the bytes)
//! paddock-NAME-hosts    key-value, entries expire: one presence entry per host
//! ```
//!
//! - [`publish`]: what a person does to the store — put a version (after
//!   the same gate a host runs), withdraw one, change the routes, plan or
//!   limits by compare-and-set on the entry's revision, list an entry's
//!   history and put an earlier revision back.
//! - [`mirror`]: what a host does — keep a directory copy of the store in
//!   its state directory, check every object against its digest and the
//!   size cap before writing it, and have its [`Registry`](crate::Registry)
//!   gate and swap in each change as it does for a directory store.
//! - [`presence`]: each host's heartbeat, and the list of hosts with what
//!   each serves and whether it is behind, refused something or went
//!   silent.
//!
//! What it is not: an access control. Anyone who can write the buckets can
//! publish; hosts that must serve only vouched-for artifacts need a trust
//! policy of their own ([`TrustPolicy`](paddock_host::TrustPolicy)), which
//! their mirror's gate applies to every version.

pub mod address;
pub mod mirror;
pub mod presence;
pub mod publish;

use std::time::Duration;

use async_nats::jetstream::{self, kv, object_store};
use semver::Version;
use serde::{Deserialize, Serialize};

pub use address::{Credentials, StoreAddress};
use paddock_host::artifact::digest::Digest;

use crate::registry::{FEATURES_FILE, LIMITS_FILE, ROUTES_FILE, Refusal, RoutesError};

/// Revisions kept per key of a store's entries (JetStream's most).
pub const HISTORY: i64 = 64;

/// How long a host's presence entry lives after its last heartbeat.
pub const PRESENCE_LIFETIME: Duration = Duration::from_secs(15 * 60);

/// The store's three buckets.
#[derive(Clone)]
pub struct SharedStore {
    address: StoreAddress,
    client: async_nats::Client,
    entries: kv::Store,
    files: object_store::ObjectStore,
    hosts: kv::Store,
}

impl std::fmt::Debug for SharedStore {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SharedStore").field("address", &self.address).finish_non_exhaustive()
    }
}

/// One of the files a store holds as an entry with history.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
#[non_exhaustive]
pub enum FileEntry {
    /// The routes file.
    Routes,
    /// The features plan.
    Features,
    /// The limits file.
    Limits,
}

impl FileEntry {
    /// Every file entry.
    pub const ALL: [FileEntry; 3] = [FileEntry::Routes, FileEntry::Features, FileEntry::Limits];

    /// Its key in the store's entries.
    pub fn key(self) -> &'static str {
        match self {
            FileEntry::Routes => "routes",
            FileEntry::Features => "features",
            FileEntry::Limits => "limits",
        }
    }

    /// The file it is in a directory store (and in a mirror).
    pub fn file(self) -> &'static str {
        match self {
            FileEntry::Routes => ROUTES_FILE,
            FileEntry::Features => FEATURES_FILE,
            FileEntry::Limits => LIMITS_FILE,
        }
    }

    fn from_key(key: &str) -> Option<FileEntry> {
        FileEntry::ALL.into_iter().find(|e| e.key() == key)
    }
}

impl std::fmt::Display for FileEntry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.key())
    }
}

/// What a store's entry says about one published version.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[non_exhaustive]
pub struct VersionRecord {
    /// The digest of the artifact's bytes (its object is `artifact/HEX`).
    pub digest: Digest,
    /// The artifact's size in bytes.
    pub bytes: u64,
    /// The vouch file's text, when it was published with one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub vouch: Option<String>,
    /// When it was published (RFC 3339).
    pub published: String,
    /// Who published it: the publishing machine and user, as they said.
    pub by: String,
}

/// What a store's entry says about one table of the features plan.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[non_exhaustive]
pub struct TableRecord {
    /// The digest of the table's bytes (its object is `table/HEX`).
    pub digest: Digest,
    /// Its size in bytes.
    pub bytes: u64,
}

/// What a key of the store's entries names.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) enum Key {
    File(FileEntry),
    Version(String, Version),
    Table(String),
}

impl Key {
    fn parse(key: &str) -> Option<Key> {
        if let Some(entry) = FileEntry::from_key(key) {
            return Some(Key::File(entry));
        }
        if let Some(rest) = key.strip_prefix("version.") {
            let (model, version) = rest.split_once('.')?;
            // A model name becomes a directory of the mirror: nothing but
            // what a publisher may write (no `/`, no `..`).
            if !key_safe(model) {
                return None;
            }
            let version = Version::parse(&version.replace('_', "+")).ok()?;
            return Some(Key::Version(model.to_owned(), version));
        }
        key.strip_prefix("table.").map(|path| Key::Table(path.to_owned()))
    }
}

/// The key of a version's entry. `+` (build metadata) is written `_`,
/// which semver never uses, so the key reads back to the same version.
pub(crate) fn version_key(model: &str, version: &Version) -> String {
    format!("version.{model}.{}", version.to_string().replace('+', "_"))
}

/// The key of a table's entry.
pub(crate) fn table_key(path: &str) -> String {
    format!("table.{path}")
}

/// The object holding an artifact's bytes.
pub(crate) fn artifact_object(digest: &Digest) -> String {
    format!("artifact/{}", digest.hex())
}

/// The object holding a table's bytes.
pub(crate) fn table_object(digest: &Digest) -> String {
    format!("table/{}", digest.hex())
}

/// Whether a model name can be part of a key: letters, digits, `-`, `_`.
pub(crate) fn key_safe(name: &str) -> bool {
    !name.is_empty() && name.bytes().all(|b| b.is_ascii_alphanumeric() || b == b'-' || b == b'_')
}

/// Why the shared store could not do what was asked.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum SharedError {
    /// The address does not name a server and a store.
    #[error("`{address}` is not a shared store's address: {problem}")]
    Address {
        /// The address as given (credentials removed).
        address: String,
        /// What is wrong with it.
        problem: String,
    },
    /// The server could not be reached, or refused the credentials.
    #[error("cannot connect to {server}: {cause}")]
    Connect {
        /// The server (no credentials).
        server: String,
        /// What the client said.
        cause: String,
    },
    /// The server has no such store (nothing was ever published to it).
    #[error("{server} has no store `{store}` (publish a version to it first)")]
    NoStore {
        /// The server.
        server: String,
        /// The store's name.
        store: String,
    },
    /// A JetStream request failed.
    #[error("{what}: {cause}")]
    JetStream {
        /// What was asked, of which bucket, key or object.
        what: String,
        /// What the server or client said.
        cause: String,
    },
    /// A file could not be read or written.
    #[error("{path}: {cause}")]
    Io {
        /// The file.
        path: std::path::PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// The gate refused the artifact: nothing was published.
    #[error("refused before publishing ({}): {}", .refusal.step_name(), .refusal.reason())]
    Refused {
        /// Why, as a host's gate says it.
        refusal: Box<Refusal>,
    },
    /// The version was published before with other bytes.
    #[error(
        "{model} {version} was published with other bytes ({published}); these are {offered}: a version is immutable, publish them as a new version"
    )]
    VersionExists {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The digest published first.
        published: Digest,
        /// The digest offered now.
        offered: Digest,
    },
    /// The version is not published (or was withdrawn).
    #[error("{model} {version} is not published in this store")]
    NoVersion {
        /// The model.
        model: String,
        /// The version.
        version: Version,
    },
    /// The routes still use the version.
    #[error("{model} {version} is still routed ({}): change the routes first", .uses.join(", "))]
    VersionRouted {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The routes that use it.
        uses: Vec<String>,
    },
    /// A name cannot be part of a key.
    #[error("model name `{name}` cannot name a version in a shared store: use letters, digits, `-` and `_`")]
    BadName {
        /// The name.
        name: String,
    },
    /// Someone else changed the entry since the revision the change was
    /// based on: nothing was written.
    #[error("{entry} changed since revision {}: it is at revision {} now; look at it and try again on top of it",
        .based_on.map_or("none (a new entry)".to_owned(), |r| r.to_string()),
        .current.map_or("none (removed)".to_owned(), |r| r.to_string()))]
    Conflict {
        /// The entry.
        entry: FileEntry,
        /// The revision the change was based on (`None`: it expected no entry).
        based_on: Option<u64>,
        /// The entry's revision now (`None`: there is none).
        current: Option<u64>,
    },
    /// A change must say which revision it is based on.
    #[error("{entry} is at revision {current}: say which revision this change is based on")]
    NoBase {
        /// The entry.
        entry: FileEntry,
        /// Its revision now.
        current: u64,
    },
    /// The entry has no such revision (never, or no longer kept).
    #[error("{entry} has no revision {revision} (the store keeps the last {HISTORY})")]
    NoRevision {
        /// The entry.
        entry: FileEntry,
        /// The revision asked for.
        revision: u64,
    },
    /// The routes do not parse, or name versions the store does not have.
    #[error("the routes are refused: {cause}")]
    Routes {
        /// Why.
        cause: RoutesError,
    },
    /// The text is not UTF-8, or a plan or limits file does not parse.
    #[error("the {entry} are refused: {problem}")]
    Text {
        /// The entry.
        entry: FileEntry,
        /// Why.
        problem: String,
    },
}

impl SharedError {
    fn js(what: impl Into<String>, cause: impl std::fmt::Display) -> SharedError {
        SharedError::JetStream { what: what.into(), cause: cause.to_string() }
    }
}

impl SharedStore {
    /// Connects to the store's server and opens its buckets; `create`
    /// makes them when they are absent (a publisher), otherwise a store
    /// that does not exist is [`SharedError::NoStore`].
    ///
    /// # Errors
    /// [`SharedError::Connect`], [`SharedError::NoStore`], or
    /// [`SharedError::JetStream`] when a bucket cannot be made.
    pub async fn connect(
        address: &StoreAddress,
        credentials: &Credentials,
        create: bool,
    ) -> Result<SharedStore, SharedError> {
        let client = address::connect(address, credentials, "paddock shared store").await?;
        let js = jetstream::new(client.clone());
        let names = address.buckets();
        let (entries, files, hosts) = if create {
            (
                js.create_key_value(kv::Config {
                    bucket: names.entries.clone(),
                    description: format!("paddock store {}: routes, plan, limits, versions", address.store()),
                    history: HISTORY,
                    ..Default::default()
                })
                .await
                .map_err(|e| SharedError::js(format!("making bucket {}", names.entries), e))?,
                js.create_object_store(object_store::Config {
                    bucket: names.files.clone(),
                    description: Some(format!("paddock store {}: artifacts and tables", address.store())),
                    ..Default::default()
                })
                .await
                .map_err(|e| SharedError::js(format!("making bucket {}", names.files), e))?,
                js.create_key_value(kv::Config {
                    bucket: names.hosts.clone(),
                    description: format!("paddock store {}: hosts' presence", address.store()),
                    history: 1,
                    max_age: PRESENCE_LIFETIME,
                    ..Default::default()
                })
                .await
                .map_err(|e| SharedError::js(format!("making bucket {}", names.hosts), e))?,
            )
        } else {
            let missing = || SharedError::NoStore { server: address.server(), store: address.store().to_owned() };
            let entries = js.get_key_value(&names.entries).await.map_err(|e| match e.kind() {
                jetstream::context::KeyValueErrorKind::GetBucket => missing(),
                _ => SharedError::js(format!("opening bucket {}", names.entries), e),
            })?;
            let files = js.get_object_store(&names.files).await.map_err(|e| match e.kind() {
                jetstream::context::ObjectStoreErrorKind::GetStore => missing(),
                _ => SharedError::js(format!("opening bucket {}", names.files), e),
            })?;
            let hosts = js.get_key_value(&names.hosts).await.map_err(|e| match e.kind() {
                jetstream::context::KeyValueErrorKind::GetBucket => missing(),
                _ => SharedError::js(format!("opening bucket {}", names.hosts), e),
            })?;
            (entries, files, hosts)
        };
        Ok(SharedStore { address: address.clone(), client, entries, files, hosts })
    }

    /// The store's address (no credentials).
    pub fn address(&self) -> &StoreAddress {
        &self.address
    }

    /// Whether the client is connected to the server now.
    pub fn connected(&self) -> bool {
        self.client.connection_state() == async_nats::connection::State::Connected
    }

    /// The store's latest revision: the last change to any entry.
    ///
    /// # Errors
    /// [`SharedError::JetStream`] when the server does not answer.
    pub async fn latest_revision(&self) -> Result<u64, SharedError> {
        // Asked afresh: the bucket's own `status()` answers from a copy
        // made when it was opened.
        let mut stream = self.entries.stream.clone();
        let info = stream.info().await.map_err(|e| SharedError::js("reading the store's revision", e))?;
        Ok(info.state.last_sequence)
    }

    /// The published versions, by model, with their records.
    ///
    /// # Errors
    /// [`SharedError::JetStream`] when the keys cannot be listed or read.
    pub async fn versions(&self) -> Result<Vec<(String, Version, VersionRecord)>, SharedError> {
        let mut out = Vec::new();
        for key in keys_of(&self.entries, "version.").await? {
            let Some(Key::Version(model, version)) = Key::parse(&key) else { continue };
            if let Some(record) = self.version_record(&model, &version).await? {
                out.push((model, version, record));
            }
        }
        out.sort_by(|a, b| (&a.0, &a.1).cmp(&(&b.0, &b.1)));
        Ok(out)
    }

    /// One version's record, if it is published.
    ///
    /// # Errors
    /// [`SharedError::JetStream`] when the entry cannot be read or is not a
    /// version record.
    pub async fn version_record(&self, model: &str, version: &Version) -> Result<Option<VersionRecord>, SharedError> {
        let key = version_key(model, version);
        let Some(bytes) = self.entries.get(&key).await.map_err(|e| SharedError::js(format!("reading {key}"), e))?
        else {
            return Ok(None);
        };
        serde_json::from_slice(&bytes).map(Some).map_err(|e| SharedError::js(format!("reading {key}"), e))
    }

    /// A file entry's text and revision now, if it has one.
    ///
    /// # Errors
    /// [`SharedError::JetStream`] when the entry cannot be read.
    pub async fn file(&self, entry: FileEntry) -> Result<Option<(u64, String)>, SharedError> {
        let found =
            self.entries.entry(entry.key()).await.map_err(|e| SharedError::js(format!("reading {entry}"), e))?;
        Ok(found.filter(|e| e.operation == kv::Operation::Put).map(|e| (e.revision, text_of(&e.value))))
    }
}

/// The keys of a bucket starting with `prefix` (deleted ones too), read
/// from the stream's subjects: no consumer is made, so listing often costs
/// the server nothing it must clean up.
pub(crate) async fn keys_of(bucket: &kv::Store, prefix: &str) -> Result<Vec<String>, SharedError> {
    use futures_util::StreamExt as _;
    let what = || format!("listing the keys of {}", bucket.name);
    let filter = format!("{}{prefix}>", bucket.prefix);
    let mut subjects = bucket.stream.info_with_subjects(&filter).await.map_err(|e| SharedError::js(what(), e))?;
    let mut keys = Vec::new();
    while let Some(s) = subjects.next().await {
        let (subject, _) = s.map_err(|e| SharedError::js(what(), e))?;
        if let Some(key) = subject.strip_prefix(bucket.prefix.as_str()) {
            keys.push(key.to_owned());
        }
    }
    keys.sort();
    Ok(keys)
}

/// An entry's value as text (lossy: entries are written as UTF-8).
fn text_of(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

impl Refusal {
    /// The gate step's name, as the status reports it.
    fn step_name(&self) -> String {
        serde_json::to_value(self.step()).ok().and_then(|v| v.as_str().map(str::to_owned)).unwrap_or_default()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_read_back_to_what_wrote_them_and_nothing_else_becomes_a_path() {
        let v = Version::parse("1.2.0-rc.1+build.7").unwrap();
        let key = version_key("charge-minutes", &v);
        assert_eq!(key, "version.charge-minutes.1.2.0-rc.1_build.7");
        assert_eq!(Key::parse(&key), Some(Key::Version("charge-minutes".into(), v)));
        assert_eq!(Key::parse("routes"), Some(Key::File(FileEntry::Routes)));
        assert_eq!(Key::parse("table.tables/sites.csv"), Some(Key::Table("tables/sites.csv".into())));
        // A model that would leave the mirror's directory, or a version that is not semver: ignored.
        for key in
            ["version.../x.1.0.0", "version.a/b.1.0.0", "version.m.1.0", "version.m.x", "version..1.0.0", "other"]
        {
            assert_eq!(Key::parse(key), None, "{key}");
        }
    }
}
