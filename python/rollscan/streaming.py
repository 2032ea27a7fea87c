"""Statistics carried across calls: running moments, reward scaling by the
spread of the discounted return, and an episode tracker.

The per-batch work runs in the Rust core (``rollscan._core``); these classes
hold the state (always float64, counts as int64) and a lock, so one object
may be shared by several Python threads: each call sees the state either
before or after another call, never a mix. ``state()`` returns a plain dict of
NumPy arrays (safe for ``np.savez``, no pickling) and ``from_state`` rebuilds
an identical object from it.
"""

from __future__ import annotations

import threading
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import ArrayLike, DTypeLike, NDArray

from . import _core
from ._core import InputError, ShapeError

__all__ = ["EpisodeTracker", "FinishedEpisodes", "ReturnScaler", "RunningMoments"]

_State = dict[str, NDArray[Any]]


def _fmt(shape: tuple[int, ...]) -> str:
    if len(shape) == 1:
        return f"({shape[0]},)"
    return "(" + ", ".join(str(s) for s in shape) + ")"


def _float_dtype(dtype: DTypeLike) -> np.dtype[Any]:
    d = np.dtype(dtype)
    if d not in (np.dtype(np.float32), np.dtype(np.float64)):
        raise TypeError(f"dtype must be float32 or float64, got {d}")
    return d


def _get(state: _State, key: str, owner: str) -> NDArray[Any]:
    try:
        return np.asarray(state[key])
    except KeyError:
        raise InputError(f"state is missing {key!r}: not a {owner}.state() dict") from None


def _num_envs(num_envs: int) -> int:
    n = int(num_envs)
    if n != num_envs or n < 1:
        raise InputError(f"num_envs must be a positive integer, got {num_envs!r}")
    return n


def _streams(name: str, a: ArrayLike | None, num_envs: int, t_len: int | None = None) -> Any:
    """``a`` as a ``[T, num_envs]`` view (a ``[T]`` array when num_envs == 1)."""
    if a is None:
        return None
    arr = np.asarray(a)
    if arr.ndim == 1 and num_envs == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[1] != num_envs or (t_len is not None and arr.shape[0] != t_len):
        want = f"(T, {num_envs})" if t_len is None else f"({t_len}, {num_envs})"
        raise ShapeError(
            f"{name} has shape {_fmt(arr.shape)} but num_envs is {num_envs}; {name} must be {want}"
        )
    return arr


