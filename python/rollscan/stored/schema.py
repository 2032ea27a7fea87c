"""The on-disk schema: which columns a shard holds, and whether their rows are sane.

Header checks (:func:`describe_dataset`) run on every shard before any data is
read; data checks (:func:`chunk_data`) run on every chunk during the first pass,
so a bad value anywhere stops the run before anything is written.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import StoredError

#: Default column names; each has a ``--<key>-column`` option (``_`` -> ``-``).
DEFAULT_NAMES = {
    "reward": "reward",
    "value": "value",
    "next_value": "next_value",
    "terminated": "terminated",
    "truncated": "truncated",
    "stream": "stream",
    "advantage": "advantage",
    "return": "return",
}

_FLOAT_KINDS = "fiub"  # float, signed, unsigned, bool: read as float64
_FLAG_KINDS = "biu"  # bool, or integers holding only 0 and 1


@dataclass(frozen=True)
class Names:
    """Column names in use, and which of them the user named explicitly."""

    names: dict = field(default_factory=lambda: dict(DEFAULT_NAMES))
    explicit: frozenset = frozenset()

    @classmethod
    def from_options(cls, given: dict) -> Names:
        names = dict(DEFAULT_NAMES)
        explicit = set()
        for key, value in given.items():
            if value is not None:
                names[key] = value
                explicit.add(key)
        return cls(names, frozenset(explicit))

    def __getitem__(self, key):
        return self.names[key]


@dataclass(frozen=True)
class Dataset:
    """What every shard of a data set holds (the same in all of them)."""

    paths: tuple
    names: Names
    n_rows: tuple  # rows per shard
    width: int | None  # N for [T, N] shards, None for 1-D shards
    has_value: bool
    has_next_value: bool
    has_truncated: bool
    has_stream: bool
    dtype: np.dtype  # float32 when every float input column is float32, else float64

    @property
    def steps_per_row(self) -> int:
        return self.width or 1

    def known(self) -> list:
        """The columns the pipeline reads (in a fixed order)."""
        keys = ["reward", "terminated"]
        keys += ["value"] if self.has_value else []
        keys += ["next_value"] if self.has_next_value else []
        keys += ["truncated"] if self.has_truncated else []
        keys += ["stream"] if self.has_stream else []
        return keys


def _explain_missing(shard, key, names: Names, cols):
    have = ", ".join(sorted(cols)) or "none"
    option = "--" + key.replace("_", "-") + "-column"
    return StoredError(
        f"is missing (columns present: {have}); name the {key.replace('_', ' ')} column with {option}",
        shard=shard.path,
        column=names[key],
    )


def describe_shard(shard, names: Names, *, writing: bool) -> dict:
    """Header-level checks of one shard; returns what it holds.

    ``writing``: the shard is to get the output columns, which must not exist yet.
    """
    cols = shard.columns
    for key in ("reward", "terminated"):
        if names[key] not in cols:
            raise _explain_missing(shard, key, names, cols)
    for key in ("value", "next_value", "truncated", "stream"):
        if key in names.explicit and names[key] not in cols:
            raise _explain_missing(shard, key, names, cols)
    reward = cols[names["reward"]]
    if len(reward.shape) not in (1, 2):
        raise StoredError(
            f"has shape {reward.shape}; per-step columns are [T] or time-major [T, N]",
            shard=shard.path,
            column=reward.name,
        )
    present = {key: names[key] in cols for key in DEFAULT_NAMES}
    for key in ("reward", "value", "next_value", "terminated", "truncated", "stream"):
        if not present[key]:
            continue
        col = cols[names[key]]
        kinds = {"terminated": _FLAG_KINDS, "truncated": _FLAG_KINDS, "stream": "iu"}.get(
            key, _FLOAT_KINDS
        )
        if col.dtype is None or col.dtype.kind not in kinds:
            want = {
                "terminated": "bool (or 0/1 integers)",
                "truncated": "bool (or 0/1 integers)",
                "stream": "integer",
            }.get(key, "float or integer")
            got = "a non-numeric type" if col.dtype is None else f"dtype {col.dtype}"
            raise StoredError(f"has {got}; expected {want}", shard=shard.path, column=col.name)
        want_shape = reward.shape[:1] if key == "stream" else reward.shape
        if key == "stream" and len(reward.shape) == 2:
            raise StoredError(
                "a stream-id column is only used with 1-D columns; in [T, N] shards column n is stream n",
                shard=shard.path,
                column=col.name,
            )
        if col.shape != want_shape:
            raise _mismatch(shard, col, reward)
    for col in cols.values():
        if not col.shape or col.shape[0] != reward.shape[0]:
            raise _mismatch(shard, col, reward)
    for key in ("advantage", "return") if writing else ():
        if present[key]:
            raise StoredError(
                f"already exists; the output column would replace it (choose another name with --{key}-column)",
                shard=shard.path,
                column=names[key],
            )
    return {
        "n_rows": reward.shape[0],
        "width": reward.shape[1] if len(reward.shape) == 2 else None,
        "present": present,
        "float32": all(
            cols[names[k]].dtype == np.float32
            for k in ("reward", "value", "next_value")
            if present[k]
        ),
    }


def _mismatch(shard, col, reward):
    n = col.shape[0] if col.shape else 0
    return StoredError(
        f"has shape {col.shape} but {reward.name!r} has shape {reward.shape}; "
        "every column must have one row per step",
        shard=shard.path,
        column=col.name,
        step=min(n, reward.shape[0]),
    )


def describe_dataset(shards, names: Names, *, writing: bool) -> Dataset:
    """Check every shard's headers and that all shards agree."""
    if not shards:
        raise StoredError("no input shards given")
    described = [describe_shard(s, names, writing=writing) for s in shards]
    first = described[0]
    for shard, d in zip(shards, described):
        if (d["width"] is None) != (first["width"] is None):
            raise StoredError(
                "mixes 1-D and [T, N] layouts with the first shard",
                shard=shard.path,
                column=names["reward"],
                step=0,
            )
        if d["width"] != first["width"]:
            raise StoredError(
                f"has {d['width']} streams but {shards[0].path} has {first['width']}; "
                "the number of streams must stay the same",
                shard=shard.path,
                column=names["reward"],
                step=0,
            )
        for key in ("value", "next_value", "truncated", "stream"):
            if d["present"][key] != first["present"][key]:
                where, other = (shard.path, shards[0].path)
                has = "has" if d["present"][key] else "lacks"
                raise StoredError(
                    f"{has} this column but {other} does not; every shard must hold the same columns",
                    shard=where,
                    column=names[key],
                )
    present = first["present"]
    width = first["width"]
    if width == 0:
        raise StoredError("has zero streams", shard=shards[0].path, column=names["reward"])
    return Dataset(
        paths=tuple(s.path for s in shards),
        names=names,
        n_rows=tuple(d["n_rows"] for d in described),
        width=width,
        has_value=present["value"],
        has_next_value=present["next_value"],
        has_truncated=present["truncated"],
        has_stream=present["stream"],
        dtype=np.dtype(np.float32 if all(d["float32"] for d in described) else np.float64),
    )


