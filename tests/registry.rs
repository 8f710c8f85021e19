//! The registry: a store of versions, routes, hot swap behind a gate, the
//! code cache and the usage ledger.
//!
//! The models here are lines `y = slope·x + intercept` packed from the
//! generic linear guest, so every answer says by its value alone which
//! bytes produced it.

use std::collections::BTreeMap;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use paddock_host::{
    Artifact, Digest, LimitHit, Limits, ModelOptions, Row, Runtime, TrustError, TrustPolicy, VouchingKey,
};
use paddock_serve::registry::{ArtifactState, GateStep, LimitsState, ManualClock, Refusal, RoutesState, artifact_path};
use paddock_serve::{Registry, RegistryError, RegistryOptions, Request, RequestContext, RequestError};
use paddock_tests::{line_artifact, write_atomically};
use semver::Version;

fn put(store: &Path, model: &str, version: &str, bytes: &[u8]) -> Digest {
    write_atomically(&artifact_path(store, model, &Version::parse(version).unwrap()), bytes);
    Digest::of(bytes)
}

fn routes(store: &Path, text: &str) {
    write_atomically(&store.join("routes.toml"), text.as_bytes());
}

fn ctx(pairs: &[(&str, &str)]) -> RequestContext {
    pairs.iter().map(|(k, v)| ((*k).to_owned(), (*v).to_owned())).collect()
}

fn x(v: f64) -> Vec<Row> {
    vec![Row::new().with("x", v)]
}

/// Scores one row; returns (version, route, value).
fn ask(reg: &Registry, model: &str, context: &RequestContext, at: Option<&str>, xv: f64) -> (String, String, f64) {
    let rows = x(xv);
    let at = at.map(|t| t.parse().unwrap());
    let a = reg.score(&Request::new(model, context, &rows).at(at)).unwrap_or_else(|e| panic!("{e}"));
    (a.version.to_string(), a.reason.route().to_owned(), a.estimates.values_at(0)[0])
}

/// A registry whose models have minute-long deadlines: a machine busy
/// with other builds must not make a call late.
fn open(store: &Path) -> Registry {
    let options = RegistryOptions { model: paddock_tests::unhurried(), ..RegistryOptions::default() };
    Registry::open(&Runtime::new().unwrap(), store, options).unwrap()
}

#[test]
fn swap_under_load_a_hundred_times_without_a_failed_request() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    // Every byte variant written, by digest: its line, to check each answer.
    let lines: Arc<Mutex<BTreeMap<Digest, (f64, f64)>>> = Arc::default();
    let write = |version: &str, slope: f64, intercept: f64| {
        let d = put(store, "m", version, &line_artifact("m", version, slope, intercept, Some(true)));
        lines.lock().unwrap().insert(d, (slope, intercept));
        d
    };
    write("1.0.0", 1.0, 0.0);
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n");
    let reg = open(store);

    // What each generation must answer, for the two contexts the scorers use:
    // generation → (version for `south`, version for `north`).
    let expected: Arc<Mutex<BTreeMap<u64, (String, String)>>> = Arc::default();
    expected.lock().unwrap().insert(reg.generation(), ("1.0.0".into(), "1.0.0".into()));
    let stop = Arc::new(AtomicBool::new(false));
    let scorers: Vec<_> = (0..2)
        .map(|t| {
            let (reg, stop) = (reg.clone(), stop.clone());
            std::thread::spawn(move || {
                let contexts = [ctx(&[("region", "south")]), ctx(&[("region", "north")])];
                // Kept for checking: every failure, every first answer of a
                // generation, and one in 16 of the rest (to bound memory).
                let mut seen = Vec::new();
                let (mut i, mut last_generation) = (0usize, 0);
                while !stop.load(Ordering::Relaxed) {
                    let c = &contexts[(i + t) % 2];
                    let xv = (i % 7) as f64;
                    let rows = x(xv);
                    let a = reg.score(&Request::new("m", c, &rows));
                    let keep = a.as_ref().map_or(true, |a| a.generation != last_generation || i % 16 == 0);
                    if keep {
                        last_generation = a.as_ref().map_or(last_generation, |a| a.generation);
                        seen.push(a.map(|a| {
                            (
                                a.generation,
                                (i + t) % 2,
                                a.version.to_string(),
                                a.digest,
                                xv,
                                a.estimates.values_at(0)[0],
                            )
                        }));
                    }
                    i += 1;
                }
                (i, seen)
            })
        })
        .collect();

    let mut versions = vec!["1.0.0".to_owned()];
    let mut north = "1.0.0".to_owned();
    for step in 1..=100u32 {
        let default = versions.last().unwrap().clone();
        match step % 4 {
            // A new version becomes the default.
            0 | 1 => {
                let v = format!("1.{step}.0");
                write(&v, f64::from(step), 0.0);
                versions.push(v.clone());
                routes(
                    store,
                    &format!(
                        "[models.m]\ndefault = \"{v}\"\n[[models.m.rules]]\nname = \"north\"\nversion = \"{north}\"\ncontext = {{ region = \"north\" }}\n"
                    ),
                );
            }
            // The routes change: north moves to the default.
            2 => {
                north = default.clone();
                routes(
                    store,
                    &format!(
                        "[models.m]\ndefault = \"{default}\"\n[[models.m.rules]]\nname = \"north\"\nversion = \"{north}\"\ncontext = {{ region = \"north\" }}\n"
                    ),
                );
            }
            // The default's artifact is replaced by new bytes (same version).
            _ => {
                write(&default, f64::from(step), 1.0);
            }
        }
        // Versions nobody routes to any more are deleted.
        for v in &versions[..versions.len().saturating_sub(1)] {
            if *v != north {
                let _ = std::fs::remove_file(artifact_path(store, "m", &Version::parse(v).unwrap()));
            }
        }
        let report = reg.reload().unwrap();
        assert!(report.changed && report.refused.is_empty(), "step {step}: {report:?}");
        let south = versions.last().unwrap().clone();
        expected.lock().unwrap().insert(report.generation, (south, north.clone()));
        std::thread::sleep(Duration::from_millis(2));
    }
    stop.store(true, Ordering::Relaxed);

    let expected = expected.lock().unwrap();
    let lines = lines.lock().unwrap();
    let (mut answers, mut checked) = (0, 0);
    let mut generations = std::collections::BTreeSet::new();
    for scorer in scorers {
        let (total, kept) = scorer.join().unwrap();
        answers += total;
        for answer in kept {
            let (generation, which, version, digest, xv, y) =
                answer.unwrap_or_else(|e| panic!("a request failed: {e}"));
            let (south, north) = &expected[&generation];
            let want = if which == 0 { south } else { north };
            assert_eq!(&version, want, "generation {generation}");
            let (slope, intercept) = lines[&digest];
            assert_eq!(y, slope * xv + intercept, "answer from {version} {digest}");
            checked += 1;
            generations.insert(generation);
        }
    }
    let status = reg.status();
    assert!(answers > 1000, "only {answers} answers");
    // Requests ran across many generations, not just the first and last.
    assert!(generations.len() > 20, "answers came from {} generations", generations.len());
    assert!(status.problems().all(|a| a.state == ArtifactState::KeptAfterRemoval), "{status:#?}");
    eprintln!(
        "{answers} answers ({checked} checked one by one) across {} of 101 generations, zero failures",
        generations.len()
    );
}

