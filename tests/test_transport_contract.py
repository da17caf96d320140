"""The transport contract (`shardtrain/transport/base.py`), one suite for every implementation.

Each promise is checked by a scenario: a function of (transport, rank, k, hold) run on every
rank, returning a msgpack-able dict. The ranks run as a training run runs them:
- "pipes": k spawned processes on a pipe mesh (all pairs and the ring), as the coordinator
  starts its workers;
- "mpi", "mpi-ring": `mpiexec -n K python tests/test_transport_contract.py GROUP OUTDIR
  ALLREDUCE TIMEOUT` (MPI's own all-reduce, and the ring over point-to-point messages);
- "loopback": in this process, of size 1 (its one-process, absent-peers mode is checked at
  the end). Where a promise needs a peer, a loopback of size 1 has none: those cases skip
  and say so.
Oracles, named at each check: the arrays sent (exact equality), numpy's float64 sum with
the rounding bound of recursive summation (Higham 2002, "Accuracy and Stability of Numerical
Algorithms", §4.2, from memory), `frames.encode_header` for the framing bytes, and the ring
schedule of Patarasuk & Yuan (2009, from memory) for the all-reduce traffic.
"""
from __future__ import annotations

import multiprocessing
import os
import re
import signal
import sys
import time
from multiprocessing.connection import wait
from pathlib import Path

import msgpack
import numpy as np
import pytest
from helpers import launch_mpi

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.base import ExchangeHandle, Transport
from shardtrain.transport.loopback import LoopbackTransport
from shardtrain.transport.meter import Profile, merge
from shardtrain.transport.pipes import PIPE_BYTES, PipeTransport, make_pipe_mesh, ring_pairs

CTX = multiprocessing.get_context("spawn")
PIPE_BUFFER = 1 << 20         # every large frame below is larger than this (and PIPE_BYTES)
WIDTH = 8
SUM_SIZES = (1_000_003, 7, 2, 1)      # not divisible by 2, 3 or 4; and sizes below k
DTYPES = (np.float32, np.float64)
DEADLINE_S = 1.0
SLOW_PEER_TIMEOUT_S = 20.0    # a dead peer must be noticed long before this

TRANSPORTS = ["pipes", "loopback",
              pytest.param("mpi", marks=pytest.mark.mpi),
              pytest.param("mpi-ring", marks=pytest.mark.mpi)]
PEER_TRANSPORTS = ["pipes", pytest.param("mpi", marks=pytest.mark.mpi),
                   pytest.param("mpi-ring", marks=pytest.mark.mpi)]
NO_PEERS = ("a loopback transport here has size 1: there is no peer to send to, wait for "
            "or lose, so this promise does not apply (its size-1 behaviour is checked by "
            "test_a_single_rank_exchanges_nothing_and_keeps_its_bits)")


# ---------------------------------------------------------------- the data of the scenarios

def _rows(p: int, q: int) -> int:
    """Rows of the large frame p sends to q: distinct per ordered pair, over 1 MB each."""
    return 40_000 + 7_919 * p + 104_729 * q % 50_000


def _payload(p: int, q: int, epoch: int, dtype) -> np.ndarray:
    base = np.arange(_rows(p, q) * WIDTH, dtype=np.float64).reshape(-1, WIDTH)
    return (base * (p + 1) + q * 0.5 + epoch).astype(dtype)


LARGE = ((0, "forward", np.float32), (1, "backward", np.float64))    # (epoch, direction, dtype)
SMALL_EPOCHS = (2, 3, 4)       # consecutive small frames from the same peer
STRIDED_EPOCH, EMPTY_EPOCH = 5, 6


def _strided(p: int) -> np.ndarray:
    return (np.arange(60.0).reshape(6, 10) * (p + 1))[:, ::2]      # not C-contiguous


def _sum_input(rank: int, size: int, dtype) -> np.ndarray:
    return np.random.default_rng(1000 * rank + size).standard_normal(size).astype(dtype)


# ---------------------------------------------------------------- scenarios (run on each rank)

def mesh(t, rank, k, hold) -> dict:
    """Every exchange shape the worker uses, with every peer at once."""
    peers = [q for q in range(k) if q != rank]
    ok = {}
    for epoch, direction, dtype in LARGE:
        inc = {q: np.empty((_rows(q, rank), WIDTH), dtype) for q in peers}
        with t.profile.phase("exchange"):
            t.exchange({q: _payload(rank, q, epoch, dtype) for q in peers}, inc, kind="halo",
                       epoch=epoch, layer=1, direction=direction)
        ok[f"large {direction}"] = all(np.array_equal(inc[q], _payload(q, rank, epoch, dtype))
                                       for q in peers)
    for epoch in SMALL_EPOCHS:
        inc = {q: np.empty((100 + epoch, 3)) for q in peers}
        t.exchange({q: np.full((100 + epoch, 3), 10.0 * rank + epoch) for q in peers}, inc,
                   kind="halo", epoch=epoch, layer=0, direction="forward")
        ok[f"small {epoch}"] = all(np.all(inc[q] == 10.0 * q + epoch) for q in peers)
    inc = {q: np.empty((6, 5)) for q in peers}
    t.exchange({q: _strided(rank) for q in peers}, inc, kind="halo", epoch=STRIDED_EPOCH,
               layer=0, direction="eval")
    ok["strided"] = all(np.array_equal(inc[q], _strided(q)) for q in peers)
    inc = {q: np.empty((0, 7), np.float32) for q in peers}
    t.exchange({q: np.zeros((0, 7), np.float32) for q in peers}, inc, kind="halo",
               epoch=EMPTY_EPOCH, layer=0, direction="eval")
    ok["empty"] = all(inc[q].shape == (0, 7) for q in peers)
    return {"ok": ok}


