"""The on-disk graph: a folder of memory-mapped CSR arrays and a manifest (issue 11).

    GRAPH_DIR/graph.json      manifest, {"format": "shardtrain-graph", "version": 1,
                              "num_vertices", "num_edges" (undirected, each once),
                              "index_dtype" ("int32" while n < 2**31, else "int64"),
                              "feature_dtype" (null or "float32"/"float64"), "input_dim",
                              "num_classes", "has_labels", "masks" (list of mask names held),
                              "cleanup": {"self_loops", "duplicates"},
                              "structure_fingerprint" (= data.graph.structure_fingerprint of
                              the same edges), "fingerprint" (= data.graph.fingerprint of the
                              same Graph), "sources": [...], "notes": [...],
                              "ingest" (from `shardtrain ingest` only): {"rows",
                              "memory_budget_bytes", "buckets", "largest_bucket_keys"}}
                              notes: the readers' remarks (a skipped header, ignored zero
                              entries, replaced vertex data); the cleanup and made-masks
                              notes are made at load, as `readers.load_graph` does for a file
    GRAPH_DIR/indptr.npy      int64 (n + 1,)
    GRAPH_DIR/indices.npy     index_dtype (2m,), both directions, rows sorted, no loops/dups
    GRAPH_DIR/features.npy    optional (n, d) feature_dtype, vertex order
    GRAPH_DIR/labels.npy      optional (n,) int64, -1 = unlabelled
    GRAPH_DIR/train_mask.npy, val_mask.npy, test_mask.npy   optional (n,) bool
    GRAPH_DIR/vertex_ids.npy  optional int64 (n,): the original id of vertex i (SQL ingest),
                              or, for text ids, vertex_ids.utf8 (UTF-8 bytes back to back) +
                              vertex_ids_offsets.npy int64 (n + 1,); manifest "vertex_ids":
                              {"kind": "int" | "text", "files": [...]} (`read_vertex_ids`)

The same invariants as `data.graph.Graph` (it is a Graph kept on disk). `open_graph_dir`
maps the arrays read-only, so holding one costs page cache, not process memory;
`GraphDir.graph()` gives a `Graph` view over the maps (indices converted to int64 only when
asked: `GraphDir.graph(load=True)` reads everything into memory, for graphs that fit).
`write_graph_dir` writes a graph held in memory (tests, small graphs, synth); `ingest`
(`data.ingest`, with the external sort of `data.extsort`) writes large ones chunk by chunk.
`readers.load_graph` of a directory gives the LoadedGraph of the file it was made from.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from shardtrain.data.graph import EdgeCleanup, Graph, fingerprint, structure_fingerprint
from shardtrain.data.masks import MASK_KEYS
from shardtrain.errors import InputError

FORMAT = "shardtrain-graph"
VERSION = 1
GRAPH_MANIFEST = "graph.json"
INT32_LIMIT = 2**31 - 1


def is_graph_dir(path) -> bool:
    """True for a folder holding a graph manifest (what GRAPH arguments test first)."""
    p = Path(path)
    return p.is_dir() and (p / GRAPH_MANIFEST).is_file()


def index_dtype_for(num_vertices: int) -> np.dtype:
    return np.dtype(np.int32) if num_vertices <= INT32_LIMIT else np.dtype(np.int64)


@dataclass(frozen=True)
class GraphDir:
    """An opened graph directory: the manifest and the read-only maps of its arrays."""

    path: Path
    manifest: dict
    indptr: np.ndarray
    indices: np.ndarray
    features: np.ndarray | None
    labels: np.ndarray | None
    masks: dict

    @property
    def num_vertices(self) -> int:
        return int(self.manifest["num_vertices"])

    @property
    def num_edges(self) -> int:
        return int(self.manifest["num_edges"])

    @property
    def cleanup(self) -> EdgeCleanup:
        c = self.manifest["cleanup"]
        return EdgeCleanup(int(c["self_loops"]), int(c["duplicates"]))

    def graph(self, load: bool = False) -> Graph:
        """A Graph over this directory: maps (load=False; indices keep their stored dtype)
        or arrays read into memory with the in-memory Graph's dtypes (load=True)."""
        def get(a):
            return None if a is None else (np.array(a) if load else a)

        indices = self.indices.astype(np.int64) if load else self.indices
        return Graph(get(self.indptr), indices, get(self.features), get(self.labels),
                     get(self.masks.get("train_mask")), get(self.masks.get("val_mask")),
                     get(self.masks.get("test_mask")))


