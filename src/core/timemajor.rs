//! Returns and GAE over time-major buffers viewed as `[T, M]`: axis 0 is time,
//! axis 1 enumerates the independent streams (the binding layer folds every
//! non-time axis into it). Any strides are read in place.
//!
//! The bootstrap rule (per step `t`, per stream):
//!
//! ```text
//! V'_t = 0               if terminated[t]
//!      = next_values[t]  if next_values is given
//!      = values[t+1]     if t < T-1 (gae) / G_{t+1} (returns), not truncated[t]
//!      = bootstrap       if t = T-1
//! ```
//!
//! A truncated step without `next_values` is an error, never a silent zero.
//!
//! Work is cut into tiles of rows x streams; streams are independent and the
//! tiles of one stream run bottom-up with the exact carry, so the result never
//! depends on the tiling or on the thread count.

use super::error::{check_unit, At, CoreError, CoreResult};
use super::fastmath;
use super::float::Real;
use super::par::Par;
use super::rows;
use super::stats;
use ndarray::{s, ArrayView1, ArrayView2, ArrayViewMut2, Axis, Zip};

/// The per-step (`[T, M]`) and per-stream (`[M]`) inputs of a time-major kernel.
#[derive(Clone)]
pub struct Steps<'a, F> {
    /// `r_t`, required.
    pub rewards: ArrayView2<'a, F>,
    /// `V(s_t)`; required by [`gae`], ignored by [`discounted_returns`].
    pub values: Option<ArrayView2<'a, F>>,
    /// `V(s_{t+1})` as seen at step `t`.
    pub next_values: Option<ArrayView2<'a, F>>,
    /// The state after step `t` is terminal.
    pub terminated: Option<ArrayView2<'a, bool>>,
    /// The episode was cut after step `t` although the state is not terminal.
    pub truncated: Option<ArrayView2<'a, bool>>,
    /// `V` of the state after the last row, per stream (default 0).
    pub bootstrap: Option<ArrayView1<'a, F>>,
}

impl<'a, F: Real> Steps<'a, F> {
    /// Rewards only; add the optional inputs with struct update syntax.
    pub fn new(rewards: ArrayView2<'a, F>) -> Self {
        Steps {
            rewards,
            values: None,
            next_values: None,
            terminated: None,
            truncated: None,
            bootstrap: None,
        }
    }

    fn dims(&self) -> (usize, usize) {
        self.rewards.dim()
    }

    /// Shape, rule and (optionally) finiteness checks shared by the kernels.
    pub(crate) fn validate(
        &self,
        need_values: bool,
        check_finite: bool,
        par: Par,
    ) -> CoreResult<()> {
        self.validate_layout(need_values)?;
        self.validate_data(need_values, check_finite, par)
    }

    /// The checks that do not read the per-step data.
    fn validate_layout(&self, need_values: bool) -> CoreResult<()> {
        let shape = self.rewards.shape();
        let same = |name: &'static str, s: Option<&[usize]>| -> CoreResult<()> {
            match s {
                Some(s) if s != shape => Err(CoreError::shape_mismatch(
                    name,
                    s,
                    "rewards",
                    shape,
                    "per-step arrays must have the shape of rewards",
                )),
                _ => Ok(()),
            }
        };
        same("values", self.values.as_ref().map(|a| a.shape()))?;
        same("next_values", self.next_values.as_ref().map(|a| a.shape()))?;
        same("terminated", self.terminated.as_ref().map(|a| a.shape()))?;
        same("truncated", self.truncated.as_ref().map(|a| a.shape()))?;
        if need_values && self.values.is_none() {
            return Err(CoreError::input("values", "is required"));
        }
        if let Some(b) = &self.bootstrap {
            if b.len() != self.dims().1 {
                return Err(CoreError::shape_mismatch(
                    "bootstrap",
                    b.shape(),
                    "rewards",
                    shape,
                    "bootstrap must have the shape of rewards without the time axis",
                ));
            }
            if self.next_values.is_some() {
                return Err(CoreError::input(
                    "bootstrap",
                    "is not allowed together with next_values (its last row already carries the bootstrap)",
                ));
            }
        }
        Ok(())
    }

    /// The checks that read the data: truncation rule, then finiteness.
    fn validate_data(&self, need_values: bool, check_finite: bool, par: Par) -> CoreResult<()> {
        if let (Some(tr), None) = (&self.truncated, &self.next_values) {
            if let Some((t, m)) = first_true(tr, par) {
                return Err(CoreError::input_at(
                    "truncated",
                    At::TimeStream(t, m),
                    "is True but next_values is not given: truncated steps need next_values to bootstrap from",
                ));
            }
        }
        if check_finite {
            check_finite_2d("rewards", &self.rewards, par)?;
            if need_values {
                if let Some(v) = &self.values {
                    check_finite_2d("values", v, par)?;
                }
            }
            if let Some(v) = &self.next_values {
                check_finite_2d("next_values", v, par)?;
            }
            if let Some(b) = &self.bootstrap {
                if let Some(i) = b.iter().position(|x| !x.finite()) {
                    return Err(CoreError::non_finite("bootstrap", At::Flat(i)));
                }
            }
        }
        Ok(())
    }
}

/// Discounted returns: `G_t = r_t + gamma * X_t` (module docs for `X_t`).
struct ReturnsRule {
    gamma: f64,
}

