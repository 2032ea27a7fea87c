//! The PyO3 layer: extract and validate arguments, release the GIL, run the
//! core on the crate's Rayon pool, map errors. No numerics live here.

mod convert;
mod errors;
mod heads;
mod layout;
mod policy;
mod ragged;
mod returns;
mod threads;

use pyo3::prelude::*;

/// The compiled half of ``rollscan``; import ``rollscan`` instead.
#[pymodule]
fn _core(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    errors::register(m)?;
    threads::register(m)?;
    returns::register(m)?;
    ragged::register(m)?;
    policy::register(m)?;
    heads::register(m)?;
    m.add_function(wrap_pyfunction!(_debug_outputs_poisoned, m)?)?;
    Ok(())
}

/// Whether ``ROLLSCAN_DEBUG_POISON_OUTPUTS=1`` is in force (fresh outputs
/// start as all-ones bytes); for the test suite.
#[pyfunction]
fn _debug_outputs_poisoned() -> bool {
    convert::poison_outputs()
}
