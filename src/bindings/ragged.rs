//! `rollscan.ragged`: flat 1-D steps with per-piece `lengths`.

use super::convert::{
    as_flags, as_indices, cast_float, out_array, out_pair, promote_floats, Floats,
};
use super::errors::{core_err, internal_error, overlap_err, ShapeError};
use super::threads::run;
use crate::core::error::fmt_shape;
use crate::core::ragged::{self, Pieces};
use crate::core::Real;
use ndarray::{ArrayView1, Ix1};
use numpy::prelude::*;
use numpy::{Element, PyArrayDyn, PyReadonlyArrayDyn};
use pyo3::prelude::*;
use pyo3::types::PyTuple;

fn some<'a, 'py>(o: Option<&'a Bound<'py, PyAny>>) -> Option<&'a Bound<'py, PyAny>> {
    o.filter(|o| !o.is_none())
}

fn one_d<'a, T>(name: &str, a: &'a PyReadonlyArrayDyn<'_, T>) -> PyResult<ArrayView1<'a, T>>
where
    T: Element,
{
    a.as_array().into_dimensionality::<Ix1>().map_err(|_| {
        ShapeError::new_err(format!(
            "{name} must be 1-D (steps stored back to back), got shape {}",
            fmt_shape(a.shape())
        ))
    })
}

/// The per-piece arguments, converted to the call's dtype.
struct PieceArgs<'py, F: Element> {
    lengths: Bound<'py, PyArrayDyn<i64>>,
    terminal: Option<Bound<'py, PyArrayDyn<bool>>>,
    tail_values: Option<Bound<'py, PyArrayDyn<F>>>,
    tail_advantages: Option<Bound<'py, PyArrayDyn<F>>>,
}

impl<'py, F: Element + Real> PieceArgs<'py, F> {
    fn new(
        py: Python<'py>,
        lengths: &Bound<'py, PyAny>,
        terminal: Option<&Bound<'py, PyAny>>,
        tail_values: Option<&Bound<'py, PyAny>>,
        tail_advantages: Option<&Bound<'py, PyAny>>,
    ) -> PyResult<Self> {
        Ok(PieceArgs {
            lengths: as_indices(py, "lengths", lengths)?,
            terminal: some(terminal)
                .map(|o| as_flags(py, "terminal", o))
                .transpose()?,
            tail_values: some(tail_values)
                .map(|o| cast_float::<F>(py, "tail_values", o))
                .transpose()?,
            tail_advantages: some(tail_advantages)
                .map(|o| cast_float::<F>(py, "tail_advantages", o))
                .transpose()?,
        })
    }
}

/// Borrow the per-piece arguments and build the validated piece structure.
macro_rules! with_pieces {
    ($args:expr, $steps:expr, $check:expr, |$p:ident| $body:expr) => {{
        let lg = $args.lengths.try_readonly()?;
        let tg = $args
            .terminal
            .as_ref()
            .map(|a| a.try_readonly())
            .transpose()?;
        let vg = $args
            .tail_values
            .as_ref()
            .map(|a| a.try_readonly())
            .transpose()?;
        let ag = $args
            .tail_advantages
            .as_ref()
            .map(|a| a.try_readonly())
            .transpose()?;
        let lv = one_d("lengths", &lg)?;
        let tv = tg.as_ref().map(|a| one_d("terminal", a)).transpose()?;
        let vv = vg.as_ref().map(|a| one_d("tail_values", a)).transpose()?;
        let av = ag
            .as_ref()
            .map(|a| one_d("tail_advantages", a))
            .transpose()?;
        let $p = Pieces::new(lv, $steps, tv, vv, av, $check).map_err(core_err)?;
        $body
    }};
}

/// Discounted returns over pieces stored back to back.
///
/// Inside a piece ``G_t = r_t + gamma * G_{t+1}``; at its last step
/// ``G = r + gamma * (0 if terminal[e] else tail_values[e])``. float32 inputs
/// are accumulated in float64 and rounded once. Long pieces are split into
/// fixed blocks and scanned in parallel (results do not depend on the thread
/// count).
///
/// Args:
///     rewards: ``[S]`` rewards of all pieces, back to back.
///     lengths: ``[E]`` piece lengths (any integer dtype, sum S, zeros allowed).
///     gamma: discount in [0, 1].
///     terminal: ``[E]`` bool, piece ends in a terminal state (default all True).
///     tail_values: ``[E]`` V after each non-terminal piece (default 0).
///     check_finite: reject NaN/inf (default True).
///     out: ``[S]`` array to write into.
///
/// Returns:
///     ``[S]`` ndarray.
///
/// Raises:
///     ShapeError: arrays that are not 1-D or do not line up.
///     InputError: negative lengths, lengths not summing to S, NaN/inf, gamma
///         outside [0, 1].
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.ragged.discounted_returns(np.ones(3), [2, 1], gamma=0.5)
///     array([1.5, 1. , 1. ])
#[pyfunction]
#[pyo3(name = "ragged_discounted_returns", signature = (rewards, lengths, *, gamma, terminal=None, tail_values=None, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
fn discounted_returns<'py>(
    py: Python<'py>,
    rewards: &Bound<'py, PyAny>,
    lengths: &Bound<'py, PyAny>,
    gamma: f64,
    terminal: Option<&Bound<'py, PyAny>>,
    tail_values: Option<&Bound<'py, PyAny>>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    match promote_floats(py, &[("rewards", Some(rewards))])? {
        Floats::F32(mut f) => returns_impl::<f32>(
            py,
            f.remove(0),
            lengths,
            gamma,
            terminal,
            tail_values,
            check_finite,
            out,
        ),
        Floats::F64(mut f) => returns_impl::<f64>(
            py,
            f.remove(0),
            lengths,
            gamma,
            terminal,
            tail_values,
            check_finite,
            out,
        ),
    }
}

