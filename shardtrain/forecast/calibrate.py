"""Calibration: time this machine's own kernels once, so compute is forecast from measurement.

Each worker runs with its BLAS pinned to one thread, so the kernels are timed the same way.
Three speeds are measured, in the training dtype:
- sparse CSR @ dense: non-zeros x columns per second, at a few widths and two matrix sizes
  (one that fits in cache and one that does not: locality changes the speed a lot);
- dense GEMM: flop/s (2 flops per multiply-add), at a few inner widths;
- elementwise passes (ReLU, dropout, an Adam-like update): bytes touched per second;
- the model's own dropout-mask generator: mask elements per second;
- one OS pipe: bytes per second (only used to check a forecast against a run on pipes);
- the roofs of a roofline model (`forecast.roofline`): a triad-style stream's bytes per second
  and a large GEMM's flop/s, on 1 and on 2 threads;
- one transport call's fixed cost (`exchange_call_seconds`), paid by every exchange and
  every all-reduce step however few bytes it moves;
- the transport's own CPU per byte (`transport_copy_seconds`): a worker copies every frame it
  sends into the kernel and every frame it receives out of it, on its one thread.
A shard's whole training step can also be timed on the worker's own code
(`shard_step_seconds`): the forecast then takes compute from that measurement.

The result is a plain dict (JSON-ready). `speed(...)` helpers look values up with log-linear
interpolation in width and size.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_limits

from shardtrain.compat import add_csr_product
from shardtrain.documents import ABSENT, Document
from shardtrain.errors import InputError, ParameterError, name_parameter

# 2: the transport's copying cost (`transport_copy`) is timed; a version-1 file lacks it and
# would forecast no copying, so it is re-timed rather than used.
# 3: this machine's roofs (`roofline`: stream bandwidth and GEMM flop rate on 1 and 2
# threads) and the sparse timings' rows and columns, which the roofline model needs.
CALIBRATION_VERSION = 3
SPARSE_WIDTHS = (8, 32, 128)
SPARSE_SIZES = ((20_000, 10), (200_000, 10))   # (rows, non-zeros per row)
DENSE_SHAPES = ((20_000, 16, 16), (20_000, 128, 16), (20_000, 128, 128))  # rows, d_in, d_out
ELEMENTWISE_ELEMENTS = 2_000_000


def _best_time(fn, *, repeats: int, budget_s: float) -> float:
    """Fastest of up to `repeats` runs, in CPU seconds of this thread, stopping early once
    `budget_s` of wall time is spent. CPU time and the minimum are both what a worker on a
    core of its own would see: other processes on this machine only delay the wall clock."""
    fn()  # warm up caches and lazy allocations
    best = float("inf")
    start = time.perf_counter()
    for _ in range(repeats):
        t0 = time.thread_time()
        fn()
        best = min(best, time.thread_time() - t0)
        if time.perf_counter() - start > budget_s:
            break
    return max(best, 1e-9)


def _local_csr(rows: int, per_row: int, rng: np.random.Generator, dtype) -> sp.csr_matrix:
    """A square CSR whose neighbours mostly sit close to the row (as in a shard numbered
    for locality), with a tenth of the entries anywhere."""
    nnz = rows * per_row
    src = np.repeat(np.arange(rows, dtype=np.int64), per_row)
    near = src + rng.integers(-64, 65, size=nnz)
    far = rng.integers(0, rows, size=nnz)
    dst = np.where(rng.random(nnz) < 0.1, far, near) % rows
    data = np.ones(nnz, dtype=dtype)
    m = sp.csr_matrix((data, (src, dst)), shape=(rows, rows))
    m.sum_duplicates()
    return m


def _time_sparse(dtype, rng) -> list[dict]:
    out = []
    for rows, per_row in SPARSE_SIZES:
        a = _local_csr(rows, per_row, rng, dtype)
        for width in SPARSE_WIDTHS:
            x = rng.standard_normal((rows, width)).astype(dtype)
            t = _best_time(lambda: a @ x, repeats=5, budget_s=0.3)
            out.append({"nnz": int(a.nnz), "width": width, "seconds": t,
                        "nnz_cols_per_s": a.nnz * width / t, "rows": rows, "cols": rows})
    return out


def _time_dense(dtype, rng) -> list[dict]:
    out = []
    for rows, d_in, d_out in DENSE_SHAPES:
        h = rng.standard_normal((rows, d_in)).astype(dtype)
        w = rng.standard_normal((d_in, d_out)).astype(dtype)
        t = _best_time(lambda: h @ w, repeats=5, budget_s=0.3)
        out.append({"rows": rows, "d_in": d_in, "d_out": d_out, "seconds": t,
                    "flops_per_s": 2.0 * rows * d_in * d_out / t})
    return out


def _time_elementwise(dtype, rng) -> dict:
    """Bytes touched per second over passes like the ones training does."""
    n = ELEMENTWISE_ELEMENTS
    x = rng.standard_normal(n).astype(dtype)
    y = np.empty_like(x)
    keep = rng.random(n) < 0.5
    m = np.zeros_like(x)
    v = np.zeros_like(x)
    item = np.dtype(dtype).itemsize

    def passes():
        np.maximum(x, 0, out=y)                   # ReLU: read x, write y
        np.multiply(x, keep, out=y)               # dropout: read x + mask, write y
        np.multiply(y, 2.0, out=y)                # scale: read + write y
        np.multiply(m, 0.9, out=m)
        np.add(m, 0.1 * x, out=m)                 # Adam first moment
        np.multiply(v, 0.999, out=v)
        np.add(v, 0.001 * (x * x), out=v)         # Adam second moment
        np.divide(m, np.sqrt(v) + 1e-8, out=y)    # Adam step

    # bytes per pass: relu 2n, dropout 2n + mask n/item, scale 2n, m: 2n + 3n (tmp), v: 2n + 4n,
    # step: 5n -- counted roughly as element reads + writes
    touched = n * item * (2 + 2 + 2 + 2 + 3 + 2 + 4 + 5) + n
    t = _best_time(passes, repeats=5, budget_s=0.4)
    return {"elements": n, "seconds": t, "bytes_per_s": touched / t}


def _time_dropout_masks(dtype, rng) -> dict:
    """Mask elements drawn per second by the model's own counter-based generator."""
    from shardtrain.train.model import dropout_mask

    ids = rng.permutation(200_000).astype(np.int64)
    width = 16
    t = _best_time(lambda: dropout_mask(1, 2, 0, ids, width, 0.5, dtype), repeats=3,
                   budget_s=0.3)
    return {"elements": ids.size * width, "seconds": t,
            "elements_per_s": ids.size * width / t}


