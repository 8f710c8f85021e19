//! Who vouches for an artifact: ed25519 keys, detached signatures over the
//! artifact's sha256, and the policy a host applies before it loads anything.
//!
//! Files (all text, one value each, so a reviewer can read them):
//! - public key `NAME.pub`: `paddock-ed25519-public <64 hex digits>`
//! - secret key `NAME.key`: `paddock-ed25519-secret <64 hex digits>` (keep it private)
//! - signature `ARTIFACT.sig`: JSON `{ "key_id", "digest", "signature" }`
//!
//! A key's id is the first 16 hex digits of the sha256 of its 32 public key
//! bytes. What is signed is the text `paddock-artifact-v1 ` followed by the
//! digest (`sha256:…`), so a signature can never be replayed as a signature
//! over anything else.

use std::path::{Path, PathBuf};

use ed25519_dalek::{Signer, SigningKey, Verifier, VerifyingKey};
use serde::{Deserialize, Serialize};

use crate::artifact::Digest;

const PUBLIC_TAG: &str = "paddock-ed25519-public";
const SECRET_TAG: &str = "paddock-ed25519-secret";
const CONTEXT: &str = "paddock-artifact-v1 ";

/// Why a key, a signature or a policy check failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum TrustError {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// A key or signature file is not in the expected form.
    #[error("{path}: {reason}")]
    BadFile {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// The policy requires a signature and there is none.
    #[error("the artifact {digest} is not signed, and the policy requires a signature from a trusted key")]
    Unsigned {
        /// The artifact's digest.
        digest: Digest,
    },
    /// The signature names a key that is not trusted.
    #[error("the artifact is signed by key {key_id}, which is not among the trusted keys")]
    UnknownSigner {
        /// The signer's key id.
        key_id: String,
    },
    /// The signature is for another artifact.
    #[error("the signature is for {expected}, but the artifact is {actual}")]
    DigestMismatch {
        /// The digest the signature covers.
        expected: String,
        /// The artifact's digest.
        actual: Digest,
    },
    /// The signature does not verify under the named key.
    #[error("the signature by key {key_id} does not verify: the artifact or signature was altered")]
    BadSignature {
        /// The signer's key id.
        key_id: String,
    },
    /// The artifact's digest is not one of the pinned digests.
    #[error("the artifact is {actual}, which is not pinned (pinned: {})", pinned.iter().map(ToString::to_string).collect::<Vec<_>>().join(", "))]
    NotPinned {
        /// The artifact's digest.
        actual: Digest,
        /// The pinned digests.
        pinned: Vec<Digest>,
    },
}

/// A public key that may vouch for artifacts.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct PublicKey {
    key: VerifyingKey,
}

impl PublicKey {
    /// The key id: the first 16 hex digits of the sha256 of the key bytes.
    pub fn id(&self) -> String {
        Digest::of(self.key.as_bytes()).hex()[..16].to_owned()
    }

    /// The key as it is written to a `.pub` file.
    pub fn to_text(&self) -> String {
        format!("{PUBLIC_TAG} {}\n", hex(self.key.as_bytes()))
    }

    /// Reads a `.pub` file.
    ///
    /// # Errors
    /// [`TrustError::Io`] or [`TrustError::BadFile`].
    pub fn read(path: &Path) -> Result<Self, TrustError> {
        let bytes = read_tagged(path, PUBLIC_TAG)?;
        let key = VerifyingKey::from_bytes(&bytes)
            .map_err(|e| TrustError::BadFile { path: path.to_owned(), reason: format!("not an ed25519 public key: {e}") })?;
        Ok(PublicKey { key })
    }
}

/// A secret key that signs artifacts.
pub struct SecretKey {
    key: SigningKey,
}

impl SecretKey {
    /// A new random key from the operating system's generator.
    ///
    /// # Errors
    /// [`TrustError::Io`] when the system has no randomness to give.
    pub fn generate() -> Result<Self, TrustError> {
        let mut seed = [0u8; 32];
        getrandom::fill(&mut seed)
            .map_err(|e| TrustError::Io { path: "(system random source)".into(), source: std::io::Error::other(e.to_string()) })?;
        Ok(SecretKey { key: SigningKey::from_bytes(&seed) })
    }

    /// The matching public key.
    pub fn public(&self) -> PublicKey {
        PublicKey { key: self.key.verifying_key() }
    }

    /// The key as it is written to a `.key` file.
    pub fn to_text(&self) -> String {
        format!("{SECRET_TAG} {}\n", hex(self.key.as_bytes()))
    }

    /// Reads a `.key` file.
    ///
    /// # Errors
    /// [`TrustError::Io`] or [`TrustError::BadFile`].
    pub fn read(path: &Path) -> Result<Self, TrustError> {
        Ok(SecretKey { key: SigningKey::from_bytes(&read_tagged(path, SECRET_TAG)?) })
    }

    /// Signs an artifact's digest.
    pub fn sign(&self, digest: Digest) -> Signature {
        let sig = self.key.sign(message(digest).as_bytes());
        Signature { key_id: self.public().id(), digest: digest.to_string(), signature: hex(&sig.to_bytes()) }
    }
}

/// A detached signature over an artifact's digest.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Signature {
    /// Id of the key that signed.
    pub key_id: String,
    /// The digest signed (`sha256:…`).
    pub digest: String,
    /// The ed25519 signature, hex.
    pub signature: String,
}

