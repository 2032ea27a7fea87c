//! The reverse linear recurrence behind every ragged return and advantage,
//! over a *run*: consecutive steps inside one piece, where the coefficient is
//! one constant `c`:
//!
//! ```text
//! y[t] = x[t] + c * y[t + 1],      y[hi] = carry,   t = hi-1 .. lo
//! ```
//!
//! Discounted returns use `x = r`, `c = gamma`; GAE uses `x = delta`,
//! `c = gamma * lam`. Everything is `f64`.
//!
//! One step at a time, the chain costs a multiply-add latency per step. A run
//! is instead taken 8 steps at a time: with the block's inputs `x[0..8]`,
//!
//! ```text
//! y[j] = sum_{i >= j} c^(i-j) x[i]  +  c^(8-j) * carry
//! ```
//!
//! The sums do not depend on the carry, so they vectorise and overlap across
//! blocks; only `y[0] = z[0] + c^8 * carry` is serial: one multiply-add per
//! 8 steps. The result is the recurrence's value up to rounding (a few ulps
//! of f64), and it depends only on the run, never on the thread count.

use super::float::Real;
use super::simd::{finite_mark, madd, F64x8};

/// Steps per block of a run.
pub const W: usize = 8;

/// The constants of an 8-step block for one coefficient `c`.
#[derive(Clone, Debug)]
pub struct Run8 {
    c: f64,
    /// `p0.0[i] = c^i`.
    p0: F64x8,
    /// `pw.0[j] = c^(8-j)`.
    pw: F64x8,
    k1: F64x8,
    k2: F64x8,
    k4: F64x8,
}

impl Run8 {
    /// Constants for coefficient `c` (in `[0, 1]` in practice; any finite value works).
    pub fn new(c: f64) -> Self {
        let mut pows = [1.0f64; W + 1];
        for k in 1..=W {
            pows[k] = pows[k - 1] * c;
        }
        let mut p0 = F64x8::splat(0.0);
        p0.0.copy_from_slice(&pows[..W]);
        let mut pw = F64x8::splat(0.0);
        for (j, v) in pw.0.iter_mut().enumerate() {
            *v = pows[W - j];
        }
        let kd = |d: usize| {
            let mut k = F64x8::splat(0.0);
            for (j, v) in k.0.iter_mut().enumerate() {
                if j + d < W {
                    *v = pows[d];
                }
            }
            k
        };
        Run8 {
            c,
            p0,
            pw,
            k1: kd(1),
            k2: kd(2),
            k4: kd(4),
        }
    }

    /// The coefficient.
    #[inline(always)]
    pub fn c(&self) -> f64 {
        self.c
    }

    /// `y[0..8]` of one block from its inputs and the carry `y[8]`: a
    /// three-step in-register scan (lane `j` adds `c^d` times lane `j + d`
    /// for `d = 1, 2, 4`), then the carry. Only the last multiply-add depends
    /// on the carry, so one per block is serial.
    #[inline(always)]
    pub fn block<const FMA: bool>(&self, x: &F64x8, carry: f64) -> F64x8 {
        let y = self.k1.madd::<FMA>(x.shift::<1>(), *x);
        let y = self.k2.madd::<FMA>(y.shift::<2>(), y);
        let y = self.k4.madd::<FMA>(y.shift::<4>(), y);
        self.pw.madd::<FMA>(F64x8::splat(carry), y)
    }
}

/// Inputs of a run: `x[t]` at absolute step `t`, 8 at a time or one.
pub trait Terms {
    /// `x[t..t + 8]`.
    fn x8(&self, t: usize) -> F64x8;
    /// `x[t]`.
    fn x1(&self, t: usize) -> f64;
}

/// Where a run's outputs go: `y[t]` at absolute step `t`.
pub trait Sink {
    /// Store `y[t..t + 8]`.
    fn put8(&mut self, t: usize, y: &F64x8);
    /// Store `y[t]`.
    fn put1(&mut self, t: usize, y: f64);
    /// Take the finite marks of the outputs just stored
    /// ([`F64x8::finite_marks`] summed: 0 while every one is finite).
    fn marks(&mut self, m: F64x8);
}

