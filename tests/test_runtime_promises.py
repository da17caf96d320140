"""The training runtime keeps the README's promises in every phase: `--assignment` works
end to end, a broken shard directory is one line and exit 2 before any worker starts (the
same line under MPI), descriptors are counted before the start, signals outside the
training loop still mean exit 4 with nothing left behind, a checkpoint folder serves one
run at a time, and every numeric option either works in every mode or is refused at the
option.

Sources of truth: the `--method metis` run of the same graph (an assignment file holding
the very partition METIS made must train identically, loss for loss); the kernel's own
count of this process's descriptors (/proc/self/fd, Linux proc(5)); POSIX flock(2) and
setrlimit(2) semantics; the rest is the README's exit-status table (common practice for
this tool).
"""
from __future__ import annotations

import json
import multiprocessing
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from helpers import depot_graph, launch_mpi, processes_with_token, save_graph

from shardtrain.cli import main

K = 3
QUICK = ["--epochs", "2", "--hidden", "4", "--quiet", "--timeout", "30"]


def _one_line_error(capsys, code: int = 2) -> str:
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def _cli(*args, env=None, **kw):
    return subprocess.run([sys.executable, "-m", "shardtrain", *map(str, args)],
                          capture_output=True, text=True, timeout=120,
                          env={**os.environ, **(env or {})}, **kw)


@pytest.fixture(scope="module")
def graph():
    return depot_graph(n=150)


@pytest.fixture(scope="module")
def graph_file(tmp_path_factory, graph):
    path = tmp_path_factory.mktemp("g") / "depots.npz"
    save_graph(path, graph)
    return path


# ---------------------------------------------------------------- 1: --assignment

@pytest.fixture(scope="module")
def metis_file(tmp_path_factory, graph):
    from shardtrain.plan.partition import partition

    path = tmp_path_factory.mktemp("a") / "parts.npy"
    np.save(path, partition(graph, "metis", K, seed=0))
    return path


def test_assignment_file_trains_like_the_method_that_made_it(graph_file, metis_file, tmp_path):
    # source of truth: the --method metis run; the file holds METIS's own partition
    common = ["--epochs", "3", "--dtype", "float64", "--hidden", "8", "--quiet"]
    # the crashing form: --workers K with the file (the file alone is below)
    assert main(["train", str(graph_file), "--workers", str(K), "--assignment",
                 str(metis_file), *common, "--json", str(tmp_path / "file.json")]) == 0
    assert main(["train", str(graph_file), "--workers", str(K), "--method", "metis", *common,
                 "--json", str(tmp_path / "metis.json")]) == 0
    a, b = (json.loads((tmp_path / f"{n}.json").read_text()) for n in ("file", "metis"))
    assert len(a["workers"]) == K
    assert [e["loss"] for e in a["epochs"]] == [e["loss"] for e in b["epochs"]]
    assert a["traffic"]["measured_payload_bytes"] == b["traffic"]["measured_payload_bytes"]


def test_assignment_forms_agree_across_commands(capsys, graph_file, metis_file, tmp_path):
    assert main(["train", str(graph_file), "--assignment", str(metis_file), *QUICK]) == 0
    # --workers K with the file is fine when it agrees, one line naming both otherwise
    assert main(["train", str(graph_file), "--assignment", str(metis_file), "--workers",
                 str(K + 1), *QUICK]) == 2
    line = _one_line_error(capsys)
    assert f"--workers {K + 1}" in line and "parts.npy" in line and f"{K} workers" in line
    for extra in (["--method", "metis"], ["--reference"]):
        assert main(["train", str(graph_file), "--assignment", str(metis_file), *extra,
                     *QUICK]) == 2
        line = _one_line_error(capsys)
        assert "--assignment" in line and "not allowed with" in line, line
    assert main(["survey", str(graph_file), "--assignment", str(metis_file), "--workers",
                 str(K)]) == 0
    capsys.readouterr()
    assert main(["survey", str(graph_file), "--assignment", str(metis_file), "--workers",
                 str(K + 1)]) == 2
    assert f"--workers {K + 1}" in _one_line_error(capsys)
    for workers in ([], ["--workers", str(K)]):
        out = tmp_path / f"split{len(workers)}"
        assert main(["split", str(graph_file), "--assignment", str(metis_file), *workers,
                     "--out", str(out)]) == 0
        assert json.loads((out / "shards.json").read_text())["workers"] == K
    capsys.readouterr()
    assert main(["split", str(graph_file), "--assignment", str(metis_file), "--workers",
                 str(K + 1), "--out", str(tmp_path / "bad")]) == 2
    assert f"--workers {K + 1}" in _one_line_error(capsys)


