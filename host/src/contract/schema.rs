//! A validated contract, indexed: every row is checked and encoded into
//! dense cells by [`Schema::encode_row`] before anything enters the
//! sandbox, and every output is checked by [`Schema::check_outputs`] before
//! anything leaves the host.

use serde::Serialize;

use crate::contract::rows::{ContractRule, Row, RowError, Value};
use crate::contract::{Bounds, Contract, ContractError, Domain, validate};

/// Name lookups. Names come from the contract; a request only looks them
/// up, so the hash needs speed rather than resistance to chosen keys.
type HashMap<K, V> = std::collections::HashMap<K, V, foldhash::fast::RandomState>;

/// A validated contract with its name lookups built: what row encoding uses.
#[derive(Clone, Debug)]
pub struct Schema {
    contract: Contract,
    index: HashMap<String, usize>,
    labels: Vec<HashMap<String, usize>>,
    /// Each output's bounds as a closed interval (open sides infinite).
    output_ranges: Vec<(f64, f64)>,
}

impl Schema {
    /// Validates the contract and indexes it.
    ///
    /// # Errors
    /// As [`validate`].
    pub fn new(contract: Contract) -> Result<Self, ContractError> {
        validate(&contract)?;
        let index = contract.features.iter().enumerate().map(|(i, f)| (f.name.clone(), i)).collect();
        let labels = contract
            .features
            .iter()
            .map(|f| match &f.domain {
                Domain::Label(labels) => labels.iter().enumerate().map(|(i, l)| (l.clone(), i)).collect(),
                _ => HashMap::default(),
            })
            .collect();
        let output_ranges = contract
            .outputs
            .iter()
            .map(|o| (o.bounds.min.unwrap_or(f64::NEG_INFINITY), o.bounds.max.unwrap_or(f64::INFINITY)))
            .collect();
        Ok(Schema { contract, index, labels, output_ranges })
    }

    /// The contract.
    pub fn contract(&self) -> &Contract {
        &self.contract
    }

    /// Position of a feature by name.
    pub fn feature_index(&self, name: &str) -> Option<usize> {
        self.index.get(name).copied()
    }

    /// Index of a label within a label feature.
    pub(crate) fn label_index(&self, feature: usize, label: &str) -> Option<usize> {
        self.labels[feature].get(label).copied()
    }

    /// Number of features per row.
    pub fn width(&self) -> usize {
        self.contract.features.len()
    }

    /// Number of outputs per row.
    pub fn outputs(&self) -> usize {
        self.contract.outputs.len()
    }

    /// Each output's bounds as a closed interval.
    pub(crate) fn output_ranges(&self) -> &[(f64, f64)] {
        &self.output_ranges
    }
}

impl Schema {
    /// Checks one row and appends its dense cells (one per feature, in
    /// contract order; absent optional features as NaN) to `cells`. On error
    /// `cells` is left as it was.
    ///
    /// `row_number` is how the caller numbers the row (every surface numbers
    /// rows from 1, in the order given); each error carries it.
    ///
    /// # Errors
    /// Every [`RowError`] of the row, in the row's order, then missing
    /// required features in contract order: a row with five bad cells gets
    /// five errors.
    pub fn encode_row(&self, row_number: usize, row: &Row, cells: &mut Vec<f64>) -> Result<(), Vec<RowError>> {
        let start = cells.len();
        cells.resize(start + self.width(), f64::NAN);
        let mut errors = Vec::new();
        self.fill(row_number, row, &mut cells[start..], &mut errors);
        if errors.is_empty() {
            Ok(())
        } else {
            cells.truncate(start);
            Err(errors)
        }
    }

