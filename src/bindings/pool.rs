//! The crate's Rayon pool: its size comes from `set_num_threads`, else
//! `ROLLSCAN_NUM_THREADS`, else the number of CPUs. A forked child builds a
//! fresh pool (the parent's worker threads do not exist in it).

use crate::core::par::Par;
use pyo3::exceptions::PyValueError;
use pyo3::prelude::*;
use rayon::{ThreadPool, ThreadPoolBuilder};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

/// The requested size; 0 until set or first read.
static THREADS: AtomicUsize = AtomicUsize::new(0);
/// `(pid, size, pool)` of the pool built last.
static POOL: Mutex<Option<(u32, usize, Arc<ThreadPool>)>> = Mutex::new(None);

fn default_threads() -> usize {
    std::env::var("ROLLSCAN_NUM_THREADS")
        .ok()
        .and_then(|s| s.trim().parse::<usize>().ok())
        .filter(|&n| n > 0)
        .unwrap_or_else(|| {
            std::thread::available_parallelism()
                .map(|n| n.get())
                .unwrap_or(1)
        })
}

/// The configured number of threads.
pub(crate) fn num_threads() -> usize {
    match THREADS.load(Ordering::Relaxed) {
        0 => {
            let n = default_threads();
            THREADS.store(n, Ordering::Relaxed);
            n
        }
        n => n,
    }
}

/// The parallelism the core may use: Rayon when more than one thread.
pub(crate) fn par() -> Par {
    if num_threads() > 1 {
        Par::Rayon
    } else {
        Par::Seq
    }
}

fn pool() -> Result<Arc<ThreadPool>, String> {
    let n = num_threads();
    let pid = std::process::id();
    let mut g = POOL.lock().unwrap_or_else(|p| p.into_inner());
    if let Some((p, size, pool)) = g.as_ref() {
        if *p == pid && *size == n {
            return Ok(pool.clone());
        }
    }
    if let Some((p, _, old)) = g.take() {
        if p != pid {
            // Inherited across fork: its threads are gone; never touch it.
            std::mem::forget(old);
        }
    }
    let pool = Arc::new(
        ThreadPoolBuilder::new()
            .num_threads(n)
            .thread_name(|i| format!("rollscan-{i}"))
            .build()
            .map_err(|e| e.to_string())?,
    );
    *g = Some((pid, n, pool.clone()));
    Ok(pool)
}

/// Run `f` on the pool when `par` is Rayon, else on the calling thread.
/// Call without the GIL.
pub(crate) fn run<R: Send>(par: Par, f: impl FnOnce() -> R + Send) -> Result<R, String> {
    match par {
        Par::Seq => Ok(f()),
        Par::Rayon => Ok(pool()?.install(f)),
    }
}

/// Set the number of worker threads used by every kernel (>= 1).
#[pyfunction]
fn set_num_threads(n: i64) -> PyResult<()> {
    if n < 1 {
        return Err(PyValueError::new_err(format!(
            "n must be a positive number of threads, got {n}"
        )));
    }
    THREADS.store(n as usize, Ordering::Relaxed);
    Ok(())
}

/// The number of worker threads the kernels use.
#[pyfunction]
fn get_num_threads() -> usize {
    num_threads()
}

pub(crate) fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(set_num_threads, m)?)?;
    m.add_function(wrap_pyfunction!(get_num_threads, m)?)?;
    Ok(())
}
