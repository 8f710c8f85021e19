//! The features file: where each model's features come from.
//!
//! ```toml
//! [sources.live]                    # a Redis server: each key a hash
//! redis = "redis://127.0.0.1:6379"
//! budget_ms = 5                     # how long a request waits for it (default 10)
//! updated = "updated_at"            # optional: the field saying when the hash was computed
//!
//! [sources.stats]                   # a PostgreSQL table or view: one query, every key at once
//! postgres = "postgresql://paddock@db.example/features?sslmode=require"
//! query = "SELECT site, occupancy, updated_at FROM site_stats WHERE site = ANY($1)"
//! key = "site"                      # the column each row's key is in
//! updated = "updated_at"            # optional: a timestamp column
//! budget_ms = 10                    # as for Redis
//! connections = 4                   # the pool's size (default 4)
//! password_env = "STATS_PASSWORD"   # optional: where the password is, if not in the URL (default PGPASSWORD)
//!
//! [sources.sites]                   # an embedded table a batch job writes
//! table = "tables/sites.csv"        # CSV or NDJSON; relative to the file
//! key = "site"                      # the column rows are found by
//! updated = "updated_at"            # optional: when each row was computed
//!
//! [models.charge-minutes]
//! keys = ["site", "vehicle"]        # what a request carries
//!
//! [models.charge-minutes.features]
//! charger_kw = "request"            # the row itself carries it
//! avg_minutes_7d = { source = "sites", key = "{site}", field = "avg_minutes_7d", max_age = "26h" }
//! usual_target = { source = "vehicles", key = "ev:{vehicle}", field = "target_soc", missing = { default = 0.8 } }
//!
//! [models.charge-minutes.versions."2.0.0".features]
//! # a version reading other features has a table of its own
//!
//! [models.charge-minutes.private]    # what captured traffic must not hold
//! vehicle = "hash"                  # a key or feature written as a salted hash
//! lat = "drop"                      # or left out
//! ```
//!
//! `missing` says what a row gets when the key is not there, the cell is
//! empty, or the row is older than `max_age`: `"absent"` (the default: the
//! contract's absent value, NaN for an optional feature), `"fail"` (the row
//! fails, naming the key), or `{ default = VALUE }`.
//!
//! Parsing checks everything that can be checked without the store and
//! reports every problem at once; [`Plan::check`] then holds a version's
//! contract to it.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use semver::Version;
use serde::Deserialize;

use paddock_host::contract::Contract;
use paddock_host::contract::rows::Value;

use super::cell::{self, Aggregate, CellKey, Unplaced};
use super::postgres::PostgresSettings;
use super::problem::PlanProblem;

/// A parsed features file.
#[derive(Clone, Debug, PartialEq)]
pub struct Plan {
    /// The sources, by name.
    pub sources: BTreeMap<String, Source>,
    /// Each model's plan, by model name.
    pub models: BTreeMap<String, ModelPlan>,
}

/// Where looked-up features are read.
#[derive(Clone, Debug, PartialEq)]
#[non_exhaustive]
pub enum Source {
    /// A table file held in memory.
    Table {
        /// The file (relative paths are resolved against the features file's directory).
        path: PathBuf,
        /// The column rows are found by.
        key: String,
        /// The column saying when each row was computed.
        updated: Option<String>,
    },
    /// A Redis server: each key a hash, its fields the features.
    Redis {
        /// `redis://host:port/db`.
        url: String,
        /// How long a request may wait for the source.
        budget: std::time::Duration,
        /// The hash field saying when it was computed (RFC 3339 or Unix seconds).
        updated: Option<String>,
    },
    /// A PostgreSQL server, read with one query per request.
    Postgres(PostgresSettings),
}

/// One model's plan.
#[derive(Clone, Debug, PartialEq)]
pub struct ModelPlan {
    /// The keys a request carries.
    pub keys: Vec<String>,
    /// Where each feature comes from.
    pub features: BTreeMap<String, Supply>,
    /// Versions with features of their own: their table replaces `features`.
    pub versions: BTreeMap<Version, BTreeMap<String, Supply>>,
    /// Keys and features that captured traffic must not hold as they are.
    pub private: BTreeMap<String, Privacy>,
}

