"""Worker specs, the roofline compute model, receiver contention, memory fit and prices.

Worked examples by hand from the definitions they implement: the roofline (Williams,
Waterman & Patterson, CACM 2009: a kernel takes max(bytes / bandwidth, flops / flop rate)),
a full-duplex interface per worker (bandwidth definition, common practice: 1 Gbit/s moves
1e9 bits per second each way), and the price of hours of rented workers (arithmetic).
"""
from __future__ import annotations

import json
import threading
import time

import networkx as nx
import numpy as np
import pytest
from helpers import frame_header_bytes, hand_plan, model_doc

from shardtrain import documents
from shardtrain.compat import parse_toml
from shardtrain.errors import InputError
from shardtrain.forecast import projection as fc
from shardtrain.forecast import roofline
from shardtrain.forecast.calibrate import from_flops
from shardtrain.forecast.roofline import WorkerRoofs
from shardtrain.forecast.specs import (
    WorkerSpec,
    parse_specs,
    read_specs,
    spec_of_this_machine,
    specs_to_toml,
)
from shardtrain.transport.link import LinkModel

FAST = from_flops(1e9)
EVEN = {c: 0.5 for c in roofline.KERNEL_CLASSES}


def _spec(**over) -> WorkerSpec:
    base = dict(name="w", cores=1, memory_gib=1.0, memory_bandwidth_gbs=10.0,
                peak_gflops=100.0, network_gbps=1.0, latency_us=50.0, efficiency=EVEN)
    return WorkerSpec(**{**base, **over})


# ---------------------------------------------------------------- roofline arithmetic

def test_roofline_worked_examples():
    """Spec: 10 GB/s, 100 GFLOP/s, every class at 0.5 of the roofs, one core: achieved
    5e9 bytes/s and 50e9 flop/s.
    Dense (1000 x 64) @ (64 x 32), float32: F = 2 x 1000 x 64 x 32 = 4 096 000 flops,
    B = (64 000 + 2 048 + 32 000) x 4 = 392 192 bytes; max(78.4384 us, 81.92 us) = 81.92 us
    (bound by flops) + the 5 us per call.
    Sparse, nnz 1000, 100 x 150, width 16, 4-byte index and value: B = 1000 x 8 + 1000 x
    16 x 4 + 100 x 16 x 4 + 101 x 4 = 78 804 bytes, F = 32 000 flops: 15.7608 us (bound
    by bandwidth) + 5 us."""
    # (this machine's one core streams 100 GB/s here: it does not cap the spec's 10)
    cal = dict(FAST, roofline=dict(FAST["roofline"], stream_bytes_per_s=1e11))
    roofs = WorkerRoofs.of_spec(_spec(), cal)
    assert roofs.bandwidth["dense"] == pytest.approx(5e9)
    assert roofs.flops["dense"] == pytest.approx(50e9)
    b, f = roofline.dense_cost(1000, 64, 32, 4)
    assert (b, f) == (392_192, 4_096_000)
    assert roofs.seconds("dense", b, f) == pytest.approx(81.92e-6 + 5e-6, rel=1e-12)
    b, f = roofline.sparse_cost(1000, 100, 150, 16, 4)
    assert (b, f) == (78_804, 32_000)
    assert roofs.seconds("sparse", b, f) == pytest.approx(15.7608e-6 + 5e-6, rel=1e-12)


def test_threads_run_the_dense_products_only():
    """A 4-core worker of 400 GFLOP/s and 40 GB/s, every ceiling 0.5, on a machine whose one
    core streams 4 GB/s (5 GB/s in datasheet terms, / 0.8): the dense products (BLAS) on 4
    threads get 4 x P(4) / 4 of the flop rate, P(4) = P(2)^2 = 0.81, and min(40, 4 x 0.64 x
    5) = 12.8 GB/s of bandwidth; the sparse and elementwise kernels on one thread get 1/4
    of the flop rate and min(40, 5) = 5 GB/s, each x 0.5."""
    cal = dict(FAST, roofline=dict(FAST["roofline"],
                                   parallel_efficiency_2={"bandwidth": 0.8, "flops": 0.9}))
    assert FAST["roofline"]["stream_bytes_per_s"] == 4e9
    roofs = WorkerRoofs.of_spec(_spec(cores=4, peak_gflops=400.0, memory_bandwidth_gbs=40.0),
                                cal)
    assert roofs.flops["dense"] == pytest.approx(400e9 * 0.5 * 0.81)
    assert roofs.bandwidth["dense"] == pytest.approx(12.8e9 * 0.5)
    assert roofs.flops["sparse"] == pytest.approx(400e9 * 0.5 / 4)
    assert roofs.bandwidth["sparse"] == pytest.approx(5e9 * 0.5)
    # a worker whose total is below one core's here: its total caps every kernel
    small = WorkerRoofs.of_spec(_spec(memory_bandwidth_gbs=2.0), cal)
    assert small.bandwidth["sparse"] == pytest.approx(2e9 * 0.5)
    assert roofs.threads == {"sparse": 1, "dense": 4, "elementwise": 1, "gather": 1,
                             "scatter": 1, "masks": 1}
    assert roofline.parallel_efficiency(0.9, 8) == pytest.approx(0.729)


