"""Exact returns and advantages over shards and chunks with bounded memory.

Engine-independent pure functions; a run is

    plan_shard -> summarise_chunk (pass 1, per chunk) -> combine (one cheap
    sequential pass over the summaries) -> finish_chunk (pass 2, per chunk)

The reverse recurrences are linear. Per stream, a chunk's segment (the rows of
that stream inside the chunk, in time order) is cut into pieces at episode
ends. Everything inside the segment is fixed by the chunk's own rows except the
last piece when it is still open at the chunk's end: it needs the carry
``(V, A, G)`` of the stream's next step, which lives in a later chunk. And what
the segment hands to the chunk before it, its first step's ``A`` (or ``G``), is
an affine function of that incoming carry:

    A_first = head_A + f_v * V_in + f_A * A_in     f_A = (gamma*lam)^L, f_v = gamma*(gamma*lam)^(L-1)
    G_first = head_G + f_G * G_in                  f_G = gamma^L

with ``head`` the value computed with a zero carry and the factors 0 when an
episode ends inside the segment. Pass 1 records ``head``, the factors, the
first value and the last next-value per segment; :func:`combine` walks the
chunks right to left and gives every chunk its exact incoming carries; pass 2
recomputes each chunk with them (``tail_values`` / ``tail_advantages``).

Within a chunk the bootstrap rules are those of one file holding every step:
inside an episode a step bootstraps from the value of its stream's next step;
a truncated step from its next value; a terminated step from 0; the last step
of a stream that has not ended from its next value when that column exists,
else from 0 (the episode is reported as ``open``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .schema import ChunkData

#: Episode endings as stored in the per-episode table.
OPEN, TERMINATED, TRUNCATED = "open", "terminated", "truncated"
_ENDINGS = np.array([OPEN, TERMINATED, TRUNCATED])


@dataclass(frozen=True)
class Params:
    gamma: float
    lam: float | None  # None: discounted returns only (no value column)

    @property
    def gae(self) -> bool:
        return self.lam is not None


def plan_shard(n_rows: int, width: int | None, chunk_steps: int) -> list:
    """Row boundaries ``[0, b1, ..., n_rows]`` of the chunks of one shard.

    A chunk holds at most ``chunk_steps`` steps (rows times streams, at least one row).
    """
    rows = max(1, chunk_steps // (width or 1))
    bounds = [*range(0, n_rows, rows), n_rows]
    return bounds if n_rows else [0]


@dataclass
class Layout:
    """The chunk's steps reordered stream by stream (time order inside a stream)."""

    order: np.ndarray | None  # stream-major position -> row-major step; None = identity
    ids: np.ndarray  # stream id of each segment, ascending
    starts: np.ndarray  # first stream-major position of each segment
    counts: np.ndarray  # steps of each segment

    def take(self, x):
        return x if self.order is None or x is None else x[self.order]

    def put(self, y):
        if self.order is None:
            return y
        out = np.empty_like(y)
        out[self.order] = y
        return out


def _stable_order(stream: np.ndarray) -> np.ndarray:
    """Stable argsort of stream ids; a radix sort when their span fits in 16 bits."""
    if stream.size and int(stream.max()) - int(stream.min()) < 1 << 16:
        return np.argsort((stream - stream.min()).astype(np.uint16), kind="stable")
    return np.argsort(stream, kind="stable")


def layout(chunk: ChunkData) -> Layout:
    n, width = chunk.size, chunk.width
    if chunk.stream is not None:
        order = _stable_order(chunk.stream)
        s = chunk.stream[order]
        starts = np.flatnonzero(np.r_[True, s[1:] != s[:-1]]) if n else np.zeros(0, np.int64)
        counts = np.diff(np.r_[starts, n])
        return Layout(order, s[starts], starts, counts)
    rows = n // width
    order = None if width == 1 else np.arange(n).reshape(rows, width).T.ravel()
    ids = np.arange(width, dtype=np.int64)
    return Layout(order, ids, ids * rows, np.full(width, rows, dtype=np.int64))


@dataclass
class Pieces:
    """The chunk cut at episode ends and stream boundaries (stream-major order)."""

    last: np.ndarray  # stream-major position of each piece's last step
    lengths: np.ndarray
    ending: np.ndarray  # 0 open at the chunk's end, 1 terminated, 2 truncated
    segment: np.ndarray  # segment (stream) index of each piece


