"""Ingest: edges from any source we read, turned into a graph directory in bounded memory.

Sources: `.npz` bundles (the edges and the features streamed from the zip in chunks; the
labels and masks, O(n), read whole),
Matrix Market `.mtx` and text edge lists (scanned in chunks by the byte scanner of
`data.textscan`), raw binary `.npy` edge arrays (m x 2 integers, memory-mapped) and Apache
Parquet files or folders of them (two integer columns, read row group by row group).

Three passes, each bounded by the memory budget (`extsort.Budget`):
  reading    every source once: ids checked, the largest id, the rows and a degree histogram
             counted; sources that are costly to parse again (text, .mtx) are spooled to a
             binary file meanwhile;
  bucketing  the rows again (re-read, or from the spool) as keys of both directions, into
             bucket files by key range;
  sorting    each bucket sorted alone and appended to indices.npy / indptr.npy.
Everything is written inside the temporary sibling of the output (`files.atomic_directory`);
a watcher process removes that folder if this process dies (SIGKILL included), so a killed
ingest leaves nothing, and an error or a full disk removes it at once.

The vertex count follows `readers.load_graph`: declared (the bundle's num_vertices, the .mtx
size; the largest over the sources), else the rows of the features, else of the labels, else
the largest id + 1. The cleanup counts are those of `graph.csr_from_edges` over all rows.
"""
from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np

from shardtrain.data import readers
from shardtrain.data.extsort import (
    BucketWriter,
    Budget,
    DegreeHistogram,
    edge_keys,
    plan_buckets,
    read_keys,
    sort_buckets,
    write_array,
)
from shardtrain.data.graph import EdgeCleanup
from shardtrain.data.graphdir import FORMAT, GRAPH_MANIFEST, VERSION, index_dtype_for
from shardtrain.data.inputs import open_checked, require_regular_file
from shardtrain.data.masks import MASK_KEYS
from shardtrain.data.textscan import (
    TextTable,
    int_values,
    is_float_token,
    is_int_token,
    line_text,
    maybe_header,
    show,
    strip_comment,
    text_chunks,
    tokenize,
)
from shardtrain.errors import InputError
from shardtrain.hooks import pause_point

PARQUET_SUFFIXES = (".parquet", ".pq")
SOURCE_SUFFIXES = readers.GRAPH_SUFFIXES + (".npy",) + PARQUET_SUFFIXES
MAX_VERTICES = 3_000_000_000          # keys row * n + col must fit int64 (n**2 < 2**63)

Progress = Callable[[str, int, str], "ProgressBar"]


class ProgressBar:
    """What a progress factory returns; this one does nothing (no terminal)."""

    def update(self, k: int) -> None:
        pass

    def close(self) -> None:
        pass


def no_progress(name: str, total: int, unit: str) -> ProgressBar:
    return ProgressBar()


@dataclass
class EdgeChunk:
    src: np.ndarray                   # int64
    dst: np.ndarray                   # int64
    locate: Callable[[int], str]      # row of the chunk -> "file:line", "file: row group g, row r"


@dataclass
class VertexData:
    features: Any = None      # an array, a read-only map or _ZipRows (shape, dtype, [rows])
    features_where: str = ""
    labels: np.ndarray | None = None
    labels_where: str = ""
    masks: dict = field(default_factory=dict)
    masks_where: str = ""
    replace_notes: list = field(default_factory=list)


class Source:
    """One input: its edge rows in chunks (`chunks`), what it declares, and its notes."""

    rereadable = True                 # False: parse once and spool (text)
    declared_n: int | None = None

    def __init__(self, path: Path):
        self.path = path
        self.notes: list[str] = []
        self.vertex = VertexData()

    def chunks(self, budget: Budget) -> Iterator[EdgeChunk]:
        raise NotImplementedError

    def prepare(self, work: Path, budget: Budget) -> None:
        """Work done once before the passes, in the ingest's work folder (a database source
        runs its queries here)."""

    def describe(self) -> str:
        """The source as the manifest's "sources" list names it."""
        return str(self.path)


def _at_lines(path: Path, lines: np.ndarray) -> Callable[[int], str]:
    """Row of a chunk -> "file:line"."""
    return lambda row: f"{path}:{lines[row]}"


def _at_rows(prefix: str, first: int, fmt: str = "{prefix}: row {row}") -> Callable[[int], str]:
    """Row of a chunk -> its place in a whole array ("file: row 12", "file: key[12]")."""
    return lambda row: fmt.format(prefix=prefix, row=first + row)


# ---------------------------------------------------------------- text


