//! A reload, one function per step: gate the store's files (or remember
//! them, when unchanged), find the versions whose files are gone, read the
//! routes, keep removed versions the routes still use, and swap in a new
//! snapshot when anything changed.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Instant;

use jiff::Timestamp;
use semver::Version;

use super::gate::{self, Fingerprint, Loaded};
use super::layout::{self, FEATURES_FILE, ROUTES_FILE};
use super::limits_file::{LIMITS_FILE, StoreLimits};
use super::routes::{Routes, RoutesError};
use super::status::{
    ArtifactState, ArtifactStatus, FeaturesState, LimitsState, Refusal, RefusedFile, ReloadReport, RoutesState,
    ServerStatus, Status, TableStatus, loaded_status, refused_status,
};
use super::{FeatureSet, Registry, RegistryError, ShadowPlan, Shared, Snapshot};
use crate::features::{
    Plan, PostgresSettings, PostgresSource, RedisSource, Remote, Source, SourceCounts, SourceKind, Sources, Table,
    VersionPlan,
};
use paddock_host::artifact::digest::Digest;

/// Loaded versions, by model and version.
type Versions = BTreeMap<String, BTreeMap<Version, Arc<Loaded>>>;

/// What a reload saw last time, so unchanged files are not gated again.
#[derive(Default)]
pub(super) struct LastSeen {
    /// Per artifact path: fingerprint of its bytes and vouch, and the outcome.
    files: HashMap<PathBuf, (Fingerprint, Outcome)>,
    /// Fingerprint of the routes file last read, and whether it was accepted.
    routes: Option<(Fingerprint, RoutesState)>,
    /// Fingerprint of the limits file last read, and what was made of it.
    limits: Option<(Fingerprint, LimitsState)>,
    /// The limits last taken.
    taken_limits: Arc<StoreLimits>,
    /// What the features step saw last, and what it made of it.
    features: Option<(FeaturesSeen, Arc<FeatureSet>, FeaturesState)>,
    /// Tables read, by file: its size and change time when read, and the table.
    tables: HashMap<PathBuf, (TableStamp, Arc<Table>)>,
    /// Redis sources made, by name, URL and budget.
    redis: HashMap<(String, String, std::time::Duration), Arc<RedisSource>>,
    /// PostgreSQL sources made, by name and settings.
    postgres: HashMap<(String, PostgresSettings), Arc<PostgresSource>>,
    /// Each source's counters, by name: they outlive reloads.
    counts: BTreeMap<String, Arc<SourceCounts>>,
}

/// A table file's size and change time: read again when either changes.
type TableStamp = (u64, Option<std::time::SystemTime>);

/// Everything the features step depends on.
#[derive(Clone, PartialEq)]
struct FeaturesSeen {
    file: Option<Fingerprint>,
    tables: Vec<(PathBuf, TableStamp)>,
    versions: BTreeSet<(String, Version, Digest)>,
}

#[derive(Clone)]
enum Outcome {
    Loaded(Arc<Loaded>),
    Refused(Refusal, Option<Digest>),
}

/// What the next snapshot will serve, as the steps build it.
struct Next {
    versions: Versions,
    statuses: Vec<ArtifactStatus>,
    limits: LimitsState,
}

/// Step 0: the store's limits file. A file refused keeps the limits last
/// taken (said once per content, like the routes).
fn read_limits(
    shared: &Shared,
    last_seen: &mut LastSeen,
    report: &mut ReloadReport,
) -> (Arc<StoreLimits>, LimitsState) {
    let path = shared.dir.join(LIMITS_FILE);
    let bytes = match std::fs::read(&path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            last_seen.taken_limits = Arc::default();
            last_seen.limits = None;
            return (last_seen.taken_limits.clone(), LimitsState::Missing);
        }
        Err(e) => Err(vec![format!("{}: {e}", path.display())]),
        Ok(bytes) => Ok(bytes),
    };
    let fp = bytes.as_ref().map_or([0; 32], |b| gate::fingerprint(b, None));
    if let Some((last, state)) = &last_seen.limits
        && *last == fp
    {
        return (last_seen.taken_limits.clone(), state.clone());
    }
    let parsed = bytes.and_then(|b| {
        let text = String::from_utf8(b).map_err(|e| vec![format!("{LIMITS_FILE}: not UTF-8 text: {e}")])?;
        StoreLimits::parse(&text, &shared.options.model)
    });
    let state = match parsed {
        Ok(limits) => {
            last_seen.taken_limits = Arc::new(limits);
            LimitsState::Accepted
        }
        Err(problems) => {
            tracing::warn!(limits = %path.display(), problems = %problems.join("; "), "limits file refused; the limits last taken stay");
            report.limits_refused = problems.clone();
            LimitsState::Refused { problems }
        }
    };
    last_seen.limits = Some((fp, state.clone()));
    (last_seen.taken_limits.clone(), state)
}

