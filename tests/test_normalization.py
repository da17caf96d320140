"""The GCN normalisation Â = D̃^-1/2 (A + I) D̃^-1/2 against networkx."""
from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from shardtrain.data.graph import Graph, csr_from_edges, normalized_adjacency


def _graph(G: nx.Graph) -> Graph:
    e = np.array(list(G.edges()), dtype=np.int64).reshape(-1, 2)
    indptr, indices, _ = csr_from_edges(e[:, 0], e[:, 1], G.number_of_nodes())
    return Graph(indptr, indices)


@pytest.mark.parametrize("G", [nx.gnp_random_graph(40, 0.1, seed=s) for s in range(3)]
                         + [nx.karate_club_graph(), nx.empty_graph(5), nx.star_graph(9)])
def test_normalized_adjacency_is_identity_minus_normalized_laplacian_of_a_plus_i(G):
    # reference: networkx.normalized_laplacian_matrix of A + I is I - D̃^-1/2 (A+I) D̃^-1/2
    # (Kipf & Welling, ICLR 2017, renormalisation trick); a self-loop adds 1 to the row sum.
    G = nx.Graph(nx.convert_node_labels_to_integers(G))
    with_loops = G.copy()
    with_loops.add_edges_from((v, v) for v in G)
    nodes = sorted(G)
    laplacian = nx.normalized_laplacian_matrix(with_loops, nodelist=nodes, weight=None).toarray()
    expected = np.eye(len(nodes)) - laplacian
    got = normalized_adjacency(_graph(G))
    assert got.has_sorted_indices
    np.testing.assert_allclose(got.toarray(), expected, rtol=1e-12, atol=1e-15)


def test_normalized_adjacency_worked_example():
    # worked by hand: path 0-1-2 has degrees 1,2,1, so d̃ = 2,3,2;
    # Â_00 = 1/2, Â_01 = 1/sqrt(6), Â_11 = 1/3, Â_02 = 0 (common practice: hand calculation)
    a = normalized_adjacency(_graph(nx.path_graph(3))).toarray()
    assert a[0, 0] == pytest.approx(0.5)
    assert a[0, 1] == pytest.approx(1 / np.sqrt(6))
    assert a[1, 1] == pytest.approx(1 / 3)
    assert a[0, 2] == 0.0
