//! Explicit parallelism.
//!
//! Every core routine takes a [`Par`]. With [`Par::Rayon`] it uses the Rayon
//! pool it is running in (the binding layer installs the crate's own pool);
//! with [`Par::Seq`] it stays on the calling thread. The split of the work never
//! depends on the number of threads, so results are bit-identical either way.

use rayon::prelude::*;

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

    /// Map every item, keeping the input order of results.
    pub fn map<T: Send, R: Send, F: Fn(T) -> R + Sync + Send>(self, items: Vec<T>, f: F) -> Vec<R> {
        match self {
            Par::Seq => items.into_iter().map(f).collect(),
            Par::Rayon => items.into_par_iter().map(f).collect(),
        }
    }
}
