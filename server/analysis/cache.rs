//! One cache of analysis results for the whole process, keyed by the project's revision,
//! the question asked and the normalised settings, so that a page, its JSON twin, its
//! downloads, the report and the command line never compute the same result twice.
//!
//! - **Bounded by memory.** Each result's size is estimated by the length of its JSON
//!   (counted, never written), and the least recently used results leave first once the
//!   total passes the budget.
//! - **One computation per key.** Requests that arrive while the same result is being
//!   computed wait for it instead of starting another computation (single flight); if the
//!   computation fails, the error is not kept and the next request tries again.
//! - **Invalidated by revision.** Every load of a project gets a new revision
//!   ([`crate::project::Project::revision`]); results of older revisions are never found
//!   again and age out.

use std::any::Any;
use std::collections::HashMap;
use std::sync::{Arc, Condvar, Mutex, MutexGuard};

use serde::Serialize;

/// What a result depends on: the project's revision, the question, the settings.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct CacheKey {
    pub revision: u64,
    pub question: &'static str,
    /// The normalised settings (a canonical query string).
    pub settings: String,
}

impl CacheKey {
    pub fn new(revision: u64, question: &'static str, settings: impl Into<String>) -> Self {
        CacheKey {
            revision,
            question,
            settings: settings.into(),
        }
    }
}

type Value = Arc<dyn Any + Send + Sync>;

/// A computation under way: its waiters block on the condition variable until `done`.
struct Flight {
    done: Mutex<bool>,
    signal: Condvar,
}

enum Slot {
    Ready {
        value: Value,
        bytes: usize,
        last_used: u64,
    },
    Computing(Arc<Flight>),
}

struct Inner {
    slots: HashMap<CacheKey, Slot>,
    used_bytes: usize,
    clock: u64,
    hits: u64,
    misses: u64,
}

/// Counters for benchmarks and tests.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct CacheStats {
    pub entries: usize,
    pub bytes: usize,
    pub hits: u64,
    pub misses: u64,
}

pub struct ResultCache {
    inner: Mutex<Inner>,
    budget_bytes: usize,
}

/// 256 MB of results by their JSON size: every page of several waves and settings of a
/// large project, far from the memory of a laptop.
pub const DEFAULT_BUDGET_BYTES: usize = 256 << 20;

impl Default for ResultCache {
    fn default() -> Self {
        ResultCache::new(DEFAULT_BUDGET_BYTES)
    }
}

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    // Every critical section below leaves the map consistent before anything can panic.
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

/// Removes a flight whose computation did not finish (error or panic) and wakes its
/// waiters, who then compute for themselves.
struct FlightGuard<'a> {
    cache: &'a ResultCache,
    key: &'a CacheKey,
    flight: Arc<Flight>,
    finished: bool,
}

impl Drop for FlightGuard<'_> {
    fn drop(&mut self) {
        if !self.finished {
            let mut inner = lock(&self.cache.inner);
            if matches!(inner.slots.get(self.key), Some(Slot::Computing(f)) if Arc::ptr_eq(f, &self.flight))
            {
                inner.slots.remove(self.key);
            }
        }
        *lock(&self.flight.done) = true;
        self.flight.signal.notify_all();
    }
}

impl ResultCache {
    pub fn new(budget_bytes: usize) -> Self {
        ResultCache {
            inner: Mutex::new(Inner {
                slots: HashMap::new(),
                used_bytes: 0,
                clock: 0,
                hits: 0,
                misses: 0,
            }),
            budget_bytes,
        }
    }

