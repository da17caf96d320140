"""The same transport over MPI (mpi4py), for ranks on one machine or many.

Buffers only: every message is a uppercase Isend/Irecv of raw bytes, nothing is pickled.
A frame is two messages between the same pair, in order (MPI does not let messages with the
same source, tag and communicator overtake each other):
- tag 1: the frame header exactly as the pipes send it (length prefix + msgpack, see
  frames.py), so it is validated the same way and counted as the same framing bytes;
- tag 2: the raw array bytes, received straight into the caller's buffer.
MPI itself refuses a payload larger than the posted buffer (truncation); after both
messages arrive the header is checked against the expectation and the buffer.

Waiting: the requests of a call are tested together (Testsome) in a tight loop, which is
what lets MPI move the data (its progress engine runs inside the test calls); only when
nothing has completed for SPIN_S does the loop nap between tests, the nap growing from
NAP_MIN_S to NAP_MAX_S and falling back to no nap at the next completion. So transfers
run at MPI's pace, a rank waiting for a straggler leaves the core to others (MPICH would
spin inside a blocking wait), and the deadline of `timeout_s` seconds without any request
completing is checked between tests: a missed deadline cancels what is pending and raises
RunError naming the ranks waited for, as does a failed request. MPI collectives cannot time
out on their own, so the caller must turn a RunError into `transport.abort()` (comm.Abort)
after reporting it, or the other ranks would wait for ever; mpiexec also ends the job when
a rank dies.

All-reduce: `allreduce_sum` uses MPI's own all-reduce (non-blocking Iallreduce, waited for with
the same deadline) by default, or the ring of ring.py over point-to-point messages with
`allreduce="ring"`. Either way the profile counts the LOGICAL traffic of the ring all-reduce
(Patarasuk & Yuan 2009): per step, the chunk sent to the right neighbour and the one received
from the left, with the framing bytes the pipes transport would send. So MPI and pipes
profiles compare row by row, and the survey's prediction (ring_send_elements) holds for both;
what the MPI library moves internally (its algorithm depends on size and rank count) is not
what is counted. MPI's all-reduce is not promised to give identical bits on every rank;
MPICH's algorithms for a commutative sum do (tests check it for 2 and 3 ranks); "ring"
guarantees it by construction.

Started exchanges (`exchange_start`): the same Irecv/Isend requests are posted at once and
the handle keeps them; `handle.wait()` is the wait above (same deadline, same checks and
counts), `handle.done()` one Testsome over them. MPI matches messages of the same source
and tag in the order they were posted, so frames stay apart as long as every rank starts
and calls in the same order (the contract). Overlap: small messages travel eagerly when
posted; a large one may move only while the library is entered (MPICH has no progress
thread unless MPIR_CVAR_ASYNC_PROGRESS=1 is set for the job), so a caller that wants the
bytes to move during a long compute calls `done()` now and then; the handle's time in flight
is measured to the test that saw it complete.

Wait time: the time spent waiting for requests to complete, which with MPI includes the
copying itself (MPI moves data inside the wait). MPICH's progress engine spins while it
waits, so the spinning part of a wait counts as CPU time too.
"""
from __future__ import annotations

import time
from collections.abc import Mapping

import numpy as np

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.frames import FrameError
from shardtrain.transport.meter import Profile
from shardtrain.transport.ring import ring_allreduce, ring_steps
from shardtrain.transport.wire import (
    KIND_ALLREDUCE,
    NO_LAYER,
    bytes_view,
    check_frame_size,
    check_receive_buffer,
    name_workers,
    outgoing_guard,
    wire_array,
)

TAG_HEADER = 1
TAG_PAYLOAD = 2
HEADER_BUFFER = frames.PREFIX_BYTES + frames.MAX_HEADER_BYTES
SPIN_S = 0.002         # test without napping this long after a completion (or the start)
NAP_MIN_S = 2e-5       # then nap between tests, doubling from this ...
NAP_MAX_S = 1e-3       # ... up to this (the worst added latency once data arrives)


def _mpi():
    from mpi4py import MPI  # imported late: the pipes path must not need mpi4py
    return MPI


class _MpiOp:
    """One posted exchange: its requests, their statuses so far, the buffers they use."""

    def __init__(self, meta, incoming, heads, prepared, sent, reqs, owners):
        self.meta, self.incoming, self.heads = meta, incoming, heads
        self.prepared, self.sent = prepared, sent       # `prepared` keeps the buffers alive
        self.reqs, self.owners = reqs, owners
        self.statuses: list = [None] * len(reqs)
        self.key = tuple(meta[k] for k in ("kind", "epoch", "layer", "direction"))
        self.started = time.perf_counter()
        self.finished: float | None = None if reqs else self.started
        self.closed = False


