//! Captured traffic: a sample of the requests a host answers, each with
//! its answer, written to compressed NDJSON files a replay reads back.
//!
//! Off unless [`super::RegistryOptions::capture`] names a directory. A
//! sampled request hands a copy of its rows (as scored: completed by the
//! features plan) and its answer to a bounded queue and returns; one thread
//! writes. When the queue is full — in lines, or in the bytes its lines
//! hold — the line is dropped and counted, so a slow or full disk never
//! slows or fails a request, and memory stays bounded.
//!
//! Each line is an estimate request as `POST /estimate` and `paddock
//! stream` take it (`model`, `context`, `at`, `rows`), plus a `captured`
//! object: the version and digest that answered, the output names, each
//! row's values (`null` for a row that got none), and what was done to
//! private keys and features. Private names come from the features plan
//! (`[models.NAME.private]`): dropped, or written as a salted SHA-256 whose
//! salt lives only in the host's memory.
//!
//! Files: `current.requests.ndjson.gz.partial` while being written; closed
//! (the gzip stream finished) and renamed
//! `capture-<UTC time>-<number>.requests.ndjson.gz`
//! once it holds `file_bytes` of lines, on [`Capture::rotate`], and when
//! the host stops; the oldest closed files beyond `keep_files` are deleted.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{Receiver, RecvTimeoutError, SyncSender, TrySendError, sync_channel};
use std::time::Duration;

use flate2::Compression;
use flate2::write::GzEncoder;
use jiff::Timestamp;
use paddock_host::artifact::digest::Digest;
use paddock_host::contract::rows::{Row, Value};
use semver::Version;
use serde::Serialize;
use sha2::{Digest as _, Sha256};

use super::routes::RequestContext;
use crate::features::Privacy;

/// How often what was written reaches the file system (a crash loses at most this much).
const FLUSH_EVERY: Duration = Duration::from_secs(1);

/// The file being written.
pub const PARTIAL_FILE: &str = "current.requests.ndjson.gz.partial";

/// How a host captures traffic.
#[derive(Clone, Debug, PartialEq)]
pub struct CaptureOptions {
    /// Where the files go (created if missing).
    pub dir: PathBuf,
    /// The share of answered requests captured, above 0 and at most 1.
    pub share: f64,
    /// A file is closed once it holds this many bytes of lines (before compression).
    pub file_bytes: u64,
    /// Closed files kept; the oldest beyond are deleted.
    pub keep_files: usize,
    /// Lines waiting to be written at most; more are dropped (and counted).
    pub queue: usize,
    /// Bytes the waiting lines may hold at most (as estimated before they
    /// are written); a line that would pass it is dropped (and counted).
    pub queue_bytes: u64,
    /// The longest line written; a longer one is dropped (and counted).
    pub line_bytes: usize,
}

impl CaptureOptions {
    /// Capture 1 % of requests into `dir`, in files of 64 MiB of lines,
    /// keeping 48, with a queue of 1024 lines holding at most 64 MiB, each
    /// line at most 1 MiB.
    pub fn new(dir: impl Into<PathBuf>) -> CaptureOptions {
        CaptureOptions {
            dir: dir.into(),
            share: 0.01,
            file_bytes: 64 << 20,
            keep_files: 48,
            queue: 1024,
            queue_bytes: 64 << 20,
            line_bytes: 1 << 20,
        }
    }
}

/// Why capture cannot start.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CaptureError {
    /// The share is not above 0 and at most 1.
    #[error("capture share {0} is not above 0 and at most 1")]
    Share(f64),
    /// The directory cannot be made.
    #[error("capture directory {}: {source}", dir.display())]
    Dir {
        /// The directory.
        dir: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// The writing thread cannot start.
    #[error("cannot start the capture thread: {0}")]
    Thread(std::io::Error),
}

/// What became of the requests capture sampled, since the host started.
#[derive(Clone, Debug, Default, PartialEq, Eq, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct CaptureCounts {
    /// Requests sampled.
    pub sampled: u64,
    /// Lines written to a file (flushed to the file system).
    pub written: u64,
    /// Lines dropped because the queue was full (a slow disk).
    pub dropped_queue_full: u64,
    /// Lines dropped because they were longer than the limit.
    pub dropped_too_long: u64,
    /// Lines lost because a write failed (a full disk, an unwritable directory).
    pub lost_write_failed: u64,
    /// Files closed.
    pub files: u64,
}

