//! Python entry points of the action heads (contract section 4): convert the
//! arguments (in place where the dtype allows), check or allocate the
//! outputs, run the core detached on the pool, and map errors so that a core
//! row becomes the caller's own index into the argument at fault.

use super::convert::{
    as_flags, as_indices, cast_float, out_array, out_pair, promote_floats, type_name, Floats,
};
use super::errors::{core_err_at, fmt_index, overlap_err, unravel, InputError, ShapeError};
use super::threads::run;
use crate::core::error::fmt_shape;
use crate::core::float::Real;
use crate::core::heads::categorical::{self, CatOut, Logits, Out, Pick};
use crate::core::heads::gaussian::{self, GaussOut, LogStd, Normal};
use crate::core::heads::squashed::{self, Bounds};
use crate::core::{At, CoreError};
use ndarray::{ArrayD, ArrayViewD, ArrayViewMutD, IxDyn};
use numpy::prelude::*;
use numpy::{Element, PyArrayDyn, PyReadonlyArrayDyn, PyReadwriteArrayDyn};
use pyo3::exceptions::{PyOverflowError, PyTypeError};
use pyo3::prelude::*;
use pyo3::types::PyTuple;

type Any<'py> = Bound<'py, PyAny>;

fn some<'a, 'py>(o: Option<&'a Any<'py>>) -> Option<&'a Any<'py>> {
    o.filter(|o| !o.is_none())
}

/// A read-only view of an argument. Zero-size arrays become empty ndarrays
/// (NumPy gives them strides that ndarray's debug checks reject).
enum Ro<'py, T: Element> {
    Py(PyReadonlyArrayDyn<'py, T>),
    Empty(ArrayD<T>),
}

impl<'py, T: Element> Ro<'py, T> {
    fn new(a: &Bound<'py, PyArrayDyn<T>>) -> PyResult<Self> {
        if a.len() == 0 {
            return Ok(Ro::Empty(empty(a.shape())));
        }
        Ok(Ro::Py(a.try_readonly()?))
    }

    fn view(&self) -> ArrayViewD<'_, T> {
        match self {
            Ro::Py(a) => a.as_array(),
            Ro::Empty(a) => a.view(),
        }
    }
}

/// A writable view of an output (zero-size: an empty ndarray, see [`Ro`]).
enum Rw<'py, T: Element> {
    Py(PyReadwriteArrayDyn<'py, T>),
    Empty(ArrayD<T>),
}

impl<'py, T: Element> Rw<'py, T> {
    fn new(a: &Bound<'py, PyArrayDyn<T>>, name: &str) -> PyResult<Self> {
        if a.len() == 0 {
            return Ok(Rw::Empty(empty(a.shape())));
        }
        a.try_readwrite()
            .map(Rw::Py)
            .map_err(|e| overlap_err(name, e))
    }

    fn view(&mut self) -> ArrayViewMutD<'_, T> {
        match self {
            Rw::Py(a) => a.as_array_mut(),
            Rw::Empty(a) => a.view_mut(),
        }
    }
}

fn empty<T>(shape: &[usize]) -> ArrayD<T> {
    ArrayD::from_shape_vec(IxDyn(shape), Vec::new()).expect("a zero-size shape")
}

/// Maps a core error to the caller's indices: the core reports a row of the
/// common batch shape (and a column); this names the element of the argument
/// at fault in that argument's own shape (a `[D]` log_std, a broadcast mask).
struct Locate<'s> {
    batch: &'s [usize],
    /// `(name, own shape, has the trailing action axis)`.
    args: &'s [(&'static str, &'s [usize], bool)],
}

impl Locate<'_> {
    fn index(&self, arg: &str, at: At) -> String {
        let (full, col) = match at {
            At::Flat(r) => (unravel(r, self.batch), false),
            At::RowCol(r, c) => {
                let mut ix = unravel(r, self.batch);
                ix.push(c);
                (ix, true)
            }
            other => return other.to_string(),
        };
        let own = self.args.iter().find(|a| a.0 == arg).map(|a| {
            if a.2 && !col {
                &a.1[..a.1.len().saturating_sub(1)]
            } else {
                a.1
            }
        });
        let ix: Vec<usize> = match own {
            // Drop the leading axes the argument lacks; 0 on its length-1 axes.
            Some(own) if own.len() <= full.len() => full[full.len() - own.len()..]
                .iter()
                .zip(own)
                .map(|(&i, &n)| if n == 1 { 0 } else { i })
                .collect(),
            _ => full,
        };
        if ix.is_empty() {
            String::new()
        } else {
            fmt_index(&ix)
        }
    }

    fn err(&self, e: CoreError) -> PyErr {
        let arg = match &e {
            CoreError::Input { arg, .. } => *arg,
            CoreError::Shape(_) => "",
        };
        core_err_at(e, &|at| self.index(arg, at))
    }
}

fn batch_of<'s>(name: &str, shape: &'s [usize]) -> PyResult<&'s [usize]> {
    match shape.split_last() {
        Some((_, b)) => Ok(b),
        None => Err(ShapeError::new_err(format!(
            "{name} has shape () but needs at least one axis (the last axis holds the actions)"
        ))),
    }
}

fn pair<'py>(py: Python<'py>, a: Any<'py>, b: Any<'py>) -> PyResult<Any<'py>> {
    Ok(PyTuple::new(py, [a, b])?.into_any())
}

