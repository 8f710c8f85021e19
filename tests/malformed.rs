//! Malformed and tampered artifacts: each gets a clear error naming what is
//! wrong, and nothing panics.

use paddock_host::{Artifact, ArtifactError, LimitHit, LoadError, Model, ModelOptions, Row, Runtime, pack};
use paddock_tests::{demo_artifact, guest};

fn demo_bytes() -> Vec<u8> {
    std::fs::read(demo_artifact("charge-minutes")).unwrap()
}

fn parse(bytes: Vec<u8>) -> Result<Artifact, ArtifactError> {
    Artifact::from_bytes(bytes, 64 << 20)
}

fn custom(name: &str, data: &[u8]) -> Vec<u8> {
    let mut body = vec![name.len() as u8];
    body.extend_from_slice(name.as_bytes());
    body.extend_from_slice(data);
    let mut section = vec![0u8, body.len() as u8];
    section.extend(body);
    section
}

#[test]
fn an_empty_file_is_named_empty() {
    assert_eq!(parse(vec![]).unwrap_err().to_string(), "the artifact is empty (0 bytes)");
}

#[test]
fn random_bytes_are_not_webassembly() {
    let bytes: Vec<u8> = (0..4096u32).map(|i| (i.wrapping_mul(2_654_435_761) >> 13) as u8).collect();
    let err = parse(bytes).unwrap_err();
    assert!(matches!(err, ArtifactError::NotWasm), "{err}");
    assert!(err.to_string().contains("magic bytes"));
}

#[test]
fn a_truncated_component_names_the_offset() {
    let bytes = demo_bytes();
    let cut = bytes[..bytes.len() / 2].to_vec();
    let err = parse(cut).unwrap_err();
    assert!(matches!(err, ArtifactError::Malformed { .. }), "{err}");
    assert!(err.to_string().starts_with("malformed WebAssembly at byte "), "{err}");
}

#[test]
fn a_core_module_where_a_component_is_expected_says_to_pack_it() {
    let err = parse(guest("charge-minutes")).unwrap_err();
    assert!(matches!(err, ArtifactError::CoreModule));
    assert!(err.to_string().contains("paddock pack"));
}

#[test]
fn a_component_that_is_not_a_model_is_refused_naming_the_world() {
    let bytes = wat::parse_str("(component)").unwrap();
    let err = Model::load(&Runtime::new().unwrap(), parse(bytes).unwrap()).unwrap_err();
    assert!(matches!(err, LoadError::World(_)), "{err}");
    assert!(err.to_string().contains("does not implement the paddock:model/estimator world"), "{err}");
}

#[test]
fn an_oversized_file_is_refused_before_it_is_read() {
    let err = Artifact::from_bytes(demo_bytes(), 1 << 10).unwrap_err();
    assert!(matches!(err, ArtifactError::TooLarge(LimitHit::ArtifactSize { limit: 1024, .. })), "{err}");
}

#[test]
fn a_duplicated_params_section_is_refused() {
    let mut bytes = demo_bytes();
    bytes.extend(custom("paddock-params", b"second copy"));
    let err = parse(bytes).unwrap_err();
    assert_eq!(err.to_string(), "custom section `paddock-params` appears 2 times; an artifact carries it at most once");
}

#[test]
fn a_custom_section_running_past_the_end_is_malformed() {
    let mut bytes = demo_bytes();
    let mut section = custom("paddock-checks", b"{}");
    section[1] = 0x7f; // declares 127 bytes, has 17
    bytes.extend(section);
    assert!(matches!(parse(bytes).unwrap_err(), ArtifactError::Malformed { .. }));
}

#[test]
fn an_unknown_section_with_our_prefix_is_refused() {
    let mut bytes = demo_bytes();
    bytes.extend(custom("paddock-extra", b"?"));
    assert_eq!(
        parse(bytes).unwrap_err().to_string(),
        "unknown custom section `paddock-extra`: names starting with `paddock-` are reserved"
    );
}

#[test]
fn a_checks_section_that_does_not_parse_is_named() {
    let packed = paddock_host::pack(&demo_bytes(), None, None).unwrap();
    let mut bytes = packed;
    bytes.extend(custom("paddock-checks", b"{\"cases\": [oops]}"));
    let artifact = parse(bytes).unwrap();
    let err = artifact.checks().unwrap_err();
    assert!(err.to_string().starts_with("checks do not parse: expected value at line 1 column 12"), "{err}");
}

