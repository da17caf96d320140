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

Equality with the workers (float64, relative 1e-9, docs/design.md §1.7): the sums run in
another order, so the rows a codec receives differ from the workers' in the last bits; the
codecs are step functions, so a row lying within that rounding of a step (a float32 or
float16 rounding boundary, an int8 level, its float32 scale's rounding) could round the
other way. For float64 rows that happens with a probability of about 2^-52 relative to
the step, per entry (the scale: about 2^-28 per row, and then it moves the row by one
float32 ulp only); the tests' runs never meet one.

Stale halos (`HaloScheme.stale`, definition in `plan/schemes.py`): the halo part of epoch t
reads epoch t-1's values. With s(t) = max(t-1, 1) and, per layer, the pair rows
F(t) = R_f,t(M(t)[j of each pair]) (keyed by the sending epoch t) and the sent gradients
B(t) = R_b,t(Ã_halo(s(t))ᵀ G(t)):
- forward:  Z = Â_own M(t) + Ã_halo(s(t)) F(t-1), F(0) := F(1) (the warm-up);
- backward: Â_ownᵀ G(t) + gather B(t-1), B(0) := B(1);
with smoothing γ, F(t-1) and B(t-1) are replaced by their moving averages U(t) = γ U(t-1)
+ (1 - γ) F(t-1), U(1) = F(1) (the same for B), elementwise per pair row.
"""
from __future__ import annotations

from typing import Callable

import numpy as np
import scipy.sparse as sp

from shardtrain.data.graph import Graph, normalized_adjacency
from shardtrain.plan.schemes import HaloScheme, halo_keep_mask, keep_epoch_used, keep_scale
from shardtrain.train import compress
from shardtrain.train.models.common import operator_matrix

Products = tuple[Callable[[int, np.ndarray], np.ndarray], Callable[[int, np.ndarray], np.ndarray]]


class SchemeProducts:
    """`epoch(e)` -> (propagate, propagate_t) of training epoch e, rows in global id order."""

    def __init__(self, graph: Graph, assignment: np.ndarray, scheme: HaloScheme, seed: int,
                 dtype, model: str = "gcn"):
        """`model`: whose operator the products multiply by (`models.common.operator_matrix`
        of Â: gcn Â, sage D⁻¹A, gin A + I), as the workers' `HaloOps(adj=)` do."""
        self.dtype = np.dtype(dtype)
        self.scheme, self.seed = scheme, int(seed)
        self.format = str(scheme.format) if scheme.compressed(self.dtype) else None
        a = np.asarray(assignment, dtype=np.int64)
        self.assignment = a
        n = graph.num_vertices
        coo = operator_matrix(model, normalized_adjacency(graph)).tocoo()
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

    def halo_matrix(self, epoch: int):
        """Ã_halo(epoch): the kept pairs' columns scaled by 1/P, the others zero."""
        kept = self.kept_pairs(epoch)
        scale = keep_scale(self.scheme.keep)
        entry_kept = kept[self.entry_col]
        return sp.csr_matrix((self.entry_val[entry_kept] * scale,
                              (self.entry_row[entry_kept], self.entry_col[entry_kept])),
                             shape=(self.n, self.n_pairs)).astype(self.dtype)

    def epoch(self, epoch: int) -> Products:
        if self.scheme.stale:
            return self._stale_epoch(epoch)
        halo = self.halo_matrix(epoch)
        if self.format is None:
            full = (self.own + halo @ self.gather.T).tocsr()
            full_t = full.T.tocsr()
            return (lambda layer, m: full @ m), (lambda layer, g: full_t @ g)
        halo_t = halo.T.tocsr()

        def propagate(layer: int, m: np.ndarray) -> np.ndarray:
            return self.own @ m + halo @ self.forward_rows(epoch, layer, m)

        def propagate_t(layer: int, g: np.ndarray) -> np.ndarray:
            return self.own_t @ g + self.gather @ self.backward_rows(epoch, layer, halo_t @ g)
        return propagate, propagate_t

    def forward_rows(self, epoch: int, layer: int, m: np.ndarray) -> np.ndarray:
        """(pairs, w): M's row of each pair's vertex as its owner sends it in `epoch`
        (through the forward codec)."""
        rows = np.asarray(m[self.pair_vertex], dtype=self.dtype)
        if self.format is None:
            return rows
        owner = self.assignment[self.pair_vertex]
        for q in np.unique(owner).tolist():             # the sending owners
            sel = np.flatnonzero(owner == q)
            key = compress.RowKey(self.seed, epoch, layer, "forward", q, self.pair_vertex[sel])
            rows[sel] = compress.roundtrip(rows[sel], self.format, key)
        return rows

    def backward_rows(self, epoch: int, layer: int, sent: np.ndarray) -> np.ndarray:
        """(pairs, w): each worker p's halo gradients `sent` as p sends them in `epoch`
        (through the backward codec)."""
        if self.format is None:
            return sent
        for p in range(self.worker_ptr.shape[0] - 1):
            lo, hi = self.worker_ptr[p], self.worker_ptr[p + 1]
            if hi > lo:
                key = compress.RowKey(self.seed, epoch, layer, "backward", p,
                                      self.pair_vertex[lo:hi])
                sent[lo:hi] = compress.roundtrip(np.asarray(sent[lo:hi], dtype=self.dtype),
                                                 self.format, key)
        return sent

    def _stale_epoch(self, epoch: int) -> Products:
        """The products of training epoch `epoch` under stale halos (module text); the
        rows each layer sends are kept for the next epoch in `self._stale`."""
        if epoch == 1:
            self._stale: dict[tuple, np.ndarray] = {}
            self._average: dict[tuple, np.ndarray] = {}
        elif (epoch - 1) not in getattr(self, "_stale_epochs", ()):
            raise ValueError(f"stale halos: epoch {epoch} needs epoch {epoch - 1}'s rows")
        self._stale_epochs = {epoch}
        halo = self.halo_matrix(keep_epoch_used(epoch, True))
        halo_t = halo.T.tocsr()
        gamma = self.scheme.smooth

        def used(key: tuple, now: np.ndarray) -> np.ndarray:
            rows = self._stale.get(key, now) if epoch > 1 else now
            self._stale[key] = now
            if gamma:
                avg = self._average.get(key)
                rows = rows if avg is None else (self.dtype.type(gamma) * avg
                                                 + self.dtype.type(1.0 - gamma) * rows)
                self._average[key] = rows
            return rows

        def propagate(layer: int, m: np.ndarray) -> np.ndarray:
            rows = used(("forward", layer), self.forward_rows(epoch, layer, m))
            return self.own @ m + halo @ rows

        def propagate_t(layer: int, g: np.ndarray) -> np.ndarray:
            rows = used(("backward", layer), self.backward_rows(epoch, layer, halo_t @ g))
            return self.own_t @ g + self.gather @ rows
        return propagate, propagate_t


def train_single_process(graph: Graph, settings, assignment: np.ndarray, **kw):
    """`reference.train_reference` with the training products of `settings.scheme` over
    `assignment` (a `reference.RunResult`): what the partitioned run computes."""
    from shardtrain.train.reference import train_reference

    products = SchemeProducts(graph, assignment, settings.scheme, settings.seed,
                              settings.np_dtype, model=settings.model)
    return train_reference(graph, settings, training_products=products.epoch, **kw)
