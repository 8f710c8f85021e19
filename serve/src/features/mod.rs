//! Feature sources, between the registry and the sandbox: a request names
//! keys (`site`, `vehicle`), and the features its model reads are looked
//! up in the sources a features file declares, then checked against the
//! contract like any row.
//!
//! - [`Plan`]: the features file (`plan` module): the sources, and per
//!   model (and version) where each feature comes from and what a missing
//!   or stale value becomes.
//! - [`Table`]: an embedded table a batch job writes, held in memory.
//! - [`Sources`]: the plan's tables, loaded; [`VersionPlan`]: a plan held to
//!   one version's contract, ready to [`VersionPlan::gather`] rows. Both hold
//!   their tables by `Arc`, so a request that took them sees one table from
//!   start to end, whatever is swapped in meanwhile.
//!
//! What it is not: a feature store. It reads what a batch job wrote; it
//! computes nothing.

pub mod breaker;
pub mod cell;
pub mod counts;
pub mod plan;
pub mod postgres;
pub mod problem;
pub mod redis;
pub mod remote;
pub mod table;

use std::collections::BTreeMap;
use std::sync::Arc;

use semver::Version;
use serde::Serialize;

pub use counts::{SourceCounts, SourceKind, SourceUsage};
pub use plan::{Around, Fallback, KeyError, Lookup, ModelPlan, Plan, PlanError, Privacy, Source, Supply, Template};
pub use postgres::{PostgresSettings, PostgresSource, PostgresSourceError};
pub use problem::{PlanProblem, Unusable};
pub use redis::{RedisSource, RedisSourceError};
pub use remote::{Got, ServerRead, Trouble};
pub use table::{Cell, Table, TableError};

use paddock_host::contract::rows::{Row, Value};
use paddock_host::contract::{Contract, Domain};

/// The plan's sources, loaded.
#[derive(Clone, Debug, Default)]
pub struct Sources {
    tables: BTreeMap<String, Arc<Table>>,
    servers: BTreeMap<String, Remote>,
    counts: BTreeMap<String, Arc<SourceCounts>>,
}

/// A source on a server, read over the network within a budget.
#[derive(Clone, Debug)]
#[non_exhaustive]
pub enum Remote {
    /// A Redis server.
    Redis(Arc<RedisSource>),
    /// A PostgreSQL server.
    Postgres(Arc<PostgresSource>),
}

impl Remote {
    /// How long a request may wait for it.
    pub fn budget(&self) -> std::time::Duration {
        match self {
            Remote::Redis(r) => r.budget(),
            Remote::Postgres(p) => p.budget(),
        }
    }

    /// The server's URL without its password.
    pub fn shown_url(&self) -> String {
        match self {
            Remote::Redis(r) => r.shown_url(),
            Remote::Postgres(p) => p.shown_url(),
        }
    }

    /// What kind of source it is.
    pub fn kind(&self) -> SourceKind {
        match self {
            Remote::Redis(_) => SourceKind::Redis,
            Remote::Postgres(_) => SourceKind::Postgres,
        }
    }

    /// Sends a read; a thread waits for its answer.
    fn send(&self, asks: &remote::Asks) -> remote::Pending {
        match self {
            Remote::Redis(r) => r.send(asks),
            Remote::Postgres(p) => p.send(asks),
        }
    }

    /// Sends a read; a task awaits its answer.
    fn send_async(&self, asks: &remote::Asks) -> remote::Awaited {
        match self {
            Remote::Redis(r) => r.send_async(asks),
            Remote::Postgres(p) => p.send_async(asks),
        }
    }
}

impl Sources {
    /// Reads every table the plan declares and makes its Redis sources
    /// (which connect on their first read).
    ///
    /// # Errors
    /// [`Unusable`] with every source that could not be made
    /// ([`PlanProblem::Table`], [`PlanProblem::Redis`]), each naming its
    /// file, row and column, or its URL.
    pub fn load(plan: &Plan) -> Result<Sources, Unusable> {
        let mut sources = Sources::default();
        let mut problems = Vec::new();
        for (name, source) in &plan.sources {
            let counts = sources.counts(name);
            match source {
                Source::Table { path, key, updated } => match Table::read(path, key, updated.as_deref()) {
                    Ok(t) => {
                        sources.tables.insert(name.clone(), Arc::new(t));
                    }
                    Err(e) => problems.push(PlanProblem::Table(e)),
                },
                Source::Redis { url, budget, .. } => match RedisSource::new(url, *budget, counts) {
                    Ok(r) => {
                        sources.servers.insert(name.clone(), Remote::Redis(Arc::new(r)));
                    }
                    Err(error) => problems.push(PlanProblem::Redis { source_name: name.clone(), error }),
                },
                Source::Postgres(settings) => match PostgresSource::new(settings.clone(), counts) {
                    Ok(p) => {
                        sources.servers.insert(name.clone(), Remote::Postgres(Arc::new(p)));
                    }
                    Err(error) => problems.push(PlanProblem::Postgres { source_name: name.clone(), error }),
                },
            }
        }
        Unusable::unless(problems, sources)
    }

    /// Sources from tables already read and server sources already made,
    /// by source name, counting into `counts` (by source name; a source
    /// with no counters there gets new ones).
    pub fn from_parts(
        tables: BTreeMap<String, Arc<Table>>,
        servers: BTreeMap<String, Remote>,
        counts: BTreeMap<String, Arc<SourceCounts>>,
    ) -> Sources {
        Sources { tables, servers, counts }
    }

    /// The counters of a source, made on first use.
    pub fn counts(&mut self, name: &str) -> Arc<SourceCounts> {
        self.counts.entry(name.to_owned()).or_default().clone()
    }

