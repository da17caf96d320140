"""A roofline model of a worker's kernels, calibrated on this machine, for any described worker.

The roofline (Williams, Waterman & Patterson, "Roofline: an insightful visual performance
model for multicore architectures", CACM 2009; definition from memory): a kernel that
moves B bytes between memory and the cores and does F flops cannot take less than
max(B / memory bandwidth, F / peak flop rate). Here every kernel class c of the worker's
schedule costs

    max(B / (bandwidth x eb_c), F / (flop rate x ef_c)) + per-call cost

where eb_c and ef_c, the kernel class's efficiencies, are the fractions of the two roofs
it reaches (its "ceilings" below the roofs, in the paper's words).
Kernel classes and how their bytes and flops are counted (`*_cost` below):
- "sparse": CSR (rows x cols, nnz entries) @ dense (cols x w): F = 2 nnz w;
  B = nnz (index + value bytes) + nnz w b (one row of the dense operand gathered per
  entry) + rows w b (the output) + (rows + 1) index bytes;
- "dense": (r x d_in) @ (d_in x d_out): F = 2 r d_in d_out; B = (r d_in + d_in d_out +
  r d_out) b;
- "elementwise": a pass over B bytes it reads and writes, one flop per element;
- "gather" / "scatter": halo rows copied into send blocks / added back at scattered rows:
  B = 2 x the block's bytes (read and write), no flops counted;
- "masks": the dropout-mask generator, MASK_FLOPS_PER_ELEMENT integer operations per
  mask element (a hash per pair of columns, see `train.model.dropout_mask`) and its
  output (1 + b bytes per element).

Calibration (`calibrate.calibrate` records it): this machine's own roofs are measured --
a triad-style stream (`y = a x + y` in BLAS over arrays far larger than the caches: 3
arrays x n x b bytes per pass, the STREAM convention of counting the bytes the kernel
names) and a large single-precision product (`flops of GEMM`) -- and every kernel the
calibration times (at shard-like sizes, `time_kernels`, besides the calibration's own
small ones) gives the fraction of the binding roof it reached: (bytes / bandwidth) /
(its time - the per-call cost) when memory binds, (flops / flop rate) / (...) when the
arithmetic does; a class's ceiling is the geometric mean over its timings of that kind
(`fit_ceilings`).

Roofs of a described worker (`WorkerRoofs.of_spec`):
- a CPU worker of C cores with the datasheet's memory bandwidth and peak flop rate:
  achievable roofs = datasheet x `DATASHEET_STREAM_FRACTION` (bandwidth) and
  x `DATASHEET_GEMM_FRACTION` (flops) (common practice: a triad reaches about 80 % of the
  theoretical memory bandwidth, a large GEMM about 90 % of the peak). A kernel on t
  threads gets t x P(t) / C of the flop rate (P the parallel efficiency), and of the
  bandwidth min(the worker's, t x P(t) x one core's), one core's being what one core of
  this machine draws (its measured stream, in datasheet terms / the same fraction): an
  assumption -- one core's bandwidth is bounded by the misses it keeps in flight, which
  varies less between machines than their totals do, and a datasheet does not give it.
  Which kernels run on several threads is the worker's code as it is: the dense products
  (BLAS, `--threads`) on C threads; the sparse products (scipy), the elementwise passes,
  the row moves and the masks (numpy) on one. P(1) = 1; P(2) is measured here (the
  2-thread stream and GEMM against 1 thread); beyond 2 threads we assume each doubling
  keeps the same fraction, P(t) = P(2) ** log2(t) (an assumption: this machine has 2
  cores and cannot check it);
- eb_c, ef_c: the spec's `efficiency` table when it names c (one number: both), else this
  machine's calibrated ceilings;
- a worker with an accelerator runs every kernel on it, at its bandwidth and peak x
  `ACCELERATOR_EFFICIENCY` (common practice, from memory; they cannot be measured here),
  each call paying `ACCELERATOR_CALL_S`, and every halo block and gradient crosses the
  host link (`host_link_gbs`, GB/s) once each way, in series with the network.
"""
from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field

import numpy as np

