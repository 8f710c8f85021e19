//! `paddock score`: score rows from a CSV, NDJSON or Parquet file (or
//! stdin), batches side by side on every core, results in input order.

use std::fs::File;
use std::io::{self, BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use indicatif::{ProgressBar, ProgressStyle};
use paddock_host::contract::row_file::{self, Record, RowFormat};
use paddock_host::{DriftWindow, Model, ScoreError};

use crate::Outcome;
use crate::common::LoadArgs;
use crate::parquet_out::ParquetOut;

#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
enum FormatArg {
    Csv,
    Ndjson,
    /// Estimate requests, one per line (a host's capture files).
    Requests,
    /// Apache Parquet, read and written a batch at a time.
    Parquet,
}

impl FormatArg {
    /// The format a file's name says, if any.
    fn of_path(path: &Path) -> Option<FormatArg> {
        if path.extension().is_some_and(|e| e.eq_ignore_ascii_case("parquet")) {
            return Some(FormatArg::Parquet);
        }
        Some(match RowFormat::from_path(path)? {
            RowFormat::Csv => FormatArg::Csv,
            RowFormat::Ndjson => FormatArg::Ndjson,
            RowFormat::Requests => FormatArg::Requests,
        })
    }

    /// The text format read by the host's row reader (`None`: Parquet).
    fn rows(self) -> Option<RowFormat> {
        match self {
            FormatArg::Csv => Some(RowFormat::Csv),
            FormatArg::Ndjson => Some(RowFormat::Ndjson),
            FormatArg::Requests => Some(RowFormat::Requests),
            FormatArg::Parquet => None,
        }
    }
}

/// Score rows. A row that breaks the contract gets an error line with its
/// row number and the rest are scored. Exits 1 when some rows failed.
#[derive(clap::Args)]
pub struct Args {
    /// The artifact.
    artifact: PathBuf,
    /// Rows to score: a .csv, .ndjson or .requests.ndjson file (a host's
    /// capture), each may be gzip-compressed (.gz), a .parquet file, or `-`
    /// for stdin (CSV, NDJSON or requests).
    #[arg(default_value = "-")]
    input: PathBuf,
    /// Input format [default: from the extension; csv for stdin].
    #[arg(long, value_enum)]
    from: Option<FormatArg>,
    /// Output format [default: the input's; NDJSON for requests].
    #[arg(long, value_enum)]
    to: Option<FormatArg>,
    /// Write results here instead of stdout.
    #[arg(long, short, value_name = "FILE")]
    out: Option<PathBuf>,
    /// A column (CSV) or key (NDJSON) that identifies the row; copied to the output.
    #[arg(long, value_name = "NAME")]
    id: Option<String>,
    /// A column (CSV) or key (NDJSON) that is not a feature: left out of every row. Repeatable.
    #[arg(long, value_name = "NAME")]
    ignore: Vec<String>,
    /// Rows per call into the sandbox.
    #[arg(long, default_value_t = 512, value_parser = clap::value_parser!(u32).range(1..=65_536))]
    batch: u32,
    /// Batches scored at once, each on a thread of its own; the output keeps
    /// the input's order [default: the number of cores].
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u32).range(1..=1024))]
    threads: Option<u32>,
    /// Same as --to ndjson (for programs reading the output); no progress
    /// bar.
    #[arg(long)]
    json: bool,
    /// Add each row's contributions: per output, the baseline and how much
    /// each feature moved the margin from it (CSV: columns
    /// `OUTPUT.baseline` and `OUTPUT.FEATURE`; NDJSON: a `contributions`
    /// object). They describe the model, not the world.
    #[arg(long)]
    contributions: bool,
    /// After scoring, compare the file's rows with the training profile
    /// the artifact carries: per feature and output, the stability index,
    /// its level, and the training against the file's shares as bars (on
    /// standard error). Refused when the artifact carries no profile.
    #[arg(long)]
    drift: bool,
    #[command(flatten)]
    limits: LoadArgs,
}

