"""Shards and halos against a brute force built from networkx neighbour lists."""
from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shardtrain.data.graph import Graph, csr_from_edges, normalized_adjacency
from shardtrain.plan.shards import Shard, build_shards, edge_cut, shard_stats


def graph_from_nx(G: nx.Graph, **data) -> Graph:
    n = G.number_of_nodes()
    e = np.array(list(G.edges()), dtype=np.int64).reshape(-1, 2)
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], n)
    return Graph(indptr, indices, **data)


def brute_force(G: nx.Graph, a: np.ndarray, k: int, p: int):
    """Halo groups and send lists of worker p from plain Python sets over networkx neighbours."""
    owned = [v for v in G if a[v] == p]
    halo = {q: sorted({u for v in owned for u in G[v] if a[u] == q}) for q in range(k) if q != p}
    send = {q: sorted({v for v in owned for u in G[v] if a[u] == q}) for q in range(k) if q != p}
    return sorted(owned), halo, send


@st.composite
def graphs_and_assignments(draw):
    n = draw(st.integers(1, 40))
    prob = draw(st.floats(0.0, 0.4))
    seed = draw(st.integers(0, 2**31 - 1))
    k = draw(st.integers(1, min(6, n)))
    a = np.array(draw(st.lists(st.integers(0, k - 1), min_size=n, max_size=n)), dtype=np.int64)
    return nx.gnp_random_graph(n, prob, seed=seed), a, k


def check_against_brute_force(G: nx.Graph, a: np.ndarray, k: int, order: str) -> None:
    g = graph_from_nx(G)
    a_hat = normalized_adjacency(g).toarray()
    shards = build_shards(g, a, k, order=order)
    assert [s.worker for s in shards] == list(range(k))
    # every vertex owned by exactly one worker
    all_owned = np.concatenate([s.owned for s in shards])
    assert np.array_equal(np.sort(all_owned), np.arange(G.number_of_nodes()))
    for s in shards:
        owned, halo, send = brute_force(G, a, k, s.worker)
        assert sorted(s.owned.tolist()) == owned
        if order == "id":
            assert s.owned.tolist() == owned
        assert s.halo_ptr.shape == (k + 1,) and s.send_ptr.shape == (k + 1,)
        assert s.halo_ptr[s.worker] == s.halo_ptr[s.worker + 1]
        for q in range(k):
            if q == s.worker:
                assert s.send_to(q).size == 0
                continue
            assert s.halo[s.halo_from(q)].tolist() == halo[q]
            assert s.owned[s.send_to(q)].tolist() == send[q]
            # q's halo group for this worker lists exactly the rows sent, in the same order
            assert np.array_equal(s.owned[s.send_to(q)],
                                  shards[q].halo[shards[q].halo_from(s.worker)])
        # local CSR = global Â rows, columns [owned | halo] mapped back to global ids
        cols = np.concatenate([s.owned, s.halo])
        assert s.adj.shape == (s.num_owned, cols.shape[0])
        assert s.adj.has_sorted_indices
        assert np.allclose(s.adj.toarray(), a_hat[np.ix_(s.owned, cols)], rtol=1e-15, atol=0)
        assert s.adj.nnz == sum(G.degree(v) + 1 for v in owned)
        assert set(s.peers()) == {q for q in range(k) if halo.get(q) or send.get(q)}


@settings(max_examples=60, deadline=None)
@given(graphs_and_assignments(), st.sampled_from(["locality", "id"]))
def test_shards_match_brute_force(case, order):
    # reference: networkx adjacency (neighbour sets) walked in plain Python
    G, a, k = case
    check_against_brute_force(G, a, k, order)