    /// The cached result for `key`, or the result of `compute` (stored when it succeeds).
    /// Concurrent callers with the same key share one computation, except on a rayon
    /// worker thread: there a caller whose key another caller is computing computes it
    /// too instead of waiting. A worker waiting inside a parallel loop runs other jobs on
    /// its own stack, so the computation it would wait for can sit below it on that stack
    /// (or need its thread), and blocking there deadlocks the pool; this happened under
    /// the load benchmark when two reports shared a plan. Identical page requests still
    /// share one computation: they wait outside the pool (`web::work`).
    pub fn get_or_compute<T, E>(
        &self,
        key: &CacheKey,
        compute: impl FnOnce() -> Result<T, E>,
    ) -> Result<Arc<T>, E>
    where
        T: Serialize + Send + Sync + 'static,
    {
        let ours = loop {
            // Look up and, when absent, claim the key in one critical section, so that
            // two callers can never both start the computation.
            let waiting = {
                let mut inner = lock(&self.inner);
                let found = match ready::<T>(&mut inner, key) {
                    Some(v) => Some(Ok(v)),
                    None => match inner.slots.get(key) {
                        Some(Slot::Computing(f)) => Some(Err(Arc::clone(f))),
                        _ => None,
                    },
                };
                match found {
                    Some(Ok(v)) => return Ok(v),
                    Some(Err(_)) if rayon::current_thread_index().is_some() => {
                        drop(inner);
                        return compute().map(Arc::new);
                    }
                    Some(Err(f)) => f,
                    None => {
                        inner.misses += 1;
                        if let Some(Slot::Ready { bytes, .. }) = inner.slots.remove(key) {
                            inner.used_bytes -= bytes;
                        }
                        let flight = Arc::new(Flight {
                            done: Mutex::new(false),
                            signal: Condvar::new(),
                        });
                        inner
                            .slots
                            .insert(key.clone(), Slot::Computing(Arc::clone(&flight)));
                        break flight;
                    }
                }
            };
            let mut done = lock(&waiting.done);
            while !*done {
                done = waiting
                    .signal
                    .wait(done)
                    .unwrap_or_else(std::sync::PoisonError::into_inner);
            }
            // Ready now, or the computation failed and its slot is gone: look again.
        };
        let mut guard = FlightGuard {
            cache: self,
            key,
            flight: ours,
            finished: false,
        };
        let value = Arc::new(compute()?);
        let bytes = json_size(&*value);
        {
            let mut inner = lock(&self.inner);
            inner.clock += 1;
            let now = inner.clock;
            inner.slots.insert(
                key.clone(),
                Slot::Ready {
                    value: Arc::clone(&value) as Value,
                    bytes,
                    last_used: now,
                },
            );
            inner.used_bytes += bytes;
            self.evict(&mut inner, key);
        }
        guard.finished = true;
        drop(guard);
        Ok(value)
    }

    /// Drops least recently used results until the total fits the budget (never `keep`,
    /// the result just stored, so that a single large result is still returned once).
    fn evict(&self, inner: &mut Inner, keep: &CacheKey) {
        while inner.used_bytes > self.budget_bytes {
            let oldest = inner
                .slots
                .iter()
                .filter(|(k, _)| *k != keep)
                .filter_map(|(k, s)| match s {
                    Slot::Ready { last_used, .. } => Some((*last_used, k.clone())),
                    Slot::Computing(_) => None,
                })
                .min_by_key(|(t, _)| *t);
            match oldest {
                Some((_, k)) => {
                    if let Some(Slot::Ready { bytes, .. }) = inner.slots.remove(&k) {
                        inner.used_bytes -= bytes;
                    }
                }
                None => break,
            }
        }
    }

    /// The result for `key` if it is ready now (never waits, never computes).
    pub fn peek<T: Send + Sync + 'static>(&self, key: &CacheKey) -> Option<Arc<T>> {
        ready(&mut lock(&self.inner), key)
    }

    /// Whether a computation of `key` is under way.
    pub fn is_computing(&self, key: &CacheKey) -> bool {
        matches!(lock(&self.inner).slots.get(key), Some(Slot::Computing(_)))
    }

    /// Forgets every result of revisions other than `revision` (after a reload).
    pub fn retain_revision(&self, revision: u64) {
        let mut inner = lock(&self.inner);
        let mut freed = 0;
        inner.slots.retain(|k, s| {
            let keep = k.revision == revision || matches!(s, Slot::Computing(_));
            if !keep {
                if let Slot::Ready { bytes, .. } = s {
                    freed += *bytes;
                }
            }
            keep
        });
        inner.used_bytes -= freed;
    }

    pub fn stats(&self) -> CacheStats {
        let inner = lock(&self.inner);
        CacheStats {
            entries: inner
                .slots
                .values()
                .filter(|s| matches!(s, Slot::Ready { .. }))
                .count(),
            bytes: inner.used_bytes,
            hits: inner.hits,
            misses: inner.misses,
        }
    }
}

/// The ready result for `key`, marked as just used and counted as a hit. A result of
/// another type under the same key (a programming error) counts as absent.
fn ready<T: Send + Sync + 'static>(inner: &mut Inner, key: &CacheKey) -> Option<Arc<T>> {
    inner.clock += 1;
    let now = inner.clock;
    let found = match inner.slots.get_mut(key) {
        Some(Slot::Ready {
            value, last_used, ..
        }) => {
            *last_used = now;
            Arc::clone(value).downcast::<T>().ok()
        }
        _ => None,
    };
    if found.is_some() {
        inner.hits += 1;
    }
    found
}

