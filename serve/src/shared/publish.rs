//! What a person does to a shared store: publish a version (after the
//! gate every host runs), withdraw one, and change the routes, features
//! plan or limits by compare-and-set on the entry's revision, with its
//! history and a way back to an earlier revision.

use std::path::Path;

use async_nats::jetstream::kv;
use jiff::Timestamp;
use semver::Version;

use super::{
    FileEntry, SharedError, SharedStore, TableRecord, VersionRecord, artifact_object, key_safe, table_key,
    table_object, text_of, version_key,
};
use crate::features::Plan;
use crate::registry::{FEATURES_FILE, Passed, RegistryOptions, Routes, check_version};
use paddock_host::artifact::digest::Digest;
use paddock_host::sandbox::Runtime;

/// A version put in the store.
#[derive(Clone, Debug)]
#[non_exhaustive]
pub struct Published {
    /// What the gate found.
    pub passed: Passed,
    /// The store revision of its entry.
    pub revision: u64,
    /// It was published before with the same bytes: nothing was written.
    pub already: bool,
}

/// One revision of a file entry.
#[derive(Clone, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub struct Revision {
    /// The store revision.
    pub revision: u64,
    /// When it was written (RFC 3339).
    pub at: String,
    /// The text; `None` when this revision removed the entry.
    pub text: Option<String>,
}

impl SharedStore {
    /// Publishes an artifact (and its vouch's text): runs it through the
    /// gate a host runs under `options` (trust, size cap, load, contract,
    /// carried checks), then puts its bytes as an object and its record as
    /// the version's entry. Publishing the same bytes again changes
    /// nothing; other bytes under a published version are refused.
    ///
    /// # Errors
    /// [`SharedError::Refused`] when the gate refuses it (nothing is
    /// written), [`SharedError::BadName`] for a model name a key cannot
    /// hold, [`SharedError::VersionExists`] naming both digests,
    /// [`SharedError::JetStream`] when the server fails.
    pub async fn publish(
        &self,
        runtime: &Runtime,
        bytes: Vec<u8>,
        vouch: Option<String>,
        options: &RegistryOptions,
        by: &str,
    ) -> Result<Published, SharedError> {
        let size = bytes.len() as u64;
        let passed = {
            let (runtime, options, vouch, bytes) = (runtime.clone(), options.clone(), vouch.clone(), bytes.clone());
            tokio::task::spawn_blocking(move || {
                check_version(&runtime, bytes, vouch.as_deref().map(str::as_bytes), &options)
            })
            .await
            .map_err(|e| SharedError::js("checking the artifact", e))?
            .map_err(|refusal| SharedError::Refused { refusal: Box::new(refusal) })?
        };
        if !key_safe(&passed.model) {
            return Err(SharedError::BadName { name: passed.model.clone() });
        }
        let key = version_key(&passed.model, &passed.version);
        if let Some((revision, published)) = self.last_published(&key).await? {
            if published != passed.digest {
                return Err(SharedError::VersionExists {
                    model: passed.model.clone(),
                    version: passed.version.clone(),
                    published,
                    offered: passed.digest,
                });
            }
            if self.version_record(&passed.model, &passed.version).await?.is_some() {
                return Ok(Published { passed, revision, already: true });
            }
        }
        // The bytes first: a host that sees the entry finds its object whole.
        let object = artifact_object(&passed.digest);
        if self.files.info(&object).await.map(|i| i.size as u64 != size || i.deleted).unwrap_or(true) {
            self.files
                .put(object.as_str(), &mut bytes.as_slice())
                .await
                .map_err(|e| SharedError::js(format!("uploading {object}"), e))?;
        }
        let record = VersionRecord {
            digest: passed.digest,
            bytes: size,
            vouch,
            published: Timestamp::now().to_string(),
            by: by.to_owned(),
        };
        let value = serde_json::to_vec(&record).expect("a record serialises").into();
        let revision = match self.entries.create(&key, value).await {
            Ok(r) => r,
            Err(e) if e.kind() == kv::CreateErrorKind::AlreadyExists => {
                // Someone published it between our look and our write.
                let published = self.last_published(&key).await?.map(|(_, d)| d);
                return match published {
                    Some(p) if p != passed.digest => Err(SharedError::VersionExists {
                        model: passed.model.clone(),
                        version: passed.version.clone(),
                        published: p,
                        offered: passed.digest,
                    }),
                    _ => {
                        let revision = self.entries.entry(&key).await.ok().flatten().map_or(0, |e| e.revision);
                        Ok(Published { passed, revision, already: true })
                    }
                };
            }
            Err(e) => return Err(SharedError::js(format!("writing {key}"), e)),
        };
        Ok(Published { passed, revision, already: false })
    }