/// A progress bar's style from `template`.
fn style(template: &str) -> ProgressStyle {
    ProgressStyle::with_template(template).unwrap_or_else(|_| ProgressStyle::default_bar())
}

/// One output line.
struct Line {
    number: usize,
    id: Option<String>,
    result: Result<Vec<f64>, String>,
    /// When asked: per output, the baseline and then each feature's
    /// contribution.
    why: Vec<f64>,
}

/// Reads, scores in batches, writes in input order.
pub fn run(args: Args) -> Result<Outcome> {
    let mut options = args.limits.options();
    if args.drift {
        // Every row of the file counts, however few.
        options.drift = Some(DriftWindow { min_count: 1, ..DriftWindow::default() });
    }
    let (_runtime, model) = args.limits.load_with(&args.artifact, options)?;
    if args.drift && model.drift().is_none() {
        bail!("--drift: {} carries no training profile (pack it with --profile)", args.artifact.display());
    }
    if args.contributions {
        // A model that cannot explain is known before any row is read.
        if let Err(e) = model.explain_cells_unchecked(0, &[]) {
            bail!("--contributions: {e}");
        }
    }
    let stdin = args.input.as_os_str() == "-";
    let format = match (args.from, stdin) {
        (Some(f), _) => f,
        (None, true) => FormatArg::Csv,
        (None, false) => match FormatArg::of_path(&args.input) {
            Some(f) => f,
            None => bail!(
                "cannot tell the format of {}: use --from csv, --from ndjson, --from requests or --from parquet",
                args.input.display()
            ),
        },
    };
    if stdin && format == FormatArg::Parquet {
        bail!("--from parquet: Parquet is read from a file (its footer comes first), not from stdin");
    }
    let to = match (args.json, args.to, format) {
        (true, _, _) | (false, None, FormatArg::Requests) => FormatArg::Ndjson,
        (false, Some(to), _) => to,
        (false, None, from) => from,
    };
    if to == FormatArg::Requests {
        bail!("--to requests: results are written as CSV, NDJSON or Parquet");
    }
    // Quiet when standard error is not a terminal (indicatif's own rule)
    // or the output is for a program.
    let visible = |bar: ProgressBar| if args.json { ProgressBar::hidden() } else { bar };
    // The header (or the Parquet schema) is checked before any output is created.
    let schema = model.schema();
    let columns = row_file::Columns { id: args.id.as_deref(), ignore: &args.ignore };
    let reading = || format!("reading {}", args.input.display());
    let (records, progress): (Box<dyn Iterator<Item = Record>>, ProgressBar) = match format.rows() {
        None => {
            let file = File::open(&args.input).with_context(|| format!("opening {}", args.input.display()))?;
            let records = paddock_serve::parquet::records(file, schema, columns).with_context(reading)?;
            let bar = visible(ProgressBar::new(records.total()));
            bar.set_style(style("{bar:40} {pos}/{len} rows, {msg}, {eta} left"));
            (Box::new(records), bar)
        }
        Some(rows) => {
            let (input, bar): (Box<dyn Read>, ProgressBar) = if stdin {
                (Box::new(io::stdin().lock()), ProgressBar::hidden())
            } else {
                let file = File::open(&args.input).with_context(|| format!("opening {}", args.input.display()))?;
                let len = file.metadata().map(|m| m.len()).unwrap_or(0);
                let bar = visible(if len > 1 << 20 { ProgressBar::new(len) } else { ProgressBar::hidden() });
                bar.set_style(style("{bar:40} {bytes}/{total_bytes}, {msg}, {eta} left"));
                (crate::common::decompressed(&args.input, Box::new(bar.wrap_read(file))), bar)
            };
            (row_file::records(input, rows, schema, columns).with_context(reading)?, bar)
        }
    };
    let out: Box<dyn Write + Send> = match &args.out {
        Some(p) => Box::new(File::create(p).with_context(|| format!("creating {}", p.display()))?),
        None => Box::new(io::stdout()),
    };
    // A request's id (if it has one) names its rows.
    let with_id = args.id.is_some() || format == FormatArg::Requests;
    let mut writer = Writer::new(out, to, &model, with_id, args.contributions)?;
    let threads =
        args.threads.map_or_else(|| std::thread::available_parallelism().map_or(1, usize::from), |n| n as usize);
    let (batch, explain) = (args.batch as usize, args.contributions);
    let (mut scored, mut failed) = (0usize, 0usize);
    let mut records = records.peekable();
    // A round: up to `threads` batches read, scored side by side, written in order.
    while records.peek().is_some() {
        let round: Vec<Vec<Record>> =
            (0..threads).map(|_| records.by_ref().take(batch).collect::<Vec<_>>()).filter(|b| !b.is_empty()).collect();
        let lines: Vec<Vec<Line>> = std::thread::scope(|scope| {
            let model = &model;
            let running: Vec<_> =
                round.into_iter().map(|b| scope.spawn(move || score_batch(model, b, explain))).collect();
            running.into_iter().map(|h| h.join().unwrap_or_else(|e| std::panic::resume_unwind(e))).collect()
        });
        for line in lines.into_iter().flatten() {
            if line.result.is_ok() {
                scored += 1
            } else {
                failed += 1
            }
            writer.write(&line)?;
        }
        if format == FormatArg::Parquet {
            progress.set_position((scored + failed) as u64);
        }
        progress.set_message(format!(
            "{:.0} rows/s",
            (scored + failed) as f64 / progress.elapsed().as_secs_f64().max(1e-3)
        ));
    }
    writer.finish()?;
    progress.finish_and_clear();
    eprintln!("{} scored, {} failed", rows(scored), rows(failed));
    if let Some(report) = args.drift.then(|| model.drift()).flatten() {
        eprint!("{}", crate::bars::drift_text(&report, "these rows"));
    }
    Ok(if failed == 0 { Outcome::Ok } else { Outcome::Failed })
}

