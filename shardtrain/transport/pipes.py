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

Started exchanges (`exchange_start`) are driven by a progress thread of the transport,
started at the first one: it runs the same kind of poll loop over every outstanding frame
(plus a wake-up pipe through which the caller posts new ones), so the bytes move, and the
emulated link's hold-back runs, while the caller computes (the system calls and the poll
release the GIL; numpy's large operations release it too). How frames stay apart:
- sends: one FIFO queue per peer; a frame starts when the one before it to that peer has
  gone, so frames follow each other whole on the pipe, in the order they were issued;
- receives: one reader per peer, reading only while a receive from that peer is posted. A
  header is matched by its (kind, epoch, layer, direction) against the receives posted from
  that peer (the first posted one with that key), and checked against it as `exchange`
  checks it; a header that matches none is checked against the first one posted, so the
  FrameError names what was expected. A frame is never buffered aside: the payload goes
  straight into the caller's buffer.
- deadlines: each active piece (the frame at the head of a peer's send queue, a peer's
  reader while receives are posted) fails the exchange it belongs to after `timeout_s`
  seconds without a byte moved (held-back link time is not idleness), with the messages of
  `exchange`. Any error ends the progress thread and fails every outstanding handle with it.
- the thread never touches the profile: a handle's frames are counted, and its blocked
  time reported, by the caller's thread in `wait()`.
When no started exchange is outstanding, `exchange` and the all-reduce run their poll loop
in the caller's thread (no hand-over between threads); otherwise they go through the
progress thread too, behind the frames already queued.
"""
from __future__ import annotations

import fcntl
import math
import multiprocessing
import os
import select
import threading
import time
from collections import deque
from collections.abc import Mapping
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from typing import cast

import numpy as np

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.frames import FrameError
from shardtrain.transport.link import Interface, LinkModel
from shardtrain.transport.meter import Profile
from shardtrain.transport.ring import ring_allreduce
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

# Kernel buffer per pipe: faster than the 64 KiB default, and a quarter of the kernel
# memory 1 MiB would pin for the k(k-1) pipes (benchmarks/bench_pipe.py compares the three).
PIPE_BYTES = 1 << 18

_F_SETPIPE_SZ = getattr(fcntl, "F_SETPIPE_SZ", 1031)
_IN = select.POLLIN | select.POLLHUP | select.POLLERR
_OUT = select.POLLOUT | select.POLLERR
_KEY = ("kind", "epoch", "layer", "direction")


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
    __slots__ = ("peer", "fd", "views", "total", "done", "due", "held", "op", "last")

    def __init__(self, peer, fd, header: bytes, array: np.ndarray):
        self.peer, self.fd = peer, fd
        self.op: _Op | None = None
        self.last = 0.0       # progress thread: activation or last byte written
        self.views = [memoryview(header), bytes_view(array)]
        self.total = len(header) + array.nbytes
        self.done = 0
        self.due = 0.0        # link emulation: the last byte may not leave before this
        self.held = False


def _array_of(s: _Send) -> np.ndarray:
    """The bytes of a send's payload, as an array (for the outgoing debug check)."""
    return np.frombuffer(s.views[1], dtype=np.uint8)


class _Recv:
    __slots__ = ("peer", "fd", "dest", "prefix", "header", "stage", "got", "need", "framing",
                 "op")

    def __init__(self, peer, fd, dest: np.ndarray):
        self.peer, self.fd, self.dest = peer, fd, dest
        self.op: _Op | None = None
        self.prefix = bytearray(frames.PREFIX_BYTES)
        self.header: bytearray | None = None   # allocated when the prefix has arrived
        self.stage = 0        # 0: length prefix, 1: header, 2: payload, 3: done
        self.got = 0
        self.need = frames.PREFIX_BYTES
        self.framing = 0


class _Reader:
    """Progress thread: the frame being read from one peer (prefix, header, then the payload
    into the matched receive `target`)."""
    __slots__ = ("peer", "fd", "prefix", "header", "stage", "got", "need", "target", "last",
                 "parsed")

    def __init__(self, peer: int, fd: int):
        self.peer, self.fd = peer, fd
        self.target: _Recv | None = None
        self.last: float | None = None      # activation or last byte read
        self.reset()

    def reset(self) -> None:
        self.prefix = bytearray(frames.PREFIX_BYTES)
        self.header: bytearray | None = None
        self.stage, self.got, self.need = 0, 0, frames.PREFIX_BYTES
        self.target = None
        self.parsed: dict | None = None     # a header read and not matched yet (parked)