class TextStream(TextTable):
    """`TextTable`'s byte scanner run chunk by chunk: `blocks()` yields (rows x columns
    values, 1-based line of each row) with the same checks and messages, never the whole
    table."""

    def __init__(self, path: Path, *, kind: str, columns: int | None, what: str,
                 chunk_bytes: int, start: int = 0, first_line: int = 0,
                 header_allowed: bool = True):
        self.path, self.kind, self.columns, self.what = path, kind, columns, what
        self.header: tuple[int, str] | None = None
        self.chunk_bytes, self.start, self.first_line = chunk_bytes, start, first_line
        self.header_allowed = header_allowed

    def blocks(self) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        token_ok = is_int_token if self.kind == "int" else is_float_token
        line_offset = self.first_line
        header_possible = self.header_allowed
        for chunk in text_chunks(self.path, self.start, self.chunk_bytes):
            c = tokenize(chunk)
            if header_possible and (~c.skip & (c.counts > 0)).any():
                header_possible = False
                h = maybe_header(c, chunk)
                if h is not None:
                    c.skip[h] = True
                    self.header = (line_offset + h + 1,
                                   show(strip_comment(line_text(chunk, h))))
            data_line = ~c.skip & (c.counts > 0)
            if self.columns is None and data_line.any():
                self.columns = int(c.counts[np.argmax(data_line)])
            keep = data_line[c.line]
            self._check_chunk(c, chunk, data_line, keep, line_offset, token_ok)
            if self.kind == "int":
                values = int_values(c, keep)
            else:
                values = self._float_values(c, chunk, data_line, line_offset, token_ok)
            lines = np.flatnonzero(data_line) + line_offset + 1
            line_offset += c.counts.shape[0]
            if lines.shape[0]:
                yield values.reshape(lines.shape[0], -1), lines


class EdgeListSource(Source):
    rereadable = False

    def chunks(self, budget):
        stream = TextStream(self.path, kind="int", columns=2,
                            what="edge list: two integer vertex ids",
                            chunk_bytes=budget.text_chunk_bytes)
        for values, lines in stream.blocks():
            yield EdgeChunk(values[:, 0], values[:, 1],
                            _at_lines(self.path, lines))
        if stream.header is not None:
            self.notes.append(f"{self.path}: skipped header line {stream.header[0]}: "
                              f"{stream.header[1]}")


class MatrixMarketSource(Source):
    rereadable = False

    def __init__(self, path: Path):
        super().__init__(path)
        (self.size_line, self.fmt, self.field, _, rows, cols, self.entries,
         self.after) = readers._mtx_header(path)
        if rows != cols:
            raise InputError(f"{path}:{self.size_line}: adjacency must be square, got "
                             f"{rows} x {cols}")
        if self.field == "complex":
            raise InputError(f"{path}:1: complex matrices are not adjacency matrices")
        room = (self.after + 1) // (4 if self.fmt == "coordinate" else 2)
        if self.entries > room:
            raise InputError(f"{path}:{self.size_line}: declares {self.entries:,} entries, "
                             f"but the {self.after:,} bytes after the size line hold at most "
                             f"{room:,}")
        self.declared_n = self.rows = int(rows)

    def chunks(self, budget):
        if self.fmt == "array":            # dense: small by nature, read as load_graph does
            raw = readers._read_mtx(self.path)
            self.notes += raw.notes
            assert raw.locate_edge is not None
            yield EdgeChunk(raw.src, raw.dst, raw.locate_edge)
            return
        pattern = self.field == "pattern"
        kind = "int" if self.field in ("pattern", "integer") else "float"
        stream = TextStream(self.path, kind=kind, columns=2 if pattern else 3,
                            what="Matrix Market entry: ROW COL" + ("" if pattern else " VALUE"),
                            chunk_bytes=budget.text_chunk_bytes,
                            start=os.stat(self.path).st_size - self.after,
                            first_line=self.size_line, header_allowed=False)
        found = zeros = 0
        rows = int(self.rows)
        for values, lines in stream.blocks():
            found += values.shape[0]
            ids = values[:, :2]
            if kind == "float":
                bad = ids != np.floor(ids)
                if bad.any():
                    row = int(np.argmax(bad.any(axis=1)))
                    raise InputError(f"{self.path}:{lines[row]}: vertex ids must be integers")
            ids = ids.astype(np.int64) - 1
            keep = np.ones(ids.shape[0], dtype=bool) if pattern else values[:, 2] != 0
            zeros += int(np.count_nonzero(~keep))
            out = (ids < 0) | (ids >= rows)
            if out.any():
                row = int(np.argmax(out.any(axis=1)))
                raise InputError(f"{self.path}:{lines[row]}: vertex id "
                                 f"{int(ids[row][out[row]][0]) + 1} is outside "
                                 f"1..{rows}")
            kept_lines = lines[keep]
            yield EdgeChunk(ids[keep, 0], ids[keep, 1],
                            _at_lines(self.path, kept_lines))
        if found != self.entries:
            raise InputError(f"{self.path}:{self.size_line}: declares {self.entries:,} "
                             f"entries, found {found:,}")
        if zeros:
            self.notes.append(f"{self.path}: ignored {zeros} explicit zero entries")


