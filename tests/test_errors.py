"""Bad inputs raise the documented error (contract sections 1-3).

ShapeError names both arguments and both shapes; InputError names the
argument and the first offending index; TypeError for unsupported dtypes and
read-only outputs. Never a Rust panic.
"""

from __future__ import annotations

import numpy as np
import pytest
import rollscan
from helpers import assert_names_index, assert_names_shapes, mentions_index
from rollscan import InputError, ShapeError

ragged = rollscan.ragged


def _msg(excinfo):
    return str(excinfo.value)


# --------------------------------------------------------------------------
# ShapeError
# --------------------------------------------------------------------------


def test_gae_values_shape_mismatch():
    with pytest.raises(ShapeError) as ei:
        rollscan.gae(np.zeros((6, 3)), np.zeros((5, 3)), gamma=0.9, lam=0.9)
    assert_names_shapes(_msg(ei), ["rewards", "values"], [(6, 3), (5, 3)])


@pytest.mark.parametrize("arg", ["terminated", "truncated", "next_values"])
def test_per_step_shape_mismatch(arg):
    r = np.zeros((6, 3))
    kw = {"next_values": np.zeros((6, 3))}
    bad = np.zeros((6, 4), dtype=bool if arg != "next_values" else np.float64)
    if arg == "terminated":
        call = lambda: rollscan.discounted_returns(r, bad, gamma=0.9, **kw)  # noqa: E731
    else:
        kw[arg] = bad
        call = lambda: rollscan.discounted_returns(r, gamma=0.9, **kw)  # noqa: E731
    with pytest.raises(ShapeError) as ei:
        call()
    assert_names_shapes(_msg(ei), ["rewards", arg], [(6, 3), (6, 4)])
    with pytest.raises(ShapeError) as ei:
        if arg == "terminated":
            rollscan.gae(r, r, bad, gamma=0.9, lam=0.9, **kw)
        else:
            rollscan.gae(r, r, gamma=0.9, lam=0.9, **kw)
    assert arg in _msg(ei)


def test_time_axis_changes_expected_shapes():
    # rewards [N, T] with time_axis=1 and values laid out [T, N]: shapes differ
    with pytest.raises(ShapeError) as ei:
        rollscan.gae(np.zeros((4, 6)), np.zeros((6, 4)), gamma=0.9, lam=0.9, time_axis=1)
    assert_names_shapes(_msg(ei), ["rewards", "values"], [(4, 6), (6, 4)])


def test_bootstrap_shape_mismatch():
    with pytest.raises(ShapeError) as ei:
        rollscan.discounted_returns(np.zeros((6, 3)), gamma=0.9, bootstrap=np.zeros(4))
    msg = _msg(ei)
    assert "bootstrap" in msg
    assert_names_shapes(msg, [], [(4,)])
    # the other side: the rewards shape or the per-stream shape it implies
    assert mentions_index(msg, (6, 3)) or mentions_index(msg, (3,))
    with pytest.raises(ShapeError):
        rollscan.gae(
            np.zeros((6, 3)), np.zeros((6, 3)), gamma=0.9, lam=0.9, bootstrap=np.zeros((6, 3))
        )
    # per-stream shape follows time_axis: [N, T] -> bootstrap [N]
    with pytest.raises(ShapeError):
        rollscan.discounted_returns(np.zeros((3, 6)), gamma=0.9, bootstrap=np.zeros(6), time_axis=1)


def test_out_shape_mismatch():
    r = np.zeros((6, 3))
    with pytest.raises(ShapeError) as ei:
        rollscan.discounted_returns(r, gamma=0.9, out=np.zeros((3, 6)))
    assert "out" in _msg(ei)
    assert_names_shapes(_msg(ei), [], [(3, 6)])
    with pytest.raises(ShapeError):
        rollscan.gae(r, r, gamma=0.9, lam=0.9, out=(np.zeros((6, 3)), np.zeros((6, 2))))
    with pytest.raises(ShapeError):
        rollscan.normalize(r, out=np.zeros(18))
    with pytest.raises(ShapeError):
        ragged.discounted_returns(np.zeros(5), [5], gamma=0.9, out=np.zeros(4))
    with pytest.raises(ShapeError):
        ragged.gae(
            np.zeros(5), np.zeros(5), [5], gamma=0.9, lam=0.9, out=(np.zeros(5), np.zeros(6))
        )
    with pytest.raises(ShapeError):
        ragged.episode_sums(np.zeros(5), [2, 3], out=np.zeros(3))


