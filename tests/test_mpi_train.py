"""`mpiexec -n K shardtrain train SHARD_DIR --transport mpi`: the same run as over pipes.

Sources of truth: the single-process reference trainer (`shardtrain.train.reference`, itself
checked against central finite differences and the GCN paper's setup) and the pipes run of
the same shard directory (`coordinator.train_partitioned`). In float64 with dropout on,
every epoch's loss and the final weights must agree to a relative 1e-9 (docs/design.md §1.7); the
measured payload must equal the survey's prediction, and every (pair, layer, direction) row
of the traffic account must be the pipes run's, byte for byte.

Failures must end the job, never hang: too many ranks for the shards, a rank that stops
answering, a rank that is killed. `python tests/test_mpi_train.py FAULT ARGS...` is the
per-rank program of the fault tests (the CLI with one rank made to fail).
"""
from __future__ import annotations

import csv
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from helpers import launch_mpi, mpiexec

pytestmark = pytest.mark.mpi      # every test here starts mpiexec

RTOL = 1e-9
SETTINGS_ARGS = ["--layers", "3", "--hidden", "8", "--dropout", "0.5", "--epochs", "3",
                 "--seed", "7", "--dtype", "float64", "--bias"]


def _settings():
    from shardtrain.train.settings import TrainSettings
    return TrainSettings(layers=3, hidden=8, dropout=0.5, epochs=3, seed=7, dtype="float64",
                         bias=True)


@pytest.fixture(scope="module")
def graph():
    from helpers import depot_graph
    return depot_graph(n=300)


@pytest.fixture(scope="module")
def reference(graph):
    from shardtrain.train.reference import train_reference
    return train_reference(graph, _settings())


def _shard_dir(graph, k: int, folder: Path) -> Path:
    from shardtrain.plan.partition import partition
    from shardtrain.plan.shards import build_shards, save_shards

    out = folder / f"shards-{k}"
    # random assignment: every pair of workers shares a halo, in both directions
    assignment = partition(graph, "random", k, seed=0)
    save_shards(out, build_shards(graph, assignment, k),
                meta={"method": "random", "seed": 0, "num_classes": graph.num_classes,
                      "input_dim": graph.input_dim})
    return out


@pytest.fixture(scope="module")
def shard_dirs(graph, tmp_path_factory):
    folder = tmp_path_factory.mktemp("mpi-shards")
    return {k: _shard_dir(graph, k, folder) for k in (2, 3)}


def _close(a, b) -> bool:
    return bool(np.allclose(a, b, rtol=RTOL, atol=0))


@pytest.mark.parametrize("k", [2, 3])
def test_mpi_run_equals_pipes_run_and_reference(k, shard_dirs, reference, tmp_path):
    from shardtrain.train import model
    from shardtrain.train.coordinator import train_partitioned

    mpiexec()
    out = {"json": tmp_path / "run.json", "weights": tmp_path / "w.npz",
           "predictions": tmp_path / "pred.csv"}
    proc, _ = launch_mpi(k, ["-m", "shardtrain", "train", str(shard_dirs[k]), "--transport", "mpi",
                          *SETTINGS_ARGS, "--quiet", *[a for key, path in out.items()
                                                      for a in (f"--{key}", str(path))]])
    assert proc.returncode == 0, proc.stderr[-3000:]
    doc = json.loads(out["json"].read_text())
    pipes = train_partitioned(shard_dirs[k], _settings(), timeout_s=30)

    # every epoch's loss: MPI == pipes == reference (relative 1e-9)
    losses = [e["loss"] for e in doc["epochs"]]
    assert len(losses) == 3
    assert _close(losses, [e["loss"] for e in pipes.epochs])
    assert _close(losses, [e["loss"] for e in reference.epochs])
    for key in ("train_acc", "val_acc", "test_acc"):
        assert [e[key] for e in doc["epochs"]] == [e[key] for e in pipes.epochs]

    # final weights, from the --weights file
    with np.load(out["weights"], allow_pickle=False) as w:
        got = {name: w[name] for name in w.files}
    for want in (model.params_to_arrays(pipes.params), model.params_to_arrays(reference.params)):
        assert sorted(got) == sorted(want)
        for name in want:
            assert _close(got[name], want[name]), name

    # predictions: one row per vertex, the pipes run's classes
    rows = list(csv.reader(out["predictions"].read_text().splitlines()))
    assert rows[0] == ["vertex", "predicted", "label"] and len(rows) == 301
    assert [int(r[1]) for r in rows[1:]] == pipes.predictions.tolist()

    # traffic: measured payload == the survey's prediction, row by row as over pipes
    t = doc["traffic"]
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"] > 0
    assert t["breakdown_matches"] and t["sender_receiver_consistent"]
    assert json.loads(json.dumps(pipes.traffic["breakdown"])) == t["breakdown"]
    for key in ("measured_payload_bytes", "measured_framing_bytes", "frames",
                "halo_payload_bytes", "allreduce_payload_bytes"):
        assert t[key] == pipes.traffic[key], key
    assert json.loads(json.dumps(pipes.traffic["by_layer_direction"])) == \
        t["by_layer_direction"]

    # the per-rank rows of the pipes run: same keys, same byte counts
    assert [w["worker"] for w in doc["workers"]] == list(range(k))
    for got_row, want_row in zip(doc["workers"], pipes.workers):
        assert set(got_row) == set(want_row)
        assert (got_row["bytes_sent"], got_row["bytes_received"]) == \
            (want_row["bytes_sent"], want_row["bytes_received"])
        assert got_row["compute_s"] > 0 and got_row["peak_rss_bytes"] > 0
    assert doc["transport"] == "mpi" and doc["mode"] == "partitioned"
    assert not list(tmp_path.glob(".*tmp*"))


