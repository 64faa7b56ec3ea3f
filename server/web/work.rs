//! Where page computations run, so that a room full of people gets answers:
//!
//! - **Cached first.** A page result already computed for the same project revision and
//!   normalised settings is answered at once, on the request's own task.
//! - **Light work** (the overview, a model fit, a balance table) runs on tokio's blocking
//!   pool, as before.
//! - **Heavy work** (the planner's bootstrap, the impact view, the report, the sensitivity
//!   grid) runs on one rayon pool with a thread per core, behind an admission count: at most
//!   [`HEAVY_QUEUE`] computations wait for a thread, and a request beyond that gets
//!   503 with `Retry-After` instead of piling up. Parallel loops inside an analysis run on
//!   the same pool, so heavy work can never take more than the cores it was given and
//!   light pages still answer while it runs.
//! - **Abandoned work is skipped.** A heavy computation whose requests have all gone (the
//!   client closed the tab) before a thread was free is not started.
//! - **Nobody waits forever.** A request whose heavy result is not ready after
//!   [`PATIENCE`] gets a short "still computing" answer that reloads itself; the
//!   computation goes on and lands in the cache, where the reload finds it.

use std::collections::HashMap;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

use std::time::Duration;
use tokio::sync::watch;

use crate::analysis::cache::{CacheKey, ResultCache};

/// Computations allowed to wait for a heavy thread, beyond those running.
pub const HEAVY_QUEUE: usize = 32;

/// How long a request waits for heavy work before being told to come back.
pub const PATIENCE: Duration = Duration::from_secs(20);

/// Where a computation runs (see the module comment).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Lane {
    Light,
    Heavy,
}

/// What a computation here gives: a result the cache keeps (as JSON-sized) and hands
/// out again, cloned, to every request for it, on whichever thread.
pub trait CachedResult: Clone + serde::Serialize + Send + Sync + 'static {}

impl<T: Clone + serde::Serialize + Send + Sync + 'static> CachedResult for T {}

/// Why a computation did not give a result.
#[derive(Debug)]
pub enum WorkError<E> {
    /// The analysis itself failed.
    Failed(E),
    /// Every heavy thread is busy and the queue is full.
    Busy { retry_after_seconds: u64 },
    /// Still computing after [`PATIENCE`]; ask again shortly.
    StillComputing { retry_after_seconds: u64 },
    /// The computation panicked or its thread was lost.
    Lost(String),
}

pub struct WorkPool {
    heavy: rayon::ThreadPool,
    threads: usize,
    /// Heavy computations admitted and not yet finished (running or waiting).
    admitted: Arc<AtomicUsize>,
    /// Keys admitted and not finished, each with a signal sent when it is done: identical
    /// requests wait for that one computation instead of queueing their own.
    pending: Arc<Mutex<HashMap<CacheKey, watch::Receiver<bool>>>>,
}

impl WorkPool {
    pub fn new() -> Self {
        let threads = std::thread::available_parallelism()
            .map(|n| n.get())
            .unwrap_or(2);
        let heavy = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .thread_name(|i| format!("gapwise-heavy-{i}"))
            .build()
            .unwrap_or_else(|_| {
                // Building a pool fails only when threads cannot be created at all; a
                // single-thread pool is the last resort.
                rayon::ThreadPoolBuilder::new()
                    .num_threads(1)
                    .build()
                    .expect("the operating system cannot start a thread")
            });
        WorkPool {
            heavy,
            threads,
            admitted: Arc::new(AtomicUsize::new(0)),
            pending: Arc::new(Mutex::new(HashMap::new())),
        }
    }

    /// Heavy computations running or waiting now.
    pub fn heavy_in_flight(&self) -> usize {
        self.admitted.load(Ordering::SeqCst)
    }

