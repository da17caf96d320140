"""Graph input: every format gives the same Graph; cleanup counts; headers and comments;
vertex-data files; split masks; atomic output files."""
from __future__ import annotations

import os

import networkx as nx
import numpy as np
import pytest
import scipy.io
import scipy.sparse as sp

from shardtrain.data import textscan
from shardtrain.data.readers import load_features, load_graph, load_labels, make_masks
from shardtrain.errors import InputError
from shardtrain.files import (
    atomic_directory,
    atomic_output,
    save_npz_atomic,
    write_json_atomic,
    write_text_atomic,
)

# a small graph with one self-loop (3,3), one repeat (0,1) and one reverse repeat (2,1)
EDGES = np.array([[0, 1], [1, 2], [2, 0], [3, 3], [3, 4], [0, 1], [2, 1], [4, 5], [5, 6]])
N = 7


def nx_reference(edges, n):
    """networkx's simple undirected graph of the same edge list (reference library)."""
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(map(tuple, edges))
    g.remove_edges_from(nx.selfloop_edges(g))
    return g


def assert_matches_nx(graph, edges, n):
    ref = nx_reference(edges, n)
    a = nx.to_scipy_sparse_array(ref, nodelist=range(n), format="csr")
    assert graph.num_vertices == n
    assert graph.num_edges == ref.number_of_edges()
    assert np.array_equal(graph.indptr, a.indptr)
    assert np.array_equal(graph.indices, a.indices)
    assert graph.indptr.dtype == np.int64 and graph.indices.dtype == np.int64


def write_lines(path, lines):
    path.write_text("".join(line + "\n" for line in lines))
    return path


@pytest.mark.parametrize("suffix,sep", [(".csv", ","), (".tsv", "\t"), (".txt", " "),
                                        (".edges", "  ")])
def test_edge_lists_match_networkx(tmp_path, suffix, sep):
    lines = ["# parcel routes", "% second comment style"] if sep != "," else ["# routes"]
    lines += [f"{u}{sep}{v}" for u, v in EDGES]
    loaded = load_graph(write_lines(tmp_path / f"g{suffix}", lines))
    assert_matches_nx(loaded.graph, EDGES, N)
    assert (loaded.cleanup.self_loops, loaded.cleanup.duplicates) == (1, 2)


def test_npz_and_mtx_match_the_edge_list(tmp_path):
    save_npz_atomic(tmp_path / "g.npz", edges=EDGES)
    assert_matches_nx(load_graph(tmp_path / "g.npz").graph, EDGES, N)
    # general real .mtx written by scipy (the reference writer); each entry is one edge
    coo = sp.coo_matrix((np.ones(len(EDGES)), (EDGES[:, 0], EDGES[:, 1])), shape=(N, N))
    coo.sum_duplicates()
    scipy.io.mmwrite(tmp_path / "g.mtx", coo)
    loaded = load_graph(tmp_path / "g.mtx")
    assert_matches_nx(loaded.graph, EDGES, N)
    assert loaded.cleanup.self_loops == 1
    # symmetric pattern: the stored triangle counts once, so nothing is called a duplicate
    ref = nx_reference(EDGES, N)
    sym = nx.to_scipy_sparse_array(ref, nodelist=range(N), format="coo")
    scipy.io.mmwrite(tmp_path / "s.mtx", sp.coo_matrix(sym), field="pattern",
                     symmetry="symmetric")
    loaded = load_graph(tmp_path / "s.mtx")
    assert_matches_nx(loaded.graph, EDGES, N)
    assert loaded.cleanup.duplicates == 0


def test_mtx_explicit_zero_is_not_an_edge(tmp_path):
    (tmp_path / "z.mtx").write_text("%%MatrixMarket matrix coordinate real general\n"
                                    "3 3 2\n1 2 1.0\n2 3 0.0\n")
    loaded = load_graph(tmp_path / "z.mtx")
    assert loaded.graph.num_edges == 1 and loaded.graph.num_vertices == 3
    assert any("explicit zero" in note for note in loaded.notes)


def test_header_line_is_skipped_and_noted(tmp_path):
    path = write_lines(tmp_path / "g.csv", ["# depots", "from,to", "0,1", "1,2"])
    loaded = load_graph(path)
    assert loaded.graph.num_edges == 2
    assert any("header line 2" in note for note in loaded.notes)


