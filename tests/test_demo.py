"""`shardtrain demo`: the README's first command runs the whole workflow and proves its claims.

One quick demo run (module fixture) is shared by the checks of its outputs.
"""
from __future__ import annotations

import json
import re
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from shardtrain.cli.flags import cli_message
from shardtrain.demo import check as demo_check
from shardtrain.demo import settings as demo_settings
from shardtrain.demo import workflow as demo
from shardtrain.errors import InputError, RunError

OUTPUTS = ("parcel-network.npz", "survey.json", "run.json", "forecast.json", "report.html",
           "demo.json")


@pytest.fixture(scope="module")
def quick_demo(tmp_path_factory):
    from conftest import _run_cli

    out = tmp_path_factory.mktemp("demo") / "out"
    proc = _run_cli("demo", "--quick", "--out", out, timeout=120)
    return out, proc


def _json(out: Path, name: str) -> dict:
    return json.loads((out / name).read_text(encoding="utf-8"))


@pytest.mark.slow
def test_quick_demo_writes_every_output_and_names_the_report_last(quick_demo):
    out, proc = quick_demo
    assert proc.returncode == 0, proc.stderr
    for name in OUTPUTS:
        assert (out / name).is_file(), name
    assert (out / "shards" / "shards.json").is_file()
    assert sorted(p.name for p in (out / "plots").glob("*.png"))
    last = proc.stdout.strip().splitlines()[-1]
    assert last == f"report: {out / 'report.html'}"
    assert "[1/6]" in proc.stderr and "[6/6]" in proc.stderr
    # nothing half-written: no temporary names left anywhere
    assert not [p for p in out.parent.rglob("*") if ".tmp" in p.name]


@pytest.mark.slow
def test_the_network_grows_four_weeks_and_training_restarts_warm(quick_demo):
    from shardtrain import documents
    from shardtrain.plan.shards import load_manifest

    out, proc = quick_demo
    assert proc.returncode == 0, proc.stderr
    growth = out / "growth"
    reports = [documents.validate(_json(growth, f"week{w:02d}.update.json"), "update",
                                  f"week{w:02d}")
               for w in range(1, 5)]
    for before, after in zip(reports, reports[1:]):          # each week builds on the last
        assert after["graph"]["vertices_before"] == before["graph"]["vertices_after"]
        assert after["before"] == before["after"]
    shards = load_manifest(growth / "shards-week04")
    assert shards["num_vertices"] == reports[-1]["graph"]["vertices_after"]
    assert not (growth / "shards-week01").exists()          # only the last week's shards
    warm = _json(growth, "warm-restart.run.json")
    epochs = _json(out, "run.json")["settings"]["epochs"]
    assert warm["warm_start"]["epoch"] == epochs
    assert warm["epochs"][0]["epoch"] == epochs + 1
    assert warm["graph"]["vertices"] == shards["num_vertices"]
    assert (out / "plots" / "drift.png").is_file()
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "The network grows" in page and "warm restart" in page
    assert len(_json(out, "demo.json")["growth"]["weeks"]) == 4


@pytest.mark.slow
def test_run_json_shows_the_equality_check_passed(quick_demo):
    # source of truth: the single-process reference trainer (its tests check gradients
    # against central finite differences); docs/design.md §1.7: float64 agrees to a relative 1e-9
    out, _ = quick_demo
    run = _json(out, "run.json")
    check = run["check"]
    assert check["passed"] and check["equal_to_reference"] and check["payload_equal"]
    assert check["max_rel_diff"] <= 1e-9
    assert check["epochs_compared"] == len(run["epochs"]) == run["settings"]["epochs"]
    assert check["measured_payload_bytes"] == check["predicted_payload_bytes"] \
        == run["traffic"]["measured_payload_bytes"] > 0
    # the layout of `shardtrain train --json`
    for key in ("settings", "graph", "mode", "epochs", "traffic", "workers", "profile"):
        assert key in run
    assert run["mode"] == "partitioned" and run["settings"]["dtype"] == "float64"
    # the GCN paper's setup (Kipf & Welling 2017): 2 layers, 16 hidden, dropout 0.5,
    # learning rate 0.01, weight decay 5e-4
    s = run["settings"]
    assert (s["layers"], s["hidden"], s["dropout"], s["lr"], s["weight_decay"]) == \
        (2, 16, 0.5, 0.01, 5e-4)


