"""Plain NumPy float64 reference implementations of the core kernels.

Written from the definitions in the public contract (sections
2 and 3), not from the Rust code: simple backward loops over time, vectorised
over streams only. Everything is computed in float64.
"""

from __future__ import annotations

import numpy as np


def _streams(x, time_axis):
    """Move time to axis 0 and fold every other axis into one: ``[T, M]``."""
    a = np.moveaxis(np.asarray(x, dtype=np.float64), time_axis, 0)
    return a.reshape(a.shape[0], -1), a.shape


def _flag_streams(x, shape, time_axis):
    if x is None:
        return np.zeros((shape[0], int(np.prod(shape[1:], dtype=np.int64))), dtype=bool)
    a = np.moveaxis(np.asarray(x, dtype=bool), time_axis, 0)
    return a.reshape(a.shape[0], -1)


def _unstreams(y, moved_shape, time_axis):
    return np.moveaxis(y.reshape(moved_shape), 0, time_axis)


def _per_stream(bootstrap, moved_shape):
    m = int(np.prod(moved_shape[1:], dtype=np.int64))
    if bootstrap is None:
        return np.zeros(m)
    return np.broadcast_to(np.asarray(bootstrap, dtype=np.float64), moved_shape[1:]).reshape(m)


def _check_rules(truncated, next_values, bootstrap):
    if bootstrap is not None and next_values is not None:
        raise ValueError("bootstrap together with next_values")
    if next_values is None and truncated is not None and np.any(truncated):
        raise ValueError("truncated steps need next_values")


def discounted_returns(
    rewards,
    terminated=None,
    *,
    gamma,
    truncated=None,
    next_values=None,
    bootstrap=None,
    time_axis=0,
):
    """contract section 2:

    G_t = r_t + gamma * X_t
    X_t = 0               if terminated_t
        = next_values[t]  if truncated_t, or t = T-1 and next_values given
        = bootstrap       if t = T-1 (not truncated, next_values not given)
        = G_{t+1}         otherwise
    """
    _check_rules(truncated, next_values, bootstrap)
    r, shape = _streams(rewards, time_axis)
    term = _flag_streams(terminated, shape, time_axis)
    trunc = _flag_streams(truncated, shape, time_axis)
    nv = None if next_values is None else _streams(next_values, time_axis)[0]
    boot = _per_stream(bootstrap, shape)
    t_len = r.shape[0]
    g = np.zeros_like(r)
    for t in range(t_len - 1, -1, -1):
        if t == t_len - 1:
            follow = nv[t] if nv is not None else boot
        else:
            follow = g[t + 1]
        if nv is not None:
            follow = np.where(trunc[t], nv[t], follow)
        follow = np.where(term[t], 0.0, follow)
        g[t] = r[t] + gamma * follow
    return _unstreams(g, shape, time_axis)


def gae(
    rewards,
    values,
    terminated=None,
    *,
    gamma,
    lam,
    truncated=None,
    next_values=None,
    bootstrap=None,
    normalize=False,
    eps=1e-8,
    time_axis=0,
):
    """contract section 2 (Schulman et al. 2016, eq. 16):

    V'_t    = 0 if terminated_t; next_values[t] if given;
              values[t+1] if t < T-1 and not truncated_t; bootstrap at T-1
    delta_t = r_t + gamma * V'_t - values[t]
    A_t     = delta_t + gamma * lam * (1 - end_t) * A_{t+1},  A_T = 0
    returns = A + values
    """
    _check_rules(truncated, next_values, bootstrap)
    r, shape = _streams(rewards, time_axis)
    v, _ = _streams(values, time_axis)
    term = _flag_streams(terminated, shape, time_axis)
    trunc = _flag_streams(truncated, shape, time_axis)
    nv = None if next_values is None else _streams(next_values, time_axis)[0]
    boot = _per_stream(bootstrap, shape)
    t_len = r.shape[0]
    adv = np.zeros_like(r)
    for t in range(t_len - 1, -1, -1):
        if nv is not None:
            vnext = nv[t]
        elif t == t_len - 1:
            vnext = boot
        else:
            vnext = v[t + 1]
        vnext = np.where(term[t], 0.0, vnext)
        delta = r[t] + gamma * vnext - v[t]
        carry = adv[t + 1] if t < t_len - 1 else np.zeros_like(delta)
        end = term[t] | trunc[t]
        adv[t] = delta + gamma * lam * np.where(end, 0.0, carry)
    ret = adv + v
    if normalize:
        adv = (adv - adv.mean()) / (adv.std() + eps) if adv.size else adv
    return _unstreams(adv, shape, time_axis), _unstreams(ret, shape, time_axis)


