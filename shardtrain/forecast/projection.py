"""Forecast: one training epoch's time of a surveyed plan on hardware the user describes.

Inputs are a survey plan (per-worker sizes and the k x k traffic), the model shape, a link
(bandwidth per worker, latency) and a calibration of this machine's kernels
(`shardtrain.forecast.calibrate`), scaled by a speed factor for the target CPUs.

The epoch follows the worker's schedule, step by step, for every worker at once:
- compute: counted work of each kernel (sparse products nnz x width forward and backward;
  dense products rows x d_in x d_out x 2 flops; dropout masks; halo rows gathered into
  send blocks and gradient rows added back at scattered rows; elementwise passes over the
  bytes they touch) divided by the calibrated speed of that kernel -- or, with
  `measured_compute`, each worker's measured CPU seconds of a training step (the worker's
  own code on its shard, `calibrate.shard_step_seconds`), split between the exchanges in
  the counted proportions;
- halo exchange, one per layer and direction that moves bytes: the link model of
  `shardtrain.transport.link` -- each worker has one full-duplex interface; the frames it
  sends in one exchange leave one after the other, and the frames it receives come in one
  after the other (receiver contention: several peers sending to one worker share its
  interface), so it is done after latency + 8 * max(bytes it sends, bytes it receives,
  payload + framing) / bandwidth (`hop_wire_seconds`). An exchange is a barrier for the
  workers that take part, so the hop takes as long as its busiest worker;
- all-reduce: ring (Patarasuk & Yuan 2009), 2(k-1) steps, each one link call carrying one
  chunk of about size/k elements: 2(k-1) x (latency + 8 * chunk bytes / bandwidth);
- every transport call (exchange or ring step) also pays the calibrated fixed cost of a
  call (`calibrate.exchange_call_seconds`: header, poll loop, system calls);
- and a worker's part of a call lasts at least its own copying: the transport copies every
  byte it sends into the kernel and every byte it receives out of it, on the worker's one
  thread (`calibrate.transport_copy_seconds`, CPU seconds per byte). A hop costs each
  worker call cost + max(latency + 8 * sent bytes / bandwidth, copy CPU of its sent +
  received bytes): the copying overlaps the link's time and bounds it on fast links.
  Why: a training step inside a real run costs more CPU than the same step on a transport
  that moves nothing (`calibrate.shard_step_seconds`). Timed in pairs (alternate epochs of
  ONE run on the real pipes and on a no-transfer transport, so other tenants' load hits
  both alike) the model's own compute costs the same CPU in both, and the difference is
  the transport's own work: copying and the fixed cost of each call. The run books it
  under "exchange", so a loopback step does not see it and it must be forecast with the
  transfer. Not modelled: a small shard behind a slow link computes a little slower in a
  run, its caches cooling while it sleeps on the link (benchmarks/bench_forecast.py
  compares the forecast CPU with the run's);
- waiting: exchanges synchronise, so between two of them every worker waits for the
  slowest: wait = max - own, per compute phase and per exchange.

- on a described worker (`forecast_on_specs`, `shardtrain forecast --worker-spec`), every
  kernel is costed on the worker's roofline instead (`forecast.roofline`), a worker with an
  accelerator also moves its halo blocks and gradients over the host link
  (`host_link_seconds`), each plan's predicted peak memory per worker is checked against the
  worker's memory, and its price per epoch is the workers' price per hour x epoch / 3600.

`epoch_s` is the critical path of one training step (forward, loss, backward, all-reduce,
Adam step). The evaluation forward (no dropout, forward exchanges only) that the trainer
runs for the accuracies is forecast apart as `eval_s`; `epoch_with_eval_s` adds it.
With `cores` (checking on this machine), more busy workers than cores share them: every
worker's compute is stretched by workers / cores.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from shardtrain import defaults
from shardtrain.errors import InputError, ParameterError
from shardtrain.forecast import roofline
from shardtrain.forecast.calibrate import (
    dense_speed,
    elementwise_speed,
    gather_speed,
    mask_speed,
    pipe_speed,
    scatter_add_speed,
    sparse_speed,
    transport_copy_speed,
)

# Python and numpy overhead of one kernel call (common practice: a few microseconds).
CALL_OVERHEAD_S = 5e-6


def frame_header_bytes(dtype: str, shape, *, kind: str = "halo", layer: int = 0,
                       direction: str = "backward") -> int:
    """Framing bytes of one frame as the transport encodes it (length prefix + header)."""
    try:
        from shardtrain.transport.frames import encode_header
    except ImportError:   # the transport is optional for a forecast
        return 112
    return len(encode_header(kind=kind, epoch=0, layer=layer, direction=direction, source=0,
                             dtype=dtype, shape=[max(int(d), 1) for d in shape]))


def link_seconds(nbytes, gbps: float):
    """Serialisation time of nbytes on a gbps link: bytes * 8 / (gbps * 1e9)."""
    return np.asarray(nbytes, dtype=np.float64) * 8.0 / (gbps * 1e9)


def hop_wire_seconds(out_bytes, in_bytes, out_msgs, in_msgs, latency_s: float,
                     gbps: float, *, receiver_contention: bool = True) -> np.ndarray:
    """Each worker's time on its interface in one exchange (per worker arrays of the bytes
    it sends and receives, framing included, and of its frames each way).

    Full duplex, one interface per worker: the frames a worker sends leave one after the
    other, and the frames it receives come in one after the other, each side at line rate.
    With `receiver_contention` (what a real interface and `--emulate-link` do):
    latency + 8 * max(sent, received) / bandwidth for a worker that sends or receives
    anything; without it (the model before receiver contention was counted, kept to show
    the difference): latency + 8 * sent / bandwidth for a worker that sends. The hop is a
    barrier: it lasts as long as its slowest worker (`_Timeline`)."""
    out_b = np.asarray(out_bytes, dtype=np.float64)
    in_b = np.asarray(in_bytes, dtype=np.float64)
    sends = np.asarray(out_msgs) > 0
    if not receiver_contention:
        return np.where(sends, latency_s + link_seconds(out_b, gbps), 0.0)
    busy = sends | (np.asarray(in_msgs) > 0)
    return np.where(busy, latency_s + link_seconds(np.maximum(out_b, in_b), gbps), 0.0)


def host_link_seconds(nbytes, host_bytes_per_s: float | None):
    """A worker with an accelerator: the bytes it sends and receives cross the host link
    (device -> host before sending, host -> device after receiving), in series with the
    network; 0 without an accelerator."""
    if not host_bytes_per_s:
        return 0.0
    return np.asarray(nbytes, dtype=np.float64) / float(host_bytes_per_s)


def ring_allreduce_seconds(size_bytes: float, k: int, gbps: float, latency_us: float) -> float:
    """Ring all-reduce of `size_bytes` among k workers: 2(k-1) steps of size/k bytes
    (Patarasuk & Yuan 2009), each costing one latency plus its serialisation."""
    if k <= 1:
        return 0.0
    steps = 2 * (k - 1)
    return steps * (latency_us * 1e-6 + float(link_seconds(size_bytes / k, gbps)))


@dataclass
class _Timeline:
    """The epoch as a sequence of per-worker compute phases and synchronising exchanges."""

    k: int
    steps: list = field(default_factory=list)   # ("compute", s[k]) | ("exchange", label, s[k])

    def compute(self, seconds) -> None:
        s = np.broadcast_to(np.asarray(seconds, dtype=np.float64), (self.k,))
        if self.steps and self.steps[-1][0] == "compute":
            self.steps[-1] = ("compute", self.steps[-1][1] + s)
        else:
            self.steps.append(("compute", s.copy()))

    def exchange(self, label: str, seconds, kind: str = "exchange") -> None:
        s = np.broadcast_to(np.asarray(seconds, dtype=np.float64), (self.k,))
        self.steps.append((kind, label, s.copy()))

    def scale_compute(self, factor) -> None:
        """Stretch every worker's compute phases by its own factor (measured / counted)."""
        f = np.asarray(factor, dtype=np.float64)
        self.steps = [("compute", s[1] * f) if s[0] == "compute" else s for s in self.steps]

    def own_compute(self) -> np.ndarray:
        return sum((s[1] for s in self.steps if s[0] == "compute"), np.zeros(self.k))

    def totals(self) -> dict:
        """Critical path and per-worker split: compute + exchange + allreduce + wait = total."""
        own = {"compute": np.zeros(self.k), "exchange": np.zeros(self.k),
               "allreduce": np.zeros(self.k)}
        wait = np.zeros(self.k)
        path = {"compute": 0.0, "exchange": 0.0, "allreduce": 0.0}
        hops = []
        for step in self.steps:
            kind, s = step[0], step[-1]
            slowest = float(s.max()) if s.size else 0.0
            own[kind] += s
            wait += slowest - s
            path[kind] += slowest
            if kind != "compute":
                hops.append({"step": step[1], "seconds": slowest,
                             "busiest_worker": int(np.argmax(s))})
        total = sum(path.values())
        return {"total": total, "path": path, "own": own, "wait": wait, "hops": hops}