/// What capture does with a private key or feature before writing.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum Privacy {
    /// Left out of the captured line.
    Drop,
    /// Written as a salted hash of its value (equal values, equal hashes,
    /// for the life of the host; the salt is never written).
    Hash,
}

impl ModelPlan {
    /// The features of `version`.
    pub fn features_of(&self, version: &Version) -> &BTreeMap<String, Supply> {
        self.versions.get(version).unwrap_or(&self.features)
    }
}

/// Where one feature comes from.
#[derive(Clone, Debug, PartialEq)]
#[non_exhaustive]
pub enum Supply {
    /// The request's row.
    Request,
    /// A source.
    Lookup(Lookup),
}

/// A keyed lookup.
#[derive(Clone, Debug, PartialEq)]
pub struct Lookup {
    /// The source's name.
    pub source: String,
    /// The key, from the request's keys.
    pub key: Template,
    /// The column (table) or hash field.
    pub field: String,
    /// How old a value may be, in seconds.
    pub max_age: Option<f64>,
    /// What a missing or stale value becomes.
    pub missing: Fallback,
    /// For a key with a grid cell: the cells around it read too, and how
    /// their values combine.
    pub around: Option<Around>,
}

/// A lookup of a cell and the cells within some rings of it.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Around {
    /// How many rings (1 reads 7 cells, 2 reads 19).
    pub rings: u32,
    /// How the values found combine.
    pub combine: Aggregate,
}

/// What a missing or stale value becomes.
#[derive(Clone, Debug, PartialEq)]
#[non_exhaustive]
pub enum Fallback {
    /// The contract's absent value.
    Absent,
    /// The row fails, naming the key.
    Fail,
    /// This value.
    Default(Value),
}

/// A key template: text with `{key}` holes filled from the request's keys.
#[derive(Clone, Debug, PartialEq)]
pub struct Template {
    text: String,
    parts: Vec<Part>,
}

#[derive(Clone, Debug, PartialEq)]
enum Part {
    Text(String),
    Key(String),
    Cell(CellKey),
}

/// Why a template made no key for a request.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum KeyError {
    /// The request lacks a key the template uses.
    #[error("no key `{0}`")]
    NoKey(String),
    /// The position of a cell hole placed no cell.
    #[error("{hole}: {why}")]
    Unplaced {
        /// The hole, as written (`h3(lat, lon, 8)`).
        hole: String,
        /// Why.
        why: Unplaced,
    },
}

impl Template {
    fn parse(text: &str, keys: &[String]) -> Result<Template, String> {
        let mut parts = Vec::new();
        let mut rest = text;
        while let Some(open) = rest.find('{') {
            if open > 0 {
                parts.push(Part::Text(rest[..open].to_owned()));
            }
            let close = rest[open..].find('}').ok_or_else(|| format!("key `{text}`: a `{{` with no `}}`"))? + open;
            let name = &rest[open + 1..close];
            if let Some(args) = name.strip_prefix("h3(").and_then(|a| a.strip_suffix(')')) {
                parts.push(Part::Cell(CellKey::parse(args, keys).map_err(|e| format!("key `{text}`: {e}"))?));
            } else if keys.iter().any(|k| k == name) {
                parts.push(Part::Key(name.to_owned()));
            } else {
                return Err(format!(
                    "key `{text}` uses `{{{name}}}`, which is not one of the model's keys ({}) nor a cell `{{h3(LAT, LON, RESOLUTION)}}`",
                    keys.join(", ")
                ));
            }
            rest = &rest[close + 1..];
        }
        if rest.contains('}') {
            return Err(format!("key `{text}`: a `}}` with no `{{`"));
        }
        if !rest.is_empty() {
            parts.push(Part::Text(rest.to_owned()));
        }
        if !parts.iter().any(|p| matches!(p, Part::Key(_) | Part::Cell(_))) {
            return Err(format!("key `{text}` uses none of the model's keys: every request would read one row"));
        }
        if parts.iter().filter(|p| matches!(p, Part::Cell(_))).count() > 1 {
            return Err(format!("key `{text}`: one cell per key"));
        }
        Ok(Template { text: text.to_owned(), parts })
    }