/// A `seed`: an int in `[0, 2**64)`.
fn seed_arg(obj: &Any<'_>) -> PyResult<u64> {
    match obj.extract::<u64>() {
        Ok(s) => Ok(s),
        Err(e) if e.is_instance_of::<PyOverflowError>(obj.py()) => Err(InputError::new_err(
            format!("seed must be an integer in [0, 2**64), got {obj}"),
        )),
        Err(_) => Err(PyTypeError::new_err(format!(
            "seed must be an int, got {}",
            type_name(obj)
        ))),
    }
}

/// The values of a small float argument (a shared log_std, a bound) as
/// float64, with its shape.
fn small_values(py: Python<'_>, name: &str, obj: &Any<'_>) -> PyResult<(Vec<usize>, Vec<f64>)> {
    // float32 / float64 arrays are read as they are (no NumPy call).
    if let Ok(a) = obj.cast::<PyArrayDyn<f32>>() {
        let v = Ro::new(a)?.view().iter().map(|&x| x as f64).collect();
        return Ok((a.shape().to_vec(), v));
    }
    if let Ok(a) = obj.cast::<PyArrayDyn<f64>>() {
        let v = Ro::new(a)?.view().iter().copied().collect();
        return Ok((a.shape().to_vec(), v));
    }
    let a = cast_float::<f64>(py, name, obj)?;
    let shape = a.shape().to_vec();
    if a.len() == 0 {
        return Ok((shape, Vec::new()));
    }
    let v = a.try_readonly()?.as_array().iter().copied().collect();
    Ok((shape, v))
}

// ---------------------------------------------------------------- categorical

#[derive(Clone, Copy, PartialEq)]
enum CatKind {
    LogProb,
    Entropy,
    LogProbEntropy,
    Score,
    Index(Pick),
}

fn cat_call<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    actions: Option<&Any<'py>>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    kind: CatKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let acts = actions.map(|a| as_indices(py, "actions", a)).transpose()?;
    let mk = some(mask).map(|m| as_flags(py, "mask", m)).transpose()?;
    match promote_floats(py, &[("logits", Some(logits))])? {
        Floats::F32(mut v) => {
            let x = v.remove(0).expect("logits");
            cat_typed(py, &x, acts, mk, check_finite, kind, out)
        }
        Floats::F64(mut v) => {
            let x = v.remove(0).expect("logits");
            cat_typed(py, &x, acts, mk, check_finite, kind, out)
        }
    }
}

fn cat_typed<'py, F: Real + Element>(
    py: Python<'py>,
    x: &Bound<'py, PyArrayDyn<F>>,
    acts: Option<Bound<'py, PyArrayDyn<i64>>>,
    mk: Option<Bound<'py, PyArrayDyn<bool>>>,
    check_finite: bool,
    kind: CatKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let shape = x.shape().to_vec();
    let batch = batch_of("logits", &shape)?;
    let two = kind == CatKind::LogProbEntropy;
    let (o1, o2) = if two {
        out_pair(out)?
    } else {
        (some(out).cloned(), None)
    };
    let n1 = if two { "out[0]" } else { "out" };
    // Outputs: a float per row, a float per logit (score) or an index per row.
    let (fa, ia) = match kind {
        CatKind::Index(_) => (None, Some(out_array::<i64>(py, n1, o1.as_ref(), batch)?)),
        CatKind::Score => (Some(out_array::<F>(py, n1, o1.as_ref(), &shape)?), None),
        _ => (Some(out_array::<F>(py, n1, o1.as_ref(), batch)?), None),
    };
    let fb = if two {
        Some(out_array::<F>(py, "out[1]", o2.as_ref(), batch)?)
    } else {
        None
    };
    {
        let xr = Ro::new(x)?;
        let mr = mk.as_ref().map(Ro::new).transpose()?;
        let ar = acts.as_ref().map(Ro::new).transpose()?;
        let mut fw = fa.as_ref().map(|a| Rw::new(a, n1)).transpose()?;
        let mut fw2 = fb.as_ref().map(|a| Rw::new(a, "out[1]")).transpose()?;
        let mut iw = ia.as_ref().map(|a| Rw::new(a, n1)).transpose()?;
        let v1 = fw.as_mut().map(|w| Out::new(n1, w.view()));
        let v2 = fw2.as_mut().map(|w| Out::new("out[1]", w.view()));
        let vi = iw.as_mut().map(|w| Out::new(n1, w.view()));
        let mut co = CatOut::default();
        let mut pick = Pick::Nothing;
        match kind {
            CatKind::LogProb => co.log_prob = v1,
            CatKind::Entropy => co.entropy = v1,
            CatKind::LogProbEntropy => {
                co.log_prob = v1;
                co.entropy = v2;
            }
            CatKind::Score => co.score = v1,
            CatKind::Index(p) => {
                pick = p;
                co.index = vi;
            }
        }
        let lg = Logits {
            logits: xr.view(),
            mask: mr.as_ref().map(|m| m.view()),
            check_finite,
        };
        let av = ar.as_ref().map(|a| a.view());
        let mshape = mk.as_ref().map(|m| m.shape().to_vec()).unwrap_or_default();
        let ashape = acts
            .as_ref()
            .map(|a| a.shape().to_vec())
            .unwrap_or_default();
        let args = [
            ("logits", &shape[..], true),
            ("mask", &mshape[..], true),
            ("actions", &ashape[..], false),
        ];
        let loc = Locate { batch, args: &args };
        run(py, x.len(), move |par| {
            categorical::categorical(&lg, av, pick, co, par)
        })?
        .map_err(|e| loc.err(e))?;
    }
    Ok(match (fa, fb, ia) {
        (Some(a), Some(b), _) => pair(py, a.into_any(), b.into_any())?,
        (Some(a), None, _) => a.into_any(),
        (None, _, Some(i)) => i.into_any(),
        (None, _, None) => unreachable!("every kind has an output"),
    })
}

