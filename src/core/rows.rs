//! Time-major GAE and discounted returns straight from C-contiguous `[T, M]`
//! buffers: the fast path of [`super::timemajor`] for the common layout.
//!
//! The general tile loop gathers every input into `f64` scratch and scatters
//! the results back, with per-row bookkeeping that dominates when `M` is
//! small. Here each row is read once from the caller's arrays in one
//! vectorised loop (one copy per rule and flag presence) and written once; the carries (`A_{t+1}` or
//! `G_{t+1}`, one per stream) stay in a small `f64` buffer. The arithmetic
//! (same operations in the same order, no fused multiply-adds) and the
//! bootstrap rule are those of the tile loop (see the module docs of
//! [`super::timemajor`]), so both give the same bits: a result never depends
//! on the memory layout of the inputs.
//!
//! Checks ride along: the kernel notes whether every output is finite (every
//! reward and value enters its own step's output with weight 1) and whether
//! any truncated step lacks a next value; only then does the caller run the
//! full validation, which names the first offending element.

use super::fastmath;
use super::float::Real;
use super::par::{Par, PAR_MIN_WORK};
use super::simd::{dispatch, finite_mark, Kernel};
use super::timemajor::{split_pair, Steps};
use super::vtrace::{cap, VtraceParams};
use ndarray::{ArrayView2, ArrayViewMut2, Axis};

/// Streams per block are a multiple of this (a full vector of f64 lanes).
const L: usize = 8;
/// The narrowest block of streams given to a thread of its own.
const MIN_W: usize = 128;

/// The inputs as flat row-major slices (`[t * M + m]`).
struct Flat<'s, F> {
    m: usize,
    t: usize,
    r: &'s [F],
    v: Option<&'s [F]>,
    nv: Option<&'s [F]>,
    te: Option<&'s [bool]>,
    tr: Option<&'s [bool]>,
    boot: Option<&'s [F]>,
}

/// What the kernel computes.
#[derive(Clone, Copy)]
pub(crate) enum Rule {
    /// `G_t = r_t + gamma * (0 if te else (V'_t if tr or last else G_{t+1}))`.
    Returns { gamma: f64 },
    /// `A_t = r_t + gamma * V'_t - v_t + gamma lam (1 - end_t) A_{t+1}`; `R = A + v`.
    Gae { gamma: f64, lam: f64 },
}

/// What the caller must look into after the kernel.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(crate) struct Flags {
    /// Some output is NaN or infinite.
    pub non_finite: bool,
    /// Some step is truncated while `next_values` is not given.
    pub truncated_without_next: bool,
}

/// Whether the fast path would split `m` streams across threads at all: when
/// not, the caller should not pay for entering the thread pool.
pub fn splits_streams(m: usize) -> bool {
    m >= 2 * MIN_W
}

/// Run `rule` over `steps` into `out_a` (and `out_b`: GAE returns) when every
/// array is C-contiguous; `None` when the layout needs the general loop.
pub(crate) fn try_run<F: Real>(
    steps: &Steps<'_, F>,
    rule: Rule,
    mut out_a: ArrayViewMut2<'_, F>,
    mut out_b: Option<ArrayViewMut2<'_, F>>,
    par: Par,
) -> Option<Flags> {
    let (t, m) = steps.rewards.dim();
    let flat = Flat::new(steps, matches!(rule, Rule::Gae { .. }))?;
    out_a.as_slice_mut()?;
    if let Some(b) = out_b.as_mut() {
        b.as_slice_mut()?;
    }
    let (te, tr) = (flat.te.is_some(), flat.tr.is_some());
    Some(for_blocks(t, m, out_a, out_b, par, |m0, a, b| {
        let job = BlockJob {
            flat: &flat,
            rule,
            m0,
            a,
            b,
        };
        // One copy of the loop per rule and flag presence: no per-lane
        // branches on what the call passed.
        match (rule, te, tr) {
            (Rule::Returns { .. }, false, false) => dispatch(Spec::<_, false, false, false>(job)),
            (Rule::Returns { .. }, true, false) => dispatch(Spec::<_, false, true, false>(job)),
            (Rule::Returns { .. }, false, true) => dispatch(Spec::<_, false, false, true>(job)),
            (Rule::Returns { .. }, true, true) => dispatch(Spec::<_, false, true, true>(job)),
            (Rule::Gae { .. }, false, false) => dispatch(Spec::<_, true, false, false>(job)),
            (Rule::Gae { .. }, true, false) => dispatch(Spec::<_, true, true, false>(job)),
            (Rule::Gae { .. }, false, true) => dispatch(Spec::<_, true, false, true>(job)),
            (Rule::Gae { .. }, true, true) => dispatch(Spec::<_, true, true, true>(job)),
        }
    }))
}

