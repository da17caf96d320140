"""Pictures are real PNGs; the HTML report is one self-contained page."""
from __future__ import annotations

import base64
import json
import re

import numpy as np
import pytest

from shardtrain.forecast.calibrate import from_flops
from shardtrain.forecast.projection import forecast
from shardtrain.report import html as report
from shardtrain.report import plots

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"   # the PNG signature (PNG specification, W3C/ISO 15948)


def _survey(k_list=(2, 4, 16), methods=("range", "random")):
    """A survey-shaped dict (the schema `shardtrain survey --json` writes) for a ring-like
    graph of 64 vertices per worker: rows sent to the two ring neighbours (range) or to
    everyone (random)."""
    rng = np.random.default_rng(0)
    plans = []
    for m in methods:
        for k in k_list:
            if m == "range":
                s = np.zeros((k, k), dtype=np.int64)
                for p in range(k):
                    s[p, (p + 1) % k] += 8
                    s[p, (p - 1) % k] += 8
            else:
                s = rng.integers(1, 20, size=(k, k))
            np.fill_diagonal(s, 0)
            pair = (s * 16 * 4 + s.T * 16 * 4).tolist()
            halo = s.sum(axis=0)
            plans.append({
                "method": m, "workers": k, "edge_cut": int(s.sum()),
                "replication_factor": float(1 + halo.sum() / (64 * k)),
                "max_memory_bytes": 50 * 2**20,
                "shards": [{"worker": w, "owned": 64, "halo": int(halo[w]), "local_edges": 256,
                            "memory_bytes": 50 * 2**20} for w in range(k)],
                "traffic": {"forward_bytes": int(s.sum() * 64), "backward_bytes": int(s.sum() * 64),
                            "allreduce_bytes": 1000 * k, "send_rows": s.tolist(),
                            "pair_bytes": pair,
                            "allreduce_bytes_per_worker": [1000] * k},
                "imbalance": {"owned": {"max_over_mean": 1.0}, "halo": {"max": float(halo.max())}}})
    hops = [{"layer": 0, "d_in": 32, "d_out": 16, "transform_first": True, "forward_width": 16,
             "backward_width": 16},
            {"layer": 1, "d_in": 16, "d_out": 4, "transform_first": True, "forward_width": 4,
             "backward_width": 4}]
    return {"graph": {"vertices": 64 * max(k_list), "edges": 1000, "classes": 4},
            "model": {"layers": 2, "hidden": 16, "dtype": "float32", "dims": [[32, 16], [16, 4]],
                      "parameters": 32 * 16 + 16 * 4, "hops": hops},
            "plans": plans}


def _run(k=4, epochs=30):
    rng = np.random.default_rng(2)
    loss = np.exp(-np.arange(epochs) / 10) + 0.2
    return {"settings": {"workers": k, "method": "range", "epochs": epochs},
            "graph": {"vertices": 1024, "edges": 1000},   # the survey's graph
            "epochs": [{"epoch": e, "loss": float(loss[e]), "train_acc": 0.5 + e / 80,
                        "val_acc": 0.45 + e / 90, "test_acc": 0.44 + e / 95, "epoch_s": 0.01}
                       for e in range(epochs)],
            "traffic": {"measured_payload_bytes": 123456, "predicted_payload_bytes": 123456,
                        "pair_bytes": (rng.integers(0, 1000, (k, k)) * (1 - np.eye(k))).tolist()},
            "workers": [{"worker": w, "compute_s": 1.0 + 0.1 * w, "exchange_s": 0.3,
                         "allreduce_s": 0.1, "wait_s": 0.2 - 0.05 * w, "bytes_sent": 1000,
                         "bytes_received": 900, "cpu_s": 1.4, "peak_rss_bytes": 80 * 2**20}
                        for w in range(k)]}


def _forecast():
    return forecast(_survey(), link_gbps_list=[1, 10, 100], latency_us=20,
                    calibration=from_flops(2e9), target_epoch_s=1e-3)


def _assert_pngs(paths, n):
    assert len(paths) == n
    for p in paths:
        with open(p, "rb") as fh:
            data = fh.read()
        assert data.startswith(PNG_MAGIC) and len(data) > 5000, p


