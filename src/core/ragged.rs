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
//! recurrence is affine, so, block by block from the last to the first:
//! 1. the block scans its *head* segment (from its first step to the end of
//!    the piece it starts in, or the block end) with zero carry, giving the
//!    affine map `y_first = head + factor * carry` ([`Carry`]);
//! 2. as soon as the carry into the block is known, the map turns it into the
//!    carry of the block on its left, which is passed on at once;
//! 3. the block scans itself with its carry and writes its outputs.
//!
//! Only step 2 is serial, and it touches one number per block. The blocks run
//! as one chain ([`Par::chain`]): a worker does steps 1 and 3 of a block close
//! together, so a block is read from memory once and re-read from cache (one
//! very long episode moves as few bytes per step as many short ones). Workers
//! claim blocks in order and wait only for the carry of a block claimed just
//! before. A worker claims its next block before it scans the current one,
//! and for discounted returns inside a long piece it does step 1 of the next
//! block in the same loop as step 3 of this one ([`run_with_first`]): step 1
//! only loads and step 3 mostly stores, so together they overlap where apart
//! each would wait on memory. A single long episode is split like any other
//! data, and since the blocks are fixed and the carries combined in one fixed
//! order, the result is bit-identical for any thread count.
//!
//! Inside a block every piece is a *run* with one constant coefficient
//! (`gamma`, or `gamma * lam`), scanned 8 steps at a time by
//! [`super::scan::run`] straight from the inputs to the outputs (no scratch
//! arrays unless a view is strided), compiled for the CPU's vector unit.
//!
//! `check_finite` costs no pass of its own: every input step enters its own
//! output with weight 1, so the scan notes whether every output is finite,
//! and only when one is not are the inputs searched for the first bad value
//! (none is found when finite inputs overflowed, which is not an error). On
//! that error the outputs hold partial results.

use super::error::{check_unit, At, CoreError, CoreResult};
use super::float::Real;
use super::par::Par;
use super::scan::{
    run, run_first, run_with_first, Carry, Run8, Sink, SliceSink, SliceTerms, Terms, W,
};
use super::simd::{dispatch, finite_mark, F64x8, Kernel};
use ndarray::{s, ArrayView1, ArrayViewMut1};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;

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

    /// Whether steps `[s0, s1)` lie inside one piece that continues past
    /// `s1`: the block is then one run, its carry the one entering from the
    /// right.
    fn spans(&self, s0: usize, s1: usize) -> bool {
        self.offsets[self.piece_of(s0) + 1] > s1
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

/// A block's per-step inputs as a contiguous slice: `x[t]` at absolute step
/// `t` is `data[t - base]`. Contiguous views are borrowed; others are copied
/// into per-worker scratch, one block at a time.
#[inline(always)]
fn stage<'s, F: Real>(
    view: &'s ArrayView1<'_, F>,
    lo: usize,
    hi: usize,
    buf: &'s mut Vec<F>,
) -> &'s [F] {
    match view.as_slice() {
        Some(all) => &all[lo..hi],
        None => {
            buf.clear();
            buf.extend(view.slice(s![lo..hi]).iter().copied());
            buf
        }
    }
}

/// `x = delta = r + gamma * v[t+1] - v[t]` (GAE inside a piece).
struct GaeTerms<'s, F> {
    r: &'s [F],
    v: &'s [F],
    base: usize,
    gamma: f64,
}

impl<F: Real> Terms for GaeTerms<'_, F> {
    #[inline(always)]
    fn x8(&self, t: usize) -> F64x8 {
        let i = t - self.base;
        let r = &self.r[i..i + W];
        let v = &self.v[i..i + W + 1];
        let mut x = [0.0f64; W];
        for (j, x) in x.iter_mut().enumerate() {
            *x = r[j].to_f64() + self.gamma * v[j + 1].to_f64() - v[j].to_f64();
        }
        F64x8(x)
    }
    #[inline(always)]
    fn x1(&self, t: usize) -> f64 {
        let i = t - self.base;
        self.r[i].to_f64() + self.gamma * self.v[i + 1].to_f64() - self.v[i].to_f64()
    }
}

