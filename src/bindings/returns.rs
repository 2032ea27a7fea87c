//! `discounted_returns`, `gae`, `normalize`: time-major buffers of any rank.

use super::convert::{
    as_flags, cast_float, norm_axis, out_array, out_pair, promote_floats, Floats,
};
use super::errors::{core_err, core_err_at, internal_error, overlap_err, ShapeError};
use super::layout::Layout;
use super::threads::run;
use crate::core::error::fmt_shape;
use crate::core::timemajor::{self, Steps};
use crate::core::{stats, CoreError, Par, Real};
use ndarray::{ArrayView2, ArrayViewD, ArrayViewMut2, ArrayViewMutD, Ix1, Ix2, IxDyn};
use numpy::prelude::*;
use numpy::{Element, PyArrayDyn, PyReadonlyArrayDyn};
use pyo3::prelude::*;
use pyo3::types::PyTuple;

/// The converted arguments of a time-major call, in the storage dtype `F`.
pub(crate) struct TimeMajorArgs<'py, F: Element> {
    pub rewards: Bound<'py, PyArrayDyn<F>>,
    pub values: Option<Bound<'py, PyArrayDyn<F>>>,
    pub next_values: Option<Bound<'py, PyArrayDyn<F>>>,
    pub terminated: Option<Bound<'py, PyArrayDyn<bool>>>,
    pub truncated: Option<Bound<'py, PyArrayDyn<bool>>>,
    pub bootstrap: Option<Bound<'py, PyArrayDyn<F>>>,
    pub time_axis: usize,
}

fn some<'a, 'py>(o: Option<&'a Bound<'py, PyAny>>) -> Option<&'a Bound<'py, PyAny>> {
    o.filter(|o| !o.is_none())
}

impl<'py, F: Element + Real> TimeMajorArgs<'py, F> {
    /// Convert flags and the bootstrap, and check every shape against
    /// `rewards` in the caller's own terms.
    pub fn new(
        py: Python<'py>,
        mut floats: Vec<Option<Bound<'py, PyArrayDyn<F>>>>,
        terminated: Option<&Bound<'py, PyAny>>,
        truncated: Option<&Bound<'py, PyAny>>,
        bootstrap: Option<&Bound<'py, PyAny>>,
        time_axis: i64,
    ) -> PyResult<Self> {
        // floats = [rewards, values, next_values]
        floats.resize(3, None);
        let next_values = floats.pop().flatten();
        let values = floats.pop().flatten();
        let rewards = floats
            .pop()
            .flatten()
            .ok_or_else(|| internal_error("rewards missing"))?;
        let shape = rewards.shape().to_vec();
        if shape.is_empty() {
            return Err(ShapeError::new_err(
                "rewards must have at least one axis (time), got shape ()",
            ));
        }
        let time_axis = norm_axis("time_axis", time_axis, shape.len())?;
        let same = |name: &str, s: &[usize]| -> PyResult<()> {
            if s != shape.as_slice() {
                return Err(ShapeError::new_err(format!(
                    "{name} has shape {} but rewards has shape {}; per-step arrays must match rewards",
                    fmt_shape(s),
                    fmt_shape(&shape)
                )));
            }
            Ok(())
        };
        if let Some(v) = &values {
            same("values", v.shape())?;
        }
        if let Some(v) = &next_values {
            same("next_values", v.shape())?;
        }
        let terminated = some(terminated)
            .map(|o| as_flags(py, "terminated", o))
            .transpose()?;
        let truncated = some(truncated)
            .map(|o| as_flags(py, "truncated", o))
            .transpose()?;
        if let Some(v) = &terminated {
            same("terminated", v.shape())?;
        }
        if let Some(v) = &truncated {
            same("truncated", v.shape())?;
        }
        let bootstrap = match some(bootstrap) {
            None => None,
            Some(o) => {
                let mut stream: Vec<usize> = shape.clone();
                stream.remove(time_axis);
                let b = cast_float::<F>(py, "bootstrap", o)?;
                let b = if b.ndim() == 0 && stream.is_empty() {
                    b
                } else if b.ndim() == 0 {
                    // A scalar bootstrap applies to every stream.
                    let np = py.import("numpy")?;
                    np.getattr("full")?
                        .call1((PyTuple::new(py, &stream)?, &b))?
                        .cast_into::<PyArrayDyn<F>>()?
                } else {
                    b
                };
                if b.shape() != stream.as_slice() {
                    return Err(ShapeError::new_err(format!(
                        "bootstrap has shape {} but rewards has shape {}; bootstrap must have the shape of \
                         rewards without the time axis ({})",
                        fmt_shape(b.shape()),
                        fmt_shape(&shape),
                        fmt_shape(&stream)
                    )));
                }
                if b.is_c_contiguous() {
                    Some(b)
                } else {
                    let np = py.import("numpy")?;
                    Some(
                        np.getattr("ascontiguousarray")?
                            .call1((&b,))?
                            .cast_into::<PyArrayDyn<F>>()?,
                    )
                }
            }
        };
        Ok(TimeMajorArgs {
            rewards,
            values,
            next_values,
            terminated,
            truncated,
            bootstrap,
            time_axis,
        })
    }