    /// Every source's counters now.
    pub fn usage(&self) -> Vec<SourceUsage> {
        let kind = |name: &str| self.servers.get(name).map_or(SourceKind::Table, Remote::kind);
        self.counts.iter().map(|(name, c)| c.report(name, kind(name))).collect()
    }

    /// The table of a source.
    pub fn table(&self, name: &str) -> Option<&Arc<Table>> {
        self.tables.get(name)
    }

    /// The server source of a name.
    pub fn server(&self, name: &str) -> Option<&Remote> {
        self.servers.get(name)
    }
}

/// How a step reads its source.
#[derive(Clone, Debug)]
enum Via {
    Table { table: Arc<Table>, column: usize },
    Remote { source: Remote, updated: Option<String> },
}

/// One looked-up feature, ready.
#[derive(Clone, Debug)]
struct Step {
    feature: String,
    domain: Domain,
    source: String,
    via: Via,
    lookup: Lookup,
    counts: Arc<SourceCounts>,
}

/// A model version's plan, held to its contract, with its sources.
#[derive(Clone, Debug)]
pub struct VersionPlan {
    steps: Vec<Step>,
    keys: Vec<String>,
    private: Arc<BTreeMap<String, Privacy>>,
}

/// How much of what was looked up is reported per row.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, serde::Deserialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum Lookups {
    /// Only the features that fell back (missing, stale or unavailable).
    #[default]
    Fallbacks,
    /// Every looked-up feature: source, key, age, outcome.
    All,
}

/// What became of one looked-up feature for one row.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum Outcome {
    /// The row carried the feature itself: no lookup.
    FromRequest,
    /// Found, fresh enough.
    Found,
    /// No such key, or an empty cell: the feature's fallback.
    Missing,
    /// Older than its allowed age: the feature's fallback.
    Stale,
    /// The source did not answer within its budget, failed, or is paused
    /// after failing: the feature's fallback.
    Unavailable,
}

impl Outcome {
    /// Its name, as the wire and the metrics write it.
    pub fn name(self) -> &'static str {
        match self {
            Outcome::FromRequest => "from_request",
            Outcome::Found => "found",
            Outcome::Missing => "missing",
            Outcome::Stale => "stale",
            Outcome::Unavailable => "unavailable",
        }
    }

    /// Why the plan's fallback took the value's place, or `None` when it
    /// did not (the value came with the row, or was found).
    pub fn fallback_cause(self) -> Option<paddock_host::FallbackCause> {
        match self {
            Outcome::FromRequest | Outcome::Found => None,
            Outcome::Missing => Some(paddock_host::FallbackCause::Missing),
            Outcome::Stale => Some(paddock_host::FallbackCause::Stale),
            Outcome::Unavailable => Some(paddock_host::FallbackCause::Unavailable),
        }
    }
}

/// Where one feature of a row came from.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct Fetched {
    /// The feature.
    pub feature: String,
    /// The source.
    pub source: String,
    /// The key looked up.
    pub key: String,
    /// What became of it.
    pub outcome: Outcome,
    /// How old the value was, in seconds, when the source says.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub age: Option<f64>,
}

/// Why a row's features could not be gathered.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum GatherError {
    /// The request lacks a key the plan needs.
    #[error("the request has no key `{key}` (the model's keys: {})", keys.join(", "))]
    NoKey {
        /// The key.
        key: String,
        /// The keys the model takes.
        keys: Vec<String>,
    },
    /// A feature whose fallback is to fail was missing or stale.
    #[error("feature `{feature}`: {} in source `{from}` under key `{key}`", if *stale { "too old" } else { "nothing" })]
    Missing {
        /// The feature.
        feature: String,
        /// The source.
        from: String,
        /// The key.
        key: String,
        /// Whether it was there but too old.
        stale: bool,
    },
    /// A feature whose fallback is to fail could not be read: its source
    /// did not answer in time, or failed.
    #[error("feature `{feature}`: source `{from}` could not be read for key `{key}`: {trouble}")]
    Unavailable {
        /// The feature.
        feature: String,
        /// The source.
        from: String,
        /// The key.
        key: String,
        /// What happened.
        trouble: String,
    },
    /// A feature whose fallback is to fail is keyed by a position that
    /// places no cell (missing, not a number, out of range).
    #[error("feature `{feature}`: {problem}")]
    NoPlace {
        /// The feature.
        feature: String,
        /// What is wrong with the position.
        problem: String,
    },
    /// The source's value does not fit the feature.
    #[error("feature `{feature}`: source `{from}` has `{value}` under key `{key}`, not {wanted}")]
    WrongKind {
        /// The feature.
        feature: String,
        /// The source.
        from: String,
        /// The key.
        key: String,
        /// The value.
        value: String,
        /// What the feature takes.
        wanted: &'static str,
    },
}

impl GatherError {
    /// The feature (or key) to blame, and its value as text.
    pub fn place(&self) -> (&str, String) {
        match self {
            GatherError::NoKey { key, .. } => (key, "absent".to_owned()),
            GatherError::Missing { feature, .. }
            | GatherError::Unavailable { feature, .. }
            | GatherError::NoPlace { feature, .. } => (feature, "absent".to_owned()),
            GatherError::WrongKind { feature, value, .. } => (feature, value.clone()),
        }
    }
}