impl StepRule for ReturnsRule {
    const VALUES: bool = false;
    #[inline(always)]
    fn row(&self, row: &Row<'_>, y: &mut [f64], carry: &mut [f64], _aux: &mut [f64]) {
        let (gamma, last) = (self.gamma, row.last);
        // The value a cut step bootstraps from: next_values, else the
        // bootstrap (validation leaves only the last row for it).
        let fix = row.next_values.unwrap_or(row.values_below);
        for ((((y, &te), &tr), &fv), cy) in y
            .iter_mut()
            .zip(row.te)
            .zip(row.tr)
            .zip(fix)
            .zip(carry.iter_mut())
        {
            // xv = 0 if te, else fv if (tr or last), else cy; as bit
            // masks so the loop vectorises and NaN cannot cross an end.
            let fix = mask(tr | last);
            let xv = f64::from_bits((fv.to_bits() & fix) | (cy.to_bits() & !fix));
            let g = *y + gamma * keep(xv, mask(!te));
            *y = g;
            *cy = g;
        }
    }
}

/// GAE: `A_t = delta_t + gamma * lam * (1 - end_t) * A_{t+1}`.
struct GaeRule {
    gamma: f64,
    lam: f64,
}

impl StepRule for GaeRule {
    const VALUES: bool = true;
    #[inline(always)]
    fn row(&self, row: &Row<'_>, y: &mut [f64], carry: &mut [f64], _aux: &mut [f64]) {
        let (gamma, gl) = (self.gamma, self.gamma * self.lam);
        let vnext = row.next_values.unwrap_or(row.values_below);
        for (((((y, &te), &tr), &v), &vn), cy) in y
            .iter_mut()
            .zip(row.te)
            .zip(row.tr)
            .zip(row.values)
            .zip(vnext)
            .zip(carry.iter_mut())
        {
            let d = *y + gamma * keep(vn, mask(!te)) - v;
            let a = d + keep(gl * *cy, mask(!(te | tr)));
            *y = a;
            *cy = a;
        }
    }
}

/// Discounted returns `G_t = r_t + gamma * X_t` (module docs for `X_t`),
/// written to `out` (`[T, M]`, any strides).
pub fn discounted_returns<F: Real>(
    steps: &Steps<'_, F>,
    gamma: f64,
    check_finite: bool,
    mut out: ArrayViewMut2<'_, F>,
    par: Par,
) -> CoreResult<()> {
    check_unit("gamma", gamma)?;
    if let Some(()) = direct(steps, false, check_finite, &[], par, |s| {
        check_out("out", out.shape(), s.rewards.shape())?;
        Ok(rows::try_run(
            s,
            rows::Rule::Returns { gamma },
            out.view_mut(),
            None,
            par,
        ))
    })? {
        return Ok(());
    }
    steps.validate(false, check_finite, par)?;
    check_out("out", out.shape(), steps.rewards.shape())?;
    run(
        steps,
        &[],
        &ReturnsRule { gamma },
        (Store::Y, None),
        out,
        None,
        par,
    );
    Ok(())
}

/// GAE advantages and lambda-returns (Schulman et al. 2016, eq. 16):
///
/// ```text
/// delta_t = r_t + gamma * V'_t - V(s_t)
/// A_t     = delta_t + gamma * lam * (1 - end_t) * A_{t+1},   A_T = 0
/// R_t     = A_t + V(s_t)
/// ```
///
/// With `normalize`, `A` is then replaced by `(A - mean) / (std + eps)` over all
/// elements (population std); `R` keeps the raw advantages.
#[allow(clippy::too_many_arguments)]
pub fn gae<F: Real>(
    steps: &Steps<'_, F>,
    gamma: f64,
    lam: f64,
    normalize: Option<f64>,
    check_finite: bool,
    mut adv: ArrayViewMut2<'_, F>,
    mut ret: ArrayViewMut2<'_, F>,
    par: Par,
) -> CoreResult<()> {
    check_unit("gamma", gamma)?;
    check_unit("lam", lam)?;
    if let Some(eps) = normalize {
        if !(eps.is_finite() && eps >= 0.0) {
            return Err(CoreError::input(
                "eps",
                format!("must be finite and >= 0, got {eps}"),
            ));
        }
    }
    let done = direct(steps, true, check_finite, &[], par, |s| {
        check_out("out[0]", adv.shape(), s.rewards.shape())?;
        check_out("out[1]", ret.shape(), s.rewards.shape())?;
        Ok(rows::try_run(
            s,
            rows::Rule::Gae { gamma, lam },
            adv.view_mut(),
            Some(ret.view_mut()),
            par,
        ))
    })?;
    if done.is_none() {
        steps.validate(true, check_finite, par)?;
        check_out("out[0]", adv.shape(), steps.rewards.shape())?;
        check_out("out[1]", ret.shape(), steps.rewards.shape())?;
        run(
            steps,
            &[],
            &GaeRule { gamma, lam },
            (Store::Y, Some(Store::YPlusV)),
            adv.view_mut(),
            Some(ret),
            par,
        );
    }
    if let Some(eps) = normalize {
        stats::normalize_inplace(&mut adv, None, eps, 0, par)?;
    }
    Ok(())
}