def test_isolated_vertices_from_num_vertices_and_features(tmp_path):
    save_npz_atomic(tmp_path / "g.npz", edges=EDGES, num_vertices=10)
    assert load_graph(tmp_path / "g.npz").graph.num_vertices == 10
    x = np.arange(12 * 3, dtype=np.float64).reshape(12, 3)
    np.save(tmp_path / "x.npy", x)
    write_lines(tmp_path / "g.txt", [f"{u} {v}" for u, v in EDGES])
    loaded = load_graph(tmp_path / "g.txt", features=tmp_path / "x.npy")
    assert loaded.graph.num_vertices == 12 and loaded.graph.degrees[7:].sum() == 0
    assert loaded.graph.features.dtype == np.float64      # float64 input stays float64
    assert np.array_equal(loaded.graph.features, x)
    assert loaded.input_dim == 3


def test_scanner_and_loadtxt_agree_across_chunks(tmp_path, monkeypatch):
    rng = np.random.default_rng(5)
    edges = rng.integers(0, 1000, size=(3000, 2))
    # mixed separators defeat np.loadtxt, so the byte scanner reads this file
    lines = ["# c"] + [f"{u},{v}" if i % 3 else f"{u}\t {v}" for i, (u, v) in enumerate(edges)]
    path = write_lines(tmp_path / "mixed.csv", lines)
    monkeypatch.setattr(textscan, "_CHUNK_BYTES", 97)      # many chunks, lines split across reads
    table = textscan.TextTable(path, kind="int", columns=2, what="edges")
    assert table._read_fast() is None      # the file really took the scanner's path
    assert np.array_equal(table.values.reshape(-1, 2), edges)
    assert table.line_of_row(2999) == 3001
    loaded = load_graph(path)
    assert_matches_nx(loaded.graph, edges, int(edges.max()) + 1)
    # a bad line far from the start is still named by its line number
    lines[2500] = "12,oops"
    with pytest.raises(InputError, match=r"mixed\.csv:2501: 'oops' is not an integer"):
        load_graph(write_lines(tmp_path / "mixed.csv", lines))


def test_features_csv_and_labels_text(tmp_path):
    x = np.array([[0.5, -1.0], [2.0, 3.25], [1e-3, 4.0]])
    write_lines(tmp_path / "x.csv", ["volume,area", *[f"{a},{b}" for a, b in x]])
    got = load_features(tmp_path / "x.csv")
    assert got.dtype == np.float32 and np.allclose(got, x)
    write_lines(tmp_path / "y.txt", ["# role", "1", "-1", "0"])
    assert load_labels(tmp_path / "y.txt").tolist() == [1, -1, 0]
    np.save(tmp_path / "y.npy", np.array([1, -1, 0], dtype=np.int32))
    y = load_labels(tmp_path / "y.npy")
    assert y.dtype == np.int64 and y.tolist() == [1, -1, 0]
    write_lines(tmp_path / "g.txt", ["0 1", "1 2"])
    loaded = load_graph(tmp_path / "g.txt", features=tmp_path / "x.csv",
                        labels=tmp_path / "y.txt", seed=3)
    g = loaded.graph
    assert g.train_mask.tolist() == [True, False, True]  # 1 labelled per class: both train
    assert not (g.val_mask | g.test_mask).any()


def test_input_dim_without_features(tmp_path):
    write_lines(tmp_path / "g.txt", ["0 1"])
    assert load_graph(tmp_path / "g.txt", input_dim=16).input_dim == 16
    assert load_graph(tmp_path / "g.txt").input_dim is None


def test_masks_from_bundle_are_kept(tmp_path):
    labels = np.array([0, 1, 0, 1, -1, 0, 1])
    train = np.array([1, 1, 0, 0, 0, 0, 0], bool)
    val = np.array([0, 0, 1, 1, 0, 0, 0], bool)
    test = np.array([0, 0, 0, 0, 0, 1, 1], bool)
    save_npz_atomic(tmp_path / "g.npz", edges=EDGES, labels=labels, train_mask=train,
                    val_mask=val, test_mask=test)
    g = load_graph(tmp_path / "g.npz").graph
    assert np.array_equal(g.train_mask, train) and np.array_equal(g.test_mask, test)
    assert g.labels.dtype == np.int64


# ----------------------------------------------------------------------------- make_masks