/// Scores the valid records of a batch in one call; if that call fails as
/// a whole, scores them one by one so one bad row cannot sink the others.
/// With `explain`, adds the scored rows' contributions.
fn score_batch(model: &Model, records: Vec<Record>, explain: bool) -> Vec<Line> {
    let mut lines = records_cells(model, records);
    score_lines(model, &mut lines);
    if explain {
        add_contributions(model, &mut lines);
    }
    lines.into_iter().map(|(line, _)| line).collect()
}

/// A batch's lines and, for each valid record, its cells (empty otherwise).
fn records_cells(model: &Model, records: Vec<Record>) -> Vec<(Line, Vec<f64>)> {
    let schema = model.schema();
    records
        .into_iter()
        .map(|record| {
            let mut cells = Vec::with_capacity(schema.width());
            let result = match &record.row {
                Ok(row) => match schema.encode_row(record.number, row, &mut cells) {
                    Ok(()) => Ok(Vec::new()),
                    Err(problems) => Err(problems.iter().map(ToString::to_string).collect::<Vec<_>>().join("; ")),
                },
                Err(e) => Err(format!("row {}: {e}", record.number)),
            };
            (Line { number: record.number, id: record.id, result, why: Vec::new() }, cells)
        })
        .collect()
}

/// Each scored line's contributions, from one call for the batch; when
/// that call fails, each scored line fails with its error.
fn add_contributions(model: &Model, lines: &mut [(Line, Vec<f64>)]) {
    let scored: Vec<usize> = (0..lines.len()).filter(|&i| lines[i].0.result.is_ok()).collect();
    if scored.is_empty() {
        return;
    }
    let cells: Vec<f64> = scored.iter().flat_map(|&i| lines[i].1.iter().copied()).collect();
    match model.explain_cells_unchecked(scored.len(), &cells) {
        Ok(explained) => {
            for (r, &i) in scored.iter().enumerate() {
                let outputs = explained.output_names().len();
                lines[i].0.why = (0..outputs)
                    .flat_map(|o| {
                        let a = explained.of(r, o);
                        std::iter::once(a.baseline).chain(a.features.iter().copied()).collect::<Vec<_>>()
                    })
                    .collect();
            }
        }
        Err(e) => {
            for &i in &scored {
                lines[i].0.result = Err(format!("row {}: {e}", lines[i].0.number));
            }
        }
    }
}

