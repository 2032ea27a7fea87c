//! Categorical heads over logits `[batch..., A]` with an optional mask
//! (`true` = allowed; masked-out logits count as `-inf` and are never read
//! for finiteness).
//!
//! One pass per block of rows computes, with `z_j = x_j - max_j x_j`,
//!
//! ```text
//! S = sum_j e^{z_j},   T = sum_j e^{z_j} z_j   (terms with e^{z_j} = 0 are 0)
//! log p(a) = z_a - ln S
//! H        = ln S - T / S                       (so 0 * log 0 = 0)
//! d log p(a) / d x_j = [j = a] - e^{z_j} / S
//! ```
//!
//! and the KL divergence
//! `KL(p || q) = (1/S_p) sum_j e^{zp_j} (zp_j - zq_j) + ln S_q - ln S_p`,
//! which is exactly 0 for `p = q`. Logits of any finite
//! size (`+-1e30`) give finite results: only differences to the row maximum
//! are exponentiated.

use super::math::{exp_nonpos_x8, exp_to, ln_inplace, ln_normal, ln_normal_x8};
use super::rng::Stream;
use super::{
    any_nan, batch_shape, broadcast, first_error, gather_t, row_starts, same_shape, scatter_col,
    scatter_t, split_last, to2_mut, At, Buf, Layout,
};
use crate::core::error::{CoreError, CoreResult};
use crate::core::float::Real;
use crate::core::par::Par;
use crate::core::simd::{dispatch, wide, F64x8, Kernel};
use ndarray::{ArrayView2, ArrayViewD, ArrayViewMutD, Ix1, Ix2};

/// An output argument: its public name (for shape errors) and its view.
#[derive(Debug)]
pub struct Out<'a, T> {
    /// `"out"`, `"out[0]"`, ...
    pub name: &'static str,
    /// Where to write.
    pub view: ArrayViewMutD<'a, T>,
}

impl<'a, T> Out<'a, T> {
    /// An output slot.
    pub fn new(name: &'static str, view: ArrayViewMutD<'a, T>) -> Self {
        Out { name, view }
    }
}

/// Logits and mask of a categorical call.
#[derive(Debug, Clone)]
pub struct Logits<'a, F> {
    /// `[batch..., A]`.
    pub logits: ArrayViewD<'a, F>,
    /// Broadcastable to `logits`; `true` = allowed.
    pub mask: Option<ArrayViewD<'a, bool>>,
    /// Reject non-finite allowed logits.
    pub check_finite: bool,
}

/// Which action index a pass produces into [`CatOut::index`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pick {
    /// None.
    Nothing,
    /// A sample, row `i` from the stream `(seed, i)` (inverse CDF on one
    /// uniform draw).
    Sample(u64),
    /// The argmax over allowed actions, first on ties.
    Mode,
}

/// The outputs of [`categorical`]; any subset.
#[derive(Debug)]
pub struct CatOut<'a, F> {
    /// `log p(actions)`, `[batch...]`.
    pub log_prob: Option<Out<'a, F>>,
    /// Entropy, `[batch...]`.
    pub entropy: Option<Out<'a, F>>,
    /// `onehot(actions) - softmax(logits)`, `[batch..., A]`.
    pub score: Option<Out<'a, F>>,
    /// Sampled or modal action, `[batch...]`.
    pub index: Option<Out<'a, i64>>,
}

impl<F> Default for CatOut<'_, F> {
    fn default() -> Self {
        CatOut {
            log_prob: None,
            entropy: None,
            score: None,
            index: None,
        }
    }
}

