//! Streaming statistics carried across calls: moments of a stream of
//! batches, reward scaling by the spread of the discounted return, and an
//! episode tracker. All state is `f64` (counts are integers) and owned by the
//! caller; the kernels here only advance it.

use super::error::{check_unit, At, CoreError, CoreResult};
use super::float::Real;
use super::par::Par;
use super::timemajor;
use ndarray::{
    ArrayD, ArrayView2, ArrayViewD, ArrayViewMut2, ArrayViewMutD, Axis, RemoveAxis, Zip,
};

/// Count, mean and sum of squared deviations of every element of a
/// statistic's shape (flattened to `K` entries).
#[derive(Debug, Clone, PartialEq)]
pub struct VecMoments {
    /// Number of samples seen.
    pub count: u64,
    /// Per-entry mean (0 while `count == 0`).
    pub mean: Vec<f64>,
    /// Per-entry `sum((x - mean)^2)`.
    pub m2: Vec<f64>,
}

impl VecMoments {
    /// No samples yet, `k` entries.
    pub fn empty(k: usize) -> Self {
        VecMoments {
            count: 0,
            mean: vec![0.0; k],
            m2: vec![0.0; k],
        }
    }

    /// The moments of the union of both sample sets (Chan, Golub and LeVeque
    /// 1979, the pairwise update):
    ///
    /// ```text
    /// n = na + nb,  d = mean_b - mean_a
    /// mean = mean_a + d * nb / n
    /// m2   = m2_a + m2_b + d^2 * na * nb / n
    /// ```
    pub fn merge(&self, other: &VecMoments) -> CoreResult<VecMoments> {
        if self.mean.len() != other.mean.len() {
            return Err(CoreError::shape_mismatch(
                "other",
                &[other.mean.len()],
                "self",
                &[self.mean.len()],
                "both must track statistics of the same shape",
            ));
        }
        if other.count == 0 {
            return Ok(self.clone());
        }
        if self.count == 0 {
            return Ok(other.clone());
        }
        let (na, nb) = (self.count as f64, other.count as f64);
        let n = na + nb;
        let (wb, wab) = (nb / n, na * nb / n);
        let mut out = VecMoments::empty(self.mean.len());
        out.count = self.count + other.count;
        for k in 0..self.mean.len() {
            let d = other.mean[k] - self.mean[k];
            out.mean[k] = self.mean[k] + d * wb;
            out.m2[k] = self.m2[k] + other.m2[k] + d * d * wab;
        }
        Ok(out)
    }
}

/// Rows per block of [`batch_moments`]: about this many elements.
const BLOCK: usize = 1 << 14;

/// Moments over axis 0 of `x` (`[B, ...]`, any strides), one entry per element
/// of the remaining shape in row-major order. Blocks of rows are reduced with
/// the two-pass form and merged in block order: bit-identical for any thread
/// count.
pub fn batch_moments<F: Real>(
    x: &ArrayViewD<'_, F>,
    check_finite: bool,
    par: Par,
) -> CoreResult<VecMoments> {
    if x.ndim() == 0 {
        return Err(CoreError::input("batch", "must have a batch axis (axis 0)"));
    }
    let b = x.len_of(Axis(0));
    let k: usize = x.shape()[1..].iter().product();
    if check_finite {
        if let Some(i) = x.iter().position(|v| !v.finite()) {
            return Err(CoreError::non_finite("batch", At::Flat(i)));
        }
    }
    if b == 0 || k == 0 {
        return Ok(VecMoments::empty(k));
    }
    let per = (BLOCK / k).max(1);
    let starts: Vec<usize> = (0..b).step_by(per).collect();
    let parts = par.map(starts, |r0| {
        let blk = x.slice_axis(Axis(0), (r0..(r0 + per).min(b)).into());
        let n = blk.len_of(Axis(0));
        let inner = blk.raw_dim().remove_axis(Axis(0));
        let mut sum = ArrayD::<f64>::zeros(inner.clone());
        for row in blk.axis_iter(Axis(0)) {
            Zip::from(&mut sum)
                .and(&row)
                .for_each(|s, v| *s += v.to_f64());
        }
        let mean = sum.mapv(|s| s / n as f64);
        let mut m2 = ArrayD::<f64>::zeros(inner);
        for row in blk.axis_iter(Axis(0)) {
            Zip::from(&mut m2)
                .and(&row)
                .and(&mean)
                .for_each(|q, v, &m| {
                    let d = v.to_f64() - m;
                    *q += d * d;
                });
        }
        VecMoments {
            count: n as u64,
            mean: mean.iter().copied().collect(),
            m2: m2.iter().copied().collect(),
        }
    });
    let mut acc = VecMoments::empty(k);
    for p in &parts {
        acc = acc.merge(p)?;
    }
    Ok(acc)
}

