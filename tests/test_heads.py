"""Action heads (contract section 4): categorical, diagonal Gaussian and
tanh-squashed Gaussian log-probabilities, entropies, KL, scores and sampling.

External oracles are named beside each test: ``scipy.special.log_softmax``,
``scipy.stats.entropy``, ``scipy.stats.norm``, ``scipy.stats.multivariate_normal``,
``scipy.integrate.quad``, ``scipy.stats.chisquare`` / ``kstest`` and ``mpmath``;
closed forms are written out; score functions are checked by central
finite differences.
"""

from __future__ import annotations

import doctest
import inspect
import math
import threading
import tracemalloc

import numpy as np
import pytest
import rollscan
import rollscan._core as core
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from rollscan import InputError, ShapeError

scipy_special = pytest.importorskip("scipy.special")
scipy_stats = pytest.importorskip("scipy.stats")

F32_RTOL = 2e-7  # one rounding to float32 (2**-24) plus one ulp of slack

HEADS = [
    "categorical_log_prob",
    "categorical_entropy",
    "categorical_log_prob_entropy",
    "categorical_kl",
    "categorical_score",
    "categorical_sample",
    "categorical_mode",
    "gaussian_log_prob",
    "gaussian_entropy",
    "gaussian_log_prob_entropy",
    "gaussian_kl",
    "gaussian_score",
    "gaussian_sample",
    "squashed_gaussian_log_prob",
    "squashed_gaussian_sample",
]


def masked_case(rng, batch, a, p_mask=0.3):
    """Logits, a mask with at least one allowed action per row, and allowed actions."""
    logits = rng.normal(scale=3.0, size=(*batch, a))
    mask = rng.random((*batch, a)) > p_mask
    first = rng.integers(0, a, size=batch)
    np.put_along_axis(mask, first[..., None], True, axis=-1)
    # a uniformly chosen allowed action per row
    keys = np.where(mask, rng.random(mask.shape), -1.0)
    actions = keys.argmax(-1)
    return logits, mask, actions


def ref_log_softmax(logits, mask=None):
    """scipy.special.log_softmax with masked-out logits at -inf."""
    x = np.asarray(logits, dtype=np.float64)
    if mask is not None:
        x = np.where(mask, x, -np.inf)
    with np.errstate(invalid="ignore"):
        return scipy_special.log_softmax(x, axis=-1)


def f32_close(got32, want64):
    """A float32 result equals the float64 result rounded once (a few ulps)."""
    got32 = np.asarray(got32)
    assert got32.dtype == np.float32
    np.testing.assert_allclose(got32, want64, rtol=F32_RTOL * 4, atol=1e-6)


# --------------------------------------------------------------- categorical


@pytest.mark.parametrize("batch", [(7,), (3, 5), (2, 3, 4), ()])
def test_categorical_log_prob_matches_scipy_log_softmax(rng, batch):
    logits, mask, actions = masked_case(rng, batch, 6)
    want = np.take_along_axis(ref_log_softmax(logits, mask), actions[..., None], -1)[..., 0]
    got = rollscan.categorical_log_prob(logits, actions, mask=mask)
    assert got.shape == batch and got.dtype == np.float64
    np.testing.assert_allclose(got, want, rtol=1e-13, atol=1e-13)
    unmasked = np.take_along_axis(ref_log_softmax(logits), actions[..., None], -1)[..., 0]
    np.testing.assert_allclose(
        rollscan.categorical_log_prob(logits, actions), unmasked, rtol=1e-13, atol=1e-13
    )


def test_categorical_entropy_and_kl_match_scipy_stats_entropy(rng):
    logits, mask, _ = masked_case(rng, (40,), 9)
    p = np.exp(ref_log_softmax(logits, mask))
    q_logits = rng.normal(scale=2.0, size=logits.shape)
    q = np.exp(ref_log_softmax(q_logits, mask))
    # scipy.stats.entropy(pk) and scipy.stats.entropy(pk, qk) (KL), per row
    np.testing.assert_allclose(
        rollscan.categorical_entropy(logits, mask=mask),
        scipy_stats.entropy(p, axis=-1),
        rtol=1e-12,
        atol=1e-13,
    )
    np.testing.assert_allclose(
        rollscan.categorical_kl(logits, q_logits, mask=mask),
        scipy_stats.entropy(p, q, axis=-1),
        rtol=1e-11,
        atol=1e-13,
    )


def test_categorical_log_prob_entropy_is_the_two_kernels(rng):
    logits, mask, actions = masked_case(rng, (5, 11), 7)
    lp, h = rollscan.categorical_log_prob_entropy(logits, actions, mask=mask)
    np.testing.assert_array_equal(lp, rollscan.categorical_log_prob(logits, actions, mask=mask))
    np.testing.assert_array_equal(h, rollscan.categorical_entropy(logits, mask=mask))