/// The row pass behind every categorical head except the KL.
pub fn categorical<F: Real>(
    lg: &Logits<'_, F>,
    actions: Option<ArrayViewD<'_, i64>>,
    pick: Pick,
    out: CatOut<'_, F>,
    par: Par,
) -> CoreResult<()> {
    let shape = lg.logits.shape();
    let (batch, k) = split_last("logits", shape)?;
    let mask = match &lg.mask {
        Some(m) => Some(broadcast("mask", m, "logits", shape)?),
        None => None,
    };
    if let Some(a) = &actions {
        batch_shape("actions", a.shape(), "logits", shape)?;
    } else if out.log_prob.is_some() || out.score.is_some() {
        return Err(CoreError::input("actions", "is required"));
    }
    let need_index = pick != Pick::Nothing;
    if need_index != out.index.is_some() {
        return Err(CoreError::input(
            "out",
            "an index output goes with sampling or the mode, and only with them",
        ));
    }
    for o in [&out.log_prob, &out.entropy].into_iter().flatten() {
        batch_shape(o.name, o.view.shape(), "logits", shape)?;
    }
    if let Some(o) = &out.index {
        batch_shape(o.name, o.view.shape(), "logits", shape)?;
    }
    if let Some(o) = &out.score {
        same_shape(
            o.name,
            o.view.shape(),
            "logits",
            shape,
            "out must have the shape of logits",
        )?;
    }
    let rows: usize = batch.iter().product();
    if rows > 0 && k == 0 {
        return Err(CoreError::input(
            "logits",
            "has an empty last axis: a categorical needs at least one action",
        ));
    }

    let mut strides: Vec<&[isize]> = vec![lg.logits.strides()];
    if let Some(m) = &mask {
        strides.push(m.strides());
    }
    if let Some(a) = &actions {
        strides.push(a.strides());
    }
    for o in [&out.log_prob, &out.entropy, &out.score]
        .into_iter()
        .flatten()
    {
        strides.push(o.view.strides());
    }
    if let Some(o) = &out.index {
        strides.push(o.view.strides());
    }
    let layout = Layout::new(batch, k, &strides);
    let xb = layout.split(lg.logits.view());
    let n = xb.len();
    let starts = row_starts(xb.iter().map(|b| b.shape()[0]));
    let mb = layout.split_opt(mask, n);
    let ab = layout.split_opt(actions, n);
    let lpb = layout.split_opt(out.log_prob.map(|o| o.view), n);
    let enb = layout.split_opt(out.entropy.map(|o| o.view), n);
    let scb = layout.split_opt(out.score.map(|o| o.view), n);
    let ixb = layout.split_opt(out.index.map(|o| o.view), n);
    let items: Vec<_> = starts
        .into_iter()
        .zip(xb)
        .zip(mb)
        .zip(ab)
        .zip(lpb)
        .zip(enb)
        .zip(scb)
        .zip(ixb)
        .map(|(((((((row0, x), m), a), lp), en), sc), ix)| Block {
            row0,
            x: x.into_dimensionality::<Ix2>().expect("2-D block"),
            mask: m.map(|m| m.into_dimensionality::<Ix2>().expect("2-D block")),
            actions: a,
            log_prob: lp,
            entropy: en,
            score: sc,
            index: ix,
        })
        .collect();
    let check = lg.check_finite;
    let results = layout.par(par).map(items, |b| b.go(pick, check));
    first_error(results)
}

struct Block<'b, F> {
    row0: usize,
    x: ArrayView2<'b, F>,
    mask: Option<ArrayView2<'b, bool>>,
    actions: Option<ArrayViewD<'b, i64>>,
    log_prob: Option<ArrayViewMutD<'b, F>>,
    entropy: Option<ArrayViewMutD<'b, F>>,
    score: Option<ArrayViewMutD<'b, F>>,
    index: Option<ArrayViewMutD<'b, i64>>,
}

/// Column-major masked logits of a block and their row maxima.
struct Gathered {
    n: usize,
    k: usize,
    z: Buf,
    m: Buf,
    chk: Buf,
}

#[inline(always)]
fn gather<F: Real>(
    x: &ArrayView2<'_, F>,
    mask: Option<&ArrayView2<'_, bool>>,
    check: bool,
) -> Gathered {
    let (n, k) = x.dim();
    let mut z = Buf::stale(n * k);
    gather_t(x, &mut z, |v| v.to_f64());
    let mut m = Buf::filled(n, f64::NEG_INFINITY);
    let mut chk = Buf::filled(if check { n } else { 0 }, 0.0);
    let mt = mask.map(|mk| {
        let mut mt = Buf::stale(n * k);
        gather_t(mk, &mut mt, |v| if v { 1.0 } else { 0.0 });
        mt
    });
    for j in 0..k {
        let zc = &mut z[j * n..(j + 1) * n];
        match &mt {
            None => {
                if check {
                    chk.iter_mut()
                        .zip(zc.iter())
                        .for_each(|(c, &v)| *c += v * 0.0);
                }
            }
            Some(mt) => {
                let mc = &mt[j * n..(j + 1) * n];
                if check {
                    chk.iter_mut()
                        .zip(zc.iter())
                        .zip(mc)
                        .for_each(|((c, &v), &a)| *c += if a != 0.0 { v * 0.0 } else { 0.0 });
                }
                zc.iter_mut()
                    .zip(mc)
                    .for_each(|(v, &a)| *v = if a != 0.0 { *v } else { f64::NEG_INFINITY });
            }
        }
        m.iter_mut()
            .zip(zc.iter())
            .for_each(|(m, &v)| *m = if v > *m { v } else { *m });
    }
    Gathered { n, k, z, m, chk }
}

impl Gathered {
    /// The error of row `r` of the logits / mask themselves, if any.
    fn row_error<F: Real>(
        &self,
        name: &'static str,
        x: &ArrayView2<'_, F>,
        mask: Option<&ArrayView2<'_, bool>>,
        r: usize,
        row: usize,
    ) -> Option<CoreError> {
        let allowed = |j: usize| mask.is_none_or(|mk| mk[[r, j]]);
        if !self.chk.is_empty() && self.chk[r].is_nan() {
            let j = (0..self.k)
                .find(|&j| allowed(j) && !x[[r, j]].finite())
                .unwrap_or(0);
            return Some(CoreError::non_finite(name, At::RowCol(row, j)));
        }
        if mask.is_some() && self.m[r] == f64::NEG_INFINITY && !(0..self.k).any(allowed) {
            return Some(CoreError::input_at(
                "mask",
                At::Flat(row),
                "allows no action (the whole row is False)",
            ));
        }
        None
    }

