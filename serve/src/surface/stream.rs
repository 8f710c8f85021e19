//! The NDJSON stream: one request per input line, one answer per output
//! line, in the same order.
//!
//! ```text
//! {"id": 1, "model": "charge-minutes", "context": {"site": "Harbour Lot"}, "at": "2026-12-05T08:27:00+01:00", "row": {...}}
//! → {"id": 1, "line": 1, "answer": {"model": ..., "version": "1.1.0", "route": "weekend", "estimates": [{"minutes": 142.3}], ...}}
//! {"model": "nope", "row": {}}
//! → {"line": 2, "error": {"kind": "unknown_model", ...}}
//! ```
//!
//! A bad line (not JSON, unknown fields, too long, a model error) gets an
//! error line and the stream goes on. Lines are read one at a time and
//! answered before the next is read, so memory stays bounded by the longest
//! allowed line, and a slow reader of the output slows the reading of the
//! input (backpressure) instead of filling memory.

use std::io::{BufRead, Write};

use serde::Serialize;

use super::wire::{ErrorBody, EstimateAnswer, EstimateRequest};
use crate::registry::Registry;

/// How a stream runs.
#[derive(Clone, Copy, Debug)]
pub struct StreamOptions {
    /// Longest input line, in bytes; a longer line gets an error and is
    /// skipped. Default 1 MiB.
    pub max_line_bytes: usize,
}

impl Default for StreamOptions {
    fn default() -> Self {
        StreamOptions { max_line_bytes: 1 << 20 }
    }
}

/// What a stream did.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct StreamSummary {
    /// Lines read (blank lines excepted).
    pub lines: u64,
    /// Lines answered with estimates.
    pub answered: u64,
    /// Lines answered with an error.
    pub failed: u64,
}

#[derive(Serialize)]
struct OutLine<'a> {
    #[serde(skip_serializing_if = "Option::is_none")]
    id: Option<&'a serde_json::Value>,
    line: u64,
    #[serde(skip_serializing_if = "Option::is_none")]
    answer: Option<EstimateAnswer>,
    #[serde(skip_serializing_if = "Option::is_none")]
    error: Option<super::wire::ErrorDetail>,
}

/// Reads request lines from `input` until it ends, writing one answer line
/// per request line to `output` (flushed after each).
///
/// # Errors
/// Only I/O errors of `input` or `output`; every problem with a line is an
/// error line in the output.
pub fn run(
    registry: &Registry,
    mut input: impl BufRead,
    mut output: impl Write,
    options: StreamOptions,
) -> std::io::Result<StreamSummary> {
    let mut summary = StreamSummary::default();
    let mut buf = Vec::new();
    let mut number = 0u64;
    loop {
        buf.clear();
        let (read, overlong) = read_line(&mut input, &mut buf, options.max_line_bytes)?;
        if read == 0 {
            break;
        }
        number += 1;
        if !overlong && buf.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        summary.lines += 1;
        let out = if overlong {
            let e =
                ErrorBody::new("too_large", format!("line {number} is longer than {} bytes", options.max_line_bytes));
            (None, Err(e))
        } else {
            answer(registry, &buf)
        };
        let (id, result) = out;
        let (answer, error) = match result {
            Ok(a) => {
                summary.answered += 1;
                (Some(a), None)
            }
            Err(e) => {
                summary.failed += 1;
                (None, Some(e.error))
            }
        };
        let line = OutLine { id: id.as_ref(), line: number, answer, error };
        serde_json::to_writer(&mut output, &line)?;
        output.write_all(b"\n")?;
        output.flush()?;
    }
    Ok(summary)
}

/// One request line answered: its `id` (when it gave one) and the answer
/// or the error. Also how a stream worker answers an event.
pub(crate) fn answer(
    registry: &Registry,
    bytes: &[u8],
) -> (Option<serde_json::Value>, Result<EstimateAnswer, ErrorBody>) {
    let (id, parsed) = parse(bytes);
    (id, parsed.and_then(|line| line.answer(registry, None)))
}

