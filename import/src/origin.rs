//! The record an importer leaves in the artifact: which file and toolkit a
//! model came from, how it is evaluated, and where each part of its
//! contract came from. `paddock inspect` shows it.

use serde::{Deserialize, Serialize};
use serde_json::{Map, Value};

/// Where an imported model came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Origin {
    /// The file's format ("XGBoost JSON model").
    pub format: String,
    /// The file's name as given to the importer.
    pub file: String,
    /// The toolkit and the version the file records ("XGBoost 3.2.0").
    pub toolkit: String,
    /// The task: objective, outputs and link.
    pub task: String,
    /// The arithmetic reproduced (precision, split rule, missing values).
    pub arithmetic: String,
    /// The estimator the model runs on and its size ("300 trees",
    /// "linear: 3 outputs × 30 weights").
    pub estimator: String,
    /// Where each part of the contract came from, in contract order.
    pub contract: Vec<Provenance>,
}

/// Where one part of the contract came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// The part: `name`, `version`, `about`, `feature bmi`, `output value`.
    pub part: String,
    /// Where it came from, in words.
    pub from: String,
}

impl Origin {
    /// The record as the JSON object an artifact's origin section holds.
    pub fn to_map(&self) -> Map<String, Value> {
        match serde_json::to_value(self) {
            Ok(Value::Object(map)) => map,
            _ => unreachable!("a struct of strings serializes to a JSON object"),
        }
    }

    /// Reads the record back from an artifact's origin section.
    ///
    /// # Errors
    /// When the object is not an importer's record (a field is missing or
    /// of the wrong kind).
    pub fn from_map(map: Map<String, Value>) -> Result<Origin, serde_json::Error> {
        serde_json::from_value(Value::Object(map))
    }

    /// Adds to what the record says about a part, or records it.
    pub(crate) fn note(&mut self, part: &str, from: &str) {
        match self.contract.iter_mut().find(|s| s.part == part) {
            Some(s) => {
                s.from.push_str("; ");
                s.from.push_str(from);
            }
            None => self.contract.push(Provenance { part: part.to_owned(), from: from.to_owned() }),
        }
    }
}