    /// Whether any row may hold a logits / mask error.
    fn suspect(&self, masked: bool) -> bool {
        any_nan(&self.chk) || (masked && self.m.contains(&f64::NEG_INFINITY))
    }

    /// `z -= max` per row; returns `e = exp(z)`.
    #[inline(always)]
    fn shift_exp(&mut self) -> Buf {
        let n = self.n;
        for j in 0..self.k {
            self.z[j * n..(j + 1) * n]
                .iter_mut()
                .zip(self.m.iter())
                .for_each(|(z, &m)| *z -= m);
        }
        let mut e = Buf::stale(self.z.len());
        exp_to(&self.z, &mut e);
        e
    }
}

impl<F: Real> Block<'_, F> {
    /// The block through [`LpEnt`] when it applies and every row is valid,
    /// else through the general pass (which also reports the errors).
    fn go(mut self, pick: Pick, check: bool) -> CoreResult<()> {
        let plain = pick == Pick::Nothing && self.mask.is_none() && self.score.is_none();
        if let (true, Some(x)) = (plain, self.x.as_slice()) {
            let act = self.actions.as_ref().map(|a| match a.as_slice() {
                Some(s) => std::borrow::Cow::Borrowed(s),
                None => std::borrow::Cow::Owned(a.iter().copied().collect()),
            });
            let k = self.x.ncols();
            let done = dispatch(LpEnt {
                x,
                k,
                act: act.as_deref(),
                check,
            });
            if let Some((lp, h)) = done {
                if let Some(o) = self.log_prob.take() {
                    write_rows(&lp, o);
                }
                if let Some(o) = self.entropy.take() {
                    write_rows(&h, o);
                }
                return Ok(());
            }
        }
        wide(
            #[inline(always)]
            || self.run(pick, check),
        )
    }
}

/// Log-probabilities and entropies of a C-contiguous block without mask:
/// eight rows at a time, each row's maximum, sums, `ln S` and results in
/// [`F64x8`] lanes, the logits held in a `K`-column tile. Every row goes
/// through the same operations in the same order as in the general pass
/// (column order sums, the same `exp` and `ln`), so the bits are the same,
/// without its column-major scratch and per-column passes.
///
/// `None` when some row needs the general pass: a non-finite logit (when
/// checked), an action out of range, or a sum `S` outside the normal range.
struct LpEnt<'a, F> {
    /// `[n, K]` row-major.
    x: &'a [F],
    k: usize,
    /// One per row, when log-probabilities are wanted.
    act: Option<&'a [i64]>,
    check: bool,
}

/// One row group: `(m, S, T, chk)` of eight rows `src` (`8 K` values), the
/// logits left in `tile`.
#[inline(always)]
fn lp_ent_group<const FMA: bool, F: Real>(
    src: &[F],
    k: usize,
    tile: &mut [F64x8],
) -> (F64x8, F64x8, F64x8, F64x8) {
    let rows: [&[F]; 8] = std::array::from_fn(|q| &src[q * k..(q + 1) * k]);
    let mut m = F64x8::splat(f64::NEG_INFINITY);
    let mut chk = F64x8::splat(0.0);
    for (j, t) in tile.iter_mut().enumerate().take(k) {
        let v: [f64; 8] = std::array::from_fn(|q| rows[q][j].to_f64());
        for ((m, c), &v) in m.0.iter_mut().zip(&mut chk.0).zip(&v) {
            *m = if v > *m { v } else { *m };
            *c += v * 0.0;
        }
        *t = F64x8(v);
    }
    let mut s = F64x8::splat(0.0);
    let mut tt = F64x8::splat(0.0);
    for t in tile.iter().take(k) {
        let mut z = [0.0; 8];
        for ((z, &x), &m) in z.iter_mut().zip(&t.0).zip(&m.0) {
            *z = x - m;
        }
        let e = exp_nonpos_x8::<FMA>(F64x8(z));
        for ((s, t), (&e, &z)) in s.0.iter_mut().zip(&mut tt.0).zip(e.0.iter().zip(&z)) {
            *s += e;
            *t += if e > 0.0 { e * z } else { 0.0 };
        }
    }
    (m, s, tt, chk)
}

