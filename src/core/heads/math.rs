//! Elementwise `f64` math over scratch slices, written so the loops
//! vectorise: `exp` and `ln` without calls into libm per element.
//!
//! Both are accurate to about one ulp over their whole domain (tested against
//! the standard library below). The slice forms are [`Kernel`]s run through
//! [`dispatch`] (fused multiply-adds on the AVX2 / AVX-512 builds); the
//! eight-lane forms take the `FMA` of the kernel they are inlined into. So one
//! machine always runs the same instructions (results never depend on the
//! thread count, only, in the last bit, on the CPU).

/// `ln(2 pi) / 2`.
pub const HALF_LN_2PI: f64 = 0.918_938_533_204_672_7;
/// `ln 2`.
pub const LN_2: f64 = std::f64::consts::LN_2;

const LOG2_E: f64 = std::f64::consts::LOG2_E;
// Cody-Waite split of ln 2 (fdlibm): k * LN2_HI is exact for |k| < 2^20.
const LN2_HI: f64 = 0.6931471803691238;
const LN2_LO: f64 = 1.9082149292705877e-10;
// 1.5 * 2^52: adding it rounds to an integer held in the low mantissa bits.
const SHIFT: f64 = 6_755_399_441_055_744.0;
// ln(2^-1022): below this exp(x) is subnormal; it is flushed to 0.
const EXP_LO: f64 = -708.396_418_532_264_1;
const EXP_HI: f64 = 710.0;
// 1/n! for n = 0..=13: the Taylor series of exp on |r| <= ln(2)/2 has a
// truncation error below 1e-17 relative.
const INV_FACT: [f64; 14] = [
    1.0,
    1.0,
    0.5,
    0.166_666_666_666_666_66,
    0.041_666_666_666_666_664,
    0.008_333_333_333_333_333,
    0.001_388_888_888_888_889,
    0.000_198_412_698_412_698_4,
    2.480_158_730_158_73e-5,
    2.755_731_922_398_589_3e-6,
    2.755_731_922_398_589e-7,
    2.505_210_838_544_172e-8,
    2.087_675_698_786_81e-9,
    1.605_904_383_682_161_3e-10,
];

use crate::core::simd::{dispatch, madd, F64x8, Kernel};

/// For a clamped `x`: `k = round(x / ln 2)` and `p = e^r`, `r = x - k ln 2`.
#[inline(always)]
fn exp_core<const FMA: bool>(xc: f64) -> (i64, f64) {
    // t holds k in its low mantissa bits; t - SHIFT is exact.
    let t = madd::<FMA>(xc, LOG2_E, SHIFT);
    let kf = t - SHIFT;
    let r = madd::<FMA>(kf, -LN2_HI, xc);
    let r = madd::<FMA>(kf, -LN2_LO, r);
    let mut p = INV_FACT[13];
    for &c in INV_FACT[..13].iter().rev() {
        p = madd::<FMA>(p, r, c);
    }
    (t.to_bits().wrapping_sub(SHIFT.to_bits()) as i64, p)
}

/// `exp(x)`; NaN stays NaN, results below 2^-1022 are 0.
#[inline(always)]
fn exp1<const FMA: bool>(x: f64) -> f64 {
    // NaN falls through `clamp` and every comparison unchanged.
    let xc = x.clamp(EXP_LO, EXP_HI);
    // k in [-1022, 1024]: 2^k as 2^(k >> 1) * 2^(k - (k >> 1)), both normal.
    let (k, p) = exp_core::<FMA>(xc);
    let k1 = k >> 1;
    let s1 = f64::from_bits(((k1 + 1023) as u64) << 52);
    let s2 = f64::from_bits(((k - k1 + 1023) as u64) << 52);
    let y = p * s1 * s2;
    if x < EXP_LO {
        0.0
    } else {
        y
    }
}

/// [`exp1`] of `x <= 0` or NaN, the same bits with less work: `k` is in
/// `[-1022, 0]`, so `2^k` is one normal factor. (In [`exp1`],
/// `p * 2^(k >> 1)` is exact: `p` is in `[0.7, 1.5]` and the product at
/// least `2^-512`; so both round once, at the last product.)
#[inline(always)]
fn exp1_nonpos<const FMA: bool>(x: f64) -> f64 {
    // `clamp` (NaN stays NaN) in the form that vectorises.
    let xc = x.clamp(EXP_LO, 0.0);
    let (k, p) = exp_core::<FMA>(xc);
    let y = p * f64::from_bits(((k + 1023) as u64) << 52);
    if x < EXP_LO {
        0.0
    } else {
        y
    }
}

