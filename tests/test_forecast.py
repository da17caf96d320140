"""Forecast: link and ring arithmetic on hand-worked plans, monotonicity, plan marking, CLI."""
from __future__ import annotations

import importlib
import json
import sys
import types

import networkx as nx
import numpy as np
import pytest
from helpers import frame_header_bytes, hand_plan, model_doc

from shardtrain.errors import InputError
from shardtrain.forecast import projection as fc
from shardtrain.forecast.calibrate import from_flops, sparse_speed
from shardtrain.transport.link import LinkModel

# ---------------------------------------------------------------- helpers

def _hop(layer, d_in, d_out):
    from shardtrain.plan.schedule import layer_hops
    h = layer_hops([(d_in, d_out)])[0]
    return {"layer": layer, "d_in": d_in, "d_out": d_out, "transform_first": h.transform_first,
            "forward_width": h.forward_width, "backward_width": h.backward_width}


def _no_overhead(monkeypatch):
    monkeypatch.setattr(fc, "CALL_OVERHEAD_S", 0.0)


FAST = from_flops(1e9)


# ---------------------------------------------------------------- arithmetic

def test_link_time_is_bits_over_bandwidth_plus_latency():
    # Bandwidth definition (common practice): 1 Gbit/s moves 1e9 bits per second, so
    # 125 MB take 1 s; 10 frames of latency 20 us add 200 us.
    assert fc.link_seconds(125_000_000, 1.0) == pytest.approx(1.0)
    assert fc.link_seconds(125_000_000, 10.0) == pytest.approx(0.1)


def test_ring_allreduce_is_2_k_minus_1_steps_of_size_over_k():
    # Patarasuk & Yuan 2009: ring all-reduce of S bytes on k ranks is 2(k-1) steps, each
    # moving S/k bytes per rank. Worked: S = 8 MB, k = 4, 1 Gbit/s, 10 us:
    # 6 steps x (2 MB x 8 / 1e9 + 10 us) = 6 x 16.01 ms = 96.06 ms.
    assert fc.ring_allreduce_seconds(8e6, 4, 1.0, 10.0) == pytest.approx(6 * (0.016 + 1e-5))
    assert fc.ring_allreduce_seconds(8e6, 1, 1.0, 10.0) == 0.0


def test_hand_worked_two_worker_plan(monkeypatch):
    """One GCN layer 8 -> 2 (transform first), 2 workers, worker 0 sends 30 rows, worker 1
    sends 10; float32. Forward exchange: busiest sender is worker 0 with 30 x 2 x 4 = 240
    payload bytes + one header; backward: worker 1 returns the gradients of its 30 halo
    rows, also 240 bytes. Ring: 16 parameters, 2 steps of 8 elements (32 bytes) each."""
    _no_overhead(monkeypatch)
    model = model_doc([(8, 2)])
    plan = hand_plan([[0, 30], [10, 0]], owned=[100, 100], local_edges=[300, 300], params=16)
    gbps, lat = 0.01, 50.0
    out = fc.forecast_plan(plan, model, link_gbps=gbps, latency_us=lat, calibration=FAST,
                           dropout=0.0)
    hdr = frame_header_bytes("float32", (30, 2))
    one_hop = lat * 1e-6 + (240 + hdr) * 8 / (gbps * 1e9)
    assert out["exchange_s"] == pytest.approx(2 * one_hop, rel=1e-12)
    # the same number the link emulation gives for that sender's one frame
    due = LinkModel(gbps, lat).due_times(0.0, [240 + hdr])[-1]
    assert one_hop == pytest.approx(due, rel=1e-12)
    ring_hdr = frame_header_bytes("float32", (8,), kind="allreduce", layer=-1,
                                  direction="reduce-scatter")
    ring = 2 * (lat * 1e-6 + (32 + ring_hdr) * 8 / (gbps * 1e9))
    assert out["allreduce_s"] == pytest.approx(ring, rel=1e-12)
    # every worker's parts add up to the epoch
    for w in out["per_worker"]:
        total = w["compute_s"] + w["exchange_s"] + w["allreduce_s"] + w["wait_s"]
        assert total == pytest.approx(out["epoch_s"], rel=1e-12)
    # worker 0 is the busiest sender forward, worker 1 backward (it returns 30 rows)
    hops = {s["step"]: s["busiest_worker"] for s in out["steps"]}
    assert hops == {"forward 0": 0, "backward 0": 1, "all-reduce": 0}
    assert out["epoch_s"] == pytest.approx(out["compute_s"] + out["exchange_s"]
                                           + out["allreduce_s"], rel=1e-12)


