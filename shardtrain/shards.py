"""Shards: what one worker owns, which remote rows (the halo) it receives, and what it sends.

CONTRACT (the worker, the survey and the tests rely on exactly this layout):
- `owned`: global ids of the vertices this worker owns, in local order (local index i ->
  global id owned[i]); the order is chosen for memory locality, not necessarily sorted.
- `halo`: global ids of distinct non-owned neighbours of owned vertices, grouped by owning
  worker in ascending worker order and sorted by global id inside each group.
  `halo_ptr` (k+1 int64): halo[halo_ptr[q]:halo_ptr[q+1]] are owned by worker q.
- `adj`: CSR of Â restricted to the owned rows, shape (n_owned, n_owned + n_halo), columns
  `[owned | halo]` in local numbering, values from the global degrees (float64), self-loop
  included, indices sorted within each row.
- `send_idx`/`send_ptr` (k+1 int64): send_idx[send_ptr[q]:send_ptr[q+1]] are LOCAL owned
  indices whose rows this worker sends to q, in exactly the order q's halo group for this
  worker lists them (so q can copy the received block straight into its halo slice).
- features/labels/masks: rows of the owned vertices in local order (or None).
- `num_train_global`: training vertices in the whole graph (the loss divides by it).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from shardtrain.errors import InputError
from shardtrain.graph import Graph, gcn_degrees

# "locality": owned vertices renumbered by reverse Cuthill-McKee on the owned subgraph, so
# neighbours sit close together in memory; "id": owned vertices in ascending global id.
ORDERS = ("locality", "id")


@dataclass
class Shard:
    worker: int
    workers: int
    num_vertices_global: int
    num_train_global: int
    owned: np.ndarray
    halo: np.ndarray
    halo_ptr: np.ndarray
    adj: sp.csr_matrix
    send_idx: np.ndarray
    send_ptr: np.ndarray
    features: np.ndarray | None = None
    labels: np.ndarray | None = None
    train_mask: np.ndarray | None = None
    val_mask: np.ndarray | None = None
    test_mask: np.ndarray | None = None

    @property
    def num_owned(self) -> int:
        return int(self.owned.shape[0])

    @property
    def num_halo(self) -> int:
        return int(self.halo.shape[0])

    def halo_from(self, q: int) -> slice:
        """Positions in `halo` (not in the local column space) of rows owned by q."""
        return slice(int(self.halo_ptr[q]), int(self.halo_ptr[q + 1]))

    def send_to(self, q: int) -> np.ndarray:
        return self.send_idx[self.send_ptr[q]:self.send_ptr[q + 1]]

    def peers(self) -> list[int]:
        """Workers this one exchanges halo rows with (symmetric for an undirected graph)."""
        recv = np.diff(self.halo_ptr) > 0
        send = np.diff(self.send_ptr) > 0
        return [int(q) for q in np.flatnonzero(recv | send)]


def edge_cut(graph: Graph, assignment: np.ndarray) -> int:
    """Undirected edges whose two ends have different owners, each counted once."""
    a = np.asarray(assignment)
    rows = np.repeat(np.arange(graph.num_vertices), graph.degrees)
    return int(np.count_nonzero(a[rows] != a[graph.indices]) // 2)


def _gather_positions(indptr: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions in `indices` of the CSR rows `rows`, concatenated in that order, and their lengths.

    O(len(rows) + output), no loop: each row's range is an arange shifted by its start.
    """
    starts = indptr[rows]
    lengths = indptr[rows + 1] - starts
    shift = np.repeat(starts - (np.cumsum(lengths) - lengths), lengths)
    return np.arange(shift.shape[0], dtype=np.int64) + shift, lengths


def _ptr_by_group(groups_sorted: np.ndarray, k: int) -> np.ndarray:
    """k+1 offsets of the runs of each group id 0..k-1 in an ascending array."""
    return np.searchsorted(groups_sorted, np.arange(k + 1)).astype(np.int64)


