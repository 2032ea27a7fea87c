"""Type stubs for the compiled module ``rollscan._core`` (hand-written)."""

from typing import Any, final

import numpy as np
from numpy.typing import ArrayLike, NDArray

__version__: str

_Out = NDArray[Any] | None
_OutPair = tuple[NDArray[Any], NDArray[Any]] | None

class ShapeError(ValueError): ...
class InputError(ValueError): ...

def set_num_threads(n: int) -> None: ...
def get_num_threads() -> int: ...
def _after_fork_in_child() -> None: ...
def _debug_outputs_poisoned() -> bool: ...
def discounted_returns(
    rewards: ArrayLike,
    terminated: ArrayLike | None = None,
    *,
    gamma: float,
    truncated: ArrayLike | None = None,
    next_values: ArrayLike | None = None,
    bootstrap: ArrayLike | None = None,
    time_axis: int = 0,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def gae(
    rewards: ArrayLike,
    values: ArrayLike,
    terminated: ArrayLike | None = None,
    *,
    gamma: float,
    lam: float,
    truncated: ArrayLike | None = None,
    next_values: ArrayLike | None = None,
    bootstrap: ArrayLike | None = None,
    normalize: bool = False,
    eps: float = 1e-08,
    time_axis: int = 0,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
def normalize(
    x: ArrayLike,
    *,
    eps: float = 1e-08,
    ddof: int = 0,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def ragged_discounted_returns(
    rewards: ArrayLike,
    lengths: ArrayLike,
    *,
    gamma: float,
    terminal: ArrayLike | None = None,
    tail_values: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def ragged_gae(
    rewards: ArrayLike,
    values: ArrayLike,
    lengths: ArrayLike,
    *,
    gamma: float,
    lam: float,
    terminal: ArrayLike | None = None,
    tail_values: ArrayLike | None = None,
    tail_advantages: ArrayLike | None = None,
    normalize: bool = False,
    eps: float = 1e-08,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
def ragged_episode_sums(
    x: ArrayLike,
    lengths: ArrayLike,
    *,
    gamma: float = 1.0,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...

# --- Policy-update and off-policy kernels, private kernels of rollscan.streaming

@final
class SurrogateResult:
    @property
    def loss(self) -> float: ...
    @property
    def grad(self) -> NDArray[Any]: ...
    @property
    def clip_fraction(self) -> float: ...
    @property
    def approx_kl(self) -> float: ...
    @property
    def ratio_mean(self) -> float: ...
    @property
    def ratio_max(self) -> float: ...
    @property
    def count(self) -> int: ...

def clipped_surrogate(
    new_log_prob: ArrayLike,
    old_log_prob: ArrayLike,
    advantages: ArrayLike,
    *,
    clip: float = 0.2,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> SurrogateResult: ...
def vtrace(
    behaviour_log_prob: ArrayLike,
    target_log_prob: ArrayLike,
    rewards: ArrayLike,
    values: ArrayLike,
    terminated: ArrayLike | None = None,
    *,
    gamma: float,
    bootstrap: ArrayLike | None = None,
    rho_bar: float = 1.0,
    c_bar: float = 1.0,
    lam: float = 1.0,
    truncated: ArrayLike | None = None,
    next_values: ArrayLike | None = None,
    time_axis: int = 0,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
def _batch_moments(
    batch: ArrayLike, *, check_finite: bool = True
) -> tuple[int, NDArray[np.float64], NDArray[np.float64]]: ...
def _merge_moments(
    count_a: int,
    mean_a: NDArray[np.float64],
    m2_a: NDArray[np.float64],
    count_b: int,
    mean_b: NDArray[np.float64],
    m2_b: NDArray[np.float64],
) -> tuple[int, NDArray[np.float64], NDArray[np.float64]]: ...
def _affine_clip(
    x: ArrayLike,
    shift: NDArray[np.float64],
    scale: NDArray[np.float64],
    *,
    clip: float | None = None,
    out: _Out = None,
) -> NDArray[Any]: ...
def _scale_rewards(
    rewards: ArrayLike,
    terminated: ArrayLike | None,
    truncated: ArrayLike | None,
    returns: NDArray[np.float64],
    count: int,
    mean: float,
    m2: float,
    *,
    gamma: float,
    eps: float,
    clip: float | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> tuple[NDArray[Any], NDArray[np.float64], int, float, float]: ...
def _track_episodes(
    rewards: ArrayLike,
    terminated: ArrayLike | None,
    truncated: ArrayLike | None,
    returns: NDArray[np.float64],
    lengths: NDArray[np.int64],
    *,
    check_finite: bool = True,
) -> tuple[
    NDArray[np.float64],
    NDArray[np.int64],
    NDArray[np.int64],
    NDArray[np.int64],
    NDArray[np.bool_],
    NDArray[np.float64],
    NDArray[np.int64],
]: ...

# Action heads (contract section 4). Batch axes lead; the action axis is last.
def categorical_log_prob(
    logits: ArrayLike,
    actions: ArrayLike,
    *,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def categorical_entropy(
    logits: ArrayLike,
    *,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def categorical_log_prob_entropy(
    logits: ArrayLike,
    actions: ArrayLike,
    *,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
def categorical_kl(
    logits_p: ArrayLike,
    logits_q: ArrayLike,
    *,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def categorical_score(
    logits: ArrayLike,
    actions: ArrayLike,
    *,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def categorical_sample(
    logits: ArrayLike,
    *,
    seed: int,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[np.int64]: ...
def categorical_mode(
    logits: ArrayLike,
    *,
    mask: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[np.int64]: ...
def gaussian_log_prob(
    mean: ArrayLike,
    log_std: ArrayLike,
    actions: ArrayLike,
    *,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def gaussian_entropy(
    log_std: ArrayLike,
    *,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def gaussian_log_prob_entropy(
    mean: ArrayLike,
    log_std: ArrayLike,
    actions: ArrayLike,
    *,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
def gaussian_kl(
    mean_p: ArrayLike,
    log_std_p: ArrayLike,
    mean_q: ArrayLike,
    log_std_q: ArrayLike,
    *,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def gaussian_score(
    mean: ArrayLike,
    log_std: ArrayLike,
    actions: ArrayLike,
    *,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
def gaussian_sample(
    mean: ArrayLike,
    log_std: ArrayLike,
    *,
    seed: int,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def squashed_gaussian_log_prob(
    mean: ArrayLike,
    log_std: ArrayLike,
    actions: ArrayLike,
    *,
    low: ArrayLike = -1.0,
    high: ArrayLike = 1.0,
    pre_squash: ArrayLike | None = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def squashed_gaussian_sample(
    mean: ArrayLike,
    log_std: ArrayLike,
    *,
    seed: int,
    low: ArrayLike = -1.0,
    high: ArrayLike = 1.0,
    check_finite: bool = True,
    out: _OutPair = None,
) -> tuple[NDArray[Any], NDArray[Any]]: ...
