//! The usage ledger: what each model version has cost, since the registry
//! opened.
//!
//! Per model and version: calls, rows, errors by kind, limit hits by limit,
//! fuel, wall time (a histogram: p50/p90/p99/max), peak memory. Per shadow:
//! how its answers differed from the served ones. Counting is lock-free
//! except for the histogram, which is split into shards so threads rarely
//! meet on a lock.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;

use hdrhistogram::Histogram;
use semver::Version;
use serde::{Deserialize, Serialize};

use paddock_host::sandbox::model::{ScoreError, Usage};

/// Longest wall time the histogram resolves (longer calls count as this).
const MAX_WALL_NS: u64 = 3_600_000_000_000;

/// Upper bounds of the wall-time buckets reported for OpenMetrics, in
/// seconds (1 µs to 2.5 s in 1–2.5–5 steps; `+Inf` is implied).
pub const WALL_BUCKETS: [f64; 20] = [
    1e-6, 2.5e-6, 5e-6, 1e-5, 2.5e-5, 5e-5, 1e-4, 2.5e-4, 5e-4, 1e-3, 2.5e-3, 5e-3, 1e-2, 2.5e-2, 5e-2, 0.1, 0.25, 0.5,
    1.0, 2.5,
];

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|e| e.into_inner())
}

/// Adds `n` to a count, allocating its key only the first time.
fn bump(map: &mut BTreeMap<String, u64>, key: &str, n: u64) {
    match map.get_mut(key) {
        Some(v) => *v += n,
        None => {
            map.insert(key.to_owned(), n);
        }
    }
}

fn add_counts(map: &mut BTreeMap<String, u64>, from: &BTreeMap<String, u64>) {
    for (k, v) in from {
        bump(map, k, *v);
    }
}

fn histogram() -> Histogram<u64> {
    Histogram::new_with_bounds(1, MAX_WALL_NS, 2).expect("valid histogram bounds")
}

/// The counters of one model version.
#[derive(Debug)]
pub struct VersionLedger {
    calls: AtomicU64,
    rows: AtomicU64,
    fuel: AtomicU64,
    fuel_metered: AtomicU64,
    peak_memory: AtomicU64,
    wall_sum_ns: AtomicU64,
    in_flight: AtomicU64,
    errors: Mutex<BTreeMap<String, u64>>,
    refused_rows: Mutex<BTreeMap<String, u64>>,
    limit_hits: Mutex<BTreeMap<String, u64>>,
    wall: Box<[Mutex<Histogram<u64>>]>,
}

impl Default for VersionLedger {
    fn default() -> Self {
        let shards = std::thread::available_parallelism().map_or(4, |n| n.get()).clamp(1, 8);
        VersionLedger {
            calls: AtomicU64::new(0),
            rows: AtomicU64::new(0),
            fuel: AtomicU64::new(0),
            fuel_metered: AtomicU64::new(0),
            peak_memory: AtomicU64::new(0),
            wall_sum_ns: AtomicU64::new(0),
            in_flight: AtomicU64::new(0),
            errors: Mutex::default(),
            refused_rows: Mutex::default(),
            limit_hits: Mutex::default(),
            wall: (0..shards).map(|_| Mutex::new(histogram())).collect(),
        }
    }
}

impl VersionLedger {
    /// Records a call that produced estimates.
    pub fn record_ok(&self, usage: &Usage) {
        self.calls.fetch_add(1, Ordering::Relaxed);
        self.rows.fetch_add(usage.rows as u64, Ordering::Relaxed);
        if let Some(f) = usage.fuel {
            self.fuel.fetch_add(f, Ordering::Relaxed);
            self.fuel_metered.fetch_add(1, Ordering::Relaxed);
        }
        self.peak_memory.fetch_max(usage.peak_memory_bytes, Ordering::Relaxed);
        self.record_wall(usage.wall);
    }

