"""Survey: predicted traffic, replication and edge cut against independent counts."""
from __future__ import annotations

import csv
import json

import networkx as nx
import numpy as np
import pytest

from shardtrain.data.graph import Graph, csr_from_edges
from shardtrain.plan import survey as sv
from shardtrain.plan.schedule import layer_dims, layer_hops
from shardtrain.plan.shards import build_shards


def graph_from_nx(g: nx.Graph, input_dim: int | None = None, classes: int = 0,
                  seed: int = 0) -> Graph:
    n = g.number_of_nodes()
    e = np.array(list(g.edges()), dtype=np.int64).reshape(-1, 2)
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], n)
    rng = np.random.default_rng(seed)
    feats = None if input_dim is None else rng.normal(size=(n, input_dim)).astype(np.float32)
    labels = None if not classes else rng.integers(0, classes, n).astype(np.int64)
    return Graph(indptr, indices, features=feats, labels=labels)


def brute_force_traffic(g: nx.Graph, assignment, k, dims, itemsize):
    """Bytes per epoch counted from networkx alone and the rules of docs/design.md (§1.2,
    §1.4): a layer exchanges min(d_in, d_out) columns per halo row (transform first when
    d_out < d_in); gradients go back at that width, except for layer 0 in aggregate-first
    order (no gradient needed)."""
    owned = [{v for v in g if assignment[v] == p} for p in range(k)]
    # halo of p = vertices outside p adjacent to p (networkx node_boundary)
    halo = [nx.node_boundary(g, owned[p]) for p in range(k)]
    fwd_rows = np.zeros((k, k), dtype=np.int64)   # [p, q] rows p sends q
    for q in range(k):
        for v in halo[q]:
            fwd_rows[assignment[v], q] += 1
    bwd_rows = fwd_rows.T                          # p returns gradients of its halo rows to q
    fwd_w = sum(min(a, b) for a, b in dims)
    bwd_w = sum(0 if (l == 0 and b >= a) else min(a, b) for l, (a, b) in enumerate(dims))
    return {"forward": int(fwd_rows.sum()) * fwd_w * itemsize,
            "backward": int(bwd_rows.sum()) * bwd_w * itemsize,
            "pair": (fwd_rows * fwd_w + bwd_rows * bwd_w) * itemsize,
            "halo": np.array([len(h) for h in halo]), "send_rows": fwd_rows}


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("k", [2, 3, 5])
@pytest.mark.parametrize("input_dim,layers", [(10, 3), (40, 2)])
def test_traffic_equals_brute_force(seed, k, input_dim, layers):
    # (10, 3): dims 10-16-16-3 -> aggregate-first, aggregate-first, transform-first;
    # (40, 2): dims 40-16-3 -> transform-first in both layers (layer 0 then needs backward).
    g = nx.gnm_random_graph(60, 150, seed=seed)
    graph = graph_from_nx(g)
    a = np.random.default_rng(seed).integers(0, k, 60)
    dims = layer_dims(input_dim, 16, 3, layers)
    hops = layer_hops(dims)
    assert {h.transform_first for h in hops} == ({False, True} if layers == 3 else {True})
    for itemsize in (4, 8):
        shards = build_shards(graph, a, k, with_vertex_data=False)
        t = sv.predict_traffic(shards, hops, itemsize, param_elements=100)
        ref = brute_force_traffic(g, a, k, dims, itemsize)
        assert t["forward_bytes"] == ref["forward"]
        assert t["backward_bytes"] == ref["backward"]
        assert t["eval_forward_bytes"] == ref["forward"]
        np.testing.assert_array_equal(np.array(t["pair_bytes"]), ref["pair"])
        np.testing.assert_array_equal(np.array(t["send_rows"]), ref["send_rows"])
        assert sum(p["forward_bytes"] for p in t["per_layer"]) == ref["forward"]
        assert [p["transform_first"] for p in t["per_layer"]] == \
            [b < a_ for a_, b in dims]


def test_breakdown_sums_to_run_payload():
    g = nx.gnm_random_graph(80, 200, seed=4)
    graph = graph_from_nx(g)
    a = np.random.default_rng(4).integers(0, 4, 80)
    hops = layer_hops(layer_dims(12, 8, 3, 3))
    shards = build_shards(graph, a, 4, with_vertex_data=False)
    t = sv.predict_traffic(shards, hops, 4, param_elements=12 * 8 + 8 * 8 + 8 * 3)
    parts = sv.predict_payload_breakdown(shards, hops, 4, param_elements=12 * 8 + 8 * 8 + 8 * 3,
                                         epochs=7, evals=7)
    assert sum(parts.values()) == sv.predict_run_payload(t, 7, 7)
    assert sv.predict_run_payload(t, 7, 7) == \
        7 * (t["forward_bytes"] + t["backward_bytes"] + t["allreduce_bytes"] +
             t["eval_forward_bytes"])


