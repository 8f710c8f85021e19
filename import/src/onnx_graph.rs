//! ONNX models as artifacts: the manifest (our TOML format: the contract,
//! and which graph output feeds which contract output) and the ONNX bytes
//! become the params of the generic ONNX evaluator guest
//! (`models/onnx`, built by `cargo xtask build`), which runs the graph with
//! tract inside the sandbox.
//!
//! This module only checks the manifest's shape and frames the params;
//! the guest parses both when the artifact loads, so a graph it cannot run
//! is refused at `paddock pack` time with tract's reason.

use paddock_guest::GraphManifest;

/// Why an ONNX model could not be framed as params.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum OnnxError {
    /// The manifest does not parse as a [`GraphManifest`]: not TOML, a
    /// field missing, of the wrong kind, or unknown (the parser's message
    /// names the line and the field).
    #[error("the manifest does not parse: {0}")]
    NotToml(toml::de::Error),
    /// A field parses but cannot be served.
    #[error("manifest field `{field}`: {problem}")]
    Field {
        /// The field (`features`, `outputs`…).
        field: String,
        /// What is wrong.
        problem: String,
    },
    /// The ONNX bytes are empty.
    #[error("the ONNX model is empty (0 bytes)")]
    Empty,
}

/// Reads a graph manifest (TOML).
///
/// # Errors
/// [`OnnxError::NotToml`] naming the line and field that does not parse
/// (a missing `name`, an unknown field…); [`OnnxError::Field`] for an empty
/// `features` or `outputs` list.
pub fn read_manifest(toml_text: &str) -> Result<GraphManifest, OnnxError> {
    let manifest: GraphManifest = toml::from_str(toml_text).map_err(OnnxError::NotToml)?;
    for (list, empty) in [("features", manifest.features.is_empty()), ("outputs", manifest.outputs.is_empty())] {
        if empty {
            return Err(OnnxError::Field { field: list.into(), problem: "must not be empty".into() });
        }
    }
    Ok(manifest)
}

/// The evaluator guest's params for an ONNX model: the manifest as JSON and
/// the ONNX bytes, encoded as the guest SDK decodes params (bincode,
/// standard configuration, of `(String, Vec<u8>)`).
///
/// # Errors
/// [`OnnxError::Empty`] for empty ONNX bytes.
pub fn params(manifest: &GraphManifest, onnx: &[u8]) -> Result<Vec<u8>, OnnxError> {
    if onnx.is_empty() {
        return Err(OnnxError::Empty);
    }
    let json = serde_json::to_string(manifest).expect("a manifest serializes");
    Ok(bincode::serde::encode_to_vec((json, onnx), bincode::config::standard()).expect("a string and bytes encode"))
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
name = "m"
version = "1.0.0"
[[features]]
name = "x"
[[outputs]]
name = "y"
"#;

    #[test]
    fn params_are_bincode_of_the_manifest_json_and_the_bytes() {
        let p = params(&read_manifest(GOOD).unwrap(), b"\x08\x07").unwrap();
        let ((json, onnx), used): ((String, Vec<u8>), usize) =
            bincode::serde::decode_from_slice(&p, bincode::config::standard()).unwrap();
        assert_eq!(used, p.len());
        assert_eq!(onnx, b"\x08\x07");
        let back: GraphManifest = serde_json::from_str(&json).unwrap();
        assert_eq!(back, read_manifest(GOOD).unwrap());
        assert_eq!(back.features[0].name, "x");
        assert!(back.features[0].required, "a feature is required unless the manifest says not");
    }

    #[test]
    fn a_bad_manifest_names_the_field() {
        let e = read_manifest("name = \"m\"\n").unwrap_err();
        assert!(e.to_string().contains("missing field `version`"), "{e}");
        let e = read_manifest(&GOOD.replace("name = \"y\"", "unit = \"min\"")).unwrap_err();
        assert!(e.to_string().contains("missing field `name`"), "{e}");
        let e = read_manifest(&GOOD.replace("name = \"y\"", "name = \"y\"\ncolumns = 2")).unwrap_err();
        assert!(e.to_string().contains("unknown field `columns`"), "{e}");
        let e =
            read_manifest("name = \"m\"\nversion = \"1.0.0\"\noutputs = []\n[[features]]\nname = \"x\"\n").unwrap_err();
        assert_eq!(e.to_string(), "manifest field `outputs`: must not be empty");
        assert!(matches!(read_manifest("name = "), Err(OnnxError::NotToml(_))));
        assert!(matches!(params(&read_manifest(GOOD).unwrap(), b""), Err(OnnxError::Empty)));
    }
}
