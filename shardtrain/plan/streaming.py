"""Partition plans over a graph directory in bounded memory (issue 11).

A graph directory (`data.graphdir`) is memory-mapped: its CSR arrays stay in the page cache
and a pass reads them in vertex chunks. What a plan holds in process memory is O(n) small
arrays (the assignment in `partition.owner_dtype(k)`: 2 bytes per vertex up to 32767
workers, the stream order as int32) plus one chunk, sized from `--memory-budget`.

- `random`, `range`: computed chunk by chunk, the same ids as `partition.random` and
  `partition.range_blocks`.
- `fennel`: `partition.fennel` itself, whose batches already read only their own rows; it
  runs on the maps unchanged (same assignment as in memory, by construction and tested).
- `metis`, `metis-balanced`, `metis-volume`: the graph is read into memory and METIS runs
  as in memory when `metis_memory_bytes` fits the budget; otherwise the plan is refused
  with one line saying how much it would need and naming the streaming methods.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from shardtrain.data.graph import Graph
from shardtrain.data.memory import default_memory_budget
from shardtrain.errors import InputError, ParameterError, option
from shardtrain.plan.partition import (
    METHODS,
    _splitmix64,
    check_workers,
    fennel,
    ldg,
    owner_dtype,
    partition_plan,
)

STREAMING_METHODS = ("random", "range", "fennel", "ldg")
METIS_METHODS = ("metis", "metis-balanced", "metis-volume")

# Bytes of process memory per CSR entry (one direction of an edge) of one survey chunk:
# the column ids (4-8), the owners of both ends (2 x 2-4), the cross mask (1), the row
# index of cross entries and their (row, worker) keys and the sort's copy (3 x 8), rounded
# up. Chunks hold budget / CHUNK_BYTES_PER_ENTRY entries, after the O(n) arrays.
CHUNK_BYTES_PER_ENTRY = 48
# ... and per vertex of a chunk (its row offsets, owners, degrees): 32 bytes
CHUNK_BYTES_PER_VERTEX = 32
MIN_CHUNK_ENTRIES = 4096           # below this the per-chunk Python overhead dominates

# METIS on a graph directory: the graph read into memory as the in-memory path holds it
# (int64 indptr and indices: 8 (n + 1) + 16 m), plus what METIS, pymetis and the plan's
# candidates allocate. Measured peak RssAnon over the loaded graph (`python
# benchmarks/bench_stream_survey.py --metis-memory`), parcel networks of 0.5-3.2 M CSR
# entries at k = 4..256: 16-145 B per entry (the most where both schemes and the
# vertex+edge plan run); the estimate takes 150 B per entry plus 200 B per vertex, above
# every measured peak.
METIS_BYTES_PER_ENTRY = 150
METIS_BYTES_PER_VERTEX = 200


def metis_memory_bytes(num_vertices: int, num_edges: int) -> int:
    """Estimated peak bytes of a METIS plan of a graph directory (see the constants)."""
    n, entries = int(num_vertices), 2 * int(num_edges)
    loaded = 8 * (n + 1) + 8 * entries
    return loaded + METIS_BYTES_PER_ENTRY * entries + METIS_BYTES_PER_VERTEX * n


def vertex_chunks(indptr: np.ndarray, max_entries: int, max_vertices: int | None = None
                  ) -> list[tuple[int, int]]:
    """Consecutive vertex ranges [lo, hi) covering 0..n, each holding at most `max_entries`
    CSR entries (a single row with more gets a range of its own) and `max_vertices` rows.
    A loop over chunks; each boundary is one binary search of the (mapped) offsets."""
    n = indptr.shape[0] - 1
    max_entries = max(int(max_entries), 1)
    max_vertices = n if max_vertices is None else max(int(max_vertices), 1)
    out = []
    lo = 0
    while lo < n:
        limit = int(indptr[lo]) + max_entries
        hi = int(np.searchsorted(indptr, limit, side="right")) - 1
        hi = min(max(hi, lo + 1), lo + max_vertices, n)
        out.append((lo, hi))
        lo = hi
    return out


def chunk_entries(budget: int, num_vertices: int, k: int) -> int:
    """CSR entries per survey chunk under `budget` bytes, after the interpreter, the O(n)
    arrays (the assignment) and the O(k^2) counters a plan holds; never below MIN_CHUNK_ENTRIES."""
    from shardtrain.plan.survey import BASELINE_RSS_BYTES

    # the interpreter with numpy and scipy counts against the budget too
    fixed = num_vertices * (owner_dtype(k).itemsize + 4) + 3 * k * k * 8 + BASELINE_RSS_BYTES
    return max((int(budget) - fixed) // CHUNK_BYTES_PER_ENTRY, MIN_CHUNK_ENTRIES)


def _id_chunks(n: int, size: int = 1 << 22):
    for lo in range(0, n, size):
        yield lo, min(lo + size, n)


def stream_random(n: int, k: int, seed: int = 0) -> np.ndarray:
    """`partition.random` chunk by chunk: the same hash of (seed, id) mod k."""
    out = np.empty(n, dtype=owner_dtype(k))
    with np.errstate(over="ignore"):
        key = _splitmix64(np.array([seed], dtype=np.int64).view(np.uint64))[0]
        for lo, hi in _id_chunks(n):
            h = _splitmix64(np.arange(lo, hi, dtype=np.uint64) ^ key)
            out[lo:hi] = h % np.uint64(k)
    return out


def stream_range(n: int, k: int) -> np.ndarray:
    """`partition.range_blocks` chunk by chunk: id * k // n."""
    out = np.empty(n, dtype=owner_dtype(k))
    for lo, hi in _id_chunks(n):
        out[lo:hi] = np.arange(lo, hi, dtype=np.int64) * k // max(n, 1)
    return out


