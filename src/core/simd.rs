//! Which vector unit the loops run with, chosen once per process.
//!
//! Kernels are written as plain generic Rust over `f64` (arrays of 8, loops
//! with constant trip counts) so LLVM vectorises them; [`dispatch`] compiles a
//! kernel a second and third time with AVX2 + FMA and with AVX-512 enabled and
//! runs the widest one this CPU has. A kernel that wants fused multiply-adds
//! takes `const FMA: bool` and calls [`madd`]: `true` only on the wide
//! builds, where the instruction exists (elsewhere `mul_add` would be a libm
//! call). So one machine always runs the same instructions: results never
//! depend on the thread count, only, in the last bit, on the CPU.

use std::sync::atomic::{AtomicU8, Ordering};

/// The instruction set the loops run with on this CPU.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Isa {
    /// Baseline of the target (SSE2 on x86-64).
    Base,
    /// AVX2 and FMA.
    Avx2,
    /// AVX-512F (with AVX2 and FMA).
    Avx512,
}

/// The widest [`Isa`] of this CPU (detected once, then cached).
pub fn isa() -> Isa {
    static ISA: AtomicU8 = AtomicU8::new(0);
    match ISA.load(Ordering::Relaxed) {
        1 => Isa::Base,
        2 => Isa::Avx2,
        3 => Isa::Avx512,
        _ => {
            let found = detect();
            let code = match found {
                Isa::Base => 1,
                Isa::Avx2 => 2,
                Isa::Avx512 => 3,
            };
            ISA.store(code, Ordering::Relaxed);
            found
        }
    }
}

fn detect() -> Isa {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            if std::is_x86_feature_detected!("avx512f") {
                return Isa::Avx512;
            }
            return Isa::Avx2;
        }
    }
    Isa::Base
}

/// `a * b + c`, fused (one rounding) when `FMA`.
#[inline(always)]
pub fn madd<const FMA: bool>(a: f64, b: f64, c: f64) -> f64 {
    if FMA {
        a.mul_add(b, c)
    } else {
        a * b + c
    }
}

/// A kernel that [`dispatch`] can compile per instruction set. `run` must be
/// `#[inline(always)]` (and so must what it calls in its hot loop), so that
/// its body is compiled inside the feature-enabled wrappers.
pub trait Kernel {
    /// What the kernel returns.
    type Output;
    /// The kernel's body; `FMA` says whether fused multiply-adds exist.
    fn run<const FMA: bool>(self) -> Self::Output;
}

/// Run `k` compiled for the widest vector unit of this CPU.
#[inline(always)]
pub fn dispatch<K: Kernel>(k: K) -> K::Output {
    #[cfg(target_arch = "x86_64")]
    {
        #[target_feature(enable = "avx2,fma")]
        fn avx2<K: Kernel>(k: K) -> K::Output {
            k.run::<true>()
        }
        #[target_feature(enable = "avx512f,avx2,fma")]
        fn avx512<K: Kernel>(k: K) -> K::Output {
            k.run::<true>()
        }
        match isa() {
            // SAFETY: calling a `target_feature` function is sound when the
            // CPU has those features, and `isa()` found them on this CPU.
            Isa::Avx512 => return unsafe { avx512(k) },
            // SAFETY: as above.
            Isa::Avx2 => return unsafe { avx2(k) },
            Isa::Base => {}
        }
    }
    k.run::<false>()
}

/// A closure as a [`Kernel`] (see [`wide`]).
struct Closure<C>(C);

impl<R, C: FnOnce() -> R> Kernel for Closure<C> {
    type Output = R;
    #[inline(always)]
    fn run<const FMA: bool>(self) -> R {
        (self.0)()
    }
}

/// Run `f` through [`dispatch`]: `f` (which must be `#[inline(always)]`) and
/// what it inlines are compiled for the widest vector unit of this CPU. It
/// gets no `FMA` parameter: plain arithmetic rounds the same on every unit,
/// and the kernels it calls dispatch their own fused multiply-adds.
#[inline(always)]
pub fn wide<R>(f: impl FnOnce() -> R) -> R {
    dispatch(Closure(f))
}

