//! The contract types, generated from `wit/estimator.wit`, plus builders.

pub use crate::bindings::{Bounds, Contract, Contributions, Domain, Fault, Feature, MarginLink, Output};

impl Bounds {
    /// No limit on either side.
    pub const OPEN: Bounds = Bounds { min: None, max: None };

    /// Inclusive limits on both sides.
    pub fn between(min: f64, max: f64) -> Self {
        Bounds { min: Some(min), max: Some(max) }
    }

    /// Inclusive lower limit only.
    pub fn at_least(min: f64) -> Self {
        Bounds { min: Some(min), max: None }
    }
}

impl Feature {
    fn with_domain(name: &str, domain: Domain) -> Self {
        Feature { name: name.to_owned(), domain, unit: None, required: true, about: String::new() }
    }

    /// A required real-valued feature within `bounds`.
    pub fn real(name: &str, bounds: Bounds) -> Self {
        Self::with_domain(name, Domain::Real(bounds))
    }

    /// A required whole-number feature within `bounds`.
    pub fn whole(name: &str, bounds: Bounds) -> Self {
        Self::with_domain(name, Domain::Whole(bounds))
    }

    /// A required feature taking one of `labels` (passed as its index).
    pub fn label(name: &str, labels: &[&str]) -> Self {
        Self::with_domain(name, Domain::Label(labels.iter().map(|l| (*l).to_owned()).collect()))
    }

    /// A required yes/no feature (passed as 1.0 or 0.0).
    pub fn flag(name: &str) -> Self {
        Self::with_domain(name, Domain::Flag)
    }

    /// Sets the unit of measure.
    pub fn unit(mut self, unit: &str) -> Self {
        self.unit = Some(unit.to_owned());
        self
    }

    /// Makes the feature optional: when absent it reaches the model as NaN.
    pub fn optional(mut self) -> Self {
        self.required = false;
        self
    }

    /// Sets the description.
    pub fn about(mut self, about: &str) -> Self {
        self.about = about.to_owned();
        self
    }
}

impl Output {
    /// An output with the given bounds; values outside them are faults.
    pub fn new(name: &str, bounds: Bounds) -> Self {
        Output { name: name.to_owned(), unit: None, bounds, about: String::new() }
    }

    /// Sets the unit of measure.
    pub fn unit(mut self, unit: &str) -> Self {
        self.unit = Some(unit.to_owned());
        self
    }

    /// Sets the description.
    pub fn about(mut self, about: &str) -> Self {
        self.about = about.to_owned();
        self
    }
}
