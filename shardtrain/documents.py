"""The JSON documents shardtrain reads, each checked against its shape at the door.

One shape per document kind (`SHAPES`): the checkpoint index, the survey, the run, the
forecast and the calibration JSON. A shape is a small declarative tree (`Obj`, `List`,
`Num`, `Int`, `Str`, `Bool`, `Array`, `AnyJSON`); `validate(doc, kind, file)` walks it
and raises one InputError naming the file and the key:

    run.json: key epochs[3].epoch_s: must be a finite number >= 0 (got -1)

Numbers must be finite unless the field allows null; there a NaN or an infinity (which
older versions may have written as bare `NaN`) is read as null. Keys a shape does not name
are allowed (newer writers add keys) but still bounded in nesting depth. Parsing itself is
bounded too (`parse_json_file`): the file size before reading, the nesting depth (deep
nesting would exhaust the parser's recursion), and text that is not UTF-8 JSON. Every
check is an InputError (exit 2), so a hand-edited or foreign file never gives a traceback.

The shard manifest (`shards.json`, kind "manifest") is checked through its shape too,
worded as its reader always worded it ("FILE: 'workers' must be ... (got ...)").

`Document` is the base of the typed value of a document (`calibrate.Calibration`,
`survey.SurveyPlan`, `shards.ShardManifest`): `from_dict` keeps every key (unknown ones
in `extra`) and `to_dict` gives the keys back in field order, then the unknown ones, with
absent optional keys left out, so a document written through it is byte for byte the
dict it replaced.
"""
from __future__ import annotations

import json
import math
import os
import re
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np

from shardtrain.errors import InputError

MAX_DEPTH = 64                 # deeper than anything we write (about 6 levels) by far
MAX_WORKERS = 1 << 20          # plans are surveyed up to thousands of workers
MAX_COUNT = 1 << 62            # vertices, edges, bytes: below int64's range
MAX_LIST = 1 << 24             # items in one list (epochs, plans, shards ...)
MAX_BYTES: dict[str | None, int] = {      # looked up by kind, which may be None
    "checkpoint": 16 << 20, "calibration": 16 << 20, "survey": 1 << 30,
    "run": 1 << 30, "forecast": 1 << 30}
DEFAULT_MAX_BYTES = 256 << 20


class _Bad(Exception):
    """A shape violation at `where` (a key path like plans[0].workers). `value` and `rule`
    (what it must be) let a kind word the message its own way; `missing`: the key is
    absent; `whole`: `message` is the whole text after the file name."""

    def __init__(self, where: str, message: str, *, value: Any = None, rule: str = "",
                 missing: bool = False, whole: bool = False):
        super().__init__(message)
        self.where, self.message, self.value, self.rule = where, message, value, rule
        self.missing, self.whole = missing, whole


def _fail(where: str, rule: str, value) -> _Bad:
    return _Bad(where, f"must be {rule} (got {_got(value)})", value=value, rule=rule)


