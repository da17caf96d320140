"""Ring all-reduce (Patarasuk & Yuan 2009), written once over an abstract step.

The vector is cut into k chunks (`ring_chunks`, sizes as np.array_split). In k-1
reduce-scatter steps, rank r sends chunk (r - s) mod k to its right neighbour and adds the
chunk (r - s - 1) mod k arriving from its left one; afterwards rank r holds the complete sum of
chunk (r + 1) mod k. In k-1 all-gather steps these finished chunks travel once round the
ring and are copied, never re-added: each chunk's sum is computed on exactly one rank, so
every rank ends with the same bits, in float32 too.

Each rank sends 2(k-1) frames and `ring_send_elements` elements, which is 2(k-1)/k of the
vector up to chunk rounding. The survey predicts all-reduce traffic with that function, and
the transports count what they actually send, so the two must agree exactly.
"""
from __future__ import annotations

from typing import Callable

import numpy as np

REDUCE_SCATTER = "reduce-scatter"
ALL_GATHER = "all-gather"

# sendrecv(dst, send_view, src, recv_view, direction, step): send send_view to dst and fill
# recv_view from src *at the same time* (a ring step in which everyone sends first would
# deadlock on pipes whose buffer is smaller than a chunk).
SendRecv = Callable[[int, np.ndarray, int, np.ndarray, str, int], None]


def ring_chunks(size: int, k: int) -> np.ndarray:
    """k+1 chunk bounds of a vector of `size` elements, the first size % k chunks one longer."""
    if k < 1 or size < 0:
        raise ValueError(f"ring_chunks needs k >= 1 and size >= 0, got size={size}, k={k}")
    lengths = np.full(k, size // k, dtype=np.int64)
    lengths[: size % k] += 1
    return np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)


def ring_send_elements(size: int, k: int) -> np.ndarray:
    """Elements each rank sends in one all-reduce: all chunks but (r+1) in the reduce-scatter,
    all but (r+2) in the all-gather (mod k)."""
    if k == 1:
        return np.zeros(1, dtype=np.int64)
    lengths = np.diff(ring_chunks(size, k))
    r = np.arange(k)
    return 2 * size - lengths[(r + 1) % k] - lengths[(r + 2) % k]


def ring_steps(size: int, k: int, rank: int) -> list[tuple[str, int, int, int]]:
    """(direction, step, elements sent to the right, elements received from the left) of
    every step of `rank`, in order: what `ring_allreduce` does, without doing it."""
    if k == 1:
        return []
    lengths = np.diff(ring_chunks(size, k))
    steps = [(REDUCE_SCATTER, s, int(lengths[(rank - s) % k]), int(lengths[(rank - s - 1) % k]))
             for s in range(k - 1)]
    steps += [(ALL_GATHER, s, int(lengths[(rank + 1 - s) % k]), int(lengths[(rank - s) % k]))
              for s in range(k - 1)]
    return steps


def ring_frames(k: int) -> int:
    """Frames each rank sends in one all-reduce."""
    return 2 * (k - 1)


def ring_allreduce(buf: np.ndarray, rank: int, k: int, sendrecv: SendRecv) -> None:
    """Sum `buf` (1-D, contiguous) over the k ranks in place."""
    if buf.ndim != 1 or not buf.flags.c_contiguous or not buf.flags.writeable:
        raise ValueError("ring_allreduce needs a writeable, contiguous 1-D array")
    if k == 1:
        return
    bounds = ring_chunks(buf.size, k)
    right, left = (rank + 1) % k, (rank - 1) % k

    def chunk(c: int) -> np.ndarray:
        c %= k
        return buf[bounds[c]:bounds[c + 1]]

    scratch = np.empty(int(np.diff(bounds).max()), dtype=buf.dtype)
    for s in range(k - 1):
        outgoing, target = chunk(rank - s), chunk(rank - s - 1)
        incoming = scratch[: target.size]
        sendrecv(right, outgoing, left, incoming, REDUCE_SCATTER, s)
        np.add(target, incoming, out=target)
    for s in range(k - 1):
        sendrecv(right, chunk(rank + 1 - s), left, chunk(rank - s), ALL_GATHER, s)
