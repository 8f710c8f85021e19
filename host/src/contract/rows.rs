//! Rows as callers send them (feature name → value), and what is wrong
//! with one: the rule of the contract it broke. [`crate::contract::schema`] checks
//! and encodes them.

use std::fmt;

use serde::{Deserialize, Serialize};

/// One feature value in a request row.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum Value {
    /// A whole number.
    Integer(i64),
    /// A real number.
    Number(f64),
    /// A yes/no value.
    Flag(bool),
    /// A label (one of a label feature's allowed texts).
    Label(String),
    /// No value (JSON `null`, an empty CSV cell).
    Absent,
}

impl fmt::Display for Value {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Value::Integer(v) => write!(f, "{v}"),
            Value::Number(v) => write!(f, "{v}"),
            Value::Flag(v) => write!(f, "{v}"),
            Value::Label(v) => write!(f, "{v:?}"),
            Value::Absent => write!(f, "absent"),
        }
    }
}

impl From<f64> for Value {
    fn from(v: f64) -> Self {
        Value::Number(v)
    }
}
impl From<i64> for Value {
    fn from(v: i64) -> Self {
        Value::Integer(v)
    }
}
impl From<bool> for Value {
    fn from(v: bool) -> Self {
        Value::Flag(v)
    }
}
impl From<&str> for Value {
    fn from(v: &str) -> Self {
        Value::Label(v.to_owned())
    }
}
impl From<String> for Value {
    fn from(v: String) -> Self {
        Value::Label(v)
    }
}
impl From<&String> for Value {
    fn from(v: &String) -> Self {
        Value::Label(v.clone())
    }
}
/// Every value of these fits a whole number exactly.
macro_rules! whole_from {
    ($($t:ty),*) => {$(
        impl From<$t> for Value {
            fn from(v: $t) -> Self {
                Value::Integer(i64::from(v))
            }
        }
    )*};
}
whole_from!(i8, i16, i32, u8, u16, u32);
impl From<f32> for Value {
    fn from(v: f32) -> Self {
        Value::Number(f64::from(v))
    }
}
/// `None` is an absent value (the feature's default or a missing-value
/// route, as the contract says).
impl<T: Into<Value>> From<Option<T>> for Value {
    fn from(v: Option<T>) -> Self {
        v.map_or(Value::Absent, Into::into)
    }
}

/// One request row: feature name → value. Features the row leaves out are
/// absent.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Row(Vec<(String, Value)>);

impl Serialize for Row {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut map = s.serialize_map(Some(self.0.len()))?;
        for (k, v) in &self.0 {
            map.serialize_entry(k, v)?;
        }
        map.end()
    }
}

impl<'de> Deserialize<'de> for Row {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        Row::from_json(serde_json::Value::deserialize(d)?).map_err(serde::de::Error::custom)
    }
}

impl Row {
    /// An empty row.
    pub fn new() -> Self {
        Row(Vec::new())
    }

    /// Sets a feature's value (builder style), from the types a program
    /// has: `f64`/`f32` (real), `i64`/`i32`/`u32`/… (whole), `bool` (flag),
    /// `&str`/`String` (label), `Option<_>` (`None` for absent). Naming a
    /// feature the row already has replaces its value.
    pub fn with(mut self, name: &str, value: impl Into<Value>) -> Self {
        self.set(name, value.into());
        self
    }

    /// Adds a feature value.
    pub fn insert(&mut self, name: String, value: Value) {
        self.0.push((name, value));
    }

    /// A row with room for `n` features.
    pub fn with_capacity(n: usize) -> Self {
        Row(Vec::with_capacity(n))
    }

    /// Sets a feature's value: replaces the value it has, or adds it.
    pub fn set(&mut self, name: &str, value: Value) {
        match self.0.iter_mut().find(|(n, _)| n == name) {
            Some((_, v)) => *v = value,
            None => self.0.push((name.to_owned(), value)),
        }
    }

    /// Renames a feature, if the row has it.
    pub fn rename(&mut self, from: &str, to: &str) {
        if let Some((n, _)) = self.0.iter_mut().find(|(n, _)| n == from) {
            *n = to.to_owned();
        }
    }

    /// The values, in insertion order.
    pub fn fields(&self) -> &[(String, Value)] {
        &self.0
    }

    /// Reads a row from a JSON object: numbers, strings (labels), booleans
    /// (flags) and nulls (absent).
    ///
    /// # Errors
    /// [`RowJsonError::NotAnObject`] when the row is not a JSON object;
    /// [`RowJsonError::NotAValue`] naming the key whose value is an array
    /// or object.
    pub fn from_json(value: serde_json::Value) -> Result<Row, RowJsonError> {
        let serde_json::Value::Object(map) = value else {
            return Err(RowJsonError::NotAnObject { kind: json_kind(&value) });
        };
        let mut row = Row(Vec::with_capacity(map.len()));
        for (key, v) in map {
            let value = match v {
                serde_json::Value::Null => Value::Absent,
                serde_json::Value::Bool(b) => Value::Flag(b),
                serde_json::Value::Number(n) => match n.as_i64() {
                    Some(i) => Value::Integer(i),
                    None => Value::Number(n.as_f64().unwrap_or(f64::NAN)),
                },
                serde_json::Value::String(s) => Value::Label(s),
                other => return Err(RowJsonError::NotAValue { kind: json_kind(&other), feature: key }),
            };
            row.0.push((key, value));
        }
        Ok(row)
    }
}

