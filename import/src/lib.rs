//! Importers: the model files training toolkits save, turned into the
//! params of paddock's built-in estimators (trees, linear, scoring
//! programs), with the contract the file declares.
//!
//! What it is: a pure function from a file's bytes (and an optional
//! set of [`Overrides`]) to [`Imported`]: a [`Packaged`] contract and
//! [`TreesParams`] that the generic trees guest evaluates, and an
//! [`Origin`] saying where each part came from. The params reproduce the
//! toolkit's own arithmetic — XGBoost's single precision, LightGBM's double
//! precision and `≤` splits, each one's missing-value rules and links — so
//! the sandboxed artifact gives the toolkit's predictions bit for bit.
//!
//! What it is not: a runtime (the host loads and runs the artifact), nor a
//! converter that guesses: anything it does not reproduce exactly is
//! refused with [`ImportError`], naming the file's tree and node or field
//! and what to do instead.
//!
//! Formats: XGBoost's JSON model ([`Format::XgboostJson`], what
//! `save_model("m.json")` writes), LightGBM's text model
//! ([`Format::LightgbmText`], what `booster.save_model("m.txt")` writes),
//! the ONNX file skl2onnx writes for a scikit-learn tree ensemble or
//! linear model ([`Format::SklearnOnnx`]; float32 leaves and coefficients,
//! so within their rounding), and PMML 4.x documents ([`Format::Pmml`]:
//! regression, tree and mining models, evaluated as written).
//!
//! Beside them, [`onnx_graph`] frames any other ONNX graph, with a manifest
//! giving its contract, as the params of the generic ONNX evaluator guest,
//! which runs the graph itself.

#![deny(missing_docs)]

mod ensemble;
mod flatten;
mod input;
mod lightgbm;
mod onnx;
pub mod onnx_graph;
mod origin;
pub mod overrides;
mod pmml;
mod xgboost;

pub use input::InputKind;
pub use origin::{Origin, Provenance};
pub use overrides::Overrides;
use paddock_guest::{Contract, LinearParams, Packaged, ProgramParams, TreesParams, encode_params};

/// A model file format an importer reads.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum Format {
    /// XGBoost's JSON model (`Booster.save_model("m.json")`), gbtree booster.
    XgboostJson,
    /// LightGBM's text model (`Booster.save_model("m.txt")`).
    LightgbmText,
    /// An ONNX file with a scikit-learn tree ensemble or linear model
    /// (`TreeEnsembleRegressor`/`Classifier`, `LinearRegressor`/`Classifier`), as skl2onnx writes it.
    SklearnOnnx,
    /// A PMML document (DMG, version 4.x): a RegressionModel, TreeModel or
    /// MiningModel of them.
    Pmml,
}

impl Format {
    /// Every format, in the order they are tried.
    pub const ALL: [Format; 4] = [Format::XgboostJson, Format::LightgbmText, Format::SklearnOnnx, Format::Pmml];

    /// The format's name as people say it.
    pub fn name(self) -> &'static str {
        match self {
            Format::XgboostJson => "XGBoost JSON model",
            Format::LightgbmText => "LightGBM text model",
            Format::SklearnOnnx => "scikit-learn model in ONNX (skl2onnx)",
            Format::Pmml => "PMML document",
        }
    }

    /// The short name a command line takes (`xgboost`, `lightgbm`).
    pub fn flag(self) -> &'static str {
        match self {
            Format::XgboostJson => "xgboost",
            Format::LightgbmText => "lightgbm",
            Format::SklearnOnnx => "sklearn-onnx",
            Format::Pmml => "pmml",
        }
    }

    /// The format a file's first bytes show, if it is one an importer reads.
    pub fn recognise(bytes: &[u8]) -> Option<Format> {
        let head = String::from_utf8_lossy(&bytes[..bytes.len().min(4096)]);
        let text = head.trim_start_matches('\u{feff}').trim_start();
        if text.starts_with('{') && text.contains("\"learner\"") {
            Some(Format::XgboostJson)
        } else if text.starts_with("tree\n") || text.starts_with("tree\r\n") {
            Some(Format::LightgbmText)
        } else if (text.starts_with("<?xml") || text.starts_with("<PMML") || text.starts_with("<!--"))
            && text.contains("<PMML")
        {
            Some(Format::Pmml)
        } else if bytes.first() == Some(&0x08)
            && [&b"TreeEnsemble"[..], b"LinearRegressor", b"LinearClassifier"]
                .iter()
                .any(|op| bytes.windows(op.len()).any(|w| w == *op))
        {
            Some(Format::SklearnOnnx)
        } else {
            None
        }
    }
}

/// What a file that no importer reads looks like, for the error message.
pub fn looks_like(bytes: &[u8]) -> &'static str {
    let head = &bytes[..bytes.len().min(4096)];
    let text = String::from_utf8_lossy(head);
    let text = text.trim_start_matches('\u{feff}').trim_start();
    if bytes.is_empty() {
        "an empty file"
    } else if Format::recognise(bytes) == Some(Format::XgboostJson) {
        "an XGBoost JSON model"
    } else if Format::recognise(bytes) == Some(Format::LightgbmText) {
        "a LightGBM text model"
    } else if head.starts_with(b"\0asm") {
        "WebAssembly (pack it as a component, not as a model file)"
    } else if text.starts_with("<?xml") || text.starts_with("<PMML") {
        if text.contains("<PMML") { "a PMML document" } else { "XML, not a model format paddock imports" }
    } else if text.starts_with('{') {
        "JSON, but not an XGBoost model (no `learner` object)"
    } else if head.contains(&0) {
        if head.windows(8).any(|w| w == b"ai.onnx." || w == b"ir_versi") || head.starts_with(b"\x08") {
            "an ONNX graph (pack it as `MODEL.onnx` with a manifest: `InputKind::OnnxGraph`)"
        } else {
            "a binary file (XGBoost's UBJSON or a pickle? save the model as JSON: `save_model(\"m.json\")`)"
        }
    } else {
        "text in no format paddock imports"
    }
}

