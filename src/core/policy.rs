//! The clipped surrogate objective of a policy update (Schulman et al. 2017,
//! eq. 7), its gradient with respect to the new log-probabilities, and the
//! usual diagnostics, in one pass.
//!
//! Per selected element, with `r = exp(new_log_prob - old_log_prob)`:
//!
//! ```text
//! s1   = r * A
//! s2   = clamp(r, 1 - clip, 1 + clip) * A
//! loss = -mean(min(s1, s2))
//! grad = -r * A / n   where s1 <= s2 (the unclipped term is the minimum)
//!      = 0            where the clipped term is strictly smaller, or masked out
//! clip_fraction = mean(|r - 1| > clip)
//! approx_kl     = mean((r - 1) - log r)
//! ```
//!
//! `n` is the number of selected elements. Sums run in `f64` over fixed,
//! data-defined blocks combined in block order: bit-identical for any thread
//! count.

use super::error::{At, CoreError, CoreResult};
use super::fastmath;
use super::float::Real;
use super::par::Par;
use super::simd::{dispatch, finite_mark, isa, F64x8, Isa, Kernel};
use ndarray::{ArrayView1, ArrayViewD, ArrayViewMutD, Axis, IxDyn};

/// Elements per reduction block.
const BLOCK: usize = 1 << 14;

/// The scalar results of [`clipped_surrogate`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Surrogate {
    /// `-mean(min(s1, s2))`.
    pub loss: f64,
    /// Fraction of selected elements with `|r - 1| > clip`.
    pub clip_fraction: f64,
    /// `mean((r - 1) - log r)`, >= 0.
    pub approx_kl: f64,
    /// `mean(r)`.
    pub ratio_mean: f64,
    /// `max(r)`.
    pub ratio_max: f64,
    /// Number of selected elements.
    pub count: usize,
}

#[derive(Clone, Copy)]
struct Partial {
    obj: f64,
    kl: f64,
    ratio: f64,
    ratio_max: f64,
    clipped: f64,
}

impl Partial {
    const ZERO: Partial = Partial {
        obj: 0.0,
        kl: 0.0,
        ratio: 0.0,
        ratio_max: f64::NEG_INFINITY,
        clipped: 0.0,
    };
    fn add(self, o: Partial) -> Partial {
        Partial {
            obj: self.obj + o.obj,
            kl: self.kl + o.kl,
            ratio: self.ratio + o.ratio,
            ratio_max: max_nan(self.ratio_max, o.ratio_max),
            clipped: self.clipped + o.clipped,
        }
    }
}

/// `max` that keeps a NaN (so `check_finite=False` propagates it).
#[inline(always)]
fn max_nan(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        a.max(b)
    }
}

/// Whether [`clipped_surrogate`] over `shape` has more than one block to
/// share between threads (else entering the pool only costs time).
pub fn splits(shape: &[usize]) -> bool {
    row_blocks(shape).len() > 1
}

/// Cut `[len, ...]` views along axis 0 into blocks of about [`BLOCK`]
/// elements. The boundaries depend on the shape only.
fn row_blocks(shape: &[usize]) -> Vec<(usize, usize)> {
    let len = shape.first().copied().unwrap_or(1);
    let inner: usize = shape.iter().skip(1).product::<usize>().max(1);
    let per = (BLOCK / inner).max(1);
    (0..len)
        .step_by(per)
        .map(|a| (a, (a + per).min(len)))
        .collect()
}