/// The same, counted from several threads.
#[derive(Debug, Default)]
struct Counters {
    sampled: AtomicU64,
    written: AtomicU64,
    dropped_queue_full: AtomicU64,
    dropped_too_long: AtomicU64,
    lost_write_failed: AtomicU64,
    files: AtomicU64,
}

impl Counters {
    fn read(&self) -> CaptureCounts {
        let r = |c: &AtomicU64| c.load(Ordering::Relaxed);
        CaptureCounts {
            sampled: r(&self.sampled),
            written: r(&self.written),
            dropped_queue_full: r(&self.dropped_queue_full),
            dropped_too_long: r(&self.dropped_too_long),
            lost_write_failed: r(&self.lost_write_failed),
            files: r(&self.files),
        }
    }
}

/// One sampled request and its answer, as handed to the writer.
pub(crate) struct Taken {
    pub model: String,
    pub context: RequestContext,
    pub at: Timestamp,
    /// Every request row, completed by the features plan where it was.
    pub rows: Vec<Row>,
    pub version: Version,
    pub digest: Digest,
    pub outputs: Arc<[String]>,
    /// Per request row, its values, or `None` when it got none.
    pub answers: Vec<Option<Vec<f64>>>,
    pub private: Option<Arc<BTreeMap<String, Privacy>>>,
    /// What [`Taken::estimated_bytes`] said when it was queued.
    pub queued_bytes: u64,
}

impl Taken {
    /// About the bytes its line will take: every key and value of its
    /// context and rows, and its answers, at their written length or more.
    fn estimated_bytes(&self) -> u64 {
        let value = |v: &Value| match v {
            Value::Label(text) => text.len() + 2,
            _ => 24,
        };
        let context: usize = self.context.iter().map(|(k, v)| k.len() + v.len() + 6).sum();
        let rows: usize = self.rows.iter().flat_map(|r| r.fields()).map(|(k, v)| k.len() + 4 + value(v)).sum::<usize>()
            + 2 * self.rows.len();
        let answers: usize = self.answers.iter().map(|a| a.as_ref().map_or(5, |v| 25 * v.len() + 2)).sum();
        let outputs: usize = self.outputs.iter().map(|o| o.len() + 3).sum();
        let private: usize = self.private.as_deref().map_or(0, |p| p.keys().map(|k| k.len() + 12).sum());
        (256 + self.model.len() + context + rows + answers + outputs + private) as u64
    }
}

enum Message {
    Line(Box<Taken>),
    Rotate(SyncSender<()>),
}

/// A host's capture: the sampling, the queue and the writing thread.
pub(crate) struct Capture {
    queue: SyncSender<Message>,
    /// Where the files go, and the share sampled (for the status).
    dir: PathBuf,
    share: f64,
    next: AtomicU64,
    /// A request is sampled when the hash of its number is below this.
    threshold: u64,
    counters: Arc<Counters>,
    /// Bytes the queued lines hold (estimated), and the most they may.
    queued: Arc<AtomicU64>,
    queue_bytes: u64,
    line_bytes: usize,
}

impl Capture {
    /// Makes the directory, keeps any file an earlier host left being
    /// written (renamed as closed), and starts the writing thread.
    pub(crate) fn start(options: CaptureOptions) -> Result<Capture, CaptureError> {
        if !(options.share > 0.0 && options.share <= 1.0) {
            return Err(CaptureError::Share(options.share));
        }
        let dir_error = |source| CaptureError::Dir { dir: options.dir.clone(), source };
        std::fs::create_dir_all(&options.dir).map_err(dir_error)?;
        let partial = options.dir.join(PARTIAL_FILE);
        if partial.is_file() {
            std::fs::rename(&partial, closed_name(&options.dir, 0, "-unfinished")).map_err(dir_error)?;
        }
        let counters = Arc::new(Counters::default());
        let (tx, rx) = sync_channel(options.queue.max(1));
        let threshold = if options.share >= 1.0 { u64::MAX } else { (options.share * u64::MAX as f64) as u64 };
        let mut salt = [0u8; 16];
        getrandom::fill(&mut salt).map_err(|e| CaptureError::Thread(std::io::Error::other(e.to_string())))?;
        let queued = Arc::new(AtomicU64::new(0));
        let (queue_bytes, line_bytes) = (options.queue_bytes, options.line_bytes);
        let (dir, share) = (options.dir.clone(), options.share);
        let writer =
            Writer { options, counters: counters.clone(), queued: queued.clone(), salt, open: None, closed: 0 };
        std::thread::Builder::new()
            .name("paddock-capture".into())
            .spawn(move || writer.run(rx))
            .map_err(CaptureError::Thread)?;
        Ok(Capture {
            queue: tx,
            dir,
            share,
            next: AtomicU64::new(0),
            threshold,
            counters,
            queued,
            queue_bytes,
            line_bytes,
        })
    }

