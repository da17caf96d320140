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

from dataclasses import dataclass, field
from typing import TypeGuard

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from shardtrain.compat import scale_csr_rows
from shardtrain.data.graph import Graph, gcn_degrees
from shardtrain.documents import ABSENT, MAX_SIZE, Document
from shardtrain.errors import InputError, ParameterError

# "locality": owned vertices renumbered by reverse Cuthill-McKee on the owned subgraph, so
# neighbours sit close together in memory (the trainer's order); "id": owned vertices in
# ascending global id (the survey's: every count is the same, the build is cheaper).
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


def _unique_sorted(x: np.ndarray) -> np.ndarray:
    """np.unique(x) by a plain sort (much faster here than numpy's hash-based unique)."""
    s = np.sort(x)
    keep = np.ones(s.shape[0], dtype=bool)
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]


def _ptr_by_group(groups_sorted: np.ndarray, k: int) -> np.ndarray:
    """k+1 offsets of the runs of each group id 0..k-1 in an ascending array."""
    return np.searchsorted(groups_sorted, np.arange(k + 1)).astype(np.int64)


def _index_dtype(size: int):
    """int32 when every index and offset below `size` fits: half the memory traffic, and
    scipy's own choice for such matrices."""
    return np.int32 if size < 2**31 - 1 else np.int64


def _structure(graph: Graph, ix) -> sp.csr_matrix:
    """The graph's adjacency pattern as CSR with index dtype `ix` (1-byte data): a worker's
    rows are then one C-level row copy (`A[rows]`), much cheaper than numpy gathers."""
    n = graph.num_vertices
    return sp.csr_matrix((np.ones(graph.indices.shape[0], dtype=np.int8),
                          graph.indices.astype(ix), graph.indptr.astype(ix)), shape=(n, n))


def _locality_perm(indptr: np.ndarray, inside: np.ndarray, local_cols: np.ndarray
                   ) -> np.ndarray:
    """new -> old permutation of a worker's owned rows (given in id order, their entries
    delimited by `indptr`): reverse Cuthill-McKee (George & Liu 1981) on the owned
    subgraph, which keeps neighbours in nearby rows and columns: Â_P @ X runs faster than
    in id order for a little more build time, repaid within the first epochs of training
    (benchmarks/bench_shards.py, order_check, measures both). `inside` marks the entries
    whose neighbour is owned, `local_cols` are those neighbours' id-order local indices."""
    n_own = indptr.shape[0] - 1
    if n_own <= 2 or local_cols.shape[0] == 0:
        return np.arange(n_own, dtype=np.int64)
    inside_ptr = np.zeros(inside.shape[0] + 1, dtype=indptr.dtype)
    np.cumsum(inside, out=inside_ptr[1:])
    owned_sub = sp.csr_matrix((np.ones(local_cols.shape[0], dtype=np.int8), local_cols,
                               inside_ptr[indptr]), shape=(n_own, n_own))
    return reverse_cuthill_mckee(owned_sub, symmetric_mode=True).astype(np.int64)


def _halo(nbr_out: np.ndarray, owner: np.ndarray, n: int) -> np.ndarray:
    """Distinct outside neighbours sorted by (owner, global id), int64 whichever branch
    finds them (a shard's arrays then do not depend on n, which an update changes)."""
    if 4 * nbr_out.shape[0] >= n:
        # dense marks: O(n) work, which is O(this worker's edges) on this branch
        mark = np.zeros(n, dtype=bool)
        mark[nbr_out] = True
        ids = np.flatnonzero(mark)
    else:
        ids = _unique_sorted(nbr_out)
    ids = ids[np.argsort(owner[ids], kind="stable")]   # radix sort on small ints, keeps id order
    return ids.astype(np.int64, copy=False)


