//! `clipped_surrogate`, `vtrace`, and the private per-batch kernels behind
//! the streaming classes of `rollscan.streaming` (`RunningMoments`,
//! `ReturnScaler`, `EpisodeTracker`).

use super::convert::{as_flags, out_array, out_pair, promote_floats, Floats};
use super::errors::{core_err_at, fmt_index, internal_error, overlap_err, unravel, ShapeError};
use super::returns::{run_time_major, Borrowed, TimeMajorArgs};
use super::threads::run;
use crate::core::error::fmt_shape;
use crate::core::policy::{self, at_least_1d};
use crate::core::running::{self, ScalerParams, ScalerState, TrackerState, VecMoments};
use crate::core::vtrace::{self as vtrace_core, VtraceParams};
use crate::core::{At, Real};
use ndarray::{ArrayD, ArrayView2, ArrayViewD, Ix2, IxDyn};
use numpy::prelude::*;
use numpy::{Element, PyArray1, PyArrayDyn, PyReadonlyArray1, PyReadonlyArrayDyn};
use pyo3::prelude::*;
use pyo3::types::PyTuple;

fn some<'a, 'py>(o: Option<&'a Bound<'py, PyAny>>) -> Option<&'a Bound<'py, PyAny>> {
    o.filter(|o| !o.is_none())
}

/// Index text in the caller's shape: flat indices are unravelled (row-major),
/// `[T, M]` positions printed as `[t, m]`.
fn locate_in(shape: &[usize]) -> impl Fn(At) -> String + '_ {
    move |at| match at {
        At::Flat(i) => fmt_index(&unravel(i, shape)),
        At::TimeStream(t, m) => fmt_index(&[t, m]),
        At::RowCol(i, j) => fmt_index(&[i, j]),
    }
}

fn same_shape(name: &str, s: &[usize], other: &str, want: &[usize]) -> PyResult<()> {
    if s != want {
        return Err(ShapeError::new_err(format!(
            "{name} has shape {} but {other} has shape {}; they must have the same shape",
            fmt_shape(s),
            fmt_shape(want)
        )));
    }
    Ok(())
}

// ---------------------------------------------------------------------------
// clipped_surrogate
// ---------------------------------------------------------------------------

/// The result of ``clipped_surrogate``: the loss, its gradient with respect
/// to ``new_log_prob``, and diagnostics (all means over the selected elements).
#[pyclass(frozen, module = "rollscan", get_all)]
pub struct SurrogateResult {
    /// ``-mean(min(r * A, clip(r, 1 - clip, 1 + clip) * A))``.
    loss: f64,
    /// ``d loss / d new_log_prob`` per element (0 where masked out or where
    /// the clipped term is the minimum).
    grad: Py<PyAny>,
    /// Fraction of selected elements with ``|r - 1| > clip``.
    clip_fraction: f64,
    /// ``mean((r - 1) - log r)``, >= 0.
    approx_kl: f64,
    /// ``mean(r)``.
    ratio_mean: f64,
    /// ``max(r)``.
    ratio_max: f64,
    /// Number of selected elements.
    count: usize,
}

#[pymethods]
impl SurrogateResult {
    fn __repr__(&self) -> String {
        format!(
            "SurrogateResult(loss={}, clip_fraction={}, approx_kl={}, ratio_mean={}, ratio_max={}, count={})",
            self.loss, self.clip_fraction, self.approx_kl, self.ratio_mean, self.ratio_max, self.count
        )
    }
}

