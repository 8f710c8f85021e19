//! The smallest embedding: one model, loaded with the checks it carries
//! run (the default), every error the library returns handled by its type.
//! It links `paddock-host` alone — no server, store or feature source:
//!
//! ```toml
//! [dependencies]
//! paddock-host = { version = "0.1", default-features = false }
//! ```
//!
//! ```text
//! cargo xtask build && cargo run -p paddock-examples --example checked
//! ```

use std::process::ExitCode;

use paddock_host::sandbox::{SandboxError, StartError};
use paddock_host::{
    Allocator, Artifact, ArtifactError, DEFAULT_SIZE_CAP, LoadError, Model, ModelOptions, Row, Runtime, RuntimeConfig,
    RuntimeError, ScoreError, pack,
};

fn main() -> ExitCode {
    match run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(message) => {
            eprintln!("error: {message}");
            ExitCode::FAILURE
        }
    }
}

fn run() -> Result<(), String> {
    let runtime = start_runtime()?;
    let options = ModelOptions::default();
    let path = paddock_examples::demo_artifact("charge-minutes");
    let artifact = read(&path, DEFAULT_SIZE_CAP)?;

    // Loading runs the checks the artifact carries: it scores only if it
    // computes what it was packed to compute.
    let model = load(&runtime, artifact.clone(), options.clone())?;
    let report = model.carried_checks().ok_or("the demo artifact carries checks")?;
    println!(
        "{} {}: {}/{} carried checks passed on load",
        model.contract().name,
        model.contract().version,
        report.passed,
        report.cases
    );

    // The same code with the recorded outputs edited — a tampered or
    // mispacked file — is refused at load, with the report.
    let mut checks = artifact.checks().map_err(|e| e.to_string())?.ok_or("no checks")?;
    for case in &mut checks.cases {
        for value in case.expect.values_mut() {
            *value += 10.0;
        }
    }
    let tampered = pack(artifact.bytes(), Some(artifact.params()), Some(&checks)).map_err(|e| e.to_string())?;
    let tampered = Artifact::from_bytes(tampered, DEFAULT_SIZE_CAP).map_err(|e| e.to_string())?;
    match load(&runtime, tampered, options) {
        Err(refused) => println!("tampered copy refused: {refused}"),
        Ok(_) => return Err("a tampered artifact loaded".into()),
    }

    // Score one row, then one that breaks the contract.
    let session = Row::new()
        .with("charger_kw", 11.0)
        .with("battery_kwh", 64u32)
        .with("soc_start", 0.2)
        .with("soc_target", 0.8)
        .with("ambient_c", None::<f64>)
        .with("hour_of_week", 42u32)
        .with("connector", "type2")
        .with("fleet", false);
    println!("estimate: {:.0} min", score(&model, &session)?);
    let typo = session.with("soc_target", 1.5);
    match score(&model, &typo) {
        Err(refused) => println!("bad row refused: {refused}"),
        Ok(_) => return Err("a row out of bounds was scored".into()),
    }
    Ok(())
}

fn start_runtime() -> Result<Runtime, String> {
    match Runtime::with_config(RuntimeConfig::default()) {
        Ok(runtime) => {
            if let Allocator::OnDemand { reason } = runtime.allocator() {
                println!("note: instances are allocated on demand: {reason}");
            }
            Ok(runtime)
        }
        // A setting that cannot mean what it says, each named.
        Err(RuntimeError::Config(e)) => {
            Err(e.problems.iter().map(|p| format!("RuntimeConfig::{p}")).collect::<Vec<_>>().join("; "))
        }
        Err(RuntimeError::Engine(e)) => Err(format!("this host cannot run the engine: {e}")),
        Err(RuntimeError::Clock(e)) => Err(format!("no clock thread, so no deadlines: {e}")),
        Err(e) => Err(e.to_string()),
    }
}

fn read(path: &std::path::Path, max_bytes: u64) -> Result<Artifact, String> {
    Artifact::read(path, max_bytes).map_err(|e| match e {
        ArtifactError::Io { path, cause } => {
            format!("{}: {cause} (run `cargo xtask build` first)", path.display())
        }
        ArtifactError::TooLarge(hit) => format!("over the size cap: {hit}"),
        ArtifactError::CoreModule => "a core module: pack it into a component first".into(),
        other => format!("not an artifact: {other}"),
    })
}

fn load(runtime: &Runtime, artifact: Artifact, options: ModelOptions) -> Result<Model, String> {
    Model::load_with(runtime, artifact, options).map_err(|e| match e {
        LoadError::ChecksFailed { report } => {
            let first = report.failures.first().map(|(case, why)| format!("; first: case {case}: {why}"));
            format!("{} of {} checks fail{}", report.cases - report.passed, report.cases, first.unwrap_or_default())
        }
        LoadError::ChecksDidNotRun(e) => format!("its checks could not run: {e}"),
        LoadError::WasiImports(imports) => format!("needs a WASI policy (ModelOptions::wasi) for {imports:?}"),
        LoadError::Imports(imports) => format!("imports what no model may: {imports:?}"),
        LoadError::Options(e) => format!("these options cannot be honoured: {e}"),
        LoadError::Start(e) => format!("does not start: {e}"),
        other => other.to_string(),
    })
}

fn score(model: &Model, row: &Row) -> Result<f64, String> {
    match model.score(std::slice::from_ref(row)) {
        Ok(estimates) => Ok(estimates.values_at(0)[0]),
        // The request's fault: nothing entered the sandbox.
        Err(ScoreError::InvalidRows { errors }) => {
            Err(errors.iter().map(ToString::to_string).collect::<Vec<_>>().join("; "))
        }
        // A limit stopped the call; the instance was discarded.
        Err(ScoreError::Sandbox(SandboxError::Limit(hit))) => Err(format!("limit `{}`: {hit}", hit.name())),
        Err(ScoreError::Sandbox(SandboxError::Trap { message })) => Err(format!("the model trapped: {message}")),
        Err(ScoreError::Start(StartError::Sandbox { error, .. })) => Err(format!("a fresh instance failed: {error}")),
        // The model declined, or answered outside its contract.
        Err(ScoreError::Fault(fault)) => Err(format!("the model declined: {fault:?}")),
        Err(ScoreError::Output(fault)) => Err(format!("the answer breaks the contract: {fault}")),
        Err(other) => Err(other.to_string()),
    }
}
