"""Graph input: `.npz` bundles, Matrix Market `.mtx`, text edge lists, `--features` and
`--labels` files; validation with one-line `file:line` errors; split masks.

Text is parsed with numpy over the raw bytes, in chunks cut at line ends, so a 10 M-edge list
loads in seconds. The slow, line-by-line look only happens on a file already known to be bad,
to name its first bad line.

Stored types: ids and labels int64; features float64 when the input array is float64,
float32 otherwise (text features become float32); masks bool.
"""
from __future__ import annotations

import os
import re
import warnings
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np
import scipy.io
import scipy.sparse as sp

from shardtrain.errors import InputError
from shardtrain.graph import EdgeCleanup, Graph, csr_from_edges

EDGE_LIST_SUFFIXES = (".csv", ".tsv", ".txt", ".edges")
GRAPH_SUFFIXES = (".npz", ".mtx") + EDGE_LIST_SUFFIXES
NPZ_KEYS = ("edges", "num_vertices", "features", "labels", "train_mask", "val_mask", "test_mask")
MASK_KEYS = ("train_mask", "val_mask", "test_mask")

_CHUNK_BYTES = 8 << 20      # text is scanned this much at a time (bounded scratch memory)
_MAX_ID_DIGITS = 18         # anything longer cannot be an int64 vertex id

# byte classes for the text scanner
_SEP = np.zeros(256, dtype=bool)
_SEP[[ord(" "), ord("\t"), ord(","), ord("\r"), ord("\n"), ord("\f"), ord("\v")]] = True
_DIGIT = np.zeros(256, dtype=bool)
_DIGIT[ord("0"):ord("9") + 1] = True
_COMMENT = (ord("#"), ord("%"))
_SPLIT = re.compile(rb"[\s,]+")


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


# --------------------------------------------------------------------------- text scanning

def _open_checked(path: Path, what: str = "file"):
    if not path.exists():
        raise InputError(f"{path}: no such {what}")
    if path.is_dir():
        raise InputError(f"{path}: is a directory, expected a {what}")
    try:
        return open(path, "rb")
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from None


def _chunks(path: Path) -> Iterator[bytes]:
    """The file in pieces of about _CHUNK_BYTES, each ending with a newline."""
    with _open_checked(path) as fh:
        carry = b""
        first = True
        while True:
            try:
                block = fh.read(_CHUNK_BYTES)
            except OSError as exc:
                raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from None
            if first:
                first = False
                if block.startswith(b"\xef\xbb\xbf"):  # UTF-8 byte-order mark
                    block = block[3:]
            if not block:
                if carry:
                    yield carry + b"\n"
                return
            data = carry + block
            cut = data.rfind(b"\n")
            if cut < 0:
                carry = data
                continue
            carry = data[cut + 1:]
            yield data[:cut + 1]


@dataclass
class _Chunk:
    """Token layout of one chunk of text: where tokens start/end and which line they are on."""

    b: np.ndarray            # the bytes, uint8
    starts: np.ndarray       # token start offsets
    ends: np.ndarray         # token end offsets (exclusive)
    line: np.ndarray         # line (0-based, within the chunk) of each token
    counts: np.ndarray       # tokens per line
    skip: np.ndarray         # per line: comment (or header) line, not data


def _tokenize(chunk: bytes) -> _Chunk:
    b = np.frombuffer(chunk, dtype=np.uint8)
    sep = _SEP[b]
    body = ~sep
    prev_sep = np.empty_like(sep)
    prev_sep[0] = True
    prev_sep[1:] = sep[:-1]
    starts = np.flatnonzero(body & prev_sep)
    ends = np.flatnonzero(body & np.append(sep[1:], True)) + 1
    newlines = np.flatnonzero(b == 10)
    line = np.searchsorted(newlines, starts)
    nlines = newlines.shape[0]
    counts = np.bincount(line, minlength=nlines)
    # a line is a comment when its first token starts with '#' or '%'
    first_tok = np.ones(starts.shape[0], dtype=bool)
    first_tok[1:] = line[1:] != line[:-1]
    fc = b[starts[first_tok]]
    skip = np.zeros(nlines, dtype=bool)
    skip[line[first_tok][(fc == _COMMENT[0]) | (fc == _COMMENT[1])]] = True
    return _Chunk(b, starts, ends, line, counts, skip)


