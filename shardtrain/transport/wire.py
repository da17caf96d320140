"""What every transport shares: the names frames are counted under, and the checks and views
that put an array on the wire or a receive buffer under it.

The counting keys (`KIND_HALO`, `KIND_ALLREDUCE`, `NO_LAYER`) are the profile's and the
survey's: the worker sends halo frames under `KIND_HALO`, the transports count the
all-reduce under `KIND_ALLREDUCE` and `NO_LAYER`, and the survey predicts rows under the
same three names, so a measured row and a predicted one have the same key.
"""
from __future__ import annotations

import os
import zlib
from collections.abc import Callable, Iterable, Mapping

import numpy as np

from shardtrain.errors import RunError
from shardtrain.transport import frames

KIND_HALO = "halo"              # boundary rows between workers (every layer, every direction)
KIND_ALLREDUCE = "allreduce"    # the gradient sum (and the early-stopping vote)
NO_LAYER = -1                   # the layer of a frame that belongs to none (the all-reduce)

# Debug check of started exchanges (`exchange_start`): their outgoing arrays are sent in
# place, so the caller must not modify them before `wait()` returns. With this set (the
# environment variable SHARDTRAIN_CHECK_OUTGOING=1 when the module is imported, or the
# attribute itself), each outgoing array's CRC-32 is taken at the start and compared in
# `wait()`, which raises RunError naming the worker it went to. It reads every byte twice:
# for debugging only.
CHECK_OUTGOING = os.environ.get("SHARDTRAIN_CHECK_OUTGOING") == "1"


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


def outgoing_guard(arrays: Mapping[int, np.ndarray], meta: dict
                   ) -> Callable[[], None] | None:
    """With `CHECK_OUTGOING`, a function that raises RunError when one of the (wire-ready,
    C-contiguous) `arrays` has changed since this call; None otherwise."""
    if not CHECK_OUTGOING:
        return None
    sums = {q: zlib.crc32(bytes_view(a)) for q, a in arrays.items()}

    def check() -> None:
        changed = [q for q, a in arrays.items() if zlib.crc32(bytes_view(a)) != sums[q]]
        if changed:
            raise RunError(f"the outgoing array to {name_workers(changed)} was modified before "
                           f"wait() returned ({frames.describe(meta)}): a started exchange "
                           f"sends it in place")
    return check