def _send_rows(plan: dict, hops: list[dict], itemsize: int) -> np.ndarray:
    """send_rows[p, q]: rows p sends q in one forward exchange.

    Taken from the plan when it lists them; otherwise solved from pair_bytes, which is
    S * F + S^T * B with F, B the summed forward and backward widths in bytes (an undirected
    graph: q's halo rows owned by p are the rows p sends q). When F == B only S + S^T is
    known, and S is taken symmetric.
    """
    traffic = plan["traffic"]
    if "send_rows" in traffic:
        return np.asarray(traffic["send_rows"], dtype=np.float64)
    k = int(plan["workers"])
    pair = np.asarray(traffic.get("pair_bytes", np.zeros((k, k))), dtype=np.float64)
    if pair.shape != (k, k):
        raise InputError(f"plan {plan.get('method')}/{k}: pair_bytes is not {k} x {k}")
    f = sum(h["forward_width"] for h in hops) * itemsize
    b = sum(h["backward_width"] for h in hops) * itemsize
    if f == b:
        return pair / (2.0 * f) if f else np.zeros((k, k))
    s = (f * pair - b * pair.T) / (f * f - b * b)
    return np.clip(np.rint(s), 0, None)


def _check_positive(name: str, value, *, allow_zero=False) -> None:
    ok = value is not None and math.isfinite(value) and (value >= 0 if allow_zero else value > 0)
    if not ok:
        raise ParameterError(name, f"must be a {'non-negative' if allow_zero else 'positive'} "
                                   f"number, got {value!r}")