// fdlibm's e_log.c: log(1+f) = f - f^2/2 + s*(f^2/2 + R(s^2)), s = f/(2+f).
const LG1: f64 = 0.6666666666666735;
const LG2: f64 = 0.3999999999940942;
const LG3: f64 = 0.2857142874366239;
const LG4: f64 = 0.22222198432149784;
const LG5: f64 = 0.1818357216161805;
const LG6: f64 = 0.15313837699209373;
const LG7: f64 = 0.14798198605116586;

/// `ln(x)` for positive normal finite `x`; other inputs are fixed up by the
/// caller.
#[inline(always)]
fn ln1<const FMA: bool>(x: f64) -> f64 {
    let bits = x.to_bits();
    // Split x = 2^k * m with m in [sqrt(2)/2, sqrt(2)): bias the exponent so
    // that mantissas above sqrt(2) move to the next binade.
    let t = bits.wrapping_add(0x3ff0_0000_0000_0000 - 0x3fe6_a09e_0000_0000);
    let k = ((t >> 52) as i64 - 1023) as f64;
    let mbits = (t & 0x000f_ffff_ffff_ffff).wrapping_add(0x3fe6_a09e_0000_0000);
    let m = f64::from_bits(mbits);
    let f = m - 1.0;
    let s = f / (2.0 + f);
    let z = s * s;
    let w = z * z;
    let t1 = w * madd::<FMA>(w, madd::<FMA>(w, LG6, LG4), LG2);
    let t2 = z * madd::<FMA>(w, madd::<FMA>(w, madd::<FMA>(w, LG7, LG5), LG3), LG1);
    let r = t2 + t1;
    let hfsq = 0.5 * f * f;
    // musl's order: s*(hfsq+R) + k*ln2_lo - hfsq + f + k*ln2_hi
    let a = madd::<FMA>(s, hfsq + r, k * LN2_LO);
    madd::<FMA>(k, LN2_HI, (a - hfsq) + f)
}

/// `x[i] = exp(x[i])` (`LN = false`) or `ln(x[i])` of positive normal
/// finite values (`LN = true`), in place.
struct InPlace<'a, const LN: bool>(&'a mut [f64]);

impl<const LN: bool> Kernel for InPlace<'_, LN> {
    type Output = ();
    #[inline(always)]
    fn run<const FMA: bool>(self) {
        for v in self.0.iter_mut() {
            *v = if LN { ln1::<FMA>(*v) } else { exp1::<FMA>(*v) };
        }
    }
}

/// `x[i] = exp(x[i])` in place (subnormal results flush to 0).
pub fn exp_inplace(x: &mut [f64]) {
    dispatch(InPlace::<false>(x))
}

/// `dst[i] = exp(src[i])` (subnormal results flush to 0).
pub fn exp_to(src: &[f64], dst: &mut [f64]) {
    struct K<'a>(&'a [f64], &'a mut [f64]);
    impl Kernel for K<'_> {
        type Output = ();
        #[inline(always)]
        fn run<const FMA: bool>(self) {
            for (d, &v) in self.1.iter_mut().zip(self.0) {
                *d = exp1::<FMA>(v);
            }
        }
    }
    dispatch(K(src, dst))
}

/// `exp` of eight lanes, each `<= 0` or NaN: the same bits as
/// [`exp_inplace`] run with the same `FMA` (so inside a
/// [`crate::core::simd::dispatch`] kernel, as there).
#[inline(always)]
pub(crate) fn exp_nonpos_x8<const FMA: bool>(x: F64x8) -> F64x8 {
    let mut o = [0.0; 8];
    for (o, &v) in o.iter_mut().zip(&x.0) {
        *o = exp1_nonpos::<FMA>(v);
    }
    F64x8(o)
}

/// `ln` of eight lanes, each positive, normal and finite (see [`ln_normal`]):
/// the same bits as [`ln_inplace`] run with the same `FMA`.
#[inline(always)]
pub(crate) fn ln_normal_x8<const FMA: bool>(x: F64x8) -> F64x8 {
    let mut o = [0.0; 8];
    for (o, &v) in o.iter_mut().zip(&x.0) {
        *o = ln1::<FMA>(v);
    }
    F64x8(o)
}

/// Whether [`ln_normal_x8`] is exact for `x`: positive, normal and finite.
#[inline(always)]
pub(crate) fn ln_normal(x: f64) -> bool {
    (f64::MIN_POSITIVE..f64::INFINITY).contains(&x)
}

/// `x[i] = ln(x[i])` in place, exact IEEE semantics for 0, negatives, inf,
/// NaN and subnormals.
pub fn ln_inplace(x: &mut [f64]) {
    let special = x.iter().fold(false, |a, &v| a | !ln_normal(v));
    if special {
        // Rare: take the standard library for everything (same results where
        // both are defined, to the last ulp or so).
        x.iter_mut().for_each(|v| *v = v.ln());
        return;
    }
    dispatch(InPlace::<true>(x))
}