/// Clipped surrogate loss of a policy update (Schulman et al. 2017, eq. 7),
/// its gradient with respect to ``new_log_prob``, and diagnostics, in one pass.
///
/// Per selected element, with ``r = exp(new_log_prob - old_log_prob)``::
///
///     loss          = -mean(min(r * A, clip(r, 1 - clip, 1 + clip) * A))
///     grad          = -r * A / n   where r * A <= clip(r, ...) * A, else 0
///     clip_fraction = mean(|r - 1| > clip)
///     approx_kl     = mean((r - 1) - log r)
///     ratio_mean    = mean(r),  ratio_max = max(r)
///
/// ``n`` is the number of selected elements (``mask`` True; all when None);
/// masked-out elements are excluded from every mean and get zero gradient.
/// ``grad`` chains with the score functions (``d log p / d params``) for a
/// trainer without autograd. Sums are accumulated in float64 over fixed
/// blocks: bit-identical for any thread count.
///
/// Args:
///     new_log_prob: log-probabilities of the taken actions under the policy
///         being updated (any shape).
///     old_log_prob: the same under the policy that collected the data.
///     advantages: advantage estimates, same shape.
///     clip: clip range (>= 0, default 0.2).
///     mask: bool array of the same shape, True = element counts.
///     check_finite: reject NaN/inf inputs (default True).
///     out: array for ``grad`` (shape and dtype of the inputs).
///
/// Returns:
///     SurrogateResult with ``loss``, ``grad``, ``clip_fraction``,
///     ``approx_kl``, ``ratio_mean``, ``ratio_max``, ``count``.
///
/// Raises:
///     ShapeError: inputs or mask of different shapes.
///     InputError: NaN/inf inputs, clip < 0, no element selected.
///     TypeError: unsupported dtype, read-only ``out``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> res = rollscan.clipped_surrogate(np.log([1.0, 1.5]), np.zeros(2), np.array([1.0, 1.0]))
///     >>> round(res.loss, 6), res.clip_fraction
///     (-1.1, 0.5)
///     >>> res.grad
///     array([-0.5,  0. ])
#[pyfunction]
#[pyo3(signature = (new_log_prob, old_log_prob, advantages, *, clip=0.2, mask=None, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
pub fn clipped_surrogate<'py>(
    py: Python<'py>,
    new_log_prob: &Bound<'py, PyAny>,
    old_log_prob: &Bound<'py, PyAny>,
    advantages: &Bound<'py, PyAny>,
    clip: f64,
    mask: Option<&Bound<'py, PyAny>>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<SurrogateResult> {
    let floats = promote_floats(
        py,
        &[
            ("new_log_prob", Some(new_log_prob)),
            ("old_log_prob", Some(old_log_prob)),
            ("advantages", Some(advantages)),
        ],
    )?;
    let mask = some(mask).map(|m| as_flags(py, "mask", m)).transpose()?;
    match floats {
        Floats::F32(f) => surrogate_impl(py, f, mask, clip, check_finite, some(out)),
        Floats::F64(f) => surrogate_impl(py, f, mask, clip, check_finite, some(out)),
    }
}