#[allow(clippy::too_many_arguments)]
fn returns_impl<'py, F: Element + Real>(
    py: Python<'py>,
    r: Option<Bound<'py, PyArrayDyn<F>>>,
    lengths: &Bound<'py, PyAny>,
    gamma: f64,
    terminal: Option<&Bound<'py, PyAny>>,
    tail_values: Option<&Bound<'py, PyAny>>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let r = r.ok_or_else(|| internal_error("rewards missing"))?;
    let pa = PieceArgs::<F>::new(py, lengths, terminal, tail_values, None)?;
    let rg = r.try_readonly()?;
    let rv = one_d("rewards", &rg)?;
    let out = out_array::<F>(py, "out", some(out), rg.shape())?;
    {
        let mut w = out.try_readwrite().map_err(|e| overlap_err("out", e))?;
        let ov = w
            .as_array_mut()
            .into_dimensionality::<Ix1>()
            .map_err(|_| internal_error("out rank"))?;
        with_pieces!(pa, rv.len(), check_finite, |p| {
            run(py, rv.len(), |par| {
                ragged::discounted_returns(rv, &p, gamma, check_finite, ov, par)
            })?
            .map_err(core_err)?
        });
    }
    Ok(out.into_any())
}

/// GAE over pieces stored back to back (Schulman et al. 2016, eq. 16).
///
/// Inside a piece::
///
///     delta_t = r_t + gamma * values[t+1] - values[t]
///     A_t     = delta_t + gamma * lam * A_{t+1}
///
/// and at a piece's last step ``V' = 0 if terminal[e] else tail_values[e]`` and
/// ``A_{next} = 0 if terminal[e] else tail_advantages[e]`` (the advantage
/// carried in from the step after a piece cut at a chunk boundary; default 0).
/// ``returns = A + values``; ``normalize=True`` then standardises A over all
/// steps (population std). float32 is accumulated in float64.
///
/// Args:
///     rewards, values: ``[S]`` per-step arrays.
///     lengths: ``[E]`` piece lengths.
///     gamma, lam: coefficients in [0, 1].
///     terminal, tail_values, tail_advantages: ``[E]`` per-piece arrays.
///     normalize, eps: advantage normalisation.
///     check_finite: reject NaN/inf (default True).
///     out: tuple ``(advantages, returns)`` of ``[S]`` arrays.
///
/// Returns:
///     ``(advantages, returns)``.
///
/// Raises:
///     ShapeError, InputError: as in ``ragged.discounted_returns``.
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> adv, ret = rollscan.ragged.gae(np.ones(2), np.zeros(2), [2], gamma=1.0, lam=1.0)
///     >>> adv
///     array([2., 1.])
#[pyfunction]
#[pyo3(name = "ragged_gae", signature = (rewards, values, lengths, *, gamma, lam, terminal=None, tail_values=None, tail_advantages=None, normalize=false, eps=1e-8, check_finite=true, out=None))]
#[allow(clippy::too_many_arguments)]
fn gae<'py>(
    py: Python<'py>,
    rewards: &Bound<'py, PyAny>,
    values: &Bound<'py, PyAny>,
    lengths: &Bound<'py, PyAny>,
    gamma: f64,
    lam: f64,
    terminal: Option<&Bound<'py, PyAny>>,
    tail_values: Option<&Bound<'py, PyAny>>,
    tail_advantages: Option<&Bound<'py, PyAny>>,
    normalize: bool,
    eps: f64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let norm = if normalize { Some(eps) } else { None };
    macro_rules! go {
        ($t:ty, $f:expr) => {{
            let mut f = $f;
            let v = f.pop().flatten();
            let r = f.pop().flatten();
            let pa = PieceArgs::<$t>::new(py, lengths, terminal, tail_values, tail_advantages)?;
            gae_impl::<$t>(py, r, v, pa, gamma, lam, norm, check_finite, out)
        }};
    }
    match promote_floats(py, &[("rewards", Some(rewards)), ("values", Some(values))])? {
        Floats::F32(f) => go!(f32, f),
        Floats::F64(f) => go!(f64, f),
    }
}