def test_calibrated_ceilings_are_the_roofline_over_the_measured_time():
    """A made-up calibration: stream 1e10 B/s, GEMM 1e11 flop/s.
    Dense 20 000 x 16 @ 16 x 16 in 400 us: (320 000 + 256 + 320 000) x 4 = 2 561 024 bytes
    (256.1024 us at the stream) and 1.024e7 flops (102.4 us): bound by memory, bandwidth
    ceiling 256.1024 / (400 - 5) = 0.64836.
    Dense 20 000 x 256 @ 256 x 256 in 40 ms: 2.62144e9 flops (26.2144 ms at the GEMM
    rate), 41 222 144 bytes (4.12 ms): bound by arithmetic, flop ceiling
    26.2144 / (40 - 0.005) = 0.65544. An elementwise pass at 5e9 B/s: 0.5 of the stream."""
    cal = dict(FAST, roofline={"stream_bytes_per_s": 1e10, "flops_per_s": 1e11},
               dense=[{"rows": 20_000, "d_in": 16, "d_out": 16, "seconds": 400e-6,
                       "flops_per_s": 1.024e7 / 400e-6},
                      {"rows": 20_000, "d_in": 256, "d_out": 256, "seconds": 40e-3,
                       "flops_per_s": 2.62144e9 / 40e-3}],
               elementwise={"bytes_per_s": 5e9})
    assert roofline.dense_cost(20_000, 256, 256, 4) == (41_222_144, 2.62144e9)
    eff = roofline.calibrated_efficiency(cal)
    assert eff["dense"] == {"bandwidth": pytest.approx(256.1024 / 395, rel=1e-9),
                            "flops": pytest.approx(26.2144 / 39.995, rel=1e-9)}
    assert eff["elementwise"] == {"bandwidth": pytest.approx(0.5), "flops": 1.0}
    # the defaults of a datasheet spec: calibrated x the achievable fraction of each roof
    roofs = WorkerRoofs.of_spec(_spec(efficiency={}), cal)
    assert roofs.efficiency["elementwise"] == {"bandwidth": pytest.approx(0.5 * 0.8),
                                               "flops": pytest.approx(0.9)}
    assert roofs.efficiency["dense"]["flops"] == pytest.approx(26.2144 / 39.995 * 0.9)
    # one ceiling only: a single kernel bound by memory leaves the flop ceiling at the roof
    assert roofline.fit_ceilings([(2e9, 1e6, 0.4)], 1e10, 1e11) == {
        "bandwidth": pytest.approx(0.2 / (0.4 - 5e-6)), "flops": 1.0}


def test_a_spec_of_this_machine_gives_back_its_measured_speeds():
    cal = dict(FAST, roofline={"stream_bytes_per_s": 2e10, "flops_per_s": 5e10},
               elementwise={"bytes_per_s": 1.2e10})
    spec = spec_of_this_machine(cal, memory_gib=8.0)
    # written as a datasheet gives them: measured / the fraction a measurement reaches
    assert spec.cores == 1 and spec.memory_bandwidth_gbs == 25.0
    assert spec.peak_gflops == pytest.approx(50.0 / 0.9, abs=1e-4) and not spec.efficiency
    roofs = WorkerRoofs.of_spec(spec, cal)
    # ... so that a forecast on it runs every kernel at the speed measured here
    assert roofs.bandwidth["elementwise"] == pytest.approx(1.2e10, rel=1e-5)
    assert roofs.flops["dense"] == pytest.approx(
        5e10 * roofline.calibrated_efficiency(cal)["dense"]["flops"], rel=1e-5)
    assert roofs.copy_scale == pytest.approx(1.0, rel=1e-5)
    again = parse_specs(parse_toml(specs_to_toml([spec], "c")), "x")
    assert again == [spec]


