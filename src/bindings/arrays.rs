//! Argument extraction: NumPy arrays of the right dtype are read in place
//! (any strides); anything else goes through `numpy.asarray` once. Dtype
//! dispatch happens here, at the edge; the core sees one generic view.

use super::errors::{type_error, InputError};
use crate::core::heads::Actions;
use numpy::{
    Element, PyArrayDescrMethods, PyArrayDyn, PyArrayMethods, PyReadonlyArrayDyn,
    PyReadwriteArrayDyn, PyUntypedArray, PyUntypedArrayMethods,
};
use pyo3::exceptions::PyOverflowError;
use pyo3::prelude::*;
use pyo3::types::PyTuple;

/// A float32 or float64 input, borrowed read-only.
pub(crate) enum FloatArg<'py> {
    F32(PyReadonlyArrayDyn<'py, f32>),
    F64(PyReadonlyArrayDyn<'py, f64>),
}

impl<'py> FloatArg<'py> {
    pub(crate) fn shape(&self) -> &[usize] {
        match self {
            FloatArg::F32(a) => a.shape(),
            FloatArg::F64(a) => a.shape(),
        }
    }

    /// Every element widened to `f64`, in C order (for small parameters).
    pub(crate) fn values(&self) -> Vec<f64> {
        match self {
            FloatArg::F32(a) => a.as_array().iter().map(|&x| x as f64).collect(),
            FloatArg::F64(a) => a.as_array().iter().copied().collect(),
        }
    }

    fn to_f64(self) -> PyResult<PyReadonlyArrayDyn<'py, f64>> {
        match self {
            FloatArg::F64(a) => Ok(a),
            FloatArg::F32(a) => a
                .cast_array::<f64>(false)?
                .try_into_readonly()
                .map_err(|e| InputError::new_err(e.to_string())),
        }
    }
}

/// Per-step float arrays after promotion to one dtype.
pub(crate) enum Floats<'py> {
    F32(Vec<PyReadonlyArrayDyn<'py, f32>>),
    F64(Vec<PyReadonlyArrayDyn<'py, f64>>),
}

/// All float32 stay float32; any float64 promotes every array to float64.
pub(crate) fn promote(args: Vec<FloatArg<'_>>) -> PyResult<Floats<'_>> {
    if args.iter().all(|a| matches!(a, FloatArg::F32(_))) {
        return Ok(Floats::F32(
            args.into_iter()
                .map(|a| match a {
                    FloatArg::F32(a) => a,
                    FloatArg::F64(_) => unreachable!("checked above"),
                })
                .collect(),
        ));
    }
    Ok(Floats::F64(
        args.into_iter()
            .map(FloatArg::to_f64)
            .collect::<PyResult<_>>()?,
    ))
}

/// Run `$body` with `$v` the promoted vector and `$F` its element type.
macro_rules! with_floats {
    ($fl:expr, $v:ident, $F:ident => $body:expr) => {
        match $fl {
            $crate::bindings::arrays::Floats::F32($v) => {
                type $F = f32;
                $body
            }
            $crate::bindings::arrays::Floats::F64($v) => {
                type $F = f64;
                $body
            }
        }
    };
}
pub(crate) use with_floats;

fn asarray<'py>(obj: &Bound<'py, PyAny>) -> PyResult<Bound<'py, PyUntypedArray>> {
    if let Ok(a) = obj.cast::<PyUntypedArray>() {
        return Ok(a.clone());
    }
    let np = obj.py().import("numpy")?;
    let a = np.call_method1("asarray", (obj,))?;
    Ok(a.cast_into::<PyUntypedArray>()?)
}

fn astype<'py>(a: &Bound<'py, PyUntypedArray>, dtype: &str) -> PyResult<Bound<'py, PyUntypedArray>> {
    Ok(a.call_method1("astype", (dtype,))?
        .cast_into::<PyUntypedArray>()?)
}

fn dtype_str(a: &Bound<'_, PyUntypedArray>) -> String {
    a.dtype().to_string()
}

fn ro<'py, T: Element>(a: &Bound<'py, PyArrayDyn<T>>) -> PyResult<PyReadonlyArrayDyn<'py, T>> {
    a.try_readonly()
        .map_err(|e| InputError::new_err(e.to_string()))
}

