"""`train NEW_DIR --warm-start CHECKPOINT_DIR`: continue on an updated graph from a
checkpoint taken on the old one.

Source of truth: IEEE float64 arithmetic repeated in the same order (common practice for
deterministic checkpointing, as in tests/test_reference_resume.py): a warm start must be
bit for bit the run that resumes, on the new graph, a checkpoint holding the same state
(weights, Adam moments and step; the epoch keys the dropout stream). And, since every
partitioned run equals its single-process model, the warm start equals the reference run
on the new graph started from that state (to float64 rounding).
"""
from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from helpers import depot_graph

from shardtrain.data.graph import fingerprint
from shardtrain.plan.partition import partition_plan
from shardtrain.plan.shards import build_shards, load_manifest, save_shards
from shardtrain.plan.update import read_shard_graph, update_plan
from shardtrain.train import api, checkpoint, model
from shardtrain.train.reference import train_reference
from shardtrain.train.settings import TrainSettings

SETTINGS = TrainSettings(layers=2, hidden=8, dropout=0.5, lr=0.01, weight_decay=5e-4,
                         epochs=3, seed=5, dtype="float64", bias=True)


@pytest.fixture(scope="module")
def dirs(tmp_path_factory):
    """old shards, a checkpoint of 3 epochs on them, the updated shards."""
    tmp = tmp_path_factory.mktemp("warm")
    g = depot_graph(n=200)
    a, details = partition_plan(g, "metis", 2)
    meta = {"method": "metis", "seed": 0, "imbalance": 0.03,
            "graph_fingerprint": fingerprint(g), "num_edges": g.num_edges,
            "input_dim": g.input_dim, "num_classes": g.num_classes, "partition": details}
    save_shards(tmp / "old", build_shards(g, a, 2), meta=meta)
    api.run(api.RunConfig(source=str(tmp / "old"), settings=SETTINGS,
                          checkpoint=str(tmp / "ck")), signals=False)
    rng = np.random.default_rng(2)
    n_new = 12
    np.savez(tmp / "v.npz", features=rng.normal(size=(n_new, g.input_dim)),
             labels=rng.integers(0, 4, n_new), train_mask=rng.random(n_new) < 0.5)
    e = np.stack([np.arange(200, 200 + n_new).repeat(3), rng.integers(0, 200, 3 * n_new)], 1)
    np.savetxt(tmp / "add.txt", e, fmt="%d")
    update_plan(tmp / "old", tmp / "new", add_edges=tmp / "add.txt",
                add_vertices=tmp / "v.npz", fresh=False)
    return tmp


def _weights(result) -> dict:
    return model.params_to_arrays(result.params)


def test_warm_start_equals_a_resume_of_the_same_state_on_the_new_graph(dirs):
    more = dataclasses.replace(SETTINGS, epochs=4)
    warm = api.run(api.RunConfig(source=str(dirs / "new"), settings=more,
                                 warm_start=str(dirs / "ck")), signals=False)
    assert [r["epoch"] for r in warm.result.epochs] == [4, 5, 6, 7]
    assert warm.document["warm_start"]["folder"] == str(dirs / "ck")
    assert warm.document["warm_start"]["epoch"] == 3
    old_ck = checkpoint.read_checkpoint(dirs / "ck")
    assert warm.document["warm_start"]["graph_fingerprint"] == \
        load_manifest(dirs / "old")["graph_fingerprint"]
    # the same state as a checkpoint of a run on the new graph, resumed the ordinary way
    total = dataclasses.replace(SETTINGS, epochs=7)
    manifest = load_manifest(dirs / "new")
    identity = checkpoint.run_identity(
        total, workers=2, dims=old_ck.doc["dims"],
        graph_fingerprint=manifest["graph_fingerprint"],
        shards_fingerprint=checkpoint.shard_dir_fingerprint(dirs / "new"))
    (dirs / "ck2").mkdir(exist_ok=True)
    checkpoint.write_checkpoint(dirs / "ck2", 3, old_ck.params, old_ck.adam, identity, every=10)
    resumed = api.run(api.RunConfig(source=str(dirs / "new"), settings=total,
                                    resume=str(dirs / "ck2")), signals=False)
    got, want = _weights(warm.result), _weights(resumed.result)
    assert sorted(got) == sorted(want)
    for name in want:
        assert got[name].dtype == np.float64
        assert got[name].tobytes() == want[name].tobytes(), name     # bit for bit
    assert [r["train_loss"] for r in warm.result.epochs] == \
        [r["train_loss"] for r in resumed.result.epochs]
    # and the single-process model on the new graph from the same state
    graph = read_shard_graph(dirs / "new").graph
    ref = train_reference(graph, total, init_params=old_ck.params, init_adam=old_ck.adam,
                          first_epoch=4)
    for name, value in _weights(ref).items():
        assert np.allclose(got[name], value, rtol=1e-9, atol=1e-12), name
    # a cold start on the new graph is another run: the test tells them apart
    cold = api.run(api.RunConfig(source=str(dirs / "new"), settings=more), signals=False)
    assert any(not np.array_equal(got[k], v) for k, v in _weights(cold.result).items())


def test_warm_start_of_another_model_shape_is_refused(dirs, run_cli):
    r = run_cli("train", dirs / "new", "--warm-start", dirs / "ck", "--hidden", "9",
                "--layers", "2", "--epochs", "1", "--bias", "--dtype", "float64")
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "--warm-start" in lines[0] and "layers" in lines[0]
    r = run_cli("train", dirs / "new", "--warm-start", dirs / "ck", "--resume", dirs / "ck",
                "--epochs", "1")
    assert r.returncode == 2 and "Traceback" not in r.stderr


def test_warm_start_through_the_cli_records_where_it_started(dirs, run_cli):
    r = run_cli("train", dirs / "new", "--warm-start", dirs / "ck", "--hidden", "8",
                "--layers", "2", "--epochs", "1", "--bias", "--dtype", "float64",
                "--dropout", "0.5", "--seed", "5", "--json", dirs / "run.json")
    assert r.returncode == 0, r.stderr
    doc = json.loads((dirs / "run.json").read_text())
    assert doc["warm_start"]["epoch"] == 3 and doc["epochs"][0]["epoch"] == 4