/// The clipped surrogate of the module docs. All arrays share one shape of
/// at least one axis; `grad` receives `d loss / d new_log_prob`.
#[allow(clippy::too_many_arguments)]
pub fn clipped_surrogate<F: Real>(
    new_log_prob: ArrayViewD<'_, F>,
    old_log_prob: ArrayViewD<'_, F>,
    advantages: ArrayViewD<'_, F>,
    mask: Option<ArrayViewD<'_, bool>>,
    clip: f64,
    check_finite: bool,
    mut grad: ArrayViewMutD<'_, F>,
    par: Par,
) -> CoreResult<Surrogate> {
    if !(clip.is_finite() && clip >= 0.0) {
        return Err(CoreError::input(
            "clip",
            format!("must be finite and >= 0, got {clip}"),
        ));
    }
    let shape = new_log_prob.shape().to_vec();
    let same = |name: &'static str, s: &[usize]| -> CoreResult<()> {
        if s != shape.as_slice() {
            return Err(CoreError::shape_mismatch(
                name,
                s,
                "new_log_prob",
                &shape,
                "they must have the same shape",
            ));
        }
        Ok(())
    };
    same("old_log_prob", old_log_prob.shape())?;
    same("advantages", advantages.shape())?;
    if let Some(m) = &mask {
        same("mask", m.shape())?;
    }
    if grad.shape() != shape.as_slice() {
        return Err(CoreError::shape_mismatch(
            "out",
            grad.shape(),
            "new_log_prob",
            &shape,
            "out must have the output shape",
        ));
    }
    if shape.is_empty() {
        return Err(CoreError::input(
            "new_log_prob",
            "must have at least one axis",
        ));
    }
    let blocks = row_blocks(&shape);
    let count = match &mask {
        None => new_log_prob.len(),
        Some(m) => par
            .map(blocks.clone(), |(a, b)| {
                m.slice_axis(Axis(0), (a..b).into())
                    .iter()
                    .filter(|&&k| k)
                    .count()
            })
            .into_iter()
            .sum(),
    };
    if count == 0 {
        return Err(match mask {
            None => CoreError::input("new_log_prob", "is empty: the mean is undefined"),
            Some(_) => CoreError::input("mask", "selects no element: the mean is undefined"),
        });
    }
    let c = Consts {
        lo: 1.0 - clip,
        hi: 1.0 + clip,
        clip,
        inv_n: 1.0 / count as f64,
    };
    let inv_n = c.inv_n;

    // Each block owns its slice of `grad`, so the blocks can run in parallel.
    let mut grads = Vec::with_capacity(blocks.len());
    let mut rest = grad.view_mut();
    for &(a, b) in &blocks {
        let (head, tail) = rest.split_at(Axis(0), b - a);
        grads.push(((a, b), head));
        rest = tail;
    }
    let parts = par.map(grads, |((a, b), mut g)| {
        let sl = |x: &ArrayViewD<'_, F>| {
            x.slice_axis(Axis(0), (a..b).into())
                .iter()
                .copied()
                .collect::<Vec<F>>()
        };
        let (nl, ol, ad) = (
            new_log_prob.slice_axis(Axis(0), (a..b).into()),
            old_log_prob.slice_axis(Axis(0), (a..b).into()),
            advantages.slice_axis(Axis(0), (a..b).into()),
        );
        let m = mask.as_ref().map(|m| m.slice_axis(Axis(0), (a..b).into()));
        // Contiguous blocks are read in place; others are copied into block
        // scratch in logical order, so both give the same bits.
        let (nl_o, ol_o, ad_o);
        let nl_s = match nl.as_slice() {
            Some(x) => x,
            None => {
                nl_o = sl(&new_log_prob);
                &nl_o[..]
            }
        };
        let ol_s = match ol.as_slice() {
            Some(x) => x,
            None => {
                ol_o = sl(&old_log_prob);
                &ol_o[..]
            }
        };
        let ad_s = match ad.as_slice() {
            Some(x) => x,
            None => {
                ad_o = sl(&advantages);
                &ad_o[..]
            }
        };
        let m_o;
        let m_s = match &m {
            None => None,
            Some(v) => match v.as_slice() {
                Some(x) => Some(x),
                None => {
                    m_o = v.iter().copied().collect::<Vec<bool>>();
                    Some(&m_o[..])
                }
            },
        };
        match g.as_slice_mut() {
            Some(gs) => block_dispatch(nl_s, ol_s, ad_s, m_s, gs, &c),
            None => {
                let mut gs = vec![F::from_f64(0.0); nl_s.len()];
                let p = block_dispatch(nl_s, ol_s, ad_s, m_s, &mut gs, &c);
                g.iter_mut().zip(gs).for_each(|(o, v)| *o = v);
                p
            }
        }
    });
    // The kernel marks non-finite inputs as it goes; only then are they
    // searched, in argument order, for the first one.
    if check_finite && parts.iter().any(|&(_, bad)| bad) {
        for (name, a) in [
            ("new_log_prob", &new_log_prob),
            ("old_log_prob", &old_log_prob),
            ("advantages", &advantages),
        ] {
            if let Some(i) = first_non_finite(a, par) {
                return Err(CoreError::non_finite(name, At::Flat(i)));
            }
        }
    }
    let tot = parts.into_iter().fold(Partial::ZERO, |t, (p, _)| t.add(p));
    Ok(Surrogate {
        loss: -tot.obj * inv_n,
        clip_fraction: tot.clipped * inv_n,
        approx_kl: tot.kl * inv_n,
        ratio_mean: tot.ratio * inv_n,
        ratio_max: tot.ratio_max,
        count,
    })
}