def _local_csr(rows_new: np.ndarray, lengths: np.ndarray, cols: np.ndarray, n_own: int,
               ncols: int, ix) -> tuple[np.ndarray, np.ndarray]:
    """(indptr, indices) of the local CSR from unordered entries: entry e lies in local row
    rows_new[its id-order row] at column cols[e]; a self-loop is added to every row.

    One sort of the int64 keys row * ncols + col (numpy's vectorised sort, far quicker than
    an argsort or a per-row sort), then the columns are read back off the sorted keys.
    """
    nnz = cols.shape[0]
    key = np.empty(nnz + n_own, dtype=np.int64)
    key[:nnz] = np.repeat(rows_new.astype(np.int64) * ncols, lengths)
    key[:nnz] += cols
    key[nnz:] = np.arange(n_own, dtype=np.int64) * (ncols + 1)
    key.sort()
    new_lengths = np.empty(n_own, dtype=ix)
    new_lengths[rows_new] = lengths
    new_lengths += 1
    indptr = np.zeros(n_own + 1, dtype=ix)
    np.cumsum(new_lengths, out=indptr[1:])
    key -= np.repeat(np.arange(n_own, dtype=np.int64) * ncols, new_lengths)
    return indptr, key.astype(ix)


def _build_one(graph: Graph, structure: sp.csr_matrix, owner: np.ndarray, k: int, p: int,
               verts: np.ndarray, colmap: np.ndarray, inv_sqrt: np.ndarray, num_train: int,
               with_vertex_data: bool, order: str) -> tuple[Shard, np.ndarray]:
    """The shard of worker p (send lists still empty) and its map id-order -> local index.

    `verts` are p's vertices in ascending id. `colmap` is scratch of n entries shared by
    all workers: only the entries of p's owned and halo vertices are written and then read,
    so it is never cleared. Cost O(nnz_p) plus one vectorised sort of nnz_p keys (and the
    reverse Cuthill-McKee order for "locality"), or O(n) when that is below a few times nnz_p.
    """
    n = graph.num_vertices
    n_own = verts.shape[0]
    ix = structure.indices.dtype
    sub = structure[verts]                   # C-level copy of p's rows, global column ids
    nbr = sub.indices
    lengths = np.diff(sub.indptr)
    inside = owner[nbr] == p
    halo = _halo(nbr[~inside], owner, n)
    halo_ptr = _ptr_by_group(owner[halo], k)
    colmap[verts] = np.arange(n_own, dtype=ix)
    if order == "locality":
        perm = _locality_perm(sub.indptr, inside, colmap[nbr[inside]])
    else:
        perm = np.arange(n_own, dtype=np.int64)
    new_of = np.empty(n_own, dtype=ix)
    new_of[perm] = np.arange(n_own, dtype=ix)
    owned = verts[perm]
    if order == "locality":
        colmap[owned] = np.arange(n_own, dtype=ix)
    colmap[halo] = np.arange(n_own, n_own + halo.shape[0], dtype=ix)
    ncols = n_own + halo.shape[0]
    indptr, cols = _local_csr(new_of, lengths, colmap[nbr], n_own, ncols, ix)
    del sub, nbr, inside
    # Â_vu = 1/sqrt(d̃_v d̃_u), read off the sorted columns (the same product as graph.py)
    inv_col = inv_sqrt[np.concatenate([owned, halo])]
    adj = sp.csr_matrix((inv_col[cols], cols, indptr), shape=(n_own, ncols))
    adj.has_sorted_indices = True
    scale_csr_rows(adj, inv_col[:n_own])

    empty = np.zeros(0, dtype=np.int64)
    shard = Shard(worker=p, workers=k, num_vertices_global=n, num_train_global=num_train,
                  owned=owned, halo=halo, halo_ptr=halo_ptr, adj=adj,
                  send_idx=empty, send_ptr=np.zeros(k + 1, dtype=np.int64))
    if with_vertex_data:
        for name in ("features", "labels", "train_mask", "val_mask", "test_mask"):
            arr = getattr(graph, name)
            setattr(shard, name, None if arr is None else arr[owned])
    return shard, new_of


