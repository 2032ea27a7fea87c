"""The local engine of ``rollscan process``: two reads per shard, atomic outputs.

Per-shard steps (each touches one shard only, so another engine can run them
as one task per shard):

* :func:`summarise_shard` — pass 1: read and validate the known columns chunk
  by chunk, keep a :class:`~rollscan.stored.carries.ChunkSummary` per chunk;
* :func:`~rollscan.stored.carries.combine` — on the driver, cheap;
* :func:`finish_shard` — pass 2: recompute every chunk with its incoming
  carries and write the output shard under a temporary name.

``--normalize`` needs the mean and standard deviation of every advantage in the
data set, known only once pass 2 has seen them all. Pass 2 therefore stores the
raw advantages (float64) in the temporary output and folds count / mean / M2
per chunk; once every shard is done, each temporary output is rewritten with
``(A - mean) / (std + eps)`` (``.npz``: while the archive is assembled from its
side files, so no extra read at all; ``.parquet``: one read of the temporary
file). Inputs are still read exactly twice.
"""

from __future__ import annotations

import os
import signal
import time
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from . import carries as cr
from .errors import StoredError
from .io import NpzOutput, ParquetOutput, TempFiles, open_shard, write_table
from .schema import Dataset, Names, chunk_data, describe_dataset


def native_kernels():
    """The compiled ragged kernels (``rollscan.ragged``)."""
    from rollscan import ragged

    return ragged


def get_kernels(name: str):
    if name == "numpy":
        from . import numpy_kernels

        return numpy_kernels
    return native_kernels()


def chunk_moments(x: np.ndarray):
    """``(count, mean, M2)`` of one block of values."""
    n = x.size
    if n == 0:
        return 0, 0.0, 0.0
    mean = float(x.mean())
    return n, mean, float(((x - mean) ** 2).sum())


@dataclass
class Moments:
    """count / mean / M2 with the pairwise merge of Chan et al. (1979)."""

    count: int = 0
    mean: float = 0.0
    m2: float = 0.0

    def add(self, x: np.ndarray):
        self.merge(*chunk_moments(x))

    def merge(self, n: int, mean: float, m2: float):
        """Fold in the moments of one more block (in data order, for bit-identical results)."""
        if n == 0:
            return
        total = self.count + n
        delta = mean - self.mean
        self.mean += delta * n / total
        self.m2 += m2 + delta * delta * self.count * n / total
        self.count = total

    @property
    def std(self) -> float:
        return (self.m2 / self.count) ** 0.5 if self.count else 0.0


@dataclass
class Progress:
    """A tqdm bar on stderr, or nothing (quiet, no terminal, or tqdm missing)."""

    total: int
    enabled: bool
    bar: object = None

    def __post_init__(self):
        if self.enabled:
            try:
                from tqdm import tqdm
            except ImportError:
                return
            self.bar = tqdm(total=self.total, unit="chunk", leave=False, dynamic_ncols=True)

    def step(self, what: str):
        if self.bar is not None:
            self.bar.set_description(what, refresh=False)
            self.bar.update(1)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def _known_columns(ds: Dataset):
    return [ds.names[k] for k in ds.known()]


def summarise_shard(
    ds: Dataset, index: int, params, kernels, chunk_steps, *, bootstrap=True, tick=None
):
    """Pass 1 over one shard: validated chunk summaries, in data order."""
    shard = open_shard(ds.paths[index])
    try:
        bounds = cr.plan_shard(ds.n_rows[index], ds.width, chunk_steps)
        out = []
        for a, arrays in zip(bounds, shard.iter_chunks(_known_columns(ds), bounds)):
            chunk = chunk_data(ds, index, a, arrays, need_bootstrap=bootstrap)
            out.append(cr.summarise_chunk(chunk, params, kernels, bootstrap=bootstrap))
            if tick:
                tick(f"read {os.path.basename(ds.paths[index])}")
        return out
    finally:
        shard.close()