    pub fn shape(&self) -> Vec<usize> {
        self.rewards.shape().to_vec()
    }

    /// The checks that still apply when there are no elements. Zero-size
    /// arrays are never borrowed as views: NumPy gives them zero strides,
    /// which ndarray's debug checks reject.
    pub fn check_empty(&self, coefs: &[(&'static str, f64)]) -> PyResult<()> {
        for &(name, x) in coefs {
            crate::core::error::check_unit(name, x).map_err(core_err)?;
        }
        if self.bootstrap.is_some() && self.next_values.is_some() {
            return Err(core_err(CoreError::input(
                "bootstrap",
                "is not allowed together with next_values (its last row already carries the bootstrap)",
            )));
        }
        Ok(())
    }
}

/// Read-only borrows of the arguments, alive for the kernel call.
pub(crate) struct Borrowed<'py, F: Element> {
    r: PyReadonlyArrayDyn<'py, F>,
    v: Option<PyReadonlyArrayDyn<'py, F>>,
    nv: Option<PyReadonlyArrayDyn<'py, F>>,
    te: Option<PyReadonlyArrayDyn<'py, bool>>,
    tr: Option<PyReadonlyArrayDyn<'py, bool>>,
    b: Option<PyReadonlyArrayDyn<'py, F>>,
}

impl<'py, F: Element + Real> Borrowed<'py, F> {
    pub fn new(a: &TimeMajorArgs<'py, F>) -> PyResult<Self> {
        Ok(Borrowed {
            r: a.rewards.try_readonly()?,
            v: a.values.as_ref().map(|x| x.try_readonly()).transpose()?,
            nv: a
                .next_values
                .as_ref()
                .map(|x| x.try_readonly())
                .transpose()?,
            te: a
                .terminated
                .as_ref()
                .map(|x| x.try_readonly())
                .transpose()?,
            tr: a.truncated.as_ref().map(|x| x.try_readonly()).transpose()?,
            b: a.bootstrap.as_ref().map(|x| x.try_readonly()).transpose()?,
        })
    }

