"""Checkpoint and resume of the single-process reference run (`train --reference`).

Source of truth: the uninterrupted run itself and the exact arithmetic of IEEE float64: a
resumed run repeats the very same operations in the same order (the epoch keys the dropout
stream; the checkpoint holds the weights and the Adam moments and step), so its final
weights must be identical, not merely close (common practice for deterministic
checkpointing, as in tests/test_faults.py for the partitioned run).
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from helpers import depot_graph, save_graph

from shardtrain.cli import main
from shardtrain.data.graph import fingerprint
from shardtrain.train import checkpoint as ck
from shardtrain.train import model
from shardtrain.train.reference import model_dims, train_reference
from shardtrain.train.settings import TrainSettings

SETTINGS = TrainSettings(layers=2, hidden=8, dropout=0.5, lr=0.01, weight_decay=5e-4,
                         epochs=7, seed=5, dtype="float64", bias=True)


class _Stop(Exception):
    """Stands for the process dying after an epoch."""


def _plan(graph, folder, every) -> dict:
    identity = ck.run_identity(SETTINGS, workers=1, dims=model_dims(graph, SETTINGS),
                               graph_fingerprint=fingerprint(graph), shards_fingerprint=None,
                               mode="reference")
    return {"folder": str(folder), "every": every, "identity": identity}


def _assert_bit_equal(got: dict, want: dict):
    assert sorted(got) == sorted(want)
    for name in want:
        assert got[name].dtype == want[name].dtype == np.float64
        assert np.array_equal(got[name], want[name]), name   # bit for bit, not allclose
        assert got[name].tobytes() == want[name].tobytes(), name


@pytest.fixture(scope="module")
def graph():
    return depot_graph(n=200)


@pytest.fixture(scope="module")
def uninterrupted(graph):
    return model.params_to_arrays(train_reference(graph, SETTINGS).params)


@pytest.mark.parametrize("stop_after, every", [(3, 2), (4, 2), (1, 1)])
def test_resumed_reference_equals_the_uninterrupted_run(graph, uninterrupted, tmp_path,
                                                        stop_after, every):
    folder = tmp_path / "ck"
    plan = _plan(graph, folder, every)
    write = ck.epoch_writer(plan, SETTINGS.epochs)

    def end_of_epoch(epoch, params, adam):
        write(epoch, params, adam)
        if epoch == stop_after:
            raise _Stop()
    with pytest.raises(_Stop):
        train_reference(graph, SETTINGS, on_epoch_end=end_of_epoch)
    saved = ck.read_checkpoint(folder)
    assert saved.epoch == stop_after - stop_after % every
    assert saved.doc["mode"] == "reference" and saved.doc["workers"] == 1
    ck.check_resumable(saved, plan["identity"], epochs=SETTINGS.epochs)

    seen = []
    resumed = train_reference(graph, SETTINGS, init_params=saved.params, init_adam=saved.adam,
                              first_epoch=saved.epoch + 1, on_epoch=seen.append,
                              on_epoch_end=ck.epoch_writer(plan, SETTINGS.epochs))
    assert [r["epoch"] for r in resumed.epochs] == list(range(saved.epoch + 1, 8))
    assert seen == resumed.epochs
    _assert_bit_equal(model.params_to_arrays(resumed.params), uninterrupted)
    assert ck.read_checkpoint(folder).epoch == SETTINGS.epochs
    assert sorted(p.name for p in folder.iterdir()) == ["checkpoint.json", "state-000007.npz"]


def test_resume_without_the_adam_state_is_not_the_same_run(graph, uninterrupted, tmp_path):
    """The check above can fail: dropping the optimiser state changes the weights."""
    folder = tmp_path / "ck"
    plan = _plan(graph, folder, 3)
    write = ck.epoch_writer(plan, SETTINGS.epochs)
    train_reference(graph, TrainSettings(**{**SETTINGS.to_dict(), "epochs": 3}),
                    on_epoch_end=write)
    saved = ck.read_checkpoint(folder)
    fresh = train_reference(graph, SETTINGS, init_params=saved.params, first_epoch=4)
    got = model.params_to_arrays(fresh.params)
    assert not all(np.array_equal(got[k], uninterrupted[k]) for k in uninterrupted)


# ---------------------------------------------------------------- through the CLI

CLI = ["--reference", "--dtype", "float64", "--hidden", "8", "--seed", "5", "--quiet"]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A graph, another graph, a reference checkpoint and a partitioned checkpoint."""
    d = tmp_path_factory.mktemp("ref")
    save_graph(d / "g.npz", depot_graph(n=200))
    save_graph(d / "other.npz", depot_graph(n=200, seed=4))
    assert main(["train", str(d / "g.npz"), *CLI, "--epochs", "4", "--checkpoint",
                 str(d / "ck_ref"), "--checkpoint-every", "2"]) == 0
    assert main(["train", str(d / "g.npz"), "--workers", "2", "--method", "random",
                 "--epochs", "4", "--dtype", "float64", "--hidden", "8", "--seed", "5",
                 "--quiet", "--timeout", "20", "--checkpoint", str(d / "ck_part")]) == 0
    return d


