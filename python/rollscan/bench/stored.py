"""Benchmark cases of the stored-rollout pipeline's compute path (no disk).

One chunk of the demo scenario (interleaved 1-D rows with a stream id) goes
through pass 1 (summarise) and pass 2 (finish with carries) of
:mod:`rollscan.stored.carries`, on the compiled ragged kernels and on the
NumPy reference kernels.
"""

from __future__ import annotations

import numpy as np

from .harness import Case


def _chunk(n_steps: int):
    from rollscan.stored import demo
    from rollscan.stored.schema import ChunkData

    d = demo.generate(n_steps, n_streams=32, seed=3)
    rng = np.random.default_rng(4)
    T, N = d["reward"].shape
    order = np.argsort(rng.random((T, N)), axis=1)
    rows = np.repeat(np.arange(T), N)
    cols = order.ravel()
    return ChunkData(
        shard=0,
        row0=0,
        width=1,
        reward=d["reward"][rows, cols],
        terminated=d["terminated"][rows, cols],
        truncated=d["truncated"][rows, cols],
        value=d["value"][rows, cols],
        next_value=d["next_value"][rows, cols],
        stream=cols.astype(np.int64),
    )


def _both_passes(chunk, kernels):
    from rollscan.stored import carries as cr

    params = cr.Params(gamma=0.99, lam=0.95)
    summary = cr.summarise_chunk(chunk, params, kernels)
    carry = cr.combine([summary])[0]
    return cr.finish_chunk(chunk, carry, params, kernels)


def cases(quick: bool) -> list:
    import rollscan.ragged as native
    from rollscan.stored import numpy_kernels

    n = 100_000 if quick else 1_000_000
    chunk = _chunk(n)
    bytes_moved = n * (8 * 3 + 2 + 8) + n * 16
    return [
        Case(
            group="stored",
            name=f"summarise + finish one chunk, {n} steps, 32 interleaved streams",
            run=lambda: _both_passes(chunk, native),
            refs={"numpy": lambda: _both_passes(chunk, numpy_kernels)},
            bytes_moved=bytes_moved,
            fresh_out_bytes=n * 16,
        )
    ]