def allreduce(t, rank, k, hold) -> dict:
    sums = []
    for size in SUM_SIZES:
        for dtype in DTYPES:
            buf = _sum_input(rank, size, dtype)
            with t.profile.phase("allreduce"):
                t.allreduce_sum(buf, epoch=1)
            sums.append(buf.tobytes())
    return {"sums": sums}


def bad_arguments(t, rank, k, hold) -> dict:
    """Each call must raise ValueError before anything is sent (a later scenario on the same
    transport would read a stray frame otherwise)."""
    peer = (rank + 1) % k if k > 1 else 1
    meta = {"kind": "halo", "epoch": 0, "layer": 0, "direction": "forward"}
    frozen = np.zeros(4)
    frozen.flags.writeable = False
    calls = {
        "to itself": lambda: t.exchange({rank: np.zeros(4)}, {}, **meta),
        "to a rank outside": lambda: t.exchange({k: np.zeros(4)}, {}, **meta),
        "from a rank outside": lambda: t.exchange({}, {k + 1: np.zeros(4)}, **meta),
        "unsendable dtype": lambda: t.exchange({peer: np.zeros(4, np.int32)}, {}, **meta),
        "read-only buffer": lambda: t.exchange({}, {peer: frozen}, **meta),
        "strided buffer": lambda: t.exchange({}, {peer: np.zeros(8)[::2]}, **meta),
        "2-D sum": lambda: t.allreduce_sum(np.zeros((2, 2)), epoch=0),
        "int32 sum": lambda: t.allreduce_sum(np.zeros(4, np.int32), epoch=0),
    }
    raised = {}
    for name, call in calls.items():
        try:
            call()
            raised[name] = "nothing"
        except Exception as exc:      # the type is the check
            raised[name] = type(exc).__name__
    return {"raised": raised}


def alone(t, rank, k, hold) -> dict:
    t.exchange({}, {}, kind="halo", epoch=1, layer=0, direction="forward")
    before, after = [], []
    for size in SUM_SIZES:
        for dtype in DTYPES:
            buf = _sum_input(rank, size, dtype)
            before.append(buf.tobytes())
            t.allreduce_sum(buf, epoch=1)
            after.append(buf.tobytes())
    return {"before": before, "after": after}


def _timed(call) -> dict:
    t0 = time.perf_counter()
    try:
        call()
    except RunError as exc:
        return {"error": str(exc), "type": type(exc).__name__,
                "elapsed_s": time.perf_counter() - t0}
    return {"error": None, "elapsed_s": time.perf_counter() - t0}


def silent(t, rank, k, hold) -> dict:
    """Rank 0 waits for a frame rank 1 never sends; rank 1 stays alive and quiet."""
    if rank == 0:
        return _timed(lambda: t.exchange({}, {1: np.empty(3)}, kind="halo", epoch=0, layer=0,
                                         direction="forward"))
    hold()
    return {}


def wrong(t, rank, k, hold) -> dict:
    """Rank 1 sends epoch 9's frame where rank 0 waits for epoch 0's."""
    if rank == 0:
        return _timed(lambda: t.exchange({}, {1: np.empty(4)}, kind="halo", epoch=0, layer=0,
                                         direction="forward"))
    t.exchange({0: np.zeros(4)}, {}, kind="halo", epoch=9, layer=0, direction="forward")
    hold()
    return {}


def death(t, rank, k, hold) -> dict:
    """Rank 1 is killed (SIGKILL: no clean-up of any kind) while rank 0 exchanges with it."""
    if rank == 1:
        hold("dying")                 # says its pid, then dies
        os.kill(os.getpid(), signal.SIGKILL)
    return _timed(lambda: t.exchange({1: _payload(0, 1, 0, np.float64)},
                                     {1: np.empty((_rows(1, 0), WIDTH))}, kind="halo",
                                     epoch=0, layer=0, direction="forward"))


# ---------------------------------------------------------------- started exchanges

OVERLAP_EPOCH = 10           # epochs of the frames of `overlapped` (10..13)
BUSY_S = 60.0                # the caller computes at most this long waiting for the bytes