#[test]
fn time_windows_follow_the_injected_clock_or_the_requests_own_time() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, None));
    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, None));
    routes(
        store,
        "zone = \"Europe/Oslo\"\n[models.m]\ndefault = \"1.0.0\"\n[[models.m.rules]]\nname = \"weekend\"\nversion = \"2.0.0\"\ndays = \"sat-sun\"\n",
    );
    // Friday 2026-12-04 22:59 UTC is 23:59 in Oslo (CET, UTC+1).
    let clock = Arc::new(ManualClock::new("2026-12-04T22:59:00Z".parse().unwrap()));
    let options = RegistryOptions { clock: clock.clone(), ..RegistryOptions::default() };
    let reg = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    let none = RequestContext::new();
    assert_eq!(ask(&reg, "m", &none, None, 3.0), ("1.0.0".into(), "default".into(), 3.0));
    clock.set("2026-12-04T23:00:00Z".parse().unwrap()); // Saturday 00:00 in Oslo
    assert_eq!(ask(&reg, "m", &none, None, 3.0), ("2.0.0".into(), "weekend".into(), 6.0));
    // A request's own timestamp wins over the clock: Monday 00:00 in Oslo.
    assert_eq!(ask(&reg, "m", &none, Some("2026-12-06T23:00:00Z"), 3.0).0, "1.0.0");
}

#[test]
fn a_shadow_records_how_far_a_different_candidate_is_from_the_served_answers() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 2.0, 1.0, None));
    // The candidate differs by exactly |x|: y = 3x + 1.
    put(store, "m", "1.1.0-rc.1", &line_artifact("m", "1.1.0-rc.1", 3.0, 1.0, None));
    // A second model with its own shadow, asked in turn with `m`: each
    // shadow samples its own model's requests, however they interleave.
    put(store, "k", "1.0.0", &line_artifact("k", "1.0.0", 1.0, 0.0, None));
    routes(
        store,
        "[models.m]\ndefault = \"1.0.0\"\n[models.m.shadow]\nversion = \"1.1.0-rc.1\"\nsample = 0.5\ntolerance = 10.0\n\
         [models.k]\ndefault = \"1.0.0\"\n[models.k.shadow]\nversion = \"1.0.0\"\nsample = 0.5\n",
    );
    let reg = open(store);
    for i in 0..200 {
        // x = 0..99, each twice in a row; the sample takes every other request.
        let (version, _, y) = ask(&reg, "m", &RequestContext::new(), None, f64::from(i / 2));
        assert_eq!((version.as_str(), y), ("1.0.0", 2.0 * f64::from(i / 2) + 1.0));
        ask(&reg, "k", &RequestContext::new(), None, 1.0);
    }
    assert!(reg.drain_shadows(Duration::from_secs(30)));
    let usage = reg.usage();
    // A version compared with itself never differs.
    let k = usage.shadows.iter().find(|s| s.model == "k").unwrap();
    assert_eq!((k.compared, k.max_abs_diff, k.over_tolerance), (100, 0.0, 0), "{k:?}");
    let shadow = usage.shadows.iter().find(|s| s.model == "m").unwrap();
    assert_eq!((shadow.model.as_str(), shadow.version.to_string().as_str()), ("m", "1.1.0-rc.1"));
    // Exactly half sampled: one request per x in 0..100.
    assert_eq!((shadow.compared, shadow.values, shadow.dropped), (100, 100, 0), "{shadow:?}");
    assert_eq!(shadow.max_abs_diff, 99.0);
    // |x| > 10 for x = 11..=99.
    assert_eq!(shadow.over_tolerance, 89);
    // The shadow's own calls are in its ledger; the served version's too.
    let by_version: BTreeMap<_, _> =
        usage.versions.iter().filter(|v| v.model == "m").map(|v| (v.version.to_string(), v)).collect();
    assert_eq!((by_version["1.0.0"].calls, by_version["1.1.0-rc.1"].calls), (200, 100));
}

/// A store serving `m` 1.0.0 (y = x) by default; returns the registry.
fn serving_one(store: &Path, options: RegistryOptions) -> Registry {
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, Some(true)));
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n");
    let reg = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);
    reg
}

