//! Action heads: log-probabilities, entropies, KL divergences, score functions
//! and seeded sampling for categorical, diagonal Gaussian and tanh-squashed
//! Gaussian policies.
//!
//! Every argument is a view `[batch..., K]` (a *row* per batch index, `K`
//! actions or action dimensions along the last axis) or `[batch...]` (one value
//! per row), of any strides, any number of batch axes (zero included). The
//! kernels:
//!
//! * fold the batch axes into as few axes as every argument's strides allow
//!   (one, for any C-contiguous input), never copying;
//! * cut the rows into blocks of about [`BLOCK_ELEMS`] elements at fixed,
//!   data-defined boundaries; a block is the unit of parallel work;
//! * gather a block column by column into column-major `f64` scratch, so the
//!   per-row loops (max, sums, `exp`) run across rows and vectorise for any
//!   `K`, and every per-row sum adds its terms in column order whatever the
//!   blocking: results are bit-identical for any thread count;
//! * report the first offending row (in C order of the batch axes) as an
//!   [`At::Flat`] row or an [`At::RowCol`] element; the binding layer turns
//!   the row back into the caller's batch index.
//!
//! Sampling uses the counter-based streams of [`rng`]: row `i` draws from a
//! stream keyed by `(seed, i)`, so samples never depend on blocking or threads.

pub mod categorical;
pub mod gaussian;
pub mod math;
pub mod rng;
pub mod squashed;

use super::error::{CoreError, CoreResult};
use super::float::Real;
use super::par::Par;
use ndarray::{ArrayView1, ArrayViewD, ArrayViewMutD, Axis};

pub use super::error::At;

/// Target number of elements (rows x K) in one block of rows.
pub const BLOCK_ELEMS: usize = 2048;

/// Per-thread `f64` scratch reused from block to block, so the row loops do
/// not allocate or clear memory: a [`Buf`] comes from the pool with stale
/// contents (every kernel writes a value before reading it) and goes back on
/// drop.
pub(crate) struct Buf {
    v: Vec<f64>,
    len: usize,
}

thread_local! {
    static POOL: std::cell::RefCell<Vec<Vec<f64>>> = const { std::cell::RefCell::new(Vec::new()) };
}

impl Buf {
    /// `n` values left from an earlier use.
    pub(crate) fn stale(n: usize) -> Buf {
        let mut v = POOL
            .try_with(|p| p.borrow_mut().pop())
            .ok()
            .flatten()
            .unwrap_or_default();
        if v.len() < n {
            v.resize(n, 0.0);
        }
        Buf { v, len: n }
    }

    /// `n` copies of `x`.
    pub(crate) fn filled(n: usize, x: f64) -> Buf {
        let mut b = Buf::stale(n);
        b.fill(x);
        b
    }
}

impl std::ops::Deref for Buf {
    type Target = [f64];
    fn deref(&self) -> &[f64] {
        &self.v[..self.len]
    }
}

impl std::ops::DerefMut for Buf {
    fn deref_mut(&mut self) -> &mut [f64] {
        &mut self.v[..self.len]
    }
}

impl Drop for Buf {
    fn drop(&mut self) {
        let v = std::mem::take(&mut self.v);
        let _ = POOL.try_with(|p| {
            let mut p = p.borrow_mut();
            if p.len() < 64 {
                p.push(v);
            }
        });
    }
}

/// A view that can be folded and cut into blocks of rows without copying.
pub(crate) trait Blocks: Sized {
    fn shape_(&self) -> &[usize];
    fn insert0(self) -> Self;
    /// Merge axis `take` into `take + 1` (C order) and drop it.
    fn merge(self, take: usize) -> Self;
    fn split0(self, at: usize) -> (Self, Self);
    fn drop0(self) -> Self;
}

macro_rules! impl_blocks {
    ($t:ident) => {
        impl<'a, T> Blocks for $t<'a, T> {
            fn shape_(&self) -> &[usize] {
                self.shape()
            }
            fn insert0(self) -> Self {
                self.insert_axis(Axis(0))
            }
            fn merge(mut self, take: usize) -> Self {
                let merged = self.merge_axes(Axis(take), Axis(take + 1));
                debug_assert!(merged, "fold plan promised a mergeable pair of axes");
                self.index_axis_move(Axis(take), 0)
            }
            fn split0(self, at: usize) -> (Self, Self) {
                self.split_at(Axis(0), at)
            }
            fn drop0(self) -> Self {
                self.index_axis_move(Axis(0), 0)
            }
        }
    };
}
impl_blocks!(ArrayViewD);
impl_blocks!(ArrayViewMutD);

