//! `paddock`: pack, inspect, check and score sandboxed model artifacts, and
//! serve a store of versions.
//!
//! Each subcommand lives in its own file under `cmd/` and is a thin
//! wrapper over the `paddock_host` library.

/// `println!` for a command's output, as an expression of type
/// `io::Result<()>`: a reader that closed the pipe (`paddock … | head -1`)
/// comes back as an error that ends the command quietly ([`closed_pipe`]),
/// where `println!` would panic.
macro_rules! outln {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        writeln!(std::io::stdout().lock(), $($arg)*)
    }};
}

/// `print!` for a command's output; see [`outln!`].
macro_rules! out {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        write!(std::io::stdout().lock(), $($arg)*)
    }};
}

/// The binary's allocator: `serve`, `stream` and `work` allocate and free
/// on many threads at once, where glibc's arenas lock (profiled under
/// `scripts/http_load.py lookups`). The library leaves the choice to its
/// embedder.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

mod bars;
mod cmd;
mod common;
mod flags;
mod parquet_out;
mod place;

use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// Run sandboxed WebAssembly models next to your data.
#[derive(Parser)]
#[command(name = "paddock", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    Pack(cmd::pack::Args),
    Inspect(cmd::inspect::Args),
    Score(cmd::score::Args),
    Check(cmd::check::Args),
    Audit(cmd::audit::Args),
    Demo(cmd::demo::Args),
    Status(cmd::status::Args),
    Drift(cmd::drift::Args),
    Replay(cmd::replay::Args),
    Serve(cmd::serve::Args),
    Stream(cmd::stream::Args),
    Usage(cmd::usage::Args),
    Voucher(cmd::voucher::Args),
    Vouch(cmd::vouch::Args),
    Admit(cmd::admit::Args),
    Work(cmd::work::Args),
    Publish(cmd::publish::Args),
    Withdraw(cmd::withdraw::Args),
    Show(cmd::show::Args),
    Revise(cmd::revise::Args),
    History(cmd::history::Args),
    Restore(cmd::restore::Args),
    Hosts(cmd::hosts::Args),
}

/// What a command that ran reports back to `main`.
pub enum Outcome {
    /// Everything it looked at was fine.
    Ok,
    /// It ran to the end and found a failure: a check that fails, an
    /// artifact refused, a row or line that could not be scored.
    Failed,
}

/// Exit codes: 0 ran and found nothing wrong; 1 ran and found a failure;
/// 2 could not run (bad arguments, an unreadable file, a model that does
/// not load, a store that cannot be opened).
mod exit {
    pub const FOUND_A_FAILURE: u8 = 1;
    pub const COULD_NOT_RUN: u8 = 2;
}

fn main() -> ExitCode {
    // clap exits 2 on bad arguments, the same code as any other reason the
    // command could not run.
    let cli = Cli::parse();
    common::init_logging();
    let result = match cli.command {
        Command::Pack(a) => cmd::pack::run(a),
        Command::Inspect(a) => cmd::inspect::run(a),
        Command::Score(a) => cmd::score::run(a),
        Command::Check(a) => cmd::check::run(a),
        Command::Audit(a) => cmd::audit::run(a),
        Command::Demo(a) => cmd::demo::run(a),
        Command::Status(a) => cmd::status::run(a),
        Command::Drift(a) => cmd::drift::run(a),
        Command::Replay(a) => cmd::replay::run(a),
        Command::Serve(a) => cmd::serve::run(a),
        Command::Stream(a) => cmd::stream::run(a),
        Command::Usage(a) => cmd::usage::run(a),
        Command::Voucher(a) => cmd::voucher::run(a),
        Command::Vouch(a) => cmd::vouch::run(a),
        Command::Admit(a) => cmd::admit::run(a),
        Command::Work(a) => cmd::work::run(a),
        Command::Publish(a) => cmd::publish::run(a),
        Command::Withdraw(a) => cmd::withdraw::run(a),
        Command::Show(a) => cmd::show::run(a),
        Command::Revise(a) => cmd::revise::run(a),
        Command::History(a) => cmd::history::run(a),
        Command::Restore(a) => cmd::restore::run(a),
        Command::Hosts(a) => cmd::hosts::run(a),
    };
    match result {
        Ok(Outcome::Ok) => ExitCode::SUCCESS,
        Ok(Outcome::Failed) => ExitCode::from(exit::FOUND_A_FAILURE),
        // The reader went away (`| head`): nothing more to say, and nobody to say it to.
        Err(e) if closed_pipe(&e) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {}", message(&e));
            ExitCode::from(exit::COULD_NOT_RUN)
        }
    }
}

/// The error and its causes on one line, each cause said once: library
/// errors already name their cause (`cannot read F: No such file…`), so a
/// cause whose text the line holds already is not repeated.
pub(crate) fn message(e: &anyhow::Error) -> String {
    let mut line = String::new();
    for cause in e.chain() {
        let text = cause.to_string();
        if line.contains(&text) {
            continue;
        }
        if !line.is_empty() {
            line.push_str(": ");
        }
        line.push_str(&text);
    }
    flags::named(&line)
}

/// Whether the error comes from writing to a pipe whose reader has closed
/// it, directly or through the CSV writer.
fn closed_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|cause| {
        let io = cause.downcast_ref::<std::io::Error>().or_else(|| match cause.downcast_ref::<csv::Error>()?.kind() {
            csv::ErrorKind::Io(io) => Some(io),
            _ => None,
        });
        io.is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