/// V-trace targets into `vs` and pg advantages into `pg` (the rule of
/// [`super::vtrace`]) when every array is C-contiguous; `None` when the
/// layout needs the general loop. `Flags::non_finite` here means some
/// `rewards`, `values`, `behaviour_log_prob` or `target_log_prob` element is
/// not finite (outputs cannot tell: a capped ratio hides an infinite log-prob).
pub(crate) fn try_vtrace<F: Real>(
    steps: &Steps<'_, F>,
    behaviour_log_prob: ArrayView2<'_, F>,
    target_log_prob: ArrayView2<'_, F>,
    p: VtraceParams,
    mut vs: ArrayViewMut2<'_, F>,
    mut pg: ArrayViewMut2<'_, F>,
    par: Par,
) -> Option<Flags> {
    let (t, m) = steps.rewards.dim();
    let flat = Flat::new(steps, true)?;
    let (blp, tlp) = (behaviour_log_prob.to_slice()?, target_log_prob.to_slice()?);
    vs.as_slice_mut()?;
    pg.as_slice_mut()?;
    let (te, tr) = (flat.te.is_some(), flat.tr.is_some());
    Some(for_blocks(t, m, vs, Some(pg), par, |m0, a, b| {
        let Some(b) = b else {
            return Flags::default();
        };
        let job = VtraceJob {
            flat: &flat,
            blp,
            tlp,
            p,
            m0,
            vs: a,
            pg: b,
        };
        match (te, tr) {
            (false, false) => dispatch(VtraceSpec::<_, false, false>(job)),
            (true, false) => dispatch(VtraceSpec::<_, true, false>(job)),
            (false, true) => dispatch(VtraceSpec::<_, false, true>(job)),
            (true, true) => dispatch(VtraceSpec::<_, true, true>(job)),
        }
    }))
}

impl<'s, F: Real> Flat<'s, F> {
    /// Every input as a flat slice (`values` only when `with_values`, and
    /// then required); `None` when some array is not C-contiguous.
    fn new(steps: &Steps<'s, F>, with_values: bool) -> Option<Self> {
        fn flat<'a, T>(
            a: &Option<ndarray::ArrayView<'a, T, impl ndarray::Dimension>>,
        ) -> Option<Option<&'a [T]>> {
            match a {
                Some(v) => Some(Some(v.to_slice()?)),
                None => Some(None),
            }
        }
        let (t, m) = steps.rewards.dim();
        let v = if with_values {
            Some(steps.values.as_ref()?.to_slice()?)
        } else {
            None
        };
        Some(Flat {
            m,
            t,
            r: steps.rewards.to_slice()?,
            v,
            nv: flat(&steps.next_values)?,
            te: flat(&steps.terminated)?,
            tr: flat(&steps.truncated)?,
            boot: flat(&steps.bootstrap)?,
        })
    }

    /// What every row of the streams `[m0, m0 + w)` reads; `zero_boot` holds
    /// `w` zeros when [`Flat::needs_zero_boot`].
    fn block<'a>(&'a self, m0: usize, w: usize, zero_boot: &'a [F]) -> BlockIns<'a, F> {
        let empty: &[F] = &[];
        let no_flags: &[bool] = &[];
        BlockIns {
            m: self.m,
            m0,
            w,
            t_len: self.t,
            r: self.r,
            vs: self.v.unwrap_or(empty),
            nvs: self.nv.unwrap_or(empty),
            boot: self.boot.unwrap_or(empty),
            zero_boot,
            tes: self.te.unwrap_or(no_flags),
            trs: self.tr.unwrap_or(no_flags),
        }
    }

    /// Whether the last row bootstraps from zeros (neither a bootstrap nor
    /// next values given).
    fn needs_zero_boot(&self) -> bool {
        self.boot.is_none() && self.nv.is_none()
    }
}