def test_normalize_mask_shape():
    with pytest.raises(ShapeError) as ei:
        rollscan.normalize(np.zeros((4, 5)), mask=np.ones((5, 4), dtype=bool))
    assert_names_shapes(_msg(ei), ["x", "mask"], [(4, 5), (5, 4)])


def test_ragged_shape_mismatches():
    r = np.zeros(7)
    with pytest.raises(ShapeError) as ei:
        ragged.gae(r, np.zeros(6), [7], gamma=0.9, lam=0.9)
    assert_names_shapes(_msg(ei), ["rewards", "values"], [(7,), (6,)])
    with pytest.raises(ShapeError) as ei:
        ragged.discounted_returns(r, [3, 4], gamma=0.9, terminal=np.ones(3, dtype=bool))
    assert_names_shapes(_msg(ei), ["terminal", "lengths"], [(3,), (2,)])
    with pytest.raises(ShapeError) as ei:
        ragged.discounted_returns(r, [3, 4], gamma=0.9, tail_values=np.zeros(1))
    assert_names_shapes(_msg(ei), ["tail_values", "lengths"], [(1,), (2,)])
    with pytest.raises(ShapeError) as ei:
        ragged.gae(r, r, [3, 4], gamma=0.9, lam=0.9, tail_advantages=np.zeros(3))
    assert_names_shapes(_msg(ei), ["tail_advantages", "lengths"], [(3,), (2,)])
    # ragged arrays are 1-D
    with pytest.raises(ShapeError):
        ragged.discounted_returns(np.zeros((7, 1)), [7], gamma=0.9)
    with pytest.raises(ShapeError):
        ragged.discounted_returns(r, np.array([[3, 4]]), gamma=0.9)
    with pytest.raises(ShapeError):
        ragged.episode_sums(np.zeros((2, 2)), [4])


# --------------------------------------------------------------------------
# InputError: non-finite values
# --------------------------------------------------------------------------


def test_nan_reward_names_first_index():
    r = np.ones(12)
    r[4] = np.nan
    r[9] = np.inf
    with pytest.raises(InputError) as ei:
        rollscan.discounted_returns(r, gamma=0.5)
    assert_names_index(_msg(ei), "rewards", 4)
    assert not mentions_index(_msg(ei), 9)
    with pytest.raises(InputError) as ei:
        rollscan.gae(r, np.zeros(12), gamma=0.5, lam=0.5)
    assert_names_index(_msg(ei), "rewards", 4)
    with pytest.raises(InputError) as ei:
        ragged.discounted_returns(r, [3, 9], gamma=0.5)
    assert_names_index(_msg(ei), "rewards", 4)
    with pytest.raises(InputError) as ei:
        ragged.episode_sums(r, [3, 9])
    assert "x" in _msg(ei) or "rewards" in _msg(ei)
    assert mentions_index(_msg(ei), 4)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_values_named_with_caller_index(bad):
    # [N=3, T=6] with time on axis 1: the index is the caller's (1, 2)
    v = np.zeros((3, 6))
    v[1, 2] = bad
    with pytest.raises(InputError) as ei:
        rollscan.gae(np.zeros((3, 6)), v, gamma=0.9, lam=0.9, time_axis=1)
    assert_names_index(_msg(ei), "values", (1, 2))
    v2 = np.zeros((6, 3))
    v2[4, 1] = bad
    with pytest.raises(InputError) as ei:
        rollscan.gae(np.zeros((6, 3)), v2, gamma=0.9, lam=0.9)
    assert_names_index(_msg(ei), "values", (4, 1))
    with pytest.raises(InputError) as ei:
        ragged.gae(np.zeros(6), v2[:, 1], [6], gamma=0.9, lam=0.9)
    assert_names_index(_msg(ei), "values", 4)


