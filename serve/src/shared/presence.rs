//! Every host says what it serves: a heartbeat entry per host in the
//! store's presence bucket (entries expire after
//! [`PRESENCE_LIFETIME`](super::PRESENCE_LIFETIME)), and the list of hosts
//! with what is wrong with each.

use async_nats::jetstream::kv;
use jiff::Timestamp;
use serde::{Deserialize, Serialize};

use super::mirror::MirrorOptions;
use super::{SharedError, SharedStore};
use crate::registry::{ArtifactState, MirrorState, RoutesState, Status, SyncProblem};
use paddock_host::artifact::digest::Digest;

/// What one host last said about itself.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[non_exhaustive]
pub struct Presence {
    /// Its name.
    pub host: String,
    /// Its process id.
    pub pid: u32,
    /// When it said this (RFC 3339).
    pub at: String,
    /// How often it says it, in milliseconds.
    pub every_ms: u64,
    /// The store revision its mirror has applied.
    pub revision: u64,
    /// The store revision of the routes it holds.
    pub routes_revision: Option<u64>,
    /// Its registry's generation.
    pub generation: u64,
    /// Whether its registry took the routes it holds (`accepted`,
    /// `partly_taken`, `refused`, `missing`).
    pub routes: String,
    /// Each version it serves.
    pub serving: Vec<Served>,
    /// Each artifact its gate refused, with why.
    pub refused: Vec<String>,
    /// Entries its mirror could not take.
    pub problems: Vec<SyncProblem>,
    /// When its mirror last caught up (RFC 3339).
    pub synced_at: Option<String>,
    /// Since when it may be behind.
    pub stale_since: Option<String>,
}

/// One version a host serves.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[non_exhaustive]
pub struct Served {
    /// The model.
    pub model: String,
    /// The version.
    pub version: String,
    /// Its digest.
    pub digest: Option<Digest>,
}

/// A host in the list, with what is wrong with it.
#[derive(Clone, Debug, PartialEq)]
#[non_exhaustive]
pub struct HostReport {
    /// What it last said.
    pub presence: Presence,
    /// What is wrong, in words; empty when nothing is.
    pub flags: Vec<String>,
}

/// `HOSTNAME-PID`, with what a key cannot hold replaced by `-`.
pub fn default_host_name() -> String {
    let host = std::fs::read_to_string("/proc/sys/kernel/hostname").unwrap_or_default();
    key_name(&format!("{}-{}", host.trim(), std::process::id()))
}

/// `name` with what a key cannot hold replaced by `-`.
pub fn key_name(name: &str) -> String {
    let n: String =
        name.chars().map(|c| if c.is_ascii_alphanumeric() || c == '-' || c == '_' { c } else { '-' }).collect();
    n.trim_matches('-').to_owned()
}

/// Writes this host's presence entry. Failures are logged: a host that
/// cannot say it is present keeps serving.
pub(crate) async fn beat(store: &SharedStore, options: &MirrorOptions, status: Status, state: MirrorState) {
    let presence = Presence {
        host: options.host.clone(),
        pid: std::process::id(),
        at: Timestamp::now().to_string(),
        every_ms: options.heartbeat.as_millis() as u64,
        revision: state.revision,
        routes_revision: state.routes_revision,
        generation: status.generation,
        routes: match &status.routes {
            RoutesState::Accepted => "accepted",
            RoutesState::PartlyTaken { .. } => "partly_taken",
            RoutesState::Refused { .. } => "refused",
            RoutesState::Missing => "missing",
        }
        .to_owned(),
        serving: status
            .artifacts
            .iter()
            .filter(|a| matches!(a.state, ArtifactState::Loaded | ArtifactState::KeptAfterRefusal { .. }))
            .filter_map(|a| {
                Some(Served {
                    model: a.model.clone()?,
                    version: a.version.as_ref()?.to_string(),
                    digest: match &a.state {
                        ArtifactState::KeptAfterRefusal { serving, .. } => Some(*serving),
                        _ => a.digest,
                    },
                })
            })
            .collect(),
        refused: status
            .artifacts
            .iter()
            .filter_map(|a| match &a.state {
                ArtifactState::Refused { refusal } | ArtifactState::KeptAfterRefusal { refusal, .. } => {
                    Some(format!("{}: {}", a.path.display(), refusal.reason()))
                }
                _ => None,
            })
            .collect(),
        problems: state.problems,
        synced_at: state.synced_at,
        stale_since: state.stale_since,
    };
    let value = serde_json::to_vec(&presence).expect("a presence serialises");
    if let Err(e) = store.hosts.put(key_name(&options.host), value.into()).await {
        tracing::debug!(error = %e, "cannot write this host's presence");
    }
}

impl SharedStore {
    /// Every host that reported within the presence lifetime, by name,
    /// flagged when it is behind the store's latest revision, refused
    /// something, cannot take an entry, or has stopped reporting (no
    /// heartbeat for three of its periods).
    ///
    /// # Errors
    /// [`SharedError::JetStream`].
    pub async fn hosts(&self) -> Result<(u64, Vec<HostReport>), SharedError> {
        let latest = self.latest_revision().await?;
        let names = super::keys_of(&self.hosts, "").await?;
        let now = Timestamp::now();
        let mut out = Vec::new();
        for name in names {
            let Some(entry) =
                self.hosts.entry(&name).await.map_err(|e| SharedError::js(format!("reading host {name}"), e))?
            else {
                continue;
            };
            if entry.operation != kv::Operation::Put {
                continue;
            }
            let Ok(presence) = serde_json::from_slice::<Presence>(&entry.value) else { continue };
            let flags = flags(&presence, latest, now);
            out.push(HostReport { presence, flags });
        }
        out.sort_by(|a, b| a.presence.host.cmp(&b.presence.host));
        Ok((latest, out))
    }
}

fn flags(p: &Presence, latest: u64, now: Timestamp) -> Vec<String> {
    let mut flags = Vec::new();
    let silent_after = std::time::Duration::from_millis(p.every_ms.max(1) * 3);
    if let Ok(at) = p.at.parse::<Timestamp>() {
        let quiet = now.duration_since(at).unsigned_abs();
        if quiet > silent_after {
            flags.push(format!("silent: no report for {} s", quiet.as_secs()));
        }
    }
    if p.revision < latest {
        flags.push(format!("behind: at revision {} of {latest}", p.revision));
    }
    if let Some(since) = &p.stale_since {
        flags.push(format!("stale since {since}"));
    }
    if !p.refused.is_empty() {
        flags.push(format!("refused {}", p.refused.len()));
    }
    if !p.problems.is_empty() {
        flags.push(format!("cannot take {}", p.problems.iter().map(|q| q.key.as_str()).collect::<Vec<_>>().join(", ")));
    }
    if p.routes != "accepted" {
        flags.push(format!("routes {}", p.routes.replace('_', " ")));
    }
    flags
}
