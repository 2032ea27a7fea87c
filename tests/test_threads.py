"""Thread pool, thread safety and fork safety (contract section 1).

Results must not depend on the thread count (bit-identical for 1 and N),
concurrent Python threads must get the same results as one, the pool size
comes from set_num_threads / ROLLSCAN_NUM_THREADS, and a forked child can
still run kernels.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
import time
import warnings

import numpy as np
import pytest
import rollscan
from helpers import ragged_buffer, timemajor_buffer
from numpy.testing import assert_array_equal

ragged = rollscan.ragged


def test_set_and_get_num_threads(restore_threads):
    rollscan.set_num_threads(1)
    assert rollscan.get_num_threads() == 1
    rollscan.set_num_threads(2)
    assert rollscan.get_num_threads() == 2
    rollscan.set_num_threads(3)  # more threads than cores is allowed
    assert rollscan.get_num_threads() == 3
    assert rollscan.discounted_returns(np.ones(4), gamma=0.5).shape == (4,)


def test_set_num_threads_rejects_zero(restore_threads):
    # documented in the set_num_threads docstring: ValueError if n < 1
    with pytest.raises(ValueError):
        rollscan.set_num_threads(0)
    assert rollscan.get_num_threads() == restore_threads


def _all_kernels(tm, rg):
    """Run every core kernel once; a tuple of all outputs."""
    out = [
        rollscan.discounted_returns(
            tm["rewards"],
            tm["terminated"],
            gamma=0.99,
            truncated=tm["truncated"],
            next_values=tm["next_values"],
        )
    ]
    out += rollscan.gae(
        tm["rewards"],
        tm["values"],
        tm["terminated"],
        gamma=0.99,
        lam=0.95,
        truncated=tm["truncated"],
        next_values=tm["next_values"],
    )
    out += rollscan.gae(
        tm["rewards"].astype(np.float32),
        tm["values"].astype(np.float32),
        tm["terminated"],
        gamma=0.99,
        lam=0.95,
        truncated=tm["truncated"],
        next_values=tm["next_values"].astype(np.float32),
        normalize=True,
    )
    out.append(rollscan.normalize(tm["rewards"], ddof=1))
    out.append(rollscan.normalize(tm["values"], mask=tm["terminated"]))
    kw = {"terminal": rg["terminal"], "tail_values": rg["tail_values"]}
    out.append(ragged.discounted_returns(rg["rewards"], rg["lengths"], gamma=0.999, **kw))
    out += ragged.gae(rg["rewards"], rg["values"], rg["lengths"], gamma=0.999, lam=0.97, **kw)
    out += ragged.gae(
        rg["rewards"].astype(np.float32),
        rg["values"],
        rg["lengths"],
        gamma=0.999,
        lam=0.97,
        normalize=True,
        **kw,
    )
    out.append(ragged.episode_sums(rg["rewards"], rg["lengths"], gamma=0.999))
    out.append(ragged.episode_sums(rg["rewards"], rg["lengths"]))
    return tuple(out)


def _long_ragged(rng):
    # one very long piece (> 10^5 steps) among many short ones, so the blocked
    # two-pass scan with carries between blocks is exercised
    lengths = np.concatenate(
        [rng.integers(0, 50, size=300), [150_000], rng.integers(0, 50, size=300)]
    )
    return ragged_buffer(rng, lengths)


def test_bit_identical_for_one_and_two_threads(rng, restore_threads):
    tm = timemajor_buffer(rng, (2048, 64), kind="next_values", p_end=0.01)
    rg = _long_ragged(rng)
    rollscan.set_num_threads(1)
    one = _all_kernels(tm, rg)
    rollscan.set_num_threads(2)
    two = _all_kernels(tm, rg)
    rollscan.set_num_threads(4)
    four = _all_kernels(tm, rg)
    for a, b, c in zip(one, two, four):
        assert a.dtype == b.dtype == c.dtype
        assert_array_equal(a, b, strict=True)
        assert_array_equal(a, c, strict=True)


def test_long_single_piece_bit_identical(rng, restore_threads):
    # one stream / one piece only: the only parallelism is inside the piece
    n = 300_000
    r = rng.normal(size=n)
    v = rng.normal(size=n)
    res = {}
    for threads in (1, 2):
        rollscan.set_num_threads(threads)
        res[threads] = (
            ragged.discounted_returns(r, [n], gamma=0.9999),
            *ragged.gae(r, v, [n], gamma=0.9999, lam=0.99),
            rollscan.discounted_returns(r, gamma=0.9999),
            ragged.episode_sums(r, [n], gamma=0.9999),
        )
    for a, b in zip(res[1], res[2]):
        assert_array_equal(a, b, strict=True)
    # and the long piece agrees with the time-major single stream
    np.testing.assert_allclose(res[1][0], res[1][3], rtol=1e-12, atol=1e-9)


@pytest.mark.timeout(120)
def test_eight_python_threads_get_the_same_results(rng, restore_threads):
    rollscan.set_num_threads(2)
    inputs = []
    for k in range(8):
        tm = timemajor_buffer(rng, (256 + 16 * k, 8), kind="next_values")
        rg = ragged_buffer(rng, rng.integers(0, 200, size=40 + k))
        inputs.append((tm, rg))
    expected = [_all_kernels(tm, rg) for tm, rg in inputs]
    results: dict[int, list] = {}
    errors: list[BaseException] = []
    barrier = threading.Barrier(8)

    def work(k):
        try:
            barrier.wait()
            results[k] = [_all_kernels(*inputs[k]) for _ in range(5)]
        except BaseException as e:  # reported below, in the main thread
            errors.append(e)

    threads = [threading.Thread(target=work, args=(k,)) for k in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=100)
    assert not any(t.is_alive() for t in threads), "a worker thread hung"
    assert not errors, errors
    for k in range(8):
        for run in results[k]:
            for got, want in zip(run, expected[k]):
                assert_array_equal(got, want, strict=True)


@pytest.mark.timeout(120)
def test_threads_share_one_input_and_change_pool_size(rng, restore_threads):
    # many threads reading the same arrays while another resizes the pool
    tm = timemajor_buffer(rng, (512, 16), kind="next_values")
    rg = ragged_buffer(rng, rng.integers(0, 300, size=60))
    want = _all_kernels(tm, rg)
    stop = threading.Event()
    errors: list[BaseException] = []
    mismatches = []

    def reader():
        try:
            for _ in range(10):
                for got, exp in zip(_all_kernels(tm, rg), want):
                    if not np.array_equal(got, exp, equal_nan=True):
                        mismatches.append(1)
        except BaseException as e:
            errors.append(e)

    def resizer():
        n = 1
        while not stop.is_set():
            rollscan.set_num_threads(n)
            n = 3 - n
            time.sleep(0.001)

    rs = threading.Thread(target=resizer)
    rs.start()
    readers = [threading.Thread(target=reader) for _ in range(4)]
    for t in readers:
        t.start()
    for t in readers:
        t.join(timeout=100)
    stop.set()
    rs.join(timeout=10)
    assert not any(t.is_alive() for t in readers)
    assert not errors, errors
    assert not mismatches


@pytest.mark.parametrize("n", ["1", "3"])
def test_environment_variable_sets_pool_size(n):
    env = dict(os.environ, ROLLSCAN_NUM_THREADS=n)
    code = (
        "import numpy as np, rollscan\n"
        "print(rollscan.get_num_threads())\n"
        "print(rollscan.discounted_returns(np.ones(3), gamma=0.5).tolist())\n"
    )
    res = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=60
    )
    assert res.returncode == 0, res.stderr
    lines = res.stdout.split()
    assert lines[0] == n
    assert res.stdout.splitlines()[1] == "[1.75, 1.5, 1.0]"


@pytest.mark.parametrize("bad", ["two", "0", "-3", "1.5", ""])
def test_unusable_environment_variable_warns_and_falls_back(bad):
    env = dict(os.environ, ROLLSCAN_NUM_THREADS=bad)
    code = (
        "import numpy as np, rollscan\n"
        "print(rollscan.get_num_threads() >= 1)\n"
        "print(rollscan.discounted_returns(np.ones(3), gamma=0.5).tolist())\n"
    )
    res = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=60
    )
    assert res.returncode == 0, res.stderr
    assert "RuntimeWarning" in res.stderr
    assert f"ROLLSCAN_NUM_THREADS={bad!r} is not a whole number >= 1" in res.stderr
    assert res.stdout.splitlines() == ["True", "[1.75, 1.5, 1.0]"]


@pytest.mark.parametrize("ok", [" 2 ", "+2"])
def test_usable_environment_variable_spellings_do_not_warn(ok):
    env = dict(os.environ, ROLLSCAN_NUM_THREADS=ok)
    code = "import rollscan\nprint(rollscan.get_num_threads())\n"
    res = subprocess.run(
        [sys.executable, "-W", "error", "-c", code],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert res.returncode == 0, res.stderr
    assert res.stdout.split() == ["2"]


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs os.fork")
@pytest.mark.timeout(120)
def test_forked_child_can_run_kernels(rng, restore_threads):
    rollscan.set_num_threads(2)
    rg = _long_ragged(rng)
    tm = timemajor_buffer(rng, (1024, 32), kind="next_values")
    want = _all_kernels(tm, rg)  # the parent's pool is up and has run work
    read_fd, write_fd = os.pipe()
    with warnings.catch_warnings():
        # Python >= 3.12 warns when forking a process that has threads
        warnings.simplefilter("ignore", DeprecationWarning)
        pid = os.fork()
    if pid == 0:  # child: never return into pytest
        code = 1
        try:
            got = _all_kernels(tm, rg)
            ok = all(np.array_equal(a, b) for a, b in zip(got, want))
            rollscan.set_num_threads(1)
            again = ragged.discounted_returns(
                rg["rewards"],
                rg["lengths"],
                gamma=0.999,
                terminal=rg["terminal"],
                tail_values=rg["tail_values"],
            )
            ok = ok and np.array_equal(again, want[7])
            code = 0 if ok else 2
        except BaseException:
            code = 3
        finally:
            os.write(write_fd, bytes([code]))
            os._exit(code)
    os.close(write_fd)
    deadline = time.monotonic() + 90
    status = None
    while time.monotonic() < deadline:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            break
        time.sleep(0.05)
    else:
        os.kill(pid, 9)
        os.waitpid(pid, 0)
        pytest.fail("forked child hung calling a kernel")
    report = os.read(read_fd, 1)
    os.close(read_fd)
    assert os.WIFEXITED(status)
    assert os.WEXITSTATUS(status) == 0, f"child reported {report!r}"
    # the parent's pool still works after the fork
    assert_array_equal(_all_kernels(tm, rg)[0], want[0])


@pytest.mark.timeout(120)
def test_gil_is_released_during_a_kernel(rng, restore_threads):
    # While one thread runs a long kernel, another Python thread keeps running:
    # the longest pause it sees is far shorter than the kernel (contract
    # section 1). One worker thread, so the second core stays free.
    rollscan.set_num_threads(1)
    n = 200_000
    r = rng.normal(size=n)
    for _ in range(2):  # the first call is cold; time the second
        t0 = time.perf_counter()
        ragged.gae(r, r, [n], gamma=0.99, lam=0.95)
    per_step = (time.perf_counter() - t0) / n
    took = {}

    def work(big):
        t = time.perf_counter()
        ragged.gae(big, big, [big.size], gamma=0.99, lam=0.95)
        took["kernel"] = time.perf_counter() - t

    # Aim at ~0.8 s; on a machine whose speed shifts under us, resize and
    # try again rather than give up.
    for _ in range(4):
        n = int(min(max(0.8 / per_step, n), 120_000_000))
        big = np.full(n, 0.5)  # the values do not matter here, only the time
        worker = threading.Thread(target=work, args=(big,))
        worker.start()
        last = time.perf_counter()
        longest = 0.0
        while worker.is_alive():
            now = time.perf_counter()
            longest = max(longest, now - last)
            last = now
            time.sleep(0.001)
        worker.join()
        if took["kernel"] >= 0.3 or n == 120_000_000:
            break
        per_step = took["kernel"] / n
    if took["kernel"] < 0.3:
        pytest.skip(f"kernel too quick ({took['kernel']:.2f} s) to tell")
    assert longest < 0.5 * took["kernel"], (longest, took["kernel"])