# ---------------------------------------------------------------- binary


def _as_ids(a: np.ndarray, where: str) -> np.ndarray:
    if a.dtype == np.uint64 and a.size and a.max() > np.iinfo(np.int64).max:
        raise InputError(f"{where}: id too large")
    return a.astype(np.int64, copy=False)


class NpySource(Source):
    """A raw m x 2 integer array in a .npy file, read in chunks of rows (plain reads, not a
    map: no page of the file stays in this process)."""

    def __init__(self, path: Path):
        super().__init__(path)
        require_regular_file(path)
        with open_checked(path) as fh:
            shape, self.dtype, self.fortran = readers._npy_header(fh, str(path))
            self.offset = fh.tell()
        if len(shape) != 2 or shape[1] != 2 or not np.issubdtype(self.dtype, np.integer):
            raise InputError(f"{path}: an edge array must be m x 2 integers, got "
                             f"{self.dtype} with shape {shape}")
        self.rows = shape[0]
        stored = os.stat(path).st_size - self.offset
        if stored < 2 * self.rows * self.dtype.itemsize:
            raise InputError(f"{path}: truncated: the header declares {self.rows:,} rows")

    def chunks(self, budget):
        r, m, dt = budget.chunk_rows, self.rows, self.dtype
        for s in range(0, m, r):
            k = min(r, m - s)
            if self.fortran:     # column-major: all first ids, then all second ids
                src = read_keys(self.path, s, k, dt, self.offset)
                dst = read_keys(self.path, m + s, k, dt, self.offset)
            else:
                pair = read_keys(self.path, 2 * s, 2 * k, dt, self.offset).reshape(k, 2)
                src, dst = pair[:, 0], pair[:, 1]
            where = f"{self.path}: rows {s}.."
            yield EdgeChunk(_as_ids(src, where), _as_ids(dst, where),
                            _at_rows(str(self.path), s))


