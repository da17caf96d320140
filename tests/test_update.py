"""`shardtrain update`: a delta applied to a shard directory equals a split from scratch.

Oracle: the new graph is built independently with networkx (its Graph's edge removal and
addition, the reference library's own set semantics), its shards built from scratch with
the update's final assignment (`build_shards` + `save_shards`, and `split --assignment`
through the CLI), and every array of every shard file and the manifest compared.
The Fennel placement of a new vertex is checked on a hand-computed worked example.
"""
from __future__ import annotations

import json
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
from helpers import depot_graph, save_graph

from shardtrain.data.graph import Graph, csr_from_edges, fingerprint
from shardtrain.plan import update as upd
from shardtrain.plan.partition import partition_plan, place_vertices
from shardtrain.plan.shards import build_shards, load_manifest, save_shards


def _edges(g: Graph) -> np.ndarray:
    rows = np.repeat(np.arange(g.num_vertices), g.degrees)
    up = rows < g.indices
    return np.stack([rows[up], g.indices[up]], axis=1)


def _split(g: Graph, method: str, k: int, path: Path, seed: int = 0) -> np.ndarray:
    """What `shardtrain split` writes for an in-memory graph (same meta keys)."""
    a, details = partition_plan(g, method, k, seed=seed)
    meta = {"method": method, "seed": seed, "imbalance": 0.03,
            "graph_fingerprint": fingerprint(g), "num_edges": g.num_edges,
            "input_dim": g.input_dim, "source": "test", "num_classes": g.num_classes,
            "partition": details}
    save_shards(path, build_shards(g, a, k), meta=meta)
    return a


def _delta(tmp: Path, g: Graph, *, add: int, remove: int, new: int, seed: int = 5):
    """Delta files: `new` vertices (features, labels, a train mask), `add` edge rows among
    old and new vertices, `remove` existing edges."""
    rng = np.random.default_rng(seed)
    n = g.num_vertices
    files = {}
    if new:
        files["add_vertices"] = tmp / "v.npz"
        np.savez(files["add_vertices"], features=rng.normal(size=(new, g.input_dim)),
                 labels=rng.integers(0, 4, new), train_mask=rng.random(new) < 0.5)
    if add:
        files["add_edges"] = tmp / "add.txt"
        e = np.stack([rng.integers(0, n + new, add), rng.integers(0, n + new, add)], 1)
        e[:new, 0] = np.arange(n, n + new)[:add]     # every new vertex gets a route
        np.savetxt(files["add_edges"], e, fmt="%d")
    if remove:
        files["remove_edges"] = tmp / "rem.csv"
        e = _edges(g)
        np.savetxt(files["remove_edges"], e[rng.choice(e.shape[0], remove, replace=False)],
                   fmt="%d", delimiter=",")
    return files


def _networkx_graph(g: Graph, files: dict) -> Graph:
    """The new graph by networkx: remove, then add, new vertex data appended."""
    G = nx.Graph()
    n = g.num_vertices
    G.add_nodes_from(range(n))
    G.add_edges_from(map(tuple, _edges(g)))
    x, y = g.features, g.labels
    masks = [g.train_mask, g.val_mask, g.test_mask]
    if "remove_edges" in files:
        G.remove_edges_from(map(tuple, np.loadtxt(files["remove_edges"], delimiter=",",
                                                  dtype=np.int64, ndmin=2)))
    if "add_vertices" in files:
        with np.load(files["add_vertices"]) as z:
            nv = z["features"].shape[0]
            G.add_nodes_from(range(n, n + nv))
            x = np.concatenate([x, z["features"].astype(x.dtype)])
            y = np.concatenate([y, z["labels"]])
            masks = [np.concatenate([masks[0], z["train_mask"]]),
                     np.concatenate([masks[1], np.zeros(nv, bool)]),
                     np.concatenate([masks[2], np.zeros(nv, bool)])]
    if "add_edges" in files:
        G.add_edges_from(map(tuple, np.loadtxt(files["add_edges"], dtype=np.int64, ndmin=2)))
    G.remove_edges_from(nx.selfloop_edges(G))
    e = np.array(G.edges(), dtype=np.int64).reshape(-1, 2)
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], G.number_of_nodes())
    return Graph(indptr, indices, x, y, *masks)