    /// The inputs as `[T, N]` views when the call needs no layout planning:
    /// time axis 0 and every per-step array 2-D and C-contiguous (the usual
    /// trainer buffer), with a `[N]` bootstrap if any. Saves most of the
    /// per-call cost of small buffers.
    pub fn plain(&self, time_axis: usize) -> Option<Steps<'_, F>> {
        fn opt<'b, T: Element>(
            a: Option<&'b PyReadonlyArrayDyn<'_, T>>,
        ) -> Option<Option<ArrayView2<'b, T>>> {
            match a {
                None => Some(None),
                Some(a) => plain_in(a).map(Some),
            }
        }
        if time_axis != 0 {
            return None;
        }
        Some(Steps {
            rewards: plain_in(&self.r)?,
            values: opt(self.v.as_ref())?,
            next_values: opt(self.nv.as_ref())?,
            terminated: opt(self.te.as_ref())?,
            truncated: opt(self.tr.as_ref())?,
            bootstrap: match &self.b {
                None => None,
                Some(b) => Some(b.as_array().into_dimensionality::<Ix1>().ok()?),
            },
        })
    }

    /// Plan the fold over these inputs and the given output views.
    pub fn layout(&self, time_axis: usize, outs: &[ArrayViewD<'_, F>]) -> Layout {
        let mut l = Layout::new(self.r.shape(), time_axis);
        l.plan(|l| {
            l.folds(&self.r.as_array())
                && self.v.as_ref().is_none_or(|x| l.folds(&x.as_array()))
                && self.nv.as_ref().is_none_or(|x| l.folds(&x.as_array()))
                && self.te.as_ref().is_none_or(|x| l.folds(&x.as_array()))
                && self.tr.as_ref().is_none_or(|x| l.folds(&x.as_array()))
                && outs.iter().all(|o| l.folds(o))
        });
        l
    }

    /// The core inputs of every sub-block.
    pub fn steps(&self, l: &Layout) -> PyResult<Vec<Steps<'_, F>>> {
        let r = l.fold(&self.r.as_array()).ok_or_else(fold_bug)?;
        let v = fold_opt(l, self.v.as_ref())?;
        let nv = fold_opt(l, self.nv.as_ref())?;
        let te = fold_opt(l, self.te.as_ref())?;
        let tr = fold_opt(l, self.tr.as_ref())?;
        let b: Vec<Option<_>> = match &self.b {
            None => vec![None; l.n_sub()],
            Some(b) => l
                .fold_streams(&b.as_array())
                .ok_or_else(fold_bug)?
                .into_iter()
                .map(Some)
                .collect(),
        };
        Ok(r.into_iter()
            .zip(v)
            .zip(nv)
            .zip(te)
            .zip(tr)
            .zip(b)
            .map(|(((((r, v), nv), te), tr), b)| Steps {
                rewards: r,
                values: v,
                next_values: nv,
                terminated: te,
                truncated: tr,
                bootstrap: b,
            })
            .collect())
    }
}

/// The work to announce for a plain call: none (stay on this thread) when the
/// fast path would not split the streams between threads anyway.
pub(crate) fn plain_work<F>(steps: &Steps<'_, F>, work: usize) -> usize {
    if crate::core::rows::splits_streams(steps.rewards.ncols()) {
        work
    } else {
        0
    }
}

/// An input of a plain call (see [`Borrowed::plain`]) as a `[T, N]` view,
/// when it is 2-D and C-contiguous.
pub(crate) fn plain_in<'b, T: Element>(
    a: &'b PyReadonlyArrayDyn<'_, T>,
) -> Option<ArrayView2<'b, T>> {
    let v = a.as_array().into_dimensionality::<Ix2>().ok()?;
    v.is_standard_layout().then_some(v)
}

/// An output as a `[T, N]` view when it is 2-D and C-contiguous.
pub(crate) fn plain_out<F>(o: ArrayViewMutD<'_, F>) -> Option<ArrayViewMut2<'_, F>> {
    let v = o.into_dimensionality::<Ix2>().ok()?;
    v.is_standard_layout().then_some(v)
}

fn fold_bug() -> PyErr {
    internal_error("layout fold failed")
}

fn fold_opt<'b, T: Element>(
    l: &Layout,
    a: Option<&'b PyReadonlyArrayDyn<'_, T>>,
) -> PyResult<Vec<Option<ArrayView2<'b, T>>>> {
    match a {
        None => Ok(vec![None; l.n_sub()]),
        Some(a) => Ok(l
            .fold(&a.as_array())
            .ok_or_else(fold_bug)?
            .into_iter()
            .map(Some)
            .collect()),
    }
}