/// The per-call constants of the block kernel.
#[derive(Clone, Copy)]
struct Consts {
    lo: f64,
    hi: f64,
    clip: f64,
    inv_n: f64,
}

/// Accumulator lanes of the block kernel: independent partial sums let the
/// loop vectorise; lanes are combined in a fixed order.
const LANES: usize = 8;

/// One element from its log-ratio and ratio: `(grad, objective, kl term,
/// ratio, clipped)`, zeros where not selected.
#[inline(always)]
fn element(log_r: f64, r: f64, a: f64, sel: bool, c: &Consts) -> (f64, f64, f64, f64, f64) {
    let s1 = r * a;
    // Explicit comparisons (not `clamp`, whose bounds assertion would keep
    // the loop from vectorising); a NaN passes through.
    #[allow(clippy::manual_clamp)]
    let rc = if r < c.lo {
        c.lo
    } else if r > c.hi {
        c.hi
    } else {
        r
    };
    let s2 = rc * a;
    // Ties (r inside the range, or A = 0) take the unclipped branch; a NaN
    // fails `s2 < s1` and so reaches the gradient.
    let clipped_min = s2 < s1;
    let obj = if clipped_min { s2 } else { s1 };
    let d = if clipped_min { 0.0 } else { -s1 * c.inv_n };
    // (r - 1) - log r >= 0 exactly; only rounding (r near 1) can push it
    // below, so clip that noise (a NaN passes).
    let kl_t = (r - 1.0) - log_r;
    let kl = if kl_t < 0.0 { 0.0 } else { kl_t };
    let cf = if (r - 1.0).abs() > c.clip { 1.0 } else { 0.0 };
    if sel {
        (d, obj, kl, r, cf)
    } else {
        (0.0, 0.0, 0.0, 0.0, 0.0)
    }
}

/// [`block_kernel`] compiled for the widest vector unit of this CPU: the
/// AVX-512 copy of [`dispatch`], else an AVX2 copy without FMA (in the
/// AVX2 + FMA copy of `dispatch` LLVM leaves the elementwise loop scalar),
/// else the baseline, which tests force with [`fastmath::set_wide_off`]. No
/// copy fuses multiply-adds, so all give the same bits.
fn block_dispatch<F: Real>(
    nl: &[F],
    ol: &[F],
    ad: &[F],
    m: Option<&[bool]>,
    g: &mut [F],
    c: &Consts,
) -> (Partial, bool) {
    #[cfg(target_arch = "x86_64")]
    {
        #[target_feature(enable = "avx2")]
        fn avx2<F: Real>(
            nl: &[F],
            ol: &[F],
            ad: &[F],
            m: Option<&[bool]>,
            g: &mut [F],
            c: &Consts,
        ) -> (Partial, bool) {
            block_kernel(nl, ol, ad, m, g, c)
        }
        if fastmath::wide_ok() {
            if isa() == Isa::Avx512 {
                return dispatch(Block {
                    nl,
                    ol,
                    ad,
                    m,
                    g,
                    c,
                });
            }
            // SAFETY: `avx2` only requires the CPU to support AVX2, which
            // `wide_ok` has just confirmed at run time.
            return unsafe { avx2(nl, ol, ad, m, g, c) };
        }
    }
    block_kernel(nl, ol, ad, m, g, c)
}

