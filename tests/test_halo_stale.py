"""Stale halos with an overlapped exchange (`--halo-stale`, `--halo-smooth`): the partitioned
run equals its own single-process formulation, its payload is the predicted one, and the
exchange it starts really runs behind the compute.

Sources of truth:
- `shardtrain.train.single_process` (`train --single-process`), a global formulation of
  stale halos over the whole graph (the definition in `plan/schemes.py`, Wan et al.,
  "PipeGCN", ICLR 2022, from memory); with the scheme off it is the single-process
  reference (`train.reference`, checked in its own tests against finite differences). In
  float64 the partitioned run differs from it only by the order of sums: every epoch's loss
  and the final weights agree to a relative 1e-9 (docs/design.md §1.7), dropout on.
- The synchronous run (`train.reference`): epoch 1, the warm-up, is exchanged exactly, so
  its loss is the reference's; later epochs use stale rows and differ from it.
- The transport's byte counters and overlap counters (`transport/meter.py`): the payload
  predicted by the survey's replay equals the measured one; the time a started exchange was
  in flight while the worker computed is counted as hidden.
"""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from helpers import assert_same_run, depot_graph, plan_assignment, run_partitioned, save_graph

from shardtrain.plan import schemes
from shardtrain.plan.schemes import HaloScheme
from shardtrain.train.reference import train_reference
from shardtrain.train.settings import TrainSettings
from shardtrain.train.single_process import train_single_process

RTOL = 1e-9
BASE = dict(layers=3, hidden=16, dropout=0.5, lr=0.01, weight_decay=5e-4, epochs=4, seed=7,
            dtype="float64", bias=True)


def settings(stale=True, keep=1.0, fmt=None, smooth=0.0, **kw) -> TrainSettings:
    return TrainSettings(**{**BASE, **kw}, halo_keep=keep, halo_format=fmt, halo_stale=stale,
                         halo_smooth=smooth)


@pytest.fixture(scope="module")
def graph():
    return depot_graph()


assignment = plan_assignment


def loss_gap(a, b, first: int = 0) -> float:
    return max(abs(x["loss"] - y["loss"]) / abs(y["loss"])
               for x, y in list(zip(a.epochs, b.epochs))[first:])


def check_payload(run) -> None:
    t = run.traffic
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"]
    assert t["breakdown_matches"] and t["sender_receiver_consistent"]


# ---------------------------------------------------------------- equality

@pytest.mark.parametrize("k, method", [(1, "random"), (2, "metis"), (3, "random"),
                                       (7, "fennel")])
def test_stale_run_equals_its_single_process_formulation(tmp_path, graph, k, method):
    s = settings()
    a = assignment(graph, k, method)
    run, _ = run_partitioned(tmp_path, graph, a, k, s)
    single = train_single_process(graph, s, a)
    assert_same_run(run, single)
    check_payload(run)
    sync = train_reference(graph, settings(stale=False))
    # the warm-up epoch is the synchronous run's; the later ones are not (k > 1)
    assert run.epochs[0]["loss"] == pytest.approx(sync.epochs[0]["loss"], rel=1e-12)
    if k > 1:
        assert loss_gap(single, sync, first=1) > 1e-6


@pytest.mark.parametrize("keep, fmt, smooth, k", [
    (0.3, None, 0.0, 3), (1.0, "int8", 0.0, 3), (0.3, "int8", 0.0, 2), (0.3, "bfloat16", 0.0, 7),
    (1.0, None, 0.9, 3), (1.0, "float16", 0.5, 2)])
def test_stale_with_the_other_schemes_equals_its_single_process_formulation(
        tmp_path, graph, keep, fmt, smooth, k):
    s = settings(keep=keep, fmt=fmt, smooth=smooth)
    a = assignment(graph, k, "metis" if k == 2 else "random")
    run, _ = run_partitioned(tmp_path, graph, a, k, s)
    single = train_single_process(graph, s, a)
    assert_same_run(run, single)
    check_payload(run)
    # stale changes the maths of the scheme it is combined with
    assert loss_gap(single, train_single_process(graph, settings(
        stale=False, keep=keep, fmt=fmt), a), first=1) > 1e-6


def test_an_early_stop_waits_for_the_exchanges_it_started(tmp_path, graph):
    # the run stops after the epoch it decided on; that epoch's started exchanges are
    # waited for and counted, so the payload still equals the prediction
    s = settings(keep=0.5, early_stop=1, epochs=30, lr=0.2)
    a = assignment(graph, 3, "random")
    run, _ = run_partitioned(tmp_path, graph, a, 3, s)
    single = train_single_process(graph, s, a)
    assert len(run.epochs) < 30
    assert_same_run(run, single)
    check_payload(run)