fn route_default_to(store: &Path, version: &str) {
    routes(store, &format!("[models.m]\ndefault = \"{version}\"\n"));
}

fn refused(reg: &Registry, path: &str) -> Refusal {
    let status = reg.status();
    let a =
        status.artifacts.iter().find(|a| a.path == Path::new(path)).unwrap_or_else(|| panic!("{path} in {status:#?}"));
    match &a.state {
        ArtifactState::Refused { refusal } | ArtifactState::KeptAfterRefusal { refusal, .. } => refusal.clone(),
        other => panic!("{path} was not refused: {other:?}"),
    }
}

fn refusal_of(reg: &Registry, path: &str) -> (GateStep, String) {
    let refusal = refused(reg, path);
    (refusal.step(), refusal.reason())
}

#[test]
fn an_artifact_failing_its_checks_is_refused_and_the_old_state_keeps_serving() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(false)));
    route_default_to(store, "2.0.0");
    let report = reg.reload().unwrap();
    assert_eq!(report.refused.len(), 1, "{report:?}");
    let (stage, reason) = refusal_of(&reg, "m/2.0.0.wasm");
    assert_eq!(stage, GateStep::Checks);
    assert!(reason.contains("3 of 3 checks failed") && reason.contains("expected 1"), "{reason}");
    // The routes name a refused version, so they are refused too.
    let RoutesState::Refused { problems } = reg.status().routes else { panic!("routes accepted") };
    assert!(problems[0].contains("version 2.0.0 (used by default) is not loaded"), "{problems:?}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0), ("1.0.0".into(), "default".into(), 5.0));

    // New bytes for the serving version that fail their checks: the old bytes keep serving.
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 7.0, 0.0, Some(false)));
    reg.reload().unwrap();
    let status = reg.status();
    let a = status.artifacts.iter().find(|a| a.path == Path::new("m/1.0.0.wasm")).unwrap();
    assert!(matches!(a.state, ArtifactState::KeptAfterRefusal { .. }), "{a:?}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);
}

#[test]
fn a_vouch_that_does_not_admit_is_refused_and_the_old_state_keeps_serving() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let trusted = VouchingKey::generate("release").unwrap();
    let stranger = VouchingKey::generate("stranger").unwrap();
    let policy = TrustPolicy { trusted: vec![trusted.voucher()], pinned: vec![], required: true };
    let options = RegistryOptions { trust: policy, ..RegistryOptions::default() };
    let one = line_artifact("m", "1.0.0", 1.0, 0.0, Some(true));
    let path = artifact_path(store, "m", &Version::new(1, 0, 0));
    write_atomically(&paddock_host::Vouch::path_for(&path), trusted.vouch(Digest::of(&one)).to_text().as_bytes());
    let reg = serving_one(store, options);
    assert_eq!(
        reg.status().artifacts[0].admission,
        Some(paddock_host::Admission::Vouch { voucher: trusted.voucher().id(), name: "release".into() })
    );

    // Vouched for by a voucher the host does not trust.
    let two = line_artifact("m", "2.0.0", 2.0, 0.0, Some(true));
    let d2 = put(store, "m", "2.0.0", &two);
    let path2 = artifact_path(store, "m", &Version::new(2, 0, 0));
    write_atomically(&paddock_host::Vouch::path_for(&path2), stranger.vouch(d2).to_text().as_bytes());
    // Vouched for by the trusted voucher, but over other bytes.
    let three = line_artifact("m", "3.0.0", 3.0, 0.0, Some(true));
    put(store, "m", "3.0.0", &three);
    let path3 = artifact_path(store, "m", &Version::new(3, 0, 0));
    write_atomically(&paddock_host::Vouch::path_for(&path3), trusted.vouch(Digest::of(&two)).to_text().as_bytes());
    route_default_to(store, "2.0.0");
    reg.reload().unwrap();
    let (stage, reason) = refusal_of(&reg, "m/2.0.0.wasm");
    assert_eq!(stage, GateStep::Trust);
    assert!(reason.contains(&stranger.voucher().id()), "{reason}");
    // The cause is typed; its text is in the message, once (not again as a source).
    let refusal = refused(&reg, "m/2.0.0.wasm");
    let Refusal::Trust(cause) = &refusal else { panic!("{refusal:?}") };
    assert!(matches!(**cause, TrustError::UnknownVoucher { .. }), "{refusal:?}");
    assert_eq!(refusal.to_string().matches(&cause.to_string()).count(), 1, "{refusal}");
    assert!(std::error::Error::source(&refusal).is_none());
    let (stage, reason) = refusal_of(&reg, "m/3.0.0.wasm");
    assert_eq!(stage, GateStep::Trust);
    assert!(
        matches!(&refused(&reg, "m/3.0.0.wasm"), Refusal::Trust(e) if matches!(**e, TrustError::DigestMismatch { .. }))
    );
    assert!(reason.contains(&Digest::of(&three).to_string()), "{reason}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0), ("1.0.0".into(), "default".into(), 5.0));
}

#[test]
fn a_contract_version_that_differs_from_the_file_name_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    // Claims 1.0.0 inside, sits at 2.0.0.
    put(store, "m", "2.0.0", &line_artifact("m", "1.0.0", 2.0, 0.0, Some(true)));
    // Another model's artifact in m's directory.
    put(store, "m", "3.0.0", &line_artifact("other", "3.0.0", 2.0, 0.0, Some(true)));
    std::fs::write(store.join("m/latest.wasm"), b"not even wasm").unwrap();
    route_default_to(store, "2.0.0");
    reg.reload().unwrap();
    let (stage, reason) = refusal_of(&reg, "m/2.0.0.wasm");
    assert_eq!(stage, GateStep::Identity);
    assert!(reason.contains("the contract says m 1.0.0, but the file is at m/2.0.0.wasm"), "{reason}");
    assert_eq!(refusal_of(&reg, "m/3.0.0.wasm").0, GateStep::Identity);
    let (stage, reason) = refusal_of(&reg, "m/latest.wasm");
    assert_eq!(stage, GateStep::Layout);
    assert!(reason.contains("`latest.wasm` is not `<semver>.wasm`"), "{reason}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0), ("1.0.0".into(), "default".into(), 5.0));
}