def forecast_plan(plan: dict, model: dict, *, link_gbps: float, latency_us: float,
                  calibration: dict, speed_factor: float = defaults.SPEED_FACTOR,
                  cores: float | None = None,
                  dropout: float = defaults.DROPOUT, local_pipes: bool = False,
                  classes: int | None = None, measured_compute: list[dict] | None = None,
                  receiver_contention: bool = True, worker=None) -> dict:
    """Forecast one training epoch (and one evaluation forward) of a survey plan.

    `model`: the survey's "model" (dtype, hops). `cores`: the plan runs on one machine with
    that many cores (compute stretched by workers / cores when there are more workers; a
    fraction models cores that other processes share).
    `local_pipes`: the link is emulated on local pipes, whose own speed (calibrated) also
    caps the bandwidth. `measured_compute`: one `calibrate.shard_step_seconds` result per
    worker (in worker order): each worker's compute phases are then scaled so that they add
    up to its measured CPU seconds of a training step (and of an evaluation forward),
    keeping the counted split between exchanges. The calibration's `exchange_call` (when
    present) adds its fixed cost to every transport call. `worker`: a
    `roofline.WorkerRoofs`: every kernel costed on its roofline (speed_factor then 1).
    `receiver_contention`: False gives the model without it (a hop as long as its busiest
    sender), kept to compare.
    A halo scheme in `model["halo_scheme"]` (the survey's, `plan.schemes`) shrinks the
    TRAINING exchanges: a fraction P of the halo rows (the expectation), each of
    `HaloScheme.row_bytes` on the wire; the evaluation forward stays exact. (The row
    selection and the codec's own CPU are not modelled.)
    Returns the plan-level critical path and a per-worker split.
    """
    _check_positive("link_gbps", link_gbps)
    _check_positive("latency_us", latency_us, allow_zero=True)
    _check_positive("speed_factor", speed_factor)
    if cores is not None and not cores > 0:
        raise ParameterError("cores", f"must be above 0, got {cores}")
    k = int(plan["workers"])
    dtype = model["dtype"]
    b = np.dtype(dtype).itemsize
    hops = model["hops"]
    shards = sorted(plan["shards"], key=lambda s: s["worker"])
    n = np.array([s["owned"] for s in shards], dtype=np.float64)
    halo = np.array([s["halo"] for s in shards], dtype=np.float64)
    nnz = np.array([s["local_edges"] for s in shards], dtype=np.float64) + n  # + self-loops
    from shardtrain.plan.schemes import KEEP_ONE, HaloScheme, keep_threshold

    entry = model.get("halo_scheme") or {}
    scheme = HaloScheme(entry.get("halo_keep", defaults.HALO_KEEP),
                        entry.get("halo_format", defaults.HALO_FORMAT)).check()
    kept = keep_threshold(scheme.keep) / KEEP_ONE
    S = _send_rows(plan, hops, b)
    sent_rows = S.sum(axis=1)          # rows p sends, summed over its peers
    back_rows = S.sum(axis=0)          # p's halo rows: gradients p sends back to owners
    fwd_msgs = (S > 0).sum(axis=1)
    bwd_msgs = (S > 0).sum(axis=0)
    classes = classes or hops[-1]["d_out"]
    params = int(model.get("parameters") or sum(h["d_in"] * h["d_out"] for h in hops))

    stretch = max(1.0, k / cores) if cores else 1.0
    slow = stretch / speed_factor
    host_bps = worker.host_link_bytes_per_s if worker is not None else None
    elem = elementwise_speed(calibration)
    masks = mask_speed(calibration)
    bandwidth = link_gbps
    if local_pipes and (pipe_bps := pipe_speed(calibration)):
        bandwidth = min(link_gbps, pipe_bps * 8 / 1e9)
    latency = latency_us * 1e-6
    call_s = float(calibration.get("exchange_call", {}).get("seconds_per_call", 0.0))
    copy_s = transport_copy_speed(calibration) * slow     # CPU s per byte sent or received
    if worker is not None:
        copy_s *= worker.copy_scale
    if measured_compute is not None and len(measured_compute) != k:
        raise InputError(f"plan {plan.get('method')}/{k}: measured compute of "
                         f"{len(measured_compute)} workers given")

    # seconds per kind of kernel, per worker, of the timeline being built
    parts: dict[str, np.ndarray] = {}

    def count(kind, seconds):
        seconds = np.broadcast_to(np.asarray(seconds, dtype=np.float64), (k,))
        parts[kind] = parts.get(kind, np.zeros(k)) + seconds
        return seconds

    def sparse(width):
        if worker is not None:
            return count("sparse", worker.seconds(
                "sparse", *roofline.sparse_cost(nnz, n, n + halo, width, b)) * slow)
        speeds = np.array([sparse_speed(calibration, int(z), int(width)) for z in nnz])
        return count("sparse", (nnz * width / speeds + CALL_OVERHEAD_S) * slow)

    def gemm(rows, d_in, d_out):
        if worker is not None:
            return count("dense", worker.seconds(
                "dense", *roofline.dense_cost(rows, d_in, d_out, b)) * slow)
        return count("dense", (2.0 * rows * d_in * d_out / dense_speed(calibration, d_in, d_out)
                               + CALL_OVERHEAD_S) * slow)

    def passes(nbytes):
        if worker is not None:
            return count("elementwise", worker.seconds(
                "elementwise", *roofline.elementwise_cost(nbytes, b)) * slow)
        return count("elementwise",
                     (np.asarray(nbytes, dtype=np.float64) / elem + CALL_OVERHEAD_S) * slow)

    def row_moves(gathered, added):
        """Rows gathered into send blocks, gradient rows added back at scattered rows."""
        if worker is not None:
            gathered, added = np.broadcast_arrays(np.asarray(gathered, np.float64),
                                                  np.asarray(added, np.float64))
            t = np.where(gathered > 0, worker.seconds(
                "gather", *roofline.row_move_cost(gathered)), 0.0) + np.where(
                added > 0, worker.seconds("scatter", *roofline.row_move_cost(added)), 0.0)
            return count("row_moves", t * slow)
        t = (np.asarray(gathered, dtype=np.float64) / gather_speed(calibration)
             + np.asarray(added, dtype=np.float64) / scatter_add_speed(calibration))
        return count("row_moves", (t + CALL_OVERHEAD_S) * slow)

    def draw_masks(elements):
        if worker is not None:
            return count("dropout_masks", worker.seconds(
                "masks", *roofline.mask_cost(elements, b)) * slow)
        return count("dropout_masks", elements / masks * slow)

    def link(rows, width, msgs, in_rows, in_msgs, train=True):
        """Each worker's part of one exchange: it sends `rows` in `msgs` frames and receives
        `in_rows` in `in_msgs`; done when the link has carried its frames AND it has copied
        what it sent and received (its own CPU, overlapping the link's time). A training
        exchange under a halo scheme sends the kept fraction of rows in its wire format."""
        if k == 1:
            return np.zeros(k)
        share, row = (kept, scheme.row_bytes(width, dtype)) if train else (1.0, width * b)
        wire_dtype, wire_width = dtype, width
        if train and scheme.compressed(dtype):
            wire_dtype = scheme.wire_dtype(dtype).name
            wire_width = scheme.wire_width(width, dtype)
        header = frame_header_bytes(wire_dtype, (share * rows.max() / max(msgs.max(), 1),
                                                 wire_width))
        out_bytes = rows * share * row + msgs * header
        in_bytes = in_rows * share * row + in_msgs * header
        wire = hop_wire_seconds(out_bytes, in_bytes, msgs, in_msgs, latency, bandwidth,
                                receiver_contention=receiver_contention)
        wire = wire + host_link_seconds(out_bytes + in_bytes, host_bps)
        return np.where((msgs > 0) | (in_msgs > 0),
                        call_s + np.maximum(wire, copy_s * (out_bytes + in_bytes)), 0.0)

    def gat_forward(tl: _Timeline, h: dict, train: bool) -> None:
        """GAT layer (`train/models/gat.py`): T = H W, [T; T_halo], scores per edge and
        head, softmax, dropout on α, one sparse product per head, ELU."""
        l, d_in, d_out, fw = h["layer"], h["d_in"], h["d_out"], h["forward_width"]
        heads = int(h.get("heads", 1))
        edges = nnz * heads
        tl.compute(gemm(n, d_in, fw))                                          # T = H W
        if k > 1 and fw:
            tl.compute(row_moves(sent_rows * fw * b, 0))
            tl.exchange(f"forward {l}", link(sent_rows, fw, fwd_msgs, back_rows, bwd_msgs))
        tl.compute(passes((n + halo) * fw * b * 3))                  # [T; T_halo], att terms
        tl.compute(passes(edges * b * 12))                           # scores, softmax
        if train and dropout > 0:
            tl.compute(draw_masks(edges) + passes(edges * b * 2))
        for _ in range(heads):
            tl.compute(sparse(d_out))                                          # α_h T_h
        if l < len(hops) - 1:
            tl.compute(passes(n * fw * 3 * b))                                 # ELU

    def gat_backward(tl: _Timeline, h: dict) -> None:
        l, d_in, d_out, bw = h["layer"], h["d_in"], h["d_out"], h["backward_width"]
        heads = int(h.get("heads", 1))
        edges = nnz * heads
        for _ in range(heads):
            tl.compute(sparse(d_out))                                          # α_hᵀ dOut_h
        tl.compute(passes(edges * d_out * b * 3 + edges * b * 16))   # dα, softmax', scores'
        tl.compute(passes((n + halo) * bw * b * 3))                  # attention terms of dT
        if k > 1 and bw:
            tl.exchange(f"backward {l}", link(back_rows, bw, bwd_msgs, sent_rows, fwd_msgs))
            tl.compute(row_moves(0, sent_rows * bw * b))
        tl.compute(gemm(n, d_in, bw))                                          # dW
        if l > 0:
            tl.compute(gemm(n, bw, d_in))                                      # dH
            tl.compute(passes(n * d_in * 5 * b))                               # dropout, ELU'

    def forward(tl: _Timeline, train: bool) -> None:
        for h in hops:
            l, d_in, d_out, fw = h["layer"], h["d_in"], h["d_out"], h["forward_width"]
            kind = h.get("model", "gcn")
            if train and dropout > 0:
                tl.compute(draw_masks(n * d_in) + passes(n * d_in * 3 * b))     # mask, h*mask
            if kind == "gat":
                gat_forward(tl, h, train)
                continue
            if kind == "gin":          # the MLP's first width; its second product below
                d_out = int(h.get("inner", d_out))
            if kind == "sage":
                tl.compute(gemm(n, d_in, d_out) + passes(n * d_out * 3 * b))   # self path
            if h["transform_first"]:
                tl.compute(gemm(n, d_in, d_out))
            if k > 1 and fw:
                tl.compute(row_moves(sent_rows * fw * b, 0))                   # send rows
                tl.exchange(f"forward {l}", link(sent_rows, fw, fwd_msgs, back_rows, bwd_msgs,
                                                 train=train))
            tl.compute(passes(n * fw * b))                                     # fresh output
            tl.compute(sparse(fw))
            if not h["transform_first"]:
                tl.compute(gemm(n, d_in, d_out))
            if kind == "gin":
                tl.compute(passes(n * d_out * 2 * b) + gemm(n, d_out, h["d_out"]))
                d_out = h["d_out"]
            if l < len(hops) - 1:
                tl.compute(passes(n * d_out * 2 * b))                          # ReLU
        tl.compute(passes(n * classes * 8 * b))                                # softmax, loss

    def backward(tl: _Timeline) -> None:
        for h in reversed(hops):
            l, d_in, d_out = h["layer"], h["d_in"], h["d_out"]
            bw = h["backward_width"]
            kind = h.get("model", "gcn")
            if kind == "gat":
                gat_backward(tl, h)
                continue
            if kind == "gin":          # dW_b, dQ, ReLU'; then as GCN with the MLP's width
                inner = int(h.get("inner", d_out))
                tl.compute(gemm(n, inner, d_out) + gemm(n, d_out, inner)
                           + passes(n * inner * 3 * b))
                d_out = inner
            if kind == "sage":         # dW_self, and dH's self part
                tl.compute(gemm(n, d_in, d_out))
                if l > 0:
                    tl.compute(gemm(n, d_out, d_in) + passes(n * d_in * 3 * b))
            if h["transform_first"]:
                tl.compute(sparse(d_out))                                      # dT = Â^T dZ
                if k > 1 and bw:
                    tl.exchange(f"backward {l}",
                                link(back_rows, bw, bwd_msgs, sent_rows, fwd_msgs))
                    tl.compute(row_moves(0, sent_rows * bw * b)                  # add back
                               + passes((n + halo) * bw * b))                    # zeroed
                tl.compute(gemm(n, d_in, d_out))                               # dW
                if l > 0:
                    tl.compute(gemm(n, d_out, d_in))                           # dH
            else:
                tl.compute(gemm(n, d_in, d_out))                               # dW
                if l > 0:
                    tl.compute(gemm(n, d_out, d_in))                           # dA
                    tl.compute(sparse(d_in))                                   # Â^T dA
                    if k > 1 and bw:
                        tl.exchange(f"backward {l}",
                                link(back_rows, bw, bwd_msgs, sent_rows, fwd_msgs))
                        tl.compute(row_moves(0, sent_rows * bw * b)
                                   + passes((n + halo) * bw * b))
            if l > 0:
                tl.compute(passes(n * d_in * 5 * b))                           # dropout, ReLU'

    train = _Timeline(k)
    forward(train, train=True)
    backward(train)
    if k > 1:
        ring = np.asarray(plan["traffic"].get("allreduce_bytes_per_worker", [0] * k),
                          dtype=np.float64)
        size_bytes = params * b
        steps = 2 * (k - 1)
        framing = steps * frame_header_bytes(dtype, (math.ceil(params / k),), kind="allreduce",
                                             layer=-1, direction="reduce-scatter")
        # every ring step receives a chunk as large as the one it sends
        per_rank = steps * call_s + np.maximum(steps * latency
                                               + link_seconds(ring + framing, bandwidth),
                                               copy_s * 2 * (ring + framing))
        per_rank = per_rank + host_link_seconds(2 * (ring + framing), host_bps)
        train.compute(0.0)
        train.exchange("all-reduce", per_rank, kind="allreduce")
        train.compute(passes(np.full(k, size_bytes * (k - 1) / k * 3)))     # chunk adds
    train.compute(passes(np.full(k, params * b * 16.0)))                       # Adam step
    train_parts, parts = parts, {}
    ev = _Timeline(k)
    forward(ev, train=False)
    counted = {"train": train.own_compute(), "eval": ev.own_compute()}
    if measured_compute is not None:
        for tl, key, name in ((train, "train", "step_cpu_s"), (ev, "eval", "eval_cpu_s")):
            measured = np.array([float(m[name]) for m in measured_compute]) * slow
            tl.scale_compute(measured / np.maximum(counted[key], 1e-12))
    t = train.totals()
    e = ev.totals()

    workers = [{"worker": w, "compute_s": float(t["own"]["compute"][w]),
                "exchange_s": float(t["own"]["exchange"][w]),
                "allreduce_s": float(t["own"]["allreduce"][w]),
                "wait_s": float(t["wait"][w]),
                "eval_compute_s": float(e["own"]["compute"][w])} for w in range(k)]
    path = t["path"]
    return {
        "method": plan["method"], "workers": k, "link_gbps": float(link_gbps),
        "latency_us": float(latency_us),
        "epoch_s": t["total"],
        "compute_s": path["compute"], "exchange_s": path["exchange"],
        "allreduce_s": path["allreduce"],
        "wait_s": float(t["wait"].mean()),
        "max_wait_s": float(t["wait"].max()),
        "eval_s": e["total"], "epoch_with_eval_s": t["total"] + e["total"],
        "bottleneck": max(path, key=path.get),
        "compute_parts_s": {kind: float(v.max()) for kind, v in train_parts.items()},
        "counted_compute_s": float(counted["train"].max()),
        "compute_source": ("measured" if measured_compute is not None
                           else "roofline" if worker is not None else "counted"),
        "receiver_contention": bool(receiver_contention),
        "transport_call_s": call_s,
        "transport_copy_s_per_byte": copy_s,
        "compute_stretch": stretch,
        "effective_gbps": float(bandwidth),
        "steps": t["hops"],
        "per_worker": workers,
    }


