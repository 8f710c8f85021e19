//! The routes file: which version of each model answers which request.
//!
//! For each model, in order:
//! 1. rules, tried top to bottom; the first whose conditions all hold picks
//!    the version. A condition is a set of values for a context key
//!    (`region = ["north", "east"]`), or a time window (days of the week
//!    and hours, read in a named time zone);
//! 2. otherwise the model's default version;
//! 3. then a canary, if any, takes over a fixed share of those requests.
//!    Its `cohort` names the context field that decides: the field's value
//!    (a site, say) is hashed, so every request from one site lands on the
//!    same side of the canary, and raising the share only adds sites;
//! 4. a shadow version, if any, is scored on a sample of requests in the
//!    background; its answers are compared, never returned.
//!
//! ```toml
//! zone = "Europe/Oslo"              # time windows are read here unless a rule says otherwise
//!
//! [models.charge-minutes]
//! default = "1.0.0"
//!
//! [[models.charge-minutes.rules]]
//! name = "weekend"
//! version = "1.1.0"
//! days = ["sat", "sun"]             # "mon-fri" style ranges are fine too
//! hours = "00:00-24:00"             # optional; "22:00-06:00" runs past midnight
//!
//! [models.charge-minutes.canary]
//! version = "1.2.0"
//! share = 0.10
//! cohort = "site"                   # requests with one site value stay on one side
//!
//! [models.charge-minutes.shadow]
//! version = "2.0.0-rc.1"
//! sample = 0.25                     # share of requests also sent to the shadow
//! tolerance = 5.0                   # absolute difference counted as "over"
//! ```
//!
//! Parsing checks everything that can be checked without the store (days,
//! hours, zones, shares, semver, duplicate rule names) and reports every
//! problem at once; [`Routes::check_versions`] then checks that every
//! version named is loaded.

use std::collections::BTreeMap;
use std::fmt;
use std::sync::{Arc, Mutex};

use jiff::Timestamp;
use jiff::tz::TimeZone;
use semver::Version;
use serde::{Deserialize, Serialize};
use sha2::{Digest as _, Sha256};

/// A request's context: key → value (`region` → `north`).
pub type RequestContext = BTreeMap<String, String>;

/// The name the default route goes by in `applies_to` lists and reasons.
pub const DEFAULT_ROUTE: &str = "default";

/// A routes file that is refused, with every problem found.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, thiserror::Error)]
#[error("routes refused: {}", .problems.join("; "))]
#[non_exhaustive]
pub struct RoutesError {
    /// Each problem, naming the model, rule and field.
    pub problems: Vec<String>,
}

/// Where time comes from when a request carries no timestamp.
pub trait Clock: Send + Sync + fmt::Debug {
    /// The current instant.
    fn now(&self) -> Timestamp;
}

/// The system clock.
#[derive(Clone, Copy, Debug, Default)]
pub struct SystemClock;

impl Clock for SystemClock {
    fn now(&self) -> Timestamp {
        Timestamp::now()
    }
}

/// A clock that says what it is told: for tests and replays.
#[derive(Debug)]
pub struct ManualClock(Mutex<Timestamp>);

impl ManualClock {
    /// A clock stopped at `at`.
    pub fn new(at: Timestamp) -> Self {
        ManualClock(Mutex::new(at))
    }

    /// Moves the clock to `at`.
    pub fn set(&self, at: Timestamp) {
        *self.0.lock().unwrap_or_else(|e| e.into_inner()) = at;
    }
}

impl Clock for ManualClock {
    fn now(&self) -> Timestamp {
        *self.0.lock().unwrap_or_else(|e| e.into_inner())
    }
}

/// Why a version answered.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(tag = "picked_by", rename_all = "snake_case")]
#[non_exhaustive]
pub enum Reason {
    /// No rule matched: the model's default version.
    Default {
        /// Context keys the rules read that the request's context did not
        /// have (a key spelt `Region` where rules read `region` lands
        /// here); empty when every key was there and no rule matched.
        #[serde(skip_serializing_if = "Vec::is_empty", default)]
        absent_keys: Vec<String>,
    },
    /// The named rule matched.
    RoutingRule {
        /// The rule's name.
        name: String,
    },
    /// The request's cohort fell in the canary's share, so the canary
    /// answered in place of the route that would have.
    Canary {
        /// The context field whose value put the request in the canary.
        cohort: String,
        /// The canary's share of cohort values.
        share: f64,
        /// The route that would have answered without the canary:
        /// `default` or a rule's name.
        instead_of: String,
    },
}