/// Scores a batch's valid lines in one call; if that call fails as a
/// whole, one by one, so one bad row cannot sink the others.
fn score_lines(model: &Model, lines: &mut [(Line, Vec<f64>)]) {
    let valid: Vec<usize> = (0..lines.len()).filter(|&i| lines[i].0.result.is_ok()).collect();
    if valid.is_empty() {
        return;
    }
    let cells: Vec<f64> = valid.iter().flat_map(|&i| lines[i].1.iter().copied()).collect();
    let numbers: Vec<usize> = valid.iter().map(|&i| lines[i].0.number).collect();
    match model.score_cells_unchecked(valid.len(), &cells) {
        Ok(estimates) => {
            for (r, &i) in valid.iter().enumerate() {
                lines[i].0.result = Ok(estimates.values_at(r).to_vec());
            }
        }
        Err(_) if valid.len() > 1 => {
            for &i in &valid {
                let (line, cells) = &mut lines[i];
                line.result = model
                    .score_cells_unchecked(1, cells)
                    .map(|e| e.values_at(0).to_vec())
                    .map_err(|e| describe(line.number, &e));
            }
        }
        Err(e) => {
            let e = e.renumber(|r| numbers.get(r - 1).copied().unwrap_or(r));
            for &i in &valid {
                lines[i].0.result = Err(describe(lines[i].0.number, &e));
            }
        }
    }
}

/// An error for one row, numbered as the file numbers it. Output faults
/// name their row already.
fn describe(number: usize, e: &ScoreError) -> String {
    match e {
        ScoreError::Output(_) => e.clone().renumber(|_| number).to_string(),
        _ => format!("row {number}: {e}"),
    }
}

/// "1 row", "2 rows".
fn rows(n: usize) -> String {
    if n == 1 { "1 row".into() } else { format!("{n} rows") }
}

/// An NDJSON output line: `row`, `id`, the outputs in contract order, or
/// `error`.
struct JsonLine<'a> {
    line: &'a Line,
    outputs: &'a [String],
    features: &'a [String],
}

/// One output's contributions in an NDJSON line.
#[derive(serde::Serialize)]
struct JsonWhy<'a> {
    baseline: f64,
    features: JsonNamed<'a, f64>,
}

/// Names and values as one JSON object, in order.
struct JsonNamed<'a, T>(&'a [String], &'a [T]);

impl<T: serde::Serialize> serde::Serialize for JsonNamed<'_, T> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut m = s.serialize_map(Some(self.0.len()))?;
        for (k, v) in self.0.iter().zip(self.1) {
            m.serialize_entry(k, v)?;
        }
        m.end()
    }
}

impl serde::Serialize for JsonLine<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut m = s.serialize_map(None)?;
        m.serialize_entry("row", &self.line.number)?;
        if let Some(id) = &self.line.id {
            m.serialize_entry("id", id)?;
        }
        match &self.line.result {
            Ok(values) => {
                for (name, v) in self.outputs.iter().zip(values) {
                    m.serialize_entry(name, v)?;
                }
                if !self.line.why.is_empty() {
                    let blocks = self.line.why.chunks_exact(self.features.len() + 1);
                    let why: Vec<JsonWhy<'_>> = blocks
                        .map(|b| JsonWhy { baseline: b[0], features: JsonNamed(self.features, &b[1..]) })
                        .collect();
                    m.serialize_entry("contributions", &JsonNamed(self.outputs, &why))?;
                }
            }
            Err(e) => m.serialize_entry("error", e)?,
        }
        m.end()
    }
}