def test_non_finite_next_values_bootstrap_tails():
    nv = np.zeros((5, 2))
    nv[3, 1] = np.nan
    with pytest.raises(InputError) as ei:
        rollscan.discounted_returns(np.zeros((5, 2)), gamma=0.9, next_values=nv)
    assert_names_index(_msg(ei), "next_values", (3, 1))
    with pytest.raises(InputError) as ei:
        rollscan.gae(np.zeros((5, 2)), np.zeros((5, 2)), gamma=0.9, lam=0.9, next_values=nv)
    assert "next_values" in _msg(ei)
    with pytest.raises(InputError) as ei:
        rollscan.discounted_returns(np.zeros((5, 2)), gamma=0.9, bootstrap=np.array([0.0, np.inf]))
    assert_names_index(_msg(ei), "bootstrap", 1)
    tail = np.array([0.0, 0.0, np.nan])
    with pytest.raises(InputError) as ei:
        ragged.discounted_returns(
            np.zeros(6), [2, 2, 2], gamma=0.9, terminal=[True, False, False], tail_values=tail
        )
    assert_names_index(_msg(ei), "tail_values", 2)
    with pytest.raises(InputError) as ei:
        ragged.gae(
            np.zeros(6), np.zeros(6), [2, 2, 2], gamma=0.9, lam=0.9,
            terminal=[False, False, False], tail_advantages=tail,
        )  # fmt: skip
    assert_names_index(_msg(ei), "tail_advantages", 2)


def test_normalize_non_finite():
    x = np.zeros(8)
    x[5] = np.nan
    with pytest.raises(InputError) as ei:
        rollscan.normalize(x)
    assert_names_index(_msg(ei), "x", 5)


def test_check_finite_false_lets_nan_propagate():
    r = np.ones(8)
    r[5] = np.nan
    term = np.zeros(8, dtype=bool)
    term[2] = True
    g = rollscan.discounted_returns(r, term, gamma=0.9, check_finite=False)
    assert np.isnan(g[3:6]).all()  # flows backwards inside its episode
    assert np.isfinite(g[6:]).all()  # never forwards
    adv, ret = rollscan.gae(r, np.zeros(8), term, gamma=0.9, lam=0.9, check_finite=False)
    assert np.isnan(adv[3:6]).all()
    assert np.isnan(ret[5])
    assert np.isfinite(adv[6:]).all()
    g = ragged.discounted_returns(r, [3, 5], gamma=0.9, check_finite=False)
    assert np.isnan(g[3:6]).all()
    assert np.isfinite(g[6:]).all()
    adv, _ = ragged.gae(r, np.zeros(8), [3, 5], gamma=0.9, lam=0.9, check_finite=False)
    assert np.isnan(adv[5])
    s = ragged.episode_sums(r, [3, 5], check_finite=False)
    assert np.isfinite(s[0])
    assert np.isnan(s[1])
    n = rollscan.normalize(r, check_finite=False)
    assert np.isnan(n).all()


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_check_finite_false_nan_stays_in_its_episode(bad):
    # X_t = 0 if terminated_t (contract section 2): the steps before an episode
    # end never read the next episode, NaN or not.
    r = np.ones(8)
    r[5] = bad
    term = np.zeros(8, dtype=bool)
    term[2] = True
    g = rollscan.discounted_returns(r, term, gamma=0.9, check_finite=False)
    np.testing.assert_allclose(g[:3], [1.0 + 0.9 + 0.81, 1.9, 1.0])
    adv, ret = rollscan.gae(r, np.zeros(8), term, gamma=0.9, lam=0.9, check_finite=False)
    assert np.isfinite(adv[:3]).all()
    assert np.isfinite(ret[:3]).all()
    g = ragged.discounted_returns(r, [3, 5], gamma=0.9, check_finite=False)
    np.testing.assert_allclose(g[:3], [1.0 + 0.9 + 0.81, 1.9, 1.0])
    adv, _ = ragged.gae(r, np.zeros(8), [3, 5], gamma=0.9, lam=0.9, check_finite=False)
    assert np.isfinite(adv[:3]).all()


# --------------------------------------------------------------------------
# InputError: coefficients, lengths, bootstrap rules
# --------------------------------------------------------------------------

BAD_COEFFS = [-0.1, 1.5, np.nan, np.inf]


@pytest.mark.parametrize("bad", BAD_COEFFS)
def test_gamma_outside_unit_interval(bad):
    r = np.zeros(4)
    calls = [
        lambda: rollscan.discounted_returns(r, gamma=bad),
        lambda: rollscan.gae(r, r, gamma=bad, lam=0.9),
        lambda: ragged.discounted_returns(r, [4], gamma=bad),
        lambda: ragged.gae(r, r, [4], gamma=bad, lam=0.9),
        lambda: ragged.episode_sums(r, [4], gamma=bad),
    ]
    for call in calls:
        with pytest.raises(InputError) as ei:
            call()
        assert "gamma" in _msg(ei)


