"""``rollscan demo``: a generated data set, processed and summarised end to end.

The scenario: a fleet of underwater drones tends kelp lines. Each drone is a
stream; per step it harvests kelp (reward grows with the line's health) and
spends battery. An episode ends *terminated* when the battery runs flat and the
drone is stranded (a penalty), or *truncated* when the tide shift ends after
``SHIFT`` steps while the drone still works. A critic's value estimate and the
next state's value are stored with every step. Drones report asynchronously,
so the shards hold 1-D columns with a stream-id column and rows of different
drones interleaved; every drone continues across all shards.
"""

from __future__ import annotations

import json
import os
import shutil
import time

import numpy as np

from .errors import StoredError

SHIFT = 300
MARKER = ".rollscan-demo"


def _critic(battery, health, age, efficiency):
    """A plausible (not exact) value estimate of a drone's state."""
    steps_left = np.minimum(battery / (0.0032 * efficiency), SHIFT - age)
    stranded = battery / (0.0032 * efficiency) < SHIFT - age
    return 0.9 * health * (1.0 - 0.985**steps_left) / 0.015 * 0.08 - 3.0 * stranded


def generate(n_steps=1_000_000, n_streams=32, seed=7):
    """Time-major ``[T, N]`` arrays of the scenario, one drone shift at a time.

    The fleet's firmware improves over the recording (drones drain less battery
    later on), so returns drift upwards in data order.
    """
    rng = np.random.default_rng(seed)
    T = max(1, n_steps // n_streams)
    shape = (T, n_streams)
    out = {k: np.empty(shape) for k in ("reward", "value", "next_value")}
    out["terminated"] = np.zeros(shape, dtype=bool)
    out["truncated"] = np.zeros(shape, dtype=bool)
    for n in range(n_streams):
        t, age0 = 0, int(rng.integers(0, SHIFT))  # drones start mid-shift
        while t < T:
            steps = min(SHIFT - age0, T - t)
            efficiency = rng.uniform(0.7, 1.6) * (1.0 - 0.35 * t / T)
            spent = rng.gamma(2.0, 0.0016, steps) * efficiency
            battery = rng.uniform(0.55, 1.0) - np.cumsum(spent)  # after each step
            health = np.clip(rng.uniform(0.2, 1.0) + np.cumsum(rng.normal(0, 0.03, steps)), 0, 1)
            flat = np.flatnonzero(battery <= 0.0)
            length = int(flat[0]) + 1 if flat.size else steps
            rows = slice(t, t + length)
            age = age0 + np.arange(length + 1, dtype=np.float64)
            b = np.r_[battery[0] + spent[0], battery[:length]]  # before, then after each step
            h = np.r_[health[0], health[:length]]
            crit = _critic(b, h, age, efficiency)
            term = flat.size > 0
            harvest = health[:length] * rng.uniform(0.4, 1.6, length) * 0.08
            out["reward"][rows, n] = harvest - 0.2 * spent[:length]
            out["value"][rows, n] = crit[:-1]
            out["next_value"][rows, n] = crit[1:]
            if term:
                out["reward"][t + length - 1, n] -= 5.0
                out["next_value"][t + length - 1, n] = 0.0
                out["terminated"][t + length - 1, n] = True
            elif age0 + length == SHIFT:
                out["truncated"][t + length - 1, n] = True
            t, age0 = t + length, 0
    out["depth"] = 4.0 + 0.5 * np.clip(out["value"], -1.0, 6.0) + rng.normal(0, 0.1, shape)
    return out


def write_shards(data, directory, n_shards=8, seed=11):
    """Interleave the drones' rows (random order within each time step) into 1-D shards."""
    rng = np.random.default_rng(seed)
    T, N = data["reward"].shape
    os.makedirs(directory, exist_ok=True)
    paths = []
    bounds = np.linspace(0, T, n_shards + 1).astype(int)
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        perm = np.argsort(rng.random((b - a, N)), axis=1)
        rows = np.repeat(np.arange(a, b), N)
        cols = perm.ravel()
        shard = {k: v[rows, cols] for k, v in data.items()}
        shard["depth"] = shard["depth"].astype(np.float32)
        shard["stream"] = cols.astype(np.int32)
        shard["tide_step"] = rows.astype(np.int64)
        path = os.path.join(directory, f"kelp-{i:02d}.npz")
        np.savez(path, **shard)
        paths.append(path)
    return paths


def _prepare(out):
    if os.path.exists(out):
        if not os.path.isdir(out):
            raise StoredError(f"--out {out} exists and is not a directory")
        if os.listdir(out) and not os.path.exists(os.path.join(out, MARKER)):
            raise StoredError(f"--out {out} is a non-empty directory the demo did not create")
        shutil.rmtree(out)
    os.makedirs(out)
    open(os.path.join(out, MARKER), "w").close()


def run(
    out="rollscan-demo", *, n_steps=1_000_000, chunk_steps=1 << 18, kernels="rollscan", echo=print
):
    from .plot import plot
    from .process import process
    from .schema import Names
    from .summary import format_text, load_episodes, summarise

    gamma, lam = 0.99, 0.95
    out = os.path.abspath(out)
    _prepare(out)
    timings = {}
    t = time.perf_counter()
    data = generate(n_steps)
    shards = write_shards(data, os.path.join(out, "shards"))
    del data
    timings["generate 8 shards"] = time.perf_counter() - t
    rep = process(
        shards,
        os.path.join(out, "processed"),
        gamma=gamma,
        lam=lam,
        chunk_steps=chunk_steps,
        kernels=kernels,
    )
    ref = process(
        shards,
        os.path.join(out, "reference"),
        gamma=gamma,
        lam=lam,
        chunk_steps=chunk_steps,
        kernels="numpy",
    )
    diff = 0.0
    for a, b in zip(rep.outputs, ref.outputs):
        with np.load(a, allow_pickle=False) as x, np.load(b, allow_pickle=False) as y:
            for col in ("advantage", "return"):
                diff = max(diff, float(np.abs(x[col] - y[col]).max()))
    t = time.perf_counter()
    table = load_episodes([rep.episodes_path], Names())
    stats = summarise(table)
    with open(os.path.join(out, "summary.json"), "w") as f:
        json.dump(stats, f, indent=2)
    timings["summary"] = time.perf_counter() - t
    t = time.perf_counter()
    png = plot(table, os.path.join(out, "summary.png"))
    timings["plot"] = time.perf_counter() - t

    echo(format_text(stats))
    echo("")
    echo(
        f"{rep.n_steps} steps in {len(shards)} shards, {rep.n_episodes} episodes, gamma={gamma} lam={lam}"
    )
    echo(f"  input shards      {os.path.dirname(shards[0])}/")
    echo(f"  processed shards  {os.path.dirname(rep.outputs[0])}/  (+ advantage, return)")
    echo(f"  episode table     {rep.episodes_path}")
    echo(f"  summary           {os.path.join(out, 'summary.json')}")
    echo(f"  plot              {png}")
    echo(f"  NumPy reference   {os.path.dirname(ref.outputs[0])}/  (max |difference| {diff:.2e})")
    echo("")
    echo(f"{'stage':44} {'rollscan':>10} {'NumPy ref':>10}")
    for stage, seconds in timings.items():
        if stage.startswith("generate"):
            echo(f"{stage:44} {seconds:>9.2f}s")
    for stage, seconds in rep.timings.items():
        echo(
            f"{'process: ' + stage:44} {seconds:>9.2f}s {ref.timings.get(stage, float('nan')):>9.2f}s"
        )
    for stage in ("summary", "plot"):
        echo(f"{stage:44} {timings[stage]:>9.2f}s")
    return {"process": rep, "reference": ref, "max_difference": diff, "summary": stats, "plot": png}
