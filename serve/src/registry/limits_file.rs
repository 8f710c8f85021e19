//! The store's limits file (`limits.toml`, beside the routes): limits for
//! every version of a model, or for one version, over what the code gave
//! ([`RegistryOptions::model_options`](super::RegistryOptions::model_options)).
//!
//! ```toml
//! [models.charge-minutes]
//! deadline_ms = 20
//! memory_mib = 32
//!
//! [versions.charge-minutes."2.0.0-rc.1"]
//! deadline_ms = 100
//! ```
//!
//! A version's entry is applied over its model's, which is applied over the
//! code's options. A file that does not parse, names an unknown setting or
//! gives a limit that cannot mean what it says is refused whole, naming
//! each problem, and the limits last taken stay.

use std::collections::BTreeMap;
use std::time::Duration;

use semver::Version;
use serde::Deserialize;

use paddock_host::sandbox::model::ModelOptions;

/// The limits file's name inside a store.
pub const LIMITS_FILE: &str = "limits.toml";

/// The settings one entry may give; each left out keeps the value below it.
#[derive(Clone, Debug, Default, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
struct Entry {
    deadline_ms: Option<u64>,
    start_deadline_ms: Option<u64>,
    fuel: Option<u64>,
    start_fuel: Option<u64>,
    memory_mib: Option<u64>,
    rows_per_call: Option<usize>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct File {
    #[serde(default)]
    models: BTreeMap<String, Entry>,
    #[serde(default)]
    versions: BTreeMap<String, BTreeMap<String, Entry>>,
}

/// A limits file, taken.
#[derive(Clone, Debug, Default, PartialEq)]
pub(crate) struct StoreLimits {
    models: BTreeMap<String, Entry>,
    versions: BTreeMap<(String, Version), Entry>,
}

impl Entry {
    fn apply(&self, options: &mut ModelOptions) {
        let limits = &mut options.limits;
        if let Some(ms) = self.deadline_ms {
            limits.deadline = Duration::from_millis(ms);
        }
        if let Some(ms) = self.start_deadline_ms {
            limits.init_deadline = Duration::from_millis(ms);
        }
        limits.fuel = self.fuel.or(limits.fuel);
        limits.init_fuel = self.start_fuel.or(limits.init_fuel);
        if let Some(mib) = self.memory_mib {
            limits.memory_bytes = mib.saturating_mul(1 << 20);
        }
        if let Some(rows) = self.rows_per_call {
            limits.rows_per_call = rows;
        }
    }
}

impl StoreLimits {
    /// Parses a limits file, checking every entry over `base`.
    ///
    /// # Errors
    /// Every problem, each naming its place (`models.NAME: …`).
    pub(crate) fn parse(text: &str, base: &ModelOptions) -> Result<StoreLimits, Vec<String>> {
        let file: File = toml::from_str(text).map_err(|e| vec![format!("{LIMITS_FILE}: {}", e.message())])?;
        let mut problems = Vec::new();
        let check = |place: String, entry: &Entry, problems: &mut Vec<String>| {
            let mut options = base.clone();
            entry.apply(&mut options);
            if let Err(e) = options.limits.check() {
                problems.push(format!("{LIMITS_FILE}: {place}: {e}"));
            }
        };
        for (model, entry) in &file.models {
            check(format!("models.{model}"), entry, &mut problems);
        }
        let mut versions = BTreeMap::new();
        for (model, entries) in file.versions {
            for (text, entry) in entries {
                let place = format!("versions.{model}.\"{text}\"");
                check(place.clone(), &entry, &mut problems);
                match Version::parse(&text) {
                    Ok(v) => {
                        versions.insert((model.clone(), v), entry);
                    }
                    Err(e) => problems.push(format!("{LIMITS_FILE}: {place}: not a semver version ({e})")),
                }
            }
        }
        if problems.is_empty() { Ok(StoreLimits { models: file.models, versions }) } else { Err(problems) }
    }

    /// `base` (the code's options for this version) with the file's model
    /// entry, then its version entry, applied.
    pub(crate) fn check_text(text: &str) -> Result<(), Vec<String>> {
        Self::parse(text, &ModelOptions::default()).map(|_| ())
    }

    pub(crate) fn resolve(&self, base: &ModelOptions, model: &str, version: &Version) -> ModelOptions {
        let mut options = base.clone();
        if let Some(entry) = self.models.get(model) {
            entry.apply(&mut options);
        }
        if let Some(entry) = self.versions.get(&(model.to_owned(), version.clone())) {
            entry.apply(&mut options);
        }
        options
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_version_entry_goes_over_its_models_and_problems_are_named() {
        let text = "[models.m]\ndeadline_ms = 20\nmemory_mib = 32\n[versions.m.\"2.0.0\"]\ndeadline_ms = 100\n";
        let limits = StoreLimits::parse(text, &ModelOptions::default()).unwrap();
        let one = limits.resolve(&ModelOptions::default(), "m", &Version::new(1, 0, 0));
        assert_eq!((one.limits.deadline, one.limits.memory_bytes), (Duration::from_millis(20), 32 << 20));
        let two = limits.resolve(&ModelOptions::default(), "m", &Version::new(2, 0, 0));
        assert_eq!((two.limits.deadline, two.limits.memory_bytes), (Duration::from_millis(100), 32 << 20));
        let other = limits.resolve(&ModelOptions::default(), "n", &Version::new(1, 0, 0));
        assert_eq!(other, ModelOptions::default());

        let bad = "[models.m]\ndeadline_ms = 0\n[versions.m.\"two\"]\nfuel = 5\n";
        let problems = StoreLimits::parse(bad, &ModelOptions::default()).unwrap_err();
        assert_eq!(problems.len(), 2, "{problems:?}");
        assert!(problems[0].starts_with("limits.toml: models.m: deadline is 0s"), "{problems:?}");
        assert!(problems[1].starts_with("limits.toml: versions.m.\"two\": not a semver version"), "{problems:?}");
        let unknown = StoreLimits::parse("[models.m]\ndeadline = 5\n", &ModelOptions::default()).unwrap_err();
        assert!(unknown[0].contains("unknown field `deadline`"), "{unknown:?}");
    }
}