@dataclass
class ChunkData:
    """The known columns of one chunk, flattened row-major (step = row * N + n)."""

    shard: int
    row0: int
    width: int
    reward: np.ndarray
    terminated: np.ndarray
    truncated: np.ndarray
    value: np.ndarray | None
    next_value: np.ndarray | None
    stream: np.ndarray | None

    @property
    def size(self) -> int:
        return self.reward.shape[0]


def chunk_data(ds: Dataset, shard_index: int, row0: int, arrays: dict, *, need_bootstrap: bool):
    """Validate one chunk's rows and convert them (float64 values, bool flags)."""
    path = ds.paths[shard_index]
    names = ds.names
    width = ds.steps_per_row

    def where(flat_index):
        row = row0 + flat_index // width
        return row, (f" (stream {flat_index % width})" if ds.width else "")

    def floats(key):
        x = np.asarray(arrays[names[key]]).astype(np.float64, copy=False).reshape(-1)
        bad = ~np.isfinite(x)
        if bad.any():
            i = int(np.argmax(bad))
            row, extra = where(i)
            raise StoredError(
                f"holds a non-finite value ({x[i]}){extra}", shard=path, column=names[key], step=row
            )
        return x

    def flags(key):
        x = np.asarray(arrays[names[key]]).reshape(-1)
        if x.dtype != bool:
            bad = (x != 0) & (x != 1)
            if bad.any():
                i = int(np.argmax(bad))
                row, extra = where(i)
                raise StoredError(
                    f"holds {x[i]}{extra}; flags must be 0/1 or bool",
                    shard=path,
                    column=names[key],
                    step=row,
                )
            x = x.astype(bool)
        return x

    n = np.asarray(arrays[names["reward"]]).size
    chunk = ChunkData(
        shard=shard_index,
        row0=row0,
        width=width,
        reward=floats("reward"),
        terminated=flags("terminated"),
        truncated=flags("truncated") if ds.has_truncated else np.zeros(n, dtype=bool),
        value=floats("value") if ds.has_value else None,
        next_value=floats("next_value") if ds.has_next_value else None,
        stream=np.asarray(arrays[names["stream"]]).astype(np.int64) if ds.has_stream else None,
    )
    if need_bootstrap and not ds.has_next_value:
        cut = chunk.truncated & ~chunk.terminated
        if cut.any():
            i = int(np.argmax(cut))
            row, extra = where(i)
            raise StoredError(
                f"is True{extra} but there is no next-value column to bootstrap the cut "
                f"episode from (name it with --next-value-column)",
                shard=path,
                column=names["truncated"],
                step=row,
            )
    return chunk
