"""Worker specs: the machines a user could buy, described by figures read off a datasheet.

A spec file is TOML (`[[worker]]` tables, one per kind of worker) or JSON (a list of
objects, or one object). Keys of one worker, all required unless marked optional:

    name                  text naming the kind of worker
    cores                 cores one worker uses (integer >= 1)
    memory_gib            host memory of one worker, GiB (2^30 bytes)
    memory_bandwidth_gbs  host memory bandwidth, GB/s (1e9 bytes/s), all channels
    peak_gflops           peak float32 GFLOP/s of its `cores` cores together
    network_gbps          network interface, Gbit/s (1e9 bit/s), each way
    latency_us            one-way latency of a network call, microseconds
    price_per_hour        optional, price of one worker per hour (any currency)
    efficiency            optional table {kernel class: fraction of the roofs} overriding
                          the calibrated ones (classes in `roofline.KERNEL_CLASSES`)
    accelerator           optional table: memory_gib, memory_bandwidth_gbs, peak_gflops,
                          host_link_gbs (GB/s between host and accelerator), and an optional
                          efficiency table of its own

Everything is checked when the file is read (`read_specs`): a missing key, an unknown key,
a wrong type, a negative or zero figure where a positive one is needed -> InputError
"FILE: worker[1].network_gbps: ..." naming the file and the key (exit 2, no traceback).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

from shardtrain.errors import InputError
from shardtrain.forecast.roofline import KERNEL_CLASSES

MAX_SPEC_BYTES = 1 << 20
MAX_SPECS = 256
# key -> (kind, positive?) ; kind: "int", "num", "str"
FIELDS = {"name": ("str", False), "cores": ("int", True), "memory_gib": ("num", True),
          "memory_bandwidth_gbs": ("num", True), "peak_gflops": ("num", True),
          "network_gbps": ("num", True), "latency_us": ("num", False)}
OPTIONAL = {"price_per_hour": ("num", False)}
ACCELERATOR_FIELDS = {"memory_gib": ("num", True), "memory_bandwidth_gbs": ("num", True),
                      "peak_gflops": ("num", True), "host_link_gbs": ("num", True)}
GIB = 1 << 30


@dataclass(frozen=True)
class Accelerator:
    memory_gib: float
    memory_bandwidth_gbs: float
    peak_gflops: float
    host_link_gbs: float
    efficiency: dict = field(default_factory=dict)


@dataclass(frozen=True)
class WorkerSpec:
    name: str
    cores: int
    memory_gib: float
    memory_bandwidth_gbs: float
    peak_gflops: float
    network_gbps: float
    latency_us: float
    price_per_hour: float | None = None
    efficiency: dict = field(default_factory=dict)
    accelerator: Accelerator | None = None

    def memory_limit_bytes(self) -> int:
        """The memory a worker's arrays must fit in: the accelerator's when it has one."""
        gib = self.accelerator.memory_gib if self.accelerator else self.memory_gib
        return int(gib * GIB)

    def to_dict(self) -> dict:
        out = {k: getattr(self, k) for k in FIELDS}
        if self.price_per_hour is not None:
            out["price_per_hour"] = self.price_per_hour
        if self.efficiency:
            out["efficiency"] = dict(self.efficiency)
        if self.accelerator is not None:
            a = self.accelerator
            out["accelerator"] = {k: getattr(a, k) for k in ACCELERATOR_FIELDS}
            if a.efficiency:
                out["accelerator"]["efficiency"] = dict(a.efficiency)
        return out


def _value(where: str, key: str, value, kind: str, positive: bool):
    if kind == "str":
        if not isinstance(value, str) or not value.strip() or len(value) > 200:
            raise InputError(f"{where}{key}: must be a non-empty text (got {value!r:.60})")
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)) or \
            (kind == "int" and not isinstance(value, int)):
        word = "an integer" if kind == "int" else "a number"
        raise InputError(f"{where}{key}: must be {word} (got {value!r:.60})")
    if not math.isfinite(value) or value < 0 or (positive and value == 0):
        rule = "above 0" if positive else ">= 0"
        raise InputError(f"{where}{key}: must be a finite number {rule} (got {value!r})")
    return int(value) if kind == "int" else float(value)


def _efficiency(where: str, table) -> dict:
    if not isinstance(table, dict):
        raise InputError(f"{where}efficiency: must be a table of kernel classes "
                         f"({', '.join(KERNEL_CLASSES)})")
    out = {}
    for key, value in table.items():
        if key not in KERNEL_CLASSES:
            raise InputError(f"{where}efficiency.{key}: unknown kernel class (known: "
                             f"{', '.join(KERNEL_CLASSES)})")
        v = _value(f"{where}efficiency.", key, value, "num", True)
        if v > 100:   # above 1 only where caches beat the stream; 100 is no fraction
            raise InputError(f"{where}efficiency.{key}: a fraction of the roofs must be at "
                             f"most 100 (got {v!r})")
        out[key] = v
    return out


def _check_keys(where: str, obj: dict, known) -> None:
    for key in obj:
        if key not in known:
            raise InputError(f"{where}{key}: unknown key (known: {', '.join(known)})")


def spec_from_dict(obj, where: str) -> WorkerSpec:
    """One worker spec from its table; `where` is "FILE: worker[i]." (key paths follow)."""
    if not isinstance(obj, dict):
        raise InputError(f"{where.rstrip('.')}: must be a table of keys (got {obj!r:.60})")
    known = [*FIELDS, *OPTIONAL, "efficiency", "accelerator"]
    _check_keys(where, obj, known)
    values = {}
    for key, (kind, positive) in FIELDS.items():
        if key not in obj:
            raise InputError(f"{where}{key}: missing (every worker needs "
                             f"{', '.join(FIELDS)})")
        values[key] = _value(where, key, obj[key], kind, positive)
    if "price_per_hour" in obj:
        values["price_per_hour"] = _value(where, "price_per_hour", obj["price_per_hour"],
                                          "num", False)
    if "efficiency" in obj:
        values["efficiency"] = _efficiency(where, obj["efficiency"])
    if "accelerator" in obj:
        acc, at = obj["accelerator"], f"{where}accelerator."
        if not isinstance(acc, dict):
            raise InputError(f"{where}accelerator: must be a table (got {acc!r:.60})")
        _check_keys(at, acc, [*ACCELERATOR_FIELDS, "efficiency"])
        a = {}
        for key, (kind, positive) in ACCELERATOR_FIELDS.items():
            if key not in acc:
                raise InputError(f"{at}{key}: missing (an accelerator needs "
                                 f"{', '.join(ACCELERATOR_FIELDS)})")
            a[key] = _value(at, key, acc[key], kind, positive)
        if "efficiency" in acc:
            a["efficiency"] = _efficiency(at, acc["efficiency"])
        values["accelerator"] = Accelerator(**a)
    return WorkerSpec(**values)


def parse_specs(data, path: str) -> list[WorkerSpec]:
    """The specs of a parsed file: a TOML document with [[worker]] tables (or the keys of
    one worker at the top), a JSON list of objects or one object."""
    if isinstance(data, dict) and "worker" in data:
        _check_keys(f"{path}: ", data, ["worker"])
        items = data["worker"]
        if not isinstance(items, list):
            raise InputError(f"{path}: worker: must be a list of tables ([[worker]])")
        prefix = "worker"
    elif isinstance(data, list):
        items, prefix = data, ""
    elif isinstance(data, dict):
        items, prefix = [data], None
    else:
        raise InputError(f"{path}: not a worker spec (a list of workers or [[worker]] tables)")
    if not items:
        raise InputError(f"{path}: describes no worker")
    if len(items) > MAX_SPECS:
        raise InputError(f"{path}: more than {MAX_SPECS} workers")
    specs = []
    for i, item in enumerate(items):
        where = f"{path}: " if prefix is None else f"{path}: {prefix}[{i}]."
        specs.append(spec_from_dict(item, where))
    names = [s.name for s in specs]
    for i, name in enumerate(names):
        if name in names[:i]:
            raise InputError(f"{path}: {prefix or ''}[{i}].name: {name!r} is given twice")
    return specs


def read_specs(path) -> list[WorkerSpec]:
    """Read and check a spec file (.toml, or JSON for any other suffix)."""
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: no such spec file")
    if p.stat().st_size > MAX_SPEC_BYTES:
        raise InputError(f"{p}: larger than {MAX_SPEC_BYTES} bytes; not a spec file")
    raw = p.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{p}: not UTF-8 text") from None
    if p.suffix.lower() == ".toml":
        from shardtrain.compat import parse_toml

        try:
            data = parse_toml(text)
        except ValueError as exc:
            raise InputError(f"{p}: not valid TOML: {exc}") from None
        if data is None:
            raise InputError(f"{p}: reading TOML needs Python 3.11 or later; give the "
                             f"workers as a JSON list instead")
    else:
        try:
            data = json.loads(text)
        except (json.JSONDecodeError, RecursionError) as exc:
            raise InputError(f"{p}:{getattr(exc, 'lineno', 1)}: not valid JSON") from None
    return parse_specs(data, str(p))


def _toml_value(v) -> str:
    if isinstance(v, str):
        return json.dumps(v)          # a TOML basic string is a JSON string
    if isinstance(v, int) and not isinstance(v, bool):
        return str(v)
    return repr(float(v))


def specs_to_toml(specs: list[WorkerSpec], comment: str = "") -> str:
    """TOML text that `read_specs` reads back to the same specs."""
    lines = [f"# {line}" for line in comment.splitlines()]
    for s in specs:
        d = s.to_dict()
        lines += ["", "[[worker]]"]
        lines += [f"{k} = {_toml_value(v)}" for k, v in d.items() if not isinstance(v, dict)]
        for table in ("efficiency", "accelerator"):
            if table in d:
                lines += ["", f"[worker.{table}]"]
                lines += [f"{k} = {_toml_value(v)}" for k, v in d[table].items()
                          if not isinstance(v, dict)]
                if "efficiency" in d[table]:
                    lines += ["", f"[worker.{table}.efficiency]"]
                    lines += [f"{k} = {_toml_value(v)}"
                              for k, v in d[table]["efficiency"].items()]
    return "\n".join(lines) + "\n"


def spec_of_this_machine(calibration: dict, *, name: str = "this-machine",
                         memory_gib: float | None = None, network_gbps: float = 10.0,
                         latency_us: float = 20.0) -> WorkerSpec:
    """A spec of one core of this machine from its calibration, written as a datasheet
    would give it: its measured stream bandwidth / `DATASHEET_STREAM_FRACTION` and GEMM
    flop rate / `DATASHEET_GEMM_FRACTION` (the figures a datasheet would show for what
    was measured), no efficiency table (so a forecast on this spec uses this machine's
    calibrated efficiencies, on the user's graph where it was measured), its memory
    (total RAM unless given). The network is not measured: `network_gbps`, `latency_us`."""
    from shardtrain.forecast.roofline import DATASHEET_GEMM_FRACTION, DATASHEET_STREAM_FRACTION

    roof = calibration.get("roofline")
    if not roof:
        raise ValueError("the calibration has no roofline figures")
    if memory_gib is None:
        import os
        memory_gib = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / GIB
    return WorkerSpec(
        name=name, cores=1, memory_gib=round(float(memory_gib), 2),
        memory_bandwidth_gbs=round(roof["stream_bytes_per_s"] / 1e9
                                   / DATASHEET_STREAM_FRACTION, 4),
        peak_gflops=round(roof["flops_per_s"] / 1e9 / DATASHEET_GEMM_FRACTION, 4),
        network_gbps=float(network_gbps), latency_us=float(latency_us))