def test_make_masks_follows_the_gcn_protocol():
    # Kipf & Welling (ICLR 2017): 20 labelled vertices per class train, 500 val, 1000 test
    rng = np.random.default_rng(0)
    labels = rng.integers(0, 7, size=5000)
    labels[rng.random(5000) < 0.1] = -1
    train, val, test = make_masks(labels, seed=4)
    assert np.array_equal(np.bincount(labels[train], minlength=7), np.full(7, 20))
    assert val.sum() == 500 and test.sum() == 1000
    assert not (train & val).any() and not (train & test).any() and not (val & test).any()
    assert (labels[train | val | test] >= 0).all()
    again = make_masks(labels, seed=4)
    assert all(np.array_equal(a, b) for a, b in zip((train, val, test), again))
    other = make_masks(labels, seed=5)
    assert not np.array_equal(train, other[0])


def test_make_masks_scales_down_on_small_data():
    labels = np.repeat(np.arange(3), [30, 8, 1])
    train, val, test = make_masks(labels, seed=0)
    assert np.bincount(labels[train], minlength=3).tolist() == [15, 4, 1]
    rest = 39 - 20
    assert val.sum() + test.sum() == rest
    assert val.sum() == (rest * 500) // 1500
    assert not (train & val).any() and not (val & test).any() and not (train & test).any()


# ----------------------------------------------------------------------------- atomic files

def no_temp_left(folder):
    return not [p for p in os.listdir(folder) if p.startswith(".") and "tmp" in p]


def test_atomic_output_keeps_old_file_on_error(tmp_path):
    target = tmp_path / "out.json"
    write_json_atomic(target, {"plans": [1, 2]})
    assert target.read_text() == '{\n "plans": [\n  1,\n  2\n ]\n}\n'
    with pytest.raises(RuntimeError):
        with atomic_output(target) as tmp:
            assert tmp.parent == tmp_path and tmp.name.startswith(".") and "tmp" in tmp.name
            tmp.write_text("half")
            raise RuntimeError("boom")
    assert target.read_text().startswith('{\n "plans"')
    assert no_temp_left(tmp_path)
    write_text_atomic(tmp_path / "t.txt", "x\n")
    assert (tmp_path / "t.txt").read_text() == "x\n" and no_temp_left(tmp_path)


def test_save_npz_atomic_refuses_object_arrays(tmp_path):
    with pytest.raises(TypeError):
        save_npz_atomic(tmp_path / "a.npz", bad=np.array([{}], dtype=object))
    assert not (tmp_path / "a.npz").exists() and no_temp_left(tmp_path)
    save_npz_atomic(tmp_path / "a.npz", x=np.arange(4))
    with np.load(tmp_path / "a.npz", allow_pickle=False) as z:
        assert z["x"].tolist() == [0, 1, 2, 3]


def test_atomic_directory(tmp_path):
    target = tmp_path / "shards"
    with atomic_directory(target) as tmp:
        (tmp / "a").write_text("1")
    assert (target / "a").read_text() == "1"
    with pytest.raises(InputError, match="not empty"):
        with atomic_directory(target):
            pass
    with pytest.raises(RuntimeError):
        with atomic_directory(target, overwrite=True) as tmp:
            (tmp / "b").write_text("2")
            raise RuntimeError("half-built")
    assert sorted(os.listdir(target)) == ["a"]
    with atomic_directory(target, overwrite=True) as tmp:
        (tmp / "b").write_text("2")
    assert sorted(os.listdir(target)) == ["b"]
    assert no_temp_left(tmp_path)


def test_feature_scanner_across_chunks(tmp_path, monkeypatch):
    rng = np.random.default_rng(2)
    x = rng.standard_normal((400, 3))
    # mixed separators again force the byte scanner; repr() keeps every float exact
    # 30 comment lines fill whole chunks with no data (np.fromstring reads blanks as [-1.])
    lines = ["volume,area,staff"] + ["% weekly"] * 30 + [
        f"{a!r},{b!r}\t{c!r}" if i % 2 else f"{a!r} {b!r} {c!r}"
        for i, (a, b, c) in enumerate(x.tolist())]
    monkeypatch.setattr(textscan, "_CHUNK_BYTES", 113)
    got = load_features(write_lines(tmp_path / "x.csv", lines))
    assert np.array_equal(got, x.astype(np.float32))
    lines[330] = "1.0,two,3.0"
    with pytest.raises(InputError, match=r"x\.csv:331: 'two' is not a number"):
        load_features(write_lines(tmp_path / "x.csv", lines))
    lines[330] = "1.0,inf,3.0"
    with pytest.raises(InputError, match=r"x\.csv:331: NaN or infinite"):
        load_features(write_lines(tmp_path / "x.csv", lines))