def _got(value) -> str:
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, list):
        return "a list"
    text = json.dumps(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


class Spec:
    nullable = False

    def check(self, value, where: str):
        """The value to keep (NaN may become None); raise _Bad when it does not fit."""
        raise NotImplementedError


@dataclass
class Num(Spec):
    """A finite number in [min, max] (`above`: strictly greater than min)."""
    min: float | None = None
    max: float | None = None
    above: bool = False
    nullable: bool = False

    def rule(self) -> str:
        lo = "" if self.min is None else f" {'>' if self.above else '>='} {self.min:g}"
        hi = "" if self.max is None else f" <= {self.max:g}"
        return f"a finite number{lo}{' and' if lo and hi else ''}{hi}" + \
            (" or null" if self.nullable else "")

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        if self.nullable and isinstance(value, float) and not math.isfinite(value):
            return None                     # NaN/inf where null is allowed: read as null
        ok = _is_number(value) and math.isfinite(value) and \
            (self.min is None or (value > self.min if self.above else value >= self.min)) \
            and (self.max is None or value <= self.max)
        if not ok:
            raise _Bad(where, f"must be {self.rule()} (got {_got(value)})")
        return value


@dataclass
class Int(Spec):
    """An integer (not a bool, not 3.0) in [min, max] (`says`: the rule in words)."""
    min: int | None = None
    max: int | None = MAX_COUNT
    nullable: bool = False
    says: str | None = None

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        if not (isinstance(value, int) and not isinstance(value, bool)
                and (self.min is None or value >= self.min)
                and (self.max is None or value <= self.max)):
            if self.says is not None:
                raise _fail(where, self.says, value)
            lo = "" if self.min is None else f" >= {self.min}"
            hi = "" if self.max in (None, MAX_COUNT) else f" <= {self.max}"
            rule = f"an integer{lo}{' and' if lo and hi else ''}{hi}"
            raise _Bad(where, f"must be {rule}{' or null' if self.nullable else ''} "
                              f"(got {_got(value)})")
        return value


@dataclass
class Str(Spec):
    choices: tuple | None = None
    pattern: str | None = None
    max_len: int = 4096
    nullable: bool = False
    min_len: int = 0
    says: str | None = None

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        if self.says is not None and not (isinstance(value, str) and
                                          self.min_len <= len(value) <= self.max_len and
                                          (self.choices is None or value in self.choices)):
            raise _fail(where, self.says, value)
        if not isinstance(value, str) or len(value) > self.max_len:
            raise _Bad(where, f"must be a string{' or null' if self.nullable else ''} "
                              f"(got {_got(value)})")
        if self.choices is not None and value not in self.choices:
            raise _Bad(where, f"must be one of {', '.join(map(repr, self.choices))} "
                              f"(got {_got(value)})")
        if self.pattern is not None and not re.fullmatch(self.pattern, value):
            raise _Bad(where, f"is not a valid value (got {_got(value)})")
        return value


@dataclass
class Bool(Spec):
    nullable: bool = False

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        if not isinstance(value, bool):
            raise _Bad(where, f"must be true or false (got {_got(value)})")
        return value


@dataclass
class AnyJSON(Spec):
    """Anything (already bounded in depth by the parser)."""
    nullable: bool = True

    def check(self, value, where):
        return value


@dataclass
class List(Spec):
    item: Spec = field(default_factory=AnyJSON)
    min_len: int = 0
    max_len: int = MAX_LIST
    nullable: bool = False

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        if not isinstance(value, list):
            raise _Bad(where, f"must be a list (got {_got(value)})")
        if not self.min_len <= len(value) <= self.max_len:
            raise _Bad(where, f"must have {self.min_len} to {self.max_len} items "
                              f"(got {len(value)})")
        for i, item in enumerate(value):
            value[i] = self.item.check(item, f"{where}[{i}]")
        return value


@dataclass
class Array(Spec):
    """A rectangular list of lists of non-negative integers, checked in one numpy pass
    (k x k traffic matrices of many thousand entries)."""
    ndim: int = 2
    nullable: bool = False

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        try:
            arr = np.asarray(value)
        except (ValueError, TypeError):
            arr = None
        empty = arr is not None and arr.size == 0 and arr.ndim <= self.ndim
        if not empty and (arr is None or arr.ndim != self.ndim or arr.dtype.kind not in "iu"
                          or arr.min() < 0):
            raise _Bad(where, f"must be a {self.ndim}-dimensional rectangular list of "
                              f"integers >= 0")
        return value


@dataclass
class Obj(Spec):
    """An object with `required` and `optional` keys; other keys are allowed. A required
    key listed in `as_null` may be absent: it is then checked as null (and not added)."""
    required: dict = field(default_factory=dict)
    optional: dict = field(default_factory=dict)
    nullable: bool = False
    as_null: tuple = ()
    says: str | None = None

    def check(self, value, where):
        if value is None and self.nullable:
            return None
        if not isinstance(value, dict):
            if self.says is not None:
                raise _fail(where, self.says, value)
            raise _Bad(where, f"must be an object (got {_got(value)})")
        for key, spec in self.required.items():
            if key not in value and key in self.as_null:
                spec.check(None, _join(where, key))
                continue
            if key not in value:
                raise _Bad(_join(where, key), "is missing", missing=True)
            value[key] = spec.check(value[key], _join(where, key))
        for key, spec in self.optional.items():
            if key in value:
                value[key] = spec.check(value[key], _join(where, key))
        return value


def _join(where: str, key: str) -> str:
    return f"{where}.{key}" if where else key


@dataclass
class Steps(Spec):
    """Shapes and cross-field checks (a function of the value that raises `_Bad`) applied
    in turn to one value: the first that fails names the fault, as a hand-written reader
    checking in that order would."""
    steps: tuple = ()

    def check(self, value, where):
        for step in self.steps:
            if isinstance(step, Spec):
                value = step.check(value, where)
            else:
                step(value)
        return value


# ---------------------------------------------------------------- typed documents

class _Absent:
    """The value of an optional key the document does not have (None is JSON null)."""

    def __repr__(self) -> str:
        return "ABSENT"

    def __bool__(self) -> bool:
        return False


ABSENT: Any = _Absent()


class Document:
    """Base of a document's dataclass: declare the keys as fields in the order the writer
    puts them (optional ones defaulting to ABSENT) and a last field `extra: dict`."""

    extra: dict

    @classmethod
    def from_dict(cls, doc: dict):
        """The typed value of an (already validated) document; keys it does not declare
        are kept in `extra`."""
        known = [f.name for f in fields(cls) if f.name != "extra"]   # type: ignore[arg-type]
        values = {k: doc[k] for k in known if k in doc}
        return cls(**values, extra={k: v for k, v in doc.items() if k not in known})  # type: ignore[call-arg]

    def to_dict(self) -> dict:
        """The document again: declared keys in field order, then `extra`."""
        out = {f.name: getattr(self, f.name) for f in fields(self)   # type: ignore[arg-type]
               if f.name != "extra" and getattr(self, f.name) is not ABSENT}
        out.update(self.extra)
        return out


# ---------------------------------------------------------------- the shapes

COUNT = Int(min=0)
SECONDS = Num(min=0)
SECONDS_OR_NULL = Num(min=0, nullable=True)
FRACTION_OR_NULL = Num(min=0, max=1, nullable=True)
DTYPE = Str(choices=("float32", "float64"))
WORKERS = Int(min=1, max=MAX_WORKERS)
DIMS = List(List(Int(min=1, max=1 << 31), min_len=2, max_len=2), min_len=1, max_len=1024)

GRAPH_FACTS = Obj(optional={"vertices": COUNT, "edges": COUNT, "input_dim": Int(min=0),
                            "classes": Int(min=0, nullable=True), "source": Str(),
                            "shard_dir": Str(), "structure_fingerprint": Str(nullable=True),
                            "num_vertices": COUNT, "num_edges": COUNT})
HOP = Obj(required={"layer": Int(min=0, max=1024), "d_in": Int(min=1), "d_out": Int(min=1),
                    "forward_width": Int(min=0), "backward_width": Int(min=0)},
          optional={"transform_first": Bool()})
MODEL = Obj(required={"dtype": DTYPE, "hops": List(HOP, min_len=1, max_len=1024)},
            optional={"layers": Int(min=1), "hidden": Int(min=1), "bias": Bool(),
                      "parameters": COUNT, "dims": DIMS})
SHARD_FACTS = Obj(required={"worker": Int(min=0, max=MAX_WORKERS), "owned": COUNT,
                            "halo": COUNT, "local_edges": COUNT},
                  optional={"memory_bytes": COUNT, "bytes_sent": COUNT,
                            "bytes_received": COUNT})
PLAN_TRAFFIC = Obj(required={"forward_bytes": COUNT, "backward_bytes": COUNT,
                             "allreduce_bytes": COUNT},
                   optional={"eval_forward_bytes": COUNT, "pair_bytes": Array(2),
                             "send_rows": Array(2), "allreduce_bytes_per_worker": Array(1),
                             "per_layer": List(Obj())})
SURVEY_PLAN = Obj(required={"method": Str(max_len=256), "workers": WORKERS,
                            "shards": List(SHARD_FACTS, min_len=1, max_len=MAX_WORKERS),
                            "traffic": PLAN_TRAFFIC},
                  optional={"edge_cut": COUNT, "replication_factor": Num(min=0),
                            "max_memory_bytes": COUNT, "epoch_payload_bytes": COUNT,
                            "imbalance": Obj(optional={
                                k: Obj(optional={"max_over_mean": Num(min=0, nullable=True),
                                                 "max": Num(min=0), "mean": Num(min=0)})
                                for k in ("owned", "local_edges", "halo", "bytes_sent")}),
                            "partition_s": SECONDS_OR_NULL,
                            "build_s": SECONDS_OR_NULL})
SURVEY = Obj(required={"model": MODEL, "plans": List(SURVEY_PLAN, min_len=1)},
             optional={"graph": GRAPH_FACTS})

EPOCH = Obj(required={"epoch": Int(min=0)},
            optional={"loss": Num(nullable=True), "train_acc": FRACTION_OR_NULL,
                      "val_acc": FRACTION_OR_NULL, "test_acc": FRACTION_OR_NULL,
                      "epoch_s": SECONDS_OR_NULL})
RUN_WORKER = Obj(required={"worker": Int(min=0, max=MAX_WORKERS)},
                 optional={k: SECONDS_OR_NULL for k in ("compute_s", "exchange_s",
                                                        "allreduce_s", "wait_s", "cpu_s",
                                                        "process_cpu_s")}
                 | {k: Int(min=0, nullable=True) for k in ("bytes_sent", "bytes_received",
                                                           "peak_rss_bytes")})
RUN = Obj(optional={"epochs": List(EPOCH),
                    "settings": Obj(optional={"epochs": Int(min=0), "layers": Int(min=1),
                                              "hidden": Int(min=1)}),
                    "graph": GRAPH_FACTS,
                    "mode": Str(choices=("reference", "partitioned", "single-process")),
                    "workers": List(RUN_WORKER, max_len=MAX_WORKERS),
                    "traffic": Obj(optional={"measured_payload_bytes": COUNT,
                                             "predicted_payload_bytes": COUNT,
                                             "measured_framing_bytes": COUNT,
                                             "frames": COUNT,
                                             "pair_payload_bytes": Array(2)}),
                    "plan": Obj(optional={"method": Str(), "workers": WORKERS})})

FORECAST_PLAN = Obj(required={"method": Str(max_len=256), "workers": WORKERS,
                              "link_gbps": Num(min=0, above=True), "epoch_s": SECONDS},
                    optional={**{k: SECONDS_OR_NULL for k in (
                        "compute_s", "exchange_s", "allreduce_s", "wait_s", "max_wait_s",
                        "eval_s", "epoch_with_eval_s")},
                        "latency_us": Num(min=0), "bottleneck": Str(nullable=True),
                        "per_worker": List(Obj(required={"worker": Int(min=0)},
                                               optional={k: SECONDS_OR_NULL for k in (
                                                   "compute_s", "exchange_s", "allreduce_s",
                                                   "wait_s")}), max_len=MAX_WORKERS),
                        "steps": List(Obj(optional={"seconds": SECONDS_OR_NULL})),
                        "fastest": Bool(), "fewest_meeting_target": Bool()})
PICKED = Obj(required={"method": Str(), "workers": WORKERS,
                       "link_gbps": Num(min=0, above=True), "epoch_s": SECONDS},
             nullable=True)
FORECAST = Obj(required={"plans": List(FORECAST_PLAN, min_len=1)},
               optional={"kind": Str(choices=("forecast",)), "graph": GRAPH_FACTS,
                         "model": Obj(), "latency_us": Num(min=0),
                         "speed_factor": Num(min=0, above=True),
                         "target_epoch_s": Num(min=0, above=True, nullable=True),
                         "cores": Int(min=1, nullable=True), "fastest": PICKED,
                         "fewest_meeting_target": PICKED})

POSITIVE = Num(min=0, above=True)
CALIBRATION = Obj(required={
    "version": Int(min=1), "dtype": DTYPE,
    "sparse": List(Obj(required={"nnz": Int(min=1), "width": Int(min=1),
                                 "nnz_cols_per_s": POSITIVE}), min_len=1, max_len=4096),
    "dense": List(Obj(required={"d_in": Int(min=1), "d_out": Int(min=1),
                                "flops_per_s": POSITIVE}), min_len=1, max_len=4096),
    "elementwise": Obj(required={"bytes_per_s": POSITIVE}),
    "dropout_masks": Obj(required={"elements_per_s": POSITIVE})},
    optional={"pipe": Obj(required={"bytes_per_s": POSITIVE}, nullable=True),
              "threads": Int(min=1), "calibration_s": SECONDS_OR_NULL,
              "exchange_call": Obj(optional={"seconds_per_call": SECONDS}),
              "transport_copy": Obj(required={"cpu_s_per_byte": SECONDS})})

_SETTINGS = Obj(required={"seed": Int()},
                optional={"layers": Int(min=1), "hidden": Int(min=1),
                          "dropout": Num(min=0, max=1), "lr": Num(min=0),
                          "weight_decay": Num(min=0), "dtype": DTYPE, "bias": Bool(),
                          "halo_keep": Num(min=0, max=1),
                          "halo_format": Str(nullable=True, max_len=16)})
CHECKPOINT = Obj(required={
    "format": Str(choices=("shardtrain-checkpoint",)), "version": Int(),
    "epoch": Int(min=1, max=1 << 40),
    "state_file": Str(pattern=r"state-\d{6}\.npz"),
    "state_sha256": Str(pattern=r"[0-9a-f]{64}"),
    "settings": _SETTINGS, "workers": WORKERS, "dims": DIMS},
    optional={"checkpoint_every": Int(min=1, max=1 << 40),
              "mode": Str(choices=("partitioned", "reference")),
              "graph_fingerprint": Str(nullable=True, max_len=256),
              "shards_fingerprint": Str(nullable=True, max_len=256),
              "random_stream": Obj(optional={"seed": Int(),
                                             "next_epoch": Int(min=1)})})

# the shard manifest (shards.json, plan/shards.py): checked in the order its reader always
# checked it, so the first fault named is the same; worded "FILE: 'key' must be ..."
MAX_SIZE = 2**62                 # any count above this is not a real graph (int64 room)
FEATURE_DTYPES = ("<f4", "<f8")
_SIZE = Int(min=0, max=MAX_SIZE - 1, says="a non-negative integer")


def _manifest_ranges(m: dict) -> None:
    k, n = m["workers"], m["num_vertices"]
    if not 1 <= k <= max(n, 1):
        raise _fail("workers", f"an integer between 1 and num_vertices ({n})", k)
    if m["num_train_global"] > n:
        raise _fail("num_train_global", f"at most num_vertices ({n})", m["num_train_global"])


def _manifest_features_agree(m: dict) -> None:
    if (m.get("feature_dtype") is None) != (m.get("input_dim") is None):
        raise _Bad("", "'input_dim' and 'feature_dtype' disagree (both are null only when "
                       "the shards have no features)", whole=True)


def _manifest_workers(m: dict) -> None:
    k, n = m["workers"], m["num_vertices"]
    owned = m.get("owned")
    if (not isinstance(owned, list) or len(owned) != k
            or not all(isinstance(c, int) and not isinstance(c, bool) and 0 <= c < MAX_SIZE
                       for c in owned)):
        raise _fail("owned", f"a list of {k} vertex counts, one per worker", owned)
    if sum(owned) != n:
        raise _Bad("", f"the workers' owned vertices add up to {sum(owned)}, not "
                       f"num_vertices {n}", whole=True)
    files = m.get("files")
    if not isinstance(files, list) or len(files) != k:
        raise _fail("files", f"a list of {k} shard file names, one per worker", files)
    for name in files:
        if (not isinstance(name, str) or name in ("", ".", "..") or "/" in name
                or "\\" in name or "\0" in name):
            raise _Bad("", f"'files' entry {name!r:.60} is not a plain file name inside the "
                           f"shard directory", whole=True)
    if len(set(files)) != k:
        raise _Bad("", "'files' names the same shard file twice", whole=True)


MANIFEST = Steps((
    Obj(required={key: _SIZE for key in ("workers", "num_vertices", "num_edges",
                                         "num_train_global", "num_classes")}),
    _manifest_ranges,
    Obj(optional={"input_dim": Int(min=1, max=MAX_SIZE - 1, nullable=True,
                                   says="a positive integer or null"),
                  "feature_dtype": Str(choices=FEATURE_DTYPES, nullable=True,
                                       says=f"one of {', '.join(FEATURE_DTYPES)} or null")}),
    _manifest_features_agree,
    Obj(required={"split_id": Str(min_len=1, max_len=64, says="the split's id string")},
        as_null=("split_id",),
        optional={"graph_fingerprint": Str(nullable=True, max_len=MAX_LIST * 64,
                                           says="a string or null")}),
    _manifest_workers,
    Obj(optional={"meta": Obj(says="an object")}),
))

SHAPES = {"checkpoint": CHECKPOINT, "survey": SURVEY, "run": RUN, "forecast": FORECAST,
          "calibration": CALIBRATION, "manifest": MANIFEST}


# ---------------------------------------------------------------- cross-field checks

def _check_survey(doc: dict) -> None:
    for i, plan in enumerate(doc["plans"]):
        k = plan["workers"]
        workers = sorted(s["worker"] for s in plan["shards"])
        if workers != list(range(k)):
            raise _Bad(f"plans[{i}].shards", f"must list workers 0..{k - 1} once each "
                                             f"(workers is {k})")
        for key, shape in (("pair_bytes", (k, k)), ("send_rows", (k, k)),
                           ("allreduce_bytes_per_worker", (k,))):
            if key in plan["traffic"] and np.shape(plan["traffic"][key]) != shape:
                raise _Bad(f"plans[{i}].traffic.{key}",
                           f"must be {' x '.join(map(str, shape))} (workers is {k})")


def _check_checkpoint(doc: dict) -> None:
    dims = doc["dims"]
    for i in range(1, len(dims)):
        if dims[i][0] != dims[i - 1][1]:
            raise _Bad(f"dims[{i}]", "must take the width the layer before it gives")
    stream = doc.get("random_stream") or {}
    if "next_epoch" in stream and stream["next_epoch"] != doc["epoch"] + 1:
        raise _Bad("random_stream.next_epoch", "must be epoch + 1")


_CROSS = {"survey": _check_survey, "checkpoint": _check_checkpoint}


# ---------------------------------------------------------------- entry points

def _depth_exceeds(doc, limit: int) -> bool:
    """Whether `doc` nests deeper than `limit` (an explicit stack, no recursion)."""
    stack = [(doc, 1)]
    while stack:
        value, depth = stack.pop()
        if isinstance(value, (dict, list)):
            if depth > limit:
                return True
            items = value.values() if isinstance(value, dict) else value
            stack.extend((v, depth + 1) for v in items if isinstance(v, (dict, list)))
    return False


def parse_json_text(text: str, where: str, *, max_depth: int = MAX_DEPTH,
                    line_first: bool = True):
    """Parse JSON text; InputError "WHERE:LINE: not valid JSON (...)" (or, not
    `line_first`, "WHERE: not readable JSON (... line L column C ...)") for bad JSON, and
    one for deep nesting. Bare NaN/Infinity parse as floats (the shapes then refuse them
    or read them as null)."""
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        if not line_first:
            raise InputError(f"{where}: not readable JSON ({' '.join(str(exc).split())})"
                             ) from None
        raise InputError(f"{where}:{exc.lineno}: not valid JSON ({exc.msg})") from None
    except RecursionError:
        raise InputError(f"{where}: nested deeper than {max_depth} levels (not a "
                         f"shardtrain JSON)") from None
    if _depth_exceeds(doc, max_depth):
        raise InputError(f"{where}: nested deeper than {max_depth} levels (not a "
                         f"shardtrain JSON)")
    return doc


def parse_json_file(file, *, max_bytes: int = DEFAULT_MAX_BYTES, where: str | None = None,
                    line_first: bool = True):
    """Read and parse a JSON file with its size bounded before reading; InputError naming
    `where` (default: the file) when unreadable, too large, not UTF-8 or not JSON."""
    file = Path(file)
    where = where or str(file)
    try:
        size = os.stat(file).st_size
        if size > max_bytes:
            raise InputError(f"{where}: {size:,} bytes, larger than any JSON shardtrain "
                             f"reads here ({max_bytes:,} bytes at most)")
        with open(file, "rb") as fh:
            data = fh.read(max_bytes + 1)
    except IsADirectoryError:
        raise InputError(f"{where}: is a folder, not a JSON file") from None
    except OSError as exc:
        raise InputError(f"{where}: cannot read ({exc.strerror or exc})") from None
    if len(data) > max_bytes:
        raise InputError(f"{where}: larger than any JSON shardtrain reads here "
                         f"({max_bytes:,} bytes at most)")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{where}:1: not a JSON file (not UTF-8 text)") from None
    return parse_json_text(text, where, line_first=line_first)


def validate(doc, kind: str, where) -> dict:
    """`doc` checked against the shape of `kind` (see SHAPES) and its cross-field rules;
    non-finite numbers where null is allowed become None (in place). InputError
    "WHERE: key K: must be ..." otherwise."""
    try:
        if _depth_exceeds(doc, MAX_DEPTH):
            raise _Bad("", f"nested deeper than {MAX_DEPTH} levels")
        doc = SHAPES[kind].check(doc, "")
        if kind in _CROSS:
            _CROSS[kind](doc)
    except _Bad as bad:
        raise InputError(_WORDS.get(kind, _words)(where, kind, bad)) from None
    return doc


def _words(where, kind: str, bad: _Bad) -> str:
    """"FILE: key a[3].b: must be ..." (or "FILE: a KIND JSON ..." for the whole)."""
    key = f" key {bad.where}:" if bad.where else ""
    what = "" if bad.where else f" a {kind} JSON"
    return f"{where}:{key}{what} {bad.message}"


def _manifest_words(where, kind: str, bad: _Bad) -> str:
    """The shard manifest's own wording: "FILE: 'key' must be RULE (got REPR)"."""
    if bad.whole:
        return f"{where}: {bad.message}"
    if bad.missing:
        return f"{where}: missing key '{bad.where}'"
    if bad.rule:
        return f"{where}: '{bad.where}' must be {bad.rule} (got {bad.value!r:.60})"
    return _words(where, kind, bad)


_WORDS = {"manifest": _manifest_words}


def read_document(file, kind: str, *, where: str | None = None) -> dict:
    """Parse `file` (size and depth bounded) and validate it as `kind`."""
    where = where or str(file)
    doc = parse_json_file(file, max_bytes=MAX_BYTES.get(kind, DEFAULT_MAX_BYTES),
                          where=where)
    return validate(doc, kind, where)
