"""GraphSAGE, GIN and GAT trained partitioned equal their single-process runs.

Source of truth: the single-process reference trainer (`shardtrain.train.reference`) with
the same model, whose maths is checked against central finite differences in
`tests/test_model_family_gradients.py`. In float64 the partitioned run differs from it
only by the order of floating-point sums, so every epoch's loss and the final weights
must agree to a relative 1e-9 (docs/design.md §1.7), with dropout on (GAT: on the
attention too), for every partition method and 1/2/3/7 workers; the measured payload
must equal the survey's prediction (`plan.survey`, from the shards and
`schedule.model_hops` alone).
"""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from helpers import assert_same_run, depot_graph, run_partitioned, save_graph

from shardtrain.plan.schedule import model_hops
from shardtrain.train import model
from shardtrain.train.reference import train_reference
from shardtrain.train.settings import TrainSettings

RTOL = 1e-9
MODELS = ("sage", "gin", "gat")
# two shapes: (a) 24 -> 8 -> 4, every SAGE layer transform-first, GIN layer 0
# transform-first and layer 1 aggregate-first; (b) 24 -> 32 -> 32 -> 4, SAGE layer 0
# aggregate-first (no backward exchange) and GIN aggregate-first throughout
SHAPES = ({"layers": 2, "hidden": 8}, {"layers": 3, "hidden": 32})


def settings_of(kind: str, shape: int) -> TrainSettings:
    return TrainSettings(**SHAPES[shape], dropout=0.5, lr=0.01, weight_decay=5e-4, epochs=3,
                         seed=7, dtype="float64", bias=True, model=kind, heads=3)


@pytest.fixture(scope="module")
def graph():
    return depot_graph()


_REFS: dict = {}


def reference(graph, kind, shape):
    if (kind, shape) not in _REFS:
        _REFS[kind, shape] = train_reference(graph, settings_of(kind, shape))
    return _REFS[kind, shape]


_assert_same_run = assert_same_run


def _method_cases():
    from shardtrain.plan.partition import METHODS
    methods = sorted(set(METHODS) | {"random", "range"})
    cases = [(kind, "random", 1, 0) for kind in MODELS]
    for kind in MODELS:
        for i, method in enumerate(methods):
            cases.append((kind, method, (2, 3, 7)[i % 3], i % 2))
    return cases


def _assignment(graph, method, k):
    n = graph.num_vertices
    if method == "range":
        return np.arange(n) * k // n
    if method == "random":
        return np.random.default_rng(k).integers(0, k, n)
    from shardtrain.plan.partition import partition
    return np.asarray(partition(graph, method, k, seed=0, imbalance=0.03))


@pytest.mark.parametrize("kind,method,k,shape", _method_cases())
def test_partitioned_equals_reference(tmp_path, graph, kind, method, k, shape):
    settings = settings_of(kind, shape)
    run, _ = run_partitioned(tmp_path, graph, _assignment(graph, method, k), k, settings)
    _assert_same_run(run, reference(graph, kind, shape))
    t = run.traffic
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"]
    assert t["breakdown_matches"] and t["sender_receiver_consistent"]


@pytest.mark.parametrize("kind", MODELS)
def test_payload_per_layer_follows_each_models_schedule(tmp_path, graph, kind):
    # the widths of schedule.model_hops, counted on the wire: 2 workers, one epoch
    settings = TrainSettings(**{**settings_of(kind, 0).to_dict(), "epochs": 1})
    run, shards = run_partitioned(tmp_path, graph, np.arange(graph.num_vertices) % 2, 2,
                                  settings)
    t = run.traffic
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"]
    rows = sum(len(s.send_to(q)) for s in shards for q in s.peers())
    by = {(r["layer"], r["direction"]): r["payload_bytes"] for r in t["by_layer_direction"]
          if r["kind"] == "halo"}
    hops = model_hops([(24, 8), (8 * (3 if kind == "gat" else 1), 4)], kind, hidden=8,
                      heads=3)
    want = {"sage": [(8, 8), (4, 4)], "gin": [(8, 8), (8, 8)], "gat": [(24, 24), (4, 4)]}
    assert [(h.forward_width, h.backward_width) for h in hops] == want[kind]
    for h in hops:
        assert by[(h.layer, "forward")] == rows * h.forward_width * 8
        assert by[(h.layer, "eval")] == rows * h.forward_width * 8
        assert by.get((h.layer, "backward"), 0) == rows * h.backward_width * 8