def _fill_send_lists(shards: list[Shard], new_of: list, pos: np.ndarray,
                     n: int) -> None:
    """Send lists from the halos: what q lists in its halo group for p is what p sends q.

    One global sort of all halo entries by (owner, receiver, id); each worker then takes
    its slice, so the order inside a group is exactly the receiver's halo order. A worker
    whose `new_of` entry is None keeps the send lists it has (`rebuild_shards`).
    """
    k = len(shards)
    receiver = np.repeat(np.arange(k, dtype=np.int32), [s.num_halo for s in shards])
    vertex = np.concatenate([s.halo for s in shards])
    sender = np.concatenate([np.repeat(np.arange(k, dtype=np.int32), np.diff(s.halo_ptr))
                             for s in shards])
    # entries are ordered by (receiver, sender, id); a stable sort by sender (radix sort
    # on small ints) makes that (sender, receiver, id)
    order = np.argsort(sender.astype(np.int16 if k < 2**15 else np.int32), kind="stable")
    receiver, vertex = receiver[order], vertex[order]
    sender_ptr = _ptr_by_group(sender[order], k)
    for s in shards:
        if new_of[s.worker] is None:
            continue
        lo, hi = sender_ptr[s.worker], sender_ptr[s.worker + 1]
        s.send_ptr = _ptr_by_group(receiver[lo:hi], k)
        s.send_idx = new_of[s.worker][pos[vertex[lo:hi]]].astype(np.int64)


def check_assignment(assignment, num_vertices: int, k: int) -> np.ndarray:
    """The assignment as int64 (n,), or InputError if it is the wrong shape or out of [0, k)."""
    a = np.asarray(assignment)
    if a.shape != (num_vertices,) or not np.issubdtype(a.dtype, np.integer):
        raise InputError(f"assignment: expected {num_vertices} integer worker ids, "
                         f"got shape {a.shape} dtype {a.dtype}")
    if k < 1:
        raise ParameterError("workers", f"must be at least 1, got {k}")
    if a.size and (a.min() < 0 or a.max() >= k):
        raise InputError(f"assignment: worker ids must lie in [0, {k}), "
                         f"got {int(a.min())}..{int(a.max())}")
    return a.astype(np.int64, copy=False)


def build_shards(graph: Graph, assignment: np.ndarray, k: int, *, with_vertex_data: bool = True,
                 order: str = "locality") -> list[Shard]:
    """One Shard per worker 0..k-1, laid out as the module CONTRACT says.

    Vertices are grouped by owner with one radix sort and Â (self-loops included) is built
    once; each worker's rows are then one C-level row copy of it, its columns renumbered
    through one shared scratch map and sorted per row, so a worker costs O(its edges) plus
    small sorts and never O(n) more than a small multiple of its edges; send lists come
    from one radix sort of all halo entries.
    """
    return rebuild_shards(graph, assignment, k, range(k), {},
                          with_vertex_data=with_vertex_data, order=order)


def rebuild_shards(graph: Graph, assignment: np.ndarray, k: int, workers, kept: dict, *,
                   with_vertex_data: bool = True, order: str = "locality") -> list[Shard]:
    """`build_shards`, building only the shards of `workers` and taking every other
    worker's shard from `kept` (worker -> Shard, used as it is: the caller vouches that
    building it again would give the same arrays). The built shards equal those of
    `build_shards` on the same graph and assignment: a kept shard's halo is all its send
    lists need from it."""
    if order not in ORDERS:
        raise InputError(f"order: expected one of {', '.join(ORDERS)}, got {order!r}")
    n = graph.num_vertices
    a = check_assignment(assignment, n, k)
    build = sorted(set(int(w) for w in workers))
    missing = sorted(set(range(k)) - set(build) - set(kept))
    if missing:
        raise InputError(f"workers: neither built nor kept: {missing}")
    owner = a.astype(np.int16 if k < 2**15 else np.int32)   # small: cheaper random reads
    by_owner = np.argsort(owner, kind="stable")              # ascending ids within each owner
    owner_ptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(np.bincount(a, minlength=k), out=owner_ptr[1:])
    ix = _index_dtype(graph.indices.shape[0] + n)
    pos = np.empty(n, dtype=ix)
    pos[by_owner] = np.arange(n, dtype=ix) - owner_ptr[owner[by_owner]].astype(ix)
    structure = _structure(graph, ix)
    colmap = np.empty(n, dtype=ix)
    inv_sqrt = 1.0 / np.sqrt(gcn_degrees(graph))
    num_train = 0 if graph.train_mask is None else int(np.count_nonzero(graph.train_mask))
    shards: list[Shard] = []
    new_of: list = []
    for p in range(k):
        if p not in build:
            shards.append(kept[p])
            new_of.append(None)
            continue
        shard, local = _build_one(graph, structure, owner, k, p,
                                  by_owner[owner_ptr[p]:owner_ptr[p + 1]], colmap, inv_sqrt,
                                  num_train, with_vertex_data, order)
        shards.append(shard)
        new_of.append(local)
    del structure, colmap
    _fill_send_lists(shards, new_of, pos, n)
    return shards


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