/// Cut the streams into column blocks of a multiple of 8 streams, one per
/// thread when the work is large enough, and run `job(m0, out_a block,
/// out_b block)` on each; streams are independent, so the split changes no
/// bit. Blocks narrower than MIN_W streams lose more to the threads sharing
/// every row than they gain (measured: (2048, 64) is faster on one thread).
fn for_blocks<'o, F: Real>(
    t: usize,
    m: usize,
    out_a: ArrayViewMut2<'o, F>,
    out_b: Option<ArrayViewMut2<'o, F>>,
    par: Par,
    job: impl Fn(usize, ArrayViewMut2<'o, F>, Option<ArrayViewMut2<'o, F>>) -> Flags + Sync + Send,
) -> Flags {
    if t == 0 || m == 0 {
        return Flags::default();
    }
    let blocks = match par {
        Par::Rayon if t * m >= PAR_MIN_WORK => rayon::current_num_threads()
            .clamp(1, 64)
            .min(m / MIN_W)
            .max(1),
        _ => 1,
    };
    let w = m.div_ceil(blocks).next_multiple_of(L).min(m.max(1));
    let items = split_pair(out_a, out_b, w);
    let flags = par.map(items, |(m0, a, b)| job(m0, a, b));
    flags.into_iter().fold(Flags::default(), |x, y| Flags {
        non_finite: x.non_finite | y.non_finite,
        truncated_without_next: x.truncated_without_next | y.truncated_without_next,
    })
}

/// The streams `[m0, m0 + ncols)` over all rows, bottom-up.
struct BlockJob<'j, 's, 'o, F> {
    flat: &'j Flat<'s, F>,
    rule: Rule,
    m0: usize,
    a: ArrayViewMut2<'o, F>,
    b: Option<ArrayViewMut2<'o, F>>,
}

/// The rows of an output block as slices, bottom-up: by chunks of one
/// contiguous slice when the block spans whole rows (cheapest), else row views.
enum RowsMut<'a, F> {
    Flat(std::iter::Rev<std::slice::ChunksExactMut<'a, F>>),
    /// The rows of a column block, top to bottom (popped from the end).
    Views(Vec<&'a mut [F]>),
}

impl<'a, F> RowsMut<'a, F> {
    fn new(v: ArrayViewMut2<'a, F>) -> Self {
        let w = v.ncols().max(1);
        if v.is_standard_layout() {
            // a standard-layout view is always one slice
            let flat = v.into_slice().unwrap_or_default();
            return RowsMut::Flat(flat.chunks_exact_mut(w).rev());
        }
        let mut rows = Vec::with_capacity(v.nrows());
        let mut rest = v;
        while rest.nrows() > 0 {
            let (top, below) = rest.split_at(Axis(0), 1);
            rest = below;
            // one row of a column block with unit column stride is a slice
            let Some(row) = top.into_slice() else { break };
            rows.push(row);
        }
        RowsMut::Views(rows)
    }

    /// The next row from the bottom (`None` past the top, or for a row that
    /// is not contiguous, which the caller has ruled out).
    fn next_back(&mut self) -> Option<&'a mut [F]> {
        match self {
            RowsMut::Flat(it) => it.next(),
            RowsMut::Views(rows) => rows.pop(),
        }
    }
}

/// A [`BlockJob`] with the rule (`GAE`) and the presence of the terminated
/// (`TE`) and truncated (`TR`) flags fixed at compile time.
struct Spec<'j, 's, 'o, F, const GAE: bool, const TE: bool, const TR: bool>(
    BlockJob<'j, 's, 'o, F>,
);

/// The inputs of one row of a block (all of its width).
struct RowIn<'s, F> {
    r: &'s [F],
    v: &'s [F],
    vn: &'s [F],
    te: &'s [bool],
    tr: &'s [bool],
    last: bool,
}