/// Where a kernel writes: folded views of the caller's array, or a scratch
/// buffer copied back afterwards when the output layout cannot be folded.
pub(crate) struct Sink<'a, F> {
    out: ArrayViewMutD<'a, F>,
    scratch: Option<Vec<F>>,
}

impl<'a, F: Real + Default + Clone> Sink<'a, F> {
    pub fn new(l: &Layout, mut out: ArrayViewMutD<'a, F>) -> Self {
        let direct = l.shape.contains(&0) || l.fold_mut(out.view_mut()).is_some();
        let scratch = if direct {
            None
        } else {
            Some(vec![F::default(); l.shape.iter().product()])
        };
        Sink { out, scratch }
    }

    /// The per-sub-block `[T, M]` output views.
    pub fn views(&mut self, l: &Layout) -> PyResult<Vec<ArrayViewMut2<'_, F>>> {
        let (t, m) = (l.t_len(), l.inner_len());
        if l.shape.contains(&0) {
            return (0..l.n_sub())
                .map(|_| ArrayViewMut2::from_shape((t, m), &mut [][..]).map_err(|_| fold_bug()))
                .collect();
        }
        match &mut self.scratch {
            None => Ok(vec![l
                .fold_mut(self.out.view_mut())
                .ok_or_else(fold_bug)?]),
            Some(buf) => buf
                .chunks_mut(t * m)
                .map(|c| ArrayViewMut2::from_shape((t, m), c).map_err(|_| fold_bug()))
                .collect(),
        }
    }

    /// Copy scratch results into the caller's array.
    pub fn finish(mut self, l: &Layout) -> PyResult<()> {
        if let Some(buf) = &self.scratch {
            let s =
                ArrayViewD::from_shape(IxDyn(&l.scratch_shape()), buf).map_err(|_| fold_bug())?;
            self.out
                .assign(&s.permuted_axes(IxDyn(&l.scratch_to_user())));
        }
        Ok(())
    }
}

/// Run `f` over every sub-block; the first error is mapped to the caller's indices.
pub(crate) fn map_sub_err(l: &Layout, r: Result<(), (usize, CoreError)>) -> PyResult<()> {
    r.map_err(|(j, e)| core_err_at(e, &|at| l.locate(j, at)))
}

