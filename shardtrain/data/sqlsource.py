"""Graphs that live in a SQL database: rows read in batches, original vertex ids kept.

URLs: `sqlite:///PATH` (the standard library's sqlite3, opened read-only; `sqlite:////abs`
for an absolute path) and `postgresql://USER@HOST:PORT/DB` (psycopg 3; a server-side cursor,
`fetchmany` batches, so the result never sits whole in memory; PG* environment variables and
~/.pgpass work as libpq reads them). A URL's password is masked (`mask_url`) in every
message, manifest and log line.

`SqlSource` is an ingest source (`data.ingest.Source`): `prepare(work, budget)` runs the
queries before the passes of `ingest`:
  vertices   (optional) `SELECT id[, label[, f1, f2, ...]] FROM ...`: ids integers (int64) or
             text; a NULL label is -1 (unlabelled); features numbers, no NULL;
  edges      `SELECT a, b FROM ...`: two id columns of the same kind.
The ids are mapped to 0..n-1 in sorted order (integers by value, text by its UTF-8 bytes): with
a vertices query the vertex set is its ids (an edge naming another id is refused), else the
set of edge endpoints. Each batch of edges is written to a spool as local codes into its own
sorted unique ids (kept beside it), the union of all ids is merged as it grows (amortised:
merged once the pending ids outnumber the set), and a second pass over the spool turns local
codes into global ones. `chunks` then reads the mapped spool like an `.npy` source.
The mapping goes into the graph directory (`graphdir.write_vertex_ids`).
"""
from __future__ import annotations

import re
import sqlite3
from dataclasses import dataclass
from itertools import chain
from pathlib import Path
from typing import Any, Iterator
from urllib.parse import quote, unquote, urlsplit, urlunsplit

import numpy as np

from shardtrain.data.extsort import read_keys
from shardtrain.data.ingest import EdgeChunk, Source, VertexData, _at_rows
from shardtrain.errors import InputError, ParameterError, option

FETCH_ROWS = 1 << 16          # rows per fetchmany (a list of Python tuples: ~120 B a row)
MESSAGE_CHARS = 160           # a server message is shortened to this
QUERY_WORDS = 6               # words of a query quoted in a message
CONNECT_TIMEOUT_S = 10
SCHEMES = ("sqlite", "postgresql", "postgres")
_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


# ---------------------------------------------------------------- URLs and messages

@dataclass(frozen=True)
class SqlUrl:
    kind: str                 # "sqlite" | "postgresql"
    url: str                  # as given (may hold a password: never print it)
    masked: str               # the password replaced by ***
    path: Path | None = None  # sqlite: the database file
    password: str | None = None


def mask_url(url: str) -> str:
    """`url` with the password of its user part replaced by *** (the rest unchanged)."""
    try:
        parts = urlsplit(url)
    except ValueError:
        return re.sub(r"(//[^/:@]*:)[^@/]*@", r"\1***@", url)
    if parts.password is None:
        # a password in the query string (?password=...) is masked too
        return re.sub(r"(password=)[^&]*", r"\1***", url)
    user = parts.username or ""
    host = parts.netloc.rpartition("@")[2]
    netloc = f"{user}:***@{host}"
    return re.sub(r"(password=)[^&]*", r"\1***",
                  urlunsplit((parts.scheme, netloc, parts.path, parts.query, parts.fragment)))


def parse_url(url: str, param: str) -> SqlUrl:
    """Check a database URL at the door; ParameterError naming `param`."""
    masked = mask_url(url)
    scheme = url.partition("://")[0].lower() if "://" in url else ""
    if scheme not in SCHEMES:
        raise ParameterError(param, "not a database URL: expected sqlite:///PATH or "
                                    "postgresql://USER@HOST:PORT/DB", value=masked)
    if scheme == "sqlite":
        rest = url.split("://", 1)[1]
        if not rest.startswith("/") or len(rest) < 2:
            raise ParameterError(param, "expected sqlite:///PATH (three slashes; four for an "
                                        "absolute path)", value=masked)
        path = Path(unquote(rest[1:].split("?", 1)[0]))
        return SqlUrl("sqlite", url, masked, path=path)
    try:
        parts = urlsplit(url)
        password = parts.password
        parts.port      # raises ValueError for a port that is not a number
    except ValueError as exc:
        raise ParameterError(param, f"not a valid URL ({exc})", value=masked) from None
    return SqlUrl("postgresql", url, masked, password=password)