    /// Records a call that failed after `wall`.
    pub fn record_error(&self, rows: usize, error: &ScoreError, wall: Duration) {
        self.calls.fetch_add(1, Ordering::Relaxed);
        self.rows.fetch_add(rows as u64, Ordering::Relaxed);
        bump(&mut lock(&self.errors), error.kind(), 1);
        if let Some(hit) = error.limit() {
            bump(&mut lock(&self.limit_hits), hit.name(), 1);
        }
        self.record_wall(wall);
    }

    /// Records `rows` rows refused before the sandbox (they broke the
    /// contract, or were too many): the request's fault, not the model's,
    /// so neither a call nor an error of the version.
    pub fn record_refused(&self, rows: usize, kind: &'static str) {
        bump(&mut lock(&self.refused_rows), kind, rows as u64);
    }

    /// Counts a call in flight until the guard is dropped.
    pub fn enter(&self) -> InFlight<'_> {
        self.in_flight.fetch_add(1, Ordering::SeqCst);
        InFlight(&self.in_flight)
    }

    fn record_wall(&self, wall: Duration) {
        let ns = (wall.as_nanos() as u64).clamp(1, MAX_WALL_NS);
        self.wall_sum_ns.fetch_add(ns, Ordering::Relaxed);
        let shard = paddock_host::sandbox::pool::home() % self.wall.len();
        let _ = lock(&self.wall[shard]).record(ns);
    }

    /// Adds figures saved by an earlier process (see [`Ledger::absorb`]).
    fn absorb(&self, u: &VersionUsage, recorded: &[[u64; 2]]) {
        self.calls.fetch_add(u.calls, Ordering::Relaxed);
        self.rows.fetch_add(u.rows, Ordering::Relaxed);
        if let Some(f) = u.fuel {
            self.fuel.fetch_add(f, Ordering::Relaxed);
            self.fuel_metered.fetch_add(1, Ordering::Relaxed);
        }
        self.peak_memory.fetch_max(u.peak_memory_bytes, Ordering::Relaxed);
        self.wall_sum_ns.fetch_add((u.wall_us.sum_seconds * 1e9).round() as u64, Ordering::Relaxed);
        add_counts(&mut lock(&self.errors), &u.errors);
        add_counts(&mut lock(&self.limit_hits), &u.limit_hits);
        add_counts(&mut lock(&self.refused_rows), &u.refused_rows);
        let mut h = lock(&self.wall[0]);
        for &[ns, n] in recorded {
            let _ = h.record_n(ns.clamp(1, MAX_WALL_NS), n);
        }
    }

    /// The wall-time histogram as (value in ns, count) pairs, at its
    /// precision: what a usage file keeps so that percentiles survive a
    /// restart.
    fn recorded(&self) -> Vec<[u64; 2]> {
        let mut wall = histogram();
        for shard in &*self.wall {
            let _ = wall.add(&*lock(shard));
        }
        wall.iter_recorded().map(|v| [v.value_iterated_to(), v.count_at_value()]).collect()
    }

    /// The counters now.
    pub fn snapshot(&self, model: &str, version: &Version) -> VersionUsage {
        let mut wall = histogram();
        for shard in &*self.wall {
            let _ = wall.add(&*lock(shard));
        }
        let us = |ns: u64| ns as f64 / 1000.0;
        let q = |q: f64| if wall.is_empty() { 0.0 } else { us(wall.value_at_quantile(q)) };
        let metered = self.fuel_metered.load(Ordering::Relaxed) > 0;
        VersionUsage {
            model: model.to_owned(),
            version: version.clone(),
            calls: self.calls.load(Ordering::Relaxed),
            rows: self.rows.load(Ordering::Relaxed),
            in_flight: self.in_flight.load(Ordering::SeqCst),
            errors: lock(&self.errors).clone(),
            refused_rows: lock(&self.refused_rows).clone(),
            limit_hits: lock(&self.limit_hits).clone(),
            fuel: metered.then(|| self.fuel.load(Ordering::Relaxed)),
            wall_us: Wall {
                p50: q(0.5),
                p90: q(0.9),
                p99: q(0.99),
                max: if wall.is_empty() { 0.0 } else { us(wall.max()) },
                mean: if wall.is_empty() { 0.0 } else { wall.mean() / 1000.0 },
                sum_seconds: self.wall_sum_ns.load(Ordering::Relaxed) as f64 / 1e9,
                buckets: WALL_BUCKETS.iter().map(|&le| wall.count_between(0, (le * 1e9) as u64)).collect(),
            },
            peak_memory_bytes: self.peak_memory.load(Ordering::Relaxed),
        }
    }
}