REFUSED = [
    ("partitioned checkpoint", ["{g}", *CLI, "--epochs", "6", "--resume", "{d}/ck_part"],
     r"--resume .*ck_part: the checkpoint was written by a partitioned run, this is a "
     r"reference run"),
    ("reference checkpoint, partitioned run",
     ["{g}", "--workers", "2", "--method", "random", "--dtype", "float64", "--hidden", "8",
      "--seed", "5", "--quiet", "--epochs", "6", "--resume", "{d}/ck_ref"],
     r"--resume .*ck_ref: the checkpoint was written by a reference run, this is a "
     r"partitioned run .*with --reference"),
    ("hidden differs", ["{g}", *CLI, "--epochs", "6", "--hidden", "9", "--resume",
                        "{d}/ck_ref"], r"--hidden: this run asks for 9, .* with 8"),
    ("seed differs", ["{g}", *CLI, "--epochs", "6", "--seed", "6", "--resume", "{d}/ck_ref"],
     r"--seed: this run asks for 6"),
    ("other graph", ["{d}/other.npz", *CLI, "--epochs", "6", "--resume", "{d}/ck_ref"],
     r"other\.npz: a different graph from the checkpoint's"),
    ("already finished", ["{g}", *CLI, "--epochs", "4", "--resume", "{d}/ck_ref"],
     r"--epochs 4: the checkpoint .* already at epoch 4"),
    ("checkpoint folder taken", ["{g}", *CLI, "--epochs", "6", "--checkpoint", "{d}/ck_ref"],
     r"--checkpoint .*ck_ref: holds a checkpoint already"),
    ("slow worker", ["{g}", *CLI, "--slow-worker", "0:2"],
     r"--slow-worker: not available with --reference"),
]


def _listing(folder) -> list[str]:
    return sorted(f"{p.relative_to(folder)} {p.stat().st_size}" for p in folder.rglob("*"))


@pytest.mark.parametrize("case", REFUSED, ids=[c[0] for c in REFUSED])
def test_contradicting_resume_is_refused(files, capsys, case):
    import re

    _, template, pattern = case
    argv = ["train", *(a.format(g=files / "g.npz", d=files) for a in template)]
    before = _listing(files)
    capsys.readouterr()
    code = main(argv)
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code == 2, err
    assert len(lines) == 1 and "Traceback" not in err, err
    assert re.search(pattern, lines[0]), lines[0]
    assert _listing(files) == before


def _cli(*args):
    return subprocess.Popen([sys.executable, "-m", "shardtrain", "train", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


@pytest.mark.slow
def test_ctrl_c_keeps_the_checkpoint_and_resume_is_bit_exact(files, tmp_path):
    """A SIGINT lands mid-run (each epoch writes a checkpoint, so the run is slow enough
    to be caught); the resumed run, checkpointing rarely, ends on the same bits."""
    epochs = ["--epochs", "2000"]
    full = _cli(files / "g.npz", *CLI, *epochs, "--weights", tmp_path / "full.npz")
    folder = tmp_path / "ck"
    run = _cli(files / "g.npz", *CLI, *epochs, "--checkpoint", folder,
               "--checkpoint-every", "1")
    deadline = time.monotonic() + 60
    while (ck.latest_epoch(folder) or 0) < 3:
        assert run.poll() is None and time.monotonic() < deadline, run.communicate()
        time.sleep(0.01)
    os.killpg(run.pid, signal.SIGINT)        # a terminal's Ctrl-C reaches the group
    _, err = run.communicate(timeout=30)
    assert run.returncode == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    saved = ck.read_checkpoint(folder)
    assert 3 <= saved.epoch < 2000
    assert f"(epoch {saved.epoch}) is intact in {folder}" in lines[0], lines[0]
    assert f"--resume {folder}" in lines[0], lines[0]

    resumed = _cli(files / "g.npz", *CLI, *epochs, "--resume", folder, "--checkpoint-every",
                   "100000", "--weights", tmp_path / "resumed.npz", "--json",
                   tmp_path / "run.json")
    assert resumed.wait(120) == 0, resumed.communicate()
    assert full.wait(120) == 0, full.communicate()
    with np.load(tmp_path / "full.npz", allow_pickle=False) as a, \
            np.load(tmp_path / "resumed.npz", allow_pickle=False) as b:
        _assert_bit_equal(dict(b), dict(a))
    doc = json.loads((tmp_path / "run.json").read_text())
    assert doc["mode"] == "reference"
    assert doc["resumed_from"]["epoch"] == saved.epoch
    assert [e["epoch"] for e in doc["epochs"]] == list(range(saved.epoch + 1, 2001))
    assert ck.read_checkpoint(folder).epoch == 2000