/// One row: `y` into `oa` (and `y + v` into `ob` for GAE), carries updated,
/// exactly as the tile loop's rules compute them. A plain loop over the row
/// (the loop vectoriser handles it reliably; absent inputs are compile-time
/// constants). Returns `(some output not finite, some step truncated)`.
#[inline(always)]
fn row<F: Real, const GAE: bool, const TE: bool, const TR: bool>(
    gamma: f64,
    gl: f64,
    x: &RowIn<'_, F>,
    carry: &mut [f64],
    oa: &mut [F],
    ob: &mut [F],
) -> (bool, bool) {
    let w = carry.len();
    let (r, v, vn) = (&x.r[..w], &x.v[..if GAE { w } else { 0 }], &x.vn[..w]);
    let te = &x.te[..if TE { w } else { 0 }];
    let tr = &x.tr[..if TR { w } else { 0 }];
    let oa = &mut oa[..w];
    let ob = &mut ob[..if GAE { w } else { 0 }];
    let (mut bad, mut any_tr) = (false, false);
    for j in 0..w {
        let te_j = TE && te[j];
        let tr_j = TR && tr[j];
        any_tr |= tr_j;
        if GAE {
            let kv = if te_j { 0.0 } else { vn[j].to_f64() };
            let vj = v[j].to_f64();
            let d = r[j].to_f64() + gamma * kv - vj;
            let gc = gl * carry[j];
            let a = d + if te_j || tr_j { 0.0 } else { gc };
            let rv = a + vj;
            carry[j] = a;
            bad |= !(a.is_finite() && rv.is_finite());
            oa[j] = F::from_f64(a);
            ob[j] = F::from_f64(rv);
        } else {
            let xv = if tr_j || x.last {
                vn[j].to_f64()
            } else {
                carry[j]
            };
            let kx = if te_j { 0.0 } else { xv };
            let g = r[j].to_f64() + gamma * kx;
            carry[j] = g;
            bad |= !g.is_finite();
            oa[j] = F::from_f64(g);
        }
    }
    (bad, any_tr)
}

/// Eight lanes of `f64`, and eight lane masks (all ones or all zeros).
type V8 = [f64; L];
type M8 = [u64; L];

#[inline(always)]
fn ld8<F: Real>(s: &[F]) -> V8 {
    let s = &s[..L];
    let mut o = [0.0; L];
    for (o, v) in o.iter_mut().zip(s) {
        *o = v.to_f64();
    }
    o
}

#[inline(always)]
fn mask8(s: &[bool]) -> M8 {
    let s = &s[..L];
    let mut o = [0u64; L];
    for (o, &b) in o.iter_mut().zip(s) {
        *o = (b as u64).wrapping_neg();
    }
    o
}

/// Lane-wise `f`; a loop of constant length that becomes one vector operation.
#[inline(always)]
fn lanes(f: impl Fn(usize) -> f64) -> V8 {
    let mut o = [0.0; L];
    for (j, v) in o.iter_mut().enumerate() {
        *v = f(j);
    }
    o
}

/// `x` where the mask is clear, `+0.0` where set (`if m { 0.0 } else { x }`).
#[inline(always)]
fn zero_where(x: &V8, m: &M8) -> V8 {
    lanes(|j| f64::from_bits(x[j].to_bits() & !m[j]))
}

#[inline(always)]
fn st8<F: Real>(d: &mut [F], y: &V8) {
    for (o, &y) in d[..L].iter_mut().zip(y) {
        *o = F::from_f64(y);
    }
}

