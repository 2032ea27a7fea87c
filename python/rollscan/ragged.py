"""Returns and advantages over ragged layouts: pieces stored back to back.

Episodes (or episode pieces) lie end to end in flat 1-D arrays of S steps;
``lengths[e]`` (any integer dtype, summing to S, zeros allowed) gives each
piece's length. ``terminal[e]`` (default all True) says the piece ends in a
terminal state; ``tail_values[e]`` (default 0) is V of the state after a
non-terminal piece. Inside a piece there are no ends.
"""

from __future__ import annotations

from ._core import (
    ragged_discounted_returns as discounted_returns,
)
from ._core import (
    ragged_episode_sums as episode_sums,
)
from ._core import (
    ragged_gae as gae,
)

__all__ = ["discounted_returns", "episode_sums", "gae"]