@pytest.mark.slow
def test_all_reduce_bytes_follow_the_ring_formula(quick_demo):
    # Patarasuk & Yuan 2009: in a ring all-reduce each of k workers sends 2(k-1) chunks of
    # size/k; exact here because the demo's parameter count divides by k
    out, _ = quick_demo
    run = _json(out, "run.json")
    k, epochs = len(run["workers"]), run["settings"]["epochs"]
    params = sum(d_in * d_out for d_in, d_out in _json(out, "survey.json")["model"]["dims"])
    assert params % k == 0
    assert run["traffic"]["allreduce_payload_bytes"] == \
        epochs * k * 2 * (k - 1) * (params // k) * 8


@pytest.mark.slow
def test_chosen_plan_has_the_least_predicted_traffic_and_its_cut_matches_networkx(quick_demo):
    # reference library: networkx.cut_size on the graph read back from the demo's bundle
    import networkx as nx

    out, proc = quick_demo
    survey = _json(out, "survey.json")
    plan = _json(out, "run.json")["plan"]
    same_k = [p for p in survey["plans"] if p["workers"] == plan["workers"]]
    assert plan["epoch_payload_bytes"] == min(p["epoch_payload_bytes"] for p in same_k)
    assert f"best plan: {plan['method']} on {plan['workers']} workers" in proc.stdout
    with np.load(out / "parcel-network.npz", allow_pickle=False) as z:
        edges = z["edges"]
        n = int(z["num_vertices"])
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(edges.tolist())
    parts = []
    for name in sorted((out / "shards").glob("shard-*.npz")):
        with np.load(name, allow_pickle=False) as z:
            parts.append(z["owned"].tolist())
    assert len(parts) == plan["workers"]
    cut = sum(nx.cut_size(g, part) for part in parts) // 2
    assert cut == plan["edge_cut"]


@pytest.mark.slow
def test_report_is_self_contained(quick_demo):
    out, _ = quick_demo
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "http://" not in page and "https://" not in page
    sources = re.findall(r'src="([^"]*)"', page)
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)
    assert "<script" not in page and "<link" not in page
    for section in ("What the demo did", "Survey of partition plans", "Training run",
                    "Forecast"):
        assert section in page


@pytest.mark.slow
def test_forecast_covers_two_link_speeds_for_every_surveyed_plan(quick_demo):
    out, proc = quick_demo
    fc, survey = _json(out, "forecast.json"), _json(out, "survey.json")
    assert sorted({p["link_gbps"] for p in fc["plans"]}) == [1.0, 10.0]
    assert len(fc["plans"]) == 2 * len(survey["plans"])
    assert "at 1 Gbit/s" in proc.stdout and "at 10 Gbit/s" in proc.stdout


def _main(capsys, *argv):
    """The command line in this process: (exit status, stdout, stderr)."""
    from shardtrain.cli import main

    status = main(["demo", *map(str, argv)])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def test_existing_folder_is_refused_before_any_work(tmp_path, capsys):
    out = tmp_path / "busy"
    out.mkdir()
    (out / "notes.txt").write_text("mine\n")
    status, _, err = _main(capsys, "--quick", "--out", out)
    assert status == 2
    assert len(err.strip().splitlines()) == 1 and "--out" in err and "--overwrite" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["busy"]
    assert [p.name for p in out.iterdir()] == ["notes.txt"]
    # --overwrite replaces only an earlier demo's folder
    status, _, err = _main(capsys, "--quick", "--overwrite", "--out", out)
    assert status == 2 and "demo.json" in err
    assert [p.name for p in out.iterdir()] == ["notes.txt"]


@pytest.mark.parametrize("argv, option", [
    (["--workers", "1"], "--workers"),
    (["--workers", "x"], "--workers"),
    (["--vertices", "10"], "--vertices"),
    (["--epochs", "0"], "--epochs"),
    (["--seed", "-1"], "--seed"),
    (["--colour", "red"], "--colour"),
])
def test_bad_option_is_one_line_and_exit_2(tmp_path, capsys, argv, option):
    status, out, err = _main(capsys, "--quick", "--out", tmp_path / "out", *argv)
    assert status == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and option in lines[0]
    assert not (tmp_path / "out").exists()