impl Registry {
    /// Looks at the store again: gates new and changed artifacts, reads the
    /// routes, and swaps in a new snapshot if anything changed. Safe to call
    /// from any thread; reloads run one at a time.
    ///
    /// # Errors
    /// [`RegistryError::Store`] when the store directory cannot be read
    /// (the current snapshot keeps serving).
    pub fn reload(&self) -> Result<ReloadReport, RegistryError> {
        let started = Instant::now();
        let shared = &*self.inner;
        let mut last_seen = shared.last_seen.lock().unwrap_or_else(|e| e.into_inner());
        let old = shared.current.load_full();
        let found =
            layout::scan(&shared.dir).map_err(|cause| RegistryError::Store { path: shared.dir.clone(), cause })?;
        let mut report = ReloadReport::default();
        let (limits, limits_state) = read_limits(shared, &mut last_seen, &mut report);
        let mut next = gate_files(shared, &found, &old, (&mut last_seen, &limits), &mut report);
        next.limits = limits_state;
        let removed = removed_versions(&old, &next.versions);
        let (routes, routes_state) = read_routes(shared, &old, &mut last_seen, &next.versions, &removed, &mut report);
        report.routes_changed = !Arc::ptr_eq(&routes, &old.routes);
        keep_routed(&routes, removed, &mut next, &mut report);
        let features = read_features(shared, &old, &mut last_seen, &next.versions, &mut report);
        swap(shared, &old, routes, routes_state, features, next, &mut report);
        report.took = started.elapsed();
        Ok(report)
    }
}

/// Step 1: every artifact through the gate, or remembered when its bytes
/// and vouch are unchanged. New bytes that fail keep the old version of the
/// same path serving.
fn gate_files(
    shared: &Shared,
    found: &[layout::Found],
    old: &Snapshot,
    (last_seen, limits): (&mut LastSeen, &StoreLimits),
    report: &mut ReloadReport,
) -> Next {
    let mut next = Next { versions: Versions::new(), statuses: Vec::new(), limits: LimitsState::Missing };
    let mut files = HashMap::new();
    for f in found {
        let (model, version) = match &f.identity {
            Ok(id) => id.clone(),
            Err(reason) => {
                next.statuses.push(refused_status(f, None, None, Refusal::Place(reason.clone())));
                continue;
            }
        };
        let options = limits.resolve(shared.options.model_options(&model, &version), &model, &version);
        let (bytes, vouch) = match gate::read_artifact(&f.path, shared.options.size_cap) {
            Ok(read) => read,
            Err(refusal) => {
                next.statuses.push(refused_status(f, Some(&(model, version)), None, refusal));
                continue;
            }
        };
        // New limits for a version gate it again, as new bytes would.
        let fingerprint = gate::fingerprint_with(&bytes, vouch.as_deref(), &options);
        let outcome = match last_seen.files.get(&f.path) {
            Some((fp, outcome)) if *fp == fingerprint => outcome.clone(),
            _ => {
                let digest = Digest::of(&bytes);
                match gate::gate(shared, f, (&model, &version), bytes, vouch.as_deref(), &options) {
                    Ok(loaded) => Outcome::Loaded(Arc::new(loaded)),
                    Err(refusal) => {
                        tracing::warn!(artifact = %f.rel.display(), %refusal, "artifact refused");
                        report.refused.push(RefusedFile { path: f.rel.clone(), refusal: refusal.clone() });
                        Outcome::Refused(refusal, Some(digest))
                    }
                }
            }
        };
        files.insert(f.path.clone(), (fingerprint, outcome.clone()));
        match outcome {
            Outcome::Loaded(loaded) => {
                next.statuses.push(loaded_status(&loaded, ArtifactState::Loaded));
                next.versions.entry(model).or_default().insert(version, loaded);
            }
            Outcome::Refused(refusal, digest) => {
                let kept = old.versions.get(&model).and_then(|v| v.get(&version)).filter(|l| l.rel == f.rel);
                match kept {
                    Some(loaded) => {
                        next.statuses.push(ArtifactStatus {
                            digest,
                            ..loaded_status(
                                loaded,
                                ArtifactState::KeptAfterRefusal { serving: loaded.model.digest(), refusal },
                            )
                        });
                        next.versions.entry(model).or_default().insert(version, loaded.clone());
                    }
                    None => next.statuses.push(refused_status(f, Some(&(model, version)), digest, refusal)),
                }
            }
        }
    }
    last_seen.files = files;
    next
}

