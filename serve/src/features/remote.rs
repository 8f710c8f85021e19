//! What reading a server source takes, whichever the server (Redis,
//! PostgreSQL): the shape of an answer, why a read got nothing, and
//! waiting for an answer from a thread or from a task.
//!
//! A source runs its reads on a small runtime of its own (or, for an async
//! caller, on the caller's runtime) and settles each one there (its counters, its breaker, its connection) before handing
//! the answer over, so a caller that stops waiting changes nothing. A
//! caller waits at most the source's budget from when the read was sent,
//! and a little for the runtime's own scheduling.

use std::time::{Duration, Instant};

use super::breaker::Breaker;
use super::counts::SourceCounts;

/// A value a server answered with.
#[derive(Clone, Debug, PartialEq)]
pub enum Got {
    /// A number (a numeric column, a timestamp as Unix seconds, a boolean as 0 or 1).
    Number(f64),
    /// Text (a Redis field, a text column).
    Text(String),
}

/// One answer per key asked: the fields' values in the order asked,
/// `None` where the key has no such field or the value is null.
pub type Replies = Vec<Vec<Option<Got>>>;

/// The keys a request reads from one source, each with the fields it needs.
pub type Asks = [(String, Vec<String>)];

/// Why a read got nothing.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum Trouble {
    /// No answer within the source's budget.
    #[error("no answer within {budget_ms} ms")]
    Timeout {
        /// The budget.
        budget_ms: u128,
    },
    /// The server could not be reached, or answered with an error.
    #[error("{0}")]
    Failed(String),
    /// The breaker is open after a failure: not tried.
    #[error("not tried for {retry_in_ms} ms more after a failure")]
    Paused {
        /// Until the next try.
        retry_in_ms: u128,
    },
}

/// A read's outcome, as the source settled it.
pub type Settled = Result<Replies, Trouble>;

/// Where a read's answer goes: a thread blocked on it, or a task awaiting it.
pub enum Reply {
    /// A thread waiting in [`Pending::wait`].
    Blocking(std::sync::mpsc::SyncSender<Settled>),
    /// A task awaiting [`Awaited::wait`].
    Async(tokio::sync::oneshot::Sender<Settled>),
}

impl Reply {
    /// Hands the answer over; a waiter that gave up is gone: nothing to tell.
    pub fn send(self, outcome: Settled) {
        match self {
            Reply::Blocking(tx) => drop(tx.send(outcome)),
            Reply::Async(tx) => drop(tx.send(outcome)),
        }
    }
}

/// The extra a waiter gives the source's runtime to schedule the read's end.
const SLACK: Duration = Duration::from_millis(20);

/// When a waiter gives up on a read sent now with `budget`.
fn give_up_at(budget: Duration) -> Instant {
    Instant::now() + budget + SLACK
}

/// A read sent, its answer to be waited for by a thread.
pub struct Pending {
    state: Result<(std::sync::mpsc::Receiver<Settled>, Instant, Duration), Settled>,
}

impl Pending {
    /// An answer known without asking (nothing to ask, the breaker open).
    pub fn done(outcome: Settled) -> Pending {
        Pending { state: Err(outcome) }
    }

    /// The reply channel for a read sent now with `budget`, and its pending answer.
    pub fn new(budget: Duration) -> (Reply, Pending) {
        let (tx, rx) = std::sync::mpsc::sync_channel(1);
        (Reply::Blocking(tx), Pending { state: Ok((rx, give_up_at(budget), budget)) })
    }

    /// The answer, blocking the calling thread.
    ///
    /// # Errors
    /// The source's [`Trouble`], or [`Trouble::Timeout`] when no answer
    /// came in time.
    pub fn wait(self) -> Settled {
        match self.state {
            Err(outcome) => outcome,
            Ok((rx, until, budget)) => rx
                .recv_timeout(until.saturating_duration_since(Instant::now()))
                .unwrap_or(Err(Trouble::Timeout { budget_ms: budget.as_millis() })),
        }
    }
}

/// A read run within the awaiting task; it keeps its own budget.
pub type ReadHere = std::pin::Pin<Box<dyn std::future::Future<Output = Settled> + Send>>;