def short(text: object, secret: str | None = None) -> str:
    """A server's message on one line, shortened, a password never in it."""
    lines = [x for x in str(text).strip().splitlines() if x.strip()]
    line = " ".join((lines[0] if lines else type(text).__name__).split())
    if secret:
        line = line.replace(secret, "***")
    return line if len(line) <= MESSAGE_CHARS else line[:MESSAGE_CHARS - 3] + "..."


def first_words(query: str) -> str:
    words = query.split()
    head = " ".join(words[:QUERY_WORDS])
    return f'"{head}{" ..." if len(words) > QUERY_WORDS else ""}"'


def quote_table(name: str, param: str) -> str:
    """A table name (`table` or `schema.table`, plain identifiers) double-quoted for SQL."""
    parts = name.split(".")
    if not 1 <= len(parts) <= 2 or not all(_IDENT.fullmatch(p) for p in parts):
        raise ParameterError(param, "a table name is letters, digits and _ (not starting with "
                                    "a digit), optionally SCHEMA.TABLE", value=repr(name))
    return ".".join(f'"{p}"' for p in parts)


# ---------------------------------------------------------------- connections

class Database:
    """One open connection (read-only for ingest). Errors are InputError lines naming the
    masked URL (`where`)."""

    def __init__(self, url: SqlUrl, param: str, *, read_only: bool = True,
                 create: bool = False):
        self.url, self.param = url, param
        self.where = f"{param_word(param)} {url.masked}"
        self.conn: Any = None
        if url.kind == "sqlite":
            assert url.path is not None
            if not create and not url.path.is_file():
                raise InputError(f"{self.where}: no such database file {url.path}")
            if url.path.exists() and not url.path.is_file():
                raise InputError(f"{self.where}: {url.path} is not a file")
            mode = "ro" if read_only else "rw" if url.path.exists() else "rwc"
            target = f"file:{quote(str(url.path))}?mode={mode}"
            try:
                self.conn = sqlite3.connect(target, uri=True, isolation_level=None)
                self.conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
            except sqlite3.Error as exc:
                self.close()
                raise InputError(f"{self.where}: {short(exc)}") from None
        else:
            try:
                import psycopg
                from psycopg.types.numeric import FloatLoader
            except ImportError:
                raise InputError(f"{self.where}: PostgreSQL needs the psycopg package (pip "
                                 f"install 'psycopg[binary]')") from None
            try:
                self.conn = psycopg.connect(url.url, connect_timeout=CONNECT_TIMEOUT_S,
                                            autocommit=False)
                if read_only:
                    self.conn.read_only = True
                # numeric columns (features, labels) as floats, not Decimal objects: the
                # vertices query reads text-format rows
                self.conn.adapters.register_loader("numeric", FloatLoader)
            except psycopg.Error as exc:
                self.close()
                raise InputError(f"{self.where}: cannot connect: "
                                 f"{short(exc, url.password)}") from None

    def error(self, exc: BaseException, query: str, what: str) -> InputError:
        return InputError(f"{self.where}: {what} {first_words(query)}: "
                          f"{short(exc, self.url.password)}")

    def batches(self, query: str, what: str, columns: tuple[int, int | None],
                binary: bool = True) -> Iterator[list]:
        """The rows of `query` in lists of at most FETCH_ROWS tuples; `columns` = (least,
        most) number of result columns (most None: any); `binary`: PostgreSQL's binary
        row format (integers and text ids), else text (numeric columns as floats)."""
        lo, hi = columns
        if self.url.kind == "sqlite":
            errors: tuple = (sqlite3.Error,)
            cur = self.conn.cursor()
        else:
            import psycopg
            errors = (psycopg.Error,)
            cur = self.conn.cursor(name="shardtrain_rows", binary=binary)
            cur.itersize = FETCH_ROWS
        try:
            try:
                cur.execute(query)
                desc = cur.description
            except errors as exc:
                raise self.error(exc, query, what) from None
            if desc is None:
                raise InputError(f"{self.where}: {what} {first_words(query)}: returns no rows "
                                 f"(not a SELECT)")
            if len(desc) < lo or (hi is not None and len(desc) > hi):
                want = f"{lo}" if hi == lo else f"at least {lo}" if hi is None else f"{lo}-{hi}"
                raise InputError(f"{self.where}: {what} {first_words(query)}: returns "
                                 f"{len(desc)} column{'s' * (len(desc) != 1)}, expected {want}")
            self.columns = [d[0] for d in desc]
            while True:
                try:
                    rows = cur.fetchmany(FETCH_ROWS)
                except errors as exc:
                    raise self.error(exc, query, what) from None
                if not rows:
                    break
                yield rows
        finally:
            try:
                cur.close()
            except errors:
                pass
            if self.url.kind != "sqlite":
                try:
                    self.conn.rollback()
                except errors:
                    pass

    def close(self) -> None:
        if self.conn is not None:
            try:
                self.conn.close()
            except Exception:   # noqa: BLE001 - closing a broken connection: nothing to do
                pass
            self.conn = None