def stale_overlap(result: dict) -> dict:
    """The epoch of a `forecast_plan` result when its halo exchanges are stale (PipeGCN,
    `plan.schemes`): each epoch's exchanges are started as their rows are computed and
    waited for one epoch later, so they run on the link while the worker computes. A
    worker's part of the step is then the LARGER of its compute and its halo exchanges'
    time (each `link` part of the forecast: call cost + latency + serialisation, or its
    copying), not their sum; the all-reduce still synchronises every worker and stays on
    the path. So epoch_s = max over workers of max(compute, halo exchange) + the
    all-reduce's path. Returns {"epoch_s", "synchronous_epoch_s", "hidden_exchange_s"
    (the most any worker hides: min(compute, exchange)), "exposed_exchange_s" (the most a
    worker's exchanges outlast its compute), "bound": "compute" | "exchange"}. The first
    epoch (the warm-up) exchanges synchronously: it costs `synchronous_epoch_s`.
    Not modelled: the all-reduce's frames queueing behind halo frames still in flight on
    the same interface, and the evaluation forward's exchanges (exact, synchronous)."""
    rows = result["per_worker"]
    compute = np.array([r["compute_s"] for r in rows], dtype=np.float64)
    exchange = np.array([r["exchange_s"] for r in rows], dtype=np.float64)
    step = np.maximum(compute, exchange)
    worst = int(np.argmax(step)) if step.size else 0
    return {"epoch_s": float(step.max(initial=0.0)) + float(result["allreduce_s"]),
            "synchronous_epoch_s": float(result["epoch_s"]),
            "hidden_exchange_s": float(np.minimum(compute, exchange).max(initial=0.0)),
            "exposed_exchange_s": float(np.maximum(exchange - compute, 0).max(initial=0.0)),
            "bound": "exchange" if step.size and exchange[worst] > compute[worst]
            else "compute"}