/// A call in flight; counted until dropped.
#[derive(Debug)]
pub struct InFlight<'a>(&'a AtomicU64);

impl Drop for InFlight<'_> {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Ordering::SeqCst);
    }
}

/// Wall-time figures, in microseconds (histogram precision: 2 significant
/// digits, so within 1 %).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Wall {
    /// Sum of every call's wall time, in seconds (exact).
    pub sum_seconds: f64,
    /// Calls that took at most each bound of [`WALL_BUCKETS`], cumulative
    /// (at the histogram's precision).
    pub buckets: Vec<u64>,
    /// Median.
    pub p50: f64,
    /// 90th percentile.
    pub p90: f64,
    /// 99th percentile.
    pub p99: f64,
    /// Slowest call.
    pub max: f64,
    /// Mean.
    pub mean: f64,
}

/// What one model version has cost.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct VersionUsage {
    /// The model.
    pub model: String,
    /// The version.
    pub version: Version,
    /// Calls, successful or not.
    pub calls: u64,
    /// Rows in those calls.
    pub rows: u64,
    /// Calls running now.
    #[serde(default)]
    pub in_flight: u64,
    /// Failed calls by kind ([`ScoreError::kind`]): the model's own
    /// failures (traps, limits, faults, bad answers).
    pub errors: BTreeMap<String, u64>,
    /// Rows refused before the sandbox, by kind (`invalid_rows`, `shape`,
    /// `too_many_rows`): the requests' faults, counted apart from the
    /// model's errors.
    #[serde(default)]
    pub refused_rows: BTreeMap<String, u64>,
    /// Limit hits by limit ([`paddock_host::LimitHit::name`]).
    pub limit_hits: BTreeMap<String, u64>,
    /// Fuel used by successful calls, when the runtime meters fuel.
    pub fuel: Option<u64>,
    /// Wall time per call.
    pub wall_us: Wall,
    /// Largest linear memory any of its instances reached.
    pub peak_memory_bytes: u64,
}

/// How a shadow's answers compared with the served ones.
#[derive(Debug)]
pub struct ShadowLedger {
    inner: Mutex<ShadowUsage>,
    /// Requests seen for this shadow, for exact sampling.
    seen: AtomicU64,
}

/// A shadow's comparison figures.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ShadowUsage {
    /// The model.
    pub model: String,
    /// The shadow version.
    pub version: Version,
    /// Requests the shadow scored and compared.
    pub compared: u64,
    /// Output values compared (rows × shared outputs).
    pub values: u64,
    /// Largest absolute difference seen.
    pub max_abs_diff: f64,
    /// Values whose difference was over the tolerance (a NaN on one side
    /// only counts as over).
    pub over_tolerance: u64,
    /// Requests the shadow could not score, by error kind.
    pub errors: BTreeMap<String, u64>,
    /// Requests sampled but dropped because the shadow queue was full.
    pub dropped: u64,
}

impl ShadowLedger {
    pub(crate) fn new(model: &str, version: &Version) -> Self {
        ShadowLedger {
            inner: Mutex::new(ShadowUsage {
                model: model.into(),
                version: version.clone(),
                compared: 0,
                values: 0,
                max_abs_diff: 0.0,
                over_tolerance: 0,
                errors: BTreeMap::new(),
                dropped: 0,
            }),
            seen: AtomicU64::new(0),
        }
    }