# ---------------------------------------------------------------- receiver contention

def _star_plan():
    # workers 1 and 2 each send 100 rows to worker 0; worker 0 sends 10 rows to each
    plan = hand_plan([[0, 10, 10], [100, 0, 0], [100, 0, 0]], owned=[50, 200, 200],
                     local_edges=[100, 400, 400], params=16)
    return plan


def test_contention_worked_example():
    """One layer 8 -> 2 (transform first: 2 columns each way), float32, 1 Gbit/s, 50 us.
    Forward: worker 0 receives 2 frames of 100 x 2 x 4 = 800 bytes: 1600 + 2 headers at
    its interface; the busiest sender (1 or 2) sends 800 + 1 header. With contention the
    hop is 50 us + (1600 + 2h) x 8 / 1e9; without, 50 us + (800 + h) x 8 / 1e9.
    Backward: worker 0 sends 1600 + 2 headers itself, either way."""
    model = model_doc([(8, 2)])
    plan = _star_plan()
    on = fc.forecast_plan(plan, model, link_gbps=1.0, latency_us=50, calibration=FAST,
                          dropout=0.0)
    off = fc.forecast_plan(plan, model, link_gbps=1.0, latency_us=50, calibration=FAST,
                           dropout=0.0, receiver_contention=False)
    # the model's framing estimate per frame: the header of the average frame of the
    # worker sending most rows (100 rows over 2 frames); a header's size varies by a byte
    h = fc.frame_header_bytes("float32", (50, 2))
    assert abs(h - frame_header_bytes("float32", (100, 2), layer=0, direction="forward")) <= 2
    steps_on = {s["step"]: s for s in on["steps"]}
    steps_off = {s["step"]: s for s in off["steps"]}
    call = FAST.get("exchange_call", {}).get("seconds_per_call", 0.0)
    assert steps_on["forward 0"]["seconds"] - call == pytest.approx(
        50e-6 + (1600 + 2 * h) * 8 / 1e9, rel=1e-9)
    assert steps_on["forward 0"]["busiest_worker"] == 0
    assert steps_off["forward 0"]["seconds"] - call == pytest.approx(
        50e-6 + (800 + h) * 8 / 1e9, rel=1e-9)
    assert steps_on["backward 0"]["seconds"] == pytest.approx(
        steps_off["backward 0"]["seconds"], rel=1e-12)
    # the same numbers by the interface rule alone
    wire = fc.hop_wire_seconds([1600, 800, 800], [0, 800, 800], [0, 1, 1], [2, 0, 0],
                               50e-6, 1.0)
    assert wire.tolist() == pytest.approx([50e-6 + 1600 * 8e-9, 50e-6 + 800 * 8e-9,
                                           50e-6 + 800 * 8e-9])


def test_the_emulated_link_serialises_what_a_worker_receives():
    """Two senders (threads) each send one 250 kB frame to worker 0 over an emulated
    0.1 Gbit/s link: each sender alone is done after 20 ms, but worker 0's interface takes
    both, one after the other: its call cannot end before 40 ms (bandwidth definition; a
    lower bound, other load only adds). Without the receiving side emulated the call ends
    after about 20 ms."""
    from shardtrain.transport.meter import Profile
    from shardtrain.transport.pipes import PipeTransport, make_pipe_mesh

    link = LinkModel(0.1, 0.0)
    assert link.receive_due(1.0, 125_000) == pytest.approx(1.01)
    ends = make_pipe_mesh(3, {(0, 1), (0, 2)})
    ts = [PipeTransport(r, 3, ends[r], Profile(r), timeout_s=30.0, link=link)
          for r in range(3)]
    n = 250_000 // 4
    bufs = {1: np.empty(n, np.float32), 2: np.empty(n, np.float32)}

    def send(r):
        ts[r].exchange({0: np.ones(n, np.float32)}, {}, kind="halo", epoch=1, layer=0,
                       direction="forward")

    peers = [threading.Thread(target=send, args=(r,)) for r in (1, 2)]
    t0 = time.perf_counter()
    for p in peers:
        p.start()
    ts[0].exchange({}, bufs, kind="halo", epoch=1, layer=0, direction="forward")
    took = time.perf_counter() - t0
    for p in peers:
        p.join()
    for t in ts:
        t.close()
    assert took >= 2 * 250_000 * 8 / 0.1e9
    assert bufs[1][0] == 1.0 and bufs[2][-1] == 1.0