/// The fast path of [`rows`] when the layout allows: the layout checks, the
/// cheap data checks, then `kernel`; the full validation runs only when the
/// kernel saw something it must explain (then the rule's own per-step inputs
/// `extra` are checked for finiteness after the steps, by name). `Ok(None)`:
/// not taken (nothing was written), run the general loop.
pub(crate) fn direct<F: Real>(
    steps: &Steps<'_, F>,
    need_values: bool,
    check_finite: bool,
    extra: &[(&'static str, &ArrayView2<'_, F>)],
    par: Par,
    kernel: impl FnOnce(&Steps<'_, F>) -> CoreResult<Option<rows::Flags>>,
) -> CoreResult<Option<()>> {
    steps.validate_layout(need_values)?;
    if check_finite {
        // next_values and bootstrap do not always reach an output (a
        // terminated step ignores them), so they are checked up front; on a
        // failure the full validation reports the first error in its order.
        let nv_bad = steps
            .next_values
            .as_ref()
            .is_some_and(|v| first_non_finite_2d(v, par).is_some());
        let boot_bad = steps
            .bootstrap
            .as_ref()
            .is_some_and(|b| b.iter().any(|x| !x.finite()));
        if nv_bad || boot_bad {
            steps.validate_data(need_values, check_finite, par)?;
        }
    }
    let Some(flags) = kernel(steps)? else {
        return Ok(None);
    };
    if flags.truncated_without_next || (check_finite && flags.non_finite) {
        steps.validate_data(need_values, check_finite, par)?;
        if check_finite {
            for &(name, a) in extra {
                check_finite_2d(name, a, par)?;
            }
        }
    }
    Ok(Some(()))
}

pub(crate) fn check_out(name: &'static str, got: &[usize], want: &[usize]) -> CoreResult<()> {
    if got != want {
        return Err(CoreError::shape_mismatch(
            name,
            got,
            "rewards",
            want,
            "out must have the output shape",
        ));
    }
    Ok(())
}

/// Elements per tile (rows x streams) of scratch.
const TILE: usize = 4096;

/// The stream-block width: wide enough for the inner loop to vectorise, narrow
/// enough that every thread gets blocks. Streams are independent, so the width
/// never changes a result.
fn block_width(t: usize, m: usize, par: Par) -> usize {
    let threads = match par {
        Par::Seq => 1,
        Par::Rayon => rayon::current_num_threads().max(1),
    };
    let want_blocks = if t * m >= super::par::PAR_MIN_WORK {
        4 * threads
    } else {
        1
    };
    // At least 32 streams per block (all of them when fewer): narrower blocks
    // spend more on per-row bookkeeping than the extra threads win.
    m.div_ceil(want_blocks).clamp(32.min(m).max(1), 256)
}

/// The gathered inputs of one row of a block of `w` streams, in `f64`.
pub(crate) struct Row<'s> {
    /// This is the last row of the buffer (`t = T - 1`).
    pub last: bool,
    /// `V(s_t)` (empty unless the rule gathers values).
    pub values: &'s [f64],
    /// `V(s_{t+1})` from the values array: the next row, or the bootstrap at
    /// the last row (empty unless the rule gathers values; then the bootstrap).
    pub values_below: &'s [f64],
    /// `next_values[t]`, if given.
    pub next_values: Option<&'s [f64]>,
    /// `terminated[t]` / `truncated[t]` (all false when not given).
    pub te: &'s [bool],
    /// See `te`.
    pub tr: &'s [bool],
    /// The extra per-step inputs of the rule, this row.
    pub extra: [&'s [f64]; MAX_EXTRA],
}

/// One row of a reverse recurrence over a block of streams. The tile loop
/// (gathering, carries, tiling, parallel split, storing) is shared; a rule
/// only advances one row, in one branch-free pass over the `w` independent
/// streams so the loop vectorises.
///
/// The bootstrap rule `V'_t` reads `0` where `te`, else
/// `row.next_values.unwrap_or(row.values_below)`.
pub(crate) trait StepRule: Sync {
    /// Whether `values` are gathered (and `Row::values*` filled).
    const VALUES: bool;
    /// Advance one row: `y` holds `r_t` on entry and `y_t` on exit; `carry`
    /// holds `y_{t+1}` on entry (0 below the last row) and must hold `y_t` on
    /// exit. A per-step by-product may go to `aux` (stored with [`Store::Aux`]).
    fn row(&self, row: &Row<'_>, y: &mut [f64], carry: &mut [f64], aux: &mut [f64]);
}

/// What an output array receives.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Store {
    /// The recurrence value `y_t`.
    Y,
    /// `y_t + V(s_t)`.
    YPlusV,
    /// The rule's by-product.
    Aux,
}

/// The most extra per-step inputs a rule may read.
pub(crate) const MAX_EXTRA: usize = 2;

/// Run `rule` over all streams into `out_a` (and `out_b`), each receiving
/// what `stores` says. `extra` are `[T, M]` views of the rule's own inputs
/// (already validated by the caller).
pub(crate) fn run<F: Real, R: StepRule>(
    steps: &Steps<'_, F>,
    extra: &[ArrayView2<'_, F>],
    rule: &R,
    stores: (Store, Option<Store>),
    out_a: ArrayViewMut2<'_, F>,
    out_b: Option<ArrayViewMut2<'_, F>>,
    par: Par,
) {
    debug_assert!(extra.len() <= MAX_EXTRA);
    debug_assert_eq!(stores.1.is_some(), out_b.is_some());
    let (t, m) = steps.dims();
    if t == 0 || m == 0 {
        return;
    }
    let w = block_width(t, m, par);
    let items = split_pair(out_a, out_b, w);
    par.for_each(items, |(m0, a, b)| {
        run_block(steps, extra, rule, stores, m0, a, b)
    });
}

/// Cut `a` (and `b`, of the same shape) into column blocks of width `w`:
/// `(first stream, block of a, block of b)`.
#[allow(clippy::type_complexity)]
pub(crate) fn split_pair<'o, F>(
    a: ArrayViewMut2<'o, F>,
    b: Option<ArrayViewMut2<'o, F>>,
    w: usize,
) -> Vec<(usize, ArrayViewMut2<'o, F>, Option<ArrayViewMut2<'o, F>>)> {
    let a_blocks = split_cols(a, w);
    let b_blocks: Vec<Option<ArrayViewMut2<'o, F>>> = match b {
        None => (0..a_blocks.len()).map(|_| None).collect(),
        Some(b) => split_cols(b, w).into_iter().map(Some).collect(),
    };
    a_blocks
        .into_iter()
        .zip(b_blocks)
        .enumerate()
        .map(|(i, (a, b))| (i * w, a, b))
        .collect()
}