    fn fill(&self, row_number: usize, row: &Row, dest: &mut [f64], errors: &mut Vec<RowError>) {
        let features = &self.contract().features;
        let mut fail = |feature: &str, value: &Value, rule| {
            errors.push(RowError { row: row_number, feature: feature.to_owned(), value: value.to_string(), rule });
        };
        // Seen-set as a bit mask for the common case, a vector beyond 64.
        let mut seen_small = 0u64;
        let mut seen_big = if features.len() > 64 { vec![false; features.len()] } else { Vec::new() };
        for (k, (name, value)) in row.fields().iter().enumerate() {
            // Rows usually list features in contract order: try the field's
            // own position before a lookup by name.
            let here = features.get(k).is_some_and(|f| f.name == *name);
            let Some(i) = (if here { Some(k) } else { self.feature_index(name) }) else {
                fail(name, value, ContractRule::UnknownFeature);
                continue;
            };
            let repeated = if seen_big.is_empty() {
                let bit = 1u64 << i;
                let r = seen_small & bit != 0;
                seen_small |= bit;
                r
            } else {
                std::mem::replace(&mut seen_big[i], true)
            };
            if repeated {
                fail(name, value, ContractRule::Repeated);
                continue;
            }
            let feature = &features[i];
            let cell = match (value, &feature.domain) {
                (Value::Absent, _) if feature.required => Err(ContractRule::MissingRequired),
                (Value::Absent, _) => Ok(f64::NAN),
                (_, Domain::Real(bounds)) => match value {
                    Value::Number(v) => bounded(*v, bounds),
                    Value::Integer(v) => bounded(*v as f64, bounds),
                    _ => Err(ContractRule::WrongKind { expected: "a number" }),
                },
                (_, Domain::Whole(bounds)) => match value {
                    Value::Integer(v) => bounded(*v as f64, bounds),
                    Value::Number(v) if v.fract() == 0.0 => bounded(*v, bounds),
                    Value::Number(v) if !v.is_finite() => Err(ContractRule::NonFinite),
                    _ => Err(ContractRule::WrongKind { expected: "a whole number" }),
                },
                (Value::Label(label), Domain::Label(allowed)) => match self.label_index(i, label) {
                    Some(k) => Ok(k as f64),
                    None => Err(ContractRule::UnknownLabel { allowed: allowed.clone() }),
                },
                (_, Domain::Label(_)) => Err(ContractRule::WrongKind { expected: "a label" }),
                (Value::Flag(b), Domain::Flag) => Ok(f64::from(u8::from(*b))),
                (_, Domain::Flag) => Err(ContractRule::WrongKind { expected: "true or false" }),
            };
            match cell {
                Ok(v) => dest[i] = v,
                Err(rule) => fail(name, value, rule),
            }
        }
        for (i, feature) in features.iter().enumerate() {
            let seen = if seen_big.is_empty() { seen_small & (1u64 << i) != 0 } else { seen_big[i] };
            if !seen && feature.required {
                fail(&feature.name, &Value::Absent, ContractRule::MissingRequired);
            }
        }
    }

    /// The row whose cells these are, the inverse of
    /// [`Schema::encode_row`]: a number, a whole number, a label by its
    /// index, a flag as 0 or 1; NaN (or a label index the contract does not
    /// have) leaves the feature out. Extra cells are ignored.
    pub fn decode_row(&self, cells: &[f64]) -> Row {
        let mut row = Row::with_capacity(self.width());
        for (feature, &cell) in self.contract().features.iter().zip(cells) {
            if cell.is_nan() {
                continue;
            }
            let value = match &feature.domain {
                Domain::Real(_) => Value::Number(cell),
                Domain::Whole(_) => Value::Integer(cell as i64),
                Domain::Label(labels) => match labels.get(cell as usize) {
                    Some(label) if cell >= 0.0 && cell.fract() == 0.0 => Value::Label(label.clone()),
                    _ => continue,
                },
                Domain::Flag => Value::Flag(cell != 0.0),
            };
            row.set(&feature.name, value);
        }
        row
    }

