"""Ragged layout: rollscan.ragged (contract section 3).

References: the per-piece NumPy loops in tests/reference.py, and the
time-major kernels themselves on the same steps seen as one stream.
"""

from __future__ import annotations

import numpy as np
import pytest
import reference as ref
import rollscan
import scipy.signal
from helpers import F32_RTOL, as_one_stream, ragged_buffer, scale_atol
from hypothesis import given
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

ragged = rollscan.ragged

LENGTHS = [
    [5],
    [3, 0, 7, 1, 4],
    [0],
    [0, 0, 2],
    [1, 1, 1, 1],
    [40, 2, 0, 17, 9, 1, 30],
]


def _close64(got, want):
    assert got.dtype == np.float64
    assert got.shape == want.shape
    assert_allclose(got, want, rtol=1e-12, atol=scale_atol(want))


@pytest.mark.parametrize("lengths", LENGTHS)
@pytest.mark.parametrize("with_tail", [False, True])
def test_discounted_returns_matches_reference(rng, lengths, with_tail):
    d = ragged_buffer(rng, lengths)
    kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]} if with_tail else {}
    for gamma in (0.0, 0.9, 1.0):
        got = ragged.discounted_returns(d["rewards"], d["lengths"], gamma=gamma, **kw)
        want = ref.ragged_discounted_returns(d["rewards"], d["lengths"], gamma=gamma, **kw)
        _close64(got, want)


@pytest.mark.parametrize("lengths", LENGTHS)
@pytest.mark.parametrize("tails", ["none", "values", "values+advantages"])
def test_gae_matches_reference(rng, lengths, tails):
    d = ragged_buffer(rng, lengths)
    kw = {}
    if tails != "none":
        kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]}
    if tails == "values+advantages":
        kw["tail_advantages"] = rng.normal(size=len(lengths))
    for gamma, lam in ((0.99, 0.95), (0.9, 0.0), (1.0, 1.0)):
        adv, ret = ragged.gae(d["rewards"], d["values"], d["lengths"], gamma=gamma, lam=lam, **kw)
        wa, wr = ref.ragged_gae(d["rewards"], d["values"], d["lengths"], gamma=gamma, lam=lam, **kw)
        _close64(adv, wa)
        _close64(ret, wr)


def test_gae_normalize_matches_reference(rng):
    d = ragged_buffer(rng, [12, 0, 30, 5])
    kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]}
    adv, ret = ragged.gae(
        d["rewards"], d["values"], d["lengths"], gamma=0.98, lam=0.9, normalize=True, **kw
    )
    wa, wr = ref.ragged_gae(
        d["rewards"], d["values"], d["lengths"], gamma=0.98, lam=0.9, normalize=True, **kw
    )
    assert_allclose(adv, wa, rtol=1e-10, atol=1e-12)
    _close64(ret, wr)  # returns stay un-normalised
    assert abs(adv.mean()) < 1e-12
    assert_allclose(adv.std(), 1.0, rtol=1e-6)


@pytest.mark.parametrize("lengths", LENGTHS)
def test_episode_sums_matches_numpy(rng, lengths):
    x = rng.normal(size=int(np.sum(lengths)))
    # NumPy reference for gamma=1: plain per-piece sums.
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(int)
    want = np.array([x[s : s + n].sum() for s, n in zip(starts, lengths)])
    got = ragged.episode_sums(x, lengths)
    _close64(got, want)
    for gamma in (0.0, 0.5, 0.99):
        got = ragged.episode_sums(x, lengths, gamma=gamma)
        _close64(got, ref.ragged_episode_sums(x, lengths, gamma=gamma))
        # the discounted sum of a piece is its return at the first step
        g = ragged.discounted_returns(x, lengths, gamma=gamma)
        full = np.asarray(lengths) > 0
        assert_allclose(got[full], g[starts[full]], rtol=1e-12, atol=1e-12)


def test_episode_sums_dtypes(rng):
    x = rng.normal(size=20).astype(np.float32)
    got = ragged.episode_sums(x, [5, 15], gamma=0.9)
    assert got.dtype == np.float32
    want = ref.ragged_episode_sums(x.astype(np.float64), [5, 15], gamma=0.9)
    assert_allclose(got, want.astype(np.float32), rtol=F32_RTOL)
    got = ragged.episode_sums(np.arange(10), [4, 6])
    assert got.dtype == np.float64
    assert_array_equal(got, [6.0, 39.0])
    assert_array_equal(ragged.episode_sums(np.zeros(0), np.zeros(3, np.int64)), np.zeros(3))


