//! Diagonal Gaussian heads: `mean [batch..., D]`, `log_std` either shared by
//! every row (`[D]`) or per row (broadcastable to `mean`), actions
//! `[batch..., D]`. Densities and entropies are summed over the last axis, in
//! axis order:
//!
//! ```text
//! z_j      = (a_j - mu_j) e^{-s_j}
//! log p(a) = sum_j (-z_j^2 / 2 - s_j) - D ln(2 pi) / 2
//! H        = sum_j s_j + D (1 + ln(2 pi)) / 2
//! d log p / d mu_j = (a_j - mu_j) e^{-2 s_j},   d log p / d s_j = z_j^2 - 1
//! KL(p||q) = sum_j (s_q - s_p) + (e^{2 s_p} + (mu_p - mu_q)^2) / (2 e^{2 s_q}) - 1/2
//! ```
//!
//! The KL is evaluated per dimension as `(expm1(-2 d) + 2 d) / 2 + (dmu e^{-s_q})^2 / 2`
//! with `d = s_q - s_p`, which is never negative and exactly 0 for `p = q`.
//!
//! The same row pass serves the tanh-squashed head ([`super::squashed`]): it
//! then evaluates the density at the pre-squash value `u` and subtracts the
//! log-Jacobian of the squash.

use super::categorical::Out;
use super::math::{exp_inplace, exp_to, half_tanh_p1, log1m_tanh2, HALF_LN_2PI};
use super::rng::Stream;
use super::squashed::Bounds;
use super::{
    any_nan, batch_shape, first_error, gather_col, gather_rows, row_starts, scatter_col,
    scatter_rows, split_last, to2, to2_mut, Buf,
};
use super::{At, Layout};
use crate::core::error::{CoreError, CoreResult};
use crate::core::finite::all_finite;
use crate::core::float::Real;
use crate::core::par::Par;
use crate::core::simd::wide;
use ndarray::{ArrayView2, ArrayViewD, ArrayViewMutD, Ix1};

/// The log standard deviation of a Gaussian head.
#[derive(Debug, Clone)]
pub enum LogStd<'a, F> {
    /// One value per action dimension (length `D`, or 1 for all), shared by
    /// every row; it does not take part in dtype promotion.
    Shared(Vec<f64>),
    /// Per row: broadcastable to the mean.
    PerRow(ArrayViewD<'a, F>),
}

impl<F> LogStd<'_, F> {
    /// The values of `v` when every axis but the last has length 1 (a
    /// state-independent `log_std`), else `None`.
    pub fn shared_values<G: Real>(v: &ArrayViewD<'_, G>) -> Option<Vec<f64>> {
        let sh = v.shape();
        if sh.len() > 1 && sh[..sh.len() - 1].iter().any(|&n| n != 1) {
            return None;
        }
        Some(v.iter().map(|x| x.to_f64()).collect())
    }
}

/// A diagonal Gaussian.
#[derive(Debug, Clone)]
pub struct Normal<'a, F> {
    /// `[batch..., D]`.
    pub mean: ArrayViewD<'a, F>,
    /// Shared or per row.
    pub log_std: LogStd<'a, F>,
    /// Reject non-finite means, log-stds and actions.
    pub check_finite: bool,
}

/// The outputs of [`gaussian`]; any subset.
#[derive(Debug)]
pub struct GaussOut<'a, F> {
    /// `log p(actions)`, `[batch...]`.
    pub log_prob: Option<Out<'a, F>>,
    /// Entropy, `[batch...]`.
    pub entropy: Option<Out<'a, F>>,
    /// `d log p / d mean`, `[batch..., D]`.
    pub d_mean: Option<Out<'a, F>>,
    /// `d log p / d log_std`, `[batch..., D]`.
    pub d_log_std: Option<Out<'a, F>>,
    /// A sample (the squashed action for the squashed head), `[batch..., D]`.
    pub sample: Option<Out<'a, F>>,
    /// The pre-squash sample (squashed head only), `[batch..., D]`.
    pub pre_squash: Option<Out<'a, F>>,
}

impl<F> Default for GaussOut<'_, F> {
    fn default() -> Self {
        GaussOut {
            log_prob: None,
            entropy: None,
            d_mean: None,
            d_log_std: None,
            sample: None,
            pre_squash: None,
        }
    }
}

/// Log-density, entropy, score and sampling of a diagonal Gaussian; `seed`
/// goes with `out.sample`.
pub fn gaussian<F: Real>(
    nrm: &Normal<'_, F>,
    actions: Option<ArrayViewD<'_, F>>,
    seed: Option<u64>,
    out: GaussOut<'_, F>,
    par: Par,
) -> CoreResult<()> {
    run(nrm, actions, None, seed, None, out, par)
}

/// The shared log-std expanded to `D` values, or its shape error.
fn expand_shared(v: &[f64], d: usize, mean: &[usize], name: &str) -> CoreResult<Vec<f64>> {
    match v.len() {
        n if n == d => Ok(v.to_vec()),
        1 => Ok(vec![v[0]; d]),
        n => Err(CoreError::shape_mismatch(
            name,
            &[n],
            "mean",
            mean,
            &format!("{name} must broadcast to the shape of mean"),
        )),
    }
}