def _shard_files_equal(a: Path, b: Path) -> None:
    ma, mb = load_manifest(a), load_manifest(b)
    assert ma == mb
    for name in ma["files"]:
        with np.load(a / name) as za, np.load(b / name) as zb:
            assert sorted(za.files) == sorted(zb.files), name
            for key in za.files:
                x, y = za[key], zb[key]
                assert x.dtype == y.dtype and x.shape == y.shape, (name, key)
                assert np.array_equal(x, y), (name, key)


CASES = {"removals": dict(add=0, remove=25, new=0),
         "additions": dict(add=40, remove=0, new=10),
         "both": dict(add=40, remove=25, new=10)}


@pytest.mark.parametrize("method", ["metis", "fennel", "random"])
@pytest.mark.parametrize("case", list(CASES))
def test_update_equals_a_split_from_scratch(tmp_path, method, case):
    g = depot_graph()
    k = 4
    old = _split(g, method, k, tmp_path / "old")
    files = _delta(tmp_path, g, **CASES[case])
    res = upd.update_plan(tmp_path / "old", tmp_path / "new", fresh=False, **files)
    expected = _networkx_graph(g, files)
    held = upd.read_shard_graph(tmp_path / "new")
    assert np.array_equal(held.graph.indptr, expected.indptr)
    assert np.array_equal(held.graph.indices, expected.indices)
    a = held.assignment
    assert np.array_equal(a[:g.num_vertices], old)          # existing vertices stay put
    # from scratch: the networkx graph, the update's assignment, the same meta
    meta = load_manifest(tmp_path / "new")["meta"]
    assert meta["graph_fingerprint"] == fingerprint(expected)
    save_shards(tmp_path / "scratch", build_shards(expected, a, k), meta=meta)
    _shard_files_equal(tmp_path / "new", tmp_path / "scratch")
    assert res.report["delta"]["edges_removed"] == CASES[case]["remove"]


def _grid(side: int = 16) -> Graph:
    """A side x side grid of depots (networkx's grid_2d_graph), with features and labels."""
    G = nx.convert_node_labels_to_integers(nx.grid_2d_graph(side, side))
    e = np.array(G.edges(), dtype=np.int64)
    n = side * side
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], n)
    rng = np.random.default_rng(0)
    train = rng.random(n) < 0.2
    return Graph(indptr, indices, rng.normal(size=(n, 8)), rng.integers(0, 3, n), train,
                 ~train, np.zeros(n, bool))


def test_a_small_delta_rebuilds_only_the_shards_it_changes(tmp_path):
    g = _grid()
    k = 4
    a = _split(g, "metis", k, tmp_path / "old")
    # a new route between two depots of worker 0 whose neighbours are all on worker 0:
    # only worker 0's rows of Â change (the touched rows and their neighbours' rows)
    structure = nx.Graph(list(map(tuple, _edges(g))))
    inner = [v for v in np.flatnonzero(a == 0) if all(a[u] == 0 for u in structure[v])]
    u, v = next((u, v) for u in inner for v in inner if u < v and v not in structure[u])
    (tmp_path / "add.txt").write_text(f"{u} {v}\n")
    res = upd.update_plan(tmp_path / "old", tmp_path / "new",
                          add_edges=tmp_path / "add.txt", fresh=False)
    assert res.report["rebuilt"] == [0] and res.report["kept"] == [1, 2, 3]
    expected = _networkx_graph(g, {"add_edges": tmp_path / "add.txt"})
    meta = load_manifest(tmp_path / "new")["meta"]
    save_shards(tmp_path / "scratch", build_shards(expected, a, k), meta=meta)
    _shard_files_equal(tmp_path / "new", tmp_path / "scratch")


def test_the_oracle_catches_a_shard_kept_when_its_values_change(tmp_path, monkeypatch):
    """Changing a degree changes Â in the neighbours' rows: an update that rebuilt only the
    owners of the touched vertices would keep stale shards, and the comparison sees it."""
    g = depot_graph()
    k = 4
    a = _split(g, "metis", k, tmp_path / "old")
    files = _delta(tmp_path, g, add=3, remove=0, new=0)
    monkeypatch.setattr(upd, "changed_workers",
                        lambda graph, assignment, touched, k: np.unique(assignment[touched]))
    upd.update_plan(tmp_path / "old", tmp_path / "new", fresh=False, **files)
    expected = _networkx_graph(g, files)
    meta = load_manifest(tmp_path / "new")["meta"]
    save_shards(tmp_path / "scratch", build_shards(expected, a, k), meta=meta)
    with pytest.raises(AssertionError):
        _shard_files_equal(tmp_path / "new", tmp_path / "scratch")