@pytest.mark.parametrize("bad", BAD_COEFFS)
def test_lam_outside_unit_interval(bad):
    r = np.zeros(4)
    for call in (
        lambda: rollscan.gae(r, r, gamma=0.9, lam=bad),
        lambda: ragged.gae(r, r, [4], gamma=0.9, lam=bad),
    ):
        with pytest.raises(InputError) as ei:
            call()
        assert "lam" in _msg(ei)


def test_gamma_bounds_are_allowed():
    r = np.ones(3)
    np.testing.assert_array_equal(rollscan.discounted_returns(r, gamma=0.0), r)
    np.testing.assert_array_equal(rollscan.discounted_returns(r, gamma=1.0), [3.0, 2.0, 1.0])


def test_lengths_not_summing_to_steps():
    for lengths in ([3, 3], [10], np.zeros(0, np.int64), [7, 1]):
        with pytest.raises(InputError) as ei:
            ragged.discounted_returns(np.zeros(7), lengths, gamma=0.9)
        assert "lengths" in _msg(ei)
        with pytest.raises(InputError):
            ragged.gae(np.zeros(7), np.zeros(7), lengths, gamma=0.9, lam=0.9)
        with pytest.raises(InputError):
            ragged.episode_sums(np.zeros(7), lengths)


def test_negative_lengths_name_first_index():
    # sums to S = 7 so only the sign is wrong
    lengths = np.array([4, -1, 5, -1], dtype=np.int32)
    for call in (
        lambda: ragged.discounted_returns(np.zeros(7), lengths, gamma=0.9),
        lambda: ragged.gae(np.zeros(7), np.zeros(7), lengths, gamma=0.9, lam=0.9),
        lambda: ragged.episode_sums(np.zeros(7), lengths),
    ):
        with pytest.raises(InputError) as ei:
            call()
        assert_names_index(_msg(ei), "lengths", 1)
        assert not mentions_index(_msg(ei), 3)


def test_bootstrap_together_with_next_values():
    r = np.zeros((5, 2))
    kw = {"next_values": np.zeros((5, 2)), "bootstrap": np.zeros(2)}
    with pytest.raises(InputError) as ei:
        rollscan.discounted_returns(r, gamma=0.9, **kw)
    assert "bootstrap" in _msg(ei)
    with pytest.raises(InputError) as ei:
        rollscan.gae(r, r, gamma=0.9, lam=0.9, **kw)
    assert "bootstrap" in _msg(ei)


@pytest.mark.parametrize("where", [0, 3, 4])
def test_truncated_steps_need_next_values(where):
    r = np.zeros((5, 2))
    trunc = np.zeros((5, 2), dtype=bool)
    trunc[where, 1] = True
    for call in (
        lambda: rollscan.discounted_returns(r, gamma=0.9, truncated=trunc),
        lambda: rollscan.discounted_returns(r, gamma=0.9, truncated=trunc, bootstrap=np.ones(2)),
        lambda: rollscan.gae(r, r, gamma=0.9, lam=0.9, truncated=trunc),
    ):
        with pytest.raises(InputError) as ei:
            call()
        assert "truncated steps need next_values" in _msg(ei)


def test_all_false_truncated_needs_no_next_values():
    r = np.ones((5, 2))
    want = rollscan.discounted_returns(r, gamma=0.9)
    got = rollscan.discounted_returns(r, gamma=0.9, truncated=np.zeros((5, 2), dtype=bool))
    np.testing.assert_array_equal(got, want)


def test_normalize_documented_value_errors():
    # documented in the normalize docstring: ddof negative or not below the
    # number of selected elements, and zero spread with eps=0
    with pytest.raises(InputError):
        rollscan.normalize(np.arange(3.0), ddof=3)
    with pytest.raises(InputError):
        rollscan.normalize(np.arange(6.0), ddof=2, mask=np.array([1, 1, 0, 0, 0, 0], dtype=bool))
    with pytest.raises(InputError):
        rollscan.normalize(np.ones(4), eps=0.0)
    with pytest.raises(InputError, match="ddof"):
        rollscan.normalize(np.arange(3.0), ddof=-1)


# --------------------------------------------------------------------------
# TypeError
# --------------------------------------------------------------------------

BAD_DTYPES = {
    "complex": np.zeros(4, dtype=np.complex128),
    "object": np.array([1.0, 2.0, 3.0, 4.0], dtype=object),
    "str": np.array(["a", "b", "c", "d"]),
    "bytes": np.array([b"a", b"b", b"c", b"d"]),
}


