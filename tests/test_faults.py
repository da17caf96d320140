"""Faults: a dead, failing, silent or lying worker ends the run at once with its name, its
exit status or signal and its last phase; nothing survives; checkpoints stay readable and a
resumed run ends with the uninterrupted run's weights bit for bit (float64).

Sources of truth: the uninterrupted run itself (same code, same shards), and the exact
arithmetic of IEEE float64: the resumed run repeats the very same operations in the same
order, so its weights must be identical, not merely close (common practice for
deterministic checkpointing). The 5 s detection bound is issue 4's; it is a generous
bound measured here, the figures themselves come from the benchmark-free report.
Faults are injected with the test-only `shardtrain.testing.faults` hook.
"""
from __future__ import annotations

import json
import multiprocessing
import os
import signal
import subprocess
import sys
import time
import uuid

import numpy as np
import pytest
from helpers import depot_graph, processes_with_token, save_graph

from shardtrain.errors import RunError
from shardtrain.plan.shards import build_shards, save_shards
from shardtrain.testing import faults
from shardtrain.train import checkpoint as ck
from shardtrain.train import model
from shardtrain.train.coordinator import train_partitioned
from shardtrain.train.settings import TrainSettings

K = 3
SETTINGS = TrainSettings(layers=2, hidden=8, dropout=0.5, lr=0.01, weight_decay=5e-4,
                         epochs=5, seed=5, dtype="float64", bias=True)
DETECT_S = 5.0               # issue 4: a death is noticed within 5 s


# ---------------------------------------------------------------- processes, from /proc

def _proc_table() -> dict[int, tuple[int, str]]:
    """pid -> (parent pid, state) of every live process (psutil-free)."""
    table = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat") as fh:
                rest = fh.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        table[int(name)] = (int(rest[1]), rest[0])
    return table


def worker_processes() -> list[int]:
    """Live (non-zombie) grandchildren of this process: the workers, which the forkserver
    (a child of ours) forks. The forkserver and resource tracker themselves are helpers."""
    table = _proc_table()
    children = {pid for pid, (ppid, _) in table.items() if ppid == os.getpid()}
    return [pid for pid, (ppid, state) in table.items() if ppid in children and state != "Z"]


def assert_no_worker_survives():
    deadline = time.monotonic() + 3.0
    while worker_processes() and time.monotonic() < deadline:
        time.sleep(0.05)
    assert worker_processes() == []
    assert multiprocessing.active_children() == []


# ---------------------------------------------------------------- runs

@pytest.fixture(scope="module")
def shard_dir(tmp_path_factory):
    g = depot_graph(n=200)
    path = tmp_path_factory.mktemp("faults") / "shards"
    save_shards(path, build_shards(g, np.arange(g.num_vertices) % K, K),
                meta={"method": "test", "seed": 0})
    return path


@pytest.fixture(scope="module")
def uninterrupted(shard_dir):
    return model.params_to_arrays(train_partitioned(shard_dir, SETTINGS, timeout_s=10).params)


def plan_for(shard_dir, folder, every=2) -> dict:
    identity = ck.run_identity(SETTINGS, workers=K, dims=[(24, 8), (8, 4)],
                               graph_fingerprint=None,
                               shards_fingerprint=ck.shard_dir_fingerprint(shard_dir))
    return {"folder": str(folder), "every": every, "identity": identity}


def run_fault(shard_dir, spec: str, tmp_path, **kw):
    """Run with the fault; returns (RunError message, seconds from the fault to the error)."""
    stamp = tmp_path / "stamp"
    with pytest.raises(RunError) as info:
        train_partitioned(shard_dir, SETTINGS, fault=faults.parse(spec, stamp=str(stamp)),
                          **{"timeout_s": 10, **kw})
    noticed = time.time()
    return str(info.value), noticed - float(stamp.read_text())


def assert_bit_equal(got: dict, want: dict):
    assert sorted(got) == sorted(want)
    for name in want:
        assert got[name].dtype == want[name].dtype == np.float64
        assert np.array_equal(got[name], want[name]), name     # bit for bit, not approx


# ---------------------------------------------------------------- a worker killed (SIGKILL)

