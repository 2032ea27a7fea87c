//! Fast finiteness scans (the `check_finite=True` pass).

use super::float::Real;
use super::par::Par;
use ndarray::ArrayView1;

/// `true` when every element is finite. Branch-free: the sum of `x * 0` is
/// exactly zero for finite `x` and NaN as soon as one element is NaN or inf,
/// so the loop vectorises instead of stopping at each element.
pub fn all_finite<F: Real>(s: &[F]) -> bool {
    let mut acc = [0.0f64; 8];
    let chunks = s.chunks_exact(8);
    let rem = chunks.remainder();
    for ch in chunks {
        for k in 0..8 {
            acc[k] += ch[k].to_f64() * 0.0;
        }
    }
    let mut t: f64 = acc.iter().sum();
    for x in rem {
        t += x.to_f64() * 0.0;
    }
    t == 0.0
}

const CHUNK: usize = 1 << 16;

/// Index of the first non-finite element of a slice, scanning fixed chunks
/// in parallel (the chunking never depends on the thread count).
pub fn first_non_finite_slice<F: Real>(sl: &[F], par: Par) -> Option<usize> {
    let starts: Vec<usize> = (0..sl.len()).step_by(CHUNK).collect();
    let found = par.map(starts, |s0| {
        let ch = &sl[s0..(s0 + CHUNK).min(sl.len())];
        if all_finite(ch) {
            None
        } else {
            ch.iter().position(|x| !x.finite()).map(|k| s0 + k)
        }
    });
    found.into_iter().flatten().next()
}

/// Index (logical order) of the first non-finite element of any view.
pub fn first_non_finite_any<F: Real, D: ndarray::Dimension>(
    a: &ndarray::ArrayView<'_, F, D>,
    par: Par,
) -> Option<usize> {
    match a.as_slice() {
        Some(sl) => first_non_finite_slice(sl, par),
        None => a.iter().position(|x| !x.finite()),
    }
}

/// Index of the first non-finite element of a 1-D view.
pub fn first_non_finite_1d<F: Real>(a: &ArrayView1<'_, F>, par: Par) -> Option<usize> {
    first_non_finite_any(a, par)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array1;

    #[test]
    fn finds_first_bad_element() {
        let mut x = Array1::<f32>::zeros(3 * CHUNK + 5);
        assert!(all_finite(x.as_slice().unwrap()));
        assert_eq!(first_non_finite_1d(&x.view(), Par::Rayon), None);
        x[2 * CHUNK + 3] = f32::INFINITY;
        x[3 * CHUNK + 4] = f32::NAN;
        assert!(!all_finite(x.as_slice().unwrap()));
        assert_eq!(
            first_non_finite_1d(&x.view(), Par::Rayon),
            Some(2 * CHUNK + 3)
        );
        assert_eq!(
            first_non_finite_1d(&x.slice(ndarray::s![..;-1]), Par::Seq),
            Some(0)
        );
        let y = Array1::from(vec![1.0f64, -0.0, f64::MAX]);
        assert!(all_finite(y.as_slice().unwrap()));
    }
}