def _started(t, out, inc, **meta) -> dict:
    """`exchange` as start + compute + wait: where the error came from, and how long."""
    t0 = time.perf_counter()
    try:
        h = t.exchange_start(out, inc, **meta)
    except RunError as exc:
        return {"error": str(exc), "type": type(exc).__name__, "raised_in": "start",
                "elapsed_s": time.perf_counter() - t0}
    np.linalg.svd(np.ones((64, 64)))                # the caller computes meanwhile
    try:
        h.wait()
    except RunError as exc:
        return {"error": str(exc), "type": type(exc).__name__, "raised_in": "wait",
                "elapsed_s": time.perf_counter() - t0}
    return {"error": None, "elapsed_s": time.perf_counter() - t0}


def _busy_until(check) -> tuple[bool, int]:
    """Compute (matrix products) until `check()` or BUSY_S; (check passed, rounds)."""
    a = np.random.default_rng(0).standard_normal((120, 120))
    deadline, rounds = time.monotonic() + BUSY_S, 0
    while time.monotonic() < deadline:
        if check():
            return True, rounds
        a = np.tanh(a @ a)
        rounds += 1
    return bool(check()), rounds


def overlapped(t, rank, k, hold) -> dict:
    """Started exchanges: two outstanding at once (different keys) with a blocking exchange
    and an all-reduce between their start and their wait, waited for in reverse order; one
    whose bytes must have moved while the caller computed; the same key twice."""
    peers = [q for q in range(k) if q != rank]
    e = OVERLAP_EPOCH
    ok = {}
    inc_a = {q: np.empty((_rows(q, rank), WIDTH), np.float32) for q in peers}
    inc_b = {q: np.empty((_rows(rank, q), WIDTH)) for q in peers}
    out_a = {q: _payload(rank, q, e, np.float32) for q in peers}
    out_b = {q: _payload(q, rank, e + 1, np.float64) for q in peers}     # other sizes
    h_a = t.exchange_start(out_a, inc_a, kind="halo", epoch=e, layer=1, direction="forward")
    h_b = t.exchange_start(out_b, inc_b, kind="halo", epoch=e, layer=2, direction="backward")
    inc_c = {q: np.empty((5, 3)) for q in peers}
    t.exchange({q: np.full((5, 3), 10.0 * rank) for q in peers}, inc_c, kind="halo",
               epoch=e, layer=0, direction="forward")
    buf = np.full(1001, float(rank + 1))
    t.allreduce_sum(buf, epoch=e)
    is_handle = isinstance(h_a, ExchangeHandle) and isinstance(h_b, ExchangeHandle)
    h_b.wait()
    h_a.wait()
    ok["two outstanding"] = is_handle and all(
        np.array_equal(inc_a[q], _payload(q, rank, e, np.float32))
        and np.array_equal(inc_b[q], _payload(rank, q, e + 1, np.float64)) for q in peers)
    ok["blocking between"] = all(np.all(inc_c[q] == 10.0 * q) for q in peers)
    ok["allreduce between"] = bool(np.all(buf == k * (k + 1) / 2))

    # Overlap: the peers' large frames (several pipe buffers each) must land while this
    # rank computes. Pipes and loopback: the buffer itself is watched, and done() (which
    # only reads a flag there) must follow: the frames were read, and this rank's own
    # frames read by its peers, with no call into the transport. MPI moves a large message
    # only inside the library, so there the caller's compute is interleaved with done(),
    # which tests the requests (see transport/mpi.py).
    inc_d = {q: np.zeros((_rows(q, rank), WIDTH)) for q in peers}
    want = {q: _payload(q, rank, e + 2, np.float64) for q in peers}
    h_d = t.exchange_start({q: _payload(rank, q, e + 2, np.float64) for q in peers}, inc_d,
                           kind="halo", epoch=e + 2, layer=1, direction="forward")
    calls_mpi = type(t).__name__.startswith("Mpi")
    filled, rounds = _busy_until(
        h_d.done if calls_mpi else
        lambda: all(np.array_equal(inc_d[q], want[q]) for q in peers) and h_d.done())
    done_before = h_d.done()
    h_d.wait()
    ok["data after wait"] = all(np.array_equal(inc_d[q], want[q]) for q in peers)

    h_e = t.exchange_start({}, {}, kind="halo", epoch=e + 3, layer=0, direction="forward")
    try:
        t.exchange_start({}, {}, kind="halo", epoch=e + 3, layer=0, direction="forward")
        same_key = "nothing"
    except ValueError as exc:
        same_key = "ValueError" if "outstanding" in str(exc) else str(exc)
    h_e.wait()
    h_e.wait()                                   # a second wait returns at once
    return {"ok": ok, "filled_before_wait": filled, "done_before_wait": done_before,
            "rounds": rounds, "same_key": same_key}