@pytest.mark.parametrize("spec, phase", [
    ("1@epoch 4 forward exchange, layer 1=kill", "epoch 4 forward exchange, layer 1"),
    ("2@epoch 4 backward exchange=kill", "epoch 4 backward exchange, layer"),
    ("1@epoch 4 all-reduce=kill", "epoch 4 all-reduce"),
    ("0@epoch 4 checkpoint write, index not yet renamed=kill",
     "epoch 4 checkpoint write, index not yet renamed"),
], ids=["forward", "backward", "allreduce", "checkpoint-write"])
def test_killed_worker_is_named_and_resume_is_bit_exact(shard_dir, uninterrupted, tmp_path,
                                                        spec, phase):
    folder = tmp_path / "ck"
    message, seconds = run_fault(shard_dir, spec, tmp_path,
                                 checkpoint=plan_for(shard_dir, folder))
    who = spec.split("@")[0]
    assert message.startswith(f"worker {who} died (killed by signal SIGKILL) during {phase}")
    assert seconds < DETECT_S, seconds
    assert_no_worker_survives()
    # the checkpoint of epoch 2 survived (also the one interrupted mid-write at epoch 4)
    saved = ck.read_checkpoint(folder)
    assert saved.epoch == 2 and saved.doc["random_stream"]["next_epoch"] == 3
    resumed = train_partitioned(shard_dir, SETTINGS, timeout_s=10, resume=saved,
                                checkpoint=plan_for(shard_dir, folder))
    assert [e["epoch"] for e in resumed.epochs] == [3, 4, 5]
    assert resumed.traffic["measured_payload_bytes"] == \
        resumed.traffic["predicted_payload_bytes"]
    assert_bit_equal(model.params_to_arrays(resumed.params), uninterrupted)
    assert ck.read_checkpoint(folder).epoch == 5
    assert sorted(p.name for p in folder.iterdir()) == ["checkpoint.json", "state-000005.npz"]


# ---------------------------------------------------------------- other faults

@pytest.mark.parametrize("spec, pattern", [
    ("1@epoch 2 compute=raise",
     r"^worker 1 failed during epoch 2 compute: RuntimeError: injected fault"),
    ("2@epoch 2 backward exchange=exit",
     r"^worker 2 died \(exit status 7\) during epoch 2 backward exchange"),
    ("1@epoch 2 forward exchange, layer 0=hang",
     r"^worker [02] failed during epoch 2 forward exchange, layer 0: RunError: timed out "
     r"after 1 s waiting for worker 1 \(halo forward, layer 0, epoch 2\)"),
    ("1@epoch 2 forward exchange, layer 0=corrupt:truncated",
     r"^worker [02] failed during .*: FrameError: frame from worker 1: truncated after 2 of "
     r"4 length-prefix bytes"),
    ("1@epoch 2 forward exchange, layer 0=corrupt:oversized",
     r"^worker [02] failed during .*: FrameError: frame from worker 1: payload of \d+ bytes "
     r"exceeds the limit of 65536 bytes"),
    ("1@epoch 2 forward exchange, layer 0=corrupt:kind",
     r"^worker [02] failed during .*: FrameError: frame from worker 1: expected kind 'halo', "
     r"got 'bogus'"),
    ("1@epoch 2 forward exchange, layer 0=corrupt:source",
     r"^worker [02] failed during .*: FrameError: frame from worker 1: header names worker 2 "
     r"as its source"),
], ids=["exception", "exit", "timeout", "truncated", "oversized", "wrong-kind",
        "wrong-peer"])
def test_failures_are_one_clear_error(shard_dir, tmp_path, spec, pattern):
    import re

    deadline = 1.0 if spec.endswith("=hang") else 5.0   # only the hang waits for it
    message, seconds = run_fault(shard_dir, spec, tmp_path, timeout_s=deadline,
                                 max_frame_bytes=1 << 16)
    assert re.search(pattern, message), message
    assert "\n" not in message
    assert seconds < DETECT_S + 1.0, seconds          # + the 1 s receive deadline of a hang
    assert_no_worker_survives()


def test_slow_worker_makes_the_others_wait(shard_dir):
    # common practice: a straggler's delay shows as the others' wait at the exchanges
    run = train_partitioned(shard_dir, SETTINGS, timeout_s=10, slow={1: 20.0})
    rows = {w["worker"]: w for w in run.workers}
    assert rows[1]["compute_s"] > 3 * max(rows[0]["compute_s"], rows[2]["compute_s"])
    assert min(rows[0]["wait_s"], rows[2]["wait_s"]) > rows[1]["wait_s"]


