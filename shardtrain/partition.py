"""Partition methods: each maps a Graph to an assignment, an int64 array (n,) of worker ids.

Every method has the signature `fn(graph, k, *, seed=0, imbalance=0.03)` and is listed in
`METHODS` by name; `partition()` validates the request and dispatches. `load_assignment`
reads a user's own partition from a file.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from shardtrain.errors import InputError, RunError
from shardtrain.graph import Graph
from shardtrain.io import read_npy, require_regular_file


# ----------------------------------------------------------------------------- METIS

# Refinement passes per uncoarsening level (METIS's default is 10). Measured on the 1 M-vertex,
# 10 M-edge parcel network (edge cut): 2 passes take 25.6 CPU s instead of 53.7 at k = 16
# for a cut 0.3 % larger, and 15.9 s instead of 19.9 at k = 4 for a cut 0.05 % larger.
# Random matching in coarsening (ctype RM) was no cheaper in recursive bisection and cut
# 42 % more edges there; skipping 2-hop matching (no2hop) saved nothing.
METIS_REFINE_ITERATIONS = 2


def _metis(graph: Graph, k: int, *, seed: int, imbalance: float, volume: bool) -> np.ndarray:
    import pymetis

    # ufactor is the allowed imbalance in thousandths: 0.03 -> 30 (max part <= 1.03 x mean)
    options = pymetis.Options(ufactor=max(1, int(round(imbalance * 1000))), seed=int(seed),
                              niter=METIS_REFINE_ITERATIONS)
    options.objtype = int(pymetis.ObjType.VOL if volume else pymetis.ObjType.CUT)
    adjacency = pymetis.CSRAdjacency(adj_starts=graph.indptr, adjacent=graph.indices)
    # METIS minimises communication volume only in its k-way scheme (recursive bisection
    # refuses that objective); for the edge cut pymetis picks recursive bisection for k <= 8.
    schemes = [False] if volume else [k <= 8, k > 8]
    n = graph.num_vertices
    limit = 1.02 * (1.0 + imbalance) * n / k + 2     # METIS overshoots its tolerance a little
    for recursive in schemes:
        result = pymetis.part_graph(k, adjacency=adjacency, options=options, recursive=recursive)
        part = np.asarray(result.vertex_part, dtype=np.int64)
        largest = int(np.bincount(part, minlength=k).max())
        if largest <= limit:
            return part
    # one bench run on a 1 M-vertex graph once got a part of n/2 from METIS at k = 16:
    # never hand such a plan on silently
    raise RunError(f"METIS returned a part of {largest} vertices for {k} workers "
                   f"(mean {n / k:.0f}, tolerance {imbalance}); try another --seed or method")


def metis(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """METIS (Karypis & Kumar 1998), minimising the edge cut."""
    if k == 1:
        return np.zeros(graph.num_vertices, dtype=np.int64)
    return _metis(graph, k, seed=seed, imbalance=imbalance, volume=False)


def metis_volume(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """METIS k-way, minimising the total communication volume (rows sent between parts).

    Slow on power-law graphs: its volume refinement walks the neighbourhoods of the hubs.
    Measured on the 1 M-vertex, 10 M-edge parcel network: 21.5 CPU s at k = 2 (METIS's
    default 10 refinement passes), 41.9 at k = 4 and 223.5 at k = 16 with the 2 passes used
    here (884 s at k = 16 with 10), against 26.8 CPU s for `metis` at k = 16. Kept for plans where volume matters more than time.
    """
    if k == 1:
        return np.zeros(graph.num_vertices, dtype=np.int64)
    return _metis(graph, k, seed=seed, imbalance=imbalance, volume=True)


# ----------------------------------------------------------------------------- baselines

def _splitmix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser (Steele, Lea & Flood 2014), vectorised on uint64 (wraps mod 2^64)."""
    z = x + np.uint64(0x9E3779B97F4A7C15)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


