"""One process computing exactly what a K-worker run computes under a halo scheme.

Written as its own global formulation over the whole graph (not the worker code over a
loopback), from the definitions in `shardtrain.plan.schemes` and `shardtrain.train.compress`.
With a = the assignment (vertex -> worker), split Â's entries (i, j) into
- the OWN part, a[i] == a[j]: Â_own, the block-diagonal of Â by workers, never sampled;
- the HALO part, a[i] != a[j]: the entry is seen by worker p = a[i] through its halo
  vertex j. Each distinct (p, j) is one column of a block matrix Â_halo (n x pairs, columns
  grouped by worker p): the halo columns of every worker side by side.
In epoch e, `halo_keep_mask(seed, e, p, j)` keeps pair (p, j) or drops it; a kept pair's
column of Â_halo is scaled by 1/P (`keep_scale`), a dropped one is zero: Ã_halo(e). Then
- forward (training):  Z = Â_own M + Ã_halo(e) R_f(M[j of each pair]), where R_f is the
  forward row codec of the scheme's format keyed by (layer, "forward", owner a[j], j): the
  owner sends the same rows to every worker that keeps them;
- backward (training): the gradient of Z's rows goes to M as Â_ownᵀ G + Σ_pairs
  e_j R_b((Ã_halo(e)ᵀ G)[pair]), R_b keyed by (layer, "backward", worker p, j): worker p
  sends its halo gradient of j, compressed, to j's owner, who adds it.
Without a format R_f and R_b are the identity, and the products are Ã(e) = Â_own + Ã_halo(e)
collapsed, and its transpose. The evaluation forward is Â itself (exact).
With every scheme off Ã = Â and R = identity: the run is the reference's.
"""
from __future__ import annotations

from typing import Callable

import numpy as np
import scipy.sparse as sp

from shardtrain.data.graph import Graph, normalized_adjacency
from shardtrain.plan.schemes import HaloScheme, halo_keep_mask, keep_scale
from shardtrain.train import compress

Products = tuple[Callable[[int, np.ndarray], np.ndarray], Callable[[int, np.ndarray], np.ndarray]]


class SchemeProducts:
    """`epoch(e)` -> (propagate, propagate_t) of training epoch e, rows in global id order."""

    def __init__(self, graph: Graph, assignment: np.ndarray, scheme: HaloScheme, seed: int,
                 dtype):
        self.dtype = np.dtype(dtype)
        self.scheme, self.seed = scheme, int(seed)
        self.format = str(scheme.format) if scheme.compressed(self.dtype) else None
        a = np.asarray(assignment, dtype=np.int64)
        self.assignment = a
        n = graph.num_vertices
        coo = normalized_adjacency(graph).tocoo()
        r, c, v = coo.row.astype(np.int64), coo.col.astype(np.int64), coo.data
        own = a[r] == a[c]
        self.own = sp.csr_matrix((v[own], (r[own], c[own])), shape=(n, n)).astype(self.dtype)
        self.own_t = self.own.T.tocsr()
        hr, hc, hv = r[~own], c[~own], v[~own]
        pair_key = a[hr] * n + hc
        order = np.argsort(pair_key, kind="stable")
        sorted_keys = pair_key[order]
        first = np.ones(sorted_keys.shape[0], dtype=bool)
        first[1:] = sorted_keys[1:] != sorted_keys[:-1]
        pairs = sorted_keys[first]
        column = np.empty(sorted_keys.shape[0], dtype=np.int64)
        column[order] = np.cumsum(first) - 1
        self.pair_worker = pairs // n             # p: the worker whose halo holds j
        self.pair_vertex = pairs % n              # j: the halo vertex
        self.entry_row, self.entry_col, self.entry_val = hr, column, hv
        self.n, self.n_pairs = n, int(pairs.shape[0])
        k = int(a.max()) + 1 if a.size else 1
        self.worker_ptr = np.searchsorted(self.pair_worker, np.arange(k + 1))
        # pairs -> their vertex: out[j] += x[pair], the owner's sum of its peers' rows
        self.gather = sp.csr_matrix((np.ones(self.n_pairs, dtype=self.dtype),
                                     (self.pair_vertex, np.arange(self.n_pairs))),
                                    shape=(n, self.n_pairs))

    def kept_pairs(self, epoch: int) -> np.ndarray:
        kept = np.empty(self.n_pairs, dtype=bool)
        for p in range(self.worker_ptr.shape[0] - 1):     # a loop over workers
            lo, hi = self.worker_ptr[p], self.worker_ptr[p + 1]
            kept[lo:hi] = halo_keep_mask(self.seed, epoch, p, self.pair_vertex[lo:hi],
                                         self.scheme.keep)
        return kept

    def epoch(self, epoch: int) -> Products:
        kept = self.kept_pairs(epoch)
        scale = keep_scale(self.scheme.keep)
        entry_kept = kept[self.entry_col]
        halo = sp.csr_matrix((self.entry_val[entry_kept] * scale,
                              (self.entry_row[entry_kept], self.entry_col[entry_kept])),
                             shape=(self.n, self.n_pairs)).astype(self.dtype)
        if self.format is None:
            full = (self.own + halo @ self.gather.T).tocsr()
            full_t = full.T.tocsr()
            return (lambda layer, m: full @ m), (lambda layer, g: full_t @ g)
        halo_t = halo.T.tocsr()
        fmt = self.format
        pair_vertex, owner = self.pair_vertex, self.assignment[self.pair_vertex]

        def propagate(layer: int, m: np.ndarray) -> np.ndarray:
            rows = np.empty((self.n_pairs, m.shape[1]), dtype=self.dtype)
            for q in np.unique(owner).tolist():             # the sending owners
                sel = np.flatnonzero(owner == q)
                key = compress.RowKey(self.seed, epoch, layer, "forward", q, pair_vertex[sel])
                rows[sel] = compress.roundtrip(np.asarray(m[pair_vertex[sel]],
                                                          dtype=self.dtype), fmt, key)
            return self.own @ m + halo @ rows

        def propagate_t(layer: int, g: np.ndarray) -> np.ndarray:
            sent = halo_t @ g                               # (pairs, w): rows each p sends
            for p in range(self.worker_ptr.shape[0] - 1):
                lo, hi = self.worker_ptr[p], self.worker_ptr[p + 1]
                if hi > lo:
                    key = compress.RowKey(self.seed, epoch, layer, "backward", p,
                                          pair_vertex[lo:hi])
                    sent[lo:hi] = compress.roundtrip(np.asarray(sent[lo:hi],
                                                                dtype=self.dtype), fmt, key)
            return self.own_t @ g + self.gather @ sent
        return propagate, propagate_t


def train_single_process(graph: Graph, settings, assignment: np.ndarray, **kw):
    """`reference.train_reference` with the training products of `settings.scheme` over
    `assignment` (a `reference.RunResult`): what the partitioned run computes."""
    from shardtrain.train.reference import train_reference

    products = SchemeProducts(graph, assignment, settings.scheme, settings.seed,
                              settings.np_dtype)
    return train_reference(graph, settings, training_products=products.epoch, **kw)