impl Reason {
    /// The name of the route: `default`, the rule's name, or `canary`.
    pub fn route(&self) -> &str {
        match self {
            Reason::Default { .. } => DEFAULT_ROUTE,
            Reason::RoutingRule { name } => name,
            Reason::Canary { .. } => "canary",
        }
    }
}

impl fmt::Display for Reason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Reason::Default { absent_keys } if absent_keys.is_empty() => f.write_str("default"),
            Reason::Default { absent_keys } => {
                let keys: Vec<String> = absent_keys.iter().map(|k| format!("`{k}`")).collect();
                write!(f, "default (the context has no {}, which rules read)", keys.join(", "))
            }
            Reason::RoutingRule { name } => write!(f, "rule {name}"),
            Reason::Canary { cohort, share, instead_of } => {
                let instead =
                    if instead_of == DEFAULT_ROUTE { "default".to_owned() } else { format!("rule {instead_of}") };
                write!(f, "canary: {cohort} in its {}% (else {instead})", share * 100.0)
            }
        }
    }
}

/// Up to this many rule keys, a default answer's reason for each set of
/// absent keys is made once, when the routes are read (2^8 = 256 at most).
const PRECOMPUTED_KEYS: usize = 8;

/// The parsed, checked routes of every model.
#[derive(Clone, Debug)]
pub struct Routes {
    models: BTreeMap<String, ModelRoutes>,
}

/// One model's routes.
#[derive(Clone, Debug)]
pub struct ModelRoutes {
    default: Version,
    rules: Vec<RoutingRule>,
    canary: Option<Canary>,
    shadow: Option<Shadow>,
    /// Reasons, precomputed so routing allocates nothing: index 0 is the
    /// default, `i + 1` rule `i`.
    reasons: Vec<Arc<Reason>>,
    /// The canary's reason for each of the above.
    canary_reasons: Vec<Arc<Reason>>,
    /// Every context key a rule reads, sorted: a default answer names
    /// those the context lacked.
    rule_keys: Vec<String>,
    /// The default's reason for each set of absent rule keys (bit `i` for
    /// `rule_keys[i]`), precomputed so routing allocates nothing; empty when
    /// the rules read more than [`PRECOMPUTED_KEYS`] keys (then the
    /// default's reason is made per answer).
    default_reasons: Vec<Arc<Reason>>,
}

#[derive(Clone, Debug)]
struct RoutingRule {
    name: String,
    version: Version,
    context: Vec<(String, Vec<String>)>,
    window: Option<Window>,
}

#[derive(Clone, Debug)]
struct Window {
    /// Bit `d` set when weekday `d` (Monday = 0) is in.
    days: u8,
    /// Minutes after midnight, `from` inclusive, `to` exclusive; `from > to`
    /// runs past midnight (the days then name the day the window opens).
    from: u16,
    to: u16,
    zone: TimeZone,
}

#[derive(Clone, Debug)]
struct Canary {
    version: Version,
    /// The context field whose value is hashed.
    cohort: String,
    share: f64,
    /// Which routes it may take over (index as in `reasons`); all if empty.
    applies_to: Vec<usize>,
}

/// A version scored in the background for comparison.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Shadow {
    /// The version.
    pub version: Version,
    /// Share of requests sent to it, in (0, 1].
    pub sample: f64,
    /// Absolute difference above which an output counts as "over".
    pub tolerance: f64,
}

/// Where a request goes.
#[derive(Clone, Debug)]
pub struct Route<'a> {
    /// The version that answers.
    pub version: &'a Version,
    /// Why.
    pub reason: Arc<Reason>,
}

impl Routes {
    /// No routes at all: nothing is served.
    pub fn empty() -> Self {
        Routes { models: BTreeMap::new() }
    }

