//! How the TOML files people write beside a model spell things: a
//! feature's domain (`domain = { real = { min = 0.0 } }`, `{ whole = {} }`,
//! `{ label = ["ac", "dc"] }`, `"flag"`), shared by the importers'
//! overrides and the ONNX graph manifest; and the graph manifest itself
//! ([`GraphManifest`]), one type that `paddock pack` reads and the ONNX
//! evaluator guest decodes, so the two never disagree on a field.

use serde::{Deserialize, Serialize};

use crate::{Bounds, Contract, Domain, Feature, Output};

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

/// The manifest of an ONNX graph: the contract the graph serves, in the
/// manifest's own spelling, and which graph input and outputs it maps to.
/// Unknown fields are refused.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GraphManifest {
    /// Model name.
    pub name: String,
    /// Model version (semver).
    pub version: String,
    /// What the model estimates and for whom.
    #[serde(default)]
    pub about: String,
    /// The graph input the rows go to; default its first input.
    #[serde(default)]
    pub input: Option<String>,
    /// Features, in the column order of the graph input.
    pub features: Vec<GraphFeature>,
    /// Outputs, each one column of one graph output.
    pub outputs: Vec<GraphOutput>,
}

/// A feature in a [`GraphManifest`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GraphFeature {
    /// The name callers use.
    pub name: String,
    /// The values it takes (default: any real number).
    #[serde(default)]
    pub domain: DomainSpec,
    /// Unit of measure.
    #[serde(default)]
    pub unit: Option<String>,
    /// Whether a row must carry it (default: yes).
    #[serde(default = "yes")]
    pub required: bool,
    /// Description.
    #[serde(default)]
    pub about: String,
}

fn yes() -> bool {
    true
}

/// An output in a [`GraphManifest`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GraphOutput {
    /// The name callers see.
    pub name: String,
    /// The graph output it reads; default the first.
    #[serde(default)]
    pub tensor: Option<String>,
    /// The column of that output (its last axis); default 0.
    #[serde(default)]
    pub column: usize,
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
    pub about: String,
}

impl GraphManifest {
    /// The contract the manifest declares.
    pub fn contract(&self) -> Contract {
        let features = self
            .features
            .iter()
            .map(|f| Feature {
                name: f.name.clone(),
                domain: Domain::from(&f.domain),
                unit: f.unit.clone(),
                required: f.required,
                about: f.about.clone(),
            })
            .collect();
        let outputs = self
            .outputs
            .iter()
            .map(|o| Output {
                name: o.name.clone(),
                unit: o.unit.clone(),
                bounds: Bounds { min: o.min, max: o.max },
                about: o.about.clone(),
            })
            .collect();
        Contract {
            name: self.name.clone(),
            version: self.version.clone(),
            features,
            outputs,
            about: self.about.clone(),
        }
    }
}