/// Stores the advantage `y` and the return `y + v`.
/// `marks` as for [`SliceSink`].
struct GaeOut<'o, 's, F> {
    adv: &'o mut [F],
    ret: &'o mut [F],
    v: &'s [F],
    base: usize,
    marks: F64x8,
}

impl<F: Real> Sink for GaeOut<'_, '_, F> {
    #[inline(always)]
    fn put8(&mut self, t: usize, y: &F64x8) {
        let i = t - self.base;
        let (a, r, v) = (
            &mut self.adv[i..i + W],
            &mut self.ret[i..i + W],
            &self.v[i..i + W],
        );
        for (j, &y) in y.0.iter().enumerate() {
            a[j] = F::from_f64(y);
            r[j] = F::from_f64(y + v[j].to_f64());
        }
    }
    #[inline(always)]
    fn put1(&mut self, t: usize, y: f64) {
        let i = t - self.base;
        self.adv[i] = F::from_f64(y);
        self.ret[i] = F::from_f64(y + self.v[i].to_f64());
    }
    #[inline(always)]
    fn marks(&mut self, m: F64x8) {
        self.marks = self.marks + m;
    }
}

/// Which recurrence, with its constants.
#[derive(Clone, Copy)]
enum Kind {
    Returns { gamma: f64 },
    Gae { gamma: f64, lam: f64 },
}

impl Kind {
    /// The coefficient inside a piece.
    fn c(self) -> f64 {
        match self {
            Kind::Returns { gamma } => gamma,
            Kind::Gae { gamma, lam } => gamma * lam,
        }
    }
}

/// One block `[s0, s1)` of the scan.
///
/// `carry: Some(y)` scans the whole block with `y` entering at `s1` and stores
/// every output; `None` computes only the block's affine map (its head
/// segment: from `s0` to the end of the piece it starts in, or `s1`).
struct BlockJob<'j, 'a, 'p, F: Real> {
    at: Block<'j, 'a, 'p, F>,
    scratch: &'j mut Scratch<F>,
    outs: Option<BlockOuts<'j, 'a, F>>,
}

/// What a block reads.
struct Block<'j, 'a, 'p, F: Real> {
    r: &'j ArrayView1<'a, F>,
    v: Option<&'j ArrayView1<'a, F>>,
    pieces: &'j Pieces<'p, F>,
    kind: Kind,
    k: &'j Run8,
    s0: usize,
    s1: usize,
    carry: f64,
}

/// A mutable view's slice, if contiguous (reborrowing the view).
fn slice_of<'x, F>(v: &'x mut ArrayViewMut1<'_, F>) -> Option<&'x mut [F]> {
    v.as_slice_mut()
}

/// Per-worker staging buffers.
struct Scratch<F> {
    r: Vec<F>,
    v: Vec<F>,
    o1: Vec<F>,
    o2: Vec<F>,
}

impl<F> Scratch<F> {
    fn new() -> Self {
        Scratch {
            r: Vec::new(),
            v: Vec::new(),
            o1: Vec::new(),
            o2: Vec::new(),
        }
    }
}

/// Output views of one block (the second only for GAE).
struct BlockOuts<'j, 'a, F> {
    first: &'j mut ArrayViewMut1<'a, F>,
    second: Option<&'j mut ArrayViewMut1<'a, F>>,
}

/// The advantage at a piece's last step `t`: `r + gamma * V' - v + gl * A'`
/// with `(V', A')` its tail (zeros if terminal).
#[inline(always)]
fn gae_last<F: Real>(r: F, v: F, gamma: f64, gl: f64, tail: (f64, f64)) -> f64 {
    let x = r.to_f64() + gamma * tail.0 - v.to_f64();
    if gl == 0.0 {
        x
    } else {
        x + gl * tail.1
    }
}