    /// Parses and checks a routes file.
    ///
    /// # Errors
    /// [`RoutesError`] listing every problem: TOML syntax (with line and
    /// column), unknown fields, versions that are not semver, unknown days
    /// or zones, malformed hours, shares or samples outside (0, 1], a rule
    /// with no condition, duplicate rule names, unknown names in
    /// `applies_to`.
    pub fn parse(text: &str) -> Result<Routes, RoutesError> {
        let file: File =
            toml::from_str(text).map_err(|e| RoutesError { problems: vec![e.to_string().trim().to_owned()] })?;
        let mut problems = Vec::new();
        let file_zone = match &file.zone {
            Some(name) => zone(name, "the file", &mut problems),
            None => Some(TimeZone::UTC),
        };
        let mut models = BTreeMap::new();
        for (name, m) in file.models {
            let p = &mut problems;
            let at = |what: &str| format!("model `{name}`: {what}");
            let default = semver_or(&m.default, &at("default"), p);
            let mut rules = Vec::new();
            let mut names: Vec<&str> = vec![DEFAULT_ROUTE];
            for (i, r) in m.rules.iter().enumerate() {
                let here = at(&format!("rule {} (`{}`)", i + 1, r.name));
                if r.name.trim().is_empty() {
                    p.push(format!("{here}: name is empty"));
                }
                if names.contains(&r.name.as_str()) {
                    p.push(format!("{here}: name `{}` is used twice (or is reserved)", r.name));
                }
                names.push(&r.name);
                let version = semver_or(&r.version, &format!("{here}: version"), p);
                let mut context = Vec::new();
                for (key, values) in &r.context {
                    let values = values.clone().into_vec();
                    if values.is_empty() {
                        p.push(format!("{here}: context `{key}` lists no values"));
                    }
                    context.push((key.clone(), values));
                }
                let window = if r.days.is_some() || r.hours.is_some() || r.zone.is_some() {
                    let days = match &r.days {
                        Some(d) => days(&d.clone().into_vec(), &here, p),
                        None => 0x7f,
                    };
                    let (from, to) = match &r.hours {
                        Some(h) => hours(h, &here, p),
                        None => (0, 1440),
                    };
                    let zone = match &r.zone {
                        Some(z) => zone(z, &here, p),
                        None => file_zone.clone(),
                    };
                    zone.map(|zone| Window { days, from, to, zone })
                } else {
                    None
                };
                if r.context.is_empty() && r.days.is_none() && r.hours.is_none() {
                    p.push(format!(
                        "{here}: has no condition (give context values, days or hours); use `default` instead"
                    ));
                }
                if let Some(version) = version {
                    rules.push(RoutingRule { name: r.name.clone(), version, context, window });
                }
            }
            let canary = m.canary.as_ref().and_then(|c| {
                let here = at("canary");
                let version = semver_or(&c.version, &format!("{here}: version"), p);
                share(c.share, &format!("{here}: share"), p);
                if c.cohort.trim().is_empty() {
                    p.push(format!("{here}: cohort is empty (name the context field, such as `site`, that keeps a request on one side)"));
                }
                let mut applies_to = Vec::new();
                for route in &c.applies_to {
                    match names.iter().position(|n| n == route) {
                        Some(i) => applies_to.push(i),
                        None => p.push(format!("{here}: applies_to names `{route}`, which is neither `default` nor a rule")),
                    }
                }
                Some(Canary { version: version?, cohort: c.cohort.clone(), share: c.share, applies_to })
            });
            let shadow = m.shadow.as_ref().and_then(|s| {
                let here = at("shadow");
                let version = semver_or(&s.version, &format!("{here}: version"), p);
                share(s.sample, &format!("{here}: sample"), p);
                if !(s.tolerance >= 0.0 && s.tolerance.is_finite()) {
                    p.push(format!("{here}: tolerance {} is not a finite number ≥ 0", s.tolerance));
                }
                Some(Shadow { version: version?, sample: s.sample, tolerance: s.tolerance })
            });
            let Some(default) = default else { continue };
            let mut reasons = vec![Arc::new(Reason::Default { absent_keys: Vec::new() })];
            reasons.extend(rules.iter().map(|r| Arc::new(Reason::RoutingRule { name: r.name.clone() })));
            let canary_reasons = match &canary {
                Some(c) => reasons
                    .iter()
                    .map(|base| {
                        Arc::new(Reason::Canary {
                            cohort: c.cohort.clone(),
                            share: c.share,
                            instead_of: base.route().to_owned(),
                        })
                    })
                    .collect(),
                None => Vec::new(),
            };
            let mut rule_keys: Vec<String> =
                rules.iter().flat_map(|r| r.context.iter().map(|(k, _)| k.clone())).collect();
            rule_keys.sort();
            rule_keys.dedup();
            let default_reasons = match rule_keys.len() {
                n if n <= PRECOMPUTED_KEYS => (0..1usize << n)
                    .map(|mask| {
                        let absent_keys = rule_keys.iter().enumerate().filter(|(i, _)| mask & (1 << i) != 0);
                        Arc::new(Reason::Default { absent_keys: absent_keys.map(|(_, k)| k.clone()).collect() })
                    })
                    .collect(),
                _ => Vec::new(),
            };
            let routes =
                ModelRoutes { default, rules, canary, shadow, reasons, canary_reasons, rule_keys, default_reasons };
            models.insert(name, routes);
        }
        if problems.is_empty() { Ok(Routes { models }) } else { Err(RoutesError { problems }) }
    }