def closing(t, rank, k, hold) -> dict:
    """A handle whose frames cannot arrive (no rank sends them) when the transport closes."""
    peers = [q for q in range(k) if q != rank]
    h = t.exchange_start({}, {q: np.empty(3) for q in peers}, kind="halo",
                         epoch=OVERLAP_EPOCH + 4, layer=0, direction="forward")
    t.close()
    try:
        h.wait()
    except RunError as exc:
        return {"type": type(exc).__name__, "message": str(exc)}   # ("error" would abort MPI)
    return {"type": None}


def silent_started(t, rank, k, hold) -> dict:
    if rank == 0:
        return _started(t, {}, {1: np.empty(3)}, kind="halo", epoch=0, layer=0,
                        direction="forward")
    hold()
    return {}


def wrong_started(t, rank, k, hold) -> dict:
    if rank == 0:
        return _started(t, {}, {1: np.empty(4)}, kind="halo", epoch=0, layer=0,
                        direction="forward")
    t.exchange_start({0: np.zeros(4)}, {}, kind="halo", epoch=9, layer=0,
                     direction="forward").wait()
    hold()
    return {}


def death_started(t, rank, k, hold) -> dict:
    if rank == 1:
        hold("dying")
        os.kill(os.getpid(), signal.SIGKILL)
    return _started(t, {1: _payload(0, 1, 0, np.float64)},
                    {1: np.empty((_rows(1, 0), WIDTH))}, kind="halo", epoch=0, layer=0,
                    direction="forward")


GROUPS = {  # group -> (scenarios, k or None for any, transport timeout)
    "mesh": ((bad_arguments, mesh, allreduce), None, 30.0),
    "alone": ((bad_arguments, alone), 1, 30.0),
    "silent": ((silent,), 2, DEADLINE_S),
    "wrong": ((wrong,), 2, 10.0),
    "death": ((death,), 2, SLOW_PEER_TIMEOUT_S),
    "overlap": ((overlapped, closing), None, 30.0),
    "silent-started": ((silent_started,), 2, DEADLINE_S),
    "wrong-started": ((wrong_started,), 2, 10.0),
    "death-started": ((death_started,), 2, SLOW_PEER_TIMEOUT_S),
}
SCENARIO_OF = {"silent": "silent", "wrong": "wrong", "death": "death",
               "silent-started": "silent_started", "wrong-started": "wrong_started",
               "death-started": "death_started"}
STYLES = ("", "-started")     # blocking exchange; exchange_start + wait


def run_group(t, rank, k, group, hold) -> dict:
    out = {"is_transport": isinstance(t, Transport), "rank": rank}
    for scenario in GROUPS[group][0]:
        out[scenario.__name__] = scenario(t, rank, k, hold)
    out["profile"] = t.profile.to_dict()
    return out


# ---------------------------------------------------------------- runners

def _pipes_rank(group, rank, k, ends, timeout_s, release, conn):
    """One spawned worker process on its pipe ends."""
    try:
        t = PipeTransport(rank, k, ends, Profile(rank), timeout_s=timeout_s)

        def hold(note=None):
            if note:                   # say something and go on
                conn.send_bytes(msgpack.packb({"note": note, "pid": os.getpid()}))
                return
            release.wait(60)           # stay alive and silent until another rank is done
        result = run_group(t, rank, k, group, hold)
        t.close()
    except BaseException as exc:  # report, do not hang the test
        result = {"crash": f"{type(exc).__name__}: {exc}"}
    conn.send_bytes(msgpack.packb(result))


def _run_pipes(group, k, timeout_s):
    ends = make_pipe_mesh(k, {(p, q) for p in range(k) for q in range(p + 1, k)}
                          | ring_pairs(k))
    release = CTX.Event()
    conns, procs = {}, []
    for r in range(k):
        reader, writer = CTX.Pipe(duplex=False)
        p = CTX.Process(target=_pipes_rank, args=(group, r, k, ends[r], timeout_s, release,
                                                  writer))
        p.start()
        writer.close()
        conns[reader] = r
        procs.append(p)
    for e in ends:
        e.close()
    results: dict[int, dict] = {}
    notes: dict[int, dict] = {}
    deadline = time.monotonic() + 120
    while conns and time.monotonic() < deadline:
        for c in wait(list(conns), timeout=5):
            r = conns[c]
            try:
                msg = msgpack.unpackb(c.recv_bytes())
            except EOFError:                          # the process is gone
                msg = {"died": True}
            if "note" in msg:
                notes[r] = msg
                continue
            results[r] = msg
            del conns[c]
            release.set()                             # a holding peer may go now
    for p in procs:
        p.join(10)
        if p.is_alive():                              # a hung rank: end it, then fail
            p.kill()
            p.join(10)
    assert not conns, f"ranks {sorted(conns.values())} sent no result in 120 s"
    return {"ranks": [results[r] for r in range(k)], "notes": notes}