/// Step 2: versions served before whose files are gone.
fn removed_versions(old: &Snapshot, versions: &Versions) -> Versions {
    let mut removed = Versions::new();
    for (model, vs) in &old.versions {
        for (version, loaded) in vs {
            if !versions.get(model).is_some_and(|v| v.contains_key(version)) {
                removed.entry(model.clone()).or_default().insert(version.clone(), loaded.clone());
            }
        }
    }
    removed
}

/// Step 3: the routes file in the store if it parses, judged model by
/// model: a model whose routes name only loaded versions (or removed but
/// still loaded ones) takes its new routes; any other keeps its old routes
/// (none, if it had none). A file that does not parse is refused whole.
fn read_routes(
    shared: &Shared,
    old: &Snapshot,
    last_seen: &mut LastSeen,
    versions: &Versions,
    removed: &Versions,
    report: &mut ReloadReport,
) -> (Arc<Routes>, RoutesState) {
    let routes_path = shared.dir.join(ROUTES_FILE);
    let available = |m: &str, v: &Version| {
        versions.get(m).is_some_and(|vs| vs.contains_key(v)) || removed.get(m).is_some_and(|vs| vs.contains_key(v))
    };
    match std::fs::read(&routes_path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            // Still no routes file: the same (empty) routes, no new generation.
            let routes = if matches!(old.status.routes, RoutesState::Missing) {
                old.routes.clone()
            } else {
                Arc::new(Routes::empty())
            };
            (routes, RoutesState::Missing)
        }
        Err(e) => {
            (old.routes.clone(), RoutesState::Refused { problems: vec![format!("{}: {e}", routes_path.display())] })
        }
        Ok(bytes) => {
            let fp = gate::fingerprint(&bytes, None);
            let parsed = std::str::from_utf8(&bytes)
                .map_err(|e| RoutesError { problems: vec![format!("not UTF-8 text: {e}")] })
                .and_then(Routes::parse)
                .map(|r| r.split_by_versions(available));
            let parsed = match parsed {
                // Some models' routes are usable: those serve, the others keep their old routes.
                Ok((taken, refused)) if !refused.is_empty() && taken.models().next().is_some() => {
                    return partly_taken(old, taken, refused, &routes_path, (last_seen, fp), report);
                }
                Ok((taken, refused)) if refused.is_empty() => Ok(taken),
                Ok((_, refused)) => Err(RoutesError { problems: refused.into_values().flatten().collect() }),
                Err(e) => Err(e),
            };
            match parsed {
                Ok(r) => {
                    let same = matches!(&last_seen.routes, Some((last, RoutesState::Accepted)) if *last == fp);
                    let routes = if same { old.routes.clone() } else { Arc::new(r) };
                    last_seen.routes = Some((fp, RoutesState::Accepted));
                    (routes, RoutesState::Accepted)
                }
                Err(e) => {
                    let first_time = last_seen.routes.as_ref().is_none_or(|(last, _)| *last != fp);
                    if first_time {
                        tracing::warn!(routes = %routes_path.display(), problems = %e.problems.join("; "), "routes refused; the previous routes keep serving");
                        report.routes_refused = e.problems.clone();
                    }
                    let state = RoutesState::Refused { problems: e.problems };
                    last_seen.routes = Some((fp, state.clone()));
                    (old.routes.clone(), state)
                }
            }
        }
    }
}