/// `out = clamp((x - shift) * scale, -clip, clip)` elementwise; `shift` and
/// `scale` are already broadcast to the shape of `x`.
pub fn affine_clip<F: Real>(
    x: &ArrayViewD<'_, F>,
    shift: &ArrayViewD<'_, f64>,
    scale: &ArrayViewD<'_, f64>,
    clip: Option<f64>,
    out: &mut ArrayViewMutD<'_, F>,
    par: Par,
) -> CoreResult<()> {
    if let Some(c) = clip {
        if c.is_nan() || c < 0.0 {
            return Err(CoreError::input("clip", format!("must be >= 0, got {c}")));
        }
    }
    let hi = clip.unwrap_or(f64::INFINITY);
    let f = |o: &mut F, v: &F, &m: &f64, &s: &f64| {
        let y = (v.to_f64() - m) * s;
        // Explicit comparisons let a NaN through unchanged.
        *o = F::from_f64(if y > hi {
            hi
        } else if y < -hi {
            -hi
        } else {
            y
        });
    };
    let z = Zip::from(out.view_mut()).and(x).and(shift).and(scale);
    match par {
        Par::Seq => z.for_each(f),
        Par::Rayon => z.par_for_each(f),
    }
    Ok(())
}

/// The state of a reward scaler: each stream's running discounted return and
/// the moments of every return seen so far (all streams pooled).
#[derive(Debug, Clone, PartialEq)]
pub struct ScalerState {
    /// Per-stream running return `R` (reset to 0 after an episode end).
    pub returns: Vec<f64>,
    /// Pooled moments of `R` over all steps and streams seen.
    pub moments: VecMoments,
}

/// The settings of a reward scaler.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScalerParams {
    /// Discount of the running return, in `[0, 1]`.
    pub gamma: f64,
    /// Added to the std before dividing (>= 0).
    pub eps: f64,
    /// Scaled rewards are clipped to `[-clip, clip]` when given.
    pub clip: Option<f64>,
}

