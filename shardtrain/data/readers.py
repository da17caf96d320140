"""Graph input: `.npz` bundles, Matrix Market `.mtx`, text edge lists, `--features` and
`--labels` files; validation with one-line `file:line` errors. Text tables are read by
`data.textscan`, missing split masks made by `data.masks`.

Stored types: ids and labels int64; features float64 when the input array is float64,
float32 otherwise (text features become float32); masks bool.
"""
from __future__ import annotations

import os
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import scipy.io
import scipy.sparse as sp

from shardtrain.data.graph import EdgeCleanup, Graph, csr_from_edges
from shardtrain.data.inputs import open_checked, require_regular_file
from shardtrain.data.masks import MASK_KEYS, make_masks
from shardtrain.data.memory import feature_bytes_of, graph_load_bytes, require_memory
from shardtrain.data.textscan import TextTable, show
from shardtrain.errors import InputError, ParameterError, option

EDGE_LIST_SUFFIXES = (".csv", ".tsv", ".txt", ".edges")
GRAPH_SUFFIXES = (".npz", ".mtx") + EDGE_LIST_SUFFIXES
NPZ_KEYS = ("edges", "num_vertices", "features", "labels", "train_mask", "val_mask", "test_mask")


@dataclass
class LoadedGraph:
    """A loaded graph plus what loading did to it.

    input_dim is the feature width, or the `--input-dim` given for a graph without features.
    notes are one-line, human-readable remarks (cleanup counts, skipped header, made splits).
    """

    graph: Graph
    cleanup: EdgeCleanup
    source: str
    notes: list[str] = field(default_factory=list)
    input_dim: int | None = None


# --------------------------------------------------------------------------- formats

@dataclass
class _Raw:
    """What a format reader found, before validation."""

    src: np.ndarray
    dst: np.ndarray
    num_vertices: int | None = None
    features: np.ndarray | None = None
    labels: np.ndarray | None = None
    masks: dict = field(default_factory=dict)
    # edge row -> "file:line" / "file: edges[row]" text
    locate_edge: Callable[[int], str] | None = None
    notes: list = field(default_factory=list)


def _read_edge_list(path: Path) -> _Raw:
    table = TextTable(path, kind="int", columns=2, what="edge list: two integer vertex ids")
    pairs = table.values.reshape(-1, 2)
    raw = _Raw(pairs[:, 0], pairs[:, 1],
               locate_edge=lambda row: f"{path}:{table.line_of_row(row)}")
    if table.header is not None:
        raw.notes.append(f"{path}: skipped header line {table.header[0]}: {table.header[1]}")
    return raw


_MTX_FORMATS = ("coordinate", "array")
_MTX_FIELDS = ("real", "double", "integer", "pattern", "complex")
_MTX_SYMMETRIES = ("general", "symmetric", "skew-symmetric", "hermitian")
# scipy's read of a coordinate file, per entry it returns (both triangles of a symmetric
# file): row, column and value arrays (24 B), the int64 copies and the kept selection (~34 B);
# peak of the whole load measured with tracemalloc: 54 B per returned entry (1 M entries)
_MTX_READ_BYTES_PER_ENTRY = 64


def _readline_bounded(fh, limit: int = 1 << 16) -> bytes:
    """One line, at most `limit` bytes of it kept (the rest of a longer line is skipped)."""
    line = fh.readline(limit)
    if line and not line.endswith(b"\n") and len(line) == limit:
        while True:
            rest = fh.readline(limit)
            if not rest or rest.endswith(b"\n"):
                break
    return line