/// A float input; integer and bool arrays are promoted to float64.
pub(crate) fn float_arg<'py>(obj: &Bound<'py, PyAny>, name: &str) -> PyResult<FloatArg<'py>> {
    if let Ok(a) = obj.cast::<PyArrayDyn<f32>>() {
        return Ok(FloatArg::F32(ro(a)?));
    }
    if let Ok(a) = obj.cast::<PyArrayDyn<f64>>() {
        return Ok(FloatArg::F64(ro(a)?));
    }
    let a = asarray(obj)?;
    let dt = a.dtype();
    let a = match (dt.kind(), dt.itemsize()) {
        (b'f', 4) => astype(&a, "float32")?,
        (b'f', _) | (b'i', _) | (b'u', _) | (b'b', _) => astype(&a, "float64")?,
        _ => {
            return Err(type_error(format!(
                "{name} must be a float32 or float64 array, got dtype {}",
                dtype_str(&a)
            )))
        }
    };
    if let Ok(a) = a.cast::<PyArrayDyn<f32>>() {
        return Ok(FloatArg::F32(ro(a)?));
    }
    Ok(FloatArg::F64(ro(a.cast::<PyArrayDyn<f64>>()?)?))
}

/// An integer index array of any integer dtype, read in place.
pub(crate) enum IntArg<'py> {
    I8(PyReadonlyArrayDyn<'py, i8>),
    I16(PyReadonlyArrayDyn<'py, i16>),
    I32(PyReadonlyArrayDyn<'py, i32>),
    I64(PyReadonlyArrayDyn<'py, i64>),
    U8(PyReadonlyArrayDyn<'py, u8>),
    U16(PyReadonlyArrayDyn<'py, u16>),
    U32(PyReadonlyArrayDyn<'py, u32>),
    U64(PyReadonlyArrayDyn<'py, u64>),
}

impl IntArg<'_> {
    pub(crate) fn shape(&self) -> &[usize] {
        match self {
            IntArg::I8(a) => a.shape(),
            IntArg::I16(a) => a.shape(),
            IntArg::I32(a) => a.shape(),
            IntArg::I64(a) => a.shape(),
            IntArg::U8(a) => a.shape(),
            IntArg::U16(a) => a.shape(),
            IntArg::U32(a) => a.shape(),
            IntArg::U64(a) => a.shape(),
        }
    }

    pub(crate) fn view(&self) -> Actions<'_> {
        match self {
            IntArg::I8(a) => Actions::I8(a.as_array()),
            IntArg::I16(a) => Actions::I16(a.as_array()),
            IntArg::I32(a) => Actions::I32(a.as_array()),
            IntArg::I64(a) => Actions::I64(a.as_array()),
            IntArg::U8(a) => Actions::U8(a.as_array()),
            IntArg::U16(a) => Actions::U16(a.as_array()),
            IntArg::U32(a) => Actions::U32(a.as_array()),
            IntArg::U64(a) => Actions::U64(a.as_array()),
        }
    }
}

/// Integer actions; any integer dtype, any strides.
pub(crate) fn int_arg<'py>(obj: &Bound<'py, PyAny>, name: &str) -> PyResult<IntArg<'py>> {
    if let Ok(a) = obj.cast::<PyArrayDyn<i64>>() {
        return Ok(IntArg::I64(ro(a)?));
    }
    let mut a = asarray(obj)?;
    if a.dtype().is_native_byteorder() == Some(false) {
        a = astype(&a, "int64")?;
    }
    let dt = a.dtype();
    Ok(match (dt.kind(), dt.itemsize()) {
        (b'i', 1) => IntArg::I8(ro(a.cast::<PyArrayDyn<i8>>()?)?),
        (b'i', 2) => IntArg::I16(ro(a.cast::<PyArrayDyn<i16>>()?)?),
        (b'i', 4) => IntArg::I32(ro(a.cast::<PyArrayDyn<i32>>()?)?),
        (b'i', 8) => IntArg::I64(ro(a.cast::<PyArrayDyn<i64>>()?)?),
        (b'u', 1) => IntArg::U8(ro(a.cast::<PyArrayDyn<u8>>()?)?),
        (b'u', 2) => IntArg::U16(ro(a.cast::<PyArrayDyn<u16>>()?)?),
        (b'u', 4) => IntArg::U32(ro(a.cast::<PyArrayDyn<u32>>()?)?),
        (b'u', 8) => IntArg::U64(ro(a.cast::<PyArrayDyn<u64>>()?)?),
        _ => {
            return Err(type_error(format!(
                "{name} must be an integer array, got dtype {}",
                dtype_str(&a)
            )))
        }
    })
}

/// A boolean mask (integer masks are read as `!= 0`, a copy).
pub(crate) fn bool_arg<'py>(
    obj: &Bound<'py, PyAny>,
    name: &str,
) -> PyResult<PyReadonlyArrayDyn<'py, bool>> {
    if let Ok(a) = obj.cast::<PyArrayDyn<bool>>() {
        return ro(a);
    }
    let a = asarray(obj)?;
    let kind = a.dtype().kind();
    let a = match kind {
        b'b' => a,
        b'i' | b'u' => {
            let np = obj.py().import("numpy")?;
            np.call_method1("not_equal", (&a, 0))?
                .cast_into::<PyUntypedArray>()?
        }
        _ => {
            return Err(type_error(format!(
                "{name} must be a boolean array, got dtype {}",
                dtype_str(&a)
            )))
        }
    };
    ro(a.cast::<PyArrayDyn<bool>>()?)
}

/// A `seed`: an int in `[0, 2**64)`.
pub(crate) fn seed_arg(obj: &Bound<'_, PyAny>) -> PyResult<u64> {
    match obj.extract::<u64>() {
        Ok(s) => Ok(s),
        Err(e) if e.is_instance_of::<PyOverflowError>(obj.py()) => Err(InputError::new_err(
            format!("seed must be an integer in [0, 2**64), got {obj}"),
        )),
        Err(_) => Err(type_error(format!(
            "seed must be an int, got {}",
            obj.get_type().name()?
        ))),
    }
}

/// A scalar or a 0-/1-D array of floats (bounds).
pub(crate) fn float_values(obj: &Bound<'_, PyAny>, name: &str) -> PyResult<Vec<f64>> {
    if let Ok(v) = obj.extract::<f64>() {
        return Ok(vec![v]);
    }
    let a = float_arg(obj, name)?;
    if a.shape().len() > 1 {
        return Err(super::errors::ShapeError::new_err(format!(
            "{name} must be a scalar or 1-D, got shape {}",
            crate::core::error::fmt_shape(a.shape())
        )));
    }
    Ok(a.values())
}

/// An output array: the given `out` (exact dtype, writable; the core checks
/// the shape) or a new uninitialised one that the kernel fills completely.
pub(crate) fn out_arr<'py, T: Element>(
    py: Python<'py>,
    out: Option<&Bound<'py, PyAny>>,
    shape: &[usize],
    name: &str,
) -> PyResult<Bound<'py, PyArrayDyn<T>>> {
    match out {
        Some(o) if !o.is_none() => match o.cast::<PyArrayDyn<T>>() {
            Ok(a) => Ok(a.clone()),
            Err(_) => {
                let got = match o.cast::<PyUntypedArray>() {
                    Ok(a) => format!("an array of dtype {}", dtype_str(a)),
                    Err(_) => format!("{}", o.get_type().name()?),
                };
                Err(type_error(format!(
                    "{name} must be a numpy.ndarray of dtype {}, got {got}",
                    T::get_dtype(py)
                )))
            }
        },
        // SAFETY: `T` is a plain number type (f32, f64, i64): any bits are a
        // valid value, and every kernel writes every element of its outputs
        // before the array is returned to Python (on error it is dropped).
        _ => Ok(unsafe { PyArrayDyn::<T>::new(py, shape, false) }),
    }
}

