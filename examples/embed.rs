//! Embed paddock in a service: load a model, read its contract, score rows,
//! handle a bad row, and see what each call cost.
//!
//! ```text
//! cargo xtask build && cargo run -p paddock-examples --example embed
//! ```

use anyhow::{Context, Result};
use paddock_host::{Artifact, DEFAULT_SIZE_CAP, Model, Row, Runtime, ScoreError};

fn main() -> Result<()> {
    // One runtime per process: the engine and its clock.
    let runtime = Runtime::new()?;

    // Artifacts are files; their sha256 is their identity.
    let path = paddock_examples::demo_artifact("charge-minutes");
    let artifact = Artifact::read(&path, DEFAULT_SIZE_CAP)
        .with_context(|| format!("{} (run `cargo xtask build` first)", path.display()))?;
    let model = Model::load(&runtime, artifact)?;
    let contract = model.contract();
    println!("{} {} ({})", contract.name, contract.version, model.digest());
    for f in &contract.features {
        println!("  {:<13} {:<30} {}", f.name, f.domain.to_string(), if f.required { "required" } else { "optional" });
    }

    // A plug-in at a 22 kW charger, Tuesday 18:00, no temperature sensor.
    let session = Row::new()
        .with("charger_kw", 22.0)
        .with("battery_kwh", 58.0)
        .with("soc_start", 0.3)
        .with("soc_target", 0.8)
        .with("hour_of_week", 24 + 18)
        .with("connector", "type2")
        .with("fleet", false);
    let estimates = model.score(std::slice::from_ref(&session))?;
    let usage = estimates.usage();
    println!(
        "\nexpected charging: {:.0} min ({} row, {:?} in the sandbox)",
        estimates.values_at(0)[0],
        usage.rows,
        usage.wall
    );

    // A bad row is refused before it reaches the model, naming the rule.
    let typo = session.with("conector", "type2");
    match model.score(&[typo]) {
        Err(ScoreError::InvalidRows { errors }) => println!("refused: {}", errors[0]),
        other => anyhow::bail!("expected a refusal, got {other:?}"),
    }

    // The model is Send + Sync: share it across threads.
    let handles: Vec<_> = (0..4)
        .map(|t| {
            let model = model.clone();
            std::thread::spawn(move || {
                let row = Row::new()
                    .with("charger_kw", 11.0)
                    .with("battery_kwh", 64.0)
                    .with("soc_start", 0.1 + 0.1 * f64::from(t))
                    .with("soc_target", 0.9)
                    .with("hour_of_week", 100i64)
                    .with("connector", "type2")
                    .with("fleet", true);
                model.score(&[row]).map(|e| e.values_at(0)[0])
            })
        })
        .collect();
    for (t, h) in handles.into_iter().enumerate() {
        let minutes = h.join().expect("thread")?;
        println!("thread {t}: {minutes:.0} min");
    }
    Ok(())
}