    /// Whether the template has a cell hole.
    pub fn has_cell(&self) -> bool {
        self.parts.iter().any(|p| matches!(p, Part::Cell(_)))
    }

    /// The keys of the cell a request's position falls in and of every
    /// cell within `rings` of it (the cell first), into `out`; with no
    /// cell hole, the one key.
    ///
    /// # Errors
    /// [`KeyError`]: a key missing, or a position that places no cell.
    pub fn render_around(
        &self,
        keys: &BTreeMap<String, String>,
        rings: u32,
        out: &mut Vec<String>,
    ) -> Result<(), KeyError> {
        out.clear();
        let Some(hole) = self.parts.iter().find_map(|p| match p {
            Part::Cell(c) => Some(c),
            _ => None,
        }) else {
            let mut buf = String::new();
            out.push(self.render(keys, &mut buf)?.to_owned());
            return Ok(());
        };
        let center = hole.cell(keys).map_err(|why| KeyError::Unplaced { hole: hole.text(), why })?;
        for cell in cell::around(center, rings) {
            out.push(self.write(keys, Some(cell))?);
        }
        Ok(())
    }

    /// The template written out, the cell hole (if any) as `cell`.
    fn write(&self, keys: &BTreeMap<String, String>, cell: Option<h3o::CellIndex>) -> Result<String, KeyError> {
        let mut text = String::new();
        for p in &self.parts {
            match p {
                Part::Text(t) => text.push_str(t),
                Part::Key(k) => text.push_str(keys.get(k).ok_or_else(|| KeyError::NoKey(k.clone()))?),
                Part::Cell(c) => {
                    let cell = match cell {
                        Some(cell) => cell,
                        None => c.cell(keys).map_err(|why| KeyError::Unplaced { hole: c.text(), why })?,
                    };
                    text.push_str(&cell.to_string());
                }
            }
        }
        Ok(text)
    }

    /// The template as written (`ev:{vehicle}`).
    pub fn text(&self) -> &str {
        &self.text
    }

    /// The key for a request's keys: the key itself when the template is
    /// just `{key}` (no allocation), else written into `buf`.
    ///
    /// # Errors
    /// [`KeyError`]: the request lacks a key the template uses, or its
    /// position places no cell.
    pub fn render<'a>(&self, keys: &'a BTreeMap<String, String>, buf: &'a mut String) -> Result<&'a str, KeyError> {
        match &self.parts[..] {
            [Part::Key(k)] => keys.get(k).map(String::as_str).ok_or_else(|| KeyError::NoKey(k.clone())),
            parts if !parts.iter().any(|p| matches!(p, Part::Cell(_))) => {
                buf.clear();
                for p in parts {
                    match p {
                        Part::Text(t) => buf.push_str(t),
                        Part::Key(k) => buf.push_str(keys.get(k).ok_or_else(|| KeyError::NoKey(k.clone()))?),
                        Part::Cell(_) => {}
                    }
                }
                Ok(buf.as_str())
            }
            _ => {
                *buf = self.write(keys, None)?;
                Ok(buf.as_str())
            }
        }
    }
}