/// Log-probability of ``actions`` under a categorical over the last axis.
///
/// Per row, with masked-out logits counting as -inf and ``m`` the row's
/// largest allowed logit::
///
///     log p(a) = x_a - m - ln(sum_j exp(x_j - m))
///
/// float32 logits are accumulated in float64 and rounded once.
///
/// Args:
///     logits: ``[..., A]`` float32/float64, any strides.
///     actions: ``[...]`` integers in ``[0, A)``, any integer dtype.
///     mask: bool, broadcastable to ``logits``; True = allowed.
///     check_finite: reject NaN/inf allowed logits (default True).
///     out: ``[...]`` array of the logits' dtype to write into.
///
/// Returns:
///     ndarray ``[...]``.
///
/// Raises:
///     ShapeError: ``actions`` / ``mask`` / ``out`` shapes that do not line up.
///     InputError: an action out of range or masked out, an all-masked row,
///         a non-finite allowed logit (the message names the row).
///     TypeError: unsupported dtype, read-only or wrong-dtype ``out``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.categorical_log_prob(np.log([[0.25, 0.75]]), np.array([1]))
///     array([-0.28768207])
#[pyfunction]
#[pyo3(signature = (logits, actions, *, mask=None, check_finite=true, out=None))]
fn categorical_log_prob<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    actions: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = CatKind::LogProb;
    cat_call(py, logits, Some(actions), mask, check_finite, k, out)
}

/// Entropy of a categorical over the last axis, ``-sum_j p_j log p_j``.
///
/// Masked-out actions have probability 0 and contribute 0 (``0 * log 0 = 0``),
/// so a masked row's entropy is finite. Computed from one pass as
/// ``ln S - T / S`` with ``S = sum_j e^{z_j}``, ``T = sum_j e^{z_j} z_j`` and
/// ``z = x - max x``.
///
/// Args:
///     logits: ``[..., A]`` float32/float64.
///     mask: bool, broadcastable to ``logits``; True = allowed.
///     check_finite: reject NaN/inf allowed logits (default True).
///     out: ``[...]`` array to write into.
///
/// Returns:
///     ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError (all-masked row, non-finite logit), TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> float(rollscan.categorical_entropy(np.zeros(4))) == float(np.log(4))
///     True
#[pyfunction]
#[pyo3(signature = (logits, *, mask=None, check_finite=true, out=None))]
fn categorical_entropy<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    cat_call(py, logits, None, mask, check_finite, CatKind::Entropy, out)
}

/// ``(log_prob, entropy)`` of a categorical in one pass over the logits.
///
/// The same values as ``categorical_log_prob`` and ``categorical_entropy``.
///
/// Args:
///     logits, actions, mask, check_finite: as in ``categorical_log_prob``.
///     out: a tuple ``(log_prob_out, entropy_out)``.
///
/// Returns:
///     ``(log_prob, entropy)``, each ``[...]``.
///
/// Raises:
///     ShapeError, InputError, TypeError: as in ``categorical_log_prob``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> lp, h = rollscan.categorical_log_prob_entropy(np.zeros((2, 2)), np.array([0, 1]))
///     >>> lp, h
///     (array([-0.69314718, -0.69314718]), array([0.69314718, 0.69314718]))
#[pyfunction]
#[pyo3(signature = (logits, actions, *, mask=None, check_finite=true, out=None))]
fn categorical_log_prob_entropy<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    actions: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = CatKind::LogProbEntropy;
    cat_call(py, logits, Some(actions), mask, check_finite, k, out)
}

/// Score function ``d log p(actions) / d logits = onehot(actions) - softmax(logits)``.
///
/// Masked-out entries are 0.
///
/// Args:
///     logits, actions, mask, check_finite: as in ``categorical_log_prob``.
///     out: ``[..., A]`` array to write into.
///
/// Returns:
///     ndarray of the shape of ``logits``.
///
/// Raises:
///     ShapeError, InputError, TypeError: as in ``categorical_log_prob``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.categorical_score(np.zeros(4), np.array(2))
///     array([-0.25, -0.25,  0.75, -0.25])
#[pyfunction]
#[pyo3(signature = (logits, actions, *, mask=None, check_finite=true, out=None))]
fn categorical_score<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    actions: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = CatKind::Score;
    cat_call(py, logits, Some(actions), mask, check_finite, k, out)
}