def _mtx_header(path: Path) -> tuple[int, str, str, str, int, int, int, int]:
    """(size line number, format, field, symmetry, rows, cols, entries, bytes after the size
    line) of a Matrix Market file, read without scipy so that a declared size is judged
    before anything is allocated."""
    size = os.stat(require_regular_file(path)).st_size
    with open_checked(path) as fh:
        banner = _readline_bounded(fh, 1024).split()
        words = [w.decode("ascii", "replace").lower() for w in banner]
        if (len(words) != 5 or words[0] != "%%matrixmarket" or words[1] != "matrix"
                or words[2] not in _MTX_FORMATS or words[3] not in _MTX_FIELDS
                or words[4] not in _MTX_SYMMETRIES):
            raise InputError(f"{path}:1: not a readable Matrix Market file: the first line must "
                             f"be '%%MatrixMarket matrix FORMAT FIELD SYMMETRY'")
        fmt, fld, symmetry = words[2], words[3], words[4]
        line_no = 1
        while True:
            raw = _readline_bounded(fh)
            line_no += 1
            if not raw:
                raise InputError(f"{path}: not a readable Matrix Market file: no size line")
            text = raw.strip()
            if text and not text.startswith(b"%"):
                break
        after = size - fh.tell()
    parts = text.split()
    want = 3 if fmt == "coordinate" else 2
    if len(parts) != want or not all(p.isdigit() for p in parts):
        shape = "ROWS COLS ENTRIES" if want == 3 else "ROWS COLS"
        raise InputError(f"{path}:{line_no}: the size line must be {shape} (non-negative "
                         f"integers), got {show(text)}")
    rows, cols = int(parts[0]), int(parts[1])
    if fmt == "coordinate":
        entries = int(parts[2])
    else:
        entries = rows * cols if symmetry == "general" else rows * (rows + 1) // 2
    return line_no, fmt, fld, symmetry, rows, cols, entries, after


def _read_mtx(path: Path) -> _Raw:
    line_no, fmt, fld, symmetry, rows, cols, entries, after = _mtx_header(path)
    if rows != cols:
        raise InputError(f"{path}:{line_no}: adjacency must be square, got {rows} x {cols}")
    if fld == "complex":
        raise InputError(f"{path}:1: complex matrices are not adjacency matrices")
    # an entry is at least "1 2\n" (coordinate) or "1\n" (array): a bound that needs no reading
    room = (after + 1) // (4 if fmt == "coordinate" else 2)
    if entries > room:
        raise InputError(f"{path}:{line_no}: declares {entries:,} entries, but the {after:,} "
                         f"bytes after the size line hold at most {room:,}")
    mirrored = 1 if symmetry == "general" else 2     # the reader fills in the other triangle
    # the read and the CSR build do not overlap: the peak is the larger of the two
    need = max(graph_load_bytes(rows, entries),
               graph_load_bytes(rows, 0) + _MTX_READ_BYTES_PER_ENTRY * entries * mirrored)
    if fmt == "array":
        need += 8 * rows * cols                       # the dense matrix scipy returns
    require_memory(need, f"{path}:{line_no}: a {rows:,} x {cols:,} matrix with {entries:,} "
                         f"entries")
    try:
        matrix = scipy.io.mmread(str(path))
    except Exception as exc:  # scipy's reader raises several types; all mean a bad file
        msg = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: not a readable Matrix Market file: {msg}") from None
    coo = sp.coo_matrix(matrix)
    src, dst, val = coo.row.astype(np.int64), coo.col.astype(np.int64), coo.data
    keep = np.ones(src.shape[0], dtype=bool)
    if symmetry != "general":
        keep &= src >= dst   # the reader mirrored the stored triangle; count the file's entries
    notes = []
    if fld != "pattern":
        zero = keep & (val == 0)
        if zero.any():
            notes.append(f"{path}: ignored {int(zero.sum())} explicit zero entries")
        keep &= val != 0
    raw = _Raw(src[keep], dst[keep], num_vertices=int(rows),
               locate_edge=lambda row: f"{path}: entry {row + 1}")
    raw.notes += notes
    return raw


def _npy_header(fh, where: str) -> tuple[tuple[int, ...], np.dtype, bool]:
    """(shape, dtype, fortran_order) from the header of an .npy stream, reading no data.
    Arrays of Python objects are refused here: reading them would mean unpickling."""
    fmt = np.lib.format
    try:
        version = fmt.read_magic(fh)
        if version == (1, 0):
            shape, fortran, dtype = fmt.read_array_header_1_0(fh)
        elif version == (2, 0):
            shape, fortran, dtype = fmt.read_array_header_2_0(fh)
        else:
            raise ValueError(f"unsupported .npy format version {version[0]}.{version[1]}")
    except Exception as exc:  # numpy raises ValueError/OSError/EOFError/SyntaxError here
        msg = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{where}: not a readable .npy array: {msg}") from None
    if dtype.hasobject:
        raise InputError(f"{where}: not a readable .npy array without unpickling (it holds "
                         f"Python objects; refused)")
    return tuple(int(d) for d in shape), dtype, bool(fortran)


