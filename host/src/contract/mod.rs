//! The model's contract as the host sees it: generated from the WIT file and
//! validated once when a model loads. [`crate::contract::schema`] indexes it for row
//! encoding.

pub mod row_file;
pub mod rows;
pub mod schema;

use std::fmt;

use serde::Serialize;

pub use crate::bindings::{Bounds, Contract, Domain, Fault, Feature, Output};

/// One thing wrong with a contract a model declared.
#[derive(Clone, Debug, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "problem", rename_all = "snake_case")]
#[non_exhaustive]
pub enum ContractProblem {
    /// The model name is empty.
    #[error("the model name is empty")]
    EmptyName,
    /// The version is not semver.
    #[error("version `{version}` is not semver (MAJOR.MINOR.PATCH): {reason}")]
    BadVersion {
        /// The declared version.
        version: String,
        /// What the parser said.
        reason: String,
    },
    /// The contract declares no output.
    #[error("the contract declares no outputs")]
    NoOutputs,
    /// A feature or output name is empty.
    #[error("{kind} {index} has an empty name")]
    EmptyItemName {
        /// `feature` or `output`.
        kind: &'static str,
        /// Its position.
        index: usize,
    },
    /// Two features, or two outputs, share a name.
    #[error("{kind} name `{name}` is used more than once")]
    Duplicate {
        /// `feature` or `output`.
        kind: &'static str,
        /// The repeated name.
        name: String,
    },
    /// Bounds with min > max, or a NaN bound.
    #[error("{kind} `{name}` has bounds that no value can meet: min {}, max {}", opt(*.min), opt(*.max))]
    BadBounds {
        /// `feature` or `output`.
        kind: &'static str,
        /// Its name.
        name: String,
        /// Declared minimum.
        min: Option<f64>,
        /// Declared maximum.
        max: Option<f64>,
    },
    /// A label feature with no labels, or a repeated label.
    #[error("feature `{name}` has a bad label list: {reason}")]
    BadLabels {
        /// Feature name.
        name: String,
        /// What is wrong.
        reason: String,
    },
}

fn opt(v: Option<f64>) -> String {
    v.map_or_else(|| "none".to_owned(), |v| v.to_string())
}

/// Every problem found in a contract.
#[derive(Clone, Debug, PartialEq, Serialize, thiserror::Error)]
#[non_exhaustive]
pub struct ContractError {
    /// The problems, in the order they were found.
    pub problems: Vec<ContractProblem>,
}

impl fmt::Display for ContractError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "the model's contract is invalid: ")?;
        for (i, p) in self.problems.iter().enumerate() {
            if i > 0 {
                write!(f, "; ")?;
            }
            write!(f, "{p}")?;
        }
        Ok(())
    }
}

/// Checks a contract on its own terms: a non-empty name, a semver version,
/// unique non-empty feature and output names, at least one output, bounds
/// some value can meet, non-empty unique label lists.
///
/// # Errors
/// [`ContractError`] listing every problem found.
pub fn validate(contract: &Contract) -> Result<(), ContractError> {
    let mut problems = Vec::new();
    if contract.name.trim().is_empty() {
        problems.push(ContractProblem::EmptyName);
    }
    if let Err(e) = semver::Version::parse(&contract.version) {
        problems.push(ContractProblem::BadVersion { version: contract.version.clone(), reason: e.to_string() });
    }
    if contract.outputs.is_empty() {
        problems.push(ContractProblem::NoOutputs);
    }
    let features = contract.features.iter().map(|f| (f.name.as_str(), bounds_of(&f.domain)));
    let outputs = contract.outputs.iter().map(|o| (o.name.as_str(), Some(&o.bounds)));
    check_items("feature", features, &mut problems);
    check_items("output", outputs, &mut problems);
    for f in &contract.features {
        if let Domain::Label(labels) = &f.domain {
            let reason = if labels.is_empty() {
                Some("no labels".to_owned())
            } else {
                first_repeat(labels.iter().map(String::as_str)).map(|l| format!("label `{l}` appears twice"))
            };
            if let Some(reason) = reason {
                problems.push(ContractProblem::BadLabels { name: f.name.clone(), reason });
            }
        }
    }
    if problems.is_empty() { Ok(()) } else { Err(ContractError { problems }) }
}

