"""The Dask engine of ``rollscan process``: one task per shard, exact across shards.

The work is the local engine's, split at shard boundaries:

1. **pass 1**: one task per shard runs :func:`~rollscan.stored.process.summarise_shard`
   (read 1: validate, summarise every chunk). Only the small chunk summaries
   (per chunk and stream: the carry record; per episode piece: length and sums)
   come back to the client.
2. **combine** on the client: :func:`~rollscan.stored.carries.combine` (one
   sequential right-to-left pass over the carry records) and the per-episode
   table, exactly as in the local engine, so the results are bit-identical.
3. **pass 2**: one task per shard runs :func:`~rollscan.stored.process.finish_shard`
   with that shard's incoming carries (read 2), writes the output under a
   temporary name and renames it into place itself: outputs are atomic per
   shard. A small receipt (``.NAME.rollscan-done``) is written next to it.
4. with ``normalize``: pass 2 keeps the raw advantages in sealed temporary
   files and returns per-chunk (count, mean, M2); the client folds them in data
   order (the same numbers as the local engine) and one more task per shard
   finishes and publishes the output (no read of the input's known columns).

A task never holds more than one chunk of one shard's columns. A worker that
dies mid-task is replaced by Dask and its task rerun elsewhere: the dead
attempt leaves at most a hidden temporary file (removed by the client at the
end), never a partial output, and a rerun's output is identical.

Resuming: a receipt records the run's configuration (a hash of the inputs'
paths, sizes and modification times, the parameters, the column names, the
chunk size) and the output's size and modification time. ``resume=True``
keeps every output whose receipt matches and redoes the rest.
"""

from __future__ import annotations

import glob
import hashlib
import json
import logging
import os
import secrets
import time
from contextlib import contextmanager
from dataclasses import dataclass

from . import carries as cr
from .errors import StoredError
from .io import TempFiles, finish_sealed, write_table
from .process import (
    Moments,
    Progress,
    Report,
    chunk_moments,
    finish_shard,
    get_kernels,
    plan_run,
    summarise_shard,
)
from .schema import Names

#: Seconds to wait for a scheduler given by address before giving up.
CONNECT_TIMEOUT = 5.0
_RECEIPT_VERSION = 1


def require_distributed():
    """Import ``distributed`` (lazily: the local engine never needs it)."""
    try:
        import dask  # noqa: F401
        import distributed
    except ImportError:
        raise StoredError(
            "--engine dask needs dask and distributed: pip install 'rollscan[dask]'"
        ) from None
    return distributed


def _probe(address: str, timeout: float):
    """Open and close one connection to ``address`` (raises when nothing answers)."""
    import asyncio

    from distributed.comm import connect as open_comm

    async def once():
        comm = await open_comm(address, timeout=timeout)
        await comm.close()

    asyncio.run(once())