    /// Whether the next request is sampled (counted when it is).
    pub(crate) fn samples(&self) -> bool {
        let n = self.next.fetch_add(1, Ordering::Relaxed);
        let sampled = self.threshold == u64::MAX || spread(n) < self.threshold;
        if sampled {
            self.counters.sampled.fetch_add(1, Ordering::Relaxed);
        }
        sampled
    }

    /// Queues a sampled request's line, or counts it dropped: too long,
    /// or the queue full (in lines or bytes).
    pub(crate) fn offer(&self, mut taken: Taken) {
        let bytes = taken.estimated_bytes();
        if bytes > self.line_bytes as u64 {
            self.counters.dropped_too_long.fetch_add(1, Ordering::Relaxed);
            return;
        }
        if self.queued.fetch_add(bytes, Ordering::Relaxed) + bytes > self.queue_bytes {
            self.queued.fetch_sub(bytes, Ordering::Relaxed);
            self.counters.dropped_queue_full.fetch_add(1, Ordering::Relaxed);
            return;
        }
        taken.queued_bytes = bytes;
        if self.queue.try_send(Message::Line(Box::new(taken))).is_err() {
            self.queued.fetch_sub(bytes, Ordering::Relaxed);
            self.counters.dropped_queue_full.fetch_add(1, Ordering::Relaxed);
        }
    }

    /// Closes the file being written once every line queued before is in
    /// it, waiting at most `timeout`; says whether it was done.
    pub(crate) fn rotate(&self, timeout: Duration) -> bool {
        let (ack, done) = sync_channel(1);
        // Waits for room in the queue no longer than `timeout` either.
        let deadline = std::time::Instant::now() + timeout;
        let mut message = Message::Rotate(ack);
        loop {
            match self.queue.try_send(message) {
                Ok(()) => break,
                Err(TrySendError::Disconnected(_)) => return false,
                Err(TrySendError::Full(m)) if std::time::Instant::now() < deadline => {
                    message = m;
                    std::thread::sleep(Duration::from_millis(5));
                }
                Err(TrySendError::Full(_)) => return false,
            }
        }
        done.recv_timeout(deadline.saturating_duration_since(std::time::Instant::now())).is_ok()
    }

    /// Where it writes, how much it samples, and what became of the
    /// sampled requests so far.
    pub(crate) fn state(&self) -> super::CaptureState {
        super::CaptureState { dir: self.dir.clone(), share: self.share, counts: self.counters.read() }
    }
}

