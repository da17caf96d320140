"""Counters a worker fills while it trains and the coordinator merges afterwards.

Bytes: every frame is counted by its sender AND by its receiver, under the key
(src, dst, kind, layer, direction), with payload (array bytes) and framing (header bytes)
apart. A worker's own rows are the ones where it is `src` (sent) or `dst` (received); after a
run the two sides of every row must agree, and `merge` checks that they do.

Time: `phase(name)` accumulates wall time (time.perf_counter) and CPU time
(time.process_time) per phase. Phases are exclusive: entering a phase inside another
pauses the outer one, so the phases of a worker never count the same second twice. Time the
transport spends blocked with nothing to read or write is reported through `add_wait` and
moved out of the phase it happened in into "wait", so compute + exchange + allreduce + wait
add up to the wall time spent inside phases.

Overlap: an exchange started with `exchange_start` and waited for later reports, through
`add_overlap`, its time in flight (from the start to the moment its last byte had moved,
as far as the transport saw it) and the time the caller spent blocked in its `wait()`.
What it was in flight and the caller was not blocked is HIDDEN exchange time: compute (or
anything else) ran meanwhile. `to_dict()["overlap"]` sums them over the handles:
{"handles", "in_flight_s", "blocked_s", "hidden_s"} with, per handle,
hidden = max(in_flight - blocked, 0). A blocking `exchange` adds nothing here (nothing of it
is hidden). The blocked time is also in "wait" (see above), except the part the emulated
link still held the handle's own sends back, which stays in the enclosing phase as it does
for a blocking exchange (see `link.py`).

Why process_time and not thread_time: process_time counts every thread of the worker
(BLAS threads if they were not pinned, logging helpers), which is what the worker would cost
on a machine of its own; the transport itself is single-threaded, so nothing is hidden by
the choice. CPU time is not split for waits: a blocked poll uses no CPU.
"""
from __future__ import annotations

import time
from contextlib import contextmanager
from typing import Callable, ClassVar, Iterable, Iterator

ROW_FIELDS = ("src", "dst", "kind", "layer", "direction")


class Profile:
    """Byte counters and phase timers of one worker (`rank`)."""

    merge: ClassVar[Callable[[Iterable[dict]], dict]]   # bound after the module's merge()

    def __init__(self, rank: int):
        self.rank = int(rank)
        self._rows: dict[tuple, list[int]] = {}   # key -> [payload, framing, frames]
        self._wall: dict[str, float] = {}
        self._cpu: dict[str, float] = {}
        self._wait = 0.0
        self._stack: list[list] = []               # [name, wall_start, cpu_start, wait_inside]
        self._overlap = [0, 0.0, 0.0, 0.0]          # handles, in flight, blocked, hidden

    # -- bytes -------------------------------------------------------------------------
    def count(self, src: int, dst: int, kind: str, layer: int, direction: str,
              payload_bytes: int, framing_bytes: int) -> None:
        """Count one frame sent (src == rank) or received (dst == rank)."""
        key = (int(src), int(dst), str(kind), int(layer), str(direction))
        row = self._rows.get(key)
        if row is None:
            row = self._rows[key] = [0, 0, 0]
        row[0] += int(payload_bytes)
        row[1] += int(framing_bytes)
        row[2] += 1

    # -- time --------------------------------------------------------------------------
    @contextmanager
    def phase(self, name: str) -> Iterator[None]:
        """Accumulate wall and CPU time under `name` (exclusive of nested phases)."""
        now_w, now_c = time.perf_counter(), time.process_time()
        if self._stack:                       # pause the enclosing phase
            self._close_span(self._stack[-1], now_w, now_c)
        self._stack.append([name, now_w, now_c, 0.0])
        try:
            yield
        finally:
            now_w, now_c = time.perf_counter(), time.process_time()
            self._close_span(self._stack.pop(), now_w, now_c)
            if self._stack:                   # resume the enclosing phase
                outer = self._stack[-1]
                outer[1], outer[2], outer[3] = now_w, now_c, 0.0

    def _close_span(self, span: list, now_w: float, now_c: float) -> None:
        name, w0, c0, waited = span
        self._wall[name] = self._wall.get(name, 0.0) + (now_w - w0) - waited
        self._cpu[name] = self._cpu.get(name, 0.0) + (now_c - c0)
        self._wait += waited
        span[1], span[2], span[3] = now_w, now_c, 0.0

    def add_wait(self, seconds: float) -> None:
        """Time blocked waiting for a peer; moved out of the current phase into "wait"."""
        if seconds <= 0:
            return
        if self._stack:
            self._stack[-1][3] += seconds
        else:
            self._wait += seconds

    def add_overlap(self, in_flight_s: float, blocked_s: float) -> None:
        """One started exchange: its seconds in flight, and those its caller was blocked in
        `wait()`; the difference (not below 0) is hidden exchange time."""
        in_flight, blocked = max(float(in_flight_s), 0.0), max(float(blocked_s), 0.0)
        ov = self._overlap
        ov[0] += 1
        ov[1] += in_flight
        ov[2] += blocked
        ov[3] += max(in_flight - blocked, 0.0)

    # -- output ------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """A msgpack/JSON-friendly snapshot (open phases are not included until they end)."""
        rows = [dict(zip(ROW_FIELDS, key), payload_bytes=v[0], framing_bytes=v[1], frames=v[2])
                for key, v in sorted(self._rows.items())]
        sent = sum(r["payload_bytes"] + r["framing_bytes"] for r in rows if r["src"] == self.rank)
        received = sum(r["payload_bytes"] + r["framing_bytes"] for r in rows
                       if r["dst"] == self.rank)
        phases = {name: {"wall_s": self._wall[name], "cpu_s": self._cpu[name]}
                  for name in sorted(self._wall)}
        handles, in_flight, blocked, hidden = self._overlap
        overlap = {"handles": handles, "in_flight_s": in_flight, "blocked_s": blocked,
                   "hidden_s": hidden}
        return {"rank": self.rank, "phases": phases, "wait_s": self._wait, "bytes": rows,
                "bytes_sent": sent, "bytes_received": received, "overlap": overlap}