impl<F: Real> Block<'_, '_, '_, F> {
    /// Scan `[lo, hi)` (inside one piece) with `carry` at `hi`, compiled for
    /// this CPU's vector unit (one small kernel per run vectorises reliably).
    #[inline(always)]
    fn scan<T: Terms, S: Sink>(
        &self,
        terms: &T,
        sink: Option<&mut S>,
        lo: usize,
        hi: usize,
        carry: f64,
    ) -> f64 {
        match sink {
            Some(out) => dispatch(RunJob {
                k: self.k,
                terms,
                out,
                lo,
                hi,
                carry,
            }),
            None => dispatch(FirstJob {
                k: self.k,
                terms,
                lo,
                hi,
                carry,
            }),
        }
    }

    /// Every piece of the block (or, without a sink, only the head piece);
    /// returns `y[s0]`.
    fn pieces_of<T: Terms, S: Sink>(
        &self,
        terms: &T,
        mut sink: Option<&mut S>,
        r: &[F],
        v: Option<&[F]>,
        carry: f64,
    ) -> f64 {
        let (s0, s1) = (self.s0, self.s1);
        let mut y0 = carry;
        let p = self.pieces;
        // Last piece first: every run is scanned right to left, so the block
        // is read and written in one descending sweep (friendlier to the
        // prefetchers than a saw-tooth). A map needs only the head piece.
        let first = p.piece_of(s0);
        let last = if sink.is_some() {
            p.piece_of(s1 - 1)
        } else {
            first
        };
        for e in (first..=last).rev() {
            let (lo, hi) = (p.offsets[e].max(s0), p.offsets[e + 1]);
            if hi <= lo {
                continue;
            }
            let y = if hi > s1 {
                self.scan::<T, S>(terms, sink.as_deref_mut(), lo, s1, carry)
            } else {
                let tail = self.pieces.tail(e);
                match (self.kind, v) {
                    (Kind::Gae { gamma, lam }, Some(v)) => {
                        let t = hi - 1;
                        let a = gae_last(r[t - s0], v[t - s0], gamma, gamma * lam, tail);
                        if let Some(s) = sink.as_deref_mut() {
                            s.put1(t, a);
                            let mut m = F64x8::splat(0.0);
                            m.0[0] = finite_mark(a);
                            s.marks(m);
                        }
                        self.scan::<T, S>(terms, sink.as_deref_mut(), lo, t, a)
                    }
                    _ => self.scan::<T, S>(terms, sink.as_deref_mut(), lo, hi, tail.0),
                }
            };
            if lo == s0 {
                y0 = y;
            }
        }
        y0
    }
}

/// [`run`] as a [`Kernel`].
struct RunJob<'j, T, S> {
    k: &'j Run8,
    terms: &'j T,
    out: &'j mut S,
    lo: usize,
    hi: usize,
    carry: f64,
}

impl<T: Terms, S: Sink> Kernel for RunJob<'_, T, S> {
    type Output = f64;
    #[inline(always)]
    fn run<const FMA: bool>(self) -> f64 {
        run::<FMA, T, S>(self.k, self.terms, self.out, self.lo, self.hi, self.carry)
    }
}

/// [`run_first`] as a [`Kernel`].
struct FirstJob<'j, T> {
    k: &'j Run8,
    terms: &'j T,
    lo: usize,
    hi: usize,
    carry: f64,
}

impl<T: Terms> Kernel for FirstJob<'_, T> {
    type Output = f64;
    #[inline(always)]
    fn run<const FMA: bool>(self) -> f64 {
        run_first::<FMA, T>(self.k, self.terms, self.lo, self.hi, self.carry)
    }
}

/// [`run_with_first`] as a [`Kernel`].
struct FusedJob<'j, F> {
    k: &'j Run8,
    xs: &'j [F],
    ys: &'j mut [F],
    carry: f64,
    xm: &'j [F],
}

impl<F: Real> Kernel for FusedJob<'_, F> {
    type Output = (f64, f64, F64x8);
    #[inline(always)]
    fn run<const FMA: bool>(self) -> (f64, f64, F64x8) {
        run_with_first::<FMA, F>(self.k, self.xs, self.ys, self.carry, self.xm)
    }
}