/// Cut a `[T, M]` view into column blocks of width `w` (the last may be narrower).
fn split_cols<F>(mut v: ArrayViewMut2<'_, F>, w: usize) -> Vec<ArrayViewMut2<'_, F>> {
    let mut out = Vec::with_capacity(v.ncols().div_ceil(w.max(1)));
    while v.ncols() > w {
        let (a, b) = v.split_at(Axis(1), w);
        out.push(a);
        v = b;
    }
    out.push(v);
    out
}

/// One block of streams `[m0, m0 + w)`, all rows, bottom-up in tiles.
fn run_block<F: Real, R: StepRule>(
    steps: &Steps<'_, F>,
    extra: &[ArrayView2<'_, F>],
    rule: &R,
    stores: (Store, Option<Store>),
    m0: usize,
    mut out_a: ArrayViewMut2<'_, F>,
    mut out_b: Option<ArrayViewMut2<'_, F>>,
) {
    let (t_len, _) = steps.dims();
    let w = out_a.ncols();
    let cols = s![.., m0..m0 + w];
    let r = steps.rewards.slice(cols);
    let v = steps.values.as_ref().map(|a| a.slice(cols));
    let nv = steps.next_values.as_ref().map(|a| a.slice(cols));
    let term = steps.terminated.as_ref().map(|a| a.slice(cols));
    let trunc = steps.truncated.as_ref().map(|a| a.slice(cols));
    let ex: Vec<ArrayView2<'_, F>> = extra.iter().map(|a| a.slice(cols)).collect();
    let boot: Vec<f64> = match &steps.bootstrap {
        Some(b) => b.slice(s![m0..m0 + w]).iter().map(|x| x.to_f64()).collect(),
        None => vec![0.0; w],
    };
    let use_v = R::VALUES;
    let use_aux = stores.0 == Store::Aux || stores.1 == Some(Store::Aux);

    let rows_per_tile = (TILE / w).clamp(1, t_len.max(1));
    let cap = rows_per_tile * w;
    let mut xs = vec![0.0f64; cap];
    let mut vs = vec![0.0f64; if use_v { cap } else { 0 }];
    let mut nvs = vec![0.0f64; if nv.is_some() { cap } else { 0 }];
    let mut exs: Vec<Vec<f64>> = ex.iter().map(|_| vec![0.0f64; cap]).collect();
    let mut aux = vec![0.0f64; if use_aux { cap } else { 0 }];
    let mut tes = vec![false; cap];
    let mut trs = vec![false; cap];
    // y and V at the row just below the current tile.
    let mut carry_y = vec![0.0f64; w];
    let mut carry_v = boot;

    let mut t1 = t_len;
    while t1 > 0 {
        let t0 = t1.saturating_sub(rows_per_tile);
        let rows = t1 - t0;
        let n = rows * w;
        let rs = s![t0..t1, ..];
        gather(&r.slice(rs), &mut xs[..n]);
        if let Some(v) = &v {
            if use_v {
                gather(&v.slice(rs), &mut vs[..n]);
            }
        }
        if let Some(nv) = &nv {
            gather(&nv.slice(rs), &mut nvs[..n]);
        }
        for (e, buf) in ex.iter().zip(exs.iter_mut()) {
            gather(&e.slice(rs), &mut buf[..n]);
        }
        gather_flags(term.as_ref().map(|a| a.slice(rs)), &mut tes[..n]);
        gather_flags(trunc.as_ref().map(|a| a.slice(rs)), &mut trs[..n]);

        let tile = Tile {
            rows,
            w,
            last_row: t0 + rows == t_len,
            xs: &mut xs[..n],
            vs: if use_v { &vs[..n] } else { &[] },
            nvs: if nvs.is_empty() { &[] } else { &nvs[..n] },
            exs: &exs,
            aux: if use_aux { &mut aux[..n] } else { &mut [] },
            tes: &tes[..n],
            trs: &trs[..n],
            carry_y: &mut carry_y,
            carry_v: &carry_v,
        };
        tile_rows_dispatch(rule, tile);
        if use_v {
            carry_v.copy_from_slice(&vs[..w]);
        }
        let store = |what: Store, dst: &mut ArrayViewMut2<'_, F>| match what {
            Store::Y => scatter(&xs[..n], None, dst),
            Store::YPlusV => scatter(&xs[..n], Some(&vs[..n]), dst),
            Store::Aux => scatter(&aux[..n], None, dst),
        };
        store(stores.0, &mut out_a.slice_mut(rs));
        if let (Some(b), Some(what)) = (&mut out_b, stores.1) {
            store(what, &mut b.slice_mut(rs));
        }
        t1 = t0;
    }
}

/// The scratch of one tile (`rows x w`, row-major) and the carries below it.
struct Tile<'s> {
    rows: usize,
    w: usize,
    /// The tile's bottom row is the buffer's last row.
    last_row: bool,
    xs: &'s mut [f64],
    vs: &'s [f64],
    nvs: &'s [f64],
    exs: &'s [Vec<f64>],
    aux: &'s mut [f64],
    tes: &'s [bool],
    trs: &'s [bool],
    carry_y: &'s mut [f64],
    carry_v: &'s [f64],
}