enum Sink {
    Csv(Box<csv::Writer<Box<dyn Write + Send>>>),
    Ndjson(BufWriter<Box<dyn Write + Send>>),
    Parquet(Box<ParquetOut>),
}

struct Writer {
    sink: Sink,
    outputs: Vec<String>,
    /// The contract's features, when contributions are written.
    features: Vec<String>,
    with_id: bool,
}

impl Writer {
    fn new(out: Box<dyn Write + Send>, format: FormatArg, model: &Model, with_id: bool, why: bool) -> Result<Self> {
        let outputs: Vec<String> = model.contract().outputs.iter().map(|o| o.name.clone()).collect();
        let features: Vec<String> = match why {
            true => model.contract().features.iter().map(|f| f.name.clone()).collect(),
            false => Vec::new(),
        };
        // Contribution columns: per output, its baseline then each feature.
        let why_columns: Vec<String> = match why {
            true => outputs
                .iter()
                .flat_map(|o| {
                    std::iter::once(format!("{o}.baseline")).chain(features.iter().map(move |f| format!("{o}.{f}")))
                })
                .collect(),
            false => Vec::new(),
        };
        let sink = match format {
            FormatArg::Csv => {
                let mut csv = csv::Writer::from_writer(out);
                let mut header = vec!["row".to_owned()];
                if with_id {
                    header.push("id".into());
                }
                header.extend(outputs.iter().cloned());
                header.extend(why_columns);
                header.push("error".into());
                csv.write_record(&header)?;
                Sink::Csv(Box::new(csv))
            }
            FormatArg::Parquet => Sink::Parquet(Box::new(ParquetOut::new(out, with_id, &outputs, &why_columns)?)),
            FormatArg::Ndjson | FormatArg::Requests => Sink::Ndjson(BufWriter::new(out)),
        };
        Ok(Writer { sink, outputs, features, with_id })
    }

    fn write(&mut self, line: &Line) -> Result<()> {
        match &mut self.sink {
            Sink::Csv(csv) => {
                let mut record = vec![line.number.to_string()];
                if self.with_id {
                    record.push(line.id.clone().unwrap_or_default());
                }
                match &line.result {
                    Ok(values) => {
                        record.extend(values.iter().chain(&line.why).map(f64::to_string));
                        record.push(String::new());
                    }
                    Err(e) => {
                        let why = if self.features.is_empty() { 0 } else { self.features.len() + 1 };
                        record.extend((0..self.outputs.len() * (1 + why)).map(|_| String::new()));
                        record.push(e.clone());
                    }
                }
                csv.write_record(&record)?;
            }
            Sink::Ndjson(out) => {
                serde_json::to_writer(&mut *out, &JsonLine { line, outputs: &self.outputs, features: &self.features })?;
                out.write_all(b"\n")?;
            }
            Sink::Parquet(out) => {
                let values: Vec<f64>;
                let result = match &line.result {
                    Ok(outputs) if line.why.is_empty() => Ok(&outputs[..]),
                    Ok(outputs) => {
                        values = outputs.iter().chain(&line.why).copied().collect();
                        Ok(&values[..])
                    }
                    Err(e) => Err(e.as_str()),
                };
                out.push(line.number, line.id.as_deref(), result)?;
            }
        }
        Ok(())
    }

    fn finish(self) -> Result<()> {
        match self.sink {
            Sink::Csv(mut csv) => csv.flush()?,
            Sink::Ndjson(mut out) => out.flush()?,
            Sink::Parquet(out) => out.finish()?,
        }
        Ok(())
    }
}
