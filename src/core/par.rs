//! Explicit parallelism.
//!
//! Every core routine takes a [`Par`]. With [`Par::Rayon`] it uses the Rayon
//! pool it is running in (the binding layer installs the crate's own pool);
//! with [`Par::Seq`] it stays on the calling thread. The split of the work never
//! depends on the number of threads, so results are bit-identical either way.

use rayon::prelude::*;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::OnceLock;

/// Below this many elements of work a kernel stays on the calling thread:
/// waking the pool costs more than it saves.
pub const PAR_MIN_WORK: usize = 1 << 15;

/// How a core routine may run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Par {
    /// On the calling thread only.
    Seq,
    /// Split across the current Rayon pool.
    Rayon,
}

impl Par {
    /// `Rayon` when `work` elements justify waking the pool and `allowed`.
    pub fn for_work(work: usize, allowed: bool) -> Par {
        if allowed && work >= PAR_MIN_WORK {
            Par::Rayon
        } else {
            Par::Seq
        }
    }

    /// Run `f` on every item, in parallel or in order. The items are
    /// independent, so the order of execution never changes a result.
    pub fn for_each<T: Send, F: Fn(T) + Sync + Send>(self, items: Vec<T>, f: F) {
        match self {
            Par::Seq => items.into_iter().for_each(f),
            Par::Rayon => items.into_par_iter().for_each(f),
        }
    }

    /// [`Par::for_each`] with per-worker scratch made by `init` (reused across
    /// items, so hot loops do not allocate per item).
    pub fn for_each_init<T, S, I, F>(self, items: Vec<T>, init: I, f: F)
    where
        T: Send,
        I: Fn() -> S + Sync + Send,
        F: Fn(&mut S, T) + Sync + Send,
    {
        match self {
            Par::Seq => {
                let mut s = init();
                items.into_iter().for_each(|t| f(&mut s, t))
            }
            Par::Rayon => items.into_par_iter().for_each_init(init, f),
        }
    }

    /// [`Par::map`] with per-worker scratch made by `init`.
    pub fn map_init<T, S, R, I, F>(self, items: Vec<T>, init: I, f: F) -> Vec<R>
    where
        T: Send,
        R: Send,
        I: Fn() -> S + Sync + Send,
        F: Fn(&mut S, T) -> R + Sync + Send,
    {
        match self {
            Par::Seq => {
                let mut s = init();
                items.into_iter().map(|t| f(&mut s, t)).collect()
            }
            Par::Rayon => items.into_par_iter().map_init(init, f).collect(),
        }
    }

    /// A chain of `n` items where item `i` needs one value from item `i - 1`
    /// (the value into item 0 is `first`), in a single sweep:
    ///
    /// 1. `prepare(scratch, i)` does item `i`'s own work (in parallel);
    /// 2. once item `i - 1` has passed its value `x`, item `i` passes
    ///    `link(&p, x)` on at once (the only serial part, meant to be cheap);
    /// 3. `finish(scratch, i, p, x)` completes item `i` (in parallel).
    ///
    /// Workers claim items in order, so every item waits only for one claimed
    /// before it, by a worker that is already running it: the chain always
    /// progresses. `link` runs once per item, in item order, on the values it
    /// was given, so the values (and every result) are the same for any number
    /// of workers. An item's data is touched by `prepare` and `finish` on one
    /// worker, back to back, while it is still in that core's cache.
    ///
    /// A panic in `prepare` or `link` stops the waiting workers (they would
    /// otherwise wait for a value that never comes) and is then re-raised.
    pub fn chain<T, S, P, I, Pr, L, Fi>(
        self,
        n: usize,
        first: T,
        init: I,
        prepare: Pr,
        link: L,
        finish: Fi,
    ) where
        T: Copy + Send + Sync,
        I: Fn() -> S + Sync + Send,
        Pr: Fn(&mut S, usize) -> P + Sync + Send,
        L: Fn(&P, T) -> T + Sync + Send,
        Fi: Fn(&mut S, usize, P, T) + Sync + Send,
    {
        if n == 0 {
            return;
        }
        let relay = Relay {
            next: AtomicUsize::new(0),
            values: (0..n).map(|_| OnceLock::new()).collect(),
            broken: AtomicBool::new(false),
        };
        let _ = relay.values[0].set(first);
        let worker = || {
            let mut scratch = init();
            while let Some(i) = relay.claim() {
                // Until this item has passed its value on, an unwind from it
                // must release the workers waiting for that value.
                let guard = BreakOnUnwind(&relay.broken);
                let p = prepare(&mut scratch, i);
                let Some(x) = relay.wait(i) else {
                    std::mem::forget(guard);
                    return;
                };
                if i + 1 < n {
                    let _ = relay.values[i + 1].set(link(&p, x));
                }
                std::mem::forget(guard);
                finish(&mut scratch, i, p, x);
            }
        };
        match self {
            Par::Seq => worker(),
            Par::Rayon => {
                let workers = rayon::current_num_threads().clamp(1, n);
                (0..workers).into_par_iter().for_each(|_| worker());
            }
        }
    }

