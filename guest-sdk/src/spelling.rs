//! How manifests (TOML files people write beside a model) spell a feature's
//! domain: `domain = { real = { min = 0.0 } }`, `{ whole = {} }`,
//! `{ label = ["ac", "dc"] }`, `"flag"`. Shared by the ONNX evaluator's
//! manifest and the importers' overrides so both read the same way.

use serde::{Deserialize, Serialize};

use crate::{Bounds, Domain};

/// A feature's domain as a manifest writes it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum DomainSpec {
    /// A real number, optionally bounded.
    Real {
        /// Inclusive lower bound.
        #[serde(default)]
        min: Option<f64>,
        /// Inclusive upper bound.
        #[serde(default)]
        max: Option<f64>,
    },
    /// A whole number, optionally bounded.
    Whole {
        /// Inclusive lower bound.
        #[serde(default)]
        min: Option<f64>,
        /// Inclusive upper bound.
        #[serde(default)]
        max: Option<f64>,
    },
    /// One of these labels, passed to the model as its index.
    Label(Vec<String>),
    /// Yes/no, passed as 1 or 0.
    Flag,
}

impl Default for DomainSpec {
    /// An unbounded real number.
    fn default() -> Self {
        DomainSpec::Real { min: None, max: None }
    }
}

impl From<&DomainSpec> for Domain {
    fn from(spec: &DomainSpec) -> Domain {
        match spec {
            DomainSpec::Real { min, max } => Domain::Real(Bounds { min: *min, max: *max }),
            DomainSpec::Whole { min, max } => Domain::Whole(Bounds { min: *min, max: *max }),
            DomainSpec::Label(l) => Domain::Label(l.clone()),
            DomainSpec::Flag => Domain::Flag,
        }
    }
}