/// One sample per row (int64), drawn from the counter-based stream ``(seed, row)``.
///
/// Inverse CDF on one uniform draw per row: row ``i`` (in C order of the
/// batch axes) always gets the same draw for the same ``seed``, whatever the
/// thread count, and a prefix of a batch samples what the whole batch does.
/// Masked-out actions are never drawn.
///
/// Args:
///     logits: ``[..., A]`` float32/float64.
///     seed: int in ``[0, 2**64)``.
///     mask, check_finite: as in ``categorical_log_prob``.
///     out: ``[...]`` int64 array to write into.
///
/// Returns:
///     int64 ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError (all-masked row, non-finite logit, bad seed), TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> only_1 = np.array([False, True, False])
///     >>> rollscan.categorical_sample(np.zeros((3, 3)), seed=7, mask=only_1)
///     array([1, 1, 1])
#[pyfunction]
#[pyo3(signature = (logits, *, seed, mask=None, check_finite=true, out=None))]
fn categorical_sample<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    seed: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = CatKind::Index(Pick::Sample(seed_arg(seed)?));
    cat_call(py, logits, None, mask, check_finite, k, out)
}

/// The most likely allowed action per row (int64; the first on ties).
///
/// Args:
///     logits, mask, check_finite: as in ``categorical_log_prob``.
///     out: ``[...]`` int64 array to write into.
///
/// Returns:
///     int64 ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError (all-masked row, non-finite logit), TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.categorical_mode(np.array([[1.0, 3.0, 3.0]]), mask=np.array([True, False, True]))
///     array([2])
#[pyfunction]
#[pyo3(signature = (logits, *, mask=None, check_finite=true, out=None))]
fn categorical_mode<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = CatKind::Index(Pick::Mode);
    cat_call(py, logits, None, mask, check_finite, k, out)
}

/// ``KL(p || q)`` of two categoricals given by their logits (last axis).
///
/// ``sum_j p_j (log p_j - log q_j)``, computed per row as
/// ``(1/S_p) sum_j e^{zp_j} (zp_j - zq_j) + ln S_q - ln S_p``: exactly 0 for
/// equal logits, never negative. The mask applies to both distributions.
///
/// Args:
///     logits_p, logits_q: ``[..., A]`` of the same shape (mixed float32 /
///         float64 promote to float64).
///     mask: bool, broadcastable to the logits; True = allowed.
///     check_finite: reject NaN/inf allowed logits (default True).
///     out: ``[...]`` array to write into.
///
/// Returns:
///     ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> p, q = np.log([[0.5, 0.5]]), np.log([[0.25, 0.75]])
///     >>> rollscan.categorical_kl(p, q)
///     array([0.14384104])
#[pyfunction]
#[pyo3(signature = (logits_p, logits_q, *, mask=None, check_finite=true, out=None))]
fn categorical_kl<'py>(
    py: Python<'py>,
    logits_p: &Any<'py>,
    logits_q: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let mk = some(mask).map(|m| as_flags(py, "mask", m)).transpose()?;
    let fl = promote_floats(
        py,
        &[("logits_p", Some(logits_p)), ("logits_q", Some(logits_q))],
    )?;
    match fl {
        Floats::F32(v) => kl_typed(py, &v, mk, check_finite, out),
        Floats::F64(v) => kl_typed(py, &v, mk, check_finite, out),
    }
}

fn kl_typed<'py, F: Real + Element>(
    py: Python<'py>,
    v: &[Option<Bound<'py, PyArrayDyn<F>>>],
    mk: Option<Bound<'py, PyArrayDyn<bool>>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let (p, q) = (v[0].as_ref().expect("p"), v[1].as_ref().expect("q"));
    let shape = p.shape().to_vec();
    let batch = batch_of("logits_p", &shape)?;
    let arr = out_array::<F>(py, "out", some(out), batch)?;
    {
        let (pr, qr) = (Ro::new(p)?, Ro::new(q)?);
        let mr = mk.as_ref().map(Ro::new).transpose()?;
        let mut w = Rw::new(&arr, "out")?;
        let lg = Logits {
            logits: pr.view(),
            mask: mr.as_ref().map(|m| m.view()),
            check_finite,
        };
        let qv = qr.view();
        let o = Out::new("out", w.view());
        let mshape = mk.as_ref().map(|m| m.shape().to_vec()).unwrap_or_default();
        let args = [
            ("logits_p", &shape[..], true),
            ("logits_q", q.shape(), true),
            ("mask", &mshape[..], true),
        ];
        let loc = Locate { batch, args: &args };
        run(py, 2 * p.len(), move |par| {
            categorical::categorical_kl(&lg, qv, o, par)
        })?
        .map_err(|e| loc.err(e))?;
    }
    Ok(arr.into_any())
}

// ------------------------------------------------------------------- gaussian

/// A `log_std` is shared (state-independent) when no batch axis is longer
/// than 1; it is then read as float64 and does not take part in promotion.
fn is_shared(shape: &[usize]) -> bool {
    shape.len() <= 1 || shape[..shape.len() - 1].iter().all(|&n| n == 1)
}

#[derive(Clone, Copy, PartialEq)]
enum GKind {
    LogProb,
    LogProbEntropy,
    Score,
    Sample(u64),
    SquashedLogProb,
    SquashedSample(u64),
}

impl GKind {
    fn two_outputs(self) -> bool {
        matches!(
            self,
            GKind::LogProbEntropy | GKind::Score | GKind::SquashedSample(_)
        )
    }
    fn first_per_row(self) -> bool {
        matches!(
            self,
            GKind::LogProb | GKind::LogProbEntropy | GKind::SquashedLogProb
        )
    }
}

