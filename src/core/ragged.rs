//! Returns and GAE over ragged layouts: pieces of episodes stored back to
//! back in flat arrays of `S` steps, `lengths[e]` steps each.
//!
//! Per piece `e`: `terminal[e]` (default true) says the piece ends in a
//! terminal state; otherwise `tail_values[e]` is V of the state after its last
//! step and, for GAE, `tail_advantages[e]` the advantage carried in from the
//! step after it (default 0; lets a piece cut at a chunk boundary continue
//! exactly). Inside a piece there are no ends.
//!
//! # Parallel scan
//! The steps are cut into fixed blocks of [`BLOCK`] steps, a boundary that
//! depends only on `S`. Each block's result depends on the blocks after it
//! only through the one piece that runs across its right edge, and the
//! recurrence is affine, so:
//! 1. every block scans its *head* segment (from its first step to the end of
//!    the piece it starts in, or the block end) with zero carry, giving the
//!    affine map `y_first = head + factor * carry` ([`Carry`]);
//! 2. one cheap pass right to left turns the maps into each block's incoming
//!    carry;
//! 3. every block scans itself with its carry and writes its outputs.
//!
//! Only step 2 is serial, and it touches one number per block. A single very
//! long episode is therefore split like any other data, and since the blocks
//! are fixed, the result is bit-identical for any thread count.

use super::error::{check_unit, At, CoreError, CoreResult};
use super::float::Real;
use super::par::Par;
use super::scan::{affine_rev, scan_rev_with, Carry};
use ndarray::{s, ArrayView1, ArrayViewMut1};

/// Steps per block of the parallel scan.
pub const BLOCK: usize = 1 << 14;

/// The piece structure of a ragged layout.
#[derive(Clone)]
pub struct Pieces<'a, F> {
    /// `offsets[e]..offsets[e+1]` are piece `e`'s steps; `offsets.len() == E + 1`.
    offsets: Vec<usize>,
    terminal: Option<ArrayView1<'a, bool>>,
    tail_values: Option<ArrayView1<'a, F>>,
    tail_advantages: Option<ArrayView1<'a, F>>,
}

impl<'a, F: Real> Pieces<'a, F> {
    /// Validate `lengths` (non-negative, summing to `steps`) and the per-piece
    /// arrays (length `E`, finite when `check_finite`).
    pub fn new(
        lengths: ArrayView1<'_, i64>,
        steps: usize,
        terminal: Option<ArrayView1<'a, bool>>,
        tail_values: Option<ArrayView1<'a, F>>,
        tail_advantages: Option<ArrayView1<'a, F>>,
        check_finite: bool,
    ) -> CoreResult<Self> {
        let mut offsets = Vec::with_capacity(lengths.len() + 1);
        offsets.push(0usize);
        let mut total: usize = 0;
        for (e, &l) in lengths.iter().enumerate() {
            if l < 0 {
                return Err(CoreError::input_at(
                    "lengths",
                    At::Flat(e),
                    format!("is negative ({l})"),
                ));
            }
            total = total.saturating_add(l as usize);
            offsets.push(total);
        }
        if total != steps {
            return Err(CoreError::input(
                "lengths",
                format!("sum to {total} but there are {steps} steps; lengths must add up to the number of steps"),
            ));
        }
        let n = lengths.len();
        for (name, len) in [
            ("terminal", terminal.as_ref().map(|a| a.len())),
            ("tail_values", tail_values.as_ref().map(|a| a.len())),
            ("tail_advantages", tail_advantages.as_ref().map(|a| a.len())),
        ] {
            if let Some(len) = len {
                if len != n {
                    return Err(CoreError::shape_mismatch(
                        name,
                        &[len],
                        "lengths",
                        &[n],
                        "per-piece arrays need one entry per piece",
                    ));
                }
            }
        }
        if check_finite {
            for (name, a) in [
                ("tail_values", &tail_values),
                ("tail_advantages", &tail_advantages),
            ] {
                if let Some(a) = a {
                    if let Some(i) = a.iter().position(|x| !x.finite()) {
                        return Err(CoreError::non_finite(name, At::Flat(i)));
                    }
                }
            }
        }
        Ok(Pieces {
            offsets,
            terminal,
            tail_values,
            tail_advantages,
        })
    }

