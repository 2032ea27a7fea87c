"""rollscan: fast, exact post-processing of reinforcement-learning rollouts.

Every kernel runs in Rust with the GIL released; see ``API.md`` for the
contract (shapes, dtypes, ``out=``, errors, threads).
"""

from __future__ import annotations

from rollscan._core import (
    InputError,
    ShapeError,
    categorical_entropy,
    categorical_kl,
    categorical_log_prob,
    categorical_log_prob_entropy,
    categorical_mode,
    categorical_sample,
    categorical_score,
    gaussian_entropy,
    gaussian_kl,
    gaussian_log_prob,
    gaussian_log_prob_entropy,
    gaussian_sample,
    gaussian_score,
    get_num_threads,
    set_num_threads,
    squashed_gaussian_log_prob,
    squashed_gaussian_sample,
)

__all__ = [
    "InputError",
    "ShapeError",
    "categorical_entropy",
    "categorical_kl",
    "categorical_log_prob",
    "categorical_log_prob_entropy",
    "categorical_mode",
    "categorical_sample",
    "categorical_score",
    "gaussian_entropy",
    "gaussian_kl",
    "gaussian_log_prob",
    "gaussian_log_prob_entropy",
    "gaussian_sample",
    "gaussian_score",
    "get_num_threads",
    "set_num_threads",
    "squashed_gaussian_log_prob",
    "squashed_gaussian_sample",
]
