//! Time-major GAE and discounted returns straight from C-contiguous `[T, M]`
//! buffers: the fast path of [`super::timemajor`] for the common layout.
//!
//! The general tile loop gathers every input into `f64` scratch and scatters
//! the results back, with per-row bookkeeping that dominates when `M` is
//! small. Here each row is read once from the caller's arrays, 8 streams at a
//! time in [`F64x8`] lanes, and written once; the carries (`A_{t+1}` or
//! `G_{t+1}`, one per stream) stay in a small `f64` buffer. The arithmetic
//! (same operations in the same order, no fused multiply-adds) and the
//! bootstrap rule are those of the tile loop (see the module docs of
//! [`super::timemajor`]), so both give the same bits: a result never depends
//! on the memory layout of the inputs.
//!
//! Checks ride along: the kernel notes whether every output is finite (every
//! reward and value enters its own step's output with weight 1) and whether
//! any truncated step lacks a next value; only then does the caller run the
//! full validation, which names the first offending element.

use super::float::Real;
use super::par::{Par, PAR_MIN_WORK};
use super::simd::{dispatch, finite_mark, F64x8, Kernel};
use super::timemajor::{split_cols, Steps};
use ndarray::{ArrayViewMut2, Axis};

const L: usize = 8;

/// The inputs as flat row-major slices (`[t * M + m]`).
struct Flat<'s, F> {
    m: usize,
    t: usize,
    r: &'s [F],
    v: Option<&'s [F]>,
    nv: Option<&'s [F]>,
    te: Option<&'s [bool]>,
    tr: Option<&'s [bool]>,
    boot: Option<&'s [F]>,
}

/// What the kernel computes.
#[derive(Clone, Copy)]
pub(crate) enum Rule {
    /// `G_t = r_t + gamma * (0 if te else (V'_t if tr or last else G_{t+1}))`.
    Returns { gamma: f64 },
    /// `A_t = r_t + gamma * V'_t - v_t + gamma lam (1 - end_t) A_{t+1}`; `R = A + v`.
    Gae { gamma: f64, lam: f64 },
}

/// What the caller must look into after the kernel.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(crate) struct Flags {
    /// Some output is NaN or infinite.
    pub non_finite: bool,
    /// Some step is truncated while `next_values` is not given.
    pub truncated_without_next: bool,
}

/// Run `rule` over `steps` into `out_a` (and `out_b`: GAE returns) when every
/// array is C-contiguous; `None` when the layout needs the general loop.
pub(crate) fn try_run<F: Real>(
    steps: &Steps<'_, F>,
    rule: Rule,
    mut out_a: ArrayViewMut2<'_, F>,
    mut out_b: Option<ArrayViewMut2<'_, F>>,
    par: Par,
) -> Option<Flags> {
    let (t, m) = steps.rewards.dim();
    let flat = Flat {
        m,
        t,
        r: steps.rewards.as_slice()?,
        v: match (&steps.values, rule) {
            (Some(v), Rule::Gae { .. }) => Some(v.as_slice()?),
            _ => None,
        },
        nv: match &steps.next_values {
            Some(v) => Some(v.as_slice()?),
            None => None,
        },
        te: match &steps.terminated {
            Some(v) => Some(v.as_slice()?),
            None => None,
        },
        tr: match &steps.truncated {
            Some(v) => Some(v.as_slice()?),
            None => None,
        },
        boot: match &steps.bootstrap {
            Some(v) => Some(v.as_slice()?),
            None => None,
        },
    };
    if matches!(rule, Rule::Gae { .. }) && flat.v.is_none() {
        return None;
    }
    out_a.as_slice_mut()?;
    if let Some(b) = out_b.as_mut() {
        b.as_slice_mut()?;
    }
    if t == 0 || m == 0 {
        return Some(Flags::default());
    }
    // Column blocks of a multiple of 8 streams, one per thread when the work
    // is large enough; streams are independent, so the split changes no bit.
    let blocks = match par {
        Par::Rayon if t * m >= PAR_MIN_WORK => rayon::current_num_threads().clamp(1, 64),
        _ => 1,
    };
    let w = m.div_ceil(blocks).next_multiple_of(L).min(m.max(1));
    let a_blocks = split_cols(out_a, w);
    let b_blocks: Vec<Option<ArrayViewMut2<'_, F>>> = match out_b {
        Some(b) => split_cols(b, w).into_iter().map(Some).collect(),
        None => a_blocks.iter().map(|_| None).collect(),
    };
    let items: Vec<_> = a_blocks
        .into_iter()
        .zip(b_blocks)
        .enumerate()
        .map(|(i, (a, b))| (i * w, a, b))
        .collect();
    let flags = par.map(items, |(m0, a, b)| {
        dispatch(BlockJob {
            flat: &flat,
            rule,
            m0,
            a,
            b,
        })
    });
    Some(flags.into_iter().fold(Flags::default(), |x, y| Flags {
        non_finite: x.non_finite | y.non_finite,
        truncated_without_next: x.truncated_without_next | y.truncated_without_next,
    }))
}