/// Scale rewards `[T, N]` row by row. For each step `t`, per stream `m`:
///
/// ```text
/// R_m   <- gamma * R_m + r[t, m]
/// (the moments take in the row R_0 .. R_{N-1})
/// out[t, m] = clamp(r[t, m] / d, -clip, clip),  d = std + eps if std > 0 else 1
/// R_m   <- 0 if terminated[t, m] or truncated[t, m]
/// ```
///
/// `std` is the population std of every running return seen so far; it is
/// exactly 0 while every return seen is equal. A row at a time makes the
/// result independent of how the steps are chunked.
pub fn scale_rewards<F: Real>(
    rewards: &ArrayView2<'_, F>,
    terminated: Option<&ArrayView2<'_, bool>>,
    truncated: Option<&ArrayView2<'_, bool>>,
    p: ScalerParams,
    check_finite: bool,
    state: &mut ScalerState,
    out: &mut ArrayViewMut2<'_, F>,
) -> CoreResult<()> {
    check_unit("gamma", p.gamma)?;
    if !(p.eps.is_finite() && p.eps >= 0.0) {
        return Err(CoreError::input(
            "eps",
            format!("must be finite and >= 0, got {}", p.eps),
        ));
    }
    if let Some(c) = p.clip {
        if c.is_nan() || c <= 0.0 {
            return Err(CoreError::input("clip", format!("must be > 0, got {c}")));
        }
    }
    let (t_len, n) = rewards.dim();
    check_streams(rewards.shape(), state.returns.len())?;
    if state.moments.mean.len() != 1 {
        return Err(CoreError::input("state", "must hold scalar moments"));
    }
    flags_shape("terminated", terminated, rewards.shape())?;
    flags_shape("truncated", truncated, rewards.shape())?;
    timemajor::check_out("out", out.shape(), rewards.shape())?;
    if check_finite {
        timemajor::check_finite_2d("rewards", rewards, Par::Seq)?;
    }
    let hi = p.clip.unwrap_or(f64::INFINITY);
    let mut st = state.clone();
    let mut row = vec![0.0f64; n];
    for t in 0..t_len {
        for m in 0..n {
            st.returns[m] = p.gamma * st.returns[m] + rewards[[t, m]].to_f64();
        }
        if n > 0 {
            // Two-pass about the first value: a row of equal returns gives
            // exactly mean = R_0 and m2 = 0, so "no spread yet" is exact.
            let x0 = st.returns[0];
            let md = st.returns.iter().map(|r| r - x0).sum::<f64>() / n as f64;
            let mean = x0 + md;
            let m2 = st
                .returns
                .iter()
                .map(|r| (r - x0 - md) * (r - x0 - md))
                .sum();
            st.moments = st.moments.merge(&VecMoments {
                count: n as u64,
                mean: vec![mean],
                m2: vec![m2],
            })?;
        }
        let std = if st.moments.count > 0 {
            (st.moments.m2[0] / st.moments.count as f64).sqrt()
        } else {
            0.0
        };
        let d = if std > 0.0 { std + p.eps } else { 1.0 };
        for (m, y) in row.iter_mut().enumerate() {
            let v = rewards[[t, m]].to_f64() / d;
            *y = if v > hi {
                hi
            } else if v < -hi {
                -hi
            } else {
                v
            };
        }
        for (m, &y) in row.iter().enumerate() {
            out[[t, m]] = F::from_f64(y);
            let end = terminated.is_some_and(|a| a[[t, m]]) || truncated.is_some_and(|a| a[[t, m]]);
            if end {
                st.returns[m] = 0.0;
            }
        }
    }
    *state = st;
    Ok(())
}

fn check_streams(shape: &[usize], n: usize) -> CoreResult<()> {
    if shape[1] != n {
        return Err(CoreError::Shape(format!(
            "rewards has shape {} but num_envs is {n}; rewards must be (T, num_envs)",
            super::error::fmt_shape(shape)
        )));
    }
    Ok(())
}

fn flags_shape(
    name: &'static str,
    a: Option<&ArrayView2<'_, bool>>,
    shape: &[usize],
) -> CoreResult<()> {
    match a {
        Some(a) if a.shape() != shape => Err(CoreError::shape_mismatch(
            name,
            a.shape(),
            "rewards",
            shape,
            "per-step arrays must have the shape of rewards",
        )),
        _ => Ok(()),
    }
}

/// Per-stream progress of the episodes not finished yet.
#[derive(Debug, Clone, PartialEq)]
pub struct TrackerState {
    /// Sum of rewards so far of each stream's current episode.
    pub returns: Vec<f64>,
    /// Steps so far of each stream's current episode.
    pub lengths: Vec<u64>,
}

/// The episodes that finished inside one chunk, in (step, stream) order.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Finished {
    /// Undiscounted return (sum of rewards, in `f64`).
    pub returns: Vec<f64>,
    /// Number of steps, counting those in earlier chunks.
    pub lengths: Vec<u64>,
    /// The stream the episode ran in.
    pub streams: Vec<u64>,
    /// The row of the chunk holding the episode's last step.
    pub steps: Vec<u64>,
    /// `true` if it ended in a terminal state, `false` if it was truncated.
    pub terminal: Vec<bool>,
}