# ---------------------------------------------------------------- memory fit and price

def test_price_worked_example():
    """4 workers at 2.50 per hour, 1.8 s per epoch: 4 x 2.5 x 1.8 / 3600 = 0.005 per epoch,
    0.5 per 100 epochs; no price, no figure."""
    assert fc.plan_price(4, 1.8, 2.5) == {"price_per_epoch": pytest.approx(0.005),
                                         "price_per_100_epochs": pytest.approx(0.5)}
    assert fc.plan_price(4, 1.8, None)["price_per_epoch"] is None


def _survey_with_memory():
    model = model_doc([(8, 4), (4, 2)])
    plans = []
    for k, mem in ((1, 900), (2, 500), (4, 300)):
        rows = np.full((k, k), 20) - 20 * np.eye(k, dtype=int)
        p = hand_plan(rows, owned=[1000 // k] * k, local_edges=[4000 // k] * k, params=40)
        for s in p["shards"]:
            s["memory_bytes"] = mem << 20
        plans.append(p)
    return {"model": model, "plans": plans, "graph": {"vertices": 1000, "edges": 2000}}


def test_plans_that_do_not_fit_are_marked_and_never_chosen():
    survey = _survey_with_memory()
    small = _spec(name="small", memory_gib=400 / 1024, price_per_hour=1.0)   # 400 MiB
    big = _spec(name="big", memory_gib=2.0, price_per_hour=3.0)
    none = _spec(name="none", memory_gib=0.1, price_per_hour=1.0)
    out = fc.forecast_on_specs(survey, [small, big, none], calibration=FAST,
                               target_epoch_s=100.0)
    fits = {(p["spec"], p["workers"]): p["fits_memory"] for p in out["plans"]}
    assert fits == {("small", 1): False, ("small", 2): False, ("small", 4): True,
                    ("big", 1): True, ("big", 2): True, ("big", 4): True,
                    ("none", 1): False, ("none", 2): False, ("none", 4): False}
    answer = {s["spec"]: s for s in out["per_spec"]}
    assert answer["small"]["fewest_meeting_target"]["workers"] == 4   # 1 and 2 do not fit
    assert answer["big"]["fewest_meeting_target"]["workers"] == 1
    assert answer["none"]["fewest_meeting_target"] is None and answer["none"]["fastest"] is None
    for p in out["plans"]:
        if p["fits_memory"] is False:
            assert not (p["fastest"] or p["fewest_meeting_target"]
                        or p["cheapest_meeting_target"])
    big1 = next(p for p in out["plans"] if (p["spec"], p["workers"]) == ("big", 1))
    assert big1["price_per_epoch"] == pytest.approx(3.0 * big1["epoch_s"] / 3600)
    cheapest = out["cheapest_meeting_target"]
    priced = [p for p in out["plans"] if p["meets_target"]]
    assert cheapest["price_per_epoch"] == min(p["price_per_epoch"] for p in priced)
    documents.validate(json.loads(json.dumps(out)), "forecast", "f.json")
    # an accelerator's memory is the limit when the spec has one
    from shardtrain.forecast.specs import Accelerator
    card = _spec(name="card", memory_gib=64.0, accelerator=Accelerator(
        memory_gib=0.25, memory_bandwidth_gbs=500.0, peak_gflops=1e4, host_link_gbs=10.0))
    out = fc.forecast_on_specs(survey, [card], calibration=FAST, target_epoch_s=None)
    assert [p["fits_memory"] for p in out["plans"]] == [False, False, False]


# ---------------------------------------------------------------- spec files

GOOD = {"name": "a", "cores": 2, "memory_gib": 8, "memory_bandwidth_gbs": 20.5,
        "peak_gflops": 100, "network_gbps": 10, "latency_us": 25}


def test_spec_files_toml_and_json(tmp_path):
    (tmp_path / "one.json").write_text(json.dumps(GOOD))
    (tmp_path / "two.json").write_text(json.dumps([GOOD, dict(GOOD, name="b",
                                                               price_per_hour=0.5)]))
    (tmp_path / "w.toml").write_text(
        '[[worker]]\nname = "a"\ncores = 2\nmemory_gib = 8\nmemory_bandwidth_gbs = 20.5\n'
        'peak_gflops = 100\nnetwork_gbps = 10\nlatency_us = 25\n'
        '[worker.efficiency]\nsparse = 0.3\n'
        '[worker.accelerator]\nmemory_gib = 16\nmemory_bandwidth_gbs = 800\n'
        'peak_gflops = 2e4\nhost_link_gbs = 25\n')
    one = read_specs(tmp_path / "one.json")
    assert one == [WorkerSpec("a", 2, 8.0, 20.5, 100.0, 10.0, 25.0)]
    two = read_specs(tmp_path / "two.json")
    assert [s.price_per_hour for s in two] == [None, 0.5]
    (w,) = read_specs(tmp_path / "w.toml")
    assert w.efficiency == {"sparse": 0.3} and w.accelerator.host_link_gbs == 25.0
    assert w.memory_limit_bytes() == 16 << 30
    from pathlib import Path
    example = Path(__file__).resolve().parent.parent / "examples" / "worker-specs.toml"
    assert len(read_specs(example)) >= 3


BAD = [
    ({k: v for k, v in GOOD.items() if k != "peak_gflops"}, "peak_gflops: missing"),
    (dict(GOOD, memory_bandwidth_gbs=-5), "memory_bandwidth_gbs: must be a finite number"),
    (dict(GOOD, network_gbps=0), "network_gbps: must be a finite number above 0"),
    (dict(GOOD, colour="red"), "colour: unknown key"),
    (dict(GOOD, cores=2.5), "cores: must be an integer"),
    (dict(GOOD, cores="two"), "cores: must be an integer"),
    (dict(GOOD, latency_us=True), "latency_us: must be a number"),
    (dict(GOOD, efficiency={"fft": 0.5}), "efficiency.fft: unknown kernel class"),
    (dict(GOOD, accelerator={"memory_gib": 8}), "accelerator.memory_bandwidth_gbs: missing"),
    (dict(GOOD, accelerator=dict(memory_gib=8, memory_bandwidth_gbs=1, peak_gflops=1,
                                 host_link_gbs=-1)), "accelerator.host_link_gbs: must be"),
]


@pytest.mark.parametrize("doc,words", BAD)
def test_bad_spec_documents_name_the_key(doc, words):
    with pytest.raises(InputError) as exc:
        parse_specs([GOOD, doc], "specs.json")
    text = str(exc.value)
    assert text.startswith("specs.json: [1].") and words in text, text
    assert "\n" not in text


def _grid_survey_json(tmp_path):
    from shardtrain.data.graph import Graph, csr_from_edges
    from shardtrain.plan.survey import SurveySettings, survey
    g = nx.convert_node_labels_to_integers(nx.grid_2d_graph(20, 20))   # networkx grid
    e = np.array(g.edges(), dtype=np.int64)
    n = g.number_of_nodes()
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], n)
    graph = Graph(indptr, indices, features=np.ones((n, 6), np.float32),
                  labels=np.arange(n) % 3)
    plans, head = [], None
    for k in (1, 2, 4):
        a = (np.arange(n) * k // n).astype(np.int64)
        head = survey(graph, ["range"], [k], SurveySettings(layers=2, hidden=8),
                      assignment=a)
        plans += head["plans"]
    path = tmp_path / "survey.json"
    path.write_text(json.dumps(dict(head, plans=plans)))
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps(from_flops(1e9)))
    return path, cal


