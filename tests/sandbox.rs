//! The sandbox holds: imports are refused by name, limits stop a model with
//! a typed error naming the limit, a failed instance is never reused, bad
//! answers are faults, and the host keeps serving throughout.

use std::time::Duration;

use paddock_host::contract::schema::OutputFault;
use paddock_host::sandbox::model::Isolation;
use paddock_host::{
    Artifact, LimitHit, Limits, LoadError, Model, ModelOptions, Row, Runtime, RuntimeConfig, SandboxError, ScoreError,
};
use paddock_tests::{demo_artifact, fixture, load};

/// The hand-written fixture with a behaviour byte (see tests/fixtures/affine.wat).
fn affine(runtime: &Runtime, mode: u8, limits: Limits) -> Model {
    load(runtime, &fixture("affine.wat"), &[mode], ModelOptions { limits, ..ModelOptions::default() })
}

fn x(v: f64) -> Vec<Row> {
    vec![Row::new().with("x", v)]
}

#[test]
fn a_component_that_imports_anything_is_refused_naming_each_import() {
    let runtime = Runtime::new().unwrap();
    let wat = r#"(component
        (import "wasi:clocks/wall-clock@0.2.0" (instance))
        (import "phone-home" (func))
    )"#;
    let bytes = wat::parse_str(wat).unwrap();
    let artifact = Artifact::from_bytes(bytes, u64::MAX).unwrap();
    assert_eq!(artifact.imports(), ["wasi:clocks/wall-clock@0.2.0", "phone-home"]);
    let err = Model::load(&runtime, artifact).unwrap_err();
    assert!(matches!(&err, LoadError::Imports(names) if names.len() == 2), "{err:?}");
    assert_eq!(
        err.to_string(),
        "the artifact imports `wasi:clocks/wall-clock@0.2.0`, `phone-home`; a model may import nothing (but WASI, under a WASI policy)"
    );
    // A WASI policy lets the WASI import through, never the other.
    let artifact = Artifact::from_bytes(wat::parse_str(wat).unwrap(), u64::MAX).unwrap();
    let options = ModelOptions { wasi: Some(paddock_host::WasiPolicy::default()), ..ModelOptions::default() };
    match Model::load_with(&runtime, artifact, options) {
        Err(LoadError::Imports(names)) => assert_eq!(names, ["phone-home"]),
        other => panic!("expected `phone-home` refused, got {other:?}"),
    }
}

#[test]
fn a_model_past_its_deadline_gets_the_deadline_error_and_the_host_keeps_serving() {
    let runtime = Runtime::new().unwrap();
    let limits = Limits { deadline: Duration::from_millis(20), ..Limits::default() };
    let spinner = affine(&runtime, 1, limits);
    let healthy = affine(&runtime, 0, Limits::default());
    for _ in 0..2 {
        // It returns at all (the fixture spins forever): the deadline stopped it.
        let err = spinner.score(&x(1.0)).unwrap_err();
        assert_eq!(
            err,
            ScoreError::Sandbox(SandboxError::Limit(LimitHit::Deadline { limit: Duration::from_millis(20) }))
        );
        assert_eq!(err.to_string(), "deadline of 20ms exceeded");
        assert_eq!(healthy.score(&x(2.0)).unwrap().values(), &[5.0]);
    }
}

#[test]
fn a_model_past_its_memory_cap_gets_the_memory_error_and_the_host_keeps_serving() {
    let runtime = Runtime::new().unwrap();
    let cap = 4 << 20;
    let grower = affine(&runtime, 2, Limits { memory_bytes: cap, ..Limits::default() });
    let err = grower.score(&x(1.0)).unwrap_err();
    match err.limit() {
        Some(LimitHit::Memory { limit, requested }) => {
            assert_eq!(*limit, cap);
            assert!(*requested > cap);
        }
        other => panic!("expected the memory limit, got {other:?} from {err:?}"),
    }
    assert!(err.to_string().starts_with("memory cap of 4194304 bytes exceeded"), "{err}");
    assert_eq!(affine(&runtime, 0, Limits::default()).score(&x(0.0)).unwrap().values(), &[1.0]);
}

