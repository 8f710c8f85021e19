//! Drift: how far live values have moved from a model's training profile
//! ([`crate::artifact::profile`]), as the Population Stability Index over
//! the profile's bins.
//!
//! The index is Σ over bins of (live − expected) · ln(live / expected),
//! with shares, not counts; a bin empty on either side counts as
//! [`EMPTY_BIN_SHARE`] so the logarithm stays finite. 0 means the same
//! spread. Thresholds such as 0.1 (watch) and 0.25 (act) are common
//! practice in credit scoring, not a standard; a high index says the inputs
//! changed, not that the model is wrong, and a low one does not prove it
//! right.

use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use serde::{Deserialize, Serialize};

use crate::artifact::profile::{Bins, FieldProfile, Profile};
use crate::contract::{Contract, Domain};

/// The share an empty bin counts as, on either side.
pub const EMPTY_BIN_SHARE: f64 = 1e-4;

/// How live values are counted and judged: over a sliding window of
/// `length`, kept as `slices` consecutive slices (the oldest dropped as a
/// new one starts); an index is given once a field has `min_count` live
/// values in the window; `watch` and `act` are the index's thresholds.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DriftWindow {
    /// How far back live values count.
    pub length: Duration,
    /// Slices the window is kept in (its resolution).
    pub slices: u32,
    /// Live values a field needs in the window before it gets an index.
    pub min_count: u64,
    /// The index from which a field is worth watching (0.1 by default: common practice).
    pub watch: f64,
    /// The index from which a field calls for action (0.25 by default: common practice).
    pub act: f64,
}

impl Default for DriftWindow {
    fn default() -> Self {
        DriftWindow { length: Duration::from_secs(3600), slices: 12, min_count: 200, watch: 0.1, act: 0.25 }
    }
}

/// How far a field has moved.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DriftLevel {
    /// Fewer live values than the window's `min_count`: no index yet.
    TooFew,
    /// Below the `watch` threshold.
    Steady,
    /// From `watch` up to `act`.
    Watch,
    /// From `act` up.
    Act,
}

impl std::fmt::Display for DriftLevel {
    /// In words: `too few values`, `steady`, `watch`, `act`.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            DriftLevel::TooFew => "too few values",
            DriftLevel::Steady => "steady",
            DriftLevel::Watch => "watch",
            DriftLevel::Act => "act",
        })
    }
}

/// Why a features plan put a feature's fallback (absent, or its default)
/// in place of a looked-up value.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
#[non_exhaustive]
pub enum FallbackCause {
    /// The source has nothing under the key.
    Missing,
    /// The source's value is older than the plan allows.
    Stale,
    /// The source did not answer in time, failed, or is paused after failing.
    Unavailable,
}

/// How many of a feature's live values in the window were the features
/// plan's fallback rather than a looked-up value, by cause.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct FallbackCounts {
    /// The source had nothing under the key.
    pub missing: u64,
    /// The source's value was too old.
    pub stale: u64,
    /// The source could not be read.
    pub unavailable: u64,
}

impl FallbackCounts {
    /// All of them.
    pub fn total(&self) -> u64 {
        self.missing + self.stale + self.unavailable
    }

    /// Each cause's name and count: unavailable, missing, stale.
    pub fn by_cause(&self) -> [(&'static str, u64); 3] {
        [("unavailable", self.unavailable), ("missing", self.missing), ("stale", self.stale)]
    }

    /// The counts kept in a field's three counters (see [`cause_at`]).
    fn from_counters(c: &[u64]) -> FallbackCounts {
        FallbackCounts { missing: c[0], stale: c[1], unavailable: c[2] }
    }
}

/// One field's live spread against its training profile.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FieldDrift {
    /// `feature` or `output`.
    pub kind: String,
    /// Its name in the contract.
    pub name: String,
    /// Live values counted in the window.
    pub count: u64,
    /// The stability index, once there are enough live values.
    pub index: Option<f64>,
    /// What the index says, against the window's thresholds.
    pub level: DriftLevel,
    /// The bins' names, in order: `≤ edge`, `> edge`, a label, `unseen labels`, `missing`.
    pub bins: Vec<String>,
    /// Each bin's share of the training rows.
    pub expected: Vec<f64>,
    /// Each bin's share of the live values.
    pub live: Vec<f64>,
    /// Of a feature's live values, those that were the features plan's
    /// fallback (zero without a plan, and for outputs): a field that moved
    /// because its source is down, not because the world did.
    #[serde(default)]
    pub fallbacks: FallbackCounts,
    /// Moves worth naming on their own: missing values far more common
    /// than in training, labels never seen in training, values that were
    /// the features plan's fallback.
    pub notes: Vec<String>,
}