def test_a_formulation_with_the_wrong_keep_epoch_is_told_apart(tmp_path, graph, monkeypatch):
    # the check can fail: a single-process formulation propagating with epoch t's keep set
    # (instead of the stale rows' epoch t-1) differs from the workers'
    import shardtrain.train.single_process as sp_mod

    s = settings(keep=0.3)
    a = assignment(graph, 3, "random")
    run, _ = run_partitioned(tmp_path, graph, a, 3, s)
    monkeypatch.setattr(sp_mod, "keep_epoch_used", lambda epoch, stale, first=1: epoch)
    wrong = train_single_process(graph, s, a)
    assert loss_gap(wrong, run) > 1e-6


def test_smoothing_changes_the_run_and_zero_is_plain_stale(graph):
    a = assignment(graph, 3, "random")
    plain = train_single_process(graph, settings(), a)
    assert loss_gap(train_single_process(graph, settings(smooth=0.9), a), plain, first=2) > 1e-6
    assert loss_gap(train_single_process(graph, settings(smooth=0.0), a), plain) == 0


def test_single_process_mode_through_the_api_equals_the_pipes_run(graph):
    from shardtrain.train.api import RunConfig, run

    s = settings(keep=0.3, fmt="int8")
    common = dict(source="depots", graph=graph, settings=s, workers=3, method="metis")
    single = run(RunConfig(mode="single-process", **common), signals=False)
    pipes = run(RunConfig(**common), signals=False)
    assert single is not None and pipes is not None
    assert single.document["settings"]["halo_stale"] is True
    assert_same_run(pipes.result, single.result)


# ---------------------------------------------------------------- payload

def test_backward_keep_epochs_lag_one_epoch_after_the_warm_up():
    assert schemes.backward_keep_epochs(range(1, 5), True) == [1, 1, 2, 3]
    assert schemes.backward_keep_epochs(range(1, 5), False) == [1, 2, 3, 4]
    kept = np.arange(4 * 2 * 2).reshape(4, 2, 2)
    stale = HaloScheme(0.5, None, True)
    np.testing.assert_array_equal(schemes.backward_kept(kept, stale), kept[[0, 0, 1, 2]])


@pytest.mark.parametrize("keep, fmt", [(1.0, None), (0.3, None), (0.3, "int8")])
def test_survey_predicts_the_stale_runs_payload_byte_for_byte(graph, keep, fmt):
    # the trained run's byte counters against a survey that starts no process
    from shardtrain.plan.survey import SurveySettings, predict_run_payload, survey
    from shardtrain.train.api import RunConfig, run

    s = settings(keep=keep, fmt=fmt)
    shape = dict(layers=3, hidden=16, dtype="float64", bias=True, seed=7, epochs=4)
    plan = survey(graph, ["metis"], [3], SurveySettings(
        **shape, halo_keep=keep, halo_format=fmt, halo_stale=True))["plans"][0]
    trained = run(RunConfig(source="depots", graph=graph, settings=s, workers=3,
                            method="metis"), signals=False)
    assert trained is not None
    t = trained.result.traffic
    assert predict_run_payload(plan["traffic"], 4, 4) == t["measured_payload_bytes"]
    sync = survey(graph, ["metis"], [3], SurveySettings(
        **shape, halo_keep=keep, halo_format=fmt))["plans"][0]["traffic"]
    stale = plan["traffic"]["halo_scheme"]
    if keep == 1.0:
        # without sampling every epoch exchanges what the synchronous run does
        assert predict_run_payload(sync, 4, 4) == t["measured_payload_bytes"]
    else:
        # forward as the synchronous run; backward: epochs 1, 1, 2, 3's keep sets
        assert stale["forward_bytes_per_epoch"] == sync["halo_scheme"]["forward_bytes_per_epoch"]
        b = sync["halo_scheme"]["backward_bytes_per_epoch"]
        assert stale["backward_bytes_per_epoch"] == [b[0], b[0], b[1], b[2]]
        assert b[3] != b[0]


# ---------------------------------------------------------------- the overlap overlaps

def test_the_started_exchange_is_hidden_behind_compute_on_a_slow_link(tmp_path, graph):
    # counters, not timings: over an emulated slow link (0.02 Gbit/s, 200 us) with every
    # worker's compute stretched 10x, each stale exchange is in flight while the worker
    # computes, so nearly all of its time in flight is hidden (meter.Profile "overlap");
    # the synchronous run starts no exchange and hides nothing
    from shardtrain.transport.link import LinkModel

    a = assignment(graph, 2, "metis")
    link, slow = LinkModel(0.02, 200.0), {0: 10.0, 1: 10.0}
    (tmp_path / "sync").mkdir()
    (tmp_path / "stale").mkdir()
    sync, _ = run_partitioned(tmp_path / "sync", graph, a, 2, settings(stale=False),
                              link=link, slow=slow)
    stale, _ = run_partitioned(tmp_path / "stale", graph, a, 2, settings(), link=link,
                               slow=slow)
    for w in sync.workers:
        assert w["exchange_in_flight_s"] == 0 and w["hidden_exchange_s"] == 0
    for w in stale.workers:
        assert w["exchange_in_flight_s"] > 0
        assert w["hidden_exchange_s"] >= 0.8 * w["exchange_in_flight_s"], w
    check_payload(stale)
    assert_same_run(stale, train_single_process(graph, settings(), a))