/// The whole `[T, 8]` buffer, bottom-up, one vector step per operation of the
/// rule and the carries held in a register: the same operations in the same
/// order as [`row`], for the case where a row is only 8 streams wide (there
/// the row loop of [`row`] would run its scalar remainder).
#[inline(always)]
fn narrow8<F: Real, const GAE: bool, const TE: bool, const TR: bool>(
    gamma: f64,
    gl: f64,
    x: &BlockIns<'_, F>,
    oa: &mut [F],
    mut ob: Option<&mut [F]>,
) -> Flags {
    let none: M8 = [0; L];
    let mut cy: V8 = [0.0; L];
    let mut marks: V8 = [0.0; L];
    let mut any_tr = false;
    let zero = [F::from_f64(0.0); L];
    for t in (0..x.t_len).rev() {
        let i = t * L;
        let last = t + 1 == x.t_len;
        let vn_src: &[F] = if !x.nvs.is_empty() {
            &x.nvs[i..]
        } else if GAE && !last {
            &x.vs[i + L..]
        } else if !x.boot.is_empty() {
            x.boot
        } else {
            &zero
        };
        let r = ld8(&x.r[i..]);
        let vn = ld8(vn_src);
        let te = if TE { mask8(&x.tes[i..]) } else { none };
        let tr = if TR { mask8(&x.trs[i..]) } else { none };
        if TR {
            any_tr |= tr.iter().any(|&m| m != 0);
        }
        if GAE {
            let v = ld8(&x.vs[i..]);
            let kv = zero_where(&vn, &te);
            let d = lanes(|j| r[j] + gamma * kv[j] - v[j]);
            let mut end = [0u64; L];
            for j in 0..L {
                end[j] = te[j] | tr[j];
            }
            let gc = zero_where(&lanes(|j| gl * cy[j]), &end);
            let a = lanes(|j| d[j] + gc[j]);
            let rv = lanes(|j| a[j] + v[j]);
            marks = lanes(|j| marks[j] + finite_mark(a[j]) + finite_mark(rv[j]));
            st8(&mut oa[i..], &a);
            if let Some(ob) = ob.as_deref_mut() {
                st8(&mut ob[i..], &rv);
            }
            cy = a;
        } else {
            let cut = if last { [u64::MAX; L] } else { tr };
            let xv =
                lanes(|j| f64::from_bits((vn[j].to_bits() & cut[j]) | (cy[j].to_bits() & !cut[j])));
            let kx = zero_where(&xv, &te);
            let g = lanes(|j| r[j] + gamma * kx[j]);
            marks = lanes(|j| marks[j] + finite_mark(g[j]));
            st8(&mut oa[i..], &g);
            cy = g;
        }
    }
    Flags {
        non_finite: marks.iter().fold(0.0, |s, &m| s + m) != 0.0,
        truncated_without_next: any_tr && x.nvs.is_empty(),
    }
}

/// What every row of a block reads.
struct BlockIns<'s, F> {
    m: usize,
    m0: usize,
    w: usize,
    t_len: usize,
    r: &'s [F],
    vs: &'s [F],
    nvs: &'s [F],
    boot: &'s [F],
    zero_boot: &'s [F],
    tes: &'s [bool],
    trs: &'s [bool],
}

impl<'s, F> BlockIns<'s, F> {
    /// The value after the step whose row starts at `i` (`last`: the buffer's
    /// last row), as that step sees it: next_values, the next row of values
    /// (when the rule reads `values`), the bootstrap, or zeros.
    #[inline(always)]
    fn value_after(&self, i: usize, last: bool, values: bool) -> &'s [F] {
        let (m, m0, w) = (self.m, self.m0, self.w);
        if !self.nvs.is_empty() {
            &self.nvs[i..i + w]
        } else if values && !last {
            &self.vs[i + m..i + m + w]
        } else if !self.boot.is_empty() {
            &self.boot[m0..m0 + w]
        } else {
            self.zero_boot
        }
    }
}

/// All rows of a block, bottom-up.
#[inline(always)]
fn rows_loop<F: Real, const GAE: bool, const TE: bool, const TR: bool>(
    gamma: f64,
    gl: f64,
    x: &BlockIns<'_, F>,
    carry: &mut [f64],
    rows_a: &mut RowsMut<'_, F>,
    rows_b: &mut Option<RowsMut<'_, F>>,
) -> Flags {
    let (m, m0, w) = (x.m, x.m0, x.w);
    let mut flags = Flags::default();
    let mut none: [F; 0] = [];
    let no_v: &[F] = &[];
    let no_flags: &[bool] = &[];
    for t in (0..x.t_len).rev() {
        let Some(oa) = rows_a.next_back() else { break };
        let ob: &mut [F] = match rows_b.as_mut().and_then(|r| r.next_back()) {
            Some(o) => o,
            None => &mut none,
        };
        let last = t + 1 == x.t_len;
        let i = t * m + m0;
        let vn = x.value_after(i, last, GAE);
        let ri = RowIn {
            r: &x.r[i..i + w],
            v: if GAE { &x.vs[i..i + w] } else { no_v },
            vn,
            te: if TE { &x.tes[i..i + w] } else { no_flags },
            tr: if TR { &x.trs[i..i + w] } else { no_flags },
            last,
        };
        let (bad, tr) = row::<F, GAE, TE, TR>(gamma, gl, &ri, carry, oa, ob);
        flags.non_finite |= bad;
        flags.truncated_without_next |= tr && x.nvs.is_empty();
    }
    flags
}