def _npy_nbytes(shape, dtype) -> int:
    count = 1
    for d in shape:
        count *= d
    return count * dtype.itemsize


def _npy_read(open_stream, where: str, stored: int, check=None) -> np.ndarray:
    """An .npy array from `open_stream()` (a fresh binary stream each call): the header is
    read first, `check(shape, dtype)` may refuse it (a memory estimate, a shape test), a
    header declaring more data than the `stored` bytes is refused, then the data is read."""
    with open_stream() as fh:
        shape, dtype, _ = _npy_header(fh, where)
        data_bytes = stored - fh.tell()
    if check is not None:
        check(shape, dtype)
    nbytes = _npy_nbytes(shape, dtype)
    if nbytes > data_bytes:
        raise InputError(f"{where}: truncated: the header declares a {dtype} array of shape "
                         f"{shape} ({nbytes:,} bytes) but {max(data_bytes, 0):,} bytes follow")
    try:
        with open_stream() as fh:
            return np.lib.format.read_array(fh, allow_pickle=False)
    except Exception as exc:  # a damaged member: zlib, CRC or short-read errors
        msg = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{where}: damaged: {msg}") from None


def _npz_check_headers(path: Path, headers: dict) -> None:
    """Refuse from the member headers alone what must not be loaded: a wrong 'edges' or
    'num_vertices' layout, and sizes beyond this machine's memory."""
    shape, dtype = headers["edges"]
    if not np.issubdtype(dtype, np.integer) or len(shape) != 2 or shape[1] != 2:
        raise InputError(f"{path}: key 'edges' must be an m x 2 integer array, "
                         f"got {dtype} with shape {shape}")
    if "num_vertices" in headers:
        shape, dtype = headers["num_vertices"]
        if shape not in ((), (1,)) or not np.issubdtype(dtype, np.integer):
            raise InputError(f"{path}: key 'num_vertices' must be one non-negative integer, "
                             f"got {dtype} with shape {shape}")


def _npz_memory(path: Path, headers: dict, num_vertices: int | None) -> None:
    """The loading estimate from the declared sizes: every per-vertex array must end up with
    n rows, so n is the largest of them; plus the raw bytes of all members."""
    lengths = [headers[k][0][0] for k in ("features", "labels") + MASK_KEYS
               if k in headers and len(headers[k][0]) >= 1]
    n = max(lengths + ([num_vertices] if num_vertices is not None else []), default=0)
    m = headers["edges"][0][0]
    features = feature_bytes_of(*headers["features"]) if "features" in headers else 0
    stored = sum(_npy_nbytes(shape, dtype) for shape, dtype in headers.values())
    need = max(graph_load_bytes(n, m, features, labelled="labels" in headers), stored)
    require_memory(need, f"{path}: {n:,} vertices and {m:,} edge rows")


def open_npz(path: Path) -> tuple[zipfile.ZipFile, dict]:
    """(the open bundle, {key: ZipInfo}) of an .npz file, or one line saying why not; the
    in-memory reader and ingest open bundles here."""
    require_regular_file(path)
    try:
        bundle = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError, ValueError) as exc:
        with open_checked(path) as fh:
            single = fh.read(6) == b"\x93NUMPY"
        if single:
            raise InputError(f"{path}: not an .npz bundle (a single array)") from None
        raise InputError(f"{path}: not a readable .npz bundle: {exc}") from None
    members = {}
    for info in bundle.infolist():
        key = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
        members[key] = info
    return bundle, members


