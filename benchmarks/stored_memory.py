"""Peak memory of ``rollscan process`` against data size and chunk size.

Generates time-major ``[T, 16]`` float64 shards (reward, value, next_value,
terminated, truncated) of the requested total size, then runs the installed
command on them once per chunk size under ``/usr/bin/time -v`` (or, when that
is missing, a wrapper reading ``resource.getrusage(RUSAGE_CHILDREN)``) and
prints the peak resident set size. The claim being checked: peak RSS follows
``--chunk-steps``, not the data size.

    python benchmarks/stored_memory.py --steps 100_000_000 --chunks 100_000,1_000_000

Needs about 70 bytes of disk per step (inputs, outputs with their copied
columns). Not a test: run it by hand, it takes minutes at 10^8 steps.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

WIDTH = 16


def generate(directory: Path, steps: int, shards: int, seed: int = 0) -> list:
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
        np.savez(
            path,
            reward=rng.normal(size=shape),
            value=value,
            next_value=np.where(term, 0.0, np.roll(value, -1, axis=0)),
            terminated=term,
            truncated=trunc,
        )
    return paths


def command():
    script = Path(sys.executable).with_name("rollscan")
    return [str(script)] if script.exists() else [sys.executable, "-m", "rollscan"]


def peak_rss(args) -> tuple:
    """(peak RSS in MiB, wall seconds) of one run of the command."""
    t = time.perf_counter()
    if Path("/usr/bin/time").exists():
        p = subprocess.run(["/usr/bin/time", "-v", *args], capture_output=True, text=True)
        if p.returncode != 0:
            raise SystemExit(p.stderr)
        kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", p.stderr).group(1))
    else:
        code = (
            "import resource, subprocess, sys; "
            "r = subprocess.run(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss); sys.exit(r.returncode)"
        )
        p = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True)
        if p.returncode != 0:
            raise SystemExit(p.stderr)
        kb = int(p.stdout.strip().splitlines()[-1])
    return kb / 1024, time.perf_counter() - t


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=lambda s: int(float(s.replace("_", ""))), default=10**8)
    ap.add_argument("--shards", type=int, default=10)
    ap.add_argument("--chunks", default="100000,1000000")
    ap.add_argument("--dir", default="/tmp/rollscan-memory-bench")
    ap.add_argument("--keep", action="store_true", help="keep the generated data")
    args = ap.parse_args(argv)
    root = Path(args.dir)
    t = time.perf_counter()
    paths = generate(root / f"in-{args.steps}", args.steps, args.shards)
    gen = time.perf_counter() - t
    data_bytes = sum(os.path.getsize(p) for p in paths)
    print(
        f"data: {args.steps:.3g} steps in {len(paths)} shards, {data_bytes / 2**30:.2f} GiB "
        f"(generated in {gen:.0f}s)"
    )
    print(f"{'chunk steps':>12} {'peak RSS MiB':>13} {'wall s':>8} {'Msteps/s':>9}")
    for chunk in (int(c) for c in args.chunks.split(",")):
        out = root / "out"
        shutil.rmtree(out, ignore_errors=True)
        rss, wall = peak_rss(
            [
                *command(),
                "process",
                *paths,
                "--out",
                str(out),
                "--gamma",
                "0.99",
                "--lam",
                "0.95",
                "--chunk-steps",
                str(chunk),
                "--quiet",
            ]
        )
        print(f"{chunk:>12} {rss:>13.0f} {wall:>8.1f} {args.steps / wall / 1e6:>9.2f}", flush=True)
        shutil.rmtree(out, ignore_errors=True)
    if not args.keep:
        shutil.rmtree(root / f"in-{args.steps}", ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