    /// Reads a feature value from text (a CSV cell) according to the
    /// feature's domain. An empty cell is absent. The value is checked later
    /// by [`Schema::encode_row`]; text that is not of the domain's kind is
    /// kept as a label so that check names it.
    pub fn value_from_text(&self, feature: &str, text: &str) -> Value {
        let text = text.trim();
        if text.is_empty() {
            return Value::Absent;
        }
        let domain = self.feature_index(feature).map(|i| &self.contract().features[i].domain);
        let parsed = match domain {
            Some(Domain::Real(_)) => text.parse::<f64>().ok().map(Value::Number),
            Some(Domain::Whole(_)) => {
                text.parse::<i64>().ok().map(Value::Integer).or_else(|| text.parse::<f64>().ok().map(Value::Number))
            }
            Some(Domain::Flag) => match text.to_ascii_lowercase().as_str() {
                "true" | "yes" | "1" => Some(Value::Flag(true)),
                "false" | "no" | "0" => Some(Value::Flag(false)),
                _ => None,
            },
            Some(Domain::Label(_)) | None => None,
        };
        parsed.unwrap_or_else(|| Value::Label(text.to_owned()))
    }
}

fn bounded(v: f64, bounds: &Bounds) -> Result<f64, ContractRule> {
    if !v.is_finite() {
        return Err(ContractRule::NonFinite);
    }
    if !bounds.contains(v) {
        return Err(ContractRule::OutOfBounds { bounds: bounds.to_string() });
    }
    Ok(v)
}

/// An output that breaks the contract: a model fault, never passed on.
#[derive(Clone, Debug, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "fault", rename_all = "snake_case")]
#[non_exhaustive]
pub enum OutputFault {
    /// The model returned the wrong number of values.
    #[error("the model returned {actual} values; {rows} rows × {outputs} outputs needs {expected}")]
    WrongLength {
        /// Values expected.
        expected: usize,
        /// Values returned.
        actual: usize,
        /// Rows in the call.
        rows: usize,
        /// Outputs per row.
        outputs: usize,
    },
    /// NaN or infinite output.
    #[error("row {row}, output `{output}` = {value}: not a finite number")]
    NonFinite {
        /// Row number, from 1.
        row: usize,
        /// Output name.
        output: String,
        /// The value.
        value: f64,
    },
    /// Output outside the declared bounds.
    #[error("row {row}, output `{output}` = {value}: outside its declared bounds {bounds}")]
    OutOfBounds {
        /// Row number, from 1.
        row: usize,
        /// Output name.
        output: String,
        /// The value.
        value: f64,
        /// The declared bounds.
        bounds: String,
    },
}

impl OutputFault {
    /// The same fault with its row number mapped by `f`.
    #[must_use]
    pub fn renumber(self, f: impl Fn(usize) -> usize) -> Self {
        match self {
            OutputFault::NonFinite { row, output, value } => OutputFault::NonFinite { row: f(row), output, value },
            OutputFault::OutOfBounds { row, output, value, bounds } => {
                OutputFault::OutOfBounds { row: f(row), output, value, bounds }
            }
            other => other,
        }
    }
}

