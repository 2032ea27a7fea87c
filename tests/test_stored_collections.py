"""``process_collection`` (Dask collections of per-step columns) against the local engine.

Oracles: the local engine (``rollscan.stored.process.process``) run on the same
steps written as shard files, one shard per partition; it is itself tested
against the step-by-step definitions in ``_stored_data.reference`` (GAE:
Schulman et al. 2016, eq. 16; discounted returns from their definition), which
one case here also checks directly.
"""

from __future__ import annotations

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")
dd = pytest.importorskip("dask.dataframe")
da = pytest.importorskip("dask.array")
pytest.importorskip("pyarrow")

from _stored_data import load_outputs, make_data, reference, write_shards  # noqa: E402
from rollscan.stored.dask_collections import process_collection  # noqa: E402
from rollscan.stored.errors import StoredError  # noqa: E402
from rollscan.stored.process import process  # noqa: E402

# dask's own parquet reader still calls a pandas API that pandas 3.1 deprecates
pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword in DataFrame.reset_index")

N_PARTS = 16
ROWS = 19
SPAN = (3, 8)  # no episode ends in partitions 3..7: episodes cross 5 boundaries
CUTS = [ROWS * k for k in range(1, N_PARTS)]
EP_COLS = ["episode", "stream", "shard", "first_row", "length", "ending"]


def data(layout, seed=0, float32=False, **kw):
    rng = np.random.default_rng(seed)
    d = make_data(rng, N_PARTS * ROWS, layout=layout, **kw)
    a, b = CUTS[SPAN[0] - 1], CUTS[SPAN[1] - 1]
    d["terminated"][a:b] = False
    d["truncated"][a:b] = False
    del d["extra"]
    if float32:
        for k in ("reward", "value", "next_value"):
            if k in d:
                d[k] = d[k].astype(np.float32)
    return d


def local_run(tmp_path, d, fmt, **kw):
    paths = write_shards(d, tmp_path / "in", CUTS, fmt=fmt)
    rep = process(paths, tmp_path / "local", **kw)
    return paths, rep


def check_episodes(got: dict, rep):
    want = load_outputs([rep.episodes_path], [*EP_COLS, "return", "discounted_return"])
    for c in EP_COLS:
        np.testing.assert_array_equal(got[c], want[c], err_msg=c)
    for c in ("return", "discounted_return"):
        np.testing.assert_array_equal(got[c], want[c], err_msg=c)


@pytest.mark.parametrize(
    "value, normalize, float32",
    [(True, False, False), (True, True, False), (False, False, False), (True, False, True)],
)
def test_frame_matches_local_engine(tmp_path, client, value, normalize, float32):
    d = data("streams", seed=1, float32=float32, value=value)
    kw = dict(gamma=0.97, lam=0.9 if value else None, normalize=normalize, chunk_steps=7)
    paths, rep = local_run(tmp_path, d, "parquet", **kw)
    frame = dd.read_parquet([str(p) for p in paths])
    assert frame.npartitions == N_PARTS
    res = process_collection(frame, client=client, **kw)
    out = client.compute(res.steps).result()
    cols = ["return"] + (["advantage"] if value else [])
    want = load_outputs(rep.outputs, cols)
    for c in cols:
        # same chunks, same kernels: the same bits as the local engine
        np.testing.assert_array_equal(out[c].to_numpy(), want[c], err_msg=c)
        assert out[c].dtype == (np.float32 if float32 else np.float64)
    # the input's columns and partitions are kept
    np.testing.assert_array_equal(out["reward"].to_numpy(), d["reward"])
    assert res.steps.npartitions == N_PARTS
    assert res.partition_rows == (ROWS,) * N_PARTS
    assert res.n_steps == N_PARTS * ROWS
    check_episodes(res.episodes, rep)
    assert res.n_episodes == len(res.episodes["episode"])
    # the definition agrees (Schulman et al. 2016, eq. 16; NumPy for the moments)
    if not float32:
        ref_adv, ref_ret = reference(d, 0.97, kw["lam"] or 0.0)
        np.testing.assert_allclose(out["return"].to_numpy(), ref_ret, rtol=1e-12, atol=1e-12)
        if value:
            want_a = (ref_adv - ref_adv.mean()) / (ref_adv.std() + 1e-8) if normalize else ref_adv
            np.testing.assert_allclose(out["advantage"].to_numpy(), want_a, rtol=1e-10, atol=1e-10)