    /// Whether this request is in a sample of `share`: exactly
    /// `floor(n × share)` of this shadow's first `n` requests are, however
    /// requests to other models interleave.
    pub(crate) fn sampled(&self, share: f64) -> bool {
        let n = self.seen.fetch_add(1, Ordering::Relaxed) as f64;
        ((n + 1.0) * share).floor() > (n * share).floor()
    }

    /// Compares served and shadow values output by output.
    pub(crate) fn record_diff(&self, pairs: impl Iterator<Item = (f64, f64)>, tolerance: f64) {
        let mut s = lock(&self.inner);
        s.compared += 1;
        for (served, shadow) in pairs {
            s.values += 1;
            let diff = (served - shadow).abs();
            let same_nan = served.is_nan() && shadow.is_nan();
            if !same_nan {
                if diff.is_nan() || diff > tolerance {
                    s.over_tolerance += 1;
                }
                if !diff.is_nan() {
                    s.max_abs_diff = s.max_abs_diff.max(diff);
                }
            }
        }
    }

    pub(crate) fn record_error(&self, kind: &str) {
        bump(&mut lock(&self.inner).errors, kind, 1);
    }

    fn absorb(&self, u: &ShadowUsage) {
        let mut s = lock(&self.inner);
        s.compared += u.compared;
        s.values += u.values;
        s.max_abs_diff = s.max_abs_diff.max(u.max_abs_diff);
        s.over_tolerance += u.over_tolerance;
        s.dropped += u.dropped;
        add_counts(&mut s.errors, &u.errors);
    }

    pub(crate) fn record_dropped(&self) {
        lock(&self.inner).dropped += 1;
    }

    /// The figures now.
    pub fn snapshot(&self) -> ShadowUsage {
        lock(&self.inner).clone()
    }
}

/// Every version's ledger, kept across reloads: a version that is swapped
/// out and back in keeps counting where it left off.
#[derive(Debug, Default)]
pub struct Ledger {
    versions: Mutex<BTreeMap<(String, Version), Arc<VersionLedger>>>,
    shadows: Mutex<BTreeMap<(String, Version), Arc<ShadowLedger>>>,
    rejected: Mutex<BTreeMap<&'static str, u64>>,
    /// Rejections counted by earlier processes (kinds they wrote).
    rejected_before: Mutex<BTreeMap<String, u64>>,
}

/// One version's wall-time histogram in a usage file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SavedWall {
    /// The model.
    pub model: String,
    /// The version.
    pub version: Version,
    /// (wall time in ns, calls) pairs, at the histogram's precision.
    pub recorded: Vec<[u64; 2]>,
}

/// The whole ledger at one moment.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct UsageReport {
    /// Per model version, ordered by model then version.
    pub versions: Vec<VersionUsage>,
    /// Per shadow.
    pub shadows: Vec<ShadowUsage>,
    /// Requests refused before any model version was chosen, by kind
    /// (`unknown_model`, `bad_request`, `too_large`, `overloaded`…). Not
    /// by model name: a name no model has must not grow the ledger.
    #[serde(default)]
    pub rejected: BTreeMap<String, u64>,
}

impl Ledger {
    /// The ledger of one version, created on first use.
    pub fn version(&self, model: &str, version: &Version) -> Arc<VersionLedger> {
        lock(&self.versions).entry((model.to_owned(), version.clone())).or_default().clone()
    }

    /// The ledger of one shadow, created on first use.
    pub fn shadow(&self, model: &str, version: &Version) -> Arc<ShadowLedger> {
        lock(&self.shadows)
            .entry((model.to_owned(), version.clone()))
            .or_insert_with(|| Arc::new(ShadowLedger::new(model, version)))
            .clone()
    }

    /// Counts a request refused before any version was chosen.
    pub fn record_rejected(&self, kind: &'static str) {
        *lock(&self.rejected).entry(kind).or_default() += 1;
    }

