//! The parameter blob: bincode (standard configuration) of a serde type.

use serde::{Serialize, de::DeserializeOwned};

fn config() -> bincode::config::Configuration {
    bincode::config::standard()
}

/// Encodes parameters as the blob an artifact carries.
///
/// # Panics
/// Never for the types in this crate; a custom `Serialize` impl that fails
/// makes it panic with that impl's message.
pub fn encode_params<P: Serialize>(params: &P) -> Vec<u8> {
    bincode::serde::encode_to_vec(params, config()).unwrap_or_else(|err| panic!("parameters do not serialize: {err}"))
}

/// Decodes a parameter blob.
///
/// # Errors
/// Returns a message when the blob is not a complete encoding of `P` (wrong
/// type, truncated, or trailing bytes).
pub fn decode_params<P: DeserializeOwned>(bytes: &[u8]) -> Result<P, String> {
    let (value, used) =
        bincode::serde::decode_from_slice(bytes, config()).map_err(|err| format!("params do not decode: {err}"))?;
    if used != bytes.len() {
        return Err(format!("params do not decode: {} trailing bytes after {used}", bytes.len() - used));
    }
    Ok(value)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unit_params_are_the_empty_blob() {
        assert!(encode_params(&()).is_empty());
        decode_params::<()>(&[]).unwrap();
    }

    #[test]
    fn trailing_bytes_are_refused() {
        let mut blob = encode_params(&(1u32, 2.5f64));
        blob.push(7);
        let err = decode_params::<(u32, f64)>(&blob).unwrap_err();
        assert!(err.contains("1 trailing bytes"), "{err}");
    }
}