/// Why a features file was refused: every problem found.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("{file}: {}", problems.join("; "))]
#[non_exhaustive]
pub struct PlanError {
    /// The file.
    pub file: String,
    /// Each problem, naming its place.
    pub problems: Vec<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPlan {
    #[serde(default)]
    sources: BTreeMap<String, RawSource>,
    #[serde(default)]
    models: BTreeMap<String, RawModel>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSource {
    table: Option<PathBuf>,
    key: Option<String>,
    redis: Option<String>,
    postgres: Option<String>,
    query: Option<String>,
    connections: Option<usize>,
    password_env: Option<String>,
    budget_ms: Option<u64>,
    updated: Option<String>,
}

/// A Redis or PostgreSQL source's budget, in milliseconds.
fn budget(name: &str, ms: Option<u64>) -> Result<std::time::Duration, String> {
    match ms.unwrap_or(10) {
        ms @ 1..=60_000 => Ok(std::time::Duration::from_millis(ms)),
        ms => Err(format!("sources.{name}: budget_ms = {ms}: give 1 to 60000")),
    }
}

impl RawSource {
    /// A PostgreSQL source's settings, or what is wrong with them.
    fn postgres(self, name: &str, url: String) -> Result<Source, Vec<String>> {
        let mut problems = Vec::new();
        if self.table.is_some() || self.redis.is_some() {
            problems.push(format!("sources.{name}: one of `table`, `redis` or `postgres`, not several"));
        }
        let query = self.query.unwrap_or_else(|| {
            problems.push(format!(
                "sources.{name}: no `query` (the SELECT that reads every key at once, e.g. `... WHERE site = ANY($1)`)"
            ));
            String::new()
        });
        let key = self.key.unwrap_or_else(|| {
            problems.push(format!("sources.{name}: no `key` (the column the query returns each row's key in)"));
            String::new()
        });
        let connections = match self.connections.unwrap_or(4) {
            n @ 1..=64 => n,
            n => {
                problems.push(format!("sources.{name}: connections = {n}: give 1 to 64"));
                1
            }
        };
        let budget = budget(name, self.budget_ms).map_err(|e| problems.push(e)).unwrap_or_default();
        if !problems.is_empty() {
            return Err(problems);
        }
        Ok(Source::Postgres(PostgresSettings {
            url,
            query,
            key,
            updated: self.updated,
            budget,
            connections,
            password_variable: self.password_env,
        }))
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    #[serde(default)]
    keys: Vec<String>,
    #[serde(default)]
    features: BTreeMap<String, RawFrom>,
    #[serde(default)]
    versions: BTreeMap<String, RawVersion>,
    #[serde(default)]
    private: BTreeMap<String, String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawVersion {
    features: BTreeMap<String, RawFrom>,
}

#[derive(Deserialize)]
#[serde(untagged)]
enum RawFrom {
    Word(String),
    Lookup(RawLookup),
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawLookup {
    source: String,
    key: String,
    field: String,
    max_age: Option<String>,
    missing: Option<RawFallback>,
    around: Option<u32>,
    combine: Option<String>,
}

/// The most rings a lookup may read around a cell (4 rings: 61 cells).
const MAX_RINGS: u32 = 4;

/// A lookup's `around` and `combine`, or what is wrong with them.
fn around(l: &RawLookup, key: Option<&Template>) -> Result<Option<Around>, String> {
    let combine = l.combine.as_deref().map(Aggregate::parse).transpose()?;
    match (l.around, combine) {
        (None, None) => Ok(None),
        (None, Some(_)) => Err("`combine` needs `around` (the rings of cells around the position to read)".into()),
        (Some(_), None) => Err("`around` needs `combine` (\"mean\", \"max\", \"min\" or \"sum\")".into()),
        (Some(rings), Some(_)) if !(1..=MAX_RINGS).contains(&rings) => {
            Err(format!("around = {rings}: give 1 to {MAX_RINGS} rings"))
        }
        (Some(_), Some(_)) if key.is_some_and(|k| !k.has_cell()) => {
            Err("`around` reads the cells around a position: the key needs a cell, as in `{h3(lat, lon, 8)}`".into())
        }
        (Some(rings), Some(combine)) => Ok(Some(Around { rings, combine })),
    }
}

#[derive(Deserialize)]
#[serde(untagged)]
enum RawFallback {
    Word(String),
    Default { default: toml::Value },
}

/// Reads `"90s"`, `"15m"`, `"26h"`, `"7d"` as seconds.
fn seconds(text: &str) -> Result<f64, String> {
    let t = text.trim();
    let (number, unit) = t.split_at(t.find(|c: char| !(c.is_ascii_digit() || c == '.')).unwrap_or(t.len()));
    let n: f64 = number.parse().map_err(|_| format!("max_age `{text}` is not a duration like 90s, 15m, 26h or 7d"))?;
    let scale = match unit {
        "s" => 1.0,
        "m" => 60.0,
        "h" => 3600.0,
        "d" => 86_400.0,
        _ => return Err(format!("max_age `{text}` is not a duration like 90s, 15m, 26h or 7d")),
    };
    Ok(n * scale)
}

impl Plan {
    /// Parses a features file; `dir` resolves relative table paths.
    ///
    /// # Errors
    /// [`PlanError`] listing every problem: TOML syntax, unknown keys,
    /// sources that are not whole, lookups naming an unknown source or
    /// key, durations and fallbacks that do not read.
    pub fn parse(text: &str, file: &str, dir: &Path) -> Result<Plan, PlanError> {
        let fail = |problems: Vec<String>| PlanError { file: file.to_owned(), problems };
        let raw: RawPlan = toml::from_str(text).map_err(|e| fail(vec![e.to_string().trim().replace('\n', " ")]))?;
        let mut problems = Vec::new();
        let mut sources = BTreeMap::new();
        let declared: Vec<String> = raw.sources.keys().cloned().collect();
        for (name, mut s) in raw.sources {
            if let Some(url) = s.postgres.take() {
                match s.postgres(&name, url) {
                    Ok(source) => drop(sources.insert(name, source)),
                    Err(found) => problems.extend(found),
                }
                continue;
            }
            if s.query.is_some() || s.connections.is_some() || s.password_env.is_some() {
                problems.push(format!(
                    "sources.{name}: `query`, `connections` and `password_env` belong to a `postgres` source"
                ));
            }
            match (s.table, s.key, s.redis) {
                (Some(_), _, Some(_)) => {
                    problems.push(format!("sources.{name}: one of `table`, `redis` or `postgres`, not several"))
                }
                (None, _, Some(url)) => match budget(&name, s.budget_ms) {
                    Ok(budget) => drop(sources.insert(name, Source::Redis { url, budget, updated: s.updated })),
                    Err(e) => problems.push(e),
                },
                (Some(path), Some(key), None) => {
                    sources.insert(name, Source::Table { path: dir.join(path), key, updated: s.updated });
                }
                (None, _, None) => problems.push(format!(
                    "sources.{name}: no `table` (the file to read), `redis` or `postgres` (the server's URL)"
                )),
                (Some(_), None, None) => {
                    problems.push(format!("sources.{name}: no `key` (the column rows are found by)"))
                }
            }
        }
        let mut models = BTreeMap::new();
        for (model, m) in raw.models {
            let mut read = |table: BTreeMap<String, RawFrom>, at: &str| {
                let mut features = BTreeMap::new();
                for (feature, from) in table {
                    let place = format!("{at}.{feature}");
                    match from {
                        RawFrom::Word(w) if w == "request" => {
                            features.insert(feature, Supply::Request);
                        }
                        RawFrom::Word(w) => {
                            problems.push(format!("{place}: `{w}` is neither \"request\" nor a lookup table"))
                        }
                        RawFrom::Lookup(l) => {
                            if !declared.contains(&l.source) {
                                problems
                                    .push(format!("{place}: source `{}` is not declared under [sources]", l.source));
                            }
                            let key = Template::parse(&l.key, &m.keys)
                                .map_err(|e| problems.push(format!("{place}: {e}")))
                                .ok();
                            let ring = around(&l, key.as_ref()).map_err(|e| problems.push(format!("{place}: {e}")));
                            let max_age = l
                                .max_age
                                .as_deref()
                                .map(seconds)
                                .transpose()
                                .map_err(|e| problems.push(format!("{place}: {e}")))
                                .ok()
                                .flatten();
                            let missing = match l.missing {
                                None => Some(Fallback::Absent),
                                Some(RawFallback::Word(w)) if w == "absent" => Some(Fallback::Absent),
                                Some(RawFallback::Word(w)) if w == "fail" => Some(Fallback::Fail),
                                Some(RawFallback::Word(w)) => {
                                    problems.push(format!(
                                        "{place}: missing = `{w}`: say \"absent\", \"fail\" or {{ default = VALUE }}"
                                    ));
                                    None
                                }
                                Some(RawFallback::Default { default }) => match default {
                                    toml::Value::Float(f) => Some(Fallback::Default(Value::Number(f))),
                                    toml::Value::Integer(i) => Some(Fallback::Default(Value::Integer(i))),
                                    toml::Value::Boolean(b) => Some(Fallback::Default(Value::Flag(b))),
                                    toml::Value::String(s) => Some(Fallback::Default(Value::Label(s))),
                                    other => {
                                        problems.push(format!(
                                            "{place}: a default of {} is not a feature value",
                                            other.type_str()
                                        ));
                                        None
                                    }
                                },
                            };
                            if let (Some(key), Some(missing), Ok(around)) = (key, missing, ring) {
                                features.insert(
                                    feature,
                                    Supply::Lookup(Lookup {
                                        source: l.source,
                                        key,
                                        field: l.field,
                                        max_age,
                                        missing,
                                        around,
                                    }),
                                );
                            }
                        }
                    }
                }
                features
            };
            let features = read(m.features, &format!("models.{model}.features"));
            let mut versions = BTreeMap::new();
            let mut bad_versions = Vec::new();
            for (v, table) in m.versions {
                let at = format!("models.{model}.versions.\"{v}\".features");
                let parsed = read(table.features, &at);
                match Version::parse(&v) {
                    Ok(version) => {
                        versions.insert(version, parsed);
                    }
                    Err(e) => {
                        bad_versions.push(format!("models.{model}.versions: `{v}` is not a semver version ({e})"))
                    }
                }
            }
            problems.extend(bad_versions);
            let mut private = BTreeMap::new();
            for (name, what) in m.private {
                match what.as_str() {
                    "drop" => drop(private.insert(name, Privacy::Drop)),
                    "hash" => drop(private.insert(name, Privacy::Hash)),
                    other => {
                        problems.push(format!("models.{model}.private.{name}: say \"drop\" or \"hash\", not `{other}`"))
                    }
                }
            }
            models.insert(model, ModelPlan { keys: m.keys, features, versions, private });
        }
        if problems.is_empty() { Ok(Plan { sources, models }) } else { Err(fail(problems)) }
    }

    /// The table files the plan reads, as it names them joined to the
    /// `dir` it was parsed with.
    pub fn table_paths(&self) -> Vec<&Path> {
        self.sources
            .values()
            .filter_map(|s| match s {
                Source::Table { path, .. } => Some(path.as_path()),
                _ => None,
            })
            .collect()
    }

    /// Holds a version's contract to the plan: every feature it declares is
    /// in the contract, and every required feature of the contract comes
    /// from somewhere with no fallback to absent. Returns the problems.
    pub fn check(&self, model: &str, version: &Version, contract: &Contract) -> Vec<PlanProblem> {
        let Some(plan) = self.models.get(model) else { return Vec::new() };
        let features = plan.features_of(version);
        let mut problems = Vec::new();
        for name in features.keys() {
            if !contract.features.iter().any(|f| &f.name == name) {
                problems.push(PlanProblem::UnknownFeature {
                    model: model.to_owned(),
                    version: version.clone(),
                    feature: name.clone(),
                });
            }
        }
        for name in plan.private.keys() {
            if !plan.keys.contains(name) && !contract.features.iter().any(|f| &f.name == name) {
                problems.push(PlanProblem::UnknownPrivate {
                    model: model.to_owned(),
                    version: version.clone(),
                    name: name.clone(),
                    keys: plan.keys.clone(),
                });
            }
        }
        for f in contract.features.iter().filter(|f| f.required) {
            match features.get(&f.name) {
                None => problems.push(PlanProblem::Unsourced {
                    model: model.to_owned(),
                    version: version.clone(),
                    feature: f.name.clone(),
                }),
                Some(Supply::Lookup(Lookup { missing: Fallback::Absent, .. })) => {
                    problems.push(PlanProblem::AbsentFallback {
                        model: model.to_owned(),
                        version: version.clone(),
                        feature: f.name.clone(),
                    });
                }
                Some(_) => {}
            }
        }
        problems
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const PLAN: &str = r#"
[sources.sites]
table = "tables/sites.csv"
key = "site"
updated = "updated_at"

[models.charge-minutes]
keys = ["site", "vehicle"]

[models.charge-minutes.features]
charger_kw = "request"
avg_minutes_7d = { source = "sites", key = "{site}", field = "avg_minutes_7d", max_age = "26h" }
usual_target = { source = "sites", key = "ev:{vehicle}", field = "target_soc", missing = { default = 0.8 } }
occupancy = { source = "sites", key = "{site}", field = "occupancy", missing = "fail" }

[models.charge-minutes.versions."2.0.0".features]
charger_kw = "request"
"#;

    #[test]
    fn a_plan_reads_sources_lookups_and_versions() {
        let plan = Plan::parse(PLAN, "features.toml", Path::new("/store")).unwrap();
        assert_eq!(
            plan.sources["sites"],
            Source::Table {
                path: "/store/tables/sites.csv".into(),
                key: "site".into(),
                updated: Some("updated_at".into())
            }
        );
        let m = &plan.models["charge-minutes"];
        let Supply::Lookup(avg) = &m.features["avg_minutes_7d"] else { panic!() };
        assert_eq!((avg.max_age, &avg.missing), (Some(26.0 * 3600.0), &Fallback::Absent));
        let Supply::Lookup(target) = &m.features["usual_target"] else { panic!() };
        assert_eq!(target.missing, Fallback::Default(Value::Number(0.8)));
        let keys: BTreeMap<String, String> =
            [("site".into(), "north-1".into()), ("vehicle".into(), "v9".into())].into();
        let mut buf = String::new();
        assert_eq!(target.key.render(&keys, &mut buf), Ok("ev:v9"));
        assert_eq!(avg.key.render(&keys, &mut buf), Ok("north-1"));
        assert_eq!(m.features_of(&Version::new(2, 0, 0)).len(), 1);
        assert_eq!(m.features_of(&Version::new(1, 0, 0)).len(), 4);
    }

    #[test]
    fn a_postgres_source_and_a_cell_keyed_lookup_read() {
        let text = "[sources.stats]\npostgres = \"postgresql://u@db/f\"\nquery = \"SELECT site, x FROM t WHERE site = ANY($1)\"\nkey = \"site\"\nconnections = 2\n\
            [models.m]\nkeys = [\"lat\", \"lon\"]\n[models.m.features]\n\
            x = { source = \"stats\", key = \"grid:{h3(lat, lon, 7)}\", field = \"x\", around = 2, combine = \"max\" }\n";
        let plan = Plan::parse(text, "features.toml", Path::new(".")).unwrap();
        let Source::Postgres(settings) = &plan.sources["stats"] else { panic!("{:?}", plan.sources) };
        assert_eq!((settings.connections, settings.budget.as_millis(), settings.key.as_str()), (2, 10, "site"));
        let Supply::Lookup(x) = &plan.models["m"].features["x"] else { panic!() };
        assert_eq!(x.around, Some(Around { rings: 2, combine: Aggregate::Max }));
        let keys: BTreeMap<String, String> = [("lat".into(), "48.85".into()), ("lon".into(), "2.35".into())].into();
        let mut ring = Vec::new();
        x.key.render_around(&keys, 2, &mut ring).unwrap();
        assert_eq!(ring.len(), 19, "two rings: 1 + 6 + 12 cells");
        assert!(ring.iter().all(|k| k.starts_with("grid:87") && k.len() == 20), "{ring:?}");
        let bad = |lookup: &str| {
            let text = format!(
                "[sources.t]\ntable = \"t.csv\"\nkey = \"k\"\n[models.m]\nkeys = [\"lat\", \"lon\", \"site\"]\n[models.m.features]\nx = {{ source = \"t\", field = \"x\", {lookup} }}\n"
            );
            Plan::parse(&text, "f.toml", Path::new(".")).unwrap_err().problems
        };
        assert_eq!(
            bad("key = \"{site}\", around = 1, combine = \"mean\""),
            [
                "models.m.features.x: `around` reads the cells around a position: the key needs a cell, as in `{h3(lat, lon, 8)}`"
            ]
        );
        assert_eq!(
            bad("key = \"{h3(lat, lon, 7)}\", around = 1"),
            ["models.m.features.x: `around` needs `combine` (\"mean\", \"max\", \"min\" or \"sum\")"]
        );
        assert_eq!(
            bad("key = \"{h3(lat, lon, 7)}\", around = 9, combine = \"sum\""),
            ["models.m.features.x: around = 9: give 1 to 4 rings"]
        );
        assert_eq!(
            bad("key = \"{h3(lat, lon, 16)}\""),
            ["models.m.features.x: key `{h3(lat, lon, 16)}`: h3(lat, lon, 16): resolution `16` is not 0 to 15"]
        );
        let err = Plan::parse("[sources.p]\npostgres = \"postgresql://h/d\"\n", "f.toml", Path::new(".")).unwrap_err();
        assert_eq!(
            err.problems,
            [
                "sources.p: no `query` (the SELECT that reads every key at once, e.g. `... WHERE site = ANY($1)`)",
                "sources.p: no `key` (the column the query returns each row's key in)"
            ]
        );
    }

    #[test]
    fn every_problem_is_named_at_once() {
        let bad = PLAN
            .replace(
                "source = \"sites\", key = \"{site}\", field = \"avg_minutes_7d\", max_age = \"26h\"",
                "source = \"weather\", key = \"{region}\", field = \"x\", max_age = \"a week\"",
            )
            .replace("missing = \"fail\"", "missing = \"guess\"");
        let err = Plan::parse(&bad, "features.toml", Path::new("/store")).unwrap_err();
        assert_eq!(
            err.problems,
            [
                "models.charge-minutes.features.avg_minutes_7d: source `weather` is not declared under [sources]",
                "models.charge-minutes.features.avg_minutes_7d: key `{region}` uses `{region}`, which is not one of the model's keys (site, vehicle) nor a cell `{h3(LAT, LON, RESOLUTION)}`",
                "models.charge-minutes.features.avg_minutes_7d: max_age `a week` is not a duration like 90s, 15m, 26h or 7d",
                "models.charge-minutes.features.occupancy: missing = `guess`: say \"absent\", \"fail\" or { default = VALUE }",
            ]
        );
        let err = Plan::parse("[sources.x]\ntable = \"t.csv\"\n[models.m]\nkeys = [\"a\"]\nfeatures = { f = { source = \"x\", key = \"fixed\", field = \"f\" } }\n", "f.toml", Path::new(".")).unwrap_err();
        assert_eq!(
            err.to_string(),
            "f.toml: sources.x: no `key` (the column rows are found by); models.m.features.f: key `fixed` uses none of the model's keys: every request would read one row"
        );
        let err = Plan::parse("[sources.live]\nredis = \"redis://127.0.0.1/\"\nbudget_ms = 0\n[sources.both]\nredis = \"redis://h/\"\ntable = \"t.csv\"\n", "f.toml", Path::new(".")).unwrap_err();
        assert_eq!(
            err.problems,
            [
                "sources.both: one of `table`, `redis` or `postgres`, not several",
                "sources.live: budget_ms = 0: give 1 to 60000"
            ]
        );
    }
}
