"""Bad input to ``rollscan process`` gives one clear line, exit status 2 and no output.

Also: existing outputs are kept without --force, inputs are never overwritten,
and an interrupted run leaves nothing behind.
"""

from __future__ import annotations

import os
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
from _stored_data import command, files_in, make_data, run, write_shards


@pytest.fixture
def shards(tmp_path):
    d = make_data(np.random.default_rng(1), 60, layout="streams")
    return d, write_shards(d, str(tmp_path / "in"), [20, 40])


def replace(path, **columns):
    with np.load(path, allow_pickle=False) as z:
        d = {k: z[k] for k in z.files}
    for k, v in columns.items():
        if v is None:
            d.pop(k)
        else:
            d[k] = v
    np.savez(path, **d)


def expect_error(tmp_path, paths, *needles, extra=()):
    out = tmp_path / "out"
    p = run("process", *paths, "--out", out, "--gamma", 0.9, "--lam", 0.8, *extra)
    assert p.returncode == 2, (p.stdout, p.stderr)
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1, p.stderr
    for needle in needles:
        assert needle in lines[0], lines[0]
    assert "Traceback" not in p.stderr
    # no output, not even for earlier shards; the directory it would have made is gone too
    assert not out.exists(), files_in(out)
    return lines[0]


def test_pickled_column_is_refused_not_loaded(tmp_path, shards):
    _, paths = shards
    marker = tmp_path / "executed"
    # an object column whose unpickling would create a file
    payload = np.array([Exploit(str(marker))] * 20, dtype=object)
    with np.load(paths[1], allow_pickle=False) as z:
        d = {k: z[k] for k in z.files}
    d["notes"] = payload
    np.savez(paths[1], **d)
    expect_error(tmp_path, paths, paths[1], "'notes'", "pickled")
    assert not marker.exists()


class Exploit:
    def __init__(self, path):
        self.path = path

    def __reduce__(self):
        return (open, (self.path, "w"))


def test_missing_reward_column(tmp_path, shards):
    _, paths = shards
    replace(paths[2], reward=None)
    expect_error(tmp_path, paths, paths[2], "'reward'", "missing", "--reward-column")


def test_renamed_columns_are_found_by_option(tmp_path, shards):
    _, paths = shards
    for p in paths:
        with np.load(p, allow_pickle=False) as z:
            cols = {("gain" if k == "reward" else k): z[k] for k in z.files}
        np.savez(p, **cols)
    p = run(
        "process",
        *paths,
        "--out",
        tmp_path / "out",
        "--gamma",
        0.9,
        "--lam",
        0.8,
        "--reward-column",
        "gain",
    )
    assert p.returncode == 0, p.stderr


def test_explicitly_named_column_must_exist(tmp_path, shards):
    _, paths = shards
    expect_error(tmp_path, paths, "'score'", "missing", extra=("--value-column", "score"))


@pytest.mark.parametrize(
    "bad",
    [np.array(["a"] * 20), np.ones(20, dtype=np.complex128)],
    ids=["strings", "complex"],
)
def test_wrong_dtype(tmp_path, shards, bad):
    _, paths = shards
    replace(paths[1], reward=bad)
    expect_error(tmp_path, paths, paths[1], "'reward'", "dtype")


def test_flag_column_with_other_values(tmp_path, shards):
    d, paths = shards
    flags = d["terminated"][20:40].astype(np.int8)
    flags[7] = 3
    replace(paths[1], terminated=flags)
    expect_error(tmp_path, paths, paths[1], "'terminated'", "step 7")


def test_mismatched_column_lengths(tmp_path, shards):
    d, paths = shards
    replace(paths[1], value=d["value"][20:39])
    expect_error(tmp_path, paths, paths[1], "'value'", "step 19", "(19,)", "(20,)")


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_reward(tmp_path, shards, bad):
    d, paths = shards
    r = d["reward"][40:].copy()
    r[13] = bad
    replace(paths[2], reward=r)
    expect_error(tmp_path, paths, paths[2], "'reward'", "step 13", "non-finite")


def test_non_finite_in_wide_shard_names_row_and_stream(tmp_path):
    d = make_data(np.random.default_rng(2), 30, layout="wide")
    d["value"][17, 2] = np.nan
    paths = write_shards(d, str(tmp_path / "in"), [10])
    expect_error(tmp_path, paths, paths[1], "'value'", "step 7", "stream 2")


def test_number_of_streams_changes(tmp_path):
    rng = np.random.default_rng(3)
    a = write_shards(make_data(rng, 10, layout="wide", width=3), str(tmp_path / "a"), [])
    b = write_shards(make_data(rng, 10, layout="wide", width=4), str(tmp_path / "b"), [])
    expect_error(tmp_path, [a[0], b[0]], b[0], "'reward'", "step 0", "4 streams")


def test_truncated_step_without_next_value(tmp_path):
    d = make_data(np.random.default_rng(4), 50, layout="single", next_value=False, p_trunc=0.2)
    paths = write_shards(d, str(tmp_path / "in"), [25])
    first = int(np.argmax(d["truncated"]))
    shard, step = (0, first) if first < 25 else (1, first - 25)
    expect_error(
        tmp_path, paths, paths[shard], "'truncated'", f"step {step}", "--next-value-column"
    )