@pytest.mark.parametrize("k", [1, 2, 5, 18, 1000])
def test_uniform_categorical_entropy_is_ln_k(k):
    # closed form: H(uniform over K) = ln K
    h = rollscan.categorical_entropy(np.full((3, k), 0.7))
    np.testing.assert_allclose(h, math.log(k), rtol=1e-14, atol=1e-15)
    # masking down to m allowed actions gives ln m, and one allowed action 0
    mask = np.zeros((2, k), bool)
    mask[0, : max(1, k // 2)] = True
    mask[1, -1] = True
    h = rollscan.categorical_entropy(np.zeros((2, k)), mask=mask)
    np.testing.assert_allclose(h, [math.log(max(1, k // 2)), 0.0], atol=1e-15)


def test_masked_entropy_is_finite_and_huge_logits_are_finite():
    logits = np.array([[1e30, -1e30, 0.0, 5.0], [-1e30, -1e30, -1e30, -1e30], [3.0, 1e30, 1e30, 0]])
    mask = np.array([[True, True, False, True], [True, False, True, True], [True] * 4])
    lp, h = rollscan.categorical_log_prob_entropy(logits, np.array([1, 2, 2]), mask=mask)
    assert np.all(np.isfinite(lp)) and np.all(np.isfinite(h))
    np.testing.assert_allclose(lp, [-2e30, -math.log(3), -math.log(2)])
    np.testing.assert_allclose(h, [0.0, math.log(3), math.log(2)], atol=1e-15)
    kl = rollscan.categorical_kl(logits, logits[::-1], mask=mask)
    assert np.all(np.isfinite(kl))
    sc = rollscan.categorical_score(logits, np.array([1, 2, 2]), mask=mask)
    assert np.all(np.isfinite(sc))


def test_categorical_score_matches_central_differences(rng):
    logits, mask, actions = masked_case(rng, (6,), 5)
    sc = rollscan.categorical_score(logits, actions, mask=mask)
    h = 1e-6
    fd = np.zeros_like(logits)
    for i in range(logits.shape[0]):
        for j in range(logits.shape[1]):
            up, dn = logits.copy(), logits.copy()
            up[i, j] += h
            dn[i, j] -= h
            lp_up = rollscan.categorical_log_prob(up, actions, mask=mask)[i]
            lp_dn = rollscan.categorical_log_prob(dn, actions, mask=mask)[i]
            fd[i, j] = (lp_up - lp_dn) / (2 * h)
    np.testing.assert_allclose(sc, fd, atol=1e-8)
    assert np.all(sc[~mask] == 0.0)
    # onehot(a) - softmax(logits), the contract's formula
    want = -np.exp(ref_log_softmax(logits, mask))
    want[np.arange(6), actions] += 1.0
    np.testing.assert_allclose(sc, want, atol=1e-15)


def test_categorical_mode_is_first_argmax_over_allowed():
    logits = np.array([[1.0, 3.0, 3.0, 0.0], [5.0, 5.0, 1.0, 1.0], [9.0, 2.0, 2.0, 1.0]])
    mask = np.array([[True, True, True, True], [True, True, True, True], [False, True, True, True]])
    m = rollscan.categorical_mode(logits, mask=mask)
    assert m.dtype == np.int64
    np.testing.assert_array_equal(m, [1, 0, 1])
    np.testing.assert_array_equal(rollscan.categorical_mode(logits), [1, 0, 0])


def test_categorical_sample_passes_chi_square(rng):
    # scipy.stats.chisquare against the softmax probabilities; fixed seed, so
    # the p-value is a fixed number (no flakes), required to be unremarkable.
    probs = np.array([0.05, 0.1, 0.15, 0.3, 0.4, 0.0])
    mask = probs > 0
    n = 200_000
    logits = np.tile(np.log(np.where(mask, probs, 1.0)), (n, 1))
    s = rollscan.categorical_sample(logits, seed=20260, mask=mask)
    assert s.dtype == np.int64 and s.shape == (n,)
    counts = np.bincount(s, minlength=6)
    assert counts[5] == 0  # masked: never drawn
    res = scipy_stats.chisquare(counts[:5], probs[:5] * n)
    assert res.pvalue > 1e-3, res


def test_sampling_is_keyed_by_seed_and_row_only(rng, restore_threads):
    logits = rng.normal(size=(40_000, 7)).astype(np.float32)
    rollscan.set_num_threads(1)
    one = rollscan.categorical_sample(logits, seed=5)
    g_one = rollscan.gaussian_sample(logits, np.zeros(7), seed=5)
    rollscan.set_num_threads(2)
    two = rollscan.categorical_sample(logits, seed=5)
    g_two = rollscan.gaussian_sample(logits, np.zeros(7), seed=5)
    np.testing.assert_array_equal(one, two)
    np.testing.assert_array_equal(g_one, g_two)
    # a prefix, a reshaped batch and a strided copy draw row by row the same
    np.testing.assert_array_equal(rollscan.categorical_sample(logits[:777], seed=5), one[:777])
    np.testing.assert_array_equal(
        rollscan.categorical_sample(logits.reshape(200, 200, 7), seed=5).ravel(), one
    )
    f = np.asfortranarray(logits)
    np.testing.assert_array_equal(rollscan.categorical_sample(f, seed=5), one)
    # different seeds differ
    other = rollscan.categorical_sample(logits, seed=6)
    assert np.mean(other != one) > 0.5
    assert not np.array_equal(g_one, rollscan.gaussian_sample(logits, np.zeros(7), seed=6))


# ------------------------------------------------------------------ gaussian


@pytest.mark.parametrize("shared", [True, False])
def test_gaussian_log_prob_matches_scipy(rng, shared):
    b, d = 50, 6
    mean = rng.normal(size=(b, d))
    log_std = rng.normal(scale=0.5, size=d if shared else (b, d))
    actions = mean + np.exp(log_std) * rng.normal(size=(b, d))
    got = rollscan.gaussian_log_prob(mean, log_std, actions)
    # scipy.stats.norm.logpdf summed over the last axis
    want = scipy_stats.norm.logpdf(actions, mean, np.exp(log_std)).sum(-1)
    np.testing.assert_allclose(got, want, rtol=1e-13)
    # scipy.stats.multivariate_normal.logpdf with a diagonal covariance
    std = np.broadcast_to(np.exp(log_std), (b, d))
    for i in range(0, b, 7):
        mv = scipy_stats.multivariate_normal.logpdf(actions[i], mean[i], np.diag(std[i] ** 2))
        np.testing.assert_allclose(got[i], mv, rtol=1e-12)


def test_gaussian_entropy_closed_form_and_scipy(rng):
    log_std = rng.normal(size=(4, 3, 5))
    h = rollscan.gaussian_entropy(log_std)
    assert h.shape == (4, 3)
    sigma = np.exp(log_std)
    # closed form 0.5 ln(2 pi e sigma^2) per dimension; scipy.stats.norm.entropy
    np.testing.assert_allclose(h, (0.5 * np.log(2 * np.pi * np.e * sigma**2)).sum(-1), rtol=1e-14)
    np.testing.assert_allclose(h, scipy_stats.norm.entropy(scale=sigma).sum(-1), rtol=1e-13)
    assert rollscan.gaussian_entropy(np.zeros(3)).shape == ()


def test_gaussian_log_prob_entropy_shared_and_per_row_agree(rng):
    mean = rng.normal(size=(30, 4))
    ls = rng.normal(size=4)
    a = rng.normal(size=(30, 4))
    lp, h = rollscan.gaussian_log_prob_entropy(mean, ls, a)
    lp2, h2 = rollscan.gaussian_log_prob_entropy(mean, np.tile(ls, (30, 1)), a)
    np.testing.assert_array_equal(lp, lp2)
    np.testing.assert_array_equal(h, h2)
    np.testing.assert_array_equal(h, rollscan.gaussian_entropy(np.tile(ls, (30, 1))))
    # broadcast of a per-row log_std over a middle axis ([B, 1, D] to [B, T, D])
    m3 = rng.normal(size=(5, 3, 4))
    ls3 = rng.normal(size=(5, 1, 4))
    a3 = rng.normal(size=(5, 3, 4))
    np.testing.assert_allclose(
        rollscan.gaussian_log_prob(m3, ls3, a3),
        rollscan.gaussian_log_prob(m3, np.broadcast_to(ls3, m3.shape).copy(), a3),
        rtol=0,
        atol=0,
    )


def test_gaussian_kl_closed_form_and_properties(rng):
    mp, mq = rng.normal(size=(2, 20, 3))
    lp, lq = rng.normal(scale=0.7, size=(2, 20, 3))
    kl = rollscan.gaussian_kl(mp, lp, mq, lq)
    sp, sq = np.exp(lp), np.exp(lq)
    # closed form ln(s_q/s_p) + (s_p^2 + (m_p - m_q)^2) / (2 s_q^2) - 1/2, summed
    want = (np.log(sq / sp) + (sp**2 + (mp - mq) ** 2) / (2 * sq**2) - 0.5).sum(-1)
    np.testing.assert_allclose(kl, want, rtol=1e-12, atol=1e-14)
    assert np.all(kl >= 0)
    np.testing.assert_array_equal(rollscan.gaussian_kl(mp, lp, mp, lp), 0.0)
    # shared log-stds
    np.testing.assert_allclose(
        rollscan.gaussian_kl(mp, lp[0], mq, lq[0]),
        rollscan.gaussian_kl(mp, np.tile(lp[0], (20, 1)), mq, np.tile(lq[0], (20, 1))),
        rtol=1e-15,
    )


def test_gaussian_score_matches_central_differences(rng):
    mean = rng.normal(size=(4, 3))
    log_std = rng.normal(scale=0.3, size=(4, 3))
    a = rng.normal(size=(4, 3))
    d_mean, d_ls = rollscan.gaussian_score(mean, log_std, a)
    sig2 = np.exp(2 * log_std)
    np.testing.assert_allclose(d_mean, (a - mean) / sig2, rtol=1e-14)
    np.testing.assert_allclose(d_ls, (a - mean) ** 2 / sig2 - 1, rtol=1e-13, atol=1e-15)
    h = 1e-6
    for arr, grad in ((mean, d_mean), (log_std, d_ls)):
        fd = np.zeros_like(arr)
        for idx in np.ndindex(arr.shape):
            up, dn = arr.copy(), arr.copy()
            up[idx] += h
            dn[idx] -= h
            if arr is mean:
                f_up = rollscan.gaussian_log_prob(up, log_std, a)[idx[0]]
                f_dn = rollscan.gaussian_log_prob(dn, log_std, a)[idx[0]]
            else:
                f_up = rollscan.gaussian_log_prob(mean, up, a)[idx[0]]
                f_dn = rollscan.gaussian_log_prob(mean, dn, a)[idx[0]]
            fd[idx] = (f_up - f_dn) / (2 * h)
        np.testing.assert_allclose(grad, fd, atol=1e-7)


def test_gaussian_sample_passes_kolmogorov_smirnov():
    n, d = 40_000, 5
    mean = np.linspace(-2, 2, d)
    log_std = np.linspace(-1, 1, d)
    x = rollscan.gaussian_sample(np.tile(mean, (n, 1)), log_std, seed=99)
    z = (x - mean) / np.exp(log_std)
    for j in range(d):  # every dimension, even and odd Box-Muller draws
        res = scipy_stats.kstest(z[:, j], "norm")
        assert res.pvalue > 1e-3, (j, res)
    # independent dimensions: correlation near 0
    c = np.corrcoef(z.T)
    assert np.max(np.abs(c - np.eye(d))) < 0.03


# ------------------------------------------------------------------ squashed


@pytest.mark.parametrize(
    ("mu", "ls", "low", "high"), [(0.3, -0.2, -1.0, 1.0), (-1.5, 0.4, 2.0, 5.0)]
)
def test_squashed_density_integrates_to_one(mu, ls, low, high):
    # change of variables: p(a) da = N(u) du, so the density integrates to 1
    integrate = pytest.importorskip("scipy.integrate")

    def dens(a):
        lp = rollscan.squashed_gaussian_log_prob(
            np.array([mu]), np.array([ls]), np.array([a]), low=low, high=high
        )
        return math.exp(float(lp))

    eps = 1e-12 * (high - low)
    total, err = integrate.quad(dens, low + eps, high - eps, limit=200)
    assert abs(total - 1.0) < 1e-6, (total, err)


def test_squashed_log_prob_far_tails_with_pre_squash():
    # mpmath for log|da/du| = ln((high - low)/2) + ln(sech(u)^2), exact in the tails
    mpmath = pytest.importorskip("mpmath")
    mean = np.array([[25.0, -25.0, 3.0]])
    log_std = np.array([0.5, 0.2, -1.0])
    u = mean + np.array([[0.7, -1.3, 0.01]])
    low, high = -2.0, 3.0
    a = low + (high - low) * (np.tanh(u) + 1) / 2  # saturates: tanh(25) == 1.0
    got = rollscan.squashed_gaussian_log_prob(mean, log_std, a, low=low, high=high, pre_squash=u)
    logjac = sum(
        float(mpmath.log((high - low) / 2) + 2 * mpmath.log(mpmath.sech(mpmath.mpf(x))))
        for x in u[0]
    )
    want = scipy_stats.norm.logpdf(u, mean, np.exp(log_std)).sum() - logjac
    assert np.isfinite(got[0])
    np.testing.assert_allclose(got[0], want, rtol=1e-12)


def test_squashed_inversion_matches_pre_squash_inside(rng):
    mean = rng.normal(size=(20, 3))
    log_std = rng.normal(scale=0.3, size=3)
    a, u = rollscan.squashed_gaussian_sample(mean, log_std, seed=3, low=-2.0, high=0.5)
    assert np.all((a >= -2.0) & (a <= 0.5))
    np.testing.assert_array_equal(u, rollscan.gaussian_sample(mean, log_std, seed=3))
    np.testing.assert_allclose(a, -2.0 + 2.5 * (np.tanh(u) + 1) / 2, rtol=1e-14, atol=1e-15)
    inv = rollscan.squashed_gaussian_log_prob(mean, log_std, a, low=-2.0, high=0.5)
    given_u = rollscan.squashed_gaussian_log_prob(
        mean, log_std, a, low=-2.0, high=0.5, pre_squash=u
    )
    np.testing.assert_allclose(inv, given_u, rtol=1e-7)
    # per-dimension bounds as arrays
    lo, hi = np.array([-1.0, 0.0, 2.0]), np.array([1.0, 4.0, 2.5])
    a2, _ = rollscan.squashed_gaussian_sample(mean, log_std, seed=3, low=lo, high=hi)
    assert np.all((a2 >= lo) & (a2 <= hi))
    # an action exactly on a bound has density 0 (log-density -inf)
    edge = rollscan.squashed_gaussian_log_prob(np.zeros(2), np.zeros(2), np.array([1.0, 0.0]))
    assert edge == -np.inf


def test_squashed_sample_pre_squash_is_normal():
    n = 30_000
    _, u = rollscan.squashed_gaussian_sample(np.full((n, 2), 0.5), np.log([0.5, 2.0]), seed=11)
    for j, s in enumerate([0.5, 2.0]):
        res = scipy_stats.kstest((u[:, j] - 0.5) / s, "norm")
        assert res.pvalue > 1e-3, res


# ------------------------------------------------------------------ properties

logit_rows = hnp.arrays(
    np.float64,
    hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=12),
    elements=st.floats(-50, 50, allow_nan=False),
)


@given(logit_rows, st.data())
def test_probabilities_of_a_row_sum_to_one(x, data):
    b, a = x.shape
    mask = data.draw(hnp.arrays(np.bool_, x.shape))
    mask[:, 0] = True
    total = np.zeros(b)
    for j in range(a):
        allowed = mask[:, j]
        if not allowed.any():
            continue
        acts = np.where(allowed, j, 0)
        lp = rollscan.categorical_log_prob(x, acts, mask=mask)
        total += np.where(allowed, np.exp(lp), 0.0)
    np.testing.assert_allclose(total, 1.0, rtol=1e-12)


@given(logit_rows, st.data())
def test_kl_is_nonnegative_and_zero_on_itself(x, data):
    y = data.draw(hnp.arrays(np.float64, x.shape, elements=st.floats(-50, 50)))
    assert np.all(rollscan.categorical_kl(x, y) >= 0)
    np.testing.assert_array_equal(rollscan.categorical_kl(x, x), 0.0)
    ls = np.clip(y, -5, 5)
    assert np.all(rollscan.gaussian_kl(x, ls, y, ls[::-1]) >= 0)
    np.testing.assert_array_equal(rollscan.gaussian_kl(x, ls, x, ls), 0.0)


@given(logit_rows, st.data())
def test_masking_an_action_equals_removing_its_column(x, data):
    b, a = x.shape
    if a < 2:
        return
    col = data.draw(st.integers(0, a - 1))
    keep = [j for j in range(a) if j != col]
    mask = np.ones_like(x, dtype=bool)
    mask[:, col] = False
    acts = np.full(b, keep[0])
    lp, h = rollscan.categorical_log_prob_entropy(x, acts, mask=mask)
    lp0, h0 = rollscan.categorical_log_prob_entropy(x[:, keep], np.zeros(b, np.int64))
    np.testing.assert_array_equal(lp, lp0)
    np.testing.assert_array_equal(h, h0)
    sc = rollscan.categorical_score(x, acts, mask=mask)
    np.testing.assert_array_equal(sc[:, keep], rollscan.categorical_score(x[:, keep], acts * 0))
    assert np.all(sc[:, col] == 0)


# ----------------------------------------------------- dtypes, layouts, out=


def test_float32_is_the_float64_result_rounded_once(rng):
    logits, mask, actions = masked_case(rng, (300,), 18)
    x32 = logits.astype(np.float32)
    x64 = x32.astype(np.float64)
    for f in (rollscan.categorical_log_prob,):
        f32_close(f(x32, actions, mask=mask), f(x64, actions, mask=mask))
    lp32, h32 = rollscan.categorical_log_prob_entropy(x32, actions, mask=mask)
    lp64, h64 = rollscan.categorical_log_prob_entropy(x64, actions, mask=mask)
    f32_close(lp32, lp64)
    f32_close(h32, h64)
    f32_close(
        rollscan.categorical_kl(x32, x32[::-1], mask=mask),
        rollscan.categorical_kl(x64, x64[::-1], mask=mask),
    )
    m, ls, a = (rng.normal(size=(300, 6)).astype(np.float32) for _ in range(3))
    for g in (rollscan.gaussian_log_prob,):
        f32_close(g(m, ls, a), g(m.astype(np.float64), ls.astype(np.float64), a.astype(np.float64)))
    # a shared float64 log_std does not promote float32 means (it is a parameter)
    out = rollscan.gaussian_log_prob(m, ls[0].astype(np.float64), a)
    assert out.dtype == np.float32
    # mixed per-step float32/float64 promote to float64
    assert rollscan.categorical_kl(x32, x64).dtype == np.float64
    assert rollscan.gaussian_log_prob(m, ls, a.astype(np.float64)).dtype == np.float64
    # integer means promote to float64; any integer action dtype is accepted
    assert (
        rollscan.gaussian_log_prob(np.zeros((2, 2), int), np.zeros(2), np.ones((2, 2))).dtype
        == np.float64
    )
    for dt in (np.int8, np.uint8, np.int16, np.int32, np.uint32, np.uint64):
        np.testing.assert_array_equal(
            rollscan.categorical_log_prob(x64, actions.astype(dt), mask=mask),
            rollscan.categorical_log_prob(x64, actions, mask=mask),
        )


def _layouts(x):
    """Non-contiguous views of x (last axis kept) with their contiguous copies."""
    yield x[::2], np.ascontiguousarray(x[::2])
    yield np.asfortranarray(x), x
    yield x[::-1], np.ascontiguousarray(x[::-1])
    yield x[:, ::-1], np.ascontiguousarray(x[:, ::-1])


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_non_contiguous_inputs_give_the_contiguous_results(rng, dtype):
    logits, mask, _ = masked_case(rng, (40,), 5)
    logits = logits.astype(dtype)
    for (xv, xc), (mv, mc) in zip(_layouts(logits), _layouts(mask)):
        n = xv.shape[0]
        acts = np.array([np.flatnonzero(r)[0] for r in mc])
        lp = rollscan.categorical_log_prob_entropy(xv, acts, mask=mv)
        want = rollscan.categorical_log_prob_entropy(xc, acts, mask=mc)
        np.testing.assert_array_equal(lp[0], want[0])
        np.testing.assert_array_equal(lp[1], want[1])
        assert lp[0].shape == (n,)
        np.testing.assert_array_equal(
            rollscan.categorical_score(xv, acts, mask=mv),
            rollscan.categorical_score(xc, acts, mask=mc),
        )
    # three batch axes whose strides do not fold (a transpose, Fortran order)
    x3 = rng.normal(size=(4, 6, 3)).astype(dtype)
    for v in (x3.transpose(1, 0, 2), np.asfortranarray(x3), x3[:, ::-2]):
        c = np.ascontiguousarray(v)
        a = np.zeros(v.shape[:-1], np.int64) + 1
        np.testing.assert_array_equal(
            rollscan.categorical_log_prob(v, a), rollscan.categorical_log_prob(c, a)
        )
        np.testing.assert_array_equal(
            rollscan.gaussian_log_prob(v, v[..., ::-1], v * 0.5),
            rollscan.gaussian_log_prob(c, np.ascontiguousarray(v[..., ::-1]), c * 0.5),
        )
        np.testing.assert_array_equal(
            rollscan.gaussian_sample(v, c, seed=2), rollscan.gaussian_sample(c, c, seed=2)
        )


def test_strided_inputs_are_read_in_place():
    # tracemalloc sees NumPy's allocations: a copy of the 8 MB input would show.
    x = np.zeros((200_000, 10), dtype=np.float32)[::2]
    a = np.zeros(100_000, dtype=np.int64)
    f = np.asfortranarray(np.zeros((100_000, 10)))
    rollscan.categorical_log_prob(x, a)
    tracemalloc.start()
    try:
        rollscan.categorical_log_prob_entropy(x, a)
        rollscan.gaussian_log_prob(f, np.zeros(10), f)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 2_000_000, peak  # the outputs (0.4-0.8 MB), never a copy


@pytest.mark.parametrize("batch", [(0,), (3, 0), (0, 4)])
def test_zero_length_batches(batch):
    x = np.zeros((*batch, 5), np.float32)
    a = np.zeros(batch, np.int64)
    lp, h = rollscan.categorical_log_prob_entropy(x, a)
    assert lp.shape == batch and h.shape == batch and lp.dtype == np.float32
    assert rollscan.categorical_sample(x, seed=1).shape == batch
    assert rollscan.categorical_score(x, a).shape == x.shape
    assert rollscan.categorical_kl(x, x).shape == batch
    assert rollscan.gaussian_log_prob(x, np.zeros(5), x).shape == batch
    d_m, _ = rollscan.gaussian_score(x, x, x)
    assert d_m.shape == x.shape
    a2, _ = rollscan.squashed_gaussian_sample(x, np.zeros(5), seed=0)
    assert a2.shape == x.shape
    # zero action dimensions: an empty sum
    lp0, h0 = rollscan.gaussian_log_prob_entropy(np.zeros((3, 0)), np.zeros(0), np.zeros((3, 0)))
    np.testing.assert_array_equal(lp0, 0.0)
    np.testing.assert_array_equal(h0, 0.0)


def test_out_arrays(rng):
    logits, mask, actions = masked_case(rng, (6,), 4)
    out = np.empty(6)
    r = rollscan.categorical_log_prob(logits, actions, mask=mask, out=out)
    assert r is out
    np.testing.assert_array_equal(out, rollscan.categorical_log_prob(logits, actions, mask=mask))
    o1, o2 = np.empty(6), np.empty(6)
    lp, h = rollscan.categorical_log_prob_entropy(logits, actions, out=(o1, o2))
    assert lp is o1 and h is o2
    strided = np.zeros((6, 2))[:, 0]
    rollscan.categorical_entropy(logits, out=strided)
    np.testing.assert_array_equal(strided, rollscan.categorical_entropy(logits))
    idx = np.empty(6, np.int64)
    assert rollscan.categorical_mode(logits, out=idx) is idx
    s1, s2 = np.empty((6, 4)), np.empty((6, 4))
    dm, ds = rollscan.gaussian_score(logits, logits, logits, out=(s1, s2))
    assert dm is s1 and ds is s2
    with pytest.raises(ShapeError, match="out"):
        rollscan.categorical_log_prob(logits, actions, out=np.empty(5))
    with pytest.raises(ShapeError, match="out"):
        rollscan.categorical_score(logits, actions, out=np.empty(6))
    with pytest.raises(TypeError, match="dtype"):
        rollscan.categorical_log_prob(logits, actions, out=np.empty(6, np.float32))
    with pytest.raises(TypeError, match="dtype"):
        rollscan.categorical_sample(logits, seed=1, out=np.empty(6))
    ro = np.empty(6)
    ro.flags.writeable = False
    with pytest.raises(TypeError, match="read-only"):
        rollscan.categorical_entropy(logits, out=ro)
    with pytest.raises(TypeError):
        rollscan.categorical_log_prob_entropy(logits, actions, out=np.empty(6))
    with pytest.raises(TypeError):
        rollscan.categorical_entropy(logits, out=[0.0] * 6)
    # an output that is an input: refused (these kernels do not work in place)
    x = rng.normal(size=(5, 3))
    with pytest.raises(InputError, match="overlaps an input"):
        rollscan.gaussian_sample(x, np.zeros(3), seed=1, out=x)


# ------------------------------------------------------------------ errors


def test_categorical_value_errors_name_the_row():
    x = np.zeros((2, 3, 4))
    a = np.zeros((2, 3), np.int64)
    a[1, 2] = 4
    with pytest.raises(InputError, match=r"actions\[1, 2\] = 4 is out of range \[0, 4\)"):
        rollscan.categorical_log_prob(x, a)
    a[1, 2] = -1
    with pytest.raises(InputError, match=r"actions\[1, 2\] = -1"):
        rollscan.categorical_score(x, a)
    a[1, 2] = 0
    mask = np.ones((2, 3, 4), bool)
    mask[0, 1, 0] = False
    with pytest.raises(InputError, match=r"actions\[0, 1\] = 0 is masked out"):
        rollscan.categorical_log_prob_entropy(x, a, mask=mask)
    mask[1, 0] = False
    for f in (
        lambda: rollscan.categorical_entropy(x, mask=mask),
        lambda: rollscan.categorical_sample(x, seed=0, mask=mask),
        lambda: rollscan.categorical_mode(x, mask=mask),
        lambda: rollscan.categorical_kl(x, x, mask=mask),
    ):
        with pytest.raises(InputError, match=r"mask\[1, 0\] allows no action"):
            f()
    # a broadcast [A] mask is named in its own coordinates
    with pytest.raises(InputError, match=r"actions\[0, 0\] = 3 is masked out"):
        rollscan.categorical_log_prob(x, a + 3, mask=np.array([True, True, True, False]))
    y = x.copy()
    y[1, 1, 2] = np.nan
    with pytest.raises(InputError, match=r"logits\[1, 1, 2\] is not finite"):
        rollscan.categorical_log_prob(y, a)
    with pytest.raises(InputError, match=r"logits_q\[1, 1, 2\] is not finite"):
        rollscan.categorical_kl(x, y)
    # masked-out NaNs are never read; check_finite=False lets NaN propagate
    m2 = np.ones_like(mask)
    m2[1, 1, 2] = False
    assert np.all(np.isfinite(rollscan.categorical_entropy(y, mask=m2)))
    assert np.isnan(rollscan.categorical_entropy(y, check_finite=False)[1, 1])
    with pytest.raises(InputError, match="empty last axis"):
        rollscan.categorical_entropy(np.zeros((3, 0)))


def test_shape_errors_name_both_arguments():
    x = np.zeros((4, 3))
    with pytest.raises(ShapeError, match=r"actions has shape \(3,\) but logits has shape \(4, 3\)"):
        rollscan.categorical_log_prob(x, np.zeros(3, int))
    with pytest.raises(ShapeError, match="mask"):
        rollscan.categorical_entropy(x, mask=np.ones((4, 2), bool))
    with pytest.raises(ShapeError, match="logits_q"):
        rollscan.categorical_kl(x, np.zeros((4, 4)))
    with pytest.raises(ShapeError, match=r"\(\)"):
        rollscan.categorical_entropy(np.float64(1.0))
    with pytest.raises(ShapeError, match="actions"):
        rollscan.gaussian_log_prob(x, np.zeros(3), np.zeros((4, 2)))
    with pytest.raises(ShapeError, match="log_std"):
        rollscan.gaussian_log_prob(x, np.zeros(2), x)
    with pytest.raises(ShapeError, match="log_std"):
        rollscan.gaussian_log_prob(x, np.zeros((2, 3)), x)
    with pytest.raises(ShapeError, match="mean_q"):
        rollscan.gaussian_kl(x, np.zeros(3), np.zeros((4, 2)), np.zeros(2))
    with pytest.raises(ShapeError, match="pre_squash"):
        rollscan.squashed_gaussian_log_prob(x, np.zeros(3), x * 0, pre_squash=np.zeros(3))
    with pytest.raises(ShapeError, match="low"):
        rollscan.squashed_gaussian_sample(x, np.zeros(3), seed=1, low=np.zeros(2))


def test_gaussian_and_squashed_value_errors():
    m = np.zeros((2, 3))
    bad = m.copy()
    bad[1, 2] = np.inf
    with pytest.raises(InputError, match=r"mean\[1, 2\] is not finite"):
        rollscan.gaussian_log_prob(bad, np.zeros(3), m)
    with pytest.raises(InputError, match=r"actions\[1, 2\] is not finite"):
        rollscan.gaussian_score(m, np.zeros(3), bad)
    with pytest.raises(InputError, match=r"log_std\[2\] is not finite"):
        rollscan.gaussian_sample(m, np.array([0.0, 0.0, np.nan]), seed=0)
    with pytest.raises(InputError, match=r"log_std\[1, 2\] is not finite"):
        rollscan.gaussian_entropy(bad)
    with pytest.raises(InputError, match=r"log_std_q\[1, 2\] is not finite"):
        rollscan.gaussian_kl(m, m, m, bad)
    assert np.isinf(rollscan.gaussian_log_prob(bad, np.zeros(3), m, check_finite=False)[1])
    a = np.full((2, 3), 0.5)
    a[0, 1] = 1.5
    with pytest.raises(InputError, match=r"actions\[0, 1\] = 1.5 is outside \[low, high\]"):
        rollscan.squashed_gaussian_log_prob(m, np.zeros(3), a)
    with pytest.raises(InputError, match="high"):
        rollscan.squashed_gaussian_log_prob(m, np.zeros(3), a, low=1.0, high=1.0)
    with pytest.raises(InputError, match="low"):
        rollscan.squashed_gaussian_sample(m, np.zeros(3), seed=0, low=-np.inf)
    with pytest.raises(InputError, match=r"pre_squash\[0, 0\] is not finite"):
        rollscan.squashed_gaussian_log_prob(
            m, np.zeros(3), a, pre_squash=np.array([[np.nan, 0, 0], [0, 0, 0]])
        )


def test_seed_and_dtype_type_errors():
    x = np.zeros((2, 3))
    with pytest.raises(InputError, match="seed"):
        rollscan.categorical_sample(x, seed=-1)
    with pytest.raises(InputError, match="seed"):
        rollscan.gaussian_sample(x, x, seed=2**64)
    with pytest.raises(TypeError, match="seed"):
        rollscan.categorical_sample(x, seed=1.5)
    with pytest.raises(TypeError):
        rollscan.categorical_sample(x)  # seed is required
    assert rollscan.categorical_sample(x, seed=2**64 - 1).shape == (2,)
    with pytest.raises(TypeError, match="dtype"):
        rollscan.categorical_entropy(x.astype(complex))
    with pytest.raises(TypeError, match="dtype"):
        rollscan.categorical_log_prob(x, np.zeros(2))  # float actions
    with pytest.raises(TypeError, match="dtype"):
        rollscan.gaussian_log_prob(x, np.array(["a", "b", "c"]), x)
    with pytest.raises(TypeError, match="dtype"):
        rollscan.categorical_entropy(x, mask=np.array([["a"] * 3] * 2))
    # int8 0/1 masks (as environments often emit them) act as bool masks
    np.testing.assert_array_equal(
        rollscan.categorical_entropy(x, mask=np.array([1, 0, 1], np.int8)),
        rollscan.categorical_entropy(x[:, [0, 2]]),
    )
    # Python lists go through numpy.asarray
    np.testing.assert_allclose(
        rollscan.categorical_log_prob([[0.0, 0.0]], [1]), [-math.log(2)], rtol=1e-15
    )


# ------------------------------------------------------------------ the call path


def test_large_batches_are_bit_identical_for_one_and_two_threads(rng, restore_threads):
    logits, mask, actions = masked_case(rng, (30_000,), 9)
    m = rng.normal(size=(30_000, 6)).astype(np.float32)
    res = []
    for n in (1, 2):
        rollscan.set_num_threads(n)
        res.append(
            (
                rollscan.categorical_log_prob_entropy(logits, actions, mask=mask),
                rollscan.categorical_kl(logits, logits[::-1], mask=mask),
                rollscan.gaussian_log_prob_entropy(m, m[0], m[::-1]),
                rollscan.squashed_gaussian_sample(m, m, seed=4),
            )
        )
    for a, b in zip(res[0], res[1]):
        a, b = (a, b) if isinstance(a, tuple) else ((a,), (b,))
        for x, y in zip(a, b):
            np.testing.assert_array_equal(x, y)


def test_gil_is_released_for_large_calls(rng):
    x = rng.normal(size=(400_000, 18)).astype(np.float32)
    a = np.zeros(400_000, np.int64)
    ticks = []
    done = threading.Event()

    def ticker():
        while not done.is_set():
            ticks.append(1)
            done.wait(0.0005)

    t = threading.Thread(target=ticker)
    t.start()
    try:
        for _ in range(5):
            rollscan.categorical_log_prob_entropy(x, a)
    finally:
        done.set()
        t.join()
    assert len(ticks) > 5


def test_many_calls_do_not_leak():
    psutil = pytest.importorskip("psutil")
    x = np.zeros((64, 32))
    a = np.zeros(64, np.int64)
    proc = psutil.Process()

    def round_():
        rollscan.categorical_log_prob_entropy(x, a)
        rollscan.gaussian_log_prob(x, x, x)
        rollscan.squashed_gaussian_sample(x, x, seed=1)
        try:
            rollscan.categorical_log_prob(x, a + 99)
        except InputError:
            pass

    for _ in range(200):
        round_()
    before = proc.memory_info().rss
    for _ in range(3000):
        round_()
    assert proc.memory_info().rss - before < 12 * 1024 * 1024


@pytest.mark.parametrize("name", HEADS)
def test_docstring_examples_run(name):
    obj = getattr(core, name)
    assert obj.__doc__, f"{name} has no docstring"
    test = doctest.DocTestParser().get_doctest(obj.__doc__, {}, f"rollscan._core.{name}", None, 0)
    assert test.examples, f"{name} has no >>> example"
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    runner.run(test)
    assert runner.summarize(verbose=False).failed == 0


CONTRACT = {
    "categorical_log_prob": "(logits, actions, *, mask=None, check_finite=True, out=None)",
    "categorical_entropy": "(logits, *, mask=None, check_finite=True, out=None)",
    "categorical_log_prob_entropy": "(logits, actions, *, mask=None, check_finite=True, out=None)",
    "categorical_kl": "(logits_p, logits_q, *, mask=None, check_finite=True, out=None)",
    "categorical_score": "(logits, actions, *, mask=None, check_finite=True, out=None)",
    "categorical_sample": "(logits, *, seed, mask=None, check_finite=True, out=None)",
    "categorical_mode": "(logits, *, mask=None, check_finite=True, out=None)",
    "gaussian_log_prob": "(mean, log_std, actions, *, check_finite=True, out=None)",
    "gaussian_entropy": "(log_std, *, check_finite=True, out=None)",
    "gaussian_log_prob_entropy": "(mean, log_std, actions, *, check_finite=True, out=None)",
    "gaussian_kl": "(mean_p, log_std_p, mean_q, log_std_q, *, check_finite=True, out=None)",
    "gaussian_score": "(mean, log_std, actions, *, check_finite=True, out=None)",
    "gaussian_sample": "(mean, log_std, *, seed, check_finite=True, out=None)",
    "squashed_gaussian_log_prob": "(mean, log_std, actions, *, low=-1.0, high=1.0, "
    "pre_squash=None, check_finite=True, out=None)",
    "squashed_gaussian_sample": "(mean, log_std, *, seed, low=-1.0, high=1.0, "
    "check_finite=True, out=None)",
}


@pytest.mark.parametrize("name", HEADS)
def test_signatures_match_the_contract(name):
    f = getattr(rollscan, name)
    assert f is getattr(core, name)
    assert str(inspect.signature(f)) == CONTRACT[name]
    assert name in rollscan.__all__