/// A served model's inputs and outputs against its training profile.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DriftReport {
    /// How far back the counts go.
    pub window: Duration,
    /// Per profiled feature (contract order), then per profiled output.
    pub fields: Vec<FieldDrift>,
}

/// The Population Stability Index of live bin counts against the expected
/// shares of the same bins, or `None` when there are no live values (or
/// the bins do not match).
pub fn stability_index(expected: &[f64], live: &[u64]) -> Option<f64> {
    let total: u64 = live.iter().sum();
    if total == 0 || expected.len() != live.len() {
        return None;
    }
    let total = total as f64;
    Some(
        expected
            .iter()
            .zip(live)
            .map(|(&e, &n)| {
                let (a, e) = ((n as f64 / total).max(EMPTY_BIN_SHARE), e.max(EMPTY_BIN_SHARE));
                (a - e) * (a / e).ln()
            })
            .sum(),
    )
}

impl DriftReport {
    /// One line: the fields at the highest level reached
    /// (`act: bmi, s5`; `watch: age`; `steady`; `too few values`), then
    /// any notes' fields (`missing values: s5`).
    pub fn summary(&self) -> String {
        let named = |level: DriftLevel| -> Vec<&str> {
            self.fields.iter().filter(|f| f.level == level).map(|f| f.name.as_str()).collect()
        };
        let (act, watch) = (named(DriftLevel::Act), named(DriftLevel::Watch));
        let mut line = if !act.is_empty() {
            format!("act: {}", act.join(", "))
        } else if !watch.is_empty() {
            format!("watch: {}", watch.join(", "))
        } else if self.fields.iter().any(|f| f.level == DriftLevel::Steady) {
            "steady".to_owned()
        } else {
            "too few values".to_owned()
        };
        let fell_back: Vec<&str> =
            self.fields.iter().filter(|f| f.fallbacks.total() > 0).map(|f| f.name.as_str()).collect();
        if !fell_back.is_empty() {
            line.push_str(&format!("; plan fallbacks on {}", fell_back.join(", ")));
        }
        let noted: Vec<&str> = self.fields.iter().filter(|f| !f.notes.is_empty()).map(|f| f.name.as_str()).collect();
        if !noted.is_empty() {
            line.push_str(&format!("; see notes on {}", noted.join(", ")));
        }
        line
    }
}

/// Where a watched field's values are: a feature's column of the cells,
/// or an output's column of the values.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Column {
    Feature(usize),
    Output(usize),
}

/// One profiled field as the counters see it.
#[derive(Debug)]
struct Watched {
    kind: &'static str,
    name: String,
    column: Column,
    /// A number's edges (empty for labels), read on every value.
    edges: Box<[f64]>,
    profile: FieldProfile,
    /// Where its bins start among each slice's counters.
    offset: usize,
    /// For a label feature: each contract label's bin.
    labels: Option<Vec<usize>>,
}

impl Watched {
    /// The bin of a value as the contract encodes it (a label as its
    /// index): [`FieldProfile::bin_of`], counting the edges below the value
    /// without a branch per edge.
    #[inline]
    fn bin(&self, value: f64) -> usize {
        if value.is_nan() {
            return self.profile.missing_bin();
        }
        match &self.labels {
            Some(bins) => bins.get(value as usize).copied().unwrap_or(bins.len()),
            None => self.edges.iter().map(|e| usize::from(*e < value)).sum(),
        }
    }