def test_the_cli_run_never_modifies_an_array_in_flight(tmp_path, graph):
    # SHARDTRAIN_CHECK_OUTGOING=1 (transport/wire.py) checksums every started exchange's
    # outgoing arrays and fails the run if one changed before wait() returned
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    out = tmp_path / "run.json"
    proc = subprocess.run([sys.executable, "-m", "shardtrain", "train", str(path), "--workers",
                           "3", "--method", "metis", "--epochs", "3", "--halo-stale",
                           "--halo-keep", "0.5", "--halo-format", "int8", "--quiet",
                           "--json", str(out)], capture_output=True, text=True, timeout=120,
                          env={**__import__("os").environ, "SHARDTRAIN_CHECK_OUTGOING": "1"})
    assert proc.returncode == 0, proc.stderr[-2000:]
    doc = json.loads(out.read_text())
    assert doc["settings"]["halo_stale"] is True
    t = doc["traffic"]
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"]
    assert all(w["hidden_exchange_s"] > 0 for w in doc["workers"])


# ---------------------------------------------------------------- forecast

def test_forecast_prices_a_stale_epoch_as_the_larger_of_compute_and_exchange():
    from shardtrain.forecast.projection import stale_overlap, with_halo_overlap

    result = {"epoch_s": 5.0, "allreduce_s": 0.5, "eval_s": 1.0, "per_worker": [
        {"compute_s": 2.0, "exchange_s": 1.5}, {"compute_s": 1.0, "exchange_s": 3.0}]}
    got = stale_overlap(result)
    # worker 1's exchanges outlast its compute: max(2, 1.5, 1, 3) + the all-reduce
    assert got["epoch_s"] == 3.5 and got["bound"] == "exchange"
    assert got["exposed_exchange_s"] == 2.0 and got["hidden_exchange_s"] == 1.5
    assert with_halo_overlap(dict(result), {"halo_scheme": {"halo_stale": False}}) == result
    priced = with_halo_overlap(dict(result), {"halo_scheme": {"halo_stale": True}})
    assert priced["epoch_s"] == 3.5 and priced["epoch_with_eval_s"] == 4.5


def test_forecast_of_a_stale_survey_is_never_slower_than_the_synchronous_one(graph):
    from shardtrain.forecast.calibrate import from_flops
    from shardtrain.forecast.projection import forecast
    from shardtrain.plan.survey import SurveySettings, survey

    cal = from_flops(1e9, "float32")
    docs = {stale: survey(graph, ["metis"], [2], SurveySettings(layers=3, seed=7,
                                                                 halo_stale=stale))
            for stale in (False, True)}
    fc = {stale: forecast(d, link_gbps_list=[0.01, 100], latency_us=200, calibration=cal)
          for stale, d in docs.items()}
    for sync, stale in zip(fc[False]["plans"], fc[True]["plans"]):
        assert stale["stale"]["synchronous_epoch_s"] == pytest.approx(sync["epoch_s"])
        assert stale["epoch_s"] < sync["epoch_s"]
        # the sum of compute and exchange was what the synchronous epoch paid
        parts = stale["per_worker"]
        assert stale["epoch_s"] == pytest.approx(
            max(max(w["compute_s"], w["exchange_s"]) for w in parts) + stale["allreduce_s"])


# ---------------------------------------------------------------- refused at the door

@pytest.mark.parametrize("command, args, needle", [
    ("train", ["--halo-stale", "--halo-smooth", "1"], "--halo-smooth"),
    ("train", ["--halo-stale", "--halo-smooth", "-0.1"], "--halo-smooth"),
    ("train", ["--halo-smooth", "0.5"], "--halo-smooth"),
    ("train", ["--halo-stale", "--halo-keep", "0.5", "--halo-smooth", "0.5"], "--halo-smooth"),
    ("train", ["--halo-stale", "--checkpoint", "CKPT"], "--checkpoint"),
    ("survey", ["--halo-smooth", "0.5"], "--halo-smooth"),
    ("sweep", ["--halo-stale", "off,maybe"], "--halo-stale")])