/// Everything a block needs besides its views.
struct Ctx<'x> {
    shared: Option<(Vec<f64>, Vec<f64>)>,
    bounds: Option<&'x Bounds>,
    pre_given: bool,
    seed: Option<u64>,
    check: bool,
    entropy_const: Option<f64>,
}

struct GBlock<'b, F> {
    row0: usize,
    mean: ArrayView2<'b, F>,
    ls: Option<ArrayView2<'b, F>>,
    a: Option<ArrayView2<'b, F>>,
    log_prob: Option<ArrayViewMutD<'b, F>>,
    entropy: Option<ArrayViewMutD<'b, F>>,
    d_mean: Option<ArrayViewMutD<'b, F>>,
    d_log_std: Option<ArrayViewMutD<'b, F>>,
    sample: Option<ArrayViewMutD<'b, F>>,
    pre: Option<ArrayViewMutD<'b, F>>,
}

/// The row pass of the Gaussian and squashed heads. With `bounds`, the
/// density is evaluated at `u = pre_squash` (or `atanh` of the rescaled
/// actions) and the log-Jacobian subtracted, and samples are squashed.
pub(crate) fn run<F: Real>(
    nrm: &Normal<'_, F>,
    actions: Option<ArrayViewD<'_, F>>,
    pre_squash: Option<ArrayViewD<'_, F>>,
    seed: Option<u64>,
    bounds: Option<&Bounds>,
    out: GaussOut<'_, F>,
    par: Par,
) -> CoreResult<()> {
    let shape = nrm.mean.shape();
    let (batch, d) = split_last("mean", shape)?;
    let rows: usize = batch.iter().product();
    if let Some(a) = &actions {
        super::same_shape(
            "actions",
            a.shape(),
            "mean",
            shape,
            "actions must have the shape of mean",
        )?;
    }
    if let Some(u) = &pre_squash {
        super::same_shape(
            "pre_squash",
            u.shape(),
            "mean",
            shape,
            "pre_squash must have the shape of mean",
        )?;
    }
    if (out.log_prob.is_some() || out.d_mean.is_some() || out.d_log_std.is_some())
        && actions.is_none()
        && pre_squash.is_none()
    {
        return Err(CoreError::input("actions", "is required"));
    }
    if out.sample.is_some() != seed.is_some() {
        return Err(CoreError::input("seed", "goes with a sample output"));
    }
    for o in [&out.log_prob, &out.entropy].into_iter().flatten() {
        batch_shape(o.name, o.view.shape(), "mean", shape)?;
    }
    for o in [&out.d_mean, &out.d_log_std, &out.sample, &out.pre_squash]
        .into_iter()
        .flatten()
    {
        super::same_shape(
            o.name,
            o.view.shape(),
            "mean",
            shape,
            "out must have the shape of mean",
        )?;
    }
    if let Some(b) = bounds {
        if b.low.len() != d {
            return Err(CoreError::Shape(format!(
                "low/high have {} values but mean has {d} action dimensions",
                b.low.len()
            )));
        }
    }
    let (ls_view, shared) = match &nrm.log_std {
        LogStd::Shared(v) => {
            let v = expand_shared(v, d, shape, "log_std")?;
            if nrm.check_finite && rows > 0 {
                if let Some(j) = v.iter().position(|x| !x.is_finite()) {
                    return Err(CoreError::non_finite("log_std", At::RowCol(0, j)));
                }
            }
            let mut inv: Vec<f64> = v.iter().map(|&s| -s).collect();
            exp_inplace(&mut inv);
            (None, Some((v, inv)))
        }
        LogStd::PerRow(v) => (Some(super::broadcast("log_std", v, "mean", shape)?), None),
    };

    // The entropy of a shared log-std is one number, summed in axis order.
    let ent_term = 0.5 + HALF_LN_2PI;
    let entropy_const = shared.as_ref().map(|(v, _)| {
        let s: f64 = v.iter().fold(0.0, |a, &x| a + x);
        s + d as f64 * ent_term
    });

    let mut strides: Vec<&[isize]> = vec![nrm.mean.strides()];
    for v in [&ls_view, &actions, &pre_squash].into_iter().flatten() {
        strides.push(v.strides());
    }
    let outs = [
        &out.log_prob,
        &out.entropy,
        &out.d_mean,
        &out.d_log_std,
        &out.sample,
        &out.pre_squash,
    ];
    for o in outs.into_iter().flatten() {
        strides.push(o.view.strides());
    }
    let layout = Layout::new(batch, d, &strides);
    let mb = layout.split(nrm.mean.view());
    let n = mb.len();
    let starts = row_starts(mb.iter().map(|b| b.shape()[0]));
    let lsb = layout.split_opt(ls_view, n);
    let pre_given = pre_squash.is_some();
    let a_src = if pre_given { pre_squash } else { actions };
    let ab = layout.split_opt(a_src, n);
    let lpb = layout.split_opt(out.log_prob.map(|o| o.view), n);
    let enb = layout.split_opt(out.entropy.map(|o| o.view), n);
    let dmb = layout.split_opt(out.d_mean.map(|o| o.view), n);
    let dlb = layout.split_opt(out.d_log_std.map(|o| o.view), n);
    let smb = layout.split_opt(out.sample.map(|o| o.view), n);
    let prb = layout.split_opt(out.pre_squash.map(|o| o.view), n);
    let two = to2::<F>;
    let mut items = Vec::with_capacity(n);
    let mut it = (
        lsb.into_iter(),
        ab.into_iter(),
        lpb.into_iter(),
        enb.into_iter(),
    );
    let mut it2 = (
        dmb.into_iter(),
        dlb.into_iter(),
        smb.into_iter(),
        prb.into_iter(),
    );
    for (row0, mean) in starts.into_iter().zip(mb) {
        let (ls, a, lp, en) = (it.0.next(), it.1.next(), it.2.next(), it.3.next());
        let (dm, dl, sm, pr) = (it2.0.next(), it2.1.next(), it2.2.next(), it2.3.next());
        items.push(GBlock {
            row0,
            mean: two(mean),
            ls: ls.flatten().map(two),
            a: a.flatten().map(two),
            log_prob: lp.flatten(),
            entropy: en.flatten(),
            d_mean: dm.flatten(),
            d_log_std: dl.flatten(),
            sample: sm.flatten(),
            pre: pr.flatten(),
        });
    }
    // A shared log_std (and exp(-log_std)) tiled once over the longest block.
    let shared = shared.map(|(v, inv)| {
        let rows = items.iter().map(|b| b.mean.nrows()).max().unwrap_or(0);
        (v.repeat(rows), inv.repeat(rows))
    });
    let ctx = Ctx {
        shared,
        bounds,
        pre_given,
        seed,
        check: nrm.check_finite,
        entropy_const,
    };
    let results = layout.par(par).map(items, |b| {
        wide(
            #[inline(always)]
            || ctx.block(b),
        )
    });
    first_error(results)
}

