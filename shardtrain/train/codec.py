"""Control messages between workers and their coordinator (pipes) or rank 0 (MPI).

Messages are msgpack maps; arrays travel as {"dtype", "shape", "data": raw bytes}. No
pickle: a message can hold only maps, lists, numbers, text, bytes and such arrays.
"""
from __future__ import annotations

import msgpack
import numpy as np


def pack_array(a: np.ndarray) -> dict:
    a = np.ascontiguousarray(a)
    return {"dtype": a.dtype.str, "shape": list(a.shape), "data": a.tobytes()}


def unpack_array(d: dict) -> np.ndarray:
    dt = np.dtype(d["dtype"])
    if dt.hasobject:
        raise ValueError("object arrays are not accepted in control messages")
    return np.frombuffer(d["data"], dtype=dt).reshape(d["shape"]).copy()


def encode_message(msg: dict) -> bytes:
    return msgpack.packb(msg, use_bin_type=True)


def decode_message(raw: bytes) -> dict:
    return msgpack.unpackb(raw, raw=False, strict_map_key=False)


def encode_summary(summary: dict) -> dict:
    """The `worker.run_worker` result as a msgpack-friendly map."""
    out = dict(summary)
    out["owned"] = pack_array(summary["owned"])
    out["predictions"] = pack_array(summary["predictions"])
    out["labels"] = pack_array(summary["labels"])
    if summary["params"] is not None:
        out["params"] = {k: pack_array(v) for k, v in summary["params"].items()}
    return out


def decode_summary(msg: dict) -> dict:
    out = dict(msg)
    out["owned"] = unpack_array(msg["owned"])
    out["predictions"] = unpack_array(msg["predictions"])
    out["labels"] = unpack_array(msg["labels"])
    if msg.get("params") is not None:
        out["params"] = {k: unpack_array(v) for k, v in msg["params"].items()}
    return out
