//! Vouched, unvouched, tampered and untrusted-voucher artifacts behave as
//! the policy says. ed25519 itself is checked against RFC 8032's first test
//! vector.

use paddock_host::Digest;
use paddock_host::artifact::trust::{Admission, TrustError, TrustPolicy, Vouch, Voucher, VouchingKey};
use paddock_tests::demo_artifact;

fn tmp(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("paddock-trust-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir.join(name)
}

fn key(name: &str) -> (VouchingKey, Voucher, std::path::PathBuf) {
    let secret = VouchingKey::generate(name).unwrap();
    let dir = tmp(&format!("keys-{name}"));
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::write(dir.join(format!("{name}.voucher")), secret.voucher().to_text()).unwrap();
    let public = secret.voucher();
    (secret, public, dir)
}

fn artifact_digest() -> Digest {
    Digest::of(&std::fs::read(demo_artifact("charge-minutes")).unwrap())
}

/// RFC 8032 §7.1, TEST 1: secret key 9d61b19d…7f60, empty message.
#[test]
fn ed25519_matches_the_rfc_8032_test_vector() {
    let path = tmp("rfc8032.vouching-key");
    std::fs::write(
        &path,
        "name = \"rfc8032\"\ned25519_seed = \"9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60\"\n",
    )
    .unwrap();
    let key = VouchingKey::read(&path).unwrap();
    // RFC 8032 §7.1 TEST 1: PUBLIC KEY d75a9801…511a, and the signature of
    // the empty message is e5564300…100b; ours signs a prefixed digest, so
    // only the public key is compared.
    let public = tmp("rfc8032.voucher");
    std::fs::write(&public, key.voucher().to_text()).unwrap();
    let text = std::fs::read_to_string(&public).unwrap();
    assert!(
        text.contains("ed25519_public = \"d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a\""),
        "{text}"
    );
    assert_eq!(Voucher::read(&public).unwrap(), key.voucher());
}

#[test]
fn voucher_files_that_are_not_vouchers_are_refused_naming_the_file_and_field() {
    let path = tmp("broken.voucher");
    std::fs::write(&path, "name = \"x\"\ned25519_public = \"abc\"\n").unwrap();
    let err = Voucher::read(&path).unwrap_err().to_string();
    assert!(err.contains("broken.voucher") && err.contains("ed25519_public: expected 64 hex digits"), "{err}");
    std::fs::write(&path, "paddock-ed25519-public d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a\n")
        .unwrap();
    let err = Voucher::read(&path).unwrap_err().to_string();
    assert!(err.contains("broken.voucher: not a voucher"), "{err}");
}

#[test]
fn a_vouch_by_a_trusted_voucher_is_admitted_and_names_the_voucher() {
    let (secret, public, dir) = key("alice");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let digest = artifact_digest();
    let vouch = secret.vouch(digest);
    assert_eq!(
        policy.admit(digest, Some(&vouch)).unwrap(),
        Admission::Vouch { voucher: public.id(), name: "alice".into() }
    );
}

#[test]
fn an_unvouched_artifact_is_refused_when_a_vouch_is_required() {
    let (_, _, dir) = key("bob");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let err = policy.admit(artifact_digest(), None).unwrap_err();
    assert!(matches!(err, TrustError::Unvouched { .. }), "{err}");
    assert!(err.to_string().contains(&artifact_digest().to_string()));
}

#[test]
fn a_tampered_artifact_fails_its_vouch_naming_both_digests() {
    let (secret, _, dir) = key("carol");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let mut bytes = std::fs::read(demo_artifact("charge-minutes")).unwrap();
    let vouch = secret.vouch(Digest::of(&bytes));
    let last = bytes.len() - 1;
    bytes[last] ^= 1;
    let tampered = Digest::of(&bytes);
    let err = policy.admit(tampered, Some(&vouch)).unwrap_err();
    assert_eq!(err.to_string(), format!("the vouch is for {}, but the artifact is {tampered}", vouch.digest));
}

#[test]
fn a_vouch_whose_signature_was_altered_does_not_hold() {
    let (secret, public, dir) = key("dave");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let digest = artifact_digest();
    let mut vouch = secret.vouch(digest);
    let flipped = if vouch.ed25519_signature.starts_with('0') { "1" } else { "0" };
    vouch.ed25519_signature.replace_range(0..1, flipped);
    let err = policy.admit(digest, Some(&vouch)).unwrap_err();
    assert_eq!(
        err.to_string(),
        format!("the vouch by voucher {} does not hold: the artifact or its vouch was altered", public.id())
    );
}

#[test]
fn a_vouch_by_an_untrusted_voucher_is_refused_naming_the_voucher() {
    let (_, _, dir) = key("erin");
    let (mallory, mallory_public, _) = key("mallory");
    let policy = TrustPolicy::default().trust_dir(&dir).unwrap();
    let digest = artifact_digest();
    let err = policy.admit(digest, Some(&mallory.vouch(digest))).unwrap_err();
    assert!(matches!(&err, TrustError::UnknownVoucher { voucher } if *voucher == mallory_public.id()), "{err}");
}

#[test]
fn a_pin_accepts_exactly_its_digest_and_names_expected_and_actual() {
    let digest = artifact_digest();
    let policy = TrustPolicy { pinned: vec![digest], required: true, ..TrustPolicy::default() };
    assert_eq!(policy.admit(digest, None).unwrap(), Admission::Pin);
    let other = Digest::of(b"another artifact");
    let err = policy.admit(other, None).unwrap_err();
    assert_eq!(err.to_string(), format!("the artifact is {other}, which is not pinned (pinned: {digest})"));
}

#[test]
fn with_no_policy_everything_loads_but_a_broken_vouch_is_still_refused() {
    let policy = TrustPolicy::default();
    let digest = artifact_digest();
    assert_eq!(policy.admit(digest, None).unwrap(), Admission::OpenPolicy);
    let (secret, _, _) = key("frank");
    let mut vouch = secret.vouch(digest);
    vouch.digest = Digest::of(b"x").to_string();
    assert!(matches!(policy.admit(digest, Some(&vouch)), Err(TrustError::DigestMismatch { .. })));
}

#[test]
fn vouches_round_trip_through_their_file() {
    let (secret, _, _) = key("grace");
    let vouch = secret.vouch(artifact_digest());
    let path = tmp("artifact.wasm.vouch");
    std::fs::write(&path, vouch.to_text()).unwrap();
    assert_eq!(Vouch::read(&path).unwrap(), vouch);
    std::fs::write(&path, "not a vouch at all").unwrap();
    let err = Vouch::read(&path).unwrap_err().to_string();
    assert!(err.contains("artifact.wasm.vouch: not a vouch"), "{err}");
}

/// Two mistakes a reviewer makes setting trust up are named as such: a
/// trust folder with no `.voucher` file in it, and vouching with the public
/// `.voucher` file instead of the secret `.vouching-key`.
#[test]
fn an_empty_trust_folder_and_a_public_file_used_as_the_key_are_named() {
    let empty = tmp("empty-trust");
    std::fs::create_dir_all(&empty).unwrap();
    let err = TrustPolicy::default().trust_dir(&empty).unwrap_err().to_string();
    assert!(err.contains("empty-trust: holds no `.voucher` file, so no vouch could be trusted"), "{err}");
    assert!(err.contains("`TrustPolicy::pinned`"), "{err}");

    let (_, _, dir) = key("carol");
    let public = dir.join("carol.voucher");
    let Err(err) = VouchingKey::read(&public) else { panic!("a public file is not a vouching key") };
    let err = err.to_string();
    assert!(err.contains("carol.voucher: this is a voucher's public file"), "{err}");
    assert!(err.contains("`.vouching-key`"), "{err}");
}