/// Borrow an output for writing: read-only is a `TypeError`, overlap with an
/// input an `InputError`.
pub(crate) fn writable<'py, T: Element>(
    a: &Bound<'py, PyArrayDyn<T>>,
    name: &str,
) -> PyResult<PyReadwriteArrayDyn<'py, T>> {
    a.try_readwrite().map_err(|e| match e {
        numpy::BorrowError::NotWriteable => type_error(format!("{name} is read-only")),
        _ => InputError::new_err(format!(
            "{name} shares memory with an input; this kernel does not work in place"
        )),
    })
}

/// `out=` of a two-output kernel: `None` or a tuple of two (array or None).
pub(crate) fn out_pair<'py>(
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<(Option<Bound<'py, PyAny>>, Option<Bound<'py, PyAny>>)> {
    match out {
        None => Ok((None, None)),
        Some(o) if o.is_none() => Ok((None, None)),
        Some(o) => {
            let t = o.cast::<PyTuple>().map_err(|_| {
                type_error("out must be a tuple of two arrays for this kernel")
            })?;
            if t.len() != 2 {
                return Err(type_error(format!(
                    "out must be a tuple of two arrays for this kernel, got {} items",
                    t.len()
                )));
            }
            Ok((Some(t.get_item(0)?), Some(t.get_item(1)?)))
        }
    }
}
