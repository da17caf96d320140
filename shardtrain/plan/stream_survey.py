"""The survey of a graph directory, chunk by chunk over vertex ranges, in bounded memory.

It writes exactly the numbers of the in-memory survey (`plan.survey`), which builds every
shard; here no shard is built. What a shard's counts need is read off the CSR rows:

- vertex v is a halo row of worker w iff some neighbour u of v is owned by w != owner(v);
  row v alone (complete in the CSR) gives the workers that need v: the distinct owners of
  its neighbours minus its own. So send_rows[owner(v), w] counts the distinct pairs
  (v, w) over cross entries, and each vertex chunk is independent of the others;
- halo[w] = sum over p of send_rows[p, w] (what p sends w is exactly w's halo group p);
- local_edges[p] = the degrees of p's vertices; entries in halo columns of p's Â
  (`cut_entries[p]`) = entries of p's rows whose neighbour another worker owns;
- owned[p] = vertices assigned to p; the shard's Â holds local_edges + owned entries.

From these, `survey.predict_traffic_of_rows`, `survey.predict_memory_counts` and
`survey.plan_record` give the same traffic matrix, bytes, memory and imbalances as the
shards would (tests/test_stream_survey.py compares every field). Memory held: the
assignment (O(n) small), the k x k counters and one chunk (`streaming.chunk_entries`).
"""
from __future__ import annotations

import time

import numpy as np

from shardtrain.data.memory import default_memory_budget
from shardtrain.errors import ParameterError
from shardtrain.plan.streaming import (
    chunk_entries,
    require_metis_fits,
    stream_partition,
    vertex_chunks,
)
from shardtrain.plan.survey import (
    SurveySettings,
    check_plans,
    model_shape,
    parameter_elements,
    plan_record,
    predict_memory_counts,
    predict_traffic_of_rows,
    survey_document,
)


class _Shape:
    """What `check_plans` and `model_shape` ask of a graph, from a graph dir's manifest."""

    def __init__(self, gd):
        self.num_vertices = gd.num_vertices
        self.input_dim = gd.manifest.get("input_dim")
        self.num_classes = int(gd.manifest.get("num_classes") or 0)


def count_plan(indptr: np.ndarray, indices: np.ndarray, owner: np.ndarray, k: int,
               chunks: list[tuple[int, int]], on_chunk=None) -> dict[str, np.ndarray]:
    """Per-worker counts of a plan in one pass over the vertex chunks: owned, local_edges,
    cut_entries (k,) and send_rows (k, k), all int64 (see the module docstring).
    `on_chunk(entries)` is called after each chunk (a progress bar)."""
    owned = np.zeros(k, dtype=np.int64)
    local_edges = np.zeros(k, dtype=np.int64)
    cut_entries = np.zeros(k, dtype=np.int64)
    send = np.zeros(k * k, dtype=np.int64)
    for lo, hi in chunks:                     # a loop over chunks, vectorised inside
        ptr = np.asarray(indptr[lo:hi + 1], dtype=np.int64)
        cols = np.asarray(indices[ptr[0]:ptr[-1]])
        deg = np.diff(ptr)
        own = owner[lo:hi]
        owned += np.bincount(own, minlength=k)
        local_edges += np.bincount(own, weights=deg, minlength=k).astype(np.int64)
        nbr = owner[cols]
        del cols
        src = np.repeat(own, deg)
        cross = nbr != src
        cut_entries += np.bincount(src[cross], minlength=k)
        del src
        # distinct (row, needing worker) pairs of this chunk: sort the keys row * k + worker,
        # int32 while they fit (about twice as fast to sort as int64; bench_stream_survey.py)
        wide = (hi - lo) * k >= 2**31
        key = np.repeat(np.arange(hi - lo, dtype=np.int64 if wide else np.int32), deg)[cross]
        key *= k
        key += nbr[cross]
        del nbr, cross
        key.sort()
        if key.shape[0]:
            keep = np.ones(key.shape[0], dtype=bool)
            np.not_equal(key[1:], key[:-1], out=keep[1:])
            key = key[keep]
            row, need = np.divmod(key, k)
            # (owner, needing worker) codes are below k^2: count them, no second sort
            code = own[row].astype(np.int64) * k + need
            send += np.bincount(code, minlength=k * k)
        del key
        if on_chunk is not None:
            on_chunk(int(ptr[-1] - ptr[0]))
    return {"owned": owned, "local_edges": local_edges, "cut_entries": cut_entries,
            "send_rows": send.reshape(k, k)}