/// Scan the run `[lo, hi)` right to left with `y[hi] = carry`, storing every
/// `y[t]` in `out` and handing it the outputs' finite marks once, at the end
/// (summed in a local, so the loop keeps them in a register); returns `y[lo]`
/// (or `carry` when the run is empty).
///
/// `c == 0` is taken exactly: `y = x`, so a non-finite carry does not leak
/// into the run (`0 * inf` would be NaN).
#[inline(always)]
pub fn run<const FMA: bool, T: Terms, S: Sink>(
    k: &Run8,
    terms: &T,
    out: &mut S,
    lo: usize,
    hi: usize,
    carry: f64,
) -> f64 {
    let mut y = carry;
    let mut marks = F64x8::splat(0.0);
    if k.c == 0.0 {
        for t in (lo..hi).rev() {
            y = terms.x1(t);
            out.put1(t, y);
            marks.0[0] += finite_mark(y);
        }
        out.marks(marks);
        return y;
    }
    let mut t = hi;
    while t >= lo + W {
        t -= W;
        let ys = k.block::<FMA>(&terms.x8(t), y);
        out.put8(t, &ys);
        marks = marks + ys.finite_marks();
        y = ys.0[0];
    }
    while t > lo {
        t -= 1;
        y = madd::<FMA>(k.c, y, terms.x1(t));
        out.put1(t, y);
        marks.0[0] += finite_mark(y);
    }
    out.marks(marks);
    y
}

/// `y[lo]` of the run `[lo, hi)` with `y[hi] = carry`, storing nothing.
///
/// Only one value is needed, so no in-register scan: with the run's full
/// 16-step groups `g_0 > g_1 > ... > g_{M-1}` taken from the right, lane `i`
/// (`0..16`) keeps `acc_i = sum_m c^(16 (M-1-m)) x[g_m + i]` by Horner
/// (`acc = c^16 acc + x[g_m..g_m + 16]`: sixteen independent chains, so one
/// multiply-add latency per 16 steps instead of per 4), and then
///
/// ```text
/// y[g_{M-1}] = sum_i c^i acc_i + c^(16M) carry
/// ```
///
/// (the sum taken as `sum_j c^j (acc_j + c^4 (acc_{j+4} + c^4 (acc_{j+8} + c^4 acc_{j+12})))`).
/// The steps left over at the run's left end are taken one at a time.
#[inline(always)]
pub fn run_first<const FMA: bool, T: Terms>(
    k: &Run8,
    terms: &T,
    lo: usize,
    hi: usize,
    carry: f64,
) -> f64 {
    if k.c == 0.0 {
        return if hi > lo { terms.x1(lo) } else { carry };
    }
    let mut acc = Heads::new(k, lo, hi);
    while acc.more() {
        acc.group::<FMA, T>(terms);
    }
    acc.finish::<FMA, T>(terms, carry)
}

/// The state of [`run_first`] part-way through a run: its 16-step groups
/// are taken one at a time ([`Heads::group`]), so another loop can advance
/// it between its own steps ([`run_with_first`]) with the very same
/// operations, in the same order, as `run_first` alone.
///
/// Four 4-lane accumulators (the width of a vector register), one per 4-step
/// quarter of each 16 steps, each advanced with `c^16`: lane j of
/// accumulator q keeps `sum_m c^(16 (M-1-m)) x[16m + 4q + j]` over the run's
/// 16-step groups. Independent accumulators keep the multiply-adds off one
/// dependency chain (one chain would cost a multiply-add latency per 4 steps,
/// more than the memory read of those steps). (An 8-lane array here is split
/// by the compiler into 2-lane pairs with shuffles around every conversion.)
struct Heads<'k> {
    k: &'k Run8,
    c16: f64,
    acc: [[f64; 4]; 4],
    lo: usize,
    hi: usize,
    /// The left end of the groups taken so far.
    t: usize,
}