def with_halo_overlap(result: dict, model: dict) -> dict:
    """`result` with its epoch priced by `stale_overlap` when the model's halo scheme is
    stale (the synchronous figures kept under "stale"); unchanged otherwise."""
    if not (model.get("halo_scheme") or {}).get("halo_stale"):
        return result
    stale = stale_overlap(result)
    result["stale"] = stale
    result["epoch_with_eval_s"] = stale["epoch_s"] + result["eval_s"]
    result["epoch_s"] = stale["epoch_s"]
    return result


def _meets(plans: list[dict], target: float | None) -> dict | None:
    """Fewest workers meeting the target; ties go to the slower (cheaper) link, then the
    shorter epoch."""
    if target is None:
        return None
    ok = [p for p in plans if p["epoch_s"] <= target]
    if not ok:
        return None
    return min(ok, key=lambda p: (p["workers"], p["link_gbps"], p["epoch_s"]))


def _pick(p: dict | None) -> dict | None:
    if p is None:
        return None
    return {key: p[key] for key in ("method", "workers", "link_gbps", "epoch_s")}


def forecast(survey_dict: dict, *, link_gbps_list, latency_us: float, calibration: dict,
             speed_factor: float = defaults.SPEED_FACTOR, target_epoch_s: float | None = None,
             cores: int | None = None, dropout: float = defaults.DROPOUT,
             measured_compute: dict | None = None) -> dict:
    """Forecast every plan of a survey on every link speed; mark the fastest plan and the
    plan with the fewest workers whose epoch meets `target_epoch_s`. `measured_compute`:
    {(method, workers): one `calibrate.shard_step_seconds` result per worker} for the
    plans whose compute was measured on their shards."""
    if not link_gbps_list:
        raise ParameterError("link_gbps", "give at least one speed")
    for g in link_gbps_list:
        _check_positive("link_gbps", g)
    _check_positive("latency_us", latency_us, allow_zero=True)
    _check_positive("speed_factor", speed_factor)
    if target_epoch_s is not None:
        _check_positive("target_epoch_s", target_epoch_s)
    model = survey_dict["model"]
    plans = []
    for plan in survey_dict["plans"]:
        for g in link_gbps_list:
            one = forecast_plan(plan, model, link_gbps=g, latency_us=latency_us,
                                calibration=calibration, speed_factor=speed_factor,
                                cores=cores, dropout=dropout,
                                classes=survey_dict.get("graph", {}).get("classes"),
                                measured_compute=(measured_compute or {}).get(
                                    (plan["method"], int(plan["workers"]))))
            plans.append(with_halo_overlap(one, model))
    fastest = min(plans, key=lambda p: (p["epoch_s"], p["workers"])) if plans else None
    meeting = _meets(plans, target_epoch_s)
    for p in plans:
        p["fastest"] = p is fastest
        p["meets_target"] = None if target_epoch_s is None else p["epoch_s"] <= target_epoch_s
        p["fewest_meeting_target"] = p is meeting
    return {
        "kind": "forecast",
        "graph": survey_dict.get("graph", {}),
        "model": model,
        "latency_us": float(latency_us),
        "speed_factor": float(speed_factor),
        "target_epoch_s": target_epoch_s,
        "cores": cores,
        "dropout": dropout,
        "calibration": {key: calibration.get(key) for key in
                        ("dtype", "threads", "calibration_s", "from_flops", "sparse_source")
                        if key in calibration},
        "includes_eval": False,
        "compute_measured": bool(measured_compute),
        "plans": plans,
        "fastest": _pick(fastest),
        "fewest_meeting_target": _pick(meeting),
    }