/// A log_std argument: shared values, or the index of its promoted array.
struct LsArg {
    shape: Vec<usize>,
    shared: Option<Vec<f64>>,
}

fn ls_arg(py: Python<'_>, name: &str, obj: &Any<'_>) -> PyResult<LsArg> {
    let a = super::convert::ndarray(py, name, obj)?;
    let shape = a.shape().to_vec();
    let shared = if is_shared(&shape) {
        Some(small_values(py, name, obj)?.1)
    } else {
        None
    };
    Ok(LsArg { shape, shared })
}

fn log_std_of<'v, F: Element>(a: &LsArg, v: Option<&'v Ro<'_, F>>) -> LogStd<'v, F> {
    match (&a.shared, v) {
        (Some(s), _) => LogStd::Shared(s.clone()),
        (None, Some(v)) => LogStd::PerRow(v.view()),
        (None, None) => unreachable!("a per-row log_std is promoted with the means"),
    }
}

#[allow(clippy::too_many_arguments)]
fn gauss_call<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    actions: Option<&Any<'py>>,
    pre_squash: Option<&Any<'py>>,
    bounds: Option<(&Any<'py>, &Any<'py>)>,
    check_finite: bool,
    kind: GKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let ls = ls_arg(py, "log_std", log_std)?;
    let ls_obj = if ls.shared.is_none() {
        Some(log_std)
    } else {
        None
    };
    let fl = promote_floats(
        py,
        &[
            ("mean", Some(mean)),
            ("actions", actions),
            ("pre_squash", some(pre_squash)),
            ("log_std", ls_obj),
        ],
    )?;
    let bounds = match bounds {
        None => None,
        Some((lo, hi)) => {
            let d = super::convert::ndarray(py, "mean", mean)?
                .shape()
                .last()
                .copied()
                .unwrap_or(0);
            let lo = bound_values(py, "low", lo)?;
            let hi = bound_values(py, "high", hi)?;
            Some(Bounds::new(&lo, &hi, d).map_err(super::errors::core_err)?)
        }
    };
    match fl {
        Floats::F32(v) => gauss_typed(py, &v, &ls, bounds.as_ref(), check_finite, kind, out),
        Floats::F64(v) => gauss_typed(py, &v, &ls, bounds.as_ref(), check_finite, kind, out),
    }
}

/// `low` / `high`: the given value, or the default when omitted or None.
fn bound_or<'py>(py: Python<'py>, v: Option<&Any<'py>>, default: f64) -> PyResult<Any<'py>> {
    match some(v) {
        Some(v) => Ok(v.clone()),
        None => Ok(default.into_pyobject(py)?.into_any()),
    }
}

fn bound_values(py: Python<'_>, name: &str, obj: &Any<'_>) -> PyResult<Vec<f64>> {
    if let Ok(v) = obj.extract::<f64>() {
        return Ok(vec![v]);
    }
    let (shape, v) = small_values(py, name, obj)?;
    if shape.len() > 1 {
        return Err(ShapeError::new_err(format!(
            "{name} must be a number or 1-D (one bound per action dimension), got shape {}",
            fmt_shape(&shape)
        )));
    }
    Ok(v)
}

fn gauss_typed<'py, F: Real + Element>(
    py: Python<'py>,
    v: &[Option<Bound<'py, PyArrayDyn<F>>>],
    ls: &LsArg,
    bounds: Option<&Bounds>,
    check_finite: bool,
    kind: GKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let mean = v[0].as_ref().expect("mean");
    let shape = mean.shape().to_vec();
    let batch = batch_of("mean", &shape)?;
    let two = kind.two_outputs();
    let (o1, o2) = if two {
        out_pair(out)?
    } else {
        (some(out).cloned(), None)
    };
    let n1 = if two { "out[0]" } else { "out" };
    let s1 = if kind.first_per_row() {
        batch
    } else {
        &shape[..]
    };
    let a1 = out_array::<F>(py, n1, o1.as_ref(), s1)?;
    let a2 = if two {
        let s2 = if kind == GKind::LogProbEntropy {
            batch
        } else {
            &shape[..]
        };
        Some(out_array::<F>(py, "out[1]", o2.as_ref(), s2)?)
    } else {
        None
    };
    {
        let ro = v
            .iter()
            .map(|a| a.as_ref().map(Ro::new).transpose())
            .collect::<PyResult<Vec<_>>>()?;
        let mut w1 = Rw::new(&a1, n1)?;
        let mut w2 = a2.as_ref().map(|a| Rw::new(a, "out[1]")).transpose()?;
        let o1 = Out::new(n1, w1.view());
        let o2 = w2.as_mut().map(|w| Out::new("out[1]", w.view()));
        let nrm = Normal {
            mean: ro[0].as_ref().expect("mean").view(),
            log_std: log_std_of(ls, ro[3].as_ref()),
            check_finite,
        };
        let act = ro[1].as_ref().map(|a| a.view());
        let pre = ro[2].as_ref().map(|a| a.view());
        let args = [
            ("mean", &shape[..], true),
            ("log_std", &ls.shape[..], true),
            ("actions", &shape[..], true),
            ("pre_squash", &shape[..], true),
        ];
        let loc = Locate { batch, args: &args };
        let bounds = bounds.cloned();
        let mut go = GaussOut::default();
        match kind {
            GKind::LogProb | GKind::SquashedLogProb => go.log_prob = Some(o1),
            GKind::LogProbEntropy => {
                go.log_prob = Some(o1);
                go.entropy = o2;
            }
            GKind::Score => {
                go.d_mean = Some(o1);
                go.d_log_std = o2;
            }
            GKind::Sample(_) => go.sample = Some(o1),
            GKind::SquashedSample(_) => {
                go.sample = Some(o1);
                go.pre_squash = o2;
            }
        }
        let seed = match kind {
            GKind::Sample(s) | GKind::SquashedSample(s) => Some(s),
            _ => None,
        };
        run(py, mean.len(), move |par| match &bounds {
            None => gaussian::gaussian(&nrm, act, seed, go, par),
            Some(b) => squashed::squashed(&nrm, act, pre, seed, b, go, par),
        })?
        .map_err(|e| loc.err(e))?;
    }
    Ok(match a2 {
        Some(a2) => pair(py, a1.into_any(), a2.into_any())?,
        None => a1.into_any(),
    })
}

