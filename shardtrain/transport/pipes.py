"""Workers on one machine talking through OS pipes.

The coordinator calls `make_pipe_mesh(k, pairs)` before it starts the workers: one
one-way pipe in each direction for every pair that needs a channel (halo peers and ring
neighbours, see `ring_pairs`). Worker r receives `ends[r]` as a multiprocessing Process
argument and builds `PipeTransport(r, k, ends[r], profile)` on it.

Start the workers with the "spawn" (or "forkserver") start method, not "fork":
- a forked child inherits every pipe end of every worker, so a dead peer's pipe never
  reads end-of-file and its death shows up only as a timeout; a spawned child holds only the
  ends it was given (multiprocessing duplicates exactly those into it);
- forking a parent that runs threads (progress bar, log listener) can leave locks held in
  the child.
After starting all workers the coordinator must call `close()` on every PipeEnds it still
holds, for the same end-of-file reason. (The ends travel through multiprocessing's own
process-start mechanism; nothing read from the pipes is ever unpickled.)

One call (`exchange`, or one all-reduce step) drives all its sends and receives from a
single poll loop over non-blocking descriptors: it writes from memoryviews of the arrays and
reads straight into the caller's buffers, so there is no copy in user space and no deadlock
however large a frame is against the pipe buffer. A peer that neither sends nor reads for
`timeout_s` seconds, that closes its pipe, or that sends a frame other than the one expected
raises a RunError (FrameError for bad frames) naming it. After a RunError the pipes may hold
part of a frame: the transport is not usable any more, and the run must stop.
"""
from __future__ import annotations

import fcntl
import math
import multiprocessing
import os
import select
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from typing import cast

import numpy as np

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.frames import FrameError
from shardtrain.transport.link import LinkModel
from shardtrain.transport.meter import Profile
from shardtrain.transport.ring import ring_allreduce
from shardtrain.transport.wire import (
    KIND_ALLREDUCE,
    NO_LAYER,
    bytes_view,
    check_frame_size,
    check_receive_buffer,
    name_workers,
    wire_array,
)

# Kernel buffer per pipe: faster than the 64 KiB default, and a quarter of the kernel
# memory 1 MiB would pin for the k(k-1) pipes (benchmarks/bench_pipe.py compares the three).
PIPE_BYTES = 1 << 18

_F_SETPIPE_SZ = getattr(fcntl, "F_SETPIPE_SZ", 1031)
_IN = select.POLLIN | select.POLLHUP | select.POLLERR
_OUT = select.POLLOUT | select.POLLERR


def ring_pairs(k: int) -> set[tuple[int, int]]:
    """The pairs (p, q), p < q, of ring neighbours r, r+1 mod k (empty for k = 1)."""
    return ({cast("tuple[int, int]", tuple(sorted((r, (r + 1) % k)))) for r in range(k)}
            if k > 1 else set())


@dataclass
class PipeEnds:
    """The pipe ends of one worker: `send[q]` writes to q, `recv[q]` reads from q."""
    rank: int
    size: int
    send: dict[int, Connection] = field(default_factory=dict)
    recv: dict[int, Connection] = field(default_factory=dict)

    def close(self) -> None:
        for conn in (*self.send.values(), *self.recv.values()):
            conn.close()


def make_pipe_mesh(k: int, pairs, *, pipe_bytes: int = PIPE_BYTES) -> list[PipeEnds]:
    """One pipe each way for every pair (p, q), p < q; returns the ends of each rank."""
    ends = [PipeEnds(r, k) for r in range(k)]
    for p, q in sorted({(int(p), int(q)) for p, q in pairs}):
        if not 0 <= p < q < k:
            raise ValueError(f"pipe pair ({p}, {q}) must satisfy 0 <= p < q < {k}")
        for a, b in ((p, q), (q, p)):
            reader, writer = multiprocessing.Pipe(duplex=False)
            _grow_pipe(writer.fileno(), pipe_bytes)
            ends[a].send[b] = writer
            ends[b].recv[a] = reader
    return ends