class RunningMoments:
    """Streaming mean and variance of samples of a fixed shape.

    ``update(batch)`` takes a batch ``[B, *shape]`` (batch axis 0), reduces it
    in the Rust core (float64, two-pass per block) and merges it into the
    running state with the pairwise update of Chan, Golub and LeVeque::

        n = na + nb,  d = mean_b - mean_a
        mean = mean_a + d * nb / n
        m2   = m2_a + m2_b + d**2 * na * nb / n,    var = m2 / n

    The result equals ``np.mean`` / ``np.var`` of all batches concatenated
    (population variance) for any split into batches.

    Args:
        shape: the shape of one sample (``()`` for scalars).
        dtype: float32 or float64, the dtype of ``mean`` / ``var`` / ``std``
            and of ``normalize`` results for integer inputs. The state is
            always float64.

    Example:
        >>> import numpy as np, rollscan
        >>> m = rollscan.RunningMoments()
        >>> m.update(np.array([1.0, 2.0])); m.update(np.array([3.0, 4.0]))
        >>> m.count, float(m.mean), float(m.var)
        (4, 2.5, 1.25)
    """

    def __init__(self, shape: int | tuple[int, ...] = (), *, dtype: DTypeLike = np.float64) -> None:
        shp = (shape,) if isinstance(shape, (int, np.integer)) else tuple(shape)
        if any(int(s) != s or s < 0 for s in shp):
            raise InputError(f"shape must be a tuple of non-negative integers, got {shape!r}")
        self._shape: tuple[int, ...] = tuple(int(s) for s in shp)
        self._dtype = _float_dtype(dtype)
        self._count = 0
        self._mean = np.zeros(self._shape, np.float64)
        self._m2 = np.zeros(self._shape, np.float64)
        self._lock = threading.Lock()

    @property
    def shape(self) -> tuple[int, ...]:
        """The shape of one sample."""
        return self._shape

    @property
    def dtype(self) -> np.dtype[Any]:
        """The dtype of the reported statistics."""
        return self._dtype

    def _snapshot(self) -> tuple[int, NDArray[np.float64], NDArray[np.float64]]:
        with self._lock:
            return self._count, self._mean, self._m2

    @property
    def count(self) -> int:
        """Number of samples seen."""
        return self._snapshot()[0]

    @property
    def mean(self) -> NDArray[Any]:
        """Per-entry mean (zeros before any sample)."""
        return self._snapshot()[1].astype(self._dtype)

    @property
    def var(self) -> NDArray[Any]:
        """Per-entry population variance (zeros before any sample)."""
        n, _, m2 = self._snapshot()
        return (m2 / n if n else m2).astype(self._dtype)

    @property
    def std(self) -> NDArray[Any]:
        """Per-entry population standard deviation."""
        n, _, m2 = self._snapshot()
        return np.sqrt(m2 / n if n else m2).astype(self._dtype)

    def update(self, batch: ArrayLike, *, check_finite: bool = True) -> None:
        """Merge a batch ``[B, *shape]`` (batch axis 0) into the statistics.

        Raises:
            ShapeError: ``batch.shape[1:]`` differs from ``shape``.
            InputError: NaN/inf in the batch (when check_finite).
        """
        arr = np.asarray(batch)
        if arr.ndim != len(self._shape) + 1 or arr.shape[1:] != self._shape:
            raise ShapeError(
                f"batch has shape {_fmt(arr.shape)} but the statistics have shape "
                f"{_fmt(self._shape)}; batch must be (B, *shape)"
            )
        n, mean, m2 = _core._batch_moments(arr, check_finite=check_finite)
        with self._lock:
            self._count, self._mean, self._m2 = _core._merge_moments(
                self._count, self._mean, self._m2, n, mean, m2
            )

    def merge(self, other: RunningMoments) -> None:
        """Merge another object's statistics (of the same shape) into this one.

        Raises:
            ShapeError: the shapes differ.
        """
        if not isinstance(other, RunningMoments):
            raise TypeError(f"other must be a RunningMoments, got {type(other).__name__}")
        if other.shape != self._shape:
            raise ShapeError(
                f"other has shape {_fmt(other.shape)} but self has shape {_fmt(self._shape)}; "
                "only statistics of the same shape merge"
            )
        n, mean, m2 = other._snapshot()
        with self._lock:
            self._count, self._mean, self._m2 = _core._merge_moments(
                self._count, self._mean, self._m2, n, mean, m2
            )

    def normalize(
        self,
        x: ArrayLike,
        *,
        clip: float | None = None,
        eps: float = 1e-8,
        out: NDArray[Any] | None = None,
    ) -> NDArray[Any]:
        """``clip((x - mean) / (std + eps), -clip, clip)``, broadcasting the
        statistics over the leading axes of ``x`` (``x.shape`` must end with
        ``shape``). float32/float64 inputs keep their dtype; integer inputs
        give ``dtype``.

        Raises:
            ShapeError: the trailing axes of ``x`` differ from ``shape``.
            InputError: no sample seen yet, ``eps < 0`` or ``clip < 0``.
        """
        arr = np.asarray(x)
        k = len(self._shape)
        if arr.ndim < k or arr.shape[arr.ndim - k :] != self._shape:
            raise ShapeError(
                f"x has shape {_fmt(arr.shape)} but the statistics have shape "
                f"{_fmt(self._shape)}; x must be (..., *shape)"
            )
        if not (np.isfinite(eps) and eps >= 0):
            raise InputError(f"eps must be finite and >= 0, got {eps}")
        n, mean, m2 = self._snapshot()
        if n == 0:
            raise InputError("RunningMoments has seen no samples: update() before normalize()")
        if arr.dtype.kind in "biu":
            arr = arr.astype(self._dtype)
        scale = 1.0 / (np.sqrt(m2 / n) + eps)
        return _core._affine_clip(
            arr,
            np.broadcast_to(mean, arr.shape),
            np.broadcast_to(scale, arr.shape),
            clip=clip,
            out=out,
        )

    def state(self) -> _State:
        """The state as a dict of NumPy arrays (copies): ``count`` (int64),
        ``mean`` and ``sq_dev_sum`` (float64, per entry), ``dtype`` (str)."""
        n, mean, m2 = self._snapshot()
        return {
            "count": np.array(n, np.int64),
            "mean": mean.copy(),
            "sq_dev_sum": m2.copy(),
            "dtype": np.array(self._dtype.name),
        }

    @classmethod
    def from_state(cls, state: _State) -> RunningMoments:
        """Rebuild an object from ``state()`` (also as loaded by ``np.load``).

        Raises:
            InputError: missing keys or inconsistent values.
        """
        mean = _get(state, "mean", "RunningMoments").astype(np.float64)
        m2 = _get(state, "sq_dev_sum", "RunningMoments").astype(np.float64)
        count = _get(state, "count", "RunningMoments")
        dtype = str(_get(state, "dtype", "RunningMoments"))
        if count.shape != () or count.dtype.kind not in "iu" or int(count) < 0:
            raise InputError(f"state['count'] must be a non-negative integer, got {count!r}")
        if m2.shape != mean.shape:
            raise ShapeError(
                f"state['sq_dev_sum'] has shape {_fmt(m2.shape)} but state['mean'] has shape {_fmt(mean.shape)}"
            )
        if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(m2)) and np.all(m2 >= 0)):
            raise InputError("state holds non-finite means or negative squared deviations")
        obj = cls(mean.shape, dtype=dtype)
        obj._count, obj._mean, obj._m2 = int(count), mean.copy(), m2.copy()
        return obj

    def __repr__(self) -> str:
        return f"RunningMoments(shape={self._shape}, count={self.count})"