impl Ctx<'_> {
    /// One block, row-major: elementwise terms over the flat block vectorise
    /// for any `D`, and every row sum adds its `D` terms in axis order.
    #[inline(always)]
    fn block<F: Real>(&self, mut b: GBlock<'_, F>) -> CoreResult<()> {
        if let (Some(lp), Some(c)) = (self.lp_direct(&b), self.entropy_const) {
            if let Some(o) = b.log_prob.take() {
                write_rows(&lp, o);
            }
            if let Some(mut o) = b.entropy.take() {
                o.fill(F::from_f64(c));
            }
            return Ok(());
        }
        let (n, d) = b.mean.dim();
        let nd = n * d;
        let check = self.check;
        let squash = self.bounds;
        let invert = squash.is_some() && !self.pre_given && b.a.is_some();
        let conv = |v: F| v.to_f64();

        let mut mu = Buf::stale(nd);
        gather_rows(&b.mean, &mut mu, conv);
        // log_std and exp(-log_std), per element (a shared one tiled per row).
        let mut ls_buf = Buf::stale(if b.ls.is_some() { nd } else { 0 });
        let mut inv_buf = Buf::stale(if b.ls.is_some() { nd } else { 0 });
        if let Some(v) = &b.ls {
            gather_rows(v, &mut ls_buf, conv);
            inv_buf
                .iter_mut()
                .zip(ls_buf.iter())
                .for_each(|(i, &s)| *i = -s);
            exp_inplace(&mut inv_buf);
        }
        let (ls, inv): (&[f64], &[f64]) = match &self.shared {
            Some((tls, tinv)) if b.ls.is_none() => (&tls[..nd], &tinv[..nd]),
            _ => (&ls_buf, &inv_buf),
        };
        let mut a = Buf::stale(if b.a.is_some() { nd } else { 0 });
        if let Some(av) = &b.a {
            gather_rows(av, &mut a, conv);
        }
        // One NaN-or-not flag for the block; rows are searched only on failure.
        let mut bad =
            check && !(all_finite(&mu) && (b.ls.is_none() || all_finite(ls)) && all_finite(&a));
        if invert {
            let bd = squash.expect("bounds");
            for row in a.chunks_exact_mut(d.max(1)).take(n) {
                for ((x, &lo), &hi) in row.iter_mut().zip(&bd.low).zip(&bd.high) {
                    bad |= *x < lo || *x > hi;
                    // u = atanh(2 (a - lo) / (hi - lo) - 1), without the
                    // cancellation near either bound.
                    *x = 0.5 * ((*x - lo).ln() - (hi - *x).ln());
                }
            }
        }
        if bad {
            for r in 0..n {
                if let Some(e) = self.row_error(&b.mean, b.ls.as_ref(), b.a.as_ref(), r, b.row0 + r)
                {
                    return Err(e);
                }
            }
        }

        if let Some(o) = b.log_prob {
            // t = -z^2 / 2 - log_std (- the squash's log-Jacobian), elementwise.
            let mut t = Buf::stale(nd);
            t.iter_mut()
                .zip(a.iter().zip(mu.iter()))
                .zip(ls.iter().zip(inv.iter()))
                .for_each(|((t, (&x, &m)), (&s, &iv))| {
                    let z = (x - m) * iv;
                    *t = -0.5 * z * z - s;
                });
            if let Some(bd) = squash {
                let lw: Vec<f64> = (0..d)
                    .map(|j| (0.5 * (bd.high[j] - bd.low[j])).ln())
                    .collect();
                for (tr, ur) in t.chunks_exact_mut(d.max(1)).zip(a.chunks_exact(d.max(1))) {
                    for ((t, &u), &lw) in tr.iter_mut().zip(ur).zip(&lw) {
                        *t = if u.is_infinite() {
                            f64::NEG_INFINITY
                        } else {
                            *t - lw - log1m_tanh2(u)
                        };
                    }
                }
            }
            let c = -(d as f64) * HALF_LN_2PI;
            let lp = row_sums(&t, n, d, c);
            write_rows(&lp, o);
        }
        if let Some(o) = b.entropy {
            let ent = match self.entropy_const {
                Some(c) => Buf::filled(n, c),
                None => row_sums(ls, n, d, d as f64 * (0.5 + HALF_LN_2PI)),
            };
            write_rows(&ent, o);
        }
        if b.d_mean.is_some() || b.d_log_std.is_some() {
            let (mut g, mut h) = (Buf::stale(nd), Buf::stale(nd));
            g.iter_mut()
                .zip(h.iter_mut())
                .zip(a.iter().zip(mu.iter()))
                .zip(inv.iter())
                .for_each(|(((g, h), (&x, &m)), &iv)| {
                    let z = (x - m) * iv;
                    *g = z * iv;
                    *h = z * z - 1.0;
                });
            if let Some(o) = b.d_mean {
                scatter_rows(&g, to2_mut(o));
            }
            if let Some(o) = b.d_log_std {
                scatter_rows(&h, to2_mut(o));
            }
        }
        if let (Some(o), Some(seed)) = (b.sample, self.seed) {
            // u = mean + exp(log_std) * N(0, 1), normals in pairs along each row.
            let mut u = Buf::stale(nd);
            for (r, row) in u.chunks_exact_mut(d.max(1)).take(n).enumerate() {
                let st = Stream::new(seed, (b.row0 + r) as u64);
                for (p, pair) in row.chunks_mut(2).enumerate() {
                    let (z0, z1) = st.normal_pair(p as u64);
                    pair[0] = z0;
                    if let Some(x) = pair.get_mut(1) {
                        *x = z1;
                    }
                }
            }
            let mut sd = Buf::stale(nd);
            exp_to(ls, &mut sd);
            u.iter_mut()
                .zip(mu.iter().zip(sd.iter()))
                .for_each(|(u, (&m, &s))| *u = m + s * *u);
            match squash {
                None => scatter_rows(&u, to2_mut(o)),
                Some(bd) => {
                    if let Some(p) = b.pre {
                        scatter_rows(&u, to2_mut(p));
                    }
                    for row in u.chunks_exact_mut(d.max(1)).take(n) {
                        for ((u, &lo), &hi) in row.iter_mut().zip(&bd.low).zip(&bd.high) {
                            let x = lo + (hi - lo) * half_tanh_p1(*u);
                            *u = if x > hi { hi } else { x };
                        }
                    }
                    scatter_rows(&u, to2_mut(o));
                }
            }
        }
        Ok(())
    }

    /// The log-densities of a block with a shared log_std, C-contiguous mean
    /// and actions and no per-element output, the terms computed straight
    /// from the inputs: no `f64` copies of them and no finiteness pass over
    /// them. A non-finite input makes its row's sum non-finite (`z` is then
    /// NaN or infinite, and every term is at most `-log_std`), so only the
    /// `n` sums are checked; `None` sends a block with a non-finite sum
    /// through the general pass, which checks the inputs. Same operations
    /// in the same order as there, so the same bits.
    #[inline(always)]
    fn lp_direct<F: Real>(&self, b: &GBlock<'_, F>) -> Option<Buf> {
        let (tls, tinv) = self.shared.as_ref()?;
        let others = b.ls.is_some() || b.d_mean.is_some() || b.d_log_std.is_some();
        if others || b.sample.is_some() || self.bounds.is_some() || b.log_prob.is_none() {
            return None;
        }
        let (n, d) = b.mean.dim();
        let nd = n * d;
        let (ms, xs) = (b.mean.as_slice()?, b.a.as_ref()?.as_slice()?);
        let mut t = Buf::stale(nd);
        t.iter_mut()
            .zip(xs.iter().zip(ms))
            .zip(tls[..nd].iter().zip(&tinv[..nd]))
            .for_each(|((t, (&x, &m)), (&s, &iv))| {
                let z = (x.to_f64() - m.to_f64()) * iv;
                *t = -0.5 * z * z - s;
            });
        let lp = row_sums(&t, n, d, -(d as f64) * HALF_LN_2PI);
        all_finite(&lp).then_some(lp)
    }

    /// The first bad element of row `r`, if any.
    fn row_error<F: Real>(
        &self,
        mean: &ArrayView2<'_, F>,
        ls: Option<&ArrayView2<'_, F>>,
        a: Option<&ArrayView2<'_, F>>,
        r: usize,
        row: usize,
    ) -> Option<CoreError> {
        let a_name = if self.pre_given {
            "pre_squash"
        } else {
            "actions"
        };
        for j in 0..mean.ncols() {
            let at = At::RowCol(row, j);
            if self.check && !mean[[r, j]].finite() {
                return Some(CoreError::non_finite("mean", at));
            }
            if self.check && ls.is_some_and(|v| !v[[r, j]].finite()) {
                return Some(CoreError::non_finite("log_std", at));
            }
            if let Some(a) = a {
                let x = a[[r, j]];
                if self.check && !x.finite() {
                    return Some(CoreError::non_finite(a_name, at));
                }
                if let (Some(bd), false) = (self.bounds, self.pre_given) {
                    let v = x.to_f64();
                    if v < bd.low[j] || v > bd.high[j] {
                        return Some(CoreError::input_at(
                            "actions",
                            at,
                            format!(
                                "= {v} is outside [low, high] = [{}, {}]",
                                bd.low[j], bd.high[j]
                            ),
                        ));
                    }
                }
            }
        }
        None
    }
}