# ----------------------------------------------------------------------------- shard directories

SHARDS_MANIFEST = "shards.json"           # the one name of a shard directory's index
FORMAT = "shardtrain-shards"
# version 2: `split_id` and per-worker `owned` counts in the manifest; each shard's header
# holds 8 values and its own copy of the split id (version 1 directories: re-run split)
FORMAT_VERSION = 2
_VERTEX_DATA = ("features", "labels", "train_mask", "val_mask", "test_mask")
_INDEX_ARRAYS = ("owned", "halo", "halo_ptr", "send_idx", "send_ptr")
# header of every shard file, int64: what the shard is and what it must agree with
HEADER_FIELDS = ("worker", "workers", "num_vertices", "num_train_global", "owned", "halo",
                 "input_dim", "num_classes")
_MAX_SIZE = MAX_SIZE              # any count above this is not a real graph (int64 room)


@dataclass(kw_only=True)
class ShardManifest(Document):
    """`shards.json`, typed (fields in the order `save_shards` writes them; the shape it
    is checked against is `documents.MANIFEST`)."""

    format: str
    version: int
    workers: int
    num_vertices: int
    num_edges: int
    num_train_global: int
    input_dim: int | None          # None: the shards have no features
    num_classes: int
    feature_dtype: str | None      # "<f4" | "<f8" | None (with input_dim None)
    graph_fingerprint: str | None
    method: str | None
    seed: int | None
    split_id: str                  # `split_id_of`: content hash of the split
    owned: list[int]               # owned vertices per worker
    files: list[str]               # shard file per worker, inside the directory
    meta: dict = ABSENT            # what the writer passed: partition details, ...
    extra: dict = field(default_factory=dict)


def read_manifest(path) -> ShardManifest:
    """`load_manifest`, typed."""
    return ShardManifest.from_dict(load_manifest(path))


def split_id_of(shards: list[Shard], graph_fingerprint=None) -> str:
    """A content hash (32 hex digits) of one split: the graph's fingerprint when known, and
    every shard's owned ids, halo and row structure, labels and masks. The same split of
    the same graph always gets the same id (so checkpoints of a rebuilt temporary split
    still match); a shard of any other split or graph carries another id."""
    import hashlib

    h = hashlib.sha256(f"{graph_fingerprint}|{len(shards)}".encode())
    for s in shards:
        for arr in (s.owned, s.halo, s.halo_ptr, s.adj.indptr, s.labels, s.train_mask,
                    s.val_mask, s.test_mask):
            h.update(b"none" if arr is None else
                     f"{arr.dtype.str}{arr.shape}".encode() + np.ascontiguousarray(arr).tobytes())
    return h.hexdigest()[:32]


def shard_file_name(worker: int) -> str:
    return f"shard-{worker:04d}.npz"


