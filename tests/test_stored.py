"""End-to-end tests of ``rollscan process`` / ``summary`` on generated shards.

Oracles: the step-by-step definitions in ``_stored_data.reference`` (GAE from
Schulman et al. 2016, eq. 16; discounted returns from their definition) and
the in-memory time-major kernels ``rollscan.gae`` / ``rollscan.discounted_returns``
run per stream on the concatenated data; statistics against NumPy.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
import rollscan
from _stored_data import (
    files_in,
    load_outputs,
    make_data,
    reference,
    reference_episodes,
    run,
    streams_of,
    write_shards,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rollscan.stored.process import process

TOL = {"rtol": 1e-12, "atol": 1e-12}


def in_memory(d, gamma, lam):
    """The time-major kernels per stream on the concatenated data (one call each)."""
    shape = d["reward"].shape
    flat = {k: np.asarray(v).reshape(-1) for k, v in d.items() if k != "extra"}
    adv = np.zeros(flat["reward"].size)
    ret = np.zeros(flat["reward"].size)
    for _, idx in streams_of(d):
        term, trunc = flat["terminated"][idx], flat["truncated"][idx]
        last = np.zeros(len(idx), dtype=bool)
        last[-1:] = True
        nv = flat.get("next_value", np.zeros(flat["reward"].size))[idx]
        if "value" in flat:
            v = flat["value"][idx]
            # the stored contract reads next values only at cuts and at the stream's end
            nv_eff = np.where(trunc | last, nv, np.r_[v[1:], 0.0])
            a, g = rollscan.gae(
                flat["reward"][idx],
                v,
                term,
                gamma=gamma,
                lam=lam,
                truncated=trunc,
                next_values=nv_eff,
            )
            adv[idx], ret[idx] = a, g
        else:
            ret[idx] = (
                rollscan.discounted_returns(
                    flat["reward"][idx],
                    term,
                    gamma=gamma,
                    truncated=trunc,
                    next_values=np.where(trunc | last, nv, 0.0),
                )
                if "next_value" in flat
                else rollscan.discounted_returns(flat["reward"][idx], term, gamma=gamma)
            )
    return adv.reshape(shape), ret.reshape(shape)


def check_process(tmp, d, cuts, chunk, gamma=0.93, lam=0.81, fmt="npz", **kw):
    paths = write_shards(d, os.path.join(tmp, "in"), cuts, fmt=fmt)
    rep = process(paths, os.path.join(tmp, "out"), gamma=gamma, lam=lam, chunk_steps=chunk, **kw)
    cols = ["return", "extra"] + (["advantage"] if "value" in d else [])
    got = load_outputs(rep.outputs, cols)
    ref_adv, ref_ret = reference(d, gamma, lam)
    mem_adv, mem_ret = in_memory(d, gamma, lam)
    np.testing.assert_allclose(got["return"], ref_ret, **TOL)
    np.testing.assert_allclose(got["return"], mem_ret, **TOL)
    if "value" in d:
        np.testing.assert_allclose(got["advantage"], ref_adv, **TOL)
        np.testing.assert_allclose(got["advantage"], mem_adv, **TOL)
    np.testing.assert_array_equal(got["extra"], d["extra"])
    return rep


layouts = st.sampled_from(["single", "streams", "wide"])


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    seed=st.integers(0, 2**31),
    n_rows=st.integers(1, 40),
    layout=layouts,
    n_cuts=st.integers(0, 4),
    chunk=st.integers(1, 50),
    value=st.booleans(),
    gamma=st.sampled_from([0.0, 0.5, 0.99, 1.0]),
    lam=st.sampled_from([0.0, 0.7, 1.0]),
)
def test_any_sharding_and_chunking_equals_one_file(
    tmp_path_factory, seed, n_rows, layout, n_cuts, chunk, value, gamma, lam
):
    tmp = str(tmp_path_factory.mktemp("h"))
    rng = np.random.default_rng(seed)
    d = make_data(rng, n_rows, layout=layout, value=value)
    cuts = rng.integers(0, n_rows + 1, size=n_cuts).tolist()  # empty shards allowed
    rep = check_process(tmp, d, cuts, chunk, gamma=gamma, lam=lam)
    assert len(rep.outputs) == n_cuts + 1


@settings(
    max_examples=8, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    seed=st.integers(0, 2**31), layout=layouts, chunk=st.integers(1, 30), n_cuts=st.integers(0, 3)
)
def test_installed_command_equals_definition(tmp_path_factory, seed, layout, chunk, n_cuts):
    tmp = str(tmp_path_factory.mktemp("c"))
    rng = np.random.default_rng(seed)
    d = make_data(rng, 30, layout=layout)
    paths = write_shards(d, os.path.join(tmp, "in"), rng.integers(0, 31, n_cuts).tolist())
    out = os.path.join(tmp, "out")
    p = run("process", *paths, "--out", out, "--gamma", 0.9, "--lam", 0.75, "--chunk-steps", chunk)
    assert p.returncode == 0, p.stderr
    assert p.stderr == ""  # no progress bar when stderr is not a terminal
    got = load_outputs(
        [os.path.join(out, os.path.basename(x)) for x in paths], ["advantage", "return"]
    )
    adv, ret = reference(d, 0.9, 0.75)
    np.testing.assert_allclose(got["advantage"], adv, **TOL)
    np.testing.assert_allclose(got["return"], ret, **TOL)


def test_long_episodes_across_many_shards_and_chunks(tmp_path):
    # few ends: carries cross many chunk and shard boundaries
    rng = np.random.default_rng(5)
    d = make_data(rng, 3000, layout="wide", width=4, p_term=0.002, p_trunc=0.001)
    check_process(str(tmp_path), d, [700, 701, 1500, 2999], chunk=37)


def test_parquet_shards_match_npz(tmp_path):
    rng = np.random.default_rng(3)
    for layout in ("streams", "wide"):
        d = make_data(rng, 90, layout=layout)
        check_process(str(tmp_path / layout), d, [20, 55], chunk=16, fmt="parquet")


def test_float32_inputs_give_float32_outputs_and_carry_columns_untouched(tmp_path):
    rng = np.random.default_rng(8)
    d = make_data(rng, 50, layout="streams")
    for k in ("reward", "value", "next_value"):
        d[k] = d[k].astype(np.float32)
    paths = write_shards(d, str(tmp_path / "in"), [25])
    rep = process(paths, str(tmp_path / "out"), gamma=0.9, lam=0.8, chunk_steps=7)
    d64 = {k: (v.astype(np.float64) if v.dtype == np.float32 else v) for k, v in d.items()}
    adv, _ = reference(d64, 0.9, 0.8)
    got = load_outputs(rep.outputs, [*d, "advantage"])
    assert got["advantage"].dtype == np.float32
    # one rounding of the float64 result (accumulation in float64)
    np.testing.assert_array_equal(got["advantage"], adv.astype(np.float32))
    for k, v in d.items():
        assert got[k].dtype == v.dtype
        np.testing.assert_array_equal(got[k], v)


def test_normalize_uses_whole_data_set_statistics(tmp_path):
    rng = np.random.default_rng(9)
    d = make_data(rng, 200, layout="wide")
    paths = write_shards(d, str(tmp_path / "in"), [50, 120])
    for fmt_dir, shard_paths in (
        ("npz", paths),
        ("pq", write_shards(d, str(tmp_path / "inpq"), [50, 120], "parquet")),
    ):
        rep = process(
            shard_paths,
            str(tmp_path / fmt_dir),
            gamma=0.95,
            lam=0.9,
            normalize=True,
            chunk_steps=33,
        )
        got = load_outputs(rep.outputs, ["advantage", "return"])
        adv, ret = reference(d, 0.95, 0.9)
        # (A - mean) / (std + eps), population std: the contract's normalisation (NumPy mean/std)
        np.testing.assert_allclose(got["advantage"], (adv - adv.mean()) / (adv.std() + 1e-8), **TOL)
        np.testing.assert_allclose(got["return"], ret, **TOL)


def test_episode_table_matches_definition(tmp_path):
    rng = np.random.default_rng(11)
    for layout in ("single", "streams", "wide"):
        d = make_data(rng, 120, layout=layout)
        cuts = [10, 11, 70]
        paths = write_shards(d, str(tmp_path / layout / "in"), cuts)
        rep = process(paths, str(tmp_path / layout / "out"), gamma=0.9, lam=0.8, chunk_steps=13)
        with np.load(rep.episodes_path, allow_pickle=False) as z:
            t = {k: z[k] for k in z.files}
        ref = reference_episodes(d, 0.9)
        assert len(t["episode"]) == len(ref)
        np.testing.assert_array_equal(t["episode"], np.arange(len(ref)))
        np.testing.assert_array_equal(t["stream"], [e["stream"] for e in ref])
        np.testing.assert_array_equal(t["length"], [e["length"] for e in ref])
        np.testing.assert_array_equal(t["ending"], [e["ending"] for e in ref])
        np.testing.assert_allclose(t["return"], [e["return"] for e in ref], **TOL)
        np.testing.assert_allclose(
            t["discounted_return"], [e["discounted_return"] for e in ref], **TOL
        )
        bounds = np.r_[0, cuts]
        rows = [e["row"] for e in ref]
        shard = np.searchsorted(bounds, rows, side="right") - 1
        np.testing.assert_array_equal(t["shard"], shard)
        np.testing.assert_array_equal(t["first_row"], np.asarray(rows) - bounds[shard])
        np.testing.assert_array_equal(t["shard_files"], paths)


def test_summary_json_equals_numpy_on_episode_table(tmp_path):
    rng = np.random.default_rng(12)
    d = make_data(rng, 400, layout="streams")
    paths = write_shards(d, str(tmp_path / "in"), [100, 300])
    rep = process(paths, str(tmp_path / "out"), gamma=0.9, lam=0.8)
    with np.load(rep.episodes_path, allow_pickle=False) as z:
        ret, length, ending = z["return"], z["length"], z["ending"]
    done = ending != "open"
    for source in (paths, [rep.episodes_path]):
        p = run("summary", *source, "--json")
        assert p.returncode == 0, p.stderr
        s = json.loads(p.stdout)
        # NumPy statistics of the complete episodes (population std)
        assert s["episodes"] == len(ending)
        assert s["open_episodes"] == int((~done).sum())
        assert s["steps"] == d["reward"].size
        assert s["terminated"] == int((ending == "terminated").sum())
        assert s["truncated"] == int((ending == "truncated").sum())
        assert s["terminated_share"] == pytest.approx((ending == "terminated").sum() / done.sum())
        for key, x in (("return", ret[done]), ("length", length[done])):
            for stat, fn in (
                ("mean", np.mean),
                ("std", np.std),
                ("min", np.min),
                ("median", np.median),
                ("max", np.max),
            ):
                assert s[key][stat] == pytest.approx(float(fn(x)), rel=1e-12, abs=1e-12)
    p = run("summary", *paths)
    assert p.returncode == 0 and "episodes" in p.stdout and "median" in p.stdout
    # processed shards (with advantage and return columns) summarise the same
    p = run("summary", *rep.outputs, "--json")
    assert p.returncode == 0, p.stderr
    assert json.loads(p.stdout) == s


def test_summary_plot_writes_png(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rng = np.random.default_rng(13)
    d = make_data(rng, 300, layout="wide")
    paths = write_shards(d, str(tmp_path / "in"), [150])
    png = tmp_path / "plots" / "returns.png"
    p = run("summary", *paths, "--plot", png)
    assert p.returncode == 0, p.stderr
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = plt.imread(str(png))
    assert 300 <= img.shape[0] <= 2000 and 600 <= img.shape[1] <= 3000
    assert img[..., :3].std() > 0.01  # not a blank canvas
    assert files_in(png.parent) == ["returns.png"]


def test_discounted_returns_without_value_column(tmp_path):
    rng = np.random.default_rng(14)
    d = make_data(rng, 80, layout="streams", value=False)
    rep = check_process(str(tmp_path), d, [30], chunk=9)
    with np.load(rep.outputs[0], allow_pickle=False) as z:
        assert "advantage" not in z.files


def test_demo_runs_end_to_end(tmp_path):
    out = tmp_path / "demo"
    p = run("demo", "--out", out, "--steps", 20000)
    assert p.returncode == 0, p.stderr
    for name in ("summary.png", "summary.json"):
        assert (out / name).exists(), p.stdout
    assert len(list((out / "processed").glob("kelp-*.npz"))) == 8
    assert "NumPy reference" in p.stdout and "pass 2" in p.stdout
    s = json.loads((out / "summary.json").read_text())
    assert s["steps"] == 20000 and s["terminated"] > 0 and s["truncated"] > 0
    # a second run replaces the demo's own directory
    assert run("demo", "--out", out, "--steps", 20000).returncode == 0


def test_python_dash_m_entry_point(tmp_path):
    import subprocess
    import sys

    p = subprocess.run(
        [sys.executable, "-m", "rollscan", "process", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert p.returncode == 0 and "--chunk-steps" in p.stdout


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**31),
    n_pieces=st.integers(0, 12),
    gamma=st.floats(0, 1),
    lam=st.floats(0, 1),
)
def test_numpy_reference_kernels_equal_ragged_kernels(seed, n_pieces, gamma, lam):
    # the NumPy path used by --kernels numpy and the demo, against rollscan.ragged
    from rollscan.stored import numpy_kernels as ref

    rng = np.random.default_rng(seed)
    lengths = rng.integers(0, 9, n_pieces)
    s = int(lengths.sum())
    r, v = rng.normal(size=s), rng.normal(size=s)
    terminal = rng.random(n_pieces) < 0.5
    tail_v, tail_a = rng.normal(size=n_pieces), rng.normal(size=n_pieces)
    kw = {"terminal": terminal, "tail_values": tail_v}
    np.testing.assert_allclose(
        ref.discounted_returns(r, lengths, gamma=gamma, **kw),
        rollscan.ragged.discounted_returns(r, lengths, gamma=gamma, **kw),
        **TOL,
    )
    got = ref.gae(r, v, lengths, gamma=gamma, lam=lam, tail_advantages=tail_a, **kw)
    want = rollscan.ragged.gae(r, v, lengths, gamma=gamma, lam=lam, tail_advantages=tail_a, **kw)
    for g, w in zip(got, want):
        np.testing.assert_allclose(g, w, **TOL)
    for gm in (1.0, gamma):
        np.testing.assert_allclose(
            ref.episode_sums(r, lengths, gamma=gm),
            rollscan.ragged.episode_sums(r, lengths, gamma=gm),
            **TOL,
        )


def test_bench_case_agrees_with_its_reference():
    from rollscan.bench import stored

    (case,) = stored.cases(quick=True)
    got, want = case.run(), case.refs["numpy"]()
    for g, w in zip(got, want):
        np.testing.assert_allclose(g, w, **TOL)


def test_compressed_and_fortran_ordered_npz(tmp_path):
    rng = np.random.default_rng(21)
    d = make_data(rng, 120, layout="wide", width=3)
    paths = write_shards(d, str(tmp_path / "in"), [40, 80])
    for i, p in enumerate(paths):
        with np.load(p, allow_pickle=False) as z:
            cols = {k: z[k] for k in z.files}
        if i == 1:  # Fortran-ordered members are read whole, with the same result
            cols = {k: np.asfortranarray(v) for k, v in cols.items()}
        np.savez_compressed(p, **cols)
    rep = process(paths, str(tmp_path / "out"), gamma=0.9, lam=0.7, chunk_steps=10)
    got = load_outputs(rep.outputs, ["advantage", "return", "extra"])
    adv, ret = reference(d, 0.9, 0.7)
    np.testing.assert_allclose(got["advantage"], adv, **TOL)
    np.testing.assert_allclose(got["return"], ret, **TOL)
    np.testing.assert_array_equal(got["extra"], d["extra"])
    import zipfile

    with zipfile.ZipFile(rep.outputs[0]) as z:  # outputs keep the inputs' compression
        assert {i.compress_type for i in z.infolist()} == {zipfile.ZIP_DEFLATED}


def test_summary_of_parquet_episode_table(tmp_path):
    from rollscan.stored.schema import Names
    from rollscan.stored.summary import load_episodes, summarise

    rng = np.random.default_rng(22)
    d = make_data(rng, 150, layout="streams")
    paths = write_shards(d, str(tmp_path / "in"), [75], fmt="parquet")
    rep = process(paths, str(tmp_path / "out"), gamma=0.9, lam=0.7)
    assert rep.episodes_path.endswith("episodes.parquet")
    import pyarrow.parquet as pq

    meta = pq.read_schema(rep.episodes_path).metadata
    assert json.loads(meta[b"rollscan.shard_files"]) == paths
    from_table = summarise(load_episodes([rep.episodes_path], Names()))
    from_shards = summarise(load_episodes(paths, Names()))
    assert from_table == from_shards
    assert from_table["episodes"] == len(reference_episodes(d, 0.9))