/// Run a time-major kernel with `N` outputs (`discounted_returns`: 1; `gae`,
/// `vtrace`: 2) over a call of any layout, and map its errors to the
/// caller's indices.
///
/// `kernel(steps, extra, outs, par)` gets `[T, M]` views: `extra` holds the
/// kernel's further per-step inputs (`vtrace`'s log-probabilities) in the
/// order given, `outs` the outputs in the order given. Plain `[T, N]`
/// C-contiguous calls (a trainer's buffer) go straight to the kernel; any
/// other layout is folded by the layout planner into one or more `[T, M]`
/// pieces, outputs copied back only where their strides need it.
#[allow(clippy::too_many_arguments)]
pub(crate) fn run_time_major<F, K, const N: usize>(
    py: Python<'_>,
    b: &Borrowed<'_, F>,
    time_axis: usize,
    shape: &[usize],
    work: usize,
    extra: &[&PyReadonlyArrayDyn<'_, F>],
    mut outs: [&mut numpy::PyReadwriteArrayDyn<'_, F>; N],
    kernel: K,
) -> PyResult<()>
where
    F: Element + Real + Default,
    K: Fn(
            &Steps<'_, F>,
            &[ArrayView2<'_, F>],
            [ArrayViewMut2<'_, F>; N],
            Par,
        ) -> Result<(), CoreError>
        + Sync,
{
    let plain_extra: Option<Vec<ArrayView2<'_, F>>> = extra.iter().map(|e| plain_in(e)).collect();
    let plain_outs: Option<Vec<ArrayViewMut2<'_, F>>> = outs
        .iter_mut()
        .map(|o| plain_out(o.as_array_mut()))
        .collect();
    let plain_outs = plain_outs.and_then(|v| <[ArrayViewMut2<'_, F>; N]>::try_from(v).ok());
    if let (Some(steps), Some(ex), Some(o)) = (b.plain(time_axis), plain_extra, plain_outs) {
        let l = Layout::new(shape, 0);
        let work = plain_work(&steps, work);
        let res = run(py, work, |par| {
            kernel(&steps, &ex, o, par).map_err(|e| (0, e))
        })?;
        return map_sub_err(&l, res);
    }
    let l = {
        let arrays: Vec<_> = outs.iter_mut().map(|o| o.as_array_mut()).collect();
        let mut views: Vec<ArrayViewD<'_, F>> = arrays.iter().map(|a| a.view()).collect();
        views.extend(extra.iter().map(|e| e.as_array()));
        b.layout(time_axis, &views)
    };
    let steps = b.steps(&l)?;
    let folded: Vec<Vec<ArrayView2<'_, F>>> = extra
        .iter()
        .map(|e| l.fold(&e.as_array()).ok_or_else(fold_bug))
        .collect::<PyResult<_>>()?;
    let mut sinks: Vec<Sink<'_, F>> = outs
        .iter_mut()
        .map(|o| Sink::new(&l, o.as_array_mut()))
        .collect();
    {
        // Piece j's output views, one per output.
        let mut per_out = Vec::with_capacity(N);
        for sink in sinks.iter_mut() {
            per_out.push(sink.views(&l)?.into_iter());
        }
        let pieces = (0..steps.len())
            .map(|_| {
                let o: Vec<ArrayViewMut2<'_, F>> =
                    per_out.iter_mut().filter_map(|it| it.next()).collect();
                <[ArrayViewMut2<'_, F>; N]>::try_from(o)
                    .map_err(|_| internal_error("layout gave fewer output pieces than steps"))
            })
            .collect::<PyResult<Vec<_>>>()?;
        let res = run(py, work, |par| {
            for (j, (s, o)) in steps.iter().zip(pieces).enumerate() {
                let ex: Vec<ArrayView2<'_, F>> = folded.iter().map(|f| f[j].view()).collect();
                kernel(s, &ex, o, par).map_err(|e| (j, e))?;
            }
            Ok(())
        })?;
        map_sub_err(&l, res)?;
    }
    for sink in sinks {
        sink.finish(&l)?;
    }
    Ok(())
}

/// Discounted returns, time-major.
///
/// Computes, per stream (every axis other than ``time_axis``), from the last
/// step backwards::
///
///     G_t = r_t + gamma * X_t
///     X_t = 0              if terminated[t]
///         = next_values[t] if truncated[t], or t = T-1 and next_values given
///         = bootstrap      if t = T-1 (default 0)
///         = G_{t+1}        otherwise
///
/// float32 inputs are accumulated in float64 and rounded once.
///
/// Args:
///     rewards: ``[T, ...]`` per-step rewards (time on ``time_axis``).
///     terminated: per-step bool, the state after step t is terminal.
///     gamma: discount in [0, 1].
///     truncated: per-step bool, the episode was cut after step t (needs
///         ``next_values``).
///     next_values: per-step V(s_{t+1}); its last row is the bootstrap.
///     bootstrap: V of the state after the last row, shape of rewards
///         without the time axis (or a scalar). Not with ``next_values``.
///     time_axis: the time axis (default 0).
///     check_finite: reject NaN/inf inputs (default True).
///     out: array of the result's shape and dtype to write into.
///
/// Returns:
///     ndarray of the shape of ``rewards``.
///
/// Raises:
///     ShapeError: shapes that do not line up.
///     InputError: NaN/inf, gamma outside [0, 1], truncated without
///         next_values, bootstrap together with next_values.
///     TypeError: unsupported dtype, read-only ``out``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.discounted_returns(np.array([1.0, 1.0, 1.0]), gamma=0.5)
///     array([1.75, 1.5 , 1.  ])
#[pyfunction]
#[pyo3(signature = (rewards, terminated=None, *, gamma, truncated=None, next_values=None, bootstrap=None, time_axis=0, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
pub fn discounted_returns<'py>(
    py: Python<'py>,
    rewards: &Bound<'py, PyAny>,
    terminated: Option<&Bound<'py, PyAny>>,
    gamma: f64,
    truncated: Option<&Bound<'py, PyAny>>,
    next_values: Option<&Bound<'py, PyAny>>,
    bootstrap: Option<&Bound<'py, PyAny>>,
    time_axis: i64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let floats = promote_floats(
        py,
        &[
            ("rewards", Some(rewards)),
            ("values", None),
            ("next_values", next_values),
        ],
    )?;
    match floats {
        Floats::F32(f) => {
            let a = TimeMajorArgs::<f32>::new(py, f, terminated, truncated, bootstrap, time_axis)?;
            returns_impl(py, a, gamma, check_finite, out)
        }
        Floats::F64(f) => {
            let a = TimeMajorArgs::<f64>::new(py, f, terminated, truncated, bootstrap, time_axis)?;
            returns_impl(py, a, gamma, check_finite, out)
        }
    }
}

fn returns_impl<'py, F: Element + Real + Default>(
    py: Python<'py>,
    a: TimeMajorArgs<'py, F>,
    gamma: f64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let shape = a.shape();
    let out = out_array::<F>(py, "out", some(out), &shape)?;
    if shape.contains(&0) {
        a.check_empty(&[("gamma", gamma)])?;
        return Ok(out.into_any());
    }
    {
        let b = Borrowed::new(&a)?;
        let mut ow = out.try_readwrite().map_err(|e| overlap_err("out", e))?;
        let work = shape.iter().product::<usize>();
        run_time_major(
            py,
            &b,
            a.time_axis,
            &shape,
            work,
            &[],
            [&mut ow],
            |s, _, [o], par| timemajor::discounted_returns(s, gamma, check_finite, o, par),
        )?;
    }
    Ok(out.into_any())
}

/// Generalised advantage estimation (Schulman et al. 2016, eq. 16), time-major.
///
/// Per stream, from the last step backwards::
///
///     V'_t    = 0 if terminated[t]; next_values[t] if given;
///               values[t+1] if t < T-1; bootstrap at t = T-1
///     delta_t = r_t + gamma * V'_t - values[t]
///     A_t     = delta_t + gamma * lam * (1 - end_t) * A_{t+1},  A_T = 0
///     returns = A + values
///
/// where ``end_t = terminated[t] or truncated[t]``. ``normalize=True`` then
/// replaces A by ``(A - mean(A)) / (std(A) + eps)`` over all elements
/// (population std); ``returns`` stays un-normalised. float32 inputs are
/// accumulated in float64 and rounded once.
///
/// Args:
///     rewards, values: ``[T, ...]`` per-step arrays.
///     terminated, truncated: per-step bool flags (truncated needs next_values).
///     gamma, lam: coefficients in [0, 1].
///     next_values: per-step V(s_{t+1}); not with ``bootstrap``.
///     bootstrap: V of the state after the last row (per stream or scalar).
///     normalize, eps: advantage normalisation.
///     time_axis, check_finite, out: as in ``discounted_returns``; ``out`` is
///         a tuple ``(advantages, returns)``.
///
/// Returns:
///     ``(advantages, returns)``, each of the shape of ``rewards``.
///
/// Raises:
///     ShapeError, InputError, TypeError: as in ``discounted_returns``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> adv, ret = rollscan.gae(np.array([1.0, 0.0]), np.array([0.5, 0.5]),
///     ...                         np.array([False, True]), gamma=0.9, lam=1.0)
///     >>> adv
///     array([ 0.5, -0.5])
///     >>> ret
///     array([1., 0.])
#[pyfunction]
#[pyo3(signature = (rewards, values, terminated=None, *, gamma, lam, truncated=None, next_values=None, bootstrap=None, normalize=false, eps=1e-8, time_axis=0, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
pub fn gae<'py>(
    py: Python<'py>,
    rewards: &Bound<'py, PyAny>,
    values: &Bound<'py, PyAny>,
    terminated: Option<&Bound<'py, PyAny>>,
    gamma: f64,
    lam: f64,
    truncated: Option<&Bound<'py, PyAny>>,
    next_values: Option<&Bound<'py, PyAny>>,
    bootstrap: Option<&Bound<'py, PyAny>>,
    normalize: bool,
    eps: f64,
    time_axis: i64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let floats = promote_floats(
        py,
        &[
            ("rewards", Some(rewards)),
            ("values", Some(values)),
            ("next_values", next_values),
        ],
    )?;
    let norm = if normalize { Some(eps) } else { None };
    match floats {
        Floats::F32(f) => {
            let a = TimeMajorArgs::<f32>::new(py, f, terminated, truncated, bootstrap, time_axis)?;
            gae_impl(py, a, gamma, lam, norm, check_finite, out)
        }
        Floats::F64(f) => {
            let a = TimeMajorArgs::<f64>::new(py, f, terminated, truncated, bootstrap, time_axis)?;
            gae_impl(py, a, gamma, lam, norm, check_finite, out)
        }
    }
}

fn gae_impl<'py, F: Element + Real + Default>(
    py: Python<'py>,
    a: TimeMajorArgs<'py, F>,
    gamma: f64,
    lam: f64,
    normalize: Option<f64>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let shape = a.shape();
    let (o1, o2) = out_pair(some(out))?;
    let adv = out_array::<F>(py, "out[0]", o1.as_ref(), &shape)?;
    let ret = out_array::<F>(py, "out[1]", o2.as_ref(), &shape)?;
    if shape.contains(&0) {
        a.check_empty(&[("gamma", gamma), ("lam", lam)])?;
        return PyTuple::new(py, [adv.into_any(), ret.into_any()]);
    }
    {
        let b = Borrowed::new(&a)?;
        let mut aw = adv.try_readwrite().map_err(|e| overlap_err("out[0]", e))?;
        let mut rw = ret.try_readwrite().map_err(|e| overlap_err("out[1]", e))?;
        let work = 2 * shape.iter().product::<usize>();
        run_time_major(
            py,
            &b,
            a.time_axis,
            &shape,
            work,
            &[],
            [&mut aw, &mut rw],
            |s, _, [x, y], par| timemajor::gae(s, gamma, lam, None, check_finite, x, y, par),
        )?;
        if let Some(eps) = normalize {
            let mut av = aw.as_array_mut();
            run(py, shape.iter().product(), |par| {
                stats::normalize_inplace(&mut av, None, eps, 0, par)
            })?
            .map_err(core_err)?;
        }
    }
    PyTuple::new(py, [adv.into_any(), ret.into_any()])
}

/// Standardise: ``(x - mean) / (std + eps)`` over the selected elements.
///
/// ``mean`` and ``std`` (with ``ddof``) are taken over the elements where
/// ``mask`` is True (all when None), accumulated in float64 over fixed blocks
/// (two-pass variance). Masked-out elements are copied unchanged. In place when
/// ``out is x``.
///
/// Args:
///     x: float array of any shape (int/bool promoted to float64).
///     eps: added to the std (default 1e-8).
///     ddof: delta degrees of freedom of the std (default 0).
///     mask: bool array of the shape of ``x``.
///     out: array to write into; may be ``x`` itself.
///
/// Returns:
///     ndarray of the shape of ``x``.
///
/// Raises:
///     ShapeError: mask shape differs from x.
///     InputError: NaN/inf in x (when check_finite), a negative ``ddof`` or
///         one not below the number of selected elements, zero spread with
///         ``eps=0``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.normalize(np.array([1.0, 3.0]), eps=0.0)
///     array([-1.,  1.])
#[pyfunction]
#[pyo3(signature = (x, *, eps=1e-8, ddof=0, mask=None, check_finite=true, out=None))]
pub fn normalize<'py>(
    py: Python<'py>,
    x: &Bound<'py, PyAny>,
    eps: f64,
    ddof: i64,
    mask: Option<&Bound<'py, PyAny>>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let ddof = usize::try_from(ddof).map_err(|_| {
        core_err(CoreError::input(
            "ddof",
            format!("must be >= 0, got {ddof}"),
        ))
    })?;
    match promote_floats(py, &[("x", Some(x))])? {
        Floats::F32(mut f) => {
            normalize_impl::<f32>(py, x, f.remove(0), eps, ddof, mask, check_finite, out)
        }
        Floats::F64(mut f) => {
            normalize_impl::<f64>(py, x, f.remove(0), eps, ddof, mask, check_finite, out)
        }
    }
}