def test_read_shard_graph_gives_back_the_graph_that_was_split(tmp_path):
    g = depot_graph()
    a = _split(g, "metis", 4, tmp_path / "s")
    held = upd.read_shard_graph(tmp_path / "s")
    assert fingerprint(held.graph) == fingerprint(g)
    assert np.array_equal(held.assignment, a)
    assert held.notes == []


def test_fennel_places_a_new_vertex_as_worked_by_hand():
    """Worked example (Fennel's score, Tsourakakis et al. WSDM 2014, as `fennel` uses it;
    numbers by hand): P0 = K6 on 0..5 (15 edges), P1 = K3 on 6..8 (3 edges), bridge 5-6,
    new vertex 9 adjacent to 0, 1 and 6: n = 10, m = 22, k = 2.
    alpha = sqrt(2) * 22 / 10^1.5 = 0.98387, alpha * gamma = 1.47580;
    score(P0) = 2 - 1.47580 * sqrt(6) = -1.61497, score(P1) = 1 - 1.47580 * sqrt(3) = -1.55617,
    so 9 goes to P1 although it has more neighbours in P0. The load limit with
    imbalance 0.5 is int(1.5 * 10 / 2) = 7, so both parts are open."""
    e = [(i, j) for i in range(6) for j in range(i + 1, 6)] + [(6, 7), (6, 8), (7, 8), (5, 6),
                                                            (9, 0), (9, 1), (9, 6)]
    src, dst = np.array(e).T
    indptr, indices, _ = csr_from_edges(src, dst, 10)
    g = Graph(indptr, indices)
    assert g.num_edges == 22
    start = np.array([0] * 6 + [1] * 3 + [0])
    placed = place_vertices(g, start, np.array([9]), 2, imbalance=0.5)
    assert placed[9] == 1 and np.array_equal(placed[:9], start[:9])
    # with one more neighbour in P0 (vertex 2), the count wins: 3 - 3.61497 > -1.55617
    e2 = e + [(9, 2)]
    src, dst = np.array(e2).T
    indptr, indices, _ = csr_from_edges(src, dst, 10)
    # m = 23: alpha * gamma = 1.5 * sqrt(2) * 23 / 10^1.5 = 1.54288;
    # 3 - 1.54288 sqrt(6) = -0.77925 > 1 - 1.54288 sqrt(3) = -1.67238
    assert place_vertices(Graph(indptr, indices), start, np.array([9]), 2, imbalance=0.5)[9] == 0


def test_update_cli_equals_split_with_the_same_assignment(tmp_path, run_cli):
    g = depot_graph()
    save_graph(tmp_path / "g.npz", g)
    r = run_cli("split", tmp_path / "g.npz", "--workers", "4", "--method", "metis",
                "--out", tmp_path / "old")
    assert r.returncode == 0, r.stderr
    files = _delta(tmp_path, g, add=30, remove=20, new=8)
    args = []
    for key, path in files.items():
        args += ["--" + key.replace("_", "-"), path]
    r = run_cli("update", tmp_path / "old", *args, "--out", tmp_path / "new",
                "--json", tmp_path / "u.json")
    assert r.returncode == 0, r.stderr
    assert "before" in r.stdout and "fresh" in r.stdout
    report = json.loads((tmp_path / "u.json").read_text())
    assert report["format"] == "shardtrain-update" and report["fresh"] is not None
    # the new graph as a file, split with the update's assignment through the CLI
    expected = _networkx_graph(g, files)
    save_graph(tmp_path / "new.npz", expected)
    np.save(tmp_path / "a.npy", upd.read_shard_graph(tmp_path / "new").assignment)
    r = run_cli("split", tmp_path / "new.npz", "--assignment", tmp_path / "a.npy",
                "--out", tmp_path / "scratch")
    assert r.returncode == 0, r.stderr
    mu, ms = load_manifest(tmp_path / "new"), load_manifest(tmp_path / "scratch")
    for key in set(mu) | set(ms):
        if key not in ("method", "meta"):        # "metis, updated" vs "assignment"
            assert mu[key] == ms[key], key
    for name in mu["files"]:
        with np.load(tmp_path / "new" / name) as zu, np.load(tmp_path / "scratch" / name) as zs:
            assert sorted(zu.files) == sorted(zs.files)
            for key in zu.files:
                assert np.array_equal(zu[key], zs[key]), (name, key)


