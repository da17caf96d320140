"""The Graph value: an undirected simple graph in CSR form with optional vertex data.

Loaders live in `shardtrain.data.readers`; this module only holds the value, builds it from an edge
array (vectorised) and computes the GCN normalisation.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp


@dataclass(frozen=True)
class Graph:
    """Undirected graph: both directions stored, rows sorted, no self-loops, no duplicates.

    indptr/indices are int64 CSR. features is (n, d) float or None; labels is (n,) int64 with
    -1 for unlabelled, or None; the masks are (n,) bool or None.
    """

    indptr: np.ndarray
    indices: np.ndarray
    features: np.ndarray | None = None
    labels: np.ndarray | None = None
    train_mask: np.ndarray | None = None
    val_mask: np.ndarray | None = None
    test_mask: np.ndarray | None = None

    @property
    def num_vertices(self) -> int:
        return int(self.indptr.shape[0] - 1)

    @property
    def num_edges(self) -> int:
        """Undirected edges, each counted once."""
        return int(self.indices.shape[0] // 2)

    @property
    def degrees(self) -> np.ndarray:
        return np.diff(self.indptr)

    @property
    def input_dim(self) -> int | None:
        return None if self.features is None else int(self.features.shape[1])

    @property
    def num_classes(self) -> int:
        if self.labels is None or self.labels.size == 0:
            return 0
        return int(self.labels.max()) + 1

    def adjacency(self) -> sp.csr_matrix:
        """A as a 0/1 float64 CSR matrix (no self-loops)."""
        n = self.num_vertices
        data = np.ones(self.indices.shape[0], dtype=np.float64)
        return sp.csr_matrix((data, self.indices, self.indptr), shape=(n, n))


@dataclass(frozen=True)
class EdgeCleanup:
    """What `csr_from_edges` dropped while making the edge set simple and undirected.

    self_loops: distinct vertices with a loop (v, v), however often each was written;
    duplicates: rows that repeat an undirected pair already seen, loops included. So
    rows = kept edges + self_loops + duplicates, as for networkx's Graph of the same rows.
    """

    self_loops: int
    duplicates: int


def csr_from_edges(src: np.ndarray, dst: np.ndarray, num_vertices: int
                   ) -> tuple[np.ndarray, np.ndarray, EdgeCleanup]:
    """Symmetrise, drop self-loops and duplicate edges; return (indptr, indices, cleanup).

    Ids must already be validated as 0 <= id < num_vertices. O(m log m), no Python loop.
    A duplicate is any repeat of an undirected pair, whichever direction it was written in;
    a loop written twice (as both directions of a symmetric file list it) is one self-loop
    and one duplicate.
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    loops = src == dst
    loop_vertices = np.sort(src[loops])
    n_loops = int(np.count_nonzero(loop_vertices[1:] != loop_vertices[:-1])
                  + (loop_vertices.shape[0] > 0))
    repeated_loops = int(loop_vertices.shape[0] - n_loops)
    del loop_vertices
    src, dst = src[~loops], dst[~loops]
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    # sort + neighbour compare: far faster than np.unique on edge-sized arrays (numpy 2.4)
    pair = np.sort(lo * np.int64(num_vertices) + hi)
    pair = pair[np.concatenate([[True], pair[1:] != pair[:-1]])] if pair.shape[0] else pair
    n_dups = int(src.shape[0] - pair.shape[0]) + repeated_loops
    lo, hi = np.divmod(pair, np.int64(num_vertices))
    # both directions; the keys are distinct, so sorting the keys sorts rows then columns
    key = np.sort(np.concatenate([pair, hi * np.int64(num_vertices) + lo]))
    rows, cols = np.divmod(key, np.int64(num_vertices))
    indptr = np.zeros(num_vertices + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=num_vertices), out=indptr[1:])
    return indptr, cols.astype(np.int64, copy=False), EdgeCleanup(n_loops, n_dups)


def gcn_degrees(graph: Graph) -> np.ndarray:
    """Degrees of A + I (the renormalisation trick), float64."""
    return graph.degrees.astype(np.float64) + 1.0


def normalized_adjacency(graph: Graph) -> sp.csr_matrix:
    """Â = D̃^-1/2 (A + I) D̃^-1/2 (Kipf & Welling, ICLR 2017), float64 CSR, sorted rows."""
    n = graph.num_vertices
    inv_sqrt = 1.0 / np.sqrt(gcn_degrees(graph))
    a_hat = graph.adjacency() + sp.identity(n, format="csr", dtype=np.float64)
    a_hat = sp.csr_matrix(a_hat)
    a_hat.sort_indices()
    rows = np.repeat(np.arange(n), np.diff(a_hat.indptr))
    a_hat.data = inv_sqrt[rows] * inv_sqrt[a_hat.indices]
    return a_hat


def fingerprint(graph: Graph) -> str:
    """A short content hash of the structure and vertex data, to tell graphs apart (for
    shard manifests and checkpoints). Not cryptographic in purpose, just collision-averse."""
    import hashlib

    h = hashlib.sha256()
    for arr in (graph.indptr, graph.indices, graph.features, graph.labels,
                graph.train_mask, graph.val_mask, graph.test_mask):
        if arr is None:
            h.update(b"none")
            continue
        h.update(f"{arr.dtype.str}{arr.shape}".encode())
        # the array's own buffer, not a bytes copy: the same digest as hashing the bytes
        h.update(np.ascontiguousarray(arr).reshape(-1).view(np.uint8).data)
    return h.hexdigest()[:16]


def structure_fingerprint(graph) -> str:
    """SHA-256 (16 hex digits) of the graph's edges alone (CSR indptr and indices), so
    that a survey, a run and a forecast of one graph file match whatever seed drew their
    split masks; `report` refuses documents whose fingerprints differ."""
    import hashlib

    import numpy as np

    h = hashlib.sha256()
    for arr in (graph.indptr, graph.indices):
        h.update(np.ascontiguousarray(arr, dtype=np.int64).tobytes())
    return h.hexdigest()[:16]
