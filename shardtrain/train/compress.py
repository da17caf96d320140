"""Row codecs of compressed halo exchanges (`HaloScheme.format`), one definition for the
workers and the single-process formulation.

`encode(rows, fmt, key)` gives the wire array, `decode(wire, fmt, width, dtype)` the rows in
the training dtype; `roundtrip` is decode(encode(...)), what a receiver ends up with.
- float32: a cast (round to nearest even); float16: numpy's cast (round to nearest even;
  magnitudes above 65504 become inf); bfloat16: the high 16 bits of the float32 cast,
  rounded to nearest even (travels as uint16). No random noise in these three.
- int8 (quantised boundary rows in the spirit of Wan et al., "AdaQP", MLSys 2023, at a
  fixed 8 bits; the exact rule here is ours): per row a float32 scale s = max|x| / 127
  (0 for a zero row), q = clip(floor(x / s + u), -127, 127) with u uniform in [0, 1)
  (stochastic rounding: E[q s] = x inside the range), x̂ = q · s. u is counter-based:
  the high 32 bits of a MurmurHash3 finaliser of (row key + column · constant), the row key
  a SplitMix64 hash of (seed, stream ROUND, epoch, layer, direction, sender worker, global
  id of the row's vertex), so any process layout draws the same noise for the same row.
  Wire row: the width int8 entries, then the 4 bytes of the little-endian float32 scale.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shardtrain.plan.schemes import (
    DIRECTION_CODES,
    INT8_SCALE_BYTES,
    STREAM_ROUND,
    WIRE_DTYPES,
    stream_key,
    vertex_hash,
)

INT8_LEVELS = 127


@dataclass(frozen=True)
class RowKey:
    """What keys the rounding noise of a block of rows: the rows' global vertex ids and the
    exchange (seed, epoch, layer, direction, sending worker)."""

    seed: int
    epoch: int
    layer: int
    direction: str
    sender: int
    global_ids: np.ndarray


def encode(rows: np.ndarray, fmt: str, key: RowKey) -> np.ndarray:
    rows = np.asarray(rows)
    if fmt == "float32":
        return rows.astype(np.float32)
    if fmt == "float16":
        return rows.astype(np.float16)
    if fmt == "bfloat16":
        bits = np.ascontiguousarray(rows, dtype=np.float32).view(np.uint32)
        rounded = (bits + np.uint32(0x7FFF) + ((bits >> np.uint32(16)) & np.uint32(1)))
        return (rounded >> np.uint32(16)).astype(np.uint16)
    if fmt == "int8":
        return _encode_int8(rows, key)
    raise ValueError(f"unknown halo format {fmt!r}")


def decode(wire: np.ndarray, fmt: str, width: int, dtype, out: np.ndarray | None = None
           ) -> np.ndarray:
    """The rows of `wire` in `dtype` (written into `out` when given)."""
    dtype = np.dtype(dtype)
    if fmt in ("float32", "float16"):
        values = wire
    elif fmt == "bfloat16":
        values = (wire.astype(np.uint32) << np.uint32(16)).view(np.float32)
    elif fmt == "int8":
        scale = np.ascontiguousarray(wire[:, width:]).view("<f4").reshape(-1)
        values = wire[:, :width].astype(dtype)
        values *= scale.astype(dtype)[:, None]
    else:
        raise ValueError(f"unknown halo format {fmt!r}")
    if out is None:
        return values.astype(dtype)
    out[...] = values
    return out


def roundtrip(rows: np.ndarray, fmt: str, key: RowKey) -> np.ndarray:
    return decode(encode(rows, fmt, key), fmt, rows.shape[1], rows.dtype)


def wire_array(rows: int, width: int, fmt: str) -> np.ndarray:
    """An empty receive buffer for `rows` rows of `width` in `fmt`."""
    cols = width + INT8_SCALE_BYTES if fmt == "int8" else width
    return np.empty((rows, cols), dtype=WIRE_DTYPES[fmt])


def _encode_int8(rows: np.ndarray, key: RowKey) -> np.ndarray:
    n, width = rows.shape
    out = np.empty((n, width + INT8_SCALE_BYTES), dtype=np.int8)
    amax = np.abs(rows).max(axis=1) if width else np.zeros(n)
    scale = (amax.astype(np.float64) / INT8_LEVELS).astype("<f4")
    safe = np.where(scale > 0, scale, 1).astype(np.float64)
    y = rows.astype(np.float64) / safe[:, None]
    y += rounding_uniforms(key, width)
    q = np.clip(np.floor(y), -INT8_LEVELS, INT8_LEVELS)
    q[scale == 0] = 0
    out[:, :width] = q.astype(np.int8)
    out[:, width:] = scale.view(np.int8).reshape(n, INT8_SCALE_BYTES)
    return out


def rounding_uniforms(key: RowKey, width: int) -> np.ndarray:
    """(rows, width) float64 in [0, 1): the stochastic-rounding noise of `key`'s rows."""
    base = stream_key(key.seed, STREAM_ROUND, key.epoch, key.layer,
                      DIRECTION_CODES[key.direction], key.sender)
    row = (vertex_hash(base, key.global_ids) >> np.uint64(32)).astype(np.uint32)
    x = row[:, None] + np.arange(width, dtype=np.uint32)[None, :] * np.uint32(0x85EBCA77)
    x ^= x >> np.uint32(16)
    x *= np.uint32(0x85EBCA6B)
    x ^= x >> np.uint32(13)
    x *= np.uint32(0xC2B2AE35)
    x ^= x >> np.uint32(16)
    return x.astype(np.float64) * (1.0 / 4294967296.0)