def _locality_perm(n_own: int, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """new -> old permutation of the owned vertices: reverse Cuthill-McKee on the owned
    subgraph (George & Liu 1981), which keeps neighbours in nearby rows and columns."""
    if n_own <= 2 or rows.shape[0] == 0:
        return np.arange(n_own, dtype=np.int64)
    # rows are ascending (gathered row by row) and columns sorted per row in the global CSR
    indptr = np.zeros(n_own + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n_own), out=indptr[1:])
    sub = sp.csr_matrix((np.ones(cols.shape[0], dtype=np.int8), cols.astype(np.int32), indptr),
                        shape=(n_own, n_own))
    return reverse_cuthill_mckee(sub, symmetric_mode=True).astype(np.int64)


def _build_one(graph: Graph, a: np.ndarray, k: int, p: int, verts: np.ndarray,
               pos: np.ndarray, inv_sqrt: np.ndarray, num_train: int,
               with_vertex_data: bool, order: str) -> Shard:
    """The shard of worker p, whose owned vertices (ascending ids) are `verts`.

    pos[v] is v's index in its owner's ascending id list. Cost O(nnz_p log nnz_p + k).
    """
    n = graph.num_vertices
    n_own = verts.shape[0]
    edge_pos, lengths = _gather_positions(graph.indptr, verts)
    nbr = graph.indices[edge_pos]
    row = np.repeat(np.arange(n_own, dtype=np.int64), lengths)   # id-order local row
    nbr_owner = a[nbr]
    inside = nbr_owner == p

    if order == "locality":
        perm = _locality_perm(n_own, row[inside], pos[nbr[inside]])
    else:
        perm = np.arange(n_own, dtype=np.int64)
    new_of = np.empty(n_own, dtype=np.int64)
    new_of[perm] = np.arange(n_own, dtype=np.int64)
    owned = verts[perm]

    # halo: distinct outside neighbours, sorted by (owner, global id)
    out_key = nbr_owner[~inside] * np.int64(n) + nbr[~inside]
    halo_key, halo_col = np.unique(out_key, return_inverse=True)
    halo_owner, halo = np.divmod(halo_key, np.int64(n))
    halo_ptr = _ptr_by_group(halo_owner, k)

    # send lists: owned vertices with a neighbour on q, sorted by (q, global id) -- exactly
    # the order of q's halo group for p, since the graph is undirected
    send_key = np.unique(nbr_owner[~inside] * np.int64(n) + verts[row[~inside]])
    send_owner, send_vertex = np.divmod(send_key, np.int64(n))
    send_ptr = _ptr_by_group(send_owner, k)
    send_idx = new_of[pos[send_vertex]]

    # local CSR with columns [owned | halo], plus the self-loop of every owned row
    col = np.empty(nbr.shape[0], dtype=np.int64)
    col[inside] = new_of[pos[nbr[inside]]]
    col[~inside] = n_own + halo_col.reshape(-1)
    val = inv_sqrt[verts[row]] * inv_sqrt[nbr]
    # reorder the entries row by row in the new local order (+1 slot per row for the loop)
    new_lengths = lengths[perm] + 1
    indptr = np.zeros(n_own + 1, dtype=np.int64)
    np.cumsum(new_lengths, out=indptr[1:])
    old_ptr = np.zeros(n_own + 1, dtype=np.int64)
    np.cumsum(lengths, out=old_ptr[1:])
    src, _ = _gather_positions(old_ptr, perm)
    loop_slot = indptr[:-1]
    is_edge = np.ones(indptr[-1], dtype=bool)
    is_edge[loop_slot] = False
    cols = np.empty(indptr[-1], dtype=np.int64)
    data = np.empty(indptr[-1], dtype=np.float64)
    cols[loop_slot] = np.arange(n_own, dtype=np.int64)
    data[loop_slot] = inv_sqrt[owned] ** 2
    cols[is_edge] = col[src]
    data[is_edge] = val[src]
    adj = sp.csr_matrix((data, cols, indptr), shape=(n_own, n_own + halo.shape[0]))
    adj.sort_indices()

    shard = Shard(worker=p, workers=k, num_vertices_global=n, num_train_global=num_train,
                  owned=owned, halo=halo, halo_ptr=halo_ptr, adj=adj,
                  send_idx=send_idx, send_ptr=send_ptr)
    if with_vertex_data:
        for name in ("features", "labels", "train_mask", "val_mask", "test_mask"):
            arr = getattr(graph, name)
            setattr(shard, name, None if arr is None else arr[owned])
    return shard


