//! `paddock score`: score rows from a CSV or NDJSON file (or stdin).

use std::fs::File;
use std::io::{self, BufWriter, Read, Write};
use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use indicatif::{ProgressBar, ProgressStyle};
use paddock_host::contract::row_file::{self, Record, RowFormat};
use paddock_host::{Model, ScoreError};

use crate::Outcome;
use crate::common::LoadArgs;

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
enum FormatArg {
    Csv,
    Ndjson,
}

impl From<FormatArg> for RowFormat {
    fn from(f: FormatArg) -> RowFormat {
        match f {
            FormatArg::Csv => RowFormat::Csv,
            FormatArg::Ndjson => RowFormat::Ndjson,
        }
    }
}

/// Score rows. A row that breaks the contract gets an error line with its
/// row number and the rest are scored. Exits 1 when some rows failed.
#[derive(clap::Args)]
pub struct Args {
    /// The artifact.
    artifact: PathBuf,
    /// Rows to score: a .csv or .ndjson file, or `-` for stdin.
    #[arg(default_value = "-")]
    input: PathBuf,
    /// Input format [default: from the extension; csv for stdin].
    #[arg(long, value_enum)]
    from: Option<FormatArg>,
    /// Output format [default: the input's].
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
    /// Same as --to ndjson (for programs reading the output).
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    limits: LoadArgs,
}

/// One output line.
struct Line {
    number: usize,
    id: Option<String>,
    result: Result<Vec<f64>, String>,
}

/// Reads, scores in batches, writes in input order.
pub fn run(args: Args) -> Result<Outcome> {
    let (_runtime, model) = args.limits.load(&args.artifact)?;
    let stdin = args.input.as_os_str() == "-";
    let format: RowFormat = match (args.from, stdin) {
        (Some(f), _) => f.into(),
        (None, true) => RowFormat::Csv,
        (None, false) => match RowFormat::from_path(&args.input) {
            Some(f) => f,
            None => bail!("cannot tell the format of {}: use --from csv or --from ndjson", args.input.display()),
        },
    };
    let to: RowFormat = if args.json { RowFormat::Ndjson } else { args.to.map_or(format, RowFormat::from) };
    let (input, progress): (Box<dyn Read>, ProgressBar) = if stdin {
        (Box::new(io::stdin().lock()), ProgressBar::hidden())
    } else {
        let file = File::open(&args.input).with_context(|| format!("opening {}", args.input.display()))?;
        let len = file.metadata().map(|m| m.len()).unwrap_or(0);
        let bar = if len > 1 << 20 { ProgressBar::new(len) } else { ProgressBar::hidden() };
        bar.set_style(
            ProgressStyle::with_template("{bar:40} {bytes}/{total_bytes} {eta}")
                .unwrap_or_else(|_| ProgressStyle::default_bar()),
        );
        (Box::new(bar.wrap_read(file)), bar)
    };
    // The header is checked before any output is created.
    let schema = model.schema();
    let columns = row_file::Columns { id: args.id.as_deref(), ignore: &args.ignore };
    let records = row_file::records(input, format, schema, columns)
        .with_context(|| format!("reading {}", args.input.display()))?;
    let out: Box<dyn Write> = match &args.out {
        Some(p) => Box::new(File::create(p).with_context(|| format!("creating {}", p.display()))?),
        None => Box::new(io::stdout().lock()),
    };
    let mut writer = Writer::new(out, to, &model, args.id.is_some())?;
    let mut batch: Vec<Record> = Vec::with_capacity(args.batch as usize);
    let (mut scored, mut failed) = (0usize, 0usize);
    for record in records {
        batch.push(record);
        if batch.len() >= args.batch as usize {
            for line in score_batch(&model, std::mem::take(&mut batch)) {
                if line.result.is_ok() {
                    scored += 1
                } else {
                    failed += 1
                }
                writer.write(&line)?;
            }
        }
    }
    for line in score_batch(&model, batch) {
        if line.result.is_ok() {
            scored += 1
        } else {
            failed += 1
        }
        writer.write(&line)?;
    }
    writer.finish()?;
    progress.finish_and_clear();
    eprintln!("{} scored, {} failed", rows(scored), rows(failed));
    Ok(if failed == 0 { Outcome::Ok } else { Outcome::Failed })
}

