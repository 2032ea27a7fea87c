//! Python entry points of the action heads (API section 4). Each one extracts
//! its arguments (in place where the dtype allows), allocates or checks the
//! outputs, releases the GIL, runs the core, and maps errors with the batch
//! shape so that a core row becomes the caller's index.

use super::arrays::{
    bool_arg, float_arg, float_values, int_arg, out_arr, out_pair, promote, seed_arg, with_floats,
    writable, FloatArg, IntArg,
};
use super::errors::{ShapeError, Where};
use super::pool;
use crate::core::error::CoreResult;
use crate::core::float::Real;
use crate::core::heads::categorical::{self, CatOut, Logits, Out, Pick};
use crate::core::heads::gaussian::{self, GaussOut, LogStd, Normal};
use crate::core::heads::squashed::{self, Bounds};
use crate::core::par::Par;
use numpy::{Element, PyReadonlyArrayDyn, PyUntypedArrayMethods};
use pyo3::exceptions::PyRuntimeError;
use pyo3::prelude::*;
use pyo3::types::PyTuple;

type Any<'py> = Bound<'py, PyAny>;

/// Release the GIL and run `f` (on the pool when the work is large enough).
fn exec(
    py: Python<'_>,
    work: usize,
    w: &Where<'_>,
    f: impl FnOnce(Par) -> CoreResult<()> + Send,
) -> PyResult<()> {
    let par = Par::for_work(work, pool::par() == Par::Rayon);
    match py.detach(|| pool::run(par, || f(par))) {
        Err(msg) => Err(PyRuntimeError::new_err(msg)),
        Ok(Err(e)) => Err(w.err(e)),
        Ok(Ok(())) => Ok(()),
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

// ---------------------------------------------------------------- categorical

#[derive(Clone, Copy, PartialEq)]
enum CatKind {
    LogProb,
    Entropy,
    LogProbEntropy,
    Score,
    Index(Pick),
}

#[allow(clippy::too_many_arguments)]
fn cat_call<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    actions: Option<&Any<'py>>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    kind: CatKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let x = float_arg(logits, "logits")?;
    let acts = actions.map(|a| int_arg(a, "actions")).transpose()?;
    let mk = mask.map(|m| bool_arg(m, "mask")).transpose()?;
    match x {
        FloatArg::F32(x) => cat_typed(py, x, acts, mk, check_finite, kind, out),
        FloatArg::F64(x) => cat_typed(py, x, acts, mk, check_finite, kind, out),
    }
}

fn cat_typed<'py, F: Real + Element>(
    py: Python<'py>,
    x: PyReadonlyArrayDyn<'py, F>,
    acts: Option<IntArg<'py>>,
    mk: Option<PyReadonlyArrayDyn<'py, bool>>,
    check_finite: bool,
    kind: CatKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let shape = x.shape();
    let batch = batch_of("logits", shape)?;
    let (o1, o2) = match kind {
        CatKind::LogProbEntropy => out_pair(out)?,
        _ => (out.cloned(), None),
    };
    let n1 = if kind == CatKind::LogProbEntropy {
        "out[0]"
    } else {
        "out"
    };
    let mut idx_arr = None;
    let mut a1 = None;
    let mut a2 = None;
    match kind {
        CatKind::Index(_) => idx_arr = Some(out_arr::<i64>(py, o1.as_ref(), batch, n1)?),
        CatKind::Score => a1 = Some(out_arr::<F>(py, o1.as_ref(), shape, n1)?),
        CatKind::LogProbEntropy => {
            a1 = Some(out_arr::<F>(py, o1.as_ref(), batch, n1)?);
            a2 = Some(out_arr::<F>(py, o2.as_ref(), batch, "out[1]")?);
        }
        _ => a1 = Some(out_arr::<F>(py, o1.as_ref(), batch, n1)?),
    }
    let mut w1 = a1.as_ref().map(|a| writable(a, n1)).transpose()?;
    let mut w2 = a2.as_ref().map(|a| writable(a, "out[1]")).transpose()?;
    let mut wi = idx_arr.as_ref().map(|a| writable(a, n1)).transpose()?;
    {
        let v1 = w1.as_mut().map(|w| Out::new(n1, w.as_array_mut()));
        let v2 = w2.as_mut().map(|w| Out::new("out[1]", w.as_array_mut()));
        let vi = wi.as_mut().map(|w| Out::new(n1, w.as_array_mut()));
        let (pick, cat_out) = match kind {
            CatKind::LogProb => (
                Pick::Nothing,
                CatOut {
                    log_prob: v1,
                    ..Default::default()
                },
            ),
            CatKind::Entropy => (
                Pick::Nothing,
                CatOut {
                    entropy: v1,
                    ..Default::default()
                },
            ),
            CatKind::LogProbEntropy => (
                Pick::Nothing,
                CatOut {
                    log_prob: v1,
                    entropy: v2,
                    ..Default::default()
                },
            ),
            CatKind::Score => (
                Pick::Nothing,
                CatOut {
                    score: v1,
                    ..Default::default()
                },
            ),
            CatKind::Index(p) => (
                p,
                CatOut {
                    index: vi,
                    ..Default::default()
                },
            ),
        };
        let lg = Logits {
            logits: x.as_array(),
            mask: mk.as_ref().map(|m| m.as_array()),
            check_finite,
        };
        let av = acts.as_ref().map(|a| a.view());
        let mshape = mk.as_ref().map(|m| m.shape()).unwrap_or(&[]);
        let ashape = acts.as_ref().map(|a| a.shape()).unwrap_or(&[]);
        let args = [
            ("logits", shape, true),
            ("mask", mshape, true),
            ("actions", ashape, false),
        ];
        let w = Where { batch, args: &args };
        exec(py, x.len(), &w, move |par| {
            categorical::categorical(&lg, av, pick, cat_out, par)
        })?;
    }
    drop((w1, w2, wi));
    Ok(match kind {
        CatKind::Index(_) => idx_arr.expect("index output").into_any(),
        CatKind::LogProbEntropy => pair(
            py,
            a1.expect("first output").into_any(),
            a2.expect("second output").into_any(),
        )?,
        _ => a1.expect("output").into_any(),
    })
}