/// Log-density of a diagonal Gaussian, summed over the last axis.
///
/// ::
///
///     log p(a) = sum_j ( -z_j^2 / 2 - log_std_j ) - D ln(2 pi) / 2,
///     z_j = (a_j - mean_j) * exp(-log_std_j)
///
/// ``log_std`` is either per sample (broadcastable to ``mean``) or
/// state-independent (``[D]``, or only length-1 batch axes), which is read
/// in place without being broadcast and does not take part in dtype
/// promotion. float32 inputs are accumulated in float64 and rounded once.
///
/// Args:
///     mean: ``[..., D]`` float32/float64.
///     log_std: broadcastable to ``mean`` (for example ``[D]``).
///     actions: ``[..., D]``, the shape of ``mean``.
///     check_finite: reject NaN/inf means, log-stds and actions (default True).
///     out: ``[...]`` array to write into.
///
/// Returns:
///     ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError (non-finite values, naming the element), TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.gaussian_log_prob(np.zeros(2), np.zeros(2), np.zeros(2))
///     array(-1.83787707)
#[pyfunction]
#[pyo3(signature = (mean, log_std, actions, *, check_finite=true, out=None))]
fn gaussian_log_prob<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    actions: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = GKind::LogProb;
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        None,
        None,
        check_finite,
        k,
        out,
    )
}

/// ``(log_prob, entropy)`` of a diagonal Gaussian in one pass.
///
/// The values of ``gaussian_log_prob`` and ``gaussian_entropy``.
///
/// Args:
///     mean, log_std, actions, check_finite: as in ``gaussian_log_prob``.
///     out: a tuple ``(log_prob_out, entropy_out)``.
///
/// Returns:
///     ``(log_prob, entropy)``, each ``[...]``.
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.gaussian_log_prob_entropy(np.zeros((1, 1)), np.zeros(1), np.ones((1, 1)))
///     (array([-1.41893853]), array([1.41893853]))
#[pyfunction]
#[pyo3(signature = (mean, log_std, actions, *, check_finite=true, out=None))]
fn gaussian_log_prob_entropy<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    actions: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = GKind::LogProbEntropy;
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        None,
        None,
        check_finite,
        k,
        out,
    )
}

/// Score function of a diagonal Gaussian: ``(d_mean, d_log_std)``.
///
/// ::
///
///     d_mean    = (a - mean) / sigma^2
///     d_log_std = (a - mean)^2 / sigma^2 - 1,     sigma = exp(log_std)
///
/// Args:
///     mean, log_std, actions, check_finite: as in ``gaussian_log_prob``.
///     out: a tuple of two ``[..., D]`` arrays.
///
/// Returns:
///     ``(d_mean, d_log_std)``, each of the shape of ``mean``.
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.gaussian_score(np.zeros(2), np.log([1.0, 2.0]), np.array([1.0, 1.0]))
///     (array([1.  , 0.25]), array([ 0.  , -0.75]))
#[pyfunction]
#[pyo3(signature = (mean, log_std, actions, *, check_finite=true, out=None))]
fn gaussian_score<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    actions: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = GKind::Score;
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        None,
        None,
        check_finite,
        k,
        out,
    )
}

/// ``mean + exp(log_std) * N(0, 1)``, row ``i`` from the stream ``(seed, i)``.
///
/// Standard normals come from Box-Muller on a counter-based generator keyed
/// by ``(seed, row)``: identical for any thread count or batch split, and
/// the same draws ``squashed_gaussian_sample`` squashes.
///
/// Args:
///     mean: ``[..., D]`` float32/float64.
///     log_std: broadcastable to ``mean``.
///     seed: int in ``[0, 2**64)``.
///     check_finite: reject NaN/inf means and log-stds (default True).
///     out: ``[..., D]`` array to write into.
///
/// Returns:
///     ndarray of the shape of ``mean``.
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> a = rollscan.gaussian_sample(np.zeros((2, 3)), np.full(3, -50.0), seed=0)
///     >>> bool(np.all(np.abs(a) < 1e-15))
///     True
#[pyfunction]
#[pyo3(signature = (mean, log_std, *, seed, check_finite=true, out=None))]
fn gaussian_sample<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    seed: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = GKind::Sample(seed_arg(seed)?);
    gauss_call(py, mean, log_std, None, None, None, check_finite, k, out)
}