class NpzSource(Source):
    """A bundle: the edges and features streamed out of the zip, labels and masks read whole."""

    def __init__(self, path: Path):
        super().__init__(path)
        bundle, members = readers.open_npz(path)
        with bundle:
            unknown = sorted(set(members) - set(readers.NPZ_KEYS))
            if unknown:
                raise InputError(f"{path}: unknown key {unknown[0]!r} (allowed: "
                                 f"{', '.join(readers.NPZ_KEYS)})")
            if "edges" not in members:
                raise InputError(f"{path}: missing key 'edges' (an m x 2 integer array)")
            headers, orders = {}, {}
            for key, info in members.items():
                try:
                    with bundle.open(info) as fh:
                        shape, dtype, fortran = readers._npy_header(fh, f"{path}: key {key!r}")
                except (zipfile.BadZipFile, OSError, EOFError) as exc:
                    raise InputError(f"{path}: key {key!r}: damaged ({exc})") from None
                headers[key] = (shape, dtype)
                orders[key] = fortran
            readers._npz_check_headers(path, headers)
            self.edge_shape, self.edge_dtype = headers["edges"]
            self.fortran = orders["edges"]
            self.member = members["edges"]

            def opener(info):
                return lambda: bundle.open(info)

            if "num_vertices" in members:
                nv = readers._npy_read(opener(members["num_vertices"]),
                                       f"{path}: key 'num_vertices'",
                                       members["num_vertices"].file_size)
                if nv.ravel()[0] < 0:
                    raise InputError(f"{path}: key 'num_vertices' must be one non-negative "
                                     f"integer, got {nv.ravel()[0]}")
                self.declared_n = int(nv.ravel()[0])
            # features in row order stream out of the zip when copied (see _ZipRows);
            # the O(n) labels and masks, and column-major features, are read whole
            streamed = ("features" in members and not orders["features"]
                        and len(headers["features"][0]) == 2)
            arrays = {k: readers._npy_read(opener(members[k]), f"{path}: key {k!r}",
                                           members[k].file_size)
                      for k in ("features", "labels") + MASK_KEYS
                      if k in members and not (k == "features" and streamed)}
        v = self.vertex
        if streamed:
            shape, dtype = headers["features"]
            where = f"{path}: key 'features'"
            if not (np.issubdtype(dtype, np.floating) or np.issubdtype(dtype, np.integer)
                    or dtype == np.bool_):
                raise InputError(f"{where}: features must be numbers, got dtype {dtype}")
            v.features = _ZipRows(path, members["features"], shape, dtype)
            v.features_where = where
        elif "features" in arrays:
            v.features = readers._check_feature_array(arrays["features"],
                                                      f"{path}: key 'features'")
            v.features_where = f"{path}: key 'features'"
        if "labels" in arrays:
            v.labels = readers._check_label_array(arrays["labels"], f"{path}: key 'labels'")
            v.labels_where = f"{path}: key 'labels'"
        for key in MASK_KEYS:
            if key in arrays:
                m = arrays[key]
                if m.dtype != np.bool_ or m.ndim != 1:
                    raise InputError(f"{path}: key {key!r} must be a 1-D bool array, "
                                     f"got {m.dtype} with shape {m.shape}")
                v.masks[key] = m
        v.masks_where = str(path)

    def chunks(self, budget):
        m = self.edge_shape[0]
        item = self.edge_dtype.itemsize
        r = budget.chunk_rows
        where = f"{self.path}: key 'edges'"
        with zipfile.ZipFile(self.path) as bundle:
            a = bundle.open(self.member)
            readers._npy_header(a, where)
            b = None
            if self.fortran:          # column-major: all sources, then all targets
                b = bundle.open(self.member)
                readers._npy_header(b, where)
                b.seek(b.tell() + m * item)
            try:
                for s in range(0, m, r):
                    k = min(r, m - s)
                    if b is None:
                        pair = self._read(a, 2 * k * item).reshape(k, 2)
                        src, dst = pair[:, 0], pair[:, 1]
                    else:
                        src, dst = self._read(a, k * item), self._read(b, k * item)
                    yield EdgeChunk(_as_ids(src, where), _as_ids(dst, where),
                                    _at_rows(where, s, "{prefix}[{row}]"))
            except (zipfile.BadZipFile, OSError, EOFError) as exc:
                raise InputError(f"{where}: damaged ({exc})") from None
            finally:
                a.close()
                if b is not None:
                    b.close()

    def _read(self, fh, nbytes: int) -> np.ndarray:
        data = fh.read(nbytes)
        if len(data) != nbytes:
            raise InputError(f"{self.path}: key 'edges': truncated")
        return np.frombuffer(data, dtype=self.edge_dtype)


class _ZipRows:
    """A row-major (n, d) array member of a zip, read in row slices taken in order (what
    `_copy_vertex_array` asks for): never the whole array in memory."""

    def __init__(self, path: Path, member, shape, dtype):
        self.path, self.member = path, member
        self.shape, self.dtype, self.ndim = tuple(shape), np.dtype(dtype), len(shape)
        self.row_bytes = int(np.prod(self.shape[1:])) * self.dtype.itemsize
        self._fh: Any = None
        self._pos = 0
        self._bundle: Any = None

    def __getitem__(self, rows: slice) -> np.ndarray:
        start, stop, _ = rows.indices(self.shape[0])
        where = f"{self.path}: key 'features'"
        try:
            if self._fh is None or self._pos != start:
                # a fresh stream (a compressed member can only be read forward)
                self.close()
                self._bundle = zipfile.ZipFile(self.path)
                self._fh = self._bundle.open(self.member)
                readers._npy_header(self._fh, where)
                self._fh.seek(self._fh.tell() + start * self.row_bytes)
            data = self._fh.read((stop - start) * self.row_bytes)
        except (zipfile.BadZipFile, OSError, EOFError) as exc:
            self.close()
            raise InputError(f"{where}: damaged ({exc})") from None
        self._pos = stop
        if len(data) != (stop - start) * self.row_bytes:
            self.close()
            raise InputError(f"{where}: truncated")
        if stop == self.shape[0]:
            self.close()
        return np.frombuffer(data, dtype=self.dtype).reshape((stop - start,) + self.shape[1:])

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._bundle.close()
        self._fh, self._pos = None, 0


