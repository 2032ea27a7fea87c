"""Time-major returns, GAE and normalisation (contract sections 1-2).

References: the plain NumPy float64 loops in tests/reference.py, written from
the definitions in the public contract; published checks name their source beside them.
"""

from __future__ import annotations

import doctest
import inspect

import numpy as np
import pytest
import reference as ref
import rollscan
import rollscan._core as core
import scipy.signal
from helpers import F32_RTOL, scale_atol, timemajor_buffer
from hypothesis import given
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

# (shape, time_axis): every layout of contract section 2, every time axis,
# negative ones included.
LAYOUTS = [
    ((13,), 0),
    ((13,), -1),
    ((11, 4), 0),
    ((4, 11), 1),
    ((11, 4), -2),
    ((4, 11), -1),
    ((9, 3, 2), 0),
    ((3, 9, 2), 1),
    ((3, 2, 9), 2),
    ((3, 2, 9), -1),
    ((3, 9, 2), -2),
    ((9, 3, 2), -3),
]
LAYOUT_IDS = [f"{'x'.join(map(str, s))}-ax{a}" for s, a in LAYOUTS]
KINDS = ["plain", "bootstrap", "next_values"]


def _returns_kwargs(d, time_axis):
    kw = {"time_axis": time_axis}
    for key in ("truncated", "next_values", "bootstrap"):
        if key in d:
            kw[key] = d[key]
    return kw


def _assert_close64(got, want):
    assert got.dtype == np.float64
    assert got.shape == want.shape
    assert_allclose(got, want, rtol=1e-12, atol=scale_atol(want))


def _assert_rounded_once(got, want64):
    """float32 result == the float64 result rounded once (contract section 1)."""
    assert got.dtype == np.float32
    assert_allclose(got, want64.astype(np.float32), rtol=F32_RTOL, atol=scale_atol(want64))


# --------------------------------------------------------------------------
# Against the NumPy reference, every layout
# --------------------------------------------------------------------------


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize(("shape", "time_axis"), LAYOUTS, ids=LAYOUT_IDS)
def test_discounted_returns_matches_reference(rng, shape, time_axis, kind):
    d = timemajor_buffer(rng, shape, time_axis, kind=kind)
    kw = _returns_kwargs(d, time_axis)
    for gamma in (0.0, 0.9, 1.0):
        got = rollscan.discounted_returns(d["rewards"], d["terminated"], gamma=gamma, **kw)
        want = ref.discounted_returns(d["rewards"], d["terminated"], gamma=gamma, **kw)
        _assert_close64(got, want)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize(("shape", "time_axis"), LAYOUTS, ids=LAYOUT_IDS)
def test_gae_matches_reference(rng, shape, time_axis, kind):
    d = timemajor_buffer(rng, shape, time_axis, kind=kind)
    kw = _returns_kwargs(d, time_axis)
    for gamma, lam in ((0.99, 0.95), (0.9, 0.0), (1.0, 1.0), (0.0, 0.5)):
        adv, ret = rollscan.gae(
            d["rewards"], d["values"], d["terminated"], gamma=gamma, lam=lam, **kw
        )
        want_adv, want_ret = ref.gae(
            d["rewards"], d["values"], d["terminated"], gamma=gamma, lam=lam, **kw
        )
        _assert_close64(adv, want_adv)
        _assert_close64(ret, want_ret)


@pytest.mark.parametrize(("shape", "time_axis"), LAYOUTS[::3], ids=LAYOUT_IDS[::3])
def test_gae_normalize_matches_reference(rng, shape, time_axis):
    d = timemajor_buffer(rng, shape, time_axis, kind="next_values")
    kw = _returns_kwargs(d, time_axis)
    for eps in (1e-8, 0.5):
        adv, ret = rollscan.gae(
            d["rewards"],
            d["values"],
            d["terminated"],
            gamma=0.97,
            lam=0.9,
            normalize=True,
            eps=eps,
            **kw,
        )
        want_adv, want_ret = ref.gae(
            d["rewards"],
            d["values"],
            d["terminated"],
            gamma=0.97,
            lam=0.9,
            normalize=True,
            eps=eps,
            **kw,
        )
        assert_allclose(adv, want_adv, rtol=1e-10, atol=1e-12)
        # returns stay un-normalised (contract section 2)
        _assert_close64(ret, want_ret)
        raw, _ = rollscan.gae(d["rewards"], d["values"], d["terminated"], gamma=0.97, lam=0.9, **kw)
        assert_allclose(ret, raw + d["values"], rtol=1e-12, atol=1e-12)