def pieces(chunk: ChunkData, lay: Layout) -> Pieces:
    term = lay.take(chunk.terminated)
    trunc = lay.take(chunk.truncated)
    cut = term | trunc
    seg_last = lay.starts + lay.counts - 1
    cut[seg_last] = True
    last = np.flatnonzero(cut)
    lengths = np.diff(np.r_[-1, last])
    ending = np.where(term[last], 1, np.where(trunc[last], 2, 0)).astype(np.int8)
    segment = np.searchsorted(lay.starts, last, side="right") - 1
    return Pieces(last, lengths, ending, segment)


def _kernel(kernels, params, chunk, lay, pcs, carry_v, carry_a, carry_g):
    """One call of the ragged kernel over the chunk with the given per-segment carries."""
    r = lay.take(chunk.reward)
    nv = lay.take(chunk.next_value)
    open_ = pcs.ending == 0
    terminal = pcs.ending == 1
    at_cut = nv[pcs.last] if nv is not None else np.zeros(len(pcs.last))
    if params.gae:
        v = lay.take(chunk.value)
        tail_v = np.where(open_, carry_v[pcs.segment], np.where(terminal, 0.0, at_cut))
        tail_a = np.where(open_, carry_a[pcs.segment], 0.0)
        adv, ret = kernels.gae(
            r,
            v,
            pcs.lengths,
            gamma=params.gamma,
            lam=params.lam,
            terminal=terminal,
            tail_values=tail_v,
            tail_advantages=tail_a,
            check_finite=False,
        )
        return adv, ret
    tail_g = np.where(open_, carry_g[pcs.segment], np.where(terminal, 0.0, at_cut))
    ret = kernels.discounted_returns(
        r,
        pcs.lengths,
        gamma=params.gamma,
        terminal=terminal,
        tail_values=tail_g,
        check_finite=False,
    )
    return None, ret


@dataclass
class ChunkSummary:
    """What pass 1 keeps of a chunk: per segment carries, per piece episode data."""

    ids: np.ndarray  # stream id per segment
    v_first: np.ndarray
    nv_last: np.ndarray  # bootstrap for a stream's very last step (next value or 0)
    head_a: np.ndarray
    head_g: np.ndarray
    f_v: np.ndarray
    f_a: np.ndarray
    f_g: np.ndarray
    # per piece, in stream-major order
    piece_stream: np.ndarray
    piece_row: np.ndarray  # row (time index) of the piece's first step in its shard
    piece_shard: np.ndarray
    piece_len: np.ndarray
    piece_sum: np.ndarray
    piece_disc: np.ndarray
    piece_ending: np.ndarray


def summarise_chunk(chunk: ChunkData, params: Params, kernels, *, bootstrap=True) -> ChunkSummary:
    """Pass 1 over one chunk. With ``bootstrap=False`` only the episode data is kept."""
    lay = layout(chunk)
    pcs = pieces(chunk, lay)
    r = lay.take(chunk.reward)
    first = pcs.last - pcs.lengths + 1
    first_step = first if lay.order is None else lay.order[first]
    nseg = len(lay.ids)
    zeros = np.zeros(nseg)
    summary = ChunkSummary(
        ids=lay.ids,
        v_first=zeros,
        nv_last=zeros,
        head_a=zeros,
        head_g=zeros,
        f_v=zeros,
        f_a=zeros,
        f_g=zeros,
        piece_stream=lay.ids[pcs.segment],
        piece_row=chunk.row0 + first_step // chunk.width,
        piece_shard=np.full(len(pcs.last), chunk.shard, dtype=np.int64),
        piece_len=pcs.lengths,
        piece_sum=np.asarray(kernels.episode_sums(r, pcs.lengths, gamma=1.0), dtype=np.float64),
        piece_disc=np.asarray(
            kernels.episode_sums(r, pcs.lengths, gamma=params.gamma), dtype=np.float64
        ),
        piece_ending=pcs.ending,
    )
    if not bootstrap:
        return summary
    adv, ret = _kernel(kernels, params, chunk, lay, pcs, zeros, zeros, zeros)
    # a segment lets a carry through only when it is a single open piece
    one_open = np.zeros(nseg, dtype=bool)
    single = np.bincount(pcs.segment, minlength=nseg) == 1
    one_open[pcs.segment[pcs.ending == 0]] = True
    one_open &= single
    length = lay.counts.astype(np.float64)
    g = params.gamma
    if params.gae:
        gl = g * params.lam
        summary.head_a = np.asarray(adv[lay.starts], dtype=np.float64)
        summary.f_a = np.where(one_open, gl**length, 0.0)
        summary.f_v = np.where(one_open, g * gl ** (length - 1), 0.0)
        summary.v_first = lay.take(chunk.value)[lay.starts]
    else:
        summary.head_g = np.asarray(ret[lay.starts], dtype=np.float64)
        summary.f_g = np.where(one_open, g**length, 0.0)
    if chunk.next_value is not None:
        summary.nv_last = lay.take(chunk.next_value)[lay.starts + lay.counts - 1]
    return summary


