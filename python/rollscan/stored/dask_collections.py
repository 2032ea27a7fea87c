"""Returns and advantages of per-step columns held in a Dask collection.

:func:`process_collection` is the entry point for people whose rollouts are
already a Dask collection rather than shard files on disk:

* a ``dask.dataframe.DataFrame`` with one row per step (1-D layout: the
  columns of docs/stored-format.md, with an optional stream-id column), or
* a mapping of column name to ``dask.array.Array``, each ``[T]`` (1-D, with an
  optional stream column) or ``[T, N]`` (time-major, column ``n`` is stream
  ``n``), all with the same length.

Each partition (a DataFrame partition, or a block of rows of the arrays) plays
the part of one shard of the file engines, and the work is theirs:

1. **pass 1** (computed at once): one task per partition validates and
   summarises its chunks; only the small carry summaries come back;
2. **combine** on the client: the sequential right-to-left carry pass and the
   per-episode table, exactly as the local engine does them;
3. **pass 2** (lazy): the returned collection finishes each partition with its
   own incoming carries when it is computed or written.

So a partition is read twice (once now, once when the result is used), no
task holds more than one partition, and when the partitions are the shards of
a file data set the results equal the local engine's bit for bit. With
``normalize=True`` the mean and standard deviation of every advantage are
needed before any output exists: pass 2 is then computed once more up front,
keeping only per-chunk moments, and each partition is read three times.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import carries as cr
from .errors import StoredError
from .io import ColumnInfo
from .process import Moments, check_options, chunk_moments, get_kernels, run_params
from .schema import Dataset, Names, chunk_data, describe_shard


@dataclass
class CollectionResult:
    """What :func:`process_collection` gives back.

    Attributes:
        steps: the lazy per-step result. For a DataFrame input, a DataFrame
            with the input's columns, index and partitions plus the advantage
            (GAE only) and return columns; for a mapping of arrays, a dict of
            the advantage and return arrays, chunked like the input rows.
        episodes: the per-episode table as a dict of NumPy columns (the
            columns of ``episodes.npz``; ``shard`` is the partition index and
            ``first_row`` the row inside that partition).
        n_steps: number of steps in the data.
        n_episodes: number of rows of ``episodes``.
        partition_rows: rows per partition.
    """

    steps: object
    episodes: dict
    n_steps: int
    n_episodes: int
    partition_rows: tuple


class _Fake:
    """Column headers of a collection, in the shape :func:`describe_shard` reads."""

    fmt = "dask"

    def __init__(self, path, columns):
        self.path = path
        self.columns = columns


def _np_dtype(dtype):
    return dtype if isinstance(dtype, np.dtype) else None


def _frame_headers(frame):
    return {str(c): ColumnInfo(str(c), _np_dtype(dt), (0,)) for c, dt in frame.dtypes.items()}


def _array_headers(arrays: dict, names: Names):
    reward = arrays.get(names["reward"])
    cols = {}
    for name, a in arrays.items():
        shape = tuple(a.shape)
        if reward is not None and a.ndim == reward.ndim == 2:
            shape = (0, shape[1])
        elif shape:
            shape = (0, *shape[1:])
        cols[str(name)] = ColumnInfo(str(name), _np_dtype(np.dtype(a.dtype)), shape)
    return cols


def _describe(headers: dict, names: Names, n_parts: int, label: str) -> Dataset:
    d = describe_shard(_Fake(label, headers), names, writing=True)
    present = d["present"]
    if d["width"] == 0:
        raise StoredError("has zero streams", shard=label, column=names["reward"])
    return Dataset(
        paths=tuple(f"partition {i}" for i in range(n_parts)),
        names=names,
        n_rows=(0,) * n_parts,
        width=d["width"],
        has_value=present["value"],
        has_next_value=present["next_value"],
        has_truncated=present["truncated"],
        has_stream=present["stream"],
        dtype=np.dtype(np.float32 if d["float32"] else np.float64),
    )


# ------------------------------------------------------------------------- tasks


def _columns_of(part, known):
    """The known columns of one partition as NumPy arrays (DataFrame or dict of blocks)."""
    if isinstance(part, dict):
        return {k: np.asarray(part[k]) for k in known}
    return {k: part[k].to_numpy() for k in known}


def _rows(arrays, ds):
    return int(np.asarray(arrays[ds.names["reward"]]).shape[0])


def _chunks(ds, index, arrays, chunk_steps, *, need_bootstrap):
    n = _rows(arrays, ds)
    bounds = cr.plan_shard(n, ds.width, chunk_steps)
    for a, b in zip(bounds[:-1], bounds[1:]):
        part = {k: v[a:b] for k, v in arrays.items()}
        yield a, b, chunk_data(ds, index, a, part, need_bootstrap=need_bootstrap)


def summarise_part(part, ds, index, params, kernels, chunk_steps):
    """Pass 1 of one partition: ``(rows, summaries)``, or the StoredError it raised."""
    try:
        arrays = _columns_of(part, [ds.names[k] for k in ds.known()])
        kern = get_kernels(kernels)
        out = [
            cr.summarise_chunk(chunk, params, kern)
            for _, _, chunk in _chunks(ds, index, arrays, chunk_steps, need_bootstrap=True)
        ]
        return _rows(arrays, ds), out
    except StoredError as e:  # returned, so the client can report the first one in data order
        return e


def _finish_arrays(part, ds, index, params, kernels, chunk_steps, carries):
    """Float64 advantages (or None) and returns of one partition, row-major."""
    arrays = _columns_of(part, [ds.names[k] for k in ds.known()])
    kern = get_kernels(kernels)
    advs, rets, moments = [], [], []
    for k, (_, _, chunk) in enumerate(_chunks(ds, index, arrays, chunk_steps, need_bootstrap=True)):
        adv, ret = cr.finish_chunk(chunk, carries[k], params, kern)
        rets.append(ret)
        if adv is not None:
            advs.append(adv)
            moments.append(chunk_moments(adv))
    shape = (_rows(arrays, ds), *((ds.width,) if ds.width else ()))
    ret = np.concatenate(rets).reshape(shape) if rets else np.zeros(shape)
    adv = None
    if params.gae:
        adv = np.concatenate(advs).reshape(shape) if advs else np.zeros(shape)
    return adv, ret, moments


def moments_part(part, ds, index, params, kernels, chunk_steps, carries):
    """Per-chunk ``(count, mean, M2)`` of one partition's raw advantages."""
    return _finish_arrays(part, ds, index, params, kernels, chunk_steps, carries)[2]


