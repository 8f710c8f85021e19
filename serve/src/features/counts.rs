//! What each feature source has done: lookups by outcome and, for a
//! server, its round trips, how they ended and how long they took.
//!
//! Counters are atomics bumped on the request path (no lock, no
//! allocation); [`SourceCounts::report`] reads them for `/metrics` and
//! `paddock status`. They live as long as the registry, across reloads,
//! and are not kept in the usage file: they describe the service's
//! health, not what a model cost.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use serde::{Deserialize, Serialize};

use super::Outcome;

/// Upper bounds of the round-trip latency buckets, in seconds (50 µs to
/// 2.5 s in 1–2.5–5 steps; `+Inf` is implied).
pub const LATENCY_BUCKETS: [f64; 15] =
    [5e-5, 1e-4, 2.5e-4, 5e-4, 1e-3, 2.5e-3, 5e-3, 1e-2, 2.5e-2, 5e-2, 0.1, 0.25, 0.5, 1.0, 2.5];

/// The outcomes counted, in the order of [`SourceCounts`]' lookup counters.
const OUTCOMES: [Outcome; 5] =
    [Outcome::FromRequest, Outcome::Found, Outcome::Missing, Outcome::Stale, Outcome::Unavailable];

/// The counters of one source.
#[derive(Debug, Default)]
pub struct SourceCounts {
    /// Per outcome (in the order of `OUTCOMES`), features of rows.
    outcomes: [AtomicU64; 5],
    round_trips: AtomicU64,
    timeouts: AtomicU64,
    errors: AtomicU64,
    skipped: AtomicU64,
    /// Round trips that took at most each bound of [`LATENCY_BUCKETS`]
    /// (not cumulative; the report sums them).
    latency: [AtomicU64; 15],
    latency_sum_ns: AtomicU64,
}

/// What happened to a server read, for [`SourceCounts::round_trip`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum Ended {
    /// It answered.
    Answered,
    /// Not within the budget.
    TimedOut,
    /// It failed.
    Failed,
}

impl SourceCounts {
    /// One feature of one row looked up (or carried by the row).
    pub fn lookup(&self, outcome: Outcome) {
        let at = OUTCOMES.iter().position(|o| *o == outcome).unwrap_or(0);
        self.outcomes[at].fetch_add(1, Ordering::Relaxed);
    }

    /// One round trip to the server, which took `took`.
    pub fn round_trip(&self, ended: Ended, took: Duration) {
        self.round_trips.fetch_add(1, Ordering::Relaxed);
        match ended {
            Ended::Answered => {}
            Ended::TimedOut => {
                self.timeouts.fetch_add(1, Ordering::Relaxed);
            }
            Ended::Failed => {
                self.errors.fetch_add(1, Ordering::Relaxed);
            }
        }
        let seconds = took.as_secs_f64();
        if let Some(at) = LATENCY_BUCKETS.iter().position(|le| seconds <= *le) {
            self.latency[at].fetch_add(1, Ordering::Relaxed);
        }
        self.latency_sum_ns.fetch_add(u64::try_from(took.as_nanos()).unwrap_or(u64::MAX), Ordering::Relaxed);
    }

    /// A read not tried: the circuit breaker was open.
    pub fn skipped(&self) {
        self.skipped.fetch_add(1, Ordering::Relaxed);
    }

    /// The counters now, for the source `name` of kind `kind`.
    pub fn report(&self, name: &str, kind: SourceKind) -> SourceUsage {
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed);
        let lookups = OUTCOMES.iter().zip(&self.outcomes).map(|(o, n)| (o.name().to_owned(), get(n))).collect();
        let mut below = 0;
        let buckets = self
            .latency
            .iter()
            .map(|n| {
                below += get(n);
                below
            })
            .collect();
        SourceUsage {
            source: name.to_owned(),
            kind,
            lookups,
            round_trips: get(&self.round_trips),
            timeouts: get(&self.timeouts),
            errors: get(&self.errors),
            skipped: get(&self.skipped),
            latency_buckets: buckets,
            latency_sum_seconds: get(&self.latency_sum_ns) as f64 / 1e9,
        }
    }
}

/// What kind of source.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum SourceKind {
    /// An embedded table.
    Table,
    /// A Redis server.
    Redis,
    /// A PostgreSQL server.
    Postgres,
}

/// A source's counters, read at one moment.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct SourceUsage {
    /// The source's name in the features file.
    pub source: String,
    /// Its kind.
    pub kind: SourceKind,
    /// Features of rows, by outcome (`found`, `missing`, `stale`,
    /// `unavailable`, and `from_request` when the row carried it).
    pub lookups: BTreeMap<String, u64>,
    /// Round trips to the server (none for a table).
    pub round_trips: u64,
    /// Round trips not answered within the budget.
    pub timeouts: u64,
    /// Round trips that failed.
    pub errors: u64,
    /// Reads not tried while the circuit breaker was open.
    pub skipped: u64,
    /// Round trips that took at most each bound of [`LATENCY_BUCKETS`],
    /// cumulative.
    pub latency_buckets: Vec<u64>,
    /// Their total time, in seconds.
    pub latency_sum_seconds: f64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn outcomes_and_round_trips_are_counted_where_they_belong() {
        let c = SourceCounts::default();
        c.lookup(Outcome::Found);
        c.lookup(Outcome::Found);
        c.lookup(Outcome::Stale);
        c.round_trip(Ended::Answered, Duration::from_micros(300));
        c.round_trip(Ended::TimedOut, Duration::from_millis(12));
        c.round_trip(Ended::Failed, Duration::from_secs(9));
        c.skipped();
        let r = c.report("live", SourceKind::Redis);
        assert_eq!(r.lookups["found"], 2);
        assert_eq!(r.lookups["stale"], 1);
        assert_eq!(r.lookups["missing"], 0);
        assert_eq!((r.round_trips, r.timeouts, r.errors, r.skipped), (3, 1, 1, 1));
        // 300 µs falls in (250 µs, 500 µs]; 12 ms in (10 ms, 25 ms]; 9 s past every bound.
        let at = |le: f64| r.latency_buckets[LATENCY_BUCKETS.iter().position(|b| *b == le).unwrap()];
        assert_eq!((at(2.5e-4), at(5e-4), at(1e-2), at(2.5e-2), at(2.5)), (0, 1, 1, 2, 2));
        assert!((r.latency_sum_seconds - 9.0123).abs() < 1e-9, "{}", r.latency_sum_seconds);
    }
}