def _bad(run_cli, tmp_path, *args):
    r = run_cli("update", tmp_path / "old", *args, "--out", tmp_path / "new")
    assert r.returncode == 2, r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.stderr
    assert not (tmp_path / "new").exists()
    return r.stderr


def test_bad_deltas_are_refused_naming_the_file_and_line(tmp_path, run_cli):
    g = depot_graph()
    _split(g, "metis", 4, tmp_path / "old")
    n = g.num_vertices
    (tmp_path / "far.txt").write_text(f"0 1\n2 {n + 3}\n")
    err = _bad(run_cli, tmp_path, "--add-edges", tmp_path / "far.txt")
    assert f"far.txt:2: vertex {n + 3} neither exists" in err
    e = _edges(g)
    missing = next((u, v) for u in range(n) for v in range(u + 1, n)
                   if not ((e[:, 0] == u) & (e[:, 1] == v)).any())
    (tmp_path / "rem.txt").write_text(f"{e[0, 0]} {e[0, 1]}\n{missing[0]} {missing[1]}\n")
    err = _bad(run_cli, tmp_path, "--remove-edges", tmp_path / "rem.txt")
    assert "rem.txt:2: edge" in err and "--allow-missing" in err
    r = run_cli("update", tmp_path / "old", "--remove-edges", tmp_path / "rem.txt",
                "--allow-missing", "--no-fresh", "--out", tmp_path / "ok")
    assert r.returncode == 0, r.stderr
    assert "note: " in r.stderr and "rem.txt:2" in r.stderr
    np.savez(tmp_path / "wide.npz", features=np.zeros((3, g.input_dim + 1)))
    err = _bad(run_cli, tmp_path, "--add-vertices", tmp_path / "wide.npz")
    assert "wide.npz: key 'features'" in err and f"the graph's have {g.input_dim}" in err
    # an input given as the output is refused before any work
    r = run_cli("update", tmp_path / "old", "--add-edges", tmp_path / "far.txt",
                "--out", tmp_path / "old", "--overwrite")
    assert r.returncode == 2 and "Traceback" not in r.stderr


_TIMES = ("partition_s", "build_s", "partition_cpu_s", "build_cpu_s")


def _without(doc: dict, *, label: bool) -> dict:
    """A survey JSON without its timings (and, with `label`, the plan's name and source)."""
    doc = json.loads(json.dumps(doc))
    for plan in doc["plans"]:
        for key in _TIMES:
            plan.pop(key, None)
        if label:
            plan.pop("method")
            plan.pop("partition")
    if label:
        doc["graph"].pop("source")
    return doc


def test_survey_of_a_shard_dir_is_the_survey_of_its_graph_and_assignment(tmp_path, run_cli):
    g = depot_graph()
    _split(g, "metis", 4, tmp_path / "old")
    files = _delta(tmp_path, g, add=30, remove=20, new=8)
    upd.update_plan(tmp_path / "old", tmp_path / "new", fresh=False, **files)
    expected = _networkx_graph(g, files)
    held = upd.read_shard_graph(tmp_path / "new")
    meta = load_manifest(tmp_path / "new")["meta"]
    save_shards(tmp_path / "scratch", build_shards(expected, held.assignment, 4), meta=meta)
    save_graph(tmp_path / "new.npz", expected)
    np.save(tmp_path / "a.npy", held.assignment)
    docs = {}
    for name, args in (("new", [tmp_path / "new"]), ("scratch", [tmp_path / "scratch"]),
                       ("file", [tmp_path / "new.npz", "--assignment", tmp_path / "a.npy"])):
        r = run_cli("survey", *args, "--json", tmp_path / f"{name}.json")
        assert r.returncode == 0, r.stderr
        docs[name] = json.loads((tmp_path / f"{name}.json").read_text())
    assert docs["new"]["plans"][0]["method"] == "metis"
    assert _without(docs["new"], label=False)["plans"] == \
        _without(docs["scratch"], label=False)["plans"]
    assert _without(docs["new"], label=True) == _without(docs["file"], label=True)
    r = run_cli("survey", tmp_path / "new", "--method", "metis")
    assert r.returncode == 2 and "shard directory" in r.stderr


