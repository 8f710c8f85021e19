//! Replay: captured traffic ([`crate::registry::capture`]) scored again by
//! another model — a candidate before it is published, say — and its
//! answers compared with the ones the host gave.
//!
//! Feed it capture lines one at a time ([`Replay::line`]); the report
//! ([`Replay::finish`]) says, per output the two share by name, how many
//! rows changed, the largest absolute and relative differences and where,
//! and the spread of the differences (quantiles, NumPy's linear method);
//! which rows the candidate's contract now refuses, and which the captured
//! version refused too; and, when the candidate carries a training profile,
//! how its answers drift from it. Rows whose private features capture
//! dropped or hashed are counted apart, not compared.
//!
//! It is not a load test: rows are scored in the order given, a line at a
//! time. Every difference is kept until the report (8 bytes per row and
//! output) so the quantiles are exact.

use std::collections::BTreeMap;

use paddock_host::artifact::profile::quantile;
use paddock_host::drift::DriftReport;
use paddock_host::sandbox::model::{Model, ScoreError};
use serde::{Deserialize, Serialize};

use crate::surface::wire::EstimateRequest;

/// The quantiles of the differences a report gives.
pub const QUANTILES: [f64; 9] = [0.0, 0.01, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99, 1.0];

/// Problems kept in full per kind; the rest are counted.
const KEPT: usize = 10;

/// What a capture line's `captured` holds, as replay reads it (a value
/// the host wrote as NaN reads as `null`).
#[derive(Deserialize)]
struct Captured {
    outputs: Vec<String>,
    answers: Vec<Option<Vec<Option<f64>>>>,
    #[serde(default)]
    private: BTreeMap<String, String>,
}

/// Where a row was: `FILE:LINE`, and its place among the line's rows.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Place {
    /// The file and line, as the caller named them.
    pub line: String,
    /// The row's place in the request, from 1.
    pub row: usize,
}

/// The largest difference of an output, and where.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Largest {
    /// Replayed − captured (absolute) or its ratio to |captured| (relative).
    pub difference: f64,
    /// What the host answered.
    pub captured: f64,
    /// What the candidate answers.
    pub replayed: f64,
    /// Where the row is.
    pub at: Place,
}

/// How one output's answers moved.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct OutputDifferences {
    /// The output.
    pub name: String,
    /// Rows with both answers.
    pub compared: u64,
    /// Of those, the ones whose answer moved by more than the tolerance.
    pub changed: u64,
    /// The largest |replayed − captured|.
    pub largest_absolute: Option<Largest>,
    /// The largest |replayed − captured| / |captured| (rows with a captured 0 left out).
    pub largest_relative: Option<Largest>,
    /// Quantiles of replayed − captured: ([`QUANTILES`], value).
    pub quantiles: Vec<(f64, f64)>,
}

/// A row the candidate did not answer.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Refused {
    /// Where the row is.
    pub at: Place,
    /// Why: the contract's words, or the sandbox's.
    pub why: String,
}

/// What a replay found.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ReplayReport {
    /// The candidate: `name version`.
    pub candidate: String,
    /// The tolerance under which a difference is not a change.
    pub tolerance: f64,
    /// Lines read.
    pub lines: u64,
    /// Lines for another model, skipped.
    pub other_models: u64,
    /// Lines that could not be read as captured requests (the first few kept).
    pub unreadable: Vec<String>,
    /// How many lines could not be read.
    pub unreadable_count: u64,
    /// Rows replayed.
    pub rows: u64,
    /// Rows not compared: a private feature of the candidate's was dropped
    /// or hashed at capture.
    pub private: u64,
    /// Per output both versions have.
    pub outputs: Vec<OutputDifferences>,
    /// Rows the captured version answered that the candidate now refuses (the first few).
    pub now_refused: Vec<Refused>,
    /// How many rows the candidate now refuses that were answered.
    pub now_refused_count: u64,
    /// Rows neither answered.
    pub refused_before_too: u64,
    /// Rows the captured version refused that the candidate answers.
    pub now_answered: u64,
    /// The candidate's outputs (and features) against its own training
    /// profile, when it carries one.
    pub drift: Option<DriftReport>,
}

/// Why a line is not replayed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum LineError {
    /// Not JSON, or not a captured request.
    #[error("not a captured request: {0}")]
    NotCaptured(String),
}

/// A replay in progress.
pub struct Replay {
    model: Model,
    name: String,
    tolerance: f64,
    report: ReplayReport,
    /// Per candidate output: (its column, the differences so far).
    differences: Vec<Vec<f64>>,
}

impl Replay {
    /// A replay of lines for the model named `name` (lines for other
    /// models are skipped) against `model`; differences up to `tolerance`
    /// (absolute) are not changes. Give `model` drift counting
    /// ([`paddock_host::ModelOptions::drift`]) for the report's drift.
    pub fn new(model: Model, name: &str, tolerance: f64) -> Replay {
        let c = model.contract();
        let outputs = c
            .outputs
            .iter()
            .map(|o| OutputDifferences {
                name: o.name.clone(),
                compared: 0,
                changed: 0,
                largest_absolute: None,
                largest_relative: None,
                quantiles: Vec::new(),
            })
            .collect();
        let report = ReplayReport {
            candidate: format!("{} {}", c.name, c.version),
            tolerance,
            lines: 0,
            other_models: 0,
            unreadable: Vec::new(),
            unreadable_count: 0,
            rows: 0,
            private: 0,
            outputs,
            now_refused: Vec::new(),
            now_refused_count: 0,
            refused_before_too: 0,
            now_answered: 0,
            drift: None,
        };
        let differences = vec![Vec::new(); c.outputs.len()];
        Replay { model, name: name.to_owned(), tolerance, report, differences }
    }

