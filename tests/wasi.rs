//! The WASI policy (host/src/sandbox/wasi.rs), probed from inside: a Python model
//! (tests/guests/wasi_probe.py, built by componentize-py) tries the
//! environment, arguments, files, sockets, clocks, randomness, sleeping and
//! printing, and reports what it got.

use std::io::Write;
use std::sync::{Arc, Mutex};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use paddock_host::audit::audit;
use paddock_host::sandbox::wasi::Ambient;
use paddock_host::{
    DEFAULT_SIZE_CAP, LimitHit, Limits, Model, ModelOptions, Row, Runtime, SandboxError, ScoreError, TrustPolicy,
    WasiPolicy,
};
use paddock_tests::{load_foreign, root};

/// The probe's outputs, by name.
fn probe(
    model: &Model,
    sleep_ms: f64,
    print_bytes: f64,
) -> Result<std::collections::BTreeMap<String, f64>, ScoreError> {
    let e = model.score(&[Row::new().with("sleep_ms", sleep_ms).with("print_bytes", print_bytes)])?;
    Ok(model.contract().outputs.iter().map(|o| o.name.clone()).zip(e.values_at(0).iter().copied()).collect())
}

/// The probe under `policy`, with a minute-long deadline: a call to an
/// 18 MB Python guest on a machine busy with other builds must not be late.
fn load(policy: WasiPolicy) -> Model {
    log();
    let limits = Limits { deadline: Duration::from_secs(60), ..Limits::default() };
    load_foreign(
        &Runtime::new().unwrap(),
        "wasi-probe",
        ModelOptions { limits, wasi: Some(policy), ..ModelOptions::default() },
    )
    .unwrap()
}

#[test]
fn the_world_is_empty_no_environment_arguments_files_or_network() {
    let got = probe(&load(WasiPolicy::default()), 0.0, 0.0).unwrap();
    assert_eq!(got["env_vars"], 0.0, "{got:?}");
    assert_eq!(got["args"], 0.0, "{got:?}");
    assert_eq!(got["files"], 0.0, "listing /, reading /etc/passwd and creating a file must all fail: {got:?}");
    assert_eq!(got["network"], 0.0, "a socket to 127.0.0.1 must fail: {got:?}");
}

#[test]
fn fixed_clocks_and_randomness_give_the_same_answer_every_time() {
    let policy = WasiPolicy::default();
    let a = probe(&load(policy.clone()), 0.0, 0.0).unwrap();
    let b = probe(&load(policy.clone()), 0.0, 0.0).unwrap();
    assert_eq!(a["wall_clock"], 1_767_225_600.0, "2026-01-01T00:00:00Z, the default fixed time");
    assert_eq!(a["random"], b["random"], "same seed, same bytes");
    let other = probe(&load(WasiPolicy { seed: 1, fixed_time: 1_800_000_000, ..policy }), 0.0, 0.0).unwrap();
    assert_ne!(a["random"], other["random"], "another seed, other bytes");
    assert_eq!(other["wall_clock"], 1_800_000_000.0);
}

#[test]
fn real_clocks_and_randomness_are_the_hosts() {
    let policy = WasiPolicy { clocks: Ambient::Real, random: Ambient::Real, ..WasiPolicy::default() };
    let a = probe(&load(policy.clone()), 5.0, 0.0).unwrap();
    let b = probe(&load(policy), 0.0, 0.0).unwrap();
    let now = SystemTime::now().duration_since(UNIX_EPOCH).unwrap().as_secs_f64();
    assert!((a["wall_clock"] - now).abs() < 600.0, "model's clock {} vs host's {now}", a["wall_clock"]);
    assert!(a["slept_ms"] >= 5.0, "a real 5 ms sleep moves the real monotonic clock: {}", a["slept_ms"]);
    // Two 32-bit draws from the host's generator collide with chance 2^-32.
    assert_ne!(a["random"], b["random"]);
}