def _line_text(chunk: bytes, index: int) -> bytes:
    """Line `index` (0-based) of a chunk, for error messages and header checks."""
    pos = 0
    for _ in range(index):
        pos = chunk.index(b"\n", pos) + 1
    return chunk[pos:chunk.index(b"\n", pos)]


def _show(raw: bytes, limit: int = 40) -> str:
    text = raw.decode("utf-8", "replace").strip()
    return repr(text if len(text) <= limit else text[:limit] + "...")


def _is_int(tok: bytes) -> bool:
    return re.fullmatch(rb"-?[0-9]+", tok) is not None


def _is_float(tok: bytes) -> bool:
    try:
        float(tok)
    except ValueError:
        return False
    return True


def _maybe_header(c: _Chunk, chunk: bytes, token_ok) -> int | None:
    """Index of the first data line if it is a header (has a letter and a non-number token)."""
    data = np.flatnonzero(~c.skip & (c.counts > 0))
    if data.shape[0] == 0:
        return None
    raw = _line_text(chunk, int(data[0]))
    toks = [t for t in _SPLIT.split(raw) if t]
    if re.search(rb"[A-Za-z_]", raw) and not all(token_ok(t) for t in toks):
        return int(data[0])
    return None


def _first_data_line(path: Path, after: int = 0) -> tuple[int, bytes] | None:
    """(1-based line number, text) of the first non-empty, non-comment line past `after`."""
    with _open_checked(path) as fh:
        for line_no, raw in enumerate(fh, start=1):
            if line_no == 1 and raw.startswith(b"\xef\xbb\xbf"):
                raw = raw[3:]
            text = raw.strip()
            if line_no > after and text and text[:1] not in (b"#", b"%"):
                return line_no, text
    return None


def _comment_char(path: Path) -> str:
    """'%' when the first comment line of the file uses it, else '#'."""
    with _open_checked(path) as fh:
        for raw in fh:
            text = raw.lstrip(b"\xef\xbb\xbf").strip()
            if text[:1] in (b"#", b"%"):
                return text[:1].decode()
            if text:
                break
    return "#"


def _int_values(c: _Chunk, keep: np.ndarray) -> np.ndarray:
    """Parse the kept tokens (already checked to be -?digits, <= 18 digits) as int64."""
    starts, ends = c.starts[keep], c.ends[keep]
    neg = c.b[starts] == ord("-")
    starts = starts + neg
    length = ends - starts
    value = np.zeros(starts.shape[0], dtype=np.int64)
    scale = np.int64(1)
    # loop over digit positions (at most 18), right to left; not over tokens
    for k in range(int(length.max()) if length.shape[0] else 0):
        has = length > k
        pos = np.where(has, ends - 1 - k, 0)
        value += np.where(has, c.b[pos].astype(np.int64) - 48, 0) * scale
        scale *= 10
    value[neg] = -value[neg]
    return value


