//! Tanh-squashed diagonal Gaussian on `[low, high]`:
//!
//! ```text
//! u ~ N(mean, e^{log_std}),   a = low + (high - low) (tanh(u) + 1) / 2
//! log p(a) = log N(u) - sum_j [ ln((high_j - low_j) / 2) + ln(1 - tanh(u_j)^2) ]
//! ln(1 - tanh(u)^2) = 2 (ln 2 - u - softplus(-2u))
//! ```
//!
//! `u` is the given `pre_squash`, or `atanh` of the rescaled action computed
//! as `(ln(a - low) - ln(high - a)) / 2` (no cancellation near the bounds).
//! An action exactly on a bound has `u = +-inf` and log-density `-inf` (the
//! limit); pass `pre_squash` where the squash saturates in floating point.
//! Samples draw the same `u` as [`super::gaussian::gaussian`] with the same
//! seed, and squash it with `(tanh(u) + 1) / 2 = 1 / (1 + e^{-2u})`.

use super::categorical::Out;
use super::gaussian::{run, GaussOut, Normal};
use crate::core::error::{CoreError, CoreResult};
use crate::core::float::Real;
use crate::core::par::Par;
use ndarray::ArrayViewD;

/// Per-dimension bounds (`D` values each), `low < high`, all finite.
#[derive(Debug, Clone, PartialEq)]
pub struct Bounds {
    /// Lower bounds.
    pub low: Vec<f64>,
    /// Upper bounds.
    pub high: Vec<f64>,
}

impl Bounds {
    /// Bounds from one value or `d` values each.
    pub fn new(low: &[f64], high: &[f64], d: usize) -> CoreResult<Bounds> {
        let expand = |v: &[f64], name: &'static str| -> CoreResult<Vec<f64>> {
            let v = match v.len() {
                1 => vec![v[0]; d],
                n if n == d => v.to_vec(),
                n => {
                    return Err(CoreError::Shape(format!(
                        "{name} has {n} values but the actions have {d} dimensions; \
                         pass one value or one per dimension"
                    )))
                }
            };
            if let Some(j) = v.iter().position(|x| !x.is_finite()) {
                return Err(CoreError::input(
                    name,
                    format!("must be finite, got {} at dimension {j}", v[j]),
                ));
            }
            Ok(v)
        };
        let low = expand(low, "low")?;
        let high = expand(high, "high")?;
        if let Some(j) = (0..d).find(|&j| low[j] >= high[j]) {
            return Err(CoreError::input(
                "high",
                format!(
                    "must exceed low in every dimension, got low = {}, high = {} at dimension {j}",
                    low[j], high[j]
                ),
            ));
        }
        Ok(Bounds { low, high })
    }
}

/// The squashed row pass with any outputs (`log_prob`; or `sample` with
/// `pre_squash` and a seed).
pub fn squashed<F: Real>(
    nrm: &Normal<'_, F>,
    actions: Option<ArrayViewD<'_, F>>,
    pre_squash: Option<ArrayViewD<'_, F>>,
    seed: Option<u64>,
    bounds: &Bounds,
    out: GaussOut<'_, F>,
    par: Par,
) -> CoreResult<()> {
    if out.entropy.is_some() || out.d_mean.is_some() || out.d_log_std.is_some() {
        return Err(CoreError::input(
            "out",
            "the squashed head has a log-density and samples only",
        ));
    }
    run(nrm, actions, pre_squash, seed, Some(bounds), out, par)
}

/// `log p(actions)` of the squashed Gaussian, `[batch...]`.
pub fn squashed_log_prob<F: Real>(
    nrm: &Normal<'_, F>,
    actions: ArrayViewD<'_, F>,
    pre_squash: Option<ArrayViewD<'_, F>>,
    bounds: &Bounds,
    out: Out<'_, F>,
    par: Par,
) -> CoreResult<()> {
    run(
        nrm,
        Some(actions),
        pre_squash,
        None,
        Some(bounds),
        GaussOut {
            log_prob: Some(out),
            ..Default::default()
        },
        par,
    )
}

/// A squashed sample and its pre-squash value, both `[batch..., D]`.
pub fn squashed_sample<'o, F: Real>(
    nrm: &Normal<'_, F>,
    seed: u64,
    bounds: &Bounds,
    actions: Out<'o, F>,
    pre_squash: Out<'o, F>,
    par: Par,
) -> CoreResult<()> {
    run(
        nrm,
        None,
        None,
        Some(seed),
        Some(bounds),
        GaussOut {
            sample: Some(actions),
            pre_squash: Some(pre_squash),
            ..Default::default()
        },
        par,
    )
}