/// Scores the valid records of a batch in one call; if that call fails as
/// a whole, scores them one by one so one bad row cannot sink the others.
fn score_batch(model: &Model, records: Vec<Record>) -> Vec<Line> {
    let schema = model.schema();
    let mut cells = Vec::with_capacity(records.len() * schema.width());
    let mut lines: Vec<Line> = Vec::with_capacity(records.len());
    let mut valid = Vec::new();
    for record in records {
        let result = match &record.row {
            Ok(row) => match schema.encode_row(record.number, row, &mut cells) {
                Ok(()) => {
                    valid.push(lines.len());
                    Ok(Vec::new())
                }
                Err(problems) => Err(problems.iter().map(ToString::to_string).collect::<Vec<_>>().join("; ")),
            },
            Err(e) => Err(format!("row {}: {e}", record.number)),
        };
        lines.push(Line { number: record.number, id: record.id, result });
    }
    if valid.is_empty() {
        return lines;
    }
    let width = schema.width();
    let numbers: Vec<usize> = valid.iter().map(|&i| lines[i].number).collect();
    match model.score_cells_unchecked(valid.len(), &cells) {
        Ok(estimates) => {
            for (r, &i) in valid.iter().enumerate() {
                lines[i].result = Ok(estimates.values_at(r).to_vec());
            }
        }
        Err(_) if valid.len() > 1 => {
            for (r, &i) in valid.iter().enumerate() {
                lines[i].result = model
                    .score_cells_unchecked(1, &cells[r * width..(r + 1) * width])
                    .map(|e| e.values_at(0).to_vec())
                    .map_err(|e| describe(lines[i].number, &e));
            }
        }
        Err(e) => {
            let e = e.renumber(|r| numbers.get(r - 1).copied().unwrap_or(r));
            for &i in &valid {
                lines[i].result = Err(describe(lines[i].number, &e));
            }
        }
    }
    lines
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
            }
            Err(e) => m.serialize_entry("error", e)?,
        }
        m.end()
    }
}

enum Sink {
    Csv(Box<csv::Writer<Box<dyn Write>>>),
    Ndjson(BufWriter<Box<dyn Write>>),
}

struct Writer {
    sink: Sink,
    outputs: Vec<String>,
    with_id: bool,
}

impl Writer {
    fn new(out: Box<dyn Write>, format: RowFormat, model: &Model, with_id: bool) -> Result<Self> {
        let outputs: Vec<String> = model.contract().outputs.iter().map(|o| o.name.clone()).collect();
        let sink = match format {
            RowFormat::Csv => {
                let mut csv = csv::Writer::from_writer(out);
                let mut header = vec!["row".to_owned()];
                if with_id {
                    header.push("id".into());
                }
                header.extend(outputs.iter().cloned());
                header.push("error".into());
                csv.write_record(&header)?;
                Sink::Csv(Box::new(csv))
            }
            RowFormat::Ndjson => Sink::Ndjson(BufWriter::new(out)),
        };
        Ok(Writer { sink, outputs, with_id })
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
                        record.extend(values.iter().map(f64::to_string));
                        record.push(String::new());
                    }
                    Err(e) => {
                        record.extend(self.outputs.iter().map(|_| String::new()));
                        record.push(e.clone());
                    }
                }
                csv.write_record(&record)?;
            }
            Sink::Ndjson(out) => {
                serde_json::to_writer(&mut *out, &JsonLine { line, outputs: &self.outputs })?;
                out.write_all(b"\n")?;
            }
        }
        Ok(())
    }

    fn finish(self) -> Result<()> {
        match self.sink {
            Sink::Csv(mut csv) => csv.flush()?,
            Sink::Ndjson(mut out) => out.flush()?,
        }
        Ok(())
    }
}