@pytest.mark.parametrize("k", [2, 3, 4, 7, 16])
@pytest.mark.parametrize("size", [1, 5, 96, 1000, 12345])
def test_ring_allreduce_bytes(k, size):
    # Ring all-reduce (Patarasuk & Yuan 2009): each worker sends 2(k-1)/k of the gradient;
    # with size not divisible by k, chunks differ by one element, so each worker is within
    # two elements of the ideal and all workers together send exactly 2(k-1) x size.
    graph = graph_from_nx(nx.path_graph(k))
    shards = build_shards(graph, np.arange(k), k, with_vertex_data=False)
    t = sv.predict_traffic(shards, layer_hops(layer_dims(4, 4, 2, 2)), 8, param_elements=size)
    per_worker = np.array(t["allreduce_bytes_per_worker"]) / 8
    assert per_worker.shape == (k,)
    np.testing.assert_allclose(per_worker, 2 * (k - 1) / k * size, atol=2)
    assert t["allreduce_bytes"] == 2 * (k - 1) * size * 8


def test_replication_and_edge_cut_against_networkx():
    g = nx.connected_watts_strogatz_graph(200, 6, 0.1, seed=3)
    graph = graph_from_nx(g, input_dim=8, classes=3)
    hops = layer_hops(layer_dims(8, 16, 3, 2))
    for k in (2, 4):
        a = np.random.default_rng(k).integers(0, k, 200)
        plan = sv.survey_plan(graph, "given", k, hops=hops, itemsize=4, seed=0, imbalance=0.03,
                              assignment=a)
        parts = [{v for v in g if a[v] == p} for p in range(k)]
        # halo = networkx node_boundary of the owned set; edge cut = edges between parts
        halo = [len(nx.node_boundary(g, s)) for s in parts]
        assert [s["halo"] for s in plan["shards"]] == halo
        assert plan["replication_factor"] == pytest.approx((200 + sum(halo)) / 200)
        cut = sum(1 for u, v in g.edges() if a[u] != a[v])
        assert plan["edge_cut"] == cut
        if k == 2:
            assert plan["edge_cut"] == nx.cut_size(g, parts[0], parts[1])  # networkx
        # local edges: directed edges leaving owned rows = sum of owned degrees
        assert [s["local_edges"] for s in plan["shards"]] == \
            [sum(d for _, d in g.degree(s)) for s in parts]
        assert sum(s["bytes_sent"] for s in plan["shards"]) == \
            sum(s["bytes_received"] for s in plan["shards"])


def test_one_worker_has_zero_traffic():
    g = nx.gnm_random_graph(50, 120, seed=9)
    graph = graph_from_nx(g, input_dim=6, classes=2)
    plan = sv.survey_plan(graph, "given", 1, hops=layer_hops(layer_dims(6, 16, 2, 2)),
                          itemsize=4, seed=0, imbalance=0.03, assignment=np.zeros(50, int))
    t = plan["traffic"]
    assert (t["forward_bytes"], t["backward_bytes"], t["allreduce_bytes"]) == (0, 0, 0)
    assert t["pair_bytes"] == [[0]]
    assert plan["replication_factor"] == 1.0
    assert plan["edge_cut"] == 0


def test_memory_counts_the_model():
    # Not an external check: the prediction must grow with what the worker holds.
    g = nx.gnm_random_graph(300, 1200, seed=1)
    graph = graph_from_nx(g)
    a = np.random.default_rng(1).integers(0, 2, 300)
    s = build_shards(graph, a, 2, with_vertex_data=False)[0]
    small = layer_hops(layer_dims(8, 16, 3, 2))
    big = layer_hops(layer_dims(8, 64, 3, 2))
    m_small = sv.predict_memory(s, small, 4, param_elements=8 * 16 + 16 * 3, input_dim=8)
    m_big = sv.predict_memory(s, big, 4, param_elements=8 * 64 + 64 * 3, input_dim=8)
    m_f64 = sv.predict_memory(s, small, 8, param_elements=8 * 16 + 16 * 3, input_dim=8)
    assert sv.BASELINE_RSS_BYTES < m_small < m_big
    assert m_small < m_f64
    # the local CSR alone is at least part of it (scipy's own array sizes)
    assert m_small - sv.BASELINE_RSS_BYTES > s.adj.indptr.nbytes + s.adj.indices.nbytes