def _shared_partition(gd, method: str, k: int, seed: int, imbalance: float,
                      memory_budget: int, group):
    """Rank 0's `stream_partition`, broadcast: the assignment (owner_dtype(k), n) and its
    details as JSON text (buffers only, nothing pickled)."""
    import json

    from shardtrain.plan.partition import owner_dtype

    dtype = owner_dtype(k)
    if group.rank == 0:
        assignment, details = stream_partition(gd, method, k, seed=seed, imbalance=imbalance,
                                               memory_budget=memory_budget)
        assignment = np.ascontiguousarray(assignment, dtype=dtype)
        text = json.dumps(details).encode()
    else:
        assignment, text = np.empty(gd.num_vertices, dtype=dtype), None
    group.bcast(assignment)
    return assignment, json.loads(group.bcast_bytes(text).decode())


def _feature_itemsize(gd) -> int | None:
    dtype = gd.manifest.get("feature_dtype")
    return None if dtype is None else np.dtype(dtype).itemsize


def stream_survey_plan(gd, method: str, k: int, *, hops, itemsize: int, seed: int,
                       imbalance: float, memory_budget: int, assignment=None,
                       bias: bool = False, entries_per_chunk: int | None = None,
                       progress=None, chunk_log: list | None = None, group=None) -> dict:
    """One plan of a graph directory, the same record as `survey.survey_plan` plus
    "pass_s" (seconds per pass: each restreaming pass of fennel, the counting pass).
    `progress(name, total)` returns a bar with update(n) and close(), or None.

    `group` (e.g. `transport.mpi.MpiGroup`: rank, size, bcast, bcast_bytes, allreduce):
    several processes share the plan. Rank 0 partitions and broadcasts the assignment and
    its details (partitioning stays in one process); every rank counts its own block of the
    chunks, and the counts are summed over the ranks, so every rank holds the same record
    as one process would make (timings aside)."""
    t0, c0 = time.perf_counter(), time.process_time()
    details = {"method": method}
    passes: dict[str, float] = {}
    if group is not None and group.size > 1 and assignment is None:
        assignment, details = _shared_partition(gd, method, k, seed, imbalance,
                                                memory_budget, group)
    elif assignment is None:
        restreamed = method in ("fennel", "ldg")
        bar = progress(f"{method} k={k} partition", None) if progress and restreamed else None
        last = [t0]

        def on_pass(i: int) -> None:
            now = time.perf_counter()
            passes[f"{method}_pass_{i + 1}"] = now - last[0]
            last[0] = now
            if bar is not None:
                bar.update(1)

        assignment, details = stream_partition(gd, method, k, seed=seed, imbalance=imbalance,
                                               memory_budget=memory_budget, on_pass=on_pass)
        if bar is not None:
            bar.close()
    t1, c1 = time.perf_counter(), time.process_time()
    passes["partition"] = t1 - t0
    entries = entries_per_chunk or chunk_entries(memory_budget, gd.num_vertices, k)
    chunks = vertex_chunks(gd.indptr, entries, entries)   # rows bounded too: isolated ones
    bar = progress(f"{method} k={k} count", 2 * gd.num_edges) if progress else None
    mine = chunks
    if group is not None and group.size > 1:    # a contiguous block of chunks per rank
        blocks = np.array_split(np.arange(len(chunks)), group.size)[group.rank]
        mine = [chunks[i] for i in blocks]
    counts = count_plan(gd.indptr, gd.indices, assignment, k, mine,
                        on_chunk=None if bar is None else bar.update)
    if group is not None and group.size > 1:
        counts = {key: group.allreduce(value) for key, value in counts.items()}
    if bar is not None:
        bar.close()
    del assignment
    t2, c2 = time.perf_counter(), time.process_time()
    passes["count"] = t2 - t1
    send_rows = counts["send_rows"]
    owned, local_edges, cut_entries = counts["owned"], counts["local_edges"], \
        counts["cut_entries"]
    halo = send_rows.sum(axis=0)
    params = parameter_elements(hops, bias=bias)
    traffic = predict_traffic_of_rows(send_rows, send_rows.T, hops, itemsize, param_elements=params)
    fsize = _feature_itemsize(gd)
    sent_rows = send_rows.sum(axis=1)
    peers = np.count_nonzero(send_rows, axis=1)
    memory = [predict_memory_counts(int(owned[w]), int(halo[w]), int(sent_rows[w]),
                                    int(local_edges[w] + owned[w]), int(cut_entries[w]),
                                    int(peers[w]), k, hops, itemsize, param_elements=params,
                                    input_dim=hops[0].d_in, feature_itemsize=fsize)
              for w in range(k)]              # a loop over workers
    times = {"partition_s": t1 - t0, "build_s": t2 - t1,
             "partition_cpu_s": c1 - c0, "build_cpu_s": c2 - c1,
             "pass_s": passes}
    if chunk_log is not None:
        chunk_log.append({"method": method, "workers": k, "chunks": len(chunks),
                          "chunk_entries": int(entries)})
    return plan_record(method, k, gd.num_vertices, owned, halo, local_edges, cut_entries,
                       memory, traffic, details, times)