def _read_npz(path: Path) -> _Raw:
    bundle, members = open_npz(path)
    with bundle:
        unknown = sorted(set(members) - set(NPZ_KEYS))
        if unknown:
            raise InputError(f"{path}: unknown key {unknown[0]!r} (allowed: {', '.join(NPZ_KEYS)})")
        if "edges" not in members:
            raise InputError(f"{path}: missing key 'edges' (an m x 2 integer array)")

        def opener(info):
            return lambda: bundle.open(info)

        headers = {}
        for key, info in members.items():
            try:
                with bundle.open(info) as fh:
                    shape, dtype, _ = _npy_header(fh, f"{path}: key {key!r}")
            except (zipfile.BadZipFile, OSError, EOFError) as exc:
                raise InputError(f"{path}: key {key!r}: damaged ({exc})") from None
            headers[key] = (shape, dtype)
        _npz_check_headers(path, headers)
        nv_value = None
        if "num_vertices" in members:
            nv = _npy_read(opener(members["num_vertices"]), f"{path}: key 'num_vertices'",
                           members["num_vertices"].file_size)
            if nv.ravel()[0] < 0:
                raise InputError(f"{path}: key 'num_vertices' must be one non-negative "
                                 f"integer, got {nv.ravel()[0]}")
            nv_value = int(nv.ravel()[0])
        _npz_memory(path, headers, nv_value)
        arrays = {k: _npy_read(opener(info), f"{path}: key {k!r}", info.file_size)
                  for k, info in members.items() if k != "num_vertices"}
    edges = arrays["edges"]
    if edges.dtype == np.uint64 and edges.size and edges.max() > np.iinfo(np.int64).max:
        raise InputError(f"{path}: key 'edges': id too large")
    edges = edges.astype(np.int64, copy=False)
    raw = _Raw(edges[:, 0], edges[:, 1], locate_edge=lambda row: f"{path}: edges[{row}]")
    raw.num_vertices = nv_value
    if "features" in arrays:
        raw.features = _check_feature_array(arrays["features"], f"{path}: key 'features'")
    if "labels" in arrays:
        raw.labels = _check_label_array(arrays["labels"], f"{path}: key 'labels'")
    for key in MASK_KEYS:
        if key in arrays:
            m = arrays[key]
            if m.dtype != np.bool_ or m.ndim != 1:
                raise InputError(f"{path}: key {key!r} must be a 1-D bool array, "
                                 f"got {m.dtype} with shape {m.shape}")
            raw.masks[key] = m
    return raw


_READERS = {".npz": _read_npz, ".mtx": _read_mtx}
_READERS.update({s: _read_edge_list for s in EDGE_LIST_SUFFIXES})


# --------------------------------------------------------------------------- vertex data

def _check_feature_array(x: np.ndarray, where: str) -> np.ndarray:
    if x.ndim != 2:
        raise InputError(f"{where}: features must be a 2-D array (vertices x dims), "
                         f"got shape {x.shape}")
    if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)
            or x.dtype == np.bool_):
        raise InputError(f"{where}: features must be numbers, got dtype {x.dtype}")
    x = x.astype(np.float64 if x.dtype == np.float64 else np.float32, copy=False)
    finite = np.isfinite(x).all(axis=1)
    if not finite.all():
        row = int(np.argmin(finite))
        raise InputError(f"{where}: row {row}: NaN or infinite feature value")
    return x


def _check_label_array(y: np.ndarray, where: str) -> np.ndarray:
    if y.ndim != 1 or not np.issubdtype(y.dtype, np.integer):
        raise InputError(f"{where}: labels must be a 1-D integer array (-1 = unlabelled), "
                         f"got {y.dtype} with shape {y.shape}")
    y = y.astype(np.int64, copy=False)
    bad = y < -1
    if bad.any():
        row = int(np.argmax(bad))
        raise InputError(f"{where}: row {row}: label {y[row]} (use -1 for unlabelled)")
    return y


def _suffix(path: Path, allowed: tuple[str, ...], param: str) -> str:
    suffix = path.suffix.lower()
    if suffix not in allowed:
        if param == "graph":    # GRAPH is the argument itself: named as a word, not a flag
            raise InputError(f"{path}: unknown graph file type {suffix or '(none)'!r} "
                             f"(expected {', '.join(allowed)})")
        raise ParameterError(param, f"file type {suffix or '(none)'!r} "
                                    f"(expected {', '.join(allowed)})",
                             prefix=f"{path}: unknown ", sep=" ")
    return suffix