def test_truncated_file(tmp_path, shards):
    _, paths = shards
    data = Path(paths[1]).read_bytes()
    Path(paths[1]).write_bytes(data[: len(data) // 2])
    expect_error(tmp_path, paths, paths[1], "truncated or corrupt")


def test_corrupt_member_data(tmp_path, shards):
    _, paths = shards
    with np.load(paths[0], allow_pickle=False) as z:
        clean = z["reward"].tobytes()
    data = bytearray(Path(paths[0]).read_bytes())
    at = data.find(clean)
    data[at + 40] ^= 0xFF  # flip bits inside the reward member: the CRC no longer matches
    Path(paths[0]).write_bytes(bytes(data))
    # a checksum covers the whole member, so no single step can be named
    expect_error(tmp_path, paths, paths[0], "'reward'", "corrupt", "CRC")


def test_not_an_archive(tmp_path):
    bad = tmp_path / "x.npz"
    np.save(tmp_path / "plain.npy", np.zeros(3))
    os.replace(tmp_path / "plain.npy", bad)
    expect_error(tmp_path, [str(bad)], str(bad), "not a readable .npz")


def test_existing_output_needs_force(tmp_path, shards):
    _, paths = shards
    out = tmp_path / "out"
    args = ("process", *paths, "--out", out, "--gamma", 0.9, "--lam", 0.8)
    assert run(*args).returncode == 0
    before = {n: (out / n).stat().st_mtime_ns for n in files_in(out)}
    p = run(*args)
    assert p.returncode == 2 and "--force" in p.stderr
    assert {n: (out / n).stat().st_mtime_ns for n in files_in(out)} == before
    assert run(*args, "--force").returncode == 0
    assert not [n for n in files_in(out) if "rollscan-tmp" in n]


def test_never_writes_over_an_input(tmp_path, shards):
    _, paths = shards
    before = [Path(p).read_bytes() for p in paths]
    p = run(
        "process",
        *paths,
        "--out",
        os.path.dirname(paths[0]),
        "--gamma",
        0.9,
        "--lam",
        0.8,
        "--force",
    )
    assert p.returncode == 2 and "overwrite an input" in p.stderr
    assert [Path(p).read_bytes() for p in paths] == before


def test_missing_lam_with_value_column(tmp_path, shards):
    _, paths = shards
    p = run("process", *paths, "--out", tmp_path / "out", "--gamma", 0.9)
    assert p.returncode == 2 and "--lam" in p.stderr
    assert files_in(tmp_path / "out") == []


def test_interrupted_run_leaves_nothing(tmp_path):
    # chunked finely so that the run is still going when interrupted
    d = make_data(np.random.default_rng(6), 100_000, layout="wide", width=2)
    paths = write_shards(d, str(tmp_path / "in"), [25_000, 50_000, 75_000])
    out = tmp_path / "out"
    complete = sorted(["episodes.npz", *map(os.path.basename, paths)])
    outcomes = []
    # interrupt in pass 1 (fixed delays) and in pass 2 (once temporary files exist)
    for delay, wait_for_writes in ((0.7, False), (1.2, False), (0.0, True), (0.2, True)):
        proc = subprocess.Popen(
            [
                *command(),
                "process",
                *paths,
                "--out",
                str(out),
                "--gamma",
                "0.9",
                "--lam",
                "0.8",
                "--chunk-steps",
                "1000",
                "--force",
            ],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        deadline = time.monotonic() + 60
        while wait_for_writes and proc.poll() is None and time.monotonic() < deadline:
            if [n for n in files_in(out) if "rollscan-tmp" in n]:
                break
            time.sleep(0.002)
        time.sleep(delay)
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
        left = files_in(out)
        # either nothing at all, or every output complete: never a half-written file
        assert left in ([], complete), (left, err)
        for name in left:
            with np.load(out / name, allow_pickle=False) as z:
                assert len(z.files) > 0
        if proc.returncode == 130:
            assert "interrupted" in err and "Traceback" not in err
        elif proc.returncode == 0:
            assert left == complete
        else:
            # killed by the default handler: while the interpreter was still
            # starting up (nothing written), or after the work was done and the
            # command's handler was gone (everything written)
            assert proc.returncode == -signal.SIGINT and left in ([], complete), err
        outcomes.append((proc.returncode, left == []))
        for name in left:
            os.remove(out / name)
    assert (130, True) in outcomes, outcomes


def test_parquet_null_reward_and_truncated_parquet(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    d = make_data(np.random.default_rng(7), 40, layout="streams")
    paths = write_shards(d, str(tmp_path / "in"), [20], fmt="parquet")
    table = pq.read_table(paths[1])
    reward = table.column("reward").to_pylist()
    reward[5] = None
    i = table.schema.get_field_index("reward")
    pq.write_table(table.set_column(i, "reward", pa.array(reward, pa.float64())), paths[1])
    # chunks of 4 rows: the step is counted from the shard's start, not the chunk's
    expect_error(
        tmp_path, paths, paths[1], "'reward'", "step 5", "null", extra=("--chunk-steps", 4)
    )
    data = Path(paths[0]).read_bytes()
    Path(paths[0]).write_bytes(data[: len(data) - 40])
    expect_error(tmp_path, paths, paths[0], "truncated or corrupt")