def param_word(param: str) -> str:
    return option(param)


# ---------------------------------------------------------------- ids

def text_ids(a: np.ndarray) -> np.ndarray:
    """A str array as UTF-8 bytes ('S' dtype: compared and sorted by its bytes)."""
    return np.strings.encode(a, "utf-8")


def sorted_unique(a: np.ndarray) -> np.ndarray:
    """Sorted distinct values (sort and a neighbour compare: faster than np.unique)."""
    s = np.sort(a, kind="stable")
    if s.shape[0] < 2:
        return s
    keep = np.empty(s.shape[0], dtype=bool)
    keep[0] = True
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]


class IdUnion:
    """The sorted set of every id seen, merged in amortised steps."""

    def __init__(self) -> None:
        self.ids: np.ndarray | None = None
        self.pending: list[np.ndarray] = []
        self.pending_size = 0

    def add(self, uniq: np.ndarray) -> None:
        self.pending.append(uniq)
        self.pending_size += uniq.shape[0]
        if self.pending_size >= max(1 << 16, 0 if self.ids is None else self.ids.shape[0]):
            self._merge()

    def _merge(self) -> None:
        parts = ([] if self.ids is None else [self.ids]) + self.pending
        if parts:
            self.ids = sorted_unique(np.concatenate(parts))
        self.pending, self.pending_size = [], 0

    def result(self) -> np.ndarray | None:
        self._merge()
        return self.ids


