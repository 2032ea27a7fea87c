//! The reverse linear recurrence behind every return and advantage:
//!
//! ```text
//! y[t] = x[t] + c[t] * y[t + 1],      y[n] = carry
//! ```
//!
//! Discounted returns use `x = r (+ gamma * bootstrap at an end)`,
//! `c = gamma * (1 - end)`; GAE uses `x = delta`, `c = gamma * lam * (1 - end)`.
//! Everything is `f64`.

/// Independent chains interleaved by [`scan_rev_inplace`].
const LANES: usize = 8;
/// Below this length the scan runs as one serial chain.
const LANE_MIN: usize = 256;

/// `y[t] = x[t] + c[t] * y[t+1]` for `t = n-1 .. 0`, with `y[n] = carry`,
/// computed in place over `xy` (which holds `x` on entry and `y` on exit).
/// Returns `y[0]` (or `carry` when empty).
///
/// One serial chain costs a multiply-add latency per step. Longer inputs are
/// cut into [`LANES`] segments scanned together with zero carry (independent
/// chains, so the core overlaps them), also tracking the running product of
/// `c`; then each segment's true carry follows right to left and is added as
/// `y += prod * carry` (a vectorised pass). The segment split depends only on
/// `n`, so the result is deterministic.
pub fn scan_rev_inplace(xy: &mut [f64], c: &[f64], carry: f64) -> f64 {
    scan_rev_with(xy, c, carry, &mut Vec::new())
}

/// [`scan_rev_inplace`] with caller-owned scratch for the running products
/// (grown as needed, never shrunk), so repeated scans do not allocate.
pub fn scan_rev_with(xy: &mut [f64], c: &[f64], carry: f64, scratch: &mut Vec<f64>) -> f64 {
    let n = xy.len().min(c.len());
    if n < LANE_MIN {
        return scan_serial(&mut xy[..n], &c[..n], carry);
    }
    let m = n / LANES;
    let r0 = n - LANES * m;
    if scratch.len() < LANES * m {
        scratch.resize(LANES * m, 0.0);
    }
    let p = &mut scratch[..LANES * m];
    {
        let (_, body) = xy[..n].split_at_mut(r0);
        let cb = &c[r0..n];
        let mut acc = [0.0f64; LANES];
        let mut prod = [1.0f64; LANES];
        for k in (0..m).rev() {
            for l in 0..LANES {
                let i = l * m + k;
                acc[l] = body[i] + cont(cb[i], acc[l]);
                prod[l] *= cb[i];
                body[i] = acc[l];
                p[i] = prod[l];
            }
        }
        let mut cin = carry;
        for l in (0..LANES).rev() {
            let seg = &mut body[l * m..(l + 1) * m];
            let ps = &p[l * m..(l + 1) * m];
            seg.iter_mut()
                .zip(ps)
                .for_each(|(y, &q)| *y += cont(q, cin));
            cin = seg[0];
        }
        if r0 == 0 {
            return cin;
        }
        scan_serial(&mut xy[..r0], &c[..r0], cin)
    }
}

/// The affine map `y[0] = head + factor * carry` of a segment, without
/// storing `y`: the same lane-interleaved chains as [`scan_rev_inplace`].
pub fn affine_rev(x: &[f64], c: &[f64]) -> Carry {
    let n = x.len().min(c.len());
    let (m, r0) = if n < LANE_MIN {
        (0, n)
    } else {
        (n / LANES, n - LANES * (n / LANES))
    };
    let mut head = 0.0f64;
    let mut factor = 1.0f64;
    if m > 0 {
        let (xb, cb) = (&x[r0..n], &c[r0..n]);
        let mut acc = [0.0f64; LANES];
        let mut prod = [1.0f64; LANES];
        for k in (0..m).rev() {
            for l in 0..LANES {
                let i = l * m + k;
                acc[l] = xb[i] + cont(cb[i], acc[l]);
                prod[l] *= cb[i];
            }
        }
        for l in (0..LANES).rev() {
            head = acc[l] + cont(prod[l], head);
            factor *= prod[l];
        }
    }
    for i in (0..r0).rev() {
        head = x[i] + cont(c[i], head);
        factor *= c[i];
    }
    Carry { head, factor }
}

#[inline]
fn scan_serial(xy: &mut [f64], c: &[f64], carry: f64) -> f64 {
    let mut acc = carry;
    for (y, &k) in xy.iter_mut().zip(c.iter()).rev() {
        acc = *y + cont(k, acc);
        *y = acc;
    }
    acc
}

/// `c * y`, but exactly 0 when `c == 0`: an episode end stops the chain even
/// if what follows is NaN or inf (with `check_finite=False`), so a bad value
/// never leaks into an earlier, independent episode.
#[inline(always)]
pub fn cont(c: f64, y: f64) -> f64 {
    if c == 0.0 {
        0.0
    } else {
        c * y
    }
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
        self.head + cont(self.factor, carry)
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
    fn lanes_agree_with_one_chain() {
        for &n in &[255usize, 256, 257, 1000, 4099, 20000] {
            let x: Vec<f64> = (0..n)
                .map(|i| ((i * 7919) % 113) as f64 * 0.01 - 0.5)
                .collect();
            let c: Vec<f64> = (0..n)
                .map(|i| if i % 97 == 0 { 0.0 } else { 0.99 })
                .collect();
            let mut a = x.clone();
            let mut b = x.clone();
            let ya = scan_rev_inplace(&mut a, &c, 2.5);
            let yb = scan_serial(&mut b, &c, 2.5);
            assert!((ya - yb).abs() < 1e-12);
            for i in 0..n {
                assert!(
                    (a[i] - b[i]).abs() <= 1e-12 * b[i].abs().max(1.0),
                    "n={n} i={i}"
                );
            }
        }
    }

    #[test]
    fn affine_map_matches_scan() {
        for &n in &[0usize, 7, 300, 5000] {
            let x: Vec<f64> = (0..n).map(|i| (i % 13) as f64 - 6.0).collect();
            let mut c: Vec<f64> = vec![0.999; n];
            let a = affine_rev(&x, &c);
            let mut y = x.clone();
            let full = scan_rev_inplace(&mut y, &c, 1.25);
            assert!(
                (a.apply(1.25) - full).abs() <= 1e-9 * full.abs().max(1.0),
                "n={n}"
            );
            if n > 10 {
                c[n / 2] = 0.0;
                assert_eq!(affine_rev(&x, &c).factor, 0.0);
            }
        }
    }

    #[test]
    fn an_end_stops_nan() {
        for n in [5usize, 3000] {
            let mut x = vec![1.0; n];
            x[n - 1] = f64::NAN;
            let mut c = vec![0.5; n];
            c[n - 2] = 0.0;
            scan_rev_inplace(&mut x, &c, f64::INFINITY);
            assert!(x[n - 1].is_nan());
            assert!(x[..n - 1].iter().all(|v| v.is_finite()));
        }
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
