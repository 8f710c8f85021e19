//! The features file: where each model's features come from.
//!
//! ```toml
//! [sources.live]                    # a Redis server: each key a hash
//! redis = "redis://127.0.0.1:6379"
//! budget_ms = 5                     # how long a request waits for it (default 10)
//! updated = "updated_at"            # optional: the field saying when the hash was computed
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
            if !keys.iter().any(|k| k == name) {
                return Err(format!(
                    "key `{text}` uses `{{{name}}}`, which is not one of the model's keys ({})",
                    keys.join(", ")
                ));
            }
            parts.push(Part::Key(name.to_owned()));
            rest = &rest[close + 1..];
        }
        if rest.contains('}') {
            return Err(format!("key `{text}`: a `}}` with no `{{`"));
        }
        if !rest.is_empty() {
            parts.push(Part::Text(rest.to_owned()));
        }
        if !parts.iter().any(|p| matches!(p, Part::Key(_))) {
            return Err(format!("key `{text}` uses none of the model's keys: every request would read one row"));
        }
        Ok(Template { text: text.to_owned(), parts })
    }

    /// The template as written (`ev:{vehicle}`).
    pub fn text(&self) -> &str {
        &self.text
    }

    /// The key for a request's keys: the key itself when the template is
    /// just `{key}` (no allocation), else written into `buf`. `None` when
    /// the request lacks a key the template uses (the key's name).
    pub fn render<'a>(&self, keys: &'a BTreeMap<String, String>, buf: &'a mut String) -> Result<&'a str, &str> {
        if let [Part::Key(k)] = &self.parts[..] {
            return keys.get(k).map(String::as_str).ok_or(k.as_str());
        }
        buf.clear();
        for p in &self.parts {
            match p {
                Part::Text(t) => buf.push_str(t),
                Part::Key(k) => buf.push_str(keys.get(k).ok_or(k.as_str())?),
            }
        }
        Ok(buf.as_str())
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
    budget_ms: Option<u64>,
    updated: Option<String>,
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
        for (name, s) in raw.sources {
            match (s.table, s.key, s.redis) {
                (Some(_), _, Some(_)) => problems.push(format!("sources.{name}: `table` or `redis`, not both")),
                (None, _, Some(url)) => match s.budget_ms.unwrap_or(10) {
                    ms @ 1..=60_000 => {
                        sources.insert(
                            name,
                            Source::Redis { url, budget: std::time::Duration::from_millis(ms), updated: s.updated },
                        );
                    }
                    ms => problems.push(format!("sources.{name}: budget_ms = {ms}: give 1 to 60000")),
                },
                (Some(path), Some(key), None) => {
                    sources.insert(name, Source::Table { path: dir.join(path), key, updated: s.updated });
                }
                (None, _, None) => problems
                    .push(format!("sources.{name}: no `table` (the file to read) or `redis` (the server's URL)")),
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
                            if let (Some(key), Some(missing)) = (key, missing) {
                                features.insert(
                                    feature,
                                    Supply::Lookup(Lookup { source: l.source, key, field: l.field, max_age, missing }),
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
            models.insert(model, ModelPlan { keys: m.keys, features, versions });
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
                "models.charge-minutes.features.avg_minutes_7d: key `{region}` uses `{region}`, which is not one of the model's keys (site, vehicle)",
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
            ["sources.both: `table` or `redis`, not both", "sources.live: budget_ms = 0: give 1 to 60000"]
        );
    }
}