fn bounds_of(domain: &Domain) -> Option<&Bounds> {
    match domain {
        Domain::Real(b) | Domain::Whole(b) => Some(b),
        Domain::Label(_) | Domain::Flag => None,
    }
}

fn check_items<'a>(
    kind: &'static str,
    items: impl Iterator<Item = (&'a str, Option<&'a Bounds>)> + Clone,
    problems: &mut Vec<ContractProblem>,
) {
    for (index, (name, bounds)) in items.clone().enumerate() {
        if name.trim().is_empty() {
            problems.push(ContractProblem::EmptyItemName { kind, index });
        }
        if let Some(b) = bounds {
            let nan = b.min.is_some_and(f64::is_nan) || b.max.is_some_and(f64::is_nan);
            let crossed = matches!((b.min, b.max), (Some(lo), Some(hi)) if lo > hi);
            if nan || crossed {
                problems.push(ContractProblem::BadBounds { kind, name: name.to_owned(), min: b.min, max: b.max });
            }
        }
    }
    if let Some(name) = first_repeat(items.map(|(n, _)| n)) {
        problems.push(ContractProblem::Duplicate { kind, name: name.to_owned() });
    }
}

fn first_repeat<'a>(names: impl Iterator<Item = &'a str>) -> Option<&'a str> {
    let mut seen = std::collections::HashSet::new();
    names.into_iter().find(|n| !seen.insert(*n))
}

impl Bounds {
    /// Whether `v` lies within the bounds (inclusive).
    pub fn contains(&self, v: f64) -> bool {
        self.min.is_none_or(|lo| v >= lo) && self.max.is_none_or(|hi| v <= hi)
    }
}

impl fmt::Display for Bounds {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match (self.min, self.max) {
            (None, None) => write!(f, "any"),
            (Some(lo), None) => write!(f, "≥ {lo}"),
            (None, Some(hi)) => write!(f, "≤ {hi}"),
            (Some(lo), Some(hi)) => write!(f, "[{lo}, {hi}]"),
        }
    }
}

impl fmt::Display for Domain {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Domain::Real(b) => write!(f, "real {b}"),
            Domain::Whole(b) => write!(f, "whole {b}"),
            Domain::Label(labels) => write!(f, "label {{{}}}", labels.join(", ")),
            Domain::Flag => write!(f, "flag"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn feature(name: &str, domain: Domain) -> Feature {
        Feature { name: name.into(), domain, unit: None, required: true, about: String::new() }
    }

    #[test]
    fn every_problem_is_reported() {
        let contract = Contract {
            name: "m".into(),
            version: "one".into(),
            features: vec![
                feature("a", Domain::Real(Bounds { min: Some(2.0), max: Some(1.0) })),
                feature("a", Domain::Label(vec![])),
            ],
            outputs: vec![],
            about: String::new(),
        };
        let err = validate(&contract).unwrap_err();
        let text = err.to_string();
        assert!(text.contains("version `one` is not semver"), "{text}");
        assert!(text.contains("no outputs"), "{text}");
        assert!(text.contains("feature `a` has bounds that no value can meet: min 2, max 1"), "{text}");
        assert!(text.contains("feature name `a` is used more than once"), "{text}");
        assert!(text.contains("feature `a` has a bad label list: no labels"), "{text}");
        assert_eq!(err.problems.len(), 5);
    }

    #[test]
    fn bounds_are_inclusive() {
        let b = Bounds { min: Some(0.0), max: Some(1.0) };
        assert!(b.contains(0.0) && b.contains(1.0) && !b.contains(1.0000001) && !b.contains(f64::NAN));
    }
}