def load_features(path: str | os.PathLike) -> np.ndarray:
    """Features from `.npy` (2-D numbers) or `.csv` (one row per vertex)."""
    path = Path(path)
    if _suffix(path, (".npy", ".csv"), "features") == ".npy":
        return _check_feature_array(_load_npy(path), str(path))
    table = TextTable(path, kind="float", columns=None, what="features")
    d = table.columns or 0
    x = table.values.reshape(table.rows, d) if d else np.zeros((0, 0))
    finite = np.isfinite(x).all(axis=1)
    if not finite.all():
        row = int(np.argmin(finite))
        raise InputError(f"{path}:{table.line_of_row(row)}: NaN or infinite feature value")
    return x.astype(np.float32)


def load_labels(path: str | os.PathLike) -> np.ndarray:
    """Labels from `.npy` (1-D integers) or text with one integer per line (-1 = unlabelled)."""
    path = Path(path)
    if path.suffix.lower() == ".npy":
        return _check_label_array(_load_npy(path, labelled=True), str(path))
    table = TextTable(path, kind="int", columns=1, what="labels: one integer per line")
    y = table.values
    bad = y < -1
    if bad.any():
        row = int(np.argmax(bad))
        raise InputError(f"{path}:{table.line_of_row(row)}: label {y[row]} "
                         f"(use -1 for unlabelled)")
    return y


def read_npy(path: str | os.PathLike, check=None) -> np.ndarray:
    """One array from a regular `.npy` file, never unpickled. Only the header is read before
    `check(shape, dtype)` (which may raise InputError: a memory estimate, a shape test) and
    before a header that declares more data than the file holds is refused as truncated."""
    path = require_regular_file(path)
    return _npy_read(lambda: open_checked(path), str(path), os.stat(path).st_size, check)


def _vertex_data_memory(path: Path, labelled: bool):
    """A `read_npy` check: refuse vertex data whose declared rows would not fit (each row
    is a vertex of the graph, so the per-vertex cost of loading counts too)."""
    def check(shape, dtype):
        n = shape[0] if shape else 1
        need = graph_load_bytes(n, 0, feature_bytes_of(shape, dtype), labelled=labelled)
        require_memory(need, f"{path}: an array of shape {shape}")
    return check


def _load_npy(path: Path, labelled: bool = False) -> np.ndarray:
    return read_npy(path, _vertex_data_memory(path, labelled))


# --------------------------------------------------------------------------- deltas

@dataclass
class EdgeRows:
    """The edge rows of a file as written (ids unchecked, loops and repeats kept), and where
    each row is: `locate(row)` -> "file:line" (text) or "file: edges[row]" (.npz)."""

    src: np.ndarray
    dst: np.ndarray
    locate: Callable[[int], str]
    notes: list


def read_edge_rows(path: str | os.PathLike, *, param: str) -> EdgeRows:
    """Edge rows of any graph file format (`.npz` key 'edges', `.mtx`, text edge lists), for
    the edge files of a delta (`plan.update`); ids are the caller's to check."""
    path = require_regular_file(path, param=param)
    raw = _READERS[_suffix(path, GRAPH_SUFFIXES, param)](path)
    assert raw.locate_edge is not None        # every format reader sets it
    return EdgeRows(np.asarray(raw.src, dtype=np.int64), np.asarray(raw.dst, dtype=np.int64),
                    raw.locate_edge, list(raw.notes))


VERTEX_KEYS = ("num_vertices", "features", "labels") + MASK_KEYS


