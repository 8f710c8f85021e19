//! The hard limits that bind a model, and the typed error for hitting one.

use std::fmt;
use std::time::Duration;

use serde::Serialize;

/// Limits that bind one model. Every field has a documented default
/// ([`Limits::default`]); a call that hits one fails with
/// [`LimitHit`] naming it, and the instance that hit it is discarded.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Limits {
    /// Wall-clock time one `score` call may take inside the sandbox, from
    /// entering it to returning. Default 50 ms. Enforced by epoch
    /// interruption, so it is exact to within one tick of the runtime's
    /// clock (1 ms).
    ///
    /// Wall-clock means it counts time the thread spends descheduled: with
    /// more threads calling models than cores, a call can lose its core
    /// mid-call and miss a deadline its model would meet (seen: a 4.5 µs
    /// model missing a 5 ms deadline, four threads on two cores). Call
    /// from at most as many threads as there are cores, or leave headroom
    /// above the model's own time. (What the call itself ran is not
    /// reported: telling it apart would cost a system call per call.)
    #[serde(serialize_with = "ser_duration")]
    pub deadline: Duration,
    /// Wall-clock time `init` plus `describe` may take when an instance
    /// starts. Default 2 s: decoding a large parameter blob is slow.
    #[serde(serialize_with = "ser_duration")]
    pub init_deadline: Duration,
    /// WebAssembly instructions (fuel) one `score` call may use, when the
    /// runtime meters fuel. Default `None`: no fuel limit, only the
    /// deadline. Not charged to starting an instance (see `init_fuel`).
    pub fuel: Option<u64>,
    /// Fuel `init` plus `describe` may use when an instance starts, when
    /// the runtime meters fuel. Default `None`: no fuel limit at start, only
    /// `init_deadline` (decoding params costs far more than one call).
    pub init_fuel: Option<u64>,
    /// Largest linear memory the model may have, in bytes. Default 64 MiB.
    pub memory_bytes: u64,
    /// Largest table the model may have, in elements. Default 10 000.
    pub table_elements: u64,
    /// Most rows one call may carry. Default 65 536.
    pub rows_per_call: usize,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            deadline: Duration::from_millis(50),
            init_deadline: Duration::from_secs(2),
            fuel: None,
            init_fuel: None,
            memory_bytes: 64 << 20,
            table_elements: 10_000,
            rows_per_call: 65_536,
        }
    }
}

impl Limits {
    /// Refuses limits that cannot mean what they say: zero deadlines, fuel,
    /// memory, rows or artifact size, and deadlines over an hour.
    ///
    /// # Errors
    /// [`LimitsError`] listing a [`SettingProblem`] for each field out of
    /// range.
    pub fn check(&self) -> Result<(), LimitsError> {
        const HOUR: Duration = Duration::from_secs(3600);
        let mut problems = Vec::new();
        let mut problem = |field, value: String, allowed| problems.push(SettingProblem { field, value, allowed });
        if self.deadline.is_zero() || self.deadline > HOUR {
            problem("deadline", fmt_duration(self.deadline), "give 1 ms to 1 hour");
        }
        if self.init_deadline.is_zero() || self.init_deadline > HOUR {
            problem("init_deadline", fmt_duration(self.init_deadline), "give 1 ms to 1 hour");
        }
        if self.fuel == Some(0) {
            problem("fuel", "0".into(), "no call could run; leave it unset for no fuel limit");
        }
        if self.init_fuel == Some(0) {
            problem("init_fuel", "0".into(), "no instance could start; leave it unset for no fuel limit");
        }
        if self.memory_bytes < 65_536 {
            problem("memory_bytes", self.memory_bytes.to_string(), "one WebAssembly page (65536) is the least");
        }
        if self.rows_per_call == 0 {
            problem("rows_per_call", "0".into(), "no call could carry a row");
        }
        if problems.is_empty() { Ok(()) } else { Err(LimitsError { problems }) }
    }
}

/// One setting that cannot mean what it says: a field of [`Limits`] or of
/// [`RuntimeConfig`](crate::sandbox::RuntimeConfig), its value, and what it
/// may be instead.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{field} is {value}: {allowed}")]
#[non_exhaustive]
pub struct SettingProblem {
    /// The field, as the struct names it.
    pub field: &'static str,
    /// Its value, as text.
    pub value: String,
    /// What it may be instead.
    pub allowed: &'static str,
}