def finish_shard(
    ds, index, params, kernels, chunk_steps, carries, temps, stem, moments, *, deferred, tick=None
):
    """Pass 2 over one shard; returns its writer, whose ``finish`` gives the temporary output."""
    shard = open_shard(ds.paths[index])
    names = ds.names
    shape = (ds.n_rows[index],) + ((ds.width,) if ds.width else ())
    new = {names["return"]: shape}
    if params.gae:
        new = {names["advantage"]: shape, **new}
    bounds = cr.plan_shard(ds.n_rows[index], ds.width, chunk_steps)
    if shard.fmt == "npz":
        writer = NpzOutput(shard, new, ds.dtype, temps, stem)
        it = ((a, None) for a in shard.iter_chunks(_known_columns(ds), bounds))
    else:
        writer = ParquetOutput(shard, new, ds.dtype, temps, stem, deferred=deferred)
        it = shard.iter_chunks(_known_columns(ds), bounds, with_table=True)
    try:
        for k, (arrays, table) in enumerate(it):
            chunk = chunk_data(ds, index, bounds[k], arrays, need_bootstrap=True)
            adv, ret = cr.finish_chunk(chunk, carries[k], params, kernels)
            rows = (bounds[k + 1] - bounds[k], *shape[1:])
            cols = {names["return"]: ret.reshape(rows)}
            if adv is not None:
                moments.add(adv)
                cols = {names["advantage"]: adv.reshape(rows), **cols}
            writer.write_chunk(cols, table)
            if tick:
                tick(f"write {os.path.basename(ds.paths[index])}")
        return writer  # owns the shard now: its finish() closes it
    except BaseException:
        shard.close()
        raise


def output_names(paths, out_dir):
    """One output per input, named like it; prefixed by position when names collide."""
    bases = [os.path.basename(p) for p in paths]
    if len(set(bases)) != len(bases) or any(b.startswith("episodes.") for b in bases):
        bases = [f"{i:05d}-{b}" for i, b in enumerate(bases)]
    return [os.path.join(out_dir, b) for b in bases]


@contextmanager
def _uninterruptible():
    """Ignore SIGINT/SIGTERM while the finished outputs are renamed into place.

    Once every output is complete the renames take microseconds; a Ctrl-C then
    would only leave some inputs processed and others not.
    """
    try:
        old = {sig: signal.signal(sig, signal.SIG_IGN) for sig in (signal.SIGINT, signal.SIGTERM)}
    except ValueError:  # not the main thread: signals cannot reach us here anyway
        yield
        return
    try:
        yield
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)


@dataclass
class Report:
    outputs: list
    episodes_path: str
    n_steps: int
    n_episodes: int
    timings: dict = field(default_factory=dict)


@dataclass
class Plan:
    """A checked run: the data set, the parameters and where every output goes."""

    paths: list
    out_dir: str
    ds: Dataset
    params: cr.Params
    outputs: list
    episodes_path: str
    fmt: str


def _opt(name: str, flags: bool) -> str:
    return "--" + name.replace("_", "-") if flags else name


def check_options(gamma, lam, chunk_steps, *, flags=True):
    """Refuse parameters outside their range (named as options, or as arguments)."""
    if not 0.0 <= gamma <= 1.0:
        raise StoredError(f"{_opt('gamma', flags)} must be in [0, 1], got {gamma}")
    if lam is not None and not 0.0 <= lam <= 1.0:
        raise StoredError(f"{_opt('lam', flags)} must be in [0, 1], got {lam}")
    if chunk_steps < 1:
        raise StoredError(f"{_opt('chunk_steps', flags)} must be >= 1, got {chunk_steps}")


def run_params(ds: Dataset, gamma, lam, normalize, *, flags=True) -> cr.Params:
    """The recurrence a data set gets: GAE with a value column, else returns only."""
    if ds.has_value and lam is None:
        raise StoredError(
            f"the data has a value column, so GAE needs {_opt('lam', flags)}",
            column=ds.names["value"],
        )
    if not ds.has_value:
        if normalize:
            raise StoredError(
                f"{_opt('normalize', flags)} needs advantages, i.e. a value column",
                column=ds.names["value"],
            )
        lam = None
    return cr.Params(gamma=float(gamma), lam=None if lam is None else float(lam))


def plan_run(paths, out_dir, *, gamma, lam, normalize, chunk_steps, names: Names) -> Plan:
    """Check the options and every shard's headers; name the outputs (nothing is written).

    Shared by every engine, so they refuse the same inputs with the same messages.
    """
    check_options(gamma, lam, chunk_steps)
    paths = [str(p) for p in paths]
    shards = [open_shard(p) for p in paths]
    try:
        ds = describe_dataset(shards, names, writing=True)
    finally:
        for s in shards:
            s.close()
    params = run_params(ds, gamma, lam, normalize)

    out_dir = os.path.abspath(out_dir)
    outputs = output_names(paths, out_dir)
    fmt = shards[0].fmt
    episodes_path = os.path.join(out_dir, f"episodes.{fmt}")
    inputs = {os.path.realpath(p) for p in paths}
    for target in [*outputs, episodes_path]:
        if os.path.realpath(target) in inputs:
            raise StoredError(f"the output {target} would overwrite an input; choose another --out")
    return Plan(paths, out_dir, ds, params, outputs, episodes_path, fmt)


