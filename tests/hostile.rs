//! The hostile-model corpus: every file in `tests/hostile/` (except
//! `base.wat`) is a misbehaving model with its expected outcome in its
//! header. Each is packed, loaded and asked to score under tight limits; the
//! outcome — the exact typed error, stage and limit — must match. While each
//! one runs, another thread keeps scoring a well-behaved model and must never
//! fail or stall.
//!
//! Header lines:
//! - `;; expect: OUTCOME` (see `outcome` below for the vocabulary);
//! - `;; what: …` (for people);
//! - `;; kind: component` — the file is a whole component, used as is;
//!   otherwise its text is spliced into `base.wat` at `;; @case`, replacing
//!   the default of every `$hook_…` function it defines;
//! - `;; params-bytes: N` — pack N zero bytes as params.

use std::sync::atomic::{AtomicBool, AtomicU8, Ordering};
use std::time::{Duration, Instant};

use paddock_host::sandbox::StartError;
use paddock_host::{
    Artifact, ArtifactError, Limits, LoadError, Model, ModelOptions, OutputFault, Row, Runtime, SandboxError,
    ScoreError,
};
use paddock_tests::{fixture, hostile_module, root};

/// The limits every hostile model runs under.
fn limits() -> Limits {
    Limits {
        deadline: Duration::from_millis(20),
        init_deadline: Duration::from_millis(100),
        memory_bytes: 4 << 20,
        table_elements: 1000,
        ..Limits::default()
    }
}

struct Case {
    name: String,
    expect: String,
    component: bool,
    params: Vec<u8>,
    text: String,
}

fn header<'a>(text: &'a str, key: &str) -> Option<&'a str> {
    text.lines().find_map(|l| l.strip_prefix(&format!(";; {key}: ")))
}

fn cases() -> Vec<Case> {
    let dir = root().join("tests/hostile");
    let mut cases: Vec<Case> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "wat") && p.file_name().is_some_and(|n| n != "base.wat"))
        .map(|path| {
            let text = std::fs::read_to_string(&path).unwrap();
            let name = path.file_stem().unwrap().to_string_lossy().into_owned();
            let expect = header(&text, "expect").unwrap_or_else(|| panic!("{name}: no `;; expect:` line")).to_owned();
            let params = header(&text, "params-bytes").map_or(vec![], |n| vec![0u8; n.parse().unwrap()]);
            Case { name, expect, component: header(&text, "kind") == Some("component"), params, text }
        })
        .collect();
    cases.sort_by(|a, b| a.name.cmp(&b.name));
    cases
}

fn outcome(runtime: &Runtime, case: &Case) -> String {
    let source = if case.component { case.text.clone() } else { hostile_module(&case.text) };
    let bytes = match paddock_host::pack(source.as_bytes(), Some(&case.params), None) {
        Ok(b) => b,
        Err(ArtifactError::Componentize(_)) => return "pack: componentize".into(),
        Err(e) => return format!("pack: {e}"),
    };
    let artifact = match Artifact::from_bytes(bytes, u64::MAX) {
        Ok(a) => a,
        Err(e) => return format!("artifact: {e}"),
    };
    let options = ModelOptions { limits: limits(), ..ModelOptions::default() };
    let model = match Model::load_with(runtime, artifact, options) {
        Ok(m) => m,
        Err(e) => {
            return match e {
                LoadError::Imports(names) => format!("load: imports {}", names.join(", ")),
                LoadError::WasiImports(names) => format!("load: wasi imports {}", names.join(", ")),
                LoadError::Start(StartError::Sandbox { stage, error }) => format!("load: {stage} {}", sandbox(&error)),
                LoadError::Start(StartError::Refused(_)) => "load: refused".into(),
                LoadError::Contract(c) => {
                    let kinds: Vec<String> = c
                        .problems
                        .iter()
                        .map(|p| serde_json::to_value(p).unwrap()["problem"].as_str().unwrap().to_owned())
                        .collect();
                    format!("load: contract {}", kinds.join(", "))
                }
                LoadError::ContractUnstable => "load: contract_unstable".into(),
                other => format!("load: other {other}"),
            };
        }
    };
    match model.score(&[Row::new().with("x", 1.0), Row::new().with("x", 2.0)]) {
        Ok(e) => format!("ok {:?}", e.values()),
        Err(ScoreError::Sandbox(error)) => format!("score: {}", sandbox(&error)),
        Err(ScoreError::Output(fault)) => format!("score: output {}", output(&fault)),
        Err(other) => format!("score: {}", other.kind()),
    }
}

fn sandbox(error: &SandboxError) -> String {
    match error {
        SandboxError::Limit(hit) => format!("limit {}", hit.name()),
        SandboxError::Trap { .. } => "trap".into(),
        other => format!("other {other}"),
    }
}