/// The chain's fast path, for the blocks of a long piece: block `at` lies
/// inside one piece that continues past it, and so does block `[m0, m1)`,
/// whose map is then the head of the whole block with zero carry. For
/// discounted returns with contiguous rewards and outputs, the block's scan
/// and the other block's map run in one loop ([`run_with_first`]), so the
/// map's loads overlap the scan's stores, and each gives exactly what
/// [`BlockJob::go`] gives for it. Returns the map's head and whether every
/// output stored is finite; `None`, with nothing done, in any other case.
/// (GAE is left on the usual path: its terms read the values one step past
/// each chunk, which the chunked loop does not do.)
fn scan_with_map<F: Real>(
    at: &Block<'_, '_, '_, F>,
    outs: &mut BlockOuts<'_, '_, F>,
    m0: usize,
    m1: usize,
) -> Option<(f64, bool)> {
    let Kind::Returns { .. } = at.kind else {
        return None;
    };
    let r = at.r.as_slice()?;
    let (_, head, marks) = dispatch(FusedJob {
        k: at.k,
        xs: &r[at.s0..at.s1],
        ys: slice_of(outs.first)?,
        carry: at.carry,
        xm: &r[m0..m1],
    });
    Some((head, marks.all_zero()))
}

impl<F: Real> BlockJob<'_, '_, '_, F> {
    /// `y[s0]` of the block (with outputs: all stored; without: the head
    /// only), and whether every output stored is finite.
    fn go(self) -> (f64, bool) {
        let BlockJob { at, scratch, outs } = self;
        let (s0, s1) = (at.s0, at.s1);
        let n = at.pieces.steps();
        // Steps read: the block, or only its head segment for a map; GAE also
        // needs the value after the last step read when that piece continues.
        let end = if outs.is_some() {
            s1
        } else {
            let e = at.pieces.piece_of(s0);
            at.pieces.offsets[e + 1].min(s1)
        };
        let Scratch { r, v, o1, o2 } = scratch;
        let rs = stage(at.r, s0, end, r);
        let m = s1 - s0;
        match (at.kind, at.v) {
            (Kind::Returns { .. }, _) | (_, None) => {
                let terms = SliceTerms { xs: rs, base: s0 };
                let Some(BlockOuts { first, .. }) = outs else {
                    let y = at.pieces_of::<_, SliceSink<F>>(&terms, None, rs, None, at.carry);
                    return (y, true);
                };
                let direct = slice_of(first).is_some();
                if !direct {
                    o1.clear();
                    o1.resize(m, F::from_f64(0.0));
                }
                let (y, marks) = {
                    let out = match slice_of(first) {
                        Some(d) => d,
                        None => &mut o1[..],
                    };
                    let mut sink = SliceSink::new(out, s0);
                    let y = at.pieces_of::<_, _>(&terms, Some(&mut sink), rs, None, at.carry);
                    (y, sink.marks)
                };
                if !direct {
                    first.iter_mut().zip(o1.iter()).for_each(|(d, &x)| *d = x);
                }
                (y, marks.all_zero())
            }
            (Kind::Gae { gamma, .. }, Some(vv)) => {
                let vs = stage(vv, s0, (end + 1).min(n), v);
                let terms = GaeTerms {
                    r: rs,
                    v: vs,
                    base: s0,
                    gamma,
                };
                let Some(BlockOuts {
                    first,
                    second: Some(second),
                }) = outs
                else {
                    let y = at.pieces_of::<_, SliceSink<F>>(&terms, None, rs, Some(vs), at.carry);
                    return (y, true);
                };
                let direct = slice_of(first).is_some() && slice_of(second).is_some();
                if !direct {
                    o1.clear();
                    o1.resize(m, F::from_f64(0.0));
                    o2.clear();
                    o2.resize(m, F::from_f64(0.0));
                }
                let (y, marks) = {
                    let (adv, ret) = match (direct, slice_of(first), slice_of(second)) {
                        (true, Some(a), Some(b)) => (a, b),
                        _ => (&mut o1[..], &mut o2[..]),
                    };
                    let mut sink = GaeOut {
                        adv,
                        ret,
                        v: vs,
                        base: s0,
                        marks: F64x8::splat(0.0),
                    };
                    let y = at.pieces_of::<_, _>(&terms, Some(&mut sink), rs, Some(vs), at.carry);
                    (y, sink.marks)
                };
                if !direct {
                    first.iter_mut().zip(o1.iter()).for_each(|(d, &x)| *d = x);
                    second.iter_mut().zip(o2.iter()).for_each(|(d, &x)| *d = x);
                }
                (y, marks.all_zero())
            }
        }
    }
}