class MpiHandle:
    """A started exchange of an `MpiTransport` (see `base.ExchangeHandle`)."""

    def __init__(self, transport: MpiTransport, op: _MpiOp):
        self._transport, self._op = transport, op
        self._waited = False
        self._guard = outgoing_guard({q: a for q, a, _h in op.prepared}, op.meta)

    def done(self) -> bool:
        """One test of the requests (this also lets MPI move the data)."""
        return self._transport._test(self._op)

    def wait(self) -> None:
        """Wait with the transport's deadline, check the frames, count them."""
        if self._waited:
            return
        self._waited = True
        guard, self._guard = self._guard, None
        self._transport._complete(self._op, started=True)
        if guard is not None:
            guard()


class MpiTransport:
    """The `base.Transport` over an MPI communicator, one rank per worker (see the module
    docstring); `abort()` ends the job after a RunError."""

    def __init__(self, comm, profile: Profile, *, timeout_s: float = 60.0,
                 max_frame_bytes: int = frames.DEFAULT_MAX_FRAME_BYTES,
                 allreduce: str = "mpi"):
        if allreduce not in ("mpi", "ring"):
            raise ValueError(f"allreduce must be 'mpi' or 'ring', not {allreduce!r}")
        self.MPI = _mpi()
        self.comm = comm
        self.rank, self.size = comm.Get_rank(), comm.Get_size()
        self.profile = profile
        self.timeout_s = float(timeout_s)
        self.max_frame_bytes = int(max_frame_bytes)
        self.allreduce = allreduce
        self._ops: list[_MpiOp] = []        # started and not yet waited for

    # -- public API --------------------------------------------------------------------
    def exchange(self, outgoing: Mapping[int, np.ndarray], incoming: Mapping[int, np.ndarray],
                 *, kind: str, epoch: int, layer: int, direction: str) -> None:
        """Send outgoing[q] to every q and fill the preallocated incoming[q] from every q."""
        meta = {"kind": kind, "epoch": int(epoch), "layer": int(layer), "direction": direction}
        self._transfer({q: outgoing[q] for q in sorted(outgoing)},
                       {q: incoming[q] for q in sorted(incoming)}, meta)

    def exchange_start(self, outgoing: Mapping[int, np.ndarray],
                       incoming: Mapping[int, np.ndarray], *, kind: str, epoch: int,
                       layer: int, direction: str) -> MpiHandle:
        """Post the exchange's requests and return; `outgoing` arrays are sent in place:
        do not modify them before `wait()` returns."""
        meta = {"kind": kind, "epoch": int(epoch), "layer": int(layer), "direction": direction}
        key = (meta["kind"], meta["epoch"], meta["layer"], meta["direction"])
        if any(op.key == key for op in self._ops):
            raise ValueError(f"rank {self.rank} already has an exchange "
                             f"({frames.describe(meta)}) outstanding")
        op = self._post({q: outgoing[q] for q in sorted(outgoing)},
                        {q: incoming[q] for q in sorted(incoming)}, meta)
        self._ops.append(op)
        return MpiHandle(self, op)

    def allreduce_sum(self, buf: np.ndarray, *, epoch: int) -> None:
        """Sum the 1-D contiguous `buf` over all ranks in place."""
        if buf.ndim != 1 or not buf.flags.c_contiguous or not buf.flags.writeable:
            raise ValueError("allreduce_sum needs a writeable, contiguous 1-D array")
        frames.dtype_name(buf.dtype)
        if self.allreduce == "ring":
            def step(dst, send_view, src, recv_view, direction, _step):
                meta = {"kind": KIND_ALLREDUCE, "epoch": int(epoch), "layer": NO_LAYER,
                        "direction": direction}
                self._transfer({dst: send_view}, {src: recv_view}, meta)
            ring_allreduce(buf, self.rank, self.size, step)
            return
        if self.size > 1:
            MPI = self.MPI
            req = self.comm.Iallreduce(MPI.IN_PLACE, buf, op=MPI.SUM)
            self._wait([req], lambda pending: "all ranks", {
                "kind": KIND_ALLREDUCE, "direction": "sum", "layer": NO_LAYER, "epoch": epoch})
        self._count_ring(buf, int(epoch))

    def abort(self, code: int = 3) -> None:
        """End the whole MPI job (after the caller has reported its RunError)."""
        self.comm.Abort(code)

    def close(self) -> None:
        """Nothing to release (the communicator belongs to the caller); a handle not yet
        waited for raises RunError from its `wait()` (its requests are left to MPI)."""
        for op in self._ops:
            op.closed = True
            n_recv = 2 * len(op.incoming)          # receives never matched would keep
            pending = [r for r, st in zip(op.reqs[:n_recv], op.statuses) if st is None]
            for req in pending:                    # the job from finishing: cancel them
                try:
                    req.Cancel()
                except self.MPI.Exception:
                    pass
            if pending:
                self.MPI.Request.Waitall(pending)
        self._ops.clear()

    # -- internals ---------------------------------------------------------------------
    def _count_ring(self, buf: np.ndarray, epoch: int) -> None:
        """Count what the ring all-reduce would have sent and received, frame by frame."""
        k, item = self.size, buf.dtype.itemsize
        right, left = (self.rank + 1) % k, (self.rank - 1) % k
        for direction, _s, n_send, n_recv in ring_steps(buf.size, k, self.rank):
            for src, dst, n in ((self.rank, right, n_send), (left, self.rank, n_recv)):
                framing = len(frames.encode_header(kind=KIND_ALLREDUCE, epoch=epoch,
                                                   layer=NO_LAYER, direction=direction,
                                                   source=src, dtype=buf.dtype, shape=(n,)))
                self.profile.count(src, dst, KIND_ALLREDUCE, NO_LAYER, direction, n * item,
                                   framing)

    def _transfer(self, outgoing: dict, incoming: dict, meta: dict) -> None:
        self._complete(self._post(outgoing, incoming, meta), started=False)

    def _post(self, outgoing: dict, incoming: dict, meta: dict) -> _MpiOp:
        MPI = self.MPI
        for q in (*outgoing, *incoming):
            if not 0 <= q < self.size or q == self.rank:
                raise ValueError(f"rank {self.rank} cannot exchange with rank {q} "
                                 f"(communicator of {self.size})")
        for q, dest in incoming.items():          # every check before any request is posted
            check_receive_buffer(q, dest)
        prepared = []
        for q, array in outgoing.items():
            array = wire_array(array)
            check_frame_size(q, array.nbytes, self.max_frame_bytes, meta)
            prepared.append((q, array, frames.encode_header(
                source=self.rank, dtype=array.dtype, shape=array.shape, **meta)))
        recv_reqs, send_reqs, owners = [], [], []
        heads = {}
        for q, dest in incoming.items():
            heads[q] = bytearray(HEADER_BUFFER)
            recv_reqs.append(self.comm.Irecv([heads[q], MPI.BYTE], source=q, tag=TAG_HEADER))
            recv_reqs.append(self.comm.Irecv([bytes_view(dest), MPI.BYTE], source=q,
                                             tag=TAG_PAYLOAD))
            owners += [q, q]
        sent = []
        for q, array, header in prepared:        # `prepared` keeps the buffers alive
            send_reqs.append(self.comm.Isend([header, MPI.BYTE], dest=q, tag=TAG_HEADER))
            send_reqs.append(self.comm.Isend([bytes_view(array), MPI.BYTE], dest=q,
                                             tag=TAG_PAYLOAD))
            owners += [q, q]
            sent.append((q, array.nbytes, len(header)))
        return _MpiOp(meta, incoming, heads, prepared, sent, recv_reqs + send_reqs, owners)

    def _test(self, op: _MpiOp) -> bool:
        """Collect what has completed of `op`, without waiting; True when all has."""
        if op.finished is not None or op.closed:
            return True
        MPI = self.MPI
        scratch = [MPI.Status() for _ in op.reqs]
        try:
            indices = MPI.Request.Testsome(op.reqs, scratch)
        except MPI.Exception:
            return True                       # wait() reports it, with its deadline message
        for k, i in enumerate(indices or ()):
            op.statuses[i] = MPI.Status(scratch[k])
        if indices is None or all(st is not None for st in op.statuses):
            op.finished = time.perf_counter()
        return op.finished is not None

    def _complete(self, op: _MpiOp, *, started: bool) -> None:
        """Wait for `op` (deadline timeout_s), check its frames, count them."""
        MPI = self.MPI
        meta, incoming, heads, owners = op.meta, op.incoming, op.heads, op.owners
        if op in self._ops:
            self._ops.remove(op)
        if op.closed:
            raise RunError(f"worker {self.rank}: the transport was closed with an exchange "
                           f"outstanding ({frames.describe(meta)})")
        t0 = time.perf_counter()
        if op.finished is None:
            self._wait(op.reqs, lambda pending: name_workers([owners[i] for i in pending]),
                       meta, op.statuses)
            op.finished = time.perf_counter()
        t1 = time.perf_counter()
        statuses = op.statuses
        for i, (q, dest) in enumerate(incoming.items()):
            got_head = statuses[2 * i].Get_count(MPI.BYTE)
            got_pay = statuses[2 * i + 1].Get_count(MPI.BYTE)
            head = bytes(heads[q][:got_head])
            n = frames.header_length(head[:frames.PREFIX_BYTES], peer=q)
            if got_head != frames.PREFIX_BYTES + n:
                raise FrameError(q, f"header message of {got_head} bytes announces {n} "
                                    f"header bytes")
            parsed = frames.decode_header(head[frames.PREFIX_BYTES:], peer=q,
                                          max_frame_bytes=self.max_frame_bytes)
            frames.check_expected(parsed, peer=q, dtype=dest.dtype, shape=dest.shape, **meta)
            if got_pay != parsed["nbytes"]:
                raise FrameError(q, f"truncated after {got_pay} of {parsed['nbytes']} "
                                    f"payload bytes")
            self.profile.count(q, self.rank, meta["kind"], meta["layer"], meta["direction"],
                               got_pay, got_head)
        for q, nbytes, framing in op.sent:
            self.profile.count(self.rank, q, meta["kind"], meta["layer"], meta["direction"],
                               nbytes, framing)
        op.prepared = []
        if started:
            self.profile.add_overlap(op.finished - op.started,
                                     max(min(op.finished, t1) - t0, 0.0))

    def _wait(self, reqs: list, who, meta: dict, statuses: list | None = None) -> list:
        """Test until every request is done (statuses in request order, `statuses` filled
        in when given); deadline timeout_s without any completion. See the module docstring
        for the backoff."""
        MPI = self.MPI
        if statuses is None:
            statuses = [None] * len(reqs)
        scratch = [MPI.Status() for _ in reqs]
        t_start = last = time.perf_counter()
        nap = 0.0
        try:
            while True:
                indices = MPI.Request.Testsome(reqs, scratch)
                if indices is None:                  # every request is done (or null)
                    break
                now = time.perf_counter()
                if indices:
                    for k, i in enumerate(indices):  # statuses come in completion order
                        statuses[i] = MPI.Status(scratch[k])
                    last, nap = now, 0.0
                    continue
                if now - last > self.timeout_s:
                    pending = [i for i, st in enumerate(statuses) if st is None]
                    for i in pending:
                        try:
                            reqs[i].Cancel()
                        except MPI.Exception:
                            pass
                    raise RunError(f"timed out after {self.timeout_s:g} s waiting for "
                                   f"{who(pending)} ({frames.describe(meta)})")
                if now - last > SPIN_S:
                    nap = min(NAP_MAX_S, 2 * nap) if nap else NAP_MIN_S
                    time.sleep(nap)
        except MPI.Exception as exc:
            pending = [i for i, st in enumerate(statuses) if st is None]
            raise RunError(f"MPI failed while waiting for {who(pending)} "
                           f"({frames.describe(meta)}): {exc.Get_error_string()}") from None
        finally:
            self.profile.add_wait(time.perf_counter() - t_start)
        return statuses