def read_vertex_bundle(path: str | os.PathLike, *, param: str) -> dict:
    """New vertices as an `.npz` bundle: any of `features` (rows x width), `labels`,
    `train_mask`, `val_mask`, `test_mask`, `num_vertices` (needed when there is neither
    features nor labels); every array checked as `load_graph` checks it and all of one
    length. Returns {"num_vertices": n, key: array, ...}; InputError naming the file."""
    path = require_regular_file(path, param=param)
    _suffix(path, (".npz",), param)
    bundle, members = open_npz(path)
    with bundle:
        unknown = sorted(set(members) - set(VERTEX_KEYS))
        if unknown:
            raise InputError(f"{path}: unknown key {unknown[0]!r} (allowed: "
                             f"{', '.join(VERTEX_KEYS)})")
        arrays = {}
        for key, info in members.items():
            try:
                arrays[key] = _npy_read(lambda info=info: bundle.open(info),
                                        f"{path}: key {key!r}", info.file_size)
            except (zipfile.BadZipFile, OSError, EOFError) as exc:
                raise InputError(f"{path}: key {key!r}: damaged ({exc})") from None
    out: dict = {}
    if "features" in arrays:
        out["features"] = _check_feature_array(arrays["features"], f"{path}: key 'features'")
    if "labels" in arrays:
        out["labels"] = _check_label_array(arrays["labels"], f"{path}: key 'labels'")
    for key in MASK_KEYS:
        if key in arrays:
            m = arrays[key]
            if m.dtype != np.bool_ or m.ndim != 1:
                raise InputError(f"{path}: key {key!r} must be a 1-D bool array, "
                                 f"got {m.dtype} with shape {m.shape}")
            out[key] = m
    lengths = {key: int(v.shape[0]) for key, v in out.items()}
    if "num_vertices" in arrays:
        nv = arrays["num_vertices"]
        if nv.size != 1 or not np.issubdtype(nv.dtype, np.integer) or int(nv.ravel()[0]) < 0:
            raise InputError(f"{path}: key 'num_vertices' must be one non-negative integer")
        lengths["num_vertices"] = int(nv.ravel()[0])
    if not lengths:
        raise InputError(f"{path}: holds no vertices (give 'features', 'labels' or "
                         f"'num_vertices')")
    if len(set(lengths.values())) > 1:
        text = ", ".join(f"{key} {n}" for key, n in lengths.items())
        raise InputError(f"{path}: keys disagree on the number of new vertices ({text})")
    out["num_vertices"] = next(iter(lengths.values()))
    return out


# --------------------------------------------------------------------------- load_graph

def _check_ids(raw: _Raw, n: int, where: str) -> None:
    assert raw.locate_edge is not None        # every format reader sets it
    neg = (raw.src < 0) | (raw.dst < 0)
    if neg.any():
        row = int(np.argmax(neg))
        vid = min(int(raw.src[row]), int(raw.dst[row]))
        raise InputError(f"{raw.locate_edge(row)}: negative vertex id {vid}")
    big = (raw.src >= n) | (raw.dst >= n)
    if big.any():
        row = int(np.argmax(big))
        vid = max(int(raw.src[row]), int(raw.dst[row]))
        raise InputError(f"{raw.locate_edge(row)}: vertex id {vid} >= number of vertices {n} "
                         f"({where})")


