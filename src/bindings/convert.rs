//! Argument conversion at the edge: dtype promotion, flag and index arrays,
//! `out=` validation. Everything here runs attached to the interpreter and
//! returns NumPy arrays whose views the kernels then read in place.

use super::errors::{fmt_index, unravel, InputError, ShapeError};
use crate::core::error::fmt_shape;
use num_traits::{One, Zero};
use numpy::prelude::*;
use numpy::{dtype, Element, PyArrayDescr, PyArrayDyn, PyUntypedArray};
use pyo3::exceptions::PyTypeError;
use pyo3::prelude::*;
use pyo3::types::PyDict;

/// The storage dtype a call runs in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dt {
    F32,
    F64,
}

/// Per-step arrays promoted to one float dtype, in argument order.
pub enum Floats<'py> {
    F32(Vec<Option<Bound<'py, PyArrayDyn<f32>>>>),
    F64(Vec<Option<Bound<'py, PyArrayDyn<f64>>>>),
}

/// `numpy.asarray(obj)` unless `obj` already is an ndarray (no copy for
/// arrays, memmaps, and objects exposing `__array__` / the buffer protocol).
pub fn ndarray<'py>(
    py: Python<'py>,
    name: &str,
    obj: &Bound<'py, PyAny>,
) -> PyResult<Bound<'py, PyUntypedArray>> {
    if let Ok(a) = obj.cast::<PyUntypedArray>() {
        return Ok(a.clone());
    }
    let np = py.import("numpy")?;
    let a = np.getattr("asarray")?.call1((obj,)).map_err(|e| {
        PyTypeError::new_err(format!("{name} cannot be converted to a NumPy array: {e}"))
    })?;
    Ok(a.cast_into::<PyUntypedArray>()?)
}

fn dtype_str(d: &Bound<'_, PyArrayDescr>) -> String {
    d.str()
        .map(|s| s.to_string())
        .unwrap_or_else(|_| "?".into())
}

/// How a float argument's dtype maps to a storage dtype: `(dt, exact)`, where
/// `exact` means no conversion is needed.
fn float_kind(name: &str, a: &Bound<'_, PyUntypedArray>) -> PyResult<(Dt, bool)> {
    let d = a.dtype();
    match (d.kind(), d.itemsize()) {
        (b'f', 4) => Ok((Dt::F32, d.is_native_byteorder() != Some(false))),
        (b'f', 8) => Ok((Dt::F64, d.is_native_byteorder() != Some(false))),
        (b'f', 2) => Ok((Dt::F32, false)),
        (b'i' | b'u' | b'b', _) => Ok((Dt::F64, false)),
        _ => Err(PyTypeError::new_err(format!(
            "{name} has unsupported dtype {}; rollscan computes in float32 or float64 \
             (integer and bool arrays are promoted to float64)",
            dtype_str(&d)
        ))),
    }
}

/// Convert to `F`, copying only when the dtype differs.
pub fn to_dtype<'py, F: Element>(
    py: Python<'py>,
    a: &Bound<'py, PyUntypedArray>,
) -> PyResult<Bound<'py, PyArrayDyn<F>>> {
    if let Ok(t) = a.cast::<PyArrayDyn<F>>() {
        return Ok(t.clone());
    }
    let kw = PyDict::new(py);
    kw.set_item("dtype", dtype::<F>(py))?;
    let np = py.import("numpy")?;
    let c = np.getattr("asarray")?.call((a,), Some(&kw))?;
    Ok(c.cast_into::<PyArrayDyn<F>>()?)
}

/// Promote several per-step float arguments to one dtype: float32 only when
/// every given argument is float32; otherwise float64.
pub fn promote_floats<'py>(
    py: Python<'py>,
    args: &[(&str, Option<&Bound<'py, PyAny>>)],
) -> PyResult<Floats<'py>> {
    let mut arrs = Vec::with_capacity(args.len());
    let mut any64 = false;
    for (name, obj) in args {
        match obj {
            None => arrs.push(None),
            Some(o) if o.is_none() => arrs.push(None),
            Some(o) => {
                let a = ndarray(py, name, o)?;
                let (dt, _) = float_kind(name, &a)?;
                any64 |= dt == Dt::F64;
                arrs.push(Some(a));
            }
        }
    }
    if any64 {
        let v = arrs
            .iter()
            .map(|a| a.as_ref().map(|a| to_dtype::<f64>(py, a)).transpose())
            .collect::<PyResult<_>>()?;
        Ok(Floats::F64(v))
    } else {
        let v = arrs
            .iter()
            .map(|a| a.as_ref().map(|a| to_dtype::<f32>(py, a)).transpose())
            .collect::<PyResult<_>>()?;
        Ok(Floats::F32(v))
    }
}