#[test]
fn a_broken_routes_file_is_refused_whole_and_the_old_routes_keep_serving() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(true)));
    // One good change and one bad rule: nothing of it is taken.
    routes(
        store,
        "[models.m]\ndefault = \"2.0.0\"\n[[models.m.rules]]\nname = \"late\"\nversion = \"2.0.0\"\nhours = \"18:00-30:00\"\n",
    );
    let report = reg.reload().unwrap();
    assert!(report.routes_refused[0].contains("rule 1 (`late`): hours `18:00-30:00`"), "{report:?}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0), ("1.0.0".into(), "default".into(), 5.0));
    // Not TOML at all.
    routes(store, "[models.m\n");
    reg.reload().unwrap();
    let RoutesState::Refused { problems } = reg.status().routes else { panic!("routes accepted") };
    assert!(problems[0].contains("line 1"), "{problems:?}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).0, "1.0.0");
    // Fixed: taken.
    route_default_to(store, "2.0.0");
    reg.reload().unwrap();
    assert_eq!(reg.status().routes, RoutesState::Accepted);
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).0, "2.0.0");
}

#[test]
fn removing_an_artifact_the_routes_use_is_refused_until_they_stop() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    std::fs::remove_file(artifact_path(store, "m", &Version::new(1, 0, 0))).unwrap();
    reg.reload().unwrap();
    let status = reg.status();
    assert_eq!(status.artifacts[0].state, ArtifactState::KeptAfterRemoval);
    assert_eq!(status.artifacts[0].used_by, vec!["default".to_owned()]);
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);

    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(true)));
    route_default_to(store, "2.0.0");
    let report = reg.reload().unwrap();
    assert_eq!(report.unloaded, vec!["m 1.0.0".to_owned()]);
    assert_eq!(reg.status().artifacts.len(), 1);
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 10.0);
}

#[test]
fn unknown_models_and_unrouted_versions_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    put(store, "n", "1.0.0", &line_artifact("n", "1.0.0", 1.0, 0.0, None));
    reg.reload().unwrap();
    assert_eq!(reg.status().unrouted, vec!["n".to_owned()]);
    let rows = x(1.0);
    // Loaded but not routed: said so, with why, not "no model".
    let err = reg.score(&Request::new("n", &RequestContext::new(), &rows)).unwrap_err();
    let why = "routes.toml has no [models.n] table".to_owned();
    assert_eq!(err, RequestError::NotRouted { model: "n".into(), loaded: vec![Version::new(1, 0, 0)], why });
    assert_eq!(err.to_string(), "model `n` is loaded (1.0.0) but not routed: routes.toml has no [models.n] table");
    assert_eq!(err.kind(), "not_routed");
    let err = reg.score(&Request::new("o", &RequestContext::new(), &rows)).unwrap_err();
    assert_eq!(err, RequestError::UnknownModel { model: "o".into(), served: vec!["m".into()] });
    assert_eq!(err.to_string(), "no model `o` is served (served: m)");
}

/// Limits per model and per version, from code: a version's own options
/// win over its model's, which win over the registry's; the spinning model
/// is stopped at its own deadline, named in the error.
#[test]
fn models_and_versions_load_with_limits_of_their_own() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, Some(true)));
    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(true)));
    put(store, "n", "1.0.0", &line_artifact("n", "1.0.0", 3.0, 0.0, Some(true)));
    let spin = paddock_host::pack(&paddock_tests::fixture("affine.wat"), Some(&[1]), None).unwrap();
    put(store, "affine", "1.0.0", &spin);
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n[models.affine]\ndefault = \"1.0.0\"\n");
    let with_deadline = |ms| ModelOptions {
        limits: Limits { deadline: Duration::from_millis(ms), ..Limits::default() },
        ..ModelOptions::default()
    };
    let options = RegistryOptions {
        per_model: [("m".to_owned(), with_deadline(30)), ("affine".to_owned(), with_deadline(10))].into(),
        per_version: [(("m".to_owned(), Version::new(2, 0, 0)), with_deadline(40))].into(),
        ..RegistryOptions::default()
    };
    let reg = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    let deadline =
        |model: &str, version| reg.model(model, &Version::parse(version).unwrap()).unwrap().options().limits.deadline;
    assert_eq!(deadline("m", "1.0.0"), Duration::from_millis(30));
    assert_eq!(deadline("m", "2.0.0"), Duration::from_millis(40));
    assert_eq!(deadline("n", "1.0.0"), Limits::default().deadline);
    let err = reg.score(&Request::new("affine", &RequestContext::new(), &[Row::new().with("x", 1.0)])).unwrap_err();
    let RequestError::Score { error, .. } = &err else { panic!("{err}") };
    assert_eq!(error.limit(), Some(&LimitHit::Deadline { limit: Duration::from_millis(10) }), "{err}");
}