/// Run the blocked scan over every block in one sweep ([`Par::chain`]),
/// writing `first` (and `second` for GAE: advantages and returns) block by
/// block. Returns whether every output is finite.
fn blocked<F: Real>(
    r: &ArrayView1<'_, F>,
    v: Option<&ArrayView1<'_, F>>,
    pieces: &Pieces<'_, F>,
    kind: Kind,
    first: ArrayViewMut1<'_, F>,
    second: Option<ArrayViewMut1<'_, F>>,
    par: Par,
) -> bool {
    let n = pieces.steps();
    if n == 0 {
        return true;
    }
    let nb = n.div_ceil(BLOCK);
    let bounds = |b: usize| (b * BLOCK, ((b + 1) * BLOCK).min(n));
    let k = Run8::new(kind.c());
    let at = |b: usize, carry: f64| {
        let (s0, s1) = bounds(b);
        Block {
            r,
            v,
            pieces,
            kind,
            k: &k,
            s0,
            s1,
            carry,
        }
    };
    // Each block's outputs, taken by whichever worker finishes that block.
    type Outs<'o, F> = (ArrayViewMut1<'o, F>, Option<ArrayViewMut1<'o, F>>);
    let slots: Vec<Mutex<Option<Outs<'_, F>>>> = match second {
        Some(sec) => split_blocks(first)
            .into_iter()
            .zip(split_blocks(sec))
            .map(|(a, c)| Mutex::new(Some((a, Some(c)))))
            .collect(),
        None => split_blocks(first)
            .into_iter()
            .map(|a| Mutex::new(Some((a, None))))
            .collect(),
    };
    let finite = AtomicBool::new(true);
    // Item i of the chain is block nb - 1 - i (carries flow right to left);
    // the value passed into it is the carry entering the block at its right
    // edge (0 after the last block, which ends a piece).
    // Block b's affine map from its head segment's first output.
    let map_of = |b: usize, head: f64| {
        let (s0, s1) = bounds(b);
        let factor = if pieces.spans(s0, s1) {
            k.c().powi((s1 - s0) as i32)
        } else {
            0.0
        };
        Carry { head, factor }
    };
    par.chain(
        nb,
        0.0f64,
        Scratch::new,
        // 1. The block's affine map (the first block's is never needed).
        |scr, i| {
            let b = nb - 1 - i;
            (b > 0).then(|| {
                let job = BlockJob {
                    at: at(b, 0.0),
                    scratch: scr,
                    outs: None,
                };
                map_of(b, job.go().0)
            })
        },
        // 2. The carry into the block on the left.
        |map, carry| map.map_or(0.0, |m| m.apply(carry)),
        // 3. The block with its carry, outputs stored; inside a long piece,
        //    fused with the map of the block claimed ahead (usually the next
        //    one on the left).
        |scr, i, _, carry, ahead| {
            let b = nb - 1 - i;
            let taken = slots[b].lock().ok().and_then(|mut g| g.take());
            let (mut a, mut c) = taken?;
            let mut outs = BlockOuts {
                first: &mut a,
                second: c.as_mut(),
            };
            let (s0, s1) = bounds(b);
            if let Some(bm) = ahead.map(|j| nb - 1 - j).filter(|&bm| bm > 0) {
                let (m0, m1) = bounds(bm);
                if pieces.spans(s0, s1) && pieces.spans(m0, m1) {
                    if let Some((head, fin)) = scan_with_map(&at(b, carry), &mut outs, m0, m1) {
                        #[cfg(test)]
                        tests::FUSED.with(|n| n.set(n.get() + 1));
                        if !fin {
                            finite.store(false, Ordering::Relaxed);
                        }
                        return Some(Some(map_of(bm, head)));
                    }
                }
            }
            let job = BlockJob {
                at: at(b, carry),
                scratch: scr,
                outs: Some(outs),
            };
            if !job.go().1 {
                finite.store(false, Ordering::Relaxed);
            }
            None
        },
    );
    finite.into_inner()
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
    let finite = blocked(
        &rewards,
        None,
        pieces,
        Kind::Returns { gamma },
        out,
        None,
        par,
    );
    if !finite {
        // Some output is not finite: find the input that made it so (none
        // when finite inputs overflowed, which is not an error).
        check_steps("rewards", &rewards, check_finite, par)?;
    }
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
    let finite = blocked(
        &rewards,
        Some(&values),
        pieces,
        Kind::Gae { gamma, lam },
        adv,
        Some(ret),
        par,
    );
    if !finite {
        // As in `discounted_returns`: only now look for the bad input.
        check_steps("rewards", &rewards, check_finite, par)?;
        check_steps("values", &values, check_finite, par)?;
    }
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

    thread_local! {
        /// Blocks this thread scanned fused with a map ([`scan_with_map`]).
        pub(super) static FUSED: std::cell::Cell<usize> = const { std::cell::Cell::new(0) };
    }

    fn fused_here() -> usize {
        FUSED.with(|n| n.get())
    }

    /// Returns and GAE (advantages, returns) with contiguous or strided
    /// outputs (strided ones never take the fused path).
    fn both_kinds<F: Real>(
        r: &Array1<F>,
        v: &Array1<F>,
        p: &Pieces<'_, F>,
        strided: bool,
        par: Par,
    ) -> CoreResult<[Array1<F>; 3]> {
        let n = r.len();
        let zero = F::from_f64(0.0);
        let mut w = [0, 1, 2].map(|_| Array1::from_elem(2 * n, zero));
        let [a, b, c] = &mut w;
        let step = if strided { 2 } else { 1 };
        discounted_returns(
            r.view(),
            p,
            0.995,
            true,
            a.slice_mut(s![..n * step;step]),
            par,
        )?;
        gae(
            r.view(),
            v.view(),
            p,
            0.99,
            0.95,
            true,
            b.slice_mut(s![..n * step;step]),
            c.slice_mut(s![..n * step;step]),
            par,
        )?;
        Ok(w.map(|x| x.slice(s![..n * step;step]).to_owned()))
    }

    /// A long piece's blocks are scanned fused with the next block's map:
    /// the results are bit-identical to the unfused path (strided outputs)
    /// and to any thread count, and a bad input inside a fused block is
    /// still found and named.
    #[test]
    fn fused_blocks_equal_the_unfused_path_bit_for_bit() {
        let s = 6 * BLOCK + 77;
        // A short piece, one long piece ending mid-block, a cut piece.
        let lens = Array1::from(vec![40i64, (5 * BLOCK) as i64, (BLOCK + 37) as i64]);
        let term = Array1::from(vec![true, true, false]);
        let tails = Array1::from(vec![0.0f32, 0.0, 1.5]);
        let p = Pieces::new(
            lens.view(),
            s,
            Some(term.view()),
            Some(tails.view()),
            None,
            true,
        )
        .unwrap();
        let mut seed = 7u64;
        let r = Array1::from_shape_fn(s, |_| lcg(&mut seed) as f32);
        let v = Array1::from_shape_fn(s, |_| lcg(&mut seed) as f32);
        let before = fused_here();
        let fused = both_kinds(&r, &v, &p, false, Par::Seq).unwrap();
        // Blocks 1..=4 lie inside the long piece; one worker scans blocks
        // 4, 3, 2 fused with the maps of 3, 2, 1 (block 0 needs no map), for
        // discounted returns (GAE keeps the usual path).
        assert_eq!(fused_here() - before, 3, "the fused path ran");
        let before = fused_here();
        let apart = both_kinds(&r, &v, &p, true, Par::Seq).unwrap();
        assert_eq!(fused_here(), before, "strided outputs are not fused");
        assert_eq!(fused, apart);
        for threads in [2, 3] {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let got = pool
                .install(|| both_kinds(&r, &v, &p, false, Par::Rayon))
                .unwrap();
            assert_eq!(fused, got, "threads={threads}");
        }
        let mut bad = r.clone();
        bad[3 * BLOCK + 5] = f32::NAN;
        let e = both_kinds(&bad, &v, &p, false, Par::Seq).unwrap_err();
        assert_eq!(e, CoreError::non_finite("rewards", At::Flat(3 * BLOCK + 5)));
    }

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
    fn a_bad_input_is_found_after_the_scan_and_overflow_is_not_an_error() {
        let s = 3 * BLOCK + 77;
        let lens = Array1::from(vec![5i64, (s - 105) as i64, 100]);
        let p = Pieces::<f32>::new(lens.view(), s, None, None, None, true).unwrap();
        let mut r = Array1::from_elem(s, 0.5f32);
        let v = Array1::from_elem(s, 0.25f32);
        let mut a = Array1::zeros(s);
        let mut b = Array1::zeros(s);
        r[2 * BLOCK + 9] = f32::NAN;
        let e = discounted_returns(r.view(), &p, 0.9, true, a.view_mut(), Par::Seq).unwrap_err();
        assert_eq!(e, CoreError::non_finite("rewards", At::Flat(2 * BLOCK + 9)));
        // without the check the NaN stays inside its piece
        discounted_returns(r.view(), &p, 0.9, false, a.view_mut(), Par::Seq).unwrap();
        assert!(a[2] == a[2] && a[s - 1] == a[s - 1] && a[2 * BLOCK + 9].is_nan());
        r[2 * BLOCK + 9] = 0.5;
        let mut vbad = v.clone();
        vbad[s - 3] = f32::INFINITY;
        let e = gae(
            r.view(),
            vbad.view(),
            &p,
            0.9,
            0.8,
            true,
            a.view_mut(),
            b.view_mut(),
            Par::Rayon,
        )
        .unwrap_err();
        assert_eq!(e, CoreError::non_finite("values", At::Flat(s - 3)));
        // finite inputs whose float32 return overflows are not an error
        let big = Array1::from_elem(s, 3.0e38f32);
        discounted_returns(big.view(), &p, 1.0, true, a.view_mut(), Par::Seq).unwrap();
        assert!(a[0].is_infinite());
    }

    #[test]
    fn strided_views_give_the_contiguous_result() {
        let s = 2 * BLOCK + 333;
        let lens = Array1::from(vec![BLOCK as i64 + 1, 0, (s - BLOCK - 1) as i64]);
        let p = Pieces::<f64>::new(lens.view(), s, None, None, None, true).unwrap();
        let wide_r = Array1::from_shape_fn(2 * s, |i| ((i * 31) % 17) as f64 - 8.0);
        let wide_v = Array1::from_shape_fn(2 * s, |i| ((i * 7) % 5) as f64);
        let (r, v) = (wide_r.slice(s![..;2]), wide_v.slice(s![..;-2]));
        let (rc, vc) = (r.to_owned(), v.to_owned());
        let mut want = (Array1::zeros(s), Array1::zeros(s));
        gae(
            rc.view(),
            vc.view(),
            &p,
            0.97,
            0.9,
            true,
            want.0.view_mut(),
            want.1.view_mut(),
            Par::Seq,
        )
        .unwrap();
        let mut out_a = Array1::zeros(2 * s);
        let mut out_b = Array1::zeros(s);
        gae(
            r,
            v,
            &p,
            0.97,
            0.9,
            true,
            out_a.slice_mut(s![..;2]),
            out_b.view_mut(),
            Par::Rayon,
        )
        .unwrap();
        assert_eq!(out_a.slice(s![..;2]), want.0);
        assert_eq!(out_b, want.1);
        assert!(out_a.slice(s![1..;2]).iter().all(|&x| x == 0.0));
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