    /// Its values in a call's `rows` (`cells`: rows × features, `values`:
    /// rows × outputs), row by row.
    fn values<'a>(&self, rows: usize, cells: &'a [f64], values: &'a [f64]) -> impl Iterator<Item = f64> + 'a {
        let (column, at) = match self.column {
            Column::Feature(c) => (cells, c),
            Column::Output(c) => (values, c),
        };
        column.iter().skip(at).step_by((column.len() / rows).max(1)).take(rows).copied()
    }
}

thread_local! {
    /// One call's counts, gathered before they are added to the window.
    static SCRATCH: std::cell::RefCell<Vec<u32>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// One slice of the window: which slice of time it holds, and its counts.
#[derive(Debug)]
struct Slice {
    epoch: AtomicU64,
    counts: Box<[AtomicU64]>,
    /// Per watched field, its fallbacks by cause (missing, stale, unavailable).
    fallbacks: Box<[AtomicU64]>,
}

/// A cause's place among a field's three fallback counters.
fn cause_at(cause: FallbackCause) -> usize {
    match cause {
        FallbackCause::Missing => 0,
        FallbackCause::Stale => 1,
        FallbackCause::Unavailable => 2,
    }
}

/// Live counts of a model's values in its profile's bins over a sliding
/// window. Counting takes relaxed atomic additions only: scoring threads
/// never wait on each other. A slice is cleared by the first call that
/// finds it holding an older slice of time; a count added by another
/// thread during that clearing may be lost (a few values in a window).
#[derive(Debug)]
pub struct DriftWatch {
    window: DriftWindow,
    fields: Vec<Watched>,
    bins: usize,
    slices: Box<[Slice]>,
    started: quanta::Instant,
}

impl DriftWatch {
    /// Counters for `profile`'s fields of a model with `contract` (the
    /// profile already checked against it, see [`Profile::check`]).
    pub fn new(profile: &Profile, contract: &Contract, window: DriftWindow) -> DriftWatch {
        let mut fields = Vec::new();
        let mut bins = 0;
        let mut watch = |name: &str, column: Column, profile: &FieldProfile, labels: Option<Vec<usize>>| {
            let kind = if matches!(column, Column::Feature(_)) { "feature" } else { "output" };
            let (edges, offset) = (edges_of(profile), bins);
            bins += profile.bin_count();
            fields.push(Watched {
                kind,
                name: name.to_owned(),
                column,
                edges,
                profile: profile.clone(),
                offset,
                labels,
            });
        };
        for (column, feature) in contract.features.iter().enumerate() {
            let Some(profile) = profile.features.get(&feature.name) else { continue };
            let labels = match (&feature.domain, &profile.bins) {
                (Domain::Label(contract_labels), Bins::Labels(_)) => {
                    Some(contract_labels.iter().map(|l| profile.bin_of_label(Some(l))).collect())
                }
                _ => None,
            };
            watch(&feature.name, Column::Feature(column), profile, labels);
        }
        for (column, output) in contract.outputs.iter().enumerate() {
            if let Some(profile) = profile.outputs.get(&output.name) {
                watch(&output.name, Column::Output(column), profile, None);
            }
        }
        let slices = (0..window.slices.max(1))
            .map(|_| Slice {
                epoch: AtomicU64::new(u64::MAX),
                counts: (0..bins).map(|_| AtomicU64::new(0)).collect(),
                fallbacks: (0..3 * fields.len()).map(|_| AtomicU64::new(0)).collect(),
            })
            .collect();
        DriftWatch { window, fields, bins, slices, started: quanta::Instant::now() }
    }

    /// The window it counts over.
    pub fn window(&self) -> &DriftWindow {
        &self.window
    }

    fn slice_length(&self) -> u64 {
        (self.window.length.as_nanos() as u64 / u64::from(self.window.slices.max(1))).max(1)
    }

    fn epoch_now(&self) -> u64 {
        self.started.elapsed().as_nanos() as u64 / self.slice_length()
    }

    /// Counts one call's rows: `cells` (rows × features, as the contract
    /// encodes them) and `values` (rows × outputs).
    pub fn record(&self, rows: usize, cells: &[f64], values: &[f64]) {
        self.record_at(self.epoch_now(), rows, cells, values);
    }

    /// The slice that holds `epoch`, cleared first if it held an older one.
    fn slice_at(&self, epoch: u64) -> &Slice {
        let slice = &self.slices[(epoch % self.slices.len() as u64) as usize];
        let seen = slice.epoch.load(Ordering::Acquire);
        if seen != epoch && slice.epoch.compare_exchange(seen, epoch, Ordering::AcqRel, Ordering::Acquire).is_ok() {
            slice.counts.iter().chain(slice.fallbacks.iter()).for_each(|c| c.store(0, Ordering::Relaxed));
        }
        slice
    }

    /// Counts `n` values of `feature` that were the features plan's
    /// fallback for `cause` (they are counted in the bins too, when the
    /// rows are scored). A feature the profile does not cover is ignored.
    pub fn record_fallbacks(&self, feature: &str, cause: FallbackCause, n: u64) {
        self.record_fallbacks_at(self.epoch_now(), feature, cause, n);
    }

    fn record_fallbacks_at(&self, epoch: u64, feature: &str, cause: FallbackCause, n: u64) {
        let Some(at) = self.fields.iter().position(|f| matches!(f.column, Column::Feature(_)) && f.name == feature)
        else {
            return;
        };
        self.slice_at(epoch).fallbacks[3 * at + cause_at(cause)].fetch_add(n, Ordering::Relaxed);
    }

    fn record_at(&self, epoch: u64, rows: usize, cells: &[f64], values: &[f64]) {
        if self.fields.is_empty() || rows == 0 {
            return;
        }
        let slice = self.slice_at(epoch);
        if rows == 1 {
            for f in &self.fields {
                for v in f.values(rows, cells, values) {
                    slice.counts[f.offset + f.bin(v)].fetch_add(1, Ordering::Relaxed);
                }
            }
            return;
        }
        // A batch's counts gathered first, then one addition per bin used.
        SCRATCH.with_borrow_mut(|local| {
            local.clear();
            local.resize(self.bins, 0);
            // Field by field: one column read down the rows.
            for f in &self.fields {
                let counts = &mut local[f.offset..f.offset + f.profile.bin_count()];
                for v in f.values(rows, cells, values) {
                    counts[f.bin(v)] += 1;
                }
            }
            for (c, &n) in slice.counts.iter().zip(local.iter()) {
                if n > 0 {
                    c.fetch_add(u64::from(n), Ordering::Relaxed);
                }
            }
        });
    }

    /// The window's counts against the profile, field by field.
    pub fn report(&self) -> DriftReport {
        self.report_at(self.epoch_now())
    }

    fn report_at(&self, epoch: u64) -> DriftReport {
        let oldest = epoch.saturating_sub(self.slices.len() as u64 - 1);
        let mut totals = vec![0u64; self.bins];
        let mut fallbacks = vec![0u64; 3 * self.fields.len()];
        let add = |totals: &mut [u64], counts: &[AtomicU64]| {
            totals.iter_mut().zip(counts).for_each(|(t, c)| *t += c.load(Ordering::Relaxed));
        };
        for slice in self.slices.iter() {
            let e = slice.epoch.load(Ordering::Acquire);
            if e != u64::MAX && e >= oldest && e <= epoch {
                add(&mut totals, &slice.counts);
                add(&mut fallbacks, &slice.fallbacks);
            }
        }
        let fields = self
            .fields
            .iter()
            .enumerate()
            .map(|(i, f)| {
                let fell_back = FallbackCounts::from_counters(&fallbacks[3 * i..3 * i + 3]);
                self.judge(f, &totals[f.offset..f.offset + f.profile.bin_count()], fell_back)
            })
            .collect();
        DriftReport { window: self.window.length, fields }
    }

    fn judge(&self, f: &Watched, counts: &[u64], fallbacks: FallbackCounts) -> FieldDrift {
        let count: u64 = counts.iter().sum();
        let live: Vec<f64> = counts.iter().map(|&n| if count == 0 { 0.0 } else { n as f64 / count as f64 }).collect();
        let index = (count >= self.window.min_count).then(|| stability_index(&f.profile.shares, counts)).flatten();
        let level = match index {
            None => DriftLevel::TooFew,
            Some(i) if i >= self.window.act => DriftLevel::Act,
            Some(i) if i >= self.window.watch => DriftLevel::Watch,
            Some(_) => DriftLevel::Steady,
        };
        let mut notes = Vec::new();
        let missing = f.profile.missing_bin();
        let (trained, now) = (f.profile.shares[missing], live[missing]);
        // Worth naming: missing values at least twice as common as in
        // training and 5 points more (a source failing over to absent).
        if count > 0 && now >= 2.0 * trained && now - trained >= 0.05 {
            notes.push(format!(
                "missing values: {:.1} % live against {:.1} % in training",
                now * 100.0,
                trained * 100.0
            ));
        }
        if let Bins::Labels(labels) = &f.profile.bins {
            let unseen = live[labels.len()];
            if unseen > 0.0 {
                notes.push(format!("labels never seen in training: {:.1} % of live values", unseen * 100.0));
            }
        }
        if fallbacks.total() > 0 {
            notes.push(fallback_note(&fallbacks, count));
        }
        FieldDrift {
            kind: f.kind.to_owned(),
            name: f.name.clone(),
            count,
            index,
            level,
            bins: bin_names(&f.profile),
            expected: f.profile.shares.clone(),
            live,
            fallbacks,
            notes,
        }
    }
}

/// `features plan fallbacks: 48.0 % of live values (unavailable 40.0 %,
/// missing 8.0 %): the source moved, not necessarily the world`.
fn fallback_note(fallbacks: &FallbackCounts, count: u64) -> String {
    let share = |n: u64| n as f64 * 100.0 / count.max(1) as f64;
    let causes: Vec<String> = fallbacks
        .by_cause()
        .iter()
        .filter(|(_, n)| *n > 0)
        .map(|(cause, n)| format!("{cause} {:.1} %", share(*n)))
        .collect();
    format!(
        "features plan fallbacks: {:.1} % of live values ({}): the source moved, not necessarily the world",
        share(fallbacks.total()),
        causes.join(", ")
    )
}

fn edges_of(profile: &FieldProfile) -> Box<[f64]> {
    match &profile.bins {
        Bins::Edges(e) => e.clone().into_boxed_slice(),
        Bins::Labels(_) => Box::new([]),
    }
}

/// Each bin's name: `≤ edge` (then `> edge` for the last), each label,
/// `unseen labels`, `missing`.
fn bin_names(profile: &FieldProfile) -> Vec<String> {
    let mut names: Vec<String> = match &profile.bins {
        Bins::Edges(edges) if edges.is_empty() => vec!["any".into()],
        Bins::Edges(edges) => {
            let mut n: Vec<String> = edges.iter().map(|e| format!("≤ {}", four_figures(*e))).collect();
            n.push(format!("> {}", four_figures(edges[edges.len() - 1])));
            n
        }
        Bins::Labels(labels) => labels.iter().cloned().chain(["unseen labels".to_owned()]).collect(),
    };
    names.push("missing".into());
    names
}

/// An edge for a bin's name, to four significant figures (`-0.05794`,
/// `152.1`, `3`): the profile keeps the exact edge.
fn four_figures(e: f64) -> String {
    if e == 0.0 || !e.is_finite() {
        return e.to_string();
    }
    let decimals = (3 - e.abs().log10().floor() as i32).clamp(0, 17) as usize;
    let text = format!("{e:.decimals$}");
    if text.contains('.') { text.trim_end_matches('0').trim_end_matches('.').to_owned() } else { text }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_same_spread_is_zero_and_a_move_is_positive() {
        assert_eq!(stability_index(&[0.25, 0.75], &[25, 75]), Some(0.0));
        // Worked by hand: (0.75 − 0.25)·ln 3 + (0.25 − 0.75)·ln(1/3) = ln 3 ≈ 1.0986.
        let moved = stability_index(&[0.25, 0.75], &[75, 25]).unwrap();
        assert!((moved - 3f64.ln()).abs() < 1e-15, "{moved}");
        assert_eq!(stability_index(&[0.5, 0.5], &[0, 0]), None);
    }

    #[test]
    fn bins_are_named_to_four_figures() {
        let named: Vec<String> = [-0.05794093368208547, 152.13, 3.0, 0.0, 12345.6].map(four_figures).to_vec();
        assert_eq!(named, ["-0.05794", "152.1", "3", "0", "12346"]);
    }

    fn watch() -> DriftWatch {
        let field = FieldProfile { bins: Bins::Edges(vec![0.0]), shares: vec![0.5, 0.5, 0.0], summary: None };
        let profile = Profile {
            source: "test".into(),
            rows: 2,
            features: [("x".to_owned(), field)].into(),
            outputs: Default::default(),
        };
        let contract = Contract {
            name: "m".into(),
            version: "1.0.0".into(),
            about: String::new(),
            features: vec![crate::contract::Feature {
                name: "x".into(),
                about: String::new(),
                domain: Domain::Real(crate::contract::Bounds { min: None, max: None }),
                unit: None,
                required: false,
            }],
            outputs: vec![],
        };
        DriftWatch::new(&profile, &contract, DriftWindow { slices: 3, min_count: 4, ..DriftWindow::default() })
    }

    /// Slices of time come and go: counts older than the window drop out,
    /// a slice reused for a later time starts from zero.
    #[test]
    fn counts_leave_the_window_slice_by_slice() {
        let w = watch();
        w.record_at(0, 4, &[-1.0, -1.0, 1.0, f64::NAN], &[]);
        let r = w.report_at(0);
        assert_eq!(r.fields[0].live, vec![0.5, 0.25, 0.25]);
        assert_eq!(r.fields[0].notes, vec!["missing values: 25.0 % live against 0.0 % in training"]);
        w.record_at(2, 4, &[1.0; 4], &[]);
        assert_eq!(w.report_at(2).fields[0].count, 8);
        // At slice 3, slice 0 has left the window (3 slices: 1, 2, 3).
        assert_eq!(w.report_at(3).fields[0].count, 4);
        // Slice 3 reuses slice 0's counters: they start from zero.
        w.record_at(3, 4, &[-1.0; 4], &[]);
        let r = w.report_at(3);
        assert_eq!((r.fields[0].count, r.fields[0].live.clone()), (8, vec![0.5, 0.5, 0.0]));
        assert_eq!((r.fields[0].index, r.fields[0].level), (Some(0.0), DriftLevel::Steady));
    }

    /// Fallbacks are counted beside the bins, by cause, leave the window
    /// with their slice, and are named in the notes and the summary.
    #[test]
    fn fallbacks_are_counted_apart_and_named() {
        let w = watch();
        w.record_at(0, 4, &[f64::NAN; 4], &[]);
        w.record_fallbacks_at(0, "x", FallbackCause::Unavailable, 3);
        w.record_fallbacks_at(0, "x", FallbackCause::Missing, 1);
        w.record_fallbacks_at(0, "not profiled", FallbackCause::Missing, 1);
        let r = w.report_at(0);
        assert_eq!(r.fields[0].fallbacks, FallbackCounts { missing: 1, stale: 0, unavailable: 3 });
        assert_eq!(
            r.fields[0].notes[1],
            "features plan fallbacks: 100.0 % of live values (unavailable 75.0 %, missing 25.0 %): \
             the source moved, not necessarily the world"
        );
        assert!(r.summary().contains("; plan fallbacks on x"), "{}", r.summary());
        assert_eq!(w.report_at(3).fields[0].fallbacks.total(), 0);
    }
}