impl<'k> Heads<'k> {
    #[inline(always)]
    fn new(k: &'k Run8, lo: usize, hi: usize) -> Self {
        Heads {
            k,
            c16: k.pw.0[0] * k.pw.0[0],
            acc: [[0.0; 4]; 4],
            lo,
            hi,
            t: hi,
        }
    }

    /// Whether a full 16-step group is left.
    #[inline(always)]
    fn more(&self) -> bool {
        self.t >= self.lo + 2 * W
    }

    /// Take the next group (the caller checks [`Heads::more`]).
    #[inline(always)]
    fn group<const FMA: bool, T: Terms>(&mut self, terms: &T) {
        self.t -= 2 * W;
        let (hi8, lo8) = (terms.x8(self.t + W), terms.x8(self.t));
        self.add::<FMA>(&hi8, &lo8);
    }

    /// Advance the accumulators by one group's inputs.
    #[inline(always)]
    fn add<const FMA: bool>(&mut self, hi8: &F64x8, lo8: &F64x8) {
        let (hi8, lo8) = (&hi8.0, &lo8.0);
        let (c16, acc) = (self.c16, &mut self.acc);
        for j in 0..4 {
            acc[3][j] = madd::<FMA>(c16, acc[3][j], hi8[j + 4]);
            acc[2][j] = madd::<FMA>(c16, acc[2][j], hi8[j]);
            acc[1][j] = madd::<FMA>(c16, acc[1][j], lo8[j + 4]);
            acc[0][j] = madd::<FMA>(c16, acc[0][j], lo8[j]);
        }
    }

    /// `y[lo]` once every group is taken, with `carry` at `hi`.
    #[inline(always)]
    fn finish<const FMA: bool, T: Terms>(self, terms: &T, carry: f64) -> f64 {
        let Heads {
            k, acc, lo, hi, t, ..
        } = self;
        let mut y = carry;
        let groups = (hi - t) / (2 * W);
        if groups > 0 {
            // `sum_q c^(4q) sum_j c^j acc[q][j]`.
            let c4 = k.pw.0[4];
            let mut h = [0.0f64; 4];
            for (j, v) in h.iter_mut().enumerate() {
                let q = madd::<FMA>(
                    c4,
                    madd::<FMA>(c4, madd::<FMA>(c4, acc[3][j], acc[2][j]), acc[1][j]),
                    acc[0][j],
                );
                *v = k.p0.0[j] * q;
            }
            let sum = (h[0] + h[2]) + (h[1] + h[3]);
            // `c^(16 G) carry`, left out when the carry is 0 (the maps' case).
            y = if carry == 0.0 {
                sum
            } else {
                madd::<FMA>(k.c.powi((2 * W * groups) as i32), carry, sum)
            };
        }
        let mut t = t;
        while t > lo {
            t -= 1;
            y = madd::<FMA>(k.c, y, terms.x1(t));
        }
        y
    }
}

/// A slice of storage floats as a run's inputs: `x[t] = xs[t - base]`.
pub struct SliceTerms<'a, F> {
    /// The inputs, from step `base` on.
    pub xs: &'a [F],
    /// The step of `xs[0]`.
    pub base: usize,
}

impl<F: Real> Terms for SliceTerms<'_, F> {
    #[inline(always)]
    fn x8(&self, t: usize) -> F64x8 {
        widen8(&self.xs[t - self.base..t - self.base + W])
    }
    #[inline(always)]
    fn x1(&self, t: usize) -> f64 {
        self.xs[t - self.base].to_f64()
    }
}

/// A slice of storage floats as a run's outputs: `ys[t - base] = y[t]`,
/// rounded once.
///
/// `marks` sums the finite marks (`y - y`) of every output, handed over by
/// each run: 0 while all are finite, NaN after any is not. Every input step
/// of a return or advantage enters its own output with weight 1, so a
/// non-finite input always shows here, at two vector operations per 8 steps
/// instead of a separate pass over the inputs.
pub struct SliceSink<'a, F> {
    /// Where the outputs go, from step `base` on.
    pub ys: &'a mut [F],
    /// The step of `ys[0]`.
    pub base: usize,
    /// The outputs' finite marks, summed.
    pub marks: F64x8,
}