def _grow_pipe(fd: int, nbytes: int) -> None:
    """Ask for a larger kernel buffer; keep the default where the system refuses."""
    if nbytes:
        try:
            fcntl.fcntl(fd, _F_SETPIPE_SZ, nbytes)
        except OSError:
            pass


class _Send:
    __slots__ = ("peer", "fd", "views", "total", "done", "due", "held")

    def __init__(self, peer, fd, header: bytes, array: np.ndarray):
        self.peer, self.fd = peer, fd
        self.views = [memoryview(header), bytes_view(array)]
        self.total = len(header) + array.nbytes
        self.done = 0
        self.due = 0.0        # link emulation: the last byte may not leave before this
        self.held = False


class _Recv:
    __slots__ = ("peer", "fd", "dest", "prefix", "header", "stage", "got", "need", "framing")

    def __init__(self, peer, fd, dest: np.ndarray):
        self.peer, self.fd, self.dest = peer, fd, dest
        self.prefix = bytearray(frames.PREFIX_BYTES)
        self.header: bytearray | None = None   # allocated when the prefix has arrived
        self.stage = 0        # 0: length prefix, 1: header, 2: payload, 3: done
        self.got = 0
        self.need = frames.PREFIX_BYTES
        self.framing = 0


class PipeTransport:
    """The `base.Transport` of one worker over its pipes (see the module docstring)."""

    def __init__(self, rank: int, size: int, ends: PipeEnds, profile: Profile, *,
                 timeout_s: float = 60.0, max_frame_bytes: int = frames.DEFAULT_MAX_FRAME_BYTES,
                 link: LinkModel | None = None):
        if ends.rank != rank or ends.size != size:
            raise ValueError(f"pipe ends of worker {ends.rank}/{ends.size} given to "
                             f"worker {rank}/{size}")
        self.rank, self.size = rank, size
        self.profile = profile
        self.timeout_s = float(timeout_s)
        self.max_frame_bytes = int(max_frame_bytes)
        self.link = link
        self._ends = ends
        self._send_fd = {q: c.fileno() for q, c in ends.send.items()}
        self._recv_fd = {q: c.fileno() for q, c in ends.recv.items()}
        for fd in (*self._send_fd.values(), *self._recv_fd.values()):
            os.set_blocking(fd, False)
        self._closed = False

    # -- public API --------------------------------------------------------------------
    def exchange(self, outgoing: Mapping[int, np.ndarray], incoming: Mapping[int, np.ndarray],
                 *, kind: str, epoch: int, layer: int, direction: str) -> None:
        """Send outgoing[q] to every q and fill the preallocated incoming[q] from every q."""
        meta = {"kind": kind, "epoch": int(epoch), "layer": int(layer), "direction": direction}
        sends = [self._send(q, outgoing[q], meta) for q in sorted(outgoing)]
        recvs = [self._recv(q, incoming[q]) for q in sorted(incoming)]
        self._transfer(sends, recvs, meta)

    def allreduce_sum(self, buf: np.ndarray, *, epoch: int) -> None:
        """Sum the 1-D contiguous `buf` over all workers in place (ring all-reduce)."""
        def step(dst, send_view, src, recv_view, direction, _step):
            meta = {"kind": KIND_ALLREDUCE, "epoch": int(epoch), "layer": NO_LAYER,
                    "direction": direction}
            self._transfer([self._send(dst, send_view, meta)], [self._recv(src, recv_view)],
                           meta)
        frames.dtype_name(buf.dtype)
        ring_allreduce(buf, self.rank, self.size, step)

    def close(self) -> None:
        if not self._closed:
            self._closed = True
            self._ends.close()

    # -- frames ------------------------------------------------------------------------
    def _send(self, peer: int, array, meta: dict) -> _Send:
        if peer not in self._send_fd:
            raise ValueError(f"worker {self.rank} has no pipe to worker {peer}; "
                             f"the pair must be given to make_pipe_mesh")
        array = wire_array(array)
        check_frame_size(peer, array.nbytes, self.max_frame_bytes, meta)
        header = frames.encode_header(source=self.rank, dtype=array.dtype, shape=array.shape,
                                      **meta)
        return _Send(peer, self._send_fd[peer], header, array)

    def _recv(self, peer: int, dest: np.ndarray) -> _Recv:
        if peer not in self._recv_fd:
            raise ValueError(f"worker {self.rank} has no pipe from worker {peer}; "
                             f"the pair must be given to make_pipe_mesh")
        check_receive_buffer(peer, dest)
        return _Recv(peer, self._recv_fd[peer], dest)

    def _transfer(self, sends: list[_Send], recvs: list[_Recv], meta: dict) -> None:
        """Drive all sends and receives of one call to completion from one poll loop."""
        if not sends and not recvs:
            return
        start = time.perf_counter()
        if self.link is not None:
            for s, due in zip(sends, self.link.due_times(start, [s.total for s in sends])):
                s.due = due
        poller = select.poll()
        by_fd: dict[int, _Send | _Recv] = {}
        for s in sends:
            poller.register(s.fd, _OUT)
            by_fd[s.fd] = s
        for r in recvs:
            poller.register(r.fd, _IN)
            by_fd[r.fd] = r
        pending = len(by_fd)
        first_byte = math.inf      # link emulation: when the first incoming byte was there
        held: list[_Send] = []
        last_progress = start
        first = True
        while pending:
            now = time.perf_counter()
            if held:                              # emulated link time is not idleness
                last_progress = now
            idle_left = last_progress + self.timeout_s - now
            if idle_left <= 0:
                raise self._timeout(sends, recvs, meta)
            link_left = min(s.due for s in held) - now if held else math.inf
            limit = min(idle_left, link_left)
            t0 = time.perf_counter()
            if first:                             # try everything once before sleeping
                events, first = [(fd, 0) for fd in by_fd], False
            elif link_left < min(idle_left, 1e-3):
                # poll() sleeps whole milliseconds: a frame due in 50 us would leave up to
                # 1 ms late, making the emulated link slower than the one described
                events = poller.poll(0)
                if not events:
                    time.sleep(max(link_left, 0.0))
            else:
                events = poller.poll(max(0, math.ceil(limit * 1000)))
            t1 = time.perf_counter()
            if events or link_left > idle_left:
                self.profile.add_wait(t1 - t0)
            for fd, _ev in events:
                st = by_fd[fd]
                if isinstance(st, _Send):
                    moved = self._write(st, meta)
                    if st.done == st.total:
                        poller.unregister(fd)
                        pending -= 1
                        self.profile.count(self.rank, st.peer, meta["kind"], meta["layer"],
                                           meta["direction"], st.views[1].nbytes,
                                           st.views[0].nbytes)
                    elif st.held:
                        poller.unregister(fd)
                        held.append(st)
                else:
                    moved = self._read(st, meta)
                    if moved and first_byte == math.inf:
                        first_byte = t1
                    if st.stage == 3:
                        poller.unregister(fd)
                        pending -= 1
                        self.profile.count(st.peer, self.rank, meta["kind"], meta["layer"],
                                           meta["direction"], st.dest.nbytes, st.framing)
                if moved:
                    last_progress = t1
            if held:
                now = time.perf_counter()
                for s in [s for s in held if s.due <= now]:
                    held.remove(s)
                    s.held = False
                    poller.register(s.fd, _OUT)
        if self.link is not None and recvs:
            self._hold_receive(recvs, min(first_byte, time.perf_counter()))

    def _hold_receive(self, recvs: list[_Recv], first_byte: float) -> None:
        """Link emulation at the receiving side: the call does not end before its incoming
        frames, one after the other, have crossed this worker's interface
        (`LinkModel.receive_due`); the sleep is transfer time, not waiting."""
        assert self.link is not None
        received = sum(r.dest.nbytes + r.framing for r in recvs)
        left = self.link.receive_due(first_byte, received) - time.perf_counter()
        if left > 0:
            time.sleep(left)

    def _write(self, s: _Send, meta: dict) -> int:
        """Write what the pipe takes; hold back the last byte until the link says it is due."""
        limit = s.total
        if s.due and time.perf_counter() < s.due:
            limit = s.total - 1
        if s.done >= limit:
            s.held = True
            return 0
        pieces, pos = [], 0
        for v in s.views:
            lo, hi = max(s.done - pos, 0), min(limit - pos, v.nbytes)
            if lo < hi:
                pieces.append(v[lo:hi])
            pos += v.nbytes
        try:
            n = os.writev(s.fd, pieces)
        except BlockingIOError:
            return 0
        except (BrokenPipeError, ConnectionResetError):
            raise RunError(f"worker {s.peer} closed its pipe (it has probably exited) while "
                           f"worker {self.rank} was sending to it ({frames.describe(meta)})"
                           ) from None
        s.done += n
        if s.done == limit < s.total:
            s.held = True
        return n

    def _read(self, r: _Recv, meta: dict) -> int:
        """Read the next piece of the frame from r.peer; validate the header on arrival."""
        moved = 0
        while r.stage < 3:
            if r.stage == 0:
                view = memoryview(r.prefix)[r.got:]
            elif r.stage == 1:
                assert r.header is not None          # stage 1 starts by allocating it
                view = memoryview(r.header)[r.got:]
            else:
                view = bytes_view(r.dest)[r.got:]
            try:
                n = os.readv(r.fd, [view])
            except BlockingIOError:
                return moved
            if n == 0:
                raise self._eof(r, meta)
            moved += n
            r.got += n
            if r.got < r.need:
                return moved
            self._advance(r, meta)
        return moved

    def _advance(self, r: _Recv, meta: dict) -> None:
        if r.stage == 0:
            n = frames.header_length(bytes(r.prefix), peer=r.peer)
            r.header, r.stage, r.got, r.need = bytearray(n), 1, 0, n
        elif r.stage == 1:
            assert r.header is not None              # stage 1 starts by allocating it
            header = frames.decode_header(r.header, peer=r.peer,
                                          max_frame_bytes=self.max_frame_bytes)
            frames.check_expected(header, peer=r.peer, dtype=r.dest.dtype, shape=r.dest.shape,
                                  **meta)
            r.framing = frames.PREFIX_BYTES + r.need
            r.stage, r.got, r.need = 2, 0, header["nbytes"]
            if r.need == 0:
                r.stage = 3
        else:
            r.stage = 3

    def _eof(self, r: _Recv, meta: dict) -> RunError:
        what = frames.describe(meta)
        if r.stage == 0 and r.got == 0:
            return RunError(f"worker {r.peer} closed its pipe (it has probably exited) before "
                            f"sending {what} to worker {self.rank}")
        part = ("length-prefix", "header", "payload")[r.stage]
        return FrameError(r.peer, f"truncated after {r.got} of {r.need} {part} bytes: the "
                                  f"pipe closed ({what})")

    def _timeout(self, sends: list[_Send], recvs: list[_Recv], meta: dict) -> RunError:
        what = frames.describe(meta)
        slow_in = [r.peer for r in recvs if r.stage < 3]
        if slow_in:
            return RunError(f"timed out after {self.timeout_s:g} s waiting for "
                            f"{name_workers(slow_in)} ({what})")
        slow_out = [s.peer for s in sends if s.done < s.total]
        return RunError(f"timed out after {self.timeout_s:g} s waiting for "
                        f"{name_workers(slow_out)} to read ({what})")

