"""Survey: metrics, predicted traffic and predicted memory of partition plans.

A plan is (graph, partition method, worker count). The survey builds the plan's shards
(structure only, no vertex data) and reads everything off them and off the exchange
schedule (`schedule.layer_hops`) — the same two things the worker follows — so the
predicted payload equals what the trainer measures, byte for byte. It starts no processes,
so it can compare plans for clusters far larger than this machine (k up to 1024 and more):
per plan the Python work is O(k) loops over workers; the k x k traffic matrix is numpy.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from shardtrain import defaults
from shardtrain.data.graph import structure_fingerprint
from shardtrain.documents import ABSENT, Document
from shardtrain.errors import ParameterError
from shardtrain.plan.schedule import (
    MAX_HEADS,
    MODELS,
    LayerHop,
    layer_dims,
    layer_param_shapes,
    model_hops,
    output_width,
)
from shardtrain.transport.wire import KIND_ALLREDUCE, KIND_HALO, NO_LAYER

# Resident memory of an idle worker interpreter with numpy and scipy.sparse imported,
# before it loads anything (its VmRSS, rounded up; benchmarks/bench_survey.py checks the
# predicted worker memory against a real one). It is the floor under every predicted worker.
BASELINE_RSS_BYTES = 45 * 2**20

# The byte-accounting keys (KIND_HALO, KIND_ALLREDUCE, NO_LAYER: the all-reduce is one flat
# array of all gradients, no layer) are the transport's own, from transport/wire.py.


@dataclass(frozen=True)
class SurveySettings:
    """The model shape and partition options a survey compares plans under."""

    layers: int = defaults.LAYERS
    hidden: int = defaults.HIDDEN
    dtype: str = defaults.DTYPE
    classes: int | None = None      # needed when the graph has no labels
    input_dim: int | None = None    # needed when the graph has no features
    bias: bool = defaults.BIAS
    imbalance: float = defaults.IMBALANCE
    seed: int = defaults.SEED
    model: str = defaults.MODEL     # schedule.MODELS
    heads: int = defaults.HEADS     # GAT heads per hidden layer
    # halo scheme (plan.schemes.HaloScheme) and the epochs its payload is replayed over
    halo_keep: float = defaults.HALO_KEEP
    halo_format: str | None = defaults.HALO_FORMAT
    halo_stale: bool = defaults.HALO_STALE
    halo_smooth: float = defaults.HALO_SMOOTH
    epochs: int = defaults.EPOCHS


@dataclass(kw_only=True)
class SurveyPlan(Document):
    """One plan of a survey, typed (fields in the order `survey_plan` writes them; its
    shape is `documents.SURVEY_PLAN`). The nested parts stay the dicts the JSON holds."""

    method: str
    workers: int
    edge_cut: int = ABSENT
    replication_factor: float = ABSENT
    max_memory_bytes: int = ABSENT
    epoch_payload_bytes: int = ABSENT
    shards: list[dict]              # per worker: owned, halo, local_edges, memory, bytes
    traffic: dict                   # `predict_traffic`: bytes per epoch, pair matrix, ...
    imbalance: dict = ABSENT        # max/mean of owned, local_edges, halo, bytes_sent
    partition: dict = ABSENT        # `partition.partition_plan` details
    partition_s: float | None = ABSENT
    build_s: float | None = ABSENT
    partition_cpu_s: float = ABSENT
    build_cpu_s: float = ABSENT
    extra: dict = field(default_factory=dict)


def parameter_elements(hops: list[LayerHop], *, bias: bool = False) -> int:
    """Number of trainable scalars: for GCN W_l (d_in x d_out) per layer, plus b_l (d_out)
    with bias; for every model the arrays of `schedule.layer_param_shapes`. The worker
    all-reduces exactly these gradients as one flat array each epoch."""
    return int(sum(int(np.prod(shape)) for h in hops
                   for _, shape, _ in layer_param_shapes(h, bias)))


def _ring_send_elements(size: int, k: int) -> np.ndarray:
    from shardtrain.transport.ring import ring_send_elements

    if k == 1:
        return np.zeros(1, dtype=np.int64)
    return np.asarray(ring_send_elements(size, k), dtype=np.int64)


def peer_rows(send_ptrs, halo_ptrs) -> tuple[np.ndarray, np.ndarray]:
    """(send_rows, halo_rows), both k x k int64, from every worker's `send_ptr` and
    `halo_ptr` (in worker order; shard headers or a worker's summary carry them):
    send_rows[p, q] = rows p sends q in a forward exchange; halo_rows[p, q] = rows of p's
    halo owned by q. Every prediction below reads the shards through these two tables."""
    send_rows = np.stack([np.diff(np.asarray(p, dtype=np.int64)) for p in send_ptrs])
    halo_rows = np.stack([np.diff(np.asarray(p, dtype=np.int64)) for p in halo_ptrs])
    return send_rows.astype(np.int64), halo_rows.astype(np.int64)


def _peer_rows(shards) -> tuple[np.ndarray, np.ndarray]:
    return peer_rows([s.send_ptr for s in shards], [s.halo_ptr for s in shards])


def predict_traffic(shards, hops: list[LayerHop], itemsize: int, *,
                    param_elements: int) -> dict:
    """`predict_traffic_of_rows` of the shards' `peer_rows`."""
    return predict_traffic_of_rows(*_peer_rows(shards), hops, itemsize,
                                   param_elements=param_elements)


def predict_traffic_of_rows(send_rows: np.ndarray, halo_rows: np.ndarray,
                            hops: list[LayerHop], itemsize: int, *,
                            param_elements: int) -> dict:
    """Payload bytes (array data only, no framing) of one training epoch.

    Forward, layer l, p -> q: len(shard_p.send_to(q)) * forward_width_l * itemsize.
    Backward, layer l, p -> q: len(shard_p.halo_from(q)) * backward_width_l * itemsize
    (the gradients of p's halo rows owned by q go back to q).
    All-reduce: rank r sends ring_send_elements(param_elements, k)[r] * itemsize
    (ring all-reduce, Patarasuk & Yuan 2009: about 2(k-1)/k of the gradient each).
    `eval_forward_bytes`: one evaluation forward pass (the forward exchanges, no backward).
    `pair_bytes[p][q]`: halo bytes p sends q per epoch, forward + backward.
    `send_rows[p][q]`: rows p sends q in one forward exchange (= len(shard_p.send_to(q))).
    """
    k = send_rows.shape[0]
    rows_sent = int(send_rows.sum())        # == halo_rows.sum() on consistent shards
    rows_back = int(halo_rows.sum())
    per_layer = []
    for h in hops:
        per_layer.append({
            "layer": h.layer, "transform_first": h.transform_first,
            "forward_width": h.forward_width, "backward_width": h.backward_width,
            "forward_bytes": rows_sent * h.forward_width * itemsize,
            "backward_bytes": rows_back * h.backward_width * itemsize,
        })
    fwd_width = sum(h.forward_width for h in hops)
    bwd_width = sum(h.backward_width for h in hops)
    pair = (send_rows * (fwd_width * itemsize) + halo_rows * (bwd_width * itemsize))
    allreduce = _ring_send_elements(param_elements, k) * itemsize
    forward = sum(p["forward_bytes"] for p in per_layer)
    return {
        "forward_bytes": forward,
        "backward_bytes": sum(p["backward_bytes"] for p in per_layer),
        "allreduce_bytes": int(allreduce.sum()),
        "eval_forward_bytes": forward,
        "allreduce_bytes_per_worker": allreduce.tolist(),
        "per_layer": per_layer,
        "pair_bytes": pair.tolist(),
        "send_rows": send_rows.tolist(),
    }


def epoch_payload_bytes(traffic: dict) -> int:
    """Payload of one training step: forward + backward halo exchanges + all-reduce (under
    a halo scheme, the expected halo payload of an epoch, rounded)."""
    scheme = traffic.get("halo_scheme")
    if scheme is not None:
        return int(round(scheme["expected_forward_bytes"] + scheme["expected_backward_bytes"])
                   + traffic["allreduce_bytes"])
    return int(traffic["forward_bytes"] + traffic["backward_bytes"] + traffic["allreduce_bytes"])


def stop_vote_bytes(k: int) -> np.ndarray:
    """Payload each rank sends in one early-stopping vote (`shardtrain.train.stopping`): a ring
    all-reduce of VOTE_ELEMENTS float64 values, after every evaluation of an early-stopping
    run (none without --early-stop)."""
    from shardtrain.plan.schedule import VOTE_ELEMENTS, VOTE_ITEMSIZE

    return _ring_send_elements(VOTE_ELEMENTS, k) * VOTE_ITEMSIZE


def predict_run_payload(traffic: dict, epochs: int, evals: int, stop_votes: int = 0) -> int:
    """Payload of a whole run: `epochs` training steps, `evals` evaluation forwards and
    `stop_votes` early-stopping votes (one per epoch run with --early-stop, else 0).
    This is the number the trainer compares with what it measured."""
    scheme = traffic.get("halo_scheme")
    if scheme is not None and len(scheme.get("forward_bytes_per_epoch", ())) >= epochs:
        # the replayed payload of epochs 1..epochs: exact, not the expectation
        total = (sum(scheme["forward_bytes_per_epoch"][:epochs])
                 + sum(scheme["backward_bytes_per_epoch"][:epochs])
                 + epochs * traffic["allreduce_bytes"] + evals * traffic["eval_forward_bytes"])
    else:
        total = epochs * epoch_payload_bytes(traffic) + evals * traffic["eval_forward_bytes"]
    if stop_votes:
        total += stop_votes * int(stop_vote_bytes(len(traffic["allreduce_bytes_per_worker"]))
                                  .sum())
    return int(total)


def predict_payload_breakdown(shards, hops: list[LayerHop], itemsize: int, *,
                              param_elements: int, epochs: int, evals: int,
                              stop_votes: int = 0) -> dict:
    """`predict_payload_breakdown_of_rows` of the shards' `peer_rows`."""
    return predict_payload_breakdown_of_rows(*_peer_rows(shards), hops, itemsize,
                                             param_elements=param_elements, epochs=epochs,
                                             evals=evals, stop_votes=stop_votes)


def predict_payload_breakdown_of_rows(send_rows: np.ndarray, halo_rows: np.ndarray,
                                      hops: list[LayerHop], itemsize: int, *,
                                      param_elements: int, epochs: int, evals: int,
                                      stop_votes: int = 0) -> dict:
    """Predicted payload of a run per (src, dst, kind, layer, direction), the trainer's
    counter keys: kind "halo" with direction "forward" / "backward" / "eval", and kind
    "allreduce" with layer -1 and direction "backward" (rank r sends to r+1 in the ring;
    early-stopping votes, `stop_vote_bytes`, are added there).
    Pairs that exchange nothing are left out. Sums to `predict_run_payload`.
    Loops over workers and their peers: meant for training-sized k, not for k = 1024.
    """
    k = send_rows.shape[0]
    out: dict[tuple, int] = {}
    for p in range(k):
        for q in np.flatnonzero((send_rows[p] > 0) | (halo_rows[p] > 0)).tolist():
            n_send = int(send_rows[p, q])
            n_halo = int(halo_rows[p, q])
            for h in hops:
                fwd = n_send * h.forward_width * itemsize
                bwd = n_halo * h.backward_width * itemsize
                if fwd:
                    out[(p, q, KIND_HALO, h.layer, "forward")] = epochs * fwd
                    if evals:
                        out[(p, q, KIND_HALO, h.layer, "eval")] = evals * fwd
                if bwd and epochs:
                    out[(p, q, KIND_HALO, h.layer, "backward")] = epochs * bwd
    allreduce = _ring_send_elements(param_elements, k) * itemsize * epochs \
        + stop_vote_bytes(k) * stop_votes          # the votes share the gradients' key
    for r in range(k):
        if allreduce[r]:
            out[(r, (r + 1) % k, KIND_ALLREDUCE, NO_LAYER, "backward")] = \
                int(allreduce[r])
    return out


def predict_memory(shard, hops: list[LayerHop], itemsize: int, *, param_elements: int,
                   input_dim: int, feature_itemsize: int | None = None,
                   dropout: bool = True) -> int:
    """Predicted peak training memory (bytes) of one worker, from the arrays it holds.

    n = owned rows, h = halo rows, s = rows it sends (all peers), nnz = entries of its
    local Â, b = itemsize of the training dtype, P = `param_elements`; CSR index widths are
    the shard's own. Terms, following `worker.HaloOps` and `model.train_step`:
    - baseline: `BASELINE_RSS_BYTES`, the idle interpreter with numpy + scipy;
    - shard structure: owned n x 8, halo h x 8, send_idx s x 8, the two k+1 pointer arrays;
    - Â twice and a bit: the shard's float64 CSR, its owned and halo column blocks in the
      training dtype (two indptrs of n + 1), and the halo block's transpose (indptr h + 1)
      for the backward products (the owned block is symmetric and serves as its own);
      the 0/1 selection matrices that add the peers' rows back (per peer an int32 indptr
      of n + 1, and s entries of int32 index + value in all);
    - vertex data: the features n x input_dim in the training dtype, plus the stored copy
      when it is of another width (`feature_itemsize`), labels n x 8, three masks n x 1;
    - per layer, reused every epoch: the forward halo receive buffer h x fw, the forward
      send blocks s x fw, the backward halo buffer h x bw and receive blocks s x bw (x b);
    - the forward cache of the training step, per layer: input h (layers > 0), and when
      `dropout` the dropped-out input (n x d_in x b) with its boolean keep mask (n x d_in,
      kept for layers > 0, alive while applied for layer 0), Â[H] in aggregate-first order
      (n x d_in x b); the logits and their gradient, 2 x n x classes x b;
    - the backward working set (`_backward_peak`), the largest over layers of dZ, the
      layer above's dH and dT, the owned rows of Âᵀ G (n x fw), and for layers > 0 the
      input gradient dH, its dropped-out copy (which the ReLU-masked product reuses: 2 x n
      x d_in, times b) and the ReLU mask (n x d_in x 1); GAT's own instead (below);
    - parameters, Adam m and v, the per-layer gradients and their flat copy: 5 x P x b.

    Checked against a real worker's peak RSS in benchmarks/bench_survey.py (the prediction
    falls a little short: the rest is the interpreter's and the allocator's memory beyond
    the baseline and short-lived temporaries of the products, not modelled term by term).
    """
    adj = shard.adj
    return predict_memory_counts(
        shard.num_owned, shard.num_halo, int(shard.send_ptr[-1]), int(adj.nnz),
        int(np.count_nonzero(adj.indices >= shard.num_owned)),
        int(np.count_nonzero(np.diff(shard.send_ptr))), shard.workers, hops, itemsize,
        param_elements=param_elements, input_dim=input_dim,
        feature_itemsize=feature_itemsize, dropout=dropout,
        index_itemsizes=(adj.indptr.dtype.itemsize, adj.indices.dtype.itemsize),
        value_itemsize=adj.data.dtype.itemsize)


def local_index_itemsize(nnz: int, ncols: int) -> int:
    """Index width of a shard's local CSR: scipy keeps (or narrows to) int32 indices when
    its entries and columns fit, as `build_shards` hands it int32 or fitting int64 arrays."""
    return 4 if max(nnz, ncols) <= 2**31 - 1 else 8


def predict_memory_counts(n: int, h: int, s: int, nnz: int, nnz_halo: int, peers: int,
                          k: int, hops: list[LayerHop], itemsize: int, *, param_elements: int,
                          input_dim: int, feature_itemsize: int | None = None,
                          dropout: bool = True, index_itemsizes: tuple[int, int] | None = None,
                          value_itemsize: int = 8) -> int:
    """`predict_memory` from a worker's counts alone: owned n, halo h, rows sent s, entries
    of Â nnz (self-loops included) of which nnz_halo in halo columns, send peers, k."""
    b = int(itemsize)
    if index_itemsizes is None:
        index_itemsizes = (local_index_itemsize(nnz, n + h),) * 2
    ip, ix = index_itemsizes
    fb = b if feature_itemsize is None else int(feature_itemsize)
    total = BASELINE_RSS_BYTES
    total += (n + h + s) * 8 + 2 * (k + 1) * 8
    total += (n + 1) * ip + nnz * (ix + value_itemsize)     # shard's Â
    total += 2 * (n + 1) * ip + nnz * (ix + b)       # owned and halo column blocks of Â
    total += (h + 1) * ip + nnz_halo * (ix + b)      # the halo block's transpose
    total += peers * (n + 1) * 4 + s * (4 + b)       # selection matrices (scatter-add)
    total += n * input_dim * b + (n * input_dim * fb if fb != b else 0) + n * 8 + 3 * n
    for hop in hops:
        fw, bw = hop.forward_width, hop.backward_width
        total += (h * fw + s * fw + h * bw + s * bw) * b             # halo, send, recv
        # dropped-out input and its boolean keep mask (kept for layers > 0, alive while it
        # is applied for layer 0), plus the input itself for layers > 0
        cache = n * hop.d_in * ((hop.layer > 0) * b + dropout * (b + 1))
        total += cache + (not hop.transform_first) * n * hop.d_in * b
    model = hops[0].model if hops else "gcn"
    total += 2 * n * output_width(hops[-1]) * b
    total += _backward_peak(n, hops, b) if model != "gat" else 0
    total += 5 * param_elements * b
    total += _model_memory(n, h, s, nnz, nnz_halo, hops, b, ip, ix)
    return int(total)


def _backward_peak(n: int, hops: list[LayerHop], b: int) -> int:
    """The largest working set of `model.backward` (GCN's order of products, which
    GraphSAGE's and GIN's follow) over the layers, beyond the cache and dlogits. At layer
    l, alive: dZ_l (n x d_out; dlogits itself on the last layer, counted apart) and, below
    the last layer, the layer above's dH and dT (still bound until rebound here); then
    transform-first dT = Âᵀ dZ (n x fw), and for l > 0 dH = dT Wᵀ; for l > 0 the
    dropped-out dH and the ReLU mask (n x d_in x 1), the product reusing the dropped-out
    temporary's buffer (numpy elides it). Aggregate-first: dZ Wᵀ and its product, then
    the same dropout and mask. GIN holds its MLP's dP1 (n x hidden) beside them."""
    peak = 0
    last = len(hops) - 1
    for i, hop in enumerate(hops):
        l = hop.layer
        d_in = n * hop.d_in * b
        dz = 0 if i == last else n * hop.d_out * b
        above = 0
        if i < last:
            nxt = hops[i + 1]
            above = n * hop.d_out * b + (n * nxt.forward_width * b if nxt.transform_first
                                         else 0)
        if hop.transform_first:
            dt = n * hop.forward_width * b
            need = dz + above + dt + (d_in if l > 0 else 0)
            if l > 0:
                need = max(need, dz + dt + 2 * d_in + n * hop.d_in)
        else:
            need = dz + above
            if l > 0:
                need = max(dz + above + 2 * d_in, dz + 2 * d_in + n * hop.d_in)
        if hop.model == "gin":
            need += n * hop.inner * b              # dP1, the MLP's gradient, alive too
        peak = max(peak, need)
    return peak


def _model_memory(n: int, h: int, s: int, nnz: int, nnz_halo: int, hops: list[LayerHop],
                  b: int, ip: int, ix: int) -> int:
    """What the models beside GCN hold beyond GCN's terms (0 for GCN), from the arrays of
    `train/models/` and `models.common`:
    - sage: its operator D⁻¹A in float64 (int64 indptr; nnz - n entries), and the owned
      block's transpose (D⁻¹A is not symmetric);
    - gin: its operator A + I in float64, and per layer the MLP's P1 and Q (n x hidden);
    - gat: the local structure (indptr, indices, rows, column ids: int64) and its column
      order (kept once the first backward built it); per layer T of every local column
      ((n + h) x K·d), the attention α, scores and dropped-out α (E x K x b), the boolean
      dropout mask (E x K x 1), the output before ELU (n x K·d); instead of GCN's backward
      working set, the largest over layers of: below the last layer dZ and the layer
      above's dH (2 x n x K·d), dT of the local columns, one E x K array of the softmax's
      gradient, the exchanged dT and one n x K·d temporary, the attention-source gradients
      ((n + h) x K, float64 and cast); without GCN's halo receive buffers (the gather
      writes into its fresh output)."""
    model = hops[0].model if hops else "gcn"
    if model == "gcn":
        return 0
    extra = 0
    if model == "sage":
        own = nnz - nnz_halo - n
        extra += (n + 1) * 8 + (nnz - n) * (ix + 8)
        extra += (n + 1) * ip + own * (ix + b)
        extra -= n * (2 * ix + b + 8)          # GCN's column blocks counted the self-loops
    elif model == "gin":
        extra += (n + 1) * 8 + nnz * (ix + 8)
        extra += sum(2 * n * hop.inner * b for hop in hops)
    elif model == "gat":
        extra += (n + 1) * 8 + 2 * nnz * 8 + (n + h) * 8
        extra += 2 * nnz * 8 + (n + h + 1) * 8          # the column order, kept once built
        peak = 0
        last = len(hops) - 1
        for i, hop in enumerate(hops):
            kd, k = hop.heads * hop.d_out, hop.heads
            extra += (n + h) * kd * b + 3 * nnz * k * b + nnz * k + n * kd * b
            extra -= (h * hop.forward_width + h * hop.backward_width) * b
            carried = 2 * n * kd * b if i < last else 0
            peak = max(peak, carried + (n + h) * kd * b + nnz * k * b + 2 * n * kd * b
                       + (n + h) * k * (8 + b))
        extra += peak
    return extra


def _max_over_mean(values: np.ndarray) -> dict:
    values = np.asarray(values, dtype=np.float64)
    mean = float(values.mean()) if values.size else 0.0
    ratio = float(values.max()) / mean if mean > 0 else 1.0
    return {"max_over_mean": ratio, "max": float(values.max()), "mean": mean}


def survey_plan(graph, method: str, k: int, *, hops: list[LayerHop], itemsize: int,
                seed: int, imbalance: float, assignment: np.ndarray | None = None,
                bias: bool = False, scheme=None, epochs: int = defaults.EPOCHS) -> dict:
    """Partition (or take `assignment`), build the shards without vertex data, and report
    the plan: edge cut, replication factor, per-worker sizes, memory and bytes, traffic per
    epoch, and max/mean imbalances. Shards are freed before returning.
    Under a halo `scheme` (`plan.schemes.HaloScheme`, not exact for the dtype of
    `itemsize`), `traffic["halo_scheme"]` is `schemes.plan_scheme_traffic` (every epoch's
    halo payload for `seed` and `epochs`, and the expectation per epoch) and the plan's
    `epoch_payload_bytes` uses the expectation."""
    from shardtrain.plan.shards import build_shards

    t0, c0 = time.perf_counter(), time.process_time()
    details = {"method": method}             # how the plan was made (METIS: scheme, balance)
    if assignment is None:
        from shardtrain.plan.partition import partition_plan

        assignment, details = partition_plan(graph, method, k, seed=seed, imbalance=imbalance)
    t1, c1 = time.perf_counter(), time.process_time()
    # Id order: every count read below (rows, halo, send lists, nnz, index widths) is the
    # same in any local order, and id order skips the trainer's reverse Cuthill-McKee pass
    # (tests/test_survey.py checks the prediction against a trained run's measurement).
    shards = build_shards(graph, assignment, k, with_vertex_data=False, order="id")
    t2, c2 = time.perf_counter(), time.process_time()
    fsize = None if graph.features is None else graph.features.dtype.itemsize
    plan = plan_of_shards(shards, method, graph.num_vertices, hops=hops, itemsize=itemsize,
                          bias=bias, feature_itemsize=fsize, details=details,
                          scheme=scheme, seed=seed, epochs=epochs,
                          times={"partition_s": t1 - t0, "build_s": t2 - t1,
                                 "partition_cpu_s": c1 - c0, "build_cpu_s": c2 - c1})
    del shards            # refcounting frees them now: the next plan starts clean
    return plan


def plan_of_shards(shards, method: str, num_vertices: int, *, hops: list[LayerHop],
                   itemsize: int, bias: bool, feature_itemsize: int | None, details: dict,
                   times: dict, scheme=None, seed: int = 0,
                   epochs: int = defaults.EPOCHS) -> dict:
    """The survey's plan record of a full list of built shards, in any local order (every
    count read is order-invariant): `survey_plan`'s, and `update`'s of the shards it
    holds or builds anyway. `scheme`, `seed`, `epochs`: as `survey_plan`'s."""
    from shardtrain.plan.shards import shard_stats

    k = len(shards)
    params = parameter_elements(hops, bias=bias)
    traffic = predict_traffic(shards, hops, itemsize, param_elements=params)
    dtype = np.dtype(f"f{itemsize}")
    if scheme is not None and not scheme.exact(dtype):
        from shardtrain.plan.schemes import plan_scheme_traffic

        traffic["halo_scheme"] = plan_scheme_traffic(
            [s.halo for s in shards], [s.halo_ptr for s in shards], hops, dtype, scheme,
            seed=seed, epochs=epochs)
    stats = shard_stats(shards)
    # entries of the local Â in halo columns: each cut edge appears once on either side
    cut_entries = np.array([np.count_nonzero(s.adj.indices >= s.num_owned) for s in shards])
    owned, halo, local_edges = stats["owned"], stats["halo"], stats["local_edges"]
    memory = np.array([predict_memory(s, hops, itemsize, param_elements=params,
                                      input_dim=hops[0].d_in, feature_itemsize=feature_itemsize)
                       for s in shards])
    return plan_record(method, k, num_vertices, owned, halo, local_edges, cut_entries,
                       memory, traffic, details, times)


def plan_record(method: str, k: int, num_vertices: int, owned, halo, local_edges,
                cut_entries, memory, traffic: dict, details: dict, times: dict) -> dict:
    """One plan of the survey JSON from per-worker counts (both surveys write it)."""
    owned, halo = np.asarray(owned, dtype=np.int64), np.asarray(halo, dtype=np.int64)
    local_edges = np.asarray(local_edges, dtype=np.int64)
    memory = np.asarray(memory, dtype=np.int64)
    pair = np.asarray(traffic["pair_bytes"], dtype=np.int64)
    ring = np.asarray(traffic["allreduce_bytes_per_worker"], dtype=np.int64)
    # a ring rank receives what its predecessor sends
    sent = pair.sum(axis=1) + ring
    received = pair.sum(axis=0) + np.roll(ring, 1)
    cut = int(np.asarray(cut_entries, dtype=np.int64).sum() // 2)
    shard_rows = [{"worker": w, "owned": int(owned[w]), "halo": int(halo[w]),
                   "local_edges": int(local_edges[w]), "memory_bytes": int(memory[w]),
                   "bytes_sent": int(sent[w]), "bytes_received": int(received[w])}
                  for w in range(k)]
    timing = {key: times[key] for key in ("partition_s", "build_s", "partition_cpu_s",
                                          "build_cpu_s") if key in times}
    more = {key: v for key, v in times.items() if key not in timing}
    return SurveyPlan(
        method=method,
        workers=k,
        edge_cut=cut,
        replication_factor=float((owned.sum() + halo.sum()) / num_vertices),
        max_memory_bytes=int(memory.max()),
        epoch_payload_bytes=epoch_payload_bytes(traffic),
        shards=shard_rows,
        traffic=traffic,
        imbalance={"owned": _max_over_mean(owned),
                   "local_edges": _max_over_mean(local_edges),
                   "halo": _max_over_mean(halo),
                   "bytes_sent": _max_over_mean(sent)},
        partition=details,
        # partition_s, build_s and their *_cpu_s (this process's CPU time: the machine may
        # be shared); the streaming survey adds its seconds per pass after them
        **timing,
        extra=more,
    ).to_dict()


def model_shape(graph, settings: SurveySettings) -> tuple[list[tuple[int, int]], list[LayerHop]]:
    """(dims, hops) of the model the settings describe on this graph."""
    input_dim = graph.input_dim if graph.input_dim is not None else settings.input_dim
    classes = graph.num_classes if graph.num_classes > 0 else settings.classes
    # every missing width in one line, so a structure-only graph needs one retry, not two
    missing = []
    if input_dim is None or input_dim < 1:
        missing.append(("input_dim", "features", "the input width D >= 1"))
    if classes is None or classes < 1:
        missing.append(("classes", "labels", "the number of classes C >= 1"))
    if missing:
        raise ParameterError(missing[0][0], f"the graph has no "
                             f"{' and no '.join(m[1] for m in missing)}; give "
                             f"{' and '.join(m[2] for m in missing)}",
                             also=tuple(m[0] for m in missing[1:]))
    assert input_dim is not None and classes is not None   # refused above when missing
    dims = layer_dims(int(input_dim), settings.hidden, int(classes), settings.layers,
                      model=settings.model, heads=settings.heads)
    return dims, model_hops(dims, settings.model, hidden=settings.hidden,
                            heads=settings.heads)


def check_plans(graph, methods: list[str], workers_list: list[int],
                settings: SurveySettings) -> None:
    """Reject bad settings (a ParameterError naming the parameter) before any work starts."""
    from shardtrain.plan.partition import METHODS

    for m in methods:
        if m not in METHODS:
            raise ParameterError("method", f"unknown method {m!r} "
                                           f"(choose from {', '.join(METHODS)})")
    for k in workers_list:
        if k < 1 or k > graph.num_vertices:
            raise ParameterError("workers", f"{k} is not between 1 and the graph's "
                                            f"{graph.num_vertices} vertices")
    if settings.layers < 1:
        raise ParameterError("layers", f"must be >= 1, got {settings.layers}")
    if settings.hidden < 1:
        raise ParameterError("hidden", f"must be >= 1, got {settings.hidden}")
    if settings.dtype not in ("float32", "float64"):
        raise ParameterError("dtype", f"must be float32 or float64, got {settings.dtype!r}")
    if not 0.0 <= settings.imbalance < 1.0:
        raise ParameterError("imbalance", f"must be in [0, 1), got {settings.imbalance}")
    if settings.model not in MODELS:
        raise ParameterError("model", f"must be one of {', '.join(MODELS)} (got "
                                      f"{settings.model!r})")
    if not 1 <= settings.heads <= MAX_HEADS:
        raise ParameterError("heads", f"must be an integer in 1..{MAX_HEADS} (got "
                                      f"{settings.heads})")
    if not (isinstance(settings.epochs, int) and settings.epochs >= 1):
        raise ParameterError("epochs", f"must be an integer >= 1, got {settings.epochs!r}")
    from shardtrain.plan.schemes import scheme_of
    scheme_of(settings)
    model_shape(graph, settings)


def survey(graph, methods: list[str], workers_list: list[int], settings: SurveySettings,
           *, assignment: np.ndarray | None = None, on_plan=None) -> dict:
    """Survey every (method, workers) plan. With `assignment` (a user's own partition),
    `methods` should be one label and `workers_list` its worker count.
    `on_plan(plan)` is called after each plan (progress reporting in the CLI)."""
    check_plans(graph, [] if assignment is not None else methods, workers_list, settings)
    dims, hops = model_shape(graph, settings)
    itemsize = np.dtype(settings.dtype).itemsize
    from shardtrain.plan.schemes import scheme_of
    scheme = scheme_of(settings)
    plans = []
    for method in methods:
        for k in workers_list:
            plan = survey_plan(graph, method, k, hops=hops, itemsize=itemsize,
                               seed=settings.seed, imbalance=settings.imbalance,
                               assignment=assignment, bias=settings.bias,
                               scheme=scheme, epochs=settings.epochs)
            plans.append(plan)
            if on_plan is not None:
                on_plan(plan)
    return survey_document(graph.num_vertices, graph.num_edges, structure_fingerprint(graph),
                           settings, dims, hops, plans)


def survey_document(num_vertices: int, num_edges: int, structure: str,
                    settings: SurveySettings, dims, hops: list[LayerHop], plans: list) -> dict:
    """The survey JSON around its plans (both surveys write it)."""
    return {
        "graph": {"vertices": num_vertices, "edges": num_edges,
                  "input_dim": dims[0][0], "classes": dims[-1][1],
                  "structure_fingerprint": structure},
        "model": {"name": settings.model,
                  **({"heads": settings.heads} if settings.model == "gat" else {}),
                  "layers": settings.layers, "hidden": settings.hidden,
                  "dtype": settings.dtype, "bias": settings.bias,
                  "parameters": parameter_elements(hops, bias=settings.bias),
                  "dims": [list(d) for d in dims],
                  "hops": [{"layer": h.layer, "d_in": h.d_in, "d_out": h.d_out,
                            "transform_first": h.transform_first,
                            "forward_width": h.forward_width,
                            "backward_width": h.backward_width,
                            **({} if h.model == "gcn" else
                               {"model": h.model, "heads": h.heads, "inner": h.inner})}
                           for h in hops]}
        | _scheme_entry(settings),
        "plans": plans,
    }


def _scheme_entry(settings) -> dict:
    """{"halo_scheme": {...}} of the model entry when a halo scheme is on, else {}."""
    from shardtrain.plan.schemes import scheme_of

    scheme = scheme_of(settings)
    if scheme.exact(np.dtype(settings.dtype)):
        return {}
    return {"halo_scheme": {**scheme.to_dict(), "epochs": int(settings.epochs),
                            "seed": int(settings.seed)}}