/// Limits from the store (`limits.toml`, beside the routes) go over the
/// code's: a change gates the version again under the new limits; a file
/// that names an impossible limit is refused whole, naming it, and the
/// limits last taken stay.
#[test]
fn the_stores_limits_file_goes_over_the_codes_and_a_bad_one_keeps_the_last() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, Some(true)));
    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(true)));
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n");
    let limits = |text: &str| write_atomically(&store.join("limits.toml"), text.as_bytes());
    limits("[models.m]\ndeadline_ms = 30\n[versions.m.\"2.0.0\"]\ndeadline_ms = 40\n");
    let reg = open(store);
    let deadline = |version| reg.model("m", &Version::parse(version).unwrap()).unwrap().options().limits.deadline;
    assert_eq!(reg.status().limits, LimitsState::Accepted);
    assert_eq!((deadline("1.0.0"), deadline("2.0.0")), (Duration::from_millis(30), Duration::from_millis(40)));

    limits("[models.m]\ndeadline_ms = 25\n");
    let report = reg.reload().unwrap();
    assert!(report.changed, "{report:?}");
    assert_eq!((deadline("1.0.0"), deadline("2.0.0")), (Duration::from_millis(25), Duration::from_millis(25)));

    limits("[models.m]\ndeadline_ms = 0\n");
    let report = reg.reload().unwrap();
    assert_eq!(report.limits_refused.len(), 1, "{report:?}");
    assert!(report.limits_refused[0].starts_with("limits.toml: models.m: deadline is 0s"), "{report:?}");
    assert!(matches!(reg.status().limits, LimitsState::Refused { .. }), "{:?}", reg.status().limits);
    assert_eq!(deadline("1.0.0"), Duration::from_millis(25));
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);
}

#[test]
fn the_ledger_counts_calls_rows_errors_and_limit_hits_per_version() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    // The hand-written affine fixture, mode 1: `score` spins forever.
    let spin = paddock_host::pack(&paddock_tests::fixture("affine.wat"), Some(&[1]), None).unwrap();
    put(store, "affine", "1.0.0", &spin);
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n[models.affine]\ndefault = \"1.0.0\"\n");
    reg.reload().unwrap();
    let none = RequestContext::new();
    let three: Vec<Row> = (0..3).map(|i| Row::new().with("x", f64::from(i))).collect();
    reg.score(&Request::new("m", &none, &three)).unwrap();
    let bad = vec![Row::new().with("x", "seven")];
    let err = reg.score(&Request::new("m", &none, &bad)).unwrap_err();
    assert_eq!(err.kind(), "invalid_rows");
    let err = reg.score(&Request::new("affine", &none, &x(1.0))).unwrap_err();
    assert_eq!(err.kind(), "limit", "{err}");

    let usage = reg.usage();
    let m = usage.versions.iter().find(|v| v.model == "m").unwrap();
    // serving_one scored one row before this test's calls. The invalid row
    // is the request's fault: refused, not a call or an error of m.
    assert_eq!((m.calls, m.rows), (2, 4));
    assert!(m.errors.is_empty(), "{m:?}");
    assert_eq!(m.refused_rows, [("invalid_rows".to_owned(), 1)].into_iter().collect());
    assert!(m.wall_us.p50 > 0.0 && m.wall_us.max >= m.wall_us.p99 && m.wall_us.p99 >= m.wall_us.p50, "{m:?}");
    assert!(m.peak_memory_bytes > 0);
    let a = usage.versions.iter().find(|v| v.model == "affine").unwrap();
    assert_eq!(a.limit_hits, [("deadline".to_owned(), 1)].into_iter().collect());
    // The deadline is 50 ms by default; the call took at least that.
    assert!(a.wall_us.max >= 50_000.0, "{a:?}");
    let saved = reg.save_usage().unwrap();
    let back: paddock_serve::registry::SavedUsage = serde_json::from_slice(&std::fs::read(saved).unwrap()).unwrap();
    assert_eq!(back.usage, usage);
}

#[test]
fn usage_accumulates_across_restarts_and_one_process_holds_a_state_directory() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let none = RequestContext::new();
    let reg = serving_one(store, RegistryOptions::default());
    // A second registry on the same state directory is refused, naming the holder.
    let err = Registry::open(&Runtime::new().unwrap(), store, RegistryOptions::default()).unwrap_err();
    let text = err.to_string();
    let setting = "`RegistryOptions::state_dir`";
    assert!(text.contains(&format!("process {}", std::process::id())) && text.contains(setting), "{text}");
    // One that keeps no usage may look at the store beside it.
    let look = RegistryOptions { usage_flush: None, ..RegistryOptions::default() };
    let side = Registry::open(&Runtime::new().unwrap(), store, look).unwrap();
    assert!(side.save_usage().is_err(), "a registry without a usage file must not overwrite it");
    drop(side);
    for _ in 0..4 {
        reg.score(&Request::new("m", &none, &x(2.0))).unwrap();
    }
    // Dropped: the ledger is written and the lock given back.
    drop(reg);
    let reg = open(store);
    reg.score(&Request::new("m", &none, &x(3.0))).unwrap();
    let m = reg.usage().versions.into_iter().find(|v| v.model == "m").unwrap();
    // serving_one's own call, four, then one after the restart.
    assert_eq!((m.calls, m.rows), (6, 6));
    assert_eq!(m.wall_us.buckets.last().copied(), Some(6), "the histogram carried over: {:?}", m.wall_us);
    drop(reg);

    // The store copied whole (as `cp -r` does), state directory and all: a
    // registry on the copy is refused, not started at the other's figures.
    let copy = tempfile::tempdir().unwrap();
    copy_tree(store, copy.path());
    let err = Registry::open(&Runtime::new().unwrap(), copy.path(), RegistryOptions::default()).unwrap_err();
    assert!(matches!(err, RegistryError::ForeignState { .. }), "{err}");
    let text = err.to_string();
    let original = std::fs::canonicalize(store).unwrap();
    assert!(text.contains(&format!("holds the usage of store {}", original.display())), "{text}");
    assert!(text.contains(setting), "{text}");
    // Its own state directory beside it serves, from zero.
    let own = RegistryOptions { state_dir: Some(copy.path().join("own-state")), ..RegistryOptions::default() };
    let reg = Registry::open(&Runtime::new().unwrap(), copy.path(), own).unwrap();
    assert!(reg.usage().versions.iter().all(|v| v.calls == 0), "{:?}", reg.usage());
}

