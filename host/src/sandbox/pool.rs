//! Warm instances kept for reuse, with thread affinity.
//!
//! A fixed row of slots, each holding at most one idle instance. A thread
//! starts looking at "its" slot (by a per-thread number), so it usually gets
//! back the instance it used last, still warm in its core's cache, and two
//! threads rarely touch the same lock. Slots are only ever `try_lock`ed: a
//! busy slot is skipped, never waited on.

use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};

/// Idle values of type `T`, at most one per slot.
pub(crate) struct Pool<T> {
    slots: Box<[Slot<T>]>,
}

/// One slot, alone on its cache lines (128 bytes: a line pair, which
/// x86-64 prefetches together), so threads on their own slots never
/// contend for a line.
#[repr(align(128))]
struct Slot<T>(Mutex<Option<T>>);

/// A small number unique to the calling thread, for spreading threads over slots.
pub fn home() -> usize {
    static NEXT: AtomicUsize = AtomicUsize::new(0);
    thread_local!(static HOME: usize = NEXT.fetch_add(1, Ordering::Relaxed));
    HOME.with(|h| *h)
}

impl<T> Pool<T> {
    /// A pool with `slots` slots (at least one).
    pub(crate) fn new(slots: usize) -> Self {
        Pool { slots: (0..slots.max(1)).map(|_| Slot(Mutex::new(None))).collect() }
    }

    fn probe(&self) -> impl Iterator<Item = &Mutex<Option<T>>> {
        let start = home() % self.slots.len();
        self.slots[start..].iter().chain(&self.slots[..start]).map(|slot| &slot.0)
    }

    /// Takes an idle value, looking at this thread's slot first.
    pub(crate) fn take(&self) -> Option<T> {
        self.probe().find_map(|slot| slot.try_lock().ok().and_then(|mut s| s.take()))
    }

    /// Puts a value back in the first free slot from this thread's own;
    /// drops it when every slot is full or busy.
    pub(crate) fn put(&self, value: T) {
        let mut value = Some(value);
        for slot in self.probe() {
            if let Ok(mut s) = slot.try_lock()
                && s.is_none()
            {
                *s = value.take();
                return;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_thread_gets_back_what_it_put() {
        let pool = Pool::new(4);
        pool.put(1);
        pool.put(2);
        let mut got = vec![pool.take().unwrap(), pool.take().unwrap()];
        got.sort();
        assert_eq!(got, vec![1, 2]);
        assert_eq!(pool.take(), None);
    }

    #[test]
    fn a_full_pool_drops_the_extra() {
        let pool = Pool::new(1);
        pool.put("a");
        pool.put("b");
        assert_eq!(pool.take(), Some("a"));
        assert_eq!(pool.take(), None);
    }
}