@dataclass
class ChunkCarry:
    """The carries entering a chunk from the right, aligned with its segments."""

    v: np.ndarray
    a: np.ndarray
    g: np.ndarray


def combine(summaries: list) -> list:
    """Right-to-left pass over the chunks of the whole data set, in data order."""
    if not summaries:
        return []
    streams = np.unique(np.concatenate([s.ids for s in summaries]))
    seen = np.zeros(len(streams), dtype=bool)
    cv, ca, cg = (np.zeros(len(streams)) for _ in range(3))
    carries = [None] * len(summaries)
    for k in range(len(summaries) - 1, -1, -1):
        s = summaries[k]
        d = np.searchsorted(streams, s.ids)
        later = seen[d]
        in_v = np.where(later, cv[d], s.nv_last)
        in_a = np.where(later, ca[d], 0.0)
        in_g = np.where(later, cg[d], s.nv_last)
        carries[k] = ChunkCarry(in_v, in_a, in_g)
        cv[d] = s.v_first
        ca[d] = s.head_a + s.f_v * in_v + s.f_a * in_a
        cg[d] = s.head_g + s.f_g * in_g
        seen[d] = True
    return carries


def finish_chunk(chunk: ChunkData, carry: ChunkCarry, params: Params, kernels):
    """Pass 2 over one chunk: ``(advantages or None, returns)`` in row-major step order."""
    lay = layout(chunk)
    pcs = pieces(chunk, lay)
    adv, ret = _kernel(kernels, params, chunk, lay, pcs, carry.v, carry.a, carry.g)
    ret = lay.put(np.asarray(ret, dtype=np.float64))
    return (None if adv is None else lay.put(np.asarray(adv, dtype=np.float64))), ret


def episode_table(summaries: list, gamma: float) -> dict:
    """Stitch the pieces of every stream into episodes, ordered by their first step."""
    cat = {
        name: np.concatenate([getattr(s, name) for s in summaries])
        if summaries
        else np.zeros(0, dtype=np.int8 if name == "piece_ending" else np.float64)
        for name in (
            "piece_stream",
            "piece_row",
            "piece_shard",
            "piece_len",
            "piece_sum",
            "piece_disc",
            "piece_ending",
        )
    }
    # stable sort by stream keeps data order inside each stream
    o = _stable_order(cat["piece_stream"])
    stream, shard, row = (
        cat.pop("piece_stream")[o],
        cat.pop("piece_shard")[o],
        cat.pop("piece_row")[o],
    )
    length = cat.pop("piece_len")[o].astype(np.int64)
    psum, pdisc = cat.pop("piece_sum")[o], cat.pop("piece_disc")[o]
    ending = cat.pop("piece_ending")[o]
    n = len(o)
    del o
    starts_ep = np.ones(n, dtype=bool)
    if n:
        starts_ep[1:] = (stream[1:] != stream[:-1]) | (ending[:-1] != 0)
    group = np.cumsum(starts_ep) - 1
    first = np.flatnonzero(starts_ep)
    last = np.r_[first[1:], n] - 1
    cum = np.cumsum(length) - length  # steps before each piece, in the sorted order
    offset = cum - cum[first][group] if n else cum
    ep_len = np.add.reduceat(length, first) if n else np.zeros(0, np.int64)
    ep_ret = np.add.reduceat(psum, first) if n else np.zeros(0)
    ep_disc = (
        np.add.reduceat(pdisc * np.power(gamma, offset.astype(np.float64)), first)
        if n
        else np.zeros(0)
    )
    key = np.lexsort((stream[first], row[first], shard[first]))
    table = {
        "episode": np.arange(len(first), dtype=np.int64),
        "stream": stream[first][key].astype(np.int64),
        "shard": shard[first][key].astype(np.int64),
        "first_row": row[first][key].astype(np.int64),
        "length": ep_len[key].astype(np.int64),
        "return": ep_ret[key].astype(np.float64),
        "discounted_return": ep_disc[key].astype(np.float64),
        "ending": _ENDINGS[ending[last][key].astype(np.int64)],
    }
    return table