/// `cp -r from/. to/`.
fn copy_tree(from: &Path, to: &Path) {
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            std::fs::create_dir_all(&target).unwrap();
            copy_tree(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), target).unwrap();
        }
    }
}

#[test]
fn a_reload_that_changes_nothing_keeps_its_generation() {
    for with_routes in [false, true] {
        let dir = tempfile::tempdir().unwrap();
        let store = dir.path();
        put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, None));
        if with_routes {
            routes(store, "[models.m]\ndefault = \"1.0.0\"\n");
        }
        let reg = open(store);
        let generation = reg.generation();
        for _ in 0..3 {
            let report = reg.reload().unwrap();
            assert!(!report.changed, "routes file: {with_routes}: {report:?}");
            assert_eq!(report.generation, generation);
        }
        assert_eq!(reg.generation(), generation);
        // A real change still makes one.
        put(store, "m", "1.1.0", &line_artifact("m", "1.1.0", 1.0, 0.0, None));
        assert_eq!(reg.reload().unwrap().generation, generation + 1);
    }
}

#[test]
fn an_unreadable_usage_file_is_kept_aside_not_overwritten() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let state = store.join(paddock_serve::registry::STATE_DIR);
    std::fs::create_dir_all(&state).unwrap();
    std::fs::write(state.join("usage.json"), b"{ half a file").unwrap();
    let reg = serving_one(store, RegistryOptions::default());
    assert_eq!(std::fs::read(state.join("usage.json.unreadable")).unwrap(), b"{ half a file");
    let m = reg.usage().versions.into_iter().find(|v| v.model == "m").unwrap();
    assert_eq!(m.calls, 1);
}

#[test]
fn a_restart_takes_compiled_code_from_the_cache_and_drops_a_damaged_entry() {
    use paddock_host::CodeSource;
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    assert_eq!(reg.status().artifacts[0].code, Some(CodeSource::CompiledAndCached));
    drop(reg);
    let reg = open(store);
    assert_eq!(reg.status().artifacts[0].code, Some(CodeSource::Cache));
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);
    drop(reg);

    // Flip one byte of the entry (written anew, as an edit would be: an
    // entry is never changed in place while mapped): its checksum no
    // longer holds.
    let runtime = Runtime::new().unwrap();
    let cache = paddock_host::CodeCache::open(&store.join(".paddock/code")).unwrap();
    let bytes = std::fs::read(artifact_path(store, "m", &Version::new(1, 0, 0))).unwrap();
    let entry = cache.entry_path(&runtime, &Artifact::from_bytes(bytes, u64::MAX).unwrap());
    let mut code = std::fs::read(&entry).unwrap();
    let mid = code.len() / 2;
    code[mid] ^= 0x40;
    paddock_tests::write_atomically(&entry, &code);
    // The next open drops the entry, saying why, compiles again and serves.
    let dropped_and_remade = |why: &str| {
        let reg = open(store);
        let Some(CodeSource::CompiledCacheFailed { reason }) = &reg.status().artifacts[0].code else {
            panic!("{:?}", reg.status().artifacts[0].code)
        };
        assert!(reason.contains(why), "{reason}");
        assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);
    };
    dropped_and_remade("checksum does not match");
    assert_eq!(open(store).status().artifacts[0].code, Some(CodeSource::Cache));

    // An entry whose checksum is lost is not trusted either.
    let mut sum = entry.clone().into_os_string();
    sum.push(".sum");
    std::fs::remove_file(&sum).unwrap();
    dropped_and_remade("no checksum beside it");
    assert!(std::path::Path::new(&sum).exists(), "the remade entry has its checksum again");
    assert_eq!(open(store).status().artifacts[0].code, Some(CodeSource::Cache));
}

#[cfg(unix)]
#[test]
fn a_cache_directory_others_may_write_is_refused() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().unwrap();
    let cache = dir.path().join("code");
    std::fs::create_dir(&cache).unwrap();
    std::fs::set_permissions(&cache, std::fs::Permissions::from_mode(0o777)).unwrap();
    let err = paddock_host::CodeCache::open(&cache).unwrap_err();
    assert!(err.to_string().contains("others may write to it (mode 777)"), "{err}");
}

#[test]
fn the_watcher_picks_up_changes_by_event_and_by_rescan() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let reg = serving_one(store, RegistryOptions::default());
    let wait_for = |version: &str| {
        paddock_tests::came_true(Duration::from_secs(20), Duration::from_millis(20), || {
            reg.route("m", &RequestContext::new(), None).is_some_and(|(v, _)| v.to_string() == version)
        })
    };
    {
        // File system events, with an hour between rescans.
        let _watch = reg.watch(Duration::from_millis(50), Duration::from_secs(3600)).unwrap();
        put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(true)));
        route_default_to(store, "2.0.0");
        assert!(wait_for("2.0.0"), "no reload after the store changed: {:#?}", reg.status());
    }
    {
        // Rescans only.
        let _watch = paddock_serve::registry::Watcher::polling(reg.clone(), Duration::from_millis(100)).unwrap();
        route_default_to(store, "1.0.0");
        assert!(wait_for("1.0.0"), "no reload by rescan: {:#?}", reg.status());
    }
}

#[test]
fn with_a_metering_runtime_the_ledger_sums_fuel() {
    use paddock_host::{Limits, ModelOptions, RuntimeConfig};
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, None));
    route_default_to(store, "1.0.0");
    let runtime = Runtime::with_config(RuntimeConfig { fuel: true, ..RuntimeConfig::default() }).unwrap();
    let limits = Limits { fuel: Some(10_000_000), ..Limits::default() };
    let options =
        RegistryOptions { model: ModelOptions { limits, ..ModelOptions::default() }, ..RegistryOptions::default() };
    let reg = Registry::open(&runtime, store, options).unwrap();
    let mut fuel = 0;
    for i in 0..5 {
        let rows = x(f64::from(i));
        let a = reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap();
        fuel += a.estimates.usage().fuel.expect("metered");
    }
    let usage = reg.usage();
    assert!(fuel > 0);
    assert_eq!(usage.versions[0].fuel, Some(fuel));
}