/// The length of a value's JSON, counted without writing it.
fn json_size<T: Serialize>(value: &T) -> usize {
    struct Count(usize);
    impl std::io::Write for Count {
        fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
            self.0 += buf.len();
            Ok(buf.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }
    let mut count = Count(0);
    // A value that cannot be written as JSON still takes memory; count it as small.
    let _ = serde_json::to_writer(&mut count, value);
    count.0.max(64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::{AtomicUsize, Ordering};

    /// A rayon worker asking for a key that is being computed lower on its own stack (as
    /// when a worker waiting in a parallel loop picks up another request's job that needs
    /// the same part) computes it instead of waiting for itself. Before, this waited
    /// forever; the channel's timeout turns a hang into a failure (common practice).
    #[test]
    fn a_worker_never_waits_for_a_computation_below_it() {
        let (sender, receiver) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(1)
                .build()
                .unwrap();
            let cache = ResultCache::default();
            let key = CacheKey::new(1, "plan", "a=1");
            let outer: Result<Arc<u32>, ()> = pool.install(|| {
                cache.get_or_compute(&key, || {
                    let inner: Result<Arc<u32>, ()> = cache.get_or_compute(&key, || Ok(7));
                    inner.map(|v| *v + 1)
                })
            });
            let _ = sender.send(outer.map(|v| *v));
        });
        let got = receiver
            .recv_timeout(std::time::Duration::from_secs(20))
            .expect("the worker waited for itself (deadlock)");
        assert_eq!(got, Ok(8));
    }

    #[test]
    fn computes_once_and_reuses() {
        let cache = ResultCache::default();
        let calls = AtomicUsize::new(0);
        let key = CacheKey::new(1, "q", "a=1");
        for _ in 0..3 {
            let v: Arc<Vec<u32>> = cache
                .get_or_compute(&key, || {
                    calls.fetch_add(1, Ordering::SeqCst);
                    Ok::<_, ()>(vec![1, 2, 3])
                })
                .unwrap();
            assert_eq!(*v, vec![1, 2, 3]);
        }
        assert_eq!(calls.load(Ordering::SeqCst), 1);
        let s = cache.stats();
        assert_eq!((s.hits, s.misses, s.entries), (2, 1, 1));
    }

    #[test]
    fn errors_are_not_kept_and_revisions_separate() {
        let cache = ResultCache::default();
        let key = CacheKey::new(1, "q", "");
        assert!(cache.get_or_compute(&key, || Err::<u8, _>("no")).is_err());
        assert_eq!(*cache.get_or_compute(&key, || Ok::<_, ()>(7u8)).unwrap(), 7);
        let newer = CacheKey::new(2, "q", "");
        assert_eq!(
            *cache.get_or_compute(&newer, || Ok::<_, ()>(8u8)).unwrap(),
            8
        );
        cache.retain_revision(2);
        assert_eq!(cache.stats().entries, 1);
    }

    #[test]
    fn least_recently_used_leaves_first() {
        // Each Vec<u8> of 100 zeros is 201 bytes of JSON; a budget of 500 keeps two.
        let cache = ResultCache::new(500);
        let key = |i: usize| CacheKey::new(1, "q", i.to_string());
        for i in 0..2 {
            cache
                .get_or_compute(&key(i), || Ok::<_, ()>(vec![0u8; 100]))
                .unwrap();
        }
        cache
            .get_or_compute(&key(0), || Ok::<_, ()>(vec![9u8; 100]))
            .unwrap(); // touch 0
        cache
            .get_or_compute(&key(2), || Ok::<_, ()>(vec![0u8; 100]))
            .unwrap(); // evicts 1
        let recomputed = AtomicUsize::new(0);
        let again = |i: usize| {
            cache
                .get_or_compute(&key(i), || {
                    recomputed.fetch_add(1, Ordering::SeqCst);
                    Ok::<_, ()>(vec![0u8; 100])
                })
                .unwrap();
        };
        again(0);
        assert_eq!(recomputed.load(Ordering::SeqCst), 0, "0 was used recently");
        again(1);
        assert_eq!(recomputed.load(Ordering::SeqCst), 1, "1 was the oldest");
        assert!(cache.stats().bytes <= 500);
    }

    #[test]
    fn concurrent_requests_share_one_computation() {
        let cache = Arc::new(ResultCache::default());
        let calls = Arc::new(AtomicUsize::new(0));
        let key = CacheKey::new(1, "slow", "");
        let handles: Vec<_> = (0..8)
            .map(|_| {
                let (cache, calls, key) = (Arc::clone(&cache), Arc::clone(&calls), key.clone());
                std::thread::spawn(move || {
                    *cache
                        .get_or_compute(&key, || {
                            calls.fetch_add(1, Ordering::SeqCst);
                            std::thread::sleep(std::time::Duration::from_millis(100));
                            Ok::<_, ()>(42u32)
                        })
                        .unwrap()
                })
            })
            .collect();
        for h in handles {
            assert_eq!(h.join().unwrap(), 42);
        }
        assert_eq!(calls.load(Ordering::SeqCst), 1);
    }
}