KERNEL_CLASSES = ("sparse", "dense", "elementwise", "gather", "scatter", "masks")
MASK_FLOPS_PER_ELEMENT = 8.0     # the murmur finaliser: ~8 integer ops per 16-bit uniform
DATASHEET_STREAM_FRACTION = 0.8  # common practice: triad / theoretical memory bandwidth
DATASHEET_GEMM_FRACTION = 0.9    # common practice: large GEMM / theoretical peak flop/s
CALL_S = 5e-6                    # Python + numpy per kernel call (common practice)
ACCELERATOR_CALL_S = 10e-6       # launch + Python per kernel call (common practice)
# fraction of an accelerator's roofs each class reaches (common practice, from memory:
# sparse products and scattered adds reach a small part of the memory bandwidth; skinny
# dense products well under the peak; streaming passes most of the bandwidth)
ACCELERATOR_EFFICIENCY = {"sparse": 0.25, "dense": 0.5, "elementwise": 0.8, "gather": 0.5,
                          "scatter": 0.3, "masks": 0.5}
STREAM_ELEMENTS = 1 << 23        # 32 MiB per float32 array: beyond the caches
GEMM_SIZE = 1024


# ---------------------------------------------------------------- counted bytes and flops

def sparse_cost(nnz, rows, cols, width, itemsize: int, index_itemsize: int = 4):
    """(bytes, flops) of CSR (rows x cols, nnz) @ dense (cols x width)."""
    nnz, rows = np.asarray(nnz, np.float64), np.asarray(rows, np.float64)
    b, ix = float(itemsize), float(index_itemsize)
    nbytes = nnz * (ix + b) + nnz * width * b + rows * width * b + (rows + 1) * ix
    return nbytes, 2.0 * nnz * width


def dense_cost(rows, d_in: int, d_out: int, itemsize: int):
    rows = np.asarray(rows, np.float64)
    return (rows * d_in + d_in * d_out + rows * d_out) * float(itemsize), \
        2.0 * rows * d_in * d_out


def elementwise_cost(nbytes, itemsize: int):
    nbytes = np.asarray(nbytes, np.float64)
    return nbytes, nbytes / float(itemsize)


def row_move_cost(nbytes):
    return 2.0 * np.asarray(nbytes, np.float64), np.zeros_like(np.asarray(nbytes, np.float64))


def mask_cost(elements, itemsize: int):
    elements = np.asarray(elements, np.float64)
    return elements * (1.0 + itemsize), elements * MASK_FLOPS_PER_ELEMENT


def roofline_seconds(nbytes, flops, bandwidth: float, flop_rate: float,
                     call_s: float = 0.0):
    """max(bytes / bandwidth, flops / flop rate) + call_s (rates already achieved ones)."""
    return np.maximum(np.asarray(nbytes, np.float64) / bandwidth,
                      np.asarray(flops, np.float64) / flop_rate) + call_s


# ---------------------------------------------------------------- this machine's roofs

def _wall_best(fn, repeats: int, budget_s: float) -> float:
    """Fastest wall time of up to `repeats` runs (threads: thread CPU time would miss the
    other threads' work); other tenants only make it slower, the minimum is the machine."""
    fn()
    best, start = math.inf, time.perf_counter()
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
        if time.perf_counter() - start > budget_s:
            break
    return max(best, 1e-9)


def measure_roofs(dtype: str = "float32", threads: int = 1, *, seed: int = 0) -> dict:
    """This machine's stream bandwidth (bytes/s) and GEMM flop rate on `threads` BLAS
    threads: the roofs of its roofline. One thread: thread CPU time (as every kernel of
    the calibration); more: wall time (the other threads' work is not on this one's
    clock), so a machine shared with other work measures them low."""
    from scipy.linalg import blas
    from threadpoolctl import threadpool_limits

    from shardtrain.forecast.calibrate import _best_time

    dt = np.dtype(dtype)
    rng = np.random.default_rng(seed)
    x = rng.random(STREAM_ELEMENTS, dtype=np.float32).astype(dt, copy=False)
    y = rng.random(STREAM_ELEMENTS, dtype=np.float32).astype(dt, copy=False)
    axpy = blas.saxpy if dt == np.float32 else blas.daxpy
    a = rng.random((GEMM_SIZE, GEMM_SIZE), dtype=np.float32).astype(dt, copy=False)
    c = rng.random((GEMM_SIZE, GEMM_SIZE), dtype=np.float32).astype(dt, copy=False)
    best = _best_time if threads == 1 else _wall_best
    with threadpool_limits(limits=int(threads)):
        stream_s = best(lambda: axpy(x, y, a=0.5), repeats=8, budget_s=0.6)
        gemm_s = best(lambda: a @ c, repeats=6, budget_s=0.6)
    return {"threads": int(threads),
            "stream_bytes_per_s": 3.0 * x.nbytes / stream_s,
            "flops_per_s": 2.0 * GEMM_SIZE ** 3 / gemm_s,
            "stream_elements": STREAM_ELEMENTS, "gemm_size": GEMM_SIZE,
            "load_average": os.getloadavg()[0]}


