"""Generated shards and from-the-definition references for the stored-command tests."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np


def make_data(
    rng,
    n_rows,
    *,
    layout="streams",
    width=3,
    p_term=0.08,
    p_trunc=0.05,
    value=True,
    next_value=True,
):
    """Per-step columns of one data set (rows in data order).

    layout: "single" (1-D, one stream), "streams" (1-D with a stream column,
    streams interleaved at random) or "wide" ([T, N] time-major).
    Next values inside episodes are deliberately unrelated to the next step's
    value: the contract reads them only at truncated steps and at a stream's end.
    """
    shape = (n_rows, width) if layout == "wide" else (n_rows,)
    d = {"reward": rng.normal(size=shape)}
    d["terminated"] = rng.random(shape) < p_term
    d["truncated"] = (rng.random(shape) < p_trunc) & ~d["terminated"]
    if value:
        d["value"] = rng.normal(size=shape)
    if next_value:
        d["next_value"] = rng.normal(size=shape)
    if layout == "streams":
        d["stream"] = rng.choice(np.array([4, 9, 2])[:width], size=n_rows).astype(np.int32)
    d["extra"] = rng.integers(0, 1000, size=(n_rows, 2)).astype(np.int16)
    return d


def write_shards(d, directory, cuts, fmt="npz"):
    """Split the rows at ``cuts`` into shards ``s000.npz`` ... (in data order)."""
    os.makedirs(directory, exist_ok=True)
    n = len(d["reward"])
    bounds = [0, *sorted(cuts), n]
    paths = []
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        path = os.path.join(directory, f"s{i:03d}.{fmt}")
        part = {k: v[a:b] for k, v in d.items()}
        if fmt == "npz":
            np.savez(path, **part)
        else:
            import pyarrow as pa
            import pyarrow.parquet as pq

            cols = {}
            for k, v in part.items():
                if v.ndim == 2:
                    cols[k] = pa.FixedSizeListArray.from_arrays(pa.array(v.ravel()), v.shape[1])
                else:
                    cols[k] = pa.array(v)
            pq.write_table(pa.table(cols), path, row_group_size=7)
        paths.append(path)
    return paths


def streams_of(d):
    """Per stream: (id, row-major step indices in time order)."""
    r = d["reward"]
    if r.ndim == 2:
        idx = np.arange(r.size).reshape(r.shape)
        return [(n, idx[:, n]) for n in range(r.shape[1])]
    if "stream" in d:
        return [(s, np.flatnonzero(d["stream"] == s)) for s in np.unique(d["stream"])]
    return [(0, np.arange(len(r)))]


def reference(d, gamma, lam):
    """Advantages and returns from the definitions, one Python step at a time.

    GAE: Schulman et al. 2016, eq. 16, with the episode-end rules of the
    project's contract (terminated -> 0, truncated -> next value, inside an
    episode -> the stream's next value estimate, a stream's last step -> its
    next value, or 0 without that column). Discounted returns without values.
    """
    flat = {k: np.asarray(v).reshape(-1) if k != "extra" else v for k, v in d.items()}
    adv = np.zeros(flat["reward"].size)
    ret = np.zeros(flat["reward"].size)
    for _, idx in streams_of(d):
        a = g = 0.0
        for j in range(len(idx) - 1, -1, -1):
            t = idx[j]
            last = j == len(idx) - 1
            term, trunc = flat["terminated"][t], flat["truncated"][t]
            nv = flat["next_value"][t] if "next_value" in flat else 0.0
            if "value" in flat:
                if term:
                    vp = 0.0
                elif trunc or last:
                    vp = nv
                else:
                    vp = flat["value"][idx[j + 1]]
                cont = 0.0 if (term or trunc or last) else 1.0
                a = flat["reward"][t] + gamma * vp - flat["value"][t] + gamma * lam * cont * a
                adv[t] = a
                ret[t] = a + flat["value"][t]
            else:
                if term:
                    x = 0.0
                elif trunc or last:
                    x = nv
                else:
                    x = g
                g = flat["reward"][t] + gamma * x
                ret[t] = g
    shape = d["reward"].shape
    return adv.reshape(shape), ret.reshape(shape)


def reference_episodes(d, gamma):
    """Episodes per stream, ordered by their first step: dicts from the definition."""
    flat = {k: np.asarray(v).reshape(-1) for k, v in d.items() if k != "extra"}
    width = d["reward"].shape[1] if d["reward"].ndim == 2 else 1
    eps = []
    for s, idx in streams_of(d):
        start = 0
        for j, t in enumerate(idx):
            term, trunc = flat["terminated"][t], flat["truncated"][t]
            if term or trunc or j == len(idx) - 1:
                steps = idx[start : j + 1]
                r = flat["reward"][steps]
                eps.append(
                    {
                        "stream": int(s),
                        "first": int(steps[0]),
                        "row": int(steps[0]) // width,
                        "length": len(steps),
                        "return": float(r.sum()),
                        "discounted_return": float((r * gamma ** np.arange(len(r))).sum()),
                        "ending": "terminated" if term else "truncated" if trunc else "open",
                    }
                )
                start = j + 1
    eps.sort(key=lambda e: e["first"])
    return eps


def load_outputs(paths, columns):
    out = {}
    for c in columns:
        parts = []
        for p in paths:
            if str(p).endswith(".npz"):
                with np.load(p, allow_pickle=False) as z:
                    parts.append(z[c])
            else:
                import pyarrow.parquet as pq

                col = pq.read_table(p, columns=[c]).column(c).combine_chunks()
                if hasattr(col.type, "list_size"):
                    parts.append(col.flatten().to_numpy().reshape(len(col), col.type.list_size))
                else:
                    parts.append(col.to_numpy(zero_copy_only=False))
        out[c] = np.concatenate(parts)
    return out


def command():
    """The installed ``rollscan`` command (or ``python -m rollscan`` when not installed)."""
    script = Path(sys.executable).with_name("rollscan")
    return [str(script)] if script.exists() else [sys.executable, "-m", "rollscan"]


def run(*args, **kw):
    return subprocess.run(
        [*command(), *map(str, args)], capture_output=True, text=True, timeout=120, **kw
    )


def files_in(directory):
    if not os.path.exists(directory):
        return []
    return sorted(os.listdir(directory))