    /// Number of pieces.
    pub fn len(&self) -> usize {
        self.offsets.len() - 1
    }

    /// True when there are no pieces.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Total number of steps.
    pub fn steps(&self) -> usize {
        *self.offsets.last().unwrap_or(&0)
    }

    fn terminal(&self, e: usize) -> bool {
        self.terminal.as_ref().is_none_or(|t| t[e])
    }

    /// `(V after the piece, A carried in)` at the piece end: zeros if terminal.
    fn tail(&self, e: usize) -> (f64, f64) {
        if self.terminal(e) {
            return (0.0, 0.0);
        }
        let v = self.tail_values.as_ref().map_or(0.0, |a| a[e].to_f64());
        let a = self.tail_advantages.as_ref().map_or(0.0, |a| a[e].to_f64());
        (v, a)
    }

    /// The piece containing step `s` (skipping empty pieces).
    fn piece_of(&self, s: usize) -> usize {
        // Last e with offsets[e] <= s; then past empty pieces.
        let e = self.offsets.partition_point(|&o| o <= s).saturating_sub(1);
        let mut e = e.min(self.len().saturating_sub(1));
        while e + 1 < self.offsets.len() - 1 && self.offsets[e + 1] <= s {
            e += 1;
        }
        e
    }
}

/// Which recurrence: the per-step terms `(x, c)` of `y = x + c * y_next`.
#[derive(Clone, Copy)]
enum Kind {
    Returns { gamma: f64 },
    Gae { gamma: f64, lam: f64 },
}

struct Inputs<'a, 'b, 'p, F> {
    r: ArrayView1<'a, F>,
    v: Option<ArrayView1<'a, F>>,
    pieces: &'b Pieces<'p, F>,
    kind: Kind,
}

impl<F: Real> Inputs<'_, '_, '_, F> {
    /// Fill `x`, `c` for steps `[s0, s1)`; the step after `s1 - 1` is read
    /// from the inputs when the piece continues (values only).
    fn terms(&self, s0: usize, s1: usize, x: &mut [f64], c: &mut [f64]) {
        let p = self.pieces;
        let mut e = p.piece_of(s0);
        let mut s = s0;
        while s < s1 {
            while p.offsets[e + 1] <= s {
                e += 1;
            }
            let end = p.offsets[e + 1];
            let stop = end.min(s1);
            let (tv, ta) = p.tail(e);
            let (xs, cs) = (&mut x[s - s0..stop - s0], &mut c[s - s0..stop - s0]);
            let rs = self.r.slice(s![s..stop]);
            match self.kind {
                Kind::Returns { gamma } => {
                    match rs.as_slice() {
                        Some(sl) => xs.iter_mut().zip(sl).for_each(|(x, r)| *x = r.to_f64()),
                        None => xs
                            .iter_mut()
                            .zip(rs.iter())
                            .for_each(|(x, r)| *x = r.to_f64()),
                    }
                    cs.fill(gamma);
                    if stop == end {
                        let k = stop - s - 1;
                        xs[k] += gamma * tv;
                        cs[k] = 0.0;
                    }
                }
                Kind::Gae { gamma, lam } => {
                    let Some(v) = self.v.as_ref() else { return };
                    let gl = gamma * lam;
                    // Steps whose successor lies inside the piece.
                    let inner = stop.min(end - 1).max(s);
                    let k_in = inner - s;
                    let vt = v.slice(s![s..stop]);
                    let vn = v.slice(s![s + 1..inner + 1]);
                    match (rs.as_slice(), vt.as_slice(), vn.as_slice()) {
                        (Some(r), Some(vt), Some(vn)) => {
                            for ((((x, r), v), w), _) in
                                xs.iter_mut().zip(r).zip(vt).zip(vn).zip(0..k_in)
                            {
                                *x = r.to_f64() + gamma * w.to_f64() - v.to_f64();
                            }
                        }
                        _ => {
                            for ((((x, r), v), w), _) in xs
                                .iter_mut()
                                .zip(rs.iter())
                                .zip(vt.iter())
                                .zip(vn.iter())
                                .zip(0..k_in)
                            {
                                *x = r.to_f64() + gamma * w.to_f64() - v.to_f64();
                            }
                        }
                    }
                    cs.fill(gl);
                    if stop == end {
                        let k = stop - s - 1;
                        xs[k] = rs[k].to_f64() + gamma * tv - vt[k].to_f64() + gl * ta;
                        cs[k] = 0.0;
                    }
                }
            }
            s = stop;
        }
    }

    /// Affine map of block `[s0, s1)`: scan only its head segment.
    fn summary(&self, s0: usize, s1: usize, x: &mut [f64], c: &mut [f64]) -> Carry {
        let e = self.pieces.piece_of(s0);
        let h1 = self.pieces.offsets[e + 1].min(s1);
        let n = h1 - s0;
        self.terms(s0, h1, &mut x[..n], &mut c[..n]);
        // When the head piece ends inside the block its last c is 0, so the
        // factor is 0 and the block does not depend on what follows.
        affine_rev(&x[..n], &c[..n])
    }
}