impl Signature {
    /// Reads a `.sig` file.
    ///
    /// # Errors
    /// [`TrustError::Io`] or [`TrustError::BadFile`].
    pub fn read(path: &Path) -> Result<Self, TrustError> {
        let text = std::fs::read(path).map_err(|source| TrustError::Io { path: path.to_owned(), source })?;
        serde_json::from_slice(&text).map_err(|e| TrustError::BadFile { path: path.to_owned(), reason: format!("not a signature: {e}") })
    }

    /// The signature as JSON text.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_default() + "\n"
    }

    /// Where the signature of an artifact lives: the artifact path plus `.sig`.
    pub fn path_for(artifact: &Path) -> PathBuf {
        let mut p = artifact.as_os_str().to_owned();
        p.push(".sig");
        PathBuf::from(p)
    }
}

/// What a host requires before it loads an artifact.
#[derive(Clone, Debug, Default)]
pub struct TrustPolicy {
    /// Keys whose signatures are accepted.
    pub trusted: Vec<PublicKey>,
    /// Digests accepted without a signature.
    pub pinned: Vec<Digest>,
    /// Whether anything is required at all. `false` (the default) accepts
    /// every artifact and only reports what it found.
    pub required: bool,
}

/// Who vouched for an artifact.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[serde(tag = "by", rename_all = "snake_case")]
pub enum Vouch {
    /// A valid signature by this trusted key.
    Signature {
        /// The key id.
        key_id: String,
    },
    /// The digest is pinned.
    Pin,
    /// Nothing, and the policy did not require anything.
    Nobody,
}

impl TrustPolicy {
    /// Reads every `*.pub` file in a directory as a trusted key.
    ///
    /// # Errors
    /// [`TrustError::Io`] for an unreadable directory, [`TrustError::BadFile`]
    /// naming the first bad key file.
    pub fn trust_dir(mut self, dir: &Path) -> Result<Self, TrustError> {
        let entries = std::fs::read_dir(dir).map_err(|source| TrustError::Io { path: dir.to_owned(), source })?;
        let mut paths: Vec<PathBuf> = entries
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.extension().is_some_and(|x| x == "pub"))
            .collect();
        paths.sort();
        for p in paths {
            self.trusted.push(PublicKey::read(&p)?);
        }
        self.required = true;
        Ok(self)
    }

    /// Checks an artifact's digest, and its signature if it has one.
    ///
    /// A signature that is present is always checked, even when the policy
    /// requires nothing: a bad signature is never ignored.
    ///
    /// # Errors
    /// [`TrustError::DigestMismatch`], [`TrustError::BadSignature`] for a
    /// signature that does not hold; when the policy is required:
    /// [`TrustError::UnknownSigner`] (signed, but not by a trusted key), or
    /// [`TrustError::NotPinned`] (naming the pinned and actual digests) /
    /// [`TrustError::Unsigned`] when neither a trusted signature nor a pin vouches.
    pub fn check(&self, digest: Digest, signature: Option<&Signature>) -> Result<Vouch, TrustError> {
        let mut unknown_signer = None;
        if let Some(sig) = signature {
            if sig.digest != digest.to_string() {
                return Err(TrustError::DigestMismatch { expected: sig.digest.clone(), actual: digest });
            }
            match self.trusted.iter().find(|k| k.id() == sig.key_id) {
                Some(key) => {
                    verify(key, digest, sig)?;
                    return Ok(Vouch::Signature { key_id: sig.key_id.clone() });
                }
                None => unknown_signer = Some(sig.key_id.clone()),
            }
        }
        if self.pinned.contains(&digest) {
            return Ok(Vouch::Pin);
        }
        if !self.required {
            return Ok(Vouch::Nobody);
        }
        if let Some(key_id) = unknown_signer {
            return Err(TrustError::UnknownSigner { key_id });
        }
        if !self.pinned.is_empty() {
            return Err(TrustError::NotPinned { actual: digest, pinned: self.pinned.clone() });
        }
        Err(TrustError::Unsigned { digest })
    }
}

fn verify(key: &PublicKey, digest: Digest, sig: &Signature) -> Result<(), TrustError> {
    let bad = || TrustError::BadSignature { key_id: sig.key_id.clone() };
    let bytes: [u8; 64] = unhex(&sig.signature).and_then(|b| b.try_into().ok()).ok_or_else(bad)?;
    let signature = ed25519_dalek::Signature::from_bytes(&bytes);
    key.key.verify(message(digest).as_bytes(), &signature).map_err(|_| bad())
}

fn message(digest: Digest) -> String {
    format!("{CONTEXT}{digest}")
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn unhex(text: &str) -> Option<Vec<u8>> {
    if text.len() % 2 != 0 {
        return None;
    }
    (0..text.len()).step_by(2).map(|i| u8::from_str_radix(text.get(i..i + 2)?, 16).ok()).collect()
}

fn read_tagged(path: &Path, tag: &str) -> Result<[u8; 32], TrustError> {
    let text = std::fs::read_to_string(path).map_err(|source| TrustError::Io { path: path.to_owned(), source })?;
    let bad = |reason: String| TrustError::BadFile { path: path.to_owned(), reason };
    let value = text
        .trim()
        .strip_prefix(tag)
        .ok_or_else(|| bad(format!("expected a line starting with `{tag}`")))?
        .trim();
    unhex(value).and_then(|b| b.try_into().ok()).ok_or_else(|| bad("expected 64 hex digits".into()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_round_trips_and_refuses_odd_input() {
        assert_eq!(unhex(&hex(&[0, 1, 254, 255])), Some(vec![0, 1, 254, 255]));
        assert_eq!(unhex("abc"), None);
        assert_eq!(unhex("zz"), None);
    }
}