/// Log-density of a tanh-squashed diagonal Gaussian on ``[low, high]``.
///
/// With ``a = low + (high - low) * (tanh(u) + 1) / 2`` and ``u ~ N(mean, std)``::
///
///     log p(a) = log N(u) - sum_j [ ln((high - low) / 2) + ln(1 - tanh(u_j)^2) ]
///     ln(1 - tanh(u)^2) = 2 (ln 2 - u - softplus(-2u))      (stable form)
///
/// ``u`` is ``pre_squash`` when given (use it where ``tanh`` saturates in
/// floating point), else the inverse of ``actions`` computed as
/// ``(ln(a - low) - ln(high - a)) / 2``. An action exactly on a bound has
/// log-density -inf (the limit).
///
/// Args:
///     mean, log_std: as in ``gaussian_log_prob``.
///     actions: ``[..., D]`` in ``[low, high]``.
///     low, high: numbers or ``[D]`` arrays, ``low < high`` (default -1, 1).
///     pre_squash: ``[..., D]``, the ``u`` behind ``actions``.
///     check_finite: reject NaN/inf inputs (default True).
///     out: ``[...]`` array to write into.
///
/// Returns:
///     ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError (an action outside ``[low, high]``, non-finite
///         values, bad bounds), TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.squashed_gaussian_log_prob(np.zeros(1), np.zeros(1), np.zeros(1))
///     array(-0.91893853)
#[pyfunction]
#[pyo3(
    signature = (mean, log_std, actions, *, low=None, high=None, pre_squash=None, check_finite=true, out=None),
    text_signature = "(mean, log_std, actions, *, low=-1.0, high=1.0, pre_squash=None, check_finite=True, out=None)"
)]
#[allow(clippy::too_many_arguments)]
fn squashed_gaussian_log_prob<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    actions: &Any<'py>,
    low: Option<&Any<'py>>,
    high: Option<&Any<'py>>,
    pre_squash: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = GKind::SquashedLogProb;
    let (lo, hi) = (bound_or(py, low, -1.0)?, bound_or(py, high, 1.0)?);
    let b = Some((&lo, &hi));
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        pre_squash,
        b,
        check_finite,
        k,
        out,
    )
}

/// ``(actions, pre_squash)`` sampled from the tanh-squashed Gaussian.
///
/// ``pre_squash`` is exactly ``gaussian_sample(mean, log_std, seed=seed)``;
/// ``actions = low + (high - low) / (1 + exp(-2 u))``, clipped into ``[low, high]``.
///
/// Args:
///     mean, log_std, seed, check_finite: as in ``gaussian_sample``.
///     low, high: numbers or ``[D]`` arrays, ``low < high`` (default -1, 1).
///     out: a tuple of two ``[..., D]`` arrays.
///
/// Returns:
///     ``(actions, pre_squash)``, each of the shape of ``mean``.
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> a, u = rollscan.squashed_gaussian_sample(np.zeros(3), np.zeros(3), seed=1, low=0.0, high=2.0)
///     >>> bool(np.all((0 <= a) & (a <= 2))), bool(np.allclose(a, 1 + np.tanh(u)))
///     (True, True)
#[pyfunction]
#[pyo3(
    signature = (mean, log_std, *, seed, low=None, high=None, check_finite=true, out=None),
    text_signature = "(mean, log_std, *, seed, low=-1.0, high=1.0, check_finite=True, out=None)"
)]
#[allow(clippy::too_many_arguments)]
fn squashed_gaussian_sample<'py>(
    py: Python<'py>,
    mean: &Any<'py>,
    log_std: &Any<'py>,
    seed: &Any<'py>,
    low: Option<&Any<'py>>,
    high: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let k = GKind::SquashedSample(seed_arg(seed)?);
    let (lo, hi) = (bound_or(py, low, -1.0)?, bound_or(py, high, 1.0)?);
    let b = Some((&lo, &hi));
    gauss_call(py, mean, log_std, None, None, b, check_finite, k, out)
}

/// Entropy of a diagonal Gaussian: ``sum_j log_std_j + D (1 + ln 2 pi) / 2``.
///
/// Args:
///     log_std: ``[..., D]`` float32/float64.
///     check_finite: reject NaN/inf (default True).
///     out: ``[...]`` array to write into.
///
/// Returns:
///     ndarray ``[...]`` (0-d for a ``[D]`` input).
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.gaussian_entropy(np.zeros((2, 1)))
///     array([1.41893853, 1.41893853])
#[pyfunction]
#[pyo3(signature = (log_std, *, check_finite=true, out=None))]
fn gaussian_entropy<'py>(
    py: Python<'py>,
    log_std: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    match promote_floats(py, &[("log_std", Some(log_std))])? {
        Floats::F32(v) => entropy_typed(py, v[0].as_ref().expect("log_std"), check_finite, out),
        Floats::F64(v) => entropy_typed(py, v[0].as_ref().expect("log_std"), check_finite, out),
    }
}