    /// Replays one capture line; `place` names it (`FILE:LINE`) in the
    /// report. A line that cannot be read is counted and named, not fatal.
    pub fn line(&mut self, place: &str, text: &str) {
        self.report.lines += 1;
        if let Err(e) = self.replay(place, text) {
            self.unreadable(place, &e.to_string());
        }
    }

    /// Counts a line that could not be read at all (`why`), naming it.
    pub fn unreadable(&mut self, place: &str, why: &str) {
        self.report.unreadable_count += 1;
        if self.report.unreadable.len() < KEPT {
            self.report.unreadable.push(format!("{place}: {why}"));
        }
    }

    fn replay(&mut self, place: &str, text: &str) -> Result<(), LineError> {
        // A capture line is an estimate request with its answers beside it.
        let not_captured = |e: String| LineError::NotCaptured(e);
        let mut line: EstimateRequest = serde_json::from_str(text).map_err(|e| not_captured(e.to_string()))?;
        if line.model != self.name {
            self.report.other_models += 1;
            return Ok(());
        }
        let captured = line.captured.take().ok_or_else(|| not_captured("no `captured` answers".into()))?;
        let captured: Captured = serde_json::from_value(captured).map_err(|e| not_captured(e.to_string()))?;
        let (rows, _) = line.take_rows().map_err(|e| not_captured(e.error.message))?;
        if captured.answers.len() != rows.len() {
            return Err(LineError::NotCaptured(format!(
                "{} rows but {} captured answers",
                rows.len(),
                captured.answers.len()
            )));
        }
        self.report.rows += rows.len() as u64;
        let contract = self.model.contract();
        if captured.private.keys().any(|p| contract.features.iter().any(|f| &f.name == p)) {
            self.report.private += rows.len() as u64;
            return Ok(());
        }
        let at = |row: usize| Place { line: place.to_owned(), row };
        let scored = self.model.score_valid(&rows);
        // Per request row: the candidate's values, or why it has none.
        let mut replayed: Vec<Result<&[f64], String>> = vec![Err(String::new()); rows.len()];
        let mut refuse = |row: usize, why: &str| {
            if let Some(Err(all)) = replayed.get_mut(row.wrapping_sub(1)) {
                if !all.is_empty() {
                    all.push_str("; ");
                }
                all.push_str(why);
            }
        };
        match &scored {
            Ok(s) => s.problems.iter().for_each(|p| refuse(p.row, &p.to_string())),
            Err(ScoreError::InvalidRows { errors }) => errors.iter().for_each(|p| refuse(p.row, &p.to_string())),
            Err(e) => (1..=rows.len()).for_each(|n| refuse(n, &e.to_string())),
        }
        if let Ok(s) = &scored {
            for (k, &n) in s.scored.iter().enumerate() {
                replayed[n - 1] = Ok(s.estimates.values_at(k));
            }
        }
        // The candidate's outputs, each with its column among the captured ones.
        let columns: Vec<Option<usize>> =
            contract.outputs.iter().map(|o| captured.outputs.iter().position(|c| *c == o.name)).collect();
        for (i, (before, now)) in captured.answers.iter().zip(&replayed).enumerate() {
            match (before, now) {
                (None, Err(_)) => self.report.refused_before_too += 1,
                (None, Ok(_)) => self.report.now_answered += 1,
                (Some(_), Err(why)) => {
                    self.report.now_refused_count += 1;
                    if self.report.now_refused.len() < KEPT {
                        self.report.now_refused.push(Refused { at: at(i + 1), why: why.clone() });
                    }
                }
                (Some(before), Ok(now)) => {
                    for (k, column) in columns.iter().enumerate() {
                        let Some(was) = column.and_then(|j| before.get(j).copied().flatten()) else { continue };
                        self.compare(k, was, now[k], || at(i + 1));
                    }
                }
            }
        }
        Ok(())
    }

    /// Counts one output's difference on one row.
    fn compare(&mut self, output: usize, captured: f64, replayed: f64, at: impl Fn() -> Place) {
        let tolerance = self.tolerance;
        let o = &mut self.report.outputs[output];
        let difference = replayed - captured;
        o.compared += 1;
        if difference.abs() > tolerance || difference.is_nan() {
            o.changed += 1;
        }
        self.differences[output].push(difference);
        if o.largest_absolute.as_ref().is_none_or(|l| difference.abs() > l.difference.abs()) {
            o.largest_absolute = Some(Largest { difference, captured, replayed, at: at() });
        }
        if captured != 0.0 {
            let relative = difference / captured.abs();
            if o.largest_relative.as_ref().is_none_or(|l| relative.abs() > l.difference.abs()) {
                o.largest_relative = Some(Largest { difference: relative, captured, replayed, at: at() });
            }
        }
    }

    /// The report: the quantiles of each output's differences, and the
    /// candidate's drift against its own profile.
    pub fn finish(mut self) -> ReplayReport {
        for (o, differences) in self.report.outputs.iter_mut().zip(&mut self.differences) {
            differences.sort_by(f64::total_cmp);
            o.quantiles = QUANTILES.iter().filter_map(|&q| quantile(differences, q).map(|v| (q, v))).collect();
        }
        self.report.drift = self.model.drift();
        self.report
    }
}
