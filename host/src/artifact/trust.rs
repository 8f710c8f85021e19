//! Who vouches for an artifact, and what a host admits.
//!
//! A *voucher* is an ed25519 key pair kept in two small TOML files:
//! - `NAME.voucher`, the public half, given to every host that should admit
//!   what NAME vouches for: `name` and `ed25519_public` (64 hex digits);
//! - `NAME.vouching-key`, the secret half, kept by whoever vouches:
//!   `name` and `ed25519_seed` (64 hex digits). Keep it private.
//!
//! A *vouch* is a voucher's word for one artifact, in `ARTIFACT.vouch`
//! beside it: `voucher` (the voucher's id), `digest` (`sha256:…`) and
//! `ed25519_signature` (128 hex digits). A voucher's id is the first 16 hex
//! digits of the sha256 of its 32 public key bytes. What is signed is the
//! text `paddock-artifact-v1 ` followed by the digest, so a vouch can never
//! be replayed as a signature over anything else.
//!
//! A host's [`TrustPolicy`] names the vouchers it trusts (a directory of
//! `.voucher` files) and digests it pins, and [`TrustPolicy::admit`] says
//! whether an artifact gets in and on whose word ([`Admission`]).

use std::path::{Path, PathBuf};

use ed25519_dalek::{Signer, SigningKey, Verifier, VerifyingKey};
use serde::{Deserialize, Serialize};

use crate::artifact::digest::Digest;

const CONTEXT: &str = "paddock-artifact-v1 ";

/// The suffix of a voucher's public file.
pub const VOUCHER_SUFFIX: &str = "voucher";
/// The suffix of a voucher's secret file.
pub const VOUCHING_KEY_SUFFIX: &str = "vouching-key";
/// The suffix added to an artifact's path for its vouch.
pub const VOUCH_SUFFIX: &str = "vouch";

