//! The circuit breaker every server source shares (Redis, PostgreSQL):
//! after a failed read, reads fail at once for a pause that doubles with
//! each failure in a row (100 ms to 5 s); the first read after the pause
//! tries the server again, and an answer closes the breaker.
//!
//! While the breaker is open nothing is sent, so a server that stopped
//! answering holds at most the reads sent before the first one gave up,
//! and requests fall back at once instead of each waiting out its budget.

use std::sync::Mutex;
use std::time::{Duration, Instant};

use super::Trouble;

/// Longest pause.
const MAX_PAUSE: Duration = Duration::from_secs(5);
/// First pause after a failure.
const FIRST_PAUSE: Duration = Duration::from_millis(100);

/// One source's breaker.
#[derive(Debug, Default)]
pub struct Breaker {
    state: Mutex<State>,
}

#[derive(Debug, Default)]
struct State {
    failures: u32,
    open_until: Option<Instant>,
}

impl Breaker {
    /// `Ok` when a read may be sent now.
    ///
    /// # Errors
    /// [`Trouble::Paused`] while the breaker is open.
    pub fn admit(&self) -> Result<(), Trouble> {
        self.admit_at(Instant::now())
    }

    /// A read answered: the breaker closes.
    pub fn answered(&self) {
        *self.state.lock().unwrap_or_else(|e| e.into_inner()) = State::default();
    }

    /// A read failed or timed out: the breaker opens for the next pause.
    pub fn failed(&self) {
        self.failed_at(Instant::now());
    }

    fn admit_at(&self, now: Instant) -> Result<(), Trouble> {
        let state = self.state.lock().unwrap_or_else(|e| e.into_inner());
        match state.open_until {
            Some(until) if now < until => Err(Trouble::Paused { retry_in_ms: (until - now).as_millis() }),
            _ => Ok(()),
        }
    }

    fn failed_at(&self, now: Instant) {
        let mut state = self.state.lock().unwrap_or_else(|e| e.into_inner());
        state.failures = state.failures.saturating_add(1);
        let pause = FIRST_PAUSE.saturating_mul(1 << state.failures.min(16).saturating_sub(1)).min(MAX_PAUSE);
        state.open_until = Some(now + pause);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_failure_opens_the_breaker_for_a_doubling_pause_and_an_answer_closes_it() {
        let b = Breaker::default();
        let t0 = Instant::now();
        assert_eq!(b.admit_at(t0), Ok(()));
        b.failed_at(t0);
        assert_eq!(b.admit_at(t0), Err(Trouble::Paused { retry_in_ms: 100 }));
        assert_eq!(b.admit_at(t0 + FIRST_PAUSE), Ok(()), "tried again once the pause is over");
        b.failed_at(t0);
        assert_eq!(b.admit_at(t0), Err(Trouble::Paused { retry_in_ms: 200 }));
        for _ in 0..10 {
            b.failed_at(t0);
        }
        assert_eq!(b.admit_at(t0), Err(Trouble::Paused { retry_in_ms: 5000 }), "at most {MAX_PAUSE:?}");
        b.answered();
        assert_eq!(b.admit_at(t0), Ok(()));
    }
}
