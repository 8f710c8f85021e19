//! `paddock replay`: score a host's captured traffic again with a
//! candidate artifact and say how its answers differ from the ones the host
//! gave; exit 1 when a bound given is crossed (a release gate).

use std::io::BufRead;
use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use paddock_host::DriftWindow;
use paddock_serve::replay::{Largest, Replay, ReplayReport};

use crate::Outcome;
use crate::common::LoadArgs;

/// Score captured traffic (a host's `--capture-dir` files) with a
/// candidate artifact and compare: per output, rows changed, the largest
/// absolute and relative differences and where, the spread of the
/// differences; rows the candidate's contract now refuses; the drift of its
/// answers from its own training profile. Exit 1 when a bound given is
/// crossed.
#[derive(clap::Args)]
pub struct Args {
    /// The candidate artifact.
    candidate: PathBuf,
    /// Capture files (`.requests.ndjson`, gzip-compressed or not), or
    /// directories of them.
    #[arg(required = true)]
    captures: Vec<PathBuf>,
    /// Replay the lines of this model [default: the candidate's name].
    #[arg(long, value_name = "NAME")]
    model: Option<String>,
    /// Differences up to this (absolute) are not changes.
    #[arg(long, default_value_t = 0.0, value_name = "X")]
    tolerance: f64,
    /// Bound: the share of compared rows whose answer changed (0 to 1).
    #[arg(long, value_name = "SHARE")]
    max_changed: Option<f64>,
    /// Bound: the largest absolute difference of any output.
    #[arg(long, value_name = "X")]
    max_abs_diff: Option<f64>,
    /// Bound: the largest relative difference of any output.
    #[arg(long, value_name = "X")]
    max_rel_diff: Option<f64>,
    /// Bound: rows answered at capture that the candidate now refuses.
    #[arg(long, value_name = "N")]
    max_refused: Option<u64>,
    /// Bound: the stability index of any output against the candidate's
    /// training profile (needs a profile).
    #[arg(long, value_name = "INDEX")]
    max_output_drift: Option<f64>,
    /// Print the report as JSON.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    load: LoadArgs,
}

/// Replays every line and prints the report.
pub fn run(args: Args) -> Result<Outcome> {
    // Every replayed row counts towards the drift, however few.
    let options = paddock_host::ModelOptions {
        drift: Some(DriftWindow {
            min_count: 1,
            length: std::time::Duration::from_secs(u64::from(u32::MAX)),
            slices: 1,
            ..DriftWindow::default()
        }),
        ..args.load.options()
    };
    let (_runtime, model) = args.load.load_with(&args.candidate, options)?;
    if args.max_output_drift.is_some() && model.profile().is_none() {
        bail!("--max-output-drift: {} carries no training profile (pack it with --profile)", args.candidate.display());
    }
    let name = args.model.clone().unwrap_or_else(|| model.contract().name.clone());
    let files = capture_files(&args.captures)?;
    let mut replay = Replay::new(model, &name, args.tolerance);
    for file in &files {
        let opened = std::fs::File::open(file).with_context(|| format!("opening {}", file.display()))?;
        let reader = std::io::BufReader::new(crate::common::decompressed(file, Box::new(opened)));
        for (i, line) in reader.lines().enumerate() {
            let place = format!("{}:{}", file.display(), i + 1);
            match line {
                Ok(text) if text.trim().is_empty() => {}
                Ok(text) => replay.line(&place, &text),
                // A file cut short (a host stopped while writing it): what came before counts.
                Err(e) => {
                    replay.unreadable(&place, &format!("cannot read further: {e}"));
                    break;
                }
            }
        }
    }
    let report = replay.finish();
    let crossed = crossed(&args, &report);
    if args.json {
        crate::common::print_json(&serde_json::json!({"report": report, "crossed": crossed}))?;
    } else {
        out!("{}", report_text(&report, &name, files.len()))?;
        for c in &crossed {
            outln!("bound crossed: {c}")?;
        }
    }
    if report.rows == 0 {
        bail!("no rows of model `{name}` in {} capture files", files.len());
    }
    Ok(if crossed.is_empty() { Outcome::Ok } else { Outcome::Failed })
}

/// The files named, and in each directory named its capture files (closed
/// ones, oldest first).
fn capture_files(named: &[PathBuf]) -> Result<Vec<PathBuf>> {
    let mut files = Vec::new();
    for path in named {
        if path.is_dir() {
            let mut found: Vec<PathBuf> = std::fs::read_dir(path)
                .with_context(|| format!("reading {}", path.display()))?
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.file_name().and_then(|n| n.to_str()).is_some_and(is_capture_file))
                .collect();
            found.sort();
            if found.is_empty() {
                bail!("{} holds no capture files (*.requests.ndjson.gz)", path.display());
            }
            files.extend(found);
        } else {
            files.push(path.clone());
        }
    }
    Ok(files)
}