@pytest.mark.parametrize(
    "len_dtype", [np.int8, np.uint8, np.int16, np.uint16, np.int32, np.uint32, np.int64, np.uint64]
)
def test_lengths_any_integer_dtype(rng, len_dtype):
    lengths = np.array([3, 0, 5, 2], dtype=len_dtype)
    d = ragged_buffer(rng, lengths.astype(np.int64))
    want = ragged.discounted_returns(d["rewards"], [3, 0, 5, 2], gamma=0.9)
    assert_array_equal(ragged.discounted_returns(d["rewards"], lengths, gamma=0.9), want)
    a, _ = ragged.gae(d["rewards"], d["values"], lengths, gamma=0.9, lam=0.9)
    b, _ = ragged.gae(d["rewards"], d["values"], [3, 0, 5, 2], gamma=0.9, lam=0.9)
    assert_array_equal(a, b)
    assert_array_equal(
        ragged.episode_sums(d["rewards"], lengths), ragged.episode_sums(d["rewards"], [3, 0, 5, 2])
    )


def test_dtype_promotion(rng):
    d = ragged_buffer(rng, [4, 6])
    r32 = d["rewards"].astype(np.float32)
    v32 = d["values"].astype(np.float32)
    # float32 with float64 per-piece tail_values stays float32
    got = ragged.discounted_returns(
        r32, d["lengths"], gamma=0.9, terminal=d["terminal"], tail_values=d["tail_values"]
    )
    assert got.dtype == np.float32
    adv, ret = ragged.gae(r32, v32, d["lengths"], gamma=0.9, lam=0.9, tail_values=d["tail_values"])
    assert adv.dtype == ret.dtype == np.float32
    # mixed float32 / float64 per-step arrays -> float64
    adv, ret = ragged.gae(r32, d["values"], d["lengths"], gamma=0.9, lam=0.9)
    assert adv.dtype == ret.dtype == np.float64
    wa, _ = ref.ragged_gae(r32.astype(np.float64), d["values"], d["lengths"], gamma=0.9, lam=0.9)
    _close64(adv, wa)
    # integer rewards -> float64
    ri = rng.integers(-3, 3, size=10)
    got = ragged.discounted_returns(ri, d["lengths"], gamma=0.5)
    _close64(got, ref.ragged_discounted_returns(ri, d["lengths"], gamma=0.5))


def test_empty_and_zero_pieces():
    e = np.zeros(0)
    assert ragged.discounted_returns(e, np.zeros(0, np.int64), gamma=0.9).shape == (0,)
    assert ragged.discounted_returns(e, [0, 0], gamma=0.9).shape == (0,)
    adv, ret = ragged.gae(e, e, [0, 0, 0], gamma=0.9, lam=0.9)
    assert adv.shape == ret.shape == (0,)
    assert_array_equal(ragged.episode_sums(e, [0, 0]), [0.0, 0.0])
    # single-step pieces, all terminal: G = r, A = r - v
    r = np.array([1.0, -2.0, 3.0])
    v = np.array([0.5, 0.5, 0.5])
    assert_array_equal(ragged.discounted_returns(r, [1, 1, 1], gamma=0.99), r)
    adv, ret = ragged.gae(r, v, [1, 1, 1], gamma=0.99, lam=0.95)
    assert_allclose(adv, r - v, rtol=0, atol=1e-15)
    assert_allclose(ret, r, rtol=0, atol=1e-15)


def test_tail_values_only_read_at_non_terminal_pieces(rng):
    d = ragged_buffer(rng, [4, 3, 5])
    term = np.array([True, False, True])
    a = ragged.discounted_returns(
        d["rewards"], d["lengths"], gamma=0.9, terminal=term, tail_values=[1.0, 2.0, 3.0]
    )
    b = ragged.discounted_returns(
        d["rewards"], d["lengths"], gamma=0.9, terminal=term, tail_values=[-7.0, 2.0, 99.0]
    )
    assert_array_equal(a, b)
    a2, _ = ragged.gae(
        d["rewards"],
        d["values"],
        d["lengths"],
        gamma=0.9,
        lam=0.9,
        terminal=term,
        tail_values=[1.0, 2.0, 3.0],
        tail_advantages=[5.0, 1.0, 6.0],
    )
    b2, _ = ragged.gae(
        d["rewards"],
        d["values"],
        d["lengths"],
        gamma=0.9,
        lam=0.9,
        terminal=term,
        tail_values=[-7.0, 2.0, 99.0],
        tail_advantages=[-5.0, 1.0, -6.0],
    )
    assert_array_equal(a2, b2)