def check_assignment(assignment, num_vertices: int, k: int) -> np.ndarray:
    """The assignment as int64 (n,), or InputError if it is the wrong shape or out of [0, k)."""
    a = np.asarray(assignment)
    if a.shape != (num_vertices,) or not np.issubdtype(a.dtype, np.integer):
        raise InputError(f"assignment: expected {num_vertices} integer worker ids, "
                         f"got shape {a.shape} dtype {a.dtype}")
    if k < 1:
        raise InputError(f"--workers: must be at least 1, got {k}")
    if a.size and (a.min() < 0 or a.max() >= k):
        raise InputError(f"assignment: worker ids must lie in [0, {k}), "
                         f"got {int(a.min())}..{int(a.max())}")
    return a.astype(np.int64, copy=False)


def build_shards(graph: Graph, assignment: np.ndarray, k: int, *, with_vertex_data: bool = True,
                 order: str = "locality", workers: list[int] | None = None) -> list[Shard]:
    """One Shard per worker (or only for `workers`), laid out as the module CONTRACT says.

    Vertices are grouped by owner with one stable sort, then each worker's rows are sliced
    from the global CSR: each worker costs O(its edges x log), independent of n and k,
    apart from its k+1 pointer arrays.
    """
    if order not in ORDERS:
        raise InputError(f"order: expected one of {', '.join(ORDERS)}, got {order!r}")
    n = graph.num_vertices
    a = check_assignment(assignment, n, k)
    by_owner = np.argsort(a, kind="stable")            # ascending ids within each owner
    owner_ptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(np.bincount(a, minlength=k), out=owner_ptr[1:])
    pos = np.empty(n, dtype=np.int64)
    pos[by_owner] = np.arange(n, dtype=np.int64) - owner_ptr[a[by_owner]]
    inv_sqrt = 1.0 / np.sqrt(gcn_degrees(graph))
    num_train = 0 if graph.train_mask is None else int(np.count_nonzero(graph.train_mask))
    todo = range(k) if workers is None else workers
    return [_build_one(graph, a, k, p, by_owner[owner_ptr[p]:owner_ptr[p + 1]], pos, inv_sqrt,
                       num_train, with_vertex_data, order) for p in todo]


def shard_stats(shards: list[Shard]) -> dict[str, np.ndarray]:
    """Per-worker structure counts of a full shard list (index = worker id).

    owned, halo: vertex counts; local_edges: stored off-diagonal entries of `adj`, i.e.
    directed edges leaving owned rows (an edge between two owned vertices counts twice, an
    edge to a halo vertex once); send_rows[p, q] = len(shards[p].send_to(q)).
    """
    k = len(shards)
    owned = np.zeros(k, dtype=np.int64)
    halo = np.zeros(k, dtype=np.int64)
    local_edges = np.zeros(k, dtype=np.int64)
    send_rows = np.zeros((k, k), dtype=np.int64)
    for s in shards:
        owned[s.worker] = s.num_owned
        halo[s.worker] = s.num_halo
        local_edges[s.worker] = s.adj.nnz - s.num_owned   # every owned row stores one loop
        send_rows[s.worker] = np.diff(s.send_ptr)
    return {"owned": owned, "halo": halo, "local_edges": local_edges, "send_rows": send_rows}