#[allow(clippy::too_many_arguments)]
fn normalize_impl<'py, F: Element + Real>(
    py: Python<'py>,
    x_obj: &Bound<'py, PyAny>,
    x: Option<Bound<'py, PyArrayDyn<F>>>,
    eps: f64,
    ddof: usize,
    mask: Option<&Bound<'py, PyAny>>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let x = x.ok_or_else(|| internal_error("x missing"))?;
    let shape = x.shape().to_vec();
    let mask = some(mask).map(|m| as_flags(py, "mask", m)).transpose()?;
    if let Some(m) = &mask {
        if m.shape() != shape.as_slice() {
            return Err(ShapeError::new_err(format!(
                "mask has shape {} but x has shape {}; they must match",
                fmt_shape(m.shape()),
                fmt_shape(&shape)
            )));
        }
    }
    if shape.contains(&0) {
        // Nothing to normalise; zero-size arrays are never borrowed as views.
        return match some(out) {
            Some(o) => Ok(out_array::<F>(py, "out", Some(o), &shape)?.into_any()),
            None => Ok(out_array::<F>(py, "out", None, &shape)?.into_any()),
        };
    }
    let mg = mask.as_ref().map(|m| m.try_readonly()).transpose()?;
    let mv = mg.as_ref().map(|m| m.as_array());
    let n = shape.iter().product::<usize>();
    let in_place = some(out).is_some_and(|o| o.is(x_obj) && x.is(x_obj));
    let finite = |v: &ArrayViewD<'_, F>| -> PyResult<()> {
        if check_finite {
            if let Some((i, _)) = v.indexed_iter().find(|(_, e)| !e.finite()) {
                return Err(super::errors::InputError::new_err(format!(
                    "x{} is not finite (NaN or inf); pass check_finite=False to let it propagate",
                    super::errors::fmt_index(ndarray::Dimension::slice(&i))
                )));
            }
        }
        Ok(())
    };
    if in_place {
        let out = out_array::<F>(py, "out", Some(x_obj), &shape)?;
        {
            let mut w = out.try_readwrite().map_err(|e| overlap_err("out", e))?;
            let mut v = w.as_array_mut();
            if check_finite && !v.iter().all(|e| e.finite()) {
                finite(&v.view())?;
            }
            run(py, n, |par| {
                stats::normalize_inplace(&mut v, mv.as_ref(), eps, ddof, par)
            })?
            .map_err(core_err)?;
        }
        return Ok(out.into_any());
    }
    let out = out_array::<F>(py, "out", some(out), &shape)?;
    {
        let r = x.try_readonly()?;
        let xv = r.as_array();
        if check_finite && !xv.iter().all(|e| e.finite()) {
            finite(&xv)?;
        }
        let mut w = out.try_readwrite().map_err(|e| overlap_err("out", e))?;
        let mut ov = w.as_array_mut();
        run(py, n, |par| {
            stats::normalize(&xv, mv.as_ref(), eps, ddof, &mut ov, par)
        })?
        .map_err(core_err)?;
    }
    Ok(out.into_any())
}

pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(discounted_returns, m)?)?;
    m.add_function(wrap_pyfunction!(gae, m)?)?;
    m.add_function(wrap_pyfunction!(normalize, m)?)?;
    Ok(())
}