/// The routes of the models `taken`, and for each model `refused` the
/// routes it had before, if any.
fn partly_taken(
    old: &Snapshot,
    mut taken: Routes,
    refused: BTreeMap<String, Vec<String>>,
    routes_path: &std::path::Path,
    (last_seen, fp): (&mut LastSeen, gate::Fingerprint),
    report: &mut ReloadReport,
) -> (Arc<Routes>, RoutesState) {
    for model in refused.keys() {
        if let Some(before) = old.routes.model(model) {
            taken = taken.with_model(model, before.clone());
        }
    }
    let problems: Vec<String> = refused.values().flatten().cloned().collect();
    let state = RoutesState::PartlyTaken { models: refused.keys().cloned().collect(), problems: problems.clone() };
    let first_time = last_seen.routes.as_ref().is_none_or(|(last, _)| *last != fp);
    if first_time {
        tracing::warn!(routes = %routes_path.display(), problems = %problems.join("; "), "routes of some models refused; each keeps the routes it had, the others serve");
        report.routes_refused = problems;
    }
    last_seen.routes = Some((fp, state.clone()));
    (Arc::new(taken), state)
}

/// Step 4: removed versions the routes still use stay loaded; the rest are
/// dropped. Then every served version learns which routes use it.
fn keep_routed(routes: &Routes, removed: Versions, next: &mut Next, report: &mut ReloadReport) {
    let uses = routes.uses();
    for (model, vs) in removed {
        for (version, loaded) in vs {
            if uses.get(model.as_str()).is_some_and(|u| u.contains_key(&version)) {
                tracing::warn!(model = %model, version = %version, "artifact removed but still routed; kept loaded");
                next.statuses.push(loaded_status(&loaded, ArtifactState::KeptAfterRemoval));
                next.versions.entry(model.clone()).or_default().insert(version, loaded);
            } else {
                report.unloaded.push(format!("{model} {version}"));
            }
        }
    }
    for s in &mut next.statuses {
        let served = !matches!(s.state, ArtifactState::Refused { .. });
        if let (Some(m), Some(v), true) = (&s.model, &s.version, served)
            && let Some(users) = uses.get(m.as_str()).and_then(|u| u.get(v)).cloned()
        {
            s.used_by = users;
        }
    }
    next.statuses.sort_by(|a, b| a.path.cmp(&b.path));
}

/// Step 5: the features file, its tables, and the plan held to every
/// served version's contract; the whole refused (the previous plan and
/// tables keep serving) when anything is wrong.
fn read_features(
    shared: &Shared,
    old: &Snapshot,
    last_seen: &mut LastSeen,
    versions: &Versions,
    report: &mut ReloadReport,
) -> (Arc<FeatureSet>, FeaturesState) {
    let path = shared.dir.join(FEATURES_FILE);
    let bytes = match std::fs::read(&path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            // Still no features file: the same (empty) set, no new generation.
            last_seen.features = None;
            let set = if old.status.features == FeaturesState::Missing { old.features.clone() } else { Arc::default() };
            return (set, FeaturesState::Missing);
        }
        Err(e) => {
            return (
                old.features.clone(),
                FeaturesState::Refused { problems: vec![format!("{}: {e}", path.display())] },
            );
        }
        Ok(bytes) => bytes,
    };
    let plan = std::str::from_utf8(&bytes).map_err(|e| vec![format!("{FEATURES_FILE}: not UTF-8 text: {e}")]).and_then(
        |text| {
            Plan::parse(text, FEATURES_FILE, &shared.dir)
                .map_err(|e| e.problems.iter().map(|p| format!("{FEATURES_FILE}: {p}")).collect())
        },
    );
    let stamp = |p: &std::path::Path| std::fs::metadata(p).map(|m| (m.len(), m.modified().ok())).unwrap_or((0, None));
    let tables: Vec<(PathBuf, TableStamp)> = match &plan {
        Ok(plan) => plan
            .sources
            .values()
            .filter_map(|s| match s {
                Source::Table { path, .. } => Some((path.clone(), stamp(path))),
                _ => None,
            })
            .collect(),
        Err(_) => Vec::new(),
    };
    let seen = FeaturesSeen { file: Some(gate::fingerprint(&bytes, None)), tables, versions: flatten(versions) };
    if let Some((last, set, state)) = &last_seen.features
        && *last == seen
    {
        return (set.clone(), state.clone());
    }
    let outcome = plan.and_then(|plan| build_features(shared, &plan, last_seen, versions));
    let result = match outcome {
        Ok((set, tables, servers)) => (Arc::new(set), FeaturesState::Accepted { tables, servers }),
        Err(problems) => {
            tracing::warn!(features = %path.display(), problems = %problems.join("; "), "features refused; the previous plan keeps serving");
            report.features_refused = problems.clone();
            (old.features.clone(), FeaturesState::Refused { problems })
        }
    };
    last_seen.features = Some((seen, result.0.clone(), result.1.clone()));
    result
}