/// Why a voucher file, a vouch or a policy check failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum TrustError {
    /// A file could not be read or written.
    #[error("{path}: {cause}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// A voucher, vouching-key or vouch file is not in the expected form.
    #[error("{path}: {reason}")]
    BadFile {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// A voucher's name cannot be used in a file name.
    #[error("voucher name {name:?}: use 1 to 64 letters, digits, `-`, `_` or `.`, not starting with `.`")]
    BadName {
        /// The name given.
        name: String,
    },
    /// The policy requires a vouch and nobody vouched.
    #[error(
        "nobody vouched for the artifact {digest} (no .vouch file beside it), and the policy requires a trusted voucher or a pin"
    )]
    Unvouched {
        /// The artifact's digest.
        digest: Digest,
    },
    /// The vouch is by a voucher the policy does not trust.
    #[error("the artifact is vouched for by voucher {voucher}, who is not among the trusted vouchers")]
    UnknownVoucher {
        /// The voucher's id.
        voucher: String,
    },
    /// The vouch is for another artifact.
    #[error("the vouch is for {expected}, but the artifact is {actual}")]
    DigestMismatch {
        /// The digest the vouch covers.
        expected: String,
        /// The artifact's digest.
        actual: Digest,
    },
    /// The vouch's signature does not hold under the voucher's key.
    #[error("the vouch by voucher {voucher} does not hold: the artifact or its vouch was altered")]
    BrokenVouch {
        /// The voucher's id.
        voucher: String,
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

/// The public half of a voucher: what a host trusts.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Voucher {
    name: String,
    key: VerifyingKey,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct VoucherFile {
    name: String,
    ed25519_public: String,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct VouchingKeyFile {
    name: String,
    ed25519_seed: String,
}

impl Voucher {
    /// The voucher's id: the first 16 hex digits of the sha256 of its key.
    pub fn id(&self) -> String {
        Digest::of(self.key.as_bytes()).hex()[..16].to_owned()
    }

    /// The name it was made with.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// The voucher as it is written to a `.voucher` file.
    pub fn to_text(&self) -> String {
        let body =
            toml_text(&VoucherFile { name: self.name.clone(), ed25519_public: hex::encode(self.key.as_bytes()) });
        format!(
            "# paddock voucher {} (id {}): a host that trusts this file admits the artifacts it vouches for.\n{body}",
            self.name,
            self.id()
        )
    }

    /// Reads a `.voucher` file.
    ///
    /// # Errors
    /// [`TrustError::Io`], or [`TrustError::BadFile`] naming what is wrong.
    pub fn read(path: &Path) -> Result<Self, TrustError> {
        let file: VoucherFile = read_toml(path, "a voucher")?;
        let bytes = key_bytes(path, "ed25519_public", &file.ed25519_public)?;
        let key = VerifyingKey::from_bytes(&bytes).map_err(|e| TrustError::BadFile {
            path: path.to_owned(),
            reason: format!("ed25519_public is not an ed25519 public key: {e}"),
        })?;
        Ok(Voucher { name: file.name, key })
    }
}

/// The secret half of a voucher: what vouches for artifacts.
pub struct VouchingKey {
    name: String,
    key: SigningKey,
}

impl VouchingKey {
    /// A new voucher from the operating system's random source.
    ///
    /// # Errors
    /// [`TrustError::BadName`] for a name that cannot be a file name;
    /// [`TrustError::Io`] when the system has no randomness to give.
    pub fn generate(name: &str) -> Result<Self, TrustError> {
        check_name(name)?;
        let mut seed = [0u8; 32];
        getrandom::fill(&mut seed).map_err(|e| TrustError::Io {
            path: "(system random source)".into(),
            cause: std::io::Error::other(e.to_string()),
        })?;
        Ok(VouchingKey { name: name.to_owned(), key: SigningKey::from_bytes(&seed) })
    }

    /// The public half.
    pub fn voucher(&self) -> Voucher {
        Voucher { name: self.name.clone(), key: self.key.verifying_key() }
    }

    /// The key as it is written to a `.vouching-key` file.
    pub fn to_text(&self) -> String {
        let body =
            toml_text(&VouchingKeyFile { name: self.name.clone(), ed25519_seed: hex::encode(self.key.as_bytes()) });
        format!(
            "# paddock vouching key {} (id {}): SECRET. Whoever holds this file can vouch as {}.\n{body}",
            self.name,
            self.voucher().id(),
            self.name
        )
    }

    /// Reads a `.vouching-key` file.
    ///
    /// # Errors
    /// [`TrustError::Io`], or [`TrustError::BadFile`] naming what is wrong.
    pub fn read(path: &Path) -> Result<Self, TrustError> {
        if read_toml::<VoucherFile>(path, "a voucher").is_ok() {
            return Err(TrustError::BadFile {
                path: path.to_owned(),
                reason: "this is a voucher's public file, which checks vouches; vouch with the secret \
                         `.vouching-key` file `paddock voucher` wrote beside it"
                    .into(),
            });
        }
        let file: VouchingKeyFile = read_toml(path, "a vouching key")?;
        let seed = key_bytes(path, "ed25519_seed", &file.ed25519_seed)?;
        Ok(VouchingKey { name: file.name, key: SigningKey::from_bytes(&seed) })
    }

    /// Vouches for an artifact's digest.
    pub fn vouch(&self, digest: Digest) -> Vouch {
        let sig = self.key.sign(message(digest).as_bytes());
        Vouch {
            voucher: self.voucher().id(),
            digest: digest.to_string(),
            ed25519_signature: hex::encode(sig.to_bytes()),
        }
    }
}

/// A voucher's word for one artifact, kept beside it in `ARTIFACT.vouch`.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Vouch {
    /// The id of the voucher that vouched.
    pub voucher: String,
    /// The digest vouched for (`sha256:…`).
    pub digest: String,
    /// The ed25519 signature over `paddock-artifact-v1 <digest>`, hex.
    pub ed25519_signature: String,
}

impl Vouch {
    /// Reads a `.vouch` file.
    ///
    /// # Errors
    /// [`TrustError::Io`], or [`TrustError::BadFile`] naming what is wrong.
    pub fn read(path: &Path) -> Result<Self, TrustError> {
        let bytes = std::fs::read(path).map_err(|cause| TrustError::Io { path: path.to_owned(), cause })?;
        Self::from_bytes(&bytes).map_err(|e| TrustError::BadFile { path: path.to_owned(), reason: e.to_string() })
    }

    /// Parses a vouch from the bytes of its file.
    ///
    /// # Errors
    /// [`VouchTextError::NotUtf8`] or [`VouchTextError::NotAVouch`].
    pub fn from_bytes(bytes: &[u8]) -> Result<Self, VouchTextError> {
        let text = std::str::from_utf8(bytes).map_err(|_| VouchTextError::NotUtf8)?;
        toml::from_str(text).map_err(VouchTextError::NotAVouch)
    }

    /// The vouch as the text of its file.
    pub fn to_text(&self) -> String {
        format!("# paddock vouch: voucher {} vouches for {}.\n{}", self.voucher, self.digest, toml_text(self))
    }

    /// Where the vouch of an artifact lives: the artifact's path plus `.vouch`.
    pub fn path_for(artifact: &Path) -> PathBuf {
        let mut p = artifact.as_os_str().to_owned();
        p.push(".");
        p.push(VOUCH_SUFFIX);
        PathBuf::from(p)
    }
}

/// Why the text of a `.vouch` file is not a vouch.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum VouchTextError {
    /// The file is not UTF-8 text.
    #[error("not a vouch: the file is not UTF-8 text")]
    NotUtf8,
    /// The text is not a vouch's TOML.
    #[error("not a vouch: {}", .0.message())]
    NotAVouch(toml::de::Error),
}

