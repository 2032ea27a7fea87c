//! The PyO3 layer: extract and validate Python arguments, release the GIL,
//! run the core on the crate's Rayon pool, map errors to Python exceptions.

mod arrays;
mod errors;
mod heads;
mod pool;

use pyo3::prelude::*;

/// The compiled module `rollscan._core`.
#[pymodule]
fn _core(m: &Bound<'_, PyModule>) -> PyResult<()> {
    errors::register(m)?;
    pool::register(m)?;
    heads::register(m)?;
    Ok(())
}
