"""`shardtrain train --emulate-link GBPS[:LATENCY_US]` through the CLI, and `shardtrain --help`.

The link check is a physical lower bound, not a timing: a worker whose frames cross a link of
G Gbit/s cannot have spent less than bytes x 8 / (G x 1e9) seconds in its transport calls
(the definition of bandwidth), whatever else the machine is doing. Without the emulation the
same few tens of kB cross a local pipe in well under a millisecond, so the bound fails if the
option is not passed through to the transport.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from helpers import depot_graph, frame_header_bytes, hand_plan, model_doc

COMMON = ["--epochs", "3", "--hidden", "8", "--quiet"]
COMMANDS = ("demo", "synth", "survey", "split", "train", "forecast", "report")


@pytest.fixture(scope="module")
def graph_file(tmp_path_factory):
    g = depot_graph(n=200)
    rows = np.repeat(np.arange(g.num_vertices), g.degrees)
    keep = rows < g.indices
    path = tmp_path_factory.mktemp("g") / "depots.npz"
    np.savez(path, edges=np.stack([rows[keep], g.indices[keep]], axis=1),
             num_vertices=np.int64(g.num_vertices), features=g.features, labels=g.labels,
             train_mask=g.train_mask, val_mask=g.val_mask, test_mask=g.test_mask)
    return path


def test_emulated_link_is_recorded_and_slows_the_exchange_to_its_bandwidth(
        run_cli, graph_file, tmp_path):
    gbps, latency_us = 0.002, 300.0
    out = run_cli("train", graph_file, "--workers", "2", "--method", "metis", *COMMON,
                  "--emulate-link", f"{gbps}:{latency_us:g}", "--json", tmp_path / "run.json")
    assert out.returncode == 0, out.stderr
    doc = json.loads((tmp_path / "run.json").read_text())
    assert doc["emulated_link"] == {"gbps": gbps, "latency_us": latency_us}
    # the emulation changes when bytes arrive, never which bytes
    assert doc["traffic"]["measured_payload_bytes"] == doc["traffic"]["predicted_payload_bytes"]
    for w in doc["workers"]:
        assert w["bytes_sent"] > 10_000          # enough bytes for the bound to bite
        in_transport = w["exchange_s"] + w["allreduce_s"] + w["wait_s"]
        assert in_transport >= w["bytes_sent"] * 8 / (gbps * 1e9), w


def test_run_without_the_option_records_no_link(run_cli, graph_file, tmp_path):
    out = run_cli("train", graph_file, "--workers", "2", "--method", "metis", *COMMON,
                  "--json", tmp_path / "run.json")
    assert out.returncode == 0, out.stderr
    assert "emulated_link" not in json.loads((tmp_path / "run.json").read_text())


@pytest.mark.parametrize("value", ["0", "-1", "abc", "1e999", "5:1e999", "5:-1", "nan", "5:",
                                   "", "1:2:3"])
def test_bad_link_exits_2_with_one_line_naming_the_option(run_cli, graph_file, tmp_path,
                                                          value):
    out = run_cli("train", graph_file, "--workers", "2", "--method", "metis", *COMMON,
                  "--emulate-link", value, "--json", tmp_path / "run.json")
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "--emulate-link" in lines[0], out.stderr
    assert "Traceback" not in out.stderr and not (tmp_path / "run.json").exists()


@pytest.mark.parametrize("mode", [["--reference"], ["--transport", "mpi"]])
def test_link_refused_where_no_pipes_run(run_cli, graph_file, mode):
    out = run_cli("train", graph_file, *mode, *COMMON, "--emulate-link", "5:200")
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "--emulate-link" in lines[0] and mode[0] in lines[0], out.stderr


def test_top_level_help_is_for_users(run_cli):
    out = run_cli("--help")
    assert out.returncode == 0, out.stderr
    text = out.stdout
    for name in COMMANDS:
        assert f"\n    {name} " in text, name                 # listed as a command
    # the workflow order a newcomer follows (demo first)
    start = text.index("Workflow")
    order = [text.index(w, start) for w in ("shardtrain demo", "synth", "-> survey",
                                            "-> split", "-> train", "-> forecast",
                                            "-> report")]
    assert order == sorted(order)
    for developer_words in ("add_arguments", "run(args)", "Each command lives",
                            "shardtrain.errors", "raises"):
        assert developer_words not in text


def test_an_exchange_lasts_at_least_the_workers_own_copying():
    """Hand-worked (the definitions in `shardtrain.forecast.projection`): one layer 8 -> 2, worker 0
    sends 30 rows and receives 10, worker 1 the reverse, float32. With a transport that
    costs c CPU seconds per byte sent or received, each worker copies (30 + 10) x 2 x 4 = 320
    payload bytes plus two headers per exchange; when that takes longer than the link, the
    hop lasts the copying. Each ring step (2 of them, Patarasuk & Yuan 2009) sends and
    receives one 8-element chunk. With c = 0 the link alone is left."""
    from shardtrain.forecast import projection as fc
    from shardtrain.forecast.calibrate import from_flops

    FAST = from_flops(1e9)

    model = model_doc([(8, 2)])
    plan = hand_plan([[0, 30], [10, 0]], owned=[100, 100], local_edges=[300, 300], params=16)
    base = fc.forecast_plan(plan, model, link_gbps=0.01, latency_us=50, calibration=FAST)
    c = 1e-3                       # s per byte: far slower than a 0.01 Gbit/s link
    cal = dict(FAST, transport_copy={"cpu_s_per_byte": c})
    out = fc.forecast_plan(plan, model, link_gbps=0.01, latency_us=50, calibration=cal)
    hdr = frame_header_bytes("float32", (30, 2))
    assert out["exchange_s"] == pytest.approx(2 * c * (320 + 2 * hdr), rel=1e-12)
    ring_hdr = frame_header_bytes("float32", (8,), kind="allreduce", layer=-1,
                                  direction="reduce-scatter")
    assert out["allreduce_s"] == pytest.approx(c * 2 * (2 * 32 + 2 * ring_hdr), rel=1e-12)
    assert out["compute_s"] == pytest.approx(base["compute_s"], rel=1e-12)
    slight = fc.forecast_plan(plan, model, link_gbps=0.01, latency_us=50,
                              calibration=dict(FAST, transport_copy={"cpu_s_per_byte": 1e-15}))
    assert slight["epoch_s"] == pytest.approx(base["epoch_s"], rel=1e-12)