@pytest.mark.parametrize("kind", list(BAD_DTYPES))
def test_unsupported_dtypes(kind):
    bad = BAD_DTYPES[kind]
    ok = np.zeros(4)
    calls = [
        lambda: rollscan.discounted_returns(bad, gamma=0.9),
        lambda: rollscan.gae(bad, ok, gamma=0.9, lam=0.9),
        lambda: rollscan.gae(ok, bad, gamma=0.9, lam=0.9),
        lambda: rollscan.discounted_returns(ok, gamma=0.9, next_values=bad),
        lambda: rollscan.normalize(bad),
        lambda: ragged.discounted_returns(bad, [4], gamma=0.9),
        lambda: ragged.gae(ok, bad, [4], gamma=0.9, lam=0.9),
        lambda: ragged.episode_sums(bad, [4]),
    ]
    for call in calls:
        with pytest.raises(TypeError):
            call()


def test_complex64_rewards():
    with pytest.raises(TypeError):
        rollscan.discounted_returns(np.zeros((3, 2), dtype=np.complex64), gamma=0.9)


def test_read_only_out():
    r = np.zeros((5, 2))
    out = np.zeros((5, 2))
    out.flags.writeable = False
    with pytest.raises(TypeError):
        rollscan.discounted_returns(r, gamma=0.9, out=out)
    with pytest.raises(TypeError):
        rollscan.gae(r, r, gamma=0.9, lam=0.9, out=(np.zeros((5, 2)), out))
    with pytest.raises(TypeError):
        rollscan.normalize(r, out=out)
    with pytest.raises(TypeError):
        ragged.discounted_returns(np.zeros(10), [10], gamma=0.9, out=out.reshape(10))
    with pytest.raises(TypeError):
        ragged.episode_sums(np.zeros(10), [5, 5], out=out[0])
    # read-only inputs are fine
    ro = np.ones((5, 2))
    ro.flags.writeable = False
    assert rollscan.discounted_returns(ro, gamma=0.9).shape == (5, 2)


def test_out_wrong_dtype():
    # out must have the exact output dtype (float64 here): a float32 out is refused
    r = np.zeros((5, 2))
    with pytest.raises(TypeError):
        rollscan.discounted_returns(r, gamma=0.9, out=np.zeros((5, 2), dtype=np.float32))
    with pytest.raises(TypeError):
        rollscan.discounted_returns(
            r.astype(np.float32), gamma=0.9, out=np.zeros((5, 2), dtype=np.float64)
        )
    with pytest.raises(TypeError):
        rollscan.gae(r, r, gamma=0.9, lam=0.9, out=(np.zeros((5, 2)), np.zeros((5, 2), np.int64)))


def test_time_axis_out_of_range():
    with pytest.raises((ValueError, IndexError)):
        rollscan.discounted_returns(np.zeros((4, 3)), gamma=0.9, time_axis=2)
    with pytest.raises((ValueError, IndexError)):
        rollscan.gae(np.zeros((4, 3)), np.zeros((4, 3)), gamma=0.9, lam=0.9, time_axis=-3)


# --------------------------------------------------------------------------
# What an error leaves in out=
# --------------------------------------------------------------------------

# The README's rule: arguments (shapes, dtypes, gamma, lam, lengths, clip
# levels) are checked before anything is written, so those errors leave
# `out` as it was; a non-finite value, or a truncated step without
# next_values, is found while the kernel runs and can leave it partly
# written. Common practice, no source.


def _bad_argument_calls(out1, out2):
    t, n = out1.shape
    r = np.ones((t, n))
    v = np.zeros((t, n))
    return [
        (ShapeError, lambda: rollscan.gae(r, v[:-1], gamma=0.9, lam=0.9, out=(out1, out2))),
        (InputError, lambda: rollscan.gae(r, v, gamma=1.5, lam=0.9, out=(out1, out2))),
        (
            ShapeError,
            lambda: rollscan.discounted_returns(r, gamma=0.9, bootstrap=np.zeros(n + 1), out=out1),
        ),
        (
            InputError,
            lambda: ragged.discounted_returns(
                r.ravel(), np.array([t * n - 1]), gamma=0.9, out=out1.ravel()
            ),
        ),
        (
            InputError,
            lambda: rollscan.vtrace(v, v, r, v, gamma=0.9, rho_bar=-1.0, out=(out1, out2)),
        ),
    ]