class _Op:
    """One started exchange: its frames, what is left of it, and its outcome."""
    __slots__ = ("meta", "key", "sends", "recvs", "left", "started", "finished", "error",
                 "event", "link_until", "counts")

    def __init__(self, meta: dict, sends: list[_Send], recvs: list[_Recv]):
        self.meta = meta
        self.key = tuple(meta[k] for k in _KEY)
        self.sends, self.recvs = sends, recvs
        self.left = len(sends) + len(recvs)
        self.started = time.perf_counter()
        self.finished: float | None = None
        self.error: BaseException | None = None
        self.event = threading.Event()
        self.link_until = 0.0
        self.counts: list[tuple[int, int, int, int]] = []   # (src, dst, payload, framing)
        for s in sends:
            s.op = self
        for r in recvs:
            r.op = self
        if not self.left:
            self.finished = self.started
            self.event.set()


class PipeHandle:
    """A started exchange of a `PipeTransport` (see `base.ExchangeHandle`)."""

    def __init__(self, transport: PipeTransport, op: _Op, guard=None):
        self._transport, self._op = transport, op
        self._waited = False
        self._guard = guard                 # wire.outgoing_guard (debug check) or None

    def done(self) -> bool:
        """True when `wait()` would return (or raise) at once."""
        return self._op.event.is_set()

    def wait(self) -> None:
        """Block until every frame has moved; count them; raise the exchange's error."""
        if self._waited:
            return
        self._waited = True
        self._transport._finish(self._op)
        if self._guard is not None:
            self._guard()


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
        self._interface = Interface(link) if link is not None else None
        self._ends = ends
        self._send_fd = {q: c.fileno() for q, c in ends.send.items()}
        self._recv_fd = {q: c.fileno() for q, c in ends.recv.items()}
        for fd in (*self._send_fd.values(), *self._recv_fd.values()):
            os.set_blocking(fd, False)
        self._closed = False
        # progress thread (started with the first exchange_start)
        self._mu = threading.Lock()
        self._thread: threading.Thread | None = None
        self._wake_r = self._wake_w = -1
        self._stop = False
        self._failure: BaseException | None = None
        self._ops: list[_Op] = []                      # outstanding: not yet waited for
        self._waiting: _Op | None = None               # the op the caller is blocked on
        self._outq: dict[int, deque[_Send]] = {q: deque() for q in self._send_fd}
        self._posted: dict[int, list[_Recv]] = {q: [] for q in self._recv_fd}
        self._readers = {q: _Reader(q, fd) for q, fd in self._recv_fd.items()}

    # -- public API --------------------------------------------------------------------
    def exchange(self, outgoing: Mapping[int, np.ndarray], incoming: Mapping[int, np.ndarray],
                 *, kind: str, epoch: int, layer: int, direction: str) -> None:
        """Send outgoing[q] to every q and fill the preallocated incoming[q] from every q."""
        meta = {"kind": kind, "epoch": int(epoch), "layer": int(layer), "direction": direction}
        sends = [self._send(q, outgoing[q], meta) for q in sorted(outgoing)]
        recvs = [self._recv(q, incoming[q]) for q in sorted(incoming)]
        self._call(sends, recvs, meta)

    def exchange_start(self, outgoing: Mapping[int, np.ndarray],
                       incoming: Mapping[int, np.ndarray], *, kind: str, epoch: int,
                       layer: int, direction: str) -> PipeHandle:
        """Start `exchange` and return at once; the progress thread moves the frames.
        `outgoing` arrays are sent in place: do not modify them before `wait()` returns."""
        meta = {"kind": kind, "epoch": int(epoch), "layer": int(layer), "direction": direction}
        sends = [self._send(q, outgoing[q], meta) for q in sorted(outgoing)]
        recvs = [self._recv(q, incoming[q]) for q in sorted(incoming)]
        key = tuple(meta[k] for k in _KEY)
        if any(op.key == key for op in self._ops):
            raise ValueError(f"worker {self.rank} already has an exchange "
                             f"({frames.describe(meta)}) outstanding")
        guard = outgoing_guard({s.peer: _array_of(s) for s in sends}, meta)
        return PipeHandle(self, self._post(sends, recvs, meta), guard)

    def allreduce_sum(self, buf: np.ndarray, *, epoch: int) -> None:
        """Sum the 1-D contiguous `buf` over all workers in place (ring all-reduce)."""
        def step(dst, send_view, src, recv_view, direction, _step):
            meta = {"kind": KIND_ALLREDUCE, "epoch": int(epoch), "layer": NO_LAYER,
                    "direction": direction}
            self._call([self._send(dst, send_view, meta)], [self._recv(src, recv_view)], meta)
        frames.dtype_name(buf.dtype)
        ring_allreduce(buf, self.rank, self.size, step)

    def close(self) -> None:
        """Stop the progress thread (failing every handle not yet waited for), close pipes."""
        if self._closed:
            return
        self._closed = True
        with self._mu:
            self._stop = True
            for op in self._ops:
                if op.error is None and op.finished is None:
                    op.error = RunError(f"worker {self.rank}: the transport was closed with "
                                        f"an exchange outstanding ({frames.describe(op.meta)})")
                op.event.set()
        if self._thread is not None:
            self._wake()
            self._thread.join(10)
            os.close(self._wake_r)
            os.close(self._wake_w)
        self._ends.close()

    # -- started exchanges -------------------------------------------------------------
    def _call(self, sends: list[_Send], recvs: list[_Recv], meta: dict) -> None:
        """One blocking call: directly when nothing is outstanding, else behind the rest."""
        if self._failure is not None:
            raise self._failure
        if not self._ops:
            self._transfer(sends, recvs, meta)
            return
        self._finish(self._post(sends, recvs, meta), started=False)

    def _post(self, sends: list[_Send], recvs: list[_Recv], meta: dict) -> _Op:
        if self._closed:
            raise RunError(f"worker {self.rank}: the transport is closed")
        if self._failure is not None:
            raise self._failure
        op = _Op(meta, sends, recvs)
        if self._interface is not None and sends:
            dues = self._interface.schedule(op.started, [s.total for s in sends])
            for s, due in zip(sends, dues):
                s.due = due
            op.link_until = max(dues)
        with self._mu:
            self._ops.append(op)
        if op.left:
            with self._mu:
                for s in sends:
                    self._outq[s.peer].append(s)
                for r in recvs:
                    self._posted[r.peer].append(r)
            if self._thread is None:
                self._wake_r, self._wake_w = os.pipe()
                os.set_blocking(self._wake_r, False)
                os.set_blocking(self._wake_w, False)
                self._thread = threading.Thread(target=self._progress, daemon=True,
                                                name=f"pipes-progress-{self.rank}")
                self._thread.start()
            else:
                self._wake()
        return op

    def _wake(self) -> None:
        try:
            os.write(self._wake_w, b"x")
        except BlockingIOError:            # a wake-up is pending already
            pass

    def _finish(self, op: _Op, *, started: bool = True) -> None:
        """The caller's side of `wait()`: block, count, report the time, raise."""
        t0 = time.perf_counter()
        if not op.event.is_set():
            with self._mu:
                self._waiting = op
            self._wake()                    # a parked frame may now be judged (see _match)
        while not op.event.wait(0.5):
            thread = self._thread
            if thread is None or not thread.is_alive():     # cannot happen: belt and braces
                with self._mu:
                    if not op.event.is_set():
                        op.error = op.error or RunError(
                            f"worker {self.rank}: the progress thread of the pipes stopped "
                            f"({frames.describe(op.meta)})")
                        op.event.set()
        if self.link is not None and op.recvs and op.error is None:
            # the receiving side of the interface (link.py): the incoming frames, one after
            # the other, from the call's start; sleeping the rest is transfer time
            due = self.link.receive_due(op.started,
                                        sum(r.dest.nbytes + r.framing for r in op.recvs))
            op.link_until = max(op.link_until, due)
            op.finished = max(op.finished or 0.0, due)
            left = due - time.perf_counter()
            if left > 0:
                time.sleep(left)
        t1 = time.perf_counter()
        with self._mu:
            self._waiting = None
            if op in self._ops:
                self._ops.remove(op)
        for src, dst, payload, framing in op.counts:
            self.profile.count(src, dst, op.meta["kind"], op.meta["layer"],
                               op.meta["direction"], payload, framing)
        blocked = t1 - t0
        link_part = min(max(op.link_until - t0, 0.0), blocked)
        self.profile.add_wait(blocked - link_part)
        if op.error is not None:
            raise op.error
        if started:                        # a blocking call hides nothing: not reported
            finished = op.finished if op.finished is not None else t1
            self.profile.add_overlap(finished - op.started, max(min(finished, t1) - t0, 0.0))

    def _progress(self) -> None:
        """The progress thread: one poll loop over every outstanding frame."""
        try:
            while self._step():
                pass
        except BaseException as exc:       # every error ends the thread and fails the handles
            with self._mu:
                self._fail(exc)

    def _fail(self, exc: BaseException) -> None:
        if self._failure is None:
            self._failure = exc
        for op in self._ops:
            if op.finished is None and not op.event.is_set():
                op.error = exc
                op.event.set()

    def _part_done(self, op: _Op, src: int, dst: int, payload: int, framing: int) -> None:
        op.counts.append((src, dst, payload, framing))
        op.left -= 1
        if op.left == 0:
            op.finished = time.perf_counter()
            op.event.set()

    def _step(self) -> bool:
        """One round of the progress thread; False when the transport is closing."""
        wanted: list[tuple[int, int]] = [(self._wake_r, _IN)]
        by_fd: dict[int, _Send | _Reader] = {}
        with self._mu:
            if self._stop:
                return False
            now = time.perf_counter()
            limit = link_left = math.inf
            for q, queue in self._outq.items():
                if not queue:
                    continue
                s = queue[0]
                if not s.last:
                    s.last = now                        # it has just become the head
                if s.held:
                    if s.due > now:
                        s.last = now                    # emulated link time is not idleness
                        link_left = min(link_left, s.due - now)
                        continue
                    s.held = False
                idle = s.last + self.timeout_s - now
                if idle <= 0:
                    raise self._timeout_op(s.op, slow_send=s.peer)
                limit = min(limit, idle)
                wanted.append((s.fd, _OUT))
                by_fd[s.fd] = s
            for q, rd in self._readers.items():
                if rd.parsed is not None:
                    if not self._match(rd):
                        continue                # waits for this rank, not for the peer
                    if rd.target is None:       # an empty payload: done already
                        continue
                if rd.target is None and not self._posted[q]:
                    rd.last = None
                    continue
                if rd.last is None:
                    rd.last = now
                idle = rd.last + self.timeout_s - now
                if idle <= 0:
                    op = rd.target.op if rd.target is not None else self._posted[q][0].op
                    raise self._timeout_op(op, slow_send=None)
                limit = min(limit, idle)
                wanted.append((rd.fd, _IN))
                by_fd[rd.fd] = rd
        poller = select.poll()
        for fd, mask in wanted:
            poller.register(fd, mask)
        if link_left < min(limit, 1e-3):
            # poll() sleeps whole milliseconds: a frame due in 50 us would leave up to 1 ms
            # late, making the emulated link slower than the one described
            events = poller.poll(0)
            if not events:
                time.sleep(max(link_left, 0.0))
        else:
            limit = min(limit, link_left)
            events = poller.poll(-1 if limit == math.inf else max(0, math.ceil(limit * 1000)))
        with self._mu:
            if self._stop:
                return False
            now = time.perf_counter()
            for fd, _ev in events:
                if fd == self._wake_r:
                    try:
                        os.read(self._wake_r, 4096)
                    except BlockingIOError:
                        pass
                    continue
                st = by_fd[fd]
                if isinstance(st, _Send):
                    assert st.op is not None
                    if self._write(st, st.op.meta):
                        st.last = now
                    if st.done == st.total:
                        self._outq[st.peer].popleft()
                        self._part_done(st.op, self.rank, st.peer, st.views[1].nbytes,
                                        st.views[0].nbytes)
                else:
                    self._read_posted(st, now)
        return True

    def _read_posted(self, rd: _Reader, now: float) -> None:
        """Read frames from rd.peer while receives from it are posted (progress thread)."""
        posted = self._posted[rd.peer]
        while rd.parsed is None and (rd.target is not None or posted):
            if rd.stage == 0:
                view = memoryview(rd.prefix)[rd.got:]
            elif rd.stage == 1:
                assert rd.header is not None
                view = memoryview(rd.header)[rd.got:]
            else:
                assert rd.target is not None
                view = bytes_view(rd.target.dest)[rd.got:]
            meta = (rd.target or posted[0]).op.meta            # type: ignore[union-attr]
            try:
                n = os.readv(rd.fd, [view]) if len(view) else 0
            except BlockingIOError:
                return
            if n == 0 and len(view):
                raise self._eof_reader(rd, meta)
            rd.last = now
            rd.got += n
            if rd.got < rd.need:
                return
            if rd.stage == 0:
                length = frames.header_length(bytes(rd.prefix), peer=rd.peer)
                rd.header, rd.stage, rd.got, rd.need = bytearray(length), 1, 0, length
                continue
            if rd.stage == 1:
                assert rd.header is not None
                rd.parsed = frames.decode_header(rd.header, peer=rd.peer,
                                                 max_frame_bytes=self.max_frame_bytes)
                if not self._match(rd):
                    return                  # parked until its receive is posted
                if rd.need:
                    continue
            self._complete_read(rd)

    def _match(self, rd: _Reader) -> bool:
        """Give the parked header of rd.peer's next frame the posted receive of its key.

        None posted: it stays parked (its exchange may not have been started yet) unless
        the caller is blocked waiting for a receive from that peer: then no receive can be
        posted before that one, which can never arrive behind this frame, and the frame is
        checked against it (a FrameError saying what was expected)."""
        header = rd.parsed
        assert header is not None
        key = tuple(header[k] for k in _KEY)
        posted = self._posted[rd.peer]
        match = next((r for r in posted if r.op is not None and r.op.key == key), None)
        if match is None:
            waiting = self._waiting
            blocked = [r for r in (waiting.recvs if waiting is not None else ())
                       if r.peer == rd.peer and r in posted]
            if not blocked:
                return False
            match = blocked[0]
        assert match.op is not None
        frames.check_expected(header, peer=rd.peer, dtype=match.dest.dtype,
                              shape=match.dest.shape, **match.op.meta)
        posted.remove(match)
        match.framing = frames.PREFIX_BYTES + rd.need
        rd.parsed = None
        rd.target, rd.stage, rd.got, rd.need = match, 2, 0, header["nbytes"]
        rd.last = time.perf_counter()
        if not rd.need:
            self._complete_read(rd)
        return True

    def _complete_read(self, rd: _Reader) -> None:
        r = rd.target
        assert r is not None and r.op is not None
        rd.reset()
        self._part_done(r.op, rd.peer, self.rank, r.dest.nbytes, r.framing)

    def _eof_reader(self, rd: _Reader, meta: dict) -> RunError:
        what = frames.describe(meta)
        if rd.stage == 0 and rd.got == 0:
            return RunError(f"worker {rd.peer} closed its pipe (it has probably exited) before "
                            f"sending {what} to worker {self.rank}")
        part = ("length-prefix", "header", "payload")[rd.stage]
        return FrameError(rd.peer, f"truncated after {rd.got} of {rd.need} {part} bytes: the "
                                   f"pipe closed ({what})")

    def _timeout_op(self, op: _Op | None, slow_send: int | None) -> RunError:
        assert op is not None
        what = frames.describe(op.meta)
        slow_in = sorted({r.peer for r in op.recvs
                          if r in self._posted[r.peer] or self._readers[r.peer].target is r})
        if slow_in and slow_send is None:
            return RunError(f"timed out after {self.timeout_s:g} s waiting for "
                            f"{name_workers(slow_in)} ({what})")
        return RunError(f"timed out after {self.timeout_s:g} s waiting for "
                        f"worker {slow_send} to read ({what})")

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
        try:
            self._transfer_now(sends, recvs, meta)
        except RunError as exc:
            self._failure = exc
            raise

    def _transfer_now(self, sends: list[_Send], recvs: list[_Recv], meta: dict) -> None:
        start = time.perf_counter()
        if self._interface is not None and sends:
            for s, due in zip(sends, self._interface.schedule(start, [s.total for s in sends])):
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

