//! Explicit parallelism.
//!
//! Every core routine takes a [`Par`]. With [`Par::Rayon`] it uses the Rayon
//! pool it is running in (the binding layer installs the crate's own pool);
//! with [`Par::Seq`] it stays on the calling thread. The split of the work never
//! depends on the number of threads, so results are bit-identical either way.

use rayon::prelude::*;
use std::sync::atomic::{AtomicUsize, Ordering};
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
    /// 2. once the value `x` into item `i` is known, `link(&p, x)`, the value
    ///    into item `i + 1`, is published at once (the only serial part,
    ///    meant to be cheap);
    /// 3. `finish(scratch, i, p, x, ahead)` completes item `i` (in parallel).
    ///
    /// A worker claims its next item `j` before it finishes item `i`, and
    /// hands it to `finish(scratch, i, p, x, Some(j))`, which may do
    /// `prepare(j)`'s work in the same pass over memory and return its
    /// result (`None` leaves `j` to be prepared as usual). That result must
    /// be exactly what `prepare(scratch, j)` returns; `Some(j)` is given
    /// only while nobody has prepared `j` yet.
    ///
    /// Workers claim items in order, so an item normally waits only briefly,
    /// for the item claimed just before it. The values obey the fixed
    /// recurrence `x[i + 1] = link(prepare(i), x[i])`, and `prepare` must be a
    /// pure function of `i` (scratch is only a work area), so every value is
    /// the same whoever computes it: a worker that has waited longer than an
    /// item's own work should take (the one before it was descheduled, on a
    /// busy machine) computes the missing `prepare` results and values
    /// itself instead of waiting a whole time slice. Results therefore do not
    /// depend on the number of workers or on timing. An item's data is
    /// touched by `prepare` and `finish` on one worker, close together, while
    /// it is still in that core's cache. A panic in `prepare` is met again by
    /// whichever worker steps in for that item, so it propagates instead of
    /// leaving others waiting.
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
        P: Copy + Send + Sync,
        I: Fn() -> S + Sync + Send,
        Pr: Fn(&mut S, usize) -> P + Sync + Send,
        L: Fn(&P, T) -> T + Sync + Send,
        Fi: Fn(&mut S, usize, P, T, Option<usize>) -> Option<P> + Sync + Send,
    {
        if n == 0 {
            return;
        }
        let relay = Relay {
            first,
            next: AtomicUsize::new(0),
            prepared: (0..n).map(|_| OnceLock::new()).collect(),
            values: (0..n).map(|_| OnceLock::new()).collect(),
        };
        let _ = relay.values[0].set(first);
        let worker = || {
            let mut scratch = init();
            let mut held = relay.claim();
            while let Some(i) = held {
                let p = relay.prepared(i, &mut scratch, &prepare);
                let x = relay.value(i, &mut scratch, &prepare, &link);
                if i + 1 < n {
                    let _ = relay.values[i + 1].set(link(&p, x));
                }
                // Claimed now, so this worker's `finish(i)` may prepare it.
                held = relay.claim();
                let ahead = held.filter(|&j| relay.prepared[j].get().is_none());
                if let (Some(j), Some(pj)) = (ahead, finish(&mut scratch, i, p, x, ahead)) {
                    let _ = relay.prepared[j].set(pj);
                }
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

/// How long a chain item waits for the value into it before computing it
/// itself: well above the `prepare` of one item (a few to tens of
/// microseconds for the kernels' blocks), well below an OS time slice.
const CHAIN_PATIENCE: std::time::Duration = std::time::Duration::from_micros(200);

/// The shared state of one [`Par::chain`]: the next item to claim, each
/// item's `prepare` result once known, and the value into each item.
struct Relay<T, P> {
    first: T,
    next: AtomicUsize,
    prepared: Vec<OnceLock<P>>,
    values: Vec<OnceLock<T>>,
}

impl<T: Copy, P: Copy> Relay<T, P> {
    /// The next unclaimed item, if any.
    fn claim(&self) -> Option<usize> {
        let i = self.next.fetch_add(1, Ordering::Relaxed);
        (i < self.values.len()).then_some(i)
    }

    /// Item `k`'s `prepare` result: published if some worker has it, else
    /// computed here and published (a second computation gives the same).
    fn prepared<S>(&self, k: usize, scratch: &mut S, prepare: &impl Fn(&mut S, usize) -> P) -> P {
        if let Some(&p) = self.prepared[k].get() {
            return p;
        }
        let p = prepare(scratch, k);
        let _ = self.prepared[k].set(p);
        p
    }

    /// The value into item `i`. Waits for the worker of item `i - 1`, and
    /// past [`CHAIN_PATIENCE`] computes it from the last value known,
    /// preparing the items in between where their results are not published.
    /// `OnceLock` orders every publication before the reads that see it.
    fn value<S>(
        &self,
        i: usize,
        scratch: &mut S,
        prepare: &impl Fn(&mut S, usize) -> P,
        link: &impl Fn(&P, T) -> T,
    ) -> T {
        let mut spins = 0u32;
        let mut since: Option<std::time::Instant> = None;
        loop {
            if let Some(&x) = self.values[i].get() {
                return x;
            }
            spins += 1;
            if spins % 64 != 0 {
                std::hint::spin_loop();
                continue;
            }
            let started = *since.get_or_insert_with(std::time::Instant::now);
            if started.elapsed() < CHAIN_PATIENCE {
                std::thread::yield_now();
                continue;
            }
            // Step in: from the last known value, forward to item i.
            let (j, mut x) = (0..i)
                .rev()
                .find_map(|j| self.values[j].get().map(|&x| (j, x)))
                .unwrap_or((0, self.first));
            for k in j..i {
                let p = self.prepared(k, scratch, prepare);
                x = link(&p, x);
                // Whoever publishes first, the value is the same.
                x = *self.values[k + 1].get_or_init(|| x);
            }
            return x;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Mutex;

    /// A prefix sum as a chain: item i passes `x + i`, and records what it
    /// got; with `fuse`, `finish` also prepares the item claimed ahead.
    /// Returns the values and how many items `prepare` itself ran for.
    fn prefix(par: Par, n: usize, fuse: bool) -> (Vec<u64>, usize) {
        let got = Mutex::new(vec![u64::MAX; n]);
        let alone = AtomicUsize::new(0);
        par.chain(
            n,
            0u64,
            || (),
            |_, i| {
                alone.fetch_add(1, Ordering::Relaxed);
                i as u64
            },
            |&p, x| x + p,
            |_, i, p, x, ahead| {
                assert_eq!(p, i as u64);
                got.lock().unwrap()[i] = x;
                ahead.filter(|_| fuse).map(|j| j as u64)
            },
        );
        (got.into_inner().unwrap(), alone.into_inner())
    }

    #[test]
    fn chain_passes_every_value_in_order_for_any_worker_count() {
        for n in [0usize, 1, 2, 3, 17, 1000] {
            let want: Vec<u64> = (0..n as u64).map(|i| i * i.saturating_sub(1) / 2).collect();
            for fuse in [false, true] {
                let (got, alone) = prefix(Par::Seq, n, fuse);
                assert_eq!(got, want);
                // One worker prepares only item 0 itself when finish fuses.
                assert_eq!(alone, if fuse { n.min(1) } else { n });
                for threads in [1, 2, 3, 8] {
                    let pool = rayon::ThreadPoolBuilder::new()
                        .num_threads(threads)
                        .build()
                        .unwrap();
                    assert_eq!(
                        pool.install(|| prefix(Par::Rayon, n, fuse)).0,
                        want,
                        "threads={threads} fuse={fuse}"
                    );
                }
            }
        }
    }

    #[test]
    fn a_panicking_item_is_raised_instead_of_hanging_the_chain() {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(4)
            .build()
            .unwrap();
        for fuse in [false, true] {
            for bad in [0usize, 1, 5, 39] {
                let finished = AtomicUsize::new(0);
                let prep = |i: usize| {
                    if i == bad {
                        panic!("item {i}");
                    }
                };
                let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    pool.install(|| {
                        Par::Rayon.chain(
                            40,
                            0u32,
                            || (),
                            |_, i| prep(i),
                            |_, x| x + 1,
                            |_, _, _, _, ahead| {
                                let pj = ahead.filter(|_| fuse).map(prep);
                                finished.fetch_add(1, Ordering::Relaxed);
                                pj
                            },
                        )
                    })
                }));
                assert!(r.is_err(), "the panic is re-raised (fuse={fuse})");
                assert!(
                    finished.into_inner() <= bad,
                    "no item after the broken one ran (fuse={fuse})"
                );
            }
        }
    }

    /// Item 3's worker stalls in `prepare` (or, fused, in the `finish` that
    /// prepares item 3 ahead) until item 6 has finished, which only happens
    /// if another worker steps in for item 3: without that, the chain would
    /// wait for it (here for up to 20 s, then fail).
    #[test]
    fn a_stalled_item_is_stepped_over_with_the_same_values() {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(2)
            .build()
            .unwrap();
        for fuse in [false, true] {
            let n = 10;
            let done6 = std::sync::atomic::AtomicBool::new(false);
            let calls3 = AtomicUsize::new(0);
            let saw_done6 = std::sync::atomic::AtomicBool::new(false);
            let got = Mutex::new(vec![u64::MAX; n]);
            let prep = |i: usize| {
                if i == 3 && calls3.fetch_add(1, Ordering::SeqCst) == 0 {
                    let t0 = std::time::Instant::now();
                    while !done6.load(Ordering::SeqCst)
                        && t0.elapsed() < std::time::Duration::from_secs(20)
                    {
                        std::thread::sleep(std::time::Duration::from_millis(1));
                    }
                    saw_done6.store(done6.load(Ordering::SeqCst), Ordering::SeqCst);
                }
                i as u64
            };
            pool.install(|| {
                Par::Rayon.chain(
                    n,
                    0u64,
                    || (),
                    |_, i| prep(i),
                    |&p, x| x + p,
                    |_, i, _, x, ahead| {
                        got.lock().unwrap()[i] = x;
                        if i == 6 {
                            done6.store(true, Ordering::SeqCst);
                        }
                        ahead.filter(|_| fuse).map(prep)
                    },
                )
            });
            assert!(
                saw_done6.into_inner(),
                "another worker stepped in for item 3 (fuse={fuse})"
            );
            assert_eq!(
                calls3.into_inner(),
                2,
                "item 3 prepared by its worker and the helper (fuse={fuse})"
            );
            let want: Vec<u64> = (0..n as u64).map(|i| i * i.saturating_sub(1) / 2).collect();
            assert_eq!(got.into_inner().unwrap(), want, "fuse={fuse}");
        }
    }
}