def process(
    paths,
    out_dir,
    *,
    gamma,
    lam=None,
    normalize=False,
    eps=1e-8,
    chunk_steps=1 << 20,
    names: Names | None = None,
    force=False,
    kernels="rollscan",
    progress=False,
) -> Report:
    """Run ``rollscan process``; raise :class:`StoredError` on bad input (nothing written)."""
    names = names or Names()
    timings = {}
    t0 = time.perf_counter()
    plan = plan_run(
        paths,
        out_dir,
        gamma=gamma,
        lam=lam,
        normalize=normalize,
        chunk_steps=chunk_steps,
        names=names,
    )
    ds, params, outputs, episodes_path = plan.ds, plan.params, plan.outputs, plan.episodes_path
    paths, out_dir, fmt = plan.paths, plan.out_dir, plan.fmt
    kern = get_kernels(kernels)
    for target in [*outputs, episodes_path]:
        if os.path.exists(target) and not force:
            raise StoredError(f"the output {target} exists (use --force to replace it)")
    created = not os.path.isdir(out_dir)
    os.makedirs(out_dir, exist_ok=True)
    timings["open"] = time.perf_counter() - t0

    n_chunks = sum(len(cr.plan_shard(n, ds.width, chunk_steps)) - 1 for n in ds.n_rows)
    bar = Progress(total=2 * n_chunks, enabled=progress)
    temps = TempFiles(out_dir)
    try:
        t = time.perf_counter()
        per_shard = [
            summarise_shard(ds, i, params, kern, chunk_steps, tick=bar.step)
            for i in range(len(paths))
        ]
        timings["pass 1 (read, validate, summarise)"] = time.perf_counter() - t
        t = time.perf_counter()
        chunks_per_shard = [len(shard) for shard in per_shard]
        summaries = [s for shard in per_shard for s in shard]
        del per_shard
        carries = cr.combine(summaries)
        table = cr.episode_table(summaries, params.gamma)
        del summaries  # pass 2 needs only the carries
        # the table is written now, so that it is not held in memory during pass 2
        ep_tmp = temps.new(os.path.basename(episodes_path))
        write_table(ep_tmp, table, fmt, shard_files=paths)
        n_episodes = len(table["episode"])
        del table
        timings["combine carries + episode table"] = time.perf_counter() - t

        t = time.perf_counter()
        moments = Moments()
        finished, writers, k = [], [], 0
        for i, target in enumerate(outputs):
            n = chunks_per_shard[i]
            stem = os.path.basename(target)
            w = finish_shard(
                ds,
                i,
                params,
                kern,
                chunk_steps,
                carries[k : k + n],
                temps,
                stem,
                moments,
                deferred=normalize,
                tick=bar.step,
            )
            k += n
            if normalize:
                writers.append(w)
            else:
                finished.append(w.finish())
        if normalize:
            mean, scale = moments.mean, moments.std + eps
            fn = {names["advantage"]: lambda x: (x - mean) / scale}
            for w in writers:
                finished.append(w.finish(fn))
        timings["pass 2 (compute, write)"] = time.perf_counter() - t
        with _uninterruptible():
            for tmp, target in zip([*finished, ep_tmp], [*outputs, episodes_path]):
                os.replace(tmp, target)
            temps.paths.clear()
    except BaseException:
        temps.cleanup()
        if created and not os.listdir(out_dir):
            os.rmdir(out_dir)
        raise
    finally:
        bar.close()
    timings["total"] = time.perf_counter() - t0
    return Report(outputs, episodes_path, sum(ds.n_rows) * ds.steps_per_row, n_episodes, timings)


def episodes(paths, *, names: Names | None = None, chunk_steps=1 << 20, gamma=1.0, progress=False):
    """The per-episode table of shards, without writing anything (pass 1 only)."""
    names = names or Names()
    shards = [open_shard(str(p)) for p in paths]
    try:
        ds = describe_dataset(shards, names, writing=False)
    finally:
        for s in shards:
            s.close()
    from . import numpy_kernels

    params = cr.Params(gamma=gamma, lam=None)
    try:
        kern = native_kernels()
    except ImportError:  # the summary only needs per-piece sums
        kern = numpy_kernels
    n_chunks = sum(len(cr.plan_shard(n, ds.width, chunk_steps)) - 1 for n in ds.n_rows)
    bar = Progress(total=n_chunks, enabled=progress)
    try:
        summaries = [
            s
            for i in range(len(ds.paths))
            for s in summarise_shard(
                ds, i, params, kern, chunk_steps, bootstrap=False, tick=bar.step
            )
        ]
    finally:
        bar.close()
    return cr.episode_table(summaries, gamma), ds