def _outputs(part, ds, index, params, kernels, chunk_steps, carries, shift):
    adv, ret, _ = _finish_arrays(part, ds, index, params, kernels, chunk_steps, carries)
    out = {}
    if adv is not None:
        if shift is not None:
            mean, scale = shift
            adv = (adv - mean) / scale
        out[ds.names["advantage"]] = adv.astype(ds.dtype, copy=False)
    out[ds.names["return"]] = ret.astype(ds.dtype, copy=False)
    return out


def finish_frame_part(part, ds, index, params, kernels, chunk_steps, carries, shift):
    """Pass 2 of one DataFrame partition: the partition with the output columns added."""
    return part.assign(**_outputs(part, ds, index, params, kernels, chunk_steps, carries, shift))


def finish_array_part(part, ds, index, params, kernels, chunk_steps, carries, shift, name):
    """Pass 2 of one block of rows: output column ``name``."""
    return _outputs(part, ds, index, params, kernels, chunk_steps, carries, shift)[name]


# ------------------------------------------------------------------------ driver


def _compute(client, items):
    if client is not None:
        return client.gather(client.compute(items))
    import dask

    return list(dask.compute(*items))


def _array_parts(arrays: dict, ds: Dataset):
    """One delayed dict of blocks per row block; the arrays share the reward's row chunks."""
    import dask

    reward = arrays[ds.names["reward"]]
    rows = reward.chunks[0]
    if any(np.isnan(r) for r in rows):
        raise StoredError(
            "has unknown chunk sizes; call compute_chunk_sizes() on the arrays first",
            shard="collection",
            column=ds.names["reward"],
        )
    known = [ds.names[k] for k in ds.known()]
    blocks = {}
    for name in known:
        a = arrays[name]
        if a.shape[0] != reward.shape[0]:
            raise StoredError(
                f"has {a.shape[0]} rows but {ds.names['reward']!r} has {reward.shape[0]}; "
                "every column must have one row per step",
                shard="collection",
                column=name,
            )
        a = a.rechunk({0: rows, **({1: -1} if a.ndim == 2 else {})})
        blocks[name] = a.to_delayed().ravel()
    return [
        dask.delayed(dict)({name: blocks[name][i] for name in known}) for i in range(len(rows))
    ], tuple(int(r) for r in rows)


