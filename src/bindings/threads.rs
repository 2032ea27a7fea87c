//! The crate's Rayon pool, its size setting, and the one way kernels run:
//! detached from the interpreter, inside the pool, with panics caught.

use super::errors::internal_error;
use crate::core::Par;
use pyo3::exceptions::PyValueError;
use pyo3::prelude::*;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::{Arc, RwLock};

/// Environment variable read once, when the pool is first needed.
pub const ENV_THREADS: &str = "ROLLSCAN_NUM_THREADS";

static POOL: RwLock<Option<Arc<rayon::ThreadPool>>> = RwLock::new(None);

fn default_threads() -> usize {
    match std::env::var(ENV_THREADS)
        .ok()
        .and_then(|s| s.trim().parse::<usize>().ok())
    {
        Some(n) if n >= 1 => n,
        _ => std::thread::available_parallelism()
            .map(|n| n.get())
            .unwrap_or(1),
    }
}

fn build(n: usize) -> Result<Arc<rayon::ThreadPool>, String> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(n)
        .thread_name(|i| format!("rollscan-{i}"))
        .build()
        .map(Arc::new)
        .map_err(|e| e.to_string())
}

fn pool() -> Result<Arc<rayon::ThreadPool>, String> {
    if let Ok(g) = POOL.read() {
        if let Some(p) = g.as_ref() {
            return Ok(p.clone());
        }
    }
    let mut g = POOL
        .write()
        .map_err(|_| "thread pool lock poisoned".to_string())?;
    if let Some(p) = g.as_ref() {
        return Ok(p.clone());
    }
    let p = build(default_threads())?;
    *g = Some(p.clone());
    Ok(p)
}

/// Run a core kernel: release the GIL, run inside the pool with `Par` chosen
/// from `work` (elements touched), and turn a panic into `RuntimeError`.
pub fn run<R: Send>(py: Python<'_>, work: usize, f: impl FnOnce(Par) -> R + Send) -> PyResult<R> {
    if work < crate::core::par::PAR_MIN_WORK {
        // Small calls stay on this thread: waking the pool would dominate.
        return py.detach(move || {
            catch_unwind(AssertUnwindSafe(|| f(Par::Seq)))
                .map_err(|_| internal_error("panic in kernel"))
        });
    }
    let p = pool().map_err(|e| internal_error(&e))?;
    let parallel = p.current_num_threads() > 1;
    py.detach(move || {
        catch_unwind(AssertUnwindSafe(|| {
            p.install(|| f(Par::for_work(work, parallel)))
        }))
        .map_err(|_| internal_error("panic in kernel"))
    })
}

/// Set the number of worker threads used by every kernel (>= 1).
///
/// Results do not depend on this number: work is split at data-defined
/// boundaries, so 1 and N threads give bit-identical outputs. The initial value
/// comes from the ``ROLLSCAN_NUM_THREADS`` environment variable, else the
/// number of available cores.
///
/// Args:
///     n: number of threads, at least 1.
///
/// Raises:
///     ValueError: if ``n < 1``.
///
/// Example:
///     >>> import rollscan
///     >>> old = rollscan.get_num_threads()
///     >>> rollscan.set_num_threads(1)
///     >>> rollscan.get_num_threads()
///     1
///     >>> rollscan.set_num_threads(old)
#[pyfunction]
fn set_num_threads(py: Python<'_>, n: i64) -> PyResult<()> {
    if n < 1 {
        return Err(PyValueError::new_err(format!("n must be >= 1, got {n}")));
    }
    let p = py
        .detach(|| build(n as usize))
        .map_err(|e| internal_error(&e))?;
    let mut g = POOL
        .write()
        .map_err(|_| internal_error("thread pool lock poisoned"))?;
    *g = Some(p);
    Ok(())
}

/// The number of worker threads kernels use (see ``set_num_threads``).
///
/// Example:
///     >>> import rollscan
///     >>> rollscan.get_num_threads() >= 1
///     True
#[pyfunction]
fn get_num_threads() -> PyResult<usize> {
    pool()
        .map(|p| p.current_num_threads())
        .map_err(|e| internal_error(&e))
}

/// Called in a forked child (``os.register_at_fork``): the parent's worker
/// threads do not exist there, so forget the pool and build a fresh one on
/// first use.
#[pyfunction]
fn _after_fork_in_child() {
    if let Ok(mut g) = POOL.write() {
        if let Some(old) = g.take() {
            // Dropping would signal threads that do not exist in this process.
            std::mem::forget(old);
        }
    }
}

pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(set_num_threads, m)?)?;
    m.add_function(wrap_pyfunction!(get_num_threads, m)?)?;
    m.add_function(wrap_pyfunction!(_after_fork_in_child, m)?)?;
    Ok(())
}