impl<'a, F: Real> SliceSink<'a, F> {
    /// Outputs from step `base` on, no marks yet.
    pub fn new(ys: &'a mut [F], base: usize) -> Self {
        SliceSink {
            ys,
            base,
            marks: F64x8::splat(0.0),
        }
    }
}

impl<F: Real> Sink for SliceSink<'_, F> {
    #[inline(always)]
    fn put8(&mut self, t: usize, y: &F64x8) {
        let i = t - self.base;
        narrow8(&mut self.ys[i..i + W], y);
    }
    #[inline(always)]
    fn put1(&mut self, t: usize, y: f64) {
        self.ys[t - self.base] = F::from_f64(y);
    }
    #[inline(always)]
    fn marks(&mut self, m: F64x8) {
        self.marks = self.marks + m;
    }
}

#[inline(always)]
fn widen8<F: Real>(s: &[F]) -> F64x8 {
    let mut o = F64x8::splat(0.0);
    for (d, &v) in o.0.iter_mut().zip(s) {
        *d = v.to_f64();
    }
    o
}

#[inline(always)]
fn narrow8<F: Real>(d: &mut [F], y: &F64x8) {
    for (d, &v) in d.iter_mut().zip(&y.0) {
        *d = F::from_f64(v);
    }
}

/// [`run`] over all of `xs` (into `ys`, `carry` entering at the end) and
/// [`run_first`] over all of `xm` (zero carry) in one loop; returns
/// `(y[0], first, marks)` (`marks` as for [`SliceSink`]), bit-identical to
/// the two calls made apart. `xs` and `ys` have one length (extra outputs
/// are left alone).
///
/// Why one loop: a scan mostly stores and a map only loads, so, run apart,
/// each waits on memory in its own direction; interleaved 16 steps at a
/// time, the loads of one overlap the stores of the other. This is how a
/// worker maps its next block while it scans the current one. The scan
/// takes the same 8-step blocks from the right as [`run`], and the map the
/// same 16-step groups, in the same order, as [`run_first`]; whichever has
/// steps left after the shared part finishes alone. The shared loop walks
/// fixed 16-step chunks of the slices, with no index checks inside: generic
/// accessors that check every index kept the compiler from vectorising it.
#[inline(always)]
pub fn run_with_first<const FMA: bool, F: Real>(
    k: &Run8,
    xs: &[F],
    ys: &mut [F],
    carry: f64,
    xm: &[F],
) -> (f64, f64, F64x8) {
    let n = xs.len().min(ys.len());
    let m = xm.len();
    let (map, scan) = (SliceTerms { xs: xm, base: 0 }, SliceTerms { xs, base: 0 });
    if k.c == 0.0 {
        let mut out = SliceSink::new(ys, 0);
        let y = run::<FMA, _, _>(k, &scan, &mut out, 0, n, carry);
        return (y, run_first::<FMA, _>(k, &map, 0, m, 0.0), out.marks);
    }
    let shared = (n / (2 * W)).min(m / (2 * W)) * 2 * W;
    let mut heads = Heads::new(k, 0, m);
    let mut y = carry;
    let mut marks = F64x8::splat(0.0);
    let (ys, ys_shared) = ys[..n].split_at_mut(n - shared);
    let chunks = xs[n - shared..n]
        .rchunks_exact(2 * W)
        .zip(ys_shared.rchunks_exact_mut(2 * W))
        .zip(xm[m - shared..].rchunks_exact(2 * W));
    for ((sx, sy), sm) in chunks {
        let (xu, xl) = (widen8(&sx[W..]), widen8(&sx[..W]));
        let (mu, ml) = (widen8(&sm[W..]), widen8(&sm[..W]));
        let upper = k.block::<FMA>(&xu, y);
        let lower = k.block::<FMA>(&xl, upper.0[0]);
        heads.add::<FMA>(&mu, &ml);
        narrow8(&mut sy[W..], &upper);
        narrow8(&mut sy[..W], &lower);
        marks = marks + upper.finite_marks() + lower.finite_marks();
        y = lower.0[0];
    }
    heads.t -= shared;
    while heads.more() {
        heads.group::<FMA, _>(&map);
    }
    let first = heads.finish::<FMA, _>(&map, 0.0);
    let mut rest = SliceSink::new(ys, 0);
    rest.marks = marks;
    let y0 = run::<FMA, _, _>(k, &scan, &mut rest, 0, n - shared, y);
    (y0, first, rest.marks)
}