class _TextTable:
    """A whitespace/comma separated numeric table read from a text file.

    columns: the required number of columns, or None to take it from the first data row.
    kind: "int" or "float". values is flat (rows * columns), in file order.
    """

    def __init__(self, path: Path, *, kind: str, columns: int | None, what: str):
        self.path, self.kind, self.columns, self.what = path, kind, columns, what
        self.header: tuple[int, str] | None = None
        fast = self._read_fast()
        self.values, self.rows = fast if fast is not None else self._read()

    def _read_fast(self) -> tuple[np.ndarray, int] | None:
        """np.loadtxt (C-implemented in numpy 2; ~3x faster than the byte scanner on a
        10 M-edge list). None when it refuses the file: the byte scanner then either names
        the first bad line or reads what loadtxt could not (e.g. mixed separators)."""
        token_ok = _is_int if self.kind == "int" else _is_float
        first = _first_data_line(self.path)
        skip, delimiter = 0, None
        if first is not None:
            line_no, raw = first
            toks = [t for t in _SPLIT.split(raw) if t]
            if re.search(rb"[A-Za-z_]", raw) and not all(token_ok(t) for t in toks):
                self.header = (line_no, _show(raw))
                skip = line_no
                nxt = _first_data_line(self.path, after=line_no)
                raw = nxt[1] if nxt is not None else b""
            delimiter = "," if b"," in raw else None
        dtype = np.int64 if self.kind == "int" else np.float64
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")   # "input contained no data"
                # one comment character keeps loadtxt in C (a list of them is ~5x slower);
                # a file that mixes both falls back to the byte scanner
                table = np.loadtxt(self.path, dtype=dtype, comments=_comment_char(self.path),
                                   delimiter=delimiter, skiprows=skip, ndmin=2,
                                   encoding="utf-8")
        except Exception:
            self.header = None
            return None
        if table.shape[0] == 0:
            return np.zeros(0, dtype=dtype), 0
        if self.columns is None:
            self.columns = int(table.shape[1])
        elif table.shape[1] != self.columns:
            self.header = None
            return None
        return table.reshape(-1), int(table.shape[0])

    def _fail(self, line_no: int, message: str):
        raise InputError(f"{self.path}:{line_no}: {message}")

    def _read(self) -> tuple[np.ndarray, int]:
        token_ok = _is_int if self.kind == "int" else _is_float
        parts: list[np.ndarray] = []
        rows = 0
        line_offset = 0
        header_possible = True
        for chunk in _chunks(self.path):
            c = _tokenize(chunk)
            if header_possible and (~c.skip & (c.counts > 0)).any():
                header_possible = False
                h = _maybe_header(c, chunk, token_ok)
                if h is not None:
                    c.skip[h] = True
                    self.header = (line_offset + h + 1, _show(_line_text(chunk, h)))
            data_line = ~c.skip & (c.counts > 0)
            if self.columns is None and data_line.any():
                self.columns = int(c.counts[np.argmax(data_line)])
            keep = data_line[c.line]
            self._check_chunk(c, chunk, data_line, keep, line_offset, token_ok)
            if self.kind == "int":
                parts.append(_int_values(c, keep))
            else:
                parts.append(self._float_values(c, chunk, data_line, line_offset, token_ok))
            rows += int(data_line.sum())
            line_offset += c.counts.shape[0]
        values = np.concatenate(parts) if parts else np.zeros(0, np.int64 if self.kind == "int"
                                                               else np.float64)
        return values, rows

    def _check_chunk(self, c: _Chunk, chunk: bytes, data_line, keep, line_offset, token_ok):
        """Find the first bad data line in this chunk, if any, and raise naming it."""
        bad_lines = [np.flatnonzero(data_line & (c.counts != self.columns))]
        if self.kind == "int":
            b = c.b
            body = ~_SEP[b]
            odd = body & ~_DIGIT[b]
            odd_pos = np.flatnonzero(odd)
            if odd_pos.shape[0]:
                # a '-' right at a token start and followed by a digit is a sign, not junk
                tok_start = np.zeros(b.shape[0], dtype=bool)
                tok_start[c.starts] = True
                nxt = np.minimum(odd_pos + 1, b.shape[0] - 1)
                sign = (b[odd_pos] == ord("-")) & tok_start[odd_pos] & _DIGIT[b[nxt]]
                odd_pos = odd_pos[~sign]
                newlines = np.flatnonzero(b == 10)
                odd_line = np.searchsorted(newlines, odd_pos)
                bad_lines.append(odd_line[data_line[odd_line]])
            long_tok = keep & ((c.ends - c.starts) > _MAX_ID_DIGITS)
            bad_lines.append(c.line[long_tok])
        bad = np.concatenate(bad_lines)
        if bad.shape[0] == 0:
            return
        first = int(bad.min())
        raw = _line_text(chunk, first)
        self._explain(raw, line_offset + first + 1, token_ok)

    def _explain(self, raw: bytes, line_no: int, token_ok):
        toks = [t for t in _SPLIT.split(raw) if t]
        for t in toks:
            if not token_ok(t):
                word = "an integer" if self.kind == "int" else "a number"
                self._fail(line_no, f"{_show(t)} is not {word} ({self.what})")
        if self.kind == "int" and any(len(t.lstrip(b"-")) > _MAX_ID_DIGITS for t in toks):
            self._fail(line_no, f"number too large ({self.what})")
        self._fail(line_no, f"expected {self.columns} column{'s' * (self.columns != 1)}, "
                            f"found {len(toks)} ({self.what})")

    def _float_values(self, c: _Chunk, chunk: bytes, data_line, line_offset, token_ok):
        b = c.b.copy()
        b[_SEP[b]] = ord(" ")
        # blank out comment/header lines so only data remains
        newlines = np.flatnonzero(c.b == 10)
        line_starts = np.concatenate([[0], newlines[:-1] + 1])
        skip = ~data_line
        if skip.any():
            lengths = newlines - line_starts + 1
            b[np.repeat(skip, lengths)] = ord(" ")
        expected = int(data_line.sum()) * int(self.columns or 0)
        if expected == 0:   # np.fromstring reads an all-blank string as [-1.0]
            return np.zeros(0, dtype=np.float64)
        try:
            values = np.fromstring(b.tobytes(), sep=" ", dtype=np.float64)
        except ValueError:
            values = None
        if values is None or values.shape[0] != expected:
            # slow path, only on a bad file: name the first line with an unparsable token
            for i in np.flatnonzero(data_line):
                raw = _line_text(chunk, int(i))
                if not all(token_ok(t) for t in _SPLIT.split(raw) if t):
                    self._explain(raw, line_offset + int(i) + 1, token_ok)
            self._fail(line_offset + 1, f"could not parse the numbers ({self.what})")
        return values

    def line_of_row(self, row: int) -> int:
        """1-based line number of data row `row` (a second pass, used only for errors)."""
        seen = 0
        line_offset = 0
        for i, chunk in enumerate(_chunks(self.path)):
            c = _tokenize(chunk)
            if i == 0 and self.header is not None:
                c.skip[self.header[0] - 1] = True
            data = np.flatnonzero(~c.skip & (c.counts > 0))
            if row < seen + data.shape[0]:
                return line_offset + int(data[row - seen]) + 1
            seen += data.shape[0]
            line_offset += c.counts.shape[0]
        return line_offset


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
    locate_edge: object = None     # edge row -> "file:line" / "file: edges[row]" text
    notes: list = field(default_factory=list)