/// log p(actions) of a categorical over the last axis of `logits`.
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
    cat_call(
        py,
        logits,
        Some(actions),
        mask,
        check_finite,
        CatKind::LogProb,
        out,
    )
}

/// Entropy of a categorical over the last axis of `logits`.
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

/// (log p(actions), entropy) in one pass over the logits.
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
    cat_call(
        py,
        logits,
        Some(actions),
        mask,
        check_finite,
        CatKind::LogProbEntropy,
        out,
    )
}

/// d log p(actions) / d logits = onehot(actions) - softmax(logits).
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
    cat_call(
        py,
        logits,
        Some(actions),
        mask,
        check_finite,
        CatKind::Score,
        out,
    )
}

/// One sample per row, int64, from the stream (seed, row).
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
    let seed = seed_arg(seed)?;
    cat_call(
        py,
        logits,
        None,
        mask,
        check_finite,
        CatKind::Index(Pick::Sample(seed)),
        out,
    )
}

/// The most likely allowed action per row, int64 (first on ties).
#[pyfunction]
#[pyo3(signature = (logits, *, mask=None, check_finite=true, out=None))]
fn categorical_mode<'py>(
    py: Python<'py>,
    logits: &Any<'py>,
    mask: Option<&Any<'py>>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    cat_call(
        py,
        logits,
        None,
        mask,
        check_finite,
        CatKind::Index(Pick::Mode),
        out,
    )
}