#[test]
fn a_model_past_its_table_cap_gets_the_table_error() {
    let runtime = Runtime::new().unwrap();
    let grower = affine(&runtime, 6, Limits { table_elements: 1000, ..Limits::default() });
    let err = grower.score(&x(1.0)).unwrap_err();
    assert_eq!(err.limit(), Some(&LimitHit::Table { limit: 1000, requested: 100_001 }), "{err:?}");
    assert_eq!(err.to_string(), "table cap of 1000 elements exceeded (asked for 100001 elements)");
}

#[test]
fn a_model_out_of_fuel_gets_the_fuel_error() {
    let runtime = Runtime::with_config(RuntimeConfig { fuel: true, ..RuntimeConfig::default() }).unwrap();
    let spinner = affine(&runtime, 1, Limits { fuel: Some(100_000), ..Limits::default() });
    let err = spinner.score(&x(1.0)).unwrap_err();
    assert_eq!(err, ScoreError::Sandbox(SandboxError::Limit(LimitHit::Fuel { limit: 100_000 })));
    let metered = affine(&runtime, 0, Limits { fuel: Some(100_000), ..Limits::default() });
    let used = metered.score(&x(1.0)).unwrap().usage().fuel.expect("fuel is metered");
    assert!(used > 0 && used < 100_000, "{used}");
}

#[test]
fn a_declared_contract_that_breaks_the_rules_is_refused_with_every_problem() {
    use paddock_guest::{Bounds, Contract, Feature, Linear, LinearParams, Link, Output, Packaged, encode_params};
    let runtime = Runtime::new().unwrap();
    let contract = Contract {
        name: "twice".into(),
        version: "v2".into(),
        about: String::new(),
        features: vec![Feature::real("a", Bounds::OPEN), Feature::real("a", Bounds::between(1.0, 0.0))],
        outputs: vec![Output::new("y", Bounds::OPEN)],
    };
    let params =
        LinearParams { link: Link::Identity, intercepts: vec![0.0], weights: vec![vec![1.0, 1.0]], impute: vec![] };
    let blob = encode_params(&Packaged::<<Linear as paddock_guest::Evaluate>::Params> { contract, params });
    let err = Model::load(&runtime, paddock_tests::packed(&paddock_tests::guest("paddock-model-linear"), &blob, None))
        .unwrap_err();
    let LoadError::Contract(e) = &err else { panic!("expected a contract error, got {err:?}") };
    assert_eq!(e.problems.len(), 3, "{err}");
    let text = err.to_string();
    assert!(text.contains("version `v2` is not semver"), "{text}");
    assert!(text.contains("feature `a` has bounds that no value can meet"), "{text}");
    assert!(text.contains("feature name `a` is used more than once"), "{text}");
}

#[test]
fn init_refusing_its_params_is_a_load_error_with_the_models_message() {
    use paddock_guest::{Branch, Node, SplitRule, Tree, TreesParams, encode_params};
    let runtime = Runtime::new().unwrap();
    // A split on feature 9 of charge-minutes' 8 features.
    let tree = Tree {
        output: 0,
        nodes: vec![
            Node::Split { feature: 9, threshold: 0.0, left: 1, right: 2, missing: Branch::Left },
            Node::Leaf { value: 1.0 },
            Node::Leaf { value: 2.0 },
        ],
    };
    let params = TreesParams::boosted(8, 0.0, SplitRule::Less, vec![tree]);
    let artifact = paddock_tests::packed(&paddock_tests::guest("charge-minutes"), &encode_params(&params), None);
    let err = Model::load(&runtime, artifact).unwrap_err();
    assert_eq!(
        err.to_string(),
        "the model failed to start: init refused the params: tree 0 node 0: feature 9 but rows have 8"
    );
    // Params that do not decode at all.
    let err = Model::load(&runtime, paddock_tests::packed(&paddock_tests::guest("charge-minutes"), &[0xff; 3], None))
        .unwrap_err();
    assert!(
        err.to_string().starts_with("the model failed to start: init refused the params: params do not decode"),
        "{err}"
    );
}

#[test]
fn a_fuel_limit_without_metering_is_refused_at_load() {
    let runtime = Runtime::new().unwrap();
    let artifact = paddock_tests::packed(&fixture("affine.wat"), &[], None);
    let options = ModelOptions { limits: Limits { fuel: Some(10), ..Limits::default() }, ..ModelOptions::default() };
    let err = Model::load_with(&runtime, artifact, options).unwrap_err();
    assert!(matches!(err, LoadError::Options(_)), "{err:?}");
}