/// The plan's tables (read again only when changed) and its resolution for
/// every served version of the models it names.
fn build_features(
    shared: &Shared,
    plan: &Plan,
    last_seen: &mut LastSeen,
    versions: &Versions,
) -> Result<(FeatureSet, Vec<TableStatus>, Vec<ServerStatus>), Vec<String>> {
    let mut problems = Vec::new();
    let mut tables = BTreeMap::new();
    let mut statuses = Vec::new();
    let mut kept = HashMap::new();
    let mut remotes = BTreeMap::new();
    let mut kept_redis = HashMap::new();
    let mut kept_postgres = HashMap::new();
    let mut servers = Vec::new();
    let counts: BTreeMap<String, Arc<SourceCounts>> = plan
        .sources
        .keys()
        .map(|name| (name.clone(), last_seen.counts.get(name).cloned().unwrap_or_default()))
        .collect();
    for (name, source) in &plan.sources {
        let (path, key, updated) = match source {
            Source::Table { path, key, updated } => (path, key, updated),
            Source::Redis { url, budget, .. } => {
                // A server's source (and its connection) lives on across reloads.
                let id = (name.clone(), url.clone(), *budget);
                let made = match last_seen.redis.get(&id) {
                    Some(r) => Ok(r.clone()),
                    None => RedisSource::new(url, *budget, counts[name].clone()).map(Arc::new),
                };
                match made {
                    Ok(r) => {
                        servers.push(ServerStatus {
                            source: name.clone(),
                            kind: SourceKind::Redis,
                            url: r.shown_url(),
                            budget_ms: u64::try_from(budget.as_millis()).unwrap_or(u64::MAX),
                            unchecked: None,
                        });
                        kept_redis.insert(id, r.clone());
                        remotes.insert(name.clone(), Remote::Redis(r));
                    }
                    Err(e) => problems.push(format!("{FEATURES_FILE}: sources.{name}: {e}")),
                }
                continue;
            }
            Source::Postgres(settings) => {
                // Its pool (and the statements each connection prepared)
                // lives on across reloads while its settings stay; a source
                // not checked at load is made again, to check it now.
                let id = (name.clone(), settings.clone());
                let made = match last_seen.postgres.get(&id) {
                    Some(p) if p.described().is_some() => Ok(p.clone()),
                    _ => PostgresSource::new(settings.clone(), counts[name].clone()).map(Arc::new),
                };
                match made {
                    Ok(p) => {
                        servers.push(ServerStatus {
                            source: name.clone(),
                            kind: SourceKind::Postgres,
                            url: p.shown_url(),
                            budget_ms: u64::try_from(settings.budget.as_millis()).unwrap_or(u64::MAX),
                            unchecked: p.unchecked().map(str::to_owned),
                        });
                        kept_postgres.insert(id, p.clone());
                        remotes.insert(name.clone(), Remote::Postgres(p));
                    }
                    Err(e) => problems.push(format!("{FEATURES_FILE}: sources.{name}: {e}")),
                }
                continue;
            }
        };
        let meta = std::fs::metadata(path).ok();
        let stamp = meta.as_ref().map(|m| (m.len(), m.modified().ok())).unwrap_or((0, None));
        let shown = path.strip_prefix(&shared.dir).unwrap_or(path).display().to_string();
        let table = match last_seen.tables.get(path) {
            Some((s, t)) if *s == stamp && stamp.1.is_some() => Ok(t.clone()),
            _ => Table::read_as(path, &shown, key, updated.as_deref()).map(Arc::new),
        };
        match table {
            Ok(t) => {
                let when = |t: Option<std::time::SystemTime>| {
                    t.and_then(|t| Timestamp::try_from(t).ok()).map(|t| t.to_string()).unwrap_or_default()
                };
                statuses.push(TableStatus {
                    source: name.clone(),
                    file: path.strip_prefix(&shared.dir).unwrap_or(path).to_owned(),
                    rows: t.len(),
                    changed: when(stamp.1),
                    loaded: Timestamp::now().to_string(),
                });
                kept.insert(path.clone(), (stamp, t.clone()));
                tables.insert(name.clone(), t);
            }
            Err(e) => problems.push(e.to_string()),
        }
    }
    last_seen.tables = kept;
    last_seen.redis = kept_redis;
    last_seen.postgres = kept_postgres;
    if !problems.is_empty() {
        return Err(problems);
    }
    last_seen.counts = counts.clone();
    let sources = Sources::from_parts(tables, remotes, counts);
    let mut set = FeatureSet::default();
    for model in plan.models.keys() {
        for (version, loaded) in versions.get(model).into_iter().flatten() {
            match VersionPlan::new(
                plan,
                &sources,
                model,
                version,
                loaded.model.contract(),
                loaded.model.options().limits.deadline,
            ) {
                Ok(Some(r)) => {
                    set.plans.entry(model.clone()).or_default().insert(version.clone(), Arc::new(r));
                }
                Ok(None) => {}
                Err(unusable) => problems.extend(unusable.problems.iter().map(ToString::to_string)),
            }
        }
    }
    set.sources = sources;
    if problems.is_empty() { Ok((set, statuses, servers)) } else { Err(problems) }
}