def test_compute_counts_sparse_work(monkeypatch):
    """With dense, elementwise and mask kernels made free, compute is the sparse work:
    nnz x width forward plus nnz x width backward, nnz = local edges + self-loops."""
    _no_overhead(monkeypatch)
    cal = from_flops(1e9)
    cal["dense"][0]["flops_per_s"] = 1e30
    cal["elementwise"]["bytes_per_s"] = 1e30
    cal["dropout_masks"]["elements_per_s"] = 1e30
    model = model_doc([(8, 2)])
    plan = hand_plan([[0, 5], [5, 0]], owned=[100, 50], local_edges=[400, 100], params=16)
    out = fc.forecast_plan(plan, model, link_gbps=10, latency_us=0, calibration=cal)
    speed = sparse_speed(cal, 500, 2)
    c0, c1 = (w["compute_s"] for w in out["per_worker"])
    assert c0 == pytest.approx(2 * 500 * 2 / speed, rel=1e-9)
    assert c1 == pytest.approx(2 * 150 * 2 / speed, rel=1e-9)
    assert out["compute_s"] == pytest.approx(c0, rel=1e-9)   # the critical path


def test_speed_factor_and_core_sharing_scale_compute():
    model = model_doc([(16, 8), (8, 3)])
    plan = hand_plan([[0, 40], [35, 0]], owned=[500, 480], local_edges=[2500, 2400], params=152)
    base = fc.forecast_plan(plan, model, link_gbps=10, latency_us=5, calibration=FAST)
    fast = fc.forecast_plan(plan, model, link_gbps=10, latency_us=5, calibration=FAST,
                            speed_factor=2.0)
    shared = fc.forecast_plan(plan, model, link_gbps=10, latency_us=5, calibration=FAST,
                              cores=1)
    assert fast["compute_s"] == pytest.approx(base["compute_s"] / 2, rel=1e-12)
    assert shared["compute_s"] == pytest.approx(base["compute_s"] * 2, rel=1e-12)
    assert shared["compute_stretch"] == 2.0
    assert fast["exchange_s"] == pytest.approx(base["exchange_s"], rel=1e-12)


def test_send_rows_solved_from_pair_bytes():
    """Without send_rows, pair_bytes = S F + S^T B is solved back for S when F != B."""
    model = model_doc([(4, 8), (8, 2)])     # layer 0 aggregate first: no backward exchange
    f = sum(h["forward_width"] for h in model["hops"]) * 4
    b = sum(h["backward_width"] for h in model["hops"]) * 4
    s = np.array([[0, 7, 0], [3, 0, 9], [1, 4, 0]])
    plan = {"workers": 3, "method": "x", "traffic": {"pair_bytes": (s * f + s.T * b).tolist()}}
    assert np.array_equal(fc._send_rows(plan, model["hops"], 4), s)


# ---------------------------------------------------------------- on a real survey

def _survey_of_graph(graph, ks, settings=None):
    """Survey 'range' plans (contiguous blocks) of `graph` for each k."""
    if importlib.util.find_spec("shardtrain.plan.partition") is None:   # until it lands
        sys.modules.setdefault("shardtrain.plan.partition", types.SimpleNamespace(METHODS={}))
    from shardtrain.plan.survey import SurveySettings, survey
    settings = settings or SurveySettings(layers=2, hidden=16)
    plans, head = [], None
    n = graph.num_vertices
    for k in ks:
        a = (np.arange(n) * k // n).astype(np.int64)
        head = survey(graph, ["range"], [k], settings, assignment=a)
        plans += head["plans"]
    return dict(head, plans=plans)


@pytest.fixture(scope="module")
def grid_survey():
    # a 40 x 40 grid from networkx (a reference library), 4 classes, 12 features
    from shardtrain.data.graph import Graph, csr_from_edges
    g = nx.convert_node_labels_to_integers(nx.grid_2d_graph(40, 40))
    e = np.array(g.edges(), dtype=np.int64)
    n = g.number_of_nodes()
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], n)
    rng = np.random.default_rng(1)
    graph = Graph(indptr, indices, features=rng.standard_normal((n, 12)).astype(np.float32),
                  labels=rng.integers(0, 4, n))
    return _survey_of_graph(graph, [1, 2, 4, 8])