# ---------------------------------------------------------------- described workers

def plan_memory_bytes(plan: dict) -> int | None:
    """The predicted peak memory of the plan's largest worker (survey.predict_memory)."""
    per = [s.get("memory_bytes") for s in plan.get("shards", [])]
    if per and all(isinstance(m, int) for m in per):
        return int(max(per))
    m = plan.get("max_memory_bytes")
    return int(m) if isinstance(m, int) else None


def plan_price(workers: int, epoch_s: float, price_per_hour: float | None) -> dict:
    """Price of one epoch on `workers` workers at `price_per_hour` each, and of 100
    epochs (None without a price): workers x price per hour x epoch seconds / 3600."""
    if price_per_hour is None:
        return {"price_per_epoch": None, "price_per_100_epochs": None}
    per_epoch = workers * float(price_per_hour) * float(epoch_s) / 3600.0
    return {"price_per_epoch": per_epoch, "price_per_100_epochs": 100.0 * per_epoch}


def _pick_spec(p: dict | None) -> dict | None:
    if p is None:
        return None
    return {key: p[key] for key in ("spec", "method", "workers", "link_gbps", "epoch_s",
                                    "price_per_epoch", "price_per_100_epochs")}


def _fewest_meeting(plans: list[dict], target: float | None) -> dict | None:
    """Fewest workers meeting the target among the plans that fit in memory; ties go to
    the cheaper epoch, then the shorter one."""
    if target is None:
        return None
    ok = [p for p in plans if p["fits_memory"] is not False and p["epoch_s"] <= target]
    if not ok:
        return None
    return min(ok, key=lambda p: (p["workers"], p["price_per_epoch"] or 0.0, p["epoch_s"]))