impl VersionPlan {
    /// Holds `model` `version`'s plan to its contract and binds its
    /// sources; `deadline` is the version's deadline per call, which every
    /// Redis budget must fit inside. `None` when the plan says nothing of
    /// the model.
    ///
    /// # Errors
    /// [`Unusable`] with every problem: features the contract lacks,
    /// required features with no source, tables or columns that are not
    /// there, a budget longer than the deadline, a default outside its
    /// feature's domain.
    pub fn new(
        plan: &Plan,
        sources: &Sources,
        model: &str,
        version: &Version,
        contract: &Contract,
        deadline: std::time::Duration,
    ) -> Result<Option<VersionPlan>, Unusable> {
        let Some(m) = plan.models.get(model) else { return Ok(None) };
        let mut problems = plan.check(model, version, contract);
        let mut steps = Vec::new();
        for (feature, supply) in m.features_of(version) {
            let Supply::Lookup(lookup) = supply else { continue };
            let Some(f) = contract.features.iter().find(|f| &f.name == feature) else { continue };
            let via = if let Some(table) = sources.table(&lookup.source) {
                let Some(column) = table.column(&lookup.field) else {
                    problems.push(PlanProblem::NoColumn {
                        model: model.to_owned(),
                        version: version.clone(),
                        feature: feature.clone(),
                        source_name: lookup.source.clone(),
                        column: lookup.field.clone(),
                        columns: table.columns().map(str::to_owned).collect(),
                    });
                    continue;
                };
                Via::Table { table: Arc::clone(table), column }
            } else if let Some(server) = sources.server(&lookup.source) {
                if server.budget() > deadline {
                    problems.push(PlanProblem::Budget {
                        model: model.to_owned(),
                        version: version.clone(),
                        feature: feature.clone(),
                        source_name: lookup.source.clone(),
                        budget_ms: server.budget().as_millis(),
                        deadline_ms: deadline.as_millis(),
                    });
                }
                if let Remote::Postgres(p) = server
                    && let Some(described) = p.described()
                {
                    let place = (model, version, feature.as_str(), lookup.source.as_str());
                    problems.extend(column_problem(place, described, &lookup.field, &f.domain));
                }
                let updated = match plan.sources.get(&lookup.source) {
                    Some(Source::Redis { updated, .. }) => updated.clone(),
                    Some(Source::Postgres(settings)) => settings.updated.clone(),
                    _ => None,
                };
                Via::Remote { source: server.clone(), updated }
            } else {
                problems.push(PlanProblem::NotLoaded {
                    model: model.to_owned(),
                    version: version.clone(),
                    feature: feature.clone(),
                    source_name: lookup.source.clone(),
                });
                continue;
            };
            if let Some(around) = lookup.around {
                let fits = match (&f.domain, around.combine) {
                    (Domain::Real(_), _) => true,
                    (Domain::Whole(_), combine) => combine != cell::Aggregate::Mean,
                    _ => false,
                };
                if !fits {
                    problems.push(PlanProblem::Combine {
                        model: model.to_owned(),
                        version: version.clone(),
                        feature: feature.clone(),
                        domain: f.domain.to_string(),
                    });
                }
            }
            if let Fallback::Default(v) = &lookup.missing
                && let Some(problem) = misfit(v, &f.domain)
            {
                problems.push(PlanProblem::Default {
                    model: model.to_owned(),
                    version: version.clone(),
                    feature: feature.clone(),
                    problem,
                });
            }
            let counts = sources.counts.get(&lookup.source).cloned().unwrap_or_default();
            steps.push(Step {
                feature: feature.clone(),
                domain: f.domain.clone(),
                source: lookup.source.clone(),
                via,
                lookup: lookup.clone(),
                counts,
            });
        }
        let private = Arc::new(m.private.clone());
        Unusable::unless(problems, Some(VersionPlan { steps, keys: m.keys.clone(), private }))
    }

    /// The keys a request carries for this model.
    pub fn keys(&self) -> &[String] {
        &self.keys
    }

    /// The keys and features captured traffic must not hold as they are.
    pub fn private(&self) -> &Arc<BTreeMap<String, Privacy>> {
        &self.private
    }

    /// Completes `row` with the features the plan looks up, at `now`
    /// (Unix seconds); see [`VersionPlan::gather_rows`].
    ///
    /// # Errors
    /// As [`VersionPlan::gather_rows`] says of each row.
    pub fn gather(
        &self,
        context: &BTreeMap<String, String>,
        row: &Row,
        now: f64,
    ) -> Result<(Row, Vec<Fetched>), GatherError> {
        self.gather_rows(context, std::slice::from_ref(row), now, Lookups::All).pop().expect("one row in, one out")
    }

    /// Completes each row with the features the plan looks up, at `now`
    /// (Unix seconds). The keys are the request's `context`, each
    /// overridden by a field of the row named as a key (which then leaves
    /// the row: keys are not features). A feature the row carries itself
    /// wins over its lookup. Each Redis source is read once for all the
    /// rows: one pipeline, one round trip. Returns, per row, the completed
    /// row and where each looked-up feature came from (each one, or only
    /// those that fell back, as `report` says), or a
    /// [`GatherError`]: a key the plan needs for a feature that must not
    /// fall back is missing, such a feature has nothing fresh or its source
    /// could not be read, or a value does not fit.
    pub fn gather_rows(
        &self,
        context: &BTreeMap<String, String>,
        rows: &[Row],
        now: f64,
        report: Lookups,
    ) -> Vec<Result<(Row, Vec<Fetched>), GatherError>> {
        let (prepared, mut batches) = self.reads(context, rows);
        // Every source asked at once; the request waits for the slowest,
        // each within its own budget.
        let pending: Vec<_> =
            batches.iter().map(|(name, batch)| self.server(name).map(|s| s.send(&batch.asks))).collect();
        for (batch, pending) in batches.values_mut().zip(pending) {
            batch.settle(pending.map(remote::Pending::wait));
        }
        self.finish(prepared, &batches, now, report)
    }