/// Step 6: a new snapshot, swapped in, when anything changed.
fn swap(
    shared: &Shared,
    old: &Snapshot,
    routes: Arc<Routes>,
    routes_state: RoutesState,
    (features, features_state): (Arc<FeatureSet>, FeaturesState),
    next: Next,
    report: &mut ReloadReport,
) {
    let before = flatten(&old.versions);
    let after = flatten(&next.versions);
    report.loaded = after.difference(&before).map(|(m, v, _)| format!("{m} {v}")).collect();
    report.changed = before != after
        || report.routes_changed
        || next.statuses != old.status.artifacts
        || routes_state != old.status.routes
        || next.limits != old.status.limits
        || !Arc::ptr_eq(&features, &old.features)
        || features_state != old.status.features;
    if !report.changed {
        report.generation = old.generation;
        return;
    }
    let generation = shared.reloads.fetch_add(1, Ordering::SeqCst) + 1;
    let routed: BTreeSet<&str> = routes.models().collect();
    let unrouted = next.versions.keys().filter(|m| !routed.contains(m.as_str())).cloned().collect();
    let status = Status {
        store: shared.dir.clone(),
        generation,
        since: Timestamp::now().to_string(),
        artifacts: next.statuses,
        routes: routes_state,
        limits: next.limits,
        features: features_state,
        unrouted,
        // Filled in by `Registry::status`.
        mirror: None,
        capture: None,
    };
    let versions = next.versions;
    let shadows = routes
        .models()
        .filter_map(|m| {
            let s = routes.model(m)?.shadow()?;
            let plan = ShadowPlan {
                loaded: versions.get(m)?.get(&s.version)?.clone(),
                ledger: shared.ledger.shadow(m, &s.version),
                sample: s.sample,
                tolerance: s.tolerance,
            };
            Some((m.to_owned(), plan))
        })
        .collect();
    shared.current.store(Arc::new(Snapshot { generation, routes, versions, shadows, features, status }));
    for v in &report.loaded {
        tracing::info!(version = %v, generation, "serving");
    }
    for v in &report.unloaded {
        tracing::info!(version = %v, generation, "unloaded");
    }
    report.generation = generation;
}

fn flatten(versions: &Versions) -> BTreeSet<(String, Version, Digest)> {
    versions.iter().flat_map(|(m, vs)| vs.iter().map(move |(v, l)| (m.clone(), v.clone(), l.model.digest()))).collect()
}
