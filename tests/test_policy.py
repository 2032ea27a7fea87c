"""Policy-update and off-policy kernels, running statistics, episode tracking.

References are written from the definitions in this file (NumPy, float64);
each test names its source beside it.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest
import rollscan
from hypothesis import example, given, settings
from hypothesis import strategies as st
from rollscan import (
    EpisodeTracker,
    InputError,
    ReturnScaler,
    RunningMoments,
    ShapeError,
    clipped_surrogate,
    vtrace,
)

FAST = settings(max_examples=40, deadline=None)


# --------------------------------------------------------------------------
# References
# --------------------------------------------------------------------------


def vtrace_ref(blp, tlp, r, v, term, trunc, nv, boot, gamma, lam, rho_bar, c_bar):
    """Espeholt et al. 2018, section 4.1, recursive form
    v_s = V(x_s) + delta_s V + gamma c_s (v_{s+1} - V(x_{s+1})),
    delta_s V = rho_s (r_s + gamma V(x_{s+1}) - V(x_s)); pg advantage
    rho_s (r_s + gamma v_{s+1} - V(x_s)). Episode ends follow the rules
    of gae (the bootstrap rule V'_t). A plain float64 loop over time."""
    blp, tlp, r, v = (np.asarray(a, np.float64) for a in (blp, tlp, r, v))
    t_len = r.shape[0]
    rest = r.shape[1:]
    term = np.zeros(r.shape, bool) if term is None else term
    trunc = np.zeros(r.shape, bool) if trunc is None else trunc
    vs = np.zeros(r.shape)
    pg = np.zeros(r.shape)
    corr_next = np.zeros(rest)
    v_next = np.zeros(rest) if boot is None else np.broadcast_to(np.asarray(boot, np.float64), rest)
    for t in reversed(range(t_len)):
        ratio = np.exp(tlp[t] - blp[t])
        rho = np.minimum(rho_bar, ratio)
        c = lam * np.minimum(c_bar, ratio)
        vp = np.asarray(nv[t], np.float64) if nv is not None else v_next
        vp = np.where(term[t], 0.0, vp)
        end = term[t] | trunc[t]
        delta = rho * (r[t] + gamma * vp - v[t])
        corr = delta + np.where(end, 0.0, gamma * c * corr_next)
        vs[t] = v[t] + corr
        nextv = vp if t == t_len - 1 else np.where(end, vp, v[t + 1] + corr_next)
        pg[t] = rho * (r[t] + gamma * nextv - v[t])
        corr_next = corr
        v_next = v[t]
    return vs, pg


def surrogate_ref(new, old, adv, clip, mask=None):
    """Schulman et al. 2017, eq. 7, negated and averaged over the selected
    elements; approx_kl = mean((r - 1) - log r) (common practice, no source)."""
    new, old, adv = (np.asarray(a, np.float64) for a in (new, old, adv))
    m = np.ones(new.shape, bool) if mask is None else np.asarray(mask)
    r = np.exp(new - old)
    obj = np.minimum(r * adv, np.clip(r, 1 - clip, 1 + clip) * adv)
    return {
        "loss": -obj[m].mean(),
        "approx_kl": ((r - 1) - (new - old))[m].mean(),
        "clip_fraction": (np.abs(r - 1) > clip)[m].mean(),
        "ratio_mean": r[m].mean(),
        "ratio_max": r[m].max(),
    }


def rollout(rng, t_len, n, p_end=0.1):
    r = rng.normal(size=(t_len, n))
    v = rng.normal(size=(t_len, n))
    nv = rng.normal(size=(t_len, n))
    blp = rng.uniform(-2.0, 0.0, size=(t_len, n))
    tlp = blp + rng.normal(scale=0.5, size=(t_len, n))
    term = rng.random((t_len, n)) < p_end
    trunc = (rng.random((t_len, n)) < p_end) & ~term
    boot = rng.normal(size=n)
    return blp, tlp, r, v, nv, term, trunc, boot


# --------------------------------------------------------------------------
# vtrace
# --------------------------------------------------------------------------


@pytest.mark.parametrize("lam", [0.0, 0.7, 1.0])
def test_vtrace_on_policy_equals_gae_lambda_returns(lam):
    # Espeholt et al. 2018, the on-policy remark after eq. 1: with pi = mu and
    # rho_bar = c_bar = 1 the V-trace target is the lambda-return, i.e. the
    # `returns` of gae(..., lam=lam).
    rng = np.random.default_rng(0)
    blp, _, r, v, nv, term, trunc, boot = rollout(rng, 60, 5)
    vs, pg = vtrace(blp, blp, r, v, term, gamma=0.95, lam=lam, bootstrap=boot)
    _, ret = rollscan.gae(r, v, term, gamma=0.95, lam=lam, bootstrap=boot)
    np.testing.assert_allclose(vs, ret, rtol=1e-12, atol=1e-12)
    # On-policy pg advantage is r + gamma * vs_{t+1} - V (same paper, eq. 4 with rho = 1).
    nxt = np.concatenate([vs[1:], boot[None]])
    want = r + 0.95 * np.where(term, 0.0, nxt) - v
    np.testing.assert_allclose(pg, want, rtol=1e-12, atol=1e-12)
    # The same with truncations and next_values.
    vs, _ = vtrace(blp, blp, r, v, term, gamma=0.95, lam=lam, truncated=trunc, next_values=nv)
    _, ret = rollscan.gae(r, v, term, gamma=0.95, lam=lam, truncated=trunc, next_values=nv)
    np.testing.assert_allclose(vs, ret, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize(
    ("rho_bar", "c_bar", "lam"), [(1.0, 1.0, 1.0), (2.0, 0.5, 0.9), (np.inf, 1.0, 1.0)]
)
def test_vtrace_matches_recursive_loop_off_policy(rho_bar, c_bar, lam):
    # Espeholt et al. 2018, section 4.1 (reference loop above).
    rng = np.random.default_rng(1)
    blp, tlp, r, v, nv, term, trunc, boot = rollout(rng, 80, 7)
    vs, pg = vtrace(
        blp, tlp, r, v, term, gamma=0.9, bootstrap=boot, rho_bar=rho_bar, c_bar=c_bar, lam=lam
    )
    rv, rp = vtrace_ref(blp, tlp, r, v, term, None, None, boot, 0.9, lam, rho_bar, c_bar)
    np.testing.assert_allclose(vs, rv, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(pg, rp, rtol=1e-12, atol=1e-12)
    vs, pg = vtrace(
        blp,
        tlp,
        r,
        v,
        term,
        gamma=0.9,
        truncated=trunc,
        next_values=nv,
        rho_bar=rho_bar,
        c_bar=c_bar,
        lam=lam,
    )
    rv, rp = vtrace_ref(blp, tlp, r, v, term, trunc, nv, None, 0.9, lam, rho_bar, c_bar)
    np.testing.assert_allclose(vs, rv, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(pg, rp, rtol=1e-12, atol=1e-12)


@FAST
@given(
    t_len=st.integers(0, 30),
    n=st.integers(1, 4),
    seed=st.integers(0, 2**32 - 1),
    gamma=st.sampled_from([0.0, 0.5, 0.99, 1.0]),
)
def test_vtrace_property_against_loop(t_len, n, seed, gamma):
    # Espeholt et al. 2018, section 4.1 (reference loop above).
    rng = np.random.default_rng(seed)
    blp, tlp, r, v, nv, term, trunc, _ = rollout(rng, t_len, n, p_end=0.2)
    vs, pg = vtrace(blp, tlp, r, v, term, gamma=gamma, truncated=trunc, next_values=nv, c_bar=0.9)
    rv, rp = vtrace_ref(blp, tlp, r, v, term, trunc, nv, None, gamma, 1.0, 1.0, 0.9)
    np.testing.assert_allclose(vs, rv, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(pg, rp, rtol=1e-12, atol=1e-12)


def test_vtrace_float32_is_float64_rounded_once():
    # Common rule of every kernel: float32 accumulates in float64 and rounds once.
    rng = np.random.default_rng(2)
    blp, tlp, r, v, _, term, _, boot = (
        a.astype(np.float32) if a.dtype == np.float64 else a for a in rollout(rng, 50, 6)
    )
    vs32, pg32 = vtrace(blp, tlp, r, v, term, gamma=0.99, bootstrap=boot.astype(np.float64))
    assert vs32.dtype == np.float32 and pg32.dtype == np.float32
    vs64, pg64 = vtrace(
        *(a.astype(np.float64) for a in (blp, tlp, r, v)), term, gamma=0.99, bootstrap=boot
    )
    np.testing.assert_array_equal(vs32, vs64.astype(np.float32))
    np.testing.assert_array_equal(pg32, pg64.astype(np.float32))
    # Mixed float32 / float64 per-step arrays promote to float64.
    vs, _ = vtrace(blp, tlp, r, v.astype(np.float64), term, gamma=0.99)
    assert vs.dtype == np.float64
    # Integer rewards promote to float64.
    vs, _ = vtrace(blp, tlp, np.ones((50, 6), np.int32), v, gamma=0.99)
    assert vs.dtype == np.float64


def test_vtrace_strided_layouts_and_time_axis():
    # Layout invariance: the same numbers read through views (common practice, no source).
    rng = np.random.default_rng(3)
    blp, tlp, r, v, _, term, _, boot = rollout(rng, 40, 6)
    want_vs, want_pg = vtrace(blp, tlp, r, v, term, gamma=0.9, bootstrap=boot)
    big = [np.repeat(a, 2, axis=1)[:, ::2] for a in (blp, tlp, r, v)]
    vs, pg = vtrace(*big, term, gamma=0.9, bootstrap=boot)
    np.testing.assert_array_equal(vs, want_vs)
    np.testing.assert_array_equal(pg, want_pg)
    fort = [np.asfortranarray(a) for a in (blp, tlp, r, v)]
    vs, _ = vtrace(*fort, np.asfortranarray(term), gamma=0.9, bootstrap=boot)
    np.testing.assert_array_equal(vs, want_vs)
    # Time on axis 1, streams reversed (negative strides).
    tr = [a.T[::-1] for a in (blp, tlp, r, v)]
    vs, pg = vtrace(*tr, term.T[::-1], gamma=0.9, bootstrap=boot[::-1], time_axis=1)
    np.testing.assert_array_equal(vs, want_vs.T[::-1])
    np.testing.assert_array_equal(pg, want_pg.T[::-1])
    # [T] and [T, N, K].
    vs1, _ = vtrace(
        blp[:, 0], tlp[:, 0], r[:, 0], v[:, 0], term[:, 0], gamma=0.9, bootstrap=boot[0]
    )
    np.testing.assert_array_equal(vs1, want_vs[:, 0])
    r3 = [a.reshape(40, 3, 2) for a in (blp, tlp, r, v)]
    vs3, _ = vtrace(*r3, term.reshape(40, 3, 2), gamma=0.9, bootstrap=boot.reshape(3, 2))
    np.testing.assert_array_equal(vs3, want_vs.reshape(40, 3, 2))


def test_vtrace_out_and_errors():
    rng = np.random.default_rng(4)
    blp, tlp, r, v, nv, term, trunc, boot = rollout(rng, 10, 3)
    want = vtrace(blp, tlp, r, v, term, gamma=0.9)
    o1 = np.empty((3, 10)).T  # non-contiguous out is fine
    o2 = np.empty((10, 3))
    res = vtrace(blp, tlp, r, v, term, gamma=0.9, out=(o1, o2))
    assert res[0] is o1 and res[1] is o2
    np.testing.assert_array_equal(o1, want[0])
    np.testing.assert_array_equal(o2, want[1])
    with pytest.raises(ShapeError, match="out"):
        vtrace(blp, tlp, r, v, gamma=0.9, out=(np.empty((10, 4)), o2))
    with pytest.raises(TypeError):
        vtrace(blp, tlp, r, v, gamma=0.9, out=(np.empty((10, 3), np.float32), o2))
    ro = np.empty((10, 3))
    ro.flags.writeable = False
    with pytest.raises(TypeError, match="read-only"):
        vtrace(blp, tlp, r, v, gamma=0.9, out=(ro, o2))
    with pytest.raises(ShapeError, match=r"behaviour_log_prob has shape \(9, 3\)"):
        vtrace(blp[:9], tlp, r, v, gamma=0.9)
    with pytest.raises(ShapeError, match="target_log_prob"):
        vtrace(blp, tlp[:, :2], r, v, gamma=0.9)
    with pytest.raises(ShapeError, match="values"):
        vtrace(blp, tlp, r, v[:, :2], gamma=0.9)
    bad = tlp.copy()
    bad[4, 2] = np.nan
    with pytest.raises(InputError, match=r"target_log_prob\[4, 2\]"):
        vtrace(blp, bad, r, v, gamma=0.9)
    vs, _ = vtrace(blp, bad, r, v, gamma=0.9, check_finite=False)
    assert np.isnan(vs[4, 2])
    bad = r.copy()
    bad[7, 0] = np.inf
    with pytest.raises(InputError, match=r"rewards\[7, 0\]"):
        vtrace(blp, tlp, bad, v, gamma=0.9)
    with pytest.raises(InputError, match="gamma"):
        vtrace(blp, tlp, r, v, gamma=1.5)
    with pytest.raises(InputError, match="lam"):
        vtrace(blp, tlp, r, v, gamma=0.9, lam=-0.1)
    with pytest.raises(InputError, match="rho_bar"):
        vtrace(blp, tlp, r, v, gamma=0.9, rho_bar=-1.0)
    with pytest.raises(InputError, match="c_bar"):
        vtrace(blp, tlp, r, v, gamma=0.9, c_bar=np.nan)
    with pytest.raises(InputError, match="truncated steps need next_values"):
        vtrace(blp, tlp, r, v, term, gamma=0.9, truncated=trunc)
    with pytest.raises(InputError, match="bootstrap"):
        vtrace(blp, tlp, r, v, gamma=0.9, bootstrap=boot, next_values=nv)
    with pytest.raises(TypeError):
        vtrace(blp.astype(complex), tlp, r, v, gamma=0.9)


def test_vtrace_thread_count_does_not_change_bits():
    # Common rule of every kernel: bit-identical for 1 and N threads.
    rng = np.random.default_rng(5)
    blp, tlp, r, v, _, term, _, boot = rollout(rng, 600, 200)
    old = rollscan.get_num_threads()
    try:
        rollscan.set_num_threads(1)
        a = vtrace(blp, tlp, r, v, term, gamma=0.99, bootstrap=boot)
        rollscan.set_num_threads(3)
        b = vtrace(blp, tlp, r, v, term, gamma=0.99, bootstrap=boot)
    finally:
        rollscan.set_num_threads(old)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])


# --------------------------------------------------------------------------
# clipped_surrogate
# --------------------------------------------------------------------------


def surrogate_inputs(rng, shape):
    old = rng.uniform(-3.0, -0.5, size=shape)
    new = old + rng.normal(scale=0.3, size=shape)
    adv = rng.normal(size=shape)
    return new, old, adv


@pytest.mark.parametrize("shape", [(1,), (1000,), (37, 11), (4, 5, 6)])
def test_surrogate_matches_eq7(shape):
    # Schulman et al. 2017, eq. 7 (surrogate_ref above).
    rng = np.random.default_rng(6)
    new, old, adv = surrogate_inputs(rng, shape)
    mask = rng.random(shape) < 0.7
    mask.flat[0] = True
    for m in (None, mask):
        res = clipped_surrogate(new, old, adv, clip=0.2, mask=m)
        ref = surrogate_ref(new, old, adv, 0.2, m)
        for k, want in ref.items():
            assert getattr(res, k) == pytest.approx(want, rel=1e-12, abs=1e-14), k
        assert res.grad.shape == shape
        assert res.grad.dtype == np.float64


def test_surrogate_grad_central_differences():
    # Central finite differences of the NumPy implementation of eq. 7
    # (common practice, no source); elements near the clip kink are skipped.
    rng = np.random.default_rng(7)
    new, old, adv = surrogate_inputs(rng, (400,))
    mask = rng.random(400) < 0.8
    res = clipped_surrogate(new, old, adv, clip=0.2, mask=mask)
    h = 1e-6
    r = np.exp(new - old)
    checked = 0
    for i in range(400):
        if abs(abs(r[i] - 1) - 0.2) < 1e-4:
            continue
        p = new.copy()
        p[i] += h
        lp = surrogate_ref(p, old, adv, 0.2, mask)["loss"]
        p[i] -= 2 * h
        lm = surrogate_ref(p, old, adv, 0.2, mask)["loss"]
        assert res.grad[i] == pytest.approx((lp - lm) / (2 * h), abs=1e-9)
        checked += 1
    assert checked > 350
    assert np.all(res.grad[~mask] == 0.0)
    # Clipped elements whose clipped term is the minimum get no gradient.
    assert np.any(res.grad[mask] == 0.0) and np.any(res.grad[mask] != 0.0)


@FAST
@given(
    n=st.integers(1, 200),
    seed=st.integers(0, 2**32 - 1),
    scale=st.floats(0.0, 3.0),
    clip=st.floats(0.0, 1.0),
)
def test_surrogate_approx_kl_nonnegative(n, seed, scale, clip):
    # (r - 1) - log r >= 0 for r > 0 (log r <= r - 1; common practice, no source).
    rng = np.random.default_rng(seed)
    old = rng.uniform(-3, 0, size=n)
    new = old + rng.normal(scale=scale, size=n)
    res = clipped_surrogate(new, old, rng.normal(size=n), clip=clip)
    assert res.approx_kl >= 0.0
    assert 0.0 <= res.clip_fraction <= 1.0
    assert res.ratio_max >= res.ratio_mean > 0.0


def test_surrogate_dtypes_strides_out_errors():
    rng = np.random.default_rng(8)
    new, old, adv = surrogate_inputs(rng, (50, 4))
    want = clipped_surrogate(new, old, adv)
    # float32: accumulated in float64 (common rule of every kernel).
    n32, o32, a32 = (x.astype(np.float32) for x in (new, old, adv))
    r32 = clipped_surrogate(n32, o32, a32)
    r64 = clipped_surrogate(*(x.astype(np.float64) for x in (n32, o32, a32)))
    assert r32.grad.dtype == np.float32
    np.testing.assert_array_equal(r32.grad, r64.grad.astype(np.float32))
    assert r32.loss == r64.loss
    # Strided and Fortran views read in place.
    s = clipped_surrogate(*(np.repeat(x, 3, axis=0)[::3] for x in (new, old, adv)))
    assert s.loss == want.loss
    np.testing.assert_array_equal(s.grad, want.grad)
    f = clipped_surrogate(*(np.asfortranarray(x) for x in (new, old, adv)))
    assert f.loss == pytest.approx(want.loss, rel=1e-14)
    np.testing.assert_array_equal(f.grad, want.grad)
    # out=
    o = np.empty((4, 50)).T
    res = clipped_surrogate(new, old, adv, out=o)
    assert res.grad is o
    np.testing.assert_array_equal(o, want.grad)
    with pytest.raises(ShapeError):
        clipped_surrogate(new, old, adv, out=np.empty((50, 3)))
    with pytest.raises(TypeError):
        clipped_surrogate(new, old, adv, out=np.empty((50, 4), np.float32))
    # Errors.
    with pytest.raises(ShapeError, match=r"old_log_prob has shape \(50, 3\)"):
        clipped_surrogate(new, old[:, :3], adv)
    with pytest.raises(ShapeError, match="mask"):
        clipped_surrogate(new, old, adv, mask=np.ones((50,), bool))
    with pytest.raises(InputError, match="mask"):
        clipped_surrogate(new, old, adv, mask=np.zeros((50, 4), bool))
    with pytest.raises(InputError, match="new_log_prob"):
        clipped_surrogate(np.empty(0), np.empty(0), np.empty(0))
    bad = adv.copy()
    bad[3, 1] = np.nan
    with pytest.raises(InputError, match=r"advantages\[3, 1\]"):
        clipped_surrogate(new, old, bad)
    assert np.isnan(clipped_surrogate(new, old, bad, check_finite=False).loss)
    with pytest.raises(InputError, match="clip"):
        clipped_surrogate(new, old, adv, clip=-0.1)
    with pytest.raises(TypeError):
        clipped_surrogate(new.astype(object), old, adv)


# --------------------------------------------------------------------------
# RunningMoments
# --------------------------------------------------------------------------


@st.composite
def split_batches(draw, shape=()):
    n = draw(st.integers(1, 60))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    x = rng.normal(
        loc=draw(st.floats(-100, 100)), scale=draw(st.floats(0.01, 10)), size=(n, *shape)
    )
    cuts = sorted(draw(st.lists(st.integers(0, n), max_size=6)))
    return x, np.split(x, cuts)


@FAST
@given(data=split_batches())
def test_running_moments_any_split_equals_numpy(data):
    # np.mean / np.var (population) of the concatenated batches (NumPy).
    x, parts = data
    m = RunningMoments()
    for p in parts:
        m.update(p)
    assert m.count == x.shape[0]
    np.testing.assert_allclose(m.mean, np.mean(x, axis=0), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(m.var, np.var(x, axis=0), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(m.std, np.std(x, axis=0), rtol=1e-10, atol=1e-12)


@FAST
@given(data=split_batches(shape=(3, 2)))
def test_running_moments_vector_shape(data):
    # np.mean / np.var over axis 0 (NumPy).
    x, parts = data
    m = RunningMoments((3, 2))
    for p in parts:
        m.update(p)
    np.testing.assert_allclose(m.mean, x.mean(axis=0), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(m.var, x.var(axis=0), rtol=1e-10, atol=1e-12)


_SAME = (np.array([0.7]), [np.array([0.7])])


@FAST
@given(a=split_batches(), b=split_batches(), c=split_batches())
# Three equal values: np.var gives 1.2e-32 (rounding of the mean), the merge 0.
@example(a=_SAME, b=_SAME, c=_SAME)
def test_running_moments_merge_associative(a, b, c):
    # Chan, Golub and LeVeque pairwise update: (a+b)+c == a+(b+c) (to 1e-12).
    def mk(d):
        m = RunningMoments()
        m.update(d[0])
        return m

    ab = mk(a)
    ab.merge(mk(b))
    ab.merge(mk(c))
    bc = mk(b)
    bc.merge(mk(c))
    a_bc = mk(a)
    a_bc.merge(bc)
    assert ab.count == a_bc.count
    np.testing.assert_allclose(ab.mean, a_bc.mean, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ab.var, a_bc.var, rtol=1e-12, atol=1e-12)
    allx = np.concatenate([a[0], b[0], c[0]])
    # A variance computed in float64 carries rounding of about
    # eps * |x| * std (the mean's error times the deviations) plus
    # (eps * |x|)^2, whichever way it is summed: common practice, no source.
    eps, big = np.finfo(np.float64).eps, np.abs(allx).max()
    atol = 8 * eps * big * allx.std() + 8 * (eps * big) ** 2
    np.testing.assert_allclose(ab.var, allx.var(), rtol=1e-10, atol=atol)


def test_running_moments_state_round_trip(tmp_path):
    rng = np.random.default_rng(9)
    m = RunningMoments((4,), dtype=np.float32)
    m.update(rng.normal(size=(100, 4)).astype(np.float32))
    st_ = m.state()
    path = tmp_path / "moments.npz"
    np.savez(path, **st_)
    with np.load(path, allow_pickle=False) as f:
        back = RunningMoments.from_state(dict(f))
    assert back.count == m.count and back.dtype == np.float32
    for k, v in back.state().items():
        np.testing.assert_array_equal(v, st_[k])
    assert back.mean.dtype == np.float32
    # The restored object continues exactly like the original.
    nxt = rng.normal(size=(7, 4))
    m.update(nxt)
    back.update(nxt)
    for k, v in back.state().items():
        np.testing.assert_array_equal(v, m.state()[k])
    with pytest.raises(InputError, match="mean"):
        RunningMoments.from_state({"count": np.array(1)})


def test_running_moments_normalize_and_errors():
    rng = np.random.default_rng(10)
    x = rng.normal(3.0, 2.0, size=(500, 2))
    m = RunningMoments(2)
    with pytest.raises(InputError, match="no samples"):
        m.normalize(x)
    m.update(x)
    # (x - mean) / (std + eps), clipped (common practice, no source).
    want = np.clip((x - x.mean(0)) / (x.std(0) + 1e-8), -1.5, 1.5)
    np.testing.assert_allclose(m.normalize(x, clip=1.5), want, rtol=1e-12, atol=1e-12)
    y = m.normalize(x.astype(np.float32)[::2])
    assert y.dtype == np.float32
    np.testing.assert_allclose(y, ((x[::2].astype(np.float32) - x.mean(0)) / x.std(0)), rtol=1e-5)
    z = m.normalize(np.ones((3, 4, 2), np.int64))
    assert z.shape == (3, 4, 2) and z.dtype == np.float64
    out = np.empty((500, 2))
    assert m.normalize(x, out=out) is out
    with pytest.raises(ShapeError, match=r"batch has shape \(5, 3\)"):
        m.update(np.zeros((5, 3)))
    with pytest.raises(ShapeError):
        m.normalize(np.zeros((5, 3)))
    with pytest.raises(ShapeError):
        m.merge(RunningMoments(3))
    bad = x.copy()
    bad[2, 1] = np.nan
    with pytest.raises(InputError, match="batch"):
        m.update(bad)
    with pytest.raises(TypeError):
        RunningMoments(dtype=np.int32)


def test_running_moments_threads():
    # Several Python threads sharing one object: every update lands once.
    rng = np.random.default_rng(11)
    batches = [rng.normal(size=(50, 3)) for _ in range(64)]
    m = RunningMoments(3)

    def work(k):
        for b in batches[k::8]:
            m.update(b)
            _ = m.mean, m.var, m.state()

    ths = [threading.Thread(target=work, args=(k,)) for k in range(8)]
    for t in ths:
        t.start()
    for t in ths:
        t.join(timeout=60)
    allx = np.concatenate(batches)
    assert m.count == allx.shape[0]
    np.testing.assert_allclose(m.mean, allx.mean(0), rtol=1e-12)
    np.testing.assert_allclose(m.var, allx.var(0), rtol=1e-10)


# --------------------------------------------------------------------------
# ReturnScaler
# --------------------------------------------------------------------------


def scaler_ref(r, ends, gamma, eps, clip):
    """Plain per-step loop of the definition in ReturnScaler's docstring
    (common practice, no source): running return per stream, np.std of every
    running return seen so far (population), reset after an end."""
    t_len, n = r.shape
    ret = np.zeros(n)
    seen: list[float] = []
    out = np.zeros((t_len, n))
    for t in range(t_len):
        ret = gamma * ret + r[t]
        seen.extend(ret.tolist())
        std = 0.0 if np.ptp(seen) == 0 else float(np.std(seen))
        d = std + eps if std > 0 else 1.0
        y = r[t] / d
        out[t] = y if clip is None else np.clip(y, -clip, clip)
        ret = np.where(ends[t], 0.0, ret)
    return out, ret


@st.composite
def chunked_rollout(draw):
    t_len = draw(st.integers(0, 40))
    n = draw(st.integers(1, 3))
    r = np.array(draw(st.lists(st.integers(-4, 4), min_size=t_len * n, max_size=t_len * n)), float)
    r = r.reshape(t_len, n) / 2.0
    term = np.array(
        draw(st.lists(st.booleans(), min_size=t_len * n, max_size=t_len * n)), bool
    ).reshape(t_len, n)
    trunc = np.array(
        draw(st.lists(st.booleans(), min_size=t_len * n, max_size=t_len * n)), bool
    ).reshape(t_len, n)
    term &= np.random.default_rng(t_len).random((t_len, n)) < 0.3
    trunc &= np.random.default_rng(t_len + 1).random((t_len, n)) < 0.2
    cuts = sorted(draw(st.lists(st.integers(0, t_len), max_size=8)))
    return r, term, trunc, cuts


@FAST
@given(
    data=chunked_rollout(),
    gamma=st.sampled_from([0.0, 0.5, 0.9, 1.0]),
    clip=st.sampled_from([None, 2.0]),
)
def test_return_scaler_any_chunking_equals_loop(data, gamma, clip):
    # scaler_ref above (plain loop over the concatenated chunks).
    r, term, trunc, cuts = data
    n = r.shape[1]
    s = ReturnScaler(n, gamma=gamma, clip=clip)
    got = [
        s.scale(rc, tc, truncated=uc)
        for rc, tc, uc in zip(*(np.split(a, cuts) for a in (r, term, trunc)))
    ]
    got = np.concatenate(got) if got else np.zeros((0, n))
    want, ret = scaler_ref(r, term | trunc, gamma, 1e-8, clip)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(s.returns, ret, rtol=1e-12, atol=1e-12)
    assert s.count == r.size


def test_return_scaler_state_and_errors(tmp_path):
    rng = np.random.default_rng(12)
    r = rng.normal(size=(30, 4))
    te = rng.random((30, 4)) < 0.1
    a = ReturnScaler(4, gamma=0.99, clip=10.0)
    a.scale(r[:10], te[:10])
    path = tmp_path / "scaler.npz"
    np.savez(path, **a.state())
    with np.load(path, allow_pickle=False) as f:
        b = ReturnScaler.from_state(dict(f))
    np.testing.assert_array_equal(a.scale(r[10:], te[10:]), b.scale(r[10:], te[10:]))
    for k, v in a.state().items():
        np.testing.assert_array_equal(v, b.state()[k])
    # float32 rewards stay float32; [T] chunks when num_envs == 1; out=.
    assert a.scale(r[:2].astype(np.float32), te[:2]).dtype == np.float32
    one = ReturnScaler(1, gamma=0.9)
    y = one.scale(r[:, 0], te[:, 0])
    assert y.shape == (30,)
    out = np.empty((5, 4))
    assert a.scale(r[:5], te[:5], out=out) is out
    with pytest.raises(ShapeError, match="num_envs is 4"):
        a.scale(r[:, :3], te[:, :3])
    with pytest.raises(ShapeError, match="terminated"):
        a.scale(r, te[:5])
    bad = r.copy()
    bad[3, 2] = np.inf
    with pytest.raises(InputError, match=r"rewards\[3, 2\]"):
        a.scale(bad, te)
    with pytest.raises(InputError, match="gamma"):
        ReturnScaler(2, gamma=1.1)
    with pytest.raises(InputError, match="num_envs"):
        ReturnScaler(0, gamma=0.9)


# --------------------------------------------------------------------------
# EpisodeTracker
# --------------------------------------------------------------------------


def tracker_ref(r, term, trunc):
    """Plain loop (common practice, no source): (return, length, env, step
    in the whole rollout, terminated) of every episode finishing in r."""
    t_len, n = r.shape
    acc = np.zeros(n)
    length = np.zeros(n, int)
    done = []
    for t in range(t_len):
        for m in range(n):
            acc[m] += r[t, m]
            length[m] += 1
            if term[t, m] or trunc[t, m]:
                done.append((acc[m], length[m], m, t, bool(term[t, m])))
                acc[m] = 0.0
                length[m] = 0
    return done, acc, length


@FAST
@given(data=chunked_rollout())
def test_episode_tracker_any_chunking_equals_loop(data):
    # tracker_ref above (plain loop over the concatenated chunks), including
    # episodes spanning many chunks.
    r, term, trunc, cuts = data
    n = r.shape[1]
    tr = EpisodeTracker(n)
    got = []
    t0 = 0
    for rc, tc, uc in zip(*(np.split(a, cuts) for a in (r, term, trunc))):
        d = tr.update(rc, tc, uc)
        assert d.returns.dtype == np.float64 and d.lengths.dtype == np.int64
        got += [
            (a, b, c, t0 + s, e)
            for a, b, c, s, e in zip(d.returns, d.lengths, d.env, d.step, d.terminated)
        ]
        t0 += rc.shape[0]
    want, acc, length = tracker_ref(r, term, trunc)
    assert len(got) == len(want)
    for g, w in zip(got, want):
        assert g[0] == pytest.approx(w[0], abs=1e-12)
        assert tuple(int(x) for x in g[1:4]) == w[1:4] and bool(g[4]) == w[4]
    np.testing.assert_allclose(tr.open_returns, acc, atol=1e-12)
    np.testing.assert_array_equal(tr.open_lengths, length)


def test_episode_tracker_long_episode_state_and_errors():
    tr = EpisodeTracker(2)
    for _ in range(100):
        d = tr.update(np.ones((3, 2)), np.zeros((3, 2), bool))
        assert d.returns.size == 0
    d = tr.update(np.ones((1, 2)), np.array([[False, True]]), np.array([[True, False]]))
    np.testing.assert_array_equal(d.returns, [301.0, 301.0])
    np.testing.assert_array_equal(d.lengths, [301, 301])
    np.testing.assert_array_equal(d.env, [0, 1])
    np.testing.assert_array_equal(d.terminated, [False, True])
    tr.update(np.full((4, 2), 0.5, np.float32), None)
    back = EpisodeTracker.from_state(tr.state())
    np.testing.assert_array_equal(back.open_returns, [2.0, 2.0])
    np.testing.assert_array_equal(back.open_lengths, [4, 4])
    with pytest.raises(ShapeError, match="num_envs is 2"):
        tr.update(np.ones((3, 3)), None)
    with pytest.raises(ShapeError, match="truncated"):
        tr.update(np.ones((3, 2)), None, np.zeros((2, 2), bool))
    with pytest.raises(InputError, match=r"rewards\[1, 0\]"):
        tr.update(np.array([[0.0, 0.0], [np.nan, 0.0]]), None)


# --------------------------------------------------------------------------
# Benchmark references compute the same thing
# --------------------------------------------------------------------------


def test_bench_references_agree():
    # The NumPy references of rollscan/bench/policy.py must compute what the
    # kernels compute, or the timings compare different work.
    from rollscan.bench import policy as bench

    rng = np.random.default_rng(13)
    blp, tlp, r, v, _, term, _, boot = rollout(rng, 50, 4)
    want = vtrace(blp, tlp, r, v, term, gamma=0.99, bootstrap=boot)
    got = bench.numpy_vtrace(blp, tlp, r, v, term, boot, 0.99, 1.0, 1.0, 1.0)
    np.testing.assert_allclose(got[0], want[0], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got[1], want[1], rtol=1e-12, atol=1e-12)
    new, old, adv = surrogate_inputs(rng, (300,))
    res = clipped_surrogate(new, old, adv, clip=0.2)
    loss, grad, kl, frac, rmean, rmax = bench.numpy_surrogate(new, old, adv, 0.2)
    assert res.loss == pytest.approx(loss, rel=1e-12)
    np.testing.assert_allclose(res.grad, grad, rtol=1e-12, atol=1e-15)
    assert (res.approx_kl, res.clip_fraction) == pytest.approx((kl, frac), rel=1e-12)
    assert (res.ratio_mean, res.ratio_max) == pytest.approx((rmean, rmax), rel=1e-12)
    assert len(bench.cases(quick=True)) >= 2


def test_docstring_examples_run():
    # Every public name of this area documents a >>> example that must run.
    import doctest

    import rollscan.streaming

    objs = [
        clipped_surrogate,
        vtrace,
        RunningMoments,
        ReturnScaler,
        EpisodeTracker,
    ]
    finder, runner = doctest.DocTestFinder(), doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    attempted = 0
    for obj in objs:
        assert obj.__doc__ and ">>>" in obj.__doc__, obj
        for t in finder.find(obj, obj.__name__, module=rollscan.streaming, globs={}):
            res = runner.run(t)
            attempted += res.attempted
    assert runner.failures == 0
    assert attempted >= 8