KERNEL_ROWS = 150_000             # rows of the timed kernels: their arrays beyond the caches
SPARSE_KERNEL_WIDTHS = (16, 64, 256)
DENSE_KERNEL_SHAPES = ((16, 16), (64, 16), (16, 6), (128, 128), (256, 64))
ELEMENTWISE_KERNEL_WIDTH = 64


def time_kernels(dtype: str = "float32", *, seed: int = 1) -> list[dict]:
    """One thread's time of the sparse, dense and elementwise kernels at shard-like sizes
    (`KERNEL_ROWS` rows, arrays larger than the caches, as a shard's are), with the bytes
    and flops the roofline counts for each: what its efficiencies are calibrated on.
    The sparse matrix is `calibrate._local_csr` (neighbours near the row, a tenth
    anywhere)."""
    from threadpoolctl import threadpool_limits

    from shardtrain.forecast.calibrate import _best_time, _local_csr

    dt = np.dtype(dtype)
    b = dt.itemsize
    rng = np.random.default_rng(seed)
    n = KERNEL_ROWS
    out = []
    with threadpool_limits(limits=1):
        a = _local_csr(n, 10, rng, dt)
        for w in SPARSE_KERNEL_WIDTHS:
            x = rng.random((n, w), dtype=np.float32).astype(dt, copy=False)
            t = _best_time(lambda: a @ x, repeats=2, budget_s=0.2)
            nbytes, flops = sparse_cost(a.nnz, n, n, w, b)
            out.append({"class": "sparse", "nnz": int(a.nnz), "rows": n, "width": w,
                        "bytes": float(nbytes), "flops": float(flops), "seconds": t})
        for d_in, d_out in DENSE_KERNEL_SHAPES:
            h = rng.random((n, d_in), dtype=np.float32).astype(dt, copy=False)
            wt = rng.random((d_in, d_out), dtype=np.float32).astype(dt, copy=False)
            t = _best_time(lambda: h @ wt, repeats=3, budget_s=0.2)
            nbytes, flops = dense_cost(n, d_in, d_out, b)
            out.append({"class": "dense", "rows": n, "d_in": d_in, "d_out": d_out,
                        "bytes": float(nbytes), "flops": float(flops), "seconds": t})
        v = rng.random(n * ELEMENTWISE_KERNEL_WIDTH, dtype=np.float32).astype(dt, copy=False) - 0.5
        y = np.empty_like(v)
        t = _best_time(lambda: np.maximum(v, 0, out=y), repeats=4, budget_s=0.3)
        nbytes, flops = elementwise_cost(2 * v.nbytes, b)
        out.append({"class": "elementwise", "elements": int(v.size), "bytes": float(nbytes),
                    "flops": float(flops), "seconds": t})
    return out


def roofline_calibration(dtype: str = "float32") -> dict:
    """The calibration's "roofline" entry: roofs on 1 and 2 threads, and the kernels
    timed at shard-like sizes (`time_kernels`)."""
    one = measure_roofs(dtype, 1)
    two = measure_roofs(dtype, 2)
    return {"stream_bytes_per_s": one["stream_bytes_per_s"],
            "flops_per_s": one["flops_per_s"],
            "two_threads": {"stream_bytes_per_s": two["stream_bytes_per_s"],
                            "flops_per_s": two["flops_per_s"]},
            "parallel_efficiency_2": parallel_efficiency_2(one, two),
            "kernels": time_kernels(dtype),
            "load_average": one["load_average"]}


def parallel_efficiency_2(one: dict, two: dict) -> dict:
    """P(2) = (rate on 2 threads) / (2 x rate on 1), per roof, clamped to [0.5, 1] (a
    machine shared with other work can measure anything; below 0.5 the second thread
    would slow the kernel down)."""
    def p(key):
        return float(min(1.0, max(0.5, two[key] / (2.0 * one[key]))))
    return {"bandwidth": p("stream_bytes_per_s"), "flops": p("flops_per_s")}


def parallel_efficiency(p2: float, threads: int) -> float:
    """P(t) = P(2) ** log2(t): each doubling of threads keeps the same fraction (assumed
    beyond 2 threads; measured at 2)."""
    return 1.0 if threads <= 1 else float(p2 ** math.log2(threads))