@pytest.mark.parametrize("order", ["locality", "id"])
def test_shards_match_brute_force_with_few_cut_edges(order):
    # a long path cut into blocks: each worker has far fewer outside neighbours than the
    # graph has vertices, which takes the sort branch of the halo build (not dense marks)
    G = nx.path_graph(600)
    nx.add_path(G, [5, 300, 595])
    a = np.array([3, 0, 4, 1, 2])[np.arange(600) * 5 // 600]   # owner order != id order
    check_against_brute_force(G, a, 5, order)


def test_vertex_data_follows_local_order():
    G = nx.gnp_random_graph(30, 0.2, seed=3)
    rng = np.random.default_rng(0)
    feats = rng.normal(size=(30, 3))
    labels = rng.integers(0, 3, 30)
    train = rng.random(30) < 0.4
    g = graph_from_nx(G, features=feats, labels=labels, train_mask=train)
    a = rng.integers(0, 3, 30)
    for s in build_shards(g, a, 3):
        assert np.array_equal(s.features, feats[s.owned])
        assert np.array_equal(s.labels, labels[s.owned])
        assert np.array_equal(s.train_mask, train[s.owned])
        assert s.val_mask is None and s.test_mask is None
        assert s.num_train_global == int(train.sum())
    for s in build_shards(g, a, 3, with_vertex_data=False):
        assert s.features is None and s.labels is None and s.train_mask is None


def test_edge_cut_and_stats_against_networkx():
    # reference: networkx.cut_size on the two vertex sets, and per-shard brute force
    G = nx.gnp_random_graph(50, 0.15, seed=7)
    g = graph_from_nx(G)
    a = np.random.default_rng(1).integers(0, 2, 50)
    part0 = [v for v in G if a[v] == 0]
    assert edge_cut(g, a) == nx.cut_size(G, part0)
    a4 = np.random.default_rng(2).integers(0, 4, 50)
    cut4 = sum(1 for u, v in G.edges() if a4[u] != a4[v])
    assert edge_cut(g, a4) == cut4
    shards = build_shards(g, a4, 4)
    st_ = shard_stats(shards)
    for s in shards:
        p = s.worker
        owned, halo, send = brute_force(G, a4, 4, p)
        assert st_["owned"][p] == len(owned)
        assert st_["halo"][p] == sum(len(h) for h in halo.values())
        assert st_["local_edges"][p] == sum(G.degree(v) for v in owned)
        for q in range(4):
            assert st_["send_rows"][p, q] == len(send.get(q, []))
    assert st_["send_rows"].sum() == st_["halo"].sum()


def test_single_worker_has_no_halo():
    g = graph_from_nx(nx.path_graph(5))
    (s,) = build_shards(g, np.zeros(5, dtype=np.int64), 1)
    assert s.num_halo == 0 and s.send_idx.size == 0 and s.peers() == []
    assert isinstance(s, Shard)


def test_bad_assignment_rejected():
    from shardtrain.errors import InputError
    g = graph_from_nx(nx.path_graph(5))
    with pytest.raises(InputError):
        build_shards(g, np.array([0, 1, 2, 0, 0]), 2)
    with pytest.raises(InputError):
        build_shards(g, np.zeros(4, dtype=np.int64), 1)


# ----------------------------------------------------------------------------- shard directories

def _small_graph():
    G = nx.gnp_random_graph(60, 0.1, seed=11)
    rng = np.random.default_rng(4)
    g = graph_from_nx(G, features=rng.normal(size=(60, 5)).astype(np.float32),
                      labels=rng.integers(0, 3, 60), train_mask=rng.random(60) < 0.3,
                      val_mask=rng.random(60) < 0.3, test_mask=rng.random(60) < 0.3)
    return g, rng.integers(0, 3, 60)


def _same(a: Shard, b: Shard) -> bool:
    arrays = ("owned", "halo", "halo_ptr", "send_idx", "send_ptr") + VERTEX_DATA
    return (all(np.array_equal(getattr(a, f), getattr(b, f)) for f in arrays)
            and (a.adj != b.adj).nnz == 0 and a.adj.has_sorted_indices and b.adj.has_sorted_indices
            and (a.worker, a.workers, a.num_vertices_global, a.num_train_global)
            == (b.worker, b.workers, b.num_vertices_global, b.num_train_global))


VERTEX_DATA = ("features", "labels", "train_mask", "val_mask", "test_mask")


def test_shard_directory_round_trip(tmp_path):
    from shardtrain.data.graph import fingerprint
    from shardtrain.plan.shards import load_manifest, load_shard, save_shards
    g, a = _small_graph()
    shards = build_shards(g, a, 3)
    out = tmp_path / "shards"
    save_shards(out, shards, meta={"method": "random", "seed": 4,
                                   "graph_fingerprint": fingerprint(g)})
    assert sorted(p.name for p in out.iterdir()) == [
        "shard-0000.npz", "shard-0001.npz", "shard-0002.npz", "shards.json"]
    assert [p.name for p in tmp_path.iterdir()] == ["shards"]     # no temporary left behind
    m = load_manifest(out)
    assert (m["workers"], m["num_vertices"], m["num_edges"], m["input_dim"], m["num_classes"]) \
        == (3, 60, g.num_edges, 5, int(g.labels.max()) + 1)
    assert m["graph_fingerprint"] == fingerprint(g) and m["feature_dtype"] == "<f4"
    for s in shards:
        assert _same(load_shard(out, s.worker), s)


def test_shard_directory_refuses_bad_content(tmp_path):
    from shardtrain.errors import InputError
    from shardtrain.plan.shards import load_shard, save_shards
    g, a = _small_graph()
    out = tmp_path / "shards"
    save_shards(out, build_shards(g, a, 3), meta={"method": "random"})
    with pytest.raises(InputError, match="not empty"):
        save_shards(out, build_shards(g, a, 3), meta={})
    with pytest.raises(InputError, match="workers 0..2, not 3"):
        load_shard(out, 3)
    z = dict(np.load(out / "shard-0001.npz"))
    z["halo_ptr"] = z["halo_ptr"][:-1]
    np.savez(out / "shard-0001.npz", **z)
    with pytest.raises(InputError, match=r"shard-0001\.npz: 'halo_ptr'"):
        load_shard(out, 1)
    (out / "shard-0002.npz").write_bytes(b"not a zip")
    with pytest.raises(InputError, match=r"shard-0002\.npz: not a readable shard"):
        load_shard(out, 2)
    (out / "shard-0000.npz").unlink()
    with pytest.raises(InputError, match=r"shard-0000\.npz: no such file"):
        load_shard(out, 0)
    (out / "shards.json").write_text("{")
    with pytest.raises(InputError, match=r"shards\.json: not readable JSON"):
        load_shard(out, 0)


def test_split_command_writes_a_loadable_directory(tmp_path, run_cli):
    from shardtrain.plan.shards import load_manifest, load_shard
    g, a = _small_graph()
    src = np.repeat(np.arange(60), np.diff(g.indptr))
    graph_file = tmp_path / "depots.npz"
    np.savez(graph_file, edges=np.stack([src, g.indices], axis=1), features=g.features,
             labels=g.labels, train_mask=g.train_mask, val_mask=g.val_mask, test_mask=g.test_mask)
    out = tmp_path / "out"
    r = run_cli("split", graph_file, "--workers", 3, "--method", "metis", "--out", out)
    assert r.returncode == 0, r.stderr
    assert "edge cut" in r.stdout and "replication factor" in r.stdout
    assert load_manifest(out)["method"] == "metis"
    assert load_shard(out, 2).num_owned > 0
    # bad inputs: exit status 2, one line on stderr naming the option or file, no output
    assignment = tmp_path / "parts.txt"
    assignment.write_text("0\n" * 59 + "zz\n")
    for args, needle in [(["--workers", 3, "--method", "nope"], "--method"),
                         (["--workers", 61, "--method", "metis"], "--workers"),
                         (["--assignment", assignment], "parts.txt:60")]:
        bad_out = tmp_path / "bad"
        r = run_cli("split", graph_file, *args, "--out", bad_out)
        assert r.returncode == 2 and needle in r.stderr, r.stderr
        assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.stderr
        assert not bad_out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["depots.npz", "out", "parts.txt"]
