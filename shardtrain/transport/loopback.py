"""A transport inside one process: nothing crosses a wire.

Two uses, chosen at construction:
- `LoopbackTransport()` (size 1): the whole job is this worker. There are no peers, so an
  exchange has empty dicts and returns at once, the all-reduce is the sum over one rank
  (the buffer keeps its bits) and the profile counts nothing — what the pipes and MPI
  transports do for one worker, without a pipe or an MPI library.
- `LoopbackTransport(rank, size, absent_peers=True)`: worker `rank` of a `size`-worker split
  runs alone, its peers absent. Every receive buffer is filled with zeros and the all-reduce
  keeps the local value; nothing is counted, since no byte moves. The worker then does all
  its own compute and no transfer, which is what the forecast calibration times
  (`forecast.calibrate.shard_step_seconds`). Its results are NOT those of the `size`-worker
  run: it is a timing stand-in, not a training transport.

Either way the arguments are checked as the other transports check them (peers in range and
not `rank`, sendable dtypes, writeable C-contiguous receive buffers), so a worker that runs
on this transport calls the others correctly too. No call ever waits, so there is no
deadline to miss and no peer that can die. `exchange_start` does the whole exchange at once
and returns a handle that is already done (nothing is in flight, so nothing is hidden);
its `wait()` raises RunError only when the transport was closed before it.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.meter import Profile
from shardtrain.transport.wire import check_receive_buffer


class LoopbackHandle:
    """A started exchange of a loopback transport: done from the start."""

    def __init__(self, transport: LoopbackTransport, key: tuple):
        self._transport, self._key = transport, key
        self._waited = False

    def done(self) -> bool:
        return True

    def wait(self) -> None:
        if self._waited:
            return
        self._waited = True
        if self._key not in self._transport._outstanding:
            what = frames.describe(dict(zip(_KEY, self._key)))
            raise RunError(f"worker {self._transport.rank}: the transport was closed with an "
                           f"exchange outstanding ({what})")
        self._transport._outstanding.discard(self._key)
        self._transport.profile.add_overlap(0.0, 0.0)


_KEY = ("kind", "epoch", "layer", "direction")


class LoopbackTransport:
    """The `base.Transport` of a process on its own (see the module docstring)."""

    def __init__(self, rank: int = 0, size: int = 1, profile: Profile | None = None, *,
                 absent_peers: bool = False):
        if not 0 <= rank < size:
            raise ValueError(f"rank {rank} must satisfy 0 <= rank < size = {size}")
        if size > 1 and not absent_peers:
            raise ValueError(f"a loopback transport of {size} workers has no peers to talk "
                             f"to: give absent_peers=True to stand in for them")
        self.rank, self.size = int(rank), int(size)
        self.profile = profile if profile is not None else Profile(self.rank)
        self.absent_peers = bool(absent_peers)
        self._outstanding: set[tuple] = set()

    def exchange(self, outgoing: Mapping[int, np.ndarray], incoming: Mapping[int, np.ndarray],
                 *, kind: str, epoch: int, layer: int, direction: str) -> None:
        """Check the peers and buffers; fill every receive buffer with zeros (absent peers)."""
        for q in (*outgoing, *incoming):
            if not 0 <= q < self.size or q == self.rank:
                raise ValueError(f"worker {self.rank} cannot exchange with worker {q} "
                                 f"({self.size} worker{'s' if self.size > 1 else ''})")
        for array in outgoing.values():
            frames.dtype_name(np.asarray(array).dtype)   # ValueError, as the wire would
        for q, dest in incoming.items():
            check_receive_buffer(q, dest)
        for dest in incoming.values():
            dest[...] = 0

    def exchange_start(self, outgoing: Mapping[int, np.ndarray],
                       incoming: Mapping[int, np.ndarray], *, kind: str, epoch: int,
                       layer: int, direction: str) -> LoopbackHandle:
        """`exchange`, done at once; the handle's `wait()` only closes the bookkeeping."""
        key = (str(kind), int(epoch), int(layer), str(direction))
        if key in self._outstanding:
            raise ValueError(f"worker {self.rank} already has an exchange "
                             f"({frames.describe(dict(zip(_KEY, key)))}) outstanding")
        self.exchange(outgoing, incoming, kind=kind, epoch=epoch, layer=layer,
                      direction=direction)
        self._outstanding.add(key)
        return LoopbackHandle(self, key)

    def allreduce_sum(self, buf: np.ndarray, *, epoch: int) -> None:
        """The sum over this rank alone: `buf` is left as it is."""
        if buf.ndim != 1 or not buf.flags.c_contiguous or not buf.flags.writeable:
            raise ValueError("allreduce_sum needs a writeable, contiguous 1-D array")
        frames.dtype_name(buf.dtype)

    def close(self) -> None:
        """Nothing to release; handles not yet waited for will raise RunError."""
        self._outstanding.clear()