def _run_mpi(group, k, allreduce_mode, timeout_s, out: Path):
    out.mkdir(parents=True, exist_ok=True)
    proc, seconds = launch_mpi(k, [__file__, group, str(out), allreduce_mode, str(timeout_s)])
    ranks = [msgpack.unpackb((out / f"rank{r}.msgpack").read_bytes())
             if (out / f"rank{r}.msgpack").exists() else None for r in range(k)]
    notes = {r: msgpack.unpackb((out / f"note{r}.msgpack").read_bytes())
             for r in range(k) if (out / f"note{r}.msgpack").exists()}
    return {"ranks": ranks, "notes": notes, "returncode": proc.returncode,
            "output": proc.stdout + proc.stderr, "seconds": seconds}


def _run_loopback(group, k):
    if k != 1:
        pytest.skip(NO_PEERS)
    t = LoopbackTransport(0, 1, Profile(0))
    return {"ranks": [run_group(t, 0, 1, group, lambda note=None: None)], "notes": {}}


_CACHE: dict = {}


def ran(transport, group, k, tmp_path_factory) -> dict:
    """The group's results on `transport` with k ranks (each launch once per module)."""
    key = (transport, group, k)
    if key not in _CACHE:
        timeout_s = GROUPS[group][2]
        if transport == "pipes":
            _CACHE[key] = _run_pipes(group, k, timeout_s)
        elif transport == "loopback":
            _CACHE[key] = _run_loopback(group, k)
        else:
            mode = "ring" if transport == "mpi-ring" else "mpi"
            _CACHE[key] = _run_mpi(group, k, mode, timeout_s,
                                   tmp_path_factory.mktemp(f"{transport}-{group}-{k}"))
    res = _CACHE[key]
    if transport.startswith("mpi") and group in ("mesh", "alone"):
        assert res["returncode"] == 0, res["output"][-3000:]
    for r in res["ranks"]:
        assert r is None or "crash" not in r, r
    return res


# ---------------------------------------------------------------- expected counts

def _header(kind, epoch, layer, direction, source, dtype, shape) -> int:
    return len(frames.encode_header(kind=kind, epoch=epoch, layer=layer, direction=direction,
                                    source=source, dtype=dtype, shape=shape))


def _mesh_rows(rank, k) -> dict:
    """(src, dst, kind, layer, direction) -> [payload, framing, frames] that `mesh` must
    count on `rank`: every frame once as sent and once as received, framing as frames.py
    encodes the header."""
    rows: dict[tuple, list[int]] = {}

    def add(src, dst, epoch, layer, direction, dtype, shape):
        key = (src, dst, "halo", layer, direction)
        row = rows.setdefault(key, [0, 0, 0])
        row[0] += int(np.prod(shape)) * np.dtype(dtype).itemsize
        row[1] += _header("halo", epoch, layer, direction, src, dtype, shape)
        row[2] += 1

    for q in range(k):
        if q == rank:
            continue
        for src, dst in ((rank, q), (q, rank)):
            for epoch, direction, dtype in LARGE:
                add(src, dst, epoch, 1, direction, dtype, (_rows(src, dst), WIDTH))
            for epoch in SMALL_EPOCHS:
                add(src, dst, epoch, 0, "forward", np.float64, (100 + epoch, 3))
            add(src, dst, STRIDED_EPOCH, 0, "eval", np.float64, (6, 5))
            add(src, dst, EMPTY_EPOCH, 0, "eval", np.float32, (0, 7))
    return rows


def _ring_rows(rank, k) -> dict:
    """What one rank sends and receives in the `allreduce` scenario, from the ring schedule
    of Patarasuk & Yuan (2009, from memory): the vector is cut into k chunks as
    np.array_split cuts it; in reduce-scatter step s rank r sends chunk (r - s) mod k to
    r + 1 and receives chunk (r - s - 1) mod k from r - 1; in all-gather step s it sends
    chunk (r + 1 - s) and receives chunk (r - s). Layer -1, epoch 1."""
    rows: dict[tuple, list[int]] = {}
    if k == 1:
        return rows
    right, left = (rank + 1) % k, (rank - 1) % k
    for size in SUM_SIZES:
        lengths = [len(c) for c in np.array_split(np.empty(size), k)]
        for dtype in DTYPES:
            steps = [("reduce-scatter", (rank - s) % k, (rank - s - 1) % k) for s in range(k - 1)]
            steps += [("all-gather", (rank + 1 - s) % k, (rank - s) % k) for s in range(k - 1)]
            for direction, c_send, c_recv in steps:
                for src, dst, c in ((rank, right, c_send), (left, rank, c_recv)):
                    row = rows.setdefault((src, dst, "allreduce", -1, direction), [0, 0, 0])
                    row[0] += lengths[c] * np.dtype(dtype).itemsize
                    row[1] += _header("allreduce", 1, -1, direction, src, dtype, (lengths[c],))
                    row[2] += 1
    return rows