def _read_edge_list(path: Path) -> _Raw:
    table = _TextTable(path, kind="int", columns=2, what="edge list: two integer vertex ids")
    pairs = table.values.reshape(-1, 2)
    raw = _Raw(pairs[:, 0], pairs[:, 1],
               locate_edge=lambda row: f"{path}:{table.line_of_row(row)}")
    if table.header is not None:
        raw.notes.append(f"{path}: skipped header line {table.header[0]}: {table.header[1]}")
    return raw


def _read_mtx(path: Path) -> _Raw:
    _open_checked(path).close()
    try:
        rows, cols, _, layout, fld, symmetry = scipy.io.mminfo(str(path))
        matrix = scipy.io.mmread(str(path))
    except Exception as exc:  # scipy's reader raises several types; all mean a bad file
        msg = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: not a readable Matrix Market file: {msg}") from None
    if rows != cols:
        raise InputError(f"{path}:1: adjacency must be square, got {rows} x {cols}")
    if fld == "complex":
        raise InputError(f"{path}:1: complex matrices are not adjacency matrices")
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


def _npz_array(path: Path, bundle, key: str) -> np.ndarray:
    try:
        return bundle[key]
    except ValueError as exc:  # object arrays need pickle, which we refuse
        raise InputError(f"{path}: key {key!r}: unreadable without pickle ({exc})") from None
    except (OSError, zipfile.BadZipFile, EOFError) as exc:
        raise InputError(f"{path}: key {key!r}: damaged ({exc})") from None


