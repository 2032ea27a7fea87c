"""Shared helpers: random rollout buffers and checks on error messages."""

from __future__ import annotations

import re

import numpy as np

F32_RTOL = 2e-7  # one rounding to float32 is at most half an ulp (2**-24); 1 ulp of slack


def timemajor_buffer(rng, shape, time_axis=0, *, kind="next_values", p_end=0.15):
    """Random time-major inputs of ``shape`` with time on ``time_axis``.

    kind: "plain" (terminated only), "bootstrap" (terminated + per-stream
    bootstrap) or "next_values" (terminated, truncated and next_values, with
    next_values[t] == values[t+1] inside episodes so the lam=1 identity holds).
    """
    rewards = rng.normal(size=shape)
    values = rng.normal(size=shape)
    terminated = rng.random(shape) < p_end
    d = {"rewards": rewards, "values": values, "terminated": terminated}
    if kind == "bootstrap":
        stream_shape = np.moveaxis(rewards, time_axis, 0).shape[1:]
        d["bootstrap"] = rng.normal(size=stream_shape)
    elif kind == "next_values":
        truncated = rng.random(shape) < p_end
        # V(s_{t+1}) as seen at step t: values[t+1] inside an episode, a fresh
        # value (the final observation) at a cut and after the last row.
        v_t = np.moveaxis(values, time_axis, 0)
        nv = np.empty_like(v_t)
        nv[:-1] = v_t[1:]
        nv[-1:] = rng.normal(size=nv[-1:].shape)
        cut = np.moveaxis(truncated, time_axis, 0)
        nv[cut] = rng.normal(size=int(cut.sum()))
        d["truncated"] = truncated
        d["next_values"] = np.moveaxis(nv, 0, time_axis).copy()
    return d


def ragged_buffer(rng, lengths, *, p_terminal=0.6):
    lengths = np.asarray(lengths, dtype=np.int64)
    s = int(lengths.sum())
    e = len(lengths)
    return {
        "rewards": rng.normal(size=s),
        "values": rng.normal(size=s),
        "lengths": lengths,
        "terminal": rng.random(e) < p_terminal,
        "tail_values": rng.normal(size=e),
    }


def as_one_stream(lengths, terminal, tail_values, values):
    """The time-major flags of a ragged layout seen as one stream: terminated at
    terminal piece ends, truncated with next_values = tail_values at the other
    piece ends, next_values = values[t+1] inside pieces (contract section 3)."""
    lengths = np.asarray(lengths, dtype=np.int64)
    s = int(lengths.sum())
    values = np.asarray(values, dtype=np.float64)
    terminated = np.zeros(s, dtype=bool)
    truncated = np.zeros(s, dtype=bool)
    next_values = np.zeros(s)
    next_values[:-1] = values[1:]
    ends = np.cumsum(lengths) - 1
    for e, end in enumerate(ends):
        if lengths[e] == 0:
            continue
        if terminal[e]:
            terminated[end] = True
            next_values[end] = 0.0
        else:
            truncated[end] = True
            next_values[end] = tail_values[e]
    return terminated, truncated, next_values


def scale_atol(ref, factor=1e-12):
    ref = np.asarray(ref)
    return factor * (float(np.max(np.abs(ref))) if ref.size else 1.0)


def _shapes_in(msg):
    """Every shape written in the message as (a, b), [a, b] or a x b."""
    found = set()
    for group in re.findall(r"[\(\[]\s*([\d,\s]*)[\)\]]", msg):
        nums = tuple(int(n) for n in re.findall(r"\d+", group))
        found.add(nums)
    for group in re.findall(r"\b\d+(?:\s*x\s*\d+)+\b", msg):
        found.add(tuple(int(n) for n in re.findall(r"\d+", group)))
    return found


def assert_names_shapes(msg, names, shapes):
    """ShapeError rule (contract section 1): names both arguments and both shapes."""
    for name in names:
        assert name in msg, f"{name!r} not named in {msg!r}"
    found = _shapes_in(msg)
    for shape in shapes:
        assert tuple(shape) in found, f"shape {tuple(shape)} not in {msg!r}"


def mentions_index(msg, index):
    """True when the message writes ``index`` (an int or a tuple) as numbers
    in order, e.g. "[4]", "index 4", "(2, 1)", "t=2, stream 1"."""
    idx = (index,) if isinstance(index, (int, np.integer)) else tuple(index)
    pattern = r"\D+".join(rf"(?<!\d){int(i)}(?!\d)" for i in idx)
    return re.search(pattern, msg) is not None


def assert_names_index(msg, name, index):
    """InputError rule (contract section 1): names the argument and the index."""
    assert name in msg, f"{name!r} not named in {msg!r}"
    assert mentions_index(msg, index), f"index {index} not in {msg!r}"