def test_bad_option_from_the_shell_is_one_line_without_traceback(tmp_path, run_cli):
    proc = run_cli("demo", "--out", tmp_path / "out", "--workers", "0")
    assert proc.returncode == 2 and proc.stdout == ""
    assert len(proc.stderr.strip().splitlines()) == 1 and "--workers" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_overwrite_is_allowed_for_an_earlier_demo_folder(tmp_path):
    (tmp_path / demo_settings.SUMMARY_FILE).write_text("{}\n")
    demo_settings.check_out_dir(tmp_path, overwrite=True)
    with pytest.raises(InputError, match="^out ") as info:     # the library's parameter
        demo_settings.check_out_dir(tmp_path, overwrite=False)
    # as the command line words it (cli/flags.py)
    assert cli_message(info.value).startswith(f"--out {tmp_path}: folder exists and is not "
                                              f"empty (give --overwrite to replace")


def test_a_failing_step_leaves_nothing_behind(tmp_path, monkeypatch):
    synthesize = demo.synthesize

    def broken(settings, path):
        synthesize(settings, path)          # the bundle is written, then the step fails
        raise RunError("broken on purpose")

    monkeypatch.setattr(demo, "synthesize", broken)
    steps = []
    with pytest.raises(RunError, match="on purpose"):
        demo.run_demo(demo.DemoSettings.quick(out=str(tmp_path / "out"), vertices=300),
                      on_step=steps.append)
    assert steps and steps[0].startswith("[1/6]")
    assert list(tmp_path.iterdir()) == []


def _fake_run(losses, weight, measured, predicted):
    return SimpleNamespace(epochs=[{"epoch": i + 1, "loss": v} for i, v in enumerate(losses)],
                           params=[(np.array([[weight, 1.0]]), None)],
                           predictions=np.zeros(3, dtype=np.int64),
                           traffic={"measured_payload_bytes": measured,
                                    "predicted_payload_bytes": predicted})


def test_the_check_fails_on_a_difference_beyond_rounding():
    # the tolerance of docs/design.md §1.7: relative 1e-9; a difference of 1e-6 must fail,
    # 1e-13 pass
    plan = {"traffic": {"forward_bytes": 10, "backward_bytes": 5, "allreduce_bytes": 3,
                        "eval_forward_bytes": 10}}
    predicted = 2 * (10 + 5 + 3) + 2 * 10          # 2 epochs, 2 evaluation forwards
    ref = _fake_run([1.0, 0.5], 2.0, predicted, predicted)
    ok = demo_check.compare_runs(_fake_run([1.0, 0.5 * (1 + 1e-13)], 2.0, predicted, predicted),
                           ref, plan, epochs=2)
    assert ok["passed"] and demo_check.check_failure(ok) is None
    bad = demo_check.compare_runs(_fake_run([1.0, 0.5 * (1 + 1e-6)], 2.0, predicted, predicted),
                            ref, plan, epochs=2)
    assert not bad["passed"] and bad["worst_loss_epoch"] == 2
    assert "1.000e-06" in demo_check.check_failure(bad)
    weights = demo_check.compare_runs(_fake_run([1.0, 0.5], 2.0 + 1e-5, predicted, predicted),
                                ref, plan, epochs=2)
    assert not weights["equal_to_reference"] and weights["max_weight_rel_diff"] == \
        pytest.approx(5e-6)
    off = demo_check.compare_runs(_fake_run([1.0, 0.5], 2.0, predicted + 8, predicted + 8),
                            ref, plan, epochs=2)
    assert not off["payload_equal"] and f"{predicted + 8:,}" in demo_check.check_failure(off)


@pytest.mark.slow
def test_every_json_the_demo_writes_is_strict(quick_demo):
    """RFC 8259 has no NaN or Infinity: a strict parser reads every file we write."""
    def refuse(name):
        raise ValueError(f"bare {name}")
    out, _ = quick_demo
    files = sorted(out.rglob("*.json"))
    assert len(files) >= 4
    for f in files:
        json.loads(f.read_text(), parse_constant=refuse)