/// Limits refused by [`Limits::check`]: every field out of range.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{}", .problems.iter().map(ToString::to_string).collect::<Vec<_>>().join("; "))]
#[non_exhaustive]
pub struct LimitsError {
    /// Each field out of range.
    pub problems: Vec<SettingProblem>,
}

/// Which limit a call hit.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, thiserror::Error)]
#[serde(tag = "name", rename_all = "snake_case")]
#[non_exhaustive]
pub enum LimitHit {
    /// The call ran past its wall-clock deadline.
    #[error("deadline of {} exceeded", fmt_duration(*limit))]
    Deadline {
        /// The deadline that bound the call.
        #[serde(serialize_with = "ser_duration")]
        limit: Duration,
    },
    /// The call used all its fuel.
    #[error("fuel limit of {limit} exhausted")]
    Fuel {
        /// Fuel the call had.
        limit: u64,
    },
    /// The model asked for more linear memory than its cap.
    #[error("memory cap of {limit} bytes exceeded (asked for {requested} bytes)")]
    Memory {
        /// The cap, in bytes.
        limit: u64,
        /// What the model asked for, in bytes.
        requested: u64,
    },
    /// The model asked for a bigger table than its cap.
    #[error("table cap of {limit} elements exceeded (asked for {requested} elements)")]
    Table {
        /// The cap, in elements.
        limit: u64,
        /// What the model asked for, in elements.
        requested: u64,
    },
    /// The model exhausted its call stack (deep or endless recursion).
    #[error("stack limit of {limit} bytes exhausted")]
    Stack {
        /// The engine's stack limit in bytes.
        limit: u64,
    },
    /// The artifact file is larger than accepted.
    #[error("artifact size cap of {limit} bytes exceeded (file has {actual} bytes)")]
    ArtifactSize {
        /// The cap, in bytes.
        limit: u64,
        /// The file's size.
        actual: u64,
    },
    /// A call carried more rows than accepted.
    #[error("rows-per-call cap of {limit} exceeded (call has {actual} rows)")]
    Rows {
        /// The cap.
        limit: usize,
        /// Rows in the call.
        actual: usize,
    },
}

impl LimitHit {
    /// A short stable name for the limit (`deadline`, `fuel`, `memory`…),
    /// for metrics and logs.
    pub fn name(&self) -> &'static str {
        match self {
            LimitHit::Deadline { .. } => "deadline",
            LimitHit::Fuel { .. } => "fuel",
            LimitHit::Memory { .. } => "memory",
            LimitHit::Table { .. } => "table",
            LimitHit::Stack { .. } => "stack",
            LimitHit::ArtifactSize { .. } => "artifact_size",
            LimitHit::Rows { .. } => "rows",
        }
    }
}

/// Formats a duration the way limits are written in messages (`50ms`, `2s`).
pub fn fmt_duration(d: Duration) -> String {
    DurationText(d).to_string()
}

struct DurationText(Duration);

impl fmt::Display for DurationText {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let d = self.0;
        if d.subsec_nanos() == 0 {
            write!(f, "{}s", d.as_secs())
        } else if d.as_nanos().is_multiple_of(1_000_000) {
            write!(f, "{}ms", d.as_millis())
        } else {
            write!(f, "{}µs", d.as_micros())
        }
    }
}

fn ser_duration<S: serde::Serializer>(d: &Duration, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(&fmt_duration(*d))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn limit_messages_name_the_limit_and_value() {
        let hit = LimitHit::Deadline { limit: Duration::from_millis(50) };
        assert_eq!(hit.to_string(), "deadline of 50ms exceeded");
        assert_eq!(hit.name(), "deadline");
        let hit = LimitHit::Memory { limit: 1 << 20, requested: 2 << 20 };
        assert_eq!(hit.to_string(), "memory cap of 1048576 bytes exceeded (asked for 2097152 bytes)");
        assert_eq!(fmt_duration(Duration::from_secs(2)), "2s");
    }
}