def test_one_episode_against_scipy(rng):
    # SciPy reference: lfilter([1], [1, -gamma], x[::-1])[::-1] is one episode's return.
    x = rng.normal(size=300)
    want = scipy.signal.lfilter([1.0], [1.0, -0.95], x[::-1])[::-1]
    assert_allclose(ragged.discounted_returns(x, [300], gamma=0.95), want, rtol=1e-12, atol=1e-12)
    # Schulman et al. 2016, eq. 18: GAE(gamma, 1) = discounted return - V.
    v = rng.normal(size=300)
    adv, _ = ragged.gae(x, v, [300], gamma=0.95, lam=1.0)
    assert_allclose(adv, want - v, rtol=1e-12, atol=1e-12)
    # Schulman et al. 2016, eq. 17: GAE(gamma, 0) = TD error.
    adv, _ = ragged.gae(x, v, [300], gamma=0.95, lam=0.0)
    delta = x + 0.95 * np.append(v[1:], 0.0) - v
    assert_allclose(adv, delta, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("view", ["strided", "negative"])
def test_non_contiguous_inputs(rng, view):
    d = ragged_buffer(rng, [6, 0, 9, 3])
    kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]}

    def v(a):
        if view == "strided":
            big = np.zeros(2 * len(a), dtype=a.dtype)
            big[::2] = a
            return big[::2]
        return np.ascontiguousarray(a[::-1])[::-1]

    want = ragged.discounted_returns(d["rewards"], d["lengths"], gamma=0.9, **kw)
    got = ragged.discounted_returns(
        v(d["rewards"]),
        v(d["lengths"]),
        gamma=0.9,
        terminal=v(d["terminal"]),
        tail_values=v(d["tail_values"]),
    )
    assert_array_equal(got, want)
    wa, wr = ragged.gae(d["rewards"], d["values"], d["lengths"], gamma=0.9, lam=0.8, **kw)
    ga, gr = ragged.gae(
        v(d["rewards"]),
        v(d["values"]),
        v(d["lengths"]),
        gamma=0.9,
        lam=0.8,
        terminal=v(d["terminal"]),
        tail_values=v(d["tail_values"]),
    )
    assert_array_equal(ga, wa)
    assert_array_equal(gr, wr)
    assert_array_equal(
        ragged.episode_sums(v(d["rewards"]), v(d["lengths"]), gamma=0.5),
        ragged.episode_sums(d["rewards"], d["lengths"], gamma=0.5),
    )


def test_out(rng):
    d = ragged_buffer(rng, [6, 0, 9, 3])
    want = ragged.discounted_returns(d["rewards"], d["lengths"], gamma=0.9)
    out = np.empty(18)
    assert ragged.discounted_returns(d["rewards"], d["lengths"], gamma=0.9, out=out) is out
    assert_array_equal(out, want)
    big = np.full(36, 5.0)
    view = big[::-2]
    assert ragged.discounted_returns(d["rewards"], d["lengths"], gamma=0.9, out=view) is view
    assert_array_equal(view, want)
    assert_array_equal(big[-2::-2], 5.0)  # the other half untouched

    wa, wr = ragged.gae(d["rewards"], d["values"], d["lengths"], gamma=0.9, lam=0.9)
    oa, orr = np.empty(18), np.empty(36)[::2]
    res = ragged.gae(d["rewards"], d["values"], d["lengths"], gamma=0.9, lam=0.9, out=(oa, orr))
    assert res[0] is oa
    assert res[1] is orr
    assert_array_equal(oa, wa)
    assert_array_equal(orr, wr)

    sums = np.empty(4)
    assert ragged.episode_sums(d["rewards"], d["lengths"], out=sums) is sums
    assert_array_equal(sums, ragged.episode_sums(d["rewards"], d["lengths"]))


# --------------------------------------------------------------------------
# float32 over a long horizon
# --------------------------------------------------------------------------


