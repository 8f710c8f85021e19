//! Primed components: a model snapshotted after `init(params)` answers
//! bit for bit what it answers when every instance runs `init` itself, a
//! primed instance starts from the state `init` left (not from the
//! module's own initial values), and what one call or a trap leaves behind
//! never reaches the next fresh instance.
//!
//! Expected values are worked out here from the hostile corpus's base
//! module (`tests/hostile/base.wat`) and the case below, or compared with
//! the same artifact loaded unprimed.

use paddock_host::sandbox::model::Isolation;
use paddock_host::{
    Artifact, CodeCache, CodeSource, Model, ModelOptions, PrimeState, Priming, Row, Runtime, ScoreError, WasiPolicy,
};
use paddock_tests::{demo_artifact, hostile_module, load_foreign, packed};

/// State that only `init` sets, and that `score` changes: `init` adds the
/// first params byte to `$seed` (a global) and to the f64 at 4096 in
/// memory, both 0 in the module itself; each row's answer is
/// `x + memory[4096] + 100·$seed + 1000·calls` (calls counted by the base
/// module), after which 0.5 is added to memory[4096]. A negative `x` traps.
/// A primed instance that ran `init` again would count the seed twice; one
/// whose snapshot missed a global or the memory would count it not at all.
const HIDDEN: &str = r#"(global $seed (mut f64) (f64.const 0))
(func $hook_init (param $ptr i32) (param $len i32) (result i32) (local $byte f64)
  (if (i32.gt_u (local.get $len) (i32.const 0))
    (then (local.set $byte (f64.convert_i32_u (i32.load8_u (local.get $ptr))))))
  (global.set $seed (f64.add (global.get $seed) (local.get $byte)))
  (f64.store (i32.const 4096) (f64.add (f64.load (i32.const 4096)) (local.get $byte)))
  (i32.const 800))
(func $hook_value (param $x f64) (result f64) (local $y f64)
  (if (f64.lt (local.get $x) (f64.const 0)) (then unreachable))
  (local.set $y (f64.add (f64.add (local.get $x) (f64.load (i32.const 4096)))
                         (f64.add (f64.mul (global.get $seed) (f64.const 100))
                                  (f64.mul (f64.convert_i32_u (global.get $calls)) (f64.const 1000)))))
  (f64.store (i32.const 4096) (f64.add (f64.load (i32.const 4096)) (f64.const 0.5)))
  (local.get $y))"#;

fn hidden(params: &[u8]) -> Artifact {
    packed(hostile_module(HIDDEN).as_bytes(), params, None)
}

fn x(v: f64) -> Vec<Row> {
    vec![Row::new().with("x", v)]
}

/// The options of a case, with a minute-long deadline: a busy machine must
/// not make a guest's call late.
fn options(isolation: Isolation, priming: Priming) -> ModelOptions {
    ModelOptions { isolation, priming, ..paddock_tests::unhurried() }
}

/// Fresh per call, primed (the default for that isolation): every call
/// sees the state `init` left — seed 7 from the params, no calls yet — so
/// x = 1 gives 1 + 7 + 700 + 1000 each time, as the unprimed model does.
#[test]
fn a_primed_fresh_instance_starts_where_init_left_it() {
    let runtime = Runtime::new().unwrap();
    let primed =
        Model::load_with(&runtime, hidden(&[7]), options(Isolation::FreshPerCall, Priming::default())).unwrap();
    assert_eq!(primed.prime_state(), &PrimeState::Primed);
    let unprimed = Model::load_with(&runtime, hidden(&[7]), options(Isolation::FreshPerCall, Priming::Off)).unwrap();
    assert_eq!(unprimed.prime_state(), &PrimeState::Off);
    for _ in 0..3 {
        let a = primed.score(&x(1.0)).unwrap();
        assert_eq!(a.values(), &[1708.0]);
        assert!(a.usage().fresh_instance);
        assert_eq!(unprimed.score(&x(1.0)).unwrap().values(), a.values());
    }
    // Other params, another snapshot: the seed came from init, not the module.
    let other =
        Model::load_with(&runtime, hidden(&[40]), options(Isolation::FreshPerCall, Priming::default())).unwrap();
    assert_eq!(other.score(&x(1.0)).unwrap().values(), &[5041.0]);
}