@pytest.mark.slow
@pytest.mark.parametrize("kind", MODELS)
def test_cli_initial_weights_round_trip(tmp_path, graph, kind):
    """--epochs 0 --weights writes the initial weights under the issue's names; a
    partitioned run started from them with --init-weights equals the Glorot run."""
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    common = [sys.executable, "-m", "shardtrain", "train", str(path), "--model", kind,
              "--heads", "3", "--hidden", "8", "--bias", "--dtype", "float64", "--quiet",
              "--seed", "7"]
    init = tmp_path / "init.npz"
    done = subprocess.run([*common, "--reference", "--epochs", "0", "--weights", str(init)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    with np.load(init, allow_pickle=False) as w:
        names = sorted(w.files)
        arrays = {k: w[k] for k in w.files}
    expect = {"sage": ["w_self{l}", "w_neigh{l}", "b{l}"],
              "gin": ["w_a{l}", "w_b{l}", "b_a{l}", "b_b{l}"],
              "gat": ["w{l}", "att_src{l}", "att_dst{l}", "b{l}"]}[kind]
    assert names == sorted(n.format(l=l) for l in (0, 1) for n in expect)
    if kind == "gat":
        assert arrays["w0"].shape == (24, 3 * 8) and arrays["att_src0"].shape == (3, 8)
        assert arrays["w1"].shape == (24, 4) and arrays["att_dst1"].shape == (1, 4)
    runs = {}
    for name, extra in (("glorot", []), ("given", ["--init-weights", str(init)])):
        out = tmp_path / f"{name}.json"
        done = subprocess.run([*common, "--workers", "2", "--method", "random",
                               "--epochs", "2", "--json", str(out), *extra],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
        runs[name] = json.loads(out.read_text())
    assert runs["glorot"]["settings"]["model"] == kind
    assert [e["loss"] for e in runs["glorot"]["epochs"]] == \
        [e["loss"] for e in runs["given"]["epochs"]]


def test_init_weights_of_another_model_are_refused(tmp_path, graph):
    # weights named for GIN given to a GraphSAGE run: a one-line error naming the file
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    init = tmp_path / "gin.npz"
    base = [sys.executable, "-m", "shardtrain", "train", str(path), "--reference", "--quiet"]
    assert subprocess.run([*base, "--model", "gin", "--epochs", "0", "--weights", str(init)],
                          capture_output=True, timeout=120).returncode == 0
    done = subprocess.run([*base, "--model", "sage", "--epochs", "1", "--init-weights",
                           str(init)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert done.stderr.count("\n") == 1 and str(init) in done.stderr
    assert "w_self0" in done.stderr


@pytest.mark.parametrize("args,option", [(["--model", "foo"], "--model"),
                                         (["--model", "gat", "--heads", "0"], "--heads"),
                                         (["--epochs", "0"], "--weights")])
def test_bad_model_options_are_one_line_exit_2(tmp_path, graph, args, option):
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    done = subprocess.run([sys.executable, "-m", "shardtrain", "train", str(path),
                           "--reference", "--quiet", *args], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 2
    assert done.stderr.count("\n") == 1 and option in done.stderr
    assert "Traceback" not in done.stderr


@pytest.mark.mpi
@pytest.mark.parametrize("kind", MODELS)
def test_mpi_run_equals_reference(tmp_path, graph, kind):
    # reference: the single-process trainer of the same model; 3 ranks over MPI
    from helpers import launch_mpi, mpiexec

    from shardtrain.plan.partition import partition
    from shardtrain.plan.shards import build_shards, save_shards

    mpiexec()
    k = 3
    shard_dir = tmp_path / "shards"
    save_shards(shard_dir, build_shards(graph, partition(graph, "random", k, seed=0), k),
                meta={"method": "random", "seed": 0, "num_classes": graph.num_classes,
                      "input_dim": graph.input_dim})
    out, weights = tmp_path / "run.json", tmp_path / "w.npz"
    proc, _ = launch_mpi(k, ["-m", "shardtrain", "train", str(shard_dir), "--transport", "mpi",
                             "--model", kind, "--heads", "3", "--layers", "2", "--hidden", "8",
                             "--dropout", "0.5", "--epochs", "3", "--seed", "7", "--dtype",
                             "float64", "--bias", "--quiet", "--json", str(out),
                             "--weights", str(weights)])
    assert proc.returncode == 0, proc.stderr[-3000:]
    doc = json.loads(out.read_text())
    ref = reference(graph, kind, 0)
    assert doc["settings"]["model"] == kind
    assert np.allclose([e["loss"] for e in doc["epochs"]], [e["loss"] for e in ref.epochs],
                       rtol=RTOL, atol=0)
    with np.load(weights, allow_pickle=False) as w:
        got = {name: w[name] for name in w.files}
    want = model.params_to_arrays(ref.params)
    assert sorted(got) == sorted(want)
    for name in want:
        assert np.allclose(got[name], want[name], rtol=RTOL, atol=0), name
    t = doc["traffic"]
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"] > 0


@pytest.mark.parametrize("kind", MODELS)
def test_survey_plan_equals_the_trainers_measured_payload(tmp_path, graph, kind):
    # The trained run's byte counters are the outside measurement: the survey's plan of
    # the same model (id-order shards, no process started) predicts them exactly.
    from shardtrain.plan import survey as sv

    a = np.random.default_rng(8).integers(0, 3, graph.num_vertices)
    settings = TrainSettings(**{**settings_of(kind, 0).to_dict(), "epochs": 2,
                                "dtype": "float32", "bias": False})
    run, _ = run_partitioned(tmp_path, graph, a, 3, settings)
    shape = sv.SurveySettings(layers=settings.layers, hidden=settings.hidden, model=kind,
                              heads=settings.heads)
    dims, hops = sv.model_shape(graph, shape)
    assert hops == settings.hops(settings.model_dims(graph.input_dim, graph.num_classes))
    params = sv.parameter_elements(hops)
    assert params == model.flatten(model.glorot_init(dims, 0, np.float32, hops=hops)).size
    plan = sv.survey_plan(graph, "given", 3, hops=hops, itemsize=4, seed=0, imbalance=0.03,
                          assignment=a)
    predicted = sv.predict_run_payload(plan["traffic"], settings.epochs, settings.epochs)
    assert run.traffic["measured_payload_bytes"] == predicted > 0


def test_survey_json_names_the_model(tmp_path, graph):
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    out = tmp_path / "s.json"
    done = subprocess.run([sys.executable, "-m", "shardtrain", "survey", str(path), "--model",
                           "gat", "--heads", "3", "--workers", "2", "--method", "random",
                           "--json", str(out)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    doc = json.loads(out.read_text())
    assert doc["model"]["name"] == "gat" and doc["model"]["heads"] == 3
    assert [h["forward_width"] for h in doc["model"]["hops"]] == [3 * 16, 4]
    assert "GAT x3 heads" in done.stdout
    bad = subprocess.run([sys.executable, "-m", "shardtrain", "survey", str(path), "--model",
                          "gat", "--heads", "0"], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1 and "--heads" in bad.stderr


@pytest.mark.slow
@pytest.mark.parametrize("kind", MODELS)
def test_resume_continues_bit_for_bit(tmp_path, graph, kind):
    # a run stopped at epoch 3 and resumed to 6 equals the run of 6 epochs, bit for bit,
    # with early stopping's state carried (its best weights copied in the model's layout)
    path = tmp_path / "g.npz"
    save_graph(path, graph)
    common = [sys.executable, "-m", "shardtrain", "train", str(path), "--workers", "2",
              "--method", "metis", "--model", kind, "--heads", "2", "--dtype", "float64",
              "--early-stop", "3", "--quiet"]

    def train(*args):
        done = subprocess.run([*common, *args], capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr

    train("--epochs", "6", "--json", str(tmp_path / "full.json"))
    train("--epochs", "3", "--checkpoint", str(tmp_path / "ck"), "--checkpoint-every", "1")
    train("--epochs", "6", "--resume", str(tmp_path / "ck"), "--json",
          str(tmp_path / "resumed.json"))
    full = json.loads((tmp_path / "full.json").read_text())["epochs"]
    resumed = json.loads((tmp_path / "resumed.json").read_text())["epochs"]
    assert [e["loss"] for e in resumed] == [e["loss"] for e in full][3:]