def test_float32_rounded_once_long_horizon():
    # gamma = 0.9999 over 10^5 steps: float32 inputs accumulated in float64, so
    # the float32 result equals the float64 result (on the same, widened
    # inputs) rounded once (contract section 1).
    rng = np.random.default_rng(20240601)
    n = 100_000
    r32 = rng.normal(1.0, 1.0, size=n).astype(np.float32)
    v32 = rng.normal(size=n).astype(np.float32)
    r64, v64 = r32.astype(np.float64), v32.astype(np.float64)
    gamma = 0.9999
    # SciPy reference for the float64 discounted return of one episode.
    want = scipy.signal.lfilter([1.0], [1.0, -gamma], r64[::-1])[::-1]
    atol = scale_atol(want, 1e-10)

    got = ragged.discounted_returns(r32, [n], gamma=gamma)
    assert got.dtype == np.float32
    assert_allclose(got, want.astype(np.float32), rtol=F32_RTOL, atol=atol)
    own64 = ragged.discounted_returns(r64, [n], gamma=gamma)
    assert_allclose(own64, want, rtol=1e-9)
    assert_allclose(got, own64.astype(np.float32), rtol=F32_RTOL, atol=atol)

    term = np.zeros(n, dtype=bool)
    got_tm = rollscan.discounted_returns(r32, term, gamma=gamma)
    assert got_tm.dtype == np.float32
    assert_allclose(got_tm, want.astype(np.float32), rtol=F32_RTOL, atol=atol)

    adv32, ret32 = ragged.gae(r32, v32, [n], gamma=gamma, lam=0.999)
    adv64, ret64 = ragged.gae(r64, v64, [n], gamma=gamma, lam=0.999)
    assert adv32.dtype == np.float32
    assert_allclose(adv32, adv64.astype(np.float32), rtol=F32_RTOL, atol=scale_atol(adv64, 1e-10))
    assert_allclose(ret32, ret64.astype(np.float32), rtol=F32_RTOL, atol=scale_atol(ret64, 1e-10))
    tadv32, _ = rollscan.gae(r32, v32, term, gamma=gamma, lam=0.999)
    assert_allclose(tadv32, adv64.astype(np.float32), rtol=F32_RTOL, atol=scale_atol(adv64, 1e-10))


# --------------------------------------------------------------------------
# Hypothesis properties on random ragged layouts
# --------------------------------------------------------------------------


@st.composite
def layouts(draw, max_pieces=8, max_len=25):
    lengths = draw(st.lists(st.integers(0, max_len), min_size=1, max_size=max_pieces))
    e = len(lengths)
    terminal = draw(st.lists(st.booleans(), min_size=e, max_size=e))
    seed = draw(st.integers(0, 2**32 - 1))
    gamma = draw(st.sampled_from([0.0, 0.5, 0.9, 0.99, 1.0]))
    lam = draw(st.sampled_from([0.0, 0.7, 0.95, 1.0]))
    rng = np.random.default_rng(seed)
    s = sum(lengths)
    return {
        "lengths": np.array(lengths, dtype=np.int64),
        "terminal": np.array(terminal, dtype=bool),
        "tail_values": rng.normal(size=e),
        "rewards": rng.normal(size=s),
        "values": rng.normal(size=s),
        "gamma": gamma,
        "lam": lam,
    }


@given(layouts())
def test_ragged_equals_time_major_one_stream(d):
    # Contract section 3: the same formulas as the time-major layout, with
    # terminated at terminal piece ends and truncated + next_values = tail_values
    # at the others.
    if d["rewards"].size == 0:
        return
    term, trunc, nv = as_one_stream(d["lengths"], d["terminal"], d["tail_values"], d["values"])
    kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]}
    g = ragged.discounted_returns(d["rewards"], d["lengths"], gamma=d["gamma"], **kw)
    g_tm = rollscan.discounted_returns(
        d["rewards"], term, gamma=d["gamma"], truncated=trunc, next_values=nv
    )
    assert_allclose(g, g_tm, rtol=1e-12, atol=1e-12)
    adv, ret = ragged.gae(
        d["rewards"], d["values"], d["lengths"], gamma=d["gamma"], lam=d["lam"], **kw
    )
    adv_tm, ret_tm = rollscan.gae(
        d["rewards"],
        d["values"],
        term,
        gamma=d["gamma"],
        lam=d["lam"],
        truncated=trunc,
        next_values=nv,
    )
    assert_allclose(adv, adv_tm, rtol=1e-12, atol=1e-12)
    assert_allclose(ret, ret_tm, rtol=1e-12, atol=1e-12)


