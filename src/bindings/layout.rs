//! From the caller's N-d arrays to the `[T, M]` views the time-major core
//! reads: move the time axis first and fold every other axis into one stream
//! axis, without copying. When the strides of some argument do not allow one
//! fold (for example time in the middle of three axes), the outermost stream
//! axes are split off instead and the core runs once per sub-block.

use super::errors::{fmt_index, unravel};
use crate::core::At;
use ndarray::{
    ArrayView1, ArrayView2, ArrayViewD, ArrayViewMut2, ArrayViewMutD, Axis, Ix1, Ix2, IxDyn,
};

#[derive(Debug, Clone)]
pub struct Layout {
    /// The caller's shape.
    pub shape: Vec<usize>,
    /// `perm[0]` is the time axis, then the stream axes in the caller's order.
    perm: Vec<usize>,
    /// Number of leading stream axes split off (0: one fold covers all).
    split: usize,
}

/// Merge every axis from `first` on into one, fastest along the last (C
/// order). `None` when the strides do not allow it.
fn merge_tail<S: ndarray::RawData>(
    mut v: ndarray::ArrayBase<S, IxDyn>,
    first: usize,
) -> Option<ndarray::ArrayBase<S, IxDyn>> {
    let nd = v.ndim();
    if nd <= first {
        return Some(v.insert_axis(Axis(first)));
    }
    for j in first..nd - 1 {
        if !v.merge_axes(Axis(j), Axis(j + 1)) {
            return None;
        }
    }
    // Axes first..nd-1 now have length 1: drop them.
    for _ in first..nd - 1 {
        if v.len_of(Axis(first)) != 1 {
            return None;
        }
        v = v.index_axis_move(Axis(first), 0);
    }
    Some(v)
}

impl Layout {
    pub fn new(shape: &[usize], time_axis: usize) -> Self {
        let mut perm = vec![time_axis];
        perm.extend((0..shape.len()).filter(|&a| a != time_axis));
        Layout {
            shape: shape.to_vec(),
            perm,
            split: 0,
        }
    }

    pub fn t_len(&self) -> usize {
        self.shape[self.perm[0]]
    }

    fn stream_shape(&self) -> Vec<usize> {
        self.perm[1..].iter().map(|&a| self.shape[a]).collect()
    }

    fn outer_shape(&self) -> Vec<usize> {
        self.stream_shape()[..self.split].to_vec()
    }

    fn inner_shape(&self) -> Vec<usize> {
        self.stream_shape()[self.split..].to_vec()
    }

    /// Number of sub-blocks the core runs on.
    pub fn n_sub(&self) -> usize {
        self.outer_shape().iter().product()
    }

    /// Columns of every sub-block.
    pub fn inner_len(&self) -> usize {
        self.inner_shape().iter().product()
    }

    pub fn is_split(&self) -> bool {
        self.split > 0
    }

    /// Choose the fewest split axes for which every view folds; `folds` is
    /// asked about the candidate layout (see [`Layout::folds`]).
    pub fn plan(&mut self, folds: impl Fn(&Layout) -> bool) {
        let nstream = self.perm.len() - 1;
        if self.shape.contains(&0) {
            return;
        }
        for k in 0..nstream.max(1) {
            self.split = k;
            if folds(self) {
                return;
            }
        }
        self.split = nstream.saturating_sub(1);
    }

    /// Whether a per-step view folds under this layout without copying.
    pub fn folds<T>(&self, v: &ArrayViewD<'_, T>) -> bool {
        self.shape.contains(&0) || self.try_fold(v.clone(), 0).is_some()
    }

    fn try_fold<'a, T>(&self, v: ArrayViewD<'a, T>, sub: usize) -> Option<ArrayView2<'a, T>> {
        let mut v = v.permuted_axes(IxDyn(&self.perm));
        let outer = unravel(sub, &self.outer_shape());
        for &i in &outer {
            v = v.index_axis_move(Axis(1), i);
        }
        merge_tail(v, 1)?.into_dimensionality::<Ix2>().ok()
    }

    /// The `[T, M]` views of every sub-block of a per-step array.
    /// `None` only if the layout was not planned for `v` (a bug).
    pub fn fold<'a, T>(&self, v: &ArrayViewD<'a, T>) -> Option<Vec<ArrayView2<'a, T>>> {
        let (t, m) = (self.t_len(), self.inner_len());
        (0..self.n_sub())
            .map(|j| {
                if t * m == 0 {
                    return ArrayView2::from_shape((t, m), &[][..]).ok();
                }
                self.try_fold(v.clone(), j)
            })
            .collect()
    }

    /// The `[M]` views of every sub-block of a per-stream array (no time
    /// axis). The array must be C-contiguous (per-stream arrays are small; the
    /// caller makes them so).
    pub fn fold_streams<'a, T>(&self, v: &ArrayViewD<'a, T>) -> Option<Vec<ArrayView1<'a, T>>> {
        let m = self.inner_len();
        (0..self.n_sub())
            .map(|j| {
                if m == 0 {
                    return ArrayView1::from_shape(0, &[][..]).ok();
                }
                let mut s = v.clone();
                for &i in &unravel(j, &self.outer_shape()) {
                    s = s.index_axis_move(Axis(0), i);
                }
                merge_tail(s.insert_axis(Axis(0)), 1).and_then(|s| {
                    s.index_axis_move(Axis(0), 0)
                        .into_dimensionality::<Ix1>()
                        .ok()
                })
            })
            .collect()
    }

    /// Fold a writable per-step output in place (only when not split).
    pub fn fold_mut<'a, T>(&self, v: ArrayViewMutD<'a, T>) -> Option<ArrayViewMut2<'a, T>> {
        if self.is_split() {
            return None;
        }
        let (t, m) = (self.t_len(), self.inner_len());
        if t * m == 0 {
            return None;
        }
        let v = v.permuted_axes(IxDyn(&self.perm));
        merge_tail(v, 1)?.into_dimensionality::<Ix2>().ok()
    }

    /// Shape of the scratch buffer used when an output cannot be folded:
    /// `[outer..., T, inner...]`, C order, so each sub-block is contiguous.
    pub fn scratch_shape(&self) -> Vec<usize> {
        let mut s = self.outer_shape();
        s.push(self.t_len());
        s.extend(self.inner_shape());
        s
    }

    /// Axis permutation taking the scratch buffer to the caller's axis order.
    pub fn scratch_to_user(&self) -> Vec<usize> {
        let mut q: Vec<usize> = self.perm[1..=self.split].to_vec();
        q.push(self.perm[0]);
        q.extend(&self.perm[self.split + 1..]);
        let mut inv = vec![0; q.len()];
        for (i, &u) in q.iter().enumerate() {
            inv[u] = i;
        }
        inv
    }

    /// The caller's index for a core position in sub-block `sub`.
    pub fn locate(&self, sub: usize, at: At) -> String {
        let outer = unravel(sub, &self.outer_shape());
        let inner_shape = self.inner_shape();
        match at {
            At::TimeStream(t, m) => {
                let mut p = vec![t];
                p.extend(outer);
                p.extend(unravel(m, &inner_shape));
                let mut user = vec![0; self.shape.len()];
                for (i, &a) in self.perm.iter().enumerate() {
                    user[a] = p[i];
                }
                fmt_index(&user)
            }
            // A per-stream argument: the index without the time axis.
            At::Flat(m) => {
                let mut p = outer;
                p.extend(unravel(m, &inner_shape));
                fmt_index(&p)
            }
            other => other.to_string(),
        }
    }
}