fn surrogate_impl<'py, F: Element + Real>(
    py: Python<'py>,
    f: Vec<Option<Bound<'py, PyArrayDyn<F>>>>,
    mask: Option<Bound<'py, PyArrayDyn<bool>>>,
    clip: f64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<SurrogateResult> {
    let [nl, ol, ad]: [Bound<'py, PyArrayDyn<F>>; 3] = f
        .into_iter()
        .flatten()
        .collect::<Vec<_>>()
        .try_into()
        .map_err(|_| internal_error("surrogate arguments missing"))?;
    let shape = nl.shape().to_vec();
    same_shape("old_log_prob", ol.shape(), "new_log_prob", &shape)?;
    same_shape("advantages", ad.shape(), "new_log_prob", &shape)?;
    if let Some(m) = &mask {
        same_shape("mask", m.shape(), "new_log_prob", &shape)?;
    }
    let grad = out_array::<F>(py, "out", out, &shape)?;
    let s = {
        let (rn, ro, ra) = (nl.try_readonly()?, ol.try_readonly()?, ad.try_readonly()?);
        let rm = mask.as_ref().map(|m| m.try_readonly()).transpose()?;
        let mut gw = grad.try_readwrite().map_err(|e| overlap_err("out", e))?;
        let (vn, vo, va) = (
            at_least_1d(rn.as_array()),
            at_least_1d(ro.as_array()),
            at_least_1d(ra.as_array()),
        );
        let vm = rm.as_ref().map(|m| at_least_1d(m.as_array()));
        let mut g = gw.as_array_mut();
        if g.ndim() == 0 {
            g.insert_axis_inplace(ndarray::Axis(0));
        }
        // One block: stay on this thread (waking the pool costs more).
        let work = if policy::splits(vn.shape()) {
            4 * shape.iter().product::<usize>()
        } else {
            0
        };
        run(py, work, |par| {
            policy::clipped_surrogate(vn, vo, va, vm, clip, check_finite, g, par)
        })?
        .map_err(|e| core_err_at(e, &locate_in(&shape)))?
    };
    Ok(SurrogateResult {
        loss: s.loss,
        grad: grad.into_any().unbind(),
        clip_fraction: s.clip_fraction,
        approx_kl: s.approx_kl,
        ratio_mean: s.ratio_mean,
        ratio_max: s.ratio_max,
        count: s.count,
    })
}

// ---------------------------------------------------------------------------
// vtrace
// ---------------------------------------------------------------------------

/// V-trace targets and policy-gradient advantages (Espeholt et al. 2018,
/// section 4.1), time-major, with the episode-end rules of ``gae``.
///
/// Per stream (every axis other than ``time_axis``), from the last step
/// backwards, with ``ratio_t = exp(target_log_prob_t - behaviour_log_prob_t)``::
///
///     rho_t   = min(rho_bar, ratio_t),   c_t = lam * min(c_bar, ratio_t)
///     V'_t    = 0 if terminated[t]; next_values[t] if given;
///               values[t+1] if t < T-1; bootstrap at t = T-1
///     delta_t = rho_t * (r_t + gamma * V'_t - values[t])
///     vs_t    = values[t] + delta_t
///               + gamma * c_t * (1 - end_t) * (vs_{t+1} - values[t+1])
///     pg_t    = rho_t * (r_t + gamma * vnext_t - values[t])
///     vnext_t = vs_{t+1} inside an episode, V'_t at an end or the last row
///
/// where ``end_t = terminated[t] or truncated[t]``. On-policy with
/// ``rho_bar = c_bar = 1``, ``vs`` equals the ``returns`` of
/// ``gae(..., lam=lam)``. float32 inputs are accumulated in float64 and
/// rounded once.
///
/// Args:
///     behaviour_log_prob: ``[T, ...]`` log mu(a_t | s_t) of the policy that
///         collected the data.
///     target_log_prob: ``[T, ...]`` log pi(a_t | s_t) of the policy being
///         evaluated.
///     rewards, values: ``[T, ...]`` per-step arrays.
///     terminated, truncated: per-step bool flags (truncated needs next_values).
///     gamma: discount in [0, 1].
///     bootstrap: V of the state after the last row (per stream or scalar);
///         not with ``next_values``.
///     rho_bar, c_bar: truncation levels (>= 0, ``inf`` for none; default 1).
///     lam: trace coefficient in [0, 1] (default 1).
///     next_values: per-step V(s_{t+1}); its last row is the bootstrap.
///     time_axis: the time axis (default 0).
///     check_finite: reject NaN/inf inputs (default True).
///     out: tuple ``(vs, pg_advantages)`` of arrays to write into.
///
/// Returns:
///     ``(vs, pg_advantages)``, each of the shape of ``rewards``.
///
/// Raises:
///     ShapeError: shapes that do not line up.
///     InputError: NaN/inf, gamma or lam outside [0, 1], negative rho_bar or
///         c_bar, truncated without next_values, bootstrap together with
///         next_values.
///     TypeError: unsupported dtype, read-only ``out``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> lp = np.log(np.array([0.5, 0.5]))
///     >>> vs, pg = rollscan.vtrace(lp, lp, np.array([1.0, 1.0]), np.array([0.0, 0.0]),
///     ...                          np.array([False, True]), gamma=0.5)
///     >>> vs, pg
///     (array([1.5, 1. ]), array([1.5, 1. ]))
#[pyfunction]
#[pyo3(signature = (behaviour_log_prob, target_log_prob, rewards, values, terminated=None, *, gamma, bootstrap=None, rho_bar=1.0, c_bar=1.0, lam=1.0, truncated=None, next_values=None, time_axis=0, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
pub fn vtrace<'py>(
    py: Python<'py>,
    behaviour_log_prob: &Bound<'py, PyAny>,
    target_log_prob: &Bound<'py, PyAny>,
    rewards: &Bound<'py, PyAny>,
    values: &Bound<'py, PyAny>,
    terminated: Option<&Bound<'py, PyAny>>,
    gamma: f64,
    bootstrap: Option<&Bound<'py, PyAny>>,
    rho_bar: f64,
    c_bar: f64,
    lam: f64,
    truncated: Option<&Bound<'py, PyAny>>,
    next_values: Option<&Bound<'py, PyAny>>,
    time_axis: i64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let floats = promote_floats(
        py,
        &[
            ("rewards", Some(rewards)),
            ("values", Some(values)),
            ("next_values", some(next_values)),
            ("behaviour_log_prob", Some(behaviour_log_prob)),
            ("target_log_prob", Some(target_log_prob)),
        ],
    )?;
    let p = VtraceParams {
        gamma,
        lam,
        rho_bar,
        c_bar,
    };
    let tm = (terminated, truncated, bootstrap, time_axis);
    match floats {
        Floats::F32(f) => vtrace_impl(py, f, tm, p, check_finite, some(out)),
        Floats::F64(f) => vtrace_impl(py, f, tm, p, check_finite, some(out)),
    }
}

