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
