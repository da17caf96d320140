"""The transport contract: what a worker (`train.worker`) and the forecast calibration call.

A `Transport` connects `size` workers, this one being `rank`. Implementations:
`pipes.PipeTransport` (worker processes on one machine), `mpi.MpiTransport` (MPI ranks) and
`loopback.LoopbackTransport` (one process, nothing on a wire). Every implementation keeps
these promises, and `tests/test_transport_contract.py` checks each of them on each one:

- `exchange(outgoing, incoming, *, kind, epoch, layer, direction)`: send `outgoing[q]` to
  every peer q and fill the preallocated `incoming[q]` (writeable, C-contiguous, the
  frame's exact dtype and shape) from every peer q, sends and receives at the same time, so
  no call deadlocks however large a frame is against a pipe or socket buffer. Peers are
  ranks other than `rank`; either dict may be empty. The frame a receive expects is the
  one with the same kind, epoch, layer and direction (see `frames.check_expected`).
- `exchange_start(outgoing, incoming, *, kind, epoch, layer, direction) -> ExchangeHandle`:
  the same exchange, started and not waited for. The call checks its arguments (the same
  ValueErrors as `exchange`, before anything is sent), posts the sends and receives and
  returns at once; the bytes then move while the caller computes (pipes: a progress thread
  of the transport; MPI: the library, which moves large messages only when it is entered,
  see `mpi.py`; loopback: nothing to move). `handle.wait()` returns when every receive
  buffer is filled and every send has left, and raises what `exchange` would raise
  (RunError / FrameError naming the worker, at the same deadlines); `handle.done()` says,
  without blocking, whether `wait()` would return at once. Until `wait()` has returned the
  caller must neither modify the `outgoing` arrays (they are sent from in place, not
  copied) nor read or write the `incoming` buffers. Several handles may be outstanding at
  once if their (kind, epoch, layer, direction) keys differ (the same key twice is a
  ValueError), and `exchange` and `allreduce_sum` may be called while handles are
  outstanding: every rank must start its exchanges, and make its blocking calls, in the
  same order (the order the frames travel in between two workers), and wait for every
  handle it started. Counting is that of `exchange` (frames counted when the caller waits);
  the time the caller spends blocked in `wait()` goes to `profile.add_wait`, and each handle
  adds its time in flight and its blocked time to `profile.add_overlap`, so the profile
  says how much exchange time the caller's compute hid (`meter.Profile`, "overlap").
  `exchange(...)` is `exchange_start(...).wait()` (pipes take a faster direct path when no
  handle is outstanding: the same frames, counts and errors). All calls come from ONE
  caller thread.
- `allreduce_sum(buf, *, epoch)`: sum the writeable contiguous 1-D `buf` over all ranks in
  place; every rank ends with identical bits (float32 too). It is counted as the ring
  all-reduce of `ring.py` (kind `wire.KIND_ALLREDUCE`, layer `wire.NO_LAYER`).
- Deadlines: no receive waits longer than the transport's timeout without progress; a
  silent, dead or misbehaving peer becomes a `RunError` (`frames.FrameError` for a bad
  frame) naming the worker, never a hang. After a RunError the transport is unusable.
  (MPI: a dead rank ends the whole job through the launcher, see `mpi.py`.)
- Counting: every frame sent and received is counted in `profile`
  (`meter.Profile.count`, payload = array bytes, framing = `frames.encode_header` bytes),
  under (src, dst, kind, layer, direction), by the sender and by the receiver; blocked
  time goes to `profile.add_wait`.
- Bad arguments (an unknown peer, an unsendable dtype, a wrong buffer) raise ValueError
  before anything is sent.
- `close()`: release what the transport owns; calling it twice is harmless. A handle not
  yet waited for when the transport closes raises RunError from its `wait()`.
"""
from __future__ import annotations

from collections.abc import Mapping
from typing import Protocol, runtime_checkable

import numpy as np

from shardtrain.transport.meter import Profile


@runtime_checkable
class ExchangeHandle(Protocol):
    """An exchange started by `Transport.exchange_start` (see the module docstring)."""

    def done(self) -> bool: ...

    def wait(self) -> None: ...


@runtime_checkable
class Transport(Protocol):
    """See the module docstring for the promises behind each member."""

    @property
    def rank(self) -> int: ...

    @property
    def size(self) -> int: ...

    @property
    def profile(self) -> Profile: ...

    def exchange(self, outgoing: Mapping[int, np.ndarray], incoming: Mapping[int, np.ndarray],
                 *, kind: str, epoch: int, layer: int, direction: str) -> None: ...

    def exchange_start(self, outgoing: Mapping[int, np.ndarray],
                       incoming: Mapping[int, np.ndarray], *, kind: str, epoch: int,
                       layer: int, direction: str) -> ExchangeHandle: ...

    def allreduce_sum(self, buf: np.ndarray, *, epoch: int) -> None: ...

    def close(self) -> None: ...
