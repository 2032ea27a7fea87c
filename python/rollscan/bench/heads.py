"""Benchmark cases of the action heads: fused log-probability + entropy.

References, each computing the same two arrays:

* ``numpy``: the numerically stable NumPy code a trainer writes (max
  subtracted, in the input dtype);
* ``scipy``: ``scipy.special.log_softmax`` (categorical) /
  ``scipy.stats.norm.logpdf`` (Gaussian) plus the entropy, when SciPy is
  importable;
* ``torch``: ``torch.distributions`` on CPU tensors sharing the NumPy memory,
  only when PyTorch is importable (it is never installed for this);
* ``numba``: a fused ``@njit`` loop, only when Numba is importable.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

import rollscan

from .harness import Case

HALF_LN_2PI = 0.5 * np.log(2 * np.pi)


def numpy_categorical(logits, actions):
    """Stable log-softmax, its value at ``actions`` and the entropy."""
    z = logits - logits.max(axis=-1, keepdims=True)
    lse = np.log(np.exp(z).sum(axis=-1, keepdims=True))
    logp = z - lse
    lp = np.take_along_axis(logp, actions[..., None], axis=-1)[..., 0]
    ent = -(np.exp(logp) * logp).sum(axis=-1)
    return lp, ent


def scipy_categorical(logits, actions):
    from scipy.special import log_softmax

    logp = log_softmax(logits, axis=-1)
    lp = np.take_along_axis(logp, actions[..., None], axis=-1)[..., 0]
    return lp, -(np.exp(logp) * logp).sum(axis=-1)


def numpy_gaussian(mean, log_std, actions):
    """Diagonal Gaussian log-density and entropy, state-independent log_std."""
    z = (actions - mean) * np.exp(-log_std)
    lp = (-0.5 * z * z - log_std).sum(axis=-1) - mean.shape[-1] * HALF_LN_2PI
    ent = np.full(mean.shape[:-1], log_std.sum() + mean.shape[-1] * (0.5 + HALF_LN_2PI))
    return lp, ent


def scipy_gaussian(mean, log_std, actions):
    from scipy.stats import norm

    std = np.exp(log_std)
    lp = norm.logpdf(actions, mean, std).sum(axis=-1)
    ent = np.full(mean.shape[:-1], norm.entropy(scale=std).sum())
    return lp, ent


def _optional_refs() -> dict[str, Callable]:
    refs: dict[str, Callable] = {}
    try:
        import torch
    except ImportError:
        torch = None
    if torch is not None:  # pragma: no cover - optional, never installed here

        def torch_cat(logits, actions):
            d = torch.distributions.Categorical(logits=torch.from_numpy(logits))
            return d.log_prob(torch.from_numpy(actions)), d.entropy()

        def torch_gauss(mean, log_std, actions):
            m = torch.from_numpy(mean)
            d = torch.distributions.Normal(m, torch.from_numpy(log_std).exp().expand_as(m))
            a = torch.from_numpy(actions)
            return d.log_prob(a).sum(-1), d.entropy().sum(-1)

        refs["torch_cat"] = torch_cat
        refs["torch_gauss"] = torch_gauss
    try:
        import numba
    except ImportError:
        numba = None
    if numba is not None:  # pragma: no cover - optional, never installed here

        @numba.njit(cache=False)
        def numba_cat(logits, actions, lp, ent):
            b, k = logits.shape
            for i in range(b):
                m = logits[i, 0]
                for j in range(1, k):
                    m = max(m, logits[i, j])
                s = 0.0
                t = 0.0
                for j in range(k):
                    z = np.float64(logits[i, j]) - m
                    e = np.exp(z)
                    s += e
                    t += e * z
                ls = np.log(s)
                lp[i] = logits[i, actions[i]] - m - ls
                ent[i] = ls - t / s
            return lp, ent

        @numba.njit(cache=False)
        def numba_gauss(mean, log_std, actions, lp, ent):
            b, d = mean.shape
            inv = np.exp(-log_std.astype(np.float64))
            h = 0.0
            for j in range(d):
                h += log_std[j] + 0.5 + 0.9189385332046727
            for i in range(b):
                acc = 0.0
                for j in range(d):
                    z = (np.float64(actions[i, j]) - mean[i, j]) * inv[j]
                    acc += -0.5 * z * z - log_std[j]
                lp[i] = acc - d * 0.9189385332046727
                ent[i] = h
            return lp, ent

        refs["numba_cat"] = numba_cat
        refs["numba_gauss"] = numba_gauss
    return refs


def _have_scipy() -> bool:
    try:
        import scipy.special
        import scipy.stats  # noqa: F401
    except ImportError:
        return False
    return True


def cases(quick: bool) -> list[Case]:
    rng = np.random.default_rng(2027)
    opt = _optional_refs()
    scipy = _have_scipy()
    out: list[Case] = []

    cat_sizes = [(64, 6), (4096, 18), (100_000, 18)] + ([] if quick else [(1_000_000, 4)])
    for b, a in cat_sizes:
        x = rng.standard_normal((b, a), dtype=np.float32)
        act = rng.integers(0, a, size=b)
        o1, o2 = np.empty(b, np.float32), np.empty(b, np.float32)
        refs: dict[str, Callable] = {"numpy": lambda x=x, act=act: numpy_categorical(x, act)}
        if scipy:
            refs["scipy log_softmax"] = lambda x=x, act=act: scipy_categorical(x, act)
        if "torch_cat" in opt:
            refs["torch"] = lambda x=x, act=act: opt["torch_cat"](x, act)
        if "numba_cat" in opt:
            b1, b2 = np.empty(b, np.float32), np.empty(b, np.float32)
            refs["numba"] = lambda x=x, act=act, b1=b1, b2=b2: opt["numba_cat"](x, act, b1, b2)
        target = {
            (100_000, 18): ">= 10x the numpy reference (2 cores)",
            (64, 6): "<= 5 us per call",
        }.get((b, a), "")
        out.append(
            Case(
                group="categorical lp+entropy f32",
                name=f"({b}, {a})",
                run=lambda x=x, act=act: rollscan.categorical_log_prob_entropy(x, act),
                run_out=lambda x=x, act=act, o1=o1, o2=o2: rollscan.categorical_log_prob_entropy(
                    x, act, out=(o1, o2)
                ),
                refs=refs,
                bytes_moved=b * a * 4 + b * 8 + 2 * b * 4,
                fresh_out_bytes=2 * b * 4,
                target=target,
            )
        )

    gauss_sizes = [(64, 6), (4096, 17)] + ([] if quick else [(1_000_000, 6)])
    for b, d in gauss_sizes:
        m = rng.standard_normal((b, d), dtype=np.float32)
        ls = (0.3 * rng.standard_normal(d)).astype(np.float32)
        act = rng.standard_normal((b, d), dtype=np.float32)
        o1, o2 = np.empty(b, np.float32), np.empty(b, np.float32)
        refs = {"numpy": lambda m=m, ls=ls, act=act: numpy_gaussian(m, ls, act)}
        if scipy:
            refs["scipy norm.logpdf"] = lambda m=m, ls=ls, act=act: scipy_gaussian(m, ls, act)
        if "torch_gauss" in opt:
            refs["torch"] = lambda m=m, ls=ls, act=act: opt["torch_gauss"](m, ls, act)
        if "numba_gauss" in opt:
            b1, b2 = np.empty(b, np.float32), np.empty(b, np.float32)
            refs["numba"] = lambda m=m, ls=ls, act=act, b1=b1, b2=b2: opt["numba_gauss"](
                m, ls, act, b1, b2
            )
        target = {
            (1_000_000, 6): "within 3x of the memory floor",
            (64, 6): "<= 5 us per call",
        }.get((b, d), "")
        out.append(
            Case(
                group="gaussian lp+entropy f32, [D] log_std",
                name=f"({b}, {d})",
                run=lambda m=m, ls=ls, act=act: rollscan.gaussian_log_prob_entropy(m, ls, act),
                run_out=lambda m=m, ls=ls, act=act, o1=o1, o2=o2: (
                    rollscan.gaussian_log_prob_entropy(m, ls, act, out=(o1, o2))
                ),
                refs=refs,
                bytes_moved=2 * b * d * 4 + d * 4 + 2 * b * 4,
                fresh_out_bytes=2 * b * 4,
                target=target,
            )
        )
    return out