#[allow(clippy::too_many_arguments)]
fn gae_impl<'py, F: Element + Real>(
    py: Python<'py>,
    r: Option<Bound<'py, PyArrayDyn<F>>>,
    v: Option<Bound<'py, PyArrayDyn<F>>>,
    pa: PieceArgs<'py, F>,
    gamma: f64,
    lam: f64,
    normalize: Option<f64>,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyTuple>> {
    let (r, v) = match (r, v) {
        (Some(r), Some(v)) => (r, v),
        _ => return Err(internal_error("rewards/values missing")),
    };
    let (rg, vg) = (r.try_readonly()?, v.try_readonly()?);
    let (rv, vv) = (one_d("rewards", &rg)?, one_d("values", &vg)?);
    if vv.len() != rv.len() {
        return Err(ShapeError::new_err(format!(
            "values has shape {} but rewards has shape {}; per-step arrays must match rewards",
            fmt_shape(vg.shape()),
            fmt_shape(rg.shape())
        )));
    }
    let (o1, o2) = out_pair(some(out))?;
    let adv = out_array::<F>(py, "out[0]", o1.as_ref(), rg.shape())?;
    let ret = out_array::<F>(py, "out[1]", o2.as_ref(), rg.shape())?;
    {
        let mut aw = adv.try_readwrite().map_err(|e| overlap_err("out[0]", e))?;
        let mut rw = ret.try_readwrite().map_err(|e| overlap_err("out[1]", e))?;
        let mut av = aw
            .as_array_mut()
            .into_dimensionality::<Ix1>()
            .map_err(|_| internal_error("out rank"))?;
        let rtv = rw
            .as_array_mut()
            .into_dimensionality::<Ix1>()
            .map_err(|_| internal_error("out rank"))?;
        with_pieces!(pa, rv.len(), check_finite, |p| {
            run(py, 2 * rv.len(), |par| -> crate::core::CoreResult<()> {
                ragged::gae(
                    rv,
                    vv,
                    &p,
                    gamma,
                    lam,
                    check_finite,
                    av.view_mut(),
                    rtv,
                    par,
                )?;
                if let Some(eps) = normalize {
                    crate::core::stats::normalize_inplace(&mut av, None, eps, 0, par)?;
                }
                Ok(())
            })?
            .map_err(core_err)?
        });
    }
    PyTuple::new(py, [adv.into_any(), ret.into_any()])
}

/// Per-piece (discounted) sum ``sum_k gamma^k x[start_e + k]``.
///
/// With ``gamma=1`` (default) the undiscounted episode return. Accumulated in
/// float64 (backwards, Horner form) and rounded once.
///
/// Args:
///     x: ``[S]`` per-step values, pieces back to back.
///     lengths: ``[E]`` piece lengths.
///     gamma: discount in [0, 1].
///     check_finite: reject NaN/inf (default True).
///     out: ``[E]`` array to write into.
///
/// Returns:
///     ``[E]`` ndarray (0 for empty pieces).
///
/// Example:
///     >>> import numpy as np, rollscan
///     >>> rollscan.ragged.episode_sums(np.array([1.0, 2.0, 3.0]), [2, 0, 1])
///     array([3., 0., 3.])
#[pyfunction]
#[pyo3(name = "ragged_episode_sums", signature = (x, lengths, *, gamma=1.0, check_finite=true, out=None))]
fn episode_sums<'py>(
    py: Python<'py>,
    x: &Bound<'py, PyAny>,
    lengths: &Bound<'py, PyAny>,
    gamma: f64,
    check_finite: bool,
    out: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    macro_rules! go {
        ($t:ty, $f:expr) => {{
            let x = $f
                .pop()
                .flatten()
                .ok_or_else(|| internal_error("x missing"))?;
            let pa = PieceArgs::<$t>::new(py, lengths, None, None, None)?;
            let xg = x.try_readonly()?;
            let xv = one_d("x", &xg)?;
            let n_pieces = pa.lengths.len();
            let out = out_array::<$t>(py, "out", some(out), &[n_pieces])?;
            {
                let mut w = out.try_readwrite().map_err(|e| overlap_err("out", e))?;
                let ov = w
                    .as_array_mut()
                    .into_dimensionality::<Ix1>()
                    .map_err(|_| internal_error("out rank"))?;
                with_pieces!(pa, xv.len(), check_finite, |p| {
                    run(py, xv.len(), |par| {
                        ragged::episode_sums(xv, &p, gamma, check_finite, ov, par)
                    })?
                    .map_err(core_err)?
                });
            }
            Ok(out.into_any())
        }};
    }
    match promote_floats(py, &[("x", Some(x))])? {
        Floats::F32(mut f) => go!(f32, f),
        Floats::F64(mut f) => go!(f64, f),
    }
}

pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(discounted_returns, m)?)?;
    m.add_function(wrap_pyfunction!(gae, m)?)?;
    m.add_function(wrap_pyfunction!(episode_sums, m)?)?;
    Ok(())
}
