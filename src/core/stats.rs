//! Deterministic moments and normalisation.
//!
//! Sums run over fixed, data-defined blocks in `f64`; the block partials are
//! combined in block order, so the result does not depend on the thread count.
//! The variance is the two-pass form `sum((x - mean)^2)`, not `E[x^2] - mean^2`.

use super::error::{CoreError, CoreResult};
use super::float::Real;
use super::par::Par;
use ndarray::{ArrayView, ArrayViewMut, Axis, Dimension, Zip};

const BLOCK: usize = 1 << 13;

/// Count, mean and sum of squared deviations of the selected elements.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Moments {
    /// Number of elements selected.
    pub count: usize,
    /// Their mean (0 when `count == 0`).
    pub mean: f64,
    /// `sum((x - mean)^2)`.
    pub m2: f64,
}

impl Moments {
    /// `sqrt(m2 / (count - ddof))`.
    pub fn std(&self, ddof: usize) -> CoreResult<f64> {
        if self.count <= ddof {
            return Err(CoreError::input(
                "ddof",
                format!(
                    "must be smaller than the number of selected elements ({}), got {ddof}",
                    self.count
                ),
            ));
        }
        Ok((self.m2 / (self.count - ddof) as f64).sqrt())
    }
}

/// Block-wise reduction `f(block) -> (a, b)` summed in block order.
fn reduce<F, D>(
    x: &ArrayView<'_, F, D>,
    mask: Option<&ArrayView<'_, bool, D>>,
    par: Par,
    f: &(dyn Fn(f64, bool) -> (f64, f64) + Sync),
) -> (f64, f64)
where
    F: Real,
    D: Dimension,
{
    let parts: Vec<(f64, f64)> = match (x.as_slice(), mask.map(|m| m.as_slice())) {
        // Fast path: both C-contiguous in the same logical order.
        (Some(xs), None) => {
            let blocks: Vec<&[F]> = xs.chunks(BLOCK).collect();
            par.map(blocks, |b| {
                b.iter().fold((0.0, 0.0), |(s, q), v| {
                    let (a, c) = f(v.to_f64(), true);
                    (s + a, q + c)
                })
            })
        }
        (Some(xs), Some(Some(ms))) => {
            let blocks: Vec<(&[F], &[bool])> = xs.chunks(BLOCK).zip(ms.chunks(BLOCK)).collect();
            par.map(blocks, |(b, m)| {
                b.iter().zip(m).fold((0.0, 0.0), |(s, q), (v, &k)| {
                    let (a, c) = f(v.to_f64(), k);
                    (s + a, q + c)
                })
            })
        }
        // General strides: one block per index of the first axis.
        _ => {
            if x.ndim() == 0 {
                let v = x.iter().next().map(|v| v.to_f64()).unwrap_or(0.0);
                let k = mask.and_then(|m| m.iter().next().copied()).unwrap_or(true);
                vec![f(v, k)]
            } else {
                let xd = x.view().into_dyn();
                let md = mask.map(|m| m.view().into_dyn());
                let rows: Vec<_> = match &md {
                    None => xd.axis_iter(Axis(0)).map(|r| (r, None)).collect(),
                    Some(m) => xd
                        .axis_iter(Axis(0))
                        .zip(m.axis_iter(Axis(0)))
                        .map(|(r, k)| (r, Some(k)))
                        .collect(),
                };
                par.map(rows, |(r, k)| {
                    let mut acc = (0.0, 0.0);
                    match k {
                        None => r.iter().for_each(|v| {
                            let (a, c) = f(v.to_f64(), true);
                            acc.0 += a;
                            acc.1 += c;
                        }),
                        Some(k) => Zip::from(&r).and(&k).for_each(|v, &m| {
                            let (a, c) = f(v.to_f64(), m);
                            acc.0 += a;
                            acc.1 += c;
                        }),
                    }
                    acc
                })
            }
        }
    };
    parts
        .iter()
        .fold((0.0, 0.0), |(s, q), &(a, b)| (s + a, q + b))
}

/// Moments of `x` over the elements where `mask` is true (all when `None`).
pub fn moments<F: Real, D: Dimension>(
    x: &ArrayView<'_, F, D>,
    mask: Option<&ArrayView<'_, bool, D>>,
    par: Par,
) -> Moments {
    let (sum, count) = reduce(x, mask, par, &|v, k| if k { (v, 1.0) } else { (0.0, 0.0) });
    let count = count as usize;
    if count == 0 {
        return Moments {
            count: 0,
            mean: 0.0,
            m2: 0.0,
        };
    }
    let mean = sum / count as f64;
    let (m2, _) = reduce(x, mask, par, &|v, k| {
        if k {
            ((v - mean) * (v - mean), 0.0)
        } else {
            (0.0, 0.0)
        }
    });
    Moments { count, mean, m2 }
}