/// Warm instances, primed: the state builds up within an instance (second
/// call: 1 + 7.5 + 700 + 2000); a trap discards it, and the next instance starts
/// from the snapshot again, not from what the trapped one had written.
#[test]
fn after_a_trap_the_next_primed_instance_is_pristine() {
    let runtime = Runtime::new().unwrap();
    let model = Model::load_with(&runtime, hidden(&[7]), options(Isolation::Reuse, Priming::Always)).unwrap();
    assert_eq!(model.prime_state(), &PrimeState::Primed);
    assert_eq!(model.score(&x(1.0)).unwrap().values(), &[1708.0]);
    assert_eq!(model.score(&x(1.0)).unwrap().values(), &[2708.5], "a healthy instance is reused");
    assert!(matches!(model.score(&x(-1.0)).unwrap_err(), ScoreError::Sandbox(_)));
    let after = model.score(&x(1.0)).unwrap();
    assert_eq!(after.values(), &[1708.0]);
    assert!(after.usage().fresh_instance);
}

/// The demo's tree ensemble (`charge-minutes`), its own check rows: primed
/// and unprimed fresh instances answer the same bits; priming is off by
/// default for warm instances.
#[test]
fn a_primed_tree_ensemble_answers_bit_for_bit_what_an_unprimed_one_does() {
    let runtime = Runtime::new().unwrap();
    let bytes = std::fs::read(demo_artifact("charge-minutes")).unwrap();
    let load = |isolation, priming| {
        Model::load_with(&runtime, Artifact::from_bytes(bytes.clone(), u64::MAX).unwrap(), options(isolation, priming))
            .unwrap()
    };
    let primed = load(Isolation::FreshPerCall, Priming::WhenFresh);
    assert_eq!(primed.prime_state(), &PrimeState::Primed);
    let unprimed = load(Isolation::FreshPerCall, Priming::Off);
    assert_eq!(load(Isolation::Reuse, Priming::WhenFresh).prime_state(), &PrimeState::Off);
    let rows: Vec<Row> = primed.artifact().checks().unwrap().unwrap().cases.into_iter().map(|c| c.row).collect();
    let bits = |m: &Model| -> Vec<u64> { m.score(&rows).unwrap().values().iter().map(|v| v.to_bits()).collect() };
    assert_eq!(bits(&primed), bits(&unprimed));
    for row in &rows {
        let one = std::slice::from_ref(row);
        assert_eq!(
            primed.score(one).unwrap().values()[0].to_bits(),
            unprimed.score(one).unwrap().values()[0].to_bits()
        );
    }
}

/// The primed component is kept in the code cache under the artifact's
/// digest: the second load takes it from there, and answers the same.
#[test]
fn the_code_cache_keeps_the_primed_component() {
    let runtime = Runtime::new().unwrap();
    let dir = tempfile::tempdir().unwrap();
    let cache = CodeCache::open(&dir.path().join("code")).unwrap();
    let opts = options(Isolation::FreshPerCall, Priming::WhenFresh);
    let first = Model::load_cached(&runtime, hidden(&[7]), opts.clone(), &cache).unwrap();
    assert_eq!((first.code_source(), first.prime_state()), (&CodeSource::CompiledAndCached, &PrimeState::Primed));
    assert!(cache.primed_path(&runtime, first.artifact(), None).exists());
    let second = Model::load_cached(&runtime, hidden(&[7]), opts, &cache).unwrap();
    assert_eq!((second.code_source(), second.prime_state()), (&CodeSource::Cache, &PrimeState::Primed));
    assert_eq!(second.score(&x(1.0)).unwrap().values(), &[1708.0]);
    // Other params are another artifact: another entry, another snapshot.
    let other =
        Model::load_cached(&runtime, hidden(&[40]), options(Isolation::FreshPerCall, Priming::WhenFresh), &cache)
            .unwrap();
    assert_eq!(other.code_source(), &CodeSource::CompiledAndCached);
    assert_eq!(other.score(&x(1.0)).unwrap().values(), &[5041.0]);
}

/// A component the snapshot cannot capture (the hand-written `affine`
/// fixture grows its table in one of its modes, and tables are not
/// snapshotted) loads unprimed, says why, and answers as ever (y = 2x + 1).
#[test]
fn a_component_that_cannot_be_primed_loads_unprimed_and_says_why() {
    let runtime = Runtime::new().unwrap();
    let artifact = packed(&paddock_tests::fixture("affine.wat"), &[0], None);
    let model = Model::load_with(&runtime, artifact, options(Isolation::FreshPerCall, Priming::WhenFresh)).unwrap();
    let PrimeState::Unprimed { reason } = model.prime_state() else { panic!("{:?}", model.prime_state()) };
    assert!(reason.contains("table"), "{reason}");
    assert_eq!(model.score(&x(1.0)).unwrap().values(), &[3.0]);
}

fn wasi_options(isolation: Isolation, priming: Priming) -> ModelOptions {
    ModelOptions { wasi: Some(WasiPolicy::default()), ..options(isolation, priming) }
}