def test_cli_forecast_on_worker_specs(run_cli, tmp_path):
    survey, cal = _grid_survey_json(tmp_path)
    spec = tmp_path / "w.json"
    spec.write_text(json.dumps([dict(GOOD, price_per_hour=1.0),
                                dict(GOOD, name="b", network_gbps=100, price_per_hour=2.0)]))
    out = tmp_path / "f.json"
    r = run_cli("forecast", survey, "--worker-spec", spec, "--calibration", cal,
                "--target-epoch-s", "10", "--json", out)
    assert r.returncode == 0, r.stderr
    doc = json.loads(out.read_text())
    documents.validate(doc, "forecast", str(out))
    assert {(p["spec"], p["workers"]) for p in doc["plans"]} == \
        {(s, k) for s in ("a", "b") for k in (1, 2, 4)}
    assert [s["spec"] for s in doc["per_spec"]] == ["a", "b"]
    # a 400-vertex grid meets 10 s on one worker of either kind; "a" is the cheaper
    assert doc["cheapest_meeting_target"]["spec"] == "a"
    assert doc["cheapest_meeting_target"]["workers"] == 1
    assert "cheapest meeting" in r.stdout and "fewest workers meeting" in r.stdout


@pytest.mark.parametrize("doc,key", [
    ({k: v for k, v in GOOD.items() if k != "network_gbps"}, "network_gbps"),
    (dict(GOOD, memory_bandwidth_gbs=-1), "memory_bandwidth_gbs"),
    (dict(GOOD, turbo=True), "turbo"),
    (dict(GOOD, peak_gflops="fast"), "peak_gflops")])