/// A read sent, its answer to be awaited by a task.
pub struct Awaited {
    state: AwaitedState,
}

/// Where an awaited answer comes from.
enum AwaitedState {
    /// Known without asking.
    Done(Settled),
    /// From the source's runtime, given up on at the instant.
    Sent(tokio::sync::oneshot::Receiver<Settled>, Instant, Duration),
    /// From a read the awaiting task runs itself.
    Here(ReadHere),
}

impl Awaited {
    /// An answer known without asking (nothing to ask, the breaker open).
    pub fn done(outcome: Settled) -> Awaited {
        Awaited { state: AwaitedState::Done(outcome) }
    }

    /// The reply channel for a read sent now with `budget`, and its awaited answer.
    pub fn new(budget: Duration) -> (Reply, Awaited) {
        let (tx, rx) = tokio::sync::oneshot::channel();
        (Reply::Async(tx), Awaited { state: AwaitedState::Sent(rx, give_up_at(budget), budget) })
    }

    /// The answer of a read the awaiting task runs itself.
    pub fn here(read: ReadHere) -> Awaited {
        Awaited { state: AwaitedState::Here(read) }
    }

    /// The answer, awaited: the task waits, no thread does.
    ///
    /// # Errors
    /// As [`Pending::wait`].
    pub async fn wait(self) -> Settled {
        match self.state {
            AwaitedState::Done(outcome) => outcome,
            AwaitedState::Sent(rx, until, budget) => {
                match tokio::time::timeout(until.saturating_duration_since(Instant::now()), rx).await {
                    Ok(Ok(outcome)) => outcome,
                    _ => Err(Trouble::Timeout { budget_ms: budget.as_millis() }),
                }
            }
            AwaitedState::Here(read) => read.await,
        }
    }
}

/// A source on a server, read within a budget: each kind says how a read
/// starts ([`ServerRead::dispatch`]); sending, and the answers known
/// without asking, are the same for all.
pub trait ServerRead {
    /// How long a request may wait for it.
    fn budget(&self) -> Duration;

    /// Its breaker.
    fn breaker(&self) -> &Breaker;

    /// Its counters.
    fn counts(&self) -> &SourceCounts;

    /// Starts the read on the source's runtime, which settles it (counts,
    /// breaker, connection) and hands the answer to `reply`.
    fn dispatch(&self, asks: &Asks, reply: Reply);

    /// The read as a future for a caller on an async runtime to await in
    /// its own task, settling as [`ServerRead::dispatch`] does; `None`
    /// (the default) sends it to the source's runtime instead.
    fn read_here(&self, _asks: &Asks) -> Option<ReadHere> {
        None
    }

    /// Reads the `fields` of each key: for each (key, fields), the values
    /// in order (`None` for a key or field not there).
    ///
    /// # Errors
    /// [`Trouble`]: no answer within the budget, a failure, or the breaker open.
    fn fetch(&self, asks: &Asks) -> Settled {
        self.send(asks).wait()
    }

    /// Sends the read and returns at once: several sources are read at the
    /// same time, each within its budget. [`Pending::wait`] blocks the
    /// calling thread until the answer.
    fn send(&self, asks: &Asks) -> Pending {
        if let Some(known) = known(self, asks) {
            return Pending::done(known);
        }
        let (reply, pending) = Pending::new(self.budget());
        self.dispatch(asks, reply);
        pending
    }

    /// As [`ServerRead::send`], for a caller on an async runtime:
    /// [`Awaited::wait`] awaits the answer without holding a thread.
    fn send_async(&self, asks: &Asks) -> Awaited {
        if let Some(known) = known(self, asks) {
            return Awaited::done(known);
        }
        if let Some(read) = self.read_here(asks) {
            return Awaited::here(read);
        }
        let (reply, awaited) = Awaited::new(self.budget());
        self.dispatch(asks, reply);
        awaited
    }
}

/// The answer when it is known without asking: nothing to ask, or the
/// breaker open.
fn known<S: ServerRead + ?Sized>(source: &S, asks: &Asks) -> Option<Settled> {
    if asks.is_empty() {
        return Some(Ok(Vec::new()));
    }
    if let Err(t) = source.breaker().admit() {
        source.counts().skipped();
        return Some(Err(t));
    }
    None
}
