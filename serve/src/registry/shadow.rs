//! Shadow runs: a sample of requests is scored again, in the background, by
//! a candidate version, and the answers compared with the served ones.
//!
//! The served answer never waits for the shadow: a request hands a copy of
//! its rows to a bounded queue and returns. When the queue is full the
//! sample is dropped and counted, so a slow shadow cannot slow serving or
//! grow memory without bound.

use std::sync::mpsc::{Receiver, SyncSender, TrySendError, sync_channel};
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use paddock_host::contract::rows::Row;
use paddock_host::sandbox::model::Estimates;

use super::gate::Loaded;
use super::ledger::ShadowLedger;

/// One sampled request.
pub(crate) struct Job {
    pub served: Arc<Loaded>,
    pub shadow: Arc<Loaded>,
    pub rows: Vec<Row>,
    pub answer: Estimates,
    pub tolerance: f64,
    pub ledger: Arc<ShadowLedger>,
}

/// The queue and the thread that drains it.
pub(crate) struct Shadows {
    queue: Mutex<Option<SyncSender<Job>>>,
    pending: Arc<Pending>,
}

/// Jobs queued and not yet done, and a signal each time one is done.
#[derive(Default)]
struct Pending {
    count: Mutex<u64>,
    done: Condvar,
}

impl Pending {
    fn add(&self) {
        *self.count.lock().unwrap_or_else(|e| e.into_inner()) += 1;
    }

    fn finish(&self) {
        let mut count = self.count.lock().unwrap_or_else(|e| e.into_inner());
        *count = count.saturating_sub(1);
        self.done.notify_all();
    }
}

impl Shadows {
    /// Starts the worker thread with a queue of `capacity` requests.
    pub(crate) fn start(capacity: usize) -> Shadows {
        let (tx, rx) = sync_channel(capacity.max(1));
        let pending = Arc::new(Pending::default());
        let worker_pending = pending.clone();
        let started =
            std::thread::Builder::new().name("paddock-shadow".into()).spawn(move || work(rx, worker_pending)).is_ok();
        if !started {
            tracing::warn!("cannot start the shadow thread; shadow runs are off");
        }
        Shadows { queue: Mutex::new(started.then_some(tx)), pending }
    }

    /// Queues a job, or counts it dropped when the queue is full.
    pub(crate) fn submit(&self, job: Job) {
        let queue = self.queue.lock().unwrap_or_else(|e| e.into_inner());
        let Some(tx) = queue.as_ref() else {
            job.ledger.record_dropped();
            return;
        };
        self.pending.add();
        if let Err(TrySendError::Full(job) | TrySendError::Disconnected(job)) = tx.try_send(job) {
            self.pending.finish();
            job.ledger.record_dropped();
        }
    }

    /// Waits until every queued job is done, at most `timeout`; says whether
    /// the queue drained.
    pub(crate) fn drain(&self, timeout: Duration) -> bool {
        let count = self.pending.count.lock().unwrap_or_else(|e| e.into_inner());
        let (count, _) =
            self.pending.done.wait_timeout_while(count, timeout, |n| *n > 0).unwrap_or_else(|e| e.into_inner());
        *count == 0
    }
}

fn work(rx: Receiver<Job>, pending: Arc<Pending>) {
    for job in rx {
        compare(&job);
        pending.finish();
    }
}

fn compare(job: &Job) {
    let started = Instant::now();
    let result = job.shadow.model.score(&job.rows);
    let version_ledger = &job.shadow.ledger;
    let estimates = match result {
        Ok(e) => {
            version_ledger.record_ok(e.usage());
            e
        }
        Err(error) => {
            version_ledger.record_error(job.rows.len(), &error, started.elapsed());
            job.ledger.record_error(error.kind());
            return;
        }
    };
    // Outputs are matched by name: versions may order or add outputs.
    let served_outputs = &job.served.model.contract().outputs;
    let pairs: Vec<(usize, usize)> = job
        .shadow
        .model
        .contract()
        .outputs
        .iter()
        .enumerate()
        .filter_map(|(k, o)| served_outputs.iter().position(|s| s.name == o.name).map(|j| (j, k)))
        .collect();
    let (answer, estimates) = (&job.answer, &estimates);
    let values = (0..answer.row_count())
        .flat_map(|r| pairs.iter().map(move |&(j, k)| (answer.values_at(r)[j], estimates.values_at(r)[k])));
    job.ledger.record_diff(values, job.tolerance);
}
