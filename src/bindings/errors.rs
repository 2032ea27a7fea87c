//! The exception hierarchy and the one mapping from [`CoreError`] to it.

use crate::core::error::{At, CoreError};
use pyo3::create_exception;
use pyo3::exceptions::{PyTypeError, PyValueError};
use pyo3::prelude::*;

create_exception!(
    rollscan,
    ShapeError,
    PyValueError,
    "Shapes of arguments that do not line up; the message names both arguments and shapes."
);
create_exception!(
    rollscan,
    InputError,
    PyValueError,
    "A bad value in an argument; the message names the argument and the first offending index."
);

pub(crate) fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    let py = m.py();
    m.add("ShapeError", py.get_type::<ShapeError>())?;
    m.add("InputError", py.get_type::<InputError>())?;
    Ok(())
}

/// How a kernel's arguments relate to its batch shape, so that a row index of
/// the core becomes an index into the caller's own argument.
pub(crate) struct Where<'s> {
    /// The common batch shape (every axis but the last of the main argument).
    pub batch: &'s [usize],
    /// `(name, own shape, has the last K axis)` of every array argument.
    pub args: &'s [(&'static str, &'s [usize], bool)],
}

impl Where<'_> {
    fn index(&self, arg: &str, at: At) -> String {
        let unravel = |mut r: usize| {
            let mut idx = vec![0usize; self.batch.len()];
            for (i, &n) in self.batch.iter().enumerate().rev() {
                if n > 0 {
                    idx[i] = r % n;
                    r /= n;
                }
            }
            idx
        };
        let (full, with_col) = match at {
            At::Flat(r) => (unravel(r), false),
            At::RowCol(r, c) => {
                let mut v = unravel(r);
                v.push(c);
                (v, true)
            }
            At::TimeStream(t, m) => (vec![t, m], false),
        };
        // Map the index in broadcast coordinates onto the argument's own
        // shape: drop the leading axes it lacks, 0 on its length-1 axes.
        let own: Option<&[usize]> = self.args.iter().find(|a| a.0 == arg).map(|a| {
            if a.2 && !with_col {
                &a.1[..a.1.len().saturating_sub(1)]
            } else {
                a.1
            }
        });
        let idx: Vec<usize> = match own {
            Some(own) if own.len() <= full.len() => full[full.len() - own.len()..]
                .iter()
                .zip(own)
                .map(|(&i, &n)| if n == 1 { 0 } else { i })
                .collect(),
            _ => full,
        };
        if idx.is_empty() {
            String::new()
        } else {
            format!(
                "[{}]",
                idx.iter()
                    .map(|i| i.to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        }
    }

    /// The Python exception for `e`.
    pub(crate) fn err(&self, e: CoreError) -> PyErr {
        match e {
            CoreError::Shape(m) => ShapeError::new_err(m),
            CoreError::Input { arg, at, what } => {
                let idx = at.map(|at| self.index(arg, at)).unwrap_or_default();
                InputError::new_err(format!("{arg}{idx} {what}"))
            }
        }
    }
}

impl From<CoreError> for PyErr {
    fn from(e: CoreError) -> PyErr {
        Where {
            batch: &[],
            args: &[],
        }
        .err(e)
    }
}

/// `TypeError` with a message.
pub(crate) fn type_error(msg: impl Into<String>) -> PyErr {
    PyTypeError::new_err(msg.into())
}