/// `out = (x - mean) / (std + eps)` where `mask` holds, `out = x` elsewhere.
pub fn normalize<F: Real, D: Dimension>(
    x: &ArrayView<'_, F, D>,
    mask: Option<&ArrayView<'_, bool, D>>,
    eps: f64,
    ddof: usize,
    out: &mut ArrayViewMut<'_, F, D>,
    par: Par,
) -> CoreResult<()> {
    let (mean, scale) = affine(x, mask, eps, ddof, par)?;
    let map = |o: &mut F, v: &F, k: bool| {
        *o = if k {
            F::from_f64((v.to_f64() - mean) * scale)
        } else {
            *v
        };
    };
    match (mask, par) {
        (None, Par::Seq) => Zip::from(out).and(x).for_each(|o, v| map(o, v, true)),
        (None, Par::Rayon) => Zip::from(out).and(x).par_for_each(|o, v| map(o, v, true)),
        (Some(m), Par::Seq) => Zip::from(out)
            .and(x)
            .and(m)
            .for_each(|o, v, &k| map(o, v, k)),
        (Some(m), Par::Rayon) => Zip::from(out)
            .and(x)
            .and(m)
            .par_for_each(|o, v, &k| map(o, v, k)),
    }
    Ok(())
}

/// In-place form of [`normalize`].
pub fn normalize_inplace<F: Real, D: Dimension>(
    x: &mut ArrayViewMut<'_, F, D>,
    mask: Option<&ArrayView<'_, bool, D>>,
    eps: f64,
    ddof: usize,
    par: Par,
) -> CoreResult<()> {
    let (mean, scale) = affine(&x.view(), mask, eps, ddof, par)?;
    let map = |o: &mut F, k: bool| {
        if k {
            *o = F::from_f64((o.to_f64() - mean) * scale);
        }
    };
    match (mask, par) {
        (None, Par::Seq) => Zip::from(x).for_each(|o| map(o, true)),
        (None, Par::Rayon) => Zip::from(x).par_for_each(|o| map(o, true)),
        (Some(m), Par::Seq) => Zip::from(x).and(m).for_each(|o, &k| map(o, k)),
        (Some(m), Par::Rayon) => Zip::from(x).and(m).par_for_each(|o, &k| map(o, k)),
    }
    Ok(())
}

/// `(mean, 1 / (std + eps))`, or `(0, 1)` (identity) when nothing is selected.
fn affine<F: Real, D: Dimension>(
    x: &ArrayView<'_, F, D>,
    mask: Option<&ArrayView<'_, bool, D>>,
    eps: f64,
    ddof: usize,
    par: Par,
) -> CoreResult<(f64, f64)> {
    if !(eps.is_finite() && eps >= 0.0) {
        return Err(CoreError::input(
            "eps",
            format!("must be finite and >= 0, got {eps}"),
        ));
    }
    let m = moments(x, mask, par);
    if m.count == 0 {
        return Ok((0.0, 1.0));
    }
    let std = m.std(ddof)?;
    if std + eps == 0.0 {
        return Err(CoreError::input(
            "x",
            "has zero spread and eps is 0: cannot normalise (pass eps > 0)",
        ));
    }
    Ok((m.mean, 1.0 / (std + eps)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, Array2, ShapeBuilder};

    #[test]
    fn moments_match_two_pass_definition() {
        let x = array![[1.0f64, 2.0], [3.0, 10.0]];
        let m = moments(&x.view(), None, Par::Seq);
        assert_eq!(m.count, 4);
        assert!((m.mean - 4.0).abs() < 1e-15);
        assert!((m.m2 - (9.0 + 4.0 + 1.0 + 36.0)).abs() < 1e-12);
        let mask = array![[true, false], [true, false]];
        let mm = moments(&x.view(), Some(&mask.view()), Par::Seq);
        assert_eq!(mm.count, 2);
        assert!((mm.mean - 2.0).abs() < 1e-15);
    }

    #[test]
    fn strided_and_parallel_agree_bitwise() {
        let c = Array2::from_shape_fn((300, 200), |(i, j)| ((i * 7 + j * 13) % 17) as f32 * 0.37);
        let f = Array2::from_shape_fn((300, 200).f(), |(i, j)| {
            ((i * 7 + j * 13) % 17) as f32 * 0.37
        });
        let a = moments(&c.view(), None, Par::Seq);
        let b = moments(&c.view(), None, Par::Rayon);
        assert_eq!(a, b);
        let s = moments(&f.view(), None, Par::Rayon);
        assert!((s.mean - a.mean).abs() < 1e-12);
        let mut out = Array2::<f32>::zeros((300, 200));
        normalize(&c.view(), None, 1e-8, 0, &mut out.view_mut(), Par::Rayon).unwrap();
        let n = moments(&out.view(), None, Par::Seq);
        assert!(n.mean.abs() < 1e-6);
        assert!((n.std(0).unwrap() - 1.0).abs() < 1e-5);
        let mut inplace = c.clone();
        normalize_inplace(&mut inplace.view_mut(), None, 1e-8, 0, Par::Seq).unwrap();
        assert_eq!(inplace, out);
    }

    #[test]
    fn degenerate_inputs() {
        let x = array![5.0f64];
        assert!(normalize_inplace(&mut x.clone().view_mut(), None, 1e-8, 1, Par::Seq).is_err());
        let mut y = array![2.0f64, 2.0];
        normalize_inplace(&mut y.view_mut(), None, 1e-8, 0, Par::Seq).unwrap();
        assert_eq!(y, array![0.0, 0.0]);
        assert!(normalize_inplace(&mut y.view_mut(), None, 0.0, 0, Par::Seq).is_err());
        let mask = array![false, false];
        let mut z = array![1.0f64, 3.0];
        normalize_inplace(&mut z.view_mut(), Some(&mask.view()), 1e-8, 0, Par::Seq).unwrap();
        assert_eq!(z, array![1.0, 3.0]);
    }
}