/// The WASI probe (tests/guests/wasi_probe.py) reports the wall clock, four
/// random bytes and how far the monotonic clock moved, each read in
/// `score`; packed with the params `quiet`, its `init` prints nothing.
fn quiet_probe() -> Artifact {
    packed(paddock_tests::foreign_artifact("wasi-probe").bytes(), b"quiet", None)
}

/// The code cache the tests share (compiling the Python probe, and priming
/// it, take seconds each).
fn test_cache() -> CodeCache {
    CodeCache::open(&paddock_tests::root().join("target/paddock/test-code-cache")).unwrap()
}

fn probe_row() -> Vec<Row> {
    vec![Row::new().with("sleep_ms", 3.0).with("print_bytes", 0.0)]
}

fn bits(model: &Model, rows: &[Row]) -> Vec<u64> {
    model.score(rows).unwrap().values().iter().map(|v| v.to_bits()).collect()
}

/// Under the fixed WASI policy a model's `init` may read the clocks and
/// draw randomness, and still be primed: Python's runtime draws random
/// bytes in `init`, and every new primed instance's random stream starts
/// past those draws, as an unprimed instance's does after its own `init`.
/// The quiet probe's four random bytes, clock readings and sleep come out
/// bit for bit as from unprimed fresh instances, call after call. (Were the
/// streams restarted, its random bytes would be the first ones `init` drew.)
#[test]
fn a_primed_wasi_model_starts_its_world_where_init_left_it() {
    let runtime = Runtime::new().unwrap();
    let cache = test_cache();
    let load = |priming| {
        Model::load_cached(&runtime, quiet_probe(), wasi_options(Isolation::FreshPerCall, priming), &cache).unwrap()
    };
    let primed = load(Priming::WhenFresh);
    assert_eq!(primed.prime_state(), &PrimeState::Primed);
    let unprimed = load(Priming::Off);
    for _ in 0..3 {
        assert_eq!(bits(&primed, &probe_row()), bits(&unprimed, &probe_row()));
    }
    // Warm primed instances go on from there too.
    let warm =
        Model::load_cached(&runtime, quiet_probe(), wasi_options(Isolation::Reuse, Priming::Always), &cache).unwrap();
    let warm_unprimed =
        Model::load_cached(&runtime, quiet_probe(), wasi_options(Isolation::Reuse, Priming::Off), &cache).unwrap();
    assert_eq!(warm.prime_state(), &PrimeState::Primed);
    for _ in 0..3 {
        assert_eq!(bits(&warm, &probe_row()), bits(&warm_unprimed, &probe_row()));
    }
}

/// The Python and JavaScript charge-taper models (models/charge-taper) are
/// primed (JavaScript's runtime reads the monotonic clock in `init`) and
/// answer their check rows bit for bit as unprimed fresh instances do.
/// (Their values against SciPy are checked in tests/guests.rs.)
#[test]
fn python_and_javascript_models_are_primed_and_answer_as_unprimed_ones() {
    let runtime = Runtime::new().unwrap();
    for name in ["charge-taper-py", "charge-taper-js"] {
        let primed = load_foreign(&runtime, name, wasi_options(Isolation::FreshPerCall, Priming::WhenFresh)).unwrap();
        assert_eq!(primed.prime_state(), &PrimeState::Primed, "{name}");
        let unprimed = load_foreign(&runtime, name, wasi_options(Isolation::FreshPerCall, Priming::Off)).unwrap();
        let rows: Vec<Row> = primed.artifact().checks().unwrap().unwrap().cases.into_iter().map(|c| c.row).collect();
        assert_eq!(bits(&primed, &rows), bits(&unprimed, &rows), "{name}");
        for row in rows.iter().take(5) {
            assert_eq!(bits(&primed, std::slice::from_ref(row)), bits(&unprimed, std::slice::from_ref(row)), "{name}");
        }
    }
}