#[test]
fn a_trapped_instance_is_discarded_and_its_state_never_reaches_the_next_call() {
    let runtime = Runtime::new().unwrap();
    // Mode 3 answers with the number of calls its instance has served.
    let counter = affine(&runtime, 3, Limits::default());
    assert_eq!(counter.score(&x(1.0)).unwrap().values(), &[1.0]);
    assert_eq!(counter.score(&x(1.0)).unwrap().values(), &[2.0], "a healthy instance is reused");
    let err = counter.score(&x(-1.0)).unwrap_err();
    assert!(
        matches!(&err, ScoreError::Sandbox(SandboxError::Trap { message }) if message.contains("unreachable")),
        "{err:?}"
    );
    let after = counter.score(&x(1.0)).unwrap();
    assert_eq!(after.values(), &[1.0], "the trapped instance (3 calls) was not reused");
    assert!(after.usage().fresh_instance);
}

#[test]
fn fresh_per_call_isolation_never_reuses_an_instance() {
    let runtime = Runtime::new().unwrap();
    let options = ModelOptions { isolation: Isolation::FreshPerCall, ..ModelOptions::default() };
    let counter = load(&runtime, &fixture("affine.wat"), &[3], options);
    for _ in 0..3 {
        let e = counter.score(&x(1.0)).unwrap();
        assert_eq!(e.values(), &[1.0]);
        assert!(e.usage().fresh_instance);
    }
}

#[test]
fn non_finite_and_short_answers_are_model_faults() {
    let runtime = Runtime::new().unwrap();
    let nan = affine(&runtime, 4, Limits::default());
    let err = nan.score(&x(1.0)).unwrap_err();
    assert!(
        matches!(&err, ScoreError::Output(OutputFault::NonFinite { row: 1, output, value }) if output == "y" && value.is_nan()),
        "{err:?}"
    );
    let err = nan.score(&x(1.0)).unwrap_err();
    assert_eq!(err.to_string(), "the answer breaks the contract: row 1, output `y` = NaN: not a finite number");
    let short = affine(&runtime, 5, Limits::default());
    let err = short.score(&[Row::new().with("x", 1.0), Row::new().with("x", 2.0)]).unwrap_err();
    assert_eq!(err, ScoreError::Output(OutputFault::WrongLength { expected: 2, actual: 1, rows: 2, outputs: 1 }));
}

#[test]
fn invalid_rows_never_enter_the_sandbox_and_every_one_is_named() {
    let runtime = Runtime::new().unwrap();
    let counter = affine(&runtime, 3, Limits::default());
    let rows = vec![Row::new().with("x", 1.0), Row::new().with("x", "one"), Row::new().with("z", 1.0)];
    let ScoreError::InvalidRows { errors } = counter.score(&rows).unwrap_err() else { panic!("expected invalid rows") };
    let text: Vec<String> = errors.iter().map(ToString::to_string).collect();
    assert_eq!(
        text,
        [
            "row 2, feature `x` = \"one\": wrong kind: expected a number",
            "row 3, feature `z` = 1: unknown feature",
            "row 3, feature `x` = absent: required feature is missing",
        ]
    );
    // Nothing was scored: the instance's first call is still to come.
    assert_eq!(counter.score(&x(1.0)).unwrap().values(), &[1.0]);
}

#[test]
fn rows_per_call_cap_is_enforced_before_the_sandbox() {
    let runtime = Runtime::new().unwrap();
    let model = affine(&runtime, 0, Limits { rows_per_call: 2, ..Limits::default() });
    let err = model.score(&vec![Row::new().with("x", 1.0); 3]).unwrap_err();
    assert_eq!(err.to_string(), "rows-per-call cap of 2 exceeded (call has 3 rows)");
}

#[test]
fn an_artifact_over_the_size_cap_is_refused_before_reading() {
    let err = Artifact::read(&demo_artifact("charge-minutes"), 1000).unwrap_err();
    assert!(err.to_string().starts_with("artifact size cap of 1000 bytes exceeded"), "{err}");
    // A sparse file of 1 TiB: reading it, or allocating room for it, would
    // fail or take the machine's memory; refused from its size alone, it
    // is answered at once, naming its size.
    let dir = tempfile::tempdir().unwrap();
    let huge = dir.path().join("huge.wasm");
    std::fs::File::create(&huge).unwrap().set_len(1 << 40).unwrap();
    let err = Artifact::read(&huge, 64 << 20).unwrap_err();
    assert!(err.to_string().contains("1099511627776"), "{err}");
}