class ParquetSource(Source):
    """A Parquet file or a folder of them; two integer columns, read row group by row group
    (within a row group in batches of the budget's chunk size)."""

    def __init__(self, path: Path, src_col: str, dst_col: str):
        super().__init__(path)
        self.src_col, self.dst_col = src_col, dst_col
        if path.is_dir():
            files = sorted(p for p in path.rglob("*") if p.suffix.lower() in PARQUET_SUFFIXES
                           and p.is_file() and not any(part.startswith((".", "_"))
                                                       for part in p.relative_to(path).parts))
            if not files:
                raise InputError(f"{path}: a folder without .parquet files")
        else:
            files = [require_regular_file(path)]
        self.files = files
        for f in files:
            self._open(f)      # every file checked before any work

    def _open(self, f: Path):
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            pf = pq.ParquetFile(f)
        except Exception as exc:   # pyarrow raises ArrowInvalid, OSError, ...: a bad file
            msg = " ".join(str(exc).split()) or type(exc).__name__
            raise InputError(f"{f}: not a readable Parquet file: {msg}") from None
        schema = pf.schema_arrow
        for option, col in (("--src", self.src_col), ("--dst", self.dst_col)):
            if col not in schema.names:
                raise InputError(f"{f}: no column {col!r} ({option}; the columns are "
                                 f"{', '.join(schema.names)})")
            t = schema.field(col).type
            if pa.types.is_dictionary(t):
                t = t.value_type
            if not pa.types.is_integer(t):
                raise InputError(f"{f}: column {col!r} ({option}) holds {t}, expected "
                                 f"integer vertex ids")
        return pf

    def chunks(self, budget):
        for f in self.files:
            pf = self._open(f)
            for g in range(pf.num_row_groups):
                offset = 0
                try:
                    batches = pf.iter_batches(batch_size=budget.chunk_rows, row_groups=[g],
                                              columns=[self.src_col, self.dst_col],
                                              use_threads=False)
                    for batch in batches:
                        cols = []
                        for col in (self.src_col, self.dst_col):
                            a = batch.column(col)
                            if a.null_count:
                                row = int(np.argmax(~np.asarray(a.is_valid())))
                                raise InputError(f"{f}: row group {g}: null vertex id in "
                                                 f"column {col!r} (row {offset + row} of the "
                                                 f"group)")
                            cols.append(_as_ids(np.asarray(a.to_numpy(zero_copy_only=False)),
                                                f"{f}: row group {g}: column {col!r}"))
                        yield EdgeChunk(cols[0], cols[1],
                                        _at_rows(f"{f}: row group {g}", offset,
                                                 "{prefix}, row {row}"))
                        offset += batch.num_rows
                except InputError:
                    raise
                except Exception as exc:   # pyarrow's decoding errors: a damaged file
                    msg = " ".join(str(exc).split()) or type(exc).__name__
                    raise InputError(f"{f}: row group {g}: not readable: {msg}") from None


def open_source(path, src_col: str = "src", dst_col: str = "dst") -> Source:
    """The Source for a path, by its suffix (a folder: Parquet files)."""
    path = Path(path)
    if path.is_dir():
        return ParquetSource(path, src_col, dst_col)
    suffix = path.suffix.lower()
    if suffix not in SOURCE_SUFFIXES:
        raise InputError(f"{path}: unknown source file type {suffix or '(none)'!r} "
                         f"(expected {', '.join(SOURCE_SUFFIXES)}, or a folder of .parquet)")
    if suffix in PARQUET_SUFFIXES:
        return ParquetSource(path, src_col, dst_col)
    if suffix == ".npz":
        return NpzSource(path)
    if suffix == ".mtx":
        return MatrixMarketSource(path)
    if suffix == ".npy":
        return NpySource(path)
    require_regular_file(path)
    return EdgeListSource(path)


# ---------------------------------------------------------------- writing


def _npy_header(dtype: np.dtype, shape: tuple) -> bytes:
    import io

    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype)),
              "fortran_order": False, "shape": shape})
    return buf.getvalue()


class _Hash:
    """`graph.fingerprint` / `structure_fingerprint`, fed in pieces."""

    def __init__(self):
        self.h = hashlib.sha256()

    def array_start(self, dtype: np.dtype, shape: tuple) -> None:
        self.h.update(f"{np.dtype(dtype).str}{shape}".encode())

    def update(self, a: np.ndarray) -> None:
        self.h.update(np.ascontiguousarray(a).tobytes())

    def none(self) -> None:
        self.h.update(b"none")

    def hex(self) -> str:
        return self.h.hexdigest()[:16]