/// Run the rule over the rows of one tile, bottom-up.
#[inline(always)]
fn tile_rows<R: StepRule>(rule: &R, t: Tile<'_>) {
    let w = t.w;
    let empty: &[f64] = &[];
    for i in (0..t.rows).rev() {
        let row = i * w..(i + 1) * w;
        let mut extra = [empty; MAX_EXTRA];
        for (k, buf) in t.exs.iter().enumerate() {
            extra[k] = &buf[row.clone()];
        }
        let (values, values_below): (&[f64], &[f64]) = if !R::VALUES {
            (empty, t.carry_v)
        } else if i + 1 < t.rows {
            (&t.vs[row.clone()], &t.vs[(i + 1) * w..(i + 2) * w])
        } else {
            (&t.vs[row.clone()], t.carry_v)
        };
        let inputs = Row {
            last: t.last_row && i + 1 == t.rows,
            values,
            values_below,
            next_values: if t.nvs.is_empty() {
                None
            } else {
                Some(&t.nvs[row.clone()])
            },
            te: &t.tes[row.clone()],
            tr: &t.trs[row.clone()],
            extra,
        };
        let a: &mut [f64] = if t.aux.is_empty() {
            &mut []
        } else {
            &mut t.aux[row.clone()]
        };
        rule.row(&inputs, &mut t.xs[row], t.carry_y, a);
    }
}

/// [`tile_rows`], in its AVX2 copy when the CPU allows (same bits).
fn tile_rows_dispatch<R: StepRule>(rule: &R, t: Tile<'_>) {
    #[cfg(target_arch = "x86_64")]
    {
        #[target_feature(enable = "avx2")]
        fn avx2<R: StepRule>(rule: &R, t: Tile<'_>) {
            tile_rows(rule, t)
        }
        if fastmath::wide_ok() {
            // SAFETY: `avx2` only requires the CPU to support AVX2, which
            // `wide_ok` has just confirmed at run time.
            return unsafe { avx2(rule, t) };
        }
    }
    tile_rows(rule, t)
}

/// All ones when `b`, else zero: a lane mask for [`keep`].
#[inline(always)]
fn mask(b: bool) -> u64 {
    (b as u64).wrapping_neg()
}

/// `x` where the mask is set, `+0.0` elsewhere (a select that vectorises and
/// never turns `0 * NaN` into NaN).
#[inline(always)]
fn keep(x: f64, m: u64) -> f64 {
    f64::from_bits(x.to_bits() & m)
}

/// Copy a `[rows, w]` view into row-major `f64` scratch.
fn gather<F: Real>(src: &ArrayView2<'_, F>, dst: &mut [f64]) {
    let w = src.ncols().max(1);
    if let Some(sl) = src.as_slice() {
        dst.iter_mut().zip(sl).for_each(|(d, s)| *d = s.to_f64());
        return;
    }
    for (row, d) in src.rows().into_iter().zip(dst.chunks_mut(w)) {
        match row.as_slice() {
            Some(sl) => d.iter_mut().zip(sl).for_each(|(d, s)| *d = s.to_f64()),
            None => d
                .iter_mut()
                .zip(row.iter())
                .for_each(|(d, s)| *d = s.to_f64()),
        }
    }
}

fn gather_flags(src: Option<ArrayView2<'_, bool>>, dst: &mut [bool]) {
    let Some(src) = src else {
        dst.fill(false);
        return;
    };
    let w = src.ncols().max(1);
    if let Some(sl) = src.as_slice() {
        dst.copy_from_slice(sl);
        return;
    }
    for (row, d) in src.rows().into_iter().zip(dst.chunks_mut(w)) {
        match row.as_slice() {
            Some(sl) => d.copy_from_slice(sl),
            None => d.iter_mut().zip(row.iter()).for_each(|(d, s)| *d = *s),
        }
    }
}

/// Store `y (+ add)` into a `[rows, w]` view, rounding once.
fn scatter<F: Real>(y: &[f64], add: Option<&[f64]>, dst: &mut ArrayViewMut2<'_, F>) {
    let w = dst.ncols().max(1);
    let store = |d: &mut [F], y: &[f64], a: Option<&[f64]>| match a {
        None => d.iter_mut().zip(y).for_each(|(o, &y)| *o = F::from_f64(y)),
        Some(a) => d
            .iter_mut()
            .zip(y)
            .zip(a)
            .for_each(|((o, &y), &a)| *o = F::from_f64(y + a)),
    };
    if let Some(d) = dst.as_slice_mut() {
        store(d, y, add);
        return;
    }
    for (i, mut row) in dst.rows_mut().into_iter().enumerate() {
        let ys = &y[i * w..(i + 1) * w];
        let a = add.map(|a| &a[i * w..(i + 1) * w]);
        match row.as_slice_mut() {
            Some(d) => store(d, ys, a),
            None => match a {
                None => Zip::from(&mut row)
                    .and(ys)
                    .for_each(|o, &y| *o = F::from_f64(y)),
                Some(a) => Zip::from(&mut row)
                    .and(ys)
                    .and(a)
                    .for_each(|o, &y, &a| *o = F::from_f64(y + a)),
            },
        }
    }
}