def merge(dicts: Iterable[dict]) -> dict:
    """Combine the `to_dict()` of every worker into run totals.

    Wire traffic is taken from the senders' rows; `consistent` says whether every
    receiver counted exactly what its sender did (row by row), and `mismatches` lists the
    rows where they differ.

    Returns {"workers": k, "payload_bytes", "framing_bytes", "frames",
    "by_kind": {kind: {payload_bytes, framing_bytes, frames}},
    "pair_payload_bytes": k x k list (row = src, column = dst),
    "by_layer_direction": [{kind, layer, direction, payload_bytes, framing_bytes, frames}],
    "per_worker": [{"rank", "compute_s", "exchange_s", "allreduce_s", "wait_s", "cpu_s",
                    "hidden_exchange_s", "bytes_sent", "bytes_received", "phases"}],
    "consistent": bool, "mismatches": [...]}.
    """
    dicts = sorted(dicts, key=lambda d: d["rank"])
    k = max((d["rank"] for d in dicts), default=-1) + 1
    sent: dict[tuple, tuple] = {}
    received: dict[tuple, tuple] = {}
    for d in dicts:
        for r in d["bytes"]:
            key = tuple(r[f] for f in ROW_FIELDS)
            value = (r["payload_bytes"], r["framing_bytes"], r["frames"])
            if r["src"] == d["rank"]:
                sent[key] = value
            if r["dst"] == d["rank"]:
                received[key] = value
            k = max(k, r["src"] + 1, r["dst"] + 1)

    pair = [[0] * k for _ in range(k)]
    by_kind: dict[str, dict] = {}
    by_ld: dict[tuple, list[int]] = {}
    for (src, dst, kind, layer, direction), (pay, fr, n) in sorted(sent.items()):
        pair[src][dst] += pay
        t = by_kind.setdefault(kind, {"payload_bytes": 0, "framing_bytes": 0, "frames": 0})
        t["payload_bytes"] += pay
        t["framing_bytes"] += fr
        t["frames"] += n
        acc = by_ld.setdefault((kind, layer, direction), [0, 0, 0])
        acc[0] += pay
        acc[1] += fr
        acc[2] += n

    mismatches = [{**dict(zip(ROW_FIELDS, key)), "sent": list(sent.get(key, (0, 0, 0))),
                   "received": list(received.get(key, (0, 0, 0)))}
                  for key in sorted(set(sent) | set(received))
                  if sent.get(key) != received.get(key)]

    per_worker = []
    for d in dicts:
        ph = d["phases"]
        per_worker.append({
            "rank": d["rank"],
            "compute_s": ph.get("compute", {}).get("wall_s", 0.0),
            "exchange_s": ph.get("exchange", {}).get("wall_s", 0.0),
            "allreduce_s": ph.get("allreduce", {}).get("wall_s", 0.0),
            "wait_s": d["wait_s"],
            "cpu_s": sum(p["cpu_s"] for p in ph.values()),
            "hidden_exchange_s": d.get("overlap", {}).get("hidden_s", 0.0),
            "bytes_sent": d["bytes_sent"],
            "bytes_received": d["bytes_received"],
            "phases": ph,
        })

    return {
        "workers": k,
        "payload_bytes": sum(v[0] for v in sent.values()),
        "framing_bytes": sum(v[1] for v in sent.values()),
        "frames": sum(v[2] for v in sent.values()),
        "by_kind": by_kind,
        "pair_payload_bytes": pair,
        "by_layer_direction": [
            {"kind": kind, "layer": layer, "direction": direction, "payload_bytes": v[0],
             "framing_bytes": v[1], "frames": v[2]}
            for (kind, layer, direction), v in sorted(by_ld.items())],
        "per_worker": per_worker,
        "consistent": not mismatches,
        "mismatches": mismatches,
    }


# `Profile.merge(dicts)` reads naturally at the coordinator as well.
Profile.merge = staticmethod(merge)