impl Schema {
    /// Checks the model's answer for `rows` rows: its length, and every
    /// value finite and within its output's bounds.
    ///
    /// # Errors
    /// The first fault found, rows numbered from 1:
    /// [`OutputFault::WrongLength`] when there are not `rows × outputs`
    /// values, [`OutputFault::NonFinite`] for NaN or infinity,
    /// [`OutputFault::OutOfBounds`] for a value outside its output's bounds.
    pub fn check_outputs(&self, rows: usize, values: &[f64]) -> Result<(), OutputFault> {
        let outputs = &self.contract().outputs;
        let expected = rows * outputs.len();
        if values.len() != expected {
            return Err(OutputFault::WrongLength { expected, actual: values.len(), rows, outputs: outputs.len() });
        }
        // Fast pass: every value finite and in range (NaN fails both tests).
        let ranges = self.output_ranges();
        // Without short cuts, so the compiler can test several values at once.
        let in_range = |v: f64, (lo, hi): (f64, f64)| (v >= lo) & (v <= hi) & v.is_finite();
        let all_in = match *ranges {
            [only] => values.iter().fold(true, |ok, &v| ok & in_range(v, only)),
            _ => values
                .chunks_exact(ranges.len())
                .fold(true, |ok, row| ok & row.iter().zip(ranges).fold(true, |ok, (&v, &r)| ok & in_range(v, r))),
        };
        if all_in {
            return Ok(());
        }
        for (r, row) in values.chunks_exact(outputs.len()).enumerate() {
            for (&value, out) in row.iter().zip(outputs) {
                if !value.is_finite() {
                    return Err(OutputFault::NonFinite { row: r + 1, output: out.name.clone(), value });
                }
                if !out.bounds.contains(value) {
                    return Err(OutputFault::OutOfBounds {
                        row: r + 1,
                        output: out.name.clone(),
                        value,
                        bounds: out.bounds.to_string(),
                    });
                }
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::contract::{Feature, Output};

    fn schema() -> Schema {
        let f = |name: &str, domain, required| Feature {
            name: name.into(),
            domain,
            unit: None,
            required,
            about: String::new(),
        };
        Schema::new(Contract {
            name: "t".into(),
            version: "1.0.0".into(),
            about: String::new(),
            features: vec![
                f("kw", Domain::Real(Bounds { min: Some(0.0), max: Some(350.0) }), true),
                f("hour", Domain::Whole(Bounds { min: Some(0.0), max: Some(23.0) }), true),
                f("plug", Domain::Label(vec!["type2".into(), "ccs2".into()]), true),
                f("fleet", Domain::Flag, false),
            ],
            outputs: vec![Output {
                name: "p".into(),
                unit: None,
                bounds: Bounds { min: Some(0.0), max: Some(1.0) },
                about: String::new(),
            }],
        })
        .unwrap()
    }

    fn good() -> Row {
        Row::new().with("kw", 11.0).with("hour", 7i64).with("plug", "ccs2")
    }

    #[test]
    fn encodes_in_contract_order_with_labels_flags_and_absent() {
        let mut cells = vec![];
        schema().encode_row(0, &good().with("fleet", true), &mut cells).unwrap();
        schema().encode_row(1, &good(), &mut cells).unwrap();
        assert_eq!(&cells[..4], &[11.0, 7.0, 1.0, 1.0]);
        assert_eq!(&cells[4..7], &[11.0, 7.0, 1.0]);
        assert!(cells[7].is_nan());
    }

    #[test]
    fn decoding_cells_gives_the_row_back() {
        let s = schema();
        for row in [good().with("fleet", true), good()] {
            let mut cells = vec![];
            s.encode_row(1, &row, &mut cells).unwrap();
            assert_eq!(s.decode_row(&cells), row);
        }
    }

    #[test]
    fn each_rule_is_named_with_row_feature_and_value() {
        let s = schema();
        let cases: Vec<(Row, &str)> = vec![
            (good().with("volts", 230.0), "row 4, feature `volts` = 230: unknown feature"),
            (
                Row::new().with("kw", 11.0).with("hour", 7i64),
                "row 4, feature `plug` = absent: required feature is missing",
            ),
            // Only a parsed row can name a feature twice (`Row::with` replaces).
            (
                {
                    let mut row = good();
                    row.insert("kw".into(), Value::Number(1.0));
                    row
                },
                "row 4, feature `kw` = 1: feature given twice",
            ),
            (
                Row::new().with("kw", "fast").with("hour", 7i64).with("plug", "ccs2"),
                "row 4, feature `kw` = \"fast\": wrong kind: expected a number",
            ),
            (
                Row::new().with("kw", 11.0).with("hour", 7.5).with("plug", "ccs2"),
                "row 4, feature `hour` = 7.5: wrong kind: expected a whole number",
            ),
            (
                Row::new().with("kw", 400.0).with("hour", 7i64).with("plug", "ccs2"),
                "row 4, feature `kw` = 400: out of bounds [0, 350]",
            ),
            (
                Row::new().with("kw", f64::INFINITY).with("hour", 7i64).with("plug", "ccs2"),
                "row 4, feature `kw` = inf: not a finite number",
            ),
            (
                Row::new().with("kw", 11.0).with("hour", 7i64).with("plug", "chademo"),
                "row 4, feature `plug` = \"chademo\": unknown label; allowed: type2, ccs2",
            ),
            (good().with("fleet", 1i64), "row 4, feature `fleet` = 1: wrong kind: expected true or false"),
        ];
        for (row, expected) in cases {
            let mut cells = vec![1.0];
            let errs = s.encode_row(4, &row, &mut cells).unwrap_err();
            assert_eq!(errs.len(), 1, "{errs:?}");
            assert_eq!(errs[0].to_string(), expected);
            assert_eq!(cells, vec![1.0], "cells untouched on error");
        }
    }

    #[test]
    fn every_problem_in_a_row_is_reported() {
        // Five bad cells: unknown, wrong kind, out of bounds, unknown label,
        // and a required feature left out.
        let row = Row::new().with("volts", 230.0).with("hour", "seven").with("kw", 400.0).with("plug", "chademo");
        let row = row.with("fleet", 2i64);
        let mut cells = vec![];
        let errs = schema().encode_row(3, &row, &mut cells).unwrap_err();
        let got: Vec<String> = errs.iter().map(ToString::to_string).collect();
        assert_eq!(
            got,
            [
                "row 3, feature `volts` = 230: unknown feature",
                "row 3, feature `hour` = \"seven\": wrong kind: expected a whole number",
                "row 3, feature `kw` = 400: out of bounds [0, 350]",
                "row 3, feature `plug` = \"chademo\": unknown label; allowed: type2, ccs2",
                "row 3, feature `fleet` = 2: wrong kind: expected true or false",
            ]
        );
        assert!(cells.is_empty());
        // A required feature given nowhere is named once, after the cells.
        let errs = schema().encode_row(1, &Row::new().with("kw", -1.0), &mut cells).unwrap_err();
        let got: Vec<String> = errs.iter().map(ToString::to_string).collect();
        assert_eq!(
            got,
            [
                "row 1, feature `kw` = -1: out of bounds [0, 350]",
                "row 1, feature `hour` = absent: required feature is missing",
                "row 1, feature `plug` = absent: required feature is missing",
            ]
        );
    }

    #[test]
    fn text_cells_follow_the_domain() {
        let s = schema();
        assert_eq!(s.value_from_text("kw", " 7.4 "), Value::Number(7.4));
        assert_eq!(s.value_from_text("hour", "7"), Value::Integer(7));
        assert_eq!(s.value_from_text("fleet", "yes"), Value::Flag(true));
        assert_eq!(s.value_from_text("plug", "ccs2"), Value::Label("ccs2".into()));
        assert_eq!(s.value_from_text("kw", ""), Value::Absent);
        assert_eq!(s.value_from_text("kw", "n/a"), Value::Label("n/a".into()));
    }

    #[test]
    fn outputs_are_checked() {
        let s = schema();
        assert!(s.check_outputs(2, &[0.1, 0.9]).is_ok());
        assert_eq!(
            s.check_outputs(2, &[0.1]).unwrap_err().to_string(),
            "the model returned 1 values; 2 rows × 1 outputs needs 2"
        );
        assert_eq!(
            s.check_outputs(1, &[f64::NAN]).unwrap_err().to_string(),
            "row 1, output `p` = NaN: not a finite number"
        );
        assert_eq!(
            s.check_outputs(2, &[0.5, 1.5]).unwrap_err().to_string(),
            "row 2, output `p` = 1.5: outside its declared bounds [0, 1]"
        );
    }
}
