"""External sort of undirected edge rows into a CSR on disk, in memory bounded by a budget.

Every edge row (u, v) becomes the int64 keys row * n + col of both directions (a loop
(v, v) one key), so sorting keys sorts CSR rows, then columns. The keys are written to
bucket files, each holding one range of keys (`plan_buckets`: ranges of whole rows, sized
from a per-block degree histogram so that a bucket fits the budget); each bucket is then read
back alone, sorted in memory, deduplicated and appended to `indices.npy`, while the row
counts stream into `indptr.npy`. A bucket that still exceeds the budget (a hub vertex, a
skewed block) is split again by key range before it is sorted.

The cleanup counts are those of `data.graph.csr_from_edges` (one definition, counted in
pieces): with R rows, of which L are loops, D the distinct keys with row < col and V the
distinct loop vertices, self_loops = V and duplicates = (R - L - D) + (L - V). Every key of
one undirected pair, and every copy of one loop, lands in the same bucket, so the distinct
counts add up over buckets.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable

import numpy as np

from shardtrain.data.graph import EdgeCleanup

# Working memory per item of each pass (bytes), counted from the arrays each pass holds at
# once; `Budget` turns a budget into sizes with them. tests/test_ingest.py measures the peak
# (VmHWM) of an ingest that fills its buckets at 0.97-1.00 of `Budget.working_bytes`.
BUCKETING_BYTES_PER_ROW = 96     # the chunk's ids and bytes read, both keys and their parts
SORT_BYTES_PER_KEY = 10          # the bucket's keys (8 B, sorted in place) and the kept mask
SLICE_BYTES_PER_KEY = 48         # per key of a slice: compacted keys, rows, cols, masks
BLOCK_SHIFT = 12                 # the degree histogram counts blocks of 4096 vertices
MIN_BUDGET = 1 << 16


@dataclass(frozen=True)
class Budget:
    """The sizes every pass takes from one memory budget (bytes)."""

    total: int

    @property
    def chunk_rows(self) -> int:
        """Edge rows read and bucketed at a time (a quarter of the budget)."""
        return int(min(1 << 22, max(1 << 12, self.total // 4 // BUCKETING_BYTES_PER_ROW)))

    @property
    def slice_keys(self) -> int:
        """Keys of a sorted bucket turned into rows and columns at a time."""
        return int(min(1 << 20, max(1 << 10, self.total // 8 // SLICE_BYTES_PER_KEY)))

    @property
    def bucket_keys(self) -> int:
        """Keys a bucket may hold: what is left once a slice's scratch is set aside."""
        rest = self.total - self.slice_keys * SLICE_BYTES_PER_KEY
        return int(max(1 << 10, rest // SORT_BYTES_PER_KEY))

    @property
    def text_chunk_bytes(self) -> int:
        """Bytes of text scanned at a time (the scanner needs about 24 B per byte)."""
        return int(min(8 << 20, max(1 << 12, self.total // 4 // 24)))

    def working_bytes(self, rows: int, keys_in_largest_bucket: int) -> int:
        """Estimated peak working memory of the passes for this much data: the larger of
        a bucketing chunk and a bucket sort (the passes do not overlap)."""
        chunk = min(self.chunk_rows, rows) * BUCKETING_BYTES_PER_ROW
        sort = (keys_in_largest_bucket * SORT_BYTES_PER_KEY
                + min(self.slice_keys, keys_in_largest_bucket) * SLICE_BYTES_PER_KEY)
        return int(max(chunk, sort))


def write_array(fh, a: np.ndarray) -> None:
    """Append the bytes of `a` to a binary file. Unlike ndarray.tofile, a short write (a full
    disk) raises OSError with its errno, which `files.atomic_directory` reports as one line."""
    fh.write(np.ascontiguousarray(a).data)


def read_keys(path: Path, start: int, count: int, dtype=np.int64, offset: int = 0
              ) -> np.ndarray:
    """`count` items of a raw array file from item `start` (after `offset` header bytes),
    read, not mapped: the pages are the process's own, and freed with the array."""
    dtype = np.dtype(dtype)
    with open(path, "rb") as fh:
        fh.seek(offset + start * dtype.itemsize)
        return np.fromfile(fh, dtype=dtype, count=count)


class DegreeHistogram:
    """Keys per block of 2**BLOCK_SHIFT rows, grown as larger ids appear (tiny: 2 KiB per
    million vertices)."""

    def __init__(self) -> None:
        self.counts = np.zeros(0, dtype=np.int64)

    def add(self, src: np.ndarray, dst: np.ndarray) -> None:
        loops = src == dst
        blocks = np.concatenate([src >> BLOCK_SHIFT, dst[~loops] >> BLOCK_SHIFT])
        if blocks.shape[0] == 0:
            return
        c = np.bincount(blocks)
        if c.shape[0] > self.counts.shape[0]:
            c[:self.counts.shape[0]] += self.counts
            self.counts = c
        else:
            self.counts[:c.shape[0]] += c


def plan_buckets(hist: DegreeHistogram, n: int, bucket_keys: int) -> np.ndarray:
    """Bucket boundaries as key values (first key of each bucket, then n * n): whole
    blocks of rows, greedily filled to at most `bucket_keys` keys (a block that alone
    holds more is a bucket of its own and is split again when sorted)."""
    counts = hist.counts
    blocks = max(1, -(-n >> BLOCK_SHIFT) if n else 1)
    counts = np.concatenate([counts, np.zeros(max(0, blocks - counts.shape[0]), np.int64)])
    cum = np.cumsum(counts)
    starts = [0]
    # loop over buckets (few), each found by a search over the cumulative counts
    while True:
        base = cum[starts[-1] - 1] if starts[-1] > 0 else 0
        nxt = int(np.searchsorted(cum, base + bucket_keys, side="right"))
        nxt = max(nxt, starts[-1] + 1)
        if nxt >= blocks:
            break
        starts.append(nxt)
    rows = np.minimum(np.array(starts, dtype=np.int64) << BLOCK_SHIFT, n)
    return np.append(rows * np.int64(n), np.int64(n) * np.int64(n))


def edge_keys(src: np.ndarray, dst: np.ndarray, n: int) -> np.ndarray:
    """The keys of both directions of every non-loop row and one key per loop row."""
    loops = src == dst
    s, d = src[~loops], dst[~loops]
    nn = np.int64(n)
    return np.concatenate([s * nn + d, d * nn + s, src[loops] * (nn + 1)])


class BucketWriter:
    """Appends keys to the bucket files of a folder (one file per key range)."""

    def __init__(self, folder: Path, bounds: np.ndarray):
        self.folder, self.bounds = folder, bounds
        self.sizes = np.zeros(bounds.shape[0] - 1, dtype=np.int64)
        for i in range(self.sizes.shape[0]):
            self.path(i).touch()

    def path(self, i: int) -> Path:
        return self.folder / f"bucket-{i:06d}.keys"

    def add(self, keys: np.ndarray) -> None:
        keys.sort()
        cut = np.searchsorted(keys, self.bounds)
        for i in np.flatnonzero(cut[1:] > cut[:-1]):     # loop over buckets, not keys
            with open(self.path(int(i)), "ab") as fh:
                write_array(fh, keys[cut[i]:cut[i + 1]])
            self.sizes[i] += cut[i + 1] - cut[i]


class IndptrWriter:
    """Streams sorted row ids (each kept key's row, in key order) into the CSR offsets."""

    def __init__(self, fh, n: int):
        self.fh, self.n = fh, n
        self.done = 0            # rows whose end offset is written
        self.total = 0           # keys seen so far
        write_array(fh, np.zeros(1, dtype=np.int64))

    def add(self, rows: np.ndarray) -> None:
        if rows.shape[0] == 0:
            return
        last = int(rows[-1])
        counts = np.bincount(rows - self.done, minlength=last - self.done + 1)
        # rows before `last` are complete (keys come in row order); `last` may continue
        ends = self.total + np.cumsum(counts[:-1])
        write_array(self.fh, ends.astype(np.int64))
        self.total += int(counts.sum())
        self.done = last

    def finish(self) -> None:
        remaining = self.n - self.done
        if remaining > 0:
            write_array(self.fh, np.full(remaining, self.total, dtype=np.int64))
            self.done = self.n


@dataclass
class SortResult:
    num_edges: int           # kept undirected edges
    cleanup: EdgeCleanup
    buckets: int             # bucket files sorted (splits included)
    largest_bucket: int      # keys of the largest bucket sorted in memory


def _split(path: Path, keys_cap: int, slice_keys: int) -> list[Path]:
    """Split an oversized bucket file into key ranges of about `keys_cap` keys (uniform
    ranges between its smallest and largest key, read in slices); a file of one repeated
    key cannot be split and is returned as it is, to be counted in slices."""
    total = path.stat().st_size // 8
    lo, hi = None, None
    for s in range(0, total, slice_keys):
        part = read_keys(path, s, slice_keys)
        lo = part.min() if lo is None else min(lo, part.min())
        hi = part.max() if hi is None else max(hi, part.max())
    assert lo is not None and hi is not None
    if lo == hi:
        return [path]
    parts = max(2, 2 * -(-total // keys_cap))
    lo, hi = int(lo), int(hi) + 1
    # exact integer bounds from lo to hi (float spacing would lose keys near 2**62)
    bounds = np.unique(np.array([lo + (hi - lo) * i // parts for i in range(parts + 1)],
                                dtype=np.int64))
    folder = path.parent / (path.name + ".split")
    folder.mkdir()
    writer = BucketWriter(folder, bounds)
    for s in range(0, total, slice_keys):
        writer.add(read_keys(path, s, slice_keys))
    path.unlink()
    return [writer.path(i) for i in range(bounds.shape[0] - 1)]


def sort_buckets(paths: Iterable[Path], n: int, rows: int, loop_rows: int,
                 indices_fh, indptr_fh, index_dtype: np.dtype, budget: Budget,
                 progress: Callable[[int], None] = lambda k: None) -> SortResult:
    """Sort each bucket in turn, append its distinct columns to `indices_fh` (raw
    index_dtype) and its row offsets to `indptr_fh` (raw int64, n + 1 values in all);
    remove each bucket file once used. `progress(keys)` is told the keys done."""
    indptr = IndptrWriter(indptr_fh, n)
    nn = np.int64(n)
    distinct_pairs = distinct_loops = 0
    largest = count = 0
    todo = list(paths)
    todo.reverse()
    while todo:
        path = todo.pop()
        size = path.stat().st_size // 8
        if size > budget.bucket_keys:
            parts = _split(path, budget.bucket_keys, budget.slice_keys)
            if parts != [path]:
                todo.extend(reversed(parts))
                continue
            # one key repeated: a single loop or pair, kept once
            key = int(np.fromfile(path, dtype=np.int64, count=1)[0])
            row, col = divmod(key, n)
            distinct_loops += row == col
            distinct_pairs += row < col
            if row != col:
                write_array(indices_fh, np.array([col], dtype=index_dtype))
                indptr.add(np.array([row], dtype=np.int64))
            path.unlink()
            count += 1
            progress(size)
            continue
        keys = np.fromfile(path, dtype=np.int64)
        keys.sort()
        largest, count = max(largest, size), count + 1
        keep = np.empty(keys.shape[0], dtype=bool)
        if keys.shape[0]:
            keep[0] = True
            np.not_equal(keys[1:], keys[:-1], out=keep[1:])
        # loop over slices of the bucket (bounded scratch), not over keys
        for s in range(0, keys.shape[0], budget.slice_keys):
            k = keys[s:s + budget.slice_keys][keep[s:s + budget.slice_keys]]
            r, c = np.divmod(k, nn)
            loop = r == c
            distinct_loops += int(np.count_nonzero(loop))
            distinct_pairs += int(np.count_nonzero(r < c))
            r, c = r[~loop], c[~loop]
            write_array(indices_fh, c.astype(index_dtype))
            indptr.add(r)
        del keys, keep
        path.unlink()
        progress(size)
    indptr.finish()
    kept = distinct_pairs
    dups = (rows - loop_rows - distinct_pairs) + (loop_rows - distinct_loops)
    return SortResult(kept, EdgeCleanup(distinct_loops, dups), count, largest)