def load_graph(path: str | os.PathLike, *, features: str | os.PathLike | None = None,
               labels: str | os.PathLike | None = None, input_dim: int | None = None,
               seed: int = 0) -> LoadedGraph:
    """Read, validate and clean a graph file (plus optional features/labels files).

    The graph is made undirected and simple (see `csr_from_edges`); num_vertices is the
    bundle's `num_vertices`, the .mtx size, the feature (or label) row count, or else the
    largest id + 1. Missing split masks are made with `make_masks(labels, seed)`.
    A graph directory (`shardtrain ingest`, `data.graphdir`) gives the same LoadedGraph as
    the file it was made from.
    """
    path = Path(path)
    if path.is_dir():
        return _load_graph_dir(path, features, labels, input_dim, seed)
    suffix = _suffix(path, GRAPH_SUFFIXES, "graph")
    raw = _READERS[suffix](path)
    notes = list(raw.notes)
    if features is not None:
        if raw.features is not None:
            notes.append(f"--features {features} replaces the features in {path}")
        raw.features = load_features(features)
        feat_where = f"{option('features')} {features}"
    else:
        feat_where = f"{path}: key 'features'"
    if labels is not None:
        if raw.labels is not None:
            notes.append(f"--labels {labels} replaces the labels in {path}")
        raw.labels = load_labels(labels)
        label_where = f"{option('labels')} {labels}"
    else:
        label_where = f"{path}: key 'labels'"

    # the vertex count: declared, else implied by vertex data, else by the largest id
    if raw.num_vertices is not None:
        n, n_where = raw.num_vertices, "declared in the graph file"
    elif raw.features is not None:
        n, n_where = raw.features.shape[0], f"the rows of {feat_where}"
    elif raw.labels is not None:
        n, n_where = raw.labels.shape[0], f"the rows of {label_where}"
    else:
        n = int(max(raw.src.max(initial=-1), raw.dst.max(initial=-1))) + 1
        n_where = "largest id + 1"
        n = max(n, 0)
    _check_ids(raw, n, n_where)
    if n == 0:
        raise InputError(f"{path}: empty graph (no vertices)")
    if raw.features is not None and raw.features.shape[0] != n:
        text = f"{raw.features.shape[0]} feature rows, but the graph has {n} vertices ({n_where})"
        raise (ParameterError("features", text, value=features) if features is not None
               else InputError(f"{feat_where}: {text}"))
    if raw.labels is not None and raw.labels.shape[0] != n:
        text = f"{raw.labels.shape[0]} labels, but the graph has {n} vertices ({n_where})"
        raise (ParameterError("labels", text, value=labels) if labels is not None
               else InputError(f"{label_where}: {text}"))
    if raw.features is not None and input_dim is not None and raw.features.shape[1] != input_dim:
        raise ParameterError("input_dim", f"does not match the {raw.features.shape[1]} "
                                          f"feature columns of {feat_where}",
                             value=input_dim, sep=" ")
    if input_dim is not None and input_dim < 1:
        raise ParameterError("input_dim", "must be at least 1", value=input_dim)
    _require_load_memory(path, raw, n, n_where)

    masks = _masks(path, raw, n, seed, notes)
    indptr, indices, cleanup = csr_from_edges(raw.src, raw.dst, n)
    del raw.src, raw.dst
    if cleanup.self_loops or cleanup.duplicates:
        notes.append(f"dropped {cleanup.self_loops} self-loops (vertices with a loop) and "
                     f"{cleanup.duplicates} duplicate edges (rows repeating a pair, in either "
                     f"direction)")
    graph = Graph(indptr, indices, raw.features, raw.labels, *masks)
    dim = graph.input_dim if graph.input_dim is not None else input_dim
    return LoadedGraph(graph, cleanup, str(path), notes, dim)


def _require_load_memory(path: Path, raw: _Raw, n: int, n_where: str) -> None:
    """Before the masks and the CSR (both O(n) and O(m)): refuse a vertex count or edge
    count this machine cannot hold, naming where the count came from."""
    need = graph_load_bytes(n, raw.src.shape[0],
                            raw.features.nbytes if raw.features is not None else 0,
                            labelled=raw.labels is not None)
    if n_where == "largest id + 1":
        assert raw.locate_edge is not None    # every format reader sets it
        row = int(np.argmax(np.maximum(raw.src, raw.dst)))
        source = f"{raw.locate_edge(row)}: vertex id {n - 1:,} (so {n:,} vertices)"
    else:
        source = f"{path}: {n:,} vertices ({n_where})"
    require_memory(need, source)


def _masks(path: Path, raw: _Raw, n: int, seed: int, notes: list[str]):
    if raw.labels is None:
        if raw.masks:
            raise InputError(f"{path}: key {next(iter(raw.masks))!r} given without labels")
        return (None, None, None)
    labelled = raw.labels >= 0
    if raw.masks:
        for key in MASK_KEYS:
            if key not in raw.masks:
                raise InputError(f"{path}: key {key!r} missing (give all three masks or none)")
        out = []
        for key in MASK_KEYS:
            m = raw.masks[key]
            if m.shape[0] != n:
                raise InputError(f"{path}: key {key!r} has length {m.shape[0]}, "
                                 f"the graph has {n} vertices")
            stray = m & ~labelled
            if stray.any():
                raise InputError(f"{path}: key {key!r}: vertex {int(np.argmax(stray))} "
                                 f"is unlabelled (-1)")
            out.append(m)
        train, val, test = out
    else:
        train, val, test = make_masks(raw.labels, seed)
        notes.append(f"made split masks from --seed {seed}: {int(train.sum())} train, "
                     f"{int(val.sum())} validation, {int(test.sum())} test")
    if not train.any():
        raise InputError(f"{path}: labels given but no training vertex "
                         f"({'train_mask is empty' if raw.masks else 'no vertex is labelled'})")
    return train, val, test