def process_collection(
    data,
    *,
    gamma,
    lam=None,
    normalize=False,
    eps=1e-8,
    chunk_steps=1 << 20,
    names: Names | None = None,
    kernels="rollscan",
    client=None,
) -> CollectionResult:
    """Returns (and GAE advantages) of a Dask collection of per-step columns.

    With the reward ``r``, value ``V``, next value, terminated and truncated
    columns of docs/stored-format.md, per stream and in row order:

        delta_t = r_t + gamma * V_next(t) - V_t
        A_t     = delta_t + gamma * lam * A_{t+1}     (0 after an episode end)
        G_t     = A_t + V_t  (with a value column), else
        G_t     = r_t + gamma * G_{t+1}

    where ``V_next(t)`` is the value of the stream's next step inside an
    episode, the next value at a truncated step or a stream's last step, and 0
    at a terminated step: the same numbers as ``rollscan process`` on one file
    holding every step, across partition boundaries.

    Args:
        data: a ``dask.dataframe.DataFrame`` (one row per step), or a mapping
            of column name to ``dask.array.Array`` (``[T]`` or ``[T, N]``).
            Rows are in data order; partitions (DataFrame partitions, or the
            reward array's row chunks) play the part of shards.
        gamma, lam, normalize, eps, chunk_steps, names, kernels: as for
            :func:`rollscan.stored.process.process`; ``chunk_steps`` bounds
            the steps summarised at once inside a partition.
        client: a ``distributed.Client`` to compute on; otherwise Dask's
            current scheduler (the default client, if one is set).

    Returns:
        a :class:`CollectionResult`: ``steps`` is lazy (pass 2 runs when it is
        computed or written, e.g. with ``steps.to_parquet(...)``); the
        per-episode table is already computed.

    Raises:
        StoredError: bad options or columns (before any data is read), or a
            bad value in some partition (the first in data order, with the
            partition, column and row inside the partition).
    """
    try:
        import dask
    except ImportError:
        raise StoredError("process_collection needs dask: pip install 'rollscan[dask]'") from None
    names = names or Names()
    check_options(gamma, lam, chunk_steps, flags=False)
    get_kernels(kernels)

    frame = _as_frame(data)
    if frame is not None:
        parts = frame.to_delayed()
        ds = _describe(_frame_headers(frame), names, len(parts), "collection")
    elif isinstance(data, dict) or hasattr(data, "items"):
        arrays = {str(k): v for k, v in data.items()}
        bad = [k for k, v in arrays.items() if not _is_dask_array(v)]
        if bad:
            raise StoredError(
                f"is a {type(arrays[bad[0]]).__name__}, not a dask.array.Array",
                shard="collection",
                column=bad[0],
            )
        if names["reward"] not in arrays:
            have = ", ".join(sorted(arrays)) or "none"
            raise StoredError(
                f"is missing (columns present: {have})", shard="collection", column=names["reward"]
            )
        ds = _describe(_array_headers(arrays, names), names, 0, "collection")
        parts, _ = _array_parts(arrays, ds)
        ds = replace(ds, paths=tuple(f"partition {i}" for i in range(len(parts))))
    else:
        raise StoredError(
            f"data must be a dask DataFrame or a mapping of dask arrays, got {type(data).__name__}"
        )
    params = run_params(ds, gamma, lam, normalize, flags=False)

    # pass 1: small summaries only
    task = dask.delayed(summarise_part, pure=True)
    results = _compute(
        client, [task(p, ds, i, params, kernels, chunk_steps) for i, p in enumerate(parts)]
    )
    for r in results:
        if isinstance(r, BaseException):
            raise r
    rows = tuple(n for n, _ in results)
    ds = replace(ds, n_rows=rows)
    counts = [len(s) for _, s in results]
    summaries = [s for _, shard in results for s in shard]
    del results
    carries = cr.combine(summaries)
    table = cr.episode_table(summaries, params.gamma)
    del summaries
    offsets = np.r_[0, np.cumsum(counts)].astype(int)
    per_part = [carries[offsets[i] : offsets[i + 1]] for i in range(len(parts))]

    shift = None
    if normalize:
        task = dask.delayed(moments_part, pure=True)
        parts_m = _compute(
            client,
            [
                task(p, ds, i, params, kernels, chunk_steps, per_part[i])
                for i, p in enumerate(parts)
            ],
        )
        m = Moments()
        for chunk_parts in parts_m:
            for n, mean, m2 in chunk_parts:
                m.merge(int(n), float(mean), float(m2))
        shift = (m.mean, m.std + eps)

    if frame is not None:
        steps = _frame_result(frame, parts, ds, params, kernels, chunk_steps, per_part, shift)
    else:
        steps = _array_result(parts, ds, params, kernels, chunk_steps, per_part, shift)
    n_steps = sum(rows) * ds.steps_per_row
    return CollectionResult(steps, table, n_steps, len(table["episode"]), rows)