class ReturnScaler:
    """Scale rewards by the running std of each stream's discounted return.

    Per step t (a row of a time-major chunk ``[T, num_envs]``), per stream m::

        R_m        <- gamma * R_m + r[t, m]
        (the pooled moments of R take in the row R_0 .. R_{num_envs-1})
        scaled[t, m] = clip(r[t, m] / d, -clip, clip)
        d          = std(R) + eps, or 1 while std(R) == 0 (no spread seen yet)
        R_m        <- 0 if terminated[t, m] or truncated[t, m]

    ``std`` is the population std of every running return seen so far, over
    all streams and steps. ``R`` is carried across calls, so any chunking of
    the same steps gives the same result.

    Args:
        num_envs: number of streams.
        gamma: discount of the running return, in [0, 1].
        eps: added to the std (>= 0).
        clip: if given (> 0), scaled rewards are clipped to ``[-clip, clip]``.

    Example:
        >>> import numpy as np, rollscan
        >>> s = rollscan.ReturnScaler(2, gamma=0.9)
        >>> s.scale(np.ones((3, 2)), np.zeros((3, 2), bool)).shape
        (3, 2)
    """

    def __init__(
        self, num_envs: int, *, gamma: float, eps: float = 1e-8, clip: float | None = None
    ) -> None:
        self._n = _num_envs(num_envs)
        if not (np.isfinite(gamma) and 0.0 <= gamma <= 1.0):
            raise InputError(f"gamma must be in [0, 1], got {gamma}")
        if not (np.isfinite(eps) and eps >= 0):
            raise InputError(f"eps must be finite and >= 0, got {eps}")
        if clip is not None and not clip > 0:
            raise InputError(f"clip must be > 0, got {clip}")
        self._gamma, self._eps = float(gamma), float(eps)
        self._clip = None if clip is None else float(clip)
        self._returns = np.zeros(self._n, np.float64)
        self._moments = (0, 0.0, 0.0)
        self._lock = threading.Lock()

    @property
    def num_envs(self) -> int:
        return self._n

    @property
    def gamma(self) -> float:
        return self._gamma

    @property
    def returns(self) -> NDArray[np.float64]:
        """Each stream's running discounted return (a copy)."""
        with self._lock:
            return self._returns.copy()

    @property
    def count(self) -> int:
        """Number of running-return samples seen (steps x streams)."""
        with self._lock:
            return self._moments[0]

    @property
    def std(self) -> float:
        """Population std of the running returns seen so far."""
        with self._lock:
            n, _, m2 = self._moments
        return float(np.sqrt(m2 / n)) if n else 0.0

    def scale(
        self,
        rewards: ArrayLike,
        terminated: ArrayLike | None = None,
        *,
        truncated: ArrayLike | None = None,
        check_finite: bool = True,
        out: NDArray[Any] | None = None,
    ) -> NDArray[Any]:
        """Scaled rewards of a chunk ``[T, num_envs]`` (``[T]`` when num_envs == 1).

        Raises:
            ShapeError: the chunk is not ``(T, num_envs)`` or the flags differ.
            InputError: NaN/inf rewards (when check_finite).
        """
        r = _streams("rewards", rewards, self._n)
        te = _streams("terminated", terminated, self._n, r.shape[0])
        tr = _streams("truncated", truncated, self._n, r.shape[0])
        o = out
        if (
            out is not None
            and np.ndim(rewards) == 1
            and isinstance(out, np.ndarray)
            and out.ndim == 1
        ):
            o = out[:, None]
        with self._lock:
            n, mean, m2 = self._moments
            res, ret, n, mean, m2 = _core._scale_rewards(
                r,
                te,
                tr,
                self._returns,
                n,
                mean,
                m2,
                gamma=self._gamma,
                eps=self._eps,
                clip=self._clip,
                check_finite=check_finite,
                out=o,
            )
            self._returns, self._moments = ret, (n, mean, m2)
        if out is not None:
            return out
        return res[:, 0] if np.ndim(rewards) == 1 else res

    def state(self) -> _State:
        """The state as a dict of NumPy arrays: ``returns`` (float64
        ``[num_envs]``), ``count`` (int64), ``mean`` / ``sq_dev_sum``
        (float64, moments of the running return), and the settings
        ``gamma``, ``eps``, ``clip`` (inf when None)."""
        with self._lock:
            n, mean, m2 = self._moments
            return {
                "returns": self._returns.copy(),
                "count": np.array(n, np.int64),
                "mean": np.array(mean, np.float64),
                "sq_dev_sum": np.array(m2, np.float64),
                "gamma": np.array(self._gamma, np.float64),
                "eps": np.array(self._eps, np.float64),
                "clip": np.array(np.inf if self._clip is None else self._clip, np.float64),
            }

    @classmethod
    def from_state(cls, state: _State) -> ReturnScaler:
        """Rebuild an object from ``state()`` (also as loaded by ``np.load``)."""
        ret = _get(state, "returns", "ReturnScaler").astype(np.float64)
        if ret.ndim != 1 or ret.size == 0:
            raise ShapeError(
                f"state['returns'] has shape {_fmt(ret.shape)}; it must be (num_envs,)"
            )
        clip = float(_get(state, "clip", "ReturnScaler"))
        obj = cls(
            ret.size,
            gamma=float(_get(state, "gamma", "ReturnScaler")),
            eps=float(_get(state, "eps", "ReturnScaler")),
            clip=None if clip == np.inf else clip,
        )
        count = _get(state, "count", "ReturnScaler")
        if count.shape != () or count.dtype.kind not in "iu" or int(count) < 0:
            raise InputError(f"state['count'] must be a non-negative integer, got {count!r}")
        mean = float(_get(state, "mean", "ReturnScaler"))
        m2 = float(_get(state, "sq_dev_sum", "ReturnScaler"))
        if not (np.all(np.isfinite(ret)) and np.isfinite(mean) and np.isfinite(m2) and m2 >= 0):
            raise InputError("state holds non-finite returns or moments")
        obj._returns = ret.copy()
        obj._moments = (int(count), mean, m2)
        return obj

    def __repr__(self) -> str:
        return f"ReturnScaler(num_envs={self._n}, gamma={self._gamma}, count={self.count})"


