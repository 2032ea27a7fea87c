"""Benchmark cases of the core engine: time-major GAE and ragged returns."""

from __future__ import annotations

from typing import Callable

import numpy as np

import rollscan

from .harness import Case


def numpy_gae(r, v, term, boot, gamma, lam):
    """The reverse loop over T, vectorised across streams, a trainer would write."""
    t_len = r.shape[0]
    adv = np.zeros_like(r)
    last = np.zeros(r.shape[1:], dtype=np.float64)
    notdone = 1.0 - term.astype(r.dtype)
    for t in range(t_len - 1, -1, -1):
        vnext = boot if t == t_len - 1 else v[t + 1]
        delta = r[t] + gamma * vnext * notdone[t] - v[t]
        last = delta + gamma * lam * notdone[t] * last
        adv[t] = last
    return adv, adv + v


def lfilter_ragged(r, lengths, gamma):
    """``scipy.signal.lfilter`` run on each episode, reversed."""
    from scipy.signal import lfilter

    out = np.empty_like(r)
    a = [1.0, -gamma]
    off = 0
    for n in lengths:
        seg = r[off : off + n]
        out[off : off + n] = lfilter([1.0], a, seg[::-1])[::-1]
        off += n
    return out


def _numba_refs() -> dict[str, Callable]:
    try:
        import numba  # noqa: F401
    except ImportError:
        return {}
    from numba import njit

    @njit(cache=False)
    def gae_loop(r, v, term, boot, gamma, lam, adv):  # pragma: no cover - optional
        t_len, n = r.shape
        for j in range(n):
            last = 0.0
            for t in range(t_len - 1, -1, -1):
                nd = 0.0 if term[t, j] else 1.0
                vn = boot[j] if t == t_len - 1 else v[t + 1, j]
                delta = r[t, j] + gamma * vn * nd - v[t, j]
                last = delta + gamma * lam * nd * last
                adv[t, j] = last
        return adv

    @njit(cache=False)
    def ragged_loop(r, lengths, gamma, out):  # pragma: no cover - optional
        off = 0
        for n in lengths:
            g = 0.0
            for t in range(off + n - 1, off - 1, -1):
                g = r[t] + gamma * g
                out[t] = g
            off += n
        return out

    return {"gae": gae_loop, "ragged": ragged_loop}


def cases(quick: bool) -> list[Case]:
    rng = np.random.default_rng(2026)
    nb = _numba_refs()
    out: list[Case] = []
    gamma, lam = 0.99, 0.95
    sizes = [(128, 8), (2048, 64), (1000, 1000)] + ([] if quick else [(10000, 1000)])
    for t_len, n in sizes:
        r = rng.standard_normal((t_len, n), dtype=np.float32)
        v = rng.standard_normal((t_len, n), dtype=np.float32)
        term = rng.random((t_len, n)) < 0.01
        boot = rng.standard_normal(n, dtype=np.float32)
        oa, orr = np.empty_like(r), np.empty_like(r)
        refs: dict[str, Callable] = {
            "numpy": lambda r=r, v=v, te=term, b=boot: numpy_gae(r, v, te, b, gamma, lam)
        }
        if "gae" in nb:
            buf = np.empty_like(r)
            refs["numba"] = lambda r=r, v=v, te=term, b=boot, buf=buf: nb["gae"](
                r, v, te, b, gamma, lam, buf
            )
        target = {
            (2048, 64): ">= 50x numpy, >= 2x faster than numba",
            (128, 8): "<= 5 us per call",
        }.get((t_len, n), "within 2x of the floor with out=, 2x of floor+first-touch without")
        out.append(
            Case(
                group="gae f32 time-major",
                name=f"({t_len}, {n})",
                run=lambda r=r, v=v, te=term, b=boot: rollscan.gae(
                    r, v, te, gamma=gamma, lam=lam, bootstrap=b
                ),
                run_out=lambda r=r, v=v, te=term, b=boot, oa=oa, orr=orr: rollscan.gae(
                    r, v, te, gamma=gamma, lam=lam, bootstrap=b, out=(oa, orr)
                ),
                refs=refs,
                bytes_moved=t_len * n * (4 + 4 + 1 + 4 + 4),
                fresh_out_bytes=t_len * n * 8,
                target=target,
            )
        )
    steps = [10**4, 10**6] + ([] if quick else [10**7])
    for s in steps:
        lengths = []
        total = 0
        while total < s:
            k = int(min(rng.integers(1, 1001), s - total))
            lengths.append(k)
            total += k
        lengths_a = np.array(lengths, dtype=np.int64)
        r = rng.standard_normal(s, dtype=np.float32)
        o = np.empty_like(r)
        refs = {"scipy lfilter/episode": lambda r=r, ln=lengths: lfilter_ragged(r, ln, gamma)}
        if "ragged" in nb:
            buf = np.empty_like(r)
            refs["numba"] = lambda r=r, ln=lengths_a, buf=buf: nb["ragged"](r, ln, gamma, buf)
        out.append(
            Case(
                group="ragged returns f32",
                name=f"{s:.0e} steps, len 1..1000",
                run=lambda r=r, ln=lengths_a: rollscan.ragged.discounted_returns(
                    r, ln, gamma=gamma
                ),
                run_out=lambda r=r, ln=lengths_a, o=o: rollscan.ragged.discounted_returns(
                    r, ln, gamma=gamma, out=o
                ),
                refs=refs,
                bytes_moved=s * 8,
                fresh_out_bytes=s * 4,
                target="within 2x of the floor (out=)" if s >= 10**6 else "",
                steps=s,
            )
        )
    s = 10**6 if quick else 10**7
    r = rng.standard_normal(s, dtype=np.float32)
    o = np.empty_like(r)
    one = np.array([s])
    out.append(
        Case(
            group="ragged returns f32",
            name=f"one {s:.0e}-step episode",
            run=lambda r=r: rollscan.ragged.discounted_returns(r, one, gamma=gamma),
            run_out=lambda r=r, o=o: rollscan.ragged.discounted_returns(r, one, gamma=gamma, out=o),
            refs={"scipy lfilter/episode": lambda r=r: lfilter_ragged(r, [s], gamma)},
            bytes_moved=s * 8,
            fresh_out_bytes=s * 4,
            target="no slower per step than many episodes",
            steps=s,
            versus=f"{s:.0e} steps, len 1..1000",
        )
    )
    return out