def _counted(profile, kind) -> dict:
    return {(r["src"], r["dst"], r["kind"], r["layer"], r["direction"]):
            [r["payload_bytes"], r["framing_bytes"], r["frames"]]
            for r in profile["bytes"] if r["kind"] == kind}


# ---------------------------------------------------------------- the contract

# k = 4 moves ~100 MB over pipes on 2 cores (> 3 s): the quick tier stops at 3
K_VALUES = (2, 3, pytest.param(4, marks=pytest.mark.slow))


@pytest.mark.parametrize("k", K_VALUES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_large_frames_cross_all_pairs_both_ways_at_once(transport, k, tmp_path_factory):
    res = ran(transport, "mesh", k, tmp_path_factory)
    # Every large frame is larger than the pipe buffer, and all are in flight at once: a
    # transport that sent before receiving would deadlock here (common practice).
    assert PIPE_BYTES <= PIPE_BUFFER
    assert min(_rows(p, q) for p in range(k) for q in range(k)) * WIDTH * 4 > PIPE_BUFFER
    for r in res["ranks"]:
        assert r["is_transport"]
        assert r["mesh"]["ok"] == {name: True for name in r["mesh"]["ok"]}, r["mesh"]["ok"]
        assert len(r["mesh"]["ok"]) == 2 + len(SMALL_EPOCHS) + 2


@pytest.mark.parametrize("k", K_VALUES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_every_frame_is_counted_as_the_frames_module_encodes_it(transport, k,
                                                                tmp_path_factory):
    res = ran(transport, "mesh", k, tmp_path_factory)
    for rank, r in enumerate(res["ranks"]):
        assert _counted(r["profile"], "halo") == _mesh_rows(rank, k)
    totals = merge([r["profile"] for r in res["ranks"]])
    assert totals["consistent"], totals["mismatches"]   # receivers counted what was sent


@pytest.mark.parametrize("k", K_VALUES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_allreduce_has_identical_bits_everywhere_within_rounding_of_the_exact_sum(
        transport, k, tmp_path_factory):
    res = ran(transport, "mesh", k, tmp_path_factory)
    i = 0
    for size in SUM_SIZES:
        for dtype in DTYPES:
            got = [np.frombuffer(r["allreduce"]["sums"][i], dtype) for r in res["ranks"]]
            i += 1
            assert all(g.tobytes() == got[0].tobytes() for g in got), (size, dtype)
            inputs = np.array([_sum_input(r, size, dtype) for r in range(k)], np.float64)
            exact = np.sum(inputs, axis=0)
            # Recursive summation of k terms in any order: |error| <= gamma_(k-1) * sum|x|,
            # gamma_n = n u / (1 - n u), u = eps / 2 (Higham 2002, §4.2, from memory); the
            # float64 oracle adds its own gamma_(k-1) in float64.
            def gamma(dt):
                u = np.finfo(dt).eps / 2
                return (k - 1) * u / (1 - (k - 1) * u)
            bound = (gamma(dtype) + gamma(np.float64)) * np.abs(inputs).sum(axis=0)
            assert np.all(np.abs(got[0].astype(np.float64) - exact) <= bound), (size, dtype)


@pytest.mark.parametrize("k", K_VALUES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_allreduce_is_counted_as_the_ring_of_patarasuk_and_yuan(transport, k,
                                                                tmp_path_factory):
    from shardtrain.transport.ring import ring_send_elements

    res = ran(transport, "mesh", k, tmp_path_factory)
    for rank, r in enumerate(res["ranks"]):
        counted = _counted(r["profile"], "allreduce")
        assert counted == _ring_rows(rank, k)
        sent = sum(v[0] for key, v in counted.items() if key[0] == rank)
        # 2(k-1) frames per all-reduce and the survey's prediction of the elements
        assert sum(v[2] for key, v in counted.items() if key[0] == rank) == \
            2 * (k - 1) * len(SUM_SIZES) * len(DTYPES)
        assert sent == sum(int(ring_send_elements(size, k)[rank]) * np.dtype(dt).itemsize
                           for size in SUM_SIZES for dt in DTYPES)


@pytest.mark.parametrize("transport", TRANSPORTS)
def test_bad_arguments_raise_value_error_before_anything_is_sent(transport,
                                                                 tmp_path_factory):
    k = 1 if transport == "loopback" else 2
    res = ran(transport, "mesh" if k > 1 else "alone", k, tmp_path_factory)
    for r in res["ranks"]:
        raised = r["bad_arguments"]["raised"]
        assert raised == {name: "ValueError" for name in raised}, raised
        assert len(raised) == 8
        # nothing was sent: the exchanges that follow on the same transport got exactly
        # their own frames (a stray one would be a FrameError or wrong data)
        assert all(r.get("mesh", {"ok": {"": True}})["ok"].values())


@pytest.mark.parametrize("transport", TRANSPORTS)
def test_a_single_rank_exchanges_nothing_and_keeps_its_bits(transport, tmp_path_factory):
    res = ran(transport, "alone", 1, tmp_path_factory)
    (r,) = res["ranks"]
    assert r["is_transport"]
    # The sum over one rank is the vector itself, bit for bit (common practice).
    assert r["alone"]["after"] == r["alone"]["before"]
    assert r["profile"]["bytes"] == []            # nothing crossed a wire, nothing counted
    assert r["profile"]["bytes_sent"] == r["profile"]["bytes_received"] == 0


@pytest.mark.parametrize("style", STYLES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_a_silent_peer_is_a_run_error_at_the_deadline(transport, style, tmp_path_factory):
    if transport == "loopback":
        pytest.skip(NO_PEERS)
    res = ran(transport, "silent" + style, 2, tmp_path_factory)
    got = res["ranks"][0][SCENARIO_OF["silent" + style]]
    if style:
        assert got["raised_in"] == "wait"
    assert got["type"] == "RunError"
    assert got["error"] == ("timed out after 1 s waiting for worker 1 "
                            "(halo forward, layer 0, epoch 0)")
    # the deadline is 1 s without progress: not before it, and no hang after it (the upper
    # bound is loose on purpose: 2 shared cores)
    assert DEADLINE_S <= got["elapsed_s"] < 10 * DEADLINE_S
    if transport.startswith("mpi"):
        assert res["returncode"] != 0                # rank 0 aborted the job after reporting
        assert res["seconds"] < 30                   # ... and the waiting rank went with it


@pytest.mark.parametrize("style", STYLES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_a_frame_other_than_the_expected_one_is_named(transport, style, tmp_path_factory):
    if transport == "loopback":
        pytest.skip(NO_PEERS)
    res = ran(transport, "wrong" + style, 2, tmp_path_factory)
    got = res["ranks"][0][SCENARIO_OF["wrong" + style]]
    if style:
        assert got["raised_in"] == "wait"
    assert got["type"] == "FrameError"
    assert got["error"].startswith("frame from worker 1: expected epoch 0, got 9")
    if transport.startswith("mpi"):
        assert res["returncode"] != 0 and res["seconds"] < 30


@pytest.mark.parametrize("style", STYLES)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_a_dead_peer_ends_the_call_naming_it_not_a_hang(transport, style, tmp_path_factory):
    if transport == "loopback":
        pytest.skip(NO_PEERS)
    res = ran(transport, "death" + style, 2, tmp_path_factory)
    pid = res["notes"][1]["pid"]
    if transport == "pipes":
        assert res["ranks"][1] == {"died": True}
        got = res["ranks"][0][SCENARIO_OF["death" + style]]
        if style:
            assert got["raised_in"] == "wait"
        assert got["type"] == "RunError"
        assert re.search(r"^worker 1 closed its pipe \(it has probably exited\)", got["error"])
        assert got["elapsed_s"] < SLOW_PEER_TIMEOUT_S / 2     # the pipe said so: no timeout
    else:
        # MPI cannot hand a rank's death to its peers as an error: the launcher ends the
        # whole job and names the process that died (see transport/mpi.py).
        assert res["returncode"] != 0
        assert re.search(rf"BAD TERMINATION.*\n.*PID {pid} ", res["output"]), res["output"]
        assert "Killed" in res["output"]
        assert res["ranks"][0] is None                      # rank 0 never finished its call
        assert res["seconds"] < SLOW_PEER_TIMEOUT_S / 2


def _overlap_rows(rank, k) -> dict:
    """The halo rows `overlapped` must count on `rank` (the frames of its three started
    exchanges and its one blocking exchange, as `frames.encode_header` encodes them): the
    same oracle as `_mesh_rows`, which the blocking exchanges meet."""
    rows: dict[tuple, list[int]] = {}
    e = OVERLAP_EPOCH

    def add(src, dst, epoch, layer, direction, dtype, shape):
        row = rows.setdefault((src, dst, "halo", layer, direction), [0, 0, 0])
        row[0] += int(np.prod(shape)) * np.dtype(dtype).itemsize
        row[1] += _header("halo", epoch, layer, direction, src, dtype, shape)
        row[2] += 1

    for q in range(k):
        if q == rank:
            continue
        for src, dst in ((rank, q), (q, rank)):
            add(src, dst, e, 1, "forward", np.float32, (_rows(src, dst), WIDTH))
            add(src, dst, e, 2, "backward", np.float64, (_rows(dst, src), WIDTH))
            add(src, dst, e, 0, "forward", np.float64, (5, 3))
            add(src, dst, e + 2, 1, "forward", np.float64, (_rows(src, dst), WIDTH))
    return rows


OVERLAP_K = (1, 2, 3)


def _overlap_run(transport, k, tmp_path_factory):
    if transport == "loopback" and k > 1:
        pytest.skip(NO_PEERS)
    if transport != "loopback" and k == 1:
        pytest.skip("size 1 of a peer transport is covered by the 'alone' group")
    return ran(transport, "overlap", k, tmp_path_factory)


@pytest.mark.parametrize("k", OVERLAP_K)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_started_exchanges_overlap_and_keep_frames_apart(transport, k, tmp_path_factory):
    res = _overlap_run(transport, k, tmp_path_factory)
    for r in res["ranks"]:
        got = r["overlapped"]
        assert got["ok"] == {name: True for name in got["ok"]}, got["ok"]
        assert len(got["ok"]) == 4
        # the bytes moved while the caller computed, before it called wait() (pipes: the
        # caller made no transport call meanwhile; MPI: only done())
        assert got["filled_before_wait"] and got["done_before_wait"]
        assert got["same_key"] == "ValueError"
        ov = r["profile"]["overlap"]
        assert ov["handles"] == 4                    # a, b, d and the empty one (e)
        assert ov["hidden_s"] == pytest.approx(ov["in_flight_s"] - ov["blocked_s"], abs=1e-9)


@pytest.mark.parametrize("k", OVERLAP_K)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_started_exchanges_are_counted_as_blocking_ones(transport, k, tmp_path_factory):
    res = _overlap_run(transport, k, tmp_path_factory)
    for rank, r in enumerate(res["ranks"]):
        assert _counted(r["profile"], "halo") == _overlap_rows(rank, k)
        ring = _counted(r["profile"], "allreduce")
        assert sum(v[2] for key, v in ring.items() if key[0] == rank) == 2 * (k - 1)
    totals = merge([r["profile"] for r in res["ranks"]])
    assert totals["consistent"], totals["mismatches"]


@pytest.mark.parametrize("k", OVERLAP_K)
@pytest.mark.parametrize("transport", TRANSPORTS)
def test_closing_with_a_handle_outstanding_fails_its_wait(transport, k, tmp_path_factory):
    res = _overlap_run(transport, k, tmp_path_factory)
    # Every rank closes with the receive posted; a rank whose peer closed first may learn of
    # it from the pipe (end-of-file) before it closes itself: a RunError naming that peer.
    what = "(halo forward, layer 0, epoch 14)"
    for rank, r in enumerate(res["ranks"]):
        got = r["closing"]
        assert got["type"] == "RunError", got
        assert (got["message"] == f"worker {rank}: the transport was closed with an "
                                  f"exchange outstanding {what}"
                or re.fullmatch(r"worker \d closed its pipe \(it has probably exited\) before "
                                rf"sending {re.escape(what[1:-1])} to worker {rank}",
                                got["message"])), got


# ---------------------------------------------------------------- loopback's absent peers

def test_loopback_with_absent_peers_zeroes_every_receive_and_counts_nothing():
    t = LoopbackTransport(2, 4, absent_peers=True)
    assert isinstance(t, Transport) and (t.rank, t.size) == (2, 4)
    inc = {0: np.ones((3, 2)), 3: np.ones((5, 2), np.float32)}
    t.exchange({0: np.ones((4, 2)), 1: np.ones((1, 2))}, inc, kind="halo", epoch=1, layer=0,
               direction="forward")
    assert all(not buf.any() for buf in inc.values())
    buf = _sum_input(2, 101, np.float32)
    keep = buf.tobytes()
    t.allreduce_sum(buf, epoch=1)
    assert buf.tobytes() == keep                 # the local value: the peers are absent
    assert t.profile.to_dict()["bytes"] == []
    with pytest.raises(ValueError, match="cannot exchange with worker 2"):
        t.exchange({2: np.ones(3)}, {}, kind="halo", epoch=1, layer=0, direction="forward")
    with pytest.raises(ValueError, match="absent_peers=True"):
        LoopbackTransport(1, 4)
    with pytest.raises(ValueError, match="0 <= rank < size"):
        LoopbackTransport(4, 4, absent_peers=True)


# ---------------------------------------------------------------- the per-rank MPI program

def _mpi_main(group: str, out: Path, allreduce_mode: str, timeout_s: float) -> None:
    from mpi4py import MPI

    from shardtrain.transport.mpi import MpiTransport

    comm = MPI.COMM_WORLD
    rank, k = comm.Get_rank(), comm.Get_size()
    t = MpiTransport(comm, Profile(rank), timeout_s=timeout_s, allreduce=allreduce_mode)

    def hold(note=None):
        if note:
            (out / f"note{rank}.msgpack").write_bytes(msgpack.packb({"note": note,
                                                                     "pid": os.getpid()}))
            return
        comm.Barrier()              # ends when the other rank aborts the job

    comm.Barrier()                  # every rank is up before any scenario starts
    result = run_group(t, rank, k, group, hold)
    (out / f"rank{rank}.msgpack").write_bytes(msgpack.packb(result))
    if any(isinstance(v, dict) and v.get("error") for v in result.values()):
        t.abort(3)                  # what the MPI driver does after reporting a RunError


if __name__ == "__main__":
    _mpi_main(sys.argv[1], Path(sys.argv[2]), sys.argv[3], float(sys.argv[4]))
