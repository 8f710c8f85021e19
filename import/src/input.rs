//! What a file handed to `paddock pack` is: a toolkit's model file an
//! importer reads, an ONNX graph the evaluator guest runs, or WebAssembly
//! (a component, a core module or its text) packed as it is.
//!
//! This module only tells the kinds apart, from the file's bytes, its
//! name and the format a user named; reading each kind is the importers'
//! and the artifact writer's job.

use crate::{Format, ImportError, looks_like};

/// The kind of a file to pack.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum InputKind {
    /// A model file a toolkit saved, in a format an importer reads.
    Toolkit(Format),
    /// An ONNX graph (a `.onnx` file no importer reads): packed with the
    /// ONNX evaluator guest and a [`crate::onnx_graph`] manifest.
    OnnxGraph,
    /// WebAssembly: binary (`\0asm`) or text.
    WebAssembly,
}

impl InputKind {
    /// Tells what `bytes` (the file `file`) are. `told`, when given (a
    /// user named the kind), overrides what the bytes look like.
    ///
    /// # Errors
    /// [`ImportError::NotAModel`] naming the file and what it looks like
    /// when it is none of the three kinds.
    pub fn identify(bytes: &[u8], file: &str, told: Option<InputKind>) -> Result<InputKind, ImportError> {
        if let Some(told) = told {
            return Ok(told);
        }
        if let Some(format) = Format::recognise(bytes) {
            return Ok(InputKind::Toolkit(format));
        }
        let onnx_name = std::path::Path::new(file).extension().is_some_and(|e| e.eq_ignore_ascii_case("onnx"));
        if onnx_name {
            return Ok(InputKind::OnnxGraph);
        }
        let text = std::str::from_utf8(bytes).map(str::trim_start);
        if bytes.starts_with(b"\0asm") || text.is_ok_and(|t| t.starts_with('(') || t.starts_with(";;")) {
            return Ok(InputKind::WebAssembly);
        }
        Err(ImportError::NotAModel { file: file.to_owned(), looks_like: looks_like(bytes) })
    }

    /// What the kind is, as people say it in a sentence ("an XGBoost JSON
    /// model", "an ONNX graph", "WebAssembly").
    pub fn described(self) -> &'static str {
        match self {
            InputKind::Toolkit(Format::XgboostJson) => "an XGBoost JSON model",
            InputKind::Toolkit(Format::LightgbmText) => "a LightGBM text model",
            InputKind::Toolkit(Format::SklearnOnnx) => "a scikit-learn model in ONNX (skl2onnx)",
            InputKind::Toolkit(Format::Pmml) => "a PMML document",
            InputKind::OnnxGraph => "an ONNX graph",
            InputKind::WebAssembly => "WebAssembly",
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_kind_is_told_apart() {
        let xgb = br#"{"learner": {}, "version": [2, 1, 0]}"#;
        assert_eq!(InputKind::identify(xgb, "m.json", None).unwrap(), InputKind::Toolkit(Format::XgboostJson));
        assert_eq!(
            InputKind::identify(b"tree\nversion=v4\n", "m.txt", None).unwrap(),
            InputKind::Toolkit(Format::LightgbmText)
        );
        assert_eq!(InputKind::identify(b"\x08\x07junk", "mlp.onnx", None).unwrap(), InputKind::OnnxGraph);
        assert_eq!(InputKind::identify(b"\0asm\x01\0\0\0", "m.wasm", None).unwrap(), InputKind::WebAssembly);
        assert_eq!(InputKind::identify(b"  (module)", "m.wat", None).unwrap(), InputKind::WebAssembly);
        assert_eq!(
            InputKind::identify(b"anything", "m.bin", Some(InputKind::Toolkit(Format::Pmml))).unwrap(),
            InputKind::Toolkit(Format::Pmml)
        );
        let graph =
            InputKind::identify(b"\x08\x07TreeEnsembleRegressor", "m.onnx", Some(InputKind::OnnxGraph)).unwrap();
        assert_eq!(graph, InputKind::OnnxGraph, "a user may send a graph the importer would read to the evaluator");
    }

    #[test]
    fn anything_else_is_named_with_what_it_looks_like() {
        let e = InputKind::identify(b"a,b\n1,2\n", "rows.csv", None).unwrap_err();
        assert_eq!(
            e.to_string(),
            "rows.csv: not WebAssembly, nor a model file paddock imports (XGBoost JSON, LightGBM text, ONNX, PMML); \
             it looks like text in no format paddock imports"
        );
    }
}