@contextmanager
def connect(*, scheduler=None, workers=None, timeout=CONNECT_TIMEOUT):
    """A client of the scheduler at ``scheduler``, or of a new local cluster of ``workers``."""
    distributed = require_distributed()
    if scheduler:
        try:
            _probe(scheduler, timeout)  # a bad address is refused before a Client half-starts
            client = distributed.Client(scheduler, timeout=timeout, set_as_default=False)
        except Exception as e:  # OSError / TimeoutError / ValueError, depending on the address
            text = " ".join(str(e).split()) or type(e).__name__
            raise StoredError(
                f"cannot reach the Dask scheduler at {scheduler!r} within {timeout:g}s: {text}"
            ) from None
        try:
            yield client
        finally:
            client.close()
        return
    n = workers or 1
    threads = max(1, (os.cpu_count() or 1) // n)
    cluster = distributed.LocalCluster(
        n_workers=n,
        threads_per_worker=1,
        processes=True,
        dashboard_address=":0",
        silence_logs=logging.ERROR,
        env={"ROLLSCAN_NUM_THREADS": str(threads)},
    )
    try:
        client = distributed.Client(cluster, set_as_default=False)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


# ------------------------------------------------------------ receipts, temporaries


def run_key(plan, *, normalize, eps, chunk_steps, kernels) -> str:
    """A hash of everything an output depends on (inputs by path, size and mtime)."""
    inputs = []
    for p in plan.paths:
        st = os.stat(p)
        inputs.append([os.path.realpath(p), st.st_size, st.st_mtime_ns])
    desc = {
        "version": _RECEIPT_VERSION,
        "inputs": inputs,
        "outputs": [os.path.basename(o) for o in plan.outputs],
        "gamma": plan.params.gamma,
        "lam": plan.params.lam,
        "normalize": bool(normalize),
        "eps": float(eps) if normalize else None,
        "chunk_steps": int(chunk_steps),
        "names": dict(plan.ds.names.names),
        "kernels": kernels,
        "dtype": plan.ds.dtype.str,
    }
    return hashlib.sha256(json.dumps(desc, sort_keys=True).encode()).hexdigest()


def receipt_path(target: str) -> str:
    d, base = os.path.split(target)
    return os.path.join(d, f".{base}.rollscan-done")


def read_receipt(target: str, key: str):
    """The receipt of a complete output of run ``key``, or None when it cannot be trusted."""
    try:
        with open(receipt_path(target)) as f:
            rec = json.load(f)
        st = os.stat(target)
    except (OSError, ValueError):
        return None
    if (
        not isinstance(rec, dict)
        or rec.get("run") != key
        or rec.get("size") != st.st_size
        or rec.get("mtime_ns") != st.st_mtime_ns
    ):
        return None
    return rec


def _write_receipt(target: str, key: str, moments: list, token: str):
    st = os.stat(target)
    rec = {"run": key, "size": st.st_size, "mtime_ns": st.st_mtime_ns, "moments": moments}
    path = receipt_path(target)
    tmp = f"{os.path.dirname(path)}/.{os.path.basename(target)}.rollscan-tmp-{token}-receipt"
    with open(tmp, "w") as f:
        json.dump(rec, f)
    os.replace(tmp, path)


class RunTemps(TempFiles):
    """Temporary names carrying the run's token, so the client can find a dead task's files."""

    def __init__(self, directory: str, token: str):
        super().__init__(directory)
        self.token = token
        self._tag = f"{token}-{os.getpid()}-{secrets.token_hex(4)}"

    def new(self, stem: str) -> str:
        self._n += 1
        path = os.path.join(self.directory, f".{stem}.rollscan-tmp-{self._tag}-{self._n}")
        self.paths.append(path)
        return path


def sweep(directory: str, token: str = "") -> int:
    """Remove hidden temporary files of run ``token`` (of any run when empty)."""
    n = 0
    for path in glob.glob(os.path.join(glob.escape(directory), f".*.rollscan-tmp-{token}*")):
        try:
            os.remove(path)
            n += 1
        except FileNotFoundError:
            pass
    return n


# ------------------------------------------------------------------------- tasks


@dataclass(frozen=True)
class ShardJob:
    """Everything a pass-2 task needs besides its carries (picklable)."""

    index: int
    target: str
    out_dir: str
    token: str
    key: str
    params: cr.Params
    kernels: str
    chunk_steps: int
    normalize: bool
    delay: float = 0.0  # test hook: seconds to wait before publishing


class _Recorder(Moments):
    """Keeps each chunk's (count, mean, M2) so the client can fold them in data order."""

    def __init__(self):
        super().__init__()
        self.parts: list = []

    def add(self, x):
        self.parts.append(list(chunk_moments(x)))


def _identity(x):
    return x


def summarise_task(ds, index, params, kernels, chunk_steps):
    """Pass 1 of one shard (read 1)."""
    return summarise_shard(ds, index, params, get_kernels(kernels), chunk_steps)


def _publish(job: ShardJob, tmp: str, moments: list):
    if job.delay:
        time.sleep(job.delay)
    os.replace(tmp, job.target)
    _write_receipt(job.target, job.key, moments, job.token)


def finish_task(ds, job: ShardJob, carries):
    """Pass 2 of one shard (read 2): publish its output, or seal it for normalisation."""
    temps = RunTemps(job.out_dir, job.token)
    rec = _Recorder()
    try:
        stem = os.path.basename(job.target)
        w = finish_shard(
            ds,
            job.index,
            job.params,
            get_kernels(job.kernels),
            job.chunk_steps,
            carries,
            temps,
            stem,
            rec,
            deferred=job.normalize,
        )
        if job.normalize:
            state = w.seal()
            temps.paths.clear()  # the finishing task owns them now
            return {"sealed": state, "moments": rec.parts}
        tmp = w.finish()
        _publish(job, tmp, rec.parts)
        temps.paths.clear()
        return {"moments": rec.parts}
    except BaseException:
        temps.cleanup()
        raise


def normalise_task(job: ShardJob, sealed: dict, moments: list, name: str, mean, scale):
    """Apply ``(A - mean) / scale`` to column ``name`` of a sealed output and publish it."""
    temps = RunTemps(job.out_dir, job.token)
    try:
        tmp = finish_sealed(sealed, temps, {name: lambda x: (x - mean) / scale})
        _publish(job, tmp, moments)
        temps.paths.clear()
        return True
    except BaseException:
        temps.cleanup()
        raise


def _wait_in_order(distributed, client, futures, bar, what):
    """Wait for every future, then raise the first error in data order (as the local engine)."""
    for _ in distributed.as_completed(futures, loop=client.loop):
        bar.step(what)
    for f in futures:
        if f.status == "error":
            f.result()
    return [f.result() for f in futures]


# ------------------------------------------------------------------------ driver


def process_dask(
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
    resume=False,
    kernels="rollscan",
    client=None,
    scheduler=None,
    workers=None,
    connect_timeout=CONNECT_TIMEOUT,
    progress=False,
    _task_delay=0.0,
) -> Report:
    """``rollscan process`` on a Dask cluster: the local engine's outputs, one task per shard.

    Args:
        paths: shard files in data order (each must be readable by every worker
            at the same path).
        out_dir: output directory (writable by every worker at the same path).
        gamma, lam, normalize, eps, chunk_steps, names, kernels: as for
            :func:`rollscan.stored.process.process`.
        force: replace existing outputs.
        resume: keep every existing output whose receipt matches this run
            (same inputs, parameters and chunk size; unchanged size and
            modification time) and redo the rest, replacing them.
        client: a ``distributed.Client`` to use (it is not closed). Otherwise
            ``scheduler`` (an address) or a new local cluster of ``workers``
            processes (default 1) is used and closed at the end.
        connect_timeout: seconds to wait for ``scheduler``.

    Returns:
        a :class:`~rollscan.stored.process.Report`; ``timings["kept"]`` is the
        number of outputs kept by ``resume``.

    Raises:
        StoredError: bad input or options (nothing written), an unreachable
            scheduler, or dask not installed.
    """
    if force and resume:
        raise StoredError("--force and --resume exclude each other")
    names = names or Names()
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
    ds, params, outputs = plan.ds, plan.params, plan.outputs
    get_kernels(kernels)
    key = run_key(plan, normalize=normalize, eps=eps, chunk_steps=chunk_steps, kernels=kernels)
    kept = {}
    for i, target in enumerate(outputs):
        if not os.path.exists(target):
            continue
        rec = read_receipt(target, key) if resume else None
        if rec is not None:
            kept[i] = rec
        elif not (force or resume):
            raise StoredError(
                f"the output {target} exists (use --force to replace it, "
                "or --resume to keep complete outputs of the same run)"
            )
    if os.path.exists(plan.episodes_path) and not (force or resume):
        raise StoredError(f"the output {plan.episodes_path} exists (use --force to replace it)")

    distributed = require_distributed()
    with connect_or_use(client, scheduler, workers, connect_timeout) as cl:
        timings = {"open": time.perf_counter() - t0}
        created = not os.path.isdir(plan.out_dir)
        os.makedirs(plan.out_dir, exist_ok=True)
        if resume or force:
            sweep(plan.out_dir)  # leftovers of an earlier, killed run
        token = secrets.token_hex(6)
        temps = RunTemps(plan.out_dir, token)
        pending = [i for i in range(len(outputs)) if i not in kept]
        bar = Progress(
            total=len(outputs) + len(pending) * (2 if normalize else 1), enabled=progress
        )
        futures = []
        try:
            t = time.perf_counter()
            ds_f = cl.submit(_identity, ds, pure=False)  # recomputable, unlike scattered data
            futures = [
                cl.submit(summarise_task, ds_f, i, params, kernels, chunk_steps, pure=False)
                for i in range(len(outputs))
            ]
            per_shard = _wait_in_order(distributed, cl, futures, bar, "pass 1")
            timings["pass 1 (read, validate, summarise)"] = time.perf_counter() - t

            t = time.perf_counter()
            counts = [len(s) for s in per_shard]
            summaries = [s for shard in per_shard for s in shard]
            del per_shard
            carries = cr.combine(summaries)
            table = cr.episode_table(summaries, params.gamma)
            del summaries
            ep_tmp = temps.new(os.path.basename(plan.episodes_path))
            write_table(ep_tmp, table, plan.fmt, shard_files=plan.paths)
            n_episodes = len(table["episode"])
            del table
            offsets = [sum(counts[:i]) for i in range(len(counts) + 1)]
            timings["combine carries + episode table"] = time.perf_counter() - t

            t = time.perf_counter()
            jobs = {
                i: ShardJob(
                    i,
                    outputs[i],
                    plan.out_dir,
                    token,
                    key,
                    params,
                    kernels,
                    chunk_steps,
                    normalize,
                    _task_delay,
                )
                for i in pending
            }
            futures = [
                cl.submit(
                    finish_task, ds_f, jobs[i], carries[offsets[i] : offsets[i + 1]], pure=False
                )
                for i in pending
            ]
            del carries
            results = dict(zip(pending, _wait_in_order(distributed, cl, futures, bar, "pass 2")))
            timings["pass 2 (compute, write)"] = time.perf_counter() - t
            if normalize:
                t = time.perf_counter()
                moments = Moments()
                for i in range(len(outputs)):
                    parts = kept[i]["moments"] if i in kept else results[i]["moments"]
                    for n, mean, m2 in parts:
                        moments.merge(int(n), float(mean), float(m2))
                mean, scale = moments.mean, moments.std + eps
                futures = [
                    cl.submit(
                        normalise_task,
                        jobs[i],
                        results[i]["sealed"],
                        results[i]["moments"],
                        ds.names["advantage"],
                        mean,
                        scale,
                        pure=False,
                    )
                    for i in pending
                ]
                _wait_in_order(distributed, cl, futures, bar, "normalise")
                timings["normalise (rewrite outputs)"] = time.perf_counter() - t
            os.replace(ep_tmp, plan.episodes_path)
            temps.paths.clear()
        except BaseException:
            cl.cancel(futures)
            temps.cleanup()
            sweep(plan.out_dir, token)
            if created and not os.listdir(plan.out_dir):
                os.rmdir(plan.out_dir)
            raise
        finally:
            bar.close()
        sweep(plan.out_dir, token)  # files of attempts that died with their worker
    timings["kept"] = len(kept)
    timings["total"] = time.perf_counter() - t0
    return Report(
        outputs, plan.episodes_path, sum(ds.n_rows) * ds.steps_per_row, n_episodes, timings
    )


@contextmanager
def connect_or_use(client, scheduler, workers, timeout):
    if client is not None:
        yield client
        return
    with connect(scheduler=scheduler, workers=workers, timeout=timeout) as cl:
        yield cl
