"""``rollscan bench --stored``: throughput of ``rollscan process``, local vs Dask, in one run.

Generates (or reuses) a data set of time-major ``[T, 16]`` float64 shards
(reward, value, next value, terminated, truncated; about one episode end per
285 steps, so episodes cross shard boundaries), then processes it with the
local engine and with the Dask engine on local clusters of 1 and 2 worker
processes, and prints steps per second for each. Every run writes all outputs
(the outputs are removed between runs); cluster start-up is timed separately
and not counted in the throughput. The Dask outputs are compared with the
local engine's (max absolute difference printed; float64, expected 0).

    rollscan bench --stored [--steps 50_000_000] [--shards 32] [--dir DIR] [--workers 1,2]

Needs about 70 bytes of disk per step (inputs, one run's outputs).
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import time
from pathlib import Path

import numpy as np

WIDTH = 16


def generate(directory: Path, steps: int, shards: int, seed: int = 0) -> list:
    """Shards ``part-000.npz`` ... of ``steps`` steps in total (kept for later runs)."""
    directory.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    rows = steps // WIDTH
    bounds = np.linspace(0, rows, shards + 1).astype(int)
    paths = []
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        path = directory / f"part-{i:03d}.npz"
        paths.append(str(path))
        if path.exists():
            continue
        shape = (b - a, WIDTH)
        value = rng.normal(size=shape)
        term = rng.random(shape) < 1 / 400
        trunc = (rng.random(shape) < 1 / 1000) & ~term
        tmp = directory / f".part-{i:03d}.tmp.npz"
        np.savez(
            tmp,
            reward=rng.normal(size=shape),
            value=value,
            next_value=np.where(term, 0.0, np.roll(value, -1, axis=0)),
            terminated=term,
            truncated=trunc,
        )
        os.replace(tmp, path)
    return paths


def _max_diff(a_paths, b_paths) -> float:
    worst = 0.0
    for a, b in zip(a_paths, b_paths):
        with np.load(a, allow_pickle=False) as za, np.load(b, allow_pickle=False) as zb:
            for c in ("advantage", "return"):
                worst = max(worst, float(np.max(np.abs(za[c] - zb[c]), initial=0.0)))
    return worst


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="rollscan bench --stored", description=__doc__.split("\n")[0])
    p.add_argument("--steps", type=lambda s: int(s.replace("_", "")), default=50_000_000)
    p.add_argument("--shards", type=int, default=32)
    p.add_argument("--chunk-steps", type=int, default=1 << 20)
    p.add_argument("--workers", default="1,2", help="comma-separated local cluster sizes")
    p.add_argument("--dir", default="rollscan-bench-stored", help="data directory (kept)")
    a = p.parse_args(argv)
    from rollscan.stored.dask_engine import connect
    from rollscan.stored.process import process

    root = Path(a.dir)
    t = time.perf_counter()
    paths = generate(root / "in", a.steps, a.shards)
    steps = (a.steps // WIDTH) * WIDTH
    print(
        f"{steps} steps in {a.shards} shards ({sum(os.path.getsize(x) for x in paths) / 2**30:.2f} "
        f"GiB) ready in {time.perf_counter() - t:.1f}s; {os.cpu_count()} cpus",
        file=sys.stderr,
    )
    kw = dict(gamma=0.99, lam=0.95, chunk_steps=a.chunk_steps)
    rows = []
    out_local = root / "out-local"
    shutil.rmtree(out_local, ignore_errors=True)
    rep = process(paths, out_local, **kw)
    rows.append(("local engine", rep.timings["total"], 0.0, None))
    for n in [int(x) for x in a.workers.split(",")]:
        out = root / f"out-dask-{n}"
        shutil.rmtree(out, ignore_errors=True)
        t = time.perf_counter()
        from rollscan.stored.dask_engine import process_dask

        with connect(workers=n) as client:
            start = time.perf_counter() - t
            rep = process_dask(paths, out, client=client, **kw)
        diff = _max_diff(rep.outputs, [out_local / os.path.basename(x) for x in rep.outputs])
        rows.append((f"dask, {n} local worker{'s' * (n > 1)}", rep.timings["total"], start, diff))
        shutil.rmtree(out)
    shutil.rmtree(out_local)
    print(
        f"{'engine':<24} {'seconds':>8} {'steps/s':>12} {'vs local':>9} {'start-up':>9}  max |diff|"
    )
    base = rows[0][1]
    for name, secs, start, diff in rows:
        d = "-" if diff is None else f"{diff:.1e}"
        print(f"{name:<24} {secs:8.2f} {steps / secs:12.3e} {base / secs:8.2f}x {start:8.2f}s  {d}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
