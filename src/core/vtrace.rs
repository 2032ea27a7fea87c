//! V-trace targets and policy-gradient advantages (Espeholt et al. 2018,
//! section 4.1) over time-major buffers viewed as `[T, M]`.
//!
//! With `ratio_t = exp(target_log_prob_t - behaviour_log_prob_t)` ([`fastmath::exp`]),
//!
//! ```text
//! rho_t   = min(rho_bar, ratio_t)
//! c_t     = lam * min(c_bar, ratio_t)
//! delta_t = rho_t * (r_t + gamma * V'_t - V(s_t))
//! vs_t    = V(s_t) + delta_t + gamma * c_t * (1 - end_t) * (vs_{t+1} - V(s_{t+1}))
//! pg_t    = rho_t * (r_t + gamma * vnext_t - V(s_t))
//! vnext_t = vs_{t+1}   inside an episode (values[t+1] + (vs_{t+1} - V(s_{t+1})))
//!         = V'_t       at an episode end or the last row
//! ```
//!
//! `V'_t` and `end_t` follow the bootstrap rule of [`super::timemajor`]; the
//! tile loop, validation and tiling are the ones GAE uses. On-policy
//! (`ratio = 1`) with `rho_bar = c_bar = 1` the targets are the
//! lambda-returns of GAE with the same `lam`.

use super::error::{check_unit, CoreError, CoreResult};
use super::fastmath;
use super::float::Real;
use super::par::Par;
use super::rows;
use super::timemajor::{self, Row, StepRule, Steps, Store};
use ndarray::{ArrayView2, ArrayViewMut2};

/// The coefficients of [`vtrace`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VtraceParams {
    /// Discount, in `[0, 1]`.
    pub gamma: f64,
    /// Trace coefficient multiplying `c_t`, in `[0, 1]`.
    pub lam: f64,
    /// Truncation level of `rho_t` (>= 0, `inf` for none).
    pub rho_bar: f64,
    /// Truncation level of `c_t` (>= 0, `inf` for none).
    pub c_bar: f64,
}

struct VtraceRule {
    p: VtraceParams,
}

/// `min(bar, x)` that lets a NaN `x` through (so `check_finite=False`
/// propagates NaN instead of hiding it behind the bar).
#[inline(always)]
pub(crate) fn cap(x: f64, bar: f64) -> f64 {
    if x > bar {
        bar
    } else {
        x
    }
}

impl StepRule for VtraceRule {
    const VALUES: bool = true;
    // One index loop over eight parallel slices reads best.
    #[allow(clippy::needless_range_loop)]
    #[inline(always)]
    fn row(&self, row: &Row<'_>, y: &mut [f64], carry: &mut [f64], aux: &mut [f64]) {
        let VtraceParams {
            gamma,
            lam,
            rho_bar,
            c_bar,
        } = self.p;
        let n = y.len();
        // Equal lengths up front let the loop run without bounds checks.
        let (blp, tlp) = (&row.extra[0][..n], &row.extra[1][..n]);
        let vn = &row.next_values.unwrap_or(row.values_below)[..n];
        let (te, tr) = (&row.te[..n], &row.tr[..n]);
        let (values, below_v) = (&row.values[..n], &row.values_below[..n]);
        let (carry, aux) = (&mut carry[..n], &mut aux[..n]);
        let last = row.last;
        // Two plain loops (the loop vectoriser handles both): the ratios
        // first, parked in `aux`, then the rest of the step, which replaces
        // each ratio by its pg advantage.
        for ((a, &t), &b) in aux.iter_mut().zip(tlp).zip(blp) {
            *a = fastmath::exp(t - b);
        }
        for j in 0..n {
            let ratio = aux[j];
            let rho = cap(ratio, rho_bar);
            let cs = lam * cap(ratio, c_bar);
            let end = te[j] | tr[j];
            let vp = if te[j] { 0.0 } else { vn[j] };
            let (r, v, below) = (y[j], values[j], carry[j]);
            // vs_{t+1} inside an episode, V'_t at an end or the last row.
            let vnext = if end | last { vp } else { below_v[j] + below };
            aux[j] = rho * (r + gamma * vnext - v);
            let d = rho * (r + gamma * vp - v);
            let a = if end { d } else { d + gamma * cs * below };
            y[j] = a;
            carry[j] = a;
        }
    }
}

