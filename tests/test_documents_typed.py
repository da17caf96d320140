"""Typed documents (`documents.Document`: the survey plan, the calibration, the shard
manifest) give back byte-identical JSON, and the shard manifest's shape words every fault
exactly as its hand-written reader did (that reader, copied below, is the oracle)."""
from __future__ import annotations

import copy
import json

import numpy as np
import pytest
from helpers import depot_graph

from shardtrain import documents
from shardtrain.errors import InputError
from shardtrain.files import json_text
from shardtrain.forecast.calibrate import Calibration, from_flops
from shardtrain.plan.partition import partition
from shardtrain.plan.shards import (
    SHARDS_MANIFEST,
    ShardManifest,
    build_shards,
    load_manifest,
    read_manifest,
    save_shards,
)
from shardtrain.plan.survey import SurveyPlan, SurveySettings, survey

_MAX_SIZE = 2**62


def _is_count(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and 0 <= value < _MAX_SIZE


_FEATURE_DTYPES = ("<f4", "<f8")


def old_check_manifest(file, m: dict) -> None:
    """The manifest check as plan/shards.py wrote it by hand before the shape (the oracle)."""
    def bad(key: str, rule: str):
        return InputError(f"{file}: '{key}' must be {rule} (got {m.get(key)!r:.60})")

    for key in ("workers", "num_vertices", "num_edges", "num_train_global", "num_classes"):
        if key not in m:
            raise InputError(f"{file}: missing key '{key}'")
        if not _is_count(m[key]):
            raise bad(key, "a non-negative integer")
    k, n = m["workers"], m["num_vertices"]
    if not 1 <= k <= max(n, 1):
        raise bad("workers", f"an integer between 1 and num_vertices ({n})")
    if m["num_train_global"] > n:
        raise bad("num_train_global", f"at most num_vertices ({n})")
    if m.get("input_dim") is not None and not (_is_count(m["input_dim"]) and m["input_dim"] > 0):
        raise bad("input_dim", "a positive integer or null")
    if m.get("feature_dtype") not in (None, *_FEATURE_DTYPES):
        raise bad("feature_dtype", f"one of {', '.join(_FEATURE_DTYPES)} or null")
    if (m.get("feature_dtype") is None) != (m.get("input_dim") is None):
        raise InputError(f"{file}: 'input_dim' and 'feature_dtype' disagree (both are null "
                         f"only when the shards have no features)")
    if not isinstance(m.get("split_id"), str) or not 1 <= len(m["split_id"]) <= 64:
        raise bad("split_id", "the split's id string")
    if m.get("graph_fingerprint") is not None and not isinstance(m["graph_fingerprint"], str):
        raise bad("graph_fingerprint", "a string or null")
    owned = m.get("owned")
    if (not isinstance(owned, list) or len(owned) != k
            or not all(_is_count(c) for c in owned)):
        raise bad("owned", f"a list of {k} vertex counts, one per worker")
    if sum(owned) != n:
        raise InputError(f"{file}: the workers' owned vertices add up to {sum(owned)}, not "
                         f"num_vertices {n}")
    files = m.get("files")
    if not isinstance(files, list) or len(files) != k:
        raise bad("files", f"a list of {k} shard file names, one per worker")
    for name in files:
        if (not isinstance(name, str) or name in ("", ".", "..") or "/" in name
                or "\\" in name or "\0" in name):
            raise InputError(f"{file}: 'files' entry {name!r:.60} is not a plain file name "
                             f"inside the shard directory")
    if len(set(files)) != k:
        raise InputError(f"{file}: 'files' names the same shard file twice")
    if "meta" in m and not isinstance(m["meta"], dict):
        raise bad("meta", "an object")


@pytest.fixture(scope="module")
def shard_dir(tmp_path_factory):
    g = depot_graph()
    path = tmp_path_factory.mktemp("s") / "shards"
    shards = build_shards(g, partition(g, "range", 3), 3)
    save_shards(path, shards, meta={"method": "range", "seed": 0, "graph_fingerprint": "f"})
    return path


# the key order every writer used before the dataclasses (they must write the same bytes)
MANIFEST_KEYS = ["format", "version", "workers", "num_vertices", "num_edges",
                 "num_train_global", "input_dim", "num_classes", "feature_dtype",
                 "graph_fingerprint", "method", "seed", "split_id", "owned", "files", "meta"]
PLAN_KEYS = ["method", "workers", "edge_cut", "replication_factor", "max_memory_bytes",
             "epoch_payload_bytes", "shards", "traffic", "imbalance", "partition",
             "partition_s", "build_s", "partition_cpu_s", "build_cpu_s"]
CALIBRATION_KEYS = ["version", "dtype", "threads", "sparse", "dense", "elementwise",
                    "dropout_masks", "row_moves", "pipe", "exchange_call", "transport_copy",
                    "roofline", "calibration_s"]


def test_manifest_round_trip_is_byte_identical(shard_dir):
    text = (shard_dir / SHARDS_MANIFEST).read_text()
    doc = json.loads(text)
    assert list(doc) == MANIFEST_KEYS
    typed = read_manifest(shard_dir)
    assert isinstance(typed, ShardManifest) and typed.workers == 3 and typed.extra == {}
    assert json_text(typed.to_dict()) == json_text(doc)
    doc["added_later"] = [1]                     # a newer writer's key survives
    assert ShardManifest.from_dict(doc).to_dict() == doc


def test_survey_plan_and_calibration_round_trip():
    plans = survey(depot_graph(), ["range", "random"], [2, 3], SurveySettings())["plans"]
    for plan in plans:
        assert list(plan) == PLAN_KEYS
        again = SurveyPlan.from_dict(copy.deepcopy(plan)).to_dict()
        assert json_text(again) == json_text(plan) and list(again) == PLAN_KEYS
    cal = from_flops(1e9)
    assert list(cal) == ["version", "dtype", "threads", "sparse", "dense", "elementwise",
                         "dropout_masks", "roofline", "calibration_s", "from_flops"]
    assert json_text(Calibration.from_dict(cal).to_dict()) == json_text(cal)
    full = Calibration(**{k: {} for k in CALIBRATION_KEYS if k not in
                          ("version", "dtype", "threads", "sparse", "dense")},
                       version=2, dtype="float32", threads=1, sparse=[], dense=[])
    assert list(full.to_dict()) == CALIBRATION_KEYS


def _mutations(m: dict):
    """Hand-edited manifests: every key removed, and many wrong values per key."""
    bad_values = [None, -1, 0, 1, 2, 3.0, True, "x", "", [], {}, [1, 2], 2**62, "<f4",
                  "a" * 70, ["shard-0000.npz"] * 3, ["a/b", "c", "d"], [40, 40, 40],
                  [40, 40], [0, 0, 120], [".", "b", "c"]]
    for key in list(m):
        yield {k: v for k, v in m.items() if k != key}
        for value in bad_values:
            yield {**m, key: value}
    yield {**m, "input_dim": None}                # features disagree with feature_dtype
    yield {**m, "num_train_global": m["num_vertices"] + 1}
    yield {**m, "workers": m["num_vertices"] + 1}


def test_manifest_shape_words_every_fault_as_the_hand_written_check(shard_dir):
    base = load_manifest(shard_dir)
    file = shard_dir / SHARDS_MANIFEST
    checked = failed = 0
    for doc in _mutations(base):
        try:
            old_check_manifest(file, copy.deepcopy(doc))
            want = None
        except InputError as exc:
            want = str(exc)
        try:
            documents.validate(copy.deepcopy(doc), "manifest", file)
            got = None
        except InputError as exc:
            got = str(exc)
        assert got == want, doc
        checked += 1
        failed += want is not None
    assert checked > 300 and failed > 200          # the mutations do break the manifest


def test_manifest_messages(shard_dir):
    m = load_manifest(shard_dir)
    file = shard_dir / SHARDS_MANIFEST
    with pytest.raises(InputError, match=r"^.*shards\.json: missing key 'workers'$"):
        documents.validate({k: v for k, v in m.items() if k != "workers"}, "manifest", file)
    with pytest.raises(InputError, match=r"'split_id' must be the split's id string \(got None\)"):
        documents.validate({k: v for k, v in m.items() if k != "split_id"}, "manifest", file)
    assert documents.validate(copy.deepcopy(m), "manifest", file) == m
    assert np.sum(m["owned"]) == m["num_vertices"]
