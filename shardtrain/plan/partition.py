"""Partition methods: each maps a Graph to an assignment, an int64 array (n,) of worker ids.

Every method has the signature `fn(graph, k, *, seed=0, imbalance=0.03)` and is listed in
`METHODS` by name; `partition()` validates the request and dispatches; `partition_plan()`
also says how the plan was made (METIS scheme, balance, refinement). `load_assignment`
reads a user's own partition from a file.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from shardtrain import defaults
from shardtrain.compat import metis_part_graph
from shardtrain.data.graph import Graph
from shardtrain.data.readers import read_npy, require_regular_file
from shardtrain.errors import InputError, ParameterError, RunError, option

# ----------------------------------------------------------------------------- METIS

# Graphs up to this many undirected edges get every METIS candidate (both schemes, and the
# vertex+edge balanced plan when needed) at METIS's default refinement; above it one scheme
# keeps large surveys affordable (benchmarks/bench_partition_quality.py, "cpu_seconds", and
# benchmarks/bench_survey.py measure the cost).
SMALL_GRAPH_EDGES = 3_000_000
# Refinement passes per uncoarsening level: METIS's default 10 where every candidate runs.
# Larger graphs keep 2: less time for cuts barely larger (benchmarks/bench_survey.py
# measures the time on the 10 M-edge parcel network).
METIS_REFINE_ITERATIONS = 10
METIS_REFINE_ITERATIONS_LARGE = 2
# The vertex+edge balanced plan is tried when the vertex-balanced plan's busiest worker
# holds more than EDGE_BOUND x the mean local edges (the bound issue 9 sets), and taken when
# its extra cut is at most MC_CUT_PER_E_FOLD x ln(old edge imbalance / new one): 3 % more
# cut per e-fold drop of the busiest worker's edge load. Chosen on the benchmark's graphs
# (benchmarks/bench_partition_quality.py; extra cut vs allowance): parcel network k = 8, 16,
# 32: +20/+15/+9 % vs 1.4/2.6/4.0 % (kept by vertices, fennel cuts less than the balanced
# plan there); k = 64: +3.9 vs 5.3 %; power-law graph k = 64: +6.7 vs 8.8 % (taken).
EDGE_BOUND = 1.5
MC_CUT_PER_E_FOLD = 0.03
# METIS cannot hold both constraints to a 3 % tolerance when one hub carries a large share
# of a part's edges; a vertex+edge plan is kept if its parts hold <= 1.2 x the mean vertices.
MC_VERTEX_BOUND = 1.2


def _metis_call(graph: Graph, k: int, vweights: np.ndarray | None, ncon: int, *,
                recursive: bool, seed: int, ufactor: int, niter: int) -> np.ndarray:
    """METIS_PartGraphRecursive / METIS_PartGraphKway with `ncon` vertex weights per vertex
    (row-major, n x ncon), edge-cut objective (`compat.metis_part_graph`: pymetis's
    `part_graph` passes ncon = 1, checked in tests/test_partition_quality.py)."""
    return metis_part_graph(graph.indptr, graph.indices, k, vweights, ncon,
                            recursive=recursive, seed=seed, ufactor=ufactor, niter=niter)


def _plan_summary(graph: Graph, part: np.ndarray, k: int, cut: int, scheme: str,
                  balance: str) -> dict:
    """What a candidate is judged on: edge cut, then the larger of its two imbalances."""
    owned = np.bincount(part, minlength=k)
    edges = np.bincount(part, weights=graph.degrees, minlength=k)   # local edges per worker
    return {"scheme": scheme, "balance": balance, "edge_cut": int(cut),
            "owned_max_over_mean": float(owned.max() / owned.mean()),
            "local_edges_max_over_mean": float(edges.max() / edges.mean())
            if edges.sum() > 0 else 1.0,
            "largest": int(owned.max())}


def _rank(c: dict) -> tuple:
    return (c["edge_cut"], max(c["owned_max_over_mean"], c["local_edges_max_over_mean"]))


def _metis_plan(graph: Graph, k: int, *, seed: int, imbalance: float,
                balance: str) -> tuple[np.ndarray, dict]:
    """(assignment, details) of the edge-cut objective; `balance` is "auto" (the rule in
    `metis`'s docstring), "vertices" or "vertices+edges"."""
    import pymetis

    n = graph.num_vertices
    small = graph.num_edges <= SMALL_GRAPH_EDGES
    niter = METIS_REFINE_ITERATIONS if small else METIS_REFINE_ITERATIONS_LARGE
    # ufactor is the allowed imbalance in thousandths: 0.03 -> 30 (max part <= 1.03 x mean)
    ufactor = max(1, int(round(imbalance * 1000)))
    limit = 1.02 * (1.0 + imbalance) * n / k + 2     # METIS overshoots its tolerance a little
    tried: list[dict] = []
    parts: list[np.ndarray] = []

    def plain(scheme: str) -> None:
        options = pymetis.Options(ufactor=ufactor, seed=int(seed), niter=niter)
        options.objtype = int(pymetis.ObjType.CUT)
        adjacency = pymetis.CSRAdjacency(adj_starts=graph.indptr, adjacent=graph.indices)
        result = pymetis.part_graph(k, adjacency=adjacency, options=options,
                                    recursive=scheme == "recursive")
        part = np.asarray(result.vertex_part, dtype=np.int64)
        tried.append(_plan_summary(graph, part, k, result.edge_cuts, scheme, "vertices"))
        parts.append(part)

    def both() -> None:
        # vertex weights (1, degree): each part holds ~n/k vertices and ~2m/k edge ends
        weights = np.stack([np.ones(n, dtype=np.int64), graph.degrees], axis=1)
        part = _metis_call(graph, k, weights, 2, recursive=False, seed=int(seed),
                           ufactor=ufactor, niter=niter)
        cut = edge_cut_of(graph, part)
        tried.append(_plan_summary(graph, part, k, cut, "kway", "vertices+edges"))
        parts.append(part)

    if balance == "vertices+edges" and graph.num_edges > 0:   # METIS refuses a zero weight sum
        both()
        return parts[0], _details(tried, 0, niter)
    # recursive bisection cut fewer edges than k-way at every k on the parcel network
    # (benchmarks/bench_partition_quality.py) and costs less: the one scheme on large graphs
    for scheme in (("recursive", "kway") if small else ("recursive",)):
        plain(scheme)
    if not small and tried[0]["largest"] > limit:
        plain("kway")                               # the other scheme, as a fallback
    ok = [i for i, c in enumerate(tried) if c["largest"] <= limit]
    if not ok:
        # one bench run on a 1 M-vertex graph once got a part of n/2 from METIS at k = 16:
        # never hand such a plan on silently
        largest = min(c["largest"] for c in tried)
        raise RunError(f"METIS returned a part of {largest} vertices for {k} workers "
                       f"(mean {n / k:.0f}, tolerance {imbalance}); try another {option('seed')} "
                       f"or method")
    best = min(ok, key=lambda i: _rank(tried[i]))
    if balance == "auto" and small and tried[best]["local_edges_max_over_mean"] > EDGE_BOUND:
        both()
        mc, plain_best = tried[-1], tried[best]
        gain = plain_best["local_edges_max_over_mean"] / mc["local_edges_max_over_mean"]
        if (mc["owned_max_over_mean"] <= MC_VERTEX_BOUND and gain > 1.0
                and mc["edge_cut"] <= (1.0 + MC_CUT_PER_E_FOLD * np.log(gain))
                * plain_best["edge_cut"]):
            best = len(tried) - 1
    return parts[best], _details(tried, best, niter)


def _details(tried: list[dict], best: int, niter: int) -> dict:
    won = tried[best]
    return {"scheme": won["scheme"], "balance": won["balance"], "refinement": niter,
            "edge_cut": won["edge_cut"],
            "tried": [{key: value for key, value in c.items() if key != "largest"}
                      for c in tried]}


def edge_cut_of(graph: Graph, part: np.ndarray) -> int:
    """Undirected edges whose ends lie in different parts (row by row, no n x m scratch)."""
    rows = np.repeat(np.arange(graph.num_vertices, dtype=np.int64), graph.degrees)
    return int(np.count_nonzero(part[rows] != part[graph.indices]) // 2)


def _metis_volume_plan(graph: Graph, k: int, *, seed: int,
                       imbalance: float) -> tuple[np.ndarray, dict]:
    import pymetis

    options = pymetis.Options(ufactor=max(1, int(round(imbalance * 1000))), seed=int(seed),
                              niter=METIS_REFINE_ITERATIONS_LARGE)
    options.objtype = int(pymetis.ObjType.VOL)
    adjacency = pymetis.CSRAdjacency(adj_starts=graph.indptr, adjacent=graph.indices)
    n = graph.num_vertices
    # METIS minimises communication volume only in its k-way scheme (recursive bisection
    # refuses that objective)
    result = pymetis.part_graph(k, adjacency=adjacency, options=options, recursive=False)
    part = np.asarray(result.vertex_part, dtype=np.int64)
    largest = int(np.bincount(part, minlength=k).max())
    if largest > 1.02 * (1.0 + imbalance) * n / k + 2:
        raise RunError(f"METIS returned a part of {largest} vertices for {k} workers "
                       f"(mean {n / k:.0f}, tolerance {imbalance}); try another {option('seed')} "
                       f"or method")
    return part, {"scheme": "kway", "balance": "vertices",
                  "refinement": METIS_REFINE_ITERATIONS_LARGE}


def metis(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """METIS (Karypis & Kumar 1998), minimising the edge cut, balanced by vertices and, where
    that matters and costs little, by local edges too.

    On graphs of at most SMALL_GRAPH_EDGES edges, both of METIS's schemes run at its default
    refinement (10 passes): recursive bisection and direct k-way; the plan with the smaller
    edge cut wins (ties: the smaller of max/mean vertices and max/mean local edges). Larger
    graphs run recursive bisection only, with 2 passes (the cost bound of the survey). The
    plan records which won (`plan_details`).

    Balance by vertices and edges (METIS multi-constraint partitioning, Karypis & Kumar
    1998, from memory): every vertex carries the weight vector (1, degree) and METIS keeps
    each part's sum of either within the tolerance, so each worker owns about n/k vertices
    and 2m/k local edges. Rule, on small graphs: when the vertex-balanced plan's busiest
    worker holds more than EDGE_BOUND x the mean local edges, the multi-constraint k-way plan
    is computed, and taken if its parts hold at most MC_VERTEX_BOUND x the mean vertices and
    its edge cut exceeds the plain plan's by at most MC_CUT_PER_E_FOLD x ln(g), where g is the
    factor by which the busiest worker's share of edges falls (3 % per e-fold). Why not
    always: on the parcel network it cut 9-20 % more edges at k = 8..32 (more than fennel),
    on a power-law graph 6.7 % more at k = 64 for an edge imbalance of 1.15 instead of 22.
    What we recall of METIS here (from memory): with several constraints it balances all of
    them within the one tolerance when it can; a hub whose degree exceeds a part's share of
    edges makes that impossible and METIS then returns the least unbalanced plan it found.
    `metis-balanced` always balances both.
    """
    return partition_plan(graph, "metis", k, seed=seed, imbalance=imbalance)[0]


def metis_balanced(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """METIS k-way balanced by vertices and local edges together (multi-constraint, vertex
    weights (1, degree); see `metis`), on any graph size, whatever it costs in edge cut."""
    return partition_plan(graph, "metis-balanced", k, seed=seed, imbalance=imbalance)[0]


def metis_volume(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03) -> np.ndarray:
    """METIS k-way, minimising the total communication volume (rows sent between parts).

    Slow on power-law graphs: its volume refinement walks the neighbourhoods of the hubs,
    many times `metis`'s CPU time at large k (`benchmarks/bench_survey.py --methods
    metis-volume` measures it). Kept for plans where volume matters more than time.
    """
    return partition_plan(graph, "metis-volume", k, seed=seed, imbalance=imbalance)[0]


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
           passes: int = 8, on_pass=None) -> np.ndarray:
    """Fennel streaming partitioning (Tsourakakis, Gkantsidis, Radunovic & Vojnovic, WSDM
    2014): vertex v goes to argmax_i |N(v) ∩ P_i| - alpha*gamma*|P_i|^(gamma-1), with
    gamma = 1.5, alpha = sqrt(k) m / n^1.5, and parts at the load limit (1+imbalance) n/k closed.

    Restreamed (Nishimura & Ugander, KDD 2013): after the first pass, each pass streams the
    vertices again with sizes reset, counting neighbours not yet placed in this pass at their
    part from the previous pass. One pass leaves the early vertices, which saw no placed
    neighbour, scattered; a few passes repair that (up to `passes`, stopping early once a
    pass changes nothing). A pass costs O(m + n k); `on_pass(i)` is called after pass i
    (progress and per-pass timings of the streaming survey). Works on any Graph whose
    arrays are memory maps with int32 indices (a `GraphDir.graph()`), and returns the
    assignment in `owner_dtype(k)`.

    Vertices stream in a seeded random order, as in the paper's experiments: an order that
    follows the communities would spread each one over all parts before any neighbour is
    known. Batching approximates the one-at-a-time stream: a batch sees only neighbours
    placed before it and the part sizes at its start (batches of imbalance x n / 2k
    vertices, at least 8, keep that error small). The load limit stays hard: vertices beyond
    a part's remaining room within a batch take their next best open part.
    """
    n = graph.num_vertices
    if k == 1:
        return np.zeros(n, dtype=owner_dtype(k))
    return _restream(graph, k, fennel_score(k, graph.num_edges, n), seed=seed,
                     imbalance=imbalance, passes=passes, on_pass=on_pass)


def fennel_score(k: int, num_edges: int, num_vertices: int):
    """Fennel's score of a batch (Tsourakakis et al., WSDM 2014, from memory): for counts
    (b, k) of placed neighbours per part and part sizes (k,), counts_i - alpha * gamma *
    |P_i|^(gamma - 1) with gamma = 1.5 and alpha = sqrt(k) m / n^1.5 (m edges, n vertices of
    the graph being placed). Shared by `fennel` and the placement of new vertices
    (`place_vertices`)."""
    gamma = 1.5
    alpha = np.sqrt(k) * max(num_edges, 1) / num_vertices ** 1.5

    def score(counts: np.ndarray, sizes: np.ndarray, capacity: int) -> np.ndarray:
        return counts - alpha * gamma * np.sqrt(sizes)

    return score


def ldg(graph: Graph, k: int, *, seed: int = 0, imbalance: float = 0.03,
        passes: int = 8, on_pass=None) -> np.ndarray:
    """Linear deterministic greedy (Stanton & Kliot, KDD 2012; definition from memory):
    vertex v goes to argmax_i |N(v) ∩ P_i| * (1 - |P_i| / C), C the load limit
    (1+imbalance) n/k; a vertex with no placed neighbour (every score 0) goes to the least
    loaded part. Restreamed, batched, seeded and load-limited exactly as `fennel` (see
    there); only the score differs: a multiplicative penalty of the part's fill instead of
    Fennel's additive one."""
    n = graph.num_vertices
    if k == 1:
        return np.zeros(n, dtype=owner_dtype(k))

    def score(counts: np.ndarray, sizes: np.ndarray, capacity: int) -> np.ndarray:
        out = counts * (1.0 - sizes / capacity)
        alone = ~counts.any(axis=1)             # no placed neighbour: the least loaded part
        out[alone] = -sizes
        return out

    return _restream(graph, k, score, seed=seed, imbalance=imbalance, passes=passes,
                     on_pass=on_pass)


def load_limit(n: int, k: int, imbalance: float) -> int:
    """The hard load limit of the streaming methods: max(ceil(n/k), (1+imbalance) n/k)."""
    return max(int(np.ceil(n / k)), int((1.0 + imbalance) * n / k))


def stream_batch(n: int, k: int, imbalance: float) -> int:
    """Vertices placed together by a streaming pass (see `fennel`)."""
    return int(min(max(8, imbalance * n / (2 * k)), 65536))


def _stream_pass(indptr, indices, part: np.ndarray, stream: np.ndarray, k: int, score,
                 sizes: np.ndarray, capacity: int, batch: int) -> None:
    """One greedy pass: the vertices of `stream`, `batch` at a time, each batch scored on
    its neighbours already placed in `part` (-1: not placed) and the part `sizes` at its
    start, go to the best part with room; `part` and `sizes` are updated in place."""
    n = stream.shape[0]
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
        scores = score(counts.reshape(b, k), sizes, capacity)
        part[vertices] = _choose_within_capacity(scores, sizes, capacity)


def _restream(graph: Graph, k: int, score, *, seed: int, imbalance: float, passes: int,
              on_pass=None) -> np.ndarray:
    """The restreamed, batched greedy pass shared by `fennel` and `ldg`:
    `score(counts (b, k), sizes (k,), capacity)` -> (b, k) scores of a batch."""
    n = graph.num_vertices
    small = owner_dtype(k)           # the assignment: 2 bytes per vertex up to 32767 parts
    capacity = load_limit(n, k, imbalance)
    batch = stream_batch(n, k, imbalance)
    # the same seeded order at any size, held as int32 where the ids fit (half the memory)
    stream = np.random.default_rng(seed).permutation(n).astype(
        np.int32 if n < 2**31 else np.int64)
    part = np.full(n, -1, dtype=small)          # the previous pass's answer (-1: none yet)
    for _pass in range(passes):
        previous = part.copy()
        sizes = np.zeros(k, dtype=np.float64)
        _stream_pass(graph.indptr, graph.indices, part, stream, k, score, sizes, capacity,
                     batch)
        if on_pass is not None:
            on_pass(_pass)
        if np.array_equal(part, previous):
            break
    return part


def place_vertices(graph: Graph, assignment: np.ndarray, new: np.ndarray, k: int, *,
                   imbalance: float = defaults.IMBALANCE) -> np.ndarray:
    """The assignment of `graph` with the vertices `new` (ascending ids) placed, the others
    keeping their worker: one Fennel pass (`fennel_score` on this graph, the `fennel` load
    limit of its n vertices, part sizes counted from the kept vertices) streaming the new
    vertices in id order, `stream_batch` at a time; a batch sees the kept vertices and the
    new ones of earlier batches. `assignment` holds any value at the new ids (ignored)."""
    n = graph.num_vertices
    part = np.asarray(assignment).astype(owner_dtype(k), copy=True)
    new = np.asarray(new, dtype=np.int64)
    part[new] = -1
    if new.size == 0:
        return part.astype(np.int64)
    if k == 1:
        part[new] = 0
        return part.astype(np.int64)
    kept = part[part >= 0]
    sizes = np.bincount(kept, minlength=k).astype(np.float64)
    _stream_pass(graph.indptr, graph.indices, part, new, k,
                 fennel_score(k, graph.num_edges, n), sizes, load_limit(n, k, imbalance),
                 stream_batch(n, k, imbalance))
    return part.astype(np.int64)


def owner_dtype(k: int) -> np.dtype:
    """The smallest signed dtype for worker ids 0..k-1 and -1 (an assignment held by a
    streaming pass, which stays O(n) small)."""
    return np.dtype(np.int16 if k < 2**15 else np.int32)


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
    "metis-balanced": metis_balanced,
    "metis-volume": metis_volume,
    "fennel": fennel,
    "ldg": ldg,
    "random": random,
    "range": range_blocks,
}

# What a survey or forecast compares unless told otherwise (why: shardtrain/defaults.py)
DEFAULT_COMPARED = defaults.COMPARED_METHODS


def check_workers(k: int, num_vertices: int, param: str = "workers") -> None:
    if not isinstance(k, (int, np.integer)) or k < 1 or k > num_vertices:
        raise ParameterError(param, f"must be between 1 and the number of vertices "
                                    f"({num_vertices})", value=k)


def partition(graph: Graph, method: str, k: int, *, seed: int = defaults.SEED,
              imbalance: float = defaults.IMBALANCE) -> np.ndarray:
    """Assignment of every vertex to a worker in [0, k) by the named method."""
    return partition_plan(graph, method, k, seed=seed, imbalance=imbalance)[0]


def partition_plan(graph: Graph, method: str, k: int, *, seed: int = defaults.SEED,
                   imbalance: float = defaults.IMBALANCE) -> tuple[np.ndarray, dict]:
    """(assignment, details) by the named method. details is {"method": name} and, for the
    METIS methods, "scheme" ("recursive" | "kway"), "balance" ("vertices" |
    "vertices+edges") and "refinement" (passes per level); `metis` and `metis-balanced`
    add "edge_cut" and "tried" (every candidate computed, with its cut and imbalances)."""
    if method not in METHODS:
        raise ParameterError("method", f"unknown; expected one of {', '.join(METHODS)}",
                             value=repr(method))
    check_workers(k, graph.num_vertices)
    if not (0.0 <= imbalance < 1.0):
        raise ParameterError("imbalance", "must be in [0, 1)", value=imbalance)
    k = int(k)
    if k == 1:
        return np.zeros(graph.num_vertices, dtype=np.int64), {"method": method}
    if method in ("metis", "metis-balanced"):
        balance = "auto" if method == "metis" else "vertices+edges"
        assignment, details = _metis_plan(graph, k, seed=seed, imbalance=imbalance,
                                          balance=balance)
    elif method == "metis-volume":
        assignment, details = _metis_volume_plan(graph, k, seed=seed, imbalance=imbalance)
    else:
        assignment, details = METHODS[method](graph, k, seed=seed, imbalance=imbalance), {}
    return np.ascontiguousarray(assignment, dtype=np.int64), {"method": method, **details}


# ----------------------------------------------------------------------------- from a file

def load_assignment(path: str | os.PathLike, num_vertices: int,
                    param: str = "assignment") -> tuple[np.ndarray, int]:
    """A user's partition: `.npy` (integer array) or text with one worker id per line, in
    vertex order. Returns (assignment, k) with k = max id + 1; every worker must own a vertex."""
    path = Path(path)
    require_regular_file(path, param=param)   # a FIFO or device: refused before opening
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
        raise InputError(f"{path}: worker {int(empty[0])} owns no vertex (ids must cover "
                         f"0..{k - 1})")
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
    # numpy's stub gives strip() of a bytes array a str result: the array holds bytes
    digits = np.strings.lstrip(text, b"-")  # type: ignore[arg-type]
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