def locate_ids(ids: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(position of each value in the sorted `ids`, whether it is there)."""
    pos = np.searchsorted(ids, values)
    clipped = np.minimum(pos, max(ids.shape[0] - 1, 0))
    found = (pos < ids.shape[0]) & (ids[clipped] == values) if ids.shape[0] else \
        np.zeros(values.shape[0], dtype=bool)
    return clipped, found


class IntPresence:
    """The set of integer ids seen: a presence table while they lie in [0, limit) (a scatter
    per batch, no sort), else (once one falls outside) the sorted union of `IdUnion`."""

    def __init__(self, limit: int) -> None:
        self.limit = int(limit)
        self.seen: np.ndarray | None = np.zeros(1 << 16, dtype=bool)
        self.union = IdUnion()

    def add(self, ids: np.ndarray) -> None:
        if self.seen is not None and ids.shape[0]:
            lo, hi = int(ids.min()), int(ids.max())
            if lo >= 0 and hi < self.limit:
                if hi >= self.seen.shape[0]:
                    grown = np.zeros(min(self.limit, max(hi + 1, 2 * self.seen.shape[0])),
                                     dtype=bool)
                    grown[:self.seen.shape[0]] = self.seen
                    self.seen = grown
                self.seen[ids] = True
                return
            self.union.add(np.flatnonzero(self.seen).astype(np.int64))
            self.seen = None
        if ids.shape[0]:
            self.union.add(sorted_unique(ids))

    def result(self) -> np.ndarray | None:
        if self.seen is not None:
            got = np.flatnonzero(self.seen).astype(np.int64)
            return got if got.shape[0] else None
        return self.union.result()


class IdLookup:
    """Sorted distinct ids -> their positions: a table (a gather) for integer ids in
    [0, limit), else a binary search. `identity` when the ids are 0..n-1 already."""

    def __init__(self, ids: np.ndarray, limit: int) -> None:
        self.ids = ids
        n = ids.shape[0]
        self.table: np.ndarray | None = None
        self.identity = (ids.dtype.kind == "i" and n > 0 and int(ids[0]) == 0
                         and int(ids[-1]) == n - 1)
        if ids.dtype.kind == "i" and n and int(ids[0]) >= 0 and int(ids[-1]) < limit:
            self.table = np.full(int(ids[-1]) + 1, -1, dtype=np.int64)
            self.table[ids] = np.arange(n, dtype=np.int64)

    def __call__(self, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(position of each value, whether it is an id at all)."""
        if self.identity:
            found = (values >= 0) & (values < self.ids.shape[0])
            return np.where(found, values, 0), found
        if self.table is not None:
            inside = (values >= 0) & (values < self.table.shape[0])
            pos = self.table[np.where(inside, values, 0)]
            found = inside & (pos >= 0)
            return np.where(found, pos, 0), found
        return locate_ids(self.ids, values)


def show_id(v) -> str:
    if isinstance(v, (bytes, np.bytes_)):
        return repr(bytes(v).decode("utf-8", "replace"))
    return str(int(v))


# ---------------------------------------------------------------- batches -> arrays

def _is_null(a: np.ndarray) -> np.ndarray:
    """Where an object array holds None (elementwise, in numpy)."""
    return np.asarray(a == None)  # noqa: E711 - elementwise comparison of an object array


def _first_row(mask: np.ndarray) -> int:
    return int(np.argmax(mask))


def id_column(values: Any, where: str, first_row: int, kind: str | None
              ) -> tuple[np.ndarray, str]:
    """One column (or a (k, 2) block) of ids as int64 or UTF-8 bytes, with its kind
    ("int" or "text"); NULLs, non-integer numbers and mixed kinds refused."""
    a = np.asarray(values) if isinstance(values, np.ndarray) else np.array(values)
    if a.dtype.kind in "iu":
        if a.dtype.kind == "u" and a.size and a.max() > np.iinfo(np.int64).max:
            raise InputError(f"{where}: row {first_row + 1}: id too large for 64 bits")
        got, out = "int", a.astype(np.int64, copy=False)
    elif a.dtype.kind == "U":
        got, out = "text", text_ids(a)
    else:
        obj = np.asarray(values, dtype=object) if a.dtype != object else a
        null = _is_null(obj)
        if null.any():
            row = _first_row(np.asarray(null.reshape(null.shape[0], -1).any(axis=1)))
            raise InputError(f"{where}: row {first_row + row + 1}: NULL vertex id")
        if a.dtype.kind == "f":
            row = _first_row((a != np.floor(a)).reshape(a.shape[0], -1).any(axis=1)
                             | ~np.isfinite(a).reshape(a.shape[0], -1).all(axis=1))
            raise InputError(f"{where}: row {first_row + row + 1}: vertex id "
                             f"{a.reshape(a.shape[0], -1)[row].tolist()} is not an integer "
                             f"or text (floating-point id)")
        raise InputError(f"{where}: rows {first_row + 1}..{first_row + a.shape[0]}: vertex ids "
                         f"must be integers within 64 bits or text (found "
                         f"{sorted({type(v).__name__ for v in obj.ravel()[:1000]})})")
    if kind is not None and got != kind:
        raise InputError(f"{where}: row {first_row + 1}: {got} vertex ids where the ids so far "
                         f"are {kind}")
    return out, got


def edge_pairs(rows: list, where: str, first_row: int, kind: str | None
               ) -> tuple[np.ndarray, str]:
    """A batch of (a, b) rows as a flat array of 2k ids (int64 or UTF-8 bytes) and its kind.
    When every value is a Python int (the common case) they go straight into int64 (3x
    faster than numpy's type inference); anything else takes `id_column`'s checks."""
    values = chain.from_iterable(rows)
    types = set(map(type, values))
    if types == {int} and kind in (None, "int"):
        try:
            flat = np.fromiter(chain.from_iterable(rows), dtype=np.int64, count=2 * len(rows))
            return flat, "int"
        except OverflowError:
            pass                        # beyond 64 bits: id_column says where
    pairs, got = id_column(rows, where, first_row, kind)
    return pairs.reshape(-1), got


def number_column(col: np.ndarray, where: str, name: str, first_row: int,
                  ids_of_rows: np.ndarray, null_is: float | None = None) -> np.ndarray:
    """A column of an object array as float64; NULL (unless `null_is`) and text refused,
    naming the row and its vertex id."""
    null = _is_null(col)
    if null.any():
        if null_is is None:
            row = _first_row(null)
            raise InputError(f"{where}: row {first_row + row + 1} (vertex "
                             f"{show_id(ids_of_rows[row])}): NULL in column {name!r}")
        col = np.where(null, null_is, col)
    a = np.array(col.tolist())
    if a.dtype.kind not in "iufb":
        bad = np.array([not isinstance(v, (int, float)) for v in col.tolist()])
        row = _first_row(bad) if bad.any() else 0
        raise InputError(f"{where}: row {first_row + row + 1} (vertex "
                         f"{show_id(ids_of_rows[row])}): column {name!r} holds "
                         f"{short(repr(col[row]))}, not a number")
    return a.astype(np.float64, copy=False)


@dataclass
class VertexRows:
    ids: np.ndarray                    # sorted: int64 or 'S' UTF-8
    kind: str
    labels: np.ndarray | None          # in the order of ids
    features: np.ndarray | None
    columns: list


def read_vertices(db: Database, query: str) -> VertexRows:
    """The vertices query: ids, labels (NULL -> -1), features; sorted by id; duplicate ids
    refused."""
    what = option("vertices_query")
    where = f"{db.where}: {what} {first_words(query)}"
    id_parts, label_parts, feat_parts = [], [], []
    kind: str | None = None
    seen = 0
    for rows in db.batches(query, what, (1, None), binary=False):
        obj = np.empty((len(rows), len(db.columns)), dtype=object)
        obj[:] = rows
        ids, kind = id_column(obj[:, 0].tolist(), where, seen, kind)
        id_parts.append(ids)
        if obj.shape[1] >= 2:
            lab = number_column(obj[:, 1], where, db.columns[1], seen, ids, null_is=-1)
            if (lab != np.floor(lab)).any() or (lab < -1).any():
                row = _first_row((lab != np.floor(lab)) | (lab < -1))
                raise InputError(f"{where}: row {seen + row + 1} (vertex {show_id(ids[row])}): "
                                 f"label {lab[row]:g} is not a class number >= 0 (NULL: none)")
            label_parts.append(lab.astype(np.int64))
        if obj.shape[1] >= 3:
            feats = np.stack([number_column(obj[:, j], where, db.columns[j], seen, ids)
                              for j in range(2, obj.shape[1])], axis=1)
            finite = np.isfinite(feats).all(axis=1)
            if not finite.all():
                row = _first_row(~finite)
                raise InputError(f"{where}: row {seen + row + 1} (vertex {show_id(ids[row])}): "
                                 f"NaN or infinite feature value")
            feat_parts.append(feats)
        seen += len(rows)
    if kind is None:
        raise InputError(f"{where}: returned no rows (no vertices)")
    ids = np.concatenate(id_parts)
    order = np.argsort(ids, kind="stable")
    ids = ids[order]
    if ids.shape[0] > 1:
        dup = ids[1:] == ids[:-1]
        if dup.any():
            i = _first_row(dup)
            raise InputError(f"{where}: vertex id {show_id(ids[i])} returned more than once "
                             f"({int(np.count_nonzero(dup)):,} duplicate row"
                             f"{'s' * (int(np.count_nonzero(dup)) != 1)})")
    labels = np.concatenate(label_parts)[order] if label_parts else None
    features = np.concatenate(feat_parts)[order] if feat_parts else None
    return VertexRows(ids, kind, labels, features, list(db.columns))


# ---------------------------------------------------------------- the ingest source

class SqlSource(Source):
    """An ingest source reading a database (see the module docstring). Connects at once
    (so a bad URL, server or password fails before any work); `prepare` runs the queries."""

    def __init__(self, url: str, edges_query: str, vertices_query: str | None = None):
        self.url = parse_url(url, "sql")
        for param, q in (("edges_query", edges_query), ("vertices_query", vertices_query)):
            if q is not None and not q.strip():
                raise ParameterError(param, "an empty query")
        self.edges_query = edges_query.strip().rstrip(";")
        self.vertices_query = None if vertices_query is None else \
            vertices_query.strip().rstrip(";")
        self.path = Path(self.url.masked)     # what generic messages print
        self.notes: list[str] = []
        self.vertex = VertexData()
        self.vertex_ids: np.ndarray | None = None
        self.id_kind = "int"
        self.spool: Path | None = None
        self.rows = 0
        self.db = Database(self.url, "sql")

    def describe(self) -> str:
        text = f"{self.url.masked} edges: {self.edges_query}"
        if self.vertices_query:
            text += f"; vertices: {self.vertices_query}"
        return text

    def prepare(self, work: Path, budget) -> None:
        try:
            self._prepare(work, max(1 << 20, int(budget.total) // 16))
        finally:
            self.db.close()

    def _prepare(self, work: Path, table_limit: int) -> None:
        """The queries into the mapped spool; `table_limit`: the largest integer id an
        id table may span (int64 per slot: a sixteenth of the budget)."""
        vertices = None
        if self.vertices_query is not None:
            vertices = read_vertices(self.db, self.vertices_query)
            v = self.vertex
            v.labels, v.labels_where = vertices.labels, f"{self.url.masked}: vertices labels"
            v.features = vertices.features
            v.features_where = f"{self.url.masked}: vertices features"
            if v.labels is not None and not (v.labels >= 0).any():
                v.labels = None
                self.notes.append(f"{self.url.masked}: the vertices query's label column "
                                  f"holds no label (all NULL): ingested without labels")
        what = option("edges_query")
        where = f"{self.db.where}: {what} {first_words(self.edges_query)}"
        codes_path, dict_path = work / "sql-codes.bin", work / "sql-ids.bin"
        self.spool = work / "sql-edges.bin"
        union = IdUnion()                           # text ids
        presence = IntPresence(table_limit)         # integer ids
        batches: list[tuple[int, int, str]] = []    # rows, ids in the batch's dict, dtype
        missing = 0
        first_missing: Any = None
        kind = None if vertices is None else vertices.kind
        lookup = None if vertices is None else IdLookup(vertices.ids, table_limit)
        seen = 0
        out_path = self.spool if vertices is not None else codes_path
        with open(out_path, "wb") as out, open(dict_path, "wb") as dict_out:
            for rows in self.db.batches(self.edges_query, what, (2, 2)):
                flat, kind = edge_pairs(rows, where, seen, kind)
                seen += flat.shape[0] // 2
                if lookup is not None:
                    pos, found = lookup(flat)
                    if not found.all():
                        bad_rows = ~found.reshape(-1, 2).all(axis=1)
                        missing += int(np.count_nonzero(bad_rows))
                        if first_missing is None:
                            first_missing = flat[_first_row(~found)]
                    out.write(pos.astype(np.int64, copy=False).data)
                elif kind == "int":        # raw ids now, mapped once the set is known
                    out.write(np.ascontiguousarray(flat).data)
                    presence.add(flat)
                else:                      # text: codes into the batch's own sorted ids
                    uniq = sorted_unique(flat)
                    local = np.searchsorted(uniq, flat).astype(np.int64)
                    out.write(local.data)
                    dict_out.write(np.ascontiguousarray(uniq).data)
                    batches.append((flat.shape[0] // 2, uniq.shape[0], uniq.dtype.str))
                    union.add(uniq)
        self.rows = seen
        if missing:
            raise InputError(f"{where}: {missing:,} edge row{'s' * (missing != 1)} name"
                             f"{'s' * (missing == 1)} a vertex id the "
                             f"{option('vertices_query')} did not return (first: "
                             f"{show_id(first_missing)})")
        if vertices is not None:
            ids = vertices.ids
            self.id_kind = vertices.kind
        else:
            got = presence.result() if kind == "int" else union.result()
            if got is None:
                raise InputError(f"{where}: returned no rows (no edges, and no "
                                 f"{option('vertices_query')} to give vertices)")
            ids = got
            self.id_kind = kind or "int"
            if kind == "int":
                self._map_raw(codes_path, IdLookup(ids, table_limit))
            else:                          # second pass: local codes -> global codes
                with open(codes_path, "rb") as codes, open(dict_path, "rb") as dicts, \
                        open(self.spool, "wb") as out:
                    for nrows, nids, dt in batches:
                        local = np.fromfile(codes, dtype=np.int64, count=2 * nrows)
                        uniq = np.fromfile(dicts, dtype=np.dtype(dt), count=nids)
                        glob = np.searchsorted(ids, uniq).astype(np.int64)
                        out.write(glob[local].data)
                codes_path.unlink()
        dict_path.unlink(missing_ok=True)
        self.vertex_ids = ids
        self.declared_n = int(ids.shape[0])

    def _map_raw(self, raw: Path, lookup: IdLookup) -> None:
        """Raw integer ids -> 0..n-1 (nothing to do when they are 0..n-1 already)."""
        assert self.spool is not None
        if lookup.identity:
            raw.rename(self.spool)
            return
        step = 1 << 21
        total = 2 * self.rows
        with open(self.spool, "wb") as out:
            for s in range(0, total, step):
                part = read_keys(raw, s, min(step, total - s))
                out.write(lookup(part)[0].data)
        raw.unlink()

    def chunks(self, budget):
        assert self.spool is not None
        r = budget.chunk_rows
        for s in range(0, self.rows, r):
            k = min(r, self.rows - s)
            pair = read_keys(self.spool, 2 * s, 2 * k).reshape(k, 2)
            yield EdgeChunk(pair[:, 0], pair[:, 1],
                            _at_rows(f"{self.url.masked}: {option('edges_query')}", s))


# ---------------------------------------------------------------- predictions back

@dataclass
class PredictionTarget:
    """`--predictions-sql URL --predictions-table NAME [--replace-table]`, checked at the door
    (URL, table name, connection, the table's absence) before training."""

    url: SqlUrl
    table: str
    quoted: str
    replace: bool


def _table_exists(db: Database, table: str) -> bool:
    if db.url.kind == "sqlite":
        parts = table.split(".")
        name = parts[-1]
        row = db.conn.execute("SELECT 1 FROM sqlite_master WHERE type IN ('table', 'view') "
                              "AND name = ?", (name,)).fetchone()
        return row is not None
    with db.conn.cursor() as cur:
        cur.execute("SELECT to_regclass(%s)", (table,))
        row = cur.fetchone()
    db.conn.rollback()
    return row is not None and row[0] is not None


def check_prediction_target(url: str, table: str, replace: bool) -> PredictionTarget:
    """Everything about the write-back that can be checked before training."""
    parsed = parse_url(url, "predictions_sql")
    quoted = quote_table(table, "predictions_table")
    if parsed.kind == "sqlite" and "." in table:
        raise ParameterError("predictions_table", "a sqlite table name has no SCHEMA. part",
                             value=repr(table))
    if parsed.kind == "sqlite":
        assert parsed.path is not None
        if not parsed.path.parent.is_dir():
            raise ParameterError("predictions_sql", f"folder {parsed.path.parent} does not "
                                                    f"exist", value=parsed.masked)
    db = Database(parsed, "predictions_sql", read_only=False,
                  create=parsed.kind == "sqlite")
    try:
        exists = _table_exists(db, table)
    except Exception as exc:   # noqa: BLE001 - the driver's errors: one line
        raise InputError(f"{db.where}: cannot look for table {table}: "
                         f"{short(exc, parsed.password)}") from None
    finally:
        db.close()
    if exists and not replace:
        raise ParameterError("predictions_table", f"exists in {parsed.masked} (add "
                                                  f"{option('replace_table')} to replace it)",
                             value=repr(table))
    return PredictionTarget(parsed, table, quoted, replace)


def _pg_text_field(a: np.ndarray) -> np.ndarray:
    """str values escaped for COPY's text format (backslash, tab, newline, return)."""
    for old, new in (("\\", "\\\\"), ("\t", "\\t"), ("\n", "\\n"), ("\r", "\\r")):
        a = np.strings.replace(a, old, new)
    return a


def write_predictions(target: PredictionTarget, ids: np.ndarray, predicted: np.ndarray,
                      labels: np.ndarray | None) -> int:
    """(id, predicted, label) rows into a new table in one transaction: all or none (an
    existing table dropped inside the same transaction with `replace`). `ids`: int64 or str
    (original ids). Returns the rows written."""
    from shardtrain.hooks import pause_point

    n = int(predicted.shape[0])
    text = ids.dtype.kind == "U"
    id_type = "TEXT" if text else "BIGINT"
    lab = None if labels is None else np.asarray(labels, dtype=np.int64)
    create = (f"CREATE TABLE {target.quoted} (id {id_type} PRIMARY KEY, predicted BIGINT NOT "
              f"NULL, label BIGINT)")
    url = target.url
    created_file = url.kind == "sqlite" and url.path is not None and not url.path.exists()
    db = Database(url, "predictions_sql", read_only=False, create=url.kind == "sqlite")
    try:
        if url.kind == "sqlite":
            conn = db.conn
            try:
                conn.execute("BEGIN IMMEDIATE")
                if target.replace:
                    conn.execute(f"DROP TABLE IF EXISTS {target.quoted}")
                conn.execute(create)
                idl = ids.tolist()
                pl = predicted.astype(np.int64).tolist()
                ll = [None] * n if lab is None else \
                    np.where(lab >= 0, lab.astype(object), np.array(None)).tolist()
                half = n // 2
                conn.executemany(f"INSERT INTO {target.quoted} VALUES (?, ?, ?)",
                                 zip(idl[:half], pl[:half], ll[:half]))
                pause_point("predictions write")     # tests fail the write here
                conn.executemany(f"INSERT INTO {target.quoted} VALUES (?, ?, ?)",
                                 zip(idl[half:], pl[half:], ll[half:]))
                conn.execute("COMMIT")
            except BaseException as exc:
                try:
                    conn.execute("ROLLBACK")
                except sqlite3.Error:
                    pass
                if isinstance(exc, sqlite3.Error):
                    raise InputError(f"{db.where}: writing table {target.table}: "
                                     f"{short(exc)}") from None
                raise
        else:
            import psycopg
            conn = db.conn
            try:
                with conn.transaction():
                    with conn.cursor() as cur:
                        if target.replace:
                            cur.execute(f"DROP TABLE IF EXISTS {target.quoted}")
                        cur.execute(create)
                        idt = _pg_text_field(ids) if text else ids.astype(str)
                        pt = predicted.astype(np.int64).astype(str)
                        lt = (np.full(n, "\\N") if lab is None
                              else np.where(lab >= 0, lab.astype(str), "\\N"))
                        rows = np.strings.add(np.strings.add(np.strings.add(
                            np.strings.add(idt, "\t"), pt), "\t"), lt)
                        half = n // 2
                        with cur.copy(f"COPY {target.quoted} (id, predicted, label) FROM "
                                      f"STDIN") as copy:
                            if half:
                                copy.write(("\n".join(rows[:half].tolist()) + "\n")
                                           .encode("utf-8"))
                            pause_point("predictions write")
                            if n - half:
                                copy.write(("\n".join(rows[half:].tolist()) + "\n")
                                           .encode("utf-8"))
                conn.commit()
            except psycopg.Error as exc:
                raise InputError(f"{db.where}: writing table {target.table}: "
                                 f"{short(exc, url.password)}") from None
    except BaseException:
        db.close()
        if created_file and url.path is not None:
            url.path.unlink(missing_ok=True)
        raise
    db.close()
    return n