def test_missing_graph_says_no_such_file_and_the_size_line_is_printed(capsys, graph_file,
                                                                      graph):
    assert main(["train", "/no/such/path", "--reference"]) == 2
    assert main(["train", "/no/such/path"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and all("/no/such/path: no such file" in e for e in err), err
    assert main(["train", str(graph_file), "--reference", "--epochs", "1"]) == 0
    first = capsys.readouterr().out.splitlines()[0]
    assert first.startswith(f"graph: {graph.num_vertices:,} vertices, "
                            f"{graph.num_edges:,} edges, 24 features, 4 classes; split: "
                            f"{int(graph.train_mask.sum())} train"), first


# ---------------------------------------------------------------- 3: the shard set, checked

_PRISTINE: dict = {}


@pytest.fixture(scope="module")
def pristine(tmp_path_factory, graph):
    from shardtrain.data.graph import fingerprint
    from shardtrain.plan.shards import build_shards, save_shards

    root = tmp_path_factory.mktemp("shards")
    _PRISTINE["root"] = root
    meta = {"method": "test", "seed": 0, "graph_fingerprint": fingerprint(graph)}
    save_shards(root / "good", build_shards(graph, np.arange(graph.num_vertices) % K, K),
                meta=meta)
    # another split of the same graph, and a split of another graph
    save_shards(root / "other-split",
                build_shards(graph, (np.arange(graph.num_vertices) // 7) % K, K), meta=meta)
    other = depot_graph(n=150, seed=11)
    save_shards(root / "other-graph", build_shards(other, np.arange(150) % K, K),
                meta={**meta, "graph_fingerprint": fingerprint(other)})
    return root


def _edit_manifest(d: Path, **changes):
    m = json.loads((d / "shards.json").read_text())
    m.update(changes)
    (d / "shards.json").write_text(json.dumps(m))


def _drop_key(d: Path, key: str):
    m = json.loads((d / "shards.json").read_text())
    del m[key]
    (d / "shards.json").write_text(json.dumps(m))


def _truncate(d: Path):
    f = d / "shard-0002.npz"
    f.write_bytes(f.read_bytes()[: f.stat().st_size // 2])


def _swap(d: Path):
    a, b = d / "shard-0000.npz", d / "shard-0001.npz"
    tmp = d / "x"
    a.rename(tmp), b.rename(a), tmp.rename(b)


def _from(other: str):
    def put(d: Path):
        shutil.copy(_PRISTINE["root"] / other / "shard-0001.npz", d / "shard-0001.npz")
    return put


def _link_outside(d: Path):
    outside = d.parent / "elsewhere.npz"
    shutil.copy(d / "shard-0001.npz", outside)
    (d / "shard-0001.npz").unlink()
    (d / "shard-0001.npz").symlink_to(outside)


def _deep(d: Path):
    (d / "shards.json").write_text("[" * 100000 + "]" * 100000)


BROKEN = {
    "missing": (lambda d: (d / "shard-0001.npz").unlink(), "shard-0001.npz: no such file"),
    "truncated": (_truncate, "shard-0002.npz: not a readable shard"),
    "swapped": (_swap, "shard-0000.npz: is shard 1 of the split"),
    "re-ordered": (lambda d: _edit_manifest(d, files=[f"shard-000{w}.npz" for w in (2, 1, 0)]),
                   "shard-0002.npz: is shard 2 of the split, but shards.json lists it as "
                   "shard 0"),
    "other-split": (_from("other-split"), "shard-0001.npz: belongs to another split"),
    "other-graph": (_from("other-graph"), "shard-0001.npz: belongs to another split"),
    "workers": (lambda d: _edit_manifest(d, workers=2), "shards.json: 'owned' must be"),
    "num_vertices": (lambda d: _edit_manifest(d, num_vertices=151),
                     "shards.json: the workers' owned vertices add up to 150"),
    "input_dim": (lambda d: _edit_manifest(d, input_dim=25),
                  "shard-0000.npz: says input_dim 24, shards.json says 25"),
    "num_classes": (lambda d: _edit_manifest(d, num_classes=3),
                    "shard-0000.npz: says num_classes 4, shards.json says 3"),
    "files-outside": (lambda d: _edit_manifest(d, files=["../good/shard-0000.npz",
                                                         "shard-0001.npz", "shard-0002.npz"]),
                      "shards.json: 'files' entry '../good/shard-0000.npz' is not a plain"),
    "symlink-outside": (_link_outside, "shard-0001.npz: lies outside the shard directory"),
    "string-count": (lambda d: _edit_manifest(d, num_vertices="150"),
                     "shards.json: 'num_vertices' must be a non-negative integer"),
    "nan": (lambda d: (d / "shards.json").write_text(
        (d / "shards.json").read_text().replace('"num_edges": ', '"num_edges": NaN, "x": ')),
        "shards.json: 'num_edges' must be a non-negative integer"),
    "missing-key": (lambda d: _drop_key(d, "num_train_global"),
                    "shards.json: missing key 'num_train_global'"),
    "negative": (lambda d: _edit_manifest(d, num_classes=-4),
                 "shards.json: 'num_classes' must be a non-negative integer"),
    "absurd": (lambda d: _edit_manifest(d, workers=10**30),
               "shards.json: 'workers' must be a non-negative integer"),
    "bool": (lambda d: _edit_manifest(d, workers=True), "shards.json: 'workers' must be"),
    "deep": (_deep, "shards.json: nested deeper than 64 levels"),
    "old-version": (lambda d: _edit_manifest(d, version=1), "re-run `shardtrain split`"),
}


@pytest.mark.parametrize("case", list(BROKEN))
def test_a_broken_shard_directory_is_refused_before_any_worker(capsys, monkeypatch, pristine,
                                                               tmp_path, case):
    from shardtrain.testing import faults

    d = tmp_path / "case" / "shards"
    d.parent.mkdir()
    shutil.copytree(pristine / "good", d)
    break_it, needle = BROKEN[case]
    break_it(d)
    # a worker that started would fail at once (exit 3): exit 2 proves none did
    monkeypatch.setenv(faults.ENV, "0@loading shard=raise")
    assert main(["train", str(d), *QUICK]) == 2
    line = _one_line_error(capsys)
    assert needle in line, line
    assert str(d) in line
    assert multiprocessing.active_children() == []


@pytest.mark.slow
@pytest.mark.mpi
def test_mpi_names_the_same_broken_shard_with_the_same_line(capsys, pristine, tmp_path):
    d = tmp_path / "shards"
    shutil.copytree(pristine / "good", d)
    _swap(d)
    assert main(["train", str(d), *QUICK]) == 2
    pipes_line = _one_line_error(capsys)
    proc, _ = launch_mpi(K, ["-m", "shardtrain", "train", str(d), "--transport", "mpi",
                          "--epochs", "2", "--hidden", "4", "--quiet", "--timeout", "30"])
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.strip().splitlines() == [pipes_line]
    _from("other-graph")(d)            # only rank 1's shard is wrong now
    (d / "shard-0000.npz").unlink()
    shutil.copy(pristine / "good" / "shard-0000.npz", d)
    shutil.copy(pristine / "good" / "shard-0002.npz", d)
    proc, _ = launch_mpi(K, ["-m", "shardtrain", "train", str(d), "--transport", "mpi",
                          "--epochs", "2", "--quiet"])
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "shard-0001.npz: belongs to another split" in lines[0], lines


# ---------------------------------------------------------------- 7: open files, temp folders

def test_descriptor_count_follows_the_mesh(monkeypatch, pristine, tmp_path, graph):
    """The coordinator's peak of open descriptors (counted by the kernel in /proc/self/fd,
    proc(5)) grows by FDS_PER_PAIR per pipe pair, and the prediction covers it."""
    import multiprocessing.process as mpp

    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.train import coordinator, processes
    from shardtrain.train.settings import TrainSettings

    peaks = {}
    start = mpp.BaseProcess.start

    def counting_start(self):
        start(self)
        peaks[current] = max(peaks.get(current, 0), len(os.listdir("/proc/self/fd")) - 1)
    monkeypatch.setattr(mpp.BaseProcess, "start", counting_start)
    predicted = {}
    for current in (4, 8):
        d = tmp_path / f"s{current}"
        save_shards(d, build_shards(graph, np.arange(graph.num_vertices) % current, current),
                    meta={"method": "test"})
        open_now = len(os.listdir("/proc/self/fd")) - 1
        predicted[current] = processes.descriptors_needed(current, open_now)
        coordinator.train_partitioned(d, TrainSettings(epochs=1, hidden=4), timeout_s=30)
        assert peaks[current] <= predicted[current]
    pairs = {k: len(processes.mesh_pairs(k)) for k in (4, 8)}
    growth = peaks[8] - peaks[4]
    assert abs(growth - processes.FDS_PER_PAIR * (pairs[8] - pairs[4])) <= \
        processes.FDS_PER_WORKER * 4, (peaks, pairs)


def _limited(soft: int, hard: int):
    import resource

    def set_limit():
        resource.setrlimit(resource.RLIMIT_NOFILE, (soft, hard))
    return set_limit


def test_open_files_limit_is_raised_or_refused_and_tmp_stays_clean(graph_file, tmp_path):
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    args = ["train", graph_file, "--workers", 6, "--method", "random", *QUICK]
    # 6 workers hold 60 pipe ends at once, beyond a limit of 64 with the interpreter's own
    # (measured above): refused when the limit cannot be raised
    refused = _cli(*args, env={"TMPDIR": str(tmp)}, preexec_fn=_limited(64, 64))
    assert refused.returncode == 2, refused.stderr
    lines = refused.stderr.strip().splitlines()
    assert len(lines) == 1 and "--workers 6" in lines[0] and "ulimit -n" in lines[0], lines
    assert list(tmp.iterdir()) == []
    # the same soft limit under a higher hard limit is raised, and the run succeeds
    ran = _cli(*args, env={"TMPDIR": str(tmp)}, preexec_fn=_limited(64, 4096))
    assert ran.returncode == 0, ran.stderr
    assert list(tmp.iterdir()) == []


@pytest.mark.parametrize("case", ["exit 2 after the shards were built", "exit 3"])
def test_temporary_shards_are_removed_on_failure(graph_file, metis_file, tmp_path, case):
    from shardtrain.testing import faults

    tmp = tmp_path / "tmp"
    tmp.mkdir()
    if case == "exit 3":
        run = _cli("train", graph_file, "--workers", 2, "--method", "random", *QUICK,
                   env={"TMPDIR": str(tmp), faults.ENV: "1@epoch 1 compute=exit"})
        code, needle = 3, "worker 1 died"
    else:           # the worker count (and so this check) is known only from the file
        run = _cli("train", graph_file, "--assignment", metis_file, "--slow-worker", "7:2",
                   *QUICK, env={"TMPDIR": str(tmp)})
        code, needle = 2, "--slow-worker 7:2: worker 7 does not exist"
    assert run.returncode == code, run.stderr
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0], lines
    assert list(tmp.iterdir()) == []


# ---------------------------------------------------------------- 8: signals in every phase

def _descendants_with(token: str) -> list[int]:
    return processes_with_token(token)


@pytest.mark.parametrize("where, sig", [
    ("partitioning", signal.SIGTERM),
    ("shards built", signal.SIGHUP),
    ("training", signal.SIGHUP),
])
def test_a_signal_in_any_phase_is_exit_4_and_leaves_nothing(graph_file, tmp_path, where, sig):
    import uuid

    from shardtrain.testing import faults

    tmp = tmp_path / "tmp"
    tmp.mkdir()
    stamp = tmp_path / "stamp"
    token = uuid.uuid4().hex
    env = {"TMPDIR": str(tmp), faults.ENV_STAMP: str(stamp), "SHARDTRAIN_TEST_TOKEN": token}
    if where == "training":          # workers are running: worker 0 waits in epoch 1
        env[faults.ENV] = "0@epoch 1 compute=pause:30"
    else:
        env[faults.ENV_PAUSE] = f"{where}=30"
    run = subprocess.Popen([sys.executable, "-m", "shardtrain", "train", str(graph_file),
                            "--workers", "2", "--method", "random", *QUICK],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                           env={**os.environ, **env})
    deadline = time.monotonic() + 60
    while not stamp.exists():
        assert run.poll() is None and time.monotonic() < deadline, run.communicate()
        time.sleep(0.05)
    if where != "training":
        assert any(tmp.glob("shardtrain-shards-*")), list(tmp.iterdir())
    run.send_signal(sig)
    _, err = run.communicate(timeout=30)
    assert run.returncode == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    if where != "training":
        assert f"stopped by {sig.name} while" in lines[0], lines[0]
    deadline = time.monotonic() + 5
    while _descendants_with(token) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert _descendants_with(token) == []
    assert list(tmp.iterdir()) == []


# ---------------------------------------------------------------- 9: one run per checkpoint folder

def test_a_checkpoint_folder_serves_one_run_at_a_time(capsys, graph_file, tmp_path):
    from shardtrain.train import checkpoint

    folder = tmp_path / "ck"
    held = checkpoint.lock_folder(folder)        # another run holds it (flock(2) is per
    try:                                         # open file, so this process counts too)
        assert main(["train", str(graph_file), "--reference", "--epochs", "2", "--quiet",
                     "--checkpoint", str(folder)]) == 2
        line = _one_line_error(capsys)
        assert line.startswith(f"shardtrain: error: --checkpoint {folder}: another shardtrain "
                               f"run is using this checkpoint folder"), line
    finally:
        held.release()
    assert main(["train", str(graph_file), "--reference", "--epochs", "2", "--quiet",
                 "--checkpoint", str(folder)]) == 0
    held = checkpoint.lock_folder(folder, "resume")   # the finished run let go of it
    try:
        assert main(["train", str(graph_file), "--reference", "--epochs", "3", "--quiet",
                     "--resume", str(folder)]) == 2
        assert f"--resume {folder}: another shardtrain run" in _one_line_error(capsys)
    finally:
        held.release()
    assert main(["train", str(graph_file), "--reference", "--epochs", "3", "--quiet",
                 "--resume", str(folder)]) == 0
    assert checkpoint.read_checkpoint(folder).epoch == 3
    assert sorted(p.name for p in folder.iterdir()) == ["checkpoint.json", "state-000003.npz"]
    # resuming into another folder: that one is locked for the run as well
    other = tmp_path / "ck2"
    held = checkpoint.lock_folder(other)
    try:
        assert main(["train", str(graph_file), "--reference", "--epochs", "4", "--quiet",
                     "--resume", str(folder), "--checkpoint", str(other)]) == 2
        assert f"--checkpoint {other}: another shardtrain run" in _one_line_error(capsys)
    finally:
        held.release()
    assert not other.exists()        # the refused run created nothing


# ---------------------------------------------------------------- 10: every accepted value works

@pytest.mark.parametrize("args, needle", [
    (["--seed", str(2**63)], "--seed '9223372036854775808': must be an integer from 0 to"),
    (["--seed", "-1"], "--seed '-1': must be an integer from 0 to"),
    (["--timeout", "inf"], "--timeout inf: must be a number of seconds > 0 and at most"),
    (["--timeout", "nan"], "--timeout nan: must be"),
    (["--timeout", "1e7"], "--timeout 1e+07: must be"),
    (["--imbalance", "nan"], "--imbalance nan: must lie in [0, 1)"),
    (["--lr", "inf"], "--lr: must be a number > 0"),
    (["--dropout", "nan"], "--dropout: must be a number in [0, 1)"),
    (["--weight-decay", "inf"], "--weight-decay: must be a number >= 0"),
    (["--epochs", "1000000"], "--epochs 1000000: must be at most 999,999"),
    (["--checkpoint-every", str(10**30), "--checkpoint", "ck"], "--checkpoint-every 1000"),
    (["--max-frame-bytes", str(10**30)], "--max-frame-bytes 1000"),
    (["--slow-worker", "1:1e300"], "--slow-worker '1:1e300': FACTOR must be at most 1000"),
    (["--hidden", str(10**11)], "--hidden 100000000000 --layers 2: the weights and optimiser"),
])
def test_unusable_option_values_are_refused_at_the_option(capsys, graph_file, args, needle):
    assert main(["train", str(graph_file), "--workers", "2", "--method", "random",
                 *QUICK, *args]) == 2
    line = _one_line_error(capsys)
    assert needle in line, line


@pytest.mark.mpi
def test_the_largest_seed_works_in_every_mode(capsys, graph_file, tmp_path):
    top = str(2**63 - 1)          # the largest --seed accepted
    assert main(["train", str(graph_file), "--reference", "--seed", top, *QUICK]) == 0
    for method in ("metis", "fennel", "random"):
        assert main(["train", str(graph_file), "--workers", "2", "--method", method,
                     "--seed", top, *QUICK, "--timeout", "1000000"]) == 0, method
    assert main(["split", str(graph_file), "--workers", "2", "--method", "metis", "--seed",
                 top, "--out", str(tmp_path / "s")]) == 0
    proc, _ = launch_mpi(2, ["-m", "shardtrain", "train", str(tmp_path / "s"), "--transport",
                          "mpi", "--seed", top, *QUICK])
    assert proc.returncode == 0, proc.stderr