#[test]
fn a_wait_past_the_deadline_stops_the_call_with_the_deadline_limit() {
    log();
    let runtime = Runtime::new().unwrap();
    // Long enough that a busy machine never makes the short sleep below
    // late; the 11-day sleep still ends at it.
    let limits = Limits { deadline: Duration::from_secs(3), ..Limits::default() };
    let options = ModelOptions { limits, wasi: Some(WasiPolicy::default()), ..ModelOptions::default() };
    let model = load_foreign(&runtime, "wasi-probe", options).unwrap();
    // Asks to sleep 11 days: this test ends only if the host stops the
    // wait at the deadline instead of holding the thread.
    match probe(&model, 1e9, 0.0) {
        Err(ScoreError::Sandbox(SandboxError::Limit(LimitHit::Deadline { limit }))) => {
            assert_eq!(limit, Duration::from_secs(3))
        }
        other => panic!("expected the deadline limit, got {other:?}"),
    }
    // A sleep within the deadline is a sleep, and the model keeps serving.
    let got = probe(&model, 5.0, 0.0).unwrap();
    assert_eq!(got["env_vars"], 0.0);
}

/// A log sink for the captured output.
#[derive(Clone, Default)]
struct Sink(Arc<Mutex<Vec<u8>>>);

impl Write for Sink {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.lock().unwrap().extend_from_slice(buf);
        Ok(buf.len())
    }
    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

/// The log of this test binary: one global subscriber, installed before
/// any test loads a model (a per-thread subscriber would miss events whose
/// call site another test's thread reached first).
fn log() -> &'static Sink {
    static LOG: std::sync::OnceLock<Sink> = std::sync::OnceLock::new();
    LOG.get_or_init(|| {
        let sink = Sink::default();
        let writer = sink.clone();
        let subscriber = tracing_subscriber::fmt().with_writer(move || writer.clone()).with_ansi(false).finish();
        tracing::subscriber::set_global_default(subscriber).expect("the only subscriber");
        sink
    })
}

#[test]
fn output_is_captured_into_the_log_up_to_the_cap_and_the_model_never_sees_a_failed_write() {
    let sink = log();
    let model = load(WasiPolicy { output_bytes: 1000, ..WasiPolicy::default() });
    probe(&model, 0.0, 10_000.0).expect("printing past the cap is not an error");
    let log = String::from_utf8(sink.0.lock().unwrap().clone()).unwrap();
    assert!(log.contains("probe: started"), "what init printed is logged: {log}");
    // Only this test prints, and only it sets a 1000-byte cap.
    let line = log.lines().find(|l| l.contains("cap=1000")).expect("the printed bytes are logged");
    assert_eq!(line.matches('x').count(), 1000, "exactly the cap is kept: {line}");
    assert!(line.contains("dropped=9000") && line.contains("cap=1000"), "the rest is counted: {line}");
    assert!(line.contains("model=\"wasi-probe@0.1.0\"") && line.contains("stream=\"stdout\""), "{line}");
}

#[test]
fn the_audit_lists_every_wasi_import_and_what_satisfies_it() {
    log();
    let path = root().join("target/paddock/artifacts/wasi-probe.wasm");
    let with = ModelOptions { wasi: Some(WasiPolicy::default()), ..ModelOptions::default() };
    let report = audit(&path, DEFAULT_SIZE_CAP, &with, &TrustPolicy::default());
    assert!(report.wasi.len() >= 20, "{:?}", report.wasi);
    for w in &report.wasi {
        assert!(w.satisfied_by.is_some(), "{} has no answer", w.interface);
    }
    let find =
        |name: &str| report.wasi.iter().find(|w| w.interface.starts_with(name)).unwrap().satisfied_by.clone().unwrap();
    assert_eq!(find("wasi:filesystem/preopens@"), "no directories");
    assert_eq!(find("wasi:sockets/tcp@"), "every use refused");
    assert!(report.engine.imports_allowed.contains("WASI 0.2.12"), "{}", report.engine.imports_allowed);
    // The only violation left: the probe carries no checks.
    assert_eq!(report.violations.len(), 1, "{:?}", report.violations);
    assert!(report.violations[0].contains("no checks"), "{:?}", report.violations);

    let without = audit(&path, DEFAULT_SIZE_CAP, &ModelOptions::default(), &TrustPolicy::default());
    let named: Vec<&String> =
        without.violations.iter().filter(|v| v.contains("WASI loads only under a WASI policy")).collect();
    assert_eq!(named.len(), without.wasi.len(), "{:?}", without.violations);
    assert!(without.wasi.iter().all(|w| w.satisfied_by.is_none()));
    assert_eq!(without.engine.imports_allowed, "none");
}