impl<F: Real, const GAE: bool, const TE: bool, const TR: bool> Kernel
    for Spec<'_, '_, '_, F, GAE, TE, TR>
{
    type Output = Flags;

    #[inline(always)]
    fn run<const FMA: bool>(self) -> Flags {
        // FMA is not used: the general loop rounds every product separately.
        let BlockJob {
            flat,
            rule,
            m0,
            mut a,
            mut b,
        } = self.0;
        let (gamma, gl) = match rule {
            Rule::Returns { gamma } => (gamma, 0.0),
            Rule::Gae { gamma, lam } => (gamma, gamma * lam),
        };
        let (m, w) = (flat.m, a.ncols());
        // Zero bootstraps when none is given.
        let zero_boot = vec![F::from_f64(0.0); if flat.needs_zero_boot() { w } else { 0 }];
        let ins = flat.block(m0, w, &zero_boot);
        // Exactly 8 streams (then the block is the whole, contiguous buffer):
        // one vector per row, carries in a register.
        if w == L && m == L {
            if let Some(oa) = a.as_slice_mut() {
                let ob = b.as_mut().and_then(|b| b.as_slice_mut());
                return narrow8::<F, GAE, TE, TR>(gamma, gl, &ins, oa, ob);
            }
        }
        let mut rows_a = RowsMut::new(a.view_mut());
        let mut rows_b = b.as_mut().map(|b| RowsMut::new(b.view_mut()));
        let mut carry = vec![0.0f64; w];
        rows_loop::<F, GAE, TE, TR>(gamma, gl, &ins, &mut carry, &mut rows_a, &mut rows_b)
    }
}

/// The V-trace streams `[m0, m0 + ncols)` over all rows, bottom-up.
struct VtraceJob<'j, 's, 'o, F> {
    flat: &'j Flat<'s, F>,
    blp: &'s [F],
    tlp: &'s [F],
    p: VtraceParams,
    m0: usize,
    vs: ArrayViewMut2<'o, F>,
    pg: ArrayViewMut2<'o, F>,
}

/// A [`VtraceJob`] with the presence of the terminated (`TE`) and truncated
/// (`TR`) flags fixed at compile time.
struct VtraceSpec<'j, 's, 'o, F, const TE: bool, const TR: bool>(VtraceJob<'j, 's, 'o, F>);

/// The inputs of one V-trace row of a block (all of its width).
struct VtraceRowIn<'s, F> {
    blp: &'s [F],
    tlp: &'s [F],
    r: &'s [F],
    v: &'s [F],
    /// The value after the step (see [`BlockIns::value_after`]).
    vn: &'s [F],
    /// `values` of the next row (unused on the last row).
    v_below: &'s [F],
    te: &'s [bool],
    tr: &'s [bool],
    last: bool,
}