def _map(path: Path, name: str) -> np.ndarray | None:
    f = path / f"{name}.npy"
    if not f.exists():
        return None
    try:
        return np.load(f, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise InputError(f"{f}: not a readable .npy array ({exc})") from None


def open_graph_dir(path) -> GraphDir:
    """Open GRAPH_DIR read-only; InputError naming the file for anything inconsistent."""
    from shardtrain.files import read_json_document

    path = Path(path)
    manifest = read_json_document(path / GRAPH_MANIFEST, format=FORMAT, version=VERSION,
                                  what="graph directory manifest")
    n, m = manifest.get("num_vertices"), manifest.get("num_edges")
    if not isinstance(n, int) or not isinstance(m, int) or n < 0 or m < 0:
        raise InputError(f"{path / GRAPH_MANIFEST}: num_vertices and num_edges must be "
                         f"integers >= 0")
    indptr, indices = _map(path, "indptr"), _map(path, "indices")
    if indptr is None or indptr.dtype != np.int64 or indptr.shape != (n + 1,):
        raise InputError(f"{path / 'indptr.npy'}: expected int64 ({n + 1},)")
    want = np.dtype(manifest.get("index_dtype", "int64"))
    if indices is None or indices.dtype != want or indices.shape != (2 * m,):
        raise InputError(f"{path / 'indices.npy'}: expected {want} ({2 * m},)")
    if int(indptr[0]) != 0 or int(indptr[-1]) != 2 * m:
        raise InputError(f"{path / 'indptr.npy'}: must run from 0 to {2 * m}")
    features, labels = _map(path, "features"), _map(path, "labels")
    if features is not None and (features.ndim != 2 or features.shape[0] != n):
        raise InputError(f"{path / 'features.npy'}: expected ({n}, d)")
    if labels is not None and (labels.dtype != np.int64 or labels.shape != (n,)):
        raise InputError(f"{path / 'labels.npy'}: expected int64 ({n},)")
    masks = {}
    for key in MASK_KEYS:
        a = _map(path, key)
        if a is not None:
            if a.dtype != np.bool_ or a.shape != (n,):
                raise InputError(f"{path / (key + '.npy')}: expected bool ({n},)")
            masks[key] = a
    return GraphDir(path, manifest, indptr, indices, features, labels, masks)


def write_graph_dir(graph: Graph, path, *, cleanup: EdgeCleanup | None = None,
                    sources=(), notes=(), overwrite: bool = False) -> None:
    """Write an in-memory Graph as GRAPH_DIR (atomically: the folder appears complete or not
    at all)."""
    from shardtrain.files import atomic_directory, write_json_atomic

    n = graph.num_vertices
    cleanup = cleanup or EdgeCleanup(0, 0)
    idx = index_dtype_for(n)
    masks = {k: getattr(graph, k) for k in MASK_KEYS if getattr(graph, k) is not None}
    manifest = {
        "format": FORMAT, "version": VERSION, "num_vertices": n, "num_edges": graph.num_edges,
        "index_dtype": idx.name,
        "feature_dtype": None if graph.features is None else graph.features.dtype.name,
        "input_dim": graph.input_dim, "num_classes": graph.num_classes,
        "has_labels": graph.labels is not None, "masks": sorted(masks),
        "cleanup": {"self_loops": cleanup.self_loops, "duplicates": cleanup.duplicates},
        "structure_fingerprint": structure_fingerprint(graph),
        "fingerprint": fingerprint(graph), "sources": [str(s) for s in sources],
        "notes": list(notes)}
    with atomic_directory(path, overwrite=overwrite) as tmp:
        np.save(tmp / "indptr.npy", np.asarray(graph.indptr, dtype=np.int64))
        np.save(tmp / "indices.npy", np.asarray(graph.indices).astype(idx, copy=False))
        if graph.features is not None:
            np.save(tmp / "features.npy", np.asarray(graph.features))
        if graph.labels is not None:
            np.save(tmp / "labels.npy", np.asarray(graph.labels, dtype=np.int64))
        for key, a in masks.items():
            np.save(tmp / f"{key}.npy", np.asarray(a, dtype=bool))
        write_json_atomic(tmp / GRAPH_MANIFEST, manifest)


# ---------------------------------------------------------------- original vertex ids

ID_FILE = "vertex_ids.npy"            # int64 (n,): vertex i's original integer id
ID_TEXT_FILE = "vertex_ids.utf8"      # text ids: UTF-8 bytes of every id, back to back
ID_OFFSETS_FILE = "vertex_ids_offsets.npy"   # int64 (n + 1,): id i is bytes [o[i], o[i+1])


def write_vertex_ids(folder: Path, ids: np.ndarray) -> dict:
    """Write the original ids of vertices 0..n-1 (int64, or UTF-8 bytes as an 'S' array) into
    `folder`; returns the manifest's "vertex_ids" record. Text is a blob plus offsets (no
    object arrays, nothing to unpickle)."""
    folder = Path(folder)       # the temporary folder of an atomic directory
    if ids.dtype.kind in "iu":
        np.save(folder / ID_FILE, np.asarray(ids, dtype=np.int64), allow_pickle=False)
        return {"kind": "int", "files": [ID_FILE]}
    width = ids.dtype.itemsize
    lengths = np.strings.str_len(ids).astype(np.int64)
    mat = np.ascontiguousarray(ids).view(np.uint8).reshape(ids.shape[0], width)
    blob = mat[np.arange(width)[None, :] < lengths[:, None]]
    offsets = np.zeros(ids.shape[0] + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    with open(folder / ID_TEXT_FILE, "wb") as fh:
        fh.write(blob.data)
    np.save(folder / ID_OFFSETS_FILE, offsets, allow_pickle=False)
    return {"kind": "text", "files": [ID_TEXT_FILE, ID_OFFSETS_FILE]}


def read_vertex_ids(path) -> np.ndarray | None:
    """The original ids of a graph directory's vertices: int64, or str (decoded UTF-8);
    None when the directory keeps none (its ids are 0..n-1). InputError naming the file for
    anything inconsistent."""
    from shardtrain.files import read_json_document

    path = Path(path)
    manifest = read_json_document(path / GRAPH_MANIFEST, format=FORMAT, version=VERSION,
                                  what="graph directory manifest")
    rec = manifest.get("vertex_ids")
    if rec is None:
        return None
    n = manifest.get("num_vertices")
    if not isinstance(n, int) or n < 0:
        raise InputError(f"{path / GRAPH_MANIFEST}: num_vertices must be an integer >= 0")
    return read_vertex_id_files(path, rec, n, path / GRAPH_MANIFEST)


def copy_vertex_ids(src, dst, record: dict) -> None:
    """Copy the id files a "vertex_ids" record names from folder `src` into `dst` (a shard
    directory keeps its graph's original ids)."""
    import shutil

    for name in record.get("files", []):
        if name in (ID_FILE, ID_TEXT_FILE, ID_OFFSETS_FILE):
            shutil.copyfile(Path(src) / name, Path(dst) / name)


def read_vertex_id_files(path: Path, rec, n: int, manifest_file: Path) -> np.ndarray:
    """The ids of a "vertex_ids" record `rec` held in folder `path` (n vertices)."""
    kind = rec.get("kind") if isinstance(rec, dict) else None
    if kind == "int":
        a = _map(path, ID_FILE[:-4])
        if a is None or a.dtype != np.int64 or a.shape != (n,):
            raise InputError(f"{path / ID_FILE}: expected int64 ({n},)")
        return np.array(a)
    if kind != "text":
        raise InputError(f"{manifest_file}: 'vertex_ids' must name kind int or text")
    offsets = _map(path, ID_OFFSETS_FILE[:-4])
    blob_file = path / ID_TEXT_FILE
    if offsets is None or offsets.dtype != np.int64 or offsets.shape != (n + 1,):
        raise InputError(f"{path / ID_OFFSETS_FILE}: expected int64 ({n + 1},)")
    try:
        blob = np.fromfile(blob_file, dtype=np.uint8)
    except OSError as exc:
        raise InputError(f"{blob_file}: cannot read ({exc.strerror})") from None
    offsets = np.array(offsets)
    lengths = np.diff(offsets)
    if offsets[0] != 0 or (lengths < 0).any() or offsets[-1] != blob.shape[0]:
        raise InputError(f"{path / ID_OFFSETS_FILE}: offsets must rise from 0 to the "
                         f"{blob.shape[0]:,} bytes of {ID_TEXT_FILE}")
    try:
        bytes(blob).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"{blob_file}: not UTF-8 at byte {exc.start}") from None
    width = max(1, int(lengths.max()) if lengths.shape[0] else 1)
    mat = np.zeros((lengths.shape[0], width), dtype=np.uint8)
    inside = np.arange(width)[None, :] < lengths[:, None]
    mat[inside] = blob
    return np.strings.decode(mat.view(f"S{width}").ravel(), "utf-8")
