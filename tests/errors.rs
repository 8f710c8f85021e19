//! Every library error that has a cause prints each piece of text once
//! when its chain is walked the usual way (`source()` after `source()`, as
//! `anyhow`'s `{:#}` and most loggers do): a message either holds its
//! cause's text or returns the cause as its source, never both.

use std::error::Error;
use std::sync::Arc;

use paddock_host::sandbox::codecache::EntryProblem;
use paddock_host::{
    Artifact, ArtifactError, ChecksError, CodeCache, Limits, LoadError, OptionsError, PackError, Runtime,
    RuntimeConfig, RuntimeError, ScoreError, ToolError, Vouch, Voucher,
};
use paddock_serve::features::{PlanProblem, RedisSourceError};
use paddock_serve::registry::Refusal;
use paddock_serve::{Registry, RegistryError, RegistryOptions};

/// The chain, outermost first, as `source()` walks it.
fn chain(e: &dyn Error) -> Vec<String> {
    let mut texts = Vec::new();
    let mut next = Some(e);
    while let Some(e) = next {
        texts.push(e.to_string());
        next = e.source();
    }
    texts
}

/// No link of the chain repeats text an outer link already printed, and
/// `piece` (the root cause's own words) is printed exactly once.
#[track_caller]
fn once(e: &dyn Error, piece: &str) {
    let texts = chain(e);
    for (i, text) in texts.iter().enumerate().skip(1) {
        assert!(!texts[..i].iter().any(|outer| outer.contains(text.as_str())), "repeated in the chain: {texts:#?}");
    }
    assert_eq!(texts.join(": ").matches(piece).count(), 1, "`{piece}` should appear once: {texts:#?}");
}

fn tool() -> ToolError {
    ToolError::from(wasmtime::Error::msg("the root cause").context("a middle step"))
}

fn io() -> std::io::Error {
    std::io::Error::other("the disk said no")
}

fn tmp(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("paddock-errors-{}-{name}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    dir
}

#[test]
fn the_core_crates_errors_print_each_cause_once() {
    once(&tool(), "the root cause");
    for e in [LoadError::Compile(tool()), LoadError::World(tool()), LoadError::MemoryImage(tool())] {
        once(&e, "the root cause");
    }
    let limits = Limits { rows_per_call: 0, ..Limits::default() }.check().unwrap_err();
    once(&LoadError::Options(OptionsError::Limits(limits)), "no call could carry a row");
    once(&LoadError::ChecksDidNotRun(ScoreError::ContractChanged), "a different contract");
    once(&RuntimeError::Engine(tool()), "the root cause");
    once(&RuntimeError::Clock(io()), "the disk said no");
    let Err(e) = Runtime::with_config(RuntimeConfig { max_instances: 0, ..RuntimeConfig::default() }) else {
        panic!("no instance slots accepted")
    };
    once(&e, "max_instances is 0");

    let missing = tmp("missing").join("model.wasm");
    let read = Artifact::read(&missing, 1 << 20).unwrap_err();
    assert!(matches!(read, ArtifactError::Io { .. }));
    once(&read, "No such file");
    once(&ArtifactError::Componentize(tool()), "the root cause");
    let json = serde_json::from_str::<serde_json::Value>("{").unwrap_err();
    once(&ArtifactError::Origin(json), "EOF while parsing");
    let json = serde_json::from_str::<serde_json::Value>("[").unwrap_err();
    once(&ArtifactError::Checks(ChecksError::Json(json)), "EOF while parsing");
    once(&Voucher::read(&missing).unwrap_err(), "No such file");
    once(&Vouch::from_bytes(b"this = is = not toml").unwrap_err(), "not a vouch");

    let file = tmp("cache-file");
    std::fs::write(&file, b"a file, not a directory").unwrap();
    once(&CodeCache::open(&file.join("code")).unwrap_err(), "code cache");
    once(&EntryProblem::Code(tool()), "the root cause");
    once(&EntryProblem::Io(io()), "the disk said no");

    let path = std::path::PathBuf::from("out/m.wasm");
    once(&PackError::Load { path: path.clone(), cause: LoadError::Compile(tool()) }, "the root cause");
    once(&PackError::Score { path: path.clone(), cause: ScoreError::ContractChanged }, "a different contract");
    once(&PackError::Write { path, cause: io() }, "the disk said no");
    let _ = std::fs::remove_file(file);
}

#[test]
fn the_serving_crates_errors_print_each_cause_once() {
    let runtime = Runtime::new().unwrap();
    let missing = tmp("no-store");
    let Err(e) = Registry::open(&runtime, &missing, RegistryOptions::default()) else { panic!("opened nothing") };
    assert!(matches!(e, RegistryError::Store { .. }));
    once(&e, "No such file");

    let store = tmp("store");
    std::fs::create_dir_all(&store).unwrap();
    let state = store.join("state-is-a-file");
    std::fs::write(&state, b"").unwrap();
    let options = RegistryOptions { state_dir: Some(state), ..RegistryOptions::default() };
    let Err(e) = Registry::open(&runtime, &store, options) else { panic!("a file taken as a state directory") };
    assert!(matches!(e, RegistryError::State { .. }), "{e}");
    once(&e, "File exists");

    once(&Refusal::Load(Arc::new(LoadError::Compile(tool()))), "the root cause");
    once(&Refusal::Read(Arc::new(io())), "the disk said no");
    once(&Refusal::ChecksDidNotRun(ScoreError::ContractChanged), "a different contract");
    let e = PlanProblem::Redis { source_name: "sites".into(), error: RedisSourceError::Runtime(io()) };
    once(&e, "the disk said no");
    let _ = std::fs::remove_dir_all(store);
}