/// Eight `f64` lanes. Every operation is a loop of constant length 8 over
/// aligned arrays, which LLVM turns into one AVX-512 or two AVX2 (four SSE2)
/// instructions; kernels built from these vectorise reliably where the same
/// arithmetic on scalars often does not.
#[derive(Clone, Copy, Debug, PartialEq)]
#[repr(align(64))]
pub struct F64x8(pub [f64; 8]);

impl F64x8 {
    /// All lanes `a`.
    #[inline(always)]
    pub fn splat(a: f64) -> Self {
        F64x8([a; 8])
    }

    /// `self * b + c` per lane (fused when `FMA`).
    #[inline(always)]
    pub fn madd<const FMA: bool>(self, b: Self, c: Self) -> Self {
        let mut o = [0.0; 8];
        for (j, v) in o.iter_mut().enumerate() {
            *v = madd::<FMA>(self.0[j], b.0[j], c.0[j]);
        }
        F64x8(o)
    }

    /// Per lane: 0 where finite, NaN where NaN or infinite.
    #[inline(always)]
    pub fn finite_marks(self) -> Self {
        let mut o = [0.0; 8];
        for (v, &x) in o.iter_mut().zip(&self.0) {
            *v = finite_mark(x);
        }
        F64x8(o)
    }

    /// Whether every lane is 0: for summed [`F64x8::finite_marks`], whether
    /// every value marked was finite.
    #[inline(always)]
    pub fn all_zero(self) -> bool {
        self.0.iter().all(|&m| m == 0.0)
    }

    /// Lanes moved down by `D`: lane `j` gets lane `j + D`, the top `D` lanes 0.
    #[inline(always)]
    pub fn shift<const D: usize>(self) -> Self {
        let mut o = [0.0; 8];
        o[..8 - D].copy_from_slice(&self.0[D..]);
        F64x8(o)
    }
}

impl std::ops::Add for F64x8 {
    type Output = Self;
    #[inline(always)]
    fn add(self, b: Self) -> Self {
        let mut o = [0.0; 8];
        for (v, (&x, &y)) in o.iter_mut().zip(self.0.iter().zip(&b.0)) {
            *v = x + y;
        }
        F64x8(o)
    }
}

/// 0 when `x` is finite, NaN when it is NaN or infinite (`x - x`).
#[inline(always)]
#[allow(clippy::eq_op)]
pub fn finite_mark(x: f64) -> f64 {
    x - x
}

#[cfg(test)]
mod tests {
    use super::*;

    struct Dot<'a>(&'a [f64], &'a [f64]);
    impl Kernel for Dot<'_> {
        type Output = f64;
        #[inline(always)]
        fn run<const FMA: bool>(self) -> f64 {
            self.0
                .iter()
                .zip(self.1)
                .fold(0.0, |s, (&a, &b)| madd::<FMA>(a, b, s))
        }
    }

    #[test]
    fn dispatch_runs_the_kernel() {
        let a: Vec<f64> = (0..100).map(|i| i as f64 * 0.5).collect();
        let b: Vec<f64> = (0..100).map(|i| 1.0 - i as f64 * 0.01).collect();
        let want: f64 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
        let got = dispatch(Dot(&a, &b));
        assert!((got - want).abs() <= 1e-12 * want.abs());
        // the detection is stable
        assert_eq!(isa(), isa());
    }

    #[test]
    fn lanes_shift_and_mark() {
        let x = F64x8([1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0]);
        assert_eq!(x.shift::<1>().0, [2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 0.0]);
        assert_eq!(x.shift::<4>().0, [5.0, 6.0, 7.0, 8.0, 0.0, 0.0, 0.0, 0.0]);
        let y = F64x8([0.0, f64::INFINITY, -1.0, f64::NAN, 0.0, 0.0, 0.0, 1e308]);
        assert!(!y.finite_marks().all_zero() && x.finite_marks().all_zero());
        let m = y.finite_marks().0;
        assert!(m[1].is_nan() && m[3].is_nan());
        assert!(m
            .iter()
            .enumerate()
            .all(|(j, v)| j == 1 || j == 3 || *v == 0.0));
        assert_eq!((x + x).0[7], 16.0);
    }
}