/// V-trace targets `vs` and policy-gradient advantages `pg` (module docs),
/// written to `vs_out` and `pg_out` (`[T, M]`, any strides).
///
/// `behaviour_log_prob` / `target_log_prob` are `log mu(a_t | s_t)` and
/// `log pi(a_t | s_t)` with the shape of `rewards`; `steps.values` is required.
#[allow(clippy::too_many_arguments)]
pub fn vtrace<F: Real>(
    steps: &Steps<'_, F>,
    behaviour_log_prob: ArrayView2<'_, F>,
    target_log_prob: ArrayView2<'_, F>,
    p: VtraceParams,
    check_finite: bool,
    vs_out: ArrayViewMut2<'_, F>,
    pg_out: ArrayViewMut2<'_, F>,
    par: Par,
) -> CoreResult<()> {
    check_unit("gamma", p.gamma)?;
    check_unit("lam", p.lam)?;
    for (name, bar) in [("rho_bar", p.rho_bar), ("c_bar", p.c_bar)] {
        if bar.is_nan() || bar < 0.0 {
            return Err(CoreError::input(
                name,
                format!("must be >= 0 (inf for no truncation), got {bar}"),
            ));
        }
    }
    let shape = steps.rewards.shape();
    for (name, a) in [
        ("behaviour_log_prob", &behaviour_log_prob),
        ("target_log_prob", &target_log_prob),
    ] {
        if a.shape() != shape {
            return Err(CoreError::shape_mismatch(
                name,
                a.shape(),
                "rewards",
                shape,
                "per-step arrays must have the shape of rewards",
            ));
        }
    }
    let (mut vs_out, mut pg_out) = (vs_out, pg_out);
    // C-contiguous buffers: one pass over the caller's arrays (rows.rs);
    // same bits as the tile loop below.
    let logp = [
        ("behaviour_log_prob", &behaviour_log_prob),
        ("target_log_prob", &target_log_prob),
    ];
    let done = timemajor::direct(steps, true, check_finite, &logp, par, |s| {
        timemajor::check_out("out[0]", vs_out.shape(), shape)?;
        timemajor::check_out("out[1]", pg_out.shape(), shape)?;
        Ok(rows::try_vtrace(
            s,
            behaviour_log_prob.view(),
            target_log_prob.view(),
            p,
            vs_out.view_mut(),
            pg_out.view_mut(),
            par,
        ))
    })?;
    if done.is_some() {
        return Ok(());
    }
    steps.validate(true, check_finite, par)?;
    if check_finite {
        timemajor::check_finite_2d("behaviour_log_prob", &behaviour_log_prob, par)?;
        timemajor::check_finite_2d("target_log_prob", &target_log_prob, par)?;
    }
    timemajor::check_out("out[0]", vs_out.shape(), shape)?;
    timemajor::check_out("out[1]", pg_out.shape(), shape)?;
    timemajor::run(
        steps,
        &[behaviour_log_prob, target_log_prob],
        &VtraceRule { p },
        (Store::YPlusV, Some(Store::Aux)),
        vs_out,
        Some(pg_out),
        par,
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::core::timemajor::gae;
    use crate::core::{At, CoreError};
    use ndarray::{Array1, Array2, ShapeBuilder};

    fn lcg(seed: &mut u64) -> f64 {
        *seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*seed >> 11) as f64) / ((1u64 << 53) as f64)
    }

    struct Data {
        r: Array2<f64>,
        v: Array2<f64>,
        nv: Array2<f64>,
        term: Array2<bool>,
        trunc: Array2<bool>,
        blp: Array2<f64>,
        tlp: Array2<f64>,
        boot: Array1<f64>,
    }

    fn data(t: usize, m: usize, seed: &mut u64) -> Data {
        let mut f = |a: f64, b: f64| Array2::from_shape_fn((t, m), |_| a + (b - a) * lcg(seed));
        let r = f(-1.0, 1.0);
        let v = f(0.0, 1.0);
        let nv = f(0.0, 1.0);
        let blp = f(-2.0, 0.0);
        let tlp = f(-2.0, 0.0);
        let term = Array2::from_shape_fn((t, m), |_| lcg(seed) < 0.05);
        let trunc = Array2::from_shape_fn((t, m), |_| lcg(seed) < 0.05);
        let boot = Array1::from_shape_fn(m, |_| lcg(seed));
        Data {
            r,
            v,
            nv,
            term,
            trunc,
            blp,
            tlp,
            boot,
        }
    }

    /// A plain loop written from Espeholt et al. 2018, section 4.1, recursive
    /// form v_s = V(x_s) + delta_s + gamma c_s (v_{s+1} - V(x_{s+1})), with the
    /// crate's episode-end rule: one stream, one step at a time.
    fn reference(
        d: &Data,
        use_nv: bool,
        use_trunc: bool,
        p: VtraceParams,
    ) -> (Array2<f64>, Array2<f64>) {
        let (t_len, m_len) = d.r.dim();
        let mut vs = Array2::zeros((t_len, m_len));
        let mut pg = Array2::zeros((t_len, m_len));
        for m in 0..m_len {
            // (v_{s+1} - V(x_{s+1})) and V(x_{s+1}) from the values array.
            let mut corr_next = 0.0;
            let mut v_next_arr = d.boot[m];
            for t in (0..t_len).rev() {
                let te = d.term[[t, m]];
                let tr = use_trunc && d.trunc[[t, m]];
                let vp = if te {
                    0.0
                } else if use_nv {
                    d.nv[[t, m]]
                } else {
                    v_next_arr
                };
                let ratio = (d.tlp[[t, m]] - d.blp[[t, m]]).exp();
                let rho = ratio.min(p.rho_bar);
                let c = p.lam * ratio.min(p.c_bar);
                let v = d.v[[t, m]];
                let delta = rho * (d.r[[t, m]] + p.gamma * vp - v);
                let end = te || tr;
                let corr = delta + if end { 0.0 } else { p.gamma * c * corr_next };
                vs[[t, m]] = v + corr;
                let vnext = if end || t + 1 == t_len {
                    vp
                } else {
                    v_next_arr + corr_next
                };
                pg[[t, m]] = rho * (d.r[[t, m]] + p.gamma * vnext - v);
                corr_next = corr;
                v_next_arr = v;
            }
        }
        (vs, pg)
    }

    fn close(a: &Array2<f64>, b: &Array2<f64>, tol: f64) -> bool {
        a.iter()
            .zip(b.iter())
            .all(|(x, y)| (x - y).abs() <= tol * (1.0 + y.abs()))
    }

    #[test]
    fn matches_recursive_form_in_all_layouts() {
        let mut seed = 11u64;
        let p = VtraceParams {
            gamma: 0.97,
            lam: 0.9,
            rho_bar: 1.0,
            c_bar: 0.8,
        };
        for &(t, m) in &[
            (1usize, 1usize),
            (6, 3),
            (41, 9),
            (300, 300),
            (1500, 2),
            (3, 700),
        ] {
            let d = data(t, m, &mut seed);
            for par in [Par::Seq, Par::Rayon] {
                // With next_values and truncations.
                let steps = Steps {
                    values: Some(d.v.view()),
                    next_values: Some(d.nv.view()),
                    terminated: Some(d.term.view()),
                    truncated: Some(d.trunc.view()),
                    ..Steps::new(d.r.view())
                };
                let mut vs = Array2::zeros((t, m));
                let mut pg = Array2::zeros((t, m).f());
                vtrace(
                    &steps,
                    d.blp.view(),
                    d.tlp.view(),
                    p,
                    true,
                    vs.view_mut(),
                    pg.view_mut(),
                    par,
                )
                .unwrap();
                let (rv, rp) = reference(&d, true, true, p);
                assert!(close(&vs, &rv, 1e-12));
                assert!(close(&pg, &rp, 1e-12));
                // Bootstrap, values[t+1] inside episodes, Fortran-order rewards.
                let mut rf = Array2::zeros((t, m).f());
                rf.assign(&d.r);
                let steps = Steps {
                    values: Some(d.v.view()),
                    terminated: Some(d.term.view()),
                    bootstrap: Some(d.boot.view()),
                    ..Steps::new(rf.view())
                };
                vtrace(
                    &steps,
                    d.blp.view(),
                    d.tlp.view(),
                    p,
                    true,
                    vs.view_mut(),
                    pg.view_mut(),
                    par,
                )
                .unwrap();
                let (rv, rp) = reference(&d, false, false, p);
                assert!(close(&vs, &rv, 1e-12));
                assert!(close(&pg, &rp, 1e-12));
            }
        }
    }

    #[test]
    fn on_policy_targets_are_lambda_returns() {
        // Espeholt et al. 2018, remark after eq. 1: on-policy with c = lam the
        // targets are the lambda-returns.
        let mut seed = 3u64;
        let d = data(200, 17, &mut seed);
        let steps = Steps {
            values: Some(d.v.view()),
            terminated: Some(d.term.view()),
            bootstrap: Some(d.boot.view()),
            ..Steps::new(d.r.view())
        };
        let p = VtraceParams {
            gamma: 0.99,
            lam: 0.95,
            rho_bar: 1.0,
            c_bar: 1.0,
        };
        let mut vs = Array2::zeros((200, 17));
        let mut pg = Array2::zeros((200, 17));
        vtrace(
            &steps,
            d.blp.view(),
            d.blp.view(),
            p,
            true,
            vs.view_mut(),
            pg.view_mut(),
            Par::Seq,
        )
        .unwrap();
        let mut adv = Array2::zeros((200, 17));
        let mut ret = Array2::zeros((200, 17));
        gae(
            &steps,
            0.99,
            0.95,
            None,
            true,
            adv.view_mut(),
            ret.view_mut(),
            Par::Seq,
        )
        .unwrap();
        assert!(close(&vs, &ret, 1e-13));
    }

    #[test]
    fn thread_count_does_not_change_bits() {
        let mut seed = 5u64;
        let d = data(700, 300, &mut seed);
        let r32 = d.r.mapv(|x| x as f32);
        let v32 = d.v.mapv(|x| x as f32);
        let b32 = d.blp.mapv(|x| x as f32);
        let t32 = d.tlp.mapv(|x| x as f32);
        let steps = Steps {
            values: Some(v32.view()),
            terminated: Some(d.term.view()),
            ..Steps::new(r32.view())
        };
        let p = VtraceParams {
            gamma: 0.99,
            lam: 1.0,
            rho_bar: 1.0,
            c_bar: 1.0,
        };
        let mut out = [(); 4].map(|_| Array2::<f32>::zeros((700, 300)));
        let [a, b, c, e] = &mut out;
        vtrace(
            &steps,
            b32.view(),
            t32.view(),
            p,
            true,
            a.view_mut(),
            b.view_mut(),
            Par::Seq,
        )
        .unwrap();
        vtrace(
            &steps,
            b32.view(),
            t32.view(),
            p,
            true,
            c.view_mut(),
            e.view_mut(),
            Par::Rayon,
        )
        .unwrap();
        assert_eq!(a, c);
        assert_eq!(b, e);
        // The tile loop (taken for Fortran-ordered inputs; the C-ordered ones
        // above take rows.rs) agrees bitwise, on its AVX2 path (when the CPU
        // has it) and on its baseline path.
        let (rf, vf, bf, tf) = (fortran(&r32), fortran(&v32), fortran(&b32), fortran(&t32));
        let steps_f = Steps {
            values: Some(vf.view()),
            terminated: Some(d.term.view()),
            ..Steps::new(rf.view())
        };
        for wide_off in [false, true] {
            crate::core::fastmath::set_wide_off(wide_off);
            c.fill(0.0);
            e.fill(0.0);
            let res = vtrace(
                &steps_f,
                bf.view(),
                tf.view(),
                p,
                true,
                c.view_mut(),
                e.view_mut(),
                Par::Seq,
            );
            crate::core::fastmath::set_wide_off(false);
            res.unwrap();
            assert_eq!(a, c, "wide_off={wide_off}");
            assert_eq!(b, e, "wide_off={wide_off}");
        }
    }

    #[test]
    fn errors_name_argument_and_index() {
        let mut seed = 9u64;
        let mut d = data(5, 3, &mut seed);
        let p = VtraceParams {
            gamma: 0.9,
            lam: 1.0,
            rho_bar: 1.0,
            c_bar: 1.0,
        };
        let mut vs = Array2::zeros((5, 3));
        let mut pg = Array2::zeros((5, 3));
        d.tlp[[2, 1]] = f64::NAN;
        let steps = Steps {
            values: Some(d.v.view()),
            ..Steps::new(d.r.view())
        };
        let e = vtrace(
            &steps,
            d.blp.view(),
            d.tlp.view(),
            p,
            true,
            vs.view_mut(),
            pg.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert_eq!(
            e,
            CoreError::non_finite("target_log_prob", At::TimeStream(2, 1))
        );
        // check_finite=False lets the NaN through to both outputs.
        vtrace(
            &steps,
            d.blp.view(),
            d.tlp.view(),
            p,
            false,
            vs.view_mut(),
            pg.view_mut(),
            Par::Seq,
        )
        .unwrap();
        assert!(vs[[2, 1]].is_nan() && pg[[2, 1]].is_nan());
        let short = Array2::<f64>::zeros((4, 3));
        let e = vtrace(
            &steps,
            short.view(),
            d.tlp.view(),
            p,
            true,
            vs.view_mut(),
            pg.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(
            matches!(e, CoreError::Shape(ref s) if s.starts_with("behaviour_log_prob has shape (4, 3)"))
        );
        let bad = VtraceParams { rho_bar: -1.0, ..p };
        let e = vtrace(
            &steps,
            d.blp.view(),
            d.blp.view(),
            bad,
            true,
            vs.view_mut(),
            pg.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Input { arg: "rho_bar", .. }));
        let no_values = Steps::new(d.r.view());
        let e = vtrace(
            &no_values,
            d.blp.view(),
            d.blp.view(),
            p,
            true,
            vs.view_mut(),
            pg.view_mut(),
            Par::Seq,
        )
        .unwrap_err();
        assert!(matches!(e, CoreError::Input { arg: "values", .. }));
    }

    /// A Fortran-ordered copy (the general tile loop reads it).
    fn fortran<T: Clone + Default>(a: &Array2<T>) -> Array2<T> {
        let mut f = Array2::from_elem(a.raw_dim().f(), T::default());
        f.assign(a);
        f
    }

    /// The contiguous fast path (rows.rs) and the general tile loop (taken
    /// for Fortran-ordered copies of the same data) give the same bits: both
    /// storage types, every optional input, truncation levels that bind and
    /// that do not, widths that are not a multiple of 8, 1 or N threads.
    #[test]
    fn fast_path_equals_tile_loop_bit_for_bit() {
        fn check<F: Real + Default>(d: &Data, p: VtraceParams, nv_mode: usize, flags: usize) {
            let cv = |a: &Array2<f64>| a.mapv(F::from_f64);
            let (r, v, nv, blp, tlp) = (cv(&d.r), cv(&d.v), cv(&d.nv), cv(&d.blp), cv(&d.tlp));
            let boot = d.boot.mapv(F::from_f64);
            let (rf, vf, nvf, blpf, tlpf) = (
                fortran(&r),
                fortran(&v),
                fortran(&nv),
                fortran(&blp),
                fortran(&tlp),
            );
            let (tef, trf) = (fortran(&d.term), fortran(&d.trunc));
            // nv_mode: 0 next_values (truncations allowed), 1 bootstrap, 2 neither.
            let with_te = flags & 1 != 0;
            let with_tr = flags & 2 != 0 && nv_mode == 0;
            let make = |r, v, nv, te, tr| Steps {
                values: Some(v),
                next_values: if nv_mode == 0 { Some(nv) } else { None },
                terminated: if with_te { Some(te) } else { None },
                truncated: if with_tr { Some(tr) } else { None },
                bootstrap: if nv_mode == 1 {
                    Some(boot.view())
                } else {
                    None
                },
                ..Steps::new(r)
            };
            let c = make(r.view(), v.view(), nv.view(), d.term.view(), d.trunc.view());
            let f = make(rf.view(), vf.view(), nvf.view(), tef.view(), trf.view());
            let dim = d.r.raw_dim();
            for par in [Par::Seq, Par::Rayon] {
                let (mut vc, mut pc) = (Array2::<F>::default(dim), Array2::<F>::default(dim));
                let mut vfo = Array2::<F>::default(dim.f());
                let mut pfo = Array2::<F>::default(dim.f());
                vtrace(
                    &c,
                    blp.view(),
                    tlp.view(),
                    p,
                    true,
                    vc.view_mut(),
                    pc.view_mut(),
                    par,
                )
                .unwrap();
                vtrace(
                    &f,
                    blpf.view(),
                    tlpf.view(),
                    p,
                    true,
                    vfo.view_mut(),
                    pfo.view_mut(),
                    par,
                )
                .unwrap();
                let same = |a: &Array2<F>, b: &Array2<F>| {
                    a.iter()
                        .zip(b.iter())
                        .all(|(x, y)| x.to_f64().to_bits() == y.to_f64().to_bits())
                };
                let what = format!(
                    "{} {:?} nv_mode={nv_mode} flags={flags} {par:?}",
                    F::NAME,
                    dim
                );
                assert!(same(&vc, &vfo), "vs {what}");
                assert!(same(&pc, &pfo), "pg {what}");
                // The fast path runs the widest vector unit; the tile loop on
                // the baseline one still gives its bits.
                crate::core::fastmath::set_wide_off(true);
                vtrace(
                    &f,
                    blpf.view(),
                    tlpf.view(),
                    p,
                    true,
                    vfo.view_mut(),
                    pfo.view_mut(),
                    par,
                )
                .unwrap();
                crate::core::fastmath::set_wide_off(false);
                assert!(same(&vc, &vfo), "vs baseline {what}");
                assert!(same(&pc, &pfo), "pg baseline {what}");
            }
        }
        let mut seed = 21u64;
        let ps = [
            VtraceParams {
                gamma: 0.97,
                lam: 0.9,
                rho_bar: 1.0,
                c_bar: 0.8,
            },
            VtraceParams {
                gamma: 0.99,
                lam: 1.0,
                rho_bar: f64::INFINITY,
                c_bar: f64::INFINITY,
            },
        ];
        for &(t, m) in &[(1usize, 1usize), (7, 5), (64, 8), (37, 19), (300, 333)] {
            let d = data(t, m, &mut seed);
            for p in ps {
                for nv_mode in 0..3 {
                    for flags in 0..4 {
                        check::<f64>(&d, p, nv_mode, flags);
                        check::<f32>(&d, p, nv_mode, flags);
                    }
                }
            }
        }
    }

    /// The fast path checks after the fact, and reports the same first error
    /// as the up-front checks of the general loop (steps first, then the
    /// log-probabilities), whatever the layout.
    #[test]
    fn fast_path_reports_the_same_error_as_tile_loop() {
        let mut seed = 13u64;
        let p = VtraceParams {
            gamma: 0.9,
            lam: 1.0,
            rho_bar: 1.0,
            c_bar: 1.0,
        };
        let base = data(40, 20, &mut seed);
        let run = |d: &Data, fortran_order: bool, with_tr: bool| {
            let pick = |a: &Array2<f64>| if fortran_order { fortran(a) } else { a.clone() };
            let (r, v, blp, tlp) = (pick(&d.r), pick(&d.v), pick(&d.blp), pick(&d.tlp));
            let steps = Steps {
                values: Some(v.view()),
                terminated: Some(d.term.view()),
                truncated: if with_tr { Some(d.trunc.view()) } else { None },
                ..Steps::new(r.view())
            };
            let mut vs = Array2::zeros((40, 20));
            let mut pg = Array2::zeros((40, 20));
            vtrace(
                &steps,
                blp.view(),
                tlp.view(),
                p,
                true,
                vs.view_mut(),
                pg.view_mut(),
                Par::Seq,
            )
            .unwrap_err()
        };
        // A truncation without next_values.
        let e = run(&base, false, true);
        assert_eq!(e, run(&base, true, true));
        assert!(matches!(
            e,
            CoreError::Input {
                arg: "truncated",
                ..
            }
        ));
        // One bad value in each input, then two (the earlier input wins).
        let mut cases: Vec<(Data, &str)> = Vec::new();
        for (k, name) in ["rewards", "values", "behaviour_log_prob", "target_log_prob"]
            .into_iter()
            .enumerate()
        {
            let mut d = data(40, 20, &mut seed);
            let bad = [f64::NAN, f64::INFINITY, f64::NEG_INFINITY][k % 3];
            [&mut d.r, &mut d.v, &mut d.blp, &mut d.tlp][k][[3 + 7 * k, 19 - k]] = bad;
            cases.push((d, name));
        }
        let mut d = data(40, 20, &mut seed);
        d.tlp[[0, 0]] = f64::NAN;
        d.v[[39, 19]] = f64::INFINITY;
        cases.push((d, "values"));
        for (d, name) in &cases {
            let e = run(d, false, false);
            assert_eq!(e, run(d, true, false));
            assert!(
                matches!(e, CoreError::Input { arg, .. } if arg == *name),
                "{e:?}"
            );
        }
    }
}