    /// Runs `compute` through the cache: answered at once when the result is ready, else
    /// on the blocking pool (light) or on the heavy pool with admission control (heavy).
    pub async fn run<T: CachedResult, E: Send + 'static>(
        &self,
        lane: Lane,
        cache: &Arc<ResultCache>,
        key: Option<CacheKey>,
        compute: impl FnOnce() -> Result<T, E> + Send + 'static,
    ) -> Result<T, WorkError<E>> {
        if let Some(hit) = key.as_ref().and_then(|k| cache.peek::<T>(k)) {
            return Ok((*hit).clone());
        }
        match lane {
            Lane::Light => {
                let cache = Arc::clone(cache);
                tokio::task::spawn_blocking(move || through_cache(&cache, key.as_ref(), compute))
                    .await
                    .map_err(|e| WorkError::Lost(e.to_string()))?
                    .map_err(WorkError::Failed)
            }
            Lane::Heavy => self.heavy(cache, key, compute).await,
        }
    }

    async fn heavy<T: CachedResult, E: Send + 'static>(
        &self,
        cache: &Arc<ResultCache>,
        key: Option<CacheKey>,
        compute: impl FnOnce() -> Result<T, E> + Send + 'static,
    ) -> Result<T, WorkError<E>> {
        // The same result is already admitted: wait for it instead of queueing another.
        let queued = key.as_ref().and_then(|k| {
            self.pending
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner)
                .get(k)
                .cloned()
        });
        if let (Some(mut done), Some(k)) = (queued, key.as_ref()) {
            let finished = tokio::time::timeout(PATIENCE, done.wait_for(|d| *d)).await;
            if finished.is_err() {
                return Err(WorkError::StillComputing {
                    retry_after_seconds: 3,
                });
            }
            if let Some(hit) = cache.peek::<T>(k) {
                return Ok((*hit).clone());
            }
            // It failed or was abandoned: compute it here (admitted like any other).
        }
        let limit = self.threads + HEAVY_QUEUE;
        if self
            .admitted
            .fetch_update(Ordering::SeqCst, Ordering::SeqCst, |n| {
                (n < limit).then_some(n + 1)
            })
            .is_err()
        {
            return Err(WorkError::Busy {
                retry_after_seconds: 5,
            });
        }
        let (sender, receiver) = tokio::sync::oneshot::channel();
        let (done_sender, done_receiver) = watch::channel(false);
        if let Some(k) = &key {
            self.pending
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner)
                .insert(k.clone(), done_receiver);
        }
        let pending = Arc::clone(&self.pending);
        let pending_key = key.clone();
        let abandoned = Arc::new(AtomicBool::new(false));
        let admitted = Arc::clone(&self.admitted);
        let job_abandoned = Arc::clone(&abandoned);
        let cache = Arc::clone(cache);
        self.heavy.spawn(move || {
            let _release = Release(admitted);
            let _signal = Finished {
                pending,
                key: pending_key,
                done: done_sender,
            };
            if job_abandoned.load(Ordering::SeqCst) {
                return;
            }
            let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                through_cache(&cache, key.as_ref(), compute)
            }));
            let _ = sender.send(outcome);
        });
        // Dropped with the request (client gone) before the result came: mark abandoned.
        let mut watch = AbandonOnDrop(Some(abandoned));
        match tokio::time::timeout(PATIENCE, receiver).await {
            Ok(Ok(Ok(result))) => {
                watch.0 = None;
                result.map_err(WorkError::Failed)
            }
            Ok(Ok(Err(panic))) => {
                watch.0 = None;
                Err(WorkError::Lost(panic_message(&panic)))
            }
            Ok(Err(_)) => {
                watch.0 = None;
                Err(WorkError::Lost("the computation was dropped".into()))
            }
            Err(_) => {
                // Keep computing: the result lands in the cache for the reload.
                watch.0 = None;
                Err(WorkError::StillComputing {
                    retry_after_seconds: 3,
                })
            }
        }
    }
}

impl Default for WorkPool {
    fn default() -> Self {
        WorkPool::new()
    }
}

