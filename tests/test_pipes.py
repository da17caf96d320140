"""What only the pipes transport does: a peer that stops reading, a pipe closed under a
write, raw bad bytes on the pipe (truncated, unexpected, oversized frames), the link
emulation and its option. The promises every transport keeps (large frames both ways at
once, exact data and byte counts, the all-reduce, deadlines, dead peers) are checked for the
pipes in tests/test_transport_contract.py."""
from __future__ import annotations

import os
import threading
import time

import numpy as np
import pytest

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.frames import FrameError
from shardtrain.transport.link import LinkModel
from shardtrain.transport.meter import Profile
from shardtrain.transport.pipes import PipeTransport, make_pipe_mesh

PIPE_BUFFER = 1 << 20        # frames below are several times this (and PIPE_BYTES)


# --- in one process: rank 0 is the test, the peer is driven by hand or by a thread ---------

def _pair(timeout_s=1.0, **kw):
    ends = make_pipe_mesh(2, {(0, 1)})
    return ends, PipeTransport(0, 2, ends[0], Profile(0), timeout_s=timeout_s, **kw)


def test_peer_that_never_reads_times_out_naming_it():
    ends, t = _pair(timeout_s=0.5)
    big = np.zeros(4 * PIPE_BUFFER // 8)     # cannot fit the pipe buffer
    with pytest.raises(RunError, match=r"waiting for worker 1 to read"):
        t.exchange({1: big}, {}, kind="halo", epoch=0, layer=0, direction="forward")
    ends[1].close()
    t.close()


def test_peer_death_while_receiving_is_named():
    ends, t = _pair(timeout_s=5)
    ends[1].close()
    with pytest.raises(RunError, match=r"worker 1 closed its pipe"):
        t.exchange({1: np.zeros(4 * PIPE_BUFFER // 8)}, {}, kind="halo", epoch=0, layer=0,
                   direction="forward")
    t.close()


def _raw(ends, data: bytes, close=True):
    fd = ends[1].send[0].fileno()
    os.write(fd, data)
    if close:
        ends[1].close()


def test_truncated_payload_is_a_frame_error_naming_the_peer():
    ends, t = _pair()
    frame = frames.encode_frame(np.arange(512.0), kind="halo", epoch=0, layer=0,
                                direction="forward", source=1)
    _raw(ends, frame[:-100])
    with pytest.raises(FrameError, match=r"frame from worker 1: truncated after 3996 of 4096 "
                                         r"payload bytes"):
        t.exchange({}, {1: np.empty(512)}, kind="halo", epoch=0, layer=0, direction="forward")
    t.close()


def test_truncated_header_is_a_frame_error_naming_the_peer():
    ends, t = _pair()
    frame = frames.encode_frame(np.arange(4.0), kind="halo", epoch=0, layer=0,
                                direction="forward", source=1)
    _raw(ends, frame[:20])
    with pytest.raises(FrameError, match=r"frame from worker 1: truncated after 16 of \d+ "
                                         r"header bytes"):
        t.exchange({}, {1: np.empty(4)}, kind="halo", epoch=0, layer=0, direction="forward")
    t.close()


@pytest.mark.parametrize("field,value,message", [
    ("epoch", 6, r"expected epoch 5, got 6"),
    ("kind", "grad", r"expected kind 'halo', got 'grad'"),
    ("direction", "backward", r"expected direction 'forward'"),
    ("layer", 2, r"expected layer 1, got 2"),
    ("source", 0, r"header names worker 0 as its source"),
])
def test_unexpected_frame_is_named(field, value, message):
    ends, t = _pair()
    meta = {"kind": "halo", "epoch": 5, "layer": 1, "direction": "forward", "source": 1}
    meta[field] = value
    _raw(ends, frames.encode_frame(np.arange(4.0), **meta), close=False)
    with pytest.raises(FrameError, match="frame from worker 1: " + message):
        t.exchange({}, {1: np.empty(4)}, kind="halo", epoch=5, layer=1, direction="forward")
    ends[1].close()
    t.close()


@pytest.mark.parametrize("buf,message", [
    (np.empty(5), r"shape \(4,\) does not match the receive buffer's \(5,\)"),
    (np.empty(4, np.float32), r"dtype float64 does not match the receive buffer's float32"),
])
def test_frame_that_does_not_fit_the_buffer_is_named(buf, message):
    ends, t = _pair()
    _raw(ends, frames.encode_frame(np.arange(4.0), kind="halo", epoch=0, layer=0,
                                   direction="forward", source=1), close=False)
    with pytest.raises(FrameError, match="frame from worker 1: " + message):
        t.exchange({}, {1: buf}, kind="halo", epoch=0, layer=0, direction="forward")
    ends[1].close()
    t.close()


def test_oversized_frame_is_refused_before_its_payload():
    ends, t = _pair(max_frame_bytes=1000)
    _raw(ends, frames.encode_header(kind="halo", epoch=0, layer=0, direction="forward",
                                    source=1, dtype=np.float64, shape=(1000,)), close=False)
    with pytest.raises(FrameError, match=r"frame from worker 1: payload of 8000 bytes exceeds "
                                         r"the limit of 1000 bytes"):
        t.exchange({}, {1: np.empty(1000)}, kind="halo", epoch=0, layer=0, direction="forward")
    ends[1].close()
    t.close()


def _threads(k=2, link=None):
    """k transports in k threads of this process (the poll loop releases the GIL)."""
    ends = make_pipe_mesh(k, {(p, q) for p in range(k) for q in range(p + 1, k)})
    return [PipeTransport(r, k, ends[r], Profile(r), timeout_s=20, link=link) for r in range(k)]


_threads_pair = _threads


def _both(ts, fn):
    errors = []

    def run(r):
        try:
            fn(r, ts[r])
        except BaseException as exc:
            errors.append(exc)
    threads = [threading.Thread(target=run, args=(r,)) for r in range(len(ts))]
    for th in threads:
        th.start()
    for th in threads:
        th.join(30)
    if errors:
        raise errors[0]


def test_emulated_link_is_no_faster_than_its_bandwidth():
    # 0.1 Gbit/s: a frame of B bytes cannot arrive before B * 8 / 1e8 s (a lower bound only).
    link = LinkModel(gbps=0.1, latency_us=0)
    ts = _threads_pair(link=link)
    payload = np.zeros(250_000 // 8)                    # 250 kB payload: at least 20 ms
    B = payload.nbytes + len(frames.encode_header(kind="halo", epoch=0, layer=0,
                                                  direction="forward", source=0,
                                                  dtype=payload.dtype, shape=payload.shape))
    stamps = {}

    def fn(r, t):
        inc = {1 - r: np.empty_like(payload)} if r == 1 else {}
        out = {1 - r: payload} if r == 0 else {}
        stamps["start", r] = time.perf_counter()
        t.exchange(out, inc, kind="halo", epoch=0, layer=0, direction="forward")
        stamps["end", r] = time.perf_counter()
    _both(ts, fn)
    link_s = B * 8 / 1e8
    assert stamps["end", 0] - stamps["start", 0] >= link_s      # the sender's call
    assert stamps["end", 1] - stamps["start", 0] >= link_s      # arrival at the receiver
    for t in ts:
        t.close()


def _frame_bytes(array, **meta):
    return array.nbytes + len(frames.encode_header(dtype=array.dtype, shape=array.shape,
                                                   **meta))


def test_emulated_link_serialises_a_workers_frames_and_adds_latency():
    # One interface per worker (see link.py): worker 0's frames to 1 and 2 leave one after
    # the other, so the second (in peer order) cannot arrive before latency + both frames'
    # bytes at 0.2 Gbit/s. Lower bounds only.
    link = LinkModel(gbps=0.2, latency_us=30_000)
    ts = _threads(3, link=link)
    a, b = np.zeros(50_000 // 8), np.zeros(100_000 // 8)
    meta = {"kind": "halo", "epoch": 0, "layer": 0, "direction": "forward", "source": 0}
    stamps = {}

    def fn(r, t):
        out = {1: a, 2: b} if r == 0 else {}
        inc = {0: np.empty_like(a if r == 1 else b)} if r else {}
        stamps["start", r] = time.perf_counter()
        t.exchange(out, inc, kind="halo", epoch=0, layer=0, direction="forward")
        stamps["end", r] = time.perf_counter()
    _both(ts, fn)
    first = 0.03 + _frame_bytes(a, **meta) * 8 / 2e8
    second = 0.03 + (_frame_bytes(a, **meta) + _frame_bytes(b, **meta)) * 8 / 2e8
    assert stamps["end", 1] - stamps["start", 0] >= first
    assert stamps["end", 2] - stamps["start", 0] >= second
    assert stamps["end", 0] - stamps["start", 0] >= second
    for t in ts:
        t.close()


def test_emulated_link_delays_every_all_reduce_step():
    # Ring all-reduce of k = 3: 2(k-1) = 4 steps, each one frame to the right neighbour, so
    # at least 4 latencies (Patarasuk & Yuan 2009 step count).
    link = LinkModel(gbps=10, latency_us=20_000)
    ts = _threads(3, link=link)
    stamps = {}

    def fn(r, t):
        buf = np.full(30, float(r))
        stamps["start", r] = time.perf_counter()
        t.allreduce_sum(buf, epoch=0)
        stamps["end", r] = time.perf_counter()
        assert np.all(buf == 3.0)
    _both(ts, fn)
    assert min(stamps["end", r] - stamps["start", r] for r in range(3)) >= 4 * 0.02 * 0.999
    for t in ts:
        t.close()


@pytest.mark.parametrize("text,want", [("10", (10.0, 0.0)), ("0.05:250", (0.05, 250.0)),
                                       (" 2.5 : 0 ", (2.5, 0.0)), ("1e-1:5", (0.1, 5.0))])
def test_link_option_parses(text, want):
    from shardtrain.transport.link import parse_link
    m = parse_link(text)
    assert (m.gbps, m.latency_us) == want


@pytest.mark.parametrize("text", ["", "fast", "0", "-1", "1:", "1:-5", "1:2:3", "10gbps"])
def test_bad_link_option_names_the_option(text):
    from shardtrain.cli.flags import cli_message
    from shardtrain.errors import InputError
    from shardtrain.transport.link import parse_link
    with pytest.raises(InputError, match=r"^emulate_link: ") as info:   # the parameter
        parse_link(text)
    assert cli_message(info.value).startswith("--emulate-link: ")      # the option


# --- started exchanges (exchange_start): what only the pipes show -------------------------

def _busy(check, limit_s=30.0) -> bool:
    """Compute until `check()` (or `limit_s`): the caller is busy, not in the transport."""
    a = np.random.default_rng(1).standard_normal((100, 100))
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline and not check():
        a = np.tanh(a @ a)
    return bool(check())


def test_started_exchange_hides_the_emulated_link_time_behind_compute():
    # 0.05 Gbit/s: the 250 kB frame needs >= 40 ms on the link (link.py's model, a lower
    # bound). Both workers start the exchange and compute until it is done: the whole time
    # in flight is hidden (the caller was never blocked for it), and it is at least the
    # link's time. A blocking exchange over the same link hides nothing.
    link = LinkModel(gbps=0.05, latency_us=0)
    ts = _threads(link=link)
    payload = np.arange(250_000 // 8, dtype=np.float64)
    meta = {"kind": "halo", "epoch": 0, "layer": 0, "direction": "forward"}
    link_s = _frame_bytes(payload, source=0, **meta) * 8 / 5e7
    seen = {}

    def fn(r, t):
        inc = {1 - r: np.empty_like(payload)}
        h = t.exchange_start({1 - r: payload}, inc, **meta)
        seen["done before wait", r] = _busy(h.done)
        h.wait()
        seen["data", r] = np.array_equal(inc[1 - r], payload)
        t.exchange({1 - r: payload}, inc, kind="halo", epoch=1, layer=0, direction="forward")
    _both(ts, fn)
    for r, t in enumerate(ts):
        assert seen["done before wait", r] and seen["data", r]
        ov = t.profile.to_dict()["overlap"]
        assert ov["handles"] == 1                         # the blocking exchange adds none
        assert ov["blocked_s"] == 0.0                      # done before wait: never blocked
        assert ov["hidden_s"] == ov["in_flight_s"] >= link_s
        t.close()


def test_overlapping_calls_queue_on_the_one_emulated_interface():
    # Worker 0 starts two exchanges to worker 1 back to back: on its one interface the
    # second frame leaves after the first (link.py), so it cannot arrive before
    # latency + both frames at 0.1 Gbit/s. Lower bound only.
    link = LinkModel(gbps=0.1, latency_us=10_000)
    ts = _threads(link=link)
    a, b = np.zeros(100_000 // 8), np.ones(150_000 // 8)
    meta = {"kind": "halo", "epoch": 0, "direction": "forward"}
    stamps = {}

    def fn(r, t):
        if r == 0:
            stamps["start"] = time.perf_counter()
            h1 = t.exchange_start({1: a}, {}, layer=0, **meta)
            h2 = t.exchange_start({1: b}, {}, layer=1, **meta)
            h1.wait()
            h2.wait()
        else:
            ia, ib = np.empty_like(a), np.empty_like(b)
            h1 = t.exchange_start({}, {0: ia}, layer=0, **meta)
            h2 = t.exchange_start({}, {0: ib}, layer=1, **meta)
            h2.wait()
            stamps["second"] = time.perf_counter()
            h1.wait()
            assert np.array_equal(ia, a) and np.array_equal(ib, b)
    _both(ts, fn)
    both = sum(_frame_bytes(x, source=0, layer=i, **meta) for i, x in enumerate((a, b)))
    assert stamps["second"] - stamps["start"] >= 0.01 + both * 8 / 1e8
    for t in ts:
        t.close()


def test_receives_are_matched_by_key_not_by_posting_order():
    # Worker 1 posts its receives in the other order than worker 0 sends the frames: each
    # frame still lands in the buffer of its own (kind, epoch, layer, direction).
    ts = _threads()
    big = {layer: np.full((300_000,), float(layer)) for layer in (1, 2)}   # > pipe buffer

    def fn(r, t):
        if r == 0:
            hs = [t.exchange_start({1: big[layer]}, {}, kind="halo", epoch=3, layer=layer,
                                   direction="forward") for layer in (1, 2)]
        else:
            inc = {layer: np.empty(300_000) for layer in (1, 2)}
            hs = [t.exchange_start({}, {0: inc[layer]}, kind="halo", epoch=3, layer=layer,
                                   direction="forward") for layer in (2, 1)]
        for h in hs:
            h.wait()
        if r == 1:
            assert all(np.array_equal(inc[layer], big[layer]) for layer in (1, 2))
    _both(ts, fn)
    for t in ts:
        t.close()


def test_a_wrong_frame_for_a_started_exchange_is_named_by_wait():
    ends, t = _pair()
    h = t.exchange_start({}, {1: np.empty(4)}, kind="halo", epoch=5, layer=1,
                         direction="forward")
    _raw(ends, frames.encode_frame(np.arange(4.0), kind="halo", epoch=6, layer=1,
                                   direction="forward", source=1), close=False)
    with pytest.raises(FrameError, match="frame from worker 1: expected epoch 5, got 6"):
        h.wait()
    with pytest.raises(FrameError):           # the transport is not usable any more
        t.exchange({}, {1: np.empty(4)}, kind="halo", epoch=7, layer=1, direction="forward")
    ends[1].close()
    t.close()


def test_debug_check_names_an_outgoing_array_modified_before_wait(monkeypatch):
    from shardtrain.transport import wire
    monkeypatch.setattr(wire, "CHECK_OUTGOING", True)
    ts = _threads()
    out = np.zeros(300_000)
    got = {}

    def fn(r, t):
        if r == 0:
            h = t.exchange_start({1: out}, {}, kind="halo", epoch=0, layer=0,
                                 direction="forward")
            out[-1] = 1.0                    # the caller breaks the promise
            try:
                h.wait()
                got["error"] = None
            except RunError as exc:
                got["error"] = str(exc)
            kept = np.zeros(4)                # and keeps it: no error
            t.exchange_start({1: kept}, {}, kind="halo", epoch=1, layer=0,
                             direction="forward").wait()
        else:
            t.exchange({}, {0: np.empty_like(out)}, kind="halo", epoch=0, layer=0,
                       direction="forward")
            t.exchange({}, {0: np.empty(4)}, kind="halo", epoch=1, layer=0,
                       direction="forward")
    _both(ts, fn)
    assert got["error"] == ("the outgoing array to worker 1 was modified before wait() "
                            "returned (halo forward, layer 0, epoch 0): a started exchange "
                            "sends it in place")
    for t in ts:
        t.close()