@given(layouts(), st.randoms(use_true_random=False))
def test_reordering_pieces_permutes_results(d, random):
    lengths = d["lengths"]
    order = list(range(len(lengths)))
    random.shuffle(order)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    pieces = [np.arange(starts[e], starts[e] + lengths[e]) for e in range(len(lengths))]
    idx = np.concatenate([pieces[e] for e in order]).astype(np.int64)
    kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]}
    pkw = {"terminal": d["terminal"][order], "tail_values": d["tail_values"][order]}
    r, v, g, lam = d["rewards"], d["values"], d["gamma"], d["lam"]

    base = ragged.discounted_returns(r, lengths, gamma=g, **kw)
    perm = ragged.discounted_returns(r[idx], lengths[order], gamma=g, **pkw)
    assert_array_equal(perm, base[idx])

    ba, br = ragged.gae(r, v, lengths, gamma=g, lam=lam, **kw)
    pa, pr = ragged.gae(r[idx], v[idx], lengths[order], gamma=g, lam=lam, **pkw)
    assert_array_equal(pa, ba[idx])
    assert_array_equal(pr, br[idx])

    sums = ragged.episode_sums(r, lengths, gamma=g)
    assert_array_equal(ragged.episode_sums(r[idx], lengths[order], gamma=g), sums[order])


@given(layouts(max_pieces=4, max_len=40), st.data())
def test_split_piece_with_tail_advantages_equals_whole(d, data):
    # Cutting a piece in two at a chunk boundary and carrying the second
    # part's first value and advantage into the first part (tail_values,
    # tail_advantages) gives the same result as the uncut piece.
    lengths = d["lengths"]
    e = data.draw(st.integers(0, len(lengths) - 1))
    if lengths[e] < 2:
        return
    cut = data.draw(st.integers(1, int(lengths[e]) - 1))
    r, v, g, lam = d["rewards"], d["values"], d["gamma"], d["lam"]
    kw = {"terminal": d["terminal"], "tail_values": d["tail_values"]}
    whole_a, whole_r = ragged.gae(r, v, lengths, gamma=g, lam=lam, **kw)
    whole_g = ragged.discounted_returns(r, lengths, gamma=g, **kw)

    start = int(np.sum(lengths[:e]))
    split_lengths = np.concatenate([lengths[:e], [cut, lengths[e] - cut], lengths[e + 1 :]])
    terminal = np.concatenate([d["terminal"][:e], [False], d["terminal"][e:]])
    tail_values = np.concatenate([d["tail_values"][:e], [v[start + cut]], d["tail_values"][e:]])
    tail_adv = np.zeros(len(split_lengths))
    tail_adv[e] = whole_a[start + cut]
    # non-terminal pieces other than the cut one carry nothing in
    a, ret = ragged.gae(
        r,
        v,
        split_lengths,
        gamma=g,
        lam=lam,
        terminal=terminal,
        tail_values=tail_values,
        tail_advantages=tail_adv,
    )
    assert_allclose(a, whole_a, rtol=1e-12, atol=1e-12)
    assert_allclose(ret, whole_r, rtol=1e-12, atol=1e-12)
    # returns: the carried value is the return of the next step
    tail_g = tail_values.copy()
    tail_g[e] = whole_g[start + cut]
    got_g = ragged.discounted_returns(
        r, split_lengths, gamma=g, terminal=terminal, tail_values=tail_g
    )
    assert_allclose(got_g, whole_g, rtol=1e-12, atol=1e-12)


@given(layouts())
def test_float32_is_float64_rounded_once(d):
    r32 = d["rewards"].astype(np.float32)
    v32 = d["values"].astype(np.float32)
    tail32 = d["tail_values"].astype(np.float32)
    kw32 = {"terminal": d["terminal"], "tail_values": tail32}
    kw64 = {"terminal": d["terminal"], "tail_values": tail32.astype(np.float64)}
    g32 = ragged.discounted_returns(r32, d["lengths"], gamma=d["gamma"], **kw32)
    g64 = ref.ragged_discounted_returns(r32, d["lengths"], gamma=d["gamma"], **kw64)
    assert g32.dtype == np.float32
    assert_allclose(g32, g64.astype(np.float32), rtol=F32_RTOL, atol=scale_atol(g64))
    a32, _ = ragged.gae(r32, v32, d["lengths"], gamma=d["gamma"], lam=d["lam"], **kw32)
    a64, _ = ref.ragged_gae(r32, v32, d["lengths"], gamma=d["gamma"], lam=d["lam"], **kw64)
    assert_allclose(a32, a64.astype(np.float32), rtol=F32_RTOL, atol=scale_atol(a64))
