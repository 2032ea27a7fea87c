"""Resource use: resident memory stays flat over many calls (contract section 1:
outputs are owned by NumPy, errors never leak their buffers)."""

from __future__ import annotations

import gc

import numpy as np
import pytest
import rollscan
from rollscan import InputError, ShapeError

psutil = pytest.importorskip("psutil")

ragged = rollscan.ragged

ROUNDS = 1_000  # ten kernel calls per round: 10,000 calls
# Each output is 16 KiB ([64, 32] float64), so one kernel leaking its output
# adds >= 16 MiB over the rounds and all of them ~150 MiB; after the warm-up
# the allocator's own noise is well under a MiB.
TOLERANCE_BYTES = 12 * 1024 * 1024


def _rss():
    gc.collect()
    return psutil.Process().memory_info().rss


def _one_round(d, out):
    rollscan.discounted_returns(
        d["r"], d["term"], gamma=0.99, truncated=d["trunc"], next_values=d["nv"]
    )
    rollscan.gae(d["r"], d["v"], d["term"], gamma=0.99, lam=0.95, bootstrap=d["boot"])
    rollscan.gae(d["r32"], d["v"], d["term"], gamma=0.99, lam=0.95, normalize=True)
    rollscan.discounted_returns(d["r"], gamma=0.9, out=out)
    rollscan.normalize(d["r"], mask=d["term"])
    ragged.discounted_returns(d["flat"], d["lengths"], gamma=0.99, terminal=d["terminal"])
    ragged.gae(d["flat"], d["flat"], d["lengths"], gamma=0.99, lam=0.9, tail_values=d["tails"])
    ragged.episode_sums(d["flat"], d["lengths"])
    # error paths must not leak either
    try:
        rollscan.gae(d["r"], d["v"][:-1], gamma=0.9, lam=0.9)
    except ShapeError:
        pass
    try:
        rollscan.discounted_returns(d["bad"], gamma=0.9)
    except InputError:
        pass


@pytest.mark.timeout(300)
def test_rss_flat_over_many_calls(rng):
    t, n = 64, 32
    d = {
        "r": rng.normal(size=(t, n)),
        "v": rng.normal(size=(t, n)),
        "term": rng.random((t, n)) < 0.1,
        "trunc": rng.random((t, n)) < 0.05,
        "nv": rng.normal(size=(t, n)),
        "boot": rng.normal(size=n),
        "flat": rng.normal(size=t * n),
        "lengths": np.full(n, t),
        "terminal": rng.random(n) < 0.5,
        "tails": rng.normal(size=n),
        "bad": np.full((t, n), np.nan),
    }
    d["r32"] = d["r"].astype(np.float32)
    out = np.empty((t, n))
    for _ in range(200):  # warm up: pool threads, allocator arenas
        _one_round(d, out)
    before = _rss()
    for _ in range(ROUNDS):
        _one_round(d, out)
    grown = _rss() - before
    print(f"RSS grew by {grown / 2**20:.2f} MiB")
    assert grown < TOLERANCE_BYTES, f"RSS grew by {grown / 2**20:.1f} MiB over {ROUNDS} rounds"