@st.composite
def timemajor_cases(draw):
    t_len = draw(st.integers(1, 24))  # zero-size arrays: test_zero_length_buffers
    streams = draw(st.lists(st.integers(1, 4), min_size=0, max_size=2))
    ndim = 1 + len(streams)
    time_axis = draw(st.integers(-ndim, ndim - 1))
    moved = [t_len, *streams]
    shape = tuple(np.moveaxis(np.empty(moved), 0, time_axis).shape)
    kind = draw(st.sampled_from(KINDS))
    gamma = draw(st.floats(0.0, 1.0))
    lam = draw(st.floats(0.0, 1.0))
    seed = draw(st.integers(0, 2**32 - 1))
    return shape, time_axis, kind, gamma, lam, seed


@given(timemajor_cases())
def test_random_layouts_match_reference(case):
    shape, time_axis, kind, gamma, lam, seed = case
    d = timemajor_buffer(np.random.default_rng(seed), shape, time_axis, kind=kind)
    kw = _returns_kwargs(d, time_axis)
    got = rollscan.discounted_returns(d["rewards"], d["terminated"], gamma=gamma, **kw)
    want = ref.discounted_returns(d["rewards"], d["terminated"], gamma=gamma, **kw)
    _assert_close64(got, want)
    adv, ret = rollscan.gae(d["rewards"], d["values"], d["terminated"], gamma=gamma, lam=lam, **kw)
    want_adv, want_ret = ref.gae(
        d["rewards"], d["values"], d["terminated"], gamma=gamma, lam=lam, **kw
    )
    _assert_close64(adv, want_adv)
    _assert_close64(ret, want_ret)


def test_terminated_none_means_no_episode_end(rng):
    r = rng.normal(size=(8, 3))
    v = rng.normal(size=(8, 3))
    boot = rng.normal(size=3)
    none_flags = np.zeros((8, 3), dtype=bool)
    assert_array_equal(
        rollscan.discounted_returns(r, gamma=0.8, bootstrap=boot),
        rollscan.discounted_returns(r, none_flags, gamma=0.8, bootstrap=boot),
    )
    a1, r1 = rollscan.gae(r, v, gamma=0.8, lam=0.7, bootstrap=boot)
    a2, r2 = rollscan.gae(r, v, none_flags, gamma=0.8, lam=0.7, bootstrap=boot)
    assert_array_equal(a1, a2)
    assert_array_equal(r1, r2)
    _assert_close64(a1, ref.gae(r, v, gamma=0.8, lam=0.7, bootstrap=boot)[0])


def test_truncation_rules_worked_by_hand():
    # Worked by hand from the contract section 2 definition (no outside source).
    r = np.array([1.0, 1.0, 1.0, 1.0])
    term = np.array([False, False, False, True])
    trunc = np.array([False, True, False, False])
    nv = np.array([0.0, 10.0, 0.0, 0.0])
    # G3 = 1; G2 = 1 + .5*G3 = 1.5; G1 = 1 + .5*10 = 6 (cut: next_values); G0 = 1 + .5*6 = 4
    got = rollscan.discounted_returns(r, term, gamma=0.5, truncated=trunc, next_values=nv)
    assert_allclose(got, [4.0, 6.0, 1.5, 1.0], rtol=0, atol=1e-15)
    # terminated wins over truncated at the same step (X_t = 0 if terminated_t)
    both = trunc | np.array([False, True, False, False])
    got = rollscan.discounted_returns(r, term | both, gamma=0.5, truncated=both, next_values=nv)
    assert_allclose(got, [1.5, 1.0, 1.5, 1.0], rtol=0, atol=1e-15)
    # GAE, values = 0: delta_t = r_t + gamma * V'_t; the advantage does not
    # cross the cut: A1 = 1 + .5*10 = 6, A0 = 1 + .5*0 + .5*1*6 = 4 (V'_0 = nv[0] = 0)
    adv, ret = rollscan.gae(
        r, np.zeros(4), term, gamma=0.5, lam=1.0, truncated=trunc, next_values=nv
    )
    assert_allclose(adv, [4.0, 6.0, 1.5, 1.0], rtol=0, atol=1e-15)
    assert_allclose(ret, adv, rtol=0, atol=0)


