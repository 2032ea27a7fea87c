"""NumPy reference versions of the three ragged kernels the stored pipeline calls.

They follow the ragged contract (pieces stored back to back, ``lengths`` per
piece, ``terminal`` and ``tail_values`` per piece, plus the ``tail_advantages``
carry of ``gae``) and are written straight from the definitions:

    delta_t = r_t + gamma * V'_t - V(s_t)            (Schulman et al. 2016, eq. 16)
    A_t     = delta_t + gamma * lam * A_{t+1}        inside a piece
    G_t     = r_t + gamma * G_{t+1}                  inside a piece

The reverse scan runs over the position counted from each piece's end, all
pieces at once, so it costs one small NumPy step per step of the longest
piece. This is the path ``rollscan process --kernels numpy`` and the demo use
as the reference next to the compiled kernels; it is not meant to be fast.
"""

from __future__ import annotations

import numpy as np


def _pieces(lengths, n_steps):
    lengths = np.asarray(lengths, dtype=np.int64)
    if lengths.ndim != 1 or (lengths < 0).any() or int(lengths.sum()) != n_steps:
        raise ValueError("lengths must be non-negative and sum to the number of steps")
    ends = np.cumsum(lengths)
    return lengths, ends - lengths, ends


def _per_piece(x, n, default):
    if x is None:
        return np.full(n, default)
    return np.asarray(x)


def _scan_rev(x, c, carry, lengths, starts):
    """y_t = x_t + c_t * y_{t+1} inside each piece, with y = carry after its last step."""
    y = np.array(x, dtype=np.float64)
    last = starts + lengths - 1
    order = np.argsort(-lengths, kind="stable")
    sorted_len = lengths[order]
    acc = np.array(carry, dtype=np.float64)[order]
    for k in range(int(sorted_len[0]) if len(sorted_len) else 0):
        # pieces longer than k are the first `active` ones in `order`
        active = int(np.searchsorted(-sorted_len, -k, side="left"))
        idx = last[order[:active]] - k
        acc[:active] = y[idx] + c[idx] * acc[:active]
        y[idx] = acc[:active]
    return y


def discounted_returns(
    rewards, lengths, *, gamma, terminal=None, tail_values=None, check_finite=True, out=None
):
    r = np.asarray(rewards, dtype=np.float64)
    lengths, starts, _ = _pieces(lengths, r.shape[0])
    term = _per_piece(terminal, len(lengths), True).astype(bool)
    tail = _per_piece(tail_values, len(lengths), 0.0).astype(np.float64)
    carry = np.where(term, 0.0, tail)
    g = _scan_rev(r, np.full(r.shape, float(gamma)), carry, lengths, starts)
    if out is not None:
        out[...] = g
        return out
    return g


def gae(
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
    check_finite=True,
    out=None,
):
    r = np.asarray(rewards, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    lengths, starts, ends = _pieces(lengths, r.shape[0])
    term = _per_piece(terminal, len(lengths), True).astype(bool)
    tail = _per_piece(tail_values, len(lengths), 0.0).astype(np.float64)
    tail_a = _per_piece(tail_advantages, len(lengths), 0.0).astype(np.float64)
    v_next = np.empty_like(v)
    v_next[:-1] = v[1:]
    nonempty = lengths > 0
    v_next[ends[nonempty] - 1] = np.where(term, 0.0, tail)[nonempty]
    delta = r + gamma * v_next - v
    carry = np.where(term, 0.0, tail_a)
    c = np.full(r.shape, float(gamma) * float(lam))
    adv = _scan_rev(delta, c, carry, lengths, starts)
    ret = adv + v
    if normalize:
        adv = (adv - adv.mean()) / (adv.std() + eps)
    if out is not None:
        out[0][...] = adv
        out[1][...] = ret
        return out
    return adv, ret


def episode_sums(x, lengths, *, gamma=1.0):
    x = np.asarray(x, dtype=np.float64)
    lengths, starts, _ = _pieces(lengths, x.shape[0])
    if gamma == 1.0:
        sums = np.zeros(len(lengths))
        nonempty = lengths > 0
        if nonempty.any():
            sums[nonempty] = np.add.reduceat(x, starts[nonempty])
        return sums
    g = _scan_rev(x, np.full(x.shape, float(gamma)), np.zeros(len(lengths)), lengths, starts)
    sums = np.zeros(len(lengths))
    nonempty = lengths > 0
    sums[nonempty] = g[starts[nonempty]]
    return sums