fn through_cache<T: CachedResult, E>(
    cache: &ResultCache,
    key: Option<&CacheKey>,
    compute: impl FnOnce() -> Result<T, E>,
) -> Result<T, E> {
    match key {
        Some(k) => cache.get_or_compute(k, compute).map(|v| (*v).clone()),
        None => compute(),
    }
}

struct Release(Arc<AtomicUsize>);

impl Drop for Release {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Ordering::SeqCst);
    }
}

/// Tells the requests waiting for the same key that the computation is over (whatever
/// its outcome), and forgets the key.
struct Finished {
    pending: Arc<Mutex<HashMap<CacheKey, watch::Receiver<bool>>>>,
    key: Option<CacheKey>,
    done: watch::Sender<bool>,
}

impl Drop for Finished {
    fn drop(&mut self) {
        if let Some(k) = &self.key {
            self.pending
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner)
                .remove(k);
        }
        let _ = self.done.send(true);
    }
}

struct AbandonOnDrop(Option<Arc<AtomicBool>>);

impl Drop for AbandonOnDrop {
    fn drop(&mut self) {
        if let Some(flag) = self.0.take() {
            flag.store(true, Ordering::SeqCst);
        }
    }
}

fn panic_message(panic: &Box<dyn std::any::Any + Send>) -> String {
    panic
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| panic.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "the computation panicked".into())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn busy_beyond_the_queue_and_abandoned_work_skipped() {
        let pool = Arc::new(WorkPool::new());
        let cache = Arc::new(ResultCache::default());
        let started = Arc::new(AtomicUsize::new(0));
        let limit = pool.threads + HEAVY_QUEUE;
        // Fill every thread and the queue with slow, distinct computations.
        let mut handles = Vec::new();
        for i in 0..limit {
            let (pool, cache, started) =
                (Arc::clone(&pool), Arc::clone(&cache), Arc::clone(&started));
            handles.push(tokio::spawn(async move {
                pool.heavy(
                    &cache,
                    Some(CacheKey::new(1, "slow", i.to_string())),
                    move || {
                        started.fetch_add(1, Ordering::SeqCst);
                        std::thread::sleep(Duration::from_millis(300));
                        Ok::<_, ()>(i)
                    },
                )
                .await
            }));
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
        assert_eq!(pool.heavy_in_flight(), limit);
        let refused = pool
            .heavy(&cache, Some(CacheKey::new(1, "slow", "x")), || {
                Ok::<_, ()>(0)
            })
            .await;
        assert!(
            matches!(refused, Err(WorkError::Busy { .. })),
            "{refused:?}"
        );
        // Give up on every request: those still waiting for a thread must not start.
        for h in &handles {
            h.abort();
        }
        for h in handles {
            let _ = h.await;
        }
        tokio::time::sleep(Duration::from_millis(700)).await;
        assert_eq!(started.load(Ordering::SeqCst), pool.threads);
        assert_eq!(pool.heavy_in_flight(), 0);
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn identical_requests_share_one_admission() {
        let pool = Arc::new(WorkPool::new());
        let cache = Arc::new(ResultCache::default());
        let runs = Arc::new(AtomicUsize::new(0));
        let many = 3 * (pool.threads + HEAVY_QUEUE);
        let handles: Vec<_> = (0..many)
            .map(|_| {
                let (pool, cache, runs) =
                    (Arc::clone(&pool), Arc::clone(&cache), Arc::clone(&runs));
                tokio::spawn(async move {
                    pool.run(
                        Lane::Heavy,
                        &cache,
                        Some(CacheKey::new(1, "same", "")),
                        move || {
                            runs.fetch_add(1, Ordering::SeqCst);
                            std::thread::sleep(Duration::from_millis(200));
                            Ok::<_, ()>(5u8)
                        },
                    )
                    .await
                })
            })
            .collect();
        for h in handles {
            assert!(matches!(h.await.expect("task"), Ok(5)));
        }
        assert!(
            runs.load(Ordering::SeqCst) <= 2,
            "{}",
            runs.load(Ordering::SeqCst)
        );
    }
}