/// The affine map a segment applies to the carry entering it from the right:
/// `y[0] = head + factor * carry`. Combining segments right to left gives the
/// carry of every segment without rescanning the ones in between.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Carry {
    /// `y[0]` of the segment computed with a zero carry.
    pub head: f64,
    /// `c^n` over the segment (0 once any step ends an episode).
    pub factor: f64,
}

impl Carry {
    /// The first output of the segment when `carry` enters at its right end;
    /// a factor of exactly 0 ignores the carry (even a non-finite one).
    #[inline]
    pub fn apply(self, carry: f64) -> f64 {
        if self.factor == 0.0 {
            self.head
        } else {
            self.head + self.factor * carry
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    struct Xs<'a>(&'a [f64]);
    impl Terms for Xs<'_> {
        fn x8(&self, t: usize) -> F64x8 {
            F64x8(self.0[t..t + W].try_into().unwrap())
        }
        fn x1(&self, t: usize) -> f64 {
            self.0[t]
        }
    }
    struct Ys(Vec<f64>);
    impl Sink for Ys {
        fn put8(&mut self, t: usize, y: &F64x8) {
            self.0[t..t + W].copy_from_slice(&y.0);
        }
        fn put1(&mut self, t: usize, y: f64) {
            self.0[t] = y;
        }
        fn marks(&mut self, _: F64x8) {}
    }

    /// The recurrence one step at a time, from its definition.
    fn serial(x: &[f64], c: f64, carry: f64) -> Vec<f64> {
        let mut y = vec![0.0; x.len()];
        let mut acc = carry;
        for t in (0..x.len()).rev() {
            acc = x[t] + c * acc;
            y[t] = acc;
        }
        y
    }

    fn both<const FMA: bool>(x: &[f64], c: f64, lo: usize, carry: f64) {
        let k = Run8::new(c);
        let mut out = Ys(vec![f64::NAN; x.len()]);
        let y0 = run::<FMA, _, _>(&k, &Xs(x), &mut out, lo, x.len(), carry);
        let want = serial(&x[lo..], c, carry);
        for (t, w) in want.iter().enumerate() {
            let got = out.0[lo + t];
            assert!(
                (got - w).abs() <= 1e-12 * w.abs().max(1.0),
                "n={} c={c} t={t}: {got} vs {w}",
                x.len()
            );
        }
        let first = want.first().copied().unwrap_or(carry);
        assert!((y0 - first).abs() <= 1e-12 * first.abs().max(1.0));
        let f = run_first::<FMA, _>(&k, &Xs(x), lo, x.len(), carry);
        assert!((f - first).abs() <= 1e-12 * first.abs().max(1.0));
        assert!(
            out.0[..lo].iter().all(|v| v.is_nan()),
            "wrote outside the run"
        );
    }

    #[test]
    fn matches_the_recurrence() {
        for n in [0usize, 1, 7, 8, 9, 16, 17, 100, 1001] {
            let x: Vec<f64> = (0..n)
                .map(|i| ((i * 7919) % 113) as f64 * 0.01 - 0.5)
                .collect();
            for c in [0.0, 0.5, 0.99, 1.0] {
                for lo in [0, n / 3] {
                    both::<false>(&x, c, lo, 2.5);
                    both::<true>(&x, c, lo, -1.0);
                }
            }
        }
    }