    /// The digest last published under a version's key (even if withdrawn
    /// since), with the revision that published it.
    async fn last_published(&self, key: &str) -> Result<Option<(u64, Digest)>, SharedError> {
        use futures_util::StreamExt as _;
        let mut history = match self.entries.history(key).await {
            Ok(h) => h,
            Err(e) if e.kind() == kv::WatchErrorKind::ConsumerCreate => return Ok(None),
            Err(e) => return Err(SharedError::js(format!("reading the history of {key}"), e)),
        };
        let mut last = None;
        while let Some(entry) = history.next().await {
            let entry = entry.map_err(|e| SharedError::js(format!("reading the history of {key}"), e))?;
            if entry.operation == kv::Operation::Put
                && let Ok(record) = serde_json::from_slice::<VersionRecord>(&entry.value)
            {
                last = Some((entry.revision, record.digest));
            }
            if entry.delta == 0 {
                break;
            }
        }
        Ok(last)
    }

    /// Withdraws a version: hosts stop serving it. Refused while the
    /// routes use it.
    ///
    /// # Errors
    /// [`SharedError::NoVersion`], [`SharedError::VersionRouted`] naming
    /// the routes, [`SharedError::JetStream`].
    pub async fn withdraw(&self, model: &str, version: &Version) -> Result<u64, SharedError> {
        let key = version_key(model, version);
        let entry = self.entries.entry(&key).await.map_err(|e| SharedError::js(format!("reading {key}"), e))?;
        let Some(entry) = entry.filter(|e| e.operation == kv::Operation::Put) else {
            return Err(SharedError::NoVersion { model: model.to_owned(), version: version.clone() });
        };
        if let Some((_, text)) = self.file(FileEntry::Routes).await?
            && let Ok(routes) = Routes::parse(&text)
            && let Some(uses) = routes.uses().get(model).and_then(|u| u.get(version))
        {
            return Err(SharedError::VersionRouted {
                model: model.to_owned(),
                version: version.clone(),
                uses: uses.clone(),
            });
        }
        // Only if nobody changed it since we looked.
        self.entries
            .delete_expect_revision(&key, Some(entry.revision))
            .await
            .map_err(|e| SharedError::js(format!("withdrawing {key}"), e))?;
        self.latest_revision().await
    }

    /// Writes a file entry (routes, plan, limits) if it is still at
    /// `based_on` (`None`: only if it has no entry yet). The text is
    /// checked first: routes must parse and name published versions only;
    /// a plan must parse and its tables be published ([`Self::put_table`]).
    ///
    /// # Errors
    /// [`SharedError::Conflict`] with both revisions when it changed,
    /// [`SharedError::Routes`] / [`SharedError::Text`] when the text is
    /// refused, [`SharedError::JetStream`].
    pub async fn put_file(&self, entry: FileEntry, text: &str, based_on: Option<u64>) -> Result<u64, SharedError> {
        self.check_file(entry, text).await?;
        let value = text.as_bytes().to_vec().into();
        let written = match based_on {
            Some(revision) => self.entries.update(entry.key(), value, revision).await.map_err(|e| match e.kind() {
                kv::UpdateErrorKind::WrongLastRevision => None,
                _ => Some(SharedError::js(format!("writing {entry}"), e)),
            }),
            None => self.entries.create(entry.key(), value).await.map_err(|e| match e.kind() {
                kv::CreateErrorKind::AlreadyExists => None,
                _ => Some(SharedError::js(format!("writing {entry}"), e)),
            }),
        };
        match written {
            Ok(revision) => Ok(revision),
            Err(Some(e)) => Err(e),
            Err(None) => {
                let current = self.file(entry).await?.map(|(r, _)| r);
                Err(SharedError::Conflict { entry, based_on, current })
            }
        }
    }