/// The arguments of [`block_kernel`], as a [`Kernel`].
struct Block<'a, F> {
    nl: &'a [F],
    ol: &'a [F],
    ad: &'a [F],
    m: Option<&'a [bool]>,
    g: &'a mut [F],
    c: &'a Consts,
}

impl<F: Real> Kernel for Block<'_, F> {
    type Output = (Partial, bool);
    #[inline(always)]
    fn run<const FMA: bool>(self) -> (Partial, bool) {
        block_kernel(self.nl, self.ol, self.ad, self.m, self.g, self.c)
    }
}

/// Elements per pass of [`block_kernel`] (a multiple of [`LANES`]): its
/// per-element terms stay in L1.
const SUB: usize = 512;

/// One block of contiguous elements (logical order): writes `g`, returns the
/// block's sums and whether some input element is not finite (an `f64`
/// log-ratio that overflows also counts; the caller's search then finds
/// nothing). Element `i` goes to lane `i % LANES`.
///
/// Plain loops per sub-block: the finite marks, one elementwise pass (the
/// `exp`, the clipping, the gradient) into small `f64` arrays, which the loop
/// vectoriser handles well, then the lane sums over those arrays in
/// [`F64x8`] steps.
#[inline(always)]
fn block_kernel<F: Real>(
    nl: &[F],
    ol: &[F],
    ad: &[F],
    m: Option<&[bool]>,
    g: &mut [F],
    c: &Consts,
) -> (Partial, bool) {
    let n = g.len();
    let (nl, ol, ad) = (&nl[..n], &ol[..n], &ad[..n]);
    // The constants in locals: read through the reference inside the
    // branches of `element`, LLVM loads them per lane with masked gathers.
    let c = &{ *c };
    let zero = F64x8::splat(0.0);
    let (mut a_obj, mut a_kl, mut a_ratio, mut a_clipped) = (zero, zero, zero, zero);
    let mut a_rmax = [f64::NEG_INFINITY; LANES];
    // The OR of the bits of the inputs' finite marks: 0 while all are finite
    // (an integer reduction, which keeps the loop vectorised).
    let mut bad = 0u64;
    let mut obj = [0.0f64; SUB];
    let mut kl = [0.0f64; SUB];
    let mut rat = [0.0f64; SUB];
    let mut cf = [0.0f64; SUB];
    let mut rm = [0.0f64; SUB];
    let mut s0 = 0;
    while s0 < n {
        let k = SUB.min(n - s0);
        // Pad a short last pass to whole lanes with unselected elements.
        let kp = k.next_multiple_of(LANES);
        let (nl, ol, ad, g) = (
            &nl[s0..s0 + k],
            &ol[s0..s0 + k],
            &ad[s0..s0 + k],
            &mut g[s0..s0 + k],
        );
        // The marks in a loop of their own: in the loop with the `exp`,
        // the reduction keeps LLVM from vectorising it.
        for i in 0..k {
            let lr = nl[i].to_f64() - ol[i].to_f64();
            bad |= finite_mark(lr).to_bits() | finite_mark(ad[i].to_f64()).to_bits();
        }
        let terms = |i: usize, sel: bool| {
            let lr = nl[i].to_f64() - ol[i].to_f64();
            let r = fastmath::exp(lr);
            let e = element(lr, r, ad[i].to_f64(), sel, c);
            (e, if sel { r } else { f64::NEG_INFINITY })
        };
        match m {
            None => {
                for i in 0..k {
                    let ((d, o, l, r, f), x) = terms(i, true);
                    g[i] = F::from_f64(d);
                    (obj[i], kl[i], rat[i], cf[i], rm[i]) = (o, l, r, f, x);
                }
            }
            Some(m) => {
                let m = &m[s0..s0 + k];
                for i in 0..k {
                    let ((d, o, l, r, f), x) = terms(i, m[i]);
                    g[i] = F::from_f64(d);
                    (obj[i], kl[i], rat[i], cf[i], rm[i]) = (o, l, r, f, x);
                }
            }
        }
        for i in k..kp {
            (obj[i], kl[i], rat[i], cf[i], rm[i]) = (0.0, 0.0, 0.0, 0.0, f64::NEG_INFINITY);
        }
        let lanes = |a: &[f64; SUB], j: usize| {
            let mut o = [0.0; LANES];
            o.copy_from_slice(&a[j..j + LANES]);
            F64x8(o)
        };
        // One loop per quantity, so each keeps its 8 lane sums in registers
        // (with all four in one loop LLVM pairs lanes of different sums).
        for (acc, a) in [
            (&mut a_obj, &obj),
            (&mut a_kl, &kl),
            (&mut a_ratio, &rat),
            (&mut a_clipped, &cf),
        ] {
            for j in (0..kp).step_by(LANES) {
                *acc = *acc + lanes(a, j);
            }
        }
        for j in (0..kp).step_by(LANES) {
            for (acc, &x) in a_rmax.iter_mut().zip(&rm[j..j + LANES]) {
                // Sticky NaN: once a lane's max is NaN it stays NaN.
                *acc = if x > *acc || x.is_nan() { x } else { *acc };
            }
        }
        s0 += k;
    }
    let mut p = Partial::ZERO;
    for (l, &ratio_max) in a_rmax.iter().enumerate() {
        p = p.add(Partial {
            obj: a_obj.0[l],
            kl: a_kl.0[l],
            ratio: a_ratio.0[l],
            ratio_max,
            clipped: a_clipped.0[l],
        });
    }
    (p, bad != 0)
}