/// The first `(t, m)` (row-major) where `a` is not finite.
pub fn first_non_finite_2d<F: Real>(a: &ArrayView2<'_, F>, par: Par) -> Option<(usize, usize)> {
    first_where(a, par, |x: &F| !x.finite(), super::finite::all_finite)
}

pub(crate) fn check_finite_2d<F: Real>(
    name: &'static str,
    a: &ArrayView2<'_, F>,
    par: Par,
) -> CoreResult<()> {
    match first_non_finite_2d(a, par) {
        Some((t, m)) => Err(CoreError::non_finite(name, At::TimeStream(t, m))),
        None => Ok(()),
    }
}

fn first_true(a: &ArrayView2<'_, bool>, par: Par) -> Option<(usize, usize)> {
    first_where(a, par, |x: &bool| *x, |s: &[bool]| !s.contains(&true))
}

/// Row-major first element satisfying `bad`, searched block-parallel;
/// `quick_ok(block)` may prove a contiguous block clean without `bad`.
fn first_where<T: Sync, P: Fn(&T) -> bool + Sync, Q: Fn(&[T]) -> bool + Sync>(
    a: &ArrayView2<'_, T>,
    par: Par,
    bad: P,
    quick_ok: Q,
) -> Option<(usize, usize)> {
    let (rows, cols) = a.dim();
    if rows == 0 || cols == 0 {
        return None;
    }
    let rows_per = (TILE * 4 / cols).max(1);
    let starts: Vec<usize> = (0..rows).step_by(rows_per).collect();
    let found = par.map(starts, |r0| {
        let r1 = (r0 + rows_per).min(rows);
        let blk = a.slice(s![r0..r1, ..]);
        if let Some(sl) = blk.as_slice() {
            // Contiguous: a quick vectorised pass first, the position only on failure.
            if quick_ok(sl) {
                return None;
            }
            return sl.iter().position(&bad).map(|k| (r0 + k / cols, k % cols));
        }
        blk.rows()
            .into_iter()
            .enumerate()
            .find_map(|(i, row)| row.iter().position(&bad).map(|j| (r0 + i, j)))
    });
    found.into_iter().flatten().next()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2, ShapeBuilder};

    /// Written straight from the definitions, one stream at a time.
    #[allow(clippy::too_many_arguments)]
    fn reference(
        r: &Array2<f64>,
        v: &Array2<f64>,
        term: &Array2<bool>,
        trunc: &Array2<bool>,
        nv: Option<&Array2<f64>>,
        boot: &Array1<f64>,
        gamma: f64,
        lam: f64,
    ) -> (Array2<f64>, Array2<f64>, Array2<f64>) {
        let (t_len, m_len) = r.dim();
        let mut adv = Array2::zeros((t_len, m_len));
        let mut ret = Array2::zeros((t_len, m_len));
        let mut g = Array2::zeros((t_len, m_len));
        for m in 0..m_len {
            let mut a_next = 0.0;
            let mut g_next = 0.0;
            for t in (0..t_len).rev() {
                let end = term[[t, m]] || trunc[[t, m]];
                let vp = if term[[t, m]] {
                    0.0
                } else if let Some(nv) = nv {
                    nv[[t, m]]
                } else if t + 1 < t_len {
                    v[[t + 1, m]]
                } else {
                    boot[m]
                };
                let delta = r[[t, m]] + gamma * vp - v[[t, m]];
                let a = delta + if end { 0.0 } else { gamma * lam * a_next };
                adv[[t, m]] = a;
                ret[[t, m]] = a + v[[t, m]];
                a_next = a;
                let x = if term[[t, m]] {
                    0.0
                } else if trunc[[t, m]] || (t + 1 == t_len && nv.is_some()) {
                    nv.unwrap()[[t, m]]
                } else if t + 1 == t_len {
                    boot[m]
                } else {
                    g_next
                };
                let gt = r[[t, m]] + gamma * x;
                g[[t, m]] = gt;
                g_next = gt;
            }
        }
        (adv, ret, g)
    }

    fn lcg(seed: &mut u64) -> f64 {
        *seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*seed >> 11) as f64) / ((1u64 << 53) as f64)
    }

    #[test]
    fn gae_and_returns_match_reference_in_all_layouts() {
        let mut seed = 7u64;
        for &(t_len, m_len) in &[
            (1usize, 1usize),
            (5, 3),
            (37, 9),
            (300, 300),
            (2000, 2),
            (3, 700),
        ] {
            let r = Array2::from_shape_fn((t_len, m_len), |_| lcg(&mut seed) * 2.0 - 1.0);
            let v = Array2::from_shape_fn((t_len, m_len), |_| lcg(&mut seed));
            let nv = Array2::from_shape_fn((t_len, m_len), |_| lcg(&mut seed));
            let term = Array2::from_shape_fn((t_len, m_len), |_| lcg(&mut seed) < 0.05);
            let trunc = Array2::from_shape_fn((t_len, m_len), |_| lcg(&mut seed) < 0.05);
            let boot = Array1::from_shape_fn(m_len, |_| lcg(&mut seed));
            let none = Array2::from_elem((t_len, m_len), false);
            let (g, l) = (0.97, 0.9);
            for par in [Par::Seq, Par::Rayon] {
                // With next_values and truncations.
                let (ra, rr, rg) = reference(&r, &v, &term, &trunc, Some(&nv), &boot, g, l);
                let steps = Steps {
                    values: Some(v.view()),
                    next_values: Some(nv.view()),
                    terminated: Some(term.view()),
                    truncated: Some(trunc.view()),
                    ..Steps::new(r.view())
                };
                let mut a = Array2::zeros((t_len, m_len));
                let mut b = Array2::zeros((t_len, m_len).f());
                gae(&steps, g, l, None, true, a.view_mut(), b.view_mut(), par).unwrap();
                assert!(a.iter().zip(ra.iter()).all(|(x, y)| (x - y).abs() < 1e-12));
                assert!(b.iter().zip(rr.iter()).all(|(x, y)| (x - y).abs() < 1e-12));
                let mut gr = Array2::zeros((t_len, m_len));
                discounted_returns(&steps, g, true, gr.view_mut(), par).unwrap();
                assert!(gr.iter().zip(rg.iter()).all(|(x, y)| (x - y).abs() < 1e-12));
                // Bootstrap, no truncation, Fortran-order inputs.
                let rf = {
                    let mut x = Array2::zeros((t_len, m_len).f());
                    x.assign(&r);
                    x
                };
                let (ra, _, rg) = reference(&r, &v, &term, &none, None, &boot, g, l);
                let steps = Steps {
                    values: Some(v.view()),
                    terminated: Some(term.view()),
                    bootstrap: Some(boot.view()),
                    ..Steps::new(rf.view())
                };
                gae(&steps, g, l, None, true, a.view_mut(), b.view_mut(), par).unwrap();
                assert!(a.iter().zip(ra.iter()).all(|(x, y)| (x - y).abs() < 1e-12));
                discounted_returns(&steps, g, true, gr.view_mut(), par).unwrap();
                assert!(gr.iter().zip(rg.iter()).all(|(x, y)| (x - y).abs() < 1e-12));
            }
        }
    }

    /// The contiguous fast path and the general tile loop (taken for a
    /// Fortran-ordered copy of the same data) give the same bits, for both
    /// kernels, every optional input, widths that are not a multiple of 8, and
    /// 1 or N threads.
    #[test]
    fn fast_path_equals_tile_loop_bit_for_bit() {
        for &(t, m) in &[(1usize, 1usize), (7, 5), (64, 8), (37, 19), (300, 333)] {
            let r =
                Array2::from_shape_fn((t, m), |(i, j)| ((i * 31 + j * 17) % 23) as f64 * 0.1 - 1.0);
            let v = Array2::from_shape_fn((t, m), |(i, j)| ((i * 7 + j) % 11) as f64 * 0.2);
            let nv = Array2::from_shape_fn((t, m), |(i, j)| ((i * 5 + j * 3) % 13) as f64 * 0.3);
            let te = Array2::from_shape_fn((t, m), |(i, j)| (i * 13 + j * 5) % 7 == 0);
            let tr = Array2::from_shape_fn((t, m), |(i, j)| (i * 3 + j * 11) % 5 == 0);
            let boot = ndarray::Array1::from_shape_fn(m, |j| j as f64 * 0.5 - 1.0);
            let fortran = |a: &Array2<f64>| {
                let mut f = Array2::zeros(a.raw_dim().f());
                f.assign(a);
                f
            };
            let fortran_b = |a: &Array2<bool>| {
                let mut f = Array2::from_elem(a.raw_dim().f(), false);
                f.assign(a);
                f
            };
            let (rf, vf, nvf, tef, trf) = (
                fortran(&r),
                fortran(&v),
                fortran(&nv),
                fortran_b(&te),
                fortran_b(&tr),
            );
            for with_nv in [false, true] {
                #[allow(clippy::type_complexity)]
                fn make<'x>(
                    (r, v, nv, te, tr): (
                        &'x Array2<f64>,
                        &'x Array2<f64>,
                        &'x Array2<f64>,
                        &'x Array2<bool>,
                        &'x Array2<bool>,
                    ),
                    boot: &'x ndarray::Array1<f64>,
                    with_nv: bool,
                ) -> Steps<'x, f64> {
                    Steps {
                        values: Some(v.view()),
                        next_values: if with_nv { Some(nv.view()) } else { None },
                        terminated: Some(te.view()),
                        truncated: if with_nv { Some(tr.view()) } else { None },
                        bootstrap: if with_nv { None } else { Some(boot.view()) },
                        ..Steps::new(r.view())
                    }
                }
                let c = make((&r, &v, &nv, &te, &tr), &boot, with_nv);
                let f = make((&rf, &vf, &nvf, &tef, &trf), &boot, with_nv);
                for par in [Par::Seq, Par::Rayon] {
                    let mut ac = Array2::zeros((t, m));
                    let mut bc = Array2::zeros((t, m));
                    let mut af = Array2::zeros((t, m).f());
                    let mut bf = Array2::zeros((t, m).f());
                    gae(&c, 0.97, 0.9, None, true, ac.view_mut(), bc.view_mut(), par).unwrap();
                    gae(&f, 0.97, 0.9, None, true, af.view_mut(), bf.view_mut(), par).unwrap();
                    assert_eq!(ac, af, "gae adv t={t} m={m} nv={with_nv}");
                    assert_eq!(bc, bf, "gae ret t={t} m={m} nv={with_nv}");
                    discounted_returns(&c, 0.97, true, ac.view_mut(), par).unwrap();
                    discounted_returns(&f, 0.97, true, af.view_mut(), par).unwrap();
                    assert_eq!(ac, af, "returns t={t} m={m} nv={with_nv}");
                }
            }
        }
    }

    /// The fast path finds a bad value after the fact, with the same error
    /// as the up-front checks of the general loop.
    #[test]
    fn fast_path_reports_the_first_bad_value() {
        let mut r = Array2::from_elem((50, 12), 0.5f32);
        let mut v = Array2::from_elem((50, 12), 0.25f32);
        r[[30, 11]] = f32::NAN;
        v[[40, 2]] = f32::INFINITY;
        let mut a = Array2::zeros((50, 12));
        let mut b = Array2::zeros((50, 12));
        let steps = Steps {
            values: Some(v.view()),
            ..Steps::new(r.view())
        };
        let e = gae(
            &steps,
            0.9,
            0.9,
            None,
            true,
            a.view_mut(),
            b.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert_eq!(e, CoreError::non_finite("rewards", At::TimeStream(30, 11)));
        r[[30, 11]] = 0.0;
        let steps = Steps {
            values: Some(v.view()),
            ..Steps::new(r.view())
        };
        let e = gae(
            &steps,
            0.9,
            0.9,
            None,
            true,
            a.view_mut(),
            b.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert_eq!(e, CoreError::non_finite("values", At::TimeStream(40, 2)));
        // a truncation without next values, even with check_finite=False
        let tr = Array2::from_shape_fn((50, 12), |(i, j)| i == 9 && j == 4);
        let steps = Steps {
            truncated: Some(tr.view()),
            ..Steps::new(r.view())
        };
        let e = discounted_returns(&steps, 0.9, false, a.view_mut(), Par::Seq).unwrap_err();
        assert!(
            matches!(
                e,
                CoreError::Input {
                    arg: "truncated",
                    ..
                }
            ),
            "{e:?}"
        );
    }

    #[test]
    fn thread_count_does_not_change_bits() {
        let r = Array2::from_shape_fn((513, 333), |(i, j)| {
            ((i * 31 + j * 17) % 23) as f32 * 0.1 - 1.0
        });
        let v = Array2::from_shape_fn((513, 333), |(i, j)| ((i * 7 + j) % 11) as f32 * 0.2);
        let term = Array2::from_shape_fn((513, 333), |(i, j)| (i * 13 + j * 5) % 41 == 0);
        let steps = Steps {
            values: Some(v.view()),
            terminated: Some(term.view()),
            ..Steps::new(r.view())
        };
        let mut a1 = Array2::zeros((513, 333));
        let mut b1 = Array2::zeros((513, 333));
        let mut a2 = Array2::zeros((513, 333));
        let mut b2 = Array2::zeros((513, 333));
        gae(
            &steps,
            0.99,
            0.95,
            Some(1e-8),
            true,
            a1.view_mut(),
            b1.view_mut(),
            Par::Seq,
        )
        .unwrap();
        gae(
            &steps,
            0.99,
            0.95,
            Some(1e-8),
            true,
            a2.view_mut(),
            b2.view_mut(),
            Par::Rayon,
        )
        .unwrap();
        assert_eq!(a1, a2);
        assert_eq!(b1, b2);
    }

    #[test]
    fn errors_name_argument_and_first_index() {
        let mut r = Array2::<f64>::zeros((4, 3));
        let trunc = Array2::from_shape_fn((4, 3), |(t, m)| t == 2 && m >= 1);
        let steps = Steps {
            truncated: Some(trunc.view()),
            ..Steps::new(r.view())
        };
        let mut out = Array2::zeros((4, 3));
        let e = discounted_returns(&steps, 0.9, true, out.view_mut(), Par::Seq).unwrap_err();
        assert_eq!(
            e,
            CoreError::input_at(
                "truncated",
                At::TimeStream(2, 1),
                "is True but next_values is not given: truncated steps need next_values to bootstrap from"
            )
        );
        r[[3, 2]] = f64::NAN;
        r[[1, 0]] = f64::INFINITY;
        let steps = Steps::new(r.view());
        let e = discounted_returns(&steps, 0.9, true, out.view_mut(), Par::Seq).unwrap_err();
        assert_eq!(e, CoreError::non_finite("rewards", At::TimeStream(1, 0)));
        assert!(discounted_returns(&steps, 0.9, false, out.view_mut(), Par::Seq).is_ok());
        assert!(out[[3, 2]].is_nan());
        let e = discounted_returns(&steps, 1.5, false, out.view_mut(), Par::Seq).unwrap_err();
        assert!(matches!(e, CoreError::Input { arg: "gamma", .. }));
        let bad = Array2::<f64>::zeros((4, 2));
        let steps = Steps {
            values: Some(bad.view()),
            ..Steps::new(r.view())
        };
        let mut a = Array2::zeros((4, 3));
        let mut b = Array2::zeros((4, 3));
        let e = gae(
            &steps,
            0.9,
            0.9,
            None,
            false,
            a.view_mut(),
            b.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Shape(_)));
    }

    #[test]
    fn empty_buffers_are_fine() {
        let r = Array2::<f32>::zeros((0, 4));
        let mut out = Array2::<f32>::zeros((0, 4));
        discounted_returns(&Steps::new(r.view()), 0.9, true, out.view_mut(), Par::Rayon).unwrap();
        let r = Array2::<f32>::zeros((4, 0));
        let mut out = Array2::<f32>::zeros((4, 0));
        discounted_returns(&Steps::new(r.view()), 0.9, true, out.view_mut(), Par::Rayon).unwrap();
    }
}