    /// The fused loop must give, bit for bit, what `run` and `run_first`
    /// give apart: another worker may compute the same map alone, and the
    /// results must not depend on who did.
    fn fused_is_bit_identical<const FMA: bool, F: Real>(
        x: &[F],
        c: f64,
        scan: (usize, usize),
        map: (usize, usize),
    ) {
        let k = Run8::new(c);
        let nan = F::from_f64(f64::NAN);
        let (xs, xm) = (&x[scan.0..scan.1], &x[map.0..map.1]);
        let mut ya = vec![nan; xs.len() + 3];
        let mut apart = SliceSink::new(&mut ya, 0);
        let terms = |xs| SliceTerms { xs, base: 0 };
        let y = run::<FMA, _, _>(&k, &terms(xs), &mut apart, 0, xs.len(), 0.75);
        let m = run_first::<FMA, _>(&k, &terms(xm), 0, xm.len(), 0.0);
        let mut ys = vec![nan; xs.len() + 3];
        let (fy, fm, marks) = run_with_first::<FMA, F>(&k, xs, &mut ys[..xs.len()], 0.75, xm);
        let ctx = format!("c={c} scan={scan:?} map={map:?} fma={FMA} {}", F::NAME);
        assert_eq!(fy.to_bits(), y.to_bits(), "{ctx}");
        assert_eq!(fm.to_bits(), m.to_bits(), "{ctx}");
        assert_eq!(marks, apart.marks, "{ctx}: all finite");
        for (t, (a, b)) in apart.ys.iter().zip(&ys).enumerate() {
            assert!(
                a == b || (t >= xs.len() && b.to_f64().is_nan()),
                "{ctx} t={t}"
            );
        }
    }

    #[test]
    fn the_fused_scan_and_map_equal_the_two_apart() {
        let x: Vec<f64> = (0..700)
            .map(|i| ((i * 7919) % 113) as f64 * 0.013 - 0.7)
            .collect();
        let x32: Vec<f32> = x.iter().map(|&v| v as f32).collect();
        // Scan and map of every relative size, aligned to 16 or not, empty.
        let spans = [
            (0, 0),
            (3, 3),
            (0, 5),
            (0, 16),
            (1, 33),
            (10, 266),
            (17, 700),
            (300, 700),
        ];
        for c in [0.0, 0.5, 0.99, 1.0] {
            for &scan in &spans {
                for &map in &spans {
                    fused_is_bit_identical::<false, f64>(&x, c, scan, map);
                    fused_is_bit_identical::<true, f64>(&x, c, scan, map);
                    fused_is_bit_identical::<true, f32>(&x32, c, scan, map);
                }
            }
        }
        // A non-finite output shows in the marks.
        let mut bad = x.clone();
        bad[650] = f64::INFINITY;
        let mut ys = vec![0.0; 700];
        let (_, _, marks) =
            run_with_first::<false, f64>(&Run8::new(0.9), &bad, &mut ys, 0.0, &x[..400]);
        assert!(marks.0.iter().any(|m| m.is_nan()));
    }

    #[test]
    fn zero_coefficient_stops_a_bad_carry() {
        let x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0];
        let k = Run8::new(0.0);
        let mut out = Ys(vec![0.0; 9]);
        run::<false, _, _>(&k, &Xs(&x), &mut out, 0, 9, f64::INFINITY);
        assert_eq!(out.0, x);
        let c = Carry {
            head: 1.5,
            factor: 0.0,
        };
        assert_eq!(c.apply(f64::NAN), 1.5);
    }

    #[test]
    fn carry_composition_is_affine() {
        let x: Vec<f64> = (0..37).map(|i| (i % 5) as f64 - 2.0).collect();
        let k = Run8::new(0.9);
        let head = run_first::<false, _>(&k, &Xs(&x), 0, x.len(), 0.0);
        let factor = 0.9f64.powi(x.len() as i32);
        let full = run_first::<false, _>(&k, &Xs(&x), 0, x.len(), 3.0);
        assert!((Carry { head, factor }.apply(3.0) - full).abs() < 1e-12);
    }
}