/// How the rows of one call are folded and cut into blocks. Every argument of
/// the call goes through the same [`Layout::split`], so block `b` of every
/// argument covers the same rows.
#[derive(Debug, Clone)]
pub(crate) struct Layout {
    /// Batch axes before folding.
    nb: usize,
    /// Axes merged into their successor, in order of application.
    merges: Vec<usize>,
    /// Batch axes after folding (at least 1).
    nb_folded: usize,
    /// Rows per block along the last folded batch axis.
    per_block: usize,
    /// Total number of rows.
    pub rows: usize,
    /// Total number of elements, rows x K.
    pub work: usize,
}

impl Layout {
    /// `batch` is the common batch shape, `k` the row length, `strides` the
    /// strides of every argument (only the first `batch.len()` are read).
    pub(crate) fn new(batch: &[usize], k: usize, strides: &[&[isize]]) -> Layout {
        let nb = batch.len();
        let rows: usize = batch.iter().product();
        let mut shape = batch.to_vec();
        let mut st: Vec<Vec<isize>> = strides.iter().map(|s| s[..nb].to_vec()).collect();
        let mut merges = Vec::new();
        if rows > 0 {
            let mut into = nb.saturating_sub(1);
            while into > 0 {
                let take = into - 1;
                let (lt, li) = (shape[take], shape[into]);
                let ok = st
                    .iter()
                    .all(|s| lt <= 1 || li <= 1 || s[take] == s[into] * li as isize);
                if ok {
                    for s in st.iter_mut() {
                        if li <= 1 {
                            s[into] = s[take];
                        }
                        s.remove(take);
                    }
                    shape[into] = lt * li;
                    shape.remove(take);
                    merges.push(take);
                }
                into -= 1;
            }
        }
        let last = shape.last().copied().unwrap_or(1);
        // A multiple of 8 rows when a block holds that many: the row-group
        // kernels then have no padded group but in the last block.
        let per_block = match BLOCK_ELEMS / k.max(1) {
            r if r >= 8 => r / 8 * 8,
            r => r,
        };
        Layout {
            nb,
            merges,
            nb_folded: shape.len().max(1),
            per_block: per_block.clamp(1, last.max(1)),
            rows,
            work: rows * k.max(1),
        }
    }

    /// Fold `v` and cut it into blocks of rows (each with one batch axis).
    pub(crate) fn split<V: Blocks>(&self, v: V) -> Vec<V> {
        let mut v = if self.nb == 0 { v.insert0() } else { v };
        for &t in &self.merges {
            v = v.merge(t);
        }
        let mut out = Vec::new();
        if self.rows > 0 {
            split_into(v, self.nb_folded, self.per_block, &mut out);
        }
        out
    }

    /// [`Layout::split`] of an optional argument: `None` for every block.
    pub(crate) fn split_opt<V: Blocks>(&self, v: Option<V>, n: usize) -> Vec<Option<V>> {
        match v {
            Some(v) => self.split(v).into_iter().map(Some).collect(),
            None => (0..n).map(|_| None).collect(),
        }
    }

    /// The parallelism for this much work.
    pub(crate) fn par(&self, par: Par) -> Par {
        Par::for_work(self.work, par == Par::Rayon)
    }
}

fn split_into<V: Blocks>(v: V, nb: usize, c: usize, out: &mut Vec<V>) {
    let mut v = v;
    if nb == 1 {
        while v.shape_()[0] > c {
            let (a, b) = v.split0(c);
            out.push(a);
            v = b;
        }
        out.push(v);
    } else {
        while v.shape_()[0] > 0 {
            let (a, b) = v.split0(1);
            split_into(a.drop0(), nb - 1, c, out);
            v = b;
        }
    }
}

/// The first row offset of every block, from the row counts of the blocks.
pub(crate) fn row_starts(lens: impl Iterator<Item = usize>) -> Vec<usize> {
    let mut acc = 0;
    lens.map(|n| {
        let s = acc;
        acc += n;
        s
    })
    .collect()
}

/// The first error in block order (blocks are in row order).
pub(crate) fn first_error(results: Vec<CoreResult<()>>) -> CoreResult<()> {
    results.into_iter().collect()
}

/// `got` must equal `want`.
pub(crate) fn same_shape(
    a: &str,
    got: &[usize],
    b: &str,
    want: &[usize],
    need: &str,
) -> CoreResult<()> {
    if got != want {
        return Err(CoreError::shape_mismatch(a, got, b, want, need));
    }
    Ok(())
}

/// A per-row argument (`got`) must have the shape of `full` without its last
/// axis.
pub(crate) fn batch_shape(a: &str, got: &[usize], b: &str, full: &[usize]) -> CoreResult<()> {
    if Some(got) != full.split_last().map(|(_, batch)| batch) {
        return Err(CoreError::shape_mismatch(
            a,
            got,
            b,
            full,
            &format!("{a} must have the shape of {b} without the last axis"),
        ));
    }
    Ok(())
}