impl<F: Real> Kernel for LpEnt<'_, F> {
    type Output = Option<(Buf, Buf)>;

    #[inline(always)]
    fn run<const FMA: bool>(self) -> Self::Output {
        let k = self.k;
        let n = self.x.len().checked_div(k)?;
        let (mut lp, mut h) = (Buf::stale(n), Buf::stale(n));
        let mut tile = vec![F64x8::splat(0.0); k];
        let mut pad: Vec<F> = Vec::new();
        for r0 in (0..n).step_by(8) {
            let rows = (n - r0).min(8);
            let src = if rows == 8 {
                &self.x[r0 * k..(r0 + 8) * k]
            } else {
                // The last rows, padded with zero logits (results dropped).
                pad.clear();
                pad.extend_from_slice(&self.x[r0 * k..]);
                pad.resize(8 * k, F::from_f64(0.0));
                &pad
            };
            let (m, s, t, chk) = lp_ent_group::<FMA, F>(src, k, &mut tile);
            // Padded lanes hold zero logits: they never fail, so all eight
            // lanes are checked and computed, branch-free.
            let bad = (s.0.iter().zip(&chk.0)).fold(false, |b, (&s, &c)| {
                b | !ln_normal(s) | (self.check & c.is_nan())
            });
            if bad {
                return None;
            }
            let lns = ln_normal_x8::<FMA>(s).0;
            let mut hv = [0.0; 8];
            for (((h, &l), &t), &s) in hv.iter_mut().zip(&lns).zip(&t.0).zip(&s.0) {
                *h = l - t / s;
            }
            h[r0..r0 + rows].copy_from_slice(&hv[..rows]);
            if let Some(act) = self.act {
                let out = lp[r0..r0 + rows].iter_mut().zip(&act[r0..r0 + rows]);
                for (q, (o, &a)) in out.enumerate() {
                    let z = tile.get(usize::try_from(a).ok()?)?.0[q] - m.0[q];
                    *o = z - lns[q];
                }
            }
        }
        Some((lp, h))
    }
}

impl<F: Real> Block<'_, F> {
    #[inline(always)]
    fn run(self, pick: Pick, check: bool) -> CoreResult<()> {
        let mut g = gather(&self.x, self.mask.as_ref(), check);
        let (n, k) = (g.n, g.k);
        let act: Vec<i64> = match &self.actions {
            Some(a) => match a.as_slice() {
                Some(s) => s.to_vec(),
                None => a.iter().copied().collect(),
            },
            None => Vec::new(),
        };
        let kk = k as i64;
        let bad_actions = act.iter().any(|&a| a < 0 || a >= kk)
            || self
                .mask
                .as_ref()
                .is_some_and(|mk| act.iter().enumerate().any(|(r, &a)| !mk[[r, a as usize]]));
        if bad_actions || g.suspect(self.mask.is_some()) {
            for r in 0..n {
                let row = self.row0 + r;
                if let Some(e) = g.row_error("logits", &self.x, self.mask.as_ref(), r, row) {
                    return Err(e);
                }
                if let Some(&a) = act.get(r) {
                    if a < 0 || a >= kk {
                        return Err(CoreError::input_at(
                            "actions",
                            At::Flat(row),
                            format!("= {a} is out of range [0, {k})"),
                        ));
                    }
                    if self.mask.as_ref().is_some_and(|mk| !mk[[r, a as usize]]) {
                        return Err(CoreError::input_at(
                            "actions",
                            At::Flat(row),
                            format!("= {a} is masked out (its mask entry is False)"),
                        ));
                    }
                }
            }
        }

        if pick == Pick::Mode {
            let mut best = vec![f64::NEG_INFINITY; n];
            let mut idx = vec![-1i64; n];
            for j in 0..k {
                let zc = &g.z[j * n..(j + 1) * n];
                best.iter_mut()
                    .zip(idx.iter_mut())
                    .zip(zc)
                    .for_each(|((b, i), &v)| {
                        if v > *b {
                            *b = v;
                            *i = j as i64;
                        }
                    });
            }
            write_index(&idx, self.index);
            return Ok(());
        }

        let e = g.shift_exp();
        let z = &g.z;
        let mut s = Buf::filled(n, 0.0);
        let mut t = Buf::filled(n, 0.0);
        for j in 0..k {
            let (zc, ec) = (&z[j * n..(j + 1) * n], &e[j * n..(j + 1) * n]);
            s.iter_mut()
                .zip(t.iter_mut())
                .zip(zc.iter().zip(ec))
                .for_each(|((s, t), (&z, &e))| {
                    *s += e;
                    *t += if e > 0.0 { e * z } else { 0.0 };
                });
        }
        let mut lns = Buf::stale(n);
        lns.copy_from_slice(&s);
        ln_inplace(&mut lns);

        if let Some(o) = self.log_prob {
            let mut v = Buf::stale(n);
            for (r, ((v, &l), &a)) in v.iter_mut().zip(lns.iter()).zip(&act).enumerate() {
                *v = z[a as usize * n + r] - l;
            }
            write_rows(&v, o);
        }
        if let Some(o) = self.entropy {
            let mut v = Buf::stale(n);
            v.iter_mut()
                .zip(lns.iter())
                .zip(t.iter().zip(s.iter()))
                .for_each(|((v, &l), (&t, &s))| *v = l - t / s);
            write_rows(&v, o);
        }
        if let Pick::Sample(seed) = pick {
            let idx: Vec<i64> = (0..n)
                .map(|r| {
                    let u = Stream::new(seed, (self.row0 + r) as u64).uniform(0);
                    let thr = u * s[r];
                    let mut cum = 0.0;
                    let mut last = -1i64;
                    for j in 0..k {
                        let p = e[j * n + r];
                        if p > 0.0 {
                            last = j as i64;
                        }
                        cum += p;
                        if thr < cum {
                            return j as i64;
                        }
                    }
                    last
                })
                .collect();
            write_index(&idx, self.index);
        }
        if let Some(o) = self.score {
            let mut sc = e;
            for j in 0..k {
                sc[j * n..(j + 1) * n]
                    .iter_mut()
                    .zip(s.iter().zip(&act))
                    .for_each(|(c, (&s, &a))| {
                        *c = if a == j as i64 { 1.0 } else { 0.0 } - *c / s;
                    });
            }
            scatter_t(&sc, to2_mut(o));
        }
        Ok(())
    }
}

