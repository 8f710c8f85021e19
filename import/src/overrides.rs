//! The overrides file (TOML, optional; `paddock pack --overrides`): a model's
//! name, version and description, and for any feature or output the file
//! declares — keyed by its name in the file — a new name, domain, unit,
//! required-ness, bounds or description.
//!
//! Not the ONNX graph manifest ([`paddock_guest::GraphManifest`]), which
//! declares a whole contract; overrides only change what a toolkit's file
//! already declares.
//!
//! ```toml
//! name = "charge-minutes"
//! version = "2.1.0"
//! about = "Minutes a session will last, from plug-in"
//!
//! [features.f0]                # the file's name for the feature
//! name = "arrival_soc"
//! domain = { real = { min = 0.0, max = 100.0 } }
//! unit = "%"
//! required = true
//!
//! [outputs.value]
//! name = "minutes"
//! unit = "min"
//! min = 0.0
//! ```

use std::collections::BTreeMap;

use paddock_guest::{Domain, DomainSpec};
use serde::Deserialize;

use crate::{ImportError, Imported};

/// Changes to the contract an imported model's file declares.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Overrides {
    /// The model's name (default: the file's name without its extension).
    #[serde(default)]
    pub name: Option<String>,
    /// The model's version, semver (default `0.0.0`).
    #[serde(default)]
    pub version: Option<String>,
    /// What the model estimates and for whom.
    #[serde(default)]
    pub about: Option<String>,
    /// Overrides per feature, keyed by the feature's name in the file.
    #[serde(default)]
    pub features: BTreeMap<String, FeatureOverride>,
    /// Overrides per output, keyed by the output's name as imported.
    #[serde(default)]
    pub outputs: BTreeMap<String, OutputOverride>,
}

/// What the overrides may change about a feature.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeatureOverride {
    /// The name callers use.
    #[serde(default)]
    pub name: Option<String>,
    /// The values it takes.
    #[serde(default)]
    pub domain: Option<DomainSpec>,
    /// Unit of measure.
    #[serde(default)]
    pub unit: Option<String>,
    /// Whether a row must carry it (absent optional features reach the
    /// model as missing values).
    #[serde(default)]
    pub required: Option<bool>,
    /// Description.
    #[serde(default)]
    pub about: Option<String>,
}

/// What the overrides may change about an output.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutputOverride {
    /// The name callers see.
    #[serde(default)]
    pub name: Option<String>,
    /// Unit of measure.
    #[serde(default)]
    pub unit: Option<String>,
    /// Inclusive lower bound; a value below it is a fault.
    #[serde(default)]
    pub min: Option<f64>,
    /// Inclusive upper bound; a value above it is a fault.
    #[serde(default)]
    pub max: Option<f64>,
    /// Description.
    #[serde(default)]
    pub about: Option<String>,
}

impl Overrides {
    /// The features renamed: (the file's name, the new name).
    pub fn feature_renames(&self) -> Vec<(&str, &str)> {
        self.features.iter().filter_map(|(k, o)| Some((k.as_str(), o.name.as_deref()?))).collect()
    }

    /// The outputs renamed: (the name as imported, the new name).
    pub fn output_renames(&self) -> Vec<(&str, &str)> {
        self.outputs.iter().filter_map(|(k, o)| Some((k.as_str(), o.name.as_deref()?))).collect()
    }

    /// Parses an overrides file.
    ///
    /// # Errors
    /// [`ImportError::Overrides`] with the TOML parser's message (line, column, field).
    pub fn from_toml(text: &str) -> Result<Overrides, ImportError> {
        toml::from_str(text).map_err(|e| ImportError::Overrides { field: "(file)".into(), problem: e.to_string() })
    }
}

/// Applies the overrides and the defaults of name and version.
pub(crate) fn apply(imported: &mut Imported, overrides: Option<&Overrides>, stem: &str) -> Result<(), ImportError> {
    let empty = Overrides::default();
    let m = overrides.unwrap_or(&empty);
    let contract = &mut imported.contract;
    let origin = &mut imported.origin;
    let from_overrides = "the overrides";
    match &m.name {
        Some(name) => {
            contract.name = name.clone();
            origin.note("name", from_overrides);
        }
        None => {
            contract.name = stem.to_owned();
            origin.note("name", "the file's name (set `name` in the overrides to change it)");
        }
    }
    match &m.version {
        Some(version) => {
            contract.version = version.clone();
            origin.note("version", from_overrides);
        }
        None => {
            contract.version = "0.0.0".into();
            origin.note("version", "not given: 0.0.0 (set `version` in the overrides)");
        }
    }
    if let Some(about) = &m.about {
        contract.about = about.clone();
        origin.note("about", from_overrides);
    }
    let names: Vec<String> = contract.features.iter().map(|f| f.name.clone()).collect();
    for (key, o) in &m.features {
        let Some(f) = contract.features.iter_mut().find(|f| &f.name == key) else {
            return Err(ImportError::Overrides {
                field: format!("features.{key}"),
                problem: format!("the file has no feature `{key}`; it has {}", names.join(", ")),
            });
        };
        let part = format!("feature {key}");
        let mut changed = Vec::new();
        if let Some(domain) = &o.domain {
            f.domain = Domain::from(domain);
            changed.push("domain");
        }
        if let Some(unit) = &o.unit {
            f.unit = Some(unit.clone());
            changed.push("unit");
        }
        if let Some(required) = o.required {
            f.required = required;
            changed.push(if required { "required" } else { "optional" });
        }
        if let Some(about) = &o.about {
            f.about = about.clone();
            changed.push("about");
        }
        if let Some(name) = &o.name {
            f.name = name.clone();
            changed.push("name");
        }
        origin.note(&part, &format!("{} from the overrides", changed.join(", ")));
        if let Some(name) = &o.name
            && let Some(s) = origin.contract.iter_mut().find(|s| s.part == part)
        {
            s.part = format!("feature {name} (`{key}` in the file)");
        }
    }
    // Name, version and description first, then features and outputs.
    origin.contract.sort_by_key(|s| s.part.contains(' '));
    let outputs: Vec<String> = contract.outputs.iter().map(|o| o.name.clone()).collect();
    for (key, o) in &m.outputs {
        let Some(out) = contract.outputs.iter_mut().find(|x| &x.name == key) else {
            return Err(ImportError::Overrides {
                field: format!("outputs.{key}"),
                problem: format!("the model has no output `{key}`; it has {}", outputs.join(", ")),
            });
        };
        let part = format!("output {key}");
        let mut changed = Vec::new();
        if let Some(unit) = &o.unit {
            out.unit = Some(unit.clone());
            changed.push("unit");
        }
        if o.min.is_some() || o.max.is_some() {
            out.bounds.min = o.min.or(out.bounds.min);
            out.bounds.max = o.max.or(out.bounds.max);
            changed.push("bounds");
        }
        if let Some(about) = &o.about {
            out.about = about.clone();
            changed.push("about");
        }
        if let Some(name) = &o.name {
            out.name = name.clone();
            changed.push("name");
        }
        origin.note(&part, &format!("{} from the overrides", changed.join(", ")));
        if let Some(name) = &o.name
            && let Some(s) = origin.contract.iter_mut().find(|s| s.part == part)
        {
            s.part = format!("output {name} (`{key}` as imported)");
        }
    }
    Ok(())
}