/// `exp` of one value (same algorithm as [`exp_inplace`], no dispatch).
#[inline]
pub fn exp(x: f64) -> f64 {
    exp1::<false>(x)
}

/// `softplus(x) = ln(1 + e^x)` without overflow.
#[inline]
pub fn softplus(x: f64) -> f64 {
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

/// `ln(1 - tanh(u)^2) = 2 (ln 2 - u - softplus(-2u))`, finite for every
/// finite `u`.
#[inline]
pub fn log1m_tanh2(u: f64) -> f64 {
    2.0 * (LN_2 - u - softplus(-2.0 * u))
}

/// `(1 + tanh(u)) / 2 = 1 / (1 + e^{-2u})`, accurate in both tails.
#[inline]
pub fn half_tanh_p1(u: f64) -> f64 {
    if u >= 0.0 {
        1.0 / (1.0 + (-2.0 * u).exp())
    } else {
        let e = (2.0 * u).exp();
        e / (1.0 + e)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ulps(a: f64, b: f64) -> f64 {
        if a == b {
            return 0.0;
        }
        ((a - b) / b).abs() / f64::EPSILON
    }

    #[test]
    fn exp_matches_std() {
        let mut xs: Vec<f64> = (0..200_001)
            .map(|i| -745.0 + 1455.0 * i as f64 / 200_000.0)
            .collect();
        xs.extend([
            0.0, -0.0, 1e-300, -1e-300, 0.5, -0.3465, 0.3466, 709.78, -708.39,
        ]);
        let mut y = xs.clone();
        exp_inplace(&mut y);
        let y0: Vec<f64> = xs.iter().map(|&x| exp1::<false>(x)).collect();
        let mut y1 = vec![0.0; xs.len()];
        exp_to(&xs, &mut y1);
        assert_eq!(y1, y);
        for ((&x, &a), &b) in xs.iter().zip(&y).zip(&y0) {
            let want = x.exp();
            if want < f64::MIN_POSITIVE {
                assert_eq!(a, 0.0, "x = {x}");
                assert_eq!(b, 0.0, "x = {x}");
            } else if want.is_infinite() {
                assert!(a.is_infinite() && b.is_infinite(), "x = {x}");
            } else {
                assert!(ulps(a, want) <= 2.0, "x = {x}: {a} vs {want}");
                assert!(ulps(b, want) <= 2.0, "x = {x}: {b} vs {want}");
            }
        }
        let mut sp = [f64::NAN, f64::NEG_INFINITY, f64::INFINITY, -1e30, 1e30];
        exp_inplace(&mut sp);
        assert!(sp[0].is_nan());
        assert_eq!(&sp[1..], &[0.0, f64::INFINITY, 0.0, f64::INFINITY]);
        assert_eq!(exp(0.0), 1.0);
    }

    /// The non-positive form is [`exp1`] bit for bit, across the lower end
    /// (subnormal results, the flush threshold) and at every power of two.
    #[test]
    fn exp_nonpos_is_exp_bitwise() {
        let mut xs: Vec<f64> = (0..400_001)
            .map(|i| -750.0 * i as f64 / 400_000.0)
            .collect();
        xs.extend((0..200_001).map(|i| -708.5 + 0.2 * i as f64 / 200_000.0));
        for k in 0..=1023 {
            let c = -(k as f64) * LN_2;
            for d in [-1e-9, -1e-13, 0.0, 1e-13, 1e-9, 0.3465, -0.3466] {
                xs.push((c + d).min(0.0));
            }
        }
        xs.extend([
            0.0,
            -0.0,
            -1e-300,
            -5e-324,
            f64::NEG_INFINITY,
            EXP_LO,
            -1e30,
        ]);
        for fma in [false, true] {
            if fma && crate::core::simd::isa() == crate::core::simd::Isa::Base {
                continue;
            }
            for &x in &xs {
                let (a, b) = if fma {
                    (exp1::<true>(x), exp1_nonpos::<true>(x))
                } else {
                    (exp1::<false>(x), exp1_nonpos::<false>(x))
                };
                assert_eq!(a.to_bits(), b.to_bits(), "x = {x:e}, fma {fma}");
            }
        }
        assert!(exp1_nonpos::<false>(f64::NAN).is_nan());
    }

    #[test]
    fn ln_matches_std() {
        let mut xs: Vec<f64> = (0..100_000)
            .map(|i| 10f64.powf(-300.0 + 600.0 * i as f64 / 100_000.0))
            .collect();
        xs.extend((1..20_000).map(|i| 1.0 + i as f64 * 1e-5));
        xs.extend((1..20_000).map(|i| 1.0 - i as f64 * 1e-6));
        xs.extend([1.0, 2.0, 0.5, std::f64::consts::SQRT_2, 18.0, f64::MAX]);
        let mut y = xs.clone();
        ln_inplace(&mut y);
        let y0: Vec<f64> = xs.iter().map(|&x| ln1::<false>(x)).collect();
        for ((&x, &a), &b) in xs.iter().zip(&y).zip(&y0) {
            let want = x.ln();
            let tol = if want.abs() < 1e-3 { 4.0 } else { 2.0 };
            assert!(
                ulps(a, want) <= tol || (a - want).abs() < 1e-300,
                "x = {x}: {a} vs {want}"
            );
            assert!(
                ulps(b, want) <= tol || (b - want).abs() < 1e-300,
                "x = {x}: {b} vs {want}"
            );
        }
        assert_eq!(y[xs.len() - 6], 0.0);
        let mut sp = [0.0, -1.0, f64::INFINITY, f64::NAN, 5e-324, 3.0];
        ln_inplace(&mut sp);
        assert_eq!(sp[0], f64::NEG_INFINITY);
        assert!(sp[1].is_nan() && sp[3].is_nan());
        assert_eq!(sp[2], f64::INFINITY);
        assert_eq!(sp[4], 5e-324f64.ln());
        assert_eq!(sp[5], 3f64.ln());
    }

    /// The eight-lane forms inside a dispatched kernel give the bits of the
    /// slice forms (which dispatch the same way).
    #[test]
    fn lane_forms_match_slice_forms() {
        use crate::core::simd::{dispatch, Kernel};
        struct Lanes<'a>(&'a [f64]);
        impl Kernel for Lanes<'_> {
            type Output = (Vec<f64>, Vec<f64>);
            #[inline(always)]
            fn run<const FMA: bool>(self) -> Self::Output {
                let (mut e, mut l) = (Vec::new(), Vec::new());
                for c in self.0.chunks_exact(8) {
                    let x = F64x8(c.try_into().expect("8 lanes"));
                    let mut z = [0.0; 8];
                    for (z, &v) in z.iter_mut().zip(&x.0) {
                        *z = -v.abs();
                    }
                    e.extend(exp_nonpos_x8::<FMA>(F64x8(z)).0);
                    let mut y = [0.0; 8];
                    for (y, &v) in y.iter_mut().zip(&x.0) {
                        *y = v.abs() + 1.0;
                    }
                    l.extend(ln_normal_x8::<FMA>(F64x8(y)).0);
                }
                (e, l)
            }
        }
        let xs: Vec<f64> = (0..8000)
            .map(|i| -750.0 + 1460.0 * i as f64 / 7999.0)
            .chain([0.0, -0.0, -1e30, 1e30, f64::NAN, -1e-300, 0.5, -0.25])
            .collect();
        let (e, l) = dispatch(Lanes(&xs));
        let mut want_e: Vec<f64> = xs.iter().map(|v| -v.abs()).collect();
        exp_inplace(&mut want_e);
        let mut want_l: Vec<f64> = xs.iter().map(|v| v.abs() + 1.0).collect();
        // The first 8000 are all normal, so the slice form keeps its own ln.
        ln_inplace(&mut want_l[..8000]);
        for i in 0..xs.len() {
            assert_eq!(e[i].to_bits(), want_e[i].to_bits(), "exp({})", xs[i]);
            if i < 8000 {
                assert_eq!(l[i].to_bits(), want_l[i].to_bits(), "ln({})", xs[i]);
            }
        }
        assert!(ln_normal(1.0) && !ln_normal(0.0) && !ln_normal(f64::INFINITY));
        assert!(!ln_normal(f64::NAN) && !ln_normal(1e-310) && ln_normal(f64::MAX));
    }

    #[test]
    fn squash_helpers_are_stable() {
        for &u in &[
            -40.0f64, -25.0, -3.0, -1e-9, 0.0, 1e-9, 0.7, 25.0, 40.0, 400.0,
        ] {
            let direct = (1.0 - u.tanh().powi(2)).ln();
            let s = log1m_tanh2(u);
            assert!(s.is_finite());
            if direct.is_finite() && direct > -30.0 {
                assert!((s - direct).abs() < 1e-12, "u = {u}");
            }
            let h = half_tanh_p1(u);
            assert!((0.0..=1.0).contains(&h));
            assert!((h - (1.0 + u.tanh()) / 2.0).abs() < 1e-15);
        }
        assert!((log1m_tanh2(25.0) - (2.0 * LN_2 - 50.0)).abs() < 1e-12);
        assert_eq!(softplus(-1000.0), 0.0);
        assert_eq!(softplus(1000.0), 1000.0);
    }
}