    /// Checks that every version the routes name is available.
    ///
    /// # Errors
    /// [`RoutesError`] naming each model and version that `available` says
    /// is not there.
    pub fn check_versions(&self, available: impl Fn(&str, &Version) -> bool) -> Result<(), RoutesError> {
        let problems: Vec<String> =
            self.models.iter().flat_map(|(name, m)| m.missing_versions(name, &available)).collect();
        if problems.is_empty() { Ok(()) } else { Err(RoutesError { problems }) }
    }

    /// Judges the routes model by model: the routes of every model whose
    /// versions are all available, and for each other model the problems
    /// (each naming the model, the version and the routes using it).
    pub fn split_by_versions(
        mut self,
        available: impl Fn(&str, &Version) -> bool,
    ) -> (Routes, BTreeMap<String, Vec<String>>) {
        let mut refused = BTreeMap::new();
        self.models.retain(|name, m| {
            let problems = m.missing_versions(name, &available);
            let keep = problems.is_empty();
            if !keep {
                refused.insert(name.clone(), problems);
            }
            keep
        });
        (self, refused)
    }

    /// These routes, with `name` routed as `routes` say.
    pub fn with_model(mut self, name: &str, routes: ModelRoutes) -> Routes {
        self.models.insert(name.to_owned(), routes);
        self
    }

    /// Every (model, version) the routes name, with the routes that use it
    /// (`default`, rule names, `canary`, `shadow`).
    pub fn uses(&self) -> BTreeMap<&str, BTreeMap<&Version, Vec<String>>> {
        self.models.iter().map(|(name, m)| (name.as_str(), m.uses())).collect()
    }

    /// One model's routes.
    pub fn model(&self, name: &str) -> Option<&ModelRoutes> {
        self.models.get(name)
    }

    /// The models with routes.
    pub fn models(&self) -> impl Iterator<Item = &str> {
        self.models.keys().map(String::as_str)
    }
}

impl ModelRoutes {
    /// The versions these routes name, with the routes that use each.
    fn uses(&self) -> BTreeMap<&Version, Vec<String>> {
        let mut uses: BTreeMap<&Version, Vec<String>> = BTreeMap::new();
        uses.entry(&self.default).or_default().push(DEFAULT_ROUTE.to_owned());
        for r in &self.rules {
            uses.entry(&r.version).or_default().push(format!("rule {}", r.name));
        }
        if let Some(c) = &self.canary {
            uses.entry(&c.version).or_default().push("canary".to_owned());
        }
        if let Some(s) = &self.shadow {
            uses.entry(&s.version).or_default().push("shadow".to_owned());
        }
        uses
    }

    /// A problem per version these routes name that `available` says is not there.
    fn missing_versions(&self, model: &str, available: &impl Fn(&str, &Version) -> bool) -> Vec<String> {
        self.uses()
            .into_iter()
            .filter(|(version, _)| !available(model, version))
            .map(|(version, users)| {
                format!("model `{model}`: version {version} (used by {}) is not loaded", users.join(", "))
            })
            .collect()
    }
}

impl ModelRoutes {
    /// Picks the version for a request made at `at` with `context`.
    pub fn route(&self, model: &str, context: &RequestContext, at: Timestamp) -> Route<'_> {
        let picked = self.rules.iter().position(|r| r.matches(context, at));
        let (mut version, base) = match picked {
            Some(i) => (&self.rules[i].version, i + 1),
            None => (&self.default, 0),
        };
        let mut reason = Arc::clone(&self.reasons[base]);
        if base == 0 && !self.default_reasons.is_empty() {
            let mask = self.rule_keys.iter().enumerate().fold(0usize, |mask, (i, k)| match context.contains_key(k) {
                true => mask,
                false => mask | 1 << i,
            });
            reason = Arc::clone(&self.default_reasons[mask]);
        } else if base == 0 && self.rule_keys.iter().any(|k| !context.contains_key(k)) {
            // More rule keys than are precomputed: said at the cost of one allocation.
            let absent_keys = self.rule_keys.iter().filter(|k| !context.contains_key(*k)).cloned().collect();
            reason = Arc::new(Reason::Default { absent_keys });
        }
        if let Some(c) = &self.canary {
            let eligible = c.applies_to.is_empty() || c.applies_to.contains(&base);
            if eligible && context.get(&c.cohort).is_some_and(|v| in_share(model, v, c.share)) {
                version = &c.version;
                reason = Arc::clone(&self.canary_reasons[base]);
            }
        }
        Route { version, reason }
    }

    /// The shadow, if any.
    pub fn shadow(&self) -> Option<&Shadow> {
        self.shadow.as_ref()
    }

    /// The default version.
    pub fn default_version(&self) -> &Version {
        &self.default
    }
}