    /// As [`VersionPlan::gather_rows`], awaiting the sources' answers: a
    /// request waits on its lookups without holding a thread, so a host's
    /// few scoring threads score while reads are in flight.
    pub async fn gather_rows_async(
        &self,
        context: &BTreeMap<String, String>,
        rows: &[Row],
        now: f64,
        report: Lookups,
    ) -> Vec<Result<(Row, Vec<Fetched>), GatherError>> {
        let (prepared, mut batches) = self.reads(context, rows);
        // Every source read at once; the request waits for the slowest.
        let answers = futures_util::future::join_all(batches.iter().map(|(name, batch)| {
            let awaited = self.server(name).map(|s| s.send_async(&batch.asks));
            async move {
                match awaited {
                    Some(a) => Some(a.wait().await),
                    None => None,
                }
            }
        }))
        .await;
        for (batch, answer) in batches.values_mut().zip(answers) {
            batch.settle(answer);
        }
        self.finish(prepared, &batches, now, report)
    }

    /// Each row's keys and the row without them, and one batch of reads
    /// per server source: each key once, with every field any row needs of it.
    #[allow(clippy::type_complexity)]
    fn reads<'c>(
        &self,
        context: &'c BTreeMap<String, String>,
        rows: &[Row],
    ) -> (Vec<(std::borrow::Cow<'c, BTreeMap<String, String>>, Row)>, BTreeMap<&str, Batch>) {
        let prepared: Vec<(std::borrow::Cow<'_, BTreeMap<String, String>>, Row)> =
            rows.iter().map(|r| self.split(context, r)).collect();
        let mut buf = String::new();
        let mut ring = Vec::new();
        let mut batches: BTreeMap<&str, Batch> = BTreeMap::new();
        for step in &self.steps {
            let Via::Remote { updated, .. } = &step.via else { continue };
            let batch = batches.entry(step.source.as_str()).or_default();
            for (keys, row) in &prepared {
                if carries(row, &step.feature) {
                    continue;
                }
                match step.lookup.around {
                    None => {
                        if let Ok(key) = step.lookup.key.render(keys, &mut buf) {
                            batch.ask(key, &step.lookup.field, updated.as_deref());
                        }
                    }
                    Some(around) => {
                        if step.lookup.key.render_around(keys, around.rings, &mut ring).is_ok() {
                            for key in &ring {
                                batch.ask(key, &step.lookup.field, updated.as_deref());
                            }
                        }
                    }
                }
            }
        }
        (prepared, batches)
    }

    /// The server source a step of the plan names `name`.
    fn server(&self, name: &str) -> Option<&Remote> {
        self.steps.iter().find_map(|s| match &s.via {
            Via::Remote { source, .. } if s.source == name => Some(source),
            _ => None,
        })
    }

    /// Every row completed from the answers in `batches`.
    fn finish(
        &self,
        prepared: Vec<(std::borrow::Cow<'_, BTreeMap<String, String>>, Row)>,
        batches: &BTreeMap<&str, Batch>,
        now: f64,
        report: Lookups,
    ) -> Vec<Result<(Row, Vec<Fetched>), GatherError>> {
        // The scratch buffers live on the thread: a request allocates none.
        SCRATCH.with_borrow_mut(|scratch| {
            // What a row read is remembered within this request only.
            scratch.memo.clear();
            scratch.memo.resize_with(self.steps.len(), || None);
            prepared.into_iter().map(|(keys, row)| self.complete(&keys, row, now, batches, scratch, report)).collect()
        })
    }

    /// The keys of a row, and the row without its key fields.
    fn split<'c>(
        &self,
        context: &'c BTreeMap<String, String>,
        row: &Row,
    ) -> (std::borrow::Cow<'c, BTreeMap<String, String>>, Row) {
        // Room for the features the steps add: the row grows once.
        let room = row.fields().len() + self.steps.len();
        if !self.keys.iter().any(|k| row.fields().iter().any(|(n, _)| n == k)) {
            let mut copy = Row::with_capacity(room);
            for (name, value) in row.fields() {
                copy.insert(name.clone(), value.clone());
            }
            return (std::borrow::Cow::Borrowed(context), copy);
        }
        let mut keys = context.clone();
        let mut rest = Row::with_capacity(room);
        for (name, value) in row.fields() {
            if self.keys.contains(name) {
                match value {
                    Value::Label(s) => keys.insert(name.clone(), s.clone()),
                    Value::Integer(i) => keys.insert(name.clone(), i.to_string()),
                    Value::Number(n) => keys.insert(name.clone(), n.to_string()),
                    Value::Flag(b) => keys.insert(name.clone(), b.to_string()),
                    Value::Absent => None,
                };
            } else {
                rest.insert(name.clone(), value.clone());
            }
        }
        (std::borrow::Cow::Owned(keys), rest)
    }

    /// One row completed, its Redis values taken from `batches`. Nothing
    /// is allocated for a feature found and not reported but its value in
    /// the row; consecutive steps reading one table under one key probe it
    /// once.
    fn complete(
        &self,
        keys: &BTreeMap<String, String>,
        row: Row,
        now: f64,
        batches: &BTreeMap<&str, Batch>,
        scratch: &mut Scratch,
        report: Lookups,
    ) -> Result<(Row, Vec<Fetched>), GatherError> {
        let Scratch { key: buf, probed_key, probed, ring, memo } = scratch;
        *probed = None;
        let mut out = row;
        let mut fetched = Vec::new();
        let all = report == Lookups::All;
        for (index, step) in self.steps.iter().enumerate() {
            // Each step sets only its own feature, so `out` still shows
            // what the row itself carried for this one.
            if carries(&out, &step.feature) {
                step.counts.lookup(Outcome::FromRequest);
                if all {
                    let key = step.lookup.key.render(keys, buf).unwrap_or_default().to_owned();
                    fetched.push(Fetched {
                        feature: step.feature.clone(),
                        source: step.source.clone(),
                        key,
                        outcome: Outcome::FromRequest,
                        age: None,
                    });
                }
                continue;
            }
            // No key: nothing can be found; the feature falls back, or the
            // row fails naming the key when its fallback is to fail.
            let mut unrendered = None;
            let key = match step.lookup.key.render(keys, buf) {
                Ok(key) => Some(key),
                Err(e) if step.lookup.missing == Fallback::Fail => {
                    step.counts.lookup(Outcome::Missing);
                    return Err(match e {
                        KeyError::NoKey(key) => GatherError::NoKey { key, keys: self.keys.clone() },
                        e => GatherError::NoPlace { feature: step.feature.clone(), problem: e.to_string() },
                    });
                }
                Err(e) => {
                    unrendered = Some(e);
                    None
                }
            };
            // A row under the key the row before read for this step: the
            // same answer (rows of a request often share their keys).
            let remembered = match (key, &memo[index]) {
                (Some(key), Some(m)) if step.lookup.around.is_none() && m.key == key => Some(m),
                _ => None,
            };
            let (outcome, value, age, trouble) = match remembered {
                Some(m) => (m.outcome, m.value.clone(), m.age, m.trouble.clone()),
                None => {
                    let read = self.read_step(step, key, keys, batches, (probed_key, probed, ring), now)?;
                    let value = match read.1 {
                        Some(cell) => Some(value_of(cell, step, key.unwrap_or_default())?),
                        None => None,
                    };
                    let (outcome, age, trouble) = (read.0, read.2, read.3);
                    // The previous row's key buffer is reused: rows under
                    // many keys allocate no new one each.
                    let mut kept = memo[index].take().map(|m| m.key).unwrap_or_default();
                    memo[index] = key.filter(|_| step.lookup.around.is_none()).map(|key| {
                        kept.clear();
                        kept.push_str(key);
                        Memo { key: kept, outcome, value: value.clone(), age, trouble: trouble.clone() }
                    });
                    (outcome, value, age, trouble)
                }
            };
            step.counts.lookup(outcome);
            let shown = || match (key, &unrendered) {
                (Some(key), _) if step.lookup.around.is_some() => format!("{key} (and {} around)", ring.len() - 1),
                (Some(key), _) => key.to_owned(),
                (None, Some(KeyError::Unplaced { .. })) => {
                    format!("(no key: {})", unrendered.as_ref().map(ToString::to_string).unwrap_or_default())
                }
                (None, _) => format!("(no key for {})", step.lookup.key.text()),
            };
            let value = match (value, &step.lookup.missing) {
                (Some(v), _) => v,
                (None, Fallback::Absent) => Value::Absent,
                (None, Fallback::Default(v)) => v.clone(),
                (None, Fallback::Fail) => {
                    let (feature, from, key) = (step.feature.clone(), step.source.clone(), shown());
                    return Err(match trouble {
                        Some(t) => GatherError::Unavailable { feature, from, key, trouble: t.to_string() },
                        None => GatherError::Missing { feature, from, key, stale: outcome == Outcome::Stale },
                    });
                }
            };
            if all || outcome != Outcome::Found {
                fetched.push(Fetched {
                    feature: step.feature.clone(),
                    source: step.source.clone(),
                    key: shown(),
                    outcome,
                    age,
                });
            }
            out.set(&step.feature, value);
        }
        Ok((out, fetched))
    }

    /// What one step reads under `key` (`None`: the row has no key for
    /// it): the outcome, the cell found, its age, and why the source gave
    /// nothing.
    #[allow(clippy::type_complexity)]
    fn read_step<'a>(
        &self,
        step: &'a Step,
        key: Option<&str>,
        keys: &BTreeMap<String, String>,
        batches: &'a BTreeMap<&str, Batch>,
        (probed_key, probed, ring): (&mut String, &mut Option<(*const Table, Option<usize>)>, &mut Vec<String>),
        now: f64,
    ) -> Result<(Outcome, Option<Cell<'a>>, Option<f64>, Option<Trouble>), GatherError> {
        let read = match (key, &step.via) {
            (None, _) => Read::Found(None),
            (Some(_), _) if step.lookup.around.is_some() => read_around(step, keys, batches, ring, now)?,
            (Some(key), Via::Table { table, column }) => {
                let id = Arc::as_ptr(table);
                let at = match probed {
                    Some((t, at)) if *t == id && probed_key == key => *at,
                    _ => {
                        let at = table.row(key);
                        probed_key.clear();
                        probed_key.push_str(key);
                        *probed = Some((id, at));
                        at
                    }
                };
                Read::Found(at.map(|at| table.at(at, *column)))
            }
            (Some(key), Via::Remote { .. }) => read_remote(step, key, batches),
        };
        Ok(match read {
            Read::Unavailable(t) => (Outcome::Unavailable, None, None, Some(t)),
            Read::Stale(age) => (Outcome::Stale, None, age, None),
            Read::Found(found) => {
                let age = found.and_then(|(_, updated)| updated).map(|t| now - t);
                let stale = matches!((age, step.lookup.max_age), (Some(a), Some(max)) if a > max);
                match found {
                    Some((cell, _)) if cell != Cell::Absent && !stale => (Outcome::Found, Some(cell), age, None),
                    Some((Cell::Absent, _)) | None => (Outcome::Missing, None, age, None),
                    Some(_) => (Outcome::Stale, None, age, None),
                }
            }
        })
    }
}

