"""Benchmark harness: time rollscan and its references side by side, in one run.

Every case is timed in the same process, on the same data, interleaved with
its references, so the ratios are meaningful even on a noisy shared machine.
The *memory floor* of a case is the bytes the kernel must read and write
divided by the copy bandwidth NumPy reaches in this run; ``x floor`` is
rollscan's time as a multiple of that floor. Cases that allocate fresh outputs
also get the cost of first-touching that much new memory (measured by filling
a new array of the output size), since no kernel can avoid it.
"""

from __future__ import annotations

import argparse
import gc
import importlib
import json
import os
import platform
import statistics
import sys
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

#: Modules of this package that contribute cases, in print order.
MODULES = ("core", "heads", "policy", "stored")


@dataclass
class Case:
    """One benchmark case: a rollscan call and the references it is compared to.

    Attributes:
        group: table section (for example ``"gae f32"``).
        name: the size or variant (for example ``"(2048, 64)"``).
        run: the rollscan call, allocating its outputs.
        refs: reference name -> callable computing the same result.
        bytes_moved: bytes the kernel must read and write (memory floor).
        fresh_out_bytes: bytes of outputs ``run`` allocates.
        run_out: the same rollscan call writing into preallocated ``out=``.
        target: a one-line statement of the speed target, printed as is.
        steps: steps the call covers (for per-step comparisons).
        versus: name of another case of the same group to compare per step
            with: both are timed again, alternately, and the report gives
            this case's time per step as a multiple of that one's.
    """

    group: str
    name: str
    run: Callable[[], object]
    refs: dict[str, Callable[[], object]] = field(default_factory=dict)
    bytes_moved: int = 0
    fresh_out_bytes: int = 0
    run_out: Callable[[], object] | None = None
    target: str = ""
    steps: int = 0
    versus: str = ""


def time_call(fn: Callable[[], object], budget: float, max_reps: int = 200) -> float:
    """Median wall time of ``fn`` in seconds over repeats within ``budget``."""
    gc.collect()
    fn()  # warm-up: page in, build caches
    times = []
    start = time.perf_counter()
    while len(times) < max_reps:
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
        if time.perf_counter() - start > budget and len(times) >= 3:
            break
    return statistics.median(times)


def time_small(fn: Callable[[], object], budget: float) -> float:
    """Per-call time of a microsecond-scale call: batches of calls, median."""
    fn()
    n = 1
    while True:
        t0 = time.perf_counter()
        for _ in range(n):
            fn()
        dt = time.perf_counter() - t0
        if dt > 0.01:
            break
        n *= 4
    reps = []
    start = time.perf_counter()
    while time.perf_counter() - start < budget or len(reps) < 5:
        t0 = time.perf_counter()
        for _ in range(n):
            fn()
        reps.append((time.perf_counter() - t0) / n)
    return statistics.median(reps)


def time_alternating(
    a: Callable[[], object], b: Callable[[], object], budget: float, max_reps: int = 200
) -> tuple[float, float]:
    """Median wall times of ``a`` and ``b``, called in turn so that a machine
    whose speed drifts during the run slows both alike."""
    gc.collect()
    a()
    b()
    ta: list[float] = []
    tb: list[float] = []
    start = time.perf_counter()
    while len(ta) < max_reps:
        for fn, ts in ((a, ta), (b, tb)):
            t0 = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t0)
        if time.perf_counter() - start > budget and len(ta) >= 5:
            break
    return statistics.median(ta), statistics.median(tb)


