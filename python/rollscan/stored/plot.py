"""``rollscan summary --plot``: return distribution and returns in data order (matplotlib)."""

from __future__ import annotations

import os

import numpy as np

from . import carries as cr
from .errors import StoredError


def rolling_mean(x: np.ndarray, window: int) -> np.ndarray:
    """Mean of the last ``window`` values (fewer at the start)."""
    c = np.cumsum(np.r_[0.0, np.asarray(x, dtype=np.float64)])
    n = np.arange(1, len(x) + 1)
    lo = np.maximum(0, n - window)
    return (c[n] - c[lo]) / (n - lo)


def plot(table: dict, path: str, *, inputs=()):
    """Write a PNG (written to a temporary name, then renamed)."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise StoredError("--plot needs matplotlib: pip install 'rollscan[plot]'") from None
    path = os.path.abspath(path)
    if os.path.realpath(path) in {os.path.realpath(p) for p in inputs}:
        raise StoredError(f"the plot {path} would overwrite an input")
    ending = np.asarray(table["ending"]).astype(str)
    ret = np.asarray(table["return"], dtype=np.float64)[ending != cr.OPEN]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4), dpi=100)
    if ret.size:
        ax1.hist(ret, bins=min(60, max(5, ret.size // 10)), color="#3b7dd8", edgecolor="white")
        window = max(1, min(200, ret.size // 25))
        ax2.plot(np.arange(ret.size), ret, ".", ms=2, alpha=0.35, color="#888888", label="episode")
        ax2.plot(
            rolling_mean(ret, window), color="#d8553b", lw=1.8, label=f"rolling mean ({window})"
        )
        ax2.legend(loc="best", fontsize=8)
    else:
        for ax in (ax1, ax2):
            ax.text(0.5, 0.5, "no complete episodes", ha="center", va="center")
    ax1.set(title="Return distribution", xlabel="episode return", ylabel="episodes")
    ax2.set(title="Return per episode, in data order", xlabel="episode", ylabel="return")
    fig.tight_layout()
    directory = os.path.dirname(path) or "."
    os.makedirs(directory, exist_ok=True)
    tmp = os.path.join(directory, f".{os.path.basename(path)}.rollscan-tmp-{os.getpid()}")
    try:
        fig.savefig(tmp, format="png")
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise
    finally:
        plt.close(fig)
    return path