/// What a host requires before it loads an artifact.
#[derive(Clone, Debug, Default)]
pub struct TrustPolicy {
    /// Vouchers whose vouches are accepted.
    pub trusted: Vec<Voucher>,
    /// Digests admitted without a vouch.
    pub pinned: Vec<Digest>,
    /// Whether anything is required at all. `false` (the default) admits
    /// every artifact and only reports what it found.
    pub required: bool,
}

/// On whose word an artifact was admitted.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "openapi", derive(utoipa::ToSchema))]
#[serde(tag = "admitted_by", rename_all = "snake_case")]
#[non_exhaustive]
pub enum Admission {
    /// A vouch that holds, by a trusted voucher.
    Vouch {
        /// The voucher's id.
        voucher: String,
        /// The name in the trusted `.voucher` file.
        name: String,
    },
    /// The digest is pinned.
    Pin,
    /// Nobody's: the policy requires nothing.
    OpenPolicy,
}

impl TrustPolicy {
    /// Reads every `*.voucher` file in a directory as a trusted voucher.
    ///
    /// # Errors
    /// [`TrustError::Io`] for an unreadable directory, [`TrustError::BadFile`]
    /// naming the first bad voucher file, or the directory when it holds no
    /// `.voucher` file (no vouch could be trusted: a mistake, not a policy).
    pub fn trust_dir(mut self, dir: &Path) -> Result<Self, TrustError> {
        let entries = std::fs::read_dir(dir).map_err(|cause| TrustError::Io { path: dir.to_owned(), cause })?;
        let mut paths: Vec<PathBuf> = entries
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.extension().is_some_and(|x| x == VOUCHER_SUFFIX))
            .collect();
        paths.sort();
        if paths.is_empty() {
            return Err(TrustError::BadFile {
                path: dir.to_owned(),
                reason: format!(
                    "holds no `.{VOUCHER_SUFFIX}` file, so no vouch could be trusted: copy each voucher's public \
                     `.{VOUCHER_SUFFIX}` file here, or admit digests by pinning them (`TrustPolicy::pinned`)"
                ),
            });
        }
        for p in paths {
            self.trusted.push(Voucher::read(&p)?);
        }
        self.required = true;
        Ok(self)
    }

    /// Whether an artifact with this digest, and this vouch if it has one,
    /// is admitted, and on whose word.
    ///
    /// A vouch that is present is always checked, even when the policy
    /// requires nothing: a broken vouch is never ignored.
    ///
    /// # Errors
    /// [`TrustError::DigestMismatch`] or [`TrustError::BrokenVouch`] for a
    /// vouch that does not hold; when the policy is required:
    /// [`TrustError::UnknownVoucher`] (vouched, but not by a trusted
    /// voucher), or [`TrustError::NotPinned`] (naming the pinned and actual
    /// digests) / [`TrustError::Unvouched`] when neither a trusted vouch nor
    /// a pin admits it.
    pub fn admit(&self, digest: Digest, vouch: Option<&Vouch>) -> Result<Admission, TrustError> {
        let mut unknown_voucher = None;
        if let Some(vouch) = vouch {
            if vouch.digest != digest.to_string() {
                return Err(TrustError::DigestMismatch { expected: vouch.digest.clone(), actual: digest });
            }
            match self.trusted.iter().find(|v| v.id() == vouch.voucher) {
                Some(voucher) => {
                    holds(voucher, digest, vouch)?;
                    return Ok(Admission::Vouch { voucher: vouch.voucher.clone(), name: voucher.name.clone() });
                }
                None => unknown_voucher = Some(vouch.voucher.clone()),
            }
        }
        if self.pinned.contains(&digest) {
            return Ok(Admission::Pin);
        }
        if !self.required {
            return Ok(Admission::OpenPolicy);
        }
        if let Some(voucher) = unknown_voucher {
            return Err(TrustError::UnknownVoucher { voucher });
        }
        if !self.pinned.is_empty() {
            return Err(TrustError::NotPinned { actual: digest, pinned: self.pinned.clone() });
        }
        Err(TrustError::Unvouched { digest })
    }
}