fn is_capture_file(name: &str) -> bool {
    name.ends_with(".requests.ndjson.gz") || name.ends_with(".requests.ndjson")
}

/// Each bound given that the report crosses, in words.
fn crossed(args: &Args, r: &ReplayReport) -> Vec<String> {
    let mut out = Vec::new();
    let worst = |f: fn(&paddock_serve::replay::OutputDifferences) -> Option<&Largest>| {
        r.outputs
            .iter()
            .filter_map(|o| f(o).map(|l| (o.name.as_str(), l.difference.abs())))
            .max_by(|a, b| a.1.total_cmp(&b.1))
    };
    if let Some(bound) = args.max_changed {
        for o in r.outputs.iter().filter(|o| o.compared > 0) {
            let share = o.changed as f64 / o.compared as f64;
            if share > bound {
                out.push(format!("--max-changed {bound}: {} changed in {:.2} % of rows", o.name, share * 100.0));
            }
        }
    }
    if let (Some(bound), Some((name, d))) = (args.max_abs_diff, worst(|o| o.largest_absolute.as_ref()))
        && d > bound
    {
        out.push(format!("--max-abs-diff {bound}: {name} moved by {d}"));
    }
    if let (Some(bound), Some((name, d))) = (args.max_rel_diff, worst(|o| o.largest_relative.as_ref()))
        && d > bound
    {
        out.push(format!("--max-rel-diff {bound}: {name} moved by {d} of its captured value"));
    }
    if let Some(bound) = args.max_refused
        && r.now_refused_count > bound
    {
        out.push(format!("--max-refused {bound}: {} rows answered at capture are now refused", r.now_refused_count));
    }
    if let (Some(bound), Some(drift)) = (args.max_output_drift, &r.drift) {
        for f in drift.fields.iter().filter(|f| f.kind == "output") {
            if let Some(index) = f.index.filter(|i| *i > bound) {
                out.push(format!("--max-output-drift {bound}: output {} has a stability index of {index:.4}", f.name));
            }
        }
    }
    out
}

/// The report for people.
fn report_text(r: &ReplayReport, name: &str, files: usize) -> String {
    let mut out =
        format!("replayed {} rows of {name} ({} lines in {files} files) against {}\n", r.rows, r.lines, r.candidate);
    if r.other_models > 0 {
        out.push_str(&format!("{} lines of other models skipped\n", r.other_models));
    }
    for o in &r.outputs {
        let share = if o.compared == 0 { 0.0 } else { o.changed as f64 * 100.0 / o.compared as f64 };
        out.push_str(&format!(
            "\noutput {}: {} rows compared, {} changed ({share:.1} %) beyond {}\n",
            o.name, o.compared, o.changed, r.tolerance
        ));
        let largest = |what: &str, l: &Largest| {
            format!(
                "  largest {what} difference {:+} (captured {}, now {}) at {} row {}\n",
                l.difference, l.captured, l.replayed, l.at.line, l.at.row
            )
        };
        if let Some(l) = &o.largest_absolute {
            out.push_str(&largest("absolute", l));
        }
        if let Some(l) = &o.largest_relative {
            out.push_str(&largest("relative", l));
        }
        if !o.quantiles.is_empty() {
            let spread: Vec<String> = o
                .quantiles
                .iter()
                .map(|(q, v)| match q {
                    q if *q == 0.0 => format!("min {v:+.4}"),
                    q if *q == 1.0 => format!("max {v:+.4}"),
                    q => format!("{}% {v:+.4}", q * 100.0),
                })
                .collect();
            out.push_str(&format!("  now − captured: {}\n", spread.join("  ")));
        }
    }
    out.push_str(&format!(
        "\nrefused now: {} rows that were answered at capture; {} refused then too; {} answered now that were refused then\n",
        r.now_refused_count, r.refused_before_too, r.now_answered
    ));
    for refused in &r.now_refused {
        out.push_str(&format!("  {} row {}: {}\n", refused.at.line, refused.at.row, refused.why));
    }
    if r.private > 0 {
        out.push_str(&format!(
            "{} rows not compared: capture dropped or hashed a private feature of theirs\n",
            r.private
        ));
    }
    if r.unreadable_count > 0 {
        out.push_str(&format!("{} lines could not be read:\n", r.unreadable_count));
        for u in &r.unreadable {
            out.push_str(&format!("  {u}\n"));
        }
    }
    match &r.drift {
        None => out.push_str("the candidate carries no training profile: no output drift\n"),
        Some(d) => {
            for f in d.fields.iter().filter(|f| f.kind == "output") {
                let index = f.index.map_or("-".to_owned(), |i| format!("{i:.4}"));
                out.push_str(&format!(
                    "output {} against the candidate's training profile: index {index}, {}\n",
                    f.name, f.level
                ));
            }
        }
    }
    out
}