/// What a snapshot cannot carry keeps a model unprimed, the reason naming
/// the import, and it answers as ever: the probe prints from its `init` (an
/// output stream is a handle a snapshot cannot hold); under real
/// randomness Python's draw in `init`, and under real clocks JavaScript's
/// clock reading, would be frozen into every instance.
#[test]
fn a_wasi_model_whose_init_reaches_what_cannot_be_carried_is_not_primed_and_says_which_import() {
    let runtime = Runtime::new().unwrap();
    let real_random = WasiPolicy { random: paddock_host::sandbox::wasi::Ambient::Real, ..WasiPolicy::default() };
    let real_clocks = WasiPolicy { clocks: paddock_host::sandbox::wasi::Ambient::Real, ..WasiPolicy::default() };
    let fresh = |policy: &WasiPolicy| ModelOptions {
        wasi: Some(policy.clone()),
        ..options(Isolation::FreshPerCall, Priming::WhenFresh)
    };
    let cases = [
        ("wasi-probe", WasiPolicy::default(), "init calls `wasi:cli/stdout@"),
        ("charge-taper-py", real_random, "init calls `wasi:random/random@0.2.9#get-random-bytes`"),
        ("charge-taper-js", real_clocks, "init calls `wasi:clocks/monotonic-clock@0.2.12#now`"),
    ];
    for (name, policy, reason_starts) in cases {
        let model = load_foreign(&runtime, name, fresh(&policy)).unwrap();
        let PrimeState::Unprimed { reason } = model.prime_state() else { panic!("{name}: {:?}", model.prime_state()) };
        assert!(reason.starts_with(reason_starts), "{name}: {reason}");
        let rows: Vec<Row> = match model.artifact().checks().unwrap() {
            Some(checks) => checks.cases.into_iter().map(|c| c.row).take(5).collect(),
            None => probe_row(),
        };
        let unprimed = load_foreign(&runtime, name, ModelOptions { priming: Priming::Off, ..fresh(&policy) }).unwrap();
        if policy == WasiPolicy::default() {
            assert_eq!(bits(&model, &rows), bits(&unprimed, &rows), "{name}");
        } else {
            assert_eq!(model.score(&rows).unwrap().row_count(), rows.len(), "{name}");
        }
    }
}

/// A lasting reason not to prime (here, what `init` calls) is kept in the
/// code cache beside the entries: the next load gives the same reason
/// without compiling an instrumented copy of the component again. An
/// unreadable note is no note: the load tries again.
#[test]
fn the_code_cache_remembers_why_a_model_cannot_be_primed() {
    let runtime = Runtime::new().unwrap();
    let dir = tempfile::tempdir().unwrap();
    let cache = CodeCache::open(&dir.path().join("code")).unwrap();
    let artifact = || paddock_tests::foreign_artifact("wasi-probe");
    let opts = wasi_options(Isolation::FreshPerCall, Priming::WhenFresh);
    let first = Model::load_cached(&runtime, artifact(), opts.clone(), &cache).unwrap();
    let notes: Vec<_> = std::fs::read_dir(dir.path().join("code"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "unprimed"))
        .collect();
    assert_eq!(notes.len(), 1, "{notes:?}");
    let PrimeState::Unprimed { reason } = first.prime_state() else { panic!("{:?}", first.prime_state()) };
    assert_eq!(std::fs::read_to_string(&notes[0]).unwrap(), *reason);
    let second = Model::load_cached(&runtime, artifact(), opts.clone(), &cache).unwrap();
    assert_eq!(second.prime_state(), first.prime_state());
    // A note that is not text is ignored, and replaced by a new attempt's.
    std::fs::write(&notes[0], [0xff, 0xfe]).unwrap();
    let third = Model::load_cached(&runtime, artifact(), opts, &cache).unwrap();
    assert_eq!(third.prime_state(), first.prime_state());
    assert_eq!(std::fs::read_to_string(&notes[0]).unwrap(), *reason);
}

/// A primed WASI model's entry carries what its `init` took beside the
/// code: loaded from the cache, it answers as when it was made; an entry
/// whose carry is lost is made again rather than used without it.
#[test]
fn a_cached_primed_wasi_model_keeps_its_carry() {
    let runtime = Runtime::new().unwrap();
    let dir = tempfile::tempdir().unwrap();
    let cache = CodeCache::open(&dir.path().join("code")).unwrap();
    let opts = wasi_options(Isolation::FreshPerCall, Priming::WhenFresh);
    let made = Model::load_cached(&runtime, quiet_probe(), opts.clone(), &cache).unwrap();
    assert_eq!((made.code_source(), made.prime_state()), (&CodeSource::CompiledAndCached, &PrimeState::Primed));
    let expected = bits(&made, &probe_row());
    let cached = Model::load_cached(&runtime, quiet_probe(), opts.clone(), &cache).unwrap();
    assert_eq!(cached.code_source(), &CodeSource::Cache);
    assert_eq!(bits(&cached, &probe_row()), expected);
    let entry = cache.primed_path(&runtime, made.artifact(), opts.wasi.as_ref());
    std::fs::remove_file(entry.with_extension("carry")).unwrap();
    let remade = Model::load_cached(&runtime, quiet_probe(), opts, &cache).unwrap();
    assert_eq!((remade.code_source(), remade.prime_state()), (&CodeSource::CompiledAndCached, &PrimeState::Primed));
    assert_eq!(bits(&remade, &probe_row()), expected);
}