/// KL(p || q) of two categoricals given by their logits.
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
    let p = float_arg(logits_p, "logits_p")?;
    let q = float_arg(logits_q, "logits_q")?;
    let mk = mask.map(|m| bool_arg(m, "mask")).transpose()?;
    with_floats!(promote(vec![p, q])?, v, F => {
        let shape = v[0].shape();
        let batch = batch_of("logits_p", shape)?;
        let arr = out_arr::<F>(py, out, batch, "out")?;
        {
            let mut wr = writable(&arr, "out")?;
            let lg = Logits {
                logits: v[0].as_array(),
                mask: mk.as_ref().map(|m| m.as_array()),
                check_finite,
            };
            let q = v[1].as_array();
            let o = Out::new("out", wr.as_array_mut());
            let mshape = mk.as_ref().map(|m| m.shape()).unwrap_or(&[]);
            let args = [
                ("logits_p", shape, true),
                ("logits_q", v[1].shape(), true),
                ("mask", mshape, true),
            ];
            let w = Where { batch, args: &args };
            exec(py, 2 * v[0].len(), &w, move |par| {
                categorical::categorical_kl(&lg, q, o, par)
            })?;
        }
        Ok(arr.into_any())
    })
}

// ------------------------------------------------------------------- gaussian

/// `log_std` is shared when it has no batch axis longer than 1.
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
    let m = float_arg(mean, "mean")?;
    let ls = float_arg(log_std, "log_std")?;
    let ls_shape = ls.shape().to_vec();
    let shared = if is_shared(&ls_shape) {
        Some(ls.values())
    } else {
        None
    };
    let a = actions.map(|a| float_arg(a, "actions")).transpose()?;
    let u = match pre_squash {
        Some(u) if !u.is_none() => Some(float_arg(u, "pre_squash")?),
        _ => None,
    };
    let (has_a, has_u) = (a.is_some(), u.is_some());
    let mut per_step = vec![m];
    per_step.extend(a);
    per_step.extend(u);
    let ls_pos = if shared.is_none() {
        per_step.push(ls);
        Some(per_step.len() - 1)
    } else {
        None
    };
    let d = per_step[0].shape().last().copied().unwrap_or(0);
    let bounds = match bounds {
        Some((lo, hi)) => Some(
            Bounds::new(&float_values(lo, "low")?, &float_values(hi, "high")?, d)
                .map_err(|e| Where { batch: &[], args: &[] }.err(e))?,
        ),
        None => None,
    };
    with_floats!(promote(per_step)?, v, F => {
        gauss_typed::<F>(py, &v, shared, &ls_shape, ls_pos, has_a, has_u, bounds.as_ref(), check_finite, kind, out)
    })
}