def test_repartition_above_writes_the_fresh_plan_when_the_update_drifted(tmp_path, run_cli):
    from shardtrain import documents

    g = depot_graph()
    _split(g, "metis", 4, tmp_path / "old")
    files = _delta(tmp_path, g, add=150, remove=60, new=40, seed=11)
    args = []
    for key, path in files.items():
        args += ["--" + key.replace("_", "-"), path]
    r = run_cli("update", tmp_path / "old", *args, "--out", tmp_path / "kept",
                "--json", tmp_path / "kept.json", "--repartition-above", "100000")
    assert r.returncode == 0, r.stderr
    kept = documents.validate(json.loads((tmp_path / "kept.json").read_text()), "update",
                              "kept.json")
    excess = kept["payload_excess_percent"]
    assert excess > 0          # the precondition of the case below: the update drifted
    assert not kept["repartitioned"] and kept["output_plan"] == "updated"
    r = run_cli("update", tmp_path / "old", *args, "--out", tmp_path / "fresh",
                "--json", tmp_path / "fresh.json", "--repartition-above", f"{excess / 2:g}")
    assert r.returncode == 0, r.stderr
    assert "wrote the FRESH plan" in r.stdout
    rep = documents.validate(json.loads((tmp_path / "fresh.json").read_text()), "update",
                             "fresh.json")
    assert rep["repartitioned"] and rep["output_plan"] == "fresh"
    assert rep["rebuilt"] == [0, 1, 2, 3]
    # the fresh plan is METIS's partition of the new graph, seed and limit of the old plan
    expected = _networkx_graph(g, files)
    a, _ = partition_plan(expected, "metis", 4, seed=0, imbalance=0.03)
    assert np.array_equal(upd.read_shard_graph(tmp_path / "fresh").assignment, a)
    meta = load_manifest(tmp_path / "fresh")["meta"]
    save_shards(tmp_path / "scratch", build_shards(expected, a, 4), meta=meta)
    _shard_files_equal(tmp_path / "fresh", tmp_path / "scratch")
    # the fresh plan's figures in the report are the survey's of that plan
    r = run_cli("survey", tmp_path / "fresh", "--json", tmp_path / "sv.json")
    plan = json.loads((tmp_path / "sv.json").read_text())["plans"][0]
    assert rep["fresh"]["epoch_payload_bytes"] == plan["epoch_payload_bytes"]
    assert rep["fresh"]["edge_cut"] == plan["edge_cut"]
    for name, figures in (("old", kept["before"]), ("kept", kept["after"])):
        r = run_cli("survey", tmp_path / name, "--json", tmp_path / "sv.json")
        plan = json.loads((tmp_path / "sv.json").read_text())["plans"][0]
        assert figures["epoch_payload_bytes"] == plan["epoch_payload_bytes"], name
        assert figures["replication_factor"] == plan["replication_factor"], name
        assert figures["owned_max_over_mean"] == plan["imbalance"]["owned"]["max_over_mean"]


def test_new_vertices_from_features_and_labels_files(tmp_path, run_cli):
    """--features/--labels give the same update as the same rows in an --add-vertices
    bundle (masks false): the shard files are equal array for array."""
    g = depot_graph()
    _split(g, "metis", 4, tmp_path / "old")
    rng = np.random.default_rng(4)
    x, y = rng.normal(size=(5, g.input_dim)), rng.integers(0, 4, 5)
    np.save(tmp_path / "x.npy", x)
    np.savetxt(tmp_path / "y.txt", y, fmt="%d")
    np.savez(tmp_path / "v.npz", features=x, labels=y)
    n = g.num_vertices
    (tmp_path / "add.txt").write_text("".join(f"{n + i} {i}\n" for i in range(5)))
    a = ["--add-edges", tmp_path / "add.txt", "--no-fresh"]
    r = run_cli("update", tmp_path / "old", *a, "--features", tmp_path / "x.npy", "--labels",
                tmp_path / "y.txt", "--out", tmp_path / "files")
    assert r.returncode == 0, r.stderr
    r = run_cli("update", tmp_path / "old", *a, "--add-vertices", tmp_path / "v.npz",
                "--out", tmp_path / "bundle")
    assert r.returncode == 0, r.stderr
    mf, mb = load_manifest(tmp_path / "files"), load_manifest(tmp_path / "bundle")
    assert mf["split_id"] == mb["split_id"] and mf["num_vertices"] == n + 5
    np.savetxt(tmp_path / "y3.txt", y[:3], fmt="%d")
    err = _bad(run_cli, tmp_path, "--add-edges", tmp_path / "add.txt", "--features",
               tmp_path / "x.npy", "--labels", tmp_path / "y3.txt")
    assert "--labels" in err and "3 labels for 5" in err