impl RoutingRule {
    fn matches(&self, context: &RequestContext, at: Timestamp) -> bool {
        self.context.iter().all(|(key, values)| context.get(key).is_some_and(|v| values.contains(v)))
            && self.window.as_ref().is_none_or(|w| w.contains(at))
    }
}

impl Window {
    fn contains(&self, at: Timestamp) -> bool {
        let local = self.zone.to_datetime(at);
        let minute = local.hour() as u16 * 60 + local.minute() as u16;
        let day = local.weekday().to_monday_zero_offset() as u8;
        let on = |d: u8| self.days & (1 << d) != 0;
        if self.from < self.to {
            self.from <= minute && minute < self.to && on(day)
        } else {
            // Past midnight: the evening part belongs to today, the morning
            // part to the window that opened yesterday.
            (minute >= self.from && on(day)) || (minute < self.to && on((day + 6) % 7))
        }
    }
}

/// Whether `value` of the canary's cohort field falls in the canary's share
/// for this model: the first 8 bytes of sha256(model, value) as a fraction of 2^64.
/// Stable across processes and machines; raising the share only adds values.
pub fn in_share(model: &str, value: &str, share: f64) -> bool {
    if share >= 1.0 {
        return true;
    }
    let mut h = Sha256::new();
    h.update(model.as_bytes());
    h.update([0]);
    h.update(value.as_bytes());
    let first: [u8; 8] = h.finalize()[..8].try_into().expect("sha256 has 32 bytes");
    (u64::from_be_bytes(first) as f64) < share * 18_446_744_073_709_551_616.0
}

fn semver_or(text: &str, at: &str, problems: &mut Vec<String>) -> Option<Version> {
    Version::parse(text).map_err(|e| problems.push(format!("{at}: `{text}` is not a semver version ({e})"))).ok()
}

fn share(value: f64, at: &str, problems: &mut Vec<String>) {
    if !(value > 0.0 && value <= 1.0) {
        problems.push(format!("{at}: {value} is not in (0, 1]"));
    }
}

fn zone(name: &str, at: &str, problems: &mut Vec<String>) -> Option<TimeZone> {
    TimeZone::get(name)
        .map_err(|_| {
            problems.push(format!("{at}: unknown time zone `{name}` (use an IANA name such as `Europe/Oslo`)"))
        })
        .ok()
}

const DAY_NAMES: [&str; 7] = ["mon", "tue", "wed", "thu", "fri", "sat", "sun"];
const DAY_FULL_NAMES: [&str; 7] = ["monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday"];

/// Monday = 0; short or full English names, any case.
fn day(name: &str) -> Option<u8> {
    let n = name.trim().to_ascii_lowercase();
    (0..7).find(|&i| n == DAY_NAMES[i] || n == DAY_FULL_NAMES[i]).map(|i| i as u8)
}

fn days(items: &[String], at: &str, problems: &mut Vec<String>) -> u8 {
    let mut mask = 0u8;
    if items.is_empty() {
        problems.push(format!("{at}: days lists no day"));
    }
    for item in items {
        let parsed = match item.split_once('-') {
            Some((a, b)) => day(a).zip(day(b)).map(|(a, b)| {
                // A range may wrap: "fri-mon" is Friday to Monday.
                let mut m = 0u8;
                let mut d = a;
                loop {
                    m |= 1 << d;
                    if d == b {
                        break m;
                    }
                    d = (d + 1) % 7;
                }
            }),
            None => day(item).map(|d| 1 << d),
        };
        match parsed {
            Some(m) => mask |= m,
            None => problems
                .push(format!("{at}: days: `{item}` is not a day or range of days (mon, tue, …, sun; \"mon-fri\")")),
        }
    }
    mask
}