def forecast_on_specs(survey_dict: dict, specs, *, calibration: dict,
                      target_epoch_s: float | None = None, dropout: float = defaults.DROPOUT,
                      receiver_contention: bool = True) -> dict:
    """Forecast every plan of a survey on every described worker (`specs.WorkerSpec`):
    compute on the worker's roofline (`roofline.WorkerRoofs.of_spec`, efficiencies
    calibrated in `calibration` unless the spec gives them), the spec's network and
    latency, each plan's predicted peak memory per worker against the spec's memory (the
    accelerator's when it has one; a plan that does not fit is marked and never chosen),
    and its price when the spec has one. With `target_epoch_s`, per spec the fewest
    workers meeting it, and overall the cheapest plan meeting it (by price per epoch;
    None when no spec has a price)."""
    from shardtrain.forecast.roofline import WorkerRoofs

    if target_epoch_s is not None:
        _check_positive("target_epoch_s", target_epoch_s)
    model = survey_dict["model"]
    classes = survey_dict.get("graph", {}).get("classes")
    plans, per_spec, roofs_out = [], [], []
    for spec in specs:
        roofs = WorkerRoofs.of_spec(spec, calibration)
        roofs_out.append(roofs.to_dict())
        mine = []
        for plan in survey_dict["plans"]:
            p = forecast_plan(plan, model, link_gbps=spec.network_gbps,
                              latency_us=spec.latency_us, calibration=calibration,
                              dropout=dropout, classes=classes, worker=roofs,
                              receiver_contention=receiver_contention)
            memory = plan_memory_bytes(plan)
            limit = spec.memory_limit_bytes()
            p.update(spec=spec.name, memory_bytes=memory, memory_limit_bytes=limit,
                     fits_memory=None if memory is None else memory <= limit,
                     price_per_hour=spec.price_per_hour,
                     **plan_price(p["workers"], p["epoch_s"], spec.price_per_hour))
            mine.append(p)
        fitting = [p for p in mine if p["fits_memory"] is not False]
        fastest = min(fitting, key=lambda p: (p["epoch_s"], p["workers"])) if fitting else None
        meeting = _fewest_meeting(mine, target_epoch_s)
        for p in mine:
            p["fastest"] = p is fastest
            p["meets_target"] = None if target_epoch_s is None else (
                p["epoch_s"] <= target_epoch_s and p["fits_memory"] is not False)
            p["fewest_meeting_target"] = p is meeting
        per_spec.append({"spec": spec.name, "fastest": _pick_spec(fastest),
                         "fewest_meeting_target": _pick_spec(meeting),
                         "plans_fitting_memory": len(fitting), "plans": len(mine)})
        plans += mine
    fitting = [p for p in plans if p["fits_memory"] is not False]
    fastest = min(fitting, key=lambda p: (p["epoch_s"], p["workers"])) if fitting else None
    priced = [p for p in plans if p["meets_target"] and p["price_per_epoch"] is not None]
    cheapest = min(priced, key=lambda p: (p["price_per_epoch"], p["epoch_s"])) \
        if priced else None
    for p in plans:
        p["cheapest_meeting_target"] = p is cheapest
    return {
        "kind": "forecast",
        "graph": survey_dict.get("graph", {}),
        "model": model,
        "target_epoch_s": target_epoch_s,
        "dropout": dropout,
        "calibration": {key: calibration.get(key) for key in
                        ("dtype", "threads", "calibration_s", "from_flops", "sparse_source")
                        if key in calibration},
        "includes_eval": False,
        "compute_measured": False,
        "receiver_contention": bool(receiver_contention),
        "worker_specs": [s.to_dict() for s in specs],
        "roofs": roofs_out,
        "plans": plans,
        "fastest": _pick_spec(fastest),
        "fewest_meeting_target": _pick_spec(_fewest_meeting(plans, target_epoch_s)),
        "per_spec": per_spec,
        "cheapest_meeting_target": _pick_spec(cheapest),
    }