fn write_rows<F: Real>(v: &[f64], o: ArrayViewMutD<'_, F>) {
    scatter_col(v, o.into_dimensionality::<Ix1>().expect("1-D block"));
}

fn write_index(v: &[i64], o: Option<ArrayViewMutD<'_, i64>>) {
    if let Some(mut o) = o {
        o.iter_mut().zip(v).for_each(|(o, &v)| *o = v);
    }
}

/// `KL(p || q)` per row; the mask applies to both.
pub fn categorical_kl<F: Real>(
    p: &Logits<'_, F>,
    logits_q: ArrayViewD<'_, F>,
    out: Out<'_, F>,
    par: Par,
) -> CoreResult<()> {
    let shape = p.logits.shape();
    let (batch, k) = split_last("logits_p", shape)?;
    same_shape(
        "logits_q",
        logits_q.shape(),
        "logits_p",
        shape,
        "logits_q must have the shape of logits_p",
    )?;
    let mask = match &p.mask {
        Some(m) => Some(broadcast("mask", m, "logits_p", shape)?),
        None => None,
    };
    batch_shape(out.name, out.view.shape(), "logits_p", shape)?;
    let rows: usize = batch.iter().product();
    if rows > 0 && k == 0 {
        return Err(CoreError::input(
            "logits_p",
            "has an empty last axis: a categorical needs at least one action",
        ));
    }
    let mut strides: Vec<&[isize]> = vec![p.logits.strides(), logits_q.strides()];
    if let Some(m) = &mask {
        strides.push(m.strides());
    }
    strides.push(out.view.strides());
    let layout = Layout::new(batch, k, &strides);
    let pb = layout.split(p.logits.view());
    let n = pb.len();
    let starts = row_starts(pb.iter().map(|b| b.shape()[0]));
    let qb = layout.split(logits_q.view());
    let mb = layout.split_opt(mask, n);
    let ob = layout.split(out.view);
    let items: Vec<_> = starts
        .into_iter()
        .zip(pb)
        .zip(qb)
        .zip(mb)
        .zip(ob)
        .map(|((((row0, p), q), m), o)| {
            (
                row0,
                p.into_dimensionality::<Ix2>().expect("2-D block"),
                q.into_dimensionality::<Ix2>().expect("2-D block"),
                m.map(|m| m.into_dimensionality::<Ix2>().expect("2-D block")),
                o,
            )
        })
        .collect();
    let check = p.check_finite;
    let results = layout.par(par).map(items, |(row0, xp, xq, mk, o)| {
        wide(
            #[inline(always)]
            || {
                let mut gp = gather(&xp, mk.as_ref(), check);
                let mut gq = gather(&xq, mk.as_ref(), check);
                let (n, k) = (gp.n, gp.k);
                if gp.suspect(mk.is_some()) || gq.suspect(false) {
                    for r in 0..n {
                        let row = row0 + r;
                        if let Some(e) = gp.row_error("logits_p", &xp, mk.as_ref(), r, row) {
                            return Err(e);
                        }
                        if let Some(e) = gq.row_error("logits_q", &xq, mk.as_ref(), r, row) {
                            return Err(e);
                        }
                    }
                }
                let ep = gp.shift_exp();
                let eq = gq.shift_exp();
                let (mut sp, mut sq, mut d) = (
                    Buf::filled(n, 0.0),
                    Buf::filled(n, 0.0),
                    Buf::filled(n, 0.0),
                );
                for j in 0..k {
                    let c = j * n..(j + 1) * n;
                    let (zp, zq, ep, eq) =
                        (&gp.z[c.clone()], &gq.z[c.clone()], &ep[c.clone()], &eq[c]);
                    for r in 0..n {
                        sp[r] += ep[r];
                        sq[r] += eq[r];
                        d[r] += if ep[r] > 0.0 {
                            ep[r] * (zp[r] - zq[r])
                        } else {
                            0.0
                        };
                    }
                }
                ln_inplace(&mut sq);
                let mut lsp = Buf::stale(n);
                lsp.copy_from_slice(&sp);
                ln_inplace(&mut lsp);
                let kl: Vec<f64> = (0..n)
                    .map(|r| {
                        let v = d[r] / sp[r] + sq[r] - lsp[r];
                        // Rounding must not report a negative divergence.
                        if v < 0.0 {
                            0.0
                        } else {
                            v
                        }
                    })
                    .collect();
                write_rows(&kl, o);
                Ok(())
            },
        )
    });
    first_error(results)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, Array1, Array2, ArrayD, IxDyn, ShapeBuilder};

    fn lcg(seed: &mut u64) -> f64 {
        *seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*seed >> 11) as f64) / ((1u64 << 53) as f64)
    }

    /// Direct definitions, one row at a time.
    fn reference(x: &[f64], mask: Option<&[bool]>, a: usize) -> (f64, f64, Vec<f64>) {
        let allowed = |j: usize| mask.is_none_or(|m| m[j]);
        let m = (0..x.len())
            .filter(|&j| allowed(j))
            .map(|j| x[j])
            .fold(f64::NEG_INFINITY, f64::max);
        let lse = m
            + (0..x.len())
                .filter(|&j| allowed(j))
                .map(|j| (x[j] - m).exp())
                .sum::<f64>()
                .ln();
        let p: Vec<f64> = (0..x.len())
            .map(|j| if allowed(j) { (x[j] - lse).exp() } else { 0.0 })
            .collect();
        let h = -(0..x.len())
            .filter(|&j| p[j] > 0.0)
            .map(|j| p[j] * (x[j] - lse))
            .sum::<f64>();
        (x[a] - lse, h, p)
    }

    fn run_all(
        x: &ArrayD<f64>,
        mask: Option<&ArrayD<bool>>,
        a: &ArrayD<i64>,
        par: Par,
    ) -> (ArrayD<f64>, ArrayD<f64>, ArrayD<f64>) {
        let batch = a.shape().to_vec();
        let mut lp = ArrayD::zeros(IxDyn(&batch));
        let mut h = ArrayD::zeros(IxDyn(&batch));
        let mut sc = ArrayD::zeros(x.raw_dim());
        categorical(
            &Logits {
                logits: x.view(),
                mask: mask.map(|m| m.view()),
                check_finite: true,
            },
            Some(a.view()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out[0]", lp.view_mut())),
                entropy: Some(Out::new("out[1]", h.view_mut())),
                score: Some(Out::new("out", sc.view_mut())),
                index: None,
            },
            par,
        )
        .unwrap();
        (lp, h, sc)
    }

    #[test]
    fn matches_definitions_in_every_layout() {
        let mut seed = 3u64;
        for &(b, k) in &[(1usize, 1usize), (5, 3), (300, 18), (2000, 4), (7, 700)] {
            let x = Array2::from_shape_fn((b, k), |_| lcg(&mut seed) * 8.0 - 4.0);
            let mask = Array2::from_shape_fn((b, k), |(_, j)| j == 0 || lcg(&mut seed) < 0.7);
            let a = Array1::from_shape_fn(b, |i| {
                let allowed: Vec<usize> = (0..k).filter(|&j| mask[[i, j]]).collect();
                allowed[(lcg(&mut seed) * allowed.len() as f64) as usize] as i64
            });
            let xf = {
                let mut f = Array2::zeros((b, k).f());
                f.assign(&x);
                f
            };
            for par in [Par::Seq, Par::Rayon] {
                let (lp, h, sc) = run_all(
                    &xf.clone().into_dyn(),
                    Some(&mask.clone().into_dyn()),
                    &a.clone().into_dyn(),
                    par,
                );
                for i in 0..b {
                    let row: Vec<f64> = x.row(i).to_vec();
                    let mrow: Vec<bool> = mask.row(i).to_vec();
                    let (rlp, rh, p) = reference(&row, Some(&mrow), a[i] as usize);
                    assert!((lp[[i]] - rlp).abs() < 1e-12, "{b}x{k} row {i}");
                    assert!((h[[i]] - rh).abs() < 1e-12);
                    for j in 0..k {
                        let want = if j == a[i] as usize { 1.0 } else { 0.0 } - p[j];
                        assert!((sc[[i, j]] - want).abs() < 1e-14);
                    }
                }
            }
        }
    }

    /// log p and H of C-order logits without mask (the [`LpEnt`] pass) and of
    /// the same logits in F order (the general pass).
    fn lp_h_both<F: Real>(x: &Array2<F>, a: Option<&Array1<i64>>, par: Par) -> [Vec<F>; 4] {
        let b = x.nrows();
        let mut xf = Array2::from_elem(x.dim().f(), F::from_f64(0.0));
        xf.assign(x);
        let run = |x: ArrayView2<'_, F>| {
            let (mut lp, mut h) = (
                Array1::from_elem(b, F::from_f64(0.0)),
                Array1::from_elem(b, F::from_f64(0.0)),
            );
            categorical(
                &Logits {
                    logits: x.into_dyn(),
                    mask: None,
                    check_finite: true,
                },
                a.map(|a| a.view().into_dyn()),
                Pick::Nothing,
                CatOut {
                    log_prob: a.map(|_| Out::new("out[0]", lp.view_mut().into_dyn())),
                    entropy: Some(Out::new("out[1]", h.view_mut().into_dyn())),
                    ..Default::default()
                },
                par,
            )
            .unwrap();
            (lp.to_vec(), h.to_vec())
        };
        let (lp, h) = run(x.view());
        let (lp_f, h_f) = run(xf.view());
        [lp, h, lp_f, h_f]
    }

    #[test]
    fn row_groups_match_the_general_pass_bitwise_and_the_definition() {
        let mut seed = 5u64;
        for &(b, k) in &[
            (1usize, 1usize),
            (7, 2),
            (8, 5),
            (9, 18),
            (113, 18),
            (300, 3),
            (2049, 18),
            (40, 33),
            (3, 700),
        ] {
            // Some rows hold one +1e30 logit, some a -1e30 one.
            let x = Array2::from_shape_fn((b, k), |(i, j)| {
                if j == 0 && i % 5 == 1 {
                    1e30
                } else if j + 1 == k && i % 3 == 2 {
                    -1e30
                } else {
                    lcg(&mut seed) * 30.0 - 15.0
                }
            });
            let a = Array1::from_shape_fn(b, |i| ((i * 7 + 3) % k) as i64);
            for par in [Par::Seq, Par::Rayon] {
                let [lp, h, lp_f, h_f] = lp_h_both(&x, Some(&a), par);
                let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                assert_eq!(bits(&lp), bits(&lp_f), "{b}x{k}");
                assert_eq!(bits(&h), bits(&h_f), "{b}x{k}");
                for i in 0..b {
                    let row = x.row(i).to_vec();
                    let (rlp, rh, _) = reference(&row, None, a[i] as usize);
                    // log p of a -1e30 logit is about -2e30: relative there.
                    let tol = 1e-12 * rlp.abs().max(1.0);
                    assert!((lp[i] - rlp).abs() < tol, "{b}x{k} row {i}");
                    assert!((h[i] - rh).abs() < 1e-12, "{b}x{k} row {i}");
                    assert!(h[i].is_finite());
                }
                let [_, h_only, _, h_only_f] = lp_h_both(&x, None, par);
                assert_eq!(bits(&h_only), bits(&h));
                assert_eq!(bits(&h_only_f), bits(&h));
            }
            let x32 = x.mapv(|v| v as f32);
            let [lp, h, lp_f, h_f] = lp_h_both(&x32, Some(&a), Par::Rayon);
            assert_eq!(lp, lp_f);
            assert_eq!(h, h_f);
        }
    }

    #[test]
    fn row_groups_leave_errors_to_the_general_pass() {
        let mut x = Array2::from_shape_fn((50, 4), |(i, j)| (i * 4 + j) as f64 * 0.01);
        x[[41, 2]] = f64::INFINITY;
        x[[45, 0]] = f64::NAN;
        let a = Array1::from_shape_fn(50, |i| (i % 4) as i64);
        let mut lp = Array1::zeros(50);
        let lg = Logits {
            logits: x.view().into_dyn(),
            mask: None,
            check_finite: true,
        };
        let e = categorical(
            &lg,
            Some(a.view().into_dyn()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out", lp.view_mut().into_dyn())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap_err();
        assert_eq!(e, CoreError::non_finite("logits", At::RowCol(41, 2)));
        let mut bad = a.clone();
        bad[9] = 4;
        let e = categorical(
            &Logits {
                logits: x.slice(ndarray::s![..40, ..]).into_dyn(),
                ..lg.clone()
            },
            Some(bad.slice(ndarray::s![..40]).into_dyn()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out", lp.slice_mut(ndarray::s![..40]).into_dyn())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(
            e,
            CoreError::Input {
                arg: "actions",
                at: Some(At::Flat(9)),
                ..
            }
        ));
        // Unchecked non-finite logits: the general pass's results (NaN rows).
        let unchecked = Logits {
            check_finite: false,
            ..lg.clone()
        };
        let mut h = Array1::zeros(50);
        categorical(
            &unchecked,
            Some(a.view().into_dyn()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out[0]", lp.view_mut().into_dyn())),
                entropy: Some(Out::new("out[1]", h.view_mut().into_dyn())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap();
        assert!(h[41].is_nan() && h[45].is_nan() && lp[45].is_nan());
        assert!(h[0].is_finite() && lp[0].is_finite());
    }

    #[test]
    fn masking_equals_removing_the_column_bitwise() {
        let x = array![[0.3, -1.0, 2.0, 0.5], [1e30, -1e30, 0.0, 3.0]].into_dyn();
        let mask = array![[true, false, true, true], [true, true, false, true]].into_dyn();
        let a = array![2i64, 0].into_dyn();
        let (lp, h, _) = run_all(&x, Some(&mask), &a, Par::Seq);
        let x0 = array![[0.3, 2.0, 0.5]].into_dyn();
        let (lp0, h0, _) = run_all(&x0, None, &array![1i64].into_dyn(), Par::Seq);
        assert_eq!(lp[[0]], lp0[[0]]);
        assert_eq!(h[[0]], h0[[0]]);
        let x1 = array![[1e30, -1e30, 3.0]].into_dyn();
        let (lp1, h1, _) = run_all(&x1, None, &array![0i64].into_dyn(), Par::Seq);
        assert_eq!(lp[[1]], lp1[[0]]);
        assert_eq!(h[[1]], h1[[0]]);
        assert!(h.iter().all(|v| v.is_finite()));
        assert_eq!(lp1[[0]], 0.0);
    }

    #[test]
    fn errors_name_the_first_offending_row() {
        let x = array![[0.0, 1.0], [f64::NAN, 0.0], [0.0, 0.0]].into_dyn();
        let mask = array![[true, true], [false, true], [false, false]].into_dyn();
        let a = array![0i64, 1, 0].into_dyn();
        let mut lp = ArrayD::zeros(IxDyn(&[3]));
        let lg = Logits {
            logits: x.view(),
            mask: Some(mask.view()),
            check_finite: true,
        };
        let e = categorical(
            &lg,
            Some(a.view()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out", lp.view_mut())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap_err();
        // The NaN at [1, 0] is masked out: the all-masked row 2 is first.
        assert_eq!(
            e,
            CoreError::input_at(
                "mask",
                At::Flat(2),
                "allows no action (the whole row is False)"
            )
        );
        let a = array![0i64, 0, 0].into_dyn();
        let e = categorical(
            &lg,
            Some(a.view()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out", lp.view_mut())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(
            e,
            CoreError::Input {
                arg: "actions",
                at: Some(At::Flat(1)),
                ..
            }
        ));
        let lg = Logits {
            logits: x.view(),
            mask: None,
            check_finite: true,
        };
        let a = array![0i64, 5, 0].into_dyn();
        let e = categorical(
            &lg,
            Some(a.view()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out", lp.view_mut())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap_err();
        assert_eq!(e, CoreError::non_finite("logits", At::RowCol(1, 0)));
        let bad = array![0i64, 1].into_dyn();
        let e = categorical(
            &lg,
            Some(bad.view()),
            Pick::Nothing,
            CatOut {
                log_prob: Some(Out::new("out", lp.view_mut())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Shape(_)));
    }

    #[test]
    fn kl_is_zero_on_equal_rows_and_nonnegative() {
        let mut seed = 11u64;
        let p = Array2::from_shape_fn((500, 7), |_| lcg(&mut seed) * 6.0 - 3.0).into_dyn();
        let q = Array2::from_shape_fn((500, 7), |_| lcg(&mut seed) * 6.0 - 3.0).into_dyn();
        let mut o = ArrayD::zeros(IxDyn(&[500]));
        categorical_kl(
            &Logits {
                logits: p.view(),
                mask: None,
                check_finite: true,
            },
            p.view(),
            Out::new("out", o.view_mut()),
            Par::Rayon,
        )
        .unwrap();
        assert!(o.iter().all(|&v| v == 0.0));
        categorical_kl(
            &Logits {
                logits: p.view(),
                mask: None,
                check_finite: true,
            },
            q.view(),
            Out::new("out", o.view_mut()),
            Par::Rayon,
        )
        .unwrap();
        for i in 0..500 {
            let pr: Vec<f64> = (0..7).map(|j| p[[i, j]]).collect();
            let qr: Vec<f64> = (0..7).map(|j| q[[i, j]]).collect();
            let (_, _, pp) = reference(&pr, None, 0);
            let (_, _, qq) = reference(&qr, None, 0);
            let want: f64 = pp.iter().zip(&qq).map(|(a, b)| a * (a / b).ln()).sum();
            assert!((o[[i]] - want).abs() < 1e-12);
            assert!(o[[i]] >= 0.0);
        }
    }

    #[test]
    fn samples_do_not_depend_on_blocking_and_follow_probabilities() {
        let b = 40_000;
        let row = [0.0, 1.0, -1.0, 2.0];
        let x = Array2::from_shape_fn((b, 4), |(_, j)| row[j]).into_dyn();
        let lg = Logits {
            logits: x.view(),
            mask: None,
            check_finite: true,
        };
        let sample = |lg: &Logits<'_, f64>, par| {
            let mut idx = ArrayD::<i64>::zeros(IxDyn(&[lg.logits.shape()[0]]));
            categorical(
                lg,
                None,
                Pick::Sample(42),
                CatOut {
                    index: Some(Out::new("out", idx.view_mut())),
                    ..Default::default()
                },
                par,
            )
            .unwrap();
            idx
        };
        let s1 = sample(&lg, Par::Seq);
        let s2 = sample(&lg, Par::Rayon);
        assert_eq!(s1, s2);
        // A prefix of the batch draws the same samples (rows keep their streams).
        let xs = x.slice(ndarray::s![..1000, ..]).into_dyn();
        let s3 = sample(
            &Logits {
                logits: xs,
                mask: None,
                check_finite: true,
            },
            Par::Seq,
        );
        assert_eq!(s3, s1.slice(ndarray::s![..1000]).into_dyn());
        let (_, _, p) = reference(&row, None, 0);
        for (j, &pj) in p.iter().enumerate() {
            let f = s1.iter().filter(|&&v| v == j as i64).count() as f64 / b as f64;
            assert!((f - pj).abs() < 0.01, "action {j}: {f} vs {pj}");
        }
        let mut mode = ArrayD::<i64>::zeros(IxDyn(&[b]));
        categorical(
            &lg,
            None,
            Pick::Mode,
            CatOut {
                index: Some(Out::new("out", mode.view_mut())),
                ..Default::default()
            },
            Par::Seq,
        )
        .unwrap();
        assert!(mode.iter().all(|&v| v == 3));
    }
}