type TmOpts<'a, 'py> = (
    Option<&'a Bound<'py, PyAny>>,
    Option<&'a Bound<'py, PyAny>>,
    Option<&'a Bound<'py, PyAny>>,
    i64,
);

fn vtrace_impl<'py, F: Element + Real + Default>(
    py: Python<'py>,
    mut f: Vec<Option<Bound<'py, PyArrayDyn<F>>>>,
    (terminated, truncated, bootstrap, time_axis): TmOpts<'_, 'py>,
    p: VtraceParams,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let tlp = f
        .pop()
        .flatten()
        .ok_or_else(|| internal_error("target_log_prob missing"))?;
    let blp = f
        .pop()
        .flatten()
        .ok_or_else(|| internal_error("behaviour_log_prob missing"))?;
    let a = TimeMajorArgs::<F>::new(py, f, terminated, truncated, bootstrap, time_axis)?;
    let shape = a.shape();
    for (name, x) in [("behaviour_log_prob", &blp), ("target_log_prob", &tlp)] {
        if x.shape() != shape.as_slice() {
            return Err(ShapeError::new_err(format!(
                "{name} has shape {} but rewards has shape {}; per-step arrays must match rewards",
                fmt_shape(x.shape()),
                fmt_shape(&shape)
            )));
        }
    }
    let (o1, o2) = out_pair(out)?;
    let vs = out_array::<F>(py, "out[0]", o1.as_ref(), &shape)?;
    let pg = out_array::<F>(py, "out[1]", o2.as_ref(), &shape)?;
    {
        let b = Borrowed::new(&a)?;
        let (rb, rt) = (blp.try_readonly()?, tlp.try_readonly()?);
        let mut vw = vs.try_readwrite().map_err(|e| overlap_err("out[0]", e))?;
        let mut pw = pg.try_readwrite().map_err(|e| overlap_err("out[1]", e))?;
        let work = 4 * shape.iter().product::<usize>();
        run_time_major(
            py,
            &b,
            a.time_axis,
            &shape,
            work,
            &[&rb, &rt],
            [&mut vw, &mut pw],
            |s, lp, [x, y], par| {
                vtrace_core::vtrace(s, lp[0].view(), lp[1].view(), p, check_finite, x, y, par)
            },
        )?;
    }
    PyTuple::new(py, [vs.into_any(), pg.into_any()])
}

// ---------------------------------------------------------------------------
// Private kernels of rollscan.streaming
// ---------------------------------------------------------------------------

fn f64_array<'py>(
    py: Python<'py>,
    v: Vec<f64>,
    shape: &[usize],
) -> PyResult<Bound<'py, PyArrayDyn<f64>>> {
    let a = ArrayD::from_shape_vec(IxDyn(shape), v).map_err(|_| internal_error("moments shape"))?;
    Ok(a.into_pyarray(py))
}

/// Moments of a batch over axis 0: ``(count, mean, sq_dev_sum)`` (float64,
/// shape ``batch.shape[1:]``). Used by ``RunningMoments.update``.
#[pyfunction]
#[pyo3(signature = (batch, *, check_finite=true))]
fn _batch_moments<'py>(
    py: Python<'py>,
    batch: &Bound<'py, PyAny>,
    check_finite: bool,
) -> PyResult<Bound<'py, PyTuple>> {
    match promote_floats(py, &[("batch", Some(batch))])? {
        Floats::F32(mut f) => batch_moments_impl(py, f.remove(0), check_finite),
        Floats::F64(mut f) => batch_moments_impl(py, f.remove(0), check_finite),
    }
}