/// A request line read: the request, its rows and its time.
pub(crate) struct Parsed {
    line: EstimateRequest,
    rows: Vec<paddock_host::contract::rows::Row>,
    at: Option<jiff::Timestamp>,
}

/// Reads a request line: its `id` (when it gave one, even if the rest is
/// wrong) and the request, or why it is not one.
pub(crate) fn parse(bytes: &[u8]) -> (Option<serde_json::Value>, Result<Parsed, ErrorBody>) {
    let mut line: EstimateRequest = match serde_json::from_slice(bytes) {
        Ok(l) => l,
        Err(e) => {
            let id = serde_json::from_slice::<serde_json::Value>(bytes).ok().and_then(|v| v.get("id").cloned());
            return (id, Err(ErrorBody::bad_request(format!("not a request line: {e}"))));
        }
    };
    let id = line.id.take();
    (id, line.take_rows().map(|(rows, at)| Parsed { line, rows, at }))
}

impl Parsed {
    /// The model asked for.
    pub(crate) fn model(&self) -> &str {
        &self.line.model
    }

    /// Routes the request and gathers its features, awaiting the sources
    /// ([`Registry::prepare`]).
    pub(crate) async fn prepare(
        &self,
        registry: &Registry,
    ) -> Result<crate::registry::Prepared, crate::registry::RequestError> {
        registry.prepare(&self.line.request(&self.rows, self.at)).await
    }

    /// Scores it (what `prepared` made ready, when given) into an answer
    /// without the id: the output line carries it.
    pub(crate) fn answer(
        &self,
        registry: &Registry,
        prepared: Option<Result<crate::registry::Prepared, crate::registry::RequestError>>,
    ) -> Result<EstimateAnswer, ErrorBody> {
        let request = self.line.request(&self.rows, self.at);
        match prepared {
            None => registry.score(&request),
            Some(Ok(prepared)) => registry.score_prepared(&request, prepared),
            Some(Err(e)) => Err(e),
        }
        .map(|a| EstimateAnswer::new(a, None))
        .map_err(ErrorBody::from_request)
    }
}

/// Reads one line (without its newline) into `buf`, keeping at most `max`
/// bytes; returns the bytes consumed and whether the line was longer.
fn read_line(input: &mut impl BufRead, buf: &mut Vec<u8>, max: usize) -> std::io::Result<(usize, bool)> {
    let mut consumed = 0;
    let mut overlong = false;
    loop {
        let available = input.fill_buf()?;
        if available.is_empty() {
            return Ok((consumed, overlong));
        }
        let (chunk, done) = match available.iter().position(|&b| b == b'\n') {
            Some(i) => (&available[..i], Some(i + 1)),
            None => (available, None),
        };
        if !overlong {
            if buf.len() + chunk.len() > max {
                overlong = true;
                buf.clear();
            } else {
                buf.extend_from_slice(chunk);
            }
        }
        let used = done.unwrap_or(available.len());
        input.consume(used);
        consumed += used;
        if done.is_some() {
            return Ok((consumed, overlong));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lines_are_cut_at_newlines_and_overlong_ones_flagged() {
        let mut input = std::io::Cursor::new(b"abc\n0123456789\n\nlast".to_vec());
        let mut buf = Vec::new();
        assert_eq!(read_line(&mut input, &mut buf, 5).unwrap(), (4, false));
        assert_eq!(buf, b"abc");
        buf.clear();
        assert_eq!(read_line(&mut input, &mut buf, 5).unwrap(), (11, true));
        buf.clear();
        assert_eq!(read_line(&mut input, &mut buf, 5).unwrap(), (1, false));
        assert!(buf.is_empty());
        assert_eq!(read_line(&mut input, &mut buf, 5).unwrap(), (4, false));
        assert_eq!(buf, b"last");
        buf.clear();
        assert_eq!(read_line(&mut input, &mut buf, 5).unwrap(), (0, false));
    }
}