/// The first non-finite element in logical row-major order.
fn first_non_finite<F: Real>(a: &ArrayViewD<'_, F>, par: Par) -> Option<usize> {
    super::finite::first_non_finite_any(a, par)
}

/// A 0-d or N-d view as a view of at least one axis (a scalar becomes `[1]`).
pub fn at_least_1d<T>(a: ArrayViewD<'_, T>) -> ArrayViewD<'_, T> {
    if a.ndim() == 0 {
        a.insert_axis(Axis(0))
    } else {
        a
    }
}

/// Shape helper for tests and bindings: a 1-D view as a dynamic-rank view.
pub fn dyn1<'a, T>(a: ArrayView1<'a, T>) -> ArrayViewD<'a, T> {
    a.into_dimensionality::<IxDyn>()
        .expect("a 1-D view always converts to IxDyn")
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2, ArrayD, ShapeBuilder};

    fn lcg(seed: &mut u64) -> f64 {
        *seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*seed >> 11) as f64) / ((1u64 << 53) as f64)
    }

    /// Schulman et al. 2017, eq. 7, transcribed directly (negated, averaged).
    fn reference(nl: &[f64], ol: &[f64], a: &[f64], m: &[bool], clip: f64) -> (f64, f64) {
        let mut s = 0.0;
        let mut kl = 0.0;
        let mut n = 0.0;
        for i in 0..nl.len() {
            if !m[i] {
                continue;
            }
            let r = (nl[i] - ol[i]).exp();
            let obj = (r * a[i]).min(r.clamp(1.0 - clip, 1.0 + clip) * a[i]);
            s += obj;
            kl += r - 1.0 - r.ln();
            n += 1.0;
        }
        (-s / n, kl / n)
    }

    fn run(
        nl: &Array2<f64>,
        ol: &Array2<f64>,
        a: &Array2<f64>,
        m: Option<&Array2<bool>>,
        clip: f64,
        par: Par,
    ) -> (Surrogate, Array2<f64>) {
        let mut g = Array2::zeros(nl.dim().f());
        let s = clipped_surrogate(
            nl.view().into_dyn(),
            ol.view().into_dyn(),
            a.view().into_dyn(),
            m.map(|m| m.view().into_dyn()),
            clip,
            true,
            g.view_mut().into_dyn(),
            par,
        )
        .unwrap();
        (s, g)
    }

    #[test]
    fn matches_eq7_and_finite_differences() {
        let mut seed = 1u64;
        let (rows, cols) = (300, 70);
        let nl = Array2::from_shape_fn((rows, cols), |_| -1.0 + 0.6 * (lcg(&mut seed) - 0.5));
        let ol = Array2::from_shape_fn((rows, cols), |_| -1.0 + 0.6 * (lcg(&mut seed) - 0.5));
        let a = Array2::from_shape_fn((rows, cols), |_| lcg(&mut seed) * 2.0 - 1.0);
        let m = Array2::from_shape_fn((rows, cols), |_| lcg(&mut seed) < 0.8);
        let clip = 0.2;
        let (s, g) = run(&nl, &ol, &a, Some(&m), clip, Par::Rayon);
        let flat = |x: &Array2<f64>| x.iter().copied().collect::<Vec<_>>();
        let mf: Vec<bool> = m.iter().copied().collect();
        let (loss, kl) = reference(&flat(&nl), &flat(&ol), &flat(&a), &mf, clip);
        assert!((s.loss - loss).abs() < 1e-13);
        assert!((s.approx_kl - kl).abs() < 1e-13);
        assert!(s.approx_kl >= 0.0);
        assert_eq!(s.count, mf.iter().filter(|&&k| k).count());
        // Central differences (common practice, no source), away from kinks.
        let h = 1e-6;
        let mut checked = 0;
        for (k, ((i, j), &gij)) in g.indexed_iter().enumerate() {
            if k % 37 != 0 {
                continue;
            }
            let r = (nl[[i, j]] - ol[[i, j]]).exp();
            if ((r - 1.0).abs() - clip).abs() < 1e-4 {
                continue;
            }
            let mut p = flat(&nl);
            let idx = i * cols + j;
            p[idx] += h;
            let (lp, _) = reference(&p, &flat(&ol), &flat(&a), &mf, clip);
            p[idx] -= 2.0 * h;
            let (lm, _) = reference(&p, &flat(&ol), &flat(&a), &mf, clip);
            let fd = (lp - lm) / (2.0 * h);
            assert!((fd - gij).abs() < 1e-9, "{fd} vs {gij}");
            checked += 1;
        }
        assert!(checked > 300);
        // Masked-out elements have zero gradient; a thread count changes nothing.
        assert!(g.iter().zip(m.iter()).all(|(&g, &k)| k || g == 0.0));
        let (s1, g1) = run(&nl, &ol, &a, Some(&m), clip, Par::Seq);
        assert_eq!(s, s1);
        assert_eq!(g, g1);
        // The AVX2 path (when the CPU has it) and the baseline path agree bitwise.
        fastmath::set_wide_off(true);
        let (s2, g2) = run(&nl, &ol, &a, Some(&m), clip, Par::Seq);
        fastmath::set_wide_off(false);
        assert_eq!(s, s2);
        assert_eq!(g, g2);
    }

    #[test]
    fn diagnostics_and_errors() {
        let nl = Array1::from(vec![0.0f64, 0.5, -0.5, 0.1]);
        let ol = Array1::zeros(4);
        let a = Array1::from(vec![1.0, 1.0, -1.0, 2.0]);
        let mut g = ArrayD::zeros(IxDyn(&[4]));
        let s = clipped_surrogate(
            dyn1(nl.view()),
            dyn1(ol.view()),
            dyn1(a.view()),
            None,
            0.2,
            true,
            g.view_mut(),
            Par::Seq,
        )
        .unwrap();
        assert_eq!(s.clip_fraction, 0.5);
        assert!((s.ratio_max - 0.5f64.exp()).abs() < 4.0 * f64::EPSILON);
        // Both clipped elements are clipped in the direction that zeroes the gradient.
        assert_eq!(g[1], 0.0);
        assert_eq!(g[2], 0.0);
        assert_eq!(g[0], -0.25);
        let none = Array1::from(vec![false; 4]);
        let e = clipped_surrogate(
            dyn1(nl.view()),
            dyn1(ol.view()),
            dyn1(a.view()),
            Some(dyn1(none.view())),
            0.2,
            true,
            g.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Input { arg: "mask", .. }));
        let mut bad = nl.clone();
        bad[3] = f64::INFINITY;
        let e = clipped_surrogate(
            dyn1(bad.view()),
            dyn1(ol.view()),
            dyn1(a.view()),
            None,
            0.2,
            true,
            g.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert_eq!(e, CoreError::non_finite("new_log_prob", At::Flat(3)));
        let short = Array1::<f64>::zeros(3);
        let e = clipped_surrogate(
            dyn1(nl.view()),
            dyn1(short.view()),
            dyn1(a.view()),
            None,
            0.2,
            true,
            g.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Shape(_)));
        let e = clipped_surrogate(
            dyn1(nl.view()),
            dyn1(ol.view()),
            dyn1(a.view()),
            None,
            f64::NAN,
            true,
            g.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Input { arg: "clip", .. }));
    }

    /// The vectorised kernel against a plain loop written from the module's
    /// documented order (element `i` of a block to lane `i % 8`, lanes then
    /// blocks combined in order), bit for bit: f32 and f64, with and without
    /// a mask, a length that is not a multiple of 8 or of the block.
    #[test]
    fn kernel_equals_plain_loop_bit_for_bit() {
        fn plain<F: Real>(
            nl: &[F],
            ol: &[F],
            a: &[F],
            m: &[bool],
            clip: f64,
        ) -> (Surrogate, Vec<F>) {
            let count = m.iter().filter(|&&k| k).count();
            let c = Consts {
                lo: 1.0 - clip,
                hi: 1.0 + clip,
                clip,
                inv_n: 1.0 / count as f64,
            };
            let mut g = vec![F::from_f64(0.0); nl.len()];
            let mut tot = Partial::ZERO;
            for b0 in (0..nl.len()).step_by(BLOCK) {
                let mut lanes = [Partial::ZERO; LANES];
                for i in b0..(b0 + BLOCK).min(nl.len()) {
                    let lr = nl[i].to_f64() - ol[i].to_f64();
                    let r = fastmath::exp(lr);
                    let (d, o, k, rr, f) = element(lr, r, a[i].to_f64(), m[i], &c);
                    g[i] = F::from_f64(d);
                    let l = &mut lanes[(i - b0) % LANES];
                    l.obj += o;
                    l.kl += k;
                    l.ratio += rr;
                    l.clipped += f;
                    if m[i] && (r > l.ratio_max || r.is_nan()) {
                        l.ratio_max = r;
                    }
                }
                let block = lanes.into_iter().fold(Partial::ZERO, Partial::add);
                tot = tot.add(block);
            }
            let s = Surrogate {
                loss: -tot.obj * c.inv_n,
                clip_fraction: tot.clipped * c.inv_n,
                approx_kl: tot.kl * c.inv_n,
                ratio_mean: tot.ratio * c.inv_n,
                ratio_max: tot.ratio_max,
                count,
            };
            (s, g)
        }
        fn check<F: Real>(n: usize, masked: bool, seed: &mut u64) {
            let mut f = |a: f64, b: f64| {
                (0..n)
                    .map(|_| F::from_f64(a + (b - a) * lcg(seed)))
                    .collect::<Vec<F>>()
            };
            let (nl, ol, ad) = (f(-2.0, -0.5), f(-2.0, -0.5), f(-1.0, 1.0));
            let m: Vec<bool> = (0..n).map(|i| !masked || i % 7 != 3).collect();
            let (want, wg) = plain(&nl, &ol, &ad, &m, 0.2);
            fn one<F>(x: &[F]) -> ArrayViewD<'_, F> {
                ndarray::ArrayView1::from(x).into_dyn()
            }
            let mv = ndarray::ArrayView1::from(&m[..]).into_dyn();
            for par in [Par::Seq, Par::Rayon] {
                let mut g = vec![F::from_f64(0.0); n];
                let got = clipped_surrogate(
                    one(&nl),
                    one(&ol),
                    one(&ad),
                    if masked { Some(mv.clone()) } else { None },
                    0.2,
                    true,
                    ndarray::ArrayViewMut1::from(&mut g[..]).into_dyn(),
                    par,
                )
                .unwrap();
                let bits = |s: &Surrogate| {
                    [
                        s.loss,
                        s.clip_fraction,
                        s.approx_kl,
                        s.ratio_mean,
                        s.ratio_max,
                    ]
                    .map(f64::to_bits)
                };
                assert_eq!(bits(&got), bits(&want), "{} n={n} masked={masked}", F::NAME);
                assert_eq!(got.count, want.count);
                assert!(g
                    .iter()
                    .zip(&wg)
                    .all(|(x, y)| x.to_f64().to_bits() == y.to_f64().to_bits()));
            }
        }
        let mut seed = 17u64;
        for &n in &[1usize, 13, 512, 1000, BLOCK + 77, 3 * BLOCK] {
            for masked in [false, true] {
                check::<f32>(n, masked, &mut seed);
                check::<f64>(n, masked, &mut seed);
            }
        }
    }

    /// Non-finite inputs are found after the kernel, and the error names the
    /// first one in argument order, masked-out elements included, as the
    /// up-front scans did.
    #[test]
    fn non_finite_inputs_are_reported_in_argument_order() {
        let n = 3 * BLOCK + 5;
        let base = Array1::from_shape_fn(n, |i| -1.0 - (i % 10) as f64 * 0.05);
        let (mut nl, mut ol, mut ad) = (base.clone(), base.clone(), base.mapv(|x| x + 0.5));
        let mask = Array1::from_shape_fn(n, |i| i != 2 * BLOCK);
        let mut g = ArrayD::zeros(IxDyn(&[n]));
        let mut go = |nl: &Array1<f64>, ol: &Array1<f64>, ad: &Array1<f64>, check: bool| {
            clipped_surrogate(
                dyn1(nl.view()),
                dyn1(ol.view()),
                dyn1(ad.view()),
                Some(dyn1(mask.view())),
                0.2,
                check,
                g.view_mut(),
                Par::Rayon,
            )
        };
        ad[7] = f64::NAN;
        ol[2 * BLOCK] = f64::NEG_INFINITY; // masked out, still checked
        let e = go(&nl, &ol, &ad, true).unwrap_err();
        assert_eq!(
            e,
            CoreError::non_finite("old_log_prob", At::Flat(2 * BLOCK))
        );
        nl[n - 1] = f64::INFINITY;
        let e = go(&nl, &ol, &ad, true).unwrap_err();
        assert_eq!(e, CoreError::non_finite("new_log_prob", At::Flat(n - 1)));
        // check_finite=False lets the NaN through to the loss.
        assert!(go(&nl, &ol, &ad, false).unwrap().loss.is_nan());
        // A log-ratio that overflows is not an input error.
        let (mut nl, mut ol) = (base.clone(), base.clone());
        nl[1] = 1e308;
        ol[1] = -1e308;
        let s = go(&nl, &ol, &base, true).unwrap();
        assert_eq!(s.ratio_max, f64::INFINITY);
    }
}
