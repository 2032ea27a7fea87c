"""Type stubs for the compiled module ``rollscan._core`` (hand-written)."""

from typing import Any

from numpy.typing import ArrayLike, NDArray

__version__: str

_Out = NDArray[Any] | None
_OutPair = tuple[NDArray[Any], NDArray[Any]] | None

class ShapeError(ValueError): ...
class InputError(ValueError): ...

def set_num_threads(n: int) -> None: ...
def get_num_threads() -> int: ...
def _after_fork_in_child() -> None: ...
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