/// A per-stream / per-piece array or a scalar, cast to the call's dtype `F`.
pub fn cast_float<'py, F: Element>(
    py: Python<'py>,
    name: &str,
    obj: &Bound<'py, PyAny>,
) -> PyResult<Bound<'py, PyArrayDyn<F>>> {
    let a = ndarray(py, name, obj)?;
    float_kind(name, &a)?;
    to_dtype::<F>(py, &a)
}

/// A boolean flag array. Integer and float arrays are accepted when every
/// element is 0 or 1 (as the stored-rollout reader requires of flag
/// columns): anything else, NaN included, is far more likely a wrong array
/// than a flag, so it is an `InputError` naming the first such element.
pub fn as_flags<'py>(
    py: Python<'py>,
    name: &str,
    obj: &Bound<'py, PyAny>,
) -> PyResult<Bound<'py, PyArrayDyn<bool>>> {
    let a = ndarray(py, name, obj)?;
    if let Ok(b) = a.cast::<PyArrayDyn<bool>>() {
        return Ok(b.clone());
    }
    let d = a.dtype();
    if !matches!(d.kind(), b'i' | b'u' | b'f') {
        return Err(PyTypeError::new_err(format!(
            "{name} has unsupported dtype {}; flags must be bool (or integer / float arrays of 0 and 1)",
            dtype_str(&d)
        )));
    }
    // The common C-contiguous cases in one Rust pass over the values.
    macro_rules! try_types {
        ($($t:ty),*) => {$(
            if let Ok(x) = a.cast::<PyArrayDyn<$t>>() {
                if let Some(f) = flags_from_slice(py, name, x)? {
                    return Ok(f);
                }
            }
        )*};
    }
    try_types!(f32, f64, u8, i8, i32, i64, u16, i16, u32, u64);
    // Any other layout or dtype: NumPy's comparisons (which read any strides).
    let np = py.import("numpy")?;
    let set = np.getattr("not_equal")?.call1((&a, 0))?;
    let not_one = np.getattr("not_equal")?.call1((&a, 1))?;
    let bad = np.getattr("logical_and")?.call1((&set, not_one))?;
    if bad.call_method0("any")?.is_truthy()? {
        let flat: usize = np.getattr("argmax")?.call1((&bad,))?.extract()?;
        return Err(not_a_flag(name, &a, flat));
    }
    Ok(set.cast_into::<PyArrayDyn<bool>>()?)
}

/// The error for the element at C-order position `flat` of a flag array.
fn not_a_flag(name: &str, a: &Bound<'_, PyUntypedArray>, flat: usize) -> PyErr {
    let shape = a.shape();
    let value = a
        .call_method1("item", (flat,))
        .and_then(|v| v.str().map(|s| s.to_string()))
        .unwrap_or_else(|_| "?".into());
    let at = if shape.is_empty() {
        String::new()
    } else {
        fmt_index(&unravel(flat, shape))
    };
    InputError::new_err(format!(
        "{name}{at} = {value} is not a flag: numeric flags must be 0 or 1 (or pass a bool array)"
    ))
}

/// For a C-contiguous `x`: `x != 0` as a new bool array, after checking in
/// the same pass that every element is 0 or 1. `None` for other layouts.
fn flags_from_slice<'py, T: Element + Copy + PartialEq + Zero + One>(
    py: Python<'py>,
    name: &str,
    x: &Bound<'py, PyArrayDyn<T>>,
) -> PyResult<Option<Bound<'py, PyArrayDyn<bool>>>> {
    if !x.is_c_contiguous() {
        return Ok(None);
    }
    let ro = x.readonly();
    let Ok(s) = ro.as_slice() else {
        return Ok(None);
    };
    // Branch-free, so the loop vectorises; the bad element is looked for only
    // once there is one.
    let (zero, one) = (T::zero(), T::one());
    let mut bad = false;
    let flags: Vec<bool> = s
        .iter()
        .map(|&e| {
            bad |= !((e == zero) | (e == one));
            e != zero
        })
        .collect();
    if bad {
        let flat = s.iter().position(|&e| e != zero && e != one).unwrap_or(0);
        return Err(not_a_flag(name, x.as_untyped(), flat));
    }
    let arr = ndarray::ArrayD::from_shape_vec(x.shape(), flags)
        .map_err(|_| super::errors::internal_error("flag array shape"))?;
    Ok(Some(arr.into_pyarray(py)))
}

/// An integer array of any integer dtype, as int64.
pub fn as_indices<'py>(
    py: Python<'py>,
    name: &str,
    obj: &Bound<'py, PyAny>,
) -> PyResult<Bound<'py, PyArrayDyn<i64>>> {
    let a = ndarray(py, name, obj)?;
    if let Ok(b) = a.cast::<PyArrayDyn<i64>>() {
        return Ok(b.clone());
    }
    let d = a.dtype();
    match d.kind() {
        b'i' | b'u' => to_dtype::<i64>(py, &a),
        _ => Err(PyTypeError::new_err(format!(
            "{name} has unsupported dtype {}; it must be an integer array",
            dtype_str(&d)
        ))),
    }
}

