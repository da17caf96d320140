"""The frame: what one array looks like on the wire.

    [u32 little-endian: header length H] [H bytes: msgpack map] [nbytes raw array bytes]

The header map has exactly the keys of `HEADER_KEYS`: kind (str), epoch (int), layer (int,
-1 when the frame belongs to no layer, as in the all-reduce), direction (str), source (the
sender's rank), dtype (one of `DTYPES`, little-endian), shape (list of ints) and nbytes
(== prod(shape) * itemsize). The array bytes are C order. Nothing is pickled: a header is
plain msgpack with no extension types, and every field is checked before a byte of payload
is read. Errors are `FrameError`s whose message starts with "frame from worker N: ".
"""
from __future__ import annotations

import struct

import msgpack
import numpy as np

from shardtrain.errors import RunError

PREFIX = struct.Struct("<I")
PREFIX_BYTES = PREFIX.size
MAX_HEADER_BYTES = 4096          # a header is ~100 bytes; anything larger is garbage
DEFAULT_MAX_FRAME_BYTES = 1 << 31
MAX_NAME_CHARS = 64
MAX_DIMS = 8
# float16, uint16 and int8 carry compressed halo rows (bfloat16 travels as its uint16 bits)
DTYPES: dict[str, np.dtype] = {"float32": np.dtype("<f4"), "float64": np.dtype("<f8"),
                               "int64": np.dtype("<i8"), "float16": np.dtype("<f2"),
                               "uint16": np.dtype("<u2"), "int8": np.dtype("i1")}
HEADER_KEYS = ("kind", "epoch", "layer", "direction", "source", "dtype", "shape", "nbytes")


class FrameError(RunError):
    """A frame that is truncated, too large, malformed or not the one expected."""

    def __init__(self, peer: int, what: str):
        super().__init__(f"frame from worker {peer}: {what}")
        self.peer = peer


def dtype_name(dtype) -> str:
    """The wire name of a numpy dtype, or ValueError when it may not cross the wire."""
    dt = np.dtype(dtype)
    for name, wire in DTYPES.items():
        if dt == wire:
            return name
    raise ValueError(f"dtype {dt} cannot be sent; allowed: {', '.join(DTYPES)}")


def encode_header(*, kind: str, epoch: int, layer: int, direction: str, source: int,
                  dtype, shape) -> bytes:
    """Length prefix + msgpack header for an array of `dtype` and `shape`: the framing bytes."""
    name = dtype_name(dtype)
    for key, value in (("kind", kind), ("direction", direction)):
        if not isinstance(value, str) or not 0 < len(value) <= MAX_NAME_CHARS:
            raise ValueError(f"frame {key} must be a string of 1..{MAX_NAME_CHARS} "
                             f"characters, got {value!r:.80}")
    shape = [int(s) for s in shape]
    if len(shape) > MAX_DIMS or min(shape, default=0) < 0:
        raise ValueError(f"frame shape {shape} must have at most {MAX_DIMS} non-negative sizes")
    nbytes = int(np.prod(shape, dtype=np.int64)) * DTYPES[name].itemsize
    body = msgpack.packb({"kind": str(kind), "epoch": int(epoch), "layer": int(layer),
                          "direction": str(direction), "source": int(source), "dtype": name,
                          "shape": shape, "nbytes": nbytes}, use_bin_type=True)
    if len(body) > MAX_HEADER_BYTES:
        raise ValueError(f"frame header of {len(body)} bytes exceeds {MAX_HEADER_BYTES}")
    return PREFIX.pack(len(body)) + body


def header_length(prefix: bytes, *, peer: int) -> int:
    """The header length announced by the 4-byte prefix, checked against the limit."""
    if len(prefix) != PREFIX_BYTES:
        raise FrameError(peer, f"truncated after {len(prefix)} of {PREFIX_BYTES} "
                               f"length-prefix bytes")
    (n,) = PREFIX.unpack(prefix)
    if n == 0 or n > MAX_HEADER_BYTES:
        raise FrameError(peer, f"header length {n} outside 1..{MAX_HEADER_BYTES} bytes")
    return n


def _no_ext(code, data):
    raise ValueError(f"msgpack extension type {code} is not allowed")