def normalize(x, *, eps=1e-8, ddof=0, mask=None):
    """contract section 2: (x - mean) / (std + eps) over the selected elements,
    the rest copied unchanged (NumPy mean/std with ddof)."""
    x = np.asarray(x, dtype=np.float64)
    sel = np.ones(x.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    out = x.copy()
    chosen = x[sel]
    out[sel] = (chosen - chosen.mean()) / (chosen.std(ddof=ddof) + eps)
    return out


def _piece_bounds(lengths):
    lengths = np.asarray(lengths, dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    return starts, lengths


def ragged_discounted_returns(rewards, lengths, *, gamma, terminal=None, tail_values=None):
    """contract section 3: per piece, G = r + gamma * G_next inside, and at the
    last step G = r + gamma * (0 if terminal[e] else tail_values[e])."""
    r = np.asarray(rewards, dtype=np.float64)
    starts, lens = _piece_bounds(lengths)
    n = len(lens)
    term = np.ones(n, dtype=bool) if terminal is None else np.asarray(terminal, dtype=bool)
    tail = np.zeros(n) if tail_values is None else np.asarray(tail_values, dtype=np.float64)
    g = np.zeros_like(r)
    for e in range(n):
        s, length = int(starts[e]), int(lens[e])
        follow = 0.0 if term[e] else float(tail[e])
        for t in range(s + length - 1, s - 1, -1):
            follow = r[t] + gamma * follow
            g[t] = follow
    return g


def ragged_gae(
    rewards,
    values,
    lengths,
    *,
    gamma,
    lam,
    terminal=None,
    tail_values=None,
    tail_advantages=None,
    normalize=False,
    eps=1e-8,
):
    """contract section 3 with the per-piece ``tail_advantages`` keyword: at the
    last step of a piece V' = 0 if terminal else tail_values[e], and the
    advantage carried in is 0 if terminal else tail_advantages[e] (default 0)."""
    r = np.asarray(rewards, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    starts, lens = _piece_bounds(lengths)
    n = len(lens)
    term = np.ones(n, dtype=bool) if terminal is None else np.asarray(terminal, dtype=bool)
    tail = np.zeros(n) if tail_values is None else np.asarray(tail_values, dtype=np.float64)
    tadv = np.zeros(n) if tail_advantages is None else np.asarray(tail_advantages, np.float64)
    adv = np.zeros_like(r)
    for e in range(n):
        s, length = int(starts[e]), int(lens[e])
        vnext = 0.0 if term[e] else float(tail[e])
        anext = 0.0 if term[e] else float(tadv[e])
        for t in range(s + length - 1, s - 1, -1):
            a = r[t] + gamma * vnext - v[t] + gamma * lam * anext
            adv[t] = a
            vnext, anext = v[t], a
    ret = adv + v
    if normalize and adv.size:
        adv = (adv - adv.mean()) / (adv.std() + eps)
    return adv, ret


def ragged_episode_sums(x, lengths, *, gamma=1.0):
    """contract section 3: per piece sum_k gamma^k x[start_e + k] (0 if empty)."""
    x = np.asarray(x, dtype=np.float64)
    starts, lens = _piece_bounds(lengths)
    out = np.zeros(len(lens))
    for e in range(len(lens)):
        acc = 0.0
        for t in range(int(starts[e] + lens[e]) - 1, int(starts[e]) - 1, -1):
            acc = x[t] + gamma * acc
        out[e] = acc
    return out