def test_cli_bad_spec_file_exits_2_naming_file_and_key(run_cli, tmp_path, doc, key):
    survey, cal = _grid_survey_json(tmp_path)
    spec = tmp_path / "bad.toml"
    lines = [f"{k} = {json.dumps(v)}" for k, v in doc.items()]
    spec.write_text("[[worker]]\n" + "\n".join(lines) + "\n")
    out = tmp_path / "f.json"
    r = run_cli("forecast", survey, "--worker-spec", spec, "--calibration", cal,
                "--json", out)
    assert r.returncode == 2
    text = r.stderr.strip().splitlines()
    assert len(text) == 1 and "bad.toml" in text[0] and key in text[0], r.stderr
    assert "Traceback" not in r.stderr and not out.exists()


def test_cli_worker_spec_refuses_the_options_it_replaces(run_cli, tmp_path):
    survey, cal = _grid_survey_json(tmp_path)
    spec = tmp_path / "w.json"
    spec.write_text(json.dumps([GOOD]))
    r = run_cli("forecast", survey, "--worker-spec", spec, "--link-gbps", "5")
    assert r.returncode == 2 and "--link-gbps" in r.stderr


def test_calibrate_writes_a_spec_of_this_machine(tmp_path, monkeypatch, capsys):
    from shardtrain.cli import main
    from shardtrain.forecast import calibrate as cal_mod

    made = from_flops(2e9)          # its roofs: stream 8e9 B/s, 2e9 flop/s
    monkeypatch.setattr(cal_mod, "calibrate", lambda dtype="float32": made)
    assert main(["calibrate", "--json", str(tmp_path / "cal.json"),
                 "--spec-out", str(tmp_path / "this.toml")]) == 0
    (spec,) = read_specs(tmp_path / "this.toml")
    assert spec.cores == 1 and spec.memory_bandwidth_gbs == 10.0     # 8 GB/s / 0.8
    assert spec.peak_gflops == pytest.approx(2.0 / 0.9, abs=1e-4)
    assert json.loads((tmp_path / "cal.json").read_text()) == made
    # a kept calibration is used as it is, not timed again
    monkeypatch.setattr(cal_mod, "calibrate", lambda dtype="float32": 1 / 0)
    assert main(["calibrate", "--json", str(tmp_path / "cal.json")]) == 0
    assert "kept" in capsys.readouterr().out


def test_forecast_shape_checks_the_new_keys():
    """documents.FORECAST names the keys a forecast on worker specs adds: a hand-edited
    value of the wrong kind is refused naming the key."""
    out = fc.forecast_on_specs(_survey_with_memory(), [_spec(price_per_hour=1.0)],
                               calibration=FAST, target_epoch_s=100.0)
    doc = json.loads(json.dumps(out))
    documents.validate(json.loads(json.dumps(doc)), "forecast", "f.json")
    for path, bad, key in ((("plans", 0, "fits_memory"), "yes", "plans[0].fits_memory"),
                           (("plans", 0, "price_per_epoch"), -1, "plans[0].price_per_epoch"),
                           (("cheapest_meeting_target", "spec"), 3,
                            "cheapest_meeting_target.spec"),
                           (("per_spec", 0, "fewest_meeting_target"), "x",
                            "per_spec[0].fewest_meeting_target")):
        edited = json.loads(json.dumps(doc))
        node = edited
        for part in path[:-1]:
            node = node[part]
        node[path[-1]] = bad
        with pytest.raises(InputError, match=key.replace("[", r"\[").replace("]", r"\]")):
            documents.validate(edited, "forecast", "f.json")


def test_calibrate_refuses_a_file_that_is_not_a_calibration(run_cli, tmp_path):
    (tmp_path / "other.json").write_text(json.dumps({"plans": []}))
    r = run_cli("calibrate", "--json", tmp_path / "other.json", "--spec-out",
                tmp_path / "this.toml")
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].count("--json") == 1 and "other.json" in lines[0]
    assert not (tmp_path / "this.toml").exists()
    assert json.loads((tmp_path / "other.json").read_text()) == {"plans": []}
