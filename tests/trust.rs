//! Signed, unsigned, tampered and wrong-key artifacts behave as the policy
//! says. ed25519 itself is checked against RFC 8032's first test vector.

use paddock_host::trust::{PublicKey, SecretKey, Signature, TrustError, TrustPolicy, Vouch};
use paddock_host::Digest;
use paddock_tests::demo_artifact;

fn tmp(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("paddock-trust-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir.join(name)
}

fn key(name: &str) -> (SecretKey, PublicKey, std::path::PathBuf) {
    let secret = SecretKey::generate().unwrap();
    let dir = tmp(&format!("keys-{name}"));
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::write(dir.join(format!("{name}.pub")), secret.public().to_text()).unwrap();
    let public = secret.public();
    (secret, public, dir)
}

fn artifact_digest() -> Digest {
    Digest::of(&std::fs::read(demo_artifact("charge-minutes")).unwrap())
}

/// RFC 8032 §7.1, TEST 1: secret key 9d61b19d…7f60, empty message.
#[test]
fn ed25519_matches_the_rfc_8032_test_vector() {
    let path = tmp("rfc8032.key");
    std::fs::write(&path, "paddock-ed25519-secret 9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60\n").unwrap();
    let key = SecretKey::read(&path).unwrap();
    assert!(key.public().to_text().contains("d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"));
}

#[test]
fn a_signature_by_a_trusted_key_is_accepted_and_names_the_signer() {
    let (secret, public, dir) = key("alice");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let digest = artifact_digest();
    let sig = secret.sign(digest);
    assert_eq!(policy.check(digest, Some(&sig)).unwrap(), Vouch::Signature { key_id: public.id() });
}

#[test]
fn an_unsigned_artifact_is_refused_when_a_signature_is_required() {
    let (_, _, dir) = key("bob");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let err = policy.check(artifact_digest(), None).unwrap_err();
    assert!(matches!(err, TrustError::Unsigned { .. }), "{err}");
    assert!(err.to_string().contains(&artifact_digest().to_string()));
}

#[test]
fn a_tampered_artifact_fails_its_signature_naming_both_digests() {
    let (secret, _, dir) = key("carol");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let mut bytes = std::fs::read(demo_artifact("charge-minutes")).unwrap();
    let sig = secret.sign(Digest::of(&bytes));
    let last = bytes.len() - 1;
    bytes[last] ^= 1;
    let tampered = Digest::of(&bytes);
    let err = policy.check(tampered, Some(&sig)).unwrap_err();
    assert_eq!(err.to_string(), format!("the signature is for {}, but the artifact is {tampered}", sig.digest));
}

#[test]
fn a_signature_whose_bytes_were_altered_does_not_verify() {
    let (secret, public, dir) = key("dave");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let digest = artifact_digest();
    let mut sig = secret.sign(digest);
    let flipped = if sig.signature.starts_with('0') { "1" } else { "0" };
    sig.signature.replace_range(0..1, flipped);
    let err = policy.check(digest, Some(&sig)).unwrap_err();
    assert_eq!(err.to_string(), format!("the signature by key {} does not verify: the artifact or signature was altered", public.id()));
}

#[test]
fn a_signature_by_an_untrusted_key_is_refused_naming_the_key() {
    let (_, _, dir) = key("erin");
    let (mallory, mallory_public, _) = key("mallory");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let digest = artifact_digest();
    let err = policy.check(digest, Some(&mallory.sign(digest))).unwrap_err();
    assert!(matches!(&err, TrustError::UnknownSigner { key_id } if *key_id == mallory_public.id()), "{err}");
}

#[test]
fn a_pin_accepts_exactly_its_digest_and_names_expected_and_actual() {
    let digest = artifact_digest();
    let policy = TrustPolicy { pinned: vec![digest], required: true, ..TrustPolicy::default() };
    assert_eq!(policy.check(digest, None).unwrap(), Vouch::Pin);
    let other = Digest::of(b"another artifact");
    let err = policy.check(other, None).unwrap_err();
    assert_eq!(err.to_string(), format!("the artifact is {other}, which is not pinned (pinned: {digest})"));
}

#[test]
fn with_no_policy_everything_loads_but_a_bad_signature_is_still_refused() {
    let policy = TrustPolicy::default();
    let digest = artifact_digest();
    assert_eq!(policy.check(digest, None).unwrap(), Vouch::Nobody);
    let (secret, _, _) = key("frank");
    let mut sig = secret.sign(digest);
    sig.digest = Digest::of(b"x").to_string();
    assert!(matches!(policy.check(digest, Some(&sig)), Err(TrustError::DigestMismatch { .. })));
}

#[test]
fn signatures_round_trip_through_their_file() {
    let (secret, _, _) = key("grace");
    let sig = secret.sign(artifact_digest());
    let path = tmp("artifact.wasm.sig");
    std::fs::write(&path, sig.to_json()).unwrap();
    assert_eq!(Signature::read(&path).unwrap(), sig);
    std::fs::write(&path, "not json").unwrap();
    assert!(Signature::read(&path).unwrap_err().to_string().contains("not a signature"));
}