def copy_bandwidth(nbytes: int, budget: float) -> float:
    """Bytes per second NumPy moves in a large copy (read + write counted)."""
    src = np.ones(nbytes // 8)
    dst = np.empty_like(src)
    t = time_call(lambda: np.copyto(dst, src), budget)
    return 2 * src.nbytes / t


def first_touch_rate(nbytes: int, budget: float) -> float:
    """Bytes per second of creating and filling a fresh array (page faults)."""
    n = nbytes // 4
    t = time_call(lambda: np.full(n, 1.0, dtype=np.float32), budget)
    return n * 4 / t


def _fmt_t(s: float | None) -> str:
    if s is None:
        return "-"
    if s < 1e-3:
        return f"{s * 1e6:.1f} us"
    if s < 1:
        return f"{s * 1e3:.2f} ms"
    return f"{s:.2f} s"


def collect(quick: bool, only: str | None) -> list[Case]:
    cases: list[Case] = []
    for mod in MODULES:
        if only and only != mod:
            continue
        try:
            m = importlib.import_module(f"rollscan.bench.{mod}")
        except ModuleNotFoundError as e:
            if e.name == f"rollscan.bench.{mod}":
                continue
            raise
        cases.extend(m.cases(quick))
    return cases


def run_cases(cases: list[Case], quick: bool) -> dict:
    import rollscan

    budget = 0.3 if quick else 1.0
    bw = copy_bandwidth((64 if quick else 256) << 20, budget)
    rows = []
    for c in cases:
        small = c.bytes_moved and c.bytes_moved < (1 << 20)
        timer = time_small if small else time_call
        t = timer(c.run, budget)
        row: dict = {
            "group": c.group,
            "case": c.name,
            "rollscan_s": t,
            "refs": {},
            "target": c.target,
        }
        for name, ref in c.refs.items():
            rt = timer(ref, budget)
            row["refs"][name] = {"s": rt, "ratio": rt / t}
        if c.run_out is not None:
            row["rollscan_out_s"] = timer(c.run_out, budget)
        if c.bytes_moved:
            floor = c.bytes_moved / bw
            row["floor_s"] = floor
            row["x_floor"] = t / floor
            if c.run_out is not None:
                row["x_floor_out"] = row["rollscan_out_s"] / floor
            if c.fresh_out_bytes:
                touch = c.fresh_out_bytes / first_touch_rate(c.fresh_out_bytes, budget / 3)
                row["floor_fresh_s"] = floor + touch
                row["x_floor_fresh"] = t / (floor + touch)
        if c.versus:
            row["versus"] = _versus(c, cases, budget)
        rows.append(row)
        print(_fmt_row(row), file=sys.stderr, flush=True)
    return {
        "machine": {
            "platform": platform.platform(),
            "processor": platform.processor() or platform.machine(),
            "cpus": os.cpu_count(),
            "threads": rollscan.get_num_threads(),
            "numpy": np.__version__,
            "rollscan": rollscan.__version__,
            "copy_bandwidth_GBps": bw / 1e9,
        },
        "rows": rows,
    }


def _versus(c: Case, cases: list[Case], budget: float) -> dict:
    """``c``'s time per step as a multiple of the case it names, both timed
    alternately (with ``out=`` where both have it)."""
    other = next((o for o in cases if o.group == c.group and o.name == c.versus), None)
    if other is None or not c.steps or not other.steps:
        raise ValueError(f"bench case {c.group}/{c.name}: no case {c.versus!r} with steps")
    out = c.run_out is not None and other.run_out is not None
    fa = c.run_out if out else c.run
    fb = other.run_out if out else other.run
    ta, tb = time_alternating(fa, fb, 2 * budget)
    return {
        "case": other.name,
        "out": out,
        "s": ta,
        "other_s": tb,
        "ratio": (ta / c.steps) / (tb / other.steps),
    }


def _fmt_row(r: dict) -> str:
    parts = [f"{r['group']:<28} {r['case']:<22} rollscan {_fmt_t(r['rollscan_s']):>10}"]
    if "rollscan_out_s" in r:
        parts.append(f"(out= {_fmt_t(r['rollscan_out_s'])})")
    for name, ref in r["refs"].items():
        parts.append(f"| {name} {_fmt_t(ref['s'])} = {ref['ratio']:.1f}x")
    if "x_floor" in r:
        s = f"| floor {_fmt_t(r['floor_s'])}: {r['x_floor']:.2f}x"
        if "x_floor_out" in r:
            s += f", out= {r['x_floor_out']:.2f}x"
        if "x_floor_fresh" in r:
            s += f", vs floor+first-touch {r['x_floor_fresh']:.2f}x"
        parts.append(s)
    if "versus" in r:
        v = r["versus"]
        parts.append(
            f"| per step vs {v['case']}{' (out=)' if v['out'] else ''}, "
            f"timed in turn: {v['ratio']:.2f}x"
        )
    return " ".join(parts)


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``rollscan bench``; returns the exit status."""
    p = argparse.ArgumentParser(
        prog="rollscan bench",
        description="Time rollscan against NumPy/SciPy references in one run "
        "(ratios = reference time / rollscan time; floor = bytes moved / copy bandwidth).",
    )
    p.add_argument("--quick", action="store_true", help="small sizes and short timing budgets")
    p.add_argument("--json", action="store_true", help="print machine-readable JSON on stdout")
    p.add_argument("--only", choices=MODULES, help="run one group of cases")
    p.add_argument(
        "--stored",
        action="store_true",
        help="instead: steps/s of `rollscan process` on >= 5*10^7 steps, local engine vs "
        "Dask with 1 and 2 local workers (rollscan.bench.scaleout; remaining options go there)",
    )
    a, rest = p.parse_known_args(argv)
    if a.stored:
        from .scaleout import main as scaleout

        return scaleout(rest)
    if rest:
        p.error(f"unrecognized arguments: {' '.join(rest)}")
    import rollscan

    print(
        f"rollscan {rollscan.__version__} bench on {os.cpu_count()} cpus, "
        f"{rollscan.get_num_threads()} threads{' (quick)' if a.quick else ''}",
        file=sys.stderr,
    )
    res = run_cases(collect(a.quick, a.only), a.quick)
    m = res["machine"]
    print(f"copy bandwidth {m['copy_bandwidth_GBps']:.1f} GB/s", file=sys.stderr)
    if a.json:
        json.dump(res, sys.stdout, indent=2)
        print()
    else:
        for r in res["rows"]:
            print(_fmt_row(r))
            if r.get("target"):
                print(f"    target: {r['target']}")
    return 0