def test_more_ranks_than_shards_is_one_line_and_exit_2(shard_dirs, tmp_path):
    proc, seconds = launch_mpi(3, ["-m", "shardtrain", "train", str(shard_dirs[2]),
                                "--transport", "mpi", *SETTINGS_ARGS, "--quiet",
                                "--json", str(tmp_path / "run.json")])
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "holds 2 shards" in lines[0] and "3 ranks" in lines[0] and "mpiexec -n 2" in lines[0]
    assert "Traceback" not in proc.stderr
    assert not list(tmp_path.iterdir())             # nothing written


def test_mpi_transport_needs_a_shard_directory(graph, tmp_path):
    path = tmp_path / "g.npz"
    np.savez(path, edges=np.zeros((0, 2), np.int64), num_vertices=np.int64(3))
    proc, _ = launch_mpi(2, ["-m", "shardtrain", "train", str(path), "--transport", "mpi",
                          "--quiet"])
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "--transport mpi" in lines[0] and "shard directory" in lines[0]


@pytest.mark.slow
@pytest.mark.parametrize("fault, code, needle", [
    # rank 1 stops answering in epoch 2: its peers miss the 2 s deadline and end the job
    ("hang", 3, "timed out after 2 s waiting for worker 1"),
    # rank 1 is killed in epoch 2: the MPI launcher ends the job and says so
    ("kill", None, "killed"),
])
def test_a_failing_rank_ends_the_job(fault, code, needle, shard_dirs):
    proc, seconds = launch_mpi(3, [__file__, fault, "train", str(shard_dirs[3]), "--transport",
                                "mpi", *SETTINGS_ARGS, "--quiet", "--timeout", "2"])
    assert proc.returncode == code if code is not None else proc.returncode != 0, proc.stderr
    assert needle in (proc.stderr + proc.stdout).lower(), proc.stderr
    assert seconds < 30


# ---------------------------------------------------------------- per-rank fault program

def _fault_main(fault: str, argv: list[str]) -> int:
    """The CLI, with rank 1 made to hang or die at the start of epoch 2."""
    import signal

    from mpi4py import MPI

    from shardtrain.cli import main
    from shardtrain.train import model

    if MPI.COMM_WORLD.Get_rank() == 1:
        step = model.train_step
        calls = [0]

        def failing_step(*args, **kw):
            calls[0] += 1
            if calls[0] == 2:
                if fault == "hang":
                    time.sleep(3600)
                os.kill(os.getpid(), signal.SIGKILL)
            return step(*args, **kw)
        model.train_step = failing_step
    return main(argv)


if __name__ == "__main__":
    sys.exit(_fault_main(sys.argv[1], sys.argv[2:]))