def _load_graph_dir(path: Path, features, labels, input_dim, seed) -> LoadedGraph:
    """GRAPH_DIR read into memory with the in-memory Graph's dtypes: the same Graph, notes
    (the ingest's reader notes, then these options', the made masks', the cleanup's) and
    fingerprints as `load_graph` of the file it was ingested from."""
    from shardtrain.data.graphdir import GRAPH_MANIFEST, is_graph_dir, open_graph_dir

    if not is_graph_dir(path):
        raise InputError(f"{path}: is a directory without {GRAPH_MANIFEST}, not a graph directory "
                         f"(`shardtrain ingest` writes one)")
    gd = open_graph_dir(path)
    n, m = gd.num_vertices, gd.num_edges
    stored = gd.features.nbytes if gd.features is not None else 0
    require_memory(8 * (n + 1) + 16 * m + gd.indices.dtype.itemsize * 2 * m + stored
                   + LOAD_BYTES_PER_VERTEX_DIR * n,
                   f"{path}: {n:,} vertices and {m:,} edges")
    notes = [str(x) for x in gd.manifest.get("notes", [])]
    raw = _Raw(np.zeros(0, np.int64), np.zeros(0, np.int64), num_vertices=n,
               features=None if gd.features is None else np.array(gd.features),
               labels=None if gd.labels is None else np.array(gd.labels),
               masks={k: np.array(a) for k, a in gd.masks.items()})
    feat_where, label_where = f"{path}: features.npy", f"{path}: labels.npy"
    if features is not None:
        if raw.features is not None:
            notes.append(f"--features {features} replaces the features in {path}")
        raw.features = load_features(features)
        feat_where = f"{option('features')} {features}"
    if labels is not None:
        if raw.labels is not None:
            notes.append(f"--labels {labels} replaces the labels in {path}")
        raw.labels, label_where = load_labels(labels), f"{option('labels')} {labels}"
    where = f"{path}: {n} vertices (declared in {GRAPH_MANIFEST})"
    if raw.features is not None and raw.features.shape[0] != n:
        raise InputError(f"{feat_where}: {raw.features.shape[0]} feature rows, but {where}")
    if raw.labels is not None and raw.labels.shape[0] != n:
        raise InputError(f"{label_where}: {raw.labels.shape[0]} labels, but {where}")
    if raw.features is not None and input_dim is not None and raw.features.shape[1] != input_dim:
        raise ParameterError("input_dim", f"does not match the {raw.features.shape[1]} "
                                          f"feature columns of {feat_where}",
                             value=input_dim, sep=" ")
    if input_dim is not None and input_dim < 1:
        raise ParameterError("input_dim", "must be at least 1", value=input_dim)
    masks = _masks(path, raw, n, seed, notes)
    cleanup = gd.cleanup
    if cleanup.self_loops or cleanup.duplicates:
        notes.append(f"dropped {cleanup.self_loops} self-loops (vertices with a loop) and "
                     f"{cleanup.duplicates} duplicate edges (rows repeating a pair, in either "
                     f"direction)")
    graph = Graph(np.array(gd.indptr), gd.indices.astype(np.int64), raw.features, raw.labels,
                  *masks)
    dim = graph.input_dim if graph.input_dim is not None else input_dim
    return LoadedGraph(graph, cleanup, str(path), notes, dim)


# loading a graph directory, per vertex: labels, masks and the split drawing (see
# LOAD_BYTES_PER_LABELLED_VERTEX; counted whether or not there are labels)
LOAD_BYTES_PER_VERTEX_DIR = 64