/// One V-trace row: `vs` into `ovs`, `pg` into `opg`, carries (`vs - V`,
/// one per stream) updated, with the operations of the tile loop's rule in
/// the same order: plain loops, the ratios first (parked in `ratio`), then
/// the rest of the step. Returns `(some rewards / values / log-prob
/// input not finite, some step truncated)`.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn vtrace_row<F: Real, const TE: bool, const TR: bool>(
    p: &VtraceParams,
    x: &VtraceRowIn<'_, F>,
    ratio: &mut [f64],
    carry: &mut [f64],
    ovs: &mut [F],
    opg: &mut [F],
) -> (bool, bool) {
    let VtraceParams {
        gamma,
        lam,
        rho_bar,
        c_bar,
    } = *p;
    let w = carry.len();
    let (blp, tlp, ratio) = (&x.blp[..w], &x.tlp[..w], &mut ratio[..w]);
    let (r, v, vn, v_below) = (&x.r[..w], &x.v[..w], &x.vn[..w], &x.v_below[..w]);
    let te = &x.te[..if TE { w } else { 0 }];
    let tr = &x.tr[..if TR { w } else { 0 }];
    let (ovs, opg) = (&mut ovs[..w], &mut opg[..w]);
    let last = x.last;
    // Non-finite inputs as the OR of the bits of their finite marks (0 for
    // finite, NaN otherwise): an integer reduction keeps both loops
    // vectorised where a `bool` one does not.
    let (mut bad, mut any_tr) = (0u64, false);
    for j in 0..w {
        let (t, b) = (tlp[j].to_f64(), blp[j].to_f64());
        let q = t - b;
        // Not finite exactly when t or b is not (or, for f64, on overflow:
        // then the caller's full check finds nothing and the results stand).
        bad |= finite_mark(q).to_bits();
        ratio[j] = q;
    }
    // The exponentials in a loop of their own over `f64`: with the
    // conversions and marks above in it, LLVM leaves it scalar.
    for q in ratio.iter_mut() {
        *q = fastmath::exp(*q);
    }
    for j in 0..w {
        let te_j = TE && te[j];
        let tr_j = TR && tr[j];
        any_tr |= tr_j;
        let q = ratio[j];
        let rho = cap(q, rho_bar);
        let cs = lam * cap(q, c_bar);
        let end = te_j | tr_j;
        let vp = if te_j { 0.0 } else { vn[j].to_f64() };
        let (rj, vj, below) = (r[j].to_f64(), v[j].to_f64(), carry[j]);
        bad |= finite_mark(rj).to_bits() | finite_mark(vj).to_bits();
        // vs_{t+1} inside an episode, V'_t at an end or the last row.
        let vnext = if end | last {
            vp
        } else {
            v_below[j].to_f64() + below
        };
        let pg = rho * (rj + gamma * vnext - vj);
        let d = rho * (rj + gamma * vp - vj);
        let a = if end { d } else { d + gamma * cs * below };
        carry[j] = a;
        ovs[j] = F::from_f64(a + vj);
        opg[j] = F::from_f64(pg);
    }
    (bad != 0, any_tr)
}

impl<F: Real, const TE: bool, const TR: bool> Kernel for VtraceSpec<'_, '_, '_, F, TE, TR> {
    type Output = Flags;

    #[inline(always)]
    fn run<const FMA: bool>(self) -> Flags {
        // FMA is not used: the general loop rounds every product separately.
        let VtraceJob {
            flat,
            blp,
            tlp,
            p,
            m0,
            vs,
            pg,
        } = self.0;
        let (m, w) = (flat.m, vs.ncols());
        let zero_boot = vec![F::from_f64(0.0); if flat.needs_zero_boot() { w } else { 0 }];
        let x = flat.block(m0, w, &zero_boot);
        let no_flags: &[bool] = &[];
        let mut rows_a = RowsMut::new(vs);
        let mut rows_b = RowsMut::new(pg);
        let mut carry = vec![0.0f64; w];
        let mut ratio = vec![0.0f64; w];
        let mut flags = Flags::default();
        for t in (0..x.t_len).rev() {
            let (Some(ovs), Some(opg)) = (rows_a.next_back(), rows_b.next_back()) else {
                break;
            };
            let last = t + 1 == x.t_len;
            let i = t * m + m0;
            let vn = x.value_after(i, last, true);
            let ri = VtraceRowIn {
                blp: &blp[i..i + w],
                tlp: &tlp[i..i + w],
                r: &x.r[i..i + w],
                v: &x.vs[i..i + w],
                vn,
                v_below: if last { vn } else { &x.vs[i + m..i + m + w] },
                te: if TE { &x.tes[i..i + w] } else { no_flags },
                tr: if TR { &x.trs[i..i + w] } else { no_flags },
                last,
            };
            let (bad, tr) = vtrace_row::<F, TE, TR>(&p, &ri, &mut ratio, &mut carry, ovs, opg);
            flags.non_finite |= bad;
            flags.truncated_without_next |= tr && x.nvs.is_empty();
        }
        flags
    }
}