def test_forecast_is_monotonic_in_link_speed(grid_survey):
    links = [0.05, 0.5, 1, 5, 10, 25, 100]
    out = fc.forecast(grid_survey, link_gbps_list=links, latency_us=20, calibration=FAST)
    for k in (2, 4, 8):
        ts = [p["epoch_s"] for p in out["plans"] if p["workers"] == k]
        xs = [p["exchange_s"] for p in out["plans"] if p["workers"] == k]
        assert all(a > b for a, b in zip(ts, ts[1:])), ts
        assert all(a > b for a, b in zip(xs, xs[1:])), xs
    one = [p for p in out["plans"] if p["workers"] == 1]
    assert all(p["exchange_s"] == 0 and p["allreduce_s"] == 0 for p in one)


def test_fastest_and_fewest_meeting_target_are_marked(grid_survey):
    out = fc.forecast(grid_survey, link_gbps_list=[0.05, 100], latency_us=20,
                      calibration=FAST)
    times = sorted(p["epoch_s"] for p in out["plans"])
    target = times[len(times) // 2]
    out = fc.forecast(grid_survey, link_gbps_list=[0.05, 100], latency_us=20,
                      calibration=FAST, target_epoch_s=target)
    fastest = [p for p in out["plans"] if p["fastest"]]
    assert len(fastest) == 1 and fastest[0]["epoch_s"] == times[0]
    assert out["fastest"]["epoch_s"] == times[0]
    meeting = [p for p in out["plans"] if p["epoch_s"] <= target]
    fewest = min(p["workers"] for p in meeting)
    marked = [p for p in out["plans"] if p["fewest_meeting_target"]]
    assert len(marked) == 1 and marked[0]["workers"] == fewest
    assert marked[0]["link_gbps"] == min(p["link_gbps"] for p in meeting
                                         if p["workers"] == fewest)
    none = fc.forecast(grid_survey, link_gbps_list=[1], latency_us=20, calibration=FAST,
                       target_epoch_s=times[0] / 1e6)
    assert none["fewest_meeting_target"] is None


def test_bad_arguments_are_input_errors(grid_survey):
    for kw in ({"link_gbps_list": [0]}, {"link_gbps_list": []},
               {"latency_us": -1}, {"speed_factor": 0}, {"target_epoch_s": -2}):
        args = dict(link_gbps_list=[1], latency_us=1, calibration=FAST)
        args.update(kw)
        with pytest.raises(InputError):
            fc.forecast(grid_survey, **args)


# ---------------------------------------------------------------- command line

@pytest.fixture(scope="module")
def survey_json(grid_survey, tmp_path_factory):
    path = tmp_path_factory.mktemp("fc") / "survey.json"
    path.write_text(json.dumps(grid_survey))
    return path


def test_cli_forecast_of_survey_json(run_cli, survey_json, tmp_path):
    out = tmp_path / "forecast.json"
    r = run_cli("forecast", survey_json, "--link-gbps", "1,10", "--latency-us", "20",
                "--flops-per-worker", "2e9", "--target-epoch-s", "1", "--json", out,
                "--workers", "2,4")
    assert r.returncode == 0, r.stderr
    doc = json.loads(out.read_text())
    assert {(p["workers"], p["link_gbps"]) for p in doc["plans"]} == \
        {(2, 1.0), (2, 10.0), (4, 1.0), (4, 10.0)}
    for p in doc["plans"]:
        assert set(p) >= {"method", "workers", "link_gbps", "epoch_s", "compute_s",
                          "exchange_s", "allreduce_s", "wait_s"}
    assert "fastest" in r.stdout and "fewest workers meeting" in r.stdout


@pytest.mark.slow
def test_cli_forecast_calibrates_and_keeps_the_timing(run_cli, survey_json, tmp_path):
    cal = tmp_path / "cal.json"
    r = run_cli("forecast", survey_json, "--link-gbps", "10", "--calibration", cal)
    assert r.returncode == 0, r.stderr
    first = json.loads(cal.read_text())
    assert first["sparse"] and first["dense"] and first["threads"] == 1
    r = run_cli("forecast", survey_json, "--link-gbps", "10", "--calibration", cal)
    assert r.returncode == 0 and json.loads(cal.read_text()) == first


@pytest.mark.parametrize("opts, option", [
    (["--link-gbps", "0"], "--link-gbps"),
    (["--link-gbps", "1,fast"], "--link-gbps"),
    (["--latency-us", "-3"], "--latency-us"),
    (["--speed-factor", "0"], "--speed-factor"),
    (["--target-epoch-s", "-1"], "--target-epoch-s"),
    (["--workers", "3"], "--workers"),
    (["--cores", "0"], "--cores"),
])
def test_cli_bad_options_exit_2_with_one_line(run_cli, survey_json, tmp_path, opts, option):
    out = tmp_path / "f.json"
    r = run_cli("forecast", survey_json, "--flops-per-worker", "1e9", "--json", out, *opts)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and option in lines[0] and "Traceback" not in r.stderr
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_cli_rejects_a_json_that_is_not_a_survey(run_cli, tmp_path):
    bad = tmp_path / "x.json"
    bad.write_text('{"epochs": []}')
    r = run_cli("forecast", bad, "--flops-per-worker", "1e9")
    assert r.returncode == 2 and str(bad) in r.stderr and len(r.stderr.splitlines()) == 1


# ---------------------------------------------------------------- measured compute, call cost

def test_measured_compute_replaces_the_counted_compute():
    """Hand-worked (common practice): with measured step CPU seconds 0.2 and 0.1 each
    worker's own compute is exactly that (times the core stretch), split between the
    exchanges as counted; the transfer part is the counted forecast's, untouched."""
    model = model_doc([(16, 8), (8, 3)])
    plan = hand_plan([[0, 40], [35, 0]], owned=[500, 480], local_edges=[2500, 2400], params=152)
    measured = [{"step_cpu_s": 0.2, "eval_cpu_s": 0.05}, {"step_cpu_s": 0.1, "eval_cpu_s": 0.03}]
    counted = fc.forecast_plan(plan, model, link_gbps=1, latency_us=5, calibration=FAST)
    out = fc.forecast_plan(plan, model, link_gbps=1, latency_us=5, calibration=FAST,
                           measured_compute=measured)
    assert [w["compute_s"] for w in out["per_worker"]] == pytest.approx([0.2, 0.1], rel=1e-12)
    assert out["compute_source"] == "measured" and counted["compute_source"] == "counted"
    assert out["exchange_s"] == pytest.approx(counted["exchange_s"], rel=1e-12)
    assert out["allreduce_s"] == pytest.approx(counted["allreduce_s"], rel=1e-12)
    # the slower worker sets the pace: the faster one waits the 0.1 s difference in total
    w0, w1 = out["per_worker"]
    assert w1["wait_s"] - w0["wait_s"] == pytest.approx(0.1, rel=1e-9)
    for w in out["per_worker"]:
        total = w["compute_s"] + w["exchange_s"] + w["allreduce_s"] + w["wait_s"]
        assert total == pytest.approx(out["epoch_s"], rel=1e-12)
    # the evaluation forward: its compute is the measured one, its critical path no less
    assert out["eval_s"] >= 0.05
    shared = fc.forecast_plan(plan, model, link_gbps=1, latency_us=5, calibration=FAST,
                              measured_compute=measured, cores=1)
    assert [w["compute_s"] for w in shared["per_worker"]] == pytest.approx([0.4, 0.2])
    with pytest.raises(InputError, match="measured compute of 1 workers"):
        fc.forecast_plan(plan, model, link_gbps=1, latency_us=5, calibration=FAST,
                         measured_compute=measured[:1])


def test_every_transport_call_pays_the_calibrated_fixed_cost():
    """One layer, 2 workers: one forward and one backward exchange plus 2(k-1) = 2 ring
    steps (Patarasuk & Yuan 2009), so a 1 ms call cost adds 2 ms to the exchanges and 2 ms
    to the all-reduce, and nothing to compute."""
    model = model_doc([(8, 2)])
    plan = hand_plan([[0, 30], [10, 0]], owned=[100, 100], local_edges=[300, 300], params=16)
    base = fc.forecast_plan(plan, model, link_gbps=0.01, latency_us=50, calibration=FAST)
    cal = dict(FAST, exchange_call={"seconds_per_call": 1e-3})
    out = fc.forecast_plan(plan, model, link_gbps=0.01, latency_us=50, calibration=cal)
    assert out["exchange_s"] - base["exchange_s"] == pytest.approx(2e-3, rel=1e-9)
    assert out["allreduce_s"] - base["allreduce_s"] == pytest.approx(2e-3, rel=1e-9)
    assert out["compute_s"] == pytest.approx(base["compute_s"], rel=1e-12)
    assert out["transport_call_s"] == 1e-3


def test_shard_step_is_measured_on_the_workers_own_code(grid_survey, tmp_path):
    """calibrate.shard_step_seconds runs the worker's training loop on a shard of the
    networkx 40 x 40 grid: one warm-up epoch dropped, positive CPU seconds for the step
    and the evaluation forward (no timing claim, only the shape of the result)."""
    from shardtrain.forecast.calibrate import shard_step_seconds
    from shardtrain.train.settings import TrainSettings

    shards = _grid_shards(2)
    out = shard_step_seconds(shards[1], TrainSettings(hidden=16), 4, epochs=3)
    assert out["worker"] == 1 and len(out["step_cpu_s_all"]) == 3
    assert out["step_cpu_s"] == np.median(out["step_cpu_s_all"][1:]) > 0
    assert out["eval_cpu_s"] == np.median(out["eval_cpu_s_all"][1:]) > 0
    assert out["step_cpu_s_min"] == min(out["step_cpu_s_all"][1:])
    with pytest.raises(ValueError):
        shard_step_seconds(shards[0], TrainSettings(hidden=16), 4, epochs=1)


def _grid_graph():
    # the 40 x 40 grid of networkx (a reference library), 4 classes, 12 features
    from shardtrain.data.graph import Graph, csr_from_edges
    g = nx.convert_node_labels_to_integers(nx.grid_2d_graph(40, 40))
    e = np.array(g.edges(), dtype=np.int64)
    n = g.number_of_nodes()
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], n)
    rng = np.random.default_rng(1)
    return Graph(indptr, indices, features=rng.standard_normal((n, 12)).astype(np.float32),
                 labels=rng.integers(0, 4, n))