fn batch_moments_impl<'py, F: Element + Real>(
    py: Python<'py>,
    x: Option<Bound<'py, PyArrayDyn<F>>>,
    check_finite: bool,
) -> PyResult<Bound<'py, PyTuple>> {
    let x = x.ok_or_else(|| internal_error("batch missing"))?;
    let shape = x.shape().to_vec();
    if shape.is_empty() {
        return Err(ShapeError::new_err(
            "batch has shape () but it needs a batch axis (axis 0)",
        ));
    }
    let m = {
        let r = x.try_readonly()?;
        let v = r.as_array();
        run(py, shape.iter().product(), |par| {
            running::batch_moments(&v, check_finite, par)
        })?
        .map_err(|e| core_err_at(e, &locate_in(&shape)))?
    };
    let inner = &shape[1..];
    PyTuple::new(
        py,
        [
            m.count.into_pyobject(py)?.into_any(),
            f64_array(py, m.mean, inner)?.into_any(),
            f64_array(py, m.m2, inner)?.into_any(),
        ],
    )
}

/// Chan-Golub-LeVeque merge of two moment triples (float64 arrays of one
/// shape): returns ``(count, mean, sq_dev_sum)``.
#[pyfunction]
fn _merge_moments<'py>(
    py: Python<'py>,
    count_a: u64,
    mean_a: PyReadonlyArrayDyn<'py, f64>,
    m2_a: PyReadonlyArrayDyn<'py, f64>,
    count_b: u64,
    mean_b: PyReadonlyArrayDyn<'py, f64>,
    m2_b: PyReadonlyArrayDyn<'py, f64>,
) -> PyResult<Bound<'py, PyTuple>> {
    let shape = mean_a.shape().to_vec();
    same_shape("mean_b", mean_b.shape(), "mean_a", &shape)?;
    same_shape("m2_a", m2_a.shape(), "mean_a", &shape)?;
    same_shape("m2_b", m2_b.shape(), "mean_a", &shape)?;
    let vec = |a: &PyReadonlyArrayDyn<'py, f64>| a.as_array().iter().copied().collect::<Vec<_>>();
    let a = VecMoments {
        count: count_a,
        mean: vec(&mean_a),
        m2: vec(&m2_a),
    };
    let b = VecMoments {
        count: count_b,
        mean: vec(&mean_b),
        m2: vec(&m2_b),
    };
    let m = a
        .merge(&b)
        .map_err(|e| core_err_at(e, &|at| at.to_string()))?;
    PyTuple::new(
        py,
        [
            m.count.into_pyobject(py)?.into_any(),
            f64_array(py, m.mean, &shape)?.into_any(),
            f64_array(py, m.m2, &shape)?.into_any(),
        ],
    )
}

/// ``clip((x - shift) * scale, -clip, clip)`` with float64 ``shift`` /
/// ``scale`` of the shape of ``x`` (broadcast views are fine). Used by
/// ``RunningMoments.normalize``.
#[pyfunction]
#[pyo3(signature = (x, shift, scale, *, clip=None, out=None))]
fn _affine_clip<'py>(
    py: Python<'py>,
    x: &Bound<'py, PyAny>,
    shift: PyReadonlyArrayDyn<'py, f64>,
    scale: PyReadonlyArrayDyn<'py, f64>,
    clip: Option<f64>,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    match promote_floats(py, &[("x", Some(x))])? {
        Floats::F32(mut f) => affine_impl(py, f.remove(0), shift, scale, clip, some(out)),
        Floats::F64(mut f) => affine_impl(py, f.remove(0), shift, scale, clip, some(out)),
    }
}

