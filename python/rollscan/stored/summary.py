"""``rollscan summary``: episode statistics of shards or of a per-episode table."""

from __future__ import annotations

import math

import numpy as np

from . import carries as cr
from .io import open_shard, read_table

EPISODE_COLUMNS = ("length", "return", "ending")


def is_episode_table(path: str, names) -> bool:
    shard = open_shard(path)
    try:
        cols = shard.columns
        return all(c in cols for c in EPISODE_COLUMNS) and names["reward"] not in cols
    finally:
        shard.close()


def load_episodes(paths, names, *, chunk_steps=1 << 20, progress=False) -> dict:
    """Episode tables given directly, or computed (pass 1 only) from shards."""
    from .process import episodes

    tables = [p for p in paths if is_episode_table(p, names)]
    if tables and len(tables) != len(paths):
        from .errors import StoredError

        raise StoredError(
            "mixes per-episode tables with step shards; summarise one kind at a time",
            shard=tables[0],
        )
    if tables:
        parts = [read_table(p, list(EPISODE_COLUMNS)) for p in tables]
        return {c: np.concatenate([np.asarray(t[c]) for t in parts]) for c in EPISODE_COLUMNS}
    table, _ = episodes(paths, names=names, chunk_steps=chunk_steps, progress=progress)
    return table


def _stats(x) -> dict:
    x = np.asarray(x, dtype=np.float64)
    if x.size == 0:
        return {k: None for k in ("mean", "std", "min", "median", "max")}
    return {
        "mean": float(x.mean()),
        "std": float(x.std()),
        "min": float(x.min()),
        "median": float(np.median(x)),
        "max": float(x.max()),
    }


def summarise(table: dict) -> dict:
    """Figures of ``rollscan summary --json``.

    Return and length statistics cover the complete episodes (terminated or
    truncated); episodes still open at the end of the data are only counted.
    ``std`` is the population standard deviation.
    """
    ending = np.asarray(table["ending"]).astype(str)
    done = ending != cr.OPEN
    n_term = int(np.count_nonzero(ending == cr.TERMINATED))
    n_trunc = int(np.count_nonzero(ending == cr.TRUNCATED))
    complete = n_term + n_trunc
    return {
        "episodes": len(ending),
        "complete_episodes": complete,
        "open_episodes": len(ending) - complete,
        "steps": int(np.asarray(table["length"], dtype=np.int64).sum()),
        "terminated": n_term,
        "truncated": n_trunc,
        "terminated_share": n_term / complete if complete else None,
        "truncated_share": n_trunc / complete if complete else None,
        "return": _stats(np.asarray(table["return"])[done]),
        "length": _stats(np.asarray(table["length"])[done]),
    }


def _fmt(x) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    return f"{x:.4g}" if isinstance(x, float) else str(x)


def format_text(s: dict) -> str:
    share = (
        f"{100 * s['terminated_share']:.1f}% terminated, {100 * s['truncated_share']:.1f}% truncated"
        if s["complete_episodes"]
        else "no complete episodes"
    )
    lines = [
        f"episodes  {s['episodes']} ({s['complete_episodes']} complete, {s['open_episodes']} open at the end)",
        f"steps     {s['steps']}",
        f"endings   {share}",
        f"{'':9} {'mean':>10} {'std':>10} {'min':>10} {'median':>10} {'max':>10}",
    ]
    for key in ("return", "length"):
        row = s[key]
        lines.append(
            f"{key:9} "
            + " ".join(f"{_fmt(row[k]):>10}" for k in ("mean", "std", "min", "median", "max"))
        )
    return "\n".join(lines)
