//! An artifact's identity: the sha256 of its bytes, written `sha256:` and
//! 64 lowercase hex digits. Shared by the artifact, the trust policy (what a
//! vouch covers, what a pin names) and the registry (what is served).

use std::fmt;

use serde::Serialize;
use sha2::{Digest as _, Sha256};

/// The sha256 of an artifact file: its identity.
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Digest(pub [u8; 32]);

/// Why a text is not a digest.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum DigestError {
    /// It does not start with `sha256:`.
    #[error("`{text}` is not a digest: expected `sha256:` and 64 hex digits")]
    NoPrefix {
        /// The text given.
        text: String,
    },
    /// What follows `sha256:` is not 64 hex digits.
    #[error("`{text}` is not a digest: expected 64 hex digits after `sha256:`")]
    NotHex {
        /// The text given.
        text: String,
    },
}

impl Digest {
    /// The digest of some bytes.
    pub fn of(bytes: &[u8]) -> Self {
        Digest(Sha256::digest(bytes).into())
    }

    /// Lowercase hex, without prefix.
    pub fn hex(&self) -> String {
        hex::encode(self.0)
    }

    /// The first 12 hex digits, for tables and logs.
    pub fn short(&self) -> String {
        self.hex()[..12].to_owned()
    }
}

impl fmt::Display for Digest {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "sha256:{}", self.hex())
    }
}

impl fmt::Debug for Digest {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        fmt::Display::fmt(self, f)
    }
}

impl std::str::FromStr for Digest {
    type Err = DigestError;

    /// Parses `sha256:` followed by 64 hex digits.
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        let digits = s.strip_prefix("sha256:").ok_or_else(|| DigestError::NoPrefix { text: s.to_owned() })?;
        let mut out = [0u8; 32];
        hex::decode_to_slice(digits, &mut out).map_err(|_| DigestError::NotHex { text: s.to_owned() })?;
        Ok(Digest(out))
    }
}

impl Serialize for Digest {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

impl<'de> serde::Deserialize<'de> for Digest {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let text = String::deserialize(d)?;
        text.parse().map_err(serde::de::Error::custom)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// FIPS 180-2, appendix B.1: sha256("abc") (from memory, and checked by
    /// the sha2 crate's own tests).
    #[test]
    fn digests_print_and_parse_as_sha256_and_hex() {
        let d = Digest::of(b"abc");
        let text = "sha256:ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
        assert_eq!(d.to_string(), text);
        assert_eq!(text.parse::<Digest>(), Ok(d));
        assert_eq!(d.short(), "ba7816bf8f01");
        assert!(matches!("ba7816bf".parse::<Digest>(), Err(DigestError::NoPrefix { .. })));
        assert!(matches!("sha256:zz".parse::<Digest>(), Err(DigestError::NotHex { .. })));
        assert!(matches!(format!("{text}00").parse::<Digest>(), Err(DigestError::NotHex { .. })));
    }
}