def test_survey_plots_write_pngs(tmp_path):
    _assert_pngs(plots.survey_plots(_survey(), tmp_path), 2)


def test_heatmap_plan_is_the_largest_with_least_traffic():
    chosen = plots.pick_heatmap_plan(_survey()["plans"])
    assert chosen["workers"] == 16 and chosen["method"] == "range"


def test_heatmap_for_64_workers(tmp_path):
    m = np.random.default_rng(0).integers(0, 10**6, (64, 64))
    np.fill_diagonal(m, 0)
    _assert_pngs([plots.traffic_heatmap(m, "64 workers", tmp_path, "h.png")], 1)


def test_run_plots_write_pngs(tmp_path):
    _assert_pngs(plots.run_plots(_run(), tmp_path), 3)


def test_forecast_plots_write_pngs(tmp_path):
    _assert_pngs(plots.forecast_plots(_forecast(), tmp_path), 2)


def test_document_kinds_are_detected_by_keys():
    assert report.document_kind(_survey()) == "survey"
    assert report.document_kind(_run()) == "run"
    assert report.document_kind(_forecast()) == "forecast"
    assert report.document_kind({"something": 1}) is None


def _check_self_contained(text: str) -> None:
    # no link to anything outside the page: no URLs, no external src/href, no scripts
    # (searched outside the embedded base64 data, where any letters may occur)
    markup = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "data:", text)
    assert not re.search(r"https?:|ftp:|//[a-z]|url\(|@import", markup, flags=re.I)
    assert "<script" not in text.lower() and "href=" not in text.lower()
    srcs = re.findall(r'src="([^"]*)"', text)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    for s in srcs:
        assert base64.b64decode(s.split(",", 1)[1]).startswith(PNG_MAGIC)


@pytest.mark.slow
def test_report_of_a_folder_is_self_contained(run_cli, tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "survey.json").write_text(json.dumps(_survey()))
    (folder / "run.json").write_text(json.dumps(_run()))
    (folder / "forecast.json").write_text(json.dumps(_forecast()))
    (folder / "other.json").write_text("{}")   # not ours: skipped in a folder
    out = tmp_path / "report.html"
    r = run_cli("report", folder, "--html", out)
    assert r.returncode == 0, r.stderr
    text = out.read_text()
    _check_self_contained(text)
    assert len(re.findall(r"<img ", text)) == 2 + 3 + 2
    for heading in ("Survey of partition plans", "Training run", "Forecast"):
        assert heading in text
    # the survey comes first, then the run, then the forecast
    assert text.index("Survey of") < text.index("Training run") < text.index("<h2>Forecast")


def test_report_bad_inputs_exit_2(run_cli, tmp_path):
    out = tmp_path / "r.html"
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    for args in ([bad], [tmp_path / "missing.json"], [tmp_path]):
        r = run_cli("report", *args, "--html", out)
        assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
        assert not out.exists()
    r = run_cli("report", bad, "--html", tmp_path / "nofolder" / "r.html")
    assert r.returncode == 2 and "--html" in r.stderr


def test_run_heatmap_counts_halo_rows_only():
    run = _run(k=2)
    run["traffic"]["breakdown"] = [
        {"src": 0, "dst": 1, "kind": "halo", "layer": 0, "direction": "forward",
         "measured_payload_bytes": 100},
        {"src": 0, "dst": 1, "kind": "halo", "layer": 0, "direction": "eval",
         "measured_payload_bytes": 50},
        {"src": 1, "dst": 0, "kind": "allreduce", "layer": -1, "direction": "all",
         "measured_payload_bytes": 999}]
    m, what = plots.measured_pair_bytes(run)
    assert m.tolist() == [[0, 150], [0, 0]] and "halo" in what


# ---------------------------------------------------------------- --plot and the run JSON

@pytest.fixture(scope="module")
def small_graph_file(tmp_path_factory):
    from helpers import depot_graph, save_graph

    path = tmp_path_factory.mktemp("plotgraph") / "depots.npz"
    save_graph(path, depot_graph(n=200))
    return path


