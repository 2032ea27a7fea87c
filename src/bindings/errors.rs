//! The Python exception hierarchy and the one place core errors become PyErr.

use crate::core::{At, CoreError};
use pyo3::create_exception;
use pyo3::exceptions::{PyRuntimeError, PyValueError};
use pyo3::prelude::*;

create_exception!(
    rollscan,
    ShapeError,
    PyValueError,
    "Array shapes that do not line up. The message names both arguments and both shapes."
);
create_exception!(
    rollscan,
    InputError,
    PyValueError,
    "A bad value: NaN/inf where not allowed, a coefficient outside its range, lengths that do \
     not add up, an action out of range or masked out. The message names the argument and the \
     first offending index."
);

/// Map a core error, formatting indices with the core's own coordinates.
pub fn core_err(e: CoreError) -> PyErr {
    core_err_at(e, &|at| at.to_string())
}

/// Map a core error, letting the caller translate an index back to the user's
/// own layout (axis order, shape); `locate` returns text such as `[3, 1]`.
pub fn core_err_at(e: CoreError, locate: &dyn Fn(At) -> String) -> PyErr {
    match e {
        CoreError::Shape(m) => ShapeError::new_err(m),
        CoreError::Input {
            arg,
            at: Some(at),
            what,
        } => InputError::new_err(format!("{arg}{} {what}", locate(at))),
        CoreError::Input {
            arg,
            at: None,
            what,
        } => InputError::new_err(format!("{arg} {what}")),
    }
}

/// Why an output could not be borrowed for writing: read-only (`TypeError`),
/// or sharing memory with an input or another output of a kernel that does
/// not work in place (`InputError`).
pub fn overlap_err(name: &str, e: numpy::BorrowError) -> PyErr {
    match e {
        numpy::BorrowError::NotWriteable => {
            pyo3::exceptions::PyTypeError::new_err(format!("{name} is read-only"))
        }
        _ => InputError::new_err(format!(
            "{name} overlaps an input or another output; this kernel does not work in place, pass a separate output array"
        )),
    }
}

/// A Rust panic is a bug in rollscan, never validation: say so.
pub fn internal_error(what: &str) -> PyErr {
    PyRuntimeError::new_err(format!(
        "rollscan internal error ({what}); this is a bug, please report it with the call that caused it"
    ))
}

/// The index tuple of C-order (row-major) position `i` in `shape`.
pub fn unravel(mut i: usize, shape: &[usize]) -> Vec<usize> {
    let mut ix = vec![0; shape.len()];
    for (k, &d) in shape.iter().enumerate().rev() {
        if d > 0 {
            ix[k] = i % d;
            i /= d;
        }
    }
    ix
}

/// `"[3, 1]"` for an index tuple.
pub fn fmt_index(ix: &[usize]) -> String {
    format!(
        "[{}]",
        ix.iter()
            .map(|i| i.to_string())
            .collect::<Vec<_>>()
            .join(", ")
    )
}

pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    let py = m.py();
    m.add("ShapeError", py.get_type::<ShapeError>())?;
    m.add("InputError", py.get_type::<InputError>())?;
    Ok(())
}
