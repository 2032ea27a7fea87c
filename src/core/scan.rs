//! The reverse linear recurrence behind every return and advantage:
//!
//! ```text
//! y[t] = x[t] + c[t] * y[t + 1],      y[n] = carry
//! ```
//!
//! Discounted returns use `x = r (+ gamma * bootstrap at an end)`,
//! `c = gamma * (1 - end)`; GAE uses `x = delta`, `c = gamma * lam * (1 - end)`.
//! Everything is `f64`.

/// `y[t] = x[t] + c[t] * y[t+1]` for `t = n-1 .. 0`, with `y[n] = carry`,
/// computed in place over `xy` (which holds `x` on entry and `y` on exit).
/// Returns `y[0]` (or `carry` when empty).
#[inline]
pub fn scan_rev_inplace(xy: &mut [f64], c: &[f64], carry: f64) -> f64 {
    debug_assert_eq!(xy.len(), c.len());
    let mut acc = carry;
    for (y, &k) in xy.iter_mut().zip(c.iter()).rev() {
        acc = *y + k * acc;
        *y = acc;
    }
    acc
}

/// The affine map a segment applies to the carry entering it from the right:
/// `y[0] = head + factor * carry`. Combining segments right to left gives the
/// carry of every segment without rescanning the ones in between.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Carry {
    /// `y[0]` of the segment computed with a zero carry.
    pub head: f64,
    /// The product of `c` over the segment (0 once any step ends an episode).
    pub factor: f64,
}

impl Carry {
    /// The first output of the segment when `carry` enters at its right end.
    #[inline]
    pub fn apply(self, carry: f64) -> f64 {
        self.head + self.factor * carry
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn matches_definition() {
        let x = [1.0, 2.0, 3.0];
        let c = [0.5, 0.0, 0.5];
        let mut y = x;
        let y0 = scan_rev_inplace(&mut y, &c, 10.0);
        // y2 = 3 + 0.5*10 = 8; y1 = 2 + 0 * 8 = 2; y0 = 1 + 0.5*2 = 2
        assert_eq!(y, [2.0, 2.0, 8.0]);
        assert_eq!(y0, 2.0);
        let mut e: [f64; 0] = [];
        assert_eq!(scan_rev_inplace(&mut e, &[], 4.0), 4.0);
    }

    #[test]
    fn carry_composition_is_affine() {
        let x = [1.0, -2.0, 0.25];
        let c = [0.9, 0.8, 0.7];
        let mut y0 = x;
        let head = scan_rev_inplace(&mut y0, &c, 0.0);
        let factor: f64 = c.iter().product();
        let mut y1 = x;
        let full = scan_rev_inplace(&mut y1, &c, 3.0);
        assert!((Carry { head, factor }.apply(3.0) - full).abs() < 1e-15);
    }
}