/// Routes are judged model by model: at start, a model whose routes name a
/// version that did not load (here one failing its checks) is not served
/// and is named, while the other model serves; at a reload, such a model
/// keeps the routes it had.
#[test]
fn one_models_broken_routes_leave_the_other_models_serving() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    put(store, "m", "1.0.0", &line_artifact("m", "1.0.0", 1.0, 0.0, Some(true)));
    put(store, "n", "1.0.0", &line_artifact("n", "1.0.0", 2.0, 0.0, Some(false)));
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n[models.n]\ndefault = \"1.0.0\"\n");
    let reg = open(store);
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0), ("1.0.0".into(), "default".into(), 5.0));
    let RoutesState::PartlyTaken { models, problems } = reg.status().routes else {
        panic!("{:?}", reg.status().routes)
    };
    assert_eq!(models, ["n"]);
    assert!(problems[0].contains("model `n`: version 1.0.0 (used by default) is not loaded"), "{problems:?}");
    let e = reg.score(&Request::new("n", &RequestContext::new(), &x(1.0))).unwrap_err();
    assert!(matches!(e, paddock_serve::RequestError::UnknownModel { .. }), "{e}");

    // n is fixed and routed; then m's routes name a version that fails its
    // checks: m keeps the routes it had, n takes its new ones.
    put(store, "n", "1.0.0", &line_artifact("n", "1.0.0", 2.0, 0.0, Some(true)));
    reg.reload().unwrap();
    assert_eq!(reg.status().routes, RoutesState::Accepted);
    put(store, "m", "2.0.0", &line_artifact("m", "2.0.0", 2.0, 0.0, Some(false)));
    put(store, "n", "2.0.0", &line_artifact("n", "2.0.0", 3.0, 0.0, Some(true)));
    routes(store, "[models.m]\ndefault = \"2.0.0\"\n[models.n]\ndefault = \"2.0.0\"\n");
    let report = reg.reload().unwrap();
    assert!(report.routes_refused[0].contains("model `m`: version 2.0.0"), "{report:?}");
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).0, "1.0.0");
    assert_eq!(ask(&reg, "n", &RequestContext::new(), None, 5.0).0, "2.0.0");
    let RoutesState::PartlyTaken { models, .. } = reg.status().routes else { panic!("{:?}", reg.status().routes) };
    assert_eq!(models, ["m"]);
}

/// The store and routes file docs/serving.md shows, served exactly as
/// written (its `routes.toml` block, read from the page), over the demo
/// store's artifacts each with a vouch beside it under a trust policy: every
/// route answers as the page says.
#[test]
fn the_store_docs_serving_md_shows_serves_as_it_says() {
    let page = std::fs::read_to_string(paddock_tests::root().join("docs/serving.md")).unwrap();
    let routes_toml = page
        .split("```toml\n")
        .nth(1)
        .and_then(|rest| rest.split("```").next())
        .expect("docs/serving.md shows a routes.toml");
    let demo = paddock_tests::root().join("target/paddock/store");
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let key = VouchingKey::generate("release").unwrap();
    let trusted = dir.path().join("trusted");
    std::fs::create_dir_all(&trusted).unwrap();
    std::fs::write(trusted.join("release.voucher"), key.voucher().to_text()).unwrap();
    for (model, version) in [
        ("charge-minutes", "1.0.0"),
        ("charge-minutes", "1.1.0"),
        ("charge-minutes", "1.2.0"),
        ("charge-minutes", "2.0.0-rc.1"),
        ("overstay-risk", "1.0.0"),
        ("overstay-risk", "1.1.0"),
    ] {
        let bytes = std::fs::read(demo.join(model).join(format!("{version}.wasm"))).unwrap();
        let path = artifact_path(&store, model, &Version::parse(version).unwrap());
        write_atomically(&path, &bytes);
        let vouch = key.vouch(Digest::of(&bytes));
        std::fs::write(paddock_host::Vouch::path_for(&path), vouch.to_text()).unwrap();
    }
    routes(&store, routes_toml);
    let trust = TrustPolicy::default().trust_dir(&trusted).unwrap();
    let options = RegistryOptions { trust, ..RegistryOptions::default() };
    let reg = Registry::open(&Runtime::new().unwrap(), &store, options).unwrap();
    assert_eq!(reg.status().routes, RoutesState::Accepted);
    assert_eq!(reg.status().problems().count(), 0, "{:#?}", reg.status());

    let session = vec![
        Row::new()
            .with("charger_kw", 22.0)
            .with("battery_kwh", 58.0)
            .with("soc_start", 0.3)
            .with("soc_target", 0.8)
            .with("ambient_c", 12.0)
            .with("hour_of_week", 42)
            .with("connector", "type2")
            .with("fleet", false),
    ];
    let picked = |context: &RequestContext, at: &str| {
        let a = reg.score(&Request::new("charge-minutes", context, &session).at(Some(at.parse().unwrap()))).unwrap();
        (a.version.to_string(), a.reason.route().to_owned())
    };
    // Wednesday noon and Saturday noon in Europe/Oslo (UTC+1 in December).
    let (weekday, saturday) = ("2026-12-02T11:00:00Z", "2026-12-05T11:00:00Z");
    assert_eq!(picked(&RequestContext::new(), weekday), ("1.0.0".into(), "default".into()));
    assert_eq!(picked(&RequestContext::new(), saturday), ("1.1.0".into(), "weekend".into()));
    // The canary takes a tenth of sites, the same sites every time.
    let sites: Vec<String> = (0..200).map(|i| format!("site-{i}")).collect();
    let on_canary: Vec<&String> = sites.iter().filter(|s| picked(&ctx(&[("site", s)]), weekday).0 == "1.2.0").collect();
    assert!(!on_canary.is_empty() && on_canary.len() < 60, "{} of 200 sites on the canary", on_canary.len());
    assert!(on_canary.iter().all(|s| picked(&ctx(&[("site", s)]), saturday).0 == "1.2.0"));
    // The shadow scores beside the served version, its answers counted, never returned.
    paddock_tests::wait_until("the shadow comparing", Duration::from_secs(60), Duration::from_millis(10), || {
        reg.usage().shadows.iter().any(|s| s.version.to_string() == "2.0.0-rc.1" && s.compared > 0)
    });
    // The context rule: the north region's overstay-risk is 1.1.0.
    let plug_in = vec![
        Row::new()
            .with("expected_minutes", 95.0)
            .with("plugin_hour", 18)
            .with("site_occupancy", 0.7)
            .with("weekend", false)
            .with("fleet", false),
    ];
    let overstay = |region: &str| {
        let a = reg.score(&Request::new("overstay-risk", &ctx(&[("region", region)]), &plug_in)).unwrap();
        (a.version.to_string(), a.reason.route().to_owned())
    };
    assert_eq!(overstay("north"), ("1.1.0".into(), "north".into()));
    assert_eq!(overstay("centre"), ("1.0.0".into(), "default".into()));
}