def _read_npz(path: Path) -> _Raw:
    _open_checked(path).close()
    try:
        bundle = np.load(path, allow_pickle=False)
    except Exception as exc:
        raise InputError(f"{path}: not a readable .npz bundle: {exc}") from None
    if not isinstance(bundle, np.lib.npyio.NpzFile):
        raise InputError(f"{path}: not an .npz bundle (a single array)")
    with bundle:
        keys = list(bundle.files)
        unknown = sorted(set(keys) - set(NPZ_KEYS))
        if unknown:
            raise InputError(f"{path}: unknown key {unknown[0]!r} (allowed: {', '.join(NPZ_KEYS)})")
        if "edges" not in keys:
            raise InputError(f"{path}: missing key 'edges' (an m x 2 integer array)")
        arrays = {k: _npz_array(path, bundle, k) for k in keys}
    edges = arrays["edges"]
    if not np.issubdtype(edges.dtype, np.integer) or edges.ndim != 2 or edges.shape[1] != 2:
        raise InputError(f"{path}: key 'edges' must be an m x 2 integer array, "
                         f"got {edges.dtype} with shape {edges.shape}")
    if edges.dtype == np.uint64 and edges.size and edges.max() > np.iinfo(np.int64).max:
        raise InputError(f"{path}: key 'edges': id too large")
    edges = edges.astype(np.int64, copy=False)
    raw = _Raw(edges[:, 0], edges[:, 1], locate_edge=lambda row: f"{path}: edges[{row}]")
    if "num_vertices" in arrays:
        nv = arrays["num_vertices"]
        if nv.shape not in ((), (1,)) or not np.issubdtype(nv.dtype, np.integer) or nv.ravel()[0] < 0:
            raise InputError(f"{path}: key 'num_vertices' must be one non-negative integer, "
                             f"got {nv.dtype} with shape {nv.shape}")
        raw.num_vertices = int(nv.ravel()[0])
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


def _suffix(path: Path, allowed: tuple[str, ...], option: str) -> str:
    suffix = path.suffix.lower()
    if suffix not in allowed:
        raise InputError(f"{path}: unknown {option} file type {suffix or '(none)'!r} "
                         f"(expected {', '.join(allowed)})")
    return suffix


def load_features(path: str | os.PathLike) -> np.ndarray:
    """Features from `.npy` (2-D numbers) or `.csv` (one row per vertex)."""
    path = Path(path)
    if _suffix(path, (".npy", ".csv"), "--features") == ".npy":
        return _check_feature_array(_load_npy(path), str(path))
    table = _TextTable(path, kind="float", columns=None, what="features")
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
        return _check_label_array(_load_npy(path), str(path))
    table = _TextTable(path, kind="int", columns=1, what="labels: one integer per line")
    y = table.values
    bad = y < -1
    if bad.any():
        row = int(np.argmax(bad))
        raise InputError(f"{path}:{table.line_of_row(row)}: label {y[row]} "
                         f"(use -1 for unlabelled)")
    return y


def _load_npy(path: Path) -> np.ndarray:
    _open_checked(path).close()
    try:
        arr = np.load(path, allow_pickle=False)
    except Exception as exc:
        raise InputError(f"{path}: not a readable .npy array: {' '.join(str(exc).split())}") from None
    if not isinstance(arr, np.ndarray):
        raise InputError(f"{path}: expected a single .npy array")
    return arr


# --------------------------------------------------------------------------- splits