/// A model file, imported.
#[derive(Clone, Debug, PartialEq)]
pub struct Imported {
    /// The contract the file declares, with the overrides applied.
    pub contract: Contract,
    /// The built-in estimator that reproduces the model, and its params.
    pub estimator: EstimatorParams,
    /// Where the params and each part of the contract came from.
    pub origin: Origin,
}

/// The built-in estimator an imported model runs on.
#[derive(Clone, Debug, PartialEq)]
#[non_exhaustive]
pub enum EstimatorParams {
    /// Tree ensembles (`paddock-model-trees`).
    Trees(TreesParams),
    /// Linear and logistic models (`paddock-model-linear`).
    Linear(LinearParams),
    /// Scoring programs: what a PMML document describes (`paddock-model-program`).
    Program(ProgramParams),
}

impl Imported {
    /// The artifact's params: the contract and the estimator's params, as
    /// the estimator's guest reads them.
    pub fn params(&self) -> Vec<u8> {
        let contract = self.contract.clone();
        match &self.estimator {
            EstimatorParams::Trees(params) => encode_params(&Packaged { contract, params: params.clone() }),
            EstimatorParams::Linear(params) => encode_params(&Packaged { contract, params: params.clone() }),
            EstimatorParams::Program(params) => encode_params(&Packaged { contract, params: params.clone() }),
        }
    }

    /// The name of the guest that evaluates the params (`cargo xtask build`
    /// leaves it as `target/paddock/guests/NAME.wasm`).
    pub fn guest(&self) -> &'static str {
        match &self.estimator {
            EstimatorParams::Trees(_) => "paddock-model-trees",
            EstimatorParams::Linear(_) => "paddock-model-linear",
            EstimatorParams::Program(_) => "paddock-model-program",
        }
    }
}

/// Why a file could not be imported.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ImportError {
    /// The file is not in the format asked for (or in none an importer reads).
    #[error("{file}: not the {expected} asked for; it looks like {looks_like}")]
    WrongFormat {
        /// The file.
        file: String,
        /// The format expected.
        expected: &'static str,
        /// What the file looks like instead.
        looks_like: &'static str,
    },
    /// The file is neither WebAssembly nor a model file an importer reads
    /// (see [`InputKind::identify`]).
    #[error(
        "{file}: not WebAssembly, nor a model file paddock imports (XGBoost JSON, LightGBM text, ONNX, PMML); it looks like {looks_like}"
    )]
    NotAModel {
        /// The file.
        file: String,
        /// What it looks like.
        looks_like: &'static str,
    },
    /// The file is in the format but does not parse.
    #[error("{file}: {place}: {problem}")]
    Malformed {
        /// The file.
        file: String,
        /// Where: a JSON path (`learner.gradient_booster.model.trees[3]`) or a line (`line 12`).
        place: String,
        /// What is wrong.
        problem: String,
    },
    /// The file uses something the importer does not reproduce exactly.
    #[error("{file}: {place}: {what} is not supported; {instead}")]
    Unsupported {
        /// The file.
        file: String,
        /// Where: `tree 3 node 7`, `objective`, `booster`…
        place: String,
        /// What it is.
        what: String,
        /// What to do instead.
        instead: String,
    },
    /// The overrides are wrong.
    #[error("overrides: {field}: {problem}")]
    Overrides {
        /// The field (`features.bmi.domain`, `version`…).
        field: String,
        /// What is wrong.
        problem: String,
    },
}

/// Makes errors that name the file.
pub(crate) struct Blame<'a> {
    file: &'a str,
}

impl Blame<'_> {
    fn malformed(&self, place: &str, problem: impl Into<String>) -> ImportError {
        ImportError::Malformed { file: self.file.to_owned(), place: place.to_owned(), problem: problem.into() }
    }

    fn unsupported(&self, place: &str, what: impl Into<String>, instead: &str) -> ImportError {
        ImportError::Unsupported {
            file: self.file.to_owned(),
            place: place.to_owned(),
            what: what.into(),
            instead: instead.to_owned(),
        }
    }
}

/// Imports a model file.
///
/// `file` names the file in messages and in the [`Origin`]; `format` is
/// the file's format (see [`Format::recognise`]); `overrides` change the
/// name, version, and any feature's or output's name, domain, unit,
/// required-ness or bounds.
///
/// # Errors
/// [`ImportError::WrongFormat`] when the bytes are not that format,
/// [`ImportError::Malformed`] naming the field or line that does not parse,
/// [`ImportError::Unsupported`] naming the tree and node, or the field, the
/// importer does not reproduce, [`ImportError::Overrides`] for overrides that
/// name nothing in the file or do not fit it.
pub fn import(
    bytes: &[u8],
    format: Format,
    file: &str,
    overrides: Option<&Overrides>,
) -> Result<Imported, ImportError> {
    let mut imported = match format {
        Format::XgboostJson => xgboost::import(bytes, file)?,
        Format::LightgbmText => lightgbm::import(bytes, file)?,
        Format::SklearnOnnx => onnx::import(bytes, file)?,
        Format::Pmml => pmml::import(bytes, file)?,
    };
    let stem = std::path::Path::new(file).file_stem().and_then(|s| s.to_str()).unwrap_or("model");
    overrides::apply(&mut imported, overrides, stem)?;
    Ok(imported)
}

#[cfg(test)]
mod tests;
