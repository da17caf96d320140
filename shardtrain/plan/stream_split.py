"""Split a graph directory into a shard directory one shard at a time, in bounded memory.

The shard files hold the same arrays as `shards.save_shards(build_shards(graph, ...))` of
the same graph in memory (tests/test_stream_survey.py compares them array by array), but
no global structure is built: worker p's rows are gathered from the memory-mapped CSR,
its shard is made by the very code of the in-memory build (`shards._build_one`), and its
send lists come from its own rows (v is sent to q iff a neighbour of v is owned by q, in
ascending id: exactly q's halo group p). Held at once: the assignment and a column map
(O(n) small), one shard and its rows. The split id hashes every shard in order, and each
file carries it, so the shards are built twice: a first pass hashes, the second writes.
"""
from __future__ import annotations

import hashlib

import numpy as np
import scipy.sparse as sp

from shardtrain.errors import InputError
from shardtrain.plan.shards import (
    FORMAT,
    FORMAT_VERSION,
    SHARDS_MANIFEST,
    Shard,
    _build_one,
    _index_dtype,
    _ptr_by_group,
    shard_arrays,
    shard_file_name,
)


class _MappedRows:
    """Stands in for `build_shards`'s whole-graph structure: `rows[verts]` gathers those
    CSR rows from the maps (a CSR with index dtype `ix`, global column ids), and keeps
    the last gathered rows for the send lists."""

    def __init__(self, indptr, indices, ix):
        self.indptr_map, self.indices_map = indptr, indices
        self.indices = np.zeros(0, dtype=ix)          # `_build_one` reads only its dtype
        self.last = None

    def __getitem__(self, verts: np.ndarray) -> sp.csr_matrix:
        starts = np.asarray(self.indptr_map[verts], dtype=np.int64)
        lengths = np.asarray(self.indptr_map[verts + 1], dtype=np.int64) - starts
        ptr = np.zeros(verts.shape[0] + 1, dtype=np.int64)
        np.cumsum(lengths, out=ptr[1:])
        # entry e of gathered row r sits at starts[r] + (e - ptr[r]) in the maps
        where = np.arange(ptr[-1], dtype=np.int64) + np.repeat(starts - ptr[:-1], lengths)
        ix = self.indices.dtype
        sub = sp.csr_matrix((np.ones(where.shape[0], dtype=np.int8),
                             np.asarray(self.indices_map[where]).astype(ix),
                             ptr.astype(ix)), shape=(verts.shape[0], self.indptr_map.shape[0] - 1))
        self.last = sub
        return sub


class _InvSqrt:
    """1 / sqrt(degree + 1) of the ids asked for, from the mapped offsets (the same
    float64 operations as `build_shards`'s whole array, so the same bits)."""

    def __init__(self, indptr):
        self.indptr = indptr

    def __getitem__(self, ids: np.ndarray) -> np.ndarray:
        deg = (np.asarray(self.indptr[ids + 1]) - np.asarray(self.indptr[ids])).astype(
            np.float64) + 1.0
        return 1.0 / np.sqrt(deg)


def _send_lists(shard: Shard, sub: sp.csr_matrix, owner: np.ndarray, new_of: np.ndarray,
                k: int) -> None:
    """send_ptr / send_idx of shard p from its own id-ordered rows `sub`."""
    p = shard.worker
    nbr_owner = owner[sub.indices]
    row = np.repeat(np.arange(sub.shape[0], dtype=np.int64), np.diff(sub.indptr))
    cross = nbr_owner != p
    key = nbr_owner[cross].astype(np.int64) * sub.shape[0] + row[cross]
    key = np.unique(key)                       # sorted by (receiver, id), each pair once
    receiver, rows = np.divmod(key, sub.shape[0])
    shard.send_ptr = _ptr_by_group(receiver, k)
    shard.send_idx = new_of[rows].astype(np.int64)


