"""Frames: msgpack header + raw bytes; every defect is a FrameError naming the peer."""
from __future__ import annotations

import struct

import msgpack
import numpy as np
import pytest

from shardtrain.errors import RunError
from shardtrain.transport import frames
from shardtrain.transport.frames import FrameError

META = {"kind": "halo", "epoch": 5, "layer": 1, "direction": "forward", "source": 3}


def _frame(array=None, **over):
    array = np.arange(12, dtype=np.float32).reshape(3, 4) if array is None else array
    return frames.encode_frame(array, **{**META, **over})


def _with_header(header: dict, payload: bytes = b"") -> bytes:
    body = msgpack.packb(header)
    return struct.pack("<I", len(body)) + body + payload


def _good_header(**over):
    return {**META, "dtype": "float32", "shape": [3, 4], "nbytes": 48, **over}


@pytest.mark.parametrize("dtype", ["float32", "float64", "int64"])
def test_round_trip_keeps_bits_shape_and_meta(dtype):
    a = (np.arange(24).reshape(2, 3, 4) * 1.25).astype(dtype)
    header, b = frames.decode_frame(_frame(a), peer=3)
    assert b.dtype == a.dtype and b.shape == a.shape and b.tobytes() == a.tobytes()
    assert {k: header[k] for k in META} == META and header["nbytes"] == a.nbytes


def test_header_is_plain_msgpack_after_a_little_endian_length():
    # Reference: the msgpack specification (decoded by the msgpack package itself).
    buf = _frame()
    (n,) = struct.unpack("<I", buf[:4])
    assert msgpack.unpackb(buf[4:4 + n]) == _good_header()
    assert len(buf) == 4 + n + 48


def test_frame_error_is_a_run_error():
    assert issubclass(FrameError, RunError)


@pytest.mark.parametrize("cut,message", [
    (2, r"truncated after 2 of 4 length-prefix bytes"),
    (20, r"truncated after 16 of \d+ header bytes"),
    (-1, r"truncated after 47 of 48 payload bytes"),
])
def test_truncation_is_named(cut, message):
    with pytest.raises(FrameError, match=r"^frame from worker 3: " + message):
        frames.decode_frame(_frame()[:cut], peer=3)


def test_trailing_bytes_are_refused():
    with pytest.raises(FrameError, match=r"frame from worker 3: 1 bytes after the payload"):
        frames.decode_frame(_frame() + b"x", peer=3)


def test_oversized_payload_is_refused_from_the_header_alone():
    head = frames.encode_header(dtype=np.float64, shape=(1 << 20,), **META)
    with pytest.raises(FrameError, match=r"frame from worker 3: payload of 8388608 bytes "
                                         r"exceeds the limit of 1000 bytes"):
        frames.decode_header(head[4:], peer=3, max_frame_bytes=1000)


@pytest.mark.parametrize("n", [0, frames.MAX_HEADER_BYTES + 1, 0xFFFFFFFF])
def test_header_length_outside_limits_is_refused(n):
    with pytest.raises(FrameError, match=r"frame from worker 7: header length"):
        frames.header_length(struct.pack("<I", n), peer=7)


@pytest.mark.parametrize("header,message", [
    (_good_header(dtype="object"), r"dtype 'object' not allowed"),
    (_good_header(dtype="bfloat16", nbytes=24), r"dtype 'bfloat16' not allowed"),
    (_good_header(shape=[3, 5]), r"shape \[3, 5\] of float32 is 60 bytes but the header says 48"),
    (_good_header(shape=[3, -4]), r"is not a list of at most 8 non-negative integers"),
    (_good_header(shape="3x4"), r"is not a list"),
    (_good_header(source=2), r"header names worker 2 as its source"),
    (_good_header(epoch="5"), r"'epoch' is not an integer"),
    (_good_header(epoch=True), r"'epoch' is not an integer"),
    (_good_header(kind=""), r"'kind' is not a short string"),
    ({k: v for k, v in _good_header().items() if k != "layer"}, r"missing \['layer'\]"),
    ({**_good_header(), "pickle": 1}, r"unexpected \['pickle'\]"),
])
def test_malformed_headers_are_named(header, message):
    with pytest.raises(FrameError, match=r"^frame from worker 3: .*" + message):
        frames.decode_frame(_with_header(header, b"\0" * 48), peer=3)