def _copy_vertex_array(a: np.ndarray, out: Path, dtype, rows: int, check=None,
                       hashes=()) -> None:
    """Copy an (n, ...) array (a map, or in memory) to `out` as .npy in row chunks,
    converting to `dtype`; `check(chunk, first_row)` may refuse a chunk."""
    dtype = np.dtype(dtype)
    shape = tuple(a.shape)
    for h in hashes:
        h.array_start(dtype, shape)
    per_row = max(1, int(np.prod(shape[1:])) * max(dtype.itemsize, a.dtype.itemsize))
    step = max(1, min(shape[0], rows // per_row if rows else shape[0]))
    with open(out, "wb") as fh:
        fh.write(_npy_header(dtype, shape))
        for s in range(0, shape[0], step):
            part = np.asarray(a[s:s + step]).astype(dtype, copy=False)
            if check is not None:
                check(part, s)
            write_array(fh, part)
            for h in hashes:
                h.update(part)


def _feature_check(where: str):
    def check(part, first):
        finite = np.isfinite(part).all(axis=1)
        if not finite.all():
            raise InputError(f"{where}: row {first + int(np.argmin(finite))}: NaN or "
                             f"infinite feature value")
    return check


def _open_features(path: Path) -> tuple[np.ndarray, str]:
    """--features: a .npy memory-mapped (copied in chunks later), a .csv read whole."""
    if path.suffix.lower() != ".npy":
        return readers.load_features(path), f"--features {path}"
    require_regular_file(path)
    try:
        x = np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError, EOFError) as exc:
        msg = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: not a readable .npy array: {msg}") from None
    if x.ndim != 2:
        raise InputError(f"{path}: features must be a 2-D array (vertices x dims), "
                         f"got shape {x.shape}")
    if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)
            or x.dtype == np.bool_):
        raise InputError(f"{path}: features must be numbers, got dtype {x.dtype}")
    return x, f"--features {path}"


@dataclass
class IngestResult:
    num_vertices: int
    num_edges: int
    rows: int
    cleanup: EdgeCleanup
    buckets: int
    largest_bucket: int
    working_bytes: int          # the estimate of the passes' peak working memory
    manifest: dict