/// The output array: the caller's `out` after checking it (exact shape and
/// dtype, writable), or a new zero-filled C-order array.
pub fn out_array<'py, F: Element>(
    py: Python<'py>,
    name: &str,
    out: Option<&Bound<'py, PyAny>>,
    shape: &[usize],
) -> PyResult<Bound<'py, PyArrayDyn<F>>> {
    let o = match out {
        None => return fresh::<F>(py, shape),
        Some(o) => o,
    };
    let a = o.cast::<PyUntypedArray>().map_err(|_| {
        PyTypeError::new_err(format!(
            "{name} must be a NumPy array, got {}",
            type_name(o)
        ))
    })?;
    let want = dtype::<F>(py);
    if !a.dtype().is_equiv_to(&want) {
        return Err(PyTypeError::new_err(format!(
            "{name} has dtype {} but the result is {}",
            dtype_str(&a.dtype()),
            dtype_str(&want)
        )));
    }
    if a.shape() != shape {
        return Err(ShapeError::new_err(format!(
            "{name} has shape {} but the result has shape {}",
            fmt_shape(a.shape()),
            fmt_shape(shape)
        )));
    }
    let writable: bool = a.getattr("flags")?.getattr("writeable")?.extract()?;
    if !writable {
        return Err(PyTypeError::new_err(format!("{name} is read-only")));
    }
    Ok(a.cast::<PyArrayDyn<F>>()?.clone())
}

/// Fresh outputs of at least this many bytes come from `numpy.empty`: every
/// kernel writes each element of its outputs, so zero-filling them (a memset,
/// or page faults on fresh pages) would be wasted work, about a fifth of a
/// (2048, 64) `gae` call. Below it the zero fill costs less than the Python
/// call to `numpy.empty`.
const EMPTY_FROM_BYTES: usize = 1 << 16;

/// Whether fresh outputs are filled with all-ones bytes (NaN for floats, -1
/// for integers) before a kernel runs, so that a test comparing them with
/// zero-filled `out=` buffers catches any element a kernel leaves unwritten.
/// Set by the environment variable `ROLLSCAN_DEBUG_POISON_OUTPUTS=1`, read
/// once; for the test suite, never for speed.
pub fn poison_outputs() -> bool {
    static POISON: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *POISON
        .get_or_init(|| std::env::var_os("ROLLSCAN_DEBUG_POISON_OUTPUTS").is_some_and(|v| v == "1"))
}

/// A new C-ordered output array (see [`EMPTY_FROM_BYTES`], [`poison_outputs`]).
fn fresh<'py, F: Element>(py: Python<'py>, shape: &[usize]) -> PyResult<Bound<'py, PyArrayDyn<F>>> {
    let bytes = shape.iter().product::<usize>() * std::mem::size_of::<F>();
    let poison = poison_outputs();
    if bytes < EMPTY_FROM_BYTES && !poison {
        return Ok(PyArrayDyn::<F>::zeros(py, shape, false));
    }
    let np = py.import("numpy")?;
    let a = np
        .getattr("empty")?
        .call1((shape.to_vec(), dtype::<F>(py)))?
        .cast_into::<PyArrayDyn<F>>()?;
    if poison {
        a.call_method1("view", ("uint8",))?
            .call_method1("fill", (0xffu8,))?;
    }
    Ok(a)
}

/// The two optional outputs of a two-result kernel.
pub type OutPair<'py> = (Option<Bound<'py, PyAny>>, Option<Bound<'py, PyAny>>);

/// `out=` for a kernel with two array results: `None` or a 2-tuple.
pub fn out_pair<'py>(out: Option<&Bound<'py, PyAny>>) -> PyResult<OutPair<'py>> {
    match out {
        None => Ok((None, None)),
        Some(o) if o.is_none() => Ok((None, None)),
        Some(o) => {
            let t: (Bound<'py, PyAny>, Bound<'py, PyAny>) = o.extract().map_err(|_| {
                PyTypeError::new_err(format!(
                    "out must be a tuple of two arrays, got {}",
                    type_name(o)
                ))
            })?;
            Ok((Some(t.0), Some(t.1)))
        }
    }
}

pub fn type_name(o: &Bound<'_, PyAny>) -> String {
    o.get_type()
        .name()
        .map(|n| n.to_string())
        .unwrap_or_else(|_| "?".into())
}

/// Normalise a possibly negative axis for `ndim` dimensions.
pub fn norm_axis(name: &str, axis: i64, ndim: usize) -> PyResult<usize> {
    let n = ndim as i64;
    if axis >= n || axis < -n {
        return Err(ShapeError::new_err(format!(
            "{name}={axis} is out of range for an array with {ndim} dimension(s)"
        )));
    }
    Ok(if axis < 0 {
        (axis + n) as usize
    } else {
        axis as usize
    })
}
