//! Counter-based random streams: every draw is a pure function of
//! `(seed, row, counter)`, so a row's samples do not depend on which thread
//! or block computes them, or on how many rows come before it in a chunk.
//!
//! The generator is SplitMix64 (Steele, Lea and Flood 2014): the key of row
//! `i` is a hash of `(seed, i)`, and draw `c` of that row is the SplitMix64
//! output at position `c` of the sequence that starts at the key.

const GOLDEN: u64 = 0x9e37_79b9_7f4a_7c15;

/// The SplitMix64 finaliser (a bijective 64-bit mixer).
#[inline(always)]
pub fn mix64(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// The draws of one row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stream {
    key: u64,
}

impl Stream {
    /// The stream of row `row` under `seed`.
    #[inline]
    pub fn new(seed: u64, row: u64) -> Stream {
        let k = mix64(seed ^ 0x5ca1_ab1e_0dd5_eed5);
        Stream {
            key: mix64(k ^ mix64(row.wrapping_add(GOLDEN))),
        }
    }

    /// Draw number `counter`, 64 uniform bits.
    #[inline]
    pub fn bits(&self, counter: u64) -> u64 {
        mix64(
            self.key
                .wrapping_add(counter.wrapping_add(1).wrapping_mul(GOLDEN)),
        )
    }

    /// Draw `counter` as a uniform double in `[0, 1)` (53 random bits).
    #[inline]
    pub fn uniform(&self, counter: u64) -> f64 {
        (self.bits(counter) >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Standard normals number `2p` and `2p + 1` (Box-Muller on draws `2p`
    /// and `2p + 1`).
    #[inline]
    pub fn normal_pair(&self, p: u64) -> (f64, f64) {
        // 1 - u is in (0, 1]: the logarithm is finite.
        let u1 = 1.0 - self.uniform(2 * p);
        let u2 = self.uniform(2 * p + 1);
        let r = (-2.0 * u1.ln()).sqrt();
        let (s, c) = (std::f64::consts::TAU * u2).sin_cos();
        (r * c, r * s)
    }

    /// Standard normal number `j` of the row.
    #[inline]
    pub fn normal(&self, j: u64) -> f64 {
        let (a, b) = self.normal_pair(j / 2);
        if j % 2 == 0 {
            a
        } else {
            b
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streams_are_pure_and_distinct() {
        let a = Stream::new(7, 3);
        assert_eq!(a.bits(5), Stream::new(7, 3).bits(5));
        assert_ne!(a.bits(0), Stream::new(8, 3).bits(0));
        assert_ne!(a.bits(0), Stream::new(7, 4).bits(0));
        assert_ne!(a.bits(0), a.bits(1));
        let (n0, n1) = a.normal_pair(2);
        assert_eq!(a.normal(4), n0);
        assert_eq!(a.normal(5), n1);
    }

    #[test]
    fn uniform_moments() {
        let n = 200_000;
        let (mut s, mut q) = (0.0, 0.0);
        for i in 0..n {
            let u = Stream::new(1, i).uniform(0);
            assert!((0.0..1.0).contains(&u));
            s += u;
            q += u * u;
        }
        let m = s / n as f64;
        assert!((m - 0.5).abs() < 0.005);
        assert!((q / n as f64 - m * m - 1.0 / 12.0).abs() < 0.002);
        let (mut s, mut q) = (0.0, 0.0);
        for i in 0..n {
            let z = Stream::new(2, i / 4).normal(i % 4);
            s += z;
            q += z * z;
        }
        assert!((s / n as f64).abs() < 0.01);
        assert!((q / n as f64 - 1.0).abs() < 0.02);
    }
}