fn hours(text: &str, at: &str, problems: &mut Vec<String>) -> (u16, u16) {
    let clock = |t: &str| -> Option<u16> {
        let (h, m) = t.trim().split_once(':')?;
        let (h, m): (u16, u16) = (h.parse().ok()?, m.parse().ok()?);
        (m < 60 && (h < 24 || (h == 24 && m == 0))).then_some(h * 60 + m)
    };
    match text.split_once('-').and_then(|(a, b)| clock(a).zip(clock(b))) {
        Some((from, to)) if from != to && from < 1440 => (from, to),
        Some(_) => {
            problems.push(format!("{at}: hours `{text}` is empty (start equals end, or starts at 24:00)"));
            (0, 1440)
        }
        None => {
            problems.push(format!("{at}: hours `{text}` is not `HH:MM-HH:MM` (00:00 to 24:00)"));
            (0, 1440)
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct File {
    zone: Option<String>,
    #[serde(default)]
    models: BTreeMap<String, ModelFile>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ModelFile {
    default: String,
    #[serde(default)]
    rules: Vec<RuleFile>,
    canary: Option<CanaryFile>,
    shadow: Option<ShadowFile>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RuleFile {
    name: String,
    version: String,
    #[serde(default)]
    context: BTreeMap<String, OneOrMany>,
    days: Option<OneOrMany>,
    hours: Option<String>,
    zone: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct CanaryFile {
    version: String,
    share: f64,
    cohort: String,
    #[serde(default)]
    applies_to: Vec<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ShadowFile {
    version: String,
    #[serde(default = "one")]
    sample: f64,
    #[serde(default)]
    tolerance: f64,
}

fn one() -> f64 {
    1.0
}

#[derive(Clone, Deserialize)]
#[serde(untagged)]
enum OneOrMany {
    One(String),
    Many(Vec<String>),
}

impl OneOrMany {
    fn into_vec(self) -> Vec<String> {
        match self {
            OneOrMany::One(s) => vec![s],
            OneOrMany::Many(v) => v,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ctx(pairs: &[(&str, &str)]) -> RequestContext {
        pairs.iter().map(|(k, v)| ((*k).to_owned(), (*v).to_owned())).collect()
    }

    fn at(text: &str) -> Timestamp {
        text.parse().unwrap()
    }

    fn pick(routes: &Routes, model: &str, context: &RequestContext, when: &str) -> (String, String) {
        let r = routes.model(model).unwrap().route(model, context, at(when));
        (r.version.to_string(), r.reason.route().to_owned())
    }

    const SUITE: &str = r#"
        zone = "Europe/Oslo"
        [models.m]
        default = "1.0.0"
        [[models.m.rules]]
        name = "north"
        version = "3.0.0"
        context = { region = ["north", "arctic"] }
        [[models.m.rules]]
        name = "weekend"
        version = "2.0.0"
        days = ["sat", "sun"]
    "#;

    // Calendar facts used below (from the Gregorian calendar, checked against
    // this machine's `date`): 2026-12-01 is a Tuesday, so 2026-12-04 is a
    // Friday, 12-05 a Saturday, 12-06 a Sunday, 12-07 a Monday. In December
    // Europe/Oslo is UTC+1 (CET; tz database).

    /// A context key spelt differently from the one rules read (`Region`
    /// for `region`) still takes the default route, and the reason names
    /// the key the context lacked; a context with every key names none.
    #[test]
    fn a_default_answer_names_the_rule_keys_the_context_lacked() {
        let routes = Routes::parse(SUITE).unwrap();
        let m = routes.model("m").unwrap();
        let tuesday = at("2026-12-01T12:00:00Z");
        let misspelt = m.route("m", &ctx(&[("Region", "north")]), tuesday);
        assert_eq!(misspelt.version.to_string(), "1.0.0");
        assert_eq!(*misspelt.reason, Reason::Default { absent_keys: vec!["region".into()] });
        assert_eq!(misspelt.reason.to_string(), "default (the context has no `region`, which rules read)");
        let json = serde_json::to_value(&*misspelt.reason).unwrap();
        assert_eq!(json, serde_json::json!({"picked_by": "default", "absent_keys": ["region"]}));
        let south = m.route("m", &ctx(&[("region", "south")]), tuesday);
        assert_eq!(*south.reason, Reason::Default { absent_keys: Vec::new() });
        assert_eq!(serde_json::to_value(&*south.reason).unwrap(), serde_json::json!({"picked_by": "default"}));

        // Rules reading more keys than are precomputed say the same.
        let mut many = String::from("[models.w]\ndefault = \"1.0.0\"\n");
        for i in 0..=PRECOMPUTED_KEYS {
            many.push_str(&format!(
                "[[models.w.rules]]\nname = \"r{i}\"\nversion = \"2.0.0\"\ncontext = {{ k{i} = \"x\" }}\n"
            ));
        }
        let routes = Routes::parse(&many).unwrap();
        let w = routes.model("w").unwrap();
        let all_but_k0: RequestContext = (1..=PRECOMPUTED_KEYS).map(|i| (format!("k{i}"), "y".to_owned())).collect();
        assert_eq!(*w.route("w", &all_but_k0, tuesday).reason, Reason::Default { absent_keys: vec!["k0".into()] });
        let Reason::Default { absent_keys } = &*w.route("w", &ctx(&[("k3", "y")]), tuesday).reason else { panic!() };
        assert_eq!(absent_keys.len(), PRECOMPUTED_KEYS);
    }

    #[test]
    fn weekend_is_read_in_the_rules_zone_across_the_day_boundary() {
        let routes = Routes::parse(SUITE).unwrap();
        let none = RequestContext::new();
        // Friday 23:30 UTC is Saturday 00:30 in Oslo: weekend.
        assert_eq!(pick(&routes, "m", &none, "2026-12-04T23:30:00Z"), ("2.0.0".into(), "weekend".into()));
        // Friday 22:59 UTC is Friday 23:59 in Oslo: not yet.
        assert_eq!(pick(&routes, "m", &none, "2026-12-04T22:59:00Z"), ("1.0.0".into(), "default".into()));
        // Sunday 22:59 UTC is Sunday 23:59 in Oslo; Sunday 23:00 UTC is Monday 00:00.
        assert_eq!(pick(&routes, "m", &none, "2026-12-06T22:59:00Z").0, "2.0.0");
        assert_eq!(pick(&routes, "m", &none, "2026-12-06T23:00:00Z").0, "1.0.0");
    }

    #[test]
    fn rules_are_tried_in_order_and_context_values_form_a_set() {
        let routes = Routes::parse(SUITE).unwrap();
        let saturday = "2026-12-05T12:00:00Z";
        assert_eq!(pick(&routes, "m", &ctx(&[("region", "arctic")]), saturday), ("3.0.0".into(), "north".into()));
        assert_eq!(pick(&routes, "m", &ctx(&[("region", "south")]), saturday), ("2.0.0".into(), "weekend".into()));
        // A missing key matches nothing.
        assert_eq!(pick(&routes, "m", &ctx(&[("site", "north")]), "2026-12-07T12:00:00Z").0, "1.0.0");
    }

    #[test]
    fn an_overnight_window_belongs_to_the_day_it_opens() {
        let routes = Routes::parse(
            r#"
            [models.m]
            default = "1.0.0"
            [[models.m.rules]]
            name = "friday-night"
            version = "2.0.0"
            days = "fri"
            hours = "22:00-06:00"
            zone = "UTC"
        "#,
        )
        .unwrap();
        let none = RequestContext::new();
        assert_eq!(pick(&routes, "m", &none, "2026-12-04T23:00:00Z").0, "2.0.0"); // Fri 23:00
        assert_eq!(pick(&routes, "m", &none, "2026-12-05T05:59:00Z").0, "2.0.0"); // Sat 05:59
        assert_eq!(pick(&routes, "m", &none, "2026-12-05T06:00:00Z").0, "1.0.0"); // Sat 06:00: closed
        assert_eq!(pick(&routes, "m", &none, "2026-12-04T03:00:00Z").0, "1.0.0"); // Fri 03:00: Thursday's night
        assert_eq!(pick(&routes, "m", &none, "2026-12-05T23:00:00Z").0, "1.0.0"); // Sat 23:00
    }

    #[test]
    fn the_repeated_hour_at_the_end_of_summer_time_is_in_the_window_both_times() {
        // EU summer time ends on the last Sunday of October at 01:00 UTC
        // (Directive 2000/84/EC): on 2026-10-25 Oslo's clocks go 03:00 CEST
        // back to 02:00 CET, so 02:30 local happens at 00:30 and 01:30 UTC.
        let routes = Routes::parse(
            r#"
            zone = "Europe/Oslo"
            [models.m]
            default = "1.0.0"
            [[models.m.rules]]
            name = "night"
            version = "2.0.0"
            hours = "02:00-03:00"
        "#,
        )
        .unwrap();
        let none = RequestContext::new();
        assert_eq!(pick(&routes, "m", &none, "2026-10-25T00:30:00Z").0, "2.0.0");
        assert_eq!(pick(&routes, "m", &none, "2026-10-25T01:30:00Z").0, "2.0.0");
        assert_eq!(pick(&routes, "m", &none, "2026-10-25T02:30:00Z").0, "1.0.0"); // 03:30 CET
        assert_eq!(pick(&routes, "m", &none, "2026-10-24T23:59:00Z").0, "1.0.0"); // 01:59 CEST
    }

    #[test]
    fn a_canary_takes_its_share_of_cohorts_and_each_cohort_stays_on_its_side() {
        let routes = Routes::parse(
            r#"
            [models.m]
            default = "1.0.0"
            [models.m.canary]
            version = "1.1.0"
            share = 0.1
            cohort = "site"
        "#,
        )
        .unwrap();
        let m = routes.model("m").unwrap();
        let now = at("2026-12-01T12:00:00Z");
        let mut in_canary = 0;
        for i in 0..10_000 {
            let c = ctx(&[("site", &format!("site-{i}"))]);
            let first = m.route("m", &c, now).version.clone();
            // The same cohort value always gets the same version.
            for _ in 0..3 {
                assert_eq!(m.route("m", &c, now).version, &first);
            }
            if first.minor == 1 {
                in_canary += 1;
                assert_eq!(m.route("m", &c, now).reason.route(), "canary");
            }
        }
        // Binomial(10 000, 0.1): mean 1000, standard deviation 30; ±4σ.
        assert!((880..=1120).contains(&in_canary), "{in_canary} of 10 000 in a 10 % canary");
        // Requests without the cohort field are never in the canary.
        assert_eq!(m.route("m", &RequestContext::new(), now).version.to_string(), "1.0.0");
    }

    #[test]
    fn raising_a_canary_share_only_adds_cohort_values() {
        for i in 0..2000 {
            let key = format!("k{i}");
            if in_share("m", &key, 0.05) {
                assert!(in_share("m", &key, 0.2), "{key}");
            }
        }
        assert!(in_share("m", "anything", 1.0));
    }

    #[test]
    fn a_canary_can_be_limited_to_some_routes() {
        let routes = Routes::parse(
            r#"
            [models.m]
            default = "1.0.0"
            [[models.m.rules]]
            name = "north"
            version = "3.0.0"
            context = { region = "north" }
            [models.m.canary]
            version = "1.1.0"
            share = 1.0
            cohort = "site"
            applies_to = ["default"]
        "#,
        )
        .unwrap();
        let now = "2026-12-01T12:00:00Z";
        assert_eq!(pick(&routes, "m", &ctx(&[("site", "a")]), now).0, "1.1.0");
        assert_eq!(pick(&routes, "m", &ctx(&[("site", "a"), ("region", "north")]), now).0, "3.0.0");
    }

    #[test]
    fn every_problem_is_reported_naming_model_rule_and_field() {
        let err = Routes::parse(
            r#"
            zone = "Mars/Olympus"
            [models.m]
            default = "one"
            [[models.m.rules]]
            name = "a"
            version = "1.0.0"
            days = ["mon", "funday"]
            hours = "25:00-26:00"
            [[models.m.rules]]
            name = "a"
            version = "1.0.0"
            [models.m.canary]
            version = "1.1.0"
            share = 1.5
            cohort = "site"
            applies_to = ["nope"]
            [models.m.shadow]
            version = "2.0.0"
            sample = 0
            tolerance = -1.0
        "#,
        )
        .unwrap_err();
        let all = err.problems.join("\n");
        for needle in [
            "the file: unknown time zone `Mars/Olympus`",
            "model `m`: default: `one` is not a semver version",
            "rule 1 (`a`): days: `funday` is not a day",
            "rule 1 (`a`): hours `25:00-26:00` is not `HH:MM-HH:MM`",
            "rule 2 (`a`): name `a` is used twice",
            "rule 2 (`a`): has no condition",
            "canary: share: 1.5 is not in (0, 1]",
            "canary: applies_to names `nope`",
            "shadow: sample: 0 is not in (0, 1]",
            "shadow: tolerance -1 is not a finite number ≥ 0",
        ] {
            assert!(all.contains(needle), "missing {needle:?} in:\n{all}");
        }
        assert_eq!(err.problems.len(), 10, "{all}");
    }

    #[test]
    fn syntax_errors_and_unknown_fields_name_the_place() {
        let err = Routes::parse("[models.m]\ndefault = \"1.0.0\"\nversoin = \"2.0.0\"\n").unwrap_err();
        assert!(err.problems[0].contains("versoin") && err.problems[0].contains("line 3"), "{err}");
        let err = Routes::parse("[models.m\n").unwrap_err();
        assert!(err.problems[0].contains("line 1"), "{err}");
    }

    #[test]
    fn versions_that_are_not_loaded_are_named_with_their_users() {
        let routes = Routes::parse(SUITE).unwrap();
        let err = routes.check_versions(|_, v| v.major != 2).unwrap_err();
        assert_eq!(err.problems, vec!["model `m`: version 2.0.0 (used by rule weekend) is not loaded".to_owned()]);
        routes.check_versions(|_, _| true).unwrap();
    }
}