#[allow(clippy::too_many_arguments)]
fn gauss_typed<'py, F: Real + Element>(
    py: Python<'py>,
    v: &[PyReadonlyArrayDyn<'py, F>],
    shared: Option<Vec<f64>>,
    ls_shape: &[usize],
    ls_pos: Option<usize>,
    has_a: bool,
    has_u: bool,
    bounds: Option<&Bounds>,
    check_finite: bool,
    kind: GKind,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    let shape = v[0].shape();
    let batch = batch_of("mean", shape)?;
    let two = matches!(
        kind,
        GKind::LogProbEntropy | GKind::Score | GKind::SquashedSample(_)
    );
    let (o1, o2) = if two {
        out_pair(out)?
    } else {
        (out.cloned(), None)
    };
    let n1 = if two { "out[0]" } else { "out" };
    let per_row = matches!(
        kind,
        GKind::LogProb | GKind::LogProbEntropy | GKind::SquashedLogProb
    );
    let s1 = if per_row { batch } else { shape };
    let a1 = out_arr::<F>(py, o1.as_ref(), s1, n1)?;
    let a2 = if two {
        let s2 = if kind == GKind::LogProbEntropy {
            batch
        } else {
            shape
        };
        Some(out_arr::<F>(py, o2.as_ref(), s2, "out[1]")?)
    } else {
        None
    };
    {
        let mut w1 = writable(&a1, n1)?;
        let mut w2 = a2.as_ref().map(|a| writable(a, "out[1]")).transpose()?;
        let o1 = Out::new(n1, w1.as_array_mut());
        let o2 = w2.as_mut().map(|w| Out::new("out[1]", w.as_array_mut()));
        let nrm = Normal {
            mean: v[0].as_array(),
            log_std: match (&shared, ls_pos) {
                (Some(s), _) => LogStd::Shared(s.clone()),
                (None, Some(i)) => LogStd::PerRow(v[i].as_array()),
                (None, None) => unreachable!("log_std is shared or per step"),
            },
            check_finite,
        };
        let act = if has_a { Some(v[1].as_array()) } else { None };
        let pre = if has_u {
            Some(v[1 + has_a as usize].as_array())
        } else {
            None
        };
        let args = [
            ("mean", shape, true),
            ("log_std", ls_shape, true),
            ("actions", shape, true),
            ("pre_squash", shape, true),
        ];
        let w = Where { batch, args: &args };
        let bounds = bounds.cloned();
        exec(py, v[0].len(), &w, move |par| match kind {
            GKind::LogProb => gaussian::gaussian(
                &nrm,
                act,
                None,
                GaussOut {
                    log_prob: Some(o1),
                    ..Default::default()
                },
                par,
            ),
            GKind::LogProbEntropy => gaussian::gaussian(
                &nrm,
                act,
                None,
                GaussOut {
                    log_prob: Some(o1),
                    entropy: o2,
                    ..Default::default()
                },
                par,
            ),
            GKind::Score => gaussian::gaussian(
                &nrm,
                act,
                None,
                GaussOut {
                    d_mean: Some(o1),
                    d_log_std: o2,
                    ..Default::default()
                },
                par,
            ),
            GKind::Sample(seed) => gaussian::gaussian(
                &nrm,
                None,
                Some(seed),
                GaussOut {
                    sample: Some(o1),
                    ..Default::default()
                },
                par,
            ),
            GKind::SquashedLogProb => squashed::squashed_log_prob(
                &nrm,
                act.expect("actions"),
                pre,
                bounds.as_ref().expect("bounds"),
                o1,
                par,
            ),
            GKind::SquashedSample(seed) => squashed::squashed_sample(
                &nrm,
                seed,
                bounds.as_ref().expect("bounds"),
                o1,
                o2.expect("pre_squash output"),
                par,
            ),
        })?;
    }
    Ok(match a2 {
        Some(a2) => pair(py, a1.into_any(), a2.into_any())?,
        None => a1.into_any(),
    })
}

/// log N(actions; mean, exp(log_std)), summed over the last axis.
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
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        None,
        None,
        check_finite,
        GKind::LogProb,
        out,
    )
}

/// (log-density, entropy) of a diagonal Gaussian in one pass.
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
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        None,
        None,
        check_finite,
        GKind::LogProbEntropy,
        out,
    )
}

/// (d log p / d mean, d log p / d log_std).
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
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        None,
        None,
        check_finite,
        GKind::Score,
        out,
    )
}

/// mean + exp(log_std) * N(0, 1), row i from the stream (seed, i).
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
    let seed = seed_arg(seed)?;
    gauss_call(
        py,
        mean,
        log_std,
        None,
        None,
        None,
        check_finite,
        GKind::Sample(seed),
        out,
    )
}

/// Log-density of the tanh-squashed Gaussian on [low, high].
#[pyfunction]
#[pyo3(signature = (mean, log_std, actions, *, low=None, high=None, pre_squash=None, check_finite=true, out=None))]
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
    let lo = default_bound(py, low, -1.0)?;
    let hi = default_bound(py, high, 1.0)?;
    gauss_call(
        py,
        mean,
        log_std,
        Some(actions),
        pre_squash,
        Some((&lo, &hi)),
        check_finite,
        GKind::SquashedLogProb,
        out,
    )
}