def _grid_shards(k):
    from shardtrain.plan.shards import build_shards
    graph = _grid_graph()
    n = graph.num_vertices
    return build_shards(graph, (np.arange(n) * k // n).astype(np.int64), k)


def test_an_emulated_run_is_never_faster_than_its_link_alone(grid_survey, tmp_path):
    """The link emulation holds every frame until latency + 8 bytes / bandwidth after its
    call began (transport/link.py), so each worker's training step lasts at least the sum
    of its own calls' link times: the forecast of the same plan with free compute and no
    per-call cost is a lower bound of every measured epoch_s."""
    from shardtrain.data.graph import fingerprint
    from shardtrain.plan.shards import save_shards
    from shardtrain.train.coordinator import train_partitioned
    from shardtrain.train.settings import TrainSettings

    k, gbps, lat = 2, 0.02, 2000.0
    graph = _grid_graph()
    save_shards(tmp_path / "s", _grid_shards(k),
                meta={"method": "range", "seed": 0, "graph_fingerprint": fingerprint(graph),
                      "num_edges": graph.num_edges})
    plan = next(p for p in grid_survey["plans"] if p["workers"] == k)
    free = [{"step_cpu_s": 1e-12, "eval_cpu_s": 1e-12}] * k
    bound = fc.forecast_plan(plan, grid_survey["model"], link_gbps=gbps, latency_us=lat,
                             calibration=FAST, measured_compute=free, classes=4)
    own_link = max(w["exchange_s"] + w["allreduce_s"] for w in bound["per_worker"])
    assert own_link > 4 * lat * 1e-6             # 2 hops + 2 ring steps at least
    res = train_partitioned(tmp_path / "s", TrainSettings(hidden=16, epochs=3),
                            link=LinkModel(gbps, lat))
    assert all(e["epoch_s"] >= own_link for e in res.epochs), (own_link, res.epochs)


def test_halo_row_moves_are_counted_at_their_own_speeds(monkeypatch):
    """Hand-worked (common practice): one layer 8 -> 2, float32, worker 0 sends 30 rows
    and gets 30 gradient rows back: 30 x 2 x 4 = 240 bytes gathered forward and 240 bytes
    added at scattered rows backward; every other kernel free."""
    _no_overhead(monkeypatch)
    cal = from_flops(1e9)
    for section, key in (("dense", "flops_per_s"), ("sparse", "nnz_cols_per_s")):
        cal[section][0][key] = 1e30
    cal["elementwise"]["bytes_per_s"] = 1e30
    cal["dropout_masks"]["elements_per_s"] = 1e30
    cal["row_moves"] = {"gather_bytes_per_s": 1e3, "scatter_add_bytes_per_s": 1e2}
    model = model_doc([(8, 2)])
    plan = hand_plan([[0, 30], [30, 0]], owned=[100, 100], local_edges=[300, 300], params=16)
    out = fc.forecast_plan(plan, model, link_gbps=10, latency_us=0, calibration=cal)
    assert out["compute_parts_s"]["row_moves"] == pytest.approx(240 / 1e3 + 240 / 1e2,
                                                                rel=1e-6)


def test_all_shards_are_timed_at_once_one_process_each(tmp_path):
    """calibrate.shards_step_seconds: one result per shard of the networkx grid, in worker
    order, each from its own process (structure only, no timing claim)."""
    from shardtrain.data.graph import fingerprint
    from shardtrain.forecast.calibrate import shards_step_seconds
    from shardtrain.plan.shards import save_shards
    from shardtrain.train.settings import TrainSettings

    graph = _grid_graph()
    save_shards(tmp_path / "s", _grid_shards(2),
                meta={"method": "range", "seed": 0, "graph_fingerprint": fingerprint(graph),
                      "num_edges": graph.num_edges})
    out = shards_step_seconds(tmp_path / "s", TrainSettings(hidden=16), 4, 2, epochs=2)
    assert [r["worker"] for r in out] == [0, 1]
    assert all(r["step_cpu_s"] > 0 and len(r["step_cpu_s_all"]) == 2 for r in out)


def test_cli_forecast_measures_compute_on_the_plans_shards(run_cli, tmp_path):
    """--measure-compute on Zachary's karate club (1977, shipped with networkx): every
    plan's compute comes from its shards' measured training step."""
    g = nx.karate_club_graph()
    n = g.number_of_nodes()
    labels = np.array([g.nodes[v]["club"] == "Officer" for v in range(n)], dtype=np.int64)
    path = tmp_path / "karate.npz"
    np.savez(path, edges=np.array(g.edges(), dtype=np.int64), num_vertices=n,
             features=np.eye(n, dtype=np.float32), labels=labels)
    out = tmp_path / "f.json"
    r = run_cli("forecast", path, "--workers", "1,2", "--method", "range", "--link-gbps",
                "1", "--flops-per-worker", "1e9", "--measure-compute", "--json", out)
    assert r.returncode == 0, r.stderr
    doc = json.loads(out.read_text())
    assert doc["compute_measured"] is True
    assert [(p["workers"], p["compute_source"]) for p in doc["plans"]] == \
        [(1, "measured"), (2, "measured")]


def test_cli_measure_compute_refuses_a_survey_json(run_cli, survey_json):
    r = run_cli("forecast", survey_json, "--measure-compute", "--flops-per-worker", "1e9")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
    assert "--measure-compute" in r.stderr


def test_hand_worked_plan_under_a_halo_scheme(monkeypatch):
    """The two-worker plan above with int8 halo rows (plan/schemes.py: a row of width w is
    w + 4 bytes): worker 0's forward frame is 30 x (2 + 4) = 180 payload bytes + one int8
    header, and so is worker 1's backward frame; the evaluation forward stays float32
    (240 bytes). With P = 0.5 the training frames carry half the rows (the expectation)."""
    _no_overhead(monkeypatch)
    plan = hand_plan([[0, 30], [10, 0]], owned=[100, 100], local_edges=[300, 300], params=16)
    gbps, lat = 0.01, 50.0
    exact = fc.forecast_plan(plan, model_doc([(8, 2)]), link_gbps=gbps, latency_us=lat,
                             calibration=FAST, dropout=0.0)
    for keep in (1.0, 0.5):
        model = dict(model_doc([(8, 2)]), halo_scheme={"halo_keep": keep,
                                                       "halo_format": "int8"})
        out = fc.forecast_plan(plan, model, link_gbps=gbps, latency_us=lat,
                               calibration=FAST, dropout=0.0)
        hdr = frame_header_bytes("int8", (30 * keep, 6))
        one_hop = lat * 1e-6 + (keep * 180 + hdr) * 8 / (gbps * 1e9)
        assert out["exchange_s"] == pytest.approx(2 * one_hop, rel=1e-12)
        assert out["eval_s"] == pytest.approx(exact["eval_s"], rel=1e-12)
        assert out["allreduce_s"] == pytest.approx(exact["allreduce_s"], rel=1e-12)