def random(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """Hash of (seed, vertex id) mod k: balanced in expectation, ignores structure."""
    ids = np.arange(graph.num_vertices, dtype=np.uint64)
    with np.errstate(over="ignore"):
        key = _splitmix64(np.array([seed], dtype=np.int64).view(np.uint64))[0]
        h = _splitmix64(ids ^ key)
    return (h % np.uint64(k)).astype(np.int64)


def range_blocks(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """Contiguous id blocks whose sizes differ by at most one."""
    n = graph.num_vertices
    return np.arange(n, dtype=np.int64) * k // max(n, 1)


# ----------------------------------------------------------------------------- streaming

def fennel(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03,
           passes: int = 8) -> np.ndarray:
    """Fennel streaming partitioning (Tsourakakis, Gkantsidis, Radunovic & Vojnovic, WSDM
    2014): vertex v goes to argmax_i |N(v) ∩ P_i| - alpha*gamma*|P_i|^(gamma-1), with
    gamma = 1.5, alpha = sqrt(k) m / n^1.5, and parts at the load limit (1+imbalance) n/k closed.

    Restreamed (Nishimura & Ugander, KDD 2013): after the first pass, each pass streams the
    vertices again with sizes reset, counting neighbours not yet placed in this pass at their
    part from the previous pass. One pass leaves the early vertices, which saw no placed
    neighbour, scattered; a few passes repair that (up to `passes`, stopping early once a
    pass changes nothing). A pass costs O(m + n k).

    Vertices stream in a seeded random order, as in the paper's experiments: an order that
    follows the communities would spread each one over all parts before any neighbour is
    known. Batching approximates the one-at-a-time stream: a batch sees only neighbours
    placed before it and the part sizes at its start (batches of imbalance x n / 2k
    vertices, at least 8, keep that error small). The load limit stays hard: vertices beyond
    a part's remaining room within a batch take their next best open part.
    """
    n = graph.num_vertices
    if k == 1:
        return np.zeros(n, dtype=np.int64)
    gamma = 1.5
    alpha = np.sqrt(k) * max(graph.num_edges, 1) / n ** 1.5
    capacity = max(int(np.ceil(n / k)), int((1.0 + imbalance) * n / k))   # hard load limit
    batch = int(min(max(8, imbalance * n / (2 * k)), 65536))
    stream = np.random.default_rng(seed).permutation(n)
    part = np.full(n, -1, dtype=np.int64)       # the previous pass's answer (-1: none yet)
    indptr, indices = graph.indptr, graph.indices
    for _ in range(passes):
        previous = part.copy()
        sizes = np.zeros(k, dtype=np.float64)
        for start in range(0, n, batch):        # a loop over batches, not over vertices
            vertices = stream[start:start + batch]
            b = vertices.shape[0]
            starts = indptr[vertices]
            degree = indptr[vertices + 1] - starts
            row = np.repeat(np.arange(b, dtype=np.int64), degree)
            edge = np.arange(row.shape[0], dtype=np.int64) + np.repeat(
                starts - (np.cumsum(degree) - degree), degree)
            nbr_part = part[indices[edge]]
            placed = nbr_part >= 0
            counts = np.bincount(row[placed] * k + nbr_part[placed], minlength=b * k)
            score = counts.reshape(b, k) - alpha * gamma * np.sqrt(sizes)
            part[vertices] = _choose_within_capacity(score, sizes, capacity)
        if np.array_equal(part, previous):
            break
    return part


def _choose_within_capacity(score: np.ndarray, sizes: np.ndarray, capacity: int) -> np.ndarray:
    """Row-wise argmax of score over parts with room; sizes is updated in place.

    Rows whose favourite part fills up within this batch move to their next best open
    part; each round closes at least one part, so there are at most k rounds.
    """
    b, k = score.shape
    choice = np.full(b, -1, dtype=np.int64)
    todo = np.arange(b)
    while todo.size:
        sub = score[todo]
        sub[:, sizes >= capacity] = -np.inf
        want = np.argmax(sub, axis=1)
        order = np.argsort(want, kind="stable")              # keep stream order per part
        first = np.searchsorted(want[order], np.arange(k))
        rank = np.empty(todo.size, dtype=np.int64)
        rank[order] = np.arange(todo.size) - first[want[order]]
        fits = rank < (capacity - sizes)[want]
        choice[todo[fits]] = want[fits]
        sizes += np.bincount(want[fits], minlength=k)
        todo = todo[~fits]
    return choice


# ----------------------------------------------------------------------------- registry

METHODS = {
    "metis": metis,
    "metis-volume": metis_volume,
    "fennel": fennel,
    "random": random,
    "range": range_blocks,
}

# What a survey or forecast compares unless told otherwise: metis-volume is left out because
# it takes minutes per plan on million-vertex power-law graphs (see its docstring).
DEFAULT_COMPARED = ("metis", "fennel", "random", "range")


def check_workers(k: int, num_vertices: int, option: str = "--workers") -> None:
    if not isinstance(k, (int, np.integer)) or k < 1 or k > num_vertices:
        raise InputError(f"{option} {k}: must be between 1 and the number of vertices "
                         f"({num_vertices})")


def partition(graph: Graph, method: str, k: int, *, seed: int = 0,
              imbalance: float = 0.03) -> np.ndarray:
    """Assignment of every vertex to a worker in [0, k) by the named method."""
    if method not in METHODS:
        raise InputError(f"--method {method!r}: unknown; expected one of {', '.join(METHODS)}")
    check_workers(k, graph.num_vertices)
    if not (0.0 <= imbalance < 1.0):
        raise InputError(f"--imbalance {imbalance}: must be in [0, 1)")
    assignment = METHODS[method](graph, int(k), seed=seed, imbalance=imbalance)
    if k == 1:
        return np.zeros(graph.num_vertices, dtype=np.int64)
    return np.ascontiguousarray(assignment, dtype=np.int64)


# ----------------------------------------------------------------------------- from a file

def load_assignment(path: str | os.PathLike, num_vertices: int,
                    option: str = "--assignment") -> tuple[np.ndarray, int]:
    """A user's partition: `.npy` (integer array) or text with one worker id per line, in
    vertex order. Returns (assignment, k) with k = max id + 1; every worker must own a vertex."""
    path = Path(path)
    require_regular_file(path, option=option)   # a FIFO or device: refused before opening
    if path.suffix == ".npy":
        a = _read_npy(path, num_vertices)
    else:
        a = _read_text(path, num_vertices)
    if a.shape[0] != num_vertices:
        raise InputError(f"{path}: {a.shape[0]} worker ids for a graph of {num_vertices} "
                         f"vertices (one per vertex, in vertex order)")
    if a.size == 0:
        raise InputError(f"{path}: no worker ids")
    negative = np.flatnonzero(a < 0)
    if negative.size:
        i = int(negative[0])
        where = f"entry {i}" if path.suffix == ".npy" else f"{i + 1}"
        raise InputError(f"{path}:{where}: negative worker id {int(a[i])}")
    k = int(a.max()) + 1
    counts = np.bincount(a, minlength=k)
    empty = np.flatnonzero(counts == 0)
    if empty.size:
        raise InputError(f"{path}: worker {int(empty[0])} owns no vertex (ids must cover 0..{k - 1})")
    return a, k


def _read_npy(path: Path, num_vertices: int) -> np.ndarray:
    def check(shape, dtype):     # from the header alone: a declared 10**12 ids is not read
        if len(shape) != 1:
            raise InputError(f"{path}: expected a 1-D array of worker ids, got shape {shape}")
        if not np.issubdtype(dtype, np.integer):
            raise InputError(f"{path}: expected integer worker ids, got dtype {dtype}")
        if shape[0] != num_vertices:
            raise InputError(f"{path}: {shape[0]} worker ids for a graph of {num_vertices} "
                             f"vertices (one per vertex, in vertex order)")

    return read_npy(path, check).astype(np.int64)


# a worker id line: up to 19 digits and a sign, room for spaces and a CR
_MAX_ASSIGNMENT_LINE = 64


def _read_text(path: Path, num_vertices: int) -> np.ndarray:
    size = path.stat().st_size
    if size > (num_vertices + 1) * (_MAX_ASSIGNMENT_LINE + 1):
        raise InputError(f"{path}: {size:,} bytes is too long for {num_vertices} worker ids "
                         f"(one per line, in vertex order)")
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror})") from None
    # the text array below is as wide as the longest line: bound it (vectorised)
    newline = np.flatnonzero(np.frombuffer(raw, dtype=np.uint8) == 10)
    widths = np.diff(np.concatenate([[-1], newline, [len(raw)]])) - 1
    if widths.shape[0] and widths.max() > _MAX_ASSIGNMENT_LINE:
        i = int(np.argmax(widths > _MAX_ASSIGNMENT_LINE))
        raise InputError(f"{path}:{i + 1}: line longer than {_MAX_ASSIGNMENT_LINE} bytes "
                         f"(one worker id per line)")
    lines = raw.split(b"\n")
    if lines and lines[-1].strip() == b"":
        lines.pop()                       # the newline that ends the last line
    if len(lines) != num_vertices:
        raise InputError(f"{path}: {len(lines)} lines for a graph of {num_vertices} vertices "
                         f"(one worker id per line, in vertex order)")
    text = np.strings.strip(np.array(lines, dtype=np.bytes_))
    digits = np.strings.lstrip(text, b"-")
    ok = np.strings.isdigit(digits) & (np.strings.str_len(text) - np.strings.str_len(digits) <= 1)
    bad = np.flatnonzero(~ok)
    if bad.size:
        i = int(bad[0])
        shown = text[i].decode("utf-8", "replace")
        what = "empty line" if not shown else f"{shown!r} is not an integer worker id"
        raise InputError(f"{path}:{i + 1}: {what}")
    try:
        return text.astype(np.int64)
    except (ValueError, OverflowError):
        raise InputError(f"{path}: worker ids out of range for a 64-bit integer") from None