/// Run the three-step blocked scan; `emit(s0, y)` stores block results.
fn blocked<F: Real, E>(inp: &Inputs<'_, '_, '_, F>, par: Par, emit: E)
where
    E: Fn(usize, &[f64]) + Sync,
{
    let n = inp.pieces.steps();
    if n == 0 {
        return;
    }
    let nb = n.div_ceil(BLOCK);
    let bounds = |b: usize| (b * BLOCK, ((b + 1) * BLOCK).min(n));
    // Per-worker scratch: x, c and the scan's products, one block each.
    // Sized to the data so a short call does not zero a whole block.
    let cap = BLOCK.min(n);
    let init = || {
        (
            vec![0.0f64; cap],
            vec![0.0f64; cap],
            Vec::<f64>::with_capacity(cap),
        )
    };
    // 1. Affine maps of every block but the first (its map is never needed).
    let maps: Vec<Carry> = par.map_init((1..nb).collect(), init, |(x, c, _), b| {
        let (s0, s1) = bounds(b);
        inp.summary(s0, s1, &mut x[..s1 - s0], &mut c[..s1 - s0])
    });
    // 2. Incoming carries, right to left. The last block ends a piece.
    let mut carry = vec![0.0f64; nb];
    for b in (0..nb.saturating_sub(1)).rev() {
        carry[b] = maps[b].apply(carry[b + 1]);
    }
    // 3. Every block with its carry.
    par.for_each_init((0..nb).collect(), init, |(x, c, p), b| {
        let (s0, s1) = bounds(b);
        let (x, c) = (&mut x[..s1 - s0], &mut c[..s1 - s0]);
        inp.terms(s0, s1, x, c);
        scan_rev_with(x, c, carry[b], p);
        emit(s0, x);
    });
}

/// Split a 1-D output view into the blocks of the scan.
fn split_blocks<F>(mut v: ArrayViewMut1<'_, F>) -> Vec<ArrayViewMut1<'_, F>> {
    let mut out = Vec::with_capacity(v.len().div_ceil(BLOCK));
    while v.len() > BLOCK {
        let (a, b) = v.split_at(ndarray::Axis(0), BLOCK);
        out.push(a);
        v = b;
    }
    if !v.is_empty() {
        out.push(v);
    }
    out
}

fn check_steps<F: Real>(
    name: &'static str,
    a: &ArrayView1<'_, F>,
    check_finite: bool,
    par: Par,
) -> CoreResult<()> {
    if check_finite {
        if let Some(i) = super::finite::first_non_finite_1d(a, par) {
            return Err(CoreError::non_finite(name, At::Flat(i)));
        }
    }
    Ok(())
}

fn check_len(name: &'static str, got: usize, want: usize) -> CoreResult<()> {
    if got != want {
        return Err(CoreError::shape_mismatch(
            name,
            &[got],
            "rewards",
            &[want],
            "per-step arrays must match rewards",
        ));
    }
    Ok(())
}

/// Discounted return of every step: `G_t = r_t + gamma * G_{t+1}` inside a
/// piece; at a piece's last step `G = r + gamma * (0 if terminal else tail_value)`.
pub fn discounted_returns<F: Real>(
    rewards: ArrayView1<'_, F>,
    pieces: &Pieces<'_, F>,
    gamma: f64,
    check_finite: bool,
    out: ArrayViewMut1<'_, F>,
    par: Par,
) -> CoreResult<()> {
    check_unit("gamma", gamma)?;
    check_len("out", out.len(), rewards.len())?;
    check_len("rewards", rewards.len(), pieces.steps())?;
    check_steps("rewards", &rewards, check_finite, par)?;
    let inp = Inputs {
        r: rewards,
        v: None,
        pieces,
        kind: Kind::Returns { gamma },
    };
    let outs: Vec<std::sync::Mutex<ArrayViewMut1<'_, F>>> = split_blocks(out)
        .into_iter()
        .map(std::sync::Mutex::new)
        .collect();
    blocked(&inp, par, |s0, y| {
        if let Ok(mut o) = outs[s0 / BLOCK].lock() {
            match o.as_slice_mut() {
                Some(d) => d.iter_mut().zip(y).for_each(|(o, &y)| *o = F::from_f64(y)),
                None => o.iter_mut().zip(y).for_each(|(o, &y)| *o = F::from_f64(y)),
            }
        }
    });
    Ok(())
}

/// GAE over pieces: `delta_t = r_t + gamma * V'_t - v_t`, with `V'_t = v_{t+1}`
/// inside a piece and `tail_value` (0 if terminal) at its end;
/// `A_t = delta_t + gamma * lam * A_{t+1}` inside a piece and
/// `A_last = delta_last + gamma * lam * tail_advantage` (0 if terminal);
/// returns `R = A + v`.
#[allow(clippy::too_many_arguments)]
pub fn gae<F: Real>(
    rewards: ArrayView1<'_, F>,
    values: ArrayView1<'_, F>,
    pieces: &Pieces<'_, F>,
    gamma: f64,
    lam: f64,
    check_finite: bool,
    adv: ArrayViewMut1<'_, F>,
    ret: ArrayViewMut1<'_, F>,
    par: Par,
) -> CoreResult<()> {
    check_unit("gamma", gamma)?;
    check_unit("lam", lam)?;
    check_len("values", values.len(), rewards.len())?;
    check_len("out[0]", adv.len(), rewards.len())?;
    check_len("out[1]", ret.len(), rewards.len())?;
    check_len("rewards", rewards.len(), pieces.steps())?;
    check_steps("rewards", &rewards, check_finite, par)?;
    check_steps("values", &values, check_finite, par)?;
    let inp = Inputs {
        r: rewards,
        v: Some(values),
        pieces,
        kind: Kind::Gae { gamma, lam },
    };
    type Pair<'x, F> = (ArrayViewMut1<'x, F>, ArrayViewMut1<'x, F>);
    let outs: Vec<std::sync::Mutex<Pair<'_, F>>> = split_blocks(adv)
        .into_iter()
        .zip(split_blocks(ret))
        .map(std::sync::Mutex::new)
        .collect();
    blocked(&inp, par, |s0, y| {
        if let Ok(mut g) = outs[s0 / BLOCK].lock() {
            let (a, r) = &mut *g;
            let v = values.slice(s![s0..s0 + y.len()]);
            a.iter_mut().zip(y).for_each(|(o, &y)| *o = F::from_f64(y));
            r.iter_mut()
                .zip(y)
                .zip(v.iter())
                .for_each(|((o, &y), v)| *o = F::from_f64(y + v.to_f64()));
        }
    });
    Ok(())
}

/// Per-piece discounted sum `sum_k gamma^k x[start + k]` (gamma = 1: the
/// undiscounted episode return). Computed backwards (Horner) per piece.
pub fn episode_sums<F: Real>(
    x: ArrayView1<'_, F>,
    pieces: &Pieces<'_, F>,
    gamma: f64,
    check_finite: bool,
    mut out: ArrayViewMut1<'_, F>,
    par: Par,
) -> CoreResult<()> {
    check_unit("gamma", gamma)?;
    check_len("x", x.len(), pieces.steps())?;
    if out.len() != pieces.len() {
        return Err(CoreError::shape_mismatch(
            "out",
            &[out.len()],
            "lengths",
            &[pieces.len()],
            "one sum per piece",
        ));
    }
    check_steps("x", &x, check_finite, par)?;
    let sums: Vec<f64> = par.map((0..pieces.len()).collect(), |e| {
        let (a, b) = (pieces.offsets[e], pieces.offsets[e + 1]);
        x.slice(s![a..b])
            .iter()
            .rev()
            .fold(0.0, |acc, v| v.to_f64() + gamma * acc)
    });
    out.iter_mut()
        .zip(sums)
        .for_each(|(o, s)| *o = F::from_f64(s));
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2};

    fn lcg(seed: &mut u64) -> f64 {
        *seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*seed >> 11) as f64) / ((1u64 << 53) as f64)
    }

    /// The time-major kernel on one stream with flags at piece ends is the
    /// definition the ragged kernel must reproduce.
    #[test]
    fn equals_time_major_single_stream() {
        let mut seed = 3u64;
        for &(n_pieces, max_len) in &[(1usize, 1usize), (7, 5), (50, 900), (3, 40000), (200, 300)] {
            let lengths: Vec<i64> = (0..n_pieces)
                .map(|_| (lcg(&mut seed) * max_len as f64) as i64)
                .collect();
            let s: usize = lengths.iter().sum::<i64>() as usize;
            let r = Array1::from_shape_fn(s, |_| lcg(&mut seed) - 0.5);
            let v = Array1::from_shape_fn(s, |_| lcg(&mut seed));
            let terminal = Array1::from_shape_fn(n_pieces, |_| lcg(&mut seed) < 0.5);
            let tails = Array1::from_shape_fn(n_pieces, |_| lcg(&mut seed));
            let lens = Array1::from(lengths.clone());
            let p = Pieces::new(
                lens.view(),
                s,
                Some(terminal.view()),
                Some(tails.view()),
                None,
                true,
            )
            .unwrap();
            // Time-major equivalent.
            let mut term = Array2::from_elem((s, 1), false);
            let mut trunc = Array2::from_elem((s, 1), false);
            let mut nv = Array2::zeros((s, 1));
            let mut off = 0;
            for (e, &l) in lengths.iter().enumerate() {
                let l = l as usize;
                for t in off..off + l {
                    nv[[t, 0]] = if t + 1 < off + l { v[t + 1] } else { tails[e] };
                }
                if l > 0 {
                    if terminal[e] {
                        term[[off + l - 1, 0]] = true;
                    } else {
                        trunc[[off + l - 1, 0]] = true;
                    }
                }
                off += l;
            }
            let r2 = r.clone().into_shape_with_order((s, 1)).unwrap();
            let v2 = v.clone().into_shape_with_order((s, 1)).unwrap();
            let steps = crate::core::timemajor::Steps {
                values: Some(v2.view()),
                next_values: Some(nv.view()),
                terminated: Some(term.view()),
                truncated: Some(trunc.view()),
                ..crate::core::timemajor::Steps::new(r2.view())
            };
            let mut ta = Array2::zeros((s, 1));
            let mut tr = Array2::zeros((s, 1));
            let mut tg = Array2::zeros((s, 1));
            crate::core::timemajor::gae(
                &steps,
                0.99,
                0.9,
                None,
                true,
                ta.view_mut(),
                tr.view_mut(),
                Par::Seq,
            )
            .unwrap();
            crate::core::timemajor::discounted_returns(&steps, 0.99, true, tg.view_mut(), Par::Seq)
                .unwrap();
            for par in [Par::Seq, Par::Rayon] {
                let mut a = Array1::zeros(s);
                let mut b = Array1::zeros(s);
                let mut g = Array1::zeros(s);
                gae(
                    r.view(),
                    v.view(),
                    &p,
                    0.99,
                    0.9,
                    true,
                    a.view_mut(),
                    b.view_mut(),
                    par,
                )
                .unwrap();
                discounted_returns(r.view(), &p, 0.99, true, g.view_mut(), par).unwrap();
                for t in 0..s {
                    assert!((a[t] - ta[[t, 0]]).abs() < 1e-9, "adv at {t}");
                    assert!((b[t] - tr[[t, 0]]).abs() < 1e-9);
                    assert!((g[t] - tg[[t, 0]]).abs() < 1e-9);
                }
                let mut sums = Array1::zeros(n_pieces);
                episode_sums(r.view(), &p, 0.99, true, sums.view_mut(), par).unwrap();
                let mut off = 0;
                for (e, &l) in lengths.iter().enumerate() {
                    let l = l as usize;
                    if l > 0 && terminal[e] {
                        assert!((sums[e] - g[off]).abs() < 1e-9);
                    }
                    off += l;
                }
            }
        }
    }

    #[test]
    fn bit_identical_for_any_thread_count_and_long_pieces() {
        let s = 5 * BLOCK + 123;
        let lens = Array1::from(vec![3i64, (s - 10) as i64, 7]);
        let r = Array1::from_shape_fn(s, |i| ((i * 37) % 101) as f32 * 0.01 - 0.5);
        let p = Pieces::new(lens.view(), s, None, None, None, true).unwrap();
        let mut a = Array1::zeros(s);
        let mut b = Array1::zeros(s);
        discounted_returns(r.view(), &p, 0.999, true, a.view_mut(), Par::Seq).unwrap();
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(3)
            .build()
            .unwrap();
        pool.install(|| discounted_returns(r.view(), &p, 0.999, true, b.view_mut(), Par::Rayon))
            .unwrap();
        assert_eq!(a, b);
        // And against a plain serial loop in f64.
        let mut g = 0.0f64;
        let mut want = vec![0.0f64; s];
        for t in (0..s).rev() {
            let end = t == 2 || t == s - 8 || t == s - 1;
            g = r[t] as f64 + if end { 0.0 } else { 0.999 * g };
            want[t] = g;
        }
        for t in 0..s {
            assert!(
                (a[t] as f64 - want[t]).abs() <= 1e-6 * want[t].abs().max(1.0),
                "at {t}"
            );
        }
    }

    #[test]
    fn tail_advantage_continues_a_cut_piece() {
        // One piece of 6 steps equals two pieces of 3 with the carry passed on.
        let r = Array1::from(vec![1.0f64, -1.0, 0.5, 2.0, 0.0, 1.5]);
        let v = Array1::from(vec![0.1f64, 0.2, 0.3, 0.4, 0.5, 0.6]);
        let whole =
            Pieces::new(Array1::from(vec![6i64]).view(), 6, None, None, None, true).unwrap();
        let mut a = Array1::zeros(6);
        let mut b = Array1::zeros(6);
        gae(
            r.view(),
            v.view(),
            &whole,
            0.9,
            0.8,
            true,
            a.view_mut(),
            b.view_mut(),
            Par::Seq,
        )
        .unwrap();
        let second =
            Pieces::new(Array1::from(vec![3i64]).view(), 3, None, None, None, true).unwrap();
        let mut a2 = Array1::zeros(3);
        let mut b2 = Array1::zeros(3);
        gae(
            r.slice(s![3..]),
            v.slice(s![3..]),
            &second,
            0.9,
            0.8,
            true,
            a2.view_mut(),
            b2.view_mut(),
            Par::Seq,
        )
        .unwrap();
        let term = Array1::from(vec![false]);
        let tv = Array1::from(vec![v[3]]);
        let ta = Array1::from(vec![a2[0]]);
        let first = Pieces::new(
            Array1::from(vec![3i64]).view(),
            3,
            Some(term.view()),
            Some(tv.view()),
            Some(ta.view()),
            true,
        )
        .unwrap();
        let mut a1 = Array1::zeros(3);
        let mut b1 = Array1::zeros(3);
        gae(
            r.slice(s![..3]),
            v.slice(s![..3]),
            &first,
            0.9,
            0.8,
            true,
            a1.view_mut(),
            b1.view_mut(),
            Par::Seq,
        )
        .unwrap();
        for t in 0..3 {
            assert!((a1[t] - a[t]).abs() < 1e-12);
            assert!((a2[t] - a[t + 3]).abs() < 1e-12);
        }
    }

    #[test]
    fn bad_lengths_are_named() {
        let lens = Array1::from(vec![2i64, -1, 3]);
        let e = Pieces::<f64>::new(lens.view(), 4, None, None, None, true)
            .err()
            .unwrap();
        assert_eq!(
            e,
            CoreError::input_at("lengths", At::Flat(1), "is negative (-1)")
        );
        let lens = Array1::from(vec![2i64, 3]);
        assert!(Pieces::<f64>::new(lens.view(), 4, None, None, None, true).is_err());
        let lens = Array1::from(vec![0i64, 4, 0]);
        let p = Pieces::<f64>::new(lens.view(), 4, None, None, None, true).unwrap();
        assert_eq!(p.piece_of(0), 1);
        assert_eq!(p.piece_of(3), 1);
    }
}