def test_garbage_and_extension_types_are_refused():
    with pytest.raises(FrameError, match=r"frame from worker 3: unreadable header"):
        frames.decode_header(b"\xc1\xc1\xc1", peer=3)
    ext = msgpack.packb(msgpack.ExtType(1, b"x"))
    with pytest.raises(FrameError, match=r"frame from worker 3: unreadable header"):
        frames.decode_header(ext, peer=3)
    with pytest.raises(FrameError, match=r"frame from worker 3: header is a list"):
        frames.decode_header(msgpack.packb([1, 2]), peer=3)


@pytest.mark.parametrize("field,value,message", [
    ("kind", "allreduce", r"expected kind 'allreduce', got 'halo'"),
    ("epoch", 6, r"expected epoch 6, got 5"),
    ("layer", 0, r"expected layer 0, got 1"),
    ("direction", "backward", r"expected direction 'backward', got 'forward'"),
])
def test_wrong_frame_for_this_exchange_is_named(field, value, message):
    header, _ = frames.decode_frame(_frame(), peer=3)
    want = {k: META[k] for k in ("kind", "epoch", "layer", "direction")}
    want[field] = value
    with pytest.raises(FrameError, match=r"^frame from worker 3: " + message):
        frames.check_expected(header, peer=3, dtype=np.float32, shape=(3, 4), **want)


def test_wrong_buffer_shape_or_dtype_is_named():
    header, _ = frames.decode_frame(_frame(), peer=3)
    want = {k: META[k] for k in ("kind", "epoch", "layer", "direction")}
    with pytest.raises(FrameError, match=r"shape \(3, 4\) does not match the receive buffer's"):
        frames.check_expected(header, peer=3, dtype=np.float32, shape=(4, 3), **want)
    with pytest.raises(FrameError, match=r"dtype float32 does not match .* float64"):
        frames.check_expected(header, peer=3, dtype=np.float64, shape=(3, 4), **want)
    frames.check_expected(header, peer=3, dtype=np.float32, shape=(3, 4), **want)  # fits


def test_unsendable_dtype_is_refused_at_the_sender():
    with pytest.raises(ValueError, match="cannot be sent"):
        frames.encode_frame(np.zeros(3, dtype=object), **META)


# Property checks (hypothesis): any array survives the round trip, and any truncation or
# single flipped byte in the framing is either caught as a FrameError naming the peer or
# decodes to a frame that is still self-consistent (flips inside values are not detectable).
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_shapes = st.lists(st.integers(0, 5), min_size=0, max_size=3)


@settings(max_examples=60, deadline=None)
@given(shape=_shapes, dtype=st.sampled_from(sorted(frames.DTYPES)), seed=st.integers(0, 99))
def test_any_array_round_trips(shape, dtype, seed):
    a = (np.random.default_rng(seed).standard_normal(shape) * 100).astype(dtype)
    header, b = frames.decode_frame(_frame(a), peer=3)
    assert b.shape == a.shape and b.tobytes() == a.tobytes()


@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_any_truncation_is_a_frame_error(data):
    buf = _frame(np.arange(7.0))
    cut = data.draw(st.integers(0, len(buf) - 1))
    with pytest.raises(FrameError, match=r"^frame from worker 3: "):
        frames.decode_frame(buf[:cut], peer=3)


@settings(max_examples=80, deadline=None)
@given(data=st.data())
def test_any_corrupt_framing_byte_is_caught_or_consistent(data):
    buf = bytearray(_frame(np.arange(7.0)))
    (n,) = struct.unpack("<I", buf[:4])
    pos = data.draw(st.integers(0, 4 + n - 1))
    buf[pos] ^= data.draw(st.integers(1, 255))
    try:
        header, array = frames.decode_frame(bytes(buf), peer=3)
    except FrameError as exc:
        assert str(exc).startswith("frame from worker 3: ")
    else:
        assert array.nbytes == header["nbytes"] and header["source"] == 3