/// Feed one time-major chunk `[T, N]`: every step adds its reward to its
/// stream's open episode; a step with `terminated` or `truncated` closes it.
pub fn track_episodes<F: Real>(
    rewards: &ArrayView2<'_, F>,
    terminated: Option<&ArrayView2<'_, bool>>,
    truncated: Option<&ArrayView2<'_, bool>>,
    check_finite: bool,
    state: &mut TrackerState,
) -> CoreResult<Finished> {
    let (t_len, n) = rewards.dim();
    check_streams(rewards.shape(), state.returns.len())?;
    flags_shape("terminated", terminated, rewards.shape())?;
    flags_shape("truncated", truncated, rewards.shape())?;
    if check_finite {
        timemajor::check_finite_2d("rewards", rewards, Par::Seq)?;
    }
    let mut st = state.clone();
    let mut done = Finished::default();
    for t in 0..t_len {
        for m in 0..n {
            st.returns[m] += rewards[[t, m]].to_f64();
            st.lengths[m] += 1;
            let te = terminated.is_some_and(|a| a[[t, m]]);
            let tr = truncated.is_some_and(|a| a[[t, m]]);
            if te || tr {
                done.returns.push(st.returns[m]);
                done.lengths.push(st.lengths[m]);
                done.streams.push(m as u64);
                done.steps.push(t as u64);
                done.terminal.push(te);
                st.returns[m] = 0.0;
                st.lengths[m] = 0;
            }
        }
    }
    *state = st;
    Ok(done)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, Array3, ShapeBuilder};

    fn lcg(seed: &mut u64) -> f64 {
        *seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*seed >> 11) as f64) / ((1u64 << 53) as f64)
    }

    #[test]
    fn batch_moments_match_two_pass_and_merge_any_split() {
        let mut seed = 2u64;
        let x = Array3::from_shape_fn((5000, 3, 2).f(), |_| lcg(&mut seed) * 10.0 - 3.0);
        let all = batch_moments(&x.view().into_dyn(), true, Par::Rayon).unwrap();
        assert_eq!(all.count, 5000);
        // Plain two-pass per entry (common practice, no source).
        for (k, (i, j)) in [(0, 0), (0, 1), (1, 0), (2, 1)].into_iter().enumerate() {
            let col: Vec<f64> = (0..5000).map(|b| x[[b, i, j]]).collect();
            let mean = col.iter().sum::<f64>() / 5000.0;
            let m2: f64 = col.iter().map(|v| (v - mean) * (v - mean)).sum();
            let idx = i * 2 + j;
            assert!((all.mean[idx] - mean).abs() < 1e-12, "{k}");
            assert!((all.m2[idx] - m2).abs() < 1e-9 * m2);
        }
        let a = batch_moments(
            &x.slice(ndarray::s![..1234, .., ..]).into_dyn(),
            true,
            Par::Seq,
        )
        .unwrap();
        let b = batch_moments(
            &x.slice(ndarray::s![1234.., .., ..]).into_dyn(),
            true,
            Par::Seq,
        )
        .unwrap();
        let ab = a.merge(&b).unwrap();
        assert_eq!(ab.count, all.count);
        for k in 0..6 {
            assert!((ab.mean[k] - all.mean[k]).abs() < 1e-12);
            assert!((ab.m2[k] - all.m2[k]).abs() < 1e-9 * all.m2[k]);
        }
        assert_eq!(
            batch_moments(&x.view().into_dyn(), true, Par::Seq).unwrap(),
            all
        );
        assert_eq!(VecMoments::empty(6).merge(&all).unwrap(), all);
        assert!(VecMoments::empty(5).merge(&all).is_err());
    }

    #[test]
    fn scaler_is_chunking_independent() {
        let mut seed = 4u64;
        let (t, n) = (97, 3);
        let r = Array2::from_shape_fn((t, n), |_| lcg(&mut seed) * 2.0 - 0.5);
        let te = Array2::from_shape_fn((t, n), |_| lcg(&mut seed) < 0.1);
        let p = ScalerParams {
            gamma: 0.9,
            eps: 1e-8,
            clip: Some(5.0),
        };
        let fresh = || ScalerState {
            returns: vec![0.0; n],
            moments: VecMoments::empty(1),
        };
        let mut whole = Array2::zeros((t, n));
        let mut s1 = fresh();
        scale_rewards(
            &r.view(),
            Some(&te.view()),
            None,
            p,
            true,
            &mut s1,
            &mut whole.view_mut(),
        )
        .unwrap();
        let mut s2 = fresh();
        let mut parts = Array2::zeros((t, n));
        for (a, b) in [(0, 1), (1, 40), (40, 41), (41, 97)] {
            let sl = ndarray::s![a..b, ..];
            scale_rewards(
                &r.slice(sl),
                Some(&te.slice(sl)),
                None,
                p,
                true,
                &mut s2,
                &mut parts.slice_mut(sl),
            )
            .unwrap();
        }
        assert_eq!(whole, parts);
        assert_eq!(s1, s2);
        assert_eq!(s1.moments.count, (t * n) as u64);
        // A plain per-step loop (common practice, no source).
        let mut ret = [0.0f64; 3];
        let mut seen = Vec::new();
        for i in 0..t {
            for m in 0..n {
                ret[m] = 0.9 * ret[m] + r[[i, m]];
            }
            seen.extend_from_slice(&ret);
            let mean = seen.iter().sum::<f64>() / seen.len() as f64;
            let var = seen.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / seen.len() as f64;
            let d = if var > 0.0 { var.sqrt() + 1e-8 } else { 1.0 };
            for m in 0..n {
                let want = (r[[i, m]] / d).clamp(-5.0, 5.0);
                assert!((whole[[i, m]] - want).abs() < 1e-12 * (1.0 + want.abs()));
                if te[[i, m]] {
                    ret[m] = 0.0;
                }
            }
        }
        let wrong = Array2::<f64>::zeros((3, 2));
        let mut o = Array2::zeros((3, 2));
        let e = scale_rewards(
            &wrong.view(),
            None,
            None,
            p,
            true,
            &mut s1,
            &mut o.view_mut(),
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Shape(_)));
    }

    #[test]
    fn tracker_carries_open_episodes() {
        let r = Array2::from_shape_fn((6, 2), |(t, m)| (t * 2 + m) as f64);
        let te = Array2::from_shape_fn((6, 2), |(t, m)| (t, m) == (1, 0) || (t, m) == (5, 1));
        let tr = Array2::from_shape_fn((6, 2), |(t, m)| (t, m) == (4, 0));
        let mut st = TrackerState {
            returns: vec![0.0; 2],
            lengths: vec![0; 2],
        };
        let a = track_episodes(
            &r.slice(ndarray::s![..3, ..]),
            Some(&te.slice(ndarray::s![..3, ..])),
            Some(&tr.slice(ndarray::s![..3, ..])),
            true,
            &mut st,
        )
        .unwrap();
        assert_eq!(a.returns, vec![0.0 + 2.0]);
        assert_eq!(a.lengths, vec![2]);
        assert_eq!((a.streams[0], a.steps[0], a.terminal[0]), (0, 1, true));
        let b = track_episodes(
            &r.slice(ndarray::s![3.., ..]),
            Some(&te.slice(ndarray::s![3.., ..])),
            Some(&tr.slice(ndarray::s![3.., ..])),
            true,
            &mut st,
        )
        .unwrap();
        // Stream 0: steps 2..=4 (rewards 4, 6, 8), truncated at chunk row 1.
        // Stream 1: steps 0..=5 (rewards 1, 3, .., 11), terminal at chunk row 2.
        assert_eq!(b.returns, vec![18.0, 36.0]);
        assert_eq!(b.lengths, vec![3, 6]);
        assert_eq!(b.streams, vec![0, 1]);
        assert_eq!(b.steps, vec![1, 2]);
        assert_eq!(b.terminal, vec![false, true]);
        assert_eq!(st.returns, vec![10.0, 0.0]);
        assert_eq!(st.lengths, vec![1, 0]);
    }
}