    async fn check_file(&self, entry: FileEntry, text: &str) -> Result<(), SharedError> {
        match entry {
            FileEntry::Routes => {
                let routes = Routes::parse(text).map_err(|cause| SharedError::Routes { cause })?;
                let published = self.versions().await?;
                routes
                    .check_versions(|m, v| published.iter().any(|(pm, pv, _)| pm == m && pv == v))
                    .map_err(|cause| SharedError::Routes { cause })
            }
            FileEntry::Features => {
                let plan = Plan::parse(text, FEATURES_FILE, Path::new(""))
                    .map_err(|e| SharedError::Text { entry, problem: e.to_string() })?;
                for table in plan.table_paths() {
                    let table = table.to_string_lossy();
                    let key = table_key(&table);
                    let found =
                        self.entries.get(&key).await.map_err(|e| SharedError::js(format!("reading {key}"), e))?;
                    if found.is_none() {
                        return Err(SharedError::Text {
                            entry,
                            problem: format!("it names the table {table}, which is not published (put it first)"),
                        });
                    }
                }
                Ok(())
            }
            FileEntry::Limits => crate::registry::limits_file::StoreLimits::check_text(text)
                .map_err(|problems| SharedError::Text { entry, problem: problems.join("; ") }),
        }
    }

    /// Publishes a table a features plan names, under `path` (as the plan
    /// writes it, relative to the store).
    ///
    /// # Errors
    /// [`SharedError::Text`] for a path that leaves the store,
    /// [`SharedError::JetStream`].
    pub async fn put_table(&self, path: &str, bytes: Vec<u8>) -> Result<u64, SharedError> {
        if !relative_inside(path) {
            return Err(SharedError::Text {
                entry: FileEntry::Features,
                problem: format!("the table path {path} is not relative to the store, or leaves it"),
            });
        }
        let digest = Digest::of(&bytes);
        let object = table_object(&digest);
        if self.files.info(&object).await.map(|i| i.size != bytes.len() || i.deleted).unwrap_or(true) {
            self.files
                .put(object.as_str(), &mut bytes.as_slice())
                .await
                .map_err(|e| SharedError::js(format!("uploading {object}"), e))?;
        }
        let record = TableRecord { digest, bytes: bytes.len() as u64 };
        let key = table_key(path);
        self.entries
            .put(&key, serde_json::to_vec(&record).expect("a record serialises").into())
            .await
            .map_err(|e| SharedError::js(format!("writing {key}"), e))
    }

    /// A file entry's kept revisions, oldest first.
    ///
    /// # Errors
    /// [`SharedError::JetStream`].
    pub async fn history(&self, entry: FileEntry) -> Result<Vec<Revision>, SharedError> {
        use futures_util::StreamExt as _;
        let mut history = match self.entries.history(entry.key()).await {
            Ok(h) => h,
            Err(e) if e.kind() == kv::WatchErrorKind::ConsumerCreate => return Ok(Vec::new()),
            Err(e) => return Err(SharedError::js(format!("reading the history of {entry}"), e)),
        };
        let mut out = Vec::new();
        while let Some(e) = history.next().await {
            let e = e.map_err(|e| SharedError::js(format!("reading the history of {entry}"), e))?;
            out.push(Revision {
                revision: e.revision,
                at: Timestamp::from_nanosecond(e.created.unix_timestamp_nanos())
                    .map_or_else(|_| e.created.to_string(), |t| t.to_string()),
                text: (e.operation == kv::Operation::Put).then(|| text_of(&e.value)),
            });
            if e.delta == 0 {
                break;
            }
        }
        Ok(out)
    }

    /// Puts an earlier revision's text back, as a new revision, if the
    /// entry is still at `based_on` (`None`: at whatever revision it is
    /// now, read just before). The text is checked as any change is.
    ///
    /// # Errors
    /// [`SharedError::NoRevision`], then as [`Self::put_file`].
    pub async fn restore(&self, entry: FileEntry, revision: u64, based_on: Option<u64>) -> Result<u64, SharedError> {
        let old = self
            .entries
            .entry_for_revision(entry.key(), revision)
            .await
            .map_err(|e| SharedError::js(format!("reading {entry} at revision {revision}"), e))?;
        let Some(old) = old.filter(|e| e.operation == kv::Operation::Put && e.revision == revision) else {
            return Err(SharedError::NoRevision { entry, revision });
        };
        let based_on = match based_on {
            Some(r) => Some(r),
            None => self.file(entry).await?.map(|(r, _)| r),
        };
        self.put_file(entry, &text_of(&old.value), based_on).await
    }
}

/// Whether a path is relative and stays inside the directory it is
/// relative to.
pub(crate) fn relative_inside(path: &str) -> bool {
    let p = Path::new(path);
    !path.is_empty() && p.components().all(|c| matches!(c, std::path::Component::Normal(_))) && !path.contains('\\')
}

/// The revision a change is based on, read from the header line
/// `# revision N` a file written by `routes get` starts with.
pub fn revision_in(text: &str) -> Option<u64> {
    text.lines().next()?.strip_prefix("# revision ")?.split_whitespace().next()?.parse().ok()
}
