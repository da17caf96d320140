"""What every transport shares: the names frames are counted under, and the checks and views
that put an array on the wire or a receive buffer under it.

The counting keys (`KIND_HALO`, `KIND_ALLREDUCE`, `NO_LAYER`) are the profile's and the
survey's: the worker sends halo frames under `KIND_HALO`, the transports count the
all-reduce under `KIND_ALLREDUCE` and `NO_LAYER`, and the survey predicts rows under the
same three names, so a measured row and a predicted one have the same key.
"""
from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from shardtrain.errors import RunError
from shardtrain.transport import frames

KIND_HALO = "halo"              # boundary rows between workers (every layer, every direction)
KIND_ALLREDUCE = "allreduce"    # the gradient sum (and the early-stopping vote)
NO_LAYER = -1                   # the layer of a frame that belongs to none (the all-reduce)


def bytes_view(array: np.ndarray) -> memoryview:
    """A flat byte view of a C-contiguous array (also for empty arrays)."""
    # numpy declares the buffer protocol to type checkers only for Python >= 3.12
    return memoryview(array.reshape(-1).view(np.uint8))  # type: ignore[arg-type]


def wire_array(array) -> np.ndarray:
    """The array as it goes on the wire: C order, little-endian, allowed dtype."""
    array = np.asarray(array)
    frames.dtype_name(array.dtype)           # ValueError for a dtype that may not be sent
    if array.dtype.byteorder == ">":
        array = array.astype(array.dtype.newbyteorder("<"))
    if not array.flags.c_contiguous:          # copy only when needed (and keep 0-d 0-d)
        array = np.ascontiguousarray(array)
    return array


def check_receive_buffer(peer: int, dest) -> None:
    """ValueError unless `dest` can take a frame from `peer` in place."""
    if not (isinstance(dest, np.ndarray) and dest.flags.c_contiguous and dest.flags.writeable):
        raise ValueError(f"receive buffer for worker {peer} must be a writeable "
                         f"C-contiguous numpy array")
    frames.dtype_name(dest.dtype)


def check_frame_size(peer: int, nbytes: int, limit: int, meta: dict) -> None:
    """RunError for an outgoing frame whose payload is above the frame limit."""
    if nbytes > limit:
        raise RunError(f"frame to worker {peer} of {nbytes} bytes exceeds the limit of "
                       f"{limit} bytes ({frames.describe(meta)})")


def name_workers(peers: Iterable[int]) -> str:
    """'worker 3' or 'workers 1, 2' (sorted, once each) — for error messages."""
    unique = sorted(set(peers))
    if len(unique) == 1:
        return f"worker {unique[0]}"
    return "workers " + ", ".join(map(str, unique))