def check_stream_survey(gd, methods: list[str], workers_list: list[int],
                        settings: SurveySettings, *, assignment=None,
                        memory_budget: int | None = None) -> int:
    """Every check `stream_survey` makes before its first plan (InputError naming the
    parameter); returns the memory budget in bytes."""
    check_plans(_Shape(gd), [] if assignment is not None else methods, workers_list, settings)
    from shardtrain.plan.schemes import scheme_of
    scheme = scheme_of(settings)
    if not scheme.exact(np.dtype(settings.dtype)):
        raise ParameterError("halo_keep" if scheme.sampled else "halo_format",
                             "not available in the survey of a graph directory (survey a "
                             "graph file to replay a halo scheme)")
    budget = default_memory_budget() if memory_budget is None else int(memory_budget)
    if assignment is None and max(workers_list) > 1:
        for method in methods:                 # refused before any plan is made
            require_metis_fits(gd, method, budget)
    return budget


def stream_survey(gd, methods: list[str], workers_list: list[int], settings: SurveySettings,
                  *, assignment=None, memory_budget: int | None = None, on_plan=None,
                  progress=None, entries_per_chunk: int | None = None, group=None) -> dict:
    """`survey.survey` of a graph directory (a `GraphDir`), streaming: the same JSON, with
    the memory budget, the peak memory measured (RssAnon + RssShmem; mapped file pages
    beside) and the seconds of every pass under "streaming". With a `group` of ranks (see
    `stream_survey_plan`) every rank returns the same document; its peaks are the largest
    of any rank."""
    from shardtrain.plan.memwatch import MemoryWatch

    budget = check_stream_survey(gd, methods, workers_list, settings, assignment=assignment,
                                 memory_budget=memory_budget)
    shape = _Shape(gd)
    dims, hops = model_shape(shape, settings)
    itemsize = np.dtype(settings.dtype).itemsize
    plans: list[dict] = []
    chunk_counts: list[dict] = []
    start = time.perf_counter()
    with MemoryWatch() as watch:
        for method in methods:
            for k in workers_list:
                plan = stream_survey_plan(gd, method, k, hops=hops, itemsize=itemsize,
                                          seed=settings.seed, imbalance=settings.imbalance,
                                          memory_budget=budget, assignment=assignment,
                                          bias=settings.bias, progress=progress,
                                          entries_per_chunk=entries_per_chunk,
                                          chunk_log=chunk_counts, group=group)
                plans.append(plan)
                if on_plan is not None:
                    on_plan(plan)
    doc = survey_document(gd.num_vertices, gd.num_edges,
                          gd.manifest["structure_fingerprint"], settings, dims, hops, plans)
    peak, peak_file = watch.peak, watch.peak_file
    if group is not None and group.size > 1:
        peak, peak_file = (int(x) for x in group.allreduce(
            np.array([peak, peak_file], dtype=np.int64), op="max"))
    doc["streaming"] = {"memory_budget_bytes": budget,
                        "peak_rss_bytes": peak,            # RssAnon + RssShmem
                        "peak_file_rss_bytes": peak_file,  # mapped pages, not counted
                        "chunks": chunk_counts, "total_s": time.perf_counter() - start}
    return doc
