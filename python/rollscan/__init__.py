"""rollscan: fast, exact post-processing of reinforcement-learning rollouts.

Rust kernels (parallel, GIL released, zero-copy on NumPy arrays) for the
steps between collecting rollouts and taking a policy-gradient step:
discounted returns, GAE advantages with correct bootstraps at time limits,
normalisation, ragged episodes (``rollscan.ragged``), action-head
log-probabilities and entropies, off-policy corrections, running statistics.
"""

from __future__ import annotations

import os as _os

from . import _core, ragged
from ._core import (
    InputError,
    ShapeError,
    SurrogateResult,
    __version__,
    categorical_entropy,
    categorical_kl,
    categorical_log_prob,
    categorical_log_prob_entropy,
    categorical_mode,
    categorical_sample,
    categorical_score,
    clipped_surrogate,
    discounted_returns,
    gae,
    gaussian_entropy,
    gaussian_kl,
    gaussian_log_prob,
    gaussian_log_prob_entropy,
    gaussian_sample,
    gaussian_score,
    get_num_threads,
    normalize,
    set_num_threads,
    squashed_gaussian_log_prob,
    squashed_gaussian_sample,
    vtrace,
)

# Policy-update and off-policy kernels come from _core (above); the running
# statistics are Python classes over core kernels.
from .streaming import EpisodeTracker, FinishedEpisodes, ReturnScaler, RunningMoments

# The worker threads of a parent process do not exist in a forked child:
# start a fresh pool there on first use.
if hasattr(_os, "register_at_fork"):
    _os.register_at_fork(after_in_child=_core._after_fork_in_child)


def _check_thread_setting() -> None:
    """Warn when ROLLSCAN_NUM_THREADS is set but unusable.

    The pool reads it (a whole number >= 1, surrounding spaces and a leading
    ``+`` allowed) and falls back to one thread per CPU otherwise; a typo
    should not pass silently.
    """
    import re
    import warnings

    raw = _os.environ.get("ROLLSCAN_NUM_THREADS")
    if raw is None:
        return
    text = raw.strip()
    if re.fullmatch(r"\+?[0-9]+", text) and 1 <= int(text) < 2**64:
        return
    warnings.warn(
        f"ROLLSCAN_NUM_THREADS={raw!r} is not a whole number >= 1; "
        "using one thread per CPU instead",
        RuntimeWarning,
        stacklevel=3,
    )


_check_thread_setting()

__all__ = [
    "EpisodeTracker",
    "FinishedEpisodes",
    "InputError",
    "ReturnScaler",
    "RunningMoments",
    "ShapeError",
    "SurrogateResult",
    "__version__",
    "categorical_entropy",
    "categorical_kl",
    "categorical_log_prob",
    "categorical_log_prob_entropy",
    "categorical_mode",
    "categorical_sample",
    "categorical_score",
    "clipped_surrogate",
    "discounted_returns",
    "gae",
    "gaussian_entropy",
    "gaussian_kl",
    "gaussian_log_prob",
    "gaussian_log_prob_entropy",
    "gaussian_sample",
    "gaussian_score",
    "get_num_threads",
    "normalize",
    "ragged",
    "set_num_threads",
    "squashed_gaussian_log_prob",
    "squashed_gaussian_sample",
    "vtrace",
]
