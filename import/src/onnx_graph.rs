//! ONNX models as artifacts: the manifest (our TOML format: the contract,
//! and which graph output feeds which contract output) and the ONNX bytes
//! become the params of the generic ONNX evaluator guest
//! (`models/onnx`, built by `cargo xtask build`), which runs the graph with
//! tract inside the sandbox.
//!
//! This module only checks the manifest's shape and frames the params;
//! the guest parses both when the artifact loads, so a graph it cannot run
//! is refused at `paddock pack` time with tract's reason.

use serde_json::Value;

/// Why an ONNX model could not be framed as params.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum OnnxError {
    /// The manifest is not TOML.
    #[error("the manifest is not TOML: {0}")]
    NotToml(#[source] toml::de::Error),
    /// A field is missing or of the wrong kind.
    #[error("manifest field `{field}`: {problem}")]
    Field {
        /// The field (`name`, `features`, `outputs[2].column`…).
        field: String,
        /// What is wrong.
        problem: String,
    },
    /// The ONNX bytes are empty.
    #[error("the ONNX model is empty (0 bytes)")]
    Empty,
}

/// The evaluator guest's params for an ONNX model: the manifest as JSON and
/// the ONNX bytes, encoded as the guest SDK decodes params (bincode,
/// standard configuration, of `(String, Vec<u8>)`).
///
/// # Errors
/// [`OnnxError::NotToml`] when the manifest does not parse;
/// [`OnnxError::Field`] naming the first field that is missing or of the
/// wrong kind (`name`, `version`, `features`, `outputs`, each feature's and
/// output's `name`); [`OnnxError::Empty`] for empty ONNX bytes.
pub fn params(manifest_toml: &str, onnx: &[u8]) -> Result<Vec<u8>, OnnxError> {
    let manifest: Value = toml::from_str(manifest_toml).map_err(OnnxError::NotToml)?;
    check(&manifest)?;
    if onnx.is_empty() {
        return Err(OnnxError::Empty);
    }
    let json = serde_json::to_string(&manifest).expect("a JSON value serializes");
    Ok(bincode::serde::encode_to_vec((json, onnx), bincode::config::standard()).expect("a string and bytes encode"))
}

fn check(m: &Value) -> Result<(), OnnxError> {
    let field = |field: &str, problem: &str| OnnxError::Field { field: field.into(), problem: problem.into() };
    for key in ["name", "version"] {
        if !m.get(key).is_some_and(Value::is_string) {
            return Err(field(key, "required, a string"));
        }
    }
    for list in ["features", "outputs"] {
        let items = m.get(list).and_then(Value::as_array).ok_or_else(|| field(list, "required, a list of tables"))?;
        if items.is_empty() {
            return Err(field(list, "must not be empty"));
        }
        for (i, item) in items.iter().enumerate() {
            if !item.get("name").is_some_and(Value::is_string) {
                return Err(field(&format!("{list}[{i}].name"), "required, a string"));
            }
        }
    }
    Ok(())
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
        let p = params(GOOD, b"\x08\x07").unwrap();
        let ((json, onnx), used): ((String, Vec<u8>), usize) =
            bincode::serde::decode_from_slice(&p, bincode::config::standard()).unwrap();
        assert_eq!(used, p.len());
        assert_eq!(onnx, b"\x08\x07");
        let v: Value = serde_json::from_str(&json).unwrap();
        assert_eq!(v["features"][0]["name"], "x");
    }

    #[test]
    fn a_bad_manifest_names_the_field() {
        let e = params("name = \"m\"\n", b"x").unwrap_err();
        assert_eq!(e.to_string(), "manifest field `version`: required, a string");
        let e = params(&GOOD.replace("name = \"y\"", "unit = \"min\""), b"x").unwrap_err();
        assert_eq!(e.to_string(), "manifest field `outputs[0].name`: required, a string");
        assert!(matches!(params("name = ", b"x"), Err(OnnxError::NotToml(_))));
        assert!(matches!(params(GOOD, b""), Err(OnnxError::Empty)));
    }
}