fn holds(voucher: &Voucher, digest: Digest, vouch: &Vouch) -> Result<(), TrustError> {
    let broken = || TrustError::BrokenVouch { voucher: vouch.voucher.clone() };
    let mut bytes = [0u8; 64];
    hex::decode_to_slice(&vouch.ed25519_signature, &mut bytes).map_err(|_| broken())?;
    let signature = ed25519_dalek::Signature::from_bytes(&bytes);
    voucher.key.verify(message(digest).as_bytes(), &signature).map_err(|_| broken())
}

fn message(digest: Digest) -> String {
    format!("{CONTEXT}{digest}")
}

fn check_name(name: &str) -> Result<(), TrustError> {
    let ok = (1..=64).contains(&name.len())
        && !name.starts_with('.')
        && name.chars().all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'));
    if ok { Ok(()) } else { Err(TrustError::BadName { name: name.to_owned() }) }
}

fn toml_text<T: Serialize>(value: &T) -> String {
    // Plain strings only: serialising them cannot fail.
    toml::to_string(value).unwrap_or_default()
}

fn read_toml<T: serde::de::DeserializeOwned>(path: &Path, what: &str) -> Result<T, TrustError> {
    let text = std::fs::read_to_string(path).map_err(|cause| TrustError::Io { path: path.to_owned(), cause })?;
    toml::from_str(&text)
        .map_err(|e| TrustError::BadFile { path: path.to_owned(), reason: format!("not {what}: {}", e.message()) })
}

fn key_bytes(path: &Path, field: &str, value: &str) -> Result<[u8; 32], TrustError> {
    let mut bytes = [0u8; 32];
    hex::decode_to_slice(value, &mut bytes).map_err(|_| TrustError::BadFile {
        path: path.to_owned(),
        reason: format!("{field}: expected 64 hex digits"),
    })?;
    Ok(bytes)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_that_cannot_be_file_names_are_refused() {
        for bad in ["", ".hidden", "a/b", "a b", &"x".repeat(65)] {
            assert!(matches!(VouchingKey::generate(bad), Err(TrustError::BadName { .. })), "{bad:?}");
        }
        assert!(VouchingKey::generate("co-op_2026.release").is_ok());
    }
}