    /// Every figure now.
    pub fn report(&self) -> UsageReport {
        UsageReport {
            versions: lock(&self.versions).iter().map(|((m, v), l)| l.snapshot(m, v)).collect(),
            shadows: lock(&self.shadows).values().map(|s| s.snapshot()).collect(),
            rejected: {
                let mut all = lock(&self.rejected_before).clone();
                for (k, v) in lock(&self.rejected).iter() {
                    bump(&mut all, k, *v);
                }
                all
            },
        }
    }

    /// Every version's wall-time histogram, for a usage file.
    pub fn walls(&self) -> Vec<SavedWall> {
        lock(&self.versions)
            .iter()
            .map(|((m, v), l)| SavedWall { model: m.clone(), version: v.clone(), recorded: l.recorded() })
            .collect()
    }

    /// Adds the figures an earlier process saved (its usage file), so that
    /// usage accumulates across restarts. Versions that are not loaded now
    /// keep their figures.
    pub fn absorb(&self, usage: &UsageReport, walls: &[SavedWall]) {
        for u in &usage.versions {
            let recorded =
                walls.iter().find(|w| w.model == u.model && w.version == u.version).map_or(&[][..], |w| &w.recorded);
            self.version(&u.model, &u.version).absorb(u, recorded);
        }
        for s in &usage.shadows {
            self.shadow(&s.model, &s.version).absorb(s);
        }
        add_counts(&mut lock(&self.rejected_before), &usage.rejected);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn saved_figures_add_up_with_new_ones_percentiles_included() {
        let v = Version::new(1, 0, 0);
        let first = Ledger::default();
        for us in 1..=50u64 {
            first.version("m", &v).record_ok(&Usage { rows: 1, wall: Duration::from_micros(us), ..Usage::default() });
        }
        first.version("m", &v).record_refused(3, "invalid_rows");
        first.record_rejected("unknown_model");
        let (report, walls) = (first.report(), first.walls());

        let second = Ledger::default();
        second.absorb(&report, &walls);
        for us in 51..=100u64 {
            second.version("m", &v).record_ok(&Usage { rows: 1, wall: Duration::from_micros(us), ..Usage::default() });
        }
        second.record_rejected("unknown_model");
        let r = second.report();
        let u = &r.versions[0];
        assert_eq!((u.calls, u.rows), (100, 100));
        assert_eq!(u.refused_rows["invalid_rows"], 3);
        assert_eq!(r.rejected["unknown_model"], 2);
        // The median of 1..=100 µs, from both processes' calls (within 1 %).
        assert!((u.wall_us.p50 - 50.0).abs() <= 0.5, "{:?}", u.wall_us);
        assert!((u.wall_us.sum_seconds - 5050e-6).abs() < 1e-9, "{:?}", u.wall_us);
    }

    #[test]
    fn percentiles_come_from_the_recorded_calls() {
        let l = VersionLedger::default();
        for us in 1..=100u64 {
            let usage = Usage { rows: 2, wall: Duration::from_micros(us), ..Usage::default() };
            l.record_ok(&usage);
        }
        let s = l.snapshot("m", &Version::new(1, 0, 0));
        assert_eq!((s.calls, s.rows), (100, 200));
        // 2 significant digits: within 1 % of the exact order statistic.
        assert!((s.wall_us.p50 - 50.0).abs() <= 0.5, "{:?}", s.wall_us);
        assert!((s.wall_us.p99 - 99.0).abs() <= 1.0, "{:?}", s.wall_us);
        assert!((s.wall_us.max - 100.0).abs() <= 1.0, "{:?}", s.wall_us);
        assert_eq!(s.fuel, None);
    }

    #[test]
    fn shadow_differences_count_nan_on_one_side_as_over() {
        let s = ShadowLedger::new("m", &Version::new(1, 0, 0));
        s.record_diff([(1.0, 1.5), (2.0, 2.0), (f64::NAN, 3.0), (f64::NAN, f64::NAN)].into_iter(), 0.25);
        let u = s.snapshot();
        assert_eq!((u.compared, u.values, u.over_tolerance), (1, 4, 2));
        assert_eq!(u.max_abs_diff, 0.5);
    }
}