/// Why a JSON value is not a row.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum RowJsonError {
    /// The row is not a JSON object.
    #[error("a row must be a JSON object, not {kind}")]
    NotAnObject {
        /// What it is instead (`an array`, `a number`…).
        kind: &'static str,
    },
    /// A feature's value is an array or an object.
    #[error("feature `{feature}`: {kind} is not a feature value")]
    NotAValue {
        /// The key.
        feature: String,
        /// What its value is (`an array`, `an object`).
        kind: &'static str,
    },
}

fn json_kind(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

impl<K: Into<String>, V: Into<Value>> FromIterator<(K, V)> for Row {
    fn from_iter<I: IntoIterator<Item = (K, V)>>(iter: I) -> Self {
        Row(iter.into_iter().map(|(k, v)| (k.into(), v.into())).collect())
    }
}

/// The rule a row broke.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
#[serde(tag = "rule", rename_all = "snake_case")]
#[non_exhaustive]
pub enum ContractRule {
    /// The contract has no feature of this name.
    UnknownFeature,
    /// The row gives the same feature twice.
    Repeated,
    /// A required feature is absent.
    MissingRequired,
    /// The value is of the wrong kind for the feature's domain.
    WrongKind {
        /// What the domain takes.
        expected: &'static str,
    },
    /// A number outside the feature's bounds.
    OutOfBounds {
        /// The bounds, as text.
        bounds: String,
    },
    /// NaN or infinite.
    NonFinite,
    /// A label the feature does not list.
    UnknownLabel {
        /// The labels it takes.
        allowed: Vec<String>,
    },
    /// The feature's lookup failed (a missing key, or nothing fresh where
    /// the plan says the row must fail).
    Lookup {
        /// What happened, naming the source and key.
        problem: String,
    },
    /// The feature's source could not be read within its budget, where the
    /// plan says the row must fail: a fault of the infrastructure, not of
    /// the row (a stream worker retries such events).
    Unavailable {
        /// What happened, naming the source and key.
        problem: String,
    },
}

impl fmt::Display for ContractRule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ContractRule::UnknownFeature => write!(f, "unknown feature"),
            ContractRule::Repeated => write!(f, "feature given twice"),
            ContractRule::MissingRequired => write!(f, "required feature is missing"),
            ContractRule::WrongKind { expected } => write!(f, "wrong kind: expected {expected}"),
            ContractRule::OutOfBounds { bounds } => write!(f, "out of bounds {bounds}"),
            ContractRule::NonFinite => write!(f, "not a finite number"),
            ContractRule::UnknownLabel { allowed } => write!(f, "unknown label; allowed: {}", allowed.join(", ")),
            ContractRule::Lookup { problem } => write!(f, "lookup failed: {problem}"),
            ContractRule::Unavailable { problem } => write!(f, "source unavailable: {problem}"),
        }
    }
}

impl RowError {
    /// A row whose features could not be gathered.
    pub fn lookup(row: usize, feature: &str, value: &str, problem: String) -> RowError {
        RowError { row, feature: feature.to_owned(), value: value.to_owned(), rule: ContractRule::Lookup { problem } }
    }

    /// A row whose feature's source could not be read.
    pub fn unavailable(row: usize, feature: &str, problem: String) -> RowError {
        RowError {
            row,
            feature: feature.to_owned(),
            value: "absent".to_owned(),
            rule: ContractRule::Unavailable { problem },
        }
    }
}

/// A row that breaks the contract: which row, which feature, what value,
/// which rule.
#[derive(Clone, Debug, PartialEq, Serialize, thiserror::Error)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
#[error("row {row}, feature `{feature}` = {value}: {rule}")]
#[non_exhaustive]
pub struct RowError {
    /// The row's number: from 1, in the order the rows were given (a CSV
    /// file's header is not a row).
    pub row: usize,
    /// The feature name.
    pub feature: String,
    /// The offending value, as text (`absent` when missing).
    pub value: String,
    /// The rule it broke.
    pub rule: ContractRule,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `Row::with` takes the types a program has, and a second value for
    /// one name replaces the first at once (not "feature given twice" later).
    #[test]
    fn with_takes_everyday_types_and_replaces_a_repeated_name() {
        let row = Row::new()
            .with("charger_kw", 11.0f32)
            .with("hour_of_week", 42u32)
            .with("connector", String::from("type2"))
            .with("ambient_c", None::<f64>)
            .with("soc_start", Some(0.25))
            .with("fleet", false)
            .with("charger_kw", 22i32);
        let fields: Vec<(&str, &Value)> = row.fields().iter().map(|(n, v)| (n.as_str(), v)).collect();
        assert_eq!(
            fields,
            [
                ("charger_kw", &Value::Integer(22)),
                ("hour_of_week", &Value::Integer(42)),
                ("connector", &Value::Label("type2".into())),
                ("ambient_c", &Value::Absent),
                ("soc_start", &Value::Number(0.25)),
                ("fleet", &Value::Flag(false)),
            ]
        );
    }
}