/// `c + sum_j x[r, j]` per row of a row-major `[n, d]` buffer, in axis order.
#[inline(always)]
fn row_sums(x: &[f64], n: usize, d: usize, c: f64) -> Buf {
    let mut out = Buf::stale(n);
    if d == 0 {
        out.fill(c);
        return out;
    }
    let row_sum = |row: &[f64]| row.iter().fold(0.0, |a, &v| a + v) + c;
    // Eight rows at a time, the loop running across them (so it vectorises
    // for any `d`), each row still adding its terms in axis order from 0.
    let full = n / 8 * 8;
    let (head, tail) = out.split_at_mut(full);
    for (o, blk) in head.chunks_exact_mut(8).zip(x.chunks_exact(8 * d)) {
        let rows: [&[f64]; 8] = std::array::from_fn(|q| &blk[q * d..(q + 1) * d]);
        let mut acc = [0.0f64; 8];
        for j in 0..d {
            for (a, row) in acc.iter_mut().zip(&rows) {
                *a += row[j];
            }
        }
        for (o, &a) in o.iter_mut().zip(&acc) {
            *o = a + c;
        }
    }
    for (o, row) in tail.iter_mut().zip(x[full * d..].chunks_exact(d)) {
        *o = row_sum(row);
    }
    out
}

