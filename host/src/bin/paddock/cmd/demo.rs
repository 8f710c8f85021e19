//! `paddock demo`: the built-in demo. Scores ten invented plug-ins at the
//! EV-charging co-op's sites with both example models: `charge-minutes`
//! estimates how long each session charges, and its estimate feeds
//! `overstay-risk`.

use std::collections::HashMap;
use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::{Artifact, Model, Row, Runtime};
use serde::Serialize;

use crate::Outcome;
use crate::common::{print_json, table as text_table};

/// The demo plug-ins (invented data).
const PLUGINS: &str = include_str!("../demo/plugins.csv");

/// Score the built-in EV-charging demo rows with the example models.
#[derive(clap::Args)]
pub struct Args {
    /// Directory holding charge-minutes.wasm and overstay-risk.wasm
    /// (`cargo xtask build` writes them to target/paddock/artifacts).
    #[arg(long, default_value = "target/paddock/artifacts", value_name = "DIR")]
    artifacts: PathBuf,
    /// Print the results as JSON.
    #[arg(long)]
    json: bool,
}

#[derive(Serialize)]
struct Answer {
    site: String,
    member: String,
    hour_of_week: i64,
    charger_kw: f64,
    minutes: f64,
    overstay_probability: f64,
    minutes_model: String,
    overstay_model: String,
}

fn load(runtime: &Runtime, dir: &std::path::Path, name: &str) -> Result<Model> {
    let path = dir.join(format!("{name}.wasm"));
    let artifact = Artifact::read(&path, paddock_host::Limits::default().artifact_bytes)
        .with_context(|| format!("the demo needs {} (run `cargo xtask demo`)", path.display()))?;
    Model::load(runtime, artifact).with_context(|| format!("loading {}", path.display()))
}

/// Builds a model's row from named text cells, taking only its features.
fn row_for(model: &Model, cells: &HashMap<String, String>) -> Row {
    model
        .contract()
        .features
        .iter()
        .filter_map(|f| cells.get(&f.name).map(|text| (f.name.clone(), model.schema().value_from_text(&f.name, text))))
        .collect()
}

/// Loads the two models, scores the plug-ins, prints a table.
pub fn run(args: Args) -> Result<Outcome> {
    let runtime = Runtime::new()?;
    let minutes = load(&runtime, &args.artifacts, "charge-minutes")?;
    let overstay = load(&runtime, &args.artifacts, "overstay-risk")?;
    let mut reader = csv::Reader::from_reader(PLUGINS.as_bytes());
    let header = reader.headers()?.clone();
    let mut answers = Vec::new();
    for record in reader.records() {
        let mut cells: HashMap<String, String> =
            header.iter().zip(record?.iter()).map(|(k, v)| (k.to_owned(), v.to_owned())).collect();
        let m = minutes.score(&[row_for(&minutes, &cells)])?.row(0)[0];
        let hour: i64 = cells["hour_of_week"].parse()?;
        cells.insert("expected_minutes".into(), m.to_string());
        cells.insert("plugin_hour".into(), (hour % 24).to_string());
        cells.insert("weekend".into(), (hour >= 120).to_string());
        let p = overstay.score(&[row_for(&overstay, &cells)])?.row(0)[0];
        answers.push(Answer {
            site: cells["site"].clone(),
            member: cells["member"].clone(),
            hour_of_week: hour,
            charger_kw: cells["charger_kw"].parse()?,
            minutes: m,
            overstay_probability: p,
            minutes_model: format!("{} {}", minutes.contract().name, minutes.contract().version),
            overstay_model: format!("{} {}", overstay.contract().name, overstay.contract().version),
        });
    }
    if args.json {
        print_json(&answers)?;
        return Ok(Outcome::Ok);
    }
    const DAYS: [&str; 7] = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"];
    let rows: Vec<Vec<String>> = answers
        .iter()
        .map(|a| {
            vec![
                a.site.clone(),
                a.member.clone(),
                format!("{} {:02}:00", DAYS[(a.hour_of_week / 24) as usize % 7], a.hour_of_week % 24),
                format!("{} kW", a.charger_kw),
                format!("{:.0} min", a.minutes),
                format!("{:.0} %", a.overstay_probability * 100.0),
            ]
        })
        .collect();
    println!("EV-charging co-op demo: estimates at plug-in (models trained on simulated sessions; demo only)\n");
    print!("{}", text_table(&["site", "member", "plug-in", "charger", "charging", "overstay risk"], &rows));
    println!(
        "\nmodels: {} ({}), {} ({}), each in its own sandbox",
        answers[0].minutes_model,
        minutes.digest().short(),
        answers[0].overstay_model,
        overstay.digest().short()
    );
    Ok(Outcome::Ok)
}