def test_parameter_count_matches_the_model():
    # the all-reduce carries model.flatten of the gradients: the survey must count the same
    from shardtrain.train import model

    for bias in (False, True):
        dims = layer_dims(37, 16, 5, 3)
        flat = model.flatten(model.glorot_init(dims, 0, np.float32, bias=bias))
        assert sv.parameter_elements(layer_hops(dims), bias=bias) == flat.size


def _random_graph(n, m, seed):
    rng = np.random.default_rng(seed)
    src, dst = rng.integers(0, n, m), rng.integers(0, n, m)
    indptr, indices, _ = csr_from_edges(src, dst, n)
    return Graph(indptr, indices)


def test_survey_up_to_1024_workers():
    pytest.importorskip("shardtrain.plan.partition")
    graph = _random_graph(20_000, 100_000, 5)
    settings = sv.SurveySettings(input_dim=32, classes=5)
    out = sv.survey(graph, ["random", "range"], [1, 16, 1024], settings)
    json.dumps(out)
    assert set(out) >= {"graph", "model", "plans"}
    assert out["graph"]["vertices"] == 20_000 and out["graph"]["edges"] == graph.num_edges
    assert len(out["plans"]) == 6
    for plan in out["plans"]:
        assert set(plan) >= {"method", "workers", "edge_cut", "replication_factor", "shards",
                             "traffic", "imbalance", "partition_s", "build_s"}
        assert set(plan["traffic"]) >= {"forward_bytes", "backward_bytes", "allreduce_bytes",
                                        "pair_bytes", "per_layer", "eval_forward_bytes"}
        assert set(plan["shards"][0]) >= {"worker", "owned", "halo", "local_edges",
                                          "memory_bytes", "bytes_sent", "bytes_received"}
        k = plan["workers"]
        assert len(plan["shards"]) == k and np.shape(plan["traffic"]["pair_bytes"]) == (k, k)
        assert sum(s["owned"] for s in plan["shards"]) == 20_000


# -- command line ---------------------------------------------------------------------

@pytest.fixture
def small_npz(tmp_path):
    pytest.importorskip("shardtrain.cli.common")
    pytest.importorskip("shardtrain.plan.partition")
    g = nx.connected_watts_strogatz_graph(300, 6, 0.1, seed=2)
    rng = np.random.default_rng(0)
    path = tmp_path / "depots.npz"
    np.savez(path, edges=np.array(list(g.edges()), dtype=np.int64),
             features=rng.normal(size=(300, 12)).astype(np.float32),
             labels=rng.integers(0, 4, 300).astype(np.int64))
    return path


def test_cli_writes_json_and_csv(run_cli, small_npz, tmp_path):
    out_json, out_csv = tmp_path / "plans.json", tmp_path / "plans.csv"
    r = run_cli("survey", small_npz, "--workers", "1,2,4", "--method", "random,range",
                "--json", out_json, "--csv", out_csv)
    assert r.returncode == 0, r.stderr
    assert "random" in r.stdout and "range" in r.stdout
    data = json.loads(out_json.read_text())
    assert len(data["plans"]) == 6 and data["graph"]["vertices"] == 300
    rows = list(csv.DictReader(out_csv.open()))
    assert len(rows) == 6
    assert {r_["method"] for r_ in rows} == {"random", "range"}
    assert [int(r_["forward_bytes"]) for r_ in rows] == \
        [p["traffic"]["forward_bytes"] for p in data["plans"]]


@pytest.mark.parametrize("args,option", [
    (["--method", "nosuch"], "--method"),
    (["--workers", "0"], "--workers"),
    (["--workers", "301"], "--workers"),
    (["--workers", "2,x"], "--workers"),
    (["--layers", "0"], "--layers"),
    (["--hidden", "x"], "--hidden"),
    (["--classes", "-3"], "--classes"),     # refused even when the graph has labels
    (["--imbalance", "lots"], "--imbalance"),
])
def test_cli_bad_options(run_cli, small_npz, tmp_path, args, option):
    out_json, out_csv = tmp_path / "bad.json", tmp_path / "bad.csv"
    base = {"--workers": "2", "--method": "random"}
    for key, value in zip(args[::2], args[1::2]):
        base[key] = value
    flat = [x for kv in base.items() for x in kv]
    r = run_cli("survey", small_npz, *flat, "--json", out_json, "--csv", out_csv)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and option in lines[0], r.stderr
    assert list(tmp_path.iterdir()) == [small_npz]