def make_splits(labels: np.ndarray, seed: int, per_class: int = 20, val: int = 500,
                test: int = 1000) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(train, val, test) bool masks, deterministic from `seed`.

    The protocol of Kipf & Welling (ICLR 2017): `per_class` labelled vertices of each class for
    training, then `val` and `test` vertices drawn from the other labelled vertices. For small
    data: a class with fewer than 2 * per_class vertices gives half of them (at least one) to
    training, and val/test shrink in proportion when too few labelled vertices remain. The
    three masks are disjoint and hold only labelled vertices (label >= 0).
    """
    labels = np.asarray(labels, dtype=np.int64)
    n = labels.shape[0]
    rng = np.random.default_rng(seed)
    labelled = np.flatnonzero(labels >= 0)
    order = labelled[rng.permutation(labelled.shape[0])]
    order = order[np.argsort(labels[order], kind="stable")]   # random order within each class
    cls = labels[order]
    counts = np.bincount(cls) if cls.shape[0] else np.zeros(0, np.int64)
    class_start = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
    rank = np.arange(order.shape[0]) - class_start[cls]
    quota = np.minimum(per_class, np.maximum(1, counts // 2))
    in_train = rank < quota[cls]
    train = np.zeros(n, dtype=bool)
    train[order[in_train]] = True
    rest = order[~in_train]
    rest = rest[rng.permutation(rest.shape[0])]
    if val + test > rest.shape[0]:
        n_val = (rest.shape[0] * val) // max(val + test, 1)
        n_test = rest.shape[0] - n_val
    else:
        n_val, n_test = val, test
    val_mask = np.zeros(n, dtype=bool)
    test_mask = np.zeros(n, dtype=bool)
    val_mask[rest[:n_val]] = True
    test_mask[rest[n_val:n_val + n_test]] = True
    return train, val_mask, test_mask


# --------------------------------------------------------------------------- load_graph

def _check_ids(raw: _Raw, n: int, where: str) -> None:
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
    largest id + 1. Missing split masks are made with `make_splits(labels, seed)`.
    """
    path = Path(path)
    suffix = _suffix(path, GRAPH_SUFFIXES, "graph")
    raw = _READERS[suffix](path)
    notes = list(raw.notes)
    if features is not None:
        if raw.features is not None:
            notes.append(f"--features {features} replaces the features in {path}")
        raw.features = load_features(features)
        feat_where = f"--features {features}"
    else:
        feat_where = f"{path}: key 'features'"
    if labels is not None:
        if raw.labels is not None:
            notes.append(f"--labels {labels} replaces the labels in {path}")
        raw.labels = load_labels(labels)
        label_where = f"--labels {labels}"
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
        raise InputError(f"{feat_where}: {raw.features.shape[0]} feature rows, but the graph "
                         f"has {n} vertices ({n_where})")
    if raw.labels is not None and raw.labels.shape[0] != n:
        raise InputError(f"{label_where}: {raw.labels.shape[0]} labels, but the graph has "
                         f"{n} vertices ({n_where})")
    if raw.features is not None and input_dim is not None and raw.features.shape[1] != input_dim:
        raise InputError(f"--input-dim {input_dim} does not match the "
                         f"{raw.features.shape[1]} feature columns of {feat_where}")
    if input_dim is not None and input_dim < 1:
        raise InputError(f"--input-dim {input_dim}: must be at least 1")

    masks = _masks(path, raw, n, seed, notes)
    indptr, indices, cleanup = csr_from_edges(raw.src, raw.dst, n)
    del raw.src, raw.dst
    if cleanup.self_loops or cleanup.duplicates:
        notes.append(f"dropped {cleanup.self_loops} self-loops and {cleanup.duplicates} "
                     f"duplicate edges (a repeat of a pair in either direction)")
    graph = Graph(indptr, indices, raw.features, raw.labels, *masks)
    dim = graph.input_dim if graph.input_dim is not None else input_dim
    return LoadedGraph(graph, cleanup, str(path), notes, dim)


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
        train, val, test = make_splits(raw.labels, seed)
        notes.append(f"made split masks from --seed {seed}: {int(train.sum())} train, "
                     f"{int(val.sum())} validation, {int(test.sum())} test")
    if not train.any():
        raise InputError(f"{path}: labels given but no training vertex "
                         f"({'train_mask is empty' if raw.masks else 'no vertex is labelled'})")
    return train, val, test