class _Watcher:
    """A process that removes the folder it is told (`watch(path)`) once this process ends
    without having closed the watch (killed, SIGKILL included): it waits for the end of a
    pipe that only this process holds open. Closed after the folder is renamed away (or
    removed), it finds nothing to remove."""

    CODE = ("import os,shutil,sys\n"
            "p=sys.stdin.buffer.readline().decode().rstrip('\\n')\n"
            "done=sys.stdin.buffer.read()\n"
            "p and not done and os.path.isdir(p) and shutil.rmtree(p, ignore_errors=True)\n")

    def __enter__(self):
        try:
            self.proc: subprocess.Popen | None = subprocess.Popen(
                [sys.executable, "-c", self.CODE], stdin=subprocess.PIPE,
                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
        except OSError:
            self.proc = None     # no watcher: errors still clean up, only a kill would not
        return self

    def __call__(self, folder: Path) -> None:
        if self.proc is not None and self.proc.stdin is not None:
            self.proc.stdin.write(str(folder).encode() + b"\n")
            self.proc.stdin.flush()

    def __exit__(self, *exc):
        if self.proc is not None and self.proc.stdin is not None:
            self.proc.stdin.write(b"done")       # a normal end: the watcher removes nothing
            self.proc.stdin.close()
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                pass
        return False


def ingest(sources: list, out, *, budget: int, features=None, labels=None,
           overwrite: bool = False, progress: Progress = no_progress) -> IngestResult:
    """Write the graph directory `out` from `sources` (Source objects, see `open_source`)
    with `budget` bytes of working memory. InputError for bad input (nothing written)."""
    from shardtrain.files import atomic_directory, write_json_atomic

    plan = Budget(int(budget))
    out = Path(out)
    notes: list[str] = []

    with _Watcher() as watch, atomic_directory(out, overwrite=overwrite) as tmp:
        watch(tmp)
        work = tmp / ".work"
        work.mkdir()
        for source in sources:
            source.prepare(work, plan)
        vertex = _merge_vertex_data(sources, features, labels)
        # pass 1: read, check, count; spool what is costly to parse again
        hist = DegreeHistogram()
        rows = loop_rows = 0
        max_id, max_where = -1, ""
        spool_path = work / "spool.bin"
        bar = progress("reading", 0, "row")
        with open(spool_path, "wb") as spool:
            for source in sources:
                for ch in source.chunks(plan):
                    _check_chunk(ch, source.declared_n)
                    if ch.src.shape[0] == 0:
                        continue
                    top = np.maximum(ch.src, ch.dst)
                    i = int(np.argmax(top))
                    if int(top[i]) > max_id:
                        max_id, max_where = int(top[i]), ch.locate(i)
                    rows += ch.src.shape[0]
                    loop_rows += int(np.count_nonzero(ch.src == ch.dst))
                    hist.add(ch.src, ch.dst)
                    if not source.rereadable:
                        write_array(spool, np.stack([ch.src, ch.dst], axis=1))
                    bar.update(ch.src.shape[0])
                notes += source.notes
        bar.close()
        n, n_where = _vertex_count(sources, vertex, max_id)
        if max_id >= n:
            raise InputError(f"{max_where}: vertex id {max_id} >= number of vertices {n} "
                             f"({n_where})")
        if n == 0:
            raise InputError(f"{sources[0].path if sources else out}: empty graph "
                             f"(no vertices)")
        if n > MAX_VERTICES:
            raise InputError(f"{max_where or sources[0].path}: {n:,} vertices; ingest "
                             f"handles up to {MAX_VERTICES:,}")
        _check_vertex_data(vertex, n, n_where)
        notes += vertex.replace_notes

        # pass 2: keys of both directions into buckets by key range
        bounds = plan_buckets(hist, n, plan.bucket_keys)
        writer = BucketWriter(work, bounds)
        bar = progress("bucketing", rows, "row")
        for source in sources:
            if source.rereadable:
                for ch in source.chunks(plan):
                    writer.add(edge_keys(ch.src, ch.dst, n))
                    bar.update(ch.src.shape[0])
        spooled = spool_path.stat().st_size // 16
        for s in range(0, spooled, plan.chunk_rows):
            part = read_keys(spool_path, 2 * s, 2 * plan.chunk_rows).reshape(-1, 2)
            writer.add(edge_keys(part[:, 0], part[:, 1], n))
            bar.update(part.shape[0])
        spool_path.unlink()
        bar.close()

        pause_point("ingest sorting")       # tests stop the run here, buckets on disk
        # pass 3: sort each bucket, append the CSR
        idx = index_dtype_for(n)
        indices_path, indptr_path = tmp / "indices.npy", tmp / "indptr.npy"
        reserved = _npy_header(idx, (2 * rows,))
        bar = progress("sorting", int(writer.sizes.sum()), "key")
        with open(indices_path, "wb") as ind, open(indptr_path, "wb") as ptr:
            ind.write(reserved)
            ptr.write(_npy_header(np.dtype(np.int64), (n + 1,)))
            result = sort_buckets([writer.path(i) for i in range(bounds.shape[0] - 1)],
                                  n, rows, loop_rows, ind, ptr, idx, plan, bar.update)
            header = _npy_header(idx, (2 * result.num_edges,))
            assert len(header) == len(reserved)      # same padded length (see _npy_header)
            ind.seek(0)
            ind.write(header)
        bar.close()
        shutil.rmtree(work)
        cleanup = result.cleanup      # its note is made when the directory is loaded
        manifest = _write_vertex_data_and_manifest(tmp, vertex, n, result, idx, sources,
                                                   notes, plan, rows)
        ids = [s.vertex_ids for s in sources if getattr(s, "vertex_ids", None) is not None]
        if ids:
            from shardtrain.data.graphdir import write_vertex_ids
            manifest["vertex_ids"] = write_vertex_ids(tmp, ids[0])
        write_json_atomic(tmp / GRAPH_MANIFEST, manifest)
    working = plan.working_bytes(rows, result.largest_bucket)
    return IngestResult(n, result.num_edges, rows, cleanup, result.buckets,
                        result.largest_bucket, working, manifest)


def _check_chunk(ch: EdgeChunk, declared: int | None) -> None:
    neg = (ch.src < 0) | (ch.dst < 0)
    if neg.any():
        row = int(np.argmax(neg))
        raise InputError(f"{ch.locate(row)}: negative vertex id "
                         f"{min(int(ch.src[row]), int(ch.dst[row]))}")
    if declared is not None:
        big = (ch.src >= declared) | (ch.dst >= declared)
        if big.any():
            row = int(np.argmax(big))
            raise InputError(f"{ch.locate(row)}: vertex id "
                             f"{max(int(ch.src[row]), int(ch.dst[row]))} >= number of "
                             f"vertices {declared} (declared in the graph file)")


def _merge_vertex_data(sources, features, labels) -> VertexData:
    """The vertex data of the run: from --features/--labels, else from the one bundle
    that has it (two bundles with vertex data are refused)."""
    holders = [s for s in sources if s.vertex.features is not None
               or s.vertex.labels is not None or s.vertex.masks]
    if len(holders) > 1:
        raise InputError(f"{holders[1].path}: vertex data in two sources ({holders[0].path} "
                         f"too); give it in one")
    v = holders[0].vertex if holders else VertexData()
    replace = []
    if features is not None:
        if v.features is not None:
            replace.append(f"--features {features} replaces the features in {holders[0].path}")
        v.features, v.features_where = _open_features(Path(features))
    if labels is not None:
        if v.labels is not None:
            replace.append(f"--labels {labels} replaces the labels in {holders[0].path}")
        v.labels, v.labels_where = readers.load_labels(labels), f"--labels {labels}"
    v.replace_notes = replace
    return v


def _vertex_count(sources, vertex: VertexData, max_id: int) -> tuple[int, str]:
    declared = [s.declared_n for s in sources if s.declared_n is not None]
    if declared:
        return max(declared), "declared in the graph file"
    if vertex.features is not None:
        return int(vertex.features.shape[0]), f"the rows of {vertex.features_where}"
    if vertex.labels is not None:
        return int(vertex.labels.shape[0]), f"the rows of {vertex.labels_where}"
    return max(max_id + 1, 0), "largest id + 1"


def _check_vertex_data(v: VertexData, n: int, n_where: str) -> None:
    """load_graph's checks of the vertex data, with its messages."""
    if v.features is not None and v.features.shape[0] != n:
        raise InputError(f"{v.features_where}: {v.features.shape[0]} feature rows, but the "
                         f"graph has {n} vertices ({n_where})")
    if v.labels is not None and v.labels.shape[0] != n:
        raise InputError(f"{v.labels_where}: {v.labels.shape[0]} labels, but the graph has "
                         f"{n} vertices ({n_where})")
    where = Path(v.masks_where)
    if v.labels is None:
        if v.masks:
            raise InputError(f"{where}: key {next(iter(v.masks))!r} given without labels")
        return
    if v.masks:
        labelled = v.labels >= 0
        for key in MASK_KEYS:
            if key not in v.masks:
                raise InputError(f"{where}: key {key!r} missing (give all three masks or none)")
        for key in MASK_KEYS:
            m = v.masks[key]
            if m.shape[0] != n:
                raise InputError(f"{where}: key {key!r} has length {m.shape[0]}, "
                                 f"the graph has {n} vertices")
            stray = m & ~labelled
            if stray.any():
                raise InputError(f"{where}: key {key!r}: vertex {int(np.argmax(stray))} "
                                 f"is unlabelled (-1)")
        if not v.masks["train_mask"].any():
            raise InputError(f"{where}: labels given but no training vertex (train_mask is "
                             f"empty)")
    elif not (v.labels >= 0).any():
        raise InputError(f"{v.labels_where}: labels given but no training vertex (no vertex "
                         f"is labelled)")


def _write_vertex_data_and_manifest(tmp: Path, v: VertexData, n: int, result, idx,
                                    sources, notes, plan: Budget, rows: int) -> dict:
    full, structure = _Hash(), _Hash()
    # the CSR arrays, read back in chunks (not mapped): both hashes see them as int64, the
    # in-memory Graph's dtype
    step = plan.chunk_rows * 4
    for name, dtype, count in (("indptr", np.int64, n + 1), ("indices", idx, 2 * result.num_edges)):
        full.array_start(np.dtype(np.int64), (count,))
        head = len(_npy_header(np.dtype(dtype), (count,)))
        for s in range(0, count, step):
            part = read_keys(tmp / f"{name}.npy", s, min(step, count - s), dtype, head)
            part = part.astype(np.int64, copy=False)
            full.update(part)
            structure.update(part)
    room = plan.total // 4
    feature_dtype = None
    if v.features is not None:
        dtype = np.float64 if v.features.dtype == np.float64 else np.float32
        feature_dtype = np.dtype(dtype).name
        _copy_vertex_array(v.features, tmp / "features.npy", dtype, room,
                           _feature_check(v.features_where.removeprefix("--features ")),
                           (full,))
    else:
        full.none()
    if v.labels is not None:
        _copy_vertex_array(v.labels, tmp / "labels.npy", np.int64, room, None, (full,))
    else:
        full.none()
    for key in MASK_KEYS:
        if key in v.masks:
            _copy_vertex_array(v.masks[key], tmp / f"{key}.npy", np.bool_, room, None, (full,))
        else:
            full.none()
    num_classes = 0
    if v.labels is not None and v.labels.shape[0]:
        num_classes = int(np.max(v.labels)) + 1
    return {
        "format": FORMAT, "version": VERSION, "num_vertices": n,
        "num_edges": result.num_edges, "index_dtype": np.dtype(idx).name,
        "feature_dtype": feature_dtype,
        "input_dim": None if v.features is None else int(v.features.shape[1]),
        "num_classes": num_classes, "has_labels": v.labels is not None,
        "masks": sorted(v.masks),
        "cleanup": {"self_loops": result.cleanup.self_loops,
                    "duplicates": result.cleanup.duplicates},
        "structure_fingerprint": structure.hex(), "fingerprint": full.hex(),
        "sources": [s.describe() for s in sources], "notes": notes,
        "ingest": {"rows": rows, "memory_budget_bytes": plan.total,
                   "buckets": result.buckets, "largest_bucket_keys": result.largest_bucket}}