@pytest.mark.slow
def test_train_and_survey_plot_option_write_pngs(run_cli, small_graph_file, tmp_path):
    r = run_cli("train", small_graph_file, "--workers", "2", "--method", "random",
                "--epochs", "3", "--quiet", "--json", tmp_path / "run.json",
                "--plot", tmp_path / "run-plots")
    assert r.returncode == 0, r.stderr
    _assert_pngs(sorted(map(str, (tmp_path / "run-plots").glob("*.png"))), 3)
    r = run_cli("survey", small_graph_file, "--workers", "2,4", "--method", "random,range",
                "--plot", tmp_path / "survey-plots")
    assert r.returncode == 0, r.stderr
    _assert_pngs(sorted(map(str, (tmp_path / "survey-plots").glob("*.png"))), 2)


def test_run_json_names_the_graph_size_as_the_survey_does(small_graph_file, tmp_path, run_cli):
    # reference library: networkx counts the vertices and undirected edges of the bundle
    import networkx as nx

    r = run_cli("train", small_graph_file, "--reference", "--epochs", "2", "--quiet",
                "--json", tmp_path / "ref.json")
    assert r.returncode == 0, r.stderr
    with np.load(small_graph_file, allow_pickle=False) as z:
        g = nx.Graph()
        g.add_nodes_from(range(int(z["num_vertices"])))
        g.add_edges_from(z["edges"].tolist())
    graph = json.loads((tmp_path / "ref.json").read_text())["graph"]
    assert (graph["vertices"], graph["edges"]) == (g.number_of_nodes(), g.number_of_edges())
    assert "num_vertices" not in graph and "num_edges" not in graph


@pytest.mark.slow
@pytest.mark.parametrize("command", ["train", "survey"])
def test_bad_plot_folder_is_refused_before_work(run_cli, small_graph_file, tmp_path, command):
    extra = ["--reference", "--epochs", "2"] if command == "train" else []
    for bad in (tmp_path / "missing" / "plots", small_graph_file):
        r = run_cli(command, small_graph_file, *extra, "--json", tmp_path / "out.json",
                    "--plot", bad)
        assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
        assert "--plot" in r.stderr and "Traceback" not in r.stderr
        assert not (tmp_path / "out.json").exists() and not (tmp_path / "missing").exists()


def test_survey_heatmap_draws_the_plan_asked_for(tmp_path, monkeypatch):
    doc = _survey()
    drawn = []
    real = plots.traffic_heatmap
    monkeypatch.setattr(plots, "traffic_heatmap", lambda pair, title, *rest: (
        drawn.append((pair, title)) or real(pair, title, *rest)))
    html_text = report.survey_section(doc, tmp_path, plan={"method": "random", "workers": 4})
    assert "survey traffic heatmap" in html_text
    want = next(p for p in doc["plans"] if p["method"] == "random" and p["workers"] == 4)
    assert drawn == [(want["traffic"]["pair_bytes"],
                      "predicted halo traffic per training epoch, random on 4 workers")]
    drawn.clear()
    report.survey_section(doc, tmp_path)           # default: the largest, least traffic
    assert drawn[0][1] == "predicted halo traffic per training epoch, range on 16 workers"
    assert report.find_plan(doc["plans"], {"method": "random", "workers": 4}) is \
        next(p for p in doc["plans"] if p["method"] == "random" and p["workers"] == 4)
    assert report.find_plan(doc["plans"], {"method": "random", "workers": 3}) is None


def test_build_html_keeps_pictures_in_plot_dir_and_puts_the_intro_first(tmp_path):
    docs = [("survey.json", "survey", _survey()), ("run.json", "run", _run())]
    page = report.build_html(docs, "t", plot_dir=tmp_path / "plots",
                             intro_html="<p>INTRO</p>")
    _check_self_contained(page)
    assert page.index("<p>INTRO</p>") < page.index("Survey of partition plans")
    assert len(list((tmp_path / "plots").glob("*.png"))) == 2 + 3


def test_method_styles_differ_in_marker_and_dash():
    styles = plots.method_styles(["metis", "metis-volume", "fennel", "random", "range"])
    looks = {(s["marker"], str(s["linestyle"])) for s in styles.values()}
    assert len({s["marker"] for s in styles.values()}) == 5
    assert len({str(s["linestyle"]) for s in styles.values()}) == 5 and len(looks) == 5