/// The streams `[m0, m0 + ncols)` over all rows, bottom-up.
struct BlockJob<'j, 's, 'o, F> {
    flat: &'j Flat<'s, F>,
    rule: Rule,
    m0: usize,
    a: ArrayViewMut2<'o, F>,
    b: Option<ArrayViewMut2<'o, F>>,
}

#[inline(always)]
fn load<F: Real>(s: &[F], i: usize) -> F64x8 {
    let s = &s[i..i + L];
    let mut x = [0.0; L];
    for (x, v) in x.iter_mut().zip(s) {
        *x = v.to_f64();
    }
    F64x8(x)
}

/// Eight flags from `s` at `i` (all false when the array is absent).
#[inline(always)]
fn flags8(s: &[bool], i: usize) -> [bool; L] {
    let mut f = [false; L];
    if !s.is_empty() {
        f.copy_from_slice(&s[i..i + L]);
    }
    f
}

#[inline(always)]
fn store<F: Real>(d: &mut [F], i: usize, y: F64x8) {
    for (o, &y) in d[i..i + L].iter_mut().zip(&y.0) {
        *o = F::from_f64(y);
    }
}

/// Which inputs exist (fixed for a call, so the branches are predictable).
#[derive(Clone, Copy)]
struct Has {
    v: bool,
    nv: bool,
    boot: bool,
}

/// Inputs of one group of 8 streams at one row.
struct Group {
    r: F64x8,
    v: F64x8,
    vn: F64x8,
    te: [bool; L],
    tr: [bool; L],
}

/// One group's outputs `(y, y + v)` from its inputs and carries.
#[inline(always)]
fn step(rule: Rule, g: &Group, cy: &F64x8, last: bool) -> (F64x8, F64x8) {
    let mut y = [0.0; L];
    match rule {
        Rule::Returns { gamma } => {
            for (j, y) in y.iter_mut().enumerate() {
                // the value a cut step (or the last row) bootstraps from
                let xv = if g.tr[j] || last { g.vn.0[j] } else { cy.0[j] };
                *y = g.r.0[j] + gamma * keep1(xv, !g.te[j]);
            }
            (F64x8(y), F64x8(y))
        }
        Rule::Gae { gamma, lam } => {
            let gl = gamma * lam;
            let mut yv = [0.0; L];
            for j in 0..L {
                let d = g.r.0[j] + gamma * keep1(g.vn.0[j], !g.te[j]) - g.v.0[j];
                y[j] = d + keep1(gl * cy.0[j], !(g.te[j] || g.tr[j]));
                yv[j] = y[j] + g.v.0[j];
            }
            (F64x8(y), F64x8(yv))
        }
    }
}

/// `x` where `keep`, `+0.0` elsewhere (a select: `0 * NaN` never appears).
#[inline(always)]
fn keep1(x: f64, keep: bool) -> f64 {
    f64::from_bits(x.to_bits() & (keep as u64).wrapping_neg())
}

