"""The aggregation operators each model multiplies by, against their definitions built
from networkx's adjacency matrix (an outside reference library):
- GraphSAGE mean (Hamilton et al. 2017): D⁻¹A, A without self-loops, a vertex without
  neighbours aggregating zero;
- GIN-0 (Xu et al. 2019): A + I (H + A H);
- GAT (Veličković et al. 2018): the pattern N(v) ∪ {v}.
Both for the whole graph (the reference's rows) and for a shard's rows over its local
columns (the worker's), which must be the whole operator's rows restricted to the shard.
"""
from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from shardtrain.data.graph import Graph, csr_from_edges, normalized_adjacency
from shardtrain.plan.shards import build_shards
from shardtrain.train.models.common import operator_matrix


def _graph():
    g = nx.gnm_random_graph(40, 70, seed=3)
    g.add_node(40)                                   # an isolated vertex
    edges = np.array(list(g.edges()), dtype=np.int64)
    n = g.number_of_nodes()
    indptr, indices, _ = csr_from_edges(edges[:, 0], edges[:, 1], n)
    a = nx.to_scipy_sparse_array(g, nodelist=range(n), dtype=float).toarray()
    return Graph(indptr, indices, np.ones((n, 2)), np.zeros(n, np.int64), None, None, None), a


def _definition(kind, a):
    n = a.shape[0]
    if kind == "sage":
        deg = a.sum(axis=1)
        return np.divide(a, deg[:, None], out=np.zeros_like(a), where=deg[:, None] > 0)
    if kind == "gin":
        return a + np.eye(n)
    return ((a + np.eye(n)) > 0).astype(float)       # gat: the pattern only


@pytest.mark.parametrize("kind", ["sage", "gin", "gat"])
def test_operator_of_the_whole_graph(kind):
    graph, a = _graph()
    op = operator_matrix(kind, normalized_adjacency(graph)).toarray()
    want = _definition(kind, a)
    if kind == "gat":
        op = (op != 0).astype(float)
    np.testing.assert_allclose(op, want, rtol=1e-15, atol=0)
    if kind == "sage":
        assert not op[40].any()                      # the isolated vertex aggregates zero


@pytest.mark.parametrize("kind", ["sage", "gin"])
def test_operator_of_a_shard_is_the_whole_operators_rows(kind):
    graph, a = _graph()
    want = _definition(kind, a)
    assignment = np.random.default_rng(1).integers(0, 3, graph.num_vertices)
    for shard in build_shards(graph, assignment, 3):
        op = operator_matrix(kind, shard.adj).toarray()
        cols = np.concatenate([shard.owned, shard.halo])
        np.testing.assert_allclose(op, want[np.ix_(shard.owned, cols)], rtol=1e-15, atol=0)
        # nothing of the row lies outside the shard's local columns
        outside = np.setdiff1d(np.arange(graph.num_vertices), cols)
        assert not want[np.ix_(shard.owned, outside)].any()