fn entropy_typed<'py, F: Real + Element>(
    py: Python<'py>,
    ls: &Bound<'py, PyArrayDyn<F>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let shape = ls.shape().to_vec();
    let batch = batch_of("log_std", &shape)?;
    let arr = out_array::<F>(py, "out", some(out), batch)?;
    {
        let r = Ro::new(ls)?;
        let mut w = Rw::new(&arr, "out")?;
        let (x, o) = (r.view(), Out::new("out", w.view()));
        let args = [("log_std", &shape[..], true)];
        let loc = Locate { batch, args: &args };
        run(py, ls.len(), move |par| {
            gaussian::gaussian_entropy(x, check_finite, o, par)
        })?
        .map_err(|e| loc.err(e))?;
    }
    Ok(arr.into_any())
}

/// ``KL(p || q)`` of two diagonal Gaussians, summed over the last axis.
///
/// Per dimension ``ln(s_q / s_p) + (s_p^2 + (m_p - m_q)^2) / (2 s_q^2) - 1/2``,
/// evaluated as ``(expm1(-2d) + 2d) / 2 + ((m_p - m_q) / s_q)^2 / 2`` with
/// ``d = log_std_q - log_std_p``: never negative, exactly 0 for ``p = q``.
///
/// Args:
///     mean_p, mean_q: ``[..., D]`` of the same shape.
///     log_std_p, log_std_q: each broadcastable to the means (or ``[D]``).
///     check_finite: reject NaN/inf (default True).
///     out: ``[...]`` array to write into.
///
/// Returns:
///     ndarray ``[...]``.
///
/// Raises:
///     ShapeError, InputError, TypeError.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.gaussian_kl(np.zeros(1), np.zeros(1), np.ones(1), np.zeros(1))
///     array(0.5)
#[pyfunction]
#[pyo3(signature = (mean_p, log_std_p, mean_q, log_std_q, *, check_finite=true, out=None))]
fn gaussian_kl<'py>(
    py: Python<'py>,
    mean_p: &Any<'py>,
    log_std_p: &Any<'py>,
    mean_q: &Any<'py>,
    log_std_q: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let lp = ls_arg(py, "log_std_p", log_std_p)?;
    let lq = ls_arg(py, "log_std_q", log_std_q)?;
    let fl = promote_floats(
        py,
        &[
            ("mean_p", Some(mean_p)),
            ("mean_q", Some(mean_q)),
            ("log_std_p", lp.shared.is_none().then_some(log_std_p)),
            ("log_std_q", lq.shared.is_none().then_some(log_std_q)),
        ],
    )?;
    match fl {
        Floats::F32(v) => gkl_typed(py, &v, &lp, &lq, check_finite, out),
        Floats::F64(v) => gkl_typed(py, &v, &lp, &lq, check_finite, out),
    }
}

fn gkl_typed<'py, F: Real + Element>(
    py: Python<'py>,
    v: &[Option<Bound<'py, PyArrayDyn<F>>>],
    lp: &LsArg,
    lq: &LsArg,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let mp = v[0].as_ref().expect("mean_p");
    let shape = mp.shape().to_vec();
    let batch = batch_of("mean_p", &shape)?;
    let arr = out_array::<F>(py, "out", some(out), batch)?;
    {
        let ro = v
            .iter()
            .map(|a| a.as_ref().map(Ro::new).transpose())
            .collect::<PyResult<Vec<_>>>()?;
        let mut w = Rw::new(&arr, "out")?;
        let o = Out::new("out", w.view());
        let p = Normal {
            mean: ro[0].as_ref().expect("mean_p").view(),
            log_std: log_std_of(lp, ro[2].as_ref()),
            check_finite,
        };
        let q = Normal {
            mean: ro[1].as_ref().expect("mean_q").view(),
            log_std: log_std_of(lq, ro[3].as_ref()),
            check_finite,
        };
        let mq_shape = v[1].as_ref().expect("mean_q").shape().to_vec();
        let args = [
            ("mean_p", &shape[..], true),
            ("mean_q", &mq_shape[..], true),
            ("log_std_p", &lp.shape[..], true),
            ("log_std_q", &lq.shape[..], true),
        ];
        let loc = Locate { batch, args: &args };
        run(py, 2 * mp.len(), move |par| {
            gaussian::gaussian_kl(&p, &q, o, par)
        })?
        .map_err(|e| loc.err(e))?;
    }
    Ok(arr.into_any())
}

pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(categorical_log_prob, m)?)?;
    m.add_function(wrap_pyfunction!(categorical_entropy, m)?)?;
    m.add_function(wrap_pyfunction!(categorical_log_prob_entropy, m)?)?;
    m.add_function(wrap_pyfunction!(categorical_kl, m)?)?;
    m.add_function(wrap_pyfunction!(categorical_score, m)?)?;
    m.add_function(wrap_pyfunction!(categorical_sample, m)?)?;
    m.add_function(wrap_pyfunction!(categorical_mode, m)?)?;
    m.add_function(wrap_pyfunction!(gaussian_log_prob, m)?)?;
    m.add_function(wrap_pyfunction!(gaussian_entropy, m)?)?;
    m.add_function(wrap_pyfunction!(gaussian_log_prob_entropy, m)?)?;
    m.add_function(wrap_pyfunction!(gaussian_kl, m)?)?;
    m.add_function(wrap_pyfunction!(gaussian_score, m)?)?;
    m.add_function(wrap_pyfunction!(gaussian_sample, m)?)?;
    m.add_function(wrap_pyfunction!(squashed_gaussian_log_prob, m)?)?;
    m.add_function(wrap_pyfunction!(squashed_gaussian_sample, m)?)?;
    Ok(())
}