def _time_row_moves(dtype, rng) -> dict:
    """Bytes per second of the halo row moves a worker makes, the way `worker.HaloOps`
    makes them: gathering the rows it sends (`np.take` of sorted scattered rows) and adding
    the gradients it gets back at those rows (one product with a 0/1 selection matrix), on
    a quarter of 200 000 rows of width 16. Both are slower per byte than a streaming pass."""
    n, width = 200_000, 16
    src = rng.standard_normal((n, width)).astype(dtype)
    idx = np.sort(rng.choice(n, size=n // 4, replace=False)).astype(np.int64)
    buf = np.empty((idx.size, width), dtype=dtype)
    nbytes = buf.nbytes
    gather = _best_time(lambda: np.take(src, idx, axis=0, out=buf), repeats=5, budget_s=0.2)
    try:     # the worker's own way; a plain indexed add if the worker changes it
        from shardtrain.train.halo import selection_matrix
        select = selection_matrix(idx, n, dtype)

        def scatter_add():
            add_csr_product(select, buf, src)
    except ImportError:
        def scatter_add():
            src[idx] += buf

    scatter = _best_time(scatter_add, repeats=5, budget_s=0.2)
    return {"rows": int(idx.size), "width": width, "gather_bytes_per_s": nbytes / gather,
            "scatter_add_bytes_per_s": nbytes / scatter}


def gather_speed(calibration: dict) -> float:
    """Bytes/s of gathering scattered rows; a streaming pass when not measured."""
    rows = calibration.get("row_moves")
    return float(rows["gather_bytes_per_s"]) if rows else elementwise_speed(calibration) / 2


def scatter_add_speed(calibration: dict) -> float:
    """Bytes/s of adding rows at scattered indices; a streaming pass when not measured."""
    rows = calibration.get("row_moves")
    return float(rows["scatter_add_bytes_per_s"]) if rows else \
        elementwise_speed(calibration) / 3


def _time_pipe() -> dict:
    """Bytes per second through one OS pipe (writer thread, reader here): the local
    transport's own ceiling, which a link emulated on pipes cannot beat."""
    import os
    import threading

    total, block = 64 * 2**20, 2**20
    data = bytes(block)
    r, w = os.pipe()

    def writer():
        view = memoryview(data)
        for _ in range(total // block):
            sent = 0
            while sent < block:
                sent += os.write(w, view[sent:])
        os.close(w)

    t0 = time.perf_counter()
    th = threading.Thread(target=writer)
    th.start()
    got = 0
    buf = bytearray(block)
    while True:
        n = os.readv(r, [buf])
        if n == 0:
            break
        got += n
    th.join()
    os.close(r)
    dt = max(time.perf_counter() - t0, 1e-9)
    return {"bytes": got, "seconds": dt, "bytes_per_s": got / dt}


@dataclass(kw_only=True)
class Calibration(Document):
    """A calibration document, typed (fields in the order `calibrate` and `from_flops`
    write them; its shape is `documents.CALIBRATION`). Speeds are per second on one
    thread; the nested entries stay the dicts the JSON holds."""

    version: int
    dtype: str                          # float32 | float64
    threads: int
    sparse: list[dict]                  # {nnz, width, seconds, nnz_cols_per_s, ...}
    dense: list[dict]                   # {rows, d_in, d_out, seconds, flops_per_s}
    elementwise: dict                   # {elements, seconds, bytes_per_s}
    dropout_masks: dict                 # {elements, seconds, elements_per_s}
    row_moves: dict = ABSENT
    pipe: dict | None = ABSENT          # {bytes_per_s, ...}; None: no pipe measured
    exchange_call: dict = ABSENT        # {seconds_per_call, cpu_s_per_call, ...}
    transport_copy: dict = ABSENT       # {cpu_s_per_byte, ...}
    roofline: dict = ABSENT             # {stream_bytes_per_s, flops_per_s, two_threads, ...}
    calibration_s: float | None = ABSENT
    from_flops: float = ABSENT          # made by `from_flops` from one given speed
    sparse_source: str = ABSENT         # "graph": sparse speeds measured on the graph's Â
    extra: dict = field(default_factory=dict)


def calibrate(dtype: str = "float32", *, seed: int = 0, roofline: bool = True) -> dict:
    """Time sparse, dense and elementwise kernels with BLAS on one thread (a few seconds).
    `roofline=False` leaves out the roofs and shard-sized kernels of the roofline model
    (a few seconds more; only a forecast on worker specs needs them): such a calibration is
    for use at once, not for a file (the calibration shape requires them)."""
    if dtype not in ("float32", "float64"):
        raise ParameterError("dtype", f"{dtype!r} is not float32 or float64")
    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    with threadpool_limits(limits=1):
        sparse = _time_sparse(np.dtype(dtype), rng)
        dense = _time_dense(np.dtype(dtype), rng)
        elementwise = _time_elementwise(np.dtype(dtype), rng)
        masks = _time_dropout_masks(np.dtype(dtype), rng)
        rows = _time_row_moves(np.dtype(dtype), rng)
    from shardtrain.forecast.roofline import roofline_calibration

    roofs = roofline_calibration(dtype) if roofline else ABSENT
    pipe = _time_pipe()
    call = exchange_call_seconds()
    copy = transport_copy_seconds(fixed_cpu_s=call["cpu_s_per_call"])
    return Calibration(version=CALIBRATION_VERSION, dtype=dtype, threads=1,
                       sparse=sparse, dense=dense, elementwise=elementwise,
                       dropout_masks=masks, row_moves=rows, pipe=pipe, exchange_call=call,
                       transport_copy=copy, roofline=roofs,
                       calibration_s=time.perf_counter() - t0).to_dict()


def sparse_on_matrix(adj, dtype: str = "float32", *, widths=SPARSE_WIDTHS,
                     parts: int = 8, seed: int = 0) -> list[dict]:
    """Sparse-product speeds measured on a real matrix (a graph's Â in shard order), at its
    full size and on its first 1/parts of rows (about one shard of `parts`): the locality
    of the user's own graph, which a synthetic matrix only approximates."""
    import scipy.sparse as sps

    rng = np.random.default_rng(seed)
    dt = np.dtype(dtype)
    full = sps.csr_matrix(adj, dtype=dt)
    n = full.shape[0]
    blocks = [full]
    if parts > 1 and n >= 2 * parts:
        top = full[: n // parts]
        cols = np.unique(top.indices)
        remap = np.zeros(full.shape[1], dtype=np.int64)
        remap[cols] = np.arange(cols.size)
        blocks.append(sps.csr_matrix((top.data, remap[top.indices], top.indptr),
                                     shape=(top.shape[0], cols.size)))
    out = []
    with threadpool_limits(limits=1):
        for a in blocks:
            for width in widths:
                x = rng.standard_normal((a.shape[1], width)).astype(dt)
                t = _best_time(lambda: a @ x, repeats=4, budget_s=0.3)
                out.append({"nnz": int(a.nnz), "width": int(width), "seconds": t,
                            "nnz_cols_per_s": a.nnz * width / t, "source": "graph",
                            "rows": int(a.shape[0]), "cols": int(a.shape[1])})
    return out


def with_graph_sparse(calibration: dict, graph, dtype: str = "float32") -> dict:
    """The calibration with its sparse speeds measured on `graph`'s own Â, numbered the
    way one shard numbers its vertices (shards.build_shards with one worker)."""
    from shardtrain.plan.shards import build_shards

    shard = build_shards(graph, np.zeros(graph.num_vertices, dtype=np.int64), 1,
                         with_vertex_data=False)[0]
    return dict(calibration, sparse=sparse_on_matrix(shard.adj, dtype), sparse_source="graph")


def from_flops(flops_per_s: float, dtype: str = "float32") -> dict:
    """A calibration from one user-given speed: dense at `flops_per_s`, sparse at the same
    rate in multiply-adds counted as 2 flops each, memory passes at 4 bytes per flop
    (common practice: sparse and elementwise kernels are bound by memory, not arithmetic)."""
    if not (flops_per_s > 0 and np.isfinite(flops_per_s)):
        raise ParameterError("flops_per_s", "must be a positive number")
    return Calibration(version=CALIBRATION_VERSION, dtype=dtype, threads=1,
                       sparse=[{"nnz": 1, "width": 1, "seconds": 0.0,
                                "nnz_cols_per_s": flops_per_s / 2.0}],
                       dense=[{"rows": 1, "d_in": 1, "d_out": 1, "seconds": 0.0,
                               "flops_per_s": flops_per_s}],
                       elementwise={"elements": 0, "seconds": 0.0,
                                    "bytes_per_s": 4.0 * flops_per_s},
                       dropout_masks={"elements": 0, "seconds": 0.0,
                                      "elements_per_s": flops_per_s / 20.0},
                       roofline={"stream_bytes_per_s": 4.0 * flops_per_s,
                                 "flops_per_s": flops_per_s},
                       calibration_s=0.0, from_flops=flops_per_s).to_dict()


def _interp_log(x: float, xs: np.ndarray, ys: np.ndarray) -> float:
    """Linear interpolation in log(x), clamped at the ends."""
    order = np.argsort(xs)
    xs, ys = np.log(np.asarray(xs, float)[order]), np.asarray(ys, float)[order]
    return float(np.interp(np.log(max(x, 1.0)), xs, ys))


def sparse_speed(calibration: dict, nnz: int, width: int) -> float:
    """Non-zeros x columns per second for a product of that size and width."""
    rows = calibration["sparse"]
    sizes = sorted({r["nnz"] for r in rows})
    # per size: interpolate in width; then interpolate those speeds in size
    per_size = []
    for s in sizes:
        at = [r for r in rows if r["nnz"] == s]
        per_size.append(_interp_log(width, np.array([r["width"] for r in at]),
                                    np.array([r["nnz_cols_per_s"] for r in at])))
    if len(sizes) == 1:
        return per_size[0]
    return _interp_log(nnz, np.array(sizes), np.array(per_size))


def dense_speed(calibration: dict, d_in: int, d_out: int) -> float:
    """flop/s of an (rows x d_in) @ (d_in x d_out) product, interpolated in d_in * d_out."""
    rows = calibration["dense"]
    return _interp_log(d_in * d_out, np.array([r["d_in"] * r["d_out"] for r in rows]),
                       np.array([r["flops_per_s"] for r in rows]))


def elementwise_speed(calibration: dict) -> float:
    return float(calibration["elementwise"]["bytes_per_s"])


def mask_speed(calibration: dict) -> float:
    """Dropout-mask elements generated per second."""
    return float(calibration["dropout_masks"]["elements_per_s"])


def pipe_speed(calibration: dict) -> float | None:
    """Bytes/s through one local pipe, or None when not measured."""
    pipe = calibration.get("pipe")
    return float(pipe["bytes_per_s"]) if pipe else None


def _positive_int(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool) and x > 0


def read_calibration(path, dtype: str, param: str = "calibration") -> dict | None:
    """The cached calibration in `path` for `dtype`, or None when one must be timed (and
    then written there): the file does not exist yet, or it is a calibration of another
    dtype or version (a stale cache, replaced). Anything else in its place is refused with
    a ParameterError naming `param` and the file, so that a bad file costs no work and is
    never overwritten."""
    p = Path(path)
    where = f"{param} {p}"
    try:
        return _read_calibration(p, dtype, where)
    except InputError as exc:   # every message starts with `where`: name the parameter
        raise name_parameter(exc, param, p) from None


def _read_calibration(p: Path, dtype: str, where: str) -> dict | None:
    if not p.exists():
        if not p.parent.is_dir():
            raise InputError(f"{where}: folder {p.parent} does not exist")
        return None
    if p.is_dir():
        raise InputError(f"{where}: is a directory")
    from shardtrain import documents

    cal = documents.parse_json_file(p, max_bytes=documents.MAX_BYTES["calibration"],
                                    where=where)
    version = cal.get("version") if isinstance(cal, dict) else None
    if not (_positive_int(version) and cal.get("dtype") in ("float32", "float64")):
        raise InputError(f"{where}:1: not a calibration file (needs 'version' and 'dtype'; "
                         f"give a new file name and forecast writes one there)")
    if version != CALIBRATION_VERSION:
        return None
    try:   # the shape is documents.CALIBRATION
        cal = documents.validate(cal, "calibration", where)
    except InputError as exc:
        raise InputError(f"{where}:1: not a usable calibration: "
                         f"{str(exc)[len(where) + 2:]}") from None
    return cal if cal["dtype"] == dtype else None


def load_or_calibrate(path: str | None, dtype: str) -> dict:
    """Read a cached calibration from `path` when it exists and matches (see
    `read_calibration`); else time one and, when `path` is given, write it there
    (atomically)."""
    if path:
        cal = read_calibration(path, dtype)
        if cal is not None:
            return cal
    cal = calibrate(dtype)
    if path:
        from shardtrain.files import write_json_atomic
        write_json_atomic(path, cal)
    return cal


def shard_step_seconds(shard, settings, num_classes: int, *, epochs: int = 4) -> dict:
    """CPU seconds of one training step and one evaluation forward of the worker's own code
    on `shard` (BLAS on one thread, no transfer: `LoopbackTransport` with its peers
    absent, every receive zeros): the median of
    `epochs - 1` epochs after a warm-up one (the median, as a run's epoch time is taken;
    the fastest is kept beside). This is the shard's measured compute, the part of an epoch
    a counted-work model misses most (Python per-call costs, gathers and scatters of the
    halo rows, allocations); the transfer is forecast apart."""
    from dataclasses import replace

    from shardtrain.train.worker import run_worker
    from shardtrain.transport.loopback import LoopbackTransport
    from shardtrain.transport.meter import Profile

    if epochs < 2:
        raise ValueError("shard_step_seconds needs at least 2 epochs (one is a warm-up)")
    marks = {"start": time.thread_time()}
    step, evaluation = [], []

    def on_phase(text: str) -> None:
        if text.endswith(" evaluation"):
            marks["eval"] = time.thread_time()

    def report(_record: dict) -> None:
        now = time.thread_time()
        step.append(marks["eval"] - marks["start"])
        evaluation.append(now - marks["eval"])
        marks["start"] = now

    with threadpool_limits(limits=1):
        profile = Profile(shard.worker)
        alone = LoopbackTransport(shard.worker, shard.workers, profile, absent_peers=True)
        run_worker(shard, replace(settings, epochs=int(epochs)), alone, profile, report,
                   num_classes=num_classes, on_phase=on_phase)
    return {"worker": int(shard.worker), "epochs": int(epochs),
            "step_cpu_s": float(np.median(step[1:])),
            "eval_cpu_s": float(np.median(evaluation[1:])),
            "step_cpu_s_min": min(step[1:]), "eval_cpu_s_min": min(evaluation[1:]),
            "step_cpu_s_all": step, "eval_cpu_s_all": evaluation}


def exchange_call_seconds(calls: int = 50, batches: int = 8) -> dict:
    """Fixed cost of one transport call: a worker and a peer (a thread here) swap one small
    frame each way through `PipeTransport`; seconds per call of the fastest of `batches`
    batches of `calls` calls (other processes on this machine only add to it). It covers
    the header encode/decode, the poll loop and its wake-ups, the system calls and the
    bookkeeping, which a call pays however few bytes it moves."""
    import threading

    from shardtrain.transport.meter import Profile
    from shardtrain.transport.pipes import PipeTransport, make_pipe_mesh

    ends = make_pipe_mesh(2, {(0, 1)})
    ts = [PipeTransport(r, 2, ends[r], Profile(r), timeout_s=30.0) for r in range(2)]
    out = [np.ones((1, 8), np.float32) for _ in range(2)]
    inc = [np.empty((1, 8), np.float32) for _ in range(2)]

    def loop(r: int, n: int) -> None:
        for _ in range(n):
            ts[r].exchange({1 - r: out[r]}, {1 - r: inc[r]}, kind="halo", epoch=1, layer=0,
                           direction="forward")

    wall, cpu = [], []
    try:
        peer = threading.Thread(target=loop, args=(1, calls * (batches + 1)))
        peer.start()
        loop(0, calls)                                  # warm-up
        for _ in range(batches):
            w0, c0 = time.perf_counter(), time.thread_time()
            loop(0, calls)
            wall.append((time.perf_counter() - w0) / calls)
            cpu.append((time.thread_time() - c0) / calls)
        peer.join()
    finally:
        for t in ts:
            t.close()
    return {"calls": calls * batches, "seconds_per_call": min(wall),
            "cpu_s_per_call": min(cpu)}


def transport_copy_seconds(nbytes: int = 2**22, calls: int = 8, *,
                           fixed_cpu_s: float = 0.0) -> dict:
    """CPU seconds per byte a worker's transport spends moving frames: a worker and a peer
    (a thread here) swap one `nbytes` frame each way through `PipeTransport`, as two workers
    do in a halo exchange, each writing its frame and reading the other's on its one thread.
    Per byte moved (sent + received), from the fastest call's thread CPU time minus the fixed
    CPU of a call (`fixed_cpu_s`). This is the extra CPU a step has inside a run over the same
    step on a transport that moves nothing (`LoopbackTransport`, peers absent): an exchange
    cannot end before the worker has copied its bytes, whatever the link's speed."""
    import threading

    from shardtrain.transport.meter import Profile
    from shardtrain.transport.pipes import PipeTransport, make_pipe_mesh

    ends = make_pipe_mesh(2, {(0, 1)})
    ts = [PipeTransport(r, 2, ends[r], Profile(r), timeout_s=30.0) for r in range(2)]
    items = max(int(nbytes) // 4, 1)
    out = [np.ones(items, np.float32) for _ in range(2)]
    inc = [np.empty(items, np.float32) for _ in range(2)]
    cpu = []

    def loop(r: int, n: int) -> None:
        for _ in range(n):
            c0 = time.thread_time()
            ts[r].exchange({1 - r: out[r]}, {1 - r: inc[r]}, kind="halo", epoch=1, layer=0,
                           direction="forward")
            if r == 0:
                cpu.append(time.thread_time() - c0)

    try:
        peer = threading.Thread(target=loop, args=(1, calls + 1))
        peer.start()
        loop(0, calls + 1)                              # the first call is a warm-up
        peer.join()
    finally:
        for t in ts:
            t.close()
    moved = 2 * out[0].nbytes
    best = max(min(cpu[1:]) - float(fixed_cpu_s), 0.0)
    return {"bytes_per_call": moved, "calls": calls, "cpu_s_per_byte": best / moved}


def transport_copy_speed(calibration: dict) -> float:
    """CPU seconds per byte sent or received by a worker's transport; 0 when not measured."""
    copy = calibration.get("transport_copy")
    return float(copy["cpu_s_per_byte"]) if copy else 0.0


def _shard_step_in_process(shard_dir: str, worker: int, settings_dict: dict,
                           num_classes: int, epochs: int) -> dict:
    from shardtrain.plan.shards import load_shard
    from shardtrain.train.processes import pin_blas_threads
    from shardtrain.train.settings import TrainSettings

    pin_blas_threads()
    return shard_step_seconds(load_shard(shard_dir, worker),
                              TrainSettings.from_dict(settings_dict), num_classes,
                              epochs=epochs)


def shards_step_seconds(shard_dir, settings, num_classes: int, workers: int, *,
                        epochs: int = 6, processes: int | None = None) -> list[dict]:
    """`shard_step_seconds` of every shard in `shard_dir`, `processes` (default: all) at
    once, one process per shard (as the trainer runs them): the workers of a plan checked on
    one machine share its memory bandwidth and caches, which a shard timed alone does not
    see (`benchmarks/bench_forecast.py` shows the difference)."""
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    args = [(str(shard_dir), w, settings.to_dict(), int(num_classes), int(epochs))
            for w in range(int(workers))]
    with ctx.Pool(max(1, min(len(args), processes or len(args)))) as pool:
        return pool.starmap(_shard_step_in_process, args)


def plan_step_seconds(graph, assignment: np.ndarray, k: int, settings, num_classes: int, *,
                      epochs: int = 3, together: int = 1) -> list[dict]:
    """`shard_step_seconds` of every shard of one plan, built as the trainer builds them:
    each timed alone in this process (a worker with a machine of its own), or, with
    `together` > 1 (a check on this machine's cores), that many shards at once, one process
    each, as a local run computes them (`shards_step_seconds`)."""
    from shardtrain.plan.shards import build_shards

    shards = build_shards(graph, assignment, k)
    if together <= 1 or k <= 1:
        return [shard_step_seconds(shard, settings, num_classes, epochs=epochs)
                for shard in shards]
    import shutil
    import tempfile

    from shardtrain.plan.shards import save_shards

    folder = tempfile.mkdtemp(prefix="shardtrain-timing-")
    try:
        save_shards(Path(folder) / "shards", shards,
                    meta={"method": "timing", "seed": int(settings.seed),
                          "graph_fingerprint": None, "num_classes": int(num_classes)})
        return shards_step_seconds(Path(folder) / "shards", settings, num_classes, k,
                                   epochs=max(2, epochs), processes=together)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