class FinishedEpisodes(NamedTuple):
    """The episodes that finished inside one chunk, in (step, stream) order."""

    returns: NDArray[np.float64]
    """Undiscounted return (sum of rewards, float64)."""
    lengths: NDArray[np.int64]
    """Number of steps, counting those of earlier chunks."""
    env: NDArray[np.int64]
    """The stream the episode ran in."""
    step: NDArray[np.int64]
    """The row of the chunk holding the episode's last step."""
    terminated: NDArray[np.bool_]
    """True if it ended in a terminal state, False if it was truncated."""


class EpisodeTracker:
    """Returns and lengths of finished episodes, fed time-major chunks.

    Every step adds its reward to its stream's open episode; a step with
    ``terminated`` or ``truncated`` closes it and reports it. Open episodes are
    carried to the next call, so an episode may span any number of chunks.

    Args:
        num_envs: number of streams.

    Example:
        >>> import numpy as np, rollscan
        >>> tr = rollscan.EpisodeTracker(1)
        >>> tr.update(np.array([1.0, 2.0]), np.array([False, False])).returns
        array([], dtype=float64)
        >>> done = tr.update(np.array([3.0]), np.array([True]))
        >>> done.returns, done.lengths
        (array([6.]), array([3]))
    """

    def __init__(self, num_envs: int) -> None:
        self._n = _num_envs(num_envs)
        self._returns = np.zeros(self._n, np.float64)
        self._lengths = np.zeros(self._n, np.int64)
        self._lock = threading.Lock()

    @property
    def num_envs(self) -> int:
        return self._n

    @property
    def open_returns(self) -> NDArray[np.float64]:
        """Reward sums of the episodes still open (a copy)."""
        with self._lock:
            return self._returns.copy()

    @property
    def open_lengths(self) -> NDArray[np.int64]:
        """Steps so far of the episodes still open (a copy)."""
        with self._lock:
            return self._lengths.copy()

    def update(
        self,
        rewards: ArrayLike,
        terminated: ArrayLike | None = None,
        truncated: ArrayLike | None = None,
        *,
        check_finite: bool = True,
    ) -> FinishedEpisodes:
        """Feed a chunk ``[T, num_envs]`` (``[T]`` when num_envs == 1).

        Raises:
            ShapeError: the chunk is not ``(T, num_envs)`` or the flags differ.
            InputError: NaN/inf rewards (when check_finite).
        """
        r = _streams("rewards", rewards, self._n)
        te = _streams("terminated", terminated, self._n, r.shape[0])
        tr = _streams("truncated", truncated, self._n, r.shape[0])
        with self._lock:
            res = _core._track_episodes(
                r, te, tr, self._returns, self._lengths, check_finite=check_finite
            )
            ret, length, env, step, term, self._returns, self._lengths = res
        return FinishedEpisodes(ret, length, env, step, term)

    def state(self) -> _State:
        """The open episodes as a dict of arrays: ``returns`` (float64) and
        ``lengths`` (int64), both ``[num_envs]``."""
        with self._lock:
            return {"returns": self._returns.copy(), "lengths": self._lengths.copy()}

    @classmethod
    def from_state(cls, state: _State) -> EpisodeTracker:
        """Rebuild an object from ``state()``."""
        ret = _get(state, "returns", "EpisodeTracker").astype(np.float64)
        length = _get(state, "lengths", "EpisodeTracker")
        if ret.ndim != 1 or ret.size == 0 or length.shape != ret.shape:
            raise ShapeError(
                f"state['returns'] has shape {_fmt(ret.shape)} and state['lengths'] has shape "
                f"{_fmt(length.shape)}; both must be (num_envs,)"
            )
        if length.dtype.kind not in "iu" or np.any(length < 0) or not np.all(np.isfinite(ret)):
            raise InputError(
                "state['lengths'] must be non-negative integers and state['returns'] finite"
            )
        obj = cls(ret.size)
        obj._returns, obj._lengths = ret.copy(), length.astype(np.int64)
        return obj

    def __repr__(self) -> str:
        return f"EpisodeTracker(num_envs={self._n})"
