"""The byte scanner of numeric text tables (edge lists, feature and label text files).

Text is parsed with numpy over the raw bytes, in chunks cut at line ends, so a 10 M-edge list
loads in seconds. The slow, line-by-line look only happens on a file already known to be bad,
to name its first bad line. The header rule (`is_header`) is shared by the loadtxt fast path
and the scanner.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np

from shardtrain.data.inputs import open_checked
from shardtrain.errors import InputError

_CHUNK_BYTES = 8 << 20      # text is scanned this much at a time (bounded scratch memory)
_MAX_ID_DIGITS = 18         # anything longer cannot be an int64 vertex id

# byte classes for the text scanner
_SEP = np.zeros(256, dtype=bool)
_SEP[[ord(" "), ord("\t"), ord(","), ord("\r"), ord("\n"), ord("\f"), ord("\v")]] = True
_DIGIT = np.zeros(256, dtype=bool)
_DIGIT[ord("0"):ord("9") + 1] = True
_COMMENT = (ord("#"), ord("%"))
_SPLIT = re.compile(rb"[\s,]+")

def _chunks(path: Path) -> Iterator[bytes]:
    """The file in pieces of about _CHUNK_BYTES, each ending with a newline."""
    return text_chunks(path, 0, _CHUNK_BYTES)


def text_chunks(path: Path, start: int, size: int) -> Iterator[bytes]:
    """The file from byte `start` in pieces of about `size` bytes, each ending at a newline
    (a UTF-8 byte-order mark at the very start is dropped; a last line without a newline
    gets one). The readers and ingest cut text the same way."""
    with open_checked(path) as fh:
        fh.seek(start)
        carry = b""
        first = start == 0
        while True:
            try:
                block = fh.read(size)
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


def _blank_comments(b: np.ndarray) -> np.ndarray:
    """`b` with every byte from a '#' or '%' to the end of its line made a space (a copy when
    there is a comment). Vectorised: each byte looks up the latest comment mark or newline
    at or before it."""
    marks = (b == _COMMENT[0]) | (b == _COMMENT[1])
    if not marks.any():
        return b
    newline = b == 10
    last = np.where(marks | newline, np.arange(b.shape[0], dtype=np.int32), -1)
    np.maximum.accumulate(last, out=last)
    inside = (last >= 0) & marks[np.maximum(last, 0)]
    out = b.copy()
    out[inside] = ord(" ")
    return out


def tokenize(chunk: bytes) -> _Chunk:
    b = _blank_comments(np.frombuffer(chunk, dtype=np.uint8))
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
    # comment lines have no tokens left; `skip` marks a header line once one is found
    skip = np.zeros(nlines, dtype=bool)
    return _Chunk(b, starts, ends, line, counts, skip)


# a comma with only blanks since the line start or the previous comma (the scanner would
# otherwise close the gap and shift the columns; loadtxt refuses such a line too)
_EMPTY_FIELD = re.compile(rb"^[ \t]*,|,[ \t]*,")


def _empty_field_lines(c: _Chunk, data_line: np.ndarray) -> np.ndarray:
    """Data lines of a chunk with an empty field (see _EMPTY_FIELD), vectorised: a comma is
    empty-handed when no token starts between it and the previous comma of its line (or the
    line start). A trailing comma loses nothing and is allowed."""
    commas = np.flatnonzero(c.b == ord(","))
    if commas.shape[0] == 0:
        return commas
    newlines = np.flatnonzero(c.b == 10)
    comma_line = np.searchsorted(newlines, commas)
    before = np.searchsorted(c.starts, commas)          # tokens started before each comma
    line_first = np.searchsorted(c.line, comma_line)    # index of the line's first token
    same_line = np.concatenate([[False], comma_line[1:] == comma_line[:-1]])
    previous = np.concatenate([[0], before[:-1]])
    empty = np.where(same_line, before == previous, before == line_first)
    return comma_line[empty & data_line[comma_line]]


def line_text(chunk: bytes, index: int) -> bytes:
    """Line `index` (0-based) of a chunk, for error messages and header checks."""
    pos = 0
    for _ in range(index):
        pos = chunk.index(b"\n", pos) + 1
    return chunk[pos:chunk.index(b"\n", pos)]


def show(raw: bytes, limit: int = 40) -> str:
    text = raw.decode("utf-8", "replace").strip()
    return repr(text if len(text) <= limit else text[:limit] + "...")


def is_int_token(tok: bytes) -> bool:
    return re.fullmatch(rb"[+-]?[0-9]+", tok) is not None


def is_float_token(tok: bytes) -> bool:
    if b"_" in tok:        # Python's float() takes 1_000; numpy's readers do not
        return False
    try:
        float(tok)
    except ValueError:
        return False
    return True


def strip_comment(raw: bytes) -> bytes:
    """The line up to its first '#' or '%' (a comment runs to the end of the line)."""
    cut = min((i for i in (raw.find(b"#"), raw.find(b"%")) if i >= 0), default=len(raw))
    return raw[:cut]


# a field that looks like a number: a digit, after an optional sign and decimal point
_NUMBER_LIKE = re.compile(rb"[+-]?\.?[0-9]")


def _is_header(raw: bytes) -> bool:
    """The header rule, one for every text table and both readers: the first data line is a
    header when none of its fields looks like a number (`source,target`). `0 1 # note` is
    data; `1e3 5` or `0x10 5` is data too, and then an error naming the line."""
    toks = [t for t in _SPLIT.split(strip_comment(raw)) if t]
    return bool(toks) and not any(_NUMBER_LIKE.match(t) for t in toks)


def maybe_header(c: _Chunk, chunk: bytes) -> int | None:
    """Index of the first data line if it is a header (see `_is_header`)."""
    data = np.flatnonzero(~c.skip & (c.counts > 0))
    if data.shape[0] == 0:
        return None
    if _is_header(line_text(chunk, int(data[0]))):
        return int(data[0])
    return None


def _first_data_line(path: Path, after: int = 0) -> tuple[int, bytes] | None:
    """(1-based line number, text without its comment) of the first line past `after` that
    has a field once comments are cut (the same lines the byte scanner calls data)."""
    with open_checked(path) as fh:
        for line_no, raw in enumerate(fh, start=1):
            if line_no == 1 and raw.startswith(b"\xef\xbb\xbf"):
                raw = raw[3:]
            text = strip_comment(raw).strip()
            if line_no > after and any(_SPLIT.split(text)):
                return line_no, text
    return None


def _comment_char(path: Path) -> str:
    """'%' when the first comment line of the file uses it, else '#'."""
    with open_checked(path) as fh:
        for raw in fh:
            text = raw.lstrip(b"\xef\xbb\xbf").strip()
            if text[:1] in (b"#", b"%"):
                return text[:1].decode()
            if text:
                break
    return "#"


def int_values(c: _Chunk, keep: np.ndarray) -> np.ndarray:
    """Parse the kept tokens (already checked to be [+-]?digits, <= 18 digits) as int64."""
    starts, ends = c.starts[keep], c.ends[keep]
    neg = c.b[starts] == ord("-")
    starts = starts + (neg | (c.b[starts] == ord("+")))
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


class TextTable:
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
        """np.loadtxt (C-implemented in numpy 2; faster than the byte scanner, see
        benchmarks/bench_load_synth.py "scanner_over_loadtxt"). None when it refuses the file:
        the byte scanner then either names the first bad line or reads what loadtxt could
        not (e.g. mixed separators)."""
        first = _first_data_line(self.path)
        skip, delimiter = 0, None
        if first is not None:
            line_no, raw = first
            if _is_header(raw):
                self.header = (line_no, show(raw))
                skip = line_no
                nxt = _first_data_line(self.path, after=line_no)
                raw = nxt[1] if nxt is not None else b""
            delimiter = "," if b"," in raw else None
        dtype = np.int64 if self.kind == "int" else np.float64
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")   # "input contained no data"
                # one comment character keeps loadtxt in C (a list of them is slower);
                # a file that mixes both falls back to the byte scanner
                table = np.loadtxt(self.path, dtype=dtype, comments=_comment_char(self.path),
                                   delimiter=delimiter, skiprows=skip, ndmin=2,
                                   encoding="utf-8")
        except Exception:
            self.header = None
            return None
        if table.shape[0] == 0:
            return np.zeros(0, dtype=dtype), 0
        if self.kind == "int" and (table.max() >= 10 ** _MAX_ID_DIGITS
                                   or table.min() <= -10 ** _MAX_ID_DIGITS):
            self.header = None
            return None      # the scanner names the line with the too-long number
        if self.columns is None:
            self.columns = int(table.shape[1])
        elif table.shape[1] != self.columns:
            self.header = None
            return None
        return table.reshape(-1), int(table.shape[0])

    def _fail(self, line_no: int, message: str):
        raise InputError(f"{self.path}:{line_no}: {message}")

    def _read(self) -> tuple[np.ndarray, int]:
        token_ok = is_int_token if self.kind == "int" else is_float_token
        parts: list[np.ndarray] = []
        rows = 0
        line_offset = 0
        header_possible = True
        for chunk in _chunks(self.path):
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
                parts.append(int_values(c, keep))
            else:
                parts.append(self._float_values(c, chunk, data_line, line_offset, token_ok))
            rows += int(data_line.sum())
            line_offset += c.counts.shape[0]
        values = np.concatenate(parts) if parts else np.zeros(0, np.int64 if self.kind == "int"
                                                               else np.float64)
        return values, rows

    def _check_chunk(self, c: _Chunk, chunk: bytes, data_line, keep, line_offset, token_ok):
        """Find the first bad data line in this chunk, if any, and raise naming it."""
        bad_lines = [np.flatnonzero(data_line & (c.counts != self.columns)),
                     _empty_field_lines(c, data_line)]
        if self.kind == "int":
            b = c.b
            body = ~_SEP[b]
            odd = body & ~_DIGIT[b]
            odd_pos = np.flatnonzero(odd)
            if odd_pos.shape[0]:
                # a '-' or '+' right at a token start and followed by a digit is a sign
                tok_start = np.zeros(b.shape[0], dtype=bool)
                tok_start[c.starts] = True
                nxt = np.minimum(odd_pos + 1, b.shape[0] - 1)
                sign = (((b[odd_pos] == ord("-")) | (b[odd_pos] == ord("+")))
                        & tok_start[odd_pos] & _DIGIT[b[nxt]])
                odd_pos = odd_pos[~sign]
                newlines = np.flatnonzero(b == 10)
                odd_line = np.searchsorted(newlines, odd_pos)
                bad_lines.append(odd_line[data_line[odd_line]])
            signed = ~_DIGIT[b[np.minimum(c.starts, b.shape[0] - 1)]]
            long_tok = keep & ((c.ends - c.starts - signed) > _MAX_ID_DIGITS)
            bad_lines.append(c.line[long_tok])
        bad = np.concatenate(bad_lines)
        if bad.shape[0] == 0:
            return
        first = int(bad.min())
        raw = line_text(chunk, first)
        self._explain(raw, line_offset + first + 1, token_ok)

    def _explain(self, raw: bytes, line_no: int, token_ok):
        toks = [t for t in _SPLIT.split(strip_comment(raw)) if t]
        for t in toks:
            if not token_ok(t):
                word = "an integer" if self.kind == "int" else "a number"
                self._fail(line_no, f"{show(t)} is not {word} ({self.what})")
        if self.kind == "int" and any(len(t.lstrip(b"+-")) > _MAX_ID_DIGITS for t in toks):
            self._fail(line_no, f"number too large ({self.what})")
        if _EMPTY_FIELD.search(strip_comment(raw)):
            self._fail(line_no, f"empty field: nothing between two commas, or before the "
                                f"first ({self.what})")
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
                raw = line_text(chunk, int(i))
                if not all(token_ok(t) for t in _SPLIT.split(strip_comment(raw)) if t):
                    self._explain(raw, line_offset + int(i) + 1, token_ok)
            self._fail(line_offset + 1, f"could not parse the numbers ({self.what})")
        return values

    def line_of_row(self, row: int) -> int:
        """1-based line number of data row `row` (a second pass, used only for errors)."""
        seen = 0
        line_offset = 0
        for i, chunk in enumerate(_chunks(self.path)):
            c = tokenize(chunk)
            if i == 0 and self.header is not None:
                c.skip[self.header[0] - 1] = True
            data = np.flatnonzero(~c.skip & (c.counts > 0))
            if row < seen + data.shape[0]:
                return line_offset + int(data[row - seen]) + 1
            seen += data.shape[0]
            line_offset += c.counts.shape[0]
        return line_offset