def require_metis_fits(gd, method: str, memory_budget: int | None) -> None:
    """InputError, one line, when a METIS method's estimated memory exceeds the budget."""
    if method not in METIS_METHODS:
        return
    budget = default_memory_budget() if memory_budget is None else int(memory_budget)
    need = metis_memory_bytes(gd.num_vertices, gd.num_edges)
    if need > budget:
        from shardtrain.units import human_bytes

        raise ParameterError("method", f"METIS would need about {human_bytes(need)} of "
                             f"memory for {gd.path}, over {option('memory_budget')} "
                             f"{human_bytes(budget)}; use a streaming method "
                             f"({', '.join(STREAMING_METHODS)}) or a larger budget",
                             value=method)


def stream_partition(gd, method: str, k: int, *, seed: int = 0, imbalance: float = 0.03,
                     memory_budget: int | None = None, on_pass=None
                     ) -> tuple[np.ndarray, dict]:
    """(assignment in owner_dtype(k), details) of a graph directory `gd` (a `GraphDir`)
    by the named method, equal to `partition_plan` of the same graph in memory.
    `on_pass(i)`: called after each restreaming pass of fennel."""
    if method not in METHODS:
        raise ParameterError("method", f"unknown; expected one of {', '.join(METHODS)}",
                             value=repr(method))
    n = gd.num_vertices
    check_workers(k, n)
    if not (0.0 <= imbalance < 1.0):
        raise ParameterError("imbalance", "must be in [0, 1)", value=imbalance)
    k = int(k)
    small = owner_dtype(k)
    if k == 1:
        return np.zeros(n, dtype=small), {"method": method}
    if method == "random":
        return stream_random(n, k, seed), {"method": method}
    if method == "range":
        return stream_range(n, k), {"method": method}
    if method in ("fennel", "ldg"):
        # plain array views of the maps (int32 indices, mapped offsets): nothing read whole
        view = Graph(np.asarray(gd.indptr), np.asarray(gd.indices))
        greedy = fennel if method == "fennel" else ldg
        return greedy(view, k, seed=seed, imbalance=imbalance, on_pass=on_pass).astype(
            small, copy=False), {"method": method}
    require_metis_fits(gd, method, memory_budget)
    assignment, details = partition_plan(gd.graph(load=True), method, k, seed=seed,
                                         imbalance=imbalance)
    return assignment.astype(small), details


def load_assignment_mapped(path, num_vertices: int, param: str = "assignment"
                           ) -> tuple[np.ndarray, int]:
    """A user's partition for a graph directory: `.npy` memory-mapped and checked chunk by
    chunk (the same checks and messages as `partition.load_assignment`), returned in
    owner_dtype(k); text files are read as `load_assignment` reads them."""
    from shardtrain.data.readers import require_regular_file
    from shardtrain.plan.partition import load_assignment

    path = Path(path)
    require_regular_file(path, param=param)
    if path.suffix != ".npy":
        a, k = load_assignment(path, num_vertices, param)
        return a.astype(owner_dtype(k)), k
    try:
        a = np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable .npy array "
                         f"({' '.join(str(exc).split())})") from None
    if a.ndim != 1:
        raise InputError(f"{path}: expected a 1-D array of worker ids, got shape {a.shape}")
    if not np.issubdtype(a.dtype, np.integer):
        raise InputError(f"{path}: expected integer worker ids, got dtype {a.dtype}")
    if a.shape[0] != num_vertices:
        raise InputError(f"{path}: {a.shape[0]} worker ids for a graph of {num_vertices} "
                         f"vertices (one per vertex, in vertex order)")
    if a.size == 0:
        raise InputError(f"{path}: no worker ids")
    top = -1
    for lo, hi in _id_chunks(num_vertices):
        part = np.asarray(a[lo:hi])
        negative = np.flatnonzero(part < 0)
        if negative.size:
            i = lo + int(negative[0])
            raise InputError(f"{path}:entry {i}: negative worker id {int(a[i])}")
        top = max(top, int(part.max()))
    if top >= num_vertices:
        # more workers than vertices: some own nothing; name the first, as load_assignment
        ids = np.unique(np.asarray(a))
        gap = np.flatnonzero(ids != np.arange(ids.shape[0]))
        first = int(gap[0]) if gap.size else int(ids.shape[0])
        raise InputError(f"{path}: worker {first} owns no vertex (ids must cover "
                         f"0..{top})")
    k = top + 1
    out = np.empty(num_vertices, dtype=owner_dtype(k))
    counts = np.zeros(k, dtype=np.int64)
    for lo, hi in _id_chunks(num_vertices):
        out[lo:hi] = a[lo:hi]
        counts += np.bincount(out[lo:hi], minlength=k)
    empty = np.flatnonzero(counts == 0)
    if empty.size:
        raise InputError(f"{path}: worker {int(empty[0])} owns no vertex (ids must cover "
                         f"0..{k - 1})")
    return out, k