thread_local! {
    static SCRATCH: std::cell::RefCell<Scratch> = std::cell::RefCell::default();
}

/// Buffers the rows a thread completes share.
#[derive(Default)]
struct Scratch {
    /// A rendered key.
    key: String,
    /// The key last probed in a table, and which table and row it found.
    probed_key: String,
    probed: Option<(*const Table, Option<usize>)>,
    /// The keys of the cells around a position.
    ring: Vec<String>,
    /// Per step of the plan, what the last row read and under which key.
    memo: Vec<Option<Memo>>,
}

/// What a step read under a key, before its fallback: the next row under
/// the same key takes it as it is.
struct Memo {
    key: String,
    outcome: Outcome,
    value: Option<Value>,
    age: Option<f64>,
    trouble: Option<Trouble>,
}

/// Whether the row gives the feature itself.
fn carries(row: &Row, feature: &str) -> bool {
    row.fields().iter().any(|(n, v)| n == feature && *v != Value::Absent)
}

/// The reads of one server source for one request, and their answer.
#[derive(Default)]
struct Batch {
    index: std::collections::HashMap<String, usize, foldhash::fast::RandomState>,
    asks: Vec<(String, Vec<String>)>,
    /// The source's column or field saying when a row was computed.
    updated: Option<String>,
    answer: Option<remote::Settled>,
    /// The key last found (its place in `asks`): rows of a request often
    /// share their keys, and a compare is cheaper than a hash.
    last: std::sync::atomic::AtomicUsize,
}

