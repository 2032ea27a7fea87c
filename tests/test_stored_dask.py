"""The Dask engine of ``rollscan process`` against the local engine.

Oracles: the local engine (``rollscan.stored.process.process``), itself tested
against the step-by-step definitions in ``_stored_data.reference`` (GAE:
Schulman et al. 2016, eq. 16; discounted returns from their definition), which
one case here also checks directly. Normalisation: NumPy mean and population
std of the definition's advantages.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
import time

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from _stored_data import (  # noqa: E402
    files_in,
    load_outputs,
    make_data,
    reference,
    run,
    streams_of,
    write_shards,
)
from rollscan.stored.dask_engine import process_dask, receipt_path  # noqa: E402
from rollscan.stored.errors import StoredError  # noqa: E402
from rollscan.stored.process import process  # noqa: E402

TOL = {"rtol": 1e-12, "atol": 1e-12}
N_SHARDS = 17
ROWS_PER_SHARD = 23
SPAN = (3, 8)  # no episode ends in shards 3..7: episodes cross 5 shard boundaries


def dataset(tmp, layout="streams", seed=0, fmt="npz", **kw):
    rng = np.random.default_rng(seed)
    n = N_SHARDS * ROWS_PER_SHARD
    d = make_data(rng, n, layout=layout, **kw)
    cuts = [ROWS_PER_SHARD * k for k in range(1, N_SHARDS)]
    a, b = cuts[SPAN[0] - 1], cuts[SPAN[1] - 1]
    d["terminated"][a:b] = False
    d["truncated"][a:b] = False
    return d, write_shards(d, os.path.join(tmp, "in"), cuts, fmt=fmt)


def outputs_equal(rep_a, rep_b, columns):
    got_a, got_b = load_outputs(rep_a.outputs, columns), load_outputs(rep_b.outputs, columns)
    for c in columns:
        np.testing.assert_allclose(got_a[c], got_b[c], **TOL, err_msg=c)
    ep_a = load_outputs([rep_a.episodes_path], ["shard", "first_row", "length", "ending"])
    ep_b = load_outputs([rep_b.episodes_path], ["shard", "first_row", "length", "ending"])
    for c in ep_a:
        np.testing.assert_array_equal(ep_a[c], ep_b[c], err_msg=c)
    for c in ("return", "discounted_return"):
        a = load_outputs([rep_a.episodes_path], [c])[c]
        np.testing.assert_allclose(a, load_outputs([rep_b.episodes_path], [c])[c], **TOL)
    return got_a


def max_shards_spanned(d, episodes_path):
    """The most shards one episode of the written table touches."""
    ep = load_outputs([episodes_path], ["stream", "shard", "first_row", "length"])
    rows = dict(streams_of(d)) if d["reward"].ndim == 1 else None
    most = 0
    for s, shard, row, length in zip(ep["stream"], ep["shard"], ep["first_row"], ep["length"]):
        first = shard * ROWS_PER_SHARD + row
        if rows is None:
            last = first + length - 1
        else:
            idx = rows[s]
            last = idx[np.searchsorted(idx, first) + length - 1]
        most = max(most, last // ROWS_PER_SHARD - shard + 1)
    return most


def no_temporaries(directory):
    return [f for f in files_in(directory) if "rollscan-tmp" in f]


@pytest.mark.parametrize(
    "layout, normalize, fmt, value",
    [
        ("streams", False, "npz", True),
        ("wide", False, "npz", True),
        ("single", True, "npz", True),
        ("wide", True, "parquet", True),
        ("streams", False, "npz", False),
    ],
)
def test_matches_local_engine(tmp_path, client, layout, normalize, fmt, value):
    if fmt == "parquet":
        pytest.importorskip("pyarrow")
    d, paths = dataset(tmp_path, layout, fmt=fmt, value=value)
    kw = dict(gamma=0.97, lam=0.9 if value else None, normalize=normalize, chunk_steps=10)
    local = process(paths, tmp_path / "local", **kw)
    rep = process_dask(paths, tmp_path / "dask", client=client, **kw)
    cols = ["return", "extra"] + (["advantage"] if value else [])
    got = outputs_equal(rep, local, cols)
    assert no_temporaries(tmp_path / "dask") == []
    # an episode crossing five shard boundaries is among them
    assert max_shards_spanned(d, rep.episodes_path) >= SPAN[1] - SPAN[0]
    # and the definition agrees (Schulman et al. 2016, eq. 16; NumPy for the moments)
    ref_adv, ref_ret = reference(d, 0.97, kw["lam"] or 0.0)
    np.testing.assert_allclose(got["return"], ref_ret, **TOL)
    if value:
        want = (ref_adv - ref_adv.mean()) / (ref_adv.std() + 1e-8) if normalize else ref_adv
        np.testing.assert_allclose(got["advantage"], want, rtol=1e-10, atol=1e-10)


def test_existing_outputs_and_resume(tmp_path, client):
    _d, paths = dataset(tmp_path, "wide", seed=1)
    kw = dict(gamma=0.95, lam=0.8, normalize=True, chunk_steps=16)
    local = process(paths, tmp_path / "local", **kw)
    out = tmp_path / "dask"
    first = process_dask(paths, out, client=client, **kw)
    with pytest.raises(StoredError, match="--resume"):
        process_dask(paths, out, client=client, **kw)
    # a half-finished directory: missing outputs, one altered after its receipt,
    # a stray temporary file of a killed run
    for i in (0, 5, 16):
        os.remove(first.outputs[i])
    os.remove(first.episodes_path)
    os.utime(first.outputs[9], ns=(1, 1))
    stray = out / ".s002.npz.rollscan-tmp-deadbeef-1-2-3"
    stray.write_bytes(b"partial")
    rep = process_dask(paths, out, client=client, resume=True, **kw)
    assert rep.timings["kept"] == N_SHARDS - 4
    outputs_equal(rep, local, ["return", "advantage", "extra"])
    assert no_temporaries(out) == []
    assert all(os.path.exists(receipt_path(p)) for p in rep.outputs)
    # other options: no receipt matches, everything is redone
    local2 = process(paths, tmp_path / "local2", **{**kw, "gamma": 0.5})
    rep2 = process_dask(paths, out, client=client, resume=True, **{**kw, "gamma": 0.5})
    assert rep2.timings["kept"] == 0
    outputs_equal(rep2, local2, ["return", "advantage"])


def test_bad_input_writes_nothing(tmp_path, client):
    d, paths = dataset(tmp_path, "streams", seed=2)
    d["reward"][ROWS_PER_SHARD * 11 + 4] = np.nan
    paths = write_shards(d, tmp_path / "bad", [ROWS_PER_SHARD * k for k in range(1, N_SHARDS)])
    with pytest.raises(StoredError, match=r"s011\.npz.*column 'reward'.*step 4"):
        process_dask(paths, tmp_path / "out", client=client, gamma=0.9, lam=0.9, chunk_steps=8)
    assert not os.path.exists(tmp_path / "out")


def test_worker_killed_mid_run(tmp_path):
    _d, paths = dataset(tmp_path, "streams", seed=3)
    kw = dict(gamma=0.99, lam=0.95, chunk_steps=12)
    local = process(paths, tmp_path / "local", **kw)
    out = tmp_path / "dask"
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
    )
    cl = distributed.Client(cluster, set_as_default=False)
    try:
        before = cl.run(os.getpid)
        result = {}

        def work():
            try:
                # a test hook: each pass-2 task waits 0.4 s before publishing,
                # so both workers are busy when one is killed
                result["rep"] = process_dask(paths, out, client=cl, _task_delay=0.4, **kw)
            except BaseException as e:  # reported below
                result["error"] = e

        th = threading.Thread(target=work)
        th.start()
        deadline = time.monotonic() + 60
        published = lambda: [f for f in files_in(out) if f.endswith(".npz") and f[0] == "s"]  # noqa: E731
        while not published() and time.monotonic() < deadline:
            time.sleep(0.02)
        n_at_kill = len(published())
        assert 0 < n_at_kill < N_SHARDS
        victim = next(iter(before.values()))
        os.kill(victim, signal.SIGKILL)
        th.join(timeout=120)
        assert not th.is_alive()
        assert "error" not in result, result.get("error")
        after = cl.run(os.getpid)
        assert victim not in after.values()  # the worker really died (and was replaced)
    finally:
        cl.close()
        cluster.close()
    outputs_equal(result["rep"], local, ["return", "advantage", "extra"])
    assert no_temporaries(out) == []


def test_cli_local_cluster_and_bad_scheduler(tmp_path):
    _d, paths = dataset(tmp_path, "streams", seed=4)
    res = run("process", *paths, "--out", tmp_path / "local", "--gamma", 0.9, "--lam", 0.7)
    assert res.returncode == 0, res.stderr
    res = run(
        "process",
        *paths,
        "--out",
        tmp_path / "dask",
        "--gamma",
        0.9,
        "--lam",
        0.7,
        "--engine",
        "dask",
        "--workers",
        2,
        "--chunk-steps",
        7,
    )
    assert res.returncode == 0, res.stderr
    names = [f for f in files_in(tmp_path / "local")]
    assert [f for f in files_in(tmp_path / "dask") if not f.startswith(".")] == names
    a = load_outputs([tmp_path / "local" / f for f in names if f[0] == "s"], ["advantage"])
    b = load_outputs([tmp_path / "dask" / f for f in names if f[0] == "s"], ["advantage"])
    np.testing.assert_allclose(a["advantage"], b["advantage"], **TOL)

    for address in ("tcp://127.0.0.1:9", "no-such-protocol://x"):
        res = run(
            "process",
            *paths,
            "--out",
            tmp_path / "bad",
            "--gamma",
            0.9,
            "--lam",
            0.7,
            "--engine",
            "dask",
            "--scheduler",
            address,
            "--connect-timeout",
            2,
        )
        assert res.returncode == 2, res.stderr
        assert "cannot reach the Dask scheduler" in res.stderr
        assert len(res.stderr.strip().splitlines()) == 1
        assert not os.path.exists(tmp_path / "bad")
    res = run("process", *paths, "--out", tmp_path / "x", "--gamma", 0.9, "--lam", 0.7, "--resume")
    assert res.returncode == 2 and "--resume needs --engine dask" in res.stderr


def test_without_dask_installed(tmp_path):
    """dask blocked from import: the dask engine fails clearly, the local engine still works."""
    _, paths = dataset(tmp_path, "single", seed=5)
    import subprocess

    code = (
        "import sys; sys.modules['dask'] = None; sys.modules['distributed'] = None; "
        "from rollscan.cli import main; sys.exit(main(sys.argv[1:]))"
    )
    base = [sys.executable, "-c", code, "process", *map(str, paths), "--gamma", "0.9"]
    base += ["--lam", "0.9"]
    res = subprocess.run(
        [*base, "--out", str(tmp_path / "d"), "--engine", "dask"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert res.returncode == 2
    assert "needs dask and distributed" in res.stderr
    res = subprocess.run(
        [*base, "--out", str(tmp_path / "l")], capture_output=True, text=True, timeout=120
    )
    assert res.returncode == 0, res.stderr
