//! `paddock stream`: NDJSON requests on stdin, NDJSON answers on stdout,
//! one per line and in order; a bad line gets an error line and the stream
//! goes on. Each line names a model, and carries context, an optional time
//! and id, and `row` or `rows`.

use std::io::{BufReader, BufWriter};

use anyhow::Result;
use paddock_serve::surface::stream::{self, StreamOptions};

use crate::Outcome;
use crate::common::StoreArgs;

/// Score NDJSON request lines from stdin against a store.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    store: StoreArgs,
    /// Longest input line, in KiB; longer lines get an error line.
    #[arg(long, default_value_t = 1024, value_name = "KIB")]
    max_line_kib: usize,
}

/// Runs the stream until stdin ends; exit 1 if any line failed.
pub fn run(args: Args) -> Result<Outcome> {
    let opened = args.store.open()?;
    let registry = &opened.registry;
    let stdin = BufReader::with_capacity(64 << 10, std::io::stdin().lock());
    let stdout = BufWriter::new(std::io::stdout().lock());
    let options = StreamOptions { max_line_bytes: args.max_line_kib << 10 };
    let summary = stream::run(registry, stdin, stdout, options)?;
    registry.save_usage()?;
    eprintln!("{} lines: {} answered, {} failed", summary.lines, summary.answered, summary.failed);
    Ok(if summary.failed > 0 { Outcome::Failed } else { Outcome::Ok })
}