impl Batch {
    fn ask(&mut self, key: &str, field: &str, updated: Option<&str>) {
        if self.updated.is_none() {
            self.updated = updated.map(str::to_owned);
        }
        let at = match self.find(key) {
            Some(at) => at,
            None => {
                self.asks.push((key.to_owned(), Vec::new()));
                self.index.insert(key.to_owned(), self.asks.len() - 1);
                self.asks.len() - 1
            }
        };
        let fields = &mut self.asks[at].1;
        for f in std::iter::once(field).chain(updated) {
            if !fields.iter().any(|g| g == f) {
                fields.push(f.to_owned());
            }
        }
    }

    /// Takes the server's answer, each `updated` value read as a time once,
    /// whatever the number of rows that share its key.
    fn settle(&mut self, answer: Option<remote::Settled>) {
        self.answer = answer;
        let (Some(updated), Some(Ok(values))) = (&self.updated, &mut self.answer) else { return };
        for ((_, fields), values) in self.asks.iter().zip(values.iter_mut()) {
            let Some(at) = fields.iter().position(|f| f == updated) else { continue };
            let Some(got) = values.get_mut(at) else { continue };
            if let Some(n) = got.as_ref().and_then(|g| if let Got::Text(t) = g { time_of(t) } else { None }) {
                *got = Some(Got::Number(n));
            }
        }
    }

    /// Where `key` is in `asks`, if asked for.
    fn find(&self, key: &str) -> Option<usize> {
        use std::sync::atomic::Ordering::Relaxed;
        let last = self.last.load(Relaxed);
        if self.asks.get(last).is_some_and(|(k, _)| k == key) {
            return Some(last);
        }
        let at = *self.index.get(key)?;
        self.last.store(at, Relaxed);
        Some(at)
    }

    /// The fields asked of `key` and the server's values for them, in
    /// the same order, if asked for and answered.
    fn answered(&self, key: &str) -> Option<(&[String], &[Option<Got>])> {
        let at = self.find(key)?;
        let Some(Ok(values)) = &self.answer else { return None };
        Some((&self.asks[at].1, values.get(at)?))
    }
}

/// What a lookup read: the cell and when its row was computed, or trouble.
enum Read<'a> {
    Found(Option<(Cell<'a>, Option<f64>)>),
    /// Values were found, each older than allowed (the age of the youngest).
    Stale(Option<f64>),
    Unavailable(Trouble),
}

/// One key of a step read from its table, or from its server's answer.
fn read_one<'a>(step: &'a Step, key: &str, batches: &'a BTreeMap<&str, Batch>) -> Read<'a> {
    match &step.via {
        Via::Table { table, column } => Read::Found(table.row(key).map(|at| table.at(at, *column))),
        Via::Remote { .. } => read_remote(step, key, batches),
    }
}

/// A lookup of the cells around a position: the fresh values found,
/// combined (numbers only), aged as the oldest of them.
fn read_around<'a>(
    step: &'a Step,
    keys: &BTreeMap<String, String>,
    batches: &'a BTreeMap<&str, Batch>,
    ring: &mut Vec<String>,
    now: f64,
) -> Result<Read<'a>, GatherError> {
    let Some(around) = step.lookup.around else { return Ok(Read::Found(None)) };
    if step.lookup.key.render_around(keys, around.rings, ring).is_err() {
        return Ok(Read::Found(None));
    }
    let mut values = Vec::with_capacity(ring.len());
    let (mut oldest, mut youngest_stale): (Option<f64>, Option<f64>) = (None, None);
    for key in ring.iter() {
        let (cell, updated) = match read_one(step, key, batches) {
            Read::Unavailable(t) => return Ok(Read::Unavailable(t)),
            Read::Found(Some(found)) => found,
            Read::Found(None) | Read::Stale(_) => continue,
        };
        let age = updated.map(|t| now - t);
        if matches!((age, step.lookup.max_age), (Some(a), Some(max)) if a > max) {
            youngest_stale = match (youngest_stale, age) {
                (Some(y), Some(a)) => Some(y.min(a)),
                (y, a) => y.or(a),
            };
            continue;
        }
        let number = match cell {
            Cell::Absent => continue,
            Cell::Number(n) => n,
            Cell::Text(t) => t.parse::<f64>().map_err(|_| GatherError::WrongKind {
                feature: step.feature.clone(),
                from: step.source.clone(),
                key: key.clone(),
                value: t.to_owned(),
                wanted: "a number",
            })?,
        };
        values.push(number);
        oldest = match (oldest, age) {
            (Some(o), Some(a)) => Some(o.max(a)),
            (o, a) => o.or(a),
        };
    }
    Ok(match around.combine.apply(&values) {
        Some(v) => Read::Found(Some((Cell::Number(v), oldest.map(|a| now - a)))),
        None if youngest_stale.is_some() => Read::Stale(youngest_stale),
        None => Read::Found(None),
    })
}

