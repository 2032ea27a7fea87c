"""Type stubs for the compiled module ``rollscan._core`` (hand-written)."""

from typing import Any, Optional, Tuple, Union

import numpy as np
from numpy.typing import ArrayLike, NDArray

__version__: str

_Float = Union[np.float32, np.float64]
_Out = Optional[NDArray[Any]]
_OutPair = Optional[Tuple[NDArray[Any], NDArray[Any]]]

class ShapeError(ValueError): ...
class InputError(ValueError): ...

def set_num_threads(n: int) -> None: ...
def get_num_threads() -> int: ...
def _after_fork_in_child() -> None: ...
def discounted_returns(
    rewards: ArrayLike,
    terminated: Optional[ArrayLike] = None,
    *,
    gamma: float,
    truncated: Optional[ArrayLike] = None,
    next_values: Optional[ArrayLike] = None,
    bootstrap: Optional[ArrayLike] = None,
    time_axis: int = 0,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def gae(
    rewards: ArrayLike,
    values: ArrayLike,
    terminated: Optional[ArrayLike] = None,
    *,
    gamma: float,
    lam: float,
    truncated: Optional[ArrayLike] = None,
    next_values: Optional[ArrayLike] = None,
    bootstrap: Optional[ArrayLike] = None,
    normalize: bool = False,
    eps: float = 1e-08,
    time_axis: int = 0,
    check_finite: bool = True,
    out: _OutPair = None,
) -> Tuple[NDArray[Any], NDArray[Any]]: ...
def normalize(
    x: ArrayLike,
    *,
    eps: float = 1e-08,
    ddof: int = 0,
    mask: Optional[ArrayLike] = None,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
def ragged_discounted_returns(
    rewards: ArrayLike,
    lengths: ArrayLike,
    *,
    gamma: float,
    terminal: Optional[ArrayLike] = None,
    tail_values: Optional[ArrayLike] = None,
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
    terminal: Optional[ArrayLike] = None,
    tail_values: Optional[ArrayLike] = None,
    tail_advantages: Optional[ArrayLike] = None,
    normalize: bool = False,
    eps: float = 1e-08,
    check_finite: bool = True,
    out: _OutPair = None,
) -> Tuple[NDArray[Any], NDArray[Any]]: ...
def ragged_episode_sums(
    x: ArrayLike,
    lengths: ArrayLike,
    *,
    gamma: float = 1.0,
    check_finite: bool = True,
    out: _Out = None,
) -> NDArray[Any]: ...