/// SplitMix64's finaliser: request numbers spread evenly over the `u64`s,
/// so every `1/share`-th stretch of requests is sampled about evenly.
fn spread(n: u64) -> u64 {
    let mut z = n.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// A closed file's name: `capture-20261205T194100123Z-000003.requests.ndjson.gz`.
fn closed_name(dir: &Path, number: u64, suffix: &str) -> PathBuf {
    let now = Timestamp::now().strftime("%Y%m%dT%H%M%S%.fZ").to_string().replace('.', "");
    dir.join(format!("capture-{now}-{number:06}{suffix}.requests.ndjson.gz"))
}

/// The file being written.
struct Open {
    encoder: GzEncoder<BufWriter<File>>,
    /// Bytes of lines in it.
    bytes: u64,
    /// Lines in it since the last flush.
    unflushed: u64,
}

/// The writing thread's state.
struct Writer {
    options: CaptureOptions,
    counters: Arc<Counters>,
    /// The capture's count of queued bytes, given back as lines are taken.
    queued: Arc<AtomicU64>,
    salt: [u8; 16],
    open: Option<Open>,
    closed: u64,
}

impl Writer {
    fn run(mut self, rx: Receiver<Message>) {
        let mut flushed = std::time::Instant::now();
        loop {
            match rx.recv_timeout(FLUSH_EVERY) {
                Ok(Message::Line(taken)) => {
                    self.queued.fetch_sub(taken.queued_bytes, Ordering::Relaxed);
                    self.write(&taken);
                    // Under steady traffic too, lines reach the file system every second.
                    if flushed.elapsed() >= FLUSH_EVERY {
                        self.flush();
                        flushed = std::time::Instant::now();
                    }
                }
                Ok(Message::Rotate(ack)) => {
                    self.close();
                    let _ = ack.send(());
                }
                // Idle: what is written so far reaches the file system.
                Err(RecvTimeoutError::Timeout) => {
                    self.flush();
                    flushed = std::time::Instant::now();
                }
                Err(RecvTimeoutError::Disconnected) => {
                    self.close();
                    return;
                }
            }
        }
    }

    fn write(&mut self, taken: &Taken) {
        let mut line = match serde_json::to_vec(&self.line(taken)) {
            Ok(line) => line,
            Err(_) => return self.lose(1),
        };
        if line.len() > self.options.line_bytes {
            self.counters.dropped_too_long.fetch_add(1, Ordering::Relaxed);
            return;
        }
        line.push(b'\n');
        if self.open.is_none() {
            match File::create(self.options.dir.join(PARTIAL_FILE)) {
                Ok(file) => {
                    let encoder = GzEncoder::new(BufWriter::new(file), Compression::fast());
                    self.open = Some(Open { encoder, bytes: 0, unflushed: 0 });
                }
                Err(e) => {
                    tracing::warn!("capture: cannot open {}: {e}", self.options.dir.join(PARTIAL_FILE).display());
                    return self.lose(1);
                }
            }
        }
        let Some(open) = self.open.as_mut() else { return };
        if let Err(e) = open.encoder.write_all(&line) {
            tracing::warn!("capture: writing {}: {e}", self.options.dir.display());
            let lost = open.unflushed + 1;
            self.open = None;
            return self.lose(lost);
        }
        open.bytes += line.len() as u64;
        open.unflushed += 1;
        if open.bytes >= self.options.file_bytes {
            self.close();
        }
    }

    /// Counts `n` lines lost to a failed write.
    fn lose(&self, n: u64) {
        self.counters.lost_write_failed.fetch_add(n, Ordering::Relaxed);
    }

    fn flush(&mut self) {
        let Some(open) = self.open.as_mut() else { return };
        if open.unflushed == 0 {
            return;
        }
        match open.encoder.flush() {
            Ok(()) => {
                self.counters.written.fetch_add(open.unflushed, Ordering::Relaxed);
                open.unflushed = 0;
            }
            Err(e) => {
                tracing::warn!("capture: writing {}: {e}", self.options.dir.display());
                let lost = open.unflushed;
                self.open = None;
                self.lose(lost);
            }
        }
    }

    /// Finishes the file being written, renames it as closed, and deletes
    /// the oldest closed files beyond the number kept.
    fn close(&mut self) {
        let Some(open) = self.open.take() else { return };
        let finished = open.encoder.finish().and_then(|mut w| w.flush().map(|()| w));
        match finished {
            Ok(_) => {
                self.counters.written.fetch_add(open.unflushed, Ordering::Relaxed);
                self.closed += 1;
                let to = closed_name(&self.options.dir, self.closed, "");
                if let Err(e) = std::fs::rename(self.options.dir.join(PARTIAL_FILE), &to) {
                    tracing::warn!("capture: cannot rename to {}: {e}", to.display());
                }
                self.counters.files.fetch_add(1, Ordering::Relaxed);
                self.prune();
            }
            Err(e) => {
                tracing::warn!("capture: finishing a file in {}: {e}", self.options.dir.display());
                self.lose(open.unflushed);
            }
        }
    }

    fn prune(&self) {
        let Ok(entries) = std::fs::read_dir(&self.options.dir) else { return };
        let mut closed: Vec<PathBuf> = entries
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| {
                p.file_name()
                    .and_then(|n| n.to_str())
                    .is_some_and(|n| n.starts_with("capture-") && n.ends_with(".ndjson.gz"))
            })
            .collect();
        closed.sort();
        let excess = closed.len().saturating_sub(self.options.keep_files.max(1));
        for old in &closed[..excess] {
            let _ = std::fs::remove_file(old);
        }
    }

    /// The line of a sampled request, private keys and features treated.
    fn line<'a>(&self, t: &'a Taken) -> Line<'a> {
        let private = t.private.as_deref();
        let treat = |name: &str, value: &Value| -> Option<Value> {
            match private.and_then(|p| p.get(name)) {
                None => Some(value.clone()),
                Some(Privacy::Drop) => None,
                Some(Privacy::Hash) => Some(Value::Label(self.hash(name, &value.to_string()))),
            }
        };
        let context = t
            .context
            .iter()
            .filter_map(|(k, v)| {
                treat(k, &Value::Label(v.clone())).map(|v| match v {
                    Value::Label(text) => (k.clone(), text),
                    other => (k.clone(), other.to_string()),
                })
            })
            .collect();
        let rows = if private.is_some_and(|p| !p.is_empty()) {
            t.rows
                .iter()
                .map(|row| {
                    let mut kept = Row::with_capacity(row.fields().len());
                    for (name, value) in row.fields() {
                        if let Some(v) = treat(name, value) {
                            kept.set(name, v);
                        }
                    }
                    kept
                })
                .collect()
        } else {
            t.rows.clone()
        };
        let private = private
            .map(|p| {
                p.iter()
                    .map(|(name, what)| (name.as_str(), if *what == Privacy::Hash { "hashed" } else { "dropped" }))
                    .collect()
            })
            .unwrap_or_default();
        Line {
            model: &t.model,
            context,
            at: t.at.to_string(),
            rows,
            captured: Captured {
                version: t.version.to_string(),
                digest: t.digest.to_string(),
                outputs: &t.outputs,
                answers: &t.answers,
                private,
            },
        }
    }

    /// `sha256:` and the first 16 bytes of SHA-256(salt, name, 0, value), in hex.
    fn hash(&self, name: &str, value: &str) -> String {
        let mut h = Sha256::new();
        h.update(self.salt);
        h.update(name.as_bytes());
        h.update([0]);
        h.update(value.as_bytes());
        let digest = h.finalize();
        let hex: String = digest[..16].iter().map(|b| format!("{b:02x}")).collect();
        format!("sha256:{hex}")
    }
}

