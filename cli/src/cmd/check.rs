//! `paddock check`: prove an artifact computes what its training code did.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use paddock_host::Checks;
use paddock_host::ModelOptions;

use crate::Outcome;
use crate::common::{LoadArgs, print_json};

/// Run the checks an artifact carries (or a given checks file) and report
/// the largest errors. Exits 1 when any case fails.
#[derive(clap::Args)]
pub struct Args {
    /// The artifact.
    artifact: PathBuf,
    /// A checks file to run instead of the artifact's own.
    #[arg(long, value_name = "FILE")]
    checks: Option<PathBuf>,
    /// Print the report as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    limits: LoadArgs,
}

/// Loads the model, runs the checks, prints the report.
pub fn run(args: Args) -> Result<Outcome> {
    let options = ModelOptions { skip_carried_checks: true, ..args.limits.options() };
    let (_runtime, model) = args.limits.load_with(&args.artifact, options)?;
    let checks = match &args.checks {
        Some(p) => {
            let bytes = std::fs::read(p).with_context(|| format!("reading {}", p.display()))?;
            Checks::from_json(&bytes).with_context(|| format!("in {}", p.display()))?
        }
        None => match model.artifact().checks()? {
            Some(c) => c,
            None => bail!("{} carries no checks; give a checks file with --checks", args.artifact.display()),
        },
    };
    let report = model.run_checks(&checks)?;
    if args.json {
        print_json(&report)?;
    } else {
        let c = model.contract();
        outln!("{} {} ({})", c.name, c.version, model.digest().short())?;
        if !checks.source.is_empty() {
            outln!("recorded by: {}", checks.source)?;
        }
        outln!(
            "{}/{} cases passed; max abs error {:e}, max rel error {:e}; tolerance abs {:e} + rel {:e}",
            report.passed,
            report.cases,
            report.max_abs_error,
            report.max_rel_error,
            report.tolerance.abs,
            report.tolerance.rel
        )?;
        for (case, failure) in &report.failures {
            outln!("case {case}: {failure}")?;
        }
    }
    Ok(if report.ok() { Outcome::Ok } else { Outcome::Failed })
}