impl<F: Real> Kernel for BlockJob<'_, '_, '_, F> {
    type Output = Flags;

    #[inline(always)]
    fn run<const FMA: bool>(self) -> Flags {
        // FMA is not used: the general loop rounds every product separately.
        let BlockJob {
            flat,
            rule,
            m0,
            mut a,
            mut b,
        } = self;
        let (m, t_len) = (flat.m, flat.t);
        let w = a.ncols();
        let has = Has {
            v: flat.v.is_some(),
            nv: flat.nv.is_some(),
            boot: flat.boot.is_some(),
        };
        let empty: &[F] = &[];
        let no_flags: &[bool] = &[];
        let (vs, nvs, boot) = (
            flat.v.unwrap_or(empty),
            flat.nv.unwrap_or(empty),
            flat.boot.unwrap_or(empty),
        );
        let (tes, trs) = (flat.te.unwrap_or(no_flags), flat.tr.unwrap_or(no_flags));
        let full = w / L;
        let rest = w % L;
        let mut carry = vec![F64x8::splat(0.0); w.div_ceil(L)];
        let mut poison = F64x8::splat(0.0);
        let mut any_tr = false;
        let mut rows_a = a.axis_iter_mut(Axis(0));
        let mut rows_b = b.as_mut().map(|b| b.axis_iter_mut(Axis(0)));
        for t in (0..t_len).rev() {
            let Some(mut ra) = rows_a.next_back() else {
                break;
            };
            let mut rb = rows_b.as_mut().and_then(|r| r.next_back());
            let Some(oa) = ra.as_slice_mut() else { break };
            let mut ob = rb.as_mut().and_then(|r| r.as_slice_mut());
            let last = t + 1 == t_len;
            let row = t * m + m0;
            // The value after step t: next_values, the next row, or the bootstrap.
            let (below, below_at) = if has.nv {
                (nvs, row)
            } else if has.v && !last {
                (vs, row + m)
            } else if has.boot {
                (boot, m0)
            } else {
                (empty, 0)
            };
            for (gi, cy) in carry.iter_mut().enumerate().take(full) {
                let i = row + gi * L;
                let g = Group {
                    r: load(flat.r, i),
                    v: if has.v {
                        load(vs, i)
                    } else {
                        F64x8::splat(0.0)
                    },
                    vn: if below.is_empty() {
                        F64x8::splat(0.0)
                    } else {
                        load(below, below_at + gi * L)
                    },
                    te: flags8(tes, i),
                    tr: flags8(trs, i),
                };
                if !has.nv {
                    any_tr |= g.tr.iter().any(|&x| x);
                }
                let (y, yv) = step(rule, &g, cy, last);
                *cy = y;
                poison = poison + y.finite_marks();
                store(oa, gi * L, y);
                if let Some(ob) = ob.as_deref_mut() {
                    poison = poison + yv.finite_marks();
                    store(ob, gi * L, yv);
                }
            }
            if rest > 0 {
                // The last, partial group: padded to 8 lanes in scratch.
                let (j0, i) = (full * L, row + full * L);
                let pad = |src: &[F], at: usize| {
                    let mut x = [0.0; L];
                    if !src.is_empty() {
                        for (x, s) in x.iter_mut().zip(&src[at..at + rest]) {
                            *x = s.to_f64();
                        }
                    }
                    F64x8(x)
                };
                let padf = |src: &[bool]| {
                    let mut x = [false; L];
                    if !src.is_empty() {
                        x[..rest].copy_from_slice(&src[i..i + rest]);
                    }
                    x
                };
                let g = Group {
                    r: pad(flat.r, i),
                    v: pad(vs, i),
                    vn: pad(below, below_at + j0),
                    te: padf(tes),
                    tr: padf(trs),
                };
                if !has.nv {
                    any_tr |= g.tr.iter().any(|&x| x);
                }
                let cy = &mut carry[full];
                let (y, yv) = step(rule, &g, cy, last);
                *cy = y;
                for j in 0..rest {
                    poison.0[j] += finite_mark(y.0[j]);
                    oa[j0 + j] = F::from_f64(y.0[j]);
                }
                if let Some(ob) = ob {
                    for j in 0..rest {
                        poison.0[j] += finite_mark(yv.0[j]);
                        ob[j0 + j] = F::from_f64(yv.0[j]);
                    }
                }
            }
        }
        Flags {
            non_finite: !poison.0.iter().all(|&p| p == 0.0),
            truncated_without_next: any_tr,
        }
    }
}