def test_episode_spans_five_partitions(tmp_path, client):
    d = data("single", seed=2)
    res = process_collection(
        dd.from_dict({k: v for k, v in d.items()}, npartitions=1).repartition(
            divisions=[0, *CUTS, len(d["reward"]) - 1]
        ),
        gamma=0.99,
        lam=0.95,
        client=client,
    )
    ep = res.episodes
    first = np.asarray(ep["shard"]) * ROWS + np.asarray(ep["first_row"])
    last = first + np.asarray(ep["length"]) - 1
    assert int((last // ROWS - first // ROWS + 1).max()) >= SPAN[1] - SPAN[0]
    # and the values are those of the definition (Schulman et al. 2016, eq. 16)
    ref_adv, ref_ret = reference(d, 0.99, 0.95)
    out = client.compute(res.steps).result()
    np.testing.assert_allclose(out["advantage"].to_numpy(), ref_adv, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(out["return"].to_numpy(), ref_ret, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("layout, normalize", [("wide", False), ("wide", True), ("single", False)])
def test_arrays_match_local_engine(tmp_path, client, layout, normalize):
    d = data(layout, seed=3)
    kw = dict(gamma=0.95, lam=0.8, normalize=normalize, chunk_steps=11)
    _paths, rep = local_run(tmp_path, d, "npz", **kw)
    chunks = (tuple(np.diff([0, *CUTS, len(d["reward"])]).tolist()),)
    # streams chunked across N too: rechunked to whole rows inside
    arrays = {
        k: da.from_array(v, chunks=(*chunks, (2, 1)) if v.ndim == 2 else chunks)
        for k, v in d.items()
    }
    res = process_collection(arrays, client=client, **kw)
    assert set(res.steps) == {"advantage", "return"}
    assert res.steps["return"].chunks[0] == chunks[0]
    got = dict(zip(res.steps, client.compute(list(res.steps.values()), sync=True)))
    want = load_outputs(rep.outputs, ["advantage", "return"])
    for c in ("advantage", "return"):
        np.testing.assert_array_equal(got[c], want[c], err_msg=c)
    check_episodes(res.episodes, rep)


def test_default_scheduler_without_client(tmp_path):
    """No client: Dask's current scheduler (threads here) computes the same numbers."""
    d = data("streams", seed=4)
    kw = dict(gamma=0.9, lam=0.7, chunk_steps=5)
    paths, rep = local_run(tmp_path, d, "parquet", **kw)
    res = process_collection(dd.read_parquet([str(p) for p in paths]), **kw)
    out = res.steps.compute()
    np.testing.assert_array_equal(
        out["advantage"].to_numpy(), load_outputs(rep.outputs, ["advantage"])["advantage"]
    )


def test_first_bad_value_in_data_order(tmp_path, client):
    d = data("streams", seed=5)
    d["reward"][ROWS * 11 + 4] = np.nan
    d["value"][ROWS * 13 + 1] = np.inf
    frame = dd.from_dict(d, npartitions=1).repartition(divisions=[0, *CUTS, len(d["reward"]) - 1])
    with pytest.raises(StoredError, match=r"^partition 11, column 'reward', step 4: .*non-finite"):
        process_collection(frame, gamma=0.9, lam=0.9, client=client)
    d = data("streams", seed=5)
    d["terminated"] = d["terminated"].astype(np.int8)
    d["terminated"][ROWS * 2 + 3] = 2
    frame = dd.from_dict(d, npartitions=1).repartition(divisions=[0, *CUTS, len(d["reward"]) - 1])
    with pytest.raises(StoredError, match=r"partition 2.*column 'terminated'.*step 3.*0/1"):
        process_collection(frame, gamma=0.9, lam=0.9, client=client)


def test_bad_arguments_fail_before_reading():
    d = data("single", seed=6)
    frame = dd.from_dict(d, npartitions=2)
    with pytest.raises(StoredError, match="needs lam"):
        process_collection(frame, gamma=0.9)
    with pytest.raises(StoredError, match=r"gamma must be in \[0, 1\]"):
        process_collection(frame, gamma=1.5, lam=0.9)
    with pytest.raises(StoredError, match="normalize needs advantages"):
        process_collection(frame.drop(columns=["value"]), gamma=0.9, normalize=True)
    with pytest.raises(StoredError, match=r"column 'reward'.*is missing.*--reward-column"):
        process_collection(frame.drop(columns=["reward"]), gamma=0.9, lam=0.9)
    with pytest.raises(StoredError, match=r"column 'advantage'.*already exists"):
        process_collection(frame.assign(advantage=1.0), gamma=0.9, lam=0.9)
    with pytest.raises(StoredError, match="dask DataFrame or a mapping of dask arrays"):
        process_collection(d["reward"], gamma=0.9)
    arrays = {k: da.from_array(v, chunks=50) for k, v in d.items()}
    with pytest.raises(StoredError, match=r"column 'value'.*ndarray, not a dask.array"):
        process_collection({**arrays, "value": d["value"]}, gamma=0.9, lam=0.9)
    with pytest.raises(
        StoredError, match=r"^collection, column 'value': has 303 rows but 'reward' has 304"
    ):
        process_collection({**arrays, "value": arrays["value"][:-1]}, gamma=0.9, lam=0.9)