def save_shards(path, shards: list[Shard], *, meta: dict, overwrite: bool = False) -> dict:
    """Write a shard directory atomically: `shards.json` plus one `shard-NNNN.npz` per worker.

    `meta` carries what the shards do not know: method, seed, graph_fingerprint, and
    optionally num_edges, input_dim and num_classes (else taken from the shards). Every
    file is written into a temporary sibling directory that is renamed into place at the
    end (shardtrain.files.atomic_directory). Returns the manifest.
    """
    from shardtrain.files import atomic_directory, save_npz_atomic, write_json_atomic

    if not shards:
        raise InputError(f"{path}: no shards to save")
    k = shards[0].workers
    if [s.worker for s in shards] != list(range(k)):
        raise InputError(f"{path}: expected the shards of workers 0..{k - 1} in order")
    first = shards[0]
    features = [s.features for s in shards if s.features is not None]
    labels = [s.labels for s in shards if s.labels is not None and s.labels.size]
    local_edges = sum(s.adj.nnz - s.num_owned for s in shards)
    input_dim = features[0].shape[1] if features else meta.get("input_dim")
    num_classes = meta.get("num_classes")
    if num_classes is None:
        num_classes = max(int(l.max()) for l in labels) + 1 if labels else 0
    split_id = split_id_of(shards, meta.get("graph_fingerprint"))
    manifest = ShardManifest(
        format=FORMAT,
        version=FORMAT_VERSION,
        workers=k,
        num_vertices=first.num_vertices_global,
        num_edges=int(meta.get("num_edges", local_edges // 2)),
        num_train_global=first.num_train_global,
        input_dim=None if input_dim is None else int(input_dim),
        num_classes=int(num_classes),
        feature_dtype=features[0].dtype.str if features else None,
        graph_fingerprint=meta.get("graph_fingerprint"),
        method=meta.get("method"),
        seed=meta.get("seed"),
        split_id=split_id,
        owned=[s.num_owned for s in shards],
        files=[shard_file_name(s.worker) for s in shards],
        meta={key: value for key, value in meta.items()},
    ).to_dict()
    with atomic_directory(path, overwrite=overwrite) as tmp:
        for s in shards:
            save_npz_atomic(tmp / shard_file_name(s.worker),
                            **shard_arrays(s, input_dim, num_classes, split_id))
        write_json_atomic(tmp / SHARDS_MANIFEST, manifest)
    return manifest


def shard_arrays(s: Shard, input_dim, num_classes: int, split_id: str) -> dict:
    """The arrays of one shard file (the layout CONTRACT above), for every shard writer."""
    arrays = {name: getattr(s, name) for name in _INDEX_ARRAYS}
    arrays.update(adj_indptr=s.adj.indptr, adj_indices=s.adj.indices,
                  adj_data=s.adj.data, adj_shape=np.asarray(s.adj.shape, dtype=np.int64),
                  header=np.asarray([s.worker, s.workers, s.num_vertices_global,
                                     s.num_train_global, s.num_owned, s.num_halo,
                                     -1 if input_dim is None else int(input_dim),
                                     int(num_classes)], dtype=np.int64),
                  split_id=np.asarray(split_id))
    for name in _VERTEX_DATA:
        value = getattr(s, name)
        if value is not None:
            arrays[name] = value
    return arrays


def load_manifest(path) -> dict:
    """The manifest of a shard directory, every field checked for type and range against
    `documents.MANIFEST` (one InputError naming the file otherwise): a hand-edited or
    foreign manifest never gets as far as a traceback. `ShardManifest.from_dict` types it."""
    from pathlib import Path

    from shardtrain.files import read_json_document

    file = Path(path) / SHARDS_MANIFEST
    if not file.is_file():
        raise InputError(f"{file}: no such file (not a shard directory)")
    try:
        manifest = read_json_document(file, format=FORMAT, version=FORMAT_VERSION,
                                      what="shard manifest")
    except RecursionError:
        raise InputError(f"{file}: not readable JSON (nested too deeply)") from None
    except InputError:
        _refuse_old_version(file)
        raise
    from shardtrain import documents

    return documents.validate(manifest, "manifest", file)   # the shape: documents.MANIFEST


def _refuse_old_version(file) -> None:
    """An older manifest version gets its own message: the remedy is to split again."""
    import json

    try:
        doc = json.loads(file.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError, RecursionError):
        return
    version = doc.get("version") if isinstance(doc, dict) else None
    if (isinstance(doc, dict) and doc.get("format") == FORMAT and _is_count(version)
            and version < FORMAT_VERSION):
        raise InputError(f"{file}: shard manifest version {version} is older than this "
                         f"shardtrain's version {FORMAT_VERSION}: re-run `shardtrain split` "
                         f"to write this directory again")


def _is_count(value) -> TypeGuard[int]:
    return isinstance(value, int) and not isinstance(value, bool) and 0 <= value < _MAX_SIZE


def _shard_file(path, manifest: dict, worker: int):
    """The path of worker's shard file; InputError if it resolves outside the folder."""
    from pathlib import Path

    folder = Path(path)
    file = folder / manifest["files"][worker]
    try:
        inside = file.resolve().parent == folder.resolve()
    except (OSError, RuntimeError):
        inside = False
    if not inside:
        raise InputError(f"{file}: lies outside the shard directory {folder} (a link?)")
    return file


def _member_header(z, name: str):
    """(shape, dtype) of one .npy member of an open npz, reading only its header."""
    with z.zip.open(f"{name}.npy") as fh:
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, _, dtype = np.lib.format.read_array_header_1_0(fh)
        else:
            shape, _, dtype = np.lib.format.read_array_header_2_0(fh)
    return shape, dtype


def check_shard(path, manifest: dict, worker: int) -> None:
    """Cheap check of one shard file against its manifest, reading only header members
    (and the labels): present, a whole zip, shard `worker` of this very split, sizes and
    vertex data as the manifest says. InputError naming the file otherwise. The same
    check (and message) serves the pipes coordinator and every MPI rank."""
    import os
    import zipfile

    file = _shard_file(path, manifest, worker)
    if not file.is_file():
        raise InputError(f"{file}: no such file (shard {worker} missing)")
    k = manifest["workers"]
    try:
        size = os.path.getsize(file)
        with np.load(file, allow_pickle=False) as z:
            members = set(z.files)
            for info in z.zip.infolist():
                if info.header_offset + info.compress_size > size:
                    raise InputError(f"{file}: truncated (member {info.filename} runs past "
                                     f"the end of the file)")
            for name in ("header", "split_id"):
                if name not in members:
                    raise InputError(f"{file}: not a shard of this format (no '{name}'); "
                                     f"re-run `shardtrain split`")
            header, split = z["header"], z["split_id"]
            shapes = {name: _member_header(z, name) for name in
                      ("owned", "features", "labels", "train_mask", "val_mask", "test_mask")
                      if name in members}
            labels = z["labels"] if "labels" in members else None
    except InputError:
        raise
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        raise InputError(f"{file}: not a readable shard, truncated or damaged "
                         f"({' '.join(str(exc).split())})") from None
    if header.shape != (len(HEADER_FIELDS),) or header.dtype != np.int64:
        raise InputError(f"{file}: 'header' must be {len(HEADER_FIELDS)} int64 values")
    got = dict(zip(HEADER_FIELDS, (int(x) for x in header)))
    split_id = str(split) if split.ndim == 0 and split.dtype.kind == "U" else None
    if split_id != manifest["split_id"] or got["workers"] != k:
        raise InputError(f"{file}: belongs to another split (split {split_id}, "
                         f"{got['workers']} workers) than {SHARDS_MANIFEST} "
                         f"({manifest['split_id']}, "
                         f"{k} workers)")
    if got["worker"] != worker:
        raise InputError(f"{file}: is shard {got['worker']} of the split, but {SHARDS_MANIFEST} "
                         f"lists it as shard {worker} (files swapped or re-ordered?)")
    want = {"num_vertices": manifest["num_vertices"],
            "num_train_global": manifest["num_train_global"],
            "owned": manifest["owned"][worker],
            "input_dim": -1 if manifest.get("input_dim") is None else manifest["input_dim"],
            "num_classes": manifest["num_classes"]}
    for key, value in want.items():
        if got[key] != value:
            raise InputError(f"{file}: says {key} {got[key]}, {SHARDS_MANIFEST} says {value} (an "
                             f"edited manifest?)")
    n_own = got["owned"]
    if shapes.get("owned", ((None,), None))[0] != (n_own,):
        raise InputError(f"{file}: 'owned' does not hold the {n_own} ids of its header")
    feat = shapes.get("features")
    if (feat is None) != (want["input_dim"] == -1):
        raise InputError(f"{file}: {'has' if feat is not None else 'lacks'} features, "
                         f"{SHARDS_MANIFEST} says input_dim {manifest.get('input_dim')}")
    if feat is not None and (feat[0] != (n_own, want["input_dim"])
                             or feat[1].str != manifest.get("feature_dtype")):
        raise InputError(f"{file}: features are {feat[0]} {feat[1]}, expected "
                         f"({n_own}, {want['input_dim']}) {manifest.get('feature_dtype')}")
    for name in ("labels", "train_mask", "val_mask", "test_mask"):
        if name in shapes and shapes[name][0] != (n_own,):
            raise InputError(f"{file}: '{name}' has shape {shapes[name][0]}, expected "
                             f"({n_own},)")
    if labels is not None and labels.size:
        if not np.issubdtype(labels.dtype, np.integer):
            raise InputError(f"{file}: 'labels' must be integers")
        top = int(labels.max())
        if top >= manifest["num_classes"] or int(labels.min()) < -1:
            raise InputError(f"{file}: labels run from {int(labels.min())} to {top}, "
                             f"{SHARDS_MANIFEST} says num_classes {manifest['num_classes']}")


def check_shard_dir(path, workers=None) -> dict:
    """Check the manifest and the shard files of `workers` (default: every one) before any
    process starts; returns the manifest. With the manifest's owned counts summing to
    num_vertices and each shard agreeing with its own count, checking every shard checks
    the whole set; an MPI rank checks only its own."""
    manifest = load_manifest(path)
    for w in range(manifest["workers"]) if workers is None else workers:
        check_shard(path, manifest, w)
    return manifest


def split_counts(path, manifest: dict) -> dict[str, int]:
    """Vertices in the train/val/test masks over all shards of a checked shard directory
    (reads only the mask members: n booleans in all); a mask a shard lacks counts 0."""
    counts = dict.fromkeys(("train", "val", "test"), 0)
    for w in range(manifest["workers"]):
        with np.load(_shard_file(path, manifest, w), allow_pickle=False) as z:
            for name in counts:
                if f"{name}_mask" in z.files:
                    counts[name] += int(np.count_nonzero(z[f"{name}_mask"]))
    return counts


def load_shard(path, worker: int) -> Shard:
    """Load one worker's shard from a shard directory, without reading the others."""
    from pathlib import Path

    manifest = load_manifest(path)
    k = manifest["workers"]
    if not 0 <= worker < k:
        raise InputError(f"{Path(path) / SHARDS_MANIFEST}: has workers 0..{k - 1}, not {worker}")
    file = _shard_file(path, manifest, worker)
    try:
        with np.load(file, allow_pickle=False) as z:
            arrays = {name: z[name] for name in z.files}
    except FileNotFoundError:
        raise InputError(f"{file}: no such file (shard {worker} missing)") from None
    except (OSError, ValueError, EOFError) as exc:
        raise InputError(f"{file}: not a readable shard ({exc})") from None
    except Exception as exc:  # noqa: BLE001 - zipfile.BadZipFile and kin: a damaged file
        raise InputError(f"{file}: not a readable shard ({' '.join(str(exc).split())})"
                         ) from None
    return _shard_from_arrays(file, arrays, manifest, worker)


def _shard_from_arrays(file, arrays: dict, manifest: dict, worker: int) -> Shard:
    def need(name: str) -> np.ndarray:
        if name not in arrays:
            raise InputError(f"{file}: array '{name}' missing")
        return arrays[name]

    def bad(what: str):
        return InputError(f"{file}: {what}")

    header = need("header")
    if header.shape != (len(HEADER_FIELDS),) or header.dtype != np.int64:
        raise bad(f"'header' must be {len(HEADER_FIELDS)} int64 values")
    w, k, n, n_train = (int(x) for x in header[:4])
    split = need("split_id")
    if (w, k, n, n_train) != (worker, manifest["workers"], manifest["num_vertices"],
                              manifest["num_train_global"]) or \
            str(split) != manifest["split_id"]:
        raise bad(f"header (worker {w}, workers {k}, vertices {n}, train {n_train}, split "
                  f"{split}) does not match the manifest")
    for name in _INDEX_ARRAYS + ("adj_indptr", "adj_indices"):
        arr = need(name)
        if arr.ndim != 1 or not np.issubdtype(arr.dtype, np.integer):
            raise bad(f"'{name}' must be a 1-D integer array")
    owned, halo = need("owned"), need("halo")
    n_own, n_halo = owned.shape[0], halo.shape[0]
    for ptr_name, target, size in (("halo_ptr", "halo", n_halo),
                                   ("send_ptr", "send_idx", need("send_idx").shape[0])):
        ptr = need(ptr_name)
        if ptr.shape != (k + 1,) or ptr[0] != 0 or ptr[-1] != size or np.any(np.diff(ptr) < 0):
            raise bad(f"'{ptr_name}' must be {k + 1} non-decreasing offsets from 0 to "
                      f"len({target}) = {size}")
    ids = np.concatenate([owned, halo])
    if ids.size and (ids.min() < 0 or ids.max() >= n):
        raise bad(f"vertex ids outside 0..{n - 1}")
    send_idx = need("send_idx")
    if send_idx.size and (send_idx.min() < 0 or send_idx.max() >= n_own):
        raise bad(f"'send_idx' entries outside the {n_own} owned rows")
    shape = need("adj_shape")
    if shape.shape != (2,) or tuple(int(x) for x in shape) != (n_own, n_own + n_halo):
        raise bad(f"'adj_shape' must be ({n_own}, {n_own + n_halo})")
    indptr, indices, data = need("adj_indptr"), need("adj_indices"), need("adj_data")
    if (indptr.shape != (n_own + 1,) or indptr[0] != 0 or indptr[-1] != indices.shape[0]
            or data.shape != indices.shape or data.dtype != np.float64
            or np.any(np.diff(indptr) < 0)):
        raise bad("adjacency arrays (adj_indptr, adj_indices, adj_data float64) are inconsistent")
    if indices.size and (indices.min() < 0 or indices.max() >= n_own + n_halo):
        raise bad("'adj_indices' outside the local columns")
    adj = sp.csr_matrix((data, indices, indptr), shape=(n_own, n_own + n_halo))
    if not adj.has_sorted_indices:
        raise bad("'adj_indices' are not sorted within each row")
    shard = Shard(worker=w, workers=k, num_vertices_global=n, num_train_global=n_train,
                  owned=owned.astype(np.int64, copy=False), halo=halo.astype(np.int64, copy=False),
                  halo_ptr=need("halo_ptr").astype(np.int64, copy=False), adj=adj,
                  send_idx=send_idx.astype(np.int64, copy=False),
                  send_ptr=need("send_ptr").astype(np.int64, copy=False))
    for name in _VERTEX_DATA:
        if name in arrays:
            value = arrays[name]
            if value.shape[:1] != (n_own,):
                raise bad(f"'{name}' has {value.shape[:1]} rows, expected {n_own}")
            if name.endswith("_mask") and value.dtype != np.bool_:
                raise bad(f"'{name}' must be boolean")
            setattr(shard, name, value)
    if shard.features is not None and \
            manifest.get("input_dim") not in (None, shard.features.shape[1]):
        raise bad(f"features are {shard.features.shape[1]} wide, the manifest says "
                  f"{manifest['input_dim']}")
    return shard
