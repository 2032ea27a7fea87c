//! The storage float types the kernels accept.

/// A storage float: `f32` or `f64`. Kernels widen every element to `f64`,
/// compute in `f64`, and round once when they store a result.
pub trait Real: Copy + Send + Sync + PartialEq + PartialOrd + std::fmt::Debug + 'static {
    /// Short dtype name, used in messages.
    const NAME: &'static str;
    /// Widen to `f64` (exact for both types).
    fn to_f64(self) -> f64;
    /// Round an `f64` to this type (round-to-nearest-even).
    fn from_f64(x: f64) -> Self;
    /// `true` unless NaN or +-inf.
    #[inline(always)]
    fn finite(self) -> bool {
        self.to_f64().is_finite()
    }
}

impl Real for f32 {
    const NAME: &'static str = "float32";
    #[inline(always)]
    fn to_f64(self) -> f64 {
        self as f64
    }
    #[inline(always)]
    fn from_f64(x: f64) -> Self {
        x as f32
    }
    #[inline(always)]
    fn finite(self) -> bool {
        self.is_finite()
    }
}

impl Real for f64 {
    const NAME: &'static str = "float64";
    #[inline(always)]
    fn to_f64(self) -> f64 {
        self
    }
    #[inline(always)]
    fn from_f64(x: f64) -> Self {
        x
    }
    #[inline(always)]
    fn finite(self) -> bool {
        self.is_finite()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip_is_single_rounding() {
        let x = 0.1f64 + 0.2f64;
        assert_eq!(f32::from_f64(x), x as f32);
        assert_eq!(f64::from_f64(x), x);
        assert!(!f32::NAN.finite());
        assert!(!f64::INFINITY.finite());
        assert!(1.0f32.finite());
    }
}