def _geomean(values) -> float:
    v = np.asarray([x for x in values if x > 0 and math.isfinite(x)], np.float64)
    return float(np.exp(np.log(v).mean())) if v.size else 1.0


def fit_ceilings(timings, bandwidth: float, flop_rate: float) -> dict:
    """The two ceilings of one kernel class from its timings [(bytes, flops, seconds)]:
    e_bandwidth = geometric mean of (bytes / bandwidth) / (seconds - per-call cost) over
    the timings bound by memory, e_flops the same in flops over those bound by arithmetic;
    which roof binds a timing is decided at the fitted ceilings (two rounds, starting from
    the peaks). A ceiling no timing is bound by stays at the roof (1)."""
    rows = [(float(b) / bandwidth, float(f) / flop_rate, max(float(t) - CALL_S, 1e-9))
            for b, f, t in timings]
    e_b = e_f = 1.0
    for _ in range(2):
        mem = [tb / t for tb, tf, t in rows if tb / e_b >= tf / e_f]
        ari = [tf / t for tb, tf, t in rows if tb / e_b < tf / e_f]
        e_b, e_f = (_geomean(mem) if mem else 1.0), (_geomean(ari) if ari else 1.0)
    return {"bandwidth": e_b, "flops": e_f}


def calibrated_efficiency(calibration: dict) -> dict:
    """This machine's ceilings {class: {"bandwidth": e, "flops": e}} (fractions of its
    measured stream and GEMM roofs, `fit_ceilings`) from the calibration's own timings;
    {} when it has no roofs. The kernels timed at shard-like sizes (`time_kernels`) are
    used where there are some (a shard's arrays are beyond the caches, the calibration's
    small kernels are not); the sparse products measured on the graph's own matrix
    (`calibrate.with_graph_sparse`) before everything."""
    roof = calibration.get("roofline")
    if not roof:
        return {}
    bw, fl = float(roof["stream_bytes_per_s"]), float(roof["flops_per_s"])
    b = np.dtype(calibration["dtype"]).itemsize
    timings: dict[str, list] = {c: [] for c in KERNEL_CLASSES}
    for r in calibration["sparse"]:
        rows = r.get("rows", max(r["nnz"] // 10, 1))
        seconds = r.get("seconds") or r["nnz"] * r["width"] / r["nnz_cols_per_s"]
        timings["sparse"].append((*sparse_cost(r["nnz"], rows, r.get("cols", rows),
                                               r["width"], b), seconds))
    for r in calibration["dense"]:
        if "rows" in r:
            seconds = r.get("seconds") or \
                2.0 * r["rows"] * r["d_in"] * r["d_out"] / r["flops_per_s"]
            timings["dense"].append((*dense_cost(r["rows"], r["d_in"], r["d_out"], b),
                                     seconds))
    elem = float(calibration["elementwise"]["bytes_per_s"])
    timings["elementwise"].append((elem, elem / b, 1.0 + CALL_S))
    kernels = roof.get("kernels") or []
    for c in ("sparse", "dense", "elementwise"):
        if c == "sparse" and calibration.get("sparse_source") == "graph":
            continue
        timed = [(k["bytes"], k["flops"], k["seconds"]) for k in kernels
                 if k.get("class") == c]
        if timed:
            timings[c] = timed
    moves = calibration.get("row_moves")
    gather = float(moves["gather_bytes_per_s"]) if moves else elem / 2
    scatter = float(moves["scatter_add_bytes_per_s"]) if moves else elem / 3
    timings["gather"].append((2.0 * gather, 0.0, 1.0 + CALL_S))
    timings["scatter"].append((2.0 * scatter, 0.0, 1.0 + CALL_S))
    per_second = float(calibration["dropout_masks"]["elements_per_s"])
    timings["masks"].append((*mask_cost(per_second, b), 1.0 + CALL_S))
    return {c: fit_ceilings(timings[c], bw, fl) for c in KERNEL_CLASSES}


# ---------------------------------------------------------------- a described worker

@dataclass(frozen=True)
class WorkerRoofs:
    """Achieved roofs of one described worker, per kernel class (`of_spec`)."""

    name: str
    bandwidth: dict            # class -> achieved bytes/s
    flops: dict                # class -> achieved flop/s
    call_s: float
    efficiency: dict           # class -> {"bandwidth": e, "flops": e} used
    threads: dict              # class -> threads it runs on
    host_link_bytes_per_s: float | None = None   # accelerator: host <-> device
    copy_scale: float = 1.0    # transport copying: this machine's stream / the worker's
    notes: list = field(default_factory=list)

    def seconds(self, kind: str, nbytes, flops):
        return roofline_seconds(nbytes, flops, self.bandwidth[kind], self.flops[kind],
                                self.call_s)

    def to_dict(self) -> dict:
        return {"name": self.name, "efficiency": {c: dict(e) for c, e in
                                                  self.efficiency.items()},
                "bandwidth_bytes_per_s": dict(self.bandwidth),
                "flops_per_s": dict(self.flops), "call_s": self.call_s,
                "threads": dict(self.threads),
                "host_link_bytes_per_s": self.host_link_bytes_per_s, "notes": self.notes}

    @classmethod
    def of_spec(cls, spec, calibration: dict) -> WorkerRoofs:
        """The roofs of `spec` (a `specs.WorkerSpec`), efficiencies from the spec (one
        number per class: both ceilings) or calibrated on this machine (`calibration`
        must hold its "roofline")."""
        here = calibrated_efficiency(calibration)
        if not here:
            raise ValueError("the calibration has no roofline: time it again")
        roof = calibration["roofline"]
        p2 = roof.get("parallel_efficiency_2", {"bandwidth": 1.0, "flops": 1.0})
        acc = spec.accelerator
        notes = []
        here_elem = here["elementwise"]["bandwidth"]
        if acc is not None:
            eff = {c: _both(acc.efficiency.get(c, ACCELERATOR_EFFICIENCY[c]))
                   for c in KERNEL_CLASSES}
            bw = {c: acc.memory_bandwidth_gbs * 1e9 * eff[c]["bandwidth"]
                  for c in KERNEL_CLASSES}
            fl = {c: acc.peak_gflops * 1e9 * eff[c]["flops"] for c in KERNEL_CLASSES}
            notes.append("kernels on the accelerator; efficiencies "
                         + ("from the spec" if acc.efficiency else "common practice defaults"))
            host_bw = spec.memory_bandwidth_gbs * 1e9 * DATASHEET_STREAM_FRACTION \
                / spec.cores * here_elem
            return cls(spec.name, bw, fl, ACCELERATOR_CALL_S, eff,
                       {c: 1 for c in KERNEL_CLASSES},
                       host_link_bytes_per_s=acc.host_link_gbs * 1e9,
                       copy_scale=float(roof["stream_bytes_per_s"]) * here_elem / host_bw,
                       notes=notes)
        eff = {}
        for c in KERNEL_CLASSES:
            if c in spec.efficiency:
                eff[c] = _both(spec.efficiency[c])
            else:   # this machine's ceilings, as fractions of a datasheet's figures
                eff[c] = {"bandwidth": here[c]["bandwidth"] * DATASHEET_STREAM_FRACTION,
                          "flops": here[c]["flops"] * DATASHEET_GEMM_FRACTION}
        threads = {c: (spec.cores if c == "dense" else 1) for c in KERNEL_CLASSES}
        # one core's bandwidth, in datasheet terms (x the efficiency gives what it draws)
        core_bw = float(roof["stream_bytes_per_s"]) / DATASHEET_STREAM_FRACTION
        bw, fl = {}, {}
        for c in KERNEL_CLASSES:
            t = threads[c]
            cores_bw = t * parallel_efficiency(p2["bandwidth"], t) * core_bw
            share_fl = t * parallel_efficiency(p2["flops"], t) / spec.cores
            bw[c] = min(spec.memory_bandwidth_gbs * 1e9, cores_bw) * eff[c]["bandwidth"]
            fl[c] = spec.peak_gflops * 1e9 * eff[c]["flops"] * share_fl
        if spec.cores > 2:
            notes.append(f"parallel efficiency beyond 2 threads assumed P(t) = P(2)^log2(t)"
                         f" (P(2) = {p2['flops']:.2f} for flops)")
        # copying frames is a streaming pass on one thread: scale this machine's cost
        copy_scale = float(roof["stream_bytes_per_s"]) * here_elem / bw["elementwise"]
        return cls(spec.name, bw, fl, CALL_S, eff, threads, copy_scale=copy_scale, notes=notes)


def _both(value) -> dict:
    """A spec's one efficiency number for a class: both of its ceilings."""
    return {"bandwidth": float(value), "flops": float(value)}