def _frame_result(frame, parts, ds, params, kernels, chunk_steps, per_part, shift):
    import dask
    import dask.dataframe as dd

    new = {}
    if params.gae:
        new[ds.names["advantage"]] = np.zeros(0, dtype=ds.dtype)
    new[ds.names["return"]] = np.zeros(0, dtype=ds.dtype)
    meta = frame._meta.assign(**new)
    task = dask.delayed(finish_frame_part, pure=True)
    out = [
        task(p, ds, i, params, kernels, chunk_steps, per_part[i], shift)
        for i, p in enumerate(parts)
    ]
    return dd.from_delayed(out, meta=meta, divisions=frame.divisions, verify_meta=False)


def _array_result(parts, ds, params, kernels, chunk_steps, per_part, shift):
    import dask
    import dask.array as da

    cols = ([ds.names["advantage"]] if params.gae else []) + [ds.names["return"]]
    task = dask.delayed(finish_array_part, pure=True)
    out = {}
    for name in cols:
        blocks = [
            da.from_delayed(
                task(p, ds, i, params, kernels, chunk_steps, per_part[i], shift, name),
                shape=(ds.n_rows[i], *((ds.width,) if ds.width else ())),
                dtype=ds.dtype,
            )
            for i, p in enumerate(parts)
        ]
        out[name] = (
            da.concatenate(blocks, axis=0)
            if blocks
            else da.zeros((0, *((ds.width,) if ds.width else ())), dtype=ds.dtype)
        )
    return out


def _as_frame(data):
    try:
        import dask.dataframe as dd
    except ImportError:
        return None
    return data if isinstance(data, dd.DataFrame) else None


def _is_dask_array(x) -> bool:
    try:
        import dask.array as da
    except ImportError:
        return False
    return isinstance(x, da.Array)