#[test]
fn the_size_cap_is_one_registry_setting_applied_when_a_file_is_read() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let small = line_artifact("m", "1.0.0", 1.0, 0.0, Some(true));
    let big = line_artifact("m", "1.1.0", 1.0, 0.0, Some(true));
    put(store, "m", "1.0.0", &small);
    put(store, "m", "1.1.0", &big);
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n");
    // A cap one byte under the smaller file: each is refused when it is
    // read, naming the cap and its size (there is no second cap in the
    // models' limits to disagree with this one).
    let cap = small.len().min(big.len()) as u64 - 1;
    let options = RegistryOptions { size_cap: cap, usage_flush: None, ..RegistryOptions::default() };
    let reg = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    for (path, file) in [("m/1.0.0.wasm", &small), ("m/1.1.0.wasm", &big)] {
        let refusal = refused(&reg, path);
        assert_eq!(refusal.step(), GateStep::Read, "{refusal:?}");
        assert_eq!(
            refusal.reason(),
            format!("artifact size cap of {cap} bytes exceeded (file has {} bytes)", file.len()),
        );
    }
    // With room for both, both load.
    let room = small.len().max(big.len()) as u64;
    let options = RegistryOptions { size_cap: room, usage_flush: None, ..RegistryOptions::default() };
    let reg = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    assert_eq!(ask(&reg, "m", &RequestContext::new(), None, 5.0).2, 5.0);
    assert!(reg.status().artifacts.iter().all(|a| matches!(a.state, ArtifactState::Loaded)), "{:#?}", reg.status());
}

/// A served version whose artifact carries a training profile counts the
/// rows it serves against it; the registry's status carries the report and
/// `/metrics` the index, per model, version and field. The line's one
/// feature `x` trained half at or below 0 and half above; twenty requests
/// all above 0. By hand, with empty bins counted as 10⁻⁴: (10⁻⁴ − 0.5)·
/// ln(10⁻⁴ / 0.5) + (1 − 0.5)·ln(1 / 0.5) + (10⁻⁴ − 10⁻⁴)·ln 1 ≈ 4.604.
#[test]
fn served_rows_are_counted_against_the_versions_profile() {
    use paddock_host::{Bins, DriftWindow, FieldProfile, Profile};
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let line = line_artifact("m", "1.0.0", 1.0, 0.0, Some(true));
    let field = FieldProfile { bins: Bins::Edges(vec![0.0]), shares: vec![0.5, 0.5, 0.0], summary: None };
    let profile = Profile {
        source: "by hand".into(),
        rows: 2,
        features: [("x".to_owned(), field)].into(),
        outputs: BTreeMap::new(),
    };
    put(store, "m", "1.0.0", &paddock_tests::profiled(&line, &profile));
    routes(store, "[models.m]\ndefault = \"1.0.0\"\n");
    let window = DriftWindow { min_count: 20, ..DriftWindow::default() };
    let options = ModelOptions { drift: Some(window), ..paddock_tests::unhurried() };
    let reg = Registry::open(&Runtime::new().unwrap(), store, RegistryOptions { model: options, ..Default::default() })
        .unwrap();
    let drift = |reg: &Registry| reg.status().artifacts[0].drift.clone().expect("a profile");
    assert_eq!(drift(&reg).summary(), "too few values");
    for i in 0..20 {
        ask(&reg, "m", &RequestContext::new(), None, 1.0 + f64::from(i));
    }
    let report = drift(&reg);
    assert_eq!(report.summary(), "act: x", "{report:?}");
    let e = 1e-4f64;
    let by_hand = (e - 0.5) * (e / 0.5).ln() + 0.5 * 2f64.ln();
    let index = report.fields[0].index.unwrap();
    assert!((index - by_hand).abs() < 1e-12, "{index} against {by_hand}");
    let text = paddock_serve::registry::metrics::render(reg.usage(), &reg.status(), reg.source_usage(), Vec::new());
    let sample = format!("paddock_drift_index{{model=\"m\",version=\"1.0.0\",kind=\"feature\",field=\"x\"}} {index}");
    assert!(text.contains(&sample), "{sample} not in\n{text}");
    assert!(
        text.contains("paddock_drift_values{model=\"m\",version=\"1.0.0\",kind=\"feature\",field=\"x\"} 20"),
        "{text}"
    );
}