/// A server lookup's value, from its source's answer to the request.
fn read_remote<'a>(step: &'a Step, key: &str, batches: &'a BTreeMap<&str, Batch>) -> Read<'a> {
    match &step.via {
        Via::Table { .. } => Read::Found(None),
        Via::Remote { updated, .. } => {
            let Some(batch) = batches.get(step.source.as_str()) else { return Read::Found(None) };
            if let Some(Err(t)) = &batch.answer {
                return Read::Unavailable(t.clone());
            }
            let Some((fields, values)) = batch.answered(key) else { return Read::Found(None) };
            // A key with none of the fields asked is not there.
            if values.iter().all(Option::is_none) {
                return Read::Found(None);
            }
            let pick = |f: &str| values.get(fields.iter().position(|g| g == f)?)?.as_ref();
            let cell = match pick(&step.lookup.field) {
                Some(Got::Number(n)) => Cell::Number(*n),
                Some(Got::Text(t)) => Cell::Text(t),
                None => Cell::Absent,
            };
            // Read as a time when the answer was taken (`Batch::settle`).
            let when = updated.as_deref().and_then(pick).and_then(|got| match got {
                Got::Number(n) => Some(*n),
                Got::Text(_) => None,
            });
            Read::Found(Some((cell, when)))
        }
    }
}

/// When a row was computed, from the text a server holds: Unix seconds,
/// or an RFC 3339 timestamp.
fn time_of(text: &str) -> Option<f64> {
    text.parse::<f64>()
        .ok()
        .or_else(|| text.parse::<jiff::Timestamp>().ok().map(|ts| ts.as_millisecond() as f64 / 1000.0))
}

/// A PostgreSQL lookup's column, held to the query's description: it is
/// returned, and of a type that holds the feature.
fn column_problem(
    (model, version, feature, source): (&str, &Version, &str, &str),
    described: &postgres::Described,
    column: &str,
    domain: &Domain,
) -> Option<PlanProblem> {
    let Some(ty) = described.column(column) else {
        return Some(PlanProblem::NoColumn {
            model: model.to_owned(),
            version: version.clone(),
            feature: feature.to_owned(),
            source_name: source.to_owned(),
            column: column.to_owned(),
            columns: described.names().map(str::to_owned).collect(),
        });
    };
    postgres::misfit(ty, domain).map(|wanted| PlanProblem::ColumnType {
        model: model.to_owned(),
        version: version.clone(),
        feature: feature.to_owned(),
        source_name: source.to_owned(),
        column: column.to_owned(),
        type_name: ty.name().to_owned(),
        wanted,
    })
}

/// Why a default does not fit a feature's domain, if it does not.
fn misfit(v: &Value, domain: &Domain) -> Option<String> {
    let fits = match (v, domain) {
        (Value::Number(_) | Value::Integer(_), Domain::Real(_))
        | (Value::Integer(_), Domain::Whole(_))
        | (Value::Flag(_), Domain::Flag) => true,
        (Value::Number(n), Domain::Whole(_)) => n.fract() == 0.0,
        (Value::Label(l), Domain::Label(labels)) => labels.contains(l),
        _ => false,
    };
    (!fits).then(|| format!("{v:?} does not fit its domain ({domain})"))
}

/// A source's cell as the feature's value.
fn value_of(cell: Cell<'_>, step: &Step, key: &str) -> Result<Value, GatherError> {
    let wrong = |value: String, wanted| GatherError::WrongKind {
        feature: step.feature.clone(),
        from: step.source.clone(),
        key: key.to_owned(),
        value,
        wanted,
    };
    // A number written as text (its column holds other text too).
    let cell = match (&step.domain, cell) {
        (Domain::Real(_) | Domain::Whole(_) | Domain::Flag, Cell::Text(t)) => {
            t.parse::<f64>().map_or(cell, Cell::Number)
        }
        _ => cell,
    };
    Ok(match (&step.domain, cell) {
        (Domain::Real(_), Cell::Number(n)) => Value::Number(n),
        (Domain::Whole(_), Cell::Number(n)) if n.fract() == 0.0 && n.abs() < 9.0e15 => Value::Integer(n as i64),
        (Domain::Whole(_), Cell::Number(n)) => Value::Number(n),
        (Domain::Label(_), Cell::Text(t)) => Value::Label(t.to_owned()),
        (Domain::Label(_), Cell::Number(n)) => Value::Label(n.to_string()),
        (Domain::Flag, Cell::Number(n)) if n == 0.0 || n == 1.0 => Value::Flag(n == 1.0),
        (Domain::Flag, Cell::Text("true" | "yes")) => Value::Flag(true),
        (Domain::Flag, Cell::Text("false" | "no")) => Value::Flag(false),
        (Domain::Flag, c) => return Err(wrong(show(c), "a yes/no value")),
        (_, c) => return Err(wrong(show(c), "a number")),
    })
}