fn affine_impl<'py, F: Element + Real>(
    py: Python<'py>,
    x: Option<Bound<'py, PyArrayDyn<F>>>,
    shift: PyReadonlyArrayDyn<'py, f64>,
    scale: PyReadonlyArrayDyn<'py, f64>,
    clip: Option<f64>,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let x = x.ok_or_else(|| internal_error("x missing"))?;
    let shape = x.shape().to_vec();
    same_shape("shift", shift.shape(), "x", &shape)?;
    same_shape("scale", scale.shape(), "x", &shape)?;
    let o = out_array::<F>(py, "out", out, &shape)?;
    {
        let r = x.try_readonly()?;
        let mut w = o.try_readwrite().map_err(|e| overlap_err("out", e))?;
        let (xv, sv, cv) = (r.as_array(), shift.as_array(), scale.as_array());
        let mut ov = w.as_array_mut();
        run(py, shape.iter().product(), |par| {
            running::affine_clip(&xv, &sv, &cv, clip, &mut ov, par)
        })?
        .map_err(|e| core_err_at(e, &locate_in(&shape)))?;
    }
    Ok(o.into_any())
}

fn two_d<'a, T>(name: &str, v: ArrayViewD<'a, T>) -> PyResult<ArrayView2<'a, T>> {
    let s = v.shape().to_vec();
    v.into_dimensionality::<Ix2>().map_err(|_| {
        ShapeError::new_err(format!(
            "{name} has shape {} but must be (T, num_envs)",
            fmt_shape(&s)
        ))
    })
}

/// One chunk of ``ReturnScaler.scale``: returns ``(scaled, returns, count,
/// mean, sq_dev_sum)`` with the advanced state.
#[pyfunction]
#[pyo3(signature = (rewards, terminated, truncated, returns, count, mean, m2, *, gamma, eps, clip=None, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
fn _scale_rewards<'py>(
    py: Python<'py>,
    rewards: &Bound<'py, PyAny>,
    terminated: Option<&Bound<'py, PyAny>>,
    truncated: Option<&Bound<'py, PyAny>>,
    returns: PyReadonlyArray1<'py, f64>,
    count: u64,
    mean: f64,
    m2: f64,
    gamma: f64,
    eps: f64,
    clip: Option<f64>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let te = some(terminated)
        .map(|o| as_flags(py, "terminated", o))
        .transpose()?;
    let tr = some(truncated)
        .map(|o| as_flags(py, "truncated", o))
        .transpose()?;
    let mut state = ScalerState {
        returns: returns.as_array().to_vec(),
        moments: VecMoments {
            count,
            mean: vec![mean],
            m2: vec![m2],
        },
    };
    let p = ScalerParams { gamma, eps, clip };
    let o = match promote_floats(py, &[("rewards", Some(rewards))])? {
        Floats::F32(mut f) => scale_impl(
            py,
            f.remove(0),
            te,
            tr,
            p,
            check_finite,
            &mut state,
            some(out),
        )?,
        Floats::F64(mut f) => scale_impl(
            py,
            f.remove(0),
            te,
            tr,
            p,
            check_finite,
            &mut state,
            some(out),
        )?,
    };
    let m = state.moments;
    PyTuple::new(
        py,
        [
            o,
            PyArray1::from_vec(py, state.returns).into_any(),
            m.count.into_pyobject(py)?.into_any(),
            m.mean[0].into_pyobject(py)?.into_any(),
            m.m2[0].into_pyobject(py)?.into_any(),
        ],
    )
}

#[allow(clippy::too_many_arguments)]
fn scale_impl<'py, F: Element + Real>(
    py: Python<'py>,
    r: Option<Bound<'py, PyArrayDyn<F>>>,
    te: Option<Bound<'py, PyArrayDyn<bool>>>,
    tr: Option<Bound<'py, PyArrayDyn<bool>>>,
    p: ScalerParams,
    check_finite: bool,
    state: &mut ScalerState,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let r = r.ok_or_else(|| internal_error("rewards missing"))?;
    let shape = r.shape().to_vec();
    let o = out_array::<F>(py, "out", out, &shape)?;
    {
        let rr = r.try_readonly()?;
        let rte = te.as_ref().map(|a| a.try_readonly()).transpose()?;
        let rtr = tr.as_ref().map(|a| a.try_readonly()).transpose()?;
        let rv = two_d("rewards", rr.as_array())?;
        let tev = rte
            .as_ref()
            .map(|a| two_d("terminated", a.as_array()))
            .transpose()?;
        let trv = rtr
            .as_ref()
            .map(|a| two_d("truncated", a.as_array()))
            .transpose()?;
        let mut w = o.try_readwrite().map_err(|e| overlap_err("out", e))?;
        let mut ov = w
            .as_array_mut()
            .into_dimensionality::<Ix2>()
            .map_err(|_| internal_error("out rank"))?;
        run(py, 0, |_| {
            running::scale_rewards(
                &rv,
                tev.as_ref(),
                trv.as_ref(),
                p,
                check_finite,
                state,
                &mut ov,
            )
        })?
        .map_err(|e| core_err_at(e, &locate_in(&shape)))?;
    }
    Ok(o.into_any())
}