    /// Map every item, keeping the input order of results.
    pub fn map<T: Send, R: Send, F: Fn(T) -> R + Sync + Send>(self, items: Vec<T>, f: F) -> Vec<R> {
        match self {
            Par::Seq => items.into_iter().map(f).collect(),
            Par::Rayon => items.into_par_iter().map(f).collect(),
        }
    }
}

/// The shared state of one [`Par::chain`]: the next item to claim and the
/// value passed into each item.
struct Relay<T> {
    next: AtomicUsize,
    values: Vec<OnceLock<T>>,
    /// Set when an item unwound before passing its value on.
    broken: AtomicBool,
}

impl<T: Copy> Relay<T> {
    /// The next unclaimed item, if any.
    fn claim(&self) -> Option<usize> {
        let i = self.next.fetch_add(1, Ordering::Relaxed);
        (i < self.values.len()).then_some(i)
    }

    /// The value passed into item `i`, once item `i - 1` has passed it; `None`
    /// when the chain broke. `OnceLock` orders the write before this read.
    fn wait(&self, i: usize) -> Option<T> {
        let mut spins = 0u32;
        loop {
            if let Some(&x) = self.values[i].get() {
                return Some(x);
            }
            if self.broken.load(Ordering::Acquire) {
                return None;
            }
            // The item before is already being worked on: spin briefly, then
            // give the core away (it may be the one that worker needs).
            spins += 1;
            if spins < 256 {
                std::hint::spin_loop();
            } else {
                std::thread::yield_now();
            }
        }
    }
}

/// Marks a chain broken if dropped during an unwind (it is forgotten on the
/// normal path).
struct BreakOnUnwind<'a>(&'a AtomicBool);

impl Drop for BreakOnUnwind<'_> {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Release);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Mutex;

    /// A prefix sum as a chain: item i passes `x + i`, and records what it got.
    fn prefix(par: Par, n: usize) -> Vec<u64> {
        let got = Mutex::new(vec![u64::MAX; n]);
        par.chain(
            n,
            0u64,
            || (),
            |_, i| i as u64,
            |&p, x| x + p,
            |_, i, p, x| {
                assert_eq!(p, i as u64);
                got.lock().unwrap()[i] = x;
            },
        );
        got.into_inner().unwrap()
    }

    #[test]
    fn chain_passes_every_value_in_order_for_any_worker_count() {
        for n in [0usize, 1, 2, 3, 17, 1000] {
            let want: Vec<u64> = (0..n as u64).map(|i| i * i.saturating_sub(1) / 2).collect();
            assert_eq!(prefix(Par::Seq, n), want);
            for threads in [1, 2, 3, 8] {
                let pool = rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap();
                assert_eq!(
                    pool.install(|| prefix(Par::Rayon, n)),
                    want,
                    "threads={threads}"
                );
            }
        }
    }

    #[test]
    fn a_panicking_item_stops_the_chain_instead_of_hanging_it() {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(4)
            .build()
            .unwrap();
        for bad in [0usize, 1, 5, 39] {
            let finished = AtomicUsize::new(0);
            let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                pool.install(|| {
                    Par::Rayon.chain(
                        40,
                        0u32,
                        || (),
                        |_, i| {
                            if i == bad {
                                panic!("item {i}");
                            }
                        },
                        |_, x| x + 1,
                        |_, _, _, _| {
                            finished.fetch_add(1, Ordering::Relaxed);
                        },
                    )
                })
            }));
            assert!(r.is_err(), "the panic is re-raised");
            assert!(
                finished.into_inner() <= bad,
                "no item after the broken one ran"
            );
        }
    }
}