fn write_rows<F: Real>(v: &[f64], o: ArrayViewMutD<'_, F>) {
    scatter_col(v, o.into_dimensionality::<Ix1>().expect("1-D block"));
}

/// `sum_j log_std_j + D (1 + ln 2 pi) / 2` per row of `log_std [batch..., D]`.
pub fn gaussian_entropy<F: Real>(
    log_std: ArrayViewD<'_, F>,
    check_finite: bool,
    out: Out<'_, F>,
    par: Par,
) -> CoreResult<()> {
    let shape = log_std.shape();
    let (batch, d) = split_last("log_std", shape)?;
    batch_shape(out.name, out.view.shape(), "log_std", shape)?;
    let layout = Layout::new(batch, d, &[log_std.strides(), out.view.strides()]);
    let lb = layout.split(log_std.view());
    let starts = row_starts(lb.iter().map(|b| b.shape()[0]));
    let ob = layout.split(out.view);
    let items: Vec<_> = starts.into_iter().zip(lb).zip(ob).collect();
    let c = d as f64 * (0.5 + HALF_LN_2PI);
    let results = layout.par(par).map(items, |((row0, l), o)| {
        let l = to2(l);
        let n = l.nrows();
        let (mut acc, mut col, mut chk) = (vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        for j in 0..d {
            gather_col(l.column(j), &mut col);
            acc.iter_mut()
                .zip(chk.iter_mut())
                .zip(&col)
                .for_each(|((a, c), &s)| {
                    *a += s;
                    *c += s * 0.0;
                });
        }
        if check_finite && any_nan(&chk) {
            for r in 0..n {
                if let Some(j) = (0..d).find(|&j| !l[[r, j]].finite()) {
                    return Err(CoreError::non_finite("log_std", At::RowCol(row0 + r, j)));
                }
            }
        }
        acc.iter_mut().for_each(|a| *a += c);
        write_rows(&acc, o);
        Ok(())
    });
    first_error(results)
}

type Prepared<'v, 'a, F> = (Option<&'v ArrayViewD<'a, F>>, Option<Vec<f64>>);

fn prep_kl<'v, 'a, F>(
    ls: &'v LogStd<'a, F>,
    name: &'static str,
    d: usize,
    shape: &[usize],
    check: bool,
) -> CoreResult<Prepared<'v, 'a, F>> {
    Ok(match ls {
        LogStd::Shared(v) => {
            let v = expand_shared(v, d, shape, name)?;
            if check {
                if let Some(j) = v.iter().position(|x| !x.is_finite()) {
                    return Err(CoreError::non_finite(name, At::RowCol(0, j)));
                }
            }
            (None, Some(v))
        }
        LogStd::PerRow(v) => (Some(v), None),
    })
}

/// `KL(p || q)` of two diagonal Gaussians, per row.
pub fn gaussian_kl<F: Real>(
    p: &Normal<'_, F>,
    q: &Normal<'_, F>,
    out: Out<'_, F>,
    par: Par,
) -> CoreResult<()> {
    let shape = p.mean.shape();
    let (batch, d) = split_last("mean_p", shape)?;
    super::same_shape(
        "mean_q",
        q.mean.shape(),
        "mean_p",
        shape,
        "mean_q must have the shape of mean_p",
    )?;
    batch_shape(out.name, out.view.shape(), "mean_p", shape)?;
    let rows: usize = batch.iter().product();
    let check = p.check_finite;
    let (lp_view, lp_shared) = prep_kl(&p.log_std, "log_std_p", d, shape, check && rows > 0)?;
    let (lq_view, lq_shared) = prep_kl(&q.log_std, "log_std_q", d, shape, check && rows > 0)?;
    let lp_b = match lp_view {
        Some(v) => Some(super::broadcast("log_std_p", v, "mean_p", shape)?),
        None => None,
    };
    let lq_b = match lq_view {
        Some(v) => Some(super::broadcast("log_std_q", v, "mean_p", shape)?),
        None => None,
    };
    let mut strides: Vec<&[isize]> = vec![p.mean.strides(), q.mean.strides()];
    for v in [&lp_b, &lq_b].into_iter().flatten() {
        strides.push(v.strides());
    }
    strides.push(out.view.strides());
    let layout = Layout::new(batch, d, &strides);
    let mpb = layout.split(p.mean.view());
    let n = mpb.len();
    let starts = row_starts(mpb.iter().map(|b| b.shape()[0]));
    let mqb = layout.split(q.mean.view());
    let lpb = layout.split_opt(lp_b, n);
    let lqb = layout.split_opt(lq_b, n);
    let ob = layout.split(out.view);
    let two = to2::<F>;
    let items: Vec<_> = starts
        .into_iter()
        .zip(mpb)
        .zip(mqb)
        .zip(lpb.into_iter().zip(lqb))
        .zip(ob)
        .map(|((((row0, mp), mq), (lp, lq)), o)| {
            (row0, two(mp), two(mq), lp.map(two), lq.map(two), o)
        })
        .collect();
    let results = layout.par(par).map(items, |(row0, mp, mq, lp, lq, o)| {
        let n = mp.nrows();
        let (mut a, mut b, mut sp, mut sq) =
            (vec![0.0; n], vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        let (mut inv, mut kl, mut chk) = (vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        for j in 0..d {
            gather_col(mp.column(j), &mut a);
            gather_col(mq.column(j), &mut b);
            match &lp {
                Some(v) => gather_col(v.column(j), &mut sp),
                None => sp.fill(lp_shared.as_ref().expect("shared")[j]),
            }
            match &lq {
                Some(v) => gather_col(v.column(j), &mut sq),
                None => sq.fill(lq_shared.as_ref().expect("shared")[j]),
            }
            if check {
                for r in 0..n {
                    chk[r] += a[r] * 0.0 + b[r] * 0.0 + sp[r] * 0.0 + sq[r] * 0.0;
                }
            }
            inv.iter_mut().zip(&sq).for_each(|(i, &s)| *i = -s);
            exp_inplace(&mut inv);
            for r in 0..n {
                let dd = sq[r] - sp[r];
                let dm = (a[r] - b[r]) * inv[r];
                kl[r] += 0.5 * ((-2.0 * dd).exp_m1() + 2.0 * dd) + 0.5 * dm * dm;
            }
        }
        if check && any_nan(&chk) {
            for r in 0..n {
                for j in 0..d {
                    let at = At::RowCol(row0 + r, j);
                    if !mp[[r, j]].finite() {
                        return Err(CoreError::non_finite("mean_p", at));
                    }
                    if lp.as_ref().is_some_and(|v| !v[[r, j]].finite()) {
                        return Err(CoreError::non_finite("log_std_p", at));
                    }
                    if !mq[[r, j]].finite() {
                        return Err(CoreError::non_finite("mean_q", at));
                    }
                    if lq.as_ref().is_some_and(|v| !v[[r, j]].finite()) {
                        return Err(CoreError::non_finite("log_std_q", at));
                    }
                }
            }
        }
        kl.iter_mut().for_each(|k| {
            if *k < 0.0 {
                *k = 0.0
            }
        });
        write_rows(&kl, o);
        Ok(())
    });
    first_error(results)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::core::heads::squashed::{squashed_log_prob, squashed_sample, Bounds};
    use ndarray::{Array2, ArrayD, IxDyn, ShapeBuilder};

    fn normal<'a>(mean: &'a ArrayD<f64>, ls: LogStd<'a, f64>) -> Normal<'a, f64> {
        Normal {
            mean: mean.view(),
            log_std: ls,
            check_finite: true,
        }
    }

    #[test]
    fn log_prob_entropy_and_score_match_definitions() {
        let (b, d) = (300, 5);
        let mean = Array2::from_shape_fn((b, d), |(i, j)| ((i * 7 + j) % 11) as f64 * 0.3 - 1.5);
        let ls = Array2::from_shape_fn((b, d), |(i, j)| ((i + 3 * j) % 5) as f64 * 0.2 - 0.4);
        let act = Array2::from_shape_fn((b, d).f(), |(i, j)| ((i * 3 + j) % 7) as f64 * 0.5 - 1.0);
        let (mean, ls, act) = (mean.into_dyn(), ls.into_dyn(), act.into_dyn());
        for par in [Par::Seq, Par::Rayon] {
            let mut lp = ArrayD::zeros(IxDyn(&[b]));
            let mut h = ArrayD::zeros(IxDyn(&[b]));
            let mut gm = ArrayD::zeros(IxDyn(&[b, d]));
            let mut gs = ArrayD::zeros(IxDyn(&[b, d]));
            let nrm = normal(&mean, LogStd::PerRow(ls.view()));
            let out = GaussOut {
                log_prob: Some(Out::new("lp", lp.view_mut())),
                entropy: Some(Out::new("h", h.view_mut())),
                ..Default::default()
            };
            gaussian(&nrm, Some(act.view()), None, out, par).unwrap();
            let out = GaussOut {
                d_mean: Some(Out::new("gm", gm.view_mut())),
                d_log_std: Some(Out::new("gs", gs.view_mut())),
                ..Default::default()
            };
            gaussian(&nrm, Some(act.view()), None, out, par).unwrap();
            for i in 0..b {
                let (mut want_lp, mut want_h) = (0.0, 0.0);
                for j in 0..d {
                    let s = ls[[i, j]].exp();
                    let z = (act[[i, j]] - mean[[i, j]]) / s;
                    want_lp += -0.5 * z * z - s.ln() - HALF_LN_2PI;
                    want_h += ls[[i, j]] + 0.5 + HALF_LN_2PI;
                    assert!((gm[[i, j]] - z / s).abs() < 1e-12);
                    assert!((gs[[i, j]] - (z * z - 1.0)).abs() < 1e-12);
                }
                assert!((lp[[i]] - want_lp).abs() < 1e-12);
                assert!((h[[i]] - want_h).abs() < 1e-12);
            }
        }
    }

    /// A shared log_std with C-order mean and actions takes `lp_direct`; F
    /// order takes the general pass: the same bits, the definition, and the
    /// general pass's errors for non-finite inputs.
    #[test]
    fn direct_log_prob_matches_the_general_pass_bitwise() {
        let (b, d) = (1000usize, 6usize);
        let ls = vec![-0.3, 0.0, 0.25, 1.5, -2.0, 0.7];
        let mean = Array2::from_shape_fn((b, d), |(i, j)| ((i * 7 + j) % 13) as f64 * 0.37 - 2.0);
        let act =
            Array2::from_shape_fn((b, d), |(i, j)| ((i * 5 + 3 * j) % 17) as f64 * 0.29 - 2.4);
        let run = |mean: &Array2<f64>, act: &Array2<f64>, check: bool, par| {
            let (mut lp, mut h) = (ArrayD::zeros(IxDyn(&[b])), ArrayD::zeros(IxDyn(&[b])));
            let nrm = Normal {
                mean: mean.view().into_dyn(),
                log_std: LogStd::Shared(ls.clone()),
                check_finite: check,
            };
            let out = GaussOut {
                log_prob: Some(Out::new("out[0]", lp.view_mut())),
                entropy: Some(Out::new("out[1]", h.view_mut())),
                ..Default::default()
            };
            gaussian(&nrm, Some(act.view().into_dyn()), None, out, par).map(|()| (lp, h))
        };
        let fortran = |x: &Array2<f64>| {
            let mut f = Array2::zeros((b, d).f());
            f.assign(x);
            f
        };
        for par in [Par::Seq, Par::Rayon] {
            let (lp, h) = run(&mean, &act, true, par).unwrap();
            let (lp_f, h_f) = run(&fortran(&mean), &fortran(&act), true, par).unwrap();
            let bits = |v: &ArrayD<f64>| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&lp), bits(&lp_f));
            assert_eq!(bits(&h), bits(&h_f));
            let want_h: f64 = ls.iter().map(|s| s + 0.5 + HALF_LN_2PI).sum();
            for i in 0..b {
                let mut want = 0.0;
                for (j, &s) in ls.iter().enumerate() {
                    let z = (act[[i, j]] - mean[[i, j]]) / s.exp();
                    want += -0.5 * z * z - s - HALF_LN_2PI;
                }
                assert!((lp[[i]] - want).abs() < 1e-12, "row {i}");
                assert!((h[[i]] - want_h).abs() < 1e-12);
            }
        }
        let mut bad = act.clone();
        bad[[700, 4]] = f64::NEG_INFINITY;
        bad[[900, 1]] = f64::NAN;
        let e = run(&mean, &bad, true, Par::Rayon).unwrap_err();
        assert_eq!(e, CoreError::non_finite("actions", At::RowCol(700, 4)));
        let mut bad_mean = mean.clone();
        bad_mean[[3, 0]] = f64::INFINITY;
        let e = run(&bad_mean, &act, true, Par::Seq).unwrap_err();
        assert_eq!(e, CoreError::non_finite("mean", At::RowCol(3, 0)));
        // Unchecked: the general pass's non-finite rows, the rest unchanged.
        let (lp, _) = run(&mean, &bad, false, Par::Seq).unwrap();
        let (lp0, _) = run(&mean, &act, false, Par::Seq).unwrap();
        assert_eq!(lp[[700]], f64::NEG_INFINITY);
        assert!(lp[[900]].is_nan());
        assert_eq!(lp[[0]].to_bits(), lp0[[0]].to_bits());
    }

    /// The eight-row sums add each row's terms in axis order from 0: the bits
    /// of the plain fold, for any `d` and row count.
    #[test]
    fn row_sums_are_the_plain_fold_bitwise() {
        for d in [1usize, 2, 5, 6, 8, 17] {
            for n in [0usize, 1, 7, 8, 9, 23, 341] {
                let x: Vec<f64> = (0..n * d)
                    .map(|i| ((i * 2654435761) % 1000) as f64 * 1.37e-3 - 0.61)
                    .collect();
                let got = row_sums(&x, n, d, -1.25);
                for r in 0..n {
                    let want = x[r * d..(r + 1) * d].iter().fold(0.0, |a, &v| a + v) + -1.25;
                    assert_eq!(got[r].to_bits(), want.to_bits(), "d {d} n {n} row {r}");
                }
            }
        }
        assert!(row_sums(&[], 3, 0, 2.5).iter().all(|&v| v == 2.5));
    }

    #[test]
    fn samples_and_squash_round_trip() {
        let mean =
            Array2::from_shape_fn((2000, 3), |(i, j)| (i % 5) as f64 * 0.1 + j as f64).into_dyn();
        let nrm = normal(&mean, LogStd::Shared(vec![-1.0, 0.0, 0.5]));
        let bounds = Bounds::new(&[-2.0], &[1.0, 3.0, 5.0], 3).unwrap();
        let mut a = ArrayD::zeros(IxDyn(&[2000, 3]));
        let mut u = ArrayD::zeros(IxDyn(&[2000, 3]));
        squashed_sample(
            &nrm,
            9,
            &bounds,
            Out::new("a", a.view_mut()),
            Out::new("u", u.view_mut()),
            Par::Rayon,
        )
        .unwrap();
        let mut g = ArrayD::zeros(IxDyn(&[2000, 3]));
        let out = GaussOut {
            sample: Some(Out::new("g", g.view_mut())),
            ..Default::default()
        };
        gaussian(&nrm, None, Some(9), out, Par::Seq).unwrap();
        assert_eq!(g, u);
        for (j, (&lo, &hi)) in bounds.low.iter().zip(&bounds.high).enumerate() {
            for i in 0..2000 {
                let x = a[[i, j]];
                assert!(lo <= x && x <= hi);
                let want = lo + (hi - lo) * (u[[i, j]].tanh() + 1.0) / 2.0;
                assert!((x - want).abs() < 1e-12);
            }
        }
        let mut lp1 = ArrayD::zeros(IxDyn(&[2000]));
        let mut lp2 = ArrayD::zeros(IxDyn(&[2000]));
        squashed_log_prob(
            &nrm,
            a.view(),
            None,
            &bounds,
            Out::new("o", lp1.view_mut()),
            Par::Seq,
        )
        .unwrap();
        squashed_log_prob(
            &nrm,
            a.view(),
            Some(u.view()),
            &bounds,
            Out::new("o", lp2.view_mut()),
            Par::Seq,
        )
        .unwrap();
        for i in 0..2000 {
            assert!((lp1[[i]] - lp2[[i]]).abs() < 1e-6 * (1.0 + lp2[[i]].abs()));
        }
        a[[7, 1]] = 3.5;
        let e = squashed_log_prob(
            &nrm,
            a.view(),
            None,
            &bounds,
            Out::new("o", lp1.view_mut()),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(
            e,
            CoreError::Input {
                arg: "actions",
                at: Some(At::RowCol(7, 1)),
                ..
            }
        ));
    }

    #[test]
    fn kl_is_zero_for_equal_and_matches_closed_form() {
        let mp = Array2::from_shape_fn((50, 4), |(i, j)| (i * j % 7) as f64 * 0.2).into_dyn();
        let mq = mp.mapv(|v| v + 0.3);
        let p = normal(&mp, LogStd::Shared(vec![0.1, -0.2, 0.3, 0.0]));
        let q = normal(&mq, LogStd::Shared(vec![0.0, 0.0, -0.5, 0.2]));
        let mut o = ArrayD::zeros(IxDyn(&[50]));
        gaussian_kl(&p, &p, Out::new("o", o.view_mut()), Par::Seq).unwrap();
        assert!(o.iter().all(|&v| v == 0.0));
        gaussian_kl(&p, &q, Out::new("o", o.view_mut()), Par::Seq).unwrap();
        let (sp, sq) = ([0.1f64, -0.2, 0.3, 0.0], [0.0f64, 0.0, -0.5, 0.2]);
        let want: f64 = (0..4)
            .map(|j| {
                let (a, b) = (sp[j].exp(), sq[j].exp());
                (b / a).ln() + (a * a + 0.09) / (2.0 * b * b) - 0.5
            })
            .sum();
        assert!(o.iter().all(|&v| (v - want).abs() < 1e-12));
    }
}