/// One captured line.
#[derive(Serialize)]
struct Line<'a> {
    model: &'a str,
    context: BTreeMap<String, String>,
    at: String,
    rows: Vec<Row>,
    captured: Captured<'a>,
}

/// What the host answered, and what capture left out.
#[derive(Serialize)]
struct Captured<'a> {
    version: String,
    digest: String,
    outputs: &'a [String],
    answers: &'a [Option<Vec<f64>>],
    /// Each private name of the plan: `dropped` or `hashed`.
    #[serde(skip_serializing_if = "BTreeMap::is_empty")]
    private: BTreeMap<&'a str, &'static str>,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The estimate a line is queued by is never below the line written,
    /// so the byte bound holds: labels, numbers, flags, absent answers,
    /// private names.
    #[test]
    fn a_lines_estimate_is_at_least_its_length() {
        let row = Row::new()
            .with("charger_kw", -1.234_567_890_123_456_7e-300)
            .with("plug", "ccs2 \"quoted\"")
            .with("fleet", true)
            .with("hour", i64::MIN);
        let taken = Taken {
            model: "charge-minutes".into(),
            context: [("site".to_owned(), "north-1".to_owned())].into(),
            at: Timestamp::now(),
            rows: vec![row.clone(), row],
            version: Version::new(1, 2, 3),
            digest: Digest::of(b"x"),
            outputs: Arc::from(vec!["minutes".to_owned(), "p".to_owned()]),
            answers: vec![Some(vec![-1.234_567_890_123_456_7e-300, 2.0]), None],
            private: Some(Arc::new([("site".to_owned(), Privacy::Hash)].into())),
            queued_bytes: 0,
        };
        let dir = tempfile::tempdir().unwrap();
        let writer = Writer {
            options: CaptureOptions::new(dir.path()),
            counters: Arc::default(),
            queued: Arc::default(),
            salt: [7; 16],
            open: None,
            closed: 0,
        };
        let written = serde_json::to_vec(&writer.line(&taken)).unwrap().len() as u64;
        assert!(taken.estimated_bytes() >= written, "{} < {written}", taken.estimated_bytes());
    }
}