/// (actions, pre_squash) sampled from the tanh-squashed Gaussian.
#[pyfunction]
#[pyo3(signature = (mean, log_std, *, seed, low=None, high=None, check_finite=true, out=None))]
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
    let seed = seed_arg(seed)?;
    let lo = default_bound(py, low, -1.0)?;
    let hi = default_bound(py, high, 1.0)?;
    gauss_call(
        py,
        mean,
        log_std,
        None,
        None,
        Some((&lo, &hi)),
        check_finite,
        GKind::SquashedSample(seed),
        out,
    )
}

fn default_bound<'py>(py: Python<'py>, v: Option<&Any<'py>>, d: f64) -> PyResult<Any<'py>> {
    match v {
        Some(v) if !v.is_none() => Ok(v.clone()),
        _ => Ok(d.into_pyobject(py)?.into_any()),
    }
}

/// Entropy of a diagonal Gaussian: sum over the last axis of
/// log_std + (1 + ln 2 pi) / 2.
#[pyfunction]
#[pyo3(signature = (log_std, *, check_finite=true, out=None))]
fn gaussian_entropy<'py>(
    py: Python<'py>,
    log_std: &Any<'py>,
    check_finite: bool,
    out: Option<&Any<'py>>,
) -> PyResult<Any<'py>> {
    with_floats!(promote(vec![float_arg(log_std, "log_std")?])?, v, F => {
        let shape = v[0].shape();
        let batch = batch_of("log_std", shape)?;
        let arr = out_arr::<F>(py, out, batch, "out")?;
        {
            let mut wr = writable(&arr, "out")?;
            let o = Out::new("out", wr.as_array_mut());
            let x = v[0].as_array();
            let args = [("log_std", shape, true)];
            let w = Where { batch, args: &args };
            exec(py, v[0].len(), &w, move |par| {
                gaussian::gaussian_entropy(x, check_finite, o, par)
            })?;
        }
        Ok(arr.into_any())
    })
}

/// KL(p || q) of two diagonal Gaussians, summed over the last axis.
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
    let mp = float_arg(mean_p, "mean_p")?;
    let mq = float_arg(mean_q, "mean_q")?;
    let lp = float_arg(log_std_p, "log_std_p")?;
    let lq = float_arg(log_std_q, "log_std_q")?;
    let (lp_shape, lq_shape) = (lp.shape().to_vec(), lq.shape().to_vec());
    let sp = is_shared(&lp_shape).then(|| lp.values());
    let sq = is_shared(&lq_shape).then(|| lq.values());
    let mut per_step = vec![mp, mq];
    let lp_pos = sp.is_none().then(|| {
        per_step.push(lp);
        per_step.len() - 1
    });
    let lq_pos = sq.is_none().then(|| {
        per_step.push(lq);
        per_step.len() - 1
    });
    with_floats!(promote(per_step)?, v, F => {
        let shape = v[0].shape();
        let batch = batch_of("mean_p", shape)?;
        let arr = out_arr::<F>(py, out, batch, "out")?;
        {
            let mut wr = writable(&arr, "out")?;
            let o = Out::new("out", wr.as_array_mut());
            let ls = |s: &Option<Vec<f64>>, pos: Option<usize>| match (s, pos) {
                (Some(s), _) => LogStd::Shared(s.clone()),
                (None, Some(i)) => LogStd::PerRow(v[i].as_array()),
                (None, None) => unreachable!("log_std is shared or per step"),
            };
            let p = Normal { mean: v[0].as_array(), log_std: ls(&sp, lp_pos), check_finite };
            let q = Normal { mean: v[1].as_array(), log_std: ls(&sq, lq_pos), check_finite };
            let args = [
                ("mean_p", shape, true),
                ("mean_q", v[1].shape(), true),
                ("log_std_p", &lp_shape[..], true),
                ("log_std_q", &lq_shape[..], true),
            ];
            let w = Where { batch, args: &args };
            exec(py, 2 * v[0].len(), &w, move |par| gaussian::gaussian_kl(&p, &q, o, par))?;
        }
        Ok(arr.into_any())
    })
}

pub(crate) fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
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