def test_argument_errors_leave_out_untouched():
    out1, out2 = np.full((64, 300), 7.0), np.full((64, 300), 7.0)
    for i, (err, call) in enumerate(_bad_argument_calls(out1, out2)):
        with pytest.raises(err):
            call()
        assert (out1 == 7.0).all() and (out2 == 7.0).all(), f"call {i} wrote to out"


def test_errors_found_while_running_still_name_the_first_index():
    # These checks run inside the kernel: the error still names the first
    # offending element, whatever the kernel already wrote.
    r = np.ones((64, 300))
    r[10, 5] = np.nan
    out = (np.empty_like(r), np.empty_like(r))
    with pytest.raises(InputError) as ei:
        rollscan.gae(r, np.zeros_like(r), gamma=0.9, lam=0.9, out=out)
    assert_names_index(_msg(ei), "rewards", (10, 5))
    tr = np.zeros(r.shape, bool)
    tr[3, 7] = tr[20, 1] = True
    with pytest.raises(InputError) as ei:
        rollscan.gae(np.ones_like(r), np.zeros_like(r), gamma=0.9, lam=0.9, truncated=tr, out=out)
    assert_names_index(_msg(ei), "truncated", (3, 7))


# --------------------------------------------------------------------------
# Numeric flags
# --------------------------------------------------------------------------


@pytest.mark.parametrize("dtype", [np.int8, np.uint8, np.int64, np.float32, np.float64])
def test_numeric_flags_of_zero_and_one_act_as_bool(dtype):
    rng = np.random.default_rng(5)
    r = rng.normal(size=(40, 3))
    te = rng.random((40, 3)) < 0.2
    want = rollscan.discounted_returns(r, te, gamma=0.9)
    np.testing.assert_array_equal(rollscan.discounted_returns(r, te.astype(dtype), gamma=0.9), want)
    # other layouts read the same flags as their bool conversion
    for flags in (np.asfortranarray(te.astype(dtype)), te.astype(dtype)[::-1]):
        got = rollscan.discounted_returns(r, flags, gamma=0.9)
        np.testing.assert_array_equal(got, rollscan.discounted_returns(r, flags != 0, gamma=0.9))


@pytest.mark.parametrize("bad", [2, -1, 0.5, np.nan])
def test_numeric_flags_other_than_zero_and_one_are_refused(bad):
    # The stored-rollout reader refuses such flag columns too (same rule).
    te = np.zeros((6, 3))
    te[4, 2] = bad
    te[5, 0] = bad
    # C-contiguous (one Rust pass), Fortran order and a strided view (NumPy's
    # comparisons) name the same first element in C order.
    for layout in (te, np.asfortranarray(te), np.repeat(te, 2, axis=1)[:, ::2]):
        with pytest.raises(InputError) as ei:
            rollscan.discounted_returns(np.ones((6, 3)), layout, gamma=0.9)
        assert_names_index(_msg(ei), "terminated", (4, 2))
    with pytest.raises(InputError) as ei:
        ragged.gae(
            np.ones(3),
            np.zeros(3),
            np.array([1, 2]),
            gamma=0.9,
            lam=0.9,
            terminal=np.array([1.0, bad]),
        )
    assert_names_index(_msg(ei), "terminal", (1,))
    mask = np.ones((2, 3))
    mask[1, 1] = bad
    with pytest.raises(InputError) as ei:
        rollscan.categorical_entropy(np.zeros((2, 3)), mask=mask)
    assert_names_index(_msg(ei), "mask", (1, 1))


def test_out_overlapping_an_input_or_the_other_output():
    r = np.ones((5, 3))
    with pytest.raises(InputError, match="out overlaps"):
        rollscan.discounted_returns(r, gamma=0.9, out=r)
    o = np.zeros((5, 3))
    with pytest.raises(InputError, match=r"out\[1\] overlaps"):
        rollscan.gae(r, np.zeros((5, 3)), gamma=0.9, lam=0.9, out=(o, o))
    # normalize documents in-place support: out=x is allowed
    x = np.arange(4.0)
    assert rollscan.normalize(x, out=x) is x


def test_heads_name_an_overlapping_output_the_same_way():
    logits = np.zeros((4, 3))
    o = np.zeros(4)
    with pytest.raises(InputError, match=r"out\[1\] overlaps"):
        rollscan.categorical_log_prob_entropy(logits, np.zeros(4, np.int64), out=(o, o))
    with pytest.raises(InputError, match=r"out\[0\] overlaps"):
        rollscan.gaussian_score(logits, np.zeros(3), logits.copy(), out=(logits, np.zeros((4, 3))))
