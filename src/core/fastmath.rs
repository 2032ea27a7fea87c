//! Elementary functions written so that loops over them vectorise: no libm
//! call, no data-dependent branch (the edge cases are selects).

/// `e^x` in `f64`, within a few ulp of the correctly rounded result.
///
/// Range reduction `x = k ln 2 + r`, `|r| <= ln 2 / 2` (Cody and Waite's
/// two-part `ln 2`), a degree-13 Taylor polynomial for `e^r` (truncation
/// below 1e-17 relative, evaluated by Estrin's scheme), then scaling by `2^k` through the exponent bits.
/// `x > ln(f64::MAX)` gives `inf`, `x < -708` gives `0` (the true value is
/// below 3.4e-308), NaN gives NaN.
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    // 1.5 * 2^52: adding it rounds to an integer held in the low mantissa bits.
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    const INV_LN2: f64 = std::f64::consts::LOG2_E;
    // ln 2 split so that k * LN2_HI is exact for |k| < 2^20.
    const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
    const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);
    const HI: f64 = 709.782_712_893_384;
    const LO: f64 = -708.0;
    const C: [f64; 14] = {
        let mut c = [1.0f64; 14];
        let mut i = 1;
        while i < 14 {
            c[i] = c[i - 1] / i as f64;
            i += 1;
        }
        c
    };
    // A NaN passes through the clamp.
    let xc = x.clamp(LO, HI);
    let s = xc * INV_LN2 + SHIFT;
    let k = s - SHIFT;
    let r = (xc - k * LN2_HI) - k * LN2_LO;
    // Estrin's scheme: a shallow dependency tree instead of Horner's chain
    // of 26, so one element's operations overlap.
    let r2 = r * r;
    let r4 = r2 * r2;
    let r8 = r4 * r4;
    let q0 = (C[0] + C[1] * r) + (C[2] + C[3] * r) * r2;
    let q1 = (C[4] + C[5] * r) + (C[6] + C[7] * r) * r2;
    let q2 = (C[8] + C[9] * r) + (C[10] + C[11] * r) * r2;
    let q3 = C[12] + C[13] * r;
    let p = (q0 + q1 * r4) + (q2 + q3 * r4) * r8;
    // k in [-1021, 1024]: scale by 2 * 2^(k-1) so the exponent field stays normal.
    let ki = (s.to_bits() as i64).wrapping_sub(SHIFT.to_bits() as i64);
    let scale = f64::from_bits(((ki + 1022) as u64) << 52);
    let y = (p + p) * scale;
    if x > HI {
        f64::INFINITY
    } else if x < LO {
        0.0
    } else {
        y
    }
}

/// Tests switch the wide path off to compare it with the baseline one.
static WIDE_OFF: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

/// Force the baseline (SSE2) path on or off; for tests comparing paths.
pub fn set_wide_off(off: bool) {
    WIDE_OFF.store(off, std::sync::atomic::Ordering::Relaxed);
}

/// Whether to take the AVX2 copy of a hot loop: the CPU has AVX2 and tests
/// have not switched it off.
///
/// Kernels keep their hot loop in an `#[inline(always)]` function and add a
/// `#[target_feature(enable = "avx2")]` wrapper around it, which gets 4-wide
/// vectors. Only AVX2 is enabled, never FMA: every operation rounds exactly
/// as on the baseline path, so the results are bit-identical either way.
#[inline]
pub fn wide_ok() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        !WIDE_OFF.load(std::sync::atomic::Ordering::Relaxed)
            && std::arch::is_x86_feature_detected!("avx2")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exp_is_within_a_few_ulp_of_std() {
        // std's exp (the platform libm) as the reference.
        let mut worst = 0.0f64;
        let mut x = -707.9;
        while x < 709.7 {
            for d in [0.0, 1e-9, 0.123_456_789, 0.5 * std::f64::consts::LN_2] {
                let v = x + d;
                let (a, b) = (exp(v), v.exp());
                worst = worst.max(((a - b) / b).abs());
            }
            x += 0.0137;
        }
        for v in [0.0, 1e-300, -1e-300, 1e-12, -0.5, 0.3465, -0.3466, 1.0, 2.0] {
            let (a, b) = (exp(v), v.exp());
            worst = worst.max(((a - b) / b).abs());
        }
        assert!(worst < 4.0 * f64::EPSILON, "worst relative error {worst}");
        assert_eq!(exp(0.0), 1.0);
        assert_eq!(exp(710.0), f64::INFINITY);
        assert_eq!(exp(f64::INFINITY), f64::INFINITY);
        assert_eq!(exp(-709.0), 0.0);
        assert_eq!(exp(f64::NEG_INFINITY), 0.0);
        assert!(exp(f64::NAN).is_nan());
        assert!((exp(709.78) - 709.78f64.exp()).abs() / 709.78f64.exp() < 4.0 * f64::EPSILON);
    }
}