def test_bootstrap_and_next_values_last_row(rng):
    # The last row bootstraps from `bootstrap` or from next_values[T-1].
    r = rng.normal(size=(5, 3))
    boot = rng.normal(size=3)
    nv = np.zeros((5, 3))
    nv[-1] = boot
    a = rollscan.discounted_returns(r, gamma=0.9, bootstrap=boot)
    b = rollscan.discounted_returns(r, gamma=0.9, next_values=nv)
    assert_allclose(a, b, rtol=1e-15, atol=0)
    assert_allclose(a[-1], r[-1] + 0.9 * boot, rtol=1e-15)
    # a 0-d bootstrap is the per-stream shape of a [T] buffer
    one = rollscan.discounted_returns(r[:, 0], gamma=0.9, bootstrap=np.float64(boot[0]))
    assert_allclose(one, a[:, 0], rtol=1e-15)


# --------------------------------------------------------------------------
# Published checks
# --------------------------------------------------------------------------


def test_one_episode_return_equals_scipy_lfilter(rng):
    # SciPy reference: a discounted return is the IIR filter y_t = x_t + gamma*y_{t+1}
    # run backwards: scipy.signal.lfilter([1], [1, -gamma], x[::-1])[::-1].
    for gamma in (0.5, 0.9, 0.99, 1.0):
        x = rng.normal(size=200)
        term = np.zeros(200, dtype=bool)
        term[-1] = True
        want = scipy.signal.lfilter([1.0], [1.0, -gamma], x[::-1])[::-1]
        got = rollscan.discounted_returns(x, term, gamma=gamma)
        assert_allclose(got, want, rtol=1e-12, atol=1e-12)
        got = rollscan.ragged.discounted_returns(x, [200], gamma=gamma)
        assert_allclose(got, want, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("kind", KINDS)
def test_gae_lam0_is_td_error(rng, kind):
    # Schulman et al. 2016, eq. 17: GAE(gamma, 0) = delta_t = r_t + gamma V(s_{t+1}) - V(s_t).
    d = timemajor_buffer(rng, (20, 3), kind=kind)
    kw = _returns_kwargs(d, 0)
    adv, ret = rollscan.gae(d["rewards"], d["values"], d["terminated"], gamma=0.9, lam=0.0, **kw)
    v = d["values"]
    if "next_values" in d:
        vnext = d["next_values"].copy()
    else:
        vnext = np.vstack([v[1:], d.get("bootstrap", np.zeros(3))[None]])
    vnext[d["terminated"]] = 0.0
    delta = d["rewards"] + 0.9 * vnext - v
    assert_allclose(adv, delta, rtol=1e-13, atol=1e-13)
    assert_allclose(ret, delta + v, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("kind", KINDS)
def test_gae_lam1_is_return_minus_value(rng, kind):
    # Schulman et al. 2016, eq. 18: GAE(gamma, 1) = sum_l gamma^l r_{t+l} - V(s_t)
    # (bootstrapped at the rollout end / at cuts), i.e. the discounted return minus
    # the value; the contract: lam=1 gives returns == discounted_returns(...) whenever
    # next_values agrees with values[t+1] inside episodes (timemajor_buffer does so).
    d = timemajor_buffer(rng, (30, 4), kind=kind)
    kw = _returns_kwargs(d, 0)
    for gamma in (0.0, 0.95, 1.0):
        adv, ret = rollscan.gae(
            d["rewards"], d["values"], d["terminated"], gamma=gamma, lam=1.0, **kw
        )
        g = rollscan.discounted_returns(d["rewards"], d["terminated"], gamma=gamma, **kw)
        assert_allclose(ret, g, rtol=1e-12, atol=1e-12)
        assert_allclose(adv, g - d["values"], rtol=1e-12, atol=1e-12)


def test_gae_lam1_one_episode_against_scipy(rng):
    # Schulman et al. 2016, eq. 18, with the discounted sum from SciPy's lfilter.
    r = rng.normal(size=50)
    v = rng.normal(size=50)
    term = np.zeros(50, dtype=bool)
    term[-1] = True
    adv, _ = rollscan.gae(r, v, term, gamma=0.97, lam=1.0)
    g = scipy.signal.lfilter([1.0], [1.0, -0.97], r[::-1])[::-1]
    assert_allclose(adv, g - v, rtol=1e-12, atol=1e-12)


# --------------------------------------------------------------------------
# Dtypes
# --------------------------------------------------------------------------


@pytest.mark.parametrize(("shape", "time_axis"), LAYOUTS[::2], ids=LAYOUT_IDS[::2])
def test_float32_is_float64_rounded_once(rng, shape, time_axis):
    d = timemajor_buffer(rng, shape, time_axis, kind="next_values")
    r32 = d["rewards"].astype(np.float32)
    v32 = d["values"].astype(np.float32)
    nv32 = d["next_values"].astype(np.float32)
    kw = {"truncated": d["truncated"], "time_axis": time_axis}
    term = d["terminated"]
    # the float64 result on the same (exactly widened) inputs
    r64, v64, nv64 = (a.astype(np.float64) for a in (r32, v32, nv32))

    got = rollscan.discounted_returns(r32, term, gamma=0.99, next_values=nv32, **kw)
    want = ref.discounted_returns(r64, term, gamma=0.99, next_values=nv64, **kw)
    _assert_rounded_once(got, want)
    own64 = rollscan.discounted_returns(r64, term, gamma=0.99, next_values=nv64, **kw)
    _assert_rounded_once(got, own64)

    adv, ret = rollscan.gae(r32, v32, term, gamma=0.99, lam=0.95, next_values=nv32, **kw)
    want_adv, want_ret = ref.gae(r64, v64, term, gamma=0.99, lam=0.95, next_values=nv64, **kw)
    _assert_rounded_once(adv, want_adv)
    _assert_rounded_once(ret, want_ret)


def test_float32_bootstrap_float64_stays_float32(rng):
    r32 = rng.normal(size=(10, 3)).astype(np.float32)
    v32 = rng.normal(size=(10, 3)).astype(np.float32)
    boot = rng.normal(size=3)  # float64 per-stream array: cast to float32
    got = rollscan.discounted_returns(r32, gamma=0.9, bootstrap=boot)
    assert got.dtype == np.float32
    want = ref.discounted_returns(r32, gamma=0.9, bootstrap=boot.astype(np.float32))
    _assert_rounded_once(got, want)
    adv, ret = rollscan.gae(r32, v32, gamma=0.9, lam=0.9, bootstrap=boot)
    assert adv.dtype == ret.dtype == np.float32
    want_adv, _ = ref.gae(r32, v32, gamma=0.9, lam=0.9, bootstrap=boot.astype(np.float32))
    _assert_rounded_once(adv, want_adv)


def test_mixed_float_dtypes_promote_to_float64(rng):
    d = timemajor_buffer(rng, (12, 3), kind="next_values")
    r32 = d["rewards"].astype(np.float32)
    nv = d["next_values"]  # float64
    term, trunc = d["terminated"], d["truncated"]
    got = rollscan.discounted_returns(r32, term, gamma=0.9, truncated=trunc, next_values=nv)
    want = ref.discounted_returns(
        r32.astype(np.float64), term, gamma=0.9, truncated=trunc, next_values=nv
    )
    _assert_close64(got, want)
    # float32 rewards, float64 values -> float64 outputs
    adv, ret = rollscan.gae(
        r32, d["values"], term, gamma=0.9, lam=0.8, truncated=trunc, next_values=nv
    )
    wa, wr = ref.gae(
        r32.astype(np.float64),
        d["values"],
        term,
        gamma=0.9,
        lam=0.8,
        truncated=trunc,
        next_values=nv,
    )
    _assert_close64(adv, wa)
    _assert_close64(ret, wr)
    # float64 rewards, float32 values
    v32 = d["values"].astype(np.float32)
    adv, ret = rollscan.gae(
        d["rewards"], v32, term, gamma=0.9, lam=0.8, truncated=trunc, next_values=nv
    )
    wa, _ = ref.gae(
        d["rewards"],
        v32.astype(np.float64),
        term,
        gamma=0.9,
        lam=0.8,
        truncated=trunc,
        next_values=nv,
    )
    _assert_close64(adv, wa)


@pytest.mark.parametrize("int_dtype", [np.int8, np.int32, np.int64, np.uint16, np.bool_])
def test_integer_and_bool_rewards_promote_to_float64(rng, int_dtype):
    r = rng.integers(0, 2 if int_dtype is np.bool_ else 5, size=(9, 2)).astype(int_dtype)
    v = rng.integers(0, 3, size=(9, 2)).astype(int_dtype)
    term = rng.random((9, 2)) < 0.2
    got = rollscan.discounted_returns(r, term, gamma=0.5)
    _assert_close64(got, ref.discounted_returns(r.astype(np.float64), term, gamma=0.5))
    adv, ret = rollscan.gae(r, v, term, gamma=0.5, lam=0.5)
    wa, wr = ref.gae(r.astype(np.float64), v.astype(np.float64), term, gamma=0.5, lam=0.5)
    _assert_close64(adv, wa)
    _assert_close64(ret, wr)
    # integer rewards with float32 values: the int array is float64, so float64
    adv, _ = rollscan.gae(r, v.astype(np.float32), term, gamma=0.5, lam=0.5)
    assert adv.dtype == np.float64


def test_python_lists_are_accepted():
    got = rollscan.discounted_returns([1.0, 2.0, 3.0], [False, True, False], gamma=0.5)
    assert_allclose(got, [2.0, 2.0, 3.0], rtol=0, atol=1e-15)


# --------------------------------------------------------------------------
# Edge sizes
# --------------------------------------------------------------------------


def _zero_size_calls(shape, time_axis=0):
    r = np.zeros(shape)
    stream = np.moveaxis(r, time_axis, 0).shape[1:]
    kw = {"time_axis": time_axis}
    got = rollscan.discounted_returns(
        r, np.zeros(shape, bool), gamma=0.9, bootstrap=np.ones(stream), **kw
    )
    assert got.shape == shape
    assert got.dtype == np.float64
    adv, ret = rollscan.gae(r, r, gamma=0.9, lam=0.9, bootstrap=np.ones(stream), **kw)
    assert adv.shape == ret.shape == shape
    r32 = r.astype(np.float32)
    assert rollscan.discounted_returns(r32, gamma=0.9, **kw).dtype == np.float32
    assert rollscan.normalize(r).shape == shape


@pytest.mark.parametrize("shape", [(0,), (0, 3), (0, 2, 2)])
def test_zero_length_buffers(shape):
    _zero_size_calls(shape)


@pytest.mark.parametrize(
    ("shape", "time_axis"),
    [((5, 0), 0), ((4, 0, 3), 0), ((3, 0), 1), ((3, 0), -1), ((2, 0, 2), 1), ((3, 2, 0), 2)],
)
def test_zero_size_non_leading_axis(shape, time_axis):
    _zero_size_calls(shape, time_axis)


def test_single_step(rng):
    r = rng.normal(size=(1, 4))
    v = rng.normal(size=(1, 4))
    boot = rng.normal(size=4)
    term = np.array([[True, False, True, False]])
    got = rollscan.discounted_returns(r, term, gamma=0.9, bootstrap=boot)
    assert_allclose(got[0], r[0] + 0.9 * np.where(term[0], 0.0, boot), rtol=1e-15)
    adv, _ = rollscan.gae(r, v, term, gamma=0.9, lam=0.9, bootstrap=boot)
    assert_allclose(adv[0], r[0] + 0.9 * np.where(term[0], 0.0, boot) - v[0], rtol=1e-14)


def test_all_terminal(rng):
    r = rng.normal(size=(7, 3))
    v = rng.normal(size=(7, 3))
    term = np.ones((7, 3), dtype=bool)
    assert_allclose(rollscan.discounted_returns(r, term, gamma=0.99), r, rtol=0, atol=0)
    adv, ret = rollscan.gae(r, v, term, gamma=0.99, lam=0.95, bootstrap=np.ones(3))
    assert_allclose(adv, r - v, rtol=1e-15, atol=1e-15)
    assert_allclose(ret, r, rtol=1e-15, atol=1e-15)


# --------------------------------------------------------------------------
# Memory layouts and out=
# --------------------------------------------------------------------------


def _views(a):
    """The same logical array as non-contiguous, Fortran, reversed and moved views."""
    big = np.zeros((2 * a.shape[0], *a.shape[1:]), dtype=a.dtype)
    big[::2] = a
    rev = np.ascontiguousarray(a[::-1])[::-1]
    moved = np.moveaxis(np.ascontiguousarray(np.moveaxis(a, 0, -1)), -1, 0)
    return {
        "strided": big[::2],
        "fortran": np.asfortranarray(a),
        "negative": rev,
        "moveaxis": moved,
    }


@pytest.mark.parametrize("view", ["strided", "fortran", "negative", "moveaxis"])
def test_non_contiguous_inputs_give_same_results(rng, view):
    d = timemajor_buffer(rng, (16, 3, 2), kind="next_values")
    names = ["rewards", "values", "terminated", "truncated", "next_values"]
    base_ret = rollscan.discounted_returns(
        d["rewards"],
        d["terminated"],
        gamma=0.9,
        truncated=d["truncated"],
        next_values=d["next_values"],
    )
    base_gae = rollscan.gae(
        d["rewards"],
        d["values"],
        d["terminated"],
        gamma=0.9,
        lam=0.8,
        truncated=d["truncated"],
        next_values=d["next_values"],
    )
    w = {n: _views(d[n])[view] for n in names}
    for n in names:
        assert_array_equal(w[n], d[n])
        if view != "moveaxis":
            assert not w[n].flags.c_contiguous
    got = rollscan.discounted_returns(
        w["rewards"],
        w["terminated"],
        gamma=0.9,
        truncated=w["truncated"],
        next_values=w["next_values"],
    )
    assert_array_equal(got, base_ret)
    adv, ret = rollscan.gae(
        w["rewards"],
        w["values"],
        w["terminated"],
        gamma=0.9,
        lam=0.8,
        truncated=w["truncated"],
        next_values=w["next_values"],
    )
    assert_array_equal(adv, base_gae[0])
    assert_array_equal(ret, base_gae[1])
    # the time axis itself may be a strided / reversed axis of a view
    got_ax = rollscan.discounted_returns(
        np.moveaxis(w["rewards"], 0, 2),
        np.moveaxis(w["terminated"], 0, 2),
        gamma=0.9,
        truncated=np.moveaxis(w["truncated"], 0, 2),
        next_values=np.moveaxis(w["next_values"], 0, 2),
        time_axis=2,
    )
    assert_array_equal(got_ax, np.moveaxis(base_ret, 0, 2))


def test_out_returns_same_object(rng):
    r = rng.normal(size=(10, 3))
    v = rng.normal(size=(10, 3))
    want = rollscan.discounted_returns(r, gamma=0.9)
    out = np.empty((10, 3))
    res = rollscan.discounted_returns(r, gamma=0.9, out=out)
    assert res is out
    assert_array_equal(out, want)

    want_adv, want_ret = rollscan.gae(r, v, gamma=0.9, lam=0.8)
    oa, orr = np.empty((10, 3)), np.empty((10, 3))
    res = rollscan.gae(r, v, gamma=0.9, lam=0.8, out=(oa, orr))
    assert res[0] is oa
    assert res[1] is orr
    assert_array_equal(oa, want_adv)
    assert_array_equal(orr, want_ret)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_out_non_contiguous(rng, dtype):
    r = rng.normal(size=(10, 3)).astype(dtype)
    v = rng.normal(size=(10, 3)).astype(dtype)
    want = rollscan.discounted_returns(r, gamma=0.9)
    big = np.full((20, 3), 7.0, dtype=dtype)
    view = big[::2]
    res = rollscan.discounted_returns(r, gamma=0.9, out=view)
    assert res is view
    assert_array_equal(big[::2], want)
    assert_array_equal(big[1::2], 7.0)  # nothing written outside the view

    fa = np.asfortranarray(np.empty((10, 3), dtype=dtype))
    fr = np.empty((3, 10), dtype=dtype).T
    want_adv, want_ret = rollscan.gae(r, v, gamma=0.9, lam=0.8)
    res = rollscan.gae(r, v, gamma=0.9, lam=0.8, out=(fa, fr))
    assert res[0] is fa
    assert res[1] is fr
    assert_array_equal(fa, want_adv)
    assert_array_equal(fr, want_ret)


def test_out_with_time_axis(rng):
    r = rng.normal(size=(3, 10))
    out = np.empty((3, 10))
    res = rollscan.discounted_returns(r, gamma=0.9, time_axis=1, out=out)
    assert res is out
    assert_allclose(out, ref.discounted_returns(r, gamma=0.9, time_axis=1), rtol=1e-12)


# --------------------------------------------------------------------------
# normalize
# --------------------------------------------------------------------------


@pytest.mark.parametrize("ddof", [0, 1, 3])
@pytest.mark.parametrize("masked", [False, True])
def test_normalize_matches_numpy(rng, ddof, masked):
    # NumPy reference: (x - x.mean()) / (x.std(ddof=ddof) + eps) over the selection.
    x = rng.normal(3.0, 2.0, size=(40, 5))
    mask = rng.random((40, 5)) < 0.6 if masked else None
    for eps in (1e-8, 0.1):
        got = rollscan.normalize(x, eps=eps, ddof=ddof, mask=mask)
        want = ref.normalize(x, eps=eps, ddof=ddof, mask=mask)
        assert got.dtype == np.float64
        assert_allclose(got, want, rtol=1e-12, atol=1e-12)
        if masked:
            # masked-out elements copied unchanged
            assert_array_equal(got[~mask], x[~mask])


def test_normalize_float32_and_ints(rng):
    x = rng.normal(size=1000).astype(np.float32)
    got = rollscan.normalize(x)
    assert got.dtype == np.float32
    _assert_rounded_once(got, ref.normalize(x.astype(np.float64)))
    xi = rng.integers(-5, 5, size=100)
    got = rollscan.normalize(xi, ddof=1)
    assert got.dtype == np.float64
    assert_allclose(got, ref.normalize(xi, ddof=1), rtol=1e-12, atol=1e-12)


def test_normalize_in_place(rng):
    x = rng.normal(size=(30, 4))
    want = ref.normalize(x, eps=1e-6)
    res = rollscan.normalize(x, eps=1e-6, out=x)
    assert res is x
    assert_allclose(x, want, rtol=1e-12, atol=1e-12)
    # in place with a mask, on a non-contiguous view
    y = rng.normal(size=(30, 8))
    view = y[:, ::2]
    mask = rng.random(view.shape) < 0.5
    want = ref.normalize(view, mask=mask)
    res = rollscan.normalize(view, mask=mask, out=view)
    assert res is view
    assert_allclose(y[:, ::2], want, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("view", ["strided", "fortran", "negative", "moveaxis"])
def test_normalize_non_contiguous(rng, view):
    x = rng.normal(size=(20, 3, 2))
    mask = rng.random((20, 3, 2)) < 0.7
    want = rollscan.normalize(x, mask=mask, ddof=1)
    got = rollscan.normalize(_views(x)[view], mask=_views(mask)[view], ddof=1)
    # reductions may run in another order over another layout: near, not bitwise
    assert_allclose(got, want, rtol=1e-13, atol=1e-13)


# --------------------------------------------------------------------------
# Interop and docstrings
# --------------------------------------------------------------------------


def test_torch_cpu_tensors(rng):
    torch = pytest.importorskip("torch")
    r = rng.normal(size=(12, 3))
    v = rng.normal(size=(12, 3))
    term = rng.random((12, 3)) < 0.2
    got = rollscan.discounted_returns(torch.from_numpy(r), torch.from_numpy(term), gamma=0.9)
    assert_array_equal(np.asarray(got), rollscan.discounted_returns(r, term, gamma=0.9))
    adv, _ = rollscan.gae(
        torch.from_numpy(r).float(), torch.from_numpy(v).float(), gamma=0.9, lam=0.9
    )
    assert np.asarray(adv).dtype == np.float32


PUBLIC = [
    "discounted_returns",
    "gae",
    "normalize",
    "ragged_discounted_returns",
    "ragged_gae",
    "ragged_episode_sums",
    "set_num_threads",
    "get_num_threads",
]


@pytest.mark.parametrize("name", PUBLIC)
def test_docstring_examples_run(name, restore_threads):
    obj = getattr(core, name)
    assert obj.__doc__, f"{name} has no docstring"
    test = doctest.DocTestParser().get_doctest(obj.__doc__, {}, f"rollscan._core.{name}", None, 0)
    assert test.examples, f"{name} has no >>> example"
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.failed == 0


def test_public_names_are_exported():
    assert rollscan.ragged.discounted_returns is core.ragged_discounted_returns
    assert rollscan.ragged.gae is core.ragged_gae
    assert rollscan.ragged.episode_sums is core.ragged_episode_sums
    assert issubclass(rollscan.ShapeError, ValueError)
    assert issubclass(rollscan.InputError, ValueError)
    assert rollscan.ShapeError.__module__ == "rollscan"


def test_memmap_inputs(rng, tmp_path):
    # memmaps are accepted like any array (contract section 1)
    r = rng.normal(size=(20, 3))
    term = rng.random((20, 3)) < 0.2
    mr = np.memmap(tmp_path / "rewards.bin", dtype=np.float64, mode="w+", shape=(20, 3))
    mr[:] = r
    mr.flush()
    ro = np.memmap(tmp_path / "rewards.bin", dtype=np.float64, mode="r", shape=(20, 3))
    assert_array_equal(
        rollscan.discounted_returns(ro, term, gamma=0.9),
        rollscan.discounted_returns(r, term, gamma=0.9),
    )
    assert_array_equal(
        rollscan.ragged.discounted_returns(ro[:, 1], [5, 15], gamma=0.9),
        rollscan.ragged.discounted_returns(r[:, 1].copy(), [5, 15], gamma=0.9),
    )


def test_scalar_bootstrap_is_cast(rng):
    # Python scalars are cast to the promoted dtype: float32 stays float32
    r32 = rng.normal(size=6).astype(np.float32)
    got = rollscan.discounted_returns(r32, gamma=0.9, bootstrap=2.5)
    assert got.dtype == np.float32
    want = ref.discounted_returns(r32, gamma=0.9, bootstrap=2.5)
    _assert_rounded_once(got, want)
    # the docstring also allows a scalar bootstrap for every stream
    r = rng.normal(size=(6, 3))
    got = rollscan.discounted_returns(r, gamma=0.9, bootstrap=2.5)
    _assert_close64(got, ref.discounted_returns(r, gamma=0.9, bootstrap=np.full(3, 2.5)))


def test_gae_out_with_normalize(rng):
    r = rng.normal(size=(15, 2))
    v = rng.normal(size=(15, 2))
    want_adv, want_ret = rollscan.gae(r, v, gamma=0.9, lam=0.9, normalize=True)
    oa, orr = np.empty((15, 2)), np.empty((2, 15)).T
    res = rollscan.gae(r, v, gamma=0.9, lam=0.9, normalize=True, out=(oa, orr))
    assert res[0] is oa
    assert res[1] is orr
    assert_allclose(oa, want_adv, rtol=1e-13, atol=1e-13)
    assert_array_equal(orr, want_ret)


_REQ = inspect.Parameter.empty
# The signatures the contract fixes (sections 2-3): names, order, positional or
# keyword-only, defaults. Extra keyword-only arguments are allowed.
CONTRACT_SIGNATURES = {
    "discounted_returns": (
        "rewards, terminated=None, *, gamma, truncated=None, next_values=None, "
        "bootstrap=None, time_axis=0, check_finite=True, out=None"
    ),
    "gae": (
        "rewards, values, terminated=None, *, gamma, lam, truncated=None, next_values=None, "
        "bootstrap=None, normalize=False, eps=1e-8, time_axis=0, check_finite=True, out=None"
    ),
    "normalize": "x, *, eps=1e-8, ddof=0, mask=None, out=None",
    "ragged.discounted_returns": (
        "rewards, lengths, *, gamma, terminal=None, tail_values=None, check_finite=True, out=None"
    ),
    "ragged.gae": (
        "rewards, values, lengths, *, gamma, lam, terminal=None, tail_values=None, "
        "tail_advantages=None, normalize=False, eps=1e-8, check_finite=True, out=None"
    ),
    "ragged.episode_sums": "x, lengths, *, gamma=1.0",
}


@pytest.mark.parametrize("name", list(CONTRACT_SIGNATURES))
def test_signatures_follow_the_contract(name):
    ns: dict = {}
    exec(f"def f({CONTRACT_SIGNATURES[name]}): pass", ns)  # a signature, not code under test
    want = inspect.signature(ns["f"]).parameters
    obj = rollscan
    for part in name.split("."):
        obj = getattr(obj, part)
    got = inspect.signature(obj).parameters
    for pname, p in want.items():
        assert pname in got, f"{name}: missing argument {pname}"
        assert got[pname].kind == p.kind, f"{name}: {pname} is {got[pname].kind}"
        assert got[pname].default == p.default, f"{name}: {pname} default {got[pname].default}"
    # contract positional arguments come first and in order
    positional = [n for n, p in want.items() if p.kind is not p.KEYWORD_ONLY]
    assert list(got)[: len(positional)] == positional
    extra = [n for n in got if n not in want]
    assert all(got[n].kind is inspect.Parameter.KEYWORD_ONLY for n in extra), extra
    assert all(got[n].default is not _REQ for n in extra), extra


def test_gamma_is_keyword_only():
    with pytest.raises(TypeError):
        rollscan.discounted_returns(np.ones(3), None, 0.9)
    with pytest.raises(TypeError):
        rollscan.ragged.discounted_returns(np.ones(3), [3], 0.9)