/// Flips one byte at a time across the whole file: the result is refused
/// with an error, or (a byte in data the model ignores) loads and scores —
/// and a host that pins the original, or trusts the voucher that vouched for it,
/// refuses every flipped file. Never a panic.
#[test]
fn single_byte_flips_never_panic_and_never_pass_for_the_vouched_original() {
    use paddock_host::{TrustError, TrustPolicy, VouchingKey};
    let runtime = Runtime::new().unwrap();
    let original = demo_bytes();
    let digest = paddock_host::Digest::of(&original);
    let key = VouchingKey::generate("release").unwrap();
    let vouch = key.vouch(digest);
    let pinned = TrustPolicy { pinned: vec![digest], required: true, ..TrustPolicy::default() };
    let vouched = TrustPolicy { trusted: vec![key.voucher()], required: true, ..TrustPolicy::default() };
    assert!(pinned.admit(digest, None).is_ok() && vouched.admit(digest, Some(&vouch)).is_ok());
    let row = Row::new()
        .with("charger_kw", 11.0)
        .with("battery_kwh", 64.0)
        .with("soc_start", 0.2)
        .with("soc_target", 0.8)
        .with("hour_of_week", 30i64)
        .with("connector", "type2")
        .with("fleet", false);
    let (mut refused, mut loaded) = (0, 0);
    let step = original.len() / 120;
    for pos in (0..original.len()).step_by(step) {
        let mut bytes = original.clone();
        bytes[pos] ^= 0x5a;
        let flipped = paddock_host::Digest::of(&bytes);
        assert!(matches!(pinned.admit(flipped, None), Err(TrustError::NotPinned { .. })), "byte {pos} passed the pin");
        // The original's vouch, carried beside the flipped file.
        assert!(
            matches!(vouched.admit(flipped, Some(&vouch)), Err(TrustError::DigestMismatch { .. })),
            "byte {pos} passed the vouch"
        );
        match parse(bytes).map_err(|e| e.to_string()).and_then(|a| Model::load(&runtime, a).map_err(|e| e.to_string()))
        {
            Err(message) => {
                assert!(!message.is_empty());
                refused += 1;
            }
            Ok(model) => {
                let _ = model.score(std::slice::from_ref(&row));
                loaded += 1;
            }
        }
    }
    eprintln!("byte flips: {refused} refused, {loaded} loaded");
    assert!(refused > 0);
}

/// An artifact whose carried checks say one thing while its code computes
/// another (its recorded outputs edited, as a tampered or mispacked file
/// would have them) does not load through `Model::load`: every load runs
/// the checks, as the README promises. Skipping them is an option named
/// for what it skips.
#[test]
fn an_artifact_whose_carried_checks_fail_does_not_load_unless_told_to_skip_them() {
    let runtime = Runtime::new().unwrap();
    let honest = parse(demo_bytes()).unwrap();
    let mut checks = honest.checks().unwrap().expect("the demo artifact carries checks");
    let n = checks.cases.len();
    for case in checks.cases.iter_mut().skip(1) {
        for v in case.expect.values_mut() {
            *v += 10.0;
        }
    }
    let tampered = parse(pack(&demo_bytes(), Some(honest.params()), Some(&checks)).unwrap()).unwrap();

    let err = Model::load(&runtime, tampered.clone()).unwrap_err();
    let LoadError::ChecksFailed { report } = &err else { panic!("loaded with failing checks: {err}") };
    assert_eq!((report.passed, report.cases), (1, n));
    assert!(
        err.to_string().starts_with(&format!("{} of {n} checks the artifact carries fail; first: case 1: ", n - 1)),
        "{err}"
    );

    let skip = ModelOptions { skip_carried_checks: true, ..ModelOptions::default() };
    let model = Model::load_with(&runtime, tampered, skip).unwrap();
    assert!(model.carried_checks().is_none());

    let model = Model::load(&runtime, honest).unwrap();
    let report = model.carried_checks().expect("the load ran the carried checks");
    assert!(report.ok() && report.cases == n, "{report:?}");
}