class MpiGroup:
    """The few collectives a job of ranks needs besides the halo transport (the streaming
    survey under MPI): broadcast from rank 0 and sums/maxima over all ranks, on numpy
    buffers only (uppercase mpi4py calls: nothing is pickled). Each call is non-blocking
    underneath and waited for with naps, so a rank waiting for rank 0's partition leaves
    the core to it (MPICH would spin inside a blocking collective)."""

    def __init__(self, comm=None, *, nap_s: float = NAP_MAX_S):
        self.comm = _mpi().COMM_WORLD if comm is None else comm
        self.rank, self.size = int(self.comm.Get_rank()), int(self.comm.Get_size())
        self.nap_s = nap_s

    def _wait(self, req) -> None:
        while not req.Test():
            time.sleep(self.nap_s)

    def bcast(self, buf: np.ndarray) -> np.ndarray:
        """Rank 0's `buf` into every rank's `buf` (same shape and dtype everywhere)."""
        buf = np.ascontiguousarray(buf)
        self._wait(self.comm.Ibcast(buf, root=0))
        return buf

    def bcast_bytes(self, data: bytes | None) -> bytes:
        """Rank 0's bytes on every rank (the length first, then the bytes)."""
        n = np.array([0 if data is None else len(data)], dtype=np.int64)
        self.bcast(n)
        buf = np.frombuffer(data, dtype=np.uint8).copy() if self.rank == 0 and data \
            else np.zeros(int(n[0]), dtype=np.uint8)
        return self.bcast(buf).tobytes()

    def allreduce(self, buf: np.ndarray, op: str = "sum") -> np.ndarray:
        """The elementwise sum (or "max") of `buf` over all ranks, on every rank."""
        mpi = _mpi()
        send = np.ascontiguousarray(buf)
        out = np.empty_like(send)
        self._wait(self.comm.Iallreduce(send, out, op=mpi.SUM if op == "sum" else mpi.MAX))
        return out

    def abort(self, code: int) -> None:
        self.comm.Abort(code)