fn show(c: Cell<'_>) -> String {
    match c {
        Cell::Number(n) => n.to_string(),
        Cell::Text(t) => t.to_owned(),
        Cell::Absent => "nothing".to_owned(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use paddock_host::contract::{Bounds, Feature, Output};

    fn feature(name: &str, domain: Domain, required: bool) -> Feature {
        Feature { name: name.into(), domain, unit: None, required, about: String::new() }
    }

    fn contract() -> Contract {
        Contract {
            name: "charge-minutes".into(),
            version: "1.0.0".into(),
            about: String::new(),
            features: vec![
                feature("charger_kw", Domain::Real(Bounds { min: None, max: None }), true),
                feature("avg_minutes_7d", Domain::Real(Bounds { min: None, max: None }), false),
                feature("plug", Domain::Label(vec!["ccs2".into(), "type2".into()]), true),
                feature("occupancy", Domain::Whole(Bounds { min: None, max: None }), true),
            ],
            outputs: vec![Output {
                name: "minutes".into(),
                unit: None,
                bounds: Bounds { min: None, max: None },
                about: String::new(),
            }],
        }
    }

    /// A plan over a table in a temporary directory; `now` is 2026-12-02T00:00:00Z.
    fn setup(features: &str) -> (tempfile::TempDir, Result<Option<VersionPlan>, Unusable>) {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(
            dir.path().join("sites.csv"),
            "site,avg_minutes_7d,plug,occupancy,updated_at\nnorth-1,42.5,ccs2,3,2026-12-01T12:00:00Z\nsouth-2,35,type2,x,2026-11-20T00:00:00Z\n",
        )
        .unwrap();
        let text = format!(
            "[sources.sites]\ntable = \"sites.csv\"\nkey = \"site\"\nupdated = \"updated_at\"\n[models.charge-minutes]\nkeys = [\"site\"]\n[models.charge-minutes.features]\n{features}"
        );
        let plan = Plan::parse(&text, "features.toml", dir.path()).unwrap();
        let sources = Sources::load(&plan).unwrap();
        let resolved = VersionPlan::new(
            &plan,
            &sources,
            "charge-minutes",
            &Version::new(1, 0, 0),
            &contract(),
            std::time::Duration::from_millis(50),
        );
        (dir, resolved)
    }

    const NOW: f64 = 1_796_169_600.0;
    const PLAN: &str = "charger_kw = \"request\"\nplug = { source = \"sites\", key = \"{site}\", field = \"plug\", missing = \"fail\" }\n\
        avg_minutes_7d = { source = \"sites\", key = \"{site}\", field = \"avg_minutes_7d\", max_age = \"2d\" }\n\
        occupancy = { source = \"sites\", key = \"{site}\", field = \"occupancy\", missing = { default = 0 } }\n";

    fn keys(site: &str) -> BTreeMap<String, String> {
        [("site".to_owned(), site.to_owned())].into()
    }

    #[test]
    fn keys_found_missing_and_stale_follow_each_policy() {
        let (_dir, resolved) = setup(PLAN);
        let r = resolved.unwrap().unwrap();
        let row = Row::new().with("charger_kw", 11.0);
        // Found and fresh (12 h old).
        let (got, fetched) = r.gather(&keys("north-1"), &row, NOW).unwrap();
        assert_eq!(got, row.clone().with("avg_minutes_7d", 42.5).with("occupancy", 3i64).with("plug", "ccs2"));
        assert_eq!(
            fetched[0],
            Fetched {
                feature: "avg_minutes_7d".into(),
                source: "sites".into(),
                key: "north-1".into(),
                outcome: Outcome::Found,
                age: Some(43_200.0)
            }
        );
        // South-2's occupancy is `x`, not a whole number: the row fails naming it.
        let err = r.gather(&keys("south-2"), &row, NOW).unwrap_err();
        assert_eq!(err.to_string(), "feature `occupancy`: source `sites` has `x` under key `south-2`, not a number");
        // Read occupancy elsewhere: south-2's row is 12 days old, beyond 2 d:
        // stale, and the feature falls back to absent.
        let (_dir2, other) = setup(&PLAN.replace("field = \"occupancy\"", "field = \"avg_minutes_7d\""));
        let (got, fetched) = other.unwrap().unwrap().gather(&keys("south-2"), &row, NOW).unwrap();
        let avg = fetched.iter().find(|f| f.feature == "avg_minutes_7d").unwrap();
        assert_eq!((avg.outcome, avg.age), (Outcome::Stale, Some(12.0 * 86_400.0)));
        assert!(got.fields().contains(&("avg_minutes_7d".to_owned(), Value::Absent)));
        // An unknown site: the default for occupancy, but plug must fail.
        let err = r.gather(&keys("west-9"), &row, NOW).unwrap_err();
        assert_eq!(err.to_string(), "feature `plug`: nothing in source `sites` under key `west-9`");
        // A feature the row carries wins over the lookup.
        let (got, fetched) = r.gather(&keys("north-1"), &row.clone().with("plug", "type2"), NOW).unwrap();
        assert!(got.fields().contains(&("plug".to_owned(), Value::Label("type2".into()))));
        assert_eq!(fetched.iter().find(|f| f.feature == "plug").unwrap().outcome, Outcome::FromRequest);
        // No key at all.
        assert_eq!(
            r.gather(&BTreeMap::new(), &row, NOW).unwrap_err().to_string(),
            "the request has no key `site` (the model's keys: site)"
        );
    }

    #[test]
    fn plans_that_do_not_fit_the_contract_or_the_tables_are_refused_with_every_problem() {
        let (_dir, resolved) = setup(
            "plug = { source = \"sites\", key = \"{site}\", field = \"connector\", missing = { default = \"chademo\" } }\n\
             wind = { source = \"sites\", key = \"{site}\", field = \"plug\" }\n\
             occupancy = { source = \"sites\", key = \"{site}\", field = \"occupancy\" }\n",
        );
        assert_eq!(
            resolved.unwrap_err().problems.iter().map(ToString::to_string).collect::<Vec<_>>(),
            [
                "charge-minutes 1.0.0: the plan sources `wind`, which its contract does not have",
                "charge-minutes 1.0.0: required feature `charger_kw` has no source (say `charger_kw = \"request\"` if the row carries it)",
                "charge-minutes 1.0.0: required feature `occupancy` falls back to absent: give a default, or `missing = \"fail\"`",
                "charge-minutes 1.0.0: feature `plug`: source `sites` has no column `connector` (it has site, avg_minutes_7d, plug, occupancy, updated_at)",
            ]
        );
    }
}