def test_resume_refuses_a_contradicting_run(shard_dir, tmp_path):
    from shardtrain.errors import InputError

    folder = tmp_path / "ck"
    train_partitioned(shard_dir, SETTINGS, timeout_s=10, checkpoint=plan_for(shard_dir, folder,
                                                                             every=5))
    saved = ck.read_checkpoint(folder)
    identity = plan_for(shard_dir, folder)["identity"]
    with pytest.raises(InputError, match=r"^epochs 5: the checkpoint .* already at epoch 5"):
        ck.check_resumable(saved, identity, epochs=5)     # the parameter; the CLI: --epochs
    other = {**identity, "shards_fingerprint": "0" * 16}
    with pytest.raises(InputError, match=r"^GRAPH: a different shard layout from the checkpoint's"):
        ck.check_resumable(saved, other, epochs=9)
    # a tampered state file is refused by its checksum
    state = folder / saved.doc["state_file"]
    data = bytearray(state.read_bytes())
    data[len(data) // 2] ^= 0xFF
    state.write_bytes(bytes(data))
    with pytest.raises(InputError, match=r"state-000005\.npz: contents differ from the SHA-256"):
        ck.read_checkpoint(folder)


# ---------------------------------------------------------------- Ctrl-C / SIGTERM on the CLI

@pytest.fixture(scope="module")
def graph_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("g") / "depots.npz"
    save_graph(path, depot_graph(n=200))
    return path


CLI = ["--workers", "2", "--method", "random", "--epochs", "6", "--dtype", "float64",
       "--hidden", "8", "--quiet", "--timeout", "30"]


def _cli(*args, env=None, **kw):
    return subprocess.Popen([sys.executable, "-m", "shardtrain", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, **(env or {})}, **kw)


def _wait_for_checkpoint(folder, epoch: int, proc, limit_s: float = 60.0):
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        try:
            if json.loads((folder / ck.INDEX).read_text())["epoch"] >= epoch:
                return
        except (OSError, ValueError, KeyError):
            pass
        assert proc.poll() is None, proc.communicate()
        time.sleep(0.05)
    raise AssertionError("no checkpoint appeared")


@pytest.mark.slow
@pytest.mark.parametrize("how", ["SIGINT to the group", "SIGTERM"])
def test_interrupt_keeps_the_checkpoint_and_resume_is_bit_exact(graph_file, tmp_path, how):
    full = _cli("train", graph_file, *CLI, "--weights", tmp_path / "full.npz")
    folder = tmp_path / "ck"
    token = uuid.uuid4().hex
    # worker 0 pauses in epoch 3, after the checkpoint of epoch 2: the signal lands mid-run
    env = {faults.ENV: "0@epoch 3 compute=pause:30", "SHARDTRAIN_TEST_TOKEN": token}
    run = _cli("train", graph_file, *CLI, "--checkpoint", folder, "--checkpoint-every", "1",
               env=env, start_new_session=True)
    _wait_for_checkpoint(folder, 2, run)
    if how == "SIGTERM":
        run.send_signal(signal.SIGTERM)
    else:                        # a terminal's Ctrl-C reaches every process of the group
        os.killpg(run.pid, signal.SIGINT)
    _, err = run.communicate(timeout=30)
    assert run.returncode == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert f"--resume {folder}" in lines[0] and "epoch 2" in lines[0], lines[0]
    deadline = time.monotonic() + 5.0
    while processes_with_token(token) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert processes_with_token(token) == []
    assert ck.read_checkpoint(folder).epoch == 2

    resumed = _cli("train", graph_file, *CLI, "--resume", folder, "--weights",
                   tmp_path / "resumed.npz", "--json", tmp_path / "run.json")
    assert resumed.wait(120) == 0, resumed.communicate()
    assert full.wait(120) == 0, full.communicate()
    with np.load(tmp_path / "full.npz", allow_pickle=False) as a, \
            np.load(tmp_path / "resumed.npz", allow_pickle=False) as b:
        assert_bit_equal(dict(b), dict(a))
    doc = json.loads((tmp_path / "run.json").read_text())
    assert doc["resumed_from"]["epoch"] == 2 and [e["epoch"] for e in doc["epochs"]] == \
        [3, 4, 5, 6]


def test_corrupt_frame_through_the_cli_is_one_line_exit_3(graph_file, tmp_path):
    env = {faults.ENV: "1@epoch 2 forward exchange, layer 0=corrupt:oversized"}
    run = _cli("train", graph_file, *CLI, "--timeout", "2", "--max-frame-bytes", "100000",
               env=env)
    _, err = run.communicate(timeout=60)
    assert run.returncode == 3, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert "frame from worker 1: payload of" in lines[0]
    assert "exceeds the limit of 100000 bytes" in lines[0]