def _is_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def decode_header(buf: bytes | bytearray | memoryview, *, peer: int,
                  max_frame_bytes: int = DEFAULT_MAX_FRAME_BYTES) -> dict:
    """Parse and validate the msgpack body of a header (without the length prefix)."""
    try:
        header = msgpack.unpackb(bytes(buf), raw=False, use_list=True, strict_map_key=True,
                                 ext_hook=_no_ext)
    except Exception as exc:                     # msgpack raises several unrelated types
        raise FrameError(peer, f"unreadable header ({type(exc).__name__}: {exc})") from None
    if not isinstance(header, dict):
        raise FrameError(peer, f"header is a {type(header).__name__}, not a map")
    if set(header) != set(HEADER_KEYS):
        missing = sorted(set(HEADER_KEYS) - set(header))
        extra = sorted(map(str, set(header) - set(HEADER_KEYS)))
        raise FrameError(peer, f"header keys wrong (missing {missing}, unexpected {extra})")
    for key in ("kind", "direction", "dtype"):
        v = header[key]
        if not isinstance(v, str) or not 0 < len(v) <= MAX_NAME_CHARS:
            raise FrameError(peer, f"header field {key!r} is not a short string: {v!r:.80}")
    for key in ("epoch", "layer", "source", "nbytes"):
        if not _is_int(header[key]):
            raise FrameError(peer, f"header field {key!r} is not an integer: {header[key]!r:.80}")
    if header["source"] != peer:
        raise FrameError(peer, f"header names worker {header['source']} as its source")
    if header["dtype"] not in DTYPES:
        raise FrameError(peer, f"dtype {header['dtype']!r} not allowed "
                               f"(allowed: {', '.join(DTYPES)})")
    shape = header["shape"]
    if (not isinstance(shape, list) or len(shape) > MAX_DIMS
            or not all(_is_int(s) and s >= 0 for s in shape)):
        raise FrameError(peer, f"shape {shape!r:.80} is not a list of at most {MAX_DIMS} "
                               f"non-negative integers")
    nbytes = header["nbytes"]
    if nbytes < 0 or nbytes > max_frame_bytes:
        raise FrameError(peer, f"payload of {nbytes} bytes exceeds the limit of "
                               f"{max_frame_bytes} bytes")
    expected = int(np.prod(shape, dtype=object)) * DTYPES[header["dtype"]].itemsize
    if expected != nbytes:
        raise FrameError(peer, f"shape {shape} of {header['dtype']} is {expected} bytes "
                               f"but the header says {nbytes}")
    return header


def check_expected(header: dict, *, peer: int, kind: str, epoch: int, layer: int,
                   direction: str, dtype, shape) -> None:
    """The frame must be the one this exchange waits for, and fit the buffer it lands in."""
    want = {"kind": str(kind), "epoch": int(epoch), "layer": int(layer),
            "direction": str(direction)}
    for key, value in want.items():
        if header[key] != value:
            raise FrameError(peer, f"expected {key} {value!r}, got {header[key]!r} "
                                   f"({describe(header)})")
    name = dtype_name(dtype)
    if header["dtype"] != name:
        raise FrameError(peer, f"dtype {header['dtype']} does not match the receive buffer's "
                               f"{name} ({describe(header)})")
    if list(header["shape"]) != [int(s) for s in shape]:
        raise FrameError(peer, f"shape {tuple(header['shape'])} does not match the receive "
                               f"buffer's {tuple(shape)} ({describe(header)})")


def describe(meta: dict) -> str:
    """'halo forward, layer 1, epoch 5' — for error messages."""
    layer = f", layer {meta['layer']}" if meta.get("layer", -1) >= 0 else ""
    return f"{meta['kind']} {meta['direction']}{layer}, epoch {meta['epoch']}"


def encode_frame(array: np.ndarray, *, kind: str, epoch: int, layer: int, direction: str,
                 source: int) -> bytes:
    """A whole frame as one bytes object (tests and small messages; the pipes send without
    building it)."""
    array = np.asarray(array)
    if not array.flags.c_contiguous:          # (np.ascontiguousarray would make 0-d 1-d)
        array = np.ascontiguousarray(array)
    head = encode_header(kind=kind, epoch=epoch, layer=layer, direction=direction,
                         source=source, dtype=array.dtype, shape=array.shape)
    return head + array.tobytes()


def decode_frame(buf: bytes | bytearray | memoryview, *, peer: int,
                 max_frame_bytes: int = DEFAULT_MAX_FRAME_BYTES) -> tuple[dict, np.ndarray]:
    """Split one whole frame into (header, array); every defect is a FrameError."""
    buf = memoryview(buf).cast("B")
    n = header_length(bytes(buf[:PREFIX_BYTES]), peer=peer)
    if len(buf) < PREFIX_BYTES + n:
        raise FrameError(peer, f"truncated after {len(buf) - PREFIX_BYTES} of {n} header bytes")
    header = decode_header(buf[PREFIX_BYTES:PREFIX_BYTES + n], peer=peer,
                           max_frame_bytes=max_frame_bytes)
    payload = buf[PREFIX_BYTES + n:]
    if len(payload) < header["nbytes"]:
        raise FrameError(peer, f"truncated after {len(payload)} of {header['nbytes']} "
                               f"payload bytes")
    if len(payload) > header["nbytes"]:
        raise FrameError(peer, f"{len(payload) - header['nbytes']} bytes after the payload")
    array = np.frombuffer(payload, dtype=DTYPES[header["dtype"]]).reshape(header["shape"])
    return header, array