def iter_shards(gd, assignment: np.ndarray, k: int, *, order: str = "locality"):
    """Yield the Shard of each worker 0..k-1 of graph directory `gd` (vertex data
    included), one at a time, as `build_shards` lays them out."""
    n = gd.num_vertices
    owner = np.asarray(assignment)
    if owner.shape != (n,) or (n and (owner.min() < 0 or owner.max() >= k)):
        raise InputError(f"assignment: expected {n} worker ids in [0, {k})")
    owner = owner.astype(np.int16 if k < 2**15 else np.int32, copy=False)
    ix = _index_dtype(gd.indices.shape[0] + n)
    rows = _MappedRows(gd.indptr, gd.indices, ix)
    inv_sqrt = _InvSqrt(gd.indptr)
    colmap = np.empty(n, dtype=ix)
    train = gd.masks.get("train_mask")
    num_train = 0 if train is None else int(sum(np.count_nonzero(train[lo:lo + 2**22])
                                                for lo in range(0, n, 2**22)))
    graph = gd.graph()                        # a view over the maps, for the vertex data
    by_owner = np.argsort(owner, kind="stable")   # ascending ids within each owner
    owner_ptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(np.bincount(owner, minlength=k), out=owner_ptr[1:])
    for p in range(k):                        # a loop over workers
        verts = by_owner[owner_ptr[p]:owner_ptr[p + 1]]
        # the maps stand in for the whole-graph arrays: only rows and ids are indexed
        shard, new_of = _build_one(graph, rows, owner, k, p, verts, colmap,
                                   inv_sqrt,  # type: ignore[arg-type]
                                   num_train, True, order)
        _send_lists(shard, rows.last, owner, new_of, k)
        rows.last = None
        yield shard


def _hash_shard(h, s: Shard) -> None:
    """`shards.split_id_of`'s update for one shard."""
    for arr in (s.owned, s.halo, s.halo_ptr, s.adj.indptr, s.labels, s.train_mask,
                s.val_mask, s.test_mask):
        h.update(b"none" if arr is None else
                 f"{arr.dtype.str}{arr.shape}".encode() + np.ascontiguousarray(arr).tobytes())


def save_shards_streaming(path, gd, assignment: np.ndarray, k: int, *, meta: dict,
                          overwrite: bool = False, on_shard=None) -> dict:
    """`shards.save_shards` of the shards of `gd`, built and written one at a time (the
    folder appears complete or not at all). Returns the manifest plus "stats": owned,
    halo (k,) and the edge cut. `on_shard(pass_name, worker)` after each shard."""
    from shardtrain.files import atomic_directory, save_npz_atomic, write_json_atomic

    h = hashlib.sha256(f"{meta.get('graph_fingerprint')}|{k}".encode())
    owned, halo = np.zeros(k, dtype=np.int64), np.zeros(k, dtype=np.int64)
    cut_entries = local_edges = 0
    features_dtype, input_dim = None, meta.get("input_dim")
    max_label = -1
    num_train = 0
    for s in iter_shards(gd, assignment, k):
        _hash_shard(h, s)
        num_train = s.num_train_global
        owned[s.worker], halo[s.worker] = s.num_owned, s.num_halo
        local_edges += s.adj.nnz - s.num_owned
        cut_entries += int(np.count_nonzero(s.adj.indices >= s.num_owned))
        if s.features is not None:
            features_dtype, input_dim = s.features.dtype.str, s.features.shape[1]
        if s.labels is not None and s.labels.size:
            max_label = max(max_label, int(s.labels.max()))
        if on_shard is not None:
            on_shard("hash", s.worker)
    split_id = h.hexdigest()[:32]
    num_classes = meta.get("num_classes")
    if num_classes is None:
        num_classes = max_label + 1 if max_label >= 0 else 0
    manifest = {
        "format": FORMAT, "version": FORMAT_VERSION, "workers": k,
        "num_vertices": gd.num_vertices,
        "num_edges": int(meta.get("num_edges", local_edges // 2)),
        "num_train_global": num_train, "input_dim": None if input_dim is None else int(input_dim),
        "num_classes": int(num_classes), "feature_dtype": features_dtype,
        "graph_fingerprint": meta.get("graph_fingerprint"), "method": meta.get("method"),
        "seed": meta.get("seed"), "split_id": split_id,
        "owned": [int(c) for c in owned], "files": [shard_file_name(w) for w in range(k)],
        "meta": dict(meta),
    }
    with atomic_directory(path, overwrite=overwrite) as tmp:
        for s in iter_shards(gd, assignment, k):
            save_npz_atomic(tmp / shard_file_name(s.worker),
                            **shard_arrays(s, input_dim, num_classes, split_id))
            if on_shard is not None:
                on_shard("write", s.worker)
        ids = gd.manifest.get("vertex_ids")
        if ids is not None:      # the original ids travel with the shards (train names them)
            from shardtrain.data.graphdir import copy_vertex_ids
            copy_vertex_ids(gd.path, tmp, ids)
            manifest["meta"]["vertex_ids"] = ids
        write_json_atomic(tmp / SHARDS_MANIFEST, manifest)
    return {**manifest, "stats": {"owned": owned, "halo": halo,
                                  "edge_cut": cut_entries // 2}}