/// One chunk of ``EpisodeTracker.update``: returns ``(returns, lengths, env,
/// step, terminated, open_returns, open_lengths)``.
#[pyfunction]
#[pyo3(signature = (rewards, terminated, truncated, returns, lengths, *, check_finite=true))]
fn _track_episodes<'py>(
    py: Python<'py>,
    rewards: &Bound<'py, PyAny>,
    terminated: Option<&Bound<'py, PyAny>>,
    truncated: Option<&Bound<'py, PyAny>>,
    returns: PyReadonlyArray1<'py, f64>,
    lengths: PyReadonlyArray1<'py, i64>,
    check_finite: bool,
) -> PyResult<Bound<'py, PyTuple>> {
    let te = some(terminated)
        .map(|o| as_flags(py, "terminated", o))
        .transpose()?;
    let tr = some(truncated)
        .map(|o| as_flags(py, "truncated", o))
        .transpose()?;
    let mut state = TrackerState {
        returns: returns.as_array().to_vec(),
        lengths: lengths
            .as_array()
            .iter()
            .map(|&l| l.max(0) as u64)
            .collect(),
    };
    let done = match promote_floats(py, &[("rewards", Some(rewards))])? {
        Floats::F32(mut f) => track_impl(py, f.remove(0), te, tr, check_finite, &mut state)?,
        Floats::F64(mut f) => track_impl(py, f.remove(0), te, tr, check_finite, &mut state)?,
    };
    let ints =
        |v: Vec<u64>| PyArray1::from_vec(py, v.into_iter().map(|x| x as i64).collect()).into_any();
    PyTuple::new(
        py,
        [
            PyArray1::from_vec(py, done.returns).into_any(),
            ints(done.lengths),
            ints(done.streams),
            ints(done.steps),
            PyArray1::from_vec(py, done.terminal).into_any(),
            PyArray1::from_vec(py, state.returns).into_any(),
            ints(state.lengths),
        ],
    )
}

fn track_impl<'py, F: Element + Real>(
    py: Python<'py>,
    r: Option<Bound<'py, PyArrayDyn<F>>>,
    te: Option<Bound<'py, PyArrayDyn<bool>>>,
    tr: Option<Bound<'py, PyArrayDyn<bool>>>,
    check_finite: bool,
    state: &mut TrackerState,
) -> PyResult<running::Finished> {
    let r = r.ok_or_else(|| internal_error("rewards missing"))?;
    let shape = r.shape().to_vec();
    let rr = r.try_readonly()?;
    let rte = te.as_ref().map(|a| a.try_readonly()).transpose()?;
    let rtr = tr.as_ref().map(|a| a.try_readonly()).transpose()?;
    let rv = two_d("rewards", rr.as_array())?;
    let tev = rte
        .as_ref()
        .map(|a| two_d("terminated", a.as_array()))
        .transpose()?;
    let trv = rtr
        .as_ref()
        .map(|a| two_d("truncated", a.as_array()))
        .transpose()?;
    run(py, 0, |_| {
        running::track_episodes(&rv, tev.as_ref(), trv.as_ref(), check_finite, state)
    })?
    .map_err(|e| core_err_at(e, &locate_in(&shape)))
}

pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_class::<SurrogateResult>()?;
    m.add_function(wrap_pyfunction!(clipped_surrogate, m)?)?;
    m.add_function(wrap_pyfunction!(vtrace, m)?)?;
    m.add_function(wrap_pyfunction!(_batch_moments, m)?)?;
    m.add_function(wrap_pyfunction!(_merge_moments, m)?)?;
    m.add_function(wrap_pyfunction!(_affine_clip, m)?)?;
    m.add_function(wrap_pyfunction!(_scale_rewards, m)?)?;
    m.add_function(wrap_pyfunction!(_track_episodes, m)?)?;
    Ok(())
}