fn output(fault: &OutputFault) -> &'static str {
    match fault {
        OutputFault::WrongLength { .. } => "wrong_length",
        OutputFault::NonFinite { .. } => "non_finite",
        OutputFault::OutOfBounds { .. } => "out_of_bounds",
        _ => "other",
    }
}

#[test]
fn the_corpus_is_large_enough() {
    assert!(cases().len() >= 25, "{} hostile cases", cases().len());
}

#[test]
fn every_hostile_model_gets_its_exact_error_while_a_healthy_one_keeps_serving() {
    let runtime = Runtime::new().unwrap();
    let healthy = paddock_tests::load(&runtime, &fixture("affine.wat"), &[], ModelOptions::default());
    // Normal latency first, with nothing hostile running.
    let mut normal: Vec<Duration> = (0..500)
        .map(|_| {
            let started = Instant::now();
            healthy.score(&[Row::new().with("x", 3.0)]).unwrap();
            started.elapsed()
        })
        .collect();
    normal.sort();
    let done = AtomicBool::new(false);
    let mut mismatches = Vec::new();
    let (served, worst) = std::thread::scope(|s| {
        let watcher = s.spawn(|| {
            let (mut served, mut worst) = (0u64, Duration::ZERO);
            while !done.load(Ordering::Relaxed) {
                let started = Instant::now();
                let answer = healthy.score(&[Row::new().with("x", 3.0)]).expect("the healthy model never fails");
                assert_eq!(answer.values(), &[7.0]);
                worst = worst.max(started.elapsed());
                served += 1;
                std::thread::sleep(Duration::from_micros(200));
            }
            (served, worst)
        });
        for case in cases() {
            let got = outcome(&runtime, &case);
            if got != case.expect {
                mismatches.push(format!("{}: expected `{}`, got `{got}`", case.name, case.expect));
            }
        }
        done.store(true, Ordering::Relaxed);
        watcher.join().unwrap()
    });
    assert!(mismatches.is_empty(), "{}", mismatches.join("\n"));
    eprintln!(
        "healthy model: alone p50 {:?}, max {:?}; during the corpus {served} calls, slowest {worst:?}",
        normal[normal.len() / 2],
        normal[normal.len() - 1]
    );
    // Every healthy call during the corpus answered, and exactly; that a
    // spinning model cannot hold it up is shown by ordering in the next test.
    assert!(served > 0);
}

#[test]
fn a_spinning_model_never_holds_up_a_healthy_one_on_another_thread() {
    let runtime = Runtime::new().unwrap();
    let healthy = paddock_tests::load(&runtime, &fixture("affine.wat"), &[], ModelOptions::default());
    let case = cases().into_iter().find(|c| c.name == "score-endless-loop").unwrap();
    let artifact = paddock_tests::packed(hostile_module(&case.text).as_bytes(), &[], None);
    let long = Limits { deadline: Duration::from_secs(5), ..limits() };
    let spinner = Model::load_with(&runtime, artifact, ModelOptions { limits: long, ..Default::default() }).unwrap();
    // 0: not started, 1: the spinning call is under way, 2: it returned.
    let phase = AtomicU8::new(0);
    std::thread::scope(|s| {
        let spin = s.spawn(|| {
            phase.store(1, Ordering::SeqCst);
            let err = spinner.score(&[Row::new().with("x", 1.0)]).unwrap_err();
            phase.store(2, Ordering::SeqCst);
            err
        });
        while phase.load(Ordering::SeqCst) == 0 {
            std::thread::yield_now();
        }
        // Healthy calls that began and ended inside the spinning call.
        let mut inside = 0;
        while inside < 100 && phase.load(Ordering::SeqCst) == 1 {
            assert_eq!(healthy.score(&[Row::new().with("x", 3.0)]).unwrap().values(), &[7.0]);
            if phase.load(Ordering::SeqCst) == 1 {
                inside += 1;
            }
        }
        assert_eq!(inside, 100, "the healthy model answered only {inside} calls while the other spun");
        assert_eq!(spin.join().unwrap().limit().map(|h| h.name()), Some("deadline"));
    });
}

#[test]
fn after_a_hostile_call_the_same_model_starts_clean() {
    // score-endless-loop's instance is discarded at its deadline; the next
    // call runs on a new instance and hits the same limit, not a wedged one.
    let runtime = Runtime::new().unwrap();
    let case = cases().into_iter().find(|c| c.name == "score-endless-loop").unwrap();
    let artifact = paddock_tests::packed(hostile_module(&case.text).as_bytes(), &[], None);
    let model = Model::load_with(&runtime, artifact, ModelOptions { limits: limits(), ..Default::default() }).unwrap();
    for _ in 0..3 {
        let err = model.score(&[Row::new().with("x", 1.0)]).unwrap_err();
        assert_eq!(err.limit().map(|h| h.name()), Some("deadline"));
    }
}