#[test]
fn one_model_serves_many_threads_with_the_same_answers() {
    let runtime = Runtime::new().unwrap();
    let model = Model::load(&runtime, Artifact::read(&demo_artifact("charge-minutes"), u64::MAX).unwrap()).unwrap();
    let checks = model.artifact().checks().unwrap().unwrap();
    let rows: Vec<Row> = checks.cases.iter().map(|c| c.row.clone()).collect();
    let expected: Vec<f64> = checks.cases.iter().map(|c| c.expect["minutes"]).collect();
    std::thread::scope(|s| {
        for _ in 0..4 {
            s.spawn(|| {
                for i in 0..200 {
                    let r = i % rows.len();
                    let got = model.score(std::slice::from_ref(&rows[r])).unwrap();
                    assert_eq!(got.values()[0].to_bits(), expected[r].to_bits());
                }
            });
        }
    });
}

#[test]
fn starting_an_instance_has_its_own_fuel_budget_apart_from_the_calls() {
    let runtime = Runtime::with_config(RuntimeConfig { fuel: true, ..RuntimeConfig::default() }).unwrap();
    let artifact = || Artifact::read(&demo_artifact("charge-minutes"), u64::MAX).unwrap();
    let with = |limits: Limits| ModelOptions { limits, ..ModelOptions::default() };
    let budget = 100_000;
    // Decoding 200 trees takes more than one call's budget: as a start
    // budget it stops the start, naming the fuel limit...
    let err = Model::load_with(&runtime, artifact(), with(Limits { init_fuel: Some(budget), ..Limits::default() }))
        .unwrap_err();
    assert!(err.to_string().contains(&format!("fuel limit of {budget} exhausted")), "{err}");
    // ...but as the per-call budget it is not charged to the start.
    let model =
        Model::load_with(&runtime, artifact(), with(Limits { fuel: Some(budget), ..Limits::default() })).unwrap();
    let row = model.artifact().checks().unwrap().unwrap().cases[0].row.clone();
    let used = model.score(&[row]).unwrap().usage().fuel.expect("metered");
    assert!(used > 0 && used <= budget, "{used}");
}

#[test]
fn limits_that_cannot_mean_what_they_say_are_refused_naming_the_field() {
    let runtime = Runtime::with_config(RuntimeConfig { fuel: true, ..RuntimeConfig::default() }).unwrap();
    for (limits, field) in [
        (Limits { deadline: Duration::ZERO, ..Limits::default() }, "deadline is 0s"),
        (Limits { init_deadline: Duration::from_secs(7200), ..Limits::default() }, "init_deadline is 7200s"),
        (Limits { fuel: Some(0), ..Limits::default() }, "fuel is 0"),
        (Limits { rows_per_call: 0, ..Limits::default() }, "rows_per_call is 0"),
        (Limits { memory_bytes: 1000, ..Limits::default() }, "memory_bytes is 1000"),
    ] {
        let artifact = Artifact::read(&demo_artifact("charge-minutes"), u64::MAX).unwrap();
        let err = Model::load_with(&runtime, artifact, ModelOptions { limits, ..ModelOptions::default() }).unwrap_err();
        assert!(matches!(err, LoadError::Options(_)) && err.to_string().contains(field), "{field}: {err}");
    }
}

#[test]
fn a_model_fault_names_the_row_as_the_request_numbers_it() {
    let runtime = Runtime::new().unwrap();
    // Mode 4 answers NaN: the first row the model sees is request row 2,
    // as row 1 broke the contract and never entered the sandbox.
    let nan = affine(&runtime, 4, Limits::default());
    let err = nan.score_valid(&[Row::new().with("x", "one"), Row::new().with("x", 1.0)]).unwrap_err();
    assert_eq!(err.to_string(), "the answer breaks the contract: row 2, output `y` = NaN: not a finite number");
    // And with every row valid, partial scoring answers them all.
    let ok = affine(&runtime, 0, Limits::default());
    let scored =
        ok.score_valid(&[Row::new().with("x", 1.0), Row::new().with("x", "two"), Row::new().with("x", 3.0)]).unwrap();
    assert_eq!(scored.scored, [1, 3]);
    assert_eq!(scored.problems.len(), 1);
    assert_eq!(scored.problems[0].row, 2);
    assert_eq!(scored.estimates.row_count(), 2);
}