/// The batch shape and row length of a `[batch..., K]` argument.
pub(crate) fn split_last<'s>(name: &str, shape: &'s [usize]) -> CoreResult<(&'s [usize], usize)> {
    match shape.split_last() {
        Some((&k, batch)) => Ok((batch, k)),
        None => Err(CoreError::Shape(format!(
            "{name} has shape () but needs at least one axis (the last axis holds the actions)"
        ))),
    }
}

/// Broadcast `v` to `shape` (NumPy rules), or a shape error naming both.
pub(crate) fn broadcast<'v, T>(
    name: &str,
    v: &'v ArrayViewD<'_, T>,
    other: &str,
    shape: &[usize],
) -> CoreResult<ArrayViewD<'v, T>> {
    v.broadcast(shape).ok_or_else(|| {
        CoreError::shape_mismatch(
            name,
            v.shape(),
            other,
            shape,
            &format!("{name} must broadcast to the shape of {other}"),
        )
    })
}

/// A block of a `[batch..., K]` argument as the 2-D `[rows, K]` view it is.
pub(crate) fn to2<T>(v: ArrayViewD<'_, T>) -> ndarray::ArrayView2<'_, T> {
    v.into_dimensionality().expect("a block has one batch axis")
}

/// [`to2`] for outputs.
pub(crate) fn to2_mut<T>(v: ArrayViewMutD<'_, T>) -> ndarray::ArrayViewMut2<'_, T> {
    v.into_dimensionality().expect("a block has one batch axis")
}

/// Copy a (strided) column into `f64` scratch.
#[inline]
pub(crate) fn gather_col<F: Real>(src: ArrayView1<'_, F>, dst: &mut [f64]) {
    match src.as_slice() {
        Some(s) => dst.iter_mut().zip(s).for_each(|(d, x)| *d = x.to_f64()),
        None => dst
            .iter_mut()
            .zip(src.iter())
            .for_each(|(d, x)| *d = x.to_f64()),
    }
}

/// Copy a `[n, k]` block into column-major scratch (`z[j * n + r] = f(x[r, j])`).
/// A C-contiguous block is read in memory order.
#[inline(always)]
pub(crate) fn gather_t<T: Copy, U>(
    x: &ndarray::ArrayView2<'_, T>,
    z: &mut [U],
    f: impl Fn(T) -> U,
) {
    let (n, k) = x.dim();
    match x.as_slice() {
        Some(s) if k > 0 => {
            assert!(s.len() == n * k && z.len() >= n * k);
            // Eight rows at a time: each column gets eight contiguous values.
            const R: usize = 8;
            let full = n / R * R;
            for r0 in (0..full).step_by(R) {
                for j in 0..k {
                    let d = &mut z[j * n + r0..j * n + r0 + R];
                    for (q, d) in d.iter_mut().enumerate() {
                        // SAFETY: r0 + q < n and j < k, so the index is < n * k = s.len().
                        *d = f(unsafe { *s.get_unchecked((r0 + q) * k + j) });
                    }
                }
            }
            for r in full..n {
                for j in 0..k {
                    z[j * n + r] = f(s[r * k + j]);
                }
            }
        }
        _ => {
            for (j, zc) in z.chunks_exact_mut(n.max(1)).enumerate().take(k) {
                let col = x.column(j);
                match col.as_slice() {
                    Some(c) => zc.iter_mut().zip(c).for_each(|(d, &v)| *d = f(v)),
                    None => zc.iter_mut().zip(col.iter()).for_each(|(d, &v)| *d = f(v)),
                }
            }
        }
    }
}

/// Copy a `[n, k]` block into row-major `f64` scratch (`z[r * k + j]`).
#[inline(always)]
pub(crate) fn gather_rows<F: Real>(
    x: &ndarray::ArrayView2<'_, F>,
    z: &mut [f64],
    f: impl Fn(F) -> f64,
) {
    match x.as_slice() {
        Some(s) => z.iter_mut().zip(s).for_each(|(d, &v)| *d = f(v)),
        None => z.iter_mut().zip(x.iter()).for_each(|(d, &v)| *d = f(v)),
    }
}

/// Store row-major `f64` scratch into a `[n, k]` output block, rounding once.
#[inline(always)]
pub(crate) fn scatter_rows<F: Real>(z: &[f64], mut o: ndarray::ArrayViewMut2<'_, F>) {
    match o.as_slice_mut() {
        Some(s) => s.iter_mut().zip(z).for_each(|(d, &v)| *d = F::from_f64(v)),
        None => o.iter_mut().zip(z).for_each(|(d, &v)| *d = F::from_f64(v)),
    }
}

/// Store column-major `f64` scratch into a `[n, k]` output block, rounding
/// once; a C-contiguous block is written in memory order.
#[inline(always)]
pub(crate) fn scatter_t<F: Real>(z: &[f64], mut o: ndarray::ArrayViewMut2<'_, F>) {
    let (n, k) = o.dim();
    match o.as_slice_mut() {
        Some(s) if k > 0 => {
            for (r, row) in s.chunks_exact_mut(k).enumerate() {
                for (j, v) in row.iter_mut().enumerate() {
                    *v = F::from_f64(z[j * n + r]);
                }
            }
        }
        _ => {
            for (j, zc) in z.chunks_exact(n.max(1)).enumerate().take(k) {
                scatter_col(zc, o.column_mut(j));
            }
        }
    }
}

/// Store `f64` values into a (strided) output column, rounding once.
#[inline]
pub(crate) fn scatter_col<F: Real>(src: &[f64], mut dst: ndarray::ArrayViewMut1<'_, F>) {
    match dst.as_slice_mut() {
        Some(d) => d
            .iter_mut()
            .zip(src)
            .for_each(|(d, &x)| *d = F::from_f64(x)),
        None => dst
            .iter_mut()
            .zip(src)
            .for_each(|(d, &x)| *d = F::from_f64(x)),
    }
}

/// `true` where the accumulated `x * 0` check turned NaN (some input not finite).
#[inline]
pub(crate) fn any_nan(chk: &[f64]) -> bool {
    chk.iter().fold(false, |a, &c| a | c.is_nan())
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array3, ArrayD, IxDyn, ShapeBuilder};

    #[test]
    fn fold_merges_contiguous_batch_axes_only() {
        let a = Array3::<f64>::zeros((4, 5, 3));
        let l = Layout::new(&[4, 5], 3, &[a.strides()]);
        assert_eq!(l.merges, vec![0]);
        assert_eq!(l.nb_folded, 1);
        let f = Array3::<f64>::zeros((4, 5, 3).f());
        let l = Layout::new(&[4, 5], 3, &[a.strides(), f.strides()]);
        assert!(l.merges.is_empty());
        let blocks = l.split(f.view().into_dyn());
        assert_eq!(blocks.len(), 4);
        assert!(blocks.iter().all(|b| b.shape() == [5, 3]));
    }

    #[test]
    fn blocks_cover_rows_in_c_order() {
        let a = ArrayD::from_shape_fn(IxDyn(&[3, 700, 2]), |i| (i[0] * 700 + i[1]) as f64);
        let v = a.view();
        let t = v.clone().permuted_axes(IxDyn(&[1, 0, 2]));
        let l = Layout::new(t.shape().split_last().unwrap().1, 2, &[t.strides()]);
        let blocks = l.split(t.clone());
        let mut seen = Vec::new();
        for b in &blocks {
            assert_eq!(b.ndim(), 2);
            seen.extend(b.index_axis(Axis(1), 0).iter().copied());
        }
        let want: Vec<f64> = t.index_axis(Axis(2), 0).iter().copied().collect();
        assert_eq!(seen, want);
        let starts = row_starts(blocks.iter().map(|b| b.shape()[0]));
        assert_eq!(starts[0], 0);
        assert_eq!(
            *starts.last().unwrap() + blocks.last().unwrap().shape()[0],
            2100
        );
    }

    #[test]
    fn blocks_hold_whole_row_groups() {
        for (k, want) in [
            (18usize, 112usize),
            (6, 336),
            (1, 2048),
            (300, 6),
            (3000, 1),
        ] {
            let a = ndarray::Array2::<f32>::zeros((5000, k));
            let l = Layout::new(&[5000], k, &[a.strides()]);
            assert_eq!(l.per_block, want, "k = {k}");
            let b = l.split(a.view().into_dyn());
            assert_eq!(b.iter().map(|b| b.shape()[0]).sum::<usize>(), 5000);
        }
    }

    #[test]
    fn unit_batch_and_empty_batch() {
        let a = ndarray::Array1::<f32>::zeros(6);
        let l = Layout::new(&[], 6, &[a.strides()]);
        let b = l.split(a.view().into_dyn());
        assert_eq!(b.len(), 1);
        assert_eq!(b[0].shape(), [1, 6]);
        let e = ndarray::Array2::<f32>::zeros((0, 6));
        let l = Layout::new(&[0], 6, &[e.strides()]);
        assert!(l.split(e.view().into_dyn()).is_empty());
    }
}