def test_bad_stale_values_are_refused_with_one_line(tmp_path, graph, command, args, needle):
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    args = [str(tmp_path / "ckpt") if a == "CKPT" else a for a in args]
    proc = subprocess.run([sys.executable, "-m", "shardtrain", command, str(path), "--workers",
                           "2", "--method", "random", "--epochs", "1", *args],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0], proc.stderr
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "ckpt").exists()


def test_the_library_names_the_parameter():
    from shardtrain.errors import ParameterError
    for bad, param in (({"halo_smooth": 1.0, "halo_stale": True}, "halo_smooth"),
                       ({"halo_smooth": 0.5}, "halo_smooth"),
                       ({"halo_stale": "yes"}, "halo_stale")):
        with pytest.raises(ParameterError) as err:
            TrainSettings(**bad).validate()
        assert err.value.param == param


# ---------------------------------------------------------------- accuracy, external anchor

@pytest.mark.slow
def test_stale_halos_still_beat_the_edgeless_model_on_digits():
    # scikit-learn's digits as a 10-NN graph (helpers.digits_graphs, as in
    # tests/test_model_accuracy.py): the GCN under stale halos, alone and with sampling and
    # int8 rows, still beats the same network without edges by >= 5 points
    from helpers import digits_graphs

    from shardtrain.plan.partition import partition

    gcn_graph, mlp_graph = digits_graphs()
    mlp = train_reference(mlp_graph, TrainSettings(seed=0)).epochs[-1]["test_acc"]
    a = np.asarray(partition(gcn_graph, "metis", 4, seed=0, imbalance=0.03))
    for keep, fmt, smooth in [(1.0, None, 0.0), (1.0, None, 0.9), (0.1, "int8", 0.0)]:
        s = TrainSettings(seed=0, halo_keep=keep, halo_format=fmt, halo_stale=True,
                          halo_smooth=smooth)               # GCN paper settings otherwise
        acc = train_single_process(gcn_graph, s, a).epochs[-1]["test_acc"]
        print(f"digits, stale, keep {keep}, format {fmt}, smooth {smooth}: GCN {acc:.3f}, "
              f"edgeless {mlp:.3f}")
        # margin of 0.05 as in tests/test_model_accuracy.py (common practice)
        assert acc >= mlp + 0.05, (keep, fmt, smooth)


# ---------------------------------------------------------------- the sweep

def test_sweep_compares_stale_off_and_on(tmp_path, graph):
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    out = tmp_path / "sweep.json"
    proc = subprocess.run([sys.executable, "-m", "shardtrain", "sweep", str(path), "--workers",
                           "2", "--method", "metis", "--halo-stale", "off,on", "--halo-keep",
                           "1,0.5", "--epochs", "3", "--seed", "7", "--layers", "3",
                           "--json", str(out), "--quiet"],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    doc = json.loads(out.read_text())
    got = [(r["scheme"]["halo_keep"], r["scheme"]["halo_stale"]) for r in doc["rows"]]
    assert got == [(1.0, False), (1.0, True), (0.5, False), (0.5, True)]
    assert all(r["payload_equals_prediction"] for r in doc["rows"])
    # without sampling stale halos send exactly the synchronous payload
    assert doc["rows"][1]["halo_payload_ratio"] == 1.0
    assert "stale" in proc.stdout


# ---------------------------------------------------------------- over MPI

@pytest.mark.mpi
def test_mpi_stale_run_equals_the_single_process_formulation(tmp_path, graph):
    from helpers import launch_mpi, mpiexec

    from shardtrain.plan.shards import build_shards, save_shards

    mpiexec()
    k, s = 3, settings(keep=0.3, fmt="int8")
    a = assignment(graph, k, "random")
    shard_dir = tmp_path / "shards"
    save_shards(shard_dir, build_shards(graph, a, k),
                meta={"method": "random", "seed": 0, "num_classes": graph.num_classes,
                      "input_dim": graph.input_dim})
    out = tmp_path / "run.json"
    args = ["--layers", "3", "--hidden", "16", "--dropout", "0.5", "--epochs", "4", "--seed",
            "7", "--dtype", "float64", "--bias", "--halo-keep", "0.3", "--halo-format", "int8",
            "--halo-stale"]
    proc, _ = launch_mpi(k, ["-m", "shardtrain", "train", str(shard_dir), "--transport", "mpi",
                             *args, "--quiet", "--json", str(out)])
    assert proc.returncode == 0, proc.stderr[-3000:]
    doc = json.loads(out.read_text())
    single = train_single_process(graph, s, a)
    got = [e["loss"] for e in doc["epochs"]]
    assert np.allclose(got, [e["loss"] for e in single.epochs], rtol=RTOL, atol=0)
    t = doc["traffic"]
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"] > 0
    assert t["breakdown_matches"] and t["sender_receiver_consistent"]
    assert sum(w["exchange_in_flight_s"] for w in doc["workers"]) > 0