# -- text tables ----------------------------------------------------------------------

def test_human_bytes_uses_binary_prefixes():
    # IEC 80000-13 binary prefixes: 1 KiB = 1024 B, 1 MiB = 1024 KiB, 1 GiB = 1024 MiB
    from shardtrain.units import human_bytes

    assert human_bytes(0) == "0 B"
    assert human_bytes(1023) == "1023 B"
    assert human_bytes(1024) == "1.00 KiB"
    assert human_bytes(1536) == "1.50 KiB"
    assert human_bytes(5 * 2**30) == "5.00 GiB"
    assert human_bytes(123 * 2**20) == "123 MiB"


def test_format_table_aligns_columns():
    from shardtrain.report.tables import format_table

    text = format_table([{"m": "random", "k": 1024, "r": 1.5}, {"m": "range", "k": 2}],
                        [("m", "method", None), ("k", "workers", "{:,}"), ("r", "repl", "{:.2f}")])
    lines = text.splitlines()
    assert lines[0].split() == ["method", "workers", "repl"]
    assert lines[2].split() == ["random", "1,024", "1.50"]
    assert lines[3].split() == ["range", "2", "-"]
    # numbers right-aligned under their header: same end column
    end = lines[0].index("workers") + len("workers")
    assert lines[2][:end].endswith("1,024") and lines[3][:end].endswith("2")


def test_cli_surveys_a_given_assignment(run_cli, small_npz, tmp_path):
    import networkx as nx_  # the fixture's graph, rebuilt for the reference count

    g = nx_.connected_watts_strogatz_graph(300, 6, 0.1, seed=2)
    a = np.arange(300) * 3 // 300
    np.save(tmp_path / "mine.npy", a)
    out_json = tmp_path / "mine.json"
    r = run_cli("survey", small_npz, "--assignment", tmp_path / "mine.npy", "--json", out_json)
    assert r.returncode == 0, r.stderr
    (plan,) = json.loads(out_json.read_text())["plans"]
    assert plan["workers"] == 3
    # networkx: edges whose ends lie in different parts
    assert plan["edge_cut"] == sum(1 for u, v in g.edges() if a[u] != a[v])


# -- the survey's id-order shards against the trainer's locality-order shards ----------

def test_id_order_shards_predict_what_locality_order_shards_hold():
    # Not an external check: the survey builds shards in id order, the trainer in reverse
    # Cuthill-McKee order; every count the survey reads must be the same in both.
    g = nx.connected_watts_strogatz_graph(400, 8, 0.2, seed=6)
    graph = graph_from_nx(g)
    a = np.random.default_rng(6).integers(0, 5, 400)
    hops = layer_hops(layer_dims(24, 16, 4, 2))
    by_id = build_shards(graph, a, 5, with_vertex_data=False, order="id")
    by_locality = build_shards(graph, a, 5, with_vertex_data=False)
    assert any(not np.array_equal(s.owned, np.sort(s.owned)) for s in by_locality)
    t_id = sv.predict_traffic(by_id, hops, 4, param_elements=24 * 16 + 16 * 4)
    t_loc = sv.predict_traffic(by_locality, hops, 4, param_elements=24 * 16 + 16 * 4)
    assert t_id == t_loc
    for s_id, s_loc in zip(by_id, by_locality):
        assert (sv.predict_memory(s_id, hops, 4, param_elements=100, input_dim=24)
                == sv.predict_memory(s_loc, hops, 4, param_elements=100, input_dim=24))


def test_survey_plan_equals_the_trainers_measured_payload(tmp_path):
    # The trained run's byte counters are the outside measurement here: the survey's plan
    # (id-order shards, no process started) must predict them exactly.
    pytest.importorskip("shardtrain.train.coordinator")
    from helpers import depot_graph, run_partitioned

    from shardtrain.train.settings import TrainSettings

    graph = depot_graph(n=300, classes=3, features=20, seed=8)
    a = np.random.default_rng(8).integers(0, 3, 300)
    settings = TrainSettings(layers=2, hidden=16, epochs=2, dtype="float32")
    run, _ = run_partitioned(tmp_path, graph, a, 3, settings)
    hops = layer_hops(layer_dims(20, 16, graph.num_classes, 2))
    plan = sv.survey_plan(graph, "given", 3, hops=hops, itemsize=4, seed=0, imbalance=0.03,
                          assignment=a)
    predicted = sv.predict_run_payload(plan["traffic"], settings.epochs, settings.epochs)
    assert run.traffic["measured_payload_bytes"] == predicted > 0
